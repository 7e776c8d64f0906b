"""Skeleton search stage: PC-stable from the marginal battery on, checkpointed level by level,
then optional orientation, then the evidence table."""

from __future__ import annotations

import contextlib
import json
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from ..independence.columns import PHASES, TestColumns, TestLog
from ..independence.engine import CIEngine, EngineSettings
from ..independence.result import CITestResult
from ..parallel import ParallelContext
from ..runs import atomic_write_json
from ..search.knowledge import Knowledge
from ..search.orient import Orientation, orient
from ..search.skeleton import Pair, SearchState, SignalExtras, SkeletonResult, pc_stable_skeleton
from ._evidence import evidence_frame, tests_parquet

__all__ = ["SearchOutcome", "run", "state_doc", "state_from"]


@dataclass(frozen=True)
class SearchOutcome:
    """The skeleton, its orientation and the two tables that explain them (the tests as tests.parquet,
    written from the search's tables without one table of every test in memory: its bytes, or its path
    when the search was given one)."""

    skeleton: SkeletonResult
    orientation: Orientation | None
    tests: bytes | Path
    evidence: pd.DataFrame


def state_doc(state: SearchState) -> dict[str, Any]:
    """A search state without its tests, as plain data (the tests go in column parts)."""
    return {
        "level": state.level,
        "edges": sorted(state.edges),
        "separating_sets": [[list(k), list(v)] for k, v in sorted(state.separating_sets.items())],
        "removed_by": [[list(k), v] for k, v in sorted(state.removed_by.items())],
        "disagreements": sorted(state.disagreements),
        "n_tests": len(state.tests),
    }


def state_from(doc: dict[str, Any], tests: TestLog | TestColumns) -> SearchState:
    """A search state back from `state_doc` and its tests."""
    if int(doc["n_tests"]) != len(tests):
        raise ValueError(f"the state counts {doc['n_tests']} tests, its parts hold {len(tests)}")
    return SearchState(
        level=int(doc["level"]),
        edges={tuple(e) for e in doc["edges"]},  # type: ignore[misc]
        separating_sets={tuple(k): tuple(v) for k, v in doc["separating_sets"]},  # type: ignore[misc]
        removed_by={tuple(k): int(v) for k, v in doc["removed_by"]},  # type: ignore[misc]
        tests=tests.copy() if isinstance(tests, TestLog) else TestLog([tests]),
        disagreements={tuple(e) for e in doc["disagreements"]},  # type: ignore[misc]
    )


_STATE = "state.json"

# How often the stage checkpoints its search, in seconds of search: a level is saved once this long has
# passed since the last save, so a search stopped midway redoes at most about this much (plus the level
# it was in), and a quick search writes no checkpoint at all. On ALARM (10,000 rows, about 40 ms of
# search) the checkpoints of every level kept the stage 0-13 ms longer, waiting for their writes.
CHECKPOINT_EVERY = 2.0


@dataclass(frozen=True)
class _Level:
    """What the checkpoint after a level writes, taken from the state when the level ends."""

    stem: str
    tables: list[TestColumns]  # the tests added since the last checkpoint (never changed afterwards)
    removed: list[list[Any]]  # [a, b, row of its test, separating set] of the pairs removed since then
    doc: dict[str, Any]  # the state naming every part so far


def _level_of(state: SearchState, first_new: int, parts: list[str], saved: set[Pair]) -> _Level:
    """The checkpoint after a level: only what the search added since the last one (`saved`: the removed
    pairs already written, and `parts`, both extended here), so a checkpoint costs the level's work, not
    the search's so far."""
    stem = f"level-{state.level - 1:04d}"
    new = sorted(state.removed_by.keys() - saved)
    removed = [[a, b, state.removed_by[(a, b)], list(state.separating_sets[(a, b)])] for a, b in new]
    saved.update(new)
    parts.append(f"{stem}.parquet")
    doc = {"level": state.level, "edges": sorted(state.edges), "disagreements": sorted(state.disagreements),
           "n_tests": len(state.tests), "parts": list(parts)}
    return _Level(stem=stem, tables=state.tests.since(first_new) or [TestColumns.empty()], removed=removed, doc=doc)


