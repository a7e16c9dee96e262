"""The calibration report: what a team lead reads before approving a rollout.

Two steps, kept apart (content as tested data first, rendering after):

1. `build_report_data` computes a `ReportData` record from one replay of the
   chosen settings (plus, optionally, a replay of the current settings and the
   trials of a study). It is pure computation over arrays and is what the tests
   check; every figure in it comes from `calibrate.api.score_episodes`,
   `calibrate.scoring.curves.multiplier_curve` and `calibrate.api.alert_volume`.
2. `render_html`, `render_markdown`, `summary_dict` and `calibrate.reporting.plots` turn
   the record into ``index.html`` (self-contained, images embedded), ``report.md``
   (images beside it), ``summary.json`` and PNG files.

`write_report(ses, result, out_dir)` writes the report of a `TuneResult`;
`write_config_report(ses, config, out_dir)` that of any config
(`calibrate report --config`).
"""

from __future__ import annotations

import base64
import html
import json
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from calibrate import api
from calibrate.engine.replay import MetricScores, ReplayResult, sweep_codes
from calibrate.errors import CalibrationError
from calibrate.inputs.incidents import ANY_METRIC
from calibrate.reporting.report_data import (
    CurveData,
    PeriodData,
    ReportData,
    SeriesPanel,
    SettingRow,
    TradeoffData,
    VolumeData,
)
from calibrate.scoring.curves import multiplier_curve
from calibrate.scoring.figures import HELD_OUT_NOTE, validation_verdict
from calibrate.scoring.matching import match, period_filter
from calibrate.scoring.tables import ANY_LABEL
from calibrate.scoring.tradeoffs import load_axis, pareto_front
from calibrate.settings import DetectorConfig

MAX_MISSED_PANELS = 20
FALSE_ALERT_PANELS = 3
PANEL_BEFORE_HOURS = 72
PANEL_AFTER_HOURS = 48
CURVE_POINTS = 80


# --------------------------------------------------------------------------- build


def build_report_data(
    ses: api.Session,
    chosen: ReplayResult,
    *,
    current: ReplayResult | DetectorConfig | None = None,
    first_hour: int | None = None,
    split_hour: int | None = None,
    trials: pd.DataFrame | None = None,
    front: pd.DataFrame | None = None,
    feasible: bool | None = None,
    reason: str = "",
    holdout_warning: str = "",
    provenance: Mapping[str, Any] | None = None,
    title: str = "Calibration report",
    source: str = "",
    derived_from_held_out: bool = False,
) -> ReportData:
    """Compute the report's content from a replay of the chosen settings.

    Parameters
    ----------
    ses : Session
        With incidents loaded.
    chosen : ReplayResult
        Replay of the settings the report is about.
    current : ReplayResult or DetectorConfig, optional
        Today's settings: a replay adds their figures beside the chosen ones;
        a config only fills the settings table (default: the workspace's).
    first_hour, split_hour : int, optional
        First scored hour (default: the chosen settings' first replayed hour) and
        first held-out hour (None: one period, no held-out weeks).
    trials : DataFrame, optional
        Trials of a study (columns miss_rate, feasible, alerts_per_analyst_day...).
    front : DataFrame, optional
        The study's best trade-offs (`calibrate.tuning.search.pareto_frame`).
    feasible, reason, holdout_warning : optional
        What the search said.
    derived_from_held_out : bool
        Some incidents were made from verdicts on held-out-week alerts (`retune`): the
        held-out check is then not independent, and the report says so.
    """
    ws, hist = ses.ws, ses.history
    n = hist.n_hours
    config = chosen.config
    first = api.first_scored_hour(config, ws) if first_hour is None else int(first_hour)
    split = None if split_hour is None or not first < split_hour < n else int(split_hour)
    bounds = [("tuning weeks", first, split), ("held-out weeks", split, n)] if split else [
        ("replayed weeks", first, n)
    ]
    cur_replay = current if isinstance(current, ReplayResult) else None
    cur_config = cur_replay.config if cur_replay else (current or ws.detector)
    goal = ws.goal
    teams = list(dict.fromkeys([*ses.analysts, *sorted(set(chosen.episodes.team.tolist()))]))
    budgets = {t: goal.budget(t) for t in teams}

    periods = []
    held_out = None
    for name, a, b in bounds:
        # every period counts from the first scored hour, as `score` and `volume` do
        figures = api.score_episodes(ses, chosen.episodes, a, b, first_scored=first)
        if name == "held-out weeks":
            held_out = figures
        figs = figures.to_json_dict()
        cur = None
        if cur_replay is not None:
            cur = api.score_episodes(ses, cur_replay.episodes, a, b,
                                     first_scored=first).to_json_dict()
        met, verdict = goal_verdict(figs, goal.max_miss_rate, ses.analysts)
        periods.append(
            PeriodData(name, a, b, _iso(hist.hours, a), _iso(hist.hours, b), figs, met,
                       verdict, cur)
        )
    tune_a, tune_b = bounds[0][1], bounds[0][2]
    curve = curve_data(ses, chosen, tune_a, tune_b, teams, budgets)
    impact = impact_data(ses, chosen, tune_a, tune_b, teams, budgets)
    impact_groups = [] if impact is not None else group_impact_data(
        ses, chosen, tune_a, tune_b, teams, budgets)
    tuning = periods[0].figures
    tradeoff = tradeoff_data(trials, tuning, ses.analysts, budgets, goal.max_miss_rate, curve,
                             front)
    volume = volume_data(ses, chosen, first, split)
    incidents, delays = incident_rows(periods, hist.hours)
    panels, left_out = series_panels(ses, chosen, first, n, incidents)
    from calibrate.tuning import search

    verdict, reasons = validation_verdict(held_out, goal)
    validation = {
        "verdict": verdict, "reasons": reasons,
        "interval_method": periods[0].figures.get("interval_method", ""),
        "labels": search.labels_line(periods[0].figures["incidents"], goal),
        "independent": not derived_from_held_out,
    }
    if derived_from_held_out:
        validation["reasons"] = [*reasons, HELD_OUT_NOTE]
    return ReportData(
        title=title,
        generated=datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        workspace=str(ws.file),
        source=source,
        goal={
            "max_miss_rate": goal.max_miss_rate,
            "target_recall": 1.0 - goal.max_miss_rate,
            "max_alerts_per_analyst_day": {t: _finite(b) for t, b in budgets.items()},
        },
        feasible=feasible,
        reason=reason,
        holdout_warning=holdout_warning,
        periods=periods,
        settings=settings_rows(cur_config, config),
        tradeoff=tradeoff,
        curve=curve,
        volume=volume,
        delays=delays,
        early_hours=ws.incidents.early_hours,
        late_hours=ws.incidents.late_hours,
        panels=panels,
        panels_left_out=left_out,
        incidents=incidents,
        provenance=dict(provenance or {}),
        validation=validation,
        impact=impact,
        impact_groups=impact_groups,
    )


