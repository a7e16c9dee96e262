"""The search space (stage 8): which settings a tune searches and on which grids, and
the per-metric ranges the minimum impact is solved in (never read from held-out hours).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import optuna

from calibrate.api import Session
from calibrate.errors import InputError
from calibrate.inputs.workspace import BASE_GROUP, SearchParam
from calibrate.settings import DetectorConfig, DetectorGroup, DetectorSettings

IMPACT_STEPS = (1.0, 1.5, 2.0, 3.0, 5.0, 7.0)  # solved minimum impacts, per decade


WEEK = 168


MAX_PRECOMPUTED_WINDOWS = 64


@dataclass(frozen=True, kw_only=True)
class Param:
    """One Optuna parameter: a detector setting, optionally of one group."""

    name: str  # Optuna name: "setting" or "group/setting"
    setting: str
    group: str | None
    spec: SearchParam

    def suggest(self, trial: optuna.Trial) -> Any:
        s = self.spec
        if s.kind == "choice":
            return trial.suggest_categorical(self.name, list(s.values))
        if s.kind == "int":
            return trial.suggest_int(self.name, int(s.low), int(s.high), step=int(s.step))
        return trial.suggest_float(self.name, float(s.low), float(s.high), log=s.log)


def default_params(ses: Session, metrics: Sequence[str] | None = None) -> tuple[SearchParam, ...]:
    """Search space used when `[search]` names no setting: fence window, seasonal span
    (odd) and flatline hours (the minimum impact is solved per metric, see
    `impact_ranges`)."""
    return (
        SearchParam(name="fence_window_hours", kind="choice", values=(72, 120, 168, 240)),
        SearchParam(name="seasonal_span", kind="choice", values=(7, 11, 15)),
        SearchParam(name="flatline_hours", kind="choice", values=(0, 6, 10)),
    )


def typical_level(ses: Session, metric: str, end_hour: int | None = None) -> float:
    """Median |hourly value| of `metric` over every series of every level and the hours
    before `end_hour` (the tuning weeks: held-out hours are never read); 1 when undefined."""
    vals = [np.abs(ls.values[metric][:, :end_hour]).ravel()
            for ls in ses.history.levels.values() if metric in ls.values]
    if not vals:
        return 1.0
    with np.errstate(all="ignore"):
        med = float(np.nanmedian(np.concatenate(vals))) if sum(len(v) for v in vals) else 0.0
    return med if math.isfinite(med) and med > 0 else 1.0


def _with_current(spec: SearchParam, value: Any) -> SearchParam:
    """Make sure today's value lies in the space, so the warm start is exact."""
    if spec.kind == "choice":
        if any(type(v) is type(value) and v == value for v in spec.values):
            return spec
        return replace(spec, values=(*spec.values, value))
    if spec.kind == "int":
        low, high, step = int(spec.low), int(spec.high), max(int(spec.step), 1)
        if spec.name in ("seasonal_span",) or (spec.name == "trend_span" and low > 0):
            low, step = low | 1, step + step % 2  # odd spans by construction
            high = high if high % 2 else high - 1
        if (int(value) - low) % step == 0 and low <= value <= high:
            return replace(spec, low=low, high=max(high, low), step=step)
        return replace(spec, kind="choice", values=tuple(
            sorted({*range(low, high + 1, step), int(value)})))
    lo, hi = min(float(spec.low), float(value)), max(float(spec.high), float(value))
    if spec.log and lo <= 0:
        return replace(spec, low=lo, high=hi, log=False)
    return replace(spec, low=lo, high=hi)


def group_metrics(ses: Session, group: str | None) -> list[str]:
    """Watched metrics of one search group (None: every watched metric)."""
    tune_by = ses.ws.search.tune_by
    if tune_by == "metric" and group:
        return [group]
    if tune_by == "group" and group and group != BASE_GROUP:
        own = [m for g in ses.ws.detector.groups if g.name == group for m in g.metrics]
        return [m for m in ses.ws.metric_names if m in own] or list(ses.ws.metric_names)
    return list(ses.ws.metric_names)


def _shared_impact_spec(ses: Session, group: str | None) -> SearchParam | None:
    return next((p for p in _group_specs(ses, group) if p.name == "min_impact"), None)


