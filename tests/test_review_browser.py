"""The review page in a real browser: headless Chromium from the OS, driven by Playwright.

Marks three alerts (a button, then keys), adds an incident by selecting hours on a
plot, reloads and finds both kept, then re-tunes from the verdicts file the page wrote.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from calibrate import api
from calibrate.engine.executors import SerialExecutor
from calibrate.feedback.retune import retune
from calibrate.feedback.review_app import running
from calibrate.feedback.review_data import open_review
from calibrate.inputs.incidents import incidents_from_frame, read_text_csv
from tests.review_helpers import HOSTILE, review_workspace

sync_api = pytest.importorskip("playwright.sync_api")
CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"


@pytest.fixture(scope="module")
def browser():
    if not Path(CHROMIUM).exists():
        pytest.skip("no chromium: `apt-get install chromium` (.ci/run does it)")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=["--no-sandbox"])
        try:
            yield b
        finally:
            b.close()


def _current(page) -> str:
    return page.locator(".alert-row.current").get_attribute("data-alert-id")


def _next_current(page, after: str) -> str:
    page.wait_for_function(
        "id => { const r = document.querySelector('.alert-row.current');"
        " return r && r.dataset.alertId !== id; }", arg=after)
    return _current(page)


def _row_verdict(page, alert_id: str, verdict: str) -> None:
    page.wait_for_selector(f'.alert-row[data-alert-id="{alert_id}"][data-verdict="{verdict}"]',
                           state="attached")


def test_mark_alerts_add_an_incident_reload_and_retune(browser, tmp_path: Path) -> None:
    ws = review_workspace(tmp_path / "ws")
    verdicts, added = tmp_path / "reviewed.csv", tmp_path / "added-incidents.csv"
    data = open_review(ws, verdicts=verdicts, incidents_out=added, executor=SerialExecutor(),
                       progress=False)
    dialogs: list[str] = []
    with running(data) as url:
        page = browser.new_page(viewport={"width": 1280, "height": 900})
        page.set_default_timeout(15_000)
        page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
        page.goto(url)
        page.wait_for_selector("body[data-ready='1']")
        # a series named like a script shows as text and runs nothing
        heads = page.locator(".group-head b").all_inner_texts()
        assert any(h.startswith(HOSTILE) for h in heads)
        assert page.locator("#queue script").count() == 0

        # three verdicts: a button, a key, and a comment then a key
        first = _current(page)
        page.click('#verdict-bar [data-verdict="real"]')
        _row_verdict(page, first, "real")
        second = _next_current(page, first)
        page.keyboard.press("f")
        _row_verdict(page, second, "false")
        third = _next_current(page, second)
        page.keyboard.press("c")
        page.keyboard.type("same drop as the one before")
        page.keyboard.press("Escape")
        page.keyboard.press("d")
        _row_verdict(page, third, "duplicate")
        assert page.inner_text("#progress-text").startswith("3 of ")

        # an incident: select a range of hours on the main plot
        _next_current(page, third)
        page.wait_for_function("document.querySelector('#plot-main .nsewdrag') !== null")
        page.keyboard.press("i")
        box = page.locator("#plot-main .nsewdrag").bounding_box()
        y = box["y"] + box["height"] / 2
        page.mouse.move(box["x"] + box["width"] * 0.30, y)
        page.mouse.down()
        page.mouse.move(box["x"] + box["width"] * 0.38, y, steps=5)
        page.mouse.move(box["x"] + box["width"] * 0.45, y, steps=5)
        page.mouse.up()
        page.wait_for_selector("#incident-form:not([hidden])")
        start, end = page.input_value("#inc-start"), page.input_value("#inc-end")
        assert start < end
        page.fill("#inc-note", "nobody labelled this")
        page.click("#inc-save")
        page.wait_for_selector("#added-list li[data-incident-id]")
        iid = page.get_attribute("#added-list li[data-incident-id]", "data-incident-id")

        # reload: the verdicts and the incident are still there, and the page resumes
        # at an alert not reviewed yet
        page.reload()
        page.wait_for_selector("body[data-ready='1']")
        assert _current(page) not in (first, second, third)
        assert page.inner_text("#progress-text").startswith("3 of ")
        page.select_option("#f-status", "")
        for aid, v in ((first, "real"), (second, "false"), (third, "duplicate")):
            _row_verdict(page, aid, v)
        assert page.locator(f'#added-list li[data-incident-id="{iid}"]').count() == 1
        page.close()
    assert dialogs == []

    saved = read_text_csv(verdicts).set_index("alert_id")
    assert saved.loc[[first, second, third], "verdict"].tolist() == ["real", "false",
                                                                    "duplicate"]
    assert saved.loc[third, "comment"] == "same drop as the one before"
    assert (saved["verdict"] != "").sum() == 3
    inc = read_text_csv(added)
    assert inc["incident_id"].tolist() == [iid]
    assert (inc["start"][0], inc["end"][0], inc["note"][0]) == (start, end,
                                                                "nobody labelled this")
    ses = api.open_session(ws)
    incidents_from_frame(inc, ses.ws, ses.history, str(added))  # a valid incidents file

    res = retune(ses, verdicts, None, 2, executor=SerialExecutor())
    c = res.verdicts.counts
    assert (c["real"], c["false"], c["duplicate"]) == (1, 1, 1)
    assert res.verdicts.false_alert_ids == [second]
    assert len(res.verdicts.new_incidents) + len(res.verdicts.already_applied) == 1
