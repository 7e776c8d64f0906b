"""Tables of the search: every test run, and one evidence row per pair of signals."""

from __future__ import annotations

import dataclasses
from itertools import combinations
from operator import attrgetter
from typing import Sequence

import numpy as np
import pandas as pd

from ..independence.result import CITestResult, with_effect_r
from ..pairs import pair_key
from ..report._common import p_is
from ..search.knowledge import Knowledge
from ..search.orient import Orientation
from ..search.skeleton import SkeletonResult, TestRecord

__all__ = ["with_effect_r", "tests_frame", "tests_part", "records_from_part", "evidence_frame", "benjamini_hochberg", "EVIDENCE_COLUMNS", "TEST_COLUMNS"]

# Fields of a test result kept out of tests.parquet: the pair and set have their own columns, and the
# marginal effect size is an evidence column. Every other field (new ones too) becomes a column.
_NOT_IN_TESTS = ("x", "y", "given", "cramers_v")
_ARROW_TYPES = {"float": "float64", "int": "int64", "bool": "bool_", "str": "string"}


def _result_fields() -> list[tuple[str, str]]:
    """(name, arrow type name) of every `CITestResult` field, in declaration order."""
    out = []
    for f in dataclasses.fields(CITestResult):
        kind = f.type if isinstance(f.type, str) else getattr(f.type, "__name__", str(f.type))
        out.append((f.name, "list" if kind.startswith("tuple") else _ARROW_TYPES[kind]))
    return out


TEST_COLUMNS = ["test_id", "phase", "level", "var_a", "var_b", "given", "given_size"] + [
    name for name, _ in _result_fields() if name not in _NOT_IN_TESTS
]


def tests_part(records: Sequence[TestRecord]):
    """The tests as an Arrow table: ``level`` and every result field (the set as a list), one column
    per field built in one pass over the records (the checkpoint part of a search level)."""
    import pyarrow as pa

    results = [rec.result for rec in records]
    cols = {"level": pa.array([rec.level for rec in records], type=pa.int64())}
    for name, kind in _result_fields():
        values = list(map(attrgetter(name), results))
        cols[name] = pa.array(values, type=pa.list_(pa.string()) if kind == "list" else getattr(pa, kind)())
    return pa.table(cols)


def records_from_part(table) -> list[TestRecord]:
    """The test records of a table written by `tests_part` (a resumed search goes on from them)."""
    import pyarrow as pa

    if isinstance(table, pd.DataFrame):  # as the stage cache hands a Parquet artifact back
        table = pa.Table.from_pandas(table, preserve_index=False)
    names = [name for name, _ in _result_fields()]
    cols = {name: table.column(name).to_pylist() for name in names}
    cols["given"] = [tuple(g) for g in cols["given"]]
    levels = table.column("level").to_pylist()
    return [
        TestRecord(level=lv, result=CITestResult(**dict(zip(names, values))))
        for lv, values in zip(levels, zip(*(cols[n] for n in names)))
    ]


def tests_frame(records: Sequence[TestRecord], phases: Sequence[str] | None = None) -> pd.DataFrame:
    """One row per test, in the order the tests were decided (built column by column)."""
    import pyarrow.compute as pc

    part = tests_part(records)
    level = part.column("level").to_numpy()
    given = part.column("given")
    cols: dict[str, object] = {
        "test_id": np.arange(len(records), dtype=np.int64),
        "phase": list(phases) if phases is not None else np.where(level == 0, "battery", "skeleton").astype(object),
        "level": level,
        "var_a": part.column("x").to_numpy(zero_copy_only=False),
        "var_b": part.column("y").to_numpy(zero_copy_only=False),
        "given": pc.binary_join(given, ";").to_numpy(zero_copy_only=False),
        "given_size": pc.list_value_length(given).to_numpy().astype(np.int64),
    }
    for name in TEST_COLUMNS[7:]:
        cols[name] = part.column(name).to_numpy(zero_copy_only=False)
    return pd.DataFrame(cols, columns=TEST_COLUMNS)


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


def _sparse_matters(results: Sequence, deciding: object, dependent: bool, alpha: float) -> bool:
    """True when a sparse table decided the pair's fate or could have flipped it.

    That is: the deciding test was sparse, or a sparse test's own reading of its p-value (above
    alpha: no evidence of dependence) differs from where the pair ended (``dependent``: every test
    kept it). A sparse test that agreed with the outcome, among many, does not count.
    """
    if deciding is not None and getattr(deciding, "sparse", False):
        return True
    return any(r.sparse and (r.pvalue > alpha) == dependent for r in results)


