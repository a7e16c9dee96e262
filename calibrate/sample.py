"""Invented demo scenario: a complete, seeded sample workspace.

`generate_sample(out_dir)` writes ``history.parquet``, ``incidents.csv``,
``owners.csv`` and ``workspace.toml`` into `out_dir`; ``python -m calibrate.sample
OUT_DIR`` does the same from the command line.

The scenario is made up from start to finish. Every market, advertiser, campaign and
team name in it is invented for this demo and refers to no real company, brand,
person or place; no real data went into it. It describes online advertising in three
markets (Ostrelle, Varnholt, Mirrowden) with 8 advertisers each, 2 campaigns per
advertiser and 2 devices per campaign: 96 base series over 13 weeks of hours
(2026-03-02 00:00 UTC onwards, 2184 hours). Measures are impressions, clicks, spend
and revenue, with daily and weekly cycles in each market's local time, noise that
grows with volume and zero-heavy nights for small campaigns.

Not incidents (the detector should ideally stay quiet, but a tight one will not):
lasting budget changes at a few campaigns, one public holiday in Varnholt, a few
missing rows per series (the loader fills them with zeros) and slow organic trends.

Labelled incidents (40, none in the first 4 weeks so the detector can warm up):
traffic spikes, spend spikes, traffic drops, clicks flat at zero (tracking break),
full tracking outages, slow revenue-per-click drifts, click-through-rate collapses and
a revenue feed outage, at market, advertiser and campaign level, some obvious and some
subtle.
"""

from __future__ import annotations

import argparse
import csv
import io
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

START = pd.Timestamp("2026-03-02T00:00:00Z")  # a Monday
N_WEEKS = 13
N_HOURS = N_WEEKS * 168
WARMUP_HOURS = 4 * 168  # no incident before week 5
HOLDOUT_FRACTION = 0.25
KEY_COLUMNS = ("market", "advertiser", "campaign", "device")
MEASURES = ("impressions", "clicks", "spend", "revenue")
DEVICES = ("desktop", "mobile")
LEVELS = {
    "market": ("market",),
    "advertiser": ("market", "advertiser"),
    "campaign": ("market", "advertiser", "campaign"),
}

# market -> (UTC offset in hours, advertisers); all names invented
MARKETS: dict[str, tuple[int, tuple[str, ...]]] = {
    "Ostrelle": (1, (
        "Quillby Outdoor", "Brambleknot Teas", "Zennick Cycles", "Hollowmarsh Paints",
        "Pellworth Pet Care", "Tarnwick Shoes", "Dovrel Kitchenware", "Snibbet Games",
    )),
    "Varnholt": (3, (
        "Marrowick Bakery", "Glimmerfen Lamps", "Tovrin Luggage", "Kestlebury Garden",
        "Pindrake Stationery", "Rookhallow Knitwear", "Vellamy Ceramics", "Wrenlock Hardware",
    )),
    "Mirrowden": (-4, (
        "Ambervane Candles", "Corrowin Coffee", "Duskwillow Linens", "Gorsemere Optics",
        "Larkspindle Music", "Orrabel Skincare", "Quintmoor Furniture", "Thistlewhit Toys",
    )),
}
CAMPAIGN_SUFFIXES = ("always-on", "spring-sale")

# owners: market-level defaults, then advertiser rows (the most specific row wins)
TEAM_DEFAULTS = {"Ostrelle": "team-river", "Varnholt": "team-harbor"}
TEAM_OVERRIDES = {
    "Dovrel Kitchenware": "team-summit",
    "Snibbet Games": "team-summit",
    "Wrenlock Hardware": "team-river",
    "Ambervane Candles": "team-summit",
    "Corrowin Coffee": "team-harbor",
    "Duskwillow Linens": "team-summit",
    "Gorsemere Optics": "team-harbor",
    "Larkspindle Music": "team-summit",
    "Orrabel Skincare": "team-summit",
    "Quintmoor Furniture": "team-harbor",
    "Thistlewhit Toys": "team-summit",
}
ANALYSTS = {"team-river": 2, "team-harbor": 3, "team-summit": 2}

HOLIDAY_MARKET = "Varnholt"
HOLIDAY_DAY = 52  # day index from START: Thursday 2026-04-23 (local calendar day)
HOLIDAY_FACTOR = 0.55

# lasting budget changes (not incidents): (campaign index, day index, factor)
BUDGET_CHANGES = ((5, 12, 1.4), (22, 38, 0.7), (41, 47, 1.6), (30, 66, 0.55), (12, 80, 1.25))

