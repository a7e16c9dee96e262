"""Load hourly history, fill gaps, roll measures up to each level, compute metrics.

Pipeline stage 2. Everything downstream works on `History`: one `LevelSeries` per
level, each holding (series x hours) float64 numpy arrays on one common UTC grid.

Gap filling is causal: a missing hour (or blank cell) is filled from earlier hours
only, so the value at hour t, and every roll-up and metric above it, is what an online
detector has at hour t. Fill rules: `zero` (nothing happened) and `carry_forward`
(the last known value; `interpolate` is its old name, still accepted).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from pandas.api.types import union_categoricals

from calibrate.errors import InputError
from calibrate.formulas import parse_formula
from calibrate.inputs.sources import reader_for
from calibrate.inputs.workspace import Workspace

HOUR_NS = 3_600_000_000_000
MAX_HOURS = 24 * 366 * 10  # a longer grid is almost surely a mistyped year
# Largest measure value accepted. Hourly counts and amounts stay far below it, and above
# it float64 (exact to 2**53, about 9.007e15) no longer holds whole units, so sums up the
# levels would round; a larger value is a damaged or mis-scaled row. Bounded values keep
# every roll-up sum finite (1e15 times any feasible row count is far below 1.8e308).
MAX_VALUE = 1e15
# After the date part, an offset is 'Z' or +HH[:MM] / -HH[:MM] at the end of the text.
_OFFSET = r"(?:[Zz]|[+-]\d\d(?::?\d\d)?)\s*$"


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
        metric name -> (n_series, n_hours) float64; measures summed from the gap-filled
        rows, derived metrics recomputed from the summed measures; NaN where undefined
        (0/0).
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
        Per base series (key columns) and measure, number of hours filled (missing
        rows and blank cells).
    source_hash : str
        SHA-256 of the input (file bytes, or query text plus rows for SQL).
    n_rows : int
        Number of input rows.
    blank_cells : dict of str to int
        Per measure, input cells that were blank (CSV), null or NaN (Parquet, SQL);
        they are filled like missing hours and counted in `filled` too.
    naive_rows : int
        Input rows whose time had no UTC offset (read as UTC).
    """

    hours: pd.DatetimeIndex
    levels: dict[str, LevelSeries]
    key_columns: tuple[str, ...]
    filled: pd.DataFrame = field(default_factory=pd.DataFrame)
    source_hash: str = ""
    n_rows: int = 0  # input rows read
    blank_cells: dict[str, int] = field(default_factory=dict)
    naive_rows: int = 0

    @property
    def n_hours(self) -> int:
        return len(self.hours)


# ---------------------------------------------------------------- loading (I/O edge)


def load_history(ws: Workspace) -> History:
    """Read, validate, gap-fill and roll up the workspace's history.

    Parameters
    ----------
    ws : Workspace
        Gives the source, measures (with fill rules, see the module docstring),
        derived metrics and levels.

    Returns
    -------
    History

    Raises
    ------
    InputError
        Naming the file (or query), row (header = row 1 for CSV) and column of the
        first problem: missing column, unparseable or off-the-hour time, duplicate
        (series, hour), non-numeric or negative measure, empty input.
    """
    src = ws.history
    if src.path is not None:
        name = _display(Path(src.path), ws.root)
    else:
        name = f"{ws.file.name} [history] query"
    reader = reader_for(src, name)
    columns = [src.time_column, *src.key_columns, *ws.measures]
    rows = RowParser(ws, reader.name, reader.first_row)
    for chunk in reader.read(src, columns):
        rows.add(chunk)
    return rows.finish(source_hash=reader.digest())


def _display(path: Path, root: Path) -> str:
    try:
        return str(path.relative_to(root))
    except ValueError:
        return str(path)


# ---------------------------------------------------------------- row validation


