"""Load hourly history, fill gaps, roll measures up to each level, compute metrics.

Pipeline stage 2. Everything downstream works on `History`: one `LevelSeries` per
level, each holding (series x hours) float64 numpy arrays on one common UTC grid.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd


@dataclass
class LevelSeries:
    """All series of one level on the common hour grid.

    Attributes
    ----------
    level : str
        Level name.
    key_columns : tuple of str
        The level's key columns (a prefix of the history's key columns).
    keys : pandas.DataFrame
        One row per series (position = series index), columns `key_columns`, as str.
    values : dict of str to ndarray
        metric name -> (n_series, n_hours) float64; measures summed from the rows,
        derived metrics recomputed from the summed measures; NaN where undefined (0/0).
    """

    level: str
    key_columns: tuple[str, ...]
    keys: pd.DataFrame
    values: dict[str, np.ndarray]

    @property
    def n_series(self) -> int:
        return len(self.keys)

    def series_label(self, i: int) -> str:
        """Human-readable 'a / b / c' label of series i."""
        return " / ".join(str(v) for v in self.keys.iloc[i].tolist())


@dataclass
class History:
    """Validated, gap-filled, rolled-up history.

    Attributes
    ----------
    hours : pandas.DatetimeIndex
        Common hourly UTC grid, first to last hour of the input.
    levels : dict of str to LevelSeries
    key_columns : tuple of str
        Full key columns of the input rows.
    filled : pandas.DataFrame
        Per base series (key columns) and measure, number of hours filled.
    source_hash : str
        SHA-256 of the input (file bytes, or query text plus rows for SQL).
    """

    hours: pd.DatetimeIndex
    levels: dict[str, LevelSeries]
    key_columns: tuple[str, ...]
    filled: pd.DataFrame = field(default_factory=pd.DataFrame)
    source_hash: str = ""

    @property
    def n_hours(self) -> int:
        return len(self.hours)
