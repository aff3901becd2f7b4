"""Numbers as oddling writes them: rounded for JSON, and counts in words ("2 references"). Standard
library only: modules that only compute (metrics, audits) import this without pulling in torch."""
from __future__ import annotations

import math


def json_number(value: float | None, digits: int = 6) -> float | None:
    """Rounded float for JSON (stable bytes across runs), None for missing/inf/NaN."""
    if value is None or not math.isfinite(value):
        return None
    return round(float(value), digits)


def plural(n: int, word: str, many: str | None = None) -> str:
    """"1 reference", "2 references": the count with the word in the right number."""
    return f"{n} {word if n == 1 else (many or word + 's')}"


__all__ = ["json_number", "plural"]
