"""Writing the calibration report (stage 9): what a team lead reads before approving a
rollout.

`write_report(ses, result, out_dir)` writes the report of a `TuneResult`;
`write_config_report(ses, config, out_dir)` that of any config
(`calibrate report --config`). Each replays the settings, computes the content
(`calibrate.reporting.build`), renders it (`calibrate.reporting.render`: ``index.html``,
``report.md``, ``summary.json`` and the PNG plots; ``settings.csv`` holds the settings as
one flat table, ``alerts-for-review.csv`` the alerts to review) and writes the folder in
one step (`calibrate.outputs.write_folder`), with an optional progress bar over those
steps.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

from tqdm.auto import tqdm

from calibrate import api
from calibrate.engine.replay import ReplayResult
from calibrate.errors import CalibrationError
from calibrate.feedback.review import review_frame
from calibrate.outputs import write_folder
from calibrate.reporting.build import build_report_data
from calibrate.reporting.formats import plain
from calibrate.reporting.render import render_html, render_markdown, render_plots, summary_dict
from calibrate.reporting.report_data import ReportData
from calibrate.reporting.settings_table import settings_csv
from calibrate.settings import DetectorConfig
from calibrate.tuning import rolling, summaries


def write_report_data(data: ReportData, out_dir: str | Path, force: bool = True,
                      extra: Mapping[str, bytes] | None = None) -> Path:
    """Render `data` into `out_dir` (built in a temporary folder, then moved in place)."""
    out = Path(out_dir)
    if out.exists() and not force:
        raise CalibrationError(f"{out}: already exists; pass --force to replace it")
    if out.exists() and not out.is_dir():
        raise CalibrationError(f"{out}: exists and is not a folder")
    images = render_plots(data)
    files: dict[str, bytes] = dict(images)
    files["index.html"] = render_html(data, images).encode("utf-8")
    files["report.md"] = render_markdown(data).encode("utf-8")
    files["summary.json"] = json.dumps(summary_dict(data), indent=2,
                                       default=plain).encode("utf-8")
    files.update(extra or {})
    return write_report_data_files(files, out, force=force)


def write_report_data_files(files: Mapping[str, bytes], out_dir: str | Path,
                            force: bool = False) -> Path:
    """Write `files` as the folder `out_dir` (`calibrate.outputs.write_folder`: built
    complete first; with `force` only this tool's files in an existing folder change)."""
    return write_folder(files, out_dir, force=force)


def _review_csv(result: ReplayResult) -> bytes:

    return review_frame(result.alerts_frame()).to_csv(index=False).encode("utf-8")


def _extra_files(ses: api.Session, config: DetectorConfig, chosen: ReplayResult
                 ) -> dict[str, bytes]:
    """The alerts to review and the settings as one flat table (`settings_table`)."""
    return {"alerts-for-review.csv": _review_csv(chosen),
            "settings.csv": settings_csv(config, list(ses.ws.levels), ses.ws.metric_names)}


def steps_bar(progress: bool, total: int = 4) -> tqdm:
    """A progress bar over a report's steps (the replays, figures, plots and files) on
    a terminal: nothing without `progress`, nor when stderr goes to a file or a pipe
    (where it would only precede an error line)."""
    return tqdm(total=total, desc="report", unit="step", disable=None if progress else True,
                leave=False)


def step(bar: tqdm, what: str, work: Callable[[], Any]) -> Any:
    bar.set_postfix_str(what)
    out = work()
    bar.update(1)
    return out


def write_config_report(
    ses: api.Session,
    config: DetectorConfig,
    out_dir: str | Path,
    current: DetectorConfig | None = None,
    split_hour: int | None = None,
    *,
    force: bool = True,
    source: str = "",
    progress: bool = False,
    **replay_kwargs: Any,
) -> ReportData:
    """Replay `config` (and the current settings) and write its report to `out_dir`;
    `progress` shows a bar over the steps."""
    current = current or ses.ws.detector
    bar = steps_bar(progress)
    rp = api.make_replayer(ses, progress=False, **replay_kwargs)
    try:
        chosen = step(bar, "replay", lambda: rp.replay(config))
        cur = step(bar, "replay of today's", lambda: rp.replay(current))
    finally:
        rp.close()
    first = max(api.first_scored_hour(config, ses.ws), api.first_scored_hour(current, ses.ws))
    data = step(bar, "figures", lambda: build_report_data(
        ses, chosen, current=cur, first_hour=first, split_hour=split_hour,
        title="Calibration report", source=source))
    step(bar, "plots and files", lambda: write_report_data(
        data, out_dir, force=force, extra=_extra_files(ses, config, chosen)))
    bar.close()
    return data


def write_report(ses: api.Session, result: Any, out_dir: str | Path, *, force: bool = True,
                 progress: bool = False, steps: tqdm | None = None,
                 derived_from_held_out: bool = False,
                 **replay_kwargs: Any) -> ReportData:
    """Write the report of a tuning run (`calibrate.tuning.search.TuneResult`) to `out_dir`,
    judged against the goal the run was tuned to (`result.goal`, when set).
    `progress` shows a bar over the steps (or they advance `steps`, a caller's bar)."""
    goal = getattr(result, "goal", None)
    if goal is not None and goal != ses.ws.goal:
        ses = replace(ses, ws=replace(ses.ws, goal=goal))
    bar = steps if steps is not None else steps_bar(progress)
    rp = api.make_replayer(ses, progress=False, **replay_kwargs)
    try:
        chosen = step(bar, "replay", lambda: rp.replay(result.config))
        cur = step(bar, "replay of today's", lambda: rp.replay(result.current))
    finally:
        rp.close()
    prov = dict(getattr(result, "provenance", {}) or {})
    prov.setdefault("study_name", getattr(result, "study_name", None))
    prov.setdefault("storage", getattr(result, "storage", None))
    prov = {k: v for k, v in prov.items() if v is not None}
    data = step(bar, "figures", lambda: build_report_data(
        ses, chosen, current=cur, first_hour=result.first_hour, split_hour=result.split_hour,
        trials=result.trials, front=getattr(result, "pareto", None),
        feasible=result.feasible, reason=result.reason or "",
        holdout_warning=result.holdout_warning or "", provenance=prov,
        title="Calibration report", source=f"study {getattr(result, 'study_name', '')}",
        derived_from_held_out=derived_from_held_out,
    ))
    if getattr(result, "folds", None):

        data.validation.update(
            verdict=result.verdict, reasons=list(result.verdict_reasons),
            folds=summaries.fold_rows(result),
            stability={n: [str(x) for x in v]
                       for n, v in rolling.stability(result.folds).items()})
    step(bar, "plots and files", lambda: write_report_data(
        data, out_dir, force=force, extra=_extra_files(ses, result.config, chosen)))
    if steps is None:
        bar.close()
    return data