# planned incidents: (level, kind, count)
INCIDENT_PLAN = (
    ("market", "outage", 1), ("market", "drop", 1), ("market", "revenue_flat", 1),
    ("market", "spike", 1),
    ("advertiser", "drop", 2), ("advertiser", "clicks_flat", 2),
    ("advertiser", "ctr_collapse", 2), ("advertiser", "spike", 2),
    ("advertiser", "outage", 1), ("advertiser", "drift", 1),
    ("campaign", "spike", 5), ("campaign", "spend_spike", 2), ("campaign", "drop", 5),
    ("campaign", "clicks_flat", 3), ("campaign", "outage", 3), ("campaign", "drift", 3),
    ("campaign", "ctr_collapse", 5),
)
KIND_METRIC = {
    "spike": "", "drop": "", "outage": "", "spend_spike": "spend", "clicks_flat": "clicks",
    "ctr_collapse": "ctr", "drift": "revenue", "revenue_flat": "revenue",
}

WORKSPACE_TOML = """\
# Sample workspace for the threshold calibration workbench.
# Invented demo scenario written by `python -m calibrate.sample` (seed {seed}):
# every market, advertiser, campaign and team name is made up; no real data.

# Hourly rows, one per base series (market > advertiser > campaign > device) and hour.
[history]
path = "history.parquet"
time_column = "hour"
key_columns = ["market", "advertiser", "campaign", "device"]

# Additive measures and how a missing hour is filled (a few rows are missing on purpose).
[measures]
impressions = "zero"
clicks = "zero"
spend = "zero"
revenue = "zero"

# Derived metrics, recomputed from the summed measures at every level.
[metrics]
ctr = "clicks / impressions"
cpc = "spend / clicks"
margin = "revenue - spend"

# Watched levels (key prefixes); the device level is left out to keep the demo fast.
[levels]
market = ["market"]
advertiser = ["market", "advertiser"]
campaign = ["market", "advertiser", "campaign"]

# Metrics the detector replays (cpc is derived but not watched).
[watch]
metrics = ["impressions", "clicks", "ctr", "spend", "revenue", "margin"]

# Labelled incidents; an alert may start up to 2 hours early or 6 hours late and still match.
[incidents]
path = "incidents.csv"
early_hours = 2
late_hours = 6

# Who looks at the alerts: owners map key prefixes to teams; analysts per team.
[teams]
owners = "owners.csv"
analysts = {{ "team-river" = 2, "team-harbor" = 3, "team-summit" = 2 }}

# What a tuned configuration must achieve. Hourly revenue here arrives per conversion and
# is sparse, so no setting of this detector stays within 4 alerts per analyst per day at
# this miss rate; try `calibrate tune ... --max-alerts-per-analyst-day 4` to see the
# tool say so and show the best trade-offs instead.
[goal]
max_miss_rate = 0.25
max_alerts_per_analyst_day = 15.0

# Today's detector settings: deliberately too tight, so tuning has something to improve.
[detector]
period_hours = 24
seasonal_span = 7
trend_span = 0
robust = false
weekly_period = false
decomposition_window_hours = 336
refit_every_hours = 1
expected_value = "fit"
fence_window_hours = 168
fence_multiplier = 1.5
quartile_method = "linear"
sides = "both"
flatline_hours = 6
min_impact = 0.0
combine = "any"

# Settings the tuner searches; the fence multiplier is solved within its range, and the
# minimum impact per watched metric, in that metric's own units: by default from 0 to the
# metric's typical hourly level on the tuning weeks. expected_value chooses between the
# fit that holds the hour ("fit") and a one-hour-ahead forecast from the fit ending just
# before it ("forecast"; README, "The detector, exactly").
# The last quarter of the history is held out to check the tuned settings.
[search]
expected_value = ["fit", "forecast"]
decomposition_window_hours = [336, 504]
seasonal_span = [7, 11, 15]
fence_window_hours = [72, 120, 168, 240]
flatline_hours = [0, 6, 10]
sides = ["both"]
fence_multiplier = {{ low = 1.0, high = 12.0 }}
trials = 40
holdout_fraction = 0.25
# A metric's own minimum-impact range, in its units, replaces the default, e.g.:
#   [search.groups.ctr]
#   min_impact = {{ low = 0.0, high = 0.02 }}
# To tune every setting per metric, add tune_by = "metric" above (the README's "How
# tuning works" says what that gained and cost on this data).
"""


