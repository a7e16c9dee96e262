"""Scoring one structural setting (stage 8): `Evaluator` solves its multiplier and
per-metric minimum impacts on the tuning hours and returns an `Evaluation`; grouped
settings are solved jointly (`greedy_multipliers`). Also what the tuning labels can
show at best (`labels_line`).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from calibrate.api import Session
from calibrate.engine.replay import HourScores, Replayer, TuningScores, sweep_codes, sweep_runs
from calibrate.errors import InputError
from calibrate.inputs.incidents import Incidents
from calibrate.inputs.workspace import BASE_GROUP, Goal
from calibrate.scoring.curves import (
    Curve,
    ExactPoint,
    exact_solve,
    impact_curves,
    multiplier_curve,
    solve_multiplier,
)
from calibrate.scoring.intervals import incidents_needed, wilson, zero_miss_bound
from calibrate.scoring.matching import catch_pairs, period_filter
from calibrate.scoring.tradeoffs import best_tradeoffs, curve_loads, load_axis
from calibrate.settings import DetectorConfig

KNOWN_FALSE_PENALTY = 1.0
# per (level, metric): a replay's scores or the tuning store's
Scores = dict[tuple[str, str], HourScores | TuningScores]


@dataclass
class Evaluation:
    """Figures of one structural setting at its solved multiplier(s), tuning hours."""

    feasible: bool
    reason: str
    k: float
    group_k: dict[str, float]
    incidents: int
    caught: int
    miss_rate: float
    miss_rate_high: float
    alerts: int
    known_false_alerts: int
    team_rate: dict[str, float]
    max_budget_ratio: float
    value: float
    constraints: list[float]
    # solved minimum impact per metric (None: the config's own)
    min_impact: dict[str, float] | None = None
    # the same per group: group -> metric -> minimum impact
    group_min_impact: dict[str, dict[str, float]] = field(default_factory=dict)
    # best trade-offs over the solved multiplier (and minimum impact) grid: [caught,
    # load (`scoring.tradeoffs.load_axis`), k, min_impact or None]; empty for grouped settings
    # (`tune` computes the chosen grouped setting's with `Evaluator.group_front`)
    front: list[list[float | None]] = field(default_factory=list)

    def attrs(self) -> dict[str, Any]:
        return {k: json_safe(v) for k, v in dataclasses.asdict(self).items()}


@dataclass
class JointSolve:
    """One joint solve of grouped settings (`Evaluator._joint`): incidents caught,
    alerts, known-false alerts, alerts per team (in the order of the team list
    `_group_parts` returns) and the groups' multipliers and solved minimum impacts;
    `load` is set by `group_front`."""

    caught: int
    alerts: int
    kf: int
    team_alerts: np.ndarray
    group_k: dict[str, float]
    group_min_impact: dict[str, dict[str, float]]
    load: float = math.nan


@dataclass
class Evaluator:
    """Scores settings on the tuning hours; holds the replayer and its cache."""

    ses: Session
    replayer: Replayer
    ks: np.ndarray
    first_hour: int
    split_hour: int
    goal: Goal
    known_false: Incidents | None = None
    # metric -> grid (one length for all; level l of every metric is one candidate): the
    # minimum impacts are solved on it with the multiplier (configs without groups);
    # None keeps each config's own minimum impact
    min_impacts: dict[str, np.ndarray] | None = None
    # the same per group (tune_by level, metric or group), by group name
    group_min_impacts: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)
    # the scores it reads end here (default: the split); evaluators of earlier splits
    # sharing a replayer pass the latest one, so they share its store of tuning hours
    scores_end: int | None = None
    incidents: Incidents = field(init=False)
    false_windows: Incidents | None = field(init=False)
    # the goal settings are judged by: the miss-rate target tightened by
    # `goal.spare_incidents` (the target must hold with that many more misses)
    judge: Goal = field(init=False)

    def __post_init__(self) -> None:
        if self.scores_end is None:
            self.scores_end = self.split_hour
        if self.scores_end < self.split_hour:
            raise ValueError(f"scores_end {self.scores_end} is before the split "
                             f"{self.split_hour}")
        if self.ses.incidents is None:
            raise InputError(str(self.ses.ws.file), "no [incidents] path: nothing to tune against")
        self.incidents = period_filter(self.ses.incidents, self.first_hour, self.split_hour)
        n = len(self.incidents)
        self.judge = self.goal if not n or not self.goal.spare_incidents else replace(
            self.goal, max_miss_rate=self.goal.max_misses(n) / n)
        self.false_windows = None
        if self.known_false is not None and len(self.known_false):
            self.false_windows = self.known_false

    def scores(self, config: DetectorConfig) -> Scores:
        """What `config` flags on hours before `scores_end`
        (`Replayer.tuning_scores`: each decomposition setting fitted once)."""
        return self.replayer.tuning_scores(config, self.scores_end, float(self.ks.min()))

    @property
    def n_days(self) -> float:
        return (self.split_hour - self.first_hour) / 24.0

    def curve(self, scores: Scores) -> tuple[Curve, np.ndarray, Any]:
        """Curve on the tuning hours, known-false alerts per k, and the episodes."""
        eps = sweep_codes(scores, self.ks, self.replayer.routes,
                          start_hours=(self.first_hour, self.split_hour))
        ws = self.ses.ws
        c = multiplier_curve(eps, self.ks, self.incidents, ws.incidents.early_hours,
                             ws.incidents.late_hours, self.ses.analysts, self.n_days)
        kf = np.zeros(len(self.ks), dtype=np.int64)
        if self.false_windows is not None:
            # alerts meeting a known-false window are that curve's "true alerts"
            kf = multiplier_curve(eps, self.ks, self.false_windows, 0, 0, self.ses.analysts,
                                  self.n_days).true_alerts
        return c, kf, eps

    def evaluate(self, config: DetectorConfig) -> Evaluation:
        """Solve the multiplier(s) of `config` and return its figures."""
        if self.min_impacts is not None and not config.groups:
            return self._evaluate_with_impact(config)
        scores = self.scores(config)
        if not config.groups:
            c, kf, _ = self.curve(scores)
            pt = self._exact(scores, None)
            if pt is not None:
                ev = self._exact_figures(pt, None)
            else:  # infeasible: the grid point closest to the goal
                _, reason = solve_multiplier(c, self.judge.max_miss_rate, self.judge)
                j = _fallback_index(c, self.judge)
                ev = self._figures(
                    feasible=False, reason=reason, k=float(c.ks[j]), group_k={},
                    caught=int(c.caught[j]), alerts=int(c.alerts[j]), kf=int(kf[j]),
                    team_alerts=c.team_alerts[j], teams=c.teams,
                )
            ev.front = self._front([c], None)
            return ev
        return self._evaluate_groups(config, scores)

    def breakpoints(self, scores: Scores) -> np.ndarray:
        """Every multiplier at which the flags change, within the grid's range: each
        distinct fence score of the hours before the split in (min grid, max grid],
        plus the grid itself (today's multiplier among it)."""
        low, high = float(self.ks.min()), float(self.ks.max())
        parts = [self.ks]
        for ms in scores.values():
            v = ms.scores_before(self.split_hour)
            with np.errstate(invalid="ignore"):
                parts.append(np.unique(v[(v > low) & (v <= high)]))  # no copy of all hours
        return np.unique(np.concatenate(parts))

    def _exact(self, scores: Scores,
               grids: dict[str, np.ndarray] | None):
        """`scoring.curves.exact_solve` over every breakpoint multiplier (and minimum-impact
        level of `grids`; None: each series' own minimum impact)."""
        ws = self.ses.ws
        ks = self.breakpoints(scores)
        runs = sweep_runs(scores, ks, self.replayer.routes,
                          start_hours=(self.first_hour, self.split_hour), min_impacts=grids)
        return exact_solve(runs, ks, self.incidents, ws.incidents.early_hours,
                           ws.incidents.late_hours, self.ses.analysts, self.n_days, self.judge,
                           self.false_windows, KNOWN_FALSE_PENALTY)

    def _exact_figures(self, pt: ExactPoint, grids: dict[str, np.ndarray] | None) -> Evaluation:
        ev = self._figures(
            feasible=True, reason="", k=pt.k, group_k={}, caught=pt.caught, alerts=pt.alerts,
            kf=pt.known_false, team_alerts=pt.team_alerts, teams=pt.teams,
            min_impact=None if grids is None else _level(grids, pt.level))
        ev.reason = f"k={pt.k:g}: " + _reason(ev, self.judge)
        return ev

    def _evaluate_with_impact(self, config: DetectorConfig) -> Evaluation:
        """Solve multiplier and minimum impacts together (`_exact`): the fewest
        (penalised) alerts meeting the goal over every breakpoint multiplier and every
        minimum-impact level; ties go to the larger multiplier, then the lower level. An
        infeasible setting reports the grid pair closest to the goal: the lowest
        miss-rate excess, then the lowest worst budget ratio (the exact search's
        feasible pairs include every grid pair's, so none of those is feasible either)."""
        grids = self.min_impacts
        scores = self.scores(config)
        curves, kfs, _ = self._impact_curves(scores, grids)
        pt = self._exact(scores, grids)
        if pt is not None:
            ev = self._exact_figures(pt, grids)
        else:
            picks = []
            for lv, c in enumerate(curves):
                j = _fallback_index(c, self.judge)
                miss = 0.0 if np.isnan(c.miss_rate[j]) else float(c.miss_rate[j])
                picks.append((max(miss - self.judge.max_miss_rate, 0.0),
                              self._budget_ratio(c, j), -float(c.ks[j]), float(lv), lv, j))
            *_, lv, j = min(picks)
            c = curves[lv]
            _, reason = solve_multiplier(c, self.judge.max_miss_rate, self.judge)
            ev = self._figures(
                feasible=False, reason=reason, k=float(c.ks[j]), group_k={},
                caught=int(c.caught[j]), alerts=int(c.alerts[j]), kf=int(kfs[lv][j]),
                team_alerts=c.team_alerts[j], teams=c.teams, min_impact=_level(grids, lv))
        ev.front = self._front(curves, grids)
        return ev

    def _front(self, curves: Sequence[Curve],
               grids: dict[str, np.ndarray] | None) -> list[list[Any]]:
        """`scoring.tradeoffs.best_tradeoffs` over every (multiplier, minimum impact) pair of
        `curves` (curve l at minimum impact level l of `grids`; None: the config's own)."""
        pts = best_tradeoffs(
            np.concatenate([c.caught for c in curves]),
            np.concatenate([curve_loads(c, self.ses.analysts, self.judge) for c in curves]),
            np.concatenate([c.ks for c in curves]),
            np.concatenate([np.full(len(c.ks), float(lv)) for lv, c in enumerate(curves)]))
        return [[c, x, k, None if grids is None else _level(grids, int(lv))]
                for c, x, k, lv in pts]

    def _evaluate_groups(self, config: DetectorConfig,
                         scores: Scores) -> Evaluation:
        parts, teams = self._group_parts(config, scores)
        j = self._joint(parts, teams, self.judge.max_miss_rate)
        ev = self._figures(feasible=True, reason="",
                           k=float(np.median(list(j.group_k.values()))), group_k=j.group_k,
                           caught=j.caught, alerts=j.alerts, kf=j.kf, team_alerts=j.team_alerts,
                           teams=tuple(teams))
        ev.group_min_impact = j.group_min_impact
        ev.feasible = all(v <= 0 for v in ev.constraints)
        ev.reason = _reason(ev, self.judge)
        return ev

    def group_front(self, config: DetectorConfig) -> list[JointSolve]:
        """Best trade-offs of a grouped `config`: the joint solve (`greedy_multipliers`)
        at every miss-rate level k/n, kept where no other level catches as many for
        less load (`scoring.tradeoffs.best_tradeoffs`); most incidents caught first."""
        parts, teams = self._group_parts(config, self.scores(config))
        n_inc = len(self.incidents)
        budgets = {t: self.judge.budget(t) for t in self.ses.analysts}
        solves = [self._joint(parts, teams, (n_inc - c) / n_inc if n_inc else 0.0)
                  for c in range(n_inc + 1)]
        for js in solves:
            rates, _ = _max_ratio(dict(zip(teams, js.team_alerts, strict=True)),
                                  self.ses.analysts, self.judge, self.n_days)
            js.load = load_axis(rates, budgets, self.ses.analysts)[0]
        n = len(solves)
        pts = best_tradeoffs(np.array([js.caught for js in solves]),
                             np.array([js.load for js in solves]),
                             -np.arange(n, dtype=np.float64), np.zeros(n))
        # best_tradeoffs' k slot carries -index here, so ties keep the lowest index c
        # (the most lenient miss-rate level); either solve is valid
        return [solves[int(-k)] for _, _, k, _ in pts]

    def _group_parts(self, config: DetectorConfig,
                     scores: Scores) -> tuple[list, list[str]]:
        """Every group's candidates (`_candidates`) and the teams they route to."""
        teams = list(self.ses.analysts)
        parts = []
        # each (level, metric) belongs to the first group matching it (as in replay),
        # the rest to the base settings, solved as one more group
        owner = {key: next((i for i, g in enumerate(config.groups) if g.matches(*key)), None)
                 for key in scores}
        for i, g in [*enumerate(config.groups), (None, None)]:
            sub = {key: ms for key, ms in scores.items() if owner[key] == i}
            if sub:
                parts.append(self._candidates(BASE_GROUP if g is None else g.name, sub, teams))
        return parts, teams

    def _joint(self, parts: list, teams: list[str], max_miss_rate: float) -> JointSolve:
        """The groups' joint multipliers (and minimum impacts) at `max_miss_rate`."""
        # a candidate is (multiplier j, minimum impact l) at index l * n_k + j; groups
        # whose minimum impact is not solved have l = 0 only (their own value)
        n_k, n_t = len(self.ks), len(teams)
        cost = [alerts + KNOWN_FALSE_PENALTY * kf for _, _, _, alerts, kf, _ in parts]
        idx = greedy_multipliers([p[1] for p in parts], cost, max_miss_rate,
                                 forward_only=[p[2] is None for p in parts])
        caught = np.zeros(len(self.incidents), dtype=bool)
        ta = np.zeros(n_t, dtype=np.int64)
        alerts = kf = 0
        group_k: dict[str, float] = {}
        group_m: dict[str, float] = {}
        for (name, cm, grid, al, kfs, curves), i in zip(parts, idx, strict=True):
            caught |= cm[i]
            c = curves[i // n_k]
            for t, v in zip(c.teams, c.team_alerts[i % n_k], strict=True):
                ta[teams.index(t)] += v
            alerts += int(al[i])
            kf += int(kfs[i])
            group_k[name] = float(self.ks[i % n_k])
            if grid is not None:
                group_m[name] = _level(grid, i // n_k)
        return JointSolve(caught=int(caught.sum()), alerts=alerts, kf=kf, team_alerts=ta,
                          group_k=group_k, group_min_impact=group_m)

    def _candidates(self, name: str, sub: Scores,
                    teams: list[str]):
        """One group's candidates: (name, caught (n_cand, n_inc), minimum impact grid or
        None, alerts, known-false alerts, curves (candidate i is row i % n_k of curve
        i // n_k)); `teams` gains the group's teams."""
        grid = self.group_min_impacts.get(name)
        if grid is None:
            c, kf, eps = self.curve(sub)
            caught = np.zeros((len(self.ks), len(self.incidents)), dtype=bool)
            pa, pi = catch_pairs(eps, self.incidents, self.ses.ws.incidents.early_hours,
                                 self.ses.ws.incidents.late_hours)
            caught[np.asarray(eps.grid, dtype=np.int64)[pa], pi] = True
            curves, kfs = [c], [kf]
        else:
            grid = {m: g for m, g in grid.items() if any(key[1] == m for key in sub)}
            curves, kfs, caught_lk = self._impact_curves(sub, grid)
            caught = caught_lk.reshape(len(curves) * len(self.ks), len(self.incidents))
        for c in curves:
            teams.extend(t for t in c.teams if t not in teams)
        alerts = np.concatenate([c.alerts for c in curves])
        return name, caught, grid, alerts, np.concatenate(kfs), curves

    def _impact_curves(self, scores: Scores,
                       grids: dict[str, np.ndarray]):
        """Curves over the multiplier grid for every minimum-impact level of `grids`
        (tuning hours), the known-false alerts of each, and which incidents each
        (level, multiplier) catches."""
        ws = self.ses.ws
        runs = sweep_runs(scores, self.ks, self.replayer.routes,
                          start_hours=(self.first_hour, self.split_hour), min_impacts=grids)
        curves, caught = impact_curves(runs, self.ks, self.incidents, ws.incidents.early_hours,
                                       ws.incidents.late_hours, self.ses.analysts, self.n_days)
        kfs = [np.zeros(len(self.ks), dtype=np.int64)] * len(curves)
        if self.false_windows is not None:
            kfs = [c.true_alerts for c in impact_curves(
                runs, self.ks, self.false_windows, 0, 0, self.ses.analysts, self.n_days)[0]]
        return curves, kfs, caught

    def _budget_ratio(self, c: Curve, j: int) -> float:
        return _max_ratio(dict(zip(c.teams, c.team_alerts[j], strict=True)), self.ses.analysts,
                          self.judge, self.n_days)[1]

    def _figures(self, *, feasible: bool, reason: str, k: float, group_k: dict[str, float],
                 caught: int, alerts: int, kf: int, team_alerts: np.ndarray,
                 teams: Sequence[str], min_impact: dict[str, float] | None = None) -> Evaluation:
        n_inc = len(self.incidents)
        miss = (n_inc - caught) / n_inc if n_inc else 0.0
        high = float(wilson(n_inc - caught, n_inc)[1]) if n_inc else 0.0
        rates, ratio = _max_ratio(dict(zip(teams, team_alerts, strict=True)), self.ses.analysts,
                                  self.judge, self.n_days)
        total_analysts = sum(self.ses.analysts.values()) or 1
        value = (alerts + KNOWN_FALSE_PENALTY * kf) / (total_analysts * self.n_days)
        constraints = [miss - self.judge.max_miss_rate, ratio - 1.0]
        return Evaluation(
            feasible=feasible, reason=reason, k=k, group_k=group_k, incidents=n_inc,
            caught=caught, miss_rate=miss, miss_rate_high=high, alerts=alerts,
            known_false_alerts=kf, team_rate=rates, max_budget_ratio=ratio, value=value,
            constraints=constraints, min_impact=min_impact,
        )


def _level(grids: dict[str, np.ndarray], lv: int) -> dict[str, float]:
    """Each metric's minimum impact at level `lv` of per-metric `grids`."""
    return {m: float(g[lv]) for m, g in grids.items()}


def _max_ratio(team_alerts: dict[str, Any], analysts: dict[str, int], goal: Goal,
               n_days: float) -> tuple[dict[str, float], float]:
    """Alerts per analyst per day of each team with analysts, and the worst budget ratio."""
    rates, worst = {}, 0.0
    for t, n in analysts.items():
        if n <= 0:
            continue
        rate = float(team_alerts.get(t, 0)) / (n * n_days)
        rates[t] = rate
        b = goal.budget(t)
        worst = max(worst, rate / b if math.isfinite(b) else 0.0)
    return rates, worst


def _fallback_index(c: Curve, goal: Goal) -> int:
    """Grid point reported for an infeasible setting: among multipliers meeting the
    miss rate the one with the lowest worst budget ratio, else the lowest miss rate."""
    miss = np.where(np.isnan(c.miss_rate), 0.0, c.miss_rate)
    ok = np.flatnonzero(miss <= goal.max_miss_rate)
    if len(ok):
        budget = np.array([goal.budget(t) for t in c.teams])
        checked = c.analysts > 0
        load = np.where(checked[None, :], np.nan_to_num(c.alerts_per_analyst_day), 0.0)
        ratio = np.where(np.isfinite(budget)[None, :], load / budget[None, :], 0.0).max(axis=1)
        return int(ok[np.lexsort((-c.ks[ok], ratio[ok]))[0]])
    return int(np.lexsort((-c.ks, miss))[0])


def greedy_multipliers(caught: Sequence[np.ndarray], cost: Sequence[np.ndarray],
                       max_miss_rate: float,
                       forward_only: Sequence[bool] | None = None) -> list[int]:
    """Joint multiplier grid indices for several groups (method in the module docstring).

    Parameters
    ----------
    caught : list of (n_cand, n_incidents) bool arrays, one per group
    cost : list of (n_cand,) arrays (alerts, penalised), one per group
    max_miss_rate : float
    forward_only : list of bool, optional
        Per group: moves only to a later candidate (a larger multiplier, the default),
        or to any candidate that saves alerts (candidates of (multiplier, minimum
        impact) pairs). Every move saves alerts, so the method ends.

    Returns
    -------
    list of int
        Candidate index per group (the first one is where each group starts).
    """
    n_g = len(caught)
    idx = [0] * n_g
    n_inc = caught[0].shape[1] if n_g else 0
    forward = list(forward_only) if forward_only is not None else [True] * n_g

    def miss(count: np.ndarray | int) -> np.ndarray:
        return (n_inc - np.asarray(count)) / n_inc if n_inc else np.zeros(np.shape(count))

    while True:
        rows = [caught[g][idx[g]] for g in range(n_g)]
        now = np.logical_or.reduce(rows).sum() if n_g else 0
        if miss(now) > max_miss_rate:
            return idx
        best: tuple[float, float, int, int] | None = None
        for g in range(n_g):
            others = np.logical_or.reduce([rows[h] for h in range(n_g) if h != g]) \
                if n_g > 1 else np.zeros(n_inc, dtype=bool)
            counts = (caught[g] | others[None, :]).sum(axis=1)
            saving = cost[g][idx[g]] - cost[g]
            lost = now - counts
            ok = (miss(counts) <= max_miss_rate) & (saving > 0)
            if forward[g]:
                ok &= np.arange(len(counts)) > idx[g]
            cand = np.flatnonzero(ok)
            if not len(cand):
                continue
            with np.errstate(divide="ignore", invalid="ignore"):
                rate = np.where(lost[cand] <= 0, np.inf, saving[cand] / lost[cand])
            # the group's best move: highest rate, then saving, then the later candidate
            top = np.lexsort((cand, saving[cand], rate))[-1]
            move = (float(rate[top]), float(saving[cand][top]), -g, int(cand[top]))
            if best is None or move > best:
                best = move
        if best is None:
            return idx
        idx[-best[2]] = best[3]


def _reason(ev: Evaluation, goal: Goal) -> str:
    if ev.feasible:
        return (f"miss rate {ev.miss_rate:.3f} <= {goal.max_miss_rate:.3f}, every team within "
                f"its alert budget ({ev.value:.2f} alerts per analyst per day)")
    if ev.constraints[0] > 0:
        return (f"miss rate {ev.miss_rate:.3f} is {ev.constraints[0]:.3f} above the target "
                f"{goal.max_miss_rate:.3f}")
    return (f"the busiest team gets {ev.max_budget_ratio:.2f} times its alert budget "
            f"at miss rate {ev.miss_rate:.3f}")


def json_safe(v: Any) -> Any:
    if isinstance(v, dict):
        return {str(k): json_safe(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [json_safe(x) for x in v]
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None if math.isnan(v) else (1e300 if v > 0 else -1e300)
    return v


def labels_line(n_incidents: int, goal: Goal) -> str:
    """What `n_incidents` tuning-week labels can show at best: the miss-rate upper bound
    of a setting that misses none (Wilson), against the target; one line."""
    bound = zero_miss_bound(n_incidents)
    head = (f"{n_incidents} labelled incident(s) in the tuning weeks: even a setting that "
            f"misses none shows a miss rate of at most {bound:.1%} (95% upper bound)")
    if goal.spare_incidents and goal.max_misses(n_incidents) < 0:
        return (head + f"; with spare_incidents = {goal.spare_incidents} no setting can meet "
                f"the target {goal.max_miss_rate:.1%}: there are too few incidents")
    if bound <= goal.max_miss_rate:
        return head + f", within the target {goal.max_miss_rate:.1%}"
    need = incidents_needed(goal.max_miss_rate)
    more = "" if need is None else f"; showing it would take at least {need} labelled incidents"
    return (head + f", above the target {goal.max_miss_rate:.1%}: these labels cannot show the "
            "target is met, only that it is not clearly missed" + more)
