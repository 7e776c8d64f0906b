"""Report stage: the graph (DOT, SVG, PNG), the HTML report and the review and exchange files.

Every file is written under a temporary name and renamed into place, so a crash never leaves a half
file under its final name. The drawing and page building live in the private `pipeline.report`
package.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import pandas as pd

from ..errors import DataError
from ..report import _exports, _graph, _html
from ..report._common import compare_truth, near_alpha, pair_key, signal_names
from ..runs import atomic_write_bytes, atomic_write_text

__all__ = ["ReportContext", "render_report_html", "run", "summary_of"]

_NEEDED = ("var_a", "var_b", "linked")


@dataclass(frozen=True)
class ReportContext:
    """What the report says beside the evidence.

    Attributes
    ----------
    title : str
        The service the run is about (``report.title``, else the configuration's ``name``).
    night : str
        The night (snapshot name) the run stands for; the page title reads "<title> — night of <night>".
    summary : dict
        ``{"input": path, "rows": {"read", "kept", "rejected", "quarantined"}, "dropped" (or
        "columns_dropped"): {column: reason}, "settings": {...}, "timings": {stage: seconds or
        {"seconds", "reused"}}, "time": {...}, "auto_settings": {...}}`` (`summary_of` reads it from a
        manifest); the manifest's ``columns.dropped`` and ``stages`` are accepted.
    levels : dict
        Signal -> level labels (code order).
    alpha : float
        Significance level of the tests.
    orient : bool
        Whether the search oriented edges (arrows are drawn only then).
    truth_edges : list of (str, str) or None
        A known true graph (the demo); the report then shows it beside the recovered one.
    review : dict or None
        Reviewer verdicts per pair, ``{(a, b) or "a|b": {"verdict": ..., "comment": ...}}``; shown
        in the table and carried into the ``verdict`` / ``comment`` columns of evidence.csv.
    warnings : list of str
        Lines shown at the top of the summary.
    png : bool
        Also write ``graph.png``.
    near_alpha_factor : float
        A pair whose deciding p-value lies within this factor of alpha (either side) is marked.
    changes : dict or None
        What changed since the previous night, from the change test: ``previous_run`` (str),
        ``added``, ``removed``, ``unconfirmed``, ``mechanism_changes`` (lists of dicts with
        ``var_a``/``var_b`` or ``signal``, ``pvalue``, ``qvalue``), ``diff_href``, ``history_href``.
    show_changes : bool
        Show the "What changed since the previous night" section even when `changes` is None
        (it then says there is no previous night to compare with); off for ad-hoc runs.
    """

    title: str = "edgeproof run"
    night: str = ""
    summary: dict[str, Any] = field(default_factory=dict)
    levels: dict[str, list[str]] = field(default_factory=dict)
    alpha: float = 0.05
    orient: bool = False
    truth_edges: list[tuple[str, str]] | None = None
    review: dict[Any, dict[str, str]] | None = None
    warnings: list[str] = field(default_factory=list)
    png: bool = True
    near_alpha_factor: float = 2.0
    changes: dict[str, Any] | None = None
    show_changes: bool = False


def _with_review(evidence: pd.DataFrame, review: dict[Any, dict[str, str]] | None) -> pd.DataFrame:
    """Add the reviewer's verdict and comment per pair (columns ``review_verdict``, ``review_comment``)."""
    if not review:
        return evidence
    lookup: dict[tuple[str, str], dict[str, str]] = {}
    for key, entry in review.items():
        a, b = key if isinstance(key, tuple) else (str(key).split("|", 1) + [""])[:2]
        lookup[pair_key(str(a), str(b))] = entry or {}
    out = evidence.copy()
    found = [lookup.get(pair_key(str(a), str(b)), {}) for a, b in zip(out["var_a"], out["var_b"])]
    out["review_verdict"] = [str(e.get("verdict", "") or "") for e in found]
    out["review_comment"] = [str(e.get("comment", "") or "") for e in found]
    return out


def run(evidence: pd.DataFrame, tests: Any, context: ReportContext, out_dir: Path) -> dict[str, Path]:
    """Write the report files of one run into `out_dir`.

    Parameters
    ----------
    evidence : pandas.DataFrame
        One row per unordered pair (the ``evidence.parquet`` columns).
    tests : pandas.DataFrame, pyarrow.Table or the path of tests.parquet
        Every test run (the ``tests.parquet`` columns); from a path or an Arrow table only the tests the
        page shows become a frame.
    context : ReportContext
        Title, run summary, level labels and options.
    out_dir : Path
        The run folder.

    Returns
    -------
    dict
        File name -> path of every file written: ``evidence.csv``, ``graph.dot``, ``graph.svg``,
        ``graph.png`` (unless ``context.png`` is False), ``graph.graphml``, ``graph.json`` and
        ``report.html``.

    Examples
    --------
    >>> import tempfile, pandas as pd
    >>> ev = pd.DataFrame({"var_a": ["x"], "var_b": ["y"], "linked": [True], "pvalue": [0.001],
    ...                    "cmi_bits": [0.2], "given": [""], "n_tests": [1]})
    >>> files = run(ev, ev.iloc[:0], ReportContext(levels={"x": ["0", "1"], "y": ["a", "b"]},
    ...             png=False), Path(tempfile.mkdtemp()))
    >>> sorted(files)[:3]
    ['evidence.csv', 'graph.dot', 'graph.graphml']
    """
    missing = [c for c in _NEEDED if c not in evidence.columns]
    if missing:
        raise DataError(f"Evidence table lacks column(s) {', '.join(missing)}; pass the skeleton stage's evidence.")
    out = Path(out_dir)
    ev = _prepared(evidence, context)
    names = signal_names(ev, context.levels)
    graph = _graph.build_graph(ev, names, context.levels, context.alpha, context.orient)
    # Graphviz lays the graph out in its own process while the exports and the page's tests are prepared
    with _graph.Drawing(graph, ("svg", "png") if context.png else ("svg",), "graph.svg and graph.png") as drawing:
        csv = _exports.evidence_csv(ev, context.levels)
        nxg = _exports.build_nx_graph(ev, names, context.levels)
        graphml, node_link = _exports.graphml_bytes(nxg), _exports.node_link_json(nxg)
        page = _page(ev, tests, context, names)  # the drawing goes in once Graphviz has made it
        drawn = drawing.result()
    svg = drawn["svg"]
    files = {
        "graph.dot": atomic_write_text(out / "graph.dot", graph.source),
        "graph.svg": atomic_write_bytes(out / "graph.svg", svg),
    }
    if context.png:
        files["graph.png"] = atomic_write_bytes(out / "graph.png", drawn["png"])
    files["evidence.csv"] = atomic_write_bytes(out / "evidence.csv", csv)
    files["graph.graphml"] = atomic_write_bytes(out / "graph.graphml", graphml)
    files["graph.json"] = atomic_write_bytes(out / "graph.json", node_link)
    files["report.html"] = atomic_write_text(out / "report.html", page.replace(_DRAWING, _html.inline_svg(svg), 1))
    return files


def _prepared(evidence: pd.DataFrame, context: ReportContext) -> pd.DataFrame:
    """The evidence with the reviewer's columns and the near-alpha mark added."""
    ev = _with_review(evidence.reset_index(drop=True), context.review)
    if "pvalue" in ev.columns:
        ev["near_alpha"] = [near_alpha(p, context.alpha, context.near_alpha_factor) for p in ev["pvalue"]]
    return ev


_DRAWING = "\x00edgeproof: the drawn graph\x00"  # where the page's drawing goes (no page text holds a NUL)


def _page(ev: pd.DataFrame, tests: Any, context: ReportContext, names: list[str]) -> str:
    """report.html with `_DRAWING` where the drawn graph goes (built while Graphviz draws it)."""
    truth_svg, split = None, None
    if context.truth_edges is not None:
        linked = [(str(a), str(b)) for a, b, k in zip(ev["var_a"], ev["var_b"], ev["linked"]) if bool(k)]
        split = compare_truth(linked, context.truth_edges)
        known = _graph.build_truth_graph(names, context.levels, context.truth_edges, linked)
        truth_svg = _html.inline_svg(_graph.render(known, "svg", "the known graph"), "known-")
    if not isinstance(tests, pd.DataFrame):  # tests.parquet (a path or an Arrow table): pick the shown tests first
        tests = _html.shown_tests(tests, ev)
    page = _html.build_html(context, ev, tests, names, _DRAWING, truth_svg, split)
    if page.count(_DRAWING) != 1:
        raise RuntimeError("report.html: the page has no single place for the drawn graph")
    return page


def summary_of(manifest: Mapping[str, Any]) -> dict[str, Any]:
    """The page's run summary (`ReportContext.summary`) from a run's manifest: one reading, for the run
    that writes the page and for a page rendered again from the run folder."""
    cfg = manifest.get("config") or {}
    return {
        "input": (manifest.get("input") or {}).get("path"), "rows": manifest.get("rows") or {},
        "columns_dropped": (manifest.get("columns") or {}).get("dropped") or {},
        "settings": {k: cfg.get(k) or {} for k in ("test", "search", "discretise")},
        "timings": manifest.get("stages") or {},
        "time": manifest.get("time") or {},
        "auto_settings": manifest.get("auto_settings") or {},
    }


def context_from_run(run_dir: Path, changes: dict[str, Any] | None = None) -> ReportContext:
    """The report context of a finished run folder, read back from its manifest and levels."""
    d = Path(run_dir)
    manifest = json.loads((d / "manifest.json").read_text(encoding="utf-8"))
    levels = json.loads((d / "levels.json").read_text(encoding="utf-8")).get("levels", {})
    tested = set((manifest.get("columns") or {}).get("tested") or levels)
    levels = {k: v for k, v in levels.items() if k in tested}  # series columns are not drawn
    cfg = manifest.get("config") or {}
    section = lambda name: cfg.get(name) or {}  # noqa: E731
    truth = None
    truth_file = section("report").get("truth_file")
    if truth_file and Path(truth_file).is_file():
        edges = json.loads(Path(truth_file).read_text(encoding="utf-8")).get("edges", [])
        if isinstance(edges, dict):  # per snapshot
            edges = edges.get(manifest.get("night", "")) or next(iter(edges.values()), [])
        truth = [(str(a), str(b)) for a, b in edges]
    return ReportContext(
        title=section("report").get("title") or cfg.get("name") or "edgeproof run",
        night=str(manifest.get("night") or d.resolve().name),
        summary=summary_of(manifest),
        levels=levels,
        alpha=float(section("test").get("alpha", 0.05)),
        orient=bool(section("search").get("orient", False)),
        truth_edges=truth,
        review={(c["var_a"], c["var_b"]): c for c in manifest.get("review") or []} or None,
        warnings=list(manifest.get("warnings") or []),
        near_alpha_factor=float(section("search").get("near_alpha_factor", 2.0)),
        changes=changes,
        show_changes=True,
    )


def render_report_html(run_dir: Path, changes: dict[str, Any] | None) -> Path:
    """Re-render report.html of a finished run folder from its files, with what changed since the
    previous night (`changes`, see `ReportContext`; None: "no previous night to compare with").

    The graph drawing (graph.svg) is reused as it is; the page is replaced atomically.
    """
    d = Path(run_dir)
    context = context_from_run(d, changes)
    ev = _prepared(pd.read_parquet(d / "evidence.parquet"), context)
    tests = d / "tests.parquet"  # the page's picks are read from it column by column
    names = signal_names(ev, context.levels)
    page = _page(ev, tests, context, names).replace(_DRAWING, _html.inline_svg((d / "graph.svg").read_bytes()), 1)
    return atomic_write_text(d / "report.html", page)
