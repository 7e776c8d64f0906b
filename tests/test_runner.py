"""The stage runner writes each cache entry on a thread while the next stage runs: an entry is never
seen before it is complete, readers wait for it, and a write that fails stops the run with one line
and leaves no finished entry (invented two-stage plans; the published networks for a whole run)."""

from __future__ import annotations

import json
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from _shared import benchmark_path
from filelock import FileLock

import pipeline.runner as runner_mod
from pipeline.cli import main
from pipeline.errors import CacheWriteError
from pipeline.runner import Runner, Stage
from pipeline.runs import CACHE_FOLDER, StageCache

ASIA = benchmark_path("asia") / "data.txt"  # published network, 10,000 rows (tests/data/benchmarks/README.md)


def _first(call):
    return {"a.arrow": pd.DataFrame({"x": np.arange(5.0), "s": list("abcde")}),
            "a-lines.npy": np.arange(5, dtype=np.int64), "a.json": {"n": 5}}


def _second(call):
    table = call["a.arrow"]
    return {"b.parquet": pd.DataFrame({"y": table["x"] * 2 + np.asarray(call["a-lines.npy"])})}


PLAN = [Stage("a", _first, writes=("a.arrow", "a-lines.npy", "a.json")),
        Stage("b", _second, reads=("a.arrow", "a-lines.npy"), writes=("b.parquet",))]


def _runner(tmp_path: Path) -> tuple[Runner, StageCache]:
    cache = StageCache(tmp_path / CACHE_FOLDER).open()
    return Runner(list(PLAN), cache, cfg=None, version="test"), cache


def _hold_encoding(monkeypatch, name: str) -> threading.Event:
    """Make the writer of the entry holding the table `name` wait at that file until the event is set
    (`write_table` encodes every table artifact, into bytes or straight into its file)."""
    gate = threading.Event()
    real = runner_mod.write_table

    def held(artifact, value, sink):
        if artifact == name:
            assert gate.wait(20)
        return real(artifact, value, sink)

    monkeypatch.setattr(runner_mod, "write_table", held)
    return gate


def _fail_encoding(monkeypatch, name: str) -> None:
    """Make writing the table `name` fail as a full disk does."""
    real = runner_mod.write_table

    def failing(artifact, value, sink):
        if artifact == name:
            raise OSError(28, "No space left on device")
        return real(artifact, value, sink)

    monkeypatch.setattr(runner_mod, "write_table", failing)


def test_entry_is_not_done_until_written_and_a_reader_waits_for_it(tmp_path, monkeypatch):
    """While stage a's entry is being written, stage b runs on a's outputs in memory, a's entry is not
    visible as finished (only its work folder exists), and reading a's file waits for the writer; the
    wait counts in a's seconds."""
    gate = _hold_encoding(monkeypatch, "a.arrow")
    runner, cache = _runner(tmp_path)
    b = runner.get("b.parquet")
    assert b["y"].tolist() == [0.0, 3.0, 6.0, 9.0, 12.0]
    key_a = runner.key(PLAN[0])
    assert cache.lookup("a", key_a) is None
    assert (cache.root / f"a-{key_a}.work").is_dir()
    threading.Timer(0.3, gate.set).start()
    path = runner.path("a.arrow")  # waits for the writer, then checks the file's checksum
    assert cache.lookup("a", key_a) is not None and path.is_file()
    assert runner.stage_record()["a"]["seconds"] >= 0.3
    again, _ = _runner(tmp_path)  # a later run reads both entries back
    assert again.get("b.parquet")["y"].tolist() == b["y"].tolist()
    assert again.get("a.arrow")["s"].tolist() == list("abcde")


