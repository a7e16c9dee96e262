"""The review page's HTTP API: token, verdicts in the retune format, added incidents,
plot data from the replay, and bad input refused with files untouched."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace
from urllib.parse import urlencode

import numpy as np
import pytest

from calibrate import api
from calibrate.engine.executors import SerialExecutor
from calibrate.errors import CalibrationError, InputError
from calibrate.feedback.retune import merged_frame, read_verdicts, retune
from calibrate.feedback.review import review_frame
from calibrate.feedback.review_app import running
from calibrate.feedback.review_data import ReviewError, open_review
from calibrate.inputs.incidents import incidents_from_frame, read_text_csv
from calibrate.scoring.matching import match
from tests.review_helpers import HOSTILE, Client, review_workspace, snapshot

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def ws(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return review_workspace(tmp_path_factory.mktemp("review-ws"))


@pytest.fixture(scope="module")
def page(ws: Path):
    """A running review of the workspace's [detector] alerts: (data, client)."""
    out = ws.parent / "out"
    out.mkdir()
    data = open_review(ws, verdicts=out / "reviewed.csv", incidents_out=out / "added.csv",
                       executor=SerialExecutor(), progress=False)
    with running(data) as url:
        yield data, Client(url)


def _files(data) -> dict:
    return snapshot(data.paths.verdicts, data.paths.incidents_out,
                    Path(data.ses.ws.incidents.path))


ENDPOINTS = [
    ("GET", "/", None),
    ("GET", "/static/review.js", None),
    ("GET", "/static/plotly.min.js", None),
    ("GET", "/api/meta", None),
    ("GET", "/api/alerts", None),
    ("GET", "/api/alerts/A000001", None),
    ("POST", "/api/alerts/A000001/verdict", {"verdict": "real"}),
    ("GET", "/api/series-list?level=campaign", None),
    ("GET", "/api/series?level=market&market=m1&metric=clicks", None),
    ("POST", "/api/incidents", {"level": "market", "keys": {"market": "m1"}, "metric": "",
                                "start": "2026-01-20T00:00:00Z",
                                "end": "2026-01-20T03:00:00Z"}),
    ("DELETE", "/api/incidents/N001", None),
]


@pytest.mark.parametrize("token", [None, "wrong-token"], ids=["no token", "wrong token"])
def test_every_request_without_the_token_is_refused(page, token) -> None:
    data, client = page
    before = _files(data)
    for method, path, body in ENDPOINTS:
        status, payload = client.call(method, path, body, token=token)
        assert status == 403, (method, path, status)
        assert "token" in payload["error"] and "\n" not in payload["error"]
        # the token in the query string works like the header
        if token is None and method == "GET":
            sep = "&" if "?" in path else "?"
            ok, _ = client.call(method, f"{path}{sep}token={client.token}", token=None)
            assert ok == 200, (path, ok)
    assert _files(data) == before


def test_verdicts_are_saved_at_once_in_the_retune_format(page, ws) -> None:
    data, client = page
    status, q = client.call("GET", "/api/alerts")
    assert status == 200
    a, b = q["alert_id"][3], q["alert_id"][7]
    st, res = client.call("POST", f"/api/alerts/{a}/verdict",
                          {"verdict": "real", "comment": "campaign paused, see ticket 12"})
    assert st == 200 and res["verdict"] == "real"
    st, res = client.call("POST", f"/api/alerts/{b}/verdict", {"verdict": "False"})
    assert st == 200 and res["verdict"] == "false"
    saved = read_text_csv(data.paths.verdicts)
    # the alerts-for-review columns plus verdict and comment, one row per alert
    ses = api.open_session(ws)
    rep = api.replay_session(ses, executor=SerialExecutor(), progress=False)
    expected = review_frame(rep.alerts_frame())
    assert list(saved.columns) == list(expected.columns)
    assert list(saved["alert_id"]) == list(expected["alert_id"])
    by_id = saved.set_index("alert_id")
    assert by_id.loc[a, "verdict"] == "real"
    assert by_id.loc[a, "comment"] == "campaign paused, see ticket 12"
    assert by_id.loc[b, "verdict"] == "false"  # the earlier verdict is kept
    assert (by_id["verdict"] != "").sum() == res["progress"]["reviewed"]
    # retune's own reader accepts the file and sees both verdicts
    v = read_verdicts(data.paths.verdicts, ses, rep)
    assert v.counts["real"] >= 1 and v.counts["false"] >= 1
    assert v.counts["real"] + v.counts["false"] + v.counts["duplicate"] == (
        res["progress"]["reviewed"])
    # a blank verdict clears one, and only that one
    st, res2 = client.call("POST", f"/api/alerts/{b}/verdict", {"verdict": ""})
    assert st == 200 and res2["progress"]["reviewed"] == res["progress"]["reviewed"] - 1
    assert read_text_csv(data.paths.verdicts).set_index("alert_id").loc[a, "verdict"] == "real"


