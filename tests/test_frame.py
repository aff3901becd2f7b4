"""How an image meets the network's square input: the whole frame by default, the old centre crop
for banks that recorded none, and a border defect seen about as well as a central one.

Outside references: Pillow's own resize (the stretched input is the whole image resized), and
random crops of scikit-image's bundled `gravel` texture with a drawn defect.
"""
import numpy as np
import pytest
from PIL import Image

import oddling
from oddling.backbones.representation import RepresentationSpec
from oddling.data.preprocess import Preprocessing
from oddling.reporting.heatmaps import upsample_map

PREP = dict(resize_shorter=256, crop=224, interpolation="bicubic", mean=(127.0, 127.0, 127.0), std=(128.0, 128.0, 128.0))


def wide_image():
    rng = np.random.default_rng(0)
    return Image.fromarray(rng.integers(0, 256, (300, 500, 3), dtype=np.uint8))


def test_stretch_is_the_whole_image_resized_to_the_square():
    image = wide_image()
    prep = Preprocessing(**PREP, frame="stretch")
    got = prep.resize_and_crop(image)
    # Pillow: the shorter side to 256 (500 x 300 -> 426 x 256), then the whole of it to 224 x 224
    expected = image.resize((426, 256), Image.Resampling.BICUBIC).resize((224, 224), Image.Resampling.BICUBIC)
    assert got.size == (224, 224)
    np.testing.assert_array_equal(np.asarray(got), np.asarray(expected))


def test_pad_keeps_the_aspect_and_fills_with_the_mean():
    got = np.asarray(Preprocessing(**PREP, frame="pad").resize_and_crop(wide_image()))
    assert got.shape == (224, 224, 3)
    rows = np.flatnonzero((got != 127).any(axis=(1, 2)))
    assert 0 < rows[0] and rows[-1] < 223 and abs((rows[-1] - rows[0] + 1) - 224 * 300 / 500) <= 2
    assert (got[0] == 127).all() and (got[-1] == 127).all()          # normalised to 0 by the mean


def test_records_without_a_frame_are_centre_crops_and_new_ones_stretch():
    assert RepresentationSpec.parse("efficientnet-lite0").frame == "stretch"
    old = {"kind": "embedding", "id": "efficientnet-lite0", "backbone": "efficientnet-lite0"}
    assert RepresentationSpec.from_dict(old).frame == "crop"
    assert Preprocessing.from_dict({k: list(v) if isinstance(v, tuple) else v for k, v in PREP.items()}).frame == "crop"
    # a crop's record is written exactly as banks of earlier releases wrote it (no frame key)
    assert "frame" not in Preprocessing(**PREP).to_dict() and "frame" not in RepresentationSpec.from_dict(old).to_dict()
    assert Preprocessing(**PREP, frame="pad").to_dict()["frame"] == "pad"


def test_a_stretched_map_covers_the_whole_image_and_a_crop_only_its_centre():
    grid = np.ones((28, 28))
    stretched = upsample_map(grid, (300, 120), frame="stretch")
    cropped = upsample_map(grid, (300, 120), frame="crop")
    assert stretched.shape == cropped.shape == (120, 300)
    assert (stretched > 0.5).all()
    assert (cropped[:, :80] == 0).all() and (cropped[:, 100:200] > 0.5).all()


@pytest.fixture(scope="module")
def gravel_folders(tmp_path_factory):
    from skimage import data

    gravel = data.gravel()
    rng = np.random.default_rng(0)
    root = tmp_path_factory.mktemp("gravel")
    for name in ("ref", "test"):
        (root / name).mkdir()

    def crop():
        y, x = rng.integers(0, gravel.shape[0] - 160, 2)
        return np.stack([gravel[y:y + 160, x:x + 160]] * 3, axis=-1)

    for i in range(80):
        Image.fromarray(crop()).save(root / "ref" / f"r{i:02d}.png")
    for i in range(30):
        clean = crop()
        Image.fromarray(clean).save(root / "test" / f"n{i:02d}.png")
        corner, centre = clean.copy(), clean.copy()
        corner[3:13, 3:13] = 0                    # 10 x 10, 3 px from the corner
        centre[75:85, 75:85] = 0
        Image.fromarray(corner).save(root / "test" / f"corner{i:02d}.png")
        Image.fromarray(centre).save(root / "test" / f"centre{i:02d}.png")
    return root


@pytest.mark.filterwarnings("ignore::oddling.OddlingWarning")
def test_a_defect_at_the_border_raises_the_default_score_at_least_half_as_much_as_at_the_centre(gravel_folders):
    options = oddling.RunOptions(progress=False)
    rises = {}
    for frame in ("stretch", "crop"):
        bank = oddling.fit(gravel_folders / "ref", None, frame=frame, target_fpr=0.1, options=options)
        score = {r.path: r.score for r in oddling.score(gravel_folders / "test", bank, options=options).rows}
        rises[frame] = [np.median([score[f"{where}{i:02d}.png"] - score[f"n{i:02d}.png"] for i in range(30)])
                        for where in ("corner", "centre")]
    corner, centre = rises["stretch"]
    print(f"\n[frame] median rise, corner / centre: stretch {corner:.4f} / {centre:.4f}, crop "
          f"{rises['crop'][0]:.4f} / {rises['crop'][1]:.4f}")
    assert corner >= 0.5 * centre > 0
    assert rises["crop"][0] < 0.2 * rises["crop"][1]      # the old centre crop cut the corner away
