"""Level lists, bin cut points and labels behind the discretise stage (private).

Binned columns are described by their cut points ``c_1 < ... < c_m``: bin 0 holds ``x < c_1``,
bin ``i`` holds ``c_i <= x < c_(i+1)`` and the last bin holds ``x >= c_m``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import pairwise
from typing import Any

import numpy as np
import pandas as pd

from ..config import ColumnSpec, DiscretiseSettings
from ..errors import ConfigError, DataError, LimitError
from ._data_common import format_cut_points, format_number, integer_like

MISSING_LEVEL = "(missing)"
OTHER_LEVEL = "(other)"


@dataclass
class Coded:
    """One column as codes (working record): -1 marks missing or unknown values."""

    codes: np.ndarray
    levels: list[str]
    edges: list[float] | None
    method: str
    facts: dict[str, Any] = field(default_factory=dict)


# ----------------------------------------------------------------------------- fresh levels


def fresh(
    name: str,
    values: pd.Series,
    kind: str,
    spec: ColumnSpec | None,
    settings: DiscretiseSettings,
    max_levels: int,
    order_hint: list[str] | None,
) -> Coded:
    """Codes and labels for a column seen for the first time."""
    method = spec.discretise if spec is not None and spec.discretise else None
    if method is None and spec is not None and spec.edges is not None:
        method = "fixed"
    if kind == "boolean":
        _refuse_binning(name, kind, method)
        truth = values.astype("boolean")
        codes = np.where(
            truth.isna().to_numpy(), -1, truth.fillna(False).to_numpy(dtype=bool).astype(int)
        )
        return Coded(codes, ["false", "true"], None, "boolean")
    if kind == "categorical":
        _refuse_binning(name, kind, method)
        return _text_levels(name, values, max_levels, order_hint)
    x = values.to_numpy() if values.dtype == np.float64 else values.to_numpy(dtype=float, na_value=np.nan)
    method = method or settings.default  # type: ignore[assignment]
    present = x[np.isfinite(x)] if method != "fixed" else x  # fixed cut points need no look at the values
    uniques = None
    if method == "auto":
        method = "quantile"
        if integer_like(present):  # cheap test first: hashing a million distinct floats is not
            uniques = np.sort(pd.unique(present))
            if uniques.size <= settings.max_categorical_levels:
                method = "categorical"
    if method == "categorical":
        return _number_levels(name, x, present if uniques is None else uniques, max_levels)
    bins = spec.bins if spec is not None and spec.bins else settings.bins
    unit = spec.unit if spec is not None else None
    if method == "fixed":
        cuts = _fixed_cuts(name, spec)
    elif present.size == 0:
        cuts = []
    elif method == "uniform":
        lo, hi = float(present.min()), float(present.max())
        cuts = _uniform_cuts(lo, hi, bins)
    else:
        cuts = _quantile_cuts(present, bins)
    coded = apply_cuts(x, cuts)
    return Coded(
        coded,
        interval_labels(cuts, unit),
        [float(c) for c in cuts],
        str(method),
        {"bins_requested": int(bins) if method != "fixed" else len(cuts) + 1},
    )


def _refuse_binning(name: str, kind: str, method: str | None) -> None:
    if method in ("quantile", "uniform", "fixed"):
        raise ConfigError(
            f"`columns.{name}.discretise` = {method!r} needs a numeric column, but "
            f"`{name}` is {kind}; remove the setting or declare `type: numeric`."
        )


def _fixed_cuts(name: str, spec: ColumnSpec | None) -> list[float]:
    edges = list(spec.edges or []) if spec is not None else []
    if not edges:
        raise ConfigError(
            f"`columns.{name}.discretise` is 'fixed' but no `edges` are given; "
            "add e.g. `edges: [120, 250]`."
        )
    if any(not np.isfinite(e) for e in edges) or any(b <= a for a, b in pairwise(edges)):
        raise ConfigError(
            f"`columns.{name}.edges` = {edges} must be finite and strictly increasing."
        )
    return [float(e) for e in edges]


def _uniform_cuts(lo: float, hi: float, bins: int) -> list[float]:
    """Equal-width cut points between `lo` and `hi`; near the largest float, where ``hi - lo``
    overflows, they are computed as ``lo*(1-t) + hi*t`` instead, which stays finite."""
    if not hi > lo:
        return []
    t = np.arange(1, bins) / bins
    with np.errstate(over="ignore"):
        width = hi - lo
    cuts = lo + width * t if np.isfinite(width) else lo * (1.0 - t) + hi * t
    return sorted({float(c) for c in cuts if np.isfinite(c) and lo < c <= hi})


def _quantile_cuts(present: np.ndarray, bins: int) -> list[float]:
    """Quantile cut points with duplicates merged; a cut at the minimum isolates the minimum."""
    cuts = np.unique(np.quantile(present, np.arange(1, bins) / bins))
    lo = present.min()
    if cuts.size and cuts[0] <= lo:
        above = present[present > lo]
        cuts = np.unique(np.concatenate(([above.min()] if above.size else [], cuts[cuts > lo])))
    return [float(c) for c in cuts]


def apply_cuts(x: np.ndarray, cuts: list[float]) -> np.ndarray:
    """Bin index of each value (-1 for missing) for the cut points `cuts`."""
    if len(cuts) <= 8:  # the number of cut points at or below each value, one comparison per cut point
        codes = np.zeros(x.shape, dtype=np.int8)  # at most 9 bins: the codes the stage keeps, no wider copy
        for c in cuts:
            codes += x >= float(c)
    else:
        codes = np.searchsorted(np.asarray(cuts, dtype=float), x, side="right").astype(np.int64)
    codes[~np.isfinite(x)] = -1
    return codes


def interval_labels(cuts: list[float], unit: str | None) -> list[str]:
    """``< 120 ms``, ``[120, 250) ms``, ``>= 250 ms`` for the cut points [120, 250]."""
    suffix = f" {unit}" if unit else ""
    if not cuts:
        return ["all values"]
    text = format_cut_points(cuts)
    labels = [f"< {text[0]}{suffix}"]
    labels += [f"[{a}, {b}){suffix}" for a, b in pairwise(text)]
    labels.append(f">= {text[-1]}{suffix}")
    return labels


def _number_levels(name: str, x: np.ndarray, present: np.ndarray, max_levels: int) -> Coded:
    uniques = np.unique(present)  # already sorted and unique when coming from the auto rule
    check_levels(name, uniques.size, max_levels)
    codes = np.searchsorted(uniques, x).astype(np.int64)
    codes[~np.isfinite(x)] = -1
    return Coded(codes, number_labels(uniques), None, "categorical")


def number_labels(uniques: np.ndarray) -> list[str]:
    """Labels for numeric levels: ``3`` for 3.0; full precision when short forms would collide."""
    labels = [format_number(float(u)) for u in uniques]
    if len(set(labels)) < len(labels):
        labels = [repr(float(u)) for u in uniques]
    return labels


def _text_levels(
    name: str, values: pd.Series, max_levels: int, order_hint: list[str] | None
) -> Coded:
    if isinstance(values.dtype, pd.CategoricalDtype):  # codes already (the clean stage's text columns)
        codes = np.asarray(values.cat.codes, dtype=np.int64)
        seen = np.bincount(codes + 1, minlength=len(values.cat.categories) + 1)[1:] > 0
        uniques = values.cat.categories[seen]  # levels no kept row holds are left out, as factorize does
        codes = (np.cumsum(seen) - 1)[codes]
        codes[np.asarray(values.cat.codes) < 0] = -1
    else:
        codes, uniques = pd.factorize(values.astype(object), use_na_sentinel=True)
    levels = sort_levels([str(u) for u in uniques], order_hint)
    check_levels(name, len(levels), max_levels)
    position = {lv: i for i, lv in enumerate(levels)}
    remap = np.array([position[str(u)] for u in uniques] + [-1], dtype=np.int64)
    return Coded(remap[np.where(codes >= 0, codes, len(uniques))], levels, None, "categorical")


def sort_levels(levels: list[str], order_hint: list[str] | None = None) -> list[str]:
    """Levels in a stable order: a known order first, numbers numerically, else text; pooled last."""
    special = [lv for lv in (OTHER_LEVEL, MISSING_LEVEL) if lv in levels]
    rest = [lv for lv in levels if lv not in special]
    if order_hint:
        known = [lv for lv in order_hint if lv in rest]
        rest = known + sorted(lv for lv in rest if lv not in order_hint)
    else:
        numbers = pd.to_numeric(pd.Series(rest, dtype=object), errors="coerce")
        if rest and numbers.notna().all():
            rest = [lv for _, lv in sorted(zip(numbers.tolist(), rest))]
        else:
            rest = sorted(rest)
    return rest + special


def check_levels(name: str, count: int, max_levels: int) -> None:
    if count > max_levels:
        raise LimitError(
            f"Column `{name}` has {count} levels, above `limits.max_levels` = {max_levels}; bin it "
            "(`discretise: quantile` in `columns:`), declare it `type: ignore`, or raise the limit."
        )


# ----------------------------------------------------------------------------- reused levels


def reapply(
    name: str, values: pd.Series, kind: str, levels: list[str], edges: list[float] | None
) -> Coded:
    """Codes for a column with the levels (or cut points) of an earlier run; unknown values -> -1."""
    if edges is not None:
        if kind != "numeric":
            raise DataError(
                f"Column `{name}` was binned in the reused run but is {kind} now; set "
                "`discretise.reuse_from` to a run with the same columns, or clear it."
            )
        x = values.to_numpy(dtype=float, na_value=np.nan)
        cuts = [float(e) for e in edges]
        return Coded(apply_cuts(x, cuts), list(levels), cuts, "reused bins", {"unknown": 0})
    if kind == "numeric":
        x = values.to_numpy(dtype=float, na_value=np.nan)
        codes_u, uniques = pd.factorize(x, use_na_sentinel=True)
        text_u = np.array(number_labels(np.asarray(uniques, dtype=float)) + [None], dtype=object)
        text = pd.Series(text_u[np.where(codes_u >= 0, codes_u, len(uniques))], dtype=object)
    elif kind == "boolean":
        truth = values.astype("boolean")
        text = truth.map({True: "true", False: "false"}).astype(object).where(truth.notna(), None)
    else:
        text = values.astype(object)
    present = text.notna().to_numpy()
    codes = pd.Index(list(levels), dtype=object).get_indexer(text.astype(object)).astype(np.int64)
    if MISSING_LEVEL in levels:
        codes[(codes == levels.index(MISSING_LEVEL)) & present] = -1  # literal "(missing)" text
    unknown = int(((codes == -1) & present).sum())
    return Coded(codes, list(levels), None, "reused levels", {"unknown": unknown})


def attach_missing(coded: Coded, present: np.ndarray, mode: str) -> Coded:
    """With ``test.missing: level`` (or a reused "(missing)" level), missing values get that level."""
    missing = ~present
    if MISSING_LEVEL in coded.levels:
        coded.codes[missing] = coded.levels.index(MISSING_LEVEL)
    elif mode == "level" and missing.any():
        coded.levels.append(MISSING_LEVEL)
        coded.codes[missing] = len(coded.levels) - 1
    return coded
