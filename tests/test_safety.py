"""Lose nothing: what `run --out` may replace, where ad-hoc runs go, nightly roots and pointers.

Every refusal is checked at the command line (exit code, one line on standard error) and by a listing
of sizes and sha256 of everything around the run taken before and after: nothing outside the run's own
folder (and edgeproof's own `.cache`/`.locks` beside it) may change. The data are small invented
extracts (tests/_shared.small_extract); these checks are about files, not statistics.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
from _shared import REPO, file_listing, small_extract

from pipeline import nightly
from pipeline.config import load_config

OWN = (".cache", ".locks")  # edgeproof's own folders beside a run folder


def _cli(*args: str, cwd: Path) -> tuple[int, str]:
    """Run `python -m pipeline ARGS` in `cwd`; the exit code and standard error."""
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.run([sys.executable, "-m", "pipeline", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)
    return proc.returncode, proc.stderr


def _one_line(stderr: str) -> str:
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    return lines[0]


def _site(tmp: Path, inbox: Path, root: Path, keep: int = 30) -> Path:
    """A nightly configuration for a test inbox and output root."""
    path = tmp / "site.yaml"
    path.write_text(f"nightly:\n  inbox: {inbox}\n  settle_seconds: 0\n"
                    f"output:\n  root: {root}\n  png: false\n  keep_runs: {keep}\n")
    return path


def _nightly(config: Path) -> nightly.NightlyResult:
    return nightly.run(load_config(config), config, log=lambda line: None)


@pytest.fixture
def refused(tmp_path, capsys, monkeypatch):
    """Check that a command exits 2 with one line holding `match` and changes nothing under tmp_path;
    run in this process from tmp_path (fast), or with ``subprocess=True`` as `python -m pipeline`."""
    from pipeline.cli import main

    monkeypatch.chdir(tmp_path)

    def check(*args: str, match: str, subprocess: bool = False) -> None:
        before = file_listing(tmp_path)
        if subprocess:
            code, err = _cli(*args, cwd=tmp_path)
        else:
            capsys.readouterr()
            code, err = main(list(args)), capsys.readouterr().err
        assert code == 2, err
        assert match in _one_line(err)
        assert file_listing(tmp_path) == before

    return check


def _run(*args: str) -> int:
    """`edgeproof run ARGS --quiet` in this process (no PNG: Graphviz time is not what is tested)."""
    from pipeline.cli import main

    return main(["run", *args, "--quiet", "--set", "output.png=false"])


# ----------------------------------------------------------------------------- run --out


def test_out_folder_that_is_not_a_run_folder_is_refused(tmp_path, refused):
    """`--out v` where v holds a user's files: exit 2, notes.txt and sub/ untouched."""
    data = small_extract(tmp_path / "base.csv")
    (tmp_path / "v" / "sub").mkdir(parents=True)
    (tmp_path / "v" / "notes.txt").write_text("x\n")
    (tmp_path / "v" / "sub" / "keep.bin").write_bytes(b"\0\1\2")
    refused("run", "--input", str(data), "--out", "v", "--quiet", match="exists and is not an edgeproof run folder",
            subprocess=True)


def test_out_equal_to_the_input_file_is_refused(tmp_path, refused):
    """`--out base.csv` (the input itself): exit 2, the file keeps its bytes."""
    small_extract(tmp_path / "base.csv")
    refused("run", "--input", "base.csv", "--out", "base.csv", "--quiet", match="is an existing file")


@pytest.mark.parametrize("out, match", [("inbox", "is or holds the input"),
                                        ("inbox/run", "lies inside the input folder")],
                         ids=["the-input-folder", "inside-the-input-folder"])
def test_out_at_or_inside_the_input_folder_is_refused(tmp_path, refused, out, match):
    """`--out` equal to the input folder, or inside it: exit 2, the folder untouched."""
    small_extract(tmp_path / "inbox" / "part-0.csv")
    refused("run", "--input", "inbox", "--out", out, "--quiet", match=match)


@pytest.mark.parametrize("out", [".", ".."])
def test_out_dot_is_refused(tmp_path, refused, out):
    """`--out .` (and `..`) names no run folder of its own: exit 2, nothing changed. (`--out /` is
    refused the same way; it is not tried here, since a regression would write into `/`.)"""
    small_extract(tmp_path / "base.csv")
    refused("run", "--input", "base.csv", "--out", out, "--quiet", match="names no folder of its own",
            subprocess=out == ".")


def test_out_holding_the_input_is_refused_even_when_it_is_a_run_folder(tmp_path, refused):
    """A run folder that holds the input (reading a run's own Parquet) is not replaced: exit 2."""
    data = small_extract(tmp_path / "base.csv")
    assert _run("--input", str(data), "--out", "r") == 0
    refused("run", "--input", "r/discretised.parquet", "--out", "r", "--quiet", match="is or holds the input")


