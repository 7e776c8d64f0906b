"""Where the published benchmark data lie: carried in the repository under tests/data/benchmarks."""

from __future__ import annotations

from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
BENCHMARKS = REPO / "tests" / "data" / "benchmarks"  # sources and licence: tests/data/benchmarks/README.md


def benchmark_path(name: str) -> Path:
    """The folder of one benchmark set carried under tests/data/benchmarks."""
    folder = BENCHMARKS / name
    assert (folder / "data.txt").is_file(), f"benchmark data missing at {folder}"
    return folder


def benchmark_codes(name: str) -> tuple[np.ndarray, list[str], list[int]]:
    """A benchmark set as a coded table (variables x rows, int8), its names and level counts."""
    path = benchmark_path(name) / "data.txt"
    names = path.read_text().splitlines()[0].split()
    raw = np.loadtxt(path, skiprows=1)
    codes = np.vstack([np.unique(raw[:, j], return_inverse=True)[1] for j in range(raw.shape[1])]).astype(np.int8)
    return codes, names, [int(c.max()) + 1 for c in codes]


def reference_skeleton(name: str) -> np.ndarray:
    """Skeleton (M != 0) of causal-learn's published PC-stable chi-square result on the set."""
    return np.loadtxt(benchmark_path(name) / "reference_pc_chisq_0.05_stable.txt") != 0


def file_listing(root: Path, skip: tuple[str, ...] = ()) -> dict[str, tuple[object, str]]:
    """Every entry under `root` (hidden ones too) with its size and sha256 (folders and links marked),
    leaving out the relative paths in `skip` and everything under them."""
    import hashlib
    import os

    out: dict[str, tuple[object, str]] = {}
    for p in sorted(root.rglob("*")):
        rel = p.relative_to(root).as_posix()
        if any(rel == s or rel.startswith(s.rstrip("/") + "/") for s in skip):
            continue
        if p.is_symlink():
            out[rel] = ("link", os.readlink(p))
        elif p.is_dir():
            out[rel] = ("dir", "")
        else:
            out[rel] = (p.stat().st_size, hashlib.sha256(p.read_bytes()).hexdigest())
    return out


def small_extract(path: Path, rows: int = 300, seed: int = 0) -> Path:
    """An invented three-signal CSV (b depends on a, c independent), small enough for fast CLI checks."""
    import pandas as pd

    rng = np.random.default_rng(seed)
    a = rng.integers(0, 3, rows)
    b = (a + rng.integers(0, 2, rows)) % 3
    c = rng.choice(["x", "y"], rows)
    path.parent.mkdir(parents=True, exist_ok=True)
    pd.DataFrame({"a": a, "b": b, "c": c}).to_csv(path, index=False)
    return path
