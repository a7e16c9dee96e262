"""Nothing a user wrote is lost: outputs are checked before work, created exclusively,
written whole with the usual file modes, and `--force` touches only this tool's files.

References: POSIX semantics of link(2) (fails with EEXIST), rename(2), the umask, and
the modes `os.stat` reads back; the CLI is driven as a user would drive it.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import stat
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from calibrate import outputs
from calibrate.cli import main
from calibrate.errors import CalibrationError
from tests.synthetic import make_workspace

SEARCH = "fence_window_hours = [48, 72]\ntrials = 2"


@pytest.fixture
def ws(tmp_path):
    return make_workspace(tmp_path / "ws", search=SEARCH)


@pytest.fixture
def umask022():
    old = os.umask(0o022)
    try:
        yield
    finally:
        os.umask(old)


def _one_line(err: str) -> str:
    err = err.strip()
    assert "\n" not in err and "Traceback" not in err, err
    return err


def _tune(ws: Path, tmp_path: Path, *extra: str) -> list[str]:
    return ["tune", str(ws), "--out", str(tmp_path / "tuned.toml"), "--trials", "2",
            "--engine", "serial", "--storage", str(tmp_path / "s.journal"), *extra]


def _temps(folder: Path) -> list[str]:
    return [p.name for p in folder.iterdir() if p.name.endswith(outputs.TMP_SUFFIX)]


def test_tune_refuses_an_existing_report_folder_before_any_work(ws, tmp_path, capsys):
    rep = tmp_path / "rep"
    rep.mkdir()
    (rep / "alerts-for-review.csv").write_text("alert_id,verdict\nA1,real\n")
    (rep / "notes.txt").write_text("analyst notes")
    assert main(_tune(ws, tmp_path, "--report", str(rep))) == 1
    assert "rep: already exists; pass --force" in _one_line(capsys.readouterr().err)
    assert (rep / "alerts-for-review.csv").read_text() == "alert_id,verdict\nA1,real\n"
    assert (rep / "notes.txt").read_text() == "analyst notes"
    # refused before any work: no study, no config
    assert not (tmp_path / "s.journal").exists() and not (tmp_path / "tuned.toml").exists()


def test_force_replaces_only_this_tools_files_in_a_report_folder(ws, tmp_path, umask022):
    rep = tmp_path / "rep"
    assert main(_tune(ws, tmp_path, "--report", str(rep))) == 0
    # a team can read what the tool wrote (umask 022: files 0644, folders 0755)
    assert stat.S_IMODE((tmp_path / "tuned.toml").stat().st_mode) == 0o644
    assert stat.S_IMODE(rep.stat().st_mode) == 0o755
    assert {stat.S_IMODE(p.stat().st_mode) for p in rep.iterdir()} == {0o644}
    manifest = json.loads((rep / outputs.MANIFEST).read_text())
    assert set(manifest) == {p.name for p in rep.iterdir() if p.name != outputs.MANIFEST}
    (rep / "notes.txt").write_text("analyst notes")
    # two files an earlier report wrote that this one does not: one untouched, one edited
    for name, text in (("series-99-false.png", b"old plot"), ("series-98-false.png", b"v1")):
        (rep / name).write_bytes(text)
        manifest[name] = hashlib.sha256(text).hexdigest()
    (rep / "series-98-false.png").write_bytes(b"edited by hand")
    (rep / outputs.MANIFEST).write_text(json.dumps(manifest))
    os.chmod(rep / "index.html", 0o640)
    (rep / "index.html").write_text("old report")
    assert main(_tune(ws, tmp_path, "--report", str(rep), "--force")) == 0
    assert (rep / "notes.txt").read_text() == "analyst notes"
    assert (rep / "series-98-false.png").read_bytes() == b"edited by hand"
    assert not (rep / "series-99-false.png").exists()
    assert (rep / "index.html").read_text().startswith("<!DOCTYPE html>")
    assert stat.S_IMODE((rep / "index.html").stat().st_mode) == 0o640  # kept its mode
    assert not _temps(tmp_path)


@pytest.mark.parametrize("name", ["alerts-for-review.csv", "tuned.toml", "report"])
def test_demo_refuses_existing_outputs_before_any_work(tmp_path, capsys, monkeypatch, name):
    import calibrate.sample

    def no_work(*a, **k):
        raise AssertionError("the demo started working")

    monkeypatch.setattr(calibrate.sample, "generate_sample", no_work)
    out = tmp_path / "demo"
    out.mkdir()
    target = out / name
    if name == "report":
        target.mkdir()
        (target / "mine.txt").write_text("kept")
    else:
        target.write_text("reviewed by an analyst")
    assert main(["demo", "--out", str(out), "--engine", "serial"]) == 1
    assert f"{target}: already exists; pass --force" in _one_line(capsys.readouterr().err)
    if name == "report":
        assert (target / "mine.txt").read_text() == "kept"
    else:
        assert target.read_text() == "reviewed by an analyst"


def test_score_json_and_volume_csv_refuse_to_overwrite_without_force(ws, tmp_path, capsys):
    alerts = tmp_path / "alerts.csv"
    assert main(["replay", str(ws), "--out", str(alerts), "--engine", "serial"]) == 0
    figs, vol = tmp_path / "figures.json", tmp_path / "volume.csv"
    figs.write_text("mine")
    vol.write_text("mine")
    capsys.readouterr()
    assert main(["score", str(ws), "--alerts", str(alerts), "--json", str(figs)]) == 1
    assert "figures.json: already exists" in _one_line(capsys.readouterr().err)
    assert main(["volume", str(ws), "--alerts", str(alerts), "--csv", str(vol)]) == 1
    assert "volume.csv: already exists" in _one_line(capsys.readouterr().err)
    assert figs.read_text() == "mine" and vol.read_text() == "mine"
    assert main(["score", str(ws), "--alerts", str(alerts), "--json", str(figs), "--force"]) == 0
    assert main(["volume", str(ws), "--alerts", str(alerts), "--csv", str(vol), "--force"]) == 0
    assert "caught" in json.loads(figs.read_text())
    assert list(pd.read_csv(vol).columns[:2]) == ["team", "week"]


def test_retune_checks_every_output_before_running(ws, tmp_path, capsys, monkeypatch):
    import calibrate.feedback.retune

    def no_work(*a, **k):
        raise AssertionError("retune started working")

    monkeypatch.setattr(calibrate.feedback.retune, "retune", no_work)
    (tmp_path / "new-known-false.csv").write_text("mine")
    argv = ["retune", str(ws), "--verdicts", str(tmp_path / "v.csv"),
            "--out", str(tmp_path / "new.toml"), "--engine", "serial"]
    assert main(argv) == 1
    assert "new-known-false.csv: already exists" in _one_line(capsys.readouterr().err)
    assert (tmp_path / "new-known-false.csv").read_text() == "mine"


def test_a_file_created_meanwhile_is_kept(tmp_path):
    # another process creates the file after the check and before ours is in place
    target = tmp_path / "out.csv"

    def write(tmp: Path) -> None:
        tmp.write_text("ours")
        target.write_text("theirs")

    with pytest.raises(CalibrationError, match="already exists"):
        outputs.write_atomic(target, write, force=False)
    assert target.read_text() == "theirs"
    assert not _temps(tmp_path)


def test_modes_follow_the_umask_and_a_replaced_file_keeps_its_mode(tmp_path, umask022):
    new = outputs.write_text(tmp_path / "a.txt", "x", force=False)
    assert stat.S_IMODE(new.stat().st_mode) == 0o644
    folder = outputs.write_folder({"f.txt": b"x"}, tmp_path / "rep")
    assert stat.S_IMODE(folder.stat().st_mode) == 0o755
    assert stat.S_IMODE((folder / "f.txt").stat().st_mode) == 0o644
    os.chmod(new, 0o640)
    outputs.write_text(new, "y", force=True)
    assert stat.S_IMODE(new.stat().st_mode) == 0o640 and new.read_text() == "y"
    os.umask(0o077)
    assert stat.S_IMODE(outputs.write_text(tmp_path / "b.txt", "x").stat().st_mode) == 0o600


def test_file_is_synced_before_it_gets_its_name_and_the_folder_after(tmp_path, monkeypatch):
    events: list[tuple[str, object]] = []
    real_fsync, real_link = os.fsync, os.link

    def fsync(fd):
        st = os.fstat(fd)
        events.append(("fsync-dir" if stat.S_ISDIR(st.st_mode) else "fsync-file", st.st_ino))
        real_fsync(fd)

    def link(src, dst, **kw):
        events.append(("link", os.stat(src).st_ino))
        real_link(src, dst, **kw)

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "link", link)
    target = outputs.write_text(tmp_path / "out.txt", "data", force=False)
    ino, dir_ino = target.stat().st_ino, tmp_path.stat().st_ino
    assert events.index(("fsync-file", ino)) < events.index(("link", ino))
    assert events.index(("link", ino)) < events.index(("fsync-dir", dir_ino))


def test_stale_temporary_files_of_ours_are_removed(tmp_path):
    done = subprocess.Popen([sys.executable, "-c", "pass"])
    done.wait()  # a process that is gone
    host = outputs._HOST
    stale = tmp_path / f".out.csv.{host}_{done.pid}_0badc0de{outputs.TMP_SUFFIX}"
    live = tmp_path / f".out.csv.{host}_{os.getpid()}_0badc0de{outputs.TMP_SUFFIX}"
    other = tmp_path / ".out.csv.x1y2z3.part"  # not our naming
    for p in (stale, live, other):
        p.write_text("partial")
    outputs.write_text(tmp_path / "out.csv", "a,b\n")
    assert not stale.exists() and live.exists() and other.exists()


def test_a_full_disk_keeps_the_old_report_and_says_so_in_one_line(tmp_path, monkeypatch):
    from calibrate.reporting.report import write_report_data_files

    rep = write_report_data_files({"a.txt": b"old a", "b.txt": b"old b"}, tmp_path / "rep")
    (rep / "mine.txt").write_text("kept")
    written = []
    real = Path.write_bytes

    def full(self, data):
        if written:
            real(self, data[: len(data) // 2])
            raise OSError(errno.ENOSPC, "No space left on device", str(self))
        written.append(self)
        return real(self, data)

    monkeypatch.setattr(Path, "write_bytes", full)
    with pytest.raises(CalibrationError, match="the disk is full: free some space"):
        write_report_data_files({"a.txt": b"new a", "b.txt": b"new b"}, rep, force=True)
    assert {p.name: p.read_bytes() for p in rep.iterdir() if p.suffix == ".txt"} == {
        "a.txt": b"old a", "b.txt": b"old b", "mine.txt": b"kept"}
    assert not _temps(tmp_path)


def test_a_full_disk_while_writing_alerts_is_one_line(ws, tmp_path, capsys, monkeypatch):
    def full(self, path, *a, **k):
        Path(path).write_text("alert_id,le")
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(pd.DataFrame, "to_csv", full)
    out = tmp_path / "alerts.csv"
    assert main(["replay", str(ws), "--out", str(out), "--engine", "serial"]) == 1
    err = _one_line(capsys.readouterr().err)
    assert f"{out}: cannot write: the disk is full" in err
    assert not out.exists() and not _temps(tmp_path)
