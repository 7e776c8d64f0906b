"""Tests as columns: every test of a search in one array per field, with no Python object per test.

`TestColumns` holds what `CITestResult` holds, field by field, for many tests: the two signals as
integer indices, the conditioning sets as one flat index array cut by offsets (the layout of an
Arrow list array), the numbers in numpy arrays, and the three text fields (``method``, ``policy``,
``correction``) as small codes into the table's own `labels`. Each test also carries the search
``level`` it belongs to and its ``phase`` (battery, skeleton or orientation). Names are put back
only when a table is written out (`tests_table` in ``stages/_evidence.py``) or one row is asked for
(`result`).

A table converts to and from an Arrow table (`to_arrow` / `from_arrow`): the form of a search
level's checkpoint part.

Examples
--------
>>> from pipeline.independence.engine import CIEngine
>>> import numpy as np
>>> d = np.array([[0, 0, 1, 1] * 50, [0, 1, 1, 1] * 50, [0, 1, 0, 1] * 50], dtype=np.int8)
>>> t = CIEngine(d, ["a", "b", "c"]).test_columns([(0, 1, ()), (0, 1, (2,))])
>>> len(t), t.given(1), t.result(1, ["a", "b", "c"]).given
(2, (2,), ('c',))
>>> TestColumns.from_arrow(t.to_arrow()).equals(t)
True
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any, Iterable, Sequence

import numpy as np

from .result import CITestResult

__all__ = ["TestColumns", "TestLog", "Candidates", "PHASES", "VALUE_TYPES", "LABELLED"]

PHASES = ("battery", "skeleton", "orientation")
# numeric fields of a CITestResult and the dtype each is kept in (that of its tests.parquet column)
VALUE_TYPES: dict[str, Any] = {
    "statistic": np.float64, "dof": np.int64, "pvalue": np.float64, "n": np.int64, "cmi_bits": np.float64,
    "cramers_v": np.float64, "sparse": np.bool_, "degenerate": np.bool_, "independent": np.bool_,
    "policy_applied": np.bool_, "permutations": np.int64, "n_effective": np.float64,
}
LABELLED = ("method", "policy", "correction")  # text fields: int8 codes into `labels`
_STORED = {**VALUE_TYPES, "dof": np.int32, "permutations": np.int32}  # kept narrower than written (they fit)
_INDEX = np.int32
NAN = float("nan")  # one object for every NaN a row gives back, so equal results compare equal
_RESULT_FIELDS = tuple(f.name for f in fields(CITestResult))
if set(_RESULT_FIELDS) != {"x", "y", "given", *VALUE_TYPES, *LABELLED}:  # a new result field needs a column here
    raise ImportError("TestColumns does not cover every CITestResult field")


@dataclass(frozen=True, eq=False)
class TestColumns:
    """Many tests, one array per field (see the module's docstring).

    ``x``, ``y``: int32 variable indices; ``given_offsets`` (int64, one more than the tests) cuts
    ``given_flat`` (int32) into each test's conditioning set; ``level`` int16, ``phase`` int8 (codes
    into `PHASES`); ``values``: the numeric fields of `VALUE_TYPES`; ``codes``: the `LABELLED` fields
    as int8 codes into ``labels``.
    """

    __test__ = False  # not a pytest class

    x: np.ndarray
    y: np.ndarray
    given_offsets: np.ndarray
    given_flat: np.ndarray
    level: np.ndarray
    phase: np.ndarray
    values: dict[str, np.ndarray]
    codes: dict[str, np.ndarray]
    labels: tuple[str, ...]

    def __len__(self) -> int:
        return int(self.x.shape[0])

    @property
    def nbytes(self) -> int:
        """Bytes held by the arrays (a column of one repeated value counts one value)."""
        arrays = [self.x, self.y, self.given_offsets, self.given_flat, self.level, self.phase,
                  *self.values.values(), *self.codes.values()]
        return int(sum(a.itemsize if (a.size > 1 and a.strides[0] == 0) else a.nbytes for a in arrays))

    # ---- building ------------------------------------------------------------------------------

    @classmethod
    def build(cls, x: Any, y: Any, given_offsets: Any, given_flat: Any, values: dict[str, Any],
              text: dict[str, Any], *, level: Any = None, phase: Any = None) -> "TestColumns":
        """A table from arrays. ``text`` gives each `LABELLED` field either one string for every test
        or an array of strings; ``level`` defaults to the size of each set, ``phase`` to battery for
        the empty set and skeleton otherwise."""
        x = np.asarray(x, dtype=_INDEX)
        n = x.shape[0]
        offsets = np.asarray(given_offsets, dtype=np.int64)
        sizes = np.diff(offsets)
        labels: list[str] = []
        codes = {}
        for name in LABELLED:
            v = text[name]
            if isinstance(v, str):
                if v not in labels:
                    labels.append(v)
                codes[name] = np.full(n, labels.index(v), dtype=np.int8)
            else:
                uniq, inv = np.unique(np.asarray(v, dtype=object).astype(str), return_inverse=True)
                look = np.empty(len(uniq), dtype=np.int8)
                for i, u in enumerate(uniq.tolist()):
                    if u not in labels:
                        labels.append(u)
                    look[i] = labels.index(u)
                codes[name] = look[inv.reshape(-1)] if n else np.zeros(0, dtype=np.int8)
        return cls(
            x=x, y=np.asarray(y, dtype=_INDEX), given_offsets=offsets,
            given_flat=np.asarray(given_flat, dtype=_INDEX),
            level=_compact((sizes if level is None else np.broadcast_to(np.asarray(level), (n,))).astype(np.int16)),
            phase=_compact((np.where(sizes == 0, 0, 1) if phase is None else
                            np.broadcast_to(np.asarray(phase), (n,))).astype(np.int8)),
            values={k: _compact(np.asarray(values[k], dtype=t).reshape(n)) for k, t in _STORED.items()},
            codes={k: _compact(c) for k, c in codes.items()}, labels=tuple(labels),
        )

    def __getstate__(self) -> dict[str, Any]:  # a column of one repeated value travels as that value
        state = dict(self.__dict__)
        for key in ("level", "phase"):
            state[key] = _pack(state[key])
        state["values"] = {k: _pack(a) for k, a in self.values.items()}
        state["codes"] = {k: _pack(a) for k, a in self.codes.items()}
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        for key in ("level", "phase"):
            state[key] = _unpack(state[key])
        state["values"] = {k: _unpack(a) for k, a in state["values"].items()}
        state["codes"] = {k: _unpack(a) for k, a in state["codes"].items()}
        self.__dict__.update(state)

    @classmethod
    def empty(cls) -> "TestColumns":
        """A table of no tests."""
        return cls.build([], [], [0], [], {k: [] for k in VALUE_TYPES}, {k: [] for k in LABELLED})

    @classmethod
    def from_results(cls, results: Sequence[CITestResult], index: dict[str, int], *, level: Any = None,
                     phase: Any = None) -> "TestColumns":
        """A table of result objects (`index` maps a variable name to its index)."""
        if not results:
            return cls.empty()
        sizes = np.fromiter((len(r.given) for r in results), dtype=np.int64, count=len(results))
        offsets = np.zeros(len(results) + 1, dtype=np.int64)
        np.cumsum(sizes, out=offsets[1:])
        flat = np.fromiter((index[g] for r in results for g in r.given), dtype=_INDEX, count=int(offsets[-1]))
        return cls.build(
            [index[r.x] for r in results], [index[r.y] for r in results], offsets, flat,
            {k: [getattr(r, k) for r in results] for k in VALUE_TYPES},
            {k: [getattr(r, k) for r in results] for k in LABELLED}, level=level, phase=phase,
        )

    def with_phase(self, phase: str) -> "TestColumns":
        """The same tests marked with one phase."""
        return _replace(self, phase=np.full(len(self), PHASES.index(phase), dtype=np.int8))

    @classmethod
    def concat(cls, tables: Iterable["TestColumns"]) -> "TestColumns":
        """The tests of several tables, in order (labels merged)."""
        tables = [t for t in tables if len(t)] or [cls.empty()]
        if len(tables) == 1:
            return tables[0]
        labels: list[str] = []
        remaps = []
        for t in tables:
            for s in t.labels:
                if s not in labels:
                    labels.append(s)
            remaps.append(np.array([labels.index(s) for s in t.labels] or [0], dtype=np.int8))
        base = np.cumsum([0] + [int(t.given_offsets[-1] - t.given_offsets[0]) for t in tables[:-1]])
        offsets = np.concatenate([np.zeros(1, dtype=np.int64)] + [t.given_offsets[1:] - t.given_offsets[0] + b
                                                                  for t, b in zip(tables, base)])
        return cls(
            x=np.concatenate([t.x for t in tables]), y=np.concatenate([t.y for t in tables]),
            given_offsets=offsets.astype(np.int64),
            given_flat=np.concatenate([t.given_flat[t.given_offsets[0]:t.given_offsets[-1]] for t in tables]),
            level=np.concatenate([t.level for t in tables]), phase=np.concatenate([t.phase for t in tables]),
            values={k: np.concatenate([t.values[k] for t in tables]) for k in _STORED},
            codes={k: np.concatenate([r[t.codes[k]] for t, r in zip(tables, remaps)]) for k in LABELLED},
            labels=tuple(labels),
        )

    # ---- reading -------------------------------------------------------------------------------

    @property
    def given_sizes(self) -> np.ndarray:
        """Size of each test's conditioning set."""
        return np.diff(self.given_offsets)

    def given(self, i: int) -> tuple[int, ...]:
        """The conditioning set of test `i` as indices."""
        a, b = int(self.given_offsets[i]), int(self.given_offsets[i + 1])
        return tuple(self.given_flat[a:b].tolist())

    def rows(self, a: int, b: int) -> "TestColumns":
        """Tests ``a:b`` (views, not copies)."""
        return _slice(self, a, b)

    def text(self, name: str) -> np.ndarray:
        """A `LABELLED` field as an array of strings (object dtype)."""
        return np.asarray(self.labels, dtype=object)[self.codes[name]] if self.labels else np.full(len(self), "", dtype=object)

    def result(self, i: int, names: Sequence[str]) -> CITestResult:
        """Test `i` as one result object (for the few callers that want one)."""
        kw: dict[str, Any] = {k: a[i].item() for k, a in self.values.items()}
        kw = {k: NAN if val != val else val for k, val in kw.items()}
        kw.update({k: self.labels[int(c[i])] for k, c in self.codes.items()})
        return CITestResult(x=names[int(self.x[i])], y=names[int(self.y[i])],
                            given=tuple(names[g] for g in self.given(i)), **kw)

    def results(self, names: Sequence[str]) -> list[CITestResult]:
        """Every test as a result object (one-off callers and tests; never the search), built column
        by column: the same objects as `result` row by row."""
        n = len(self)
        cols: dict[str, list[Any]] = {}
        for k, t in VALUE_TYPES.items():
            a = np.asarray(self.values[k]).astype(t)
            col = a.tolist()
            if a.dtype.kind == "f" and np.isnan(a).any():
                col = [NAN if v != v else v for v in col]
            cols[k] = col
        lab = np.asarray(self.labels, dtype=object)
        for k in LABELLED:
            cols[k] = lab[self.codes[k]].tolist() if n else []
        off, flat = self.given_offsets.tolist(), self.given_flat.tolist()
        sets: dict[tuple[int, ...], tuple[str, ...]] = {}
        given = []
        for i in range(n):
            key = tuple(flat[off[i]:off[i + 1]])
            g = sets.get(key)
            if g is None:
                g = sets[key] = tuple(names[j] for j in key)
            given.append(g)
        cols["x"] = [names[i] for i in self.x.tolist()]
        cols["y"] = [names[i] for i in self.y.tolist()]
        cols["given"] = given
        order = _RESULT_FIELDS
        out = []
        new, setattr_ = object.__new__, object.__setattr__
        for values in zip(*(cols[k] for k in order)):
            r = new(CITestResult)
            setattr_(r, "__dict__", dict(zip(order, values)))
            out.append(r)
        return out

    def equals(self, other: "TestColumns") -> bool:
        """The same tests with the same values (NaN equal to NaN; labels compared as text)."""
        if len(self) != len(other):
            return False
        same = [np.array_equal(a, b) for a, b in ((self.x, other.x), (self.y, other.y), (self.level, other.level),
                                                  (self.phase, other.phase), (self.given_sizes, other.given_sizes))]
        same.append(np.array_equal(self.given_flat[self.given_offsets[0]:self.given_offsets[-1]],
                                   other.given_flat[other.given_offsets[0]:other.given_offsets[-1]]))
        for k, t in VALUE_TYPES.items():
            same.append(np.array_equal(self.values[k], other.values[k], equal_nan=t is np.float64))
        same += [bool((self.text(k) == other.text(k)).all()) for k in LABELLED]
        return all(same)

    # ---- Arrow ---------------------------------------------------------------------------------

    def to_arrow(self) -> Any:
        """The tests as an Arrow table (a checkpoint part): indices, the sets as list<int32>, the text
        fields dictionary-encoded."""
        import pyarrow as pa

        start = int(self.given_offsets[0])
        given = pa.ListArray.from_arrays(pa.array((self.given_offsets - start).astype(np.int32)),
                                         pa.array(self.given_flat[start:int(self.given_offsets[-1])]))
        cols: dict[str, Any] = {"level": pa.array(self.level), "phase": pa.array(self.phase),
                                "x": pa.array(self.x), "y": pa.array(self.y), "given": given}
        for k in VALUE_TYPES:
            cols[k] = pa.array(self.values[k])
        labels = pa.array(list(self.labels), type=pa.string())
        for k in LABELLED:
            cols[k] = pa.DictionaryArray.from_arrays(pa.array(self.codes[k], type=pa.int8()), labels)
        return pa.table(cols)

    @classmethod
    def from_arrow(cls, table: Any) -> "TestColumns":
        """A table back from `to_arrow` (also from the DataFrame the stage cache makes of it)."""
        import pyarrow as pa
        import pyarrow.compute as pc

        if not isinstance(table, pa.Table):  # a pandas DataFrame: the stage cache hands Parquet back so
            table = _frame_to_arrow(table)
        for k in LABELLED:  # text first (a part's row groups may each have their own dictionary)
            col = table.column(k)
            if pa.types.is_dictionary(col.type):
                table = table.set_column(table.schema.get_field_index(k), k, col.cast(pa.string()))
        table = table.combine_chunks()
        given = table.column("given").chunk(0) if table.num_rows else pa.array([], type=pa.list_(pa.int32()))
        offsets = given.offsets.to_numpy().astype(np.int64)
        flat = given.values.to_numpy() if len(given.values) else np.zeros(0, dtype=_INDEX)
        flat = flat[offsets[0]:offsets[-1]]
        offsets = offsets - offsets[0]
        text = {}
        for k in LABELLED:
            text[k] = pc.fill_null(table.column(k), "").to_numpy(zero_copy_only=False)
        return cls.build(table.column("x").to_numpy(), table.column("y").to_numpy(), offsets, flat,
                         {k: table.column(k).to_numpy(zero_copy_only=False) for k in VALUE_TYPES}, text,
                         level=table.column("level").to_numpy(), phase=table.column("phase").to_numpy())


