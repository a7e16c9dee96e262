"""Match alerts to incidents; figures with intervals; alert volume; the multiplier curve.

Pipeline stage 6 (second half). Pure functions on the column tables `Episodes` and
`Incidents`; the only frame-reading function is `episodes_from_alerts_frame`.

Event rule (one rule for catches and for true alerts): an episode and an incident
meet when they share level and series, the incident's metric is blank or equals the
episode's, and the episode's raised hour lies in the incident's window
``[start - early_hours, end + late_hours)``. An incident is caught when some episode
meets it; an episode is a true alert when it meets some incident. An episode raised
before the window and still running at the incident's start does not catch it: the
incident is counted apart as "already alerting" (a long episode cannot inflate
recall). Alerts on an ancestor or descendant series are credited only when asked
(``related=history``) and then reported separately, never in the main figures.

Teams come from the ``team`` column of both tables; `route_teams` fills it from a
routing array per level (the seam to ``calibrate.inputs.owners``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, TypeVar

import numba
import numpy as np
import pandas as pd
from statsmodels.stats.proportion import proportion_confint

from calibrate.detection.episodes import CodedEpisodes, Episodes
from calibrate.errors import InputError
from calibrate.inputs.history import History
from calibrate.inputs.incidents import (
    ANY_METRIC,
    FrameRows,
    Incidents,
    resolve_hours,
    resolve_metrics,
    resolve_series,
    resolve_span,
)
from calibrate.inputs.workspace import Goal, Workspace

Table = TypeVar("Table", Episodes, Incidents)
ANY_LABEL = "(any)"
ALERT_COLUMNS = ("alert_id", "level", "metric", "start", "end")
ANY_METRIC_CODE = -2  # metric code of an incident that counts for any metric


# --------------------------------------------------------------------------- seams


def route_teams(table: Table, routes: Mapping[str, np.ndarray]) -> Table:
    """Copy of `table` with ``team`` set from ``routes[level][series]``.

    Parameters
    ----------
    table : Episodes or Incidents
    routes : mapping of level -> ndarray of str
        Team of every series of the level (e.g. from ``Owners.route``); levels not
        in the mapping keep "".
    """
    team = np.full(len(table), "", dtype=object)
    for lv in pd.unique(table.level):
        if lv in routes:
            m = table.level == lv
            team[m] = np.asarray(routes[lv], dtype=object)[table.series[m]]
    return replace(table, team=team)


def period_filter(table: Table, start_hour: int | None, end_hour: int | None) -> Table:
    """Rows of `table` in ``[start_hour, end_hour)`` (None = unbounded): incidents by
    their start, alerts by the hour they were raised."""
    at = table.raised if isinstance(table, Episodes) else table.start
    keep = np.ones(len(table), dtype=bool)
    if start_hour is not None:
        keep &= at >= start_hour
    if end_hour is not None:
        keep &= at < end_hour
    return table.take(keep)


# --------------------------------------------------------------------------- match


@dataclass
class Match:
    """Result of `match`.

    Attributes
    ----------
    early_hours, late_hours : int
    caught : ndarray of bool, per incident
    first_alert : ndarray of int64, per incident
        Episode index of the earliest-raised episode meeting the incident (-1 if missed).
    delay : ndarray of float64, per incident
        Hours from incident start to that episode's raised hour (NaN if missed;
        negative when caught inside the early tolerance).
    already_alerting : ndarray of bool, per incident
        Not caught, but an episode raised before the incident's window was still
        running at the incident's start (reported apart, never a catch).
    alert_true : ndarray of bool, per episode
    alert_incident : ndarray of int64, per episode
        First incident (lowest index) the episode meets, -1 for a false alert.
    pair_alert, pair_incident : ndarray of int64
        Every (episode, incident) pair that meets, sorted by incident then episode.
    caught_related : ndarray of bool, per incident
        Missed by the main rule but met by an alert on an ancestor or descendant
        series (always False unless `match` was given ``related``).
    related_first_alert : ndarray of int64, per incident (-1 if none)
    alert_related : ndarray of bool, per episode
        False alert that meets an incident of a related series.
    """

    early_hours: int
    late_hours: int
    caught: np.ndarray
    first_alert: np.ndarray
    delay: np.ndarray
    already_alerting: np.ndarray
    alert_true: np.ndarray
    alert_incident: np.ndarray
    pair_alert: np.ndarray
    pair_incident: np.ndarray
    caught_related: np.ndarray
    related_first_alert: np.ndarray
    alert_related: np.ndarray

    def incidents_of(self, alert: int) -> np.ndarray:
        """Indices of the incidents episode `alert` meets."""
        return self.pair_incident[self.pair_alert == alert]

    def alerts_of(self, incident: int) -> np.ndarray:
        """Indices of the episodes meeting incident `incident`."""
        return self.pair_alert[self.pair_incident == incident]


def match(
    episodes: Episodes,
    incidents: Incidents,
    early_hours: int,
    late_hours: int,
    related: History | None = None,
) -> Match:
    """Match alert episodes of one detector configuration to incidents.

    Parameters
    ----------
    episodes : Episodes
        Alerts of one configuration (the ``grid`` column is ignored).
    incidents : Incidents
    early_hours, late_hours : int
        Tolerances: the incident window is ``[start - early_hours, end + late_hours)``.
    related : History, optional
        When given, alerts on an ancestor or descendant series (key prefixes) are
        credited in ``caught_related`` / ``alert_related``; main figures are unchanged.

    Returns
    -------
    Match
    """
    if early_hours < 0 or late_hours < 0:
        raise ValueError(f"tolerances must be >= 0, but got {early_hours=}, {late_hours=}")
    n_inc, n_ep = len(incidents), len(episodes)
    oa, oi = _overlap_pairs(episodes, incidents, early_hours, late_hours)
    pa, pi = _raised_inside(oa, oi, episodes, incidents, early_hours, late_hours)
    caught, first = _first_per_incident(pa, pi, episodes.raised, n_inc)
    delay = np.full(n_inc, np.nan)
    delay[caught] = episodes.raised[first[caught]] - incidents.start[caught]
    running = ((episodes.raised[oa] < incidents.start[oi] - early_hours)
               & (episodes.end[oa] > incidents.start[oi]))
    already = np.zeros(n_inc, dtype=bool)
    already[oi[running]] = True
    already &= ~caught
    alert_true = np.zeros(n_ep, dtype=bool)
    alert_true[pa] = True
    alert_incident = np.full(n_ep, -1, dtype=np.int64)
    # pairs are sorted by incident, so reversed assignment leaves the lowest incident
    alert_incident[pa[::-1]] = pi[::-1]

    caught_related = np.zeros(n_inc, dtype=bool)
    related_first = np.full(n_inc, -1, dtype=np.int64)
    alert_related = np.zeros(n_ep, dtype=bool)
    if related is not None:
        ra, ri = _related_pairs(episodes, incidents, early_hours, late_hours, related)
        ra, ri = _raised_inside(ra, ri, episodes, incidents, early_hours, late_hours)
        rc, rfirst = _first_per_incident(ra, ri, episodes.raised, n_inc)
        caught_related = rc & ~caught
        related_first = np.where(caught_related, rfirst, -1)
        alert_related[ra] = True
        alert_related &= ~alert_true
    return Match(
        early_hours=early_hours,
        late_hours=late_hours,
        caught=caught,
        first_alert=first,
        delay=delay,
        already_alerting=already,
        alert_true=alert_true,
        alert_incident=alert_incident,
        pair_alert=pa,
        pair_incident=pi,
        caught_related=caught_related,
        related_first_alert=related_first,
        alert_related=alert_related,
    )


def _raised_inside(pa: np.ndarray, pi: np.ndarray, episodes: Episodes | CodedEpisodes,
                   incidents: Incidents, early: int, late: int) -> tuple[np.ndarray, np.ndarray]:
    """The pairs whose episode was raised inside the incident's window (the catch rule)."""
    r = np.asarray(episodes.raised, dtype=np.int64)[pa]
    inside = (r >= incidents.start[pi] - early) & (r < incidents.end[pi] + late)
    return pa[inside], pi[inside]


