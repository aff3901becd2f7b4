"""fit + score on an open dataset a package ships: scikit-learn's UCI handwritten digits.

A bank of zeros; held-out zeros must rank below the other digits. AUROC computed with
scikit-learn's roc_auc_score (the outside reference); the floor is what we measured, with margin.
"""
import csv

import numpy as np
from sklearn.metrics import roc_auc_score

import oddling

AUROC_FLOOR = 0.90   # measured when written (see the printed value); ImageNet features on tiny digits


def test_other_digits_rank_above_held_out_zeros(digits_folders, digits_bank, capsys):
    result = oddling.score(digits_folders["incoming"], digits_bank, options=oddling.RunOptions(progress=False))
    truth = digits_folders["truth"]
    labels = np.array([truth[r.path] for r in result.scored])
    scores = np.array([r.score for r in result.scored])
    auroc = roc_auc_score(labels, scores)
    with capsys.disabled():
        print(f"\n[digits] AUROC zeros vs other digits: {auroc:.4f}")
    assert auroc >= AUROC_FLOOR


def test_rows_sorted_by_score_descending_with_evidence(digits_folders, digits_bank):
    result = oddling.score(digits_folders["incoming"], digits_bank, options=oddling.RunOptions(progress=False))
    scores = [r.score for r in result.rows]
    assert scores == sorted(scores, reverse=True)
    reference_names = {p.name for p in digits_folders["reference"].iterdir()}
    assert all(r.nearest[0] in reference_names for r in result.rows)
    assert all(len(r.nearest) == digits_bank.detector.k for r in result.rows)


def test_same_inputs_give_byte_identical_csv(digits_folders, digits_bank, tmp_path):
    opts = oddling.RunOptions(progress=False)
    a = oddling.score(digits_folders["incoming"], digits_bank, options=opts).write_csv(tmp_path / "a.csv")
    reloaded = oddling.load_bank(digits_bank.path)
    b = oddling.score(digits_folders["incoming"], reloaded, options=opts).write_csv(tmp_path / "b.csv")
    assert a.read_bytes() == b.read_bytes()
    header = next(csv.reader(a.open()))
    assert header == ["path", "score", "p_value", "flagged", "nearest", "nearest_distance", "health", "status"]
