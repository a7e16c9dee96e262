"""The CLI end to end on the small invented workspace: outputs, contracts, errors."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from calibrate import api
from calibrate.cli import main
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
    """Invariant (a threshold on one score array): full replays at k = 1 and k = 2 (with
    the flatline detector on, combined by "any"): every hour flagged at 2 is flagged at
    1, and every alert hour at 2 lies in an alert at 1."""
    ses = api.open_session(ws, incidents=False)
    base = ses.ws.detector.with_base(flatline_hours=4)
    rp = api.make_replayer(ses, engine="serial", progress=False)
    loose = rp.replay(base.with_base(fence_multiplier=1.0))
    tight = rp.replay(base.with_base(fence_multiplier=2.0))
    n_loose = n_tight = 0
    for key, ms in tight.scores.items():
        lo, hi = loose.scores[key].flagged(), ms.flagged()
        assert not (hi & ~lo).any()
        n_loose, n_tight = n_loose + int(lo.sum()), n_tight + int(hi.sum())
    assert n_loose > n_tight > 0  # the test sees hours drop out
    covered = {}
    e = loose.episodes
    for i in range(len(e)):
        covered.setdefault((e.level[i], e.series[i], e.metric[i]), []).append(
            (e.start[i], e.end[i]))
    t = tight.episodes
    for i in range(len(t)):
        spans = covered[(t.level[i], t.series[i], t.metric[i])]
        assert any(a <= t.start[i] and t.end[i] <= b for a, b in spans)


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


def test_score_lists_incidents_before_the_first_scored_hour_apart(ws, tmp_path, capsys):
    """An incident added at hour 100, before the first scored hour 167 (the workspace's
    168-hour decomposition window minus one), is listed apart and left out of recall."""
    inc = pd.read_csv(ws.parent / "incidents.csv", keep_default_na=False)
    early = inc.iloc[[0]].copy()
    early["incident_id"], early["start"], early["end"] = (
        "EARLY", "2026-01-09T04:00:00Z", "2026-01-09T08:00:00Z")
    hours = pd.read_csv(ws.parent / "history.csv", usecols=["hour"])["hour"]
    first = pd.Timestamp(hours.min())
    assert pd.Timestamp(early["start"].iloc[0]) < first + pd.Timedelta(hours=167)
    pd.concat([inc, early]).to_csv(ws.parent / "incidents.csv", index=False)
    out = tmp_path / "alerts.csv"
    assert main(["replay", str(ws), "--out", str(out), "--engine", "serial"]) == 0
    figs = tmp_path / "figures.json"
    assert main(["score", str(ws), "--alerts", str(out), "--json", str(figs)]) == 0
    data = json.loads(figs.read_text())
    assert data["incidents"] == len(inc)  # the early one is not in recall
    assert data["before_first_scored"] == 1 and data["before_first_scored_ids"] == ["EARLY"]
    printed = capsys.readouterr().out
    assert "before the first scored hour: 1 incident(s) (EARLY)" in printed
    assert "metric impressions: caught" in printed and "detector fence:" in printed


# ---------------------------------------------------------------- help, version, quiet, exit


def _subparsers():
    import argparse

    from calibrate.cli import build_parser

    ap = build_parser()
    sub = next(a for a in ap._actions if isinstance(a, argparse._SubParsersAction))
    return ap, sub.choices


def test_every_option_states_its_default_and_every_help_ends_with_examples():
    import shlex

    ap, commands = _subparsers()
    assert set(commands) == {"check", "replay", "score", "volume", "tune", "report", "retune",
                             "review", "demo"}
    for name, p in [("", ap), *commands.items()]:
        for action in p._actions:
            if not action.option_strings or action.option_strings[0] in ("-h", "--version"):
                continue
            text = action.help or ""
            if action.required:
                assert "(required)" in text, (name, action.option_strings)
            else:
                assert "default" in text, (name, action.option_strings, text)
        if not name:
            continue
        tail = p.format_help().rstrip().split("\n\n")[-1].splitlines()
        assert tail[0] in ("example:", "examples:"), (name, tail)
        for line in tail[1:]:
            argv = shlex.split(line)
            assert argv[:2] == ["calibrate", name], line
            args = ap.parse_args(argv[1:])  # the example is a valid command line
            assert args.command == name


def test_version_is_the_installed_distributions(capsys):
    import importlib.metadata

    with pytest.raises(SystemExit) as stop:
        main(["--version"])
    assert stop.value.code == 0
    assert capsys.readouterr().out == f"calibrate {importlib.metadata.version('calibrate')}\n"


def test_quiet_silences_the_progress_bars_of_replay_and_report(ws, tmp_path, capsys,
                                                               monkeypatch):
    import sys

    from calibrate.outputs import write_config

    cfg = tmp_path / "c.toml"
    write_config(cfg, api.open_session(ws, incidents=False).ws.detector, {})
    replay = ["replay", str(ws), "--out", str(tmp_path / "a.csv"), "--engine", "serial",
              "--force"]
    report = ["report", str(ws), "--config", str(cfg), "--out", str(tmp_path / "rep"),
              "--engine", "serial", "--force"]
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)  # report's bar: terminals only
    runs = {}
    for name, argv in (("replay", replay), ("replay -q after", [*replay, "-q"]),
                       ("report", report), ("--quiet report", ["--quiet", *report])):
        assert main(argv) == 0
        runs[name] = capsys.readouterr()
    monkeypatch.undo()
    assert main(report) == 0
    runs["report, stderr not a terminal"] = capsys.readouterr()
    assert "alerts written" in runs["replay -q after"].out
    assert "report written" in runs["--quiet report"].out
    assert "replay:" in runs["replay"].err
    assert "0/4 [" in runs["report"].err and "step/s, replay]" in runs["report"].err
    for name in ("replay -q after", "--quiet report", "report, stderr not a terminal"):
        assert runs[name].err == "", name


def test_usage_errors_and_an_unmet_goal_have_their_own_exit_codes(ws, capsys):
    from calibrate import errors

    assert len({errors.BAD_INPUT, errors.USAGE, errors.GOAL_NOT_MET, 130, 143}) == 5
    with pytest.raises(SystemExit) as stop:
        main(["replay", str(ws)])  # --out missing: argparse's usage error
    assert stop.value.code == errors.USAGE == 2
    assert main(["report", str(ws), "--config", "a.toml", "--study", "--out", "r"]) == 2
    assert "either --config" in capsys.readouterr().err
    assert main(["check", str(ws.parent / "missing.toml")]) == errors.BAD_INPUT == 1


def test_alerts_per_analyst_day_is_the_same_in_score_volume_and_report(ws, tmp_path, capsys):
    """One definition: alerts starting at or after the first scored hour (hour 167: the
    168-hour decomposition window minus one) over analysts x the days from that hour to
    the end. Reference: counted from the alerts file by hand."""
    import json

    from calibrate.outputs import write_config

    alerts = tmp_path / "alerts.csv"
    assert main(["-q", "replay", str(ws), "--out", str(alerts), "--engine", "serial"]) == 0
    frame = pd.read_csv(alerts, keep_default_na=False)
    hours = pd.read_csv(ws.parent / "history.csv", usecols=["hour"])["hour"]
    first_hour, n = pd.Timestamp(hours.min()), hours.nunique()
    scored_from = first_hour + pd.Timedelta(hours=167)
    days = (n - 167) / 24
    ref = {t: int(((frame["team"] == t) & (pd.to_datetime(frame["start"]) >= scored_from))
                  .sum()) / (1 * days) for t in ("blue", "green")}
    assert min(ref.values()) > 0

    figs = tmp_path / "figures.json"
    # --from at the history's start: the warm-up days still do not count
    assert main(["score", str(ws), "--alerts", str(alerts), "--json", str(figs),
                 "--from", str(first_hour.date())]) == 0
    score_out = capsys.readouterr().out
    per_team = json.loads(figs.read_text())["per_team"]
    vol_csv = tmp_path / "volume.csv"
    assert main(["volume", str(ws), "--alerts", str(alerts), "--csv", str(vol_csv)]) == 0
    vol_lines = capsys.readouterr().out.splitlines()
    vol = pd.read_csv(vol_csv)
    cfg = tmp_path / "today.toml"
    write_config(cfg, api.open_session(ws, incidents=False).ws.detector, {})
    assert main(["-q", "report", str(ws), "--config", str(cfg), "--out", str(tmp_path / "r"),
                 "--engine", "serial"]) == 0
    summary = json.loads((tmp_path / "r" / "summary.json").read_text())
    rep_vol = pd.DataFrame(summary["volume"])
    for team, rate in ref.items():
        assert per_team[team]["alerts_per_analyst_day"] == pytest.approx(rate, rel=1e-12)
        assert summary["replayed"]["per_team"][team]["alerts_per_analyst_day"] == \
            pytest.approx(rate, rel=1e-12)
        for table in (vol, rep_vol):
            mine = table[table["team"] == team]
            assert mine["days"].sum() == pytest.approx(days)
            assert mine["alerts"].sum() / mine["days"].sum() == pytest.approx(rate, rel=1e-12)
        line = next(ln for ln in vol_lines if ln.split()[:2] == [team, "all"])
        assert line.split()[3] == f"{rate:.2f}"
    assert f"counted from {scored_from:%Y-%m-%dT%H:%MZ}" in score_out
