"""Shared fixtures: every test runs inside its own temporary folder."""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

BASE_SECTIONS: dict[str, str] = {
    "history": (
        'path = "history.csv"\ntime_column = "hour"\n'
        'key_columns = ["market", "advertiser", "campaign"]'
    ),
    "measures": 'impressions = "zero"\nclicks = "interpolate"',
    "metrics": 'ctr = "clicks / impressions"',
    "levels": (
        'market = ["market"]\nadvertiser = ["market", "advertiser"]\n'
        'campaign = ["market", "advertiser", "campaign"]'
    ),
}


@pytest.fixture(autouse=True)
def _inside_tmp_path(tmp_path: Path) -> Iterator[None]:
    """Run each test with tmp_path as working folder, so nothing lands elsewhere."""
    old = Path.cwd()
    os.chdir(tmp_path)
    try:
        yield
    finally:
        os.chdir(old)


WriteWorkspace = Callable[..., Path]


@pytest.fixture
def write_workspace(tmp_path: Path) -> WriteWorkspace:
    """Write ``workspace.toml`` (BASE_SECTIONS with overrides) and optional files.

    Call as ``write_workspace(sections={"teams": "...", "metrics": None}, files={...})``;
    a section set to None is left out. Returns the workspace file.
    """

    def write(
        sections: dict[str, str | None] | None = None,
        files: dict[str, str] | None = None,
        extra: str = "",
    ) -> Path:
        merged: dict[str, str | None] = {**BASE_SECTIONS, **(sections or {})}
        text = "".join(f"[{k}]\n{v}\n\n" for k, v in merged.items() if v is not None) + extra
        ws = tmp_path / "workspace.toml"
        ws.write_text(text, encoding="utf-8")
        for name, content in (files or {}).items():
            p = tmp_path / name
            p.parent.mkdir(parents=True, exist_ok=True)
            p.write_text(content, encoding="utf-8")
        return ws

    return write
