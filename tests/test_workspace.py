"""workspace.toml loading: typed result, resolved paths, one precise error per rule."""

from __future__ import annotations

from pathlib import Path

import pytest

from calibrate.errors import InputError
from calibrate.inputs.workspace import load_workspace
from calibrate.settings import DetectorSettings

FULL = {
    "incidents": 'path = "labels/incidents.csv"\nearly_hours = 2\nlate_hours = 3',
    "teams": 'owners = "owners.csv"\nanalysts = { ops = 2, growth = 1 }',
    "goal": 'max_miss_rate = 0.1\nmax_alerts_per_analyst_day = { "*" = 4, ops = 6 }',
    "detector": "fence_multiplier = 2.5\nseasonal_span = 9",
    "watch": 'metrics = ["ctr", "clicks"]',
    "search": (
        "seasonal_span = { low = 7, high = 21, step = 2 }\n"
        "min_impact = { low = 0.5, high = 50.0, log = true }\n"
        'sides = ["up", "both"]\n'
        "fence_multiplier = { low = 1, high = 12 }\n"
        'trials = 30\nholdout_fraction = 0.3\ntune_by = "level"\nseed = 11'
    ),
}


def test_full_workspace_is_typed_and_paths_resolved(write_workspace, tmp_path: Path) -> None:
    ws = load_workspace(write_workspace(FULL))
    assert ws.file == (tmp_path / "workspace.toml").resolve()
    assert ws.history.path == tmp_path.resolve() / "history.csv"
    assert ws.history.key_columns == ("market", "advertiser", "campaign")
    assert ws.history.chunk_rows == 200_000  # dataclass default kept
    assert ws.measures == {"impressions": "zero", "clicks": "interpolate"}
    assert ws.metrics == {"ctr": "clicks / impressions"}
    assert ws.levels["advertiser"] == ("market", "advertiser")
    assert ws.incidents.path == tmp_path.resolve() / "labels" / "incidents.csv"
    assert (ws.incidents.early_hours, ws.incidents.late_hours) == (2, 3)
    assert ws.teams.owners == tmp_path.resolve() / "owners.csv"
    assert ws.teams.analysts == {"ops": 2, "growth": 1}
    assert ws.goal.max_miss_rate == 0.1
    assert ws.goal.budget("ops") == 6.0 and ws.goal.budget("growth") == 4.0
    assert ws.detector.base == DetectorSettings(fence_multiplier=2.5, seasonal_span=9)
    assert ws.watched == ("ctr", "clicks") and ws.metric_names == ("ctr", "clicks")
    s = ws.search
    params = {p.name: p for p in s.params}
    assert (params["seasonal_span"].kind, params["seasonal_span"].low) == ("int", 7)
    assert (params["seasonal_span"].high, params["seasonal_span"].step) == (21, 2)
    assert params["min_impact"].kind == "float" and params["min_impact"].log is True
    assert params["sides"].kind == "choice" and params["sides"].values == ("up", "both")
    assert (s.multiplier_low, s.multiplier_high) == (1.0, 12.0)
    assert (s.trials, s.holdout_fraction, s.tune_by, s.seed) == (30, 0.3, "level", 11)


def test_folder_or_file_and_defaults(write_workspace, tmp_path: Path) -> None:
    file = write_workspace()
    a, b = load_workspace(tmp_path), load_workspace(file)
    assert a == b
    assert a.incidents.path is None and a.teams.owners is None and a.watched == ()
    assert a.metric_names == ("impressions", "clicks", "ctr")


def test_files_need_not_exist_and_absolute_paths_are_kept(write_workspace, tmp_path) -> None:
    elsewhere = tmp_path / "other" / "h.parquet"
    ws = load_workspace(write_workspace({"history": (
        f'path = "{elsewhere.as_posix()}"\nkey_columns = ["market"]'
    ), "levels": 'market = ["market"]'}))
    assert ws.history.path == elsewhere and not elsewhere.exists()
    assert ws.history.time_column == "hour"


def test_relative_sqlite_url_resolves_against_workspace_folder(write_workspace, tmp_path) -> None:
    ws = load_workspace(write_workspace({"history": (
        'url = "sqlite:///data/kpi.db"\nquery = "select * from kpi"\n'
        'key_columns = ["market", "advertiser", "campaign"]\nchunk_rows = 500'
    )}))
    assert ws.history.url == f"sqlite:///{tmp_path.resolve() / 'data' / 'kpi.db'}"
    assert ws.history.query == "select * from kpi" and ws.history.chunk_rows == 500


def test_level_error_message_matches_the_documented_example(write_workspace) -> None:
    path = write_workspace({"levels": 'campaign = ["campaign"]'})
    with pytest.raises(InputError) as info:
        load_workspace(path)
    assert str(info.value) == (
        f"{path} [levels] key 'campaign': must be a prefix of key_columns "
        "['market', 'advertiser', 'campaign'], but got ['campaign']"
    )


