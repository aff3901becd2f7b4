"""Has the incoming stream moved away from the references? Shift tests of a batch folder or of logged
images, and their history."""
from __future__ import annotations

import datetime as _dt
import json
import os
from pathlib import Path

import numpy as np

from oddling.bank.store import HISTORY_FILE, Bank, load_bank
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError
from oddling.jobs.maintenance import require_features
from oddling.jobs.reading import embed_folder, folder, load_bank_representation
from oddling.jobs.scoring import as_bank, score_features
from oddling.logbook.store import ScoreLog
from oddling.numbers import json_number


def drift(
    incoming_dir: str | os.PathLike,
    bank: Bank | str | os.PathLike,
    *,
    n_permutations: int = 500,
    seed: int = 0,
    record: bool = True,
    options: RunOptions | None = None,
) -> dict:
    """Has this whole batch moved away from the references?

    Two tests: MMD between the batch's and the bank's features with a permutation p-value
    (Gretton et al. 2012), and the share flagged at the bank's cutoff against its target rate
    (exact binomial test). With `record`, one line per run is appended to the bank's history.
    """
    from oddling.evaluation.shift import flagged_share_test, mmd_permutation_test, shift_verdict

    options = options or RunOptions()
    incoming_dir = folder(incoming_dir, "incoming folder")
    bank = as_bank(bank)
    require_features(bank, "drift")
    rep = load_bank_representation(bank, options)
    embedded = embed_folder(incoming_dir, rep, options, "embedding batch", (bank.path,) if bank.path else ())
    n = len(embedded.embeddings)
    if n < 2:
        raise OddlingError(f"{incoming_dir} has {n} readable images; a shift test needs at least 2")
    mmd = mmd_permutation_test(embedded.embeddings, bank.features, n_permutations=n_permutations, seed=seed)
    _, _, flagged, _ = score_features(bank, embedded.embeddings, groups=embedded.row_hashes)
    share = flagged_share_test(int(flagged.sum()), n, bank.target_fpr)
    shift = shift_verdict(mmd["p_value"], share["binomial_p_value"])
    result = {
        "batch": str(incoming_dir),
        "n_batch": n,
        "n_bank": bank.size,
    } | shift_figures(mmd, share, int(flagged.sum()), shift, n_permutations)
    if record and bank.path is not None:
        record_history(bank, result)
    return result


def drift_over_log(log: ScoreLog, bank, *, last: int | None = None, since: str | None = None,
                   n_permutations: int = 500, seed: int = 0, record: bool = False, options=None,
                   representation=None, cache=None) -> dict:
    """The shift test of `oddling drift` over logged images of this bank: the newest `last` scored
    rows, or those logged since `since` (log time text, see store.parse_time).

    MMD between the logged images' features (distinct contents) and the bank's, and the exact
    binomial test of the share of logged scores above the bank's cutoff; same rule as `drift`.
    """
    from oddling.evaluation.shift import flagged_share_test, mmd_permutation_test, shift_verdict
    from oddling.logbook.records import logged_features
    from oddling.logbook.store import bank_fingerprint

    if (last is None) == (since is None):
        raise OddlingError("give one of --last N or --since TIME")
    options = options or RunOptions()
    require_features(bank, "drift")
    fp = bank_fingerprint(bank)
    rows = log.rows(last=last, since=since, bank=fp, ok_only=True)
    if len(rows) < 2:
        other = log.rows(last=last, since=since, ok_only=True)
        hint = (f"; {len(other)} scored rows there belong to other banks (refitted or replaced banks get a new "
                "fingerprint)" if len(other) > len(rows) else "")
        raise OddlingError(f"log {log.path} has {len(rows)} scored images of this bank in that window; a shift "
                           f"test needs at least 2{hint}")
    if representation is None:
        representation = load_bank_representation(bank, options)
    features, kept = logged_features(rows, representation, options, cache)
    cutoff = bank.threshold().cutoff
    n_flagged = sum(1 for r in rows if r.score is not None and r.score > cutoff)
    share = flagged_share_test(n_flagged, len(rows), bank.target_fpr)
    if len(features) < 2:
        raise OddlingError(f"the features of only {len(features)} of the {len(set(r.sha256 for r in rows))} distinct "
                           "logged images are available (neither in the embedding cache nor in files that still "
                           "exist); a shift test needs at least 2")
    mmd = mmd_permutation_test(features, bank.features, n_permutations=n_permutations, seed=seed)
    shift = shift_verdict(mmd["p_value"], share["binomial_p_value"])
    window = f"last {last}" if last is not None else f"since {since}"
    result = {
        "batch": f"log {log.path} ({window})",
        "log": str(log.path),
        "window": window,
        "first_time": rows[0].time,
        "last_time": rows[-1].time,
        "n_rows": len(rows),
        "n_batch": len(features),
        "n_without_features": len(set(r.sha256 for r in rows if r.sha256)) - len(kept),
        "n_bank": bank.size,
    } | shift_figures(mmd, share, n_flagged, shift, n_permutations)
    if record and bank.path is not None:
        record_history(bank, result)
    return result


def shift_figures(mmd: dict, share: dict, n_flagged: int, shift: bool, n_permutations: int) -> dict:
    """The two tests' figures and the verdict, as a drift result reports them (batch or log)."""
    return {
        "mmd": json_number(float(np.sqrt(max(mmd["mmd2"], 0.0)))),
        "mmd2": json_number(mmd["mmd2"]),
        "mmd_p_value": json_number(mmd["p_value"]),
        "mmd_bandwidth": json_number(mmd["bandwidth"]),
        "n_permutations": n_permutations,
        "n_flagged": n_flagged,
        "flagged_share": json_number(share["flagged_share"]),
        "expected_share": share["expected_share"],
        "binomial_p_value": json_number(share["binomial_p_value"]),
        "shift": bool(shift),
        "rule": "shift when either p-value < 0.025 (0.05 split over the two tests, Bonferroni)",
    }


def record_history(bank: Bank, result: dict) -> None:
    """One line per check in the bank's drift history, with the time."""
    entry = {"time": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()} | result
    with open(Path(bank.path) / HISTORY_FILE, "a", encoding="utf-8") as f:
        f.write(json.dumps(entry, sort_keys=True) + "\n")


def drift_history(bank_path: str | os.PathLike) -> list[dict]:
    bank = load_bank(bank_path)
    path = Path(bank_path) / HISTORY_FILE
    if not path.is_file():
        raise OddlingError(f"{bank_path} has no drift history yet; run `oddling drift INCOMING --bank {bank_path}`")
    entries = []
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        if not line.strip():
            continue
        try:
            entries.append(json.loads(line))
        except json.JSONDecodeError:
            raise OddlingError(f"{path} line {number} is not JSON; remove or repair that line") from None
    if not entries:
        raise OddlingError(f"{path} holds no checks yet; run `oddling drift INCOMING --bank {bank_path}`")
    return [e | {"expected_share": e.get("expected_share", bank.target_fpr)} for e in entries]
