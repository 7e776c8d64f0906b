"""report.html: one self-contained page (inline CSS, JS and SVG) that opens offline.

Server-side, every inserted string goes through `html.escape`. The evidence rows travel as JSON in a
``<script type="application/json">`` block with ``<``, ``>`` and ``&`` written as ``\\u003c`` etc., and
the page script builds the table with ``textContent`` only.
"""

from __future__ import annotations

import html
import json
import re
from collections.abc import Mapping, Sequence
from importlib import metadata, resources
from typing import Any

import pandas as pd

from ._common import fmt_p, given_text, pair_key, plain

__all__ = ["build_html", "inline_svg", "json_for_script"]

_PLACEHOLDER = re.compile(r"\{\{([A-Z_]+)\}\}")


def _e(text: Any) -> str:
    return html.escape("" if text is None else str(text), quote=True)


def _asset(name: str) -> str:
    return resources.files(__package__).joinpath(name).read_text(encoding="utf-8")


def _version() -> str:
    try:
        return metadata.version("edgeproof")
    except metadata.PackageNotFoundError:
        return "unknown"


def json_for_script(data: Any) -> str:
    """JSON safe inside a script element: ``<``, ``>``, ``&`` and line separators as escapes."""
    text = json.dumps(data, ensure_ascii=False, allow_nan=False, sort_keys=False, separators=(",", ":"))
    return (
        text.replace("<", "\\u003c")
        .replace(">", "\\u003e")
        .replace("&", "\\u0026")
        .replace("\u2028", "\\u2028")
        .replace("\u2029", "\\u2029")
    )


def inline_svg(svg: bytes, id_prefix: str = "") -> str:
    """Graphviz SVG without XML prolog, doctype and comments, ids optionally prefixed."""
    text = svg.decode("utf-8")
    text = re.sub(r"<\?xml.*?\?>", "", text, flags=re.DOTALL)
    text = re.sub(r"<!DOCTYPE.*?>", "", text, flags=re.DOTALL)
    text = re.sub(r"<!--.*?-->", "", text, flags=re.DOTALL)
    if id_prefix:
        text = re.sub(r'\bid="', f'id="{id_prefix}', text)
    return text.strip()


# --------------------------------------------------------------------------- summary
def _flatten(prefix: str, value: Any, out: list[tuple[str, str]]) -> None:
    if isinstance(value, Mapping) and value:
        for k, v in value.items():
            _flatten(f"{prefix}.{k}" if prefix else str(k), v, out)
    else:
        out.append((prefix, json.dumps(plain(value), default=str, ensure_ascii=False)
                    if not isinstance(value, str) else value))


def _dropped(summary: Mapping[str, Any]) -> list[tuple[str, str]]:
    raw = summary.get("dropped", summary.get("columns_dropped"))
    if raw is None and isinstance(summary.get("columns"), Mapping):
        raw = summary["columns"].get("dropped")
    if isinstance(raw, Mapping):
        return [(str(k), str(v)) for k, v in raw.items()]
    if isinstance(raw, list):
        return [(str(d.get("column", "")), str(d.get("reason", ""))) for d in raw if isinstance(d, Mapping)]
    return []


def _timings(summary: Mapping[str, Any]) -> list[tuple[str, str, str]]:
    raw = summary.get("timings", summary.get("stages")) or {}
    out = []
    for name, value in raw.items():
        if isinstance(value, Mapping):
            secs, reused = value.get("seconds"), value.get("reused")
        else:
            secs, reused = value, None
        secs_text = f"{float(secs):.2f}" if secs is not None and plain(secs) is not None else ""
        out.append((str(name), secs_text, "reused" if reused else ""))
    return out


def _summary_html(ctx: Any, n_signals: int, n_links: int) -> str:
    s: Mapping[str, Any] = ctx.summary or {}
    source = s.get("input")
    if isinstance(source, Mapping):
        source = source.get("path", "")
    rows = s.get("rows") or {}
    facts = [
        ("rows read", rows.get("read")),
        ("rows kept", rows.get("kept")),
        ("malformed lines rejected", rows.get("rejected")),
        ("rows quarantined", rows.get("quarantined")),
        ("signals tested", n_signals),
        ("links found", n_links),
    ]
    parts = [f"<p>Input: <code>{_e(source or 'not recorded')}</code></p>", '<ul class="facts">']
    for label, value in facts:
        shown = "n/a" if plain(value) is None else value
        parts.append(f"<li><b>{_e(shown)}</b>{_e(label)}</li>")
    parts.append("</ul>")
    if ctx.warnings:
        parts.append('<div class="warnings"><h3>Warnings</h3><ul>')
        parts += [f"<li>{_e(w)}</li>" for w in ctx.warnings]
        parts.append("</ul></div>")
    dropped = _dropped(s)
    parts.append("<h3>Columns left out of the tests</h3>")
    if dropped:
        parts.append("<table><thead><tr><th>column</th><th>why</th></tr></thead><tbody>")
        parts += [f"<tr><td>{_e(c)}</td><td>{_e(r)}</td></tr>" for c, r in dropped]
        parts.append("</tbody></table>")
    else:
        parts.append("<p>None: every input column was kept.</p>")
    settings: list[tuple[str, str]] = []
    _flatten("", s.get("settings") or {}, settings)
    parts.append(f"<h3>Settings</h3><p>Test at alpha = {_e(f'{ctx.alpha:g}')}; orientation "
                 f"{'on' if ctx.orient else 'off'}.</p>")
    if settings:
        parts.append("<details><summary>every setting of this run</summary><table><tbody>")
        parts += [f"<tr><td><code>{_e(k)}</code></td><td><code>{_e(v)}</code></td></tr>" for k, v in settings]
        parts.append("</tbody></table></details>")
    timings = _timings(s)
    if timings:
        parts.append('<h3>Timing</h3><table><thead><tr><th>stage</th><th class="num">seconds</th>'
                     "<th></th></tr></thead><tbody>")
        parts += [f'<tr><td>{_e(n)}</td><td class="num">{_e(t)}</td><td>{_e(r)}</td></tr>'
                  for n, t, r in timings]
        parts.append("</tbody></table>")
    return "\n".join(parts)


