"""The compiled STL/MSTL port against statsmodels (the reference library) and R's STL.

Every exactness check compares with statsmodels computed inside the test, on this
machine. "Bit-identical" is asserted with `np.array_equal` where the kernel claims it.
"""

from __future__ import annotations

import importlib.util
import warnings
from pathlib import Path

import numba as nb
import numpy as np
import pandas as pd
import pytest
from statsmodels.datasets import co2
from statsmodels.tsa.seasonal import MSTL, STL

from calibrate.decomposition.loess import exact_div
from calibrate.decomposition.smoother import linear_smoother, seasonal_matrix, trend_matrix
from calibrate.decomposition.stl import mstl_fit, stl_config, stl_fit, stl_fit_windows


def _sm_stl(y: np.ndarray, period: int, seasonal: int, trend: int = 0, robust: bool = False,
            **kw: int) -> object:
    model = STL(y, period=period, seasonal=seasonal, trend=(None if trend == 0 else trend),
                robust=robust, **kw)
    return model.fit()


def _assert_same(ours: tuple[np.ndarray, ...], ref: object) -> None:
    tr, se, re = ours
    np.testing.assert_array_equal(tr, np.asarray(ref.trend))
    np.testing.assert_array_equal(se, np.asarray(ref.seasonal))
    np.testing.assert_array_equal(re, np.asarray(ref.resid))