class RowParser:
    """Validates chunks of rows and keeps them compactly (hour numbers, categorical keys,
    float64 measures) until `finish` builds the `History`."""

    def __init__(self, ws: Workspace, name: str, first_row: int):
        self.ws = ws
        self.name = name
        self.first_row = first_row
        self.n_rows = 0
        self.hours: list[np.ndarray] = []
        self.keys: dict[str, list[pd.Categorical]] = {k: [] for k in ws.history.key_columns}
        self.values: dict[str, list[np.ndarray]] = {m: [] for m in ws.measures}
        self.blank_cells = dict.fromkeys(ws.measures, 0)
        self.naive_rows = 0

    def at(self, pos: int, column: str) -> str:
        """Location of chunk-relative row `pos` in messages."""
        return f"{self.name} row {self.n_rows + pos + self.first_row} column '{column}'"

    def add(self, chunk: pd.DataFrame) -> None:
        """Validate one chunk (columns: time, keys, measures) and keep its rows."""
        src = self.ws.history
        self.hours.append(self._hours(chunk[src.time_column], src.time_column))
        for k in src.key_columns:
            self.keys[k].append(self._key(chunk[k], k))
        for m in self.ws.measures:
            self.values[m].append(self._measure(chunk[m], m))
        self.n_rows += len(chunk)

    def _hours(self, col: pd.Series, column: str) -> np.ndarray:
        if isinstance(col.dtype, pd.DatetimeTZDtype):
            ts = col.dt.tz_convert("UTC")
        elif pd.api.types.is_datetime64_dtype(col.dtype):
            ts = col.dt.tz_localize("UTC")
            self.naive_rows += int(col.notna().sum())
        elif pd.api.types.is_numeric_dtype(col.dtype) and len(col):
            raise InputError(
                self.at(0, column), f"hour {col.iloc[0]!r} is a number, not an ISO-8601 time"
            )
        else:
            ts = pd.to_datetime(col, utc=True, format="ISO8601", errors="coerce")
            self.naive_rows += _naive_count(col)
        bad = np.flatnonzero(ts.isna().to_numpy())
        if len(bad):
            i = int(bad[0])
            raw = col.iloc[i]
            if pd.isna(raw) or str(raw).strip() == "":
                raise InputError(self.at(i, column), "hour is blank")
            raise InputError(
                self.at(i, column),
                f"cannot read hour {str(raw)!r} (expected ISO-8601, e.g. 2024-03-01T13:00:00Z)",
            )
        ns = pd.DatetimeIndex(ts).as_unit("ns").asi8
        off = np.flatnonzero(ns % HOUR_NS)
        if len(off):
            i = int(off[0])
            raise InputError(
                self.at(i, column),
                f"time {str(col.iloc[i])!r} is not on the hour (minutes and seconds must be 0)",
            )
        return ns // HOUR_NS

    def _key(self, col: pd.Series, column: str) -> pd.Categorical:
        cat = pd.Categorical(col)
        missing = np.flatnonzero(cat.codes < 0)
        if len(missing):
            raise InputError(self.at(int(missing[0]), column), "key is blank")
        labels = pd.Index(cat.categories).astype(str)
        if labels.has_duplicates:  # mixed types that print alike, e.g. 1 and "1"
            cat = pd.Categorical(col.astype(str))
            labels = pd.Index(cat.categories)
        else:
            cat = cat.rename_categories(labels)
        blank = np.flatnonzero(labels.str.strip() == "")
        if len(blank):
            first = int(np.flatnonzero(cat.codes == blank[0])[0])
            raise InputError(self.at(first, column), "key is blank")
        nul = np.flatnonzero(labels.str.contains("\x00", regex=False))
        if len(nul):  # a damaged file; the key would make a series of its own
            first = int(np.flatnonzero(cat.codes == nul[0])[0])
            raise InputError(self.at(first, column), "key contains a NUL byte")
        return cat

    def _measure(self, col: pd.Series, column: str) -> np.ndarray:
        if pd.api.types.is_bool_dtype(col.dtype):
            raise InputError(self.at(0, column), f"value {col.iloc[0]!r} is not a number")
        if pd.api.types.is_numeric_dtype(col.dtype):
            vals = col.to_numpy(dtype=np.float64, na_value=np.nan)
        else:
            vals = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
            bad = np.flatnonzero(np.isnan(vals) & col.notna().to_numpy())
            if len(bad):
                i = int(bad[0])
                raise InputError(self.at(i, column), f"value {str(col.iloc[i])!r} is not a number")
        bad = np.flatnonzero(np.isinf(vals))
        if len(bad):
            raise InputError(self.at(int(bad[0]), column), "value is infinite, not a number")
        neg = np.flatnonzero(vals < 0)
        if len(neg):
            i = int(neg[0])
            raise InputError(
                self.at(i, column),
                f"value {vals[i]:g} is negative (measures are counts or amounts; "
                "negative counts cannot be summed up the levels)",
            )
        big = np.flatnonzero(vals > MAX_VALUE)
        if len(big):
            i = int(big[0])
            raise InputError(
                self.at(i, column),
                f"value {vals[i]:g} is above {MAX_VALUE:g}, not a plausible hourly count or "
                "amount (a damaged or mis-scaled row?)",
            )
        self.blank_cells[column] += int(np.isnan(vals).sum())
        return vals  # NaN = blank cell: filled like a missing hour

    def row(self, pos: int) -> int:
        """File row number of global row position `pos`."""
        return pos + self.first_row

    def finish(self, source_hash: str = "") -> History:
        """Assemble the validated rows into a `History` (frees the kept rows)."""
        if self.n_rows == 0:
            raise InputError(self.name, "has no data rows")
        ws = self.ws
        key_columns = ws.history.key_columns
        hours = np.concatenate(self.hours)
        self.hours = []
        categories, codes = [], []
        for k in key_columns:
            cat = union_categoricals(self.keys.pop(k))
            order = np.argsort(np.asarray(cat.categories, dtype=object))
            sorted_cats = np.asarray(cat.categories, dtype=object)[order]
            remap = np.empty(len(order), dtype=np.int64)
            remap[order] = np.arange(len(order))
            categories.append(sorted_cats)
            codes.append(remap[cat.codes])
        series, first = _series_index(codes, [len(c) for c in categories])
        base_codes = np.stack([c[first] for c in codes], axis=1)
        del codes
        n_series = len(first)
        h0 = int(hours.min())
        n_hours = int(hours.max()) - h0 + 1
        hour_idx = hours - h0
        del hours
        if n_hours > MAX_HOURS:
            self._too_long(hour_idx, n_hours, h0)
        cell = series * n_hours + hour_idx
        del series, hour_idx
        self._no_duplicates(cell, n_series, n_hours, h0, base_codes, categories)

        grids: dict[str, np.ndarray] = {}
        filled: dict[str, np.ndarray] = {}
        for m, rule in ws.measures.items():
            grid = np.full(n_series * n_hours, np.nan)
            grid[cell] = np.concatenate(self.values.pop(m))
            grid = grid.reshape(n_series, n_hours)
            filled[m] = np.isnan(grid).sum(axis=1)
            if rule == "zero":
                fill_zero(grid)
            else:  # "carry_forward", or its old name "interpolate"
                fill_carry_forward(grid)
            grids[m] = grid
        del cell

        base_keys = _keys_frame(key_columns, categories, base_codes)
        filled_frame = base_keys.copy()
        for m in ws.measures:
            filled_frame[m] = filled[m].astype(np.int64)
        levels = roll_up(grids, base_codes, categories, ws)
        grid_hours = pd.date_range(
            pd.Timestamp(h0 * HOUR_NS, unit="ns", tz="UTC"), periods=n_hours, freq="h"
        )
        _check_metrics(levels, ws, grid_hours)
        return History(
            hours=grid_hours,
            levels=levels,
            key_columns=tuple(key_columns),
            filled=filled_frame,
            source_hash=source_hash,
            n_rows=self.n_rows,
            blank_cells=dict(self.blank_cells),
            naive_rows=self.naive_rows,
        )

    def _too_long(self, hour_idx: np.ndarray, n_hours: int, h0: int) -> None:
        lo, hi = int(np.argmin(hour_idx)), int(np.argmax(hour_idx))
        first = _iso(h0)
        last = _iso(h0 + n_hours - 1)
        raise InputError(
            f"{self.name} row {self.row(hi)} column '{self.ws.history.time_column}'",
            f"history would span {n_hours} hours ({first} at row {self.row(lo)} to {last}); "
            f"at most {MAX_HOURS} are allowed, check for a mistyped year",
        )

    def _no_duplicates(
        self,
        cell: np.ndarray,
        n_series: int,
        n_hours: int,
        h0: int,
        base_codes: np.ndarray,
        categories: list[np.ndarray],
    ) -> None:
        counts = np.bincount(cell, minlength=n_series * n_hours)
        if counts.max() <= 1:
            return
        dup_cells = np.flatnonzero(counts > 1)
        del counts
        rows = np.flatnonzero(np.isin(cell, dup_cells))
        # the first row repeating an earlier (series, hour) of the file
        seen: dict[int, int] = {}
        for pos in rows.tolist():  # only the rows involved in duplicates
            c = int(cell[pos])
            if c in seen:
                s, h = divmod(c, n_hours)
                label = " / ".join(str(cats[base_codes[s, j]]) for j, cats in enumerate(categories))
                raise InputError(
                    f"{self.name} row {self.row(pos)}",
                    f"duplicate row for series '{label}' at hour {_iso(h0 + h)} "
                    f"(first at row {self.row(seen[c])})",
                )
            seen[c] = pos


