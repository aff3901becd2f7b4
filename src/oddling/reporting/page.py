"""The review report: one self-contained HTML page to look at scored images and decide on them.

Everything the page shows is inside the file (thumbnails and plots as data URIs, CSS and JS
inline, a Content-Security-Policy that forbids any fetch), so it opens offline from a file or an
e-mail attachment. The plots are also written as PNG files in `<stem>_plots/` beside the page.
"""
from __future__ import annotations

import base64
import datetime as _dt
import hashlib
import html
import io
import json
import math
import os
import textwrap
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image

from oddling import __version__
from oddling.bank.store import Bank
from oddling.data.intake import IntakeError, display_path, load_rgb
from oddling.detectors.conformal import supported_rate_text
from oddling.errors import OddlingError
from oddling.files import refuse_existing, write_text
from oddling.reporting.results import ScoreRow, sort_rows

def _asset(name: str) -> str:
    """The page's CSS and JavaScript live as package files beside this module (reporting/assets/)."""
    from importlib import resources

    return resources.files("oddling.reporting").joinpath("assets", name).read_text(encoding="utf-8")


HISTOGRAM_FILE = "scores_histogram.png"
ROC_FILE = "roc.png"
PR_FILE = "pr.png"
STORAGE_PREFIX = "oddling-decisions:"
DECISIONS = ("normal", "anomalous", "unsure")
CAUTION = ("oddling is a screening aid: flags are for people to review. Flagged and unflagged items alike "
           "deserve the sampling the site's quality procedures require.")
_JPEG_QUALITY = 80
_DPI = 120
# Colours of the histogram, matching the page's palette.
_CAL_COLOUR, _BATCH_COLOUR, _ANOMALY_COLOUR = "#7a8597", "#17607a", "#b3261e"


def plots_folder(out_html: str | os.PathLike) -> Path:
    """Where write_report puts the PNG copies of its plots: `<stem>_plots/` beside the page."""
    out_html = Path(out_html)
    return out_html.with_name(f"{out_html.stem}_plots")


def write_report(
    out_html: str | os.PathLike,
    result,
    *,
    scored_root: str | os.PathLike | None = None,
    bank: Bank | None = None,
    top_n: int = 200,
    title: str | None = None,
    force: bool = False,
    thumb_px: int = 160,
    image_of=None,
    source_text: str | None = None,
) -> Path:
    """Write the review page for a score or evaluate run; return its path.

    Parameters
    ----------
    out_html : path of the page. An existing page (or existing plots in `<stem>_plots/`) is
        replaced only with force=True; otherwise OddlingError.
    result : ScoreResult or EvaluationResult. With an EvaluationResult the page adds the
        headline metrics, ROC and PR curves, each card's true label and a filter by kind.
    scored_root : the folder that was scored (row paths are relative to it). Defaults to
        `result.root` for a ScoreResult; required for an EvaluationResult.
    bank : the bank scored against. Defaults to `result.bank` for a ScoreResult; required for
        an EvaluationResult.
    top_n : cards in the gallery, highest scores first; the page says how many more exist.
    thumb_px : longest side of the embedded JPEG thumbnails.
    image_of : rows from the scored-image log: row -> the file to show (None: a placeholder), instead
        of `scored_root / row.path`. source_text : what the page says was scored, instead of the folder.
    """
    out_html = Path(out_html)
    bank = bank if bank is not None else getattr(result, "bank", None)
    if not isinstance(bank, Bank):
        raise OddlingError("write_report needs the bank the rows were scored against (bank=...)")
    scored_root = scored_root if scored_root is not None else getattr(result, "root", None)
    if scored_root is None:
        raise OddlingError("write_report needs the scored folder (scored_root=...)")
    scored_root = Path(scored_root)
    if top_n < 1:
        raise OddlingError(f"top_n must be >= 1, got: {top_n}")
    if not 16 <= thumb_px <= 1024:
        raise OddlingError(f"thumb_px must be in [16, 1024], got: {thumb_px}")
    metrics = getattr(result, "metrics", None)
    if metrics is not None:
        target_fpr = metrics["bank"]["target_fpr"]
        cutoff = metrics["at_cutoff"]["cutoff"]
        cutoff = math.inf if cutoff is None else cutoff   # json_number turned "flags nothing" into None
    else:
        target_fpr, cutoff = result.target_fpr, result.cutoff

    plots = plots_folder(out_html)
    plot_names = [HISTOGRAM_FILE] + ([ROC_FILE, PR_FILE] if metrics is not None else [])
    refuse_existing(out_html, *[plots / n for n in plot_names], force=force)

    rows = sort_rows(list(result.rows))
    scored = [r for r in rows if r.score is not None]
    shown = scored[:top_n]
    plots.mkdir(parents=True, exist_ok=True)
    figures = {"histogram": plot_score_histogram(bank.calibration_scores, scored, cutoff, target_fpr,
                                                 plots / HISTOGRAM_FILE, bank.detector.describe_score())}
    if metrics is not None:
        figures.update(_evaluation_plots(result, metrics, plots))
    image_of = image_of or (lambda row: scored_root / row.path)
    thumbs = _thumbnails(shown, image_of, Path(bank.reference_root), thumb_px)
    heatmaps = _heatmaps(shown, scored, scored_root, bank, thumb_px)

    page = _Page(rows=rows, shown=shown, bank=bank, scored_root=scored_root, metrics=metrics,
                 target_fpr=target_fpr, cutoff=cutoff, title=title, thumbs=thumbs, heatmaps=heatmaps,
                 figures={k: _png_uri(p) for k, p in figures.items()}, plots_dir=plots.name,
                 image_of=image_of, source_text=source_text)
    return write_text(out_html, page.render(), force=True)


