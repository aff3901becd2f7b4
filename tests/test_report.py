"""The review report: valid self-contained HTML with the expected cards, and its filters and
decisions working in a real browser (headless Chromium)."""
from __future__ import annotations

import csv
import os
import io

import html5lib
import numpy as np
import pytest
from browser import (
    ARTIFACTS,
    full_page_screenshot,
    missing_browser,
    severe_console_entries,
    start_chromium,
)
from PIL import Image

from oddling.api import EvaluationResult, ScoreResult
from oddling.bank.store import Bank
from oddling.detectors.knn import KNNDetector
from oddling.errors import OddlingError
from oddling.evaluation.metrics import evaluation_summary
from oddling.reporting.page import CAUTION, plots_folder, write_report
from oddling.reporting.results import ScoreRow, sort_rows

ODD_NAME = 'odd <b>&"name.png'   # must come out as text, never as markup
N_REFS = 6


def _png(path, colour, size=(48, 32)):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.new("RGB", size, colour).save(path)


def _bank(ref_root) -> Bank:
    for i in range(N_REFS):
        _png(ref_root / f"r{i}.png", (40 * i, 120, 200 - 30 * i))
    features = np.eye(N_REFS, 4, dtype=np.float32)
    return Bank(
        representation={"kind": "embedding", "id": "efficientnet-lite0", "backbone": "efficientnet-lite0",
                        "preprocessing": {"crop": 224}, "dim": 4,
                        "backbone_fingerprint": {"id": "efficientnet-lite0", "weights_sha256": "ab" * 32,
                                                 "preprocessing": {"crop": 224}, "embedding_dim": 4}},
        detector=KNNDetector(k=2).load_state({}, {"references": features}),
        references=[{"path": f"r{i}.png", "sha256": f"{i:064d}"} for i in range(N_REFS)],
        features=features,
        calibration_scores=np.linspace(0.1, 0.4, 60),
        calibration={"method": "leave-one-out", "n": 60, "target_fpr": 0.05, "cutoff": 0.37},
        reference_root=str(ref_root), tool_version="0.1.0", created="2026-01-01T00:00:00+00:00",
        path=ref_root.parent / "parts.bank",
    )


# (path, score, label, kind); scores above the cutoff 0.37 are flagged
SCORED = [("normal/a.png", 0.12, 0, "normal"), ("normal/b.png", 0.25, 0, "normal"),
          ("normal/c.png", 0.39, 0, "normal"), ("crack/d.png", 0.55, 1, "crack"),
          ("crack/" + ODD_NAME, 0.61, 1, "crack"), ("stain/f.png", 0.33, 1, "stain")]
CUTOFF = 0.37


def _rows(scored_root, labelled: bool) -> list[ScoreRow]:
    rows = []
    for i, (path, score, label, kind) in enumerate(SCORED):
        _png(scored_root / path, (30 * i, 80, 90))
        rows.append(ScoreRow(path=path, status="ok", sha256=f"{i:064x}", score=score,
                             p_value=max(1 / 61, 1 - score), flagged=score > CUTOFF,
                             nearest=[f"r{i % N_REFS}.png", "r0.png"] if i != 1 else ["gone.png", "r0.png"],
                             nearest_distances=[score - 0.01, score],
                             label=label if labelled else None, kind=kind if labelled else None))
    (scored_root / "broken.png").write_bytes(b"not a png")
    (scored_root / "notes.txt").write_text("x")
    rows.append(ScoreRow(path="broken.png", status="unreadable: not a recognised image"))
    rows.append(ScoreRow(path="notes.txt", status="skipped: not an image file type (.txt)"))
    return sort_rows(rows)


@pytest.fixture
def score_run(tmp_path):
    bank = _bank(tmp_path / "refs")
    root = tmp_path / "batch"
    return ScoreResult(_rows(root, labelled=False), bank, 0.05, CUTOFF, root)


@pytest.fixture
def evaluation_run(tmp_path):
    bank = _bank(tmp_path / "refs")
    root = tmp_path / "test"
    rows = _rows(root, labelled=True)
    used = [r for r in rows if r.score is not None]
    labels = np.array([r.label for r in used])
    scores = np.array([r.score for r in used])
    metrics = evaluation_summary(labels, scores, CUTOFF, kinds=[r.kind for r in used])
    metrics["bank"] = {"path": str(bank.path), "backbone": "efficientnet-lite0", "k": 2, "n_references": N_REFS,
                       "target_fpr": 0.05}
    return EvaluationResult(rows, metrics, labels, scores), bank, root


def _parse(path):
    parser = html5lib.HTMLParser(tree=html5lib.getTreeBuilder("etree"), namespaceHTMLElements=False)
    doc = parser.parse(path.read_text(encoding="utf-8"))
    return parser, doc


def _cards(doc):
    return [li for li in doc.iter("li") if "card" in li.get("class", "").split()]


