"""Where the published benchmark data lie (beside the repository, in ../shared)."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
SHARED = Path(os.environ.get("EDGEPROOF_SHARED", REPO.parent / "shared"))
BENCHMARKS = SHARED / "benchmarks"


def benchmark_path(name: str) -> Path:
    """The folder of one shared benchmark set; skips the test when the shared data are absent."""
    folder = BENCHMARKS / name
    if not (folder / "data.txt").is_file():
        pytest.skip(f"shared benchmark data not found at {folder}")
    return folder


def reference_skeleton(name: str) -> np.ndarray:
    """Skeleton (M != 0) of causal-learn's published PC-stable chi-square result on the set."""
    return np.loadtxt(benchmark_path(name) / "reference_pc_chisq_0.05_stable.txt") != 0
