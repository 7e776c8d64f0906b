"""Reliability: runs killed at random moments, repeatable artifacts, clean limits, hostile names."""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from _shared import REPO, benchmark_path

from pipeline.cli import main

DATA_ARTIFACTS = ["evidence.parquet", "tests.parquet", "marginal.parquet", "discretised.parquet",
                  "rejected.parquet", "levels.json", "cleaning.json", "evidence.csv", "graph.dot"]


def _demo_extract(folder: Path, rows: int = 1200) -> Path:
    """One demo night of about `rows` rows (6 node series; time-ordered, so the time-aware tests run)."""
    from pipeline.demo import generate

    return generate(folder, rows_per_snapshot=rows, snapshots=1).snapshots[0]


def _cmd(data: Path, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "pipeline", "run", "--input", str(data), "--out", str(out), "--quiet",
            "--set", "search.orient=true", *extra]


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}


def _assert_complete(run: Path) -> None:
    manifest = json.loads((run / "manifest.json").read_text())
    assert manifest["status"] == "ok"
    for name in manifest["artifacts"]:
        assert (run / name).is_file(), name
    assert not [p for p in run.iterdir() if p.name.endswith(".tmp")]


def _run_killed(cmd: list[str], after: float) -> int:
    proc = subprocess.Popen(cmd, cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    time.sleep(after)
    try:
        os.killpg(proc.pid, signal.SIGKILL)  # the whole group: workers die with the run
    except ProcessLookupError:
        pass
    return proc.wait()


def _fault_injection(tmp_path: Path, kills: int, rows: int, seed: int, extra: tuple[str, ...] = ()) -> None:
    data = _demo_extract(tmp_path / "demo", rows)
    t0 = time.perf_counter()
    subprocess.run(_cmd(data, tmp_path / "ref" / "run", *extra), cwd=REPO, check=True)
    duration = time.perf_counter() - t0
    live = tmp_path / "live"
    subprocess.run(_cmd(data, live / "previous", *extra), cwd=REPO, check=True)
    before = _snapshot(live / "previous")
    rng = random.Random(seed)
    target = live / "tonight"
    for _ in range(kills):
        _run_killed(_cmd(data, target, *extra), rng.uniform(0.05, duration * 1.1))
        assert _snapshot(live / "previous") == before, "a killed run touched the previous run"
        if target.exists():  # only ever a complete run under the final name
            _assert_complete(target)
    subprocess.run(_cmd(data, target, *extra), cwd=REPO, check=True)
    _assert_complete(target)
    ref, got = _snapshot(tmp_path / "ref" / "run"), _snapshot(target)
    for name in DATA_ARTIFACTS:
        assert got[name] == ref[name], f"{name} differs from an uninterrupted run"


def test_runs_killed_at_ten_random_moments(tmp_path):
    """SIGKILL at 10 random moments never harms the previous run or leaves a half artifact, and the
    next run produces the same artifacts as an uninterrupted one."""
    _fault_injection(tmp_path, kills=10, rows=1200, seed=20261201)


@pytest.mark.slow
def test_runs_killed_at_random_moments_bigger_input(tmp_path):
    """The same with a bigger input, two workers, and more kills."""
    _fault_injection(tmp_path, kills=20, rows=40000, seed=7, extra=("--set", "parallel.jobs=2"))


def test_artifacts_repeat_byte_for_byte_across_runs_and_worker_counts(tmp_path):
    """Same input, configuration and seed: byte-identical data artifacts for jobs 1 and 2, run twice."""
    data = _demo_extract(tmp_path / "demo", 1200)
    runs = {}
    for label, jobs in (("one", 1), ("two", 2), ("again", 1)):
        out = tmp_path / label / "run"  # separate parents: separate caches, so everything is recomputed
        assert main(["run", "--input", str(data), "--out", str(out), "--quiet", "--set", f"parallel.jobs={jobs}", "--set", "search.orient=true"]) == 0
        assert not any(json.loads((out / "manifest.json").read_text())["stages"][s]["reused"] for s in ("ingest", "battery", "skeleton"))
        runs[label] = _snapshot(out)
    for name in DATA_ARTIFACTS:
        assert runs["one"][name] == runs["two"][name] == runs["again"][name], name
    for name in ("evidence.parquet", "tests.parquet"):  # no paths or times inside the data artifacts
        assert str(tmp_path).encode() not in runs["one"][name]


def test_column_limit_fails_cleanly(tmp_path, capsys):
    """More columns than `limits.max_columns`: exit 5 and one line naming the limit."""
    data = benchmark_path("asia") / "data.txt"
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "r"), "--quiet", "--set", "limits.max_columns=3"])
    err = capsys.readouterr().err
    assert code == 5 and "max_columns" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "r").exists()


def test_level_limit_fails_cleanly(tmp_path, capsys):
    """A column with more levels than `limits.max_levels`: exit 5 and one line naming the column."""
    data = benchmark_path("child") / "data.txt"
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "r"), "--quiet",
                 "--set", "discretise.default=categorical", "--set", "limits.max_levels=3"])
    err = capsys.readouterr().err
    assert code == 5 and "max_levels" in err and len(err.strip().splitlines()) == 1


def test_table_cell_limit_fails_cleanly(tmp_path, capsys):
    """A contingency table above `limits.max_table_cells`: exit 5, one line naming the limit."""
    data = benchmark_path("alarm") / "data.txt"
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "r"), "--quiet",
                 "--set", "discretise.default=categorical", "--set", "limits.max_table_cells=40"])
    err = capsys.readouterr().err
    assert code == 5 and "max_table_cells" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "r").exists()


def test_out_folder_that_is_a_link_is_refused(tmp_path, capsys):
    """A run folder given as a symbolic link (which could point anywhere) is refused."""
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (tmp_path / "runs").mkdir()
    (tmp_path / "runs" / "night").symlink_to(elsewhere)
    data = benchmark_path("asia") / "data.txt"
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "runs" / "night"), "--quiet"])
    assert code == 2 and "symbolic link" in capsys.readouterr().err
    assert list(elsewhere.iterdir()) == []


def test_markup_in_names_is_escaped_end_to_end(tmp_path):
    """A column named like an HTML tag and a level like a formula are escaped in HTML, SVG and DOT,
    and neutralised in the CSV."""
    rng = np.random.default_rng(3)
    n = 600
    z = rng.integers(0, 2, n)
    evil = "<img src=x onerror=alert(1)>"
    frame = pd.DataFrame({
        evil: np.where(z == 1, "=1+2", "safe"),
        "plain": np.where((z + (rng.random(n) < 0.1)) % 2 == 1, "up", "down"),
        "other": rng.integers(0, 3, n).astype(str),
    })
    path = tmp_path / "evil.csv"
    frame.to_csv(path, index=False)
    out = tmp_path / "run"
    assert main(["run", "--input", str(path), "--out", str(out), "--quiet", "--set", "discretise.default=categorical"]) == 0
    for name in ("report.html", "graph.svg", "graph.dot"):
        text = (out / name).read_text(encoding="utf-8")
        assert "<img" not in text, name
    import csv

    with open(out / "evidence.csv", newline="", encoding="utf-8") as fh:
        cells = [cell for row in csv.reader(fh) for cell in row]
    assert any("=1+2" in cell for cell in cells)  # the level is there ...
    assert not [c for c in cells if c[:1] in ("=", "+", "@") or (c[:1] == "-" and not _number(c))]  # ... but inert


def _number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
