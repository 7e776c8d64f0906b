"""Permutation p-values: never zero, the right size under a true null, close to the asymptotic p-value."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.independence import CIEngine, EngineSettings
from pipeline.independence.permutation import permutation_pvalue


def _null_data(rng: np.random.Generator, n: int) -> np.ndarray:
    """x and y depend on z only, so x is independent of y given z."""
    z = rng.integers(0, 3, n)
    x = (z + (rng.random(n) < 0.3)) % 3
    y = (z + (rng.random(n) < 0.3) * rng.integers(1, 3, n)) % 3
    return np.vstack([x, y, z]).astype(np.int8)


def _rejection_rate(reps: int, n: int, seed: int) -> float:
    rng = np.random.default_rng(seed)
    st_ = EngineSettings(method="permutation", permutations=199, seed=seed)
    rejected = 0
    for _ in range(reps):
        eng = CIEngine(_null_data(rng, n), ["x", "y", "z"], [3, 3, 3], st_)
        rejected += eng.test("x", "y", ["z"]).pvalue <= 0.05
    return rejected / reps


def test_size_under_true_null():
    """Under a generated true null the rejection rate at alpha 0.05 lies within 3 binomial standard errors of 0.05."""
    reps = 300
    rate = _rejection_rate(reps, 150, seed=1)
    assert abs(rate - 0.05) <= 3 * np.sqrt(0.05 * 0.95 / reps)


@pytest.mark.slow
def test_size_under_true_null_large():
    """The same size check with 2000 replicates (3 standard errors is about 0.015)."""
    reps = 2000
    rate = _rejection_rate(reps, 300, seed=2)
    assert abs(rate - 0.05) <= 3 * np.sqrt(0.05 * 0.95 / reps)


def test_phipson_smyth_form():
    """Without early stopping p = (b + 1) / (m + 1) (Phipson & Smyth 2010), so p * (m + 1) is a whole number >= 1."""
    rng = np.random.default_rng(4)
    data = _null_data(rng, 300)
    data[1] = data[0]  # y copies x: no permutation reaches the observed G
    eng = CIEngine(data, ["x", "y", "z"], [3, 3, 3])
    g = eng.test("x", "y", ["z"]).statistic
    p, m = permutation_pvalue(data, 0, 1, (2,), [3, 3, 3], g, permutations=499, stop_hits=0, seed=1)
    assert m == 499 and p == pytest.approx(1 / 500)


def test_besag_clifford_stop():
    """With stop_hits h, an independent pair stops early at the h-th extreme permutation and p = h / l (Besag & Clifford 1991)."""
    rng = np.random.default_rng(5)
    data = _null_data(rng, 300)
    eng = CIEngine(data, ["x", "y", "z"], [3, 3, 3])
    g = eng.test("x", "y", ["z"]).statistic
    p, drawn = permutation_pvalue(data, 0, 1, (2,), [3, 3, 3], g, permutations=9999, stop_hits=10, seed=3)
    assert drawn < 9999
    assert p == pytest.approx(10 / drawn)


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(20, 200))
def test_pvalues_never_zero(seed, n):
    """A permutation p-value is strictly positive, whatever the data (Phipson & Smyth 2010)."""
    rng = np.random.default_rng(seed)
    data = rng.integers(0, 3, (3, n)).astype(np.int8)
    data[1] = (data[0] + (rng.random(n) < 0.05)) % 3
    r = CIEngine(data, ["x", "y", "z"], [3, 3, 3],
                 EngineSettings(method="permutation", permutations=99, seed=seed)).test("x", "y", ["z"])
    assert 0.0 < r.pvalue <= 1.0


@settings(max_examples=3, deadline=None)
@given(st.integers(0, 2**32 - 1))
def test_close_to_asymptotic_on_large_samples(seed):
    """On 6,000 rows the permutation p-value is within Monte Carlo error (4 sd of 1000 draws) of the asymptotic G p-value."""
    rng = np.random.default_rng(seed)
    n = 6_000
    z = rng.integers(0, 2, n)
    x = (z + (rng.random(n) < 0.4)) % 2
    y = np.where(rng.random(n) < 0.02, x, (z + (rng.random(n) < 0.4)) % 2)  # weak dependence
    data = np.vstack([x, y, z]).astype(np.int8)
    eng = CIEngine(data, ["x", "y", "z"], [2, 2, 2], EngineSettings(method="g"))
    asym = eng.test("x", "y", ["z"])
    p, m = permutation_pvalue(data, 0, 1, (2,), [2, 2, 2], asym.statistic, permutations=1000,
                              stop_hits=0, seed=seed)
    sd = np.sqrt(max(asym.pvalue * (1 - asym.pvalue), 1e-4) / m)
    assert abs(p - asym.pvalue) <= 4 * sd + 1 / (m + 1)