@dataclass(frozen=True)
class Incident:
    """One labelled incident of the scenario (hours are indices from `START`)."""

    kind: str
    level: str
    market: str
    advertiser: str
    campaign: str
    metric: str
    start: int
    end: int
    magnitude: float
    note: str


@dataclass(frozen=True)
class _Series:
    """Key and static parameters of the base series."""

    keys: pd.DataFrame  # one row per base series, KEY_COLUMNS
    offset: np.ndarray  # market UTC offset (hours) per series
    campaign_index: np.ndarray  # campaign number per series (0..47)


def _base_series() -> _Series:
    rows: list[tuple[str, str, str, str]] = []
    offsets: list[int] = []
    camp: list[int] = []
    c = 0
    for market, (offset, advertisers) in MARKETS.items():
        for advertiser in advertisers:
            slug = advertiser.split()[0].lower()
            for suffix in CAMPAIGN_SUFFIXES:
                for device in DEVICES:
                    rows.append((market, advertiser, f"{slug}-{suffix}", device))
                    offsets.append(offset)
                    camp.append(c)
                c += 1
    keys = pd.DataFrame(rows, columns=list(KEY_COLUMNS))
    return _Series(keys=keys, offset=np.array(offsets), campaign_index=np.array(camp))


def _ar1(rng: np.random.Generator, n: int, sigma: float, phi: float,
         hours: int = N_HOURS) -> np.ndarray:
    """(n, hours) stationary AR(1) noise with marginal standard deviation `sigma`."""
    z = rng.standard_normal((n, hours)) * sigma * np.sqrt(1.0 - phi * phi)
    out = np.empty_like(z)
    out[:, 0] = rng.standard_normal(n) * sigma
    for t in range(1, hours):
        out[:, t] = phi * out[:, t - 1] + z[:, t]
    return out


def _daily_profile(local_hour: np.ndarray, evening: np.ndarray) -> np.ndarray:
    """Traffic shape over the local day: near zero at night, peaks by day / evening."""
    day = np.clip(0.5 - 0.5 * np.cos(2 * np.pi * (local_hour - 3.5) / 24.0), 0.0, None) ** 1.6
    eve = np.exp(-0.5 * ((local_hour - 20.5) / 1.8) ** 2)
    return 0.015 + day + evening * eve


def _series_mask(keys: pd.DataFrame, inc: Incident) -> np.ndarray:
    mask = (keys["market"] == inc.market).to_numpy(copy=True)
    if inc.level in ("advertiser", "campaign"):
        mask &= (keys["advertiser"] == inc.advertiser).to_numpy()
    if inc.level == "campaign":
        mask &= (keys["campaign"] == inc.campaign).to_numpy()
    return mask


def _draw_incident(
    rng: np.random.Generator, level: str, kind: str, start: int, keys: pd.DataFrame,
    market: str | None = None,
) -> Incident:
    """Draw entity, duration and magnitude of one incident starting at hour `start`.

    A given `market` is kept (and an entity inside it drawn); else any series is drawn.
    """
    pool = keys if market is None else keys[keys["market"] == market]
    row = pool.iloc[int(rng.integers(len(pool)))]
    market = str(row["market"])
    advertiser = str(row["advertiser"]) if level != "market" else ""
    campaign = str(row["campaign"]) if level == "campaign" else ""
    subtle = rng.random() < 0.3
    if kind == "spike":
        dur = int(rng.integers(2, 6))
        mag = float(rng.uniform(1.8, 2.5) if subtle or level == "market" else rng.uniform(3.0, 6.0))
        note = f"traffic spike: all measures x{mag:.1f} for {dur} h"
    elif kind == "spend_spike":
        dur = int(rng.integers(3, 9))
        mag = float(rng.uniform(2.5, 5.0))
        note = f"bid misconfiguration: cost per click x{mag:.1f}, spend up for {dur} h"
    elif kind == "drop":
        dur = int(rng.integers(3, 25)) if level != "market" else 6
        mag = float(rng.uniform(0.5, 0.65) if subtle else rng.uniform(0.1, 0.4))
        note = f"delivery drop: traffic down to {mag:.0%} of normal for {dur} h"
    elif kind == "outage":
        dur = int(rng.integers(3, 9)) if level != "market" else 3
        mag = 0.0
        note = f"tracking outage: all measures 0 for {dur} h"
    elif kind == "clicks_flat":
        dur = int(rng.integers(8, 15))
        mag = 0.0
        note = f"click tracking break: clicks (and billed spend) 0 for {dur} h, impressions normal"
    elif kind == "revenue_flat":
        dur = int(rng.integers(6, 11))
        mag = 0.0
        note = f"revenue feed outage: revenue 0 for {dur} h"
    elif kind == "ctr_collapse":
        dur = int(rng.integers(4, 17))
        mag = float(rng.uniform(0.55, 0.7) if subtle else rng.uniform(0.15, 0.4))
        note = f"broken creative: click-through rate down to {mag:.0%} for {dur} h"
    elif kind == "drift":
        days = int(rng.integers(6, 11))
        dur = days * 24
        mag = float(rng.uniform(0.02, 0.05))
        note = f"tag regression: revenue per click sinking {mag:.0%} per day for {days} days"
    else:  # pragma: no cover - plan only names the kinds above
        raise ValueError(kind)
    return Incident(
        kind=kind, level=level, market=market, advertiser=advertiser, campaign=campaign,
        metric=KIND_METRIC[kind], start=start, end=start + dur, magnitude=mag, note=note,
    )


