"""The graph drawing: DOT built with the `graphviz` package, rendered to SVG and PNG by Graphviz.

Every string that comes from the data reaches DOT only through `_html_text` (HTML-like labels) or
`_esc_string` (quoted attribute strings), so a signal name cannot break out of a label. Node IDs are
``s0, s1, ...``, never the names themselves.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import graphviz
import pandas as pd

from ..errors import EdgeproofError
from ._common import compare_truth, direction, edge_classes, fmt_num, fmt_p, given_text, pair_key

__all__ = ["Drawing", "build_graph", "build_truth_graph", "layout_engine", "render", "render_formats"]

_FONT = "Helvetica"
_INSTALL_HINT = "install Graphviz (`apt-get install graphviz`) so that `dot` is on PATH"


def _html_text(text: Any) -> str:
    """Escape text for a Graphviz HTML-like label (quote, <, >, & and apostrophe)."""
    s = str(text)
    return (
        s.replace("&", "&amp;")
        .replace("<", "&lt;")
        .replace(">", "&gt;")
        .replace('"', "&quot;")
        .replace("'", "&#39;")
        .replace("\n", " ")
        .replace("\r", " ")
    )


def _esc_string(text: Any) -> graphviz.quoting.NoHtml:
    """Escape text for a quoted DOT attribute (entities first, then backslash and quote)."""
    s = _html_text(text).replace("\\", "\\\\").replace('"', '\\"')
    return graphviz.nohtml(s)


def _label(text: Any) -> str:
    """An HTML-like label holding `text` verbatim."""
    return f"<{_html_text(text)}>"


def layout_engine(n_nodes: int) -> str:
    """The Graphviz layout for a graph of `n_nodes`: ranked up to 16, spring model beyond."""
    if n_nodes <= 16:
        return "dot"
    return "neato" if n_nodes <= 120 else "sfdp"


def _new_graph(name: str, n_nodes: int) -> graphviz.Digraph:
    engine = layout_engine(n_nodes)
    g = graphviz.Digraph(name=name, engine=engine)
    g.attr(
        layout=engine,
        fontname=_FONT,
        fontsize="11",
        labelloc="b",
        labeljust="l",
        pad="0.3",
        bgcolor="white",
    )
    if engine == "dot":
        g.attr(rankdir="TB", nodesep="0.35", ranksep="0.55")
    else:
        g.attr(overlap="prism", overlap_scaling="2", sep="+10", splines="true", start="7",
               pack="true", outputorder="edgesfirst")
    g.attr("node", shape="box", style="rounded,filled", fillcolor="#f4f4f4", color="#333333",
           fontname=_FONT, fontsize="12", margin="0.12,0.06")
    g.attr("edge", fontname=_FONT, fontsize="9", fontcolor="#333333", arrowsize="0.8")
    return g


def _node_tooltip(name: str, levels: Sequence[str]) -> graphviz.quoting.NoHtml:
    shown = list(levels)[:12]
    more = f" (+{len(levels) - 12} more)" if len(levels) > 12 else ""
    text = f"{name}: " + (" | ".join(map(str, shown)) + more if shown else "no levels recorded")
    return _esc_string(text)


def _add_nodes(g: graphviz.Digraph, names: Sequence[str], levels: Mapping[str, Sequence[str]]) -> dict[str, str]:
    ids = {}
    for i, name in enumerate(names):
        ids[name] = f"s{i}"
        g.node(ids[name], label=_label(name), tooltip=_node_tooltip(name, levels.get(name, [])))
    return ids


def build_graph(
    evidence: pd.DataFrame,
    names: Sequence[str],
    levels: Mapping[str, Sequence[str]],
    alpha: float,
    orient: bool,
) -> graphviz.Digraph:
    """The recovered graph: one node per signal, one edge per linked pair, styled by its evidence."""
    g = _new_graph("edgeproof", len(names))
    ids = _add_nodes(g, names, levels)
    linked = evidence[evidence["linked"].astype(bool)] if len(evidence) else evidence
    cmi = [float(x) for x in linked.get("cmi_bits", pd.Series(dtype=float)) if pd.notna(x)]
    top = max([c for c in cmi if c > 0], default=1.0)
    small = len(names) <= 16
    for _, row in linked.iterrows():
        a, b = str(row["var_a"]), str(row["var_b"])
        classes = edge_classes(row, alpha)
        c = float(row["cmi_bits"]) if pd.notna(row.get("cmi_bits")) else 0.0
        width = 1.0 + 4.0 * math.sqrt(max(c, 0.0) / top)
        style = "dashed" if "weak" in classes else "solid"  # the style shows strength only
        color = "#5a5a5a" if "weak" in classes else "#111111"
        attrs: dict[str, Any] = {"penwidth": f"{width:.2f}", "color": color}
        if "required" in classes:  # two parallel lines; thin enough that the gap shows
            attrs["color"] = f"{color}:invis:{color}"
            attrs["penwidth"] = f"{min(width, 2.0):.2f}"
            if style == "solid":
                style = "bold"
        attrs["style"] = style
        head = direction(row) if (orient or int(row.get("lag") or 0) > 0) else None  # time order is known
        tail, tip = head if head else (a, b)
        attrs["dir"] = "forward" if head else "none"
        orient_text = str(row.get("orientation") or "")
        tip_text = (
            f"{a} \u2014 {b}: linked; weakest evidence p = {fmt_p(row.get('pvalue'))} given "
            f"{given_text(row.get('given'))}; q = {fmt_p(row.get('qvalue'))}; "
            f"effect {fmt_num(row.get('cmi_bits'))} bits"
            + (f"; {orient_text}" if orient_text else "")
            + (f"; flags: {row.get('flags')}" if str(row.get("flags") or "") else "")
        )
        attrs["tooltip"] = _esc_string(tip_text)
        marker = "\u25c7 " if "sparse" in classes else ""  # a sparse table decided it or could flip it
        if small and pd.notna(row.get("cmi_bits")):
            attrs["label"] = _label(f"{marker}{c:.2f} bits")
        elif marker:
            attrs["label"] = _label(marker.strip())
        g.edge(ids[tail], ids[tip], **attrs)
    return g  # the key, drawn with line samples, is on the page (`pipeline.report._html.graph_key`)


def build_truth_graph(
    names: Sequence[str],
    levels: Mapping[str, Sequence[str]],
    truth_edges: Sequence[tuple[str, str]],
    linked_pairs: Sequence[tuple[str, str]],
) -> graphviz.Digraph:
    """The known graph beside the recovered one: recovered solid, missed dashed, extra dotted."""
    all_names = list(names) + [n for e in truth_edges for n in e if n not in names]
    all_names = list(dict.fromkeys(all_names))
    g = _new_graph("known", len(all_names))
    ids = _add_nodes(g, all_names, levels)
    split = compare_truth(linked_pairs, truth_edges)
    recovered = set(split["recovered"])
    for a, b in truth_edges:
        ok = pair_key(a, b) in recovered
        g.edge(
            ids[a], ids[b],
            style="solid" if ok else "dashed",
            color="#111111" if ok else "#777777",
            penwidth="2" if ok else "1.5",
            tooltip=_esc_string(f"{a} -> {b}: " + ("recovered" if ok else "missed")),
        )
    for a, b in split["extra"]:
        g.edge(ids[a], ids[b], style="dotted", dir="none", color="#777777", penwidth="1.5",
               tooltip=_esc_string(f"{a} \u2014 {b}: recovered but not in the known graph"))
    # the key is on the page (`pipeline.report._html._truth_key`)
    return g


class Drawing:
    """One Graphviz process laying a graph out and writing several formats while the caller goes on
    (the layout is the slow part of a report; the page, the exports and the tests it shows are
    prepared meanwhile). `result()` waits and returns format -> bytes; leaving the ``with`` block
    stops a process still running and removes its temporary folder."""

    def __init__(self, graph: graphviz.Digraph, fmts: Sequence[str], what: str | None = None) -> None:
        import subprocess
        import tempfile
        from pathlib import Path

        self.engine, self.fmts, self.what = graph.engine, tuple(fmts), what or "the graph"
        self._tmp = Path(tempfile.mkdtemp(prefix="edgeproof-graph-"))
        source = self._tmp / "graph.gv"
        source.write_text(graph.source, encoding="utf-8")
        self._outs = {f: self._tmp / f"graph.{f}" for f in self.fmts}
        cmd = [self.engine] + [a for f in self.fmts for a in (f"-T{f}", f"-o{self._outs[f]}")] + [str(source)]
        self._stderr = open(self._tmp / "stderr.txt", "wb")  # a file, not a pipe: no pipe can fill and stall
        try:
            self._proc: Any = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                               stderr=self._stderr)
        except FileNotFoundError as err:
            self.close()
            raise EdgeproofError(
                f"Graphviz program `{self.engine}` was not found while drawing {self.what}; {_INSTALL_HINT}."
            ) from err

    def result(self) -> dict[str, bytes]:
        """Wait for the process; format -> bytes, or an EdgeproofError naming Graphviz's first complaint."""
        code = self._proc.wait()
        self._stderr.close()
        if code != 0:
            detail = (self._tmp / "stderr.txt").read_bytes().decode("utf-8", "replace").strip().splitlines()
            first = detail[0] if detail else f"exit status {code}"
            raise EdgeproofError(
                f"Graphviz failed to draw {self.what} as {'/'.join(self.fmts)}: {first}; "
                "check the Graphviz installation (`dot -V`)."
            )
        return {f: self._outs[f].read_bytes() for f in self.fmts}

    def close(self) -> None:
        import shutil

        proc = getattr(self, "_proc", None)
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait()
        self._stderr.close()
        shutil.rmtree(self._tmp, ignore_errors=True)

    def __enter__(self) -> "Drawing":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def render_formats(graph: graphviz.Digraph, fmts: Sequence[str], what: str | None = None) -> dict[str, bytes]:
    """Render `graph` to several formats with one layout: one Graphviz process given one ``-T`` and
    ``-o`` per format (the layout is the slow part; two processes would lay the graph out twice)."""
    with Drawing(graph, fmts, what) as drawing:
        return drawing.result()


def render(graph: graphviz.Digraph, fmt: str, what: str | None = None) -> bytes:
    """Render `graph` to `fmt` bytes with its layout engine; a missing `dot` is an EdgeproofError."""
    try:
        return graph.pipe(format=fmt, engine=graph.engine)
    except graphviz.ExecutableNotFound as err:
        raise EdgeproofError(
            f"Graphviz program `{graph.engine}` was not found while drawing {what or 'the graph'}; "
            f"{_INSTALL_HINT}."
        ) from err
    except graphviz.CalledProcessError as err:
        detail = (err.stderr or b"").decode("utf-8", "replace").strip().splitlines()
        first = detail[0] if detail else str(err)
        raise EdgeproofError(
            f"Graphviz failed to draw {what or 'the graph'} as {fmt}: {first}; "
            "check the Graphviz installation (`dot -V`)."
        ) from err
