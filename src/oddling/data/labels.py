"""Ground-truth labels for a test folder: from class subfolders, or from a CSV of path,label."""
from __future__ import annotations

import csv
from collections.abc import Iterable
from pathlib import Path

from oddling.errors import OddlingError

# The documented words (README: label `normal`/`anomaly` or `0`/`1`), compared trimmed and
# case-insensitively. Nothing else is guessed: a typo or a word like "bad" is an error, not an anomaly.
NORMAL_WORDS = frozenset({"normal", "0"})
ANOMALY_WORDS = frozenset({"anomaly", "anomalous", "1"})
ROWS_SHOWN = 5   # offending rows named in an error message; the count says how many there are


def _is_normal(folder: str, normal_labels: tuple[str, ...]) -> bool:
    return folder.casefold() in {name.casefold() for name in normal_labels}


def label_from_folder(rel_path: str, normal_labels: tuple[str, ...]) -> tuple[int, str] | None:
    """(label, kind) from the first folder of a relative path; None for files at the top level.

    A folder whose name equals one of `normal_labels` ignoring case (`Normal/`, `NORMAL/`) is
    normal; any other is an anomaly kind named after it."""
    parts = rel_path.split("/")
    if len(parts) < 2:
        return None
    folder = parts[0]
    return (0, "normal") if _is_normal(folder, normal_labels) else (1, folder)


def class_folders(rel_paths: Iterable[str], normal_labels: tuple[str, ...],
                  where: str | None = None) -> tuple[list[str], list[str]]:
    """(the top-level folders taken as normal, notes) for the relative paths of a test folder.

    Checks the class folders label_from_folder reads: two whose names differ only in case
    (`normal/` and `Normal/`, `crack/` and `Crack/`) raise OddlingError naming both, since which
    class was meant cannot be told (and a case-insensitive disk would merge them). The one note,
    if any, names the normal folders whose name matches a normal label only when case is ignored.
    """
    folders = sorted({p.split("/")[0] for p in rel_paths if "/" in p})
    by_fold: dict[str, list[str]] = {}
    for name in folders:
        by_fold.setdefault(name.casefold(), []).append(name)
    clashes = [names for names in by_fold.values() if len(names) > 1]
    if clashes:
        shown = "; ".join(" and ".join(f"{n}/" for n in names) for names in clashes[:ROWS_SHOWN])
        raise OddlingError(f"{where + ' has' if where else 'found'} class folders whose names differ only in case: "
                           f"{shown}; labels come from folder names, so rename or merge them into one")
    normal = [name for name in folders if _is_normal(name, normal_labels)]
    by_case = [name for name in normal if name not in normal_labels]
    notes = []
    if by_case:
        notes.append(f"{'folder' if len(by_case) == 1 else 'folders'} {', '.join(n + '/' for n in by_case)} taken as "
                     f"normal (--normal-label {', '.join(normal_labels)}, compared ignoring case)")
    return normal, notes


def _problems_message(path: Path, problems: list[str]) -> str:
    shown = "; ".join(problems[:ROWS_SHOWN])
    more = f"; and {len(problems) - ROWS_SHOWN} more" if len(problems) > ROWS_SHOWN else ""
    return (f"{path}: {len(problems)} row{'s' if len(problems) != 1 else ''} with a bad path or label "
            f"(labels are normal/anomaly/anomalous or 0/1): {shown}{more}")


def read_labels_csv(path: Path) -> dict[str, tuple[int, str]]:
    """path,label[,kind] rows -> {relative POSIX path: (label, kind)}; label 1 is anomalous.

    label is normal, anomaly, anomalous, 0 or 1 (trimmed, any case); kind defaults to "anomalous".
    Paths are relative to the test folder. Raises OddlingError naming the first rows (by line
    number) with an unknown label, an empty path, or a path listed twice with different labels.
    """
    try:
        with open(path, newline="", encoding="utf-8-sig") as f:
            reader = csv.DictReader(f)
            if not reader.fieldnames or not {"path", "label"} <= {(n or "").strip() for n in reader.fieldnames}:
                raise OddlingError(f"{path} must have a header with columns path,label (got {reader.fieldnames})")
            reader.fieldnames = [(n or "").strip() for n in reader.fieldnames]
            labels: dict[str, tuple[int, str]] = {}
            first_line: dict[str, int] = {}
            problems: list[str] = []
            for row in reader:
                line_no = reader.line_num
                raw_path, raw_label = (row.get("path") or "").strip(), row.get("label")
                word = (raw_label or "").strip().lower()
                if not raw_path:
                    problems.append(f"line {line_no}: empty path")
                    continue
                if word in NORMAL_WORDS:
                    found = (0, "normal")
                elif word in ANOMALY_WORDS:
                    found = (1, (row.get("kind") or "").strip() or "anomalous")
                else:
                    problems.append(f"line {line_no}: {raw_path}: unknown label {raw_label!r}")
                    continue
                key = Path(raw_path).as_posix()
                if key in labels and labels[key] != found:
                    problems.append(f"line {line_no}: {raw_path}: labelled again, differently from line "
                                    f"{first_line[key]}")
                    continue
                labels.setdefault(key, found)
                first_line.setdefault(key, line_no)
    except OSError as exc:
        raise OddlingError(f"cannot read labels file {path}: {exc}") from exc
    except (csv.Error, UnicodeDecodeError) as exc:
        raise OddlingError(f"{path} is not a readable UTF-8 CSV file: {exc}") from exc
    if problems:
        raise OddlingError(_problems_message(path, problems))
    return labels


def label_summary(table_paths: Iterable[str], scored_paths: Iterable[str]) -> dict:
    """What a labels table and the files of a test folder leave out of an evaluation.

    `table_paths` are the paths the labels CSV names (read_labels_csv's keys); `scored_paths` the
    relative paths of every file found in the test folder (readable or not). Returns
    {"missing_files": table rows with no such file, "unlabelled": files with no row,
    "n_labelled": files with a row}, lists sorted. Neither list counts in the metrics; the
    caller says so on stderr (describe_label_summary).
    """
    table, scored = set(table_paths), set(scored_paths)
    return {"missing_files": sorted(table - scored), "unlabelled": sorted(scored - table),
            "n_labelled": len(table & scored)}


def describe_label_summary(summary: dict, limit: int = ROWS_SHOWN) -> list[str]:
    """One line per kind of gap in a label_summary, naming the first `limit` paths; [] if none."""
    lines = []
    for key, what in (("missing_files", "labelled in the CSV but not found in the test folder"),
                      ("unlabelled", "found in the test folder but not in the labels CSV (not counted)")):
        paths = summary.get(key) or []
        if paths:
            more = f", and {len(paths) - limit} more" if len(paths) > limit else ""
            lines.append(f"{len(paths)} file{'s' if len(paths) != 1 else ''} {what}: "
                         f"{', '.join(paths[:limit])}{more}")
    return lines
