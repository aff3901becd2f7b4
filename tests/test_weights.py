"""Weight files are found, verified before loading, pinned when unknown; missing files say where to go;
a file that does not load into its architecture is refused and pins nothing; weights bundles
(pack / unpack) carry verified files to a machine without a network and refuse hostile tars.

The open_clip path is tested with a weight file the test creates: a randomly initialised
ViT-B-32 saved to disk; bundles with a random ResNet-18. No network.
"""
import dataclasses
import io
import json
import tarfile
from pathlib import Path

import numpy as np
import pytest
import torch
from click.testing import CliRunner

from oddling.backbones import load_backbone, manifest
from oddling.backbones.bundle import BUNDLE_MANIFEST, pack, unpack
from oddling.backbones.manifest import get_spec
from oddling.backbones.weights import expected_cache_path, import_weights, resolve_weights
from oddling.data.intake import sha256_file
from oddling.cli import main
from oddling.errors import OddlingError

CLIP_ID = "openclip-vit-b-32-laion2b"


@pytest.fixture(scope="module")
def random_clip_file(tmp_path_factory):
    open_clip = pytest.importorskip("open_clip")
    torch.manual_seed(0)
    model = open_clip.create_model("ViT-B-32", pretrained=None)
    path = tmp_path_factory.mktemp("clip") / "open_clip_pytorch_model.bin"
    torch.save(model.state_dict(), path)
    return path, model.eval()


def test_embedded_weights_checksum_matches_manifest(tmp_path):
    spec = get_spec("efficientnet-lite0")
    path, sha = resolve_weights(spec, tmp_path)
    assert sha == "579344248a93e23026e6b78f1f6faf0bc1d282386f6c881cdbaacd49cabf77db"   # measured on the package file


@pytest.mark.parametrize("backbone_id, sha256", [
    ("efficientnet-lite1", "77cc7160d37bebc1e0d68dc9e8d1e836a263e063f0825ec80d85670b2c913850"),
    ("efficientnet-lite2", "9656183eaeafe8cbf0cf560089305d34668787f6a26377ccbe5be192ed3f855d"),
])
def test_scaled_lite_weights_checksum_matches_manifest(tmp_path, backbone_id, sha256):
    path, sha = resolve_weights(get_spec(backbone_id), tmp_path)
    assert sha == sha256   # measured with sha256sum on the package file
    assert path.name == get_spec(backbone_id).weights["filename"]


def test_tampered_weights_refused(tmp_path):
    spec = get_spec("efficientnet-lite0")
    bad = dataclasses.replace(spec, weights=dict(spec.weights, sha256="0" * 64))
    with pytest.raises(OddlingError, match="expected 0000"):
        resolve_weights(bad, tmp_path)


def test_missing_clip_weights_say_which_file_where(tmp_path):
    with pytest.raises(OddlingError) as err:
        load_backbone(CLIP_ID, tmp_path)
    message = str(err.value)
    assert "open_clip_pytorch_model.bin" in message
    assert str(expected_cache_path(get_spec(CLIP_ID), tmp_path)) in message


def test_cache_dir_env_var_is_used(tmp_path, monkeypatch):
    monkeypatch.setenv("ODDLING_CACHE_DIR", str(tmp_path / "envcache"))
    with pytest.raises(OddlingError, match="envcache"):
        load_backbone(CLIP_ID)


def test_clip_loads_from_cache_and_matches_open_clip(tmp_path, random_clip_file):
    path, model = random_clip_file
    import_weights(get_spec(CLIP_ID), path, tmp_path)
    backbone = load_backbone(CLIP_ID, tmp_path)
    x = torch.randn(2, 3, 224, 224)
    ours = backbone.embed(x.numpy())
    with torch.inference_mode():
        theirs = torch.nn.functional.normalize(model.encode_image(x), dim=1).numpy()  # open_clip reference
    assert ours.shape == (2, 512)
    np.testing.assert_allclose(ours, theirs, atol=1e-5)


def test_unknown_checksum_pinned_then_enforced(tmp_path, random_clip_file):
    path, _ = random_clip_file
    spec = get_spec(CLIP_ID)
    import_weights(spec, path, tmp_path)
    _, sha = resolve_weights(spec, tmp_path)
    assert sha == sha256_file(path)
    target = expected_cache_path(spec, tmp_path)
    target.write_bytes(target.read_bytes()[:-10] + b"0123456789")   # file changed after pinning
    with pytest.raises(OddlingError, match="SHA-256"):
        resolve_weights(spec, tmp_path)


def test_a_text_file_is_refused_on_import_and_pins_nothing(tmp_path):
    text = tmp_path / "open_clip_pytorch_model.bin"
    text.write_text("hello\n")   # 6 bytes: used to be pinned as the CLIP weights
    with pytest.raises(OddlingError) as err:
        import_weights(get_spec(CLIP_ID), text, tmp_path / "cache")
    assert str(err.value).startswith(f"{text} is not a readable PyTorch weight file")   # the user's file, named
    assert not (tmp_path / "cache" / "weights" / "pins.json").exists()
    assert not expected_cache_path(get_spec(CLIP_ID), tmp_path / "cache").exists()


