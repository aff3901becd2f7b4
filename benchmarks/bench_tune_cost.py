"""What `oddling tune` costs with its default grid, against the tune it replaced, in one run.

    python benchmarks/bench_tune_cost.py --out benchmarks/TUNE_COST.md        # about an hour on 2 cores
    python benchmarks/bench_tune_cost.py --quick                             # the small case only

Cases (tests/tune_cases.py's brick: 160 px crops of scikit-image's brick photograph, small drawn
scratches and blobs as defects): 150 references + 90 labelled images, and 1,000 references + 200
labelled images. Each case is tuned
  - by the landed tune before this change ("before": the repository at BEFORE_REVISION, checked out
    into a temporary folder with `git worktree` and run from it, with its own default grid), and
  - by this tune ("now"), and by this tune with `--budget` (is the budget kept within 10%?),
each in a fresh process with a fresh cache folder (every run pays its exports and embeddings), one
after the other on the same machine. Printed per run: wall time, the chosen configuration, its
held-out AUROC, and the grid size. Targets (the tune issue): 1,000 + 200 within 10 minutes; 150 +
90 at most half of before's time; choices and held-out AUROCs no worse than before's. A run over
`--timeout` minutes is stopped and reported as such. Prints figures, never asserts.
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
BEFORE_REVISION = "48596b9"    # main before the calibration, intake and tune issues of this round

RUN = r"""
import json, sys, time, warnings
sys.path.insert(0, {tests!r})
import oddling
from tune_cases import brick_case
warnings.simplefilter("ignore")
folders = brick_case({root!r}, n_reference={n_ref}, n_test={n_test})
kwargs = {{}}
if {budget!r} is not None:
    kwargs["budget_minutes"] = {budget!r}
start = time.perf_counter()
result = oddling.tune(folders["test"], folders["reference"], {bank!r}, options=oddling.RunOptions(progress=False),
                      **kwargs)
seconds = time.perf_counter() - start
c = result.chosen
print("RESULT " + json.dumps({{"seconds": seconds, "chosen": f"{{c.representation}} | {{c.detector}} {{c.params}}",
                               "holdout_auroc": result.holdout_auroc, "grid": len(result.leaderboard)}}))
"""


def run_tune(src: Path, tests: Path, n_ref: int, n_test: int, timeout_min: float, budget: float | None = None) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        code = RUN.format(tests=str(tests), root=str(Path(tmp) / "case"), n_ref=n_ref, n_test=n_test,
                          bank=str(Path(tmp) / "out.bank"), budget=budget)
        env = {**os.environ, "PYTHONPATH": str(src), "ODDLING_CACHE_DIR": str(Path(tmp) / "cache")}
        start = time.perf_counter()
        try:
            done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                                  timeout=60 * timeout_min)
        except subprocess.TimeoutExpired:
            return {"seconds": time.perf_counter() - start, "timed_out": True}
        for line in done.stdout.splitlines():
            if line.startswith("RESULT "):
                return json.loads(line[7:])
        return {"seconds": time.perf_counter() - start, "error": (done.stderr or done.stdout)[-400:]}


def before_checkout(tmp: Path) -> Path:
    folder = tmp / "before"
    subprocess.run(["git", "-C", str(REPO), "worktree", "add", "--detach", str(folder), BEFORE_REVISION],
                   check=True, capture_output=True)
    return folder


def text_of(result: dict) -> str:
    if result.get("timed_out"):
        return f"stopped after {result['seconds'] / 60:.1f} min (over the timeout)"
    if "error" in result:
        return f"failed: {result['error']!r}"
    return (f"{result['seconds'] / 60:.2f} min; chosen {result['chosen']}; holdout AUROC "
            f"{result['holdout_auroc']:.3f}; {result['grid']} configurations")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--quick", action="store_true", help="the 150 + 90 case only")
    parser.add_argument("--timeout", type=float, default=45.0, help="minutes a run may take before it is stopped")
    args = parser.parse_args()
    cases = [(150, 45)] + ([] if args.quick else [(1000, 100)])
    lines: list[str] = []

    def say(text: str = "") -> None:
        print(text, flush=True)
        lines.append(text)

    say("# What tune costs: the default grid, before and now")
    say()
    say(f"`python benchmarks/bench_tune_cost.py{' --quick' if args.quick else ''}`; {os.cpu_count()} cores, "
        f"{platform.processor() or platform.machine()}, Python {platform.python_version()}; before = the repository "
        f"at {BEFORE_REVISION}; each run in a fresh process with a fresh cache folder; brick case of "
        "tests/tune_cases.py (normal and defect labelled images in equal numbers).")
    say()
    with tempfile.TemporaryDirectory() as tmp:
        before = before_checkout(Path(tmp))
        try:
            for n_ref, n_test in cases:
                label = f"{n_ref} references + {2 * n_test} labelled images"
                old = run_tune(before / "src", before / "tests", n_ref, n_test, args.timeout)
                new = run_tune(REPO / "src", REPO / "tests", n_ref, n_test, args.timeout)
                say(f"## {label}")
                say()
                say(f"- before: {text_of(old)}")
                say(f"- now: {text_of(new)}")
                if "holdout_auroc" in new and "holdout_auroc" in old:
                    say(f"- now / before time: {new['seconds'] / old['seconds']:.2f}x; held-out AUROC now "
                        f"{new['holdout_auroc']:.3f} against {old['holdout_auroc']:.3f}")
                budget = max(0.5, round(new.get("seconds", 60) / 60 / 2, 1))
                capped = run_tune(REPO / "src", REPO / "tests", n_ref, n_test, args.timeout, budget)
                if "seconds" in capped and "error" not in capped:
                    ratio = capped["seconds"] / (60 * budget)
                    say(f"- now with --budget {budget} (half of its unbounded time): {text_of(capped)}; wall time "
                        f"{ratio:.2f}x the budget {'[MET]' if ratio <= 1.1 else '[NOT MET]'} (target: within 10%)")
                if n_ref == 1000 and "seconds" in new and "error" not in new and not new.get("timed_out"):
                    say(f"- target 1,000 + 200 within 10 minutes: {new['seconds'] / 60:.2f} min "
                        f"{'[MET]' if new['seconds'] <= 600 else '[NOT MET]'}")
                if n_ref == 150 and "holdout_auroc" in new and "holdout_auroc" in old:
                    say(f"- target 150 + 90 at most half of before's time: {new['seconds'] / old['seconds']:.2f}x "
                        f"{'[MET]' if new['seconds'] <= 0.5 * old['seconds'] else '[NOT MET]'}")
                say()
        finally:
            subprocess.run(["git", "-C", str(REPO), "worktree", "remove", "--force", str(before)], capture_output=True)
    if args.out:
        args.out.write_text("\n".join(lines) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
