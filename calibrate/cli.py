"""`calibrate` command line: parse arguments, call the API, map errors to exit codes.

Every command is one function `cmd_NAME(args) -> int`; expected errors
(`CalibrationError`) print one line on stderr and exit 1, never a traceback
(`UsageError` exits 2, as argparse does; a tune meeting no goal exits 3: see
`calibrate.errors`). Ctrl-C (SIGINT) and SIGTERM stop a command the same way,
cleaning up on the way out, with one line and exit 130 or 143.
"""

from __future__ import annotations

import argparse
import errno
import importlib.metadata
import json
import logging
import os
import signal
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from calibrate import errors
from calibrate.errors import CalibrationError, UsageError


def _engine_args(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--engine",
        choices=("local", "serial", "dask"),
        default="local",
        help="where decompositions run: worker processes on this machine, this process "
        "only, or a Dask cluster (default: local)",
    )
    p.add_argument("--workers", type=int, default=None,
                   help="worker processes (default: one per core)")
    p.add_argument(
        "--scheduler",
        default=None,
        help="Dask scheduler address for --engine dask (default: start a local cluster)",
    )


def _subset_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("--levels", nargs="+", default=None,
                   help="replay only these levels (default: every level)")
    p.add_argument("--metrics", nargs="+", default=None,
                   help="replay only these metrics (default: every watched metric)")


def _period_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("--from", dest="start", default=None,
                   help="first day or hour, ISO-8601, UTC (default: the first scored hour; "
                   "an earlier one is moved to it)")
    p.add_argument("--to", dest="end", default=None,
                   help="end day or hour, exclusive, ISO-8601 (default: the end of the history)")


def _force_arg(p: argparse.ArgumentParser, what: str) -> None:
    p.add_argument("--force", action="store_true",
                   help=f"replace {what} (default: refuse to write over anything)")


def _workspace_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("workspace", help="workspace folder, or its workspace.toml")


QUIET_HELP = ("no progress bars or informational log messages on stderr; results, "
              "warnings and errors still print (default: show them)")

EXAMPLES = {
    "check": ["calibrate check sample_data"],
    "replay": ["calibrate replay sample_data --out alerts.csv",
               "calibrate replay sample_data --config tuned.toml --out alerts.csv "
               "--scores scores.parquet"],
    "score": ["calibrate score sample_data --alerts alerts.csv --json figures.json",
              "calibrate score sample_data --alerts alerts.csv --from 2026-04-06 --to 2026-05-04"],
    "volume": ["calibrate volume sample_data --config tuned.toml --csv volume.csv",
               "calibrate volume sample_data --alerts alerts.csv"],
    "tune": ["calibrate tune sample_data --out tuned.toml --report reports/first --trials 100",
             "calibrate tune sample_data --out tuned.toml --storage study.journal "
             "--max-miss-rate 0.2"],
    "report": ["calibrate report sample_data --config tuned.toml --out reports/tuned",
               "calibrate report sample_data --study --out reports/so-far"],
    "retune": ["calibrate retune sample_data --verdicts reviewed.csv --previous tuned.toml "
               "--out tuned-v2.toml --report reports/v2"],
    "review": ["calibrate review sample_data --config tuned.toml --verdicts reviewed.csv "
               "--incidents-out added-incidents.csv"],
    "demo": ["calibrate demo --out demo-output --force"],
}