def test_carried_file_is_read_from_this_runs_bytes_while_the_carrier_is_still_written(tmp_path, monkeypatch):
    """A later read of a file a stage carries (its producer's bytes, copied into the carrier's entry) is
    served from the bytes this run holds: it does not wait for the carrier's writer, which may still be
    encoding a large table (the discretise stage carries the clean stage's small files)."""
    plan = [PLAN[0], Stage("b", _second, reads=("a.arrow", "a-lines.npy"), writes=("b.parquet",), carries=("a.json",))]
    gate = _hold_encoding(monkeypatch, "b.parquet")
    cache = StageCache(tmp_path / CACHE_FOLDER).open()
    runner = Runner(plan, cache, cfg=None, version="test")
    try:
        assert runner.get("a.json") == {"n": 5}  # carried by b, whose entry is still being written
        assert cache.lookup("b", runner.key(plan[1])) is None
    finally:
        gate.set()
    runner.finish()
    again = Runner(plan, cache, cfg=None, version="test")  # a later run reads it from b's finished entry
    assert again.get("a.json") == {"n": 5} and again.stage_record()["b"]["reused"] is True


def test_failed_write_raises_at_the_next_wait_and_leaves_no_finished_entry(tmp_path, monkeypatch):
    """A write that fails (disk full) raises `CacheWriteError` naming the entry and the cause when the
    run next waits for it; no finished entry is left, its lock is free, and the next run recomputes it."""
    _fail_encoding(monkeypatch, "a.arrow")
    runner, cache = _runner(tmp_path)
    runner.get("b.parquet")
    key_a = runner.key(PLAN[0])
    with pytest.raises(CacheWriteError, match=r"`a-[0-9a-f]+` could not be written .*No space left on device.*free space"):
        runner.finish()
    assert cache.lookup("a", key_a) is None and not cache.entry("a", key_a).exists()
    lock = FileLock(str(cache.root / ".locks" / f"a-{key_a}.lock"), timeout=5)
    lock.acquire()  # the failed writer released the entry's lock
    lock.release()
    monkeypatch.undo()
    again, _ = _runner(tmp_path)
    assert again.get("a.arrow")["x"].tolist() == [0.0, 1.0, 2.0, 3.0, 4.0]
    assert again.stage_record()["a"]["reused"] is False and cache.lookup("a", key_a) is not None


