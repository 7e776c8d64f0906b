"""Tables of the search: every test run, and one evidence row per pair of signals, built from the
search's test columns (`TestColumns`) without a Python object per test."""

from __future__ import annotations

import dataclasses
from itertools import combinations
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np
import pandas as pd

from ..independence.columns import LABELLED, PHASES, VALUE_TYPES, TestColumns, TestLog
from ..independence.result import CITestResult, effect_r_of, with_effect_r
from ..report._common import p_is
from ..runs import atomic_write_with

if TYPE_CHECKING:  # annotations only: publishing a cached run's tests loads no search (nor numba)
    from ..search.knowledge import Knowledge
    from ..search.orient import Orientation
    from ..search.skeleton import SkeletonResult

__all__ = ["with_effect_r", "tests_frame", "tests_table", "tests_parquet", "published", "evidence_frame", "benjamini_hochberg", "EVIDENCE_COLUMNS",
           "TEST_COLUMNS"]

# Fields of a test result kept out of tests.parquet: the pair and set have their own columns, and the
# marginal effect size is an evidence column. Every other field (new ones too) becomes a column.
_NOT_IN_TESTS = ("x", "y", "given", "cramers_v")

TEST_COLUMNS = ["test_id", "phase", "level", "var_a", "var_b", "given", "given_size"] + [
    f.name for f in dataclasses.fields(CITestResult) if f.name not in _NOT_IN_TESTS
]


def tests_table(tests: TestColumns, names: Sequence[str], first_id: int = 0) -> Any:
    """The tests as the Arrow table of tests.parquet (`TEST_COLUMNS`): names put in place of the
    indices and the sets joined with ``;``, column by column; ``test_id`` counts from `first_id`."""
    import pyarrow as pa
    import pyarrow.compute as pc

    n = len(tests)
    names_arr = pa.array(list(names), type=pa.string())
    start, stop = int(tests.given_offsets[0]), int(tests.given_offsets[-1])
    members = pc.take(names_arr, pa.array(tests.given_flat[start:stop]))
    given = pa.ListArray.from_arrays(pa.array((tests.given_offsets - start).astype(np.int32)), members)
    labels = pa.array(list(tests.labels), type=pa.string())
    cols: dict[str, Any] = {
        "test_id": pa.array(np.arange(first_id, first_id + n, dtype=np.int64)),
        "phase": pc.take(pa.array(list(PHASES), type=pa.string()), pa.array(tests.phase)),
        "level": pa.array(tests.level.astype(np.int64)),
        "var_a": pc.take(names_arr, pa.array(tests.x)),
        "var_b": pc.take(names_arr, pa.array(tests.y)),
        "given": pc.binary_join(given, ";"),
        "given_size": pa.array(tests.given_sizes.astype(np.int64)),
    }
    for name in TEST_COLUMNS[7:]:
        cols[name] = (pc.take(labels, pa.array(tests.codes[name])) if name in LABELLED
                      else pa.array(tests.values[name].astype(VALUE_TYPES[name], copy=False)))
    return pa.table(cols)


def tests_frame(tests: TestColumns | TestLog, names: Sequence[str]) -> pd.DataFrame:
    """One row per test, in the order the tests were decided (`tests_table` as a DataFrame)."""
    return tests_table(tests.columns() if isinstance(tests, TestLog) else tests, names).to_pandas()


ROW_GROUP = 1 << 16  # tests per row group of tests.parquet: what its writer and its readers hold at a time


def published(table: Any) -> Any:
    """A table of tests (`tests_table`, or one read from an older stage cache entry) as tests.parquet
    stores it: ``effect_r`` beside ``cmi_bits`` (see `effect_r_of`) and text as large_string."""
    import pyarrow as pa

    names = table.column_names
    if "cmi_bits" in names and "effect_r" not in names:
        r = effect_r_of(table.column("cmi_bits").to_numpy())
        table = table.add_column(names.index("cmi_bits") + 1, "effect_r", pa.array(r, type=pa.float64()))
    return table.cast(pa.schema([f.with_type(pa.large_string()) if pa.types.is_string(f.type) else f
                                 for f in table.schema]))