def _schedule_incidents(rng: np.random.Generator, s: _Series) -> list[Incident]:
    """Spread the planned incidents over weeks 5..13 without overlaps on shared series."""
    plan = [(lvl, kind) for lvl, kind, n in INCIDENT_PLAN for _ in range(n)]
    order = rng.permutation(len(plan))
    lo, hi = WARMUP_HOURS + 12, N_HOURS - 24
    width = (hi - lo) / len(plan)
    budget_spots = [
        (s.campaign_index == c, day * 24) for c, day, _ in BUDGET_CHANGES
    ]
    holiday_mask = (s.keys["market"] == HOLIDAY_MARKET).to_numpy()
    hol = (HOLIDAY_DAY * 24 - 6, HOLIDAY_DAY * 24 + 30)
    placed: list[tuple[Incident, np.ndarray]] = []
    for slot, idx in enumerate(order):
        level, kind = plan[idx]
        for attempt in range(2000):
            if attempt < 1000:
                start = int(lo + slot * width + rng.integers(int(width)))
            else:
                start = int(rng.integers(lo, hi))
            want = None
            if level == "market":  # spread market-wide incidents over the markets
                used = [o.market for o, _ in placed if o.level == "market"]
                fewest = min(used.count(m) for m in MARKETS)
                choices = [m for m in MARKETS if used.count(m) == fewest]
                want = choices[int(rng.integers(len(choices)))]
            inc = _draw_incident(rng, level, kind, start, s.keys, market=want)
            mask = _series_mask(s.keys, inc)
            local = (start + int(s.offset[mask][0])) % 24
            if kind not in ("outage", "revenue_flat") and not 7 <= local <= 19:
                continue
            if inc.end > hi:
                continue
            a, b = inc.start - 24, inc.end + 24
            clash = any(
                (mask & m).any() and a < o.end and o.start < b for o, m in placed
            )
            clash |= any((mask & m).any() and a < h < b for m, h in budget_spots)
            clash |= bool((mask & holiday_mask).any()) and a < hol[1] and hol[0] < b
            if not clash:
                placed.append((inc, mask))
                break
        else:  # pragma: no cover - the plan leaves plenty of room
            raise RuntimeError(f"could not place a {level} {kind} incident")
    return sorted((inc for inc, _ in placed), key=lambda i: (i.start, i.level, i.market))