def solved_min_impact(ses: Session, group: str | None = None) -> bool:
    """Whether the minimum impact of a group (None: no groups) is solved per metric with
    the multiplier: always, unless `[search]` lists values for Optuna to sample."""
    if (group is None) != (ses.ws.search.tune_by == "all"):
        return False
    spec = _shared_impact_spec(ses, group)
    return spec is None or spec.kind == "float"


def impact_ranges(ses: Session, group: str | None, end_hour: int) -> dict[str, tuple[float, float]]:
    """Per watched metric of the group, the (low, high) range its minimum impact is solved
    in, in the metric's own units: its `[search.groups.METRIC]` range, else the group's
    own range when the group has one metric, else 0 to the metric's typical hourly level
    on the hours before `end_hour` (the tuning weeks).

    Raises
    ------
    InputError
        When one range is given for several metrics: impacts of different metrics are in
        different units, so one number would silence some metrics and never filter others.
    """
    s = ses.ws.search
    metrics = group_metrics(ses, group)
    shared = _shared_impact_spec(ses, group)
    if shared is not None and len(metrics) > 1 and float(shared.high) > 0:
        raise InputError(
            f"{ses.ws.file.name} [search] key 'min_impact'",
            "one range for several metrics mixes their units; leave it out to solve each "
            "metric's minimum impact from 0 to its typical hourly level, or give each metric "
            "its range in [search.groups.METRIC]")
    out = {}
    for m in metrics:
        own = next((p for p in s.group_params.get(m, ()) if p.name == "min_impact"
                    and p.kind == "float"), None)
        spec = own or shared
        if spec is not None:
            out[m] = (max(float(spec.low), 0.0), max(float(spec.high), 0.0))
        else:
            out[m] = (0.0, typical_level(ses, m, end_hour))
    return out


def relative_grid() -> np.ndarray:
    """Shares of each metric's range the minimum impact is solved on: 0 and round values
    (`IMPACT_STEPS` per decade) from a thousandth to the whole range."""
    nice = [m * 10.0**d for d in range(-3, 1) for m in IMPACT_STEPS]
    return np.unique(np.r_[0.0, [v for v in nice if v <= 1.0], 1.0])


def impact_grids(ranges: dict[str, tuple[float, float]],
                 current: Sequence[dict[str, float]]) -> dict[str, np.ndarray]:
    """Per metric, its minimum impacts to solve on: level l is the same share
    (`relative_grid`) of every metric's range, at four significant digits; then one
    level per distinct `current` assignment (today's values and any warm start's), so
    those are exactly reachable."""
    shares = relative_grid()
    grids = {m: np.array([float(f"{lo + t * (hi - lo):.4g}") for t in shares])
             for m, (lo, hi) in ranges.items()}
    extra = []
    for cur in current:
        row = {m: float(cur.get(m, 0.0)) for m in ranges}
        on_grid = any(all(grids[m][lv] == row[m] for m in ranges) for lv in range(len(shares)))
        if not on_grid and row not in extra:
            extra.append(row)
    return {m: np.r_[g, [row[m] for row in extra]] for m, g in grids.items()}


def current_impacts(ses: Session, config: DetectorConfig, group: str | None) -> dict[str, float]:
    """Each metric's minimum impact under `config`, for one search group."""
    tune_by = ses.ws.search.tune_by
    level = group if tune_by == "level" and group else next(iter(ses.history.levels))
    return {m: config.for_series(level, m).min_impact for m in group_metrics(ses, group)}


def impact_label(values: dict[str, float] | None) -> str:
    """'metric=value, ...' of per-metric minimum impacts ('' for None)."""
    return ", ".join(f"{m}={v:g}" for m, v in (values or {}).items())


def _group_specs(ses: Session, group: str | None) -> list[SearchParam]:
    """Searched settings of one group: its `[search.groups.NAME]` ranges, then the shared
    `[search]` ones it does not name (defaults when `[search]` names none)."""
    s = ses.ws.search
    own = s.group_params.get(group or "", ())
    return [*own, *(p for p in s.params or default_params(ses)
                    if p.name not in {o.name for o in own})]


