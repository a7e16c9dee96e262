"""Alert export for analysts' review (the input of `calibrate retune`).

`review_frame` takes the alerts of one replay (Alerts CSV contract) and adds a
blank ``verdict`` column (``real``, ``false`` or ``duplicate``) and a blank
``comment`` column, sorted so a reviewer works through one team at a time in
time order. Alert ids are kept: they are how `retune` finds each alert again.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from calibrate.errors import InputError
from calibrate.inputs.incidents import read_text_csv

VERDICTS = ("real", "false", "duplicate")
REVIEW_COLUMNS = ("verdict", "comment")


def review_frame(alerts: pd.DataFrame) -> pd.DataFrame:
    """Alerts sorted by team, then start time, with blank verdict and comment columns.

    Parameters
    ----------
    alerts : DataFrame
        From `ReplayResult.alerts_frame` (alert_id, level, keys, metric, start, ...).

    Returns
    -------
    DataFrame
        The same rows and columns plus ``verdict`` and ``comment`` (empty text).
    """
    df = alerts.copy()
    order = [c for c in ("team", "start", "alert_id") if c in df.columns]
    if order and len(df):
        df = df.sort_values(order, kind="stable")
    df = df.reset_index(drop=True)
    for col in REVIEW_COLUMNS:
        df[col] = ""
    return df


def read_reviewed(path: Path) -> pd.DataFrame:
    """A reviewed alerts file (text cells, stripped column names), checked for the
    ``alert_id`` and ``verdict`` columns."""
    df = read_text_csv(Path(path))
    df.columns = [str(c).strip() for c in df.columns]
    for col in ("alert_id", "verdict"):
        if col not in df.columns:
            raise InputError(f"{path} row 1", f"missing column '{col}' (a verdicts file is "
                             "an alerts-for-review file with a verdict column; found: "
                             f"{', '.join(df.columns) or 'none'})")
    return df
