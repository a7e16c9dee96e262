"""Re-tuning from analysts' verdicts on reviewed alerts (`calibrate retune`).

The reviewed file is an alerts export (`calibrate.feedback.review.review_frame`) with the
``verdict`` column filled in. Its alert ids refer to a replay of the previous
config, so that config is replayed again to find each alert's episode, and every
row's level, keys, metric and start are checked against it. Then:

- ``real`` alert not covered by a labelled incident -> a new incident;
- ``real`` alert already covered -> listed as already applied, nothing changes;
- ``false`` -> a known false alarm window the search must avoid (``known_false``);
- ``duplicate`` -> counted only; blank -> not reviewed.

Unknown alert ids, invalid verdicts, rows that do not match the replay and
conflicting verdicts for one alert are `InputError`s naming file, row and column.
The user's files are only read: merged incidents, the new config and the
comparison report are new files.
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from calibrate import api
from calibrate.detection.episodes import Episodes
from calibrate.engine.executors import make_executor
from calibrate.engine.replay import ReplayResult, alerts_frame, sweep_codes
from calibrate.errors import InputError
from calibrate.feedback.review import VERDICTS, read_reviewed
from calibrate.inputs.incidents import Incidents, incidents_from_frame, read_text_csv
from calibrate.outputs import check_outputs, write_config, write_table
from calibrate.reporting.build import settings_rows
from calibrate.reporting.render import CSS
from calibrate.reporting.report import write_report, write_report_data_files
from calibrate.scoring.curves import multiplier_curve
from calibrate.scoring.figures import HELD_OUT_NOTE
from calibrate.scoring.matching import match, period_filter, route_teams
from calibrate.settings import DetectorConfig
from calibrate.tuning.search import split_hour, tune

CHECKED_COLUMNS = ("level", "metric", "start")


@dataclass
class Verdicts:
    """What a reviewed alerts file says, resolved against the previous replay."""

    path: str
    rows: int
    counts: dict[str, int]
    new_incidents: pd.DataFrame  # incidents CSV contract rows to add
    known_false: Incidents
    false_alert_ids: list[str]
    already_applied: list[str]  # `real` alerts an incident already covers
    repeated: list[str]  # same alert and verdict given more than once
    # incidents made from verdicts on alerts raised in the held-out weeks: a held-out
    # check using them is no longer independent of the review
    held_out_incidents: list[str] = field(default_factory=list)

    def lines(self) -> list[str]:
        """Plain-text summary."""
        c = self.counts
        out = [
            f"{self.path}: {self.rows} rows; real {c['real']}, false {c['false']}, "
            f"duplicate {c['duplicate']}, not reviewed {c['blank']}",
            f"new incidents from `real` verdicts: {len(self.new_incidents)}",
            f"known false alarms the search must avoid: {len(self.known_false)}",
        ]
        if self.held_out_incidents:
            out.append(f"{len(self.held_out_incidents)} new incident(s) come from alerts of "
                       "the held-out weeks (ids RH-...): the held-out check of the new "
                       "config is no longer independent of this review")
        if self.already_applied:
            out.append("already applied (a labelled incident covers them): "
                       + ", ".join(self.already_applied))
        if self.repeated:
            out.append("given more than once with the same verdict: " + ", ".join(self.repeated))
        return out


def read_verdicts(path: str | Path, ses: api.Session, previous: ReplayResult,
                  split_hour: int | None = None) -> Verdicts:
    """Read and validate a reviewed alerts file against a replay of the previous config.

    Incidents made from `real` verdicts on alerts raised at or after `split_hour` (the
    held-out weeks) are marked: their id starts ``RH-`` and their note says so.

    Raises
    ------
    InputError
        Unknown alert id, invalid verdict, a row that does not match the replay,
        or two different verdicts for one alert (file, row and column named).
    """
    path = Path(path)
    where = str(path)
    df = read_reviewed(path)
    hist = ses.history
    ref = alerts_frame(previous.episodes, hist)
    pos_of = {a: i for i, a in enumerate(ref["alert_id"])}
    inc = ses.incidents if ses.incidents is not None else Incidents.empty()
    covered = match(previous.episodes, inc, ses.ws.incidents.early_hours,
                    ses.ws.incidents.late_hours).alert_true
    counts = {"real": 0, "false": 0, "duplicate": 0, "blank": 0}
    seen: dict[str, tuple[str, int]] = {}
    new_rows: list[dict[str, Any]] = []
    false_pos: list[int] = []
    already: list[str] = []
    repeated: list[str] = []
    held_out: list[str] = []
    comments = df["comment"].tolist() if "comment" in df.columns else [""] * len(df)
    for i, (aid, verdict) in enumerate(zip(df["alert_id"], df["verdict"], strict=True)):
        row_no = i + 2
        aid, v = str(aid).strip(), str(verdict).strip().lower()
        if v == "":
            counts["blank"] += 1
            continue
        if v not in VERDICTS:
            raise InputError(f"{where} row {row_no} column 'verdict'",
                             f"'{verdict}' is not a verdict (use {', '.join(VERDICTS)} or blank)")
        if aid not in pos_of:
            raise InputError(f"{where} row {row_no} column 'alert_id'",
                             f"unknown alert id '{aid}': the replay of the previous config "
                             f"raised {len(ref)} alerts; pass the config the file was made "
                             "from as --previous")
        p = pos_of[aid]
        _check_row(df.iloc[i], ref.iloc[p], hist.key_columns, where, row_no, aid)
        if aid in seen:
            first_v, first_row = seen[aid]
            if first_v != v:
                raise InputError(f"{where} row {row_no} column 'verdict'",
                                 f"alert {aid} is '{v}' here but '{first_v}' in row {first_row}")
            repeated.append(aid)
            continue
        seen[aid] = (v, row_no)
        counts[v] += 1
        if v == "real":
            if covered[p]:
                already.append(aid)
            else:
                r = ref.iloc[p]
                held = split_hour is not None and previous.episodes.raised[p] >= split_hour
                iid = f"{'RH' if held else 'R'}-{aid}"
                where_from = "held-out-week review" if held else "review"
                new_rows.append({
                    "incident_id": iid, "level": r["level"],
                    **{c: r[c] for c in hist.key_columns}, "metric": r["metric"],
                    "start": r["start"], "end": r["end"],
                    "note": f"from {where_from} ({path.name}): "
                            f"{str(comments[i]).strip()}".rstrip(": "),
                })
                if held:
                    held_out.append(iid)
        elif v == "false":
            false_pos.append(p)
    ep = previous.episodes.take(np.array(false_pos, dtype=np.int64))
    known = Incidents.make(ep.level, ep.series, ep.start, ep.end, metric=ep.metric,
                           incident_id=[ref["alert_id"].iloc[p] for p in false_pos],
                           hours=hist.hours)
    known = route_teams(known, ses.routes)
    return Verdicts(
        path=where, rows=len(df), counts=counts,
        new_incidents=pd.DataFrame(new_rows, columns=["incident_id", "level",
                                                      *hist.key_columns, "metric", "start",
                                                      "end", "note"]),
        known_false=known, false_alert_ids=list(known.incident_id), already_applied=already,
        repeated=repeated, held_out_incidents=held_out,
    )


def _check_row(row: pd.Series, ref: pd.Series, keys: tuple[str, ...], where: str,
               row_no: int, aid: str) -> None:
    for col in (*CHECKED_COLUMNS[:1], *keys, *CHECKED_COLUMNS[1:]):
        if col not in row.index:
            continue
        got, want = str(row[col]).strip(), str(ref[col])
        if col == "start" and got:
            try:
                same = pd.Timestamp(got) == pd.Timestamp(want)
            except ValueError:
                same = False
        else:
            same = got == want
        if not same:
            raise InputError(f"{where} row {row_no} column '{col}'",
                             f"'{got}' does not match alert {aid} of the previous config's "
                             f"replay ('{want}'); was the file made from another config?")


def merge_incidents(ses: api.Session, verdicts: Verdicts, where: str,
                    added: pd.DataFrame | None = None) -> Incidents:
    """The workspace's incidents, `added` ones (from `calibrate review`) and those from
    `real` verdicts (validated again)."""
    inc = incidents_from_frame(merged_frame(ses, verdicts, added), ses.ws, ses.history, where)
    return route_teams(inc, ses.routes)


def merged_frame(ses: api.Session, verdicts: Verdicts | None,
                 added: pd.DataFrame | None = None) -> pd.DataFrame:
    """The merged incidents as an incidents CSV (original rows first, unchanged; then
    the `added` rows, then those from `real` verdicts)."""
    frames = []
    if ses.ws.incidents.path is not None:
        frames.append(read_text_csv(Path(ses.ws.incidents.path)))
    if added is not None:
        frames.append(added.astype(str))
    add = (verdicts.new_incidents.copy() if verdicts is not None
           else pd.DataFrame(columns=["incident_id"]))
    if frames and len(add):
        taken = set(pd.concat(frames)["incident_id"].astype(str))
        add["incident_id"] = [_free_id(i, taken) for i in add["incident_id"]]
    frames.append(add.astype(str))
    return pd.concat(frames, ignore_index=True).fillna("")


def _free_id(iid: str, taken: set[str]) -> str:
    out, n = iid, 1
    while out in taken:
        n += 1
        out = f"{iid}-{n}"
    taken.add(out)
    return out


# --------------------------------------------------------------------------- comparison


@dataclass
class Comparison:
    """Previous versus new settings on the same history and the merged labels."""

    start_hour: int
    end_hour: int
    old: dict[str, Any]
    new: dict[str, Any]
    teams: list[dict[str, Any]]
    gained: list[str]
    lost: list[str]
    known_false_total: int
    still_raised: list[dict[str, Any]]
    why: list[str]
    settings: list[tuple[str, Any, Any]]


def raised_windows(episodes: Episodes, windows: Incidents) -> np.ndarray:
    """Per window: does an episode of the same series and metric overlap it?"""
    out = np.zeros(len(windows), dtype=bool)
    if len(windows) == 0 or len(episodes) == 0:
        return out
    m = match(episodes, windows, 0, 0)
    return m.caught


def compare(
    ses: api.Session,
    old: ReplayResult,
    new: ReplayResult,
    known_false: Incidents,
) -> Comparison:
    """Figures, alerts per team, incidents gained and lost, known false alarms still raised."""
    first = max(api.first_scored_hour(old.config, ses.ws), api.first_scored_hour(new.config,
                                                                                  ses.ws))
    n = ses.history.n_hours
    fo = api.score_episodes(ses, old.episodes, first, n, first_scored=first)
    fn = api.score_episodes(ses, new.episodes, first, n, first_scored=first)
    po, pn = fo.per_incident.set_index("incident_id"), fn.per_incident.set_index("incident_id")
    gained = [i for i in pn.index if bool(pn.loc[i, "caught"]) and not bool(po.loc[i, "caught"])]
    lost = [i for i in pn.index if bool(po.loc[i, "caught"]) and not bool(pn.loc[i, "caught"])]
    teams = []
    for t in sorted(set(fo.per_team.index) | set(fn.per_team.index)):
        ro = fo.per_team.loc[t] if t in fo.per_team.index else None
        rn = fn.per_team.loc[t] if t in fn.per_team.index else None

        def get(r: Any, k: str) -> Any:
            return None if r is None or k not in r.index else _plain(r[k])

        teams.append({"team": t, "old_alerts": get(ro, "alerts"), "new_alerts": get(rn, "alerts"),
                      "old_per_analyst_day": get(ro, "alerts_per_analyst_day"),
                      "new_per_analyst_day": get(rn, "alerts_per_analyst_day"),
                      "budget": get(rn, "budget")})
    still = raised_windows(new.episodes, known_false)
    still_rows, why = [], []
    for j in np.flatnonzero(still):
        still_rows.append({"alert_id": str(known_false.incident_id[j]),
                           "level": str(known_false.level[j]),
                           "series": str(known_false.label[j]),
                           "metric": str(known_false.metric[j]),
                           "start": _iso(ses.history.hours, int(known_false.start[j])),
                           "team": str(known_false.team[j])})
    if len(still_rows):
        why = explain_still_raised(ses, new, known_false.take(still), first, n)
    return Comparison(
        start_hour=first, end_hour=n, old=fo.to_json_dict(), new=fn.to_json_dict(),
        teams=teams, gained=gained, lost=lost, known_false_total=len(known_false),
        still_raised=still_rows, why=why,
        settings=[(r.name, r.current, r.chosen) for r in settings_rows(old.config, new.config)],
    )


def _peak_impact(new: ReplayResult, ep: Episodes, i: int) -> float:
    """Largest |impact so far| over episode i's hours (from the replay's scores)."""
    ms = new.scores[(ep.level[i], ep.metric[i])]
    hours = slice(int(ep.start[i]), int(ep.end[i]))
    diff = ms.value[ep.series[i], hours] - ms.expected[ep.series[i], hours]
    return float(np.max(np.abs(np.cumsum(diff)))) if len(diff) else float("nan")


def explain_still_raised(
    ses: api.Session, new: ReplayResult, still: Incidents, start: int, end: int
) -> list[str]:
    """Why known false alarms are still raised: the fence multiplier and the minimum
    impact that would each drop one, and the miss rate there (everything else as in the
    new settings; the minimum impact raised for every series alike)."""
    out = []
    ep = new.episodes
    m = match(ep, still, 0, 0)
    inc = period_filter(ses.incidents, start, end)
    early, late = ses.ws.incidents.early_hours, ses.ws.incidents.late_hours
    days = max(end - start, 1) / 24.0
    goal = _pct(ses.ws.goal.max_miss_rate)
    hours = (start, end)
    alerts = [m.alerts_of(j) for j in range(len(still))]
    peaks = np.array([np.nanmax(ep.peak_score[i]) if len(i) and np.isfinite(
        ep.peak_score[i]).any() else np.nan for i in alerts])
    dets_of = [set("+".join(ep.detectors[i]).split("+")) if len(i) else set() for i in alerts]
    # one pass over the scores for every multiplier just above a peak fence score
    ks = peaks * 1.0001 + 1e-9
    lever_ks = np.flatnonzero(np.isfinite(ks) & ["flatline" not in d for d in dets_of])
    k_miss = {}
    if len(lever_ks):
        grid = ks[lever_ks]
        c = multiplier_curve(sweep_codes(new.scores, grid, new.routes, start_hours=hours),
                             grid, inc, early, late, ses.analysts, days)
        k_miss = dict(zip(lever_ks.tolist(), c.miss_rate.tolist(), strict=True))
    for j in range(len(still)):
        idx, peak, dets = alerts[j], float(peaks[j]), dets_of[j]
        levers = []
        if j in k_miss:
            levers.append(f"a fence multiplier above {peak:.3g} (miss rate there "
                          f"{_pct(float(k_miss[j]))})")
        # an alert is raised once |impact so far| reaches the minimum impact: it is
        # dropped by one above the largest |impact so far| of its episode
        sizes = [_peak_impact(new, ep, i) for i in idx]
        size = float(np.nanmax(sizes)) if len(sizes) else float("nan")
        if np.isfinite(size):
            m_next = float(np.nextafter(size, np.inf))
            at_m = {key: replace(ms, settings=replace(ms.settings, min_impact=m_next))
                    for key, ms in new.scores.items()}
            c = multiplier_curve(sweep_codes(at_m, None, new.routes, start_hours=hours),
                                 np.array([0.0]), inc, early, late, ses.analysts, days)
            levers.append(f"a minimum impact above {size:.3g} (miss rate there "
                          f"{_pct(float(c.miss_rate[0]))})")
        if not levers:
            out.append(f"{still.incident_id[j]}: raised by {'+'.join(sorted(dets)) or 'a'} "
                       "detector that neither the fence multiplier nor the minimum impact "
                       "controls here")
            continue
        also = (" (the flatline detector fired too, so the fence multiplier alone does not "
                "drop it)" if "flatline" in dets else "")
        out.append(f"{still.incident_id[j]}: dropping it needs {' or '.join(levers)}, "
                   f"against the goal {goal}{also}")
    return out


# --------------------------------------------------------------------------- retune


@dataclass
class RetuneResult:
    """What `retune` did: verdicts read, labels merged, the new config and the comparison."""

    verdicts: Verdicts
    incidents: Incidents
    previous: DetectorConfig
    config: DetectorConfig
    tune: Any
    comparison: Comparison
    session: api.Session
    provenance: dict[str, Any] = field(default_factory=dict)
    added: pd.DataFrame | None = None  # incidents added in `calibrate review`

    @property
    def held_out_labels(self) -> bool:
        """Some new labels came from looking at the held-out weeks (verdicts on their
        alerts, or incidents added there in review): that check is not independent."""
        return bool(self.verdicts.held_out_incidents
                    or self.provenance.get("held_out_incidents_added_in_review"))


Tuner = Callable[..., Any]


def retune(
    ses: api.Session,
    verdicts_path: str | Path,
    previous: DetectorConfig | None,
    trials: int | None,
    *,
    tuner: Tuner | None = None,
    executor: Any = None,
    engine: str = "local",
    workers: int | None = None,
    scheduler: str | None = None,
    progress: bool = False,
    added_incidents: str | Path | None = None,
    **tune_kwargs: Any,
) -> RetuneResult:
    """Merge verdicts into the labels and tune again, warm-started from `previous`.

    Parameters
    ----------
    ses : Session
    verdicts_path : path
        Reviewed alerts file (alert ids from a replay of `previous`).
    previous : DetectorConfig, optional
        The config the reviewed alerts came from (default: the workspace's).
    trials : int, optional
        Trial budget of the new study.
    tuner : callable, optional
        ``tune(ses, *, trials, warm_start, known_false, ...)``; default
        `calibrate.tuning.search.tune`.
    added_incidents : path, optional
        Incidents CSV of incidents added in `calibrate review` (``--incidents-out``),
        merged into the labels before the verdicts are read.
    """
    previous = previous or ses.ws.detector
    added = None
    added_held_out = 0
    if added_incidents is not None:
        added = read_text_csv(Path(added_incidents))
        own_added = incidents_from_frame(added, ses.ws, ses.history, str(added_incidents))

        # labelled while looking at the held-out weeks: that check is then not independent
        added_held_out = int((own_added.start >= split_hour(ses)).sum())
        both = incidents_from_frame(merged_frame(ses, None, added), ses.ws, ses.history,
                                    f"{added_incidents} (with the workspace's incidents)")
        ses = replace(ses, incidents=route_teams(both, ses.routes))
    # one executor for every replay and the search (its workers start once)
    own = executor is None
    if own:
        executor = make_executor(engine, workers, scheduler)
    try:
        verdicts, merged, ses2, result, old2, new = _retune_steps(
            ses, verdicts_path, previous, trials, tuner, executor, progress, tune_kwargs, added)
    finally:
        if own:
            executor.close()
    comp = compare(ses2, old2, new, verdicts.known_false)
    prov = dict(getattr(result, "provenance", {}) or {})
    prov.update(retuned_from_verdicts=str(verdicts_path),
                verdicts_sha256=hashlib.sha256(Path(verdicts_path).read_bytes()).hexdigest(),
                known_false_alarms=len(verdicts.known_false),
                incidents_added=len(verdicts.new_incidents),
                held_out_incidents_added=len(verdicts.held_out_incidents))
    if added_held_out:
        prov.update(held_out_incidents_added_in_review=added_held_out)
    res = RetuneResult(verdicts, merged, previous, result.config, result, comp, ses2, prov,
                       added)
    if res.held_out_labels and hasattr(result, "verdict_reasons"):
        result.verdict_reasons = [*result.verdict_reasons, HELD_OUT_NOTE]
    if added is not None:
        prov.update(incidents_added_in_review=str(added_incidents),
                    incidents_added_in_review_count=len(added))
    return res


def _retune_steps(ses, verdicts_path, previous, trials, tuner, executor, progress, tune_kwargs,
                  added=None):
    rp = api.make_replayer(ses, progress=progress, executor=executor)
    old = rp.replay(previous)

    verdicts = read_verdicts(verdicts_path, ses, old, split_hour(ses))
    merged = merge_incidents(ses, verdicts, f"{verdicts_path} (merged with the incidents)",
                             added)
    ses2 = replace(ses, incidents=merged)
    if tuner is None:
        tuner = tune
    result = tuner(ses2, trials=trials, warm_start=[previous],
                   known_false=verdicts.known_false, progress=progress, executor=executor,
                   **tune_kwargs)
    rp = api.make_replayer(ses2, progress=progress, executor=executor)
    old2 = rp.replay(previous)
    new = rp.replay(result.config)
    return verdicts, merged, ses2, result, old2, new


# --------------------------------------------------------------------------- outputs


def comparison_summary(res: RetuneResult) -> dict[str, Any]:
    """JSON-safe summary of a retune (verdicts, settings, figures, false alarms)."""
    c, v = res.comparison, res.verdicts
    return {
        "verdicts": {"file": v.path, "rows": v.rows, **v.counts,
                     "new_incidents": v.new_incidents["incident_id"].tolist(),
                     "known_false": v.false_alert_ids, "already_applied": v.already_applied,
                     "repeated": v.repeated},
        "feasible": getattr(res.tune, "feasible", None),
        "reason": getattr(res.tune, "reason", ""),
        "period": {"start_hour": c.start_hour, "end_hour": c.end_hour},
        "settings": [{"name": n, "previous": a, "new": b, "changed": a != b}
                     for n, a, b in c.settings],
        "previous": c.old, "new": c.new, "teams": c.teams,
        "incidents_gained": c.gained, "incidents_lost": c.lost,
        "known_false_total": c.known_false_total, "known_false_still_raised": c.still_raised,
        "why_still_raised": c.why,
    }


def comparison_markdown(res: RetuneResult) -> str:
    """The comparison report as Markdown."""
    c, v = res.comparison, res.verdicts
    lines = ["# Re-tuning from analysts' verdicts", ""]
    lines += [f"- {x}" for x in v.lines()]
    lines += ["", "## Settings", "", "| setting | previous | new |", "|---|---|---|"]
    lines += [f"| {'**' + n + '**' if a != b else n} | {a} | {b} |" for n, a, b in c.settings]
    lines += ["", "## On the same history (merged labels)", "",
              "| figure | previous | new |", "|---|---|---|"]
    for label, key in (("incidents caught", "caught"), ("incidents", "incidents"),
                       ("alerts", "alerts"), ("false alerts", "false_alerts")):
        lines.append(f"| {label} | {c.old[key]} | {c.new[key]} |")
    lines.append(f"| miss rate | {_pct(c.old['miss_rate'])} | {_pct(c.new['miss_rate'])} |")
    lines += ["", "## Alerts per team", "",
              "| team | previous | new | per analyst per day (previous -> new) | budget |",
              "|---|---|---|---|---|"]
    for t in c.teams:
        lines.append(f"| {t['team']} | {t['old_alerts']} | {t['new_alerts']} | "
                     f"{_num(t['old_per_analyst_day'])} -> {_num(t['new_per_analyst_day'])} | "
                     f"{'' if t['budget'] is None else t['budget']} |")
    lines += ["", "## Incidents gained and lost", "",
              f"- gained (caught now, missed before): {', '.join(c.gained) or 'none'}",
              f"- lost (missed now, caught before): {', '.join(c.lost) or 'none'}", "",
              "## Known false alarms still raised", "",
              f"{len(c.still_raised)} of {c.known_false_total} alerts marked `false` are still "
              "raised by the new settings."]
    lines += [f"- {w}" for w in c.why]
    lines += ["", "> A tuned configuration is only as good as the incident labels it was "
              "tuned on; check it on held-out weeks before rollout."]
    return "\n".join(lines) + "\n"


def comparison_html(res: RetuneResult, png: bytes) -> str:
    """The comparison report as one self-contained HTML page."""
    md = comparison_markdown(res)
    body = []
    in_table = False
    for line in md.splitlines():
        if line.startswith("|"):
            cells = [html.escape(x.strip()).replace("**", "") for x in line.strip("|").split("|")]
            if set("".join(cells)) <= {"-"}:
                continue
            tag = "th" if not in_table else "td"
            if not in_table:
                body.append("<table>")
                in_table = True
            cls = ' class="changed"' if "**" in line else ""
            body.append(f"<tr{cls}>" + "".join(f"<{tag}>{x}</{tag}>" for x in cells) + "</tr>")
            continue
        if in_table:
            body.append("</table>")
            in_table = False
        if line.startswith("# "):
            body.append(f"<h1>{html.escape(line[2:])}</h1>")
        elif line.startswith("## "):
            body.append(f"<h2>{html.escape(line[3:])}</h2>")
            if line[3:] == "Alerts per team":
                b64 = base64.b64encode(png).decode("ascii")
                body.append(f'<figure><img src="data:image/png;base64,{b64}" '
                            'alt="alerts per team, previous and new"></figure>')
        elif line.startswith("- "):
            body.append(f"<p>&bull; {html.escape(line[2:]).replace('`', '')}</p>")
        elif line.startswith("> "):
            body.append(f'<p class="caution">{html.escape(line[2:])}</p>')
        elif line:
            body.append(f"<p>{html.escape(line).replace('`', '')}</p>")
    if in_table:
        body.append("</table>")
    return ("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>Re-tuning from verdicts</title><style>{CSS}</style></head><body>"
            + "\n".join(body) + "</body></html>")


def retune_paths(out: Path, report: Path | None) -> tuple[Path, Path, Path, Path]:
    """The files `retune` writes: config, merged incidents, known false alarms, report."""
    stem = out.with_suffix("")
    inc_path = stem.parent / f"{stem.name}-incidents.csv"
    false_path = stem.parent / f"{stem.name}-known-false.csv"
    return out, inc_path, false_path, report or stem.parent / f"{stem.name}-report"


def write_retune_outputs(res: RetuneResult, out: Path, report: Path | None,
                         force: bool = False) -> list[Path]:
    """Write the new config, merged incidents, known false alarms and the comparison."""
    from calibrate.reporting import plots

    out, inc_path, false_path, report = retune_paths(out, report)
    check_outputs((out, inc_path, false_path), force, folders=[report])
    written = [write_config(out, res.config, res.provenance, force=force)]
    written.append(write_table(inc_path, merged_frame(res.session, res.verdicts, res.added),
                               force=force))
    kf = res.verdicts.known_false.to_frame()
    written.append(write_table(false_path, kf.drop(columns=["series"]), force=force))
    c = res.comparison
    png = plots.comparison_png(
        [t["team"] for t in c.teams],
        [t["old_per_analyst_day"] for t in c.teams],
        [t["new_per_analyst_day"] for t in c.teams],
        [t["budget"] for t in c.teams],
    )
    files = {
        "index.html": comparison_html(res, png).encode("utf-8"),
        "report.md": comparison_markdown(res).replace(
            "## Alerts per team\n", "## Alerts per team\n\n![alerts per team](teams.png)\n"
        ).encode("utf-8"),
        "summary.json": json.dumps(comparison_summary(res), indent=2,
                                   default=_plain).encode("utf-8"),
        "teams.png": png,
    }
    written.append(write_report_data_files(files, report, force=force))
    if all(hasattr(res.tune, a) for a in ("trials", "split_hour", "first_hour", "current")):
        write_report(res.session, res.tune, report / "calibration", force=force,
                     derived_from_held_out=res.held_out_labels)
        written.append(report / "calibration")
    return written


def _iso(hours: pd.DatetimeIndex, t: int) -> str:
    return pd.Timestamp(hours[min(t, len(hours) - 1)]).strftime("%Y-%m-%dT%H:%M:%SZ")


def _pct(x: Any) -> str:
    return "n/a" if x is None or x != x else f"{100 * float(x):.1f}%"


def _num(x: Any) -> str:
    return "n/a" if x is None or x != x else f"{float(x):.2f}"


def _plain(v: Any) -> Any:
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and v != v:
        return None
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items()}
    return v
