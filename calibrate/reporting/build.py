"""The report's content (stage 9): `build_report_data` computes a `ReportData` record
from one replay of the chosen settings (plus, optionally, a replay of the current
settings and the trials of a study).

Pure computation over arrays, and what the tests check: every figure comes from
`calibrate.api.score_episodes`, `calibrate.scoring.curves.multiplier_curve` and
`calibrate.api.alert_volume`. `calibrate.reporting.render` turns the record into pages,
`calibrate.reporting.report` writes them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd

from calibrate import api
from calibrate.engine.replay import MetricScores, ReplayResult, sweep, sweep_codes, sweep_runs
from calibrate.formulas import never_negative
from calibrate.inputs.incidents import ANY_METRIC
from calibrate.inputs.workspace import BASE_GROUP
from calibrate.reporting.formats import finite, pct, plain
from calibrate.reporting.report_data import (
    CurveData,
    PeriodData,
    ReportData,
    SeriesPanel,
    SettingRow,
    TradeoffData,
    VolumeData,
)
from calibrate.scoring.curves import impact_curves, multiplier_curve
from calibrate.scoring.figures import HELD_OUT_NOTE, validation_verdict
from calibrate.scoring.intervals import wilson
from calibrate.scoring.matching import match, period_filter
from calibrate.scoring.tradeoffs import load_axis, pareto_front
from calibrate.settings import DetectorConfig
from calibrate.tuning.evaluate import labels_line
from calibrate.tuning.search_space import impact_grids, impact_ranges, typical_level

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

    verdict, reasons = validation_verdict(held_out, goal)
    validation = {
        "verdict": verdict, "reasons": reasons,
        "interval_method": periods[0].figures.get("interval_method", ""),
        "labels": labels_line(periods[0].figures["incidents"], goal),
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
            "max_alerts_per_analyst_day": {t: finite(b) for t, b in budgets.items()},
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
            f"{figs['caught']} of {n} incidents caught: miss rate {pct(miss)} "
            f"(95% interval {pct(figs['miss_rate_low'])} to {pct(figs['miss_rate_high'])}), "
            f"goal at most {pct(max_miss_rate)}"
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
        budgets=[finite(budgets.get(t, math.inf)) for t in shown],
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
    each metric's range, `impact_grids`), those in `rest` at their own settings."""
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
    ranges = {m: r for m, r in impact_ranges(ses, group, end).items() if m in metrics}
    ranges.update({m: (0.0, typical_level(ses, m, end)) for m in metrics
                   if m not in ranges})
    own = {m: s.impact_for(m) for m in metrics}
    grids = impact_grids(ranges, [own])
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
        budgets=[finite(budgets.get(t, math.inf)) for t in shown],
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
        {k: plain(v) for k, v in row.items()} for row in vol.to_dict(orient="records")
    ]
    return VolumeData(
        weeks=weeks,
        teams=teams,
        rate=rate,
        alerts=alerts,
        budgets=[finite(ses.ws.goal.budget(t)) for t in teams],
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
    formula = ws.metrics.get(metric)
    if formula is not None and not never_negative(formula):
        return True
    with np.errstate(invalid="ignore"):
        return bool(np.any(values < 0))



def _iso(hours: pd.DatetimeIndex, t: int) -> str:
    if t >= len(hours):
        ts = hours[-1] + pd.Timedelta(hours=t - len(hours) + 1)
    else:
        ts = hours[t]
    return pd.Timestamp(ts).strftime("%Y-%m-%dT%H:%M:%SZ")


def _floats(a: Any) -> list[float]:
    return [float(v) for v in np.asarray(a, dtype=float)]
