"""The history of every link over the last nightly runs: nights present, first and last seen, p-values.

Runs are the successful run folders under the output root (``manifest.json`` with ``status: ok``),
in name order, which for date-named snapshots is time order. An *edge* is a pair linked in at least
one of the runs shown. Per night, a pair is *linked*, *not linked* (with the p-value of the test that
removed it), or *not tested* (a column of the pair was not kept that night).

``history.csv`` has one row per link: ``var_a, var_b, nights_present, nights, first_seen,
last_seen, pattern, changes``, then one ``pvalue_<night>`` and one ``cmi_bits_<night>`` (effect size,
so a link that weakens shows) column per night. ``pattern`` spells the nights with ``L`` linked,
``s`` separated, ``?`` not tested (letters, so a spreadsheet shows them as they are).
``history.html`` shows the same as a link-by-night grid whose cells carry a symbol (filled disc
linked, open circle separated, dash not tested), the p-value and the effect, so it reads in
grey-scale print; a night where the link appeared or disappeared has a thick border and a ``+`` or
``-``.
"""

from __future__ import annotations

import math
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Optional, Sequence, Union

import pandas as pd

from .config import Config
from .errors import EXIT_OK, ConfigError, DataError
from .pairs import pair_key
from .runs import RunFolder, atomic_write_text

__all__ = ["History", "run", "at_root", "edge_history", "write_pages", "history_main"]

_LINKED, _UNLINKED, _UNTESTED = "L", "s", "?"


@dataclass(frozen=True)
class History:
    """The nights shown and one row per edge (columns as in ``history.csv``)."""

    nights: tuple[str, ...]
    table: pd.DataFrame

    def row(self, a: str, b: str) -> Optional[dict]:
        """The row of pair (a, b) in either order, or None when it was never linked."""
        key = pair_key(a, b)
        hit = self.table[(self.table["var_a"] == key[0]) & (self.table["var_b"] == key[1])]
        return None if hit.empty else hit.iloc[0].to_dict()


def run(cfg: Config, config_path: Optional[Path] = None, last: Optional[int] = None) -> History:
    """History of the last `last` successful runs under the configuration's output root.

    Parameters
    ----------
    cfg : Config
        The configuration whose nightly runs are read.
    config_path : Path, optional
        The configuration file, used to find the default output root.
    last : int, optional
        How many of the most recent runs to show; default all.

    Returns
    -------
    History

    Raises
    ------
    DataError
        There is no successful run under the output root yet.
    """
    from .runs import output_root

    return at_root(Path(output_root(cfg, config_path)), last)


def at_root(root: Path, last: Optional[int] = None) -> History:
    """History of the last `last` successful runs under the nightly output root `root` (see `run`)."""
    from .nightly import successful_runs

    if last is not None and last < 1:
        raise ConfigError(f"`--last {last}` must be 1 or more.")
    names = successful_runs(root)
    if last is not None:
        names = names[-last:]
    if not names:
        raise DataError(
            f"No successful run under `{root}` yet; run `edgeproof nightly --config FILE` first."
        )
    evidence, tested = [], {}
    for name in names:
        run_folder = RunFolder(root / name)
        tested[name] = _tested_flips(run_folder.json("changes.json", default=None))
        evidence.append((name, run_folder.table("evidence.parquet",
                                                columns=["var_a", "var_b", "linked", "pvalue", "cmi_bits"])))
    return edge_history(evidence, {k: v for k, v in tested.items() if v is not None})


def _tested_flips(data: Optional[dict]) -> Optional[dict[tuple[str, str], bool]]:
    """Pair -> supported? for the flips of a night's ``changes.json`` (written by nightly); None if absent."""
    if data is None:
        return None
    out = {}
    for key, supported in (("added", True), ("removed", True), ("unconfirmed", False)):
        for item in data.get(key, []) or []:
            a, b = (str(v) for v in item["pair"])
            out[pair_key(a, b)] = supported
    return out