def solved_groups(ses: Session) -> list[str]:
    """Every group (\"\" without groups) whose minimum impact is solved per metric."""
    names = group_names(ses, ses.ws.search.tune_by) or [None]
    return [g or "" for g in names if solved_min_impact(ses, g)]


def group_names(ses: Session, tune_by: str) -> list[str]:
    if tune_by == "level":
        return list(ses.history.levels)
    if tune_by == "metric":
        return list(ses.ws.metric_names)
    if tune_by == "group":
        return [g.name for g in ses.ws.detector.groups] + [BASE_GROUP]
    return []


def group_config(base: DetectorSettings, tune_by: str, names: Sequence[str],
                 settings: dict[str, DetectorSettings],
                 named: Sequence[DetectorGroup] = ()) -> DetectorConfig:
    """A config with one group per level (or metric); with tune_by "group", the
    workspace's `named` groups (their levels and metrics) and the base for the rest."""
    if tune_by == "all":
        return DetectorConfig(base=settings[""])
    if tune_by == "group":
        return DetectorConfig(base=settings[BASE_GROUP], groups=tuple(
            replace(g, settings=settings[g.name]) for g in named))
    groups = tuple(
        DetectorGroup(
            name=g,
            levels=(g,) if tune_by == "level" else (),
            metrics=(g,) if tune_by == "metric" else (),
            settings=settings[g],
        )
        for g in names
    )
    return DetectorConfig(base=base, groups=groups)


def build_space(ses: Session) -> list[Param]:
    """Optuna parameters for the workspace's `[search]` (defaults when empty)."""
    s = ses.ws.search
    names = group_names(ses, s.tune_by)
    current = ses.ws.detector
    solved = solved_groups(ses)
    out: list[Param] = []
    for g in names or [None]:
        cur = settings_of(current, s.tune_by, g, ses)
        for spec in _group_specs(ses, g):
            if spec.name == "fence_multiplier" or (spec.name == "min_impact"
                                                    and (g or "") in solved):
                continue
            spec = _with_current(spec, getattr(cur, spec.name))
            name = spec.name if g is None else f"{g}/{spec.name}"
            out.append(Param(name=name, setting=spec.name, group=g, spec=spec))
    return out


def settings_of(config: DetectorConfig, tune_by: str, group: str | None,
                 ses: Session) -> DetectorSettings:
    if group is None:
        return config.base
    if tune_by == "group":
        own = [g.settings for g in config.groups if g.name == group]
        return own[0] if own else config.base  # a config without it: its base
    if tune_by == "level":
        return config.for_series(group, ses.ws.metric_names[0])
    return config.for_series(next(iter(ses.history.levels)), group)


def candidate_values(space: list[Param], setting: str, current: Sequence[Any]) -> list[Any] | None:
    """Every value `setting` can take in the space (None when a float/large range)."""
    vals = set(current)
    for p in space:
        if p.setting != setting:
            continue
        s = p.spec
        if s.kind == "choice":
            vals |= set(s.values)
        elif s.kind == "int" and (s.high - s.low) / max(s.step, 1) < MAX_PRECOMPUTED_WINDOWS:
            vals |= set(range(int(s.low), int(s.high) + 1, int(s.step)))
        else:
            return None
    return sorted(vals)


def params_of(config: DetectorConfig, space: list[Param], ses: Session) -> dict[str, Any]:
    """Optuna parameter values that reproduce `config` (for `enqueue_trial`)."""
    tune_by = ses.ws.search.tune_by
    return {
        p.name: getattr(settings_of(config, tune_by, p.group, ses), p.setting) for p in space
    }


def holdout_split(n_hours: int, first_hour: int, fraction: float) -> int:
    """First held-out hour: the last `fraction` of the history in whole weeks.

    At least one week is held out when the fraction asks for any, as long as a
    week of tuning hours remains after `first_hour`.
    """
    if fraction <= 0:
        return n_hours
    weeks = max(int(round(n_hours * fraction / WEEK)), 1)
    while weeks > 0 and n_hours - weeks * WEEK - first_hour < WEEK:
        weeks -= 1
    return n_hours - weeks * WEEK
