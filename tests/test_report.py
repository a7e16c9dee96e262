"""The calibration report: content equals the scoring functions, files are self-contained."""

from __future__ import annotations

import base64
import copy
import html
import io
import json
from html.parser import HTMLParser
from pathlib import Path
from types import SimpleNamespace

import matplotlib.image
import numpy as np
import pandas as pd
import pytest

from calibrate import api
from calibrate.engine.executors import SerialExecutor
from calibrate.errors import CalibrationError
from calibrate.feedback.review import review_frame
from calibrate.reporting.build import build_report_data, goal_verdict
from calibrate.reporting.render import render_html
from calibrate.reporting.report import write_config_report, write_report
from calibrate.reporting.report_data import ReportData
from calibrate.reporting.settings_table import settings_table
from calibrate.scoring.tradeoffs import pareto_front
from tests.synthetic import make_workspace

SPLIT = 600
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def ses(tmp_path_factory: pytest.TempPathFactory) -> api.Session:
    return api.open_session(make_workspace(tmp_path_factory.mktemp("ws")))


@pytest.fixture(scope="module")
def chosen_config(ses: api.Session):
    return ses.ws.detector.with_base(fence_multiplier=2.5, fence_window_hours=48)


@pytest.fixture(scope="module")
def written(ses, chosen_config, tmp_path_factory) -> tuple[Path, ReportData]:
    out = tmp_path_factory.mktemp("rep") / "report"
    data = write_config_report(ses, chosen_config, out, split_hour=SPLIT,
                               executor=SerialExecutor())
    return out, data


@pytest.fixture(scope="module")
def config_report(written) -> Path:
    return written[0]


class _Collect(HTMLParser):
    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self) -> None:
        super().__init__()
        self.imgs: list[str] = []
        self.alts: list[str] = []
        self.links: list[str] = []
        self.tags: list[str] = []
        self.ids: list[str] = []
        self.text: list[str] = []
        self.open: list[str] = []  # elements not closed yet
        self.unbalanced: list[str] = []  # end tags that close something else

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag not in self.VOID:
            self.open.append(tag)
        if "id" in a:
            self.ids.append(a["id"] or "")
        if tag == "img":
            self.imgs.append(a.get("src") or "")
            self.alts.append(a.get("alt") or "")
        for key in ("href", "src"):
            if key in a and tag != "img":
                self.links.append(a[key] or "")

    def handle_endtag(self, tag):
        if not self.open or self.open.pop() != tag:
            self.unbalanced.append(tag)

    def handle_data(self, data):
        self.text.append(data)


def _parse(page: str) -> _Collect:
    """The page through html.parser; every element but the void ones closed in order."""
    p = _Collect()
    p.feed(page)
    p.close()
    assert not p.unbalanced and not p.open, (p.unbalanced, p.open)
    return p


def _decode_png(raw: bytes) -> np.ndarray:
    assert raw.startswith(PNG_MAGIC)
    img = matplotlib.image.imread(io.BytesIO(raw), format="png")
    assert img.shape[0] > 50 and img.shape[1] > 50
    assert float(img[..., :3].std()) > 0.01  # not a blank canvas
    return img


def _replay(ses, config):
    return api.replay_session(ses, config, executor=SerialExecutor(), progress=False)


def test_html_parses_and_every_image_is_embedded(config_report: Path) -> None:
    text = (config_report / "index.html").read_text(encoding="utf-8")
    p = _parse(text)
    assert "table" in p.tags and "h2" in p.tags
    # the contents' links lead to the eight sections, in order
    assert p.links == [f"#{i}" for i in p.ids] and len(p.ids) == 8
    assert len(p.imgs) >= 7  # 4 summary plots + 3 false-alert series
    for src in p.imgs:
        assert src.startswith("data:image/png;base64,"), src[:40]
        _decode_png(base64.b64decode(src.split(",", 1)[1], validate=True))
    # nothing to fetch: only in-page anchors
    assert all(link.startswith("#") for link in p.links), p.links
    assert "<script" not in text and "@import" not in text and "url(" not in text
    assert "@media print" in text
    assert "only as good as the incident labels" in text


