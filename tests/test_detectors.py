"""Episodes of a multiplier grid: the compiled kernel against a plain hour-by-hour loop.

The reference below is the rule of calibrate/detection/detectors.py written out for one k at a
time: an hour is flagged when (score > k) + flatline >= min_detectors (a NaN score
never passes the fence); consecutive flagged hours of a series form one episode; its
peak is the highest non-NaN score (first hour on ties; NaN and the start hour if none),
its value/expected are summed hour by hour, its bits OR the detectors that fired. It is
raised at the first hour where |impact so far| (the running sum of value - expected)
reaches the minimum impact (its first hour when that is 0), and kept only if raised
(the online alert rule of the project's README, "The detector, exactly").
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from calibrate.detection.detectors import episode_runs, episode_runs_at, episodes_grid
from calibrate.engine.replay import HourScores, sweep, sweep_codes, sweep_runs
from calibrate.inputs.incidents import Incidents
from calibrate.scoring.curves import impact_curves, multiplier_curve
from calibrate.scoring.matching import match, period_filter
from calibrate.settings import DetectorSettings


def reference_episodes(score, flat, value, expected, ks, min_det, min_impact=0.0,
                       start_hours=None):
    """Episodes of every k in `ks` (in its order), series by series, hour by hour."""
    n_s, n = score.shape
    lo, hi = (0, n) if start_hours is None else start_hours
    ints, floats = [], []
    for g, k in enumerate(ks):
        def flagged(s, t, k=k):
            return int(score[s, t] > k) + int(flat[s, t]) >= min_det

        for s in range(n_s):
            t = 0
            while t < n:
                if not flagged(s, t):
                    t += 1
                    continue
                start, peak, peak_h, v, e, bits = t, math.nan, t, 0.0, 0.0, 0
                so_far, raised = 0.0, -1
                while t < n and flagged(s, t):
                    sc = float(score[s, t])
                    if not math.isnan(sc) and (math.isnan(peak) or sc > peak):
                        peak, peak_h = sc, t
                    v += float(value[s, t])
                    e += float(expected[s, t])
                    so_far += float(value[s, t]) - float(expected[s, t])
                    if raised < 0 and (min_impact <= 0 or abs(so_far) >= min_impact):
                        raised = t
                    bits |= (1 if sc > k else 0) | (2 if flat[s, t] else 0)
                    t += 1
                if raised >= 0 and lo <= raised < hi:
                    ints.append((g, s, start, t, peak_h, bits, raised))
                    floats.append((peak, v, e))
    return (np.array(ints, dtype=np.int64).reshape(-1, 7),
            np.array(floats, dtype=np.float64).reshape(-1, 3))


def random_arrays(seed: int, n_s: int = 4, n: int = 120):
    rng = np.random.default_rng(seed)
    score = np.round(rng.exponential(1.5, (n_s, n)), 1)  # rounded: ties within episodes
    score[rng.random((n_s, n)) < 0.15] = np.nan
    score[rng.random((n_s, n)) < 0.02] = np.inf  # IQR = 0 beyond a quartile
    flat = rng.random((n_s, n)) < 0.12
    flat[0, 5:9] = True
    score[0, 5:9] = np.nan  # flatline-only hours (no fence score)
    score[1, -6:] = 9.0  # a run reaching the series end
    flat[2, -3:] = True
    value = np.round(rng.normal(100, 40, (n_s, n)), 2)
    expected = np.round(rng.normal(100, 10, (n_s, n)), 2)
    return score, flat, value, expected


GRIDS = {
    "sorted": np.geomspace(0.5, 8, 12),
    # unsorted, repeated, below and above every score
    "shuffled": np.array([2.0, 0.1, 5.0, 2.0, 1.3, 20.0, 0.7, 3.3]),
    "odd values": np.array([np.inf, 1.0, np.nan, 0.0, -np.inf, 2.5]),
    "one": np.array([1.5]),
    "empty": np.array([], dtype=np.float64),
}


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("grid", list(GRIDS))
@pytest.mark.parametrize("min_det", [1, 2])
def test_episodes_grid_equals_hour_by_hour_loop(seed: int, grid: str, min_det: int) -> None:
    score, flat, value, expected = random_arrays(seed)
    ks = GRIDS[grid]
    got_i, got_f = episodes_grid(score, flat, value, expected, ks, min_det)
    ref_i, ref_f = reference_episodes(score, flat, value, expected, ks, min_det)
    assert len(ref_i) > 0 or grid == "empty"
    np.testing.assert_array_equal(got_i, ref_i)
    np.testing.assert_array_equal(got_f, ref_f)  # NaN peaks compare equal; sums bit for bit


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("min_det", [1, 2])
def test_min_impact_and_start_hours_filter_like_the_loop(seed: int, min_det: int) -> None:
    score, flat, value, expected = random_arrays(seed)
    ks = GRIDS["shuffled"]
    for min_impact, hours in ((60.0, None), (0.0, (17, 90)), (25.0, (40, 121))):
        got_i, got_f = episodes_grid(score, flat, value, expected, ks, min_det, min_impact, hours)
        ref_i, ref_f = reference_episodes(score, flat, value, expected, ks, min_det, min_impact,
                                          hours)
        all_i, _ = reference_episodes(score, flat, value, expected, ks, min_det)
        assert 0 < len(ref_i) < len(all_i)  # the filter keeps some and drops some
        np.testing.assert_array_equal(got_i, ref_i)
        np.testing.assert_array_equal(got_f, ref_f)


def test_flatline_only_hours_and_no_flags() -> None:
    score = np.array([[np.nan, np.nan, 0.5, 4.0, np.nan, np.nan]])
    flat = np.array([[True, True, False, True, True, False]])
    value = np.arange(6.0)[None, :]
    expected = np.zeros((1, 6))
    ks = np.array([1.0, 3.0, 5.0])
    for min_det in (1, 2):
        got_i, got_f = episodes_grid(score, flat, value, expected, ks, min_det)
        ref_i, ref_f = reference_episodes(score, flat, value, expected, ks, min_det)
        np.testing.assert_array_equal(got_i, ref_i)
        np.testing.assert_array_equal(got_f, ref_f)
    # min_detectors 1: hours 0-1 flatline only (NaN peak at the start hour), 3-4 one run
    got_i, got_f = episodes_grid(score, flat, value, expected, ks, 1)
    assert got_i[got_i[:, 0] == 2].tolist() == [[2, 0, 0, 2, 0, 2, 0], [2, 0, 3, 5, 3, 2, 3]]
    assert np.isnan(got_f[0, 0]) and got_f[1, 0] == 4.0
    none_i, none_f = episodes_grid(score, np.zeros_like(flat), value, expected, [9.0], 1)
    assert none_i.shape == (0, 7) and none_f.shape == (0, 3)


def test_raised_hour_is_where_impact_so_far_reaches_the_minimum() -> None:
    """Hand-worked: one episode over hours 2..5 with impacts +3, -1, +4, +2; impact so far
    3, 2, 6, 8. Minimum impact 3 raises it at hour 2, 5 at hour 4, 8 at hour 5, 9 never;
    the episode's start stays hour 2 whatever hour raised it."""
    score = np.array([[0.0, 0.0, 5.0, 5.0, 5.0, 5.0, 0.0]])
    flat = np.zeros_like(score, dtype=bool)
    value = np.array([[0.0, 0.0, 3.0, -1.0, 4.0, 2.0, 0.0]])
    expected = np.zeros_like(value)
    for m, raised in ((0.0, 2), (3.0, 2), (5.0, 4), (8.0, 5)):
        got_i, _ = episodes_grid(score, flat, value, expected, [1.0], 1, m)
        assert got_i.tolist() == [[0, 0, 2, 6, 2, 1, raised]]
    got_i, _ = episodes_grid(score, flat, value, expected, [1.0], 1, 9.0)
    assert len(got_i) == 0
    # the raised hour decides the period an alert belongs to
    got_i, _ = episodes_grid(score, flat, value, expected, [1.0], 1, 5.0, (3, 7))
    assert got_i[:, 6].tolist() == [4]


