"""Review page speed with 10,000 alerts: queue interactive < 2 s, one alert's detail < 200 ms.

No reference: every figure is a latency against its target. Builds an invented
workspace (183 series x 2 metrics x 5 weeks) whose detector, set loose on purpose,
raises at least 10,000 alerts, serves the review page on 127.0.0.1 from this process
and measures, `--runs` times (at least 3), printing the median and range:

- queue interactive: from navigation to the queue rendered (every alert row in the
  page) and to the first alert's plots drawn, in headless Chromium (a fresh page each run);
- one alert's detail: the time to serve ``GET /api/alerts/{id}`` (plot data of the
  series and its related metrics), median and worst of 40 alerts spread over the queue
  (each run's median and worst, then their median and range over the runs);
- a click on an alert far down the queue until its detail and plots are drawn.

The server and the browser share the machine's cores with nothing else this script runs.

    python tests/benchmarks/bench_review.py [--runs 3]

(needs /usr/bin/chromium and playwright).
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _repeat import add_runs_flag, spread  # noqa: E402

from calibrate import api  # noqa: E402
from calibrate.engine.executors import SerialExecutor  # noqa: E402
from calibrate.engine.replay import sweep  # noqa: E402
from calibrate.feedback.review_app import running  # noqa: E402
from calibrate.feedback.review_data import open_review  # noqa: E402

TARGET = 10_000
HOURS = 24 * 7 * 5
WORKSPACE = """
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
advertiser = ["market", "advertiser"]
campaign = ["market", "advertiser", "campaign"]
[watch]
metrics = ["impressions", "clicks"]
[teams]
owners = "owners.csv"
analysts = {{ north = 3, south = 3, west = 3 }}
[detector]
period_hours = 24
seasonal_span = 7
decomposition_window_hours = 168
fence_window_hours = 72
fence_multiplier = {k}
flatline_hours = 0
"""


def make(root: Path) -> Path:
    rng = np.random.default_rng(3)
    t = np.arange(HOURS)
    hours = pd.date_range("2026-03-02", periods=HOURS, freq="h", tz="UTC")
    frames = []
    for m, market in enumerate(("north", "south", "west")):
        for a in range(10):
            for c in range(5):
                base = 200 + 40 * ((m * 50 + a * 5 + c) % 13)
                imp = np.maximum(base * (1 + 0.5 * np.sin(2 * np.pi * (t - 5) / 24))
                                 + rng.normal(0, 12, HOURS), 1)
                clicks = np.maximum(imp * 0.04 + rng.normal(0, 1.5, HOURS), 0)
                frames.append(pd.DataFrame({
                    "hour": hours.strftime("%Y-%m-%dT%H:%M:%SZ"), "market": market,
                    "advertiser": f"{market}-adv{a}", "campaign": f"c{c}",
                    "impressions": imp.round(2), "clicks": clicks.round(2)}))
    pd.concat(frames).to_csv(root / "history.csv", index=False)
    pd.DataFrame({"market": ["north", "south", "west"], "advertiser": "", "campaign": "",
                  "team": ["north", "south", "west"]}).to_csv(root / "owners.csv", index=False)
    (root / "workspace.toml").write_text(WORKSPACE.format(k=1.0), encoding="utf-8")
    # the largest multiplier (of a grid) that still raises TARGET alerts
    ses = api.open_session(root)
    rp = api.make_replayer(ses, executor=SerialExecutor(), progress=False)
    ks = np.round(np.arange(0.3, 2.0, 0.05), 2)
    counts = np.bincount(sweep(rp.scores(ses.ws.detector), ks).grid, minlength=len(ks))
    k = float(ks[np.flatnonzero(counts >= TARGET)].max())
    (root / "workspace.toml").write_text(WORKSPACE.format(k=k), encoding="utf-8")
    return root / "workspace.toml"


def detail_times(base: str, token: str, ids: list[str]) -> list[float]:
    out = []
    for aid in ids:
        req = urllib.request.Request(f"{base}/api/alerts/{aid}",
                                     headers={"X-Review-Token": token})
        t0 = time.perf_counter()
        with urllib.request.urlopen(req, timeout=10) as res:
            res.read()
        out.append(time.perf_counter() - t0)
    return out


def main() -> None:
    from playwright.sync_api import sync_playwright

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_runs_flag(ap)
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        ws = make(root)
        data = open_review(ws, verdicts=root / "reviewed.csv", executor=SerialExecutor(),
                           progress=False)
        n = data.progress()["total"]
        print(f"{n} alerts in the queue")
        ids = data.queue()["alert_id"]
        sample = [ids[i] for i in np.linspace(0, n - 1, 40).astype(int)]
        with running(data) as url, sync_playwright() as p:
            base, token = url.split("/?token=")
            browser = p.chromium.launch(executable_path="/usr/bin/chromium")
            queue, ready, click, med, worst = [], [], [], [], []
            for _ in range(args.runs):
                page = browser.new_page(viewport={"width": 1400, "height": 900})
                t = time.perf_counter()
                page.goto(url)
                page.wait_for_selector("body[data-queue-ready='1']", state="attached",
                                       timeout=30_000)
                queue.append(time.perf_counter() - t)
                page.wait_for_selector("body[data-ready='1']", state="attached",
                                       timeout=30_000)
                ready.append(time.perf_counter() - t)
                rows = page.locator(".alert-row").count()
                assert rows == n, (rows, n)
                far = page.locator(".alert-row").nth(n - 10)
                aid = far.get_attribute("data-alert-id")
                t = time.perf_counter()
                far.click()
                page.wait_for_function("id => document.body.dataset.shown === id", arg=aid,
                                       timeout=10_000)
                click.append(time.perf_counter() - t)
                page.close()
                times = detail_times(base, token, sample)
                med.append(statistics.median(times))
                worst.append(max(times))
            browser.close()
    print(f"queue rendered and painted ({n} rows): {spread(queue).fmt('.2f', 's')} "
          "(target < 2 s)")
    print(f"first alert's plots drawn: {spread(ready).fmt('.2f', 's')}")
    print(f"click far down the queue until its detail and plots are drawn: "
          f"{spread(click).fmt(',.0f', 'ms', 1e3)}")
    print(f"one alert's detail served, each run's median of 40 alerts: "
          f"{spread(med).fmt(',.0f', 'ms', 1e3)}; each run's worst of 40: "
          f"{spread(worst).fmt(',.0f', 'ms', 1e3)} (target < 200 ms)")

if __name__ == "__main__":
    main()
