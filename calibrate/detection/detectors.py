"""Detectors on top of the remainder stream, their combination, and episodes.

Pipeline stage 4. The fence detector flags an hour when its fence score exceeds
the multiplier k; the flatline detector flags an hour when the value has not
changed for `flatline_hours` hours while the expected value moved by more than the
fence IQR over those hours. An hour is flagged when at least `min_detectors`
detectors flag it; consecutive flagged hours form one episode.

Because the fence flags for every k are a threshold on one score array, the
episodes for a whole grid of multipliers come out of one compiled pass
(`episodes_grid`), with no replay. Flags only shrink as k grows, so that pass
looks only at the hours flagged at the smallest k: each run of them is summed
once and stands for one episode at every k until its shallowest hours drop out,
where it splits into sub-runs (`episode_runs`).
"""

from __future__ import annotations

from typing import NamedTuple

import numba
import numpy as np

FENCE_BIT = 1
FLATLINE_BIT = 2


MIN_FLATLINE = 2  # a shorter flatline length flags nothing


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
    if hours < MIN_FLATLINE or value.shape[1] < hours:
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
def _flagged(score, flat, k, min_det):
    cnt = 0
    if score > k:  # NaN compares False: unscored hours never flag
        cnt += 1
    if flat:
        cnt += 1
    return cnt >= min_det


@numba.njit(cache=True)
def _depths(sc, fl, sorted_ks, min_det):
    """(depth, fence depth) of one candidate hour (see `_candidates`)."""
    # levels whose multiplier the score exceeds: a prefix of the sorted grid
    lo, hi = 0, len(sorted_ks)
    while lo < hi:
        mid = (lo + hi) // 2
        if sc > sorted_ks[mid]:
            lo = mid + 1
        else:
            hi = mid
    # flagged without the fence at every level, else exactly where it exceeds k
    return (len(sorted_ks) if _flagged(np.nan, fl, 0.0, min_det) else lo), lo


@numba.njit(cache=True)
def _candidate_arrays(m):
    """Empty candidate columns for `m` hours (see `_candidates`)."""
    return (np.empty(m, dtype=np.int64), np.empty(m, dtype=np.int64),
            np.empty(m, dtype=np.int64), np.empty(m, dtype=np.int64),
            np.empty(m, dtype=np.float64), np.empty(m, dtype=np.bool_),
            np.empty(m, dtype=np.float64), np.empty(m, dtype=np.float64))


@numba.njit(cache=True)
def _candidates(score, flat, value, expected, sorted_ks, min_det):
    """Every hour flagged at the smallest multiplier, in series then hour order.

    Returns, per such hour: series, hour, depth (the hour is flagged at
    ``sorted_ks[j]`` exactly when j < depth), fence depth (its fence score
    exceeds ``sorted_ks[j]`` exactly when j < fence depth), fence score, flatline
    flag, value and expected value. `sorted_ks` is ascending with NaN last (a NaN
    k flags like +inf).
    """
    n_s, n = score.shape
    n_k = len(sorted_ks)
    m = np.int64(0)  # not a bare 0: numba would type it as a literal (one more copy)
    if n_k:
        for s in range(n_s):
            for t in range(n):
                m += _flagged(score[s, t], flat[s, t], sorted_ks[0], min_det)
    c_s, c_t, depth, f_depth, c_score, c_flat, c_value, c_expected = _candidate_arrays(m)
    c = 0
    for s in range(n_s if m else 0):
        for t in range(n):
            sc, fl = score[s, t], flat[s, t]
            if not _flagged(sc, fl, sorted_ks[0], min_det):
                continue
            depth[c], f_depth[c] = _depths(sc, fl, sorted_ks, min_det)
            c_s[c], c_t[c], c_score[c], c_flat[c] = s, t, sc, fl
            c_value[c], c_expected[c] = value[s, t], expected[s, t]
            c += 1
    return c_s, c_t, depth, f_depth, c_score, c_flat, c_value, c_expected


