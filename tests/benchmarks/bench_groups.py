"""Benchmark: tuning the sample workspace per group, against one group of settings.

No speed reference: this compares results, so every time printed is the tune's own wall
time (one process, the local engine on every core unless `--engine serial`). For each
way of grouping and each trial budget, the tune runs `--runs` times (at least 3, each in
a fresh copy of the sample with its own study); printed: its time (median and range) and,
per run, the best feasible alerts per analyst per day on the tuning weeks and the miss
rate on the held-out weeks (seeded: the same in every run unless something is wrong):

- one group (the sample's own `[search]`);
- `tune_by = "metric"`: each watched metric's settings searched, and its multiplier and
  minimum impact solved (from 0 to its typical hourly level on the tuning weeks);
- `tune_by = "group"` with one named group, `[detector.group.money]` (spend, revenue,
  margin), and `base` for the rest.

Defaults finish in a few minutes on 2 cores; the README's figures use

    python tests/benchmarks/bench_groups.py --trials 40 100 [--runs 3] [--engine local]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import optuna

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _repeat import add_runs_flag, spread  # noqa: E402
from _sample import SAMPLE, sample_copy  # noqa: E402

from calibrate import api  # noqa: E402
from calibrate.tuning import search  # noqa: E402


def variants(text: str) -> dict[str, str]:
    """Workspace texts by name: the sample, per metric, and one named group."""
    per_metric = text.replace("[search]\n", '[search]\ntune_by = "metric"\n', 1)
    named = text.replace("\n[search]\n", '\n[detector.group.money]\nmetrics = ["spend", '
                         '"revenue", "margin"]\n\n[search]\ntune_by = "group"\n', 1)
    return {"one group": text, "per metric": per_metric, "named group": named}


def one_run(text: str, trials: int, engine: str) -> tuple[float, str, str, str]:
    """Tune a fresh copy: (seconds, best value, held-out miss rate with its count,
    interval and verdict, warning)."""
    with tempfile.TemporaryDirectory() as tmp:
        ws = sample_copy(Path(tmp), text)
        ses = api.open_session(ws)
        t0 = time.perf_counter()
        res = search.tune(ses, trials=trials, storage=str(Path(tmp) / "s.journal"),
                          engine=engine, progress=False)
        took = time.perf_counter() - t0
    best = res.trials[res.trials["feasible"]]
    value = f"{best['value'].min():.2f}" if len(best) else "none feasible"
    h = res.holdout
    held = "n/a" if h is None else (
        f"{h.miss_rate:.3f} ({h.incidents - h.caught} of {h.incidents} missed, Wilson 95% "
        f"{h.miss_rate_low:.3f}-{h.miss_rate_high:.3f}; verdict: {res.verdict})")
    return took, value, held, res.holdout_warning or ""


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(ap)
    ap.add_argument("--trials", type=int, nargs="+", default=[20])
    ap.add_argument("--engine", default="local", choices=("local", "serial"))
    args = ap.parse_args()
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    for name, text in variants(SAMPLE.read_text(encoding="utf-8")).items():
        for trials in args.trials:
            runs = [one_run(text, trials, args.engine) for _ in range(args.runs)]
            values = sorted({r[1] for r in runs})
            held = sorted({r[2] for r in runs})
            warnings = sorted({r[3] for r in runs if r[3]})
            per_run = "the same in every run" if len(values) == 1 and len(held) == 1 else (
                "DIFFERENT between runs")
            print(f"{name:<12} {trials:>4} trials: tune time "
                  f"{spread([r[0] for r in runs]).fmt('.1f', 's')}; best "
                  f"{', '.join(values)} alerts per analyst per day on the tuning weeks, "
                  f"held-out miss rate {', '.join(held)} ({per_run})"
                  + (f" (warning: {'; '.join(warnings)})" if warnings else ""))


if __name__ == "__main__":
    main()
