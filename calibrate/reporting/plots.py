"""PNG plots of the calibration report (matplotlib, Agg backend, CPU only).

Every function takes plain data from `calibrate.reporting.report_data` (no session,
no replay) and returns PNG bytes, so the report's content is computed and tested
first and rendered afterwards.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from typing import TYPE_CHECKING

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

if TYPE_CHECKING:
    from calibrate.reporting.report_data import CurveData, SeriesPanel, TradeoffData, VolumeData

# Our own palette: colour-blind friendly, distinct in greyscale print too.
INK = "#222222"
GRID = "#d9d9d9"
CHOSEN = "#c0392b"
FEASIBLE = "#1f77b4"
INFEASIBLE = "#b0b0b0"
FRONT = "#2c3e50"
BUDGET = "#e67e22"
TARGET = "#27ae60"
TEAM_COLOURS = ("#1f77b4", "#e69f00", "#009e73", "#cc79a7", "#56b4e9", "#d55e00", "#7f7f7f")
DPI = 110


def _style(ax: plt.Axes) -> None:
    ax.grid(True, color=GRID, linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=8)


def _hour(iso: str) -> np.datetime64:
    """ISO-8601 UTC text ('...Z') as a naive numpy hour (the axis is in UTC)."""
    return np.datetime64(iso.rstrip("Z"), "h")


def _png(fig: plt.Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, bbox_inches="tight", facecolor="white")
    plt.close(fig)
    return buf.getvalue()


def tradeoff_png(data: TradeoffData) -> bytes:
    """Recall against alert load: trials, the best trade-offs, the chosen point."""
    fig, ax = plt.subplots(figsize=(7.0, 4.2))
    _style(ax)
    if data.curve_x:
        ax.plot(data.curve_x, data.curve_y, color=CHOSEN, linewidth=1.2, alpha=0.6,
                linestyle=":", label="chosen settings, other multipliers")
    x, y, ok = np.asarray(data.x), np.asarray(data.y), np.asarray(data.feasible, dtype=bool)
    if len(x):
        ax.scatter(x[~ok], y[~ok], s=18, color=INFEASIBLE, label="trial, misses the goal")
        ax.scatter(x[ok], y[ok], s=22, color=FEASIBLE, label="trial, meets the goal")
        front = np.asarray(data.pareto, dtype=bool)
        if front.any() and not data.front_x:
            order = np.argsort(x[front])
            ax.step(x[front][order], y[front][order], where="post", color=FRONT,
                    linewidth=1.4, label="best trade-offs (Pareto front)")
    if data.front_x:
        fx, fy = np.asarray(data.front_x), np.asarray(data.front_y)
        order = np.argsort(fx, kind="stable")
        ax.step(fx[order], fy[order], where="post", color=FRONT, linewidth=1.4,
                label="best trade-offs (any trial, any multiplier)")
    if data.chosen_x is not None and data.chosen_y is not None:
        ax.scatter([data.chosen_x], [data.chosen_y], s=120, marker="*", color=CHOSEN,
                   zorder=5, label="chosen settings")
    if data.budget is not None and np.isfinite(data.budget):
        ax.axvline(data.budget, color=BUDGET, linestyle="--", linewidth=1.2,
                   label=f"alert budget ({data.budget:g})")
    ax.axhline(data.target_recall, color=TARGET, linestyle="--", linewidth=1.2,
               label=f"recall target ({100 * data.target_recall:.0f}%)")
    ax.set_xlabel(data.x_label, fontsize=9)
    ax.set_ylabel("recall (share of incidents caught)", fontsize=9)
    ax.set_ylim(-0.03, 1.05)
    ax.set_xlim(left=0)
    ax.yaxis.set_major_formatter(matplotlib.ticker.PercentFormatter(1.0))
    ax.legend(fontsize=7.5, loc="lower right", framealpha=0.9)
    ax.set_title("Recall against alert load (tuning weeks)", fontsize=10, loc="left")
    return _png(fig)


def multiplier_png(data: CurveData) -> bytes:
    """Recall (top) and alerts per analyst per day per team (bottom) against k."""
    chosen = "" if data.chosen_k is None else f" (chosen k = {data.chosen_k:.3g}, red line)"
    if data.per_group:
        chosen = " for every group at once (chosen: one k per group, see the settings)"
    return _curve_png(data, f"Moving the fence multiplier k{chosen}",
                      "fence multiplier k (fences at Q1 - k*IQR and Q3 + k*IQR)")


def impact_png(data: CurveData, group: str | None = None) -> bytes:
    """Recall (top) and alerts per analyst per day per team (bottom) against the minimum
    impacts (`data.ks`: the share of each metric's range), on a scale linear near 0 and
    logarithmic above."""
    return _png(impact_figure(data, group))


def impact_figure(data: CurveData, group: str | None = None) -> plt.Figure:
    """The figure of `impact_png`: the x axis is the minimum impact in % of each metric's
    range, and its label gives each range's top in the metric's own units."""
    chosen = "" if data.chosen_k is None else f" (chosen {100 * data.chosen_k:.3g}%, red line)"
    positive = [m for m in data.ks if m > 0]
    of = "the minimum impacts" if group is None else f"group {group}'s minimum impacts"
    tops = impact_range_tops(data)
    unit = ", ".join(f"{m} {v:.4g}" for m, v in tops.items())
    xlabel = "minimum impact, % of each metric's range" + (
        f"\n100% = {unit} (each in its own units)" if unit else "")
    return curve_figure(data, f"Moving {of} at the chosen k{chosen}", xlabel,
                        symlog=min(positive) if positive else None, percent_x=True)


def impact_range_tops(data: CurveData) -> dict[str, float]:
    """Each metric's minimum impact at 100% of its range, from the curve's points (share
    `ks[i]` holds ``low + share * (high - low)`` of each metric, `impacts[i]`)."""
    ks = np.asarray(data.ks, dtype=float)
    impacts = list(getattr(data, "impacts", None) or [])
    if len(impacts) != len(ks) or not len(ks) or ks.max() <= 0:
        return {}
    lo_i, hi_i = int(np.argmin(ks)), int(np.argmax(ks))
    span = ks[hi_i] - ks[lo_i]
    return {m: impacts[lo_i][m] + (impacts[hi_i][m] - impacts[lo_i][m]) * (1 - ks[lo_i]) / span
            for m in impacts[hi_i]}


def _budget_lines(ax: plt.Axes, teams: Sequence[str], budgets: Sequence[float | None],
                  colour_of, shared: str = INK) -> None:
    """One dashed line per distinct budget, labelled with the teams it applies to (teams
    sharing a budget would otherwise draw lines on top of each other); a budget of one
    team takes `colour_of(team index)`, a shared one `shared`."""
    by_budget: dict[float, list[int]] = {}
    for j, b in enumerate(budgets):
        if b is not None and np.isfinite(b):
            by_budget.setdefault(float(b), []).append(j)
    for b, idx in sorted(by_budget.items()):
        colour = colour_of(idx[0]) if len(idx) == 1 else shared
        ax.axhline(b, color=colour, linestyle="--", linewidth=1.1,
                   label=f"budget {b:g}: {', '.join(teams[j] for j in idx)}")


def _curve_png(data: CurveData, title: str, xlabel: str, symlog: float | None = None) -> bytes:
    return _png(curve_figure(data, title, xlabel, symlog))


def curve_figure(data: CurveData, title: str, xlabel: str, symlog: float | None = None,
                 percent_x: bool = False) -> plt.Figure:
    """The figure of `multiplier_png` and `impact_png` (for tests: not yet a PNG)."""
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(7.0, 5.0), sharex=True,
                                      gridspec_kw={"height_ratios": [1, 1.2]})
    if symlog is not None:
        bottom.set_xscale("symlog", linthresh=symlog)
    for ax in (top, bottom):
        _style(ax)
        if data.chosen_k is not None:
            ax.axvline(data.chosen_k, color=CHOSEN, linewidth=1.2, linestyle="-", alpha=0.8)
    ks = np.asarray(data.ks)
    top.fill_between(ks, data.recall_low, data.recall_high, step="post", color=FEASIBLE,
                     alpha=0.15, linewidth=0, label="95% interval")
    top.step(ks, data.recall, where="post", color=FEASIBLE, linewidth=1.6, label="recall")
    top.axhline(data.target_recall, color=TARGET, linestyle="--", linewidth=1.2,
                label=f"target ({100 * data.target_recall:.0f}%)")
    top.set_ylim(-0.03, 1.05)
    top.yaxis.set_major_formatter(matplotlib.ticker.PercentFormatter(1.0))
    top.set_ylabel("recall", fontsize=9)
    top.legend(fontsize=7.5, loc="lower left", framealpha=0.9)
    top.set_title(title, fontsize=10, loc="left")
    for j, team in enumerate(data.teams):
        bottom.step(ks, data.team_rate[j], where="post", linewidth=1.4,
                    color=TEAM_COLOURS[j % len(TEAM_COLOURS)], label=team)
    _budget_lines(bottom, data.teams, data.budgets, lambda _: BUDGET, BUDGET)
    bottom.set_ylabel("alerts per analyst per day", fontsize=9)
    bottom.set_xlabel(xlabel, fontsize=9)
    bottom.set_ylim(bottom=0)
    bottom.legend(fontsize=7.5, loc="upper right", framealpha=0.9)
    if percent_x:  # 0.1% stays 0.1% (PercentFormatter rounds it to 0%)
        bottom.xaxis.set_major_formatter(
            matplotlib.ticker.FuncFormatter(lambda x, _: f"{100 * x:.4g}%"))
    fig.tight_layout()
    return fig


MAX_WEEK_LABELS = 8  # "2026-W10" at 8 pt: more than this overlap on a 7-inch chart


def volume_png(data: VolumeData) -> bytes:
    """Alerts per analyst per day, per team and ISO week, against each team's budget."""
    return _png(volume_figure(data))


def volume_figure(data: VolumeData) -> plt.Figure:
    """The figure of `volume_png` (for tests: not yet a PNG)."""
    weeks, teams = list(data.weeks), list(data.teams)
    fig, ax = plt.subplots(figsize=(7.0, 3.6))
    _style(ax)
    width = 0.8 / max(len(teams), 1)
    xs = np.arange(len(weeks))
    for j, team in enumerate(teams):
        colour = TEAM_COLOURS[j % len(TEAM_COLOURS)]
        rates = np.asarray(data.rate[j], dtype=float)
        ax.bar(xs - 0.4 + width * (j + 0.5), np.nan_to_num(rates), width, color=colour,
               label=team, edgecolor="white", linewidth=0.5)
    _budget_lines(ax, teams, data.budgets, lambda j: TEAM_COLOURS[j % len(TEAM_COLOURS)])
    if data.first_holdout_week is not None:
        ax.axvline(data.first_holdout_week - 0.5, color=INK, linewidth=0.9)
        ax.annotate("held-out weeks →", (data.first_holdout_week - 0.45, 0.98),
                    xycoords=("data", "axes fraction"), fontsize=7.5, va="top",
                    bbox={"facecolor": "white", "edgecolor": "none", "pad": 1})
    # a tick per week, a label on every step-th (the first held-out week among them)
    step = -(-len(weeks) // MAX_WEEK_LABELS) if weeks else 1
    anchor = (data.first_holdout_week or 0) % step
    ax.set_xticks(xs, minor=True)
    ax.set_xticks(xs[anchor::step], [weeks[i] for i in xs[anchor::step]], fontsize=8)
    ax.set_xlim(-0.5, len(weeks) - 0.5)
    ax.set_xlabel("ISO week" + (f" (labelled every {step} weeks)" if step > 1 else ""),
                  fontsize=8.5)
    ax.set_ylabel("alerts per analyst per day", fontsize=9)
    ax.legend(fontsize=7.5, loc="upper left", bbox_to_anchor=(1.0, 1.0), framealpha=0.9)
    ax.set_title("Alert load per team and week (chosen settings)", fontsize=10, loc="left")
    return fig


def delay_png(delays: Sequence[float], early_hours: int, late_hours: int) -> bytes:
    """Histogram of detection delays (hours from incident start to first alert)."""
    fig, ax = plt.subplots(figsize=(7.0, 2.8))
    _style(ax)
    d = np.asarray([v for v in delays if v is not None and np.isfinite(v)], dtype=float)
    if len(d):
        lo, hi = int(np.floor(d.min())), int(np.ceil(d.max()))
        bins = np.arange(min(lo, 0) - 0.5, max(hi, 1) + 1.5, 1.0)
        ax.hist(d, bins=bins, color=FEASIBLE, edgecolor="white")
        med = float(np.median(d))
        ax.axvline(med, color=CHOSEN, linewidth=1.2, label=f"median {med:.1f} h")
        ax.legend(fontsize=7.5, loc="upper right")
        ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
        ax.set_xlim(min(-early_hours, lo) - 1.5, max(hi, 12) + 1.5)
    else:
        ax.text(0.5, 0.5, "no incident was caught", ha="center", va="center",
                transform=ax.transAxes, fontsize=9)
    ax.set_xlabel(f"hours from incident start to first alert (matching allows {early_hours} h "
                  f"early, {late_hours} h after the end)", fontsize=8.5)
    ax.set_ylabel("incidents", fontsize=9)
    ax.set_title("Detection delay of caught incidents", fontsize=10, loc="left")
    return _png(fig)


def series_png(panel: SeriesPanel) -> bytes:
    """Value, expected value and fences of one series, incident and alert spans shaded."""
    return _png(series_figure(panel))


def series_figure(panel: SeriesPanel) -> plt.Figure:
    """The figure of `series_png`; fences and expected value are drawn no lower than the
    panel's `floor` (0 for a metric that cannot be negative)."""
    fig, ax = plt.subplots(figsize=(7.0, 2.9))
    _style(ax)
    t = np.array([_hour(x) for x in panel.times])
    lower, upper, expected = (np.asarray(v, dtype=float) for v in
                              (panel.lower, panel.upper, panel.expected))
    fences = f"fences (k = {panel.k:.3g})"
    floor = getattr(panel, "floor", None)
    if floor is not None:
        # np.maximum keeps NaN (no value) as NaN
        lower, upper, expected = (np.maximum(v, floor) for v in (lower, upper, expected))
        fences += f", drawn from {floor:g}"
    ax.fill_between(t, lower, upper, color=FEASIBLE, alpha=0.15, linewidth=0,
                    label=fences, step="mid")
    ax.plot(t, expected, color=FEASIBLE, linewidth=1.0, linestyle="--",
            label=f"expected ({panel.expected_value})")
    ax.plot(t, panel.value, color=INK, linewidth=1.1, label="value")
    first = True
    for s, e in panel.incident_spans:
        ax.axvspan(_hour(s), _hour(e), color=TARGET, alpha=0.22,
                   linewidth=0, label="incident window" if first else None)
        first = False
    first = True
    for s, e in panel.alert_spans:
        ax.axvspan(_hour(s), _hour(e), ymin=0.0, ymax=0.06,
                   color=CHOSEN, linewidth=0, label="alert raised" if first else None)
        first = False
    ax.set_title(panel.title, fontsize=9.5, loc="left")
    ax.set_ylabel(panel.metric, fontsize=9)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.0, 1.0), framealpha=0.9)
    fig.autofmt_xdate(rotation=0, ha="center")
    ax.xaxis.set_major_formatter(matplotlib.dates.DateFormatter("%b %d"))
    return fig


