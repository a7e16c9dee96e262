"""`calibrate tune`: constrained search, exact multiplier solve, resumable study.

References used here (each test names its own):
- brute force in the test: replay every grid multiplier through `Replayer.replay`
  (the detector's own fence_multiplier, no sweep) and score it with
  `api.score_episodes`, the path `calibrate replay` + `calibrate score` take;
- Optuna's documented behaviour (Optuna 5 API reference): a trial is feasible when
  every constraint value is <= 0; `enqueue_trial` runs the given parameters first;
  a study in a JournalStorage file keeps its trials across processes.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import optuna
import pandas as pd
import pytest

from calibrate import api
from calibrate.cli import main
from calibrate.detection.episodes import Episodes
from calibrate.engine.executors import SerialExecutor
from calibrate.engine.replay import Replayer
from calibrate.errors import InputError
from calibrate.inputs.incidents import Incidents
from calibrate.inputs.workspace import Goal
from calibrate.outputs import load_config, load_provenance
from calibrate.scoring.figures import validation_verdict
from calibrate.scoring.matching import match, period_filter
from calibrate.scoring.tradeoffs import load_axis
from calibrate.settings import DetectorGroup
from calibrate.tuning import evaluate, search, search_space, summaries
from tests.synthetic import make_workspace

SEARCH = "fence_window_hours = [48, 72]\nseasonal_span = [7, 11]\ntrials = 4"


@pytest.fixture
def ses(tmp_path: Path) -> api.Session:
    return api.open_session(make_workspace(tmp_path / "ws", search=SEARCH))


def _tune(ses: api.Session, tmp_path: Path, trials: int = 4, **kw) -> search.TuneResult:
    kw.setdefault("storage", str(tmp_path / "study.journal"))
    return search.tune(ses, trials=trials, engine="serial", progress=False, **kw)


def _brute_force_k(ses, config, ks, first, split, goal):
    """Of every k in `ks` and every distinct fence score of the tuning hours between
    them (where flags change), the one whose replay meets the miss rate and every
    team's budget with the fewest alerts (ties: the larger k): (k, caught, alerts)."""
    rp = Replayer(ses.history, metrics=list(ses.ws.metric_names), executor=SerialExecutor(),
                  routes=ses.routes, progress=False)
    every = np.concatenate([m.score[:, :split].ravel() for m in rp.scores(config).values()])
    candidates = np.unique(np.r_[ks, every[(every > ks.min()) & (every <= ks.max())]])
    inc = period_filter(ses.incidents, first, split)
    days = (split - first) / 24.0
    best = None
    for k in candidates:
        eps = period_filter(rp.replay(config.with_base(fence_multiplier=float(k))).episodes,
                            first, split)
        caught = int(match(eps, inc, ses.ws.incidents.early_hours,
                           ses.ws.incidents.late_hours).caught.sum())
        within = all((eps.team == t).sum() / (n * days) <= goal.budget(t)
                     for t, n in ses.analysts.items() if n > 0)
        if ((len(inc) - caught) / len(inc) <= goal.max_miss_rate and within
                and (best is None or len(eps) <= best[2])):
            best = (float(k), caught, len(eps))
    return best


def test_tune_finds_a_feasible_setting_no_worse_than_today(ses, tmp_path):
    res = _tune(ses, tmp_path)
    assert res.feasible, res.reason
    goal = ses.ws.goal
    assert res.tuning.miss_rate <= goal.max_miss_rate
    per_team = res.tuning.per_team
    for team, rate in per_team.loc[per_team["analysts"] > 0, "alerts_per_analyst_day"].items():
        assert rate <= goal.budget(team)
    # Optuna: enqueue_trial makes today's settings trial 0
    t0 = res.trials.set_index("number").loc[0]
    cur = ses.ws.detector.base
    assert (t0["fence_window_hours"], t0["seasonal_span"]) == (
        cur.fence_window_hours, cur.seasonal_span)
    # never worse than today's structural settings at their own best multiplier, found
    # independently by replaying every breakpoint (minimum impact 0, today's)
    ks = np.geomspace(ses.ws.search.multiplier_low, ses.ws.search.multiplier_high, 80)
    ref = _brute_force_k(ses, ses.ws.detector, ks, res.first_hour, res.split_hour, goal)
    assert ref is not None
    assert res.tuning.alerts <= ref[2]
    assert res.split_hour == ses.history.n_hours - 168  # 25% of 5 weeks -> 1 whole week
    assert res.first_hour == 167
    assert len(res.pareto) >= 1


def test_solved_multiplier_equals_brute_force(ses, tmp_path):
    first, split = 167, ses.history.n_hours - 168
    goal = ses.ws.goal
    config = ses.ws.detector
    ks = np.geomspace(ses.ws.search.multiplier_low, ses.ws.search.multiplier_high, 40)
    rp = api.make_replayer(ses, engine="serial", progress=False)
    ev = search.Evaluator(ses, rp, ks, first, split, goal).evaluate(config)
    ref = _brute_force_k(ses, config, ks, first, split, goal)
    assert ref is not None and ev.feasible
    assert (ev.k, ev.caught, ev.alerts) == ref


