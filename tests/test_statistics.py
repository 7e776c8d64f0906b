"""G and Pearson chi-square statistics against published tables and scipy."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2_contingency

from pipeline.independence import contingency_statistics
from pipeline.independence._kernels import flat_statistics, flat_statistics_numpy

# (source, table, statistic to 4 decimals, dof, p-value, p tolerance) from the published tables listed beside each row
G_CASES = [
    # McDonald (2014), Handbook of Biological Statistics, G-test of independence: G = 2.14, P = 0.14 (from memory)
    ([[4758, 30], [8840, 76]], 2.1405, 1, 0.1435),
    # McDonald (2014), genotype example: G = 7.30, 2 dof, P = 0.026 (from memory)
    ([[268, 807], [199, 759], [42, 184]], 7.3008, 2, 0.0260),
    # McDonald (2014), 4 x 2 trial example: G = 7.73, 3 dof, P = 0.052 (from memory)
    ([[8177, 575], [8117, 620], [8147, 555], [8167, 529]], 7.7325, 3, 0.0519),
    # Agresti (2007), An Introduction to Categorical Data Analysis, p. 39: G2 = 30.0, 2 dof (from memory)
    ([[762, 327, 468], [484, 239, 477]], 30.0167, 2, 3.03e-7),
    # Agresti (2002), Categorical Data Analysis, Table 3.11: G2 = 7.00, 2 dof
    ([[279, 73, 225], [165, 47, 191]], 7.0026, 2, 0.0302),
]
CHI2_CASES = [
    # Agresti (2007), p. 39: X2 = 30.1, 2 dof
    ([[762, 327, 468], [484, 239, 477]], 30.0701, 2, 2.95e-7),
    # McDonald (2014), chi-square test of independence, genotype example: 7.26, P = 0.027 (from memory)
    ([[268, 807], [199, 759], [42, 184]], 7.2594, 2, 0.0265),
    # McDonald (2014), habitat example: 6.26, 2 dof, P = 0.044 (from memory)
    ([[127, 116], [99, 67], [264, 161]], 6.2621, 2, 0.0437),
]
# Penn State STAT 504, three-way tables (2 x 2 within 3 strata): conditional G2 = 0.16, 3 dof
# (from memory); marginal G2 = 7.61.
STRATA = np.array(
    [[[169, 42], [43, 11]], [[132, 20], [104, 14]], [[59, 2], [196, 8]]], dtype=np.int64
)


def _pdigits(p: float) -> float:
    """Half a unit in the last printed digit of a p-value written with 3 significant digits."""
    return 0.5 * 10 ** (np.floor(np.log10(p)) - 2)


@pytest.mark.parametrize("table,stat,dof,p", G_CASES)
def test_g_reference_tables(table, stat, dof, p):
    """The G statistic, dof and p-value reproduce the published G-test examples."""
    s = contingency_statistics(np.array(table))
    assert s.g == pytest.approx(stat, abs=5e-5)
    assert s.dof == dof
    assert s.pvalue("g") == pytest.approx(p, abs=max(_pdigits(p), 5e-5 if p > 1e-3 else 0))


@pytest.mark.parametrize("table,stat,dof,p", CHI2_CASES)
def test_chi2_reference_tables(table, stat, dof, p):
    """Pearson's X^2, dof and p-value reproduce the published chi-square examples."""
    s = contingency_statistics(np.array(table))
    assert s.chi2 == pytest.approx(stat, abs=5e-5)
    assert s.dof == dof
    assert s.pvalue("chi2") == pytest.approx(p, abs=max(_pdigits(p), 5e-5 if p > 1e-3 else 0))


def test_three_way_table_dependent_marginally_independent_given_stratum():
    """Penn State STAT 504 three-way example: marginal G2 = 7.61, stratified G2 = 0.1623, 3 dof, P = 0.983."""
    cond = contingency_statistics(STRATA)
    assert cond.g == pytest.approx(0.1623, abs=5e-5)
    assert cond.dof == 3
    assert cond.pvalue("g") == pytest.approx(0.983, abs=5e-4)
    marg = contingency_statistics(STRATA.sum(axis=0))
    assert marg.g == pytest.approx(7.61, abs=5e-3)
    assert marg.pvalue("g") < 0.01


def _reduced(t: np.ndarray) -> np.ndarray:
    return t[t.sum(axis=1) > 0][:, t.sum(axis=0) > 0]


