"""Exactness of the replay against the plain reference loop built here.

Reference (the detector semantics of docs/detector.md, written out literally): for every
hour t, statsmodels' STL fitted on the trailing window at the last refit hour,
expected value from that fit, and numpy.percentile over the W remainders the
detector holds just before t. statsmodels and numpy are the outside references.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.tsa.seasonal import MSTL, STL

from calibrate.decomposition.decompose import MIN_FENCE_VALUES, fence_scores, remainder_stream
from calibrate.settings import DetectorSettings


def _fence_score(stream, r, method):
    """The fence score of remainder r against the quartiles of `stream` (both sides)."""
    q1, q3 = np.percentile(stream, [25, 75], method=method)
    iqr = q3 - q1
    if iqr == 0:
        return math.inf if (r > q3 or r < q1) else 0.0
    return max((r - q3) / iqr, (q1 - r) / iqr)


def _reference_fit(y, t0, L, P, s, trend_arg):
    """statsmodels' STL (MSTL with a weekly period) on the window ending at t0, its
    undefined hours linearly interpolated inside the window."""
    win = y[t0 - L + 1 : t0 + 1].copy()
    ok = ~np.isnan(win)
    x = np.arange(L)
    win[~ok] = np.interp(x[~ok], x[ok], win[ok])
    if s.weekly_period:
        return MSTL(win, periods=(P, 7 * P), stl_kwargs={"robust": s.robust}).fit()
    return STL(win, period=P, seasonal=s.seasonal_span, trend=trend_arg, robust=s.robust).fit()

def reference_loop(y, s: DetectorSettings, W: int, k: float):
    """Plain per-hour loop: statsmodels STL + numpy percentiles, no shortcuts."""
    n, L, h, P = len(y), s.decomposition_window_hours, s.refit_every_hours, s.period_hours
    trend_arg = None if s.trend_span == 0 else s.trend_span
    out_exp, out_score, out_flag = {}, {}, {}
    valid = ~np.isnan(y)
    rem = {}
    fit = None
    for t in range(L - 1, n):
        if (t - (L - 1)) % h == 0:
            t0 = t
            fit = _reference_fit(y, t0, L, P, s, trend_arg)
        trend, seas, resid = fit.trend, fit.seasonal, fit.resid
        if seas.ndim == 2:
            seas = seas.sum(axis=1)
        # with a weekly component the summed seasonal repeats weekly
        R = 7 * P if s.weekly_period else P
        if t == t0:
            e = trend[L - 1] + seas[L - 1]
        else:
            e = trend[L - 1] + seas[L - 1 + (t - t0) - R * math.ceil((t - t0) / R)]
        out_exp[t] = e
        rem[t] = y[t] - e if valid[t] else np.nan
        stream = []
        for i in range(t - W, t):
            if not valid[i]:
                continue
            stream.append(resid[i - (t0 - L + 1)] if i <= t0 else rem[i])
        if not valid[t] or len(stream) < MIN_FENCE_VALUES:
            out_score[t], out_flag[t] = np.nan, False
            continue
        sc = _fence_score(stream, rem[t], s.quartile_method)
        out_score[t], out_flag[t] = sc, sc > k
    return out_exp, out_score, out_flag


def forecast_reference_loop(y, s: DetectorSettings, windows: tuple[int, ...], k: float):
    """Plain per-hour loop for ``expected_value = "forecast"`` (README, "The detector,
    exactly"): the expected value at hour t comes from the last fit ending before t,
    and the fence window holds the W forecast remainders of the hours before t.
    Scores and flags are given per fence window W of `windows`."""
    n, L, h, P = len(y), s.decomposition_window_hours, s.refit_every_hours, s.period_hours
    trend_arg = None if s.trend_span == 0 else s.trend_span
    R = 7 * P if s.weekly_period else P  # the summed seasonal of a weekly fit repeats weekly
    valid = ~np.isnan(y)
    fits = {}
    out_exp, rem = {}, {}
    out_score = {W: {} for W in windows}
    out_flag = {W: {} for W in windows}
    for t in range(L, n):
        t0 = max(range(L - 1, t, h))  # the last refit hour before t
        if t0 not in fits:
            fit = _reference_fit(y, t0, L, P, s, trend_arg)
            seas = fit.seasonal if fit.seasonal.ndim == 1 else fit.seasonal.sum(axis=1)
            fits[t0] = (fit.trend, seas)
        trend, seas = fits[t0]
        o = t - t0
        e = trend[L - 1] + seas[L - 1 + o - R * math.ceil(o / R)]
        out_exp[t] = e
        rem[t] = y[t] - e if valid[t] else np.nan
    for W in windows:
        for t in range(L, n):
            stream = [rem[i] for i in range(t - W, t) if i >= L and valid[i]]
            if t < L + W or not valid[t] or len(stream) < MIN_FENCE_VALUES:
                out_score[W][t], out_flag[W][t] = np.nan, False
                continue
            sc = _fence_score(stream, rem[t], s.quartile_method)
            out_score[W][t], out_flag[W][t] = sc, sc > k
    return out_exp, out_score, out_flag


def _series(n, seed, zeros=False, gaps=False):
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    y = 100 + 30 * np.sin(2 * np.pi * t / 24) + 0.05 * t + rng.normal(0, 4, n)
    y[rng.integers(0, n, 5)] += rng.choice([-60, 60], 5)
    if zeros:
        y = np.where((t % 24) < 8, 0.0, np.round(np.maximum(y - 60, 0)))
    if gaps:
        y[rng.integers(0, n, 12)] = np.nan
    return y


CASES = [
    dict(robust=False, refit_every_hours=1),
    dict(robust=True, refit_every_hours=1),
    dict(robust=False, refit_every_hours=5),
    dict(robust=True, refit_every_hours=7),
]


@pytest.mark.parametrize("case", CASES)
@pytest.mark.parametrize("kind", ["smooth", "zeros", "gaps"])
def test_stream_matches_reference_loop(case, kind):
    s = DetectorSettings(
        decomposition_window_hours=96,
        fence_window_hours=40,
        period_hours=24,
        seasonal_span=7,
        fence_multiplier=1.5,
        **case,
    )
    y = _series(96 + 80, seed=3, zeros=kind == "zeros", gaps=kind == "gaps")
    ref_exp, ref_score, ref_flag = reference_loop(y, s, 40, 1.5)
    st = remainder_stream(y, s, (24, 40))
    score = fence_scores(st.remainder, st.q1[40], st.q3[40], "both")
    hours = sorted(ref_exp)
    np.testing.assert_allclose(st.expected[hours], [ref_exp[t] for t in hours], rtol=0, atol=1e-9)
    rs = np.array([ref_score[t] for t in hours])
    ours = score[hours]
    assert np.array_equal(np.isnan(rs), np.isnan(ours))
    finite = np.isfinite(rs)
    assert np.array_equal(np.isinf(rs), np.isinf(ours))
    np.testing.assert_allclose(ours[finite], rs[finite], rtol=0, atol=1e-9)
    flags = np.nan_to_num(ours, nan=-1.0) > 1.5
    assert flags.tolist() == [ref_flag[t] for t in hours]


@pytest.mark.parametrize("h", [1, 6])
def test_weekly_stream_matches_mstl_reference(h):
    # statsmodels MSTL (default windows 11, 15) is the reference for the weekly option
    s = DetectorSettings(
        decomposition_window_hours=360, fence_window_hours=48, weekly_period=True,
        refit_every_hours=h, fence_multiplier=1.5,
    )
    y = _series(360 + 30, seed=5)
    ref_exp, ref_score, ref_flag = reference_loop(y, s, 48, 1.5)
    st = remainder_stream(y, s, (48,))
    score = fence_scores(st.remainder, st.q1[48], st.q3[48], "both")
    hours = sorted(ref_exp)
    np.testing.assert_allclose(st.expected[hours], [ref_exp[t] for t in hours], rtol=0, atol=1e-9)
    np.testing.assert_allclose(score[hours], [ref_score[t] for t in hours], rtol=0, atol=1e-9)
    flags = np.nan_to_num(score[hours], nan=-1.0) > 1.5
    assert flags.tolist() == [ref_flag[t] for t in hours]


@pytest.mark.parametrize("w", [4, 5, 48, 167])
def test_compiled_quartiles_bitwise_equal_numpy(w):
    # numpy.percentile(method="linear") is the reference; NaNs are skipped per row
    from calibrate.decomposition.decompose import _quartiles

    rng = np.random.default_rng(w)
    block = rng.normal(size=(300, w)) * rng.choice([1e-3, 1.0, 1e6], size=(300, 1))
    block[rng.random(block.shape) < 0.1] = np.nan
    block[::7] = np.round(block[::7])  # ties
    zero = rng.random(block.shape) < 0.6
    block[3::11] = np.where(zero[3::11], 0.0, block[3::11])  # zero-heavy rows, as at night
    q1, q3 = _quartiles(block, "linear")
    for r in range(len(block)):
        row = block[r][~np.isnan(block[r])]
        if len(row) < MIN_FENCE_VALUES:
            assert np.isnan(q1[r]) and np.isnan(q3[r])
            continue
        ref = np.percentile(row, [25, 75])
        assert q1[r] == ref[0] and q3[r] == ref[1]


@pytest.mark.parametrize("sides", ["up", "down", "both"])
def test_fence_scores_match_numpy_formula(sides):
    # Reference: the fence score written with plain numpy array operations (docs/detector.md
    # definition): (r - Q3)/IQR up, (Q1 - r)/IQR down, inf/0 at IQR = 0, NaN if undefined.
    from calibrate.decomposition.decompose import fence_scores

    rng = np.random.default_rng(5)
    r = rng.normal(size=(40, 300))
    q1 = -np.abs(rng.normal(size=r.shape))
    q3 = np.abs(rng.normal(size=r.shape))
    q1[:, ::9] = q3[:, ::9]  # IQR = 0
    r[::5, ::7] = np.nan
    q1[::3, ::11] = np.nan
    q3[:, ::13] = np.inf
    q1[:, ::26] = -np.inf
    iqr = q3 - q1
    with np.errstate(divide="ignore", invalid="ignore"):
        up = np.where(iqr == 0, np.where(r > q3, np.inf, 0.0), (r - q3) / iqr)
        down = np.where(iqr == 0, np.where(r < q1, np.inf, 0.0), (q1 - r) / iqr)
    want = {"up": up, "down": down, "both": np.maximum(up, down)}[sides]
    want = np.where(np.isnan(r) | np.isnan(q1) | np.isnan(q3), np.nan, want)
    got = fence_scores(r, q1, q3, sides)
    assert got.shape == r.shape
    np.testing.assert_array_equal(got, want)
    assert np.array_equal(fence_scores(r[0], q1[0], q3[0], sides), want[0], equal_nan=True)


def _check_forecast(y, s: DetectorSettings, windows: tuple[int, ...]):
    """The stream of `y` in forecast mode equals the plain loop's for every fence window
    (1e-9, same flags), with nothing before the first forecast hour L and no score
    before L + W."""
    k = s.fence_multiplier
    ref_exp, ref_score, ref_flag = forecast_reference_loop(y, s, windows, k)
    st = remainder_stream(y, s, windows)
    L = s.decomposition_window_hours
    hours = sorted(ref_exp)
    assert hours[0] == L and np.isnan(st.expected[:L]).all()
    np.testing.assert_allclose(st.expected[hours], [ref_exp[t] for t in hours], rtol=0, atol=1e-9)
    for W in windows:
        score = fence_scores(st.remainder, st.q1[W], st.q3[W], "both")
        rs = np.array([ref_score[W][t] for t in hours])
        ours = score[hours]
        assert np.isnan(ours[:W]).all() and np.isfinite(rs[W:]).any()
        assert np.array_equal(np.isnan(rs), np.isnan(ours))
        assert np.array_equal(np.isinf(rs), np.isinf(ours))
        finite = np.isfinite(rs)
        np.testing.assert_allclose(ours[finite], rs[finite], rtol=0, atol=1e-9)
        flags = np.nan_to_num(ours, nan=-1.0) > k
        assert flags.tolist() == [ref_flag[W][t] for t in hours]


@pytest.mark.parametrize("case", CASES)
@pytest.mark.parametrize("kind", ["smooth", "zeros", "gaps"])
def test_forecast_stream_matches_reference_loop(case, kind):
    s = DetectorSettings(
        decomposition_window_hours=96, fence_window_hours=40, period_hours=24,
        seasonal_span=7, fence_multiplier=1.5, expected_value="forecast", **case,
    )
    y = _series(96 + 40 + 50, seed=3, zeros=kind == "zeros", gaps=kind == "gaps")
    _check_forecast(y, s, (24, 40))


@pytest.mark.parametrize("h", [1, 6])
def test_weekly_forecast_stream_matches_mstl_reference(h):
    # the summed daily + weekly seasonal is taken one week back
    s = DetectorSettings(
        decomposition_window_hours=360, fence_window_hours=8, weekly_period=True,
        refit_every_hours=h, fence_multiplier=1.5, expected_value="forecast",
    )
    _check_forecast(_series(360 + 8 + 8, seed=5), s, (8,))