def goal_verdict(
    figs: Mapping[str, Any], max_miss_rate: float, analysts: Mapping[str, int]
) -> tuple[bool, str]:
    """Whether one period's figures meet the goal, and a plain sentence saying so."""
    parts = []
    miss = figs["miss_rate"]
    n = figs["incidents"]
    if n == 0:
        miss_ok = True
        parts.append("no labelled incidents in this period, so recall cannot be judged")
    else:
        miss_ok = miss <= max_miss_rate
        parts.append(
            f"{figs['caught']} of {n} incidents caught: miss rate {_pct(miss)} "
            f"(95% interval {_pct(figs['miss_rate_low'])} to {_pct(figs['miss_rate_high'])}), "
            f"goal at most {_pct(max_miss_rate)}"
        )
        high = figs["miss_rate_high"]
        if miss_ok and high is not None and high > max_miss_rate:
            parts.append("the interval reaches past the goal, so with this few incidents "
                         "the result could be luck")
    over = []
    for team, row in sorted(figs.get("per_team", {}).items()):
        if analysts.get(team, 0) <= 0:
            continue
        rate, budget = row.get("alerts_per_analyst_day"), row.get("budget")
        if rate is not None and budget is not None and rate > budget:
            over.append(f"{team} {rate:.2f} > {budget:g}")
    if over:
        parts.append("over the alert budget: " + ", ".join(over))
    else:
        parts.append("every team within its alert budget")
    met = miss_ok and not over
    return met, ("Met" if met else "Not met") + ": " + "; ".join(parts) + "."


def settings_rows(current: DetectorConfig, chosen: DetectorConfig) -> list[SettingRow]:
    """Current and chosen settings side by side (base table, then each group's keys)."""
    cur, new = _flat(current.to_table()), _flat(chosen.to_table())
    names = list(dict.fromkeys([*cur, *new]))
    return [SettingRow(k, cur.get(k, "(not set)"), new.get(k, "(not set)")) for k in names]


