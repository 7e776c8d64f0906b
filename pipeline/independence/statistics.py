"""G and Pearson chi-square statistics of stratified contingency tables, vectorised over strata."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import chdtrc as _chdtrc

__all__ = ["TableStatistics", "contingency_statistics", "g_test_table", "chi2_test_table"]

_LN2 = float(np.log(2.0))


@dataclass(frozen=True)
class TableStatistics:
    """What a stratified table says: both statistics, degrees of freedom, effect sizes."""

    g: float
    chi2: float
    dof: int
    n: int
    cells: int  # cells of the full table (levels of x * levels of y * strata that could occur)
    cmi_bits: float
    cramers_v: float

    def statistic(self, method: str) -> float:
        """The statistic of `method` ("g" or "chi2")."""
        return self.chi2 if method == "chi2" else self.g

    def pvalue(self, method: str) -> float:
        """Asymptotic chi-square p-value of `method`; 1.0 when no degrees of freedom are left."""
        if self.dof <= 0:
            return 1.0
        return float(_chdtrc(self.dof, self.statistic(method)))  # = chi2.sf(statistic, dof)


def contingency_statistics(table: np.ndarray, cells: int | None = None) -> TableStatistics:
    """Statistics of a table of counts shaped ``(strata, levels_x, levels_y)`` (or 2-D).

    Each stratum contributes its own G and X^2 with expected counts from its margins and
    ``(rows present - 1) * (columns present - 1)`` degrees of freedom; empty strata contribute
    nothing. The stratified statistic is the sum over strata.

    Examples
    --------
    >>> s = contingency_statistics(np.array([[4758, 30], [8840, 76]]))
    >>> round(s.g, 4), s.dof
    (2.1405, 1)
    """
    t = np.asarray(table, dtype=np.float64)
    if t.ndim == 2:
        t = t[None, :, :]
    rows = t.sum(axis=2)  # (S, kx)
    cols = t.sum(axis=1)  # (S, ky)
    tot = rows.sum(axis=1)  # (S,)
    keep = tot > 0
    if not keep.all():
        t, rows, cols, tot = t[keep], rows[keep], cols[keep], tot[keep]
    n = int(round(tot.sum()))
    if cells is None:
        cells = int(t.size)
    if n == 0:
        return TableStatistics(0.0, 0.0, 0, 0, cells, 0.0, float("nan"))
    expected = rows[:, :, None] * cols[:, None, :] / tot[:, None, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        safe_e = np.where(expected > 0, expected, 1.0)
        chi2 = float(np.sum((t - expected) ** 2 / safe_e))
        ratio = np.where(t > 0, t / safe_e, 1.0)
        g = float(2.0 * np.sum(t * np.log(ratio)))
    r_present = (rows > 0).sum(axis=1)
    c_present = (cols > 0).sum(axis=1)
    dof = int(np.sum((r_present - 1) * (c_present - 1)))
    if dof <= 0:
        dof = 0
    g = max(g, 0.0)
    cmi_bits = g / (2.0 * n * _LN2)
    if t.shape[0] == 1:
        m = min(int(r_present[0]), int(c_present[0])) - 1
        cramers_v = float(np.sqrt(chi2 / (n * m))) if m > 0 else 0.0
    else:
        cramers_v = float("nan")
    return TableStatistics(g, chi2, dof, n, cells, cmi_bits, cramers_v)


def g_test_table(table: np.ndarray) -> tuple[float, int, float]:
    """G statistic, dof and p-value of a (stratified) table, without continuity correction."""
    s = contingency_statistics(table)
    return s.g, s.dof, s.pvalue("g")


def chi2_test_table(table: np.ndarray) -> tuple[float, int, float]:
    """Pearson X^2, dof and p-value of a (stratified) table, without continuity correction."""
    s = contingency_statistics(table)
    return s.chi2, s.dof, s.pvalue("chi2")
