"""Study storage for `tune` and `report --study`: open it, keep it whole, say what is wrong.

- A journal file (the default, ``.calibrate/study.journal`` in the workspace) is
  checked before use: a last line torn by an interrupted write (a full disk) is
  cut off, and a record glued to such a torn line by a later append is freed from
  it, each said in one line; any other damaged line stops the run with one line
  saying what to do.
- An RDB URL (``sqlite:///...``, ``postgresql://...``) is opened once per process,
  under a lock beside a SQLite file (two tunes starting together on a new file
  would race to create its tables) and retried once elsewhere; a missing driver, a
  bad URL or an unreachable database is one line.
- Every storage failure while a study runs (a full disk, a read-only folder, a
  lost connection) is raised as `StorageError`: one line, no traceback.
- `recover` marks trials left RUNNING by a process that is gone as FAILED and
  queues today's settings again when their only trial was cut off, so the best
  trial is never worse than today's settings.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import socket
import sys
import time
import weakref
from collections.abc import Iterator, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import optuna
import psutil
from optuna.storages.journal import JournalFileBackend, JournalFileSymlinkLock
from optuna.trial import TrialState

from calibrate.errors import CalibrationError
from calibrate.outputs import os_error

try:  # POSIX; elsewhere SQLite tables are created with a retry only
    import fcntl
except ImportError:  # pragma: no cover
    fcntl = None  # type: ignore[assignment]

OWNER = "calibrate:owner"
# a RUNNING trial without an owner (tagged within milliseconds of its start) older
# than this was left by a process that died before tagging it, or by an older version
UNTAGGED_STALE_SECONDS = 300.0
RECORD_START = b'{"op_code":'
LOCK_SUFFIX = ".calibrate-lock"
# a bare postgresql:// URL uses psycopg 3 (SQLAlchemy 2.0 would pick psycopg2), the
# driver of the `postgres` extra
DEFAULT_DRIVERS = {"postgresql": "postgresql+psycopg"}
DRIVER_HINTS = {
    "postgresql+psycopg": "pip install 'calibrate[postgres]'",
    "mysql": "pip install a MySQL driver such as PyMySQL (mysql+pymysql://...)",
}
# the file each storage is locked by while trials are recovered (none: no lock)
_LOCKS: weakref.WeakKeyDictionary[Any, Path] = weakref.WeakKeyDictionary()


class StorageError(CalibrationError):
    """The study storage cannot be opened, read or written (one line, exit 1)."""


def note(line: str) -> None:
    print(f"note: {line}", file=sys.stderr)


# --------------------------------------------------------------------------- open


def open_storage(default_path: Path, storage: str | None) -> tuple[Any, str]:
    """Optuna storage object and how to name it (URL without password, or journal path).

    Parameters
    ----------
    default_path : Path
        The journal file used when `storage` is None.
    storage : str, optional
        An RDB URL (contains ``://``) or a journal file path.
    """
    if storage and "://" in storage:
        return _open_rdb(storage)
    path = Path(storage).expanduser() if storage else default_path
    path = path.resolve()
    hint = "" if storage else "; or give --storage with a journal file on a writable disk"
    if path.is_dir():
        raise StorageError(f"{path}: is a folder; give --storage a journal file path")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        repair_journal(path)
        backend = CheckedJournalBackend(str(path))
    except OSError as exc:
        raise _journal_error(path, exc, hint) from None
    store = optuna.storages.JournalStorage(backend)
    _LOCKS[store] = path.with_name(path.name + LOCK_SUFFIX)
    return store, str(path)


def _journal_error(path: Path, exc: OSError, hint: str = "") -> StorageError:
    msg = str(os_error(path, exc, "cannot write the study journal"))
    if exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
        msg += hint
    return StorageError(msg)


class CheckedJournalBackend(JournalFileBackend):
    """A journal file whose read and write failures are one-line `StorageError`s."""

    def read_logs(self, log_number_from: int) -> Iterator[dict[str, Any]]:
        try:
            yield from super().read_logs(log_number_from)
        except OSError as exc:
            raise os_error(self._file_path, exc, "cannot read the study journal") from None
        except ValueError as exc:  # a damaged line (JSONDecodeError is a ValueError)
            raise StorageError(
                f"{self._file_path}: the study journal is damaged ({exc}); run the command "
                "again to repair it, or move the file aside to start the study afresh"
            ) from None

    def append_logs(self, logs: list[dict[str, Any]]) -> None:
        try:
            super().append_logs(logs)
        except OSError as exc:
            raise _journal_error(Path(self._file_path), exc) from None


def repair_journal(path: Path) -> list[str]:
    """Repair the damage an interrupted write leaves in a journal file; returns notes.

    A last line without its newline (a torn write) is cut off; a line that is a torn
    write followed by a whole record (appended after the tear) keeps the record. Any
    other line that is not a record raises `StorageError`. Runs under the journal's
    own lock, so no append is under way.
    """
    if not path.is_file() or path.stat().st_size == 0:
        return []
    data = path.read_bytes()
    fixes, bad = _scan(data)
    if bad is not None:
        raise StorageError(
            f"{path}: line {bad} is not a study record (the file is damaged); move it aside "
            "to start the study afresh, or give another --storage")
    if not fixes:
        return []
    lock = JournalFileSymlinkLock(str(path))
    try:
        lock.acquire()
    except OSError:  # a read-only folder: read as it is (a torn end is ignored on read)
        return []
    try:
        data = path.read_bytes()
        fixes, bad = _scan(data)
        if bad is not None or not fixes:
            return []
        lines = data.split(b"\n")
        notes = []
        for i, kind in fixes:
            if kind == "no-newline":
                lines.append(b"")
                notes.append(f"{path}: its last record lacked the newline an interrupted "
                             "write did not add; added it")
            elif kind == "torn-end":
                notes.append(f"{path}: cut off a torn last line ({len(lines[i])} bytes) left "
                             "by an interrupted write; the study continues from the record "
                             "before it")
                lines[i] = b""
            else:
                start = lines[i].rindex(RECORD_START)
                notes.append(f"{path}: line {i + 1} began with {start} bytes of a torn write; "
                             "removed them and kept the record after them")
                lines[i] = lines[i][start:]
        fixed = b"\n".join(lines)
        if fixes == [(len(lines) - 1, "torn-end")]:
            with open(path, "r+b") as fh:  # only the tail changes: cut it in place
                fh.truncate(len(fixed))
                fh.flush()
                os.fsync(fh.fileno())
        else:
            tmp = path.with_name(f".{path.name}.{os.getpid()}.repair")
            tmp.write_bytes(fixed)
            os.chmod(tmp, path.stat().st_mode & 0o7777)
            with open(tmp, "rb") as fh:
                os.fsync(fh.fileno())
            os.replace(tmp, path)
    finally:
        lock.release()
    for line in notes:
        note(line)
    return notes


def _scan(data: bytes) -> tuple[list[tuple[int, str]], int | None]:
    """Fixable lines (index, "torn-end" or "glued") and the first unfixable line number."""
    lines = data.split(b"\n")
    fixes: list[tuple[int, str]] = []
    for i, line in enumerate(lines):
        last = i == len(lines) - 1
        if last and not line:
            break
        if _is_record(line):
            if last:  # a whole record cut just before its newline: keep it
                fixes.append((i, "no-newline"))
            continue
        if last:
            fixes.append((i, "torn-end"))
            continue
        start = line.rfind(RECORD_START)
        if start > 0 and _is_record(line[start:]):
            fixes.append((i, "glued"))
            continue
        return fixes, i + 1
    return fixes, None


def _is_record(line: bytes) -> bool:
    try:
        return isinstance(json.loads(line), dict)
    except ValueError:
        return False


# --------------------------------------------------------------------------- RDB


def shown_url(url: str) -> str:
    """`url` without its password (for messages, the report and the tuned config)."""
    try:
        from sqlalchemy.engine import make_url

        return make_url(url).render_as_string(hide_password=True)
    except Exception:
        return url.split("@")[-1] if "@" in url else url


def _open_rdb(url: str) -> tuple[Any, str]:
    import sqlalchemy.exc as sa_exc
    from sqlalchemy.engine import make_url

    shown = shown_url(url)
    try:
        parsed = make_url(url)
    except sa_exc.ArgumentError:
        raise StorageError(f"{shown}: not a storage URL; give a journal file path or a URL "
                           "such as sqlite:///study.db or postgresql://user@host/db") from None
    backend = parsed.get_backend_name()
    if parsed.drivername in DEFAULT_DRIVERS:
        parsed = parsed.set(drivername=DEFAULT_DRIVERS[parsed.drivername])
        url = parsed.render_as_string(hide_password=False)
    lock = None
    if backend == "sqlite" and parsed.database not in (None, "", ":memory:"):
        db = Path(parsed.database).expanduser().resolve()
        lock = db.with_name(db.name + LOCK_SUFFIX)
    for attempt in range(3):
        try:
            with _file_lock(lock):
                store = optuna.storages.RDBStorage(url)
            break
        except ImportError:
            hint = DRIVER_HINTS.get(parsed.drivername) or DRIVER_HINTS.get(
                backend, f"install the driver of '{parsed.drivername}'")
            raise StorageError(f"{shown}: the database driver for {backend} is not "
                               f"installed: {hint}") from None
        except sa_exc.NoSuchModuleError:
            raise StorageError(f"{shown}: unknown database kind '{parsed.drivername}'; give a "
                               "journal file path or a URL such as sqlite:///study.db or "
                               "postgresql://user@host/db") from None
        except sa_exc.OperationalError as exc:
            # another process creating the same tables ("already exists"): try again
            if attempt < 2 and "already exists" in str(exc.orig):
                time.sleep(0.2 * (attempt + 1))
                continue
            raise StorageError(f"{shown}: cannot open the study database: "
                               f"{_first_line(exc.orig)}") from None
        except (sa_exc.SQLAlchemyError, ValueError, RuntimeError) as exc:
            raise StorageError(f"{shown}: cannot open the study database: "
                               f"{_first_line(exc)}") from None
    if lock is not None:
        _LOCKS[store] = lock
    return store, shown


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


@contextlib.contextmanager
def _file_lock(path: Path | None) -> Iterator[None]:
    """An exclusive `flock` on `path` (created if missing); no lock when that fails."""
    if path is None or fcntl is None:
        yield
        return
    try:
        fh = open(path, "a+b")
    except OSError:
        yield
        return
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        yield
    finally:
        fh.close()  # releases the lock


@contextlib.contextmanager
def storage_errors(name: str) -> Iterator[None]:
    """Raise storage failures of the block as one-line `StorageError`s.

    Optuna may raise another error while handling a failed storage write (an
    assertion about the trial's state); the `StorageError` behind it is raised.
    """
    try:
        yield
    except CalibrationError:
        raise
    except Exception as exc:
        cause = _storage_cause(exc)
        if cause is not None:
            raise cause from None
        import sqlalchemy.exc as sa_exc

        if isinstance(exc, sa_exc.SQLAlchemyError):
            orig = getattr(exc, "orig", None) or exc
            raise StorageError(f"{name}: the study database failed: {_first_line(orig)}; "
                               "run again to continue the study") from None
        raise


def _storage_cause(exc: BaseException) -> StorageError | None:
    seen = set()
    e: BaseException | None = exc
    while e is not None and id(e) not in seen:
        if isinstance(e, StorageError):
            return e
        seen.add(id(e))
        e = e.__cause__ or e.__context__
    return None


# --------------------------------------------------------------------------- trials


def _lock_of(storage: Any) -> Path | None:
    for s in (storage, getattr(storage, "_backend", None)):  # RDB storages come wrapped
        if s is not None and s in _LOCKS:
            return _LOCKS[s]
    return None


def _me() -> dict[str, Any]:
    return {"host": socket.gethostname(), "pid": os.getpid(),
            "started": round(psutil.Process().create_time(), 2)}


def claim(trial: optuna.Trial) -> None:
    """Record which process runs `trial` (so a later run can tell it was cut off)."""
    trial.storage.set_trial_system_attr(trial._trial_id, OWNER, _me())


def is_orphan(t: optuna.trial.FrozenTrial, now: datetime | None = None) -> bool:
    """True for a RUNNING trial whose process is gone (on this machine), or one never
    tagged with its process and older than `UNTAGGED_STALE_SECONDS`."""
    if t.state != TrialState.RUNNING:
        return False
    owner = t.system_attrs.get(OWNER)
    if not isinstance(owner, Mapping):
        start = t.datetime_start
        if start is None:
            return False
        now = now or datetime.now(UTC if start.tzinfo else None)
        return (now - start).total_seconds() > UNTAGGED_STALE_SECONDS
    if owner.get("host") != socket.gethostname():
        return False  # another machine's process: alive for all we can tell
    try:
        return round(psutil.Process(int(owner["pid"])).create_time(), 2) != owner.get("started")
    except (psutil.NoSuchProcess, psutil.ZombieProcess):
        return True
    except (psutil.Error, KeyError, TypeError, ValueError):
        return False


def recover(study: optuna.Study, starts: Sequence[Mapping[str, Any]]) -> list[str]:
    """Fail trials cut off by a process that is gone; queue cut-off starting settings.

    Parameters
    ----------
    study : optuna.Study
    starts : sequence of dict
        Parameters of the settings queued first (today's settings first). One whose
        every trial FAILED (cut off: a killed process, Ctrl-C) is queued again.

    Returns
    -------
    list of str
        One note per change, also printed on stderr.
    """
    notes = []
    with _file_lock(_lock_of(study._storage)):
        now_trials = study.get_trials(deepcopy=False)
        for t in now_trials:
            if is_orphan(t):
                try:
                    study._storage.set_trial_state_values(t._trial_id, TrialState.FAIL)
                except optuna.exceptions.UpdateFinishedTrialError:
                    continue  # another process did it
                notes.append(f"trial {t.number} was cut off (its process is gone): "
                             "marked as failed")
        trials = study.get_trials(deepcopy=False)
        for i, params in enumerate(starts):
            same = [t for t in trials if t.system_attrs.get("fixed_params") == dict(params)]
            if same and all(t.state == TrialState.FAIL for t in same):
                study.enqueue_trial(dict(params), skip_if_exists=False)
                what = "today's settings" if i == 0 else f"starting setting {i}"
                notes.append(f"{what} never finished a trial (trial {same[-1].number} was cut "
                             "off): queued again")
    for line in notes:
        note(line)
    return notes