@numba.njit(cache=True)
def _sparse_candidates(series, hours, score, flat, value, expected, sorted_ks, min_det):
    """`_candidates` of hours given as parallel arrays (in series then hour order, a
    superset of the flagged ones; every hour not given is unflagged)."""
    n_k = len(sorted_ks)
    m = np.int64(0)  # not a bare 0: numba would type it as a literal (one more copy)
    if n_k:
        for i in range(len(series)):
            m += _flagged(score[i], flat[i], sorted_ks[0], min_det)
    c_s, c_t, depth, f_depth, c_score, c_flat, c_value, c_expected = _candidate_arrays(m)
    c = 0
    for i in range(len(series) if m else 0):
        sc, fl = score[i], flat[i]
        if not _flagged(sc, fl, sorted_ks[0], min_det):
            continue
        depth[c], f_depth[c] = _depths(sc, fl, sorted_ks, min_det)
        c_s[c], c_t[c], c_score[c], c_flat[c] = series[i], hours[i], sc, fl
        c_value[c], c_expected[c] = value[i], expected[i]
        c += 1
    return c_s, c_t, depth, f_depth, c_score, c_flat, c_value, c_expected


@numba.njit(cache=True)
def _runs_kernel(score, flat, value, expected, sorted_ks, min_det, ms,
                 start_lo, start_hi):
    """`_runs_core` of every hour of (n_series, n_hours) arrays."""
    return _runs_core(_candidates(score, flat, value, expected, sorted_ks, min_det),
                      len(sorted_ks), ms, start_lo, start_hi)


@numba.njit(cache=True)
def _sparse_runs_kernel(series, hours, score, flat, value, expected, sorted_ks, min_det, ms,
                        start_lo, start_hi):
    """`_runs_core` of the hours given as parallel arrays (`_sparse_candidates`)."""
    return _runs_core(_sparse_candidates(series, hours, score, flat, value, expected,
                                         sorted_ks, min_det),
                      len(sorted_ks), ms, start_lo, start_hi)