def _write_level(folder: Path, level: _Level) -> None:
    """A level's tests as one Parquet part, the pairs it removed (with their separating sets) beside it as
    ``level-NNNN.json``, then the state naming every part so far (written last: a state file only ever
    names parts that are complete)."""
    import pyarrow.parquet as pq

    tmp = folder / f".{level.stem}.parquet.tmp"
    with pq.ParquetWriter(tmp, level.tables[0].to_arrow().schema, compression="zstd") as writer:
        for table in level.tables:  # one table at a time: the level is never copied whole
            writer.write_table(table.to_arrow())
    atomic_write_json(folder / f"{level.stem}.json", {"removed": level.removed}, for_reading=False)
    tmp.replace(folder / f"{level.stem}.parquet")
    atomic_write_json(folder / _STATE, level.doc, for_reading=False)  # read by resume only


class _Checkpoints:
    """Writes the checkpoint of each level, in order, on a thread of its own while the next level runs
    (Parquet encoding and the synced writes release the interpreter lock). On ALARM (10,000 rows, one
    process) they took about 0.05 s of the stage's 0.12-0.15 s when written in line. After a failed write
    no later level is written (its state would name a part that is not there); `close` waits for the
    writes and raises that error."""

    def __init__(self, folder: Path) -> None:
        import queue

        self.folder = folder
        self.error: BaseException | None = None
        self._queue: queue.SimpleQueue[_Level | None] = queue.SimpleQueue()
        self._thread = threading.Thread(target=self._write, name="edgeproof-checkpoint", daemon=True)
        self._thread.start()

    def put(self, level: _Level) -> None:
        self._queue.put(level)

    def _write(self) -> None:
        while (level := self._queue.get()) is not None:
            if self.error is None:
                try:
                    _write_level(self.folder, level)
                except BaseException as err:  # noqa: BLE001 - raised by `close`
                    self.error = err

    def close(self) -> None:
        self._queue.put(None)
        self._thread.join()
        if self.error is not None:
            raise self.error