def test_solved_multiplier_and_min_impact_equal_brute_force(ses):
    """Reference: replay every (k, minimum-impact level) pair, k over every distinct fence
    score of the tuning hours in the grid's range (where flags can change) and the grid
    itself, scored as `calibrate score` does; the feasible pair with the fewest alerts
    (ties: larger k, then lower level) is what the evaluator solves, exactly."""
    first, split = 167, ses.history.n_hours - 168
    config = ses.ws.detector
    ks = np.geomspace(1.0, 60.0, 9)
    ms = np.array([0.0, 5.0, 30.0])
    rp = api.make_replayer(ses, engine="serial", progress=False)
    scores = rp.scores(config)
    every = np.concatenate([m.score[:, :split].ravel() for m in scores.values()])
    candidates = np.unique(np.r_[ks, every[(every > 1.0) & (every <= 60.0)]])
    assert len(candidates) > 5 * len(ks)
    inc = period_filter(ses.incidents, first, split)
    days = (split - first) / 24.0
    figs = {}  # (level, k) -> (caught, alerts, alerts per analyst per day by team)
    for lv in range(len(ms)):
        for k in candidates:
            cfg = _at(ses, config, ms, lv).with_base(fence_multiplier=float(k))
            eps = period_filter(rp.replay(cfg).episodes, first, split)
            caught = int(match(eps, inc, ses.ws.incidents.early_hours,
                               ses.ws.incidents.late_hours).caught.sum())
            rates = {t: float((eps.team == t).sum()) / (n * days)
                     for t, n in ses.analysts.items() if n > 0}
            figs[lv, float(k)] = (caught, len(eps), rates)
    beat_grid = 0
    for goal in (Goal(max_miss_rate=0.0, max_alerts_per_analyst_day=3.0),
                 Goal(max_miss_rate=0.4, max_alerts_per_analyst_day=1e6),
                 Goal(max_miss_rate=0.25, max_alerts_per_analyst_day=2.0)):
        def feasible(f, goal=goal):
            return (len(inc) - f[0]) / len(inc) <= goal.max_miss_rate and all(
                r <= goal.budget(t) for t, r in f[2].items())

        ok = [(f[1], -k, lv) for (lv, k), f in figs.items() if feasible(f)]
        ev = search.Evaluator(ses, rp, ks, first, split, goal,
                              min_impacts=_grids(ses, ms)).evaluate(config)
        assert ok and ev.feasible
        alerts, neg_k, lv = min(ok)
        want = {m: float(g[lv]) for m, g in _grids(ses, ms).items()}
        assert (ev.k, ev.min_impact, ev.alerts) == (-neg_k, want, alerts)
        assert ev.caught == figs[lv, -neg_k][0]
        on_grid = [a for a, k, _ in ok if -k in set(ks.tolist())]
        assert alerts <= min(on_grid)
        beat_grid += alerts < min(on_grid)
    assert beat_grid >= 1  # the breakpoints find fewer alerts than the grid somewhere


# per-metric ranges of the solved minimum impact ([search.groups.METRIC]), and a list
# that has Optuna sample it (not solved)
OWN_RANGES = ("\n[search.groups.impressions]\nmin_impact = { low = 0.0, high = 800.0 }"
              "\n[search.groups.clicks]\nmin_impact = { low = 0.0, high = 40.0 }")
SEARCHED_IMPACT = "\nmin_impact = [0.0]"


def _grids(ses, ms):
    """Per-metric minimum-impact grids for the evaluator; impressions move on `ms` and
    clicks on half of it (their own units), so level l is one pair of values."""
    return {m: np.asarray(ms, dtype=float) * (1.0 if m == "impressions" else 0.5)
            for m in ses.ws.metric_names}


def _at(ses, config, ms, lv):
    """`config` with every metric at minimum-impact level `lv` of `_grids`."""
    return config.with_base(min_impact_per_metric=tuple(
        (m, float(g[lv])) for m, g in _grids(ses, ms).items()))


def _naive_front(caught, load):
    """The definition, directly: for each caught count c, the least load among pairs
    catching >= c, kept where it is below the least load of catching > c."""
    out = []
    for c in sorted(set(caught), reverse=True):
        at_least = min(x for cc, x in zip(caught, load, strict=True) if cc >= c)
        more = [x for cc, x in zip(caught, load, strict=True) if cc > c]
        if not more or at_least < min(more):
            out.append((c, at_least))
    return out


def test_best_tradeoffs_is_the_pareto_front_with_its_tie_rule():
    """Reference: the front's definition computed naively (`_naive_front`), on random
    candidates with many ties; ties go to the larger k, then the smaller impact."""
    from calibrate.scoring.tradeoffs import best_tradeoffs

    rng = np.random.default_rng(5)
    for _ in range(30):
        n = int(rng.integers(1, 40))
        caught = rng.integers(0, 6, n)
        load = rng.integers(0, 8, n).astype(float)
        ks, ms = rng.integers(1, 4, n).astype(float), rng.integers(0, 3, n).astype(float)
        got = best_tradeoffs(caught, load, ks, ms)
        assert [(c, x) for c, x, _, _ in got] == _naive_front(caught.tolist(), load.tolist())
        for c, x, k, m in got:
            tied = [(ks[i], -ms[i]) for i in range(n) if caught[i] == c and load[i] == x]
            assert (k, -m) == max(tied)


def test_curve_loads_equal_load_axis_at_every_grid_point(ses):
    """Reference: `scoring.tradeoffs.load_axis` (the report's one-point rule) row by row, with
    per-team budgets (one infinite) so the share-of-budget branch runs, and with one
    budget for all."""
    from calibrate.scoring.tradeoffs import curve_loads, load_axis

    first, split = 167, ses.history.n_hours - 168
    ks = np.geomspace(0.5, 60.0, 9)
    rp = api.make_replayer(ses, engine="serial", progress=False)
    for budget in ({"blue": 2.0, "green": math.inf}, {"blue": 2.0, "green": 7.0}, 3.0):
        goal = Goal(max_miss_rate=0.25, max_alerts_per_analyst_day=budget)
        ev = search.Evaluator(ses, rp, ks, first, split, goal)
        c, _, _ = ev.curve(rp.scores(ses.ws.detector))
        budgets = {t: goal.budget(t) for t in ses.analysts}
        ref = []
        for j in range(len(ks)):
            rates = {t: 0.0 for t in ses.analysts}
            rates.update({t: float(r) for t, r in zip(c.teams, c.alerts_per_analyst_day[j],
                                                      strict=True) if t in ses.analysts})
            ref.append(load_axis(rates, budgets, ses.analysts)[0])
        got = curve_loads(c, ses.analysts, goal)
        assert got == pytest.approx(ref) and len(set(np.round(got, 9))) > 1


