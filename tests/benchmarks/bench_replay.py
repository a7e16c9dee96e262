"""Replay speed and memory against the plain reference loop, in one process.

Compares, per series-hour, the replay (`Replayer.scores`: compiled kernel / linear
smoother) with the plain loop (statsmodels STL on the trailing window every hour + numpy
percentiles, as in `tests/test_replay_exact.py`), decomposition window 672, fence window
168, hourly refit, on invented series (default 100 series x 90 days non-robust, 5 series
robust), each with in-fit expected values (`expected_value = "fit"`) and with
one-hour-ahead ones (`"forecast"`). The `fit` reference loop is timed on a random sample
of hours of a few series (`--ref-series` x `--ref-hours`; each hour one fit, whose own
remainders fill the fence window); the `forecast` loop needs the forecast remainders of
the W hours before each scored hour, so it runs over W + `--ref-hours` consecutive hours
(one fit per hour) and is reported per hour it processed.

Cores: by default (`--workers 1`) the replay runs in this process with numba and BLAS
limited to one thread, as the reference loop runs: one core each side. With
`--workers N > 1` the replay fans out over N processes and its time is counted per
core (wall time x N), so the ratio is per core on both sides.

Each run starts a new replayer (and, with workers, new worker processes): "cold" is its
first replay (with worker start-up), "warm" a second one with the stream cache emptied
(what each refit in a search costs); then the reference is timed on its sample. Every
figure is the median and range over `--runs` runs (at least 3); the ratio is computed per
run. The replay's flags must equal the reference loop's on every timed hour.

Memory (unless `--skip-memory`): a replay of `--memory-series` series x 90 days x 4
metrics (window 336) on the local engine with every core, run `--runs` times; time and
peak RSS of this process, of the largest worker and of both together (sampled every 50 ms).
This part has no reference: time is throughput, memory is checked against 2 GB.

    python tests/benchmarks/bench_replay.py [--runs 3] [--series 100] [--robust-series 5]
        [--days 90] [--ref-series 1] [--ref-hours 60] [--workers 1]
        [--memory-series 1000] [--skip-memory] [--skip-robust] [--modes fit forecast]
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time

import numpy as np
import pandas as pd
from statsmodels.tsa.seasonal import STL
from threadpoolctl import threadpool_limits

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from _repeat import PeakRSS, add_runs_flag, ratios, repeat_many, spread  # noqa: E402

from calibrate.decomposition.decompose import fence_scores  # noqa: E402
from calibrate.engine.executors import Executor, LocalExecutor, SerialExecutor  # noqa: E402
from calibrate.engine.replay import Replayer  # noqa: E402
from calibrate.inputs.history import History, LevelSeries  # noqa: E402
from calibrate.settings import DetectorConfig, DetectorSettings  # noqa: E402


def synthetic_history(n_series: int, days: int, metrics: int, seed: int = 0) -> History:
    """Invented hourly series with daily and weekly cycles, noise and a few spikes."""
    rng = np.random.default_rng(seed)
    n = days * 24
    t = np.arange(n)
    hours = pd.date_range("2026-01-05", periods=n, freq="h", tz="UTC")
    values = {}
    for m in range(metrics):
        scale = rng.uniform(20, 5000, size=(n_series, 1))
        day = 1 + 0.6 * np.sin(2 * np.pi * (t - 7) / 24)
        week = 1 + 0.15 * np.sin(2 * np.pi * t / 168)
        y = scale * day * week * (1 + 0.08 * rng.standard_normal((n_series, n)))
        spikes = rng.random((n_series, n)) < 0.002
        y[spikes] *= 3
        values[f"m{m}"] = np.maximum(np.round(y), 0)
    keys = pd.DataFrame({"series": [f"s{i:05d}" for i in range(n_series)]})
    level = LevelSeries("series", ("series",), keys, values)
    return History(hours=hours, levels={"series": level}, key_columns=("series",))


def reference_hours(y, s: DetectorSettings, hours):
    """The plain loop of the exactness test, on chosen hours (hourly refit)."""
    L, W, k = s.decomposition_window_hours, s.fence_window_hours, s.fence_multiplier
    flags = []
    for t in hours:
        fit = STL(y[t - L + 1 : t + 1], period=s.period_hours, seasonal=s.seasonal_span,
                  robust=s.robust).fit()
        e = fit.trend[-1] + fit.seasonal[-1]
        r = y[t] - e
        q1, q3 = np.percentile(fit.resid[L - 1 - W : L - 1], [25, 75])
        iqr = q3 - q1
        sc = (np.inf if (r > q3 or r < q1) else 0.0) if iqr == 0 else max(
            (r - q3) / iqr, (q1 - r) / iqr)
        flags.append(sc > k)
    return np.array(flags)


def _score(r, q1, q3):
    iqr = q3 - q1
    if iqr == 0:
        return np.inf if (r > q3 or r < q1) else 0.0
    return max((r - q3) / iqr, (q1 - r) / iqr)


def reference_forecast(y, s: DetectorSettings, first: int, n_hours: int):
    """The plain forecast loop (hourly refit) over hours first - W .. first + n_hours - 1:
    STL on the window ending the hour before, expected = trend at its end + seasonal
    one period back; flags of the last `n_hours` hours, each from the W forecast
    remainders before it. Returns the flags and the number of hours processed."""
    L, W, k, P = (s.decomposition_window_hours, s.fence_window_hours, s.fence_multiplier,
                  s.period_hours)
    rem = {}
    flags = []
    for t in range(first - W, first + n_hours):
        fit = STL(y[t - L : t], period=P, seasonal=s.seasonal_span, robust=s.robust).fit()
        rem[t] = y[t] - (fit.trend[L - 1] + fit.seasonal[L - P])
        if t >= first:
            q1, q3 = np.percentile([rem[i] for i in range(t - W, t)], [25, 75])
            flags.append(_score(rem[t], q1, q3) > k)
    return np.array(flags), W + n_hours


def make_executor(workers: int) -> Executor:
    return SerialExecutor() if workers == 1 else LocalExecutor(workers)


def one_run(hist: History, cfg: DetectorConfig, workers: int, ref_series: int,
            ref_hours: int, seed: int) -> dict[str, float]:
    """One run: cold and warm replay, then the reference on a sample of hours."""
    s = cfg.base
    n = hist.n_hours
    L, W = s.decomposition_window_hours, s.fence_window_hours
    n_series = hist.levels["series"].n_series
    # replayed hours (each one fit in the plain loop): from L - 1 in-fit, from L forecast
    first = L - 1 if s.expected_value == "fit" else L
    series_hours = n_series * (n - first)
    ex = make_executor(workers)
    try:
        rp = Replayer(hist, executor=ex, progress=False)
        t0 = time.perf_counter()
        rp.scores(cfg)
        cold = time.perf_counter() - t0
        rp.cache.clear()  # same workers, now warm: the cost of each refit in a search
        t0 = time.perf_counter()
        scores = rp.scores(cfg)[("series", "m0")]
        warm = time.perf_counter() - t0
    finally:
        ex.close()
    y_all = hist.levels["series"].values["m0"]
    rng = np.random.default_rng(seed)
    ref_time, ref_count, agree = 0.0, 0, True
    for i in range(ref_series):
        if s.expected_value == "fit":
            hrs = np.sort(rng.choice(np.arange(L - 1, n), ref_hours, replace=False))
            t0 = time.perf_counter()
            ref_flags = reference_hours(y_all[i], s, hrs)
            ref_time += time.perf_counter() - t0
            ref_count += len(hrs)
        else:
            start = int(rng.integers(L + W, n - ref_hours))
            hrs = np.arange(start, start + ref_hours)
            t0 = time.perf_counter()
            ref_flags, processed = reference_forecast(y_all[i], s, start, ref_hours)
            ref_time += time.perf_counter() - t0
            ref_count += processed
        score = fence_scores(scores.remainder[i], scores.q1[i], scores.q3[i], "both")
        agree &= bool(np.array_equal(np.nan_to_num(score[hrs], nan=-1) > s.fence_multiplier,
                                     ref_flags))
    # per series-hour and per core: the replay's wall time x its cores
    return {"warm": warm * workers / series_hours, "cold": cold * workers / series_hours,
            "ref": ref_time / ref_count, "agree": float(agree)}


def speed(args: argparse.Namespace, robust: bool, mode: str) -> None:
    n_series = args.robust_series if robust else args.series
    hist = synthetic_history(n_series, args.days, 1)
    s = DetectorSettings(decomposition_window_hours=672, fence_window_hours=168,
                         fence_multiplier=3.0, robust=robust, expected_value=mode)
    cfg = DetectorConfig(base=s)
    # compile and build the smoother matrix first, on a tiny history
    Replayer(synthetic_history(2, 40, 1), executor=SerialExecutor(), progress=False).scores(cfg)
    seeds = iter(range(1, 1000))
    r = repeat_many(lambda: one_run(hist, cfg, args.workers, args.ref_series, args.ref_hours,
                                    next(seeds)), args.runs)
    label = "robust" if robust else "non-robust"
    cores = "one core each side" if args.workers == 1 else (
        f"replay on {args.workers} workers, counted per core (wall x {args.workers})")
    print(f"replay {label}, expected_value = {mode}: {n_series} series x {args.days} days, "
          f"window 672, fence window 168, hourly refit; {cores}; reference on "
          f"{args.ref_series} series x "
          + (f"{args.ref_hours} random hours" if mode == "fit" else
             f"{args.ref_hours} consecutive scored hours (+ the fence window before them)")
          + " per run")
    print(f"  replay warm, per series-hour: {spread(r['warm']).fmt('.2f', 'us', 1e6)}")
    print(f"  replay cold (new replayer{', worker start-up' if args.workers > 1 else ''}), "
          f"per series-hour: {spread(r['cold']).fmt('.2f', 'us', 1e6)}")
    print(f"  reference loop, per series-hour: {spread(r['ref']).fmt('.2f', 'ms', 1e3)}")
    print(f"  reference / replay warm: {spread(ratios(r['ref'], r['warm'])).fmt(',.0f', 'x')}")
    print(f"  reference / replay cold: {spread(ratios(r['ref'], r['cold'])).fmt(',.0f', 'x')}")
    print(f"  flags identical to the reference on every timed hour: "
          f"{all(a == 1.0 for a in r['agree'])} (in {len(r['agree'])} runs)")


def memory(args: argparse.Namespace) -> None:
    workers = os.cpu_count() or 1
    big = synthetic_history(args.memory_series, args.days, 4, seed=2)
    cfg = DetectorConfig(base=DetectorSettings(decomposition_window_hours=336,
                                               fence_window_hours=168))

    def run() -> dict[str, float]:
        with PeakRSS() as mem:
            ex = LocalExecutor(workers)
            try:
                t0 = time.perf_counter()
                result = Replayer(big, executor=ex, progress=False).replay(cfg)
                took = time.perf_counter() - t0
            finally:
                ex.close()
        return {"s": took, "alerts": len(result.episodes), "self": mem.self_peak,
                "child": mem.child_peak, "total": mem.total_peak}

    r = repeat_many(run, args.runs)
    mb = 1 / 2**20
    hours = args.memory_series * 4 * (big.n_hours - 335)
    print(f"memory: replay of {args.memory_series} series x {args.days} days x 4 metrics, "
          f"window 336, local engine, {workers} workers ({int(r['alerts'][0])} alerts; no "
          "reference)")
    print(f"  time: {spread(r['s']).fmt('.1f', 's')}; throughput "
          f"{spread([hours / t / workers for t in r['s']]).fmt(',.0f', 'series-hours/s/core')}")
    print(f"  peak RSS of this process: {spread(r['self']).fmt(',.0f', 'MB', mb)}")
    print(f"  peak RSS of the largest worker: {spread(r['child']).fmt(',.0f', 'MB', mb)}")
    print(f"  peak RSS of this process + workers: {spread(r['total']).fmt(',.0f', 'MB', mb)}"
          " (target < 2,048 MB)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(ap)
    ap.add_argument("--series", type=int, default=100)
    ap.add_argument("--robust-series", type=int, default=5)
    ap.add_argument("--days", type=int, default=90)
    ap.add_argument("--ref-series", type=int, default=1)
    ap.add_argument("--ref-hours", type=int, default=60)
    ap.add_argument("--workers", type=int, default=1,
                    help="1: the replay in this process on one core (default)")
    ap.add_argument("--memory-series", type=int, default=1000)
    ap.add_argument("--skip-memory", action="store_true")
    ap.add_argument("--skip-robust", action="store_true")
    ap.add_argument("--modes", nargs="+", default=["fit", "forecast"],
                    choices=("fit", "forecast"), help="expected values to time")
    args = ap.parse_args()
    print(f"machine: {platform.platform()}, {os.cpu_count()} cores, python "
          f"{platform.python_version()}")
    import numba

    threads = numba.get_num_threads()
    with threadpool_limits(1):
        numba.set_num_threads(1)
        for robust in (False,) if args.skip_robust else (False, True):
            for mode in args.modes:
                speed(args, robust, mode)
    numba.set_num_threads(threads)
    if not args.skip_memory:
        memory(args)


if __name__ == "__main__":
    main()
