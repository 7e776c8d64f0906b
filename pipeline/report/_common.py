"""Shared helpers of the report: pair keys, number formats, edge classes and the truth comparison."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import pandas as pd

from ..pairs import pair_key

__all__ = [
    "compare_truth",
    "direction",
    "edge_classes",
    "fmt_num",
    "fmt_p",
    "given_text",
    "near_alpha",
    "p_is",
    "pair_key",
    "plain",
    "signal_names",
]


def plain(value: Any) -> Any:
    """A JSON-able Python scalar: numpy types unwrapped, NaN and NA as None."""
    kind = type(value)
    if kind is str or kind is bool or kind is int:  # the common cases first (called per cell)
        return value
    if kind is float:
        return value if math.isfinite(value) else None
    if value is None or value is pd.NA:
        return None
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


P_FLOOR = 1e-12  # smaller p-values are shown as "< 1e-12": the tests' approximations mean no more


def fmt_p(p: Any) -> str:
    """A p-value for reading: three decimals, two significant digits below 0.001, ``< 1e-12`` below that."""
    p = plain(p)
    if p is None:
        return "n/a"
    p = float(p)
    if p < P_FLOOR:
        return f"< {P_FLOOR:.0e}"
    return f"{p:.2g}" if p < 0.001 else f"{p:.3f}"


def p_is(p: Any) -> str:
    """``p = 0.003`` or ``p < 1e-12``: a p-value inside a sentence."""
    text = fmt_p(p)
    return f"p {text}" if text.startswith("<") else f"p = {text}"


def near_alpha(p: Any, alpha: float, factor: float) -> bool:
    """True when ``alpha / factor < p < alpha * factor`` (a decision another night could flip)."""
    p = plain(p)
    return p is not None and factor > 1 and alpha / factor < float(p) < alpha * factor


def fmt_num(x: Any, digits: int = 3) -> str:
    """A number with `digits` significant digits, empty for missing."""
    x = plain(x)
    if x is None:
        return ""
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return str(x)
    return f"{float(x):.{digits}g}"


def given_text(given: Any) -> str:
    """A ``;``-joined conditioning set as ``{a, b}`` (``{}`` when empty)."""
    text = "" if plain(given) is None else str(given)
    return "{" + ", ".join(g for g in text.split(";") if g) + "}"


def _truthy(value: Any) -> bool:
    value = plain(value)
    return bool(value) if value is not None else False


def edge_classes(row: Any, alpha: float) -> list[str]:
    """Drawing classes of a linked pair: any of ``required``, ``sparse``, ``weak`` (else ``strong``).

    The line style shows the strength (``weak`` dashed, ``strong`` solid, ``required`` double);
    ``sparse`` adds a marker on the line and does not change its style.
    """
    out = []
    if str(row.get("knowledge", "") or "") == "required":
        out.append("required")
    if _truthy(row.get("sparse")):
        out.append("sparse")
    q = plain(row.get("qvalue"))
    s = plain(row.get("stability"))
    if (q is not None and float(q) > alpha) or (s is not None and float(s) < 0.5) or _truthy(
        row.get("data_disagrees")
    ):
        out.append("weak")
    return out or ["strong"]


def direction(row: Any) -> tuple[str, str] | None:
    """``(tail, head)`` when the pair's orientation reads ``tail -> head``, else None."""
    text = str(plain(row.get("orientation")) or "")
    a, b = str(row["var_a"]), str(row["var_b"])
    if text == f"{a} -> {b}":
        return (a, b)
    if text == f"{b} -> {a}":
        return (b, a)
    return None


def signal_names(evidence: pd.DataFrame, levels: Mapping[str, Sequence[str]]) -> list[str]:
    """Every signal, in the order of `levels` then first appearance in the evidence."""
    names: list[str] = [str(k) for k in levels]
    seen = set(names)
    for a, b in zip(evidence["var_a"], evidence["var_b"]):
        for name in (str(a), str(b)):
            if name not in seen:
                seen.add(name)
                names.append(name)
    return names


def compare_truth(
    linked: Iterable[tuple[str, str]], truth: Iterable[tuple[str, str]]
) -> dict[str, list[tuple[str, str]]]:
    """Recovered, missed and extra links, comparing unordered pairs."""
    found = {pair_key(a, b) for a, b in linked}
    true = {pair_key(a, b) for a, b in truth}
    return {
        "recovered": sorted(found & true),
        "missed": sorted(true - found),
        "extra": sorted(found - true),
    }
