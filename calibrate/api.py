"""The Python API: everything the CLI does, as functions over a `Session`.

A `Session` is one workspace with its history, owners routing and incidents
loaded once. Typical use, also as a saved script without an
``if __name__ == "__main__":`` guard (the local engine's workers never run the
calling script)::

    from calibrate.api import alert_volume, open_session, replay_session, score_episodes

    ses = open_session("sample_data")
    result = replay_session(ses, progress=False)
    figs = score_episodes(ses, result.episodes)
    print(figs.per_team[["alerts", "alerts_per_analyst_day"]])

(the README's "From Python" example, shortened).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calibrate.engine.executors import Executor, make_executor, trim_heap
from calibrate.engine.replay import Replayer, ReplayResult
from calibrate.errors import InputError
from calibrate.inputs.checks import unreplayable
from calibrate.inputs.history import History, load_history
from calibrate.inputs.incidents import Incidents, load_incidents
from calibrate.inputs.owners import load_owners
from calibrate.inputs.workspace import Workspace, load_workspace
from calibrate.scoring.figures import Figures, figures
from calibrate.scoring.matching import match, period_filter, route_teams
from calibrate.scoring.tables import volume
from calibrate.settings import DetectorConfig


@dataclass
class Session:
    """A loaded workspace: settings, history, team routing and incidents."""

    ws: Workspace
    history: History
    routes: dict[str, np.ndarray] = field(default_factory=dict)
    incidents: Incidents | None = None

    @property
    def analysts(self) -> dict[str, int]:
        return dict(self.ws.teams.analysts)

    def hour_index(self, when: str | None, name: str, default: int) -> int:
        """Hour index of an ISO date/time given on the command line (None -> default)."""
        if when is None:
            return default
        try:
            ts = pd.Timestamp(when)
        except ValueError:
            raise InputError(name, f"not a date or ISO-8601 time: {when!r}") from None
        ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
        idx = int(self.history.hours.searchsorted(ts))
        return min(max(idx, 0), self.history.n_hours)


# a history holding more than this (its level arrays) is followed by `trim_heap`, which
# costs a garbage collection (about 0.08 s), worth it only after a large load
TRIM_BYTES = 64 * 2**20


def open_session(path: str | Path, incidents: bool = True) -> Session:
    """Load a workspace, its history, owners routing and (optionally) incidents."""
    ws = load_workspace(path)
    history = load_history(ws)
    routes: dict[str, np.ndarray] = {}
    if ws.teams.owners is not None:
        owners = load_owners(ws, history)
        routes = {lv: owners.route(ls) for lv, ls in history.levels.items()}
    inc = None
    if incidents and ws.incidents.path is not None:
        inc = route_teams(load_incidents(ws, history), routes)
    if sum(v.nbytes for ls in history.levels.values() for v in ls.values.values()) > TRIM_BYTES:
        trim_heap()  # the frames a large history was built from are gone
    return Session(ws, history, routes, inc)


def make_replayer(
    ses: Session,
    *,
    levels: list[str] | None = None,
    metrics: list[str] | None = None,
    executor: Executor | None = None,
    engine: str = "local",
    workers: int | None = None,
    scheduler: str | None = None,
    fence_windows: tuple[int, ...] = (),
    sides: tuple[str, ...] = (),
    flatlines: tuple[int, ...] = (),
    progress: bool = True,
    cache_bytes: int | None = None,
) -> Replayer:
    """A `Replayer` over the session's history and watched metrics.

    Without `executor` it makes one from `engine`, `workers` and `scheduler` and shuts
    it down on `close()`; an executor passed in stays up for the caller to reuse (and
    close): replayers of one history reuse its workers. `cache_bytes` bounds the
    remainder streams kept between replays (least recently used dropped first).
    """
    for lv in levels or []:
        if lv not in ses.history.levels:
            raise InputError(
                "--levels", f"unknown level '{lv}' (known: {', '.join(ses.history.levels)})"
            )
    known = list(ses.ws.metric_names)
    for m in metrics or []:
        if m not in known:
            raise InputError("--metrics", f"unknown metric '{m}' (known: {', '.join(known)})")
    owned = executor is None
    executor = executor or make_executor(engine, workers, scheduler)
    return Replayer(
        ses.history,
        levels=levels,
        metrics=metrics or known,
        executor=executor,
        routes=ses.routes,
        fence_windows=fence_windows,
        sides=sides,
        flatlines=flatlines,
        progress=progress,
        own_executor=owned,
        cache_bytes=cache_bytes,
    )


def require_replayable(
    ses: Session, config: DetectorConfig | None = None, config_name: str | None = None
) -> None:
    """Raise `InputError` when a decomposition window of `config` (default the
    workspace's `[detector]`; `config_name` its file, for the message) is longer than
    the history: its series could never be replayed, so no alert could be raised."""
    problems = unreplayable(config or ses.ws.detector, ses.ws, ses.history,
                            config_name or ses.ws.file.name)
    if problems:
        raise InputError(*problems[0])


def require_incidents(ses: Session, start_hour: int, end_hour: int) -> None:
    """Raise `CalibrationError` when no incident starts in ``[start_hour, end_hour)``
    (the tuning hours): there is nothing to tune against, and the least sensitive
    settings would look as if they met any miss-rate target."""
    n = 0 if ses.incidents is None else len(period_filter(ses.incidents, start_hour, end_hour))
    if n == 0:
        hours = ses.history.hours
        last = hours[end_hour - 1] if 0 < end_hour <= len(hours) else hours[-1]
        first = hours[min(max(start_hour, 0), len(hours) - 1)]
        path = Path(ses.ws.incidents.path or ses.ws.file)
        raise InputError(
            str(path.relative_to(ses.ws.root)) if path.is_relative_to(ses.ws.root) else str(path),
            f"no incident starts in the tuning weeks ({first:%Y-%m-%dT%H:%MZ} to "
            f"{last:%Y-%m-%dT%H:%MZ}), so there is nothing to tune against; add labelled "
            "incidents for those weeks",
        )


def replay_session(
    ses: Session, config: DetectorConfig | None = None, config_name: str | None = None,
    **kwargs
) -> ReplayResult:
    """Replay the workspace's `[detector]` settings (or `config`, read from the file
    `config_name`) once; refuses settings that could replay no hour."""
    require_replayable(ses, config, config_name)
    rp = make_replayer(ses, **kwargs)
    try:
        return rp.replay(config or ses.ws.detector)
    finally:
        rp.close()


def first_scored_hour(config: DetectorConfig, ws: Workspace) -> int:
    """First hour every series is scored at: the latest `first_scored_hour` of the
    settings in `config` (L - 1 with ``expected_value = "fit"``, L + W with
    ``"forecast"``)."""
    settings = [config.base, *(g.settings for g in config.groups)]
    return max(s.first_scored_hour for s in settings)


def scored_period(
    ses: Session, start_hour: int | None = None, end_hour: int | None = None,
    first_scored: int | None = None,
) -> tuple[int, int]:
    """The hours ``[start, end)`` alerts are counted over: from the first scored hour
    (`first_scored`, default: that of the workspace's `[detector]`, `first_scored_hour`)
    or `start_hour` if later, to `end_hour` (default: the end of the history).

    "Alerts per analyst per day" divides by these days only, in `score`, `volume` and
    the report alike: no alert can be raised during the warm-up before the first scored
    hour, so counting those days would dilute the rate. Raises `InputError` when the
    period holds no scored hour.
    """
    n = ses.history.n_hours
    if first_scored is None:
        first_scored = first_scored_hour(ses.ws.detector, ses.ws)
    start = max(0 if start_hour is None else start_hour, first_scored)
    end = n if end_hour is None else end_hour
    if end <= start:
        hours = ses.history.hours
        if first_scored >= n:
            what = (f"the first scored hour (hour {first_scored}, after the decomposition "
                    f"window's warm-up) is past the end of the history ({n} hours): nothing "
                    "can be scored; shorten the window or load more history")
        else:
            what = (f"the period ends before the first scored hour "
                    f"{hours[first_scored]:%Y-%m-%dT%H:%MZ} (the decomposition window's "
                    "warm-up): nothing can be scored; give a later --to")
        raise InputError("--from/--to", what)
    return start, end


def score_episodes(
    ses: Session,
    episodes,
    start_hour: int | None = None,
    end_hour: int | None = None,
    related: bool = False,
    first_scored: int | None = None,
) -> Figures:
    """Figures for alert episodes against the session's incidents over a period.

    Alerts, incidents and days count from the first scored hour (`first_scored`,
    default that of the workspace's `[detector]` settings; see `scored_period`).
    Incidents of the period that begin before it can never be caught: they are listed
    apart and left out of recall.
    """
    if ses.incidents is None:
        raise InputError(str(ses.ws.file), "no [incidents] path: nothing to score against")
    if first_scored is None:
        first_scored = first_scored_hour(ses.ws.detector, ses.ws)
    start = 0 if start_hour is None else start_hour
    scored, end = scored_period(ses, start_hour, end_hour, first_scored)
    eps = period_filter(episodes, scored, end)
    inc = period_filter(ses.incidents, scored, end)
    unscorable = period_filter(ses.incidents, min(start, scored), scored)
    m = match(
        eps,
        inc,
        ses.ws.incidents.early_hours,
        ses.ws.incidents.late_hours,
        related=ses.history if related else None,
    )
    n_days = (end - scored) / 24.0
    return figures(m, eps, inc, ses.analysts, n_days, goal=ses.ws.goal, unscorable=unscorable,
                   start_hour=scored, seed=ses.ws.search.seed)


def alert_volume(
    ses: Session, episodes, start_hour: int | None = None, end_hour: int | None = None,
    first_scored: int | None = None,
) -> pd.DataFrame:
    """Alerts per team per ISO week and per analyst per day, against the budget, over
    the scored period (`scored_period`: from the first scored hour on)."""
    if end_hour is not None and end_hour <= (start_hour or 0):
        raise InputError("--from/--to", "the period is empty")
    start, end = scored_period(ses, start_hour, end_hour, first_scored)
    return volume(episodes, ses.analysts, ses.history.hours, start, end, goal=ses.ws.goal)


def volume_per_team(table: pd.DataFrame) -> pd.DataFrame:
    """One row per team of an `alert_volume` table over its whole period: alerts, days,
    analysts and alerts per analyst per day (all alerts over all days, not a mean of
    the weekly rates, which would weigh a partial week like a whole one)."""
    g = table.groupby("team", sort=False)
    hours = (table["days"] * 24).round().groupby(table["team"], sort=False).sum()
    out = pd.DataFrame({"alerts": g["alerts"].sum(), "days": hours / 24.0,
                        "analysts": g["analysts"].first()})
    denom = out["analysts"] * out["days"]
    out["alerts_per_analyst_day"] = (out["alerts"] / denom.where(denom > 0)).astype(float)
    if "budget" in table.columns:
        out["budget"] = g["budget"].first()
        out["over_budget"] = out["alerts_per_analyst_day"] > out["budget"]
    return out
