"""A new user's first hour: what the commands do when the input is odd, empty or a mistake.

Each test replays one finding of the "first hour of a new user" issue through the command line.
"""
import json
import shutil

import pytest
from click.testing import CliRunner

import oddling
from oddling.cli import main

QUIET = oddling.RunOptions(progress=False)


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture()
def bank_copy(digits_bank, tmp_path):
    target = tmp_path / "copy.bank"
    shutil.copytree(digits_bank.path, target)
    return target


def _audit_json(tmp_path, findings):
    path = tmp_path / "audit.json"
    path.write_text(json.dumps({"findings": [{"path": p, "kind": k, "detail": "planted"} for p, k in findings]}))
    return path


# 1. bank remove: never destructive without saying what goes

def test_remove_with_an_audit_json_needs_kind_or_all(bank_copy, tmp_path):
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(refs[0], "outlier"), (refs[1], "duplicate"), (refs[2], "duplicate")])
    result = run("bank", "remove", bank_copy, audit)
    assert result.exit_code == 2
    assert "--kind" in result.stderr and "--all" in result.stderr and "2 duplicate" in result.stderr
    assert oddling.load_bank(bank_copy).size == len(refs)


def test_remove_dry_run_lists_path_and_kind_and_changes_nothing(bank_copy, tmp_path):
    before = (bank_copy / "bank.json").read_bytes()
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(refs[0], "outlier"), (refs[0], "health"), (refs[1], "duplicate")])
    result = run("bank", "remove", bank_copy, audit, "--kind", "outlier", "--kind", "health", "--dry-run")
    assert result.exit_code == 0, result.output
    assert "Would remove 1 reference:" in result.stderr
    assert f"{refs[0]}  (outlier, health)" in result.stderr and refs[1] not in result.stderr
    assert (bank_copy / "bank.json").read_bytes() == before


def test_remove_lists_first_then_says_removed_1_reference(bank_copy, tmp_path):
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(refs[0], "outlier"), (refs[1], "duplicate")])
    result = run("bank", "remove", bank_copy, audit, "--kind", "outlier")
    assert result.exit_code == 0, result.output
    assert result.stderr.index(refs[0]) < result.stderr.index("Removed 1 reference;")
    assert f"now holds {len(refs) - 1} references." in result.stderr
    assert [r["path"] for r in oddling.load_bank(bank_copy).references] == refs[1:]


def test_remove_that_leaves_too_few_is_refused_and_changes_nothing(bank_copy, tmp_path):
    before = (bank_copy / "bank.json").read_bytes()
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    audit = _audit_json(tmp_path, [(p, "outlier") for p in refs[:-3]])
    result = run("bank", "remove", bank_copy, audit, "--all")
    assert result.exit_code == 2
    assert "Removing 97 references:" in result.stderr            # the list came first
    assert "would leave 3" in result.stderr and "nothing was changed" in result.stderr
    assert "Traceback" not in result.output
    assert (bank_copy / "bank.json").read_bytes() == before


def test_remove_of_a_path_not_in_the_bank_is_an_error_naming_it(bank_copy):
    before = (bank_copy / "bank.json").read_bytes()
    result = run("bank", "remove", bank_copy, "no_such.png")
    assert result.exit_code == 2
    assert "no_such.png" in result.stderr and "nothing was changed" in result.stderr
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    result = run("bank", "remove", bank_copy, refs[0], "typo.png")     # one typo: nothing goes
    assert result.exit_code == 2 and "1 path not in bank" in result.stderr and "typo.png" in result.stderr
    assert (bank_copy / "bank.json").read_bytes() == before


def test_kind_without_an_audit_json_is_an_error(bank_copy):
    refs = [r["path"] for r in oddling.load_bank(bank_copy).references]
    result = run("bank", "remove", bank_copy, refs[0], "--kind", "outlier")
    assert result.exit_code == 2 and "audit JSON" in result.stderr


# 2. output paths: checked before any work, parents created, never a traceback