def catch_pairs(
    episodes: Episodes | CodedEpisodes, incidents: Incidents, early: int, late: int
) -> tuple[np.ndarray, np.ndarray]:
    """All (episode, incident) pairs that meet (the module's event rule), sorted by
    incident then episode."""
    pa, pi = _overlap_pairs(episodes, incidents, early, late)
    return _raised_inside(pa, pi, episodes, incidents, early, late)


def _overlap_pairs(
    episodes: Episodes | CodedEpisodes, incidents: Incidents, early: int, late: int
) -> tuple[np.ndarray, np.ndarray]:
    """All (episode, incident) pairs on the same series and metric whose hours overlap
    the incident's window (a superset of the meeting pairs), sorted by incident then
    episode."""
    n_ep, n_inc = len(episodes), len(incidents)
    if n_ep == 0 or n_inc == 0:
        return np.array([], dtype=np.int64), np.array([], dtype=np.int64)
    ep_level, levels = _codes(episodes, "level")
    ep_metric, metrics = _codes(episodes, "metric")
    inc_metric = np.where(
        incidents.metric == ANY_METRIC, ANY_METRIC_CODE, _lookup(metrics, incidents.metric)
    )
    return _pairs_kernel(
        ep_level, np.asarray(episodes.series, dtype=np.int64), ep_metric,
        np.asarray(episodes.start, dtype=np.int64), np.asarray(episodes.end, dtype=np.int64),
        _lookup(levels, incidents.level), np.asarray(incidents.series, dtype=np.int64),
        inc_metric.astype(np.int64), incidents.start - early, incidents.end + late, len(levels),
    )


@numba.njit(cache=True)
def _pairs_kernel(ep_level, ep_series, ep_metric, ep_start, ep_end, inc_level, inc_series,
                  inc_metric, win_lo, win_hi, n_levels):
    """`_overlap_pairs` on integer codes (incident level -1: no episode has it)."""
    n_ep, n_inc = len(ep_level), len(inc_level)
    width = max(ep_series.max(), inc_series.max()) + 1
    # incidents grouped by (level, series), each group in incident order
    head = np.zeros(n_levels * width + 1, dtype=np.int64)
    for i in range(n_inc):
        if inc_level[i] >= 0:
            head[inc_level[i] * width + inc_series[i] + 1] += 1
    head = np.cumsum(head)
    members = np.empty(head[-1], dtype=np.int64)
    fill = head.copy()
    for i in range(n_inc):
        if inc_level[i] >= 0:
            key = inc_level[i] * width + inc_series[i]
            members[fill[key]] = i
            fill[key] += 1
    # step 0 counts each incident's pairs, step 1 places them incident by incident;
    # walking the episodes in order sorts each incident's pairs by episode
    pos = np.zeros(n_inc + 1, dtype=np.int64)
    pa = np.empty(0, dtype=np.int64)
    pi = np.empty(0, dtype=np.int64)
    for step in range(2):
        if step:
            pos = np.cumsum(pos)
            pa = np.empty(pos[-1], dtype=np.int64)
            pi = np.empty(pos[-1], dtype=np.int64)
        for e in range(n_ep):
            key = ep_level[e] * width + ep_series[e]
            for q in range(head[key], head[key + 1]):
                i = members[q]
                if (ep_start[e] < win_hi[i] and ep_end[e] > win_lo[i]
                        and (inc_metric[i] == ANY_METRIC_CODE or inc_metric[i] == ep_metric[e])):
                    if step:
                        pa[pos[i]] = e
                        pi[pos[i]] = i
                        pos[i] += 1
                    else:
                        pos[i + 1] += 1
    return pa, pi


def _codes(table: Episodes | CodedEpisodes, column: str) -> tuple[np.ndarray, tuple]:
    """Integer codes of a text column and the names they index."""
    if isinstance(table, CodedEpisodes):
        if column == "team":
            return table.team_code, table.teams
        return table.level_codes() if column == "level" else table.metric_codes()
    codes, names = pd.factorize(getattr(table, column), use_na_sentinel=False)
    return codes.astype(np.int64), tuple(names)


def _lookup(names: tuple, values: np.ndarray) -> np.ndarray:
    """Position of each value in `names`, -1 when absent."""
    pos = {n: i for i, n in enumerate(names)}
    return np.array([pos.get(v, -1) for v in values], dtype=np.int64)