def _row_groups(parts: Sequence[TestColumns], size: int) -> Any:
    """The tests of `parts` in order, `size` at a time (views of one table, or a copy of one row group's
    tests when it spans tables)."""
    pending: list[TestColumns] = []
    n = 0
    for part in parts:
        start = 0
        while start < len(part):
            stop = min(len(part), start + size - n)
            pending.append(part.rows(start, stop))
            n += stop - start
            start = stop
            if n == size:
                yield TestColumns.concat(pending)
                pending, n = [], 0
    if pending:
        yield TestColumns.concat(pending)


def tests_parquet(parts: Sequence[TestColumns], names: Sequence[str], path: Path | None = None) -> bytes | Path:
    """tests.parquet (`published`) of the search's tables in order, written `ROW_GROUP` tests at a time:
    only one row group's columns are in memory, besides the file's bytes when no `path` is given (then
    they are returned; else the file is written atomically at `path`, which is returned)."""
    import io

    import pyarrow as pa
    import pyarrow.parquet as pq

    def opened(fh: Any, schema: Any) -> Any:
        # measured numbers (mostly distinct) without a dictionary: 48 MB instead of 59 MB for the
        # 1.44 million tests of bench_whole's dense set at 50 signals
        coded = [f.name for f in schema if not pa.types.is_floating(f.type)]
        return pq.ParquetWriter(fh, schema, compression="zstd", use_dictionary=coded)

    def write(fh: Any) -> None:
        first = 0
        writer = None
        for chunk in _row_groups(parts, ROW_GROUP):
            table = published(tests_table(chunk, names, first))
            if writer is None:
                writer = opened(fh, table.schema)
            writer.write_table(table)
            first += len(chunk)
        if writer is None:
            table = published(tests_table(TestColumns.empty(), names))
            writer = opened(fh, table.schema)
            writer.write_table(table)
        writer.close()

    if path is not None:
        return atomic_write_with(path, write)
    buf = io.BytesIO()
    write(buf)
    return buf.getvalue()


EVIDENCE_COLUMNS = [
    "var_a", "var_b", "linked", "pvalue", "statistic", "dof", "given", "n", "level", "method",
    "n_tests", "max_given_size", "cmi_bits", "cramers_v", "qvalue", "sparse", "degenerate",
    "policy_applied", "knowledge", "data_disagrees", "orientation", "stability", "flags",
    "explanation",
]