def test_trade_off_front_equals_brute_force_replays(ses):
    """Reference: replay every (k, min_impact) pair with the detector's own settings,
    score it as `calibrate score` does and take the busiest team's alerts per analyst
    per day; the front of those pairs (`_naive_front`) is what the evaluator stores."""
    first, split = 167, ses.history.n_hours - 168
    ks = np.geomspace(1.0, 60.0, 7)
    ms = np.array([0.0, 30.0, 2000.0])
    goal = Goal(max_miss_rate=0.25, max_alerts_per_analyst_day=1e6)
    rp = api.make_replayer(ses, engine="serial", progress=False)
    ev = search.Evaluator(ses, rp, ks, first, split, goal,
                          min_impacts=_grids(ses, ms)).evaluate(ses.ws.detector)
    fixed = search.Evaluator(ses, rp, ks, first, split, goal).evaluate(ses.ws.detector)
    pairs = []
    for lv, m in enumerate(ms):
        for k in ks:
            cfg = _at(ses, ses.ws.detector, ms, lv).with_base(fence_multiplier=float(k))
            f = api.score_episodes(ses, rp.replay(cfg).episodes, first, split, first_scored=0)
            teams = f.per_team[f.per_team["analysts"] > 0]
            load = max(teams["alerts_per_analyst_day"], default=0.0)
            pairs.append((f.caught, float(load), float(k), float(m)))
    ref = _naive_front([p[0] for p in pairs], [p[1] for p in pairs])
    assert [(c, pytest.approx(x)) for c, x, _, _ in ev.front] == ref
    assert len(ref) >= 3  # more than the solved point: the front spans recall levels
    for c, x, k, m in ev.front:  # each point replays to what it claims
        assert any(p[0] == c and p[1] == pytest.approx(x)
                   and p[2:] == (k, m["impressions"]) for p in pairs)
    # without a minimum-impact grid, the front is that of the config's own impact (0)
    own = [(c, x) for c, x, _, m in pairs if m == 0.0]
    assert [(c, pytest.approx(x)) for c, x, _, m in fixed.front] == _naive_front(
        [c for c, _ in own], [x for _, x in own])
    assert all(m is None for *_, m in fixed.front)


def test_infeasible_solved_pair_is_the_closest_fixed_minimum_impact(ses):
    """Reference: the established one-minimum-impact-at-a-time evaluation; with no pair
    meeting the goal, the solved pair is the one with the lowest miss-rate excess, then
    the lowest worst budget ratio, over every grid minimum impact."""
    first, split = 167, ses.history.n_hours - 168
    ks = np.geomspace(1.0, 60.0, 9)
    ms = np.array([0.0, 5.0, 30.0, 200.0])
    rp = api.make_replayer(ses, engine="serial", progress=False)
    goal = Goal(max_miss_rate=0.0, max_alerts_per_analyst_day=0.01)  # no budget is met
    ev = search.Evaluator(ses, rp, ks, first, split, goal,
                          min_impacts=_grids(ses, ms)).evaluate(ses.ws.detector)
    fixed = [(max(e.miss_rate - goal.max_miss_rate, 0.0), e.max_budget_ratio, -e.k, lv, e)
             for lv in range(len(ms))
             for e in [search.Evaluator(ses, rp, ks, first, split, goal).evaluate(
                 _at(ses, ses.ws.detector, ms, lv))]]
    *_, lv, ref = min(fixed, key=lambda f: f[:4])
    assert not ev.feasible and not ref.feasible
    assert (ev.k, ev.min_impact, ev.alerts, ev.max_budget_ratio) == (
        ref.k, {m: float(g[lv]) for m, g in _grids(ses, ms).items()}, ref.alerts,
        ref.max_budget_ratio)


def test_known_false_alerts_with_a_solved_min_impact(ses):
    """Reference: `match` of the chosen (k, min_impact) replay against the windows marked
    false, and the penalised objective recomputed from it."""
    first, split = 167, ses.history.n_hours - 168
    config = ses.ws.detector
    ks = np.array([2.0, 4.0])
    ms = np.array([0.0, 30.0])
    rp = api.make_replayer(ses, engine="serial", progress=False)
    eps = period_filter(rp.replay(config.with_base(fence_multiplier=4.0)).episodes, first,
                        split)
    kf = Incidents.make(level=eps.level[:3], series=eps.series[:3], start=eps.start[:3],
                        end=eps.end[:3], metric=eps.metric[:3])
    goal = Goal(max_miss_rate=1.0, max_alerts_per_analyst_day=1e6)
    ev = search.Evaluator(ses, rp, ks, first, split, goal, kf,
                          min_impacts=_grids(ses, ms)).evaluate(config)
    chosen = config.with_base(fence_multiplier=ev.k, min_impact_per_metric=tuple(
        ev.min_impact.items()))
    got = period_filter(rp.replay(chosen).episodes, first, split)
    expected = int(match(got, kf, 0, 0).alert_true.sum())
    assert ev.alerts == len(got)
    assert ev.known_false_alerts == expected >= 1
    assert ev.min_impact == {"impressions": 30.0, "clicks": 15.0}
    analysts = sum(ses.analysts.values())
    assert ev.value == pytest.approx(
        (len(got) + evaluate.KNOWN_FALSE_PENALTY * expected) / (analysts * (split - first) / 24))


def test_min_impact_is_solved_per_metric_in_its_own_units(tmp_path, monkeypatch):
    ses = api.open_session(make_workspace(tmp_path / "a", search=SEARCH))
    assert search_space.solved_min_impact(ses)  # solved by default
    assert "min_impact" not in {p.name for p in search.build_space(ses)}
    split = ses.history.n_hours - 168
    ranges = search.impact_ranges(ses, None, split)
    # by default each metric from 0 to its median |hourly value| on the tuning hours only
    for m in ("impressions", "clicks"):
        vals = np.concatenate([np.abs(ls.values[m][:, :split]).ravel()
                               for ls in ses.history.levels.values()])
        assert ranges[m] == (0.0, float(np.nanmedian(vals)))
    assert ranges["impressions"][1] > 5 * ranges["clicks"][1]  # different units
    grids = search.impact_grids(ranges, [{"impressions": 0.0, "clicks": 0.0}])
    assert len(grids["impressions"]) == len(grids["clicks"]) == len(search_space.relative_grid())
    assert grids["clicks"][0] == 0.0 and grids["clicks"][-1] == pytest.approx(
        ranges["clicks"][1], rel=1e-3)
    # today's values off the grid get one more level of their own
    more = search.impact_grids(ranges, [{"impressions": 7.0, "clicks": 0.3}])
    assert [more[m][-1] for m in ("impressions", "clicks")] == [7.0, 0.3]
    # one range for several metrics mixes units: refused with one line
    ranged = SEARCH + "\nmin_impact = { low = 0.0, high = 800.0 }"
    bad = api.open_session(make_workspace(tmp_path / "b", search=ranged))
    with pytest.raises(InputError, match="mixes their units"):
        search.impact_ranges(bad, None, split)
    # a metric's own range ([search.groups.METRIC]) is used as it is
    own = SEARCH + "\n[search.groups.clicks]\nmin_impact = { low = 1.0, high = 9.0 }"
    ses_o = api.open_session(make_workspace(tmp_path / "c", search=own))
    assert search.impact_ranges(ses_o, None, split)["clicks"] == (1.0, 9.0)
    # listed values are searched, not solved
    solved_name = search.study_name_for(ses, ses.ws.goal, None)
    listed = SEARCH + "\nmin_impact = [0.0]"
    ses_l = api.open_session(make_workspace(tmp_path / "d", search=listed))
    assert not search_space.solved_min_impact(ses_l)
    assert "min_impact" in {p.name for p in search.build_space(ses_l)}
    # a study whose trials sampled the minimum impact is never continued by one solving
    # it (its trials lack the solved value): the name records what is solved
    monkeypatch.setattr(search_space, "solved_min_impact", lambda *a: False)
    assert search.study_name_for(ses, ses.ws.goal, None) != solved_name