def evidence_frame(
    skeleton: SkeletonResult,
    knowledge: Knowledge,
    alpha: float,
    orientation: Orientation | None = None,
    stability: dict[tuple[str, str], float] | None = None,
) -> pd.DataFrame:
    """One row per unordered pair of signals (``var_a < var_b`` by name), linked or not."""
    by_pair: dict[tuple[str, str], list[int]] = {}
    for i, rec in enumerate(skeleton.tests):
        r = rec.result
        key = pair_key(r.x, r.y)
        by_pair.setdefault(key, []).append(i)
    rows = []
    for a, b in combinations(sorted(skeleton.names), 2):
        pair = (a, b)
        idx = by_pair.get(pair, [])
        linked = pair in skeleton.edges
        know = ("required" if knowledge.is_required(a, b) else "forbidden" if knowledge.is_forbidden(a, b)
                else "rejected" if knowledge.is_rejected(a, b) else "")
        row: dict[str, object] = {"var_a": a, "var_b": b, "linked": linked, "knowledge": know}
        results = [skeleton.tests[i].result for i in idx]
        if pair in skeleton.removed_by:
            deciding = skeleton.tests[skeleton.removed_by[pair]].result
        elif results:
            deciding = max(results, key=lambda r: r.pvalue)  # first of the largest
        else:
            deciding = None
        marginal = next((r for r in results if not r.given), None)
        row.update(
            pvalue=deciding.pvalue if deciding else np.nan,
            statistic=deciding.statistic if deciding else np.nan,
            dof=deciding.dof if deciding else 0,
            given=";".join(deciding.given) if deciding else "",
            n=deciding.n if deciding else 0,
            level=len(deciding.given) if deciding else -1,
            method=deciding.method if deciding else "",
            n_tests=len(results),
            max_given_size=max((len(r.given) for r in results), default=-1),
            cmi_bits=deciding.cmi_bits if deciding else np.nan,
            cramers_v=marginal.cramers_v if marginal else np.nan,
            sparse=_sparse_matters(results, deciding, linked or pair in skeleton.disagreements, alpha),
            degenerate=any(r.degenerate for r in results),
            policy_applied=any(r.policy_applied for r in results),
            data_disagrees=pair in skeleton.disagreements,
            orientation=orientation.label(a, b) if (orientation is not None and linked) else "",
            stability=(stability or {}).get(pair, np.nan),
            correction=deciding.correction if deciding else "none",  # for the wording only, not a column
        )
        flags = []
        for word in ("sparse", "degenerate", "policy_applied", "data_disagrees"):
            if row[word]:
                flags.append(word)
        if know:
            flags.append("reviewer_rejected" if know == "rejected" else know)
        if row["orientation"] == "ambiguous":
            flags.append("ambiguous_orientation")
        row["flags"] = ";".join(flags)
        row["explanation"] = _explain(row, alpha)
        rows.append(row)
    frame = pd.DataFrame(rows)
    if frame.empty:
        frame = pd.DataFrame(columns=EVIDENCE_COLUMNS)
    # q-values over every pair that was tested (linked or separated), each at its deciding p-value
    tested = frame["pvalue"].notna()
    frame["qvalue"] = np.nan
    if tested.any():
        frame.loc[tested, "qvalue"] = benjamini_hochberg(frame.loc[tested, "pvalue"].to_numpy())
    frame = frame[EVIDENCE_COLUMNS]
    return frame.astype(
        {"linked": "bool", "dof": "int64", "n": "int64", "level": "int64", "n_tests": "int64",
         "max_given_size": "int64", "sparse": "bool", "degenerate": "bool", "policy_applied": "bool",
         "data_disagrees": "bool", "pvalue": "float64", "statistic": "float64", "cmi_bits": "float64",
         "cramers_v": "float64", "qvalue": "float64", "stability": "float64"}
    )


def _residual_words(row: dict[str, object], alpha: float) -> str:
    """The outcome of a pair decided by the numeric test (``gcm``) in plain words: what each signal was
    predicted from, and how much the two still move together after that (the residual correlation)."""
    a, b = row["var_a"], row["var_b"]
    given = str(row["given"])
    past = str(row.get("correction", "none")) != "none"
    bits = float(row["cmi_bits"])  # type: ignore[arg-type]
    r = float(np.sqrt(max(0.0, 1.0 - 2.0 ** (-2.0 * bits)))) if bits == bits else float("nan")
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
