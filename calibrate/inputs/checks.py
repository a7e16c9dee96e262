"""`check`: load everything a workspace names and summarise it (nothing is replayed)."""

from __future__ import annotations

import importlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calibrate.inputs.history import History, load_history
from calibrate.inputs.owners import load_owners
from calibrate.inputs.workspace import Workspace
from calibrate.settings import DetectorConfig

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
    blank_cells : dict of str to int
        Per measure, blank (CSV) or null/NaN (Parquet, SQL) cells, filled like
        missing hours.
    naive_rows : int
        Rows whose time had no UTC offset (read as UTC).
    notes : list of str
        Things skipped or worth a look.
    warnings : list of str
        Things that make the detector raise less than it seems to (printed first).
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
    blank_cells: dict[str, int] = field(default_factory=dict)
    naive_rows: int = 0
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

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
        if sum(self.blank_cells.values()):
            out.append(
                f"blank or NaN cells: {sum(self.blank_cells.values())} ("
                + ", ".join(f"{m} {n}" for m, n in self.blank_cells.items())
                + "), filled like missing hours (counted in the gaps above)"
            )
        if self.naive_rows:
            out.append(
                f"times without a UTC offset: {self.naive_rows} of {self.n_rows} rows, "
                "read as UTC"
            )
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
        out.extend(f"warning: {w}" for w in self.warnings)
        return out


def check_workspace(ws: Workspace) -> CheckSummary:
    """Load history, owners and (when available) incidents of `ws` and summarise them.

    Raises `InputError` for the first problem in any file it loads.
    """
    history = load_history(ws)
    summary = summarise_history(ws, history)
    summary.warnings.extend(f"{where}: {what}" for where, what in
                            unreplayable(ws.detector, ws, history, ws.file.name))
    if ws.teams.owners is not None:
        owners = load_owners(ws, history)
        base = history.filled[list(history.key_columns)]
        teams = owners.route_keys(base)
        summary.owners_rows = len(owners.rows)
        summary.uncovered = [" / ".join(r) for r in base[teams == ""].itertuples(index=False)]
        summary.warnings.extend(_unmatched_owners(owners, base, ws))
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


def unreplayable(
    config: DetectorConfig, ws: Workspace, history: History, name: str
) -> list[tuple[str, str]]:
    """(where, what) for each settings table some watched series is replayed with whose
    decomposition window is longer than the history: those series are never replayed.

    `name` is how messages refer to the file `config` came from (pure).
    """
    out: list[tuple[str, str]] = []
    seen: set[str] = set()
    for level in history.levels:
        for metric in ws.metric_names:
            group = next((g for g in config.groups if g.matches(level, metric)), None)
            table = "[detector]" if group is None else f"[detector.group.{group.name}]"
            window = (config.base if group is None else group.settings).decomposition_window_hours
            if table in seen or window <= history.n_hours:
                continue
            seen.add(table)
            out.append((
                f"{name} {table} key 'decomposition_window_hours'",
                f"{window} hours is longer than the history ({history.n_hours} hours), so "
                "no hour can be replayed: no alert could ever be raised; shorten the window "
                "or load more history",
            ))
    return out


def _unmatched_owners(owners, base: pd.DataFrame, ws: Workspace) -> list[str]:
    """One warning naming the owners rows that match no series (typos, old keys)."""
    rows = owners.unmatched(base)
    if not len(rows):
        return []
    cols = [c for c in owners.key_columns if c in rows.columns]
    labels = [
        f"row {r} ({' / '.join(keys[:d])})"
        for r, d, keys in zip(rows["row"], rows["depth"],
                              rows[cols].itertuples(index=False, name=None), strict=True)
    ]
    more = len(labels) - EXAMPLES
    text = "; ".join(labels[:EXAMPLES]) + (f"; and {more} more" if more > 0 else "")
    return [f"{_display(ws.teams.owners, ws.root)}: {len(labels)} row(s) match no series "
            f"of the history, so they route nothing: {text}"]


def _display(path, root: Path) -> str:
    try:
        return str(Path(path).relative_to(root))
    except ValueError:
        return str(path)


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
        blank_cells=dict(history.blank_cells),
        naive_rows=history.naive_rows,
    )


def _incidents(ws: Workspace, history: History, notes: list[str]) -> dict[str, int] | None:
    try:
        module = importlib.import_module("calibrate.inputs.incidents")
    except ModuleNotFoundError as exc:
        if exc.name != "calibrate.inputs.incidents":
            raise
        notes.append("incidents not checked: calibrate.inputs.incidents is not available yet")
        return None
    loader = getattr(module, "load_incidents", None)
    if loader is None:
        notes.append("incidents not checked: calibrate.inputs.incidents has no load_incidents")
        return None
    incidents = loader(ws, history)
    levels, counts = np.unique(np.asarray(incidents.level, dtype=str), return_counts=True)
    found = dict(zip(levels.tolist(), counts.tolist(), strict=True))
    return {lv: int(found.get(lv, 0)) for lv in ws.levels}
