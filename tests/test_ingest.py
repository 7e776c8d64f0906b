"""Tests of the ingest stage: formats, delimiter detection, partitions, rejected rows, bad inputs."""

from __future__ import annotations

import gzip
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.config import config_from_dict
from pipeline.errors import ConfigError, DataError, LimitError
from pipeline.stages import ingest

BENCHMARKS = Path(__file__).resolve().parent / "data" / "benchmarks"
ALARM = BENCHMARKS / "alarm" / "data.txt"


def _cfg(**sections):
    return config_from_dict(sections)


def _write(folder: Path, name: str, content) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(content, str):
        path.write_text(content, encoding="utf-8")
    else:
        path.write_bytes(content)
    return path


def _read(path, **input_settings):
    cfg = _cfg(input=input_settings) if input_settings else _cfg()
    return ingest.run(path, cfg.input, cfg.limits)


# ----------------------------------------------------------------------------- the benchmark file


def test_alarm_benchmark_reads_with_detected_space_delimiter():
    """The ALARM sample (space-separated, header X1..X37) gives 10,000 integer rows x 37 columns."""
    got = _read(ALARM)
    assert got.table.shape == (10_000, 37)
    assert list(got.table.columns) == [f"X{i}" for i in range(1, 38)]
    assert got.summary["files"][0]["delimiter"] == " "
    assert all(pd.api.types.is_integer_dtype(t) for t in got.table.dtypes)
    # numpy is the outside reference for the values themselves
    raw = np.loadtxt(ALARM, skiprows=1, dtype=np.int64)
    np.testing.assert_array_equal(got.table.to_numpy(), raw)
    assert got.rows_read == 10_000 and got.rejected.empty
    assert got.table.index[0] == 2  # first data row is line 2 of the file


# ----------------------------------------------------------------------------- delimiters and formats


@pytest.mark.parametrize("delimiter", [",", ";", "\t", "|", " "])
def test_delimiter_detection_among_the_five_candidates(tmp_path, delimiter):
    """Each of , ; tab | and space is detected from the first lines."""
    rows = [f"zone{delimiter}latency{delimiter}ok"]
    rows += [
        f"z{i % 3}{delimiter}{i * 1.5}{delimiter}{'true' if i % 2 else 'false'}" for i in range(30)
    ]
    got = _read(_write(tmp_path, "x.csv", "\n".join(rows) + "\n"))
    assert list(got.table.columns) == ["zone", "latency", "ok"]
    assert got.summary["files"][0]["delimiter"] == delimiter
    assert got.table["latency"].dtype == np.float64


def test_comma_file_with_spaces_inside_values_is_not_read_as_space_separated(tmp_path):
    """Spaces inside quoted text values do not fool the detection into choosing space."""
    text = "site,owner,load\n" + "".join(f'"North {i % 2} hub","team a b",{i}\n' for i in range(20))
    got = _read(_write(tmp_path, "x.csv", text))
    assert list(got.table.columns) == ["site", "owner", "load"]
    assert got.table["site"].iloc[0] == "North 0 hub"


def test_parquet_and_json_lines_read_like_csv(tmp_path):
    """The same frame written as Parquet and as JSON lines comes back with the same values."""
    frame = pd.DataFrame({"zone": ["a", "b", "c"], "depth": [1, 2, 3], "hit": [0.5, 0.25, 0.125]})
    pq_path = tmp_path / "x.parquet"
    frame.to_parquet(pq_path)
    js_path = tmp_path / "x.jsonl"
    frame.to_json(js_path, orient="records", lines=True)
    for path in (pq_path, js_path):
        got = _read(path)
        assert list(got.table.columns) == ["zone", "depth", "hit"]
        assert got.table["depth"].tolist() == [1, 2, 3]
        assert got.table["hit"].tolist() == [0.5, 0.25, 0.125]


