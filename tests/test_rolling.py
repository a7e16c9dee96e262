"""Rolling validation: time-ordered folds, each tuned only on the weeks before it.

Reference for "only the weeks before it": tuning the same workspace with its history
and incidents cut at a fold's last tuning hour chooses the identical config (same seed
and trials) as that fold did.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from calibrate import api
from calibrate.errors import InputError
from calibrate.tuning import rolling, search, summaries
from tests.synthetic import START, make_workspace

ROLLING = ('holdout_start = "2026-03-01"\nvalidation = "rolling"\nfolds = 2\n'
           "seasonal_span = [7, 11]\nfence_window_hours = [48, 72]\ntrials = 3")


def _with_early_incidents(ws: Path) -> Path:
    """Two more incidents in the first weeks, so the first fold has labels to tune on."""
    inc = pd.read_csv(ws.parent / "incidents.csv", keep_default_na=False)
    extra = pd.concat([inc.iloc[[1]]] * 2, ignore_index=True)
    for j, at in enumerate((250, 320)):
        extra.loc[j, "incident_id"] = f"E{j + 1}"
        extra.loc[j, "start"] = (START + pd.Timedelta(hours=at)).strftime("%Y-%m-%dT%H:%M:%SZ")
        extra.loc[j, "end"] = (START + pd.Timedelta(hours=at + 3)).strftime("%Y-%m-%dT%H:%M:%SZ")
    pd.concat([inc, extra]).to_csv(ws.parent / "incidents.csv", index=False)
    return ws


def test_fold_bounds_by_hand():
    # tuning hours [167, 840): 28 whole days, 3 blocks of 9 days (216 hours)
    folds = rolling.fold_bounds(167, 840, 2, 0)
    assert [(f.train_end, f.test_start, f.test_end) for f in folds] == [
        (383, 383, 599), (599, 599, 840)]
    gapped = rolling.fold_bounds(167, 840, 2, 2)
    assert [f.train_end for f in gapped] == [335, 551]
    with pytest.raises(InputError, match="at least 31 tuning days"):
        rolling.fold_bounds(167, 840, 30, 0)
    with pytest.raises(InputError, match="less than a day"):
        rolling.fold_bounds(167, 840, 2, 9)


def test_each_fold_is_tuned_only_on_the_weeks_before_it(tmp_path: Path):
    ws = _with_early_incidents(make_workspace(tmp_path / "ws", search=ROLLING, budget=6.0))
    ses = api.open_session(ws)
    res = search.tune(ses, storage=str(tmp_path / "j"), engine="serial", progress=False)
    assert res.holdout is None and len(res.folds) == 2
    first = res.folds[0]
    assert (first.train_end, first.test_start, first.test_end) == (383, 383, 599)
    # the same workspace cut at the first fold's last tuning hour
    cut = tmp_path / "cut"
    cut.mkdir()
    end = START + pd.Timedelta(hours=first.train_end)
    hist = pd.read_csv(ws.parent / "history.csv", keep_default_na=False)
    hist[pd.to_datetime(hist["hour"]) < end].to_csv(cut / "history.csv", index=False)
    inc = pd.read_csv(ws.parent / "incidents.csv", keep_default_na=False)
    inc[pd.to_datetime(inc["end"]) <= end].to_csv(cut / "incidents.csv", index=False)
    (cut / "owners.csv").write_bytes((ws.parent / "owners.csv").read_bytes())
    (cut / "workspace.toml").write_text(
        ws.read_text().replace(ROLLING, ROLLING.replace('validation = "rolling"\n', "")))
    ses_c = api.open_session(cut / "workspace.toml")
    alone = search.tune(ses_c, storage=str(tmp_path / "c"), engine="serial", progress=False)
    assert alone.split_hour == first.train_end == ses_c.history.n_hours
    assert alone.config == first.config
    # each fold is scored on its own test block with the settings it chose
    for f in res.folds:
        eps = api.replay_session(ses, f.config, engine="serial", progress=False).episodes
        ref = api.score_episodes(ses, eps, f.test_start, f.test_end)
        assert (f.figures.caught, f.figures.incidents, f.figures.alerts) == (
            ref.caught, ref.incidents, ref.alerts)
    assert res.pooled.incidents == sum(f.figures.incidents for f in res.folds)
    assert res.pooled.alerts == sum(f.figures.alerts for f in res.folds)
    assert res.verdict in ("holds", "does not hold", "cannot tell")
    assert all(r.startswith("rolling folds pooled") for r in res.verdict_reasons)
    lines = summaries.fold_lines(res)
    assert lines[0].startswith("rolling validation") and "fold 2" in lines[2]
    # the report carries the folds, their stability and the verdict
    import json

    from calibrate.reporting.report import write_report

    write_report(ses, res, tmp_path / "report", engine="serial")
    summary = json.loads((tmp_path / "report" / "summary.json").read_text())
    v = summary["validation"]
    assert v["verdict"] == res.verdict and len(v["folds"]) == 2
    assert v["folds"][0]["test_start_hour"] == 383
    assert "fence_multiplier" in v["stability"]
    assert "Rolling validation" in (tmp_path / "report" / "index.html").read_text()
