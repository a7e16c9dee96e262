"""Tests of the invented sample workspace (calibrate.sample)."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pandas as pd
import pytest

from calibrate import sample
from calibrate.settings import DetectorSettings

FILES = ("history.parquet", "incidents.csv", "owners.csv", "workspace.toml")
KEYS = ["market", "advertiser", "campaign", "device"]


@pytest.fixture(scope="module")
def workspace(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One generated sample workspace shared by the tests of this module."""
    return sample.generate_sample(tmp_path_factory.mktemp("sample"))


def _read_csv(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=str, keep_default_na=False)


def test_writes_all_files(workspace: Path) -> None:
    assert workspace.name == "workspace.toml"
    for name in FILES:
        assert (workspace.parent / name).is_file()
    assert not list(workspace.parent.glob("*.tmp"))
    total = sum((workspace.parent / name).stat().st_size for name in FILES)
    assert total < 5_000_000


def test_same_seed_same_bytes(workspace: Path, tmp_path: Path) -> None:
    again = sample.generate_sample(tmp_path / "again")
    for name in FILES:
        assert (again.parent / name).read_bytes() == (workspace.parent / name).read_bytes(), name


def test_other_seed_other_history(workspace: Path, tmp_path: Path) -> None:
    other = sample.generate_sample(tmp_path / "other", seed=8)
    a = pd.read_parquet(workspace.parent / "history.parquet")
    b = pd.read_parquet(other.parent / "history.parquet")
    assert not a["impressions"].head(5000).equals(b["impressions"].head(5000))


def test_history_contract(workspace: Path) -> None:
    h = pd.read_parquet(workspace.parent / "history.parquet")
    assert list(h.columns) == ["hour", *KEYS, "impressions", "clicks", "spend", "revenue"]
    assert str(h["hour"].dt.tz) == "UTC"
    assert (h["hour"] == h["hour"].dt.floor("h")).all()
    assert h["hour"].min() == pd.Timestamp("2026-03-02T00:00:00Z")
    assert h["hour"].min().day_of_week == 0
    assert h["hour"].max() == pd.Timestamp("2026-03-02T00:00:00Z") + pd.Timedelta(hours=2183)
    assert not h[["impressions", "clicks", "spend", "revenue"]].isna().any().any()
    assert (h[["impressions", "clicks", "spend", "revenue"]] >= 0).all().all()
    assert (h["clicks"] <= h["impressions"]).all()
    assert h["market"].nunique() == 3
    assert h.groupby("market")["advertiser"].nunique().eq(8).all()
    assert h[["market", "advertiser"]].drop_duplicates().shape[0] == 24
    assert h[["market", "advertiser", "campaign"]].drop_duplicates().shape[0] == 48
    assert set(h["device"]) == {"desktop", "mobile"}
    rows = h.groupby(KEYS).size()
    assert len(rows) == 96
    assert rows.max() <= 2184 and rows.min() >= 2184 - 4
    assert 0 < 96 * 2184 - len(h) <= 96 * 4
    assert not h.duplicated(["hour", *KEYS]).any()


def test_incidents_contract(workspace: Path) -> None:
    inc = _read_csv(workspace.parent / "incidents.csv")
    h = pd.read_parquet(workspace.parent / "history.parquet", columns=KEYS)
    assert list(inc.columns) == [
        "incident_id", "level", "market", "advertiser", "campaign", "metric", "start", "end",
        "note",
    ]
    assert 35 <= len(inc) <= 45
    assert inc["incident_id"].is_unique
    assert inc["start"].str.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:00:00Z").all()
    assert inc["end"].str.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:00:00Z").all()
    start = pd.to_datetime(inc["start"], utc=True)
    end = pd.to_datetime(inc["end"], utc=True)
    first = pd.Timestamp("2026-03-02T00:00:00Z")
    assert (end > start).all()
    assert (start >= first + pd.Timedelta(weeks=4)).all()
    assert (end <= first + pd.Timedelta(hours=2184)).all()
    holdout = first + pd.Timedelta(hours=int(2184 * 0.75))
    assert (start >= holdout).sum() >= 5
    assert set(inc["metric"]) <= {"", "impressions", "clicks", "ctr", "spend", "revenue", "margin"}
    assert set(inc["level"]) == {"market", "advertiser", "campaign"}
    for _, row in inc.iterrows():
        cols = sample.LEVELS[row["level"]]
        assert all(row[c] for c in cols), row["incident_id"]
        assert not any(row[c] for c in KEYS[:3] if c not in cols), row["incident_id"]
        match = (h[list(cols)] == row[list(cols)].to_numpy()).all(axis=1)
        assert match.any(), row["incident_id"]


def test_incident_kinds_and_levels() -> None:
    _, incidents = sample.build_scenario(7)
    kinds = {i.kind for i in incidents}
    assert kinds >= {"spike", "drop", "outage", "clicks_flat", "drift", "ctr_collapse"}
    assert sum(i.level == "market" for i in incidents) >= 3
    assert sum(i.level == "advertiser" for i in incidents) >= 5


def test_owners_cover_all_advertisers(workspace: Path) -> None:
    owners = _read_csv(workspace.parent / "owners.csv")
    h = pd.read_parquet(workspace.parent / "history.parquet", columns=["market", "advertiser"])
    assert list(owners.columns) == ["market", "advertiser", "campaign", "team"]
    assert (owners["campaign"] == "").all()
    assert set(owners["team"]) == {"team-river", "team-harbor", "team-summit"}
    teams = set()
    for market, advertiser in h.drop_duplicates().itertuples(index=False):
        exact = owners[(owners["market"] == market) & (owners["advertiser"] == advertiser)]
        default = owners[(owners["market"] == market) & (owners["advertiser"] == "")]
        found = exact if len(exact) else default
        assert len(found) == 1, (market, advertiser)
        teams.add(found["team"].iloc[0])
    assert teams == {"team-river", "team-harbor", "team-summit"}


def test_workspace_toml(workspace: Path) -> None:
    ws = tomllib.loads(workspace.read_text())
    assert ws["history"]["key_columns"] == KEYS
    assert ws["history"]["time_column"] == "hour"
    for key in ("history", "incidents"):
        assert (workspace.parent / ws[key]["path"]).is_file()
    assert (workspace.parent / ws["teams"]["owners"]).is_file()
    assert set(ws["measures"]) == {"impressions", "clicks", "spend", "revenue"}
    assert ws["metrics"] == {
        "ctr": "clicks / impressions", "cpc": "spend / clicks", "margin": "revenue - spend",
    }
    assert ws["levels"] == {k: list(v) for k, v in sample.LEVELS.items()}
    assert ws["watch"]["metrics"] == ["impressions", "clicks", "ctr", "spend", "revenue", "margin"]
    assert ws["teams"]["analysts"] == {"team-river": 2, "team-harbor": 3, "team-summit": 2}
    settings = DetectorSettings.from_mapping(ws["detector"], "workspace.toml [detector]")
    assert settings.fence_multiplier == 1.5
    assert ws["search"]["holdout_fraction"] == 0.25


def test_loads_as_workspace(workspace: Path) -> None:
    from calibrate.inputs.workspace import load_workspace

    ws = load_workspace(workspace)
    assert ws.history.key_columns == tuple(KEYS)
    assert set(ws.levels) == set(sample.LEVELS)
