"""Batch shift tests: has a whole batch of embeddings moved away from the reference bank?

Two tests, combined with a Bonferroni correction:
- a kernel two-sample test, the unbiased squared maximum mean discrepancy (MMD_u^2) with a
  Gaussian kernel, median-distance bandwidth and a permutation p-value: Gretton, Borgwardt,
  Rasch, Schölkopf & Smola, "A kernel two-sample test", JMLR 13:723-773, 2012;
- an exact one-sided binomial test of the share of the batch flagged at the bank's cutoff
  against the share the calibration promises (scipy.stats.binomtest).
"""
from __future__ import annotations

import numpy as np
from scipy.stats import binomtest

MAX_SAMPLES = 1000   # each side is subsampled (seeded, without replacement) above this many rows,
                     # which keeps the pooled kernel matrix at <= 2000 x 2000 (32 MB) and a run at seconds
_TIE_TOLERANCE = 1e-10   # absolute; MMD_u^2 with a Gaussian kernel lies in [-2, 2]
_PERMUTATION_CHUNK = 100   # permutations scored per matrix product; bounds memory at chunk x (n_x + n_y)


def _check_samples(x, y) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    for name, a in (("x", x), ("y", y)):
        if a.ndim != 2:
            raise ValueError(f"{name} must be a 2-D array (samples x features), got shape: {a.shape}")
        if len(a) < 2:
            raise ValueError(f"{name} needs at least 2 samples, got: {len(a)}")
        if not np.all(np.isfinite(a)):
            raise ValueError(f"{name} contains NaN or infinite values")
    if x.shape[1] != y.shape[1]:
        raise ValueError(f"x and y must have the same number of features, got: {x.shape[1]} and {y.shape[1]}")
    return x, y


def _subsample(a: np.ndarray, max_rows: int, rng: np.random.Generator) -> np.ndarray:
    if len(a) <= max_rows:
        return a
    return a[np.sort(rng.choice(len(a), size=max_rows, replace=False))]


def _squared_distances(z: np.ndarray) -> np.ndarray:
    """All pairwise squared Euclidean distances by one matrix product (|a|^2 + |b|^2 - 2 a.b)."""
    sq = np.einsum("ij,ij->i", z, z)
    d2 = sq[:, None] + sq[None, :] - 2.0 * (z @ z.T)
    np.maximum(d2, 0.0, out=d2)   # rounding can leave tiny negatives
    np.fill_diagonal(d2, 0.0)
    return d2


def _median_of_pairs(d2: np.ndarray) -> float:
    """Median distance over pairs i < j; falls back to the mean positive distance, then 1.0,
    so that a sample with many duplicates never yields a zero bandwidth."""
    d = np.sqrt(d2[np.triu_indices(len(d2), k=1)])
    median = float(np.median(d))
    if median > 0.0:
        return median
    positive = d[d > 0.0]
    return float(positive.mean()) if len(positive) else 1.0


def median_bandwidth(x, y) -> float:
    """Median pairwise Euclidean distance of the pooled sample (the "median heuristic",
    Gretton et al. 2012, section 8). Each side is subsampled (seed 0) to MAX_SAMPLES first."""
    x, y = _check_samples(x, y)
    rng = np.random.default_rng(0)
    z = np.vstack([_subsample(x, MAX_SAMPLES, rng), _subsample(y, MAX_SAMPLES, rng)])
    return _median_of_pairs(_squared_distances(z))


def _gaussian_kernel(d2: np.ndarray, bandwidth: float) -> np.ndarray:
    if not bandwidth > 0.0:
        raise ValueError(f"bandwidth must be > 0, got: {bandwidth}")
    return np.exp(-d2 / (2.0 * bandwidth ** 2))


def _block_sums(k_off: np.ndarray, in_x: np.ndarray) -> np.ndarray:
    """MMD_u^2 for each row of the 0/1 label matrix in_x over the pooled kernel matrix whose
    diagonal is zeroed (so that sums over a block skip i == j, as the unbiased estimator does)."""
    n = len(k_off)
    m = int(in_x[0].sum())
    total = k_off.sum()
    kx = in_x @ k_off                         # row r: sum_j k(i, j) over j in X, for every i
    sum_xx = np.einsum("ri,ri->r", kx, in_x)  # sum over i != j both in X
    sum_xy = kx.sum(axis=1) - sum_xx          # sum over i in X, j in Y
    sum_yy = total - sum_xx - 2.0 * sum_xy
    ny = n - m
    return sum_xx / (m * (m - 1)) + sum_yy / (ny * (ny - 1)) - 2.0 * sum_xy / (m * ny)


