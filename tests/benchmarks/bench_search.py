"""Benchmark: `search.tune` versus a plain search, same process, same search space.

The plain reference replays every trial from scratch (its `Replayer`'s stream cache
is emptied before every trial, so every trial refits every series; the worker
processes and the history they hold are started and shipped once, as the tune's are)
and searches the fence multiplier as one more Optuna parameter (log-uniform over
the workspace's multiplier range), scoring each trial with `api.score_episodes` on
the same tuning hours and with the same objective and constraints. Printed: the
time ratio and both searches' best feasible result (miss rate and alerts per
analyst per day). Target: >= 50x faster and no worse.

When the plain search is too slow to run all N trials, it runs `--plain-trials`
of them and its time is extrapolated per trial (said so in the output); its result
is then that of the trials it ran.

`--match-trials M` (off by default) adds a second, different comparison: after its
N trials the plain search goes on, up to M trials in all, until its best feasible
result is as good as the tune's, and the script prints how long that took against
the tune's whole run (and when the tune found its best trial). That is time to the same result,
not the equal-budget ratio the target is set on; both are printed and labelled.

    python tests/benchmarks/bench_search.py [--trials 100] [--plain-trials 100]
        [--match-trials 0] [--engine local]
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np
import optuna

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from calibrate import api, search  # noqa: E402
from calibrate.errors import InputError  # noqa: E402
from calibrate.executors import make_executor  # noqa: E402


def workspace(tmp: Path) -> Path:
    sample = ROOT / "sample_data" / "workspace.toml"
    if sample.is_file():
        return sample
    from tests.synthetic import make_workspace

    print("sample_data/workspace.toml missing: using the synthetic workspace")
    return make_workspace(tmp / "ws", search="fence_window_hours = [48, 72, 120]\n"
                          "seasonal_span = [7, 11, 15]\nflatline_hours = [0, 6]")


def plain_search(ses, trials: int, engine: str, first: int, split: int, seed: int,
                 match: float | None = None, match_trials: int = 0):
    """The reference: replay from scratch, multiplier searched, figures from a replay.

    Returns the best feasible trial of the first `trials`, every trial's duration, and
    (when `match` is given) the trial count and seconds after which a feasible trial
    first scored <= `match`, going on up to `match_trials` trials (None if never).
    """
    space = search.build_space(ses)
    goal = ses.ws.goal
    s = ses.ws.search
    total_analysts = sum(ses.analysts.values()) or 1
    days = (split - first) / 24.0
    current = ses.ws.detector

    impact = search.solved_min_impact(ses)  # the tune solves it; the plain search samples it

    def objective(trial: optuna.Trial) -> float:
        params = {p.name: p.suggest(trial) for p in space}
        k = trial.suggest_float("fence_multiplier", s.multiplier_low, s.multiplier_high,
                                log=True)
        m = None if impact is None else trial.suggest_float(
            "min_impact", min(impact.low, current.base.min_impact),
            max(impact.high, current.base.min_impact), log=impact.log)
        try:
            config = search._config_from(params, space, ses, current)
        except InputError as exc:
            trial.set_constraint("miss_rate", search.INVALID)
            trial.set_constraint("budget", search.INVALID)
            raise optuna.TrialPruned(str(exc)) from None
        config = config.with_base(fence_multiplier=k)
        if m is not None:
            config = config.with_base(min_impact=m)
        # from scratch: no cached streams. One Replayer for all trials, because a new one
        # holds new shared arrays, and the local engine restarts its workers for those:
        # that start-up (about 2 s here) is not part of a plain trial's cost
        rp.cache.clear()
        eps = rp.replay(config).episodes
        f = api.score_episodes(ses, eps, first, split)
        pt = f.per_team[f.per_team["analysts"] > 0]
        ratio = max([r / goal.budget(t) for t, r in pt["alerts_per_analyst_day"].items()],
                    default=0.0)
        trial.set_user_attr("miss_rate", f.miss_rate)
        trial.set_user_attr("alerts", f.alerts)
        trial.set_constraint("miss_rate", f.miss_rate - goal.max_miss_rate)
        trial.set_constraint("budget", ratio - 1.0)
        return f.alerts / (total_analysts * days)

    study = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=seed))
    today = {**search.params_of(current, space, ses),
             "fence_multiplier": min(max(current.base.fence_multiplier, s.multiplier_low),
                                     s.multiplier_high)}
    if impact is not None:
        today["min_impact"] = current.base.min_impact
    study.enqueue_trial(today)
    def feasible(t: optuna.trial.FrozenTrial) -> bool:
        return (t.state == optuna.trial.TrialState.COMPLETE
                and all(c <= 0 for c in t.constraints.values()))

    matched: list[tuple[int, float]] = []

    def watch(study: optuna.Study, t: optuna.trial.FrozenTrial) -> None:
        if match is not None and not matched and feasible(t) and t.value <= match + 1e-12:
            matched.append((t.number + 1, time.perf_counter() - t0))
            if len(study.trials) > trials:
                study.stop()

    t0 = time.perf_counter()
    rp = api.make_replayer(ses, executor=make_executor(engine), progress=False)
    try:
        study.optimize(objective, n_trials=trials, callbacks=[watch])
        first_trials, first_wall = list(study.trials), time.perf_counter() - t0
        if match is not None and not matched and match_trials > trials:
            study.optimize(objective, n_trials=match_trials - trials, callbacks=[watch])
    finally:
        rp.close()
    ok = [t for t in first_trials if feasible(t)]
    return PlainRun(best=min(ok, key=lambda t: t.value) if ok else None,
                    seconds=[t.duration.total_seconds() for t in first_trials],
                    wall=first_wall, matched=matched[0] if matched else None,
                    ran=len(study.trials), total_wall=time.perf_counter() - t0,
        best_all=min((t.value for t in study.trials if feasible(t)), default=float("inf")))


@dataclass
class PlainRun:
    best: optuna.trial.FrozenTrial | None  # best feasible of the first N trials
    seconds: list[float]  # durations of the first N trials
    wall: float  # wall time of the first N trials
    matched: tuple[int, float] | None  # (trials, seconds) to the tune's result
    ran: int  # trials run in all
    total_wall: float
    best_all: float  # best feasible value over every trial run (inf: none)


CACHED_REPEATS = 20


def cached_trial_seconds(ses, res) -> float:
    """Mean time of `Evaluator.evaluate` once the decomposition is cached (what a
    trial that changes no decomposition setting costs)."""
    space = search.build_space(ses)
    windows = search.candidate_values(space, "fence_window_hours",
                                      [ses.ws.detector.base.fence_window_hours]) or ()
    ks = np.geomspace(ses.ws.search.multiplier_low, ses.ws.search.multiplier_high,
                      search.GRID_POINTS)
    rp = api.make_replayer(ses, engine="serial", fence_windows=tuple(windows), progress=False)
    impact = search.solved_min_impact(ses)
    ms = None if impact is None else search.impact_grid(impact, ses.ws.detector.base.min_impact)
    ev = search.Evaluator(ses, rp, ks, res.first_hour, res.split_hour, ses.ws.goal,
                          min_impacts=ms)
    base = res.config
    ev.evaluate(base)  # the one refit
    configs = [base.with_base(fence_window_hours=w, min_impact=float(m))
               for w in (windows or [base.base.fence_window_hours])
               for m in np.linspace(0.0, 200.0, 5)]
    configs = (configs * CACHED_REPEATS)[:CACHED_REPEATS]
    t0 = time.perf_counter()
    for c in configs:
        ev.evaluate(c)
    return (time.perf_counter() - t0) / len(configs)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=100)
    ap.add_argument("--plain-trials", type=int, default=100,
                    help="trials the plain search runs (time extrapolated to --trials)")
    ap.add_argument("--match-trials", type=int, default=0,
                    help="let the plain search go on up to this many trials until it matches "
                         "the tune's result (time to the same result; 0: off)")
    ap.add_argument("--engine", default="local", choices=("local", "serial"))
    args = ap.parse_args()
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    with tempfile.TemporaryDirectory() as tmp:
        ses = api.open_session(workspace(Path(tmp)))
        n_series = sum(ls.n_series for ls in ses.history.levels.values())
        print(f"workspace {ses.ws.file}: {n_series} series x {len(ses.ws.metric_names)} "
              f"metrics x {ses.history.n_hours} hours, {len(ses.incidents)} incidents")
        journal = str(Path(tmp) / "bench.journal")
        started = datetime.now()
        t0 = time.perf_counter()
        res = search.tune(ses, trials=args.trials, storage=journal, engine=args.engine,
                          progress=False)
        fast = time.perf_counter() - t0
        done = res.trials[res.trials["state"] == "COMPLETE"]
        best = res.trials[res.trials["feasible"]]
        tune_to_best = None
        if len(best):
            number = int(best.loc[best["value"].idxmin(), "number"])
            storage, _ = search.open_storage(ses, journal)
            frozen = optuna.load_study(study_name=res.study_name, storage=storage).trials
            tune_to_best = (number + 1,
                            (frozen[number].datetime_complete - started).total_seconds())
        print(f"tune: {args.trials} trials in {fast:.1f} s ({fast / args.trials:.2f} s/trial), "
              f"{len(best)} of {len(done)} completed trials feasible")
        print(f"one trial on cached remainder streams: {cached_trial_seconds(ses, res):.3f} s "
              f"(mean of {CACHED_REPEATS}, fence window and minimum impact varied)")
        n_plain = min(args.plain_trials, args.trials)
        t0 = time.perf_counter()
        match = float(best["value"].min()) if len(best) and args.match_trials else None
        run = plain_search(ses, n_plain, args.engine, res.first_hour, res.split_hour,
                           ses.ws.search.seed, match=match, match_trials=args.match_trials)
        # equal budgets: timed around the whole call, as the tune is (worker start-up and
        # close included), unless the match phase ran on past the N trials
        plain = time.perf_counter() - t0 if run.ran == n_plain else run.wall
        ref, seconds = run.best, run.seconds
        # the first trial also starts the workers (and compiles in them), as the tune's
        # first trial does: it is counted once, and only the others are extrapolated
        per = float(np.mean(seconds[1:])) if len(seconds) > 1 else plain
        plain_full = plain if n_plain == args.trials else (
            plain + per * (args.trials - n_plain))
        note = "" if n_plain == args.trials else (
            f" (ran {n_plain} trials: first {seconds[0]:.1f} s with worker start-up, then "
            f"{per:.2f} s/trial, extrapolated to {args.trials})")
        print(f"plain search: {plain_full:.1f} s for {args.trials} trials{note}")
        print(f"time ratio (plain / tune): {plain_full / fast:.1f}x (target >= 50x)")
        decomp = {"period_hours", "seasonal_span", "trend_span", "robust", "weekly_period",
                  "decomposition_window_hours", "refit_every_hours"}
        cols = [p.name for p in search.build_space(ses) if p.setting in decomp]
        distinct = len(done[cols].drop_duplicates()) if cols else 1
        print(f"tune fitted {distinct} distinct decomposition settings in {len(done)} trials; "
              f"a refit costs at least one plain trial (more: it computes the quartiles of "
              f"every candidate fence window) and the plain search refits on every trial, so "
              f"the ratio cannot pass trials / distinct settings "
              f"({args.trials / max(distinct, 1):.0f}x here) however cheap the other trials get")
        if len(best):
            b = best.loc[best["value"].idxmin()]
            print(f"tune best feasible: miss rate {b['miss_rate']:.3f}, "
                  f"{b['value']:.3f} alerts per analyst per day, {int(b['alerts'])} alerts, "
                  f"k={b['k']:.3f}")
        else:
            print(f"tune: no feasible trial of {len(done)}: {res.reason}")
        if ref is not None:
            print(f"plain best feasible ({n_plain} trials): miss rate "
                  f"{ref.user_attrs['miss_rate']:.3f}, {ref.value:.3f} alerts per analyst per "
                  f"day, {ref.user_attrs['alerts']} alerts, k={ref.params['fence_multiplier']:.3f}")
            if len(best):
                verdict = "no worse" if b["value"] <= ref.value + 1e-12 else "WORSE"
                print(f"tune versus plain at the same miss-rate target: {verdict}")
        else:
            print(f"plain search: no feasible trial in {n_plain}")
        if match is not None and tune_to_best is not None:
            n_best, s_best = tune_to_best
            print(f"time to the same result (not the target's equal-budget ratio): the tune "
                  f"found its best ({match:.3f}) at trial {n_best}, {s_best:.1f} s into its "
                  f"{fast:.1f} s run; ratios below are against the whole run")
            if run.matched is not None:
                n_m, s_m = run.matched
                print(f"  the plain search first matched it at trial {n_m}, {s_m:.1f} s in: "
                      f"{s_m / fast:.1f}x")
            else:
                print(f"  the plain search did not match it in {run.ran} trials "
                      f"({run.total_wall:.0f} s; its best {run.best_all:.3f}): more than "
                      f"{math.floor(run.total_wall / fast)}x")
        print(f"held-out: miss rate {res.holdout.miss_rate:.3f} "
              f"({res.holdout.caught} of {res.holdout.incidents}), "
              f"warning: {res.holdout_warning or 'none'}" if res.holdout else "no holdout")


if __name__ == "__main__":
    main()
