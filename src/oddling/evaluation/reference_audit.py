"""Is the reference set itself clean? Outliers among the references, exact and near duplicates.

- outlier: a reference whose leave-one-out score (its mean distance to the k nearest *other*
  references, the bank's calibration score) lies beyond Tukey's far-out fence (Q3 + 3 IQR) of
  all of them; its conformal p-value among the others is reported alongside. A fence, not a
  p-value cut-off, decides, because with n references the most extreme one always has p = 1/n.
- duplicate: two or more references with the same content hash (they shrink calibration scores).
- health: a reference whose image statistics lie beyond the far-out fence (k = 3) of the
  references' own: a dark, blurred or odd-sized frame that slipped into the normal folder.
- near_duplicate: different files whose embeddings have cosine similarity >= NEAR_DUPLICATE_COSINE
  (a resized or re-encoded copy of one photo; distinct normal images sit well below this).
"""
from __future__ import annotations

from collections import defaultdict
from dataclasses import asdict, dataclass

import numpy as np

from oddling.bank.store import Bank
from oddling.data.health import K_FAR_OUT, STATS, health_findings, tukey_fences
from oddling.index.exact import ExactCosineIndex

NEAR_DUPLICATE_COSINE = 0.99
NEIGHBOURS_CHECKED = 5   # near-duplicate candidates looked at per reference


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
                                f"leave-one-out score {scores[i]:.4f} above the far-out fence {upper:.4f} "
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


def near_duplicate_findings(bank: Bank, threshold: float = NEAR_DUPLICATE_COSINE) -> list[Finding]:
    k = min(bank.size, NEIGHBOURS_CHECKED + 1)
    distances, rows = ExactCosineIndex(bank.features).search(bank.features, k)
    seen = set()
    findings = []
    for i in range(bank.size):
        for d, j in zip(distances[i], rows[i]):
            j = int(j)
            if j == i or bank.references[i]["sha256"] == bank.references[j]["sha256"]:
                continue
            cosine = 1.0 - float(d)
            pair = (min(i, j), max(i, j))
            if cosine >= threshold and pair not in seen:
                seen.add(pair)
                a, b = sorted((bank.references[i]["path"], bank.references[j]["path"]))
                findings.append(Finding(b, "near_duplicate", f"cosine similarity {cosine:.4f} with {a}"))
    return sorted(findings, key=lambda f: f.path)


def health_audit_findings(bank: Bank) -> list[Finding]:
    findings = []
    for ref, row in zip(bank.references, bank.health_stats.tolist()):
        far = [w for w in health_findings(dict(zip(STATS, row)), bank.health_fences) if w.endswith("(far out)")]
        if far:
            findings.append(Finding(ref["path"], "health", "; ".join(far)))
    return sorted(findings, key=lambda f: f.path)


def audit_bank(bank: Bank) -> list[Finding]:
    return (outlier_findings(bank) + duplicate_findings(bank) + near_duplicate_findings(bank)
            + health_audit_findings(bank))