def _command(sub, name: str, help: str) -> argparse.ArgumentParser:
    """A sub-command whose help ends with examples; it takes --quiet too."""
    lines = "\n".join(f"  {e}" for e in EXAMPLES[name])
    p = sub.add_parser(name, help=help, description=help[0].upper() + help[1:] + ".",
                       epilog=f"example{'s' if len(EXAMPLES[name]) > 1 else ''}:\n{lines}",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    # SUPPRESS: absent here, the global flag's value stands
    p.add_argument("-q", "--quiet", action="store_true", default=argparse.SUPPRESS,
                   help=QUIET_HELP)
    return p


def _version() -> str:
    try:
        return importlib.metadata.version("calibrate")
    except importlib.metadata.PackageNotFoundError:  # run from a source tree
        return "unknown (not installed)"


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog="calibrate",
        description="Calibrate STL + Tukey-fence alert thresholds against known incidents.",
        epilog="exit codes:\n  0    done\n  1    bad input, or a file that cannot be "
        "written\n  2    usage error (options)\n  3    tune: no setting meets the goal\n"
        "  130  interrupted (Ctrl-C)\n  143  terminated (SIGTERM)\n\n"
        "examples:\n  calibrate demo\n  calibrate COMMAND --help",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    ap.add_argument("--version", action="version", version=f"calibrate {_version()}",
                    help="print the version and exit")
    ap.add_argument("-q", "--quiet", action="store_true", default=False, help=QUIET_HELP)
    sub = ap.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = _command(sub, "check", "validate a workspace and summarise its data")
    _workspace_arg(p)

    p = _command(sub, "replay", "replay history hour by hour and write the alerts")
    _workspace_arg(p)
    p.add_argument(
        "--config", default=None,
        help="tuned config to replay (default: the workspace's [detector] settings)"
    )
    p.add_argument("--out", required=True, help="alerts file, .csv or .csv.gz (required)")
    p.add_argument("--scores", default=None,
                   help="also write the per-hour scores here, .parquet, .csv or .csv.gz "
                   "(default: not written)")
    _force_arg(p, "existing --out and --scores files")
    _subset_args(p)
    _engine_args(p)

    p = _command(sub, "score", "score an alerts file against the incidents")
    _workspace_arg(p)
    p.add_argument("--alerts", required=True,
                   help="alerts file written by `calibrate replay` (required)")
    p.add_argument("--json", default=None,
                   help="also write the figures as JSON here (default: not written)")
    _force_arg(p, "an existing --json file")
    p.add_argument(
        "--related",
        action="store_true",
        help="also credit alerts on ancestor/descendant series, shown separately "
        "(default: same series only)",
    )
    _period_args(p)

    p = _command(sub, "volume", "alerts per team per week and per analyst per day")
    _workspace_arg(p)
    p.add_argument("--config", default=None,
                   help="tuned config to replay, or that an --alerts file came from "
                   "(default: the workspace's [detector] settings)")
    p.add_argument("--alerts", default=None,
                   help="count an existing alerts file instead of replaying (default: replay)")
    p.add_argument("--csv", default=None,
                   help="also write the table here (default: not written)")
    _force_arg(p, "an existing --csv file")
    _period_args(p)
    _engine_args(p)

    p = _command(sub, "tune", "search settings for the least alerts meeting the goal")
    _workspace_arg(p)
    p.add_argument("--out", required=True, help="tuned config to write, .toml (required)")
    p.add_argument("--report", default=None,
                   help="also write the report into this folder, e.g. reports/NAME "
                   "(default: no report)")
    p.add_argument("--trials", type=int, default=None,
                   help="trial budget of the whole study (default: [search] trials, else 60)")
    p.add_argument(
        "--storage",
        default=None,
        help="Optuna storage URL or journal file "
        "(default: .calibrate/study.journal in the workspace)",
    )
    p.add_argument("--study", default=None,
                   help="study name (default: derived from the workspace's inputs and goal)")
    p.add_argument("--max-miss-rate", type=float, default=None,
                   help="target miss rate, 0 to 1 (default: [goal] max_miss_rate)")
    p.add_argument(
        "--max-alerts-per-analyst-day",
        type=float,
        default=None,
        help="alert budget of every team (default: [goal] max_alerts_per_analyst_day)",
    )
    _force_arg(p, "an existing --out file and this tool's files in an existing --report "
                  "folder (other files there are kept)")
    _engine_args(p)

    p = _command(sub, "report", "write the calibration report for a config or a study")
    _workspace_arg(p)
    p.add_argument("--config", default=None,
                   help="tuned config to report on (default: none; give this or --study)")
    p.add_argument(
        "--study", nargs="?", const="", default=None, metavar="NAME",
        help="report on a study's best trial so far, running no trial (give this or "
        "--config; NAME default: the one `calibrate tune` derives from the workspace)")
    p.add_argument("--storage", default=None,
                   help="the study's Optuna storage URL or journal file, with --study "
                   "(default: .calibrate/study.journal in the workspace)")
    p.add_argument("--out", required=True, help="report folder (required)")
    _force_arg(p, "this tool's files in an existing --out folder (other files there are kept)")
    _engine_args(p)

    p = _command(sub, "retune", "merge analysts' verdicts and tune again")
    _workspace_arg(p)
    p.add_argument("--verdicts", required=True,
                   help="reviewed alerts file with a verdict column (required)")
    p.add_argument("--previous", default=None,
                   help="tuned config the reviewed alerts came from, warm-started from "
                   "(default: the workspace's [detector] settings)")
    p.add_argument("--added-incidents", default=None,
                   help="incidents added in `calibrate review` (its --incidents-out file), "
                        "merged into the labels (default: none)")
    p.add_argument("--out", required=True, help="new tuned config to write, .toml (required)")
    p.add_argument("--report", default=None,
                   help="comparison report folder (default: no report)")
    p.add_argument("--trials", type=int, default=None,
                   help="trial budget of the new study (default: [search] trials, else 60)")
    _force_arg(p, "existing --out, merged incidents, known false alarms and this tool's files "
                  "in the report folder")
    _engine_args(p)

    p = _command(sub, "review", "review alerts and label incidents in the browser")
    _workspace_arg(p)
    p.add_argument("--config", default=None,
                   help="tuned config whose alerts to review (default: the workspace's "
                        "[detector]); the plots show its replay")
    p.add_argument("--alerts", default=None,
                   help="review only the alerts of this file, from a replay of --config "
                        "(default: every alert of the replay)")
    p.add_argument("--verdicts", required=True,
                   help="verdicts file (.csv) the page saves to, in the format "
                        "`retune --verdicts` reads; an existing one is resumed (required)")
    p.add_argument("--incidents-out", default=None,
                   help="incidents file (.csv) for incidents added on the page (never the "
                        "workspace's own incidents file; default: none)")
    p.add_argument("--port", type=int, default=0, help="port (default: a free one)")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1: this machine only)")
    p.add_argument("--no-browser", action="store_true",
                   help="do not open a browser (default: open one)")
    _engine_args(p)

    p = _command(sub, "demo", "run the whole job on the bundled sample data")
    p.add_argument("--out", default="demo-output",
                   help="folder for the demo's outputs (default: demo-output)")
    p.add_argument("--trials", type=int, default=None,
                   help="trial budget of the tune (default: the sample's [search] trials, 40)")
    _force_arg(p, "the demo's own files in an existing --out folder (other files are kept)")
    _engine_args(p)
    return ap


