"""No look-ahead, end to end: a replay of the history file cut at hour t agrees with the
full-history replay at every hour <= t.

The history CSV has missing rows (a gap in one campaign, a gap in another, a campaign
that starts late), a blank cell, measures of both fill rules (`zero`, `interpolate`),
a derived ratio with 0/0 hours and two levels. For each cut hour t the rows with
hour <= t are written to a second workspace, which goes through the same public API
as a user's (`open_session` from the files, `replay_session` with the workspace's
`[detector]`, whose `min_impact` is above 0). What a production detector has seen at
hour t must not change when later hours arrive (README, "The workspace").

Campaign-level clicks and impressions take one-hour-ahead expected values
(`expected_value = "forecast"`, first scored hour L + W = 96), the rest in-fit ones.
Clicks are fitted robustly (the compiled STL kernel fits each window on its own), the
other metrics by the linear smoother (BLAS products in blocks of one shape, so each
window's fit depends on that window alone): every per-hour result and every finished
alert's impact must be bit for bit those of the full run.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibrate import api
from calibrate.engine.replay import ReplayResult

N_HOURS = 168
START = pd.Timestamp("2024-05-06T00:00Z")
GAP_C1 = range(100, 105)  # rows of m1/c1 missing
GAP_C3 = range(110, 113)  # rows of m2/c3 missing
C4_FROM = 120  # m2/c4 has no rows before this hour
BLANK = 134  # m1/c2's clicks cell is blank
# before the gaps; inside c1's gap; right after it; inside c3's gap (c4 not started);
# just after c4 starts; at the blank cell
CUTS = (90, 102, 105, 111, 123, BLANK)
KEYS = ["market", "campaign"]
PER_HOUR = ("value", "expected", "remainder", "q1", "q3", "score")

WORKSPACE = """\
[history]
path = "history.csv"
time_column = "hour"
key_columns = ["market", "campaign"]

[measures]
impressions = "zero"
clicks = "interpolate"

[metrics]
ctr = "clicks / impressions"

[levels]
market = ["market"]
campaign = ["market", "campaign"]

[detector]
period_hours = 24
seasonal_span = 7
decomposition_window_hours = 72
refit_every_hours = 3
fence_window_hours = 24
fence_multiplier = 1.5
flatline_hours = 3
min_impact = 40.0

[detector.group.forecast_robust]
levels = ["campaign"]
metrics = ["clicks"]
expected_value = "forecast"
robust = true
min_impact = 8.0

[detector.group.forecast]
levels = ["campaign"]
metrics = ["impressions"]
expected_value = "forecast"

[detector.group.ratio]
metrics = ["ctr"]
min_impact = 0.03

