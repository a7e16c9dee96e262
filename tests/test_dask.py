"""The Dask engine against the serial engine on the small invented workspace.

Reference: the serial engine's own output, computed in each test. A LocalCluster
of 2 single-threaded worker processes (loopback only, no dashboard) is started
once for the module and always closed.
"""

from __future__ import annotations

import dataclasses
import os
import platform
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from calibrate import api
from calibrate.cli import main
from calibrate.engine import replay as replay_mod
from calibrate.engine.executors import (
    DaskExecutor,
    LocalExecutor,
    SerialExecutor,
    dask_batch_size,
)
from calibrate.settings import DetectorConfig
from tests.synthetic import make_workspace

ARRAYS = ("value", "expected", "remainder", "q1", "q3", "score", "flat")


@pytest.fixture(scope="module")
def dask_ex() -> Iterator[DaskExecutor]:
    ex = DaskExecutor(None, workers=2)  # the LocalCluster path of --engine dask
    try:
        yield ex
    finally:
        ex.close()


@pytest.fixture(scope="module")
def ses(tmp_path_factory) -> api.Session:
    return api.open_session(make_workspace(tmp_path_factory.mktemp("dask") / "ws"))


def _replay(ses: api.Session, executor, config: DetectorConfig | None = None):
    rp = api.make_replayer(ses, executor=executor, progress=False)
    return rp, rp.replay(config or ses.ws.detector)


def _square(shared: dict, task: int) -> int:
    return shared["offset"] + task * task


def test_local_cluster_matches_serial(ses, dask_ex):
    _, ref = _replay(ses, SerialExecutor())
    _, got = _replay(ses, dask_ex)
    assert dask_ex.workers == 2
    ref_alerts = ref.alerts_frame()
    assert len(ref_alerts) > 0  # the comparison is not vacuous
    pd.testing.assert_frame_equal(got.alerts_frame(), ref_alerts)
    assert set(got.scores) == set(ref.scores)
    for key, ms in ref.scores.items():
        for name in ARRAYS:
            np.testing.assert_array_equal(getattr(got.scores[key], name), getattr(ms, name),
                                          err_msg=f"{key} {name}")
        assert np.isfinite(ms.score).any()


def _fetched(dask_worker) -> list[str]:
    """Keys this worker ever fetched from another worker."""
    log = getattr(dask_worker, "transfer_incoming_log", None)
    if log is None:
        log = dask_worker.state.transfer_incoming_log
    return [str(k) for entry in log for k in entry.get("keys", ())]


def test_history_is_shipped_once(ses, dask_ex):
    """Each worker gets its own copy of the history once, and a pass of Dask's
    active memory manager (on by default, run here on demand instead of on its
    2-second timer) neither removes a copy nor makes a worker fetch one."""
    rp, _ = _replay(ses, dask_ex)
    client = dask_ex._client
    workers = set(client.scheduler_info()["workers"])
    keys = dask_ex.shared_keys
    assert set(keys) == workers and len(set(keys.values())) == len(workers)

    def holders() -> dict[str, set[str]]:
        who = client.who_has(list(dask_ex._blocks.values()))
        return {addr: set(who[key]) for addr, key in keys.items()}

    assert holders() == {addr: {addr} for addr in workers}  # its own, on it alone
    client.amm.run_once()
    assert holders() == {addr: {addr} for addr in workers}
    # a second replay that must refit (other seasonal span) reuses the copies
    base = ses.ws.detector.base
    refit = DetectorConfig(base=dataclasses.replace(base, seasonal_span=base.seasonal_span + 2))
    fits = rp.fits
    rp.replay(refit)
    assert rp.fits > fits  # it did run tasks on the cluster
    assert dask_ex.shared_keys == keys
    assert holders() == {addr: {addr} for addr in workers}
    # no worker ever fetched a copy from another worker: tasks ran where it was
    for fetched in client.run(_fetched).values():
        assert not set(fetched) & set(keys.values())


def test_every_task_runs_once(dask_ex):
    tasks = list(range(203))  # several batches, the last one short
    assert dask_batch_size(len(tasks), dask_ex.workers) > 1
    got = dict(dask_ex.run(_square, {"offset": 7}, tasks))
    assert got == {i: 7 + t * t for i, t in enumerate(tasks)}
    assert list(dask_ex.run(_square, {"offset": 7}, [])) == []


