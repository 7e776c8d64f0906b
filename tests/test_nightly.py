"""Nightly operation over the invented demo inbox: order, idempotence, retries, locks, pointers, retention.

The demo snapshots are invented data (pipeline.demo); these checks are about the operation of the
nightly job, not about the statistics, so they use small snapshots (3 nodes x 100 five-minute windows)
and settle_seconds 0.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from pipeline import nightly
from pipeline.config import load_config
from pipeline.demo import generate
from pipeline.errors import ConfigError, DataError, LockHeldError
from pipeline.runs import run_lock

REPO = Path(__file__).resolve().parents[1]
DEMO_CONFIG = REPO / "configs" / "demo.yaml"
NODES, WINDOWS = 3, 100  # small snapshots: the operation is under test, not the statistics


def _sets(inbox: Path, root: Path, *extra: str) -> list[str]:
    """Overrides pointing the demo configuration at a test inbox and output root."""
    return [f"nightly.inbox={inbox}", f"output.root={root}", "nightly.settle_seconds=0",
            "output.png=false", "report.truth_file=null", *extra]


def _config(inbox: Path, root: Path, *extra: str):
    """The demo configuration pointed at a test inbox and output root."""
    return load_config(DEMO_CONFIG, _sets(inbox, root, *extra))


def _cli(tmp: Path, inbox: Path, root: Path, *extra: str) -> list[str]:
    """The `python -m pipeline nightly` command line for a test inbox."""
    sets = _sets(inbox, root, *extra)
    cmd = [sys.executable, "-m", "pipeline", "nightly", "--config", str(DEMO_CONFIG), "--quiet"]
    for s in sets:
        cmd += ["--set", s]
    return cmd


def _env() -> dict[str, str]:
    """Environment for a subprocess that imports this working tree."""
    return {**os.environ, "PYTHONPATH": str(REPO)}


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path, monkeypatch):
    """Each test runs in its own current directory (relative paths resolve there)."""
    monkeypatch.chdir(tmp_path)


@pytest.fixture(scope="module")
def demo_files(tmp_path_factory) -> list[Path]:
    """Five demo snapshots (3 nodes x 100 windows each), written once and copied into each test's inbox."""
    scenario = generate(tmp_path_factory.mktemp("demo"), nodes=NODES, windows=WINDOWS, snapshots=5)
    return scenario.snapshots


def _inbox(tmp_path: Path, files: list[Path]) -> Path:
    """A fresh inbox holding copies of `files` (modification times kept)."""
    inbox = tmp_path / "inbox"
    inbox.mkdir(exist_ok=True)
    for f in files:
        shutil.copy2(f, inbox / f.name)
    return inbox


def test_processes_all_in_name_order_then_nothing_then_only_the_new_one(tmp_path, demo_files):
    """Every snapshot runs once, oldest first; a second start runs nothing; a new file runs alone."""
    inbox, root = _inbox(tmp_path, demo_files[:4]), tmp_path / "runs"
    cfg = _config(inbox, root, "output.keep_runs=3")
    lines: list[str] = []
    first = nightly.run(cfg, log=lines.append)
    assert first.exit_code == 0
    assert first.ran() == ["2026-11-01", "2026-11-02", "2026-11-03", "2026-11-04"]
    assert [line.split()[1] for line in lines] == [f"name=2026-11-0{i}" for i in range(1, 5)]
    assert all("result=ok" in line and "seconds=" in line for line in lines)
    # retention: three successful runs kept, the oldest deleted; pointers on the last two
    assert nightly.successful_runs(root) == ["2026-11-02", "2026-11-03", "2026-11-04"]
    assert first.deleted == ("2026-11-01",)
    assert os.readlink(root / "latest") == "2026-11-04"
    assert os.readlink(root / "previous") == "2026-11-03"
    assert json.loads((root / "latest.json").read_text())["name"] == "2026-11-04"

    second = nightly.run(cfg, log=lines.append)
    assert second.exit_code == 0 and second.ran() == []
    assert {o.status for o in second.outcomes} == {"done"}  # the pruned 2026-11-01 is not rerun

    shutil.copy2(demo_files[4], inbox / demo_files[4].name)
    third = nightly.run(cfg, log=lines.append)
    assert third.exit_code == 0 and third.ran() == ["2026-11-05"]
    assert nightly.read_pointer(root, "latest") == "2026-11-05"
    assert nightly.read_pointer(root, "previous") == "2026-11-04"
    assert nightly.successful_runs(root) == ["2026-11-03", "2026-11-04", "2026-11-05"]
    log_file = (root / nightly.LOG_FILE).read_text().splitlines()
    assert len(log_file) == 5


