"""Linear-smoother matrices of non-robust STL and MSTL on a window.

Non-robust STL with fixed settings is linear in the data: ``trend = T @ y`` and
``seasonal = S @ y``. `linear_smoother` builds T and S once per setting (each column is
the fit of a unit vector, through the compiled kernels) and caches them read-only;
`calibrate.decomposition.decompose` turns every non-robust window fit of a series into
one matrix product with them.
"""

from __future__ import annotations

import functools
from typing import NamedTuple

import numpy as np

from calibrate.decomposition.loess import readonly, table_for
from calibrate.decomposition.stl import iterations, mstl_settings, stl_config
from calibrate.decomposition.stl_core import stl_rows
from calibrate.decomposition.stl_plan import build_plans, plan_call, plan_ok, stl_plan_windows

__all__ = ["LinearSmoother", "linear_smoother", "seasonal_matrix", "trend_matrix"]


class LinearSmoother(NamedTuple):
    """Matrices of a non-robust fit: ``trend = T @ y``, ``seasonal = S @ y``.

    Attributes
    ----------
    trend : ndarray (window, window)
        T; row i gives the fitted trend at position i of the window.
    seasonal : ndarray (window, window)
        S; the seasonal component (summed over periods for MSTL).
    """

    trend: np.ndarray
    seasonal: np.ndarray

    @property
    def fitted(self) -> np.ndarray:
        """M = T + S, so that ``trend + seasonal = M @ y``."""
        return self.trend + self.seasonal


def linear_smoother(
    window: int, period: int, seasonal: int, trend: int = 0, weekly: bool = False
) -> LinearSmoother:
    """Matrices of non-robust STL (or MSTL with periods (period, 7*period)) on a window.

    Non-robust STL with fixed settings is linear in the data, so column j of each
    matrix is the fit of the j-th unit vector. With ``weekly`` the fit is MSTL with
    statsmodels' default windows (`seasonal` and `trend` are then not used, as MSTL
    derives them); a weekly period >= window/2 is dropped as statsmodels does.
    Results are cached by the settings and read-only.

    Returns
    -------
    LinearSmoother
        ``(trend, seasonal)`` matrices of shape (window, window).
    """
    if weekly:
        return _smoother(int(window), int(period), 0, 0, True)
    nt, _ = stl_config(period, seasonal, trend or None)
    return _smoother(int(window), int(period), int(seasonal), nt, False)


@functools.lru_cache(maxsize=16)
def _smoother(window: int, period: int, seasonal: int, trend: int, weekly: bool
              ) -> LinearSmoother:
    eye = np.eye(window)
    if weekly:
        per, win = mstl_settings(window, (int(period), 7 * int(period)), None)
        cols_t, cols_s = _mstl_rows(eye, per, win)
    else:
        nt, nl = stl_config(period, seasonal, trend or None)
        cols_t, cols_s = _rows_fit(eye, int(period), int(seasonal), nt, nl)
    # Row r of cols_* is the fit of unit vector r, i.e. column r of the matrix.
    t_mat = np.ascontiguousarray(cols_t.T)
    s_mat = np.ascontiguousarray(cols_s.T)
    t_mat.flags.writeable = False
    s_mat.flags.writeable = False
    return LinearSmoother(t_mat, s_mat)


def _mstl_rows(ys: np.ndarray, per: tuple[int, ...], win: tuple[int, ...]
               ) -> tuple[np.ndarray, np.ndarray]:
    """Non-robust MSTL (iterate=2) of each row of `ys`; returns (trend, summed seasonal)."""
    iterate = 1 if len(per) == 1 else 2
    seasonal = np.zeros((len(per),) + ys.shape)
    deseas = ys
    tr = np.zeros_like(ys)
    for _ in range(iterate):
        for i, (p, s) in enumerate(zip(per, win, strict=True)):
            deseas = deseas + seasonal[i]
            nt, nl = stl_config(p, s)
            tr, season = _rows_fit(deseas, p, s, nt, nl)
            seasonal[i] = season
            deseas = deseas - seasonal[i]
    return tr, seasonal.sum(axis=0)


def _rows_fit(ys: np.ndarray, period: int, seasonal: int, nt: int, nl: int
              ) -> tuple[np.ndarray, np.ndarray]:
    """Non-robust STL (default degrees, jumps 1) of each row of `ys`: (trend, seasonal).

    Through the weight-reuse kernel when it covers the rows (same bits as `stl_rows`,
    and the replay's other fits compile it anyway), else through `stl_rows`.
    """
    ni, no = iterations(False, None, None)
    nr, n = ys.shape
    if plan_ok(n, period, (1, 1, 1)):
        flat = readonly(np.ascontiguousarray(ys, dtype=np.float64).reshape(-1))
        ends = np.arange(n - 1, nr * n, n, dtype=np.int64)
        plans = build_plans(n, period, seasonal, nt, nl, 1, 1, 1)
        tr, season, _ = stl_plan_windows(flat, ends, n, period, ni, no, *plan_call(plans))
        return tr, season
    tab, toff = table_for(n, seasonal, nt, nl)
    return stl_rows(readonly(np.ascontiguousarray(ys, dtype=np.float64)), period, seasonal,
                    nt, nl, ni, no, tab, toff)


def trend_matrix(window: int, period: int, seasonal: int, trend: int = 0,
                 weekly: bool = False) -> np.ndarray:
    """T of `linear_smoother` (cached, read-only)."""
    return linear_smoother(window, period, seasonal, trend, weekly).trend


def seasonal_matrix(window: int, period: int, seasonal: int, trend: int = 0,
                    weekly: bool = False) -> np.ndarray:
    """S of `linear_smoother` (cached, read-only)."""
    return linear_smoother(window, period, seasonal, trend, weekly).seasonal