def _hourly(n: int, seed: int) -> np.ndarray:
    """Seeded hourly-like counts: daily cycle, weekly bump, drift, noise, a few spikes."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    level = 200 + 0.05 * t + 80 * np.sin(2 * np.pi * t / 24) + 20 * (t % 168 < 48)
    y = rng.poisson(np.clip(level, 1, None)).astype(float)
    y[rng.choice(n, 3, replace=False)] *= 3
    return y


@pytest.fixture(scope="module")
def co2_monthly() -> np.ndarray:
    # statsmodels' shipped weekly Mauna Loa CO2, monthly means, gaps forward-filled (as in
    # the example of statsmodels' STL docstring).
    data = co2.load_pandas().data["co2"]
    return data.resample("MS").mean().ffill().to_numpy()


# ----------------------------------------------------------------------------- config

@pytest.mark.parametrize(
    ("period", "seasonal", "expected"),
    [
        # statsmodels STL(...).config defaults: period 24 seasonal 7 -> 47 / 25
        (24, 7, (47, 25)),
        # statsmodels STL(...).config defaults: period 168 seasonal 7 -> 321 / 169
        (168, 7, (321, 169)),
    ],
)
def test_stl_config_published_defaults(period: int, seasonal: int,
                                       expected: tuple[int, int]) -> None:
    assert stl_config(period, seasonal) == expected


@pytest.mark.parametrize("period", [2, 7, 12, 24, 25, 168])
@pytest.mark.parametrize("seasonal", [3, 7, 11, 15, 35])
def test_stl_config_matches_statsmodels(period: int, seasonal: int) -> None:
    cfg = STL(np.zeros(4 * period + 4), period=period, seasonal=seasonal).config
    assert stl_config(period, seasonal) == (cfg["trend"], cfg["low_pass"])
    assert stl_config(period, seasonal, trend=0) == (cfg["trend"], cfg["low_pass"])


def test_stl_config_explicit_and_invalid() -> None:
    assert stl_config(24, 7, trend=61, low_pass=27) == (61, 27)
    for kwargs in ({"trend": 24}, {"trend": 49 - 1}, {"low_pass": 23}, {"low_pass": 26}):
        with pytest.raises(ValueError):
            stl_config(24, 7, **kwargs)
    with pytest.raises(ValueError):
        stl_config(24, 8)
    with pytest.raises(ValueError):
        stl_config(1, 7)


# ----------------------------------------------------------------------------- STL fits

@pytest.mark.parametrize("robust", [False, True])
def test_co2_monthly_bit_identical(co2_monthly: np.ndarray, robust: bool) -> None:
    # statsmodels' co2 dataset, reference = statsmodels STL fitted here.
    ref = _sm_stl(co2_monthly, 12, 7, robust=robust)
    _assert_same(stl_fit(co2_monthly, 12, 7, robust=robust), ref)


def _r_call_fit(y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    # R call of statsmodels' stl_co2_r_result.csv: stl(ts(x, frequency=12), s.window=35, s.degree=1,
    # t.window=19, t.degree=1, l.window=13, l.degree=1, s.jump=4, t.jump=2, l.jump=2,
    # inner=1, outer=2)
    return stl_fit(y, 12, 35, trend=19, low_pass=13, seasonal_jump=4, trend_jump=2,
                   low_pass_jump=2, inner_iter=1, outer_iter=2)


def _stl_results_dir() -> Path | None:
    spec = importlib.util.find_spec("statsmodels")
    assert spec is not None and spec.origin is not None
    folder = Path(spec.origin).parent / "tsa" / "stl" / "tests" / "results"
    return folder if folder.is_dir() else None


def test_r_reference_endpoints() -> None:
    folder = _stl_results_dir()
    if folder is None or not (folder / "stl_co2.csv").exists():
        pytest.skip("statsmodels' STL test data (stl_co2.csv) is not installed")
    # The 348-point monthly CO2 series statsmodels ships for its R comparison.
    y = pd.read_csv(folder / "stl_co2.csv", header=None).iloc[:, 0].to_numpy(float)
    tr, se, re = _r_call_fit(y)
    # R stl output as shipped by statsmodels (tsa/stl/tests/results): first and last points.
    assert se[0] == pytest.approx(-0.13125464, abs=1e-8)
    assert tr[0] == pytest.approx(315.5519, abs=1e-4)
    assert re[0] == pytest.approx(0.159314918, abs=1e-8)
    assert se[-1] == pytest.approx(-0.94898196, abs=1e-8)
    assert tr[-1] == pytest.approx(349.7027, abs=1e-4)
    assert re[-1] == pytest.approx(-0.083709640, abs=1e-8)
    # Same call in statsmodels, bit for bit.
    ref = STL(y, period=12, seasonal=35, trend=19, low_pass=13, seasonal_jump=4,
              trend_jump=2, low_pass_jump=2).fit(inner_iter=1, outer_iter=2)
    _assert_same((tr, se, re), ref)


def test_r_reference_full_series() -> None:
    folder = _stl_results_dir()
    results = None if folder is None else folder / "stl_test_results.csv"
    if results is None or not results.exists():
        pytest.skip("statsmodels' stl_test_results.csv is not installed")
    y = pd.read_csv(folder / "stl_co2.csv", header=None).iloc[:, 0].to_numpy(float)
    # statsmodels' results file, scenario "baseline" = the R call above (statsmodels
    # tests compare with it at assert_allclose's default rtol 1e-7).
    table = pd.read_csv(results)
    table.columns = [c.strip() for c in table.columns]
    base = table[table["scenario"].str.strip() == "baseline"].sort_values("idx")
    tr, se, _ = _r_call_fit(y)
    np.testing.assert_allclose(tr, base["trend"].to_numpy(), rtol=1e-7)
    np.testing.assert_allclose(se, base["season"].to_numpy(), rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("n", [168, 336, 672])
@pytest.mark.parametrize("robust", [False, True])
def test_hourly_random_bit_identical(n: int, robust: bool) -> None:
    y = _hourly(n, seed=n)
    _assert_same(stl_fit(y, 24, 7, robust=robust), _sm_stl(y, 24, 7, robust=robust))


def test_plain_port_equals_blocked() -> None:
    y = _hourly(336, seed=3)
    for robust in (False, True):
        a = stl_fit(y, 24, 11, robust=robust, blocked=True)
        b = stl_fit(y, 24, 11, robust=robust, blocked=False)
        for u, v in zip(a, b, strict=True):
            np.testing.assert_array_equal(u, v)


def _degenerate(kind: str, n: int) -> np.ndarray:
    rng = np.random.default_rng(7)
    if kind == "zeros":
        return np.zeros(n)
    if kind == "spikes":
        y = np.zeros(n)
        y[rng.choice(n, 5, replace=False)] = rng.integers(1, 40, 5)
        return y
    if kind == "periodic":
        return np.tile(rng.integers(0, 30, 24).astype(float), n // 24)
    if kind == "constant":
        return np.full(n, 3.25)
    if kind == "night_zero":
        y = _hourly(n, seed=11)
        y[(np.arange(n) % 24) < 9] = 0.0
        return y
    raise AssertionError(kind)


@pytest.mark.parametrize("kind", ["zeros", "spikes", "periodic", "constant", "night_zero"])
@pytest.mark.parametrize("n", [168, 336, 672])
@pytest.mark.parametrize("robust", [False, True])
def test_degenerate_windows_bit_identical(kind: str, n: int, robust: bool) -> None:
    y = _degenerate(kind, n)
    for seasonal, trend in ((7, 0), (11, 0), (7, 61), (11, 35)):
        ref = _sm_stl(y, 24, seasonal, trend=trend, robust=robust)
        _assert_same(stl_fit(y, 24, seasonal, trend=trend, robust=robust), ref)


@pytest.mark.parametrize(
    ("period", "seasonal", "trend", "n"),
    [
        (168, 7, 0, 336),   # 2 cycles < seasonal span: widened window, len >= n paths
        (168, 11, 0, 672),
        (24, 35, 0, 100),   # seasonal span > cycles, trend span > ... partial last cycle
        (7, 7, 9, 50),
        (24, 7, 0, 30),     # trend span 47 > n
    ],
)
@pytest.mark.parametrize("robust", [False, True])
def test_edge_rule_shapes_bit_identical(period: int, seasonal: int, trend: int, n: int,
                                        robust: bool) -> None:
    y = _hourly(n, seed=period + n)
    ref = _sm_stl(y, period, seasonal, trend=trend, robust=robust)
    _assert_same(stl_fit(y, period, seasonal, trend=trend, robust=robust), ref)


@pytest.mark.parametrize("kw", [
    {"seasonal_deg": 0}, {"trend_deg": 0, "low_pass_deg": 0},
    {"seasonal_jump": 3, "trend_jump": 5, "low_pass_jump": 4},
])
def test_degree_and_jump_options_bit_identical(kw: dict[str, int]) -> None:
    y = _hourly(336, seed=5)
    for robust in (False, True):
        ref = _sm_stl(y, 24, 7, robust=robust, **kw)
        _assert_same(stl_fit(y, 24, 7, robust=robust, **kw), ref)


def test_stl_fit_rejects_bad_input() -> None:
    with pytest.raises(ValueError):
        stl_fit(np.zeros((4, 48)), 24, 7)
    with pytest.raises(ValueError):
        stl_fit(np.zeros(100), 24, 7, seasonal_deg=2)
    with pytest.raises(ValueError):
        stl_fit(np.zeros(100), 24, 7, trend_jump=0)


@pytest.mark.parametrize("robust", [False, True])
def test_stl_fit_windows_matches_single_fits(robust: bool) -> None:
    y = _hourly(900, seed=1)
    y[:200] = 0.0  # some degenerate windows in the batch
    window = 336
    ends = np.array([335, 336, 400, 535, 899], dtype=np.int64)
    tr, se, re = stl_fit_windows(y, ends, window, 24, 7, 0, 0, robust)
    assert tr.shape == se.shape == re.shape == (len(ends), window)
    for i, e in enumerate(ends):
        seg = y[e - window + 1 : e + 1]
        _assert_same((tr[i], se[i], re[i]), _sm_stl(seg, 24, 7, robust=robust))


def test_stl_fit_windows_checks_ends() -> None:
    with pytest.raises(ValueError):
        stl_fit_windows(np.zeros(400), np.array([100]), 168, 24, 7, 0, 0, False)
    with pytest.raises(ValueError):
        stl_fit_windows(np.zeros(400), np.array([400]), 168, 24, 7, 0, 0, False)


# ----------------------------------------------------------------------------- MSTL

@pytest.mark.parametrize("robust", [False, True])
@pytest.mark.parametrize(("periods", "windows"), [((24, 168), None), ((168, 24), (9, 13))])
def test_mstl_matches_statsmodels(robust: bool, periods: tuple[int, int],
                                  windows: tuple[int, int] | None) -> None:
    y = _hourly(672, seed=2)
    ref = MSTL(y, periods=periods, windows=windows, stl_kwargs={"robust": robust}).fit()
    tr, seas, re = mstl_fit(y, periods=periods, windows=windows, robust=robust)
    np.testing.assert_allclose(tr, ref.trend, rtol=0, atol=1e-9 * np.abs(y).max())
    np.testing.assert_allclose(seas.T, ref.seasonal, rtol=0, atol=1e-9 * np.abs(y).max())
    np.testing.assert_allclose(re, ref.resid, rtol=0, atol=1e-9 * np.abs(y).max())
    # The kernel repeats MSTL's STL calls exactly, so the bits agree as well.
    np.testing.assert_array_equal(tr, np.asarray(ref.trend))


def test_mstl_drops_long_period_like_statsmodels() -> None:
    y = _hourly(336, seed=4)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ref = MSTL(y, periods=(24, 168)).fit()
    assert any("larger than half" in str(w.message) for w in caught)
    with pytest.warns(UserWarning, match="larger than half"):
        tr, seas, re = mstl_fit(y, periods=(24, 168))
    assert seas.shape == (1, 336)
    np.testing.assert_array_equal(seas[0], np.asarray(ref.seasonal))
    np.testing.assert_array_equal(tr, np.asarray(ref.trend))
    np.testing.assert_array_equal(re, np.asarray(ref.resid))


# ----------------------------------------------------------------------------- smoother

@pytest.mark.parametrize(("window", "seasonal", "trend"), [(168, 7, 0), (336, 11, 61)])
def test_linear_smoother_matches_statsmodels(window: int, seasonal: int, trend: int) -> None:
    sm = linear_smoother(window, 24, seasonal, trend)
    assert sm.trend.shape == sm.seasonal.shape == (window, window)
    for seed in (0, 1):
        y = _hourly(window, seed=seed)
        ref = _sm_stl(y, 24, seasonal, trend=trend)
        scale = np.abs(y).max()
        np.testing.assert_allclose(sm.trend @ y, ref.trend, rtol=0, atol=1e-10 * scale)
        np.testing.assert_allclose(sm.seasonal @ y, ref.seasonal, rtol=0, atol=1e-10 * scale)
        np.testing.assert_allclose(sm.fitted @ y, ref.trend + ref.seasonal, rtol=0,
                                   atol=1e-10 * scale)
    assert linear_smoother(window, 24, seasonal, trend) is sm  # cached
    assert trend_matrix(window, 24, seasonal, trend) is sm.trend
    assert seasonal_matrix(window, 24, seasonal, trend) is sm.seasonal
    assert not sm.trend.flags.writeable


@pytest.mark.parametrize(("window", "seasonal"), [(96, 7), (40, 7)])
def test_linear_smoother_columns_are_unit_vector_fits(window: int, seasonal: int) -> None:
    """Column r of each matrix is the kernel's STL of unit vector r, bit for bit, whether
    the matrix is built through the weight-reuse path (window >= 2 periods) or not."""
    sm = linear_smoother(window, 24, seasonal, 0)
    for r in (0, window // 2, window - 1):
        e = np.zeros(window)
        e[r] = 1.0
        tr, seas, _ = stl_fit(e, 24, seasonal, 0, False, reuse_weights=False)
        np.testing.assert_array_equal(sm.trend[:, r], tr)
        np.testing.assert_array_equal(sm.seasonal[:, r], seas)


def test_linear_smoother_weekly_matches_mstl() -> None:
    window = 504  # weekly period 168 < 504 / 2 is kept
    sm = linear_smoother(window, 24, 7, weekly=True)
    y = _hourly(window, seed=9)
    ref = MSTL(y, periods=(24, 168)).fit()
    scale = np.abs(y).max()
    np.testing.assert_allclose(sm.trend @ y, ref.trend, rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(sm.seasonal @ y, ref.seasonal.sum(axis=1), rtol=0,
                               atol=1e-10 * scale)


def test_many_zero_weights_bit_identical() -> None:
    # A 5-day level shift: about 120 robustness weights are exactly 0.
    y = _hourly(672, seed=12)
    y[300:420] += 5000.0
    ref = _sm_stl(y, 24, 7, robust=True)
    assert (np.asarray(ref.weights) == 0).sum() >= 50
    _assert_same(stl_fit(y, 24, 7, robust=True), ref)
    _assert_same(stl_fit(y, 24, 7, robust=True, blocked=False), ref)


def test_all_zero_weight_window_keeps_input() -> None:
    # statsmodels' _ess: a LOESS window whose weights are all 0 gives NaN and the input
    # value is kept. Checked on the kernel's LOESS directly (plain port vs vectorised).
    from calibrate.decomposition import loess, stl_core

    n, span = 200, 25
    y = np.random.default_rng(0).normal(size=n)
    rw = np.ones(n)
    rw[80:140] = 0.0
    tab, toff = loess._weight_table(span + 1)
    out = {}
    for blocked in (False, True):
        blk, acc, hpos = stl_core._block_scratch(7, span, span, n)
        ys = np.empty(n)
        loess.ess(y, n, span, 1, 1, True, rw, ys, np.empty(n), blk, acc, hpos, tab, toff,
                  blocked)
        out[blocked] = ys
    np.testing.assert_array_equal(out[True], out[False])
    np.testing.assert_array_equal(out[True][100:120], y[100:120])
    assert not np.array_equal(out[True][:60], y[:60])


# ----------------------------------------------------------------------------- weight reuse

@pytest.mark.parametrize("window", [168, 336, 672])
@pytest.mark.parametrize("seasonal", [7, 11])
def test_windows_degenerate_robust_match_statsmodels(window: int, seasonal: int) -> None:
    # Degenerate robust windows (6*median|R| near 0, bisquare weights on a knife edge),
    # laid end to end as calibrate/decomposition/decompose.py does. Reference: statsmodels' STL.
    kinds = ["zeros", "spikes", "periodic", "constant", "night_zero"]
    wins = [_degenerate(kind, window) for kind in kinds]
    flat = np.concatenate(wins)
    ends = np.arange(window - 1, len(kinds) * window, window, dtype=np.int64)
    fast = stl_fit_windows(flat, ends, window, 24, seasonal, 0, 0, True)
    slow = stl_fit_windows(flat, ends, window, 24, seasonal, 0, 0, True,
                           reuse_weights=False)
    for i, seg in enumerate(wins):
        ref = _sm_stl(seg, 24, seasonal, robust=True)
        scale = max(np.abs(seg).max(), 1.0)
        for ours, other, want in zip(fast, slow, (ref.trend, ref.seasonal, ref.resid),
                                     strict=True):
            np.testing.assert_allclose(ours[i], want, rtol=0, atol=1e-9 * scale)
            np.testing.assert_array_equal(ours[i], np.asarray(want))  # the claim: same bits
            np.testing.assert_array_equal(ours[i], other[i])


@pytest.mark.parametrize("n", [168, 336, 672, 100, 61])
def test_reuse_weights_same_bits_as_blocked(n: int) -> None:
    # 100 and 61 points: partial last cycle (two subseries lengths) at periods 24 and 12.
    period = 24 if n % 12 else 12
    y = _hourly(n, seed=n + 1)
    for seasonal, trend in ((7, 0), (11, 35)):
        for robust in (False, True):
            a = stl_fit(y, period, seasonal, trend=trend, robust=robust)
            b = stl_fit(y, period, seasonal, trend=trend, robust=robust, reuse_weights=False)
            ref = _sm_stl(y, period, seasonal, trend=trend, robust=robust)
            _assert_same(a, ref)
            for u, v in zip(a, b, strict=True):
                np.testing.assert_array_equal(u, v)


def test_reuse_weights_zero_weight_window_keeps_input() -> None:
    # Prepared weights of a window with all robustness weights 0 are NaN; the LOESS then
    # keeps the input, as statsmodels' _ess does. Compared with the plain port's _ess.
    from calibrate.decomposition import loess, stl_core, stl_plan

    n, span = 200, 25
    y = np.random.default_rng(0).normal(size=n)
    rw = np.ones(n)
    rw[80:140] = 0.0
    tab, toff = loess._weight_table(span + 1)
    blk, acc, hpos = stl_core._block_scratch(7, span, span, n)
    want = np.empty(n)
    loess.ess(y, n, span, 1, 1, True, rw, want, np.empty(n), blk, acc, hpos, tab, toff, False)
    blocks: list = []
    stl_plan._series_blocks(blocks, n, span, tab, toff)
    plan = stl_plan._pack(blocks, 1)
    w = np.empty(plan.tw.shape[0])
    stl_plan._plan_weights(*stl_plan._plan_args(plan), rw, w, np.empty((5, n)))  # 5 scratch rows
    got = np.empty(n)
    stl_plan._plan_apply(plan.info, plan.base, w, y, got, np.empty(n))
    np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(got[100:120], y[100:120])
    assert np.isnan(w).any()


@nb.njit(error_model="numpy")  # IEEE 0/0 = NaN, as in the kernel
def _exact_div_all(x: np.ndarray, a: np.ndarray, out: np.ndarray) -> None:
    for i in range(x.shape[0]):
        out[i] = exact_div(x[i], a[i], 1.0 / a[i])


def test_exact_div_equals_ieee_division() -> None:
    # Reference: numpy's `/` (IEEE 754 correctly rounded division). The FMA-corrected
    # quotient must give the same bits on the kernel's operand range (weights in
    # [1e-13, 1] over their sums) and on hard cases: divisors with all-ones significands
    # and dividends just above a power of two (where q0 = x*(1/a) can be 1.5 ulp off).
    rng = np.random.default_rng(11)
    n = 400_000
    a = rng.uniform(1.0, 60.0, n)
    x = a * rng.uniform(0.0, 1.0, n) ** 3
    a2 = np.nextafter(2.0 ** rng.integers(-8, 8, n), 0.0) * (1 - rng.integers(0, 8, n) * 2.0**-52)
    x2 = np.nextafter(2.0 ** rng.integers(-30, 0, n), np.inf) * a2
    tiny = np.array([1e-13, 2.7e-8 * 4e-6, 1.0, 0.5, 0.0])
    # moving averages: signed running sums over lengths 3..169; data from 1e-280 to 1e290
    a3 = rng.integers(3, 170, n).astype(float)
    x3 = rng.choice([-1.0, 1.0], n) * 10.0 ** rng.uniform(-280, 290, n)
    xs = np.concatenate([x, x2, tiny, x3])
    as_ = np.concatenate([a, a2, np.array([1e-13, 1.0, 3.0, 47.0, 5.0]), a3])
    out = np.empty_like(xs)
    _exact_div_all(xs, as_, out)
    assert np.array_equal(out.view(np.int64), (xs / as_).view(np.int64))
    nan = np.empty(1)
    _exact_div_all(np.zeros(1), np.zeros(1), nan)
    assert np.isnan(nan[0])  # an all-zero-weight window still gives NaN, as 0/0 does
