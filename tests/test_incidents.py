"""Incidents loading: resolved fields and one precise error per rule.

The History and Workspace are built directly from their dataclasses (no loaders).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibrate.errors import InputError
from calibrate.inputs.history import History, LevelSeries
from calibrate.inputs.incidents import Incidents, incidents_from_frame, load_incidents
from calibrate.inputs.workspace import HistorySource, IncidentSource, Workspace

KEYS = ("market", "advertiser", "campaign")
START = pd.Timestamp("2024-01-01T00:00:00Z")  # a Monday
N_HOURS = 14 * 24


def make_history() -> History:
    """Two markets, three advertisers, three campaigns over 14 days."""
    rows = {
        "market": [["north"], ["south"]],
        "advertiser": [["north", "adv1"], ["north", "adv2"], ["south", "adv3"]],
        "campaign": [["north", "adv1", "c1"], ["north", "adv1", "c2"], ["south", "adv3", "c3"]],
    }
    levels = {}
    for depth, (name, keys) in enumerate(rows.items(), start=1):
        cols = KEYS[:depth]
        frame = pd.DataFrame(keys, columns=list(cols))
        values = {m: np.zeros((len(keys), N_HOURS)) for m in ("impressions", "clicks", "ctr")}
        levels[name] = LevelSeries(level=name, key_columns=cols, keys=frame, values=values)
    hours = pd.date_range(START, periods=N_HOURS, freq="h")
    return History(hours=hours, levels=levels, key_columns=KEYS)


def make_workspace(tmp_path: Path, incidents: Path | None = None) -> Workspace:
    return Workspace(
        file=tmp_path / "workspace.toml",
        history=HistorySource(key_columns=KEYS),
        measures={"impressions": "zero", "clicks": "zero"},
        metrics={"ctr": "clicks / impressions"},
        levels={"market": KEYS[:1], "advertiser": KEYS[:2], "campaign": KEYS},
        incidents=IncidentSource(path=incidents),
    )


HEADER = "incident_id,level,market,advertiser,campaign,metric,start,end,note"
GOOD = [
    "I1,campaign,north,adv1,c2,clicks,2024-01-02T05:00:00Z,2024-01-02T09:00:00Z,tag lost",
    "I2,market,south,,,,2024-01-03T00:00:00+01:00,2024-01-03T02:00:00Z,",
    "I3,advertiser,north,adv2,,ctr,2024-01-14T23:00:00Z,2024-01-15T00:00:00Z,last hour",
    # same series as I1, other metric, overlapping in time: allowed
    "I4,campaign,north,adv1,c2,ctr,2024-01-02T06:00:00Z,2024-01-02T07:00:00Z,",
    # same series and metric as I1, touching (end is exclusive): allowed
    "I5,campaign,north,adv1,c2,clicks,2024-01-02T09:00:00Z,2024-01-02T10:00:00Z,",
]


def write(tmp_path: Path, lines: list[str], header: str = HEADER) -> Path:
    path = tmp_path / "incidents.csv"
    path.write_text("\n".join([header, *lines]) + "\n")
    return path


def load(tmp_path: Path, lines: list[str], header: str = HEADER) -> Incidents:
    path = write(tmp_path, lines, header)
    return load_incidents(make_workspace(tmp_path, path), make_history())


def test_load_resolves_fields(tmp_path: Path) -> None:
    inc = load(tmp_path, GOOD)
    assert inc.incident_id.tolist() == ["I1", "I2", "I3", "I4", "I5"]
    assert inc.level.tolist() == ["campaign", "market", "advertiser", "campaign", "campaign"]
    # series = row of History.levels[level].keys, written out by hand from make_history
    assert inc.series.tolist() == [1, 1, 1, 1, 1]
    assert inc.metric.tolist() == ["clicks", "", "ctr", "ctr", "clicks"]
    # hours since 2024-01-01T00Z by hand: Jan 2 05:00 = 29; 09:00 = 33;
    # 2024-01-03T00:00+01:00 = Jan 2 23:00Z = 47; Jan 3 02:00Z = 50; Jan 14 23:00 = 335
    assert inc.start.tolist() == [29, 47, 335, 30, 33]
    # an end one hour past the last grid hour (Jan 15 00:00 = 336) is allowed
    assert inc.end.tolist() == [33, 50, 336, 31, 34]
    assert inc.note.tolist() == ["tag lost", "", "last hour", "", ""]
    assert inc.label.tolist()[:2] == ["north / adv1 / c2", "south"]
    frame = inc.to_frame()
    assert frame.loc[0, "start"] == pd.Timestamp("2024-01-02T05:00:00Z")


def test_frame_in_memory_matches_file(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD)
    df = pd.read_csv(path, dtype=str, keep_default_na=False)
    inc = incidents_from_frame(df, make_workspace(tmp_path), make_history(), "verdicts")
    assert inc.start.tolist() == [29, 47, 335, 30, 33]
    with pytest.raises(InputError, match=r"^verdicts row 3 column 'level': unknown level"):
        bad = df.copy()
        bad.loc[1, "level"] = "region"
        incidents_from_frame(bad, make_workspace(tmp_path), make_history(), "verdicts")


def test_note_column_is_optional(tmp_path: Path) -> None:
    header = "incident_id,level,market,metric,start,end"
    inc = load(tmp_path, ["A,market,north,,2024-01-01T00:00:00Z,2024-01-01T03:00:00Z"], header)
    assert inc.note.tolist() == [""] and inc.end.tolist() == [3]


I1 = GOOD[0]
CASES = [
    # (rows, header, expected message start after the file path)
    ([I1], "incident_id,level,market,advertiser,campaign,start,end",
     r"row 1: missing column\(s\) 'metric'"),
    ([I1, I1.replace("campaign,", "region,", 1).replace("I1", "I2")], HEADER,
     r"row 3 column 'level': unknown level 'region'"),
    ([I1.replace("adv1,c2", "adv1,c9")], HEADER,
     r"row 2 column 'campaign': no series 'north / adv1 / c9' at level 'campaign'"),
    ([I1.replace("north,adv1", "north,adv3")], HEADER,
     r"row 2 column 'advertiser': no series 'north / adv3'"),
    ([I1.replace("adv1,c2", "adv1,")], HEADER,
     r"row 2 column 'campaign': empty; level 'campaign' needs a value"),
    (["I2,market,south,adv3,,,2024-01-03T00:00:00Z,2024-01-03T02:00:00Z,"], HEADER,
     r"row 2 column 'advertiser': must be blank for level 'market'"),
    ([I1.replace(",clicks,", ",revenue,")], HEADER,
     r"row 2 column 'metric': unknown metric 'revenue' \(known: impressions, clicks, ctr\)"),
    ([I1.replace("2024-01-02T05:00:00Z", "yesterday")], HEADER,
     r"row 2 column 'start': cannot read 'yesterday' as an ISO-8601 UTC time"),
    ([I1.replace("2024-01-02T09:00:00Z", "")], HEADER, r"row 2 column 'end': empty"),
    ([I1.replace("2024-01-02T09:00:00Z", "2024-01-02T05:00:00Z")], HEADER,
     r"row 2 column 'end': end 2024-01-02T05:00:00Z must be after start"),
    ([I1.replace("2024-01-02T09:00:00Z", "2024-01-02T09:30:00Z")], HEADER,
     r"row 2 column 'end': '2024-01-02T09:30:00Z' is not on the hour"),
    ([I1, I1.replace("I1", "I2").replace("T05:00", "T08:00").replace("T09:00", "T12:00")],
     HEADER, r"row 3 column 'start': overlaps row 2 \(same level, series and metric\)"),
    ([I1.replace("2024-01-02T05:00:00Z", "2023-12-31T23:00:00Z")], HEADER,
     r"row 2 column 'start': '2023-12-31T23:00:00Z' is outside the history "
     r"\(2024-01-01T00:00:00Z \.\. 2024-01-14T23:00:00Z\)"),
    ([I1.replace("2024-01-02T09:00:00Z", "2024-01-15T01:00:00Z")], HEADER,
     r"row 2 column 'end': '2024-01-15T01:00:00Z' is outside the history"),
    ([I1, GOOD[1].replace("I2", "I1")], HEADER,
     r"row 3 column 'incident_id': duplicate incident id 'I1' \(first used in row 2\)"),
    ([I1.replace("I1,", ",", 1)], HEADER, r"row 2 column 'incident_id': empty"),
]


@pytest.mark.parametrize(("rows", "header", "message"), CASES)
def test_errors_name_file_row_column(
    tmp_path: Path, rows: list[str], header: str, message: str
) -> None:
    path = write(tmp_path, rows, header)
    with pytest.raises(InputError) as info:
        load_incidents(make_workspace(tmp_path, path), make_history())
    text = str(info.value)
    assert "\n" not in text
    assert text.startswith(str(path) + " ")
    assert re.search(message, text), text


def test_overlap_with_a_row_further_back(tmp_path: Path) -> None:
    # the long first row still covers the third: the check must not only look one row back
    rows = [
        "A,market,north,,,clicks,2024-01-01T00:00:00Z,2024-01-02T00:00:00Z,",
        "B,market,north,,,clicks,2024-01-01T02:00:00Z,2024-01-01T03:00:00Z,",
    ]
    with pytest.raises(InputError, match=r"row 3 column 'start': overlaps row 2"):
        load(tmp_path, rows)
    rows = [
        "A,market,north,,,clicks,2024-01-01T00:00:00Z,2024-01-02T00:00:00Z,",
        "B,market,north,,,clicks,2024-01-01T01:00:00Z,2024-01-01T03:00:00Z,",
        "C,market,north,,,clicks,2024-01-01T05:00:00Z,2024-01-01T06:00:00Z,",
    ]
    with pytest.raises(InputError, match=r"row 3 column 'start': overlaps row 2"):
        load(tmp_path, rows)


def test_missing_file_and_no_path(tmp_path: Path) -> None:
    ws = make_workspace(tmp_path, tmp_path / "nope.csv")
    with pytest.raises(InputError, match=r"nope\.csv: file not found"):
        load_incidents(ws, make_history())
    with pytest.raises(InputError, match=r"\[incidents\]: no 'path'"):
        load_incidents(make_workspace(tmp_path, None), make_history())
