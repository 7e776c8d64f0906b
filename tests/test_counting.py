"""Contingency counting: missing values, partitions, the sparse path and the compiled kernels."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.independence import contingency_statistics
from pipeline.independence._kernels import count_dense, count_dense_numpy
from pipeline.independence.counting import count_flat, count_table, stratum_codes


def _codes(rng: np.random.Generator, n: int, cards: list[int], missing: float = 0.0) -> np.ndarray:
    data = np.vstack([rng.integers(0, k, n) for k in cards]).astype(np.int8)
    if missing:
        data[rng.random(data.shape) < missing] = -1
    return data


def test_table_matches_pandas_crosstab_with_missing_values():
    """Test-wise deletion: the counts and n equal a pandas crosstab over the complete rows (outside reference)."""
    rng = np.random.default_rng(1)
    cards = [3, 4, 2, 3]
    data = _codes(rng, 3000, cards, missing=0.05)
    res = count_table(data, cards, 0, 1, (2, 3))
    frame = pd.DataFrame(data.T, columns=["x", "y", "a", "b"])
    complete = frame[(frame >= 0).all(axis=1)]
    assert res.n == len(complete)
    strata = sorted({(a, b) for a, b in zip(complete.a, complete.b)})
    assert res.counts.shape[0] == len(strata)
    for i, (a, b) in enumerate(strata):
        part = complete[(complete.a == a) & (complete.b == b)]
        ct = pd.crosstab(part.x, part.y).reindex(index=range(3), columns=range(4), fill_value=0)
        np.testing.assert_array_equal(res.counts[i], ct.to_numpy())


def test_partitioned_counting_equals_whole_table():
    """Counting 517 rows at a time gives the same tables and statistics as counting all rows at once."""
    rng = np.random.default_rng(2)
    cards = [3, 3, 4, 2, 3]
    data = _codes(rng, 5000, cards, missing=0.02)
    for given in [(), (2,), (2, 3), (2, 3, 4)]:
        whole = count_table(data, cards, 0, 1, given)
        parts = count_table(data, cards, 0, 1, given, partition_rows=517)
        assert whole.n == parts.n
        np.testing.assert_array_equal(whole.counts, parts.counts)
        fw, nw = count_flat(data, cards, 0, 1, given)
        fp, np_ = count_flat(data, cards, 0, 1, given, partition_rows=517)
        np.testing.assert_array_equal(fw, fp)
        assert nw == np_ == whole.n


def test_sparse_count_equals_dense_count():
    """When the levels multiply past the rows, the sparse count gives the dense count's statistics."""
    rng = np.random.default_rng(3)
    cards = [4, 4, 30, 30, 30]
    data = _codes(rng, 800, cards, missing=0.01)
    given = (2, 3, 4)  # 16 * 27000 cells > 4 * 800 rows: sparse path
    sparse = count_table(data, cards, 0, 1, given)
    dense = count_table(data, cards, 0, 1, given, partition_rows=10**6, max_cells=10**9)
    assert sparse.n == dense.n
    a, b = contingency_statistics(sparse.counts), contingency_statistics(dense.counts)
    assert a.dof == b.dof
    assert a.g == pytest.approx(b.g, rel=1e-12)
    assert a.chi2 == pytest.approx(b.chi2, rel=1e-12)
    # The dense result was produced by the dense path (4 * rows limit raised), the other by the sparse one.
    sparse_parts = count_table(data, cards, 0, 1, given, partition_rows=97)
    np.testing.assert_array_equal(sparse_parts.counts, sparse.counts)


def test_compiled_count_equals_numpy_count():
    """The compiled counting kernels give exactly the numpy counts, for 0 to 6 conditioning columns."""
    rng = np.random.default_rng(4)
    cards = [3, 2, 3, 2, 4, 2, 3, 2]
    for missing in (0.0, 0.03):
        data = _codes(rng, 4000, cards, missing=missing)
        for ng in range(7):
            given = np.arange(2, 2 + ng, dtype=np.int64)
            gcards = np.array([cards[g] for g in given], dtype=np.int64)
            possible = 6 * int(np.prod(gcards))
            for checked in ((True, False) if missing == 0 else (True,)):
                a = count_dense(data, 0, 1, given, gcards, 3, 2, 100, 3900, possible, checked)
                b = count_dense_numpy(data, 0, 1, given, gcards, 3, 2, 100, 3900, possible)
                np.testing.assert_array_equal(a, b)


