"""PC-stable skeleton search on the benchmark networks, against the stored reference and causal-learn."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

import numpy as np
import pytest

from pipeline.independence import EngineSettings
from pipeline.parallel import parallel_context
from pipeline.search import Knowledge, pc_stable_skeleton
from pipeline.search.skeleton import candidate_sets

BENCH = Path(__file__).resolve().parent / "data" / "benchmarks"
SETS = ["asia", "child", "insurance", "alarm"]


@lru_cache(maxsize=None)
def _load(name: str) -> tuple[np.ndarray, tuple[str, ...], tuple[int, ...], np.ndarray]:
    path = BENCH / name / "data.txt"
    header = tuple(path.read_text().split("\n", 1)[0].split())
    raw = np.loadtxt(path, skiprows=1, dtype=np.int64)
    codes = np.vstack([np.unique(raw[:, j], return_inverse=True)[1] for j in range(raw.shape[1])])
    codes = codes.astype(np.int8)
    return codes, header, tuple(int(c.max()) + 1 for c in codes), raw


def _run(name: str, method: str, **kw):
    codes, names, cards, _ = _load(name)
    return pc_stable_skeleton(codes, names, cards, EngineSettings(method=method, alpha=0.05), **kw)


@pytest.mark.parametrize("name", SETS)
def test_chi2_skeleton_equals_reference(name):
    """chi2, alpha 0.05, flag, no cap: exactly the skeleton of causal-learn's stored pc(..., "chisq", stable=True) result."""
    ref = np.loadtxt(BENCH / name / "reference_pc_chisq_0.05_stable.txt") != 0
    res = _run(name, "chi2")
    np.testing.assert_array_equal(res.adjacency(), ref | ref.T)


@pytest.mark.parametrize("method", ["g", "auto"])
@pytest.mark.parametrize("name", SETS)  # causal-learn takes 0.04 s (asia) to 2.4 s (insurance) here
def test_g_skeleton_equals_causal_learn(name, method):
    """G (and the default `auto`, which runs the G-test on categorical signals with independent rows), alpha
    0.05: exactly the skeleton of causal-learn's pc(data, 0.05, "gsq", stable=True) computed here."""
    from causallearn.search.ConstraintBased.PC import pc

    _, _, _, raw = _load(name)
    cg = pc(raw.astype(float), 0.05, "gsq", stable=True, show_progress=False)
    theirs = cg.G.graph != 0
    res = _run(name, method)
    assert set(res.tests.text("method")) == {"g"}
    np.testing.assert_array_equal(res.adjacency(), theirs | theirs.T)


@pytest.mark.parametrize("name", ["child", "insurance"])
def test_column_order_does_not_matter(name):
    """Shuffling the column order gives the same skeleton and the same separating sets."""
    codes, names, cards, _ = _load(name)
    base = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g"))
    perm = np.random.default_rng(9).permutation(len(names))
    other = pc_stable_skeleton(codes[perm], [names[i] for i in perm], [cards[i] for i in perm],
                               EngineSettings(method="g"))
    assert other.edges == base.edges
    assert other.separating_sets == base.separating_sets


def test_jobs_one_and_two_agree():
    """One worker and two workers give the same skeleton, separating sets and test sequence."""
    codes, names, cards, _ = _load("child")
    st = EngineSettings(method="g")
    one = pc_stable_skeleton(codes, names, cards, st)
    with parallel_context(jobs=2) as ctx:
        two = pc_stable_skeleton(codes, names, cards, st, context=ctx)
    assert one.edges == two.edges
    assert one.separating_sets == two.separating_sets
    assert one.tests.equals(two.tests)  # NaN-safe


def _slow_warm_up(_shared, task):
    """A worker warm-up that outlasts the search (a worker still starting)."""
    import time

    time.sleep(20)
    return task


@pytest.mark.parametrize("workers", ["cold", "warm"])
def test_shared_levels_agree_whatever_the_workers_state(monkeypatch, workers):
    """CHILD with every level shared out in many tasks (the thresholds lowered) gives the same skeleton,
    separating sets and test sequence as one process, whether the worker is still warming up (the run's
    process takes every task) or warm (both take tasks)."""
    from pipeline.search import skeleton as sk

    monkeypatch.setattr(sk, "_OPEN_WORK", 0)
    monkeypatch.setattr(sk, "_TASK_WORK", 1)
    codes, names, cards, _ = _load("child")
    st = EngineSettings(method="g")
    one = pc_stable_skeleton(codes, names, cards, st)
    warm_up = _slow_warm_up if workers == "cold" else None
    with parallel_context(jobs=2, warm_up=warm_up) as ctx:
        two = pc_stable_skeleton(codes, names, cards, st, context=ctx)
        assert ctx.opened
        if workers == "cold":
            assert not any(f.done() for f in ctx._warming)  # the search never waited for the worker
            ctx._executor.shutdown(kill_workers=True)  # not 20 s more for the sleeping warm-up
            ctx._warming = []
    assert one.edges == two.edges
    assert one.separating_sets == two.separating_sets
    assert one.tests.equals(two.tests)  # NaN-safe


def test_small_levels_open_no_pool():
    """A search whose levels are all small (CHILD at 5,000 rows) runs in the run's own process: the
    workers of a two-job context never start."""
    codes, names, cards, _ = _load("child")
    with parallel_context(jobs=2) as ctx:
        pc_stable_skeleton(codes, names, cards, EngineSettings(method="g"), context=ctx)
        assert not ctx.opened


