"""Nothing silent, nothing dangerous (issue 15): inputs that would quietly switch
alerting off, create phantom series, echo another file or write to the history
database are refused with one line (exit 1, no traceback), or reported by `check`."""

from __future__ import annotations

import gzip
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibrate.cli import main
from calibrate.errors import InputError
from calibrate.inputs.history import MAX_VALUE, load_history
from calibrate.inputs.sources import _sqlite_read_only
from calibrate.inputs.workspace import load_workspace
from tests.synthetic import make_workspace

HEADER = "hour,market,advertiser,campaign,impressions,clicks"
GOOD = [
    "2024-03-01T00:00:00Z,m1,a1,c1,100,10",
    "2024-03-01T00:00:00Z,m1,a1,c2,300,6",
    "2024-03-01T01:00:00Z,m1,a1,c1,200,4",
    "2024-03-01T01:00:00Z,m1,a1,c2,100,1",
]


def one_line_error(capsys, argv: list[str]) -> str:
    """Run the CLI, expect exit 1 and one stderr line without a traceback; return it."""
    assert main(argv) == 1
    err = capsys.readouterr().err.strip()
    assert err and "\n" not in err and "Traceback" not in err, err
    return err


def edit(path: Path, old: str, new: str) -> None:
    text = path.read_text(encoding="utf-8")
    assert old in text
    path.write_text(text.replace(old, new), encoding="utf-8")


@pytest.fixture
def ws(tmp_path: Path) -> Path:
    return make_workspace(tmp_path / "ws")


# ---------------------------------------------------------------- 1. settings


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ("fence_multiplier = 1.0", "fence_multiplier = inf", "fence_multiplier"),
        ("fence_multiplier = 1.0", "fence_multiplier = nan", "fence_multiplier"),
        ("flatline_hours = 0", "flatline_hours = 0\nmin_impact = nan", "min_impact"),
        ("flatline_hours = 0", "flatline_hours = 0\nmin_impact = inf", "min_impact"),
    ],
)
def test_detector_setting_that_switches_alerting_off_is_refused(ws, capsys, old, new, key):
    edit(ws, old, new)
    err = one_line_error(capsys, ["check", str(ws)])
    assert f"[detector] key '{key}'" in err and "finite" in err


@pytest.mark.parametrize(
    ("search", "key"),
    [
        ("min_impact = { low = 0.0, high = inf }", "min_impact"),
        ("min_impact = { low = nan, high = 5.0 }", "min_impact"),
        ("min_impact = [0.0, inf]", "min_impact"),
        ("fence_multiplier = { low = 0.5, high = inf }", "fence_multiplier"),
    ],
)
def test_search_range_that_is_not_finite_is_refused_by_check(tmp_path, capsys, search, key):
    ws = make_workspace(tmp_path / "ws", search=search)
    err = one_line_error(capsys, ["check", str(ws)])
    assert f"[search] key '{key}'" in err and "finite" in err


def test_window_longer_than_the_history_is_said_by_check_and_stops_replays(ws, tmp_path, capsys):
    # the synthetic history has 5 weeks = 840 hours
    edit(ws, "decomposition_window_hours = 168", "decomposition_window_hours = 1000")
    assert main(["check", str(ws)]) == 0
    out = capsys.readouterr().out
    assert ("warning: workspace.toml [detector] key 'decomposition_window_hours': 1000 hours "
            "is longer than the history (840 hours)") in out
    alerts = tmp_path / "alerts.csv"
    for argv in (["replay", str(ws), "--out", str(alerts), "--engine", "serial"],
                 ["volume", str(ws), "--engine", "serial"]):
        err = one_line_error(capsys, argv)
        assert "decomposition_window_hours': 1000 hours is longer than the history" in err
    assert not alerts.exists()
    alerts.write_text("alert_id,level,market,advertiser,campaign,metric,start,end\n")
    for argv in (["score", str(ws), "--alerts", str(alerts)],
                 ["volume", str(ws), "--alerts", str(alerts)]):  # counting a file too
        err = one_line_error(capsys, argv)
        assert "decomposition_window_hours" in err


def test_a_period_inside_the_warm_up_stops_score_and_volume(ws, tmp_path, capsys):
    # the first scored hour is 167 (168-hour window): 2026-01-11T23:00Z
    alerts = tmp_path / "alerts.csv"
    alerts.write_text("alert_id,level,market,advertiser,campaign,metric,start,end\n")
    for cmd in (["score", "--alerts", str(alerts)], ["volume", "--alerts", str(alerts)],
                ["volume", "--engine", "serial"]):
        err = one_line_error(capsys, [cmd[0], str(ws), *cmd[1:], "--to", "2026-01-10"])
        assert err.endswith("--from/--to: the period ends before the first scored hour "
                            "2026-01-11T23:00Z (the decomposition window's warm-up): nothing "
                            "can be scored; give a later --to"), err


