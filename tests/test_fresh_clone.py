"""A fresh clone with nothing beside it passes the tests that read the published benchmark sets."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

# test files that read tests/data/benchmarks (the four published networks), one or two cases each
_CASES = [
    "tests/test_skeleton.py::test_chi2_skeleton_equals_reference[asia]",
    "tests/test_clean.py::test_alarm_benchmark_columns_all_kept_as_numeric",
]


def _git(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True, check=False, timeout=120)


def test_fresh_clone_reads_its_own_benchmark_sets(tmp_path):
    """`git clone` of HEAD (committed files only) into an empty folder runs the benchmark-reading tests and they pass."""
    if shutil.which("git") is None:
        pytest.skip("git is not installed")
    top = _git("rev-parse", "--show-toplevel", cwd=ROOT)
    if top.returncode != 0 or Path(top.stdout.strip()).resolve() != ROOT:
        pytest.skip("not inside a git checkout of edgeproof (e.g. an unpacked source archive)")
    head = _git("rev-parse", "HEAD", cwd=ROOT).stdout.strip()
    listed = _git("ls-files", "--", "tests/data/benchmarks", cwd=ROOT).stdout.split()
    if not any(name.endswith("data.txt") for name in listed):
        pytest.fail("tests/data/benchmarks holds no committed data.txt: a fresh clone would lack the sets")
    empty = tmp_path / "alone"
    empty.mkdir()
    clone = empty / "edgeproof"
    done = _git("clone", "--quiet", "--no-checkout", str(ROOT), str(clone), cwd=empty)
    assert done.returncode == 0, done.stderr
    done = _git("checkout", "--quiet", head, cwd=clone)
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in empty.iterdir()) == ["edgeproof"]  # nothing beside the clone
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PYTEST", "PYTHON"))}
    env["PYTHONPATH"] = str(clone)
    run = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-m", "not slow", "-rs", *_CASES],
        cwd=clone, env=env, capture_output=True, text=True, check=False, timeout=600,
    )
    out = run.stdout + run.stderr
    assert run.returncode == 0, out[-3000:]
    assert f"{len(_CASES)} passed" in out and "skipped" not in out, out[-3000:]
    # the tests really ran from the clone, not from this checkout
    probe = subprocess.run([sys.executable, "-c", "import pipeline; print(pipeline.__file__)"], cwd=clone,
                           env=env, capture_output=True, text=True, check=False, timeout=120)
    assert Path(probe.stdout.strip()).resolve().is_relative_to(clone.resolve()), probe.stdout + probe.stderr