@pytest.mark.parametrize("path, body, raw, status, says", [
    ("/api/alerts/A999999/verdict", {"verdict": "real"}, None, 404, "unknown alert id"),
    ("/api/alerts/A000001/verdict", {"verdict": "maybe"}, None, 400, "not a verdict"),
    ("/api/alerts/A000001/verdict", {"verdict": 1}, None, 400, "verdict must be text"),
    ("/api/alerts/A000001/verdict", {"comment": "x"}, None, 400, "verdict"),
    ("/api/alerts/A000001/verdict", {"verdict": "real", "comment": ["x"]}, None, 400,
     "comment must be text"),
    ("/api/alerts/A000001/verdict", {"verdict": "real", "comment": "x" * 2001}, None, 400,
     "longer than"),
    ("/api/alerts/A000001/verdict", None, b"{not json", 400, "not JSON"),
    ("/api/alerts/A000001/verdict", None, b"x" * 70_000, 413, "larger than"),
])
def test_bad_verdicts_get_a_4xx_and_leave_the_files(page, path, body, raw, status, says) -> None:
    data, client = page
    before = _files(data)
    st, payload = client.call("POST", path, body, raw=raw)
    assert st == status, payload
    assert says in payload["error"] and "\n" not in payload["error"]
    assert _files(data) == before


def _incident(**change):
    body = {"level": "campaign", "keys": {"market": "m1", "advertiser": "a1", "campaign": "c1"},
            "metric": "clicks", "start": "2026-01-20T00:00:00Z", "end": "2026-01-20T05:00:00Z",
            "note": "found in review"}
    body.update(change)
    return body


@pytest.mark.parametrize("body, status, says", [
    (_incident(end="2026-01-19T20:00:00Z"), 400, "must be after start"),
    (_incident(end="2026-01-20T00:00:00Z"), 400, "must be after start"),
    (_incident(keys={"market": "m1", "advertiser": "a9", "campaign": "c1"}), 404,
     "no series 'm1 / a9 / c1'"),
    (_incident(level="device"), 404, "unknown level 'device'"),
    (_incident(metric="revenue"), 400, "unknown metric 'revenue'"),
    (_incident(start="2026-01-20T00:30:00Z"), 400, "not on the hour"),
    (_incident(start="yesterday"), 400, "cannot read"),
    (_incident(start="2025-01-01T00:00:00Z"), 400, "outside the history"),
    (_incident(start="2026-01-21T15:00:00Z", end="2026-01-21T17:00:00Z",
               metric="impressions"), 409, "overlaps incident I1"),
    (_incident(note=5), 400, "note must be text"),
    ([1, 2], 400, "JSON object"),
])
def test_bad_incidents_get_a_4xx_and_leave_the_files(page, body, status, says) -> None:
    data, client = page
    before = _files(data)
    st, payload = client.call("POST", "/api/incidents", body)
    assert st == status, payload
    assert says in payload["error"] and "\n" not in payload["error"]
    assert _files(data) == before


@pytest.mark.parametrize("path, status, says", [
    ("/api/alerts/A999999", 404, "unknown alert id"),
    ("/api/series?level=market&market=nowhere&metric=clicks", 404, "no series 'nowhere'"),
    ("/api/series?level=region&market=m1&metric=clicks", 404, "unknown level"),
    ("/api/series?level=market&market=m1&metric=revenue", 404, "unknown metric"),
    ("/api/series-list?level=region", 404, "unknown level"),
    ("/static/secrets.txt", 404, "no static file"),
])
def test_unknown_things_get_404(page, path, status, says) -> None:
    data, client = page
    before = _files(data)
    st, payload = client.call("GET", path)
    assert st == status and says in payload["error"] and "\n" not in payload["error"]
    assert _files(data) == before
    st, payload = client.call("DELETE", "/api/incidents/NOPE")
    assert st == 404 and "no added incident" in payload["error"]


