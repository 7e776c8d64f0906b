"""The test engine against causal-learn's CIT, and its policies for sparse tables and missing values."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import ConfigError
from pipeline.independence import CIEngine, EngineSettings

BENCH = Path(__file__).resolve().parent / "data" / "benchmarks"


def _load(name: str) -> tuple[np.ndarray, list[str], np.ndarray]:
    path = BENCH / name / "data.txt"
    header = path.read_text().split("\n", 1)[0].split()
    raw = np.loadtxt(path, skiprows=1, dtype=np.int64)
    codes = np.vstack([np.unique(raw[:, j], return_inverse=True)[1] for j in range(raw.shape[1])])
    return codes.astype(np.int8), header, raw


@pytest.mark.parametrize("name", ["asia", "child", "insurance", "alarm"])
@pytest.mark.parametrize("method,cl_method", [("g", "gsq"), ("chi2", "chisq")])
def test_pvalues_match_causal_learn(name, method, cl_method):
    """p-values equal causal-learn's CIT (gsq / chisq) on the benchmark data for sets up to size 4, rtol 1e-10."""
    from causallearn.utils.cit import CIT

    codes, names, raw = _load(name)
    cit = CIT(raw, cl_method)
    eng = CIEngine(codes, names, settings=EngineSettings(method=method))
    rng = np.random.default_rng(7)
    p = codes.shape[0]
    for _ in range(60):
        x, y = (int(v) for v in rng.choice(p, 2, replace=False))
        rest = [v for v in range(p) if v not in (x, y)]
        k = int(rng.integers(0, min(4, len(rest)) + 1))
        given = [int(v) for v in rng.choice(rest, k, replace=False)]
        ours = eng.test(x, y, given)
        assert ours.pvalue == pytest.approx(cit(x, y, given), rel=1e-10, abs=1e-300)


def test_three_way_example_through_engine():
    """Penn State STAT 504 three-way tables: dependent marginally, independent given the stratum (G2 = 0.1623, P = 0.983; from memory)."""
    strata = [[[169, 42], [43, 11]], [[132, 20], [104, 14]], [[59, 2], [196, 8]]]
    rows = [(x, y, z) for z, t in enumerate(strata) for x in range(2) for y in range(2) for _ in range(t[x][y])]
    data = np.array(rows, dtype=np.int8).T
    eng = CIEngine(data, ["x", "y", "z"], [2, 2, 3], EngineSettings(method="g"))
    marginal = eng.test("x", "y")
    conditional = eng.test("x", "y", ["z"])
    assert not marginal.independent and marginal.statistic == pytest.approx(7.61, abs=5e-3)
    assert conditional.independent
    assert conditional.statistic == pytest.approx(0.1623, abs=5e-5)
    assert conditional.dof == 3 and conditional.pvalue == pytest.approx(0.983, abs=5e-4)
    np.testing.assert_array_equal(eng.table("x", "y", ["z"]), np.array(strata))


def test_degenerate_table_flagged():
    """A constant x leaves no degrees of freedom: statistic 0, p-value 1, flagged degenerate."""
    rng = np.random.default_rng(0)
    data = np.vstack([np.zeros(500), rng.integers(0, 3, 500)]).astype(np.int8)
    r = CIEngine(data, ["x", "y"], [2, 3]).test("x", "y")
    assert r.degenerate and r.dof == 0 and r.statistic == 0.0 and r.pvalue == 1.0
    assert "degenerate" in r.flags


