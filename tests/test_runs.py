"""Run folders: atomic writes, names that cannot escape, locks, the stage cache."""

from __future__ import annotations

import os

import pandas as pd
import pytest

from pipeline.errors import LockHeldError
from pipeline.runs import (
    StageCache,
    atomic_write_parquet,
    atomic_write_text,
    checksum,
    publish_run,
    run_lock,
    safe_name,
)


def test_atomic_write_leaves_no_temporary_files(tmp_path):
    """After an atomic write only the final file is in the folder."""
    atomic_write_text(tmp_path / "a.txt", "hello")
    atomic_write_parquet(tmp_path / "b.parquet", pd.DataFrame({"x": [1, 2]}))
    assert sorted(os.listdir(tmp_path)) == ["a.txt", "b.parquet"]
    assert pd.read_parquet(tmp_path / "b.parquet")["x"].tolist() == [1, 2]


def test_parquet_bytes_are_repeatable(tmp_path):
    """The same frame written twice gives byte-identical Parquet (no timestamps inside)."""
    frame = pd.DataFrame({"a": ["x", "y"], "p": [0.5, 0.25]})
    atomic_write_parquet(tmp_path / "1.parquet", frame)
    atomic_write_parquet(tmp_path / "2.parquet", frame)
    assert (tmp_path / "1.parquet").read_bytes() == (tmp_path / "2.parquet").read_bytes()


@pytest.mark.parametrize(
    "raw", ["../../etc/passwd", "/abs/path/night", "..", ".", "a/../../b", "..\\..\\win", "night\x00x", ".hidden"]
)
def test_safe_name_cannot_escape(raw, tmp_path):
    """A snapshot or run name taken from a file name stays inside its folder."""
    name = safe_name(raw)
    assert name and "/" not in name and "\\" not in name and not name.startswith(".")
    assert (tmp_path / name).resolve().parent == tmp_path.resolve()


def test_lock_refuses_a_second_holder(tmp_path):
    """While one run holds the lock of a folder, a second gets LockHeldError (exit code 4)."""
    with run_lock(tmp_path):
        with pytest.raises(LockHeldError) as info:
            with run_lock(tmp_path):
                pass
    assert info.value.exit_code == 4
    with run_lock(tmp_path):  # released again
        pass


def test_stage_cache_ignores_an_interrupted_attempt(tmp_path):
    """An entry being written is not a hit; a new attempt starts from an empty work folder (unless the
    stage resumes), and only a committed entry with its checksums is a hit."""
    cache = StageCache.beside(tmp_path).open()
    with cache.writing("clean", "k1") as work:
        (work / "half.parquet").write_bytes(b"partial")
        assert cache.lookup("clean", "k1") is None
    assert cache.lookup("clean", "k1") is None  # left without a commit (as a killed run would)
    with cache.writing("clean", "k1", resume=True) as work:
        assert (work / "half.parquet").exists()  # kept for a stage that resumes
    with cache.writing("clean", "k1") as work:
        assert not (work / "half.parquet").exists()
        (work / "a.txt").write_bytes(b"abc")
        cache.commit("clean", "k1", work, {"a.txt": {"size": 3, "checksum": checksum(b"abc")}})
    assert cache.lookup("clean", "k1") is not None
    assert cache.read("clean", "k1", "a.txt") == b"abc"
    with cache.writing("clean", "k1") as work:
        assert work is None  # finished meanwhile: nothing to write


def test_cache_entries_keep_verifying_across_the_checksum_change(tmp_path):
    """Checksums name their algorithm (`sha256:` + the hashlib hex digest); an entry written before they did
    (a bare 32-hex-digit BLAKE2b digest) still reads, and a wrong digest of either kind is damage."""
    import hashlib

    from pipeline.runs import CacheDamaged

    assert checksum(b"abc") == "sha256:" + hashlib.sha256(b"abc").hexdigest()
    cache = StageCache.beside(tmp_path).open()
    old = hashlib.blake2b(b"abc", digest_size=16).hexdigest()
    for key, recorded in (("old", old), ("new", checksum(b"abc")), ("bad-old", "0" * 32), ("bad-new", "sha256:" + "0" * 64)):
        with cache.writing("clean", key) as work:
            (work / "a.txt").write_bytes(b"abc")
            cache.commit("clean", key, work, {"a.txt": {"size": 3, "checksum": recorded}})
    assert cache.read("clean", "old", "a.txt") == cache.read("clean", "new", "a.txt") == b"abc"
    for key in ("bad-old", "bad-new"):
        with pytest.raises(CacheDamaged):
            cache.read("clean", key, "a.txt")


def test_publish_replaces_only_when_complete(tmp_path):
    """Publishing moves the finished folder into place, replacing the old one."""
    final = tmp_path / "run"
    final.mkdir()
    (final / "old.txt").write_text("old")
    partial = tmp_path / ".run.partial"
    partial.mkdir()
    (partial / "new.txt").write_text("new")
    publish_run(partial, final)
    assert sorted(os.listdir(final)) == ["new.txt"]
    assert not partial.exists()


def test_pair_keys_agree_with_pair_key():
    """The column form of the pair key gives, row by row, what `pair_key` gives (invented names)."""
    from pipeline.pairs import pair_key, pair_keys

    a, b = ["b", "a", "x", "Z", "same"], ["a", "b", "y", "a", "same"]
    lo, hi = pair_keys(a, b)
    assert list(zip(lo.tolist(), hi.tolist())) == [pair_key(x, y) for x, y in zip(a, b)]


def test_run_folder_reads_json_and_names_an_unreadable_table(tmp_path):
    """A missing JSON file reads as {} (or the default given); a damaged Parquet file is a DataError naming it."""
    from pipeline.errors import DataError
    from pipeline.runs import RunFolder

    (tmp_path / "manifest.json").write_text('{"status": "ok"}', encoding="utf-8")
    (tmp_path / "evidence.parquet").write_bytes(b"not parquet")
    run = RunFolder(tmp_path)
    assert run.json("manifest.json") == {"status": "ok"}
    assert run.json("levels.json") == {} and run.json("changes.json", default=None) is None
    with pytest.raises(DataError, match="evidence.parquet` cannot be read"):
        run.table("evidence.parquet")


def test_json_text_indents_short_documents_and_keeps_long_ones_compact():
    """Short JSON is indented for reading; long JSON is one compact line; both read back the same."""
    import json

    from pipeline.runs import json_text

    short = {"b": 1, "a": [1, 2]}
    long = {"edges": [[f"s{i}", f"s{i + 1}"] for i in range(20_000)]}
    assert json_text(short) == json.dumps(short, indent=2, sort_keys=True) + "\n"
    assert json_text(long).count("\n") == 1 and json.loads(json_text(long)) == long