def test_known_false_alerts_are_counted_and_penalised(ses):
    first, split = 167, ses.history.n_hours - 168
    config = ses.ws.detector
    ks = np.array([2.0, 4.0])
    rp = api.make_replayer(ses, engine="serial", progress=False)
    eps = rp.replay(config.with_base(fence_multiplier=4.0)).episodes
    tuned_eps = period_filter(eps, first, split)
    assert len(tuned_eps) >= 2
    # mark the windows of the first two alerts as known false alarms
    kf = Incidents.make(level=tuned_eps.level[:2], series=tuned_eps.series[:2],
                        start=tuned_eps.start[:2], end=tuned_eps.end[:2],
                        metric=tuned_eps.metric[:2])
    goal = Goal(max_miss_rate=1.0, max_alerts_per_analyst_day=1e6)  # k = 4 is solved
    plain = search.Evaluator(ses, rp, ks, first, split, goal).evaluate(config)
    marked = search.Evaluator(ses, rp, ks, first, split, goal, kf).evaluate(config)
    # reference: `match` of the k = 4 replay against the false windows (no tolerance)
    expected = int(match(tuned_eps, kf, 0, 0).alert_true.sum())
    assert marked.k == plain.k == 4.0
    assert marked.known_false_alerts == expected >= 2
    assert marked.value == pytest.approx(
        plain.value * (plain.alerts + evaluate.KNOWN_FALSE_PENALTY * expected) / plain.alerts)


def test_impossible_goal_says_which_constraint_and_by_how_much(ses, tmp_path):
    res = _tune(ses, tmp_path, trials=3,
                goal=Goal(max_miss_rate=0.0, max_alerts_per_analyst_day=0.01))
    assert not res.feasible
    assert "alert budget" in res.reason and "over its budget 0.01" in res.reason
    assert not res.trials["feasible"].any()
    assert len(res.pareto) >= 1
    # the front spans recall levels, and its dearest point catches the most
    front = res.pareto
    assert front["load"].is_monotonic_increasing and front["recall"].is_monotonic_increasing
    assert front["recall"].iloc[-1] == pytest.approx(1 - res.trials["miss_rate"].min())
    lines = summaries.pareto_lines(res)
    assert lines[0].startswith("best trade-offs found") and "trial" in lines[1]


def test_report_judges_with_the_goal_the_tune_used(tmp_path):
    # per-team budgets in the workspace, one budget for all as a tune override: the
    # report's axis, trade-off front and verdicts must all be those of the override
    from calibrate.reporting.report import write_report

    ws = make_workspace(tmp_path / "ws", search=SEARCH, budget="{ blue = 2.0, green = 20.0 }")
    ses = api.open_session(ws)
    goal = Goal(max_miss_rate=0.5, max_alerts_per_analyst_day=4.0)
    res = _tune(ses, tmp_path, trials=3, goal=goal)
    assert res.goal == goal
    data = write_report(ses, res, tmp_path / "report", executor=SerialExecutor())
    t = data.tradeoff
    assert t.x_label == res.pareto.attrs["load_label"] == "alerts per analyst per day " \
        "(busiest team)"
    assert t.budget == 4.0 and t.target_recall == 0.5
    assert data.goal["max_miss_rate"] == 0.5
    assert t.front_x == pytest.approx(res.pareto["load"].tolist())


def test_unreachable_miss_rate_reports_best_miss_rate(tmp_path):
    # a multiplier range far above every incident's fence score catches nothing
    ws = make_workspace(tmp_path / "ws", search=SEARCH + "\nfence_multiplier = {low = 500.0, "
                        "high = 600.0}")
    ses = api.open_session(ws)
    res = _tune(ses, tmp_path, trials=2)
    assert not res.feasible
    best = res.trials["miss_rate"].min()
    assert res.reason.startswith(f"no setting meets max_miss_rate 0.25: best miss rate {best:.2f}")


def test_interrupt_and_resume_loses_no_trial(ses, tmp_path):
    storage = str(tmp_path / "resume.journal")
    first = _tune(ses, tmp_path, trials=3, storage=storage).trials
    second = _tune(ses, tmp_path, trials=6, storage=storage).trials
    assert first["number"].tolist() == [0, 1, 2]
    assert second["number"].tolist() == list(range(6))
    assert (second["state"] == "COMPLETE").all()
    cols = ["number", "fence_window_hours", "seasonal_span", "k", "value"]
    assert second[cols].head(3).equals(first[cols])
    # the study on disk, loaded with Optuna itself
    backend = optuna.storages.journal.JournalFileBackend(storage)
    study = optuna.load_study(study_name=search.study_name_for(ses, ses.ws.goal, None),
                              storage=optuna.storages.JournalStorage(backend))
    assert len(study.get_trials(states=(optuna.trial.TrialState.COMPLETE,))) == 6
    # a third run with the same budget runs nothing more
    third = _tune(ses, tmp_path, trials=6, storage=storage).trials
    assert len(third) == 6


