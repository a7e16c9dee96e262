"""Labelled incidents: load, validate and resolve them onto the history grid.

Pipeline stage 6 (first half). An `Incidents` table holds columns of numpy arrays,
like `Episodes`: level, series index into ``History.levels[level].keys``, metric
("" = any metric), and ``start``/``end`` as hour indices into ``History.hours``
(``end`` exclusive). `load_incidents` reads the CSV contract of docs/detector.md;
`incidents_from_frame` does the same checks on an in-memory frame.

The row/column resolvers here (`FrameRows`, `resolve_series`, `resolve_hours`) are
shared with `calibrate.scoring.alerts_file.episodes_from_alerts_frame`. Row numbers in error
messages count the header as row 1.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calibrate.errors import InputError
from calibrate.inputs.history import History
from calibrate.inputs.workspace import Workspace

INCIDENT_COLUMNS = ("incident_id", "level", "metric", "start", "end")
ANY_METRIC = ""
HOUR = pd.Timedelta(hours=1)


@dataclass
class Incidents:
    """Columns of labelled incidents; all column arrays have the same length.

    Attributes
    ----------
    incident_id : ndarray of object (str)
    level : ndarray of object (str)
    series : ndarray of int64
        Row of ``History.levels[level].keys``.
    metric : ndarray of object (str)
        Metric name, or "" when the incident counts for any metric.
    start, end : ndarray of int64
        Hour indices into ``History.hours``; ``end`` is exclusive.
    note : ndarray of object (str)
    label : ndarray of object (str)
        Human-readable series label ('a / b / c').
    team : ndarray of object (str)
        Owning team ("" until routed, see `calibrate.scoring.matching.route_teams`).
    hours : pandas.DatetimeIndex
        The hour grid the indices refer to (not a column; may be empty).
    """

    incident_id: np.ndarray
    level: np.ndarray
    series: np.ndarray
    metric: np.ndarray
    start: np.ndarray
    end: np.ndarray
    note: np.ndarray
    label: np.ndarray
    team: np.ndarray
    hours: pd.DatetimeIndex = field(default_factory=lambda: pd.DatetimeIndex([], tz="UTC"))

    _COLUMNS = (
        "incident_id", "level", "series", "metric", "start", "end", "note", "label", "team",
    )

    def __len__(self) -> int:
        return len(self.start)

    @classmethod
    def make(
        cls,
        level: list[str] | np.ndarray,
        series: list[int] | np.ndarray,
        start: list[int] | np.ndarray,
        end: list[int] | np.ndarray,
        metric: list[str] | np.ndarray | None = None,
        incident_id: list[str] | np.ndarray | None = None,
        team: list[str] | np.ndarray | None = None,
        hours: pd.DatetimeIndex | None = None,
    ) -> Incidents:
        """Build a table from plain lists (missing text columns default to "")."""
        n = len(start)

        def text(v: list[str] | np.ndarray | None, default: str = "") -> np.ndarray:
            return np.array([default] * n if v is None else list(v), dtype=object)

        ids = text(incident_id) if incident_id is not None else np.array(
            [f"I{i + 1}" for i in range(n)], dtype=object
        )
        return cls(
            incident_id=ids,
            level=text(level),
            series=np.asarray(series, dtype=np.int64),
            metric=text(metric),
            start=np.asarray(start, dtype=np.int64),
            end=np.asarray(end, dtype=np.int64),
            note=text(None),
            label=np.array(
                [f"{lv}#{s}" for lv, s in zip(level, series, strict=True)], dtype=object
            ),
            team=text(team),
            hours=hours if hours is not None else pd.DatetimeIndex([], tz="UTC"),
        )

    @classmethod
    def empty(cls) -> Incidents:
        return cls.make([], [], [], [])

    def take(self, index: np.ndarray) -> Incidents:
        """Rows at `index` (integer positions or boolean mask)."""
        cols = {name: getattr(self, name)[index] for name in self._COLUMNS}
        return Incidents(**cols, hours=self.hours)

    def to_frame(self) -> pd.DataFrame:
        """One row per incident; adds start/end times when `hours` is known."""
        df = pd.DataFrame({name: getattr(self, name) for name in self._COLUMNS})
        df = df.rename(columns={"start": "start_hour", "end": "end_hour"})
        if len(self.hours):
            grid = _utc(self.hours)
            df["start"] = grid[0] + self.start * HOUR
            df["end"] = grid[0] + self.end * HOUR
        return df


def load_incidents(ws: Workspace, history: History) -> Incidents:
    """Read and validate the workspace's incidents CSV.

    Parameters
    ----------
    ws : Workspace
        Gives ``ws.incidents.path`` and the known metric names.
    history : History
        Levels, series keys and the hour grid incidents are resolved onto.

    Returns
    -------
    Incidents

    Raises
    ------
    InputError
        Naming file, row (header = row 1) and column of the first problem.
    """
    path = ws.incidents.path
    if path is None:
        raise InputError(f"{ws.file} [incidents]", "no 'path' given for the incidents file")
    df = read_text_csv(Path(path))
    return incidents_from_frame(df, ws, history, str(path))


def read_text_csv(path: Path) -> pd.DataFrame:
    """Read a CSV with every cell as text (blank cells as "")."""
    if not path.is_file():
        raise InputError(str(path), "file not found")
    try:
        return pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(str(path), f"not a readable CSV file ({first})") from None


def incidents_from_frame(
    df: pd.DataFrame, ws: Workspace, history: History, where: str
) -> Incidents:
    """Validate an incidents frame (CSV contract columns) and resolve it.

    Parameters
    ----------
    df : pandas.DataFrame
        Columns incident_id, level, <key columns of each row's level>, metric,
        start, end and optionally note; cells as text or timestamps.
    ws : Workspace
    history : History
    where : str
        Name of the source used in error messages (file path or a description).

    Returns
    -------
    Incidents
    """
    rows = FrameRows(df, where)
    rows.require(INCIDENT_COLUMNS)
    n = len(rows)
    ids = rows.text("incident_id")
    blank = np.flatnonzero(ids == "")
    if len(blank):
        raise InputError(rows.at(blank[0], "incident_id"), "empty; every incident needs an id")
    seen: dict[str, int] = {}
    for pos, iid in enumerate(ids):
        if iid in seen:
            raise InputError(
                rows.at(pos, "incident_id"),
                f"duplicate incident id '{iid}' (first used in row {seen[iid] + 2})",
            )
        seen[iid] = pos

    level, series, label = resolve_series(rows, history)
    metric = resolve_metrics(rows, ws, allow_any=True)
    start, end = resolve_span(rows, history.hours)
    check_overlaps(rows, level, series, metric, start, end)
    note = rows.text("note") if "note" in rows.columns else np.full(n, "", dtype=object)
    return Incidents(
        incident_id=ids,
        level=level,
        series=series,
        metric=metric,
        start=start,
        end=end,
        note=note,
        label=label,
        team=np.full(n, "", dtype=object),
        hours=history.hours,
    )


class FrameRows:
    """A frame of text cells plus the source name, for precise error locations."""

    def __init__(self, df: pd.DataFrame, where: str):
        self.df = df.reset_index(drop=True)
        self.df.columns = [str(c).strip() for c in self.df.columns]
        self.where = where

    def __len__(self) -> int:
        return len(self.df)

    @property
    def columns(self) -> list[str]:
        return list(self.df.columns)

    def at(self, pos: int, column: str) -> str:
        """Location text for the cell at frame position `pos` (header = row 1)."""
        return f"{self.where} row {int(pos) + 2} column '{column}'"

    def require(self, columns: tuple[str, ...] | list[str]) -> None:
        missing = [c for c in columns if c not in self.df.columns]
        if missing:
            # list what was found only for a table of the expected kind: a path that
            # points at some other file must not have its first line echoed
            looks = len(self.columns) > 1 and len(missing) < len(columns)
            found = ", ".join(self.columns) if looks else "none of the expected columns"
            raise InputError(
                f"{self.where} row 1",
                f"missing column(s) {', '.join(repr(c) for c in missing)} (found: {found})",
            )

    def text(self, column: str) -> np.ndarray:
        """Column as stripped text, blanks (and NaN) as ""."""
        col = self.df[column]
        out = np.empty(len(col), dtype=object)
        for i, v in enumerate(col.tolist()):
            out[i] = "" if v is None or (isinstance(v, float) and np.isnan(v)) else str(v).strip()
        return out


def resolve_series(rows: FrameRows, history: History) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Map each row's level and key columns to a series index.

    Returns
    -------
    level : ndarray of object
    series : ndarray of int64
    label : ndarray of object
    """
    level = rows.text("level")
    n = len(level)
    series = np.full(n, -1, dtype=np.int64)
    label = np.full(n, "", dtype=object)
    known = ", ".join(history.levels)
    for name in pd.unique(level):
        pos = np.flatnonzero(level == name)
        if name == "":
            raise InputError(rows.at(pos[0], "level"), f"empty; known levels: {known}")
        if name not in history.levels:
            raise InputError(rows.at(pos[0], "level"), f"unknown level '{name}' (known: {known})")
        ls = history.levels[name]
        cols = list(ls.key_columns)
        for col in cols:
            if col not in rows.columns:
                raise InputError(
                    rows.at(pos[0], col),
                    f"column missing; level '{name}' needs key columns {', '.join(cols)}",
                )
        for col in history.key_columns:
            if col in cols or col not in rows.columns:
                continue
            filled = pos[rows.text(col)[pos] != ""]
            if len(filled):
                raise InputError(
                    rows.at(filled[0], col),
                    f"must be blank for level '{name}' (its key columns are {', '.join(cols)})",
                )
        keys = ls.keys[cols].astype(str).itertuples(index=False, name=None)
        lookup = {tuple(k): i for i, k in enumerate(keys)}
        texts = [rows.text(c)[pos].tolist() for c in cols]
        cells = zip(*texts, strict=True) if cols else iter([()] * len(pos))
        for p, kt in zip(pos, cells, strict=True):
            idx = lookup.get(kt)
            if idx is None:
                col, what = _unknown_key(kt, cols, lookup, name)
                raise InputError(rows.at(p, col), what)
            series[p] = idx
            label[p] = " / ".join(kt)
    return level, series, label


