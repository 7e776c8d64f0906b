"""PC-stable skeleton search (Colombo & Maathuis 2014), level by level, each level a parallel battery.

Order of work, fixed and documented so the result never depends on column order or worker count:

* pairs are unordered and named ``(a, b)`` with ``a < b`` by name;
* level 0 tests every pair that is not forbidden with the empty conditioning set;
* at level ``l`` the adjacencies are frozen for the whole level; the candidate conditioning sets of
  ``(a, b)`` are the size-``l`` subsets of the neighbours of ``a`` (without ``b``), in lexicographic
  order of the sorted names, then the size-``l`` subsets of the neighbours of ``b`` (without ``a``)
  not already listed, in the same order;
* a pair's candidates are tested in that order until the first one that makes it independent: that
  set is the separating set and the pair is removed when the level ends;
* the search stops when no pair has a candidate set of the next size, or at ``max_order``.

The distinct rows of the table are found once (when that pays) and shared with every worker; a
worker runs its whole chunk of pairs in one compiled call (`CIEngine.first_independent_many`).
A level's candidate sets travel as index arrays (`Candidates`) and its tests come back as columns
(`TestColumns`), appended to the search's `TestLog`: no Python object per test or per candidate set.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from functools import lru_cache
from itertools import combinations
from typing import TYPE_CHECKING, Any, Callable, Sequence

import numpy as np

from ..independence._kernels import HAVE_NUMBA
from ..independence.columns import Candidates, TestColumns, TestLog
from ..independence.counting import compress_rows
from ..independence.engine import CIEngine, EngineSettings
from ..pairs import pair_key
from ..parallel import ParallelContext
from .knowledge import Knowledge

if TYPE_CHECKING:  # the mixed engine (and scipy.stats under it) loads only when numeric or timed signals need it
    from ..independence.mixed import MixedEngine

__all__ = ["SkeletonResult", "SearchState", "SignalExtras", "pc_stable_skeleton", "candidate_sets", "level_candidates"]

Pair = tuple[str, str]


@dataclass(frozen=True)
class SkeletonResult:
    """The skeleton and everything needed to explain it."""

    names: tuple[str, ...]
    edges: frozenset[Pair]
    separating_sets: dict[Pair, tuple[str, ...]]
    removed_by: dict[Pair, int]  # pair -> row of `tests` of the test that removed it
    tests: TestLog  # every test, in the order decided (one table per chunk); variables as indices into `names`
    levels: int  # number of levels run
    disagreements: frozenset[Pair] = frozenset()  # required pairs some test separated; rejected pairs none did
    forbidden: frozenset[Pair] = frozenset()
    rejected: frozenset[Pair] = frozenset()  # reviewer-rejected pairs, removed after the last level

    def adjacency(self) -> np.ndarray:
        """Boolean adjacency matrix in the order of `names`."""
        idx = {n: i for i, n in enumerate(self.names)}
        m = np.zeros((len(self.names), len(self.names)), dtype=bool)
        for a, b in self.edges:
            m[idx[a], idx[b]] = m[idx[b], idx[a]] = True
        return m


@dataclass
class SearchState:
    """What a finished level leaves behind; enough to resume the search at the next level."""

    level: int  # next level to run
    edges: set[Pair]
    separating_sets: dict[Pair, tuple[str, ...]] = field(default_factory=dict)
    removed_by: dict[Pair, int] = field(default_factory=dict)
    tests: TestLog = field(default_factory=TestLog)
    disagreements: set[Pair] = field(default_factory=set)


_pair = pair_key


def candidate_sets(a: str, b: str, neighbours: dict[str, set[str]], level: int) -> list[tuple[str, ...]]:
    """Candidate conditioning sets of the pair at a level, in the documented order."""
    if level == 0:
        return [()]
    out: list[tuple[str, ...]] = []
    seen: set[tuple[str, ...]] = set()
    for side, other in ((a, b), (b, a)):
        pool = sorted(neighbours[side] - {other})
        for s in combinations(pool, level):
            if s not in seen:
                seen.add(s)
                out.append(s)
    return out


@lru_cache(maxsize=256)
def _combination_rows(k: int, size: int) -> np.ndarray:
    """Every size-`size` subset of ``range(k)`` in lexicographic order, one per row (read-only)."""
    out = np.array(list(combinations(range(k), size)), dtype=np.int32).reshape(-1, size)
    out.setflags(write=False)
    return out


def level_candidates(pairs: Sequence[tuple[int, int]], adjacency: np.ndarray, rank: np.ndarray, level: int) -> Candidates:
    """`candidate_sets` of every pair at a level, as arrays of variable indices (`Candidates`).

    `adjacency` is the boolean adjacency matrix frozen for the level, `rank` each variable's place
    in name order; pairs without a candidate set are left out. The same sets in the same order as
    `candidate_sets` on the names (checked in tests/test_skeleton.py).
    """
    by_name = np.argsort(rank, kind="stable")  # the variables in name order
    if level <= 1:
        return _first_candidates(pairs, adjacency, by_name, level)
    xs, ys, counts, blocks = [], [], [], []
    member = np.zeros(adjacency.shape[0], dtype=bool)
    neighbours = [by_name[adjacency[v, by_name]] for v in range(adjacency.shape[0])] if level else []
    for a, b in pairs:
        if level == 0:
            sets = np.zeros((1, 0), dtype=np.int32)
        else:
            pool_a = neighbours[a][neighbours[a] != b]  # in name order
            pool_b = neighbours[b][neighbours[b] != a]
            from_a = pool_a[_combination_rows(pool_a.size, level)] if pool_a.size >= level else np.zeros((0, level), np.int32)
            from_b = pool_b[_combination_rows(pool_b.size, level)] if pool_b.size >= level else np.zeros((0, level), np.int32)
            if from_a.shape[0] and from_b.shape[0]:
                member[pool_a] = True  # a set of b's side is already listed when all of it is a's too
                from_b = from_b[~member[from_b].all(axis=1)]
                member[pool_a] = False
            sets = np.concatenate([from_a, from_b]).astype(np.int32, copy=False) if from_b.shape[0] else from_a.astype(np.int32, copy=False)
        if sets.shape[0]:
            xs.append(a)
            ys.append(b)
            counts.append(sets.shape[0])
            blocks.append(sets)
    bounds = np.zeros(len(counts) + 1, dtype=np.int64)
    np.cumsum(np.asarray(counts, dtype=np.int64), out=bounds[1:])
    return Candidates(
        x=np.asarray(xs, dtype=np.int32), y=np.asarray(ys, dtype=np.int32), bounds=bounds,
        sets=np.concatenate(blocks) if blocks else np.zeros((0, level), dtype=np.int32),
    )


def _first_candidates(pairs: Sequence[tuple[int, int]], adjacency: np.ndarray, by_name: np.ndarray, level: int) -> Candidates:
    """`level_candidates` of levels 0 and 1 for every pair at once: at level 1 each neighbour of `a` but
    `b` in name order, then each of `b`'s that is not `a`'s (the levels with the most pairs, where a loop
    over pairs cost 18 microseconds a pair on ALARM)."""
    p = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    if level == 0:  # one set, the empty one, per pair
        return Candidates(x=p[:, 0].astype(np.int32), y=p[:, 1].astype(np.int32),
                          bounds=np.arange(p.shape[0] + 1, dtype=np.int64), sets=np.zeros((p.shape[0], 0), dtype=np.int32))
    a, b = p[:, 0], p[:, 1]
    n, rows = adjacency.shape[0], np.arange(p.shape[0])
    place = np.empty(n, dtype=np.int64)
    place[by_name] = np.arange(n)
    named = adjacency[:, by_name]  # neighbours in name order
    side = np.concatenate([named[a], named[b]], axis=1)  # a's neighbours, then b's
    side[rows, place[b]] = False
    side[rows, n + place[a]] = False
    side[:, n:] &= ~side[:, :n]  # a set of b's side already listed on a's
    counts = side.sum(axis=1)
    keep = counts > 0
    _, cols = np.nonzero(side[keep])  # row by row, a's side first, each in name order
    bounds = np.zeros(int(keep.sum()) + 1, dtype=np.int64)
    np.cumsum(counts[keep], out=bounds[1:])
    return Candidates(x=a[keep].astype(np.int32), y=b[keep].astype(np.int32), bounds=bounds,
                      sets=by_name[cols % n].astype(np.int32).reshape(-1, 1))


_CHUNK_SETS = 250_000  # candidate sets per task at most: a task's arrays stay small however big the level
# candidate sets x table rows per task at least when a level is shared out: about 10-20 ms of counting.
# On ALARM forward-sampled to 100,000 rows (42,117 distinct) levels 3 and 4 (198 and 40 sets) took
# 0.04-0.05 s as 8 tasks on two processes and 0.01-0.02 s as one task in the run's process
_TASK_WORK = 20_000_000
# candidate sets x table rows of a level that opens the workers when they are not running yet: about a
# second or two of counting, what a worker's start-up costs (interpreter, numba, scipy.special, the
# compiled kernels); a smaller level runs whole in the run's own process
_OPEN_WORK = 2_000_000_000

_WORKER_ENGINES: dict[Any, tuple[Any, tuple[Any, ...]]] = {}  # key -> (engine, the arrays it reads)


@dataclass(frozen=True)
class SignalExtras:
    """What tests beyond codes need: normal scores of numeric signals, previous windows, lag copies.

    ``scores`` holds one row per variable (NaN rows for variables that are not numeric, flagged by
    ``numeric``); ``prev`` the previous-window row of each row (or None: rows independent).
    """

    scores: np.ndarray
    numeric: tuple[bool, ...]
    prev: np.ndarray | None
    series_length: float
    own_past: tuple[bool, ...]

    def identity(self) -> Any:
        """What names these extras across the tasks a worker gets (each task brings its own unpickled
        copy): the files of their memory-mapped arrays and the small fields. Arrays held in memory have
        no such name, so their copy's id is used and no engine is reused for them."""
        def name_of(a: Any) -> Any:
            return None if a is None else _file_of(a) or ("object", id(a))

        return (name_of(self.scores), name_of(self.prev), self.numeric, self.series_length, self.own_past)

    def engine(self, data: Any, names: Any, cards: Any, settings: EngineSettings, packed: Any) -> MixedEngine:
        from ..independence.mixed import MixedEngine
        from ..independence.residual import Timeline

        timeline = None if self.prev is None else Timeline(prev=np.asarray(self.prev), series_length=self.series_length)
        scores = [np.asarray(self.scores[i]) if num else None for i, num in enumerate(self.numeric)]
        return MixedEngine(data, names, cards, settings, scores=scores, timeline=timeline,
                           own_past=list(self.own_past), distinct=packed)