def test_runs_never_join_across_series() -> None:
    score = np.full((3, 8), 0.1)
    score[0, 2:4] = 5.0  # series 0 ends its run at hour 3 ...
    score[1, 4] = 6.0  # ... series 1 flags hour 4, series 2 hour 5
    score[2, 5:] = 2.0
    flat = np.zeros((3, 8), dtype=bool)
    value, expected = np.ones((3, 8)), np.zeros((3, 8))
    ks = np.array([1.0, 3.0])
    got_i, got_f = episodes_grid(score, flat, value, expected, ks, 1)
    ref_i, ref_f = reference_episodes(score, flat, value, expected, ks, 1)
    np.testing.assert_array_equal(got_i, ref_i)
    np.testing.assert_array_equal(got_f, ref_f)
    assert got_i[:, :4].tolist() == [[0, 0, 2, 4], [0, 1, 4, 5], [0, 2, 5, 8], [1, 0, 2, 4],
                                     [1, 1, 4, 5]]


# --------------------------------------------------------------------------- grid sweep


def random_scores(seed: int) -> dict[tuple[str, str], HourScores]:
    rng = np.random.default_rng(seed)
    out = {}
    for j, (lv, m) in enumerate([("top", "clicks"), ("top", "ctr"), ("leaf", "clicks"),
                                 ("leaf", "spend")]):
        score, flat, value, expected = random_arrays(seed * 10 + j, n_s=3 if lv == "top" else 5)
        s = DetectorSettings(flatline_hours=6, min_impact=float(rng.choice([0.0, 30.0])),
                             combine=str(rng.choice(["any", "all"])))
        out[(lv, m)] = HourScores(lv, m, s, value, expected, score, flat)
    return out