# --------------------------------------------------------------------------- graph
def _pairs_text(pairs: Sequence[tuple[str, str]]) -> str:
    if not pairs:
        return "none"
    return ", ".join(f"{_e(a)} \u2014 {_e(b)}" for a, b in pairs)


def _graph_html(svg: str, truth_svg: str | None, split: dict[str, list] | None) -> str:
    recovered = (
        '<figure><div class="svg">' + svg + "</div><figcaption>Recovered graph. Hover an edge or a "
        "signal for its numbers; line styles are explained in the legend.</figcaption></figure>"
    )
    if truth_svg is None or split is None:
        return '<div class="figures">' + recovered + "</div>"
    n_true = len(split["recovered"]) + len(split["missed"])
    counts = (
        f"<p>Against the known graph of this scenario: <b>{len(split['recovered'])}</b> of {n_true} "
        f"true links recovered, <b>{len(split['missed'])}</b> missed, <b>{len(split['extra'])}</b> "
        "extra.</p><ul>"
        f"<li>missed: {_pairs_text(split['missed'])}</li>"
        f"<li>extra: {_pairs_text(split['extra'])}</li></ul>"
    )
    known = (
        '<figure><div class="svg">' + truth_svg + "</div><figcaption>Known graph (how the data were "
        "made). Solid: recovered; dashed: missed; dotted: found but not in the known graph."
        "</figcaption></figure>"
    )
    return counts + '<div class="figures">' + recovered + known + "</div>"


def _cautions(alpha: float) -> str:
    return (
        '<div class="caution"><p>A <b>link</b> means: the two signals were statistically dependent '
        f"at alpha = {_e(f'{alpha:g}')}, and no conditioning set that was tried made them "
        "independent. A <b>separation</b> means one test found them independent given the set "
        "shown, so their association runs through those signals.</p>"
        "<p>Both readings rest on assumptions: no hidden common cause outside the extract drives "
        "two of the signals, dependencies do not cancel out exactly (faithfulness), rows behave "
        "like independent draws, and there are enough rows for each table tested (pairs whose "
        "tables were sparse are flagged). Discretising a numeric signal into bins can leave some "
        "dependence that the bins do not capture.</p>"
        "<p>A link is not proof that one signal causes the other, and an arrow shows only the "
        "direction the data and these assumptions allow. A missing link is not proof of no "
        "effect. Decisions about production systems follow the team's change and incident "
        "practice; this report is evidence for that discussion, not a verdict. q-values adjust "
        "the kept links' p-values for multiple testing (Benjamini-Hochberg).</p></div>"
    )


def _signals_html(names: Sequence[str], levels: Mapping[str, Sequence[str]]) -> str:
    parts = [('<table class="levels"><thead><tr><th>signal</th><th class="num">levels</th>'
              "<th>labels</th></tr></thead><tbody>")]
    for name in names:
        labels = list(levels.get(name, []))
        parts.append(
            f'<tr><td>{_e(name)}</td><td class="num">{len(labels)}</td>'
            f"<td>{_e(' | '.join(map(str, labels)))}</td></tr>"
        )
    parts.append("</tbody></table>")
    return "".join(parts)


# --------------------------------------------------------------------------- evidence data
def _columns(orient: bool, has_stability: bool) -> list[dict[str, str]]:
    cols = [
        ("a", "signal A", "text"),
        ("b", "signal B", "text"),
        ("verdict", "verdict", "text"),
        ("p", "p-value", "p"),
        ("q", "q-value", "p"),
        ("cmi", "effect (CMI bits)", "num"),
        ("v", "Cram\u00e9r's V", "num"),
        ("given", "deciding set", "text"),
        ("n_tests", "tests", "num"),
    ]
    if orient:
        cols.append(("direction", "direction", "text"))
    if has_stability:
        cols.append(("stability", "stability", "num"))
    cols += [("flags", "flags", "text"), ("reading", "in plain words", "text")]
    return [{"key": k, "label": label, "type": t} for k, label, t in cols]


