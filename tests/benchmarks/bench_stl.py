"""Benchmark: compiled STL kernel versus statsmodels' STL in the same process.

Run ``python tests/benchmarks/bench_stl.py``. Prints per-fit times (best of several
repeats, after compilation) and the ratio statsmodels / kernel; also checks the results
agree so the speed is not bought with wrong answers.
"""

from __future__ import annotations

import os
import platform
import sys
import time
from collections.abc import Callable

import numpy as np
from statsmodels.tsa.seasonal import MSTL, STL

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", ".."))

from calibrate.stl_kernel import (  # noqa: E402
    linear_smoother,
    mstl_fit,
    stl_fit,
    stl_fit_windows,
)


def _per_call(fn: Callable[[], object], min_time: float = 0.3, repeats: int = 5) -> float:
    """Best mean seconds per call over `repeats` runs of at least `min_time` each."""
    fn()
    loops = 1
    while True:
        t0 = time.perf_counter()
        for _ in range(loops):
            fn()
        if time.perf_counter() - t0 >= min_time / repeats:
            break
        loops *= 2
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(loops):
            fn()
        best = min(best, (time.perf_counter() - t0) / loops)
    return best


def _series(n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    return rng.poisson(200 + 80 * np.sin(2 * np.pi * t / 24)).astype(float)


def main() -> None:
    print(f"machine: {platform.platform()} | {platform.processor() or platform.machine()} "
          f"| cpu_count={os.cpu_count()} | python {platform.python_version()}")
    try:
        import numba
        print(f"numba {numba.__version__}, threads={numba.get_num_threads()}, "
              f"threading layer at first parallel call")
    except ImportError:  # pragma: no cover
        pass
    print("\nsingle fit, period 24, seasonal 7 (statsmodels vs kernel, 1 thread)")
    print("kernel = default (prepared weights reused, same bits); blocked = previous "
          "four-point kernel (reuse_weights=False)")
    print(f"{'n':>5} {'robust':>6} {'statsmodels':>12} {'kernel':>10} {'ratio':>7} "
          f"{'blocked':>10} {'ratio':>7} {'plain port':>11} {'ratio':>7}  max|diff|")
    for n in (168, 336, 672):
        y = _series(n)
        for robust in (False, True):
            t_ref = _per_call(lambda y=y, r=robust: STL(y, period=24, seasonal=7,
                                                         robust=r).fit())
            t_k = _per_call(lambda y=y, r=robust: stl_fit(y, 24, 7, robust=r))
            t_b = _per_call(lambda y=y, r=robust: stl_fit(y, 24, 7, robust=r,
                                                           reuse_weights=False))
            t_p = _per_call(lambda y=y, r=robust: stl_fit(y, 24, 7, robust=r,
                                                           blocked=False,
                                                           reuse_weights=False))
            ref = STL(y, period=24, seasonal=7, robust=robust).fit()
            tr, se, _ = stl_fit(y, 24, 7, robust=robust)
            diff = max(np.abs(tr - ref.trend).max(), np.abs(se - ref.seasonal).max())
            print(f"{n:>5} {robust!s:>6} {t_ref * 1e3:>10.3f}ms {t_k * 1e3:>8.3f}ms "
                  f"{t_ref / t_k:>6.1f}x {t_b * 1e3:>8.3f}ms {t_ref / t_b:>6.1f}x "
                  f"{t_p * 1e3:>9.3f}ms {t_ref / t_p:>6.1f}x  {diff:.1e}")

    print("\nbatched stl_fit_windows (all threads), 200 consecutive windows")
    y = _series(2000, seed=1)
    for window in (168, 336, 672):
        ends = np.arange(window - 1, window - 1 + 200, dtype=np.int64)
        for robust in (False, True):
            t_b = _per_call(lambda w=window, e=ends, r=robust:
                            stl_fit_windows(y, e, w, 24, 7, 0, 0, r), repeats=3)
            seg = y[ends[0] - window + 1 : ends[0] + 1]
            t_ref = _per_call(lambda s=seg, r=robust: STL(s, period=24, seasonal=7,
                                                           robust=r).fit(), repeats=3)
            per = t_b / len(ends)
            print(f"  window {window:>3} robust={robust!s:>5}: {per * 1e6:8.1f} us/fit, "
                  f"{t_ref / per:6.1f}x statsmodels")

    print("\nMSTL periods (24, 168), 672 points")
    y = _series(672, seed=2)
    for robust in (False, True):
        t_ref = _per_call(lambda r=robust: MSTL(y, periods=(24, 168),
                                                stl_kwargs={"robust": r}).fit(), repeats=3)
        t_k = _per_call(lambda r=robust: mstl_fit(y, (24, 168), robust=r), repeats=3)
        print(f"  robust={robust!s:>5}: statsmodels {t_ref * 1e3:.2f}ms, kernel "
              f"{t_k * 1e3:.3f}ms, {t_ref / t_k:.1f}x")

    print("\nlinear_smoother build (one-off, cached afterwards)")
    for window in (168, 336, 672):
        t0 = time.perf_counter()
        linear_smoother(window, 24, 7)
        print(f"  window {window}: {time.perf_counter() - t0:.3f}s")


if __name__ == "__main__":
    main()