# per-metric minimum impact: impressions move by hundreds an hour, clicks by a few
PER_METRIC = ("\nmin_impact = { low = 0.0, high = 200.0 }\n"
              "[search.groups.clicks]\nmin_impact = { low = 0.0, high = 4.0 }")


# a named group: campaign-level impressions; everything else stays with the base settings
NAMED = '\n[detector.group.leaf_volume]\nlevels = ["campaign"]\nmetrics = ["impressions"]'


@pytest.mark.parametrize("tune_by", ["all", "all-solved", "level", "metric", "group",
                                     "group-solved"])
def test_tuned_config_replays_to_the_figures_it_claims(tmp_path, tune_by):
    extra = PER_METRIC if tune_by == "metric" else SEARCHED_IMPACT
    if tune_by.endswith("-solved"):  # minimum impact solved with the multiplier(s)
        tune_by = tune_by.removesuffix("-solved")
        extra = OWN_RANGES
    ws = make_workspace(tmp_path / "ws", search=SEARCH + f'\ntune_by = "{tune_by}"' + extra,
                        detector=NAMED if tune_by == "group" else "")
    ses = api.open_session(ws)
    res = _tune(ses, tmp_path, trials=3)
    assert res.feasible
    if tune_by == "level":
        assert [g.name for g in res.config.groups] == list(ses.history.levels)
    if tune_by == "group":
        # the named group keeps its levels and metrics; the base is tuned for the rest
        (g,) = res.config.groups
        assert (g.name, g.levels, g.metrics) == ("leaf_volume", ("campaign",), ("impressions",))
        assert {"leaf_volume", "base"} <= {p.group for p in search.build_space(ses)}
        # the base's multiplier is solved as one more group, then written short: at or
        # just above a trial's solved value (the replay below shows the same figures)
        for m, col in ((res.config.base.fence_multiplier, "k[base]"),
                       (g.settings.fence_multiplier, "k[leaf_volume]")):
            assert any(k <= m < k + 1 for k in set(res.trials[col])), (m, col)
        if extra == OWN_RANGES:  # and so are both groups' per-metric minimum impacts
            for m in ses.ws.metric_names:
                assert res.config.base.impact_for(m) in set(res.trials[f"min_impact[base/{m}]"])
            assert g.settings.impact_for("impressions") in set(
                res.trials["min_impact[leaf_volume/impressions]"])
    if tune_by == "metric":
        assert [g.name for g in res.config.groups] == list(ses.ws.metric_names)
        got = {g.name: g.settings.impact_for(g.name) for g in res.config.groups}
        assert got["clicks"] <= 4.0 and max(got.values()) <= 200.0
    from calibrate.outputs import write_config

    out = write_config(tmp_path / "tuned.toml", res.config, res.provenance)
    config = load_config(out)
    assert config == res.config
    fresh = api.replay_session(api.open_session(ws), config, engine="serial", progress=False)
    tuning = api.score_episodes(ses, fresh.episodes, res.first_hour, res.split_hour)
    holdout = api.score_episodes(ses, fresh.episodes, res.split_hour, ses.history.n_hours)
    # the tune also lists the incidents before its first scored hour (never catchable)
    claimed_tuning = res.tuning.to_json_dict()
    early = search.period_filter(ses.incidents, 0, res.first_hour)
    assert claimed_tuning.pop("before_first_scored") == len(early)
    assert claimed_tuning.pop("before_first_scored_ids") == list(early.incident_id)
    got_tuning = tuning.to_json_dict()
    del got_tuning["before_first_scored"], got_tuning["before_first_scored_ids"]
    assert got_tuning == claimed_tuning
    assert holdout.to_json_dict() == res.holdout.to_json_dict()
    # and the figures the search itself claimed for the chosen trial (not a replay)
    claimed = res.trials.set_index("number").loc[res.provenance["chosen_trial"]]
    assert (claimed["caught"], claimed["alerts"]) == (tuning.caught, tuning.alerts)
    for team, rate in tuning.per_team["alerts_per_analyst_day"].items():
        if f"alerts_per_analyst_day[{team}]" in claimed.index:
            assert claimed[f"alerts_per_analyst_day[{team}]"] == pytest.approx(rate)
    prov = load_provenance(out)
    assert prov["split_hour"] == res.split_hour
    assert prov["tuning"]["alerts"] == tuning.alerts
    assert prov["history_sha256"] == ses.history.source_hash


@pytest.mark.parametrize("solved", [False, True])
def test_grouped_front_points_replay_to_what_they_claim(tmp_path, solved):
    """Reference: a full replay of each front point's per-group multipliers (and solved
    minimum impacts), scored as `calibrate score` does, catches the incidents and gives
    the busiest team's alert load it claims. The tune's trade-off list holds exactly
    that front (as the tune's own evaluator computes it), minus points other trials
    beat, and the chosen trial's solved point lies on or behind it; a report of the
    study reads the same list back."""
    extra = OWN_RANGES if solved else SEARCHED_IMPACT
    ws = make_workspace(tmp_path / "ws", search=SEARCH + '\ntune_by = "level"' + extra)
    ses = api.open_session(ws)
    storage = str(tmp_path / "study.journal")
    res = _tune(ses, tmp_path, trials=3, storage=storage)
    assert res.config.groups
    goal = ses.ws.goal
    _, _, _, _, grids, ks, ms = search._plan(ses, ())
    assert bool(ms) == solved
    ev = search._evaluator(ses, ks, ms, grids, res.first_hour, res.split_hour, goal, None,
                           engine="serial")
    try:
        front = ev.group_front(res.config)
        assert len(front) >= 2  # more than one recall level
        assert all(a.caught > b.caught and a.load > b.load
                   for a, b in zip(front, front[1:], strict=False))
        budgets = {t: goal.budget(t) for t in ses.analysts}
        for js in front:
            assert bool(js.group_min_impact) == solved
            cfg = search.with_group_solve(res.config, js.group_k, js.group_min_impact, "level")
            eps = ev.replayer.replay(cfg).episodes
            f = api.score_episodes(ses, eps, res.first_hour, res.split_hour)
            rates = dict(f.per_team["alerts_per_analyst_day"])
            assert f.caught == js.caught
            assert load_axis(rates, budgets, ses.analysts)[0] == pytest.approx(js.load)
    finally:
        ev.replayer.close()
    chosen = res.provenance["chosen_trial"]
    own = res.pareto[res.pareto["number"] == chosen]
    pts = {(js.caught, round(js.load, 9)) for js in front}
    assert len(own) >= 2 and own["k"].isna().all()
    assert {(int(c), round(x, 9)) for c, x in zip(own["caught"], own["load"],
                                                   strict=True)} <= pts
    others = res.pareto[res.pareto["number"] != chosen]
    for c, x in pts - {(int(c), round(x, 9)) for c, x in zip(own["caught"], own["load"],
                                                              strict=True)}:
        assert ((others["caught"] >= c) & (others["load"] <= x + 1e-9)).any()
    row = res.trials.set_index("number").loc[chosen]
    load = load_axis({t: row[f"alerts_per_analyst_day[{t}]"] for t in ses.analysts},
                     budgets, ses.analysts)[0]
    assert any(js.caught >= row["caught"] and js.load <= load + 1e-9 for js in front)
    # kept in the study (a report of a study tuned with known false alarms cannot
    # rebuild it: the study holds no windows) and read back from there
    store, _ = search.open_storage(ses, storage)
    study = optuna.load_study(study_name=res.study_name, storage=store)
    assert len(study.user_attrs[f"group_front:{chosen}"]) == len(front)
    again = search.study_result(ses, storage=storage, engine="serial")
    pd.testing.assert_frame_equal(again.pareto, res.pareto)


