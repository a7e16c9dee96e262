"""The held-out weeks cannot influence the tuning, end to end.

Tuning a workspace whose `[search] holdout_start` splits it, and tuning the same
workspace with the history file and the incidents file cut at that day (so the held-out
weeks do not exist at all), must choose the identical config with identical tuning-week
figures (same seed, same trials). Anything that chose settings from held-out hours
(minimum-impact ranges, typical levels, multiplier breakpoints, episodes running
across the split) would make the two differ.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from calibrate import api
from calibrate.tuning import search
from tests.synthetic import START, make_workspace

SPLIT_DAY = "2026-01-30"  # hour 600 of 840
SEARCH = (f'holdout_start = "{SPLIT_DAY}"\nseasonal_span = [7, 11]\n'
          "fence_window_hours = [48, 72]\ntrials = 4")


def _cut(src: Path, dst: Path) -> Path:
    """The workspace of `src` with history and incidents cut at the split day."""
    dst.mkdir(parents=True)
    day = pd.Timestamp(SPLIT_DAY, tz="UTC")
    hist = pd.read_csv(src / "history.csv", keep_default_na=False)
    hist[pd.to_datetime(hist["hour"]) < day].to_csv(dst / "history.csv", index=False)
    inc = pd.read_csv(src / "incidents.csv", keep_default_na=False)
    inc = inc[pd.to_datetime(inc["start"]) < day].copy()
    ends = pd.to_datetime(inc["end"])
    inc.loc[ends > day, "end"] = day.strftime("%Y-%m-%dT%H:%M:%SZ")
    inc.to_csv(dst / "incidents.csv", index=False)
    for name in ("owners.csv", "workspace.toml"):
        (dst / name).write_bytes((src / name).read_bytes())
    return dst / "workspace.toml"


def test_tuning_never_reads_the_held_out_weeks(tmp_path: Path) -> None:
    full_ws = make_workspace(tmp_path / "full", search=SEARCH, budget=6.0)
    cut_ws = _cut(full_ws.parent, tmp_path / "cut")
    results = {}
    for name, ws in (("full", full_ws), ("cut", cut_ws)):
        ses = api.open_session(ws)
        results[name] = (ses, search.tune(ses, storage=str(tmp_path / f"{name}.journal"),
                                          engine="serial", progress=False))
    (ses_f, full), (ses_c, cut) = results["full"], results["cut"]
    assert ses_f.history.n_hours == 840 and ses_c.history.n_hours == 600
    assert full.split_hour == cut.split_hour == 600 == (
        pd.Timestamp(SPLIT_DAY, tz="UTC") - START) // pd.Timedelta(hours=1)
    assert full.holdout is not None and full.holdout.incidents > 0  # there is held-out data
    assert cut.holdout is None
    assert full.tuning.incidents >= 2
    assert full.config == cut.config
    assert full.tuning.to_json_dict() == cut.tuning.to_json_dict()
    # the trials saw the same: every trial's figures are equal, and so are the best
    # trade-offs over every multiplier and minimum-impact level they scored
    cols = [c for c in full.trials.columns if c != "note"]
    pd.testing.assert_frame_equal(full.trials[cols], cut.trials[cols])
    assert full.pareto["min_impact"].str.len().gt(0).all()
    assert (full.pareto["min_impact"] != full.pareto["min_impact"].iloc[0]).any()
    pd.testing.assert_frame_equal(full.pareto, cut.pareto)
