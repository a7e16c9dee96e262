"""`calibrate` command line: parse arguments, call the API, map errors to exit codes.

Every command is one function `cmd_NAME(args) -> int`; expected errors
(`CalibrationError`) print one line on stderr and exit 1, never a traceback.
Ctrl-C (SIGINT) and SIGTERM stop a command the same way, cleaning up on the way
out, with one line and exit 130 or 143.
"""

from __future__ import annotations

import argparse
import errno
import json
import logging
import os
import signal
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from calibrate.errors import CalibrationError


def _engine_args(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--engine",
        choices=("local", "serial", "dask"),
        default="local",
        help="where decompositions run (default: processes on this machine)",
    )
    p.add_argument("--workers", type=int, default=None, help="worker processes (default: cores)")
    p.add_argument(
        "--scheduler",
        default=None,
        help="Dask scheduler address for --engine dask (default: a local cluster)",
    )


def _subset_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("--levels", nargs="+", default=None, help="replay only these levels")
    p.add_argument("--metrics", nargs="+", default=None, help="replay only these metrics")


def _period_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("--from", dest="start", default=None, help="first day/hour (ISO-8601, UTC)")
    p.add_argument("--to", dest="end", default=None, help="end day/hour, exclusive (ISO-8601)")


def _force_arg(p: argparse.ArgumentParser, what: str) -> None:
    p.add_argument("--force", action="store_true",
                   help=f"replace {what} (default: refuse to write over anything)")


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog="calibrate",
        description="Calibrate STL + Tukey-fence alert thresholds against known incidents.",
    )
    sub = ap.add_subparsers(dest="command", required=True)

    p = sub.add_parser("check", help="validate a workspace and summarise its data")
    p.add_argument("workspace")

    p = sub.add_parser("replay", help="replay history hour by hour and write the alerts")
    p.add_argument("workspace")
    p.add_argument(
        "--config", default=None, help="tuned config (default: the workspace's [detector])"
    )
    p.add_argument("--out", required=True, help="alerts file (.csv)")
    p.add_argument("--scores", default=None, help="per-hour scores file (.parquet or .csv)")
    _force_arg(p, "existing --out and --scores files")
    _subset_args(p)
    _engine_args(p)

    p = sub.add_parser("score", help="score an alerts file against the incidents")
    p.add_argument("workspace")
    p.add_argument("--alerts", required=True)
    p.add_argument("--json", default=None, help="write the figures as JSON here")
    _force_arg(p, "an existing --json file")
    p.add_argument(
        "--related",
        action="store_true",
        help="also credit alerts on ancestor/descendant series (shown separately)",
    )
    _period_args(p)

    p = sub.add_parser("volume", help="alerts per team per week and per analyst per day")
    p.add_argument("workspace")
    p.add_argument("--config", default=None, help="config to replay (default: [detector])")
    p.add_argument("--alerts", default=None, help="count an existing alerts file instead")
    p.add_argument("--csv", default=None, help="write the table here")
    _force_arg(p, "an existing --csv file")
    _period_args(p)
    _engine_args(p)

    p = sub.add_parser("tune", help="search settings for the least alerts meeting the goal")
    p.add_argument("workspace")
    p.add_argument("--out", required=True, help="tuned config to write (.toml)")
    p.add_argument("--report", default=None, help="report folder (e.g. reports/NAME)")
    p.add_argument("--trials", type=int, default=None, help="trial budget of the study")
    p.add_argument(
        "--storage",
        default=None,
        help="Optuna storage URL or journal file (default: a file in the workspace)",
    )
    p.add_argument("--study", default=None, help="study name (default: derived from the inputs)")
    p.add_argument("--max-miss-rate", type=float, default=None, help="override [goal]")
    p.add_argument(
        "--max-alerts-per-analyst-day",
        type=float,
        default=None,
        help="override [goal] for every team",
    )
    _force_arg(p, "an existing --out file and this tool's files in an existing --report "
                  "folder (other files there are kept)")
    _engine_args(p)

    p = sub.add_parser("report", help="write the calibration report for a config or a study")
    p.add_argument("workspace")
    p.add_argument("--config", default=None, help="tuned config to report on")
    p.add_argument(
        "--study", nargs="?", const="", default=None, metavar="NAME",
        help="report on a study's best trial so far, running no trial (NAME: default the "
        "one `calibrate tune` derives from the workspace)")
    p.add_argument("--storage", default=None,
                   help="the study's Optuna storage URL or journal file (with --study)")
    p.add_argument("--out", required=True, help="report folder")
    _force_arg(p, "this tool's files in an existing --out folder (other files there are kept)")
    _engine_args(p)

    p = sub.add_parser("retune", help="merge analysts' verdicts and tune again")
    p.add_argument("workspace")
    p.add_argument("--verdicts", required=True, help="reviewed alerts file (verdict column)")
    p.add_argument("--previous", default=None, help="previous tuned config (warm start)")
    p.add_argument("--added-incidents", default=None,
                   help="incidents added in `calibrate review` (its --incidents-out file), "
                        "merged into the labels")
    p.add_argument("--out", required=True)
    p.add_argument("--report", default=None)
    p.add_argument("--trials", type=int, default=None)
    _force_arg(p, "existing --out, merged incidents, known false alarms and this tool's files "
                  "in the report folder")
    _engine_args(p)

    p = sub.add_parser("review", help="review alerts and label incidents in the browser")
    p.add_argument("workspace")
    p.add_argument("--config", default=None,
                   help="tuned config whose alerts to review (default: the workspace's "
                        "[detector]); the plots show its replay")
    p.add_argument("--alerts", default=None,
                   help="review only the alerts of this file (from a replay of --config)")
    p.add_argument("--verdicts", required=True,
                   help="verdicts file (.csv) the page saves to, in the format "
                        "`retune --verdicts` reads; an existing one is resumed")
    p.add_argument("--incidents-out", default=None,
                   help="incidents file (.csv) for incidents added on the page (never the "
                        "workspace's own incidents file)")
    p.add_argument("--port", type=int, default=0, help="port (default: a free one)")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1: this machine only)")
    p.add_argument("--no-browser", action="store_true", help="do not open a browser")
    _engine_args(p)

    p = sub.add_parser("demo", help="run the whole job on the bundled sample data")
    p.add_argument("--out", default="demo-output", help="folder for the demo's outputs")
    p.add_argument("--trials", type=int, default=None)
    _force_arg(p, "the demo's own files in an existing --out folder (other files are kept)")
    _engine_args(p)
    return ap


