"""The weight-reuse ("plan") STL kernel: statsmodels' STL with jumps 1, same bits, faster.

Every LOESS weight of a fit depends only on the settings and the robustness weights,
and those change once per outer iteration, never between the inner iterations; the
low-pass smoother never uses them. So the final per-point weights of statsmodels'
``_est`` (tricube * rw, divided by the sum, times the slope factor) are computed once
per outer iteration, with statsmodels' operations in its order, and each LOESS pass
is then one weighted sum per point, again in statsmodels' order: same bits, fewer
passes. The non-robust weights (first outer iteration, low-pass) are built once per
settings and cached (`build_plans`). Covers jumps 1 and series of two cycles or more
(`plan_ok`); `calibrate.decomposition.stl_core` fits everything else.
"""

from __future__ import annotations

import functools
import math
from typing import NamedTuple

import numba as nb
import numpy as np

from calibrate.decomposition.loess import JIT, THREE, exact_div, ma, rwts, table_for

__all__ = ["Plans", "build_plans", "plan_call", "plan_ok", "stl_plan_one", "stl_plan_windows"]

# A smoother "plan" is a list of blocks. Block b has L lanes (output points computed
# together, the vectorised dimension) and D offsets; lane l at offset d reads data index
# ``base[d] + ls*l`` (ls = 1: consecutive points or cycle-subseries; ls = 0: all lanes
# share one window). Weights are stored as ``W[woff + d*L + l]``.

_B_L, _B_D, _B_LS, _B_WOFF, _B_LOFF, _B_BOFF, _B_OUT0, _B_FBK, _B_FB0 = range(9)


class _Plan(NamedTuple):
    """Blocks of one LOESS smoother (layout in the comment above `_B_L`)."""

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


@nb.njit(**JIT)
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


@nb.njit(**JIT)
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


@nb.njit(**JIT)
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


@nb.njit(**JIT)
def _stl_plan_into(y, np_, ni, no, sp, tp, lp, ws0, wt0, wl, season, trend, rw, work,
                   ws, wt, scr):
    """`stl_core.stl_into` (jumps 1) with prepared weights: same operations, same bits.

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
            ma(work[1], m, np_, work[2])
            ma(work[2], m - np_ + 1, np_, work[0])
            ma(work[0], m - 2 * np_ + 2, THREE, work[2])
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
        rwts(y, n, work[0], rw, work[5])
        _plan_weights(sp[0], sp[1], sp[2], sp[3], sp[4], sp[5], sp[6], sp[7], rw, ws, scr)
        _plan_weights(tp[0], tp[1], tp[2], tp[3], tp[4], tp[5], tp[6], tp[7], rw, wt, scr)
        cur_s = ws
        cur_t = wt


@nb.njit(**JIT)
def _plan_scratch(n, np_, nws, nwt):
    """Robust-weight buffers, work and lane scratch of `_stl_plan_into`."""
    return (np.empty(nws), np.empty(nwt), np.zeros((7, n + 2 * np_)),
            np.empty((5, n + 2 * np_)))


@nb.njit(**JIT)
def stl_plan_one(y, np_, ni, no, sp, tp, lp, ws0, wt0, wl):
    """`stl_core.stl_one` (jumps 1) with prepared weights: same bits."""
    n = y.shape[0]
    season = np.empty(n)
    trend = np.empty(n)
    rw = np.empty(n)
    ws, wt, work, scr = _plan_scratch(n, np_, ws0.shape[0], wt0.shape[0])
    _stl_plan_into(y, np_, ni, no, sp, tp, lp, ws0, wt0, wl, season, trend, rw, work,
                   ws, wt, scr)
    return season, trend, rw


@nb.njit(**JIT)
def stl_plan_windows(y, ends, window, np_, ni, no, sp, tp, lp, ws0, wt0, wl):
    """`stl_core.stl_windows` with prepared weights (one plan shared by all windows)."""
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


class Plans(NamedTuple):
    """The three smoothers' plans of one fit and their non-robust weights."""

    seasonal: _Plan
    trend: _Plan
    low_pass: _Plan
    w_seasonal: np.ndarray  # non-robust weights
    w_trend: np.ndarray
    w_low_pass: np.ndarray


def _plan_args(p: _Plan) -> tuple:
    return (p.info, p.base, p.tw, p.pl, p.xs, p.hf, p.lim, p.ideg)


@functools.lru_cache(maxsize=32)
def build_plans(n: int, np_: int, ns: int, nt: int, nl: int, isdeg: int, itdeg: int,
                ildeg: int) -> Plans:
    """Plans and non-robust weights of a fit with jumps 1 (cached; needs n >= 2*np_)."""
    tab, toff = table_for(n, ns, nt, nl)
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
    return Plans(built[0], built[1], built[2], wts[0], wts[1], wts[2])


def plan_ok(n: int, period: int, jumps: tuple) -> bool:
    """Whether the weight-reuse kernel covers these settings (jumps 1, >= 2 cycles)."""
    return all(int(j) == 1 for j in jumps) and n >= 2 * period


def plan_call(p: Plans) -> tuple:
    """Arguments of `stl_plan_one` / `stl_plan_windows` after ``ni, no``."""
    return (_plan_args(p.seasonal), _plan_args(p.trend), _plan_args(p.low_pass),
            p.w_seasonal, p.w_trend, p.w_low_pass)
