"""History loading: roll-up, derived metrics, gap filling, validation errors, and the
CSV / Parquet / SQLite routes agreeing; owners routing and the `check` summary."""

from __future__ import annotations

import hashlib
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibrate.errors import InputError
from calibrate.inputs.checks import check_workspace
from calibrate.inputs.history import History, fill_carry_forward, load_history
from calibrate.inputs.owners import load_owners
from calibrate.inputs.workspace import load_workspace

HEADER = "hour,market,advertiser,campaign,impressions,clicks"
# Hand-worked roll-up example: 2 hours, 4 campaigns under 3 advertisers in 2 markets.
ROLLUP = f"""{HEADER}
2024-03-01T00:00:00Z,m1,a1,c1,100,10
2024-03-01T00:00:00Z,m1,a1,c2,300,6
2024-03-01T00:00:00Z,m1,a2,c3,50,5
2024-03-01T00:00:00Z,m2,a3,c4,0,0
2024-03-01T01:00:00Z,m1,a1,c1,200,4
2024-03-01T01:00:00Z,m1,a1,c2,100,1
2024-03-01T01:00:00Z,m1,a2,c3,50,0
2024-03-01T01:00:00Z,m2,a3,c4,10,1
"""


def load(write_workspace, csv: str, sections: dict | None = None) -> History:
    return load_history(load_workspace(write_workspace(sections, files={"history.csv": csv})))


def test_roll_up_by_hand(write_workspace) -> None:
    h = load(write_workspace, ROLLUP)
    assert list(h.hours) == list(pd.date_range("2024-03-01", periods=2, freq="h", tz="UTC"))
    m = h.levels["market"]
    assert m.keys["market"].tolist() == ["m1", "m2"]
    # m1: impressions 100+300+50 = 450 and 200+100+50 = 350; clicks 10+6+5 = 21, 4+1+0 = 5
    np.testing.assert_array_equal(m.values["impressions"], [[450, 350], [0, 10]])
    np.testing.assert_array_equal(m.values["clicks"], [[21, 5], [0, 1]])
    # ctr = clicks / impressions of the sums: 21/450, 5/350; m2: 0/0 undefined, 1/10
    np.testing.assert_allclose(m.values["ctr"], [[21 / 450, 5 / 350], [np.nan, 0.1]])
    a = h.levels["advertiser"]
    assert a.keys.values.tolist() == [["m1", "a1"], ["m1", "a2"], ["m2", "a3"]]
    # a1 = c1 + c2: 400, 300 impressions; 16, 5 clicks
    np.testing.assert_array_equal(a.values["impressions"], [[400, 300], [50, 50], [0, 10]])
    np.testing.assert_allclose(a.values["ctr"], [[0.04, 5 / 300], [0.1, 0.0], [np.nan, 0.1]])
    c = h.levels["campaign"]
    assert c.n_series == 4 and c.series_label(3) == "m2 / a3 / c4"
    for ls in h.levels.values():
        assert set(ls.values) == {"impressions", "clicks", "ctr"}
        for v in ls.values.values():
            assert v.dtype == np.float64 and v.shape == (ls.n_series, 2)


def test_ratio_of_sums_is_not_sum_of_ratios(write_workspace) -> None:
    h = load(write_workspace, ROLLUP)
    c = h.levels["campaign"]
    market_ctr = h.levels["market"].values["ctr"][0, 0]
    sum_of_ratios = np.nansum(c.values["ctr"][:3, 0])  # 0.1 + 0.02 + 0.1 = 0.22
    assert sum_of_ratios == pytest.approx(0.22)
    assert market_ctr == pytest.approx(21 / 450)
    assert market_ctr != pytest.approx(sum_of_ratios)