def run_id(bank: Bank, scored_root: Path, rows: list[ScoreRow]) -> str:
    """What the page's saved decisions are keyed by: the same bank, folder and files give the same id."""
    key = json.dumps([str(bank.path) if bank.path else None, str(Path(scored_root).resolve()),
                      sorted(r.path for r in rows)])
    return hashlib.sha256(key.encode("utf-8")).hexdigest()[:16]


def _params_text(params: dict) -> str:
    return "(" + ", ".join(f"{k}={v}" for k, v in params.items()) + ")" if params else ""


# ---- plots ------------------------------------------------------------------------------------

def plot_score_histogram(calibration_scores, rows: list[ScoreRow], cutoff: float, target_fpr: float,
                         path: Path, score_text: str = "detector score") -> Path:
    """Calibration scores of the bank against the scored batch (split by true label when known),
    as densities on shared bins, with the flag cutoff drawn."""
    from oddling.reporting.plots import plt  # importing oddling.reporting.plots selects the Agg backend

    cal = np.asarray(calibration_scores, dtype=np.float64)
    groups = [(f"scored batch (n={len(rows)})", np.array([r.score for r in rows]), _BATCH_COLOUR)]
    if rows and all(r.label is not None for r in rows):
        normal = np.array([r.score for r in rows if r.label == 0])
        anomalous = np.array([r.score for r in rows if r.label == 1])
        groups = [(f"scored, labelled normal (n={len(normal)})", normal, _BATCH_COLOUR),
                  (f"scored, labelled anomalous (n={len(anomalous)})", anomalous, _ANOMALY_COLOUR)]
    # Bins cover the calibration scores (and the cutoff) with room to spare; far outliers of the
    # batch go into one overflow bin at the right, so they cannot squash the calibration scores
    # into a single bar.
    everything = np.concatenate([cal] + [g[1] for g in groups])
    everything = everything[np.isfinite(everything)]
    finite_cal = cal[np.isfinite(cal)]
    anchor = np.concatenate([finite_cal, [cutoff] if math.isfinite(cutoff) else []]) if len(finite_cal) else everything
    low, high = float(min(anchor.min(), everything.min())), float(anchor.max())
    span = max(high - float(anchor.min()), 1e-9)
    top = high + 0.5 * span
    n_bins = min(50, max(10, int(np.sqrt(len(everything)))))
    bins = np.linspace(low, top, n_bins + 1)
    overflow = int((everything > top).sum())
    if overflow:
        bins = np.append(bins, top + (bins[1] - bins[0]))
        groups = [(label, np.minimum(values, bins[-1] - 1e-12), colour) for label, values, colour in groups]
    fig, ax = plt.subplots(figsize=(7.5, 4.4))
    try:
        ax.hist(cal, bins=bins, density=True, histtype="stepfilled", color=_CAL_COLOUR, alpha=0.35,
                label=f"bank calibration (n={len(cal)})")
        for label, values, colour in groups:
            if len(values):
                ax.hist(values, bins=bins, density=True, histtype="step", lw=2, color=colour, label=label)
        if math.isfinite(cutoff):
            ax.axvline(cutoff, color="#222222", ls="--", lw=1.5,
                       label=f"cutoff {cutoff:.4f} (target false-alarm rate {_percent(target_fpr)})")
            ax.set_title("Scores: flagged when score > cutoff")
        else:
            ax.set_title("Scores (no usable cutoff: the bank is too small for this false-alarm rate)")
        ax.set_xlabel(textwrap.fill(f"score: {score_text} (higher = more anomalous)", 100), fontsize=8)
        ax.set_ylabel("density")
        if overflow:
            ax.axvspan(bins[-2], bins[-1], color="#999999", alpha=0.15, lw=0)
            ax.annotate(f"{overflow} above {top:.3g}", xy=(bins[-2], 1.0), xycoords=("data", "axes fraction"),
                        ha="right", va="top", fontsize=7)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2, fontsize=8, frameon=False)
        fig.tight_layout()
        fig.savefig(path, dpi=_DPI)
    finally:
        plt.close(fig)
    return path