def cmd_check(args) -> int:
    from calibrate.checks import check_workspace
    from calibrate.workspace import load_workspace

    summary = check_workspace(load_workspace(args.workspace))
    for line in summary.lines():
        print(line)
    return 0


def cmd_replay(args) -> int:
    from calibrate import api
    from calibrate.outputs import check_outputs, load_config, write_table

    check_outputs((args.out, args.scores), args.force)
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
    )
    alerts = result.alerts_frame()
    write_table(Path(args.out), alerts, force=args.force)
    print(f"{len(alerts)} alerts written to {args.out}")
    if args.scores:
        write_table(Path(args.scores), result.scores_frame(), force=args.force)
        print(f"per-hour scores written to {args.scores}")
    return 0


def _period(ses, args) -> tuple[int, int]:
    start = ses.hour_index(args.start, "--from", 0)
    end = ses.hour_index(args.end, "--to", ses.history.n_hours)
    if end <= start:
        raise CalibrationError("--from/--to: the period is empty")
    return start, end


def cmd_score(args) -> int:
    from calibrate import api
    from calibrate.incidents import read_text_csv
    from calibrate.outputs import check_outputs, write_text
    from calibrate.scoring import episodes_from_alerts_frame, route_teams

    check_outputs((args.json,), args.force)
    ses = api.open_session(args.workspace)
    api.require_replayable(ses)  # the workspace's detector could raise no alert at all
    path = Path(args.alerts)
    if not path.is_file():
        raise CalibrationError(f"{path}: no such alerts file")
    eps = episodes_from_alerts_frame(read_text_csv(path), ses.ws, ses.history, str(path))
    eps = route_teams(eps, ses.routes)
    start, end = _period(ses, args)
    figs = api.score_episodes(ses, eps, start, end, related=args.related)
    data = figs.to_json_dict()
    for line in format_figures(data):
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
    from calibrate.incidents import read_text_csv
    from calibrate.outputs import check_outputs, load_config, write_table
    from calibrate.scoring import episodes_from_alerts_frame, route_teams

    check_outputs((args.csv,), args.force)
    ses = api.open_session(args.workspace, incidents=False)
    if args.alerts:
        path = Path(args.alerts)
        if not path.is_file():
            raise CalibrationError(f"{path}: no such alerts file")
        eps = episodes_from_alerts_frame(read_text_csv(path), ses.ws, ses.history, str(path))
        eps = route_teams(eps, ses.routes)
    else:
        config = load_config(args.config) if args.config else ses.ws.detector
        eps = api.replay_session(
            ses, config, config_name=args.config, engine=args.engine, workers=args.workers,
            scheduler=args.scheduler,
        ).episodes
    start, end = _period(ses, args)
    if not args.alerts:
        first = api.first_scored_hour(config, ses.ws)
        when = ses.history.hours[min(first, ses.history.n_hours - 1)]
        print(f"first scored hour: {when:%Y-%m-%dT%H:%MZ} (no alert can be raised during "
              "the decomposition window's warm-up before it)")
    table = api.alert_volume(ses, eps, start, end)
    with_budget = "budget" in table.columns
    print(
        f"{'team':<16}{'week':<10}{'alerts':>7}{'per analyst-day':>17}"
        + (f"{'budget':>8}" if with_budget else "")
    )
    for row in table.itertuples(index=False):
        line = f"{row.team:<16}{row.week:<10}{row.alerts:>7}{row.alerts_per_analyst_day:>17.2f}"
        if with_budget:
            line += f"{row.budget:>8g}" + ("  over budget" if row.over_budget else "")
        print(line)
    if args.csv:
        write_table(Path(args.csv), table, force=args.force)
    return 0


def cmd_tune(args) -> int:
    from calibrate.search import cli_tune

    return cli_tune(args)


def cmd_report(args) -> int:
    from calibrate.report import cli_report

    return cli_report(args)


def cmd_retune(args) -> int:
    from calibrate.retune import cli_retune

    return cli_retune(args)


def cmd_review(args) -> int:
    from calibrate.review_app import review

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
    if threading.current_thread() is threading.main_thread():
        handler = _stop_handler(args.command)
        previous = {sig: signal.signal(sig, handler) for sig in EXIT_CODES}
    try:
        return COMMANDS[args.command](args)
    except CalibrationError as exc:
        print(f"calibrate {args.command}: {exc}", file=sys.stderr)
        return 1
    except OSError as exc:
        # a full disk or a read-only folder met outside the writers that say so themselves
        if exc.errno not in (errno.ENOSPC, errno.EDQUOT, errno.EROFS):
            raise
        from calibrate.outputs import os_error

        print(f"calibrate {args.command}: {os_error(exc.filename or 'a file', exc)}",
              file=sys.stderr)
        return 1
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
