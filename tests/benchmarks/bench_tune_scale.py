"""Benchmark: `calibrate tune` at a real team's size, time and peak memory.

No reference: the figures are wall time, CPU time and peak memory of the tune, checked
against the targets of 10 minutes and 2 GB (all processes together) on 2 cores; never
"x faster".

The workspace is an invented scenario made with the sample's building blocks
(`calibrate.sample`: its daily profile, `Incident` records and incidents file, its
start hour and measures): `--series` campaigns (default 1,000) in 5 markets and
`--series / 10` advertisers, `--days` days of hours (default 90), four measures
(impressions, clicks, spend, revenue) and four watched metrics (impressions, clicks,
spend, click-through rate) at the market, advertiser and campaign levels (1,000
campaigns give 1,105 series, 4,420 series-metrics). Market-local daily cycles,
weekends, AR(1) noise, lasting budget changes, a few missing rows per series, and one
labelled incident per 10 campaigns (spikes, drops, outages, click-tracking breaks,
spend spikes, click-through collapses; none in the first 4 weeks) at the three levels.
Owners route the markets and some advertisers to 4 teams with 4-8 analysts each, and
the goal gives every team its own alert budget (one some setting meets). The
`[search]` space is the sample's (fit or forecast, two decomposition windows, three
seasonal spans, four fence windows, three flatline lengths); the fence multiplier and
each metric's minimum impact are solved as in every tune.

The workspace is written once to a temporary folder (Parquet history, CSV incidents and
owners, `workspace.toml`); then every run is one fresh `python -m calibrate tune` process
(this checkout's code, `--trials` trials, default 100, `--workers` local worker
processes, default 2) with its own study journal and output file, so no run resumes
another's study. Measured per run: wall time of the process, CPU time (user + system)
of it and every process it started, and the peak of their memory together, two ways:
the sum of their resident memory (RSS, sampled every 50 ms), which counts a page that
several processes share (libraries, the compiled kernels' code) once per process, and
the sum of their proportional set sizes (PSS: a shared page split between its sharers,
so the sum is the memory they use together, each page once), read from
/proc/PID/smaps_rollup whenever the RSS sum reaches a new peak and every second (a
reading costs a few ms per process, too much for every 50 ms). The target is judged on
the PSS sum; both are printed. This benchmark's own process, which only waits, is
printed apart and not counted. Every
figure is the median and range over `--runs` runs (3 by default, the README's figure;
`--runs 1` for exploring). The last run's summary lines (chosen settings and figures)
are printed, so a change in speed can be checked for a change in results. The first
tune after a code change also compiles the numba kernels into their cache (each worker
compiles what it has not cached): run it twice, or read the later runs.

    python tests/benchmarks/bench_tune_scale.py [--runs 3] [--series 1000] [--days 90]
        [--trials 100] [--workers 2] [--seed 7] [--keep DIR]
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import psutil
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _repeat import RUNS, spread  # noqa: E402

from calibrate import sample  # noqa: E402

TARGET_SECONDS = 600.0
TARGET_BYTES = 2 * 2**30
N_MARKETS = 5
MARKET_OFFSETS = (0, 1, 2, -5, 9)  # UTC offsets of the invented markets (hours)
# analysts per team and alert budgets (per analyst per day) that some setting meets: a
# goal nothing meets would time the "no setting meets the goal" path instead
TEAMS = {"team-a": 6, "team-b": 8, "team-c": 4, "team-d": 6}
BUDGETS = {"team-a": 20.0, "team-b": 20.0, "team-c": 20.0, "team-d": 20.0}
KINDS = ("spike", "drop", "outage", "clicks_flat", "spend_spike", "ctr_collapse")

WORKSPACE_TOML = """\
# Invented scale scenario written by tests/benchmarks/bench_tune_scale.py (seed {seed}):
# {series} campaigns, {days} days; every name is made up, no real data.
[history]
path = "history.parquet"
time_column = "hour"
key_columns = ["market", "advertiser", "campaign"]

[measures]
impressions = "zero"
clicks = "zero"
spend = "zero"
revenue = "zero"

