"""What every edgeproof page shares: the style sheet, escaping, and keys drawn with real line samples.

report.html, diff.html and history.html all take their CSS from `page_css` so the three pages look
alike, and draw their keys with `line_key` (an inline SVG per entry: the line itself, not a word).
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from dataclasses import dataclass
from importlib import resources
from typing import Any

__all__ = ["GLOSSARY", "LineSample", "e", "line_key", "page_css", "terms_list"]


def e(text: Any) -> str:
    """HTML-escape any value (None as empty)."""
    return html.escape("" if text is None else str(text), quote=True)


def page_css() -> str:
    """The style sheet shared by report.html, diff.html and history.html."""
    return resources.files(__package__).joinpath("report.css").read_text(encoding="utf-8")


@dataclass(frozen=True)
class LineSample:
    """One key entry: how the line is drawn and what it means.

    ``dash`` is an SVG ``stroke-dasharray`` ("" for solid); ``double`` draws two parallel lines;
    ``marker`` is a symbol drawn on the middle of the line; ``arrow`` adds an arrow head.
    """

    meaning: str
    color: str = "#111111"
    width: float = 2.0
    dash: str = ""
    double: bool = False
    marker: str = ""
    arrow: bool = False


def _sample_svg(s: LineSample) -> str:
    dash = f' stroke-dasharray="{e(s.dash)}"' if s.dash else ""
    stroke = f'stroke="{e(s.color)}" stroke-width="{s.width:g}"{dash} stroke-linecap="butt"'
    if s.double:
        lines = f'<line x1="2" y1="6" x2="50" y2="6" {stroke}/><line x1="2" y1="12" x2="50" y2="12" {stroke}/>'
    else:
        lines = f'<line x1="2" y1="9" x2="50" y2="9" {stroke}/>'
    if s.arrow:
        lines += f'<path d="M50,9 L42,4 L42,14 Z" fill="{e(s.color)}"/>'
    if s.marker:
        lines += (f'<rect x="19" y="1" width="16" height="16" fill="#fff"/>'
                  f'<text x="27" y="14" text-anchor="middle" font-size="13" fill="{e(s.color)}">{e(s.marker)}</text>')
    return (f'<svg class="sample" width="54" height="18" viewBox="0 0 54 18" role="img" '
            f'aria-label="{e(s.meaning)}">{lines}</svg>')


def line_key(samples: Sequence[LineSample], title: str = "Key") -> str:
    """An HTML key: one row per entry, a drawn line sample beside its meaning."""
    rows = "".join(f"<li>{_sample_svg(s)}<span>{e(s.meaning)}</span></li>" for s in samples)
    return f'<div class="key"><b>{e(title)}</b><ul>{rows}</ul></div>'


def terms_list(terms: Sequence[tuple[str, str]]) -> str:
    """Every term of a page explained in one line each."""
    items = "".join(f"<dt>{e(t)}</dt><dd>{e(d)}</dd>" for t, d in terms)
    return f'<dl class="terms">{items}</dl>'


# One vocabulary for every page, file and the README (the README's glossary says the same).
GLOSSARY: tuple[tuple[str, str], ...] = (
    ("linked", "the two signals were dependent at alpha under every conditioning set tried: a line in the graph."),
    ("separated", "one test found no evidence of dependence given some conditioning set (p above alpha): no line."),
    ("conditioning set", "the signals held fixed in a test; for a separated pair, the set of the test that "
                         "separated it (the separating set), for a linked pair the set of its weakest test."),
    ("p-value", "how surprising the association is if the pair were unrelated given the conditioning set; "
                "below 1e-12 it is shown as < 1e-12."),
    ("q-value", "the p-value adjusted for testing many pairs (Benjamini-Hochberg over every pair tested)."),
    ("near alpha", "the deciding p-value lies within a factor of alpha on either side: another night could "
                   "easily decide the other way."),
    ("effect (CMI bits)", "how much one signal tells about the other once the conditioning set is known "
                          "(conditional mutual information)."),
    ("Cramér's V", "association of the two signals ignoring every other signal (0 none, 1 complete)."),
    ("sparse", "a table with too few rows per cell decided the pair's outcome, or could have flipped it."),
    ("turned", "a link kept from one night to the next whose arrow changed (reversed, or became directed or "
               "undirected)."),
    ("verdict", "the reviewer's word in evidence.csv: confirm (keep the pair linked) or reject (keep it separated)."),
)
