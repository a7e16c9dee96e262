"""The figures of one configuration over one period (miss rate, recall, precision with
intervals, delay, load per team) and the out-of-sample verdict against the goal.

Pipeline stage 6. Pure functions on a `Match` and the tables it was computed on.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from calibrate.detection.episodes import Episodes
from calibrate.inputs.incidents import Incidents
from calibrate.inputs.workspace import Goal
from calibrate.scoring.intervals import (
    BOOTSTRAP_METHOD,
    cluster_bootstrap_ratio,
    day_bootstrap_total,
)
from calibrate.scoring.matching import Match
from calibrate.scoring.tables import (
    breakdown,
    check_lengths,
    detector_table,
    event_summary,
    incident_table,
)


@dataclass
class Figures:
    """Event-level figures of one configuration over one period.

    Rates and precision are NaN when undefined (no incidents / no alerts /
    no analysts); `to_json_dict` writes those as null. Intervals are Wilson
    intervals at `confidence`; recall's interval is one minus miss rate's.
    """

    incidents: int
    caught: int
    missed: int
    miss_rate: float
    miss_rate_low: float
    miss_rate_high: float
    recall: float
    recall_low: float
    recall_high: float
    alerts: int
    true_alerts: int
    false_alerts: int
    precision: float
    precision_low: float
    precision_high: float
    delay_median_hours: float
    delay_p90_hours: float
    caught_related: int
    related_alerts: int
    n_days: float
    confidence: float
    # incidents not caught because an alert raised before them was still running
    already_alerting: int = 0
    # incidents of the period that begin before the first scored hour: never catchable,
    # listed apart and left out of every figure above
    before_first_scored: int = 0
    before_first_scored_ids: list[str] = field(default_factory=list)
    interval_method: str = ""
    per_team: pd.DataFrame = field(default_factory=pd.DataFrame)
    per_level: pd.DataFrame = field(default_factory=pd.DataFrame)
    per_metric: pd.DataFrame = field(default_factory=pd.DataFrame)
    per_detector: pd.DataFrame = field(default_factory=pd.DataFrame)
    per_incident: pd.DataFrame = field(default_factory=pd.DataFrame)

    def to_json_dict(self) -> dict[str, Any]:
        """Plain, JSON-safe dict (NaN and inf as None, numpy scalars as Python)."""
        out: dict[str, Any] = {}
        for name in self.__dataclass_fields__:
            value = getattr(self, name)
            if isinstance(value, pd.DataFrame):
                continue
            out[name] = _json_value(value)
        for name in ("per_team", "per_level", "per_metric", "per_detector"):
            frame: pd.DataFrame = getattr(self, name)
            out[name] = {
                str(idx): {k: _json_value(v) for k, v in row.items()}
                for idx, row in frame.to_dict(orient="index").items()
            }
        out["per_incident"] = [
            {k: _json_value(v) for k, v in row.items()}
            for row in self.per_incident.to_dict(orient="records")
        ]
        return out


def _json_value(v: Any) -> Any:
    if v is None or v is pd.NA or v is pd.NaT:
        return None
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, pd.Timestamp):
        return v.strftime("%Y-%m-%dT%H:%M:%SZ")
    return v


def figures(
    match: Match,
    episodes: Episodes,
    incidents: Incidents,
    teams_analysts: Mapping[str, int],
    n_days: float,
    confidence: float = 0.95,
    goal: Goal | None = None,
    unscorable: Incidents | None = None,
    start_hour: int = 0,
    seed: int = 0,
) -> Figures:
    """Miss rate, recall, precision (Wilson intervals), delay and load per team.

    Parameters
    ----------
    match : Match
        From ``match(episodes, incidents, ...)``.
    episodes, incidents : Episodes, Incidents
        The tables that were matched (their ``team`` columns give the teams).
    teams_analysts : mapping of team -> number of analysts
    n_days : float
        Length of the scored period in days (denominator of per-analyst-day rates).
    confidence : float
    goal : Goal, optional
        Adds each team's alert budget to ``per_team``.
    unscorable : Incidents, optional
        Incidents of the period that begin before the first scored hour (left out of
        `incidents`); counted and listed apart.
    start_hour, seed : int
        First hour of the period (days are counted from it) and the seed of the
        bootstrap intervals. Alerts cluster by series and day, so precision's interval
        resamples series-days and each team's alert-load interval resamples days
        (`BOOTSTRAP_METHOD`), not single alerts.
    """
    check_lengths(match, episodes, incidents)
    if not n_days > 0:
        raise ValueError(f"n_days must be positive, but got {n_days=}")
    s = event_summary(match.caught, match.delay, match.alert_true, confidence)
    day = (np.asarray(episodes.raised, dtype=np.int64) - start_hour) // 24
    series_day = pd.factorize(pd.MultiIndex.from_arrays(
        [np.asarray(episodes.level, dtype=object), np.asarray(episodes.series), day]))[0] \
        if len(episodes) else np.zeros(0, dtype=np.int64)
    s["precision_low"], s["precision_high"] = cluster_bootstrap_ratio(
        series_day, match.alert_true.astype(np.float64), confidence=confidence, seed=seed)
    args = (match, episodes, incidents)
    per_team = breakdown(*args, by="team", teams_analysts=teams_analysts, n_days=n_days,
                         confidence=confidence, goal=goal)
    if len(per_team) and "analysts" in per_team.columns:
        n_blocks = max(int(math.ceil(n_days - 1e-9)), 1)
        lows, highs = [], []
        for team, row in per_team.iterrows():
            counts = np.bincount(np.clip(day[episodes.team == team], 0, n_blocks - 1),
                                 minlength=n_blocks).astype(np.float64)
            lo, hi = day_bootstrap_total(counts, confidence=confidence, seed=seed)
            den = row["analysts"] * n_days
            lows.append(lo / den if den > 0 else math.nan)
            highs.append(hi / den if den > 0 else math.nan)
        per_team["alerts_per_analyst_day_low"] = lows
        per_team["alerts_per_analyst_day_high"] = highs
    return Figures(
        **s,
        interval_method=BOOTSTRAP_METHOD,
        caught_related=int(match.caught_related.sum()),
        related_alerts=int(match.alert_related.sum()),
        n_days=float(n_days),
        confidence=confidence,
        already_alerting=int(match.already_alerting.sum()),
        before_first_scored=0 if unscorable is None else len(unscorable),
        before_first_scored_ids=[] if unscorable is None else [
            str(x) for x in unscorable.to_frame()["incident_id"].tolist()],
        per_team=per_team,
        per_level=breakdown(*args, by="level", confidence=confidence),
        per_metric=breakdown(*args, by="metric", confidence=confidence),
        per_detector=detector_table(match, episodes),
        per_incident=incident_table(match, episodes, incidents),
    )


HELD_OUT_NOTE = ("the held-out labels include incidents made from analysts' verdicts on "
                 "held-out alerts: this check is no longer independent")


def validation_verdict(figs: Figures | None, goal: Goal) -> tuple[str, list[str]]:
    """One word on whether a config meets the goal out of sample, with the reasons.

    "holds" when the miss rate's upper limit is within the target and every team's
    alert-load upper limit within its budget; "does not hold" when the miss rate's
    lower limit, or some team's load lower limit, is beyond it; else "cannot tell" (an
    interval spans the target, or there are no out-of-sample incidents).
    """
    if figs is None:
        return "cannot tell", ["no out-of-sample weeks to check on"]
    fails, unsure, ok = [], [], []
    target = goal.max_miss_rate
    if figs.incidents == 0:
        unsure.append("no labelled incident in the out-of-sample weeks")
    else:
        span = (f"miss rate {figs.miss_rate:.1%} ({figs.miss_rate_low:.1%} to "
                f"{figs.miss_rate_high:.1%}, {figs.incidents} incidents) against the target "
                f"{target:.1%}")
        if figs.miss_rate_low > target:
            fails.append(span)
        elif figs.miss_rate_high > target:
            unsure.append(span)
        else:
            ok.append(span)
    pt = figs.per_team
    if len(pt) and "alerts_per_analyst_day_high" in pt.columns:
        for team, row in pt.iterrows():
            if not row.get("analysts", 0) > 0 or not math.isfinite(goal.budget(team)):
                continue
            b = goal.budget(team)
            span = (f"team {team}: {row['alerts_per_analyst_day']:.2f} alerts per analyst per "
                    f"day ({row['alerts_per_analyst_day_low']:.2f} to "
                    f"{row['alerts_per_analyst_day_high']:.2f}) against its budget {b:g}")
            if row["alerts_per_analyst_day_low"] > b:
                fails.append(span)
            elif row["alerts_per_analyst_day_high"] > b:
                unsure.append(span)
            else:
                ok.append(span)
    if fails:
        return "does not hold", fails + unsure
    if unsure:
        return "cannot tell", unsure
    return "holds", ok