def _flat(table: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in table.items():
        if isinstance(v, Mapping):
            out.update(_flat(v, f"{prefix}{k}."))
        else:
            out[f"{prefix}{k}"] = list(v) if isinstance(v, tuple) else v
    return out


def tradeoff_data(
    trials: pd.DataFrame | None,
    tuning: Mapping[str, Any],
    analysts: Mapping[str, int],
    budgets: Mapping[str, float],
    max_miss_rate: float,
    curve: CurveData,
    front: pd.DataFrame | None = None,
) -> TradeoffData:
    """Trade-off points: trials (when a study ran), the chosen point, the k curve and
    the study's best trade-offs (`front`: columns load and recall)."""
    chosen_rates = {
        t: (row.get("alerts_per_analyst_day") if row.get("alerts_per_analyst_day") is not None
            else math.nan)
        for t, row in tuning.get("per_team", {}).items()
    }
    cx, budget, label = load_axis(chosen_rates, budgets, analysts)
    cy = tuning["recall"]
    xs: list[float] = []
    ys: list[float] = []
    ok: list[bool] = []
    if trials is not None and len(trials) and "miss_rate" in trials.columns:
        df = trials
        if "state" in df.columns:
            df = df[df["state"].astype(str).str.upper().str.endswith("COMPLETE")]
        cols = _team_rate_columns(df.columns, list(analysts))
        for _, row in df.iterrows():
            if row["miss_rate"] is None or not np.isfinite(float(row["miss_rate"])):
                continue
            if cols:
                rates = {t: float(row[c]) for t, c in cols.items()}
            else:
                total = max(sum(analysts.values()), 1)
                rates = {t: float(row.get("alerts", math.nan)) / total for t in analysts}
            x, _, _ = load_axis(rates, budgets, analysts)
            xs.append(float(x))
            ys.append(1.0 - float(row["miss_rate"]))
            ok.append(bool(row.get("feasible", False)))
    curve_x, curve_y = [], []
    for i in range(len(curve.ks)):
        rates = {t: curve.team_rate[j][i] for j, t in enumerate(curve.teams)}
        x, _, _ = load_axis(rates, budgets, analysts)
        if x == x:
            curve_x.append(float(x))
            curve_y.append(float(curve.recall[i]))
    return TradeoffData(
        x=xs,
        y=ys,
        feasible=ok,
        pareto=pareto_front(xs, ys),
        chosen_x=None if cx != cx else float(cx),
        chosen_y=cy,
        budget=budget,
        target_recall=1.0 - max_miss_rate,
        x_label=label,
        curve_x=curve_x,
        curve_y=curve_y,
        front_x=[] if front is None else [float(v) for v in front["load"]],
        front_y=[] if front is None else [float(v) for v in front["recall"]],
    )


def _team_rate_columns(columns: Sequence[str], teams: list[str]) -> dict[str, str]:
    out = {}
    for t in teams:
        for c in columns:
            c = str(c)
            if "alerts_per_analyst_day" in c and "false" not in c and c.endswith(
                (t, f"[{t}]", f"{t})")
            ):
                out[t] = c
                break
    return out if len(out) == len(teams) else {}


def curve_data(
    ses: api.Session,
    chosen: ReplayResult,
    start: int,
    end: int,
    teams: list[str],
    budgets: Mapping[str, float],
) -> CurveData:
    """Recall and alerts per analyst per day for a grid of multipliers (one sweep)."""
    s = ses.ws.search
    k0 = chosen.config.base.fence_multiplier
    per_group = any(g.settings.fence_multiplier != k0 for g in chosen.config.groups)
    lo, hi = min(s.multiplier_low, k0), max(s.multiplier_high, k0)
    ks = np.unique(np.r_[np.geomspace(max(lo, 1e-3), hi, CURVE_POINTS), k0])
    eps = sweep_codes(chosen.scores, ks, chosen.routes, start_hours=(start, end))
    inc = period_filter(ses.incidents, start, end)
    c = multiplier_curve(eps, ks, inc, ses.ws.incidents.early_hours,
                         ses.ws.incidents.late_hours, ses.analysts, max(end - start, 1) / 24.0)
    pos = {t: j for j, t in enumerate(c.teams)}
    shown = [t for t in teams if ses.analysts.get(t, 0) > 0]
    recall = 1.0 - c.miss_rate
    return CurveData(
        ks=ks.tolist(),
        recall=_floats(recall),
        recall_low=_floats(1.0 - c.miss_rate_high),
        recall_high=_floats(1.0 - c.miss_rate_low),
        alerts=c.alerts.tolist(),
        teams=shown,
        team_rate=[_floats(c.alerts_per_analyst_day[:, pos[t]]) for t in shown],
        budgets=[_finite(budgets.get(t, math.inf)) for t in shown],
        target_recall=1.0 - ses.ws.goal.max_miss_rate,
        chosen_k=None if per_group else k0,
        per_group=per_group,
    )


def impact_data(
    ses: api.Session,
    chosen: ReplayResult,
    start: int,
    end: int,
    teams: list[str],
    budgets: Mapping[str, float],
) -> CurveData | None:
    """Recall and alerts per analyst per day over minimum impacts at the chosen k.

    Every metric's minimum impact moves over the same share of its range (the search's
    grid). None when groups have their own multiplier or minimum impacts.
    """
    base = chosen.config.base
    key = (base.fence_multiplier, base.min_impact, base.min_impact_per_metric)
    if any((g.settings.fence_multiplier, g.settings.min_impact,
            g.settings.min_impact_per_metric) != key for g in chosen.config.groups):
        return None
    return _impact_curve(ses, chosen, chosen.scores, {}, base, None, start, end, teams, budgets)


def group_impact_data(
    ses: api.Session,
    chosen: ReplayResult,
    start: int,
    end: int,
    teams: list[str],
    budgets: Mapping[str, float],
) -> list[tuple[str, CurveData]]:
    """For a config with groups: per group, recall and alerts per analyst per day (of
    every group together) as that group's minimum impact moves at its chosen k, every
    other group at its chosen settings. Grids as in `impact_data`, per group."""
    from calibrate.inputs.workspace import BASE_GROUP

    config = chosen.config
    owner = {key: next((i for i, g in enumerate(config.groups) if g.matches(*key)), None)
             for key in chosen.scores}
    out = []
    for i in [*range(len(config.groups)), None] if config.groups else []:
        mine = {key: ms for key, ms in chosen.scores.items() if owner[key] == i}
        if not mine:
            continue
        name = BASE_GROUP if i is None else config.groups[i].name
        rest = {key: ms for key, ms in chosen.scores.items() if owner[key] != i}
        group = name if ses.ws.search.tune_by != "all" else None
        out.append((name, _impact_curve(
            ses, chosen, mine, rest, config.base if i is None else config.groups[i].settings,
            group, start, end, teams, budgets)))
    return out


def _impact_curve(ses, chosen, mine, rest, s, group, start, end, teams, budgets) -> CurveData:
    """Recall and load of all series as the minimum impacts of those in `mine` (settings
    `s`, search group `group`) move together over their per-metric grids (x: the share of
    each metric's range, `search.impact_grids`), those in `rest` at their own settings."""
    from calibrate.engine.replay import sweep, sweep_runs
    from calibrate.scoring.curves import impact_curves
    from calibrate.scoring.intervals import wilson
    from calibrate.tuning import search

    inc = period_filter(ses.incidents, start, end)
    early, late = ses.ws.incidents.early_hours, ses.ws.incidents.late_hours
    days = max(end - start, 1) / 24.0
    shown = [t for t in teams if ses.analysts.get(t, 0) > 0]
    others = period_filter(sweep(rest, None, chosen.routes), start, end) if rest else None
    caught_o = (match(others, inc, early, late).caught if others is not None
                else np.zeros(len(inc), dtype=bool))
    team_o = {} if others is None else pd.Series(others.team).value_counts().to_dict()
    n_o = 0 if others is None else len(others)
    metrics = sorted({m for _, m in mine})
    ranges = {m: r for m, r in search.impact_ranges(ses, group, end).items() if m in metrics}
    ranges.update({m: (0.0, search.typical_level(ses, m, end)) for m in metrics
                   if m not in ranges})
    own = {m: s.impact_for(m) for m in metrics}
    grids = search.impact_grids(ranges, [own])
    first = metrics[0]
    lo, hi = ranges[first]
    share = (grids[first] - lo) / (hi - lo) if hi > lo else np.zeros(len(grids[first]))
    chosen_share = float((own[first] - lo) / (hi - lo)) if hi > lo else 0.0
    k = np.array([s.fence_multiplier])
    runs = sweep_runs(mine, k, chosen.routes, start_hours=(start, end), min_impacts=grids)
    curves, caught_lk = impact_curves(runs, k, inc, early, late, ses.analysts, days)
    caught = np.array([int((caught_o | caught_lk[lv, 0]).sum()) for lv in range(len(curves))])
    n = np.full(len(curves), len(inc))
    low, high = wilson(n - caught, n)
    miss = (n - caught) / np.where(n > 0, n, 1) if len(inc) else np.full(len(curves), np.nan)
    rates = []
    for t in shown:
        mine_t = np.array([c.team_alerts[0, c.teams.index(t)] if t in c.teams else 0
                           for c in curves])
        rates.append((mine_t + team_o.get(t, 0)) / (ses.analysts[t] * days))
    order = np.argsort(share, kind="stable")
    return CurveData(
        ks=share[order].tolist(), recall=_floats((1.0 - miss)[order]),
        recall_low=_floats((1.0 - high)[order]), recall_high=_floats((1.0 - low)[order]),
        alerts=[int(curves[i].alerts[0]) + n_o for i in order],
        teams=shown, team_rate=[_floats(r[order]) for r in rates],
        budgets=[_finite(budgets.get(t, math.inf)) for t in shown],
        target_recall=1.0 - ses.ws.goal.max_miss_rate, chosen_k=chosen_share,
        impacts=[{m: float(g[i]) for m, g in grids.items()} for i in order])


def volume_data(
    ses: api.Session, chosen: ReplayResult, first: int, split: int | None
) -> VolumeData:
    """Alerts per team and week over the scored period, from `api.alert_volume`."""
    n = ses.history.n_hours
    vol = api.alert_volume(ses, chosen.episodes, first, n, first_scored=first)
    weeks = list(dict.fromkeys(vol["week"].tolist()))
    teams = list(dict.fromkeys(vol["team"].tolist()))
    rate, alerts = [], []
    for t in teams:
        sub = vol[vol["team"] == t].set_index("week")
        rate.append(_floats(sub["alerts_per_analyst_day"].reindex(weeks).to_numpy()))
        alerts.append([int(v) for v in sub["alerts"].reindex(weeks).fillna(0)])
    hold = None
    if split is not None:
        iso = pd.DatetimeIndex([ses.history.hours[split]]).isocalendar()
        label = f"{int(iso['year'].iloc[0])}-W{int(iso['week'].iloc[0]):02d}"
        hold = weeks.index(label) if label in weeks else None
    table = [
        {k: _plain(v) for k, v in row.items()} for row in vol.to_dict(orient="records")
    ]
    return VolumeData(
        weeks=weeks,
        teams=teams,
        rate=rate,
        alerts=alerts,
        budgets=[_finite(ses.ws.goal.budget(t)) for t in teams],
        first_holdout_week=hold,
        table=table,
    )


def incident_rows(
    periods: list[PeriodData], hours: pd.DatetimeIndex
) -> tuple[list[dict[str, Any]], list[float]]:
    """The per-incident table (every period) and the delays of caught incidents."""
    rows, delays = [], []
    for p in periods:
        for r in p.figures.get("per_incident", []):
            row = {"period": p.name, **r}
            rows.append(row)
            if r.get("caught") and r.get("delay_hours") is not None:
                delays.append(float(r["delay_hours"]))
    return rows, delays


EXPECTED_CAPTION = {
    "fit": "Expected value: in-fit (the STL fit ending at each hour).",
    "forecast": "Expected value: forecast (one hour ahead, from the fit ending before).",
}


def series_panels(
    ses: api.Session,
    chosen: ReplayResult,
    first: int,
    end: int,
    incidents: list[dict[str, Any]],
) -> tuple[list[SeriesPanel], int]:
    """Panels for every missed incident (up to a cap) and the worst false-alert series."""
    hist = ses.history
    panels: list[SeriesPanel] = []
    missed = [r for r in incidents if not r.get("caught")]
    for r in missed[:MAX_MISSED_PANELS]:
        lv, s = r["level"], int(r["series"])
        metric = r["metric"]
        a, b = int(r["start_hour"]), int(r["end_hour"])
        lo, hi = max(first, a - PANEL_BEFORE_HOURS), min(end, b + PANEL_AFTER_HOURS)
        if metric in ("", "(any)") or (lv, metric) not in chosen.scores:
            metric = _loudest_metric(chosen.scores, lv, s, a, b)
            if metric is None:
                continue
        ms = chosen.scores[(lv, metric)]
        peak = np.nanmax(ms.score[s, a:b]) if np.isfinite(ms.score[s, a:b]).any() else math.nan
        note = (f"highest fence score inside the window {peak:.2f}, the fence needs more "
                f"than k = {ms.settings.fence_multiplier:.3g}" if peak == peak else
                "no fence score inside the window (undefined values or warm-up)")
        panels.append(_panel(
            "missed incident",
            f"Missed {r['incident_id']}: {lv} {r['series_label']}, {metric} ({r['period']})",
            ses, chosen, lv, s, metric, lo, hi, note))
    left_out = max(len(missed) - MAX_MISSED_PANELS, 0)

    eps = period_filter(chosen.episodes, first, end)
    inc = period_filter(ses.incidents, first, end)
    m = match(eps, inc, ses.ws.incidents.early_hours, ses.ws.incidents.late_hours,
              related=hist)
    false_idx = np.flatnonzero(~m.alert_true)
    groups: dict[tuple[str, int, str], list[int]] = {}
    for i in false_idx:
        groups.setdefault((eps.level[i], int(eps.series[i]), eps.metric[i]), []).append(int(i))
    worst = sorted(groups.items(), key=lambda kv: (-len(kv[1]), kv[0]))[:FALSE_ALERT_PANELS]
    for (lv, s, metric), idx in worst:
        scores = np.nan_to_num(eps.peak_score[idx], nan=-1.0, posinf=1e300)
        centre = int(eps.start[idx[int(np.argmax(scores))]])
        lo = max(first, centre - 84)
        hi = min(end, lo + 168)
        label = " / ".join(str(v) for v in hist.levels[lv].keys.iloc[s].tolist())
        shown = sum(1 for i in idx if lo <= eps.start[i] < hi)
        related = int(m.alert_related[idx].sum())
        note = (f"The week around the highest-scoring of them (peak fence score "
                f"{float(np.max(eps.peak_score[idx])):.2f}).")
        if related:
            note += (f" {related} of the {len(idx)} meet an incident labelled on a parent or "
                     "child series: if the problem was visible here too, label it here and "
                     "they stop counting as false.")
        panels.append(_panel(
            "false alerts",
            f"Most false alerts: {lv} {label}, {metric} ({len(idx)} false alerts, "
            f"{shown} in this week)",
            ses, chosen, lv, s, metric, lo, hi, note))
    return panels, left_out


def _loudest_metric(
    scores: Mapping[tuple[str, str], MetricScores], lv: str, s: int, a: int, b: int
) -> str | None:
    best, best_score = None, -math.inf
    for (level, metric), ms in scores.items():
        if level != lv:
            continue
        window = ms.score[s, a:b]
        val = np.nanmax(window) if np.isfinite(window).any() else -math.inf
        if best is None or val > best_score:
            best, best_score = metric, val
    return best


def _panel(
    kind: str,
    title: str,
    ses: api.Session,
    chosen: ReplayResult,
    lv: str,
    s: int,
    metric: str,
    lo: int,
    hi: int,
    note: str,
) -> SeriesPanel:
    hist = ses.history
    ms = chosen.scores[(lv, metric)]
    k = ms.settings.fence_multiplier
    sl = slice(lo, hi)
    iqr = ms.q3[s, sl] - ms.q1[s, sl]
    expected = ms.expected[s, sl]
    # the fences are on the remainder; drawn around the expected value to share its axis
    lower = expected + ms.q1[s, sl] - k * iqr
    upper = expected + ms.q3[s, sl] + k * iqr
    times = [_iso(hist.hours, t) for t in range(lo, hi)]
    inc = ses.incidents
    sel = (inc.level == lv) & (inc.series == s) & ((inc.metric == metric) |
                                                   (inc.metric == ANY_METRIC))
    sel &= (inc.end > lo) & (inc.start < hi)
    inc_spans = [(_iso(hist.hours, max(int(a), lo)), _iso(hist.hours, min(int(b), hi)))
                 for a, b in zip(inc.start[sel], inc.end[sel], strict=True)]
    ep = chosen.episodes
    esel = (ep.level == lv) & (ep.series == s) & (ep.metric == metric)
    esel &= (ep.end > lo) & (ep.start < hi)
    al_spans = [(_iso(hist.hours, max(int(a), lo)), _iso(hist.hours, min(int(b), hi)))
                for a, b in zip(ep.start[esel], ep.end[esel], strict=True)]
    if esel.any():
        fired = pd.Series(ep.detectors[esel]).value_counts().sort_index()
        note += " Alerts in view by detector: " + ", ".join(
            f"{d} {n}" for d, n in fired.items()) + "."
    label = " / ".join(str(v) for v in hist.levels[lv].keys.iloc[s].tolist())
    floor = None if can_be_negative(ses.ws, metric, ms.value[s]) else 0.0
    with np.errstate(invalid="ignore"):
        below = bool(floor is not None and (np.nanmin(np.r_[lower, expected, 0.0]) < 0))
    if below:
        note += (f" Fences and expected values below 0 are drawn at 0: {metric} cannot be "
                 "negative.")
    return SeriesPanel(
        kind=kind, title=title, level=lv, label=label, metric=metric, times=times,
        value=_floats(ms.value[s, sl]), expected=_floats(expected), lower=_floats(lower),
        upper=_floats(upper), k=float(k), incident_spans=inc_spans, alert_spans=al_spans,
        note=" ".join(x for x in (note.rstrip(".") + "." if note else "",
                                 EXPECTED_CAPTION[ms.settings.expected_value]) if x),
        expected_value=ms.settings.expected_value, floor=floor,
    )


def can_be_negative(ws: Any, metric: str, values: np.ndarray) -> bool:
    """False for a measure or a formula that `formulas.never_negative` clears, when
    none of the series' `values` is negative either (a measure may hold refunds)."""
    from calibrate.formulas import never_negative

    formula = ws.metrics.get(metric)
    if formula is not None and not never_negative(formula):
        return True
    with np.errstate(invalid="ignore"):
        return bool(np.any(values < 0))


# --------------------------------------------------------------------------- summary


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
            "points": [{"recall": y, "load": _finite(x)}
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


# --------------------------------------------------------------------------- render


PLOT_FILES = ("tradeoff.png", "multiplier.png", "volume.png", "delay.png")


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


def _e(x: Any) -> str:
    return html.escape(str(x))


def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]],
           row_class: Sequence[str] | None = None) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    body = []
    for i, r in enumerate(rows):
        cls = f' class="{row_class[i]}"' if row_class and row_class[i] else ""
        cells = "".join(
            f'<td class="num">{_e(c)}</td>' if isinstance(c, int | float) or _numeric(c)
            else f"<td>{_e(c)}</td>" for c in r
        )
        body.append(f"<tr{cls}>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _numeric(c: Any) -> bool:
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
        return f"{_pct(f[key])} ({_pct(f[key + '_low'])} to {_pct(f[key + '_high'])})"

    rows: list[list[Any]] = [
        ["incidents caught", *[f"{f['caught']} of {f['incidents']}" for f in cols]],
        ["recall (95% interval)", *[ci(f, "recall") for f in cols]],
        ["miss rate (95% interval)", *[ci(f, "miss_rate") for f in cols]],
        ["alerts", *[f["alerts"] for f in cols]],
        ["precision (95% interval)", *[ci(f, "precision") for f in cols]],
        ["median detection delay", *[_hours(f["delay_median_hours"]) for f in cols]],
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
            f"{r['caught']} of {r['incidents']}, {_pct(r['recall'][0])} "
            f"({_pct(r['recall'][1])} to {_pct(r['recall'][2])})" for r in folds]],
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
            rec = (f"{r['caught']} of {r['incidents']}, {_pct(r['recall'])} "
                   f"({_pct(r['recall_low'])} to {_pct(r['recall_high'])})"
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
                         f"(precision {_pct(r['precision'])})")
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
    """A self-contained HTML page: inline CSS, images as data: URIs, no scripts."""

    def img(name: str, alt: str, caption: str) -> str:
        b64 = base64.b64encode(images[name]).decode("ascii")
        return (f'<figure><img src="data:image/png;base64,{b64}" alt="{_e(alt)}">'
                f"<figcaption>{_e(caption)}</figcaption></figure>")

    return _document(data, img, html_page=True)