@numba.njit(cache=True)
def _runs_core(cands, n_k, ms, start_lo, start_hi):
    """The kept runs of flagged hours of a multiplier grid (see `episode_runs`), from
    the candidate hours `cands` (`_candidates`) of a grid of `n_k` multipliers.

    Per run and ascending minimum impact ``ms[l]``, the raised hour: the first hour
    at which |impact so far| (the running sum of value - expected) reaches ``ms[l]``
    (the run's first hour when ``ms[l] <= 0``), -1 when it never does or when that
    hour lies outside ``[start_lo, start_hi)``. Runs raised at no level are dropped.

    A run of consecutive hours flagged at the smallest multiplier is one episode
    for the levels (multipliers in increasing order) below its smallest depth;
    there its shallowest hours drop out and it splits into sub-runs, each an
    episode from that level on, and so on. Runs are found in pre-order (a run
    before its sub-runs, sub-runs left to right), so at every level they come in
    series then start order; each run drops at least one hour, so there are at
    most as many runs as candidate hours.
    """
    c_s, c_t, depth, f_depth, c_score, c_flat, c_value, c_expected = cands
    m = len(c_s)
    n_m = len(ms)
    ints = np.empty((8, m), dtype=np.int64)
    floats = np.empty((3, m), dtype=np.float64)
    raised = np.empty((n_m, m), dtype=np.int64)
    r_row = np.empty(n_m, dtype=np.int64)
    st_a = np.empty(m, dtype=np.int64)  # stack of runs to visit: candidates [a, b)
    st_b = np.empty(m, dtype=np.int64)
    st_lo = np.empty(m, dtype=np.int64)  # and the level they start at
    q = 0
    a0 = 0
    while a0 < m:
        b0 = a0 + 1
        while b0 < m and c_s[b0] == c_s[a0] and c_t[b0] == c_t[b0 - 1] + 1:
            b0 += 1
        st_a[0], st_b[0], st_lo[0] = a0, b0, 0
        top = 1
        while top:
            top -= 1
            a, b, lo = st_a[top], st_b[top], st_lo[top]
            hi = n_k
            peak_h = c_t[a]
            peak = -np.inf
            vsum = 0.0
            esum = 0.0
            f_hi = 0
            flat_bit = 0
            cum = 0.0  # impact so far
            r_row[:] = -1
            nxt = 0  # next minimum-impact level not yet reached
            for c in range(a, b):  # the same sums, in the same order, as an hour-by-hour scan
                cum += c_value[c] - c_expected[c]
                while nxt < n_m and (ms[nxt] <= 0 or abs(cum) >= ms[nxt]):
                    r_row[nxt] = c_t[c]
                    nxt += 1
                hi = min(hi, depth[c])
                sc = c_score[c]
                if not np.isnan(sc) and sc > peak:
                    peak = sc
                    peak_h = c_t[c]
                vsum += c_value[c]
                esum += c_expected[c]
                f_hi = max(f_hi, f_depth[c])
                if c_flat[c]:
                    flat_bit = FLATLINE_BIT
            kept = False
            for lv in range(n_m):
                if not start_lo <= r_row[lv] < start_hi:
                    r_row[lv] = -1
                elif r_row[lv] >= 0:
                    kept = True
            if kept:
                for lv in range(n_m):  # not raised[:, q] = r_row: see scoring.curves
                    raised[lv, q] = r_row[lv]
                ints[0, q] = c_s[a]
                ints[1, q] = c_t[a]
                ints[2, q] = c_t[b - 1] + 1
                ints[3, q] = lo
                ints[4, q] = hi
                ints[5, q] = peak_h
                ints[6, q] = f_hi
                ints[7, q] = flat_bit
                floats[0, q] = peak if peak > -np.inf else np.nan
                floats[1, q] = vsum
                floats[2, q] = esum
                q += 1
            # sub-runs of the hours deeper than hi, pushed right to left
            c = b - 1
            while c >= a:
                if depth[c] > hi:
                    end = c + 1
                    while c >= a and depth[c] > hi:
                        c -= 1
                    st_a[top], st_b[top], st_lo[top] = c + 1, end, hi
                    top += 1
                else:
                    c -= 1
        a0 = b0
    return ints[:, :q], floats[:, :q], raised[:, :q]


@numba.njit(cache=True)
def _write_kernel(ints, floats, raised, order, out_i, out_f, row0):
    """Write the rows of runs `ints`/`floats` from row `row0`, grid index by grid index.

    Level by level, the runs of the level are those still open from the level
    before (hi > j) merged, in run order, with those starting at it (lo == j).
    """
    n_k, n_runs = len(order), ints.shape[1]
    per_level = np.zeros(n_k + 1, dtype=np.int64)
    by_lo = np.zeros(n_k + 1, dtype=np.int64)
    for q in range(n_runs):
        per_level[ints[3, q]] += 1
        per_level[ints[4, q]] -= 1
        by_lo[ints[3, q] + 1] += 1
    per_level = np.cumsum(per_level)
    first_row = np.zeros(n_k, dtype=np.int64)
    for j in range(n_k):
        first_row[order[j]] = per_level[j]
    row = row0
    for g in range(n_k):
        rows = first_row[g]
        first_row[g] = row
        row += rows
    by_lo = np.cumsum(by_lo)
    starting = np.empty(n_runs, dtype=np.int64)
    fill = by_lo.copy()
    for q in range(n_runs):
        starting[fill[ints[3, q]]] = q
        fill[ints[3, q]] += 1
    open_runs = np.empty(n_runs, dtype=np.int64)
    merged = np.empty(n_runs, dtype=np.int64)
    n_open = 0
    for j in range(n_k):
        g = order[j]
        r = first_row[g]
        u = 0
        v = by_lo[j]
        n_new = 0
        while u < n_open or v < by_lo[j + 1]:
            if v == by_lo[j + 1] or (u < n_open and open_runs[u] < starting[v]):
                q = open_runs[u]
                u += 1
                if ints[4, q] <= j:
                    continue
            else:
                q = starting[v]
                v += 1
            merged[n_new] = q
            n_new += 1
            out_i[0, r] = g
            out_i[1, r] = ints[0, q]
            out_i[2, r] = ints[1, q]
            out_i[3, r] = ints[2, q]
            out_i[4, r] = ints[5, q]
            out_i[5, r] = (FENCE_BIT if j < ints[6, q] else 0) | ints[7, q]
            out_i[6, r] = raised[0, q]
            out_f[0, r] = floats[0, q]
            out_f[1, r] = floats[1, q]
            out_f[2, r] = floats[2, q]
            r += 1
        open_runs, merged = merged, open_runs
        n_open = n_new


