"""Every detector keeps its false-alarm rate on real images: repeated seeded splits of one normal
folder into references and fresh normals, pooled over the splits.

The images are 600 random 64 px crops (half of them mirrored) of scikit-image's bundled
immunohistochemistry photograph, cut here; features are the project's own 16 px grey thumbnails
(`pixels:16`) for the vector detectors and an 8 x 8 grid of cell colour statistics for the patch
detector (the calibration scheme is what is tested, not the features). Each pooled rate must lie at
or below the upper end of the binomial 99% interval around the rate (SciPy's `binom`), and at
least half of what an exact split-conformal bank gives on average, (m + 1) / (n + 1) with m the
calibration scores a flagged image may be under (Vovk et al. 2005): a detector far below its rate
throws recall away. benchmarks/CALIBRATION_RESULTS.md has the same check on network features.
"""
import numpy as np
import pytest
from PIL import Image
from scipy.stats import binom

from oddling.backbones.representation import pixel_features
from oddling.detectors import make_detector
from oddling.detectors.conformal import ConformalThreshold, max_allowed_exceedances

N_CROPS, SIDE, N_REF, SPLITS = 600, 64, 150, 20
RATES = (0.01, 0.05, 0.1)
DETECTORS = [("knn", {}), ("patch-knn", {}), ("gaussian", {}), ("pca", {"variance": 0.95}),
             ("iforest", {"n_estimators": 50})]    # fewer trees than the default: runtime only


@pytest.fixture(scope="module")
def crops():
    from skimage import data

    photo = data.immunohistochemistry()
    rng = np.random.default_rng(0)
    out = []
    for _ in range(N_CROPS):
        y, x = rng.integers(0, photo.shape[0] - SIDE, 2)
        crop = photo[y:y + SIDE, x:x + SIDE]
        out.append(np.ascontiguousarray(crop[:, ::-1] if rng.random() < 0.5 else crop))
    return np.stack(out)


@pytest.fixture(scope="module")
def features(crops):
    thumbs = np.stack([np.asarray(Image.fromarray(c).resize((16, 16), Image.Resampling.BILINEAR)) for c in crops])
    vectors = pixel_features(thumbs.astype(np.float32).transpose(0, 3, 1, 2))
    cells = crops.astype(np.float32).reshape(len(crops), 8, 8, 8, 8, 3)
    grid = np.concatenate([cells.mean(axis=(2, 4)), cells.std(axis=(2, 4))], axis=-1).reshape(len(crops), 64, 6)
    grid = (grid - grid.mean(axis=(0, 1))) / grid.std(axis=(0, 1))
    return {"vector": vectors, "patches": grid.astype(np.float32)}


@pytest.mark.parametrize("name, params", DETECTORS, ids=[d for d, _ in DETECTORS])
def test_pooled_false_alarm_rate_of_fresh_normals(name, params, features):
    detector = make_detector(name, params)
    x = features[detector.feature_kind]
    ids = np.array([f"crop{i}" for i in range(N_CROPS)])        # stand-ins for content hashes
    flagged, total = dict.fromkeys(RATES, 0), 0
    for split in range(SPLITS):
        order = np.random.default_rng(1000 + split).permutation(N_CROPS)
        ref, fresh = order[:N_REF], order[N_REF:]
        det = make_detector(name, params).fit(x[ref], ids[ref])
        scores = det.anomaly_score(x[fresh], ids[fresh]).scores
        for rate in RATES:
            flagged[rate] += int(ConformalThreshold(det.calibration_scores_, rate).flag(scores).sum())
        total += len(fresh)
    for rate in RATES:
        pooled = flagged[rate] / total
        upper = binom.ppf(0.995, total, rate) / total                       # SciPy
        exact = (max_allowed_exceedances(N_REF, rate) + 1) / (N_REF + 1)
        print(f"\n[{name}] a={rate}: pooled false-alarm rate {pooled:.4f} over {total} fresh normals "
              f"(binomial 99% upper end {upper:.4f}; an exact split bank averages {exact:.4f})")
        assert pooled <= upper
        assert pooled >= exact / 2
