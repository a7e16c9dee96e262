"""Scoring: event matching, figures with intervals, volume, the multiplier curve.

Outside references are named next to each check. Hand-worked cases are written out
in the test; "by hand" means the expected value was worked out on paper from the
event rule in calibrate/scoring/matching.py's docstring.
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.proportion import proportion_confint

from calibrate.detection.episodes import Episodes
from calibrate.errors import InputError
from calibrate.inputs.incidents import Incidents
from calibrate.inputs.workspace import Goal
from calibrate.scoring.alerts_file import episodes_from_alerts_frame
from calibrate.scoring.curves import Curve, multiplier_curve, solve_multiplier
from calibrate.scoring.figures import figures
from calibrate.scoring.intervals import wilson
from calibrate.scoring.matching import match, period_filter, route_teams
from calibrate.scoring.tables import breakdown, volume
from tests.test_incidents import make_history, make_workspace


def eps(rows: list[tuple]) -> Episodes:
    """Episodes from (level, series, metric, start, end[, team[, grid[, raised]]]) tuples
    (raised defaults to start: a minimum impact of 0)."""
    n = len(rows)
    if n == 0:
        return Episodes.empty()
    full = [r + ("",) * (6 - len(r)) if len(r) < 6 else r for r in rows]
    full = [r if len(r) >= 7 else r + (0,) for r in full]
    full = [r if len(r) == 8 else r + (r[3],) for r in full]
    obj = lambda i: np.array([r[i] for r in full], dtype=object)  # noqa: E731
    i64 = lambda i: np.array([r[i] for r in full], dtype=np.int64)  # noqa: E731
    return Episodes(
        level=obj(0), series=i64(1), metric=obj(2), start=i64(3), end=i64(4),
        peak_hour=i64(3), peak_score=np.full(n, 5.0), value=np.ones(n), expected=np.zeros(n),
        detectors=np.array(["fence"] * n, dtype=object), team=obj(5), grid=i64(6),
        raised=i64(7),
    )


C = "campaign"


# --------------------------------------------------------------------------- event matching


def test_long_incident_caught_by_one_early_alert() -> None:
    # incident hours [10, 40) on campaign #0, any metric; one alert [8, 9) before it.
    inc = Incidents.make([C], [0], [10], [40])
    ep = eps([(C, 0, "clicks", 8, 9)])
    # early=2: window [8, 42) overlaps [8, 9): caught, delay 8 - 10 = -2 (by hand)
    m = match(ep, inc, early_hours=2, late_hours=0)
    assert m.caught.tolist() == [True]
    assert m.first_alert.tolist() == [0]
    assert m.delay.tolist() == [-2.0]
    assert m.alert_true.tolist() == [True]
    # early=1: window [9, 41); the alert ends at 9 (exclusive), so no overlap (by hand)
    m = match(ep, inc, early_hours=1, late_hours=0)
    assert m.caught.tolist() == [False] and m.alert_true.tolist() == [False]
    assert math.isnan(m.delay[0]) and m.first_alert[0] == -1
    # one alert in the first hour catches a 30-hour incident with delay 0 (by hand)
    m = match(eps([(C, 0, "ctr", 10, 11)]), inc, 0, 0)
    assert m.caught.tolist() == [True] and m.delay.tolist() == [0.0]


def test_late_tolerance_boundary() -> None:
    # incident [10, 15); alert [16, 17). late=1 -> window [10, 16): no (by hand);
    # late=2 -> window [10, 17): caught with delay 6 (by hand).
    inc = Incidents.make([C], [0], [10], [15])
    ep = eps([(C, 0, "clicks", 16, 17)])
    assert match(ep, inc, 0, 1).caught.tolist() == [False]
    m = match(ep, inc, 0, 2)
    assert m.caught.tolist() == [True] and m.delay.tolist() == [6.0]


def test_two_alerts_in_one_incident_one_catch_two_true_alerts() -> None:
    inc = Incidents.make([C], [1], [20], [30], metric=["clicks"])
    ep = eps([(C, 1, "clicks", 25, 27), (C, 1, "clicks", 21, 22)])
    m = match(ep, inc, 0, 0)
    f = figures(m, ep, inc, {"": 1}, n_days=1.0)
    # by hand: 1 incident caught, 2 alerts both true, first alert = the one at hour 21
    assert (f.incidents, f.caught, f.missed) == (1, 1, 0)
    assert (f.alerts, f.true_alerts, f.false_alerts) == (2, 2, 0)
    assert f.precision == 1.0 and f.recall == 1.0
    assert m.first_alert.tolist() == [1] and m.delay.tolist() == [1.0]
    assert sorted(m.alerts_of(0).tolist()) == [0, 1]


def test_alert_straddling_two_incidents() -> None:
    inc = Incidents.make([C, C], [0, 0], [10, 18], [15, 25])
    ep = eps([(C, 0, "ctr", 13, 20)])
    m = match(ep, inc, 0, 0)
    # by hand: raised at 13, inside [10, 15) only: it catches the first incident; it is
    # still running when the second starts (hour 18), which is "already alerting", not
    # caught (a long episode cannot catch what begins after it was raised)
    assert m.caught.tolist() == [True, False]
    assert m.already_alerting.tolist() == [False, True]
    assert m.delay[0] == 3.0 and math.isnan(m.delay[1])  # 13 - 10
    assert m.incidents_of(0).tolist() == [0]
    assert m.alert_incident.tolist() == [0]
    f = figures(m, ep, inc, {}, n_days=1.0)
    assert (f.caught, f.alerts, f.true_alerts, f.false_alerts) == (1, 1, 1, 0)
    assert f.already_alerting == 1


# Hand-worked table of the catch rule (README "Matching alerts to incidents"): incident
# on campaign #0, hours [20, 30), early 2, late 3, so its window is [18, 33). Each row:
# alert start, end, raised hour -> caught, already alerting, delay (raised - 20).
CATCH_TABLE = [
    (10, 12, 10, False, False, None),  # over before the incident: neither
    (10, 25, 10, False, True, None),   # raised at 10, still running at 20: already alerting
    (10, 25, 19, True, False, -1),     # same episode raised at 19 (inside early 2): caught
    (10, 19, 17, False, False, None),  # raised at 17 < 18, over at 19 <= 20: neither
    (18, 19, 18, True, False, -2),     # raised on the window's first hour: caught
    (25, 40, 25, True, False, 5),      # raised during the incident: caught
    (25, 40, 34, False, False, None),  # started inside but raised at 34 >= 33: neither
    (32, 35, 32, True, False, 12),     # raised on the window's last hour (late 3): caught
    (33, 35, 33, False, False, None),  # raised at 33: one hour past the window
]


@pytest.mark.parametrize("row", CATCH_TABLE)
def test_catch_rule_hand_worked_table(row: tuple) -> None:
    start, end, raised, caught, already, delay = row
    inc = Incidents.make([C], [0], [20], [30])
    m = match(eps([(C, 0, "clicks", start, end, "", 0, raised)]), inc, 2, 3)
    assert m.caught.tolist() == [caught]
    assert m.already_alerting.tolist() == [already]
    assert m.alert_true.tolist() == [caught]
    assert (m.delay[0] == delay) if delay is not None else math.isnan(m.delay[0])


def test_false_alert_on_another_metric_and_blank_metric_incident() -> None:
    inc = Incidents.make([C, C], [0, 2], [10, 10], [20, 20], metric=["clicks", ""])
    ep = eps([
        (C, 0, "ctr", 12, 13),          # other metric than the incident's: false
        (C, 2, "impressions", 15, 16),  # incident with blank metric: any metric counts
        (C, 1, "clicks", 12, 13),       # other series: false
        ("advertiser", 0, "clicks", 12, 13),  # other level: false (no related credit)
    ])
    m = match(ep, inc, 0, 0)
    # by hand
    assert m.caught.tolist() == [False, True]
    assert m.alert_true.tolist() == [False, True, False, False]
    f = figures(m, ep, inc, {}, n_days=1.0)
    assert (f.caught, f.missed, f.false_alerts) == (1, 1, 3)
    assert f.precision == 0.25
    # the same metric on the same series is caught
    assert match(eps([(C, 0, "clicks", 19, 25)]), inc, 0, 0).caught.tolist() == [True, False]


def test_related_series_reported_separately() -> None:
    history = make_history()
    # incident on advertiser north/adv1 (row 0), clicks
    inc = Incidents.make(["advertiser"], [0], [10], [20], metric=["clicks"])
    ep = eps([
        (C, 0, "clicks", 12, 13),        # descendant north/adv1/c1
        ("market", 0, "clicks", 14, 15),  # ancestor north
        (C, 2, "clicks", 12, 13),        # south/adv3/c3: unrelated
        ("advertiser", 1, "clicks", 12, 13),  # sibling north/adv2: unrelated
        (C, 1, "ctr", 12, 13),           # descendant but other metric
    ])
    off = match(ep, inc, 0, 0)
    on = match(ep, inc, 0, 0, related=history)
    for m in (off, on):  # main figures are the same either way
        assert m.caught.tolist() == [False]
        assert m.alert_true.tolist() == [False] * 5
    assert off.caught_related.tolist() == [False]
    assert on.caught_related.tolist() == [True]
    assert on.related_first_alert.tolist() == [0]  # earliest related start: hour 12
    assert on.alert_related.tolist() == [True, True, False, False, False]
    f = figures(on, ep, inc, {}, n_days=1.0)
    assert (f.caught, f.caught_related, f.related_alerts, f.false_alerts) == (0, 1, 2, 5)


def test_related_credit_skips_alerts_that_are_already_true() -> None:
    # alert 0 on campaign north/adv1/c1 is a true alert for the campaign incident (#1) and
    # also meets the advertiser incident (#0) through its descendant: it stays a true alert
    # and is not counted again as a related alert (by hand).
    inc = Incidents.make(["advertiser", C], [0, 0], [10, 10], [20, 20])
    ep = eps([(C, 0, "clicks", 12, 13)])
    m = match(ep, inc, 0, 0, related=make_history())
    assert m.caught.tolist() == [False, True]
    assert m.caught_related.tolist() == [True, False]
    assert m.alert_true.tolist() == [True] and m.alert_related.tolist() == [False]


def naive_match(ep: Episodes, inc: Incidents, early: int, late: int) -> tuple[list, list]:
    """Pair-by-pair reference of the event rule, written as plainly as possible."""
    caught, true = [False] * len(inc), [False] * len(ep)
    for i in range(len(inc)):
        for j in range(len(ep)):
            same = ep.level[j] == inc.level[i] and ep.series[j] == inc.series[i]
            metric_ok = inc.metric[i] == "" or inc.metric[i] == ep.metric[j]
            inside = inc.start[i] - early <= ep.raised[j] < inc.end[i] + late
            if same and metric_ok and inside:
                caught[i] = true[j] = True
    return caught, true


def random_tables(seed: int, n_ep: int = 300, n_inc: int = 25, n_grid: int = 1):
    rng = np.random.default_rng(seed)
    levels = np.array(["market", "campaign"], dtype=object)
    metrics = np.array(["clicks", "ctr"], dtype=object)
    teams = np.array(["red", "blue", ""], dtype=object)
    s = rng.integers(0, 300, n_ep)
    rows = [
        (levels[rng.integers(2)], int(rng.integers(3)), metrics[rng.integers(2)], int(a),
         int(a + rng.integers(1, 6)), teams[rng.integers(3)], int(rng.integers(n_grid)))
        for a in s
    ]
    ep = eps(rows)
    a = rng.integers(0, 300, n_inc)
    inc = Incidents.make(
        level=levels[rng.integers(0, 2, n_inc)].tolist(),
        series=rng.integers(0, 3, n_inc).tolist(),
        start=a.tolist(),
        end=(a + rng.integers(1, 20, n_inc)).tolist(),
        metric=np.array(["clicks", "ctr", ""], dtype=object)[rng.integers(0, 3, n_inc)].tolist(),
        team=teams[rng.integers(0, 2, n_inc)].tolist(),
    )
    return ep, inc


@pytest.mark.parametrize("seed", range(5))
def test_match_equals_pairwise_reference(seed: int) -> None:
    ep, inc = random_tables(seed)
    for early, late in ((0, 0), (2, 3)):
        m = match(ep, inc, early, late)
        caught, true = naive_match(ep, inc, early, late)
        assert m.caught.tolist() == caught
        assert m.alert_true.tolist() == true
        for i in np.flatnonzero(m.caught):
            starts = [ep.start[j] for j in m.alerts_of(i)]
            assert m.delay[i] == min(starts) - inc.start[i]


# --------------------------------------------------------------------------- point / range


# --------------------------------------------------------------------------- intervals


@pytest.mark.parametrize(
    ("count", "nobs", "low", "high"),
    [  # R binom.confint(method="wilson") values stored in statsmodels' tests (Wilson 1927)
        (4, 20, 0.0806576626, 0.4160174323),
        (18, 20, 0.6989663548, 0.9721335188),
        (0, 30, 0.0, 0.1135134),
        (30, 30, 0.8864866, 1.0),
    ],
)
def test_wilson_against_r_and_statsmodels(count: int, nobs: int, low: float, high: float) -> None:
    lo, hi = wilson(count, nobs)
    assert (float(lo), float(hi)) == pytest.approx((low, high), abs=1e-7)  # R binom.confint
    sm = proportion_confint(count, nobs, alpha=0.05, method="wilson")  # statsmodels
    assert (float(lo), float(hi)) == pytest.approx(sm, abs=1e-12)


def test_figures_intervals_on_twenty_incidents() -> None:
    # 20 incidents on campaign #0, 4 missed: miss rate 4/20 -> R's Wilson (0.08066, 0.41602)
    starts = list(range(0, 200, 10))
    inc = Incidents.make([C] * 20, [0] * 20, starts, [s + 5 for s in starts])
    ep = eps([(C, 0, "clicks", s + 1, s + 2) for s in starts[4:]])
    f = figures(match(ep, inc, 0, 0), ep, inc, {}, n_days=10.0)
    assert (f.caught, f.missed, f.miss_rate) == (16, 4, 0.2)
    # R binom.confint wilson 4/20, as stored in statsmodels' tests
    assert (f.miss_rate_low, f.miss_rate_high) == pytest.approx((0.0806576626, 0.4160174323))
    # statsmodels proportion_confint(16, 20, method="wilson")
    assert (f.recall_low, f.recall_high) == pytest.approx(
        proportion_confint(16, 20, method="wilson"))
    # all 30 caught: miss 0/30 -> R's (0, 0.1135134); recall 30/30 -> (0.8864866, 1)
    starts = list(range(0, 300, 10))
    inc = Incidents.make([C] * 30, [0] * 30, starts, [s + 5 for s in starts])
    ep = eps([(C, 0, "clicks", s, s + 1) for s in starts])
    f = figures(match(ep, inc, 0, 0), ep, inc, {}, n_days=10.0)
    assert (f.miss_rate_low, f.miss_rate_high) == pytest.approx((0.0, 0.1135134), abs=1e-7)
    assert (f.recall_low, f.recall_high) == pytest.approx((0.8864866, 1.0), abs=1e-7)


def test_delay_median_and_p90() -> None:
    # delays by hand: -2, 0, 1, 6; median 0.5; p90 (Hyndman-Fan type 7, numpy's default
    # "linear"): position 0.9 * 3 = 2.7 -> 1 + 0.7 * (6 - 1) = 4.5
    inc = Incidents.make([C] * 5, [0] * 5, [10, 30, 50, 70, 90], [15, 35, 55, 80, 95])
    ep = eps([(C, 0, "ctr", 8, 9), (C, 0, "ctr", 30, 31), (C, 0, "ctr", 51, 52),
              (C, 0, "ctr", 76, 77)])
    f = figures(match(ep, inc, 2, 0), ep, inc, {}, n_days=1.0)
    assert f.caught == 4
    assert f.delay_median_hours == pytest.approx(0.5)
    assert f.delay_p90_hours == pytest.approx(4.5)


# --------------------------------------------------------------------------- teams, breakdown, JSON


def test_per_team_load_and_breakdowns_by_hand() -> None:
    # red: 2 analysts; blue: 1. 2 days. Routes: campaign #0, #1 -> red; #2 -> blue.
    routes = {C: np.array(["red", "red", "blue"], dtype=object)}
    inc = route_teams(Incidents.make([C, C, C], [0, 1, 2], [10, 10, 10], [20, 20, 20],
                                     metric=["clicks", "", "ctr"]), routes)
    ep = route_teams(eps([
        (C, 0, "clicks", 12, 13),  # red, true
        (C, 0, "clicks", 30, 31),  # red, false
        (C, 1, "ctr", 40, 41),     # red, false
        (C, 2, "ctr", 15, 16),     # blue, true
        (C, 2, "clicks", 15, 16),  # blue, false (other metric)
    ]), routes)
    assert ep.team.tolist() == ["red", "red", "red", "blue", "blue"]
    goal = Goal(max_alerts_per_analyst_day={"red": 1.0, "*": 0.5})
    f = figures(match(ep, inc, 0, 0), ep, inc, {"red": 2, "blue": 1, "green": 3}, 2.0, goal=goal)
    t = f.per_team
    # by hand: red 3 alerts / (2 analysts * 2 days) = 0.75, false 2 / 4 = 0.5
    assert t.loc["red", "alerts"] == 3 and t.loc["red", "false_alerts"] == 2
    assert t.loc["red", "alerts_per_analyst_day"] == pytest.approx(0.75)
    assert t.loc["red", "false_alerts_per_analyst_day"] == pytest.approx(0.5)
    # blue 2 / (1 * 2) = 1.0 > budget 0.5; false 1 / 2 = 0.5
    assert t.loc["blue", "alerts_per_analyst_day"] == pytest.approx(1.0)
    assert t.loc["blue", "false_alerts_per_analyst_day"] == pytest.approx(0.5)
    assert bool(t.loc["blue", "over_budget"]) and not bool(t.loc["red", "over_budget"])
    # green has analysts but no alerts: a row of zeros
    assert t.loc["green", "alerts"] == 0 and t.loc["green", "alerts_per_analyst_day"] == 0.0
    # red incidents: #0 caught, #1 missed (no alert on #1 in [10, 20)); blue: caught
    assert (t.loc["red", "caught"], t.loc["red", "missed"], t.loc["blue", "caught"]) == (1, 1, 1)
    m = f.per_metric
    assert m.loc["(any)", "incidents"] == 1 and m.loc["(any)", "caught"] == 0
    assert m.loc["clicks", "alerts"] == 3 and m.loc["clicks", "true_alerts"] == 1
    assert m.loc["ctr", "precision"] == pytest.approx(0.5)
    lv = breakdown(match(ep, inc, 0, 0), ep, inc, by="level")
    assert lv.loc[C, "incidents"] == 3 and lv.loc[C, "alerts"] == 5

    d = f.to_json_dict()
    text = json.dumps(d, allow_nan=False)  # raises on NaN/inf: the dict must be JSON-safe
    assert json.loads(text)["per_team"]["blue"]["budget"] == 0.5
    for key in ("incidents", "caught", "missed", "miss_rate", "miss_rate_low", "miss_rate_high",
                "alerts", "true_alerts", "false_alerts", "precision", "delay_median_hours",
                "delay_p90_hours", "per_team", "per_level", "per_metric"):
        assert key in d
    assert set(d["per_team"]["red"]) >= {"alerts", "alerts_per_analyst_day", "false_alerts",
                                         "false_alerts_per_analyst_day", "analysts", "budget"}


def test_no_alerts_precision_is_null_in_json() -> None:
    inc = Incidents.make([C], [0], [10], [20])
    ep = Episodes.empty()
    f = figures(match(ep, inc, 0, 0), ep, inc, {"red": 1}, 1.0)
    assert math.isnan(f.precision) and f.alerts == 0 and f.missed == 1
    d = json.loads(json.dumps(f.to_json_dict(), allow_nan=False))
    assert d["precision"] is None and d["delay_median_hours"] is None
    assert d["per_incident"][0]["first_alert"] is None


def test_per_incident_table() -> None:
    history = make_history()
    inc = Incidents.make([C, C], [0, 1], [10, 10], [20, 20], incident_id=["A", "B"],
                         hours=history.hours)
    ep = eps([(C, 0, "clicks", 12, 13)])
    t = figures(match(ep, inc, 0, 0), ep, inc, {}, 1.0).per_incident
    assert t["incident_id"].tolist() == ["A", "B"]
    assert t["caught"].tolist() == [True, False]
    assert t.loc[0, "first_alert"] == 0 and pd.isna(t.loc[1, "first_alert"])
    assert t.loc[0, "delay_hours"] == 2.0 and math.isnan(t.loc[1, "delay_hours"])
    assert t.loc[0, "start"] == pd.Timestamp("2024-01-01T10:00:00Z")


def test_period_filter_by_start() -> None:
    inc = Incidents.make([C] * 3, [0] * 3, [5, 10, 19], [12, 30, 40])
    got = period_filter(inc, 10, 20)
    assert got.start.tolist() == [10, 19]  # starts in [10, 20); the one from 5 is out
    ep = eps([(C, 0, "ctr", 9, 12), (C, 0, "ctr", 10, 11), (C, 0, "ctr", 20, 21)])
    assert period_filter(ep, 10, 20).start.tolist() == [10]
    assert period_filter(ep, None, None).start.tolist() == [9, 10, 20]


# --------------------------------------------------------------------------- volume


def test_volume_per_team_per_week_by_hand() -> None:
    hours = pd.date_range("2024-01-01T00:00:00Z", periods=14 * 24, freq="h")  # Mon Jan 1
    ep = eps([
        (C, 0, "ctr", 5, 6, "red"), (C, 0, "ctr", 30, 31, "red"), (C, 0, "ctr", 170, 171, "red"),
        (C, 2, "ctr", 100, 101, "blue"), (C, 2, "ctr", 200, 201, "blue"),
        (C, 2, "ctr", 230, 231, "blue"),
        (C, 2, "ctr", 250, 251, "blue"),  # starts after the period: not counted
        (C, 1, "ctr", 50, 51, ""),        # unrouted
    ])
    # period hours [0, 240): week 2024-W01 = hours 0..167 (7 days), 2024-W02 = 168..239 (3 days)
    v = volume(ep, {"red": 2, "blue": 1}, hours, 0, 240, goal=Goal(max_alerts_per_analyst_day=0.5))
    v = v.set_index(["team", "week"])
    assert v.loc[("red", "2024-W01"), "days"] == 7.0
    assert v.loc[("red", "2024-W02"), "days"] == 3.0
    # by hand: red W01 2 alerts / (2 * 7); red W02 1 / (2 * 3); blue W01 1 / 7; blue W02 2 / 3
    expect = {("red", "2024-W01"): (2, 2 / 14), ("red", "2024-W02"): (1, 1 / 6),
              ("blue", "2024-W01"): (1, 1 / 7), ("blue", "2024-W02"): (2, 2 / 3),
              ("", "2024-W01"): (1, math.nan), ("", "2024-W02"): (0, math.nan)}
    assert len(v) == len(expect)
    for key, (alerts, rate) in expect.items():
        assert v.loc[key, "alerts"] == alerts
        assert v.loc[key, "alerts_per_analyst_day"] == pytest.approx(rate, nan_ok=True)
    assert v["over_budget"].to_dict() == {k: k == ("blue", "2024-W02") for k in expect}


def test_volume_iso_week_across_new_year() -> None:
    start = datetime(2024, 12, 28)
    hours = pd.date_range(pd.Timestamp(start, tz="UTC"), periods=5 * 24, freq="h")
    ep = eps([(C, 0, "ctr", h, h + 1, "red") for h in (0, 47, 48, 100)])
    v = volume(ep, {"red": 1}, hours, 0, 120).set_index("week")
    # Python's datetime.isocalendar as the reference: Dec 28-29 2024 in 2024-W52,
    # Dec 30 2024 .. Jan 1 2025 in 2025-W01
    labels = {f"{y}-W{w:02d}" for y, w, _ in
              ((start + timedelta(days=d)).isocalendar() for d in range(5))}
    assert set(v.index) == labels == {"2024-W52", "2025-W01"}
    assert v.loc["2024-W52", "alerts"] == 2 and v.loc["2025-W01", "alerts"] == 2
    assert v.loc["2024-W52", "days"] == 2.0 and v.loc["2025-W01", "days"] == 3.0


# --------------------------------------------------------------------------- curve and solve


TEAMS = {"red": 2, "blue": 1}


@pytest.mark.parametrize("seed", range(4))
def test_curve_equals_figures_one_k_at_a_time(seed: int) -> None:
    n_grid = 6
    ks = np.linspace(1.0, 6.0, n_grid)
    ep, inc = random_tables(seed, n_ep=600, n_grid=n_grid)
    curve = multiplier_curve(ep, ks, inc, 1, 2, TEAMS, n_days=12.5)
    assert curve.teams[:2] == ("red", "blue")
    for g in range(n_grid):  # reference: figures() on each k's episodes, one at a time
        ep_k = ep.take(ep.grid == g)
        f = figures(match(ep_k, inc, 1, 2), ep_k, inc, TEAMS, n_days=12.5)
        caught, _ = naive_match(ep_k, inc, 1, 2)  # and the plain pairwise rule
        assert curve.caught[g] == f.caught == sum(caught)
        assert curve.miss_rate[g] == pytest.approx(f.miss_rate)
        assert curve.miss_rate_low[g] == pytest.approx(f.miss_rate_low)
        assert curve.miss_rate_high[g] == pytest.approx(f.miss_rate_high)
        assert (curve.alerts[g], curve.false_alerts[g]) == (f.alerts, f.false_alerts)
        for j, team in enumerate(curve.teams):
            row = f.per_team.loc[team]
            assert curve.team_alerts[g, j] == row["alerts"]
            assert curve.alerts_per_analyst_day[g, j] == pytest.approx(
                row["alerts_per_analyst_day"], nan_ok=True)
            assert curve.false_alerts_per_analyst_day[g, j] == pytest.approx(
                row["false_alerts_per_analyst_day"], nan_ok=True)


def brute_force(curve: Curve, max_miss: float, budgets: dict[str, float]) -> float | None:
    """Largest k whose miss rate and every staffed team's load meet the targets."""
    best = None
    for g, k in enumerate(curve.ks):
        ok = curve.miss_rate[g] <= max_miss
        for j, team in enumerate(curve.teams):
            if curve.analysts[j] > 0 and curve.alerts_per_analyst_day[g, j] > budgets.get(
                    team, math.inf):
                ok = False
        if ok and (best is None or k > best):
            best = float(k)
    return best


