"""Repeated measurements for the benchmark scripts: median and range over N runs.

Every figure a script prints comes from at least `RUNS` runs, as "median X (range A-B)
over N runs"; a ratio against an in-process reference is computed per run (the
reference and the measured code timed in the same run) and its runs summarised the
same way, so one quiet or busy moment cannot make the ratio.
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

RUNS = 3


@dataclass(frozen=True)
class Spread:
    """Median, lowest and highest of one figure's runs."""

    median: float
    low: float
    high: float
    n: int

    def fmt(self, spec: str = ".2f", unit: str = "", scale: float = 1.0) -> str:
        """'median X (range A-B) over N runs'; values are multiplied by `scale`."""
        u = f" {unit}" if unit and unit not in ("x", "%") else unit
        m, lo, hi = (format(v * scale, spec) for v in (self.median, self.low, self.high))
        return f"median {m}{u} (range {lo}-{hi}{u}) over {self.n} runs"


def spread(values: Sequence[float]) -> Spread:
    """The `Spread` of one figure's per-run values."""
    if not values:
        raise ValueError("no runs to summarise")
    vals = [float(v) for v in values]
    return Spread(statistics.median(vals), min(vals), max(vals), len(vals))


def repeat(fn: Callable[[], float], runs: int = RUNS) -> Spread:
    """Call `fn` `runs` times; the spread of the numbers it returns."""
    return spread([fn() for _ in range(runs)])


def repeat_many(fn: Callable[[], dict[str, float]], runs: int = RUNS) -> dict[str, list[float]]:
    """Call `fn` `runs` times; per name, the list of the values it returned (one per run),
    so figures measured in the same run (a reference and the code it is compared with)
    stay paired."""
    out: dict[str, list[float]] = {}
    for _ in range(runs):
        for name, value in fn().items():
            out.setdefault(name, []).append(float(value))
    return out


def ratios(num: Sequence[float], den: Sequence[float]) -> list[float]:
    """Per-run ratios num[i] / den[i] (the reference's time over the measured code's)."""
    if len(num) != len(den):
        raise ValueError("ratios need one value of each side per run")
    return [a / b for a, b in zip(num, den, strict=True)]


def timed(fn: Callable[[], Any]) -> tuple[float, Any]:
    """(wall seconds, result) of one call."""
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def add_runs_flag(parser: argparse.ArgumentParser) -> None:
    """`--runs N` (at least 3, default 3)."""

    def at_least_three(text: str) -> int:
        n = int(text)
        if n < RUNS:
            raise argparse.ArgumentTypeError(f"must be at least {RUNS}, got {n}")
        return n

    parser.add_argument("--runs", type=at_least_three, default=RUNS,
                        help=f"repeats of every measurement (at least {RUNS}; default {RUNS})")


class PeakRSS:
    """Peak resident memory while the `with` block runs, sampled every `every` seconds in
    a thread: of this process (`self_peak`), of its largest child process (`child_peak`)
    and of the sum of both and every other child (`total_peak`; pages shared between
    processes are counted once per process). Bytes."""

    def __init__(self, every: float = 0.05):
        import threading

        self.every = every
        self.self_peak = self.child_peak = self.total_peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def sample(self) -> None:
        import psutil

        me = psutil.Process()
        own = me.memory_info().rss
        children = []
        for child in me.children(recursive=True):
            try:
                children.append(child.memory_info().rss)
            except psutil.Error:
                pass
        self.self_peak = max(self.self_peak, own)
        self.child_peak = max(self.child_peak, max(children, default=0))
        self.total_peak = max(self.total_peak, own + sum(children))

    def _loop(self) -> None:
        while not self._stop.is_set():
            self.sample()
            time.sleep(self.every)

    def __enter__(self) -> PeakRSS:
        self.sample()
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self.sample()
