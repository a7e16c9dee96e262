"""The sample workspace for the search benchmarks, copied to a temporary folder (so a
benchmark's studies and edited settings never touch `sample_data/`)."""

from __future__ import annotations

import shutil
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_data" / "workspace.toml"


def sample_copy(folder: Path, text: str | None = None) -> Path:
    """Copy the sample workspace into `folder`/ws, with `text` as its workspace.toml
    (default the sample's own); returns the workspace file."""
    ws = folder / "ws"
    shutil.copytree(SAMPLE.parent, ws)
    if text is not None:
        (ws / "workspace.toml").write_text(text, encoding="utf-8")
    return ws / "workspace.toml"