def _text(element) -> str:
    return "".join(element.itertext())


def test_page_parses_without_errors_and_has_one_card_per_scored_image(score_run, tmp_path):
    out = write_report(tmp_path / "report.html", score_run)
    parser, doc = _parse(out)
    assert parser.errors == []
    assert len(_cards(doc)) == len(SCORED)


def test_flagged_cards_say_so_in_words(score_run, tmp_path):
    _, doc = _parse(write_report(tmp_path / "report.html", score_run))
    by_path = {card.get("data-path"): _text(card) for card in _cards(doc)}
    assert "Flagged" in by_path["crack/d.png"] and "Not flagged" not in by_path["crack/d.png"]
    assert "Not flagged" in by_path["normal/a.png"]


def test_file_names_are_text_not_markup(score_run, tmp_path):
    _, doc = _parse(write_report(tmp_path / "report.html", score_run))
    odd = [card for card in _cards(doc) if card.get("data-path") == "crack/" + ODD_NAME]
    assert len(odd) == 1 and ODD_NAME in _text(odd[0])
    assert not list(odd[0].iter("b"))


def test_unreadable_files_are_listed_with_reasons(score_run, tmp_path):
    _, doc = _parse(write_report(tmp_path / "report.html", score_run))
    section = next(s for s in doc.iter("section") if s.get("id") == "unreadable")
    text = _text(section)
    assert "broken.png" in text and "not a recognised image" in text and "notes.txt" in text


def test_gallery_stops_at_top_n_and_says_how_many_more(score_run, tmp_path):
    _, doc = _parse(write_report(tmp_path / "report.html", score_run, top_n=4))
    cards = _cards(doc)
    assert [c.get("data-path") for c in cards] == [r.path for r in score_run.rows[:4]]
    assert "this page holds the top 4 of 6 scored images" in _text(doc)


def test_page_is_self_contained(score_run, tmp_path):
    text = write_report(tmp_path / "report.html", score_run).read_text(encoding="utf-8")
    assert "http://" not in text and "https://" not in text
    _, doc = _parse(tmp_path / "report.html")
    sources = [img.get("src") for img in doc.iter("img")]
    assert sources and all(src.startswith("data:image/") for src in sources)
    assert CAUTION in _text(doc)


def test_each_reference_thumbnail_is_embedded_once(score_run, tmp_path):
    text = write_report(tmp_path / "report.html", score_run).read_text(encoding="utf-8")
    uris = [part for part in text.split('"') if part.startswith("data:image/jpeg")]
    # 6 scored images + the 5 references in use (r0.png is near every card; gone.png has no file)
    assert len(uris) == len(set(uris)) == len(SCORED) + 5
    assert text.count('data-ref="') == 2 * len(SCORED) - 1


def test_existing_report_is_not_overwritten_without_force(score_run, tmp_path):
    out = tmp_path / "report.html"
    out.write_text("keep me")
    with pytest.raises(OddlingError, match="already exists"):
        write_report(out, score_run)
    assert out.read_text() == "keep me"
    write_report(out, score_run, force=True)
    assert out.read_text().startswith("<!DOCTYPE html>")


def test_histogram_written_as_png_beside_the_page(score_run, tmp_path):
    write_report(tmp_path / "report.html", score_run)
    assert (plots_folder(tmp_path / "report.html") / "scores_histogram.png").read_bytes()[:4] == b"\x89PNG"


def test_evaluation_page_has_metrics_curves_labels_and_kind_filter(evaluation_run, tmp_path):
    result, bank, root = evaluation_run
    out = write_report(tmp_path / "eval.html", result, bank=bank, scored_root=root)
    parser, doc = _parse(out)
    assert parser.errors == []
    for name in ("scores_histogram.png", "roc.png", "pr.png"):
        assert (tmp_path / "eval_plots" / name).is_file()
    section = next(s for s in doc.iter("section") if s.get("id") == "evaluation")
    assert "AUROC" in _text(section) and len(list(section.iter("img"))) == 2
    kinds = [o.get("value") for s in doc.iter("select") if s.get("id") == "f-kind" for o in s.iter("option")]
    assert kinds == ["", "normal", "crack", "stain"]
    by_path = {card.get("data-path"): _text(card) for card in _cards(doc)}
    assert "anomalous (stain)" in by_path["stain/f.png"] and "normal" in by_path["normal/a.png"]


def test_evaluation_result_needs_its_bank(evaluation_run, tmp_path):
    result, _, root = evaluation_run
    with pytest.raises(OddlingError, match="bank"):
        write_report(tmp_path / "eval.html", result, scored_root=root)


def test_bank_too_small_for_the_rate_says_nothing_can_be_flagged(score_run, tmp_path):
    score_run.cutoff = float("inf")
    _, doc = _parse(write_report(tmp_path / "report.html", score_run))
    assert "nothing can be flagged" in _text(next(doc.iter("header")))