@pytest.mark.parametrize("seed", range(6))
def test_solve_equals_brute_force(seed: int) -> None:
    ks = np.array([0.5, 1.0, 1.5, 2.0, 3.0, 4.5, 6.0, 8.0])
    ep, inc = random_tables(seed, n_ep=800, n_grid=len(ks))
    curve = multiplier_curve(ep, ks, inc, 0, 1, TEAMS, n_days=3.0)
    outcomes: set[bool] = set()
    for max_miss in (0.0, 0.3, 0.6, 1.0):
        for b in (0.5, 2.0, 4.0, 100.0):
            budgets = {"red": b, "blue": b / 2}
            k, reason = solve_multiplier(curve, max_miss, budgets)
            assert k == brute_force(curve, max_miss, budgets), reason
            if k is None:
                assert not reason.startswith("k=") and "\n" not in reason
            else:
                assert reason.startswith(f"k={k:g}:")
            outcomes.add(k is None)
    assert outcomes == {True, False}  # the grid of targets exercises both answers
    goal = Goal(max_miss_rate=0.6, max_alerts_per_analyst_day={"red": 4.0, "blue": 2.0})
    assert solve_multiplier(curve, 0.6, goal)[0] == brute_force(curve, 0.6, {"red": 4.0,
                                                                             "blue": 2.0})


