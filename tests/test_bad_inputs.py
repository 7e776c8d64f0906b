"""Bad inputs and configurations end with one line and the documented exit code, never an internal error.

Each case reproduces a report of an internal error (exit 1) or a silent wrong reading; the data are
small invented extracts (tests/_shared.small_extract), since these checks are about handling, not
statistics. Exit codes: 2 configuration, 3 data (README, "Exit codes").
"""

from __future__ import annotations

import bz2
import gzip
import json
import lzma
import os
import resource
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from _shared import REPO, file_listing, small_extract

from pipeline.cli import main


@pytest.fixture(autouse=True)
def _in_tmp(tmp_path, monkeypatch):
    """Each test runs in its own current directory."""
    monkeypatch.chdir(tmp_path)


def _run(capsys, data: Path, out: Path, *sets: str) -> tuple[int, str]:
    """`edgeproof run` in this process: exit code and standard error (one line expected on failure)."""
    capsys.readouterr()
    args = ["run", "--input", str(data), "--out", str(out), "--quiet", "--set", "output.png=false"]
    for s in sets:
        args += ["--set", s]
    code = main(args)
    return code, capsys.readouterr().err


def _failed(capsys, code_wanted: int, match: str, *args) -> str:
    code, err = _run(capsys, *args)
    lines = err.strip().splitlines()
    assert code == code_wanted and len(lines) == 1, err
    assert match in lines[0] and "internal error" not in lines[0]
    return lines[0]


def _frame(rows: int = 300, seed: int = 0) -> pd.DataFrame:
    return pd.read_csv(small_extract(Path(f"frame-{seed}.csv"), rows, seed))


def _manifest(out: Path) -> dict:
    return json.loads((out / "manifest.json").read_text())


# ----------------------------------------------------------------------------- data


def test_mixed_time_zones_in_a_timestamp_column(tmp_path, capsys):
    """Times with and without an offset in one column: exit 3 naming the column and both forms."""
    df = _frame()
    stamps = pd.date_range("2026-11-01", periods=len(df), freq="h").strftime("%Y-%m-%dT%H:%M:%S")
    df["ts"] = [s + ("Z" if i % 2 else "") for i, s in enumerate(stamps)]
    df.to_csv("mixed.csv", index=False)
    line = _failed(capsys, 3, "Column `ts` mixes times with and without a time zone", tmp_path / "mixed.csv", tmp_path / "r")
    assert "columns.ts.type: ignore" in line


def test_json_lines_with_changing_keys_and_types(tmp_path, capsys):
    """Keys that come and go, a field that turns from text to a number, and text in a numeric field:
    read (the text row quarantined), exit 0, rows reconciled."""
    df = _frame()
    with open("changing.jsonl", "w") as fh:
        for i, row in enumerate(df.to_dict("records")):
            rec = {"a": int(row["a"]), "b": int(row["b"]) if i != 200 else "oops"}
            rec["c" if i < 250 else "d"] = row["c"] if i < 290 else 3
            fh.write(json.dumps(rec) + "\n")
    code, err = _run(capsys, tmp_path / "changing.jsonl", tmp_path / "r")
    assert code == 0, err
    rows = _manifest(tmp_path / "r")["rows"]
    assert rows["read"] == 300 and rows["quarantined"] == 1 and rows["kept"] == 299


def test_json_array_file_is_read(tmp_path, capsys):
    """A file holding one JSON array of objects is read row by row (it was said to have no rows)."""
    df = _frame()
    Path("rows.json").write_text(json.dumps(df.to_dict("records")))
    code, err = _run(capsys, tmp_path / "rows.json", tmp_path / "r")
    assert code == 0, err
    assert _manifest(tmp_path / "r")["rows"]["kept"] == 300
    Path("numbers.json").write_text("[1, 2, 3]")
    _failed(capsys, 3, "no data rows", tmp_path / "numbers.json", tmp_path / "r2")


@pytest.mark.parametrize("kind", ["list", "struct", "map"])
def test_parquet_nested_columns(tmp_path, capsys, kind):
    """List and map columns become their JSON text, struct fields their own columns: exit 0."""
    df = _frame()
    a = df["a"].to_numpy()
    nested = {
        "list": pa.array([[int(x)] for x in a]),
        "struct": pa.array([{"q": int(x)} for x in a]),
        "map": pa.array([[("k", int(x))] for x in a], type=pa.map_(pa.string(), pa.int64())),
    }[kind]
    pq.write_table(pa.table({"a": a, "b": df["b"].to_numpy(), "n": nested}), "nested.parquet")
    code, err = _run(capsys, tmp_path / "nested.parquet", tmp_path / "r")
    assert code == 0, err
    cleaning = json.loads((tmp_path / "r" / "cleaning.json").read_text())
    names = {c["column"] for c in cleaning["columns"]}
    assert ("n.q" in names) if kind == "struct" else ("n" in names)