def _document(data: ReportData, img: Callable[[str, str, str], str], html_page: bool) -> str:
    p0 = data.periods[0]
    overall = all(p.goal_met for p in data.periods)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(data.title)}</title><style>{CSS}</style></head><body>",
        f"<h1>{_e(data.title)}</h1>",
        f'<p class="meta">Generated {_e(data.generated)} from {_e(data.workspace)}'
        + (f" &middot; {_e(data.source)}" if data.source else "") + "</p>",
        f'<div class="answer {"met" if overall else "notmet"}"><strong>In short:</strong> '
        + _e(short_answer(data)) + "</div>",
        f'<p class="caution"><strong>Caution.</strong> {_e(data.caution)}</p>',
        "<nav><ol>"
        '<li><a href="#goal">Goal and result</a></li>'
        '<li><a href="#settings">Settings</a></li>'
        '<li><a href="#tradeoff">Recall against alert load</a></li>'
        '<li><a href="#multiplier">Fence multiplier and minimum impact</a></li>'
        '<li><a href="#volume">Alerts per team and week</a></li>'
        '<li><a href="#delay">Detection delay</a></li>'
        '<li><a href="#series">Missed incidents and false alerts</a></li>'
        '<li><a href="#incidents">Every incident</a></li>'
        "</ol></nav>",
        '<h2 id="goal">1. Goal and result</h2>',
        f"<p>Goal: catch at least {_pct(data.goal['target_recall'])} of labelled incidents "
        f"(miss rate at most {_pct(data.goal['max_miss_rate'])}) while every team stays "
        f"within its alert budget ({_e(_budgets_text(data.goal))} alerts per analyst per "
        "day). Intervals are 95%; with few incidents they are wide.</p>",
    ]
    for p in data.periods:
        cls = "met" if p.goal_met else "notmet"
        parts.append(
            f'<p><span class="badge {cls}">{"MET" if p.goal_met else "NOT MET"}</span> '
            f"<strong>{_e(p.name)}</strong> ({_e(p.start[:10])} to {_e(p.end[:10])}): "
            f"{_e(p.verdict)}</p>"
        )
    if data.holdout_warning:
        parts.append(f"<p><strong>Held-out check:</strong> {_e(data.holdout_warning)}</p>")
    v = data.validation
    if v:
        parts.append(f"<p><strong>Out-of-sample verdict: {_e(v['verdict'].upper())}.</strong> "
                     f"{_e('; '.join(v['reasons']))}</p>")
        parts.append(f"<p>{_e(v['labels'])}. The tuning-week figures are optimistic (the "
                     "settings were chosen on those labels); judge by the held-out ones. "
                     f"Intervals: {_e(v['interval_method'])}.</p>")
    if v.get("folds"):
        headers, rows = fold_table(v)
        parts.append("<p>Rolling validation: each fold was tuned on the weeks before its "
                     "test block and scored there (out of sample).</p>")
        parts.append(_table(headers, rows))
    if data.reason:
        parts.append(f"<p><strong>Search:</strong> {_e(data.reason)}</p>")
    headers, rows = goal_rows(data)
    parts.append(_table(headers, rows))
    headers, rows, warnings = metric_rows(data)
    parts.append("<p>Per watched metric and per detector (chosen settings; tuning-week "
                 "figures are in-sample, chosen on these labels):</p>")
    parts.append(_table(headers, rows))
    for w in warnings:
        parts.append(f"<p><strong>Warning:</strong> {_e(w)}</p>")

    parts.append('<h2 id="settings">2. Settings: current and chosen</h2>')
    ch = data.changed
    parts.append("<p>" + (f"{len(ch)} setting(s) changed (highlighted): {_e(', '.join(ch))}."
                          if ch else "No setting changed.") + "</p>")
    parts.append(_table(
        ["setting", "current", "chosen"],
        [[r.name, _show(r.current), _show(r.chosen)] for r in data.settings],
        ["changed" if r.changed else "" for r in data.settings],
    ))

    parts.append('<h2 id="tradeoff">3. Recall against alert load</h2>')
    t = data.tradeoff
    line = ("The dark step line is the best trade-off the search found for each recall: "
            "the least alert load of any trial at any multiplier (and minimum impact) on "
            "its grid (for settings tuned per group: the chosen setting's joint solve at "
            "each recall level), so it shows what a stricter or looser recall target "
            "would cost."
            if t.front_x else "The dark step line joins the best trade-offs found.")
    what = (f"Each dot is one trial of the search ({len(t.x)} trials) at its solved "
            "multiplier; blue ones meet the goal on the tuning weeks, grey ones do not. "
            f"{line}" if t.x else "No study trials are attached to this report.")
    parts.append(img("tradeoff.png", "recall against alerts per analyst per day",
                     f"{what} The dotted line shows the chosen settings at other fence "
                     "multipliers; the star is the chosen point; the dashed lines are the "
                     "alert budget and the recall target. Up and to the left is better."))

    parts.append('<h2 id="multiplier">4. Moving the fence multiplier and the minimum impact'
                 '</h2>')
    parts.append(img("multiplier.png", "recall and alert load against fence multiplier",
                     f"Tuning weeks ({p0.start[:10]} to {p0.end[:10]}). A larger multiplier "
                     "widens the fences: fewer alerts, and eventually missed incidents. The "
                     "red line is the chosen multiplier. Every other setting is held at its "
                     "chosen value (per-group multipliers are replaced by the one on the "
                     "axis)."))
    if data.impact is not None:
        parts.append(img("impact.png", "recall and alert load against minimum impact",
                         "The same weeks at the chosen multiplier. An alert episode whose "
                         "An alert is raised once its episode's |impact so far| (value "
                         "minus expected, summed over its hours) reaches its metric's "
                         "minimum impact. Each metric's minimum impact moves over the same "
                         "share of its own range (x axis): a larger one means fewer and "
                         "later alerts, and eventually missed incidents with a small impact. "
                         "The red line is the chosen setting."))
    for i, (name, _c) in enumerate(data.impact_groups):
        parts.append(img(_impact_file(i, name), f"recall and alert load against the minimum "
                         f"impact of group {name}",
                         f"Group {name}: its minimum impact moves at its chosen multiplier, "
                         "every other group stays at its chosen settings; recall and alerts "
                         "are of all groups together. The red line is the group's chosen "
                         "minimum impact."))

    parts.append('<h2 id="volume">5. Alerts per team and week</h2>')
    parts.append(img("volume.png", "alerts per analyst per day per team and week",
                     "Bars: alerts per analyst per day in each ISO week (partial weeks are "
                     "rated by the days they have). Dashed lines: each team's budget."))
    v = data.volume
    vrows, vcls = [], []
    for r in v.table:
        over = bool(r.get("over_budget"))
        vrows.append([r["team"], r["week"], f"{r['days']:.2g}", r["alerts"], r["analysts"],
                      _num(r["alerts_per_analyst_day"]), _show(r.get("budget", "")),
                      "yes" if over else ""])
        vcls.append("bad" if over else "")
    parts.append(_table(["team", "week", "days", "alerts", "analysts",
                         "per analyst per day", "budget", "over budget"], vrows, vcls))

    parts.append('<h2 id="delay">6. Detection delay</h2>')
    parts.append(img("delay.png", "histogram of detection delays",
                     f"Hours from the labelled start of each caught incident to the first "
                     f"alert that met it ({len(data.delays)} caught incidents, every scored "
                     "period). Negative values: the alert started inside the early "
                     "tolerance."))

    parts.append('<h2 id="series">7. Missed incidents and the worst false alerts</h2>')
    n_missed = sum(1 for p in data.panels if p.kind == "missed incident")
    parts.append(
        f"<p>{n_missed + data.panels_left_out} missed incident(s)"
        + (f" ({data.panels_left_out} not drawn, see the table)" if data.panels_left_out else "")
        + f" and the {sum(1 for p in data.panels if p.kind == 'false alerts')} series with "
        "the most false alerts. Black: value; dashed: expected value; blue band: the "
        "fences (Q1 - k*IQR to Q3 + k*IQR of the remainder, drawn around the expected "
        "value); green: labelled incident window; red marks at the bottom: alerts raised. "
        "For a metric that cannot be negative (a measure, or a formula without subtraction, "
        "over a series with no negative value) fences and expected values below 0 are drawn "
        "at 0; the figures and summary.json keep the values as computed.</p>"
    )
    for i, panel in enumerate(data.panels):
        parts.append(img(_panel_file(i, panel), panel.title, panel.note))

    parts.append('<h2 id="incidents">8. Every incident</h2>')
    irows, icls = [], []
    for r in data.incidents:
        irows.append([r["period"], r["incident_id"], r["level"], r["series_label"],
                      r["metric"], r.get("team", ""), str(r.get("start", ""))[:16],
                      str(r.get("end", ""))[:16], "caught" if r["caught"] else "MISSED",
                      _hours(r.get("delay_hours"))])
        icls.append("" if r["caught"] else "bad")
    parts.append(_table(["period", "incident", "level", "series", "metric", "team", "start",
                         "end", "result", "delay"], irows, icls))
    if data.provenance:
        parts.append("<h2>Where these settings come from</h2>")
        parts.append(_table(["item", "value"], [[k, _show(v)] for k, v in
                                                 sorted(data.provenance.items())]))
    parts.append("</body></html>")
    return "\n".join(parts)


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
                       [[r.name, _show(r.current), _show(r.chosen), "**yes**" if r.changed
                         else ""] for r in data.settings])
    lines += ["", "## 3. Recall against alert load", "", "![trade-off](tradeoff.png)", "",
              "## 4. Moving the fence multiplier and the minimum impact", "",
              "![multiplier](multiplier.png)", "",
              *(["![minimum impact](impact.png)", ""] if data.impact is not None else []),
              *[x for i, (name, _c) in enumerate(data.impact_groups)
                for x in (f"![minimum impact of {name}]({_impact_file(i, name)})", "")],
              "## 5. Alerts per team and week", "", "![volume](volume.png)", ""]
    lines += _md_table(["team", "week", "alerts", "per analyst per day", "budget", "over"],
                       [[r["team"], r["week"], r["alerts"], _num(r["alerts_per_analyst_day"]),
                         _show(r.get("budget", "")), "yes" if r.get("over_budget") else ""]
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
                         _hours(r.get("delay_hours"))] for r in data.incidents])
    return "\n".join(lines) + "\n"