def test_roll_up_agrees_with_pandas_groupby(write_workspace) -> None:
    rng = np.random.default_rng(3)
    hours = pd.date_range("2024-01-01", periods=30, freq="h", tz="UTC")
    keys = [(f"m{i % 3}", f"a{i % 5}", f"c{i}") for i in range(12)]
    rows = [(t, *k, rng.integers(0, 50), rng.integers(0, 5)) for t in hours for k in keys]
    frame = pd.DataFrame(rows, columns=HEADER.split(","))
    frame["hour"] = frame["hour"].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    h = load(write_workspace, frame.sample(frac=1, random_state=0).to_csv(index=False))
    # reference: pandas groupby-sum over the level's keys, pivoted to (series x hour)
    for level, cols in (("market", ["market"]), ("advertiser", ["market", "advertiser"])):
        ref = frame.groupby([*cols, "hour"])[["impressions", "clicks"]].sum()
        imp = ref["impressions"].unstack("hour").sort_index()
        clk = ref["clicks"].unstack("hour").sort_index()
        got = h.levels[level]
        np.testing.assert_array_equal(got.values["impressions"], imp.to_numpy())
        with np.errstate(all="ignore"):
            ctr = clk.to_numpy() / imp.to_numpy()
        np.testing.assert_allclose(got.values["ctr"], np.where(imp.to_numpy() == 0, np.nan, ctr))


GAPS = f"""{HEADER}
2024-03-01T00:00:00Z,m1,a1,c1,100,10
2024-03-01T03:00:00Z,m1,a1,c1,400,40
2024-03-01T02:00:00Z,m1,a1,c2,7,2
2024-03-01T04:00:00Z,m1,a1,c2,9,,
"""


def test_gap_filling_zero_and_carry_forward(write_workspace) -> None:
    h = load(write_workspace, GAPS.replace(",,\n", ",\n"))
    c = h.levels["campaign"]
    # impressions fill rule "zero": c1 hours 1, 2, 4 missing; c2 hours 0, 1, 3 missing
    np.testing.assert_array_equal(c.values["impressions"], [[100, 0, 0, 400, 0], [0, 0, 7, 0, 9]])
    # clicks "interpolate" (= carry forward): c1 10 held over hours 1-2, 40 held at hour 4;
    # c2 starts at hour 2 (hours 0-1: 0, not started), hour 3 missing and hour 4 blank: 2
    np.testing.assert_array_equal(c.values["clicks"], [[10, 10, 10, 40, 40], [0, 0, 2, 2, 2]])
    # the roll-up adds what each campaign had at that hour: 10+0, 10+0, 10+2, 40+2, 40+2
    np.testing.assert_array_equal(h.levels["market"].values["clicks"], [[10, 10, 12, 42, 42]])
    f = h.filled.set_index(["market", "advertiser", "campaign"])
    assert f.loc[("m1", "a1", "c1")].tolist() == [3, 3]
    assert f.loc[("m1", "a1", "c2")].tolist() == [3, 4]  # blank clicks cell counts as filled


def test_carry_forward_is_the_new_name_of_interpolate(write_workspace) -> None:
    csv = GAPS.replace(",,\n", ",\n")
    old = load(write_workspace, csv)
    new = load(write_workspace, csv, {"measures": 'impressions = "zero"\nclicks = "carry_forward"'})
    for level, ls in old.levels.items():
        for m, v in ls.values.items():
            np.testing.assert_array_equal(new.levels[level].values[m], v)


def test_carry_forward_matches_pandas() -> None:
    rng = np.random.default_rng(5)
    grid = rng.random((6, 40)) * 100
    grid[rng.random(grid.shape) < 0.4] = np.nan
    grid[0, :] = np.nan  # nothing known: becomes 0
    grid[1, :] = np.nan
    grid[1, 17] = 3.0  # one value: 0 before it, 3 from it on
    # reference: pandas forward fill; hours before the first value 0
    ref = pd.DataFrame(grid.T).ffill().fillna(0.0).T.to_numpy()
    got = grid.copy()
    fill_carry_forward(got)
    np.testing.assert_array_equal(got, ref)
    assert (got[1, :17] == 0).all() and (got[1, 17:] == 3).all()


def test_filling_never_reads_a_later_hour() -> None:
    rng = np.random.default_rng(8)
    grid = rng.random((5, 30)) * 100
    grid[rng.random(grid.shape) < 0.5] = np.nan
    full = grid.copy()
    fill_carry_forward(full)
    for t in range(grid.shape[1]):
        cut = grid[:, : t + 1].copy()
        fill_carry_forward(cut)
        np.testing.assert_array_equal(cut, full[:, : t + 1], err_msg=f"cut at hour {t}")


