"""`check`: load everything a workspace names and summarise it (nothing is replayed)."""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calibrate.history import History, load_history
from calibrate.owners import load_owners
from calibrate.workspace import Workspace

EXAMPLES = 5


@dataclass
class CheckSummary:
    """What `check_workspace` found.

    Attributes
    ----------
    workspace : Path
    n_rows : int
        Input rows read.
    series_per_level : dict of str to int
    first_hour, last_hour : pandas.Timestamp
    n_hours : int
    filled_hours : dict of str to int
        Per measure, hours filled over all base series.
    filled_series : int
        Base series with at least one filled hour (any measure).
    n_base_series : int
    incidents_per_level : dict of str to int, or None when incidents were not loaded
    analysts : dict of str to int
    owners_rows : int or None
        Rows of the owners file (None when no owners file is given).
    uncovered : list of str
        Labels of base series no owners row covers.
    notes : list of str
        Things skipped or worth a look.
    """

    workspace: Path
    n_rows: int
    series_per_level: dict[str, int]
    first_hour: pd.Timestamp
    last_hour: pd.Timestamp
    n_hours: int
    filled_hours: dict[str, int]
    filled_series: int
    n_base_series: int
    incidents_per_level: dict[str, int] | None = None
    analysts: dict[str, int] = field(default_factory=dict)
    owners_rows: int | None = None
    uncovered: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def filled_total(self) -> int:
        return sum(self.filled_hours.values())

    def lines(self) -> list[str]:
        """Human-readable summary, one item per line."""
        iso = "%Y-%m-%dT%H:%MZ"
        out = [
            f"workspace: {self.workspace}",
            f"history: {self.n_rows} rows, {self.n_base_series} base series, "
            f"{self.n_hours} hours from {self.first_hour.strftime(iso)} "
            f"to {self.last_hour.strftime(iso)}",
            "series per level: "
            + ", ".join(f"{k} {v}" for k, v in self.series_per_level.items()),
            f"gaps filled: {self.filled_total} hours in {self.filled_series} series ("
            + ", ".join(f"{m} {n}" for m, n in self.filled_hours.items())
            + ")",
        ]
        if self.incidents_per_level is not None:
            out.append(
                f"incidents: {sum(self.incidents_per_level.values())} ("
                + ", ".join(f"{k} {v}" for k, v in self.incidents_per_level.items())
                + ")"
            )
        teams = ", ".join(f"{t} {n}" for t, n in self.analysts.items()) or "none"
        out.append(f"teams (analysts): {teams}")
        if self.owners_rows is not None:
            text = f"owners: {self.owners_rows} rows; {len(self.uncovered)} base series unowned"
            if self.uncovered:
                more = len(self.uncovered) - EXAMPLES
                text += " (" + "; ".join(self.uncovered[:EXAMPLES])
                text += f"; and {more} more)" if more > 0 else ")"
            out.append(text)
        out.extend(f"note: {n}" for n in self.notes)
        return out


def check_workspace(ws: Workspace) -> CheckSummary:
    """Load history, owners and (when available) incidents of `ws` and summarise them.

    Raises `InputError` for the first problem in any file it loads.
    """
    history = load_history(ws)
    summary = summarise_history(ws, history)
    if ws.teams.owners is not None:
        owners = load_owners(ws, history)
        base = history.filled[list(history.key_columns)]
        teams = owners.route_keys(base)
        summary.owners_rows = len(owners.rows)
        summary.uncovered = [" / ".join(r) for r in base[teams == ""].itertuples(index=False)]
        unused = sorted(set(ws.teams.analysts) - set(owners.rows["team"]))
        if unused:
            summary.notes.append(f"teams with analysts but no owners rows: {', '.join(unused)}")
    else:
        summary.notes.append("no owners file ([teams] owners): alerts will not be routed")
    if ws.incidents.path is None:
        summary.notes.append("no [incidents] section: recall and miss rate cannot be scored")
    else:
        summary.incidents_per_level = _incidents(ws, history, summary.notes)
    return summary


def summarise_history(ws: Workspace, history: History) -> CheckSummary:
    """The history part of the summary (pure)."""
    measures = list(ws.measures)
    filled = history.filled[measures].to_numpy() if measures else np.zeros((0, 0))
    return CheckSummary(
        workspace=ws.file,
        n_rows=history.n_rows,
        series_per_level={k: v.n_series for k, v in history.levels.items()},
        first_hour=history.hours[0],
        last_hour=history.hours[-1],
        n_hours=history.n_hours,
        filled_hours={m: int(history.filled[m].sum()) for m in measures},
        filled_series=int((filled > 0).any(axis=1).sum()) if filled.size else 0,
        n_base_series=len(history.filled),
        analysts=dict(ws.teams.analysts),
    )


def _incidents(ws: Workspace, history: History, notes: list[str]) -> dict[str, int] | None:
    try:
        module = importlib.import_module("calibrate.incidents")
    except ModuleNotFoundError as exc:
        if exc.name != "calibrate.incidents":
            raise
        notes.append("incidents not checked: calibrate.incidents is not available yet")
        return None
    loader = getattr(module, "load_incidents", None)
    if loader is None:
        notes.append("incidents not checked: calibrate.incidents has no load_incidents")
        return None
    incidents = loader(ws, history)
    levels, counts = np.unique(np.asarray(incidents.level, dtype=str), return_counts=True)
    found = dict(zip(levels.tolist(), counts.tolist(), strict=True))
    return {lv: int(found.get(lv, 0)) for lv in ws.levels}
