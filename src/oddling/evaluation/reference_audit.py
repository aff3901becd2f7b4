"""Is the reference set itself clean? Outliers among the references, exact and near duplicates.

- outlier: a reference whose calibration score (its score from a detector that did not see it;
  for kNN, its mean distance to the k nearest *other*
  references, the bank's calibration score) lies beyond Tukey's far-out fence (Q3 + 3 IQR) of
  all of them; its conformal p-value among the others is reported alongside. A fence, not a
  p-value cut-off, decides, because with n references the most extreme one always has p = 1/n.
- duplicate: two or more references with the same content hash (they shrink calibration scores).
- health: a reference whose image statistics lie beyond the far-out fence (k = 3) of the
  references' own: a dark, blurred or odd-sized frame that slipped into the normal folder.
- near_duplicate: different files that are one picture (a resized or re-encoded copy), by either
  of two rules measured against the bank itself (near_duplicate_pairs):
  * perceptual hash: the DCT hashes of the two files differ in at most
    min(max_hash_bits, HASH_NEIGHBOUR_FACTOR x the median nearest-neighbour Hamming distance) bits;
  * embeddings: their cosine distance is below `factor` x the median nearest-neighbour distance.
  A fixed cosine cut-off (0.99) does not work: how close distinct normal images sit depends on
  the images, and a copy can sit farther from its original than distinct images from each other
  (among 40 UCI zeros, cos >= 0.99 paired two different zeros and missed a resized copy at 0.93).
"""
from __future__ import annotations

import math
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from PIL import Image
from scipy.fft import dct

from oddling.bank.store import Bank
from oddling.data.health import K_FAR_OUT, STATS, health_findings, tukey_fences
from oddling.data.intake import IntakeError, load_rgb, sha256_file
from oddling.errors import OddlingError

