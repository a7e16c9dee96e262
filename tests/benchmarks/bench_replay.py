"""Replay speed and memory against the plain reference loop, in one process.

Prints every ratio it measures:
- per series-hour: the replay (compiled kernel / linear smoother, fanned out over
  all cores) versus the plain loop (statsmodels STL on the trailing window every
  hour + numpy percentiles), non-robust and robust, each with in-fit expected values
  (`expected_value = "fit"`) and with one-hour-ahead ones (`"forecast"`), decomposition
  window 672, hourly refit, 100 series x 90 days. Both sides are timed `--runs` times
  (default 3) and the median is used. The `fit` reference loop is timed on a sample of
  hours of a few series (each hour one fit, whose own remainders fill the fence
  window); the `forecast` loop needs the forecast remainders of the W hours before
  each scored hour, so it runs over W + `--ref-hours` consecutive hours (one fit per
  hour) and is reported per hour it processed;
- flags: the replay's flags equal the reference loop's on every timed hour;
- memory: peak RSS of a replay of 1,000 series x 90 days x 4 metrics (target < 2 GB).

Usage: python tests/benchmarks/bench_replay.py [--series 100] [--days 90] [--ref-hours 60]
       [--runs 3] [--memory-series 1000] [--skip-memory] [--skip-robust]
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import sys
import time

import numpy as np
import pandas as pd
from statsmodels.tsa.seasonal import STL

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from calibrate.decompose import fence_scores  # noqa: E402
from calibrate.executors import LocalExecutor  # noqa: E402
from calibrate.history import History, LevelSeries  # noqa: E402
from calibrate.replay import Replayer  # noqa: E402
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
    L, W, k, P = s.decomposition_window_hours, s.fence_window_hours, s.fence_multiplier, \
        s.period_hours
    rem = {}
    flags = []
    for t in range(first - W, first + n_hours):
        fit = STL(y[t - L : t], period=P, seasonal=s.seasonal_span, robust=s.robust).fit()
        rem[t] = y[t] - (fit.trend[L - 1] + fit.seasonal[L - P])
        if t >= first:
            q1, q3 = np.percentile([rem[i] for i in range(t - W, t)], [25, 75])
            flags.append(_score(rem[t], q1, q3) > k)
    return np.array(flags), W + n_hours


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _mode_line(args, s: DetectorSettings, hist: History, y_all, workers: int) -> None:
    """Time one configuration against its plain loop and print the line."""
    cfg = DetectorConfig(base=s)
    n = hist.n_hours
    L, W = s.decomposition_window_hours, s.fence_window_hours
    # warm up compilation and the smoother matrix on a tiny history
    Replayer(synthetic_history(2, 40, 1), progress=False).scores(cfg)
    ex = LocalExecutor(workers)
    rp = Replayer(hist, executor=ex, progress=False)
    t0 = time.perf_counter()
    scores = rp.scores(cfg)[("series", "m0")]
    cold = time.perf_counter() - t0
    warm = []
    for _ in range(args.runs):
        rp.cache.clear()  # same workers, now warm: the cost of each refit in a search
        t0 = time.perf_counter()
        scores = rp.scores(cfg)[("series", "m0")]
        warm.append(time.perf_counter() - t0)
    ex.close()
    ours = float(np.median(warm))
    # replayed hours (each one fit in the plain loop): from L - 1 in-fit, from L forecast
    first = L - 1 if s.expected_value == "fit" else L
    series_hours = args.series * (n - first)
    per_ours = ours / series_hours
    rng = np.random.default_rng(1)
    per_ref_runs, ref_count, agree = [], 0, True
    for _ in range(args.runs):
        ref_time, count = 0.0, 0
        for i in range(args.ref_series):
            score = fence_scores(scores.remainder[i], scores.q1[i], scores.q3[i], "both")
            if s.expected_value == "fit":
                hrs = np.sort(rng.choice(np.arange(L - 1, n), args.ref_hours, replace=False))
                t0 = time.perf_counter()
                ref_flags = reference_hours(y_all[i], s, hrs)
                ref_time += time.perf_counter() - t0
                count += len(hrs)
            else:
                start = int(rng.integers(L + W, n - args.ref_hours))
                hrs = np.arange(start, start + args.ref_hours)
                t0 = time.perf_counter()
                ref_flags, processed = reference_forecast(y_all[i], s, start, args.ref_hours)
                ref_time += time.perf_counter() - t0
                count += processed
            agree &= bool(np.array_equal(np.nan_to_num(score[hrs], nan=-1) > 3.0, ref_flags))
        per_ref_runs.append(ref_time / count)
        ref_count = count
    per_ref = float(np.median(per_ref_runs))
    label = "robust" if s.robust else "non-robust"
    print(f"replay {label}, expected_value = {s.expected_value}: {args.series} series x "
          f"{args.days} days, window 672, hourly refit, {workers} workers: {ours:.2f} s warm "
          f"(median of {args.runs}: {', '.join(f'{x:.2f}' for x in warm)}; {cold:.2f} s with "
          f"worker start-up) = {per_ours * 1e6:.1f} us per series-hour; reference loop "
          f"{per_ref * 1e3:.2f} ms per series-hour (median of {args.runs} runs of {ref_count} "
          f"hours); ratio {per_ref / per_ours:.0f}x (target "
          f"{'200' if not s.robust else '40'}x), with start-up "
          f"{per_ref * series_hours / cold:.0f}x; flags identical: {agree}", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=100)
    ap.add_argument("--days", type=int, default=90)
    ap.add_argument("--ref-series", type=int, default=2)
    ap.add_argument("--ref-hours", type=int, default=60)
    ap.add_argument("--memory-series", type=int, default=1000)
    ap.add_argument("--skip-memory", action="store_true")
    ap.add_argument("--skip-robust", action="store_true")
    ap.add_argument("--runs", type=int, default=3, help="timed runs per side (median)")
    args = ap.parse_args()
    print(f"machine: {platform.platform()}, {os.cpu_count()} cores, python "
          f"{platform.python_version()}")
    hist = synthetic_history(args.series, args.days, 1)
    y_all = hist.levels["series"].values["m0"]
    workers = os.cpu_count() or 1
    for robust in (False,) if args.skip_robust else (False, True):
        for mode in ("fit", "forecast"):
            s = DetectorSettings(decomposition_window_hours=672, fence_window_hours=168,
                                 fence_multiplier=3.0, robust=robust, expected_value=mode)
            _mode_line(args, s, hist, y_all, workers)
    if not args.skip_memory:
        before = peak_rss_mb()
        big = synthetic_history(args.memory_series, args.days, 4, seed=2)
        s = DetectorSettings(decomposition_window_hours=336, fence_window_hours=168)
        ex = LocalExecutor(workers)
        rp = Replayer(big, executor=ex, progress=False)
        t0 = time.perf_counter()
        result = rp.replay(DetectorConfig(base=s))
        took = time.perf_counter() - t0
        ex.close()
        import psutil

        children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        print(f"memory: replay of {args.memory_series} series x {args.days} days x 4 metrics "
              f"({took:.1f} s, {len(result.episodes)} alerts): peak RSS of this process "
              f"{peak_rss_mb():.0f} MB (before: {before:.0f} MB), largest worker {children:.0f} MB"
              f" (target < 2048 MB); now {psutil.Process().memory_info().rss / 2**20:.0f} MB")


if __name__ == "__main__":
    main()