def test_run_whose_cache_write_fails_exits_non_zero_and_keeps_the_last_good_run(tmp_path, monkeypatch, capsys):
    """A whole run whose clean entry cannot be written (disk full) prints one error line naming the entry,
    exits 1, publishes nothing, leaves the earlier run folder as it was and no finished clean entry."""
    parent = tmp_path / "runs"
    out = parent / "night"
    assert main(["run", "--input", str(ASIA), "--out", str(out), "--quiet"]) == 0
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    cache = parent / CACHE_FOLDER
    cleans = {p.name for p in cache.iterdir() if p.name.startswith("clean-")}
    capsys.readouterr()
    _fail_encoding(monkeypatch, "clean.arrow")
    code = main(["run", "--input", str(ASIA), "--out", str(out), "--quiet", "--set", "clean.min_rows=11"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1
    assert len(err) == 1 and "stage cache entry `clean-" in err[0] and "No space left on device" in err[0], err
    assert {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()} == before
    finished = {p.name for p in cache.iterdir() if p.name.startswith("clean-") and (p / "entry.json").is_file()}
    assert finished == cleans  # the failed entry is at most a work folder
    assert json.loads((out / "manifest.json").read_text())["status"] == "ok"


def test_next_stage_without_workers_gets_arrays_from_memory_read_only(tmp_path):
    """The stage run next gets an array output from memory as a read-only view (as a memory map of the
    cache would be), and the entry still holds the same array."""
    seen = {}

    def second(call):
        seen["lines"] = call["a-lines.npy"]
        return {"b.parquet": pd.DataFrame({"y": [1]})}

    plan = [PLAN[0], Stage("b", second, reads=("a-lines.npy",), writes=("b.parquet",))]
    cache = StageCache(tmp_path / CACHE_FOLDER).open()
    runner = Runner(plan, cache, cfg=None, version="test")
    runner.get("b.parquet")
    assert not seen["lines"].flags.writeable
    with pytest.raises(ValueError):
        seen["lines"][0] = 7
    runner.finish()
    assert np.load(runner.path("a-lines.npy")).tolist() == [0, 1, 2, 3, 4]


class _Pool:
    """Stands in for the run's `ParallelContext`: records when the runner asks it to open."""

    def __init__(self) -> None:
        self.opened_in: list[str] = []
        self.stage = ""

    def prepare(self) -> None:
        self.opened_in.append(self.stage)


def test_workers_open_one_stage_ahead_and_never_for_a_reused_plan(tmp_path):
    """The pool starts warming up when the stage right before the first stage with workers runs (its
    start-up overlaps that stage, not the ones before), and a run whose stages are all reused never
    opens it."""
    pool = _Pool()

    def stage(name, make):
        def run(call):
            pool.stage = name
            return make(call)
        return run

    plan = [Stage("z", stage("z", lambda call: {"z.json": {"n": 1}}), writes=("z.json",)),
            Stage("a", stage("a", _first), reads=("z.json",), writes=("a.arrow", "a-lines.npy", "a.json")),
            Stage("b", stage("b", _second), reads=("a.arrow", "a-lines.npy"), writes=("b.parquet",), workers=True)]
    cache = StageCache(tmp_path / CACHE_FOLDER).open()
    runner = Runner(plan, cache, cfg=None, version="test", env={"workers": pool})
    runner.get("b.parquet")
    runner.finish()
    assert pool.opened_in and pool.opened_in[0] == "z"  # asked after stage z ran, before stage a's own work
    again = _Pool()
    rerun = Runner(plan, cache, cfg=None, version="test", env={"workers": again})
    rerun.get("b.parquet")
    rerun.finish()
    assert again.opened_in == []  # every stage reused: no worker started


def test_table_written_into_its_file_has_the_bytes_of_encode(tmp_path):
    """A table artifact the entry's writer encodes straight into its file holds exactly the bytes
    `encode` gives in memory (Arrow IPC and Parquet), and pyarrow reads the same table back from it
    (invented table with numbers, a categorical and missing booleans)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    frame = pd.DataFrame({"x": np.arange(50_000) / 7.0, "s": pd.Categorical(["u", None, "v", "u"] * 12_500),
                          "b": pd.array([True, None, False, True] * 12_500, dtype="boolean")})
    table = pa.Table.from_pandas(frame, preserve_index=False)
    for name in ("t.arrow", "t.parquet"):
        path = tmp_path / name
        runner_mod._write_table_file(name, table, path)
        assert path.read_bytes() == runner_mod.encode(name, table)
        back = pq.read_table(path) if name.endswith(".parquet") else pa.ipc.open_file(pa.memory_map(str(path))).read_all()
        assert back.to_pydict() == table.to_pydict()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["t.arrow", "t.parquet"]  # no temporary file left


def test_small_run_with_two_jobs_starts_no_worker_and_matches_one_job(tmp_path, monkeypatch):
    """ASIA (10,000 rows, 8 signals) with `parallel.jobs` 2 is too small to repay a worker's start-up: the pool
    is not opened ahead nor by the search, and the run's tests and evidence are byte for byte those of one job."""
    import contextlib
    import os

    import pipeline.api as api
    from pipeline import parallel

    if (os.cpu_count() or 1) < 2:
        pytest.skip("one core: two jobs are capped to one")
    seen: list = []
    monkeypatch.setattr(api, "parallel_context", contextlib.contextmanager(
        lambda *a, **k: _recorded(parallel.parallel_context, seen, *a, **k)))
    outs = {}
    for jobs in (1, 2):
        outs[jobs] = tmp_path / f"run-{jobs}"
        assert main(["run", "--input", str(ASIA), "--out", str(outs[jobs]), "--quiet", "--set", f"parallel.jobs={jobs}",
                     "--set", "test.method=g"]) == 0
    two = seen[2]
    assert two.jobs == 2 and two.backend == "local"
    assert two.ahead is False and seen[3] is False  # never opened
    for name in ("tests.parquet", "evidence.parquet", "marginal.parquet"):
        assert (outs[1] / name).read_bytes() == (outs[2] / name).read_bytes()


def _recorded(make, seen, *args, **kwargs):
    """The real `parallel_context`, noting the context it yields and whether its pool was opened by the end."""
    with make(*args, **kwargs) as ctx:
        seen.append(ctx)
        yield ctx
        seen.append(ctx.opened)
