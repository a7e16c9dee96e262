"""Read and validate `workspace.toml` into typed objects (pipeline stage 1).

The dataclasses below are the contract every later stage uses; `load_workspace`
is the only place a workspace file is parsed and checked.
"""

from __future__ import annotations

import datetime
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from calibrate.errors import InputError
from calibrate.formulas import parse_formula
from calibrate.settings import DetectorConfig, DetectorSettings

# "interpolate" is the old name of "carry_forward" (kept for existing workspace files)
FILL_RULES = ("zero", "carry_forward", "interpolate")
GROUPINGS = ("all", "level", "metric", "group")
# with tune_by = "group", the series no [detector.group.NAME] matches form this group
BASE_GROUP = "base"


@dataclass(frozen=True, kw_only=True)
class HistorySource:
    """Where hourly rows come from: a file (`path`) or a database (`url` + `query`)."""

    path: Path | None = None
    url: str | None = None
    query: str | None = None
    time_column: str = "hour"
    key_columns: tuple[str, ...] = ()
    chunk_rows: int = 200_000


@dataclass(frozen=True, kw_only=True)
class IncidentSource:
    """The labelled incidents file and the matching tolerances (hours)."""

    path: Path | None = None
    early_hours: int = 0
    late_hours: int = 0


@dataclass(frozen=True, kw_only=True)
class Teams:
    """Owners file (key prefix -> team) and analysts per team."""

    owners: Path | None = None
    analysts: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True, kw_only=True)
class Goal:
    """What a tuned config must achieve.

    `max_alerts_per_analyst_day` is one number for every team or a per-team dict
    (teams it does not name get the value under key ``"*"`` if present).
    """

    max_miss_rate: float = 0.2
    max_alerts_per_analyst_day: float | dict[str, float] = 5.0
    # the miss-rate target must still hold if this many more caught incidents were missed
    # (a margin against sitting on the knife edge of the weakest caught incident)
    spare_incidents: int = 0

    def max_misses(self, n_incidents: int) -> int:
        """Most incidents of `n_incidents` a setting may miss, spare ones counted."""
        if n_incidents <= 0:
            return 0
        allowed = 0
        while allowed < n_incidents and (allowed + 1) / n_incidents <= self.max_miss_rate:
            allowed += 1
        return max(allowed - self.spare_incidents, -1)

    def budget(self, team: str) -> float:
        """Alert budget per analyst per day for `team` (inf when none is set)."""
        b = self.max_alerts_per_analyst_day
        if isinstance(b, dict):
            return float(b.get(team, b.get("*", float("inf"))))
        return float(b)


@dataclass(frozen=True, kw_only=True)
class SearchParam:
    """One searched detector setting.

    kind is ``"choice"`` (values), ``"int"`` (low..high by step) or ``"float"``
    (low..high, log scale optional).
    """

    name: str
    kind: str
    values: tuple[Any, ...] = ()
    low: float = 0.0
    high: float = 0.0
    step: float = 1.0
    log: bool = False


@dataclass(frozen=True, kw_only=True)
class SearchSpace:
    """The `[search]` table: searched settings, multiplier solve range, trial budget."""

    params: tuple[SearchParam, ...] = ()
    multiplier_low: float = 0.5
    multiplier_high: float = 10.0
    trials: int = 60
    holdout_fraction: float = 0.25
    # first held-out day (UTC, "YYYY-MM-DD"); replaces holdout_fraction when set
    holdout_start: str | None = None
    # "holdout" (one check on the held-out weeks) or "rolling": time-ordered folds of the
    # tuning weeks, each tuned on the weeks before it and scored on the next block
    validation: str = "holdout"
    folds: int = 3
    gap_days: int = 0
    tune_by: str = "all"  # one of GROUPINGS
    seed: int = 0
    # per group (level or metric name): searched settings that replace `params`' ones
    group_params: dict[str, tuple[SearchParam, ...]] = field(default_factory=dict)


