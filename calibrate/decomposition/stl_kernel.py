"""Compiled (numba) port of statsmodels' STL and MSTL, plus linear-smoother matrices.

The kernel follows statsmodels' ``tsa/stl/_stl.pyx`` (itself a port of the NETLIB
Fortran) operation by operation, so that fits are bit-identical to statsmodels on the
same machine. Three changes keep the bits and remove the cost:

- the tricube weights ``(1 - (r/h)**3)**3`` depend only on the integer distance ``r``
  and the integer half-width ``h``; they are read from a table filled once with the same
  ``pow`` (including statsmodels' 0.001/0.999 thresholds);
- in the sliding part of each LOESS pass, four neighbouring output points are computed
  together. Each point keeps its own sums in statsmodels' order, so the bits do not
  change; the four independent chains just let the CPU overlap them;
- divisions by a value shared by many quotients (the normalisation ``w / a`` of every
  LOESS weight of one output point, the moving averages' ``v / len``, the robustness
  weights' ``r / (6 * median)``) use ``y = 1/a`` once and two fused multiply-add
  corrections, which return the correctly rounded quotient, i.e. the same bits as the
  division (`exact_div`).

Public API: `stl_config`, `stl_fit`, `stl_fit_windows`, `mstl_fit`, `linear_smoother`,
`trend_matrix`, `seasonal_matrix`.
"""

from __future__ import annotations

import functools
import math
import warnings
from collections.abc import Sequence
from typing import NamedTuple

import numba as nb
import numpy as np
from numba import types
from numba.extending import intrinsic

__all__ = [
    "LinearSmoother",
    "linear_smoother",
    "mstl_fit",
    "seasonal_matrix",
    "stl_config",
    "stl_fit",
    "stl_fit_windows",
    "trend_matrix",
]

_JIT = dict(cache=True, nogil=True, error_model="numpy")
# A bare constant passed to another compiled function is typed as a literal
# (Literal[int](1)), which compiles a second copy of the callee beside its int64 one.
# Numpy scalars keep the plain types, so every caller shares one compiled copy: pass
# these instead of 0, 1, 2, 3, True and False (it shortens the cold-cache compile).
_0, _1, _2, _3 = (np.int64(i) for i in range(4))
_TRUE, _FALSE = np.bool_(True), np.bool_(False)


@intrinsic
def _fma(typingctx, a, b, c):
    """``a*b + c`` with one rounding (LLVM's fma; a vector instruction where the CPU has it)."""
    sig = types.float64(types.float64, types.float64, types.float64)

    def codegen(context, builder, signature, args):
        return builder.fma(*args)

    return sig, codegen


@nb.njit(inline="always", **_JIT)
def exact_div(x, a, y):
    """``x / a`` correctly rounded, from ``y = 1.0 / a`` without a division.

    ``q0 = x*y`` is within 1.5 ulp of ``x/a``; one correction ``q1 = q0 + (x - a*q0)*y``
    makes it faithful (within 1 ulp), and a second one then gives the correctly rounded
    quotient by Markstein's theorem (P. Markstein, IBM J. Res. Dev. 34(1), 1990; also in
    Muller et al., *Handbook of Floating-Point Arithmetic*, ch. on division -- cited from
    memory): if ``q`` is faithful and ``y`` is ``1/a`` within relative error 2**-53, then
    ``RN(q + RN(x - a*q)*y) = RN(x/a)``. Needs no underflow or overflow and ``x`` not
    ``-0.0``: in the LOESS weights ``x`` is a product of a tricube and a robustness
    weight (0 or at least about 1e-13) and ``a`` a sum of them (``0/0`` still gives
    NaN); in the moving averages and robustness weights ``x`` is a running sum of data or
    an absolute residual, so the same bits hold for data between about 1e-290 and 1e300
    in magnitude (hourly business metrics). Tested against ``/`` in
    tests/test_stl_kernel.py.
    """
    q = x * y
    r = _fma(-q, a, x)
    q = _fma(r, y, q)
    r = _fma(-q, a, x)
    return _fma(r, y, q)


# --------------------------------------------------------------------------- settings


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


