"""`expected_value = "forecast"` through settings, replay, search, alerts and tuned config.

The forecast stream itself is checked against a plain statsmodels + numpy loop in
tests/test_replay_exact.py; here the references are the replay and `api.score_episodes`
(the path `calibrate replay` + `calibrate score` take) and hand-worked hour counts from
the synthetic workspace (window L = 168, fence window W = 72).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from calibrate import api
from calibrate.engine.executors import SerialExecutor
from calibrate.errors import InputError
from calibrate.outputs import load_config, write_config
from calibrate.settings import DetectorConfig, DetectorSettings
from calibrate.tuning import search
from tests.synthetic import make_workspace
from tests.test_search import _brute_force_k

L, W = 168, 72  # the synthetic workspace's decomposition and fence windows


@pytest.fixture(scope="module")
def ses(tmp_path_factory) -> api.Session:
    path = make_workspace(
        tmp_path_factory.mktemp("ws"),
        search='expected_value = ["fit", "forecast"]\nfence_window_hours = [48, 72]\ntrials = 6',
    )
    return api.open_session(path)


def _replay(ses, config):
    return api.replay_session(ses, config, executor=SerialExecutor(), progress=False)


def test_setting_is_validated_written_and_keys_the_cache() -> None:
    with pytest.raises(InputError, match=r"key 'expected_value'.*'fit' or 'forecast'"):
        DetectorSettings.from_mapping({"expected_value": "ahead"}, "w.toml [detector]")
    fit = DetectorSettings()
    fc = DetectorSettings.from_mapping({"expected_value": "forecast"}, "w.toml [detector]")
    assert fit.expected_value == "fit" and fc.expected_value == "forecast"
    assert fit.decomposition_key() != fc.decomposition_key()
    back = DetectorConfig.from_table(DetectorConfig(base=fc).to_table(), "t")
    assert back.base == fc


def test_first_scored_hour_is_the_first_hour_with_a_score(ses) -> None:
    fit = ses.ws.detector
    fc = fit.with_base(expected_value="forecast")
    assert api.first_scored_hour(fit, ses.ws) == L - 1
    assert api.first_scored_hour(fc, ses.ws) == L + W
    res = _replay(ses, fc)
    for ms in res.scores.values():
        scored = np.isfinite(ms.score).any(axis=0)
        assert np.flatnonzero(scored)[0] == L + W
        assert np.isnan(ms.expected[:, :L]).all() and np.isfinite(ms.expected[:, L]).all()
    # a fit replay after a forecast one is not served the forecast streams
    again = _replay(ses, fit)
    assert np.isfinite(next(iter(again.scores.values())).score[:, L - 1]).all()


def test_alert_rows_say_which_mode_raised_them(ses) -> None:
    base = ses.ws.detector.base
    cfg = DetectorConfig.from_table(
        {**base.to_table(), "fence_multiplier": 1.5,
         "group": {"fc": {"levels": [], "metrics": ["clicks"], "expected_value": "forecast"}}},
        "t")
    alerts = _replay(ses, cfg).alerts_frame()
    assert list(alerts.columns)[-1] == "expected_value"
    assert set(alerts.metric) == {"impressions", "clicks"}
    want = np.where(alerts.metric == "clicks", "forecast", "fit")
    assert alerts.expected_value.tolist() == want.tolist()


def test_solved_multiplier_of_a_forecast_config_equals_brute_force(ses) -> None:
    first, split = L + W, ses.history.n_hours - 168
    config = ses.ws.detector.with_base(expected_value="forecast")
    goal = ses.ws.goal
    ks = np.geomspace(ses.ws.search.multiplier_low, ses.ws.search.multiplier_high, 30)
    rp = api.make_replayer(ses, engine="serial", progress=False)
    ev = search.Evaluator(ses, rp, ks, first, split, goal).evaluate(config)
    ref = _brute_force_k(ses, config, ks, first, split, goal)
    assert ref is not None and ev.feasible
    assert (ev.k, ev.caught, ev.alerts) == ref


def test_tune_searches_the_mode_on_the_latest_first_scored_hour(ses, tmp_path: Path) -> None:
    # every trial is scored from the latest first scored hour of the space: L + max W
    assert search._plan(ses, ())[2] == L + 72
    res = search.tune(ses, trials=6, engine="serial", progress=False,
                      storage=str(tmp_path / "study.journal"))
    assert res.first_hour == L + 72
    assert set(res.trials["expected_value"]) == {"fit", "forecast"}
    out = write_config(tmp_path / "tuned.toml", res.config, {})
    assert 'expected_value = "' in out.read_text(encoding="utf-8")
    assert load_config(out) == res.config

