"""Each compiled kernel is compiled once per process, whatever path reaches it.

A second compiled copy of a kernel costs seconds on every first run after installing
(empty numba cache): numba types a bare constant argument of a nested call as a literal
(`Literal[int](1)`) and a read-only array apart from a writeable one, and compiles a copy
per type. The kernels avoid both (DEVELOPERS.md, "Compiled kernels"). This test replays a
small workspace in a fresh interpreter (serial engine, so every kernel runs in that
process) through the fit and forecast, robust and non-robust paths, scores it, runs a
short tune, then lists every kernel with more than one compiled signature.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from tests.synthetic import make_workspace

ROOT = Path(__file__).resolve().parents[1]

SCRIPT = """
import importlib, sys
import numba
from calibrate import api
from calibrate.tuning.search import tune

ses = api.open_session(sys.argv[1])
base = ses.ws.detector
for robust in (False, True):
    for ev in ("fit", "forecast"):
        config = base.with_base(robust=robust, expected_value=ev)
        result = api.replay_session(ses, config, progress=False, engine="serial")
        api.score_episodes(ses, result.episodes)
tune(ses, trials=4, engine="serial", progress=False)  # exact multiplier solve, curves
many = []
for name in ("decomposition.loess", "decomposition.stl_core", "decomposition.stl_plan",
             "decomposition.decompose", "detection.detectors", "scoring.curves",
             "scoring.matching"):
    mod = importlib.import_module("calibrate." + name)
    for attr, obj in vars(mod).items():
        if isinstance(obj, numba.core.registry.CPUDispatcher) and obj.__module__ == mod.__name__:
            if len(obj.signatures) > 1:
                many.append(f"{name}.{attr}: {len(obj.signatures)} copies")
print("MANY:" + ";".join(many))
"""


def test_every_kernel_compiles_once_per_process(tmp_path):
    ws = make_workspace(tmp_path / "ws")
    # a compile cache of its own, empty: kernels found in a warm cache are not compiled
    # at all (nor the kernels they call), so a second copy could not show
    env = {**os.environ, "PYTHONPATH": str(ROOT), "NUMBA_CACHE_DIR": str(tmp_path / "nb")}
    done = subprocess.run([sys.executable, "-c", SCRIPT, str(ws)], env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    line = next(ln for ln in done.stdout.splitlines() if ln.startswith("MANY:"))
    assert line == "MANY:", line[len("MANY:"):].replace(";", "\n")
