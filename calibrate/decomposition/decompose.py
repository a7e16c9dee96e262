"""Remainder streams: STL on trailing windows, hour by hour (pipeline stage 3).

For one series and one set of decomposition settings, `remainder_stream` returns,
for every replayed hour t, the expected value, the remainder and the quartiles of
the W remainders the detector sees just before t, for a whole grid of fence
windows W at once. That is everything the fences need, so trials that change only
the fence window, multiplier, sides or minimum impact never refit.

Two fit providers give identical flags: the linear-smoother path (non-robust fits,
every fitted value a fixed weighted sum of the window, so all fits of a series are
one matrix product) and the compiled STL kernel (robust fits).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numba
import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from calibrate.decomposition import smoother, stl
from calibrate.settings import DetectorSettings

MIN_FENCE_VALUES = 4  # fewer usable remainders in a fence window: no score


@dataclass
class Stream:
    """Per-hour decomposition results of one series (arrays of length n).

    Hours before the first replayed hour (L-1) and hours whose value is undefined
    hold NaN in `remainder`; `q1[W]`, `q3[W]` are NaN where fewer than
    `MIN_FENCE_VALUES` usable remainders were in the window.
    """

    expected: np.ndarray
    remainder: np.ndarray
    q1: dict[int, np.ndarray]
    q3: dict[int, np.ndarray]


def _fill_window(window: np.ndarray) -> np.ndarray | None:
    """Linear interpolation of NaN hours inside one fit window (edges held).

    Reads only the window's own hours, none after its last: causal.
    """
    ok = ~np.isnan(window)
    if ok.all():
        return window
    if not ok.any():
        return None
    x = np.arange(len(window))
    out = window.copy()
    out[~ok] = np.interp(x[~ok], x[ok], window[ok])
    return out


def _repeat_period(s: DetectorSettings) -> int:
    """Period the seasonal is repeated at between refits (the summed seasonal of a
    weekly fit repeats weekly)."""
    return 7 * s.period_hours if s.weekly_period else s.period_hours


ROW_BLOCK = 512


def _rows_times(rows: np.ndarray, m: np.ndarray) -> np.ndarray:
    """``rows @ m`` in blocks of `ROW_BLOCK` rows, the last one padded with zeros.

    A BLAS product may sum in another order for another number of rows, so a window's
    fit would differ in its last bits between a history and the same history cut
    short; every product here has one shape, so each row's result depends on that row
    alone and a replay of a cut history gives the same bits up to the cut.
    """
    n = rows.shape[0]
    out = np.empty((n, m.shape[1]))
    block = np.zeros((ROW_BLOCK, rows.shape[1]))
    for i in range(0, n, ROW_BLOCK):
        k = min(ROW_BLOCK, n - i)
        if k == ROW_BLOCK:
            out[i : i + k] = rows[i : i + k] @ m
        else:
            block[:k] = rows[i : i + k]
            block[k:] = 0.0
            out[i : i + k] = (block @ m)[:k]
    return out


def _fit_windows(windows: np.ndarray, s: DetectorSettings, tail: int):
    """Fit each row of `windows`.

    Returns the level at the last point, the seasonal tails to repeat between
    refits as (period, last `tail` points) pairs, and the remainder tails; the
    expected value `o` hours after a refit is the level plus each seasonal tail
    one period-multiple back.
    """
    L = windows.shape[1]
    period = _repeat_period(s)
    if not s.robust and s.refit_every_hours == 1:
        # every hour is a refit: the level is trend + seasonal, nothing is repeated
        fitted_tail = _rows_times(windows, _linear_fitted(L, s)[L - tail :].T)
        return fitted_tail[:, -1], [], windows[:, L - tail :] - fitted_tail
    if not s.robust:
        trend_m, seas_ms = _linear_parts(L, s)
        seas = [_rows_times(windows, m[L - tail :].T) for m in seas_ms]
        fitted_tail = _rows_times(windows, trend_m[L - tail :].T) + sum(seas)
        resid = windows[:, L - tail :] - fitted_tail
        level = _rows_times(windows, trend_m[L - 1][:, None])[:, 0]
        return level, [(period, sc) for sc in seas], resid
    trend, seasonal, resid = _fit_many(windows, s)
    seas = [(period, c[:, L - tail :]) for c in seasonal]
    return trend[:, L - 1], seas, resid[:, L - tail :]


def remainder_stream(y: np.ndarray, s: DetectorSettings, fence_windows: tuple[int, ...]) -> Stream:
    """Replay one series through the decomposition and compute fence quartiles.

    Parameters
    ----------
    y : ndarray
        Hourly values, NaN where undefined (interpolated for the fits only).
    s : DetectorSettings
        Only the decomposition settings and `quartile_method` are used.
    fence_windows : tuple of int
        Every fence window W to compute quartiles for (each < L).
    """
    y = np.asarray(y, dtype=np.float64)
    if s.expected_value == "forecast":
        return _forecast_stream(y, s, fence_windows)
    n = len(y)
    L, h = s.decomposition_window_hours, s.refit_every_hours
    wmax = max(fence_windows)
    tail = max(wmax + 1, _repeat_period(s)) if h > 1 else wmax + 1
    tail = min(tail, L)
    expected = np.full(n, np.nan)
    remainder = np.full(n, np.nan)
    q1 = {w: np.full(n, np.nan) for w in fence_windows}
    q3 = {w: np.full(n, np.nan) for w in fence_windows}
    if n < L:
        return Stream(expected, remainder, q1, q3)
    valid = ~np.isnan(y)
    refits = np.arange(L - 1, n, h)
    windows, usable = _windows(y, valid, refits, L)
    trend_last, seas, resid = _fit_windows(windows, s, tail)
    # stream[j, c]: the remainder the detector holds for hour t_j - wmax + c
    hours = np.arange(L - 1, n)
    n_rep = len(hours)
    fit_of = (hours - (L - 1)) // h
    offset = hours - refits[fit_of]  # hours since the last refit
    if h == 1:
        # every hour is a refit: the stream is the fit's own in-sample remainders
        stream = resid[:, :wmax]
    else:
        # idx[j, c]: the hour whose remainder sits at stream[j, c]
        idx = hours[:, None] - wmax + np.arange(wmax)[None, :]
        stream = _in_sample_stream(resid, refits[fit_of][:, None], idx, fit_of, tail)
    # expected values: refit hours from the fit, others extrapolated
    exp = trend_last[fit_of].copy()
    for p, sc in seas:
        lag = p * np.ceil(offset / p).astype(np.int64)
        col = tail - 1 + offset - lag
        exp = exp + sc[fit_of, col]
    exp[~usable[fit_of]] = np.nan
    expected[hours] = exp
    remainder[hours] = np.where(valid[hours], y[hours] - exp, np.nan)
    if h > 1:
        # out-of-sample part: hours t0 < i < t use remainder_i (known only now)
        outs = idx > refits[fit_of][:, None]
        stream[outs] = remainder[idx[outs]]
    # masked hours leave the fence windows: hour i sits at column c = i - t_j + wmax of
    # the rows whose hour t_j is in (i, i + wmax]
    c = np.arange(wmax)
    rows = np.flatnonzero(~valid)[:, None] + wmax - c[None, :] - (L - 1)
    keep = (rows >= 0) & (rows < n_rep)
    stream[rows[keep], np.broadcast_to(c, rows.shape)[keep]] = np.nan
    stream[~usable[fit_of]] = np.nan
    for w in fence_windows:
        block = stream[:, wmax - w :]
        a, b = _quartiles(block, s.quartile_method)
        q1[w][hours] = a
        q3[w][hours] = b
    return Stream(expected, remainder, q1, q3)


def _windows(y: np.ndarray, valid: np.ndarray, refits: np.ndarray, L: int):
    """The fit windows ending at each refit hour, gaps filled inside each window only,
    and which windows could be fitted at all (not every hour missing)."""
    starts = refits - (L - 1)
    # fancy indexing copies: `windows` is a fresh C-contiguous array, safe to fill in place
    windows = sliding_window_view(y, L)[starts]
    missing = np.concatenate(([0], np.cumsum(~valid)))
    bad = missing[starts + L] > missing[starts]
    usable = np.ones(len(refits), dtype=bool)
    for i in np.flatnonzero(bad):
        filled = _fill_window(windows[i])
        if filled is None:
            usable[i] = False
            windows[i] = 0.0
        else:
            windows[i] = filled
    return windows, usable


def _forecast_stream(y: np.ndarray, s: DetectorSettings,
                     fence_windows: tuple[int, ...]) -> Stream:
    """`remainder_stream` with ``expected_value = "forecast"``.

    Fits end at t0 = L-1, L-1+h, ... as in `fit` mode, but hour t takes its expected
    value from the last fit ending before t (offset o = t - t0 in 1..h): the trend at
    t0 plus the seasonal value at t - R*ceil(o/R) (R the repeat period). The fence
    window of hour t is the W forecast remainders of hours t-W .. t-1, so hours from
    L (first forecast) and scores from L + W.
    """
    n = len(y)
    L, h = s.decomposition_window_hours, s.refit_every_hours
    R = _repeat_period(s)
    expected = np.full(n, np.nan)
    remainder = np.full(n, np.nan)
    q1 = {w: np.full(n, np.nan) for w in fence_windows}
    q3 = {w: np.full(n, np.nan) for w in fence_windows}
    if n <= L:
        return Stream(expected, remainder, q1, q3)
    valid = ~np.isnan(y)
    refits = np.arange(L - 1, n - 1, h)  # a fit ending at n-1 would forecast nothing
    windows, usable = _windows(y, valid, refits, L)
    hours = np.arange(L, n)
    fit_of = (hours - L) // h
    if not s.robust and h == 1:
        # the forecast is one more row of the smoother: trend at L-1 + seasonal at L-R
        exp = _rows_times(windows, _forecast_row(L, s)[:, None])[:, 0]
    else:
        if not s.robust:
            trend_m, seas_ms = _linear_parts(L, s)
            trend_last = _rows_times(windows, trend_m[L - 1][:, None])[:, 0]
            seas = [_rows_times(windows, m[L - R :].T) for m in seas_ms]
        else:
            trend, seasonal, _ = _fit_many(windows, s)
            trend_last = trend[:, L - 1]
            seas = [c[:, L - R :] for c in seasonal]
        offset = hours - refits[fit_of]
        col = R - 1 + offset - R * np.ceil(offset / R).astype(np.int64)
        exp = trend_last[fit_of]
        for sc in seas:
            exp = exp + sc[fit_of, col]
    exp[~usable[fit_of]] = np.nan
    expected[hours] = exp
    remainder[hours] = np.where(valid[hours], y[hours] - exp, np.nan)
    # fence rows: hour t holds remainder[t - wmax .. t - 1] (undefined hours are NaN)
    wmax, wmin = max(fence_windows), min(fence_windows)
    if n <= L + wmin:
        return Stream(expected, remainder, q1, q3)
    scored = np.arange(L + wmin, n)
    stream = sliding_window_view(remainder, wmax)[scored - wmax]
    for w in fence_windows:
        a, b = _quartiles(stream[w - wmin :, wmax - w :], s.quartile_method)
        q1[w][L + w :] = a
        q3[w][L + w :] = b
    return Stream(expected, remainder, q1, q3)


def _in_sample_stream(resid, t0, idx, fit_of, tail):
    """Fence stream part known at the last refit t0 when refitting every h > 1 hours:
    hour i <= t0 sits in that fit's remainder tail at column tail-1-(t0-i)."""
    stream = np.full(idx.shape, np.nan)
    col = tail - 1 - (t0 - idx)
    sel = (idx <= t0) & (col >= 0)
    rows = np.broadcast_to(fit_of[:, None], sel.shape)
    stream[sel] = resid[rows[sel], col[sel]]
    return stream


