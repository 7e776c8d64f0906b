"""The test engine: one object that answers "is x independent of y given z?" over coded data.

How a test is counted (every path gives the same integer counts, so the same CITestResult):

* repeated rows are counted once with their number of occurrences as a weight
  (`compress_rows`, used when the distinct rows are at most ``compress_max_ratio`` of the rows);
* lists of tests run in one compiled call (`test_many`, and `first_independent_many` for PC's
  candidate lists, which stops each pair at its first independent test);
* small tables are counted from bit planes of the original rows (one bit per row and level;
  a cell is a popcount of ANDed planes) when that is cheaper than a pass over the rows;
* tables with more cells than the kernel's dense cap (many levels, large conditioning sets) are
  counted in the same compiled call over the cells that occur, stratum by stratum; their
  statistics agree with the dense count to rounding (relative 1e-12), the integers exactly;
* permutation tests, tables whose cells cannot be indexed in 64 bits and tables refused by
  `max_table_cells` go one at a time through `count_flat` / `count_table`.

Inside the compiled loop a pair's decision is read off a table of critical values
``chi2.isf(alpha, dof)``; a statistic within a relative ``1e-7`` of its critical value is handed back
and decided by the exact p-value, and every decision is re-checked as ``pvalue > alpha`` afterwards,
so the decisions are exactly those of one test at a time.
"""

from __future__ import annotations

import math
import zlib
from collections import OrderedDict
from dataclasses import dataclass, replace
from typing import Any, Sequence

import numpy as np
from scipy.special import chdtrc as _chdtrc
from scipy.special import chdtri as _chdtri

from ..errors import ConfigError
from ._kernels import (
    _LANES_MAX_CELLS,
    GROUP_TOO_BIG,
    HAVE_NUMBA,
    bit_planes,
    flat_statistics,
    run_groups,
)
from .columns import NAN, VALUE_TYPES, Candidates, TestColumns
from .counting import compress_rows, count_flat, count_table, stratum_codes
from .permutation import permutation_pvalue
from .result import CITestResult, decide

__all__ = ["EngineSettings", "CIEngine"]

_LN2 = math.log(2.0)
_POLICY_CODE = {"flag": 0, "independent": 1, "dependent": 2}
_MARGIN = 1e-7  # relative band around the critical value inside which the exact p-value decides
_SCRATCH_CELLS = 1 << 20  # largest dense table (cells * lanes) the batched kernel counts into
_FIELDS = tuple(CITestResult.__dataclass_fields__)
_NAN = NAN  # one object, so results with a NaN Cramer's V compare equal


_new = object.__new__
_setattr = object.__setattr__


