"""Benchmark: compiled STL kernel versus statsmodels' STL, same process, one core each.

Compares, on invented hourly counts (period 24, seasonal span 7):

- one fit: `stl.stl_fit` versus `statsmodels.tsa.seasonal.STL(...).fit()`, for
  168, 336 and 672 points, non-robust and robust;
- a batch of 200 consecutive windows: `stl_fit_windows` versus one statsmodels fit per
  window;
- MSTL with periods (24, 168) on 672 points: `stl.mstl_fit` versus statsmodels'
  `MSTL`.

Cores: every ratio is measured with numba and BLAS limited to one thread, so both sides
run on one core (the kernels have no parallel loops: the replay's workers are one
process per core). After compilation, each run times both sides
back to back (each call repeated for at least `--min-time` seconds); every figure is the
median and range over `--runs` runs (at least 3), and each ratio is computed per run.
The kernel's results are checked against statsmodels' so the speed is not bought with
wrong answers (largest absolute difference printed).

    python tests/benchmarks/bench_stl.py [--runs 3] [--sizes 168 336 672] [--variants]

`--variants` also times the previous kernels (prepared weights not reused; the plain
port without the blocked loop).
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from collections.abc import Callable

import numba
import numpy as np
from statsmodels.tsa.seasonal import MSTL, STL
from threadpoolctl import threadpool_limits

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from _repeat import add_runs_flag, ratios, repeat, repeat_many, spread  # noqa: E402

from calibrate.decomposition.smoother import _smoother, linear_smoother  # noqa: E402
from calibrate.decomposition.stl import mstl_fit, stl_fit, stl_fit_windows  # noqa: E402


def per_call(fn: Callable[[], object], min_time: float) -> float:
    """Mean seconds per call over a loop of at least `min_time` seconds (one run)."""
    loops, t = 1, 0.0
    while True:
        t0 = time.perf_counter()
        for _ in range(loops):
            fn()
        t = time.perf_counter() - t0
        if t >= min_time:
            return t / loops
        loops = max(loops * 2, int(loops * min_time / max(t, 1e-9)) + 1)


def _series(n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    return rng.poisson(200 + 80 * np.sin(2 * np.pi * t / 24)).astype(float)


def compare(name: str, ref: Callable[[], object], ours: dict[str, Callable[[], object]],
            runs: int, min_time: float, fits: int = 1) -> None:
    """Time the reference (one fit per call) and each of `ours` (`fits` fits per call) in
    every run; print per-fit medians and ranges and per-run ratios (reference / ours)."""
    ref()
    for fn in ours.values():
        fn()  # compile / warm
    t = repeat_many(lambda: {"ref": per_call(ref, min_time),
                             **{k: per_call(fn, min_time) / fits for k, fn in ours.items()}},
                    runs)
    print(f"{name}")
    print(f"    statsmodels per fit: {spread(t['ref']).fmt('.3f', 'ms', 1e3)}")
    for k in ours:
        print(f"    {k} per fit: {spread(t[k]).fmt('.3f', 'ms', 1e3)}; statsmodels / {k} "
              f"{spread(ratios(t['ref'], t[k])).fmt('.1f', 'x')}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(ap)
    ap.add_argument("--sizes", type=int, nargs="+", default=[168, 336, 672])
    ap.add_argument("--min-time", type=float, default=0.2,
                    help="seconds each side is looped for in one run (default 0.2)")
    ap.add_argument("--variants", action="store_true",
                    help="also time the previous kernels")
    args = ap.parse_args()
    all_threads = numba.get_num_threads()
    print(f"machine: {platform.platform()} | {platform.processor() or platform.machine()} "
          f"| cpu_count={os.cpu_count()} | python {platform.python_version()} | numba "
          f"{numba.__version__} ({all_threads} threads available)")
    runs, mt = args.runs, args.min_time
    with threadpool_limits(1):
        numba.set_num_threads(1)
        print("\none fit, period 24, seasonal 7; one core each side")
        for n in args.sizes:
            y = _series(n)
            for robust in (False, True):
                ours = {"kernel": lambda y=y, r=robust: stl_fit(y, 24, 7, robust=r)}
                if args.variants:
                    ours["previous kernel"] = lambda y=y, r=robust: stl_fit(
                        y, 24, 7, robust=r, reuse_weights=False)
                    ours["plain port"] = lambda y=y, r=robust: stl_fit(
                        y, 24, 7, robust=r, blocked=False, reuse_weights=False)
                compare(f"  {n} points, robust={robust}",
                        lambda y=y, r=robust: STL(y, period=24, seasonal=7, robust=r).fit(),
                        ours, runs, mt)
                fit = STL(y, period=24, seasonal=7, robust=robust).fit()
                tr, se, _ = stl_fit(y, 24, 7, robust=robust)
                diff = max(np.abs(tr - fit.trend).max(), np.abs(se - fit.seasonal).max())
                print(f"    max |kernel - statsmodels| (trend, seasonal): {diff:.1e}")

        print("\nbatch of 200 consecutive windows (stl_fit_windows), one core each side")
        y = _series(2000, seed=1)
        for window in args.sizes:
            ends = np.arange(window - 1, window - 1 + 200, dtype=np.int64)
            seg = y[ends[0] - window + 1: ends[0] + 1]
            for robust in (False, True):
                def batch(w: int = window, e: np.ndarray = ends, r: bool = robust,
                          y: np.ndarray = y) -> object:
                    return stl_fit_windows(y, e, w, 24, 7, 0, 0, r)

                compare(f"  window {window}, robust={robust}",
                        lambda s=seg, r=robust: STL(s, period=24, seasonal=7, robust=r).fit(),
                        {"batch": batch}, runs, mt, fits=len(ends))

        print("\nMSTL periods (24, 168), 672 points, one core each side")
        y = _series(672, seed=2)
        for robust in (False, True):
            compare(f"  robust={robust}",
                    lambda r=robust: MSTL(y, periods=(24, 168), stl_kwargs={"robust": r}).fit(),
                    {"kernel": lambda r=robust: mstl_fit(y, (24, 168), robust=r)}, runs, mt)

    numba.set_num_threads(all_threads)
    print("\nlinear_smoother build (one-off per window, cached afterwards)")
    for window in args.sizes:
        def build(w: int = window) -> float:
            _smoother.cache_clear()  # time the build, not the cache
            t0 = time.perf_counter()
            linear_smoother(w, 24, 7)
            return time.perf_counter() - t0

        build()  # compiles the kernels the build uses
        print(f"  window {window}: {repeat(build, runs).fmt('.3f', 's')}")

if __name__ == "__main__":
    main()
