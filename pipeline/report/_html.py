"""report.html: one self-contained page (inline CSS, JS and SVG) that opens offline.

Every inserted string goes through `html.escape`. The evidence rows are real table rows in the page,
readable with JavaScript off; the page script only re-orders, hides and expands them. The tests of
each pair travel as JSON in a ``<script type="application/json">`` block with ``<``, ``>`` and ``&``
written as ``\\u003c`` etc., and the script places them with ``textContent`` only.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping, Sequence
from importlib import metadata, resources
from typing import Any

import numpy as np
import pandas as pd

from ..pairs import pair_keys
from ._common import fmt_num, fmt_p, given_text, p_is, plain
from ._page import GLOSSARY, LineSample, e, line_key, page_css, terms_list
from ._review import VERDICTS

__all__ = ["build_html", "inline_svg", "json_for_script", "graph_key"]

_PLACEHOLDER = re.compile(r"\{\{([A-Z_]+)\}\}")
_NEAR_MARK = ' <span class="near" title="near alpha: another night may decide the other way">\u2248\u03b1</span>'


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


# --------------------------------------------------------------------------- first screen
def _changes_html(ctx: Any) -> str:
    """"What changed since the previous night": the change test's supported changes, with links."""
    if not getattr(ctx, "show_changes", False) and getattr(ctx, "changes", None) is None:
        return ""
    ch = ctx.changes
    parts = ['<section id="changes"><h2>What changed since the previous night</h2>']
    if not ch:
        parts.append("<p>No previous night to compare with.</p></section>")
        return "".join(parts)

    def items(rows: Sequence[Mapping[str, Any]], sign: str) -> str:
        out = []
        for r in rows:
            what = r.get("signal") or f"{r.get('var_a', '')} \u2014 {r.get('var_b', '')}"
            # `Comparison.summary` names them change_pvalue / change_qvalue (as compare --json does)
            p, q = r.get("change_pvalue", r.get("pvalue")), r.get("change_qvalue", r.get("qvalue"))
            nums = f"change p = {fmt_p(p)}, q = {fmt_p(q)}"
            out.append(f"<li><b>{e(sign)}</b> {e(what)} <span class=\"muted\">({e(nums)})</span></li>")
        return "".join(out)

    added, removed = list(ch.get("added") or []), list(ch.get("removed") or [])
    mech, unconf = list(ch.get("mechanism_changes") or []), list(ch.get("unconfirmed") or [])
    prev = ch.get("previous_run") or "the previous night"
    parts.append(
        f"<p>Compared with <b>{e(prev)}</b>: <b>{len(added)}</b> links added, <b>{len(removed)}</b> "
        f"removed and <b>{len(mech)}</b> signals whose behaviour changed, each supported by the change "
        f"test; <b>{len(unconf)}</b> other differences the change test does not support (chance "
        "flips).</p>"
    )
    if added or removed or mech:
        parts.append('<ul class="changes">' + items(added, "+ added") + items(removed, "\u2212 removed")
                     + items(mech, "~ behaviour changed") + "</ul>")
    else:
        parts.append("<p>Nothing changed that the change test supports.</p>")
    if unconf:
        parts.append('<details><summary>differences not supported by the change test</summary><ul>'
                     + items(unconf, "?") + "</ul></details>")
    links = [(ch.get("diff_href"), "the comparison page"), (ch.get("history_href"), "the history page")]
    shown = [f'<a href="{e(h)}">{e(t)}</a>' for h, t in links if h]
    if shown:
        parts.append("<p>Details: " + " and ".join(shown) + ".</p>")
    parts.append("</section>")
    return "".join(parts)


def _summary_html(ctx: Any, n_signals: int, n_links: int, n_pairs: int) -> str:
    s: Mapping[str, Any] = ctx.summary or {}
    rows = s.get("rows") or {}
    facts = [
        ("links", n_links),
        ("pairs tested", n_pairs),
        ("signals", n_signals),
        ("rows used", rows.get("kept")),
        ("rows read", rows.get("read")),
    ]
    parts = ['<ul class="facts">']
    for label, value in facts:
        shown = "n/a" if plain(value) is None else value
        parts.append(f"<li><b>{e(shown)}</b>{e(label)}</li>")
    parts.append("</ul>")
    if ctx.warnings:
        parts.append('<div class="warnings"><h3>Warnings</h3><ul>')
        parts += [f"<li>{e(w)}</li>" for w in ctx.warnings]
        parts.append("</ul></div>")
    return "\n".join(parts)