# Near duplicates: the choices and the measurements behind them (EfficientNet-Lite0 embeddings and
# the hash below; scikit-image's samples with two crops each and resized / JPEG / brightened copies
# of five, UCI zeros with a resized copy, the demo's ceramic tiles: 48 with JPEG and resized copies
# of four, 160 clean ones):
# - embeddings: copies sat at 0.01-0.57 x the median nearest-neighbour cosine distance among the
#   samples, 0.58-2.5 x among the tiles, 3.7 x for the resized digit, so embeddings alone miss
#   most copies. Distinct pictures sat at >= 0.24 x (two halves of one texture), 0.48 x (zeros),
#   0.58 x (tiles):
#   factor 0.1 keeps a margin of 2 and still catches copies that barely changed (20 of the
#   samples' 50 copy pairs); it never fired where the hash did not, but it is what is left when
#   the reference files are gone.
# - the 256-bit hash: copies differed in <= 12 bits (samples) and <= 4 (tiles); distinct pictures in
#   >= 32 (samples), >= 26 (178 zeros), >= 24 / 20 (48 / 160 tiles), with median nearest-neighbour
#   distances of 106, 44, 39 / 35 bits. 12 bits (4.7%, 3 of a classic 64-bit pHash), capped at
#   0.45 x the median so that a crowded bank gets stricter, finds all those copies and no distinct
#   pair. Found by neither: crops (a 90% centre crop: 76-130 bits, 0.11-0.67 x) and 8x8 digits
#   resized 64 -> 60 px (13-29 bits, median 20: as far as distinct zeros).
NEAR_DUPLICATE_FACTOR = 0.1     # embeddings: below this share of the median nearest-neighbour distance
MAX_HASH_BITS = 12              # perceptual hash: at most this many differing bits ...
HASH_NEIGHBOUR_FACTOR = 0.45    # ... and at most this share of the median nearest-neighbour Hamming distance
HASH_GRID = 64                  # the hash: grey image resized to HASH_GRID^2, DCT, ...
HASH_KEEP = 16                  # ... the HASH_KEEP^2 lowest frequencies, each above their median or not
HASH_BITS = HASH_KEEP * HASH_KEEP
_CHUNK_CELLS = 4_000_000        # pairwise work is done in row chunks of about this many cells
_PACKED_BYTES = 8 * ((HASH_BITS + 63) // 64)   # whole 64-bit words: 256 bits -> 32 bytes
_POPCOUNT = np.array([bin(i).count("1") for i in range(256)], dtype=np.uint8)


@dataclass
class Finding:
    path: str
    kind: str     # "outlier" | "duplicate" | "near_duplicate" | "health"
    detail: str

    def to_dict(self) -> dict:
        return asdict(self)


def outlier_findings(bank: Bank) -> list[Finding]:
    scores = np.asarray(bank.calibration_scores, dtype=np.float64)
    _, upper = tukey_fences(scores, K_FAR_OUT)
    findings = []
    n = len(scores)
    for i in np.flatnonzero(scores > upper):
        others_at_least = int(np.sum(np.delete(scores, i) >= scores[i]))
        p = (1 + others_at_least) / n
        findings.append(Finding(bank.references[i]["path"], "outlier",
                                f"calibration score {scores[i]:.4f} (scored without itself) above the far-out fence {upper:.4f} "
                                f"(p-value {p:.4f} among the other references)"))
    return sorted(findings, key=lambda f: f.path)


def duplicate_findings(bank: Bank) -> list[Finding]:
    groups: dict[str, list[str]] = defaultdict(list)
    for ref in bank.references:
        groups[ref["sha256"]].append(ref["path"])
    findings = []
    for paths in groups.values():
        if len(paths) > 1:
            paths = sorted(paths)
            for path in paths[1:]:
                findings.append(Finding(path, "duplicate", f"same content as {paths[0]}"))
    return sorted(findings, key=lambda f: f.path)


def perceptual_hash(image: Image.Image) -> np.ndarray:
    """HASH_BITS booleans: the grey image resized to HASH_GRID x HASH_GRID (Lanczos), its 2-D DCT-II,
    and of the HASH_KEEP x HASH_KEEP lowest frequencies, which lie above their median.

    The DCT ("perceptual") hash of pHash as Krawetz describes it ("Looks like it", hackerfactor.com,
    2011; Zauner, "Implementation and benchmarking of perceptual image hash functions", 2010), at
    4x its classic 32/8 size: the classic 64 bits could not tell the demo's distinct tiles apart
    (2 bits). Bit for bit ImageHash's ``phash(image, hash_size=16)`` (tests/test_near_duplicates.py).
    Low frequencies survive resizing and JPEG; the median makes it blind to brightness and contrast.
    """
    grey = image.convert("L").resize((HASH_GRID, HASH_GRID), Image.Resampling.LANCZOS)
    coefficients = dct(dct(np.asarray(grey, dtype=np.float64), type=2, axis=0), type=2, axis=1)
    low = coefficients[:HASH_KEEP, :HASH_KEEP]
    return (low > np.median(low)).ravel()


def file_hash(path: Path, sha256: str | None = None) -> np.ndarray | None:
    """perceptual_hash of an image file; None if it cannot be read or (given `sha256`) has changed."""
    try:
        if sha256 is not None and sha256_file(path) != sha256:
            return None
        return perceptual_hash(load_rgb(path, min_side=HASH_GRID))
    except (OSError, IntakeError):
        return None


@dataclass(frozen=True)
class NearDuplicatePair:
    i: int                      # rows of the inputs, i < j
    j: int
    cosine_distance: float
    hash_bits: int | None       # differing hash bits; None when either has no hash
    by_embedding: bool
    by_hash: bool


@dataclass(frozen=True)
class NearDuplicates:
    """near_duplicate_pairs' answer: the pairs and the bank-relative cut-offs that chose them."""

    pairs: list[NearDuplicatePair]
    median_nn_distance: float | None    # median over images of the cosine distance to the nearest other
    distance_cutoff: float | None       # factor x median_nn_distance; pairs strictly below
    median_nn_hash_bits: float | None   # the same for the hash's Hamming distance
    hash_cutoff: float | None           # min(max_hash_bits, hash_factor x median_nn_hash_bits); pairs at or below


def _check_rule(factor: float, max_hash_bits: int, hash_factor: float) -> None:
    if not (isinstance(factor, (int, float)) and math.isfinite(factor) and 0.0 <= factor < 1.0):
        raise OddlingError(f"near-duplicate factor must be a number in [0, 1), got: {factor!r}")
    if isinstance(max_hash_bits, bool) or not isinstance(max_hash_bits, (int, np.integer)) or max_hash_bits < 0:
        raise OddlingError(f"max_hash_bits must be a whole number >= 0, got: {max_hash_bits!r}")
    if not (isinstance(hash_factor, (int, float)) and math.isfinite(hash_factor) and hash_factor >= 0.0):
        raise OddlingError(f"hash_factor must be a number >= 0, got: {hash_factor!r}")


def _chunks(n: int, width: int):
    step = max(1, _CHUNK_CELLS // max(1, width))
    for start in range(0, n, step):
        yield start, min(n, start + step)


def _cosine_rows(v: np.ndarray, groups: np.ndarray, start: int, stop: int) -> np.ndarray:
    """Cosine distances of rows start:stop to all rows; inf to itself and to its own content group."""
    d = np.clip(1.0 - (v[start:stop] @ v.T).astype(np.float64), 0.0, 2.0)
    d[groups[start:stop, None] == groups[None, :]] = np.inf
    return d


def _hamming_rows(packed: np.ndarray, usable: np.ndarray, groups: np.ndarray, start: int, stop: int) -> np.ndarray:
    """Differing bits of rows start:stop to all rows; inf where a side has no hash or same group."""
    xor = packed[start:stop, None, :] ^ packed[None, :, :]
    if hasattr(np, "bitwise_count"):   # NumPy >= 2.0: native popcount on 64-bit words
        bits = np.bitwise_count(xor.view(np.uint64)).sum(axis=2, dtype=np.int64).astype(np.float64)
    else:
        bits = _POPCOUNT[xor].sum(axis=2, dtype=np.int64).astype(np.float64)
    bits[groups[start:stop, None] == groups[None, :]] = np.inf
    bits[:, ~usable] = np.inf
    bits[~usable[start:stop]] = np.inf
    return bits


def _median_finite(values: np.ndarray) -> float | None:
    finite = values[np.isfinite(values)]
    return float(np.median(finite)) if len(finite) else None


def near_duplicate_pairs(vectors: np.ndarray, hashes: Sequence[np.ndarray | None] | np.ndarray | None = None,
                         groups: Sequence | None = None, *, factor: float = NEAR_DUPLICATE_FACTOR,
                         max_hash_bits: int = MAX_HASH_BITS,
                         hash_factor: float = HASH_NEIGHBOUR_FACTOR) -> NearDuplicates:
    """Pairs of rows that are one picture, judged against the set's own nearest-neighbour distances.

    vectors: (n, d) L2-normalised embeddings. hashes: one perceptual_hash (or None) per row, or None.
    groups: one content id per row (the file's sha256): rows of one group are exact duplicates,
    never paired here and left out of the neighbour distances. A pair is a near duplicate when
    its cosine distance < factor x the median nearest-neighbour distance, or when both rows have a
    hash and they differ in <= min(max_hash_bits, hash_factor x the median nearest-neighbour
    Hamming distance) bits. Pairs sorted by (i, j). factor 0 turns the embedding rule off,
    max_hash_bits 0 leaves the hash rule only pictures with identical hashes.
    """
    _check_rule(factor, max_hash_bits, hash_factor)
    v = np.ascontiguousarray(vectors, dtype=np.float32)
    if v.ndim != 2:
        raise ValueError(f"vectors must be a 2-D array, got shape {v.shape}")
    n = len(v)
    g = np.arange(n) if groups is None else np.unique(np.asarray(list(groups), dtype=object).astype(str),
                                                       return_inverse=True)[1]
    if len(g) != n:
        raise ValueError(f"groups must have one entry per vector, got: {len(g)} for {n}")
    if hashes is None:
        hashes = [None] * n
    if len(hashes) != n:
        raise ValueError(f"hashes must have one entry per vector, got: {len(hashes)} for {n}")
    usable = np.array([h is not None for h in hashes], dtype=bool)
    packed = np.zeros((n, _PACKED_BYTES), dtype=np.uint8)
    for row in np.flatnonzero(usable):
        h = np.asarray(hashes[row], dtype=bool).ravel()
        if h.shape != (HASH_BITS,):
            raise ValueError(f"hashes must have {HASH_BITS} bits (perceptual_hash), got: {h.shape} at row {row}")
        packed[row] = np.packbits(h)
    if n < 2:
        return NearDuplicates([], None, None, None, None)

    # pass 1: each row's nearest other (different content) row, in both measures
    nn_distance, nn_bits = np.full(n, np.inf), np.full(n, np.inf)
    for start, stop in _chunks(n, n):
        nn_distance[start:stop] = _cosine_rows(v, g, start, stop).min(axis=1)
    if usable.sum() >= 2:
        for start, stop in _chunks(n, n * packed.shape[1]):
            nn_bits[start:stop] = _hamming_rows(packed, usable, g, start, stop).min(axis=1)
    median_distance, median_bits = _median_finite(nn_distance), _median_finite(nn_bits)
    distance_cutoff = None if median_distance is None else factor * median_distance
    hash_cutoff = None if median_bits is None else min(float(max_hash_bits), hash_factor * median_bits)

    # pass 2: the pairs under either cut-off
    pairs = []
    for start, stop in _chunks(n, n * packed.shape[1]):
        d = _cosine_rows(v, g, start, stop)
        bits = _hamming_rows(packed, usable, g, start, stop)
        near_d = d < distance_cutoff if distance_cutoff is not None else np.zeros_like(d, dtype=bool)
        near_h = bits <= hash_cutoff if hash_cutoff is not None else np.zeros_like(d, dtype=bool)
        rows, cols = np.nonzero(near_d | near_h)
        for r, c in zip(rows.tolist(), cols.tolist()):
            i = start + r
            if c > i:
                b = bits[r, c]
                pairs.append(NearDuplicatePair(i, c, float(d[r, c]), int(b) if math.isfinite(b) else None,
                                               bool(near_d[r, c]), bool(near_h[r, c])))
    pairs.sort(key=lambda p: (p.i, p.j))
    return NearDuplicates(pairs, median_distance, distance_cutoff, median_bits, hash_cutoff)


def reference_hashes(bank: Bank) -> list[np.ndarray | None]:
    """perceptual_hash of each reference file, read from the bank's reference folder; None for a
    file that is gone or no longer has the content the bank embedded (its sha256)."""
    root = Path(bank.reference_root)
    out = []
    for ref in bank.references:
        path = Path(ref["path"])
        out.append(file_hash(path if path.is_absolute() else root / path, ref.get("sha256")))
    return out


def _pair_detail(pair: NearDuplicatePair, other: str, found: NearDuplicates) -> str:
    reasons = []
    if pair.by_hash:
        reasons.append(f"perceptual hash differs in {pair.hash_bits} of {HASH_BITS} bits "
                       f"(cut-off {found.hash_cutoff:.1f}; median to the nearest other reference "
                       f"{found.median_nn_hash_bits:.1f})")
    if pair.by_embedding:
        reasons.append(f"cosine distance {pair.cosine_distance:.4f}, "
                       f"{pair.cosine_distance / found.median_nn_distance:.3f} x the median distance to the "
                       f"nearest other reference ({found.median_nn_distance:.4f})")
    return f"near duplicate of {other}: " + "; ".join(reasons)


def near_duplicate_findings(bank: Bank, factor: float = NEAR_DUPLICATE_FACTOR, *,
                            max_hash_bits: int = MAX_HASH_BITS,
                            hashes: Sequence[np.ndarray | None] | None = None) -> list[Finding]:
    """near_duplicate_pairs over the bank's references, one finding per pair on the path that sorts
    later (the one `bank remove` would drop). Hashes are computed from the reference files unless
    given; references whose files are gone or changed are judged by their embeddings alone."""
    if bank.size < 2:
        return []
    if hashes is None:
        hashes = reference_hashes(bank)
    found = near_duplicate_pairs(bank.features, hashes, [r["sha256"] for r in bank.references],
                                 factor=factor, max_hash_bits=max_hash_bits)
    findings = []
    for pair in found.pairs:
        a, b = sorted((bank.references[pair.i]["path"], bank.references[pair.j]["path"]))
        findings.append(Finding(b, "near_duplicate", _pair_detail(pair, a, found)))
    return sorted(findings, key=lambda f: (f.path, f.detail))


def health_audit_findings(bank: Bank) -> list[Finding]:
    findings = []
    for ref, row in zip(bank.references, bank.health_stats.tolist()):
        far = [w for w in health_findings(dict(zip(STATS, row)), bank.health_fences) if w.endswith("(far out)")]
        if far:
            findings.append(Finding(ref["path"], "health", "; ".join(far)))
    return sorted(findings, key=lambda f: f.path)


def audit_bank(bank: Bank, *, near_duplicate_factor: float = NEAR_DUPLICATE_FACTOR,
               max_hash_bits: int = MAX_HASH_BITS) -> list[Finding]:
    return (outlier_findings(bank) + duplicate_findings(bank)
            + near_duplicate_findings(bank, near_duplicate_factor, max_hash_bits=max_hash_bits)
            + health_audit_findings(bank))