def _evaluation_plots(result, metrics: dict, folder: Path) -> dict[str, Path]:
    from oddling.evaluation import metrics as m
    from oddling.reporting.plots import plot_pr, plot_roc

    labels, scores = np.asarray(result.labels), np.asarray(result.scores)
    fpr, tpr, _ = m.roc_curve(labels, scores)
    precision, recall, _ = m.precision_recall_curve(labels, scores)
    return {"roc": plot_roc(fpr, tpr, metrics["auroc"], folder / ROC_FILE),
            "pr": plot_pr(precision, recall, metrics["average_precision"], float(labels.mean()), folder / PR_FILE)}


def _png_uri(path: Path) -> str:
    return "data:image/png;base64," + base64.b64encode(Path(path).read_bytes()).decode("ascii")


# ---- thumbnails -------------------------------------------------------------------------------

def thumbnail_uri(path: Path, px: int) -> str | None:
    """A JPEG data URI no larger than px on its longest side; None when the file cannot be decoded."""
    try:
        image = load_rgb(path, min_side=px)   # same safe decoding as scoring: EXIF, alpha over white, bomb guard
    except IntakeError:
        return None
    image.thumbnail((px, px), Image.Resampling.LANCZOS)
    buffer = io.BytesIO()
    image.save(buffer, "JPEG", quality=_JPEG_QUALITY, optimize=True)
    return "data:image/jpeg;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def heatmap_uri(path: Path, row: ScoreRow, crop: int, px: int, vmax: float, frame: str = "crop") -> str | None:
    """Local mode: a JPEG data URI of the image with its anomaly map over it, like the thumbnail."""
    from oddling.reporting.heatmaps import overlay, upsample_map

    try:
        image = load_rgb(path, min_side=px)
    except IntakeError:
        return None
    image.thumbnail((px, px), Image.Resampling.LANCZOS)
    buffer = io.BytesIO()
    overlay(image, upsample_map(row.anomaly_grid, image.size, crop, frame=frame), vmax).save(
        buffer, "JPEG", quality=_JPEG_QUALITY)
    return "data:image/jpeg;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _heatmaps(shown: list[ScoreRow], scored: list[ScoreRow], scored_root: Path, bank: Bank, px: int) -> dict[str, str | None]:
    """By row path; colours from 0 to the highest score shown, so the cards compare."""
    with_maps = [r for r in shown if r.anomaly_grid is not None]
    if not with_maps:
        return {}
    vmax = max(r.score for r in scored)
    crop = bank.representation["preprocessing"]["crop"]
    frame = bank.representation["preprocessing"].get("frame", "crop")
    with ThreadPoolExecutor(max_workers=min(8, os.cpu_count() or 1)) as pool:
        uris = pool.map(lambda r: heatmap_uri(scored_root / r.path, r, crop, px, vmax, frame), with_maps)
        return dict(zip([r.path for r in with_maps], uris))


