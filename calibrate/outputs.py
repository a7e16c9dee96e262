"""Writing results: atomic files and folders, tuned configs (TOML), alert and score exports.

Stage 8's I/O edge. Nothing here overwrites a file the user did not ask to
replace: `write_atomic` writes a temporary file beside the target, syncs it to
disk and then links it into place (exclusive: an existing file is never
replaced without `force`) or renames it over the old one (with `force`), so an
interrupted run never leaves a half-written file. New files get the usual mode
(``0666`` less the umask), a replaced file keeps its mode.
"""

from __future__ import annotations

import errno
import glob
import gzip
import hashlib
import json
import os
import re
import secrets
import shutil
import socket
import stat
import tomllib
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

import pandas as pd
import psutil
import tomli_w

from calibrate.errors import CalibrationError, InputError
from calibrate.settings import DetectorConfig

TMP_SUFFIX = ".calibrate-tmp"
# the files a report folder holds that this tool wrote, with their sha256: `--force`
# replaces or removes those (when unchanged) and leaves every other file alone
MANIFEST = ".calibrate-files.json"
_HOST = re.sub(r"[^A-Za-z0-9-]", "-", socket.gethostname())[:40]
_TMP_RE = re.compile(r"^\.(?P<target>.+)\.(?P<host>[A-Za-z0-9-]*)_(?P<pid>\d+)_[0-9a-f]+"
                     + re.escape(TMP_SUFFIX) + "$")
_LINKLESS = {errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV, errno.EMLINK,
             errno.ENOSYS}

_ADVICE = {
    errno.ENOSPC: "the disk is full: free some space and run again",
    errno.EDQUOT: "the disk quota is used up: free some space and run again",
    errno.EROFS: "the file system is read-only: choose a folder on a writable disk",
    errno.EACCES: "permission denied: choose a folder you can write to",
    errno.EPERM: "permission denied: choose a folder you can write to",
}


def os_error(where: str | Path, exc: OSError, doing: str = "cannot write") -> CalibrationError:
    """One-line error for a failed file operation, saying what to do about it."""
    advice = _ADVICE.get(exc.errno or 0, exc.strerror or str(exc))
    return CalibrationError(f"{where}: {doing}: {advice}")


def exists_error(path: str | Path) -> CalibrationError:
    return CalibrationError(f"{path}: already exists; pass --force to replace it")


def check_outputs(paths: Iterable[str | Path | None], force: bool,
                  folders: Iterable[str | Path | None] = ()) -> None:
    """Refuse, before any work starts, outputs that exist (without `force`) or that
    are of the wrong kind: a folder where a file goes, or a file where a folder goes."""
    for p in paths:
        if p is None:
            continue
        if Path(p).is_dir():
            raise CalibrationError(f"{p}: is a folder; give a file name")
        if os.path.lexists(p) and not force:
            raise exists_error(p)
    for p in folders:
        if p is None:
            continue
        if os.path.lexists(p) and not Path(p).is_dir():
            raise CalibrationError(f"{p}: exists and is not a folder")
        if os.path.lexists(p) and not force:
            raise exists_error(p)


def _temp_path(path: Path) -> Path:
    return path.with_name(f".{path.name}.{_HOST}_{os.getpid()}_{secrets.token_hex(4)}{TMP_SUFFIX}")


