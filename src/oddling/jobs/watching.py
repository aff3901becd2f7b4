"""watch: score images as they land in a folder, log each one once, and warn when the stream shifts.

Polling, no inotify: every `poll_seconds` the folder is walked (as `score` walks it: hidden files and
bank folders left out). A file is complete, and scored, once its size and modification time are the
same in two polls in a row and it was last modified at least `settle_seconds` ago; a file renamed
into place (written elsewhere, then moved in) is taken at the second poll that sees it. Every file
is logged (unreadable and non-image files with their status); a content hash already scored from
this folder's watcher is never scored again, and the log is read at start, so a restarted watcher
goes on where it stopped. A file with the content of an earlier one but a new name gets a row
`skipped: same content as a file scored before` and no score.
"""
from __future__ import annotations

import collections
import os
import signal
import sys
import threading
import time
from pathlib import Path

import numpy as np

from oddling.data.intake import IntakeError, check_type, display_path, sha256_file, walk
from oddling.embedding.options import RunOptions
from oddling.errors import OddlingError
from oddling.jobs.rates import check_target_rate
from oddling.jobs.reading import folder

DUPLICATE_STATUS = "skipped: same content as a file scored before"


def _echo(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


class Watcher:
    """Score files as they arrive in `incoming_dir` against `bank`.

    >>> watcher = oddling.Watcher("incoming/", "parts.bank")          # doctest: +SKIP
    >>> watcher.run(max_files=100)                                     # doctest: +SKIP

    `log`: True (default) for the bank's log `<bank>.log.sqlite`, a path, or None for none (then
    restarts cannot resume). `move_flagged`: folder flagged files are moved into (relative paths
    kept). `drift_every`: run the shift test after every N scored images (0: never) over the last
    `drift_window` images scored by this watcher. `echo`: where messages go (stderr by default).
    """

    def __init__(self, incoming_dir, bank, *, log=True, move_flagged=None, poll_seconds: float = 2.0,
                 settle_seconds: float = 1.0, drift_every: int = 100, drift_window: int = 200,
                 drift_permutations: int = 500, target_fpr: float | None = None, options: RunOptions | None = None,
                 echo=_echo):
        from oddling.jobs.reading import load_bank_representation
        from oddling.jobs.scoring import as_bank, require_flagging
        from oddling.embedding.cache import open_cache
        from oddling.logbook.records import new_request_id
        from oddling.logbook.store import bank_fingerprint, default_log_path, ScoreLog

        self.incoming = folder(incoming_dir, "incoming folder")
        self.bank = as_bank(bank)
        for name, value, low in (("poll_seconds", poll_seconds, 0), ("settle_seconds", settle_seconds, 0),
                                 ("drift_every", drift_every, 0), ("drift_window", drift_window, 2),
                                 ("drift_permutations", drift_permutations, 19)):
            if isinstance(value, bool) or not isinstance(value, (int, float)) or value < low:
                raise OddlingError(f"{name} must be a number >= {low}, got: {value!r}")
        self.poll_seconds, self.settle_seconds = float(poll_seconds), float(settle_seconds)
        self.drift_every, self.drift_window, self.drift_permutations = int(drift_every), int(drift_window), int(
            drift_permutations)
        self.target_fpr = check_target_rate(target_fpr) if target_fpr is not None else None
        require_flagging(self.bank, self.target_fpr, "watch")
        self.options = options or RunOptions(progress=False)
        self.echo = echo
        self.move_flagged = Path(move_flagged) if move_flagged is not None else None
        if self.move_flagged is not None:
            if self.move_flagged.exists() and not self.move_flagged.is_dir():
                raise OddlingError(f"--move-flagged {self.move_flagged} is not a folder")
            self.move_flagged.mkdir(parents=True, exist_ok=True)
        if self.drift_every and self.bank.features is None:
            self.echo(f"note: the shift test needs the references' feature vectors, which this {self.bank.detector.name} "
                      "bank does not keep; no shift test will run")
            self.drift_every = 0
        if log is True:
            if self.bank.path is None:
                raise OddlingError("the default log sits beside the bank folder; this bank is not saved: give a log path")
            log = default_log_path(self.bank.path)
        self.log = ScoreLog(log, bank_path=self.bank.path) if log not in (None, False) else None
        self.fingerprint = bank_fingerprint(self.bank)
        self.run_id = new_request_id()
        self.representation = load_bank_representation(self.bank, self.options)
        self.cache = open_cache(self.representation, self.options)
        # What the log says this bank's watchers have already done.
        self._seen_hashes: set[str] = set()
        self._seen_pairs: set[tuple[str, str]] = set()
        self._seen_names: set[str] = set()
        if self.log is not None:
            for row in self.log.rows(bank=self.fingerprint, source="watch"):
                if row.sha256:
                    self._seen_hashes.add(row.sha256)
                    self._seen_pairs.add((row.sha256, row.name))
                else:
                    self._seen_names.add(row.name)
        self._pending: dict[Path, tuple[int, int]] = {}   # path -> (size, mtime_ns) at the last poll
        self._done: dict[Path, tuple[int, int]] = {}      # path -> signature when it was handled
        self._window: collections.deque = collections.deque(maxlen=self.drift_window)
        self._since_check = 0
        self._stop = threading.Event()
        self.drift_results: list[dict] = []
        self.n_scored = self.n_logged = self.n_flagged = self.n_moved = 0
        self._log_files = ({Path(os.path.abspath(self.log.path)).with_name(self.log.path.name + s) for s in ("", "-wal", "-shm", "-journal")}
                           if self.log is not None else set())

    # -- one poll --

    def _signature(self, path: Path) -> tuple[int, int] | None:
        try:
            info = os.stat(path)
        except OSError:
            try:
                info = os.lstat(path)
            except OSError:
                return None   # gone between the walk and now
        return info.st_size, info.st_mtime_ns

    def _complete(self, paths: list[Path]) -> list[Path]:
        """The files that have stopped changing: same signature as at the last poll, settled long enough."""
        now = time.time_ns()
        ready, pending = [], {}
        for path in paths:
            sig = self._signature(path)
            if sig is None or self._done.get(path) == sig:
                continue
            if self._pending.get(path) == sig and (now - sig[1]) >= self.settle_seconds * 1e9:
                ready.append(path)
            else:
                pending[path] = sig
        self._pending = pending
        return ready

    def poll_once(self) -> list:
        """Walk the folder once and score every file that is complete and not done before; the new
        rows (ScoreRow, paths relative to the incoming folder), in the order scored."""
        from oddling.embedding.runner import embed_files
        from oddling.jobs.scoring import rows_from_embedded
        from oddling.logbook.records import log_rows
        from oddling.reporting.results import ScoreRow

        exclude = tuple(p for p in (self.move_flagged, self.bank.path) if p is not None)
        try:
            found = walk(self.incoming, exclude=exclude).paths
        except IntakeError as exc:
            raise OddlingError(exc.status) from exc
        found = [p for p in found if Path(os.path.abspath(p)) not in self._log_files]
        ready = self._complete(found)
        if not ready:
            return []
        to_score, early = [], []   # early: rows decided without the network (duplicates, refused types)
        signatures = {p: self._signature(p) for p in ready}
        batch_hashes: set[str] = set()
        for path in ready:
            rel = path.relative_to(self.incoming).as_posix()
            name = display_path(rel)
            try:
                check_type(path)
                digest = sha256_file(path)
            except IntakeError as exc:
                self._done[path] = signatures[path]
                if name not in self._seen_names:
                    early.append(ScoreRow(path=rel, status=exc.status))
                    self._seen_names.add(name)
                continue
            except OSError:
                continue   # vanished or unreadable right now: tried again at the next poll
            if digest in self._seen_hashes or digest in batch_hashes:
                self._done[path] = signatures[path]
                if (digest, name) not in self._seen_pairs:
                    early.append(ScoreRow(path=rel, status=DUPLICATE_STATUS, sha256=digest))
                    self._seen_pairs.add((digest, name))
                continue
            batch_hashes.add(digest)
            to_score.append(path)
        rows = []
        embedded = None
        if to_score:
            embedded = embed_files(self.incoming, to_score, self.representation, batch_size=self.options.batch_size,
                                   workers=self.options.workers, progress=False, desc="watching", cache=self.cache)
            rows, _ = rows_from_embedded(self.bank, embedded, self.target_fpr)
        logged = log_rows(rows + early, source="watch", bank_fp=self.fingerprint, request=self.run_id,
                          root=self.incoming)
        for row, entry in zip(rows, logged):
            if row.flagged and self.move_flagged is not None:
                target = self._move(self.incoming / row.path, row.path)
                if target is not None:
                    entry.path = display_path(os.path.abspath(target))
        if self.log is not None and logged:
            self.log.append(logged)
        for path in to_score:
            self._done[path] = signatures[path]
        for row in rows:
            if row.sha256:
                self._seen_hashes.add(row.sha256)
                self._seen_pairs.add((row.sha256, display_path(row.path)))
            else:
                self._seen_names.add(display_path(row.path))
        self.n_logged += len(logged)
        scored = [r for r in rows if r.score is not None]
        self.n_scored += len(scored)
        self.n_flagged += sum(bool(r.flagged) for r in scored)
        for row in scored:
            flag = "FLAGGED" if row.flagged else "ok"
            self.echo(f"{flag:8s} {row.score:.4f}  p={row.p_value:.4g}  {display_path(row.path)}")
        for row in rows + early:
            if row.score is None:
                self.echo(f"{'-':8s} {'':6s}  {'':8s}  {display_path(row.path)}: {row.status}")
        if embedded is not None and self.drift_every:
            by_path = {r.path: r for r in rows}
            for rec in embedded.ok_records:
                self._window.append((embedded.embeddings[rec.row], by_path[rec.path].score))
                self._since_check += 1
                if self._since_check >= self.drift_every and len(self._window) >= 2:
                    self._check_drift()
                    self._since_check = 0
        return rows + early

    def _move(self, source: Path, rel: str) -> Path | None:
        target = self.move_flagged / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        stem, suffix, n = target.stem, target.suffix, 1
        while target.exists():
            target = target.with_name(f"{stem}-{n}{suffix}")
            n += 1
        try:
            os.replace(source, target)
        except OSError as exc:
            self.echo(f"warning: could not move flagged {display_path(rel)} to {display_path(str(target))}: "
                      f"{exc.strerror or exc}")
            return None
        self.n_moved += 1
        return target

    def _check_drift(self) -> dict:
        from oddling.evaluation.shift import flagged_share_test, mmd_permutation_test, shift_verdict

        features = np.stack([v for v, _ in self._window]).astype(np.float32)
        scores = [s for _, s in self._window]
        cutoff = self.bank.threshold(self.target_fpr).cutoff
        rate = self.target_fpr or self.bank.target_fpr
        n_flagged = sum(s > cutoff for s in scores)
        mmd = mmd_permutation_test(features, self.bank.features, n_permutations=self.drift_permutations, seed=0)
        share = flagged_share_test(n_flagged, len(scores), rate)
        result = {"n_window": len(scores), "mmd_p_value": mmd["p_value"], "n_flagged": n_flagged,
                  "flagged_share": share["flagged_share"], "expected_share": rate,
                  "binomial_p_value": share["binomial_p_value"],
                  "shift": shift_verdict(mmd["p_value"], share["binomial_p_value"])}
        self.drift_results.append(result)
        if result["shift"]:
            self.echo(f"WARNING: SHIFT over the last {len(scores)} images: they differ from the references "
                      f"(MMD permutation p-value {mmd['p_value']:.4f}; flagged {n_flagged} = "
                      f"{share['flagged_share']:.3f} against {rate:g} expected, binomial p-value "
                      f"{share['binomial_p_value']:.4g}). Check the camera, the lighting or the product.")
        else:
            self.echo(f"shift check over the last {len(scores)} images: no shift (MMD p {mmd['p_value']:.4f}, "
                      f"flagged share {share['flagged_share']:.3f})")
        return result

    # -- the loop --

    def stop(self) -> None:
        """Ask `run` to return after the poll under way (safe from another thread or a signal handler)."""
        self._stop.set()

    def run(self, *, max_files: int | None = None, max_polls: int | None = None,
            max_seconds: float | None = None) -> dict:
        """Poll until stopped (Ctrl-C, SIGTERM, `stop()`) or a bound is reached: `max_files` logged,
        `max_polls` polls, `max_seconds` elapsed. Returns the summary."""
        started = time.monotonic()
        polls = 0
        previous = None
        if threading.current_thread() is threading.main_thread():
            previous = signal.signal(signal.SIGTERM, lambda *_: self.stop())
        try:
            while not self._stop.is_set():
                self.poll_once()
                polls += 1
                if ((max_files is not None and self.n_logged >= max_files) or
                        (max_polls is not None and polls >= max_polls) or
                        (max_seconds is not None and time.monotonic() - started >= max_seconds)):
                    break
                self._stop.wait(self.poll_seconds)
        except KeyboardInterrupt:
            self.echo("Stopping (Ctrl-C).")
        finally:
            if previous is not None:
                signal.signal(signal.SIGTERM, previous)
            if self.cache is not None:
                self.cache.flush()
        return self.summary() | {"polls": polls}

    def summary(self) -> dict:
        return {"incoming": str(self.incoming), "bank": str(self.bank.path) if self.bank.path else None,
                "log": str(self.log.path) if self.log is not None else None, "n_logged": self.n_logged,
                "n_scored": self.n_scored, "n_flagged": self.n_flagged, "n_moved": self.n_moved,
                "shift_checks": len(self.drift_results), "shifts": sum(r["shift"] for r in self.drift_results)}

    def close(self) -> None:
        if self.cache is not None:
            self.cache.flush()
        if self.log is not None:
            self.log.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