def test_json_lines_bad_line_is_rejected_with_its_line(tmp_path):
    """A line that is not JSON is rejected with its line number; the others are kept."""
    text = '{"a": 1, "b": "x"}\n{"a": 2, "b": "y"}\n{"a": 3, "b": \n{"a": 4, "b": "z"}\n'
    got = _read(_write(tmp_path, "x.jsonl", text))
    assert got.table["a"].tolist() == [1, 2, 4]
    assert got.rejected["line"].tolist() == [3]
    assert "not valid JSON" in got.rejected["reason"].iloc[0]
    assert got.rows_read == 4


def test_folder_of_key_value_partitions_adds_the_keys_as_columns(tmp_path):
    """`region=eu/part.csv` and `region=us/part.csv` give one table with a `region` column."""
    _write(tmp_path, "region=eu/day=1/part.csv", "a,b\n1,x\n2,y\n")
    _write(tmp_path, "region=us/day=1/part.csv", "a,b\n3,z\n")
    _write(tmp_path, "_SUCCESS", "")
    got = _read(tmp_path)
    assert list(got.table.columns) == ["a", "b", "region", "day"]
    assert got.table["region"].tolist() == ["eu", "eu", "us"]
    assert got.table["a"].tolist() == [1, 2, 3]
    assert len(got.sources) == 2 and got.summary["partition_keys"] == ["day", "region"]
    assert got.table.index.tolist() == [2, 3, 2]


def test_glob_reads_every_matching_file(tmp_path):
    """A glob pattern reads the matching files in sorted order."""
    _write(tmp_path, "s1.csv", "a,b\n1,x\n")
    _write(tmp_path, "s2.csv", "a,b\n2,y\n")
    _write(tmp_path, "other.txt", "not,this\n9,9\n")
    got = _read(str(tmp_path / "s*.csv"))
    assert got.table["a"].tolist() == [1, 2]


def test_columns_selection_and_rename(tmp_path):
    """`input.columns` keeps the named columns (input order) and `input.rename` renames them."""
    path = _write(tmp_path, "x.csv", "a,b,c\n1,2,3\n4,5,6\n")
    got = _read(path, columns=["c", "a"], rename={"c": "cache_hit"})
    assert list(got.table.columns) == ["a", "cache_hit"]
    assert got.table["cache_hit"].tolist() == [3, 6]


def test_quoted_value_spanning_two_lines_keeps_line_numbers_right(tmp_path):
    """A quoted value holding a newline does not shift the line numbers of later rejected rows."""
    text = 'a,b,c\n"two\nlines",1,2\n3,4,5\n6,7\n8,9,10\n'
    got = _read(_write(tmp_path, "x.csv", text))
    assert got.table["a"].tolist() == ["two\nlines", "3", "8"]
    assert got.rejected["line"].tolist() == [5]


# ----------------------------------------------------------------------------- bad inputs


def test_missing_file_names_the_path(tmp_path):
    """A path that does not exist is a DataError naming it."""
    with pytest.raises(DataError, match=r"`.*nothing_here\.csv` does not exist"):
        _read(tmp_path / "nothing_here.csv")


def test_empty_file_has_no_data_rows(tmp_path):
    """An empty file is a DataError saying it has no data rows."""
    path = _write(tmp_path, "empty.csv", "")
    with pytest.raises(DataError, match=r"empty\.csv` has no data rows"):
        _read(path)


def test_header_without_rows_has_no_data_rows(tmp_path):
    """A header line and nothing else is a DataError saying it has no data rows."""
    path = _write(tmp_path, "head.csv", "a,b,c\n")
    with pytest.raises(DataError, match=r"head\.csv` has no data rows"):
        _read(path)


@pytest.mark.parametrize(
    "content",
    [b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 4, gzip.compress(b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 4)],
    ids=["png", "gzipped-png"],
)
def test_binary_garbage_given_as_csv(tmp_path, content):
    """A PNG image, plain or gzip-compressed, named .csv is refused as not a CSV/Parquet/JSON-lines file
    (compressed CSV is read: tests/test_bad_inputs.py)."""
    path = _write(tmp_path, "extract.csv", content)
    with pytest.raises(
        DataError, match=r"extract\.csv` does not look like a CSV/Parquet/JSON-lines file"
    ):
        _read(path)


