"""Compare the graphs of two runs: added, removed and kept links, turned edges, evidence drift.

A pair is *added* when it is linked in run B and not in run A, *removed* the other way round, and
*kept* when linked in both. Pairs present in only one run's evidence (a column kept in one run only)
count as not linked in the other. For kept pairs the orientation marks are compared (``a -> b``,
``b -> a`` or undirected, where ``a -- b`` and ``ambiguous`` both mean undirected); when either
run has orientation off (empty ``orientation``), orientation is not compared.

The structural Hamming distance is ``added + removed + orientation changes among kept pairs``: the
number of pairs whose edge marks differ, the definition causal-learn's ``SHD`` computes.

A pair is *near alpha* when the p-value its verdict rests on (the ``pvalue`` column of
``evidence.parquet``: the removing test of a removed pair, the weakest test of a linked pair) lies
within a factor ``search.near_alpha_factor`` of that run's ``test.alpha`` on either side,
``alpha / f < p < alpha * f``, in either run.

Artifacts written to the comparison folder: ``diff.parquet``, ``diff.csv`` (one row per pair
linked in at least one run or near alpha in either), ``diff.dot``, ``diff.svg`` and ``diff.html``.
"""

from __future__ import annotations

import html
import json
import math
import os
import re
import sys
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Optional, Union

import pandas as pd

from .config import Config
from .errors import EXIT_CHANGED, EXIT_OK, ConfigError, DataError

__all__ = ["Comparison", "run", "diff_evidence", "resolve_run", "compare_main", "DIFF_COLUMNS"]

Pair = tuple[str, str]
PathLike = Union[str, "os.PathLike[str]"]

DIFF_COLUMNS = [
    "var_a", "var_b", "change", "linked_a", "linked_b", "orientation_a", "orientation_b",
    "orientation_changed", "pvalue_a", "pvalue_b", "cmi_bits_a", "cmi_bits_b", "given_a", "given_b",
    "near_alpha_a", "near_alpha_b",
]
_UNDIRECTED = "--"


@dataclass(frozen=True)
class Comparison:
    """The difference between run A (before) and run B (after).

    Attributes
    ----------
    run_a, run_b : str
        Names of the two runs (folder names).
    added, removed, kept : tuple of (str, str)
        Linked pairs, each ``(var_a, var_b)`` in the evidence's order, sorted.
    orientation_changes : tuple of dict
        ``{"pair": [a, b], "before": str, "after": str}`` for kept pairs whose marks differ.
    table : pandas.DataFrame
        One row per pair linked in either run or near alpha in either (columns `DIFF_COLUMNS`).
    near_alpha : tuple of dict
        ``{"pair", "pvalue_a", "pvalue_b", "near_in", "linked_a", "linked_b"}``.
    warnings : tuple of str
        Category mismatches and other things the reader should know.
    """

    run_a: str
    run_b: str
    added: tuple[Pair, ...]
    removed: tuple[Pair, ...]
    kept: tuple[Pair, ...]
    orientation_changes: tuple[dict[str, Any], ...]
    table: pd.DataFrame
    near_alpha: tuple[dict[str, Any], ...]
    alpha: tuple[float, float] = (0.05, 0.05)
    near_alpha_factor: tuple[float, float] = (2.0, 2.0)
    warnings: tuple[str, ...] = field(default_factory=tuple)

    @property
    def shd(self) -> int:
        """Structural Hamming distance: added + removed + orientation changes among kept pairs."""
        return len(self.added) + len(self.removed) + len(self.orientation_changes)

    @property
    def changed(self) -> int:
        """Number of links that appeared or disappeared (what ``--fail-on-change`` counts)."""
        return len(self.added) + len(self.removed)

    def to_json(self) -> dict[str, Any]:
        """Plain-data summary (what ``--json`` prints)."""
        kept_rows = self.table[self.table["change"] == "kept"]
        return {
            "run_a": self.run_a,
            "run_b": self.run_b,
            "added": [list(p) for p in self.added],
            "removed": [list(p) for p in self.removed],
            "kept": len(self.kept),
            "orientation_changes": list(self.orientation_changes),
            "shd": self.shd,
            "evidence_change": [
                {
                    "pair": [r.var_a, r.var_b],
                    "pvalue_a": _num(r.pvalue_a),
                    "pvalue_b": _num(r.pvalue_b),
                    "cmi_bits_a": _num(r.cmi_bits_a),
                    "cmi_bits_b": _num(r.cmi_bits_b),
                }
                for r in kept_rows.itertuples(index=False)
            ],
            "near_alpha": list(self.near_alpha),
            "alpha": list(self.alpha),
            "near_alpha_factor": list(self.near_alpha_factor),
            "warnings": list(self.warnings),
        }