def _compact(a: np.ndarray) -> np.ndarray:
    """`a` itself, or, when every value is the same, a read-only view of one copy of that value
    (a column a table's tests share, e.g. ``permutations`` or a conditional test's NaN Cramer's V)."""
    if a.size < 2:
        return a
    first = a[:1]
    same = (a == first) | (np.isnan(a) & np.isnan(first)) if a.dtype.kind == "f" else a == first
    return np.broadcast_to(first.copy(), a.shape) if bool(same.all()) else a


def _pack(a: np.ndarray) -> Any:
    return ("same", a[:1].copy(), a.shape[0]) if a.ndim == 1 and a.size > 1 and a.strides[0] == 0 else a


def _unpack(a: Any) -> np.ndarray:
    return np.broadcast_to(a[1], (a[2],)) if isinstance(a, tuple) else a


def _frame_to_arrow(frame: Any) -> Any:
    import pyarrow as pa

    cols: dict[str, Any] = {}
    for name in frame.columns:
        s = frame[name]
        if name == "given":
            cols[name] = pa.array([np.asarray(v, dtype=_INDEX) for v in s], type=pa.list_(pa.int32()))
        elif name in LABELLED:
            cols[name] = pa.array(s.astype(str).tolist(), type=pa.string())
        else:
            cols[name] = pa.array(s.to_numpy())
    return pa.table(cols)


