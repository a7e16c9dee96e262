"""Constrained search for detector settings (pipeline stage 7, `calibrate tune`).

Optuna drives the structural settings (windows, spans, flatline hours, ...); the
fence multiplier is never searched. For each trial the `Replayer` computes fence
scores (cached remainder streams: only settings that change the decomposition
refit); the flags change only where k passes a score, so `Evaluator.breakpoints`
(every distinct score of the hours before the split in the multiplier range) are
all the multipliers there are, `sweep_runs` turns them into runs of flagged hours
(each one episode over a range of breakpoints) and `scoring.exact_solve` picks the
breakpoint with the fewest alerts that meets the miss-rate target and every team's
alert budget. An 80-point grid (`multiplier_curve`) is scored for plots, the
trade-off front and, when nothing is feasible, the point closest to the goal.

Minimum impact: solved per watched metric, in the metric's own units, together with
the multiplier (unless `[search]` lists values for Optuna to sample). Each metric has
a range (`impact_ranges`: its own, or 0 to its typical hourly level on the tuning
weeks); level l of the grid is the same share of every metric's range
(`impact_grids`). An alert is raised when its episode's |impact so far| reaches the
metric's minimum impact, so one sweep (`sweep_runs` with the grids) gives every
run's raised hour at every level, and `exact_solve` scores every (breakpoint,
level) pair at once; the pair with the fewest (penalised) alerts wins, ties to the
larger multiplier, then the lower level.

Objective (minimised): alerts per analyst per day over all teams at the solved
multiplier, i.e. ``(alerts + KNOWN_FALSE_PENALTY * known_false_alerts) /
(analysts * days)`` on the tuning hours, where ``known_false_alerts`` are alerts
raised inside a window analysts marked as a false alarm (``known_false``), so each
of those counts ``1 + KNOWN_FALSE_PENALTY`` times. With no analysts configured the
denominator is days. Constraints (Optuna's ``constraints_func``, feasible when all
are <= 0): ``miss_rate - max_miss_rate`` and ``max over teams of
(alerts_per_analyst_day / budget) - 1``. Infeasible trials are kept.

Parameter groups (``[search] tune_by = "level"``, ``"metric"`` or ``"group"``, the
last being the workspace's ``[detector.group.NAME]`` tables plus ``base`` for the
series none matches): every searched setting gets one Optuna parameter per group
(``"campaign/fence_window_hours"``), all in one study. The groups' multipliers are
then solved jointly by a greedy method over the groups' curves: start every group
at the smallest multiplier of the grid (most catches); repeatedly take the single
move "raise group g's multiplier to grid point j" that keeps the joint miss rate
within the target and saves the most alerts per incident it loses (moves that lose
nothing first, largest saving first); stop when no move saves alerts. Team
budgets, which span groups, are checked on the joint result. The joint miss rate
counts an incident as caught when any group's alerts catch it.

Holdout: the last ``holdout_fraction`` of the history, rounded to whole weeks, is
held out; objective and constraints use only ``[first_hour, split_hour)``, where
``first_hour`` is the latest first scored hour over the space (the longest candidate
decomposition window minus one, or L + W with ``expected_value = "forecast"``), so
every trial is scored on the same hours. Replays run over the whole history; with no
look-ahead, hours before the split never see later data.
"""

from __future__ import annotations

import dataclasses
import hashlib
import importlib.metadata
import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import optuna
import pandas as pd
from tqdm.auto import tqdm

from calibrate import api, rolling, studies
from calibrate.api import Session
from calibrate.episodes import Episodes
from calibrate.errors import CalibrationError, InputError
from calibrate.executors import Executor
from calibrate.incidents import Incidents
from calibrate.replay import MetricScores, Replayer, sweep_codes, sweep_runs
from calibrate.scoring import (
    Curve,
    ExactPoint,
    Figures,
    best_tradeoffs,
    catch_pairs,
    curve_loads,
    exact_solve,
    impact_curves,
    incidents_needed,
    load_axis,
    match,
    multiplier_curve,
    pareto_front,
    period_filter,
    solve_multiplier,
    validation_verdict,
    wilson,
    zero_miss_bound,
)
from calibrate.settings import DetectorConfig, DetectorGroup, DetectorSettings
from calibrate.workspace import BASE_GROUP, Goal, SearchParam

GRID_POINTS = 80
IMPACT_STEPS = (1.0, 1.5, 2.0, 3.0, 5.0, 7.0)  # solved minimum impacts, per decade
KNOWN_FALSE_PENALTY = 1.0
WEEK = 168
STUDY_FILE = ".calibrate/study.journal"
# states that use up the trial budget; a trial interrupted mid-way ends FAIL and is
# run again (as a new trial) by the next `tune`, so an interruption loses nothing
BUDGET_STATES = (optuna.trial.TrialState.COMPLETE, optuna.trial.TrialState.PRUNED)
INVALID = 1e9  # constraint value of a pruned (invalid) combination
MAX_PRECOMPUTED_WINDOWS = 64
# remainder streams a tune keeps in memory; beyond, the least recently used
# decomposition settings are dropped and refit if a later trial needs them again
STREAM_CACHE_BYTES = 2 * 1024**3


# --------------------------------------------------------------------------- space


@dataclass(frozen=True, kw_only=True)
class Param:
    """One Optuna parameter: a detector setting, optionally of one group."""

    name: str  # Optuna name: "setting" or "group/setting"
    setting: str
    group: str | None
    spec: SearchParam

    def suggest(self, trial: optuna.Trial) -> Any:
        s = self.spec
        if s.kind == "choice":
            return trial.suggest_categorical(self.name, list(s.values))
        if s.kind == "int":
            return trial.suggest_int(self.name, int(s.low), int(s.high), step=int(s.step))
        return trial.suggest_float(self.name, float(s.low), float(s.high), log=s.log)


def default_params(ses: Session, metrics: Sequence[str] | None = None) -> tuple[SearchParam, ...]:
    """Search space used when `[search]` names no setting: fence window, seasonal span
    (odd) and flatline hours (the minimum impact is solved per metric, see
    `impact_ranges`)."""
    return (
        SearchParam(name="fence_window_hours", kind="choice", values=(72, 120, 168, 240)),
        SearchParam(name="seasonal_span", kind="choice", values=(7, 11, 15)),
        SearchParam(name="flatline_hours", kind="choice", values=(0, 6, 10)),
    )


def typical_level(ses: Session, metric: str, end_hour: int | None = None) -> float:
    """Median |hourly value| of `metric` over every series of every level and the hours
    before `end_hour` (the tuning weeks: held-out hours are never read); 1 when undefined."""
    vals = [np.abs(ls.values[metric][:, :end_hour]).ravel()
            for ls in ses.history.levels.values() if metric in ls.values]
    if not vals:
        return 1.0
    with np.errstate(all="ignore"):
        med = float(np.nanmedian(np.concatenate(vals))) if sum(len(v) for v in vals) else 0.0
    return med if math.isfinite(med) and med > 0 else 1.0


def _with_current(spec: SearchParam, value: Any) -> SearchParam:
    """Make sure today's value lies in the space, so the warm start is exact."""
    if spec.kind == "choice":
        if any(type(v) is type(value) and v == value for v in spec.values):
            return spec
        return replace(spec, values=(*spec.values, value))
    if spec.kind == "int":
        low, high, step = int(spec.low), int(spec.high), max(int(spec.step), 1)
        if spec.name in ("seasonal_span",) or (spec.name == "trend_span" and low > 0):
            low, step = low | 1, step + step % 2  # odd spans by construction
            high = high if high % 2 else high - 1
        if (int(value) - low) % step == 0 and low <= value <= high:
            return replace(spec, low=low, high=max(high, low), step=step)
        return replace(spec, kind="choice", values=tuple(
            sorted({*range(low, high + 1, step), int(value)})))
    lo, hi = min(float(spec.low), float(value)), max(float(spec.high), float(value))
    if spec.log and lo <= 0:
        return replace(spec, low=lo, high=hi, log=False)
    return replace(spec, low=lo, high=hi)


