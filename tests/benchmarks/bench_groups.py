"""Benchmark: tuning the sample workspace per group, against one group of settings.

Prints, for each way of grouping, the best feasible alerts per analyst per day on the
tuning weeks and the miss rate on the held-out weeks, so the README's figures on
per-group tuning can be re-measured:

- one group (the sample's own `[search]`);
- `tune_by = "metric"`, each metric's `min_impact` range from 0 to its median hourly
  value (`search.typical_level`), solved per metric;
- `tune_by = "group"` with one named group, `[detector.group.money]` (spend, revenue,
  margin), and `base` for the rest.

    python tests/benchmarks/bench_groups.py [--trials 40 100] [--engine local]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import optuna

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from calibrate import api, search  # noqa: E402


def variants(src: Path) -> dict[str, str]:
    """Workspace texts by name: the sample, per metric, and one named group."""
    text = src.read_text(encoding="utf-8")
    ses = api.open_session(src)
    per_metric = text.replace("[search]\n", '[search]\ntune_by = "metric"\n', 1)
    for m in ses.ws.metric_names:
        per_metric += (f"\n[search.groups.{m}]\nmin_impact = {{ low = 0.0, high = "
                       f"{float(search.typical_level(ses, [m]))!r} }}\n")
    named = text.replace("\n[search]\n", '\n[detector.group.money]\nmetrics = ["spend", '
                         '"revenue", "margin"]\n\n[search]\ntune_by = "group"\n', 1)
    return {"one group": text, "per metric": per_metric, "named group": named}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, nargs="+", default=[40, 100])
    ap.add_argument("--engine", default="local", choices=("local", "serial"))
    args = ap.parse_args()
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    src = ROOT / "sample_data" / "workspace.toml"
    for name, text in variants(src).items():
        for trials in args.trials:
            with tempfile.TemporaryDirectory() as tmp:
                ws = Path(tmp) / "ws"
                shutil.copytree(src.parent, ws)
                (ws / "workspace.toml").write_text(text, encoding="utf-8")
                ses = api.open_session(ws / "workspace.toml")
                t0 = time.perf_counter()
                res = search.tune(ses, trials=trials, storage=str(Path(tmp) / "s.journal"),
                                  engine=args.engine, progress=False)
                took = time.perf_counter() - t0
            best = res.trials[res.trials["feasible"]]
            value = f"{best['value'].min():.2f}" if len(best) else "none feasible"
            held = "n/a" if res.holdout is None else f"{res.holdout.miss_rate:.3f}"
            print(f"{name:<12} {trials:>4} trials {took:6.1f} s: best {value} alerts per "
                  f"analyst per day on the tuning weeks, held-out miss rate {held}"
                  + (f" (warning: {res.holdout_warning})" if res.holdout_warning else ""))


if __name__ == "__main__":
    main()
