"""The test engine: one object that answers "is x independent of y given z?" over coded data.

How a test is counted (every path gives the same integer counts, so the same CITestResult):

* repeated rows are counted once with their number of occurrences as a weight
  (`compress_rows`, used when the distinct rows are at most ``compress_max_ratio`` of the rows);
* lists of tests run in one compiled call (`test_many`, and `first_independent_many` for PC's
  candidate lists, which stops each pair at its first independent test);
* small tables are counted from bit planes of the original rows (one bit per row and level;
  a cell is a popcount of ANDed planes) when that is cheaper than a pass over the rows;
* tables with more cells than the kernel's dense cap, and permutation tests, go one at a time
  through `count_flat` / `count_table`.

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
from .counting import compress_rows, count_flat, count_table, stratum_codes
from .permutation import permutation_pvalue
from .result import CITestResult, decide

__all__ = ["EngineSettings", "CIEngine"]

_LN2 = math.log(2.0)
_POLICY_CODE = {"flag": 0, "independent": 1, "dependent": 2}
_MARGIN = 1e-7  # relative band around the critical value inside which the exact p-value decides
_SCRATCH_CELLS = 1 << 20  # largest dense table (cells * lanes) the batched kernel counts into
_FIELDS = tuple(CITestResult.__dataclass_fields__)
_NAN = float("nan")  # one object, so results with a NaN Cramer's V compare equal


_new = object.__new__
_setattr = object.__setattr__


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
            return self._run_groups([(xi, yi, gi)], [(0, 1)], stop_first=False)[0][0]
        xs[0], ys[0], gn[0] = xi, yi, len(gi)
        gs[0, : len(gi)] = gi
        arrays = one["arrays"]
        _, status = run_groups(
            self._cdata, self._kw, self._cards_arr, self._colmiss, xs, ys, gs, gn, one["start"], one["stop"],
            False, False, one["crit"], _MARGIN, st.alpha, st.min_rows_per_cell, 0,
            self._cap, self._scratch, self._planes, self._off, self._bit_cost, *arrays,
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
        resolved = self._resolve_ints(tests)
        if resolved is None:
            resolved = [self._resolve(x, y, g) for x, y, g in tests]
        out = self._run_groups(resolved, [(i, i + 1) for i in range(len(resolved))], stop_first=False)
        return [r[0] for r in out]

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

    def first_independent(
        self, x: int | str, y: int | str, candidates: Sequence[Sequence[int | str]]
    ) -> list[CITestResult]:
        """Test x and y given each candidate set in order up to and including the first independent one."""
        return self.first_independent_many([(x, y, candidates)])[0]

    def first_independent_many(
        self, pairs: Sequence[tuple[int | str, int | str, Sequence[Sequence[int | str]]]]
    ) -> list[list[CITestResult]]:
        """`first_independent` for many pairs at once (PC's battery of one level)."""
        resolved: list[tuple[int, int, tuple[int, ...]]] = []
        bounds = []
        for x, y, cands in pairs:
            start = len(resolved)
            resolved.extend(self._resolve(x, y, s) for s in cands)
            bounds.append((start, len(resolved)))
        return self._run_groups(resolved, bounds, stop_first=True)

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

    def _run_groups(self, tests, bounds, stop_first: bool) -> list[list[CITestResult]]:
        """Run groups of tests (``bounds`` index `tests`); with `stop_first` each group stops at its
        first independent test, decided exactly as ``pvalue > alpha`` after the sparse policy."""
        st = self.settings
        out: list[list[CITestResult]] = [[] for _ in bounds]
        if not tests:
            return out
        if st.method == "permutation" or not HAVE_NUMBA:
            for k, (a, b) in enumerate(bounds):
                for t in range(a, b):
                    r = self._single(*tests[t])
                    out[k].append(r)
                    if stop_first and r.independent:
                        break
            return out
        if not self._kernel_ready:
            self._prepare_kernel()
        n_tests = len(tests)
        xs = np.fromiter((t[0] for t in tests), dtype=np.int64, count=n_tests)
        ys = np.fromiter((t[1] for t in tests), dtype=np.int64, count=n_tests)
        gn = np.fromiter((len(t[2]) for t in tests), dtype=np.int64, count=n_tests)
        width = max(1, int(gn.max()))
        pads = [(0,) * (width - k) for k in range(width + 1)]
        gs = np.array([t[2] + pads[len(t[2])] for t in tests], dtype=np.int64).reshape(n_tests, width)
        arrays = [np.zeros(n_tests), np.zeros(n_tests)] + [np.zeros(n_tests, dtype=np.int64) for _ in range(5)]
        crit = self._critical(1024) if stop_first else np.zeros(1)
        policy = _POLICY_CODE[st.sparse_policy]
        pending = [(k, a, b) for k, (a, b) in enumerate(bounds) if b > a]
        while pending:
            g_start = np.fromiter((p[1] for p in pending), dtype=np.int64, count=len(pending))
            g_stop = np.fromiter((p[2] for p in pending), dtype=np.int64, count=len(pending))
            ran, status = run_groups(
                self._cdata, self._kw, self._cards_arr, self._colmiss, xs, ys, gs, gn, g_start, g_stop,
                stop_first, st.method == "chi2", crit, _MARGIN, st.alpha, st.min_rows_per_cell, policy,
                self._cap, self._scratch, self._planes, self._off, self._bit_cost, *arrays,
            )
            if not stop_first and len(pending) == n_tests and bool((ran == 1).all()):
                return [[r] for r in self._batch_results(tests, np.arange(n_tests), arrays)]
            idx = np.concatenate([np.arange(a, a + r) for (_, a, _), r in zip(pending, ran.tolist())])
            made = dict(zip(idx.tolist(), self._batch_results(tests, idx, arrays)))
            nxt = []
            for (k, a, b), r, s in zip(pending, ran.tolist(), status.tolist()):
                done = False
                for t in range(a, a + r):
                    res = made[t]
                    out[k].append(res)
                    if stop_first and res.independent:
                        done = True
                        break
                if done:
                    continue
                pos = a + r
                if s == GROUP_TOO_BIG:
                    res = self._single(*tests[pos])
                    out[k].append(res)
                    if stop_first and res.independent:
                        continue
                    pos += 1
                if pos < b:
                    nxt.append((k, pos, b))
            pending = nxt
        return out

    def _batch_results(self, tests, idx: np.ndarray, arrays) -> list[CITestResult]:
        """CITestResults of the kernel's numbers at `idx`, with the arithmetic of `_finish`."""
        if idx.size == 0:
            return []
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
        names = self.names
        method = st.method
        policy = st.sparse_policy
        nan = _NAN
        gcache = self._given_names
        given_tuple = self._given_tuple
        new = _new
        setattr_ = _setattr
        cls = CITestResult
        out: list[CITestResult] = []
        append = out.append
        for t, s_, d_, p_, n_, cmi_, v_, sp_, dg_, ind_, ap_ in zip(
            idx.tolist(), stat.tolist(), dof.tolist(), pvalue.tolist(), n.tolist(), cmi.tolist(),
            v.tolist(), sparse.tolist(), degenerate.tolist(), independent.tolist(), applied.tolist(),
        ):
            xi, yi, gi = tests[t]
            gnames = gcache.get(gi)
            if gnames is None:
                gnames = given_tuple(gi)
            r = new(cls)
            setattr_(r, "__dict__", {
                "x": names[xi], "y": names[yi], "given": gnames, "statistic": s_, "dof": d_,
                "pvalue": p_, "n": n_, "method": method, "cmi_bits": cmi_,
                "cramers_v": nan if gi else v_, "sparse": sp_, "degenerate": dg_, "independent": ind_,
                "policy": policy, "policy_applied": ap_, "permutations": 0, "correction": "none",
                "n_effective": float(n_),
            })
            append(r)
        return out

    def _test_seed(self, x: int, y: int, given: tuple[int, ...]) -> np.random.SeedSequence:
        a, b = sorted((self.names[x], self.names[y]))
        key = "\x1f".join([a, b, *sorted(self.names[g] for g in given)])
        return np.random.SeedSequence([self.settings.seed, zlib.crc32(key.encode("utf-8"))])
