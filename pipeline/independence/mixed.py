"""One engine for every kind of signal and for time-ordered rows; it picks the test per pair.

Which test runs (``test.method``):

* ``auto`` (the default): the G-test on codes when x, y and every member of the conditioning set are
  categorical and the rows are independent draws (exactly the `CIEngine` of the benchmark checks);
  the residual-covariance test (`residual.ResidualTester`, the generalised covariance measure) as soon
  as a numeric signal is involved or the rows are time-ordered.
* ``g``, ``chi2``, ``permutation``: the contingency test on codes for every pair (numeric signals by
  their bins). On time-ordered rows the strata are those of the conditioning set, the conditioning
  set's previous window and both tested signals' previous windows (conditioning on the past:
  Anderson & Goodman 1957), and the p-value comes from permutations of y within those strata (the
  asymptotic chi-square of G or X^2 is unreliable on such sparse strata: measured in
  ``tests/test_timeseries.py``); ``n_effective`` reports the rows divided by the variance inflation
  the long-run variance of the residual products still shows (in the spirit of Bartlett 1935).
* ``gcm``: the residual-covariance test for every pair.

Every result says which test ran (``method``), what was done about serial dependence
(``correction``) and its effective number of rows (``n_effective``).
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from .columns import Candidates, TestColumns
from .engine import CIEngine, EngineSettings
from .permutation import permutation_pvalue
from .residual import ResidualTester, Timeline, hac_covariance
from .result import CITestResult, decide
from .statistics import contingency_statistics

__all__ = ["MixedEngine", "choose_method"]

_LN2 = math.log(2.0)


def choose_method(method: str, numeric: bool, timed: bool) -> str:
    """The test that runs for one test: ``auto`` resolves to ``g`` or ``gcm``."""
    if method != "auto":
        return method
    return "gcm" if (numeric or timed) else "g"


class MixedEngine:
    """Tests over codes for every signal plus normal scores for the numeric ones, rows maybe time-ordered.

    Parameters
    ----------
    data : integer codes shaped (variables, rows), -1 missing (rows in series-then-time order when
        `timeline` is given).
    names, cards : per variable.
    settings : the test settings (``method`` may be ``auto`` or ``gcm`` besides the contingency tests).
    scores : per variable, normal scores of a numeric signal (NaN missing) or None.
    timeline : the previous window of each row, or None for independent rows.
    own_past : per variable, whether its previous window enters its tests (False for lag copies).
    """

    def __init__(self, data: np.ndarray, names: Sequence[str], cards: Sequence[int], settings: EngineSettings, *,
                 scores: Sequence[np.ndarray | None] | None = None, timeline: Timeline | None = None,
                 own_past: Sequence[bool] | None = None, distinct: Any = None) -> None:
        self.names = list(names)
        self.index = {n: i for i, n in enumerate(self.names)}
        self.cards = [int(c) for c in cards]
        self.settings = settings
        self.scores = list(scores) if scores is not None else [None] * len(self.names)
        self.timeline = timeline
        self.codes = data
        self.categorical = CIEngine(data, names, cards, settings, distinct=distinct)  # `auto`/`gcm` read as G there
        self.residual = ResidualTester(data, self.scores, timeline=timeline, own_past=own_past)
        self._numeric = np.array([s is not None for s in self.scores])

    @property
    def plain(self) -> bool:
        """True when every test is the contingency test on independent rows (the fast compiled path)."""
        if self.timeline is not None:
            return False
        return self.settings.method in ("g", "chi2", "permutation") or (
            self.settings.method == "auto" and not self._numeric.any()
        )

    # -- the public surface of CIEngine ------------------------------------------------------------
    def test(self, x: int | str, y: int | str, given: Sequence[int | str] = ()) -> CITestResult:
        with _one_blas_thread():
            return self._test(x, y, given)

    def _test(self, x: int | str, y: int | str, given: Sequence[int | str] = ()) -> CITestResult:
        xi, yi = self._idx(x), self._idx(y)
        gi = tuple(self._idx(g) for g in given)
        return self._one(xi, yi, gi)

    def test_many(self, tests: Sequence[tuple[Any, Any, Sequence[Any]]]) -> list[CITestResult]:
        if self.plain:
            return self.categorical.test_many(tests)
        with _one_blas_thread():
            return [self._test(x, y, g) for x, y, g in tests]

    def first_independent_many(self, pairs: Candidates | Sequence[tuple[Any, Any, Sequence[Sequence[Any]]]]
                               ) -> tuple[TestColumns, np.ndarray]:
        if self.plain:
            return self.categorical.first_independent_many(pairs)
        out: list[CITestResult] = []
        counts = []
        with _one_blas_thread():
            for x, y, cands in pairs:
                before = len(out)
                for s in cands:
                    r = self._test(x, y, s)
                    out.append(r)
                    if r.independent:
                        break
                counts.append(len(out) - before)
        return TestColumns.from_results(out, self.index), np.asarray(counts, dtype=np.int64)

    # -- one test ----------------------------------------------------------------------------------
    def _idx(self, v: int | str) -> int:
        return v if isinstance(v, (int, np.integer)) else self.index[v]  # type: ignore[return-value]

    def _one(self, xi: int, yi: int, gi: tuple[int, ...]) -> CITestResult:
        numeric = bool(self._numeric[[xi, yi, *gi]].any())
        method = choose_method(self.settings.method, numeric, self.timeline is not None)
        if method == "gcm":
            return self._gcm(xi, yi, gi)
        if self.timeline is None:
            return self.categorical.test(xi, yi, gi)
        return self._timed_table(xi, yi, gi, method)

    def _package(self, xi: int, yi: int, gi: tuple[int, ...], statistic: float, dof: int, pvalue: float, n: int,
                 method: str, bits: float, cramers_v: float, sparse: bool, correction: str, n_eff: float,
                 permutations: int = 0) -> CITestResult:
        st = self.settings
        degenerate = dof == 0
        if degenerate:
            statistic, pvalue = 0.0, 1.0
        independent, policy_applied = decide(pvalue, st.alpha, sparse, st.sparse_policy)
        return CITestResult(
            self.names[xi], self.names[yi], tuple(self.names[g] for g in gi), float(statistic), int(dof),
            float(pvalue), int(n), method, float(bits), float(cramers_v), bool(sparse), bool(degenerate),
            bool(independent), st.sparse_policy, policy_applied, int(permutations), correction, float(n_eff),
        )

    def _gcm(self, xi: int, yi: int, gi: tuple[int, ...]) -> CITestResult:
        w, dof, p, n, n_eff, bits, _, correction = self.residual.test(xi, yi, gi)
        sparse = n_eff < self.settings.min_rows_per_cell * 4 * max(dof, 1)
        return self._package(xi, yi, gi, w, dof, p, n, "gcm", bits, float("nan"), sparse, correction, n_eff)

    def _timed_table(self, xi: int, yi: int, gi: tuple[int, ...], method: str) -> CITestResult:
        """The contingency test given the conditioning set and the previous windows, corrected for what
        serial dependence is left."""
        rt = self.residual
        rows = rt.rows_for(xi, yi, gi)
        n = int(rows.size)
        prev = self.timeline.prev[rows]  # type: ignore[union-attr]
        cols = [self.codes[g][rows] for g in gi] + [self.codes[g][prev] for g in (xi, yi, *gi)]
        x = self.codes[xi][rows].astype(np.int64)
        y = self.codes[yi][rows].astype(np.int64)
        if cols:
            strata = np.unique(np.column_stack(cols), axis=0, return_inverse=True)[1].ravel()
        else:
            strata = np.zeros(n, dtype=np.int64)
        kx, ky = self.cards[xi], self.cards[yi]
        n_strata = int(strata.max(initial=-1)) + 1
        table = np.bincount((strata * kx + x) * ky + y, minlength=n_strata * kx * ky).reshape(n_strata, kx, ky)
        stats = contingency_statistics(table)
        raw = stats.chi2 if method == "chi2" else stats.g
        # variance inflation left after conditioning on the past, from the residual products
        prod, _ = rt.products(xi, yi, gi)
        inflation = 1.0
        if prod.shape[0] > 2 and prod.shape[1] > 0:
            cov0 = hac_covariance(prod)
            cov = hac_covariance(prod, rt.partners_for(rows))
            inflation = max(1.0, float(np.trace(cov)) / max(float(np.trace(cov0)), 1e-300))
        # the asymptotic chi-square is unreliable on these sparse strata (tests/test_timeseries.py::
        # test_asymptotic_g_on_past_strata_misses_its_size_so_permutations_are_used), so the p-value
        # comes from permutations of y within the strata, which keep every stratum's margins
        permutations = 0
        pvalue = 1.0
        if stats.dof > 0:
            small = np.vstack([x, y, strata]).astype(np.int64)
            seed = np.random.SeedSequence([self.settings.seed, xi, yi, *gi])
            pvalue, permutations = permutation_pvalue(
                small, 0, 1, (2,), [kx, ky, max(n_strata, 1)], stats.g, permutations=self.settings.permutations,
                stop_hits=self.settings.permutation_stop_hits, batch=self.settings.permutation_batch, seed=seed,
                alpha=self.settings.alpha,
            )
        statistic = raw
        sparse = n < self.settings.min_rows_per_cell * kx * ky * max(n_strata, 1)
        correction = "past-strata+permutation"
        return self._package(xi, yi, gi, statistic, stats.dof, pvalue, n, method, stats.cmi_bits, float("nan"),
                             sparse, correction, n / inflation, permutations)


def _one_blas_thread() -> Any:
    """The regressions are tall and narrow: BLAS threads only contend (measured 100x slower with two
    threads on a busy two-core machine), so they run on one; the search's workers give the parallelism."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="blas")