class _Bar:
    """Stands in for tqdm: records the total and every update."""

    made: list[_Bar] = []

    def __init__(self, total: int, **kwargs):
        self.total, self.done, self.closed = total, 0, False
        _Bar.made.append(self)

    def update(self, n: int) -> None:
        self.done += n

    def close(self) -> None:
        self.closed = True


def test_progress_counts_every_task(ses, dask_ex, monkeypatch):
    monkeypatch.setattr(replay_mod, "tqdm", _Bar)
    _Bar.made.clear()
    rp = api.make_replayer(ses, executor=dask_ex, progress=True)
    rp.replay(ses.ws.detector)
    [bar] = _Bar.made
    assert bar.total > 1 and bar.done == bar.total and bar.closed


def test_batch_size_bounds():
    assert dask_batch_size(1, 4) == 1
    assert dask_batch_size(64, 2) == 4  # 8 batches per worker
    assert dask_batch_size(10**6, 2) == 16  # capped: bounded result size per batch
    assert dask_batch_size(10**6, 10**6) == 1


def test_cli_replay_dask_engine(ses, dask_ex, tmp_path, capsys):
    ws = str(ses.ws.file)
    ref, out = tmp_path / "serial.csv", tmp_path / "dask.csv"
    assert main(["replay", ws, "--out", str(ref), "--engine", "serial"]) == 0
    address = dask_ex._cluster.scheduler_address
    assert main(["replay", ws, "--out", str(out), "--engine", "dask",
                 "--scheduler", address]) == 0
    assert "alerts written" in capsys.readouterr().out
    expected = pd.read_csv(ref, keep_default_na=False)
    assert len(expected) > 0
    pd.testing.assert_frame_equal(pd.read_csv(out, keep_default_na=False), expected)
    # the CLI's client closed; the cluster it connected to is still serving
    assert dask_ex._client.submit(sum, [1, 2]).result() == 3


@pytest.mark.parametrize(
    "address, message",
    [
        ("tcp://127.0.0.1:1", "cannot reach the Dask scheduler at tcp://127.0.0.1:1"),
        ("tcp://127.0.0.1", "bad Dask scheduler address"),
    ],
)
def test_unreachable_scheduler_is_one_line(ses, tmp_path, capsys, address, message):
    out = tmp_path / "alerts.csv"
    code = main(["replay", str(ses.ws.file), "--out", str(out), "--engine", "dask",
                 "--scheduler", address])
    err = capsys.readouterr().err
    assert code == 1
    assert len(err.strip().splitlines()) == 1, err
    assert err.startswith("calibrate replay: ") and message in err
    assert "Traceback" not in err
    assert not Path(out).exists()


def test_a_passed_local_executor_keeps_its_workers_across_replays(ses):
    """Replayers of one history hand the executor the same shared arrays, and closing a
    replayer leaves an executor it was given running, so the second replay reuses the
    first one's worker processes (same pool object) and gives the same alerts."""
    from calibrate.engine.executors import LocalExecutor

    ex = LocalExecutor(workers=2)
    try:
        first = api.replay_session(ses, executor=ex, progress=False)
        pool = ex._pool
        assert pool is not None  # still up after replay_session closed its replayer
        again = api.replay_session(ses, executor=ex, progress=False)
        assert ex._pool is pool
        pd.testing.assert_frame_equal(again.alerts_frame(), first.alerts_frame())
    finally:
        ex.close()
    assert ex._pool is None
    # a replayer that made its own executor shuts it down
    rp = api.make_replayer(ses, engine="local", progress=False)
    rp.replay(ses.ws.detector)
    assert rp.executor._pool is not None
    rp.close()
    assert rp.executor._pool is None