def test_hours_are_utc_naive_and_offsets_converted(write_workspace) -> None:
    csv = f"""{HEADER}
2024-03-01 00:00:00,m1,a1,c1,1,1
2024-03-01T02:00:00+01:00,m1,a1,c2,2,1
2024-03-01T03:00:00-01:00,m1,a1,c3,3,1
"""
    h = load(write_workspace, csv)
    # 02:00+01:00 = 01:00Z; 03:00-01:00 = 04:00Z
    assert h.hours[0] == pd.Timestamp("2024-03-01T00:00Z") and h.n_hours == 5
    np.testing.assert_array_equal(
        h.levels["campaign"].values["impressions"],
        [[1, 0, 0, 0, 0], [0, 2, 0, 0, 0], [0, 0, 0, 0, 3]],
    )


def test_keys_are_strings_and_row_order_does_not_matter(write_workspace, tmp_path) -> None:
    csv = f"{HEADER}\n2024-03-01T00:00Z,01,2,3,1,1\n2024-03-01T00:00Z,01,10,3,1,1\n"
    h = load(write_workspace, csv)
    assert h.levels["advertiser"].keys.values.tolist() == [["01", "10"], ["01", "2"]]
    lines = ROLLUP.splitlines()
    shuffled = "\n".join([lines[0], *reversed(lines[1:])]) + "\n"
    a, b = load(write_workspace, ROLLUP), load(write_workspace, shuffled)
    assert_same_history(a, b, same_hash=False)


def test_source_hash_is_sha256_of_file_bytes(write_workspace, tmp_path) -> None:
    h = load(write_workspace, ROLLUP)
    assert h.source_hash == hashlib.sha256((tmp_path / "history.csv").read_bytes()).hexdigest()
    assert h.n_rows == 8


def assert_same_history(a: History, b: History, same_hash: bool = True) -> None:
    assert a.hours.equals(b.hours) and a.key_columns == b.key_columns
    assert list(a.levels) == list(b.levels)
    for name in a.levels:
        x, y = a.levels[name], b.levels[name]
        pd.testing.assert_frame_equal(x.keys, y.keys)
        assert set(x.values) == set(y.values)
        for metric in x.values:
            np.testing.assert_array_equal(x.values[metric], y.values[metric])
    pd.testing.assert_frame_equal(a.filled, b.filled)
    assert (a.source_hash == b.source_hash) == same_hash


def test_parquet_route_equals_csv_route(write_workspace, tmp_path) -> None:
    csv_history = load(write_workspace, GAPS.replace(",,\n", ",\n"))
    frame = pd.read_csv(tmp_path / "history.csv", dtype=str)
    frame["hour"] = pd.to_datetime(frame["hour"], utc=True)  # a real timestamp column
    frame["impressions"] = frame["impressions"].astype(float)
    frame["clicks"] = pd.to_numeric(frame["clicks"])
    frame.to_parquet(tmp_path / "history.parquet")
    sections = {"history": (
        'path = "history.parquet"\nkey_columns = ["market", "advertiser", "campaign"]'
    )}
    pq_history = load_history(load_workspace(write_workspace(sections)))
    assert_same_history(csv_history, pq_history, same_hash=False)


def test_sql_route_equals_csv_route(write_workspace, tmp_path) -> None:
    csv_history = load(write_workspace, ROLLUP)
    frame = pd.read_csv(tmp_path / "history.csv", dtype={"campaign": str})
    with sqlite3.connect(tmp_path / "kpi.db") as conn:
        frame.assign(extra=1).to_sql("kpi", conn, index=False)
    conn.close()
    sections = {"history": (
        'url = "sqlite:///kpi.db"\nquery = "select * from kpi"\nchunk_rows = 3\n'
        'key_columns = ["market", "advertiser", "campaign"]'
    )}
    sql_history = load_history(load_workspace(write_workspace(sections)))
    assert_same_history(csv_history, sql_history, same_hash=False)
    assert len(sql_history.source_hash) == 64