def edge_history(
    runs: Sequence[tuple[str, pd.DataFrame]],
    tested: Optional[dict[str, dict[tuple[str, str], bool]]] = None,
) -> History:
    """History of the links in `runs`, a sequence of (night name, evidence table) in time order.

    `tested` maps a night to its change test's verdict per flipped pair (True: supported). A flip
    the test did not support is written ``?+night`` / ``?-night`` in ``changes``; a flip of a night
    without a change test is written plainly.

    Examples
    --------
    >>> ev = lambda linked, p: pd.DataFrame({"var_a": ["x"], "var_b": ["y"],
    ...                                      "linked": [linked], "pvalue": [p]})
    >>> h = edge_history([("d1", ev(True, 1e-5)), ("d2", ev(False, 0.3)), ("d3", ev(True, 1e-4))])
    >>> r = h.row("x", "y")
    >>> r["pattern"], r["nights_present"], r["first_seen"], r["last_seen"], r["changes"]
    ('LsL', 2, 'd1', 'd3', '-d2; +d3')
    """
    nights = tuple(name for name, _ in runs)
    if len(set(nights)) != len(nights):
        raise DataError(f"Night names repeat in {list(nights)}; every run needs its own name.")
    per_night: list[dict[tuple[str, str], tuple[bool, float, float]]] = []
    for _name, ev in runs:
        cells = {}
        effect = ev["cmi_bits"] if "cmi_bits" in ev.columns else [float("nan")] * len(ev)
        for a, b, linked, p, c in zip(ev["var_a"], ev["var_b"], ev["linked"], ev["pvalue"], effect):
            a, b = str(a), str(b)
            cells[pair_key(a, b)] = (bool(linked), _float(p), _float(c))
        per_night.append(cells)
    edges = sorted({pair for cells in per_night for pair, (linked, _, _) in cells.items() if linked})
    rows = []
    for pair in edges:
        marks, pvalues, effects = [], [], []
        for cells in per_night:
            if pair in cells:
                marks.append(_LINKED if cells[pair][0] else _UNLINKED)
                pvalues.append(cells[pair][1])
                effects.append(cells[pair][2])
            else:
                marks.append(_UNTESTED)
                pvalues.append(float("nan"))
                effects.append(float("nan"))
        present = [n for n, m in zip(nights, marks) if m == _LINKED]
        changes = []
        for i in range(1, len(marks)):
            before, now = marks[i - 1], marks[i]
            if before != now and _UNTESTED not in (before, now):
                doubt = "?" if (tested or {}).get(nights[i], {}).get(pair) is False else ""
                changes.append(doubt + ("+" if now == _LINKED else "-") + nights[i])
        row = {
            "var_a": pair[0], "var_b": pair[1], "nights_present": len(present),
            "nights": len(nights), "first_seen": present[0], "last_seen": present[-1],
            "pattern": "".join(marks), "changes": "; ".join(changes),
        }
        row.update({f"pvalue_{n}": p for n, p in zip(nights, pvalues)})
        row.update({f"cmi_bits_{n}": c for n, c in zip(nights, effects)})
        rows.append(row)
    columns = ["var_a", "var_b", "nights_present", "nights", "first_seen", "last_seen", "pattern",
               "changes"] + [f"pvalue_{n}" for n in nights] + [f"cmi_bits_{n}" for n in nights]
    return History(nights, pd.DataFrame(rows, columns=columns))


def history_main(
    cfg: Config,
    config_path: Optional[Path] = None,
    last: Optional[int] = None,
    out_dir: Optional[Union[str, "os.PathLike[str]"]] = None,
) -> int:
    """Command-line body of ``edgeproof history``: print the table, write history.csv and .html."""
    from .runs import output_root

    hist = run(cfg, config_path, last)
    out = Path(out_dir) if out_dir is not None else Path(output_root(cfg, config_path))
    csv, page = write_pages(hist, out)
    print(_text(hist))
    print(f"Written: {csv}, {page}", file=sys.stderr)
    return EXIT_OK


def write_pages(hist: History, out: Path) -> tuple[Path, Path]:
    """Write ``history.csv`` and ``history.html`` into `out` (atomically); their paths."""
    out.mkdir(parents=True, exist_ok=True)
    csv, page = out / "history.csv", out / "history.html"
    atomic_write_text(csv, hist.table.to_csv(index=False))
    atomic_write_text(page, _html(hist))
    return csv, page


def _float(value: object) -> float:
    """A float, NaN for missing."""
    try:
        return float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return float("nan")


def _fmt(p: float) -> str:
    """A number in three significant digits ('' for NaN)."""
    return "" if not math.isfinite(p) else f"{p:.3g}"


def _fmt_p(p: float) -> str:
    """``= 0.003`` or ``< 1e-12`` ('' for NaN)."""
    from .report._common import p_is

    return "" if not math.isfinite(p) else p_is(p)[2:]