def _simulate(rng: np.random.Generator, s: _Series, incidents: list[Incident]) -> pd.DataFrame:
    """Hourly measures for every base series, with incidents applied."""
    n = len(s.keys)
    n_camp = int(s.campaign_index.max()) + 1
    n_adv = n_camp // 2
    adv_index = s.campaign_index // 2
    market_index = pd.factorize(s.keys["market"])[0]
    mobile = (s.keys["device"] == "mobile").to_numpy()

    # static parameters: campaigns, advertisers, devices
    camp_volume = np.exp(rng.normal(np.log(900.0), 1.2, n_camp)).clip(15.0, 30000.0)
    mobile_share = rng.uniform(0.35, 0.7, n_camp)
    share = np.where(mobile, mobile_share[s.campaign_index], 1.0 - mobile_share[s.campaign_index])
    base_imp = camp_volume[s.campaign_index] * share
    ctr = rng.uniform(0.006, 0.04, n_camp)[s.campaign_index] * np.where(mobile, 0.8, 1.0)
    cpc = rng.uniform(0.25, 1.8, n_camp)[s.campaign_index] * np.where(mobile, 0.85, 1.0)
    conv_rate = rng.uniform(0.02, 0.08, n_camp)[s.campaign_index]
    roas = rng.uniform(1.1, 1.9, n_camp)[s.campaign_index]
    order_value = roas * cpc / conv_rate
    weekend = rng.uniform(0.65, 1.25, n_adv)[adv_index]
    evening = rng.uniform(0.0, 0.6, n_adv)[adv_index] * np.where(mobile, 1.5, 0.7)
    growth = rng.normal(0.0, 0.01, n_camp)[s.campaign_index]  # per week, log scale

    # time structure in each market's local time
    t = np.arange(N_HOURS)
    local = t[None, :] + s.offset[:, None]
    local_hour = local % 24
    local_day = local // 24
    weekday = local_day % 7  # START is a Monday
    profile = _daily_profile(local_hour, evening[:, None])
    profile /= profile.mean(axis=1, keepdims=True)
    week = np.where(weekday >= 5, weekend[:, None], 1.0)
    trend = np.exp(growth[:, None] * t[None, :] / 168.0)
    imp_mult = np.ones((n, N_HOURS))
    for c, day, factor in BUDGET_CHANGES:
        imp_mult[s.campaign_index == c, day * 24:] *= factor
    holiday = (s.keys["market"] == HOLIDAY_MARKET).to_numpy()[:, None] & (local_day == HOLIDAY_DAY)
    imp_mult[holiday] *= HOLIDAY_FACTOR
    noise = np.exp(_ar1(rng, n, 0.09, 0.6) + _ar1(rng, 3, 0.04, 0.95)[market_index])

    # incident effects
    ctr_mult = np.ones((n, N_HOURS))
    cpc_mult = np.ones((n, N_HOURS))
    rpc_mult = np.ones((n, N_HOURS))
    zero_all = np.zeros((n, N_HOURS), dtype=bool)
    zero_clicks = np.zeros((n, N_HOURS), dtype=bool)
    zero_revenue = np.zeros((n, N_HOURS), dtype=bool)
    for inc in incidents:
        m = _series_mask(s.keys, inc)
        w = slice(inc.start, inc.end)
        if inc.kind in ("spike", "drop"):
            imp_mult[m, w] *= inc.magnitude
        elif inc.kind == "spend_spike":
            cpc_mult[m, w] *= inc.magnitude
        elif inc.kind == "ctr_collapse":
            ctr_mult[m, w] *= inc.magnitude
        elif inc.kind == "drift":
            days = np.arange(inc.end - inc.start) / 24.0
            rpc_mult[m, w] *= (1.0 - inc.magnitude) ** days
        elif inc.kind == "outage":
            zero_all[m, w] = True
        elif inc.kind == "clicks_flat":
            zero_clicks[m, w] = True
        elif inc.kind == "revenue_flat":
            zero_revenue[m, w] = True

    ctr_t = ctr[:, None] * (1.0 + 0.12 * np.cos(2 * np.pi * (local_hour - 21) / 24.0))
    lam = base_imp[:, None] * profile * week * trend * imp_mult * noise
    impressions = rng.poisson(lam)
    clicks = rng.binomial(impressions, np.clip(ctr_t * ctr_mult, 0.0, 1.0))
    # spend: sum of per-click costs (Gamma with shape 4 per click)
    shape = clicks * 4.0
    spend = np.where(
        clicks > 0,
        rng.gamma(np.maximum(shape, 1e-9), (cpc[:, None] * cpc_mult) / 4.0),
        0.0,
    )
    conversions = rng.binomial(clicks, conv_rate[:, None] * np.ones((1, N_HOURS)))
    revenue = np.where(
        conversions > 0,
        rng.gamma(np.maximum(conversions * 2.0, 1e-9), order_value[:, None] * rpc_mult / 2.0),
        0.0,
    )
    clicks = np.where(zero_clicks, 0, clicks)
    spend = np.where(zero_clicks, 0.0, spend)  # spend is billed per tracked click
    revenue = np.where(zero_revenue, 0.0, revenue)
    impressions = np.where(zero_all, 0, impressions)
    clicks = np.where(zero_all, 0, clicks)
    spend = np.where(zero_all, 0.0, spend)
    revenue = np.where(zero_all, 0.0, revenue)

    # long frame, ordered by series then hour; drop a handful of rows per series
    keep = np.ones((n, N_HOURS), dtype=bool)
    n_drop = np.minimum(rng.poisson(1.2, n), 4)
    for i in range(n):
        keep[i, rng.choice(np.arange(1, N_HOURS - 1), size=int(n_drop[i]), replace=False)] = False
    series_idx, hour_idx = np.nonzero(keep)
    hours = pd.date_range(START, periods=N_HOURS, freq="h").as_unit("us")
    frame = s.keys.iloc[series_idx].reset_index(drop=True)
    frame.insert(0, "hour", hours[hour_idx])
    frame["impressions"] = impressions[keep].astype(np.int64)
    frame["clicks"] = clicks[keep].astype(np.int64)
    frame["spend"] = np.round(spend[keep], 2)
    frame["revenue"] = np.round(revenue[keep], 2)
    return frame


