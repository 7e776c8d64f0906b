"""The test engine: one object that answers "is x independent of y given z?" over coded data."""

from __future__ import annotations

import math
import zlib
from collections import OrderedDict
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy.special import chdtrc as _chdtrc

from ..errors import ConfigError
from ._kernels import flat_statistics
from .counting import count_flat, count_table, stratum_codes
from .permutation import permutation_pvalue
from .result import CITestResult

__all__ = ["EngineSettings", "CIEngine"]

_LN2 = math.log(2.0)


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

    def __post_init__(self) -> None:
        if self.method not in {"g", "chi2", "permutation"}:
            raise ConfigError(f"`test.method` = {self.method!r}; use g, chi2 or permutation.")
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

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> z = rng.integers(0, 2, 2000); x = (z + (rng.random(2000) < .1)) % 2
    >>> y = (z + (rng.random(2000) < .1)) % 2
    >>> eng = CIEngine(np.vstack([x, y, z]).astype(np.int8), ["x", "y", "z"])
    >>> eng.test("x", "y").independent, eng.test("x", "y", ["z"]).independent
    (False, True)
    """

    def __init__(
        self,
        data: np.ndarray,
        names: Sequence[str],
        cards: Sequence[int] | None = None,
        settings: EngineSettings | None = None,
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
        self._strata: OrderedDict[tuple[int, ...], tuple[np.ndarray, int, np.ndarray | None]] = (
            OrderedDict()
        )
        self._strata_bytes = 0

    @property
    def n_rows(self) -> int:
        """Rows of the coded table."""
        return int(self.data.shape[1])

    def _idx(self, v: int | str) -> int:
        return self.index[v] if isinstance(v, str) else int(v)

    def _stratum(self, given: tuple[int, ...]):
        if not given or self.n_rows > self.settings.partition_rows:
            return None
        hit = self._strata.get(given)
        if hit is not None:
            self._strata.move_to_end(given)
            return hit
        value = stratum_codes(self.data, self.cards, given)
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
            self.data, self.cards, xi, yi, gi,
            partition_rows=self.settings.partition_rows,
            max_cells=self.settings.max_table_cells,
            strata=self._stratum(gi),
        ).counts

    def test(self, x: int | str, y: int | str, given: Sequence[int | str] = ()) -> CITestResult:
        """Test x independent of y given `given` with the configured method and policy."""
        st = self.settings
        index = self.index
        xi = index[x] if isinstance(x, str) else int(x)
        yi = index[y] if isinstance(y, str) else int(y)
        gi = tuple(index[g] if isinstance(g, str) else int(g) for g in given)
        if xi == yi or xi in gi or yi in gi:
            raise ValueError("x, y and the conditioning set must be distinct variables")
        cards = self.cards
        kx, ky = cards[xi], cards[yi]
        possible = kx * ky
        for g in gi:
            possible *= cards[g]
        counts, n = count_flat(
            self.data, cards, xi, yi, gi,
            partition_rows=st.partition_rows, max_cells=st.max_table_cells,
        )
        g_stat, chi2_stat, dof, _, _, m = flat_statistics(counts, kx, ky)
        degenerate = dof == 0
        method = st.method
        permutations = 0
        if degenerate:
            statistic, pvalue = 0.0, 1.0
        elif method == "permutation":
            statistic = g_stat
            pvalue, permutations = permutation_pvalue(
                self.data, xi, yi, gi, cards, g_stat,
                permutations=st.permutations,
                stop_hits=st.permutation_stop_hits,
                batch=st.permutation_batch,
                seed=self._test_seed(xi, yi, gi),
                alpha=st.alpha,
            )
        else:
            statistic = chi2_stat if method == "chi2" else g_stat
            pvalue = float(_chdtrc(dof, statistic))
        sparse = n < st.min_rows_per_cell * possible
        independent = pvalue > st.alpha
        policy_applied = False
        if sparse and st.sparse_policy != "flag":
            decided = st.sparse_policy == "independent"
            policy_applied = decided != independent
            independent = decided
        if gi:
            cramers_v = float("nan")
        else:
            cramers_v = math.sqrt(chi2_stat / (n * m)) if m > 0 and n > 0 else 0.0
        names = self.names
        return CITestResult(
            x=names[xi],
            y=names[yi],
            given=tuple(names[g] for g in gi),
            statistic=float(statistic),
            dof=int(dof),
            pvalue=float(pvalue),
            n=int(n),
            method=method,
            cmi_bits=g_stat / (2.0 * n * _LN2) if n > 0 else 0.0,
            cramers_v=cramers_v,
            sparse=bool(sparse),
            degenerate=bool(degenerate),
            independent=bool(independent),
            policy=st.sparse_policy,
            policy_applied=policy_applied,
            permutations=permutations,
        )

    def _test_seed(self, x: int, y: int, given: tuple[int, ...]) -> np.random.SeedSequence:
        a, b = sorted((self.names[x], self.names[y]))
        key = "\x1f".join([a, b, *sorted(self.names[g] for g in given)])
        return np.random.SeedSequence([self.settings.seed, zlib.crc32(key.encode("utf-8"))])