BAD_ROWS = [
    # (data lines after the header, location fragment, message fragment)
    (["2024-03-01T00:00Z,m1,a1,c1,1,1", "yesterday,m1,a1,c2,1,1"],
     "history.csv row 3 column 'hour'", "cannot read hour 'yesterday'"),
    (["2024-03-01T00:00Z,m1,a1,c1,1,1", ",m1,a1,c2,1,1"],
     "history.csv row 3 column 'hour'", "hour is blank"),
    (["2024-03-01T00:00Z,m1,a1,c1,1,1", "2024-03-01T00:00Z,m1,a1,c2,1,1",
      "2024-03-01T00:30:00Z,m1,a1,c3,1,1"],
     "history.csv row 4 column 'hour'", "is not on the hour"),
    (["2024-03-01T00:00Z,m1,a1,c1,1,1", "2024-03-01T01:00Z,m1,a1,c1,1,1",
      "2024-03-01T01:00+00:00,m1,a1,c1,2,2"],
     "history.csv row 4", "duplicate row for series 'm1 / a1 / c1' at hour "
     "2024-03-01T01:00:00Z (first at row 3)"),
    (["2024-03-01T00:00Z,m1,a1,c1,1,1", "2024-03-01T01:00Z,m1,a1,c1,1,many"],
     "history.csv row 3 column 'clicks'", "value 'many' is not a number"),
    (["2024-03-01T00:00Z,m1,a1,c1,1,1", "2024-03-01T01:00Z,m1,a1,c1,-4,1"],
     "history.csv row 3 column 'impressions'", "negative counts"),
    (["2024-03-01T00:00Z,m1,a1,c1,1,inf"],
     "history.csv row 2 column 'clicks'", "infinite"),
    (["2024-03-01T00:00Z,m1,,c1,1,1"],
     "history.csv row 2 column 'advertiser'", "key is blank"),
    ([], "history.csv", "file has a header but no data rows"),
]


@pytest.mark.parametrize(("lines", "where", "fragment"), BAD_ROWS)
def test_row_errors_name_file_row_and_column(write_workspace, lines, where, fragment) -> None:
    csv = "\n".join([HEADER, *lines]) + "\n"
    with pytest.raises(InputError) as info:
        load(write_workspace, csv)
    message = str(info.value)
    assert message.startswith(where + ":"), message
    assert fragment in message, message


def test_missing_column_and_empty_file(write_workspace) -> None:
    with pytest.raises(InputError, match=r"^history\.csv column 'clicks': column is missing"):
        load(write_workspace, "hour,market,advertiser,campaign,impressions\n2024-03-01,m,a,c,1\n")
    with pytest.raises(InputError, match=r"^history\.csv: file is empty"):
        load(write_workspace, "")
    ws = load_workspace(write_workspace())
    ws.history.path.unlink()
    with pytest.raises(InputError, match=r"^history\.csv: file not found"):
        load_history(ws)


def test_chunked_reading_keeps_row_numbers(write_workspace) -> None:
    lines = [f"2024-03-01T{h:02d}:00Z,m1,a1,c1,1,1" for h in range(7)] + ["bad,m1,a1,c1,1,1"]
    sections = {"history": (
        'path = "history.csv"\nchunk_rows = 3\nkey_columns = ["market", "advertiser", "campaign"]'
    )}
    with pytest.raises(InputError, match=r"^history\.csv row 9 column 'hour'"):
        load(write_workspace, "\n".join([HEADER, *lines]) + "\n", sections)


# ---------------------------------------------------------------- owners and check

OWNERS = """market,advertiser,team
m1,,ops
m1,a2,growth
m2,a3,growth
"""
TEAMS = {"teams": 'owners = "owners.csv"\nanalysts = { ops = 2, growth = 1 }'}


def owners_case(write_workspace, owners: str, csv: str = ROLLUP):
    path = write_workspace(TEAMS, files={"history.csv": csv, "owners.csv": owners})
    ws = load_workspace(path)
    history = load_history(ws)
    return ws, history


def test_owners_most_specific_row_wins(write_workspace) -> None:
    ws, history = owners_case(write_workspace, OWNERS)
    owners = load_owners(ws, history)
    assert owners.team_for(("m1", "a1", "c1")) == "ops"  # only "m1,," matches
    assert owners.team_for(("m1", "a2", "c3")) == "growth"  # "m1,a2" beats "m1,,"
    assert owners.team_for(("m1",)) == "ops"
    assert owners.team_for(("m9", "a1")) == ""
    route = owners.route(history.levels["campaign"])
    assert route.tolist() == ["ops", "ops", "growth", "growth"]
    assert owners.route(history.levels["advertiser"]).tolist() == ["ops", "growth", "growth"]
    # m2 has no row of its own: the team of most of its descendants (a3 -> growth)
    assert owners.route(history.levels["market"]).tolist() == ["ops", "growth"]


