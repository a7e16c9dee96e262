"""Intervals for the figures: Wilson score intervals, seeded bootstrap intervals over
clusters and days, and the zero-miss bound on a number of labelled incidents.

Pipeline stage 6. Pure functions on counts and arrays.
"""

from __future__ import annotations

import math

import numpy as np
from statsmodels.stats.proportion import proportion_confint


def wilson(
    count: np.ndarray | int, nobs: np.ndarray | int, confidence: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval (statsmodels `proportion_confint`); NaN where nobs == 0."""
    count = np.asarray(count, dtype=np.float64)
    nobs = np.asarray(nobs, dtype=np.float64)
    safe = np.where(nobs > 0, nobs, 1.0)
    low, high = proportion_confint(
        np.minimum(count, safe), safe, alpha=1.0 - confidence, method="wilson"
    )
    low = np.where(nobs > 0, np.clip(low, 0.0, 1.0), np.nan)
    high = np.where(nobs > 0, np.clip(high, 0.0, 1.0), np.nan)
    return low, high


def ratio(num: np.ndarray | float, den: np.ndarray | float) -> np.ndarray:
    """`num / den` as float64, NaN where `den` is not positive."""
    num = np.asarray(num, dtype=np.float64)
    den = np.asarray(den, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)


BOOTSTRAP_REPS = 1000
BOOTSTRAP_METHOD = (
    "miss rate and recall: Wilson score interval; precision: cluster bootstrap over "
    f"series-days; alert load: bootstrap over days ({BOOTSTRAP_REPS} resamples, "
    "percentile interval, seeded)")


def cluster_bootstrap_ratio(cluster: np.ndarray, x: np.ndarray, confidence: float = 0.95,
                            seed: int = 0, reps: int = BOOTSTRAP_REPS) -> tuple[float, float]:
    """Percentile interval of ``sum(x) / len(x)`` when whole clusters are resampled with
    replacement (the items of a cluster are not independent: alerts of one series on one
    day); NaN for no items.

    Parameters
    ----------
    cluster : ndarray of int
        Cluster code of each item (0 .. n_clusters - 1).
    x : ndarray of float
        Item values (1.0 for a true alert, 0.0 for a false one).
    """
    if len(x) == 0:
        return math.nan, math.nan
    size = np.bincount(cluster).astype(np.float64)
    total = np.bincount(cluster, weights=x)
    keep = size > 0
    size, total = size[keep], total[keep]
    ratios = _resampled(len(size), reps, seed, lambda w: (w @ total) / (w @ size))
    a = (1.0 - confidence) / 2.0
    return float(np.quantile(ratios, a)), float(np.quantile(ratios, 1.0 - a))


def day_bootstrap_total(counts: np.ndarray, confidence: float = 0.95, seed: int = 0,
                        reps: int = BOOTSTRAP_REPS) -> tuple[float, float]:
    """Percentile interval of the total of per-day `counts` when the days are resampled
    with replacement (a team's alert load: busy days come in runs of alerts)."""
    if len(counts) == 0:
        return math.nan, math.nan
    totals = _resampled(len(counts), reps, seed, lambda w: w @ counts)
    a = (1.0 - confidence) / 2.0
    return float(np.quantile(totals, a)), float(np.quantile(totals, 1.0 - a))


def _resampled(n: int, reps: int, seed: int, stat) -> np.ndarray:
    """`stat` of `reps` resamples of n units, each resample given as how often each unit
    was drawn; drawn in chunks to bound memory."""
    rng = np.random.default_rng(seed)
    out = []
    for done in range(0, reps, 100):
        k = min(100, reps - done)
        out.append(stat(rng.multinomial(n, np.full(n, 1.0 / n), size=k).astype(np.float64)))
    return np.concatenate(out)


def zero_miss_bound(n_incidents: int, confidence: float = 0.95) -> float:
    """The lowest miss-rate upper bound any setting can show on `n_incidents` labels: the
    Wilson upper limit at zero misses (1 with no incidents)."""
    if n_incidents <= 0:
        return 1.0
    return float(wilson(0, n_incidents, confidence)[1])


def incidents_needed(max_miss_rate: float, confidence: float = 0.95,
                     limit: int = 100_000) -> int | None:
    """Fewest labelled incidents whose zero-miss upper bound is at most `max_miss_rate`
    (None beyond `limit`, e.g. a target of 0)."""
    lo, hi = 1, limit
    if zero_miss_bound(hi, confidence) > max_miss_rate:
        return None
    while lo < hi:
        mid = (lo + hi) // 2
        if zero_miss_bound(mid, confidence) <= max_miss_rate:
            hi = mid
        else:
            lo = mid + 1
    return lo
