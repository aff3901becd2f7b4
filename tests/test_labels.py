"""Labels CSV: only the documented words (README: label `normal`/`anomaly` or `0`/`1`; `anomalous`
as written in scores.csv), and what a table and a folder leave out. Class folders: a normal label
matches in any case; two folders differing only in case are an error. Label 1 = anomalous."""
import json

import pytest
from click.testing import CliRunner

from oddling.data.labels import (class_folders, describe_label_summary, label_from_folder, label_summary,
                                 read_labels_csv)
from oddling.errors import OddlingError


def write(tmp_path, text, name="labels.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_documented_words_any_case_and_trimmed(tmp_path):
    path = write(tmp_path, "path,label,kind\n"
                           "a.png,normal,\n"
                           "b.png, ANOMALY ,scratch\n"
                           "c.png,Anomalous,\n"
                           "d.png,0,\n"
                           "sub/e.png,1,dent\n")
    # the documented vocabulary (README, `oddling evaluate --labels`)
    assert read_labels_csv(path) == {"a.png": (0, "normal"), "b.png": (1, "scratch"), "c.png": (1, "anomalous"),
                                     "d.png": (0, "normal"), "sub/e.png": (1, "dent")}


def test_utf8_bom_and_dot_slash_paths(tmp_path):
    path = tmp_path / "labels.csv"
    path.write_bytes("\ufeffpath,label\n./x/a.png,1\n".encode("utf-8"))   # Excel's "CSV UTF-8" starts with a BOM
    assert read_labels_csv(path) == {"x/a.png": (1, "anomalous")}


@pytest.mark.parametrize("word", ["bad", "defect", "ok", "good", "2", "yes", "", "normal?"])
def test_an_unknown_label_is_an_error_not_an_anomaly(tmp_path, word):
    path = write(tmp_path, f"path,label\na.png,normal\nb.png,{word}\n")
    with pytest.raises(OddlingError, match=r"line 3: b\.png: unknown label") as info:
        read_labels_csv(path)
    assert "normal/anomaly/anomalous or 0/1" in str(info.value)


def test_the_error_names_the_first_rows_with_line_numbers_and_counts_the_rest(tmp_path):
    rows = "".join(f"f{i}.png,bad\n" for i in range(8))
    path = write(tmp_path, "path,label\nok.png,normal\n\n" + rows)   # a blank line: line numbers stay true
    with pytest.raises(OddlingError) as info:
        read_labels_csv(path)
    message = str(info.value)
    assert message.startswith(f"{path}: 8 rows with a bad path or label")
    assert "line 4: f0.png: unknown label 'bad'" in message and "line 8: f4.png" in message
    assert "f5.png" not in message and "and 3 more" in message


def test_empty_path_and_conflicting_duplicate_are_named(tmp_path):
    path = write(tmp_path, "path,label\n,normal\na.png,normal\na.png,1\na.png,normal\n")
    with pytest.raises(OddlingError) as info:
        read_labels_csv(path)
    assert "line 2: empty path" in str(info.value)
    assert "line 4: a.png: labelled again, differently from line 3" in str(info.value)


def test_a_repeated_identical_row_is_fine(tmp_path):
    assert read_labels_csv(write(tmp_path, "path,label\na.png,1\na.png,1\n")) == {"a.png": (1, "anomalous")}


def test_header_must_name_path_and_label(tmp_path):
    with pytest.raises(OddlingError, match="columns path,label"):
        read_labels_csv(write(tmp_path, "file,class\na.png,normal\n"))


def test_missing_file_is_an_oddling_error(tmp_path):
    with pytest.raises(OddlingError, match="cannot read labels file"):
        read_labels_csv(tmp_path / "nope.csv")


def test_not_utf8_is_an_oddling_error(tmp_path):
    path = tmp_path / "labels.csv"
    path.write_bytes(b"path,label\n\xff\xfe.png,normal\n")
    with pytest.raises(OddlingError, match="not a readable UTF-8 CSV"):
        read_labels_csv(path)


def test_label_summary_lists_rows_without_files_and_files_without_rows():
    summary = label_summary(["a.png", "gone.png", "x/b.png"], ["a.png", "x/b.png", "new.png", "x/c.png"])
    assert summary == {"missing_files": ["gone.png"], "unlabelled": ["new.png", "x/c.png"], "n_labelled": 2}
    lines = describe_label_summary(summary)
    assert lines == ["1 file labelled in the CSV but not found in the test folder: gone.png",
                     "2 files found in the test folder but not in the labels CSV (not counted): new.png, x/c.png"]


def test_label_summary_of_a_complete_table_says_nothing():
    summary = label_summary(["a.png"], ["a.png"])
    assert summary == {"missing_files": [], "unlabelled": [], "n_labelled": 1}
    assert describe_label_summary(summary) == []


def test_describe_label_summary_shortens_long_lists():
    lines = describe_label_summary(label_summary([], [f"f{i:02d}.png" for i in range(12)]), limit=3)
    assert lines == ["12 files found in the test folder but not in the labels CSV (not counted): "
                     "f00.png, f01.png, f02.png, and 9 more"]


def test_label_from_folder():
    assert label_from_folder("normal/a.png", ("normal",)) == (0, "normal")
    assert label_from_folder("scratch/a.png", ("normal",)) == (1, "scratch")
    assert label_from_folder("a.png", ("normal",)) is None


def test_a_normal_label_matches_a_folder_in_any_case():
    for folder in ("normal", "Normal", "NORMAL"):
        assert label_from_folder(f"{folder}/a.png", ("normal",)) == (0, "normal")
    assert label_from_folder("Crack/a.png", ("normal",)) == (1, "Crack")


def test_a_folder_taken_as_normal_by_ignoring_case_gets_one_note():
    normal, notes = class_folders(["Normal/a.png", "Normal/b.png", "crack/c.png", "top.png"], ("normal",))
    assert normal == ["Normal"]
    assert notes == ["folder Normal/ taken as normal (--normal-label normal, compared ignoring case)"]
    assert class_folders(["normal/a.png", "crack/c.png"], ("normal",)) == (["normal"], [])


@pytest.mark.parametrize("first, second", [("normal", "Normal"), ("crack", "Crack"), ("NORMAL", "normal")])
def test_class_folders_differing_only_in_case_are_an_error_naming_both(first, second):
    with pytest.raises(OddlingError, match="differ only in case") as info:
        class_folders([f"{first}/a.png", f"{second}/b.png", "other/c.png"], ("normal",), where="test")
    assert f"{first}/" in str(info.value) and f"{second}/" in str(info.value)
    assert str(info.value).startswith("test has class folders")


def _case_sensitive(folder) -> bool:
    (folder / "probe").mkdir()
    sensitive = not (folder / "PROBE").exists()
    (folder / "probe").rmdir()
    return sensitive


def _digit_folders(root, folders, per_folder=3):
    """A few of scikit-learn's bundled digits as PNGs in the given class folders (zeros in normal ones)."""
    from sklearn.datasets import load_digits

    from conftest import write_digit

    digits = load_digits()
    for j, (name, digit) in enumerate(folders.items()):
        (root / name).mkdir(parents=True)
        for i in [k for k, t in enumerate(digits.target) if t == digit][j * per_folder:(j + 1) * per_folder]:
            write_digit(digits.images[i], root / name / f"d{i:04d}.png")
    return root


def test_evaluate_takes_Normal_as_normal_and_says_so(digits_bank, tmp_path):
    from oddling.cli import main

    test = _digit_folders(tmp_path / "test", {"Normal": 0, "crack": 3})
    result = CliRunner().invoke(main, ["evaluate", str(test), "--bank", str(digits_bank.path),
                                       "--out-dir", str(tmp_path / "out"), "-q"])
    assert result.exit_code == 0, result.output
    note = "folder Normal/ taken as normal (--normal-label normal, compared ignoring case)"
    assert result.stderr.count(note) == 1
    metrics = json.loads((tmp_path / "out" / "metrics.json").read_text())
    assert (metrics["n_normal"], metrics["n_anomalous"]) == (3, 3)
    assert metrics["normal_folders"] == ["Normal"] and note in metrics["notes"]


def test_evaluate_refuses_class_folders_that_differ_only_in_case(digits_bank, tmp_path):
    from oddling.cli import main

    if not _case_sensitive(tmp_path):
        pytest.skip("this file system does not keep normal/ and Normal/ apart")
    test = _digit_folders(tmp_path / "test", {"normal": 0, "Normal": 0, "crack": 3}, per_folder=2)
    result = CliRunner().invoke(main, ["evaluate", str(test), "--bank", str(digits_bank.path),
                                       "--out-dir", str(tmp_path / "out"), "-q"])
    assert result.exit_code == 2 and "Traceback" not in result.output
    assert "differ only in case: Normal/ and normal/" in result.stderr


def test_tune_refuses_class_folders_that_differ_only_in_case_before_any_work(tmp_path):
    import oddling

    if not _case_sensitive(tmp_path):
        pytest.skip("this file system does not keep crack/ and Crack/ apart")
    test = _digit_folders(tmp_path / "test", {"normal": 0, "crack": 3, "Crack": 4}, per_folder=2)
    (tmp_path / "reference").mkdir()
    with pytest.raises(OddlingError, match=r"differ only in case: Crack/ and crack/"):
        oddling.tune(test, tmp_path / "reference", tmp_path / "b", grid=[("pixels:16", "knn", {"k": 1})],
                     options=oddling.RunOptions(progress=False))
    assert not (tmp_path / "b").exists()
