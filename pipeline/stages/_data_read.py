"""Readers behind the ingest stage: finding files, recognising formats, decoding, parsing (private).

Every reader returns a `_Part`: the table of one file (index = 1-based line number in the file), the
rows it could not parse, and a JSON-able description of how it was read.
"""

from __future__ import annotations

import codecs
import csv
import glob
import io
import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.json as pa_json
import pyarrow.parquet as pq

from ..config import InputSettings, LimitSettings
from ..errors import ConfigError, DataError, LimitError
from ._data_common import close_matches

DELIMITERS = [",", "\t", ";", "|", " "]
_DELIMITER_NAMES = {",": "comma", "\t": "tab", ";": "semicolon", "|": "pipe", " ": "space"}
_KNOWN_SUFFIXES = {
    ".csv": "csv",
    ".tsv": "csv",
    ".txt": "csv",
    ".dat": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".parq": "parquet",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".json": "jsonl",
}
_COMPRESSED = [  # (magic, codec, suffix, name); xz is read with the standard library, the rest with pyarrow
    (b"\x1f\x8b", "gzip", ".gz", "gzip"),
    (b"BZh", "bz2", ".bz2", "bzip2"),
    (b"\xfd7zXZ\x00", "xz", ".xz", "xz"),
    (b"\x28\xb5\x2f\xfd", "zstd", ".zst", "zstd"),
]
_MAGIC = [
    (b"\x89PNG", "a PNG image"),
    (b"\x1f\x8b", "gzip-compressed data"),
    (b"PK\x03\x04", "a ZIP archive"),
    (b"%PDF", "a PDF document"),
    (b"\xff\xd8\xff", "a JPEG image"),
    (b"GIF8", "a GIF image"),
    (b"BZh", "bzip2-compressed data"),
    (b"\xfd7zXZ", "xz-compressed data"),
    (b"7z\xbc\xaf", "a 7-Zip archive"),
    (b"\x28\xb5\x2f\xfd", "zstd-compressed data"),
    (b"ARROW1", "an Arrow IPC file"),
    (b"\x7fELF", "an executable"),
]
_UTF16_BOMS = (b"\xff\xfe", b"\xfe\xff")
_SAMPLE_BYTES = 1 << 16
_SAMPLE_LINES = 50
# Undecodable lines are quarantined while they stay few; beyond this the encoding is wrong.
_MAX_BAD_LINES_FRACTION = 0.01
_MAX_BAD_LINES_ALWAYS_OK = 10
_HIVE_DEFAULT = "__HIVE_DEFAULT_PARTITION__"


@dataclass(frozen=True)
class _Part:
    """One file as read: its table, its rejected rows and how it was read."""

    table: pd.DataFrame
    rejected: list = field(default_factory=list)  # (source, line, reason, raw)
    info: dict = field(default_factory=dict)


# ----------------------------------------------------------------------------- finding the files


def find_files(source: str | Path) -> tuple[list[tuple[Path, dict[str, str]]], str]:
    """The files behind `source` (file, glob or folder) with their ``key=value`` partition values."""
    text = str(source)
    path = Path(text)
    if path.is_file():
        return [(path, {})], "file"
    if path.is_dir():
        files = [
            p for p in sorted(path.rglob("*")) if p.is_file() and not _hidden(p.relative_to(path))
        ]
        files = _outside_run_folders(files)
        files = [p for p in files if _data_suffix(p) in _KNOWN_SUFFIXES] or files
        if not files:
            raise DataError(
                f"Folder `{path}` holds no CSV, Parquet or JSON-lines files; check the input path."
            )
        return [(p, _partition_values(p.relative_to(path))) for p in files], "folder"
    if glob.has_magic(text):
        files = sorted(Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file())
        files = [p for p in files if not p.name.startswith((".", "_"))]
        if not files:
            raise DataError(f"No files match the pattern `{text}`; check the input path.")
        root = _glob_root(text)
        return [(p, _partition_values(_relative(p, root))) for p in files], "glob"
    raise DataError(f"Input `{text}` does not exist; check the path (a file, a glob or a folder).")