class EpisodeRuns(NamedTuple):
    """The episodes of a multiplier grid as runs of flagged hours, each spanning levels.

    ``ints`` rows: series, start, end (exclusive), first and last-plus-one level
    (index into the ascending grid ``ks[order]``), peak hour, fence levels (the
    fence bit is set below it), flatline bit; ``floats`` rows: peak fence score,
    sum of values, sum of expected values; ``raised`` (n_min_impacts, n_runs): the
    raised hour at each minimum impact (-1: not raised there). `n_rows` is the
    number of episodes at the first minimum impact.
    """

    ints: np.ndarray
    floats: np.ndarray
    raised: np.ndarray
    order: np.ndarray
    n_rows: int

    def write(self, out_i: np.ndarray, out_f: np.ndarray, row0: int = 0) -> None:
        """Write the episodes raised at the first minimum impact into columns ``out_i``
        (7, n: grid index, series, start, end, peak hour, detector bits, raised hour)
        and ``out_f`` (3, n) from column `row0` on, in `episodes_grid` order."""
        keep = self.raised[0] >= 0
        _write_kernel(np.ascontiguousarray(self.ints[:, keep]),
                      np.ascontiguousarray(self.floats[:, keep]),
                      np.ascontiguousarray(self.raised[:, keep]), self.order, out_i, out_f, row0)


def episode_runs(
    score: np.ndarray,
    flat: np.ndarray,
    value: np.ndarray,
    expected: np.ndarray,
    ks: np.ndarray,
    min_detectors: int,
    min_impact: float | np.ndarray = 0.0,
    start_hours: tuple[int, int] | None = None,
) -> EpisodeRuns:
    """Episodes of (n_series, n_hours) arrays for every multiplier in `ks`, as runs.

    Parameters as `episodes_grid`, except that `min_impact` may be a grid (any order;
    each run then carries its raised hour at every grid value); the rows themselves
    are written by `EpisodeRuns.write`, so that several tables can share one output.
    """
    score = np.ascontiguousarray(np.atleast_2d(score), dtype=np.float64)
    flat = np.ascontiguousarray(np.atleast_2d(flat), dtype=np.bool_)
    value = np.ascontiguousarray(np.atleast_2d(value), dtype=np.float64)
    expected = np.ascontiguousarray(np.atleast_2d(expected), dtype=np.float64)
    sorted_ks, order, ms, by_size = _grids(ks, min_impact)
    lo, hi = (0, score.shape[1]) if start_hours is None else start_hours
    return _kept_runs(_runs_kernel(score, flat, value, expected, sorted_ks, int(min_detectors),
                                   ms, int(lo), int(hi)), order, by_size)