def _read_only(a: np.ndarray) -> np.ndarray:
    """`a` itself when it is read-only already (a memory map of the cache), else a read-only view."""
    if not a.flags.writeable:
        return a
    view = a.view()
    view.flags.writeable = False
    return view


def _file_of(a: Any) -> Any:
    """The file a memory-mapped array reads and exactly which of its bytes, as what (place of the first
    byte, shape, strides, type), or None. A slice of a memory map keeps its parent's file name and
    offset, so the place is taken from the array's own address in the mapping."""
    if not (isinstance(a, np.memmap) and getattr(a, "filename", None)):
        return None
    mapping = getattr(a, "_mmap", None)
    if mapping is None:
        return None
    try:
        start = a.ctypes.data - np.frombuffer(mapping, dtype=np.uint8).ctypes.data
    except (TypeError, ValueError, BufferError):
        return None
    import mmap

    place = start + int(a.offset) - int(a.offset) % mmap.ALLOCATIONGRANULARITY  # the mapping starts there
    return (str(a.filename), place, tuple(a.shape), tuple(a.strides), a.dtype.str)


_PACKED: dict[Any, Any] = {}  # the distinct rows of the last memory-mapped table searched in this process


def _distinct_rows(data: np.ndarray, max_ratio: float) -> tuple[np.ndarray, np.ndarray] | None:
    """`compress_rows(data)`, read-only; kept for a memory-mapped table (named by its file, with the
    file's inode, size and change time), so the battery and the skeleton stage of a run, which read the
    same cache entry, find its distinct rows once (and the skeleton goes on with the battery's engine)."""
    name = _file_of(data)
    if name is not None:
        try:
            st = os.stat(name[0])
        except OSError:
            name = None
        else:
            name = (*name, st.st_ino, st.st_size, st.st_mtime_ns, float(max_ratio))
    if name is not None and name in _PACKED:
        return _PACKED[name]
    packed = compress_rows(data, max_ratio=max_ratio)
    if packed is not None:
        for a in packed:
            a.flags.writeable = False
    if name is not None:
        _PACKED.clear()  # one table at a time
        _PACKED[name] = packed
    return packed


