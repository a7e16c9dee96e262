"""Benchmark: load + roll up a 1,000-series x 90-day hourly history (2.16 M rows).

No reference: figures are load time, rows loaded per second (throughput, one process)
and peak memory, checked against 1.5 GB. Generates a synthetic Parquet file (4
measures, 4 key columns, ~1% of rows dropped as gaps) in a temporary folder, then loads
it with `load_history` in a fresh Python process, `--runs` times (at least 3), and prints
the median and range of each process's wall time and peak RSS (VmHWM).

    python tests/benchmarks/bench_history.py [--runs 3] [--days 90] [--csv]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np
import pandas as pd
import psutil
from _repeat import add_runs_flag, spread

ROOT = Path(__file__).resolve().parents[2]
LIMIT_MB = 1500

WORKSPACE = """
[history]
path = "{file}"
time_column = "hour"
key_columns = ["market", "advertiser", "campaign", "device"]

[measures]
impressions = "zero"
clicks = "zero"
spend = "interpolate"
revenue = "interpolate"

[metrics]
ctr = "clicks / impressions"
margin = "revenue - spend"
margin_rate = "(revenue - spend) / revenue"

[levels]
market = ["market"]
advertiser = ["market", "advertiser"]
campaign = ["market", "advertiser", "campaign"]
device = ["market", "advertiser", "campaign", "device"]
"""


def generate(folder: Path, csv: bool, days: int) -> Path:
    """Write the synthetic history; returns the workspace file."""
    rng = np.random.default_rng(7)
    markets, advertisers, campaigns, devices = 5, 10, 5, 4  # 1,000 series
    n_series = markets * advertisers * campaigns * devices
    n_hours = days * 24
    s = np.repeat(np.arange(n_series), n_hours)
    h = np.tile(np.arange(n_hours), n_series)
    keep = rng.random(len(s)) > 0.01
    s, h = s[keep], h[keep]
    dev = s % devices
    camp = (s // devices) % campaigns
    adv = (s // (devices * campaigns)) % advertisers
    mkt = s // (devices * campaigns * advertisers)
    daily = 1.0 + 0.5 * np.sin(2 * np.pi * (h % 24) / 24)
    impressions = rng.poisson(200 * daily).astype(np.float64)
    clicks = rng.binomial(impressions.astype(np.int64), 0.02).astype(np.float64)
    spend = np.round(clicks * 0.4, 2)
    revenue = np.round(clicks * 0.55, 2)
    frame = pd.DataFrame(
        {
            "hour": pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(h, unit="h"),
            "market": pd.Categorical(np.char.add("m", mkt.astype(str))),
            "advertiser": pd.Categorical(np.char.add("a", adv.astype(str))),
            "campaign": pd.Categorical(np.char.add("c", camp.astype(str))),
            "device": pd.Categorical(np.array(["desktop", "phone", "tablet", "tv"])[dev]),
            "impressions": impressions,
            "clicks": clicks,
            "spend": spend,
            "revenue": revenue,
        }
    ).sample(frac=1.0, random_state=1)  # rows in no particular order
    file = folder / ("history.csv" if csv else "history.parquet")
    if csv:
        frame.to_csv(file, index=False)
    else:
        frame.to_parquet(file, index=False)
    ws = folder / "workspace.toml"
    ws.write_text(WORKSPACE.format(file=file.name), encoding="utf-8")
    print(f"generated {len(frame):,} rows, {n_series} series, {n_hours} hours -> {file.name}")
    return ws


def peak_rss_mb() -> float:
    """Peak RSS of this process: VmHWM where /proc exists, else ru_maxrss (KiB on Linux)."""
    status = Path("/proc/self/status")
    if status.exists():
        for line in status.read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def load(workspace: str) -> None:
    """Child process: load and report its peak RSS and wall time."""
    sys.path.insert(0, str(ROOT))
    from calibrate.inputs.history import load_history
    from calibrate.inputs.workspace import load_workspace

    t0 = time.perf_counter()
    history = load_history(load_workspace(workspace))
    elapsed = time.perf_counter() - t0
    peak_mb = peak_rss_mb()
    rss_now = psutil.Process().memory_info().rss / 2**20
    sizes = ", ".join(f"{k} {v.n_series}" for k, v in history.levels.items())
    filled = int(history.filled[["impressions"]].to_numpy().sum())
    print(json.dumps({"rows": history.n_rows, "hours": history.n_hours, "sizes": sizes,
                      "filled": filled, "seconds": elapsed, "peak_mb": peak_mb,
                      "rss_mb": rss_now}))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(parser)
    parser.add_argument("--days", type=int, default=90, help="days of history (default 90)")
    parser.add_argument("--csv", action="store_true", help="benchmark the CSV route instead")
    parser.add_argument("--load", help=argparse.SUPPRESS)
    parser.add_argument("--generate", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.load:
        load(args.load)
        return
    if args.generate:
        generate(Path(args.generate), args.csv, args.days)
        return
    # generate and load in separate processes, so each loader's peak is its own
    with tempfile.TemporaryDirectory() as tmp:
        flags = ["--csv"] if args.csv else []
        subprocess.run([sys.executable, __file__, "--generate", tmp, "--days", str(args.days),
                        *flags], check=True)
        ws = Path(tmp) / "workspace.toml"
        runs = []
        for _ in range(args.runs):
            done = subprocess.run([sys.executable, __file__, "--load", str(ws)], check=True,
                                  capture_output=True, text=True)
            runs.append(json.loads(done.stdout.strip().splitlines()[-1]))
    first = runs[0]
    print(f"loaded {first['rows']:,} rows x {first['hours']} hours; series: {first['sizes']}; "
          f"filled impressions hours: {first['filled']:,}")
    print(f"{'CSV' if args.csv else 'Parquet'} load, one fresh process per run:")
    print(f"  load time: {spread([r['seconds'] for r in runs]).fmt('.2f', 's')}")
    print(f"  throughput: {spread([r['rows'] / r['seconds'] for r in runs]).fmt(',.0f', 'rows/s')}")
    peak = spread([r["peak_mb"] for r in runs])
    print(f"  peak RSS: {peak.fmt(',.0f', 'MB')} (limit {LIMIT_MB:,} MB)")
    print(f"  RSS after load: {spread([r['rss_mb'] for r in runs]).fmt(',.0f', 'MB')}")
    sys.exit(0 if peak.high < LIMIT_MB else 1)

if __name__ == "__main__":
    main()
