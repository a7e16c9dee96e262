"""The per-hour scores export (`calibrate replay --scores`) is written block by block
(one Parquet row group per block of series) and equals the whole table built at once.

Reference: the export's rows built in one piece, as the replay used to build them
(`whole_frame` below), and pandas' own writers for that frame.
"""

from __future__ import annotations

import gzip

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from calibrate import api
from calibrate.cli import main
from calibrate.outputs import write_table_blocks
from tests.synthetic import make_workspace


def whole_frame(result) -> pd.DataFrame:
    """Every replayed hour of every level and metric in one frame (the old export)."""
    h = result.history
    parts = []
    for (level, metric), ms in result.scores.items():
        ls = h.levels[level]
        s_idx, t_idx = np.nonzero(~np.isnan(ms.expected))
        k = ms.settings.fence_multiplier
        part = {"level": level}
        for col in h.key_columns:
            part[col] = (ls.keys[col].to_numpy(dtype=object)[s_idx]
                         if col in ls.key_columns else "")
        q1, q3 = ms.q1[s_idx, t_idx], ms.q3[s_idx, t_idx]
        part.update(metric=metric, hour=h.hours[t_idx], value=ms.value[s_idx, t_idx],
                    expected=ms.expected[s_idx, t_idx], remainder=ms.remainder[s_idx, t_idx],
                    q1=q1, q3=q3, lower=q1 - k * (q3 - q1), upper=q3 + k * (q3 - q1),
                    score=ms.score[s_idx, t_idx], flagged=ms.flagged()[s_idx, t_idx])
        parts.append(pd.DataFrame(part))
    return pd.concat(parts, ignore_index=True)


@pytest.fixture(scope="module")
def replayed(tmp_path_factory):
    ws = make_workspace(tmp_path_factory.mktemp("ws") / "ws")
    ses = api.open_session(ws, incidents=False)
    return ws, api.replay_session(ses, engine="serial", progress=False)


def test_streamed_parquet_equals_the_whole_frame(replayed, tmp_path):
    _, result = replayed
    ref = whole_frame(result)
    path = tmp_path / "scores.parquet"
    # 700 rows per block: fewer than one series' 840 hours, so one series per row group
    write_table_blocks(path, result.score_blocks(700), force=False)
    assert pq.ParquetFile(path).num_row_groups == 12  # (2 + 4 series) x 2 metrics
    pd.testing.assert_frame_equal(pd.read_parquet(path), ref)
    whole = tmp_path / "whole.parquet"
    ref.to_parquet(whole, index=False)
    assert pq.read_schema(path) == pq.read_schema(whole)


@pytest.mark.parametrize("suffix", [".csv", ".csv.gz"])
def test_streamed_csv_equals_the_whole_frame(replayed, tmp_path, suffix):
    _, result = replayed
    path = tmp_path / f"scores{suffix}"
    write_table_blocks(path, result.score_blocks(1000))
    raw = path.read_bytes()
    text = (gzip.decompress(raw) if suffix.endswith(".gz") else raw).decode()
    assert text == whole_frame(result).to_csv(index=False)


def test_replay_scores_option_writes_the_same_table(replayed, tmp_path):
    ws, result = replayed
    out = tmp_path / "scores.parquet"
    assert main(["-q", "replay", str(ws), "--out", str(tmp_path / "a.csv"), "--scores",
                 str(out), "--engine", "serial"]) == 0
    pd.testing.assert_frame_equal(pd.read_parquet(out), whole_frame(result))


def test_an_unknown_scores_format_is_refused_before_the_replay(replayed, tmp_path, capsys):
    ws, _ = replayed
    assert main(["replay", str(ws), "--out", str(tmp_path / "a.csv"), "--scores",
                 str(tmp_path / "s.xlsx"), "--engine", "serial"]) == 1
    assert "unknown output format" in capsys.readouterr().err
    assert not (tmp_path / "a.csv").exists()