def test_stream_cache_stays_within_its_budget_and_refits_what_it_dropped(ses):
    """Reference: a replayer with an unbounded cache. A bounded one drops the least
    recently used decomposition settings, refits them when asked again, and gives the
    same scores bit for bit."""
    a = ses.ws.detector
    b = a.with_base(seasonal_span=11)
    full = api.make_replayer(ses, executor=SerialExecutor(), progress=False)
    ref_a, ref_b = full.scores(a), full.scores(b)
    one = sum(st.nbytes for st in full.streams(a).values())  # one setting's streams
    rp = api.make_replayer(ses, executor=SerialExecutor(), progress=False,
                           cache_bytes=one + one // 2)
    rp.scores(a)
    fits = rp.fits
    rp.scores(b)  # b's streams push a's out, least recently used first
    assert sum(st.nbytes for st in rp.cache.values()) <= one + one // 2
    kept_a = [k for k in rp.cache if k[2] == a.base.decomposition_key()]
    assert len([k for k in rp.cache if k[2] == b.base.decomposition_key()]) == len(ref_b)
    assert 0 < len(ref_a) - len(kept_a)
    again = rp.scores(a)
    assert rp.fits > 2 * fits  # what was dropped of a is refit
    for key, ms in ref_a.items():
        for name in ARRAYS:
            np.testing.assert_array_equal(getattr(again[key], name), getattr(ms, name))
    # the config being returned is never dropped, even when it alone is over budget
    tiny = api.make_replayer(ses, executor=SerialExecutor(), progress=False, cache_bytes=1)
    got = tiny.scores(b)
    assert set(got) == set(ref_b) and len(tiny.cache) == len(ref_b)


def _slow_square(shared: dict, task: int) -> int:
    import time

    time.sleep(0.002)
    return shared["offset"] + task * task


def _drain(run: Iterator, got: dict, timeout: float = 60.0) -> None:
    """Collect the rest of a run into `got` (each task's result must arrive once),
    failing instead of hanging when it does not end within `timeout` seconds."""
    dup: list[int] = []

    def collect() -> None:
        for i, value in run:
            if i in got:
                dup.append(i)
            got[i] = value

    t = threading.Thread(target=collect, daemon=True)
    t.start()
    t.join(timeout)
    assert not t.is_alive(), f"the run did not end within {timeout} s"
    assert dup == []


def test_a_worker_that_dies_mid_run_has_its_batches_rerun(dask_ex):
    """A worker killed mid-run takes its copy of the shared data along; its batches
    run on the other worker (or on the one that replaces it), each task once."""
    client = dask_ex._client
    tasks = list(range(300))
    run = dask_ex.run(_slow_square, {"offset": 3}, tasks)
    got = dict([next(run)])
    victim = sorted(dask_ex.shared_keys)[0]
    pid = client.run(os.getpid, workers=[victim])[victim]
    os.kill(pid, signal.SIGKILL)
    _drain(run, got)
    assert got == {i: 3 + t * t for i, t in enumerate(tasks)}
    assert victim not in dask_ex.shared_keys  # its copy is forgotten
    client.wait_for_workers(2, timeout=30)  # the nanny restarts it for later tests


def test_a_worker_that_retires_mid_run_has_its_batches_rerun(monkeypatch):
    """A worker retired gracefully mid-run hands its data to another worker and
    leaves; the batches queued for it run on the other worker, each task once.
    (A cluster of its own: the module's cluster keeps its two workers.)"""
    from dask.distributed import LocalCluster

    import calibrate.engine.executors as executors_mod

    monkeypatch.setattr(executors_mod, "LIVENESS_SECONDS", 0.2)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=":0") as cluster:  # any free port, not 8787
        ex = DaskExecutor(cluster.scheduler_address)
        try:
            tasks = list(range(300))
            run = ex.run(_slow_square, {"offset": 5}, tasks)
            got = dict([next(run)])
            victim = sorted(ex.shared_keys)[0]
            ex._client.retire_workers([victim], close_workers=True)
            _drain(run, got)
            assert got == {i: 5 + t * t for i, t in enumerate(tasks)}
            assert victim not in ex.shared_keys
        finally:
            ex.close()