def _text(hist: History) -> str:
    """The plain table printed to standard output."""
    t = hist.table
    if t.empty:
        return f"No links in the {len(hist.nights)} runs shown."
    width = max(len(f"{a} -- {b}") for a, b in zip(t["var_a"], t["var_b"]))
    lines = [
        f"Links over {len(hist.nights)} nights ({hist.nights[0]} .. {hist.nights[-1]}); "
        f"pattern: L linked, s separated, ? not tested",
        f"{'link':<{width}}  {'pattern':<{max(7, len(hist.nights))}}  nights  first       last        changes",
    ]
    for r in t.itertuples(index=False):
        lines.append(
            f"{f'{r.var_a} -- {r.var_b}':<{width}}  {r.pattern:<{max(7, len(hist.nights))}}  "
            f"{r.nights_present:>2}/{r.nights:<3}  {r.first_seen:<10}  {r.last_seen:<10}  {r.changes}"
        )
    return "\n".join(lines)


def _html(hist: History) -> str:
    """Self-contained page: the link-by-night grid and the summary table, every string escaped."""
    from .report._page import e, page_css, terms_list

    t = hist.table
    symbols = {_LINKED: ("\u25cf", "linked"), _UNLINKED: ("\u25cb", "separated"),
               _UNTESTED: ("\u2013", "untested")}
    head = "".join(f"<th>{e(n)}</th>" for n in hist.nights)
    rows = []
    for r in t.to_dict("records"):
        cells = []
        for i, (night, mark) in enumerate(zip(hist.nights, r["pattern"])):
            sym, cls = symbols[mark]
            prev = r["pattern"][i - 1] if i else mark
            flip = prev != mark and _UNTESTED not in (prev, mark)
            doubtful = flip and f"?{'+' if mark == _LINKED else '-'}{night}" in r["changes"].split("; ")
            sign = ("?" if doubtful else "") + ("+" if mark == _LINKED else "\u2212") if flip else ""
            p, c = _fmt_p(r[f"pvalue_{night}"]), _fmt(r.get(f"cmi_bits_{night}", float("nan")))
            title = (f"{r['var_a']} \u2014 {r['var_b']} on {night}: {cls}" + (f", p {p}" if p else "")
                     + (f", effect {c} bits" if c else ""))
            cells.append(
                f"<td class='cell {cls}{(' doubt' if doubtful else ' flip') if flip else ''}' title='{e(title)}'>"
                f"<span class='sym'>{e(sign)}{sym}</span><span class='p'>{e(f'p {p}' if p else '')}</span>"
                f"<span class='p'>{e(f'{c} bits' if c else '')}</span></td>"
            )
        rows.append(
            f"<tr><th scope='row'>{e(r['var_a'])} &mdash; {e(r['var_b'])}</th>{''.join(cells)}"
            f"<td class='num'>{r['nights_present']}/{r['nights']}</td><td>{e(r['first_seen'])}</td>"
            f"<td>{e(r['last_seen'])}</td><td>{e(r['changes'])}</td></tr>"
        )
    title = f"Link history, {hist.nights[0]} to {hist.nights[-1]}" if hist.nights else "Link history"
    terms = terms_list([
        ("\u25cf linked", "the pair was linked that night (shaded cell)."),
        ("\u25cb separated", "a test found no evidence of dependence given a conditioning set that night."),
        ("\u2013 not tested", "a signal of the pair was not kept that night (see that run's cleaning.json)."),
        ("p", "the p-value the night's outcome rests on (< 1e-12 below that)."),
        ("bits", "the effect size: conditional mutual information given the conditioning set, in bits; a "
                 "link whose bits fall night after night is weakening even while it stays linked."),
        ("+ / \u2212, thick border", "the night the link appeared or disappeared and the change test supports it."),
        ("? dotted border", "a flip the change test does not support (most likely chance near alpha)."),
        ("nights", "on how many of the nights shown the pair was linked."),
    ])
    return "".join([
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{e(title)}</title><style>{page_css()}</style></head><body>",
        f"<header class='page'><h1>{e(title)}</h1><p class='sub'>Every pair linked on at least one of "
        f"{len(hist.nights)} nights.</p></header><main>",
        "<h2>What the cells say</h2>", terms,
        f"<table class='grid'><thead><tr><th>link</th>{head}<th>nights</th><th>first seen</th><th>last seen</th>"
        f"<th>changes</th></tr></thead><tbody>{''.join(rows)}</tbody></table>",
        "" if rows else "<p>No links in these runs.</p>",
        "</main></body></html>\n",
    ])
