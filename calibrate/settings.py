"""Typed detector settings, validated once where they enter the program.

`DetectorSettings` holds one complete detector configuration (the names of
the detector semantics of docs/detector.md). `DetectorConfig` is a base configuration plus
optional per-group overrides; `DetectorConfig.for_series(level, metric)` resolves
the settings one series and metric are replayed with.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from typing import Any

from calibrate.errors import InputError

SIDES = ("up", "down", "both")
COMBINE_RULES = ("any", "all")
FENCE_DETECTOR = "fence"
FLATLINE_DETECTOR = "flatline"
QUARTILE_METHODS = (
    "linear",
    "weibull",
    "hazen",
    "median_unbiased",
    "normal_unbiased",
    "lower",
    "higher",
    "midpoint",
    "nearest",
)
EXPECTED_VALUES = ("fit", "forecast")


@dataclass(frozen=True, kw_only=True)
class DetectorSettings:
    """One detector configuration.

    Attributes
    ----------
    period_hours : int
        Seasonal period P of the STL fit (24 = daily cycle).
    seasonal_span : int
        STL seasonal smoother length; odd and >= 7.
    trend_span : int
        STL trend smoother length; 0 means statsmodels' default, else odd > period.
    robust : bool
        Robust STL fit (bisquare outer iterations).
    weekly_period : bool
        Add a second, weekly (7 * period_hours) seasonal component through MSTL.
    decomposition_window_hours : int
        Trailing window L the STL is fitted on.
    refit_every_hours : int
        Refit every h hours; in between, trend is held and seasonal repeated.
    expected_value : str
        `fit`: the expected value at hour t comes from the fit whose window ends at t
        (its in-sample trend + seasonal); `forecast`: from the last fit ending before t,
        one or more hours ahead (trend held, seasonal one period back), and the fence
        window holds the same kind of remainders (README, "The detector, exactly").
    fence_window_hours : int
        Number W of past remainders the fences are built from (W < L).
    fence_multiplier : float
        Tukey multiplier k: fences at Q1 - k*IQR and Q3 + k*IQR.
    quartile_method : str
        numpy percentile method for Q1 and Q3 (`linear` = Hyndman-Fan type 7).
    sides : str
        Watched sides: `up`, `down` or `both`.
    flatline_hours : int
        Sustained-flat detector: flag once the value has not changed for this many
        hours while it was expected to move; 0 switches the detector off.
    min_impact : float
        An alert is raised at the first hour its episode's |impact so far| (the sum of
        value - expected over its hours up to then) reaches this; an episode that
        never does raises no alert. In the metric's own units.
    min_impact_per_metric : tuple of (str, float)
        Per watched metric minimum impacts, which replace `min_impact` for the metrics
        they name (written as a TOML table ``min_impact = { metric = value, ... }``).
    combine : str
        `any` (an hour is flagged when any detector flags it), `all`, or an
        integer n as a string ("2": at least n detectors).
    """

    period_hours: int = 24
    seasonal_span: int = 7
    trend_span: int = 0
    robust: bool = False
    weekly_period: bool = False
    decomposition_window_hours: int = 336
    refit_every_hours: int = 1
    expected_value: str = "fit"
    fence_window_hours: int = 168
    fence_multiplier: float = 3.0
    quartile_method: str = "linear"
    sides: str = "both"
    flatline_hours: int = 0
    min_impact: float = 0.0
    combine: str = "any"
    min_impact_per_metric: tuple[tuple[str, float], ...] = ()

    @classmethod
    def from_mapping(
        cls, data: Mapping[str, Any], where: str, base: DetectorSettings | None = None
    ) -> DetectorSettings:
        """Build validated settings from a TOML table.

        Parameters
        ----------
        data : mapping
            Keys are field names; missing keys take the value of `base` (or the default).
        where : str
            Location for error messages, e.g. ``"workspace.toml [detector]"``.
        base : DetectorSettings, optional
            Settings the table overrides.
        """
        known = {f.name: f for f in fields(cls) if f.name != "min_impact_per_metric"}
        values = dataclasses.asdict(base) if base is not None else {}
        for key, value in data.items():
            if key not in known:
                raise InputError(
                    f"{where} key '{key}'", f"unknown setting (known: {', '.join(known)})"
                )
            if key == "min_impact" and isinstance(value, Mapping):
                values["min_impact_per_metric"] = _per_metric(value, f"{where} key '{key}'")
                values["min_impact"] = 0.0
                continue
            if key == "min_impact":
                values["min_impact_per_metric"] = ()
            values[key] = _coerce(key, value, known[key].type, where)
        values["min_impact_per_metric"] = tuple(
            tuple(p) for p in values.get("min_impact_per_metric", ()))
        settings = cls(**values)
        settings.validate(where)
        return settings

    def validate(self, where: str = "settings") -> None:
        """Raise `InputError` naming the key when a rule is broken."""

        def bad(key: str, rule: str) -> InputError:
            return InputError(f"{where} key '{key}'", f"{rule}, but got {getattr(self, key)!r}")

        if self.period_hours < 2:
            raise bad("period_hours", "must be at least 2")
        if self.seasonal_span < 7 or self.seasonal_span % 2 == 0:
            raise bad("seasonal_span", "must be odd and at least 7")
        if self.trend_span != 0 and (
            self.trend_span % 2 == 0 or self.trend_span <= self.period_hours
        ):
            raise bad("trend_span", "must be 0 (library default) or odd and above period_hours")
        # MSTL drops a period unless the window holds more than two of it
        cycles = 3 if not self.weekly_period else 2
        need = cycles * self.period_hours * (7 if self.weekly_period else 1)
        need += 1 if self.weekly_period else 0
        if self.decomposition_window_hours < need:
            raise bad(
                "decomposition_window_hours",
                f"must cover at least {cycles} periods ({need} hours)",
            )
        if self.refit_every_hours < 1:
            raise bad("refit_every_hours", "must be at least 1")
        if self.expected_value not in EXPECTED_VALUES:
            raise bad("expected_value", "must be 'fit' or 'forecast'")
        if not 4 <= self.fence_window_hours < self.decomposition_window_hours:
            raise bad(
                "fence_window_hours", "must be at least 4 and below decomposition_window_hours"
            )
        # inf or nan would flag nothing at all: alerting silently off
        if not (math.isfinite(self.fence_multiplier) and self.fence_multiplier > 0):
            raise bad("fence_multiplier", "must be a finite positive number")
        if self.quartile_method not in QUARTILE_METHODS:
            raise bad("quartile_method", f"must be one of {', '.join(QUARTILE_METHODS)}")
        if self.sides not in SIDES:
            raise bad("sides", "must be 'up', 'down' or 'both'")
        if self.flatline_hours < 0 or self.flatline_hours == 1:
            raise bad("flatline_hours", "must be 0 (off) or at least 2")
        values = [self.min_impact, *(v for _, v in self.min_impact_per_metric)]
        if not all(math.isfinite(v) and v >= 0 for v in values):
            raise bad("min_impact", "must be a finite number, zero or positive")
        if self.combine not in COMBINE_RULES and not (
            self.combine.isdigit() and int(self.combine) >= 1
        ):
            raise bad("combine", "must be 'any', 'all' or a positive whole number as text")

    @property
    def detectors(self) -> tuple[str, ...]:
        """Names of the detectors these settings switch on, in a fixed order."""
        return (FENCE_DETECTOR, FLATLINE_DETECTOR) if self.flatline_hours else (FENCE_DETECTOR,)

    @property
    def min_detectors(self) -> int:
        """How many detectors must flag an hour for it to count as flagged."""
        n = len(self.detectors)
        if self.combine == "any":
            return 1
        if self.combine == "all":
            return n
        return min(int(self.combine), n)

    def impact_for(self, metric: str) -> float:
        """The minimum impact of `metric` (its own, else `min_impact`)."""
        return dict(self.min_impact_per_metric).get(metric, self.min_impact)

    def decomposition_key(self) -> tuple:
        """The settings a remainder stream depends on (cache key for decompositions)."""
        return (
            self.period_hours,
            self.seasonal_span,
            self.trend_span,
            self.robust,
            self.weekly_period,
            self.decomposition_window_hours,
            self.refit_every_hours,
            self.expected_value,
        )

    @property
    def first_scored_hour(self) -> int:
        """First hour these settings can score: L - 1 with `fit` (the first fit's own
        remainders fill the fence window), L + W with `forecast` (the first forecast is
        for hour L, and the fence window then needs W forecast remainders)."""
        L = self.decomposition_window_hours
        return L + self.fence_window_hours if self.expected_value == "forecast" else L - 1

    def to_table(self) -> dict[str, Any]:
        """Plain dict for writing to TOML (per-metric minimum impacts as a table)."""
        out = dataclasses.asdict(self)
        per_metric = out.pop("min_impact_per_metric")
        if per_metric:
            out["min_impact"] = {m: float(v) for m, v in per_metric}
        return out


def _per_metric(value: Mapping[str, Any], loc: str) -> tuple[tuple[str, float], ...]:
    out = []
    for metric, v in value.items():
        if isinstance(v, bool) or not isinstance(v, int | float):
            raise InputError(f"{loc} metric '{metric}'", f"must be a number, but got {v!r}")
        out.append((str(metric), float(v)))
    return tuple(out)


def _coerce(key: str, value: Any, typ: Any, where: str) -> Any:
    name = typ if isinstance(typ, str) else getattr(typ, "__name__", str(typ))
    loc = f"{where} key '{key}'"
    if name == "bool":
        if not isinstance(value, bool):
            raise InputError(loc, f"must be true or false, but got {value!r}")
        return value
    if name == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise InputError(loc, f"must be a whole number, but got {value!r}")
        return value
    if name == "float":
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise InputError(loc, f"must be a number, but got {value!r}")
        return float(value)
    if name == "str":
        if isinstance(value, int) and not isinstance(value, bool) and key == "combine":
            return str(value)
        if not isinstance(value, str):
            raise InputError(loc, f"must be text, but got {value!r}")
        return value
    return value


@dataclass(frozen=True, kw_only=True)
class DetectorGroup:
    """Settings that override the base for some levels and/or metrics.

    An empty `levels` (or `metrics`) tuple matches every level (or metric).
    """

    name: str
    levels: tuple[str, ...] = ()
    metrics: tuple[str, ...] = ()
    settings: DetectorSettings = field(default_factory=DetectorSettings)

    def matches(self, level: str, metric: str) -> bool:
        return (not self.levels or level in self.levels) and (
            not self.metrics or metric in self.metrics
        )


@dataclass(frozen=True, kw_only=True)
class DetectorConfig:
    """A base detector configuration plus ordered per-group overrides."""

    base: DetectorSettings = field(default_factory=DetectorSettings)
    groups: tuple[DetectorGroup, ...] = ()

    def for_series(self, level: str, metric: str) -> DetectorSettings:
        """Settings for one level and metric: the first matching group wins; its
        minimum impact is the metric's own."""
        settings = next((g.settings for g in self.groups if g.matches(level, metric)), self.base)
        if settings.min_impact_per_metric:
            return replace(settings, min_impact=settings.impact_for(metric),
                           min_impact_per_metric=())
        return settings

    @classmethod
    def from_table(cls, table: Mapping[str, Any], where: str) -> DetectorConfig:
        """Parse a `[detector]` table with optional `[detector.group.NAME]` sub-tables.

        A group table holds `levels = [...]`, `metrics = [...]` and any setting keys;
        settings it does not name are those of the base table.
        """
        table = dict(table)
        group_tables = table.pop("group", {})
        if not isinstance(group_tables, Mapping):
            raise InputError(f"{where} key 'group'", "must be a table of named groups")
        base = DetectorSettings.from_mapping(table, where)
        groups = []
        for name, gt in group_tables.items():
            gwhere = (
                f"{where.rstrip(']')}.group.{name}]"
                if where.endswith("]")
                else f"{where} group {name}"
            )
            if not isinstance(gt, Mapping):
                raise InputError(gwhere, "must be a table")
            gt = dict(gt)
            levels = gt.pop("levels", [])
            metrics = gt.pop("metrics", [])
            for key, val in (("levels", levels), ("metrics", metrics)):
                if not isinstance(val, list) or not all(isinstance(v, str) for v in val):
                    raise InputError(
                        f"{gwhere} key '{key}'", f"must be a list of names, but got {val!r}"
                    )
            settings = DetectorSettings.from_mapping(gt, gwhere, base=base)
            groups.append(
                DetectorGroup(
                    name=name, levels=tuple(levels), metrics=tuple(metrics), settings=settings
                )
            )
        return cls(base=base, groups=tuple(groups))

    def to_table(self) -> dict[str, Any]:
        """The `[detector]` table (with group sub-tables) as written to TOML."""
        out = self.base.to_table()
        if self.groups:
            out["group"] = {}
            for g in self.groups:
                base = self.base.to_table()
                diff = {k: v for k, v in g.settings.to_table().items() if base[k] != v}
                out["group"][g.name] = {
                    "levels": list(g.levels),
                    "metrics": list(g.metrics),
                    **diff,
                }
        return out

    def with_base(self, **changes: Any) -> DetectorConfig:
        return replace(self, base=replace(self.base, **changes))
