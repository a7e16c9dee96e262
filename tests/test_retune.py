"""Re-tuning from verdicts: validation, label merge, known false alarms, untouched inputs."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from calibrate import api
from calibrate.engine.executors import SerialExecutor
from calibrate.engine.replay import sweep
from calibrate.errors import CalibrationError, InputError
from calibrate.feedback.retune import raised_windows, read_verdicts, retune, write_retune_outputs
from calibrate.feedback.review import review_frame
from calibrate.scoring.curves import multiplier_curve
from calibrate.scoring.matching import match
from tests.synthetic import make_workspace

PREVIOUS_K = 1.0


@pytest.fixture(scope="module")
def ses(tmp_path_factory: pytest.TempPathFactory) -> api.Session:
    return api.open_session(make_workspace(tmp_path_factory.mktemp("ws")))


@pytest.fixture(scope="module")
def previous(ses):
    return ses.ws.detector.with_base(fence_multiplier=PREVIOUS_K)


@pytest.fixture(scope="module")
def reviewed(ses, previous):
    """Review frame of the previous config plus which rows are true/false alerts."""
    rep = api.replay_session(ses, previous, executor=SerialExecutor(), progress=False)
    frame = rep.alerts_frame()
    true = match(rep.episodes, ses.incidents, 1, 2).alert_true
    frame["_true"] = true
    frame["_peak"] = rep.episodes.peak_score
    return review_frame(frame)


def _write(df: pd.DataFrame, path: Path) -> Path:
    df.drop(columns=[c for c in df.columns if c.startswith("_")]).to_csv(path, index=False)
    return path


def grid_tuner(calls: list):
    """Test double for `calibrate.tuning.search.tune`: smallest k (of a grid) that raises none
    of the known false alarms while meeting the miss-rate goal; else the k with fewest."""

    def tune(ses, *, trials=None, warm_start=(), known_false=None, executor=None,
             engine="local", workers=None, scheduler=None, progress=False):
        calls.append(dict(warm_start=list(warm_start), known_false=known_false, trials=trials))
        base = warm_start[0]
        rp = api.make_replayer(ses, executor=SerialExecutor(), progress=False)
        scores = rp.scores(base)
        ks = np.round(np.arange(PREVIOUS_K, 12.0, 0.25), 2)
        eps = sweep(scores, ks, ses.routes)
        curve = multiplier_curve(eps, ks, ses.incidents, 1, 2, ses.analysts,
                                 ses.history.n_hours / 24)
        raised = np.array([raised_windows(eps.take(eps.grid == g), known_false).sum()
                           for g in range(len(ks))])
        ok = curve.miss_rate <= ses.ws.goal.max_miss_rate
        pick = int(np.flatnonzero(ok & (raised == raised[ok].min()))[0])
        config = base.with_base(fence_multiplier=float(ks[pick]))
        return SimpleNamespace(config=config, feasible=True, reason=f"k={ks[pick]}",
                               provenance={"tuner": "grid"})

    return tune


def test_false_verdicts_lower_those_alerts(ses, previous, reviewed, tmp_path: Path) -> None:
    df = reviewed.copy()
    false_rows = df.index[~df["_true"]][:6]
    df.loc[false_rows, "verdict"] = "false"
    covered = df.index[df["_true"]][0]
    df.loc[covered, "verdict"] = "real"  # already labelled: reported, no change
    new_real = df.index[~df["_true"]][6]
    df.loc[new_real, ["verdict", "comment"]] = ["real", "seen by the on-call analyst"]
    df.loc[df.index[~df["_true"]][7], "verdict"] = "duplicate"
    path = _write(df, tmp_path / "reviewed.csv")
    calls: list = []
    res = retune(ses, path, previous, 5, tuner=grid_tuner(calls), executor=SerialExecutor())

    assert calls[0]["warm_start"] == [previous] and calls[0]["trials"] == 5
    kf = calls[0]["known_false"]
    assert sorted(kf.incident_id) == sorted(df.loc[false_rows, "alert_id"])
    v = res.verdicts
    assert v.counts == {"real": 2, "false": 6, "duplicate": 1,
                        "blank": len(df) - 9}
    assert v.already_applied == [df.loc[covered, "alert_id"]]
    assert v.new_incidents["incident_id"].tolist() == [f"R-{df.loc[new_real, 'alert_id']}"]
    assert len(res.incidents) == len(ses.incidents) + 1

    c = res.comparison
    assert c.known_false_total == 6
    # checked against a fresh replay of each config, not the comparison's own numbers
    new_eps = api.replay_session(ses, res.config, executor=SerialExecutor(),
                                 progress=False).episodes
    old_eps = api.replay_session(ses, previous, executor=SerialExecutor(),
                                 progress=False).episodes
    assert raised_windows(old_eps, kf).sum() == 6
    assert raised_windows(new_eps, kf).sum() == len(c.still_raised) == 0
    assert res.config.base.fence_multiplier > PREVIOUS_K and c.why == []
    # the new incident from the `real` verdict counts in both replays' figures
    assert c.new["incidents"] == c.old["incidents"] == len(res.incidents) - _warmup(ses, res)


def test_says_why_when_false_alarms_stay(ses, previous, reviewed, tmp_path: Path) -> None:
    df = reviewed.copy()
    # false alarms of the highest, a middle and the lowest peak fence score: the miss
    # rates quoted for their multipliers differ, so a misaligned line would show
    false = df[~df["_true"]].sort_values("peak_score", ascending=False)
    df.loc[false.index[[0, len(false) // 2, len(false) - 1]], "verdict"] = "false"
    path = _write(df, tmp_path / "reviewed.csv")

    def unchanged(ses, *, warm_start=(), **kw):
        return SimpleNamespace(config=warm_start[0], feasible=False,
                               reason="no setting avoids them", provenance={})

    res = retune(ses, path, previous, 2, tuner=unchanged, executor=SerialExecutor())
    c = res.comparison
    assert len(c.still_raised) == 3 and len(c.why) == 3
    quoted = {why.split("multiplier above ")[1].split("miss rate there ")[1][:5] for why in c.why}
    assert len(quoted) > 1  # the choice above gives the levers different miss rates
    for row, why in zip(c.still_raised, c.why, strict=True):
        assert why.startswith(f"{row['alert_id']}: dropping it needs a fence multiplier above")
        assert "or a minimum impact above" in why and "miss rate there" in why
    # reference for the minimum-impact lever: a replay with every series' minimum impact
    # just above the largest |impact so far| of the alert's hours (summed from the
    # per-hour scores) no longer raises it, and one at it still does
    ids = {r["alert_id"] for r in c.still_raised}
    marked = df[df["alert_id"].isin(ids)]
    cols = ["level", *ses.history.key_columns, "metric", "start"]
    scores = api.replay_session(ses, previous, executor=SerialExecutor(),
                                progress=False).scores_frame()
    for _, row in marked.iterrows():
        keys = (scores["level"] == row["level"]) & (scores["metric"] == row["metric"])
        for col in ses.history.key_columns:
            keys &= scores[col].astype(str) == str(row[col])
        hours = scores[keys & (scores["hour"] >= pd.Timestamp(row["start"]))
                       & (scores["hour"] < pd.Timestamp(row["end"]))].sort_values("hour")
        size = float(np.max(np.abs(np.cumsum(hours["value"] - hours["expected"]))))
        for m, raised in ((float(np.nextafter(size, np.inf)), False), (size * (1 - 1e-9), True)):
            rep = api.replay_session(ses, previous.with_base(min_impact=m),
                                     executor=SerialExecutor(), progress=False)
            frame = rep.alerts_frame().astype({c: str for c in cols})
            same = (frame[cols] == row[cols].astype(str).to_numpy()).all(axis=1)
            assert bool(same.any()) == raised
    # reference for the multiplier lever: a full replay at a multiplier just above the
    # alert's peak fence score no longer raises it, and its miss rate over the compared
    # hours is the one the line quotes
    for (_, row), why in zip(marked.set_index("alert_id").loc[
            [r["alert_id"] for r in c.still_raised]].reset_index().iterrows(), c.why,
            strict=True):
        k = float(row["peak_score"]) * 1.0001 + 1e-9
        rep = api.replay_session(ses, previous.with_base(fence_multiplier=k),
                                 executor=SerialExecutor(), progress=False)
        frame = rep.alerts_frame().astype({c: str for c in cols})
        assert not (frame[cols] == row[cols].astype(str).to_numpy()).all(axis=1).any()
        f = api.score_episodes(ses, rep.episodes, c.start_hour, c.end_hour)
        assert f"above {float(row['peak_score']):.3g} (miss rate there {f.miss_rate:.1%})" in why


def _warmup(ses, res) -> int:
    first = api.first_scored_hour(res.config, ses.ws)
    return int((res.incidents.start < first).sum())


def test_outputs_are_new_files_and_inputs_untouched(ses, previous, reviewed,
                                                   tmp_path: Path) -> None:
    df = reviewed.copy()
    df.loc[df.index[~df["_true"]][:3], "verdict"] = "false"
    df.loc[df.index[~df["_true"]][3], "verdict"] = "real"
    path = _write(df, tmp_path / "reviewed.csv")
    inc_file = Path(ses.ws.incidents.path)
    before = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in (path, inc_file)}
    res = retune(ses, path, previous, None, tuner=grid_tuner([]), executor=SerialExecutor())
    out = tmp_path / "tuned-v2.toml"
    written = write_retune_outputs(res, out, None)
    after = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in (path, inc_file)}
    assert before == after
    assert out.is_file() and (tmp_path / "tuned-v2-incidents.csv").is_file()
    merged = pd.read_csv(tmp_path / "tuned-v2-incidents.csv", dtype=str, keep_default_na=False)
    assert len(merged) == len(ses.incidents) + 1 and merged["incident_id"].iloc[-1].startswith("R-")
    report = tmp_path / "tuned-v2-report"
    assert report in written and (report / "index.html").is_file()
    summary = json.loads((report / "summary.json").read_text(encoding="utf-8"))
    assert summary["known_false_total"] == 3
    assert summary["new"]["alerts"] == res.comparison.new["alerts"]
    from calibrate.outputs import load_config

    assert load_config(out) == res.config
    with pytest.raises(CalibrationError, match="already exists"):
        write_retune_outputs(res, out, None)


@pytest.mark.parametrize(
    ("edit", "column", "what"),
    [
        ("unknown", "alert_id", "unknown alert id"),
        ("badverdict", "verdict", "is not a verdict"),
        ("conflict", "verdict", "but 'false' in row"),
        ("moved", "start", "does not match alert"),
    ],
)
def test_bad_rows_name_file_row_and_column(ses, previous, reviewed, tmp_path: Path,
                                           edit, column, what) -> None:
    df = reviewed.copy()
    df.loc[0, "verdict"] = "false"
    if edit == "unknown":
        df.loc[2, ["alert_id", "verdict"]] = ["A999999", "real"]
        row = 4
    elif edit == "badverdict":
        df.loc[2, "verdict"] = "maybe"
        row = 4
    elif edit == "conflict":
        dup = df.iloc[[0]].copy()
        dup["verdict"] = "real"
        df = pd.concat([df, dup], ignore_index=True)
        row = len(df) + 1
    else:
        df.loc[2, ["start", "verdict"]] = ["2026-01-05T00:00:00Z", "false"]
        row = 4
    path = _write(df, tmp_path / "reviewed.csv")
    rep = api.replay_session(ses, previous, executor=SerialExecutor(), progress=False)
    with pytest.raises(InputError) as err:
        read_verdicts(path, ses, rep)
    msg = str(err.value)
    assert msg.startswith(f"{path} row {row} column '{column}'"), msg
    assert what in msg


def test_with_the_real_search(ses, previous, reviewed, tmp_path: Path) -> None:
    """The real search behind retune: every false alarm the new config still raises is
    explained, and the known false alarms are counted as the file marks them."""
    from calibrate.tuning.search import TuneResult

    df = reviewed.copy()
    df.loc[df.index[~df["_true"]][:4], "verdict"] = "false"
    path = _write(df, tmp_path / "reviewed.csv")
    res = retune(ses, path, previous, 4, executor=SerialExecutor())
    assert isinstance(res.tune, TuneResult)
    c = res.comparison
    assert c.known_false_total == 4 == res.provenance["known_false_alarms"]
    assert len(c.why) == len(c.still_raised) <= 4


def test_incidents_from_held_out_alerts_are_marked(ses, previous, reviewed,
                                                  tmp_path: Path) -> None:
    """A `real` verdict on an alert raised in the held-out weeks (the last week here)
    becomes an RH- incident; one from the tuning weeks an R- one. Reference: the split
    of the workspace's search and the alerts' raised hours from the replay."""
    from calibrate.feedback.retune import read_verdicts
    from calibrate.tuning.search import split_hour

    rep = api.replay_session(ses, previous, executor=SerialExecutor(), progress=False)
    split = split_hour(ses)
    assert 0 < split < ses.history.n_hours
    frame = reviewed.copy()
    row_of = {a: i for i, a in enumerate(rep.alerts_frame()["alert_id"])}
    frame["_held"] = [rep.episodes.raised[row_of[a]] >= split for a in frame["alert_id"]]
    false_rows = frame[~frame["_true"]]
    held = false_rows[false_rows["_held"]].head(2)
    tuning = false_rows[~false_rows["_held"]].head(1)
    assert len(held) == 2 and len(tuning) == 1
    frame.loc[held.index, "verdict"] = "real"
    frame.loc[tuning.index, "verdict"] = "real"
    path = _write(frame, tmp_path / "reviewed.csv")
    v = read_verdicts(path, ses, rep, split)
    assert sorted(v.held_out_incidents) == sorted(f"RH-{a}" for a in held["alert_id"])
    ids = set(v.new_incidents["incident_id"])
    assert {f"R-{a}" for a in tuning["alert_id"]} <= ids
    assert all("held-out-week review" in n for n in
               v.new_incidents.loc[v.new_incidents["incident_id"].str.startswith("RH-"), "note"])
    assert any("no longer independent" in line for line in v.lines())
