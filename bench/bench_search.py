"""Whole PC-stable search: edgeproof beside causal-learn's pc(..., "gsq", stable=True), plus accuracy.

Run as ``.venv/bin/python bench/bench_search.py [--quick]``; prints a Markdown table and writes it
to bench/results/bench_search.md. ``--quick`` skips the 100,000-row run.
"""

from __future__ import annotations

import argparse
import re
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import BENCH, emit, load, machine  # noqa: E402

from pipeline.independence import EngineSettings  # noqa: E402
from pipeline.parallel import parallel_context  # noqa: E402
from pipeline.search import pc_stable_skeleton  # noqa: E402


def _truth(name: str, names: list[str]) -> np.ndarray:
    idx = {n: i for i, n in enumerate(names)}
    m = np.zeros((len(names), len(names)), dtype=bool)
    text = (BENCH / name / "truth.graph.txt").read_text()
    for a, b in re.findall(r"(\S+)\s+-->\s+(\S+)", text):
        m[idx[a], idx[b]] = m[idx[b], idx[a]] = True
    return m


def _prf(found: np.ndarray, truth: np.ndarray) -> tuple[float, float, float]:
    iu = np.triu_indices(len(truth), 1)
    f, t = found[iu], truth[iu]
    tp = int(np.sum(f & t))
    prec = tp / max(int(f.sum()), 1)
    rec = tp / max(int(t.sum()), 1)
    f1 = 2 * prec * rec / (prec + rec) if prec + rec else 0.0
    return prec, rec, f1


def _ours(codes, names, cards, ctx=None):
    t0 = time.perf_counter()
    res = pc_stable_skeleton(codes, names, cards, EngineSettings(method="g", alpha=0.05), context=ctx)
    return time.perf_counter() - t0, res


def _theirs(raw):
    from causallearn.search.ConstraintBased.PC import pc

    t0 = time.perf_counter()
    cg = pc(raw.astype(float), 0.05, "gsq", stable=True, show_progress=False)
    adj = cg.G.graph != 0
    return time.perf_counter() - t0, adj | adj.T


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="skip the 100,000-row run")
    args = ap.parse_args(argv)
    lines = ["# Skeleton search: edgeproof vs causal-learn pc(data, 0.05, \"gsq\", stable=True)", "",
             f"Machine: {machine()}", ""]
    codes, names, raw = load("alarm")
    cards = [int(c.max()) + 1 for c in codes]
    _ours(codes[:, :2000], names, cards)  # load the compiled kernels once
    t_ours, res = _ours(codes, names, cards)
    t_theirs, adj = _theirs(raw)
    same = bool(np.array_equal(res.adjacency(), adj))
    lines += ["## ALARM, 10,000 rows, one worker", "",
              "| edgeproof s | tests | causal-learn s | ratio | identical skeleton |", "|---:|---:|---:|---:|---|",
              f"| {t_ours:.2f} | {len(res.tests)} | {t_theirs:.2f} | {t_theirs / t_ours:.1f}x | "
              f"{'yes' if same else 'no'} |", "", "Target: >= 20x faster on one worker.", ""]
    if not args.quick:
        idx = np.random.default_rng(12345).integers(0, codes.shape[1], 100_000)
        big = np.ascontiguousarray(codes[:, idx])
        with parallel_context(jobs=2) as ctx:
            t_big, res_big = _ours(big, names, cards, ctx)
        lines += ["## ALARM resampled with replacement to 100,000 rows (seed 12345), 2 workers", "",
                  "| edgeproof s | tests | edges |", "|---:|---:|---:|",
                  f"| {t_big:.2f} | {len(res_big.tests)} | {len(res_big.edges)} |", "",
                  "Target: < 30 s. causal-learn not run at this size.", ""]
    lines += ["## Adjacency accuracy against truth.graph.txt (G, alpha 0.05)", "",
              "| set | edgeproof precision | recall | F1 | causal-learn precision | recall | F1 |",
              "|---|---:|---:|---:|---:|---:|---:|"]
    for name in ("asia", "child", "insurance", "alarm"):
        c, n, r = load(name)
        k = [int(v.max()) + 1 for v in c]
        truth = _truth(name, n)
        _, ours = _ours(c, n, k)
        _, theirs = _theirs(r)
        a, b = _prf(ours.adjacency(), truth), _prf(theirs, truth)
        lines.append(f"| {name} | {a[0]:.3f} | {a[1]:.3f} | {a[2]:.3f} | {b[0]:.3f} | {b[1]:.3f} | {b[2]:.3f} |")
    lines.append("")
    emit("bench_search", "\n".join(lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