def test_a_hand_placed_file_that_does_not_load_is_not_pinned_on_first_use(tmp_path):
    spec = get_spec(CLIP_ID)
    target = expected_cache_path(spec, tmp_path)
    target.parent.mkdir(parents=True)
    torch.save({"weight": torch.zeros(3)}, target)      # a state dict, of something else
    with pytest.raises(OddlingError, match="does not fit open_clip architecture 'ViT-B-32'.*missing keys"):
        load_backbone(CLIP_ID, tmp_path)
    assert not (tmp_path / "weights" / "pins.json").exists()


@pytest.mark.parametrize("backbone_id", ["openclip-vit-b-16-laion2b", "openclip-vit-l-14-laion2b",
                                         "openclip-convnext-base-laion400m", CLIP_ID])
def test_open_clip_entries_match_open_clips_own_configs(backbone_id):
    # The outside reference: open_clip's model configs (embed_dim, image size) and its pretrained
    # registry (mean/std, interpolation, resize mode, hub repository) for the tag in the hub id.
    open_clip = pytest.importorskip("open_clip")
    spec = get_spec(backbone_id)
    config = open_clip.get_model_config(spec.architecture)
    assert spec.embedding_dim == config["embed_dim"]
    assert spec.input_size == spec.preprocessing.crop == spec.preprocessing.resize_shorter == config["vision_cfg"]["image_size"]
    tag = {"openclip-vit-b-16-laion2b": "laion2b_s34b_b88k", "openclip-vit-l-14-laion2b": "laion2b_s32b_b82k",
           "openclip-convnext-base-laion400m": "laion400m_s13b_b51k", CLIP_ID: "laion2b_s34b_b79k"}[backbone_id]
    pretrained = open_clip.pretrained.get_pretrained_cfg(spec.architecture, tag)
    assert pretrained["hf_hub"].rstrip("/") == spec.weights["hub_id"]
    assert spec.weights["url"] == f"https://huggingface.co/{spec.weights['hub_id']}/resolve/main/{spec.weights['filename']}"
    assert spec.preprocessing.interpolation == pretrained["interpolation"] and pretrained["resize_mode"] == "shortest"
    np.testing.assert_allclose(spec.preprocessing.mean, np.array(pretrained["mean"]) * 255, atol=1e-3)
    np.testing.assert_allclose(spec.preprocessing.std, np.array(pretrained["std"]) * 255, atol=1e-3)
    assert spec.stages == {}


# --- weights bundles (pack / unpack) -------------------------------------------------------------

BUNDLED = "resnet18"


@pytest.fixture(scope="module")
def resnet_file(tmp_path_factory):
    """A seeded random ResNet-18 state dict and its SHA-256."""
    torchvision = pytest.importorskip("torchvision")
    torch.manual_seed(0)
    path = tmp_path_factory.mktemp("bundle-src") / "resnet18.pth"
    torch.save(torchvision.models.resnet18(weights=None).state_dict(), path)
    return path, sha256_file(path)


@pytest.fixture
def filled_cache(tmp_path, resnet_file, monkeypatch):
    """A cache holding the random ResNet-18 under a manifest whose prefix is that file's."""
    path, sha = resnet_file
    shipped = manifest.load_manifest()
    spec = dataclasses.replace(shipped[BUNDLED], weights=dict(shipped[BUNDLED].weights, sha256_prefix=sha[:8]))
    monkeypatch.setattr(manifest, "load_manifest", lambda: dict(shipped, **{BUNDLED: spec}))
    cache = tmp_path / "cache"
    import_weights(spec, path, cache)
    return cache


def test_pack_then_unpack_installs_verified_files(filled_cache, resnet_file, tmp_path):
    path, sha = resnet_file
    bundle = tmp_path / "bundle.tar"
    entries = pack([BUNDLED], bundle, filled_cache)
    assert entries == [{"id": BUNDLED, "filename": "resnet18-f37072fd.pth", "path": "weights/resnet18/resnet18-f37072fd.pth",
                        "size": path.stat().st_size, "sha256": sha}]
    with tarfile.open(bundle) as tar:   # a plain tar: the listing first, then the cache layout
        assert tar.getnames() == [BUNDLE_MANIFEST, "weights/resnet18/resnet18-f37072fd.pth"]
        assert json.load(tar.extractfile(BUNDLE_MANIFEST))["files"] == entries
    other = tmp_path / "offline-cache"
    installed = unpack(bundle, other)
    assert [(i.sha256, i.pinned) for i in installed] == [(sha, True)]
    assert expected_cache_path(get_spec(BUNDLED), other).read_bytes() == path.read_bytes()
    assert load_backbone(BUNDLED, other, runtime="torch").weights_sha256 == sha