def test_plot_data_is_the_replay_of_the_config(page, ws) -> None:
    data, client = page
    ses = api.open_session(ws)
    rep = api.replay_session(ses, executor=SerialExecutor(), progress=False)
    scores = rep.scores_frame()
    q = {"level": "campaign", "market": HOSTILE, "advertiser": "a3", "campaign": "c1",
         "metric": "clicks"}
    st, d = client.call("GET", "/api/series?" + urlencode(q))
    assert st == 200 and d["label"] == f"{HOSTILE} / a3 / c1"
    rows = scores[(scores.level == "campaign") & (scores.market == HOSTILE)
                  & (scores.advertiser == "a3") & (scores.metric == "clicks")]
    idx = ses.history.hours.get_indexer(rows["hour"])
    main = d["main"]
    got = {k: np.array([np.nan if v is None else v for v in main[k]]) for k in
           ("value", "expected", "lower", "upper")}
    np.testing.assert_array_equal(got["value"][idx], rows["value"].to_numpy())
    np.testing.assert_array_equal(got["expected"][idx], rows["expected"].to_numpy())
    # fences in the value's units: expected value plus the remainder fences
    np.testing.assert_allclose(got["lower"][idx], (rows["expected"] + rows["lower"]).to_numpy(),
                               rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(got["upper"][idx], (rows["expected"] + rows["upper"]).to_numpy(),
                               rtol=1e-12, atol=1e-9)
    assert sorted(main["flagged"]) == sorted(idx[rows["flagged"].to_numpy()].tolist())
    # related: clicks sits in ctr = clicks / impressions, so both are beside it
    assert [r["metric"] for r in d["related"]] == ["ctr", "impressions"]
    s = data.find_series("campaign", q)
    ctr = ses.history.levels["campaign"].values["ctr"][s]
    assert d["related"][0]["watched"] is False
    got_ctr = np.array([np.nan if v is None else v for v in d["related"][0]["value"]])
    np.testing.assert_array_equal(got_ctr, ctr)
    assert [i["incident_id"] for i in d["incidents"]] == ["I3"]


def test_added_incidents_round_trip_and_resume(page, ws) -> None:
    data, client = page
    st, res = client.call("POST", "/api/incidents", _incident(note="<b>bold</b>, really"))
    assert st == 200, res
    iid = res["incident"]["incident_id"]
    added = read_text_csv(data.paths.incidents_out)
    assert list(added.columns) == ["incident_id", "level", "market", "advertiser", "campaign",
                                   "metric", "start", "end", "note"]
    ses = api.open_session(ws)
    inc = incidents_from_frame(added, ses.ws, ses.history, "added")
    row = list(added["incident_id"]).index(iid)
    assert (inc.level[row], inc.metric[row]) == ("campaign", "clicks")
    assert inc.end[row] - inc.start[row] == 5 and added["note"][row] == "<b>bold</b>, really"
    # the workspace's own incidents file is never written
    assert "N0" not in Path(ses.ws.incidents.path).read_text()
    # a new review of the same files resumes with the verdicts and the added incident
    st, q = client.call("GET", "/api/alerts")
    again = open_review(ws, verdicts=data.paths.verdicts, incidents_out=data.paths.incidents_out,
                        executor=SerialExecutor(), progress=False)
    assert again.queue()["verdict"] == q["verdict"]
    assert iid in list(again.added["incident_id"])
    st, res = client.call("DELETE", f"/api/incidents/{iid}")
    assert st == 200 and iid not in [r["incident_id"] for r in res["added"]]
    assert iid not in list(read_text_csv(data.paths.incidents_out)["incident_id"])


def test_a_file_changed_on_disk_is_not_overwritten(page) -> None:
    data, client = page
    client.call("POST", "/api/alerts/A000002/verdict", {"verdict": "duplicate"})
    path = data.paths.verdicts
    text = path.read_text(encoding="utf-8") + "\n"
    time.sleep(0.01)
    path.write_text(text, encoding="utf-8")  # someone saved it from a spreadsheet
    try:
        st, payload = client.call("POST", "/api/alerts/A000003/verdict", {"verdict": "real"})
        assert st == 409 and "changed on disk" in payload["error"]
        assert path.read_text(encoding="utf-8") == text
    finally:
        data.verdict_state = os.stat(path).st_ino, os.stat(path).st_size, \
            os.stat(path).st_mtime_ns


def test_inputs_are_never_outputs_and_foreign_verdicts_are_refused(ws, tmp_path) -> None:
    ses = api.open_session(ws)
    with pytest.raises(CalibrationError, match="incidents file; choose another"):
        open_review(ws, verdicts=tmp_path / "v.csv", incidents_out=ses.ws.incidents.path,
                    executor=SerialExecutor(), progress=False)
    # a verdicts file whose alert A000001 is another alert (made from other settings)
    rep = api.replay_session(ses, executor=SerialExecutor(), progress=False)
    f = review_frame(rep.alerts_frame())
    first = f.index[f["alert_id"] == "A000001"][0]
    f.loc[first, "start"] = "2026-01-06T00:00:00Z"
    f.loc[first, "verdict"] = "real"
    f.to_csv(tmp_path / "v.csv", index=False)
    with pytest.raises(InputError) as err:
        open_review(ws, verdicts=tmp_path / "v.csv", executor=SerialExecutor(), progress=False)
    assert str(err.value).startswith(f"{tmp_path / 'v.csv'} row {first + 2} column 'start'")
    f = review_frame(rep.alerts_frame())
    f.loc[5, "verdict"] = "perhaps"
    f.to_csv(tmp_path / "v.csv", index=False)
    with pytest.raises(InputError, match="row 7 column 'verdict'.*'perhaps' is not a verdict"):
        open_review(ws, verdicts=tmp_path / "v.csv", executor=SerialExecutor(), progress=False)


def test_cli_prints_the_url_and_serves_only_with_the_token(ws, tmp_path) -> None:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen(
        [sys.executable, "-m", "calibrate", "review", str(ws), "--verdicts",
         str(tmp_path / "v.csv"), "--no-browser", "--engine", "serial"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    try:
        url, deadline = None, time.monotonic() + 60
        while url is None and time.monotonic() < deadline and proc.poll() is None:
            line = proc.stdout.readline()
            if line.startswith("http://127.0.0.1:"):
                url = line.strip()
        assert url is not None, proc.stderr.read() if proc.poll() is not None else "no URL"
        assert re.fullmatch(r"http://127\.0\.0\.1:\d+/\?token=[\w-]{20,}", url)
        client = Client(url)
        assert client.call("GET", "/api/meta")[0] == 200
        assert client.call("GET", "/api/meta", token=None)[0] == 403
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)


def test_retune_takes_the_incidents_added_in_review(ws, tmp_path) -> None:
    ses = api.open_session(ws)
    rep = api.replay_session(ses, executor=SerialExecutor(), progress=False)
    alerts = rep.alerts_frame()
    uncovered = ~match(rep.episodes, ses.incidents, 1, 2).alert_true
    data = open_review(ws, verdicts=tmp_path / "v.csv", incidents_out=tmp_path / "added.csv",
                       executor=SerialExecutor(), progress=False)
    for p in np.flatnonzero(uncovered & (alerts["level"] == "campaign").to_numpy()):
        r = alerts.iloc[p]
        body = {"level": "campaign", "keys": {c: r[c] for c in ("market", "advertiser",
                                                                "campaign")},
                "metric": r["metric"], "start": r["start"], "end": r["end"], "note": "seen"}
        try:
            iid = data.add_incident(body)["incident"]["incident_id"]
        except ReviewError:
            continue  # overlaps a labelled incident: take another alert
        aid = r["alert_id"]
        break
    data.set_verdict(aid, "real", "the outage the labels missed")

    def same_config(ses, *, warm_start, **kw):
        return SimpleNamespace(config=warm_start[0], feasible=True, reason="", provenance={})

    res = retune(ses, tmp_path / "v.csv", None, 1, tuner=same_config,
                 executor=SerialExecutor(), added_incidents=tmp_path / "added.csv")
    # the added incident already covers the real alert (no labelled one does): no second
    # incident is made from the verdict
    assert res.verdicts.already_applied == [aid] and len(res.verdicts.new_incidents) == 0
    assert iid in res.incidents.incident_id.tolist()
    merged = merged_frame(res.session, res.verdicts, res.added)
    assert merged["incident_id"].tolist() == [*ses.incidents.incident_id.tolist(), iid]