def _ranges(starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """The indices ``starts[k] .. starts[k] + counts[k] - 1`` of every k, concatenated."""
    counts = np.asarray(counts, dtype=np.int64)
    total = int(counts.sum())
    ends = np.cumsum(counts)
    return np.arange(total, dtype=np.int64) + np.repeat(np.asarray(starts, dtype=np.int64) - (ends - counts), counts)


def _make(values: tuple) -> CITestResult:
    """A CITestResult from its field values in order (the same object the constructor builds, faster)."""
    r = _new(CITestResult)
    _setattr(r, "__dict__", dict(zip(_FIELDS, values)))
    return r


@dataclass(frozen=True)
class EngineSettings:
    """Everything a test needs to know besides the data (a plain-data slice of the configuration)."""

    method: str = "g"
    alpha: float = 0.05
    sparse_policy: str = "flag"
    min_rows_per_cell: float = 5.0
    permutations: int = 999
    permutation_stop_hits: int = 20
    permutation_batch: int = 100
    permutation_score: str = "g"
    seed: int = 0
    partition_rows: int = 2_000_000
    max_table_cells: int = 50_000_000
    strata_cache_bytes: int = 128 * 1024 * 1024
    compress_rows: bool = True
    compress_max_ratio: float = 0.75
    bit_cost: float = 0.6  # bit planes when words * cells * bit_cost * 2**ng < rows * (1 + ng / 10); 0: off
    bit_planes_bytes: int = 64 * 1024 * 1024
    sparse_ratio: float = -1.0  # tables of more cells than this many times the rows: counted over the cells that occur; < 0: only tables past the dense cap

    def __post_init__(self) -> None:
        if self.method not in {"auto", "g", "chi2", "permutation", "gcm"}:
            raise ConfigError(f"`test.method` = {self.method!r}; use auto, g, chi2, permutation or gcm.")
        if self.sparse_policy not in {"flag", "independent", "dependent"}:
            raise ConfigError(
                f"`test.sparse_policy` = {self.sparse_policy!r}; use flag, independent or dependent."
            )

    @classmethod
    def from_config(cls, cfg: object) -> "EngineSettings":
        """Take the test, parallel and limit settings of a `Config`."""
        t = cfg.test  # type: ignore[attr-defined]
        return cls(
            method=t.method,
            alpha=t.alpha,
            sparse_policy=t.sparse_policy,
            min_rows_per_cell=t.min_rows_per_cell,
            permutations=t.permutations,
            permutation_stop_hits=t.permutation_stop_hits,
            permutation_batch=t.permutation_batch,
            permutation_score=t.permutation_score,
            seed=t.seed,
            partition_rows=cfg.parallel.partition_rows,  # type: ignore[attr-defined]
            max_table_cells=cfg.limits.max_table_cells,  # type: ignore[attr-defined]
        )


class CIEngine:
    """Conditional-independence tests over a coded table.

    Parameters
    ----------
    data : array shaped (variables, rows), integer codes ``0..k-1``, ``-1`` for missing.
    names : the variable names, in the order of `data`.
    cards : number of levels of each variable (defaults to ``max + 1`` per row of `data`).
    settings : the test settings.
    weights : optional number of times each row of the table occurs (``data`` then holds distinct
        rows, e.g. from `compress_rows`); every count, n and statistic is that of the expanded table.
        Without weights the engine compresses repeated rows itself when that pays
        (``settings.compress_rows``); the results are the same either way.
    distinct : optional ``compress_rows(data)`` result computed once by the caller (e.g. one search
        sharing it with all its workers); used for counting instead of compressing again.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> z = rng.integers(0, 2, 2000); x = (z + (rng.random(2000) < .1)) % 2
    >>> y = (z + (rng.random(2000) < .1)) % 2
    >>> eng = CIEngine(np.vstack([x, y, z]).astype(np.int8), ["x", "y", "z"])
    >>> eng.test("x", "y").independent, eng.test("x", "y", ["z"]).independent
    (False, True)
    >>> [r.independent for r in eng.test_many([("x", "y", ()), ("x", "y", ("z",))])]
    [False, True]
    """

    def __init__(
        self,
        data: np.ndarray,
        names: Sequence[str],
        cards: Sequence[int] | None = None,
        settings: EngineSettings | None = None,
        *,
        weights: np.ndarray | None = None,
        distinct: tuple[np.ndarray, np.ndarray] | None = None,
    ) -> None:
        data = np.asarray(data)
        if data.ndim != 2 or data.shape[0] != len(names):
            raise ValueError("data must be shaped (variables, rows) with one name per variable")
        self.data = data
        self.names = list(names)
        self.index = {name: i for i, name in enumerate(self.names)}
        if cards is None:
            cards = [int(max(int(row.max(initial=-1)) + 1, 1)) for row in data]
        self.cards = [int(c) for c in cards]
        self.settings = settings or EngineSettings()
        if self.settings.method in ("auto", "gcm"):  # this engine's tests are contingency tests: `auto` is G here
            self.settings = replace(self.settings, method="g")
        st = self.settings
        if weights is not None:
            weights = np.asarray(weights)
            if weights.shape != (data.shape[1],) or (weights.size and int(weights.min()) < 0):
                raise ValueError("weights must hold one non-negative count per row of the table")
            weights = weights.astype(np.int64, copy=False)
            self._rows = int(weights.sum())
        else:
            self._rows = int(data.shape[1])
        self._weights = weights
        self._cdata, self._cw = data, weights
        if distinct is not None and weights is None:
            cdata, cw = distinct
            if cdata.shape[0] != data.shape[0] or int(np.asarray(cw).sum()) != data.shape[1]:
                raise ValueError("distinct must be compress_rows(data): the same variables and rows")
            self._cdata, self._cw = np.asarray(cdata), np.asarray(cw, dtype=np.int64)
        elif weights is None and st.compress_rows and HAVE_NUMBA and st.method != "permutation":
            packed = compress_rows(data, max_ratio=st.compress_max_ratio)
            if packed is not None:
                self._cdata, self._cw = packed
        self._strata: OrderedDict[tuple[int, ...], tuple[np.ndarray, int, np.ndarray | None]] = (
            OrderedDict()
        )
        self._strata_bytes = 0
        self._kernel_ready = False
        self._crit = np.zeros(0)
        self._given_names: dict[tuple[int, ...], tuple[str, ...]] = {(): ()}

    @property
    def n_rows(self) -> int:
        """Rows of the coded table (the sum of the weights when weights were given)."""
        return self._rows

    @property
    def distinct_rows(self) -> int:
        """Rows the counting loops actually visit (distinct rows when the table was compressed)."""
        return int(self._cdata.shape[1])

    def _idx(self, v: int | str) -> int:
        return self.index[v] if isinstance(v, str) else int(v)

    def _stratum(self, given: tuple[int, ...]):
        if not given or self._cdata.shape[1] > self.settings.partition_rows:
            return None
        hit = self._strata.get(given)
        if hit is not None:
            self._strata.move_to_end(given)
            return hit
        value = stratum_codes(self._cdata, self.cards, given)
        self._strata[given] = value
        self._strata_bytes += value[0].nbytes
        while self._strata_bytes > self.settings.strata_cache_bytes and len(self._strata) > 1:
            _, old = self._strata.popitem(last=False)
            self._strata_bytes -= old[0].nbytes
        return value

    def table(self, x: int | str, y: int | str, given: Sequence[int | str] = ()) -> np.ndarray:
        """The counts shaped ``(observed strata, levels of x, levels of y)``."""
        xi, yi = self._idx(x), self._idx(y)
        gi = tuple(self._idx(g) for g in given)
        return count_table(
            self._cdata, self.cards, xi, yi, gi,
            partition_rows=self.settings.partition_rows,
            max_cells=self.settings.max_table_cells,
            strata=self._stratum(gi),
            weights=self._cw,
        ).counts

    # ---- one test ---------------------------------------------------------------------------

    def _resolve(self, x: int | str, y: int | str, given: Sequence[int | str]) -> tuple[int, int, tuple[int, ...]]:
        index = self.index
        xi = index[x] if x.__class__ is str else int(x)
        yi = index[y] if y.__class__ is str else int(y)
        if given:
            gi = tuple([index[g] if g.__class__ is str else int(g) for g in given])
            if xi in gi or yi in gi or len(set(gi)) != len(gi):
                raise ValueError("x, y and the conditioning set must be distinct variables")
        else:
            gi = ()
        if xi == yi:
            raise ValueError("x, y and the conditioning set must be distinct variables")
        return xi, yi, gi

    def test(self, x: int | str, y: int | str, given: Sequence[int | str] = ()) -> CITestResult:
        """Test x independent of y given `given` with the configured method and policy."""
        xi, yi, gi = self._resolve(x, y, given)
        st = self.settings
        if st.method == "permutation" or not HAVE_NUMBA:
            return self._single(xi, yi, gi)
        if not self._kernel_ready:
            self._prepare_kernel()
        one = self._one
        xs, ys, gs, gn = one["xs"], one["ys"], one["gs"], one["gn"]
        if len(gi) > gs.shape[1]:
            return self.test_columns([(xi, yi, gi)]).result(0, self.names)
        xs[0], ys[0], gn[0] = xi, yi, len(gi)
        gs[0, : len(gi)] = gi
        arrays = one["arrays"]
        _, status = run_groups(
            self._cdata, self._kw, self._cards_arr, self._colmiss, xs, ys, gs, gn, one["start"], one["stop"],
            False, False, one["crit"], _MARGIN, st.alpha, st.min_rows_per_cell, 0,
            self._cap, self._scratch, self._planes, self._off, self._bit_cost, self._sparse_from,
            st.max_table_cells, *arrays,
        )
        if status[0] == GROUP_TOO_BIG:
            return self._single(xi, yi, gi)
        g_all, c_all, dof_all, n_all, _, m_all, poss_all = arrays
        return self._finish(xi, yi, gi, float(g_all[0]), float(c_all[0]), int(dof_all[0]), int(n_all[0]),
                            int(m_all[0]), int(poss_all[0]))

    def test_many(self, tests: Sequence[tuple[int | str, int | str, Sequence[int | str]]]) -> list[CITestResult]:
        """Run a list of ``(x, y, given)`` tests; the same results as calling `test` on each, faster.

        Examples
        --------
        >>> d = np.array([[0, 0, 1, 1] * 50, [0, 1, 1, 1] * 50, [0, 1, 0, 1] * 50], dtype=np.int8)
        >>> [r.dof for r in CIEngine(d, ["a", "b", "c"]).test_many([(0, 1, ()), (0, 1, (2,))])]
        [1, 1]
        """
        return self.test_columns(tests).results(self.names)

    def test_columns(self, tests: Sequence[tuple[int | str, int | str, Sequence[int | str]]]) -> TestColumns:
        """`test_many` as a `TestColumns` table (no Python object per test)."""
        resolved = self._resolve_ints(tests)
        if resolved is None:
            resolved = [self._resolve(x, y, g) for x, y, g in tests]
        n = len(resolved)
        batch = self._batch_of(resolved)
        table, _ = self._run_groups(*batch, np.arange(n, dtype=np.int64), np.arange(1, n + 1, dtype=np.int64),
                                    stop_first=False)
        return table

    def _resolve_ints(self, tests) -> list[tuple[int, int, tuple[int, ...]]] | None:
        """`tests` as index triples when every test is ``(int, int, tuple of ints)`` (checked with
        arrays), else None (then `_resolve` looks names up one test at a time)."""
        if not tests or not all(t.__class__ is tuple and len(t) == 3 and t[2].__class__ is tuple for t in tests):
            return None
        try:
            flat = np.fromiter((v for t in tests for v in (t[0], t[1], *t[2])), dtype=np.int64)
        except (TypeError, ValueError):
            return None
        if not all(t[0].__class__ is int and t[1].__class__ is int for t in tests):
            return None
        sizes = np.fromiter((2 + len(t[2]) for t in tests), dtype=np.int64, count=len(tests))
        if flat.size and (flat.min() < 0 or flat.max() >= len(self.names)):
            raise IndexError("a variable index is outside the table")
        # distinct variables within each test: sort each test's indices and compare neighbours
        owner = np.repeat(np.arange(len(tests)), sizes)
        order = np.lexsort((flat, owner))
        f, o = flat[order], owner[order]
        if np.any((f[1:] == f[:-1]) & (o[1:] == o[:-1])):
            raise ValueError("x, y and the conditioning set must be distinct variables")
        return tests  # type: ignore[return-value]

    @staticmethod
    def _batch_of(tests: Sequence[tuple[int, int, tuple[int, ...]]]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Resolved ``(x, y, given)`` triples as the kernel's arrays (xs, ys, padded sets, set sizes)."""
        n_tests = len(tests)
        xs = np.fromiter((t[0] for t in tests), dtype=np.int64, count=n_tests)
        ys = np.fromiter((t[1] for t in tests), dtype=np.int64, count=n_tests)
        gn = np.fromiter((len(t[2]) for t in tests), dtype=np.int64, count=n_tests)
        width = max(1, int(gn.max(initial=0)))
        pads = [(0,) * (width - k) for k in range(width + 1)]
        gs = np.array([t[2] + pads[len(t[2])] for t in tests], dtype=np.int64).reshape(n_tests, width)
        return xs, ys, gs, gn

    def first_independent(
        self, x: int | str, y: int | str, candidates: Sequence[Sequence[int | str]]
    ) -> list[CITestResult]:
        """Test x and y given each candidate set in order up to and including the first independent one."""
        table, _ = self.first_independent_many([(x, y, candidates)])
        return table.results(self.names)

    def first_independent_many(
        self, pairs: Candidates | Sequence[tuple[int | str, int | str, Sequence[Sequence[int | str]]]]
    ) -> tuple[TestColumns, np.ndarray]:
        """`first_independent` for many pairs at once (PC's battery of one level).

        `pairs` is a `Candidates` table (indices, the search's form) or a list of ``(x, y, sets)``.
        Returns the tests run as one `TestColumns` table, pair after pair, and the number of tests
        of each pair (the last of a pair's tests is its first independent one, if any was).
        """
        if isinstance(pairs, Candidates):
            return self._run_candidates(pairs)
        resolved: list[tuple[int, int, tuple[int, ...]]] = []
        starts, stops = [], []
        for x, y, cands in pairs:
            starts.append(len(resolved))
            resolved.extend(self._resolve(x, y, s) for s in cands)
            stops.append(len(resolved))
        batch = self._batch_of(resolved)
        return self._run_groups(*batch, np.asarray(starts, dtype=np.int64), np.asarray(stops, dtype=np.int64),
                                stop_first=True)

    def _run_candidates(self, cand: Candidates) -> tuple[TestColumns, np.ndarray]:
        """`first_independent_many` of a `Candidates` table: its arrays go to the kernel as they are."""
        counts = cand.counts.astype(np.int64)
        xs = np.repeat(cand.x.astype(np.int64), counts)
        ys = np.repeat(cand.y.astype(np.int64), counts)
        sets = np.asarray(cand.sets, dtype=np.int64).reshape(xs.size, -1)
        k = sets.shape[1]
        p = len(self.names)
        if xs.size and (min(xs.min(), ys.min(), sets.min(initial=0)) < 0 or max(xs.max(), ys.max(), sets.max(initial=0)) >= p):
            raise IndexError("a variable index is outside the table")
        clash = xs == ys
        for i in range(k):
            clash |= (sets[:, i] == xs) | (sets[:, i] == ys)
            for j in range(i + 1, k):
                clash |= sets[:, i] == sets[:, j]
        if clash.any():
            raise ValueError("x, y and the conditioning set must be distinct variables")
        gs = sets if k else np.zeros((xs.size, 1), dtype=np.int64)
        gn = np.full(xs.size, k, dtype=np.int64)
        stops = np.asarray(cand.bounds[1:], dtype=np.int64)
        starts = np.asarray(cand.bounds[:-1], dtype=np.int64)
        return self._run_groups(xs, ys, np.ascontiguousarray(gs), gn, starts, stops, stop_first=True)

    # ---- the work -----------------------------------------------------------------------------

    def _single(self, xi: int, yi: int, gi: tuple[int, ...]) -> CITestResult:
        """One test counted outside the batched kernel (large tables, permutation, no numba)."""
        st = self.settings
        cards = self.cards
        kx, ky = cards[xi], cards[yi]
        possible = kx * ky
        for g in gi:
            possible *= cards[g]
        counts, n = count_flat(
            self._cdata, cards, xi, yi, gi,
            partition_rows=st.partition_rows, max_cells=st.max_table_cells, weights=self._cw,
        )
        g_stat, chi2_stat, dof, _, _, m = flat_statistics(counts, kx, ky)
        permutations = 0
        pvalue = None
        if st.method == "permutation" and dof != 0:
            pvalue, permutations = permutation_pvalue(
                self._rows_data(), xi, yi, gi, cards, g_stat,
                permutations=st.permutations,
                stop_hits=st.permutation_stop_hits,
                batch=st.permutation_batch,
                seed=self._test_seed(xi, yi, gi),
                alpha=st.alpha,
            )
        return self._finish(xi, yi, gi, g_stat, chi2_stat, dof, n, m, possible, pvalue, permutations)

    def _rows_data(self) -> np.ndarray:
        """The table with one column per row (weights expanded), for tests that need single rows."""
        if self._weights is None:
            return self.data
        return np.repeat(self.data, self._weights, axis=1)

    def _finish(self, xi, yi, gi, g_stat, chi2_stat, dof, n, m, possible, pvalue=None, permutations=0):
        """Package one test's numbers as a CITestResult (the same arithmetic as the batched path)."""
        st = self.settings
        method = st.method
        degenerate = dof == 0
        if degenerate:
            statistic, pvalue = 0.0, 1.0
        elif method == "permutation":
            statistic = g_stat
        else:
            statistic = chi2_stat if method == "chi2" else g_stat
            pvalue = float(_chdtrc(dof, statistic))
        sparse = n < st.min_rows_per_cell * possible
        independent, policy_applied = decide(pvalue, st.alpha, sparse, st.sparse_policy)
        if gi:
            cramers_v = _NAN
        else:
            cramers_v = math.sqrt(chi2_stat / (n * m)) if m > 0 and n > 0 else 0.0
        return _make((
            self.names[xi], self.names[yi], self._given_tuple(gi), float(statistic), int(dof),
            float(pvalue), int(n), method, g_stat / (2.0 * n * _LN2) if n > 0 else 0.0, cramers_v,
            bool(sparse), bool(degenerate), bool(independent), st.sparse_policy, policy_applied,
            permutations, "none", float(n),
        ))

    def _given_tuple(self, gi: tuple[int, ...]) -> tuple[str, ...]:
        hit = self._given_names.get(gi)
        if hit is None:
            names = self.names
            hit = self._given_names[gi] = tuple(names[g] for g in gi)
        return hit

    def _prepare_kernel(self) -> None:
        data = self._cdata
        self._cards_arr = np.asarray(self.cards, dtype=np.int64)
        self._colmiss = np.asarray((data < 0).any(axis=1) if data.size else np.zeros(len(self.cards), bool))
        rows = data.shape[1]
        st = self.settings
        self._cap = min(max(4 * min(rows, st.partition_rows), 1 << 16), st.max_table_cells)
        # tables of more cells than this are counted over the cells that occur (`_sparse_stats`)
        self._sparse_from = int(st.sparse_ratio * rows) if st.sparse_ratio >= 0 else 1 << 62
        dtype = np.int32 if self._rows < (1 << 31) else np.int64
        self._scratch = np.zeros(max(4 * _LANES_MAX_CELLS, min(4 * self._cap, _SCRATCH_CELLS)), dtype=dtype)
        self._kw = None if self._cw is None else (
            self._cw.astype(np.int32) if dtype == np.int32 else self._cw)
        self._one: dict[str, Any] = {  # reusable arrays of a one-test batch (`test`)
            "xs": np.zeros(1, dtype=np.int64), "ys": np.zeros(1, dtype=np.int64),
            "gs": np.zeros((1, 8), dtype=np.int64), "gn": np.zeros(1, dtype=np.int64),
            "start": np.zeros(1, dtype=np.int64), "stop": np.ones(1, dtype=np.int64),
            "crit": np.zeros(1), "arrays": [np.zeros(1), np.zeros(1)] + [np.zeros(1, dtype=np.int64) for _ in range(5)],
        }
        self._bit_cost = 0.0
        self._planes, self._off = np.zeros((1, 1), dtype=np.uint64), np.zeros(len(self.cards), dtype=np.int64)
        words = (self.data.shape[1] + 63) // 64
        smallest = sorted(self.cards)[:2] if len(self.cards) >= 2 else [1, 1]
        if (self._weights is None and st.bit_cost > 0 and self.data.shape[1] > 0
                and sum(self.cards) * words * 8 <= st.bit_planes_bytes
                and words * smallest[0] * smallest[1] * st.bit_cost < rows):  # some test would use them
            self._planes, self._off = bit_planes(self.data, self.cards)
            self._bit_cost = float(st.bit_cost)
        self._kernel_ready = True

    def _critical(self, max_dof: int) -> np.ndarray:
        """chi2.isf(alpha, dof) for dof 0..max_dof (cached, grown on demand)."""
        if self._crit.shape[0] <= max_dof:
            size = max(max_dof + 1, 2 * self._crit.shape[0], 1024)
            crit = _chdtri(np.arange(size, dtype=np.float64), self.settings.alpha)  # = chi2.isf(alpha, dof)
            crit[0] = 0.0
            self._crit = np.ascontiguousarray(np.nan_to_num(crit, nan=0.0), dtype=np.float64)
        return self._crit

    def _run_groups(self, xs: np.ndarray, ys: np.ndarray, gs: np.ndarray, gn: np.ndarray, starts: np.ndarray,
                    stops: np.ndarray, stop_first: bool) -> tuple[TestColumns, np.ndarray]:
        """Run groups of tests (group ``k`` is tests ``starts[k]:stops[k]``, in order, groups ascending);
        with `stop_first` each group stops at its first independent test, decided exactly as
        ``pvalue > alpha`` after the sparse policy. Returns the tests run, in order, and their number
        per group."""
        st = self.settings
        n_tests = int(xs.shape[0])
        n_groups = int(starts.shape[0])
        run = np.zeros(n_tests, dtype=bool)  # tests whose result is kept
        single: dict[int, CITestResult] = {}  # tests counted one at a time (large tables, permutation)
        if n_tests == 0:
            return TestColumns.empty(), np.zeros(n_groups, dtype=np.int64)

        def one(t: int) -> CITestResult:
            r = single[t] = self._single(int(xs[t]), int(ys[t]), tuple(gs[t, : gn[t]].tolist()))
            run[t] = True
            return r

        if st.method == "permutation" or not HAVE_NUMBA:
            for a, b in zip(starts.tolist(), stops.tolist()):
                for t in range(a, b):
                    if one(t).independent and stop_first:
                        break
            return self._columns(xs, ys, gs, gn, run, single, None, starts, stops)
        if not self._kernel_ready:
            self._prepare_kernel()
        arrays = [np.zeros(n_tests), np.zeros(n_tests)] + [np.zeros(n_tests, dtype=np.int64) for _ in range(5)]
        crit = self._critical(1024) if stop_first else np.zeros(1)
        policy = _POLICY_CODE[st.sparse_policy]
        independent = np.zeros(n_tests, dtype=bool)
        live = np.nonzero(stops > starts)[0]
        pos = starts.astype(np.int64).copy()
        while live.size:
            g_start = np.ascontiguousarray(pos[live])
            g_stop = np.ascontiguousarray(stops[live])
            ran, status = run_groups(
                self._cdata, self._kw, self._cards_arr, self._colmiss, xs, ys, gs, gn, g_start, g_stop,
                stop_first, st.method == "chi2", crit, _MARGIN, st.alpha, st.min_rows_per_cell, policy,
                self._cap, self._scratch, self._planes, self._off, self._bit_cost, self._sparse_from,
                st.max_table_cells, *arrays,
            )
            idx = _ranges(g_start, ran)
            independent[idx] = self._batch_values(idx, arrays, gn)["independent"]
            top = int(arrays[2][idx].max(initial=0))
            if stop_first and top >= crit.shape[0]:  # a group stopped at a dof beyond the critical values known
                crit = self._critical(2 * top)  # (tables of thousands of cells): grown, so the next round goes on
            run[idx] = True
            nxt = []
            for k, a, r, s in zip(live.tolist(), g_start.tolist(), ran.tolist(), status.tolist()):
                if stop_first and r:
                    hit = np.flatnonzero(independent[a:a + r])
                    if hit.size:
                        run[a + int(hit[0]) + 1:a + r] = False  # decided before the kernel stopped
                        continue
                p = a + r
                if s == GROUP_TOO_BIG:
                    if one(p).independent and stop_first:
                        continue
                    p += 1
                if p < stops[k]:
                    pos[k] = p
                    nxt.append(k)
            live = np.asarray(nxt, dtype=np.int64)
        return self._columns(xs, ys, gs, gn, run, single, arrays, starts, stops)

    def _batch_values(self, idx: np.ndarray, arrays, gn: np.ndarray) -> dict[str, np.ndarray]:
        """The numeric fields of the kernel's tests at `idx`, with the arithmetic of `_finish`."""
        st = self.settings
        g_all, c_all, dof_all, n_all, _, m_all, poss_all = arrays
        g = g_all[idx]
        c = c_all[idx]
        dof = dof_all[idx]
        n = n_all[idx]
        m = m_all[idx]
        possible = poss_all[idx]
        degenerate = dof == 0
        stat = c if st.method == "chi2" else g
        stat = np.where(degenerate, 0.0, stat)
        with np.errstate(invalid="ignore", divide="ignore"):
            pvalue = np.where(degenerate, 1.0, _chdtrc(dof, stat))
            cmi = np.where(n > 0, g / (2.0 * n * _LN2), 0.0)
            v = np.where((m > 0) & (n > 0), np.sqrt(c / (n * m)), 0.0)
        sparse = n < st.min_rows_per_cell * possible
        raw = pvalue > st.alpha
        if st.sparse_policy != "flag":
            decided = st.sparse_policy == "independent"
            applied = sparse & (raw != decided)
            independent = np.where(sparse, decided, raw)
        else:
            applied = np.zeros(idx.size, dtype=bool)
            independent = raw
        return {
            "statistic": stat, "dof": dof, "pvalue": pvalue, "n": n, "cmi_bits": cmi,
            "cramers_v": np.where(gn[idx] > 0, _NAN, v), "sparse": sparse, "degenerate": degenerate,
            "independent": independent, "policy_applied": applied,
            "permutations": np.zeros(idx.size, dtype=np.int64), "n_effective": n.astype(np.float64),
        }

    def _columns(self, xs, ys, gs, gn, run: np.ndarray, single: dict[int, CITestResult], arrays,
                 starts: np.ndarray, stops: np.ndarray) -> tuple[TestColumns, np.ndarray]:
        """The kept tests (`run`, in order) as a table, and their number per group."""
        st = self.settings
        idx = np.flatnonzero(run)
        sizes = gn[idx]
        offsets = np.zeros(idx.size + 1, dtype=np.int64)
        np.cumsum(sizes, out=offsets[1:])
        width = gs.shape[1]
        keep = np.arange(width)[None, :] < sizes[:, None]
        flat = gs[idx][keep] if idx.size else np.zeros(0, dtype=np.int64)
        if arrays is not None:
            values = self._batch_values(idx, arrays, gn)
        else:
            values = {k: np.zeros(idx.size, dtype=t) for k, t in VALUE_TYPES.items()}
        text: dict[str, Any] = {"method": st.method, "policy": st.sparse_policy, "correction": "none"}
        if single:
            where = np.searchsorted(idx, np.fromiter(single, dtype=np.int64, count=len(single)))
            for k in VALUE_TYPES:
                values[k] = np.asarray(values[k], dtype=VALUE_TYPES[k]).copy()
                values[k][where] = [getattr(r, k) for r in single.values()]
            corr = np.full(idx.size, "none", dtype=object)
            corr[where] = [r.correction for r in single.values()]
            text["correction"] = corr
        table = TestColumns.build(xs[idx], ys[idx], offsets, flat, values, text)
        cum = np.zeros(run.size + 1, dtype=np.int64)
        np.cumsum(run, out=cum[1:])
        return table, cum[stops] - cum[starts]

    def _test_seed(self, x: int, y: int, given: tuple[int, ...]) -> np.random.SeedSequence:
        a, b = sorted((self.names[x], self.names[y]))
        key = "\x1f".join([a, b, *sorted(self.names[g] for g in given)])
        return np.random.SeedSequence([self.settings.seed, zlib.crc32(key.encode("utf-8"))])