def test_group_window_longer_than_the_history_names_the_group(ws, tmp_path, capsys):
    edit(ws, "flatline_hours = 0", "flatline_hours = 0\n\n[detector.group.slow]\n"
         'metrics = ["clicks"]\ndecomposition_window_hours = 900')
    err = one_line_error(capsys, ["replay", str(ws), "--out", str(tmp_path / "a.csv"),
                                  "--engine", "serial"])
    assert "[detector.group.slow] key 'decomposition_window_hours': 900 hours" in err


@pytest.mark.parametrize(
    ("formula", "fragment"),
    [
        ("clicks / 0", "is undefined (0/0 or x/0) at every hour of every series"),
        ("clicks * 1e300 * 1e300", "gives an infinite value"),
        ("clicks * 1e400", "constant '1e400' is not a finite number"),
    ],
)
def test_watched_metric_that_can_never_alert_is_refused(ws, capsys, formula, fragment):
    edit(ws, 'ctr = "clicks / impressions"', f'ctr = "clicks / impressions"\nbad = "{formula}"')
    edit(ws, 'metrics = ["impressions", "clicks"]', 'metrics = ["impressions", "bad"]')
    err = one_line_error(capsys, ["check", str(ws)])
    assert "[metrics] key 'bad'" in err and fragment in err


# ---------------------------------------------------------------- 2. rows


def csv_workspace(write_workspace, lines: list[str], raw: bytes | None = None,
                  name: str = "history.csv") -> Path:
    path = write_workspace({"history": (
        f'path = "{name}"\nkey_columns = ["market", "advertiser", "campaign"]')})
    data = raw if raw is not None else ("\n".join([HEADER, *lines]) + "\n").encode()
    if name.endswith(".gz"):
        data = gzip.compress(data)
    (path.parent / name).write_bytes(data)
    return path


@pytest.mark.parametrize(
    ("bad", "fragment"),
    [
        ("2024-03-01T02:00:00Z,m1,c1,5,1", "has 5 fields, but the header has 6"),  # no advertiser
        ("2024-03-01T02:00:00Z,m1,a1,c1,5", "has 5 fields, but the header has 6"),  # no clicks
        ("2024-03-01T02:00:00Z,m1,a1,c1,5,1,7", "has 7 fields, but the header has 6"),
        ("2024-03-01T02:00:00Z,m1,a\x001,c1,5,1", "row contains a NUL byte"),
    ],
)
@pytest.mark.parametrize("name", ["history.csv", "history.csv.gz"])
def test_csv_row_with_wrong_field_count_or_nul_is_refused(write_workspace, capsys, bad,
                                                         fragment, name):
    path = csv_workspace(write_workspace, [*GOOD, bad, GOOD[0].replace("00:00", "03:00")],
                         name=name)
    err = one_line_error(capsys, ["check", str(path)])
    assert f"{name} row 6: {fragment}" in err


def test_quoted_csv_is_counted_by_records(write_workspace) -> None:
    # a quoted key may hold a comma and a newline; the short row after it is row 4
    lines = ['2024-03-01T00:00:00Z,m1,"a,1","c\n1",100,10', GOOD[1],
             "2024-03-01T01:00:00Z,m1,a1,c2,100"]
    path = csv_workspace(write_workspace, lines)
    with pytest.raises(InputError, match=r"^history\.csv row 4: has 5 fields, but the header"):
        load_history(load_workspace(path))
    ok = csv_workspace(write_workspace, lines[:2])
    h = load_history(load_workspace(ok))
    assert h.levels["campaign"].keys["advertiser"].tolist() == ["a,1", "a1"]


@pytest.mark.parametrize("value", ["1e300", "1.7e308", f"{MAX_VALUE * 2:.0f}"])
def test_absurd_values_are_refused_with_their_row(write_workspace, capsys, value):
    # two 1.7e308 rows would sum to inf at the advertiser level
    lines = [*GOOD[:3], f"2024-03-01T01:00:00Z,m1,a1,c2,{value},1"]
    err = one_line_error(capsys, ["check", str(csv_workspace(write_workspace, lines))])
    assert "history.csv row 5 column 'impressions'" in err and "not a plausible" in err
    # the bound itself is accepted, and sums with it are still exact
    lines[-1] = f"2024-03-01T01:00:00Z,m1,a1,c2,{MAX_VALUE:.0f},1"
    h = load_history(load_workspace(csv_workspace(write_workspace, lines)))
    assert h.levels["market"].values["impressions"][0, 1] == 200 + MAX_VALUE