def _thumbnails(shown: list[ScoreRow], image_of, reference_root: Path, px: int) -> dict[Path, str | None]:
    """One thumbnail per distinct file, so a reference near many cards is embedded once."""
    files = list(dict.fromkeys([f for f in (image_of(r) for r in shown) if f is not None]
                               + [reference_root / p for r in shown for p in r.nearest]))
    with ThreadPoolExecutor(max_workers=min(8, os.cpu_count() or 1)) as pool:   # decoding releases the GIL
        return dict(zip(files, pool.map(lambda f: thumbnail_uri(f, px), files)))


# ---- the page ---------------------------------------------------------------------------------

def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _path(value) -> str:
    """A path (or a name taken from one) as page text: intake.display_path, then HTML-escaped."""
    return _e(display_path(str(value)))


def _percent(rate: float | None) -> str:
    return "n/a" if rate is None else f"{rate * 100:.4g}%"


def _num(value: float | None, digits: int = 4) -> str:
    return "n/a" if value is None or not math.isfinite(value) else f"{value:.{digits}f}"


def _p(value: float | None) -> str:
    return "n/a" if value is None or not math.isfinite(value) else f"{value:.4g}"


def script_json(data) -> str:
    """JSON that is safe inside <script>: no '<', '>' or '&' that could close or confuse the element."""
    text = json.dumps(data, sort_keys=True, ensure_ascii=True)
    return text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")


# Nothing may be fetched: the page is complete in itself.
_CSP = ('<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; img-src data:; '
        'style-src \'unsafe-inline\'; script-src \'unsafe-inline\'">')
# A transparent 1x1 GIF: the src of reference <img>s until the script fills in their shared data URI.
_BLANK = "data:image/gif;base64,R0lGODlhAQABAIAAAAAAAP///yH5BAEAAAAALAAAAAABAAEAAAIBRAA7"