# ----------------------------------------------------------------------------- public entry points


def run(
    run_a: PathLike,
    run_b: PathLike,
    *,
    category_mismatch: str = "warn",
    near_alpha_factor: Optional[float] = None,
) -> Comparison:
    """Compare two run folders (A before, B after).

    Parameters
    ----------
    run_a, run_b : path
        Run folders holding ``evidence.parquet``, ``levels.json`` and ``manifest.json``.
    category_mismatch : {"warn", "refuse"}
        What to do when the two runs' ``levels.json`` differ: a warning, or `DataError`.
    near_alpha_factor : float, optional
        Overrides the factor each run's manifest records (``search.near_alpha_factor``).

    Returns
    -------
    Comparison

    Examples
    --------
    >>> run("no/such/run", "no/such/run")
    Traceback (most recent call last):
    ...
    pipeline.errors.DataError: Run folder `no/such/run` has no `evidence.parquet`; give a finished run folder (or `latest` / `previous` with --config).
    """
    if category_mismatch not in ("warn", "refuse"):
        raise ConfigError(
            f"`compare.category_mismatch` = {category_mismatch!r} is not allowed; use warn or refuse."
        )
    a, b = _load(Path(run_a)), _load(Path(run_b))
    warnings = _category_warnings(a, b)
    if warnings and category_mismatch == "refuse":
        raise DataError(warnings[0] + " (compare.category_mismatch = refuse; set it to warn to compare anyway)")
    alpha = (a["alpha"], b["alpha"])
    factor = (
        (near_alpha_factor, near_alpha_factor) if near_alpha_factor else (a["factor"], b["factor"])
    )
    cmp = diff_evidence(
        a["evidence"], b["evidence"], alpha=alpha, near_alpha_factor=factor,
        names=(a["name"], b["name"]),
    )
    if warnings:
        cmp = replace(cmp, warnings=tuple(warnings))
    return cmp


