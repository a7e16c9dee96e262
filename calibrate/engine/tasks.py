"""What a replay's worker runs on its share of the series (stage 5).

Kept apart from `calibrate.engine.replay` so that a worker process imports only numpy
and the compiled kernels, not pandas: about 70 MB less per worker.
"""

from __future__ import annotations

import numpy as np

from calibrate.decomposition.decompose import fence_scores, remainder_stream
from calibrate.detection.detectors import flatline_flags


def stream_task(shared: dict, task: tuple) -> tuple:
    """Expected values and fence quartiles of rows `rows` of one level and metric."""
    level, metric, rows, settings, windows = task
    values = shared[(level, metric)]
    out = []
    for r in rows:
        st = remainder_stream(values[r], settings, windows)
        out.append((st.expected, st.q1, st.q3))  # the remainder is value - expected
    return level, metric, rows, out


def tuning_task(shared: dict, task: tuple) -> tuple:
    """`stream_task` keeping only each (fence window, sides)'s `TuningHours` parts."""
    level, metric, rows, settings, windows, sides, flatlines, end, low = task
    values = shared[(level, metric)]
    out = []
    for r in rows:
        st = remainder_stream(values[r], settings, windows)
        value = values[r][:end]
        expected = st.expected[:end]
        remainder = value - expected  # as `Replayer.scores` derives it
        parts = {}
        for w in windows:
            q1, q3 = st.q1[w][:end], st.q3[w][:end]
            flat = {f: flatline_flags(value, expected, q3 - q1, f)[0] for f in flatlines}
            any_flat = np.logical_or.reduce([*flat.values(), np.zeros(end, dtype=bool)])
            for sd in sides:
                score = fence_scores(remainder, q1, q3, sd)
                with np.errstate(invalid="ignore"):
                    hours = np.flatnonzero((score > low) | any_flat)
                parts[(w, sd)] = (hours, score[hours], expected[hours],
                                  {f: fl[hours] for f, fl in flat.items()})
        out.append(parts)
    return level, metric, rows, out