def test_out_at_or_inside_a_nightly_root_is_refused(tmp_path, refused):
    """`--out` at a nightly output root, inside it, or at its `adhoc` folder: exit 2, runs, state,
    log and pointers untouched (the nightly lock is never needed)."""
    inbox, root = tmp_path / "inbox", tmp_path / "site"
    small_extract(inbox / "2026-11-01.csv")
    config = _site(tmp_path, inbox, root)
    assert _nightly(config).exit_code == 0
    for out in ("site", "site/2026-11-01", "site/new", "site/adhoc"):
        refused("run", "--input", "inbox/2026-11-01.csv", "--out", out, "--quiet",
                match="is inside the nightly output root", subprocess=out == "site")
    refused("run", "--input", "inbox/2026-11-01.csv", "--config", str(config), "--out", "site/x", "--quiet",
            match="is inside the nightly output root")


def test_replacing_an_earlier_run_keeps_it_until_the_new_one_is_complete(tmp_path, refused, capsys):
    """A failing run on an existing run folder leaves it byte for byte; a good one then replaces it,
    and the failed attempt's `.partial` folder is gone; a user's own hidden folder is untouched."""
    data = small_extract(tmp_path / "base.csv")
    assert _run("--input", str(data), "--out", "r") == 0
    (tmp_path / "bad-truth.json").write_text("[1, 2]")
    before = file_listing(tmp_path, skip=OWN)
    capsys.readouterr()
    assert _run("--input", str(data), "--out", "r", "--set", "report.truth_file=bad-truth.json") == 2
    assert "report.truth_file" in _one_line(capsys.readouterr().err)  # it fails at the last stage
    after = file_listing(tmp_path, skip=OWN)
    assert {k: v for k, v in after.items() if not k.startswith(".r.partial")} == before
    assert (tmp_path / ".r.partial").is_dir()  # the failed attempt, cleaned up by the next start
    (tmp_path / ".mine.partial").mkdir()
    (tmp_path / ".mine.partial" / "keep.txt").write_text("mine")
    first = json.loads((tmp_path / "r" / "manifest.json").read_text())["finished"]
    assert _run("--input", str(data), "--out", "other") == 0
    assert not (tmp_path / ".r.partial").exists() and (tmp_path / ".mine.partial" / "keep.txt").read_text() == "mine"
    time.sleep(1.1)  # the manifest's time stamp has whole seconds
    assert _run("--input", str(data), "--out", "r") == 0
    assert json.loads((tmp_path / "r" / "manifest.json").read_text())["finished"] != first
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".r.")]