def _outside_run_folders(files: list[Path]) -> list[Path]:
    """The files that do not lie in an edgeproof run folder (an earlier run written into the input)."""
    from ..runs import is_run_folder

    runs = {p.parent for p in files if p.name == "manifest.json" and is_run_folder(p.parent)}
    if not runs:
        return files
    return [p for p in files if not runs.intersection(p.parents)]


def _data_suffix(path: Path) -> str:
    """The suffix that names the format, behind a compression suffix (``x.csv.gz`` -> ``.csv``)."""
    suffixes = [s.lower() for s in path.suffixes]
    if len(suffixes) > 1 and suffixes[-1] in {c[2] for c in _COMPRESSED}:
        return suffixes[-2]
    return path.suffix.lower()


def decompress(path: Path, raw: bytes) -> bytes:
    """The bytes of a gzip, bzip2, xz or zstd compressed file, decompressed; other bytes as they are."""
    for magic, codec, _suffix, name in _COMPRESSED:
        if not raw.startswith(magic) or (codec == "bz2" and raw[3:4] not in b"123456789"):
            continue
        try:
            if codec == "xz":
                import lzma

                return lzma.decompress(raw)
            with pa.CompressedInputStream(pa.BufferReader(raw), codec) as stream:
                return stream.read()
        except (pa.ArrowException, OSError, EOFError, ValueError) as err:
            raise DataError(
                f"`{path}` is {name}-compressed but could not be decompressed "
                f"({_first_line(err)}); check that the file was copied whole."
            ) from err
    return raw


def _first_line(err: BaseException) -> str:
    return (str(err).splitlines() or [type(err).__name__])[0][:160]


def _hidden(rel: Path) -> bool:
    return any(part.startswith((".", "_")) for part in rel.parts)


def _glob_root(pattern: str) -> Path:
    parts = Path(pattern).parts
    root: list[str] = []
    for part in parts:
        if glob.has_magic(part):
            break
        root.append(part)
    return Path(*root) if root else Path(".")


def _relative(path: Path, root: Path) -> Path:
    try:
        return path.relative_to(root)
    except ValueError:
        return Path(path.name)


def _partition_values(rel: Path) -> dict[str, str]:
    values: dict[str, str] = {}
    for part in rel.parts[:-1]:
        m = re.fullmatch(r"([^=]+)=(.*)", part)
        if m:
            values[unquote(m.group(1)).strip()] = unquote(m.group(2))
    return values


# ----------------------------------------------------------------------------- recognising formats


def detect_format(path: Path, head: bytes, settings: InputSettings) -> str:
    """``csv``, ``parquet`` or ``jsonl`` for one file; `DataError` for binary files of other kinds."""
    if head.startswith(b"PAR1") and settings.format in ("auto", "parquet"):
        return "parquet"
    fmt: str = settings.format
    if fmt == "auto":
        fmt = _KNOWN_SUFFIXES.get(_data_suffix(path), "")
    if fmt == "parquet":
        raise DataError(
            f"`{path}` does not look like a Parquet file (it does not start with `PAR1`); "
            "check the file or set `input.format`."
        )
    what = next((name for magic, name in _MAGIC if head.startswith(magic)), None)
    utf16 = head.startswith(_UTF16_BOMS) or settings.encoding.lower().replace("-", "").startswith(
        ("utf16", "utf32")
    )
    if what is None and b"\x00" in head and not utf16:
        what = "binary data (it holds NUL bytes)"
    if what is not None:
        raise DataError(
            f"`{path}` does not look like a CSV/Parquet/JSON-lines file (it looks like {what}); "
            "give the extract itself as input (gzip, bzip2, xz and zstd compression are read)."
        )
    if not fmt:
        stripped = head.lstrip(b"\xef\xbb\xbf \t\r\n")
        fmt = "jsonl" if stripped.startswith(b"{") else "csv"
    return fmt


# ----------------------------------------------------------------------------- decoding