def diff_evidence(
    evidence_a: pd.DataFrame,
    evidence_b: pd.DataFrame,
    *,
    alpha: Union[float, tuple[float, float]] = 0.05,
    near_alpha_factor: Union[float, tuple[float, float]] = 2.0,
    names: tuple[str, str] = ("a", "b"),
) -> Comparison:
    """Compare two evidence tables (columns var_a, var_b, linked, pvalue, cmi_bits, orientation).

    Examples
    --------
    >>> a = pd.DataFrame({"var_a": ["x", "x"], "var_b": ["y", "z"], "linked": [True, False],
    ...                   "pvalue": [1e-9, 0.5], "orientation": ["x -- y", ""]})
    >>> b = a.assign(linked=[False, True], pvalue=[0.4, 1e-6], orientation=["", "x -> z"])
    >>> c = diff_evidence(a, b)
    >>> c.added, c.removed, c.shd
    ((('x', 'z'),), (('x', 'y'),), 2)
    """
    alpha_ab = alpha if isinstance(alpha, tuple) else (alpha, alpha)
    factor_ab = (
        near_alpha_factor if isinstance(near_alpha_factor, tuple)
        else (near_alpha_factor, near_alpha_factor)
    )
    ea, eb = _indexed(evidence_a), _indexed(evidence_b)
    pairs = sorted(set(ea) | set(eb))
    rows = []
    for pair in pairs:
        ra, rb = ea.get(pair, {}), eb.get(pair, {})
        la, lb = bool(ra.get("linked", False)), bool(rb.get("linked", False))
        pa, pb = _float(ra.get("pvalue")), _float(rb.get("pvalue"))
        oa, ob = str(ra.get("orientation", "") or ""), str(rb.get("orientation", "") or "")
        near_a = _near(pa, alpha_ab[0], factor_ab[0])
        near_b = _near(pb, alpha_ab[1], factor_ab[1])
        change = "added" if lb and not la else "removed" if la and not lb else "kept" if la else ""
        turned = change == "kept" and _marks_differ(pair, oa, ob)
        if not change and not (near_a or near_b):
            continue
        rows.append({
            "var_a": pair[0], "var_b": pair[1], "change": change or "unlinked",
            "linked_a": la, "linked_b": lb, "orientation_a": oa, "orientation_b": ob,
            "orientation_changed": turned, "pvalue_a": pa, "pvalue_b": pb,
            "cmi_bits_a": _float(ra.get("cmi_bits")), "cmi_bits_b": _float(rb.get("cmi_bits")),
            "given_a": str(ra.get("given", "") or ""), "given_b": str(rb.get("given", "") or ""),
            "near_alpha_a": near_a, "near_alpha_b": near_b,
        })
    table = pd.DataFrame(rows, columns=DIFF_COLUMNS)
    table = table.astype({
        "var_a": "string", "var_b": "string", "change": "string", "linked_a": bool,
        "linked_b": bool, "orientation_a": "string", "orientation_b": "string",
        "orientation_changed": bool, "pvalue_a": float, "pvalue_b": float, "cmi_bits_a": float,
        "cmi_bits_b": float, "given_a": "string", "given_b": "string", "near_alpha_a": bool,
        "near_alpha_b": bool,
    })
    pick = lambda kind: tuple(  # noqa: E731
        (str(r.var_a), str(r.var_b)) for r in table.itertuples(index=False) if r.change == kind
    )
    turned_rows = table[table["orientation_changed"]]
    near_rows = table[table["near_alpha_a"] | table["near_alpha_b"]]
    return Comparison(
        run_a=names[0],
        run_b=names[1],
        added=pick("added"),
        removed=pick("removed"),
        kept=pick("kept"),
        orientation_changes=tuple(
            {"pair": [str(r.var_a), str(r.var_b)], "before": str(r.orientation_a),
             "after": str(r.orientation_b)}
            for r in turned_rows.itertuples(index=False)
        ),
        table=table,
        near_alpha=tuple(
            {"pair": [str(r.var_a), str(r.var_b)], "pvalue_a": _num(r.pvalue_a),
             "pvalue_b": _num(r.pvalue_b),
             "near_in": [k for k, f in (("a", r.near_alpha_a), ("b", r.near_alpha_b)) if f],
             "linked_a": bool(r.linked_a), "linked_b": bool(r.linked_b)}
            for r in near_rows.itertuples(index=False)
        ),
        alpha=(float(alpha_ab[0]), float(alpha_ab[1])),
        near_alpha_factor=(float(factor_ab[0]), float(factor_ab[1])),
    )


def resolve_run(
    spec: PathLike, cfg: Optional[Config] = None, config_path: Optional[Path] = None
) -> Path:
    """A run folder from a path, or from ``latest`` / ``previous`` / a run name under the output root.

    An existing folder wins; otherwise, with a configuration, ``latest`` and ``previous`` follow the
    nightly pointers and any other plain name is looked up under the output root.
    """
    text = os.fspath(spec)
    path = Path(text)
    if path.is_dir() and text not in ("latest", "previous"):
        return path
    if cfg is None:
        if text in ("latest", "previous"):
            raise ConfigError(
                f"`{text}` needs the configuration whose runs it points into; add --config FILE."
            )
        return path  # `run` reports the missing folder
    from .nightly import read_pointer
    from .runs import output_root

    root = Path(output_root(cfg, config_path))
    if text in ("latest", "previous"):
        name = read_pointer(root, text)
        if name is None:
            raise DataError(
                f"No `{text}` run under `{root}` yet; run `edgeproof nightly` (twice for `previous`)."
            )
        return root / name
    if path.is_dir():
        return path
    if "/" not in text and "\\" not in text and text not in (".", "..") and (root / text).is_dir():
        return root / text
    return path


