"""Constrained search for detector settings (pipeline stage 8, `calibrate tune`).

The search space is `calibrate.tuning.search_space`, the scoring of one setting
`calibrate.tuning.evaluate`; this module runs the study and assembles the result
(`calibrate.tuning.summaries` prints it). The method, in short:

Optuna drives the structural settings (windows, spans, flatline hours, ...); the
fence multiplier is never searched. For each trial the `Replayer` computes fence
scores (cached remainder streams: only settings that change the decomposition
refit); the flags change only where k passes a score, so `Evaluator.breakpoints`
(every distinct score of the hours before the split in the multiplier range) are
all the multipliers there are, `sweep_runs` turns them into runs of flagged hours
(each one episode over a range of breakpoints) and `scoring.curves.exact_solve` picks the
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

from calibrate import api
from calibrate.api import Session
from calibrate.detection.episodes import Episodes
from calibrate.engine.executors import Executor, trim_heap
from calibrate.errors import CalibrationError, InputError
from calibrate.inputs.incidents import Incidents
from calibrate.inputs.workspace import BASE_GROUP, Goal
from calibrate.scoring.figures import Figures, validation_verdict
from calibrate.scoring.matching import match, period_filter
from calibrate.scoring.tradeoffs import load_axis, pareto_front
from calibrate.settings import DetectorConfig, DetectorSettings
from calibrate.tuning import rolling, studies
from calibrate.tuning.evaluate import (
    Evaluator,
    json_safe,
    labels_line,
)
from calibrate.tuning.search_space import (
    Param,
    build_space,
    candidate_values,
    current_impacts,
    group_config,
    group_names,
    holdout_split,
    impact_grids,
    impact_label,
    impact_ranges,
    params_of,
    settings_of,
    solved_groups,
)

GRID_POINTS = 80
STUDY_FILE = ".calibrate/study.journal"
# states that use up the trial budget; a trial interrupted mid-way ends FAIL and is
# run again (as a new trial) by the next `tune`, so an interruption loses nothing
BUDGET_STATES = (optuna.trial.TrialState.COMPLETE, optuna.trial.TrialState.PRUNED)
INVALID = 1e9  # constraint value of a pruned (invalid) combination
# remainder streams a tune keeps in memory for its full replays (the chosen settings,
# rolling folds; trials read `Replayer.tuning_scores`); beyond, the least recently
# used are dropped and refit if needed again
STREAM_CACHE_BYTES = 512 * 1024**2


# --------------------------------------------------------------------------- space


# --------------------------------------------------------------------------- evaluate


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
        (`scoring.figures.validation_verdict`), with the reasons.
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
    """Optuna storage object and how to name it (`calibrate.tuning.studies.open_storage`)."""
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
    space, starts, first_hour, split, grids, ks, ms = _plan(ses, warm_start)
    api.require_incidents(ses, first_hour, split)
    current = ws.detector
    name = study_name or study_name_for(ses, goal, known_false)
    store, store_name = open_storage(ses, storage)
    ev = _evaluator(ses, ks, ms, grids, first_hour, split, goal, known_false,
                    executor=executor, engine=engine, workers=workers, scheduler=scheduler)
    try:
        with studies.storage_errors(store_name):
            study = _run_study(ses, ev, space, starts, name, store, budget, progress)
            rolling_too = ws.search.validation == "rolling"
            result = _result(ses, ev, space, study, name, store_name, current, goal,
                             store_front=True, keep_store=rolling_too)
            if rolling_too:
                _rolling(ses, ev, space, starts, name, store, budget, progress, result)
    finally:
        ev.replayer.close()
    return result


def _rolling(ses: Session, ev: Evaluator, space: list[Param], starts: Sequence[DetectorConfig],
             name: str, store: Any, budget: int, progress: bool, result: TuneResult) -> None:
    """Rolling validation (`calibrate.tuning.rolling`): one study per fold on the hours before its
    test block, sharing the evaluator's replayer (and so its cached fits); fills the
    folds, their pooled figures and the verdict into `result`."""
    s = ses.ws.search
    folds = rolling.fold_bounds(ev.first_hour, ev.split_hour, s.folds, s.gap_days)
    episodes = []
    for f in folds:
        api.require_incidents(ses, ev.first_hour, f.train_end)
        fev = Evaluator(ses, ev.replayer, ev.ks, ev.first_hour, f.train_end, ev.goal,
                        ev.known_false, scores_end=ev.scores_end)
        grids = _impact_plan(ses, starts, f.train_end)
        fev.min_impacts = grids.get("")
        fev.group_min_impacts = {g: v for g, v in grids.items() if g}
        study = _run_study(ses, fev, space, starts, f"{name}-fold{f.number}of{len(folds)}",
                           store, budget, progress)
        best, chosen, _, config = _chosen(ses, space, study, ses.ws.detector)
        # shortened on the fold's own tuning hours (fev's breakpoints end at train_end)
        f.config = rounded_multipliers(config, fev.breakpoints(fev.scores(config)))
        f.feasible = best is not None
        f.settings = {**chosen.params, "fence_multiplier": f.config.base.fence_multiplier,
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


def _evaluator(ses: Session, ks: np.ndarray, ms: dict[str, np.ndarray],
               grids: dict[str, tuple], first_hour: int, split: int, goal: Goal,
               known_false: Incidents | None, **where: Any) -> Evaluator:
    """An `Evaluator` over a new replayer whose tuning store keeps `grids` (fence
    windows, sides and flatline lengths, from `_plan`); `where`: executor, engine,
    workers, scheduler as for `api.make_replayer`. The caller closes ``ev.replayer``."""
    rp = api.make_replayer(ses, progress=False, cache_bytes=STREAM_CACHE_BYTES, **grids,
                           **where)
    try:
        return Evaluator(ses, rp, ks, first_hour, split, goal, known_false,
                         min_impacts=ms.get(""),
                         group_min_impacts={g: v for g, v in ms.items() if g})
    except BaseException:
        rp.close()
        raise


def _plan(ses: Session, warm_start: Sequence[DetectorConfig]):
    """What a search of the workspace scores and on which hours: the Optuna space, the
    starting configs, the tuning hours [first_hour, split), the fence windows, sides
    and flatline lengths whose tuning hours every fit keeps, and the multiplier and
    minimum impact grids (None: the latter is searched)."""
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
    settings = [s for c in starts for s in (c.base, *(g.settings for g in c.groups))]
    grids = {"fence_windows": tuple(fence_w),
             "sides": tuple(candidate_values(space, "sides", [s.sides for s in settings]) or ()),
             "flatlines": tuple(candidate_values(space, "flatline_hours",
                                                 [s.flatline_hours for s in settings]) or ())}
    return space, starts, first_hour, split, grids, ks, _impact_plan(ses, starts, split)


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
    space, starts, first_hour, split, grids, ks, ms = _plan(ses, ())
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
    ev = _evaluator(ses, ks, ms, grids, first_hour, split, goal, None,
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
        cur = settings_of(current, tune_by, g or None, ses)
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
        existing.set_user_attr("goal", json_safe(dataclasses.asdict(ev.goal)))
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
        trim_heap(collect=False)  # the trial's temporaries, before the next one's
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
    load (`scoring.tradeoffs.load_axis`).
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


def short_multiplier(k: float, breakpoints: np.ndarray) -> float:
    """The decimal with the fewest significant digits in ``[k, next breakpoint)``.

    Flags are ``score > k``, so every multiplier from `k` up to the next tuning-hour
    score above it flags the same tuning hours: the short value gives the same
    tuning-week figures, and a config people can read. `k` itself when no breakpoint
    lies above it (the grid's end).
    """
    above = breakpoints[breakpoints > k]
    if not above.size or not math.isfinite(k) or k <= 0:
        return k
    nxt = float(above.min())
    for digits in range(1, 17):
        scale = 10.0 ** (digits - 1 - math.floor(math.log10(k)))
        d = float(f"{math.ceil(k * scale) / scale:.{digits}g}")
        if k <= d < nxt:
            return d
    return k


def rounded_multipliers(config: DetectorConfig, breakpoints: np.ndarray) -> DetectorConfig:
    """`config` with each fence multiplier shortened by `short_multiplier` (the union of
    every series' breakpoints is finer than any group's, so each group keeps its flags)."""
    def short(s: DetectorSettings) -> DetectorSettings:
        return replace(s, fence_multiplier=short_multiplier(s.fence_multiplier, breakpoints))

    return replace(config, base=short(config.base),
                   groups=tuple(replace(g, settings=short(g.settings)) for g in config.groups))


def _result(ses: Session, ev: Evaluator, space: list[Param], study: optuna.Study, name: str,
            store_name: str, current: DetectorConfig, goal: Goal,
            store_front: bool = False, keep_store: bool = True) -> TuneResult:
    finished = study.get_trials(deepcopy=False, states=BUDGET_STATES)
    best, chosen, structure, config = _chosen(ses, space, study, current)
    config = rounded_multipliers(config, ev.breakpoints(ev.scores(config)))
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
                study.set_user_attr(key, json_safe(fronts[chosen.number]))
    pareto = pareto_frame(finished, goal, ses.analysts, fronts)
    if not keep_store:  # nothing reads the trials' store after this: free it for the replay
        ev.replayer.drop_tuning()
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
    out = {k: json_safe(getattr(f, k)) for k in keys}
    if "alerts_per_analyst_day" in f.per_team.columns:
        out["alerts_per_analyst_day"] = {
            str(t): json_safe(v) for t, v in f.per_team["alerts_per_analyst_day"].items()}
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


# --------------------------------------------------------------------------- CLI


def trial_evaluator(ses: Session, **where: Any) -> Evaluator:
    """The `Evaluator` a tune of the workspace scores its trials with (the same grids,
    tuning hours and goal; no known false alarms); `where` as for `api.make_replayer`.
    The caller closes ``ev.replayer``."""
    _, _, first_hour, split, grids, ks, ms = _plan(ses, ())
    return _evaluator(ses, ks, ms, grids, first_hour, split, ses.ws.goal, None, **where)


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