def cmd_check(args) -> int:
    from calibrate.inputs.checks import check_workspace
    from calibrate.inputs.workspace import load_workspace

    summary = check_workspace(load_workspace(args.workspace))
    for line in summary.lines():
        print(line)
    return 0


def cmd_replay(args) -> int:
    from calibrate import api
    from calibrate.outputs import (
        check_outputs,
        load_config,
        table_format,
        write_table,
        write_table_blocks,
    )

    check_outputs((args.out, args.scores), args.force)
    for path in (args.out, args.scores):
        if path:
            table_format(path)  # a format we cannot write is refused before the replay
    ses = api.open_session(args.workspace, incidents=False)
    config = load_config(args.config) if args.config else ses.ws.detector
    result = api.replay_session(
        ses,
        config,
        config_name=args.config,
        levels=args.levels,
        metrics=args.metrics,
        engine=args.engine,
        workers=args.workers,
        scheduler=args.scheduler,
        progress=not args.quiet,
    )
    alerts = result.alerts_frame()
    write_table(Path(args.out), alerts, force=args.force)
    print(f"{len(alerts)} alerts written to {args.out}")
    if args.scores:
        # block by block: the whole table would not fit in memory for a large history
        write_table_blocks(Path(args.scores), result.score_blocks(), force=args.force)
        print(f"per-hour scores written to {args.scores}")
    return 0


def _period(ses, args) -> tuple[int, int]:
    start = ses.hour_index(args.start, "--from", 0)
    end = ses.hour_index(args.end, "--to", ses.history.n_hours)
    if end <= start:
        raise CalibrationError("--from/--to: the period is empty")
    return start, end


def _scored_lines(ses, eps, start: int, end: int, first: int) -> list[str]:
    """Where the counts start (the first scored hour, or --from if later), and the
    alerts of the period left out because they come before it."""
    from calibrate import api

    scored, _ = api.scored_period(ses, start, end, first)
    when = f"{ses.history.hours[scored]:%Y-%m-%dT%H:%MZ}"
    lines = [f"counted from {when}: the first scored hour (no alert can be raised during "
             "the decomposition window's warm-up before it), or --from if later"]
    early = int(((eps.start >= start) & (eps.start < scored)).sum())
    if early:
        lines.append(f"note: {early} alert(s) of the file start before {when}: not counted")
    return lines


