"""A config as one flat table (stage 9): what another detector needs to apply it.

`tuned.toml` stores group tables as differences from the base table, matched to series
in order, and a metric's minimum impact as an entry of a table. `settings_table`
resolves them: one row per level and watched metric with the settings its series are
replayed with, every setting spelled out, plus the STL smoother lengths and iteration
counts statsmodels resolves from them (docs/detector.md, "Detector semantics"). The
report folder holds it as ``settings.csv``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import pandas as pd

from calibrate.decomposition.stl import iterations, mstl_settings, stl_config
from calibrate.settings import DetectorConfig, DetectorSettings

#: columns of the table, in order
COLUMNS = (
    "level", "metric", "group",
    *(f.name for f in dataclasses.fields(DetectorSettings) if f.name != "min_impact_per_metric"),
    "stl_periods", "stl_seasonal_spans", "stl_trend_spans", "stl_low_pass_spans",
    "stl_inner_iterations", "stl_outer_iterations", "stl_passes",
)


def stl_lengths(s: DetectorSettings) -> dict[str, str]:
    """The periods, smoother lengths and iteration counts the fits of `s` use, as
    statsmodels resolves them (space-separated, one entry per seasonal component: with
    `weekly_period` MSTL derives its own seasonal spans and makes two passes over the
    components)."""
    if s.weekly_period:
        periods, spans = mstl_settings(
            s.decomposition_window_hours, (s.period_hours, 7 * s.period_hours), None)
    else:
        periods, spans = (s.period_hours,), (s.seasonal_span,)
    trend_low = [stl_config(p, w, None if s.weekly_period else s.trend_span or None)
                 for p, w in zip(periods, spans, strict=True)]
    inner, outer = iterations(s.robust, None, None)

    def text(values: Sequence[int]) -> str:
        return " ".join(str(v) for v in values)

    return {
        "stl_periods": text(periods),
        "stl_seasonal_spans": text(spans),
        "stl_trend_spans": text([t for t, _ in trend_low]),
        "stl_low_pass_spans": text([lp for _, lp in trend_low]),
        "stl_inner_iterations": str(inner),
        "stl_outer_iterations": str(outer),
        "stl_passes": str(2 if len(periods) > 1 else 1),
    }


def settings_table(config: DetectorConfig, levels: Sequence[str],
                   metrics: Sequence[str]) -> pd.DataFrame:
    """One row per level and watched metric: the settings its series are replayed with.

    Parameters
    ----------
    config : DetectorConfig
        The settings (base table and ordered groups).
    levels, metrics : sequence of str
        The workspace's levels and watched metrics, in its order.

    Returns
    -------
    pandas.DataFrame
        Columns `COLUMNS`: the level and metric, the group whose settings apply (the
        first matching one, as in a replay; ``base`` when none matches), every setting
        (`min_impact` the metric's own, in its units) and the STL lengths of
        `stl_lengths`.
    """
    rows = []
    for level in levels:
        for metric in metrics:
            group = next((g for g in config.groups if g.matches(level, metric)), None)
            settings = config.base if group is None else group.settings
            values = dataclasses.asdict(settings)
            values.pop("min_impact_per_metric")
            values["min_impact"] = settings.impact_for(metric)
            rows.append({"level": level, "metric": metric,
                         "group": "base" if group is None else group.name,
                         **values, **stl_lengths(settings)})
    return pd.DataFrame(rows, columns=list(COLUMNS))


def settings_csv(config: DetectorConfig, levels: Sequence[str], metrics: Sequence[str]
                 ) -> bytes:
    """`settings_table` as CSV bytes (floats written in full, as in tuned.toml)."""
    return settings_table(config, levels, metrics).to_csv(index=False).encode("utf-8")