def _replace(t: TestColumns, **changes: Any) -> TestColumns:
    from dataclasses import replace

    return replace(t, **changes)


class TestLog:
    """The tests of a search: tables appended level by level, never copied into one (a 10,000,000-test
    search would need twice its memory for that). Reads go field by field (`field`, `text`)."""

    __test__ = False  # not a pytest class

    def __init__(self, parts: Iterable[TestColumns] = ()) -> None:
        self.parts: list[TestColumns] = [p for p in parts if len(p)]
        self._n = sum(len(p) for p in self.parts)
        self._ends: np.ndarray | None = None

    def __len__(self) -> int:
        return self._n

    def append(self, table: TestColumns) -> None:
        if len(table):
            self.parts.append(table)
            self._n += len(table)
            self._ends = None

    @property
    def ends(self) -> np.ndarray:
        """The row after each table's last row."""
        if self._ends is None:
            self._ends = np.cumsum([len(p) for p in self.parts], dtype=np.int64)
        return self._ends

    def since(self, start: int) -> list[TestColumns]:
        """The tables of the tests from row `start` on (the new tests of a checkpoint), not copied."""
        out, seen = [], 0
        for p in self.parts:
            if seen + len(p) > start:
                out.append(p if seen >= start else _slice(p, start - seen, len(p)))
            seen += len(p)
        return out

    def copy(self) -> "TestLog":
        """A new log over the same (never changed) tables."""
        return TestLog(self.parts)

    def columns(self) -> TestColumns:
        """Every test as one table (a copy: for small searches and checks)."""
        return TestColumns.concat(self.parts)

    def field(self, name: str) -> np.ndarray:
        """One field of every test: ``x``, ``y``, ``level``, ``phase``, ``given_sizes`` or a numeric field."""
        if not self.parts:
            return getattr(TestColumns.empty(), name) if name in _DIRECT else TestColumns.empty().values[name]
        if name in _DIRECT:
            return np.concatenate([getattr(p, name) for p in self.parts])
        return np.concatenate([p.values[name] for p in self.parts])

    @property
    def given_sizes(self) -> np.ndarray:
        return self.field("given_sizes")

    def text(self, name: str) -> np.ndarray:
        """A text field of every test as strings (object array)."""
        if not self.parts:
            return np.zeros(0, dtype=object)
        return np.concatenate([p.text(name) for p in self.parts])

    def given(self, i: int) -> tuple[int, ...]:
        """The conditioning set of test `i` as indices."""
        ends = self.ends
        k = int(np.searchsorted(ends, i, side="right"))
        return self.parts[k].given(i - (int(ends[k - 1]) if k else 0))

    def given_texts(self, rows: np.ndarray, names: Sequence[str]) -> list[str]:
        """The conditioning sets of the tests at `rows` as names joined with ``;`` (one gather per table,
        no call per test)."""
        rows = np.asarray(rows, dtype=np.int64)
        out = [""] * rows.size
        ends = self.ends
        part_of = np.searchsorted(ends, rows, side="right")
        named = np.asarray(list(names) or [""], dtype=object)
        for k in np.unique(part_of).tolist():
            at = np.flatnonzero(part_of == k)
            part = self.parts[k]
            local = rows[at] - (int(ends[k - 1]) if k else 0)
            starts, stops = part.given_offsets[local], part.given_offsets[local + 1]
            sizes = stops - starts
            bounds = np.concatenate([[0], np.cumsum(sizes)]).tolist()
            # every set's members side by side: position j of set i is starts[i] + j
            gather = np.repeat(starts - bounds[:-1], sizes) + np.arange(bounds[-1])
            members = named[part.given_flat[gather]].tolist()
            for i, a, b in zip(at.tolist(), bounds[:-1], bounds[1:]):
                if b > a:
                    out[i] = ";".join(members[a:b])
        return out

    def take(self, name: str, rows: np.ndarray) -> np.ndarray:
        """One field (as in `field`, or a text field) at the given rows of the whole log."""
        rows = np.asarray(rows, dtype=np.int64)
        ends = self.ends
        part_of = np.searchsorted(ends, rows, side="right")
        def column(p: TestColumns, at: np.ndarray) -> np.ndarray:  # the field at rows `at` of one table
            if name in LABELLED:  # the labels of those rows' codes, not of the whole table's
                return np.asarray(p.labels, dtype=object)[p.codes[name][at]] if p.labels else np.full(at.size, "", dtype=object)
            return (getattr(p, name) if name in _DIRECT else p.values[name])[at]

        none = np.zeros(0, dtype=np.int64)
        out = np.empty(rows.size, dtype=column(self.parts[0] if self.parts else TestColumns.empty(), none).dtype)
        for k in np.unique(part_of).tolist():
            sel = part_of == k
            out[sel] = column(self.parts[k], rows[sel] - (ends[k - 1] if k else 0))
        return out

    def results(self, names: Sequence[str]) -> list[CITestResult]:
        """Every test as a result object (checks and one-off callers; never the search)."""
        return [r for p in self.parts for r in p.results(names)]

    def equals(self, other: "TestLog | TestColumns") -> bool:
        """The same tests with the same values (see `TestColumns.equals`)."""
        return self.columns().equals(other.columns() if isinstance(other, TestLog) else other)