def _naive_count(text: pd.Series) -> int:
    """Times whose text names no UTC offset (looked at once per distinct text)."""
    codes, distinct = pd.factorize(text)
    if not len(distinct):
        return 0
    after_date = pd.Series(distinct).astype("str").str.slice(10)
    offset = after_date.str.contains(_OFFSET, regex=True, na=False).to_numpy(dtype=bool)
    return int(((codes >= 0) & ~offset[np.maximum(codes, 0)]).sum())


def _check_metrics(levels: dict[str, LevelSeries], ws: Workspace, hours: pd.DatetimeIndex) -> None:
    """Refuse a watched derived metric that is infinite anywhere or undefined everywhere:
    either way the detector would silently raise nothing for it."""
    for name in ws.metric_names:
        if name not in ws.metrics:
            continue  # a measure: finite and bounded by row validation
        where = f"{ws.file.name} [metrics] key '{name}'"
        defined = False
        for ls in levels.values():
            v = ls.values[name]
            inf = np.argwhere(np.isinf(v))
            if len(inf):
                s, h = (int(x) for x in inf[0])
                raise InputError(
                    where,
                    f"formula {ws.metrics[name]!r} gives an infinite value (level "
                    f"{ls.level}, series '{ls.series_label(s)}', hour "
                    f"{hours[h].strftime('%Y-%m-%dT%H:%M:%SZ')}); a watched metric must be finite",
                )
            defined = defined or bool((~np.isnan(v)).any())
        if not defined:
            raise InputError(
                where,
                f"formula {ws.metrics[name]!r} is undefined (0/0 or x/0) at every hour of "
                "every series, so it could never alert; fix the formula or stop watching it",
            )