def group_metrics(ses: Session, group: str | None) -> list[str]:
    """Watched metrics of one search group (None: every watched metric)."""
    tune_by = ses.ws.search.tune_by
    if tune_by == "metric" and group:
        return [group]
    if tune_by == "group" and group and group != BASE_GROUP:
        own = [m for g in ses.ws.detector.groups if g.name == group for m in g.metrics]
        return [m for m in ses.ws.metric_names if m in own] or list(ses.ws.metric_names)
    return list(ses.ws.metric_names)


def _shared_impact_spec(ses: Session, group: str | None) -> SearchParam | None:
    return next((p for p in _group_specs(ses, group) if p.name == "min_impact"), None)


def solved_min_impact(ses: Session, group: str | None = None) -> bool:
    """Whether the minimum impact of a group (None: no groups) is solved per metric with
    the multiplier: always, unless `[search]` lists values for Optuna to sample."""
    if (group is None) != (ses.ws.search.tune_by == "all"):
        return False
    spec = _shared_impact_spec(ses, group)
    return spec is None or spec.kind == "float"


def impact_ranges(ses: Session, group: str | None, end_hour: int) -> dict[str, tuple[float, float]]:
    """Per watched metric of the group, the (low, high) range its minimum impact is solved
    in, in the metric's own units: its `[search.groups.METRIC]` range, else the group's
    own range when the group has one metric, else 0 to the metric's typical hourly level
    on the hours before `end_hour` (the tuning weeks).

    Raises
    ------
    InputError
        When one range is given for several metrics: impacts of different metrics are in
        different units, so one number would silence some metrics and never filter others.
    """
    s = ses.ws.search
    metrics = group_metrics(ses, group)
    shared = _shared_impact_spec(ses, group)
    if shared is not None and len(metrics) > 1 and float(shared.high) > 0:
        raise InputError(
            f"{ses.ws.file.name} [search] key 'min_impact'",
            "one range for several metrics mixes their units; leave it out to solve each "
            "metric's minimum impact from 0 to its typical hourly level, or give each metric "
            "its range in [search.groups.METRIC]")
    out = {}
    for m in metrics:
        own = next((p for p in s.group_params.get(m, ()) if p.name == "min_impact"
                    and p.kind == "float"), None)
        spec = own or shared
        if spec is not None:
            out[m] = (max(float(spec.low), 0.0), max(float(spec.high), 0.0))
        else:
            out[m] = (0.0, typical_level(ses, m, end_hour))
    return out


def relative_grid() -> np.ndarray:
    """Shares of each metric's range the minimum impact is solved on: 0 and round values
    (`IMPACT_STEPS` per decade) from a thousandth to the whole range."""
    nice = [m * 10.0**d for d in range(-3, 1) for m in IMPACT_STEPS]
    return np.unique(np.r_[0.0, [v for v in nice if v <= 1.0], 1.0])


def impact_grids(ranges: dict[str, tuple[float, float]],
                 current: Sequence[dict[str, float]]) -> dict[str, np.ndarray]:
    """Per metric, its minimum impacts to solve on: level l is the same share
    (`relative_grid`) of every metric's range, at four significant digits; then one
    level per distinct `current` assignment (today's values and any warm start's), so
    those are exactly reachable."""
    shares = relative_grid()
    grids = {m: np.array([float(f"{lo + t * (hi - lo):.4g}") for t in shares])
             for m, (lo, hi) in ranges.items()}
    extra = []
    for cur in current:
        row = {m: float(cur.get(m, 0.0)) for m in ranges}
        on_grid = any(all(grids[m][lv] == row[m] for m in ranges) for lv in range(len(shares)))
        if not on_grid and row not in extra:
            extra.append(row)
    return {m: np.r_[g, [row[m] for row in extra]] for m, g in grids.items()}


def current_impacts(ses: Session, config: DetectorConfig, group: str | None) -> dict[str, float]:
    """Each metric's minimum impact under `config`, for one search group."""
    tune_by = ses.ws.search.tune_by
    level = group if tune_by == "level" and group else next(iter(ses.history.levels))
    return {m: config.for_series(level, m).min_impact for m in group_metrics(ses, group)}


def impact_label(values: dict[str, float] | None) -> str:
    """'metric=value, ...' of per-metric minimum impacts ('' for None)."""
    return ", ".join(f"{m}={v:g}" for m, v in (values or {}).items())


def _group_specs(ses: Session, group: str | None) -> list[SearchParam]:
    """Searched settings of one group: its `[search.groups.NAME]` ranges, then the shared
    `[search]` ones it does not name (defaults when `[search]` names none)."""
    s = ses.ws.search
    own = s.group_params.get(group or "", ())
    return [*own, *(p for p in s.params or default_params(ses)
                    if p.name not in {o.name for o in own})]


def solved_groups(ses: Session) -> list[str]:
    """Every group (\"\" without groups) whose minimum impact is solved per metric."""
    names = group_names(ses, ses.ws.search.tune_by) or [None]
    return [g or "" for g in names if solved_min_impact(ses, g)]


def group_names(ses: Session, tune_by: str) -> list[str]:
    if tune_by == "level":
        return list(ses.history.levels)
    if tune_by == "metric":
        return list(ses.ws.metric_names)
    if tune_by == "group":
        return [g.name for g in ses.ws.detector.groups] + [BASE_GROUP]
    return []


def group_config(base: DetectorSettings, tune_by: str, names: Sequence[str],
                 settings: dict[str, DetectorSettings],
                 named: Sequence[DetectorGroup] = ()) -> DetectorConfig:
    """A config with one group per level (or metric); with tune_by "group", the
    workspace's `named` groups (their levels and metrics) and the base for the rest."""
    if tune_by == "all":
        return DetectorConfig(base=settings[""])
    if tune_by == "group":
        return DetectorConfig(base=settings[BASE_GROUP], groups=tuple(
            replace(g, settings=settings[g.name]) for g in named))
    groups = tuple(
        DetectorGroup(
            name=g,
            levels=(g,) if tune_by == "level" else (),
            metrics=(g,) if tune_by == "metric" else (),
            settings=settings[g],
        )
        for g in names
    )
    return DetectorConfig(base=base, groups=groups)


def build_space(ses: Session) -> list[Param]:
    """Optuna parameters for the workspace's `[search]` (defaults when empty)."""
    s = ses.ws.search
    names = group_names(ses, s.tune_by)
    current = ses.ws.detector
    solved = solved_groups(ses)
    out: list[Param] = []
    for g in names or [None]:
        cur = _settings_of(current, s.tune_by, g, ses)
        for spec in _group_specs(ses, g):
            if spec.name == "fence_multiplier" or (spec.name == "min_impact"
                                                    and (g or "") in solved):
                continue
            spec = _with_current(spec, getattr(cur, spec.name))
            name = spec.name if g is None else f"{g}/{spec.name}"
            out.append(Param(name=name, setting=spec.name, group=g, spec=spec))
    return out


def _settings_of(config: DetectorConfig, tune_by: str, group: str | None,
                 ses: Session) -> DetectorSettings:
    if group is None:
        return config.base
    if tune_by == "group":
        own = [g.settings for g in config.groups if g.name == group]
        return own[0] if own else config.base  # a config without it: its base
    if tune_by == "level":
        return config.for_series(group, ses.ws.metric_names[0])
    return config.for_series(next(iter(ses.history.levels)), group)


def candidate_values(space: list[Param], setting: str, current: Sequence[Any]) -> list[Any] | None:
    """Every value `setting` can take in the space (None when a float/large range)."""
    vals = set(current)
    for p in space:
        if p.setting != setting:
            continue
        s = p.spec
        if s.kind == "choice":
            vals |= set(s.values)
        elif s.kind == "int" and (s.high - s.low) / max(s.step, 1) < MAX_PRECOMPUTED_WINDOWS:
            vals |= set(range(int(s.low), int(s.high) + 1, int(s.step)))
        else:
            return None
    return sorted(vals)