def _quartiles(block: np.ndarray, method: str) -> tuple[np.ndarray, np.ndarray]:
    """Q1, Q3 of each row's non-NaN values, exactly as numpy.percentile gives them.

    Rows with fewer than `MIN_FENCE_VALUES` values get NaN. The default `linear`
    method sorts the rows with `numpy.sort` (vectorised; NaN sort last) and reads
    numpy's linear interpolation from the sorted values in a compiled loop (same
    order statistics, same arithmetic, so the same values as numpy.percentile);
    other methods go through numpy itself.
    """
    if method == "linear":
        return _quartiles_sorted(np.sort(block, axis=1), MIN_FENCE_VALUES)
    nan = np.isnan(block)
    counts = block.shape[1] - nan.sum(axis=1)
    q = np.full((2, block.shape[0]), np.nan)
    full = counts == block.shape[1]
    if full.any():
        q[:, full] = np.percentile(block[full], [25.0, 75.0], axis=1, method=method)
    partial = np.flatnonzero(~full & (counts >= MIN_FENCE_VALUES))
    for r in partial:
        row = block[r]
        q[:, r] = np.percentile(row[~np.isnan(row)], [25.0, 75.0], method=method)
    return q[0], q[1]


@numba.njit(cache=True)
def _lerp(a, b, g):
    # numpy's _lerp, same operations
    d = b - a
    if g >= 0.5:
        return b - d * (1 - g)
    return a + d * g