# --------------------------------------------------------------------------- end of the page
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


def _details_html(ctx: Any) -> str:
    """Input, dropped columns, settings and timings: the end of the page."""
    s: Mapping[str, Any] = ctx.summary or {}
    source = s.get("input")
    if isinstance(source, Mapping):
        source = source.get("path", "")
    rows = s.get("rows") or {}
    parts = [f"<p>Input: <code>{e(source or 'not recorded')}</code>; rows read {e(rows.get('read', 'n/a'))}, "
             f"kept {e(rows.get('kept', 'n/a'))}, malformed lines rejected {e(rows.get('rejected', 'n/a'))}, "
             f"quarantined {e(rows.get('quarantined', 'n/a'))}.</p>"]
    dropped = _dropped(s)
    parts.append("<h3>Columns left out of the tests</h3>")
    if dropped:
        parts.append("<table><thead><tr><th>column</th><th>why</th></tr></thead><tbody>")
        parts += [f"<tr><td>{e(c)}</td><td>{e(r)}</td></tr>" for c, r in dropped]
        parts.append("</tbody></table>")
    else:
        parts.append("<p>None: every input column was kept.</p>")
    settings: list[tuple[str, str]] = []
    _flatten("", s.get("settings") or {}, settings)
    chosen = (s.get("auto_settings") or {}).get("test.alpha") or {}
    why = f" (chosen by <code>test.alpha: auto</code>: {e(chosen['why'])})" if chosen.get("why") else ""
    parts.append(f"<h3>Settings</h3><p>Tests at alpha = {e(f'{ctx.alpha:g}')}{why}; orientation "
                 f"{'on' if ctx.orient else 'off'}.</p>")
    if settings:
        parts.append("<details><summary>every setting of this run</summary><table><tbody>")
        parts += [f"<tr><td><code>{e(k)}</code></td><td><code>{e(v)}</code></td></tr>" for k, v in settings]
        parts.append("</tbody></table></details>")
    timings = _timings(s)
    if timings:
        parts.append('<h3>Timings</h3><table><thead><tr><th>stage</th><th class="num">seconds</th>'
                     "<th></th></tr></thead><tbody>")
        parts += [f'<tr><td>{e(n)}</td><td class="num">{e(t)}</td><td>{e(r)}</td></tr>' for n, t, r in timings]
        parts.append("</tbody></table>")
    return "\n".join(parts)


# --------------------------------------------------------------------------- graph
def graph_key(alpha: float, orient: bool) -> str:
    """The key of the recovered graph, drawn with real line samples."""
    samples = [
        LineSample(f"linked, q-value \u2264 {alpha:g}", width=2.5),
        LineSample("linked but weak: q-value above alpha, unstable, or data disagree", color="#5a5a5a",
                   width=2, dash="7 4"),
        LineSample("linked by expert knowledge (required or confirmed)", width=1.6, double=True),
        LineSample("\u25c7 on a line: a sparse table decided the outcome or could have flipped it", width=2,
                   marker="\u25c7"),
        LineSample("thicker line: larger effect (CMI bits)", width=5),
    ]
    if orient:
        samples.append(LineSample("arrow: direction the search found", width=2, arrow=True))
    return line_key(samples)


def _truth_key() -> str:
    return line_key([
        LineSample("in the known graph and recovered", width=2.5),
        LineSample("in the known graph, missed", color="#777777", width=1.5, dash="7 4"),
        LineSample("recovered but not in the known graph", color="#777777", width=1.5, dash="2 3"),
    ])


def _pairs_text(pairs: Sequence[tuple[str, str]]) -> str:
    if not pairs:
        return "none"
    return ", ".join(f"{e(a)} \u2014 {e(b)}" for a, b in pairs)


