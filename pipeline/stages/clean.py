"""Clean: decide each column's type, which columns and rows the tests may see, and say why.

Every input column ends up in `Cleaned.columns` as kept, dropped (with the reason) or derived; every
row removed here is in `Cleaned.quarantined` with its reason, so nothing is lost.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd

from ..config import ColumnSpec, Config
from ..errors import ConfigError, DataError, LimitError
from . import _data_clean as _rules
from ._data_common import close_matches, empty_rejected, map_threads, render_rows, source_of_rows
from .ingest import Ingested

__all__ = ["Cleaned", "run"]


@dataclass(frozen=True)
class Cleaned:
    """The columns and rows the tests may see.

    Attributes
    ----------
    table : pandas.DataFrame
        Kept columns only: numeric as float64 (NaN missing), categorical as object (None missing),
        boolean as pandas ``boolean``. Index 0..n-1.
    kinds : dict
        Kept column -> ``"numeric"``, ``"categorical"`` or ``"boolean"``.
    columns : list of dict
        One per input column (and derived column): ``column``, ``action`` (kept / dropped /
        derived), ``reason``, ``type``, ``missing``, ``distinct`` and a few counts.
    quarantined : pandas.DataFrame
        Rows removed by cleaning: ``source``, ``line``, ``reason``, ``raw``.
    summary : dict
        The content of ``cleaning.json``.
    """

    table: pd.DataFrame
    kinds: dict[str, str]
    columns: list[dict[str, Any]]
    quarantined: pd.DataFrame
    summary: dict[str, Any]
    times: pd.DataFrame = field(default_factory=pd.DataFrame)  # timestamp columns, int64 ns UTC (NaT: min int64)
    # categorical columns read from text, the same values as codes and their levels (see `stored`)
    categories: dict[str, pd.Categorical] = field(default_factory=dict)

    def stored(self) -> pd.DataFrame:
        """The table as the stage's artifact keeps it: the columns of `categories` as pandas categoricals
        (an Arrow dictionary column in ``clean.arrow``, read back as a categorical) instead of one Python
        string per row, which Arrow would have to read one by one; every value is the same."""
        if not self.categories:
            return self.table
        out = self.table.copy(deep=False)
        for name, values in self.categories.items():
            out[name] = values
        return out


def run(ingested: Ingested, cfg: Config) -> Cleaned:
    """Type, filter and document the ingested table.

    Parameters
    ----------
    ingested : Ingested
        The output of `pipeline.stages.ingest.run`.
    cfg : Config
        Uses ``clean``, ``columns`` (type overrides, renames) and ``limits.max_levels``.

    Returns
    -------
    Cleaned

    Examples
    --------
    >>> import pandas as pd
    >>> from pipeline.config import Config
    >>> from pipeline.stages.ingest import Ingested
    >>> from pipeline.stages._data_common import empty_rejected
    >>> t = pd.DataFrame({"load": ["1.5", "2", "inf"] * 10, "zone": ["a", "b", "b"] * 10,
    ...                   "site": ["s1"] * 30})
    >>> got = run(Ingested(t, empty_rejected(), 30, ["x.csv"], {}), Config())
    >>> got.kinds, got.summary["dropped"]["site"][:13]
    ({'load': 'numeric', 'zone': 'categorical'}, 'one value onl')
    """
    table = ingested.table
    _check_column_specs(table, cfg)
    names = list(table.columns)
    typed = dict(zip(names, _each_column(
        lambda name: _rules.infer(name, table[name], cfg.columns.get(name), cfg.clean), names, table.size,
        cfg.parallel.jobs)))
    bad_rows, bad_reasons = _text_in_numeric(typed, ingested, cfg)
    keep = np.ones(len(table), dtype=bool)
    keep[bad_rows] = False
    derived, order = _derive(typed, cfg)
    duplicate = _duplicates(table, keep, cfg)
    keep &= ~duplicate
    n_kept = int(keep.sum())
    if n_kept < cfg.clean.min_rows:
        raise DataError(
            f"Only {n_kept} usable rows remain in `{_source_text(ingested)}` ({len(table)} read, "
            f"{len(bad_rows)} quarantined, {int(duplicate.sum())} duplicates dropped); "
            f"`clean.min_rows` = {cfg.clean.min_rows}; supply a longer extract or lower the minimum."
        )
    out, kinds, records, categories = _apply_rules(typed, derived, keep, cfg)
    quarantined = _quarantine(ingested, bad_rows, bad_reasons, duplicate)
    cleaned = _package(ingested, out, kinds, records, quarantined, order, cfg, int(duplicate.sum()))
    times = pd.DataFrame({name: _utc_nanoseconds(col.values[keep]) for name, col in typed.items()
                          if col.kind == "timestamp"})
    renamed = {old: new for new, old in cleaned.summary["renamed"].items()}
    categories = {renamed.get(n, n): v for n, v in categories.items()}
    return Cleaned(cleaned.table, cleaned.kinds, cleaned.columns, cleaned.quarantined, cleaned.summary, times,
                   categories)


# cells from which the columns are typed and counted on `parallel.jobs` threads (smaller tables in turn)
_THREADED_FROM = 2_000_000


def _each_column(fn: Callable[[Any], Any], items: list[Any], cells: int, jobs: int) -> list[Any]:
    """`map_threads` for a table of at least `_THREADED_FROM` cells. On the 1,000,000 x 40 extract of
    `bench/gen_extract.py`, counting the distinct values of its 28 numeric columns took 0.41-0.47 s on
    two threads against 0.85-1.03 s in turn."""
    return map_threads(fn, items, jobs if cells >= _THREADED_FROM else 1)


def _utc_nanoseconds(values: pd.Series) -> np.ndarray:
    """Timestamps as int64 nanoseconds since the epoch in UTC (missing: the smallest int64)."""
    s = pd.to_datetime(values, utc=True, errors="coerce")
    return s.dt.tz_convert(None).to_numpy(dtype="datetime64[ns]").view(np.int64)


def _check_column_specs(table: pd.DataFrame, cfg: Config) -> None:
    """Every name under `columns:` must be an input column (or one derived from a timestamp)."""
    known = list(table.columns)
    derivable = [f"{c}_{s}" for c in known for s in ("hour_band", "weekday")]
    for name in cfg.columns:
        if name not in known and not (cfg.clean.timestamp_features and name in derivable):
            raise ConfigError(
                f"`columns:` names column `{name}`, which the input does not have"
                f"{close_matches(name, known)}."
            )


def _where(ingested: Ingested, rows: np.ndarray) -> str:
    """``lines 3, 8, 41 of `file```: where the first rows of a selection sit in the input."""
    files = ingested.summary.get("files", [])
    owner = source_of_rows(files, len(ingested.table))
    lines = ingested.table.index.to_numpy()
    first = rows[:3]
    srcs = {int(owner[r]) for r in first}
    path = files[owner[first[0]]]["path"] if files else (ingested.sources or ["input"])[0]
    shown = ", ".join(str(int(lines[r])) for r in first)
    tail = f" of `{path}`" if len(srcs) == 1 else ""
    return f"line{'s' if len(first) > 1 else ''} {shown}{tail}"


def _text_in_numeric(
    typed: dict[str, _rules.Typed], ingested: Ingested, cfg: Config
) -> tuple[np.ndarray, dict[int, str]]:
    """Rows to quarantine for text in numeric columns (or the refusal / switch to categorical)."""
    policy = cfg.clean.text_in_numeric
    reasons: dict[int, str] = {}
    for name, col in list(typed.items()):
        if col.bad_rows is None or not len(col.bad_rows):
            continue
        rows = col.bad_rows
        shown = ", ".join(f"`{v}`" for v in col.bad_values)
        if policy == "refuse" or (policy == "categorical" and col.declared):
            fix = (
                "fix the extract or remove `type: numeric`"
                if col.declared
                else "set `clean.text_in_numeric` to quarantine or categorical, declare it categorical "
                "in `columns:`, or fix the extract"
            )
            raise DataError(
                f"Column `{name}` has {len(rows)} non-numeric values ({shown}; first at "
                f"{_where(ingested, rows)}); {fix}."
            )
        if policy == "categorical":
            redo = _rules.infer(
                name, ingested.table[name], ColumnSpec(type="categorical"), cfg.clean
            )
            redo.declared = False
            redo.notes.append(
                f"numeric column with {len(rows)} text values treated as categorical "
                "(`clean.text_in_numeric: categorical`)"
            )
            typed[name] = redo
            continue
        col.notes.append(f"{len(rows)} rows with text quarantined")
        raw_text = ingested.table[name].iloc[rows].astype(str).str.strip().to_numpy()
        for r, value in zip(rows.tolist(), raw_text):
            reasons.setdefault(
                r, f"column `{name}` holds text `{value}` where numbers are expected"
            )
    bad = np.asarray(sorted(reasons), dtype=np.int64)
    return bad, reasons


def _derive(typed: dict[str, _rules.Typed], cfg: Config) -> tuple[dict[str, _rules.Typed], dict]:
    """Hour band and weekday columns for each timestamp column, when asked for."""
    derived: dict[str, _rules.Typed] = {}
    order: dict[str, list[str]] = {}
    if not cfg.clean.timestamp_features:
        return derived, order
    for col in typed.values():
        if col.kind != "timestamp":
            continue
        for feature, levels in _rules.time_features(col):
            if feature.name in typed:
                continue
            derived[feature.name] = feature
            order[feature.name] = levels
    return derived, order


def _duplicates(table: pd.DataFrame, keep: np.ndarray, cfg: Config) -> np.ndarray:
    """Rows repeating an earlier kept row in every column (only with ``clean.duplicates: drop``)."""
    out = np.zeros(len(table), dtype=bool)
    if cfg.clean.duplicates != "drop" or not keep.any():
        return out
    rows = np.flatnonzero(keep)
    sub = (
        table.iloc[rows].astype(object).where(table.iloc[rows].notna(), None).reset_index(drop=True)
    )
    out[rows[sub.duplicated(keep="first").to_numpy()]] = True
    return out


def _apply_rules(
    typed: dict[str, _rules.Typed], derived: dict[str, _rules.Typed], keep: np.ndarray, cfg: Config
) -> tuple[dict[str, pd.Series], dict[str, str], list[dict[str, Any]], dict[str, pd.Categorical]]:
    """Drop or keep each column on the kept rows and record what happened; the kept categorical columns
    read from text also as categoricals (their values unchanged by the rules)."""
    out: dict[str, pd.Series] = {}
    categories: dict[str, pd.Categorical] = {}
    kinds: dict[str, str] = {}
    records: list[dict[str, Any]] = []
    has_features = bool(derived)
    every_row = bool(keep.all())
    columns = list(typed.items()) + list(derived.items())

    def decided(item: tuple[str, _rules.Typed]) -> tuple[Any, ...]:
        col = item[1]
        values = (col.values if every_row else col.values[keep]).reset_index(drop=True)
        codes = None if col.codes is None else (col.codes if every_row else col.codes[keep])
        return (codes, *_rules.decide(col, values, cfg.clean, has_features, codes))

    for (name, col), (codes, reason, values, facts) in zip(
            columns, _each_column(decided, columns, int(keep.sum()) * len(columns), cfg.parallel.jobs)):
        action = "dropped" if reason else ("derived" if name in derived else "kept")
        if reason is None:
            if col.kind == "categorical" and facts["distinct"] > cfg.limits.max_levels:
                raise LimitError(
                    f"Column `{name}` has {facts['distinct']} levels, above `limits.max_levels` = "
                    f"{cfg.limits.max_levels}; declare it `type: ignore` in `columns:`, raise the limit, "
                    "or pool rare levels with `clean.rare_level_min_count`."
                )
            out[name] = _final_dtype(col.kind, values, none_for_missing=col.labels is not None)
            kinds[name] = col.kind
            if col.kind == "categorical" and codes is not None and col.labels is not None and not facts["pooled_levels"]:
                categories[name] = _rules.as_categorical(codes, col.labels)
            how = "declared in `columns:`" if col.declared else "inferred from the values"
            reason = "; ".join([f"{col.kind}, {how}"] + col.notes)
        elif col.notes:
            reason = "; ".join([reason] + col.notes)
        records.append(
            {
                "column": name,
                "action": action,
                "reason": reason,
                "type": col.kind,
                "missing": facts["missing"],
                "distinct": facts["distinct"],
                "non_finite": int(col.non_finite),
                "text_values": len(col.bad_rows) if col.bad_rows is not None else 0,
                "pooled_levels": facts["pooled_levels"],
            }
        )
    return out, kinds, records, categories


def _final_dtype(kind: str, values: pd.Series, none_for_missing: bool = False) -> pd.Series:
    """`none_for_missing`: the values are labels already, None where missing (as read from text)."""
    if kind == "numeric":
        return values.astype("float64")
    if kind == "boolean":
        return values.astype("boolean")
    if none_for_missing and values.dtype == object:
        return values
    return values.astype(object).where(values.notna(), None)


def _quarantine(
    ingested: Ingested, bad_rows: np.ndarray, reasons: dict[int, str], duplicate: np.ndarray
) -> pd.DataFrame:
    """The rows removed here, in the layout of `Ingested.rejected`."""
    dup_rows = np.flatnonzero(duplicate)
    rows = np.concatenate([bad_rows, dup_rows]).astype(np.int64)
    if not len(rows):
        return empty_rejected()
    files = ingested.summary.get("files", [])
    owner = source_of_rows(files, len(ingested.table))
    paths = np.array([f["path"] for f in files] or [(ingested.sources or [""])[0]], dtype=object)
    delimiter = (files[0].get("delimiter") if files else None) or ","
    sub = ingested.table.iloc[rows]
    return pd.DataFrame(
        {
            "source": paths[owner[rows]],
            "line": sub.index.to_numpy(dtype=np.int64),
            "reason": np.array(
                [reasons[r] for r in bad_rows.tolist()]
                + ["duplicate of an earlier row (`clean.duplicates: drop`)"] * len(dup_rows),
                dtype=object,
            ),
            "raw": render_rows(sub, delimiter).to_numpy(dtype=object),
        }
    )


def _source_text(ingested: Ingested) -> str:
    return str(ingested.summary.get("source") or ", ".join(ingested.sources) or "the input")


def _package(
    ingested: Ingested,
    out: dict[str, pd.Series],
    kinds: dict[str, str],
    records: list[dict],
    quarantined: pd.DataFrame,
    order: dict[str, list[str]],
    cfg: Config,
    n_duplicates: int,
) -> Cleaned:
    """Apply `columns: {x: {rename: ...}}`, check two columns remain, and write the summary."""
    renamed: dict[str, str] = {
        name: str(cfg.columns[name].rename)
        for name in out
        if name in cfg.columns and cfg.columns[name].rename
    }
    names = [renamed.get(n, n) for n in out]
    clash = sorted({n for n in names if names.count(n) > 1})
    if clash:
        raise ConfigError(
            f"`columns:` renames give two kept columns the name `{clash[0]}`; choose unique names."
        )
    if len(out) < 2:
        dropped = "; ".join(
            f"`{r['column']}`: {r['reason']}" for r in records if r["action"] == "dropped"
        )
        raise DataError(
            f"Fewer than two usable columns remain in `{_source_text(ingested)}` "
            f"(kept: {', '.join(names) or 'none'}); dropped: {dropped[:400]}."
        )
    table = pd.DataFrame({renamed.get(n, n): s for n, s in out.items()}, copy=False)
    kinds = {renamed.get(n, n): k for n, k in kinds.items()}
    for rec in records:
        if rec["column"] in renamed:
            rec["renamed_to"] = renamed[rec["column"]]
    reasons = quarantined["reason"].str.replace(
        r"`[^`]*`$|text `.*` where", "text where", regex=True
    )
    summary = {
        "rows": {
            "ingested": len(ingested.table),
            "quarantined": len(quarantined),
            "duplicates_dropped": n_duplicates,
            "kept": len(table),
        },
        "columns": records,
        "kept": list(table.columns),
        "dropped": {r["column"]: r["reason"] for r in records if r["action"] == "dropped"},
        "kinds": kinds,
        "level_order": {renamed.get(k, k): v for k, v in order.items() if k in out},
        "renamed": {new: old for old, new in renamed.items()},
        "quarantined_by_reason": {str(k): int(v) for k, v in reasons.value_counts().items()},
        "settings": cfg.section("clean"),
    }
    return Cleaned(table, kinds, records, quarantined, summary)
