"""A small invented workspace for end-to-end tests (not check values: those come
from outside references; this only exercises the whole pipeline quickly).

2 markets x 2 advertisers x 1 campaign, 5 weeks hourly, daily cycle, plus
injected incidents: three clear spikes and one clear drop that a sensible fence
catches, and one subtle bump that only a loose fence catches.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

START = pd.Timestamp("2026-01-05T00:00:00Z")
HOURS = 24 * 7 * 5


def make_workspace(
    root: Path,
    *,
    goal_miss: float = 0.25,
    budget: float = 3.0,
    detector: str = "",
    search: str = "",
    seed: int = 1,
) -> Path:
    """Write workspace.toml, history.csv, incidents.csv, owners.csv under `root`."""
    root.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    t = np.arange(HOURS)
    hours = START + pd.to_timedelta(t, unit="h")
    rows = []
    keys = [("m1", "a1", "c1"), ("m1", "a2", "c1"), ("m2", "a3", "c1"), ("m2", "a4", "c1")]
    incidents = []
    for j, (m, a, c) in enumerate(keys):
        base = 400 + 100 * j
        imp = base * (1 + 0.6 * np.sin(2 * np.pi * (t - 6) / 24)) + rng.normal(0, 15, HOURS)
        imp = np.maximum(imp, 5)
        clicks = imp * 0.05 + rng.normal(0, 1.0, HOURS)
        rows.append((m, a, c, imp, np.maximum(clicks, 0)))
    # incidents at campaign level from week 3 on (warm-up for a 336-hour window)
    spec = [
        (0, "impressions", 400, 3, 4.0),
        (1, "impressions", 520, 4, 0.2),
        (2, "clicks", 610, 3, 4.0),
        (3, "impressions", 700, 2, 3.5),
        (1, "clicks", 780, 4, 1.35),  # subtle
    ]
    for n, (s, metric, at, length, factor) in enumerate(spec):
        m, a, c, imp, clicks = rows[s]
        if metric == "impressions":
            imp[at : at + length] *= factor
            clicks[at : at + length] *= factor
        else:
            clicks[at : at + length] *= factor
        incidents.append(
            dict(
                incident_id=f"I{n + 1}",
                level="campaign",
                market=m,
                advertiser=a,
                campaign=c,
                metric=metric,
                start=_iso(hours[at]),
                end=_iso(hours[at + length]),
                note="injected",
            )
        )
    frames = []
    for m, a, c, imp, clicks in rows:
        frames.append(
            pd.DataFrame(
                {
                    "hour": [_iso(h) for h in hours],
                    "market": m,
                    "advertiser": a,
                    "campaign": c,
                    "impressions": np.round(imp, 3),
                    "clicks": np.round(clicks, 3),
                }
            )
        )
    pd.concat(frames).to_csv(root / "history.csv", index=False)
    pd.DataFrame(incidents).to_csv(root / "incidents.csv", index=False)
    pd.DataFrame(
        {
            "market": ["m1", "m2"],
            "advertiser": ["", ""],
            "campaign": ["", ""],
            "team": ["blue", "green"],
        }
    ).to_csv(root / "owners.csv", index=False)
    text = f"""
[history]
path = "history.csv"
time_column = "hour"
key_columns = ["market", "advertiser", "campaign"]

[measures]
impressions = "zero"
clicks = "zero"

[metrics]
ctr = "clicks / impressions"

[levels]
market = ["market"]
campaign = ["market", "advertiser", "campaign"]

[watch]
metrics = ["impressions", "clicks"]

[incidents]
path = "incidents.csv"
early_hours = 1
late_hours = 2

[teams]
owners = "owners.csv"
analysts = {{ blue = 1, green = 1 }}

[goal]
max_miss_rate = {goal_miss}
max_alerts_per_analyst_day = {budget}

[detector]
period_hours = 24
seasonal_span = 7
decomposition_window_hours = 168
fence_window_hours = 72
fence_multiplier = 1.0
flatline_hours = 0
{detector}

[search]
{search or "fence_window_hours = [48, 72]" + chr(10) + "trials = 6"}
"""
    path = root / "workspace.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _iso(ts: pd.Timestamp) -> str:
    return ts.strftime("%Y-%m-%dT%H:%M:%SZ")