def test_parquet_nan_cells_are_counted_like_csv_blanks(write_workspace, tmp_path, capsys):
    lines = [*GOOD, "2024-03-01T02:00:00Z,m1,a1,c1,,7", "2024-03-01T02:00:00Z,m1,a1,c2,5,"]
    csv_path = csv_workspace(write_workspace, lines)
    frame = pd.read_csv(tmp_path / "history.csv", dtype={"market": str})
    frame.loc[0, "clicks"] = np.nan  # a NaN cell of a float column, and a null below
    frame["impressions"] = pd.array(frame["impressions"], dtype="Float64")
    frame.to_parquet(tmp_path / "history.parquet")
    assert frame[["impressions", "clicks"]].isna().sum().tolist() == [1, 2]
    assert main(["check", str(csv_path)]) == 0
    assert "blank or NaN cells: 2 (impressions 1, clicks 1)" in capsys.readouterr().out
    edit(csv_path, 'path = "history.csv"', 'path = "history.parquet"')
    assert main(["check", str(csv_path)]) == 0
    assert "blank or NaN cells: 3 (impressions 1, clicks 2)" in capsys.readouterr().out


# ---------------------------------------------------------------- 3. owners and times


def test_owners_rows_matching_no_series_are_named(write_workspace, capsys):
    path = csv_workspace(write_workspace, GOOD)
    edit(path, "[history]", '[teams]\nowners = "owners.csv"\nanalysts = { ops = 1 }\n\n[history]')
    (path.parent / "owners.csv").write_text(
        "market,advertiser,team\nm1,,ops\nm9,,ops\nm1,a7,ops\nm1,a1,ops\n", encoding="utf-8")
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert ("warning: owners.csv: 2 row(s) match no series of the history, so they route "
            "nothing: row 3 (m9); row 4 (m1 / a7)") in out


def test_times_without_offset_are_reported(write_workspace, tmp_path, capsys):
    # hand count: rows 3 and 5 have no offset; "+01:00" and "Z" are offsets
    lines = ["2024-03-01T00:00:00Z,m1,a1,c1,100,10", "2024-03-01T00:00:00,m1,a1,c2,300,6",
             "2024-03-01T02:00:00+01:00,m1,a1,c1,200,4", "2024-03-01 01:00,m1,a1,c2,100,1"]
    path = csv_workspace(write_workspace, lines)
    assert main(["check", str(path)]) == 0
    assert "times without a UTC offset: 2 of 4 rows, read as UTC" in capsys.readouterr().out
    frame = pd.read_csv(tmp_path / "history.csv")
    frame["hour"] = pd.to_datetime(frame["hour"], utc=True, format="ISO8601").dt.tz_localize(None)
    frame.to_parquet(tmp_path / "history.parquet")  # naive timestamps: all 4 rows
    edit(path, 'path = "history.csv"', 'path = "history.parquet"')
    assert main(["check", str(path)]) == 0
    assert "times without a UTC offset: 4 of 4 rows, read as UTC" in capsys.readouterr().out


# ---------------------------------------------------------------- 4. SQL


def sql_workspace(write_workspace, tmp_path: Path, query: str) -> Path:
    with sqlite3.connect(tmp_path / "kpi.db") as conn:
        conn.execute("create table if not exists history (hour text, market text, "
                     "advertiser text, campaign text, impressions real, clicks real)")
        if not conn.execute("select count(*) from history").fetchone()[0]:
            conn.executemany("insert into history values (?, ?, ?, ?, ?, ?)",
                             [line.split(",") for line in GOOD])
    conn.close()
    return write_workspace({"history": (
        f'url = "sqlite:///kpi.db"\nquery = """{query}"""\n'
        'key_columns = ["market", "advertiser", "campaign"]')})


def rows_left(tmp_path: Path) -> int:
    with sqlite3.connect(tmp_path / "kpi.db") as conn:
        n = conn.execute("select count(*) from history").fetchone()[0]
    conn.close()
    return n


