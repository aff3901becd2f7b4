"""`oddling tune` with its default grid on the project's labelled cases (tests/tune_cases.py):
scikit-learn's digits (zeros normal), scikit-image's brick with small drawn defects, and an
invented woven fabric. Prints, per case, the chosen configuration, its AUROC on the held-out
half (images it did not choose on) and, on the same half, the AUROC of the default `oddling fit`
(EfficientNet-Lite0 embedding, kNN k=5). The README's table comes from this output.

    python benchmarks/tune_cases.py --out benchmarks/TUNE_RESULTS.md     # ~10 minutes on 2 cores
"""
from __future__ import annotations

import argparse
import datetime as dt
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import oddling  # noqa: E402
from oddling.evaluation.metrics import auroc  # noqa: E402
from tune_cases import CASES  # noqa: E402


def default_holdout(result) -> float | None:
    """AUROC on the held-out half of the default configuration's scores (same images as holdout_auroc)."""
    for t in result.leaderboard:
        if (t.representation, t.detector, t.params) == ("efficientnet-lite0", "knn", {"k": 5}) and t.scores is not None:
            labels = result.labels
            held = ~result.choose   # the halves tune drew (by content: copies stay together)
            y = labels[t.readable][held[t.readable]]
            return auroc(y, t.scores[held[t.readable]])
    return None


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--out", type=Path, default=None)
    args = parser.parse_args()
    warnings.simplefilter("ignore", oddling.OddlingWarning)
    lines = [f"# oddling tune on the labelled cases ({dt.date.today().isoformat()})", "",
             "| case | chosen configuration | holdout AUROC | default's AUROC (same half) | configurations |",
             "| --- | --- | --- | --- | --- |"]
    with tempfile.TemporaryDirectory() as tmp:
        for name, build in CASES.items():
            folders = build(Path(tmp) / name)
            result = oddling.tune(folders["test"], folders["reference"], Path(tmp) / f"{name}.bank",
                                  options=oddling.RunOptions(progress=False))
            c = result.chosen
            params = ", ".join(f"{k}={v}" for k, v in c.params.items())
            default = default_holdout(result)
            line = (f"| {name} | `{c.representation}` + `{c.detector}`{f' ({params})' if params else ''} | "
                    f"{result.holdout_auroc:.3f} | {'n/a' if default is None else f'{default:.3f}'} | "
                    f"{len(result.leaderboard)} |")
            print(line, flush=True)
            lines.append(line)
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        args.out.write_text(text)


if __name__ == "__main__":
    main()