def comparison_png(
    teams: Sequence[str],
    old: Sequence[float | None],
    new: Sequence[float | None],
    budgets: Sequence[float | None],
) -> bytes:
    """Alerts per analyst per day per team: previous settings next to the new ones."""
    fig, ax = plt.subplots(figsize=(6.0, 3.0))
    _style(ax)
    xs = np.arange(len(teams))

    def vals(v: Sequence[float | None]) -> np.ndarray:
        return np.array([np.nan if x is None else x for x in v], dtype=float)

    ax.bar(xs - 0.2, np.nan_to_num(vals(old)), 0.4, color=INFEASIBLE, label="previous")
    ax.bar(xs + 0.2, np.nan_to_num(vals(new)), 0.4, color=FEASIBLE, label="new")
    for x, b in zip(xs, budgets, strict=True):
        if b is not None and np.isfinite(b):
            ax.hlines(b, x - 0.45, x + 0.45, colors=BUDGET, linestyles="--", linewidth=1.2)
    ax.plot([], [], color=BUDGET, linestyle="--", label="budget")
    ax.set_xticks(xs, list(teams), fontsize=8)
    ax.set_ylabel("alerts per analyst per day", fontsize=9)
    ax.legend(fontsize=7.5, loc="upper left", bbox_to_anchor=(1.0, 1.0))
    ax.set_title("Alert load per team, same history", fontsize=10, loc="left")
    return _png(fig)
