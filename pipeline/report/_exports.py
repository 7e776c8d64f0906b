"""File exports for review and for other tools: evidence.csv, GraphML and node-link JSON.

The CSV is meant to be opened in a spreadsheet. A cell that a spreadsheet would run as a formula
(text starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return) gets a leading apostrophe;
a cell that is entirely a number stays as it is. `pipeline.report._review.read_review_file` reads a
reviewed copy back and removes those apostrophes.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import pandas as pd

from ._common import direction, plain

if TYPE_CHECKING:  # networkx loads when a graph file is written
    import networkx as nx

__all__ = [
    "CSV_COLUMNS",
    "build_nx_graph",
    "evidence_csv",
    "graphml_bytes",
    "neutralise",
    "node_link_json",
    "unneutralise",
]

# evidence.parquet column -> readable header in evidence.csv (order of the CSV); the reviewer's
# `verdict` and `comment` columns come right after the pair and the outcome
CSV_COLUMNS: dict[str, str] = {
    "var_a": "signal A",
    "var_b": "signal B",
    "linked": "outcome",
    "orientation": "direction",
    "pvalue": "p-value",
    "near_alpha": "near alpha",
    "qvalue": "q-value (all pairs tested)",
    "given": "conditioning set",
    "level": "conditioning set size",
    "statistic": "statistic",
    "dof": "dof",
    "n": "rows used",
    "method": "test",
    "n_tests": "tests run",
    "max_given_size": "largest set tried",
    "cmi_bits": "effect given the set (CMI bits)",
    "cramers_v": "association ignoring other signals (Cramer's V)",
    "stability": "stability",
    "sparse": "sparse",
    "degenerate": "degenerate",
    "policy_applied": "sparse policy applied",
    "knowledge": "knowledge",
    "data_disagrees": "data disagree",
    "flags": "flags",
    "explanation": "in plain words",
}
_OUTCOME = {True: "linked", False: "separated"}
_LEVEL_HEADERS = ("levels of A", "levels of B")
_REVIEW_HEADERS = ("verdict", "comment")
_DANGEROUS = ("=", "+", "-", "@", "\t", "\r")
_NUMBER = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")
_BOOL_COLUMNS = {"sparse", "degenerate", "policy_applied", "data_disagrees", "near_alpha"}


def neutralise(cell: str) -> str:
    """Prefix an apostrophe to text a spreadsheet would treat as a formula (plain numbers stay)."""
    if not cell:
        return cell
    if cell[0] in _DANGEROUS and not _NUMBER.match(cell):
        return "'" + cell
    if cell[0] == "'":  # keep the round trip exact for text that already starts with one
        return "'" + cell
    return cell


def unneutralise(cell: str) -> str:
    """Undo `neutralise`."""
    if len(cell) >= 2 and cell[0] == "'" and (cell[1] in _DANGEROUS or cell[1] == "'"):
        return cell[1:]
    return cell


def _cell(column: str, value: Any) -> str:
    value = plain(value)
    if value is None:
        return ""
    if column == "linked":
        return _OUTCOME[bool(value)]
    if column in _BOOL_COLUMNS or isinstance(value, bool):
        return "yes" if bool(value) else "no"
    if isinstance(value, float):
        return repr(value) if not value.is_integer() or abs(value) >= 1e16 else str(int(value))
    return str(value)


def evidence_csv(evidence: pd.DataFrame, levels: Mapping[str, Sequence[str]]) -> bytes:
    """The evidence table for spreadsheet review: pair, outcome, then the reviewer's `verdict` and
    `comment` columns, then the numbers.

    `verdict` and `comment` are empty unless an earlier review (columns ``review_verdict`` /
    ``review_comment``) is carried over; the allowed verdict words are ``confirm`` and ``reject``.
    """
    present = [c for c in CSV_COLUMNS if c in evidence.columns]
    head, rest = present[:3], present[3:]
    header = ([CSV_COLUMNS[c] for c in head] + list(_REVIEW_HEADERS) + [CSV_COLUMNS[c] for c in rest]
              + list(_LEVEL_HEADERS))
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\r\n", quoting=csv.QUOTE_MINIMAL)
    writer.writerow([neutralise(h) for h in header])
    n = len(evidence)

    def column(name: str, cell: Any) -> list[str]:
        """One CSV column, each distinct value formatted once."""
        if name not in evidence.columns:
            return [neutralise(cell(None))] * n
        memo: dict[Any, str] = {}
        out = []
        for v in evidence[name].tolist():
            try:
                text = memo.get(v)
                if text is None:
                    text = memo[v] = neutralise(cell(v))
            except TypeError:  # an unhashable value
                text = neutralise(cell(v))
            out.append(text)
        return out

    def levels_of(v: Any) -> str:
        return " | ".join(map(str, levels.get(str(v), [])))

    columns = [column(c, lambda v, c=c: _cell(c, v)) for c in head]
    columns += [column(c, lambda v: str(plain(v)) if plain(v) else "") for c in ("review_verdict", "review_comment")]
    columns += [column(c, lambda v, c=c: _cell(c, v)) for c in rest]
    columns += [column(v, levels_of) for v in ("var_a", "var_b")]
    writer.writerows(zip(*columns))
    return buf.getvalue().encode("utf-8")


def _attr(value: Any) -> Any:
    """A GraphML-compatible attribute value (str, int, float or bool; missing as NaN or '')."""
    value = plain(value)
    if value is None:
        return float("nan")
    if isinstance(value, (bool, int, float, str)):
        return value
    return str(value)


_EDGE_ATTRS = (
    "pvalue", "qvalue", "statistic", "dof", "given", "n", "level", "method", "n_tests", "cmi_bits",
    "cramers_v", "stability", "sparse", "degenerate", "policy_applied", "knowledge",
    "data_disagrees", "orientation", "flags", "explanation",
)


def build_nx_graph(
    evidence: pd.DataFrame, names: Sequence[str], levels: Mapping[str, Sequence[str]]
) -> nx.Graph:
    """The linked pairs as a networkx Graph, evidence on the edges, levels on the nodes."""
    import networkx as nx

    g = nx.Graph()
    for name in names:
        g.add_node(str(name), levels=" | ".join(map(str, levels.get(name, []))))
    linked = evidence[evidence["linked"].astype(bool).to_numpy()] if len(evidence) else evidence
    for _, row in linked.iterrows():  # the linked pairs only: a few among thousands of pairs
        attrs = {k: _attr(row[k]) for k in _EDGE_ATTRS if k in evidence.columns}
        for k in ("orientation", "given", "method", "knowledge", "flags", "explanation"):
            if k in attrs and isinstance(attrs[k], float) and math.isnan(attrs[k]):
                attrs[k] = ""
        head = direction(row)
        attrs["directed"] = head is not None
        attrs["tail"] = head[0] if head else ""
        attrs["head"] = head[1] if head else ""
        g.add_edge(str(row["var_a"]), str(row["var_b"]), **attrs)
    return g


def graphml_bytes(g: nx.Graph) -> bytes:
    """The graph as GraphML."""
    import networkx as nx

    return ("\n".join(nx.generate_graphml(g, prettyprint=True)) + "\n").encode("utf-8")


def _json_safe(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_json_safe(v) for v in obj]
    return plain(obj)


def node_link_json(g: nx.Graph) -> bytes:
    """The graph as node-link JSON (networkx layout, ``edges`` key), NaN written as null."""
    import networkx as nx

    data = _json_safe(nx.node_link_data(g, edges="edges"))
    return (json.dumps(data, indent=2, sort_keys=True, allow_nan=False) + "\n").encode("utf-8")
