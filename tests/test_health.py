"""Image-health statistics and Tukey's fences.

References: Tukey, Exploratory Data Analysis, 1977 (fences Q1 - k IQR, Q3 + k IQR; k = 1.5
"unusual", k = 3 "far out", common practice); quartiles by the linear rule, Hyndman & Fan,
"Sample quantiles in statistical packages", The American Statistician 50(4), 1996, type 7
(numpy.percentile's default); Hasler & Süsstrunk, "Measuring colourfulness in natural images",
SPIE 5007, 2003. Images: scikit-image's bundled samples (skimage.data); the Laplacian is held
to scipy.ndimage.laplace.

Tolerances of the reduced statistics (relative, per statistic), measured on the samples below
and stated here once:
- the fast path (a JPEG decoded at reduced size by libjpeg-turbo's DCT scaling, the health image
  taken from the network's own resize) against the definition applied to the same file decoded
  in full: brightness 1 %, contrast 5 %, sharpness 10 %, colourfulness 10 % (measured worst
  0.3 %, 3.1 %, 5.7 %, 5.2 %);
- the health image against the full-resolution image itself, for the statistics that do not
  depend on scale: brightness 0.5 %; contrast and colourfulness only lose fine texture (<= 15 %
  and <= 25 % lower; measured worst 14.1 % grass, 24.3 % hubble_deep_field);
- sharpness of the same picture stored at full and at half size (box-reduced): 20 % (measured
  worst 16 %, moon, whose detail is mostly sensor noise; the others within 7 %).
"""
import numpy as np
import pytest
from PIL import Image, ImageEnhance, ImageFilter
from skimage import data