def to_utf8(raw: bytes, path: Path, settings: InputSettings) -> tuple[bytes, list[tuple[int, str]]]:
    """The file as UTF-8 bytes, with undecodable lines blanked out and returned as (line, text).

    Blanking keeps every other line at its place, so line numbers stay those of the file.
    """
    try:
        encoding = codecs.lookup(settings.encoding).name
    except LookupError as err:
        raise ConfigError(
            f"`input.encoding` = {settings.encoding!r} is not an encoding Python knows; "
            "use e.g. utf-8, latin-1 or cp1252."
        ) from err
    if raw.startswith(_UTF16_BOMS) and not encoding.startswith(("utf-16", "utf-32")):
        raise DataError(
            f"`{path}` starts with a UTF-16 byte-order mark; set `input.encoding: utf-16`."
        )
    if encoding == "utf-8":
        if raw.startswith(codecs.BOM_UTF8):
            raw = raw[3:]
        if raw.isascii():  # one pass in C that stops at the first byte above 127
            return raw, []
        try:
            raw.decode("utf-8")
            return raw, []
        except UnicodeDecodeError:
            text = raw.decode("utf-8", "surrogateescape")
    else:
        try:
            return raw.decode(encoding).lstrip("\ufeff").encode("utf-8"), []
        except UnicodeDecodeError:
            text = raw.decode(encoding, "surrogateescape")
    return _blank_bad_lines(text, path, settings, encoding)


def _blank_bad_lines(
    text: str, path: Path, settings: InputSettings, encoding: str
) -> tuple[bytes, list[tuple[int, str]]]:
    bad: list[tuple[int, str]] = []
    pieces: list[str] = []
    kept_until = 0
    line_no, counted_to = 1, 0
    first_byte = None
    for match in re.finditer("[\udc80-\udcff]", text):
        if match.start() < kept_until:
            continue
        start = text.rfind("\n", 0, match.start()) + 1
        end = text.find("\n", match.start())
        end = len(text) if end < 0 else end
        line_no += text.count("\n", counted_to, start)
        counted_to = start
        if first_byte is None:
            first_byte = ord(match.group()) - 0xDC00
        shown = text[start:end].rstrip("\r").encode(encoding, "surrogateescape")
        bad.append((line_no, shown.decode(encoding, "backslashreplace")))
        pieces.append(text[kept_until:start])
        kept_until = end
    pieces.append(text[kept_until:])
    n_lines = text.count("\n") + 1
    first_line = bad[0][0]
    header_line = len(text) - len(text.lstrip("\r\n"))
    header_no = text.count("\n", 0, header_line) + 1
    too_many = len(bad) > max(_MAX_BAD_LINES_ALWAYS_OK, _MAX_BAD_LINES_FRACTION * n_lines)
    if (
        settings.encoding_errors == "refuse"
        or too_many
        or (settings.header and first_line == header_no)
    ):
        why = f"{len(bad)} lines" if too_many else f"line {first_line}"
        raise DataError(
            f"`{path}` line {first_line} has bytes that are not valid {encoding} (0x{first_byte:02x}; "
            f"{why} affected); set `input.encoding` to the file's encoding (e.g. latin-1 or cp1252) "
            "or fix the extract."
        )
    return "".join(pieces).encode("utf-8", "surrogateescape"), bad


# ----------------------------------------------------------------------------- line bookkeeping


def nonempty_lines(data: bytes) -> np.ndarray:
    """1-based numbers of the lines that hold something (the records a CSV/JSON parser sees)."""
    if not data:
        return np.zeros(0, dtype=np.int64)
    if b"\n\n" not in data and b"\n\r\n" not in data and data[:1] not in (b"\n", b"\r"):
        n_lines = data.count(b"\n") + (0 if data.endswith(b"\n") else 1)
        if not data.endswith(b"\n\r"):
            return np.arange(1, n_lines + 1, dtype=np.int64)  # no blank line anywhere
    b = np.frombuffer(data, dtype=np.uint8)
    nl = np.flatnonzero(b == 10)
    starts = np.concatenate(([0], nl + 1))
    ends = np.concatenate((nl, [b.size]))
    length = ends - starts
    has_cr = np.zeros(length.size, dtype=bool)
    pos = length > 0
    has_cr[pos] = b[ends[pos] - 1] == 13
    length = length - has_cr
    return np.flatnonzero(length > 0).astype(np.int64) + 1


