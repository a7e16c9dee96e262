"""Data-source seam for hourly history rows: CSV, Parquet and SQL readers.

A `HistoryReader` yields the rows of a `HistorySource` as pandas chunks holding only
the requested columns, in file order, and reports a digest of what it read. Pick one
with `reader_for(source)`; add a new kind by subclassing `HistoryReader` and
extending `reader_for`.
"""

from __future__ import annotations

import abc
import csv
import gzip
import hashlib
import io
import re
from collections.abc import Iterator, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from calibrate.errors import InputError
from calibrate.inputs.workspace import HistorySource

_HASH_BLOCK = 1 << 20
_SCAN_BLOCK = 1 << 22
_MAX_LINE = 1 << 24  # a "row" longer than 16 MB is not a row of hourly figures


class HistoryReader(abc.ABC):
    """The data-source seam: read the rows of one history source in chunks
    (`CsvReader`, `ParquetReader`, `SqlReader`; `reader_for` picks one).

    Attributes
    ----------
    name : str
        How error messages refer to the source (a file path, or the query).
    first_row : int
        Number of the first data row in messages (CSV: 2, the header being row 1).
    """

    name: str = "history"
    first_row: int = 1

    def __init__(self, source: HistorySource):
        self.source = source

    @abc.abstractmethod
    def read(self, source: HistorySource, columns: Sequence[str]) -> Iterator[pd.DataFrame]:
        """Yield consecutive chunks holding exactly `columns` (in that order).

        Raises `InputError` when the source is missing, unreadable, empty or lacks a column.
        """

    @abc.abstractmethod
    def digest(self) -> str:
        """SHA-256 (hex) of what `read` read; valid once `read` is exhausted."""

    def missing(self, present: Sequence[str], columns: Sequence[str]) -> None:
        """Raise for the first of `columns` not in `present`.

        The columns found are listed only when the source looks like a table of the
        expected kind (at least two columns, one of them expected): a path pointing
        at some other file must not have its first line echoed.
        """
        for c in columns:
            if c not in present:
                if len(present) > 1 and any(x in present for x in columns):
                    found = f"found: {', '.join(map(str, present))}"
                else:
                    found = f"none of {', '.join(columns)} is there; is this the history?"
                raise InputError(f"{self.name} column '{c}'", f"column is missing ({found})")


class _FileReader(HistoryReader):
    def __init__(self, source: HistorySource, name: str | None = None):
        super().__init__(source)
        assert source.path is not None
        self.path = Path(source.path)
        self.name = name or str(self.path)

    def check_file(self) -> None:
        if not self.path.is_file():
            raise InputError(self.name, "file not found")
        if self.path.stat().st_size == 0:
            raise InputError(self.name, "file is empty")

    def digest(self) -> str:
        h = hashlib.sha256()
        with self.path.open("rb") as f:
            while block := f.read(_HASH_BLOCK):
                h.update(block)
        return h.hexdigest()


class CsvReader(_FileReader):
    """Comma-separated text (``.csv`` or gzip-compressed ``.csv.gz``); keys and hours as text."""

    first_row = 2

    def read(self, source: HistorySource, columns: Sequence[str]) -> Iterator[pd.DataFrame]:
        self.check_file()
        text_cols = set(source.key_columns) | {source.time_column}
        try:
            header = pd.read_csv(self.path, nrows=0)
        except pd.errors.EmptyDataError:
            raise InputError(self.name, "file is empty") from None
        except (pd.errors.ParserError, UnicodeDecodeError, OSError, EOFError) as exc:
            raise InputError(self.name, f"cannot read as CSV: {_first_line(exc)}") from None
        present = [str(c) for c in header.columns]
        self.missing(present, columns)
        self.check_rows(len(present))
        try:
            chunks = pd.read_csv(
                self.path,
                usecols=list(columns),
                dtype={c: str for c in columns if c in text_cols},
                keep_default_na=False,
                na_values=[""],
                skip_blank_lines=False,  # keeps row numbers equal to the file's lines
                chunksize=source.chunk_rows,
            )
            n = 0
            for chunk in chunks:
                n += len(chunk)
                yield chunk[list(columns)]
        except (pd.errors.ParserError, UnicodeDecodeError, OSError, EOFError) as exc:
            raise InputError(self.name, f"cannot read as CSV: {_first_line(exc)}") from None
        if n == 0:
            raise InputError(self.name, "file has a header but no data rows")

    def check_rows(self, n_fields: int) -> None:
        """Raise for the first row whose field count differs from the header's, or that
        holds a NUL byte (pandas would pad a short row with blanks, drop the extra
        fields of a long one and keep a NUL in a key: each a phantom series)."""
        opener = gzip.open if self.path.name.lower().endswith(".gz") else open
        try:
            with opener(self.path, "rb") as f:
                if not _check_unquoted(f, n_fields, self.name):
                    f.seek(0)
                    _check_quoted(f, n_fields, self.name)
        except (OSError, EOFError, UnicodeDecodeError, csv.Error) as exc:
            raise InputError(self.name, f"cannot read as CSV: {_first_line(exc)}") from None


