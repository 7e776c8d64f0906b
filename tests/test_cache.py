"""The stage cache loses nothing and never changes an answer: checked entries, its own folder,
partition names in the key, pruning of its own entries only, and runs sharing it at once."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from _shared import REPO, benchmark_path

from pipeline.cli import main
from pipeline.runs import CACHE_FOLDER

ASIA = benchmark_path("asia") / "data.txt"  # published network, 10,000 rows (tests/data/benchmarks/README.md)


def _run(out: Path, *extra: str, data: Path = ASIA, quiet: bool = True) -> int:
    return main(["run", "--input", str(data), "--out", str(out), *(["--quiet"] if quiet else []), *extra])


def _manifest(run: Path) -> dict:
    return json.loads((run / "manifest.json").read_text())


def _entry_file(parent: Path, stage: str, name: str) -> Path:
    (entry,) = [d for d in (parent / CACHE_FOLDER).iterdir() if d.name.startswith(f"{stage}-") and d.is_dir()]
    return entry / name


def _rewrite(path: Path, data: bytes) -> None:
    """Replace a cache file's bytes (a new file: the run folders hard-linked to the old one keep theirs)."""
    tmp = path.with_name(path.name + ".new")
    tmp.write_bytes(data)
    os.replace(tmp, path)


@pytest.mark.parametrize("stage, name", [("discretise", "discretised.parquet"), ("skeleton", "tests.parquet")])
def test_flipped_byte_in_cached_codes_gives_the_uncached_answer_and_one_warning(tmp_path, capsys, stage, name):
    """One flipped byte in a cached file (the codes, read whole; tests.parquet, written by its stage and
    checked in blocks when published): the entry is discarded and recomputed with one warning line
    (manifest and command output), and the answer equals an uncached run's."""
    parent = tmp_path / "runs"
    assert _run(parent / "first") == 0
    target = _entry_file(parent, stage, name)
    data = bytearray(target.read_bytes())
    data[len(data) // 2] ^= 0x10
    _rewrite(target, bytes(data))
    capsys.readouterr()
    assert _run(parent / "second", quiet=False) == 0
    err = capsys.readouterr().err
    assert _run(tmp_path / "fresh" / "run") == 0  # another parent: nothing cached
    second, fresh = parent / "second", tmp_path / "fresh" / "run"
    for name in ("evidence.parquet", "tests.parquet", "discretised.parquet"):
        assert (second / name).read_bytes() == (fresh / name).read_bytes(), name
    warnings = [w for w in _manifest(second)["warnings"] if "damaged" in w]
    assert len(warnings) == 1 and f"`{stage}-" in warnings[0]
    assert sum("damaged" in line for line in err.splitlines()) == 1
    assert not _manifest(second)["stages"][stage]["reused"]


@pytest.mark.parametrize("stage, name", [("skeleton", "tests.parquet"), ("battery", "marginal.parquet"), ("clean", "clean-meta.json")])
def test_truncated_or_missing_cache_file_is_recomputed(tmp_path, stage, name):
    """A truncated (or deleted) file in a cache entry: the next run recomputes that stage and gives
    the same artifacts as the first, instead of failing until someone deletes the cache."""
    parent = tmp_path / "runs"
    assert _run(parent / "first") == 0
    target = _entry_file(parent, stage, name)
    if stage == "clean":
        target.unlink()
        assert _run(parent / "mid", "--set", "discretise.default=categorical") == 0  # discretise misses, clean is read
        assert not _manifest(parent / "mid")["stages"]["clean"]["reused"]
    else:
        _rewrite(target, target.read_bytes()[: target.stat().st_size // 2])
        assert _run(parent / "second") == 0
        assert not _manifest(parent / "second")["stages"][stage]["reused"]
        for artifact in ("evidence.parquet", "tests.parquet", "marginal.parquet"):
            assert (parent / "second" / artifact).read_bytes() == (parent / "first" / artifact).read_bytes()
        assert len([w for w in _manifest(parent / "second")["warnings"] if "damaged" in w]) == 1


def _partitioned(folder: Path, regions: list[str]) -> None:
    rng = np.random.default_rng(5)
    for i, region in enumerate(regions):
        part = folder / f"region={region}"
        part.mkdir(parents=True)
        x = rng.integers(0, 3, 400)
        pd.DataFrame({"x": x, "y": (x + (rng.random(400) < 0.2) + i) % 3}).to_csv(part / "part-0.csv", index=False)


def test_partition_folder_names_enter_the_ingest_key(tmp_path):
    """Byte-identical part files under other `key=value` folder names are not taken from the cache:
    the second run's region levels are its own."""
    src = tmp_path / "extract"
    _partitioned(src, ["eu", "us"])
    parent = tmp_path / "runs"
    assert _run(parent / "first", data=src) == 0
    os.rename(src / "region=eu", src / "region=ap")
    assert _run(parent / "second", data=src) == 0
    assert not _manifest(parent / "second")["stages"]["ingest"]["reused"]
    levels = json.loads((parent / "second" / "levels.json").read_text())["levels"]["region"]
    assert levels == ["ap", "us"]


def test_pruning_removes_only_entries_the_cache_made(tmp_path):
    """User folders named like `name-3` beside or inside the cache survive pruning; old entries go."""
    parent = tmp_path / "runs"
    (parent / "name-3").mkdir(parents=True)
    (parent / "name-3" / "notes.txt").write_text("mine")
    assert _run(parent / "a", "--set", "output.cache_entries=1") == 0
    stray = parent / CACHE_FOLDER / "clean-3"
    stray.mkdir()
    (stray / "keep.txt").write_text("mine too")
    for bins in (3, 5):
        assert _run(parent / f"b{bins}", "--set", "output.cache_entries=1", "--set", f"discretise.bins={bins}") == 0
    assert (parent / "name-3" / "notes.txt").read_text() == "mine"
    assert (stray / "keep.txt").read_text() == "mine too"
    cache = parent / CACHE_FOLDER  # one kept besides the entries of the run that prunes
    assert not (cache / f"discretise-{_manifest(parent / 'a')['cache_keys']['discretise']}").exists()
    assert (cache / f"discretise-{_manifest(parent / 'b5')['cache_keys']['discretise']}").is_dir()
    assert len([d for d in cache.iterdir() if d.name.startswith("discretise-")]) == 2


def test_a_folder_with_the_cache_name_that_is_not_a_cache_is_refused(tmp_path, capsys):
    """A user's folder at the cache's place (no marker file) is neither used nor emptied: exit 2, one line."""
    parent = tmp_path / "runs"
    (parent / CACHE_FOLDER).mkdir(parents=True)
    (parent / CACHE_FOLDER / "diary.txt").write_text("private")
    assert _run(parent / "a") == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1
    assert [p.name for p in (parent / CACHE_FOLDER).iterdir()] == ["diary.txt"]


def _concurrent_rounds(tmp_path: Path, rounds: int) -> None:
    parent = tmp_path / "runs"
    for i in range(rounds):
        shutil.rmtree(parent / CACHE_FOLDER, ignore_errors=True)  # each round starts every entry afresh
        procs = [
            subprocess.Popen([sys.executable, "-m", "pipeline", "run", "--input", str(ASIA), "--out", str(parent / f"r{i}-{w}"),
                              "--quiet"], cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
            for w in range(2)
        ]
        for p in procs:
            out, err = p.communicate(timeout=300)
            assert p.returncode == 0, err.decode()
        a, b = parent / f"r{i}-0", parent / f"r{i}-1"
        assert (a / "evidence.parquet").read_bytes() == (b / "evidence.parquet").read_bytes()


def test_two_runs_at_once_under_one_parent_both_succeed(tmp_path):
    """Two runs with different --out under the same parent, started together twice, both finish with
    the same answer (each entry is written under its lock in its own work folder)."""
    _concurrent_rounds(tmp_path, rounds=2)


@pytest.mark.slow
def test_two_runs_at_once_repeated(tmp_path):
    """The same, eight times."""
    _concurrent_rounds(tmp_path, rounds=8)


def test_a_run_leaves_the_collector_as_it_found_it(tmp_path, monkeypatch):
    """A run freezes the collector's view of its long-lived heap stage by stage (`api._frozen_heap`);
    when it ends, finished or failed in a stage, nothing stays frozen, so a long-lived process (the
    nightly loop) collects cycles as before."""
    import gc

    freezes = []
    real_freeze = gc.freeze
    monkeypatch.setattr(gc, "freeze", lambda: (freezes.append(1), real_freeze())[1])
    assert gc.get_freeze_count() == 0
    assert _run(tmp_path / "runs" / "ok") == 0
    assert gc.get_freeze_count() == 0 and len(freezes) > 5  # stage by stage
    freezes.clear()
    assert _run(tmp_path / "runs" / "bad", "--set", "time.column=X1") == 2  # X1 holds no timestamps: the timeline stage fails
    assert gc.get_freeze_count() == 0 and len(freezes) > 1
