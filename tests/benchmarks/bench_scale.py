"""Replay throughput and peak memory of the local and Dask engines on one machine.

No reference: every figure is throughput (series-hours per second per core) or memory,
never "x faster". An invented in-memory history (one level, 4 metrics, daily cycle,
noise, a few spikes; default 300 series x 90 days, `--series 1000` for the README's
size) is replayed with decomposition window 672 (non-robust, hourly refit) and fence
window 168, with the local engine (`LocalExecutor`, forkserver processes) and the Dask
engine (a `LocalCluster` of single-threaded worker processes, loopback only, no
dashboard), each on `--workers` cores (default 2).

Each run starts the engine anew and replays twice on one `Replayer`: "cold" (worker
start, shipping the history, each worker building the 672-hour smoother matrix) and
"warm" (the cache cleared, the same workers and shipped history: what every further
search trial that refits costs). A series-hour is one replayed hour (t >= window - 1)
of one series and metric. Series-hours per CPU-second (user + system time of this
process and its children) is printed too: it is less sensitive to other load on a
shared machine. Peak memory is the largest sum of RSS of this process and all its
children during the run (sampled every 50 ms; shared pages counted once per process).
Every figure is the median and range over `--runs` runs (at least 3). The two engines'
per-hour scores are compared for equality.

    python tests/benchmarks/bench_scale.py [--runs 3] [--series 300] [--days 90]
        [--workers 2] [--engines local,dask]
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time

import numpy as np
import pandas as pd
import psutil

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from _repeat import PeakRSS, add_runs_flag, repeat_many, spread  # noqa: E402

from calibrate.engine.executors import DaskExecutor, Executor, LocalExecutor  # noqa: E402
from calibrate.engine.replay import Replayer  # noqa: E402
from calibrate.inputs.history import History, LevelSeries  # noqa: E402
from calibrate.settings import DetectorConfig, DetectorSettings  # noqa: E402

METRICS = 4


def synthetic_history(n_series: int, days: int, seed: int = 0) -> History:
    """Invented hourly counts: daily cycle, multiplicative noise, rare spikes."""
    rng = np.random.default_rng(seed)
    n = days * 24
    t = np.arange(n)
    hours = pd.date_range("2026-01-05", periods=n, freq="h", tz="UTC")
    values = {}
    for m in range(METRICS):
        scale = rng.uniform(20, 5000, size=(n_series, 1))
        phase = rng.integers(0, 24, size=(n_series, 1))
        day = 1 + 0.5 * np.sin(2 * np.pi * (t[None, :] - phase) / 24)
        y = scale * day * (1 + 0.08 * rng.standard_normal((n_series, n)))
        y[rng.random((n_series, n)) < 0.002] *= 3
        values[f"m{m}"] = np.maximum(np.round(y), 0.0)
    keys = pd.DataFrame({"series": [f"s{i:06d}" for i in range(n_series)]})
    level = LevelSeries("series", ("series",), keys, values)
    return History(hours=hours, levels={"series": level}, key_columns=("series",))


def cpu_seconds() -> float:
    """User + system CPU seconds of this process and its live children."""
    me = psutil.Process()
    total = sum(me.cpu_times()[:2])
    for child in me.children(recursive=True):
        try:
            total += sum(child.cpu_times()[:2])
        except psutil.Error:
            pass
    return total


def run_engine(name: str, make: callable, hist: History, cfg: DetectorConfig, cores: int,
               runs: int):
    """`runs` runs of one engine (each: start, cold and warm replay, close); prints its
    figures and returns the last run's scores."""
    L = cfg.base.decomposition_window_hours
    n_series = hist.levels["series"].n_series
    series_hours = n_series * METRICS * (hist.n_hours - (L - 1))
    out = {}

    def run() -> dict[str, float]:
        figures = {}
        with PeakRSS() as mem:
            t0 = time.perf_counter()
            ex: Executor = make()
            figures["start"] = time.perf_counter() - t0
            try:
                rp = Replayer(hist, executor=ex, progress=False)
                for label in ("cold", "warm"):
                    rp.cache.clear()
                    c0, t0 = cpu_seconds(), time.perf_counter()
                    out["scores"] = rp.scores(cfg)
                    figures[label] = time.perf_counter() - t0
                    figures[f"{label} cpu"] = cpu_seconds() - c0
            finally:
                ex.close()
        figures["peak"] = mem.total_peak
        return figures

    r = repeat_many(run, runs)
    print(f"{name} ({series_hours:,} series-hours per replay, {cores} cores):")
    for label in ("cold", "warm"):
        rate = [series_hours / t / cores for t in r[label]]
        cpu = [series_hours / c for c in r[f"{label} cpu"]]
        print(f"  {label}: {spread(r[label]).fmt('.2f', 's')}")
        print(f"    throughput {spread(rate).fmt(',.0f', 'series-hours/s/core')}")
        print(f"    {spread(cpu).fmt(',.0f', 'series-hours per CPU-second')}")
    print(f"  engine start: {spread(r['start']).fmt('.1f', 's')}")
    print(f"  peak RSS (this process + children): "
          f"{spread(r['peak']).fmt(',.0f', 'MB', 1 / 2**20)}")
    return out["scores"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(ap)
    ap.add_argument("--series", type=int, default=300)
    ap.add_argument("--days", type=int, default=90)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--engines", default="local,dask")
    args = ap.parse_args()
    print(f"machine: {platform.platform()}, {os.cpu_count()} cores, "
          f"{psutil.virtual_memory().total / 2**30:.0f} GB, python {platform.python_version()}")
    s = DetectorSettings(decomposition_window_hours=672, fence_window_hours=168,
                         fence_multiplier=3.0, robust=False, refit_every_hours=1)
    cfg = DetectorConfig(base=s)
    hist = synthetic_history(args.series, args.days)
    print(f"history: {args.series} series x {args.days} days x {METRICS} metrics "
          f"({sum(a.nbytes for a in hist.levels['series'].values.values()) / 2**20:.0f} MB);"
          f" window 672 non-robust, hourly refit, fence window 168; {args.workers} workers")
    w = args.workers
    engines = {
        "local": lambda: LocalExecutor(w),
        "dask": lambda: DaskExecutor(None, w),
    }
    results = {}
    for name in args.engines.split(","):
        results[name] = run_engine(name, engines[name], hist, cfg, w, args.runs)
    if len(results) == 2:
        a, b = results.values()
        same = all(
            np.array_equal(getattr(a[k], f), getattr(b[k], f), equal_nan=True)
            for k in a
            for f in ("expected", "remainder", "q1", "q3", "score")
        )
        print(f"per-hour scores identical across engines (last run of each): {same}")


if __name__ == "__main__":
    main()
