"""Image-health statistics and Tukey's fences.

References: Tukey, Exploratory Data Analysis, 1977 (fences Q1 - k IQR, Q3 + k IQR; k = 1.5
"unusual", k = 3 "far out", common practice); quartiles by the linear rule, Hyndman & Fan,
"Sample quantiles in statistical packages", The American Statistician 50(4), 1996, type 7
(numpy.percentile's default); Hasler & Süsstrunk, "Measuring colourfulness in natural images",
SPIE 5007, 2003. Images: scikit-image's bundled samples (skimage.data).
"""
import numpy as np
import pytest
from PIL import Image, ImageEnhance, ImageFilter
from skimage import data

from oddling.data.health import (
    STATS,
    fit_fences,
    health_findings,
    health_text,
    image_stats,
    tukey_fences,
)


def stats_of(image: Image.Image) -> dict:
    return image_stats(image, *image.size)


@pytest.fixture(scope="module")
def normal_fences() -> dict:
    """Fences from 36 varied normal crops (220-259 px) of astronaut / coffee / chelsea,
    each with a brightness jitter of +-10 %."""
    rng = np.random.default_rng(0)
    sources = [Image.fromarray(getattr(data, name)()) for name in ("astronaut", "coffee", "chelsea")]
    rows = []
    for i in range(36):
        image = sources[i % 3]
        w, h = rng.integers(220, 260, 2)
        left, top = rng.integers(0, image.width - w), rng.integers(0, image.height - h)
        crop = image.crop((left, top, left + w, top + h))
        rows.append(stats_of(ImageEnhance.Brightness(crop).enhance(rng.uniform(0.9, 1.1))))
    return fit_fences(rows)


def test_tukey_fences_on_textbook_data_with_an_outlier():
    values = list(range(1, 11)) + [100]
    # Hand-computed, linear rule (Hyndman & Fan type 7): Q1 at rank 1 + 0.25 * 10 = 3.5, halfway 3..4 -> 3.5,
    # Q3 at rank 8.5 -> 8.5; IQR = 5. k = 1.5: (-4, 16); k = 3: (-11.5, 23.5). 100 is far out.
    assert tukey_fences(values, 1.5) == pytest.approx((-4.0, 16.0))
    assert tukey_fences(values, 3.0) == pytest.approx((-11.5, 23.5))


def test_tukey_fences_match_numpy_percentile():
    values = np.random.default_rng(1).lognormal(size=57)
    q1, q3 = np.percentile(values, [25, 75])
    assert tukey_fences(values, 1.5) == pytest.approx((q1 - 1.5 * (q3 - q1), q3 + 1.5 * (q3 - q1)))


def test_fit_fences_is_json_ready_with_both_fences_per_stat():
    import json

    rows = [{name: float(v) for name in STATS} for v in range(1, 11)]
    fences = json.loads(json.dumps(fit_fences(rows)))
    assert set(fences) == set(STATS)
    assert fences["brightness"]["q1"] == pytest.approx(3.25)
    assert fences["brightness"]["unusual"] == pytest.approx(list(tukey_fences(range(1, 11), 1.5)))
    assert fences["brightness"]["far_out"] == pytest.approx(list(tukey_fences(range(1, 11), 3.0)))


def test_blurring_lowers_sharpness():
    for image in (Image.fromarray(data.astronaut()), Image.fromarray(data.brick()).convert("RGB")):
        blurred = image.filter(ImageFilter.GaussianBlur(radius=3))
        assert stats_of(blurred)["sharpness"] < 0.5 * stats_of(image)["sharpness"]


def test_a_darkened_image_is_too_dark_against_normal_fences(normal_fences):
    crop = Image.fromarray(data.astronaut()).crop((100, 100, 340, 340))
    assert "too dark" not in " ".join(health_findings(stats_of(crop), normal_fences))
    dark = ImageEnhance.Brightness(crop).enhance(0.25)
    assert "too dark" in health_findings(stats_of(dark), normal_fences)


def test_an_odd_size_is_an_unusual_size_far_out(normal_fences):
    crop = Image.fromarray(data.coffee()).crop((0, 100, 600, 200))   # 600 x 100
    findings = health_findings(stats_of(crop), normal_fences)
    assert "unusual size (far out)" in findings
    assert sum("size" in f for f in findings) == 1   # width, height and aspect share one finding


def test_size_comes_from_the_original_file_not_the_decoded_image():
    stats = image_stats(Image.new("RGB", (400, 300), (90, 90, 90)), width=4000, height=3000)
    assert (stats["width"], stats["height"], stats["aspect_ratio"]) == (4000, 3000, pytest.approx(4 / 3))


def test_colourfulness_of_grey_is_zero():
    grey = Image.fromarray(data.camera()).convert("RGB")
    assert stats_of(grey)["colourfulness"] == pytest.approx(0.0, abs=1e-9)


def test_colourfulness_of_saturated_colours_is_high():
    # A flat pure red: rg = 255, yb = 127.5, no spread -> M = 0.3 * sqrt(255^2 + 127.5^2).
    red = Image.new("RGB", (64, 64), (255, 0, 0))
    assert stats_of(red)["colourfulness"] == pytest.approx(0.3 * np.hypot(255, 127.5))
    # Stripes of red, green, blue and yellow: far above the "extremely colourful" level (~109).
    stripes = np.zeros((64, 64, 3), dtype=np.uint8)
    for i, colour in enumerate([(255, 0, 0), (0, 255, 0), (0, 0, 255), (255, 255, 0)]):
        stripes[:, 16 * i:16 * (i + 1)] = colour
    assert stats_of(Image.fromarray(stripes))["colourfulness"] > 109


def test_far_out_suffix_and_text():
    fences = {"brightness": {"q1": 100, "q3": 120, "unusual": [70, 150], "far_out": [40, 180]}}
    assert health_findings({"brightness": 110}, fences) == []
    assert health_findings({"brightness": 60}, fences) == ["too dark"]
    assert health_findings({"brightness": 30}, fences) == ["too dark (far out)"]
    assert health_findings({"brightness": 200}, fences) == ["too bright (far out)"]
    assert health_text([]) == "ok"
    assert health_text(["too dark", "blurred"]) == "too dark; blurred"


def test_non_rgb_input_is_rejected_with_the_mode():
    with pytest.raises(ValueError, match="'L'"):
        image_stats(Image.new("L", (8, 8)), 8, 8)
