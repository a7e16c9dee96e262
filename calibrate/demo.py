"""`calibrate demo`: the whole job on the invented sample workspace.

Regenerates the sample workspace (seeded, identical to `sample_data/`) into the
output folder, then runs check, replay of today's settings, scoring, tuning with
a held-out check, the report, and the alert export for review, printing where
each output is.
"""

from __future__ import annotations

import time
from pathlib import Path

from calibrate import api
from calibrate.engine.executors import Executor, make_executor
from calibrate.errors import CalibrationError
from calibrate.feedback.review import review_frame
from calibrate.inputs.checks import check_workspace
from calibrate.outputs import check_outputs, write_config, write_table, write_text
from calibrate.reporting.report import write_report
from calibrate.sample import generate_sample
from calibrate.tuning.search import tune

# what the demo writes into its folder (the study journal is continued, not replaced)
FILES = ("alerts-current.csv", "tuned.toml", "alerts-for-review.csv", "volume.csv",
         "README.txt")
FOLDERS = ("workspace", "report")


def run_demo(args) -> int:
    """Run the demo; `args` has out, trials, engine, workers, scheduler, force."""
    t_start = time.perf_counter()
    out = Path(args.out)
    force = bool(getattr(args, "force", False))
    if out.exists() and not out.is_dir():
        raise CalibrationError(f"{out}: exists and is not a folder")
    check_outputs([out / f for f in FILES], force, folders=[out / f for f in FOLDERS])
    out.mkdir(parents=True, exist_ok=True)
    ws_path = generate_sample(out / "workspace")
    print(f"1/6 sample workspace (invented scenario) written to {ws_path.parent}")
    for line in check_workspace(api.load_workspace(ws_path)).lines():
        print(f"    {line}")

    ses = api.open_session(ws_path)
    # one executor for every step: its workers start once and keep the history
    executor = make_executor(args.engine, args.workers, args.scheduler)
    try:
        tuned, result = _steps(ses, out, args.trials, executor, force,
                               progress=not getattr(args, "quiet", False))
    finally:
        executor.close()

    print("6/6 alert volume per team (tuned settings, held-out weeks)")
    vol = api.alert_volume(ses, tuned.episodes, result.split_hour, ses.history.n_hours,
                           first_scored=result.first_hour)
    write_table(out / "volume.csv", vol, force=force)
    for team, row in api.volume_per_team(vol).iterrows():
        print(f"    {team}: {row['alerts_per_analyst_day']:.2f} alerts per analyst per day "
              f"(budget {ses.ws.goal.budget(team):g})")
    took = time.perf_counter() - t_start
    write_text(out / "README.txt", _readme(out, took), force=force)
    print(f"done in {took:.0f} s; outputs in {out}/ (see {out / 'README.txt'})")
    print("caution: a tuned config is only as good as the incident labels; check it on "
          "held-out weeks before rollout.")
    return 0


def _steps(ses: api.Session, out: Path, trials: int | None, executor: Executor, force: bool,
           progress: bool = True):
    """Steps 2-5: replay today's settings, tune, report, export the tuned alerts."""
    print("2/6 replaying today's [detector] settings hour by hour")
    current = api.replay_session(ses, executor=executor, progress=progress)
    write_table(out / "alerts-current.csv", current.alerts_frame(), force=force)
    first = api.first_scored_hour(ses.ws.detector, ses.ws)
    figs = api.score_episodes(ses, current.episodes, first)
    print(f"    today's settings: {figs.caught}/{figs.incidents} incidents caught, "
          f"{figs.alerts} alerts, precision {_pct(figs.precision)}")

    print("3/6 tuning (the fence multiplier and each metric's minimum impact are solved for "
          "every trial)")
    result = tune(ses, trials=trials, storage=str(out / "study.journal"), executor=executor,
                  progress=progress)
    tuned_path = out / "tuned.toml"
    if result.feasible:
        write_config(tuned_path, result.config, result.provenance, force=force)
        print(f"    tuned config written to {tuned_path}")
    else:
        print(f"    no setting meets the goal: {result.reason}")
    print(f"    tuning weeks: miss rate {_pct(result.tuning.miss_rate)} "
          f"({_pct(result.tuning.miss_rate_low)} to {_pct(result.tuning.miss_rate_high)}), "
          f"{result.tuning.alerts} alerts")
    print(f"    held-out weeks: miss rate {_pct(result.holdout.miss_rate)} "
          f"({_pct(result.holdout.miss_rate_low)} to {_pct(result.holdout.miss_rate_high)}), "
          f"{result.holdout.alerts} alerts")
    if result.holdout_warning:
        print(f"    warning: {result.holdout_warning}")

    print("4/6 report")
    report_dir = out / "report"
    write_report(ses, result, report_dir, force=force, executor=executor, progress=progress)
    print(f"    report written to {report_dir / 'index.html'}")

    print("5/6 alerts of the tuned settings, for analysts to review")
    tuned = api.replay_session(ses, result.config, executor=executor, progress=progress)
    review = review_frame(tuned.alerts_frame())
    write_table(out / "alerts-for-review.csv", review, force=force)
    print(f"    {len(review)} alerts written to {out / 'alerts-for-review.csv'} "
          "(fill in the verdict column, then run `calibrate retune`)")
    print(f"    or review them in the browser: calibrate review {out / 'workspace'} "
          f"--config {out / 'tuned.toml'} --verdicts {out / 'reviewed.csv'} "
          f"--incidents-out {out / 'added-incidents.csv'}")
    return tuned, result


def _pct(x) -> str:
    return "n/a" if x is None or x != x else f"{100 * x:.1f}%"


def _readme(out: Path, took: float) -> str:
    return f"""Outputs of `calibrate demo` ({took:.0f} s)

workspace/              the invented sample workspace (history, incidents, owners, settings)
alerts-current.csv      alerts today's [detector] settings would have raised
study.journal           the Optuna study (re-running the demo continues it)
tuned.toml              tuned settings; `calibrate replay workspace --config tuned.toml` reads it
report/index.html       the calibration report (self-contained; open it in a browser)
report/settings.csv     the tuned settings as one flat table (one row per level and metric)
alerts-for-review.csv   tuned settings' alerts with a blank verdict column for analysts
volume.csv              alerts per team per week against the budget
"""
