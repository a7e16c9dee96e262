"""Data-source readers: CSV, gzip CSV, Parquet and SQLite (a real database file)."""

from __future__ import annotations

import gzip
import hashlib
import io
import sqlite3
from pathlib import Path

import pandas as pd
import pytest

from calibrate.errors import InputError
from calibrate.inputs.sources import CsvReader, ParquetReader, SqlReader, reader_for
from calibrate.inputs.workspace import HistorySource

KEYS = ("market", "campaign")
COLUMNS = ["hour", "market", "campaign", "clicks"]
CSV = (
    "hour,market,campaign,clicks,note\n"
    "2024-01-01T00:00:00Z,m1,007,3,x\n"
    "2024-01-01T01:00:00Z,m1,007,4,y\n"
    "2024-01-01T02:00:00Z,m2,010,,z\n"
)


def csv_source(path: Path, chunk_rows: int = 200_000) -> HistorySource:
    return HistorySource(path=path, key_columns=KEYS, chunk_rows=chunk_rows)


def read_all(source: HistorySource, columns=COLUMNS) -> pd.DataFrame:
    reader = reader_for(source)
    return pd.concat(list(reader.read(source, columns)), ignore_index=True)


def test_factory_picks_reader_by_suffix_or_url(tmp_path: Path) -> None:
    assert isinstance(reader_for(csv_source(tmp_path / "a.csv")), CsvReader)
    assert isinstance(reader_for(csv_source(tmp_path / "a.CSV.gz")), CsvReader)
    assert isinstance(reader_for(csv_source(tmp_path / "a.parquet")), ParquetReader)
    sql = HistorySource(url="sqlite:///x.db", query="select 1", key_columns=KEYS)
    assert isinstance(reader_for(sql), SqlReader)
    with pytest.raises(InputError, match=r"a\.xlsx: unknown file type"):
        reader_for(csv_source(tmp_path / "a.xlsx"))


def test_csv_reads_only_needed_columns_keys_as_text_in_chunks(tmp_path: Path) -> None:
    p = tmp_path / "h.csv"
    p.write_text(CSV, encoding="utf-8")
    source = csv_source(p, chunk_rows=2)
    chunks = list(reader_for(source).read(source, COLUMNS))
    assert [len(c) for c in chunks] == [2, 1]
    frame = pd.concat(chunks, ignore_index=True)
    assert list(frame.columns) == COLUMNS  # 'note' not read
    assert frame["campaign"].tolist() == ["007", "007", "010"]  # leading zeros kept
    assert frame["clicks"].isna().tolist() == [False, False, True]


def test_csv_gz_gives_the_same_rows_and_hash_of_file_bytes(tmp_path: Path) -> None:
    plain, packed = tmp_path / "h.csv", tmp_path / "h.csv.gz"
    plain.write_text(CSV, encoding="utf-8")
    packed.write_bytes(gzip.compress(CSV.encode()))
    pd.testing.assert_frame_equal(read_all(csv_source(plain)), read_all(csv_source(packed)))
    reader = reader_for(csv_source(packed))
    list(reader.read(csv_source(packed), COLUMNS))
    # reference: hashlib over the file's bytes
    assert reader.digest() == hashlib.sha256(packed.read_bytes()).hexdigest()


def test_parquet_reads_only_needed_columns(tmp_path: Path) -> None:
    p = tmp_path / "h.parquet"
    pd.read_csv(io.StringIO(CSV), dtype={"campaign": str}).to_parquet(p)
    frame = read_all(csv_source(p, chunk_rows=2))
    assert list(frame.columns) == COLUMNS
    assert frame["campaign"].tolist() == ["007", "007", "010"]


