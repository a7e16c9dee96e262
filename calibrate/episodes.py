"""Alert episodes as columns of numpy arrays (no per-episode Python objects).

An `Episodes` table is what the replay raises (one row per alert episode) and what
scoring consumes; `to_frame` turns it into the Alerts CSV contract of DESIGN.md.
Hour positions are indices into `History.hours`; `end` is exclusive.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np


@dataclass
class Episodes:
    """Columns of alert episodes; all arrays have the same length.

    Attributes
    ----------
    level : ndarray of object (str)
    series : ndarray of int64
        Series index within the level (row of `LevelSeries.keys`).
    metric : ndarray of object (str)
    start, end : ndarray of int64
        First flagged hour index and one past the last flagged hour.
    peak_hour : ndarray of int64
        Hour index of the highest fence score in the episode (first flagged hour
        when only non-fence detectors fired).
    peak_score : ndarray of float64
        Highest fence score in the episode (NaN if none was scored).
    value, expected : ndarray of float64
        Sums over the episode's hours of the metric value and of the expected value.
    detectors : ndarray of object (str)
        '+'-joined names of the detectors that fired in the episode, e.g. "fence+flatline".
    team : ndarray of object (str)
        Owning team ("" when unrouted).
    grid : ndarray of int64
        Index into a multiplier grid when episodes for several fence multipliers are
        held in one table (0 otherwise).
    """

    level: np.ndarray
    series: np.ndarray
    metric: np.ndarray
    start: np.ndarray
    end: np.ndarray
    peak_hour: np.ndarray
    peak_score: np.ndarray
    value: np.ndarray
    expected: np.ndarray
    detectors: np.ndarray
    team: np.ndarray
    grid: np.ndarray

    def __len__(self) -> int:
        return len(self.start)

    @property
    def impact(self) -> np.ndarray:
        return self.value - self.expected

    @classmethod
    def empty(cls) -> Episodes:
        obj = np.array([], dtype=object)
        i64 = np.array([], dtype=np.int64)
        f64 = np.array([], dtype=np.float64)
        return cls(obj, i64, obj.copy(), i64, i64, i64, f64, f64, f64, obj.copy(), obj.copy(), i64)

    @classmethod
    def concat(cls, parts: list[Episodes]) -> Episodes:
        parts = [p for p in parts if len(p)]
        if not parts:
            return cls.empty()
        return cls(*[np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(cls)])

    def take(self, index: np.ndarray) -> Episodes:
        """Rows at `index` (integer positions or boolean mask)."""
        return Episodes(*[getattr(self, f.name)[index] for f in fields(self)])
