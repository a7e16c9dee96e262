"""What the report's plots draw: week labels that do not overlap, one labelled line per
distinct budget, fences of metrics that cannot be negative drawn from 0, a unit on
the minimum-impact axis. Reference: the matplotlib artists of each figure (captured
where the figure is turned into a PNG) and the input data."""

from __future__ import annotations

import itertools

import matplotlib.collections
import numpy as np
import pytest

from calibrate.formulas import never_negative
from calibrate.reporting import plots
from calibrate.reporting.build import can_be_negative
from calibrate.reporting.report_data import CurveData, SeriesPanel, VolumeData


@pytest.fixture
def figures(monkeypatch):
    """The figures the PNG functions make, in order (no PNG is encoded)."""
    made = []
    monkeypatch.setattr(plots, "_png", lambda fig: made.append(fig) or b"")
    return made


def volume(n_weeks: int, budgets) -> VolumeData:
    weeks = [f"2026-W{w:02d}" for w in range(1, n_weeks + 1)]
    teams = ["red", "blue", "gold"]
    rate = [list(np.linspace(1, 5, n_weeks) + j) for j in range(3)]
    return VolumeData(weeks=weeks, teams=teams, rate=rate, alerts=[[1] * n_weeks] * 3,
                      budgets=budgets, first_holdout_week=n_weeks - 5, table=[])


def budget_lines(ax) -> dict[str, float]:
    return {ln.get_label(): float(ln.get_ydata()[0]) for ln in ax.get_lines()
            if ln.get_label().startswith("budget")}


@pytest.mark.parametrize("n_weeks", [13, 26, 53])
def test_week_labels_do_not_overlap_and_name_their_weeks(figures, n_weeks):
    data = volume(n_weeks, [8.0, 8.0, 5.0])
    plots.volume_png(data)
    fig = figures[0]
    ax = fig.axes[0]
    fig.canvas.draw()
    labels = [t for t in ax.get_xticklabels() if t.get_visible() and t.get_text()]
    boxes = [t.get_window_extent() for t in labels]
    for a, b in itertools.combinations(boxes, 2):
        assert not a.overlaps(b), (n_weeks, [t.get_text() for t in labels])
    assert len(labels) >= 2
    for tick, text in zip(ax.get_xticks(), labels, strict=True):
        assert text.get_text() == data.weeks[int(tick)]
    assert data.weeks[data.first_holdout_week] in [t.get_text() for t in labels]


def test_one_line_per_distinct_budget_naming_its_teams(figures):
    plots.volume_png(volume(6, [8.0, 8.0, 5.0]))
    assert budget_lines(figures[0].axes[0]) == {"budget 5: gold": 5.0, "budget 8: red, blue": 8.0}
    curve = CurveData(ks=[1.0, 2.0, 3.0], recall=[1.0, 0.8, 0.5], recall_low=[0.8, 0.6, 0.3],
                      recall_high=[1.0, 0.9, 0.7], alerts=[30, 20, 10], teams=["red", "blue"],
                      team_rate=[[3.0, 2.0, 1.0], [2.5, 1.5, 0.5]], budgets=[2.0, 2.0],
                      target_recall=0.75, chosen_k=2.0)
    plots.multiplier_png(curve)
    assert budget_lines(figures[1].axes[1]) == {"budget 2: red, blue": 2.0}


def panel(floor):
    times = [f"2026-02-01T{h:02d}:00:00Z" for h in range(6)]
    return SeriesPanel(kind="false alerts", title="t", level="campaign", label="m1 / a1",
                       metric="ctr", times=times, value=[0.02, 0.03, 0.01, 0.02, 0.0, 0.02],
                       expected=[0.02, 0.02, -0.01, 0.02, float("nan"), 0.01],
                       lower=[-0.01, 0.0, -0.04, 0.01, float("nan"), -0.02],
                       upper=[0.05, 0.04, 0.02, 0.03, float("nan"), 0.04], k=1.5,
                       incident_spans=[], alert_spans=[], floor=floor)


@pytest.mark.parametrize("floor", [0.0, None])
def test_fences_of_a_metric_that_cannot_be_negative_are_drawn_from_zero(figures, floor):
    p = panel(floor)
    plots.series_png(p)
    ax = figures[0].axes[0]
    band = next(c for c in ax.collections if isinstance(c, matplotlib.collections.PolyCollection))
    ys = np.concatenate([path.vertices[:, 1] for path in band.get_paths()])
    expected = next(ln for ln in ax.get_lines()
                    if ln.get_label().startswith("expected")).get_ydata()
    fences = next(c.get_label() for c in ax.collections if c.get_label().startswith("fences"))
    if floor is None:
        assert ys.min() == pytest.approx(min(p.lower[:4] + p.lower[5:]))
        np.testing.assert_array_equal(expected, p.expected)
        assert "drawn from" not in fences
    else:
        assert ys.min() == 0.0
        np.testing.assert_array_equal(expected, np.maximum(p.expected, 0.0))
        assert np.isnan(expected[4])  # no value stays no value, not 0
        assert fences.endswith("drawn from 0")


@pytest.mark.parametrize(("formula", "never"), [
    ("clicks / impressions", True), ("(clicks + 2) * impressions / 3", True),
    ("abs(revenue - spend)", True), ("min(clicks, impressions)", True),
    ("revenue - spend", False), ("-clicks", False), ("clicks * -1", False),
    ("max(clicks, revenue - spend)", False),
])
def test_never_negative_formulas(formula, never):
    assert never_negative(formula) is never


def test_what_can_be_negative():
    from types import SimpleNamespace

    ws = SimpleNamespace(metrics={"ctr": "clicks / impressions", "margin": "revenue - spend"})
    plain = np.array([0.0, 2.0, np.nan])
    assert not can_be_negative(ws, "ctr", plain)
    assert not can_be_negative(ws, "clicks", plain)  # a measure
    assert can_be_negative(ws, "margin", plain)
    assert can_be_negative(ws, "clicks", np.array([3.0, -1.0]))  # a measure holding a refund


def test_the_impact_axis_has_a_unit(figures):
    ks = [0.0, 0.001, 0.01, 0.1, 1.0]
    curve = CurveData(ks=ks, recall=[1.0] * 5, recall_low=[0.9] * 5, recall_high=[1.0] * 5,
                      alerts=[5] * 5, teams=["red"], team_rate=[[1.0] * 5], budgets=[None],
                      target_recall=0.75, chosen_k=0.01,
                      impacts=[{"impressions": 200.0 * k, "ctr": 0.05 * k} for k in ks])
    plots.impact_png(curve)
    fig = figures[0]
    bottom = fig.axes[1]
    assert "% of each metric's range" in bottom.get_xlabel()
    assert "100% = impressions 200, ctr 0.05 (each in its own units)" in bottom.get_xlabel()
    fmt = bottom.xaxis.get_major_formatter()
    assert [fmt(x, 0) for x in (0.0, 0.001, 0.1, 1.0)] == ["0%", "0.1%", "10%", "100%"]