def _line_count(data: bytes) -> int:
    """The number of lines, blank ones included (a last line without a line break counts)."""
    if not data:
        return 0
    return data.count(b"\n") + (0 if data.endswith(b"\n") else 1)


_THREADED_FROM_BYTES = 16 << 20  # smaller files parse quickly on one thread; the check would cost more


def _quotes_close_on_each_line(data: bytes, quote: str) -> bool:
    """True when no line break falls inside quotes (every quoted value opens and closes on its
    line; a doubled quote inside a value flips the state twice), i.e. every line up to the last
    line break holds an even number of quote characters."""
    return _scan_quotes(data, quote)[0]


def _scan_quotes(data: bytes, quote: str) -> tuple[bool, int | None]:
    """`_quotes_close_on_each_line`, and the number of lines (`_line_count`) when the whole file was
    scanned on the way (None otherwise: no need to count them twice). Vectorised, a block of lines at
    a time (bounded memory): the parity of each line's quotes by one XOR reduction per line."""
    q = quote.encode("utf-8")
    if len(q) != 1:
        return False, None
    if q not in data:
        return True, None
    b = np.frombuffer(data, dtype=np.uint8)
    start, breaks = 0, 0
    while start < b.size:
        stop = data.rfind(b"\n", start, start + _QUOTE_BLOCK_BYTES) + 1  # the block ends at a line break
        if stop <= start:  # a line longer than the block: take up to its end
            stop = data.find(b"\n", start + _QUOTE_BLOCK_BYTES) + 1
        if stop <= 0:  # no line break after `start`: nothing left that could fall inside quotes
            break
        block = b[start:stop]
        line_starts = np.flatnonzero(block[:-1] == 10) + 1
        odd = np.bitwise_xor.reduceat((block == q[0]).view(np.uint8), np.concatenate(([0], line_starts)))
        if odd.any():
            return False, None
        breaks += line_starts.size + 1  # the block's line breaks: one before each line start, one at its end
        start = stop
    return True, breaks + (0 if data.endswith(b"\n") else 1)


_QUOTE_BLOCK_BYTES = 1 << 24


def _record_start_lines(text: str, delimiter: str, quote_char: str) -> np.ndarray:
    """Start line of each record when quoted values span lines (slow path, csv module)."""
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, quotechar=quote_char)
    starts, previous = [], 0
    for row in reader:
        if row:
            starts.append(previous + 1)
        previous = reader.line_num
    return np.asarray(starts, dtype=np.int64)


def _check_columns(names: list[str], path: Path, limits: LimitSettings, wanted: list[str] | None):
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise DataError(
                f"Column `{name}` appears more than once in `{path}`; give each column a unique "
                "name in the extract."
            )
        seen.add(name)
    count = len([n for n in names if wanted is None or n in wanted])
    if count > limits.max_columns:
        raise LimitError(
            f"`{path}` has {count} columns, above `limits.max_columns` = {limits.max_columns}; "
            "select the signals with `input.columns` or raise the limit."
        )


def _check_rows(n_rows: int, total_before: int, path: Path, limits: LimitSettings) -> None:
    if total_before + n_rows > limits.max_rows:
        raise LimitError(
            f"`{path}` brings the input to {total_before + n_rows} rows, above `limits.max_rows` = "
            f"{limits.max_rows}; sample the extract or raise the limit."
        )


def _clean_names(raw_names: list[str]) -> list[str]:
    return [str(n).replace("\x00", "").strip() or f"column_{i + 1}" for i, n in enumerate(raw_names)]


# ----------------------------------------------------------------------------- CSV


def sniff_delimiter(lines: list[str], quote_char: str) -> str:
    """The delimiter among , tab ; | and space that splits the sample lines most consistently."""
    sample = "\n".join(lines)
    try:
        guess: str | None = csv.Sniffer().sniff(sample, delimiters="".join(DELIMITERS)).delimiter
    except csv.Error:
        guess = None
    scores: dict[str, tuple[float, int]] = {}
    for delim in DELIMITERS:
        counts = [
            len(row) for row in csv.reader(lines, delimiter=delim, quotechar=quote_char or None)
        ]
        if not counts:
            continue
        modal = max(set(counts), key=counts.count)
        if modal > 1:
            scores[delim] = (counts.count(modal) / len(counts), modal)
    if guess in scores and scores[guess][0] >= 0.9:
        return guess
    if scores:
        return max(scores, key=lambda d: (scores[d][0], -DELIMITERS.index(d)))
    return guess or ","