@numba.njit(cache=True)
def _pick(srt, r, m, q):
    """numpy's `linear` percentile q of the first m (sorted) values of row r."""
    v = (m - 1) * q
    prev = int(np.floor(v))
    a = srt[r, prev]
    b = srt[r, prev + 1] if prev + 1 < m else a
    return _lerp(a, b, v - prev)


@numba.njit(cache=True)
def _quartiles_sorted(srt, min_count):
    """Q1 and Q3 of rows sorted ascending with NaN last (`numpy.sort` order)."""
    n, w = srt.shape
    q1 = np.full(n, np.nan)
    q3 = np.full(n, np.nan)
    for r in range(n):
        m = w
        while m > 0 and np.isnan(srt[r, m - 1]):
            m -= 1
        if m < min_count:
            continue
        q1[r] = _pick(srt, r, m, 0.25)
        q3[r] = _pick(srt, r, m, 0.75)
    return q1, q3


def fence_scores(remainder: np.ndarray, q1: np.ndarray, q3: np.ndarray, sides: str) -> np.ndarray:
    """Fence score per hour: how many IQRs beyond the nearer watched quartile.

    NaN where there is no score (no remainder or no quartiles). With IQR = 0 a
    remainder beyond a watched quartile scores +inf and any other scores 0.
    Arrays of any (equal) shape; one compiled pass without temporaries.
    """
    r, a, b = np.broadcast_arrays(*(np.asarray(x, dtype=np.float64) for x in (remainder, q1, q3)))
    code = {"up": 1, "down": 2, "both": 3}[sides]
    out = np.empty(r.shape)
    _fence_kernel(np.ascontiguousarray(r).ravel(), np.ascontiguousarray(a).ravel(),
                  np.ascontiguousarray(b).ravel(), code, out.reshape(-1))
    return out