def test_against_scipy_on_random_tables():
    """Both statistics, dof and p-values equal scipy.stats.chi2_contingency (no Yates) to rtol 1e-10."""
    rng = np.random.default_rng(20240601)
    checked = 0
    for _ in range(300):
        r, c = rng.integers(2, 7, size=2)
        t = rng.poisson(rng.uniform(0.3, 40), size=(r, c))
        if rng.random() < 0.3:
            t[rng.integers(r)] = 0
        if rng.random() < 0.3:
            t[:, rng.integers(c)] = 0
        red = _reduced(t)
        if red.shape[0] < 2 or red.shape[1] < 2:
            continue
        s = contingency_statistics(t)
        x2, p2, dof2, _ = chi2_contingency(red, correction=False)
        g, pg, dofg, _ = chi2_contingency(red, correction=False, lambda_="log-likelihood")
        assert s.dof == dof2 == dofg
        assert s.chi2 == pytest.approx(x2, rel=1e-10)
        assert s.pvalue("chi2") == pytest.approx(p2, rel=1e-10)
        assert s.g == pytest.approx(g, rel=1e-10)
        assert s.pvalue("g") == pytest.approx(pg, rel=1e-10)
        checked += 1
    assert checked > 200


def test_no_degrees_of_freedom_left():
    """A table with one non-empty row has dof 0, statistic 0 and p-value 1 (house style: documented, not raised)."""
    s = contingency_statistics(np.array([[0, 0], [12, 30]]))
    assert s.dof == 0
    assert s.g == 0.0 and s.chi2 == 0.0
    assert s.pvalue("g") == 1.0 and s.pvalue("chi2") == 1.0


def test_compiled_statistics_match_numpy_twin():
    """The compiled statistics kernel gives the numpy twin's numbers to rtol 1e-12."""
    rng = np.random.default_rng(5)
    for _ in range(200):
        kx, ky, s = (int(v) for v in rng.integers(1, 6, size=3))
        counts = rng.poisson(rng.uniform(0.1, 20), size=s * kx * ky).astype(np.int64)
        a = flat_statistics(counts, kx, ky)
        b = flat_statistics_numpy(counts, kx, ky)
        assert a[2:] == b[2:]
        np.testing.assert_allclose(a[:2], b[:2], rtol=1e-12, atol=1e-12)


tables = st.integers(2, 5).flatmap(
    lambda r: st.integers(2, 5).flatmap(
        lambda c: st.lists(st.integers(0, 60), min_size=r * c, max_size=r * c).map(
            lambda v: np.array(v, dtype=np.int64).reshape(r, c)
        )
    )
)


@settings(max_examples=60, deadline=None)
@given(tables)
def test_symmetric_in_x_and_y(t):
    """Swapping the roles of x and y (transposing the table) changes no statistic."""
    a, b = contingency_statistics(t), contingency_statistics(t.T)
    assert a.dof == b.dof
    assert a.g == pytest.approx(b.g, rel=1e-10, abs=1e-10)
    assert a.chi2 == pytest.approx(b.chi2, rel=1e-10, abs=1e-10)


@settings(max_examples=60, deadline=None)
@given(tables, st.randoms(use_true_random=False))
def test_invariant_under_relabelling_levels(t, rnd):
    """Relabelling the levels of x and y (permuting rows and columns) changes no statistic."""
    rows = list(range(t.shape[0]))
    cols = list(range(t.shape[1]))
    rnd.shuffle(rows)
    rnd.shuffle(cols)
    a, b = contingency_statistics(t), contingency_statistics(t[rows][:, cols])
    assert a.dof == b.dof
    assert a.g == pytest.approx(b.g, rel=1e-10, abs=1e-10)
    assert a.chi2 == pytest.approx(b.chi2, rel=1e-10, abs=1e-10)


@settings(max_examples=40, deadline=None)
@given(st.lists(tables, min_size=1, max_size=4))
def test_stratified_statistic_is_sum_over_strata(parts):
    """The statistic of a stratified table is the sum of the per-stratum statistics, and so is its dof."""
    kx = max(p.shape[0] for p in parts)
    ky = max(p.shape[1] for p in parts)
    cube = np.zeros((len(parts), kx, ky), dtype=np.int64)
    for i, p in enumerate(parts):
        cube[i, : p.shape[0], : p.shape[1]] = p
    whole = contingency_statistics(cube)
    each = [contingency_statistics(c) for c in cube]
    assert whole.dof == sum(e.dof for e in each)
    assert whole.g == pytest.approx(sum(e.g for e in each), rel=1e-10, abs=1e-9)
    assert whole.chi2 == pytest.approx(sum(e.chi2 for e in each), rel=1e-10, abs=1e-9)