def _related_pairs(
    episodes: Episodes, incidents: Incidents, early: int, late: int, history: History
) -> tuple[np.ndarray, np.ndarray]:
    """Pairs meeting on an ancestor or descendant series (same metric rule, same window)."""
    keys = {
        name: (ls.key_columns, ls.keys[list(ls.key_columns)].astype(str).to_numpy(dtype=object))
        for name, ls in history.levels.items()
    }
    by_level = {lv: np.flatnonzero(episodes.level == lv) for lv in pd.unique(episodes.level)}
    out_a: list[np.ndarray] = []
    out_i: list[np.ndarray] = []
    for i in range(len(incidents)):
        cols_i, keys_i = keys[incidents.level[i]]
        kt = keys_i[incidents.series[i]]
        a = len(cols_i)
        for lv, idx in by_level.items():
            if lv == incidents.level[i] or lv not in keys:
                continue
            cols_l, keys_l = keys[lv]
            b = len(cols_l)
            if b == a or tuple(cols_l[: min(a, b)]) != tuple(cols_i[: min(a, b)]):
                continue
            if b > a:
                rel = np.flatnonzero((keys_l[:, :a] == kt).all(axis=1))
            else:
                rel = np.flatnonzero((keys_l == kt[:b]).all(axis=1))
            cand = idx[np.isin(episodes.series[idx], rel)]
            cand = cand[
                (episodes.start[cand] < incidents.end[i] + late)
                & (episodes.end[cand] > incidents.start[i] - early)
            ]
            if incidents.metric[i] != ANY_METRIC:
                cand = cand[episodes.metric[cand] == incidents.metric[i]]
            if len(cand):
                out_a.append(cand)
                out_i.append(np.full(len(cand), i, dtype=np.int64))
    if not out_a:
        return np.array([], dtype=np.int64), np.array([], dtype=np.int64)
    pa, pi = np.concatenate(out_a).astype(np.int64), np.concatenate(out_i)
    order = np.lexsort((pa, pi))
    return pa[order], pi[order]


def _first_per_incident(
    pa: np.ndarray, pi: np.ndarray, ep_start: np.ndarray, n_inc: int
) -> tuple[np.ndarray, np.ndarray]:
    """Per incident: caught flag and the earliest meeting episode by `ep_start` (the
    raised hours; ties: lowest)."""
    caught = np.zeros(n_inc, dtype=bool)
    first = np.full(n_inc, -1, dtype=np.int64)
    if len(pa):
        order = np.lexsort((pa, ep_start[pa], pi))
        sp, si = pa[order], pi[order]
        head = np.r_[True, si[1:] != si[:-1]]
        caught[si[head]] = True
        first[si[head]] = sp[head]
    return caught, first


# --------------------------------------------------------------------------- figures


