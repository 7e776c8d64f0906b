"""The stage runner: declared stages, one cache rule, one timing record.

A stage declares the artifacts it reads, the artifacts it writes and the configuration it depends
on. Its cache key is the hash of the version, its name, its slice of the configuration and the
keys of the artifacts it reads, nothing else. The runner pulls what is asked for: a stage whose
entry is in the cache is not run (and the stages before it are not even looked at); otherwise its
inputs are pulled, it runs, and its artifacts are written to the cache with their checksums. A
damaged entry is discarded and recomputed with one warning.

An entry is written on a thread of its own while the next stage runs (Parquet encoding, checksums
and disk writes release the interpreter lock): the stage's outputs are at hand in memory, and the
entry's lock is held until the thread has committed it, so nothing sees it before it is complete.
Whoever reads an entry's files waits for its writer first, and so does the record of the run
(`stage_record`); the time spent waiting counts in that stage's seconds. A writer that fails leaves
no finished entry (only its work folder) and the next wait raises `CacheWriteError`.

Artifacts are typed by their file name: ``.parquet`` a DataFrame, ``.arrow`` a DataFrame kept as an
Arrow IPC file (an intermediate table no run folder publishes), ``.json`` plain data, ``.npy`` a
numpy array (read back as a read-only memory map, so local workers share it). Values that the plan
makes itself (the input files, the knowledge) are `provide`d with a key of their own. A stage may
also return an artifact as the `Path` of the file it wrote itself in its work folder (``call.work /
name``, e.g. a Parquet file of millions of rows written row group by row group): it is checked in
blocks, never read into memory whole.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Mapping

from .errors import CacheWriteError
from .runs import (
    CacheDamaged,
    StageCache,
    atomic_write_bytes,
    checksum,
    file_checksum,
    json_text,
    stable_hash,
)

__all__ = ["Stage", "StageCall", "Runner", "encode", "decode"]


@dataclass(frozen=True)
class Stage:
    """One step of the plan.

    Attributes
    ----------
    name : the stage's name (in the manifest's ``stages`` and ``cache_keys``, and in cache folders).
    run : ``run(call) -> {artifact name: value}`` for every name in `writes`.
    reads : artifacts (or provided values) the stage needs; their keys enter its cache key.
    writes : artifacts it makes.
    settings : configuration it depends on: a section (``"test"``) or one key (``"test.missing"``).
    carries : artifacts of an earlier stage copied into this stage's entry unchanged, so a hit here
        needs no earlier entry at all.
    resumable : the stage keeps per-level parts in ``call.work``; an interrupted attempt leaves them
        for the next attempt with the same key.
    workers : the stage maps work to the pool (``call.env["workers"]``); the pool opens, and its
        workers warm up in the background, when the stage right before it runs (their start-up
        overlaps that stage), or when it runs itself; a run whose search stages are all reused never
        starts a worker.
    """

    name: str
    run: Callable[["StageCall"], dict[str, Any]]
    reads: tuple[str, ...] = ()
    writes: tuple[str, ...] = ()
    settings: tuple[str, ...] = ()
    carries: tuple[str, ...] = ()
    resumable: bool = False
    workers: bool = False


@dataclass
class StageCall:
    """What a stage's `run` gets: its inputs, the configuration, a work folder and the plan's tools."""

    inputs: dict[str, Any]
    cfg: Any
    work: Path
    env: Mapping[str, Any]

    def __getitem__(self, name: str) -> Any:
        return self.inputs[name]


def _parquet_options(schema: Any) -> dict[str, Any]:
    """How a stage's Parquet file is written: measured numbers (mostly distinct values) without a dictionary
    and with LZ4, codes, text and the rest zstd with a dictionary. On the cleaned 1,000,000 x 40 extract of
    `bench/bench_numeric.py` (29 numbers) that writes in 1.5 s instead of 3.0 s (zstd everywhere, with
    dictionaries) for a file a quarter larger; on extracts with few distinct values it changes little."""
    import pyarrow as pa

    floats = [f.name for f in schema if pa.types.is_floating(f.type)]
    if not floats:
        return {"compression": "zstd"}
    rest = [f.name for f in schema if f.name not in set(floats)]
    return {"compression": {**{c: "lz4" for c in floats}, **{c: "zstd" for c in rest}}, "use_dictionary": rest}


def encode(name: str, value: Any) -> bytes:
    """The bytes of an artifact, by its file type (Parquet without timestamps, Arrow IPC, sorted JSON,
    .npy); bytes are taken as the file itself (a stage that wrote its Parquet file piece by piece).

    ``.arrow`` is for a stage's intermediate table that only later stages read (never published): the
    Arrow IPC file format with LZ4 per buffer on one thread (the entry's writer shares the cores with the
    next stage). On the ingested 1,000,000 x 40 extract of `bench/gen_extract.py` it took 0.9-1.4 s
    (0.9 s of processor time) for 159 MB where Parquet took 1.8-2.3 s (1.3-1.6 s) for 130 MB, three
    alternating rounds in one process on the shared two-core machine."""
    if isinstance(value, bytes):
        return value
    if name.endswith((".parquet", ".arrow")):
        import pyarrow as pa

        sink = pa.BufferOutputStream()  # Arrow's own buffer: the encoder never returns to Python to write
        write_table(name, value, sink)
        return sink.getvalue().to_pybytes()
    if name.endswith(".json"):
        return json_text(value).encode("utf-8")
    if name.endswith(".npy"):
        import numpy as np

        buf = io.BytesIO()
        np.save(buf, np.ascontiguousarray(value))
        return buf.getvalue()
    raise TypeError(f"no file type for artifact `{name}`")


def write_table(name: str, value: Any, sink: Any) -> None:
    """A table (Arrow or pandas) as the bytes of a ``.parquet`` or ``.arrow`` artifact (see `encode`),
    written to `sink`: an Arrow output stream, or a file opened for writing."""
    import pyarrow as pa

    table = value if isinstance(value, pa.Table) else pa.Table.from_pandas(value, preserve_index=False)
    if name.endswith(".parquet"):
        import pyarrow.parquet as pq

        pq.write_table(table, sink, **_parquet_options(table.schema))
        return
    with pa.ipc.new_file(sink, table.schema, options=pa.ipc.IpcWriteOptions(compression="lz4", use_threads=False)) as writer:
        writer.write_table(table)


def _write_table_file(name: str, table: Any, path: Path) -> None:
    """`write_table` straight into the file at `path` (through a temporary file, synced, renamed into
    place; 1 MB writes): a table of hundreds of megabytes never grows in a buffer in memory and is never
    copied into a bytes object on its way."""
    import pyarrow as pa

    tmp = path.with_name(f".{path.name}.tmp")
    try:
        with pa.output_stream(str(tmp), buffer_size=1 << 20) as sink:
            write_table(name, table, sink)
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def decode(name: str, data: bytes, path: Path | None = None) -> Any:
    """An artifact back from its bytes (a .npy at `path` is memory-mapped, after its bytes were checked)."""
    if name.endswith(".parquet"):
        import pyarrow as pa
        import pyarrow.parquet as pq

        return pq.read_table(pa.BufferReader(data)).to_pandas()
    if name.endswith(".arrow"):
        import pyarrow as pa

        return pa.ipc.open_file(pa.BufferReader(data)).read_all().to_pandas()
    if name.endswith(".json"):
        return json.loads(data.decode("utf-8"))
    if name.endswith(".npy"):
        import numpy as np

        return np.load(path, mmap_mode="r") if path is not None else np.load(io.BytesIO(data))
    return data


def _frozen(value: Any) -> Any:
    """A stage's output as its entry's writer encodes it while later stages run, unaffected by them: a
    DataFrame as an Arrow table, an array as a read-only view. The table is made here rather than on
    the writer's thread: turning Python strings into Arrow holds the interpreter lock throughout, and on
    that thread it would stall the next stage for longer than it takes here."""
    import numpy as np
    import pandas as pd

    if isinstance(value, pd.DataFrame):
        import pyarrow as pa

        return pa.Table.from_pandas(value, preserve_index=False)
    if isinstance(value, np.ndarray):
        view = value.view()
        view.flags.writeable = False
        return view
    return value


class _EntryWriter:
    """One stage's cache entry being written on its own thread: each artifact encoded, written
    atomically with its checksum, then the entry committed and its lock released (`entry` is the
    context holding that lock and the work folder, entered by the runner). An error leaves the work
    folder without an entry file, so the entry never looks done; it is kept for `wait` to raise."""

    # the writers of this process still running, by entry: a later run in the same process (a nightly
    # retry) waits for one before taking that entry's lock, which the writer still holds
    _live: dict[tuple[str, str], "_EntryWriter"] = {}

    def __init__(self, cache: StageCache, stage: str, key: str, work: Path, entry: contextlib.ExitStack,
                 files: list[tuple[str, Any]]) -> None:
        self.cache, self.stage, self.key, self.work, self._entry = cache, stage, key, work, entry
        self._files = files  # (name, value or encoded bytes), in the order they are written
        self.error: BaseException | None = None
        self._thread = threading.Thread(target=self._write, name=f"edgeproof-write-{stage}", daemon=False)
        self._live[(str(cache.root), f"{stage}-{key}")] = self
        self._thread.start()

    @classmethod
    def settle(cls, cache: StageCache, stage: str, key: str) -> None:
        """Wait for a writer of this process still writing the entry (whatever its outcome)."""
        writer = cls._live.get((str(cache.root), f"{stage}-{key}"))
        if writer is not None:
            writer._thread.join()

    def _write(self) -> None:
        try:
            with self._entry:  # leaving it releases the entry's lock, after the commit or on an error
                files: dict[str, dict[str, Any]] = {}
                while self._files:
                    name, value = self._files.pop(0)  # the value is dropped as soon as it is written
                    if isinstance(value, Path):  # written by the stage itself: checksummed in blocks
                        files[name] = {"size": value.stat().st_size, "checksum": file_checksum(value)}
                        continue
                    if name.endswith((".parquet", ".arrow")) and not isinstance(value, bytes):
                        # encoded straight into its file, then checksummed in blocks: on the 1,000,000 x 40
                        # extract of `bench/gen_extract.py` the ingested table's 151 MB took 1.15 s of
                        # processor time this way against 1.9-2.1 s through bytes in memory
                        _write_table_file(name, value, self.work / name)
                        del value
                        path = self.work / name
                        files[name] = {"size": path.stat().st_size, "checksum": file_checksum(path)}
                        continue
                    data = encode(name, value)
                    del value
                    atomic_write_bytes(self.work / name, data)
                    files[name] = {"size": len(data), "checksum": checksum(data)}
                    del data
                self.cache.commit(self.stage, self.key, self.work, files)
        except BaseException as err:  # noqa: BLE001 - kept for the thread that waits for this entry
            self.error = err
        finally:
            self._live.pop((str(self.cache.root), f"{self.stage}-{self.key}"), None)

    def wait(self) -> None:
        """Block until the entry is committed; `CacheWriteError` when it could not be written."""
        self._thread.join()
        if self.error is not None:
            err = self.error
            why = f"{type(err).__name__}: {(str(err).splitlines() or [''])[0]}".rstrip(": ")
            fix = ("free space there or make it writable (deleting that cache folder is safe), then run again"
                   if isinstance(err, OSError) else "rerun with --debug for the traceback and report it")
            raise CacheWriteError(
                f"The stage cache entry `{self.stage}-{self.key}` could not be written in `{self.cache.root}` "
                f"({why}); no entry was kept and the run stopped: {fix}."
            ) from err


@dataclass
class Runner:
    """Runs a plan of stages against one stage cache and records what it did."""

    stages: list[Stage]
    cache: StageCache
    cfg: Any
    version: str
    env: dict[str, Any] = field(default_factory=dict)
    on_event: Callable[..., None] = lambda *a, **k: None
    timings: dict[str, dict[str, Any]] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    _provided: dict[str, tuple[Any, str]] = field(default_factory=dict, init=False)
    _keys: dict[str, str] = field(default_factory=dict, init=False)
    _ready: set[str] = field(default_factory=set, init=False)
    # outputs of the stages run in this process that a later stage of the plan still reads
    _fresh: dict[tuple[str, str], Any] = field(default_factory=dict, init=False)
    _mapped: dict[tuple[str, str], Any] = field(default_factory=dict, init=False)  # .npy memory maps
    _writing: dict[str, _EntryWriter] = field(default_factory=dict, init=False)  # entries still being written
    _written: dict[tuple[str, str], bytes] = field(default_factory=dict, init=False)  # small files written this run

    def __post_init__(self) -> None:
        names = [st.name for st in self.stages]
        if len(set(names)) != len(names):
            raise ValueError(f"stage names repeat: {names}")

    # -- what the plan gives -------------------------------------------------------------------
    def provide(self, name: str, value: Any, key: Any) -> None:
        """A value made by the plan itself, with what identifies it (hashed into its readers' keys)."""
        self._provided[name] = (value, stable_hash(key))


    # -- keys ---------------------------------------------------------------------------------
    def _setting(self, path: str) -> Any:
        section, _, key = path.partition(".")
        doc = self.cfg.section(section)
        return doc[key] if key else doc

    def key(self, stage: Stage) -> str:
        """hash(version, name, settings slice, keys of what the stage reads, the files it writes)."""
        if stage.name not in self._keys:
            read_keys = {}
            for name in (*stage.reads, *stage.carries):
                if name in self._provided:
                    read_keys[name] = self._provided[name][1]
                else:
                    read_keys[name] = self.key(self._producer_of(name, before=stage))
            self._keys[stage.name] = stable_hash(
                [self.version, stage.name, {s: self._setting(s) for s in stage.settings}, read_keys,
                 list(stage.writes) + list(stage.carries)]  # an entry made with other files is another entry
            )
        return self._keys[stage.name]

    def cache_keys(self) -> dict[str, str]:
        """The key of every stage this run needed, by stage name (in plan order)."""
        return {st.name: self._keys[st.name] for st in self.stages if st.name in self._keys}

    def stage_record(self) -> dict[str, dict[str, Any]]:
        """Seconds and reuse of every stage this run needed; a stage made unnecessary by a later
        stage's cache hit counts as reused in 0 s."""
        self.finish()  # the record of entries still being written includes the wait for them
        out = {name: {"seconds": 0.0, "reused": True} for name in self.cache_keys()}
        out.update(self.timings)
        return out

    def entries(self) -> set[str]:
        """Cache folder names of this run's entries (pruning keeps them); every one is finished first."""
        self.finish()
        return {f"{name}-{key}" for name, key in self.cache_keys().items()}

    def finish(self) -> None:
        """Wait for every entry still being written; then `CacheWriteError` for the first that failed."""
        failed: list[CacheWriteError] = []
        for name in list(self._writing):
            try:
                self._wait(name)
            except CacheWriteError as err:
                failed.append(err)
        if failed:
            raise failed[0]

    def _wait(self, name: str) -> None:
        """Wait for the stage's entry if it is still being written; the wait counts in its seconds."""
        writer = self._writing.pop(name, None)
        if writer is None:
            return
        t0 = time.perf_counter()
        try:
            writer.wait()
        finally:
            rec = self.timings.setdefault(name, {"seconds": 0.0, "reused": False})
            rec["seconds"] = round(rec["seconds"] + time.perf_counter() - t0, 3)

    def _producer_of(self, name: str, before: Stage | None = None) -> Stage:
        """The stage an artifact is read from: the last one before `before` that writes or carries it
        (a stage that carries an artifact is where later stages read it)."""
        found = None
        for st in self.stages:
            if st is before:
                break
            if name in st.writes or name in st.carries:
                found = st
        if found is None:
            raise KeyError(f"no stage writes `{name}` and the plan did not provide it")
        return found

    # -- pulling artifacts --------------------------------------------------------------------
    def get(self, name: str, *, before: Stage | None = None) -> Any:
        """The value of an artifact: provided, just computed, or read (and checked) from the cache.

        `before`: read it as that stage sees it (from the last stage before it that makes it).
        """
        if name in self._provided:
            return self._provided[name][0]
        stage = self._producer_of(name, before)
        self.ensure(stage)
        # the outputs of the stage run last, at hand in memory; a stage that maps work to the pool reads
        # arrays as memory maps of the cache instead, which its workers share
        if (stage.name, name) in self._fresh and not (name.endswith(".npy") and (before is None or before.workers)):
            return self._fresh[(stage.name, name)]
        where = (stage.name, name)
        if where in self._mapped:
            return self._mapped[where]
        written = self._written.get(where)
        if written is not None and not name.endswith(".npy"):  # bytes this run wrote (or carried): no wait
            return decode(name, written)  # for that entry's writer, which may still be writing a large table
        value = decode(name, self._bytes(name, before), self.cache.entry(stage.name, self.key(stage)) / name)
        if name.endswith(".npy"):  # one memory map per run: every stage and worker shares it
            self._mapped[where] = value
        return value

    def _bytes(self, name: str, before: Stage | None = None) -> bytes:
        """The checked bytes of an artifact in the cache (a damaged entry is recomputed first)."""
        return self._checked(name, before, self.cache.read)

    def path(self, name: str) -> Path:
        """Where an artifact's file is in the cache, checked in blocks (for publishing it into a run folder)."""
        return self._checked(name, None, self.cache.check)

    def _checked(self, name: str, before: Stage | None, how: Callable[[str, str, str], Any]) -> Any:
        """``how(stage, key, name)`` on the artifact's finished entry; a damaged entry is discarded and
        the stage run again first."""
        stage = self._producer_of(name, before)
        self.ensure(stage)
        self._wait(stage.name)
        try:
            return how(stage.name, self.key(stage), name)
        except CacheDamaged as why:
            self._damaged(stage, why)
            return self._checked(name, before, how)

    def ensure(self, stage: Stage) -> None:
        """Make sure the stage's entry exists: a checked hit, or a run."""
        if stage.name in self._ready:
            return
        key = self.key(stage)
        try:
            hit = self.cache.lookup(stage.name, key) is not None
        except CacheDamaged as why:
            self._damaged(stage, why)
            hit = False
        if hit:
            with self._timed(stage.name) as rec:
                rec["reused"] = True
        else:
            self._run(stage, key)
        self._ready.add(stage.name)

    def _run(self, stage: Stage, key: str) -> None:
        """Pull the stage's inputs, run it under its entry's lock and start writing its entry."""
        inputs = {name: self.get(name, before=stage) for name in stage.reads}
        workers = self.env.get("workers")
        at = self.stages.index(stage)
        if workers is not None and any(st.workers for st in self.stages[at:at + 2]):
            # local workers warm up in the background (imports, compiled kernels) from the stage right
            # before the first that maps work to them: their start-up overlaps that stage, not the data
            # stages (which use both cores on a large extract); a run whose search is reused never starts them
            workers.prepare()
        carried = {name: self._carried(name, stage) for name in stage.carries}
        self._fresh = self._read_later(stage)
        _EntryWriter.settle(self.cache, stage.name, key)
        with self._timed(stage.name) as rec, contextlib.ExitStack() as entry:
            work = entry.enter_context(self.cache.writing(stage.name, key, resume=stage.resumable))
            if work is None:  # another run finished this entry while this one waited for its lock
                rec["reused"] = True
                return
            outputs = stage.run(StageCall(inputs=inputs, cfg=self.cfg, work=work, env=self.env))
            del inputs
            missing = set(stage.writes) - set(outputs)
            if missing:
                raise RuntimeError(f"stage `{stage.name}` did not write {sorted(missing)}")
            files: list[tuple[str, Any]] = []
            for name in stage.writes:
                value = outputs[name]
                if isinstance(value, Path):  # a file the stage wrote itself (too large to hold whole)
                    if value != work / name:
                        raise RuntimeError(f"stage `{stage.name}` wrote `{name}` outside its work folder")
                elif name.endswith(".json") or self._carried_later(name):  # small: encoded here
                    value = encode(name, value)
                    if name.endswith(".json"):  # what a later hit would read (e.g. keys sorted)
                        outputs[name] = decode(name, value)
                    self._written[(stage.name, name)] = value
                else:
                    value = _frozen(value)
                    if name.endswith(".npy"):  # the next stage gets the same read-only view
                        outputs[name] = value
                files.append((name, value))
            files += list(carried.items())
            self._written.update({(stage.name, name): data for name, data in carried.items()})
            # the writer owns the entry's lock and work folder from here on
            self._writing[stage.name] = _EntryWriter(self.cache, stage.name, key, work, entry.pop_all(), files)
        self._fresh.update({(stage.name, name): outputs[name] for name in stage.writes
                            if not isinstance(outputs[name], (bytes, Path))})  # those decode from the cache

    def _read_later(self, stage: Stage) -> dict[tuple[str, str], Any]:
        """The outputs at hand in memory that a stage after `stage` reads (the cleaned table, read by the
        discretise and the timeline stages): the later stage gets them without waiting for their entry's
        writer and reading them back. The others are let go (a stage holds the only reference to its
        inputs once the runner has pulled them)."""
        later = {n for st in self.stages[self.stages.index(stage) + 1:] for n in (*st.reads, *st.carries)}
        return {k: v for k, v in self._fresh.items() if k[1] in later}

    def _carried_later(self, name: str) -> bool:
        """Whether a later stage carries the artifact into its own entry (it then needs the bytes)."""
        return any(name in st.carries for st in self.stages)

    def _carried(self, name: str, stage: Stage) -> bytes:
        """The bytes of an artifact a stage carries: as its producer wrote them in this run (no wait for
        that entry), or read and checked from the cache."""
        producer = self._producer_of(name, before=stage)
        written = self._written.get((producer.name, name))
        return written if written is not None else self._bytes(name, before=stage)

    def _damaged(self, stage: Stage, why: CacheDamaged) -> None:
        key = self.key(stage)
        line = f"Stage cache entry `{stage.name}-{key}` was damaged ({why}); discarded it and recomputed the stage."
        self.warnings.append(line)
        self.on_event("warning", message=line)
        _EntryWriter.settle(self.cache, stage.name, key)
        self.cache.discard(stage.name, key)
        self._ready.discard(stage.name)
        self._written = {k: v for k, v in self._written.items() if k[0] != stage.name}
        self._fresh = {}
        self._mapped = {k: v for k, v in self._mapped.items() if k[0] != stage.name}

    # -- timing -------------------------------------------------------------------------------
    @contextlib.contextmanager
    def _timed(self, name: str) -> Iterator[dict[str, Any]]:
        rec: dict[str, Any] = {"reused": False}
        t0 = time.perf_counter()
        self.on_event("stage", name=name, status="start")
        yield rec
        sec = round(time.perf_counter() - t0 + self.timings.get(name, {}).get("seconds", 0.0), 3)
        self.timings[name] = {"seconds": sec, "reused": rec["reused"]}
        self.on_event("stage", name=name, status="reused" if rec["reused"] else "done", seconds=sec)

    @contextlib.contextmanager
    def timed(self, name: str) -> Iterator[None]:
        """Time a step that is not cached (the report), recorded beside the stages."""
        with self._timed(name):
            yield
