"""What the labels can show, intervals that respect clustering, and the verdict.

Check values: Wilson (1927) at zero successes, as stored from R's `binom.confint` in
statsmodels' tests: 0/30 -> upper 0.1135134 (a miss-rate bound at zero misses). The
bootstrap is checked against the textbook normal approximation of a proportion when
items are independent, and against the known design effect when they come in clusters
of identical items.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from calibrate import api
from calibrate.inputs.workspace import Goal
from calibrate.scoring.figures import Figures, validation_verdict
from calibrate.scoring.intervals import (
    cluster_bootstrap_ratio,
    day_bootstrap_total,
    incidents_needed,
    zero_miss_bound,
)
from calibrate.tuning import search
from tests.synthetic import make_workspace


def test_zero_miss_bound_is_wilson_at_zero():
    # R binom.confint(0, 30, method="wilson") as stored in statsmodels' tests
    assert zero_miss_bound(30) == pytest.approx(0.1135134, abs=1e-7)
    assert zero_miss_bound(0) == 1.0
    # the fewest incidents whose zero-miss bound is within a target, by brute force
    for target in (0.25, 0.1135134, 0.05):
        n = incidents_needed(target)
        assert zero_miss_bound(n) <= target < zero_miss_bound(n - 1)
    assert incidents_needed(0.0) is None


def test_labels_line_says_when_the_target_cannot_be_shown():
    goal = Goal(max_miss_rate=0.25)
    few = search.labels_line(2, goal)
    assert "cannot show the target is met" in few and f"at least {incidents_needed(0.25)}" in few
    assert "within the target" in search.labels_line(40, goal)
    spare = search.labels_line(4, Goal(max_miss_rate=0.25, spare_incidents=2))
    assert "no setting can meet" in spare


def test_cluster_bootstrap_matches_the_normal_approximation_for_independent_items():
    rng = np.random.default_rng(3)
    x = (rng.random(2000) < 0.3).astype(float)
    lo, hi = cluster_bootstrap_ratio(np.arange(len(x)), x, seed=1)
    p = x.mean()
    half = 1.959964 * math.sqrt(p * (1 - p) / len(x))  # normal approximation
    assert lo == pytest.approx(p - half, abs=0.006) and hi == pytest.approx(p + half, abs=0.006)


def test_clustered_items_widen_the_interval_by_the_design_effect():
    """Clusters of m identical items carry the information of one item each: the
    interval is about sqrt(m) times wider than if the items were independent."""
    rng = np.random.default_rng(4)
    m = 16
    truth = (rng.random(250) < 0.4).astype(float)
    x = np.repeat(truth, m)
    clustered = cluster_bootstrap_ratio(np.repeat(np.arange(250), m), x, seed=2)
    independent = cluster_bootstrap_ratio(np.arange(len(x)), x, seed=2)
    ratio = (clustered[1] - clustered[0]) / (independent[1] - independent[0])
    assert ratio == pytest.approx(math.sqrt(m), rel=0.2)
    # seeded: the same interval again
    assert cluster_bootstrap_ratio(np.repeat(np.arange(250), m), x, seed=2) == clustered


def test_day_bootstrap_of_a_steady_load_is_tight_and_of_a_bursty_one_wide():
    steady = np.full(30, 10.0)
    assert day_bootstrap_total(steady) == (300.0, 300.0)
    bursty = np.zeros(30)
    bursty[[3, 17]] = 150.0
    lo, hi = day_bootstrap_total(bursty, seed=5)
    assert lo < 200 and hi > 400  # two busy days: the total is uncertain


def _figs(n_inc, caught, load, low, high):
    from calibrate.scoring.intervals import wilson

    ml, mh = wilson(n_inc - caught, n_inc)
    per_team = pd.DataFrame({"analysts": [2], "alerts_per_analyst_day": [load],
                             "alerts_per_analyst_day_low": [low],
                             "alerts_per_analyst_day_high": [high]},
                            index=pd.Index(["red"], name="team"))
    miss = (n_inc - caught) / n_inc if n_inc else math.nan
    return Figures(incidents=n_inc, caught=caught, missed=n_inc - caught, miss_rate=miss,
                   miss_rate_low=float(ml), miss_rate_high=float(mh), recall=1 - miss,
                   recall_low=1 - float(mh), recall_high=1 - float(ml), alerts=10,
                   true_alerts=5, false_alerts=5, precision=0.5, precision_low=0.3,
                   precision_high=0.7, delay_median_hours=1.0, delay_p90_hours=2.0,
                   caught_related=0, related_alerts=0, n_days=7.0, confidence=0.95,
                   per_team=per_team)


# hand-worked: target miss rate 25%, budget 10. Wilson limits of the miss rate:
# 0/60 -> upper 0.060; 3/12 -> (0.089, 0.532); 30/40 -> lower 0.598.
VERDICTS = [
    ((60, 60, 5.0, 4.0, 6.0), "holds"),
    ((12, 9, 5.0, 4.0, 6.0), "cannot tell"),    # interval spans 25%
    ((40, 10, 5.0, 4.0, 6.0), "does not hold"),  # miss rate clearly above
    ((60, 60, 12.0, 11.0, 13.0), "does not hold"),  # load clearly over budget
    ((60, 60, 9.0, 8.0, 12.0), "cannot tell"),  # load interval spans the budget
    ((0, 0, 5.0, 4.0, 6.0), "cannot tell"),     # no out-of-sample incident
]


@pytest.mark.parametrize(("args", "want"), VERDICTS)
def test_verdict_table(args, want):
    word, reasons = validation_verdict(_figs(*args), Goal(max_miss_rate=0.25,
                                                          max_alerts_per_analyst_day=10.0))
    assert word == want and reasons
    assert validation_verdict(None, Goal())[0] == "cannot tell"


def test_spare_incidents_make_the_solve_keep_more_catches(tmp_path):
    """Reference: the evaluator without spares on a target lowered by hand to what two
    spare incidents leave (max_misses - 2 of n)."""
    ses = api.open_session(make_workspace(tmp_path / "ws", goal_miss=0.5, budget=1e6))
    first, split = 167, ses.history.n_hours
    rp = api.make_replayer(ses, engine="serial", progress=False)
    ks = np.geomspace(1.0, 60.0, 9)
    n = 5
    plain = search.Evaluator(ses, rp, ks, first, split, Goal(max_miss_rate=0.5))
    assert len(plain.incidents) == n
    spare = search.Evaluator(ses, rp, ks, first, split,
                             Goal(max_miss_rate=0.5, spare_incidents=2))
    by_hand = search.Evaluator(ses, rp, ks, first, split, Goal(max_miss_rate=0 / n))
    assert Goal(max_miss_rate=0.5, spare_incidents=2).max_misses(n) == 0
    a, b, c = (e.evaluate(ses.ws.detector) for e in (plain, spare, by_hand))
    assert (b.k, b.caught, b.alerts) == (c.k, c.caught, c.alerts)
    assert b.caught == n and a.caught < n  # without spares it keeps only what 50% needs
    assert a.alerts < b.alerts


def test_thin_margin_counts_incidents_caught_only_near_the_multiplier():
    """Hand-worked, k = 2: incident A is caught by an alert peaking at 2.1 (within 10%),
    B by one at 2.1 and one at 3.0 (a safe one too), C by a flatline alert at 2.05 (not
    the multiplier's doing), D by none. Only A is on the knife edge."""
    from types import SimpleNamespace

    from calibrate.detection.episodes import Episodes
    from calibrate.inputs.incidents import Incidents
    from calibrate.settings import DetectorConfig, DetectorSettings

    inc = Incidents.make(["campaign"] * 4, [0, 1, 2, 3], [10, 10, 10, 10], [20, 20, 20, 20])
    rows = [(0, 2.1, "fence"), (1, 2.1, "fence"), (1, 3.0, "fence"),
            (2, 2.05, "fence+flatline")]
    n = len(rows)
    ep = Episodes(
        level=np.array(["campaign"] * n, dtype=object),
        series=np.array([r[0] for r in rows]), metric=np.array(["clicks"] * n, dtype=object),
        start=np.array([12, 12, 14, 12]), end=np.array([13, 13, 15, 13]),
        peak_hour=np.array([12, 12, 14, 12]), peak_score=np.array([r[1] for r in rows]),
        value=np.ones(n), expected=np.zeros(n),
        detectors=np.array([r[2] for r in rows], dtype=object),
        team=np.array([""] * n, dtype=object), grid=np.zeros(n, dtype=np.int64),
        raised=np.array([12, 12, 14, 12]))
    ses = SimpleNamespace(incidents=inc, ws=SimpleNamespace(
        incidents=SimpleNamespace(early_hours=0, late_hours=0)))
    config = DetectorConfig(base=DetectorSettings(fence_multiplier=2.0))
    assert search.thin_margin(ses, ep, config, 0, 100) == 1
