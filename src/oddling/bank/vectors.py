"""How a bank stores its reference vectors: float32, or float16 when asked and verified.

float16 halves features.npy (on disk and mapped). Rounding a unit vector's components to
float16 (11 significant bits, relative error <= 2^-11 each) moves a cosine distance by at most
about 1e-3 in the worst case and far less in practice, but a bank should not be trusted on
that: `check_float16` measures it at fit. A seeded sample of `CHECK_SAMPLE` references is scored
leave-one-out (the kNN score, k nearest, copies of one file excluded) by exact search twice, over
the float32 and over the float16 vectors; the largest difference must stay within
`TOLERANCE`, or the fit is refused (OddlingError) and nothing is written: a float32 bank is never
substituted silently, and a user who asked for float16 gets told why not.

The bank is then fitted on the float16 vectors (upcast): its calibration scores, its index and
every later score come from exactly the vectors it stores.
"""
from __future__ import annotations

import numpy as np

from oddling.errors import OddlingError

DTYPES = ("float32", "float16")
TOLERANCE = 1e-3       # largest allowed score difference float16 vs float32 (the bound)
CHECK_SAMPLE = 1000    # references scored both ways at fit
SEED = 0


def check_dtype(vector_dtype) -> str:
    if vector_dtype not in DTYPES:
        raise OddlingError(f"vector_dtype must be one of {', '.join(DTYPES)}, got: {vector_dtype!r}")
    return vector_dtype


def check_float16(features: np.ndarray, groups: np.ndarray, k: int) -> dict:
    """Score a seeded sample of references leave-one-out from float32 and float16 vectors (exact
    search both times); the record for bank.json, or OddlingError when they differ by more than
    TOLERANCE."""
    from oddling.detectors.knn import group_codes, leave_one_out_distances, mean_knn_distance
    from oddling.index.exact import ExactCosineIndex

    full = np.ascontiguousarray(features, dtype=np.float32)
    half = full.astype(np.float16)
    n = len(full)
    rows = np.arange(n) if n <= CHECK_SAMPLE else np.sort(
        np.random.default_rng(SEED).choice(n, size=CHECK_SAMPLE, replace=False))
    codes, largest = group_codes(groups)
    scores = [mean_knn_distance(leave_one_out_distances(ExactCosineIndex(v), v, codes, largest, k, rows))
              for v in (full, half)]
    difference = float(np.abs(scores[0] - scores[1]).max())
    if not difference <= TOLERANCE:
        raise OddlingError(
            f"float16 storage changes the kNN scores of {len(rows)} references by up to {difference:.2g}, more than "
            f"the allowed {TOLERANCE:g}; no bank was written. Fit without --vector-dtype float16 (float32 storage)")
    return {"dtype": "float16", "max_score_difference": round(difference, 9), "tolerance": TOLERANCE,
            "n_checked": int(len(rows)), "k": int(k),
            "measured": (f"leave-one-out kNN scores (k={k}) of {len(rows)} references, seeded sample, by exact search "
                         "over the float32 and over the float16 vectors; largest absolute difference")}