def read_csv(
    path: Path,
    raw: bytes,
    settings: InputSettings,
    limits: LimitSettings,
    wanted: list[str] | None,
    rows_before: int,
) -> _Part:
    """Read one delimited text file with pyarrow; ragged and undecodable rows are rejected."""
    data, bad_lines = to_utf8(raw, path, settings)
    head = data[:_SAMPLE_BYTES].decode("utf-8", "replace")
    if len(data) > _SAMPLE_BYTES and "\n" in head:
        head = head[: head.rfind("\n")]
    lines = [ln for ln in head.splitlines() if ln.strip()][:_SAMPLE_LINES]
    if not lines or (settings.header and len(lines) == 1 and len(data) <= _SAMPLE_BYTES):
        raise DataError(
            f"`{path}` has no data rows"
            + (" (only a header line)" if lines else " (it is empty)")
            + "; check the extract."
        )
    quote = settings.quote_char or None
    delimiter = (
        settings.delimiter
        if settings.delimiter is not None
        else sniff_delimiter(lines, quote or '"')
    )
    first = next(csv.reader([lines[0]], delimiter=delimiter, quotechar=quote or '"'))
    raw_names = first if settings.header else [f"column_{i + 1}" for i in range(len(first))]
    names = _clean_names(raw_names)
    if len(names) == 1:
        how = "the given" if settings.delimiter is not None else "the detected"
        raise DataError(
            f"Only one column (`{names[0][:60]}`) was found in `{path}` with {how} delimiter "
            f"{delimiter!r}; set `input.delimiter` to the character between the fields."
        )
    _check_columns(names, path, limits, wanted)
    # Fast path: when no quoted value can span lines, parse in blocks on pyarrow's threads. Rows it
    # rejects may lack their numbers there, so any rejected row sends the file down the careful path.
    fast, n_scanned = False, None
    if len(data) >= _THREADED_FROM_BYTES:
        fast, n_scanned = _scan_quotes(data, quote) if quote else (True, None)
    n_lines = n_scanned if n_scanned is not None else _line_count(data)
    records: np.ndarray | None = None  # the record lines, found only when not every line is one record
    if n_lines - int(settings.header) + rows_before > limits.max_rows:  # the count of lines bounds it
        records = nonempty_lines(data)
        _check_rows(len(records) - int(settings.header), rows_before, path, limits)

    raw_by_name = dict(zip(names, raw_names))
    include = [raw_by_name[n] for n in names if wanted is None or n in wanted]
    rejected: list[tuple[int, str, str]] = []  # (record number, reason, raw)

    def on_invalid(row: Any) -> str:
        reason = (
            f"has {row.actual_columns} fields, expected {row.expected_columns}"
            f" ({'too few' if row.actual_columns < row.expected_columns else 'too many'})"
        )
        rejected.append((row.number or -1, reason, row.text))
        return "skip"

    column_types: dict[str, pa.DataType] = {}
    for _ in range(2 * len(names) + 2):
        rejected.clear()
        read_opts = pa_csv.ReadOptions(
            use_threads=fast,
            column_names=None if settings.header else raw_names,
            encoding="utf8",
        )
        parse_opts = pa_csv.ParseOptions(
            delimiter=delimiter,
            quote_char=quote if quote else False,
            newlines_in_values=not fast,
            invalid_row_handler=on_invalid,
        )
        conv_opts = pa_csv.ConvertOptions(
            include_columns=include,
            null_values=list(settings.null_values),
            strings_can_be_null=True,
            quoted_strings_can_be_null=True,
            true_values=["true", "True", "TRUE"],
            false_values=["false", "False", "FALSE"],
            column_types=column_types,
        )
        try:
            table = pa_csv.read_csv(pa.BufferReader(data), read_opts, parse_opts, conv_opts)
            if fast and rejected:
                fast = False
                continue
            break
        except pa.ArrowInvalid as err:
            m = re.search(r"In CSV column #(\d+): CSV conversion error", str(err))
            if not m:
                raise DataError(
                    f"`{path}` could not be parsed as CSV: {str(err).splitlines()[0]}; "
                    "check `input.delimiter` and `input.quote_char`."
                ) from err
            column_types[include[int(m.group(1))]] = pa.string()
    frame = table.to_pandas(split_blocks=True)  # one block per column: numbers are not copied again
    frame.columns = [n for n in names if wanted is None or n in wanted]

    n_records = len(frame) + len(rejected) + int(settings.header)
    if n_records == n_lines and b"\r" not in data and not any(r[0] < 0 for r in rejected):
        # every line is one record (a blank line or a value spanning lines would leave fewer records
        # than lines, and without carriage returns no line holds two)
        records = np.arange(1, n_lines + 1, dtype=np.int64)
    else:
        records = nonempty_lines(data) if records is None else records
        if n_records != len(records) or any(r[0] < 0 for r in rejected):
            records = _record_start_lines(data.decode("utf-8", "replace"), delimiter, quote or '"')
    header_rec = 1 if settings.header else 0
    bad_rec = np.asarray([r[0] for r in rejected], dtype=np.int64)
    keep = np.ones(len(records), dtype=bool)
    keep[:header_rec] = False
    valid = bad_rec[(bad_rec >= 1) & (bad_rec <= len(records))]
    keep[valid - 1] = False
    row_lines = records[keep]
    if len(row_lines) != len(frame):  # last resort: ordinal positions
        row_lines = np.arange(len(frame), dtype=np.int64) + 1 + header_rec
    frame.index = pd.Index(row_lines, name="line")

    out_rows = [
        (str(path), int(records[r - 1]) if 1 <= r <= len(records) else -1, reason, text)
        for r, reason, text in rejected
    ]
    out_rows += [
        (str(path), line, f"bytes not valid {settings.encoding}", text) for line, text in bad_lines
    ]
    info = {
        "path": str(path),
        "format": "csv",
        "rows": len(frame),
        "rejected": len(out_rows),
        "delimiter": delimiter,
        "delimiter_detected": settings.delimiter is None,
        "delimiter_name": _DELIMITER_NAMES.get(delimiter, delimiter),
        "encoding": settings.encoding,
        "header": settings.header,
        "columns": list(frame.columns),
        "available": names,
    }
    return _Part(frame, out_rows, info)