@dataclass(frozen=True, kw_only=True)
class Workspace:
    """A validated workspace. Paths are absolute (resolved against the file's folder)."""

    file: Path
    history: HistorySource
    measures: dict[str, str]  # measure -> fill rule
    metrics: dict[str, str]  # derived metric -> formula over measures
    levels: dict[str, tuple[str, ...]]  # level -> prefix of key_columns
    incidents: IncidentSource = field(default_factory=IncidentSource)
    teams: Teams = field(default_factory=Teams)
    goal: Goal = field(default_factory=Goal)
    detector: DetectorConfig = field(default_factory=DetectorConfig)
    search: SearchSpace = field(default_factory=SearchSpace)
    watched: tuple[str, ...] = ()  # metrics replayed; empty = all measures and metrics

    @property
    def root(self) -> Path:
        return self.file.parent

    @property
    def metric_names(self) -> tuple[str, ...]:
        """Every metric the detector watches, measures first."""
        if self.watched:
            return self.watched
        return tuple(self.measures) + tuple(self.metrics)


WORKSPACE_FILE = "workspace.toml"
SECTIONS = (
    "history", "measures", "metrics", "levels", "incidents", "teams",
    "goal", "detector", "search", "watch",
)
_SEARCH_SPECIAL = ("fence_multiplier", "trials", "holdout_fraction", "holdout_start",
                   "validation", "folds", "gap_days", "tune_by", "seed",
                   "groups")