def test_required_pair_survives_and_is_reported():
    """A required pair that a test calls independent stays linked and is listed in disagreements."""
    codes, names, cards, _ = _load("asia")
    plain = _run("asia", "g")
    pair = sorted(plain.separating_sets)[0]
    know = Knowledge.build(names, required=[pair])
    res = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g"), knowledge=know)
    assert pair in res.edges and pair in res.disagreements
    assert pair not in res.separating_sets


def test_forbidden_pair_is_never_tested():
    """A forbidden pair is removed before the search and no test on it is run."""
    codes, names, cards, _ = _load("asia")
    plain = _run("asia", "g")
    pair = sorted(plain.edges)[0]
    know = Knowledge.build(names, forbidden=[pair])
    res = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g"), knowledge=know)
    assert pair not in res.edges and pair in res.forbidden
    assert all(tuple(sorted((r.x, r.y))) != pair for r in res.tests.results(names))


def test_rejected_pair_is_tested_then_removed():
    """A reviewer-rejected pair (ASIA) is tested exactly as without the review, then removed; a rejected pair the
    tests kept linked is a disagreement, one they separated is not."""
    codes, names, cards, _ = _load("asia")
    plain = _run("asia", "g")
    kept, gone = sorted(plain.edges)[0], sorted(plain.separating_sets)[0]
    know = Knowledge.build(names, rejected=[kept, gone])
    res = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g"), knowledge=know)
    assert res.tests.equals(plain.tests)  # the same tests
    assert res.edges == plain.edges - {kept} and res.rejected == {kept, gone}
    assert kept in res.disagreements and gone not in res.disagreements


def test_max_order_caps_conditioning_sets():
    """max_order = 1 tries no conditioning set larger than one variable."""
    res = _run("child", "g", max_order=1)
    assert int(res.tests.given_sizes.max()) == 1
    assert res.levels <= 2


def test_candidate_sets_order():
    """Candidates are the subsets of a's neighbours, then new subsets of b's neighbours, each in name order."""
    nb = {"a": {"b", "c", "d"}, "b": {"a", "d", "e"}, "c": {"a"}, "d": {"a", "b"}, "e": {"b"}}
    assert candidate_sets("a", "b", nb, 1) == [("c",), ("d",), ("e",)]
    assert candidate_sets("a", "b", nb, 0) == [()]


def test_row_compression_does_not_change_the_search():
    """With and without distinct-row compression and bit-plane counting the search runs the same tests with the same results."""
    codes, names, cards, _ = _load("child")
    fast = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g"))
    slow = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g", compress_rows=False, bit_cost=0.0))
    assert fast.edges == slow.edges and fast.separating_sets == slow.separating_sets
    assert fast.tests.results(names) == slow.tests.results(names)


def test_distinct_rows_found_once_per_table_file(tmp_path):
    """The distinct rows of a memory-mapped table are found once per process (the battery and the skeleton
    stage read the same cache file) and are read-only; a table written anew under the same name is
    looked at again, and a table in memory every time (CHILD, published benchmark data)."""
    from pipeline.independence.counting import compress_rows
    from pipeline.search import skeleton as sk

    codes, _, _, _ = _load("child")
    path = tmp_path / "codes.npy"
    np.save(path, codes)
    first = sk._distinct_rows(np.load(path, mmap_mode="r"), 1.0)
    again = sk._distinct_rows(np.load(path, mmap_mode="r"), 1.0)
    assert again is first and not first[0].flags.writeable and not first[1].flags.writeable
    ref = compress_rows(codes)
    np.testing.assert_array_equal(first[0], ref[0])
    np.testing.assert_array_equal(first[1], ref[1])
    np.save(tmp_path / "other.npy", codes[:, ::-1])
    (tmp_path / "other.npy").replace(path)  # another table under the same name
    swapped = sk._distinct_rows(np.load(path, mmap_mode="r"), 1.0)
    np.testing.assert_array_equal(swapped[0], compress_rows(codes[:, ::-1])[0])
    assert sk._distinct_rows(codes, 1.0) is not sk._distinct_rows(codes, 1.0)


def test_slices_of_one_memory_map_are_different_tables(tmp_path):
    """Two slices of the same shape of one memory-mapped file (the same file name and offset) are told
    apart: each gets its own distinct rows, equal to those of its rows in memory (CHILD)."""
    from pipeline.independence.counting import compress_rows
    from pipeline.search import skeleton as sk

    codes, _, _, _ = _load("child")
    np.save(tmp_path / "codes.npy", codes)
    table = np.load(tmp_path / "codes.npy", mmap_mode="r")
    left, right = table[:, :2000], table[:, 2000:4000]
    for part, rows in ((left, codes[:, :2000]), (right, codes[:, 2000:4000]), (left, codes[:, :2000])):
        found = sk._distinct_rows(part, 1.0)
        np.testing.assert_array_equal(found[0], compress_rows(rows)[0])
        np.testing.assert_array_equal(found[1], compress_rows(rows)[1])
    assert sk._file_of(left) != sk._file_of(right) and sk._file_of(left) == sk._file_of(table[:, :2000])