def cmd_score(args) -> int:
    from calibrate import api
    from calibrate.inputs.incidents import read_text_csv
    from calibrate.outputs import check_outputs, write_text
    from calibrate.scoring.alerts_file import episodes_from_alerts_frame
    from calibrate.scoring.matching import route_teams

    check_outputs((args.json,), args.force)
    ses = api.open_session(args.workspace)
    api.require_replayable(ses)  # the workspace's detector could raise no alert at all
    path = Path(args.alerts)
    if not path.is_file():
        raise CalibrationError(f"{path}: no such alerts file")
    eps = episodes_from_alerts_frame(read_text_csv(path), ses.ws, ses.history, str(path))
    eps = route_teams(eps, ses.routes)
    start, end = _period(ses, args)
    first = api.first_scored_hour(ses.ws.detector, ses.ws)
    figs = api.score_episodes(ses, eps, start, end, related=args.related, first_scored=first)
    data = figs.to_json_dict()
    for line in [*_scored_lines(ses, eps, start, end, first), *format_figures(data)]:
        print(line)
    if args.json:
        write_text(Path(args.json), json.dumps(data, indent=2, default=str), force=args.force)
        print(f"figures written to {args.json}")
    return 0


def format_figures(d: dict) -> list[str]:
    """Plain-text summary of a figures dict (the JSON of `calibrate score`)."""

    def pct(x):
        return "n/a" if x is None else f"{100 * x:.1f}%"

    lines = [
        f"incidents {d['incidents']}: caught {d['caught']}, missed {d['missed']}",
        f"miss rate {pct(d['miss_rate'])} (95% interval {pct(d['miss_rate_low'])}"
        f" to {pct(d['miss_rate_high'])})",
        f"alerts {d['alerts']}: true {d['true_alerts']}, false {d['false_alerts']},"
        f" precision {pct(d['precision'])}",
        "detection delay: median "
        + ("n/a" if d["delay_median_hours"] is None else f"{d['delay_median_hours']:.1f} h")
        + ", 90th percentile "
        + ("n/a" if d["delay_p90_hours"] is None else f"{d['delay_p90_hours']:.1f} h"),
    ]
    for team, t in sorted(d.get("per_team", {}).items()):
        rate = t.get("alerts_per_analyst_day")
        budget = t.get("budget")
        rate_s = "n/a" if rate is None else f"{rate:.2f}"
        extra = "" if budget is None else f" (budget {budget:g})"
        lines.append(f"team {team}: {t['alerts']} alerts, {rate_s} per analyst per day{extra}")
    for metric, m in sorted(d.get("per_metric", {}).items()):
        caught = f"caught {m['caught']} of {m['incidents']}" if m["incidents"] else "no incidents"
        lines.append(f"metric {metric}: {caught}, {m['alerts']} alerts")
    for det, r in sorted(d.get("per_detector", {}).items()):
        lines.append(f"detector {det}: {r['alerts']} alerts, {r['true_alerts']} true")
    if d.get("already_alerting"):
        lines.append(f"already alerting: {d['already_alerting']} incident(s) began while an "
                     "earlier alert was still running (not counted as caught)")
    if d.get("before_first_scored"):
        ids = ", ".join(d.get("before_first_scored_ids", []))
        lines.append(f"before the first scored hour: {d['before_first_scored']} incident(s) "
                     f"({ids}) cannot be caught; left out of recall")
    return lines


def cmd_volume(args) -> int:
    from calibrate import api
    from calibrate.inputs.incidents import read_text_csv
    from calibrate.outputs import check_outputs, load_config, write_table
    from calibrate.scoring.alerts_file import episodes_from_alerts_frame
    from calibrate.scoring.matching import route_teams

    check_outputs((args.csv,), args.force)
    ses = api.open_session(args.workspace, incidents=False)
    config = load_config(args.config) if args.config else ses.ws.detector
    if args.alerts:
        # the file's alerts count from the first scored hour of the config they came from
        api.require_replayable(ses, config, args.config)
        path = Path(args.alerts)
        if not path.is_file():
            raise CalibrationError(f"{path}: no such alerts file")
        eps = episodes_from_alerts_frame(read_text_csv(path), ses.ws, ses.history, str(path))
        eps = route_teams(eps, ses.routes)
    else:
        eps = api.replay_session(
            ses, config, config_name=args.config, engine=args.engine, workers=args.workers,
            scheduler=args.scheduler, progress=not args.quiet,
        ).episodes
    start, end = _period(ses, args)
    first = api.first_scored_hour(config, ses.ws)
    for line in _scored_lines(ses, eps, start, end, first):
        print(line)
    table = api.alert_volume(ses, eps, start, end, first_scored=first)
    with_budget = "budget" in table.columns
    print(
        f"{'team':<16}{'week':<10}{'alerts':>7}{'per analyst-day':>17}"
        + (f"{'budget':>8}" if with_budget else "")
    )

    def row_line(team, week, alerts, rate, budget=None, over=False) -> str:
        line = f"{team:<16}{week:<10}{alerts:>7}{rate:>17.2f}"
        if with_budget:
            line += f"{budget:>8g}" + ("  over budget" if over else "")
        return line

    for row in table.itertuples(index=False):
        print(row_line(row.team, row.week, row.alerts, row.alerts_per_analyst_day,
                       getattr(row, "budget", None), getattr(row, "over_budget", False)))
    for team, row in api.volume_per_team(table).iterrows():
        print(row_line(team, "all", int(row["alerts"]), row["alerts_per_analyst_day"],
                       row.get("budget"), bool(row.get("over_budget", False))))
    if args.csv:
        write_table(Path(args.csv), table, force=args.force)
    return 0


