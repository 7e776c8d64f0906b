"""Shared helpers of the benchmark scripts: machine description, data loading, table output."""

from __future__ import annotations

import platform
import re
import sys
from pathlib import Path

import numpy as np

BENCH = Path(__file__).resolve().parents[1] / "tests" / "data" / "benchmarks"
RESULTS = Path(__file__).resolve().parent / "results"


def machine() -> str:
    """One line naming the machine: cores, CPU model, python and numpy versions."""
    import os

    model = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        import numba

        nb = numba.__version__
    except ImportError:
        nb = "not installed"
    return (f"nproc {os.cpu_count()}, CPU {model}, Python {platform.python_version()}, "
            f"numpy {np.__version__}, numba {nb}")


def load(name: str) -> tuple[np.ndarray, list[str], np.ndarray]:
    """Codes shaped (variables, rows) as int8, the names and the raw (rows, variables) array."""
    path = BENCH / name / "data.txt"
    names = path.read_text().split("\n", 1)[0].split()
    raw = np.loadtxt(path, skiprows=1, dtype=np.int64)
    codes = np.vstack([np.unique(raw[:, j], return_inverse=True)[1] for j in range(raw.shape[1])])
    return codes.astype(np.int8), names, raw


def true_edges(name: str, folder: Path | None = None) -> list[tuple[str, str]]:
    """The true DAG of a benchmark set as (parent, child) pairs, read from its truth.graph.txt
    (lines ``N. Xi --> Xj`` under ``Graph Edges:``)."""
    text = ((folder or BENCH) / name / "truth.graph.txt").read_text(encoding="utf-8")
    body = text.split("Graph Edges:", 1)[-1]
    return [(a, b) for a, b in re.findall(r"(\S+)\s+-->\s+(\S+)", body)]


def true_skeleton(name: str, folder: Path | None = None) -> frozenset[tuple[str, str]]:
    """The true adjacencies of a benchmark set as unordered pairs (a < b by name)."""
    return frozenset((a, b) if a <= b else (b, a) for a, b in true_edges(name, folder))


def emit(name: str, text: str) -> None:
    """Print the Markdown and write it to bench/results/<name>.md."""
    RESULTS.mkdir(parents=True, exist_ok=True)
    (RESULTS / f"{name}.md").write_text(text)
    sys.stdout.write(text)


def run_child(cmd: list[str], log: Path) -> tuple[dict, float, object]:
    """Run a bench child process from the repository root (stderr to `log`): the JSON document on its last
    stdout line, its wall seconds and the resource usage of exactly that child (``os.wait4``; Linux gives
    ``ru_maxrss`` in kilobytes). Raises with the log's tail when it fails."""
    import json
    import os
    import subprocess
    import time

    repo = Path(__file__).resolve().parents[1]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in [str(repo), os.environ.get("PYTHONPATH", "")] if p))
    log.parent.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    with open(log, "wb") as err, subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=err, cwd=repo, env=env) as proc:
        assert proc.stdout is not None
        stdout = proc.stdout.read()
        _, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"{cmd[1:4]} failed (exit {proc.returncode}); log {log}:\n{log.read_text(errors='replace')[-2000:]}")
    return json.loads(stdout.decode().strip().splitlines()[-1]), wall, usage