def _unknown_key(
    kt: tuple[str, ...], cols: list[str], lookup: dict[tuple[str, ...], int], level: str
) -> tuple[str, str]:
    """Name the first key column whose prefix matches no series of the level."""
    for depth in range(1, len(cols) + 1):
        prefix = kt[:depth]
        if not any(k[:depth] == prefix for k in lookup):
            where = " / ".join(prefix)
            if kt[depth - 1] == "":
                return cols[depth - 1], f"empty; level '{level}' needs a value here"
            return cols[depth - 1], f"no series '{where}' at level '{level}'"
    return cols[-1], f"no series '{' / '.join(kt)}' at level '{level}'"


def resolve_metrics(rows: FrameRows, ws: Workspace, allow_any: bool) -> np.ndarray:
    """Metric column checked against ``ws.metric_names`` ("" allowed when `allow_any`)."""
    metric = rows.text("metric")
    names = set(ws.metric_names)
    for p, m in enumerate(metric):
        if m == "" and allow_any:
            continue
        if m not in names:
            what = "empty; a metric is required" if m == "" else f"unknown metric '{m}'"
            raise InputError(rows.at(p, "metric"), f"{what} (known: {', '.join(ws.metric_names)})")
    return metric


def resolve_hours(
    rows: FrameRows, column: str, hours: pd.DatetimeIndex, is_end: bool, optional: bool = False
) -> np.ndarray:
    """Parse ISO-8601 UTC hours and return indices into `hours`.

    A start must be a grid hour; an end (exclusive) may also be one hour past the
    last grid hour. Naive times are taken as UTC. With `optional`, blank cells give -1.
    """
    raw = rows.text(column)
    blank = raw == ""
    if blank.any() and not optional:
        raise InputError(
            rows.at(np.flatnonzero(blank)[0], column), "empty; an ISO-8601 UTC hour is required"
        )
    ts = pd.to_datetime(pd.Series(raw), utc=True, errors="coerce", format="ISO8601")
    ts[blank] = pd.NaT
    bad = np.flatnonzero(ts.isna().to_numpy() & ~blank)
    if len(bad):
        raise InputError(
            rows.at(bad[0], column),
            f"cannot read '{raw[bad[0]]}' as an ISO-8601 UTC time (e.g. 2024-03-01T05:00:00Z)",
        )
    off = np.flatnonzero((ts != ts.dt.floor("h")).to_numpy() & ~blank)
    if len(off):
        raise InputError(rows.at(off[0], column), f"'{raw[off[0]]}' is not on the hour")
    grid = _utc(hours)
    if len(grid) == 0:
        raise InputError(rows.at(0, column), "the history has no hours")
    ts = ts.fillna(grid[0])
    idx = np.array((ts - grid[0]) // HOUR, dtype=np.int64)
    hi = len(grid) if is_end else len(grid) - 1
    lo = 1 if is_end else 0
    out = np.flatnonzero(((idx < lo) | (idx > hi)) & ~blank)
    if len(out):
        last = grid[-1] + (HOUR if is_end else pd.Timedelta(0))
        raise InputError(
            rows.at(out[0], column),
            f"'{raw[out[0]]}' is outside the history ({_iso(grid[0])} .. {_iso(last)})",
        )
    idx[blank] = -1
    return idx


def resolve_span(rows: FrameRows, hours: pd.DatetimeIndex) -> tuple[np.ndarray, np.ndarray]:
    """Hour indices of the `start` and `end` (exclusive) columns; end must follow start."""
    start = resolve_hours(rows, "start", hours, is_end=False)
    end = resolve_hours(rows, "end", hours, is_end=True)
    bad = np.flatnonzero(end <= start)
    if len(bad):
        p = bad[0]
        raise InputError(
            rows.at(p, "end"),
            f"end {rows.text('end')[p]} must be after start {rows.text('start')[p]}",
        )
    return start, end


def check_overlaps(
    rows: FrameRows,
    level: np.ndarray,
    series: np.ndarray,
    metric: np.ndarray,
    start: np.ndarray,
    end: np.ndarray,
) -> None:
    """Raise when two rows of one level, series and metric overlap in time."""
    order = np.lexsort(
        (np.arange(len(start)), start, metric.astype(str), series, level.astype(str))
    )
    last_key: tuple | None = None
    reach_end, reach_pos = -1, -1
    for p in order:
        key = (level[p], series[p], metric[p])
        if key != last_key:
            last_key, reach_end, reach_pos = key, -1, -1
        if start[p] < reach_end:
            first, later = sorted((reach_pos, int(p)))
            raise InputError(
                rows.at(later, "start"),
                f"overlaps row {first + 2} (same level, series and metric)",
            )
        if end[p] > reach_end:
            reach_end, reach_pos = int(end[p]), int(p)


def _utc(hours: pd.DatetimeIndex) -> pd.DatetimeIndex:
    hours = pd.DatetimeIndex(hours)
    return hours.tz_localize("UTC") if hours.tz is None else hours.tz_convert("UTC")


def _iso(ts: pd.Timestamp) -> str:
    return ts.strftime("%Y-%m-%dT%H:%M:%SZ")
