"""Two `calibrate tune` processes on one journal-file study share its trial budget.

Reference: the study itself, loaded with Optuna after both processes exit.

Budget rule checked: the budget is for the whole study, so the two processes
together finish between `BUDGET` and `BUDGET + PROCESSES - 1` trials that count
against it (`calibrate.tuning.search.BUDGET_STATES`: COMPLETE, and PRUNED for settings
that fail validation). A process only starts a trial while fewer than `BUDGET`
are finished; when the `BUDGET`-th one finishes, each other process can hold at
most one trial it already started, and that trial is finished too (not lost), so
the overshoot is at most one per other process. Each process running its own
budget would give about `PROCESSES * BUDGET` and fail the check.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import optuna
from optuna.trial import TrialState

from calibrate.tuning.search import BUDGET_STATES
from tests.synthetic import make_workspace

REPO = Path(__file__).resolve().parents[1]
BUDGET = 10
PROCESSES = 2
STUDY = "shared"


def _tune(ws: Path, storage: Path, out: Path) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(
        [str(REPO), *filter(None, [os.environ.get("PYTHONPATH")])])}
    cmd = [sys.executable, "-m", "calibrate.cli", "tune", str(ws), "--out", str(out),
           "--trials", str(BUDGET), "--storage", str(storage), "--study", STUDY,
           "--engine", "serial"]
    return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=env, cwd=out.parent)


def test_two_processes_share_one_study(tmp_path):
    ws = make_workspace(tmp_path / "ws")
    storage = tmp_path / "study.journal"
    procs = [_tune(ws, storage, tmp_path / f"tuned-{i}.toml") for i in range(PROCESSES)]
    try:
        outs = [p.communicate(timeout=240) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
    for p, (out, err) in zip(procs, outs, strict=True):
        assert p.returncode == 0, f"stdout:\n{out}\nstderr:\n{err}"

    backend = optuna.storages.journal.JournalFileBackend(str(storage))
    study_storage = optuna.storages.JournalStorage(backend)
    assert optuna.get_all_study_names(study_storage) == [STUDY]
    trials = optuna.load_study(study_name=STUDY, storage=study_storage).get_trials(
        deepcopy=False
    )
    states = [t.state for t in trials]
    counted = sum(states.count(s) for s in BUDGET_STATES)
    assert BUDGET <= counted <= BUDGET + PROCESSES - 1, states
    assert states.count(TrialState.COMPLETE) >= 1
    assert TrialState.FAIL not in states
    # none abandoned mid-way or left queued: every trial counted
    assert counted == len(trials), states
    numbers = [t.number for t in trials]
    assert sorted(numbers) == list(range(len(trials)))  # distinct, none missing
    assert len({t._trial_id for t in trials}) == len(trials)
    # today's settings are queued once, by the process that created the study
    warm = [t for t in trials if t.system_attrs.get("fixed_params")]
    assert len(warm) == 1, [t.params for t in warm]
    for i in range(PROCESSES):
        assert (tmp_path / f"tuned-{i}.toml").is_file()