def episode_runs_at(
    series: np.ndarray,
    hours: np.ndarray,
    score: np.ndarray,
    flat: np.ndarray,
    value: np.ndarray,
    expected: np.ndarray,
    ks: np.ndarray,
    min_detectors: int,
    min_impact: float | np.ndarray,
    start_hours: tuple[int, int],
) -> EpisodeRuns:
    """`episode_runs` of the hours given as parallel arrays (in series then hour order);
    every hour not given is unflagged. The same runs as `episode_runs` of the dense
    arrays these hours come from, without building them."""
    sorted_ks, order, ms, by_size = _grids(ks, min_impact)
    as_int = [np.ascontiguousarray(a, dtype=np.int64) for a in (series, hours)]
    as_float = [np.ascontiguousarray(a, dtype=np.float64) for a in (score, value, expected)]
    lo, hi = start_hours
    return _kept_runs(_sparse_runs_kernel(
        *as_int, as_float[0], np.ascontiguousarray(flat, dtype=np.bool_), *as_float[1:],
        sorted_ks, int(min_detectors), ms, int(lo), int(hi)), order, by_size)


def _grids(ks, min_impact):
    """The multiplier grid sorted, its order, and the minimum impacts sorted with theirs."""
    ks = np.ascontiguousarray(np.atleast_1d(ks), dtype=np.float64)
    order = np.argsort(ks, kind="stable")  # NaN sorts last
    ms = np.ascontiguousarray(np.atleast_1d(min_impact), dtype=np.float64)
    if len(ms) == 0 or np.isnan(ms).any():
        raise ValueError(f"min_impact must be a number or a grid of numbers, but got {ms}")
    by_size = np.argsort(ms, kind="stable")  # the kernel reaches them in ascending order
    return ks[order], order, ms[by_size], by_size


def _kept_runs(out, order, by_size) -> EpisodeRuns:
    # the kernel returns views of arrays sized for every candidate hour: copied, the
    # runs kept hold only their own memory
    ints, floats, raised_sorted = (a.copy() for a in out)
    raised = np.empty_like(raised_sorted)
    raised[by_size] = raised_sorted
    keep = raised[0] >= 0
    return EpisodeRuns(ints, floats, raised, order, int((ints[4] - ints[3])[keep].sum()))


def episodes_grid(
    score: np.ndarray,
    flat: np.ndarray,
    value: np.ndarray,
    expected: np.ndarray,
    ks: np.ndarray,
    min_detectors: int,
    min_impact: float = 0.0,
    start_hours: tuple[int, int] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Episodes of (n_series, n_hours) arrays for every multiplier in `ks`.

    Parameters
    ----------
    score, flat, value, expected : ndarray (n_series, n_hours)
        Fence scores, flatline flags, metric values and expected values.
    ks : array of float
        Multiplier grid (any order).
    min_detectors : int
    min_impact : float
        An episode is raised at the first hour where |impact so far| (the running sum
        of value - expected over its hours) reaches it; episodes never raised are
        dropped. 0 raises every episode at its first hour.
    start_hours : (int, int), optional
        Keep only episodes raised in ``[start, end)`` (episodes are still found
        over all hours).

    Returns
    -------
    ints : ndarray (m, 7) of int64
        grid index, series, start, end (exclusive), peak hour, detector bits, raised
        hour; rows ordered by grid index, series, start.
    floats : ndarray (m, 3) of float64
        peak fence score (NaN if none), sum of values, sum of expected values.
    Both are column-major (each column is contiguous).
    """
    runs = episode_runs(score, flat, value, expected, ks, min_detectors, min_impact, start_hours)
    out_i = np.empty((7, runs.n_rows), dtype=np.int64)
    out_f = np.empty((3, runs.n_rows), dtype=np.float64)
    runs.write(out_i, out_f)
    return out_i.T, out_f.T


def detector_names(bits: np.ndarray) -> np.ndarray:
    """'+'-joined detector names for detector bit masks."""
    table = np.array(["", "fence", "flatline", "fence+flatline"], dtype=object)
    return table[np.asarray(bits, dtype=np.int64) & 3]
