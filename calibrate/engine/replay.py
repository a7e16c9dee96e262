"""Hour-by-hour replay of the detector over every level and metric (stage 5).

`Replayer` holds the history arrays, the executor, a cache of remainder streams
keyed by the decomposition settings (full replays) and the store of tuning hours
search trials read (`tuning_scores`), so a decomposition setting is refitted only
when a setting it depends on changes. `replay`
is the one-call convenience around it. Results stay numpy arrays; frames are made
only by `alerts_frame` / `scores_frame` at the edge.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from calibrate.decomposition.decompose import fence_scores
from calibrate.detection.detectors import (
    MIN_FLATLINE,
    EpisodeRuns,
    episode_runs,
    episode_runs_at,
    flatline_flags,
)
from calibrate.detection.episodes import CodedEpisodes, Episodes
from calibrate.engine.executors import Executor, SerialExecutor, batched, trim_heap
from calibrate.engine.tasks import stream_task, tuning_task
from calibrate.inputs.history import History
from calibrate.settings import DetectorConfig, DetectorSettings

SERIES_PER_TASK = 8
# rows of one block of the per-hour scores export (one Parquet row group): about
# 30 MB as a frame, however long the history
SCORE_BLOCK_ROWS = 250_000


@dataclass
class StreamSet:
    """Remainder streams of every series of one level and metric (n_series, n_hours).

    `value` is the history's own array (not a copy); the remainder is not stored but
    derived from it: `remainder_stream` computes it as value - expected wherever the
    expected value exists and NaN elsewhere, which is what value - expected gives
    (NaN where either is NaN).
    """

    value: np.ndarray
    expected: np.ndarray
    q1: dict[int, np.ndarray]
    q3: dict[int, np.ndarray]

    @property
    def remainder(self) -> np.ndarray:
        return self.value - self.expected

    @property
    def nbytes(self) -> int:
        """Bytes held by the cache (the history's `value` is not counted)."""
        arrays = [self.expected, *self.q1.values(), *self.q3.values()]
        return sum(a.nbytes for a in arrays)


@dataclass
class HourScores:
    """What episodes are found from, for one level and metric (n_series, n_hours):
    the settings, values, expected values, fence scores and flatline flags."""

    level: str
    metric: str
    settings: DetectorSettings
    value: np.ndarray
    expected: np.ndarray
    score: np.ndarray
    flat: np.ndarray

    def flagged(self, k: float | None = None) -> np.ndarray:
        """Hours flagged by the combined detectors at multiplier k (default: settings')."""
        k = self.settings.fence_multiplier if k is None else k
        with np.errstate(invalid="ignore"):
            count = (self.score > k).astype(np.int8) + self.flat.astype(np.int8)
        return count >= self.settings.min_detectors

    def runs(self, ks: np.ndarray, min_impact: float | np.ndarray,
             start_hours: tuple[int, int] | None) -> EpisodeRuns:
        """`episode_runs` of these hours."""
        return episode_runs(self.score, self.flat, self.value, self.expected, ks,
                            self.settings.min_detectors, min_impact, start_hours)

    def scores_before(self, hour: int) -> np.ndarray:
        """The fence scores of the hours before `hour` (NaN: none)."""
        return self.score[:, :hour]


@dataclass
class TuningScores:
    """`HourScores` read from the tuning store (`Replayer.tuning_scores`): the same
    runs and scores before `end`, without dense arrays."""

    level: str
    metric: str
    settings: DetectorSettings
    hours: TuningHours
    value: np.ndarray  # the history's (n_series, n_hours)

    def runs(self, ks: np.ndarray, min_impact: float | np.ndarray,
             start_hours: tuple[int, int] | None) -> EpisodeRuns:
        th = self.hours
        series, hours = np.divmod(th.index.astype(np.int64), th.end)
        f = self.settings.flatline_hours
        flat = th.flat[f] if f >= MIN_FLATLINE else np.zeros(len(series), dtype=bool)
        return episode_runs_at(series, hours, th.score, flat, self.value[series, hours],
                               th.expected, ks, self.settings.min_detectors, min_impact,
                               (0, th.end) if start_hours is None else start_hours)

    def scores_before(self, hour: int) -> np.ndarray:
        th = self.hours
        if hour > th.end:
            raise ValueError(f"the store ends at hour {th.end}, before {hour}")
        return th.score[th.index % th.end < hour]


@dataclass
class MetricScores(HourScores):
    """`HourScores` of a replay, with the remainders and fence quartiles."""

    remainder: np.ndarray
    q1: np.ndarray
    q3: np.ndarray


@dataclass
class TuningHours:
    """The hours of one level, metric, decomposition setting, fence window and sides
    that scoring a multiplier grid can flag, over hours [0, end).

    A grid whose lowest multiplier is `low` flags an hour only if its fence score
    exceeds `low` or a flatline detector flags it (`episode_runs` starts from exactly
    those hours), so only they are kept: ``index`` (series * end + hour, ascending),
    their fence score and expected value, and per flatline length its flags. Every
    other hour is unflagged at every multiplier of such a grid (`TuningScores`).
    """

    end: int
    index: np.ndarray
    score: np.ndarray
    expected: np.ndarray
    flat: dict[int, np.ndarray]


@dataclass
class ReplayResult:
    """What one replay raised, plus the per-hour scores it raised it from."""

    history: History
    config: DetectorConfig
    scores: dict[tuple[str, str], MetricScores]
    episodes: Episodes
    routes: dict[str, np.ndarray] = field(default_factory=dict)

    def alerts_frame(self) -> pd.DataFrame:
        """Alerts in the alerts contract of docs/detector.md (one row per episode), with the
        `expected_value` mode that raised each."""
        return alerts_frame(self.episodes, self.history, self.config)

    def scores_frame(self) -> pd.DataFrame:
        """Per-hour scores (docs/detector.md contract) for every replayed hour, as one
        frame (`score_blocks` gives the same rows block by block, in the same order)."""
        parts = list(self.score_blocks(None))
        if not parts:
            return pd.DataFrame()
        return pd.concat(parts, ignore_index=True)

    def score_blocks(self, rows_per_block: int | None = SCORE_BLOCK_ROWS
                     ) -> Iterator[pd.DataFrame]:
        """The per-hour scores as frames of at most about `rows_per_block` rows (a
        block of series of one level and metric; None: one frame per level and
        metric), so an export can be written without the whole table in memory."""
        h = self.history
        for (level, metric), ms in self.scores.items():
            ls = h.levels[level]
            n_s = ms.expected.shape[0]
            per = max(1, n_s if rows_per_block is None else rows_per_block // max(h.n_hours, 1))
            flagged = ms.flagged()
            keys = {col: ls.keys[col].to_numpy(dtype=object) if col in ls.key_columns else None
                    for col in h.key_columns}
            k = ms.settings.fence_multiplier
            for lo in range(0, max(n_s, 1), per):
                rows = slice(lo, min(lo + per, n_s))
                s_idx, t_idx = np.nonzero(~np.isnan(ms.expected[rows]))
                s_idx += lo
                q1, q3 = ms.q1[s_idx, t_idx], ms.q3[s_idx, t_idx]
                part = {"level": level}
                for col, vals in keys.items():
                    part[col] = vals[s_idx] if vals is not None else ""
                part.update(
                    metric=metric,
                    hour=h.hours[t_idx],
                    value=ms.value[s_idx, t_idx],
                    expected=ms.expected[s_idx, t_idx],
                    remainder=ms.remainder[s_idx, t_idx],
                    q1=q1,
                    q3=q3,
                    lower=q1 - k * (q3 - q1),
                    upper=q3 + k * (q3 - q1),
                    score=ms.score[s_idx, t_idx],
                    flagged=flagged[s_idx, t_idx],
                )
                yield pd.DataFrame(part)


class Replayer:
    """Replays a history under many configurations, reusing remainder streams.

    Parameters
    ----------
    history : History
    levels, metrics : sequence of str, optional
        Subset to replay (default: every level and every watched metric).
    executor : Executor, optional
        Where the decompositions run (default: this process).
    routes : dict, optional
        level -> team of each series (from `Owners.route`).
    fence_windows, sides, flatlines : tuple, optional
        Fence windows, sides and flatline lengths every fit for `tuning_scores`
        keeps the candidate hours of (a configuration's own are always added), so
        trials that change only these never refit.
    progress : bool
        Show a progress bar over decomposition tasks.
    """

    def __init__(
        self,
        history: History,
        *,
        levels: list[str] | None = None,
        metrics: list[str] | None = None,
        executor: Executor | None = None,
        routes: dict[str, np.ndarray] | None = None,
        fence_windows: tuple[int, ...] = (),
        sides: tuple[str, ...] = (),
        flatlines: tuple[int, ...] = (),
        progress: bool = True,
        own_executor: bool = False,
        cache_bytes: int | None = None,
    ):
        self.history = history
        # streams of the least recently used decomposition settings are dropped beyond
        # this many bytes (None: keep all) and refit if a later config needs them
        self.cache_bytes = cache_bytes
        # close() shuts down only an executor this replayer was made to own: one passed in
        # stays up for the caller's next replay (its workers keep the history they hold)
        self.own_executor = own_executor
        self.levels = list(levels) if levels else list(history.levels)
        first = history.levels[self.levels[0]]
        self.metrics = list(metrics) if metrics else list(first.values)
        self.executor = executor or SerialExecutor()
        self.routes = routes or {}
        self.fence_windows = tuple(sorted(set(fence_windows)))
        self.sides = tuple(sorted(set(sides)))
        self.flatlines = tuple(sorted({f for f in flatlines if f >= MIN_FLATLINE}))
        # (level, metric, decomposition key, end, low) -> (fence window, sides) -> hours
        self.tuning: dict[tuple, dict[tuple[int, str], TuningHours]] = {}
        self.progress = progress
        self.cache: OrderedDict[tuple, StreamSet] = OrderedDict()  # least recent first
        self.shared = _shared_arrays(history, tuple(self.levels), tuple(self.metrics))
        self.fits = 0  # decompositions computed (series x settings), for reports

    def _key(self, level: str, metric: str, s: DetectorSettings) -> tuple:
        return (level, metric, s.decomposition_key(), s.quartile_method)

    def streams(self, config: DetectorConfig) -> dict[tuple[str, str], StreamSet]:
        """Remainder streams for every (level, metric) under `config`, computing
        only those not cached (one executor run for all of them)."""
        need: dict[tuple, tuple[str, str, DetectorSettings, tuple[int, ...]]] = {}
        for lv in self.levels:
            for m in self.metrics:
                s = config.for_series(lv, m)
                key = self._key(lv, m, s)
                have = self.cache.get(key)
                if have is not None and s.fence_window_hours in have.q1:
                    continue
                windows = {s.fence_window_hours}
                if have is not None:
                    windows |= set(have.q1)
                need[key] = (lv, m, s, tuple(sorted(windows)))
        tasks = []
        for lv, m, s, windows in need.values():
            n_s = self.history.levels[lv].n_series
            for rows in batched(range(n_s), SERIES_PER_TASK):
                tasks.append((lv, m, np.array(rows), s, windows))
        if tasks:
            # each task's rows are copied in as it arrives, so the per-series results
            # never pile up beside the assembled arrays
            sets = {(lv, m): _empty_set(self.history, lv, m, windows)
                    for lv, m, _s, windows in need.values()}
            bar = tqdm(
                total=len(tasks), desc="replay", unit="task", disable=not self.progress, leave=False
            )
            for _, (lv, m, rows, out) in self.executor.run(stream_task, self.shared, tasks):
                _fill(sets[(lv, m)], rows, out)
                bar.update(1)
            bar.close()
            for key, (lv, m, _s, _windows) in need.items():
                self.cache[key] = sets[(lv, m)]
                self.fits += self.history.levels[lv].n_series
        keys = {(lv, m): self._key(lv, m, config.for_series(lv, m))
                for lv in self.levels for m in self.metrics}
        for key in keys.values():
            self.cache.move_to_end(key)
        self._evict(set(keys.values()))
        return {pair: self.cache[key] for pair, key in keys.items()}

    def _evict(self, keep: set[tuple]) -> None:
        """Drop least recently used streams beyond `cache_bytes`, never those in `keep`."""
        if self.cache_bytes is None:
            return
        total = sum(st.nbytes for st in self.cache.values())
        for key in list(self.cache):
            if total <= self.cache_bytes:
                break
            if key not in keep:
                total -= self.cache.pop(key).nbytes

    def scores(self, config: DetectorConfig) -> dict[tuple[str, str], MetricScores]:
        """Fence scores and flatline flags for every (level, metric)."""
        out = {}
        for (lv, m), st in self.streams(config).items():
            s = config.for_series(lv, m)
            w = s.fence_window_hours
            q1, q3 = st.q1[w], st.q3[w]
            remainder = st.remainder
            score = fence_scores(remainder, q1, q3, s.sides)
            value = st.value
            if s.flatline_hours:
                flat = flatline_flags(value, st.expected, q3 - q1, s.flatline_hours)
            else:
                flat = np.zeros(value.shape, dtype=bool)
            out[(lv, m)] = MetricScores(
                lv, m, s, value, st.expected, score, flat, remainder=remainder, q1=q1, q3=q3
            )
        return out

    def tuning_scores(self, config: DetectorConfig, end: int, low: float
                      ) -> dict[tuple[str, str], TuningScores]:
        """`scores` over hours [0, end) for a multiplier grid whose lowest value is `low`:
        the same runs for every such grid (`TuningHours`), from a store a fraction
        of the size of the remainder streams, and no hour from `end` on is read.

        The store keeps, per decomposition setting, every fence window, sides and
        flatline length of the replayer's grids (and each configuration's own), so a
        setting is fitted once however many trials visit it.
        """
        need: dict[tuple, tuple[str, str, DetectorSettings, tuple, tuple, tuple]] = {}
        for lv in self.levels:
            for m in self.metrics:
                s = config.for_series(lv, m)
                key = (*self._key(lv, m, s), end, low)
                have = self.tuning.get(key, {})
                part = have.get((s.fence_window_hours, s.sides))
                f = s.flatline_hours
                if part is not None and (f < MIN_FLATLINE or f in part.flat):
                    continue
                windows = {w for w in self.fence_windows if w < s.decomposition_window_hours}
                windows |= {s.fence_window_hours} | {w for w, _ in have}
                sides = set(self.sides) | {s.sides} | {sd for _, sd in have}
                flats = set(self.flatlines) | {f for p in have.values() for f in p.flat}
                flats |= {f} if f >= MIN_FLATLINE else set()
                need[key] = (lv, m, s, tuple(sorted(windows)), tuple(sorted(sides)),
                             tuple(sorted(flats)))
        tasks = []
        for lv, m, s, windows, sides, flats in need.values():
            for rows in batched(range(self.history.levels[lv].n_series), SERIES_PER_TASK):
                tasks.append((lv, m, np.array(rows), s, windows, sides, flats, end, low))
        if tasks:
            got: dict[tuple[str, str], list] = {(lv, m): [] for lv, m, *_ in need.values()}
            bar = tqdm(total=len(tasks), desc="fit", unit="task", disable=not self.progress,
                       leave=False)
            for _, (lv, m, rows, out) in self.executor.run(tuning_task, self.shared, tasks):
                got[(lv, m)].extend(zip(rows.tolist(), out, strict=True))
                bar.update(1)
            bar.close()
            for key, (lv, m, _s, windows, sides, _f) in need.items():
                per_series = sorted(got[(lv, m)], key=lambda item: item[0])
                self.tuning[key] = {(w, sd): _tuning_hours(per_series, (w, sd), end)
                                    for w in windows for sd in sides}
                self.fits += self.history.levels[lv].n_series
        out = {}
        for lv in self.levels:
            for m in self.metrics:
                s = config.for_series(lv, m)
                th = self.tuning[(*self._key(lv, m, s), end, low)][(s.fence_window_hours, s.sides)]
                out[(lv, m)] = TuningScores(lv, m, s, th, self.shared[(lv, m)])
        return out

    def drop_tuning(self) -> None:
        """Drop the `tuning_scores` store (and give its memory back)."""
        self.tuning.clear()
        trim_heap(collect=False)

    def replay(self, config: DetectorConfig) -> ReplayResult:
        """Replay `config`: per-hour scores and the alert episodes it raises."""
        scores = self.scores(config)
        episodes = sweep(scores, None, self.routes)
        return ReplayResult(self.history, config, scores, episodes, self.routes)

    def close(self) -> None:
        if self.own_executor:
            self.executor.close()


def _tuning_hours(per_series: list, part: tuple[int, str], end: int) -> TuningHours:
    """One (fence window, sides)'s `TuningHours` from `tuning_task`'s per-series parts
    (in series order)."""
    pieces = [(r, parts[part]) for r, parts in per_series]
    # int32 where every index fits: a fifth of the store
    dtype = np.int32 if len(pieces) * end < 2**31 else np.int64
    index = np.concatenate([(r * end + hours).astype(dtype) for r, (hours, *_) in pieces]
                           + [np.empty(0, dtype=dtype)])
    flats = pieces[0][1][3].keys() if pieces else ()
    return TuningHours(
        end=end, index=index,
        score=np.concatenate([p[1] for _, p in pieces] + [np.empty(0)]),
        expected=np.concatenate([p[2] for _, p in pieces] + [np.empty(0)]),
        flat={f: np.concatenate([p[3][f] for _, p in pieces] + [np.empty(0, dtype=bool)])
              for f in flats},
    )


def _shared_arrays(history: History, levels: tuple[str, ...],
                   metrics: tuple[str, ...]) -> dict[tuple[str, str], np.ndarray]:
    """The arrays workers read, one dict per (history, levels, metrics): replayers of the
    same history hand an executor the same object, so its workers are not restarted."""
    memo = history.__dict__.setdefault("_shared_arrays", {})
    key = (levels, metrics)
    if key not in memo:
        memo[key] = {(lv, m): history.levels[lv].values[m] for lv in levels for m in metrics}
    return memo[key]


def _empty_set(history: History, level: str, metric: str,
               windows: tuple[int, ...]) -> StreamSet:
    """A `StreamSet` to be filled row by row (`_fill`): every row is written once."""
    ls = history.levels[level]
    shape = (ls.n_series, history.n_hours)
    return StreamSet(ls.values[metric], np.full(shape, np.nan),
                     {w: np.full(shape, np.nan) for w in windows},
                     {w: np.full(shape, np.nan) for w in windows})


def _fill(st: StreamSet, rows: np.ndarray, out: list) -> None:
    """Copy one task's per-series (expected, q1, q3) into the rows `rows` of `st`."""
    for r, (expected, q1, q3) in zip(rows, out, strict=True):
        st.expected[r] = expected
        for w in st.q1:
            st.q1[w][r] = q1[w]
            st.q3[w][r] = q3[w]


def sweep(
    scores: dict[tuple[str, str], HourScores | TuningScores],
    ks: np.ndarray | None,
    routes: dict[str, np.ndarray] | None = None,
    apply_min_impact: bool = True,
) -> Episodes:
    """Episodes for a whole grid of fence multipliers at once, without replaying.

    Parameters
    ----------
    scores : dict
        Output of `Replayer.scores`.
    ks : array of float or None
        Multiplier grid; None uses each series' own `fence_multiplier` (grid 0).
    routes : dict, optional
        level -> team per series.
    apply_min_impact : bool
        Drop episodes whose |impact| is below the series' `min_impact`.

    Returns
    -------
    Episodes
        With `grid` the index into `ks`. With `ks` None sorted by start, then
        (level, metric), then series; with a grid in `sweep_codes` order.
    """
    eps = sweep_codes(scores, ks, routes, apply_min_impact)
    if len(eps) and ks is None:  # a grid sweep feeds counts only: no order needed
        rank = {key: i for i, key in enumerate(sorted(scores))}
        part_code = np.array([rank[key] for key in eps.pairs], dtype=np.int64)[eps.pair]
        eps = eps.take(np.lexsort((eps.series, part_code, eps.start, eps.grid)))
    return eps.decode()


def sweep_codes(
    scores: dict[tuple[str, str], HourScores | TuningScores],
    ks: np.ndarray | None,
    routes: dict[str, np.ndarray] | None = None,
    apply_min_impact: bool = True,
    start_hours: tuple[int, int] | None = None,
) -> CodedEpisodes:
    """`sweep` with the text columns as integer codes (what the search counts).

    Rows come (level, metric) by (level, metric) in `scores` order, each as
    `episodes_grid` gives them (grid index, series, start). With `start_hours`
    ``(start, end)`` only episodes starting in ``[start, end)`` are kept, as
    `scoring.matching.period_filter` would.
    """
    runs, teams, team_of = _pair_runs(scores, ks, routes, apply_min_impact, start_hours)
    # every (level, metric) writes its rows straight into one table
    n = sum(r.n_rows for r in runs)
    ints = np.empty((7, n), dtype=np.int64)
    floats = np.empty((3, n), dtype=np.float64)
    pair = np.empty(n, dtype=np.int64)
    team = np.zeros(n, dtype=np.int64)
    row = 0
    for p, ((lv, _m), r) in enumerate(zip(scores, runs, strict=True)):
        r.write(ints, floats, row)
        part = slice(row, row + r.n_rows)
        pair[part] = p
        if lv in team_of:
            team[part] = team_of[lv][ints[1, part]]
        row += r.n_rows
    return CodedEpisodes(
        pair=pair, series=ints[1], start=ints[2], end=ints[3], peak_hour=ints[4],
        peak_score=floats[0], value=floats[1], expected=floats[2], bits=ints[5],
        team_code=team, grid=ints[0], raised=ints[6], pairs=tuple(scores), teams=teams,
    )


def _pair_runs(scores, ks, routes, apply_min_impact, start_hours, min_impacts=None):
    """`episode_runs` of every (level, metric) (at its own multiplier when `ks` is None),
    the team names rows are coded by ("" first: unrouted) and each routed level's
    team code per series. `min_impacts` (metric -> ascending grid) replaces each
    series' own minimum impact by a grid."""
    routes = routes or {}
    names = [t for lv in routes for t in np.asarray(routes[lv]).tolist()]
    teams = tuple(dict.fromkeys(["", *names]))
    team_pos = {t: i for i, t in enumerate(teams)}
    team_of = {
        lv: np.array([team_pos[t] for t in np.asarray(r).tolist()], dtype=np.int64)
        for lv, r in routes.items()
    }
    runs = []
    for (_lv, m), ms in scores.items():
        grid = np.array([ms.settings.fence_multiplier]) if ks is None else np.asarray(ks, float)
        if min_impacts is not None:
            min_impact = min_impacts[m]
        else:
            min_impact = ms.settings.min_impact if apply_min_impact else 0.0
        runs.append(ms.runs(grid, min_impact, start_hours))
    return runs, teams, team_of


@dataclass
class RunTable:
    """A multiplier grid's episodes as runs: run r is one episode at every grid index
    ``order[lo[r]:hi[r]]`` (`EpisodeRuns`, for every (level, metric) at once).

    `runs` holds one row per run (its `grid` column is 0 and unused, and `bits` holds
    only the flatline bit: the fence bit depends on the level); expanding each run over
    its levels gives the rows of `sweep_codes`. `raised` (n_min_impacts, n_runs) is each
    run's raised hour at every minimum impact of the sweep (-1: not raised).
    """

    runs: CodedEpisodes
    lo: np.ndarray
    hi: np.ndarray
    order: np.ndarray
    raised: np.ndarray


def sweep_runs(
    scores: dict[tuple[str, str], HourScores | TuningScores],
    ks: np.ndarray,
    routes: dict[str, np.ndarray] | None = None,
    apply_min_impact: bool = True,
    start_hours: tuple[int, int] | None = None,
    min_impacts: dict[str, np.ndarray] | None = None,
) -> RunTable:
    """`sweep_codes` without expanding runs into one row per multiplier: what counts
    need (each run is counted once per level range, not once per multiplier). With
    `min_impacts` (metric -> ascending grid, one length for all), each run carries its
    raised hour at every minimum impact of its metric's grid."""
    ks = np.asarray(ks, dtype=np.float64)
    runs_of, teams, team_of = _pair_runs(scores, ks, routes, apply_min_impact, start_hours,
                                         min_impacts)
    order = np.argsort(ks, kind="stable")  # as episode_runs sorts the grid
    parts = [(p, r, team_of[lv][r.ints[0]] if lv in team_of
              else np.zeros(r.ints.shape[1], dtype=np.int64))
             for p, ((lv, _m), r) in enumerate(zip(scores, runs_of, strict=True))]

    def joined(arrays: list[np.ndarray], rows: int, dtype) -> np.ndarray:
        return (np.concatenate(arrays, axis=-1) if arrays
                else np.empty((rows, 0) if rows else 0, dtype=dtype))

    ints = joined([r.ints for _, r, _ in parts], 8, np.int64)
    floats = joined([r.floats for _, r, _ in parts], 3, np.float64)
    n_m = len(next(iter(min_impacts.values()))) if min_impacts else 1
    raised = joined([r.raised for _, r, _ in parts], n_m, np.int64)
    pair = joined([np.full(r.ints.shape[1], p, dtype=np.int64) for p, r, _ in parts], 0,
                  np.int64)
    runs = CodedEpisodes(
        pair=pair, series=ints[0], start=ints[1], end=ints[2], peak_hour=ints[5],
        peak_score=floats[0], value=floats[1], expected=floats[2], bits=ints[7],
        team_code=joined([t for _, _, t in parts], 0, np.int64),
        grid=np.zeros(len(pair), dtype=np.int64), raised=raised[0], pairs=tuple(scores),
        teams=teams,
    )
    return RunTable(runs=runs, lo=ints[3], hi=ints[4], order=order, raised=raised)


def alerts_frame(episodes: Episodes, history: History,
                 config: DetectorConfig | None = None) -> pd.DataFrame:
    """Episodes as the Alerts CSV contract of docs/detector.md, sorted by start; with the
    `config` that raised them, a last column `expected_value` says for each alert
    whether its expected values were in-fit (`fit`) or one hour ahead (`forecast`)."""
    hours = history.hours
    cols: dict[str, object] = {
        "alert_id": [f"A{i + 1:06d}" for i in range(len(episodes))],
        "level": episodes.level,
    }
    for col in history.key_columns:
        vals = np.full(len(episodes), "", dtype=object)
        for lv in pd.unique(episodes.level):
            ls = history.levels[lv]
            if col in ls.key_columns:
                sel = episodes.level == lv
                vals[sel] = ls.keys[col].to_numpy(dtype=object)[episodes.series[sel]]
        cols[col] = vals
    end_hours = hours.append(pd.DatetimeIndex([hours[-1] + pd.Timedelta(hours=1)]))
    cols.update(
        metric=episodes.metric,
        start=_iso(hours[episodes.start]),
        end=_iso(end_hours[episodes.end]),
        raised_hour=_iso(hours[episodes.raised]),
        peak_hour=_iso(hours[episodes.peak_hour]),
        peak_score=episodes.peak_score,
        value=episodes.value,
        expected=episodes.expected,
        impact=episodes.impact,
        team=episodes.team,
        detectors=episodes.detectors,
    )
    if config is not None:
        mode = np.full(len(episodes), "", dtype=object)
        for lv, m in set(zip(episodes.level, episodes.metric, strict=True)):
            sel = (episodes.level == lv) & (episodes.metric == m)
            mode[sel] = config.for_series(lv, m).expected_value
        cols["expected_value"] = mode
    return pd.DataFrame(cols)


def _iso(idx: pd.DatetimeIndex) -> np.ndarray:
    return np.asarray(idx.strftime("%Y-%m-%dT%H:%M:%SZ"), dtype=object)


def replay(
    history: History,
    config: DetectorConfig,
    *,
    levels: list[str] | None = None,
    metrics: list[str] | None = None,
    executor: Executor | None = None,
    routes: dict[str, np.ndarray] | None = None,
    progress: bool = True,
) -> ReplayResult:
    """Replay `config` over `history` once (see `Replayer` for repeated use)."""
    rp = Replayer(
        history, levels=levels, metrics=metrics, executor=executor, routes=routes, progress=progress
    )
    return rp.replay(config)