def _bad_row(name: str, row: int, fields: int, n_fields: int) -> InputError:
    if fields == 0:
        return InputError(f"{name} row {row}", "row is blank")
    return InputError(f"{name} row {row}", f"has {fields} fields, but the header has {n_fields}")


def _check_unquoted(f: io.BufferedIOBase, n_fields: int, name: str) -> bool:
    """Count the fields of every line with numpy; False as soon as a quote appears
    (quoted fields may hold commas and newlines: `_check_quoted` reads those)."""
    done = 0  # lines checked so far; the header is line 1
    carry = b""
    while True:
        block = f.read(_SCAN_BLOCK)
        data = carry + block
        if not block:
            if not data:
                return True
            data += b"\n"  # last line without a newline
        cut = data.rfind(b"\n") + 1
        if cut == 0:
            if len(data) > _MAX_LINE:
                raise InputError(f"{name} row {done + 1}", "row is longer than 16 MB")
            carry = data
            continue
        data, carry = data[:cut], data[cut:]
        if b'"' in data:
            return False
        nul = data.find(b"\0")
        if nul >= 0:
            row = done + data.count(b"\n", 0, nul) + 1
            raise InputError(f"{name} row {row}",
                             "row contains a NUL byte (a damaged or binary file?)")
        arr = np.frombuffer(data, dtype=np.uint8)
        ends = np.flatnonzero(arr == 10)
        starts = np.r_[0, ends[:-1] + 1]
        fields = np.diff(np.searchsorted(np.flatnonzero(arr == 44), ends), prepend=0) + 1
        length = ends - starts - (arr[np.maximum(ends - 1, 0)] == 13)  # without \r
        fields[length <= 0] = 0
        bad = np.flatnonzero(fields != n_fields)
        bad = bad[bad + done > 0]  # the header defines n_fields
        if len(bad):
            i = int(bad[0])
            raise _bad_row(name, done + i + 1, int(fields[i]), n_fields)
        done += len(ends)
        if not block:
            return True


def _check_quoted(f: io.BufferedIOBase, n_fields: int, name: str) -> None:
    """The same check through the csv module (rows counted as records, as pandas does)."""
    text = io.TextIOWrapper(f, encoding="utf-8", newline="")
    for row, rec in enumerate(csv.reader(text, strict=True), start=1):
        if any("\0" in v for v in rec):
            raise InputError(f"{name} row {row}",
                             "row contains a NUL byte (a damaged or binary file?)")
        if row > 1 and len(rec) != n_fields:
            raise _bad_row(name, row, len(rec), n_fields)


class ParquetReader(_FileReader):
    """Parquet through pyarrow, read batch by batch."""

    def read(self, source: HistorySource, columns: Sequence[str]) -> Iterator[pd.DataFrame]:
        import pyarrow as pa
        import pyarrow.parquet as pq

        self.check_file()
        try:
            pf = pq.ParquetFile(self.path)
        except (pa.ArrowException, OSError) as exc:
            raise InputError(self.name, f"cannot read as Parquet: {_first_line(exc)}") from None
        self.missing(pf.schema_arrow.names, columns)
        if pf.metadata.num_rows == 0:
            raise InputError(self.name, "file has no data rows")
        try:
            for batch in pf.iter_batches(batch_size=source.chunk_rows, columns=list(columns)):
                yield batch.to_pandas()[list(columns)]
        except (pa.ArrowException, OSError) as exc:
            raise InputError(self.name, f"cannot read as Parquet: {_first_line(exc)}") from None


class SqlReader(HistoryReader):
    """Rows of a SQL query through SQLAlchemy, fetched `chunk_rows` at a time.

    The query must be one SELECT (or WITH ... SELECT) statement, and the database is
    opened read-only: SQLite files through a ``mode=ro`` URI, PostgreSQL and
    MySQL/MariaDB in a read-only transaction. The digest covers the query text and
    the rows read (never the URL, which may hold a password).
    """

    def __init__(self, source: HistorySource, name: str | None = None):
        super().__init__(source)
        self.name = name or "history query"
        self._hash = hashlib.sha256()

    def read(self, source: HistorySource, columns: Sequence[str]) -> Iterator[pd.DataFrame]:
        import sqlalchemy as sa
        from sqlalchemy.exc import ArgumentError, NoSuchModuleError, SQLAlchemyError

        assert source.url is not None and source.query is not None
        check_select(source.query, self.name)
        self._hash = hashlib.sha256(source.query.encode("utf-8"))
        try:
            url = sa.engine.make_url(source.url)
        except ArgumentError:
            raise InputError(self.name, "the database URL is not valid") from None
        db = url.database
        if url.get_backend_name() == "sqlite" and db and db != ":memory:":
            # sqlite would silently create a missing database file.
            if not str(db).startswith("file:") and not Path(db).is_file():
                raise InputError(self.name, f"database file not found: {db}")
        backend = url.get_backend_name()
        try:
            if backend == "sqlite" and url.get_driver_name() == "pysqlite":
                engine = sa.create_engine("sqlite://", creator=_sqlite_read_only(db))
            else:
                engine = sa.create_engine(url)
        except (ArgumentError, NoSuchModuleError, ImportError) as exc:
            raise InputError(self.name, f"cannot open the database: {_first_line(exc)}") from None
        n = 0
        try:
            with engine.connect() as conn:
                if backend in _READ_ONLY:
                    conn.execute(sa.text(_READ_ONLY[backend]))
                for chunk in pd.read_sql(sa.text(source.query), conn, chunksize=source.chunk_rows):
                    self.missing([str(c) for c in chunk.columns], columns)
                    part = chunk[list(columns)]
                    n += len(part)
                    self._hash.update(
                        pd.util.hash_pandas_object(part, index=False).to_numpy().tobytes()
                    )
                    yield part
        except (SQLAlchemyError, pd.errors.DatabaseError) as exc:
            raise InputError(self.name, f"database error: {_first_line(exc)}") from None
        finally:
            engine.dispose()
        if n == 0:
            raise InputError(self.name, "the query returned no rows")

    def digest(self) -> str:
        return self._hash.hexdigest()