def test_nul_byte_late_in_a_field_never_reaches_the_graph(tmp_path, capsys):
    """A NUL byte past the head that is checked for binary data is removed from the level (noted in
    cleaning.json), so the DOT text and Graphviz never see it: exit 0."""
    df = _frame(2000)
    df["c"] = df["c"].astype(object)
    df.loc[1990, "c"] = "x\x00y"
    df.to_csv("nul.csv", index=False)
    assert b"\x00" not in Path("nul.csv").read_bytes()[:4096]
    code, err = _run(capsys, tmp_path / "nul.csv", tmp_path / "r")
    assert code == 0, err
    for name in ("graph.dot", "levels.json", "evidence.csv", "cleaning.json"):
        assert b"\x00" not in (tmp_path / "r" / name).read_bytes(), name
    assert "NUL bytes removed" in (tmp_path / "r" / "cleaning.json").read_text()


def test_uniform_bins_near_the_largest_float(tmp_path, capsys):
    """Uniform bins over values near ±1.7e308 (where max - min overflows) have finite, increasing edges."""
    df = _frame()
    df["big"] = np.random.default_rng(3).uniform(-1.0, 1.0, len(df)) * 1.7e308
    df.to_csv("big.csv", index=False)
    code, err = _run(capsys, tmp_path / "big.csv", tmp_path / "r", "columns.big.type=numeric",
                     "columns.big.discretise=uniform")
    assert code == 0, err
    edges = json.loads((tmp_path / "r" / "levels.json").read_text())["edges"]["big"]
    assert len(edges) == 3 and np.all(np.isfinite(edges)) and np.all(np.diff(edges) > 0)


@pytest.mark.parametrize("compress, suffix", [(gzip.compress, ".gz"), (bz2.compress, ".bz2"), (lzma.compress, ".xz"),
                                              (lambda b: pa.compress(b, "zstd", asbytes=True), ".zst")],
                         ids=["gzip", "bzip2", "xz", "zstd"])
def test_compressed_csv_is_read(tmp_path, capsys, compress, suffix):
    """A compressed CSV gives the same evidence as the plain file."""
    plain = small_extract(tmp_path / "base.csv")
    packed = tmp_path / f"base.csv{suffix}"
    packed.write_bytes(compress(plain.read_bytes()))
    assert _run(capsys, plain, tmp_path / "plain")[0] == 0
    code, err = _run(capsys, packed, tmp_path / "packed")
    assert code == 0, err
    cols = ["var_a", "var_b", "linked", "pvalue", "statistic"]
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "plain" / "evidence.parquet")[cols],
                                  pd.read_parquet(tmp_path / "packed" / "evidence.parquet")[cols])