@numba.njit(cache=True, error_model="numpy")
def _fence_kernel(r, q1, q3, sides, out):
    for i in range(r.shape[0]):
        x, lo, hi = r[i], q1[i], q3[i]
        if np.isnan(x) or np.isnan(lo) or np.isnan(hi):
            out[i] = np.nan
            continue
        iqr = hi - lo
        if iqr == 0:
            up = np.inf if x > hi else 0.0
            down = np.inf if x < lo else 0.0
        else:
            up = (x - hi) / iqr
            down = (lo - x) / iqr
        if sides == 1:
            out[i] = up
        elif sides == 2:
            out[i] = down
        elif np.isnan(up) or np.isnan(down):  # as np.maximum (inf - inf quartiles)
            out[i] = np.nan
        else:
            out[i] = up if up >= down else down


def _fit_one(y: np.ndarray, s: DetectorSettings):
    """One fit with the compiled kernel: trend, [seasonal], remainder."""
    if s.weekly_period:
        trend, seas, resid = stl.mstl_fit(
            y, periods=(s.period_hours, 7 * s.period_hours), robust=s.robust
        )
        seas = np.asarray(seas)
        total = seas.sum(axis=1) if seas.ndim == 2 else seas
        return trend, [total], resid
    trend, seas, resid = stl.stl_fit(
        y, s.period_hours, s.seasonal_span, s.trend_span, s.robust
    )
    return trend, [seas], resid


def _fit_many(windows: np.ndarray, s: DetectorSettings):
    n, L = windows.shape
    if not s.weekly_period:
        # all windows laid end to end: one compiled call, no copies
        flat = np.ascontiguousarray(windows).reshape(-1)
        ends = np.arange(L - 1, n * L, L, dtype=np.int64)
        trend, seas, resid = stl.stl_fit_windows(
            flat, ends, L, s.period_hours, s.seasonal_span, s.trend_span, 0, s.robust
        )
        return trend, [seas], resid
    trend = np.empty((n, L))
    seas = np.empty((n, L))
    resid = np.empty((n, L))
    for i in range(n):
        t, sc, r = _fit_one(windows[i], s)
        trend[i], seas[i], resid[i] = t, sc[0], r
    return trend, [seas], resid


def _linear_parts(L: int, s: DetectorSettings) -> tuple[np.ndarray, list[np.ndarray]]:
    """Matrices T, S with trend = T @ y and seasonal = S @ y for a window y (cached)."""
    sm = smoother.linear_smoother(
        L, s.period_hours, s.seasonal_span, s.trend_span, s.weekly_period
    )
    return sm.trend, [sm.seasonal]


def _linear_fitted(L: int, s: DetectorSettings) -> np.ndarray:
    """Matrix F with trend + seasonal = F @ y for a window y (cached)."""
    return _fitted_matrix(L, s.period_hours, s.seasonal_span, s.trend_span, s.weekly_period)


def _forecast_row(L: int, s: DetectorSettings) -> np.ndarray:
    """Vector f with the one-hour-ahead forecast = f @ y for a window y (cached)."""
    return _forecast_vector(L, s.period_hours, s.seasonal_span, s.trend_span, s.weekly_period)


@functools.lru_cache(maxsize=16)
def _forecast_vector(L: int, period: int, seasonal: int, trend: int, weekly: bool) -> np.ndarray:
    sm = smoother.linear_smoother(L, period, seasonal, trend, weekly)
    lag = 7 * period if weekly else period
    return np.ascontiguousarray(sm.trend[L - 1] + sm.seasonal[L - lag])


@functools.lru_cache(maxsize=16)
def _fitted_matrix(L: int, period: int, seasonal: int, trend: int, weekly: bool) -> np.ndarray:
    return np.ascontiguousarray(
        smoother.linear_smoother(L, period, seasonal, trend, weekly).fitted
    )
