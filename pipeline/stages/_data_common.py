"""Small pieces shared by the ingest, clean and discretise stages (private)."""

from __future__ import annotations

import difflib
import math
import os
from collections.abc import Callable, Iterable, Sequence
from typing import Any

import numpy as np
import pandas as pd

REJECTED_COLUMNS = ["source", "line", "reason", "raw"]

# Spellings of "no value" met in extracts, compared after stripping and lower-casing.
MISSING_WORDS = frozenset(
    {
        "",
        "na",
        "n/a",
        "#n/a",
        "n.a.",
        "nan",
        "-nan",
        "+nan",
        "null",
        "#null!",
        "none",
        "nil",
        "-",
        "?",
        "nat",
        "missing",
        "#value!",
        "#div/0!",
        "#num!",
        "#ref!",
        "#name?",
    }
)
# Spellings of an infinite number; they become missing too (and are counted as non-finite).
INFINITY_WORDS = frozenset(
    {
        "inf",
        "-inf",
        "+inf",
        "infinity",
        "-infinity",
        "+infinity",
        "∞",
        "-∞",
        "+∞",
        "1.#inf",
        "-1.#inf",
        "1.#ind",
        "-1.#ind",
    }
)
TRUE_WORDS = frozenset({"true", "yes", "y", "t"})
FALSE_WORDS = frozenset({"false", "no", "n", "f"})


def map_threads(fn: Callable[[Any], Any], items: Sequence[Any], jobs: int) -> list[Any]:
    """``[fn(item) for item in items]`` on up to `parallel.jobs` threads (-1: every core), in order; the
    first item (in that order) whose call fails raises. For per-column work whose time goes to numpy,
    pandas or Arrow calls that release the interpreter lock (sorts, hash tables, kernels)."""
    width = min((os.cpu_count() or 1) if jobs == -1 else max(1, int(jobs)), len(items))
    if width <= 1:
        return [fn(x) for x in items]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(width, thread_name_prefix="edgeproof-columns") as pool:
        return list(pool.map(fn, items))


def empty_rejected() -> pd.DataFrame:
    """An empty frame with the columns of a rejected / quarantined row list."""
    return pd.DataFrame(
        {
            "source": pd.Series([], dtype=object),
            "line": pd.Series([], dtype="int64"),
            "reason": pd.Series([], dtype=object),
            "raw": pd.Series([], dtype=object),
        }
    )


def rejected_frame(rows: Sequence[tuple[str, int, str, str]]) -> pd.DataFrame:
    """A rejected / quarantined row list from (source, line, reason, raw) tuples."""
    if not rows:
        return empty_rejected()
    src, line, reason, raw = zip(*rows)
    return pd.DataFrame(
        {
            "source": pd.Series(src, dtype=object),
            "line": pd.Series(line, dtype="int64"),
            "reason": pd.Series(reason, dtype=object),
            "raw": pd.Series(raw, dtype=object),
        }
    )


def close_matches(name: str, choices: Iterable[str]) -> str:
    """A ``; close matches: `a`, `b`` suffix (or a list of what exists) for unknown-name messages."""
    pool = [str(c) for c in choices]
    near = difflib.get_close_matches(name, pool, n=3, cutoff=0.6)
    if not near:
        lowered = {c.lower(): c for c in pool}
        near = [lowered[m] for m in difflib.get_close_matches(name.lower(), list(lowered), 3, 0.6)]
    if near:
        return "; close matches: " + ", ".join(f"`{c}`" for c in near)
    shown = ", ".join(f"`{c}`" for c in pool[:12]) + (", ..." if len(pool) > 12 else "")
    return f"; the columns are: {shown}"


def smallest_int_dtype(n_levels: int) -> np.dtype:
    """The smallest signed integer dtype holding codes -1 .. n_levels - 1."""
    for dtype in (np.int8, np.int16, np.int32):
        if n_levels - 1 <= np.iinfo(dtype).max:
            return np.dtype(dtype)
    return np.dtype(np.int64)


def integer_like(values: np.ndarray) -> bool:
    """True when every finite value of a float array is a whole number."""
    head = values[:4096]  # measurements with decimals show it at once: no pass over the whole column
    head = head[np.isfinite(head)]
    if head.size and not np.all(head == np.round(head)):
        return False
    finite = values[np.isfinite(values)]
    return bool(finite.size) and bool(np.all(finite == np.round(finite)))


def format_number(value: float, digits: int = 15) -> str:
    """A short, readable text for a number: ``3`` for 3.0, ``0.25``, ``1.5e+09`` for huge values."""
    if not math.isfinite(value):
        return str(value)
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    text = format(value, f".{digits}g")
    if "e" in text:
        exp = int(text.split("e")[1])
        if -5 < exp < 15:
            text = np.format_float_positional(float(text), trim="-")
    return text


def format_cut_points(points: Sequence[float]) -> list[str]:
    """Cut points as text: about four significant digits on the largest, more where two would merge.

    >>> format_cut_points([86.513, 100.019, 113.538])
    ['86.5', '100', '113.5']
    >>> format_cut_points([120, 250])
    ['120', '250']
    """
    pts = [float(p) for p in points]
    if not pts:
        return []
    if all(p == int(p) and abs(p) < 1e15 for p in pts):
        return [str(int(p)) for p in pts]
    top = max(abs(p) for p in pts)
    if top >= 1e7 or top < 1e-4:
        for digits in range(4, 17):
            texts = [format(p, f".{digits}g") for p in pts]
            if len(set(texts)) == len(texts):
                return texts
        return [repr(p) for p in pts]
    decimals = max(0, 3 - math.floor(math.log10(top)))
    for d in range(decimals, 17):
        texts = [_trim(format(p, f".{d}f")) for p in pts]
        if len(set(texts)) == len(texts):
            return texts
    return [repr(p) for p in pts]


def _trim(text: str) -> str:
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if text in ("-0", "") else text


def source_of_rows(files: Sequence[dict], n_rows: int) -> np.ndarray:
    """The index into `files` of each table row, from the per-file row counts of the ingest summary."""
    counts = [int(f.get("rows", 0)) for f in files]
    if sum(counts) != n_rows or not counts:
        return np.zeros(n_rows, dtype=np.int64)
    return np.repeat(np.arange(len(counts), dtype=np.int64), counts)


def render_rows(table: pd.DataFrame, delimiter: str) -> pd.Series:
    """Each row's values joined by `delimiter` (missing shown empty), built column by column."""
    if table.shape[1] == 0:
        return pd.Series([""] * len(table), index=table.index, dtype=object)
    out: pd.Series | None = None
    for name in table.columns:
        col = table[name].astype(object)
        text = col.where(col.notna(), "").astype(str)
        out = text if out is None else out + delimiter + text
    assert out is not None
    return out.astype(object)