BASE_H = 'path = "history.csv"\nkey_columns = ["market", "advertiser", "campaign"]'
BAD = [
    # (sections override, extra text, expected location, expected fragment)
    ({}, "[alerts]\nx = 1\n", "[alerts]", "unknown section"),
    ({"history": BASE_H + '\ncolour = "red"'}, "", "[history] key 'colour'", "unknown key"),
    ({"history": 'path = "h.csv"\nkey_columns = "market"'}, "",
     "[history] key 'key_columns'", "must be a list of names"),
    ({"history": 'key_columns = ["market"]'}, "", "[history]", "needs either 'path'"),
    ({"history": 'path = "h.csv"\nurl = "sqlite:///x.db"\nkey_columns = ["market"]'}, "",
     "[history]", "needs either 'path'"),
    ({"history": 'url = "sqlite:///x.db"\nkey_columns = ["market"]'}, "",
     "[history] key 'query'", "is missing"),
    ({"history": BASE_H + "\nchunk_rows = 0"}, "", "[history] key 'chunk_rows'", "at least 1"),
    ({"history": BASE_H + '\ntime_column = "market"'}, "",
     "[history] key 'time_column'", "also a key column"),
    ({"history": None}, "", "[history]", "section is missing"),
    ({"measures": 'impressions = "mean"'}, "", "[measures] key 'impressions'",
     "fill rule must be 'zero' or 'carry_forward' (old name 'interpolate'), but got 'mean'"),
    ({"measures": "impressions = 0"}, "", "[measures] key 'impressions'", "fill rule"),
    ({"measures": 'market = "zero"'}, "", "[measures] key 'market'", "is a key or time column"),
    ({"metrics": 'ctr = "clicks / views"'}, "", "[metrics] key 'ctr'", "unknown measure 'views'"),
    ({"metrics": 'ctr = "clicks / (impressions"'}, "", "[metrics] key 'ctr'", "cannot parse"),
    ({"metrics": 'ctr = "clicks.sum()"'}, "", "[metrics] key 'ctr'", "not allowed"),
    ({"metrics": "ctr = 3"}, "", "[metrics] key 'ctr'", "must be a formula as text"),
    ({"metrics": 'clicks = "impressions"'}, "", "[metrics] key 'clicks'", "already a measure"),
    ({"levels": 'x = ["market", "campaign"]'}, "", "[levels] key 'x'", "must be a prefix"),
    ({"levels": "x = []"}, "", "[levels] key 'x'", "must be a prefix"),
    ({"levels": 'x = "market"'}, "", "[levels] key 'x'", "must be a list of names"),
    ({"incidents": "early_hours = 1"}, "", "[incidents] key 'path'", "is missing"),
    ({"incidents": 'path = "i.csv"\nlate_hours = -1'}, "", "[incidents] key 'late_hours'",
     "at least 0"),
    ({"incidents": 'path = "i.csv"\nearly_hours = 1.5'}, "", "[incidents] key 'early_hours'",
     "whole number"),
    ({"teams": "analysts = { ops = 0 }"}, "", "[teams] key 'analysts.ops'",
     "positive whole number, but got 0"),
    ({"teams": 'analysts = { ops = "two" }'}, "", "[teams] key 'analysts.ops'", "positive"),
    ({"teams": "analysts = { ops = 1.5 }"}, "", "[teams] key 'analysts.ops'", "positive"),
    ({"teams": "analysts = { ops = true }"}, "", "[teams] key 'analysts.ops'", "positive"),
    ({"teams": "owners = 5"}, "", "[teams] key 'owners'", "non-empty text"),
    ({"goal": "max_miss_rate = 1.5"}, "", "[goal] key 'max_miss_rate'", "between 0 and 1"),
    ({"goal": 'max_miss_rate = "low"'}, "", "[goal] key 'max_miss_rate'", "must be a number"),
    ({"goal": "max_alerts_per_analyst_day = 0"}, "", "[goal] key 'max_alerts_per_analyst_day'",
     "must be positive"),
    ({"teams": "analysts = { ops = 1 }", "goal": "max_alerts_per_analyst_day = { sales = 3 }"},
     "", "[goal] key 'max_alerts_per_analyst_day.sales'", "not in [teams] analysts"),
    ({"detector": "seasonal_span = 8"}, "", "[detector] key 'seasonal_span'", "odd"),
    ({"detector": "window = 8"}, "", "[detector] key 'window'", "unknown setting"),
    ({"watch": 'metrics = ["cpc"]'}, "", "[watch] key 'metrics'", "neither a measure nor a metric"),
    ({"search": "colour = [1]"}, "", "[search] key 'colour'", "unknown key"),
    ({"search": "fence_multiplier = [1, 2]"}, "", "[search] key 'fence_multiplier'",
     "must be a table {low, high}"),
    ({"search": "fence_multiplier = { low = 5, high = 2 }"}, "",
     "[search] key 'fence_multiplier'", "0 < low < high"),
    ({"search": "holdout_fraction = 0.95"}, "", "[search] key 'holdout_fraction'", "below 0.9"),
    ({"search": "holdout_fraction = 0"}, "", "[search] key 'holdout_fraction'", "above 0"),
    ({"search": 'tune_by = "team"'}, "", "[search] key 'tune_by'", "must be one of"),
    ({"search": "trials = 0"}, "", "[search] key 'trials'", "at least 1"),
    ({"search": 'seed = "x"'}, "", "[search] key 'seed'", "whole number"),
    ({"search": 'seasonal_span = [7, "9"]'}, "", "[search] key 'seasonal_span'",
     "values must be of type int"),
    ({"search": "seasonal_span = []"}, "", "[search] key 'seasonal_span'", "at least one value"),
    ({"search": "seasonal_span = { low = 7.5, high = 9 }"}, "",
     "[search] key 'seasonal_span'", "whole number"),
    ({"search": "seasonal_span = { low = 9, high = 7 }"}, "",
     "[search] key 'seasonal_span'", "low <= high"),
    ({"search": "min_impact = { low = 1, high = 5, step = 1 }"}, "",
     "[search] key 'min_impact'", "unknown key"),
    ({"search": "min_impact = { low = 0, high = 5, log = true }"}, "",
     "[search] key 'min_impact'", "low > 0 for log"),
    ({"search": "min_impact = { low = -10.0, high = 5 }"}, "",
     "[search] key 'min_impact'", "zero or positive"),
    ({"search": "robust = { low = 0, high = 1 }"}, "",
     "[search] key 'robust'", "can only be searched over a list"),
    ({"search": "sides = 3"}, "", "[search] key 'sides'", "must be a list of values"),
    ({"search": 'tune_by = "metric"'}, "[search.groups.cpc]\nmin_impact = [1.0]\n",
     "[search.groups.cpc]", "'cpc' is not a metric (known: impressions, clicks, ctr)"),
    ({"search": 'tune_by = "level"'}, "[search.groups.campaign]\nwindow = [1]\n",
     "[search.groups.campaign] key 'window'", "unknown searched setting"),
    ({"search": 'tune_by = "level"'}, "[search.groups.campaign]\nmin_impact = 3\n",
     "[search.groups.campaign] key 'min_impact'", "must be a list of values"),
    ({"search": "trials = 3"}, "[search.groups.ctr]\nseasonal_span = [7]\n",
     "[search.groups.ctr]", 'per-group ranges need tune_by = "level", "metric" or "group"'),
    ({"search": 'groups = 3'}, "", "[search] key 'groups'", "must be a table of groups"),
    ({"search": 'tune_by = "group"'}, "", "[search] key 'tune_by'",
     "needs [detector.group.NAME] tables"),
    ({"search": 'tune_by = "group"', "detector": '[detector.group.base]\nlevels = ["market"]'},
     "", "[detector.group.base]", "stands for the series no group matches"),
    ({"search": 'tune_by = "group"', "detector": '[detector.group.top]\nlevels = ["market"]'},
     "[search.groups.leaf]\nmin_impact = [1.0]\n", "[search.groups.leaf]",
     "'leaf' is not a group (known: top, base)"),
]


