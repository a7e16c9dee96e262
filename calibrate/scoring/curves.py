"""Figures over a whole multiplier grid at once, and the multiplier solves: the largest
multiplier of a curve meeting the goal, and the exact optimum over every breakpoint
multiplier and minimum-impact level of a run table.

Pipeline stage 6. The counts come from numba kernels over (run, incident) pairs.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numba
import numpy as np
import pandas as pd

from calibrate.detection.episodes import CodedEpisodes, Episodes
from calibrate.inputs.incidents import Incidents
from calibrate.inputs.workspace import Goal
from calibrate.scoring.intervals import ratio, wilson
from calibrate.scoring.matching import catch_pairs, overlap_pairs, text_codes


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
    team_code, team_names = text_codes(ep, "team")
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
        miss_rate=ratio(n_inc - caught, np.full(n_k, n_inc)),
        miss_rate_low=low,
        miss_rate_high=high,
        alerts=alerts,
        true_alerts=true_alerts,
        false_alerts=alerts - true_alerts,
        teams=teams,
        analysts=analysts,
        team_alerts=team_alerts,
        team_false_alerts=team_false,
        alerts_per_analyst_day=ratio(team_alerts, analysts[None, :] * n_days),
        false_alerts_per_analyst_day=ratio(team_false, analysts[None, :] * n_days),
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
    pa, pi = overlap_pairs(ep, incidents, early, late)
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
    # element loops, not array statements (run += diff[w, j]): numba compiles the
    # text of a shape-mismatch error for those, seconds of every cold-cache start
    counts = np.zeros((2, n_k, n_m, n_t), dtype=np.int64)
    for w in range(2):
        for lv in range(n_m):
            for t in range(n_t):
                run = 0
                for j in range(n_k):
                    run += diff[w, j, lv, t]
                    counts[w, j, lv, t] = run
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
    pa, pi = overlap_pairs(ep, incidents, early, late)
    if false_windows is not None and len(false_windows):
        fa, fi = overlap_pairs(ep, false_windows, 0, 0)
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
            for t in range(n_t):  # element loops: see _online_kernel
                alerts_t[t] += d_team[j, t]
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
                for t in range(n_t):
                    out_teams[t] = alerts_t[t]
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
