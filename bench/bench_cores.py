"""What two worker processes can give on this machine: the same pure-CPU loop in 1 and in 2 processes.

The speed-up targets for 2 workers (batteries, resamples) can be no better than this ceiling. Every
number here is measured side by side in one run.

    .venv/bin/python bench/bench_cores.py
"""

from __future__ import annotations

import multiprocessing as mp
import os
import time
from pathlib import Path

OUT = Path(__file__).resolve().parent / "results" / "cores.md"
LOOP = 20_000_000


def _spin(_: int) -> float:
    t = time.perf_counter()
    x = 0
    for i in range(LOOP):
        x += i
    return time.perf_counter() - t


def main() -> int:
    ctx = mp.get_context("spawn")
    rows = []
    for _ in range(3):
        t = time.perf_counter()
        with ctx.Pool(1) as pool:
            pool.map(_spin, range(2))
        one = time.perf_counter() - t
        t = time.perf_counter()
        with ctx.Pool(2) as pool:
            pool.map(_spin, range(2))
        two = time.perf_counter() - t
        rows.append((one, two))
    best = sorted(one / two for one, two in rows)[len(rows) // 2]
    lines = [
        "# Two processes on this machine: the ceiling for 2-worker speed-ups", "",
        f"The same pure-Python loop ({LOOP:,} additions) twice, in a pool of 1 process and in a pool of 2 "
        f"(spawned, start-up included), alternating; nproc = {os.cpu_count()}.", "",
        "| run | 1 process, 2 loops (s) | 2 processes, 2 loops (s) | speed-up |",
        "|---:|---:|---:|---:|",
        *[f"| {i + 1} | {one:.2f} | {two:.2f} | {one / two:.2f}x |" for i, (one, two) in enumerate(rows)],
        "", f"Median speed-up: **{best:.2f}x**. A 2-worker battery cannot beat this on this machine.", "",
    ]
    text = "\n".join(lines)
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
