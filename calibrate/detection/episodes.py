"""Alert episodes as columns of numpy arrays (no per-episode Python objects).

An `Episodes` table is what the replay raises (one row per alert episode) and what
scoring consumes; `replay.alerts_frame` turns it into the Alerts CSV contract of
docs/detector.md. Hour positions are indices into `History.hours`; `end` is exclusive.
`CodedEpisodes` holds the same columns with the text ones as integer codes (what a
multiplier-grid sweep makes, millions of rows that only get counted); its text
columns are decoded on access and `decode` gives an `Episodes`.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from calibrate.detection.detectors import detector_names


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
    raised : ndarray of int64
        Hour index at which the alert was raised: the first hour where |impact so
        far| reached the metric's minimum impact (`start` when it is 0).
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
    raised: np.ndarray

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
        return cls(obj, i64, obj.copy(), i64, i64, i64, f64, f64, f64, obj.copy(), obj.copy(),
                   i64, i64)

    def take(self, index: np.ndarray) -> Episodes:
        """Rows at `index` (integer positions or boolean mask)."""
        return Episodes(*[getattr(self, f.name)[index] for f in fields(self)])


@dataclass
class CodedEpisodes:
    """Episodes with level/metric, team and detectors as integer codes.

    Attributes
    ----------
    pair : ndarray of int64
        Index into `pairs`, the (level, metric) of the row.
    series, start, end, peak_hour, peak_score, value, expected, grid
        As in `Episodes`.
    bits : ndarray of int64
        Detector bit mask (`calibrate.detection.detectors.FENCE_BIT`, `FLATLINE_BIT`).
    team_code : ndarray of int64
        Index into `teams`.
    pairs : tuple of (str, str)
    teams : tuple of str
        Every team a row may have (not only those present), "" for unrouted.
    """

    pair: np.ndarray
    series: np.ndarray
    start: np.ndarray
    end: np.ndarray
    peak_hour: np.ndarray
    peak_score: np.ndarray
    value: np.ndarray
    expected: np.ndarray
    bits: np.ndarray
    team_code: np.ndarray
    grid: np.ndarray
    raised: np.ndarray
    pairs: tuple[tuple[str, str], ...]
    teams: tuple[str, ...]

    _COLUMNS = (
        "pair", "series", "start", "end", "peak_hour", "peak_score", "value", "expected",
        "bits", "team_code", "grid", "raised",
    )

    def __len__(self) -> int:
        return len(self.start)

    @property
    def impact(self) -> np.ndarray:
        return self.value - self.expected

    def level_codes(self) -> tuple[np.ndarray, tuple[str, ...]]:
        """Per row, index into the returned tuple of level names."""
        return self._part_codes(0)

    def metric_codes(self) -> tuple[np.ndarray, tuple[str, ...]]:
        """Per row, index into the returned tuple of metric names."""
        return self._part_codes(1)

    def _part_codes(self, j: int) -> tuple[np.ndarray, tuple[str, ...]]:
        names = tuple(dict.fromkeys(p[j] for p in self.pairs))
        of_pair = np.array([names.index(p[j]) for p in self.pairs], dtype=np.int64)
        return of_pair[self.pair], names

    @property
    def level(self) -> np.ndarray:
        return _objects([lv for lv, _ in self.pairs])[self.pair]

    @property
    def metric(self) -> np.ndarray:
        return _objects([m for _, m in self.pairs])[self.pair]

    @property
    def team(self) -> np.ndarray:
        return _objects(self.teams)[self.team_code]

    @property
    def detectors(self) -> np.ndarray:
        return detector_names(self.bits)

    def take(self, index: np.ndarray) -> CodedEpisodes:
        """Rows at `index` (integer positions or boolean mask)."""
        cols = {name: getattr(self, name)[index] for name in self._COLUMNS}
        return CodedEpisodes(**cols, pairs=self.pairs, teams=self.teams)

    def decode(self) -> Episodes:
        """The same rows as an `Episodes` table (text columns as object arrays)."""
        return Episodes(
            level=self.level,
            series=self.series,
            metric=self.metric,
            start=self.start,
            end=self.end,
            peak_hour=self.peak_hour,
            peak_score=self.peak_score,
            value=self.value,
            expected=self.expected,
            detectors=self.detectors,
            team=self.team,
            grid=self.grid,
            raised=self.raised,
        )


def _objects(values: list[str] | tuple[str, ...]) -> np.ndarray:
    out = np.empty(len(values), dtype=object)
    out[:] = list(values)
    return out