def test_stratum_codes_mixed_radix():
    """The stratum index is the mixed-radix number of the conditioning codes, -1 where one is missing."""
    data = np.array([[0, 1, 2, -1], [1, 0, 1, 1]], dtype=np.int8)
    s, possible, missing = stratum_codes(data, [3, 2], (0, 1))
    assert possible == 6
    assert s.tolist() == [1, 2, 5, -1]
    assert missing.tolist() == [False, False, False, True]


def test_compress_rows_weights_reproduce_every_table():
    """Distinct rows with their counts as weights give exactly the counts of the full table, with missing values."""
    from pipeline.independence.counting import compress_rows

    rng = np.random.default_rng(4)
    cards = [3, 2, 4, 2, 3]
    base = _codes(rng, 300, cards, missing=0.05)
    data = np.ascontiguousarray(base[:, rng.integers(0, 300, 5000)])  # many repeated rows
    packed = compress_rows(data, max_ratio=0.5)
    assert packed is not None
    distinct, weights = packed
    assert distinct.shape[1] <= 300 and int(weights.sum()) == 5000
    assert np.unique(distinct.T, axis=0).shape[0] == distinct.shape[1]
    for given in [(), (2,), (2, 3), (2, 3, 4)]:
        full = count_table(data, cards, 0, 1, given)
        small = count_table(distinct, cards, 0, 1, given, weights=weights)
        np.testing.assert_array_equal(full.counts, small.counts)
        assert full.n == small.n
        fw, nw = count_flat(distinct, cards, 0, 1, given, weights=weights)
        ff, nf = count_flat(data, cards, 0, 1, given)
        assert nw == nf and fw.sum() == ff.sum()


def test_compress_rows_declines_when_rows_are_distinct():
    """A table whose rows are nearly all different is not compressed (None), checked on a sample first."""
    from pipeline.independence.counting import compress_rows

    rng = np.random.default_rng(5)
    data = rng.integers(0, 4, (12, 50_000)).astype(np.int8)
    assert compress_rows(data, max_ratio=0.75, sample=4096) is None
    assert compress_rows(data[:, :10]) is not None  # max_ratio 1: always compressed


def test_bit_plane_counts_equal_row_counts():
    """Bit-plane counting (popcounts of level planes) gives the same table as the row loop, with missing values."""
    from pipeline.independence._kernels import HAVE_NUMBA
    from pipeline.independence.engine import CIEngine, EngineSettings

    if not HAVE_NUMBA:
        pytest.skip("numba not installed")
    rng = np.random.default_rng(6)
    cards = [3, 4, 2, 3, 2, 4]
    data = _codes(rng, 3001, cards, missing=0.03)
    names = list("abcdef")
    tests = [(0, 1, ()), (0, 1, (2,)), (1, 3, (0, 2)), (0, 5, (1, 2, 3)), (4, 5, (0, 1, 2, 3))]
    bits = CIEngine(data, names, cards, EngineSettings(bit_cost=1e-9, compress_rows=False))
    rows = CIEngine(data, names, cards, EngineSettings(bit_cost=0.0, compress_rows=False))
    assert bits.test_many(tests) == rows.test_many(tests)


def test_tables_above_the_dense_cap_fall_back_to_the_sparse_count():
    """A table with more cells than 4x the rows is counted sparsely inside test_many, with the numbers of count_table."""
    from pipeline.independence.engine import CIEngine

    rng = np.random.default_rng(9)
    cards = [8] * 6
    data = _codes(rng, 3001, cards)
    eng = CIEngine(data, list("abcdef"), cards)
    res = eng.test_many([(0, 1, (2, 3, 4, 5)), (0, 1, ())])  # 8**6 cells > 65,536: the sparse path
    ref = contingency_statistics(count_table(data, cards, 0, 1, (2, 3, 4, 5)).counts)
    assert res[0].statistic == pytest.approx(ref.g, rel=1e-12) and res[0].dof == ref.dof
    assert res[0].n == 3001 and res[1] == eng.test(0, 1)


def test_row_hash_numpy_pass_equals_compiled_kernel():
    """The numpy pass of the row hash (small tables) gives exactly the compiled kernel's values (large ones)."""
    from pipeline.independence import counting
    from pipeline.independence._kernels import HAVE_NUMBA, row_hash

    if not HAVE_NUMBA:
        pytest.skip("numba is not installed")
    data = np.random.default_rng(3).integers(-1, 7, size=(9, 5_000)).astype(np.int8)
    assert data.size < counting._COMPILED_HASH_CELLS
    np.testing.assert_array_equal(counting._row_hash(data), row_hash(data))
