"""Benchmark: peak memory of the per-hour scores export (`calibrate replay --scores`).

Builds the per-hour results of a replay of a synthetic history (random values in the
shape a replay gives: N base series plus one market level, 90 days, 4 metrics, NaN
during a 28-day warm-up) without replaying, then writes the Parquet export twice in
this process: streamed block by block (`write_table_blocks(result.score_blocks())`,
what the CLI does) and, as the reference, the whole table built in memory first
(`write_table(result.scores_frame())`, what the CLI did before). For each it prints
the peak resident memory above the level before it started and its time, as the median
and range over `--runs` runs (at least 3; the two alternate within each run, same
process, same core), the per-run ratio whole / streamed of the peaks, and checks that
both files hold the same rows. No speed claim: the reference is for memory.

The peak is the kernel's high-water mark (VmHWM, reset through /proc/self/clear_refs
before each run) where Linux allows it, else the largest of 5 ms samples.

    python tests/benchmarks/bench_scores_export.py [--series 500] [--runs 3]

(the README's row: `--series 1000`).
"""

from __future__ import annotations

import argparse
import gc
import sys
import tempfile
import threading
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import psutil
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _repeat import add_runs_flag, ratios, spread  # noqa: E402

from calibrate.engine.replay import MetricScores, ReplayResult  # noqa: E402
from calibrate.outputs import write_table, write_table_blocks  # noqa: E402
from calibrate.settings import DetectorSettings  # noqa: E402

METRICS = ("impressions", "clicks", "ctr", "spend")
DAYS = 90
WARM_UP = 28 * 24


def synthetic_result(n_series: int, seed: int = 3) -> ReplayResult:
    """A ReplayResult whose arrays have a replay's shapes (values are random)."""
    rng = np.random.default_rng(seed)
    n_hours = DAYS * 24
    hours = pd.date_range("2026-01-05", periods=n_hours, freq="h", tz="UTC")
    n_markets = 10
    markets = np.array([f"m{i % n_markets}" for i in range(n_series)], dtype=object)
    campaigns = np.array([f"c{i:05d}" for i in range(n_series)], dtype=object)
    levels = {
        "market": SimpleNamespace(
            keys=pd.DataFrame({"market": [f"m{i}" for i in range(n_markets)]}),
            key_columns=("market",), n_series=n_markets),
        "campaign": SimpleNamespace(
            keys=pd.DataFrame({"market": markets, "campaign": campaigns}),
            key_columns=("market", "campaign"), n_series=n_series),
    }
    history = SimpleNamespace(levels=levels, key_columns=("market", "campaign"), hours=hours,
                              n_hours=n_hours)
    settings = DetectorSettings(decomposition_window_hours=WARM_UP + 1)
    scores = {}
    for level, ls in levels.items():
        for metric in METRICS:
            shape = (ls.n_series, n_hours)
            value = rng.gamma(5.0, 20.0, shape)
            expected = value + rng.normal(0, 3.0, shape)
            expected[:, :WARM_UP] = np.nan
            remainder = value - expected
            q1 = np.where(np.isnan(expected), np.nan, -2.0)
            q3 = np.where(np.isnan(expected), np.nan, 2.0)
            score = np.abs(remainder) / 4.0
            flat = np.zeros(shape, dtype=bool)
            scores[(level, metric)] = MetricScores(level, metric, settings, value, expected,
                                                   score, flat, remainder=remainder, q1=q1,
                                                   q3=q3)
    return ReplayResult(history, None, scores, None)


def _clear_refs() -> bool:
    """Reset this process's VmHWM (Linux 4.0+); False where that is not possible."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _hwm() -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    raise OSError("no VmHWM")


def peak_above_start(work) -> tuple[float, float]:
    """(peak RSS above the RSS before `work` in MB, seconds) for one call of `work`."""
    gc.collect()
    proc = psutil.Process()
    start = proc.memory_info().rss
    exact = _clear_refs()
    peak = [start]
    stop = threading.Event()

    def sample() -> None:
        while not stop.is_set():
            peak[0] = max(peak[0], proc.memory_info().rss)
            time.sleep(0.005)

    sampler = None if exact else threading.Thread(target=sample, daemon=True)
    if sampler:
        sampler.start()
    t0 = time.perf_counter()
    work()
    took = time.perf_counter() - t0
    if sampler:
        stop.set()
        sampler.join()
    top = _hwm() if exact else peak[0]
    return (top - start) / 2**20, took


def same_rows(a: Path, b: Path) -> bool:
    fa, fb = pq.ParquetFile(a), pq.ParquetFile(b)
    if fa.metadata.num_rows != fb.metadata.num_rows or fa.schema_arrow != fb.schema_arrow:
        return False
    return all(x.equals(y) for x, y in zip(fa.iter_batches(batch_size=200_000),
                                           fb.iter_batches(batch_size=200_000), strict=True))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=500, help="base series (default: 500)")
    add_runs_flag(ap)
    args = ap.parse_args()
    result = synthetic_result(args.series)
    n_rows = sum(int((~np.isnan(ms.expected)).sum()) for ms in result.scores.values())
    arrays = sum(a.nbytes for ms in result.scores.values()
                 for a in (ms.value, ms.expected, ms.remainder, ms.q1, ms.q3, ms.score))
    print(f"{args.series} base series + 10 markets x {DAYS} days x {len(METRICS)} metrics: "
          f"{n_rows:,} rows to export; the replay's arrays hold {arrays / 2**20:.0f} MB")
    how = "VmHWM, reset before each run" if _clear_refs() else "5 ms RSS samples"
    print(f"peak measured as {how}")
    runs: dict[str, list[tuple[float, float]]] = {"streamed": [], "whole frame": []}
    with tempfile.TemporaryDirectory() as tmp:
        streamed, whole = Path(tmp) / "streamed.parquet", Path(tmp) / "whole.parquet"
        for _ in range(args.runs):
            runs["streamed"].append(peak_above_start(
                lambda: write_table_blocks(streamed, result.score_blocks(), force=True)))
            runs["whole frame"].append(peak_above_start(
                lambda: write_table(whole, result.scores_frame(), force=True)))
        equal = same_rows(streamed, whole)
        sizes = streamed.stat().st_size / 2**20, whole.stat().st_size / 2**20
    for name, got in runs.items():
        mb, secs = [m for m, _ in got], [t for _, t in got]
        print(f"{name:>12}: peak RSS above start {spread(mb).fmt(',.0f', 'MB')}; time "
              f"{spread(secs).fmt('.1f', 's')}")
    peaks = {name: [m for m, _ in got] for name, got in runs.items()}
    print(f"peak whole frame / streamed, per run: "
          f"{spread(ratios(peaks['whole frame'], peaks['streamed'])).fmt('.1f', 'x')}")
    print(f"files: {sizes[0]:.0f} MB streamed, {sizes[1]:.0f} MB whole; same rows: {equal}")
    return 0 if equal else 1


if __name__ == "__main__":
    sys.exit(main())