@pytest.mark.parametrize(
    ("name", "content", "fragment"),
    [
        ("missing.csv", None, "missing.csv: file not found"),
        ("empty.csv", b"", "empty.csv: file is empty"),
        ("header.csv", b"hour,market,campaign,clicks\n", "header.csv: file has a header but no"),
        ("cols.csv", b"hour,market,clicks\n2024-01-01T00:00Z,m,1\n",
         "cols.csv column 'campaign': column is missing"),
        ("bad.csv", b'hour,market,campaign,clicks\n"2024,m,c,1\n', "bad.csv: cannot read as CSV"),
        ("missing.parquet", None, "missing.parquet: file not found"),
        ("empty.parquet", b"", "empty.parquet: file is empty"),
        ("junk.parquet", b"this is not parquet", "junk.parquet: cannot read as Parquet"),
        ("junk.csv.gz", b"not gzip at all", "junk.csv.gz: cannot read as CSV"),
    ],
)
def test_file_errors(tmp_path: Path, name: str, content: bytes | None, fragment: str) -> None:
    p = tmp_path / name
    if content is not None:
        p.write_bytes(content)
    with pytest.raises(InputError) as info:
        read_all(csv_source(p))
    assert fragment in str(info.value)
    assert str(p) in str(info.value)


def test_parquet_missing_column_and_no_rows(tmp_path: Path) -> None:
    p = tmp_path / "h.parquet"
    pd.DataFrame({"hour": ["x"], "market": ["m"], "clicks": [1.0]}).to_parquet(p)
    with pytest.raises(InputError, match=r"h\.parquet column 'campaign': column is missing"):
        read_all(csv_source(p))
    q = tmp_path / "none.parquet"
    pd.DataFrame({c: pd.Series([], dtype=str) for c in COLUMNS}).to_parquet(q)
    with pytest.raises(InputError, match=r"none\.parquet: file has no data rows"):
        read_all(csv_source(q))


def make_db(path: Path) -> None:
    with sqlite3.connect(path) as conn:
        conn.execute("create table kpi (hour text, market text, campaign text, clicks real, x int)")
        conn.executemany(
            "insert into kpi values (?, ?, ?, ?, 0)",
            [("2024-01-01T00:00:00Z", "m1", "007", 3), ("2024-01-01T01:00:00Z", "m1", "007", 4),
             ("2024-01-01T02:00:00Z", "m2", "010", None)],
        )
    conn.close()


def sql_source(db: Path, query: str = "select * from kpi order by hour", rows: int = 2):
    return HistorySource(url=f"sqlite:///{db}", query=query, key_columns=KEYS, chunk_rows=rows)


def test_sqlite_reads_in_chunks_and_hashes_query_and_rows(tmp_path: Path) -> None:
    db = tmp_path / "kpi.db"
    make_db(db)
    source = sql_source(db)
    reader = reader_for(source, "q")
    chunks = list(reader.read(source, COLUMNS))
    assert [len(c) for c in chunks] == [2, 1]
    frame = pd.concat(chunks, ignore_index=True)
    assert list(frame.columns) == COLUMNS
    assert frame["campaign"].tolist() == ["007", "007", "010"]
    first = reader.digest()
    # same rows, other query text -> other digest; same query again -> same digest
    other = sql_source(db, "select hour, market, campaign, clicks from kpi order by hour")
    r2 = reader_for(other, "q")
    list(r2.read(other, COLUMNS))
    r3 = reader_for(source, "q")
    list(r3.read(source, COLUMNS))
    assert r2.digest() != first and r3.digest() == first


def test_sqlite_errors_and_no_database_file_created(tmp_path: Path) -> None:
    missing = tmp_path / "nope.db"
    with pytest.raises(InputError, match=r"q: database file not found"):
        list(reader_for(sql_source(missing), "q").read(sql_source(missing), COLUMNS))
    assert not missing.exists()
    db = tmp_path / "kpi.db"
    make_db(db)
    bad = sql_source(db, "select * from nosuchtable")
    with pytest.raises(InputError, match=r"^q: database error: .*nosuchtable"):
        list(reader_for(bad, "q").read(bad, COLUMNS))
    few = sql_source(db, "select hour, market, clicks from kpi")
    with pytest.raises(InputError, match=r"^q column 'campaign': column is missing"):
        list(reader_for(few, "q").read(few, COLUMNS))
    empty = sql_source(db, "select * from kpi where 1 = 0")
    with pytest.raises(InputError, match=r"^q: the query returned no rows"):
        list(reader_for(empty, "q").read(empty, COLUMNS))