def _md_table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> list[str]:
    def cell(x: Any) -> str:
        return str(x).replace("|", "\\|")

    out = ["| " + " | ".join(cell(h) for h in headers) + " |",
           "|" + "---|" * len(headers)]
    out += ["| " + " | ".join(cell(c) for c in r) + " |" for r in rows]
    return out


# --------------------------------------------------------------------------- write


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
                                       default=_plain).encode("utf-8")
    files.update(extra or {})
    return write_report_data_files(files, out, force=force)


def write_report_data_files(files: Mapping[str, bytes], out_dir: str | Path,
                            force: bool = False) -> Path:
    """Write `files` as the folder `out_dir` (`calibrate.outputs.write_folder`: built
    complete first; with `force` only this tool's files in an existing folder change)."""
    from calibrate.outputs import write_folder

    return write_folder(files, out_dir, force=force)


def _review_csv(result: ReplayResult) -> bytes:
    from calibrate.feedback.review import review_frame

    return review_frame(result.alerts_frame()).to_csv(index=False).encode("utf-8")


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
        data, out_dir, force=force, extra={"alerts-for-review.csv": _review_csv(chosen)}))
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
        from calibrate.tuning import rolling, summaries

        data.validation.update(
            verdict=result.verdict, reasons=list(result.verdict_reasons),
            folds=summaries.fold_rows(result),
            stability={n: [str(x) for x in v]
                       for n, v in rolling.stability(result.folds).items()})
    step(bar, "plots and files", lambda: write_report_data(
        data, out_dir, force=force, extra={"alerts-for-review.csv": _review_csv(chosen)}))
    if steps is None:
        bar.close()
    return data


