"""Data-source seam for hourly history rows: CSV, Parquet and SQL readers.

A `HistoryReader` yields the rows of a `HistorySource` as pandas chunks holding only
the requested columns, in file order, and reports a digest of what it read. Pick one
with `reader_for(source)`; add a new kind by subclassing `HistoryReader` and
extending `reader_for`.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator, Sequence
from pathlib import Path

import pandas as pd

from calibrate.errors import InputError
from calibrate.workspace import HistorySource

_HASH_BLOCK = 1 << 20


class HistoryReader:
    """Base class: read the rows of one history source in chunks.

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

    def read(self, source: HistorySource, columns: Sequence[str]) -> Iterator[pd.DataFrame]:
        """Yield consecutive chunks holding exactly `columns` (in that order).

        Raises `InputError` when the source is missing, unreadable, empty or lacks a column.
        """
        raise NotImplementedError

    def digest(self) -> str:
        """SHA-256 (hex) of what `read` read; valid once `read` is exhausted."""
        raise NotImplementedError

    def missing(self, present: Sequence[str], columns: Sequence[str]) -> None:
        """Raise for the first of `columns` not in `present`."""
        for c in columns:
            if c not in present:
                raise InputError(
                    f"{self.name} column '{c}'",
                    f"column is missing (found: {', '.join(map(str, present))})",
                )


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

    The digest covers the query text and the rows read (never the URL, which may hold
    a password).
    """

    def __init__(self, source: HistorySource, name: str | None = None):
        super().__init__(source)
        self.name = name or "history query"
        self._hash = hashlib.sha256()

    def read(self, source: HistorySource, columns: Sequence[str]) -> Iterator[pd.DataFrame]:
        import sqlalchemy as sa
        from sqlalchemy.exc import ArgumentError, NoSuchModuleError, SQLAlchemyError

        assert source.url is not None and source.query is not None
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
        try:
            engine = sa.create_engine(url)
        except (ArgumentError, NoSuchModuleError, ImportError) as exc:
            raise InputError(self.name, f"cannot open the database: {_first_line(exc)}") from None
        n = 0
        try:
            with engine.connect() as conn:
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