def test_group_ranges_replace_the_shared_ones_for_that_group_only(tmp_path):
    ws = make_workspace(tmp_path / "ws", search=SEARCH + '\ntune_by = "metric"' + PER_METRIC)
    ses = api.open_session(ws)
    spec = {p.name: p.spec for p in search.build_space(ses)}
    # min_impact ranges are solved per group, each on its own range
    assert set(search.solved_groups(ses)) == {"clicks", "impressions"}
    split = ses.history.n_hours - 168
    assert search.impact_ranges(ses, "clicks", split) == {"clicks": (0.0, 4.0)}
    assert search.impact_ranges(ses, "impressions", split)["impressions"][1] == 200.0
    # settings the group does not name come from the shared [search] keys
    assert spec["clicks/seasonal_span"].values == spec["impressions/seasonal_span"].values \
        == (7, 11)


def test_greedy_over_any_candidate_stops_at_a_local_optimum():
    """(multiplier, minimum impact) candidates are not ordered: with forward_only off, a
    move may go to any candidate that saves alerts. Brute force over every single-group
    move from the result: none keeps the miss target and saves alerts."""
    rng = np.random.default_rng(7)
    n_c, n_inc, n_g = 12, 6, 3
    caught = [rng.random((n_c, n_inc)) < 0.6 for _ in range(n_g)]
    cost = [rng.integers(0, 60, n_c).astype(float) for _ in range(n_g)]
    for target in (0.0, 0.3, 0.6, 1.0):
        idx = evaluate.greedy_multipliers(caught, cost, target, forward_only=[False] * n_g)

        def miss(ix):
            got = np.logical_or.reduce([caught[g][ix[g]] for g in range(n_g)])
            return (n_inc - got.sum()) / n_inc

        start_miss = miss([0] * n_g)
        if start_miss > target:
            assert idx == [0] * n_g
            continue
        assert miss(idx) <= target
        for g in range(n_g):
            for j in range(n_c):
                moved = list(idx)
                moved[g] = j
                if miss(moved) <= target:
                    assert cost[g][j] >= cost[g][idx[g]]


def _greedy_reference(caught, cost, max_miss_rate):
    """The joint greedy as the module docstring states it, one candidate at a time: the
    move with the highest (rate, saving, -group, index), forward moves only."""
    n_g, n_inc = len(caught), caught[0].shape[1]
    idx = [0] * n_g
    miss = lambda n: (n_inc - n) / n_inc  # noqa: E731
    while True:
        rows = [caught[g][idx[g]] for g in range(n_g)]
        now = int(np.logical_or.reduce(rows).sum())
        if miss(now) > max_miss_rate:
            return idx
        best = None
        for g in range(n_g):
            others = np.zeros(n_inc, dtype=bool)
            for h in range(n_g):
                if h != g:
                    others |= rows[h]
            for j in range(idx[g] + 1, len(cost[g])):
                count = int((caught[g][j] | others).sum())
                saving = float(cost[g][idx[g]] - cost[g][j])
                if miss(count) > max_miss_rate or saving <= 0:
                    continue
                lost = now - count
                move = (math.inf if lost <= 0 else saving / lost, saving, -g, j)
                if best is None or move > best:
                    best = move
        if best is None:
            return idx
        idx[-best[2]] = best[3]


def test_greedy_matches_the_one_at_a_time_reference_with_ties():
    rng = np.random.default_rng(11)
    for _ in range(200):
        n_g, n_c, n_inc = int(rng.integers(1, 4)), int(rng.integers(2, 8)), 5
        caught = [rng.random((n_c, n_inc)) < 0.7 for _ in range(n_g)]
        cost = [rng.integers(0, 6, n_c).astype(float) for _ in range(n_g)]  # many ties
        target = float(rng.choice([0.0, 0.2, 0.4, 1.0]))
        assert evaluate.greedy_multipliers(caught, cost, target) == \
            _greedy_reference(caught, cost, target)


def test_greedy_group_multipliers_stop_at_a_local_optimum():
    """Brute force over every single-group move: none keeps the miss target and saves."""
    rng = np.random.default_rng(3)
    n_k, n_inc, n_g = 6, 5, 3
    caught, cost = [], []
    for _ in range(n_g):
        # raising k never adds catches or alerts here (as without min_impact)
        c = np.sort(rng.random((n_k, n_inc)) < 0.8, axis=0)[::-1]
        caught.append(c)
        cost.append(np.sort(rng.integers(0, 50, n_k))[::-1].astype(float))
    for target in (0.0, 0.2, 0.4, 1.0):
        idx = evaluate.greedy_multipliers(caught, cost, target)

        def miss(ix):
            got = np.logical_or.reduce([caught[g][ix[g]] for g in range(n_g)])
            return 1 - got.sum() / n_inc

        assert miss(idx) <= target or idx == [0] * n_g
        total = sum(cost[g][idx[g]] for g in range(n_g))
        for g, j in itertools.product(range(n_g), range(n_k)):
            if j <= idx[g]:
                continue
            moved = list(idx)
            moved[g] = j
            if miss(moved) <= target:
                assert sum(cost[h][moved[h]] for h in range(n_g)) >= total