def cmd_tune(args) -> int:
    from calibrate.commands import cli_tune

    return cli_tune(args)


def cmd_report(args) -> int:
    from calibrate.commands import cli_report

    return cli_report(args)


def cmd_retune(args) -> int:
    from calibrate.commands import cli_retune

    return cli_retune(args)


def cmd_review(args) -> int:
    from calibrate.feedback.review_app import review

    review(args.workspace, verdicts=args.verdicts, config=args.config, alerts=args.alerts,
           incidents_out=args.incidents_out, host=args.host, port=args.port,
           open_browser=not args.no_browser, engine=args.engine, workers=args.workers,
           scheduler=args.scheduler, say=lambda line: print(line, flush=True))
    return 0


def cmd_demo(args) -> int:
    from calibrate.demo import run_demo

    return run_demo(args)


COMMANDS = {
    "check": cmd_check,
    "replay": cmd_replay,
    "score": cmd_score,
    "volume": cmd_volume,
    "tune": cmd_tune,
    "report": cmd_report,
    "retune": cmd_retune,
    "review": cmd_review,
    "demo": cmd_demo,
}


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised like Ctrl-C's KeyboardInterrupt so the same cleanup runs."""


EXIT_CODES = {signal.SIGINT: 130, signal.SIGTERM: 143}  # 128 + the signal's number


def _stop_handler(command: str) -> Callable[[int, Any], None]:
    """A handler for SIGINT and SIGTERM: the first one stops the command through
    an exception (so files and worker pools are closed on the way out) and
    silences logging (libraries would log the interrupted work with a traceback);
    a second one, while that cleanup runs, ends the process at once."""
    stopping: list[int] = []

    def handler(signum: int, frame: Any) -> None:
        from calibrate.engine.executors import defer_stop

        if not stopping and defer_stop(signum):
            return  # delivered again once the workers being started are up
        if stopping:
            _say_stopped(command, signum)
            os._exit(EXIT_CODES[signum])
        stopping.append(signum)
        logging.disable(logging.CRITICAL)
        raise Terminated if signum == signal.SIGTERM else KeyboardInterrupt

    return handler


def _say_stopped(command: str, signum: int) -> None:
    what = "terminated" if signum == signal.SIGTERM else "interrupted"
    print(f"calibrate {command}: {what}", file=sys.stderr, flush=True)


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    previous = {}
    logging_off = logging.root.manager.disable
    if args.quiet:
        logging.disable(max(logging_off, logging.INFO))
    if threading.current_thread() is threading.main_thread():
        handler = _stop_handler(args.command)
        previous = {sig: signal.signal(sig, handler) for sig in EXIT_CODES}
    try:
        return COMMANDS[args.command](args)
    except UsageError as exc:
        print(f"calibrate {args.command}: {exc}", file=sys.stderr)
        return errors.USAGE
    except CalibrationError as exc:
        print(f"calibrate {args.command}: {exc}", file=sys.stderr)
        return errors.BAD_INPUT
    except OSError as exc:
        # a full disk or a read-only folder met outside the writers that say so themselves
        if exc.errno not in (errno.ENOSPC, errno.EDQUOT, errno.EROFS):
            raise
        from calibrate.outputs import os_error

        print(f"calibrate {args.command}: {os_error(exc.filename or 'a file', exc)}",
              file=sys.stderr)
        return errors.BAD_INPUT
    except KeyboardInterrupt as exc:
        signum = signal.SIGTERM if isinstance(exc, Terminated) else signal.SIGINT
        _say_stopped(args.command, signum)
        return EXIT_CODES[signum]
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)
        logging.disable(logging_off)


if __name__ == "__main__":
    sys.exit(main())