def _atomic_write(path: Path, data: bytes) -> None:
    """Write `data` to `path` through a temporary file in the same folder and os.replace."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _csv_bytes(header: list[str], rows: list[list[str]]) -> bytes:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return buf.getvalue().encode("utf-8")


def _iso(hour: int) -> str:
    return (START + pd.Timedelta(hours=hour)).strftime("%Y-%m-%dT%H:%M:%SZ")


def incidents_frame(incidents: list[Incident]) -> pd.DataFrame:
    """Incidents as rows of the incidents CSV contract (strings, blanks as '').

    Parameters
    ----------
    incidents : list of Incident
        Scenario incidents, ordered by start.
    """
    rows = [
        {
            "incident_id": f"INC-{i:03d}", "level": inc.level, "market": inc.market,
            "advertiser": inc.advertiser, "campaign": inc.campaign, "metric": inc.metric,
            "start": _iso(inc.start), "end": _iso(inc.end), "note": inc.note,
        }
        for i, inc in enumerate(incidents, start=1)
    ]
    return pd.DataFrame(rows, columns=[
        "incident_id", "level", "market", "advertiser", "campaign", "metric", "start", "end",
        "note",
    ])


def build_scenario(seed: int = 7) -> tuple[pd.DataFrame, list[Incident]]:
    """Simulate the scenario in memory.

    Parameters
    ----------
    seed : int
        Seed of the numpy random generator.

    Returns
    -------
    history : pandas.DataFrame
        Hourly rows (hour, key columns, measures), a few rows missing per series.
    incidents : list of Incident
        The labelled incidents, ordered by start.
    """
    rng = np.random.default_rng(seed)
    series = _base_series()
    incidents = _schedule_incidents(rng, series)
    history = _simulate(rng, series, incidents)
    return history, incidents


def generate_sample(out_dir: Path, seed: int = 7) -> Path:
    """Write the sample workspace into `out_dir`.

    Parameters
    ----------
    out_dir : Path
        Target folder (created if missing); existing sample files are replaced.
    seed : int
        Seed of the numpy random generator; the same seed gives the same bytes.

    Returns
    -------
    Path
        Path of the written ``workspace.toml``.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    history, incidents = build_scenario(seed)

    table = pa.Table.from_pandas(history, preserve_index=False)
    buf = pa.BufferOutputStream()
    pq.write_table(table, buf, compression="zstd", use_dictionary=True)
    _atomic_write(out_dir / "history.parquet", buf.getvalue().to_pybytes())

    inc = incidents_frame(incidents)
    _atomic_write(
        out_dir / "incidents.csv", _csv_bytes(list(inc.columns), inc.to_numpy().tolist())
    )

    owners: list[list[str]] = [[m, "", "", team] for m, team in TEAM_DEFAULTS.items()]
    for market, (_, advertisers) in MARKETS.items():
        owners += [[market, a, "", TEAM_OVERRIDES[a]] for a in advertisers if a in TEAM_OVERRIDES]
    owner_header = ["market", "advertiser", "campaign", "team"]
    _atomic_write(out_dir / "owners.csv", _csv_bytes(owner_header, owners))

    path = out_dir / "workspace.toml"
    _atomic_write(path, WORKSPACE_TOML.format(seed=seed).encode("utf-8"))
    return path


def main(argv: list[str] | None = None) -> int:
    """Command line: ``python -m calibrate.sample OUT_DIR [--seed N]``."""
    parser = argparse.ArgumentParser(
        prog="python -m calibrate.sample", description="Write the invented sample workspace."
    )
    parser.add_argument("out_dir", type=Path, help="folder to write the workspace into")
    parser.add_argument("--seed", type=int, default=7, help="random seed (default 7)")
    args = parser.parse_args(argv)
    path = generate_sample(args.out_dir, seed=args.seed)
    print(path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