def test_failed_snapshot_is_retried_then_reported_and_later_ones_still_run(tmp_path, demo_files):
    """A garbage snapshot fails (exit 3), is retried once, then skipped; the next snapshot runs."""
    inbox, root = _inbox(tmp_path, [demo_files[0], demo_files[2]]), tmp_path / "runs"
    bad = inbox / "2026-11-02.csv"
    bad.write_bytes(b"x\n1\n")  # one column, one row: refused by the data stages
    old = time.time() - 600
    os.utime(bad, (old, old))
    cfg = _config(inbox, root, "nightly.max_attempts=2")

    first = nightly.run(cfg, log=lambda line: None)
    status = {o.name: o.status for o in first.outcomes}
    assert status == {"2026-11-01": "ok", "2026-11-02": "failed", "2026-11-03": "ok"}
    assert first.exit_code == 3
    assert nightly.read_pointer(root, "latest") == "2026-11-03"

    second = nightly.run(cfg, log=lambda line: None)
    assert [(o.name, o.status) for o in second.outcomes if o.status != "done"] == [
        ("2026-11-02", "gave_up")
    ]
    assert second.exit_code == 3
    state = json.loads((root / nightly.STATE_FILE).read_text())["snapshots"]["2026-11-02"]
    assert state["status"] == "failed" and state["attempts"] == 2 and state["exit_code"] == 3

    third = nightly.run(cfg, log=lambda line: None)
    assert [(o.name, o.status) for o in third.outcomes if o.status != "done"] == [
        ("2026-11-02", "skipped")
    ]
    assert third.exit_code == 0

    shutil.copy2(demo_files[1], bad)  # a corrected delivery starts its attempts afresh
    fourth = nightly.run(cfg, log=lambda line: None)
    assert fourth.ran() == ["2026-11-02"] and fourth.exit_code == 0
    assert nightly.read_pointer(root, "latest") == "2026-11-03"  # a late night never moves latest back


def test_snapshot_still_being_written_is_left_alone(tmp_path, demo_files):
    """A fresh file waits for settle_seconds; a partition folder waits for its ready marker."""
    inbox, root = tmp_path / "inbox", tmp_path / "runs"
    inbox.mkdir()
    shutil.copy(demo_files[0], inbox / demo_files[0].name)  # modified just now
    part = inbox / "2026-11-02"
    part.mkdir()
    shutil.copy2(demo_files[1], part / "part-0.csv")
    cfg = _config(inbox, root, "nightly.settle_seconds=3600", "nightly.ready_marker=_SUCCESS")
    res = nightly.run(cfg, log=lambda line: None)
    assert [(o.name, o.status) for o in res.outcomes] == [
        ("2026-11-01", "waiting"), ("2026-11-02", "waiting")
    ]
    assert res.exit_code == 0 and not nightly.successful_runs(root)
    (part / "_SUCCESS").write_text("")
    res = nightly.run(cfg, log=lambda line: None)
    assert [(o.name, o.status) for o in res.outcomes] == [
        ("2026-11-01", "waiting"), ("2026-11-02", "ok")
    ]


def test_run_names_cannot_escape_the_output_root(tmp_path, demo_files):
    """Names with separators or dot-dot are refused, and a link out of the inbox fails with exit 3."""
    for bad in ("..", "../x.csv", "/etc/passwd", "a/b.csv", "latest.csv"):
        with pytest.raises(DataError, match="Snapshot"):
            nightly.snapshot_run_name(bad)
    assert nightly.snapshot_run_name("2026-11-01.csv.gz") == "2026-11-01"
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    shutil.copy2(demo_files[0], outside / "data.csv")
    inbox, root = tmp_path / "inbox", tmp_path / "runs"
    inbox.mkdir()
    os.symlink(outside / "data.csv", inbox / "2026-11-01.csv")
    res = nightly.run(_config(inbox, root), log=lambda line: None)
    assert [(o.name, o.status, o.exit_code) for o in res.outcomes] == [("2026-11-01", "failed", 3)]
    assert "outside the inbox" in res.outcomes[0].message
    assert not (root / "2026-11-01").exists()