def test_wrong_delimiter_finds_only_one_column(tmp_path):
    """A comma file read with `input.delimiter: ;` lands in one column and says how to fix it."""
    path = _write(tmp_path, "x.csv", "a,b,c\n1,2,3\n4,5,6\n")
    with pytest.raises(
        DataError, match=r"Only one column .* was found in `.*x\.csv`.*`input\.delimiter`"
    ):
        _read(path, delimiter=";")


def test_ragged_rows_are_rejected_and_reading_continues(tmp_path):
    """Rows with too few or too many fields go to `rejected` with file, line, reason and raw text."""
    text = "a,b,c\n1,2,3\n4,5\n\n6,7,8,9\n10,11,12\n"
    path = _write(tmp_path, "ragged.csv", text)
    got = _read(path)
    assert got.table["a"].tolist() == [1, 10]
    assert got.table.index.tolist() == [2, 6]
    assert got.rejected["line"].tolist() == [3, 5]
    assert got.rejected["raw"].tolist() == ["4,5", "6,7,8,9"]
    assert "has 2 fields, expected 3" in got.rejected["reason"].iloc[0]
    assert "has 4 fields, expected 3" in got.rejected["reason"].iloc[1]
    assert set(got.rejected["source"]) == {str(path)}
    assert got.rows_read == len(got.table) + len(got.rejected) == 4


def test_duplicate_column_names_are_refused(tmp_path):
    """Two columns called `a` (after stripping spaces) are a DataError naming `a`."""
    path = _write(tmp_path, "dup.csv", "a,b, a \n1,2,3\n")
    with pytest.raises(DataError, match=r"Column `a` appears more than once in `.*dup\.csv`"):
        _read(path)


def test_non_utf8_line_is_quarantined_with_its_line(tmp_path):
    """A line holding a byte that is not UTF-8 is rejected (line, reason, escaped raw); others kept."""
    content = (
        b"zone,load\n" + b"".join(b"a,%d\n" % i for i in range(30)) + b"caf\xe9,7\n" + b"b,8\n"
    )
    path = _write(tmp_path, "latin.csv", content)
    got = _read(path)
    assert len(got.table) == 31
    assert got.rejected["line"].tolist() == [32]
    assert "not valid utf-8" in got.rejected["reason"].iloc[0]
    assert got.rejected["raw"].iloc[0] == "caf\\xe9,7"
    assert got.rows_read == 32


def test_non_utf8_refused_names_file_line_and_encoding_setting(tmp_path):
    """With `input.encoding_errors: refuse` the first bad line stops the run with the fix."""
    path = _write(tmp_path, "latin.csv", b"zone,load\na,1\ncaf\xe9,7\n")
    with pytest.raises(DataError, match=r"latin\.csv` line 3 .*`input\.encoding`"):
        _read(path, encoding_errors="refuse")


def test_latin1_file_reads_with_the_declared_encoding(tmp_path):
    """Setting `input.encoding: latin-1` decodes the same bytes into text."""
    path = _write(tmp_path, "latin.csv", b"zone,load\ncaf\xe9,7\nbar,8\n")
    got = _read(path, encoding="latin-1")
    assert got.table["zone"].tolist() == ["caf\u00e9", "bar"]


def test_a_whole_file_in_another_encoding_is_refused_not_quarantined(tmp_path):
    """When many lines fail to decode the encoding is wrong: DataError suggesting `input.encoding`."""
    content = b"zone,load\n" + b"caf\xe9,1\n" * 40
    path = _write(tmp_path, "latin.csv", content)
    with pytest.raises(
        DataError, match=r"line 2 has bytes that are not valid utf-8.*`input\.encoding`"
    ):
        _read(path)


def test_names_with_spaces_unicode_and_markup_are_kept_stripped(tmp_path):
    """Column names keep inner spaces, accents and markup characters; outer spaces are stripped."""
    path = _write(tmp_path, "x.csv", " queue depth ,région,<b>a&b</b>\n1,x,2\n")
    got = _read(path)
    assert list(got.table.columns) == ["queue depth", "région", "<b>a&b</b>"]


