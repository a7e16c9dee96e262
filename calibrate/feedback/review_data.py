"""What the review page shows and saves: the alert queue, plot data, verdicts, new incidents.

`open_review` loads a workspace, replays a config once (the plots show that replay's
value, expected value and fences, never anything recomputed elsewhere), and reads
back an earlier verdicts file and an earlier added-incidents file, so a review
resumes where the files left off. `ReviewData` answers the page's questions as plain
JSON-ready dicts and saves each change at once:

- verdicts go to the ``--verdicts`` file in the format `calibrate retune --verdicts`
  reads (the alerts-for-review columns of `calibrate.feedback.review.review_frame` with
  ``verdict`` and ``comment`` filled in), rewritten whole and atomically on every
  change, so every earlier verdict stays in it;
- incidents an analyst adds go to ``--incidents-out`` in the incidents CSV format,
  never to the workspace's own incidents file.

Problems a browser can cause raise `ReviewError` (an HTTP status and one line).
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from calibrate import api
from calibrate.engine.replay import ReplayResult
from calibrate.errors import CalibrationError, InputError
from calibrate.feedback.review import VERDICTS, read_reviewed, review_frame
from calibrate.formulas import parse_formula
from calibrate.inputs.incidents import incidents_from_frame, read_text_csv
from calibrate.outputs import load_config, write_table

MAX_COMMENT = 2000
MAX_NOTE = 2000
RELATED_MAX = 4


class ReviewError(Exception):
    """A request the page cannot honour: HTTP `status` and a one-line `reason`."""

    def __init__(self, status: int, reason: str):
        self.status = status
        self.reason = " ".join(str(reason).split())
        super().__init__(self.reason)


def _floats(a: np.ndarray) -> list[float | None]:
    """A float array as a JSON-ready list (NaN and infinities as null)."""
    a = np.asarray(a, dtype=np.float64)
    out = a.astype(object)
    out[~np.isfinite(a)] = None
    return out.tolist()


def _iso(idx: pd.DatetimeIndex) -> np.ndarray:
    return np.asarray(idx.strftime("%Y-%m-%dT%H:%M:%SZ"), dtype=object)


def _file_state(path: Path | None) -> tuple[int, int, int] | None:
    """What tells whether a file changed since we last read or wrote it."""
    if path is None:
        return None
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return None
    return (st.st_ino, st.st_size, st.st_mtime_ns)


def related_metrics(ws, metric: str) -> list[str]:
    """Metrics that explain `metric`: for a derived metric the measures its formula uses
    (a ratio's numerator and denominator); for a measure the derived metrics built on it
    and their other measures; else the other watched metrics."""
    formulas = {name: parse_formula(text, tuple(ws.measures), f"[metrics] {name}")
                for name, text in ws.metrics.items()}
    if metric in formulas:
        names = list(formulas[metric].names)
    else:
        users = [d for d, f in formulas.items() if metric in f.names]
        names = users + [n for d in users for n in formulas[d].names]
        if not names:
            names = list(ws.metric_names)
    out = list(dict.fromkeys(n for n in names if n != metric))
    return out[:RELATED_MAX]


@dataclass
class Paths:
    """The files of one review."""

    verdicts: Path
    incidents_out: Path | None
    alerts: Path | None
    config: Path | None


def check_paths(ses: api.Session, paths: Paths) -> None:
    """Refuse outputs that would overwrite an input: the page writes only the verdicts
    file (which may be the alerts file it reviews) and the added-incidents file."""
    ws = ses.ws
    inputs = {"the workspace file": ws.file}
    if ws.incidents.path is not None:
        inputs["the workspace's incidents file"] = Path(ws.incidents.path)
    if ws.history.path is not None:
        inputs["the history file"] = Path(ws.history.path)
    if ws.teams.owners is not None:
        inputs["the owners file"] = Path(ws.teams.owners)
    if paths.config is not None:
        inputs["the --config file"] = paths.config
    outs = [("--verdicts", paths.verdicts)]
    if paths.incidents_out is not None:
        outs.append(("--incidents-out", paths.incidents_out))
        if paths.alerts is not None:
            inputs["the --alerts file"] = paths.alerts
    for opt, out in outs:
        if out.is_dir():
            raise CalibrationError(f"{out}: is a folder; give a file name for {opt}")
        if out.suffix.lower() != ".csv":
            raise CalibrationError(f"{out}: {opt} must be a .csv file")
        for what, p in inputs.items():
            if out.resolve() == Path(p).resolve():
                raise CalibrationError(f"{out}: is {what}; choose another {opt} file "
                                       "(the review never writes its inputs)")
    if paths.incidents_out is not None and (
            paths.incidents_out.resolve() == paths.verdicts.resolve()):
        raise CalibrationError(f"{paths.incidents_out}: is also the --verdicts file; "
                               "give --incidents-out its own file")


def check_rows(df: pd.DataFrame, ref: pd.DataFrame, key_columns: tuple[str, ...], where: str,
               config_name: str) -> None:
    """Each row's level, keys, metric and start must be those of its alert id in `ref`
    (the replay's alerts, one row per row of `df`)."""
    for col in ("level", *key_columns, "metric", "start"):
        if col not in df.columns:
            continue
        got = df[col].astype(str).str.strip().to_numpy(dtype=object)
        want = ref[col].astype(str).to_numpy(dtype=object)
        diff = got != want
        if col == "start" and diff.any():
            t_got = pd.to_datetime(pd.Series(got), utc=True, errors="coerce", format="ISO8601")
            t_want = pd.to_datetime(pd.Series(want), utc=True, format="ISO8601")
            diff = ~(t_got == t_want).to_numpy()
        if diff.any():
            p = int(np.flatnonzero(diff)[0])
            raise InputError(f"{where} row {p + 2} column '{col}'",
                             f"'{got[p]}' does not match alert {df['alert_id'].iloc[p]} of the "
                             f"replay of {config_name} ('{want[p]}'); was the file made from "
                             "another config? (pass it with --config)")


class ReviewData:
    """The queue, plot data and the two files of one review (see the module docstring).

    Parameters
    ----------
    ses : Session
    result : ReplayResult
        The replay of the reviewed config (plots and alert ids come from it).
    queue_pos : ndarray of int
        Positions in ``result.alerts_frame()`` of the alerts under review.
    paths : Paths
    config_name : str
        How the reviewed settings are named on the page.
    """

    def __init__(self, ses: api.Session, result: ReplayResult, queue_pos: np.ndarray,
                 paths: Paths, config_name: str):
        self.ses = ses
        self.result = result
        self.paths = paths
        self.config_name = config_name
        hist = ses.history
        self.hours = hist.hours
        self.hour_text = _iso(hist.hours)
        self.end_text = _iso(pd.DatetimeIndex([hist.hours[-1] + pd.Timedelta(hours=1)]))[0]
        self.ref = result.alerts_frame()
        self.pos_of = {a: i for i, a in enumerate(self.ref["alert_id"])}
        self.lock = threading.Lock()
        ep = result.episodes
        # the verdicts file holds the queue's alerts in review_frame's order
        self.frame = review_frame(self.ref.iloc[np.asarray(queue_pos, dtype=np.int64)])
        self.row_of = {a: i for i, a in enumerate(self.frame["alert_id"])}
        self.frame_pos = np.array([self.pos_of[a] for a in self.frame["alert_id"]],
                                  dtype=np.int64)
        self.verdict = np.full(len(self.frame), "", dtype=object)
        self.comment = np.full(len(self.frame), "", dtype=object)
        # alerts of each (level, series, metric), for "other alerts of this series"
        self.by_series: dict[tuple[str, int, str], np.ndarray] = {}
        if len(ep):
            keys = pd.DataFrame({"l": ep.level, "s": ep.series, "m": ep.metric})
            for k, idx in keys.groupby(["l", "s", "m"], sort=False).indices.items():
                self.by_series[(str(k[0]), int(k[1]), str(k[2]))] = np.asarray(idx)
        self.lookup = {lv: {tuple(k): i for i, k in enumerate(
            ls.keys[list(ls.key_columns)].astype(str).itertuples(index=False, name=None))}
            for lv, ls in hist.levels.items()}
        self.related = {m: related_metrics(ses.ws, m) for m in ses.ws.metric_names}
        self.verdict_state = _file_state(paths.verdicts)
        self.added = pd.DataFrame(columns=self.incident_columns)
        self.added_state = _file_state(paths.incidents_out)

    # ------------------------------------------------------------------ loading

    @property
    def incident_columns(self) -> list[str]:
        return ["incident_id", "level", *self.ses.history.key_columns, "metric", "start",
                "end", "note"]

    def load_verdicts(self) -> None:
        """Take the verdicts and comments of an existing verdicts file (resume).

        Raises
        ------
        InputError
            A row naming an alert this review does not hold, or one that does not match
            it, an unknown verdict word, or two different verdicts for one alert.
        """
        path = self.paths.verdicts
        if not path.exists():
            return
        where = str(path)
        df = read_reviewed(path)
        ids = df["alert_id"].str.strip().to_numpy(dtype=object)
        words = df["verdict"].str.strip().str.lower().to_numpy(dtype=object)
        notes = (df["comment"].to_numpy(dtype=object) if "comment" in df.columns
                 else np.full(len(df), "", dtype=object))
        rows = np.array([self.row_of.get(a, -1) for a in ids], dtype=np.int64)
        unknown = np.flatnonzero(rows < 0)
        if len(unknown):
            p = int(unknown[0])
            raise InputError(f"{where} row {p + 2} column 'alert_id'",
                             f"alert '{ids[p]}' is not among the {len(self.frame)} alerts "
                             f"under review ({self.config_name}); start the review with the "
                             "config or alerts file the verdicts were given on")
        check_rows(df, self.frame.iloc[rows], self.ses.history.key_columns, where,
                   self.config_name)
        bad = np.flatnonzero(~np.isin(words, ["", *VERDICTS]))
        if len(bad):
            p = int(bad[0])
            raise InputError(f"{where} row {p + 2} column 'verdict'",
                             f"'{df['verdict'].iloc[p]}' is not a verdict "
                             f"(use {', '.join(VERDICTS)} or blank)")
        first: dict[int, int] = {}
        for p, (r, w) in enumerate(zip(rows.tolist(), words.tolist(), strict=True)):
            if r in first and w and self.verdict[r] and w != self.verdict[r]:
                raise InputError(f"{where} row {p + 2} column 'verdict'",
                                 f"alert {ids[p]} is '{w}' here but '{self.verdict[r]}' in "
                                 f"row {first[r] + 2}")
            first.setdefault(r, p)
            if w:
                self.verdict[r] = w
            if str(notes[p]).strip():
                self.comment[r] = str(notes[p]).strip()

    def load_added(self) -> None:
        """Take the incidents of an existing --incidents-out file (validated)."""
        path = self.paths.incidents_out
        if path is None or not path.exists():
            return
        df = read_text_csv(path)
        incidents_from_frame(df, self.ses.ws, self.ses.history, str(path))
        for col in self.incident_columns:
            if col not in df.columns:
                df[col] = ""
        self.added = df[self.incident_columns].astype(str).reset_index(drop=True)

    # ------------------------------------------------------------------ queries

    def meta(self) -> dict[str, Any]:
        """What the page needs once: hours, levels, metrics, teams, files, progress."""
        ws, hist = self.ses.ws, self.ses.history
        metrics = list(dict.fromkeys([*ws.metric_names, *ws.measures, *ws.metrics]))
        return {
            "workspace": str(ws.file),
            "config": self.config_name,
            "hours": self.hour_text.tolist(),
            "end_hour": self.end_text,
            "key_columns": list(hist.key_columns),
            "levels": {lv: list(ls.key_columns) for lv, ls in hist.levels.items()},
            "metrics": metrics,
            "watched": list(ws.metric_names),
            "verdicts": list(VERDICTS),
            "verdicts_file": str(self.paths.verdicts),
            "incidents_file": (None if self.paths.incidents_out is None
                               else str(self.paths.incidents_out)),
            "added": self.added.to_dict(orient="records"),
            "progress": self.progress(),
        }

    def progress(self) -> dict[str, int]:
        reviewed = int(np.count_nonzero(self.verdict != ""))
        return {"reviewed": reviewed, "total": len(self.frame)}

    def queue(self) -> dict[str, Any]:
        """The alerts under review as columns (the page groups, sorts and filters them)."""
        f, ep = self.frame, self.result.episodes
        p = self.frame_pos
        hist = self.ses.history
        label = np.empty(len(p), dtype=object)
        for lv in pd.unique(ep.level[p]) if len(p) else []:
            sel = np.flatnonzero(ep.level[p] == lv)
            ls = hist.levels[lv]
            cols = [ls.keys[c].astype(str).to_numpy(dtype=object) for c in ls.key_columns]
            s = ep.series[p[sel]]
            label[sel] = [" / ".join(parts) for parts in zip(*(c[s] for c in cols),
                                                              strict=True)]
        impact = ep.impact[p]
        with np.errstate(divide="ignore", invalid="ignore"):
            share = np.abs(impact) / np.abs(ep.expected[p])
        return {
            "alert_id": f["alert_id"].tolist(),
            "team": f["team"].astype(str).tolist(),
            "level": f["level"].astype(str).tolist(),
            "series": label.tolist(),
            "metric": f["metric"].astype(str).tolist(),
            "start": f["start"].tolist(),
            "raised_hour": f["raised_hour"].tolist(),
            "end": f["end"].tolist(),
            "impact": _floats(impact),
            # impact as a share of the expected value: comparable across metrics
            "impact_share": _floats(share),
            "peak_score": _floats(ep.peak_score[p]),
            "detectors": f["detectors"].astype(str).tolist(),
            "verdict": self.verdict.tolist(),
            "comment": self.comment.tolist(),
        }

    def alert(self, alert_id: str) -> dict[str, Any]:
        """One alert in detail: its fields and verdict, its series' plot data, the
        related metrics, the other alerts and the incidents of the series."""
        row = self.row_of.get(alert_id)
        if row is None:
            raise ReviewError(404, f"unknown alert id '{alert_id}'")
        p = int(self.frame_pos[row])
        ep = self.result.episodes
        lv, s, m = str(ep.level[p]), int(ep.series[p]), str(ep.metric[p])
        r = self.frame.iloc[row]
        out = self.series(lv, s, m)
        out["alert"] = {
            "alert_id": alert_id,
            **{c: _plain(r[c]) for c in ("team", "metric", "start", "end", "raised_hour",
                                         "peak_hour", "peak_score", "value", "expected",
                                         "impact", "detectors")},
            "start_index": int(ep.start[p]), "end_index": int(ep.end[p]),
            "raised_index": int(ep.raised[p]),
            "verdict": self.verdict[row], "comment": self.comment[row],
        }
        return out

    def find_series(self, level: str, keys: dict[str, str]) -> int:
        """Series index of `level` and its key values (`ReviewError` 404 when none)."""
        hist = self.ses.history
        if level not in hist.levels:
            raise ReviewError(404, f"unknown level '{level}' (known: {', '.join(hist.levels)})")
        cols = hist.levels[level].key_columns
        kt = tuple(str(keys.get(c, "")).strip() for c in cols)
        idx = self.lookup[level].get(kt)
        if idx is None:
            raise ReviewError(404, f"no series '{' / '.join(kt)}' at level '{level}'")
        return idx

    def series_list(self, level: str) -> dict[str, Any]:
        """Every series of a level with its number of alerts under review."""
        hist = self.ses.history
        if level not in hist.levels:
            raise ReviewError(404, f"unknown level '{level}' (known: {', '.join(hist.levels)})")
        ls = hist.levels[level]
        keys = ls.keys[list(ls.key_columns)].astype(str)
        counts = np.zeros(ls.n_series, dtype=np.int64)
        ep = self.result.episodes
        sel = self.frame_pos[ep.level[self.frame_pos] == level]
        np.add.at(counts, ep.series[sel], 1)
        return {"level": level, "key_columns": list(ls.key_columns),
                "keys": keys.to_numpy(dtype=object).tolist(), "alerts": counts.tolist()}

    def series(self, level: str, s: int, metric: str) -> dict[str, Any]:
        """Plot data of one series and metric: the replay's value, expected value and
        fences (watched metrics), flagged hours, the related metrics, the alerts of the
        series and metric and the incidents of the series."""
        hist = self.ses.history
        if level not in hist.levels:
            raise ReviewError(404, f"unknown level '{level}'")
        ls = hist.levels[level]
        if not 0 <= s < ls.n_series:
            raise ReviewError(404, f"no series number {s} at level '{level}'")
        if metric not in ls.values:
            raise ReviewError(404, f"unknown metric '{metric}' (known: "
                              f"{', '.join(ls.values)})")
        keys = {c: str(ls.keys[c].iloc[s]) for c in ls.key_columns}
        out: dict[str, Any] = {
            "level": level, "keys": keys, "label": " / ".join(keys.values()),
            "metric": metric, "main": self._trace(level, s, metric),
            "related": [self._trace(level, s, r) for r in self.related.get(
                metric, related_metrics(self.ses.ws, metric))],
            "alerts": self._series_alerts(level, s, metric),
            "incidents": self._series_incidents(level, s, keys),
        }
        return out

    def _trace(self, level: str, s: int, metric: str) -> dict[str, Any]:
        ms = self.result.scores.get((level, metric))
        if ms is None:
            value = self.ses.history.levels[level].values[metric][s]
            return {"metric": metric, "watched": False, "value": _floats(value)}
        k = ms.settings.fence_multiplier
        q1, q3 = ms.q1[s], ms.q3[s]
        iqr = q3 - q1
        flagged = np.flatnonzero(ms.flagged()[s])
        return {
            "metric": metric, "watched": True, "multiplier": float(k),
            "value": _floats(ms.value[s]), "expected": _floats(ms.expected[s]),
            # fences around the expected value: where the value would be flagged
            "lower": _floats(ms.expected[s] + q1 - k * iqr),
            "upper": _floats(ms.expected[s] + q3 + k * iqr),
            "flagged": flagged.tolist(),
        }

    def _series_alerts(self, level: str, s: int, metric: str) -> list[dict[str, Any]]:
        ep = self.result.episodes
        out = []
        for p in self.by_series.get((level, s, metric), np.empty(0, dtype=np.int64)):
            aid = str(self.ref["alert_id"].iat[int(p)])
            row = self.row_of.get(aid)
            out.append({"alert_id": aid, "start": int(ep.start[p]), "end": int(ep.end[p]),
                        "raised": int(ep.raised[p]), "in_review": row is not None,
                        "verdict": "" if row is None else self.verdict[row]})
        return out

    def _series_incidents(self, level: str, s: int, keys: dict[str, str]) -> list[dict]:
        out = []
        inc = self.ses.incidents
        if inc is not None and len(inc):
            for j in np.flatnonzero((inc.level == level) & (inc.series == s)):
                out.append({"incident_id": str(inc.incident_id[j]),
                            "metric": str(inc.metric[j]), "start": int(inc.start[j]),
                            "end": int(inc.end[j]), "note": str(inc.note[j]), "added": False})
        if len(self.added):
            a = self.added
            sel = a["level"] == level
            for c, v in keys.items():
                sel &= a[c] == v
            for _, r in a[sel].iterrows():
                out.append({"incident_id": r["incident_id"], "metric": r["metric"],
                            "start": self._hour_index(r["start"]),
                            "end": self._hour_index(r["end"]), "note": r["note"],
                            "added": True})
        return out

    def _hour_index(self, text: str) -> int:
        ts = pd.Timestamp(text)
        ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
        return int((ts - self.hours[0]) // pd.Timedelta(hours=1))

    # ------------------------------------------------------------------ changes

    def set_verdict(self, alert_id: Any, verdict: Any, comment: Any = "") -> dict[str, Any]:
        """Record a verdict (blank clears it) and a comment, and save the verdicts file."""
        if not isinstance(alert_id, str) or alert_id not in self.row_of:
            raise ReviewError(404, f"unknown alert id '{alert_id}'")
        if not isinstance(verdict, str):
            raise ReviewError(400, "verdict must be text: one of "
                              f"{', '.join(VERDICTS)} (or blank to clear)")
        word = verdict.strip().lower()
        if word not in ("", *VERDICTS):
            raise ReviewError(400, f"'{verdict[:40]}' is not a verdict "
                              f"(use {', '.join(VERDICTS)} or blank to clear)")
        if comment is None:
            comment = ""
        if not isinstance(comment, str):
            raise ReviewError(400, "comment must be text")
        comment = " ".join(comment.split())  # one line in the CSV
        if len(comment) > MAX_COMMENT:
            raise ReviewError(400, f"comment longer than {MAX_COMMENT} characters")
        row = self.row_of[alert_id]
        with self.lock:
            self._unchanged(self.paths.verdicts, self.verdict_state, "verdicts")
            verdicts, comments = self.verdict.copy(), self.comment.copy()
            verdicts[row], comments[row] = word, comment
            out = self.frame.copy()
            out["verdict"], out["comment"] = verdicts, comments
            write_table(self.paths.verdicts, out, force=True)
            self.verdict, self.comment = verdicts, comments
            self.verdict_state = _file_state(self.paths.verdicts)
        return {"alert_id": alert_id, "verdict": word, "comment": comment,
                "progress": self.progress()}

    def _unchanged(self, path: Path | None, state: Any, what: str) -> None:
        if path is not None and _file_state(path) != state and path.exists():
            raise ReviewError(409, f"{path} changed on disk since the review read it; "
                              f"restart `calibrate review` to keep both (the {what} were "
                              "not saved)")

    def add_incident(self, body: Any) -> dict[str, Any]:
        """Validate one incident (level, keys, metric or blank, start, end, note) and
        append it to the --incidents-out file."""
        if self.paths.incidents_out is None:
            raise ReviewError(409, "no --incidents-out file: start `calibrate review` with "
                              "--incidents-out FILE to add incidents")
        if not isinstance(body, dict):
            raise ReviewError(400, "the incident must be a JSON object")
        hist = self.ses.history
        level = body.get("level")
        keys = body.get("keys")
        if not isinstance(level, str) or not isinstance(keys, dict):
            raise ReviewError(400, "give the incident's level (text) and keys (an object)")
        s = self.find_series(level, keys)
        metric = body.get("metric") or ""
        if not isinstance(metric, str) or (metric and metric not in self.ses.ws.metric_names):
            raise ReviewError(400, f"unknown metric '{metric}' (known: "
                              f"{', '.join(self.ses.ws.metric_names)}, or blank for any)")
        start = self._parse_hour(body.get("start"), "start", is_end=False)
        end = self._parse_hour(body.get("end"), "end", is_end=True)
        if end <= start:
            raise ReviewError(400, f"end {body.get('end')} must be after start "
                              f"{body.get('start')}")
        note = body.get("note") or ""
        if not isinstance(note, str) or len(note) > MAX_NOTE:
            raise ReviewError(400, f"note must be text of at most {MAX_NOTE} characters")
        self._no_overlap(level, s, metric, start, end)
        ls = hist.levels[level]
        with self.lock:
            self._unchanged(self.paths.incidents_out, self.added_state, "incidents")
            iid = self._free_id()
            row = {c: "" for c in self.incident_columns}
            row.update(incident_id=iid, level=level, metric=metric,
                       start=self.hour_text[start],
                       end=self.end_text if end == hist.n_hours else self.hour_text[end],
                       note=" ".join(note.split()))
            row.update({c: str(ls.keys[c].iloc[s]) for c in ls.key_columns})
            new = pd.concat([self.added, pd.DataFrame([row])], ignore_index=True)
            # the file must stay a valid incidents file
            incidents_from_frame(new, self.ses.ws, hist, str(self.paths.incidents_out))
            write_table(self.paths.incidents_out, new, force=True)
            self.added = new
            self.added_state = _file_state(self.paths.incidents_out)
        return {"incident": row, "added": self.added.to_dict(orient="records")}

    def delete_incident(self, incident_id: str) -> dict[str, Any]:
        """Remove an incident this review added (the workspace's own are never touched)."""
        if self.paths.incidents_out is None:
            raise ReviewError(409, "no --incidents-out file: nothing was added")
        with self.lock:
            hit = self.added["incident_id"] == incident_id
            if not hit.any():
                raise ReviewError(404, f"no added incident '{incident_id}' (only incidents "
                                  f"in {self.paths.incidents_out} can be removed here)")
            self._unchanged(self.paths.incidents_out, self.added_state, "incidents")
            new = self.added[~hit].reset_index(drop=True)
            write_table(self.paths.incidents_out, new, force=True)
            self.added = new
            self.added_state = _file_state(self.paths.incidents_out)
        return {"added": self.added.to_dict(orient="records")}

    def _parse_hour(self, text: Any, name: str, is_end: bool) -> int:
        if not isinstance(text, str) or not text.strip():
            raise ReviewError(400, f"{name}: an ISO-8601 UTC hour is required")
        try:
            ts = pd.Timestamp(text.strip())
        except ValueError:
            raise ReviewError(400, f"{name}: cannot read '{text[:40]}' as an ISO-8601 UTC "
                              "time") from None
        ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
        if ts != ts.floor("h"):
            raise ReviewError(400, f"{name}: '{text}' is not on the hour")
        idx = int((ts - self.hours[0]) // pd.Timedelta(hours=1))
        lo, hi = (1, len(self.hours)) if is_end else (0, len(self.hours) - 1)
        if not lo <= idx <= hi:
            raise ReviewError(400, f"{name}: '{text}' is outside the history "
                              f"({self.hour_text[0]} .. {self.end_text})")
        return idx

    def _no_overlap(self, level: str, s: int, metric: str, start: int, end: int) -> None:
        """The merged labels must stay valid: no overlap with an incident of the same
        series and metric, in the workspace's file or among the added ones."""
        hits = [i for i in self._series_incidents(level, s, self._keys(level, s))
                if i["metric"] == metric and i["start"] < end and start < i["end"]]
        if hits:
            h = hits[0]
            raise ReviewError(409, f"overlaps incident {h['incident_id']} "
                              f"({self.hour_text[h['start']]} .. of the same series and "
                              "metric)")

    def _keys(self, level: str, s: int) -> dict[str, str]:
        ls = self.ses.history.levels[level]
        return {c: str(ls.keys[c].iloc[s]) for c in ls.key_columns}

    def _free_id(self) -> str:
        taken = set(self.added["incident_id"])
        if self.ses.incidents is not None:
            taken |= set(self.ses.incidents.incident_id.tolist())
        n = len(self.added) + 1
        while f"N{n:03d}" in taken:
            n += 1
        return f"N{n:03d}"


def _plain(v: Any) -> Any:
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and not np.isfinite(v):
        return None
    return v


def open_review(
    workspace: str | Path,
    *,
    verdicts: str | Path,
    config: str | Path | None = None,
    alerts: str | Path | None = None,
    incidents_out: str | Path | None = None,
    executor: Any = None,
    engine: str = "local",
    workers: int | None = None,
    scheduler: str | None = None,
    progress: bool = True,
) -> ReviewData:
    """Load a workspace, replay `config` (default its `[detector]`) and read back the
    review's files.

    Parameters
    ----------
    workspace : path
    verdicts : path
        The verdicts file (read back when it exists, rewritten on every verdict).
    config : path, optional
        Tuned config to replay; the alerts under review are its alerts.
    alerts : path, optional
        Review only the alerts of this alerts file (from a replay of `config`: its ids,
        levels, keys, metrics and starts must match that replay).
    incidents_out : path, optional
        Where added incidents go (without it, adding incidents is off).
    """
    paths = Paths(Path(verdicts), None if incidents_out is None else Path(incidents_out),
                  None if alerts is None else Path(alerts),
                  None if config is None else Path(config))
    ses = api.open_session(workspace)
    check_paths(ses, paths)
    cfg = load_config(config) if config is not None else ses.ws.detector
    name = str(config) if config is not None else f"{ses.ws.file.name} [detector]"
    result = api.replay_session(ses, cfg, config_name=None if config is None else str(config),
                                executor=executor, engine=engine, workers=workers,
                                scheduler=scheduler, progress=progress)
    ref_ids = result.alerts_frame()["alert_id"]
    if paths.alerts is None:
        pos = np.arange(len(ref_ids))
    else:
        pos = _alerts_file_positions(paths.alerts, ses, result, name)
    data = ReviewData(ses, result, pos, paths, name)
    data.load_verdicts()
    data.load_added()
    return data


def _alerts_file_positions(path: Path, ses: api.Session, result: ReplayResult,
                           name: str) -> np.ndarray:
    """Positions in the replay's alerts of the alerts file's rows (checked to match)."""
    df = read_text_csv(path)
    df.columns = [str(c).strip() for c in df.columns]
    if "alert_id" not in df.columns:
        raise InputError(f"{path} row 1", "missing column 'alert_id' (an alerts file from "
                         "`calibrate replay` or `calibrate demo`)")
    ref = result.alerts_frame()
    pos_of = {a: i for i, a in enumerate(ref["alert_id"])}
    ids = df["alert_id"].str.strip().tolist()
    pos = np.array([pos_of.get(a, -1) for a in ids], dtype=np.int64)
    bad = np.flatnonzero(pos < 0)
    if len(bad):
        p = int(bad[0])
        raise InputError(f"{path} row {p + 2} column 'alert_id'",
                         f"unknown alert id '{ids[p]}': the replay of {name} raised "
                         f"{len(ref)} alerts; pass the config the file was made from with "
                         "--config")
    check_rows(df, ref.iloc[pos].reset_index(drop=True), ses.history.key_columns, str(path),
               name)
    return np.unique(pos)

