"""Intermediate stages: the manifest's names, channels and strides are what the networks give,
`forward_intermediates` returns them in the order asked and runs no further than needed, and
local mode's patch features are unchanged by going through it.

Networks here have random weights (seeded) unless a test says otherwise; the Lite1/Lite2 ones
are built by `build` from a state dict file the test saves. No network access.
"""
import dataclasses
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from oddling.backbones import Backbone
from oddling.backbones import efficientnet_lite
from oddling.backbones.efficientnet_lite import EfficientNetLite, EfficientNetLite0, scaled_stages
from oddling.backbones.manifest import get_spec, parse_manifest
from oddling.backbones.openclip import ImageTower
from oddling.backbones.patch_grid import grid_size, patch_features, patch_grid
from oddling.errors import OddlingError

LITE_IDS = ("efficientnet-lite0", "efficientnet-lite1", "efficientnet-lite2")
STAGE_NAMES = ("stage1", "stage2", "stage3", "stage4", "stage5", "stage6", "stage7", "head")


def random_network(backbone_id: str, seed: int = 0) -> EfficientNetLite:
    torch.manual_seed(seed)
    width, depth = efficientnet_lite.scaling(get_spec(backbone_id))
    return EfficientNetLite(width, depth, name=backbone_id).eval()


@pytest.fixture(scope="module")
def lite0():
    return random_network("efficientnet-lite0")


@pytest.fixture(scope="module", params=["efficientnet-lite1", "efficientnet-lite2"])
def built_scaled(request, tmp_path_factory):
    """(spec, network) built by the family's `build` from a random state dict saved to disk."""
    spec = get_spec(request.param)
    path = tmp_path_factory.mktemp("weights") / f"{spec.id}-random.pth"
    torch.save(random_network(spec.id, seed=1).state_dict(), path)
    return spec, efficientnet_lite.build(spec, path)


def test_manifest_lists_the_same_stage_names_for_every_lite():
    for backbone_id in LITE_IDS:
        assert tuple(get_spec(backbone_id).stages) == STAGE_NAMES


