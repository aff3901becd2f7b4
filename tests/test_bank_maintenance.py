"""Keeping the bank honest: audit, add/remove, drift, on scikit-learn's bundled digits."""
import csv
import json
import shutil

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

import oddling
from oddling.cli import main

QUIET = oddling.RunOptions(progress=False)


@pytest.fixture()
def bank_copy(digits_bank, tmp_path):
    target = tmp_path / "copy.bank"
    shutil.copytree(digits_bank.path, target)
    return target


def test_audit_finds_planted_duplicates_near_duplicate_and_foreign_image(digits_folders, tmp_path):
    skimage_data = pytest.importorskip("skimage.data")
    refs = tmp_path / "refs"
    shutil.copytree(digits_folders["reference"], refs)
    originals = sorted(refs.glob("*.png"))
    shutil.copy(originals[0], refs / "copy_of_first.png")                      # exact duplicate
    Image.open(originals[1]).convert("RGB").save(refs / "resized_second.jpg", quality=90)  # near duplicate: re-encoded
    Image.fromarray(skimage_data.astronaut()).resize((64, 64)).save(refs / "astronaut.png")  # foreign
    bank = oddling.fit(refs, tmp_path / "b", options=QUIET)
    result = CliRunner().invoke(main, ["audit", "--bank", str(tmp_path / "b"), "--json"])
    assert result.exit_code == 0, result.output
    kinds = {(f["path"], f["kind"]) for f in json.loads(result.stdout)["findings"]}
    assert ("copy_of_first.png", "duplicate") in kinds or (originals[0].name, "duplicate") in kinds
    assert ("astronaut.png", "outlier") in kinds
    assert any(kind == "near_duplicate" and "resized_second.jpg" in path + json.dumps(result.stdout)
               for path, kind in kinds)
    assert bank.size == len(originals) + 3


def test_add_then_remove_gives_back_the_original_bank(digits_folders, bank_copy, tmp_path):
    original = oddling.load_bank(bank_copy)
    extra = tmp_path / "extra"
    extra.mkdir()
    for p in sorted(digits_folders["incoming"].glob("*.png"))[:5]:
        shutil.copy(p, extra / f"new_{p.name}")
    added = oddling.bank_add(bank_copy, extra, options=QUIET)
    assert added["added"] == 5 and oddling.load_bank(bank_copy).size == original.size + 5
    new_paths = [r["path"] for r in oddling.load_bank(bank_copy).references[original.size:]]
    oddling.bank_remove(bank_copy, new_paths)
    back = oddling.load_bank(bank_copy)
    assert back.references == original.references
    np.testing.assert_array_equal(back.features, original.features)
    np.testing.assert_allclose(back.calibration_scores, original.calibration_scores)
    assert back.calibration == original.calibration


def test_add_from_decisions_csv_takes_only_normal_marks_and_embeds_only_new(digits_folders, bank_copy,
                                                                            tmp_path, monkeypatch):
    from oddling.backbones import Backbone

    files = sorted(digits_folders["incoming"].glob("*.png"))[:4]
    decisions = tmp_path / "decisions.csv"
    with decisions.open("w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["path", "decision"])
        w.writerows([[files[0].name, "normal"], [files[1].name, "anomalous"], [files[2].name, "unsure"],
                     [files[3].name, "normal"]])
    embedded = []
    original_embed = Backbone.embed
    monkeypatch.setattr(Backbone, "embed", lambda self, b: embedded.append(len(b)) or original_embed(self, b))
    result = CliRunner().invoke(main, ["bank", "add", str(bank_copy), str(decisions),
                                       "--root", str(digits_folders["incoming"]), "-q", "--no-cache"])
    assert result.exit_code == 0, result.output
    assert sum(embedded) == 2                   # the two marked normal; nothing of the bank re-embedded
    assert oddling.load_bank(bank_copy).size == 102


def test_drift_no_shift_for_held_out_normals_and_shift_for_other_digits(digits_folders, bank_copy, tmp_path):
    same = oddling.drift(digits_folders["test"] / "normal", bank_copy, options=QUIET)
    other = tmp_path / "others"
    other.mkdir()
    for folder in sorted(digits_folders["test"].glob("digit*")):
        for p in folder.glob("*.png"):
            shutil.copy(p, other / f"{folder.name}_{p.name}")
    shifted = oddling.drift(other, bank_copy, options=QUIET)
    print(f"\n[drift] held-out zeros: MMD p {same['mmd_p_value']}, other digits: MMD p {shifted['mmd_p_value']}")
    assert same["shift"] is False and shifted["shift"] is True
    history = oddling.drift_history(bank_copy)
    assert [h["shift"] for h in history] == [False, True]


def test_drift_history_survives_a_bank_update(digits_folders, bank_copy, tmp_path):
    oddling.drift(digits_folders["test"] / "normal", bank_copy, options=QUIET)
    extra = tmp_path / "extra"
    extra.mkdir()
    shutil.copy(sorted(digits_folders["incoming"].glob("*.png"))[0], extra / "one.png")
    Image.new("L", (64, 64), 255).save(extra / "blank.png")
    oddling.bank_add(bank_copy, extra, options=QUIET)
    assert len(oddling.drift_history(bank_copy)) == 1


def test_fail_on_shift_exit_code(digits_folders, bank_copy):
    result = CliRunner().invoke(main, ["drift", str(digits_folders["test"] / "digit7"), "--bank", str(bank_copy),
                                       "--json", "--fail-on-shift", "-q"])
    assert json.loads(result.stdout)["shift"] is True
    assert result.exit_code == 1


def test_remove_refuses_to_leave_too_few(bank_copy):
    paths = [r["path"] for r in oddling.load_bank(bank_copy).references]
    with pytest.raises(oddling.OddlingError, match="distinct references"):
        oddling.bank_remove(bank_copy, paths[:-3])
