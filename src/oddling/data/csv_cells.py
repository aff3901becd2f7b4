"""Cells of the CSVs oddling writes (scores, log exports) and reads back (decisions): file names as
display text, neutralised against formula injection, and RFC 4180 quoting."""
from __future__ import annotations

import re

from oddling.data.intake import display_path, path_from_display

# OWASP "CSV Injection": a spreadsheet runs a cell starting with = + - @ TAB or CR as a formula.
# Such a text cell gets one leading single quote. Cells that already start with single quotes
# followed by one of those get one more, so the rule stays reversible (see path_from_cell).
FORMULA_START = re.compile("^'*[=+\\-@\t\r]")
_QUOTED_FORMULA = re.compile("^'+[=+\\-@\t\r]")


def csv_text(value: str) -> str:
    """A text cell of a CSV (path, nearest, health, status, kind; never a number): the path as
    intake.display_path writes it, then neutralised against formula injection."""
    text = display_path(value)
    return "'" + text if FORMULA_START.match(text) else text


def path_from_cell(cell: str) -> str:
    """The inverse of csv_text: the str that opens the real file, from a path cell of the scores
    CSV or the page's decisions export (one leading ' dropped, then intake.path_from_display)."""
    if _QUOTED_FORMULA.match(cell):
        cell = cell[1:]
    return path_from_display(cell)


def csv_field(cell: str) -> str:
    """RFC 4180 quoting: a cell holding a comma, a double quote, CR or LF is quoted, quotes doubled.

    csv.writer's QUOTE_MINIMAL quotes only the characters of its line terminator ("\\n" here), so
    a lone "\\r" in a file name went out unquoted and split the row for every reader.
    """
    if any(c in cell for c in ',"\r\n'):
        return '"' + cell.replace('"', '""') + '"'
    return cell