# ----------------------------------------------------------------------------- Parquet


def read_parquet(
    path: Path,
    settings: InputSettings,
    limits: LimitSettings,
    wanted: list[str] | None,
    rows_before: int,
) -> _Part:
    """Read one Parquet file; the index of the table is the 1-based row number in the file."""
    try:
        pfile = pq.ParquetFile(path)
    except (pa.ArrowException, OSError) as err:
        raise DataError(
            f"`{path}` does not look like a CSV/Parquet/JSON-lines file (it is not a readable "
            f"Parquet file: {str(err).splitlines()[0]}); check the file."
        ) from err
    raw_names = [n for n in pfile.schema_arrow.names if not n.startswith("__index_level_")]
    names = _clean_names(raw_names)
    _check_columns(names, path, limits, wanted)
    n_rows = pfile.metadata.num_rows
    _check_rows(n_rows, rows_before, path, limits)
    chosen = [r for r, n in zip(raw_names, names) if wanted is None or n in wanted]
    try:
        table = pfile.read(columns=chosen, use_pandas_metadata=False)
        table = table.rename_columns([n for n in names if wanted is None or n in wanted])
        frame = _arrow_frame(table)
    except (pa.ArrowException, OSError) as err:
        raise DataError(
            f"`{path}` could not be read as Parquet: {str(err).splitlines()[0]}."
        ) from err
    _check_columns([str(c) for c in frame.columns], path, limits, None)
    frame.index = pd.Index(np.arange(1, len(frame) + 1, dtype=np.int64), name="line")
    info = {
        "path": str(path),
        "format": "parquet",
        "rows": len(frame),
        "rejected": 0,
        "columns": list(frame.columns),
        "available": names,
    }
    return _Part(frame, [], info)