@pytest.mark.parametrize(
    ("query", "fragment"),
    [
        ("DROP TABLE history", "must be a SELECT"),
        ("delete from history", "must be a SELECT"),
        ("select * from history; drop table history", "one statement, but has 2"),
        ("with x as (select 1) delete from history", "must only read, but it uses DELETE"),
        ("select * from history /* ; */; insert into history select * from history",
         "one statement, but has 2"),
    ],
)
def test_sql_history_is_only_read(write_workspace, tmp_path, capsys, query, fragment):
    path = sql_workspace(write_workspace, tmp_path, query)
    err = one_line_error(capsys, ["check", str(path)])
    assert "[history] query" in err and fragment in err
    assert rows_left(tmp_path) == len(GOOD)  # the table survived, rows and all
    # a single SELECT still reads, with ';' and write words inside comments and quotes
    query = ("-- hourly rows; no writes\nselect * from history where market <> 'x;drop' "
             "/* ; delete */ order by hour;")
    assert main(["check", str(sql_workspace(write_workspace, tmp_path, query))]) == 0
    assert "history: 4 rows" in capsys.readouterr().out


def test_sqlite_history_is_opened_read_only(tmp_path) -> None:
    # the second guard: even a write the statement check missed cannot change the file
    with sqlite3.connect(tmp_path / "kpi.db") as conn:
        conn.execute("create table history (x int)")
    conn.close()
    ro = _sqlite_read_only(str(tmp_path / "kpi.db"))()
    with pytest.raises(sqlite3.OperationalError, match="readonly"):
        ro.execute("drop table history")
    ro.close()
    ro = _sqlite_read_only(f"file:{tmp_path / 'kpi.db'}?mode=rwc")()
    with pytest.raises(sqlite3.OperationalError, match="readonly"):
        ro.execute("insert into history values (1)")
    ro.close()


# ---------------------------------------------------------------- 5. echo


SECRET = "root:x:0:0:secret-token-4711:/root:/bin/bash\nsecond:line\n"


@pytest.mark.parametrize("where", ["history", "incidents"])
def test_a_path_to_another_file_is_not_echoed(ws, tmp_path, capsys, where):
    other = tmp_path / "elsewhere.txt"
    other.write_text(SECRET, encoding="utf-8")
    target = ws.parent / ("history.csv" if where == "history" else "incidents.csv")
    target.unlink()
    target.symlink_to(other)
    err = one_line_error(capsys, ["check", str(ws)])
    assert "secret-token" not in err and "root:" not in err
    # the header of a file that is the expected kind of table is still listed
    target.unlink()
    if where == "history":
        target.write_text("hour,market,advertiser,campaign,imps,clicks\n")
        fragment = "column 'impressions': column is missing (found: hour, market,"
    else:
        target.write_text("incident_id,level,market,start,end\n")
        fragment = "missing column(s) 'metric' (found: incident_id, level, market, start, end)"
    assert fragment in one_line_error(capsys, ["check", str(ws)])


# ---------------------------------------------------------------- 6. formulas


@pytest.mark.parametrize(
    ("formula", "fragment"),
    [
        ("-" * 20000 + "clicks", "characters long; at most 1000"),
        (" + ".join(["clicks"] * 50000), "characters long; at most 1000"),
        ("-" * 150 + "clicks", "150 operations deep; at most 100"),
        ("+".join(["clicks"] * 102), "101 operations deep; at most 100"),
    ],
)
def test_huge_formulas_are_refused_in_one_line(ws, capsys, formula, fragment):
    edit(ws, 'ctr = "clicks / impressions"', f'ctr = "{formula}"')
    err = one_line_error(capsys, ["check", str(ws)])
    assert "[metrics] key 'ctr'" in err and fragment in err


# ---------------------------------------------------------------- 7. incidents


@pytest.mark.parametrize("keep", ["none", "held-out only"])
def test_tune_without_incidents_in_the_tuning_weeks_stops(ws, tmp_path, capsys, keep):
    incidents = ws.parent / "incidents.csv"
    frame = pd.read_csv(incidents)
    # 840 hours, a quarter held out in whole weeks: the last week (from hour 672)
    split = pd.Timestamp("2026-01-05T00:00:00Z") + pd.Timedelta(hours=672)
    frame = frame.iloc[:0] if keep == "none" else frame[pd.to_datetime(frame["start"]) >= split]
    assert keep == "none" or len(frame) == 2
    frame.to_csv(incidents, index=False)
    out = tmp_path / "tuned.toml"
    err = one_line_error(capsys, ["tune", str(ws), "--out", str(out), "--engine", "serial",
                                  "--storage", str(tmp_path / "s.journal")])
    assert "incidents.csv: no incident starts in the tuning weeks" in err
    assert not out.exists()