def _write_history(bank_path, n=3):
    lines = []
    for i in range(n):
        lines.append(json.dumps({"time": f"2024-03-0{i + 1}T01:34:00+00:00", "shift": i == n - 1, "batch": f"b{i}",
                                 "flagged_share": 0.01 * (i + 1), "expected_share": 0.01, "mmd": 0.02 * (i + 1),
                                 "mmd_p_value": 0.5 / (i + 1)}))
    (bank_path / "drift_history.jsonl").write_text("\n".join(lines) + "\n")


def test_drift_plot_into_a_new_folder_creates_it(bank_copy, tmp_path):
    _write_history(bank_copy)
    target = tmp_path / "new" / "deeper" / "x.png"
    result = run("drift", "--history", bank_copy, "--plot", target)
    assert result.exit_code == 0, result.output
    assert target.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert str(target) in result.stderr


def test_drift_plot_needs_a_png_name(bank_copy, tmp_path):
    _write_history(bank_copy)
    result = run("drift", "--history", bank_copy, "--plot", tmp_path / "d.txt")
    assert result.exit_code == 2 and ".png" in result.stderr and "Traceback" not in result.output
    assert not (tmp_path / "d.txt").exists()


def test_drift_plot_into_an_existing_folder_is_refused_with_a_file_to_use(bank_copy, tmp_path):
    _write_history(bank_copy)
    (tmp_path / "plots").mkdir()
    result = run("drift", "--history", bank_copy, "--plot", f"{tmp_path / 'plots'}/")
    assert result.exit_code == 2
    assert "is a folder" in result.stderr and str(tmp_path / "plots" / "drift_history.png") in result.stderr


def test_plot_without_history_is_a_usage_error(bank_copy, tmp_path):
    result = run("drift", tmp_path, "--bank", bank_copy, "--plot", tmp_path / "x.png")
    assert result.exit_code == 2 and "--history" in result.output


def test_score_out_checks_share_the_helper(digits_bank, tmp_path):
    (tmp_path / "out").mkdir()
    result = run("score", tmp_path, "--bank", digits_bank.path, "--out", tmp_path / "out", "-q")
    assert result.exit_code == 2 and str(tmp_path / "out" / "scores.csv") in result.stderr
    (tmp_path / "file").write_text("x")
    result = run("report", tmp_path, "--bank", digits_bank.path, "--out", tmp_path / "file" / "r.html", "-q")
    assert result.exit_code == 2 and "is a file, not a folder" in result.stderr


def test_check_output_rules(tmp_path):
    from oddling.files import check_output

    assert check_output(None, force=False) is None
    assert check_output(tmp_path / "a" / "b.png", force=False, suffix=".png") == tmp_path / "a" / "b.png"
    (tmp_path / "c.png").write_bytes(b"x")
    with pytest.raises(oddling.OddlingError, match="already exists; pass --force"):
        check_output(tmp_path / "c.png", force=False, suffix=".png")
    assert check_output(tmp_path / "c.png", force=True, suffix=".PNG".lower()) == tmp_path / "c.png"
    with pytest.raises(oddling.OddlingError, match="ending in .png"):
        check_output(tmp_path / "c", force=True, suffix=".png")


# 4. nothing to do is an error, unless a pipeline asks for --allow-empty

@pytest.fixture()
def texts(tmp_path):
    folder = tmp_path / "texts"
    folder.mkdir()
    for name in ("a.txt", "b.txt"):
        (folder / name).write_text("not an image")
    (folder / "empty.png").write_bytes(b"")
    return folder


def test_score_without_images_is_an_error_saying_what_was_there(digits_bank, texts, tmp_path):
    out = tmp_path / "s.csv"
    result = run("score", texts, "--bank", digits_bank.path, "--out", out, "-q")
    assert result.exit_code == 2
    assert f"no images found in {texts} (3 files skipped: " in result.stderr
    assert '2 "skipped: not an image file type (.txt)"' in result.stderr
    assert '1 "unreadable: empty file (0 bytes)"' in result.stderr
    assert not out.exists()
    (tmp_path / "empty").mkdir()
    (tmp_path / "empty" / ".hidden.png").write_bytes(b"x")
    result = run("score", tmp_path / "empty", "--bank", digits_bank.path, "--out", out, "-q")
    assert result.exit_code == 2 and "(no files; left out: 1 hidden)" in result.stderr


