"""STL and MSTL fits as statsmodels computes them, through the compiled kernels.

`stl_config` resolves statsmodels' default smoother lengths; `stl_fit` (one series),
`stl_fit_windows` (trailing windows of one series) and `mstl_fit` return the same bits
as ``statsmodels.tsa.seasonal.STL`` / ``MSTL`` on the same machine. Each call runs the
weight-reuse kernel (`calibrate.decomposition.stl_plan`) where it covers the settings,
else the generic kernel (`calibrate.decomposition.stl_core`).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np

from calibrate.decomposition.loess import readonly, table_for
from calibrate.decomposition.stl_core import stl_one, stl_windows
from calibrate.decomposition.stl_plan import (
    build_plans,
    plan_call,
    plan_ok,
    stl_plan_one,
    stl_plan_windows,
)

__all__ = ["mstl_fit", "stl_config", "stl_fit", "stl_fit_windows"]


def stl_config(
    period: int, seasonal: int, trend: int | None = None, low_pass: int | None = None
) -> tuple[int, int]:
    """Return ``(trend, low_pass)`` as statsmodels' STL resolves them.

    Parameters
    ----------
    period, seasonal : int
        Seasonal period (>= 2) and seasonal smoother length (odd, >= 3).
    trend, low_pass : int or None
        Explicit smoother lengths; None (or 0 for `trend`) means statsmodels' default.

    Returns
    -------
    tuple of int
        ``(trend, low_pass)``; both odd and > period.
    """
    period, seasonal = int(period), int(seasonal)
    if period < 2:
        raise ValueError(f"period must be an integer >= 2, but got {period=}")
    if seasonal < 3 or seasonal % 2 == 0:
        raise ValueError(f"seasonal must be an odd integer >= 3, but got {seasonal=}")
    if trend is None or trend == 0:
        # Same expression as statsmodels (numpy ceil on the float quotient).
        trend = int(np.ceil(1.5 * period / (1 - 1.5 / seasonal)))
        trend += (trend % 2) == 0
    trend = int(trend)
    if trend < 3 or trend % 2 == 0 or trend <= period:
        raise ValueError(f"trend must be odd, >= 3 and > period, but got {trend=}")
    if low_pass is None or low_pass == 0:
        low_pass = period + 1
        low_pass += (low_pass % 2) == 0
    low_pass = int(low_pass)
    if low_pass < 3 or low_pass % 2 == 0 or low_pass <= period:
        raise ValueError(f"low_pass must be odd, >= 3 and > period, but got {low_pass=}")
    return trend, low_pass


def iterations(robust: bool, inner_iter: int | None, outer_iter: int | None) -> tuple[int, int]:
    """Inner and outer iteration counts, statsmodels' defaults where None."""
    ni = (2 if robust else 5) if inner_iter is None else int(inner_iter)
    no = (15 if robust else 0) if outer_iter is None else int(outer_iter)
    return ni, no


def _as_series(y: object) -> np.ndarray:
    arr = np.ascontiguousarray(np.squeeze(np.asarray(y, dtype=np.float64)))
    if arr.ndim != 1:
        raise ValueError(f"y must be one-dimensional, but got shape {arr.shape}")
    return readonly(arr)


def stl_fit(
    y: np.ndarray,
    period: int,
    seasonal: int,
    trend: int = 0,
    robust: bool = False,
    *,
    low_pass: int = 0,
    seasonal_deg: int = 1,
    trend_deg: int = 1,
    low_pass_deg: int = 1,
    seasonal_jump: int = 1,
    trend_jump: int = 1,
    low_pass_jump: int = 1,
    inner_iter: int | None = None,
    outer_iter: int | None = None,
    blocked: bool = True,
    reuse_weights: bool = True,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fit STL as ``statsmodels.tsa.seasonal.STL(...).fit()`` does.

    Parameters
    ----------
    y : array_like
        One-dimensional series without NaN.
    period, seasonal : int
        Seasonal period and seasonal smoother length (odd).
    trend : int
        Trend smoother length; 0 means statsmodels' default.
    robust : bool
        Robust fit (default 2 inner / 15 outer iterations instead of 5 / 0).
    low_pass, seasonal_deg, trend_deg, low_pass_deg, seasonal_jump, trend_jump, \
low_pass_jump, inner_iter, outer_iter
        statsmodels' other STL / fit parameters (0 / None = its default).
    blocked : bool
        Use the four-point interleaved LOESS (same bits; False is the plain port).
    reuse_weights : bool
        Prepare each outer iteration's LOESS weights once and reuse them (same bits,
        about 2.5x faster robust). Used when all jumps are 1 and ``len(y) >= 2*period``;
        False (or other settings) runs the `blocked` / plain kernel.

    Returns
    -------
    trend, seasonal, resid : ndarray of float64
    """
    ya = _as_series(y)
    nt, nl = stl_config(period, seasonal, trend or None, low_pass or None)
    for name, deg in (("seasonal_deg", seasonal_deg), ("trend_deg", trend_deg),
                      ("low_pass_deg", low_pass_deg)):
        if deg not in (0, 1):
            raise ValueError(f"{name} must be 0 or 1, but got {deg}")
    for name, jump in (("seasonal_jump", seasonal_jump), ("trend_jump", trend_jump),
                       ("low_pass_jump", low_pass_jump)):
        if int(jump) < 1:
            raise ValueError(f"{name} must be a positive integer, but got {jump}")
    ni, no = iterations(robust, inner_iter, outer_iter)
    if reuse_weights and plan_ok(ya.shape[0], int(period), (seasonal_jump, trend_jump,
                                                            low_pass_jump)):
        plans = build_plans(ya.shape[0], int(period), int(seasonal), nt, nl, int(seasonal_deg),
                            int(trend_deg), int(low_pass_deg))
        season, tr, _ = stl_plan_one(ya, int(period), ni, no, *plan_call(plans))
        return tr, season, ya - season - tr
    tab, toff = table_for(ya.shape[0], seasonal, nt, nl)
    season, tr, _ = stl_one(ya, int(period), int(seasonal), nt, nl, int(seasonal_deg),
                            int(trend_deg), int(low_pass_deg), int(seasonal_jump),
                            int(trend_jump), int(low_pass_jump), ni, no, tab, toff,
                            bool(blocked))
    resid = ya - season - tr
    return tr, season, resid


def stl_fit_windows(
    y: np.ndarray,
    ends: np.ndarray,
    window: int,
    period: int,
    seasonal: int,
    trend: int = 0,
    low_pass: int = 0,
    robust: bool = False,
    *,
    reuse_weights: bool = True,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fit STL on ``y[e-window+1 : e+1]`` for every ``e`` in `ends` (threads over windows).

    Parameters
    ----------
    y : ndarray of float64
        The whole series.
    ends : ndarray of int64
        Last index of each window; each must satisfy ``window-1 <= e < len(y)``.
    window, period, seasonal, trend, low_pass, robust
        Window length and STL settings (0 = statsmodels' default for trend/low_pass).
    reuse_weights : bool
        As in `stl_fit` (same bits either way).

    Returns
    -------
    trend_out, seasonal_out, resid_out : ndarray of shape (len(ends), window)
        Row i equals `stl_fit` on window i.
    """
    ya = _as_series(y)
    ends_a = np.ascontiguousarray(ends, dtype=np.int64).reshape(-1)
    window = int(window)
    if ends_a.size and (ends_a.min() < window - 1 or ends_a.max() >= ya.shape[0]):
        raise ValueError(
            f"every end must lie in [{window - 1}, {ya.shape[0] - 1}], but got "
            f"min={ends_a.min()} max={ends_a.max()}"
        )
    nt, nl = stl_config(period, seasonal, trend or None, low_pass or None)
    ni, no = iterations(robust, None, None)
    if reuse_weights and plan_ok(window, int(period), (1, 1, 1)):
        plans = build_plans(window, int(period), int(seasonal), nt, nl, 1, 1, 1)
        return stl_plan_windows(ya, ends_a, window, int(period), ni, no,
                                *plan_call(plans))
    tab, toff = table_for(window, seasonal, nt, nl)
    return stl_windows(ya, ends_a, window, int(period), int(seasonal), nt, nl, ni, no,
                       tab, toff)


