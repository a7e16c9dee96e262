"""Match alerts to incidents: the event rule, the pair kernels, team routing.

Pipeline stage 6. Pure functions on the column tables `Episodes` and `Incidents`.

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

from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import TypeVar

import numba
import numpy as np
import pandas as pd

from calibrate.detection.episodes import CodedEpisodes, Episodes
from calibrate.inputs.history import History
from calibrate.inputs.incidents import ANY_METRIC, Incidents

Table = TypeVar("Table", Episodes, Incidents)
ANY_METRIC_CODE = -2  # metric code of an incident that counts for any metric


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
    oa, oi = overlap_pairs(episodes, incidents, early_hours, late_hours)
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
    pa, pi = overlap_pairs(episodes, incidents, early, late)
    return _raised_inside(pa, pi, episodes, incidents, early, late)


def overlap_pairs(
    episodes: Episodes | CodedEpisodes, incidents: Incidents, early: int, late: int
) -> tuple[np.ndarray, np.ndarray]:
    """All (episode, incident) pairs on the same series and metric whose hours overlap
    the incident's window (a superset of the meeting pairs), sorted by incident then
    episode."""
    n_ep, n_inc = len(episodes), len(incidents)
    if n_ep == 0 or n_inc == 0:
        return np.array([], dtype=np.int64), np.array([], dtype=np.int64)
    ep_level, levels = text_codes(episodes, "level")
    ep_metric, metrics = text_codes(episodes, "metric")
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
    """`overlap_pairs` on integer codes (incident level -1: no episode has it)."""
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


def text_codes(table: Episodes | CodedEpisodes, column: str) -> tuple[np.ndarray, tuple]:
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
