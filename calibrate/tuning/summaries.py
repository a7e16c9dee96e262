"""What `tune` prints (stage 8): tuning and held-out figures side by side, per metric
and detector, trade-offs, rolling folds and the verdict, as lines of text.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import pandas as pd

from calibrate.scoring.figures import Figures
from calibrate.tuning import rolling
from calibrate.tuning.evaluate import json_safe
from calibrate.tuning.search import TuneResult


def _pct(x: float | None) -> str:
    return "n/a" if x is None or x != x else f"{100 * x:.1f}%"


def side_by_side(result: TuneResult) -> list[str]:
    """Tuning and held-out figures side by side, with 95% intervals."""
    cols = [("tuning weeks (in-sample)", result.tuning),
            ("held-out weeks (out-of-sample)", result.holdout)]
    lines = [f"{'':<28}" + "".join(f"{n:>32}" for n, _ in cols)]

    def cell(f: Figures | None, what: str) -> str:
        if f is None:
            return "none held out"
        if what == "incidents":
            return f"{f.caught} of {f.incidents} caught"
        if what == "recall":
            return f"{_pct(f.recall)} ({_pct(f.recall_low)}-{_pct(f.recall_high)})"
        if what == "miss":
            return f"{_pct(f.miss_rate)} ({_pct(f.miss_rate_low)}-{_pct(f.miss_rate_high)})"
        if what == "alerts":
            return f"{f.alerts} ({f.false_alerts} false)"
        if what == "precision":
            return f"{_pct(f.precision)} ({_pct(f.precision_low)}-{_pct(f.precision_high)})"
        team = what.split(":", 1)[1]
        if team in f.per_team.index and "alerts_per_analyst_day" in f.per_team.columns:
            row = f.per_team.loc[team]
            if "alerts_per_analyst_day_low" in f.per_team.columns:
                return (f"{row['alerts_per_analyst_day']:.2f} "
                        f"({row['alerts_per_analyst_day_low']:.2f}-"
                        f"{row['alerts_per_analyst_day_high']:.2f})")
            return f"{row['alerts_per_analyst_day']:.2f}"
        return "n/a"

    rows = [("incidents", "incidents"), ("recall (95% interval)", "recall"),
            ("miss rate (95% interval)", "miss"), ("alerts", "alerts"),
            ("precision (95% interval)", "precision")]
    teams = [t for t, n in sorted(result.tuning.per_team.get("analysts", pd.Series()).items())
             if n > 0] if "analysts" in result.tuning.per_team.columns else []
    rows += [(f"{t}: per analyst-day", f"team:{t}") for t in teams]
    for label, what in rows:
        lines.append(f"{label:<28}" + "".join(f"{cell(f, what):>32}" for _, f in cols))
    lines.append("the tuning-week figures are optimistic: the settings were chosen on those "
                 "labels; judge by the held-out ones. Intervals: "
                 + (result.tuning.interval_method or "95% Wilson"))
    return lines


def metric_lines(result: TuneResult) -> list[str]:
    """Recall and alerts per watched metric and alerts per detector on the tuning weeks
    (in-sample), and a warning for every metric with labelled incidents but no alert."""
    f = result.tuning
    pm = f.per_metric
    lines = ["per metric, tuning weeks (in-sample, chosen on these labels):"]
    warnings = []
    for metric, row in pm.iterrows():
        n, caught, alerts = int(row["incidents"]), int(row["caught"]), int(row["alerts"])
        rec = (f"recall {_pct(row['recall'])} [{_pct(row['recall_low'])}, "
               f"{_pct(row['recall_high'])}] ({caught} of {n})" if n else "no incidents")
        lines.append(f"  {metric}: {rec}, {alerts} alerts")
        if n and alerts == 0 and metric != "(any)":
            warnings.append(f"WARNING: metric '{metric}' has {n} labelled incident(s) in the "
                            "tuning weeks but the tuned settings raise no alert on it: it is "
                            "switched off in effect; check its minimum impact")
        elif n and caught == 0 and metric != "(any)":
            warnings.append(f"WARNING: metric '{metric}' catches none of its {n} labelled "
                            "incident(s) in the tuning weeks: the goal counts incidents of "
                            "every metric together and is met without them")
    det = ", ".join(f"{d}: {int(r['alerts'])} alerts ({_pct(r['precision'])} true)"
                    for d, r in f.per_detector.iterrows())
    lines.append(f"per detector, tuning weeks: {det or 'no alerts'}")
    if f.before_first_scored:
        lines.append(f"{f.before_first_scored} incident(s) begin before the first scored hour "
                     "and cannot be caught: listed apart, left out of recall")
    if f.already_alerting:
        lines.append(f"{f.already_alerting} incident(s) missed while an earlier alert was "
                     "still running (already alerting, not counted as caught)")
    return lines + warnings


def changed_settings_line(result: TuneResult) -> str:
    """One line: the settings the tuned config changes, today's value -> the new one."""
    cur, new = result.current.base, result.config.base
    diffs = [f"{f.name} {getattr(cur, f.name)!r} -> {getattr(new, f.name)!r}"
             for f in dataclasses.fields(new) if getattr(cur, f.name) != getattr(new, f.name)]
    groups = f"; {len(result.config.groups)} group(s) with their own settings" \
        if result.config.groups else ""
    return "changed: " + (", ".join(diffs) if diffs else "nothing in the base settings") + groups