def test_pack_refuses_package_weights_and_missing_files(filled_cache, tmp_path):
    with pytest.raises(OddlingError, match="ships its weights in the Python package"):
        pack(["efficientnet-lite0"], tmp_path / "b.tar", filled_cache)
    with pytest.raises(OddlingError, match="oddling backbones fetch convnext-tiny"):
        pack(["convnext-tiny"], tmp_path / "b.tar", filled_cache)
    assert not (tmp_path / "b.tar").exists()


def evil_bundle(path, good: Path, sha: str, tamper: str) -> Path:
    """A bundle made by hand, the way a tampered or hostile one would be."""
    name = "weights/resnet18/resnet18-f37072fd.pth"
    data = good.read_bytes()
    entries = [{"id": BUNDLED, "filename": "resnet18-f37072fd.pth", "path": name, "size": len(data), "sha256": sha}]
    with tarfile.open(path, "w") as tar:
        def add(member_name, payload, **fields):
            info = tarfile.TarInfo(member_name)
            info.size = len(payload)
            for k, v in fields.items():
                setattr(info, k, v)
            tar.addfile(info, io.BytesIO(payload) if info.isfile() else None)

        listing = {"format": "oddling-weights-bundle", "version": 1, "files": entries}
        if tamper == "digest":
            listing["files"][0]["sha256"] = "0" * 64
        add(BUNDLE_MANIFEST, json.dumps(listing).encode())
        add(name, data)
        if tamper == "symlink":
            add("weights/resnet18/link", b"", type=tarfile.SYMTYPE, linkname="/etc/passwd", size=0)
        elif tamper == "hardlink":
            add("weights/resnet18/hard", b"", type=tarfile.LNKTYPE, linkname=name, size=0)
        elif tamper == "traversal":
            add("weights/../../escaped.pth", b"x")
        elif tamper == "absolute":
            add("/tmp/escaped.pth", b"x")
        elif tamper == "unlisted":
            add("weights/resnet18/extra.pth", b"x")
    return path


@pytest.mark.parametrize("tamper, message", [
    ("symlink", "is a symbolic link"),
    ("hardlink", "is a hard link"),
    ("traversal", "unsafe path"),
    ("absolute", "unsafe path"),
    ("unlisted", "is not listed"),
    ("digest", "damaged; nothing unpacked"),
])
def test_unpack_refuses_hostile_or_damaged_bundles_and_writes_nothing(filled_cache, resnet_file, tmp_path,
                                                                    tamper, message):
    path, sha = resnet_file
    bundle = evil_bundle(tmp_path / "evil.tar", path, sha, tamper)
    target_cache = tmp_path / "offline-cache"
    with pytest.raises(OddlingError, match=message):
        unpack(bundle, target_cache)
    written = [p for p in target_cache.rglob("*") if p.is_file()] if target_cache.exists() else []
    assert written == []
    assert not (tmp_path / "escaped.pth").exists()


def test_unpack_refuses_a_listed_file_that_does_not_load(filled_cache, tmp_path, monkeypatch):
    junk = tmp_path / "junk.pth"
    junk.write_bytes(b"hello\n")
    shipped = manifest.load_manifest()
    loose = dataclasses.replace(shipped[BUNDLED], weights=dict(shipped[BUNDLED].weights, sha256_prefix=None))
    monkeypatch.setattr(manifest, "load_manifest", lambda: dict(shipped, **{BUNDLED: loose}))
    bundle = evil_bundle(tmp_path / "junk.tar", junk, sha256_file(junk), "none")
    with pytest.raises(OddlingError, match="not a readable PyTorch weight file"):
        unpack(bundle, tmp_path / "offline-cache")
    assert [p for p in (tmp_path / "offline-cache").rglob("*") if p.is_file()] == []


def test_cli_pack_and_unpack(filled_cache, tmp_path):
    runner = CliRunner()
    bundle = tmp_path / "site.tar"
    result = runner.invoke(main, ["backbones", "pack", BUNDLED, "--out", str(bundle), "--cache-dir", str(filled_cache)])
    assert result.exit_code == 0 and "oddling backbones unpack site.tar" in result.stderr
    result = runner.invoke(main, ["backbones", "pack", BUNDLED, "--out", str(bundle), "--cache-dir", str(filled_cache)])
    assert result.exit_code == 2 and "--force" in result.stderr
    result = runner.invoke(main, ["backbones", "unpack", str(bundle), "--cache-dir", str(tmp_path / "other")])
    assert result.exit_code == 0 and "Unpacked resnet18" in result.stderr and "Pinned SHA-256" in result.stderr
    not_tar = tmp_path / "not.tar"
    not_tar.write_text("plain text")
    result = runner.invoke(main, ["backbones", "unpack", str(not_tar), "--cache-dir", str(tmp_path / "other")])
    assert result.exit_code == 2 and "is not a tar file" in result.stderr
