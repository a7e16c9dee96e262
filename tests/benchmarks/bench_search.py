"""Benchmark: `search.tune` versus a plain search, same process, same cores, same space.

What is compared: on a copy of the sample workspace, `search.tune`
(decompositions cached by setting, the fence multiplier solved over every distinct score
breakpoint and each watched metric's minimum impact solved over its grid, see the
README's "How tuning works") against a plain Optuna search of the same structural
space that:

- replays every trial from scratch: its `Replayer`'s stream cache is emptied before
  every trial, so every trial refits every series (the worker processes and the history
  they hold are started and shipped once, as the tune's are);
- searches the fence multiplier as one more Optuna parameter (log-uniform over the
  workspace's multiplier range);
- searches the minimum impact as Optuna parameters: by default one float per watched
  metric, uniform over the range the tune solves it in (`search.impact_ranges`, from the
  tuning weeks); with `--plain-impact share` one shared share of every metric's range
  (level l of `search.impact_grids` is that share);
- scores each trial with `api.score_episodes` on the same tuning hours, with the same
  objective (alerts per analyst per day), constraints and Optuna sampler.

Cores: both searches run on the same engine (`--engine local`: one worker process per
core; `serial`: this process) in the same process, one after the other, in every run.

Printed, each as median and range over `--runs` runs (at least 3): both searches' wall
times for `--trials` trials and the ratio plain / tune computed per run; the time of one
tune trial on the tuning store once its decomposition setting is fitted; both searches'
best feasible results (miss rate and alerts per analyst per day) per run; and the bound
of about trials / distinct decomposition settings on the equal-budget ratio (each
distinct setting is one refit for the tune, and a refit costs about one plain trial or
more).

When the plain search is too slow, `--plain-trials P` runs P of its trials and
extrapolates its time per trial to `--trials` (said so in the output); its result is
then that of the trials it ran. `--match-trials M` (off by default) adds a different
comparison: after its trials the plain search goes on, up to M trials in all, until its
best feasible result is as good as the tune's, and the time that took is set against the
tune's whole run (time to the same result, not the equal-budget ratio).

Defaults (15 trials each) finish in a few minutes on 2 cores; the README row uses

    python tests/benchmarks/bench_search.py --trials 100 --plain-trials 100
        [--runs 3] [--match-trials 0] [--plain-impact per-metric] [--engine local]
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
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _repeat import add_runs_flag, ratios, spread  # noqa: E402
from _sample import sample_copy  # noqa: E402

from calibrate import api  # noqa: E402
from calibrate.engine.executors import make_executor  # noqa: E402
from calibrate.errors import InputError  # noqa: E402
from calibrate.tuning import search, search_space  # noqa: E402


@dataclass
class PlainRun:
    best: optuna.trial.FrozenTrial | None  # best feasible of the first N trials
    seconds: list[float]  # durations of the first N trials
    wall: float  # wall time of the first N trials
    matched: tuple[int, float] | None  # (trials, seconds) to the tune's result
    ran: int  # trials run in all
    total_wall: float
    best_all: float  # best feasible value over every trial run (inf: none)


def plain_search(ses, trials: int, engine: str, first: int, split: int, seed: int,
                 impact_mode: str, match: float | None = None,
                 match_trials: int = 0) -> PlainRun:
    """The reference: replay from scratch, multiplier and minimum impacts searched,
    figures from a replay.

    Returns the best feasible trial of the first `trials`, every trial's duration, and
    (when `match` is given) the trial count and seconds after which a feasible trial
    first scored <= `match`, going on up to `match_trials` trials (None if never).
    """
    if ses.ws.search.tune_by != "all":
        raise SystemExit("bench_search compares searches without groups (tune_by = \"all\")")
    space = search.build_space(ses)
    goal = ses.ws.goal
    s = ses.ws.search
    total_analysts = sum(ses.analysts.values()) or 1
    days = (split - first) / 24.0
    current = ses.ws.detector
    # the tune solves each watched metric's minimum impact in these ranges; the plain
    # search samples it there (ranges widened to today's values, as the tune's grid is)
    solved = search_space.solved_min_impact(ses)
    ranges = search.impact_ranges(ses, None, split) if solved else {}
    today_m = search.current_impacts(ses, current, None) if solved else {}
    ranges = {m: (min(lo, today_m[m]), max(hi, today_m[m])) for m, (lo, hi) in ranges.items()}

    def impacts(trial: optuna.Trial) -> dict[str, float]:
        if not ranges:
            return {}
        if impact_mode == "share":
            t = trial.suggest_float("min_impact_share", 0.0, 1.0)
            return {m: lo + t * (hi - lo) for m, (lo, hi) in ranges.items()}
        return {m: trial.suggest_float(f"min_impact[{m}]", lo, hi)
                for m, (lo, hi) in ranges.items()}

    def objective(trial: optuna.Trial) -> float:
        params = {p.name: p.suggest(trial) for p in space}
        k = trial.suggest_float("fence_multiplier", s.multiplier_low, s.multiplier_high,
                                log=True)
        per_metric = impacts(trial)
        try:
            config = search._config_from(params, space, ses, current)
        except InputError as exc:
            search._record_constraints(trial, [search.INVALID, search.INVALID])
            raise optuna.TrialPruned(str(exc)) from None
        config = config.with_base(fence_multiplier=k)
        if per_metric:
            config = config.with_base(min_impact=0.0, min_impact_per_metric=tuple(
                (m, float(v)) for m, v in per_metric.items()))
        # from scratch: no cached streams. One Replayer for all trials, because a new one
        # holds new shared arrays, and the local engine restarts its workers for those:
        # that start-up is not part of a plain trial's cost
        rp.cache.clear()
        eps = rp.replay(config).episodes
        f = api.score_episodes(ses, eps, first, split)
        pt = f.per_team[f.per_team["analysts"] > 0]
        ratio = max([r / goal.budget(t) for t, r in pt["alerts_per_analyst_day"].items()],
                    default=0.0)
        trial.set_user_attr("miss_rate", f.miss_rate)
        trial.set_user_attr("alerts", f.alerts)
        search._record_constraints(trial, [f.miss_rate - goal.max_miss_rate, ratio - 1.0])
        return f.alerts / (total_analysts * days)

    study = optuna.create_study(sampler=search._sampler(seed))
    today = {**search.params_of(current, space, ses),
             "fence_multiplier": min(max(current.base.fence_multiplier, s.multiplier_low),
                                     s.multiplier_high)}
    if ranges and impact_mode == "share":
        # today's impacts as a share, when one share gives all of them (else share 0)
        shares = {(today_m[m] - lo) / (hi - lo) if hi > lo else 0.0
                  for m, (lo, hi) in ranges.items()}
        today["min_impact_share"] = shares.pop() if len(shares) == 1 else 0.0
    else:
        today.update({f"min_impact[{m}]": today_m[m] for m in ranges})
    study.enqueue_trial(today)

    matched: list[tuple[int, float]] = []

    def watch(study: optuna.Study, t: optuna.trial.FrozenTrial) -> None:
        if (match is not None and not matched and search._is_feasible(t)
                and t.value <= match + 1e-12):
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
    ok = [t for t in first_trials if search._is_feasible(t)]
    return PlainRun(best=min(ok, key=lambda t: t.value) if ok else None,
                    seconds=[t.duration.total_seconds() for t in first_trials],
                    wall=first_wall, matched=matched[0] if matched else None,
                    ran=len(study.trials), total_wall=time.perf_counter() - t0,
                    best_all=min((t.value for t in study.trials if search._is_feasible(t)),
                                 default=float("inf")))


CACHED_REPEATS = 20


def cached_trial_seconds(ses, res) -> float:
    """Mean time of `Evaluator.evaluate` once the decomposition is fitted (what a tune
    trial that changes no decomposition setting costs), in this process, on the
    evaluator a tune uses (`search.trial_evaluator`: its store keeps the space's fence
    windows, sides and flatline lengths, so no trial below refits)."""
    space = search.build_space(ses)
    base = res.config.base
    windows = search.candidate_values(space, "fence_window_hours",
                                      [base.fence_window_hours]) or [base.fence_window_hours]
    flats = search.candidate_values(space, "flatline_hours",
                                    [base.flatline_hours]) or [base.flatline_hours]
    ev = search.trial_evaluator(ses, engine="serial")
    try:
        ev.evaluate(res.config)  # the one fit
        fits = ev.replayer.fits
        configs = [res.config.with_base(fence_window_hours=w, flatline_hours=f)
                   for w in windows for f in flats]
        configs = (configs * CACHED_REPEATS)[:CACHED_REPEATS]
        t0 = time.perf_counter()
        for c in configs:
            ev.evaluate(c)
        took = (time.perf_counter() - t0) / len(configs)
        if ev.replayer.fits != fits:
            raise RuntimeError("a trial on the fitted setting refitted: the timing is wrong")
        return took
    finally:
        ev.replayer.close()


# the settings a remainder stream depends on (`DetectorSettings.decomposition_key`)
DECOMPOSITION = {"period_hours", "seasonal_span", "trend_span", "robust", "weekly_period",
                 "decomposition_window_hours", "refit_every_hours", "expected_value"}


def one_run(args: argparse.Namespace, tmp: Path, run: int) -> dict:
    """One run: the tune, one trial on cached streams, then the plain search."""
    ses = api.open_session(args.ws)
    journal = str(tmp / f"run{run}.journal")
    started = datetime.now()
    t0 = time.perf_counter()
    res = search.tune(ses, trials=args.trials, storage=journal, engine=args.engine,
                      progress=False)
    fast = time.perf_counter() - t0
    done = res.trials[res.trials["state"] == "COMPLETE"]
    best = res.trials[res.trials["feasible"]]
    out: dict = {"tune": fast, "feasible": len(best), "done": len(done), "res": res}
    if len(best):
        b = best.loc[best["value"].idxmin()]
        out["tune_best"] = b
        storage, _ = search.open_storage(ses, journal)
        frozen = optuna.load_study(study_name=res.study_name, storage=storage).trials
        number = int(b["number"])
        out["tune_to_best"] = (number + 1,
                               (frozen[number].datetime_complete - started).total_seconds())
    cols = [p.name for p in search.build_space(ses) if p.setting in DECOMPOSITION]
    out["distinct"] = len(done[cols].drop_duplicates()) if cols else 1
    out["cached"] = cached_trial_seconds(ses, res)
    n_plain = min(args.plain_trials, args.trials)
    match = float(best["value"].min()) if len(best) and args.match_trials else None
    t0 = time.perf_counter()
    p = plain_search(ses, n_plain, args.engine, res.first_hour, res.split_hour,
                     ses.ws.search.seed, args.plain_impact, match=match,
                     match_trials=args.match_trials)
    # equal budgets: timed around the whole call, as the tune is (worker start-up and
    # close included), unless the match phase ran on past the N trials
    plain = time.perf_counter() - t0 if p.ran == n_plain else p.wall
    # the first trial also starts the workers (and compiles in them), as the tune's first
    # trial does: it is counted once, and only the others are extrapolated
    per = float(np.mean(p.seconds[1:])) if len(p.seconds) > 1 else plain
    out["plain"] = plain if n_plain == args.trials else plain + per * (args.trials - n_plain)
    out["plain_run"] = p
    return out


def results_line(name: str, values: list[str]) -> str:
    same = len(set(values)) == 1
    return f"  {name}: {values[0] if same else ', '.join(values)}" + (
        f" (the same in all {len(values)} runs)" if same else " (per run)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(ap)
    ap.add_argument("--trials", type=int, default=15)
    ap.add_argument("--plain-trials", type=int, default=15,
                    help="trials the plain search runs (time extrapolated to --trials)")
    ap.add_argument("--match-trials", type=int, default=0,
                    help="let the plain search go on up to this many trials until it matches "
                         "the tune's result (time to the same result; 0: off)")
    ap.add_argument("--plain-impact", default="per-metric", choices=("per-metric", "share"),
                    help="the plain search's minimum impact: one float per watched metric, "
                         "or one share of every metric's range")
    ap.add_argument("--engine", default="local", choices=("local", "serial"))
    args = ap.parse_args()
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        args.ws = sample_copy(tmp / "run0")
        ses = api.open_session(args.ws)
        n_series = sum(ls.n_series for ls in ses.history.levels.values())
        print(f"workspace: the sample, {n_series} series x {len(ses.ws.metric_names)} metrics "
              f"x {ses.history.n_hours} hours, {len(ses.incidents)} incidents; engine "
              f"{args.engine} for both searches; {args.trials} trials each"
              + ("" if args.plain_trials >= args.trials else
                 f" (the plain search runs {args.plain_trials}, extrapolated)")
              + f"; plain minimum impact: {args.plain_impact}")
        runs = [one_run(args, tmp, i) for i in range(args.runs)]
    tune_s, plain_s = [r["tune"] for r in runs], [r["plain"] for r in runs]
    print(f"tune, {args.trials} trials: {spread(tune_s).fmt('.1f', 's')}")
    print(f"plain search, {args.trials} trials: {spread(plain_s).fmt('.1f', 's')}")
    print(f"time ratio plain / tune (per run): {spread(ratios(plain_s, tune_s)).fmt('.1f', 'x')}")
    print(f"one tune trial on the tuning store, its setting fitted (mean of {CACHED_REPEATS}, "
          f"fence window and flatline hours varied, serial engine): "
          f"{spread([r['cached'] for r in runs]).fmt('.3f', 's')}")
    distinct = [r["distinct"] for r in runs]
    print(f"the tune fitted {'/'.join(map(str, distinct))} (per run) distinct "
          f"decomposition settings in {runs[0]['done']} completed trials; a refit costs about "
          f"one plain trial or more, so the equal-budget ratio is held to about trials / "
          f"distinct settings ({args.trials / max(max(distinct), 1):.1f}x here; timing noise "
          f"can put one run above it)")
    print("best feasible results on the tuning weeks:")
    tune_vals = [f"miss rate {r['tune_best']['miss_rate']:.3f}, "
                 f"{r['tune_best']['value']:.3f} alerts per analyst per day, "
                 f"k={r['tune_best']['k']:.3f}" if "tune_best" in r else
                 f"none feasible ({r['res'].reason})" for r in runs]
    print(results_line("tune", tune_vals))
    plain_vals = [f"miss rate {p.best.user_attrs['miss_rate']:.3f}, {p.best.value:.3f} alerts "
                  f"per analyst per day, k={p.best.params['fence_multiplier']:.3f}"
                  if (p := r["plain_run"]).best is not None else "none feasible"
                  for r in runs]
    print(results_line(f"plain ({min(args.plain_trials, args.trials)} trials)", plain_vals))
    verdicts = []
    for r in runs:
        p = r["plain_run"]
        if "tune_best" in r and p.best is not None:
            verdicts.append("no worse" if r["tune_best"]["value"] <= p.best.value + 1e-12
                            else "WORSE")
        else:
            verdicts.append("not comparable (a side has no feasible trial)")
    print(results_line("tune versus plain at the same miss-rate target", verdicts))
    if args.match_trials:
        print("time to the same result (not the equal-budget ratio), against the tune's "
              "whole run:")
        lows = []
        for i, r in enumerate(runs, 1):
            p = r["plain_run"]
            if "tune_to_best" not in r:
                print(f"  run {i}: the tune found no feasible trial")
                continue
            n_best, s_best = r["tune_to_best"]
            head = (f"  run {i}: the tune found its best ({r['tune_best']['value']:.3f}) at "
                    f"trial {n_best}, {s_best:.1f} s into its {r['tune']:.1f} s run; ")
            if p.matched is not None:
                lows.append(p.matched[1] / r["tune"])
                print(head + f"the plain search matched it at trial {p.matched[0]}, "
                      f"{p.matched[1]:.1f} s in: {lows[-1]:.1f}x")
            else:
                lows.append(p.total_wall / r["tune"])
                print(head + f"the plain search did not match it in {p.ran} trials "
                      f"({p.total_wall:.0f} s; its best {p.best_all:.3f}): more than "
                      f"{math.floor(lows[-1])}x")
        if lows:
            print(f"  ratio (a lower bound in runs that did not match): "
                  f"{spread(lows).fmt('.1f', 'x')}")
    held = [f"miss rate {r['res'].holdout.miss_rate:.3f} ({r['res'].holdout.caught} of "
            f"{r['res'].holdout.incidents}), warning: {r['res'].holdout_warning or 'none'}"
            if r["res"].holdout else "no holdout" for r in runs]
    print(results_line("tune's held-out weeks", held))


if __name__ == "__main__":
    main()