def test_selected_column_that_does_not_exist_lists_close_matches(tmp_path):
    """`input.columns` naming a missing column is a ConfigError with close matches (difflib)."""
    path = _write(tmp_path, "x.csv", "latency,zone\n1,a\n")
    with pytest.raises(ConfigError, match=r"column `latncy`.*close matches: `latency`"):
        _read(path, columns=["latncy", "zone"])


def test_too_many_columns_is_a_limit_error(tmp_path):
    """More columns than `limits.max_columns` is a LimitError naming the count and the limit."""
    header = ",".join(f"c{i}" for i in range(12))
    path = _write(tmp_path, "wide.csv", header + "\n" + ",".join("1" * 12) + "\n")
    cfg = _cfg(limits={"max_columns": 10})
    with pytest.raises(LimitError, match=r"12 columns, above `limits\.max_columns` = 10"):
        ingest.run(path, cfg.input, cfg.limits)


def test_too_many_rows_is_a_limit_error(tmp_path):
    """More rows than `limits.max_rows` is a LimitError before the file is parsed."""
    path = _write(tmp_path, "long.csv", "a,b\n" + "1,2\n" * 50)
    cfg = _cfg(limits={"max_rows": 10})
    with pytest.raises(LimitError, match=r"50 rows, above `limits\.max_rows` = 10"):
        ingest.run(path, cfg.input, cfg.limits)


def test_no_header_names_columns_by_position(tmp_path):
    """With `input.header: false` every line is data and columns are named column_1, column_2, ..."""
    path = _write(tmp_path, "x.csv", "1,a\n2,b\n3,c\n")
    got = _read(path, header=False)
    assert list(got.table.columns) == ["column_1", "column_2"]
    assert got.table["column_1"].tolist() == [1, 2, 3] and got.table.index.tolist() == [1, 2, 3]


@pytest.mark.parametrize("body", [
    'a,b,c\n"x",1,true\n"y, z",2,false\n"w ""q""",3,true\n',  # quotes close on each line: threaded blocks
    'a,b,c\n"x",1,true\n"y\nz",2,false\n"w",3,true\n',  # a value spans two lines: the careful parser
    'a,b,c\n"x",1,true\n"y",2\n"w",3,true,9\n"v",4,false\n',  # ragged rows: careful retry with line numbers
])
def test_fast_and_careful_csv_paths_agree(tmp_path, monkeypatch, body):
    """The threaded block parser (used when no quoted value spans lines) reads the same table, line
    numbers and rejected rows as the careful one-thread parser (invented rows)."""
    from pipeline.stages import _data_read

    path = _write(tmp_path, "x.csv", body)
    assert _data_read._quotes_close_on_each_line(body.encode(), '"') == ("y\nz" not in body)
    monkeypatch.setattr(_data_read, "_THREADED_FROM_BYTES", 0)  # the threaded path for this small file too
    fast = _read(path)
    monkeypatch.setattr(_data_read, "_scan_quotes", lambda data, quote: (False, None))
    careful = _read(path)
    pd.testing.assert_frame_equal(fast.table, careful.table)
    pd.testing.assert_frame_equal(fast.rejected, careful.rejected)


def test_quote_check_matches_a_byte_by_byte_scan(monkeypatch):
    """The vectorised check that no line break falls inside quotes agrees with a plain scan of the bytes
    (quote state flipped at each quote, a line break while inside fails), across block sizes small enough
    to cut every file into many blocks (property test on random bytes)."""
    import random

    from pipeline.stages import _data_read

    def scan(data: bytes) -> bool:
        inside = False
        for x in data:
            if x == ord('"'):
                inside = not inside
            elif x == ord("\n") and inside:
                return False
        return True

    rng = random.Random(7)
    for block in (1, 5, 64, 1 << 24):
        monkeypatch.setattr(_data_read, "_QUOTE_BLOCK_BYTES", block)
        for _ in range(500):
            data = bytes(rng.choice(b'ab,"\n\n"') for _ in range(rng.randint(0, 40)))
            assert _data_read._quotes_close_on_each_line(data, '"') == scan(data), (block, data)
            closes, lines = _data_read._scan_quotes(data, '"')
            assert lines is None or lines == _data_read._line_count(data), (block, data)