def _read_doc(folder: Path) -> dict[str, Any] | None:
    try:
        return json.loads((folder / _STATE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _resume(folder: Path, start: SearchState) -> tuple[SearchState, list[str]]:
    """The state of the last checkpointed level and the parts it names, or `start` and no parts
    when there is none (or it does not fit)."""
    import pyarrow.parquet as pq

    doc = _read_doc(folder)
    if doc is None:
        return start, []
    try:
        tests = start.tests.copy()
        separating, removed = dict(start.separating_sets), dict(start.removed_by)
        for part in doc["parts"]:
            tests.append(TestColumns.from_arrow(pq.read_table(folder / part)))
            side = json.loads((folder / part).with_suffix(".json").read_text(encoding="utf-8"))
            for a, b, row, given in side["removed"]:
                removed[(a, b)], separating[(a, b)] = int(row), tuple(given)
        if int(doc["n_tests"]) != len(tests):
            raise ValueError(f"the state counts {doc['n_tests']} tests, its parts hold {len(tests)}")
        state = SearchState(level=int(doc["level"]), edges={tuple(e) for e in doc["edges"]},  # type: ignore[misc]
                            separating_sets=separating, removed_by=removed, tests=tests,
                            disagreements={tuple(e) for e in doc["disagreements"]})  # type: ignore[misc]
        return state, list(doc["parts"])
    except (OSError, ValueError, KeyError, TypeError):
        return start, []  # a checkpoint that does not fit this search: start over


def run(
    data: np.ndarray,
    names: list[str],
    cards: list[int],
    settings: EngineSettings,
    knowledge: Knowledge,
    marginal_state: SearchState,
    *,
    max_order: int | None,
    orient_graph: bool = False,
    collider_rule: str = "conservative",
    context: ParallelContext | None = None,
    checkpoint: Path | None = None,
    stability: dict[tuple[str, str], float] | None = None,
    progress: Callable[[int, int], None] | None = None,
    extras: SignalExtras | None = None,
    tests_to: Path | None = None,
    checkpoint_every: float = 0.0,
) -> SearchOutcome:
    """Go on from the marginal battery to the full skeleton.

    `checkpoint` is a folder: after a level its tests (those since the last checkpoint) are appended
    there as one Parquet part and the state is saved, when at least `checkpoint_every` seconds have
    passed since the search started or last saved (0: after every level); a search given a folder
    holding a checkpoint resumes after its last saved level.
    `tests_to`: write tests.parquet there (the outcome holds its path) rather than keeping its bytes.
    """
    m = marginal_state  # its test columns are never changed: shared, not copied
    state = SearchState(level=m.level, edges=set(m.edges), separating_sets=dict(m.separating_sets),
                        removed_by=dict(m.removed_by), tests=m.tests.copy(), disagreements=set(m.disagreements))
    save = writer = None
    if checkpoint is not None:
        checkpoint.mkdir(parents=True, exist_ok=True)
        state, parts = _resume(checkpoint, state)
        written, saved, last = [len(state.tests)], set(state.removed_by), [time.perf_counter()]
        writer = _Checkpoints(checkpoint)

        def save(s: SearchState) -> None:
            if time.perf_counter() - last[0] < checkpoint_every:
                return  # a quick level: its tests go into the next checkpoint
            writer.put(_level_of(s, written[0], parts, saved))
            written[0], last[0] = len(s.tests), time.perf_counter()

    try:
        outcome = _search(data, names, cards, settings, knowledge, state, save, max_order=max_order,
                          orient_graph=orient_graph, collider_rule=collider_rule, context=context,
                          stability=stability, progress=progress, extras=extras, tests_to=tests_to)
    except BaseException:
        if writer is not None:
            with contextlib.suppress(BaseException):
                writer.close()  # the levels done are checkpointed before the error goes on
        raise
    if writer is not None:
        writer.close()
    return outcome


def _search(data: np.ndarray, names: list[str], cards: list[int], settings: EngineSettings, knowledge: Knowledge,
            state: SearchState, save: Callable[[SearchState], None] | None, *, max_order: int | None,
            orient_graph: bool, collider_rule: str, context: ParallelContext | None,
            stability: dict[tuple[str, str], float] | None, progress: Callable[[int, int], None] | None,
            extras: SignalExtras | None, tests_to: Path | None) -> SearchOutcome:
    """`run` from the state it starts at: the levels, orientation and the two tables."""
    skeleton = pc_stable_skeleton(
        data, names, cards, settings, max_order=max_order, knowledge=knowledge, context=context,
        resume=state, on_level=save, progress=progress, extras=extras,
    )
    del state  # its parts are in `skeleton.tests` now
    orientation = None
    asked_tests: list[CITestResult] = []
    if orient_graph:
        engine = extras.engine(data, names, cards, settings, None) if extras is not None else CIEngine(data, names, cards, settings)
        asked: dict[tuple[str, str, tuple[str, ...]], bool] = {}

        def independent(a: str, c: str, s: tuple[str, ...]) -> bool:
            key = (min(a, c), max(a, c), tuple(sorted(s)))
            if key not in asked:
                r = engine.test(key[0], key[1], key[2])
                asked_tests.append(r)
                asked[key] = r.independent
            return asked[key]

        orientation = orient(
            names, skeleton.edges, skeleton.separating_sets, rule=collider_rule,
            independent=independent, max_order=max_order, knowledge=knowledge,
        )
    oriented = TestColumns.from_results(asked_tests, {n: i for i, n in enumerate(names)},
                                        phase=PHASES.index("orientation"))
    # one after the other: on a thread beside the evidence table, tests.parquet took ALARM's stage longer
    # (15-24 ms for both against 11-18 ms in turn, five fresh runs each), the two handing the
    # interpreter lock back and forth
    tests = tests_parquet([*skeleton.tests.parts, oriented], names, tests_to)
    evidence = evidence_frame(skeleton, knowledge, settings.alpha, orientation, stability)
    return SearchOutcome(skeleton=skeleton, orientation=orientation, tests=tests, evidence=evidence)