def compare_main(
    run_a: PathLike,
    run_b: PathLike,
    *,
    cfg: Optional[Config] = None,
    config_path: Optional[Path] = None,
    json_out: bool = False,
    fail_on_change: Optional[int] = None,
    out_dir: Optional[PathLike] = None,
) -> int:
    """Command-line body of ``edgeproof compare``: compare, write artifacts, print, return exit code."""
    if fail_on_change is not None and fail_on_change < 0:
        raise ConfigError(f"`--fail-on-change {fail_on_change}` must be 0 or more.")
    folder_a = resolve_run(run_a, cfg, config_path)
    folder_b = resolve_run(run_b, cfg, config_path)
    mismatch = cfg.compare.category_mismatch if cfg is not None else "warn"
    factor = cfg.search.near_alpha_factor if cfg is not None else None
    cmp = run(folder_a, folder_b, category_mismatch=mismatch, near_alpha_factor=factor)
    if out_dir is None:
        base = Path.cwd()
        if cfg is not None:
            from .runs import output_root

            base = Path(output_root(cfg, config_path))
        out = base / f"compare-{_safe(cmp.run_a)}-{_safe(cmp.run_b)}"
    else:
        out = Path(out_dir)
    written = _write(cmp, out)
    for w in cmp.warnings:
        print(f"edgeproof compare: warning: {w}", file=sys.stderr)
    if json_out:
        print(json.dumps({**cmp.to_json(), "out_dir": str(out)}, indent=2, allow_nan=False))
    else:
        print(_text_summary(cmp))
        print(f"Written: {', '.join(str(p) for p in written)}")
    if fail_on_change is not None and cmp.changed > fail_on_change:
        print(
            f"edgeproof compare: {cmp.changed} links changed, more than --fail-on-change "
            f"{fail_on_change}.",
            file=sys.stderr,
        )
        return EXIT_CHANGED
    return EXIT_OK


# ----------------------------------------------------------------------------- loading


def _load(folder: Path) -> dict[str, Any]:
    """Evidence, levels and the alpha settings of one run folder."""
    ev_path = folder / "evidence.parquet"
    if not ev_path.is_file():
        raise DataError(
            f"Run folder `{folder}` has no `evidence.parquet`; give a finished run folder "
            f"(or `latest` / `previous` with --config)."
        )
    try:
        evidence = pd.read_parquet(ev_path)
    except Exception as err:  # noqa: BLE001 - pyarrow raises several types
        raise DataError(f"`{ev_path}` cannot be read ({type(err).__name__}); re-run that snapshot.") from err
    missing = {"var_a", "var_b", "linked", "pvalue"} - set(evidence.columns)
    if missing:
        raise DataError(f"`{ev_path}` lacks columns {sorted(missing)}; re-run that snapshot.")
    levels = _read_json(folder / "levels.json")
    manifest = _read_json(folder / "manifest.json")
    conf = manifest.get("config", {}) if isinstance(manifest, dict) else {}
    alpha = _float((conf.get("test") or {}).get("alpha"))
    factor = _float((conf.get("search") or {}).get("near_alpha_factor"))
    return {
        "name": folder.resolve().name,
        "evidence": evidence,
        "levels": levels if isinstance(levels, dict) else {},
        "alpha": alpha if math.isfinite(alpha) else 0.05,
        "factor": factor if math.isfinite(factor) else 2.0,
    }


def _read_json(path: Path) -> Any:
    """A JSON file's content, or {} when it is missing or unreadable."""
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def _category_warnings(a: dict[str, Any], b: dict[str, Any]) -> list[str]:
    """One sentence per kind of difference between the two runs' ``levels.json``."""
    la, lb = a["levels"].get("levels", {}) or {}, b["levels"].get("levels", {}) or {}
    if not la and not lb:
        return []
    only_a, only_b = sorted(set(la) - set(lb)), sorted(set(lb) - set(la))
    differ = sorted(c for c in set(la) & set(lb) if list(la[c]) != list(lb[c]))
    out = []
    if differ:
        c = differ[0]
        more = f" and {len(differ) - 1} more" if len(differ) > 1 else ""
        out.append(
            f"Runs `{a['name']}` and `{b['name']}` use different categories for `{c}`{more} "
            f"({_short(la[c])} vs {_short(lb[c])}); links may change because the bins moved. "
            f"Set discretise.reuse_from to the earlier run to compare like with like"
        )
    if only_a or only_b:
        out.append(
            f"Runs `{a['name']}` and `{b['name']}` test different columns (only in A: "
            f"{', '.join(only_a) or '-'}; only in B: {', '.join(only_b) or '-'}); pairs of a missing "
            f"column count as not linked"
        )
    return out