# --------------------------------------------------------------------------- helpers


def _iso(hours: pd.DatetimeIndex, t: int) -> str:
    if t >= len(hours):
        ts = hours[-1] + pd.Timedelta(hours=t - len(hours) + 1)
    else:
        ts = hours[t]
    return pd.Timestamp(ts).strftime("%Y-%m-%dT%H:%M:%SZ")


def _pct(x: Any) -> str:
    return "n/a" if x is None or x != x else f"{100 * float(x):.1f}%"


def _hours(x: Any) -> str:
    return "" if x is None or x != x else f"{float(x):.0f} h"


def _num(x: Any) -> str:
    return "n/a" if x is None or x != x else f"{float(x):.2f}"


def _show(v: Any) -> str:
    if isinstance(v, float):
        return "none" if math.isinf(v) else f"{v:.4g}"
    if isinstance(v, list | tuple):
        return ", ".join(_show(x) for x in v) or "(all)"
    if isinstance(v, Mapping):  # e.g. the provenance's goal and figures: words, not a dict
        return "; ".join(f"{str(k).replace('_', ' ')}: "
                         + (f"({_show(x)})" if isinstance(x, Mapping) else _show(x))
                         for k, x in v.items()) or "(none)"
    if v is None:
        return "none"
    return str(v)


def _budgets_text(goal: Mapping[str, Any]) -> str:
    b = goal["max_alerts_per_analyst_day"]
    vals = {v for v in b.values()}
    if len(vals) == 1:
        v = next(iter(vals))
        return "no limit" if v is None else f"{v:g}"
    return ", ".join(f"{t} {'no limit' if v is None else f'{v:g}'}" for t, v in b.items())


def _finite(x: float) -> float | None:
    return float(x) if x is not None and math.isfinite(x) else None


def _floats(a: Any) -> list[float]:
    return [float(v) for v in np.asarray(a, dtype=float)]


def _plain(v: Any) -> Any:
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, pd.Timestamp):
        return v.strftime("%Y-%m-%dT%H:%M:%SZ")
    return v
