"""Signals sent to a real `python -m calibrate tune` using the local engine.

Reference: the process table (psutil) and the exit status the shell would see.
Ctrl-C (SIGINT to the whole process group, as a terminal sends it) and SIGTERM
(to `calibrate` alone, as `kill PID` does) end the command with one line on
stderr, exit 130 or 143 and no traceback, and take its worker processes along;
after a SIGKILL of `calibrate` (no cleanup possible) the workers still exit.
Every wait is bounded; the process group is killed at the end whatever happens.
"""

from __future__ import annotations

import contextlib
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import psutil
import pytest

from tests.synthetic import make_workspace

REPO = Path(__file__).resolve().parents[1]
START_TIMEOUT = 60.0  # a cold start on a busy 2-core machine
GONE_TIMEOUT = 10.0
BAR = re.compile(r"tune: +\d+%\|")  # a redraw of tune's progress bar


def _alive(procs: list[psutil.Process]) -> list[psutil.Process]:
    out = []
    for p in procs:
        with contextlib.suppress(psutil.NoSuchProcess):
            if p.is_running() and p.status() != psutil.STATUS_ZOMBIE:
                out.append(p)
    return out


def _wait_gone(procs: list[psutil.Process], timeout: float = GONE_TIMEOUT) -> list:
    deadline = time.monotonic() + timeout
    while _alive(procs) and time.monotonic() < deadline:
        time.sleep(0.05)
    return _alive(procs)


@pytest.fixture
def tune(tmp_path: Path) -> Iterator[tuple[subprocess.Popen, list[psutil.Process], Path]]:
    """A long `tune` (far more trials than the test lets it run) with 2 local workers,
    in a session of its own; yields it once both workers are up, with every
    process under it and the file its stderr goes to."""
    ws = make_workspace(tmp_path / "ws")
    err = tmp_path / "stderr.txt"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(
        [str(REPO), *filter(None, [os.environ.get("PYTHONPATH")])])}
    cmd = [sys.executable, "-m", "calibrate", "tune", str(ws), "--out",
           str(tmp_path / "tuned.toml"), "--trials", "10000", "--engine", "local",
           "--workers", "2", "--storage", str(tmp_path / "study.journal")]
    with open(err, "w") as stderr:
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=stderr, cwd=tmp_path,
                                env=env, start_new_session=True)
    try:
        top = psutil.Process(proc.pid)
        deadline = time.monotonic() + START_TIMEOUT
        while True:
            tree = top.children(recursive=True)
            # the pool's workers are the fork server's children: grandchildren here
            workers = [p for p in _alive(tree) if p.ppid() != proc.pid]
            if len(workers) >= 2:
                break
            assert proc.poll() is None, err.read_text()
            assert time.monotonic() < deadline, "the workers never started"
            time.sleep(0.05)
        yield proc, tree, err
    finally:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(proc.pid, signal.SIGKILL)  # the group outlives its leader
        proc.wait(timeout=GONE_TIMEOUT)


@pytest.mark.parametrize(
    "signum, to_group, code, line",
    [
        (signal.SIGTERM, False, 143, "calibrate tune: terminated"),
        (signal.SIGINT, True, 130, "calibrate tune: interrupted"),
    ],
)
def test_sigterm_and_ctrl_c_stop_with_one_line_and_no_workers_left(
        tune, signum, to_group, code, line):
    proc, tree, err = tune
    if to_group:
        os.killpg(proc.pid, signum)
    else:
        proc.send_signal(signum)
    assert proc.wait(timeout=GONE_TIMEOUT) == code, err.read_text()
    text = err.read_text()
    assert "Traceback" not in text, text
    # apart from the progress bar's redraws, one line
    assert [ln for ln in text.splitlines() if ln and not BAR.match(ln)] == [line], text
    assert _wait_gone(tree) == []


def test_workers_exit_when_calibrate_is_killed(tune):
    proc, tree, _ = tune
    assert len(_alive(tree)) >= 3  # fork server and two workers at least
    proc.kill()
    proc.wait(timeout=GONE_TIMEOUT)
    assert _wait_gone(tree) == []