def test_owners_majority_of_descendants_with_tie_by_name(write_workspace) -> None:
    owners_csv = "market,advertiser,campaign,team\nm1,a1,c1,ops\nm1,a1,c2,growth\nm1,a2,c3,growth\n"
    ws, history = owners_case(write_workspace, owners_csv)
    owners = load_owners(ws, history)
    # m1 descendants: c1 ops, c2 growth, c3 growth -> growth (2 of 3); m2: nobody -> ""
    assert owners.route(history.levels["market"]).tolist() == ["growth", ""]
    # a1: one ops, one growth -> tie, "growth" sorts first
    assert owners.route(history.levels["advertiser"]).tolist() == ["growth", "growth", ""]


@pytest.mark.parametrize(
    ("owners", "where", "fragment"),
    [
        ("market,advertiser\nm1,a1\n", "owners.csv column 'team'", "column is missing"),
        ("market,campaign,team\nm1,c1,ops\n", "owners.csv column 'market'", "leading part"),
        ("market,region,team\nm1,x,ops\n", "owners.csv column 'region'", "not a key column"),
        ("market,team\nm1,ops\nm2,\n", "owners.csv row 3 column 'team'", "team is blank"),
        ("market,team\nm1,ops\nm2,sales\n", "owners.csv row 3 column 'team'",
         "team 'sales' is not in workspace.toml [teams] analysts"),
        ("market,advertiser,team\n,a1,ops\n", "owners.csv row 2 column 'advertiser'",
         "follows a blank key"),
        ("market,team\nm1,ops\nm1,growth\n", "owners.csv row 3", "same keys as row 2"),
        ("market,team\n", "owners.csv", "header but no rows"),
        ("", "owners.csv", "file is empty"),
    ],
)
def test_owners_errors_name_file_row_column(write_workspace, owners, where, fragment) -> None:
    ws, history = owners_case(write_workspace, owners)
    with pytest.raises(InputError) as info:
        load_owners(ws, history)
    assert str(info.value).startswith(where + ":"), str(info.value)
    assert fragment in str(info.value)


def test_check_summary(write_workspace, tmp_path: Path) -> None:
    owners = "market,advertiser,team\nm1,a1,ops\n"
    ws, _ = owners_case(write_workspace, owners, GAPS.replace(",,\n", ",\n"))
    summary = check_workspace(ws)
    assert summary.series_per_level == {"market": 1, "advertiser": 1, "campaign": 2}
    assert summary.n_hours == 5 and summary.n_rows == 4
    assert summary.first_hour == pd.Timestamp("2024-03-01T00:00Z")
    assert summary.last_hour == pd.Timestamp("2024-03-01T04:00Z")
    assert summary.filled_hours == {"impressions": 6, "clicks": 7}  # see the gap-filling test
    assert summary.filled_total == 13 and summary.filled_series == 2
    assert summary.uncovered == [] and summary.owners_rows == 1
    assert any("growth" in n for n in summary.notes)  # growth has analysts but no rows
    text = "\n".join(summary.lines())
    assert "gaps filled: 13 hours in 2 series" in text
    assert "campaign 2" in text and "teams (analysts): ops 2, growth 1" in text


def test_check_reports_unowned_series_and_incidents(write_workspace, tmp_path: Path) -> None:
    incidents = (
        "incident_id,level,market,advertiser,campaign,metric,start,end,note\n"
        "I1,campaign,m1,a1,c1,clicks,2024-03-01T00:00:00Z,2024-03-01T01:00:00Z,\n"
        "I2,market,m2,,,,2024-03-01T00:00:00Z,2024-03-01T02:00:00Z,\n"
    )
    path = write_workspace(
        {**TEAMS, "incidents": 'path = "incidents.csv"'},
        files={"history.csv": ROLLUP, "owners.csv": "market,team\nm1,ops\n",
               "incidents.csv": incidents},
    )
    summary = check_workspace(load_workspace(path))
    assert summary.uncovered == ["m2 / a3 / c4"]
    assert "1 base series unowned (m2 / a3 / c4)" in "\n".join(summary.lines())
    assert summary.incidents_per_level == {"market": 1, "advertiser": 0, "campaign": 1}