def _reading(row: Mapping[str, Any], alpha: float) -> str:
    text = str(plain(row.get("explanation")) or "")
    if not text:
        p, given = fmt_p(row.get("pvalue")), given_text(row.get("given"))
        if bool(row["linked"]):
            text = (f"linked: no conditioning set among the {int(row.get('n_tests', 0))} tried made "
                    f"them independent; weakest evidence p = {p} given {given}.")
        else:
            text = f"separated: independent given {given} (p = {p} > alpha = {alpha:g})."
    flags = str(plain(row.get("flags")) or "")
    if "sparse" in flags.split(";"):
        text += " Some tables behind this pair were sparse: read it with care."
    verdict = str(plain(row.get("review_verdict")) or "")
    comment = str(plain(row.get("review_comment")) or "")
    if verdict or comment:
        text += f" Reviewer: {verdict or 'no verdict'}" + (f" ({comment})" if comment else "") + "."
    return text


def _test_notes(t: Mapping[str, Any]) -> str:
    notes = []
    if bool(plain(t.get("sparse"))):
        notes.append("sparse table")
    if bool(plain(t.get("degenerate"))):
        notes.append("degenerate table")
    if bool(plain(t.get("policy_applied"))):
        notes.append(f"policy: {plain(t.get('policy'))}")
    return "; ".join(notes)


def evidence_data(evidence: pd.DataFrame, tests: pd.DataFrame, alpha: float, orient: bool) -> dict:
    """The JSON payload of the page: columns, one record per pair, and each pair's tests."""
    has_stability = "stability" in evidence.columns and evidence["stability"].notna().any()
    index: dict[tuple[str, str], int] = {}
    pairs = []
    for i, (_, row) in enumerate(evidence.iterrows()):
        a, b = str(row["var_a"]), str(row["var_b"])
        index[pair_key(a, b)] = i
        linked = bool(row["linked"])
        pairs.append({
            "id": i,
            "a": a,
            "b": b,
            "linked": linked,
            "verdict": "linked" if linked else "separated",
            "p": plain(row.get("pvalue")),
            "q": plain(row.get("qvalue")),
            "cmi": plain(row.get("cmi_bits")),
            "v": plain(row.get("cramers_v")),
            "given": given_text(row.get("given")),
            "n_tests": plain(row.get("n_tests")),
            "direction": str(plain(row.get("orientation")) or ""),
            "stability": plain(row.get("stability")),
            "flags": ", ".join(f for f in str(plain(row.get("flags")) or "").split(";") if f),
            "reading": _reading(row, alpha),
        })
    by_pair: dict[str, list[dict]] = {}
    for _, t in tests.iterrows():
        key = pair_key(str(t["var_a"]), str(t["var_b"]))
        if key not in index:
            continue
        by_pair.setdefault(str(index[key]), []).append({
            "test_id": plain(t.get("test_id")),
            "level": plain(t.get("level", t.get("given_size"))),
            "given_text": given_text(t.get("given")),
            "statistic": plain(t.get("statistic")),
            "dof": plain(t.get("dof")),
            "pvalue": plain(t.get("pvalue")),
            "n": plain(t.get("n")),
            "method": str(plain(t.get("method")) or ""),
            "independent": bool(plain(t.get("independent"))),
            "notes": _test_notes(t),
        })
    return {"alpha": alpha, "columns": _columns(orient, bool(has_stability)), "pairs": pairs,
            "tests": by_pair}


def build_html(
    ctx: Any,
    evidence: pd.DataFrame,
    tests: pd.DataFrame,
    names: Sequence[str],
    svg: str,
    truth_svg: str | None = None,
    split: dict[str, list] | None = None,
) -> str:
    """The whole page as a string."""
    payload = evidence_data(evidence, tests, ctx.alpha, ctx.orient)
    n_links = sum(1 for p in payload["pairs"] if p["linked"])
    head = "".join(
        f'<th data-key="{_e(c["key"])}"{" class=num" if c["type"] != "text" else ""}>'
        f'<button type="button">{_e(c["label"])}</button></th>'
        for c in payload["columns"]
    )
    subtitle = (f"{len(names)} signals, {len(payload['pairs'])} pairs, {n_links} links; "
                f"alpha = {ctx.alpha:g}")
    values = {
        "VERSION": _e(_version()),
        "TITLE": _e(ctx.title),
        "SUBTITLE": _e(subtitle),
        "CSS": _asset("report.css"),
        "SUMMARY": _summary_html(ctx, len(names), n_links),
        "GRAPH": _graph_html(svg, truth_svg, split),
        "CAUTIONS": _cautions(ctx.alpha),
        "SIGNALS": _signals_html(names, ctx.levels),
        "EVIDENCE_HEAD": head,
        "DATA": json_for_script(payload),
        "JS": _asset("report.js"),
    }
    return _PLACEHOLDER.sub(lambda m: values[m.group(1)], _asset("template.html"))