def _indexed(evidence: pd.DataFrame) -> dict[Pair, dict[str, Any]]:
    """Evidence rows keyed by the unordered pair (sorted by name, so both runs agree)."""
    out: dict[Pair, dict[str, Any]] = {}
    for rec in evidence.to_dict("records"):
        a, b = str(rec["var_a"]), str(rec["var_b"])
        out[(a, b) if a <= b else (b, a)] = rec
    return out


def _marks(pair: Pair, orientation: str) -> Optional[str]:
    """``a->b``, ``b->a`` or undirected for a linked pair; None when orientation is off."""
    a, b = pair
    text = orientation.strip()
    if not text:
        return None
    if text == f"{a} -> {b}":
        return "a->b"
    if text == f"{b} -> {a}":
        return "b->a"
    return _UNDIRECTED


def _marks_differ(pair: Pair, before: str, after: str) -> bool:
    """The edge marks changed (only when both runs oriented)."""
    ma, mb = _marks(pair, before), _marks(pair, after)
    return ma is not None and mb is not None and ma != mb


def _near(p: float, alpha: float, factor: float) -> bool:
    """``alpha / factor < p < alpha * factor``."""
    return bool(math.isfinite(p) and alpha / factor < p < alpha * factor)


def _float(value: Any) -> float:
    """A float, NaN for missing."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        return float("nan")
    return out


def _num(value: Any) -> Optional[float]:
    """A JSON-able number: None for NaN."""
    v = _float(value)
    return v if math.isfinite(v) else None


def _short(labels: Any) -> str:
    """A list of labels, cut to the first three."""
    items = [str(x) for x in list(labels)]
    return "[" + ", ".join(items[:3]) + (", ..." if len(items) > 3 else "") + "]"


def _safe(name: str) -> str:
    """A run name usable inside a folder name."""
    return re.sub(r"[^A-Za-z0-9._-]", "_", name).strip(".") or "run"


# ----------------------------------------------------------------------------- writing


def _write(cmp: Comparison, out: Path) -> list[Path]:
    """Write diff.parquet, diff.csv, diff.dot, diff.svg and diff.html into `out`."""
    out.mkdir(parents=True, exist_ok=True)
    written = []
    parquet = out / "diff.parquet"
    _atomic(parquet, lambda p: cmp.table.to_parquet(p, index=False))
    csv = out / "diff.csv"
    _atomic(csv, lambda p: cmp.table.to_csv(p, index=False))
    dot_source = _dot(cmp)
    dot = out / "diff.dot"
    _atomic(dot, lambda p: Path(p).write_text(dot_source, encoding="utf-8"))
    written += [parquet, csv, dot]
    svg_text = _render_svg(dot_source)
    if svg_text is not None:
        svg = out / "diff.svg"
        _atomic(svg, lambda p: Path(p).write_text(svg_text, encoding="utf-8"))
        written.append(svg)
    page = out / "diff.html"
    _atomic(page, lambda p: Path(p).write_text(_html(cmp, svg_text), encoding="utf-8"))
    written.append(page)
    return written


def _atomic(path: Path, write: Any) -> None:
    """Call ``write(tmp)`` and rename the temporary file over `path`."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    write(tmp)
    os.replace(tmp, path)