def hand_curve() -> Curve:
    # 4 incidents on campaign #0 at [0,5), [10,15), [20,25), [30,35); team red, 1 analyst,
    # 1 day. k index 0: catches all 4, 10 alerts; index 1: 3 caught, 6 alerts;
    # index 2: 1 caught, 2 alerts.
    inc = Incidents.make([C] * 4, [0] * 4, [0, 10, 20, 30], [5, 15, 25, 35])
    rows = [(C, 0, "ctr", s, s + 1, "red", 0) for s in (0, 10, 20, 30, 40, 41, 42, 43, 44, 45)]
    rows += [(C, 0, "ctr", s, s + 1, "red", 1) for s in (0, 10, 20, 40, 41, 42)]
    rows += [(C, 0, "ctr", s, s + 1, "red", 2) for s in (0, 40)]
    return multiplier_curve(eps(rows), np.array([1.0, 2.0, 3.0]), inc, 0, 0, {"red": 1}, 1.0)


def test_solve_reasons_by_hand() -> None:
    curve = hand_curve()
    assert curve.caught.tolist() == [4, 3, 1] and curve.alerts.tolist() == [10, 6, 2]
    assert curve.miss_rate.tolist() == [0.0, 0.25, 0.75]
    # miss target 0.25 met at k=1, 2; largest = 2; red load 6 <= budget 8
    k, reason = solve_multiplier(curve, 0.25, {"red": 8.0})
    assert k == 2.0 and reason.startswith("k=2:")
    # budget 5: at k=2 red gets 6 alerts per analyst-day, 1.00 over
    k, reason = solve_multiplier(curve, 0.25, {"red": 5.0})
    assert k is None
    assert "k=2" in reason and "team 'red' gets 6.00" in reason and "1.00 over" in reason
    # a target below the best miss rate: say by how much
    k, reason = solve_multiplier(curve, -0.1, {"red": 100.0})
    assert k is None and "lowest miss rate is 0.000 at k=1" in reason and "0.100 above" in reason
    # every k meets the target: the largest, k=3
    assert solve_multiplier(curve, 0.8, {"red": 100.0})[0] == 3.0


