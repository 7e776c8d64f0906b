"""The search's tests as columns: Parquet parts, candidate sets as arrays, tests.parquet written by parts."""

from __future__ import annotations

import io

import numpy as np
import pyarrow.parquet as pq
from _shared import benchmark_codes

from pipeline.independence.columns import Candidates, TestColumns, TestLog
from pipeline.independence.engine import CIEngine, EngineSettings
from pipeline.runner import decode
from pipeline.search.skeleton import candidate_sets, level_candidates, pc_stable_skeleton
from pipeline.stages._evidence import tests_parquet as parquet_bytes  # (aliases: not collected as tests)
from pipeline.stages._evidence import tests_table as arrow_table


def _child():
    return benchmark_codes("child")


def _search():
    codes, names, cards = _child()
    return names, pc_stable_skeleton(codes, names, cards, EngineSettings(method="g", sparse_policy="independent"))


def test_parquet_part_round_trip_equals_the_columns(tmp_path):
    """Every table of the CHILD search (published benchmark data) written as a Parquet part and read back,
    directly or through the DataFrame the stage cache makes of it, equals the original columns."""
    names, res = _search()
    assert len(res.tests.parts) > 3
    for i, part in enumerate(res.tests.parts):
        pq.write_table(part.to_arrow(), tmp_path / f"p{i}.parquet", compression="zstd")
        back = TestColumns.from_arrow(pq.read_table(tmp_path / f"p{i}.parquet"))
        assert back.equals(part)
        assert back.results(names) == part.results(names)
        frame = decode("part.parquet", (tmp_path / f"p{i}.parquet").read_bytes())
        assert TestColumns.from_arrow(frame).equals(part)
    joined = TestColumns.concat(res.tests.parts)
    assert joined.equals(res.tests.columns()) and len(joined) == len(res.tests)
    assert TestColumns.from_arrow(TestColumns.empty().to_arrow()).equals(TestColumns.empty())


def test_a_search_keeps_no_object_per_test_and_rows_match_one_test_at_a_time():
    """The search's log rows are those of `CIEngine.test` run one at a time on the same sets (CHILD data)."""
    codes, names, cards = _child()
    _, res = _search()
    eng = CIEngine(codes, names, cards, EngineSettings(method="g", sparse_policy="independent"))
    rows = np.random.default_rng(3).choice(len(res.tests), 200, replace=False)
    log = res.tests
    for i in rows.tolist():
        x, y = int(log.take("x", np.array([i]))[0]), int(log.take("y", np.array([i]))[0])
        one = eng.test(x, y, log.given(i))
        got = log.columns().result(i, names)
        assert repr(got) == repr(one)
    assert all(isinstance(p, TestColumns) for p in log.parts)


def test_level_candidates_equal_candidate_sets():
    """The array form of a level's candidate sets lists the same sets in the same order as
    `candidate_sets` on names (random graphs over names not in index order; property check)."""
    rng = np.random.default_rng(11)
    for trial in range(20):
        p = int(rng.integers(4, 12))
        names = [f"v{int(k):03d}" for k in rng.permutation(100)[:p]]
        rank = np.empty(p, dtype=np.int64)
        rank[np.argsort(np.array(names, dtype=object), kind="stable")] = np.arange(p)
        adj = np.triu(rng.random((p, p)) < 0.5, 1)
        adj = adj | adj.T
        neighbours = {names[i]: {names[j] for j in np.flatnonzero(adj[i])} for i in range(p)}
        edges = sorted(tuple(sorted((names[i], names[j]))) for i, j in zip(*np.nonzero(np.triu(adj))))
        index = {n: i for i, n in enumerate(names)}
        for level in range(4):
            cand = level_candidates([(index[a], index[b]) for a, b in edges], adj, rank, level)
            want = [(a, b, candidate_sets(a, b, neighbours, level)) for a, b in edges]
            want = [w for w in want if w[2]]
            got = [(names[x], names[y], [tuple(names[g] for g in s) for s in sets]) for x, y, sets in cand]
            assert got == want, (trial, level)


def test_candidates_split_keeps_order_and_every_set():
    """Splitting a level's candidates into tasks keeps every pair and set, in order."""
    sets = np.arange(60, dtype=np.int32).reshape(30, 2)
    cand = Candidates(x=np.arange(6, dtype=np.int32), y=np.arange(6, 12, dtype=np.int32),
                      bounds=np.array([0, 1, 9, 10, 20, 29, 30]), sets=sets)
    for n in (1, 2, 3, 6, 10):
        chunks = cand.split(n)
        assert [t for c in chunks for t in c] == list(cand)
        assert sum(len(c) for c in chunks) == len(cand)