# Statements that make the rest of a connection's transaction read-only.
_READ_ONLY = {
    "postgresql": "SET TRANSACTION READ ONLY",
    "mysql": "SET SESSION TRANSACTION READ ONLY",
    "mariadb": "SET SESSION TRANSACTION READ ONLY",
}
# Words that change a database; refused anywhere outside quotes and comments (a
# WITH may hide a DELETE), as a second guard where no read-only mode applies.
_WRITES = frozenset({
    "insert", "update", "delete", "drop", "alter", "create", "truncate", "attach",
    "detach", "pragma", "grant", "revoke", "merge", "vacuum", "reindex", "upsert",
})


def check_select(query: str, name: str) -> None:
    """Raise `InputError` unless `query` is a single SELECT or WITH statement.

    Comments and quoted text are set aside first, so a ``;`` or a keyword inside
    them does not count; a trailing ``;`` is allowed.
    """
    bare, i, n = [], 0, len(query)
    while i < n:
        c = query[i]
        if query.startswith("--", i):
            j = query.find("\n", i)
            i = n if j < 0 else j
            bare.append(" ")
        elif query.startswith("/*", i):
            j = query.find("*/", i + 2)
            if j < 0:
                raise InputError(name, "the query has a comment that is never closed")
            i = j + 2
            bare.append(" ")
        elif c in "'\"`[":
            close = "]" if c == "[" else c
            j = i + 1
            while True:
                j = query.find(close, j)
                if j < 0:
                    raise InputError(name, f"the query has a {c} that is never closed")
                if close != "]" and query.startswith(close * 2, j):
                    j += 2  # doubled quote inside quotes
                    continue
                break
            i = j + 1
            bare.append(" q ")
        else:
            bare.append(c)
            i += 1
    statements = [p for p in "".join(bare).split(";") if p.strip()]
    if len(statements) != 1:
        raise InputError(name, f"the query must be one statement, but has {len(statements)}")
    words = re.findall(r"[A-Za-z_]+", statements[0].lower())
    if not words or words[0] not in ("select", "with"):
        raise InputError(name, "the query must be a SELECT (or WITH ... SELECT); the history "
                         "is only read")
    writes = sorted(set(words) & _WRITES)
    if writes:
        raise InputError(name, f"the query must only read, but it uses {writes[0].upper()}")


def _sqlite_read_only(db: str | None):
    """A connection factory opening the SQLite file `db` read-only (``mode=ro``)."""
    import sqlite3
    from urllib.parse import quote

    if not db or db == ":memory:":
        uri = "file::memory:?mode=ro"
    elif db.startswith("file:"):
        uri = re.sub(r"([?&])mode=[^&]*&?", r"\1", db).rstrip("?&")
        uri += ("&" if "?" in uri else "?") + "mode=ro"
    else:
        uri = "file:" + quote(str(Path(db).resolve())) + "?mode=ro"
    return lambda: sqlite3.connect(uri, uri=True)


def reader_for(source: HistorySource, name: str | None = None) -> HistoryReader:
    """The reader for a source: by file suffix (.csv, .csv.gz, .parquet/.pq) or SQL."""
    if source.path is None:
        if source.url is None or source.query is None:
            raise InputError("[history]", "needs either 'path' or 'url' and 'query'")
        return SqlReader(source, name)
    suffixes = "".join(Path(source.path).suffixes[-2:]).lower()
    if suffixes.endswith(".csv") or suffixes.endswith(".csv.gz"):
        return CsvReader(source, name)
    if suffixes.endswith(".parquet") or suffixes.endswith(".pq"):
        return ParquetReader(source, name)
    raise InputError(
        name or str(source.path), "unknown file type (expected .csv, .csv.gz or .parquet)"
    )


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__
