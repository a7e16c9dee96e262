"""Rolling validation over time (pipeline stage 7, beside the search).

The tuning weeks ``[first, split)`` are cut into ``folds + 1`` blocks of whole days. Fold
i is tuned on every hour before its test block (less a gap of whole days) and scored on
the block: time-ordered, never shuffled, so each fold's figures are out of sample for
the settings it chose. The folds' test blocks together give pooled out-of-sample
figures (`pooled_figures`); the final config is tuned on all tuning weeks as usual.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from typing import Any

import numpy as np

from calibrate.api import Session
from calibrate.detection.episodes import Episodes
from calibrate.errors import InputError
from calibrate.scoring.figures import Figures, figures
from calibrate.scoring.matching import match, period_filter
from calibrate.settings import DetectorConfig

DAY = 24


@dataclass
class Fold:
    """One rolling fold: tuned on ``[first_hour, train_end)``, scored on
    ``[test_start, test_end)`` with the settings it chose."""

    number: int
    train_end: int
    test_start: int
    test_end: int
    config: DetectorConfig | None = None
    feasible: bool = False
    figures: Figures | None = None
    settings: dict[str, Any] = field(default_factory=dict)


def fold_bounds(first: int, split: int, folds: int, gap_days: int) -> list[Fold]:
    """Time-ordered folds of the tuning hours ``[first, split)``.

    Raises
    ------
    InputError
        When a test block would be shorter than a day or a fold would have no day to
        tune on.
    """
    days = (split - first) // DAY
    block = days // (folds + 1)
    if block < 1:
        raise InputError("[search] folds", f"{folds} folds need at least {folds + 1} tuning "
                         f"days, but the tuning weeks have {days}")
    out = []
    for i in range(1, folds + 1):
        test_start = first + i * block * DAY
        test_end = split if i == folds else test_start + block * DAY
        train_end = test_start - gap_days * DAY
        if train_end - first < DAY:
            raise InputError("[search] gap_days", f"fold {i} would have less than a day to "
                             f"tune on (gap of {gap_days} days)")
        out.append(Fold(i, train_end, test_start, test_end))
    return out


def pooled_figures(ses: Session, folds: list[Fold], episodes: list[Episodes]) -> Figures:
    """Out-of-sample figures of all folds together: each fold's alerts raised in its own
    test block, against the incidents that start there (`scoring.figures.figures`)."""
    parts = [period_filter(ep, f.test_start, f.test_end)
             for f, ep in zip(folds, episodes, strict=True)]
    eps = Episodes(*[np.concatenate([getattr(p, c.name) for p in parts])
                     for c in fields(Episodes)])
    inc = period_filter(ses.incidents, folds[0].test_start, folds[-1].test_end)
    m = match(eps, inc, ses.ws.incidents.early_hours, ses.ws.incidents.late_hours)
    days = (folds[-1].test_end - folds[0].test_start) / DAY
    return figures(m, eps, inc, ses.analysts, days, goal=ses.ws.goal,
                   start_hour=folds[0].test_start, seed=ses.ws.search.seed)


def stability(folds: list[Fold]) -> dict[str, list[Any]]:
    """Each searched or solved setting's value in every fold (fold order)."""
    names = list(dict.fromkeys(k for f in folds for k in f.settings))
    return {n: [f.settings.get(n) for f in folds] for n in names}
