"""The sample workspace for the search benchmarks, copied to a temporary folder.

The copy drops a `[search] min_impact = { low, high }` range shared by several metrics,
which `search.impact_ranges` refuses (one range mixes the metrics' units), so each
metric's minimum impact is solved from 0 to its typical hourly level, the default
the README's "How tuning works" describes. The scripts print when they did that.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_data" / "workspace.toml"
_told: list[bool] = []  # the note is printed once per process
_SHARED_RANGE = re.compile(r"^min_impact\s*=\s*\{[^}\n]*\}[ \t]*\n", re.MULTILINE)


def without_shared_impact_range(text: str) -> tuple[str, bool]:
    """`text` without a `min_impact = { ... }` range in its `[search]` table (and whether
    one was removed); other tables are left alone."""
    start = re.search(r"^\[search\]\s*$", text, re.MULTILINE)
    if start is None:
        return text, False
    end = re.search(r"^\[", text[start.end():], re.MULTILINE)
    stop = start.end() + (end.start() if end else len(text) - start.end())
    body, n = _SHARED_RANGE.subn("", text[start.end():stop])
    return text[:start.end()] + body + text[stop:], bool(n)


def sample_copy(folder: Path, text: str | None = None) -> Path:
    """Copy the sample workspace into `folder`/ws (with `text` as its workspace.toml,
    default the sample's own), minus a shared minimum-impact range; returns the
    workspace file."""
    ws = folder / "ws"
    shutil.copytree(SAMPLE.parent, ws)
    fixed, removed = without_shared_impact_range(
        text if text is not None else SAMPLE.read_text(encoding="utf-8"))
    if removed and not _told:
        _told.append(True)
        print("note: dropped the sample's shared [search] min_impact range (one range for "
              "several metrics is refused); each metric is solved from 0 to its typical level")
    (ws / "workspace.toml").write_text(fixed, encoding="utf-8")
    return ws / "workspace.toml"