def mmd2_unbiased(x, y, bandwidth: float) -> float:
    """Unbiased squared MMD with the Gaussian kernel k(a, b) = exp(-|a - b|^2 / (2 s^2)).

    MMD_u^2 = 1/(m(m-1)) sum_{i!=j} k(x_i, x_j) + 1/(n(n-1)) sum_{i!=j} k(y_i, y_j)
              - 2/(mn) sum_{i,j} k(x_i, y_j)
    (Gretton et al. 2012, eq. 3; Lemma 6 is the m = n case). Can be negative when the two
    distributions are equal. No subsampling here: the caller chooses the sample.
    """
    x, y = _check_samples(x, y)
    k = _gaussian_kernel(_squared_distances(np.vstack([x, y])), float(bandwidth))
    np.fill_diagonal(k, 0.0)
    in_x = np.zeros((1, len(k)))
    in_x[0, :len(x)] = 1.0
    return float(_block_sums(k, in_x)[0])


def mmd_permutation_test(x, y, n_permutations: int = 500, seed: int = 0) -> dict:
    """MMD_u^2 with a median-distance bandwidth and a permutation p-value.

    Under H0 (same distribution) the pooled sample is exchangeable, so relabelling it gives
    draws of the statistic's null distribution; p = (1 + #{perm >= observed}) / (1 + n_perm)
    is then valid (P(p <= a) <= a). The pooled kernel matrix is built once; each permutation
    only re-sums its blocks. Each side is subsampled (seeded) to MAX_SAMPLES rows first;
    "n_x" and "n_y" report the sizes actually tested.
    """
    rng = np.random.default_rng(seed)
    x, y = np.asarray(x), np.asarray(y)
    if x.ndim == 2 and y.ndim == 2:    # subsampled before the float64 copy: a bank's mapped features stay mapped
        x = _subsample(x, MAX_SAMPLES, rng)
        y = _subsample(y, MAX_SAMPLES, rng)
    x, y = _check_samples(x, y)
    if int(n_permutations) != n_permutations or n_permutations < 1:
        raise ValueError(f"n_permutations must be a positive integer, got: {n_permutations}")
    n_permutations = int(n_permutations)
    d2 = _squared_distances(np.vstack([x, y]))
    bandwidth = _median_of_pairs(d2)
    k = _gaussian_kernel(d2, bandwidth)
    del d2
    np.fill_diagonal(k, 0.0)

    n = len(k)
    labels = np.zeros(n)
    labels[:len(x)] = 1.0
    observed = float(_block_sums(k, labels[None, :])[0])
    at_least = 0
    for start in range(0, n_permutations, _PERMUTATION_CHUNK):
        rows = min(_PERMUTATION_CHUNK, n_permutations - start)
        shuffled = rng.permuted(np.tile(labels, (rows, 1)), axis=1)
        # a relabelling that reproduces the observed split must count as ">=" even when
        # a different summation order leaves it a rounding error below
        at_least += int(np.count_nonzero(_block_sums(k, shuffled) >= observed - _TIE_TOLERANCE))
    return {
        "mmd2": observed,
        "p_value": (1.0 + at_least) / (1.0 + n_permutations),
        "bandwidth": bandwidth,
        "n_x": len(x),
        "n_y": len(y),
        "n_permutations": n_permutations,
    }


def flagged_share_test(n_flagged: int, n_total: int, expected_share: float) -> dict:
    """Exact one-sided binomial test: is more of the batch flagged than the cutoff promises?"""
    if n_total < 1:
        raise ValueError(f"n_total must be >= 1, got: {n_total}")
    if not 0 <= n_flagged <= n_total:
        raise ValueError(f"n_flagged must be in [0, n_total={n_total}], got: {n_flagged}")
    if not 0.0 <= expected_share <= 1.0:
        raise ValueError(f"expected_share must be in [0, 1], got: {expected_share}")
    result = binomtest(int(n_flagged), int(n_total), float(expected_share), alternative="greater")
    return {
        "flagged_share": n_flagged / n_total,
        "expected_share": float(expected_share),
        "binomial_p_value": float(result.pvalue),
    }


def shift_verdict(mmd_p: float, binomial_p: float, alpha: float = 0.05) -> bool:
    """Shift if either p-value is below alpha / 2.

    Bonferroni over the two tests keeps the chance of a false "shift" on an unshifted batch
    at <= alpha whatever the dependence between them. A NaN p-value (test not available)
    never signals a shift.
    """
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be in (0, 1), got: {alpha}")
    return bool(mmd_p < alpha / 2 or binomial_p < alpha / 2)