def test_truncated_compressed_file_is_a_data_error(tmp_path, capsys):
    """A gzip file cut short: exit 3, one line saying it could not be decompressed."""
    whole = gzip.compress(small_extract(tmp_path / "base.csv").read_bytes())
    Path("cut.csv.gz").write_bytes(whole[: len(whole) // 2])
    _failed(capsys, 3, "could not be decompressed", tmp_path / "cut.csv.gz", tmp_path / "r")


# ----------------------------------------------------------------------------- configuration


@pytest.mark.parametrize("setting, match", [
    ("input.encoding=no-such-codec", "`input.encoding` = 'no-such-codec' is not allowed: not an encoding"),
    ("input.columns=[]", "`input.columns` = [] is not allowed: an empty list selects no column"),
    ("test.min_rows_per_cell=.inf", "`test.min_rows_per_cell` = inf is not allowed: Input should be a finite number"),
    ("search.near_alpha_factor=.inf", "`search.near_alpha_factor` = inf is not allowed"),
    ("search.near_alpha_factor=.nan", "`search.near_alpha_factor` = nan is not allowed"),
], ids=["encoding", "empty-columns", "inf-min-rows", "inf-near-alpha", "nan-near-alpha"])
def test_bad_settings_are_refused_before_any_work(tmp_path, capsys, setting, match):
    """Refused at configuration load (exit 2, one line): nothing is written, no stage runs (they used
    to fail with an internal error, some only after every stage had run)."""
    data = small_extract(tmp_path / "base.csv")
    before = file_listing(tmp_path)
    _failed(capsys, 2, match, data, tmp_path / "r", setting)
    assert file_listing(tmp_path) == before


@pytest.mark.parametrize("content", ["not json", "[1, 2]", '{"edges": 5}', '{"edges": [["a"]]}', '{"edges": [[1, 2]]}'],
                         ids=["not-json", "a-list", "edges-a-number", "edge-of-one", "edge-of-numbers"])
def test_truth_file_of_the_wrong_shape(tmp_path, capsys, content):
    """A `report.truth_file` that is not {"edges": [[a, b], ...]}: exit 2 naming the key and the shape."""
    data = small_extract(tmp_path / "base.csv")
    Path("truth.json").write_text(content)
    _failed(capsys, 2, "`report.truth_file` = `truth.json` is not", data, tmp_path / "r", "report.truth_file=truth.json")


def test_repeated_section_is_refused(tmp_path, capsys):
    """A section given twice (YAML would keep only the last): exit 2 naming the key and both lines."""
    data = small_extract(tmp_path / "base.csv")
    Path("site.yaml").write_text("test:\n  alpha: 0.01\nsearch:\n  orient: true\ntest:\n  method: chi2\n")
    capsys.readouterr()
    assert main(["run", "--input", str(data), "--config", "site.yaml", "--out", "r", "--quiet"]) == 2
    line = capsys.readouterr().err.strip()
    assert "gives the key `test` twice" in line and "lines 1 and 5" in line and "\n" not in line


def test_merge_keys_are_not_taken_for_repeats(tmp_path):
    """`<<: *defaults` followed by a key it also sets is ordinary YAML, not a repeat."""
    from pipeline.config import load_config

    Path("site.yaml").write_text("test:\n  <<: &d {alpha: 0.1, seed: 3}\n  alpha: 0.2\n")
    cfg = load_config("site.yaml")
    assert (cfg.test.alpha, cfg.test.seed) == (0.2, 3)


def test_yaml_alias_bomb_is_refused_in_bounded_memory(tmp_path):
    """A 1 kB configuration whose aliases expand to 10^9 values: exit 2 in one short line, within a
    3 GB address-space limit (it used to exhaust memory printing the expanded value)."""
    data = small_extract(tmp_path / "base.csv")
    lines = ['x0: &x0 ["lol","lol","lol","lol","lol","lol","lol","lol","lol","lol"]']
    lines += [f"x{i}: &x{i} [" + ",".join([f"*x{i - 1}"] * 10) + "]" for i in range(1, 9)]
    text = "scratch:\n" + "\n".join("  " + ln for ln in lines) + "\ntest:\n  alpha: *x8\n"
    assert len(text) < 2048
    Path("bomb.yaml").write_text(text)

    def limit() -> None:
        resource.setrlimit(resource.RLIMIT_AS, (3 << 30, 3 << 30))

    proc = subprocess.run([sys.executable, "-m", "pipeline", "run", "--input", str(data), "--config", "bomb.yaml",
                           "--out", "r", "--quiet"], cwd=tmp_path, env={**os.environ, "PYTHONPATH": str(REPO)},
                          capture_output=True, text=True, timeout=120, preexec_fn=limit)
    assert proc.returncode == 2, proc.stderr
    line = proc.stderr.strip()
    assert "expands to more than 100,000 values" in line and "\n" not in line and len(line) < 300


def test_long_values_are_shortened_in_messages(tmp_path, capsys):
    """A wrong value of 3000 characters is echoed in at most 80."""
    data = small_extract(tmp_path / "base.csv")
    line = _failed(capsys, 2, "Configuration key `test.alpha` = ", data, tmp_path / "r", "test.alpha=" + "x" * 3000)
    assert len(line) < 300


def test_parallel_jobs_above_the_cores_is_capped_with_a_note(tmp_path, capsys):
    """`parallel.jobs` = 64 on a small input runs with as many workers as there are cores, and the
    manifest says so."""
    data = small_extract(tmp_path / "base.csv")
    code, err = _run(capsys, data, tmp_path / "r", "parallel.jobs=64")
    assert code == 0, err
    manifest = _manifest(tmp_path / "r")
    cores = len(os.sched_getaffinity(0))
    assert manifest["config"]["parallel"]["jobs"] == cores
    assert any("`parallel.jobs` = 64" in w and f"{cores} workers" in w for w in manifest["warnings"])