def _worker_engine(data: Any, names: Any, cards: Any, settings: EngineSettings, packed: Any,
                   extras: SignalExtras | None = None) -> CIEngine | MixedEngine:
    """The engine of a process, reused across its tasks (and levels) while they read the same tables.

    Building an engine and its first call cost milliseconds to tens of milliseconds; a level split
    into many chunks would pay that once per chunk. A memory map names its file, which holds one table
    for good (the run's cache entries, `parallel.share_array`, joblib's temporary copies of large
    arrays under unique names), so it is a safe key. The distinct rows a search found (`packed`) are
    read-only and never changed, so in the run's own process, which gets the same objects in every
    task of a search (and of the next stage, see `_distinct_rows`), the objects themselves name them
    (the cache entry holds them, so their ids are not reused meanwhile). Any other table held in
    memory gets a new engine.
    """
    def build() -> CIEngine | MixedEngine:
        # the kernels always get read-only tables, as a worker's memory maps are: numba compiles a kernel
        # once per kind of argument, so one compiled version serves every process and a fresh install
        # compiles it once (writable tables in the run's process were a second version, compiled and
        # loaded besides)
        table = _read_only(data)
        rows = None if packed is None else (_read_only(packed[0]), packed[1])
        if extras is not None:
            return extras.engine(table, names, cards, settings, rows)
        return CIEngine(table, names, cards, settings, distinct=rows)

    held = (data, *(packed or ()))
    tables = [_file_of(data)]
    if tables[0] is None and packed is None:
        return build()
    tables = [_file_of(a) or ("object", id(a)) for a in held]
    extra = None if extras is None else extras.identity()
    if extra is not None and any(isinstance(x, tuple) and x[:1] == ("object",) for x in extra[:2]):
        return build()  # scores or previous windows held in memory
    key = (tuple(tables), tuple(names), tuple(cards), settings, extra)
    entry = _WORKER_ENGINES.get(key)
    if entry is not None:
        return entry[0]
    _WORKER_ENGINES.clear()  # one table at a time per process
    engine = build()
    _WORKER_ENGINES[key] = (engine, held)
    return engine