from oddling.data.health import (
    HEALTH_VERSION,
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
    fences = {"brightness": {"q1": 100, "q3": 120, "unusual": [70, 150], "far_out": [40, 180],
                             "health_version": [HEALTH_VERSION, HEALTH_VERSION]}}
    assert health_findings({"brightness": 110}, fences) == []
    assert health_findings({"brightness": 60}, fences) == ["too dark"]
    assert health_findings({"brightness": 30}, fences) == ["too dark (far out)"]
    assert health_findings({"brightness": 200}, fences) == ["too bright (far out)"]
    assert health_text([]) == "ok"
    assert health_text(["too dark", "blurred"]) == "too dark; blurred"


def test_non_rgb_input_is_rejected_with_the_mode():
    with pytest.raises(ValueError, match="'L'"):
        image_stats(Image.new("L", (8, 8)), 8, 8)


# --- reduced statistics against the full-resolution definitions ---------------------------------

SAMPLES = ("astronaut", "chelsea", "coffee", "rocket", "brick", "grass", "gravel", "camera", "coins", "moon",
           "hubble_deep_field", "immunohistochemistry", "logo", "retina", "horse", "clock", "cell", "colorwheel")
FAST_TOLERANCE = {"brightness": 0.01, "contrast": 0.05, "sharpness": 0.10, "colourfulness": 0.10}
IMAGE_STATS = tuple(FAST_TOLERANCE)


def sample(name: str) -> Image.Image:
    return Image.fromarray(getattr(data, name)()).convert("RGB")


def relative(a: float, b: float) -> float:
    return abs(a - b) / abs(b)


def test_laplacian_equals_scipys_with_reflected_borders():
    from scipy.ndimage import laplace

    from oddling.data.health import laplacian

    grey = np.asarray(sample("camera").convert("L"), dtype=np.float64)[:97, :131]
    np.testing.assert_allclose(laplacian(grey), laplace(grey, mode="reflect"), rtol=0, atol=1e-9)


def test_colourfulness_equals_the_papers_formula_taken_pixel_by_pixel():
    # Hasler & Suesstrunk 2003, written out literally in float64 (rg and yb per pixel, numpy's mean
    # and population std) on scikit-image's colour samples: the histogram form in health.py must agree.
    from oddling.data.health import colourfulness

    for name in ("astronaut", "chelsea", "coffee", "rocket", "immunohistochemistry", "colorwheel", "retina"):
        rgb = np.asarray(sample(name), dtype=np.float64)
        rg = rgb[..., 0] - rgb[..., 1]
        yb = (rgb[..., 0] + rgb[..., 1]) / 2.0 - rgb[..., 2]
        expected = np.hypot(rg.std(), yb.std()) + 0.3 * np.hypot(rg.mean(), yb.mean())
        assert colourfulness(sample(name)) == pytest.approx(expected, rel=1e-9), name


@pytest.fixture(scope="module")
def sample_jpegs(tmp_path_factory) -> list:
    """Each sample as a quality-95 JPEG at its own size and at 2x and 3x (bicubic): files that the
    fast path decodes at several DCT scales."""
    folder = tmp_path_factory.mktemp("health_jpegs")
    paths = []
    for name in SAMPLES:
        image = sample(name)
        for scale in (1, 2, 3):
            big = image.resize((image.width * scale, image.height * scale), Image.Resampling.BICUBIC)
            path = folder / f"{name}-x{scale}.jpg"
            big.save(path, quality=95)
            paths.append(path)
    return paths


def test_fast_path_statistics_match_the_definition_on_the_full_decode(sample_jpegs):
    from oddling.backbones.manifest import get_spec
    from oddling.data.intake import load_rgb
    from oddling.embedding.runner import _prepare

    prep = get_spec("efficientnet-lite0").preprocessing
    worst = dict.fromkeys(IMAGE_STATS, 0.0)
    for path in sample_jpegs:
        full = load_rgb(path)   # every pixel decoded
        definition = image_stats(full, *full.size)
        _, array, fast_row, status = _prepare(path, prep)
        assert status == "ok" and array.shape == (3, 224, 224)
        fast = dict(zip(STATS, fast_row))
        assert (fast["width"], fast["height"]) == full.size
        for name in IMAGE_STATS:
            if definition[name] > 1e-6:   # colourfulness of grey samples is 0 both ways
                worst[name] = max(worst[name], relative(fast[name], definition[name]))
    print("\n[health] fast path vs definition, worst relative difference:",
          {k: round(v, 4) for k, v in worst.items()})
    for name, tolerance in FAST_TOLERANCE.items():
        assert worst[name] <= tolerance, (name, worst)


def test_health_image_against_full_resolution_statistics():
    from oddling.data.health import colourfulness, health_image

    worst = {"brightness": 0.0, "contrast": 0.0, "colourfulness": 0.0}
    for name in SAMPLES:
        image = sample(name)
        grey = np.asarray(image.convert("L"), dtype=np.float64)
        full = {"brightness": grey.mean(), "contrast": grey.std(), "colourfulness": colourfulness(np.asarray(image))}
        reduced = image_stats(image, *image.size)
        assert health_image(image).size == image.size or min(health_image(image).size) == 256
        for key in worst:
            if full[key] > 1e-6:
                worst[key] = max(worst[key], relative(reduced[key], full[key]))
                if key != "brightness":   # fine texture is lost, never invented
                    assert reduced[key] <= full[key] * 1.01, (name, key)
    print("\n[health] health image vs full resolution, worst:", {k: round(v, 4) for k, v in worst.items()})
    assert worst["brightness"] <= 0.005
    assert worst["contrast"] <= 0.15 and worst["colourfulness"] <= 0.25


def test_sharpness_of_one_picture_at_two_file_sizes_agrees():
    for name in SAMPLES:
        image = sample(name)
        if min(image.size) < 512:
            continue
        half = image.resize((image.width // 2, image.height // 2), Image.Resampling.BOX)
        a, b = stats_of(image)["sharpness"], stats_of(half)["sharpness"]
        assert relative(b, a) <= 0.20, name


def test_old_fences_skip_image_statistics_with_one_note_but_keep_size(normal_fences, monkeypatch):
    import warnings

    import oddling.data.health as health

    monkeypatch.setattr(health, "_noted_old_fences", False)
    old = {name: {k: v for k, v in fence.items() if k != "health_version"} for name, fence in normal_fences.items()}
    dark = ImageEnhance.Brightness(Image.fromarray(data.astronaut()).crop((100, 100, 340, 340))).enhance(0.25)
    assert "too dark" in health_findings(stats_of(dark), normal_fences)
    odd_size = image_stats(dark, 600, 100)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        first = health_findings(odd_size, old)
        second = health_findings(stats_of(dark), old)
    assert first == ["unusual size (far out)"] and second == []   # brightness skipped, size kept
    notes = [w for w in caught if "earlier definition" in str(w.message)]
    assert len(notes) == 1 and "refit" in str(notes[0].message).lower()


def test_fences_record_the_definition_version_and_pass_the_bank_validator(normal_fences, tmp_path):
    from oddling.bank.store import _check_fences

    assert all(f["health_version"] == [HEALTH_VERSION, HEALTH_VERSION] for f in normal_fences.values())

    class Fields:
        def fail(self, field, message):
            raise AssertionError(f"{field} {message}")

    _check_fences(Fields(), normal_fences)