def test_the_header_states_the_banks_promise_and_its_lowest_p_value(score_run, tmp_path):
    _, doc = _parse(write_report(tmp_path / "report.html", score_run))
    header = _text(next(doc.iter("header")))
    assert "false-alarm rate 5% on average over reference sets (marginal)" in header
    assert "an image above all 60 calibration scores gets it" in header   # 1/61


def test_a_p_value_at_the_floor_says_so_on_its_card(score_run, tmp_path):
    top = score_run.scored[0]
    top.above_all = 60
    _, doc = _parse(write_report(tmp_path / "report.html", score_run))
    card = next(c for c in _cards(doc) if c.get("data-path") == top.path)
    assert "(above all 60 calibration scores)" in _text(card)
    others = [c for c in _cards(doc) if c.get("data-path") != top.path]
    assert not any("calibration scores)" in _text(c) for c in others)


# ---- in a real browser ------------------------------------------------------------------------

@pytest.fixture
def browser(tmp_path):
    reason = missing_browser()
    if reason:
        if os.environ.get("ODDLING_REQUIRE_BROWSER"):   # set by .ci/run: CI must never skip this
            pytest.fail(f"ODDLING_REQUIRE_BROWSER is set but the browser is missing: {reason}")
        pytest.skip(f"browser test needs headless Chromium: {reason}")
    driver = start_chromium(tmp_path / "chromium-profile")
    yield driver
    driver.quit()


def _visible_cards(driver):
    return [c for c in driver.find_elements("css selector", ".card") if c.is_displayed()]


def test_report_in_headless_chromium(browser, evaluation_run, tmp_path):
    result, bank, root = evaluation_run
    out = write_report(tmp_path / "eval.html", result, bank=bank, scored_root=root)
    browser.get(out.as_uri())
    assert severe_console_entries(browser) == []
    assert len(_visible_cards(browser)) == len(SCORED)

    # flagged only: exactly the flagged cards remain
    browser.find_element("id", "f-flagged").click()
    n_flagged = sum(score > CUTOFF for _, score, _, _ in SCORED)
    visible = _visible_cards(browser)
    assert len(visible) == n_flagged
    assert all("flagged" in c.text.lower() and "not flagged" not in c.text.lower() for c in visible)
    browser.find_element("id", "f-flagged").click()

    # by kind
    from selenium.webdriver.support.select import Select
    Select(browser.find_element("id", "f-kind")).select_by_value("crack")
    assert {c.get_attribute("data-path") for c in _visible_cards(browser)} == {"crack/d.png", "crack/" + ODD_NAME}
    Select(browser.find_element("id", "f-kind")).select_by_value("")

    # a decision shows on the card, survives a reload and exports as CSV
    card = browser.find_element("css selector", '.card[data-path="normal/c.png"]')
    card.find_element("css selector", '.mark[data-decision="normal"]').click()
    assert "Decision: normal" in card.text
    browser.refresh()
    card = browser.find_element("css selector", '.card[data-path="normal/c.png"]')
    assert "Decision: normal" in card.text
    assert card.find_element("css selector", '.mark[data-decision="normal"]').get_attribute("aria-pressed") == "true"
    stored = browser.execute_script(
        "return Object.keys(localStorage).filter(k => k.startsWith('oddling-decisions:'))"
        ".map(k => localStorage.getItem(k));")
    assert stored == ['{"normal/c.png":"normal"}']
    exported = list(csv.reader(io.StringIO(browser.execute_script("return window.oddlingDecisionsCsv();"))))
    assert exported[0] == ["path", "decision", "scored_folder"]
    assert exported[1][:2] == ["normal/c.png", "normal"] and exported[1][2] == str(root.resolve())
    # choosing the same decision again keeps it; only "clear" clears
    card = browser.find_element("css selector", '.card[data-path="normal/c.png"]')
    card.find_element("css selector", '.mark[data-decision="normal"]').click()
    assert "Decision: normal" in card.text
    card.find_element("css selector", ".mark-clear").click()
    assert "No decision yet" in card.text
    card.find_element("css selector", '.mark[data-decision="normal"]').click()
    # one counter; an inverted score range says why nothing matches
    assert browser.find_element("id", "match-count").text.startswith(f"All {len(SCORED)} cards shown")
    browser.find_element("id", "f-min").send_keys("0.5")
    browser.find_element("id", "f-max").send_keys("0.2")
    assert "inverted" in browser.find_element("id", "match-count").text and not _visible_cards(browser)
    browser.find_element("css selector", 'button[type="reset"]').click()
    # reference names are on the card, not only on hover
    assert "r" in card.find_element("css selector", ".refname").text
    browser.find_element("id", "export").click()
    assert severe_console_entries(browser) == []

    full_page_screenshot(browser, ARTIFACTS / "report.png", width=1280)
    full_page_screenshot(browser, ARTIFACTS / "report-phone.png", width=390)

