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


def reference_skeleton(name: str) -> np.ndarray:
    """Skeleton (M != 0) of causal-learn's published PC-stable chi-square result on the set."""
    return np.loadtxt(benchmark_path(name) / "reference_pc_chisq_0.05_stable.txt") != 0