def benjamini_hochberg(pvalues: Sequence[float]) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (q-values), in the input order."""
    p = np.asarray(pvalues, dtype=np.float64)
    m = p.size
    if m == 0:
        return p
    order = np.argsort(p, kind="stable")
    ranked = p[order] * m / np.arange(1, m + 1)
    q = np.minimum.accumulate(ranked[::-1])[::-1]
    out = np.empty(m)
    out[order] = np.minimum(q, 1.0)
    return out


def _set_text(given: str) -> str:
    return "{" + ", ".join(given.split(";")) + "}" if given else "no conditioning set"


def _pair_rows(names: Sequence[str]) -> tuple[list[tuple[str, str]], np.ndarray]:
    """The evidence's pairs (``var_a < var_b`` by name, in order) and, for two variable indices, the
    row of their pair (a matrix)."""
    order = sorted(range(len(names)), key=lambda i: names[i])
    rows = np.full((len(names), len(names)), -1, dtype=np.int64)
    pairs = []
    for r, (i, j) in enumerate(combinations(order, 2)):
        rows[i, j] = rows[j, i] = r
        pairs.append((names[i], names[j]))
    return pairs, rows


def _first_per_group(group: np.ndarray, key: np.ndarray | None, n_groups: int) -> np.ndarray:
    """Per group, the first row (in row order) with the smallest `key` (all rows when None); -1 when empty."""
    rows = np.arange(group.size)
    order = np.lexsort((rows, group) if key is None else (rows, key, group))
    g = group[order]
    first = np.ones(g.size, dtype=bool)
    first[1:] = g[1:] != g[:-1]
    out = np.full(n_groups, -1, dtype=np.int64)
    out[g[first]] = order[first]
    return out


def evidence_frame(
    skeleton: SkeletonResult,
    knowledge: Knowledge,
    alpha: float,
    orientation: Orientation | None = None,
    stability: dict[tuple[str, str], float] | None = None,
) -> pd.DataFrame:
    """One row per unordered pair of signals (``var_a < var_b`` by name), linked or not.

    Per pair: the deciding test (the one that removed it, else the first of its largest p-values),
    its marginal test's Cramer's V, and flags gathered over all its tests, computed on the columns.
    """
    names = list(skeleton.names)
    pairs, rows = _pair_rows(names)
    n_pairs = len(pairs)
    t = skeleton.tests
    # one pass over the search's tables (one at a time: no column of every test is made)
    n_tests = np.zeros(n_pairs, dtype=np.int64)
    max_size = np.full(n_pairs, -1, dtype=np.int64)
    deciding = np.full(n_pairs, -1, dtype=np.int64)  # the first of the largest p-values
    best = np.full(n_pairs, -np.inf)
    marginal = np.full(n_pairs, -1, dtype=np.int64)
    seen = {k: np.zeros(n_pairs, dtype=bool) for k in ("sparse_above", "sparse_below", "degenerate", "policy_applied")}
    base = 0
    for part in t.parts:
        pid = rows[part.x, part.y]
        v = part.values
        sizes = part.given_sizes
        n_tests += np.bincount(pid, minlength=n_pairs)
        np.maximum.at(max_size, pid, sizes)
        first = _first_per_group(pid, -v["pvalue"], n_pairs)
        found = first >= 0
        p_here = np.where(found, v["pvalue"][np.maximum(first, 0)], -np.inf)
        better = found & ((deciding < 0) | (p_here > best))
        deciding[better], best[better] = base + first[better], p_here[better]
        empty = np.flatnonzero(sizes == 0)
        if empty.size:
            first0 = _first_per_group(pid[empty], None, n_pairs)
            new = (marginal < 0) & (first0 >= 0)
            marginal[new] = base + empty[first0[new]]
        above = v["pvalue"] > alpha
        for key, flag in (("sparse_above", v["sparse"] & above), ("sparse_below", v["sparse"] & ~above),
                          ("degenerate", v["degenerate"]), ("policy_applied", v["policy_applied"])):
            seen[key] |= np.bincount(pid[flag], minlength=n_pairs) > 0
        base += len(part)
    index = {name: i for i, name in enumerate(names)}
    for pair, removed_at in skeleton.removed_by.items():
        deciding[rows[index[pair[0]], index[pair[1]]]] = removed_at
    has = deciding >= 0
    rows_at = deciding[has]

    def at(name: str, missing: Any, dtype: Any = object) -> np.ndarray:
        out = np.full(n_pairs, missing, dtype=dtype)
        out[has] = t.take(name, rows_at)
        return out

    def marked(pairs_in: Any) -> np.ndarray:
        out = np.zeros(n_pairs, dtype=bool)
        for a, b in pairs_in:
            if a in index and b in index:
                out[rows[index[a], index[b]]] = True
        return out

    # column by column (no row object per pair); lists of Python values where the wording reads them
    var_a, var_b = [a for a, _ in pairs], [b for _, b in pairs]
    linked, disagrees = marked(skeleton.edges), marked(skeleton.disagreements)
    required, forbidden, rejected = marked(knowledge.required), marked(knowledge.forbidden), marked(knowledge.rejected)
    know = np.where(required, "required", np.where(forbidden, "forbidden", np.where(rejected, "rejected", ""))).tolist()
    pvalue, cmi = at("pvalue", np.nan, np.float64), at("cmi_bits", np.nan, np.float64)
    method, correction = at("method", "").tolist(), at("correction", "none").tolist()
    given = [""] * n_pairs
    for r, text in zip(np.flatnonzero(has).tolist(), t.given_texts(rows_at, names)):
        given[r] = text
    cramers = np.full(n_pairs, np.nan)
    cramers[marginal >= 0] = t.take("cramers_v", marginal[marginal >= 0])
    dependent = linked | disagrees
    # a sparse table decided the pair's fate, or a sparse test read alone would have flipped it
    sparse = at("sparse", False, bool) | np.where(dependent, seen["sparse_above"], seen["sparse_below"])
    degenerate, applied = seen["degenerate"], seen["policy_applied"]
    orientation_col = [""] * n_pairs
    if orientation is not None:
        for r in np.flatnonzero(linked).tolist():
            orientation_col[r] = orientation.label(var_a[r], var_b[r])
    stab = stability or {}
    flag_words = (("sparse", sparse), ("degenerate", degenerate), ("policy_applied", applied), ("data_disagrees", disagrees))
    flags = [[word for word, on in flag_words if on[r]] for r in np.flatnonzero(sparse | degenerate | applied | disagrees).tolist()]
    flag_text = [""] * n_pairs
    for r, words in zip(np.flatnonzero(sparse | degenerate | applied | disagrees).tolist(), flags):
        flag_text[r] = ";".join(words)
    for r in np.flatnonzero(required | forbidden | rejected).tolist():
        word = "reviewer_rejected" if know[r] == "rejected" else know[r]
        flag_text[r] = f"{flag_text[r]};{word}" if flag_text[r] else word
    for r, o in enumerate(orientation_col):
        if o == "ambiguous":
            flag_text[r] = f"{flag_text[r]};ambiguous_orientation" if flag_text[r] else "ambiguous_orientation"
    n_tests_l, p_l, cmi_l, linked_l, disagrees_l = n_tests.tolist(), pvalue.tolist(), cmi.tolist(), linked.tolist(), disagrees.tolist()
    explanation = [
        _explain({"var_a": var_a[r], "var_b": var_b[r], "linked": linked_l[r], "knowledge": know[r], "pvalue": p_l[r],
                  "given": given[r], "n_tests": n_tests_l[r], "cmi_bits": cmi_l[r], "method": method[r],
                  "correction": correction[r], "data_disagrees": disagrees_l[r]}, alpha)
        for r in range(n_pairs)
    ]
    # q-values over every pair that was tested (linked or separated), each at its deciding p-value
    qvalue = np.full(n_pairs, np.nan)
    tested = ~np.isnan(pvalue)
    if tested.any():
        qvalue[tested] = benjamini_hochberg(pvalue[tested])
    # every column built with its final type, in the published order: one constructor, no casts after it
    columns: dict[str, Any] = {
        "var_a": var_a, "var_b": var_b, "linked": linked, "pvalue": pvalue,
        "statistic": at("statistic", np.nan, np.float64), "dof": at("dof", 0, np.int64), "given": given,
        "n": at("n", 0, np.int64), "level": at("given_sizes", -1, np.int64), "method": method,
        "n_tests": n_tests, "max_given_size": max_size, "cmi_bits": cmi, "cramers_v": cramers, "qvalue": qvalue,
        "sparse": sparse, "degenerate": degenerate, "policy_applied": applied, "knowledge": know,
        "data_disagrees": disagrees, "orientation": orientation_col,
        "stability": np.array([stab.get(p, np.nan) for p in pairs], dtype=np.float64) if stab else np.full(n_pairs, np.nan),
        "flags": flag_text, "explanation": explanation,
    }
    if not n_pairs:
        return pd.DataFrame(columns=EVIDENCE_COLUMNS).astype(_EMPTY_TYPES)
    return pd.DataFrame(columns, copy=False)


# the types of an evidence table without pairs (its text columns are of no type)
_EMPTY_TYPES = {"linked": "bool", "dof": "int64", "n": "int64", "level": "int64", "n_tests": "int64",
                "max_given_size": "int64", "sparse": "bool", "degenerate": "bool", "policy_applied": "bool",
                "data_disagrees": "bool", "pvalue": "float64", "statistic": "float64", "cmi_bits": "float64",
                "cramers_v": "float64", "qvalue": "float64", "stability": "float64"}


def _residual_words(row: dict[str, object], alpha: float) -> str:
    """The outcome of a pair decided by the numeric test (``gcm``) in plain words: what each signal was
    predicted from, and how much the two still move together after that (the residual correlation)."""
    a, b = row["var_a"], row["var_b"]
    given = str(row["given"])
    past = str(row.get("correction", "none")) != "none"
    r = float(effect_r_of(float(row["cmi_bits"])))  # type: ignore[arg-type]
    p = p_is(float(row["pvalue"]))  # type: ignore[arg-type]
    sources = ([_set_text(given)] if given else []) + (["its own previous window"] if past else [])
    if row["linked"]:
        n_tests = int(row["n_tests"])  # type: ignore[call-overload]
        tried = "the test" if n_tests == 1 else f"each of the {n_tests} conditioning sets tried"
        if sources:
            moved = f"still move together after each was predicted from {' and '.join(sources)}"
            return f"linked: dependent under {tried}; the weakest: {a} and {b} {moved} (residual correlation r = {r:.2f}, {p})."
        return f"linked: dependent under {tried}: {a} and {b} move together (correlation of their rank scores r = {r:.2f}, {p})."
    if sources:
        return (f"separated: what is left of {a} and of {b} after each was predicted from {' and '.join(sources)} "
                f"is unrelated (residual correlation r = {r:.2f}, {p} > alpha = {alpha:g}).")
    return (f"separated: {a} and {b} show no association (correlation of their rank scores r = {r:.2f}, "
            f"{p} > alpha = {alpha:g}).")


def _explain(row: dict[str, object], alpha: float) -> str:
    if row.get("method") == "gcm" and not row["knowledge"]:
        return _residual_words(row, alpha)
    return _explain_outcome(row, alpha)


def _explain_outcome(row: dict[str, object], alpha: float) -> str:
    n_tests = int(row["n_tests"])  # type: ignore[call-overload]
    p = float(row["pvalue"])  # type: ignore[arg-type]
    given = _set_text(str(row["given"]))
    if row["knowledge"] == "forbidden":
        return "separated by the configuration (knowledge.forbidden): the pair was never tested."
    if row["knowledge"] == "rejected":
        if row["data_disagrees"]:
            return (
                "separated by the reviewer (reject), but tonight's data disagree: every test found "
                f"dependence, the weakest {p_is(p)} given {given}."
            )
        return (f"separated by the reviewer (reject); the data agree: no evidence of dependence "
                f"given {given} ({p_is(p)} > alpha = {alpha:g}).")
    if not row["linked"]:
        return f"separated: no evidence of dependence given {given} ({p_is(p)} > alpha = {alpha:g})."
    tried = "test" if n_tests == 1 else "conditioning sets"
    text = (
        f"linked: dependent under each of the {n_tests} {tried} tried; "
        f"weakest evidence {p_is(p)} given {given}."
    )
    if row["knowledge"] == "required":
        if row["data_disagrees"]:
            return (
                "linked by expert knowledge, but the data disagree: a test found no evidence of "
                f"dependence (largest {p_is(p)} given {given})."
            )
        text = "linked by expert knowledge; " + text.split(": ", 1)[1]
    return text