# --------------------------------------------------------------------------- alerts CSV


ALERT_HEADER = ["alert_id", "level", "market", "advertiser", "campaign", "metric", "start", "end",
                "peak_hour", "peak_score", "value", "expected", "impact", "team", "detectors"]


def alerts_frame(rows: list[list[str]]) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=ALERT_HEADER)


GOOD_ALERT = ["A1", "campaign", "south", "adv3", "c3", "ctr", "2024-01-01T05:00:00Z",
              "2024-01-01T08:00:00Z", "2024-01-01T06:00:00Z", "4.5", "10", "4", "6", "blue",
              "fence"]


def test_alerts_frame_round_trip(tmp_path: Path) -> None:
    second = ["A2", "market", "north", "", "", "clicks", "2024-01-02T00:00:00Z",
              "2024-01-02T01:00:00Z", "", "", "", "", "", "", "flatline"]
    ep = episodes_from_alerts_frame(alerts_frame([GOOD_ALERT, second]),
                                    make_workspace(tmp_path), make_history(), "alerts.csv")
    assert ep.level.tolist() == ["campaign", "market"]
    assert ep.series.tolist() == [2, 0]
    assert ep.start.tolist() == [5, 24] and ep.end.tolist() == [8, 25]
    assert ep.peak_hour.tolist() == [6, 24]  # blank peak -> start
    assert ep.peak_score[0] == 4.5 and math.isnan(ep.peak_score[1])
    assert ep.impact[0] == 6.0
    assert ep.team.tolist() == ["blue", ""] and ep.grid.tolist() == [0, 0]


