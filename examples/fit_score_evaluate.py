"""Fit a bank, score a folder and evaluate, with oddling's Python API.

Run from the repository root after `pip install .`:
    python examples/fit_score_evaluate.py
It generates the demo's invented tile scenario into ./example-run/ first.
"""
from pathlib import Path

import oddling
from oddling.demo.scene import SceneCounts, generate_scene

root = Path("example-run")
if not root.exists():
    generate_scene(root, seed=1, counts=SceneCounts(reference=100, incoming_normal=20, incoming_anomalous=6,
                                                    test_normal=30, test_per_kind=5))

bank = oddling.fit(root / "reference", root / "tiles.bank", k=5, target_fpr=0.05, force=True)
print(f"bank: {bank.size} references, cutoff {bank.calibration['cutoff']}")

result = oddling.score(root / "incoming", bank)
for row in result.rows[:5]:
    print(f"{row.path:24s} score {row.score:.4f}  p {row.p_value:.3f}  flagged {row.flagged}  "
          f"nearest {row.nearest[0]}")

evaluation = oddling.evaluate(root / "test", bank)
m = evaluation.metrics
print(f"AUROC {m['auroc']:.3f} (95% CI {m['auroc_ci95'][0]:.3f}-{m['auroc_ci95'][1]:.3f})")
print("per kind:", m["per_kind_auroc"])