def test_allow_empty_writes_the_header_and_the_skipped_rows(digits_bank, texts, tmp_path):
    out = tmp_path / "s.csv"
    result = run("score", texts, "--bank", digits_bank.path, "--out", out, "-q", "--allow-empty")
    assert result.exit_code == 0, result.output
    lines = out.read_text().splitlines()
    assert lines[0].startswith("path,score,p_value,flagged")
    assert sorted(line.split(",")[0] for line in lines[1:]) == ["a.txt", "b.txt", "empty.png"]
    assert "Scored 0 of 3 files" in result.stderr


def test_report_without_images_writes_no_page(digits_bank, texts, tmp_path):
    result = run("report", texts, "--bank", digits_bank.path, "--out", tmp_path / "r.html", "-q")
    assert result.exit_code == 2 and "no images found" in result.stderr
    assert not (tmp_path / "r.html").exists()


def test_bank_add_uses_the_same_status_words(bank_copy, texts, digits_folders):
    before = (bank_copy / "bank.json").read_bytes()
    result = run("bank", "add", bank_copy, texts, "-q")
    assert result.exit_code == 2 and "no images found" in result.stderr and "nothing was added" in result.stderr
    assert '"skipped: not an image file type (.txt)"' in result.stderr
    assert (bank_copy / "bank.json").read_bytes() == before
    shutil.copy(next(digits_folders["incoming"].glob("*.png")), texts / "new.png")
    result = run("bank", "add", bank_copy, texts, "-q")
    assert result.exit_code == 0, result.output
    assert "Added 1 reference (0 already in the bank)" in result.stderr
    assert "3 files unreadable or skipped:" in result.stderr
    assert "a.txt: skipped: not an image file type (.txt)" in result.stderr
    assert "empty.png: unreadable: empty file (0 bytes)" in result.stderr


# 5. labels: what a labels CSV or the class folders leave out is said on stderr

@pytest.fixture()
def flat_test(digits_folders, tmp_path):
    folder = tmp_path / "flat"
    folder.mkdir()
    rows = ["path,label"]
    for p in sorted((digits_folders["test"] / "normal").glob("*.png"))[:10]:
        shutil.copy(p, folder / p.name)
        rows.append(f"{p.name},normal")
    for p in sorted((digits_folders["test"] / "digit7").glob("*.png")):
        shutil.copy(p, folder / f"seven_{p.name}")
        rows.append(f"seven_{p.name},anomaly")
    shutil.copy(p, folder / "extra.png")          # a file with no row
    rows.append("ghost.png,anomaly")              # a row with no file
    labels = tmp_path / "labels.csv"
    labels.write_text("\n".join(rows) + "\n")
    return folder, labels


def test_evaluate_says_which_labels_and_files_were_left_out(digits_bank, flat_test, tmp_path):
    folder, labels = flat_test
    result = run("evaluate", folder, "--bank", digits_bank.path, "--labels", labels, "--out-dir", tmp_path / "e", "-q")
    assert result.exit_code == 0, result.output
    assert "warning: 1 file labelled in the CSV but not found in the test folder: ghost.png" in result.stderr
    assert "warning: 1 file found in the test folder but not in the labels CSV (not counted): extra.png" in result.stderr
    metrics = json.loads((tmp_path / "e" / "metrics.json").read_text())
    assert metrics["labels_without_file"] == ["ghost.png"] and metrics["unlabelled"] == ["extra.png"]
    assert metrics["n_normal"] == 10 and metrics["n_anomalous"] == 8