@pytest.mark.parametrize(
    ("column", "value", "message"),
    [
        ("metric", "", r"row 2 column 'metric': empty; a metric is required"),
        ("metric", "spend", r"row 2 column 'metric': unknown metric 'spend'"),
        ("peak_score", "high", r"row 2 column 'peak_score': 'high' is not a number"),
        ("peak_hour", "2024-01-01T09:00:00Z", r"row 2 column 'peak_hour': must lie within"),
        ("start", "2024-01-01T05:15:00Z", r"row 2 column 'start': .* is not on the hour"),
        ("campaign", "c1", r"row 2 column 'campaign': no series 'south / adv3 / c1'"),
    ],
)
def test_alerts_frame_errors(tmp_path: Path, column: str, value: str, message: str) -> None:
    row = list(GOOD_ALERT)
    row[ALERT_HEADER.index(column)] = value
    with pytest.raises(InputError, match=r"^alerts\.csv " + message):
        episodes_from_alerts_frame(alerts_frame([row]), make_workspace(tmp_path),
                                   make_history(), "alerts.csv")


def test_alerts_frame_missing_column(tmp_path: Path) -> None:
    df = alerts_frame([GOOD_ALERT]).drop(columns=["end"])
    with pytest.raises(InputError, match=r"^alerts\.csv row 1: missing column\(s\) 'end'"):
        episodes_from_alerts_frame(df, make_workspace(tmp_path), make_history(), "alerts.csv")
