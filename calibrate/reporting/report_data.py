"""The report's content as plain records (stage 9): what `calibrate.reporting.build`
computes, `calibrate.reporting.render` renders and `calibrate.reporting.plots` draws.
Pure data, no computation."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

CAUTION = (
    "A tuned configuration is only as good as the incident labels it was tuned on: "
    "incidents nobody labelled count as false alerts, and labelled incidents that were "
    "never real pull the fences too tight. Check the settings on held-out weeks (below) "
    "and with the analysts who will receive the alerts before rollout."
)


@dataclass
class PeriodData:
    """Figures of the chosen (and current) settings over one period."""

    name: str
    start_hour: int
    end_hour: int
    start: str
    end: str
    figures: dict[str, Any]
    goal_met: bool
    verdict: str
    current_figures: dict[str, Any] | None = None


@dataclass
class SettingRow:
    """One detector setting, current value next to the chosen one."""

    name: str
    current: Any
    chosen: Any

    @property
    def changed(self) -> bool:
        return self.current != self.chosen


@dataclass
class TradeoffData:
    """Points of the recall / alert-load trade-off plot (tuning weeks)."""

    x: list[float]
    y: list[float]
    feasible: list[bool]
    pareto: list[bool]
    chosen_x: float | None
    chosen_y: float | None
    budget: float | None
    target_recall: float
    x_label: str
    curve_x: list[float] = field(default_factory=list)
    curve_y: list[float] = field(default_factory=list)
    # best trade-offs over every trial and every multiplier of its grid (a search's
    # `pareto` frame); empty: the step line joins the undominated trial points
    front_x: list[float] = field(default_factory=list)
    front_y: list[float] = field(default_factory=list)


@dataclass
class CurveData:
    """Recall and alert load of the chosen settings over a multiplier grid."""

    ks: list[float]
    recall: list[float]
    recall_low: list[float]
    recall_high: list[float]
    alerts: list[int]
    teams: list[str]
    team_rate: list[list[float]]
    budgets: list[float | None]
    target_recall: float
    chosen_k: float | None
    per_group: bool = False  # groups have their own multipliers: the curve moves one k for all
    # minimum-impact curves: per x, each metric's minimum impact (its own units)
    impacts: list[dict[str, float]] = field(default_factory=list)


@dataclass
class VolumeData:
    """Alerts per analyst per day per team and ISO week (chosen settings)."""

    weeks: list[str]
    teams: list[str]
    rate: list[list[float]]
    alerts: list[list[int]]
    budgets: list[float | None]
    first_holdout_week: int | None
    table: list[dict[str, Any]]


@dataclass
class SeriesPanel:
    """One series around a missed incident or a run of false alerts."""

    kind: str  # "missed incident" or "false alerts"
    title: str
    level: str
    label: str
    metric: str
    times: list[str]
    value: list[float]
    expected: list[float]
    lower: list[float]
    upper: list[float]
    k: float
    incident_spans: list[tuple[str, str]]
    alert_spans: list[tuple[str, str]]
    note: str = ""
    expected_value: str = "fit"  # the mode of the expected line: "fit" or "forecast"
    # fences and expected values are drawn no lower than this (0 for a metric that
    # cannot be negative, `can_be_negative`); None: drawn as they are
    floor: float | None = None


@dataclass
class ReportData:
    """Everything the report shows, as plain data (rendered afterwards)."""

    title: str
    generated: str
    workspace: str
    source: str
    goal: dict[str, Any]
    feasible: bool | None
    reason: str
    holdout_warning: str
    periods: list[PeriodData]
    settings: list[SettingRow]
    tradeoff: TradeoffData
    curve: CurveData
    volume: VolumeData
    delays: list[float]
    early_hours: int
    late_hours: int
    panels: list[SeriesPanel]
    panels_left_out: int
    incidents: list[dict[str, Any]]
    caution: str = CAUTION
    provenance: dict[str, Any] = field(default_factory=dict)
    # recall and load over minimum impacts at the chosen k (None: groups differ in it)
    impact: CurveData | None = None
    # with groups: per group, the same as that group's minimum impact moves alone
    impact_groups: list[tuple[str, CurveData]] = field(default_factory=list)
    # out-of-sample verdict: verdict ("holds", "does not hold", "cannot tell"), reasons,
    # interval methods, what the tuning labels can show, independence of the check
    validation: dict[str, Any] = field(default_factory=dict)

    @property
    def changed(self) -> list[str]:
        return [r.name for r in self.settings if r.changed]