def _battery_worker(shared: tuple[Any, ...], chunk: Candidates) -> tuple[TestColumns, np.ndarray]:
    """Test each pair of a chunk along its candidate sets until the first independence; the tests run
    (columns) and their number per pair."""
    data, names, cards, settings, distinct, weights, extras = shared
    packed = None if weights is None else (distinct, weights)
    return _worker_engine(data, names, cards, settings, packed, extras).first_independent_many(chunk)


def pc_stable_skeleton(
    data: np.ndarray,
    names: Sequence[str],
    cards: Sequence[int],
    settings: EngineSettings,
    *,
    max_order: int | None = None,
    knowledge: Knowledge | None = None,
    context: ParallelContext | None = None,
    resume: SearchState | None = None,
    on_level: Callable[[SearchState], None] | None = None,
    progress: Callable[[int, int], None] | None = None,
    extras: SignalExtras | None = None,
) -> SkeletonResult:
    """Search the skeleton with PC-stable.

    Parameters
    ----------
    data : coded table shaped (variables, rows), -1 for missing.
    names, cards : variable names and level counts, in the order of `data`.
    settings : the test settings (method, alpha, sparse policy, ...).
    max_order : largest conditioning-set size tried (None: no cap).
    knowledge : required and forbidden pairs.
    context : where batteries run (serial when None).
    resume : the state saved after a finished level, to go on from there.
    on_level : called with the state after each finished level (for checkpoints).
    progress : called with (level, pairs to test) before each level.
    extras : numeric scores, previous windows and lag copies (`SignalExtras`); None: codes only,
        rows independent (the compiled contingency path).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> z = rng.integers(0, 2, 3000); x = (z + (rng.random(3000) < .1)) % 2
    >>> y = (z + (rng.random(3000) < .1)) % 2
    >>> res = pc_stable_skeleton(np.vstack([x, y, z]).astype(np.int8), ["x", "y", "z"], [2, 2, 2],
    ...                          EngineSettings())
    >>> sorted(res.edges), res.separating_sets[("x", "y")]
    ([('x', 'z'), ('y', 'z')], ('z',))
    """
    names = list(names)
    knowledge = knowledge or Knowledge()
    distinct = weights = None
    if settings.compress_rows and settings.method != "permutation" and HAVE_NUMBA:
        packed = _distinct_rows(data, settings.compress_max_ratio)
        if packed is not None:  # distinct rows found once, shared by every worker
            distinct, weights = packed
    shared = (data, names, list(cards), settings, distinct, weights, extras)
    rows = int(data.shape[1] if distinct is None else distinct.shape[1])  # the rows a test's count visits
    all_pairs = [_pair(a, b) for a, b in combinations(sorted(names), 2)]
    forbidden = frozenset(p for p in all_pairs if knowledge.is_forbidden(*p))
    if resume is None:
        state = SearchState(level=0, edges={p for p in all_pairs if p not in forbidden})
    else:
        state = resume
    width = context.width if context is not None else 1
    index = {n: i for i, n in enumerate(names)}
    rank = np.empty(len(names), dtype=np.int64)
    rank[np.argsort(np.array(names, dtype=object), kind="stable")] = np.arange(len(names))
    serial: CIEngine | MixedEngine | None = None
    while max_order is None or state.level <= max_order:
        level = state.level
        adjacency = np.zeros((len(names), len(names)), dtype=bool)
        ordered = sorted(state.edges)
        for a, b in ordered:
            adjacency[index[a], index[b]] = adjacency[index[b], index[a]] = True
        work = level_candidates([(index[a], index[b]) for a, b in ordered], adjacency, rank, level)
        if not len(work):
            break
        if progress is not None:
            progress(level, len(work))
        n_sets = int(work.bounds[-1])
        spread = 1 if width <= 1 else min(len(work), 4 * width)
        if context is not None and context.backend == "local" and width > 1:
            # on local processes: as many tasks as keep every process busy, but none so small that handing
            # it over costs more than it saves (a few milliseconds each: the late levels of a search are a
            # handful of sets); one task runs in this process, and a level opens a pool that is not open
            # yet only when it is large enough to repay the workers' start-up
            opens = context.opened or n_sets * rows >= _OPEN_WORK
            spread = min(spread, max(1, n_sets * rows // _TASK_WORK)) if opens else 1
        chunks = work.split(max(spread, -(-n_sets // _CHUNK_SETS)))
        del work
        if context is None:  # one engine for the whole search: built (and its kernels readied) once
            if serial is None:
                serial = _worker_engine(data, names, list(cards), settings,
                                        None if weights is None else (distinct, weights), extras)
            outcome = [serial.first_independent_many(c) for c in chunks]
        else:
            outcome = context.map(_battery_worker, shared, chunks)
        removals = []
        for chunk, (table, counts) in zip(chunks, outcome):
            first = len(state.tests)
            state.tests.append(table)
            last = np.cumsum(counts) - 1  # each pair's last test
            for k in np.flatnonzero(table.values["independent"][last]).tolist():
                a, b = names[int(chunk.x[k])], names[int(chunk.y[k])]
                pair = (a, b)
                if knowledge.is_required(a, b):
                    state.disagreements.add(pair)
                elif pair not in state.removed_by:
                    removals.append(pair)
                    state.separating_sets[pair] = tuple(names[g] for g in table.given(int(last[k])))
                    state.removed_by[pair] = first + int(last[k])
        del chunks, outcome
        state.edges.difference_update(removals)
        state.level = level + 1
        if on_level is not None:
            on_level(state)
    # reviewer-rejected pairs were tested like any other; those the tests kept linked disagree
    rejected = frozenset(p for p in all_pairs if knowledge.is_rejected(*p))
    return SkeletonResult(
        names=tuple(names),
        edges=frozenset(state.edges - rejected),
        separating_sets=dict(state.separating_sets),
        removed_by=dict(state.removed_by),
        tests=state.tests.copy(),
        levels=state.level,
        disagreements=frozenset(state.disagreements | (state.edges & rejected)),
        forbidden=forbidden,
        rejected=rejected,
    )