@pytest.mark.parametrize("policy", ["flag", "independent", "dependent"])
def test_sparse_policy_decides_and_keeps_raw_pvalue(policy):
    """Below min_rows_per_cell rows per cell (5, common practice, Tsamardinos et al. 2006, from memory) the policy decides; the raw p-value is kept."""
    rng = np.random.default_rng(3)
    n = 150  # 4 * 4 * 3 * 3 = 144 cells: about 1 row per cell
    z = rng.integers(0, 3, (2, n))
    x = (z[0] + rng.integers(0, 2, n)) % 4
    y = (x + rng.integers(0, 2, n)) % 4
    data = np.vstack([x, y, z]).astype(np.int8)
    names = ["x", "y", "a", "b"]
    flag = CIEngine(data, names, [4, 4, 3, 3], EngineSettings(sparse_policy="flag")).test("x", "y", ["a", "b"])
    r = CIEngine(data, names, [4, 4, 3, 3], EngineSettings(sparse_policy=policy)).test("x", "y", ["a", "b"])
    assert r.sparse and flag.sparse
    assert r.pvalue == flag.pvalue and r.statistic == flag.statistic
    assert flag.independent == (flag.pvalue > 0.05)
    expected = {"flag": flag.independent, "independent": True, "dependent": False}[policy]
    assert r.independent == expected
    assert r.policy_applied == (r.independent != flag.independent)
    dense = CIEngine(data, names, [4, 4, 3, 3], EngineSettings(sparse_policy=policy)).test("x", "y")
    assert not dense.sparse and not dense.policy_applied  # 150 rows over 16 cells


def test_missing_values_testwise_deletion():
    """Each test uses the rows where its own variables are present, and records that n (checked with pandas)."""
    rng = np.random.default_rng(11)
    data = rng.integers(0, 3, (4, 2000)).astype(np.int8)
    data[rng.random(data.shape) < 0.1] = -1
    frame = pd.DataFrame(data.T, columns=list("wxyz"))
    eng = CIEngine(data, list("wxyz"), [3, 3, 3, 3])
    for x, y, given in [("w", "x", []), ("w", "x", ["y"]), ("x", "z", ["w", "y"])]:
        cols = [x, y, *given]
        complete = frame[cols][(frame[cols] >= 0).all(axis=1)]
        r = eng.test(x, y, given)
        assert r.n == len(complete)
        table = pd.crosstab([complete[c] for c in given] or [np.zeros(len(complete))],
                            [complete[x], complete[y]]).to_numpy()
        assert table.sum() == r.n


def test_settings_refuse_unknown_words():
    """An unknown method or sparse policy is a ConfigError naming the key."""
    with pytest.raises(ConfigError, match="test.method"):
        EngineSettings(method="fisher")
    with pytest.raises(ConfigError, match="test.sparse_policy"):
        EngineSettings(sparse_policy="maybe")


def _alarm_tests(p: int, count: int, seed: int) -> list[tuple[int, int, tuple[int, ...]]]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        x, y = (int(v) for v in rng.choice(p, 2, replace=False))
        rest = [v for v in range(p) if v not in (x, y)]
        k = int(rng.integers(0, 4))
        out.append((x, y, tuple(int(v) for v in rng.choice(rest, k, replace=False))))
    return out


@pytest.mark.parametrize("method,policy", [("g", "flag"), ("chi2", "independent"), ("g", "dependent")])
def test_test_many_equals_one_by_one_and_causal_learn(method, policy):
    """test_many returns the same CITestResult values as test, compressed or not, and p-values equal causal-learn's CIT to rtol 1e-10."""
    from causallearn.utils.cit import CIT

    codes, names, raw = _load("alarm")
    tests = _alarm_tests(codes.shape[0], 150, seed=3)
    st = EngineSettings(method=method, sparse_policy=policy)
    eng = CIEngine(codes, names, settings=st)
    plain = CIEngine(codes, names, settings=EngineSettings(method=method, sparse_policy=policy,
                                                            compress_rows=False, bit_cost=0.0))
    assert eng.distinct_rows < eng.n_rows == plain.distinct_rows
    many = eng.test_many(tests)
    assert many == [eng.test(*t) for t in tests] == plain.test_many(tests)
    cit = CIT(raw, "gsq" if method == "g" else "chisq")
    for r, (x, y, s) in zip(many, tests):
        assert r.pvalue == pytest.approx(cit(x, y, list(s)), rel=1e-10, abs=1e-300)


