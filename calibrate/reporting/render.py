"""The report's pages (stage 9): a `ReportData` record rendered as ``index.html`` (the
Jinja2 template ``calibrate/templates/report.html`` with autoescape; self-contained:
inline CSS, images as data: URIs, no scripts), ``report.md`` (plain text, built here;
images as files beside it), the ``summary.json`` dict and the PNG plots
(`calibrate.reporting.plots`). The tables' rows (`goal_rows`, `metric_rows`,
`fold_table`) are shared by the HTML and the Markdown.

No computation over replays here: every figure comes from the record
(`calibrate.reporting.build`).
"""

from __future__ import annotations

import base64
import functools
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import jinja2

from calibrate.reporting.formats import finite, hours, num, pct, show
from calibrate.reporting.report_data import ReportData, SeriesPanel
from calibrate.scoring.tables import ANY_LABEL

TEMPLATES = Path(__file__).parents[1] / "templates"
SETTINGS_FILE_NOTE = (
    "The chosen settings as one flat table, one row per level and watched metric with "
    "every setting spelled out (what another detector needs), are in settings.csv beside "
    "this page.")


def summary_dict(data: ReportData) -> dict[str, Any]:
    """The JSON summary: figures exactly as `Figures.to_json_dict` gave them."""
    out: dict[str, Any] = {
        "title": data.title,
        "generated": data.generated,
        "workspace": data.workspace,
        "source": data.source,
        "goal": data.goal,
        "feasible": data.feasible,
        "reason": data.reason,
        "holdout_warning": data.holdout_warning,
        "validation": data.validation,
        "periods": [
            {
                "name": p.name,
                "start_hour": p.start_hour,
                "end_hour": p.end_hour,
                "start": p.start,
                "end": p.end,
                "goal_met": p.goal_met,
                "verdict": p.verdict,
            }
            for p in data.periods
        ],
        "settings": {
            "current": {r.name: r.current for r in data.settings},
            "chosen": {r.name: r.chosen for r in data.settings},
            "changed": data.changed,
        },
        "volume": data.volume.table,
        "best_tradeoffs": {
            "load": data.tradeoff.x_label,
            "points": [{"recall": y, "load": finite(x)}
                       for x, y in zip(data.tradeoff.front_x, data.tradeoff.front_y,
                                       strict=True)],
        },
        "caution": data.caution,
        "provenance": data.provenance,
    }
    names = {"tuning weeks": "tuning", "held-out weeks": "holdout", "replayed weeks": "replayed"}
    for p in data.periods:
        out[names[p.name]] = p.figures
        if p.current_figures is not None:
            out[f"{names[p.name]}_current"] = p.current_figures
    return out


def render_plots(data: ReportData) -> dict[str, bytes]:
    """Every PNG of the report, by file name."""
    from calibrate.reporting import plots

    out = {
        "tradeoff.png": plots.tradeoff_png(data.tradeoff),
        "multiplier.png": plots.multiplier_png(data.curve),
        **({"impact.png": plots.impact_png(data.impact)} if data.impact else {}),
        **{_impact_file(i, name): plots.impact_png(c, group=name)
           for i, (name, c) in enumerate(data.impact_groups)},
        "volume.png": plots.volume_png(data.volume),
        "delay.png": plots.delay_png(data.delays, data.early_hours, data.late_hours),
    }
    for i, panel in enumerate(data.panels):
        out[_panel_file(i, panel)] = plots.series_png(panel)
    return out


def _impact_file(i: int, name: str) -> str:
    safe = "".join(ch if ch.isalnum() or ch in "-_" else "-" for ch in name)
    return f"impact-{i + 1:02d}-{safe}.png"


def _panel_file(i: int, panel: SeriesPanel) -> str:
    kind = "missed" if panel.kind == "missed incident" else "false"
    return f"series-{i + 1:02d}-{kind}.png"


CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #222;
       max-width: 62rem; margin: 1.5rem auto; padding: 0 1rem; line-height: 1.45; }
h1 { font-size: 1.6rem; margin-bottom: .2rem; }
h2 { font-size: 1.2rem; border-bottom: 2px solid #2c3e50; padding-bottom: .2rem;
     margin-top: 2rem; }