def test_invalid_combinations_are_pruned_not_crashed(tmp_path):
    # fence window 200 is not below the 168-hour decomposition window
    ws = make_workspace(tmp_path / "ws", search="fence_window_hours = [72, 200]\ntrials = 6")
    res = _tune(api.open_session(ws), tmp_path, trials=6)
    pruned = res.trials[res.trials["state"] == "PRUNED"]
    assert (pruned["fence_window_hours"] == 200).all()
    assert res.feasible and res.config.base.fence_window_hours == 72


def test_cli_writes_the_config_and_refuses_to_overwrite(tmp_path, capsys):
    ws = make_workspace(tmp_path / "ws", search=SEARCH)
    out = tmp_path / "tuned.toml"
    argv = ["tune", str(ws), "--out", str(out), "--trials", "3", "--engine", "serial",
            "--storage", str(tmp_path / "cli.journal")]
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert "tuning weeks (in-sample)" in text and "held-out weeks (out-of-sample)" in text
    # before the search, what the labels can show; last, the out-of-sample verdict
    first = next(x for x in text.splitlines() if x.startswith("before the search: "))
    assert "labelled incident(s) in the tuning weeks" in first
    last = text.strip().splitlines()[-1]
    res = search.study_result(api.open_session(ws), storage=str(tmp_path / "cli.journal"),
                              engine="serial")
    assert last.startswith(f"out-of-sample verdict: {res.verdict.upper()}: ")
    assert res.verdict == validation_verdict(res.holdout, res.goal)[0]
    tuned = load_config(out).base
    assert tuned.fence_multiplier > 0
    # the changed settings, today's value -> the written one
    cur = api.open_session(ws).ws.detector.base
    line = next(x for x in text.splitlines() if x.startswith("changed: "))
    assert f"fence_multiplier {cur.fence_multiplier!r} -> {tuned.fence_multiplier!r}" in line
    before = out.read_bytes()
    assert main(argv) == 1
    assert "already exists; pass --force" in capsys.readouterr().err
    assert out.read_bytes() == before
    assert main([*argv, "--force"]) == 0
    # impossible goal: exit 3 (2 is a usage error), nothing written
    other = tmp_path / "never.toml"
    argv2 = [a if a != str(out) else str(other) for a in argv]
    assert main([*argv2, "--max-miss-rate", "0", "--max-alerts-per-analyst-day", "0.01"]) == 3
    assert "best trade-offs" in capsys.readouterr().out
    assert not other.exists()


def test_cli_says_when_tune_by_all_leaves_out_named_groups(tmp_path, capsys):
    ws = make_workspace(tmp_path / "ws", search=SEARCH, detector=NAMED)
    out = tmp_path / "tuned.toml"
    assert main(["tune", str(ws), "--out", str(out), "--trials", "2", "--engine", "serial",
                 "--storage", str(tmp_path / "s.journal")]) == 0
    assert "leaves out the workspace's groups (leaf_volume)" in capsys.readouterr().out
    assert load_config(out).groups == ()


def test_holdout_warning_uses_the_wilson_upper_bound(ses):
    # Wilson (1927) via statsmodels: 0 caught of 30 -> recall interval (0, 0.1135)
    figs = replace(api.score_episodes(ses, Episodes.empty()), incidents=30, caught=0,
                   recall=0.0, recall_low=0.0, recall_high=0.1135134)
    assert search.holdout_warning(figs, Goal(max_miss_rate=0.85)) != ""  # target 0.15 > 0.1135
    assert search.holdout_warning(figs, Goal(max_miss_rate=0.9)) == ""  # target 0.10 < 0.1135


def test_each_trial_samples_with_a_seed_of_its_own_number(ses, tmp_path, monkeypatch):
    # Two tune processes sharing a study must not run identical samplers (they would
    # propose the same settings side by side): a trial's sampler is seeded by its
    # number, which the storage hands out once, so a trial another process holds
    # (here: asked for and left running) shifts every later seed.
    seeds = []
    real = optuna.samplers.TPESampler

    def recording(*args, **kw):
        if "seed" in kw:  # optuna's own default samplers are made without one
            seeds.append(kw["seed"])
        return real(*args, **kw)

    monkeypatch.setattr(search.optuna.samplers, "TPESampler", recording)
    store = str(tmp_path / "shared.journal")
    search.tune(ses, trials=2, storage=store, engine="serial", progress=False)
    study = optuna.load_study(study_name=search.study_name_for(ses, ses.ws.goal, None),
                              storage=search.open_storage(ses, store)[0])
    held = study.ask()  # trial 2, "another process"
    seeds.clear()
    search.tune(ses, trials=4, storage=store, engine="serial", progress=False)
    numbers = [t.number for t in study.get_trials(deepcopy=False)
               if t.state == optuna.trial.TrialState.COMPLETE]
    base = ses.ws.search.seed
    assert held.number == 2 and numbers == [0, 1, 3, 4]
    # the loading sampler, then one per trial this process ran
    assert seeds == [base + 3, base + 3, base + 4]


def test_a_resumed_study_proposes_what_an_uninterrupted_one_does(ses, tmp_path):
    """Reference: the same study run in one go (Optuna's TPE is deterministic for a
    fixed seed and trial history, Optuna docs "reproducible optimization")."""
    whole = _tune(ses, tmp_path, trials=7, storage=str(tmp_path / "whole.journal"))
    store = str(tmp_path / "parts.journal")
    _tune(ses, tmp_path, trials=3, storage=store)
    parts = _tune(ses, tmp_path, trials=7, storage=store)
    cols = [c for c in whole.trials.columns if c != "note"]
    a, b = whole.trials[cols], parts.trials[cols]
    assert len(a) == 7 and a.equals(b)
    assert len(a.drop_duplicates(subset=["fence_window_hours", "seasonal_span"])) > 1


