"""Alert export for analysts' review (the input of `calibrate retune`).

`review_frame` takes the alerts of one replay (Alerts CSV contract) and adds a
blank ``verdict`` column (``real``, ``false`` or ``duplicate``) and a blank
``comment`` column, sorted so a reviewer works through one team at a time in
time order. Alert ids are kept: they are how `retune` finds each alert again.
"""

from __future__ import annotations

import pandas as pd

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
