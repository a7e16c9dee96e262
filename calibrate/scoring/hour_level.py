"""Hour-level and range-based precision and recall of boolean hour masks.

Pipeline stage 6. Shown for comparison only: the workbench's figures are event-level
(`calibrate.scoring.matching`).
"""

from __future__ import annotations

import math

import numpy as np

from calibrate.scoring.intervals import ratio


def intervals_mask(start: np.ndarray, end: np.ndarray, n_hours: int) -> np.ndarray:
    """Boolean hour mask of length `n_hours` covering every ``[start, end)``."""
    diff = np.zeros(n_hours + 1, dtype=np.int64)
    np.add.at(diff, np.clip(start, 0, n_hours), 1)
    np.add.at(diff, np.clip(end, 0, n_hours), -1)
    return np.cumsum(diff[:-1]) > 0


def point_precision_recall(truth: np.ndarray, pred: np.ndarray) -> tuple[float, float]:
    """Hour-level precision and recall of boolean masks (NaN when undefined).

    Shown for comparison only: hour-level figures weigh long incidents heavily;
    the workbench's figures are event-level (see `match`).
    """
    truth, pred = np.asarray(truth, dtype=bool), np.asarray(pred, dtype=bool)
    tp = int((truth & pred).sum())
    return float(ratio(tp, int(pred.sum()))), float(ratio(tp, int(truth.sum())))


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    m = np.r_[False, np.asarray(mask, dtype=bool), False].astype(np.int8)
    edges = np.flatnonzero(np.diff(m))
    return list(zip(edges[::2].tolist(), edges[1::2].tolist(), strict=True))


def range_precision_recall(truth: np.ndarray, pred: np.ndarray) -> tuple[float, float]:
    """Range-based precision and recall (Tatbul et al. 2018), alpha=0, flat bias, gamma=1.

    Each real range scores the share of its hours covered by predictions (recall);
    each predicted range the share of its hours inside real ranges (precision);
    both averaged over ranges. NaN when there are no ranges of that kind.
    """
    truth, pred = np.asarray(truth, dtype=bool), np.asarray(pred, dtype=bool)

    def mean_cover(ranges: list[tuple[int, int]], other: np.ndarray) -> float:
        if not ranges:
            return math.nan
        return float(np.mean([other[a:b].mean() for a, b in ranges]))

    return mean_cover(_runs(pred), truth), mean_cover(_runs(truth), pred)