def test_lite0_manifest_stages_are_the_papers():
    # Tan & Le 2019, Table 1 (the EfficientNet-B0 baseline, which Lite0 keeps), from memory:
    # output channels of stages 2..8 and the 1x1 head, and the resolution each leaves at 224 px
    # (a stage's output resolution is the next row's input resolution).
    table1 = [(16, 112), (24, 56), (40, 28), (80, 14), (112, 14), (192, 7), (320, 7), (1280, 7)]
    stages = get_spec("efficientnet-lite0").stages
    assert [(s["channels"], 224 // s["stride"]) for s in stages.values()] == table1


def test_every_lite0_stage_has_the_manifest_shape(lite0):
    stages = get_spec("efficientnet-lite0").stages
    x = torch.randn(2, 3, 224, 224)
    with torch.inference_mode():
        outputs = lite0.forward_intermediates(x, list(stages))
    for (name, info), y in zip(stages.items(), outputs):
        side = 224 // info["stride"]
        assert tuple(y.shape) == (2, info["channels"], side, side), name


def test_strides_round_up_on_sizes_they_do_not_divide(lite0):
    # TensorFlow "SAME" convolutions give ceil(n / stride) (tf.nn.convolution docs).
    x = torch.randn(1, 3, 200, 150)
    stages = get_spec("efficientnet-lite0").stages
    with torch.inference_mode():
        outputs = lite0.forward_intermediates(x, list(stages))
    for info, y in zip(stages.values(), outputs):
        assert tuple(y.shape[-2:]) == (math.ceil(200 / info["stride"]), math.ceil(150 / info["stride"]))


def test_scaled_stages_have_the_manifest_shape(built_scaled):
    spec, network = built_scaled
    size = spec.preprocessing.crop
    x = torch.randn(1, 3, size, size)
    with torch.inference_mode():
        outputs = network.forward_intermediates(x, list(spec.stages))
    for (name, info), y in zip(spec.stages.items(), outputs):
        side = math.ceil(size / info["stride"])
        assert tuple(y.shape) == (1, info["channels"], side, side), name


def test_scaled_repeats_and_channels_match_the_real_files():
    # Block counts per stage and output channels read off the state dicts of the
    # efficientnet-lite1/-lite2 package files (measured when written); see also the strict
    # loads in tests/test_backbone_imagenet.py.
    lite1, lite2 = scaled_stages(1.0, 1.1), scaled_stages(1.1, 1.2)
    assert [r[4] for r in lite1] == [1, 3, 3, 4, 4, 5, 1]
    assert [r[3] for r in lite1] == [16, 24, 40, 80, 112, 192, 320]
    assert [r[4] for r in lite2] == [1, 3, 3, 4, 4, 5, 1]
    assert [r[3] for r in lite2] == [16, 24, 48, 88, 120, 208, 352]


def test_head_pooled_is_features(built_scaled, lite0):
    for network in (lite0, built_scaled[1]):
        x = torch.randn(2, 3, 224, 224)
        with torch.inference_mode():
            head, = network.forward_intermediates(x, ["head"])
            with_others = network.forward_intermediates(x, ["stage3", "head"])[1]
            features = network.features(x)
        torch.testing.assert_close(head.mean(dim=(2, 3)), features, rtol=0, atol=0)
        torch.testing.assert_close(with_others, head, rtol=0, atol=0)


def test_head_matches_a_plain_pass_through_every_block(lite0):
    x = torch.randn(1, 3, 224, 224)
    with torch.inference_mode():
        y = F.relu6(lite0._bn0(lite0._conv_stem(x)))
        for block in lite0._blocks:
            y = block(y)
        expected = F.relu6(lite0._bn1(lite0._conv_head(y)))
        head, = lite0.forward_intermediates(x, ["head"])
    torch.testing.assert_close(head, expected, rtol=0, atol=0)


def test_outputs_come_in_the_order_asked(lite0):
    x = torch.randn(1, 3, 224, 224)
    with torch.inference_mode():
        late_first = lite0.forward_intermediates(x, ["stage5", "stage1", "stage3"])
        alone = [lite0.forward_intermediates(x, [s])[0] for s in ("stage5", "stage1", "stage3")]
    assert [y.shape[1] for y in late_first] == [112, 16, 40]
    for a, b in zip(late_first, alone):
        torch.testing.assert_close(a, b, rtol=0, atol=0)


def test_runs_no_further_than_the_deepest_stage_asked(lite0):
    called = []
    hooks = [lite0._blocks[5].register_forward_hook(lambda *a: called.append("block5")),
             lite0._conv_head.register_forward_hook(lambda *a: called.append("head"))]
    try:
        with torch.inference_mode():
            lite0.forward_intermediates(torch.randn(1, 3, 64, 64), ["stage3", "stage2"])   # ends at block 4
        assert called == []
        with torch.inference_mode():
            lite0.forward_intermediates(torch.randn(1, 3, 64, 64), ["stage4"])
        assert called == ["block5"]
    finally:
        for hook in hooks:
            hook.remove()


def test_unknown_stage_names_the_valid_ones(lite0):
    with pytest.raises(OddlingError) as err:
        lite0.forward_intermediates(torch.randn(1, 3, 64, 64), ["stage2", "stage9"])
    message = str(err.value)
    assert "'stage9'" in message and "efficientnet-lite0" in message
    assert all(name in message for name in STAGE_NAMES)


def test_no_stage_asked_is_an_error(lite0):
    with pytest.raises(OddlingError, match="at least one stage"):
        lite0.forward_intermediates(torch.randn(1, 3, 64, 64), [])


def test_open_clip_exposes_no_stages():
    spec = get_spec("openclip-vit-b-32-laion2b")
    assert spec.stages == {}
    tower = ImageTower(torch.nn.Identity(), name=spec.id)   # the wrapper alone: no ViT needed
    with pytest.raises(OddlingError, match="backbone openclip-vit-b-32-laion2b exposes no intermediate stages"):
        tower.forward_intermediates(torch.zeros(1, 3, 224, 224), ["stage1"])


def test_build_refuses_a_manifest_whose_stages_disagree(tmp_path):
    spec = get_spec("efficientnet-lite0")
    path = tmp_path / "random.pth"
    torch.save(random_network(spec.id).state_dict(), path)
    wrong = dict(spec.stages, stage3={"channels": 48, "stride": 8})
    with pytest.raises(OddlingError, match="stage3"):
        efficientnet_lite.build(dataclasses.replace(spec, stages=wrong), path)


def test_build_refuses_another_variants_weights(tmp_path):
    path = tmp_path / "lite2-random.pth"
    torch.save(random_network("efficientnet-lite2").state_dict(), path)
    with pytest.raises(OddlingError, match="does not fit backbone 'efficientnet-lite1'"):
        efficientnet_lite.build(get_spec("efficientnet-lite1"), path)


def test_manifest_stages_parse_in_order_and_bad_ones_are_refused():
    entry = """
backbones:
  - id: x
    family: efficientnet_lite
    weights: {source: cache_file, filename: x.pth, sha256: null}
    input_size: 224
    preprocessing: {resize_shorter: 256, crop: 224, mean: [0, 0, 0], std: [1, 1, 1]}
    embedding_dim: 8
    stages: {late: {channels: 8, stride: 32}, early: {channels: 4, stride: 2}}
"""
    spec = parse_manifest(entry)["x"]
    assert list(spec.stages) == ["late", "early"] and spec.stages["early"] == {"channels": 4, "stride": 2}
    with pytest.raises(ValueError, match="stage 'late'"):
        parse_manifest(entry.replace("{channels: 8, stride: 32}", "{channels: 8}"))
    assert parse_manifest(entry.replace("    stages:", "    unused:")).popitem()[1].stages == {}


def test_backbone_stages_and_torch_intermediates(lite0):
    spec = get_spec("efficientnet-lite0")
    backbone = Backbone(spec, "0" * 64, random_network(spec.id))
    assert backbone.stages == spec.stages
    batch = np.random.default_rng(0).standard_normal((2, 3, 96, 96)).astype(np.float32)
    arrays = backbone.torch_intermediates(batch, ["stage7", "stage2"])
    with torch.inference_mode():
        expected = lite0.forward_intermediates(torch.from_numpy(batch), ["stage7", "stage2"])
    assert [a.shape for a in arrays] == [(2, 320, 3, 3), (2, 24, 24, 24)]
    assert all(isinstance(a, np.ndarray) and a.dtype == np.float32 for a in arrays)
    for a, e in zip(arrays, expected):
        np.testing.assert_allclose(a, e.numpy(), atol=1e-5)


def old_patch_features(network, batch, layers=(2, 4)):
    """Local mode's patch features as written before stages existed (block indices), kept
    verbatim as the reference the stage-based version must reproduce."""
    with torch.inference_mode():
        x = torch.from_numpy(np.ascontiguousarray(batch, dtype=np.float32)).contiguous(memory_format=torch.channels_last)
        x = F.relu6(network._bn0(network._conv_stem(x)))
        grid = grid_size(batch.shape[-1])
        outputs = []
        for i, block in enumerate(network._blocks[:max(layers) + 1]):
            x = block(x)
            if i in layers:
                y = F.avg_pool2d(x, 3, stride=1, padding=1, count_include_pad=False)
                if y.shape[-1] != grid:
                    y = F.interpolate(y, size=(grid, grid), mode="bilinear", align_corners=False)
                outputs.append(y)
        feats = torch.cat(outputs, dim=1).permute(0, 2, 3, 1)
        return np.ascontiguousarray(feats.reshape(len(batch), grid * grid, -1).float().numpy())


def test_patch_features_unchanged_by_stages(embedded_backbone):
    network = embedded_backbone.network   # the real Lite0 weights, channels_last as local mode runs it
    batch = np.random.default_rng(0).standard_normal((2, 3, 224, 224)).astype(np.float32)
    new = patch_features(network, batch)
    assert new.shape == (2, 28 * 28, 24 + 40)
    # The 3x3 mean and the resize are NumPy now (patch_grid): the same operations summed in another
    # order, so equal within float32 rounding (values up to ~60, one float32 step there is 3.8e-6).
    np.testing.assert_allclose(new, old_patch_features(network, batch), rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("sides", [(56, 28), (28,), (14, 7), (57, 29, 1), (3,)])
def test_patch_grid_equals_torch_pooling_and_bilinear_resize(sides):
    """Reference: torch's own avg_pool2d (count_include_pad=False) and bilinear interpolate
    (align_corners=False), the operations local mode used before patch_grid."""
    rng = np.random.default_rng(len(sides))
    maps = [(10 * rng.standard_normal((2, 3, side, side + 1))).astype(np.float32) for side in sides]
    with torch.inference_mode():
        expected = []
        for y in maps:
            y = F.avg_pool2d(torch.from_numpy(y), 3, stride=1, padding=1, count_include_pad=False)
            expected.append(F.interpolate(y, size=(28, 28), mode="bilinear", align_corners=False))
        expected = torch.cat(expected, 1).permute(0, 2, 3, 1).reshape(2, 28 * 28, -1).numpy()
    np.testing.assert_allclose(patch_grid(maps, 28), expected, rtol=1e-6, atol=1e-6)


def test_patch_features_of_open_clip_is_a_clear_error():
    tower = ImageTower(torch.nn.Identity(), name="openclip-vit-b-32-laion2b")
    with pytest.raises(OddlingError, match="exposes no intermediate stages"):
        patch_features(tower, np.zeros((1, 3, 224, 224), np.float32))


def test_lite0_class_is_the_unscaled_network():
    assert EfficientNetLite0().rows == scaled_stages(1.0, 1.0) == efficientnet_lite.LITE0_STAGES


def test_bilinear_resize_weights_are_torchs_to_the_bit():
    """Reference: torch's interpolate applied to unit vectors gives its weight matrix."""
    from oddling.backbones.patch_grid import _bilinear_matrix

    for n_out in (7, 14, 28, 32, 56):
        for n_in in range(1, 130):
            eye = torch.eye(n_in).reshape(n_in, 1, 1, n_in)
            with torch.inference_mode():
                weights = F.interpolate(eye, size=(1, n_out), mode="bilinear", align_corners=False)
            np.testing.assert_array_equal(_bilinear_matrix(n_in, n_out), weights.reshape(n_in, n_out).numpy().T)