# ----------------------------------------------------------------------------- JSON lines


def read_jsonl(
    path: Path,
    raw: bytes,
    settings: InputSettings,
    limits: LimitSettings,
    wanted: list[str] | None,
    rows_before: int,
) -> _Part:
    """Read one JSON-lines file; lines that are not a JSON object are rejected."""
    data, bad_lines = to_utf8(raw, path, settings)
    records = nonempty_lines(data)
    _check_rows(len(records), rows_before, path, limits)
    rejected: list[tuple[str, int, str, str]] = []
    if data.lstrip(b" \t\r\n").startswith(b"["):
        frame, rejected = _json_array(data, path)
        frame = _plain_values(frame)
        records = np.asarray(frame.index, dtype=np.int64)
    else:
        try:
            frame = _arrow_frame(pa_json.read_json(pa.BufferReader(data)))
        except pa.ArrowInvalid:
            frame, rejected = _jsonl_slow(data, path, records)
            frame = _plain_values(frame)
    if frame.empty or frame.shape[1] == 0:
        raise DataError(f"`{path}` has no data rows; check the extract.")
    raw_names = [str(c) for c in frame.columns]
    names = _clean_names(raw_names)
    _check_columns(names, path, limits, wanted)
    frame.columns = names
    if wanted is not None:
        frame = frame[[n for n in names if n in wanted]]
    frame.index = pd.Index(records[: len(frame)] if not rejected else frame.index, name="line")
    rejected += [(str(path), ln, f"bytes not valid {settings.encoding}", t) for ln, t in bad_lines]
    info = {
        "path": str(path),
        "format": "jsonl",
        "rows": len(frame),
        "rejected": len(rejected),
        "encoding": settings.encoding,
        "columns": list(frame.columns),
        "available": names,
    }
    return _Part(frame, rejected, info)


def _arrow_frame(table: pa.Table) -> pd.DataFrame:
    """A typed table as a DataFrame of plain values: struct columns split into one column per field
    (``s.q``), however deep they nest; list and map columns as their JSON text. Arrow columns hold
    one type each, so only the nested ones are looked at value by value."""
    while any(pa.types.is_struct(t) for t in table.schema.types):
        table = table.flatten()
    frame = table.to_pandas(split_blocks=True)  # one block per column: numbers are not copied again
    for name, typ in zip(table.column_names, table.schema.types):
        if pa.types.is_nested(typ) or (pa.types.is_dictionary(typ) and pa.types.is_nested(typ.value_type)):
            frame[name] = frame[name].map(_as_text)
    return frame


def _as_text(value: Any) -> Any:
    """A nested or off-type value as its JSON text (a list, a map, a number among words)."""
    if value is None or isinstance(value, str) or (isinstance(value, float) and np.isnan(value)):
        return value
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, np.generic):
        value = value.item()
    return json.dumps(value, default=str)


def _kind(value: Any) -> str:
    if isinstance(value, str):
        return "text"
    if isinstance(value, (bool, np.bool_)):
        return "bool"
    if isinstance(value, (int, float, np.number)):
        return "number"
    return "nested"


def _plain_values(frame: pd.DataFrame) -> pd.DataFrame:
    """Every column of a frame built from Python objects (JSON read line by line) holds one kind of
    plain value: lists, maps and other nested values become their JSON text, and a column mixing
    numbers with words becomes text (the clean stage then decides, per `clean.text_in_numeric`,
    what the words in a numeric column mean)."""
    for col in frame.columns:
        if frame[col].dtype != object:
            continue
        kinds = set(frame[col].dropna().map(_kind))
        if len(kinds) > 1 or "nested" in kinds:
            frame[col] = frame[col].map(_as_text)
    return frame


