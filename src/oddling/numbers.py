"""Numbers for JSON output. Standard library only: modules that only compute (metrics, audits)
import this without pulling in the embedding runner and torch."""
from __future__ import annotations

import math


def json_number(value: float | None, digits: int = 6) -> float | None:
    """Rounded float for JSON (stable bytes across runs), None for missing/inf/NaN."""
    if value is None or not math.isfinite(value):
        return None
    return round(float(value), digits)


__all__ = ["json_number"]