_DIRECT = ("x", "y", "level", "phase", "given_sizes")


def _slice(t: TestColumns, a: int, b: int) -> TestColumns:
    """Rows ``a:b`` of a table (views where possible)."""
    return TestColumns(
        x=t.x[a:b], y=t.y[a:b], given_offsets=t.given_offsets[a:b + 1], given_flat=t.given_flat,
        level=t.level[a:b], phase=t.phase[a:b], values={k: v[a:b] for k, v in t.values.items()},
        codes={k: v[a:b] for k, v in t.codes.items()}, labels=t.labels,
    )


@dataclass(frozen=True, eq=False)
class Candidates:
    """The candidate conditioning sets of many pairs, all of one size (one search level), as arrays.

    Pair ``i`` is ``(x[i], y[i])``; its sets are the rows ``bounds[i]:bounds[i + 1]`` of ``sets``
    (shaped (sets, size), int32 variable indices), tried in that order. Iterating gives
    ``(x, y, [set, ...])`` with tuples of ints, the form `first_independent_many` also takes.
    """

    x: np.ndarray
    y: np.ndarray
    bounds: np.ndarray
    sets: np.ndarray

    def __len__(self) -> int:
        return int(self.x.shape[0])

    @property
    def counts(self) -> np.ndarray:
        """Candidate sets per pair."""
        return np.diff(self.bounds)

    def __iter__(self):
        for i in range(len(self)):
            rows = self.sets[int(self.bounds[i]):int(self.bounds[i + 1])].tolist()
            yield int(self.x[i]), int(self.y[i]), [tuple(r) for r in rows]

    def take(self, a: int, b: int) -> "Candidates":
        """Pairs ``a:b`` (their sets as a view)."""
        lo, hi = int(self.bounds[a]), int(self.bounds[b])
        return Candidates(x=self.x[a:b], y=self.y[a:b], bounds=self.bounds[a:b + 1] - lo, sets=self.sets[lo:hi])

    def split(self, n_chunks: int) -> list["Candidates"]:
        """About `n_chunks` runs of pairs (kept in order) with similar numbers of sets."""
        n = len(self)
        if n_chunks <= 1 or n <= 1:
            return [self]
        total = int(self.bounds[-1]) or 1
        # a new chunk starts at the first pair after the running total passed each multiple of the target
        cuts = np.searchsorted(self.bounds[1:], np.arange(1, n_chunks) * (total / n_chunks), side="left") + 1
        cuts = np.unique(np.clip(cuts, 1, n - 1))
        edges = [0, *cuts.tolist(), n]
        return [self.take(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]
