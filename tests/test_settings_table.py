"""The settings as one flat table (`settings.csv`): each row, applied on its own to the
series it covers, raises exactly the alerts of the grouped config, and the STL lengths
it spells out are the ones statsmodels resolves."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from statsmodels.tsa.seasonal import MSTL, STL

from calibrate import api
from calibrate.engine.executors import SerialExecutor
from calibrate.reporting.settings_table import COLUMNS, settings_table, stl_lengths
from calibrate.settings import DetectorConfig, DetectorSettings
from tests.synthetic import make_workspace

GROUPED = {
    "fence_window_hours": 48, "fence_multiplier": 2.5,
    "min_impact": {"impressions": 150.0, "clicks": 4.0},
    "group": {
        "markets": {"levels": ["market"], "fence_multiplier": 3.5, "sides": "up"},
        "clicks": {"metrics": ["clicks"], "expected_value": "forecast",
                   "fence_multiplier": 2.0},
    },
}


@pytest.fixture(scope="module")
def ses(tmp_path_factory: pytest.TempPathFactory) -> api.Session:
    return api.open_session(make_workspace(tmp_path_factory.mktemp("ws")))


def _row_settings(row: pd.Series) -> DetectorSettings:
    names = [c for c in COLUMNS[3:] if not c.startswith("stl_")]
    values = {n: row[n].item() if hasattr(row[n], "item") else row[n] for n in names}
    return DetectorSettings(**values)


def test_each_row_alone_raises_the_alerts_of_the_grouped_config(ses) -> None:
    config = DetectorConfig.from_table(GROUPED, "test")
    levels, metrics = list(ses.ws.levels), list(ses.ws.metric_names)
    table = settings_table(config, levels, metrics)
    assert list(table.columns) == list(COLUMNS)
    # one row per level and metric, with the group a replay matches first
    assert list(zip(table["level"], table["metric"], strict=True)) == [
        (lv, m) for lv in levels for m in metrics]
    want = {("market", "impressions"): "markets", ("market", "clicks"): "markets",
            ("campaign", "impressions"): "base", ("campaign", "clicks"): "clicks"}
    assert table.set_index(["level", "metric"])["group"].to_dict() == want
    assert table.set_index(["level", "metric"])["min_impact"].to_dict() == {
        ("market", "impressions"): 150.0, ("market", "clicks"): 4.0,
        ("campaign", "impressions"): 150.0, ("campaign", "clicks"): 4.0}

    def replay(cfg: DetectorConfig) -> pd.DataFrame:
        res = api.replay_session(ses, cfg, executor=SerialExecutor(), progress=False)
        return res.alerts_frame().drop(columns=["alert_id"])

    grouped = replay(config)
    assert len(grouped) > 0
    parts = []
    for _, row in table.iterrows():
        alone = replay(DetectorConfig(base=_row_settings(row)))
        parts.append(alone[(alone["level"] == row["level"]) & (alone["metric"] == row["metric"])])
    flat = pd.concat(parts, ignore_index=True)
    order = ["level", "metric", "start", "raised_hour"]
    assert len(flat) == len(grouped)
    pd.testing.assert_frame_equal(
        flat.sort_values(order, kind="stable").reset_index(drop=True),
        grouped.sort_values(order, kind="stable").reset_index(drop=True))


@pytest.mark.parametrize(("window", "seasonal", "trend", "weekly", "robust"), [
    (336, 7, 0, False, False),
    (336, 15, 61, False, True),
    (672, 7, 0, True, False),
    (337, 7, 0, True, True),  # the shortest window a weekly period is valid with
])
def test_stl_lengths_are_the_ones_statsmodels_resolves(window, seasonal, trend, weekly,
                                                       robust) -> None:
    # reference: statsmodels' own STL.config and MSTL.periods / windows
    s = DetectorSettings(decomposition_window_hours=window, seasonal_span=seasonal,
                         trend_span=trend, weekly_period=weekly, robust=robust,
                         fence_window_hours=48)
    got = stl_lengths(s)
    y = np.random.default_rng(0).normal(size=window)
    if weekly:
        with warnings.catch_warnings():
            warnings.simplefilter("error", UserWarning)  # no period is dropped
            m = MSTL(y, periods=(24, 168))
        periods, spans = list(m.periods), list(m.windows)
        assert got["stl_passes"] == str(m.iterate if len(periods) > 1 else 1)
    else:
        periods, spans = [24], [seasonal]
        assert got["stl_passes"] == "1"
    configs = [STL(y, period=p, seasonal=w, trend=None if weekly or not trend else trend,
                   robust=robust).config for p, w in zip(periods, spans, strict=True)]
    assert got["stl_periods"] == " ".join(map(str, periods))
    assert got["stl_seasonal_spans"] == " ".join(map(str, spans))
    assert got["stl_trend_spans"] == " ".join(str(c["trend"]) for c in configs)
    assert got["stl_low_pass_spans"] == " ".join(str(c["low_pass"]) for c in configs)
    # the iteration counts are statsmodels' defaults: a fit with them given explicitly
    # is the default fit, bit for bit
    stl = STL(y, period=periods[0], seasonal=spans[0], robust=robust)
    default, explicit = stl.fit(), stl.fit(inner_iter=int(got["stl_inner_iterations"]),
                                           outer_iter=int(got["stl_outer_iterations"]))
    assert np.array_equal(default.resid, explicit.resid)
