"""The generic compiled STL kernel: statsmodels' ``fit`` for any degrees and jumps.

Statsmodels' ``_stl.pyx`` ``fit`` operation by operation (same bits): cycle-subseries
smoothing (`_ss`), the low-pass filter and the trend smoother, inner and outer
(robustness) iterations (`stl_into`); one fit (`stl_one`), trailing windows of one
series (`stl_windows`) and the rows of a matrix (`stl_rows`). With jumps 1 and at least
two cycles, `calibrate.decomposition.stl_plan` gives the same bits faster; this kernel
covers every other setting and is the reference the weight-reuse path is tested against.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from calibrate.decomposition.loess import (
    FALSE,
    JIT,
    ONE,
    THREE,
    TRUE,
    ZERO,
    ess,
    est,
    ma,
    rwts,
)

__all__ = ["stl_into", "stl_one", "stl_rows", "stl_windows"]


@nb.njit(**JIT)
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
        ess(work1, k, ns, isdeg, nsjump, userw, work3, work2[1:], work4, blk, acc, hpos,
            tab, toff, blocked)
        nright = min(ns, k)
        work2[0] = est(work1, k, ns, isdeg, ZERO, ONE, nright, work4, userw, work3, tab, toff)
        if np.isnan(work2[0]):
            work2[0] = work2[1]
        nleft = max(1, k - ns + 1)
        work2[k + 1] = est(work1, k, ns, isdeg, k + 1, nleft, k, work4, userw, work3, tab,
                           toff)
        if np.isnan(work2[k + 1]):
            work2[k + 1] = work2[k]
        for m in range(k + 2):
            season[m * np_ + j] = work2[m]


@nb.njit(**JIT)
def stl_into(y, np_, ns, nt, nl, isdeg, itdeg, ildeg, nsjump, ntjump, nljump, ni, no,
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
            ma(work[1], m, np_, work[2])
            ma(work[2], m - np_ + 1, np_, work[0])
            ma(work[0], m - 2 * np_ + 2, THREE, work[2])
            ess(work[2], n, nl, ildeg, nljump, FALSE, work[3], work[0], work[4], blk, acc,
                hpos, tab, toff, blocked)
            for i in range(n):
                season[i] = work[1, np_ + i] - work[0, i]
                work[0, i] = y[i] - season[i]
            ess(work[0], n, nt, itdeg, ntjump, userw, rw, trend, work[2], blk, acc, hpos,
                tab, toff, blocked)
        k += 1
        if k > no:
            break
        for i in range(n):
            work[0, i] = trend[i] + season[i]
        rwts(y, n, work[0], rw, work[5])
        userw = True


@nb.njit(**JIT)
def _block_scratch(ns, nt, nl, n):
    """Scratch of the vectorised LOESS for series of up to n points."""
    span = max(ns, nt, nl) + 1
    return np.empty(span * n), np.zeros((7, n)), np.zeros(n + 1, dtype=np.int64)


@nb.njit(**JIT)
def stl_one(y, np_, ns, nt, nl, isdeg, itdeg, ildeg, nsjump, ntjump, nljump, ni, no,
            tab, toff, blocked):
    """STL of ``y``; returns ``(season, trend, rw)`` (``rw``: final robustness weights)."""
    n = y.shape[0]
    season = np.empty(n)
    trend = np.empty(n)
    rw = np.empty(n)
    work = np.zeros((7, n + 2 * np_))
    blk, acc, hpos = _block_scratch(ns, nt, nl, n)
    stl_into(y, np_, ns, nt, nl, isdeg, itdeg, ildeg, nsjump, ntjump, nljump, ni, no,
             season, trend, rw, work, blk, acc, hpos, tab, toff, blocked)
    return season, trend, rw


@nb.njit(**JIT)
def stl_windows(y, ends, window, np_, ns, nt, nl, ni, no, tab, toff):
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
        stl_into(seg, np_, ns, nt, nl, ONE, ONE, ONE, ONE, ONE, ONE, ni, no,
                 season_out[w], trend_out[w], rw, work, blk, acc, hpos, tab, toff, TRUE)
        for i in range(window):
            resid_out[w, i] = seg[i] - season_out[w, i] - trend_out[w, i]
    return trend_out, season_out, resid_out


@nb.njit(**JIT)
def stl_rows(ys, np_, ns, nt, nl, ni, no, tab, toff):
    """STL (default degrees and jumps) of each row of ``ys``; returns (trend, season)."""
    nr, n = ys.shape
    trend_out = np.empty((nr, n))
    season_out = np.empty((nr, n))
    for r in range(nr):
        rw = np.empty(n)
        work = np.zeros((7, n + 2 * np_))
        blk, acc, hpos = _block_scratch(ns, nt, nl, n)
        stl_into(ys[r], np_, ns, nt, nl, ONE, ONE, ONE, ONE, ONE, ONE, ni, no,
                 season_out[r], trend_out[r], rw, work, blk, acc, hpos, tab, toff, TRUE)
    return trend_out, season_out