def test_markup_in_values_is_shown_as_text(written) -> None:
    """Values holding markup (a title, a series label, a setting, a panel's title and
    note, a search reason, provenance) come back from html.parser as the same text and
    add no element; the page stays balanced."""
    out, data = written
    bad = "<b>x</b> & <script>alert(1)</script> \"q\" 'a'"
    data = copy.deepcopy(data)
    data.title = data.reason = bad
    data.panels[0].title = data.panels[0].note = bad
    data.incidents[0]["series_label"] = bad
    data.settings[0].chosen = bad
    data.provenance = {"a&b<i>": bad}
    images = {f.name: f.read_bytes() for f in out.glob("*.png")}
    page = render_html(data, images)
    p = _parse(page)
    assert "b" not in p.tags and "script" not in p.tags and "i" not in p.tags
    text = "".join(p.text)
    # <title>, <h1>, the search line, the panel's caption, the incident and settings
    # tables, the provenance value
    assert text.count(bad) == 7
    assert "a&b<i>" in text
    assert bad in p.alts
    assert "<script" not in page and "<b>" not in page


def test_the_folder_holds_the_settings_as_one_flat_table(ses, chosen_config,
                                                        config_report: Path) -> None:
    # tests/test_settings_table.py checks the table itself against replays and statsmodels
    written = pd.read_csv(config_report / "settings.csv", keep_default_na=False)
    expect = settings_table(chosen_config, list(ses.ws.levels), ses.ws.metric_names)
    # the CSV reads back to the same values (floats written at full precision)
    pd.testing.assert_frame_equal(written.astype(str), expect.astype(str))
    assert set(written["fence_multiplier"]) == {2.5}


def test_markdown_images_are_files_beside_it(config_report: Path) -> None:
    md = (config_report / "report.md").read_text(encoding="utf-8")
    names = [line.split("](")[1].rstrip(")") for line in md.splitlines()
             if line.startswith("![")]
    assert {"tradeoff.png", "multiplier.png", "impact.png", "volume.png",
            "delay.png"} <= set(names)
    for name in names:
        _decode_png((config_report / name).read_bytes())


def test_summary_equals_scoring_output(ses, chosen_config, config_report: Path) -> None:
    summary = json.loads((config_report / "summary.json").read_text(encoding="utf-8"))
    first = summary["periods"][0]["start_hour"]
    assert first == max(api.first_scored_hour(chosen_config, ses.ws),
                        api.first_scored_hour(ses.ws.detector, ses.ws))
    assert [p["end_hour"] for p in summary["periods"]] == [SPLIT, ses.history.n_hours]
    eps = _replay(ses, chosen_config).episodes
    for name, a, b in (("tuning", first, SPLIT), ("holdout", SPLIT, ses.history.n_hours)):
        ref = api.score_episodes(ses, eps, a, b).to_json_dict()
        assert summary[name] == json.loads(json.dumps(ref, default=str))
    from calibrate.scoring.figures import validation_verdict

    held = api.score_episodes(ses, eps, SPLIT, ses.history.n_hours)
    want = validation_verdict(held, ses.ws.goal)
    assert (summary["validation"]["verdict"], summary["validation"]["reasons"]) == (
        want[0], list(want[1]))
    assert "bootstrap" in summary["validation"]["interval_method"]
    cur = api.score_episodes(ses, _replay(ses, ses.ws.detector).episodes, first, SPLIT)
    assert summary["tuning_current"]["alerts"] == cur.alerts
    assert set(summary["settings"]["changed"]) == {"fence_multiplier", "fence_window_hours"}
    vol = api.alert_volume(ses, eps, first, ses.history.n_hours)
    assert [r["alerts"] for r in summary["volume"]] == vol["alerts"].tolist()