h3 { font-size: 1rem; margin-bottom: .3rem; }
.meta { color: #555; font-size: .85rem; }
.answer { border-left: 6px solid #2c3e50; background: #f4f6f8; padding: .6rem 1rem;
          margin: 1rem 0; }
.answer.met { border-color: #27ae60; } .answer.notmet { border-color: #c0392b; }
.caution { border: 1px solid #e67e22; background: #fff8ef; padding: .6rem 1rem; }
table { border-collapse: collapse; font-size: .85rem; margin: .5rem 0 1rem; }
th, td { border: 1px solid #ccc; padding: .25rem .5rem; text-align: left;
         vertical-align: top; }
th { background: #eef1f4; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
tr.changed td { background: #fff3cd; font-weight: 600; }
tr.bad td { background: #fdecea; }
.badge { display: inline-block; padding: 0 .4rem; border-radius: .2rem; font-size: .8rem;
         font-weight: 700; color: #fff; }
.badge.met { background: #1e7e45; } .badge.notmet { background: #b03a2e; }
figure { margin: 1rem 0; } figure img { max-width: 100%; height: auto; }
figcaption { font-size: .82rem; color: #444; }
nav ol { columns: 2; font-size: .9rem; }
@media print {
  body { max-width: none; margin: 0; font-size: 10pt; }
  nav { display: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
  figure, table, .answer, .caution { break-inside: avoid; page-break-inside: avoid; }
  .badge { border: 1px solid #000; color: #000; background: none !important; }
  tr.changed td, tr.bad td, th { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
  a { color: inherit; text-decoration: none; }
}
"""


def _numeric(c: Any) -> bool:
    """A table cell shown right-aligned: a number, or text reading as one ("12.5%")."""
    if isinstance(c, int | float):
        return True
    s = str(c).rstrip("%").replace(".", "", 1).lstrip("-")
    return s.isdigit()


def goal_rows(data: ReportData) -> tuple[list[str], list[list[Any]]]:
    """Goal table: one column per period (chosen settings, and current when known)."""
    headers = ["figure"]
    cols: list[dict[str, Any]] = []
    for p in data.periods:
        headers.append(f"{p.name}, chosen")
        cols.append(p.figures)
        if p.current_figures is not None:
            headers.append(f"{p.name}, current")
            cols.append(p.current_figures)

    def ci(f: dict, key: str) -> str:
        return f"{pct(f[key])} ({pct(f[key + '_low'])} to {pct(f[key + '_high'])})"

    rows: list[list[Any]] = [
        ["incidents caught", *[f"{f['caught']} of {f['incidents']}" for f in cols]],
        ["recall (95% interval)", *[ci(f, "recall") for f in cols]],
        ["miss rate (95% interval)", *[ci(f, "miss_rate") for f in cols]],
        ["alerts", *[f["alerts"] for f in cols]],
        ["precision (95% interval)", *[ci(f, "precision") for f in cols]],
        ["median detection delay", *[hours(f["delay_median_hours"]) for f in cols]],
        ["days", *[f"{f['n_days']:.1f}" for f in cols]],
    ]
    teams = sorted({t for f in cols for t in f.get("per_team", {})})
    for t in teams:
        rows.append([f"alerts per analyst per day, {t}", *[
            _rate(f.get("per_team", {}).get(t, {})) for f in cols]])
    return headers, rows


def fold_table(v: Mapping[str, Any]) -> tuple[list[str], list[list[Any]]]:
    """Rolling folds: test hours, recall and load with intervals, and each setting's value
    per fold (a setting that moves between folds is loosely pinned down by the labels)."""
    folds = v["folds"]
    headers = ["", *[f"fold {r['fold']}" for r in folds]]
    rows: list[list[Any]] = [
        ["test hours", *[f"{r['test_start_hour']}-{r['test_end_hour']}" for r in folds]],
        ["recall (95%)", *[
            "no incidents" if not r["incidents"] else
            f"{r['caught']} of {r['incidents']}, {pct(r['recall'][0])} "
            f"({pct(r['recall'][1])} to {pct(r['recall'][2])})" for r in folds]],
    ]
    teams = list(dict.fromkeys(t for r in folds for t in r["alerts_per_analyst_day"]))
    for t in teams:
        rows.append([f"alerts per analyst per day, {t}", *[
            "" if t not in r["alerts_per_analyst_day"] else
            "{:.2f} ({:.2f} to {:.2f})".format(*r["alerts_per_analyst_day"][t])
            for r in folds]])
    for name, vals in v.get("stability", {}).items():
        rows.append([name, *vals])
    return headers, rows


def metric_rows(data: ReportData) -> tuple[list[str], list[list[Any]], list[str]]:
    """Recall and alerts of the chosen settings per watched metric and per detector, one
    column per period, and a warning per metric with labelled incidents in a period but
    no alert, or none caught."""
    periods = data.periods
    headers = ["metric or detector", *[f"{p.name}: caught, recall (95%), alerts"
                                       for p in periods]]
    metrics = list(dict.fromkeys(m for p in periods for m in p.figures.get("per_metric", {})))
    rows: list[list[Any]] = []
    warnings = []
    for m in metrics:
        cells = []
        for p in periods:
            r = p.figures.get("per_metric", {}).get(m)
            if r is None:
                cells.append("")
                continue
            rec = (f"{r['caught']} of {r['incidents']}, {pct(r['recall'])} "
                   f"({pct(r['recall_low'])} to {pct(r['recall_high'])})"
                   if r["incidents"] else "no incidents")
            cells.append(f"{rec}, {r['alerts']}")
            if r["incidents"] and m != ANY_LABEL and r["alerts"] == 0:
                warnings.append(f"{p.name}: metric {m} has {r['incidents']} labelled "
                                "incident(s) but no alert: it is switched off in effect.")
            elif r["incidents"] and m != ANY_LABEL and r["caught"] == 0:
                warnings.append(f"{p.name}: metric {m} catches none of its {r['incidents']} "
                                "incident(s); the goal is met without them.")
        rows.append([f"metric {m}", *cells])
    dets = list(dict.fromkeys(d for p in periods for d in p.figures.get("per_detector", {})))
    for d in dets:
        cells = []
        for p in periods:
            r = p.figures.get("per_detector", {}).get(d)
            cells.append("" if r is None else
                         f"{r['true_alerts']} true of {r['alerts']} alerts "
                         f"(precision {pct(r['precision'])})")
        rows.append([f"detector {d}", *cells])
    for p in periods:
        n = p.figures.get("before_first_scored", 0)
        if n:
            warnings.append(f"{p.name}: {n} incident(s) begin before the first scored hour "
                            "and cannot be caught; they are left out of recall.")
        n = p.figures.get("already_alerting", 0)
        if n:
            warnings.append(f"{p.name}: {n} incident(s) began while an earlier alert was "
                            "still running (already alerting): not counted as caught.")
    return headers, rows, warnings


def _rate(row: Mapping[str, Any]) -> str:
    r, b = row.get("alerts_per_analyst_day"), row.get("budget")
    if r is None:
        return "n/a (no analysts)"
    return f"{r:.2f}" + ("" if b is None else f" (budget {b:g})")


def render_html(data: ReportData, images: Mapping[str, bytes]) -> str:
    """A self-contained HTML page from the template ``calibrate/templates/report.html``:
    inline CSS, images (PNG bytes by file name) as data: URIs, no scripts. The template
    engine escapes every value (autoescape)."""

    def data_uri(name: str) -> str:
        return "data:image/png;base64," + base64.b64encode(images[name]).decode("ascii")

    return _environment().get_template("report.html").render(
        data=data, css=CSS, data_uri=data_uri, short_answer=short_answer,
        budgets_text=_budgets_text, goal_rows=goal_rows, metric_rows=metric_rows,
        fold_table=fold_table, impact_file=_impact_file, panel_file=_panel_file,
        settings_note=SETTINGS_FILE_NOTE)


@functools.cache
def _environment() -> jinja2.Environment:
    # as the review page (calibrate/feedback/review_app.py) loads its template
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATES), autoescape=True,
                             undefined=jinja2.StrictUndefined)
    env.filters.update(pct=pct, hours=hours, num=num, show=show)
    env.tests["numeric"] = _numeric
    return env


def short_answer(data: ReportData) -> str:
    """One or two plain sentences: is the goal met, where, and what changed."""
    bits = []
    for p in data.periods:
        f = p.figures
        bits.append(f"{p.name}: {'goal met' if p.goal_met else 'goal NOT met'} "
                    f"({f['caught']} of {f['incidents']} incidents caught, {f['alerts']} alerts)")
    ch = data.changed
    changed = (f"{len(ch)} setting(s) differ from today's: {', '.join(ch)}" if ch
               else "the settings equal today's")
    return "; ".join(bits) + f". {changed[0].upper() + changed[1:]}."


def render_markdown(data: ReportData) -> str:
    """The same content as Markdown, images referenced as files beside it."""
    lines = [f"# {data.title}", "", f"Generated {data.generated} from `{data.workspace}`"
             + (f" ({data.source})" if data.source else "") + ".", "",
             f"**In short:** {short_answer(data)}", "", f"> **Caution.** {data.caution}", "",
             "## 1. Goal and result", ""]
    for p in data.periods:
        lines.append(f"- **{p.name}** ({p.start[:10]} to {p.end[:10]}): {p.verdict}")
    if data.holdout_warning:
        lines.append(f"- Held-out check: {data.holdout_warning}")
    v = data.validation
    if v:
        lines.append(f"- **Out-of-sample verdict: {v['verdict'].upper()}.** "
                     + "; ".join(v["reasons"]))
        lines.append(f"- {v['labels']}. The tuning-week figures are optimistic (the settings "
                     "were chosen on those labels); judge by the held-out ones. Intervals: "
                     f"{v['interval_method']}.")
    if v.get("folds"):
        headers, rows = fold_table(v)
        lines += ["", "Rolling validation (each fold tuned on the weeks before its test "
                  "block, scored there):", "", *_md_table(headers, rows)]
    if data.reason:
        lines.append(f"- Search: {data.reason}")
    lines.append("")
    headers, rows = goal_rows(data)
    lines += _md_table(headers, rows)
    headers, rows, warnings = metric_rows(data)
    lines += ["", "Per watched metric and per detector (chosen settings; tuning-week figures "
              "are in-sample, chosen on these labels):", ""]
    lines += _md_table(headers, rows)
    lines += [f"\n**Warning:** {w}" for w in warnings]
    lines += ["", "## 2. Settings: current and chosen", ""]
    lines += _md_table(["setting", "current", "chosen", "changed"],
                       [[r.name, show(r.current), show(r.chosen), "**yes**" if r.changed
                         else ""] for r in data.settings])
    lines += ["", SETTINGS_FILE_NOTE]
    lines += ["", "## 3. Recall against alert load", "", "![trade-off](tradeoff.png)", "",
              "## 4. Moving the fence multiplier and the minimum impact", "",
              "![multiplier](multiplier.png)", "",
              *(["![minimum impact](impact.png)", ""] if data.impact is not None else []),
              *[x for i, (name, _c) in enumerate(data.impact_groups)
                for x in (f"![minimum impact of {name}]({_impact_file(i, name)})", "")],
              "## 5. Alerts per team and week", "", "![volume](volume.png)", ""]
    lines += _md_table(["team", "week", "alerts", "per analyst per day", "budget", "over"],
                       [[r["team"], r["week"], r["alerts"], num(r["alerts_per_analyst_day"]),
                         show(r.get("budget", "")), "yes" if r.get("over_budget") else ""]
                        for r in data.volume.table])
    lines += ["", "## 6. Detection delay", "", "![delay](delay.png)", "",
              "## 7. Missed incidents and the worst false alerts", ""]
    for i, panel in enumerate(data.panels):
        lines += [f"### {panel.title}", "", f"![{panel.kind}]({_panel_file(i, panel)})", ""]
        if panel.note:
            lines += [panel.note, ""]
    lines += ["## 8. Every incident", ""]
    lines += _md_table(["period", "incident", "series", "metric", "team", "start", "result",
                        "delay"],
                       [[r["period"], r["incident_id"], f"{r['level']} {r['series_label']}",
                         r["metric"], r.get("team", ""), str(r.get("start", ""))[:16],
                         "caught" if r["caught"] else "**MISSED**",
                         hours(r.get("delay_hours"))] for r in data.incidents])
    return "\n".join(lines) + "\n"


def _md_table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> list[str]:
    def cell(x: Any) -> str:
        return str(x).replace("|", "\\|")

    out = ["| " + " | ".join(cell(h) for h in headers) + " |",
           "|" + "---|" * len(headers)]
    out += ["| " + " | ".join(cell(c) for c in r) + " |" for r in rows]
    return out


def _budgets_text(goal: Mapping[str, Any]) -> str:
    b = goal["max_alerts_per_analyst_day"]
    vals = {v for v in b.values()}
    if len(vals) == 1:
        v = next(iter(vals))
        return "no limit" if v is None else f"{v:g}"
    return ", ".join(f"{t} {'no limit' if v is None else f'{v:g}'}" for t, v in b.items())