def random_incidents(seed: int) -> Incidents:
    rng = np.random.default_rng(seed)
    n = 30
    levels = np.array(["top", "leaf", "other"], dtype=object)[rng.integers(0, 3, n)]
    series = rng.integers(0, 5, n)
    start = rng.integers(0, 110, n)
    return Incidents.make(
        level=levels.tolist(), series=series.tolist(), start=start.tolist(),
        end=(start + rng.integers(1, 12, n)).tolist(),
        metric=np.array(["clicks", "ctr", "", "margin"], dtype=object)[
            rng.integers(0, 4, n)].tolist(),
    )


def naive_pairs(ep, inc, early: int, late: int) -> list[tuple[int, int]]:
    """Event rule of calibrate/scoring/matching.py, pair by pair, sorted by incident then
    episode."""
    level, metric = ep.level, ep.metric
    return [
        (a, i)
        for i in range(len(inc))
        for a in range(len(ep))
        if level[a] == inc.level[i] and ep.series[a] == inc.series[i]
        and inc.metric[i] in ("", metric[a])
        and inc.start[i] - early <= ep.raised[a] < inc.end[i] + late
    ]


ROUTES = {"leaf": np.array(["red", "blue", "red", "green", "blue"])}  # "top" unrouted


@pytest.mark.parametrize("seed", range(3))
def test_coded_sweep_scores_like_the_text_table(seed: int) -> None:
    scores = random_scores(seed)
    ks = np.array([0.8, 1.5, 3.0, 6.0])
    inc = random_incidents(seed)
    coded = sweep_codes(scores, ks, ROUTES, start_hours=(10, 100))
    text = period_filter(sweep(scores, ks, ROUTES), 10, 100)
    assert len(coded) == len(text) > 0
    decoded = coded.decode()
    for col in ("level", "metric", "team", "detectors", "series", "start", "end", "peak_hour",
                "grid", "value", "expected"):
        np.testing.assert_array_equal(getattr(decoded, col), getattr(text, col))
    np.testing.assert_array_equal(decoded.peak_score, text.peak_score)

    m = match(coded, inc, 1, 2)
    assert list(zip(m.pair_alert.tolist(), m.pair_incident.tolist(), strict=True)) == \
        naive_pairs(text, inc, 1, 2)
    analysts = {"red": 2, "green": 1, "gray": 3}
    a = multiplier_curve(coded, ks, inc, 1, 2, analysts, 3.0)
    b = multiplier_curve(text, ks, inc, 1, 2, analysts, 3.0)
    assert a.teams == b.teams == ("red", "green", "gray", "", "blue")
    for f in ("caught", "alerts", "true_alerts", "team_alerts", "team_false_alerts"):
        np.testing.assert_array_equal(getattr(a, f), getattr(b, f))
    np.testing.assert_array_equal(a.alerts_per_analyst_day, b.alerts_per_analyst_day)