def test_killed_run_partial_folder_of_another_name_is_cleaned(tmp_path, monkeypatch):
    """A `.NAME.partial` left by a run killed (SIGKILL) mid-way goes at the next start of another run."""
    data = small_extract(tmp_path / "base.csv")
    monkeypatch.chdir(tmp_path)
    proc = subprocess.Popen([sys.executable, "-m", "pipeline", "run", "--input", str(data), "--out", "gone", "--quiet"],
                            cwd=tmp_path, env={**os.environ, "PYTHONPATH": str(REPO)},
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    while not (tmp_path / ".gone.partial").is_dir() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    proc.kill()
    proc.wait()
    if not (tmp_path / ".gone.partial").is_dir():
        pytest.skip("the run finished before it could be killed")
    assert _run("--input", str(data), "--out", "kept") == 0
    assert not (tmp_path / ".gone.partial").exists()


# ----------------------------------------------------------------------------- ad-hoc runs and nightly


def test_adhoc_run_without_out_stays_out_of_the_nightly_history(tmp_path, capsys):
    """`run --config site.yaml` without --out writes under `<root>/adhoc/`; the next nightly start
    points `latest` at the new night, and retention (keep_runs 2) deletes no night for it. A run
    folder an older version wrote straight into the root (sorting after the dates) is ignored too."""
    from pipeline.cli import main

    inbox, root = tmp_path / "inbox", tmp_path / "site"
    small_extract(inbox / "2026-11-01.csv", seed=1)
    config = _site(tmp_path, inbox, root, keep=2)
    assert _nightly(config).exit_code == 0
    assert main(["run", "--input", str(inbox / "2026-11-01.csv"), "--config", str(config), "--quiet"]) == 0
    adhoc = [p for p in (root / "adhoc").iterdir() if not p.name.startswith(".")]
    assert len(adhoc) == 1 and (adhoc[0] / "manifest.json").is_file()
    shutil.copytree(root / "2026-11-01", root / "zz-20991231T000000")  # as an older version left it
    nights = file_listing(root, skip=("adhoc", "zz-20991231T000000", *OWN, "latest", "previous", "latest.json",
                                      "nightly-state.json", "nightly.log"))
    small_extract(inbox / "2026-11-02.csv", seed=2)
    res = _nightly(config)
    assert res.exit_code == 0 and res.latest == "2026-11-02" and res.previous == "2026-11-01"
    assert res.deleted == ()
    assert nightly.successful_runs(root) == ["2026-11-01", "2026-11-02"]
    after = file_listing(root)
    assert all(after.get(k) == v for k, v in nights.items())  # the first night is untouched
    assert (adhoc[0] / "manifest.json").is_file() and (root / "zz-20991231T000000" / "manifest.json").is_file()
    capsys.readouterr()


@pytest.mark.parametrize("layout", ["same", "root-inside-inbox", "inbox-inside-root"])
def test_overlapping_inbox_and_output_root_are_refused(tmp_path, refused, layout):
    """Inbox equal to the output root, or either inside the other: `nightly` exits 2 with one line and
    writes nothing (no lock, no state, no run)."""
    inbox = tmp_path / "data"
    root = {"same": inbox, "root-inside-inbox": inbox / "runs", "inbox-inside-root": tmp_path}[layout]
    if layout == "inbox-inside-root":
        inbox = tmp_path / "inbox"
    small_extract(inbox / "2026-11-01.csv")
    config = _site(tmp_path, inbox, root)
    refused("nightly", "--config", str(config), "--quiet", match="(nightly.inbox)", subprocess=layout == "same")


def test_latest_pointing_at_a_deleted_run_is_repaired(tmp_path):
    """With the latest run deleted by hand (and its snapshot gone), the next start says so in one note
    line and points `latest` at the newest run that exists; with no run left, no pointer remains."""
    inbox, root = tmp_path / "inbox", tmp_path / "site"
    small_extract(inbox / "2026-11-01.csv", seed=1)
    small_extract(inbox / "2026-11-02.csv", seed=2)
    config = _site(tmp_path, inbox, root)
    assert _nightly(config).latest == "2026-11-02"
    shutil.rmtree(root / "2026-11-02")
    (inbox / "2026-11-02.csv").unlink()
    assert nightly.read_pointer(root, "latest") is None  # what `nightly` reported as `latest = -`
    code, err = _cli("nightly", "--config", str(config), cwd=tmp_path)
    assert code == 0
    assert "repaired" in _one_line(err) and "2026-11-02" in err
    assert nightly.read_pointer(root, "latest") == "2026-11-01"
    assert os.readlink(root / "latest") == "2026-11-01" and not (root / "previous").is_symlink()
    shutil.rmtree(root / "2026-11-01")
    (inbox / "2026-11-01.csv").unlink()
    res = _nightly(config)
    assert res.latest is None and not (root / "latest").is_symlink() and not (root / "latest.json").exists()


def test_run_folder_inside_the_input_folder_is_not_read_as_input(tmp_path):
    """A run folder that an earlier version wrote inside a partitioned input folder is skipped by
    ingest: the rows read are those of the partitions alone."""
    from pipeline.config import Config
    from pipeline.stages import ingest

    data = tmp_path / "extract"
    small_extract(data / "day=1" / "part-0.csv", seed=1)
    small_extract(data / "day=2" / "part-0.csv", seed=2)
    cfg = Config()
    alone = ingest.run(data, cfg.input, cfg.limits)
    assert _run("--input", str(data / "day=1" / "part-0.csv"), "--out", str(tmp_path / "r")) == 0
    shutil.copytree(tmp_path / "r", data / "r")  # a finished run, Parquet files and all
    again = ingest.run(data, cfg.input, cfg.limits)
    assert again.rows_read == alone.rows_read == 600 and again.sources == alone.sources


def test_snapshot_modified_in_the_future_settles(tmp_path):
    """A snapshot whose modification time is a day ahead is judged by when it changed here (its
    status-change time): with settle_seconds 0 it runs now (before: it waited for ever)."""
    inbox, root = tmp_path / "inbox", tmp_path / "site"
    snap = small_extract(inbox / "2026-11-01.csv")
    future = time.time() + 86400
    os.utime(snap, (future, future))
    res = _nightly(_site(tmp_path, inbox, root))
    assert [(o.name, o.status) for o in res.outcomes] == [("2026-11-01", "ok")]
    entry = nightly._Entry(snap.name, snap, False)
    age = nightly._settle_age(entry, time.time())
    assert 0.0 <= age < 3600  # the age by this machine's clock, not minus a day