def _json_array(data: bytes, path: Path) -> tuple[pd.DataFrame, list]:
    """A file holding one JSON array of objects: each element is a row, numbered from 1."""
    try:
        value = json.loads(data.decode("utf-8", "replace"))
    except json.JSONDecodeError as err:
        raise DataError(
            f"`{path}` starts like a JSON array but is not valid JSON ({err.msg} at line {err.lineno}); "
            "fix the file or write one JSON object per line."
        ) from err
    if not isinstance(value, list):
        raise DataError(f"`{path}` is not a JSON array of objects; write one JSON object per line.")
    objects, kept, rejected = [], [], []
    for number, item in enumerate(value, start=1):
        if isinstance(item, dict):
            objects.append(item)
            kept.append(number)
        else:
            rejected.append((str(path), number, "array element is not a JSON object", json.dumps(item, default=str)[:200]))
    frame = pd.json_normalize(objects) if objects else pd.DataFrame()
    frame.index = pd.Index(np.asarray(kept, dtype=np.int64), name="line")
    return frame, rejected


def _jsonl_slow(data: bytes, path: Path, records: np.ndarray) -> tuple[pd.DataFrame, list]:
    """Line-by-line fallback when pyarrow refuses the file (a bad line or changing types)."""
    lines = data.decode("utf-8", "replace").split("\n")
    objects, kept, rejected = [], [], []
    for number in records:
        text = lines[number - 1].rstrip("\r")
        try:
            value = json.loads(text)
        except json.JSONDecodeError as err:
            rejected.append((str(path), int(number), f"not valid JSON ({err.msg})", text))
            continue
        if not isinstance(value, dict):
            rejected.append((str(path), int(number), "not a JSON object", text))
            continue
        objects.append(value)
        kept.append(int(number))
    frame = pd.json_normalize(objects) if objects else pd.DataFrame()
    frame.index = pd.Index(np.asarray(kept, dtype=np.int64), name="line")
    return frame, rejected


def partition_columns(part: _Part, values: dict[str, str], wanted: list[str] | None) -> _Part:
    """Add the ``key=value`` folder values of a partition as columns (unless the file has them)."""
    frame = part.table
    added = {}
    for key, value in values.items():
        if key in frame.columns or (wanted is not None and key not in wanted):
            continue
        added[key] = pd.Series(
            [None if value == _HIVE_DEFAULT else value] * len(frame),
            index=frame.index,
            dtype=object,
        )
    if not added:
        return part
    frame = pd.concat([frame, pd.DataFrame(added, index=frame.index)], axis=1)
    info = dict(
        part.info,
        partition=values,
        columns=list(frame.columns),
        available=list(part.info.get("available", [])) + list(values),
    )
    return _Part(frame, part.rejected, info)


def check_wanted(wanted: list[str] | None, seen: list[str], what: str = "input.columns") -> None:
    """ConfigError naming the first selected column that no file holds, with close matches."""
    for name in wanted or []:
        if name not in seen:
            raise ConfigError(
                f"`{what}` names column `{name}`, which the input does not have"
                f"{close_matches(name, seen)}."
            )


# ----------------------------------------------------------------------------- a known true graph


def read_truth_edges(path: Path, input_path: Path) -> list[tuple[str, str]]:
    """The pairs of a truth file (``report.truth_file``) for this input; `ConfigError` when the file
    is not ``{"edges": [[a, b], ...]}`` or ``{"edges": {"<snapshot>": [[a, b], ...], ...}}``."""
    shape = 'a JSON object {"edges": [["a", "b"], ...]} (or {"edges": {"<snapshot>": [...]}})'
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as err:
        raise ConfigError(f"`report.truth_file` = `{path}` is not readable JSON ({_first_line(err)}); it must be {shape}.") from err
    edges = data.get("edges") if isinstance(data, dict) else None
    if isinstance(edges, dict):  # per snapshot
        edges = edges.get(input_path.stem) or edges.get(input_path.name) or next(iter(edges.values()), [])
    if not isinstance(edges, list) or not all(
        isinstance(e, (list, tuple)) and len(e) == 2 and all(isinstance(v, str) for v in e) for e in edges
    ):
        raise ConfigError(f"`report.truth_file` = `{path}` is not {shape}; fix the file or remove the key.")
    return [(str(a), str(b)) for a, b in edges]