def test_metric_lines_warn_about_metrics_switched_off_or_missing_all():
    """Hand-made per-metric figures: a metric with incidents and no alert and one with
    alerts that catch none of its incidents each get a warning line; a metric without
    incidents and one catching some do not."""
    from types import SimpleNamespace

    pm = pd.DataFrame({
        "incidents": [3, 7, 0, 2], "caught": [0, 0, 0, 1], "alerts": [0, 567, 12, 9],
        "recall": [0.0, 0.0, math.nan, 0.5], "recall_low": [0.0, 0.0, math.nan, 0.1],
        "recall_high": [0.5, 0.3, math.nan, 0.9]},
        index=pd.Index(["clicks", "ctr", "spend", "revenue"], name="metric"))
    det = pd.DataFrame({"alerts": [500, 88], "true_alerts": [1, 0],
                        "precision": [0.002, 0.0]},
                       index=pd.Index(["fence", "flatline"], name="detectors"))
    tuning = SimpleNamespace(per_metric=pm, per_detector=det, before_first_scored=2,
                             already_alerting=1)
    lines = summaries.metric_lines(SimpleNamespace(tuning=tuning))
    warnings = [x for x in lines if x.startswith("WARNING")]
    assert len(warnings) == 2
    assert "'clicks'" in warnings[0] and "no alert" in warnings[0]
    assert "'ctr'" in warnings[1] and "none of its 7" in warnings[1]
    assert any(x.startswith("per detector") and "fence: 500 alerts" in x for x in lines)
    assert any("2 incident(s) begin before the first scored hour" in x for x in lines)
    assert any("already alerting" in x for x in lines)


@pytest.mark.parametrize(("k", "breakpoints", "want"), [
    (6.3708989217200065, [6.3708989217200065, 6.3712, 7.0], 6.371),  # 6.371 < 6.3712
    (6.3708989217200065, [6.3708989217200065, 6.37090], 6.370899),  # a close breakpoint
    (1.5, [1.5, 5.0], 2.0),  # one digit reaches
    (12.0, [1.0, 12.0], 12.0),  # no breakpoint above: kept
    (0.05, [0.05, 0.0512], 0.05),  # already short
])
def test_short_multiplier_stays_below_the_next_breakpoint(k, breakpoints, want):
    """Hand-worked: flags are score > k, so any value in [k, next breakpoint) flags the
    same hours; the shortest decimal there is written."""
    got = search.short_multiplier(k, np.array(breakpoints))
    assert got == want
    above = [b for b in breakpoints if b > k]
    assert k <= got and (not above or got < min(above))


class _FullScores(evaluate.Evaluator):
    """Reference evaluator: reads every hour of a full replay (`Replayer.scores`)."""

    def scores(self, config):
        return self.replayer.scores(config)


@pytest.mark.parametrize("tune_by", ["", "level"])
def test_tuning_store_evaluates_exactly_as_full_replays(tmp_path, tune_by):
    """Reference: the same evaluator reading the full replay's scores of every hour
    (`Replayer.scores`, what `calibrate replay` scores). Every figure of every setting
    (both expected-value modes, both sides, flatlines on and off, solved minimum
    impacts, per-level groups) is equal, for the tune's split and for an earlier
    split reading the same store (a rolling fold); each decomposition setting is
    fitted once however many fence windows, sides and flatline lengths are visited."""
    search_toml = SEARCH + (f'\ntune_by = "{tune_by}"' if tune_by else "") + OWN_RANGES
    ses = api.open_session(make_workspace(tmp_path / "ws", search=search_toml))
    _, starts, first, split, grids, ks, ms = search._plan(ses, ())
    grids = {**grids, "sides": ("both", "up"), "flatlines": (0, 6)}
    ev = search._evaluator(ses, ks, ms, grids, first, split, ses.ws.goal, None,
                           engine="serial")
    ref_rp = api.make_replayer(ses, engine="serial", progress=False)
    base = ses.ws.detector
    try:
        settings = [replace(base.base, expected_value=mode, fence_window_hours=w, sides=sd,
                            flatline_hours=f)
                    for mode in ("fit", "forecast") for w in (48, 72)
                    for sd in ("both", "up") for f in (0, 6)]
        configs = [replace(base, base=s) for s in settings]
        if tune_by:  # one group per level, each with other settings
            levels = list(ses.history.levels)
            configs = [replace(base, groups=tuple(
                DetectorGroup(name=lv, levels=(lv,), settings=settings[(k + 3 * i) % len(settings)])
                for i, lv in enumerate(levels))) for k in range(len(settings))]
        for split_at in (split, split - 168):
            ref = _FullScores(ses, ref_rp, ks, first, split_at, ses.ws.goal, None,
                              min_impacts=ev.min_impacts,
                              group_min_impacts=ev.group_min_impacts)
            got = evaluate.Evaluator(ses, ev.replayer, ks, first, split_at, ses.ws.goal, None,
                                     min_impacts=ev.min_impacts,
                                     group_min_impacts=ev.group_min_impacts,
                                     scores_end=split)
            for config in configs:
                assert got.evaluate(config).attrs() == ref.evaluate(config).attrs()
        n_series = sum(ls.n_series for ls in ses.history.levels.values())
        assert ev.replayer.fits == 2 * n_series * len(ses.ws.metric_names)
    finally:
        ev.replayer.close()
        ref_rp.close()


def test_trial_evaluator_scores_a_setting_as_the_tune_did(ses, tmp_path):
    """`search.trial_evaluator` (what bench_search.py times a store trial with) is the
    tune's own: today's settings, the study's first trial, get the figures the study
    recorded, and further trials on the fitted setting refit nothing."""
    res = _tune(ses, tmp_path, trials=2)
    store, _ = search.open_storage(ses, str(tmp_path / "study.journal"))
    first = optuna.load_study(study_name=res.study_name, storage=store).trials[0]
    ev = search.trial_evaluator(ses, engine="serial")
    try:
        got = ev.evaluate(ses.ws.detector)
        assert got.value == first.value
        attrs = got.attrs()
        assert attrs.pop("constraints") == first.user_attrs["constraints"]
        assert attrs == {k: v for k, v in first.user_attrs.items() if k in attrs}
        fits = ev.replayer.fits
        for w in (48, 72):
            ev.evaluate(ses.ws.detector.with_base(fence_window_hours=w))
        assert ev.replayer.fits == fits > 0
    finally:
        ev.replayer.close()