def test_weights_equal_repeated_rows():
    """An engine over distinct rows with weights gives the results of the engine over the repeated rows."""
    from pipeline.independence.counting import compress_rows

    rng = np.random.default_rng(8)
    base = rng.integers(0, 3, (5, 200)).astype(np.int8)
    data = np.ascontiguousarray(base[:, rng.integers(0, 200, 3000)])
    names = list("abcde")
    distinct, weights = compress_rows(data)
    st = EngineSettings(compress_rows=False)
    full = CIEngine(data, names, [3] * 5, st)
    weighted = CIEngine(distinct, names, [3] * 5, st, weights=weights)
    shared = CIEngine(data, names, [3] * 5, st, distinct=(distinct, weights))
    tests = [(0, 1, ()), (0, 1, (2,)), (2, 4, (0, 1)), (1, 3, (0, 2, 4))]
    assert full.test_many(tests) == weighted.test_many(tests) == shared.test_many(tests)
    assert weighted.n_rows == 3000
    np.testing.assert_array_equal(full.table(0, 1, [2]), weighted.table(0, 1, [2]))


def test_first_independent_stops_exactly_at_p_above_alpha():
    """first_independent runs the candidates in order up to the first p > alpha, also when a p-value sits at alpha."""
    codes, names, _ = _load("alarm")
    eng = CIEngine(codes, names)
    cands = [(2,), (3,), (4, 5), (6,), (7, 8, 9)]
    one_by_one = []
    for s in cands:
        one_by_one.append(eng.test(0, 1, s))
        if one_by_one[-1].independent:
            break
    assert eng.first_independent(0, 1, cands) == one_by_one
    # alpha set to a test's own p-value: p > alpha is false there, so that test does not stop the run
    target = eng.test(0, 1, (3,))
    at = CIEngine(codes, names, settings=EngineSettings(alpha=target.pvalue))
    got = at.first_independent(0, 1, cands)
    expected = []
    for s in cands:
        expected.append(at.test(0, 1, s))
        if expected[-1].independent:
            break
    assert got == expected
    assert not at.test(0, 1, (3,)).independent


def test_test_many_refuses_repeated_variables():
    """test_many refuses a test whose x, y and conditioning set share a variable, given by index or by name."""
    data = np.random.default_rng(2).integers(0, 3, (4, 300)).astype(np.int8)
    eng = CIEngine(data, list("abcd"))
    for bad in ([(0, 0, ())], [(0, 1, (1,))], [(0, 1, (2, 2))], [("a", "b", ["b"])]):
        with pytest.raises(ValueError, match="distinct variables"):
            eng.test_many(bad)
    assert eng.test_many([(0, 1, (2,)), ("a", "b", ["c"])]) == [eng.test("a", "b", ["c"])] * 2


def _numpy_twin(data, cards, x, y, given, weights=None):
    """G, X^2, dof, n, strata and m of one test by the plain-numpy path (np.unique / bincount counts)."""
    from pipeline.independence._kernels import flat_statistics_numpy
    from pipeline.independence.counting import count_table

    t = count_table(data, cards, x, y, given, weights=weights, max_cells=10**9)
    return flat_statistics_numpy(t.counts.reshape(-1), cards[x], cards[y])