def _graph_html(svg: str, truth_svg: str | None, split: dict[str, list] | None, key: str) -> str:
    recovered = (
        '<figure><div class="svg">' + svg + "</div>" + key + "<figcaption>Recovered graph. Hover a line or "
        "a signal for its numbers.</figcaption></figure>"
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
    known = ('<figure><div class="svg">' + truth_svg + "</div>" + _truth_key()
             + "<figcaption>Known graph (how the data were made).</figcaption></figure>")
    return counts + '<div class="figures">' + recovered + known + "</div>"


def _cautions(alpha: float) -> str:
    return (
        '<div class="caution"><p>A <b>link</b> means: the two signals were statistically dependent '
        f"at alpha = {e(f'{alpha:g}')} under every conditioning set that was tried. A pair is "
        "<b>separated</b> when one test found no evidence of dependence given the conditioning set "
        "shown; their association may run through those signals. No evidence of dependence is not "
        "proof of independence: with few rows a real but weak link can look like none.</p>"
        "<p>Both readings rest on assumptions: no hidden common cause outside the extract drives "
        "two of the signals, dependencies do not cancel out exactly (faithfulness), rows behave "
        "like independent draws, and there are enough rows for each table tested (pairs whose "
        "outcome rests on a sparse table are marked). Discretising a numeric signal into bins can "
        "leave some dependence that the bins do not capture.</p>"
        "<p>A link is not proof that one signal causes the other, and an arrow shows only the "
        "direction the data and these assumptions allow. A missing link is not proof of no "
        "effect. Decisions about production systems follow the team's change and incident "
        "practice; this report is evidence for that discussion.</p></div>"
        "<h3>Words used in this report</h3>" + terms_list(GLOSSARY)
    )


def _time_html(ctx: Any) -> str:
    """The "Time and series" section: how rows were ordered, and how persistent each signal is."""
    doc: Mapping[str, Any] = (ctx.summary or {}).get("time") or {}
    if not doc:
        return ""
    parts = ['<section id="time"><h2>Time and series</h2>']
    if doc.get("timed"):
        series = ", ".join(doc.get("series") or []) or "one series"
        window = f"{float(doc.get('window_seconds') or 0):g}"
        parts.append(
            f"<p>Rows are windows of <strong>{e(series)}</strong> ({e(doc.get('series_how', ''))}), ordered by "
            f"<code>{e(doc.get('time_column'))}</code> ({e(doc.get('time_column_how', ''))}); one window is "
            f"{e(window)} s; {e(doc.get('series_count', 0))} series, "
            f"{e(doc.get('gaps', 0))} gaps (missing windows). Each test compares the two signals' news since "
            "their previous window, given the conditioning set and its previous window, and its p-value allows "
            "for the persistence that is left; nothing is paired across two series or across a gap.</p>")
        if doc.get("lags"):
            parts.append(f"<p>Copies of every signal from 1 to {e(doc['lags'])} windows earlier "
                         "(<code>name@t-1</code> ...) were tested too; links to them read from past to present.</p>")
    else:
        parts.append(f"<p>No time order was used ({e(doc.get('time_column_how', ''))}; "
                     f"<code>time.serial</code> = {e(doc.get('serial', ''))}): the tests treat rows as independent "
                     "draws.</p>")
    for w in doc.get("warnings") or []:
        parts.append(f"<p class='warn'>{e(w)}</p>")
    signals = doc.get("signals") or {}
    if signals:
        parts.append('<table><thead><tr><th>signal</th><th class="num">persistence (lag 1)</th>'
                     '<th class="num">effective rows of its own</th></tr></thead><tbody>')
        for name, v in signals.items():
            parts.append(f'<tr><td>{e(name)}</td><td class="num">{e(v.get("persistence"))}</td>'
                         f'<td class="num">{e(v.get("n_effective"))}</td></tr>')
        parts.append("</tbody></table><p>Persistence: how much a window repeats the one before (0 none, 1 always); "
                     "effective rows: how many independent rows the signal's own variation is worth.</p>")
    parts.append("</section>")
    return "\n".join(parts)


def _signals_html(names: Sequence[str], levels: Mapping[str, Sequence[str]]) -> str:
    parts = [('<table class="levels"><thead><tr><th>signal</th><th class="num">levels</th>'
              "<th>labels</th></tr></thead><tbody>")]
    for name in names:
        labels = list(levels.get(name, []))
        parts.append(
            f'<tr><td>{e(name)}</td><td class="num">{len(labels)}</td>'
            f"<td>{e(' | '.join(map(str, labels)))}</td></tr>"
        )
    parts.append("</tbody></table>")
    return "".join(parts)


# --------------------------------------------------------------------------- evidence table
_MARKERS = {  # flag word -> (marker, what it says)
    "near_alpha": ("\u2248\u03b1", "near alpha: the deciding p-value is close to alpha"),
    "sparse": ("\u25c7", "sparse: a sparse table decided the outcome or could have flipped it"),
    "data_disagrees": ("!", "the data disagree with the expert knowledge or the reviewer"),
    "reviewer_rejected": ("\u2717", "rejected by the reviewer"),
    "required": ("\u2713", "required by expert knowledge or confirmed by the reviewer"),
    "degenerate": ("\u2205", "degenerate table: a signal was constant within the rows tested"),
    "policy_applied": ("\u2691", "the sparse-table policy decided this test, not its p-value"),
    "ambiguous_orientation": ("\u2194", "the direction is ambiguous"),
    "forbidden": ("\u2298", "forbidden by the configuration: never tested"),
}


def _columns(orient: bool, has_stability: bool) -> list[tuple[str, str, str]]:
    cols = [
        ("pair", "pair", "text"),
        ("outcome", "outcome", "text"),
        ("flags", "flags", "text"),
        ("reading", "in plain words", "text"),
        ("p", "p-value", "num"),
        ("q", "q-value (all pairs)", "num"),
        ("cmi", "effect, CMI bits", "num"),
        ("v", "Cram\u00e9r's V, unconditioned", "num"),
        ("given", "conditioning set", "text"),
        ("n_tests", "tests", "num"),
    ]
    if orient:
        cols.append(("direction", "direction", "text"))
    if has_stability:
        cols.append(("stability", "stability", "num"))
    return cols


def _reading(row: Mapping[str, Any], alpha: float) -> str:
    text = str(plain(row.get("explanation")) or "")
    if not text:
        p, given = p_is(row.get("pvalue")), given_text(row.get("given"))
        if bool(row["linked"]):
            text = (f"linked: dependent under each of the {int(row.get('n_tests', 0) or 0)} conditioning sets "
                    f"tried; weakest evidence {p} given {given}.")
        else:
            text = f"separated: no evidence of dependence given {given} ({p} > alpha = {alpha:g})."
    if bool(plain(row.get("near_alpha"))):
        text += " The deciding p-value is near alpha: another night may decide the other way."
    verdict = str(plain(row.get("review_verdict")) or "")
    comment = str(plain(row.get("review_comment")) or "")
    if verdict or comment:
        text += f" Reviewer: {verdict or 'no verdict'}" + (f" ({comment})" if comment else "") + "."
    return text


def _flag_words(row: Mapping[str, Any]) -> list[str]:
    words = [f for f in str(plain(row.get("flags")) or "").split(";") if f]
    if bool(plain(row.get("near_alpha"))) and "near_alpha" not in words:
        words.insert(0, "near_alpha")
    return words


def _flags_cell(words: Sequence[str]) -> str:
    out = []
    for w in words:
        mark, title = _MARKERS.get(w, ("\u2022", w))
        out.append(f'<span class="flag" title="{e(title)}"><span class="mark">{e(mark)}</span> '
                   f'{e(w.replace("_", " "))}</span>')
    return " ".join(out)


def _sort_value(x: Any) -> str:
    x = plain(x)
    return "" if x is None else repr(float(x))


def _row_html(i: int, row: Mapping[str, Any], cols: Sequence[tuple[str, str, str]], alpha: float) -> str:
    a, b = str(row["var_a"]), str(row["var_b"])
    linked = bool(row["linked"])
    words = _flag_words(row)
    outcome = "linked" if linked else "separated"
    near = "near_alpha" in words
    cells = {
        "pair": (f"{e(a)} <span class=\"muted\">\u2014</span> {e(b)}", e(f"{a}\u0000{b}")),
        "outcome": (outcome + (_NEAR_MARK if near else ""), "0" if linked else "1"),
        "flags": (_flags_cell(words), e(";".join(words))),
        "reading": (e(_reading(row, alpha)), ""),
        "p": (e(fmt_p(row.get("pvalue"))), _sort_value(row.get("pvalue"))),
        "q": (e(fmt_p(row.get("qvalue")) if plain(row.get("qvalue")) is not None else ""),
              _sort_value(row.get("qvalue"))),
        "cmi": (e(fmt_num(row.get("cmi_bits"))), _sort_value(row.get("cmi_bits"))),
        "v": (e(fmt_num(row.get("cramers_v"))), _sort_value(row.get("cramers_v"))),
        "given": (e(given_text(row.get("given"))), e(given_text(row.get("given")))),
        "n_tests": (e(fmt_num(row.get("n_tests"))), _sort_value(row.get("n_tests"))),
        "direction": (e(plain(row.get("orientation")) or ""), e(plain(row.get("orientation")) or "")),
        "stability": (e(fmt_num(row.get("stability"))), _sort_value(row.get("stability"))),
    }
    tds = ['<td class="x"></td>']
    for key, _label, kind in cols:
        shown, sort = cells[key]
        cls = f"{key}{' num' if kind == 'num' else ''}"
        tds.append(f'<td class="{cls}" data-v="{sort}">{shown}</td>' if sort else f'<td class="{cls}">{shown}</td>')
    classes = f"pair {outcome}" + (" flagged" if words else "")
    return (f'<tr class="{classes}" data-pair="{i}" data-a="{e(a.lower())}" data-b="{e(b.lower())}">'
            + "".join(tds) + "</tr>")


# The tests of each pair travel as arrays in this field order (one array per test, not one object).
TEST_FIELDS = ("test_id", "level", "given_text", "statistic", "dof", "pvalue", "n", "method", "independent", "notes")
TESTS_PER_PAIR = 12  # report.html carries at most this many tests per pair; tests.parquet holds them all
# the columns of tests.parquet the page's test lists read (`tests_data`): the picks are read with these only
_PAGE_COLUMNS = ("test_id", "phase", "level", "var_a", "var_b", "given", "given_size", "statistic", "dof", "pvalue",
                 "n", "method", "independent", "sparse", "degenerate", "policy", "policy_applied")


def _column(tests: pd.DataFrame, name: str, default: Any) -> pd.Series:
    return tests[name] if name in tests.columns else pd.Series(default, index=tests.index)


def _json_values(values: pd.Series) -> list:
    """Plain JSON values of a column: NaN and NA as null, numpy scalars unwrapped."""
    out = values.astype(object).where(values.notna(), None).tolist()
    return [v.item() if hasattr(v, "item") else v for v in out]


def _shown(pair: np.ndarray, searched: np.ndarray | None, p: np.ndarray | None,
           counts: np.ndarray | None = None) -> np.ndarray:
    """Which tests a pair's list in the page shows (a mask over tests in decision order, `pair` the
    pair's row of each): all of them when the pair has at most `TESTS_PER_PAIR`, else its first test,
    its last test before orientation (`searched`: not an orientation test; a separated pair's deciding
    test), and the ones with the largest p-values (`p`, NaN as lowest; a linked pair's deciding test
    first). `counts`: each pair's tests when these are only some of them (`shown_tests`)."""
    pair = np.asarray(pair, dtype=np.int64)
    if counts is None:
        counts = np.bincount(pair) if pair.size else np.zeros(0, dtype=np.int64)
    keep = counts[pair] <= TESTS_PER_PAIR
    if keep.all():
        return keep
    pos = np.arange(pair.size)
    first = np.zeros(pair.size, dtype=bool)
    first[np.unique(pair, return_index=True)[1]] = True
    s_pos = pos if searched is None else pos[searched]
    last = np.zeros(pair.size, dtype=bool)
    last[s_pos[::-1][np.unique(pair[s_pos][::-1], return_index=True)[1]]] = True
    neg_p = np.zeros(pair.size) if p is None else -np.nan_to_num(np.asarray(p, dtype=np.float64), nan=-1.0)
    order = np.lexsort((pos, neg_p, pair))
    rank = np.empty(pair.size, dtype=np.int64)
    rank[order] = pos - np.searchsorted(pair[order], pair[order], side="left")
    return keep | first | last | (rank < TESTS_PER_PAIR - 2)


def shown_tests(source: Any, evidence: pd.DataFrame, batch_rows: int = 1 << 16) -> pd.DataFrame:
    """The tests the page shows (`_shown`) from tests.parquet (a path or an Arrow table), as a DataFrame
    with each pair's number of tests in ``pair_tests``. The picking columns are read `batch_rows` tests at
    a time, and after each batch only the tests `_shown` picks among those kept so far stay (a test it
    leaves out of some tests of a pair it also leaves out of all of them), so what the report holds
    grows with the pairs, not with the tests."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    if isinstance(source, pa.Table):
        pf, n_rows = None, source.num_rows
        wanted = [c for c in ("var_a", "var_b", "phase", "pvalue") if c in source.column_names]
        batches = source.select(wanted).to_batches(max_chunksize=batch_rows)
    else:
        present = pq.read_schema(source).names
        # pre_buffer off: by default the reader loads every row group's bytes before the first batch
        pf = pq.ParquetFile(source, read_dictionary=[c for c in ("var_a", "var_b", "phase") if c in present],
                            pre_buffer=False)
        wanted = [c for c in ("var_a", "var_b", "phase", "pvalue") if c in present]
        n_rows, batches = pf.metadata.num_rows, pf.iter_batches(batch_size=batch_rows, columns=wanted)
    if n_rows == 0 or len(evidence) == 0:
        return (source.schema if pf is None else pf.schema_arrow).empty_table().to_pandas()
    names = sorted(set(map(str, evidence["var_a"])) | set(map(str, evidence["var_b"])))
    code = {n: i for i, n in enumerate(names)}

    def codes(column: Any) -> np.ndarray:
        enc = column if pa.types.is_dictionary(column.type) else pc.dictionary_encode(column)
        lookup = np.array([code.get(str(v), -1) for v in enc.dictionary.to_pylist()] + [-1], dtype=np.int64)
        return lookup[enc.indices.fill_null(len(lookup) - 1).to_numpy(zero_copy_only=False)]

    k = len(names) + 1
    ea = np.array([code[str(v)] for v in evidence["var_a"]], dtype=np.int64)
    eb = np.array([code[str(v)] for v in evidence["var_b"]], dtype=np.int64)
    rows_of = pd.Series(np.arange(len(evidence)), index=np.minimum(ea, eb) * k + np.maximum(ea, eb))
    rows_of = rows_of[~rows_of.index.duplicated(keep="last")]
    counts = np.zeros(len(evidence), dtype=np.int64)
    # the candidates so far: position in tests.parquet, pair row, searched (not orientation), p-value
    pos, pair = np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    searched: np.ndarray | None = np.zeros(0, dtype=bool) if "phase" in wanted else None
    p: np.ndarray | None = np.zeros(0) if "pvalue" in wanted else None
    start = 0
    for batch in batches:
        a, b = codes(batch.column("var_a")), codes(batch.column("var_b"))
        row = rows_of.reindex(np.minimum(a, b) * k + np.maximum(a, b)).to_numpy(dtype=np.float64, copy=True)
        row[(a < 0) | (b < 0)] = np.nan
        idx = np.flatnonzero(~np.isnan(row))
        new = row[idx].astype(np.int64)
        counts += np.bincount(new, minlength=len(evidence))
        pos, pair = np.concatenate([pos, idx + start]), np.concatenate([pair, new])
        if searched is not None:
            phase = batch.column("phase").cast(pa.string())
            here = ~pc.equal(phase, "orientation").fill_null(False).to_numpy(zero_copy_only=False)[idx]
            searched = np.concatenate([searched, here])
        if p is not None:
            p = np.concatenate([p, batch.column("pvalue").to_numpy(zero_copy_only=False).astype(np.float64)[idx]])
        keep = _shown(pair, searched, p)
        pos, pair = pos[keep], pair[keep]
        searched = None if searched is None else searched[keep]
        p = None if p is None else p[keep]
        start += batch.num_rows
    keep = _shown(pair, searched, p, counts=counts)
    picked, pair = pos[keep], pair[keep]
    if pf is None:
        out = source.select([c for c in source.column_names if c in _PAGE_COLUMNS]).take(picked).to_pandas()
    else:  # the picked rows, one batch of the page's columns at a time
        parts, start = [], 0
        plain = pq.ParquetFile(source, pre_buffer=False)
        for batch in plain.iter_batches(batch_size=batch_rows, columns=[c for c in present if c in _PAGE_COLUMNS]):
            lo, hi = np.searchsorted(picked, [start, start + batch.num_rows])
            if hi > lo:
                parts.append(pa.Table.from_batches([batch]).take(picked[lo:hi] - start))
            start += batch.num_rows
        out = pa.concat_tables(parts).to_pandas() if parts else plain.schema_arrow.empty_table().to_pandas()
    out["pair_tests"] = counts[pair]
    return out


def tests_data(evidence: pd.DataFrame, tests: pd.DataFrame) -> dict[str, Any]:
    """Each pair's tests for the expand buttons, keyed by the pair's row number in `evidence`:
    ``{"fields": TEST_FIELDS, "tests": {row: [[...], ...]}, "counts": {row: tests run}}``.

    At most `TESTS_PER_PAIR` tests per pair (see `_shown`), so the page grows with the pairs and
    not with the tests; ``counts`` says how many the pair had. Built column by column.
    """
    empty: dict[str, Any] = {"fields": list(TEST_FIELDS), "tests": {}, "counts": {}, "limit": TESTS_PER_PAIR}
    if tests is None or len(tests) == 0 or len(evidence) == 0:
        return empty
    lo_e, hi_e = pair_keys(evidence["var_a"], evidence["var_b"])
    index = pd.Series(np.arange(len(evidence)), index=pd.MultiIndex.from_arrays([lo_e, hi_e]))
    index = index[~index.index.duplicated(keep="last")]
    lo, hi = pair_keys(tests["var_a"], tests["var_b"])
    row = index.reindex(pd.MultiIndex.from_arrays([lo, hi])).to_numpy()
    found = ~pd.isna(row)
    t = tests.loc[found].reset_index(drop=True)
    pair = pd.Series(row[found].astype(np.int64))
    if len(t) == 0:
        return empty
    if "pair_tests" in t.columns:  # picked by `shown_tests`: the pair's tests were counted before picking
        counts = pd.Series(t["pair_tests"].to_numpy(), index=pair.to_numpy()).groupby(level=0, sort=False).first()
    else:
        counts = pair.value_counts(sort=False)
    searched = ~_column(t, "phase", "").astype(str).eq("orientation").to_numpy()
    keep = _shown(pair.to_numpy(), searched, pd.to_numeric(_column(t, "pvalue", np.nan), errors="coerce").to_numpy())
    t, pair = t.loc[keep].reset_index(drop=True), pair[keep].reset_index(drop=True)
    given = _column(t, "given", "").fillna("").astype(str)
    notes = pd.Series("", index=t.index)
    for word, text in (("sparse", "sparse table"), ("degenerate", "degenerate table")):
        on = _column(t, word, False).fillna(False).astype(bool)
        notes = notes.where(~on, notes.where(notes.eq(""), notes + "; ") + text)
    applied = _column(t, "policy_applied", False).fillna(False).astype(bool)
    policy = "policy: " + _column(t, "policy", "").fillna("").astype(str)
    notes = notes.where(~applied, notes.where(notes.eq(""), notes + "; ") + policy)
    level = _column(t, "level", np.nan)
    if "level" not in t.columns and "given_size" in t.columns:
        level = t["given_size"]
    columns = {
        "test_id": _json_values(_column(t, "test_id", np.nan)),
        "level": _json_values(level),
        "given_text": ("{" + given.str.split(";").map(lambda g: ", ".join(p for p in g if p)) + "}").tolist(),
        "statistic": _json_values(pd.to_numeric(_column(t, "statistic", np.nan), errors="coerce")),
        "dof": _json_values(_column(t, "dof", np.nan)),
        "pvalue": _json_values(pd.to_numeric(_column(t, "pvalue", np.nan), errors="coerce")),
        "n": _json_values(_column(t, "n", np.nan)),
        "method": _column(t, "method", "").fillna("").astype(str).tolist(),
        "independent": _column(t, "independent", False).fillna(False).astype(bool).tolist(),
        "notes": notes.tolist(),
    }
    out: dict[str, list] = {}
    for i, values in zip(pair.tolist(), zip(*(columns[f] for f in TEST_FIELDS))):
        out.setdefault(str(i), []).append([_finite(v) for v in values])
    return {**empty, "tests": out, "counts": {str(k): int(v) for k, v in counts.items()}}


def _finite(v: Any) -> Any:
    return None if isinstance(v, float) and not math.isfinite(v) else v


def default_order(evidence: pd.DataFrame) -> list[int]:
    """Row numbers in the page's default order: linked pairs first, each group by p-value."""
    p = pd.to_numeric(evidence.get("pvalue", pd.Series(index=evidence.index, dtype=float)), errors="coerce")
    keys = pd.DataFrame({"sep": ~evidence["linked"].astype(bool).to_numpy(), "p": p.fillna(2.0).to_numpy(),
                         "i": range(len(evidence))})
    return keys.sort_values(["sep", "p", "i"], kind="stable")["i"].tolist()


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
    has_stability = "stability" in evidence.columns and evidence["stability"].notna().any()
    cols = _columns(ctx.orient, bool(has_stability))
    # plain Python values once per column (NaN and NA as None), not once per cell in the row builder
    records = evidence.astype(object).where(evidence.notna(), None).to_dict("records")
    rows = "\n".join(_row_html(i, records[i], cols, ctx.alpha) for i in default_order(evidence))
    n_links = int(evidence["linked"].astype(bool).sum()) if len(evidence) else 0
    head = "".join(
        f'<th data-key="{e(k)}" scope="col"{" class=num" if t == "num" else ""}>'
        f'<button type="button">{e(label)}</button></th>'
        for k, label, t in cols
    )
    service = ctx.title or "edgeproof"
    night = getattr(ctx, "night", "") or ""
    title = f"{service} \u2014 night of {night}" if night else service
    subtitle = (f"{n_links} links among {len(names)} signals ({len(evidence)} pairs tested); "
                f"alpha = {ctx.alpha:g}")
    review_words = " or ".join(f"<code>{v}</code>" for v in VERDICTS)
    values = {
        "VERSION": e(_version()),
        "TITLE": e(title),
        "SUBTITLE": e(subtitle),
        "CSS": page_css(),
        "CHANGES": _changes_html(ctx),
        "SUMMARY": _summary_html(ctx, len(names), n_links, len(evidence)),
        "GRAPH": _graph_html(svg, truth_svg, split, graph_key(ctx.alpha, ctx.orient)),
        "CAUTIONS": _cautions(ctx.alpha),
        "SIGNALS": _time_html(ctx) + _signals_html(names, ctx.levels),
        "DETAILS": _details_html(ctx),
        "REVIEW_WORDS": review_words,
        "EVIDENCE_HEAD": head,
        "EVIDENCE_ROWS": rows,
        "N_PAIRS": str(len(evidence)),
        "DATA": json_for_script({"alpha": ctx.alpha, **tests_data(evidence, tests)}),
        "JS": _asset("report.js"),
    }
    return _PLACEHOLDER.sub(lambda m: values[m.group(1)], _asset("template.html"))