def test_tests_parquet_by_parts_equals_one_table(tmp_path, monkeypatch):
    """tests.parquet written table by table, in row groups that cut across the tables, reads back as the
    table of every test at once (with effect_r, text as large_string), as bytes and as a file."""
    import pipeline.stages._evidence as evidence

    names, res = _search()
    whole = evidence.published(arrow_table(res.tests.columns(), names))
    assert whole.column_names.index("effect_r") == whole.column_names.index("cmi_bits") + 1
    sizes = [len(p) for p in res.tests.parts]
    monkeypatch.setattr(evidence, "ROW_GROUP", max(sizes) // 2 + 1)  # groups both within and across tables
    by_parts = pq.read_table(io.BytesIO(parquet_bytes(res.tests.parts, names)))
    assert by_parts.schema.equals(whole.schema) and by_parts.equals(whole)
    assert list(by_parts.column("test_id").to_pylist()) == list(range(len(res.tests)))
    groups = pq.ParquetFile(io.BytesIO(parquet_bytes(res.tests.parts, names))).metadata
    assert len(sizes) > 1 and groups.num_row_groups == -(-len(res.tests) // evidence.ROW_GROUP)  # full groups but the last
    path = parquet_bytes(res.tests.parts, names, tmp_path / "tests.parquet")
    assert path == tmp_path / "tests.parquet" and pq.read_table(path).equals(whole)
    empty = pq.read_table(io.BytesIO(parquet_bytes([], names)))
    assert empty.num_rows == 0 and empty.schema.equals(whole.schema)


def test_log_reads_field_by_field():
    """A log's fields, rows and slices agree with the one table of all its tests."""
    names, res = _search()
    log, whole = res.tests, res.tests.columns()
    for name in ("x", "y", "level", "phase", "given_sizes", "pvalue", "dof", "independent"):
        assert np.array_equal(log.field(name), getattr(whole, name) if name in ("x", "y", "level", "phase", "given_sizes")
                              else whole.values[name], equal_nan=name == "pvalue")
    rows = np.array([0, len(log) - 1, len(log) // 2])
    assert list(log.take("method", rows)) == list(whole.text("method")[rows])
    for start in (0, 1, len(log) // 3, len(log) - 1):
        assert TestColumns.concat(log.since(start)).equals(TestColumns.concat(TestLog([whole]).since(start)))
    assert [log.given(int(i)) for i in rows] == [whole.given(int(i)) for i in rows]


def test_published_tests_equal_from_an_older_entry_and_from_the_stage(tmp_path):
    """A run folder's tests.parquet is the same table whether the stage wrote it in the run folder's form
    (linked as it is) or an older cache entry held text as string and no effect_r (copied batch by batch)."""
    from pipeline.api import _publish_tests
    from pipeline.stages._evidence import ROW_GROUP, published

    names, res = _search()
    new = parquet_bytes(res.tests.parts, names, tmp_path / "new.parquet")
    old = tmp_path / "old.parquet"
    pq.write_table(arrow_table(res.tests.columns(), names), old, row_group_size=ROW_GROUP // 7)
    assert "effect_r" not in pq.read_schema(old).names
    assert _publish_tests(new, tmp_path / "a" / "tests.parquet") == _publish_tests(old, tmp_path / "b" / "tests.parquet") == len(res.tests)
    a, b = pq.read_table(tmp_path / "a" / "tests.parquet"), pq.read_table(tmp_path / "b" / "tests.parquet")
    assert a.schema.equals(b.schema) and a.equals(b) and a.equals(published(arrow_table(res.tests.columns(), names)))
    assert (tmp_path / "a" / "tests.parquet").read_bytes() == new.read_bytes()  # the stage's file as it is


def test_given_texts_equal_one_set_at_a_time():
    """The conditioning sets of any rows of a log of several tables, gathered at once, equal the sets
    read one test at a time (published CHILD network; the search's own tables)."""
    codes, names, cards = benchmark_codes("child")
    log = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g"), max_order=2).tests
    assert len(log.parts) > 2
    rng = np.random.default_rng(3)
    rows = np.concatenate([rng.integers(0, len(log), 300), [0, len(log) - 1], np.flatnonzero(log.given_sizes == 2)[:5]])
    expected = [";".join(names[g] for g in log.given(int(r))) for r in rows]
    assert log.given_texts(rows, names) == expected
    assert any(";" in text for text in expected) and "" in expected  # sets of two and the empty set
    assert log.given_texts(np.zeros(0, dtype=np.int64), names) == []