def test_output_root_inside_the_inbox_is_refused(tmp_path, demo_files):
    """An output root placed inside the inbox is refused before anything is written (more cases in
    tests/test_safety.py)."""
    inbox = _inbox(tmp_path, demo_files[:1])
    with pytest.raises(ConfigError, match="holds the output root"):
        nightly.run(_config(inbox, inbox / "runs"), log=lambda line: None)
    assert not (inbox / "runs").exists()


def test_missing_inbox_is_a_configuration_error(tmp_path):
    """Without nightly.inbox the start is refused with exit code 2 and the key named."""
    cfg = load_config(DEMO_CONFIG, [f"output.root={tmp_path}", "nightly.inbox=null"])
    with pytest.raises(ConfigError, match="nightly.inbox"):
        nightly.run(cfg)


def test_held_lock_gives_exit_code_4_or_waits(tmp_path):
    """With the lock held, a start exits 4 at once; with lock_wait_seconds it waits for release."""
    inbox, root = tmp_path / "inbox", tmp_path / "runs"
    inbox.mkdir()
    with run_lock(root):
        with pytest.raises(LockHeldError, match="lock"):
            nightly.run(_config(inbox, root), log=lambda line: None)
        proc = subprocess.run(_cli(tmp_path, inbox, root), cwd=tmp_path, env=_env(),
                              capture_output=True, text=True, timeout=120)
    assert proc.returncode == 4
    assert len(proc.stderr.strip().splitlines()) == 1 and "lock" in proc.stderr

    held = threading.Event()

    def hold() -> None:
        with run_lock(root):
            held.set()
            time.sleep(2.0)

    t = threading.Thread(target=hold)
    t.start()
    held.wait(10)
    proc = subprocess.run(_cli(tmp_path, inbox, root, "nightly.lock_wait_seconds=60"), cwd=tmp_path,
                          env=_env(), capture_output=True, text=True, timeout=120)
    t.join()
    assert proc.returncode == 0, proc.stderr


def test_two_starts_together_never_both_run(tmp_path, demo_files):
    """Two `python -m pipeline nightly` started at once: each snapshot runs exactly once."""
    inbox, root = _inbox(tmp_path, demo_files[:3]), tmp_path / "runs"
    cmd = _cli(tmp_path, inbox, root)
    procs = [subprocess.Popen(cmd, cwd=tmp_path, env=_env(), stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(2)]
    codes = [p.wait(timeout=300) for p in procs]
    outputs = [p.communicate() for p in procs]
    assert sorted(codes) in ([0, 0], [0, 4]), outputs
    ran = [line for line in (root / nightly.LOG_FILE).read_text().splitlines() if "result=ok" in line]
    assert sorted(line.split()[2] for line in ran) == [
        "name=2026-11-01", "name=2026-11-02", "name=2026-11-03"
    ]
    state = json.loads((root / nightly.STATE_FILE).read_text())["snapshots"]
    assert {k: v["attempts"] for k, v in state.items()} == {
        "2026-11-01": 1, "2026-11-02": 1, "2026-11-03": 1
    }


def test_report_says_what_changed_since_the_previous_night(tmp_path, demo_files):
    """The second night's report.html shows the change test's verdict near its top, with working links
    to the comparison page and the history page; the counts are those of its changes.json."""
    import re

    inbox, root = _inbox(tmp_path, demo_files[:2]), tmp_path / "runs"
    assert nightly.run(_config(inbox, root)).exit_code == 0
    changes = json.loads((root / "2026-11-02" / "changes.json").read_text())
    text = (root / "2026-11-02" / "report.html").read_text(encoding="utf-8")
    start = text.index('<section id="changes">')
    section = text[start:text.index("</section>", start)]
    assert start < text.index('id="graph"')
    assert (f"Compared with <b>2026-11-01</b>: <b>{len(changes['added'])}</b> links added, "
            f"<b>{len(changes['removed'])}</b> removed and <b>{len(changes['mechanism_changes'])}</b> signals") in section
    links = re.findall(r'href="([^"]+)"', section)
    assert links == ["../compare-2026-11-01-2026-11-02/diff.html", "../history.html"]
    for link in links:
        assert (root / "2026-11-02" / link).resolve().is_file(), link
    assert "2026-11-02" in (root / "history.html").read_text(encoding="utf-8")
    assert "Compared with" not in (root / "2026-11-01" / "report.html").read_text(encoding="utf-8")
