"""ROC and precision-recall figures as PNG files, with the chance level drawn for comparison."""
from __future__ import annotations

import os
from pathlib import Path

import matplotlib

matplotlib.use("Agg")   # files only, never a window: works headless and in worker threads
import matplotlib.pyplot as plt  # noqa: E402

_DPI = 120


def _value(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.3f}"


def _write(fig, path: str | os.PathLike) -> Path:
    fig.tight_layout()
    path = Path(path)
    try:
        fig.savefig(path, dpi=_DPI)
    finally:
        plt.close(fig)
    return path


def _save(fig, ax, title: str, path: str | os.PathLike) -> Path:
    ax.set_xlim(0.0, 1.0)
    ax.set_ylim(0.0, 1.02)
    ax.set_aspect("equal")
    ax.set_title(title)
    ax.grid(True, alpha=0.3)
    return _write(fig, path)


def plot_roc(fpr, tpr, auc: float | None, path: str | os.PathLike, title: str = "ROC") -> Path:
    """The ROC curve with the chance diagonal; the AUC in the legend."""
    fig, ax = plt.subplots(figsize=(5, 5))
    ax.plot(fpr, tpr, lw=2, label=f"detector (AUC = {_value(auc)})")
    ax.plot([0, 1], [0, 1], ls="--", color="grey", lw=1, label="chance")
    ax.set_xlabel("False positive rate")
    ax.set_ylabel("True positive rate")
    ax.legend(loc="lower right")
    return _save(fig, ax, title, path)


def plot_pr(precision, recall, average_precision: float | None, prevalence: float, path: str | os.PathLike,
            title: str = "Precision-recall") -> Path:
    """The precision-recall curve as steps (what average precision sums) and the chance level,
    precision = prevalence (the share of anomalies)."""
    fig, ax = plt.subplots(figsize=(5, 5))
    ax.plot(recall, precision, lw=2, drawstyle="steps-post", label=f"detector (AP = {_value(average_precision)})")
    ax.axhline(prevalence, ls="--", color="grey", lw=1, label=f"chance (prevalence {prevalence:.3f})")
    ax.set_xlabel("Recall")
    ax.set_ylabel("Precision")
    ax.legend(loc="lower left")
    return _save(fig, ax, title, path)


__all__ = ["plot_pr", "plot_roc"]


def drift_history_figure(entries: list[dict], expected_share: float, title: str = "Batch shift over time"):
    """The figure of plot_drift_history (not saved): flagged share per batch against the expected
    share (top) and the MMD effect size (bottom), checks with a shift marked on both.

    The legend sits outside the axes, to the right, so it never covers a marker; time labels come
    from matplotlib's ConciseDateFormatter (the year, month or day once, in the corner; each tick
    only what changes), in UTC, so a tick never reads like "02 01:34".
    """
    import datetime as dt

    import matplotlib.dates as mdates

    times = [dt.datetime.fromisoformat(e["time"]) for e in entries]
    shifted = [i for i, e in enumerate(entries) if e["shift"]]
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(8, 5.5), sharex=True)
    top.plot(times, [e["flagged_share"] for e in entries], marker="o", label="flagged share")
    top.axhline(expected_share, linestyle="--", color="grey", label=f"expected ({expected_share:g})")
    top.scatter([times[i] for i in shifted], [entries[i]["flagged_share"] for i in shifted], color="crimson",
                zorder=3, label="shift")
    top.set_ylabel("Share flagged")
    top.set_title(title)
    top.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0, fontsize=8)
    top.grid(alpha=0.3)
    bottom.plot(times, [e["mmd"] for e in entries], marker="o", color="darkorange", label="MMD")
    bottom.scatter([times[i] for i in shifted], [entries[i]["mmd"] for i in shifted], color="crimson", zorder=3,
                   label="shift")
    bottom.set_ylabel("MMD (effect size)")
    bottom.set_xlabel("Time of the check (UTC)")
    bottom.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0, fontsize=8)
    bottom.grid(alpha=0.3)
    locator = mdates.AutoDateLocator(tz=dt.timezone.utc)
    bottom.xaxis.set_major_locator(locator)
    bottom.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=dt.timezone.utc))
    return fig


def plot_drift_history(entries: list[dict], expected_share: float, path: str | os.PathLike,
                       title: str = "Batch shift over time") -> Path:
    """drift_history_figure written as a PNG; missing parent folders are created (as the CSV writer does)."""
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    return _write(drift_history_figure(entries, expected_share, title), out)


def plot_leaderboard(entries: list[dict], holdout_auroc: float | None, path: str | os.PathLike,
                     top: int = 20) -> Path:
    """Horizontal bars: AUROC with its 95% interval per configuration (best at the top), on the choosing half."""
    shown = entries[:top][::-1]
    fig, ax = plt.subplots(figsize=(8, 0.35 * len(shown) + 1.6))
    names = [f"{e['representation']} | {e['detector']} {_params(e['params'])}" for e in shown]
    values = [e["auroc"] for e in shown]
    # (the interval counts distinct contents: with many copies the all-files AUROC can sit outside it)
    low = [max(0.0, e["auroc"] - (e["auroc_ci95"] or [e["auroc"]])[0]) for e in shown]
    high = [max(0.0, (e["auroc_ci95"] or [0, e["auroc"]])[1] - e["auroc"]) for e in shown]
    ax.barh(range(len(shown)), values, xerr=[low, high], color="#4c72b0", alpha=0.8, capsize=2)
    ax.set_yticks(range(len(shown)), names, fontsize=7)
    ax.set_xlim(max(0.0, min(values + [0.5]) - 0.05), 1.0)
    ax.set_xlabel("AUROC on the choosing half (optimistic for the best)", fontsize=8)
    if holdout_auroc is not None:
        ax.axvline(holdout_auroc, color="#222222", ls="--", lw=1, label=f"chosen, held-out half: {holdout_auroc:.3f}")
        ax.legend(fontsize=7, loc="lower right")
    ax.set_title("Configurations compared by oddling tune", fontsize=9)
    ax.grid(True, axis="x", alpha=0.3)
    return _write(fig, path)


def _params(params: dict) -> str:
    return ", ".join(f"{k}={v}" for k, v in params.items())
