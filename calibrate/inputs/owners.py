"""Owners file: which team owns which series (key prefix -> team).

The owners CSV has some leading key columns (a prefix of the history's key columns)
and `team`. A blank key means "any": a row ``m1,,,ops`` owns everything in market m1.
Blanks may only be followed by blanks. A row with every key blank owns everything
no other row matches.

Routing rule (`Owners.route`), for a series with keys k1..kd:
1. the most specific owners row whose keys equal a prefix of k1..kd wins
   (longest prefix first);
2. when no row matches (the series sits above the rows that split its descendants
   between teams), the team owning most of its descendant base series wins; ties go
   to the team name that sorts first; descendants owned by nobody do not vote;
3. otherwise "" (unrouted).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calibrate.errors import InputError
from calibrate.inputs.history import History, LevelSeries
from calibrate.inputs.workspace import Workspace

TEAM_COLUMN = "team"


@dataclass
class Owners:
    """Validated owners rows.

    Attributes
    ----------
    key_columns : tuple of str
        The history's full key columns.
    rows : pandas.DataFrame
        One row per owners row: the file's key columns (blank = any), `team`,
        `depth` (number of leading non-blank keys) and `row` (file row number).
    base_keys : pandas.DataFrame, optional
        Keys of the history's base series, for the majority rule (see module doc).
    """

    key_columns: tuple[str, ...]
    rows: pd.DataFrame
    base_keys: pd.DataFrame | None = None
    _lookup: dict[tuple[str, ...], str] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        cols = [c for c in self.key_columns if c in self.rows.columns]
        self._lookup = {
            tuple(r[:d]): team
            for r, d, team in zip(
                self.rows[cols].itertuples(index=False, name=None),
                self.rows["depth"],
                self.rows[TEAM_COLUMN],
                strict=True,
            )
        }

    @property
    def max_depth(self) -> int:
        return int(self.rows["depth"].max()) if len(self.rows) else 0

    def team_for(self, keys: tuple[str, ...]) -> str:
        """Team of the most specific owners row matching a prefix of `keys` ("" if none)."""
        for d in range(min(len(keys), self.max_depth), -1, -1):
            team = self._lookup.get(tuple(keys[:d]))
            if team is not None:
                return team
        return ""

    def unmatched(self, base_keys: pd.DataFrame) -> pd.DataFrame:
        """Owners rows whose keys are a prefix of no base series (typos, retired keys).

        `base_keys` holds the history's base series (all key columns). A row with every
        key blank matches any series. Returns those rows (with `row`, the file row).
        """
        cols = [c for c in self.key_columns if c in self.rows.columns]
        hit = np.zeros(len(self.rows), dtype=bool)
        for d in range(self.max_depth + 1):
            at = (self.rows["depth"] == d).to_numpy()
            if not at.any():
                continue
            if d == 0:
                hit[at] = len(base_keys) > 0
                continue
            prefixes = base_keys[cols[:d]].astype(str).drop_duplicates()
            found = self.rows.loc[at, cols[:d]].merge(prefixes, how="left", indicator=True)
            hit[at] = (found["_merge"] == "both").to_numpy()
        return self.rows[~hit]

    def route(self, level_series: LevelSeries, base_keys: pd.DataFrame | None = None) -> np.ndarray:
        """Team of every series of a level (object array of str, "" when unrouted)."""
        return self.route_keys(level_series.keys, base_keys)

    def route_keys(self, keys: pd.DataFrame, base_keys: pd.DataFrame | None = None) -> np.ndarray:
        """`route` for a frame of series keys (leading key columns, one row per series)."""
        teams = self._direct(keys)
        base = base_keys if base_keys is not None else self.base_keys
        k = keys.shape[1]
        open_ = teams == ""
        if open_.any() and base is not None and k < base.shape[1]:
            base_team = self._direct(base)
            votes = base[list(keys.columns)].assign(_team=base_team)
            votes = votes[votes["_team"] != ""]
            if len(votes):
                counts = votes.groupby([*keys.columns, "_team"], sort=True).size().reset_index(
                    name="_n"
                )
                # most descendants first, then team name: first row per series wins
                counts = counts.sort_values(["_n", "_team"], ascending=[False, True], kind="stable")
                best = counts.drop_duplicates(list(keys.columns))
                merged = keys.merge(best, on=list(keys.columns), how="left")
                majority = merged["_team"].fillna("").to_numpy(dtype=object)
                teams = np.where(open_, majority, teams).astype(object)
        return teams

    def _direct(self, keys: pd.DataFrame) -> np.ndarray:
        """Rule 1 of the module doc, vectorised by merging on each key depth."""
        n = len(keys)
        teams = np.full(n, "", dtype=object)
        cols = list(keys.columns)
        for d in range(min(len(cols), self.max_depth), -1, -1):
            rows = self.rows[self.rows["depth"] == d]
            if not len(rows):
                continue
            todo = teams == ""
            if not todo.any():
                break
            if d == 0:
                teams[todo] = rows[TEAM_COLUMN].iloc[0]
                continue
            on = cols[:d]
            merged = keys[on].astype(str).merge(rows[[*on, TEAM_COLUMN]], on=on, how="left")
            found = merged[TEAM_COLUMN].fillna("").to_numpy(dtype=object)
            teams = np.where(todo, found, teams).astype(object)
        return teams


def load_owners(ws: Workspace, history: History | None = None) -> Owners:
    """Read and validate the owners CSV named by ``[teams] owners``.

    Parameters
    ----------
    ws : Workspace
    history : History, optional
        When given, its base series are kept for the majority routing rule.

    Raises
    ------
    InputError
        Naming the file, and row (header = row 1) and column, of the first problem.
    """
    if ws.teams.owners is None:
        raise InputError(f"{ws.file.name} [teams] key 'owners'", "no owners file is given")
    path = Path(ws.teams.owners)
    try:
        name = str(path.relative_to(ws.root))
    except ValueError:
        name = str(path)
    if not path.is_file():
        raise InputError(name, "file not found")
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, skip_blank_lines=True)
    except pd.errors.EmptyDataError:
        raise InputError(name, "file is empty") from None
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputError(name, f"cannot read as CSV: {str(exc).strip().splitlines()[0]}") from None
    base = history.filled[list(history.key_columns)] if history is not None else None
    return owners_from_frame(frame, ws, name, base_keys=base)


def owners_from_frame(
    frame: pd.DataFrame, ws: Workspace, name: str, base_keys: pd.DataFrame | None = None
) -> Owners:
    """Validate owners rows already read as text (blank cells as "")."""
    key_columns = ws.history.key_columns
    frame = frame.rename(columns=lambda c: str(c).strip())
    if TEAM_COLUMN not in frame.columns:
        raise InputError(f"{name} column '{TEAM_COLUMN}'", "column is missing")
    keys = [c for c in frame.columns if c != TEAM_COLUMN]
    for c in keys:
        if c not in key_columns:
            raise InputError(
                f"{name} column '{c}'", f"is not a key column (key_columns: {list(key_columns)})"
            )
    if tuple(keys) != key_columns[: len(keys)]:
        raise InputError(
            f"{name} column '{keys[0] if keys else TEAM_COLUMN}'",
            f"key columns must be a leading part of {list(key_columns)}, but got {keys}",
        )
    if not len(frame):
        raise InputError(name, "file has a header but no rows")
    frame = frame.apply(lambda s: s.str.strip())
    known = ws.teams.analysts
    seen: dict[tuple[str, ...], int] = {}
    depths = []
    for i, rec in enumerate(frame[[*keys, TEAM_COLUMN]].itertuples(index=False, name=None)):
        row = i + 2
        *vals, team = rec
        if team == "":
            raise InputError(f"{name} row {row} column '{TEAM_COLUMN}'", "team is blank")
        if team not in known:
            raise InputError(
                f"{name} row {row} column '{TEAM_COLUMN}'",
                f"team '{team}' is not in {ws.file.name} [teams] analysts "
                f"(known: {', '.join(known) or 'none'})",
            )
        depth = next((j for j, v in enumerate(vals) if v == ""), len(vals))
        for j in range(depth, len(vals)):
            if vals[j] != "":
                raise InputError(
                    f"{name} row {row} column '{keys[j]}'",
                    f"'{vals[j]}' follows a blank key; keys below a blank must be blank too",
                )
        prefix = tuple(vals[:depth])
        if prefix in seen:
            raise InputError(f"{name} row {row}", f"same keys as row {seen[prefix]}")
        seen[prefix] = row
        depths.append(depth)
    rows = frame[[*keys, TEAM_COLUMN]].copy()
    rows["depth"] = np.asarray(depths, dtype=np.int64)
    rows["row"] = np.arange(len(rows), dtype=np.int64) + 2
    return Owners(key_columns=tuple(key_columns), rows=rows.reset_index(drop=True),
                  base_keys=base_keys)