def test_evaluate_names_top_level_files_without_a_class_folder(digits_bank, digits_folders, tmp_path):
    folder = tmp_path / "test"
    shutil.copytree(digits_folders["test"], folder)
    shutil.copy(next((folder / "normal").glob("*.png")), folder / "stray.png")
    result = oddling.evaluate(folder, digits_bank, options=QUIET)
    assert len(result.notes) == 1 and "stray.png" in result.notes[0] and "no label" in result.notes[0]


def test_labels_that_match_nothing_say_why_in_the_error(digits_bank, flat_test, tmp_path):
    folder, _ = flat_test
    wrong = tmp_path / "wrong.csv"
    wrong.write_text("path,label\n" + "".join(f"flat/{p.name},normal\n" for p in sorted(folder.glob("*.png"))))
    result = run("evaluate", folder, "--bank", digits_bank.path, "--labels", wrong, "--out-dir", tmp_path / "e", "-q")
    assert result.exit_code == 2
    assert "both classes" in result.stderr and "not found in the test folder: flat/" in result.stderr


# 6. messages: what the CLI says is true and in CLI words

def test_no_user_message_speaks_python_force_true():
    """Error and warning texts are read on the command line: "pass --force", never "force=True"."""
    import ast
    from pathlib import Path

    src = Path(oddling.__file__).parent
    offenders = []
    for path in sorted(src.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if not isinstance(node, ast.Call):
                continue
            name = getattr(node.func, "id", None) or getattr(node.func, "attr", "")
            if name not in ("OddlingError", "warn", "UsageError", "echo"):
                continue
            texts = [n.value for arg in node.args for n in ast.walk(arg)
                     if isinstance(n, ast.Constant) and isinstance(n.value, str)]
            if any("force=True" in t for t in texts):
                offenders.append(f"{path.relative_to(src)}:{node.lineno}")
    assert offenders == []


@pytest.mark.parametrize("command", ["fit", "score", "report"])
def test_readme_names_every_option_of_the_command(command):
    """README's section of the command (or the shared options table) names each of its options."""
    import re
    from pathlib import Path

    readme = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    shared = readme[readme.index("Options shared by"):readme.index("Embeddings are cached")]
    section = re.search(rf"### `oddling {command} .*?(?=\n### )", readme, re.S).group(0)
    options = [o for p in main.commands[command].params for o in getattr(p, "opts", []) if o.startswith("--")]
    assert [o for o in options if o not in section and o not in shared] == []


def test_fit_json_prints_a_summary_on_stdout(digits_folders, tmp_path):
    refs = tmp_path / "refs"
    refs.mkdir()
    for p in sorted(digits_folders["reference"].glob("*.png"))[:20]:
        shutil.copy(p, refs / p.name)
    result = run("fit", refs, "--bank", tmp_path / "b", "--json", "-q", "--target-fpr", "0.1")
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    assert summary["n_references"] == 20 and summary["n_skipped"] == 0
    assert summary["detector"]["name"] == "knn"


# 7. the drift plot: a legend that covers nothing, dates that read as dates

def _entries(n=6):
    return [{"time": f"2024-03-02T0{i}:34:00+00:00", "shift": i % 2 == 1, "flagged_share": 0.9 - 0.1 * i,
             "expected_share": 0.01, "mmd": 0.3 - 0.02 * i} for i in range(n)]


def test_drift_plot_uses_concise_dates_and_keeps_the_legend_off_the_markers(tmp_path):
    import matplotlib.dates as mdates

    from oddling.reporting.plots import drift_history_figure, plot_drift_history

    entries = _entries()
    fig = drift_history_figure(entries, 0.01)
    fig.canvas.draw()
    for ax in fig.axes:
        assert isinstance(ax.xaxis.get_major_formatter(), mdates.ConciseDateFormatter)
        legend = ax.get_legend().get_window_extent()
        for collection in ax.collections:          # the shift markers
            for x, y in ax.transData.transform(collection.get_offsets()):
                assert not legend.contains(x, y)
        assert not legend.overlaps(ax.get_window_extent())   # outside the axes altogether
    # the first markers of the top panel sit in its upper left, where the legend used to be
    assert fig.axes[0].collections[0].get_offsets().shape[0] == 3
    out = plot_drift_history(entries, 0.01, tmp_path / "new" / "drift.png")
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# 3. a cache folder that cannot be written: an existing export is read, else PyTorch with a warning

@pytest.fixture()
def unusable_cache(tmp_path):
    """A cache folder below a regular file: nobody can create it, root included (as with /proc/x)."""
    (tmp_path / "a_file").write_text("x")
    return tmp_path / "a_file" / "cache"


@pytest.mark.parametrize("no_cache", [False, True])
def test_score_with_an_unusable_cache_folder_falls_back_with_a_warning(digits_bank, digits_folders, unusable_cache,
                                                                       tmp_path, no_cache):
    pytest.importorskip("onnxruntime")
    out = tmp_path / "s.csv"
    result = run("score", digits_folders["incoming"], "--bank", digits_bank.path, "--out", out, "-q",
                 "--cache-dir", unusable_cache, *(["--no-cache"] if no_cache else []))
    assert result.exit_code == 0, result.output
    assert "warning: cannot write the ONNX export into" in result.stderr
    assert "running with PyTorch instead" in result.stderr and "--cache-dir with a writable folder" in result.stderr
    assert ("embedding cache" in result.stderr) is not no_cache
    n = len(list(digits_folders["incoming"].iterdir()))
    assert f"Scored {n} of {n} files" in result.stderr


def test_runtime_onnx_with_an_unusable_cache_folder_is_a_clear_error(digits_bank, digits_folders, unusable_cache,
                                                                     tmp_path):
    pytest.importorskip("onnxruntime")
    result = run("score", digits_folders["incoming"], "--bank", digits_bank.path, "--out", tmp_path / "s.csv",
                 "-q", "--no-cache", "--cache-dir", unusable_cache, "--runtime", "onnx")
    assert result.exit_code == 2
    assert "runtime 'onnx': cannot write the ONNX export" in result.stderr and "--runtime torch" in result.stderr


def test_an_existing_verified_export_is_only_read(private_cache, digits_bank, tmp_path, monkeypatch):
    pytest.importorskip("onnxruntime")
    from oddling.backbones import load_backbone, onnx_runtime

    shutil.copytree(private_cache / "onnx", tmp_path / "cache" / "onnx")   # the fit of digits_bank exported it
    assert list((tmp_path / "cache" / "onnx").glob("*.verified.json"))

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")   # what a read-only folder answers

    monkeypatch.setattr(onnx_runtime, "export", refuse)
    assert load_backbone("efficientnet-lite0", tmp_path / "cache", runtime="auto").runtime in ("onnx", "openvino")
    with pytest.warns(oddling.OddlingWarning, match="Permission denied.*PyTorch instead"):
        net = load_backbone("efficientnet-lite0", tmp_path / "empty_cache", runtime="auto")
    assert net.runtime == "torch"


def test_a_verification_that_cannot_be_recorded_still_counts(private_cache, tmp_path, capsys):
    pytest.importorskip("onnxruntime")
    import numpy as np

    from oddling.backbones import load_backbone

    net = load_backbone("efficientnet-lite0", tmp_path / "cache", runtime="onnx")
    net.onnx.verified, net.onnx.verified_file = False, tmp_path / "a_file_that_is" / "missing" / "x.verified.json"
    batch = np.random.default_rng(0).normal(size=(2, 3, 224, 224)).astype(np.float32)
    net.embed(batch)
    assert net.onnx.verified and "not recorded" in capsys.readouterr().err


# 8. the encoding trap: references and batch from different pipelines

def test_bank_records_formats_and_score_warns_about_another_encoding(digits_bank, digits_folders, tmp_path):
    from PIL import Image

    meta = json.loads((digits_bank.path / "bank.json").read_text())
    assert meta["formats"] == {"PNG": 100} and digits_bank.formats == {"PNG": 100}
    assert {r["format"] for r in meta["references"]} == {"PNG"}
    jpegs = tmp_path / "jpegs"
    jpegs.mkdir()
    for p in sorted(digits_folders["incoming"].glob("*.png"))[:12]:
        Image.open(p).convert("RGB").save(jpegs / f"{p.stem}.jpg", quality=90)
    result = run("score", jpegs, "--bank", digits_bank.path, "--out", tmp_path / "s.csv", "-q")
    assert result.exit_code == 0, result.output
    assert ("warning: references are PNG; 12 of 12 scored images are JPEG: fit on images from the same pipeline"
            in result.stderr)
    result = run("score", digits_folders["incoming"], "--bank", digits_bank.path, "--out", tmp_path / "t.csv", "-q")
    assert "same pipeline" not in result.stderr                   # same encoding: nothing to say


def test_banks_without_formats_still_load_and_do_not_warn(digits_bank, digits_folders, tmp_path, recwarn):
    copy = tmp_path / "old.bank"
    shutil.copytree(digits_bank.path, copy)
    meta = json.loads((copy / "bank.json").read_text())
    del meta["formats"]
    for ref in meta["references"]:
        ref.pop("format")
    (copy / "bank.json").write_text(json.dumps(meta))
    bank = oddling.load_bank(copy)
    assert bank.formats == {}
    from oddling.jobs.scoring import warn_about_encoding

    warn_about_encoding(bank, digits_folders["incoming"], [])
    assert not [w for w in recwarn if "pipeline" in str(w.message)]


def test_adding_a_jpeg_updates_the_formats(bank_copy, digits_folders, tmp_path):
    from PIL import Image

    extra = tmp_path / "extra"
    extra.mkdir()
    source = next(digits_folders["incoming"].glob("*.png"))
    Image.open(source).convert("RGB").save(extra / "new.jpg", quality=80)
    oddling.bank_add(bank_copy, extra, options=QUIET)
    formats = oddling.load_bank(bank_copy).formats
    assert formats["PNG"] == 100 and formats["JPEG"] == 1 and formats["jpeg_quality"]["median"] in (79, 80, 81)
    oddling.bank_remove(bank_copy, [r["path"] for r in oddling.load_bank(bank_copy).references if r["path"].endswith(".jpg")])
    assert oddling.load_bank(bank_copy).formats == {"PNG": 100}


@pytest.mark.parametrize("quality", [20, 50, 75, 90, 95])
def test_jpeg_quality_estimate_from_pillows_own_encoder(tmp_path, quality):
    """Pillow encodes with libjpeg's scaled standard tables: the estimate gives back the quality asked for."""
    import numpy as np
    from PIL import Image

    from oddling.data.encoding import image_format

    path = tmp_path / "x.jpg"
    Image.fromarray((np.random.default_rng(0).random((32, 32, 3)) * 255).astype("uint8")).save(path, quality=quality)
    fmt, estimate = image_format(path)
    assert fmt == "JPEG" and abs(estimate - quality) <= 1


def test_warn_if_other_encoding_rules():
    import warnings

    from oddling.data.encoding import warn_if_other_encoding

    with pytest.warns(oddling.OddlingWarning, match="references are JPEG of quality about 95; the scored JPEGs about 50"):
        warn_if_other_encoding({"JPEG": 40, "jpeg_quality": {"median": 95}}, {"JPEG": 5, "jpeg_quality": {"median": 50}})
    with pytest.warns(oddling.OddlingWarning, match=r"references are PNG \(30\) and JPEG \(10\); 1 of 3 scored images is WEBP"):
        warn_if_other_encoding({"PNG": 30, "JPEG": 10}, {"PNG": 2, "WEBP": 1})
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warn_if_other_encoding({"JPEG": 40, "jpeg_quality": {"median": 90}}, {"JPEG": 5, "jpeg_quality": {"median": 85}})
        warn_if_other_encoding({}, {"JPEG": 5})