@pytest.mark.parametrize("weighted", [False, True])
def test_tables_counted_over_occurring_cells_equal_the_dense_count(weighted):
    """Property test (invented data with missing codes; 60 tests of up to 5 conditioning variables):
    the count over the cells that occur (forced with `sparse_ratio=0`) gives the dense count's dof, n,
    strata and m exactly and its statistics to rtol 1e-12, and both equal the plain-numpy twin."""
    rng = np.random.default_rng(11)
    cards = [2, 3, 5, 7, 9, 12, 4, 6]
    rows = 1500
    data = np.vstack([rng.integers(0, k, rows) for k in cards]).astype(np.int8)
    data[rng.random(data.shape) < 0.02] = -1
    weights = rng.integers(0, 4, rows).astype(np.int64) if weighted else None
    names = [f"v{i}" for i in range(len(cards))]
    st = EngineSettings(compress_rows=False, bit_cost=0.0, max_table_cells=10**9)
    sparse = CIEngine(data, names, cards, replace(st, sparse_ratio=0.0), weights=weights)
    dense = CIEngine(data, names, cards, replace(st, sparse_ratio=-1.0), weights=weights)
    tests = []
    for _ in range(60):
        x, y = (int(v) for v in rng.choice(len(cards), 2, replace=False))
        rest = [v for v in range(len(cards)) if v not in (x, y)]
        k = int(rng.integers(0, 6))
        tests.append((x, y, tuple(int(v) for v in rng.choice(rest, k, replace=False))))
    for (x, y, g), a, b in zip(tests, sparse.test_many(tests), dense.test_many(tests)):
        twin = _numpy_twin(data, cards, x, y, g, weights)
        assert (a.dof, a.n) == (b.dof, b.n) == (twin[2], twin[3])
        assert a.statistic == pytest.approx(b.statistic, rel=1e-12, abs=1e-9)
        assert a.statistic == pytest.approx(twin[0], rel=1e-12, abs=1e-9)
        assert a.pvalue == pytest.approx(b.pvalue, rel=1e-10, abs=1e-300)
        assert a.independent == b.independent
    chi = CIEngine(data, names, cards, replace(st, method="chi2", sparse_ratio=0.0), weights=weights)
    for (x, y, g), r in zip(tests, chi.test_many(tests)):
        assert r.statistic == pytest.approx(_numpy_twin(data, cards, x, y, g, weights)[1], rel=1e-12, abs=1e-9)


def test_tables_past_the_dense_cap_stay_in_the_batched_kernel_and_match_causal_learn(monkeypatch):
    """Tables of millions of cells over 3,000 rows (past the dense cap) are counted in the batched kernel
    over the cells that occur; p-values equal causal-learn's CIT (gsq) to rtol 1e-10, and a table whose
    occurring strata need more cells than `max_table_cells` is still refused (LimitError)."""
    from causallearn.utils.cit import CIT

    from pipeline.errors import LimitError

    rng = np.random.default_rng(5)
    rows = 3000
    hidden = rng.integers(0, 3, rows)
    cols = [(hidden * 5 + rng.integers(0, 5, rows)) % k for k in (15, 14, 13, 12, 11, 10)]
    data = np.vstack(cols).astype(np.int8)
    names = list("abcdef")
    eng = CIEngine(data, names, settings=EngineSettings(method="g"))
    tests = [(0, 1, (2, 3, 4)), (4, 5, (0, 1, 2)), (1, 2, (0, 3, 4, 5)), (0, 5, (1, 2, 3))]
    cit = CIT(data.T.astype(np.int64), "gsq")
    one_at_a_time = []
    monkeypatch.setattr(CIEngine, "_single", lambda self, *a: one_at_a_time.append(a))
    results = eng.test_many(tests)
    assert one_at_a_time == []  # none left the batched kernel
    monkeypatch.undo()
    for (x, y, g), r in zip(tests, results):
        assert eng.cards[x] * eng.cards[y] * np.prod([eng.cards[v] for v in g]) > 1 << 16
        assert r.pvalue == pytest.approx(cit(x, y, list(g)), rel=1e-10, abs=1e-300)
        assert r == eng.test(x, y, g)
    small = CIEngine(data, names, settings=EngineSettings(method="g", max_table_cells=5_000))
    with pytest.raises(LimitError, match="max_table_cells"):
        small.test_many([(0, 1, (2, 3, 4))])