def load_workspace(path: str | Path) -> Workspace:
    """Read and validate a workspace file (or a folder holding `workspace.toml`).

    Parameters
    ----------
    path : str or Path
        The TOML file, or a folder containing ``workspace.toml``.

    Returns
    -------
    Workspace
        Validated; relative paths resolved against the file's folder. Files it names
        are not opened here (the history and incident loaders check them).

    Raises
    ------
    InputError
        One line naming the file, section and key, and what is wrong.
    """
    given = Path(path)
    file = given / WORKSPACE_FILE if given.is_dir() else given
    name = str(file)
    if not file.is_file():
        raise InputError(name, "no such workspace file")
    try:
        data = tomllib.loads(file.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise InputError(name, "is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(name, f"is not valid TOML: {exc}") from None
    return parse_workspace(data, file.resolve(), name)


def parse_workspace(data: Mapping[str, Any], file: Path, name: str = WORKSPACE_FILE) -> Workspace:
    """Validate an already-parsed workspace table (the pure half of `load_workspace`).

    `file` is the workspace file's absolute path (relative paths resolve against its
    folder); `name` is how error messages refer to it.
    """
    root = file.parent
    for key, value in data.items():
        if key not in SECTIONS:
            raise InputError(f"{name} [{key}]", f"unknown section (known: {', '.join(SECTIONS)})")
        if not isinstance(value, Mapping):
            raise InputError(f"{name} [{key}]", f"must be a table, but got {value!r}")
    for required in ("history", "measures", "levels"):
        if required not in data:
            raise InputError(f"{name} [{required}]", "section is missing")

    history = _history(data["history"], root, f"{name} [history]")
    measures = _measures(data["measures"], history, f"{name} [measures]")
    metrics = _metrics(data.get("metrics", {}), measures, f"{name} [metrics]")
    levels = _levels(data["levels"], history.key_columns, f"{name} [levels]")
    teams = _teams(data.get("teams", {}), root, f"{name} [teams]")
    ws = Workspace(
        file=file,
        history=history,
        measures=measures,
        metrics=metrics,
        levels=levels,
        incidents=_incidents(data.get("incidents"), root, f"{name} [incidents]"),
        teams=teams,
        goal=_goal(data.get("goal", {}), teams, f"{name} [goal]"),
        detector=DetectorConfig.from_table(data.get("detector", {}), f"{name} [detector]"),
        search=_search(data.get("search", {}), f"{name} [search]"),
        watched=_watch(data.get("watch", {}), measures, metrics, f"{name} [watch]"),
    )
    _check_search_groups(ws, name)
    return ws


# ---------------------------------------------------------------- small checkers


def _loc(where: str, key: str) -> str:
    return f"{where} key '{key}'"


def _only(table: Mapping[str, Any], known: tuple[str, ...], where: str) -> None:
    for key in table:
        if key not in known:
            raise InputError(_loc(where, key), f"unknown key (known: {', '.join(known)})")


def _text(table: Mapping[str, Any], key: str, where: str) -> str:
    value = table[key]
    if not isinstance(value, str) or not value.strip():
        raise InputError(_loc(where, key), f"must be non-empty text, but got {value!r}")
    return value


def _int(value: Any, loc: str, minimum: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise InputError(loc, f"must be a whole number, but got {value!r}")
    if minimum is not None and value < minimum:
        raise InputError(loc, f"must be at least {minimum}, but got {value!r}")
    return value


def _number(value: Any, loc: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(loc, f"must be a number, but got {value!r}")
    if not math.isfinite(value):  # TOML allows inf and nan
        raise InputError(loc, f"must be a finite number, but got {value!r}")
    return float(value)


def _names(value: Any, loc: str) -> tuple[str, ...]:
    if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
        raise InputError(loc, f"must be a list of names, but got {value!r}")
    if len(set(value)) != len(value):
        raise InputError(loc, f"must not repeat a name, but got {value!r}")
    return tuple(value)


def _path(text: str, root: Path) -> Path:
    p = Path(text).expanduser()
    return p if p.is_absolute() else (root / p)


def _sqlite_url(url: str, root: Path, loc: str) -> str:
    """Resolve a relative SQLite database path against the workspace folder."""
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    try:
        parsed = make_url(url)
    except ArgumentError:
        raise InputError(loc, "is not a valid database URL") from None
    db = parsed.database
    is_file = bool(db) and db != ":memory:" and not str(db).startswith("file:")
    if parsed.get_backend_name() == "sqlite" and is_file:
        if not Path(str(db)).is_absolute():
            return parsed.set(database=str(root / db)).render_as_string(hide_password=False)
    return url


# ---------------------------------------------------------------- sections


def _history(t: Mapping[str, Any], root: Path, where: str) -> HistorySource:
    _only(t, ("path", "url", "query", "time_column", "key_columns", "chunk_rows"), where)
    has_path = "path" in t
    has_db = "url" in t or "query" in t
    if has_path == has_db:
        raise InputError(where, "needs either 'path' (a CSV or Parquet file) or 'url' and 'query'")
    path = url = query = None
    if has_path:
        path = _path(_text(t, "path", where), root)
    else:
        for key in ("url", "query"):
            if key not in t:
                raise InputError(_loc(where, key), "is missing (a database needs url and query)")
        url = _sqlite_url(_text(t, "url", where), root, _loc(where, "url"))
        query = _text(t, "query", where)
    if "key_columns" not in t:
        raise InputError(_loc(where, "key_columns"), "is missing")
    keys = _names(t["key_columns"], _loc(where, "key_columns"))
    if not keys:
        raise InputError(_loc(where, "key_columns"), "must name at least one column")
    time_column = _text(t, "time_column", where) if "time_column" in t else "hour"
    if time_column in keys:
        raise InputError(_loc(where, "time_column"), f"'{time_column}' is also a key column")
    chunk = _int(t["chunk_rows"], _loc(where, "chunk_rows"), 1) if "chunk_rows" in t else None
    extra = {"chunk_rows": chunk} if chunk is not None else {}
    return HistorySource(
        path=path, url=url, query=query, time_column=time_column, key_columns=keys, **extra
    )


def _measures(t: Mapping[str, Any], history: HistorySource, where: str) -> dict[str, str]:
    if not t:
        raise InputError(where, "must name at least one measure")
    taken = set(history.key_columns) | {history.time_column}
    out: dict[str, str] = {}
    for name, rule in t.items():
        if name in taken:
            raise InputError(_loc(where, name), "is a key or time column, not a measure")
        if rule not in FILL_RULES:
            raise InputError(
                _loc(where, name),
                "fill rule must be 'zero' or 'carry_forward' (old name 'interpolate'), "
                f"but got {rule!r}",
            )
        out[name] = rule
    return out


def _metrics(t: Mapping[str, Any], measures: dict[str, str], where: str) -> dict[str, str]:
    out: dict[str, str] = {}
    for name, text in t.items():
        loc = _loc(where, name)
        if name in measures:
            raise InputError(loc, "is already a measure; a derived metric needs its own name")
        if not isinstance(text, str):
            raise InputError(loc, f"must be a formula as text, but got {text!r}")
        parse_formula(text, tuple(measures), loc)
        out[name] = text
    return out


def _levels(t: Mapping[str, Any], keys: tuple[str, ...], where: str) -> dict[str, tuple[str, ...]]:
    if not t:
        raise InputError(where, "must name at least one level")
    out: dict[str, tuple[str, ...]] = {}
    for name, value in t.items():
        loc = _loc(where, name)
        cols = _names(value, loc)
        if not cols or cols != keys[: len(cols)]:
            raise InputError(
                loc, f"must be a prefix of key_columns {list(keys)}, but got {list(cols)}"
            )
        out[name] = cols
    return out


def _incidents(t: Mapping[str, Any] | None, root: Path, where: str) -> IncidentSource:
    if t is None:
        return IncidentSource()
    _only(t, ("path", "early_hours", "late_hours"), where)
    if "path" not in t:
        raise InputError(_loc(where, "path"), "is missing")
    return IncidentSource(
        path=_path(_text(t, "path", where), root),
        early_hours=_int(t.get("early_hours", 0), _loc(where, "early_hours"), 0),
        late_hours=_int(t.get("late_hours", 0), _loc(where, "late_hours"), 0),
    )


def _teams(t: Mapping[str, Any], root: Path, where: str) -> Teams:
    _only(t, ("owners", "analysts"), where)
    owners = _path(_text(t, "owners", where), root) if "owners" in t else None
    analysts = t.get("analysts", {})
    if not isinstance(analysts, Mapping):
        raise InputError(
            _loc(where, "analysts"), f"must be a table team = count, but got {analysts!r}"
        )
    counts: dict[str, int] = {}
    for team, n in analysts.items():
        if isinstance(n, bool) or not isinstance(n, int) or n < 1:
            raise InputError(
                f"{where} key 'analysts.{team}'", f"must be a positive whole number, but got {n!r}"
            )
        counts[team] = n
    return Teams(owners=owners, analysts=counts)


def _goal(t: Mapping[str, Any], teams: Teams, where: str) -> Goal:
    _only(t, ("max_miss_rate", "max_alerts_per_analyst_day", "spare_incidents"), where)
    values: dict[str, Any] = {}
    if "spare_incidents" in t:
        values["spare_incidents"] = _int(t["spare_incidents"], _loc(where, "spare_incidents"), 0)
    if "max_miss_rate" in t:
        loc = _loc(where, "max_miss_rate")
        rate = _number(t["max_miss_rate"], loc)
        if not 0.0 <= rate <= 1.0:
            raise InputError(loc, f"must be between 0 and 1, but got {rate!r}")
        values["max_miss_rate"] = rate
    if "max_alerts_per_analyst_day" in t:
        key = "max_alerts_per_analyst_day"
        raw = t[key]
        if isinstance(raw, Mapping):
            budget: dict[str, float] = {}
            for team, v in raw.items():
                loc = f"{where} key '{key}.{team}'"
                if team != "*" and teams.analysts and team not in teams.analysts:
                    raise InputError(loc, f"team '{team}' is not in [teams] analysts")
                budget[team] = _positive(v, loc)
            values[key] = budget
        else:
            values[key] = _positive(raw, _loc(where, key))
    return Goal(**values)


def _positive(value: Any, loc: str) -> float:
    x = _number(value, loc)
    if not x > 0:
        raise InputError(loc, f"must be positive, but got {value!r}")
    return x


def _watch(
    t: Mapping[str, Any], measures: dict[str, str], metrics: dict[str, str], where: str
) -> tuple[str, ...]:
    _only(t, ("metrics",), where)
    if "metrics" not in t:
        return ()
    names = _names(t["metrics"], _loc(where, "metrics"))
    for n in names:
        if n not in measures and n not in metrics:
            raise InputError(_loc(where, "metrics"), f"'{n}' is neither a measure nor a metric")
    return names


def _search(t: Mapping[str, Any], where: str) -> SearchSpace:
    setting_types = {f.name: str(f.type) for f in fields(DetectorSettings)}
    values: dict[str, Any] = {}
    params: list[SearchParam] = []
    for key, raw in t.items():
        loc = _loc(where, key)
        if key == "fence_multiplier":
            if not isinstance(raw, Mapping) or set(raw) != {"low", "high"}:
                raise InputError(loc, f"must be a table {{low, high}}, but got {raw!r}")
            low, high = _number(raw["low"], loc), _number(raw["high"], loc)
            if not 0 < low < high:
                raise InputError(loc, f"needs 0 < low < high, but got low={low!r}, high={high!r}")
            values["multiplier_low"], values["multiplier_high"] = low, high
        elif key == "trials":
            values["trials"] = _int(raw, loc, 1)
        elif key == "holdout_fraction":
            x = _number(raw, loc)
            if not 0 < x < 0.9:
                raise InputError(loc, f"must be above 0 and below 0.9, but got {raw!r}")
            values["holdout_fraction"] = x
        elif key == "holdout_start":
            try:
                day = datetime.date.fromisoformat(raw) if isinstance(raw, str) else raw
            except ValueError:
                day = None
            if not isinstance(day, datetime.date) or isinstance(day, datetime.datetime):
                raise InputError(loc, f"must be a date \"YYYY-MM-DD\", but got {raw!r}")
            values["holdout_start"] = day.isoformat()
        elif key == "validation":
            if raw not in ("holdout", "rolling"):
                raise InputError(loc, f"must be 'holdout' or 'rolling', but got {raw!r}")
            values["validation"] = raw
        elif key == "folds":
            values["folds"] = _int(raw, loc, 2)
        elif key == "gap_days":
            values["gap_days"] = _int(raw, loc, 0)
        elif key == "tune_by":
            if raw not in GROUPINGS:
                raise InputError(loc, f"must be one of {', '.join(GROUPINGS)}, but got {raw!r}")
            values["tune_by"] = raw
        elif key == "seed":
            values["seed"] = _int(raw, loc)
        elif key == "groups":
            values["group_params"] = _search_groups(raw, setting_types, where)
        elif key in setting_types:
            params.append(_search_param(key, raw, setting_types[key], loc))
        else:
            known = [*_SEARCH_SPECIAL, *(k for k in setting_types if k != "fence_multiplier")]
            raise InputError(loc, f"unknown key (known: {', '.join(known)})")
    return SearchSpace(params=tuple(params), **values)


def _search_groups(raw: Any, setting_types: dict[str, str],
                   where: str) -> dict[str, tuple[SearchParam, ...]]:
    """`[search.groups.NAME]` tables: searched settings of one group."""
    if not isinstance(raw, Mapping):
        raise InputError(_loc(where, "groups"), f"must be a table of groups, but got {raw!r}")
    out = {}
    for group, table in raw.items():
        gwhere = f"{where.removesuffix('[search]')}[search.groups.{group}]"
        if not isinstance(table, Mapping):
            raise InputError(gwhere, f"must be a table of searched settings, but got {table!r}")
        params = []
        for key, spec in table.items():
            if key not in setting_types or key == "fence_multiplier":
                known = [k for k in setting_types if k != "fence_multiplier"]
                raise InputError(_loc(gwhere, key),
                                 f"unknown searched setting (known: {', '.join(known)})")
            params.append(_search_param(key, spec, setting_types[key], _loc(gwhere, key)))
        out[str(group)] = tuple(params)
    return out


def _check_search_groups(ws: Workspace, name: str) -> None:
    """tune_by = "group" needs named [detector] groups; group names of `[search.groups]`
    must be groups of `tune_by`."""
    s = ws.search
    named = tuple(g.name for g in ws.detector.groups)
    if s.tune_by == "group":
        where = f"{name} [search] key 'tune_by'"
        if not named:
            raise InputError(where, 'tune_by = "group" needs [detector.group.NAME] tables')
        if BASE_GROUP in named:
            raise InputError(f"{name} [detector.group.{BASE_GROUP}]",
                             f"the name '{BASE_GROUP}' stands for the series no group matches "
                             'with tune_by = "group"; rename the group')
    if not s.group_params:
        return
    known = {"level": tuple(ws.levels), "metric": ws.metric_names,
             "group": (*named, BASE_GROUP)}.get(s.tune_by)
    for group, params in s.group_params.items():
        where = f"{name} [search.groups.{group}]"
        # a watched metric's own minimum-impact range, whatever the groups (its units)
        if group in ws.metric_names and all(p.name == "min_impact" for p in params):
            continue
        if known is None:
            raise InputError(where, 'per-group ranges need tune_by = "level", "metric" or '
                             '"group"')
        if group not in known:
            raise InputError(where, f"'{group}' is not a {s.tune_by} (known: {', '.join(known)})")


def _search_param(name: str, raw: Any, typ: str, loc: str) -> SearchParam:
    if isinstance(raw, list):
        if not raw:
            raise InputError(loc, "must list at least one value")
        for v in raw:
            _check_type(v, typ, loc)
        if len(set(map(repr, raw))) != len(raw):
            raise InputError(loc, f"must not repeat a value, but got {raw!r}")
        return SearchParam(name=name, kind="choice", values=tuple(raw))
    if not isinstance(raw, Mapping):
        raise InputError(loc, f"must be a list of values or a {{low, high}} table, but got {raw!r}")
    if typ == "int":
        _only(raw, ("low", "high", "step"), loc)
        if "low" not in raw or "high" not in raw:
            raise InputError(loc, "a range needs both low and high")
        low, high = _int(raw["low"], loc), _int(raw["high"], loc)
        step = _int(raw.get("step", 1), loc, 1)
        if low > high:
            raise InputError(loc, f"needs low <= high, but got low={low}, high={high}")
        return SearchParam(name=name, kind="int", low=low, high=high, step=step)
    if typ == "float":
        _only(raw, ("low", "high", "log"), loc)
        if "low" not in raw or "high" not in raw:
            raise InputError(loc, "a range needs both low and high")
        low, high = _number(raw["low"], loc), _number(raw["high"], loc)
        log = raw.get("log", False)
        if not isinstance(log, bool):
            raise InputError(loc, f"log must be true or false, but got {log!r}")
        if low > high or (log and low <= 0):
            raise InputError(
                loc, f"needs low <= high (and low > 0 for log), but got low={low}, high={high}"
            )
        if name == "min_impact" and low < 0:
            raise InputError(loc, f"a minimum impact is zero or positive, but got low={low}")
        return SearchParam(name=name, kind="float", low=low, high=high, log=log)
    raise InputError(loc, f"a {typ} setting can only be searched over a list of values")


def _check_type(value: Any, typ: str, loc: str) -> None:
    ok = {
        "int": not isinstance(value, bool) and isinstance(value, int),
        "float": not isinstance(value, bool) and isinstance(value, int | float),
        "bool": isinstance(value, bool),
        "str": isinstance(value, str),
    }.get(typ, True)
    if not ok:
        raise InputError(loc, f"values must be of type {typ}, but got {value!r}")
    if typ == "float" and not math.isfinite(value):
        raise InputError(loc, f"values must be finite numbers, but got {value!r}")
