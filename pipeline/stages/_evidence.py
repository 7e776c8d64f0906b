"""Tables of the search: every test run, and one evidence row per pair of signals."""

from __future__ import annotations

from itertools import combinations
from typing import Sequence

import numpy as np
import pandas as pd

from ..report._common import p_is
from ..search.knowledge import Knowledge
from ..search.orient import Orientation
from ..search.skeleton import SkeletonResult, TestRecord

__all__ = ["tests_frame", "evidence_frame", "benjamini_hochberg", "EVIDENCE_COLUMNS", "TEST_COLUMNS"]

TEST_COLUMNS = [
    "test_id", "phase", "level", "var_a", "var_b", "given", "given_size", "statistic", "dof",
    "pvalue", "n", "method", "cmi_bits", "sparse", "degenerate", "independent", "policy",
    "policy_applied", "permutations",
]

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


def tests_frame(records: Sequence[TestRecord], phases: Sequence[str] | None = None) -> pd.DataFrame:
    """One row per test, in the order the tests were decided."""
    rows = []
    for i, rec in enumerate(records):
        r = rec.result
        rows.append(
            {
                "test_id": i,
                "phase": phases[i] if phases is not None else ("battery" if rec.level == 0 else "skeleton"),
                "level": rec.level,
                "var_a": r.x,
                "var_b": r.y,
                "given": ";".join(r.given),
                "given_size": len(r.given),
                "statistic": r.statistic,
                "dof": r.dof,
                "pvalue": r.pvalue,
                "n": r.n,
                "method": r.method,
                "cmi_bits": r.cmi_bits,
                "sparse": r.sparse,
                "degenerate": r.degenerate,
                "independent": r.independent,
                "policy": r.policy,
                "policy_applied": r.policy_applied,
                "permutations": r.permutations,
            }
        )
    frame = pd.DataFrame(rows, columns=TEST_COLUMNS)
    return frame.astype(
        {
            "test_id": "int64", "level": "int64", "given_size": "int64", "dof": "int64", "n": "int64",
            "permutations": "int64", "sparse": "bool", "degenerate": "bool", "independent": "bool",
            "policy_applied": "bool", "statistic": "float64", "pvalue": "float64", "cmi_bits": "float64",
        }
    )


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
        key = (r.x, r.y) if r.x <= r.y else (r.y, r.x)
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


def _explain(row: dict[str, object], alpha: float) -> str:
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
