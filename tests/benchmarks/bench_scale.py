"""Replay throughput and peak memory of the local and Dask engines on one machine.

An invented in-memory history (one level, 4 metrics, daily cycle, noise, a few
spikes; default 1,000 series x 90 days) is replayed with decomposition window 672
(non-robust, hourly refit) and fence window 168, first with the local engine
(`LocalExecutor`, forkserver processes) and then with the Dask engine (a
`LocalCluster` of single-threaded worker processes, loopback only, no dashboard).

Each engine is timed twice on the same `Replayer`: "cold" (first run: worker start,
shipping the history, each worker building the 672-hour smoother matrix) and "warm"
(the cache cleared, the same workers and shipped history: what every further
search trial that refits costs). Throughput is series-hours per second per core,
where a series-hour is one replayed hour (t >= window - 1) of one series and metric.
Peak memory is the largest sum of RSS of this process and all its children
(sampled every 50 ms with psutil; shared pages are counted once per process).
Series-hours per CPU-second (user + system time of this process and its children)
is printed too: it is less sensitive to other load on a shared machine.
The two engines' per-hour scores are compared for equality.

Usage: python tests/benchmarks/bench_scale.py [--series 1000] [--days 90]
       [--workers 2] [--engines local,dask]
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import threading
import time

import numpy as np
import pandas as pd
import psutil

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from calibrate.executors import DaskExecutor, Executor, LocalExecutor  # noqa: E402
from calibrate.history import History, LevelSeries  # noqa: E402
from calibrate.replay import Replayer  # noqa: E402
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


class PeakRSS:
    """Samples the summed RSS of this process and its children in a thread."""

    def __init__(self, every: float = 0.05):
        self.every = every
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    @staticmethod
    def now() -> int:
        me = psutil.Process()
        total = me.memory_info().rss
        for child in me.children(recursive=True):
            try:
                total += child.memory_info().rss
            except psutil.Error:
                pass
        return total

    def _loop(self) -> None:
        while not self._stop.is_set():
            self.peak = max(self.peak, self.now())
            time.sleep(self.every)

    def __enter__(self) -> PeakRSS:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self.now())


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


def run_engine(name: str, make: callable, hist: History, cfg: DetectorConfig, cores: int):
    """Cold and warm replay with one engine; returns its scores and prints its figures."""
    L = cfg.base.decomposition_window_hours
    n_series = hist.levels["series"].n_series
    series_hours = n_series * METRICS * (hist.n_hours - (L - 1))
    with PeakRSS() as mem:
        t0 = time.perf_counter()
        ex: Executor = make()
        start = time.perf_counter() - t0
        try:
            rp = Replayer(hist, executor=ex, progress=False)
            timings = []
            for _ in ("cold", "warm"):
                rp.cache.clear()
                c0, t0 = cpu_seconds(), time.perf_counter()
                scores = rp.scores(cfg)
                timings.append((time.perf_counter() - t0, cpu_seconds() - c0))
        finally:
            ex.close()
    for label, (took, cpu) in zip(("cold", "warm"), timings, strict=True):
        rate = series_hours / took / cores
        print(f"{name:>5} {label}: {took:7.1f} s  {rate:9,.0f} series-hours/s/core"
              f"  ({series_hours:,} series-hours on {cores} cores);"
              f" {series_hours / cpu:9,.0f} series-hours per CPU-second")
    print(f"{name:>5}: engine start {start:.1f} s, peak RSS (this process + children)"
          f" {mem.peak / 2**20:,.0f} MB")
    return scores


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=1000)
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
        results[name] = run_engine(name, engines[name], hist, cfg, w)
    if len(results) == 2:
        a, b = results.values()
        same = all(
            np.array_equal(getattr(a[k], f), getattr(b[k], f), equal_nan=True)
            for k in a
            for f in ("expected", "remainder", "q1", "q3", "score")
        )
        print(f"per-hour scores identical across engines: {same}")


if __name__ == "__main__":
    main()