def clean_stale_temps(path: Path) -> list[Path]:
    """Remove temporary files or folders of ours for `path` left by a process of this
    machine that is gone (killed mid-write); returns what was removed."""
    removed = []
    for name in glob.glob(glob.escape(f"{path.parent}/.{path.name}.") + f"*{TMP_SUFFIX}"):
        m = _TMP_RE.match(os.path.basename(name))
        if not (m and m["target"] == path.name and m["host"] == _HOST):
            continue
        if psutil.pid_exists(int(m["pid"])):
            continue
        try:
            if os.path.isdir(name) and not os.path.islink(name):
                shutil.rmtree(name)
            else:
                os.unlink(name)
            removed.append(Path(name))
        except OSError:
            pass
    return removed


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _new_file(path: Path) -> int:
    """Create `path` exclusively with mode 0666 less the umask; returns that mode."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        return stat.S_IMODE(os.fstat(fd).st_mode)
    finally:
        os.close(fd)


def _link_new(tmp: Path, path: Path) -> None:
    """Give the finished `tmp` the name `path`, failing if that name exists."""
    try:
        os.link(tmp, path)
    except FileExistsError:
        raise exists_error(path) from None
    except OSError as exc:
        if exc.errno not in _LINKLESS:
            raise
        # a file system without hard links: claim the name exclusively, then rename
        try:
            os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
        except FileExistsError:
            raise exists_error(path) from None
        os.replace(tmp, path)


def write_atomic(path: Path, write: Callable[[Path], None], force: bool = True) -> Path:
    """Call `write(tmp)` and move the finished temporary file onto `path`.

    Parameters
    ----------
    force : bool
        When False, refuse to replace an existing file (checked by the exclusive
        link that puts the new file in place, so a file created meanwhile is kept).
    """
    path = Path(path)
    if not force and os.path.lexists(path):
        raise exists_error(path)
    if path.is_dir():
        raise CalibrationError(f"{path}: is a folder; give a file name")
    tmp = _temp_path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        clean_stale_temps(path)
        mode = _new_file(tmp)
    except OSError as exc:
        raise os_error(path, exc) from None
    try:
        write(tmp)
        if force and path.is_file():
            mode = stat.S_IMODE(path.stat().st_mode)
        os.chmod(tmp, mode)
        _fsync(tmp)
        if force:
            os.replace(tmp, path)
        else:
            _link_new(tmp, path)
        _fsync(path.parent)
    except OSError as exc:
        raise os_error(path, exc) from None
    finally:
        tmp.unlink(missing_ok=True)
    return path


def write_folder(files: Mapping[str, bytes], out_dir: str | Path, force: bool = False) -> Path:
    """Write `files` (flat names) as the folder `out_dir`.

    A new folder is built complete beside `out_dir` and renamed into place. With
    `force` an existing folder is updated file by file from a complete new set:
    each file of the set replaces the one of that name (keeping its mode), files
    this tool wrote there before and that nobody changed since are removed when the
    new set lacks them, and every other file is left alone. The old folder is never
    moved aside or deleted.
    """
    out = Path(out_dir)
    check_outputs((), force, folders=[out])
    tmp = _temp_path(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        clean_stale_temps(out)
        os.mkdir(tmp, 0o777)
    except OSError as exc:
        raise os_error(out, exc) from None
    digests = {name: hashlib.sha256(content).hexdigest() for name, content in files.items()}
    try:
        for name, content in files.items():
            if os.sep in name or name in ("", ".", "..", MANIFEST):
                raise ValueError(f"not a flat file name: {name!r}")
            _new_file(tmp / name)
            (tmp / name).write_bytes(content)
            _fsync(tmp / name)
        if out.is_dir():
            _update_folder(tmp, out, digests)
        else:
            (tmp / MANIFEST).write_text(json.dumps(digests, indent=1), encoding="utf-8")
            _fsync(tmp / MANIFEST)
            _fsync(tmp)
            try:
                os.mkdir(out)  # exclusive: a folder made meanwhile is not taken over
            except FileExistsError:
                raise exists_error(out) from None
            try:
                os.rename(tmp, out)
            except OSError as exc:
                _rmdir_quietly(out)
                if exc.errno in (errno.ENOTEMPTY, errno.EEXIST):
                    raise exists_error(out) from None
                raise
            _fsync(out.parent)
    except OSError as exc:
        raise os_error(out, exc) from None
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return out


def _rmdir_quietly(path: Path) -> None:
    try:
        os.rmdir(path)  # only when still empty
    except OSError:
        pass


def _update_folder(tmp: Path, out: Path, digests: dict[str, str]) -> None:
    """Move the complete new set in `tmp` into the existing folder `out` (see write_folder)."""
    try:
        before = json.loads((out / MANIFEST).read_text(encoding="utf-8"))
        before = before if isinstance(before, dict) else {}
    except (OSError, ValueError):
        before = {}
    for name in digests:
        if (out / name).is_dir():
            raise CalibrationError(f"{out / name}: is a folder; move it away to write the report")
    for name in digests:
        target = out / name
        if target.is_file():
            os.chmod(tmp / name, stat.S_IMODE(target.stat().st_mode))
        os.replace(tmp / name, target)
    _fsync(out)
    for name, digest in before.items():
        old = out / str(name)
        if (name not in digests and os.sep not in str(name) and old.is_file()
                and not old.is_symlink()
                and hashlib.sha256(old.read_bytes()).hexdigest() == digest):
            old.unlink()
    write_text(out / MANIFEST, json.dumps(digests, indent=1), force=True)


def write_text(path: Path, text: str, force: bool = True) -> Path:
    return write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"), force)


def table_format(path: str | Path) -> str:
    """``"parquet"``, ``"csv"`` or ``"csv.gz"`` by the file's suffix (check it before
    any work starts); anything else is refused in one line."""
    name = Path(path).name.lower()
    for fmt in ("parquet", "csv.gz", "csv"):
        if name.endswith("." + fmt):
            return fmt
    raise CalibrationError(f"{path}: unknown output format (use .csv, .csv.gz or .parquet)")


def write_table(path: Path, frame: pd.DataFrame, force: bool = True) -> Path:
    """CSV (optionally .gz) or Parquet by the file's suffix."""
    path = Path(path)
    if table_format(path) == "parquet":
        return write_atomic(path, lambda p: frame.to_parquet(p, index=False), force)
    comp = "gzip" if table_format(path) == "csv.gz" else None
    return write_atomic(path, lambda p: frame.to_csv(p, index=False, compression=comp), force)


def write_table_blocks(path: Path, blocks: Iterable[pd.DataFrame], force: bool = True) -> Path:
    """`write_table` for a table given as frames with the same columns, written one
    at a time (one Parquet row group each, or appended CSV rows), so only one block
    is ever in memory. Atomic like every output: a temporary file linked into place."""
    path = Path(path)
    fmt = table_format(path)

    def write(tmp: Path) -> None:
        it = iter(blocks)
        first = next(it, None)
        while first is not None and first.empty:  # empty blocks carry no types
            following = next(it, None)
            if following is None:
                break
            first = following
        if first is None:
            first = pd.DataFrame()
        if fmt == "parquet":
            _parquet_blocks(tmp, first, it)
            return
        opener = gzip.open if fmt == "csv.gz" else open
        with opener(tmp, "wt", encoding="utf-8", newline="") as fh:
            first.to_csv(fh, index=False)
            for block in it:
                block.to_csv(fh, index=False, header=False)

    return write_atomic(path, write, force)


def _parquet_blocks(tmp: Path, first: pd.DataFrame, rest: Iterable[pd.DataFrame]) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    if first.empty:  # nothing to stream: the whole (empty) frame as write_table writes it
        first.to_parquet(tmp, index=False)
        return
    table = pa.Table.from_pandas(first, preserve_index=False)
    with pq.ParquetWriter(tmp, table.schema) as writer:
        writer.write_table(table)
        for block in rest:
            if len(block):
                writer.write_table(pa.Table.from_pandas(block, schema=table.schema,
                                                        preserve_index=False))


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
