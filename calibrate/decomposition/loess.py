"""Compiled (numba) building blocks shared by both STL kernels (pipeline stage 3).

Ported from statsmodels' ``tsa/stl/_stl.pyx`` (itself a port of the NETLIB Fortran)
operation by operation, so that fits are bit-identical to statsmodels on the same
machine: the compile settings every kernel uses (`JIT`, the numpy-scalar constants,
`readonly`), the tricube weight table, statsmodels' LOESS (`est`, `ess`), the moving
average (`ma`) and the bisquare robustness weights (`rwts`). Three changes keep the
bits and remove the cost:

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
"""

from __future__ import annotations

import functools
import math

import numba as nb
import numpy as np
from numba import types
from numba.extending import intrinsic

__all__ = [
    "FALSE",
    "JIT",
    "ONE",
    "THREE",
    "TRUE",
    "TWO",
    "ZERO",
    "ess",
    "est",
    "exact_div",
    "ma",
    "readonly",
    "rwts",
    "table_for",
]

JIT = dict(cache=True, nogil=True, error_model="numpy")
# A bare constant passed to another compiled function is typed as a literal
# (Literal[int](1)), which compiles a second copy of the callee beside its int64 one.
# Numpy scalars keep the plain types, so every caller shares one compiled copy: pass
# these instead of 0, 1, 2, 3, True and False (it shortens the cold-cache compile).
# Numba finds a compiled callee by its global name in the caller's module, so the other
# kernel modules from-import the callees and these constants.
ZERO, ONE, TWO, THREE = (np.int64(i) for i in range(4))
TRUE, FALSE = np.bool_(True), np.bool_(False)


def readonly(arr: np.ndarray) -> np.ndarray:
    """A read-only view (no copy): the kernels see one array type whatever the caller
    passed, so each compiles once instead of once per writeable flag."""
    view = arr.view()
    view.flags.writeable = False
    return view


@intrinsic
def _fma(typingctx, a, b, c):
    """``a*b + c`` with one rounding (LLVM's fma; a vector instruction where the CPU has it)."""
    sig = types.float64(types.float64, types.float64, types.float64)

    def codegen(context, builder, signature, args):
        return builder.fma(*args)

    return sig, codegen


@nb.njit(inline="always", **JIT)
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


# --------------------------------------------------------------------------- weights


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


def table_for(n: int, seasonal: int, trend: int, low_pass: int) -> tuple[np.ndarray, np.ndarray]:
    """Tricube table ``(table, offsets)`` that covers every LOESS of a fit (cached)."""
    # Largest half-width any LOESS of a fit can use: len - 1 inside the series, len at the
    # cycle-subseries end points and when a span exceeds the data (+1 spare).
    del n
    return _weight_table(max(seasonal, trend, low_pass) + 1)


# ------------------------------------------------------------------ LOESS, moving average


@nb.njit(**JIT)
def est(y, n, len_, ideg, xs, nleft, nright, w, userw, rw, tab, toff):
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


@nb.njit(**JIT)
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


@nb.njit(**JIT)
def _loess_shift(y, n, len_, ideg, xs0, nleft0, npts, userw, rw, tab, toff, ys, wbuf, acc,
                 hpos):
    """`est` at points ``xs0 + k`` with windows ``[nleft0 + k, nleft0 + k + len_ - 1]``.

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
    _loess_finish(y, n, ideg, npts, j0, ONE, ys, xs0 - 1, wbuf, acc, hpos)


@nb.njit(**JIT)
def _loess_fixed(y, n, len_, ideg, xs0, npts, nleft, nright, userw, rw, tab, toff, ys,
                 wbuf, acc, hpos):
    """`est` at points ``xs0 + k`` that all use the window ``[nleft, nright]``.

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
    _loess_finish(y, n, ideg, npts, nleft - 1, ZERO, ys, xs0 - 1, wbuf, acc, hpos)


@nb.njit(**JIT)
def ess(y, n, len_, ideg, njump, userw, rw, ys, res, blk, acc, hpos, tab, toff, blocked):
    """LOESS smooth of ``y[:n]`` into ``ys[:n]`` (statsmodels' ``_ess``)."""
    if n < 2:
        ys[0] = y[0]
        return
    newnj = min(njump, n - 1)
    nleft = ONE
    nright = n
    if len_ >= n and newnj == 1 and blocked:
        _loess_fixed(y, n, len_, ideg, ONE, n, ONE, n, userw, rw, tab, toff, ys, blk, acc, hpos)
        for i in range(n):
            if np.isnan(ys[i]):
                ys[i] = y[i]
        return
    if len_ < n and newnj == 1 and blocked:
        nsh = (len_ + 2) // 2
        ninner = n - len_
        _loess_fixed(y, n, len_, ideg, ONE, nsh, ONE, len_, userw, rw, tab, toff, ys, blk, acc,
                     hpos)
        _loess_shift(y, n, len_, ideg, nsh + 1, TWO, ninner, userw, rw, tab, toff, ys, blk,
                     acc, hpos)
        i = nsh + ninner
        _loess_fixed(y, n, len_, ideg, i + 1, n - i, n - len_ + 1, n, userw, rw, tab, toff,
                     ys, blk, acc, hpos)
        for i in range(n):
            if np.isnan(ys[i]):
                ys[i] = y[i]
        return
    if len_ >= n:
        nleft = ONE
        nright = n
        i = 0
        while i < n:
            ys[i] = est(y, n, len_, ideg, i + 1, nleft, nright, res, userw, rw, tab, toff)
            if np.isnan(ys[i]):
                ys[i] = y[i]
            i += newnj
    elif newnj == 1:
        nsh = (len_ + 2) // 2
        nleft = ONE
        nright = len_
        i = 0
        while i < n:
            if (i + 1) > nsh and nright != n:
                nleft = nleft + 1
                nright = nright + 1
            ys[i] = est(y, n, len_, ideg, i + 1, nleft, nright, res, userw, rw, tab, toff)
            if np.isnan(ys[i]):
                ys[i] = y[i]
            i += 1
    else:
        nsh = (len_ + 1) // 2
        i = 0
        while i < n:
            if (i + 1) < nsh:
                nleft = ONE
                nright = len_
            elif (i + 1) >= (n - nsh + 1):
                nleft = n - len_ + 1
                nright = n
            else:
                nleft = i + 1 - nsh + 1
                nright = len_ + i + 1 - nsh
            ys[i] = est(y, n, len_, ideg, i + 1, nleft, nright, res, userw, rw, tab, toff)
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
        ys[n - 1] = est(y, n, len_, ideg, n, nleft, nright, res, userw, rw, tab, toff)
        if np.isnan(ys[n - 1]):
            ys[n - 1] = y[n - 1]
        if k != (n - 1):
            delta = (ys[n - 1] - ys[k - 1]) / (n - k)
            for j in range(k, n):
                ys[j] = ys[k - 1] + delta * ((j + 1) - k)


@nb.njit(**JIT)
def ma(x, n, len_, ave):
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


# --------------------------------------------------------------------------- robustness


@nb.njit(**JIT)
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


@nb.njit(**JIT)
def rwts(y, n, fit, rw, buf):
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