def _dot(cmp: Comparison) -> str:
    """DOT source: kept solid, added bold with "+ added", removed dashed with "- removed"."""
    import graphviz

    g = graphviz.Digraph("diff", graph_attr={
        "label": f"Links: {cmp.run_a} (before) -> {cmp.run_b} (after)", "labelloc": "t",
        "fontname": "Helvetica", "fontsize": "14", "nodesep": "0.3", "ranksep": "0.45", "pad": "0.2",
    }, node_attr={"shape": "box", "style": "rounded", "fontname": "Helvetica", "fontsize": "14"},
        edge_attr={"fontname": "Helvetica", "fontsize": "12"})
    nodes = sorted(set(cmp.table["var_a"].astype(str)) | set(cmp.table["var_b"].astype(str)))
    ids = {n: f"n{i}" for i, n in enumerate(nodes)}  # plain ids; names only ever appear as labels
    for n in nodes:
        g.node(ids[n], label=graphviz.escape(n))
    for r in cmp.table.itertuples(index=False):
        a, b = ids[str(r.var_a)], ids[str(r.var_b)]
        names = {ids[str(r.var_a)]: str(r.var_a), ids[str(r.var_b)]: str(r.var_b)}
        if r.change == "added":
            head, tail, direction = _direction((a, b), str(r.orientation_b), names)
            g.edge(tail, head, label="+ added", style="bold", penwidth="3", color="#1f4e9c",
                   dir=direction)
        elif r.change == "removed":
            head, tail, direction = _direction((a, b), str(r.orientation_a), names)
            g.edge(tail, head, label="- removed", style="dashed", penwidth="1.5", color="#9c1f1f",
                   dir=direction)
        elif r.change == "kept":
            head, tail, direction = _direction((a, b), str(r.orientation_b), names)
            label = graphviz.escape(f"kept, turned (was {r.orientation_a})") if r.orientation_changed else ""
            g.edge(tail, head, label=label, style="solid", penwidth="1", color="#333333",
                   dir=direction)
    return g.source  # the key, drawn with line samples, is on diff.html (`_KEY`)


def _direction(
    pair: Pair, orientation: str, names: Optional[dict[str, str]] = None
) -> tuple[str, str, str]:
    """(head, tail, dot dir) for the edge between node ids `pair`, from its orientation text."""
    a, b = pair
    names = names or {a: a, b: b}
    marks = _marks((names[a], names[b]), orientation)
    if marks == "a->b":
        return b, a, "forward"
    if marks == "b->a":
        return a, b, "forward"
    return b, a, "none"


def _render_svg(source: str) -> Optional[str]:
    """SVG text from DOT source, or None (with a warning) when Graphviz `dot` is missing."""
    import graphviz

    try:
        return graphviz.Source(source).pipe(format="svg").decode("utf-8")
    except graphviz.ExecutableNotFound:
        print(
            "edgeproof compare: warning: Graphviz `dot` is not installed; diff.svg not drawn "
            "(install the graphviz system package).",
            file=sys.stderr,
        )
        return None


def _text_summary(cmp: Comparison) -> str:
    """The human summary printed without --json."""
    lines = [
        f"Compare {cmp.run_a} (before) with {cmp.run_b} (after): {len(cmp.added)} added, "
        f"{len(cmp.removed)} removed, {len(cmp.kept)} kept, {len(cmp.orientation_changes)} turned; "
        f"structural Hamming distance {cmp.shd}."
    ]
    for p in cmp.added:
        lines.append(f"  + {p[0]} -- {p[1]}")
    for p in cmp.removed:
        lines.append(f"  - {p[0]} -- {p[1]}")
    for o in cmp.orientation_changes:
        lines.append(f"  ~ {o['before']}  now  {o['after']}")
    if cmp.near_alpha:
        lines.append(f"  {len(cmp.near_alpha)} pairs rest on a test near alpha: " + ", ".join(
            f"{n['pair'][0]}--{n['pair'][1]}" for n in cmp.near_alpha[:8]
        ) + (" ..." if len(cmp.near_alpha) > 8 else ""))
    return "\n".join(lines)


_TERMS = (
    ("added", "linked after, not linked before."),
    ("removed", "linked before, separated after."),
    ("kept", "linked on both nights."),
    ("turned", "a kept link whose arrow changed (reversed, or became directed or undirected)."),
    ("structural Hamming distance", "added + removed + turned: how many pairs' lines differ between the two "
                                    "graphs."),
    ("p-value", "the p-value each night's outcome rests on (the test that separated the pair, or a linked "
                "pair's weakest test)."),
    ("effect (CMI bits)", "conditional mutual information given the conditioning set: how strongly the pair "
                          "is linked."),
    ("conditioning set", "the signals held fixed in the deciding test."),
    ("near alpha", "the deciding p-value lies within a factor of alpha on either side: the outcome could "
                   "flip by chance on another night."),
)