def mstl_settings(
    n: int, periods: int | Sequence[int], windows: int | Sequence[int] | None
) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """Periods and seasonal windows exactly as statsmodels' MSTL processes them."""
    per = (int(periods),) if isinstance(periods, int | np.integer) else tuple(
        int(p) for p in periods)
    if windows:
        win = (int(windows),) if isinstance(windows, int | np.integer) else tuple(
            int(w) for w in windows)
        if len(per) != len(win):
            raise ValueError("periods and windows must have the same length")
        pairs = sorted(zip(per, win, strict=True))
        per = tuple(p for p, _ in pairs)
        win = tuple(w for _, w in pairs)
    else:
        win = tuple(7 + 4 * i for i in range(1, len(per) + 1))
        per = tuple(sorted(per))
    if any(p >= n / 2 for p in per):
        warnings.warn(
            "A period(s) is larger than half the length of time series. "
            "Removing these period(s).",
            UserWarning,
            stacklevel=3,
        )
        per = tuple(p for p in per if p < n / 2)
        win = win[: len(per)]
    return per, win


def mstl_fit(
    y: np.ndarray,
    periods: int | Sequence[int] = (24, 168),
    windows: int | Sequence[int] | None = None,
    robust: bool = False,
    iterate: int = 2,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fit MSTL as ``statsmodels.tsa.seasonal.MSTL(...).fit()`` does (no Box-Cox).

    Parameters
    ----------
    y : array_like
        One-dimensional series.
    periods : int or sequence of int
        Seasonal periods (sorted; periods >= len(y)/2 are dropped with a warning, as
        statsmodels does).
    windows : int, sequence of int or None
        Seasonal smoother lengths; None gives 7 + 4*i (11, 15, ...).
    robust : bool
        Robust inner STL fits.
    iterate : int
        Number of passes over the seasonal components (1 when there is one period).

    Returns
    -------
    trend : ndarray (n,)
    seasonal : ndarray (n_periods, n)
        One row per kept period, in sorted order.
    resid : ndarray (n,)
    """
    ya = _as_series(y)
    n = ya.shape[0]
    per, win = mstl_settings(n, periods, windows)
    if not per:
        raise ValueError("no period is shorter than half the series")
    iterate = 1 if len(per) == 1 else int(iterate)
    ni, no = iterations(robust, None, None)
    seasonal = np.zeros((len(per), n))
    deseas = ya
    tr = np.zeros(n)
    for _ in range(iterate):
        for i, (p, s) in enumerate(zip(per, win, strict=True)):
            deseas = deseas + seasonal[i]
            nt, nl = stl_config(p, s)
            yd = readonly(np.ascontiguousarray(deseas))
            if plan_ok(n, p, (1, 1, 1)):
                season, tr, _ = stl_plan_one(yd, p, ni, no,
                                             *plan_call(build_plans(n, p, s, nt, nl, 1, 1, 1)))
            else:
                tab, toff = table_for(n, s, nt, nl)
                season, tr, _ = stl_one(yd, p, s, nt, nl, 1, 1, 1, 1, 1, 1, ni, no, tab, toff,
                                        True)
            seasonal[i] = season
            deseas = deseas - seasonal[i]
    resid = deseas - tr
    return tr, seasonal, resid
