"""Detectors on top of the remainder stream, their combination, and episodes.

Pipeline stage 4. The fence detector flags an hour when its fence score exceeds
the multiplier k; the flatline detector flags an hour when the value has not
changed for `flatline_hours` hours while the expected value moved by more than the
fence IQR over those hours. An hour is flagged when at least `min_detectors`
detectors flag it; consecutive flagged hours form one episode.

Because the fence flags for every k are a threshold on one score array, the
episodes for a whole grid of multipliers come out of one compiled pass
(`episodes_grid`), with no replay.
"""

from __future__ import annotations

import numba
import numpy as np

FENCE_BIT = 1
FLATLINE_BIT = 2


def flatline_flags(
    value: np.ndarray, expected: np.ndarray, iqr: np.ndarray, hours: int
) -> np.ndarray:
    """Sustained-flat detector for (n_series, n_hours) arrays (or one series).

    Hour t is flagged when value[t-hours+1 .. t] are all equal (and defined) and
    the expected values over those hours span more than the fence IQR at t.
    Uses only hours up to t (no look-ahead).
    """
    value = np.atleast_2d(value)
    expected = np.atleast_2d(expected)
    iqr = np.atleast_2d(iqr)
    out = np.zeros(value.shape, dtype=bool)
    if hours < 2 or value.shape[1] < hours:
        return out
    _flatline_kernel(value, expected, iqr, hours, out)
    return out


@numba.njit(cache=True)
def _flatline_kernel(value, expected, iqr, hours, out):
    n_s, n = value.shape
    for s in range(n_s):
        run = 0
        for t in range(n):
            v = value[s, t]
            if np.isnan(v):
                run = 0
                continue
            if run > 0 and v == value[s, t - 1]:
                run += 1
            else:
                run = 1
            if run >= hours and not np.isnan(iqr[s, t]):
                lo = np.inf
                hi = -np.inf
                ok = True
                for j in range(t - hours + 1, t + 1):
                    e = expected[s, j]
                    if np.isnan(e):
                        ok = False
                        break
                    lo = min(lo, e)
                    hi = max(hi, e)
                if ok and hi - lo > iqr[s, t]:
                    out[s, t] = True


@numba.njit(cache=True)
def _episodes_kernel(score, flat, value, expected, ks, min_det, fill, out_i, out_f):
    """Scan every series for every multiplier; when `fill` is False only count."""
    n_s, n = score.shape
    m = 0
    for g in range(len(ks)):
        k = ks[g]
        for s in range(n_s):
            start = -1
            peak_h = -1
            peak = -np.inf
            vsum = 0.0
            esum = 0.0
            bits = 0
            for t in range(n + 1):
                f = False
                b = 0
                if t < n:
                    sc = score[s, t]
                    cnt = 0
                    if sc > k:  # NaN compares False: unscored hours never flag
                        cnt += 1
                        b |= 1
                    if flat[s, t]:
                        cnt += 1
                        b |= 2
                    f = cnt >= min_det
                if f:
                    if start < 0:
                        start = t
                        peak_h = t
                        peak = -np.inf
                        vsum = 0.0
                        esum = 0.0
                        bits = 0
                    sc = score[s, t]
                    if not np.isnan(sc) and sc > peak:
                        peak = sc
                        peak_h = t
                    vsum += value[s, t]
                    esum += expected[s, t]
                    bits |= b
                elif start >= 0:
                    if fill:
                        out_i[m, 0] = g
                        out_i[m, 1] = s
                        out_i[m, 2] = start
                        out_i[m, 3] = t
                        out_i[m, 4] = peak_h
                        out_i[m, 5] = bits
                        out_f[m, 0] = peak if peak > -np.inf else np.nan
                        out_f[m, 1] = vsum
                        out_f[m, 2] = esum
                    m += 1
                    start = -1
    return m


def episodes_grid(
    score: np.ndarray,
    flat: np.ndarray,
    value: np.ndarray,
    expected: np.ndarray,
    ks: np.ndarray,
    min_detectors: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Episodes of (n_series, n_hours) arrays for every multiplier in `ks`.

    Returns
    -------
    ints : ndarray (m, 6) of int64
        grid index, series, start, end (exclusive), peak hour, detector bits.
    floats : ndarray (m, 3) of float64
        peak fence score, sum of values, sum of expected values.
    The `min_impact` filter is not applied here (it does not change flags).
    """
    score = np.ascontiguousarray(np.atleast_2d(score), dtype=np.float64)
    flat = np.ascontiguousarray(np.atleast_2d(flat), dtype=np.bool_)
    value = np.ascontiguousarray(np.atleast_2d(value), dtype=np.float64)
    expected = np.ascontiguousarray(np.atleast_2d(expected), dtype=np.float64)
    ks = np.ascontiguousarray(np.atleast_1d(ks), dtype=np.float64)
    dummy_i = np.empty((0, 6), dtype=np.int64)
    dummy_f = np.empty((0, 3), dtype=np.float64)
    m = _episodes_kernel(score, flat, value, expected, ks, min_detectors, False, dummy_i, dummy_f)
    ints = np.empty((m, 6), dtype=np.int64)
    floats = np.empty((m, 3), dtype=np.float64)
    _episodes_kernel(score, flat, value, expected, ks, min_detectors, True, ints, floats)
    return ints, floats


def detector_names(bits: np.ndarray) -> np.ndarray:
    """'+'-joined detector names for detector bit masks."""
    table = np.array(["", "fence", "flatline", "fence+flatline"], dtype=object)
    return table[np.asarray(bits, dtype=np.int64) & 3]
