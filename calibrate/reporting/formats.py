"""How the report writes values (stage 9): percentages, hours and settings as text, and
numbers as JSON-safe values. Shared by `build` (its verdict sentences and tables of
records) and `render` (the pages and summary.json)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd


def pct(x: Any) -> str:
    """A share as a percentage with one decimal ("n/a" when undefined)."""
    return "n/a" if x is None or x != x else f"{100 * float(x):.1f}%"


def hours(x: Any) -> str:
    """A delay in whole hours (blank when undefined)."""
    return "" if x is None or x != x else f"{float(x):.0f} h"


def num(x: Any) -> str:
    """A rate with two decimals ("n/a" when undefined)."""
    return "n/a" if x is None or x != x else f"{float(x):.2f}"


def show(v: Any) -> str:
    """A setting or provenance value as words (lists joined, mappings as "key: value")."""
    if isinstance(v, float):
        return "none" if math.isinf(v) else f"{v:.4g}"
    if isinstance(v, list | tuple):
        return ", ".join(show(x) for x in v) or "(all)"
    if isinstance(v, Mapping):  # e.g. the provenance's goal and figures: words, not a dict
        return "; ".join(f"{str(k).replace('_', ' ')}: "
                         + (f"({show(x)})" if isinstance(x, Mapping) else show(x))
                         for k, x in v.items()) or "(none)"
    if v is None:
        return "none"
    return str(v)


def finite(x: float) -> float | None:
    """`x` as a float, None when it is None or not finite (JSON has no infinity)."""
    return float(x) if x is not None and math.isfinite(x) else None


def plain(v: Any) -> Any:
    """A JSON-safe value: numpy scalars as Python ones, non-finite floats as None,
    timestamps as ISO-8601 UTC text (`json.dumps(..., default=plain)`)."""
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, pd.Timestamp):
        return v.strftime("%Y-%m-%dT%H:%M:%SZ")
    return v