@pytest.mark.parametrize("seed", range(3))
def test_run_table_curves_equal_replays_at_each_minimum_impact(seed: int) -> None:
    """Reference: for each minimum-impact level, `multiplier_curve` of the rows
    `sweep_codes` writes with every series at that level's minimum impact (the online
    rule, checked against the loop above); the run table must count the same from one
    sweep. Per-metric grids differ in units; the multiplier grid is unsorted to
    exercise `order`."""
    scores = random_scores(seed)
    ks = np.array([3.0, 0.8, 6.0, 1.5])
    inc = random_incidents(seed)
    grids = {"clicks": np.array([0.0, 5.0, 40.0, 120.0]),
             "ctr": np.array([0.0, 2.0, 30.0, 90.0]),
             "spend": np.array([0.0, 20.0, 60.0, 200.0])}
    analysts = {"red": 2, "green": 1, "gray": 3}
    runs = sweep_runs(scores, ks, ROUTES, start_hours=(10, 100), min_impacts=grids)
    curves, caught = impact_curves(runs, ks, inc, 1, 2, analysts, 3.0)
    # runs span several multipliers
    assert len(runs.runs) < len(sweep_codes(scores, ks, ROUTES, apply_min_impact=False,
                                            start_hours=(10, 100)))
    moved = False
    for lv, cb in enumerate(curves):
        at_level = {key: replace(ms, settings=replace(ms.settings, min_impact=grids[key[1]][lv]))
                    for key, ms in scores.items()}
        rows = sweep_codes(at_level, ks, ROUTES, start_hours=(10, 100))
        ca = multiplier_curve(rows, ks, inc, 1, 2, analysts, 3.0)
        for f in ("caught", "alerts", "true_alerts"):
            np.testing.assert_array_equal(getattr(ca, f), getattr(cb, f))
        # the run table lists the teams of every run; a team raising nothing here shows 0
        for j, t in enumerate(cb.teams):
            for f in ("team_alerts", "team_false_alerts"):
                want = getattr(ca, f)[:, ca.teams.index(t)] if t in ca.teams else 0
                np.testing.assert_array_equal(getattr(cb, f)[:, j], want)
        np.testing.assert_array_equal(caught[lv].sum(axis=1), ca.caught)
        moved |= lv > 0 and bool((cb.alerts != curves[0].alerts).any())
    assert moved and max(c.caught.max() for c in curves) > 0


@pytest.mark.parametrize("seed", range(6))
def test_runs_of_given_hours_equal_runs_of_the_dense_arrays(seed):
    """Reference: `episode_runs` of the dense arrays. Given only the hours whose score
    exceeds the grid's lowest multiplier or whose flatline flag is set (what the tuning
    store keeps), `episode_runs_at` finds the same runs, raised hours and sums."""
    score, flat, value, expected = random_arrays(seed)
    ks = np.array([1.0, 1.5, 2.5, 4.0])
    ms = np.array([0.0, 40.0, 150.0])
    for min_det in (1, 2):
        ref = episode_runs(score, flat, value, expected, ks, min_det, ms, (10, 100))
        with np.errstate(invalid="ignore"):
            s, t = np.nonzero((score > ks.min()) | flat)
        got = episode_runs_at(s, t, score[s, t], flat[s, t], value[s, t], expected[s, t], ks,
                              min_det, ms, (10, 100))
        assert len(ref.ints[0]) > 5
        for a, b in zip(ref[:4], got[:4], strict=True):
            np.testing.assert_array_equal(a, b)
        assert ref.n_rows == got.n_rows
