"""The review loop's way back in: a reviewed evidence.csv becomes confirmed and rejected pairs.

A reviewer opens evidence.csv in a spreadsheet, writes `confirm` or `reject` (the allowed words,
`VERDICTS`) in the ``verdict`` column and a note in ``comment``, and saves. Spreadsheets save in
their locale: `read_review_file` accepts a comma, semicolon or tab separator, a UTF-8 or UTF-16
byte-order mark, and a legacy single-byte encoding (Windows-1252); decimal commas do not matter, as
only names, verdicts and comments are read. A file it cannot read is refused with one line saying
why; verdict words it does not know make one warning line, however many rows carry them.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import DataError
from ._exports import unneutralise

__all__ = ["VERDICTS", "read_review_file", "review_knowledge"]

VERDICTS = ("confirm", "reject")
_NEEDED = ("var_a", "var_b", "verdict", "comment")
_RENAME = {"signal A": "var_a", "signal B": "var_b"}
_FIX = ("save it from the spreadsheet as CSV (comma or semicolon separated) and keep the "
        "`signal A`, `signal B`, `verdict` and `comment` headers of evidence.csv")


def _decode(raw: bytes, p: Path) -> str:
    """The file's text: UTF-16 or UTF-8 (with or without BOM), else Windows-1252."""
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        try:
            return raw.decode("utf-16")
        except UnicodeDecodeError as err:
            raise DataError(f"Review file `{p}` cannot be read: broken UTF-16 text; {_FIX}.") from err
    if b"\x00" in raw[:4096]:
        raise DataError(f"Review file `{p}` cannot be read: it is not a text file (it holds NUL bytes); {_FIX}.")
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return raw.decode("cp1252", errors="replace")


def _column(header: str) -> str:
    name = unneutralise(str(header)).strip()
    return _RENAME.get(name, name)


def _header_fields(line: str, sep: str) -> list[str]:
    return [_column(c) for c in next(csv.reader([line], delimiter=sep), [])]


def read_review_file(path: str | Path) -> pd.DataFrame:
    """Read a reviewed evidence.csv back: columns ``var_a, var_b, verdict, comment`` (strings).

    Parameters
    ----------
    path : str or Path
        A copy of ``evidence.csv`` with the ``verdict`` and ``comment`` columns filled in
        (headers ``signal A`` / ``signal B``, or ``var_a`` / ``var_b``), as a spreadsheet saved it.

    Returns
    -------
    pandas.DataFrame
        One row per data row of the file (row ``i`` is spreadsheet row ``i + 2``), empty strings
        where the reviewer wrote nothing, with the apostrophes added against formula injection
        removed.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "r.csv"
    >>> _ = p.write_bytes("\\ufeffsignal A;signal B;p-value;verdict;comment\\nx;y;0,5;keep;'=fine\\n".encode())
    >>> read_review_file(p).to_dict("records")
    [{'var_a': 'x', 'var_b': 'y', 'verdict': 'keep', 'comment': '=fine'}]
    """
    p = Path(path)
    if not p.is_file():
        raise DataError(f"Review file `{p}` does not exist; check `knowledge.review_file`.")
    text = _decode(p.read_bytes(), p)
    first = text.split("\n", 1)[0].rstrip("\r")
    if not first.strip():
        raise DataError(f"Review file `{p}` cannot be read: it is empty or its first line is blank; {_FIX}.")
    # the separator is the one whose header has the columns we need (most frequent first)
    seps = sorted([",", ";", "\t"], key=lambda s: -first.count(s))
    sep = next((s for s in seps if set(_NEEDED) <= set(_header_fields(first, s))), None)
    if sep is None:
        best = _header_fields(first, seps[0])
        missing = [c for c in _NEEDED if c not in best]
        raise DataError(
            f"Review file `{p}` cannot be read: no header line with {', '.join(f'`{m}`' for m in missing)} "
            f"was found (separators tried: comma, semicolon, tab); {_FIX}."
        )
    try:
        frame = pd.read_csv(io.StringIO(text), sep=sep, dtype=str, keep_default_na=False, quotechar='"')
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as err:
        why = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise DataError(f"Review file `{p}` cannot be read: {why}; {_FIX}.") from err
    frame.columns = [_column(c) for c in frame.columns]
    out = frame.loc[:, ~frame.columns.duplicated()][list(_NEEDED)].copy()
    for col in out.columns:
        out[col] = out[col].map(lambda s: unneutralise(str(s))).astype(object)
    return out.reset_index(drop=True)


def _first_rows(items: Sequence[tuple[int, str]], limit: int = 3) -> str:
    shown = ", ".join(f"row {row} `{word}`" for row, word in items[:limit])
    return shown + (", ..." if len(items) > limit else "")


def review_knowledge(
    path: str | Path | None, names: Sequence[str]
) -> tuple[list[tuple[str, str]], list[tuple[str, str]], list[dict[str, Any]], list[str]]:
    """Pairs confirmed and rejected in a review file, their comments, and one-line warnings.

    Returns ``(confirm, reject, comments, warnings)``. Rows with an empty verdict are skipped.
    Verdicts other than `VERDICTS` (case and spaces ignored) and verdicts on signals this run does
    not have are left out, each kind reported in one line naming the first rows and the count.
    """
    if not path:
        return [], [], [], []
    review = read_review_file(path)
    known = set(names)
    confirm: list[tuple[str, str]] = []
    reject: list[tuple[str, str]] = []
    comments: list[dict[str, Any]] = []
    unknown_word: list[tuple[int, str]] = []
    unknown_signal: list[tuple[int, str]] = []
    for i, row in enumerate(review.to_dict("records")):
        verdict = str(row.get("verdict") or "").strip().lower()
        a, b = str(row.get("var_a")), str(row.get("var_b"))
        if not verdict:
            continue
        if verdict not in VERDICTS:
            unknown_word.append((i + 2, verdict))
            continue
        missing = [n for n in (a, b) if n not in known]
        if missing:
            unknown_signal.append((i + 2, f"{a} - {b}"))
            continue
        (confirm if verdict == "confirm" else reject).append((a, b))
        comments.append({"var_a": min(a, b), "var_b": max(a, b), "verdict": verdict,
                         "comment": str(row.get("comment") or "")})
    warnings = []
    if unknown_word:
        n = len(unknown_word)
        warnings.append(
            f"Review file `{path}`: {n} row{'s' if n > 1 else ''} with a verdict other than "
            f"{' or '.join(f'`{v}`' for v in VERDICTS)} ({_first_rows(unknown_word)}) "
            f"{'were' if n > 1 else 'was'} ignored; the allowed words are {', '.join(VERDICTS)}, "
            "or leave the cell empty."
        )
    if unknown_signal:
        n = len(unknown_signal)
        warnings.append(
            f"Review file `{path}`: {n} verdict{'s' if n > 1 else ''} on signals this run does not have "
            f"({_first_rows(unknown_signal)}) {'were' if n > 1 else 'was'} not applied; the signal was "
            "renamed or dropped (see cleaning.json)."
        )
    return confirm, reject, comments, warnings