def params_of(config: DetectorConfig, space: list[Param], ses: Session) -> dict[str, Any]:
    """Optuna parameter values that reproduce `config` (for `enqueue_trial`)."""
    tune_by = ses.ws.search.tune_by
    return {
        p.name: getattr(_settings_of(config, tune_by, p.group, ses), p.setting) for p in space
    }


def holdout_split(n_hours: int, first_hour: int, fraction: float) -> int:
    """First held-out hour: the last `fraction` of the history in whole weeks.

    At least one week is held out when the fraction asks for any, as long as a
    week of tuning hours remains after `first_hour`.
    """
    if fraction <= 0:
        return n_hours
    weeks = max(int(round(n_hours * fraction / WEEK)), 1)
    while weeks > 0 and n_hours - weeks * WEEK - first_hour < WEEK:
        weeks -= 1
    return n_hours - weeks * WEEK


# --------------------------------------------------------------------------- evaluate


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
    # load (`scoring.load_axis`), k, min_impact or None]; empty for grouped settings
    # (`tune` computes the chosen grouped setting's with `Evaluator.group_front`)
    front: list[list[float | None]] = field(default_factory=list)

    def attrs(self) -> dict[str, Any]:
        return {k: _json_safe(v) for k, v in dataclasses.asdict(self).items()}


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
    incidents: Incidents = field(init=False)
    false_windows: Incidents | None = field(init=False)
    # the goal settings are judged by: the miss-rate target tightened by
    # `goal.spare_incidents` (the target must hold with that many more misses)
    judge: Goal = field(init=False)

    def __post_init__(self) -> None:
        if self.ses.incidents is None:
            raise InputError(str(self.ses.ws.file), "no [incidents] path: nothing to tune against")
        self.incidents = period_filter(self.ses.incidents, self.first_hour, self.split_hour)
        n = len(self.incidents)
        self.judge = self.goal if not n or not self.goal.spare_incidents else replace(
            self.goal, max_miss_rate=self.goal.max_misses(n) / n)
        self.false_windows = None
        if self.known_false is not None and len(self.known_false):
            self.false_windows = self.known_false

    @property
    def n_days(self) -> float:
        return (self.split_hour - self.first_hour) / 24.0

    def curve(self, scores: dict[tuple[str, str], MetricScores]) -> tuple[Curve, np.ndarray, Any]:
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
        scores = self.replayer.scores(config)
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

    def breakpoints(self, scores: dict[tuple[str, str], MetricScores]) -> np.ndarray:
        """Every multiplier at which the flags change, within the grid's range: each
        distinct fence score of the hours before the split in (min grid, max grid],
        plus the grid itself (today's multiplier among it)."""
        low, high = float(self.ks.min()), float(self.ks.max())
        parts = [self.ks]
        for ms in scores.values():
            v = ms.score[:, :self.split_hour].ravel()
            parts.append(v[(v > low) & (v <= high)])
        return np.unique(np.concatenate(parts))

    def _exact(self, scores: dict[tuple[str, str], MetricScores],
               grids: dict[str, np.ndarray] | None):
        """`scoring.exact_solve` over every breakpoint multiplier (and minimum-impact
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
        scores = self.replayer.scores(config)
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
        """`scoring.best_tradeoffs` over every (multiplier, minimum impact) pair of
        `curves` (curve l at minimum impact level l of `grids`; None: the config's own)."""
        pts = best_tradeoffs(
            np.concatenate([c.caught for c in curves]),
            np.concatenate([curve_loads(c, self.ses.analysts, self.judge) for c in curves]),
            np.concatenate([c.ks for c in curves]),
            np.concatenate([np.full(len(c.ks), float(lv)) for lv, c in enumerate(curves)]))
        return [[c, x, k, None if grids is None else _level(grids, int(lv))]
                for c, x, k, lv in pts]

    def _evaluate_groups(self, config: DetectorConfig,
                         scores: dict[tuple[str, str], MetricScores]) -> Evaluation:
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
        less load (`scoring.best_tradeoffs`); most incidents caught first."""
        parts, teams = self._group_parts(config, self.replayer.scores(config))
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
                     scores: dict[tuple[str, str], MetricScores]) -> tuple[list, list[str]]:
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

    def _candidates(self, name: str, sub: dict[tuple[str, str], MetricScores],
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

    def _impact_curves(self, scores: dict[tuple[str, str], MetricScores],
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


# --------------------------------------------------------------------------- result


@dataclass
class TuneResult:
    """What `tune` found (see the module docstring for the method).

    Attributes
    ----------
    config : DetectorConfig
        The chosen settings (solved multiplier(s) filled in).
    current : DetectorConfig
        The workspace's `[detector]` settings.
    feasible : bool
    reason : str
        One line: the goal is met, or which constraint cannot be met and by how much.
    split_hour, first_hour : int
        First held-out hour; first scored hour.
    tuning, holdout : Figures
        Figures of `config` on ``[first_hour, split_hour)`` and ``[split_hour, n_hours)``.
    holdout_warning : str
        Set when held-out recall is below the target beyond its Wilson interval.
    trials : DataFrame
        One row per finished trial.
    pareto : DataFrame
        The best trade-offs of recall against alert load over every completed trial
        and every multiplier of its grid (`pareto_frame`).
    study_name, storage : str
    provenance : dict
    goal : Goal
        The goal the trials were judged against (the workspace's, or an override);
        the report judges with it too.
    verdict, verdict_reasons : str, list of str
        Out of sample (held-out weeks): "holds", "does not hold" or "cannot tell"
        (`scoring.validation_verdict`), with the reasons.
    thin_margin : int
        Incidents caught on the tuning weeks only by alerts whose peak fence score is
        within 10% of the multiplier (a little less sensitivity would miss them).
    labels : str
        What the tuning-week labels can show at best (`labels_line`).
    folds, pooled : list of rolling.Fold, Figures
        With ``[search] validation = "rolling"``: each fold's chosen settings and test
        figures, and the test blocks' figures together (the verdict then uses them).
    """

    config: DetectorConfig
    current: DetectorConfig
    feasible: bool
    reason: str
    split_hour: int
    first_hour: int
    tuning: Figures
    holdout: Figures | None
    holdout_warning: str
    trials: pd.DataFrame
    pareto: pd.DataFrame
    study_name: str
    storage: str
    provenance: dict[str, Any]
    goal: Goal | None = None
    verdict: str = "cannot tell"
    verdict_reasons: list[str] = field(default_factory=list)
    thin_margin: int = 0
    labels: str = ""
    folds: list[rolling.Fold] = field(default_factory=list)  # rolling validation only
    pooled: Figures | None = None  # the folds' test blocks together


def study_name_for(ses: Session, goal: Goal, known_false: Incidents | None) -> str:
    """Name derived from history, incidents, search space, current settings and goal."""
    h = hashlib.sha256()
    h.update(ses.history.source_hash.encode())
    h.update(str(ses.history.n_hours).encode())
    for inc in (ses.incidents, known_false):
        if inc is None:
            h.update(b"none")
            continue
        for col in ("level", "series", "metric", "start", "end"):
            h.update(repr(np.asarray(getattr(inc, col)).tolist()).encode())
    h.update(repr(ses.ws.search).encode())
    h.update(repr(ses.ws.detector).encode())
    h.update(repr(goal).encode())
    h.update(repr(sorted(ses.analysts.items())).encode())
    h.update(repr(ses.ws.metric_names).encode())
    # what is solved rather than searched: a study whose trials sampled the minimum
    # impact must not be continued by a search that solves it (its trials lack it)
    solved = sorted(solved_groups(ses))
    if solved:  # (nothing solved but k: the same name as before minimum impacts were solved)
        h.update(f"solved: fence_multiplier, min_impact per metric of {solved}".encode())
    return f"tune-{h.hexdigest()[:16]}"


def open_storage(ses: Session, storage: str | None) -> tuple[Any, str]:
    """Optuna storage object and how to name it (`calibrate.studies.open_storage`)."""
    return studies.open_storage(ses.ws.root / STUDY_FILE, storage)


def _constraints(trial: optuna.trial.FrozenTrial) -> Sequence[float]:
    return trial.user_attrs.get("constraints", [INVALID, INVALID])


# Optuna 5 deprecates `constraints_func` in favour of `Trial.set_constraint`; both
# give the sampler and `best_trial` the same feasibility rule (all values <= 0)
SET_CONSTRAINT = hasattr(optuna.trial.Trial, "set_constraint")
CONSTRAINT_NAMES = ("miss_rate", "budget")


def _record_constraints(trial: optuna.Trial, values: Sequence[float]) -> None:
    trial.set_user_attr("constraints", [float(v) for v in values])
    if SET_CONSTRAINT:
        for key, v in zip(CONSTRAINT_NAMES, values, strict=True):
            trial.set_constraint(key, float(v))


def tune(
    ses: Session,
    *,
    trials: int | None = None,
    storage: str | None = None,
    study_name: str | None = None,
    goal: Goal | None = None,
    warm_start: Sequence[DetectorConfig] = (),
    known_false: Incidents | None = None,
    executor: Executor | None = None,
    engine: str = "local",
    workers: int | None = None,
    scheduler: str | None = None,
    progress: bool = True,
) -> TuneResult:
    """Search the detector settings with the least alerts meeting the goal.

    Parameters
    ----------
    ses : Session
        With incidents loaded.
    trials : int, optional
        Trial budget of the whole study (default ``[search] trials``); only the
        trials still missing are run, so an interrupted run continues.
    storage : str, optional
        Optuna storage URL, or a journal file path (default
        ``.calibrate/study.journal`` in the workspace folder).
    study_name : str, optional
        Default: derived from the inputs, so the same inputs continue one study.
    goal : Goal, optional
        Overrides the workspace's `[goal]`.
    warm_start : sequence of DetectorConfig
        Enqueued after the workspace's current `[detector]` settings.
    known_false : Incidents, optional
        Windows analysts marked as false alarms; alerts meeting them are penalised.
    executor, engine, workers, scheduler
        Where decompositions run (see `api.make_replayer`).
    progress : bool
        Progress bar over trials.
    """
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    ws = ses.ws
    goal = goal or ws.goal
    budget = int(trials if trials is not None else ws.search.trials)
    if budget < 1:
        raise InputError("--trials", f"must be at least 1, but got {budget}")
    if ses.incidents is None:
        raise InputError(str(ws.file), "no [incidents] path: nothing to tune against")
    space, starts, first_hour, split, fence_w, ks, ms = _plan(ses, warm_start)
    api.require_incidents(ses, first_hour, split)
    current = ws.detector
    name = study_name or study_name_for(ses, goal, known_false)
    store, store_name = open_storage(ses, storage)
    ev = _evaluator(ses, ks, ms, fence_w, first_hour, split, goal, known_false,
                    executor=executor, engine=engine, workers=workers, scheduler=scheduler)
    try:
        with studies.storage_errors(store_name):
            study = _run_study(ses, ev, space, starts, name, store, budget, progress)
            result = _result(ses, ev, space, study, name, store_name, current, goal,
                             store_front=True)
            if ws.search.validation == "rolling":
                _rolling(ses, ev, space, starts, name, store, budget, progress, result)
    finally:
        ev.replayer.close()
    return result


def _rolling(ses: Session, ev: Evaluator, space: list[Param], starts: Sequence[DetectorConfig],
             name: str, store: Any, budget: int, progress: bool, result: TuneResult) -> None:
    """Rolling validation (`calibrate.rolling`): one study per fold on the hours before its
    test block, sharing the evaluator's replayer (and so its cached fits); fills the
    folds, their pooled figures and the verdict into `result`."""
    s = ses.ws.search
    folds = rolling.fold_bounds(ev.first_hour, ev.split_hour, s.folds, s.gap_days)
    episodes = []
    for f in folds:
        api.require_incidents(ses, ev.first_hour, f.train_end)
        fev = Evaluator(ses, ev.replayer, ev.ks, ev.first_hour, f.train_end, ev.goal,
                        ev.known_false)
        grids = _impact_plan(ses, starts, f.train_end)
        fev.min_impacts = grids.get("")
        fev.group_min_impacts = {g: v for g, v in grids.items() if g}
        study = _run_study(ses, fev, space, starts, f"{name}-fold{f.number}of{len(folds)}",
                           store, budget, progress)
        best, chosen, _, f.config = _chosen(ses, space, study, ses.ws.detector)
        f.feasible = best is not None
        f.settings = {**chosen.params, "fence_multiplier": chosen.user_attrs.get("k"),
                      **{f"min_impact[{m}]": v for m, v in
                         (chosen.user_attrs.get("min_impact") or {}).items()}}
        eps = ev.replayer.replay(f.config).episodes
        f.figures = api.score_episodes(ses, eps, f.test_start, f.test_end)
        episodes.append(eps)
    result.folds = folds
    result.pooled = rolling.pooled_figures(ses, folds, episodes)
    word, why = validation_verdict(result.pooled, result.goal or ses.ws.goal)
    why = [f"rolling folds pooled: {r}" for r in why]
    if result.holdout is not None:  # the held-out check still counts
        order = ["holds", "cannot tell", "does not hold"]
        word = max(word, result.verdict, key=order.index)
        why = why + [f"held-out weeks: {r}" for r in result.verdict_reasons]
    result.verdict, result.verdict_reasons = word, why


def _evaluator(ses: Session, ks: np.ndarray, ms: dict[str, np.ndarray], fence_w: Sequence[int],
               first_hour: int, split: int, goal: Goal, known_false: Incidents | None,
               **where: Any) -> Evaluator:
    """An `Evaluator` over a new replayer (`where`: executor, engine, workers, scheduler
    as for `api.make_replayer`); the caller closes ``ev.replayer``."""
    rp = api.make_replayer(ses, fence_windows=tuple(fence_w), progress=False,
                           cache_bytes=STREAM_CACHE_BYTES, **where)
    try:
        return Evaluator(ses, rp, ks, first_hour, split, goal, known_false,
                         min_impacts=ms.get(""),
                         group_min_impacts={g: v for g, v in ms.items() if g})
    except BaseException:
        rp.close()
        raise


def _plan(ses: Session, warm_start: Sequence[DetectorConfig]):
    """What a search of the workspace scores and on which hours: the Optuna space, the
    starting configs, the tuning hours [first_hour, split), the fence windows to cache
    and the multiplier and minimum impact grids (None: the latter is searched)."""
    ws = ses.ws
    space = build_space(ses)
    starts = [ws.detector, *warm_start]
    windows_l = candidate_values(space, "decomposition_window_hours",
                                 [c.base.decomposition_window_hours for c in starts]
                                 + [g.settings.decomposition_window_hours
                                    for c in starts for g in c.groups])
    if windows_l is None:
        windows_l = [max(int(p.spec.high) for p in space
                         if p.setting == "decomposition_window_hours")]
    fence_w = candidate_values(space, "fence_window_hours",
                               [c.base.fence_window_hours for c in starts]) or ()
    first_hour = _first_hour(space, starts, windows_l, fence_w)
    n = ses.history.n_hours
    if ws.search.holdout_start is not None:
        # the first hour of the given day: whatever comes later, the tuning never reads it
        day = pd.Timestamp(ws.search.holdout_start, tz="UTC")
        split = int(ses.history.hours.searchsorted(day))
    else:
        split = holdout_split(n, first_hour, ws.search.holdout_fraction)
    if split - first_hour < 24:
        raise CalibrationError(
            f"{ws.file}: the history ({n} hours) is too short to tune: the detector "
            f"settings searched need {first_hour + 1} hours before the first scored hour")
    lo, hi = ws.search.multiplier_low, ws.search.multiplier_high
    ks = np.geomspace(lo, hi, GRID_POINTS)
    extra = [c.base.fence_multiplier for c in starts if lo <= c.base.fence_multiplier <= hi]
    ks = np.unique(np.r_[ks, extra])
    return space, starts, first_hour, split, fence_w, ks, _impact_plan(ses, starts, split)


def _impact_plan(ses: Session, starts: Sequence[DetectorConfig],
                 end_hour: int) -> dict[str, dict[str, np.ndarray]]:
    """Per solved group, its per-metric minimum-impact grids, from hours before
    `end_hour` only."""
    return {g: impact_grids(impact_ranges(ses, g or None, end_hour),
                            [current_impacts(ses, c, g or None) for c in starts])
            for g in solved_groups(ses)}


def _first_hour(space: list[Param], starts: Sequence[DetectorConfig],
                windows_l: Sequence[int], fence_w: Sequence[int]) -> int:
    """The latest first scored hour over the space, so every trial is scored on the same
    hours: L - 1 for the longest window L, or with `forecast` expected values in the
    space, the largest L + W of a window and a fence window below it."""
    settings = [s for c in starts for s in (c.base, *(g.settings for g in c.groups))]
    first = max(windows_l) - 1
    modes = candidate_values(space, "expected_value", [s.expected_value for s in settings])
    if "forecast" not in (modes or ()):
        return first
    ws_f = list(fence_w) + [s.fence_window_hours for s in settings]
    ws_f += [int(p.spec.high) for p in space if p.setting == "fence_window_hours"
             and p.spec.kind != "choice"]
    return max([first, *(L + W for L in windows_l for W in ws_f if W < L)])


def study_result(
    ses: Session,
    *,
    storage: str | None = None,
    study_name: str | None = None,
    goal: Goal | None = None,
    executor: Executor | None = None,
    engine: str = "local",
    workers: int | None = None,
    scheduler: str | None = None,
) -> TuneResult:
    """The result of a study as it stands, running no trial (for the report of an
    interrupted or shared search). Arguments as for `tune`."""
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    if ses.incidents is None:
        raise InputError(str(ses.ws.file), "no [incidents] path: nothing to report against")
    space, starts, first_hour, split, fence_w, ks, ms = _plan(ses, ())
    name = study_name or study_name_for(ses, goal or ses.ws.goal, None)
    if not (storage and "://" in storage):
        path = (Path(storage) if storage else ses.ws.root / STUDY_FILE).expanduser()
        if not path.is_file():
            raise CalibrationError(f"{path}: no study file (run `calibrate tune` first, or "
                                   "give its --storage)")
    store, store_name = open_storage(ses, storage)
    try:
        with studies.storage_errors(store_name):
            study = optuna.load_study(study_name=name, storage=store)
    except KeyError:
        with studies.storage_errors(store_name):
            names = ", ".join(optuna.study.get_all_study_names(store)) or "none"
        raise CalibrationError(
            f"{store_name}: no study '{name}' (studies there: {names}; name one with "
            "--study NAME)") from None
    with studies.storage_errors(store_name):
        finished = study.get_trials(deepcopy=False, states=BUDGET_STATES)
    done = [t for t in finished if t.state == optuna.trial.TrialState.COMPLETE]
    if not done:
        raise CalibrationError(f"{store_name}: study '{name}' has no completed trial yet")
    missing = [p.name for p in space if p.name not in done[0].params]
    if missing:
        raise CalibrationError(
            f"{store_name}: study '{name}' searched another space (its trials have no "
            f"'{missing[0]}'); report it from the workspace it was tuned on")
    # judged as the tune that made it judged them: its goal and hours (older studies:
    # the workspace's)
    attrs = study.user_attrs
    if "goal" in attrs and goal is None:
        goal = Goal(**attrs["goal"])
    goal = goal or ses.ws.goal
    if "hours" in attrs:
        first_hour, split = (int(h) for h in attrs["hours"])
    ev = _evaluator(ses, ks, ms, fence_w, first_hour, split, goal, None,
                    executor=executor, engine=engine, workers=workers, scheduler=scheduler)
    try:
        with studies.storage_errors(store_name):
            return _result(ses, ev, space, study, name, store_name, ses.ws.detector, goal)
    finally:
        ev.replayer.close()


def _config_from(params: dict[str, Any], space: list[Param], ses: Session,
                 current: DetectorConfig) -> DetectorConfig:
    """Config of a trial's parameters; validation errors propagate as InputError."""
    tune_by = ses.ws.search.tune_by
    names = group_names(ses, tune_by)
    out: dict[str, DetectorSettings] = {}
    for g in names or [""]:
        cur = _settings_of(current, tune_by, g or None, ses)
        changes = {p.setting: params[p.name] for p in space if (p.group or "") == g}
        s = replace(cur, **changes)
        s.validate(f"trial setting{'' if not g else ' of group ' + g}")
        out[g] = s
    return group_config(current.base, tune_by, names, out, ses.ws.detector.groups)


def _run_study(ses: Session, ev: Evaluator, space: list[Param], starts: Sequence[DetectorConfig],
               name: str, store: Any, budget: int, progress: bool) -> optuna.Study:
    try:
        existing = optuna.create_study(storage=store, study_name=name, direction="minimize")
        created = True
    except optuna.exceptions.DuplicatedStudyError:
        existing = optuna.load_study(study_name=name, storage=store)
        created = False
    if created:  # what a later `report --study` needs to judge the trials as tune did
        existing.set_user_attr("goal", _json_safe(dataclasses.asdict(ev.goal)))
        existing.set_user_attr("hours", [ev.first_hour, ev.split_hour])
        existing.set_user_attr("known_false", ev.false_windows is not None)
    if not created:  # trials a dead process left RUNNING; today's settings cut off
        studies.recover(existing, [params_of(cfg, space, ses) for cfg in starts])
    base_seed = ses.ws.search.seed
    n_before = len(existing.get_trials(deepcopy=False))
    study = optuna.load_study(study_name=name, storage=store,
                              sampler=_sampler(base_seed + n_before))
    # only the process that created the study queues today's settings: two processes
    # starting together would otherwise both queue them (skip_if_exists races)
    for cfg in starts if created else starts[1:]:
        study.enqueue_trial(params_of(cfg, space, ses), skip_if_exists=True)
    done = len(study.get_trials(deepcopy=False, states=BUDGET_STATES))
    remaining = budget - done
    if remaining <= 0:
        return study
    current = ses.ws.detector

    def objective(trial: optuna.Trial) -> float:
        # a sampler seeded by the trial's number, which the storage hands out once: two
        # processes sharing the study never draw alike, and trial n of a study resumed
        # after a stop between trials proposes what it would have uninterrupted (a trial
        # cut off mid-way keeps its number as a failed trial, so later draws shift)
        studies.claim(trial)
        trial.study.sampler = _sampler(base_seed + trial.number)
        params = {p.name: p.suggest(trial) for p in space}
        try:
            config = _config_from(params, space, ses, current)
        except InputError as exc:
            _record_constraints(trial, [INVALID, INVALID])
            trial.set_user_attr("invalid", str(exc))
            raise optuna.TrialPruned(str(exc)) from None
        e = ev.evaluate(config)
        for key, val in e.attrs().items():
            if key != "constraints":
                trial.set_user_attr(key, val)
        _record_constraints(trial, e.constraints)
        return e.value

    bar = tqdm(total=remaining, desc="tune", unit="trial", disable=not progress)

    def show(study: optuna.Study, trial: optuna.trial.FrozenTrial) -> None:
        bar.update(1)
        best = _best_feasible(study.get_trials(deepcopy=False, states=BUDGET_STATES))
        if best is not None:
            a = best.user_attrs
            bar.set_postfix(miss=f"{a['miss_rate']:.2f}", per_analyst_day=f"{best.value:.2f}",
                            k=f"{a['k']:.2f}")
        else:
            bar.set_postfix(feasible="none yet")

    try:
        study.optimize(objective, n_trials=remaining, callbacks=[
            optuna.study.MaxTrialsCallback(budget, states=BUDGET_STATES), show])
    finally:
        bar.close()
    return study


def _sampler(seed: int) -> optuna.samplers.TPESampler:
    return optuna.samplers.TPESampler(
        seed=seed, **({} if SET_CONSTRAINT else {"constraints_func": _constraints}))


def _is_feasible(t: optuna.trial.FrozenTrial) -> bool:
    return (t.state == optuna.trial.TrialState.COMPLETE
            and all(c <= 0 for c in t.user_attrs.get("constraints", [INVALID])))


def _best_feasible(trials: Sequence[optuna.trial.FrozenTrial]) -> optuna.trial.FrozenTrial | None:
    ok = [t for t in trials if _is_feasible(t)]
    return min(ok, key=lambda t: (t.value, t.number)) if ok else None


def _least_infeasible(trials: Sequence[optuna.trial.FrozenTrial]) -> optuna.trial.FrozenTrial:
    done = [t for t in trials if t.state == optuna.trial.TrialState.COMPLETE]
    if not done:
        raise CalibrationError("no trial of the study completed; nothing to choose from")
    return min(done, key=lambda t: (max(t.user_attrs["constraints"][0], 0.0),
                                    max(t.user_attrs["constraints"][1], 0.0), t.value))


def trials_frame(study: optuna.Study, space: list[Param], teams: Sequence[str]) -> pd.DataFrame:
    """One row per finished trial (columns listed on `TuneResult`)."""
    rows = []
    for t in study.get_trials(deepcopy=False):
        if not t.state.is_finished():
            continue
        a = t.user_attrs
        row: dict[str, Any] = {"number": t.number, "state": t.state.name}
        for p in space:
            row[p.name] = t.params.get(p.name)
        row["k"] = a.get("k", math.nan)
        for m, v in (a.get("min_impact") or {}).items():
            row[f"min_impact[{m}]"] = v
        for g, k in (a.get("group_k") or {}).items():
            row[f"k[{g}]"] = k
        for g, per_metric in (a.get("group_min_impact") or {}).items():
            for m, v in per_metric.items():
                row[f"min_impact[{g}/{m}]"] = v
        for key in ("incidents", "caught", "miss_rate", "miss_rate_high", "alerts",
                    "known_false_alerts"):
            row[key] = a.get(key, math.nan)
        rates = a.get("team_rate") or {}
        for team in teams:
            row[f"alerts_per_analyst_day[{team}]"] = rates.get(team, math.nan)
        row["max_budget_ratio"] = a.get("max_budget_ratio", math.nan)
        row["feasible"] = _is_feasible(t)
        row["value"] = t.value if t.state == optuna.trial.TrialState.COMPLETE else math.nan
        row["note"] = a.get("invalid", "")
        rows.append(row)
    return pd.DataFrame(rows)


FRONT_COLUMNS = ("number", "caught", "incidents", "recall", "load", "k", "min_impact")


def pareto_frame(trials: Sequence[optuna.trial.FrozenTrial], goal: Goal,
                 analysts: dict[str, int],
                 fronts: dict[int, list[list[Any]]] | None = None) -> pd.DataFrame:
    """The best trade-offs of a study: (recall, alert load) pairs no other beats on both.

    Each completed trial offers its own front over the multiplier (and minimum
    impact) grid (`Evaluation.front`), or the one given for its number in `fronts`
    (`tune` gives the chosen grouped setting's, `Evaluator.group_front`); other
    trials without one (grouped settings, older studies) offer their solved point.
    Columns `FRONT_COLUMNS`, least load first; ``attrs["load_label"]`` names the
    load (`scoring.load_axis`).
    """
    fronts = fronts or {}
    budgets = {t: goal.budget(t) for t in analysts}
    rows = []
    for t in trials:
        if t.state != optuna.trial.TrialState.COMPLETE:
            continue
        a = t.user_attrs
        n_inc = int(a.get("incidents") or 0)
        # grouped settings: no single multiplier (their `k` is the groups' median)
        k_own = None if a.get("group_k") else a.get("k")
        pts = fronts.get(t.number) or a.get("front") or [[a.get("caught", 0), load_axis(
            a.get("team_rate") or {}, budgets, analysts)[0], k_own, a.get("min_impact")]]
        for caught, load, k, m in pts:
            rows.append({"number": t.number, "caught": int(caught), "incidents": n_inc,
                         "recall": caught / n_inc if n_inc else 1.0,
                         "load": math.nan if load is None else float(load),
                         "k": math.nan if k is None else float(k),
                         "min_impact": impact_label(m)})
    df = pd.DataFrame(rows, columns=list(FRONT_COLUMNS))
    if len(df):
        keep = pareto_front(np.nan_to_num(df["load"].to_numpy(dtype=np.float64), nan=0.0),
                            df["recall"].to_numpy(dtype=np.float64))
        df = df[np.array(keep, dtype=bool)].sort_values(["load", "recall", "number"])
        df = df.drop_duplicates(subset=["recall", "load"]).reset_index(drop=True)
    df.attrs["load_label"] = load_axis({t: 0.0 for t in analysts}, budgets, analysts)[2]
    return df


def _chosen(ses: Session, space: list[Param], study: optuna.Study, current: DetectorConfig):
    """The study's best feasible trial (or the least infeasible): (best or None, chosen
    trial, its structural config, the config with its solved settings filled in)."""
    finished = study.get_trials(deepcopy=False, states=BUDGET_STATES)
    best = _best_feasible(finished)
    chosen = best if best is not None else _least_infeasible(finished)
    structure = _config_from(chosen.params, space, ses, current)
    a = chosen.user_attrs
    if structure.groups:
        config = with_group_solve(structure, a["group_k"], a.get("group_min_impact") or {},
                                  ses.ws.search.tune_by)
    else:
        config = structure.with_base(fence_multiplier=a["k"])
    if a.get("min_impact") is not None:
        config = config.with_base(**_per_metric_impact(a["min_impact"]))
    return best, chosen, structure, config


def _result(ses: Session, ev: Evaluator, space: list[Param], study: optuna.Study, name: str,
            store_name: str, current: DetectorConfig, goal: Goal,
            store_front: bool = False) -> TuneResult:
    finished = study.get_trials(deepcopy=False, states=BUDGET_STATES)
    best, chosen, structure, config = _chosen(ses, space, study, current)
    a = chosen.user_attrs
    teams = list(ses.analysts)
    trials = trials_frame(study, space, teams)
    fronts = {}
    if config.groups:  # grouped trials store no front of their own
        # a grouped trial's front needs one joint solve per recall level: done for the
        # chosen setting only, and kept in the study, because a later `study_result`
        # has no known-false windows to penalise with (the study records only whether
        # there were any)
        key = f"group_front:{chosen.number}"
        stored = study.user_attrs.get(key)
        if stored is not None:
            fronts[chosen.number] = stored
        elif ev.false_windows is not None or not study.user_attrs.get("known_false"):
            fronts[chosen.number] = [[js.caught, js.load, None, None]
                                     for js in ev.group_front(structure)]
            if store_front:
                study.set_user_attr(key, _json_safe(fronts[chosen.number]))
    pareto = pareto_frame(finished, goal, ses.analysts, fronts)
    n = ses.history.n_hours
    episodes = ev.replayer.replay(config).episodes
    tuning = api.score_episodes(ses, episodes, ev.first_hour, ev.split_hour)
    # incidents before the tuning hours begin (the longest decomposition window's
    # warm-up) can never be caught: listed apart
    early = period_filter(ses.incidents, 0, ev.first_hour)
    tuning.before_first_scored = len(early)
    tuning.before_first_scored_ids = [str(x) for x in early.incident_id.tolist()]
    holdout = api.score_episodes(ses, episodes, ev.split_hour, n) if ev.split_hour < n else None
    feasible = best is not None
    if feasible:
        reason = (f"trial {chosen.number} meets the goal on the tuning weeks: miss rate "
                  f"{a['miss_rate']:.3f} <= {goal.max_miss_rate:.3f}, "
                  f"{chosen.value:.2f} alerts per analyst per day, every team within budget")
    else:
        reason = infeasible_reason(finished, goal)
    warning = holdout_warning(holdout, goal)
    verdict, why = validation_verdict(holdout, goal)
    thin = thin_margin(ses, episodes, config, ev.first_hour, ev.split_hour)
    prov = provenance(ses, config, name, store_name, goal, tuning, holdout, ev, chosen, feasible,
                      reason, len(finished))
    return TuneResult(config=config, current=current, feasible=feasible, reason=reason,
                      split_hour=ev.split_hour, first_hour=ev.first_hour, tuning=tuning,
                      holdout=holdout, holdout_warning=warning, trials=trials, pareto=pareto,
                      study_name=name, storage=store_name, provenance=prov, goal=goal,
                      verdict=verdict, verdict_reasons=why, thin_margin=thin,
                      labels=labels_line(len(ev.incidents), goal))


def _per_metric_impact(values: dict[str, float]) -> dict[str, Any]:
    """Settings changes that give each metric its own minimum impact."""
    return {"min_impact": 0.0, "min_impact_per_metric": tuple(
        (m, float(v)) for m, v in values.items())}


def with_group_solve(config: DetectorConfig, group_k: dict[str, float],
                     group_m: dict[str, dict[str, float]], tune_by: str) -> DetectorConfig:
    """`config` with each group's solved multiplier and per-metric minimum impacts filled
    in (with ``tune_by = "group"`` the `BASE_GROUP` entries go to the base settings)."""
    def solved(name: str, s: DetectorSettings) -> DetectorSettings:
        changes = _per_metric_impact(group_m[name]) if name in group_m else {}
        return replace(s, fence_multiplier=group_k.get(name, s.fence_multiplier), **changes)

    config = replace(config, groups=tuple(
        replace(g, settings=solved(g.name, g.settings)) for g in config.groups))
    if tune_by == "group" and (BASE_GROUP in group_k or BASE_GROUP in group_m):
        config = replace(config, base=solved(BASE_GROUP, config.base))
    return config


def infeasible_reason(trials: Sequence[optuna.trial.FrozenTrial], goal: Goal) -> str:
    """Which constraint no trial meets, and by how much (one line)."""
    done = [t for t in trials if t.state == optuna.trial.TrialState.COMPLETE]
    if not done:
        return "no trial completed"
    miss_ok = [t for t in done if t.user_attrs["constraints"][0] <= 0]
    if not miss_ok:
        b = min(done, key=lambda t: (t.user_attrs["miss_rate"], t.value))
        return (f"no setting meets max_miss_rate {goal.max_miss_rate:.2f}: best miss rate "
                f"{b.user_attrs['miss_rate']:.2f} at {b.value:.2f} alerts per analyst per day "
                f"(trial {b.number})")
    b = min(miss_ok, key=lambda t: t.user_attrs["max_budget_ratio"])
    rates = b.user_attrs["team_rate"]
    worst = max(rates, key=lambda t: rates[t] / goal.budget(t) if goal.budget(t) else 0.0)
    return (f"no setting meeting max_miss_rate {goal.max_miss_rate:.2f} keeps every team "
            f"within its alert budget: at best team '{worst}' gets {rates[worst]:.2f} alerts "
            f"per analyst per day, {rates[worst] - goal.budget(worst):.2f} over its budget "
            f"{goal.budget(worst):g} (trial {b.number})")


def holdout_warning(holdout: Figures | None, goal: Goal) -> str:
    """Warn when held-out recall's Wilson upper bound is below the target recall."""
    if holdout is None or holdout.incidents == 0:
        return ""
    target = 1.0 - goal.max_miss_rate
    if holdout.recall_high < target:
        return (f"held-out recall {holdout.recall:.2f} (95% interval {holdout.recall_low:.2f} "
                f"to {holdout.recall_high:.2f}) is below the target {target:.2f} beyond its "
                f"interval: the tuned settings do not hold on the held-out weeks")
    return ""


def _key_figures(f: Figures | None) -> dict[str, Any] | None:
    if f is None:
        return None
    keys = ("incidents", "caught", "miss_rate", "miss_rate_low", "miss_rate_high", "alerts",
            "false_alerts", "precision", "n_days")
    out = {k: _json_safe(getattr(f, k)) for k in keys}
    if "alerts_per_analyst_day" in f.per_team.columns:
        out["alerts_per_analyst_day"] = {
            str(t): _json_safe(v) for t, v in f.per_team["alerts_per_analyst_day"].items()}
    return out


def provenance(ses: Session, config: DetectorConfig, name: str, store: str, goal: Goal,
               tuning: Figures, holdout: Figures | None, ev: Evaluator,
               chosen: optuna.trial.FrozenTrial, feasible: bool, reason: str,
               n_trials: int) -> dict[str, Any]:
    """What the tuned config was derived from (written as `[provenance]`)."""
    try:
        version = importlib.metadata.version("calibrate")
    except importlib.metadata.PackageNotFoundError:
        version = "unknown"
    hours = ses.history.hours
    inc_path = ses.ws.incidents.path
    inc_hash = (hashlib.sha256(Path(inc_path).read_bytes()).hexdigest()
                if inc_path is not None and Path(inc_path).is_file() else "")
    iso = "%Y-%m-%dT%H:%M:%SZ"
    return {
        "tool": "calibrate tune",
        "tool_version": version,
        "date": datetime.now(UTC).strftime(iso),
        "workspace": str(ses.ws.file),
        "history_first_hour": hours[0].strftime(iso),
        "history_last_hour": hours[-1].strftime(iso),
        "history_sha256": ses.history.source_hash,
        "incidents_file": str(inc_path) if inc_path else "",
        "incidents_sha256": inc_hash,
        "study_name": name,
        "storage": store,
        "trials": n_trials,
        "chosen_trial": chosen.number,
        "goal": {"max_miss_rate": goal.max_miss_rate,
                 "max_alerts_per_analyst_day": goal.max_alerts_per_analyst_day},
        "feasible": feasible,
        "reason": reason,
        "first_hour": ev.first_hour,
        "split_hour": ev.split_hour,
        "split_time": hours[ev.split_hour].strftime(iso) if ev.split_hour < len(hours) else "",
        "fence_multiplier": config.base.fence_multiplier,
        "group_fence_multipliers": {g.name: g.settings.fence_multiplier
                                    for g in config.groups} or None,
        "tuning": _key_figures(tuning),
        "holdout": _key_figures(holdout),
    }


def _json_safe(v: Any) -> Any:
    if isinstance(v, dict):
        return {str(k): _json_safe(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [_json_safe(x) for x in v]
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None if math.isnan(v) else (1e300 if v > 0 else -1e300)
    return v


# --------------------------------------------------------------------------- CLI


def _pct(x: float | None) -> str:
    return "n/a" if x is None or x != x else f"{100 * x:.1f}%"


def side_by_side(result: TuneResult) -> list[str]:
    """Tuning and held-out figures side by side, with 95% intervals."""
    cols = [("tuning weeks (in-sample)", result.tuning),
            ("held-out weeks (out-of-sample)", result.holdout)]
    lines = [f"{'':<28}" + "".join(f"{n:>32}" for n, _ in cols)]

    def cell(f: Figures | None, what: str) -> str:
        if f is None:
            return "none held out"
        if what == "incidents":
            return f"{f.caught} of {f.incidents} caught"
        if what == "recall":
            return f"{_pct(f.recall)} ({_pct(f.recall_low)}-{_pct(f.recall_high)})"
        if what == "miss":
            return f"{_pct(f.miss_rate)} ({_pct(f.miss_rate_low)}-{_pct(f.miss_rate_high)})"
        if what == "alerts":
            return f"{f.alerts} ({f.false_alerts} false)"
        if what == "precision":
            return f"{_pct(f.precision)} ({_pct(f.precision_low)}-{_pct(f.precision_high)})"
        team = what.split(":", 1)[1]
        if team in f.per_team.index and "alerts_per_analyst_day" in f.per_team.columns:
            row = f.per_team.loc[team]
            if "alerts_per_analyst_day_low" in f.per_team.columns:
                return (f"{row['alerts_per_analyst_day']:.2f} "
                        f"({row['alerts_per_analyst_day_low']:.2f}-"
                        f"{row['alerts_per_analyst_day_high']:.2f})")
            return f"{row['alerts_per_analyst_day']:.2f}"
        return "n/a"

    rows = [("incidents", "incidents"), ("recall (95% interval)", "recall"),
            ("miss rate (95% interval)", "miss"), ("alerts", "alerts"),
            ("precision (95% interval)", "precision")]
    teams = [t for t, n in sorted(result.tuning.per_team.get("analysts", pd.Series()).items())
             if n > 0] if "analysts" in result.tuning.per_team.columns else []
    rows += [(f"{t}: per analyst-day", f"team:{t}") for t in teams]
    for label, what in rows:
        lines.append(f"{label:<28}" + "".join(f"{cell(f, what):>32}" for _, f in cols))
    lines.append("the tuning-week figures are optimistic: the settings were chosen on those "
                 "labels; judge by the held-out ones. Intervals: "
                 + (result.tuning.interval_method or "95% Wilson"))
    return lines


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


def split_hour(ses: Session) -> int:
    """First held-out hour of the workspace's search (`n_hours`: none held out)."""
    return _plan(ses, ())[3]


def tuning_incidents(ses: Session) -> int:
    """Labelled incidents in the tuning weeks the search would use."""
    _, _, first_hour, split, *_ = _plan(ses, ())
    return len(period_filter(ses.incidents, first_hour, split)) if ses.incidents else 0


def thin_margin(ses: Session, episodes: Episodes, config: DetectorConfig, start: int,
                end: int, margin: float = 0.1) -> int:
    """Incidents of ``[start, end)`` caught, but only by fence alerts whose peak score is
    within `margin` (relative) of their series' multiplier."""
    eps = period_filter(episodes, start, end)
    inc = period_filter(ses.incidents, start, end)
    m = match(eps, inc, ses.ws.incidents.early_hours, ses.ws.incidents.late_hours)
    k = np.array([config.for_series(lv, mt).fence_multiplier
                  for lv, mt in zip(eps.level, eps.metric, strict=True)])
    fence_only = np.array(["flatline" not in d for d in eps.detectors], dtype=bool)
    close = fence_only & (np.nan_to_num(eps.peak_score, nan=np.inf) <= k * (1.0 + margin))
    return sum(1 for i in np.flatnonzero(m.caught) if close[m.alerts_of(int(i))].all())


def metric_lines(result: TuneResult) -> list[str]:
    """Recall and alerts per watched metric and alerts per detector on the tuning weeks
    (in-sample), and a warning for every metric with labelled incidents but no alert."""
    f = result.tuning
    pm = f.per_metric
    lines = ["per metric, tuning weeks (in-sample, chosen on these labels):"]
    warnings = []
    for metric, row in pm.iterrows():
        n, caught, alerts = int(row["incidents"]), int(row["caught"]), int(row["alerts"])
        rec = (f"recall {_pct(row['recall'])} [{_pct(row['recall_low'])}, "
               f"{_pct(row['recall_high'])}] ({caught} of {n})" if n else "no incidents")
        lines.append(f"  {metric}: {rec}, {alerts} alerts")
        if n and alerts == 0 and metric != "(any)":
            warnings.append(f"WARNING: metric '{metric}' has {n} labelled incident(s) in the "
                            "tuning weeks but the tuned settings raise no alert on it: it is "
                            "switched off in effect; check its minimum impact")
        elif n and caught == 0 and metric != "(any)":
            warnings.append(f"WARNING: metric '{metric}' catches none of its {n} labelled "
                            "incident(s) in the tuning weeks: the goal counts incidents of "
                            "every metric together and is met without them")
    det = ", ".join(f"{d}: {int(r['alerts'])} alerts ({_pct(r['precision'])} true)"
                    for d, r in f.per_detector.iterrows())
    lines.append(f"per detector, tuning weeks: {det or 'no alerts'}")
    if f.before_first_scored:
        lines.append(f"{f.before_first_scored} incident(s) begin before the first scored hour "
                     "and cannot be caught: listed apart, left out of recall")
    if f.already_alerting:
        lines.append(f"{f.already_alerting} incident(s) missed while an earlier alert was "
                     "still running (already alerting, not counted as caught)")
    return lines + warnings


def changed_settings_line(result: TuneResult) -> str:
    """One line: the settings the tuned config changes, today's value -> the new one."""
    cur, new = result.current.base, result.config.base
    diffs = [f"{f.name} {getattr(cur, f.name)!r} -> {getattr(new, f.name)!r}"
             for f in dataclasses.fields(new) if getattr(cur, f.name) != getattr(new, f.name)]
    groups = f"; {len(result.config.groups)} group(s) with their own settings" \
        if result.config.groups else ""
    return "changed: " + (", ".join(diffs) if diffs else "nothing in the base settings") + groups


def pareto_lines(result: TuneResult) -> list[str]:
    """The best trade-offs (Pareto front), most recall first, one line each (at most
    one per number of incidents caught)."""
    front = result.pareto
    label = front.attrs.get("load_label", "alert load")
    lines = [f"best trade-offs found on the tuning weeks (load: {label}):"]
    rows = front.sort_values("recall", ascending=False, kind="stable")
    for d in rows.to_dict("records"):
        impact = d["min_impact"]
        shown = f", min_impact: {impact}" if isinstance(impact, str) and impact else ""
        k = "multipliers per group" if d["k"] != d["k"] else f"k={d['k']:.3g}"
        lines.append(f"  recall {_pct(d['recall'])} ({d['caught']} of {d['incidents']}), "
                     f"load {d['load']:.3g}: trial {d['number']}, {k}" + shown)
    return lines


def fold_rows(result: TuneResult) -> list[dict[str, Any]]:
    """Rolling folds as plain rows: hours, chosen settings and test figures with their
    intervals (out of sample for the settings each fold chose)."""
    rows = []
    for f in result.folds:
        fig = f.figures
        teams = {} if fig is None else {
            t: [_json_safe(r.get("alerts_per_analyst_day")),
                _json_safe(r.get("alerts_per_analyst_day_low")),
                _json_safe(r.get("alerts_per_analyst_day_high"))]
            for t, r in fig.per_team.to_dict(orient="index").items() if r.get("analysts")}
        rows.append({
            "fold": f.number, "train_end_hour": f.train_end, "test_start_hour": f.test_start,
            "test_end_hour": f.test_end, "feasible_on_its_tuning_hours": f.feasible,
            "settings": _json_safe(f.settings),
            "caught": None if fig is None else fig.caught,
            "incidents": None if fig is None else fig.incidents,
            "recall": None if fig is None else _json_safe(
                [fig.recall, fig.recall_low, fig.recall_high]),
            "alerts_per_analyst_day": teams,
        })
    return rows


def fold_lines(result: TuneResult) -> list[str]:
    """Terminal lines of the rolling validation (nothing without folds)."""
    if not result.folds:
        return []
    lines = ["rolling validation (each fold tuned on the weeks before its test block; "
             "test figures out-of-sample):"]
    for r in fold_rows(result):
        rec = r["recall"]
        recall = ("no incidents" if not r["incidents"] else
                  f"recall {_pct(rec[0])} ({_pct(rec[1])}-{_pct(rec[2])}), "
                  f"{r['caught']} of {r['incidents']}")
        load = ", ".join(f"{t} {v[0]:.2f} ({v[1]:.2f}-{v[2]:.2f})"
                         for t, v in r["alerts_per_analyst_day"].items())
        k = r["settings"].get("fence_multiplier")
        lines.append(f"  fold {r['fold']}: {recall}; per analyst-day {load}; k={k:.3g}"
                     if k is not None else f"  fold {r['fold']}: {recall}; {load}")
    moving = {n: v for n, v in rolling.stability(result.folds).items() if len(set(map(
        str, v))) > 1}
    lines.append("  settings that differ between folds: " + (", ".join(
        f"{n} {v}" for n, v in moving.items()) or "none"))
    if result.pooled is not None:
        p = result.pooled
        lines.append(f"  pooled test blocks: recall {_pct(p.recall)} ({_pct(p.recall_low)}-"
                     f"{_pct(p.recall_high)}), {p.caught} of {p.incidents}")
    return lines


def verdict_line(result: TuneResult) -> str:
    """The out-of-sample verdict and its reasons, one line (printed last)."""
    return (f"out-of-sample verdict: {result.verdict.upper()}: "
            + "; ".join(result.verdict_reasons))