def pareto_lines(result: TuneResult) -> list[str]:
    """The best trade-offs (Pareto front), most recall first, one line each (at most
    one per number of incidents caught)."""
    front = result.pareto
    label = front.attrs.get("load_label", "alert load")
    lines = [f"best trade-offs found on the tuning weeks (load: {label}):"]
    rows = front.sort_values("recall", ascending=False, kind="stable")
    for d in rows.to_dict("records"):
        impact = d["min_impact"]
        shown = f", min_impact: {impact}" if isinstance(impact, str) and impact else ""
        k = "multipliers per group" if d["k"] != d["k"] else f"k={d['k']:.3g}"
        lines.append(f"  recall {_pct(d['recall'])} ({d['caught']} of {d['incidents']}), "
                     f"load {d['load']:.3g}: trial {d['number']}, {k}" + shown)
    return lines


def fold_rows(result: TuneResult) -> list[dict[str, Any]]:
    """Rolling folds as plain rows: hours, chosen settings and test figures with their
    intervals (out of sample for the settings each fold chose)."""
    rows = []
    for f in result.folds:
        fig = f.figures
        teams = {} if fig is None else {
            t: [json_safe(r.get("alerts_per_analyst_day")),
                json_safe(r.get("alerts_per_analyst_day_low")),
                json_safe(r.get("alerts_per_analyst_day_high"))]
            for t, r in fig.per_team.to_dict(orient="index").items() if r.get("analysts")}
        rows.append({
            "fold": f.number, "train_end_hour": f.train_end, "test_start_hour": f.test_start,
            "test_end_hour": f.test_end, "feasible_on_its_tuning_hours": f.feasible,
            "settings": json_safe(f.settings),
            "caught": None if fig is None else fig.caught,
            "incidents": None if fig is None else fig.incidents,
            "recall": None if fig is None else json_safe(
                [fig.recall, fig.recall_low, fig.recall_high]),
            "alerts_per_analyst_day": teams,
        })
    return rows


def fold_lines(result: TuneResult) -> list[str]:
    """Terminal lines of the rolling validation (nothing without folds)."""
    if not result.folds:
        return []
    lines = ["rolling validation (each fold tuned on the weeks before its test block; "
             "test figures out-of-sample):"]
    for r in fold_rows(result):
        rec = r["recall"]
        recall = ("no incidents" if not r["incidents"] else
                  f"recall {_pct(rec[0])} ({_pct(rec[1])}-{_pct(rec[2])}), "
                  f"{r['caught']} of {r['incidents']}")
        load = ", ".join(f"{t} {v[0]:.2f} ({v[1]:.2f}-{v[2]:.2f})"
                         for t, v in r["alerts_per_analyst_day"].items())
        k = r["settings"].get("fence_multiplier")
        lines.append(f"  fold {r['fold']}: {recall}; per analyst-day {load}; k={k:.3g}"
                     if k is not None else f"  fold {r['fold']}: {recall}; {load}")
    moving = {n: v for n, v in rolling.stability(result.folds).items() if len(set(map(
        str, v))) > 1}
    lines.append("  settings that differ between folds: " + (", ".join(
        f"{n} {v}" for n, v in moving.items()) or "none"))
    if result.pooled is not None:
        p = result.pooled
        lines.append(f"  pooled test blocks: recall {_pct(p.recall)} ({_pct(p.recall_low)}-"
                     f"{_pct(p.recall_high)}), {p.caught} of {p.incidents}")
    return lines


def verdict_line(result: TuneResult) -> str:
    """The out-of-sample verdict and its reasons, one line (printed last)."""
    return (f"out-of-sample verdict: {result.verdict.upper()}: "
            + "; ".join(result.verdict_reasons))
