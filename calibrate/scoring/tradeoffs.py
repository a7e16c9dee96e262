"""Trade-offs between incidents caught and alert load: the load as one number (the
busiest team, or its share of its budget) and the Pareto fronts over candidate settings.

Pipeline stage 6. Pure functions on curves and arrays.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from calibrate.inputs.workspace import Goal
from calibrate.scoring.curves import Curve

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