class _Page:
    def __init__(self, *, rows, shown, bank, scored_root, metrics, target_fpr, cutoff, title, thumbs, figures,
                 plots_dir, heatmaps=None, image_of=None, source_text=None):
        self.rows, self.shown, self.bank, self.metrics = rows, shown, bank, metrics
        self.scored_root, self.target_fpr, self.cutoff = scored_root, target_fpr, cutoff
        self.thumbs, self.figures, self.plots_dir = thumbs, figures, plots_dir
        self.heatmaps = heatmaps or {}
        self.image_of = image_of or (lambda row: scored_root / row.path)
        self.source_text = source_text
        self.scored = [r for r in rows if r.score is not None]
        self.unreadable = [r for r in rows if r.score is None]
        self.labelled = any(r.label is not None for r in rows)
        self.title = title or f"oddling review: {display_path(source_text or str(scored_root.name or scored_root))}"
        self.ref_ids: dict[Path, str] = {}
        self.ref_uris: dict[str, str] = {}

    def render(self) -> str:
        gallery = self._gallery()   # first: it collects the reference thumbnails for the data block
        data = {"runId": run_id(self.bank, self.scored_root, self.rows), "storagePrefix": STORAGE_PREFIX,
                "refs": self.ref_uris, "decisions": list(DECISIONS),
                "scoredFolder": display_path(str(Path(self.scored_root).resolve()))}
        return "\n".join([
            "<!DOCTYPE html>",
            '<html lang="en">',
            "<head>",
            '<meta charset="utf-8">',
            '<meta name="viewport" content="width=device-width, initial-scale=1">',
            _CSP,
            '<link rel="icon" href="data:,">',
            f"<title>{_e(self.title)}</title>",
            f"<style>{_CSS}</style>",
            "</head>",
            "<body>",
            self._header(),
            "<main>",
            self._distribution(),
            self._evaluation() if self.metrics is not None else "",
            gallery,
            self._unreadable(),
            "</main>",
            (f'<footer class="caution"><p>{_e(CAUTION)}</p>'
             f'<p class="small">Made by oddling {_e(__version__)}.</p></footer>'),
            f'<script type="application/json" id="oddling-data">{script_json(data)}</script>',
            f"<script>{_JS}</script>",
            "</body>",
            "</html>",
            "",
        ])

    # -- sections --

    def _header(self) -> str:
        b = self.bank
        flagged = sum(bool(r.flagged) for r in self.rows)
        threshold = b.threshold(self.target_fpr)
        if math.isfinite(self.cutoff):
            cutoff = (f"score &gt; <strong>{_num(self.cutoff)}</strong>, set for a target false-alarm rate of "
                      f"<strong>{_percent(self.target_fpr)}</strong> on normal images: "
                      f"{_e(threshold.describe())}")
        else:
            cutoff = (f"none: {_e(threshold.support_text())}, so nothing can be flagged at a false-alarm "
                      f"rate of {_percent(self.target_fpr)}")
        facts = [
            ("Scored", _path(self.source_text)) if self.source_text else
            ("Scored folder", f"<code>{_path(self.scored_root)}</code>"),
            ("Files", (f"{len(self.rows)} found, {len(self.scored)} scored, <strong>{flagged} flagged</strong>, "
                       f"{len(self.unreadable)} not scored")),
            ("Flag rule", cutoff),
            ("Supported rates", _e(supported_rate_text(len(b.calibration_scores), b.guarantee))),
            ("Lowest p-value", _e(f"{threshold.p_floor:.4g}: an image above all {threshold.n} calibration scores "
                                  "gets it, so order those by score")),
            ("Bank", f"<code>{_path(b.path) if b.path else '(not saved)'}</code>"),
            ("Representation", f"<code>{_e(b.representation.get('id', '?'))}</code>"),
            ("Detector", (f"<code>{_e(b.detector.name)}</code> {_e(_params_text(b.detector.get_params()))}: "
                          f"{_e(b.detector.describe_score())}")),
            ("References", (f"{b.size} images; calibration {_e(b.calibration.get('method', '?'))}, "
                            f"{len(b.calibration_scores)} scores")),
            ("Reference folder", f"<code>{_path(b.reference_root)}</code>"),
            ("Report made", _e(_dt.datetime.now().astimezone().replace(microsecond=0).isoformat())),
            ("oddling", f"{_e(__version__)} (bank made with {_e(b.tool_version)} on {_e(b.created)})"),
        ]
        items = "".join(f"<div><dt>{name}</dt><dd>{value}</dd></div>" for name, value in facts)
        kind = "evaluation" if self.metrics is not None else "scoring run"
        return (f'<header class="masthead"><p class="eyebrow">oddling review report &middot; {kind}</p>'
                f"<h1>{_e(self.title)}</h1><dl class=\"facts\">{items}</dl></header>")

    def _figure(self, key: str, alt: str, caption: str, filename: str) -> str:
        return (f'<figure><img src="{self.figures[key]}" alt="{_e(alt)}">'
                f"<figcaption>{caption} PNG copy: <code>{_path(self.plots_dir)}/{_e(filename)}</code></figcaption></figure>")

    def _distribution(self) -> str:
        caption = ("Shaded: calibration scores of the bank's own images, each scored by a detector that had not "
                   "seen it (what normal looks like). Lines: this batch."
                   + (" Images right of the dashed cutoff are flagged." if math.isfinite(self.cutoff)
                      else " There is no cutoff: the bank has too few calibration scores for this rate."))
        return ('<section id="distribution"><h2>Score distribution</h2>'
                + self._figure("histogram", "Histogram of calibration scores and scored batch with the cutoff",
                               caption, HISTOGRAM_FILE) + "</section>")

    def _evaluation(self) -> str:
        m = self.metrics
        low, high = m["auroc_ci95"]
        c = m["at_cutoff"]
        rates = ", ".join(f"{_num(v, 3)} at {_percent(float(r))}" for r, v in m["tpr_at_fpr"].items())
        headline = [
            ("AUROC", f"{_num(m['auroc'], 3)} (95% CI {_num(low, 3)} to {_num(high, 3)})"),
            ("Average precision", _num(m["average_precision"], 3)),
            ("At the cutoff", (f"recall {_num(c['recall'], 3)}, precision {_num(c['precision'], 3)}, "
                               f"false-alarm rate {_num(c['fpr'], 3)}")),
            ("Counts at the cutoff", (f"{c['tp']} anomalies caught, {c['fn']} missed, {c['fp']} false alarms, "
                                      f"{c['tn']} normals passed")),
            ("Recall at false-alarm rate", rates),
            ("False-alarm rate at 95% recall", _num(m["fpr_at_tpr95"], 3)),
            ("Test images", f"{m['n_normal']} normal, {m['n_anomalous']} anomalous"),
        ]
        per_kind = "".join(f"<tr><td>{_path(k)}</td><td class=\"num\">{_num(v, 3)}</td></tr>"
                           for k, v in sorted(m.get("per_kind_auroc", {}).items()))
        kinds = ('<p class="table-title">AUROC per anomaly kind (its anomalies against all normals)</p>'
                 '<table class="kinds"><thead><tr><th>kind</th><th>AUROC</th></tr></thead>'
                 f"<tbody>{per_kind}</tbody></table>"
                 if per_kind else "")
        items = "".join(f"<div><dt>{k}</dt><dd>{v}</dd></div>" for k, v in headline)
        figures = (self._figure("roc", "ROC curve", "ROC: true positive rate against false positive rate.", ROC_FILE)
                   + self._figure("pr", "Precision-recall curve", "Precision against recall.", PR_FILE))
        return (f'<section id="evaluation"><h2>How well the scores separate the classes</h2>'
                f'<dl class="metrics">{items}</dl>{kinds}<div class="figures">{figures}</div></section>')

    def _controls(self) -> str:
        kinds = ""
        if self.labelled:
            names = sorted({r.kind for r in self.shown if r.kind and r.label == 1})
            options = ['<option value="">all</option>', '<option value="normal">normal</option>']
            options += [f'<option value="{_path(k)}">{_path(k)}</option>' for k in names]
            if any(r.label is None for r in self.shown):
                options.append('<option value="(unlabelled)">(unlabelled)</option>')
            kinds = (f'<label>True class <select id="f-kind">{"".join(options)}</select></label>')
        return (
            '<form class="controls" id="controls" role="search" aria-label="Filter and sort the gallery">'
            '<label class="check"><input type="checkbox" id="f-flagged"> Flagged only</label>'
            f"{kinds}"
            '<label>Score from <input type="number" id="f-min" step="any" inputmode="decimal"></label>'
            '<label>to <input type="number" id="f-max" step="any" inputmode="decimal"></label>'
            '<label>Decision <select id="f-decision"><option value="">any</option>'
            '<option value="(none)">not decided</option>'
            + "".join(f'<option value="{d}">{d}</option>' for d in DECISIONS)
            + '</select></label>'
            '<label>Sort <select id="f-sort"><option value="score-desc">score, highest first</option>'
            '<option value="score-asc">score, lowest first</option><option value="name">file name</option>'
            "</select></label>"
            '<button type="reset" class="plain">Clear filters</button>'
            "</form>"
        )

    def _gallery(self) -> str:
        cards = "".join(self._card(rank, row) for rank, row in enumerate(self.shown, 1))
        return (
            '<section id="gallery"><h2>Ranked images</h2>'
            f"{self._controls()}"
            f'<div class="toolbar"><p id="match-count" aria-live="polite" data-scored="{len(self.scored)}">'
            f"{_e(self._counter_text())}</p>"
            '<button type="button" id="export">Export decisions (CSV)</button></div>'
            '<p id="storage-note" class="note" hidden>This browser does not let the page keep decisions; '
            "export them before closing the page.</p>"
            f'<ol class="cards" id="cards">{cards}</ol></section>'
        )

    def _counter_text(self) -> str:
        """The counter before any filter (the page's script keeps it up to date, in the same words)."""
        n, total = len(self.shown), len(self.scored)
        if n == 0:
            return "No scored images to show."
        more = (f"; this page holds the top {n} of {total} scored images (every row is in the scores CSV)"
                if total > n else "")
        return f"All {n} cards shown{more}."

    def _ref_id(self, path: Path) -> str | None:
        uri = self.thumbs.get(path)
        if uri is None:
            return None
        if path not in self.ref_ids:
            self.ref_ids[path] = f"r{len(self.ref_ids)}"
            self.ref_uris[self.ref_ids[path]] = uri
        return self.ref_ids[path]

    @property
    def _refs_title(self) -> str:
        return self.bank.detector.evidence_title

    def _card(self, rank: int, row: ScoreRow) -> str:
        source = self.image_of(row)
        thumb = self.thumbs.get(source) if source is not None else None
        name = row.path.rsplit("/", 1)[-1]
        folder = f'<p class="path">{_path(row.path)}</p>' if name != row.path else ""
        if thumb:
            image = f'<img class="thumb" src="{thumb}" alt="{_path(name)}">'
        else:
            image = '<div class="thumb missing">no preview<br>(file changed or gone)</div>'
        heat = self.heatmaps.get(row.path)
        heatmap = (f'<p class="refs-title">Anomaly map (red = far from every normal patch)</p>'
                   f'<img class="heatmap" src="{heat}" alt="anomaly map of {_path(name)}">') if heat else ""
        flag = ('<span class="badge flagged">Flagged</span>' if row.flagged
                else '<span class="badge calm">Not flagged</span>')
        truth = ""
        if row.label is not None:
            truth_text = "anomalous" + (f" ({row.kind})" if row.kind else "") if row.label == 1 else "normal"
            truth = f'<div><dt>True label</dt><dd class="truth-{row.label}">{_path(truth_text)}</dd></div>'
        kind = "(unlabelled)" if row.label is None else ("normal" if row.label == 0 else (row.kind or ""))
        refs = []
        for ref, dist in zip(row.nearest, row.nearest_distances):
            ref_name = ref.rsplit("/", 1)[-1]
            rid = self._ref_id(Path(self.bank.reference_root) / ref)
            picture = (f'<img src="{_BLANK}" data-ref="{rid}" alt="{_path(ref_name)}">' if rid
                       else '<span class="refmissing">not found</span>')
            refs.append(f'<li title="{_path(ref)}">{picture}<span class="refname">{_path(ref_name)}</span>'
                        f'<span class="dist">{_num(dist)}</span></li>')
        buttons = "".join(f'<button type="button" class="mark mark-{d}" data-decision="{d}" aria-pressed="false">'
                          f"{d}</button>" for d in DECISIONS)
        buttons += '<button type="button" class="mark mark-clear plain" data-decision="">clear</button>'
        return (
            f'<li class="card{" is-flagged" if row.flagged else ""}" data-path="{_path(row.path)}" '
            f'data-score="{row.score!r}" data-flagged="{"1" if row.flagged else "0"}" data-kind="{_path(kind)}">'
            f'<div class="card-top">{image}<div class="card-info">'
            f'<p class="rank">#{rank}</p><h3 class="name" title="{_path(row.path)}">{_path(name)}</h3>'
            f'{folder}{flag}'
            f'<dl class="numbers"><div><dt>Score</dt><dd>{_num(row.score)}</dd></div>'
            f"<div><dt>p-value</dt><dd>{_p(row.p_value)}{self._floor(row)}</dd></div>{truth}</dl></div></div>{heatmap}"
            + (f'<p class="refs-title">{self._refs_title}</p><ol class="refs">{"".join(refs)}</ol>' if refs else "") +
            f'<div class="decide" role="group" aria-label="Decision for {_path(name)}">{buttons}</div>'
            f'<p class="decision-state">No decision yet</p></li>'
        )

    @staticmethod
    def _floor(row) -> str:
        """A p-value at its floor says so: it cannot go lower with this bank; the score still ranks."""
        if row.above_all is None:
            return ""
        return (f' <span class="floor" title="The lowest p-value this bank can give; order such images by score">'
                f"(above all {row.above_all} calibration scores)</span>")

    def _unreadable(self) -> str:
        if not self.unreadable:
            body = "<p>None: every file found was scored.</p>"
        else:
            lines = "".join(f"<tr><td><code>{_path(r.path)}</code></td><td>{_path(r.status)}</td></tr>"
                            for r in self.unreadable)
            body = (f'<table class="unreadable"><thead><tr><th>file</th><th>reason</th></tr></thead>'
                    f"<tbody>{lines}</tbody></table>")
        return (f'<section id="unreadable"><h2>Files not scored ({len(self.unreadable)})</h2>{body}</section>')


_CSS = _asset("page.css")


# The decisions export's cell functions (also run on their own by tests/test_hostile.py).
# csvText is data.csv_cells.csv_text for a path already in display form (data-path holds
# display_path); csv_cells.path_from_cell reads an exported path back.
CSV_CELLS_JS = _asset("csv_cells.js")


_JS = _asset("page.js").replace("/*CSV_CELLS*/", CSV_CELLS_JS)


__all__ = ["CAUTION", "plot_score_histogram", "plots_folder", "run_id", "thumbnail_uri", "write_report"]
