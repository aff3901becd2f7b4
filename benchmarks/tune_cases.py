"""`oddling tune` with its default grid on the project's labelled cases (tests/tune_cases.py):
scikit-learn's digits (zeros normal), scikit-image's brick with small drawn defects, and an
invented woven fabric. Prints, per case:
  - labelled tune: the chosen configuration and its AUROC on the held-out half (images it did not
    choose on);
  - unlabelled tune (no labelled folder: synthetic anomalies from held-out references): the chosen
    configuration and its bank's AUROC on the SAME held-out half of the labelled images, which it
    never saw (its choice used the references alone);
  - on the same half, the AUROC of the default `oddling fit` (EfficientNet-Lite0 embedding, kNN k=5);
  - the wall time of each tune run.
The README's table comes from this output.

    python benchmarks/tune_cases.py --out benchmarks/TUNE_RESULTS.md     # ~10 minutes on 2 cores
"""
from __future__ import annotations

import argparse
import datetime as dt
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import oddling  # noqa: E402
from oddling.evaluation.metrics import auroc  # noqa: E402
from tune_cases import CASES  # noqa: E402


def holdout_of_bank(bank, test: Path, result) -> float:
    """AUROC of a bank's scores on the labelled tune's held-out half (by relative path)."""
    held = {name for name, inside in zip(result.names, result.choose) if not inside}
    truth = dict(zip(result.names, result.labels))
    rows = [r for r in oddling.score(test, bank, options=oddling.RunOptions(progress=False)).rows
            if r.path in held and r.score is not None]
    return auroc(np.array([truth[r.path] for r in rows]), np.array([r.score for r in rows]))


def describe(trial) -> str:
    params = ", ".join(f"{k}={v}" for k, v in trial.params.items())
    return f"`{trial.representation}` + `{trial.detector}`{f' ({params})' if params else ''}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--out", type=Path, default=None)
    args = parser.parse_args()
    warnings.simplefilter("ignore", oddling.OddlingWarning)
    lines = [f"# oddling tune on the project's cases ({dt.date.today().isoformat()})", "",
             "Every AUROC is measured on the same held-out half of each case's labelled images (images no choice "
             "used); the unlabelled tune never saw any labelled image.", "",
             "| case | labelled tune: chosen | holdout AUROC | time | unlabelled tune: chosen | AUROC (same half) | "
             "time | default's AUROC (same half) | configurations |",
             "| --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    options = oddling.RunOptions(progress=False)
    with tempfile.TemporaryDirectory() as tmp:
        for name, build in CASES.items():
            folders = build(Path(tmp) / name)
            start = time.perf_counter()
            result = oddling.tune(folders["test"], folders["reference"], Path(tmp) / f"{name}.bank", options=options)
            labelled_s = time.perf_counter() - start
            start = time.perf_counter()
            blind = oddling.tune(None, folders["reference"], Path(tmp) / f"{name}.synthetic.bank", options=options)
            blind_s = time.perf_counter() - start
            blind_auc = holdout_of_bank(blind.chosen.bank, folders["test"], result)
            default_bank = oddling.fit(folders["reference"], None, options=options)   # the default `oddling fit`
            default = holdout_of_bank(default_bank, folders["test"], result)
            line = (f"| {name} | {describe(result.chosen)} | {result.holdout_auroc:.3f} | {labelled_s:.0f} s | "
                    f"{describe(blind.chosen)} | {blind_auc:.3f} | {blind_s:.0f} s | "
                    f"{default:.3f} | {len(result.leaderboard)} |")
            print(line, flush=True)
            lines.append(line)
    text = "\n".join(lines) + "\n"
    print(text)
    if args.out:
        args.out.write_text(text)


if __name__ == "__main__":
    main()
