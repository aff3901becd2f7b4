"""evaluate end to end on scikit-learn's bundled digits; metrics checked against scikit-learn."""
import csv
import json

import numpy as np
import pytest
from click.testing import CliRunner
from sklearn.metrics import average_precision_score, roc_auc_score

import oddling
from oddling.cli import main


@pytest.fixture(scope="module")
def evaluation(digits_folders, digits_bank):
    return oddling.evaluate(digits_folders["test"], digits_bank, options=oddling.RunOptions(progress=False))


def test_metrics_agree_with_scikit_learn_on_the_written_scores(evaluation, tmp_path):
    paths = evaluation.write(tmp_path / "eval")
    rows = [r for r in csv.DictReader(paths["scores"].open()) if r["score"]]
    labels = np.array([r["label"] == "anomalous" for r in rows], dtype=int)
    scores = np.array([float(r["score"]) for r in rows])
    metrics = json.loads(paths["metrics"].read_text())
    # scikit-learn is the reference; CSV scores are rounded to 6 decimals, hence the tolerance
    assert metrics["auroc"] == pytest.approx(roc_auc_score(labels, scores), abs=1e-4)
    assert metrics["average_precision"] == pytest.approx(average_precision_score(labels, scores), abs=1e-4)
    assert metrics["n_normal"] == 50 and metrics["n_anomalous"] == 72
    assert set(metrics["per_kind_auroc"]) == {f"digit{d}" for d in range(1, 10)}
    low, high = metrics["auroc_ci95"]
    assert low <= metrics["auroc"] <= high
    for name in ("roc.png", "pr.png"):
        assert (tmp_path / "eval" / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_confusion_counts_add_up(evaluation):
    c = evaluation.metrics["at_cutoff"]
    assert c["tp"] + c["fn"] == 72 and c["fp"] + c["tn"] == 50


def test_labels_csv_gives_the_same_metrics(digits_folders, digits_bank, evaluation, tmp_path):
    table = tmp_path / "labels.csv"
    with table.open("w", newline="") as f:
        writer = csv.writer(f)
        writer.writerow(["path", "label"])
        for p in sorted(digits_folders["test"].rglob("*.png")):
            rel = p.relative_to(digits_folders["test"]).as_posix()
            writer.writerow([rel, 0 if rel.startswith("normal/") else 1])
    by_csv = oddling.evaluate(digits_folders["test"], digits_bank, labels_csv=table,
                              options=oddling.RunOptions(progress=False))
    assert by_csv.metrics["auroc"] == evaluation.metrics["auroc"]


def test_unreadable_files_are_listed_not_counted(digits_folders, digits_bank, tmp_path):
    import shutil

    test = tmp_path / "test"
    shutil.copytree(digits_folders["test"], test)
    (test / "normal" / "broken.png").write_bytes(b"")
    result = CliRunner().invoke(main, ["evaluate", str(test), "--bank", str(digits_bank.path),
                                       "--out-dir", str(tmp_path / "out"), "--json", "-q"])
    assert result.exit_code == 0, result.output
    metrics = json.loads(result.stdout)
    assert metrics["n_normal"] == 50
    assert metrics["unreadable"] == [{"path": "normal/broken.png", "status": "unreadable: empty file (0 bytes)"}]


def test_evaluate_refuses_to_overwrite_results(digits_folders, digits_bank, tmp_path):
    args = ["evaluate", str(digits_folders["test"]), "--bank", str(digits_bank.path),
            "--out-dir", str(tmp_path / "out"), "-q"]
    assert CliRunner().invoke(main, args).exit_code == 0
    again = CliRunner().invoke(main, args)
    assert again.exit_code == 2 and "--force" in again.stderr


def test_only_one_class_is_a_clear_error(digits_folders, digits_bank):
    with pytest.raises(oddling.OddlingError, match="both classes"):
        oddling.evaluate(digits_folders["test"], digits_bank, normal_labels=("normal", *[f"digit{d}" for d in range(10)]),
                         options=oddling.RunOptions(progress=False))


def _copy_set(digits_folders, root, copies):
    """normal/: `copies` copies of one held-out zero plus 4 other zeros; digit3/: `copies` copies of
    one three plus 4 other threes (scikit-learn's digits, as the fixtures write them)."""
    import shutil

    test = digits_folders["test"]
    for name in ("normal", "digit3"):
        (root / name).mkdir(parents=True)
        files = sorted((test / name).glob("*.png"))[:5]
        for i in range(copies):
            shutil.copy(files[0], root / name / f"copy{i:03d}.png")
        for f in files[1:]:
            shutil.copy(f, root / name / f.name)
    return root


def test_copies_count_once_in_the_interval(digits_folders, digits_bank, tmp_path):
    opts = oddling.RunOptions(progress=False)
    copied = oddling.evaluate(_copy_set(digits_folders, tmp_path / "copies", 30), digits_bank, options=opts).metrics
    once = oddling.evaluate(_copy_set(digits_folders, tmp_path / "once", 1), digits_bank, options=opts).metrics
    assert (copied["n_normal"], copied["n_anomalous"]) == (34, 34)
    assert (copied["n_distinct_normal"], copied["n_distinct_anomalous"], copied["n_duplicate_files"]) == (5, 5, 58)
    assert once["n_duplicate_files"] == 0
    # 30 copies of a file say no more about the detector than one: the same interval
    assert copied["auroc_ci95"] == pytest.approx(once["auroc_ci95"], abs=1e-6)
    assert copied["auroc_distinct"] == once["auroc"]
    assert any("58 of 68 labelled files repeat the content" in n for n in copied["notes"])


def test_two_contents_in_many_copies_are_two_images(digits_folders, digits_bank, tmp_path):
    import shutil

    from oddling.evaluation.metrics import newcombe_ci

    test = tmp_path / "test"
    for name in ("normal", "digit3"):
        (test / name).mkdir(parents=True)
        source = sorted((digits_folders["test"] / name).glob("*.png"))[0]
        for i in range(40):
            shutil.copy(source, test / name / f"c{i:02d}.png")
    result = CliRunner().invoke(main, ["evaluate", str(test), "--bank", str(digits_bank.path),
                                       "--out-dir", str(tmp_path / "out"), "--json", "-q"])
    assert result.exit_code == 0, result.output
    m = json.loads(result.stdout)
    assert (m["n_normal"], m["n_distinct_normal"], m["n_distinct_anomalous"]) == (40, 1, 1)
    # the interval of one image against one (checked against its quartic in test_metrics.py)
    expected = newcombe_ci(m["auroc_distinct"], 1, 1)
    assert m["auroc_ci95"] == pytest.approx(expected, abs=1e-6) and m["auroc_ci95"][0] < 0.3
    assert "78 of 80 labelled files repeat the content of another file" in result.stderr
    assert "distinct contents" in m["auroc_ci_method"]


def test_nothing_flagged_at_the_cutoff_gives_precision_null_with_a_note(digits_folders, digits_bank, tmp_path):
    import shutil

    # reference images scored against the bank that holds them: each is its own nearest neighbour,
    # so its score is below its leave-one-out calibration score and nothing passes the cutoff
    refs = sorted(digits_folders["reference"].glob("*.png"))
    test = tmp_path / "test"
    for name, files in (("normal", refs[:5]), ("odd", refs[5:10])):
        (test / name).mkdir(parents=True)
        for f in files:
            shutil.copy(f, test / name / f.name)
    assert digits_bank.threshold().can_flag
    result = CliRunner().invoke(main, ["evaluate", str(test), "--bank", str(digits_bank.path),
                                       "--out-dir", str(tmp_path / "out"), "-q"])
    assert result.exit_code == 0, result.output
    c = json.loads((tmp_path / "out" / "metrics.json").read_text())["at_cutoff"]
    assert (c["tp"], c["fp"], c["precision"], c["recall"]) == (0, 0, None, 0.0)
    assert c["note"].startswith("nothing is flagged at the bank's cutoff") and "undefined (null)" in c["note"]
    assert "At the bank's cutoff: precision n/a, recall 0.000" in result.stderr
    assert c["note"] in result.stderr


def test_a_bank_that_cannot_flag_at_the_rate_says_so(digits_folders, digits_bank, tmp_path):
    # 0.001 needs 999 calibration scores; the bank has 100 (the conformal rule, see detectors/conformal.py)
    result = CliRunner().invoke(main, ["evaluate", str(digits_folders["test"]), "--bank", str(digits_bank.path),
                                       "--out-dir", str(tmp_path / "out"), "--target-fpr", "0.001", "-q"])
    assert result.exit_code == 0, result.output
    m = json.loads((tmp_path / "out" / "metrics.json").read_text())
    c = m["at_cutoff"]
    assert c["cutoff"] is None and c["precision"] is None and c["tp"] + c["fp"] == 0
    support = digits_bank.threshold(0.001).support_text()
    assert c["note"].startswith(f"this bank cannot flag at the rate asked: {support}")
    assert "At the bank's cutoff: precision n/a" in result.stderr and support in result.stderr
    assert c["note"] in m["notes"]


@pytest.mark.filterwarnings("ignore::oddling.OddlingWarning")   # fit warns that 20 references cannot flag at 0.01
def test_a_bank_without_a_cutoff_says_it_cannot_flag_at_its_rate(digits_folders, tmp_path):
    import shutil

    refs = tmp_path / "refs"
    refs.mkdir()
    for f in sorted(digits_folders["reference"].glob("*.png"))[:20]:
        shutil.copy(f, refs / f.name)
    bank = oddling.fit(refs, tmp_path / "small.bank", representation="pixels:16",
                       target_fpr=0.01, allow_no_cutoff=True, options=oddling.RunOptions(progress=False))
    assert not bank.threshold().can_flag
    result = CliRunner().invoke(main, ["evaluate", str(digits_folders["test"]), "--bank", str(bank.path),
                                       "--out-dir", str(tmp_path / "out"), "-q"])
    assert result.exit_code == 0, result.output
    c = json.loads((tmp_path / "out" / "metrics.json").read_text())["at_cutoff"]
    assert c["precision"] is None
    assert c["note"].startswith(f"this bank cannot flag at its rate: {bank.threshold().support_text()}")
    assert "warning: this bank cannot flag at its rate" in result.stderr
    assert "precision n/a" in result.stderr