@functools.lru_cache(maxsize=32)
def _weight_table(hmax: int) -> tuple[np.ndarray, np.ndarray]:
    """Tricube weights for every half-width h <= hmax and distance r <= h.

    Row h starts at ``offsets[h] = h*(h+1)//2``. Filled with libm ``pow`` through
    ``math.pow`` so the values equal statsmodels' ``(1.0 - (r / h) ** 3) ** 3``.
    """
    offsets = np.array([h * (h + 1) // 2 for h in range(hmax + 2)], dtype=np.int64)
    table = np.zeros(int(offsets[-1]), dtype=np.float64)
    for h in range(hmax + 1):
        hf = float(h)
        h9 = 0.999 * hf
        h1 = 0.001 * hf
        base = int(offsets[h])
        for r in range(h + 1):
            rf = float(r)
            if rf <= h9:
                table[base + r] = 1.0 if rf <= h1 else math.pow(1.0 - math.pow(rf / hf, 3.0), 3.0)
    table.flags.writeable = False
    offsets.flags.writeable = False
    return table, offsets


def _table_for(n: int, seasonal: int, trend: int, low_pass: int) -> tuple[np.ndarray, np.ndarray]:
    # Largest half-width any LOESS of a fit can use: len - 1 inside the series, len at the
    # cycle-subseries end points and when a span exceeds the data (+1 spare).
    del n
    return _weight_table(max(seasonal, trend, low_pass) + 1)


# --------------------------------------------------------------------------- kernel


@nb.njit(**_JIT)
def _est(y, n, len_, ideg, xs, nleft, nright, w, userw, rw, tab, toff):
    """One LOESS value at ``xs`` (1-based) from ``y[nleft-1:nright]``; NaN if no weight."""
    rng = n - 1.0
    h = max(xs - nleft, nright - xs)
    if len_ > n:
        h += (len_ - n) // 2
    base = toff[h]
    a = 0.0
    for j in range(nleft - 1, nright):
        wj = tab[base + abs(j + 1 - xs)]
        if userw:
            wj = wj * rw[j]
        w[j] = wj
        a = a + wj
    if a <= 0:
        return np.nan
    for j in range(nleft - 1, nright):
        w[j] = w[j] / a
    if h > 0 and ideg > 0:
        a = 0.0
        for j in range(nleft - 1, nright):
            a = a + w[j] * (j + 1)
        b = xs - a
        c = 0.0
        for j in range(nleft - 1, nright):
            d = j + 1 - a
            c = c + w[j] * (d * d)
        if math.sqrt(c) > 0.001 * rng:
            b = b / c
            for j in range(nleft - 1, nright):
                w[j] = w[j] * (b * (j + 1 - a) + 1.0)
    ys = 0.0
    for j in range(nleft - 1, nright):
        ys = ys + w[j] * y[j]
    return ys


@nb.njit(**_JIT)
def _loess_finish(y, n, ideg, npts, jfirst, shift, ys_out, out0, wbuf, acc, hpos):
    """Shared tail of the vectorised LOESS: slope correction and the weighted sum.

    ``wbuf[d*npts + k]`` holds the normalised weight of point k at offset d; the data
    index is ``jfirst + d + shift*k``; ``hpos[k]`` is point k's half-width, ``hpos[npts]``
    the window length, ``acc[0]`` the weight sums and ``acc[6]`` the points.
    Per point, every sum runs over d in statsmodels' order; only the loop over points
    (innermost) is vectorised.
    """
    rng = n - 1.0
    a = acc[0]
    m = acc[1]
    c = acc[2]
    b = acc[3]
    s = acc[4]
    pos = acc[5]
    len_ = hpos[npts]
    for k in range(npts):
        pos[k] = float(jfirst + 1 + shift * k)
        m[k] = 0.0
        c[k] = 0.0
        b[k] = 0.0
        s[k] = 0.0
    if ideg > 0:
        for d in range(len_):
            row = d * npts
            for k in range(npts):
                m[k] = m[k] + wbuf[row + k] * (pos[k] + d)
        for d in range(len_):
            row = d * npts
            for k in range(npts):
                e = (pos[k] + d) - m[k]
                c[k] = c[k] + wbuf[row + k] * (e * e)
        lim = 0.001 * rng
        for k in range(npts):
            # Without the slope correction b stays 0 and the factor below is exactly 1.0,
            # as in the reference, which leaves the weights untouched.
            if hpos[k] > 0 and math.sqrt(c[k]) > lim:
                b[k] = (acc[6, k] - m[k]) / c[k]
    if shift == 1:
        for d in range(len_):
            row = d * npts
            j = jfirst + d
            for k in range(npts):
                s[k] = s[k] + (wbuf[row + k] * (b[k] * ((pos[k] + d) - m[k]) + 1.0)) * y[j + k]
    else:
        for d in range(len_):
            row = d * npts
            yj = y[jfirst + d]
            for k in range(npts):
                s[k] = s[k] + (wbuf[row + k] * (b[k] * ((pos[k] + d) - m[k]) + 1.0)) * yj
    for k in range(npts):
        ys_out[out0 + k] = s[k] if a[k] > 0 else np.nan


@nb.njit(**_JIT)
def _loess_shift(y, n, len_, ideg, xs0, nleft0, npts, userw, rw, tab, toff, ys, wbuf, acc,
                 hpos):
    """`_est` at points ``xs0 + k`` with windows ``[nleft0 + k, nleft0 + k + len_ - 1]``.

    Consecutive shifts of one window: all points share the half-width and tricube row.
    Writes ``ys[xs0-1 : xs0-1+npts]`` (NaN where a point has no positive weight).
    """
    h = max(xs0 - nleft0, nleft0 + len_ - 1 - xs0)
    base = toff[h]
    off = xs0 - nleft0
    j0 = nleft0 - 1
    a = acc[0]
    for k in range(npts):
        a[k] = 0.0
        hpos[k] = h
        acc[6, k] = float(xs0 + k)
    hpos[npts] = len_
    if userw:
        for d in range(len_):
            t = tab[base + abs(d - off)]
            for k in range(npts):
                a[k] = a[k] + t * rw[j0 + d + k]
        for d in range(len_):
            t = tab[base + abs(d - off)]
            row = d * npts
            for k in range(npts):
                wbuf[row + k] = (t * rw[j0 + d + k]) / a[k]
    else:
        # Identical weights for every point: one sum, one division per offset.
        tot = 0.0
        for d in range(len_):
            tot = tot + tab[base + abs(d - off)]
        for d in range(len_):
            wn = tab[base + abs(d - off)] / tot
            row = d * npts
            for k in range(npts):
                wbuf[row + k] = wn
        for k in range(npts):
            a[k] = tot
    _loess_finish(y, n, ideg, npts, j0, _1, ys, xs0 - 1, wbuf, acc, hpos)


@nb.njit(**_JIT)
def _loess_fixed(y, n, len_, ideg, xs0, npts, nleft, nright, userw, rw, tab, toff, ys,
                 wbuf, acc, hpos):
    """`_est` at points ``xs0 + k`` that all use the window ``[nleft, nright]``.

    Each point has its own half-width (end points of a series, or a span longer than
    the series). Writes ``ys[xs0-1 : xs0-1+npts]`` (NaN where no positive weight).
    """
    width = nright - nleft + 1
    a = acc[0]
    for k in range(npts):
        xs = xs0 + k
        h = max(xs - nleft, nright - xs)
        if len_ > n:
            h += (len_ - n) // 2
        hpos[k] = h
        acc[6, k] = float(xs)
        a[k] = 0.0
    hpos[npts] = width
    for d in range(width):
        j = nleft - 1 + d
        rwj = rw[j] if userw else 1.0
        row = d * npts
        for k in range(npts):
            t = tab[toff[hpos[k]] + abs(j + 1 - xs0 - k)]
            if userw:
                t = t * rwj
            wbuf[row + k] = t
            a[k] = a[k] + t
    for d in range(width):
        row = d * npts
        for k in range(npts):
            wbuf[row + k] = wbuf[row + k] / a[k]
    _loess_finish(y, n, ideg, npts, nleft - 1, _0, ys, xs0 - 1, wbuf, acc, hpos)


@nb.njit(**_JIT)
def _ess(y, n, len_, ideg, njump, userw, rw, ys, res, blk, acc, hpos, tab, toff, blocked):
    """LOESS smooth of ``y[:n]`` into ``ys[:n]`` (statsmodels' ``_ess``)."""
    if n < 2:
        ys[0] = y[0]
        return
    newnj = min(njump, n - 1)
    nleft = 1
    nright = n
    if len_ >= n and newnj == 1 and blocked:
        _loess_fixed(y, n, len_, ideg, _1, n, _1, n, userw, rw, tab, toff, ys, blk, acc, hpos)
        for i in range(n):
            if np.isnan(ys[i]):
                ys[i] = y[i]
        return
    if len_ < n and newnj == 1 and blocked:
        nsh = (len_ + 2) // 2
        ninner = n - len_
        _loess_fixed(y, n, len_, ideg, _1, nsh, _1, len_, userw, rw, tab, toff, ys, blk, acc,
                     hpos)
        _loess_shift(y, n, len_, ideg, nsh + 1, _2, ninner, userw, rw, tab, toff, ys, blk,
                     acc, hpos)
        i = nsh + ninner
        _loess_fixed(y, n, len_, ideg, i + 1, n - i, n - len_ + 1, n, userw, rw, tab, toff,
                     ys, blk, acc, hpos)
        for i in range(n):
            if np.isnan(ys[i]):
                ys[i] = y[i]
        return
    if len_ >= n:
        nleft = 1
        nright = n
        i = 0
        while i < n:
            ys[i] = _est(y, n, len_, ideg, i + 1, nleft, nright, res, userw, rw, tab, toff)
            if np.isnan(ys[i]):
                ys[i] = y[i]
            i += newnj
    elif newnj == 1:
        nsh = (len_ + 2) // 2
        nleft = 1
        nright = len_
        i = 0
        while i < n:
            if (i + 1) > nsh and nright != n:
                nleft = nleft + 1
                nright = nright + 1
            ys[i] = _est(y, n, len_, ideg, i + 1, nleft, nright, res, userw, rw, tab, toff)
            if np.isnan(ys[i]):
                ys[i] = y[i]
            i += 1
    else:
        nsh = (len_ + 1) // 2
        i = 0
        while i < n:
            if (i + 1) < nsh:
                nleft = 1
                nright = len_
            elif (i + 1) >= (n - nsh + 1):
                nleft = n - len_ + 1
                nright = n
            else:
                nleft = i + 1 - nsh + 1
                nright = len_ + i + 1 - nsh
            ys[i] = _est(y, n, len_, ideg, i + 1, nleft, nright, res, userw, rw, tab, toff)
            if np.isnan(ys[i]):
                ys[i] = y[i]
            i += newnj
    if newnj == 1:
        return
    i = 0
    while i < (n - newnj):
        delta = (ys[i + newnj] - ys[i]) / newnj
        for j in range(i, i + newnj):
            ys[j] = ys[i] + delta * ((j + 1) - (i + 1))
        i += newnj
    k = ((n - 1) // newnj) * newnj + 1
    if k != n:
        ys[n - 1] = _est(y, n, len_, ideg, n, nleft, nright, res, userw, rw, tab, toff)
        if np.isnan(ys[n - 1]):
            ys[n - 1] = y[n - 1]
        if k != (n - 1):
            delta = (ys[n - 1] - ys[k - 1]) / (n - k)
            for j in range(k, n):
                ys[j] = ys[k - 1] + delta * ((j + 1) - k)


@nb.njit(**_JIT)
def _ma(x, n, len_, ave):
    """Moving average of length ``len_`` over ``x[:n]`` (running sum, as statsmodels)."""
    newn = n - len_ + 1
    flen = float(len_)
    inv = 1.0 / flen
    v = 0.0
    for i in range(len_):
        v = v + x[i]
    ave[0] = exact_div(v, flen, inv)
    k = len_
    m = 0
    for j in range(1, newn):
        v += x[k] - x[m]
        ave[j] = exact_div(v, flen, inv)
        k += 1
        m += 1


@nb.njit(**_JIT)
def _ss(work, n, np_, ns, isdeg, nsjump, userw, rw, season_out, blk, acc, hpos, tab, toff,
        blocked):
    """Cycle-subseries smoothing of ``work[0]`` into ``work[1]`` (n + 2*np values)."""
    y = work[0]
    season = work[1]
    work1 = work[2]
    work2 = work[3]
    work3 = work[4]
    work4 = season_out
    for j in range(np_):
        k = (n - (j + 1)) // np_ + 1
        for i in range(k):
            work1[i] = y[i * np_ + j]
        if userw:
            for i in range(k):
                work3[i] = rw[i * np_ + j]
        _ess(work1, k, ns, isdeg, nsjump, userw, work3, work2[1:], work4, blk, acc, hpos,
             tab, toff, blocked)
        nright = min(ns, k)
        work2[0] = _est(work1, k, ns, isdeg, _0, _1, nright, work4, userw, work3, tab, toff)
        if np.isnan(work2[0]):
            work2[0] = work2[1]
        nleft = max(1, k - ns + 1)
        work2[k + 1] = _est(work1, k, ns, isdeg, k + 1, nleft, k, work4, userw, work3, tab,
                            toff)
        if np.isnan(work2[k + 1]):
            work2[k + 1] = work2[k]
        for m in range(k + 2):
            season[m * np_ + j] = work2[m]


@nb.njit(**_JIT)
def _select(x, n, kth):
    """Rearrange ``x[:n]`` so that ``x[kth]`` is the kth smallest (Hoare quickselect)."""
    lo = 0
    hi = n - 1
    while lo < hi:
        pivot = x[(lo + hi) // 2]
        i = lo
        j = hi
        while i <= j:
            while x[i] < pivot:
                i += 1
            while x[j] > pivot:
                j -= 1
            if i <= j:
                t = x[i]
                x[i] = x[j]
                x[j] = t
                i += 1
                j -= 1
        if kth <= j:
            hi = j
        elif kth >= i:
            lo = i
        else:
            return


@nb.njit(**_JIT)
def _rwts(y, n, fit, rw, buf):
    """Bisquare robustness weights from the residuals ``y - fit``."""
    for i in range(n):
        rw[i] = abs(y[i] - fit[i])
        buf[i] = rw[i]
    m0 = n // 2
    m1 = n - m0 - 1
    _select(buf, n, m0)
    v0 = buf[m0]
    v1 = v0
    if m1 != m0:
        # m1 = m0 - 1: the largest value left of the selected one.
        v1 = buf[0]
        for i in range(1, m0):
            if buf[i] > v1:
                v1 = buf[i]
    cmad = 3.0 * (v0 + v1)
    if cmad == 0:
        for i in range(n):
            rw[i] = 1.0
        return
    c9 = 0.999 * cmad
    c1 = 0.001 * cmad
    inv = 1.0 / cmad
    for i in range(n):
        r = rw[i]
        if r <= c1:
            rw[i] = 1.0
        elif r <= c9:
            q = exact_div(r, cmad, inv)
            q = 1.0 - q * q
            rw[i] = q * q
        else:
            rw[i] = 0.0


@nb.njit(**_JIT)
def _stl_into(y, np_, ns, nt, nl, isdeg, itdeg, ildeg, nsjump, ntjump, nljump, ni, no,
              season, trend, rw, work, blk, acc, hpos, tab, toff, blocked):
    """Full STL fit of ``y`` into ``season``, ``trend``, ``rw`` (statsmodels' ``fit``).

    ``work`` is (7, n + 2*np) scratch; ``blk`` and ``acc`` come from `_block_scratch`.
    """
    n = y.shape[0]
    for i in range(n):
        season[i] = 0.0
        trend[i] = 0.0
        rw[i] = 1.0
    userw = False
    k = 0
    while True:
        for _ in range(ni):
            for i in range(n):
                work[0, i] = y[i] - trend[i]
            _ss(work, n, np_, ns, isdeg, nsjump, userw, rw, season, blk, acc, hpos, tab,
                toff, blocked)
            # _fts: three moving averages of work[1] -> work[2]
            m = n + 2 * np_
            _ma(work[1], m, np_, work[2])
            _ma(work[2], m - np_ + 1, np_, work[0])
            _ma(work[0], m - 2 * np_ + 2, _3, work[2])
            _ess(work[2], n, nl, ildeg, nljump, _FALSE, work[3], work[0], work[4], blk, acc,
                 hpos, tab, toff, blocked)
            for i in range(n):
                season[i] = work[1, np_ + i] - work[0, i]
                work[0, i] = y[i] - season[i]
            _ess(work[0], n, nt, itdeg, ntjump, userw, rw, trend, work[2], blk, acc, hpos,
                 tab, toff, blocked)
        k += 1
        if k > no:
            break
        for i in range(n):
            work[0, i] = trend[i] + season[i]
        _rwts(y, n, work[0], rw, work[5])
        userw = True


@nb.njit(**_JIT)
def _block_scratch(ns, nt, nl, n):
    """Scratch of the vectorised LOESS for series of up to n points."""
    span = max(ns, nt, nl) + 1
    return np.empty(span * n), np.zeros((7, n)), np.zeros(n + 1, dtype=np.int64)


@nb.njit(**_JIT)
def _stl_one(y, np_, ns, nt, nl, isdeg, itdeg, ildeg, nsjump, ntjump, nljump, ni, no,
             tab, toff, blocked):
    n = y.shape[0]
    season = np.empty(n)
    trend = np.empty(n)
    rw = np.empty(n)
    work = np.zeros((7, n + 2 * np_))
    blk, acc, hpos = _block_scratch(ns, nt, nl, n)
    _stl_into(y, np_, ns, nt, nl, isdeg, itdeg, ildeg, nsjump, ntjump, nljump, ni, no,
              season, trend, rw, work, blk, acc, hpos, tab, toff, blocked)
    return season, trend, rw


@nb.njit(**_JIT)
def _stl_windows(y, ends, window, np_, ns, nt, nl, ni, no, tab, toff):
    """STL (default degrees and jumps) on ``y[e-window+1 : e+1]`` for each ``e``."""
    nw = ends.shape[0]
    trend_out = np.empty((nw, window))
    season_out = np.empty((nw, window))
    resid_out = np.empty((nw, window))
    for w in range(nw):
        e = ends[w]
        seg = y[e - window + 1 : e + 1]
        rw = np.empty(window)
        work = np.zeros((7, window + 2 * np_))
        blk, acc, hpos = _block_scratch(ns, nt, nl, window)
        _stl_into(seg, np_, ns, nt, nl, _1, _1, _1, _1, _1, _1, ni, no,
                  season_out[w], trend_out[w], rw, work, blk, acc, hpos, tab, toff, _TRUE)
        for i in range(window):
            resid_out[w, i] = seg[i] - season_out[w, i] - trend_out[w, i]
    return trend_out, season_out, resid_out


@nb.njit(**_JIT)
def _stl_rows(ys, np_, ns, nt, nl, ni, no, tab, toff):
    """STL (default degrees and jumps) of each row of ``ys``; returns (trend, season)."""
    nr, n = ys.shape
    trend_out = np.empty((nr, n))
    season_out = np.empty((nr, n))
    for r in range(nr):
        rw = np.empty(n)
        work = np.zeros((7, n + 2 * np_))
        blk, acc, hpos = _block_scratch(ns, nt, nl, n)
        _stl_into(ys[r], np_, ns, nt, nl, _1, _1, _1, _1, _1, _1, ni, no,
                  season_out[r], trend_out[r], rw, work, blk, acc, hpos, tab, toff, _TRUE)
    return trend_out, season_out


# --------------------------------------------------------------------------- weight reuse
#
# Every LOESS weight of a fit depends only on the settings and the robustness weights,
# and those change once per outer iteration, never between the inner iterations; the
# low-pass smoother never uses them. So the final per-point weights of statsmodels'
# ``_est`` (tricube * rw, divided by the sum, times the slope factor) are computed once
# per outer iteration, with statsmodels' operations in its order, and each LOESS pass
# is then one weighted sum per point, again in statsmodels' order: same bits, fewer
# passes. The non-robust weights (first outer iteration, low-pass) are built once per
# settings and cached.
#
# A smoother "plan" is a list of blocks. Block b has L lanes (output points computed
# together, the vectorised dimension) and D offsets; lane l at offset d reads data index
# ``base[d] + ls*l`` (ls = 1: consecutive points or cycle-subseries; ls = 0: all lanes
# share one window). Weights are stored as ``W[woff + d*L + l]``.

_B_L, _B_D, _B_LS, _B_WOFF, _B_LOFF, _B_BOFF, _B_OUT0, _B_FBK, _B_FB0 = range(9)


class _Plan(NamedTuple):
    """Blocks of one LOESS smoother (see the section comment)."""

    info: np.ndarray   # (nblocks, 9) int64, columns _B_*
    base: np.ndarray   # (sum D,) int64: data index of lane 0 at each offset
    tw: np.ndarray     # (sum D*L,) float64: tricube weights
    pl: np.ndarray     # (sum L,) float64: 1-based window start of each lane
    xs: np.ndarray     # (sum L,) float64: 1-based position of each lane's point
    hf: np.ndarray     # (sum L,) int64: 1 if the lane's half-width is > 0
    lim: np.ndarray    # (nblocks,) float64: 0.001 * (series length - 1)
    ideg: int


def _new_block(blocks: list, lanes_xs: np.ndarray, nleft: np.ndarray, width: int,
               ls: int, base0: int, dstride: int, h: np.ndarray, nser: int,
               out0: int, fbk: int, fb0: int, tab: np.ndarray, toff: np.ndarray) -> None:
    d = np.arange(width)
    r = np.abs(nleft[None, :] + d[:, None] - lanes_xs[None, :])
    tw = tab[toff[h][None, :] + r]
    blocks.append((lanes_xs, nleft, width, ls, base0 + dstride * d, h, nser, out0, fbk,
                   fb0, tw))


def _series_blocks(blocks: list, n: int, len_: int, tab: np.ndarray,
                   toff: np.ndarray) -> None:
    """Blocks of statsmodels' ``_ess`` (jump 1) over a series of n points."""
    extra = (len_ - n) // 2 if len_ > n else 0
    segs = []
    if len_ >= n:
        segs.append((np.arange(1, n + 1), np.ones(n, np.int64), n, 0))
    else:
        nsh = (len_ + 2) // 2
        nin = n - len_
        segs.append((np.arange(1, nsh + 1), np.ones(nsh, np.int64), len_, 0))
        if nin:
            segs.append((np.arange(nsh + 1, nsh + nin + 1), np.arange(2, nin + 2), len_, 1))
        rest = np.arange(nsh + nin + 1, n + 1)
        if rest.size:
            segs.append((rest, np.full(rest.size, n - len_ + 1), len_, 0))
    for xs, nleft, width, ls in segs:
        h = np.maximum(xs - nleft, nleft + width - 1 - xs) + extra
        _new_block(blocks, xs, nleft, width, ls, int(nleft[0]) - 1, 1, h, n,
                   int(xs[0]) - 1, 0, int(xs[0]) - 1, tab, toff)


def _subseries_blocks(blocks: list, n: int, np_: int, ns: int, tab: np.ndarray,
                      toff: np.ndarray) -> None:
    """Blocks of statsmodels' ``_ss``: lanes are cycle-subseries of equal length k."""
    q, rem = divmod(n, np_)
    groups = [(0, rem, q + 1), (rem, np_, q)] if rem else [(0, np_, q)]
    for j0, j1, k in groups:
        if j1 <= j0:
            continue
        lanes = j1 - j0
        extra = (ns - k) // 2 if ns > k else 0
        ends = []
        for xs in range(1, k + 1):
            if ns >= k:
                nleft, width = 1, k
            else:
                nleft = min(1 + max(0, xs - (ns + 2) // 2), k - ns + 1)
                width = ns
            ends.append((xs, nleft, width, xs * np_ + j0, 0, (xs - 1) * np_ + j0))
        nright = min(ns, k)
        ends.append((0, 1, nright, j0, 1, np_ + j0))
        nleft = max(1, k - ns + 1)
        ends.append((k + 1, nleft, k - nleft + 1, (k + 1) * np_ + j0, 1, k * np_ + j0))
        for xs, nleft, width, out0, fbk, fb0 in ends:
            h = max(xs - nleft, nleft + width - 1 - xs) + extra
            xa = np.full(lanes, xs, np.int64)
            _new_block(blocks, xa, np.full(lanes, nleft, np.int64), width, 1,
                       (nleft - 1) * np_ + j0, np_, np.full(lanes, h, np.int64), k, out0,
                       fbk, fb0, tab, toff)


def _merge(blocks: list) -> list:
    """Join neighbouring blocks whose lanes continue each other in data and output.

    Interior cycle-subseries points of one length then form a single long block
    (lane = point * period + subseries); the arithmetic per lane is unchanged.
    """
    out: list = []
    for b in blocks:
        if out:
            p = out[-1]
            nlan = p[0].size
            if (p[3] == 1 and b[3] == 1 and p[2] == b[2] and p[6] == b[6] and p[8] == b[8]
                    and b[7] == p[7] + nlan and b[9] == p[9] + nlan
                    and np.array_equal(b[4], p[4] + nlan)):
                out[-1] = (np.concatenate([p[0], b[0]]), np.concatenate([p[1], b[1]]),
                           p[2], 1, p[4], np.concatenate([p[5], b[5]]), p[6], p[7], p[8],
                           p[9], np.concatenate([p[10], b[10]], axis=1))
                continue
        out.append(b)
    return out


def _pack(blocks: list, ideg: int) -> _Plan:
    blocks = _merge(blocks)
    info = np.zeros((len(blocks), 9), np.int64)
    woff = loff = boff = 0
    for i, (xs, _, width, ls, _, _, _, out0, fbk, fb0, _) in enumerate(blocks):
        info[i] = (xs.size, width, ls, woff, loff, boff, out0, fbk, fb0)
        woff += xs.size * width
        loff += xs.size
        boff += width
    cat = np.concatenate
    return _Plan(
        info,
        cat([b[4] for b in blocks]).astype(np.int64),
        cat([b[10].ravel() for b in blocks]).astype(np.float64),
        cat([b[1] for b in blocks]).astype(np.float64),
        cat([b[0] for b in blocks]).astype(np.float64),
        cat([(b[5] > 0) for b in blocks]).astype(np.int64),
        np.array([0.001 * (b[6] - 1.0) for b in blocks]),
        int(ideg),
    )


_CHUNK = 256  # lanes per pass group (chosen by timing: 128-256 fastest, 64 and 512 slower)


@nb.njit(**_JIT)
def _plan_weights(info, base, tw, pl, xs, hf, lim, ideg, rw, wout, scr):
    """Final LOESS weights of every block for robustness weights `rw` into `wout`.

    `scr` is scratch of at least 5 rows of the longest block's lane count.

    Per lane, statsmodels' ``_est`` order: a = sum(t*rw); w = t*rw/a; m = sum(w*j);
    c = sum(w*(j-m)**2); b = (xs-m)/c if h > 0 and sqrt(c) > lim; w *= b*(j-m) + 1.
    Rows are taken as slices so that every inner loop is a plain unit-stride loop
    over lanes, which the compiler vectorises without reordering any sum.
    """
    for bi in range(info.shape[0]):
        nlan = info[bi, _B_L]
        for l0 in range(0, nlan, _CHUNK):
            _weights_chunk(info, bi, l0, min(nlan, l0 + _CHUNK), base, tw, pl, xs, hf,
                           lim, ideg, rw, wout, scr)


@nb.njit(**_JIT)
def _weights_chunk(info, bi, l0, l1, base, tw, pl, xs, hf, lim, ideg, rw, wout, scr):
    """Lanes ``l0:l1`` of block `bi` for `_plan_weights`."""
    nlan = info[bi, _B_L]
    nd = info[bi, _B_D]
    ls = info[bi, _B_LS]
    woff = info[bi, _B_WOFF] + l0
    loff = info[bi, _B_LOFF] + l0
    boff = info[bi, _B_BOFF]
    nc = l1 - l0
    a = scr[0, :nc]
    m = scr[1, :nc]
    c = scr[2, :nc]
    bb = scr[3, :nc]
    pll = pl[loff : loff + nc]
    xsl = xs[loff : loff + nc]
    hfl = hf[loff : loff + nc]
    for lane in range(nc):
        a[lane] = 0.0
        m[lane] = 0.0
        c[lane] = 0.0
        bb[lane] = 0.0
    for d in range(nd):
        t = tw[woff + d * nlan : woff + d * nlan + nc]
        src = base[boff + d] + ls * l0
        if ls == 1:
            r = rw[src : src + nc]
            for lane in range(nc):
                a[lane] = a[lane] + t[lane] * r[lane]
        else:
            r0 = rw[src]
            for lane in range(nc):
                a[lane] = a[lane] + t[lane] * r0
    inv = scr[4, :nc]
    for lane in range(nc):
        inv[lane] = 1.0 / a[lane]
    # One written array per loop keeps the compiler's overlap checks few enough for it
    # to vectorise each loop.
    for d in range(nd):
        t = tw[woff + d * nlan : woff + d * nlan + nc]
        wr = wout[woff + d * nlan : woff + d * nlan + nc]
        src = base[boff + d] + ls * l0
        if ls == 1:
            r = rw[src : src + nc]
            for lane in range(nc):
                wr[lane] = exact_div(t[lane] * r[lane], a[lane], inv[lane])
        else:
            r0 = rw[src]
            for lane in range(nc):
                wr[lane] = exact_div(t[lane] * r0, a[lane], inv[lane])
        fd = float(d)
        for lane in range(nc):
            m[lane] = m[lane] + wr[lane] * (pll[lane] + fd)
    if ideg == 0:
        return
    for d in range(nd):
        wr = wout[woff + d * nlan : woff + d * nlan + nc]
        fd = float(d)
        for lane in range(nc):
            e = (pll[lane] + fd) - m[lane]
            c[lane] = c[lane] + wr[lane] * (e * e)
    lm = lim[bi]
    for lane in range(nc):
        if hfl[lane] > 0 and math.sqrt(c[lane]) > lm:
            bb[lane] = (xsl[lane] - m[lane]) / c[lane]
    # Lanes without a slope get the factor 0*(j-m) + 1 == 1.0 exactly.
    for d in range(nd):
        wr = wout[woff + d * nlan : woff + d * nlan + nc]
        fd = float(d)
        for lane in range(nc):
            wr[lane] = wr[lane] * (bb[lane] * ((pll[lane] + fd) - m[lane]) + 1.0)


@nb.njit(**_JIT)
def _plan_apply(info, base, wts, y, out, s):
    """LOESS of `y` with prepared weights into `out` (NaN falls back as statsmodels)."""
    for bi in range(info.shape[0]):
        nlan = info[bi, _B_L]
        nd = info[bi, _B_D]
        ls = info[bi, _B_LS]
        woff = info[bi, _B_WOFF]
        boff = info[bi, _B_BOFF]
        acc = s[:nlan]
        for lane in range(nlan):
            acc[lane] = 0.0
        for d in range(nd):
            wr = wts[woff + d * nlan : woff + (d + 1) * nlan]
            src = base[boff + d]
            if ls == 1:
                yr = y[src : src + nlan]
                for lane in range(nlan):
                    acc[lane] = acc[lane] + wr[lane] * yr[lane]
            else:
                v = y[src]
                for lane in range(nlan):
                    acc[lane] = acc[lane] + wr[lane] * v
        out0 = info[bi, _B_OUT0]
        fb0 = info[bi, _B_FB0]
        dst = out[out0 : out0 + nlan]
        if info[bi, _B_FBK] == 0:
            fb = y[fb0 : fb0 + nlan]
        else:
            fb = out[fb0 : fb0 + nlan]
        for lane in range(nlan):
            v = acc[lane]
            dst[lane] = fb[lane] if np.isnan(v) else v


@nb.njit(**_JIT)
def _stl_plan_into(y, np_, ni, no, sp, tp, lp, ws0, wt0, wl, season, trend, rw, work,
                   ws, wt, scr):
    """`_stl_into` (jumps 1) with prepared weights: same operations, same bits.

    `sp`, `tp`, `lp` are the seasonal, trend and low-pass plans; `ws0`, `wt0`, `wl` their
    non-robust weights; `ws`, `wt` receive the robust weights of each outer iteration.
    """
    n = y.shape[0]
    for i in range(n):
        season[i] = 0.0
        trend[i] = 0.0
        rw[i] = 1.0
    cur_s = ws0
    cur_t = wt0
    m = n + 2 * np_
    k = 0
    while True:
        for _ in range(ni):
            for i in range(n):
                work[0, i] = y[i] - trend[i]
            _plan_apply(sp[0], sp[1], cur_s, work[0], work[1], scr[0])
            _ma(work[1], m, np_, work[2])
            _ma(work[2], m - np_ + 1, np_, work[0])
            _ma(work[0], m - 2 * np_ + 2, _3, work[2])
            _plan_apply(lp[0], lp[1], wl, work[2], work[0], scr[0])
            for i in range(n):
                season[i] = work[1, np_ + i] - work[0, i]
                work[0, i] = y[i] - season[i]
            _plan_apply(tp[0], tp[1], cur_t, work[0], trend, scr[0])
        k += 1
        if k > no:
            break
        for i in range(n):
            work[0, i] = trend[i] + season[i]
        _rwts(y, n, work[0], rw, work[5])
        _plan_weights(sp[0], sp[1], sp[2], sp[3], sp[4], sp[5], sp[6], sp[7], rw, ws, scr)
        _plan_weights(tp[0], tp[1], tp[2], tp[3], tp[4], tp[5], tp[6], tp[7], rw, wt, scr)
        cur_s = ws
        cur_t = wt


@nb.njit(**_JIT)
def _plan_scratch(n, np_, nws, nwt):
    return (np.empty(nws), np.empty(nwt), np.zeros((7, n + 2 * np_)),
            np.empty((5, n + 2 * np_)))


@nb.njit(**_JIT)
def _stl_plan_one(y, np_, ni, no, sp, tp, lp, ws0, wt0, wl):
    n = y.shape[0]
    season = np.empty(n)
    trend = np.empty(n)
    rw = np.empty(n)
    ws, wt, work, scr = _plan_scratch(n, np_, ws0.shape[0], wt0.shape[0])
    _stl_plan_into(y, np_, ni, no, sp, tp, lp, ws0, wt0, wl, season, trend, rw, work,
                   ws, wt, scr)
    return season, trend, rw


@nb.njit(**_JIT)
def _stl_plan_windows(y, ends, window, np_, ni, no, sp, tp, lp, ws0, wt0, wl):
    """`_stl_windows` with prepared weights (one plan shared by all windows)."""
    nw = ends.shape[0]
    trend_out = np.empty((nw, window))
    season_out = np.empty((nw, window))
    resid_out = np.empty((nw, window))
    for w in range(nw):
        e = ends[w]
        seg = y[e - window + 1 : e + 1]
        rw = np.empty(window)
        ws, wt, work, scr = _plan_scratch(window, np_, ws0.shape[0], wt0.shape[0])
        _stl_plan_into(seg, np_, ni, no, sp, tp, lp, ws0, wt0, wl, season_out[w],
                       trend_out[w], rw, work, ws, wt, scr)
        for i in range(window):
            resid_out[w, i] = seg[i] - season_out[w, i] - trend_out[w, i]
    return trend_out, season_out, resid_out


class _Plans(NamedTuple):
    seasonal: _Plan
    trend: _Plan
    low_pass: _Plan
    w_seasonal: np.ndarray  # non-robust weights
    w_trend: np.ndarray
    w_low_pass: np.ndarray


def _plan_args(p: _Plan) -> tuple:
    return (p.info, p.base, p.tw, p.pl, p.xs, p.hf, p.lim, p.ideg)


@functools.lru_cache(maxsize=32)
def _plans(n: int, np_: int, ns: int, nt: int, nl: int, isdeg: int, itdeg: int,
           ildeg: int) -> _Plans:
    """Plans and non-robust weights of a fit with jumps 1 (cached; needs n >= 2*np_)."""
    tab, toff = _table_for(n, ns, nt, nl)
    built = []
    for kind, length, deg in (("s", ns, isdeg), ("t", nt, itdeg), ("l", nl, ildeg)):
        blocks: list = []
        if kind == "s":
            _subseries_blocks(blocks, n, np_, ns, tab, toff)
        else:
            _series_blocks(blocks, n, length, tab, toff)
        built.append(_pack(blocks, deg))
    size = n + 2 * np_
    ones = np.ones(size)
    scr = np.empty((5, size))
    wts = []
    for p in built:
        w = np.empty(p.tw.shape[0])
        _plan_weights(*_plan_args(p), ones, w, scr)
        wts.append(w)
    return _Plans(built[0], built[1], built[2], wts[0], wts[1], wts[2])


def _plan_ok(n: int, period: int, jumps: tuple) -> bool:
    """Whether the weight-reuse kernel covers these settings (jumps 1, >= 2 cycles)."""
    return all(int(j) == 1 for j in jumps) and n >= 2 * period


def _plan_call(p: _Plans) -> tuple:
    """Arguments of `_stl_plan_one` / `_stl_plan_windows` after ``ni, no``."""
    return (_plan_args(p.seasonal), _plan_args(p.trend), _plan_args(p.low_pass),
            p.w_seasonal, p.w_trend, p.w_low_pass)


# --------------------------------------------------------------------------- Python API


def _iterations(robust: bool, inner_iter: int | None, outer_iter: int | None) -> tuple[int, int]:
    ni = (2 if robust else 5) if inner_iter is None else int(inner_iter)
    no = (15 if robust else 0) if outer_iter is None else int(outer_iter)
    return ni, no


def _as_series(y: object) -> np.ndarray:
    arr = np.ascontiguousarray(np.squeeze(np.asarray(y, dtype=np.float64)))
    if arr.ndim != 1:
        raise ValueError(f"y must be one-dimensional, but got shape {arr.shape}")
    return _readonly(arr)


def _readonly(arr: np.ndarray) -> np.ndarray:
    """A read-only view (no copy): the kernels see one array type whatever the caller
    passed, so each compiles once instead of once per writeable flag."""
    view = arr.view()
    view.flags.writeable = False
    return view


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
    ni, no = _iterations(robust, inner_iter, outer_iter)
    if reuse_weights and _plan_ok(ya.shape[0], int(period), (seasonal_jump, trend_jump,
                                                               low_pass_jump)):
        plans = _plans(ya.shape[0], int(period), int(seasonal), nt, nl, int(seasonal_deg),
                       int(trend_deg), int(low_pass_deg))
        season, tr, _ = _stl_plan_one(ya, int(period), ni, no, *_plan_call(plans))
        return tr, season, ya - season - tr
    tab, toff = _table_for(ya.shape[0], seasonal, nt, nl)
    season, tr, _ = _stl_one(ya, int(period), int(seasonal), nt, nl, int(seasonal_deg),
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
    ni, no = _iterations(robust, None, None)
    if reuse_weights and _plan_ok(window, int(period), (1, 1, 1)):
        plans = _plans(window, int(period), int(seasonal), nt, nl, 1, 1, 1)
        return _stl_plan_windows(ya, ends_a, window, int(period), ni, no,
                                 *_plan_call(plans))
    tab, toff = _table_for(window, seasonal, nt, nl)
    return _stl_windows(ya, ends_a, window, int(period), int(seasonal), nt, nl, ni, no,
                        tab, toff)


def _mstl_settings(
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
    per, win = _mstl_settings(n, periods, windows)
    if not per:
        raise ValueError("no period is shorter than half the series")
    iterate = 1 if len(per) == 1 else int(iterate)
    ni, no = _iterations(robust, None, None)
    seasonal = np.zeros((len(per), n))
    deseas = ya
    tr = np.zeros(n)
    for _ in range(iterate):
        for i, (p, s) in enumerate(zip(per, win, strict=True)):
            deseas = deseas + seasonal[i]
            nt, nl = stl_config(p, s)
            yd = _readonly(np.ascontiguousarray(deseas))
            if _plan_ok(n, p, (1, 1, 1)):
                season, tr, _ = _stl_plan_one(yd, p, ni, no,
                                              *_plan_call(_plans(n, p, s, nt, nl, 1, 1, 1)))
            else:
                tab, toff = _table_for(n, s, nt, nl)
                season, tr, _ = _stl_one(yd, p, s, nt, nl, 1, 1, 1, 1, 1, 1, ni, no, tab, toff,
                                         True)
            seasonal[i] = season
            deseas = deseas - seasonal[i]
    resid = deseas - tr
    return tr, seasonal, resid


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
        per, win = _mstl_settings(window, (int(period), 7 * int(period)), None)
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

    Through the weight-reuse kernel when it covers the rows (same bits as `_stl_rows`,
    and the replay's other fits compile it anyway), else through `_stl_rows`.
    """
    ni, no = _iterations(False, None, None)
    nr, n = ys.shape
    if _plan_ok(n, period, (1, 1, 1)):
        flat = _readonly(np.ascontiguousarray(ys, dtype=np.float64).reshape(-1))
        ends = np.arange(n - 1, nr * n, n, dtype=np.int64)
        plans = _plans(n, period, seasonal, nt, nl, 1, 1, 1)
        tr, season, _ = _stl_plan_windows(flat, ends, n, period, ni, no, *_plan_call(plans))
        return tr, season
    tab, toff = _table_for(n, seasonal, nt, nl)
    return _stl_rows(_readonly(np.ascontiguousarray(ys, dtype=np.float64)), period, seasonal,
                     nt, nl, ni, no, tab, toff)


def trend_matrix(window: int, period: int, seasonal: int, trend: int = 0,
                 weekly: bool = False) -> np.ndarray:
    """T of `linear_smoother` (cached, read-only)."""
    return linear_smoother(window, period, seasonal, trend, weekly).trend


def seasonal_matrix(window: int, period: int, seasonal: int, trend: int = 0,
                    weekly: bool = False) -> np.ndarray:
    """S of `linear_smoother` (cached, read-only)."""
    return linear_smoother(window, period, seasonal, trend, weekly).seasonal
