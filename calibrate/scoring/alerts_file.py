"""An alerts frame (the Alerts CSV contract) read back into `Episodes`.

Pipeline stage 6, at its edge: the only function of the scoring stage that reads a
frame; bad rows raise `InputError` naming the file, row and column.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from calibrate.detection.episodes import Episodes
from calibrate.errors import InputError
from calibrate.inputs.history import History
from calibrate.inputs.incidents import (
    FrameRows,
    resolve_hours,
    resolve_metrics,
    resolve_series,
    resolve_span,
)
from calibrate.inputs.workspace import Workspace

ALERT_COLUMNS = ("alert_id", "level", "metric", "start", "end")


def episodes_from_alerts_frame(
    df: pd.DataFrame, ws: Workspace, history: History, where: str
) -> Episodes:
    """Convert an alerts frame (Alerts CSV contract) back to `Episodes`.

    Required columns: alert_id, level, <key columns of each row's level>, metric,
    start, end. Optional: raised_hour (blank or absent = start), peak_hour (blank =
    start), peak_score, value, expected (blank = NaN), team, detectors (blank = "").
    ``impact`` is derived, so it is not read. ``grid`` is 0.

    Raises
    ------
    InputError
        Naming `where`, row (header = row 1) and column of the first problem.
    """
    rows = FrameRows(df, where)
    rows.require(ALERT_COLUMNS)
    n = len(rows)
    level, series, _ = resolve_series(rows, history)
    metric = resolve_metrics(rows, ws, allow_any=False)
    start, end = resolve_span(rows, history.hours)
    def hour_inside(column: str) -> np.ndarray:
        """An optional hour column within each alert's [start, end) (blank = start)."""
        if column not in rows.columns:
            return start.copy()
        given = resolve_hours(rows, column, history.hours, is_end=False, optional=True)
        at = np.where(given >= 0, given, start)
        outside = np.flatnonzero((at < start) | (at >= end))
        if len(outside):
            raise InputError(rows.at(outside[0], column),
                             "must lie within the alert's start .. end")
        return at

    peak = hour_inside("peak_hour")
    raised = hour_inside("raised_hour")

    def numbers(column: str) -> np.ndarray:
        if column not in rows.columns:
            return np.full(n, np.nan)
        raw = rows.text(column)
        vals = pd.to_numeric(pd.Series(raw), errors="coerce").to_numpy(dtype=np.float64)
        spelled_nan = np.array([v.lower() == "nan" for v in raw], dtype=bool)
        wrong = np.flatnonzero(np.isnan(vals) & (raw != "") & ~spelled_nan)
        if len(wrong):
            raise InputError(rows.at(wrong[0], column), f"'{raw[wrong[0]]}' is not a number")
        return vals

    def text(column: str) -> np.ndarray:
        return rows.text(column) if column in rows.columns else np.full(n, "", dtype=object)

    return Episodes(
        level=level,
        series=series,
        metric=metric,
        start=start,
        end=end,
        peak_hour=peak,
        peak_score=numbers("peak_score"),
        value=numbers("value"),
        expected=numbers("expected"),
        detectors=text("detectors"),
        team=text("team"),
        grid=np.zeros(n, dtype=np.int64),
        raised=raised,
    )
