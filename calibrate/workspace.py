"""Read and validate `workspace.toml` into typed objects (pipeline stage 1).

The dataclasses below are the contract every later stage uses; `load_workspace`
is the only place a workspace file is parsed and checked.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from calibrate.settings import DetectorConfig

FILL_RULES = ("zero", "interpolate")
GROUPINGS = ("all", "level", "metric")


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
    tune_by: str = "all"  # one of GROUPINGS
    seed: int = 0


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


def load_workspace(path: str | Path) -> Workspace:
    """Read and validate a workspace file (or a folder holding `workspace.toml`)."""
    raise NotImplementedError
