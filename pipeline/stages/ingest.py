"""Ingest: read the extract (CSV, Parquet or JSON lines; a file, a glob or a folder of partitions).

Rows that cannot be parsed are not lost: they go to `Ingested.rejected` with their file, line, reason
and raw text, and ``rows_read = len(table) + len(rejected)``.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from ..config import InputSettings, LimitSettings
from ..errors import ConfigError, DataError
from . import _data_read as _read
from ._data_common import close_matches, rejected_frame

__all__ = ["Ingested", "run"]


@dataclass(frozen=True)
class Ingested:
    """The extract as read.

    Attributes
    ----------
    table : pandas.DataFrame
        Columns in input order, values typed by pyarrow's inference (or text). The index, named
        ``line``, is each row's 1-based line (row for Parquet) in its file; files follow one another
        in the order of ``summary["files"]``.
    rejected : pandas.DataFrame
        Rows that could not be parsed: ``source``, ``line`` (1-based), ``reason``, ``raw``.
    rows_read : int
        ``len(table) + len(rejected)``.
    sources : list of str
        The files read, in order.
    summary : dict
        JSON-able description: files, formats, delimiter, partition keys, rejected counts by reason.
    """

    table: pd.DataFrame
    rejected: pd.DataFrame
    rows_read: int
    sources: list[str]
    summary: dict[str, Any]


def run(source: str | Path, settings: InputSettings, limits: LimitSettings) -> Ingested:
    """Read `source` into a typed table plus the rows that could not be parsed.

    Parameters
    ----------
    source : str or Path
        A file, a glob such as ``snapshots/*.csv``, or a folder (``key=value`` sub-folders become
        columns).
    settings : InputSettings
        The ``input`` section: format, delimiter (None: detected), quoting, encoding, header,
        column selection and renames.
    limits : LimitSettings
        ``max_columns`` and ``max_rows`` are refused with a `LimitError` before memory runs out.

    Returns
    -------
    Ingested

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from pipeline.config import Config
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "x.csv"
    >>> _ = p.write_text("a;b\\n1;x\\n2;y\\n3\\n")
    >>> cfg = Config()
    >>> got = run(p, cfg.input, cfg.limits)
    >>> got.table.shape, got.rows_read, got.rejected["line"].tolist()
    ((2, 2), 3, [4])
    """
    files, kind = _read.find_files(source)
    wanted = list(settings.columns) if settings.columns is not None else None
    parts: list[Any] = []
    for path, partition in files:
        part = _read_one(
            path, settings, limits, wanted, sum(len(p.table) + len(p.rejected) for p in parts)
        )
        parts.append(_read.partition_columns(part, partition, wanted))
    return _package(parts, settings, kind, str(source), wanted)


def _read_one(
    path: Path,
    settings: InputSettings,
    limits: LimitSettings,
    wanted: list[str] | None,
    rows_before: int,
) -> _read._Part:
    """Read one file with the reader its format calls for."""
    try:
        raw = path.read_bytes()
    except OSError as err:
        raise DataError(
            f"Input file `{path}` cannot be read ({err.strerror}); check its permissions."
        ) from err
    raw = _read.decompress(path, raw)
    fmt = _read.detect_format(path, raw[:4096], settings)
    if fmt == "parquet":
        return _read.read_parquet(path, settings, limits, wanted, rows_before)
    if not raw or raw.isspace():  # empty or blank (without copying the bytes)
        raise DataError(f"`{path}` has no data rows (it is empty); check the extract.")
    if fmt == "jsonl":
        return _read.read_jsonl(path, raw, settings, limits, wanted, rows_before)
    return _read.read_csv(path, raw, settings, limits, wanted, rows_before)


def _package(
    parts: list, settings: InputSettings, kind: str, source: str, wanted: list[str] | None
) -> Ingested:
    """Join the parts, check selection and renames, and build the summary."""
    seen: list[str] = []
    available: list[str] = []
    for part in parts:
        seen += [c for c in part.table.columns if c not in seen]
        available += [c for c in part.info.get("available", []) if c not in available]
    _read.check_wanted(wanted, available)
    frames = [p.table for p in parts]
    table = frames[0] if len(frames) == 1 else pd.concat(frames, axis=0, join="outer", sort=False)
    columns = [c for c in seen if wanted is None or c in wanted]
    if columns != list(table.columns):  # no copy of the table when nothing is dropped or reordered
        table = table[columns]
    rejected = rejected_frame([row for p in parts for row in p.rejected])
    if len(table) == 0:
        first = (
            ""
            if rejected.empty
            else (
                f" ({len(rejected)} rows rejected, first at line {rejected['line'].iloc[0]}: "
                f"{rejected['reason'].iloc[0]})"
            )
        )
        raise DataError(
            f"`{source}` has no data rows that could be parsed{first}; check the extract."
        )
    table = _rename(table, settings.rename)
    reasons = rejected["reason"].str.replace(r"\d+", "N", regex=True).value_counts()
    summary = {
        "source": source,
        "source_kind": kind,
        "files": [p.info for p in parts],
        "formats": sorted({p.info["format"] for p in parts}),
        "partition_keys": sorted({k for p in parts for k in p.info.get("partition", {})}),
        "columns": [str(c) for c in table.columns],
        "renamed": dict(settings.rename),
        "rows_read": int(len(table) + len(rejected)),
        "rows_kept": len(table),
        "rows_rejected": len(rejected),
        "rejected_by_reason": {str(k): int(v) for k, v in reasons.items()},
    }
    return Ingested(
        table, rejected, int(len(table) + len(rejected)), [p.info["path"] for p in parts], summary
    )


def _rename(table: pd.DataFrame, rename: dict[str, str]) -> pd.DataFrame:
    """Apply ``input.rename``; unknown names and clashes are configuration errors."""
    if not rename:
        return table
    for old in rename:
        if old not in table.columns:
            raise ConfigError(
                f"`input.rename` names column `{old}`, which the input does not have"
                f"{close_matches(old, table.columns)}."
            )
    new_names = [rename.get(c, c).strip() for c in table.columns]
    dupes = sorted({n for n in new_names if new_names.count(n) > 1})
    if dupes:
        raise ConfigError(
            f"`input.rename` gives two columns the name `{dupes[0]}`; choose unique names."
        )
    out = table.copy(deep=False)
    out.columns = new_names
    return out
