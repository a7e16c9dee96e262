"""The CLI end to end on the small invented workspace: outputs, contracts, errors."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from calibrate import api
from calibrate.cli import main
from calibrate.settings import DetectorSettings
from tests.synthetic import make_workspace

ALERT_COLUMNS = [
    "alert_id", "level", "market", "advertiser", "campaign", "metric", "start", "end",
    "raised_hour", "peak_hour", "peak_score", "value", "expected", "impact", "team", "detectors",
    "expected_value",
]
SCORE_COLUMNS = [
    "level", "market", "advertiser", "campaign", "metric", "hour", "value", "expected",
    "remainder", "q1", "q3", "lower", "upper", "score", "flagged",
]


@pytest.fixture
def ws(tmp_path):
    return make_workspace(tmp_path / "ws")


def test_check_prints_summary(ws, capsys):
    assert main(["check", str(ws)]) == 0
    out = capsys.readouterr().out
    assert "campaign" in out and "market" in out


def test_replay_writes_contract_files(ws, tmp_path, capsys):
    out, scores = tmp_path / "alerts.csv", tmp_path / "scores.parquet"
    assert main(["replay", str(ws), "--out", str(out), "--scores", str(scores),
                 "--engine", "serial"]) == 0
    alerts = pd.read_csv(out, keep_default_na=False)
    assert list(alerts.columns) == ALERT_COLUMNS
    assert len(alerts) > 0
    assert (pd.to_datetime(alerts["end"]) > pd.to_datetime(alerts["start"])).all()
    assert np.allclose(alerts["impact"], alerts["value"] - alerts["expected"])
    sc = pd.read_parquet(scores)
    assert list(sc.columns) == SCORE_COLUMNS
    # flags of the scores file are the fence rule (no flatline in this config): score > k
    k = 1.0
    assert (sc["flagged"] == (sc["score"].fillna(-1) > k)).all()
    # every alert's hours are flagged hours of its series in the scores file
    a = alerts.iloc[0]
    sel = sc[(sc.level == a.level) & (sc.metric == a.metric) & (sc.market == a.market)
             & (sc.advertiser == str(a.advertiser)) & (sc.hour >= pd.Timestamp(a.start))
             & (sc.hour < pd.Timestamp(a.end))]
    assert len(sel) and sel["flagged"].all()
    # a second run refuses to overwrite
    assert main(["replay", str(ws), "--out", str(out), "--engine", "serial"]) == 1
    assert "already exists" in capsys.readouterr().err


def test_score_json_matches_api(ws, tmp_path):
    out, figs = tmp_path / "alerts.csv", tmp_path / "figures.json"
    assert main(["replay", str(ws), "--out", str(out), "--engine", "serial"]) == 0
    assert main(["score", str(ws), "--alerts", str(out), "--json", str(figs)]) == 0
    data = json.loads(figs.read_text())
    for key in ["incidents", "caught", "missed", "miss_rate", "miss_rate_low", "miss_rate_high",
                "alerts", "true_alerts", "false_alerts", "precision", "delay_median_hours",
                "delay_p90_hours", "per_team"]:
        assert key in data
    ses = api.open_session(ws)
    ref = api.score_episodes(ses, api.replay_session(ses, engine="serial",
                                                      progress=False).episodes)
    assert data["caught"] == ref.caught and data["alerts"] == ref.alerts
    assert set(data["per_team"]) == {"blue", "green"}


def test_volume_against_replay(ws, capsys):
    assert main(["volume", str(ws), "--engine", "serial"]) == 0
    out = capsys.readouterr().out
    assert "blue" in out and "green" in out and "per analyst-day" in out


def test_tighter_multiplier_never_adds_flags(ws):
    # invariant (STYLE.md): raising the fence multiplier never adds flags
    ses = api.open_session(ws, incidents=False)
    rp = api.make_replayer(ses, engine="serial", progress=False)
    base = ses.ws.detector
    scores = rp.scores(base)
    for ms in scores.values():
        lo, hi = ms.flagged(1.0), ms.flagged(2.0)
        assert not (hi & ~lo).any()


def test_no_look_ahead(ws):
    # the flag at hour t is the same when the series is cut at t
    ses = api.open_session(ws, incidents=False)
    s = DetectorSettings(decomposition_window_hours=168, fence_window_hours=72,
                         fence_multiplier=1.5, refit_every_hours=5)
    from calibrate.decompose import fence_scores, remainder_stream

    y = ses.history.levels["campaign"].values["impressions"][0]
    full = remainder_stream(y, s, (72,))
    full_score = fence_scores(full.remainder, full.q1[72], full.q3[72], "both")
    for cut in (300, 411, 500):
        part = remainder_stream(y[: cut + 1], s, (72,))
        sc = fence_scores(part.remainder, part.q1[72], part.q3[72], "both")
        # BLAS blocking depends on the matrix shape, so values agree to rounding
        assert sc[cut] == pytest.approx(full_score[cut], abs=1e-9)
        assert part.expected[cut] == pytest.approx(full.expected[cut], abs=1e-9)
        assert (sc[cut] > 1.5) == (full_score[cut] > 1.5)


@pytest.mark.parametrize(
    "args, needle",
    [
        (["replay", "nope.toml", "--out", "a.csv"], "no such workspace file"),
        (["score", "WS", "--alerts", "missing.csv"], "no such alerts file"),
        (["replay", "WS", "--out", "a.csv", "--metrics", "bogus"], "unknown metric 'bogus'"),
        (["replay", "WS", "--out", "a.csv", "--config", "none.toml"], "no such config file"),
        (["volume", "WS", "--from", "2026-13-45"], "--from"),
    ],
)
def test_errors_are_one_line(ws, capsys, args, needle):
    args = [str(ws) if a == "WS" else a for a in args]
    assert main(args) == 1
    err = capsys.readouterr().err.strip()
    assert needle in err and "\n" not in err and "Traceback" not in err


def test_python_dash_m_runs_the_same_cli(tmp_path) -> None:
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    env = {"PYTHONPATH": str(root), "PATH": "/usr/bin:/bin"}
    ok = subprocess.run([sys.executable, "-m", "calibrate", "--help"], capture_output=True,
                        text=True, env=env, cwd=tmp_path)
    assert ok.returncode == 0 and "demo" in ok.stdout
    bad = subprocess.run([sys.executable, "-m", "calibrate", "check", str(tmp_path / "no.toml")],
                         capture_output=True, text=True, env=env, cwd=tmp_path)
    assert bad.returncode != 0
    assert "no.toml" in bad.stderr and "Traceback" not in bad.stderr
