"""Whole PC-stable search: edgeproof beside causal-learn's pc(..., "gsq", stable=True), plus accuracy.

Run as ``.venv/bin/python bench/bench_search.py [--quick]``; prints a Markdown table and writes it
to bench/results/bench_search.md. ``--quick`` skips the 100,000-row runs.

Two 100,000-row cases with `parallel.jobs=2` (the run's process and one worker, started when a level is
large enough to repay its start): ALARM's 10,000 rows resampled with replacement (the sample's
chance dependences become real in that population, so the graph stays dense; run level by level
under a time budget, with the candidate counts of each level), and rows forward-sampled from the
true network (truth.graph.txt, probabilities estimated from the 10,000 rows), a sparse faithful
sample.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _common import emit, load, machine, true_edges  # noqa: E402

from pipeline.independence import EngineSettings  # noqa: E402
from pipeline.parallel import parallel_context  # noqa: E402
from pipeline.search import pc_stable_skeleton  # noqa: E402


def _truth(name: str, names: list[str]) -> np.ndarray:
    idx = {n: i for i, n in enumerate(names)}
    m = np.zeros((len(names), len(names)), dtype=bool)
    for a, b in true_edges(name):
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


def _parents(name: str, names: list[str]) -> dict[int, list[int]]:
    idx = {n: i for i, n in enumerate(names)}
    out: dict[int, list[int]] = {i: [] for i in range(len(names))}
    for a, b in true_edges(name):
        out[idx[b]].append(idx[a])
    return out


def _forward_sample(codes: np.ndarray, cards: list[int], parents: dict[int, list[int]], n: int,
                    seed: int) -> np.ndarray:
    """Rows drawn from the DAG with each variable's distribution given its parents estimated from
    `codes` (add-one smoothing; a parent combination never seen uses the variable's marginal)."""
    rng = np.random.default_rng(seed)
    p = len(cards)
    order: list[int] = []
    placed: set[int] = set()
    while len(order) < p:
        for v in range(p):
            if v not in placed and all(u in placed for u in parents[v]):
                order.append(v)
                placed.add(v)
    out = np.zeros((p, n), dtype=np.int8)
    for v in order:
        pa = parents[v]
        k = cards[v]
        radix = 1
        key_obs = np.zeros(codes.shape[1], dtype=np.int64)
        key_new = np.zeros(n, dtype=np.int64)
        for u in pa:
            key_obs = key_obs * cards[u] + codes[u]
            key_new = key_new * cards[u] + out[u]
            radix *= cards[u]
        table = np.zeros((radix, k))
        np.add.at(table, (key_obs, codes[v].astype(np.int64)), 1.0)
        marginal = np.bincount(codes[v], minlength=k) + 1.0
        seen = table.sum(axis=1) > 0
        table[seen] += 1.0
        table[~seen] = marginal
        cum = np.cumsum(table / table.sum(axis=1, keepdims=True), axis=1)
        u01 = rng.random(n)
        out[v] = np.minimum((u01[:, None] > cum[key_new]).sum(axis=1), k - 1)
    return out


def _by_level(codes, names, cards, ctx, budget: float, max_candidates: int = 5_000_000) -> tuple[list[str], float]:
    """Run the search one level at a time until it ends or `budget` seconds are used up."""
    from itertools import combinations
    from math import comb

    st = EngineSettings(method="g", alpha=0.05)
    rows = []
    state = None
    t_all = time.perf_counter()
    level = 0
    while True:
        if state is not None:
            nb = {n: set() for n in names}
            for a, b in state.edges:
                nb[a].add(b)
                nb[b].add(a)
            bound = sum(comb(len(nb[a]) - 1, level) + comb(len(nb[b]) - 1, level) for a, b in state.edges)
            if time.perf_counter() - t_all > budget:
                rows.append(f"| {level} | not run (budget) | {len(state.edges)} | at most {bound:,} | | |")
                break
            if bound > max_candidates:
                # every test is kept for tests.parquet (about 1.4 kB each in memory): millions of
                # them would take this machine's memory, so the level is only counted
                rows.append(f"| {level} | not run (over {max_candidates:,} candidates) | {len(state.edges)} | "
                            f"at most {bound:,} | | |")
                break
        else:
            bound = len(list(combinations(names, 2)))
        kept: list = []
        t0 = time.perf_counter()
        res = pc_stable_skeleton(codes, names, cards, st, context=ctx, max_order=level, resume=state,
                                 on_level=kept.append)
        dt = time.perf_counter() - t0
        if not kept:
            break
        state = kept[-1]
        n_level = int((state.tests.field("level") == level).sum())
        rows.append(f"| {level} | {dt:.2f} | {len(state.edges)} | at most {bound:,} | {n_level:,} | "
                    f"{n_level / max(dt, 1e-9):,.0f} |")
        level += 1
        if res.levels < level:
            break
    return rows, time.perf_counter() - t_all


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
    t_ours = min(_ours(codes, names, cards)[0] for _ in range(3))
    _, res = _ours(codes, names, cards)
    t_theirs, adj = _theirs(raw)
    same = bool(np.array_equal(res.adjacency(), adj))
    lines += ["## ALARM, 10,000 rows, one worker", "",
              "| edgeproof s (best of 3) | tests | causal-learn s | ratio | identical skeleton |",
              "|---:|---:|---:|---:|---|",
              f"| {t_ours:.3f} | {len(res.tests)} | {t_theirs:.2f} | {t_theirs / t_ours:.1f}x | "
              f"{'yes' if same else 'no'} |", "", "Target: >= 20x faster on one worker.", ""]
    if not args.quick:
        idx = np.random.default_rng(12345).integers(0, codes.shape[1], 100_000)
        big = np.ascontiguousarray(codes[:, idx])
        with parallel_context(jobs=2) as ctx:
            _ours(codes[:, :3000], names, cards, ctx)  # the kernels load untimed
            level_rows, t_big = _by_level(big, names, cards, ctx, budget=60.0)
        lines += ["## ALARM resampled with replacement to 100,000 rows (seed 12345), `parallel.jobs=2`", "",
                  "Run one level at a time; a level is not started after 60 s, nor when it has over 5,000,000 "
                  "candidate tests (each test is kept for tests.parquet). Candidate tests: the "
                  "number of candidate sets of the level (an upper bound: a pair stops at its first "
                  "independence).", "",
                  "| level | seconds | edges after | candidate tests | tests run | tests/s |",
                  "|---:|---:|---:|---:|---:|---:|", *level_rows, "",
                  f"Total {t_big:.1f} s. causal-learn not run at this size.", ""]
        truth_parents = _parents("alarm", names)
        fwd = _forward_sample(codes, cards, truth_parents, 100_000, seed=2024)
        t_fwd1, _ = _ours(fwd, names, cards)
        with parallel_context(jobs=2) as ctx:
            _ours(codes[:, :3000], names, cards, ctx)
            runs = [_ours(fwd, names, cards, ctx) for _ in range(3)]
        t_first, res_fwd = runs[0]
        t_fwd = min(t for t, _ in runs)
        prec, rec, f1 = _prf(res_fwd.adjacency(), _truth("alarm", names))
        lines += ["## 100,000 rows forward-sampled from ALARM's true network (seed 2024), `parallel.jobs=2`", "",
                  "| edgeproof s, jobs 2 (best of 3) | first of the 3 | jobs 1 s | tests | levels | edges | precision | recall | F1 |",
                  "|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
                  f"| {t_fwd:.2f} | {t_first:.2f} | {t_fwd1:.2f} | {len(res_fwd.tests)} | {res_fwd.levels} | {len(res_fwd.edges)} | "
                  f"{prec:.3f} | {rec:.3f} | {f1:.3f} |", "", "Target: < 30 s.", ""]
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
