"""Writing results: atomic files, tuned configs (TOML), alert and score exports.

Stage 8's I/O edge. Nothing here overwrites a file the user did not ask to
replace: `write_atomic` writes to a temporary file beside the target and renames
it into place, so an interrupted run never leaves a half-written file.
"""

from __future__ import annotations

import os
import tempfile
import tomllib
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd
import tomli_w

from calibrate.errors import CalibrationError, InputError
from calibrate.settings import DetectorConfig


def write_atomic(path: Path, write: Callable[[Path], None], force: bool = True) -> Path:
    """Call `write(tmp)` and move the temporary file onto `path`.

    Parameters
    ----------
    force : bool
        When False, refuse to replace an existing file.
    """
    path = Path(path)
    if path.exists() and not force:
        raise CalibrationError(f"{path}: already exists; pass --force to replace it")
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        write(Path(tmp))
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def write_text(path: Path, text: str, force: bool = True) -> Path:
    return write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"), force)


def write_table(path: Path, frame: pd.DataFrame, force: bool = True) -> Path:
    """CSV (optionally .gz) or Parquet by the file's suffix."""
    path = Path(path)
    name = path.name.lower()
    if name.endswith(".parquet"):
        return write_atomic(path, lambda p: frame.to_parquet(p, index=False), force)
    if name.endswith(".csv") or name.endswith(".csv.gz"):
        comp = "gzip" if name.endswith(".gz") else None
        return write_atomic(path, lambda p: frame.to_csv(p, index=False, compression=comp), force)
    raise CalibrationError(f"{path}: unknown output format (use .csv, .csv.gz or .parquet)")


def write_config(
    path: Path, config: DetectorConfig, provenance: dict[str, Any], force: bool = False
) -> Path:
    """Write a tuned config: `[detector]` (with group tables) and `[provenance]`."""
    doc = {"detector": config.to_table(), "provenance": _toml_safe(provenance)}
    header = (
        "# Tuned detector settings written by `calibrate tune`.\n"
        "# A tuned config is only as good as the incident labels it was tuned on:\n"
        "# check it on held-out weeks before rollout.\n"
    )
    return write_text(path, header + tomli_w.dumps(doc), force=force)


def load_config(path: str | Path) -> DetectorConfig:
    """Read the `[detector]` table of a tuned config or of a workspace file."""
    path = Path(path)
    if not path.is_file():
        raise InputError(str(path), "no such config file")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise InputError(str(path), f"is not valid TOML: {exc}") from None
    if "detector" not in data:
        raise InputError(str(path), "has no [detector] table")
    return DetectorConfig.from_table(data["detector"], f"{path} [detector]")


def load_provenance(path: str | Path) -> dict[str, Any]:
    data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    return data.get("provenance", {})


def _toml_safe(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _toml_safe(v) for k, v in value.items() if v is not None}
    if isinstance(value, list | tuple):
        return [_toml_safe(v) for v in value if v is not None]
    if isinstance(value, float) and value != value:
        return "nan"
    if hasattr(value, "item"):
        return value.item()
    return value
