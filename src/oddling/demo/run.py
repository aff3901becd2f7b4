"""`oddling demo`: the whole job on an invented scenario (tiles on a line camera), in one command."""
from __future__ import annotations

import shutil
from pathlib import Path

from oddling import api
from oddling.demo.scene import SceneCounts, generate_scene
from oddling.errors import OddlingError
from oddling.reporting.page import write_report

MARKER = ".oddling-demo"   # says a folder was made by the demo, so --force may clear it


def prepare_folder(root: Path, force: bool) -> None:
    if root.exists() and any(root.iterdir()):
        if not (root / MARKER).is_file():
            raise OddlingError(f"{root} is not empty and was not made by `oddling demo`; choose another folder")
        if not force:
            raise OddlingError(f"{root} holds an earlier demo; pass --force to replace it")
        shutil.rmtree(root)
    root.mkdir(parents=True, exist_ok=True)


def run_demo(root: str | Path, seed: int = 0, force: bool = False, counts: SceneCounts | None = None,
             options: api.RunOptions | None = None, log=print) -> dict:
    """Generate the scene under `root`, then fit, score and evaluate; returns the headline numbers."""
    root = Path(root)
    options = options or api.RunOptions()
    prepare_folder(root, force)
    scene_root = root / "scene"
    log(f"Generating the tile scenario (seed {seed}) in {scene_root} ...")
    scene = generate_scene(scene_root, seed=seed, counts=counts or SceneCounts())
    (root / MARKER).write_text("made by oddling demo\n")
    bank_path = root / "tiles.bank"
    log("Fitting the reference bank ...")
    bank = api.fit(scene_root / "reference", bank_path, options=options)
    if bank.calibration.get("note"):
        log(f"  {bank.calibration['note']}")
    log("Scoring the incoming batch ...")
    scored = api.score(scene_root / "incoming", bank, options=options)
    scores_csv = scored.write_csv(root / "incoming_scores.csv")
    log("Evaluating on the labelled test folder ...")
    evaluation = api.evaluate(scene_root / "test", bank, options=options)
    eval_paths = evaluation.write(root / "evaluation")
    log("Writing the review pages ...")
    incoming_report = write_report(root / "incoming_report.html", scored)
    eval_paths["report"] = write_report(root / "evaluation" / "report.html", evaluation,
                                        bank=bank, scored_root=scene_root / "test")
    m = evaluation.metrics
    return {
        "root": str(root),
        "bank": str(bank_path),
        "incoming_scores": str(scores_csv),
        "incoming_report": str(incoming_report),
        "incoming_truth": str(scene_root / "incoming_truth.csv"),
        "evaluation": {k: str(v) for k, v in eval_paths.items()},
        "n_references": bank.size,
        "target_fpr": bank.target_fpr,
        "incoming": scored.summary(),
        "auroc": m["auroc"],
        "auroc_ci95": m["auroc_ci95"],
        "average_precision": m["average_precision"],
        "at_cutoff": m["at_cutoff"],
        "per_kind_auroc": m["per_kind_auroc"],
        "scene": scene,
    }