def test_cached_streams_hold_no_remainder_and_derive_it_bit_for_bit():
    """Reference: `remainder_stream` run on each series alone. The replayer's cache holds
    the expected values and the quartiles only (the remainder is one array per setting
    less); the remainder it hands out, value - expected, is the stream's own bit for
    bit, NaN at the same hours (before the first fit and at undefined hours inside the
    replay), in-fit and forecast alike."""
    from calibrate.decomposition.decompose import remainder_stream
    from calibrate.engine.replay import Replayer
    from calibrate.inputs.history import History, LevelSeries
    from calibrate.settings import DetectorSettings

    rng = np.random.default_rng(3)
    n = 24 * 21
    t = np.arange(n)
    y = 100 * (1.5 + np.sin(2 * np.pi * t / 24)) + rng.normal(0, 5, (3, n))
    y[0, 300:304] = np.nan  # undefined hours (a derived metric's 0/0)
    y[2, 400] = np.nan
    hours = pd.date_range("2026-01-05", periods=n, freq="h", tz="UTC")
    keys = pd.DataFrame({"series": ["s1", "s2", "s3"]})
    hist = History(hours=hours, levels={"series": LevelSeries(
        "series", ("series",), keys, {"x": y})}, key_columns=("series",))
    rp = Replayer(hist, progress=False)
    nan_inside = 0
    for mode in ("fit", "forecast"):
        s = DetectorSettings(decomposition_window_hours=168, fence_window_hours=48,
                             expected_value=mode)
        (st,) = rp.streams(DetectorConfig(base=s)).values()
        windows = tuple(sorted(st.q1))
        assert st.nbytes == st.expected.nbytes * (1 + 2 * len(windows))
        got = st.remainder
        for r in range(3):
            ref = remainder_stream(y[r], s, windows).remainder
            np.testing.assert_array_equal(got[r], ref)
            nan_inside += int(np.isnan(ref[168:]).sum())
    assert nan_inside == 2 * 5  # the undefined hours were compared, in both modes


def _block(shared: dict, task: int) -> np.ndarray:
    return np.full(100_000, float(task + shared["offset"]))


def test_local_executor_lets_go_of_results_it_has_yielded():
    """A result the local engine has handed over is not kept alive by the engine while
    later tasks are still coming (the replay copies each task's rows in as it arrives;
    a pool that kept every result would hold a whole setting's streams twice). Checked
    with weak references: every result but the last one taken is freed."""
    import gc
    import weakref

    from calibrate.engine.executors import LocalExecutor

    ex = LocalExecutor(workers=2)
    try:
        it = ex.run(_block, {"offset": 1}, list(range(6)))
        refs = []
        seen = set()
        for _ in range(5):
            i, arr = next(it)
            assert arr[0] == i + 1
            seen.add(i)
            refs.append(weakref.ref(arr))
            del arr
        gc.collect()
        assert len(seen) == 5
        assert [r() is None for r in refs[:-1]] == [True] * 4
        it.close()
    finally:
        ex.close()


def _heap_steady(shared, task):
    from calibrate.engine import executors

    return executors.heap_steady


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc's mallopt only")
def test_local_workers_keep_freed_memory_between_tasks():
    # glibc's mallopt (malloc.h): each worker serves blocks up to 32 MB from its heap and
    # keeps freed memory, so its tasks do not wait on the kernel for fresh pages
    # (two workers: one would run the tasks in this process)
    with LocalExecutor(2) as ex:
        assert [r for _, r in ex.run(_heap_steady, None, [0, 1])] == [True, True]


def test_worker_tasks_import_no_pandas():
    # a worker imports the task module and the executor's: numpy and the kernels only
    code = ("import sys, calibrate.engine.tasks, calibrate.engine.executors; "
            "sys.exit(int('pandas' in sys.modules))")
    assert subprocess.run([sys.executable, "-c", code]).returncode == 0


def test_workers_run_the_callers_copy_of_calibrate(tmp_path):
    """Started from a folder holding another package named calibrate (a checkout beside
    an installed copy), local workers still import the caller's copy: Python 3.11's
    fork server is started without the caller's sys.path, so nothing of ours may be
    preloaded in it."""
    (tmp_path / "other" / "calibrate").mkdir(parents=True)
    (tmp_path / "other" / "calibrate" / "__init__.py").write_text("")
    script = tmp_path / "where.py"
    script.write_text(
        "import importlib.util\n"
        "import calibrate\n"
        "from calibrate.engine.executors import LocalExecutor\n"
        "if __name__ == '__main__':\n"
        "    with LocalExecutor(2) as ex:\n"
        "        spec = importlib.util.find_spec\n"
        "        got = {r.origin for _, r in ex.run(spec, 'calibrate', [None, None])}\n"
        "    print(got == {calibrate.__file__}, got, calibrate.__file__)\n")
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    done = subprocess.run([sys.executable, str(script)], cwd=tmp_path / "other", env=env,
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.startswith("True"), done.stdout
