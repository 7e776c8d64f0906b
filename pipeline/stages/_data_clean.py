"""Type inference and column rules behind the clean stage (private).

Text columns are processed through their distinct values (`pandas.factorize`), so a million rows
with a handful of levels cost a handful of string operations.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ..config import CleanSettings, ColumnSpec
from ..errors import DataError
from ._data_common import (
    FALSE_WORDS,
    INFINITY_WORDS,
    MISSING_WORDS,
    TRUE_WORDS,
    format_number,
    integer_like,
)

OTHER_LEVEL = "(other)"
HOUR_BANDS = ["night", "morning", "afternoon", "evening"]  # 0-5, 6-11, 12-17, 18-23 h
WEEKDAYS = ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday"]
_DATE_LIKE = re.compile(
    r"^\d{4}-\d{2}-\d{2}([ T]\d{1,2}:\d{2}(:\d{2}(\.\d+)?)?)?(Z|[+-]\d{2}:?\d{2})?$"
)


@dataclass
class Typed:
    """One column after type inference (working record, not a result)."""

    name: str
    kind: str  # numeric | categorical | boolean | timestamp | ignore
    values: Any  # pandas Series aligned with the ingested rows
    declared: bool = False
    bad_rows: np.ndarray | None = None  # positions of rows with text in a numeric column
    bad_values: list = field(default_factory=list)
    non_finite: int = 0
    notes: list = field(default_factory=list)
    # a column read from text: the code of each row's distinct text (-1: no value) and the label of
    # each code (None: missing); its values are ``labels[codes]``, counted without hashing them again
    codes: np.ndarray | None = None
    labels: np.ndarray | None = None


# ----------------------------------------------------------------------------- inference


def infer(name: str, series: pd.Series, spec: ColumnSpec | None, settings: CleanSettings) -> Typed:
    """The type of one column (declared in `columns:` or inferred) and its values in that type."""
    declared = spec.type if spec is not None else None
    if declared == "ignore":
        return Typed(name, "ignore", series, declared=True)
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype):
        return _from_bool(name, series, declared)
    if pd.api.types.is_numeric_dtype(dtype) and not isinstance(dtype, pd.CategoricalDtype):
        return _from_number(name, series, declared)
    if pd.api.types.is_datetime64_any_dtype(dtype):
        return _from_datetime(name, series, declared)
    return _from_text(name, series, declared, settings)


def _from_bool(name: str, series: pd.Series, declared: str | None) -> Typed:
    values = series.astype("boolean")
    if declared == "numeric":
        return Typed(name, "numeric", values.astype("Float64").astype(float), True)
    if declared == "categorical":
        text = values.map({True: "true", False: "false"}).astype(object)
        return Typed(name, "categorical", text.where(values.notna(), None), True)
    if declared == "timestamp":
        raise DataError(
            f"Column `{name}` holds true/false values and cannot be declared a timestamp; "
            "fix `columns:`."
        )
    return Typed(name, "boolean", values, declared is not None)


def _from_number(name: str, series: pd.Series, declared: str | None) -> Typed:
    if series.dtype == np.float64:  # NaN already marks a missing value: no filled copy
        arr = series.to_numpy()
    else:
        arr = series.to_numpy(dtype=float, na_value=np.nan)
    infinite = np.isinf(arr)
    non_finite = int(infinite.sum())
    if non_finite:
        arr = np.where(infinite, np.nan, arr)
    if declared == "categorical":
        return Typed(
            name, "categorical", _number_labels(arr, series.index), True, non_finite=non_finite
        )
    if declared == "boolean":
        ok = np.isnan(arr) | (arr == 0) | (arr == 1)
        if not ok.all():
            raise DataError(
                f"Column `{name}` is declared boolean but holds numbers other than 0 and 1 "
                f"(e.g. {format_number(arr[~ok][0])}); fix `columns:` or the extract."
            )
        out = pd.array(np.where(np.isnan(arr), pd.NA, arr == 1), dtype="boolean")
        return Typed(
            name, "boolean", pd.Series(out, index=series.index, copy=False), True, non_finite=non_finite
        )
    if declared == "timestamp":
        raise DataError(
            f"Column `{name}` holds numbers and cannot be declared a timestamp; "
            "fix `columns:` or write the times as ISO 8601 text."
        )
    # copy=False: pandas 3 copies a numpy array handed to Series by default (8 MB per million rows)
    typed = Typed(name, "numeric", pd.Series(arr, index=series.index, copy=False), declared is not None)
    typed.non_finite = non_finite
    return typed


def _from_datetime(name: str, series: pd.Series, declared: str | None) -> Typed:
    if declared == "numeric":
        naive = series.dt.tz_convert(None) if getattr(series.dt, "tz", None) is not None else series
        stamps = naive.to_numpy(dtype="datetime64[ns]")
        seconds = np.where(np.isnat(stamps), np.nan, stamps.astype("int64") / 1e9)
        return Typed(name, "numeric", pd.Series(seconds, index=series.index), True)
    if declared == "categorical":
        text = series.astype(str).astype(object).where(series.notna(), None)
        return Typed(name, "categorical", text, True)
    if declared == "boolean":
        raise DataError(
            f"Column `{name}` holds timestamps and cannot be declared boolean; fix `columns:`."
        )
    return Typed(name, "timestamp", series, declared is not None)


def _number_labels(arr: np.ndarray, index: pd.Index) -> pd.Series:
    codes, uniques = pd.factorize(arr, use_na_sentinel=True)
    labels = np.array([format_number(float(u)) for u in uniques] + [None], dtype=object)
    return pd.Series(labels[codes], index=index, dtype=object)


def _from_text(
    name: str, series: pd.Series, declared: str | None, settings: CleanSettings
) -> Typed:
    plain = series.astype(object) if isinstance(series.dtype, pd.CategoricalDtype) else series
    codes, uniques = pd.factorize(plain, use_na_sentinel=True)
    text = pd.Index(uniques, dtype=object).map(str)
    nul = bool(text.str.contains("\x00", regex=False).any())
    text = (text.str.replace("\x00", "", regex=False) if nul else text).str.strip()
    low = text.str.lower()
    infinite = np.asarray(low.isin(INFINITY_WORDS), dtype=bool)
    missing = np.asarray(low.isin(MISSING_WORDS), dtype=bool) | infinite
    numbers = pd.to_numeric(pd.Series(np.asarray(text, dtype=object)), errors="coerce").to_numpy(
        float
    )
    parsed_inf = np.isinf(numbers) & ~missing
    infinite |= parsed_inf
    missing |= parsed_inf
    parsed = ~missing & np.isfinite(numbers)
    is_text = ~missing & ~parsed
    counts = np.bincount(codes + 1, minlength=len(text) + 1)[1:]  # codes[i] == -1: no value
    n_present = int(counts[~missing].sum())
    n_text = int(counts[is_text].sum())
    non_finite = int(counts[infinite].sum())
    present_low = set(low[~missing])

    kind = declared
    if kind is None:
        if n_present == 0:
            kind = "categorical"
        elif n_text == 0:
            kind = "numeric"
        elif present_low <= (TRUE_WORDS | FALSE_WORDS):
            kind = "boolean"
        elif n_text <= settings.numeric_text_max_fraction * n_present:
            kind = "numeric"
        elif _looks_like_time(text[~missing]):
            kind = "timestamp"
        else:
            kind = "categorical"

    if kind == "numeric":
        per_unique = np.where(parsed, numbers, np.nan)
        values = pd.Series(_take(per_unique, codes, np.nan), index=series.index, copy=False)
        typed = Typed(name, "numeric", values, declared is not None, non_finite=non_finite)
        if n_text:
            rows = np.flatnonzero(is_text[codes] & (codes >= 0))
            typed.bad_rows = rows
            typed.bad_values = [str(text[codes[r]]) for r in rows[:3]]
        if n_present:
            typed.notes.append("numbers stored as text converted")
        return typed
    if kind == "boolean":
        truth = low.isin(TRUE_WORDS | {"1", "1.0"})
        falsity = low.isin(FALSE_WORDS | {"0", "0.0"})
        bad = ~missing & ~np.asarray(truth | falsity, dtype=bool)
        if bad.any():
            shown = ", ".join(f"`{v}`" for v in list(text[bad])[:3])
            raise DataError(
                f"Column `{name}` is declared boolean but holds {shown}; use true/false, "
                "yes/no or 1/0, or change its `type` in `columns:`."
            )
        per_unique = np.array([bool(t) for t in truth] + [pd.NA], dtype=object)
        per_unique[:-1][missing] = pd.NA
        values = pd.Series(pd.array(per_unique[codes], dtype="boolean"), index=series.index)
        return Typed(name, "boolean", values, declared is not None, non_finite=non_finite)
    if kind == "timestamp":
        stamps = _parse_times(name, text, missing)
        unparsed = ~missing & stamps.isna().to_numpy()
        if unparsed.any():
            rows = np.flatnonzero(unparsed[codes] & (codes >= 0))
            raise DataError(
                f"Column `{name}` has {len(rows)} values that are not timestamps (e.g. "
                f"`{text[codes[rows[0]]]}` at row {rows[0] + 1}); write ISO 8601 times or change its "
                "`type` in `columns:`."
            )
        values = pd.Series(stamps.to_numpy()[np.where(codes >= 0, codes, 0)], index=series.index)
        values[codes < 0] = pd.NaT
        return Typed(name, "timestamp", values, declared is not None)
    labels = np.asarray(text, dtype=object).copy()
    labels[missing] = None
    values = pd.Series(_take(labels, codes, None), index=series.index, dtype=object, copy=False)
    typed = Typed(name, "categorical", values, declared is not None, non_finite=non_finite,
                  codes=codes, labels=labels)
    if nul:  # a NUL byte is never part of a level: it would break every text format downstream
        typed.notes.append("NUL bytes removed from its values")
    return typed


def _parse_times(name: str, text: pd.Index, missing: np.ndarray) -> pd.Series:
    """ISO 8601 times; a column mixing times with and without a time zone is refused."""
    present = pd.Series(np.asarray(text, dtype=object)).where(~missing, None)
    try:
        return pd.to_datetime(present, errors="coerce", format="ISO8601")
    except (ValueError, TypeError) as err:
        zoned = present.dropna().astype(str).str.contains(r"(?:Z|[+-]\d{2}:?\d{2})$", regex=True)
        example = ""
        if zoned.any() and (~zoned).any():
            example = f" (e.g. `{present.dropna()[zoned].iloc[0]}` and `{present.dropna()[~zoned].iloc[0]}`)"
        raise DataError(
            f"Column `{name}` mixes times with and without a time zone{example}, so they cannot be "
            f"put on one clock; write every time with its offset (or none), or set "
            f"`columns.{name}.type: ignore`."
        ) from err


def _take(per_unique: np.ndarray, codes: np.ndarray, fill: Any) -> np.ndarray:
    out = np.append(per_unique, np.array([fill], dtype=per_unique.dtype))
    return out[np.where(codes >= 0, codes, len(per_unique))]


def _looks_like_time(present: pd.Index) -> bool:
    sample = list(present[:200])
    return bool(sample) and all(_DATE_LIKE.match(str(v)) for v in sample)


# ----------------------------------------------------------------------------- derived columns


def time_features(typed: Typed) -> list[tuple[Typed, list[str]]]:
    """Hour band and weekday columns derived from a timestamp column, with their level orders."""
    stamps = pd.Series(typed.values)
    present = stamps.notna().to_numpy()
    hours = stamps.dt.hour.to_numpy(dtype=float, na_value=np.nan)
    band = np.array(HOUR_BANDS + [None], dtype=object)
    band_idx = np.where(present, (np.nan_to_num(hours) // 6).astype(int), len(HOUR_BANDS))
    days = stamps.dt.day_of_week.to_numpy(dtype=float, na_value=np.nan)
    day = np.array(WEEKDAYS + [None], dtype=object)
    day_idx = np.where(present, np.nan_to_num(days).astype(int), len(WEEKDAYS))
    idx = stamps.index
    return [
        (
            Typed(
                f"{typed.name}_hour_band",
                "categorical",
                pd.Series(band[band_idx], index=idx, dtype=object),
                notes=[
                    (
                        f"derived from `{typed.name}`: night 0-6 h, morning 6-12 h, "
                        "afternoon 12-18 h, evening 18-24 h"
                    )
                ],
            ),
            HOUR_BANDS,
        ),
        (
            Typed(
                f"{typed.name}_weekday",
                "categorical",
                pd.Series(day[day_idx], index=idx, dtype=object),
                notes=[f"derived from `{typed.name}`: day of the week"],
            ),
            WEEKDAYS,
        ),
    ]


# ----------------------------------------------------------------------------- column rules


def decide(
    typed: Typed, values: pd.Series, settings: CleanSettings, has_features: bool,
    codes: np.ndarray | None = None,
) -> tuple[str | None, pd.Series, dict[str, Any]]:
    """The drop reason (None: kept), the final values and the facts for the column summary.

    `codes`: ``typed.codes`` on the same rows as `values`, when the column was read from text."""
    n = len(values)
    if codes is not None and typed.labels is not None and typed.kind == "categorical":
        missing, distinct = _count_codes(codes, typed.labels)
    else:
        missing, distinct = _count(typed.kind, values)
    facts: dict[str, Any] = {"missing": missing, "distinct": distinct, "pooled_levels": 0}
    if typed.kind == "ignore":
        return "declared `type: ignore` in `columns:`", values, facts
    if typed.kind == "timestamp":
        derived = (
            "; hour band and weekday were derived from it"
            if has_features
            else ("; set `clean.timestamp_features: true` to derive hour band and weekday")
        )
        return (
            (
                "timestamp column: its values mark moments rather than states, so it is not "
                "tested" + derived
            ),
            values,
            facts,
        )
    if missing == n:
        return "entirely missing", values, facts
    if missing / n > settings.max_missing_fraction:
        return (
            (
                f"{missing / n:.0%} of values missing, above `clean.max_missing_fraction` = "
                f"{settings.max_missing_fraction:g}"
            ),
            values,
            facts,
        )
    if distinct == 1 and settings.drop_constant:
        only = values.dropna().iloc[0]
        shown = format_number(float(only)) if typed.kind == "numeric" else str(only)
        return f"one value only (`{shown}`): a constant cannot be linked to anything", values, facts
    if not typed.declared and _id_like(typed.kind, values, distinct, n - missing, settings):
        return (
            (
                f"looks like an identifier: {distinct} distinct values in {n - missing} rows "
                f"(ratio >= `clean.id_unique_ratio` = {settings.id_unique_ratio:g})"
            ),
            values,
            facts,
        )
    if typed.kind == "categorical" and settings.rare_level_min_count > 0:
        counts = values.value_counts(dropna=True)
        rare = counts.index[counts < settings.rare_level_min_count]
        if len(rare):
            values = values.where(~values.isin(rare) | values.isna(), OTHER_LEVEL).astype(object)
            values = values.where(values.notna(), None)
            facts["pooled_levels"] = len(rare)
            typed.notes.append(
                f"{len(rare)} levels seen fewer than {settings.rare_level_min_count} "
                f"times pooled into `{OTHER_LEVEL}`"
            )
            facts["distinct"] = int(values.nunique(dropna=True))
            if facts["distinct"] == 1 and settings.drop_constant:
                return (
                    f"one value only after pooling rare levels into `{OTHER_LEVEL}`",
                    values,
                    facts,
                )
    return None, values, facts


def as_categorical(codes: np.ndarray, labels: np.ndarray) -> pd.Categorical:
    """``labels[codes]`` (code -1: missing, a label None: missing) as a categorical: one code per row and
    each distinct label once (labels that became equal once stripped share a code)."""
    label_codes, levels = pd.factorize(pd.Index(labels, dtype=object), use_na_sentinel=True)
    lookup = np.append(label_codes, -1)  # the last entry: rows without a value
    return pd.Categorical.from_codes(lookup[np.where(codes >= 0, codes, len(labels))],
                                     categories=pd.Index(levels, dtype=object))


def _count_codes(codes: np.ndarray, labels: np.ndarray) -> tuple[int, int]:
    """Missing and distinct counts of ``labels[codes]`` from the codes (one count per code)."""
    counts = np.bincount(codes + 1, minlength=len(labels) + 1)  # codes[i] == -1: no value
    no_label = np.fromiter((lv is None for lv in labels), dtype=bool, count=len(labels))
    missing = int(counts[0]) + int(counts[1:][no_label].sum())
    return missing, len(set(labels[(counts[1:] > 0) & ~no_label].tolist()))


def distinct_floats(arr: np.ndarray) -> int:
    """The number of distinct values of a float array without NaN (-0.0 equals 0.0).

    Values are hashed (pandas' table) unless an evenly spaced sample of about 16,000 is nearly all
    distinct; then the runs of a sorted copy are counted (numpy's vectorised sort). Measured on the
    generated 1,000,000-row extract (bench/gen_extract.py), per column: hashing 12-65 ms up to about
    100,000 distinct values, sorting 45-78 ms whatever their number, hashing 90-100 ms at 300,000+.
    """
    if arr.size > 65_536:
        sample = arr[:: arr.size // 16_384]
        if len(pd.unique(sample)) < 0.9 * sample.size:
            return len(pd.unique(arr))
    ordered = np.sort(arr)
    return int(ordered.size > 0) + int(np.count_nonzero(ordered[1:] != ordered[:-1]))


def _count(kind: str, values: pd.Series) -> tuple[int, int]:
    """Missing and distinct counts, computed the cheap way for each kind."""
    if kind == "numeric":
        arr = values.to_numpy(dtype=float)
        nan = np.isnan(arr)
        n_nan = int(nan.sum())
        return n_nan, distinct_floats(arr[~nan] if n_nan else arr)
    try:
        codes, uniques = pd.factorize(values, use_na_sentinel=True)
    except TypeError:
        codes, uniques = pd.factorize(values.astype(str), use_na_sentinel=True)
    return int((codes < 0).sum()), len(uniques)


def _id_like(
    kind: str, values: pd.Series, distinct: int, present: int, settings: CleanSettings
) -> bool:
    if kind == "boolean" or distinct < 2 or present == 0:
        return False
    if kind == "numeric" and not integer_like(values.to_numpy(dtype=float)):
        return False  # continuous measurements are all distinct; they get binned, not dropped
    return distinct / present >= settings.id_unique_ratio