def _html(cmp: Comparison, svg: Optional[str]) -> str:
    """A self-contained page: summary, picture, and the tables; every string escaped."""
    from .report._page import LineSample, line_key, page_css, terms_list

    e = html.escape
    fmt = lambda v: "" if not math.isfinite(_float(v)) else f"{_float(v):.3g}"  # noqa: E731
    key = line_key([
        LineSample("kept", color="#333333", width=1.5),
        LineSample("+ added: new in after", color="#1f4e9c", width=4),
        LineSample("\u2212 removed: gone in after", color="#9c1f1f", width=2, dash="7 4"),
    ])

    def table(headers: list[str], rows: list[list[str]]) -> str:
        if not rows:
            return "<p>None.</p>"
        head = "".join(f"<th>{e(h)}</th>" for h in headers)
        body = "".join("<tr>" + "".join(c for c in r) + "</tr>" for r in rows)
        return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"

    td = lambda s: f"<td>{e(str(s))}</td>"  # noqa: E731
    tn = lambda v: f'<td class="num">{e(fmt(v))}</td>'  # noqa: E731
    t = cmp.table
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{e(f'Compare {cmp.run_a} with {cmp.run_b}')}</title><style>{page_css()}</style></head><body>",
        f"<header class='page'><h1>{e(cmp.run_a)} (before) &rarr; {e(cmp.run_b)} (after)</h1>",
        f"<p class='sub'>{len(cmp.added)} added, {len(cmp.removed)} removed, {len(cmp.kept)} kept, "
        f"{len(cmp.orientation_changes)} turned; structural Hamming distance {cmp.shd}.</p></header><main>",
    ]
    for w in cmp.warnings:
        parts.append(f"<p class='warn'>Warning: {e(w)}.</p>")
    if svg is not None:
        start = svg.find("<svg")
        parts.append(f"<figure class='figure'>{svg[start:] if start >= 0 else ''}{key}</figure>")
    parts.append("<h2>Words on this page</h2>" + terms_list(_TERMS))
    changed = t[t["change"].isin(["added", "removed"])]
    parts.append("<h2>Links added (+) and removed (&minus;)</h2>")
    parts.append(table(
        ["", "pair", "p-value before", "p-value after", "effect before (bits)", "effect after (bits)",
         "conditioning set before", "conditioning set after"],
        [[td("+" if r.change == "added" else "\u2212"), td(f"{r.var_a} -- {r.var_b}"),
          tn(r.pvalue_a), tn(r.pvalue_b), tn(r.cmi_bits_a), tn(r.cmi_bits_b), td(r.given_a),
          td(r.given_b)] for r in changed.itertuples(index=False)],
    ))
    parts.append("<h2>Links turned (arrow changed)</h2>")
    parts.append(table(["before", "after"], [[td(o["before"]), td(o["after"])]
                                             for o in cmp.orientation_changes]))
    kept = t[t["change"] == "kept"]
    parts.append("<h2>Evidence for kept links</h2>")
    parts.append(table(
        ["pair", "p-value before", "p-value after", "effect before (bits)", "effect after (bits)"],
        [[td(f"{r.var_a} -- {r.var_b}"), tn(r.pvalue_a), tn(r.pvalue_b), tn(r.cmi_bits_a),
          tn(r.cmi_bits_b)] for r in kept.itertuples(index=False)],
    ))
    f_a, f_b = cmp.near_alpha_factor
    parts.append(
        f"<h2>Outcomes resting on a test near alpha</h2><p>p within a factor {e(f'{f_a:g}')} of "
        f"alpha = {e(f'{cmp.alpha[0]:g}')} (before) / {e(f'{f_b:g}')} of "
        f"{e(f'{cmp.alpha[1]:g}')} (after), on either side.</p>"
    )
    parts.append(table(
        ["pair", "outcome before", "outcome after", "p-value before", "p-value after", "near in"],
        [[td(f"{n['pair'][0]} -- {n['pair'][1]}"), td("linked" if n["linked_a"] else "separated"),
          td("linked" if n["linked_b"] else "separated"), tn(n["pvalue_a"]), tn(n["pvalue_b"]),
          td(", ".join("before" if k == "a" else "after" for k in n["near_in"]))]
         for n in cmp.near_alpha],
    ))
    parts.append("</main></body></html>\n")
    return "".join(parts)
