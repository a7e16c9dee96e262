"""The commands that run a whole workflow for the command line (stage 9): tune and
write the config and report, write a report, retune from verdicts.

`calibrate.cli` parses the arguments and calls these; each prints what a user reads
and returns the exit code. The work itself is in `calibrate.tuning.search`,
`calibrate.reporting.report` and `calibrate.feedback.retune`, which never import this module.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

from calibrate import api, errors
from calibrate.api import Session
from calibrate.engine.executors import Executor, make_executor
from calibrate.errors import CalibrationError, InputError, UsageError
from calibrate.feedback.retune import retune, retune_paths, write_retune_outputs
from calibrate.inputs.workspace import Goal
from calibrate.outputs import check_outputs, load_config, load_provenance, write_config
from calibrate.reporting.report import step, steps_bar, write_config_report, write_report
from calibrate.tuning.evaluate import labels_line
from calibrate.tuning.search import study_result, tune, tuning_incidents
from calibrate.tuning.summaries import (
    changed_settings_line,
    fold_lines,
    metric_lines,
    pareto_lines,
    side_by_side,
    verdict_line,
)


def cli_tune(args: Any) -> int:
    """`calibrate tune WORKSPACE --out tuned.toml [--report DIR] [--trials N] ...`.

    Exit 0 with the config written; 2 when no setting meets the goal (nothing
    written, the best trade-offs printed).
    """
    out = Path(args.out)
    force = bool(getattr(args, "force", False))
    check_outputs([out], force, folders=[getattr(args, "report", None)])
    ses = api.open_session(args.workspace)
    goal = ses.ws.goal
    mm = getattr(args, "max_miss_rate", None)
    mb = getattr(args, "max_alerts_per_analyst_day", None)
    if mm is not None:
        if not 0.0 <= mm <= 1.0:
            raise InputError("--max-miss-rate", f"must be between 0 and 1, but got {mm!r}")
        goal = replace(goal, max_miss_rate=float(mm))
    if mb is not None:
        if not mb > 0:
            raise InputError("--max-alerts-per-analyst-day", f"must be positive, but got {mb!r}")
        goal = replace(goal, max_alerts_per_analyst_day=float(mb))

    # one executor for the search and the report: the workers start once
    executor = make_executor(getattr(args, "engine", "local"), getattr(args, "workers", None),
                             getattr(args, "scheduler", None))
    try:
        return _tune_and_write(ses, args, goal, out, force, executor)
    finally:
        executor.close()


def _tune_and_write(ses: Session, args: Any, goal: Goal, out: Path, force: bool,
                    executor: Executor) -> int:

    tune_by = ses.ws.search.tune_by
    if tune_by != "group" and ses.ws.detector.groups:
        names = ", ".join(g.name for g in ses.ws.detector.groups)
        what = ("one set of settings for every series" if tune_by == "all"
                else f"one set of settings per {tune_by}")
        print(f"note: tune_by = \"{tune_by}\" tunes {what}; the tuned config leaves out "
              f"the workspace's groups ({names}). Use tune_by = \"group\" to tune them.")
    progress = not getattr(args, "quiet", False)
    print(f"before the search: {labels_line(tuning_incidents(ses), goal)}")
    result = tune(ses, trials=args.trials, storage=args.storage,
                  study_name=getattr(args, "study", None), goal=goal, executor=executor,
                  progress=progress)
    print(f"study {result.study_name} ({len(result.trials)} trials) in {result.storage}")
    for line in side_by_side(result):
        print(line)
    for line in metric_lines(result):
        print(line)
    for line in fold_lines(result):
        print(line)
    if result.thin_margin:
        print(f"knife edge: {result.thin_margin} caught incident(s) are caught only by alerts "
              "whose peak fence score is within 10% of the multiplier; [goal] spare_incidents "
              "= N keeps the target with N more misses")
    if result.holdout_warning:
        print(f"warning: {result.holdout_warning}")
    if not result.feasible:
        print(f"no setting meets the goal: {result.reason}")
        for line in pareto_lines(result):
            print(line)
        print(f"nothing written to {out}")
        print(verdict_line(result))
        return errors.GOAL_NOT_MET
    print(result.reason)
    print(changed_settings_line(result))
    write_config(out, result.config, result.provenance, force=force)
    print(f"tuned config written to {out}")
    if getattr(args, "report", None):
        write_report(ses, result, Path(args.report), force=force, executor=executor,
                     progress=progress)
        print(f"report written to {args.report}")
    print(verdict_line(result))
    return 0


def cli_report(args: Any) -> int:
    """`calibrate report WORKSPACE (--config C | --study [NAME]) --out DIR`."""
    config_path, study = getattr(args, "config", None), getattr(args, "study", None)
    if (config_path is None) == (study is None):
        raise UsageError("give either --config FILE or --study [NAME]")
    out = Path(args.out)
    force = bool(getattr(args, "force", False))
    progress = not getattr(args, "quiet", False)
    check_outputs((), force, folders=[out])
    ses = api.open_session(args.workspace)
    if ses.incidents is None:
        raise CalibrationError(f"{ses.ws.file}: no [incidents] path; a report needs incidents")
    if study is not None:

        executor = make_executor(args.engine, args.workers, args.scheduler)
        bar = steps_bar(progress, total=5)
        try:
            result = step(bar, "study", lambda: study_result(
                ses, storage=getattr(args, "storage", None), study_name=study or None,
                executor=executor))
            write_report(ses, result, out, force=force, executor=executor, steps=bar)
        finally:
            bar.close()
            executor.close()
        print(f"{result.reason}")
        print(f"report written to {out / 'index.html'}")
        return 0
    config = load_config(config_path)
    split = load_provenance(config_path).get("split_hour")
    write_config_report(
        ses, config, out, split_hour=int(split) if isinstance(split, int) else None,
        force=force, source=f"config {config_path}", engine=args.engine, workers=args.workers,
        scheduler=args.scheduler, progress=progress,
    )
    print(f"report written to {out / 'index.html'}")
    return 0


def cli_retune(args: Any) -> int:
    """`calibrate retune WORKSPACE --verdicts F --out C [--previous P] [--report D]`."""
    out = Path(args.out)
    paths = retune_paths(out, Path(args.report) if args.report else None)
    check_outputs(paths[:3], args.force, folders=paths[3:])
    verdicts = Path(args.verdicts)
    if out.resolve() == verdicts.resolve():
        raise CalibrationError(f"{out}: is the verdicts file; choose another --out")
    ses = api.open_session(args.workspace)
    previous = load_config(args.previous) if args.previous else None
    res = retune(ses, verdicts, previous, args.trials, engine=args.engine,
                 workers=args.workers, scheduler=args.scheduler,
                 progress=not getattr(args, "quiet", False),
                 added_incidents=getattr(args, "added_incidents", None))
    for line in res.verdicts.lines():
        print(line)
    written = write_retune_outputs(res, out, Path(args.report) if args.report else None,
                                   force=args.force)
    c = res.comparison
    print(f"previous: {c.old['caught']}/{c.old['incidents']} caught, {c.old['alerts']} alerts; "
          f"new: {c.new['caught']}/{c.new['incidents']} caught, {c.new['alerts']} alerts")
    print(f"known false alarms still raised: {len(c.still_raised)} of {c.known_false_total}")
    for w in c.why:
        print(f"    {w}")
    for p in written:
        print(f"written: {p}")
    return 0