[metrics]
ctr = "clicks / impressions"

[levels]
market = ["market"]
advertiser = ["market", "advertiser"]
campaign = ["market", "advertiser", "campaign"]

[watch]
metrics = ["impressions", "clicks", "spend", "ctr"]

[incidents]
path = "incidents.csv"
early_hours = 2
late_hours = 6

[teams]
owners = "owners.csv"
analysts = {{ {analysts} }}

[goal]
max_miss_rate = 0.25
max_alerts_per_analyst_day = {{ {budgets} }}

[detector]
period_hours = 24
seasonal_span = 7
robust = false
decomposition_window_hours = 336
refit_every_hours = 1
expected_value = "fit"
fence_window_hours = 168
fence_multiplier = 1.5
flatline_hours = 6

[search]
expected_value = ["fit", "forecast"]
decomposition_window_hours = [336, 504]
seasonal_span = [7, 11, 15]
fence_window_hours = [72, 120, 168, 240]
flatline_hours = [0, 6, 10]
sides = ["both"]
fence_multiplier = {{ low = 1.0, high = 12.0 }}
trials = 100
holdout_fraction = 0.25
"""


def _keys(n_series: int) -> pd.DataFrame:
    """Base series (campaigns): market, advertiser, campaign; 10 campaigns per advertiser
    on average, advertisers spread over the markets."""
    n_adv = max(n_series // 10, N_MARKETS)
    adv = np.arange(n_series) % n_adv
    return pd.DataFrame({
        "market": [f"market-{a % N_MARKETS + 1}" for a in adv],
        "advertiser": [f"adv-{a + 1:04d}" for a in adv],
        "campaign": [f"cmp-{i + 1:05d}" for i in range(n_series)],
    })


def _incidents(rng: np.random.Generator, keys: pd.DataFrame, hours: int,
               offset: np.ndarray) -> list[tuple[sample.Incident, np.ndarray]]:
    """One incident per 10 campaigns, after the 4 warm-up weeks, by local day, at market
    (2%), advertiser (18%) and campaign level, none within a day of another on a shared
    series."""
    n = max(len(keys) // 10, 10)
    lo, hi = sample.WARMUP_HOURS + 12, hours - 24
    placed: list[tuple[sample.Incident, np.ndarray]] = []
    while len(placed) < n:
        u = rng.random()
        level = "market" if u < 0.02 else "advertiser" if u < 0.2 else "campaign"
        kind = KINDS[int(rng.integers(len(KINDS)))]
        row = keys.iloc[int(rng.integers(len(keys)))]
        mask = (keys["market"] == row["market"]).to_numpy(copy=True)
        if level != "market":
            mask &= (keys["advertiser"] == row["advertiser"]).to_numpy()
        if level == "campaign":
            mask &= (keys["campaign"] == row["campaign"]).to_numpy()
        start = int(rng.integers(lo, hi - 24))
        if kind != "outage" and not 7 <= (start + int(offset[mask][0])) % 24 <= 19:
            continue
        dur = int(rng.integers(3, 13))
        mag = {"spike": rng.uniform(1.8, 5.0), "drop": rng.uniform(0.1, 0.6),
               "spend_spike": rng.uniform(2.5, 5.0), "ctr_collapse": rng.uniform(0.15, 0.6)
               }.get(kind, 0.0)
        if any((mask & m).any() and start - 24 < o.end and o.start < start + dur + 24
               for o, m in placed):
            continue
        inc = sample.Incident(
            kind=kind, level=level, market=str(row["market"]),
            advertiser=str(row["advertiser"]) if level != "market" else "",
            campaign=str(row["campaign"]) if level == "campaign" else "",
            metric={"clicks_flat": "clicks", "spend_spike": "spend",
                    "ctr_collapse": "ctr"}.get(kind, ""),
            start=start, end=start + dur, magnitude=float(mag), note=f"{kind} for {dur} h",
        )
        placed.append((inc, mask))
    placed.sort(key=lambda p: (p[0].start, p[0].level, p[0].market))
    return placed


def generate(folder: Path, n_series: int, days: int, seed: int) -> Path:
    """Write the invented scale workspace into `folder`; returns its workspace file."""
    rng = np.random.default_rng(seed)
    hours = days * 24
    keys = _keys(n_series)
    offset = np.array(MARKET_OFFSETS)[keys["market"].str[-1].astype(int).to_numpy() - 1]
    n = n_series
    t = np.arange(hours)
    local = t[None, :] + offset[:, None]
    local_day = local // 24
    profile = sample._daily_profile(local % 24, rng.uniform(0.0, 0.6, (n, 1)))
    profile /= profile.mean(axis=1, keepdims=True)
    weekend = np.where(local_day % 7 >= 5, rng.uniform(0.65, 1.25, (n, 1)), 1.0)
    volume = np.exp(rng.normal(np.log(600.0), 1.2, n)).clip(15.0, 30000.0)
    imp_mult = np.ones((n, hours))
    for i in rng.choice(n, size=n // 20, replace=False):  # lasting budget changes
        imp_mult[i, int(rng.integers(24, hours)):] *= rng.uniform(0.5, 1.6)
    ctr_mult, cpc_mult = np.ones((n, hours)), np.ones((n, hours))
    zero_all = np.zeros((n, hours), dtype=bool)
    zero_clicks = np.zeros((n, hours), dtype=bool)
    incidents = _incidents(rng, keys, hours, offset)
    for inc, m in incidents:
        w = slice(inc.start, inc.end)
        if inc.kind in ("spike", "drop"):
            imp_mult[m, w] *= inc.magnitude
        elif inc.kind == "spend_spike":
            cpc_mult[m, w] *= inc.magnitude
        elif inc.kind == "ctr_collapse":
            ctr_mult[m, w] *= inc.magnitude
        elif inc.kind == "outage":
            zero_all[m, w] = True
        else:
            zero_clicks[m, w] = True
    noise = np.exp(sample._ar1(rng, n, 0.09, 0.6, hours))
    lam = volume[:, None] * profile * weekend * imp_mult * noise
    impressions = np.where(zero_all, 0, rng.poisson(lam))
    ctr = rng.uniform(0.006, 0.04, (n, 1)) * ctr_mult
    clicks = np.where(zero_all | zero_clicks, 0, rng.binomial(impressions, ctr))
    cpc = rng.uniform(0.25, 1.8, (n, 1)) * cpc_mult
    spend = np.where(clicks > 0, rng.gamma(np.maximum(clicks * 4.0, 1e-9), cpc / 4.0), 0.0)
    conversions = rng.binomial(clicks, rng.uniform(0.02, 0.08, (n, 1)))
    revenue = np.where(conversions > 0,
                       rng.gamma(np.maximum(conversions * 2.0, 1e-9), 20.0), 0.0)

    keep = rng.random((n, hours)) > 0.0005  # a few missing rows (filled with zeros)
    keep[:, [0, -1]] = True
    si, hi = np.nonzero(keep)
    frame = keys.iloc[si].reset_index(drop=True)
    frame.insert(0, "hour", pd.date_range(sample.START, periods=hours, freq="h")
                 .as_unit("us")[hi])
    frame["impressions"] = impressions[keep].astype(np.int64)
    frame["clicks"] = clicks[keep].astype(np.int64)
    frame["spend"] = np.round(spend[keep], 2)
    frame["revenue"] = np.round(revenue[keep], 2)
    folder.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False),
                   folder / "history.parquet", compression="zstd")
    sample.incidents_frame([inc for inc, _ in incidents]).to_csv(
        folder / "incidents.csv", index=False)

    teams = list(TEAMS)
    owners = [[f"market-{m + 1}", "", teams[m % len(teams)]] for m in range(N_MARKETS)]
    advertisers = keys["advertiser"].drop_duplicates().to_numpy()
    for a in rng.choice(advertisers, size=len(advertisers) // 5, replace=False):
        market = keys.loc[keys["advertiser"] == a, "market"].iloc[0]
        owners.append([market, a, teams[int(rng.integers(len(teams)))]])
    pd.DataFrame(owners, columns=["market", "advertiser", "team"]).to_csv(
        folder / "owners.csv", index=False)

    path = folder / "workspace.toml"
    path.write_text(WORKSPACE_TOML.format(
        seed=seed, series=n_series, days=days,
        analysts=", ".join(f'"{k}" = {v}' for k, v in TEAMS.items()),
        budgets=", ".join(f'"{k}" = {v}' for k, v in BUDGETS.items()),
    ), encoding="utf-8")
    return path


class TreeUsage:
    """Peak summed RSS (sampled every `every` seconds in a thread), peak summed PSS (read
    at each new RSS peak and every `pss_every` seconds) and CPU time of a process and
    its descendants while it runs. Bytes and seconds."""

    def __init__(self, pid: int, every: float = 0.05, pss_every: float = 1.0):
        self.root = psutil.Process(pid)
        self.every = every
        self.pss_every = pss_every
        self._pss_at = 0.0
        self.peak_pss = 0
        self.peak = 0
        self.peak_processes = 0
        self.own_peak = 0  # this benchmark's process (not counted in `peak`)
        self._cpu: dict[int, float] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def sample(self) -> None:
        procs = [self.root]
        try:
            procs += self.root.children(recursive=True)
        except psutil.Error:
            pass
        total, count = 0, 0
        for p in procs:
            try:
                with p.oneshot():
                    total += p.memory_info().rss
                    cpu = p.cpu_times()
                self._cpu[p.pid] = max(self._cpu.get(p.pid, 0.0), cpu.user + cpu.system)
                count += 1
            except psutil.Error:
                pass
        now = time.perf_counter()
        if total > self.peak or now - self._pss_at >= self.pss_every:
            self._pss_at = now
            pss = 0
            for p in procs:
                try:
                    pss += p.memory_full_info().pss
                except psutil.Error:
                    pass
            self.peak_pss = max(self.peak_pss, pss)
        if total > self.peak:
            self.peak, self.peak_processes = total, count
        self.own_peak = max(self.own_peak, psutil.Process().memory_info().rss)

    @property
    def cpu(self) -> float:
        """CPU seconds (user + system) of every process seen, as last sampled."""
        return sum(self._cpu.values())

    def _loop(self) -> None:
        while not self._stop.is_set():
            self.sample()
            time.sleep(self.every)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join()


def run_tune(ws: Path, run_dir: Path, trials: int, workers: int) -> dict[str, float | str]:
    """One `calibrate tune` process on `ws`; its wall time, CPU time, peak memory, exit
    code and printed summary."""
    run_dir.mkdir(parents=True)
    cmd = [sys.executable, "-m", "calibrate", "tune", str(ws), "--out",
           str(run_dir / "tuned.toml"), "--storage", str(run_dir / "study.journal"),
           "--trials", str(trials), "--engine", "local", "--workers", str(workers)]
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(
        [str(ROOT), *filter(None, [os.environ.get("PYTHONPATH")])])}
    before = os.times()
    with open(run_dir / "stdout.txt", "wb") as out, open(run_dir / "stderr.txt", "wb") as err:
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=err, env=env, cwd=run_dir)
        usage = TreeUsage(proc.pid)
        usage.start()
        code = proc.wait()
        wall = time.perf_counter() - t0
        usage.stop()
    after = os.times()
    if code not in (0, 3):  # 3: no setting meets the goal (still a whole tune)
        sys.stderr.write((run_dir / "stderr.txt").read_text()[-3000:])
        raise SystemExit(f"tune exited {code}: {' '.join(cmd)}")
    # processes the tune waited for are in the children's rusage; a worker killed before
    # its last sample is in neither, so the larger of the two is the better estimate
    reaped = (after.children_user - before.children_user
              + after.children_system - before.children_system)
    return {"wall": wall, "cpu": max(reaped, usage.cpu), "peak": usage.peak,
            "pss": usage.peak_pss,
            "processes": usage.peak_processes, "own": usage.own_peak, "code": code,
            "stdout": (run_dir / "stdout.txt").read_text()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=RUNS,
                    help=f"tunes to time (default {RUNS}; 1 to explore, the README needs 3)")
    ap.add_argument("--series", type=int, default=1000, help="campaigns (default 1000)")
    ap.add_argument("--days", type=int, default=90, help="days of hours (default 90)")
    ap.add_argument("--trials", type=int, default=100, help="trials per tune (default 100)")
    ap.add_argument("--workers", type=int, default=2, help="worker processes (default 2)")
    ap.add_argument("--seed", type=int, default=7, help="scenario seed (default 7)")
    ap.add_argument("--keep", type=Path, default=None,
                    help="write the workspace and runs here and keep them (default: a "
                    "temporary folder, removed)")
    args = ap.parse_args()
    if args.runs < 1 or args.days < 35 or args.series < 10:
        raise SystemExit("need --runs >= 1, --days >= 35 and --series >= 10")
    print(f"machine: {platform.platform()}, {os.cpu_count()} cores, "
          f"{psutil.virtual_memory().total / 2**30:.0f} GB, python {platform.python_version()}, "
          f"load average {os.getloadavg()[0]:.1f} at start")
    folder = Path(tempfile.mkdtemp(prefix="bench_tune_scale_")) if args.keep is None \
        else args.keep
    try:
        t0 = time.perf_counter()
        ws = generate(folder / "ws", args.series, args.days, args.seed)
        n_adv = max(args.series // 10, N_MARKETS)
        n_watched = N_MARKETS + n_adv + args.series
        n_inc = sum(1 for _ in open(ws.parent / "incidents.csv")) - 1
        print(f"workspace: {args.series} campaigns ({n_watched} series at 3 levels) x "
              f"{args.days} days x 4 metrics, {n_inc} incidents, {len(TEAMS)} teams; "
              f"written in {time.perf_counter() - t0:.1f} s")
        print(f"tune: {args.trials} trials, local engine on {args.workers} workers, "
              f"{args.runs} run(s), a fresh process and study each")
        runs = []
        for i in range(args.runs):
            r = run_tune(ws, folder / f"run{i + 1}", args.trials, args.workers)
            print(f"  run {i + 1}: {r['wall']:.0f} s wall, {r['cpu']:.0f} s CPU, peak "
                  f"{r['pss'] / 2**20:,.0f} MB PSS summed ({r['peak'] / 2**20:,.0f} MB RSS "
                  f"summed) over {r['processes']} processes, exit "
                  f"{r['code']}, load average {os.getloadavg()[0]:.1f}", flush=True)
            runs.append(r)
        wall = spread([r["wall"] for r in runs])
        peak = spread([r["pss"] for r in runs])
        peak_rss = spread([r["peak"] for r in runs])
        print(f"wall time: {wall.fmt('.0f', 's')}")
        print(f"CPU time (tune + workers): {spread([r['cpu'] for r in runs]).fmt('.0f', 's')}")
        print(f"peak memory (tune + workers, PSS summed: each page once): "
              f"{peak.fmt(',.0f', 'MB', 1 / 2**20)}")
        print(f"peak memory (tune + workers, RSS summed: shared pages once per process): "
              f"{peak_rss.fmt(',.0f', 'MB', 1 / 2**20)}")
        print(f"(this benchmark's own process, not counted: "
              f"{max(r['own'] for r in runs) / 2**20:,.0f} MB)")
        print(f"targets: time < {TARGET_SECONDS / 60:.0f} min "
              f"{'met' if wall.median < TARGET_SECONDS else 'NOT met'} (median), "
              f"peak memory (PSS summed) < {TARGET_BYTES / 2**30:.0f} GB "
              f"{'met' if peak.median < TARGET_BYTES else 'NOT met'} (median)"
              + ("" if args.runs >= RUNS else f"; exploratory: fewer than {RUNS} runs"))
        print("last run's summary:")
        for line in str(runs[-1]["stdout"]).splitlines():
            print(f"  | {line}")
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
