"""Benchmark: in-fit against one-hour-ahead expected values, tuned on the sample.

Tunes the sample workspace three times at the same trial budget and seed:
- `fit` only (``[search] expected_value = ["fit"]``, today's `[detector]`),
- `forecast` only (``["forecast"]``, today's `[detector]` with ``expected_value =
  "forecast"``, so the warm-start trial is forecast too),
- the choice searched (``["fit", "forecast"]``, as `sample_data/workspace.toml`).
All three score their trials on the same tuning hours: the latest first scored hour
of the three spaces (the forecast one's, longest window + longest fence window) up to
the held-out split, so no variant is judged on hours another cannot score.

Prints for each: the chosen settings, recall (caught of incidents) and alert load
(the busiest team's alerts per analyst per day, and all alerts) on the tuning and the
held-out weeks, and the best trade-offs front over all its trials (recall against the
busiest team's load, at every multiplier and minimum impact of each trial's grid).
This compares results, not speed: each variant is tuned `--runs` times (at least 3,
each with its own study; seeded, so the results must agree, and the script says whether
they do) and its time is printed as the median and range, its own wall time with no
reference. The details are those of the first run.

    python tests/benchmarks/bench_expected.py [--trials 15] [--runs 3] [--engine local]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _repeat import add_runs_flag, spread  # noqa: E402

from calibrate import api  # noqa: E402
from calibrate.engine.executors import make_executor  # noqa: E402
from calibrate.inputs.workspace import SearchParam  # noqa: E402
from calibrate.scoring.figures import Figures  # noqa: E402
from calibrate.tuning import search  # noqa: E402

VARIANTS = {"fit only": ("fit",), "forecast only": ("forecast",),
            "choice searched": ("fit", "forecast")}


def variant(ses: api.Session, modes: tuple[str, ...]) -> api.Session:
    """The session with `[search] expected_value = modes` (and a forecast `[detector]`
    when only forecast is searched, so the space holds nothing else)."""
    ws = ses.ws
    params = tuple(p for p in ws.search.params if p.name != "expected_value")
    params += (SearchParam(name="expected_value", kind="choice", values=modes),)
    detector = ws.detector
    if modes == ("forecast",):
        detector = detector.with_base(expected_value="forecast")
    return replace(ses, ws=replace(ws, search=replace(ws.search, params=params),
                                   detector=detector))


def load(f: Figures | None) -> tuple[float, float]:
    """Busiest team's alerts per analyst per day, and all alerts per analyst per day."""
    if f is None:
        return float("nan"), float("nan")
    pt = f.per_team[f.per_team["analysts"] > 0]
    busiest = float(pt["alerts_per_analyst_day"].max()) if len(pt) else float("nan")
    analysts = float(pt["analysts"].sum()) or 1.0
    return busiest, f.alerts / (analysts * f.n_days)


def line(name: str, f: Figures | None) -> str:
    if f is None:
        return f"  {name:<15} none held out"
    busiest, overall = load(f)
    return (f"  {name:<15} recall {f.caught}/{f.incidents} = {f.recall:.3f} "
            f"(95% {f.recall_low:.2f}-{f.recall_high:.2f}), alerts {f.alerts} "
            f"({f.false_alerts} false), busiest team {busiest:.2f} and overall "
            f"{overall:.2f} alerts per analyst per day")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(ap)
    ap.add_argument("--trials", type=int, default=15,
                    help="trial budget of each tune (default 15; the README's figures: 40)")
    ap.add_argument("--engine", default="local")
    args = ap.parse_args()
    base = api.open_session(ROOT / "sample_data" / "workspace.toml")
    trials = args.trials
    sessions = {name: variant(base, modes) for name, modes in VARIANTS.items()}
    common = max(search._plan(s, ())[2] for s in sessions.values())
    own_first = search._first_hour

    def same_hours(*a):  # every variant scored from the same first hour
        return max(own_first(*a), common)

    search._first_hour = same_hours
    executor = make_executor(args.engine, None, None)
    print(f"sample workspace, {trials} trials per tune, seed {base.ws.search.seed}, "
          f"engine {args.engine}; tuning hours from {common} (the latest first scored hour "
          "of the three spaces)")
    try:
        with tempfile.TemporaryDirectory() as tmp:
            for name, ses in sessions.items():
                took, results = [], []
                for run in range(args.runs):
                    t0 = time.perf_counter()
                    results.append(search.tune(
                        ses, trials=trials, storage=str(Path(tmp) / f"{name}-{run}.journal"),
                        executor=executor, progress=False))
                    took.append(time.perf_counter() - t0)
                res = results[0]
                same = all(r.config == res.config and r.pareto.equals(res.pareto)
                           and r.tuning.alerts == res.tuning.alerts for r in results)
                b = res.config.base
                tr = res.trials
                modes = tr["expected_value"].value_counts().to_dict() if len(tr) else {}
                print(f"\n{name} (tune time {spread(took).fmt('.0f', 's')}; the same config, "
                      f"figures and trade-offs in every run: {same}; trials by mode {modes}; hours "
                      f"[{res.first_hour}, {res.split_hour}) tuning, "
                      f"[{res.split_hour}, {ses.history.n_hours}) held out)")
                print(f"  chosen: expected_value = {b.expected_value}, window "
                      f"{b.decomposition_window_hours}, seasonal span {b.seasonal_span}, "
                      f"fence window {b.fence_window_hours}, flatline {b.flatline_hours}, "
                      f"k = {b.fence_multiplier:.3g}; goal met: {res.feasible}")
                print(line("tuning weeks", res.tuning))
                print(line("held-out weeks", res.holdout))
                front = res.pareto
                mode_of = dict(zip(tr["number"], tr["expected_value"], strict=True))
                print(f"  best trade-offs ({front.attrs.get('load_label', 'load')}):")
                for _, r in front.iterrows():
                    print(f"    recall {r['caught']}/{r['incidents']} = {r['recall']:.3f} at "
                          f"{r['load']:.2f} (trial {r['number']}, "
                          f"{mode_of.get(r['number'], '?')}, k = {r['k']:.3g}, "
                          f"min_impact {r['min_impact']})")
                if not len(front):
                    print("    (none)")
                sys.stdout.flush()
    finally:
        executor.close()
        search._first_hour = own_first


if __name__ == "__main__":
    main()