@pytest.mark.parametrize(("sections", "extra", "where", "fragment"), BAD)
def test_errors_name_file_section_and_key(write_workspace, sections, extra, where, fragment):
    path = write_workspace(sections, extra=extra)
    with pytest.raises(InputError) as info:
        load_workspace(path)
    message = str(info.value)
    assert message.startswith(f"{path} {where}"), message
    assert fragment in message, message
    assert "\n" not in message


def test_per_group_search_ranges(write_workspace) -> None:
    path = write_workspace(
        {"search": 'tune_by = "metric"\nmin_impact = { low = 0.0, high = 50.0 }'},
        extra="[search.groups.ctr]\nmin_impact = { low = 0.0, high = 0.01 }\n"
              "fence_window_hours = [48, 72]\n")
    s = load_workspace(path).search
    assert [p.name for p in s.params] == ["min_impact"]
    assert s.params[0].high == 50.0
    ctr = {p.name: p for p in s.group_params["ctr"]}
    assert (ctr["min_impact"].low, ctr["min_impact"].high) == (0.0, 0.01)
    assert ctr["fence_window_hours"].values == (48, 72)
    assert set(s.group_params) == {"ctr"}


def test_invalid_toml_and_missing_file(tmp_path: Path) -> None:
    bad = tmp_path / "workspace.toml"
    bad.write_text("[history\npath = 1\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"workspace\.toml: is not valid TOML"):
        load_workspace(bad)
    with pytest.raises(InputError, match=r"nowhere\.toml: no such workspace file"):
        load_workspace(tmp_path / "nowhere.toml")
    with pytest.raises(InputError, match=r"empty[/\\]workspace\.toml: no such workspace file"):
        (tmp_path / "empty").mkdir()
        load_workspace(tmp_path / "empty")


def test_section_that_is_not_a_table(write_workspace) -> None:
    path = write_workspace(extra="")
    path.write_text('history = "h.csv"\n', encoding="utf-8")
    with pytest.raises(InputError, match=r"workspace\.toml \[history\]: must be a table"):
        load_workspace(path)