def test_multiplier_curve_agrees_with_figures_at_the_chosen_k(ses, chosen_config) -> None:
    rep = _replay(ses, chosen_config)
    data = build_report_data(ses, rep, first_hour=200, split_hour=SPLIT)
    j = data.curve.ks.index(chosen_config.base.fence_multiplier)
    tuning = data.periods[0].figures
    assert data.curve.recall[j] == pytest.approx(tuning["recall"])
    assert data.curve.alerts[j] == tuning["alerts"]


def test_impact_curve_agrees_with_replays_at_each_minimum_impact(ses, chosen_config) -> None:
    """Reference: a replay of the chosen settings with each grid minimum impact, scored
    as `calibrate score` does."""
    from dataclasses import replace

    rep = _replay(ses, chosen_config)
    data = build_report_data(ses, rep, first_hour=200, split_hour=SPLIT)
    imp = data.impact
    assert imp is not None and imp.chosen_k == 0.0 == chosen_config.base.min_impact
    assert imp.ks[0] == 0.0 and all(np.diff(imp.ks) >= 0)
    # each metric moves in its own units: the points differ between metrics
    assert imp.impacts[-1]["impressions"] != imp.impacts[-1]["clicks"]
    for j in (0, len(imp.ks) // 2, len(imp.ks) - 1):
        cfg = chosen_config.with_base(min_impact_per_metric=tuple(imp.impacts[j].items()))
        f = api.score_episodes(ses, _replay(ses, cfg).episodes, data.periods[0].start_hour,
                               SPLIT, first_scored=0)
        assert imp.alerts[j] == f.alerts
        assert imp.recall[j] == pytest.approx(f.recall)
    # a larger minimum impact never adds alerts (an episode is raised later or never)
    assert all(np.diff(imp.alerts) <= 0) and imp.alerts[-1] < imp.alerts[0]
    lv = next(iter(ses.history.levels))
    from calibrate.settings import DetectorGroup

    other = DetectorGroup(name="big", levels=(lv,),
                          settings=replace(chosen_config.base, min_impact=50.0))
    grouped = replace(chosen_config, groups=(other,))
    assert build_report_data(ses, _replay(ses, grouped), first_hour=200,
                             split_hour=SPLIT).impact is None


def test_group_impact_curves_agree_with_replays(ses, chosen_config) -> None:
    """Reference: replays of the grouped config with one group's minimum impact replaced
    by a grid value, scored as `calibrate score` does (all groups together)."""
    from dataclasses import replace

    from calibrate.settings import DetectorGroup

    lv = next(iter(ses.history.levels))
    group = DetectorGroup(name="top", levels=(lv,),
                          settings=replace(chosen_config.base, min_impact=20.0,
                                           fence_multiplier=3.0))
    grouped = replace(chosen_config, groups=(group,))
    data = build_report_data(ses, _replay(ses, grouped), first_hour=200, split_hour=SPLIT)
    assert data.impact is None
    curves = dict(data.impact_groups)
    assert set(curves) == {"top", "base"}
    start = data.periods[0].start_hour
    for name, cd in curves.items():
        chosen = [j for j, p in enumerate(cd.impacts)
                  if set(p.values()) == {20.0 if name == "top" else 0.0}]
        assert chosen
        for j in (0, chosen[0], len(cd.ks) - 1):
            per_metric = tuple(cd.impacts[j].items())
            cfg = (replace(grouped, groups=(replace(group, settings=replace(
                group.settings, min_impact_per_metric=per_metric)),)) if name == "top"
                else grouped.with_base(min_impact_per_metric=per_metric))
            f = api.score_episodes(ses, _replay(ses, cfg).episodes, start, SPLIT, first_scored=0)
            assert cd.alerts[j] == f.alerts
            assert cd.recall[j] == pytest.approx(f.recall)
            for t, rate in zip(cd.teams, cd.team_rate, strict=True):
                assert rate[j] == pytest.approx(f.per_team.loc[t, "alerts_per_analyst_day"])


def test_per_group_multipliers_are_not_drawn_as_one_chosen_k(ses, chosen_config) -> None:
    from dataclasses import replace

    from calibrate.settings import DetectorGroup

    lv = next(iter(ses.history.levels))
    group = DetectorGroup(name="loose", levels=(lv,),
                          settings=replace(chosen_config.base, fence_multiplier=6.0))
    grouped = replace(chosen_config, groups=(group,))
    data = build_report_data(ses, _replay(ses, grouped), first_hour=200, split_hour=SPLIT)
    assert data.curve.per_group and data.curve.chosen_k is None
    same = replace(chosen_config, groups=(replace(group, settings=chosen_config.base),))
    data = build_report_data(ses, _replay(ses, same), first_hour=200, split_hour=SPLIT)
    assert not data.curve.per_group
    assert data.curve.chosen_k == chosen_config.base.fence_multiplier


def test_missed_incident_gets_a_panel_with_its_window(ses) -> None:
    # a wide fence misses the subtle incident I5 (and maybe others)
    rep = _replay(ses, ses.ws.detector.with_base(fence_multiplier=8.0))
    data = build_report_data(ses, rep, split_hour=SPLIT)
    missed = {r["incident_id"] for r in data.incidents if not r["caught"]}
    assert "I5" in missed
    titles = [p.title for p in data.panels if p.kind == "missed incident"]
    assert len(titles) == len(missed)
    panel = next(p for p in data.panels if "I5" in p.title)
    assert panel.incident_spans == [("2026-02-06T12:00:00Z", "2026-02-06T16:00:00Z")]
    hi = np.nanmax(np.asarray(panel.upper) - np.asarray(panel.lower))
    assert hi > 0 and len(panel.value) == len(panel.times)


def test_report_from_a_tune_result(ses, chosen_config, tmp_path: Path) -> None:
    trials = pd.DataFrame({
        "number": [0, 1, 2, 3], "state": ["COMPLETE"] * 3 + ["FAIL"],
        "k": [1.0, 2.0, 3.0, 4.0], "miss_rate": [0.0, 0.2, 0.6, 0.0], "alerts": [90, 40, 10, 5],
        "alerts_per_analyst_day[blue]": [3.5, 1.5, 0.4, 0.1],
        "alerts_per_analyst_day[green]": [4.0, 1.0, 0.2, 0.1],
        "feasible": [False, True, False, True],
    })
    result = SimpleNamespace(
        config=chosen_config, current=ses.ws.detector, feasible=True, reason="k=2.5: met",
        split_hour=SPLIT, first_hour=167, holdout_warning="", trials=trials,
        pareto=pd.DataFrame({"load": [0.4, 1.2, 1.5], "recall": [0.4, 0.6, 0.8]}),
        study_name="s1", storage="mem",
        provenance={"seed": 0, "goal": {"max_miss_rate": 0.25, "max_alerts_per_analyst_day": 15.0},
                    "tuning": {"alerts": 12, "alerts_per_analyst_day": {"blue": 1.5}}},
    )
    out = tmp_path / "tuned-report"
    data = write_report(ses, result, out, executor=SerialExecutor())
    # the provenance table (the report's last) reads as words, not Python dicts
    page = (out / "index.html").read_text(encoding="utf-8")
    last = page[page.index("Where these settings come from"):]
    assert "<td>max miss rate: 0.25; max alerts per analyst day: 15</td>" in last
    assert "<td>alerts: 12; alerts per analyst day: (blue: 1.5)</td>" in last
    assert "{" not in last and "'" not in html.unescape(last)
    t = data.tradeoff
    assert t.x == [4.0, 1.5, 0.4] and t.y == pytest.approx([1.0, 0.8, 0.4])
    assert t.feasible == [False, True, False] and t.pareto == [True, True, True]
    assert t.budget == 3.0
    assert t.front_x == [0.4, 1.2, 1.5] and t.front_y == [0.4, 0.6, 0.8]
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["feasible"] is True and summary["provenance"]["study_name"] == "s1"
    assert summary["best_tradeoffs"]["points"][1] == {"recall": 0.6, "load": 1.2}
    assert (out / "alerts-for-review.csv").is_file()


def test_pareto_front_and_goal_verdict() -> None:
    assert pareto_front([1, 2, 2, 3], [0.5, 0.9, 0.8, 0.9]) == [True, True, False, False]
    figs = {"incidents": 4, "caught": 3, "miss_rate": 0.25, "miss_rate_low": 0.05,
            "miss_rate_high": 0.7, "per_team": {"a": {"alerts_per_analyst_day": 2.0,
                                                      "budget": 3.0}}}
    met, text = goal_verdict(figs, 0.25, {"a": 1})
    assert met and text.startswith("Met") and "could be luck" in text
    figs["per_team"]["a"]["alerts_per_analyst_day"] = 3.5
    met, text = goal_verdict(figs, 0.25, {"a": 1})
    assert not met and "a 3.50 > 3" in text


def test_cli_report_refuses_an_existing_folder(ses, tmp_path: Path) -> None:
    from calibrate.commands import cli_report

    (tmp_path / "old").mkdir()
    args = SimpleNamespace(workspace=str(ses.ws.file), config=str(ses.ws.file),
                           out=str(tmp_path / "old"), engine="serial", workers=None,
                           scheduler=None)
    with pytest.raises(CalibrationError, match="already exists"):
        cli_report(args)
    assert not any((tmp_path / "old").iterdir())


def test_cli_report_force_replaces_the_folder(ses, chosen_config, tmp_path: Path) -> None:
    from calibrate.cli import main
    from calibrate.outputs import write_config

    cfg = tmp_path / "chosen.toml"
    write_config(cfg, chosen_config, {})
    out = tmp_path / "rep"
    out.mkdir()
    (out / "stale.txt").write_text("old")
    argv = ["report", str(ses.ws.file), "--config", str(cfg), "--out", str(out),
            "--engine", "serial"]
    assert main(argv) == 1  # refused without --force, nothing touched
    assert (out / "stale.txt").exists()
    assert main([*argv, "--force"]) == 0
    assert (out / "index.html").is_file()


def test_review_frame_sorted_with_blank_verdicts(ses) -> None:
    alerts = _replay(ses, ses.ws.detector).alerts_frame()
    rf = review_frame(alerts)
    assert len(rf) == len(alerts) and set(rf["alert_id"]) == set(alerts["alert_id"])
    assert (rf["verdict"] == "").all() and (rf["comment"] == "").all()
    keys = list(zip(rf["team"], rf["start"], strict=True))
    assert keys == sorted(keys)
    assert list(rf.columns[-2:]) == ["verdict", "comment"]


def test_report_from_a_study_runs_no_trial_and_reports_its_best(tmp_path: Path, capsys) -> None:
    """Reference: the `tune` result of the same study (its best trial, tuning and held-out
    figures); the report reads the study and must run no further trial."""
    from dataclasses import replace

    import optuna

    from calibrate.cli import main
    from calibrate.tuning import search

    ws = make_workspace(tmp_path / "ws", search="fence_window_hours = [48, 72]\ntrials = 3")
    ses = api.open_session(ws)
    store = str(tmp_path / "s.journal")
    res = search.tune(ses, trials=3, storage=store, engine="serial", progress=False)
    out = tmp_path / "from-study"
    assert main(["report", str(ws), "--study", "--storage", store, "--out", str(out),
                 "--engine", "serial"]) == 0
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    ref = json.loads(json.dumps(res.tuning.to_json_dict(), default=str))
    assert summary["tuning"] == ref
    assert summary["holdout"] == json.loads(json.dumps(res.holdout.to_json_dict(),
                                                       default=str))
    assert summary["settings"]["chosen"]["fence_multiplier"] == res.config.base.fence_multiplier
    study = optuna.load_study(study_name=res.study_name,
                              storage=search.open_storage(ses, store)[0])
    assert len(study.trials) == 3  # nothing was run
    # one-line errors: both sources (a usage error, exit 2), no study file, an unknown
    # study name
    capsys.readouterr()
    assert main(["report", str(ws), "--study", "--config", "x.toml", "--out",
                 str(tmp_path / "r2")]) == 2
    assert main(["report", str(ws), "--study", "--storage", str(tmp_path / "none.journal"),
                 "--out", str(tmp_path / "r3"), "--engine", "serial"]) == 1
    assert main(["report", str(ws), "--study", "nope", "--storage", store, "--out",
                 str(tmp_path / "r4"), "--engine", "serial"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 3 and "either --config" in err[0]
    assert "no study file" in err[1] and "no study 'nope'" in err[2]
    assert res.study_name in err[2]  # the error lists the studies there
    assert not (tmp_path / "none.journal").exists()
    # a study tuned under another goal is judged under that goal, not the workspace's
    other = search.tune(ses, trials=2, storage=store, engine="serial", progress=False,
                        goal=replace(ses.ws.goal, max_miss_rate=0.9))
    again = search.study_result(ses, storage=store, study_name=other.study_name,
                                engine="serial")
    assert "<= 0.900" in again.reason and again.config == other.config
    # a workspace with another search space cannot report it: one line, no traceback
    ws2 = make_workspace(tmp_path / "ws2", search='fence_window_hours = [48, 72]\n'
                                                  'tune_by = "level"')
    assert main(["report", str(ws2), "--study", res.study_name, "--storage", store,
                 "--out", str(tmp_path / "r5"), "--engine", "serial"]) == 1
    assert "searched another space" in capsys.readouterr().err


def test_per_metric_and_detector_table_equals_scoring(ses, chosen_config) -> None:
    """Reference: `score_episodes` per period, counted per metric and per detector by
    hand from the replay's episodes and a plain `match`."""
    from calibrate.reporting.render import metric_rows
    from calibrate.scoring.matching import match, period_filter

    rep = _replay(ses, chosen_config)
    data = build_report_data(ses, rep, first_hour=200, split_hour=SPLIT)
    headers, rows, _ = metric_rows(data)
    assert len(headers) == 1 + len(data.periods)
    table = {r[0]: r[1:] for r in rows}
    for j, p in enumerate(data.periods):
        eps = period_filter(rep.episodes, p.start_hour, p.end_hour)
        inc = period_filter(ses.incidents, p.start_hour, p.end_hour)
        m = match(eps, inc, ses.ws.incidents.early_hours, ses.ws.incidents.late_hours)
        for metric in ses.ws.metric_names:
            n_alerts = int((eps.metric == metric).sum())
            mine = inc.metric == metric
            cell = table[f"metric {metric}"][j]
            assert cell.endswith(f", {n_alerts}")
            if mine.any():
                assert cell.startswith(f"{int(m.caught[mine].sum())} of {int(mine.sum())}")
        for det in set(eps.detectors):
            sel = eps.detectors == det
            assert table[f"detector {det}"][j].startswith(
                f"{int(m.alert_true[sel].sum())} true of {int(sel.sum())} alerts")


def test_metric_rows_warn_about_silent_metrics() -> None:
    from calibrate.reporting.render import metric_rows

    fig = {"per_metric": {
        "clicks": {"incidents": 2, "caught": 0, "alerts": 0, "recall": 0.0,
                   "recall_low": 0.0, "recall_high": 0.6},
        "ctr": {"incidents": 3, "caught": 0, "alerts": 40, "recall": 0.0,
                "recall_low": 0.0, "recall_high": 0.5},
        "spend": {"incidents": 1, "caught": 1, "alerts": 4, "recall": 1.0,
                  "recall_low": 0.2, "recall_high": 1.0}},
        "per_detector": {}, "before_first_scored": 1, "already_alerting": 0}
    period = SimpleNamespace(name="tuning weeks", figures=fig)
    _, _, warnings = metric_rows(SimpleNamespace(periods=[period]))
    assert len(warnings) == 3
    assert "clicks" in warnings[0] and "switched off" in warnings[0]
    assert "ctr catches none of its 3" in warnings[1]
    assert "before the first scored hour" in warnings[2]