def wilson(
    count: np.ndarray | int, nobs: np.ndarray | int, confidence: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval (statsmodels `proportion_confint`); NaN where nobs == 0."""
    count = np.asarray(count, dtype=np.float64)
    nobs = np.asarray(nobs, dtype=np.float64)
    safe = np.where(nobs > 0, nobs, 1.0)
    low, high = proportion_confint(
        np.minimum(count, safe), safe, alpha=1.0 - confidence, method="wilson"
    )
    low = np.where(nobs > 0, np.clip(low, 0.0, 1.0), np.nan)
    high = np.where(nobs > 0, np.clip(high, 0.0, 1.0), np.nan)
    return low, high


def _ratio(num: np.ndarray | float, den: np.ndarray | float) -> np.ndarray:
    num = np.asarray(num, dtype=np.float64)
    den = np.asarray(den, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)


def _summary(
    caught: np.ndarray, delay: np.ndarray, alert_true: np.ndarray, confidence: float
) -> dict[str, float | int]:
    n, c = len(caught), int(caught.sum())
    alerts, true_alerts = len(alert_true), int(alert_true.sum())
    low, high = wilson(n - c, n, confidence)
    plow, phigh = wilson(true_alerts, alerts, confidence)
    d = delay[caught]
    return {
        "incidents": n,
        "caught": c,
        "missed": n - c,
        "miss_rate": float(_ratio(n - c, n)),
        "miss_rate_low": float(low),
        "miss_rate_high": float(high),
        "recall": float(_ratio(c, n)),
        "recall_low": float(1.0 - high),
        "recall_high": float(1.0 - low),
        "alerts": alerts,
        "true_alerts": true_alerts,
        "false_alerts": alerts - true_alerts,
        "precision": float(_ratio(true_alerts, alerts)),
        "precision_low": float(plow),
        "precision_high": float(phigh),
        "delay_median_hours": float(np.median(d)) if len(d) else math.nan,
        "delay_p90_hours": float(np.percentile(d, 90)) if len(d) else math.nan,
    }


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
    _check_lengths(match, episodes, incidents)
    if not n_days > 0:
        raise ValueError(f"n_days must be positive, but got {n_days=}")
    s = _summary(match.caught, match.delay, match.alert_true, confidence)
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
BOOTSTRAP_REPS = 1000
BOOTSTRAP_METHOD = (
    "miss rate and recall: Wilson score interval; precision: cluster bootstrap over "
    f"series-days; alert load: bootstrap over days ({BOOTSTRAP_REPS} resamples, "
    "percentile interval, seeded)")


def cluster_bootstrap_ratio(cluster: np.ndarray, x: np.ndarray, confidence: float = 0.95,
                            seed: int = 0, reps: int = BOOTSTRAP_REPS) -> tuple[float, float]:
    """Percentile interval of ``sum(x) / len(x)`` when whole clusters are resampled with
    replacement (the items of a cluster are not independent: alerts of one series on one
    day); NaN for no items.

    Parameters
    ----------
    cluster : ndarray of int
        Cluster code of each item (0 .. n_clusters - 1).
    x : ndarray of float
        Item values (1.0 for a true alert, 0.0 for a false one).
    """
    if len(x) == 0:
        return math.nan, math.nan
    size = np.bincount(cluster).astype(np.float64)
    total = np.bincount(cluster, weights=x)
    keep = size > 0
    size, total = size[keep], total[keep]
    ratios = _resampled(len(size), reps, seed, lambda w: (w @ total) / (w @ size))
    a = (1.0 - confidence) / 2.0
    return float(np.quantile(ratios, a)), float(np.quantile(ratios, 1.0 - a))


def day_bootstrap_total(counts: np.ndarray, confidence: float = 0.95, seed: int = 0,
                        reps: int = BOOTSTRAP_REPS) -> tuple[float, float]:
    """Percentile interval of the total of per-day `counts` when the days are resampled
    with replacement (a team's alert load: busy days come in runs of alerts)."""
    if len(counts) == 0:
        return math.nan, math.nan
    totals = _resampled(len(counts), reps, seed, lambda w: w @ counts)
    a = (1.0 - confidence) / 2.0
    return float(np.quantile(totals, a)), float(np.quantile(totals, 1.0 - a))


def _resampled(n: int, reps: int, seed: int, stat) -> np.ndarray:
    """`stat` of `reps` resamples of n units, each resample given as how often each unit
    was drawn; drawn in chunks to bound memory."""
    rng = np.random.default_rng(seed)
    out = []
    for done in range(0, reps, 100):
        k = min(100, reps - done)
        out.append(stat(rng.multinomial(n, np.full(n, 1.0 / n), size=k).astype(np.float64)))
    return np.concatenate(out)


def zero_miss_bound(n_incidents: int, confidence: float = 0.95) -> float:
    """The lowest miss-rate upper bound any setting can show on `n_incidents` labels: the
    Wilson upper limit at zero misses (1 with no incidents)."""
    if n_incidents <= 0:
        return 1.0
    return float(wilson(0, n_incidents, confidence)[1])


def incidents_needed(max_miss_rate: float, confidence: float = 0.95,
                     limit: int = 100_000) -> int | None:
    """Fewest labelled incidents whose zero-miss upper bound is at most `max_miss_rate`
    (None beyond `limit`, e.g. a target of 0)."""
    lo, hi = 1, limit
    if zero_miss_bound(hi, confidence) > max_miss_rate:
        return None
    while lo < hi:
        mid = (lo + hi) // 2
        if zero_miss_bound(mid, confidence) <= max_miss_rate:
            hi = mid
        else:
            lo = mid + 1
    return lo


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


def _check_lengths(match: Match, episodes: Episodes, incidents: Incidents) -> None:
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
    _check_lengths(match, episodes, incidents)
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
        row: dict[str, Any] = _summary(match.caught[mi], match.delay[mi], match.alert_true[me],
                                       confidence)
        row["caught_related"] = int(match.caught_related[mi].sum())
        if by == "team" and teams_analysts is not None and n_days is not None:
            analysts = int(teams_analysts.get(g, 0))
            row["analysts"] = analysts
            row["alerts_per_analyst_day"] = float(_ratio(row["alerts"], analysts * n_days))
            row["false_alerts_per_analyst_day"] = float(
                _ratio(row["false_alerts"], analysts * n_days)
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
    out["precision"] = _ratio(out["true_alerts"].to_numpy(), out["alerts"].to_numpy())
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


# --------------------------------------------------------------------------- volume


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
    frame["alerts_per_analyst_day"] = _ratio(frame["alerts"], frame["analysts"] * frame["days"])
    if goal is not None:
        frame["budget"] = [goal.budget(t) for t in frame["team"]]
        frame["over_budget"] = frame["alerts_per_analyst_day"] > frame["budget"]
    return frame


# --------------------------------------------------------------------------- curve


@dataclass
class Curve:
    """Figures for every fence multiplier of a grid (arrays over the grid).

    Attributes
    ----------
    ks : ndarray (n_k,)
    incidents : int
    caught, alerts, true_alerts, false_alerts : ndarray of int64 (n_k,)
    miss_rate, miss_rate_low, miss_rate_high : ndarray of float64 (n_k,)
    teams : tuple of str
    analysts : ndarray of int64 (n_team,)
    team_alerts, team_false_alerts : ndarray of int64 (n_k, n_team)
    alerts_per_analyst_day, false_alerts_per_analyst_day : ndarray of float64 (n_k, n_team)
        NaN for teams without analysts.
    n_days : float
    """

    ks: np.ndarray
    incidents: int
    caught: np.ndarray
    miss_rate: np.ndarray
    miss_rate_low: np.ndarray
    miss_rate_high: np.ndarray
    alerts: np.ndarray
    true_alerts: np.ndarray
    false_alerts: np.ndarray
    teams: tuple[str, ...]
    analysts: np.ndarray
    team_alerts: np.ndarray
    team_false_alerts: np.ndarray
    alerts_per_analyst_day: np.ndarray
    false_alerts_per_analyst_day: np.ndarray
    n_days: float

    def to_frame(self) -> pd.DataFrame:
        """One row per multiplier (for reports); team columns as ``alerts_per_analyst_day[t]``."""
        df = pd.DataFrame({
            "k": self.ks, "caught": self.caught, "miss_rate": self.miss_rate,
            "miss_rate_low": self.miss_rate_low, "miss_rate_high": self.miss_rate_high,
            "alerts": self.alerts, "true_alerts": self.true_alerts,
            "false_alerts": self.false_alerts,
        })
        for j, t in enumerate(self.teams):
            df[f"alerts_per_analyst_day[{t}]"] = self.alerts_per_analyst_day[:, j]
        return df


def multiplier_curve(
    episodes_by_grid: Episodes,
    ks: np.ndarray,
    incidents: Incidents,
    early: int,
    late: int,
    teams_analysts: Mapping[str, int],
    n_days: float,
    confidence: float = 0.95,
) -> Curve:
    """Figures for every multiplier at once.

    Parameters
    ----------
    episodes_by_grid : Episodes or CodedEpisodes
        Episodes of all multipliers in one table; ``grid`` = index into `ks`.
    ks : array of float
    incidents : Incidents
    early, late : int
        Matching tolerances in hours (as in `match`).
    teams_analysts : mapping of team -> analysts
    n_days : float
    confidence : float

    Returns
    -------
    Curve
        Equal, multiplier by multiplier, to `figures` of the episodes of that grid index.
    """
    ks = np.asarray(ks, dtype=np.float64)
    n_k, n_inc, ep = len(ks), len(incidents), episodes_by_grid
    grid = _grid_of(ep, n_k)
    if not n_days > 0:
        raise ValueError(f"n_days must be positive, but got {n_days=}")
    pa, pi = catch_pairs(ep, incidents, early, late)
    caught_mat = np.zeros((n_k, n_inc), dtype=bool)
    caught_mat[grid[pa], pi] = True
    caught = caught_mat.sum(axis=1).astype(np.int64)
    alert_true = np.zeros(len(ep), dtype=bool)
    alert_true[pa] = True
    teams, tp = _curve_teams(ep, teams_analysts)
    n_t = len(teams)
    cell = grid * n_t + tp
    team_alerts = np.bincount(cell, minlength=n_k * n_t).reshape(n_k, n_t)
    team_true = np.bincount(cell[alert_true], minlength=n_k * n_t).reshape(n_k, n_t)
    return _curve(ks, n_inc, caught, np.bincount(grid, minlength=n_k),
                  np.bincount(grid[alert_true], minlength=n_k), teams, teams_analysts,
                  team_alerts, team_alerts - team_true, n_days, confidence)


def _grid_of(ep: Episodes | CodedEpisodes, n_k: int) -> np.ndarray:
    """The episodes' grid indices, checked to lie in [0, n_k)."""
    grid = np.asarray(ep.grid, dtype=np.int64)
    if len(grid) and (grid.min() < 0 or grid.max() >= n_k):
        raise ValueError(
            f"episode grid indices must lie in [0, {n_k}), got {grid.min()}..{grid.max()}"
        )
    return grid


def _curve_teams(ep: Episodes | CodedEpisodes,
                 teams_analysts: Mapping[str, int]) -> tuple[tuple[str, ...], np.ndarray]:
    """Curve team order (teams with analysts, then others present) and each row's position
    in it."""
    team_code, team_names = _codes(ep, "team")
    present = np.flatnonzero(np.bincount(team_code, minlength=len(team_names)))
    teams = tuple(dict.fromkeys([*teams_analysts, *sorted(team_names[i] for i in present)]))
    pos = {t: i for i, t in enumerate(teams)}
    return teams, np.array([pos.get(t, -1) for t in team_names], dtype=np.int64)[team_code]


def _curve(ks, n_inc, caught, alerts, true_alerts, teams, teams_analysts, team_alerts,
           team_false, n_days, confidence) -> Curve:
    n_k = len(ks)
    caught = np.asarray(caught, dtype=np.int64)
    alerts = np.asarray(alerts, dtype=np.int64)
    true_alerts = np.asarray(true_alerts, dtype=np.int64)
    team_alerts = np.asarray(team_alerts, dtype=np.int64)
    team_false = np.asarray(team_false, dtype=np.int64)
    analysts = np.array([int(teams_analysts.get(t, 0)) for t in teams], dtype=np.int64)
    low, high = wilson(n_inc - caught, np.full(n_k, n_inc), confidence)
    return Curve(
        ks=ks,
        incidents=n_inc,
        caught=caught,
        miss_rate=_ratio(n_inc - caught, np.full(n_k, n_inc)),
        miss_rate_low=low,
        miss_rate_high=high,
        alerts=alerts,
        true_alerts=true_alerts,
        false_alerts=alerts - true_alerts,
        teams=teams,
        analysts=analysts,
        team_alerts=team_alerts,
        team_false_alerts=team_false,
        alerts_per_analyst_day=_ratio(team_alerts, analysts[None, :] * n_days),
        false_alerts_per_analyst_day=_ratio(team_false, analysts[None, :] * n_days),
        n_days=float(n_days),
    )


def impact_curves(runs: Any, ks: np.ndarray, incidents: Incidents, early: int, late: int,
                  teams_analysts: Mapping[str, int], n_days: float,
                  confidence: float = 0.95) -> tuple[list[Curve], np.ndarray]:
    """`multiplier_curve` for every minimum impact of a run table's grid at once.

    Parameters
    ----------
    runs : calibrate.engine.replay.RunTable
        A multiplier grid's episodes as runs, each with its raised hour at every
        minimum impact of its metric's grid (``runs.raised``, -1: not raised there).
    ks, incidents, early, late, teams_analysts, n_days, confidence
        As for `multiplier_curve`.

    Returns
    -------
    curves : list of Curve
        One per minimum-impact level; curve l equals `multiplier_curve` of the episodes
        a replay at minimum impact level l raises (each run counts once for its whole
        range of multipliers). Every curve lists the teams of all runs.
    caught : ndarray of bool (n_min_impacts, n_k, n_incidents)
        Whether incident i is caught at multiplier j and minimum-impact level l.
    """
    ks = np.asarray(ks, dtype=np.float64)
    if not n_days > 0:
        raise ValueError(f"n_days must be positive, but got {n_days=}")
    ep = runs.runs
    raised = np.ascontiguousarray(runs.raised, dtype=np.int64)
    n_k, n_m, n_inc = len(ks), raised.shape[0], len(incidents)
    teams, tp = _curve_teams(ep, teams_analysts)
    n_t = len(teams)
    pa, pi = _overlap_pairs(ep, incidents, early, late)
    counts, caught_asc = _online_kernel(
        np.asarray(runs.lo, dtype=np.int64), np.asarray(runs.hi, dtype=np.int64), raised, tp,
        pa, pi, incidents.start - early, incidents.end + late, n_k, max(n_t, 1), n_inc)
    order = np.asarray(runs.order, dtype=np.int64)
    grid_counts = np.empty_like(counts)
    grid_counts[:, order] = counts
    caught = np.empty_like(caught_asc)
    caught[:, order] = caught_asc
    n_caught = caught.sum(axis=2)
    team_alerts, team_true = grid_counts[0][..., :n_t], grid_counts[1][..., :n_t]
    alerts, true_alerts = team_alerts.sum(axis=2), team_true.sum(axis=2)
    curves = [
        _curve(ks, n_inc, n_caught[lv], alerts[:, lv], true_alerts[:, lv], teams,
               teams_analysts, team_alerts[:, lv], team_alerts[:, lv] - team_true[:, lv],
               n_days, confidence)
        for lv in range(n_m)
    ]
    return curves, caught


@numba.njit(cache=True)
def _grouped(pa, pi, n):
    """Pairs (run pa[q], item pi[q]) grouped by run: run e's items are
    ``items[head[e]:head[e + 1]]``, in pair order."""
    head = np.zeros(n + 1, dtype=np.int64)
    for q in range(pa.shape[0]):
        head[pa[q] + 1] += 1
    head = np.cumsum(head)
    fill = head.copy()
    items = np.empty(pa.shape[0], dtype=np.int64)
    for q in range(pa.shape[0]):
        items[fill[pa[q]]] = pi[q]
        fill[pa[q]] += 1
    return head, items


@numba.njit(cache=True)
def _online_kernel(lo, hi, raised, team, pa, pi, win_lo, win_hi, n_k, n_t, n_inc):
    """Counts of raised runs (all, true) per ascending multiplier level, minimum-impact
    level and team, and per (minimum-impact level, multiplier level, incident) whether
    some run raised inside the incident's window exists there. `pa`/`pi` are pairs
    that overlap in time (a superset of the catches)."""
    n_m, n = raised.shape
    head, inc = _grouped(pa, pi, n)  # the pairs of run e: inc[head[e]:head[e + 1]]
    diff = np.zeros((2, n_k + 1, n_m, n_t), dtype=np.int64)
    caught = np.zeros((n_m, n_k, n_inc), dtype=np.bool_)
    for e in range(n):
        t = max(team[e], 0)
        for lv in range(n_m):
            r = raised[lv, e]
            if r < 0:
                continue
            diff[0, lo[e], lv, t] += 1
            diff[0, hi[e], lv, t] -= 1
            true = False
            for q in range(head[e], head[e + 1]):
                i = inc[q]
                if win_lo[i] <= r < win_hi[i]:
                    true = True
                    for j in range(lo[e], hi[e]):
                        caught[lv, j, i] = True
            if true:
                diff[1, lo[e], lv, t] += 1
                diff[1, hi[e], lv, t] -= 1
    counts = np.zeros((2, n_k, n_m, n_t), dtype=np.int64)
    for w in range(2):
        run = np.zeros((n_m, n_t), dtype=np.int64)
        for j in range(n_k):
            run += diff[w, j]
            counts[w, j] = run
    return counts, caught


@dataclass
class ExactPoint:
    """The (multiplier, minimum-impact level) pair `exact_solve` chose, with its figures.

    Attributes
    ----------
    k : float
        The multiplier: a breakpoint of the grid it was solved on (every k up to the
        next breakpoint gives the same flags).
    level : int
        Minimum-impact level (row of the run table's ``raised``).
    caught, alerts, known_false : int
    team_alerts : ndarray of int64
        Alerts per team, in the order of `teams`.
    teams : tuple of str
    """

    k: float
    level: int
    caught: int
    alerts: int
    known_false: int
    team_alerts: np.ndarray
    teams: tuple[str, ...]


def exact_solve(runs: Any, ks: np.ndarray, incidents: Incidents, early: int, late: int,
                teams_analysts: Mapping[str, int], n_days: float, goal: Goal,
                false_windows: Incidents | None = None,
                false_penalty: float = 1.0) -> ExactPoint | None:
    """The fewest (penalised) alerts meeting the goal, over every multiplier of `ks` and
    every minimum-impact level of `runs`.

    With `ks` every distinct fence score (the breakpoints: flags change only there)
    this is the exact optimum, not a grid's. Counts per multiplier come from interval
    sums over the runs (each run is one episode over a range of multipliers), so the
    cost is linear in runs and breakpoints per level.

    Parameters
    ----------
    runs : calibrate.engine.replay.RunTable
        Runs over the ascending grid `ks`, with raised hours per minimum-impact level.
    ks : ndarray
        Ascending multipliers.
    incidents, early, late, teams_analysts, n_days
        As for `multiplier_curve`.
    goal : Goal
        Feasible: ``(n - caught) / n <= max_miss_rate`` and every team with analysts at
        most its budget in alerts per analyst per day.
    false_windows : Incidents, optional
        Alerts raised inside one cost ``1 + false_penalty``.

    Returns
    -------
    ExactPoint or None
        None when no pair is feasible. Ties: the larger multiplier, then the lower level.
    """
    ks = np.asarray(ks, dtype=np.float64)
    if len(ks) > 1 and np.any(np.diff(ks) <= 0):
        raise ValueError("ks must be strictly ascending")
    ep = runs.runs
    raised = np.ascontiguousarray(runs.raised, dtype=np.int64)
    teams, tp = _curve_teams(ep, teams_analysts)
    n_t = len(teams)
    denom = np.array([teams_analysts.get(t, 0) * n_days for t in teams], dtype=np.float64)
    budget = np.array([goal.budget(t) for t in teams], dtype=np.float64)
    pa, pi = _overlap_pairs(ep, incidents, early, late)
    if false_windows is not None and len(false_windows):
        fa, fi = _overlap_pairs(ep, false_windows, 0, 0)
        f_lo, f_hi = false_windows.start, false_windows.end
    else:
        fa = fi = np.empty(0, dtype=np.int64)
        f_lo = f_hi = np.empty(0, dtype=np.int64)
    lo = np.asarray(runs.lo, dtype=np.int64)
    hi = np.asarray(runs.hi, dtype=np.int64)
    best = _exact_kernel(lo, hi, raised, tp, pa, pi, incidents.start - early,
                         incidents.end + late, fa, fi, f_lo, f_hi, len(ks), max(n_t, 1),
                         len(incidents), denom, budget, float(goal.max_miss_rate),
                         float(false_penalty))
    level, j, caught, alerts, kf = (int(v) for v in best[0])
    if j < 0:
        return None
    return ExactPoint(k=float(ks[j]), level=level, caught=caught, alerts=alerts,
                      known_false=kf, team_alerts=best[1][:n_t].copy(), teams=teams)


@numba.njit(cache=True)
def _exact_kernel(lo, hi, raised, team, pa, pi, win_lo, win_hi, fa, fi, f_lo, f_hi, n_k,
                  n_t, n_inc, denom, budget, max_miss, penalty):
    """`exact_solve` on arrays: per level, alerts per team, known-false alerts and
    incidents caught at every multiplier index (difference arrays; an incident's
    catching runs merged into a union of index ranges), then the best feasible pair."""
    n_m, n = raised.shape
    head, inc = _grouped(pa, pi, n)  # incident pairs of run e: inc[head[e]:head[e + 1]]
    fhead, fwin = _grouped(fa, fi, n)  # known-false pairs, the same way
    out = np.array([-1, -1, 0, 0, 0], dtype=np.int64)
    out_teams = np.zeros(n_t, dtype=np.int64)
    best_cost = np.inf
    best_k = -1
    need = 0
    if n_inc > 0:
        while (n_inc - need) / n_inc > max_miss:
            need += 1
    for lv in range(n_m):
        d_team = np.zeros((n_k + 1, n_t), dtype=np.int64)
        d_false = np.zeros(n_k + 1, dtype=np.int64)
        c_key = np.empty(pa.shape[0], dtype=np.int64)
        c_lo = np.empty(pa.shape[0], dtype=np.int64)
        c_hi = np.empty(pa.shape[0], dtype=np.int64)
        m = 0
        for e in range(n):
            r = raised[lv, e]
            if r < 0:
                continue
            t = max(team[e], 0)
            d_team[lo[e], t] += 1
            d_team[hi[e], t] -= 1
            for q in range(fhead[e], fhead[e + 1]):
                w = fwin[q]
                if f_lo[w] <= r < f_hi[w]:
                    d_false[lo[e]] += 1
                    d_false[hi[e]] -= 1
                    break
            for q in range(head[e], head[e + 1]):
                i = inc[q]
                if win_lo[i] <= r < win_hi[i]:
                    c_key[m] = i * (n_k + 1) + lo[e]
                    c_lo[m] = lo[e]
                    c_hi[m] = hi[e]
                    m += 1
        # per incident, the union of its catching runs' index ranges
        d_caught = np.zeros(n_k + 1, dtype=np.int64)
        order = np.argsort(c_key[:m])
        q = 0
        while q < m:
            i = c_key[order[q]] // (n_k + 1)
            a, b = c_lo[order[q]], c_hi[order[q]]
            q += 1
            while q < m and c_key[order[q]] // (n_k + 1) == i:
                u = order[q]
                if c_lo[u] <= b:
                    b = max(b, c_hi[u])
                else:
                    d_caught[a] += 1
                    d_caught[b] -= 1
                    a, b = c_lo[u], c_hi[u]
                q += 1
            d_caught[a] += 1
            d_caught[b] -= 1
        alerts_t = np.zeros(n_t, dtype=np.int64)
        kf = 0
        caught = 0
        for j in range(n_k):
            alerts_t += d_team[j]
            kf += d_false[j]
            caught += d_caught[j]
            if caught < need:
                continue
            ok = True
            for t in range(n_t):  # the rule of the search's budget constraint
                if denom[t] > 0 and np.isfinite(budget[t]) and (
                        alerts_t[t] / denom[t]) / budget[t] - 1.0 > 0:
                    ok = False
                    break
            if not ok:
                continue
            total = alerts_t.sum()
            cost = total + penalty * kf
            # ties: the larger multiplier (later j), then the lower level (earlier lv)
            if cost < best_cost or (cost == best_cost and j > best_k):
                best_cost = cost
                best_k = j
                out[0], out[1], out[2], out[3], out[4] = lv, j, caught, total, kf
                out_teams[:] = alerts_t
    return out, out_teams


def solve_multiplier(
    curve: Curve, max_miss_rate: float, budgets: Mapping[str, float] | Goal
) -> tuple[float | None, str]:
    """The largest multiplier in the grid meeting the miss-rate target and every budget.

    Parameters
    ----------
    curve : Curve
    max_miss_rate : float
        A grid point meets it when ``miss_rate <= max_miss_rate`` (always, when there
        are no incidents).
    budgets : mapping of team -> alerts per analyst per day, or Goal
        Teams without analysts are not checked (their alerts are unrouted load);
        teams not in a mapping have no budget.

    Returns
    -------
    k : float or None
        None when no grid point meets every constraint.
    reason : str
        One line: what was met, or which constraint fails and by how much.
    """
    ks = curve.ks
    if isinstance(budgets, Goal):
        budget = np.array([budgets.budget(t) for t in curve.teams], dtype=np.float64)
    else:
        budget = np.array([float(budgets.get(t, math.inf)) for t in curve.teams])
    checked = curve.analysts > 0
    miss_ok = np.isnan(curve.miss_rate) | (curve.miss_rate <= max_miss_rate)
    load = np.where(checked[None, :], curve.alerts_per_analyst_day, 0.0)
    within = load <= budget[None, :]
    ok = miss_ok & within.all(axis=1)
    if len(ks) == 0:
        return None, "the multiplier grid is empty"
    if ok.any():
        k = float(ks[ok].max())
        j = int(np.flatnonzero(ok & (ks == k))[0])
        if curve.incidents == 0:
            met = "no incidents to miss"
        else:
            met = f"miss rate {curve.miss_rate[j]:.3f} <= {max_miss_rate:.3f}"
        return k, f"k={k:g}: {met}, every team within its alert budget"
    if not miss_ok.any():
        j = int(np.lexsort((-ks, curve.miss_rate))[0])
        return None, (
            f"no multiplier in the grid meets the miss-rate target {max_miss_rate:.3f}: "
            f"the lowest miss rate is {curve.miss_rate[j]:.3f} at k={ks[j]:g} "
            f"({curve.incidents - curve.caught[j]} of {curve.incidents} incidents missed), "
            f"{curve.miss_rate[j] - max_miss_rate:.3f} above the target"
        )
    j = int(np.flatnonzero(miss_ok)[np.argmax(ks[miss_ok])])
    over = [
        f"team '{t}' gets {load[j, m]:.2f} alerts per analyst per day, "
        f"{load[j, m] - budget[m]:.2f} over its budget {budget[m]:g}"
        for m, t in enumerate(curve.teams)
        if not within[j, m]
    ]
    return None, (
        f"at k={ks[j]:g}, the largest multiplier meeting the miss-rate target "
        f"{max_miss_rate:.3f}, {'; '.join(over)}; no smaller multiplier does better"
    )


# --------------------------------------------------------------------------- trade-offs

LOAD_RATE_LABEL = "alerts per analyst per day (busiest team)"
LOAD_SHARE_LABEL = "alert load of the busiest team, as a share of its budget"


def load_axis(
    rates: Mapping[str, float], budgets: Mapping[str, float], analysts: Mapping[str, int]
) -> tuple[float, float | None, str]:
    """Alert load as one number: the busiest team's alerts per analyst per day when
    every checked team has the same budget, else the busiest team's share of its budget.

    Returns the load, the budget on that scale (None: no budget) and the axis label.
    Teams without analysts are not checked.
    """
    checked = [t for t in rates if analysts.get(t, 0) > 0]
    finite = {budgets.get(t, math.inf) for t in checked}
    if len(finite) <= 1:
        b = next(iter(finite), math.inf)
        x = max((rates[t] for t in checked if rates[t] == rates[t]), default=math.nan)
        return x, (b if math.isfinite(b) else None), LOAD_RATE_LABEL
    x = max(rates[t] / budgets[t] for t in checked if math.isfinite(budgets.get(t, math.inf)))
    return x, 1.0, LOAD_SHARE_LABEL


def curve_loads(curve: Curve, analysts: Mapping[str, int], goal: Goal) -> np.ndarray:
    """`load_axis` at every grid point of `curve`, for the teams of `analysts` (a team
    with analysts and no alerts counts 0)."""
    teams = [t for t, n in analysts.items() if n > 0]
    n_k = len(curve.ks)
    if not teams:
        return np.full(n_k, np.nan)
    col = {t: i for i, t in enumerate(curve.teams)}
    alerts = np.zeros((n_k, len(teams)))
    for i, t in enumerate(teams):
        if t in col:
            alerts[:, i] = curve.team_alerts[:, col[t]]
    rates = alerts / (np.array([analysts[t] for t in teams], dtype=np.float64) * curve.n_days)
    budget = np.array([goal.budget(t) for t in teams], dtype=np.float64)
    if len(set(budget.tolist())) <= 1:
        return rates.max(axis=1)
    finite = np.isfinite(budget)
    return (rates[:, finite] / budget[finite]).max(axis=1)


def pareto_front(x: Sequence[float], y: Sequence[float]) -> list[bool]:
    """Points no other point beats on both axes (lower x, higher y)."""
    xa, ya = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    out = []
    for i in range(len(xa)):
        dominated = (xa <= xa[i]) & (ya >= ya[i]) & ((xa < xa[i]) | (ya > ya[i]))
        out.append(bool(np.isfinite(xa[i]) and not dominated.any()))
    return out


def best_tradeoffs(caught: np.ndarray, load: np.ndarray, ks: np.ndarray,
                   min_impacts: np.ndarray) -> list[tuple[int, float, float, float]]:
    """The Pareto front of (incidents caught, alert load) over candidate settings.

    For each number of incidents caught, the least load of any candidate catching at
    least that many, kept where it is less than that of catching one more; ties go to
    the larger multiplier, then the smaller minimum impact.

    Parameters
    ----------
    caught, load, ks, min_impacts : ndarray (n,)
        One entry per candidate (multiplier, minimum impact) pair; NaN loads count 0.

    Returns
    -------
    list of (caught, load, k, min_impact)
        Most incidents caught first.
    """
    caught = np.asarray(caught, dtype=np.int64)
    load = np.nan_to_num(np.asarray(load, dtype=np.float64), nan=0.0)
    ks = np.asarray(ks, dtype=np.float64)
    ms = np.asarray(min_impacts, dtype=np.float64)
    order = np.lexsort((ms, -ks, load, -caught))
    out: list[tuple[int, float, float, float]] = []
    best = math.inf
    for i in order:
        if load[i] < best:  # the first of each caught level is its least load
            best = float(load[i])
            out.append((int(caught[i]), best, float(ks[i]), float(ms[i])))
    return out


# --------------------------------------------------------------------------- alerts CSV


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


# --------------------------------------------------------------------------- point / range


def intervals_mask(start: np.ndarray, end: np.ndarray, n_hours: int) -> np.ndarray:
    """Boolean hour mask of length `n_hours` covering every ``[start, end)``."""
    diff = np.zeros(n_hours + 1, dtype=np.int64)
    np.add.at(diff, np.clip(start, 0, n_hours), 1)
    np.add.at(diff, np.clip(end, 0, n_hours), -1)
    return np.cumsum(diff[:-1]) > 0


def point_precision_recall(truth: np.ndarray, pred: np.ndarray) -> tuple[float, float]:
    """Hour-level precision and recall of boolean masks (NaN when undefined).

    Shown for comparison only: hour-level figures weigh long incidents heavily;
    the workbench's figures are event-level (see `match`).
    """
    truth, pred = np.asarray(truth, dtype=bool), np.asarray(pred, dtype=bool)
    tp = int((truth & pred).sum())
    return float(_ratio(tp, int(pred.sum()))), float(_ratio(tp, int(truth.sum())))


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    m = np.r_[False, np.asarray(mask, dtype=bool), False].astype(np.int8)
    edges = np.flatnonzero(np.diff(m))
    return list(zip(edges[::2].tolist(), edges[1::2].tolist(), strict=True))


def range_precision_recall(truth: np.ndarray, pred: np.ndarray) -> tuple[float, float]:
    """Range-based precision and recall (Tatbul et al. 2018), alpha=0, flat bias, gamma=1.

    Each real range scores the share of its hours covered by predictions (recall);
    each predicted range the share of its hours inside real ranges (precision);
    both averaged over ranges. NaN when there are no ranges of that kind.
    """
    truth, pred = np.asarray(truth, dtype=bool), np.asarray(pred, dtype=bool)

    def mean_cover(ranges: list[tuple[int, int]], other: np.ndarray) -> float:
        if not ranges:
            return math.nan
        return float(np.mean([other[a:b].mean() for a, b in ranges]))

    return mean_cover(_runs(pred), truth), mean_cover(_runs(truth), pred)
