"""Figures per group: per level, metric or team (`breakdown`), per combination of
detectors, one row per incident, and alerts per team per week (`volume`).

Pipeline stage 6. Pure functions on a `Match` and the tables it was computed on.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from calibrate.detection.episodes import Episodes
from calibrate.inputs.incidents import ANY_METRIC, Incidents
from calibrate.inputs.workspace import Goal
from calibrate.scoring.intervals import ratio, wilson
from calibrate.scoring.matching import Match, period_filter

ANY_LABEL = "(any)"


def event_summary(
    caught: np.ndarray, delay: np.ndarray, alert_true: np.ndarray, confidence: float
) -> dict[str, float | int]:
    """Event-level figures of one group of incidents and alerts (the fields of `Figures`
    they share), with Wilson intervals."""
    n, c = len(caught), int(caught.sum())
    alerts, true_alerts = len(alert_true), int(alert_true.sum())
    low, high = wilson(n - c, n, confidence)
    plow, phigh = wilson(true_alerts, alerts, confidence)
    d = delay[caught]
    return {
        "incidents": n,
        "caught": c,
        "missed": n - c,
        "miss_rate": float(ratio(n - c, n)),
        "miss_rate_low": float(low),
        "miss_rate_high": float(high),
        "recall": float(ratio(c, n)),
        "recall_low": float(1.0 - high),
        "recall_high": float(1.0 - low),
        "alerts": alerts,
        "true_alerts": true_alerts,
        "false_alerts": alerts - true_alerts,
        "precision": float(ratio(true_alerts, alerts)),
        "precision_low": float(plow),
        "precision_high": float(phigh),
        "delay_median_hours": float(np.median(d)) if len(d) else math.nan,
        "delay_p90_hours": float(np.percentile(d, 90)) if len(d) else math.nan,
    }


def check_lengths(match: Match, episodes: Episodes, incidents: Incidents) -> None:
    """Raise ValueError unless `match` was computed on these episodes and incidents."""
    if len(match.caught) != len(incidents) or len(match.alert_true) != len(episodes):
        raise ValueError("match was computed on other episodes or incidents")


def breakdown(
    match: Match,
    episodes: Episodes,
    incidents: Incidents,
    by: str,
    teams_analysts: Mapping[str, int] | None = None,
    n_days: float | None = None,
    confidence: float = 0.95,
    goal: Goal | None = None,
) -> pd.DataFrame:
    """Figures per level, metric or team: one row per group value.

    Parameters
    ----------
    by : {"level", "metric", "team"}
        Incidents with a blank metric form the metric group ``"(any)"``.
    teams_analysts, n_days : optional
        With ``by="team"``: adds analysts and per-analyst-day rates; every team
        with analysts gets a row even without alerts.
    goal : Goal, optional
        With ``by="team"``: adds ``budget`` and ``over_budget``.

    Returns
    -------
    pandas.DataFrame indexed by group value.
    """
    check_lengths(match, episodes, incidents)
    if by not in ("level", "metric", "team"):
        raise ValueError(f"by must be 'level', 'metric' or 'team', but got {by=}")
    inc_key = np.asarray(getattr(incidents, by), dtype=object)
    ep_key = np.asarray(getattr(episodes, by), dtype=object)
    if by == "metric":
        inc_key = np.where(inc_key == ANY_METRIC, ANY_LABEL, inc_key)
    groups = list(dict.fromkeys([*inc_key.tolist(), *ep_key.tolist()]))
    if by == "team" and teams_analysts:
        groups = list(dict.fromkeys([*teams_analysts, *groups]))
    rows = {}
    for g in sorted(groups, key=str):
        mi, me = inc_key == g, ep_key == g
        row: dict[str, Any] = event_summary(match.caught[mi], match.delay[mi],
                                            match.alert_true[me], confidence)
        row["caught_related"] = int(match.caught_related[mi].sum())
        if by == "team" and teams_analysts is not None and n_days is not None:
            analysts = int(teams_analysts.get(g, 0))
            row["analysts"] = analysts
            row["alerts_per_analyst_day"] = float(ratio(row["alerts"], analysts * n_days))
            row["false_alerts_per_analyst_day"] = float(
                ratio(row["false_alerts"], analysts * n_days)
            )
            if goal is not None:
                row["budget"] = goal.budget(g)
                row["over_budget"] = bool(row["alerts_per_analyst_day"] > row["budget"])
        rows[g] = row
    frame = pd.DataFrame.from_dict(rows, orient="index")
    frame.index.name = by
    return frame


def detector_table(match: Match, episodes: Episodes) -> pd.DataFrame:
    """Alerts, true alerts and precision per combination of detectors that fired
    (e.g. "fence", "flatline", "fence+flatline")."""
    det = pd.Series(np.asarray(episodes.detectors, dtype=object), dtype=object)
    frame = pd.DataFrame({"detectors": det, "true": match.alert_true})
    out = frame.groupby("detectors", sort=True)["true"].agg(["size", "sum"])
    out.columns = ["alerts", "true_alerts"]
    out["precision"] = ratio(out["true_alerts"].to_numpy(), out["alerts"].to_numpy())
    return out.astype({"alerts": np.int64, "true_alerts": np.int64})


def incident_table(match: Match, episodes: Episodes, incidents: Incidents) -> pd.DataFrame:
    """One row per incident: what it is, whether and by which alert it was caught."""
    df = incidents.to_frame().rename(columns={"label": "series_label"})
    df["metric"] = np.where(df["metric"] == ANY_METRIC, ANY_LABEL, df["metric"])
    df["caught"] = match.caught
    df["first_alert"] = pd.array(np.where(match.caught, match.first_alert, 0), dtype="Int64")
    df.loc[~match.caught, "first_alert"] = pd.NA
    df["delay_hours"] = match.delay
    df["already_alerting"] = match.already_alerting
    df["caught_related"] = match.caught_related
    cols = ["incident_id", "level", "series", "series_label", "metric", "team"]
    cols += [c for c in ("start", "end") if c in df.columns]
    cols += ["start_hour", "end_hour", "caught", "first_alert", "delay_hours",
             "already_alerting", "caught_related"]
    return df[cols].reset_index(drop=True)


def volume(
    episodes: Episodes,
    teams_analysts: Mapping[str, int],
    hours: pd.DatetimeIndex,
    start_hour: int,
    end_hour: int,
    goal: Goal | None = None,
) -> pd.DataFrame:
    """Alerts per team per ISO week, and per analyst per day.

    Episodes count in the week of their start hour; only those starting in
    ``[start_hour, end_hour)`` count. ``days`` is the number of period hours falling
    in the week divided by 24, so partial weeks at the ends are rated fairly.

    Returns
    -------
    pandas.DataFrame
        Columns team, week ("YYYY-Www"), days, alerts, analysts,
        alerts_per_analyst_day, and with a goal budget and over_budget. Every team
        in `teams_analysts` gets a row for every week of the period.
    """
    if not 0 <= start_hour < end_hour <= len(hours):
        raise ValueError(f"need 0 <= start_hour < end_hour <= {len(hours)}, got "
                         f"{start_hour=}, {end_hour=}")
    iso = pd.DatetimeIndex(hours[start_hour:end_hour]).isocalendar()
    week_of_hour = np.array([f"{y}-W{w:02d}" for y, w in zip(iso["year"], iso["week"],
                                                             strict=True)], dtype=object)
    weeks, hours_per_week = np.unique(week_of_hour, return_counts=True)
    ep = period_filter(episodes, start_hour, end_hour)
    ep_week = week_of_hour[ep.start - start_hour]
    teams = list(dict.fromkeys([*teams_analysts, *sorted(set(ep.team.tolist()))]))
    week_pos = np.searchsorted(weeks, ep_week) if len(ep) else np.array([], dtype=np.int64)
    team_pos = {t: i for i, t in enumerate(teams)}
    tp = np.array([team_pos[t] for t in ep.team], dtype=np.int64)
    counts = np.bincount(tp * len(weeks) + week_pos, minlength=len(teams) * len(weeks))
    counts = counts.reshape(len(teams), len(weeks))
    days = hours_per_week / 24.0
    analysts = np.array([int(teams_analysts.get(t, 0)) for t in teams])
    frame = pd.DataFrame({
        "team": np.repeat(np.array(teams, dtype=object), len(weeks)),
        "week": np.tile(weeks, len(teams)),
        "days": np.tile(days, len(teams)),
        "alerts": counts.ravel(),
        "analysts": np.repeat(analysts, len(weeks)),
    })
    frame["alerts_per_analyst_day"] = ratio(frame["alerts"], frame["analysts"] * frame["days"])
    if goal is not None:
        frame["budget"] = [goal.budget(t) for t in frame["team"]]
        frame["over_budget"] = frame["alerts_per_analyst_day"] > frame["budget"]
    return frame
