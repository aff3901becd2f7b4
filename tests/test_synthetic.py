"""Synthetic anomalies: each kind changes what it says, where it says, sized by the image, seeded.

Images are crops of scikit-image's bundled photographs (coffee, astronaut); the changes are
measured with outside references: scikit-image's `rgb2lab` for colour (CIE 1976 Delta E), SciPy's
Laplacian for sharpness, plain pixel statistics for noise and exposure.
"""
import numpy as np
import pytest
from scipy.ndimage import laplace

from oddling.data.synthetic import KINDS, make_anomaly


@pytest.fixture(scope="module")
def photos():
    from skimage import data

    coffee, astronaut = data.coffee(), data.astronaut()
    return {"small": coffee[100:164, 200:264], "wide": coffee[50:290, 0:480], "large": astronaut}


@pytest.mark.parametrize("kind", list(KINDS))
@pytest.mark.parametrize("size", ["small", "wide", "large"])
def test_each_kind_changes_pixels_only_inside_its_mask(kind, size, photos):
    image = photos[size]
    out, mask = make_anomaly(image, kind, seed=3, donor=photos[size][::-1].copy())
    assert out.shape == image.shape and out.dtype == np.uint8 and mask.shape == image.shape[:2]
    changed = np.any(out != image, axis=2)
    assert changed.any()
    if KINDS[kind].local:
        assert 0 < mask.mean() < 0.5
        assert not changed[~mask].any() or kind == "stain"   # the stain's soft edge reaches past its 10% mask
        if kind == "stain":
            assert changed[~mask].mean() < 0.05
    else:
        assert mask.all() and changed.mean() > 0.5


@pytest.mark.parametrize("kind", list(KINDS))
def test_the_same_seed_gives_the_same_anomaly_and_another_seed_another(kind, photos):
    a, _ = make_anomaly(photos["wide"], kind, seed=7)
    b, _ = make_anomaly(photos["wide"], kind, seed=7)
    c, _ = make_anomaly(photos["wide"], kind, seed=8)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_defects_are_sized_relative_to_the_image(photos):
    # the same seed on a 64 px crop and a 512 px photo: the spot covers about the same share
    small = make_anomaly(photos["small"], "spots", seed=1)[1].mean()
    large = make_anomaly(photos["large"], "spots", seed=1)[1].mean()
    assert 0.25 < small / large < 4
    for seed in range(20):
        share = make_anomaly(photos["wide"], "cut-paste", seed=seed)[1].mean()
        assert 0.015 <= share <= 0.16          # CutPaste's 2-15% of the area, rounded to pixels


def test_a_stain_is_a_visible_colour_difference_in_cielab(photos):
    from skimage.color import rgb2lab

    image = photos["wide"]
    out, mask = make_anomaly(image, "stain", seed=2)
    delta_e = np.linalg.norm(rgb2lab(out) - rgb2lab(image), axis=2)    # CIE 1976 Delta E (scikit-image)
    assert np.median(delta_e[mask]) > 5       # clearly visible (a just-noticeable difference is ~2.3, from memory)
    assert np.median(delta_e[~mask]) < 0.5


def test_defocus_lowers_sharpness_and_noise_has_its_stated_spread(photos):
    grey = lambda a: a.astype(np.float64).mean(axis=2)   # noqa: E731
    image = photos["large"]
    blurred, _ = make_anomaly(image, "defocus", seed=0)
    assert laplace(grey(blurred)).var() < 0.2 * laplace(grey(image)).var()    # SciPy's Laplacian
    flat = np.full((128, 128, 3), 128, np.uint8)
    noisy, _ = make_anomaly(flat, "noise", seed=0)
    assert 9 < (noisy.astype(float) - 128).std() < 21                       # 10-20 grey levels
    for seed in range(6):
        out, _ = make_anomaly(flat, "exposure", seed=seed)
        gain = out.mean() / 128
        assert 0.54 < gain < 0.76 or 1.34 < gain < 1.71


def test_defects_reach_the_border_of_the_frame(photos):
    # edge defects are common on a line: over many seeds some spot touches the outermost pixels
    touched = 0
    for seed in range(40):
        mask = make_anomaly(photos["small"], "spots", seed=seed)[1]
        touched += mask[0].any() or mask[-1].any() or mask[:, 0].any() or mask[:, -1].any()
    assert touched >= 5


def test_bad_input_is_refused_with_the_reason(photos):
    with pytest.raises(ValueError, match="unknown synthetic anomaly kind 'dent'"):
        make_anomaly(photos["small"], "dent", seed=0)
    with pytest.raises(ValueError, match="at least 8 x 8"):
        make_anomaly(np.zeros((4, 4, 3), np.uint8), "spots", seed=0)