def _iso(hour_number: int) -> str:
    return pd.Timestamp(hour_number * HOUR_NS, unit="ns", tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ")


def _series_index(codes: list[np.ndarray], sizes: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Series number of each row (series sorted by key) and each series' first row."""
    if np.prod([float(s) for s in sizes]) < 2.0**62:
        combined = np.zeros(len(codes[0]), dtype=np.int64)
        for c, size in zip(codes, sizes, strict=True):
            combined = combined * size + c
        _, first, series = np.unique(combined, return_index=True, return_inverse=True)
    else:  # too many key combinations to pack into one integer
        _, first, series = np.unique(
            np.stack(codes, axis=1), axis=0, return_index=True, return_inverse=True
        )
    return series.reshape(-1).astype(np.int64), first


def _keys_frame(
    columns: Sequence[str], categories: list[np.ndarray], codes: np.ndarray
) -> pd.DataFrame:
    return pd.DataFrame(
        {c: categories[j][codes[:, j]].astype(str) for j, c in enumerate(columns)}
    ).reset_index(drop=True)


# ---------------------------------------------------------------- pure computation


def fill_zero(grid: np.ndarray) -> None:
    """Set missing (NaN) cells to 0, in place."""
    grid[np.isnan(grid)] = 0.0


def fill_carry_forward(grid: np.ndarray) -> None:
    """Fill NaN cells of each row with the row's last known value before them, in place.

    Causal: a filled hour reads only earlier hours, so it is what an online detector
    sees at that hour. Hours before a row's first known value become 0, what a series
    that has not started yet adds to a roll-up; an all-missing row becomes 0.
    """
    gappy = np.flatnonzero(np.isnan(grid).any(axis=1))
    if not len(gappy):
        return
    sub = grid[gappy]
    valid = ~np.isnan(sub)
    prev = np.maximum.accumulate(np.where(valid, np.arange(sub.shape[1]), -1), axis=1)
    last = np.take_along_axis(sub, np.maximum(prev, 0), axis=1)
    grid[gappy] = np.where(valid, sub, np.where(prev >= 0, last, 0.0))


def roll_up(
    grids: dict[str, np.ndarray],
    base_codes: np.ndarray,
    categories: list[np.ndarray],
    ws: Workspace,
) -> dict[str, LevelSeries]:
    """Sum base-series measures to every level and recompute derived metrics there.

    `base_codes` (n_series, n_keys) must be sorted lexicographically, so that the series
    sharing a key prefix are contiguous rows.
    """
    key_columns = ws.history.key_columns
    formulas = {
        name: parse_formula(text, tuple(ws.measures), f"{ws.file.name} [metrics] key '{name}'")
        for name, text in ws.metrics.items()
    }
    levels: dict[str, LevelSeries] = {}
    for level, cols in ws.levels.items():
        k = len(cols)
        change = np.any(base_codes[1:, :k] != base_codes[:-1, :k], axis=1)
        starts = np.concatenate([[0], np.flatnonzero(change) + 1])
        values = {m: np.add.reduceat(g, starts, axis=0) for m, g in grids.items()}
        for name, formula in formulas.items():
            values[name] = formula.evaluate(values)
        keys = _keys_frame(key_columns[:k], categories[:k], base_codes[starts, :k])
        levels[level] = LevelSeries(level=level, key_columns=tuple(cols), keys=keys, values=values)
    return levels