[detector.group.robust]
metrics = ["clicks"]
robust = true
min_impact = 8.0
"""


def history_rows() -> pd.DataFrame:
    """Invented hourly rows: daily cycle, noise, a spike and a drop; gaps as above."""
    rng = np.random.default_rng(11)
    t = np.arange(N_HOURS)
    day = np.sin(2 * np.pi * t / 24)
    parts = []
    for market, campaign, base in (("m1", "c1", 300), ("m1", "c2", 80),
                                   ("m2", "c3", 200), ("m2", "c4", 150)):
        imp = np.round(base * (1 + 0.5 * day) + rng.normal(0, base / 15, N_HOURS))
        clk = np.round(imp * 0.05 + rng.normal(0, 2, N_HOURS))
        if campaign == "c1":
            imp[128:132] += 250  # a spike
        if campaign == "c2":
            night = t % 24 < 4
            imp[night], clk[night] = 0, 0  # ctr 0/0 at night
        if campaign == "c3":
            clk[140:147] = np.round(clk[140:147] * 0.2)  # a click drop
        frame = pd.DataFrame({
            "hour": (START + pd.to_timedelta(t, unit="h")).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "market": market, "campaign": campaign,
            "impressions": np.clip(imp, 0, None), "clicks": np.clip(clk, 0, None),
        })
        if campaign == "c1":
            frame = frame[~np.isin(t, GAP_C1)]
        if campaign == "c3":
            frame = frame[~np.isin(t, GAP_C3)]
        if campaign == "c4":
            frame = frame[t >= C4_FROM]
        parts.append(frame)
    rows = pd.concat(parts, ignore_index=True)
    rows["clicks"] = rows["clicks"].astype(object)
    blank = (START + pd.Timedelta(hours=BLANK)).strftime("%Y-%m-%dT%H:%M:%SZ")
    rows.loc[(rows.campaign == "c2") & (rows.hour == blank), "clicks"] = ""  # a blank cell
    return rows


def run(folder: Path, rows: pd.DataFrame) -> ReplayResult:
    """Write the workspace and its history file, and replay it from the files."""
    folder.mkdir()
    (folder / "workspace.toml").write_text(WORKSPACE, encoding="utf-8")
    rows.to_csv(folder / "history.csv", index=False)
    ses = api.open_session(folder / "workspace.toml", incidents=False)
    return api.replay_session(ses, engine="serial", progress=False)


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> dict[int | None, ReplayResult]:
    """The full-history replay (key None) and one replay per cut hour."""
    root = tmp_path_factory.mktemp("lookahead")
    rows = history_rows()
    hour = pd.to_datetime(rows["hour"])
    out: dict[int | None, ReplayResult] = {None: run(root / "full", rows)}
    for cut in CUTS:
        out[cut] = run(root / f"cut{cut}", rows[hour <= START + pd.Timedelta(hours=cut)])
    # the data exercise what the alert test is for: some episode runs across a cut
    eps = out[None].episodes
    assert any(((eps.start <= c) & (eps.end > c + 1)).any() for c in CUTS)
    assert (out[None].alerts_frame()["expected_value"] == "forecast").any()
    return out


def labels(res: ReplayResult, level: str) -> list[str]:
    ls = res.history.levels[level]
    return [ls.series_label(i) for i in range(ls.n_series)]


@pytest.mark.parametrize("cut", CUTS)
def test_scores_and_flags_at_or_before_the_cut_match_full_history(runs, cut) -> None:
    full, part = runs[None], runs[cut]
    assert part.history.n_hours == cut + 1
    assert (part.history.hours == full.history.hours[: cut + 1]).all()
    assert set(part.scores) == set(full.scores)
    for (level, metric), fs in full.scores.items():
        ps = part.scores[(level, metric)]
        rows_full = {lab: i for i, lab in enumerate(labels(full, level))}
        rows_part = {lab: i for i, lab in enumerate(labels(part, level))}
        for lab, i in rows_full.items():
            where = f"{level} {lab} {metric} (cut at hour {cut})"
            if lab not in rows_part:
                # a series with no row yet: nothing of it may be flagged so far
                assert lab == "m2 / c4" and cut < C4_FROM, where
                assert not fs.flagged()[i, : cut + 1].any(), where
                continue
            j = rows_part[lab]
            for name in PER_HOUR:
                got, want = getattr(ps, name)[j], getattr(fs, name)[i, : cut + 1]
                np.testing.assert_array_equal(got, want, err_msg=f"{name} of {where}")
            np.testing.assert_array_equal(
                ps.flagged()[j], fs.flagged()[i, : cut + 1], err_msg=f"flags of {where}"
            )


def raised_alerts(res: ReplayResult, cut: int) -> pd.DataFrame:
    """Alerts raised at or before hour `cut`, with hour columns as hour indices."""
    frame = res.alerts_frame()
    if "raised_hour" not in frame.columns:
        pytest.fail(
            "the Alerts table has no 'raised_hour' column: alerts are not raised online "
            "yet (raised at the first hour their |impact so far| reaches min_impact), so "
            "whether an alert exists at hour t still depends on later hours",
            pytrace=False,
        )
    frame = frame.copy()
    for col in ("start", "end", "raised_hour"):
        since = pd.to_datetime(frame[col]) - START
        frame[col] = (since // pd.Timedelta(hours=1)).astype(np.int64)
    frame = frame[frame["raised_hour"] <= cut]
    return frame.sort_values(["level", *KEYS, "metric", "start"]).reset_index(drop=True)


def impact_so_far(res: ReplayResult, alert: pd.Series, last: int) -> float:
    """value - expected summed over the alert's hours up to `last` (full run's scores)."""
    level = alert["level"]
    ms = res.scores[(level, alert["metric"])]
    key = " / ".join(alert[k] for k in res.history.levels[level].key_columns)
    i = labels(res, level).index(key)
    hours = slice(alert["start"], last + 1)
    return float(np.sum(ms.value[i, hours] - ms.expected[i, hours]))


@pytest.mark.parametrize("cut", CUTS)
def test_alerts_raised_at_or_before_the_cut_match_full_history(runs, cut) -> None:
    full = raised_alerts(runs[None], cut)
    part = raised_alerts(runs[cut], cut)
    if cut == max(CUTS):  # some alert is raised after its first hour: min_impact bites
        assert (full["raised_hour"] > full["start"]).any()
    ident = ["level", *KEYS, "metric", "start", "raised_hour"]
    pd.testing.assert_frame_equal(part[ident], full[ident])
    for (_, a), (_, b) in zip(part.iterrows(), full.iterrows(), strict=True):
        where = f"alert {tuple(a[ident])} (cut at hour {cut})"
        if b["end"] <= cut + 1:  # over by the cut: everything is known
            assert a["end"] == b["end"], where
            assert a["impact"] == b["impact"], where
        else:  # still running at the cut: known up to the cut
            assert a["end"] == cut + 1, where
            want = impact_so_far(runs[None], b, cut)
            assert a["impact"] == pytest.approx(want, rel=1e-12, abs=1e-10), where
