"""A seeded generator of categorical extracts shaped like the larger published networks.

A sparse random DAG over ``signals`` categorical signals, each with 2 to 20 levels, with a
conditional probability table per parent combination drawn from a Dirichlet distribution; rows are
forward-sampled in topological order. Two shapes are named after the networks they imitate in
size (their tables are random, not the published ones):

``hepar2-like``   70 signals, about 1.8 parents per signal, mostly 2-4 levels, a few up to 20
``barley-like``   48 signals, about 1.75 parents per signal, levels spread over 2-20

The data are invented (for size and speed measurements only, not for claiming agreement).

    python bench/gen_network.py --shape hepar2-like --rows 10000 --out /tmp/h.csv --truth-out /tmp/h.json
"""

from __future__ import annotations

import argparse
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["SHAPES", "Network", "make_network", "sample", "write_csv", "main"]


@dataclass(frozen=True)
class Shape:
    signals: int
    mean_parents: float
    max_parents: int
    few_levels: float  # share of signals with 2-4 levels; the rest draw 5-20
    max_cells: int  # a signal's table has at most this many parent combinations


SHAPES = {
    "hepar2-like": Shape(signals=70, mean_parents=1.8, max_parents=4, few_levels=0.9, max_cells=400),
    "barley-like": Shape(signals=48, mean_parents=1.75, max_parents=4, few_levels=0.4, max_cells=400),
}


@dataclass(frozen=True)
class Network:
    names: list[str]
    cards: list[int]
    parents: list[list[int]]  # indices of earlier signals (the index order is a topological order)
    tables: list[np.ndarray]  # (parent combinations, levels) cumulative probabilities per signal

    def edges(self) -> list[tuple[str, str]]:
        return [(self.names[u], self.names[v]) for v, pa in enumerate(self.parents) for u in pa]


def make_network(shape: str, seed: int = 0) -> Network:
    """A random sparse DAG of the given shape with Dirichlet(1) tables (strong enough dependences
    for 10,000 rows to find most links)."""
    s = SHAPES[shape]
    rng = np.random.default_rng(seed)
    p = s.signals
    cards = [int(rng.integers(2, 5)) if rng.random() < s.few_levels else int(rng.integers(5, 21)) for _ in range(p)]
    parents: list[list[int]] = []
    for v in range(p):
        want = min(v, s.max_parents, int(rng.poisson(s.mean_parents)))
        chosen: list[int] = []
        cells = 1
        for u in rng.permutation(v)[: 3 * want]:
            if len(chosen) == want:
                break
            if cells * cards[u] <= s.max_cells:
                chosen.append(int(u))
                cells *= cards[u]
        parents.append(sorted(chosen))
    tables = []
    for v in range(p):
        cells = int(np.prod([cards[u] for u in parents[v]])) if parents[v] else 1
        probs = rng.dirichlet(np.ones(cards[v]), size=cells)
        tables.append(np.cumsum(probs, axis=1))
    names = [f"s{v + 1:02d}" for v in range(p)]
    return Network(names=names, cards=cards, parents=parents, tables=tables)


def sample(net: Network, rows: int, seed: int = 0) -> np.ndarray:
    """Forward-sampled codes shaped (rows, signals), int8."""
    rng = np.random.default_rng([seed, 1])
    out = np.zeros((rows, len(net.names)), dtype=np.int8)
    for v, pa in enumerate(net.parents):
        key = np.zeros(rows, dtype=np.int64)
        for u in pa:
            key = key * net.cards[u] + out[:, u]
        cum = net.tables[v][key]
        draw = (rng.random(rows)[:, None] > cum).sum(axis=1)
        out[:, v] = np.minimum(draw, net.cards[v] - 1)
    return out


def write_csv(path: Path, names: list[str], codes: np.ndarray) -> Path:
    """A CSV with one header line and the codes as integers (what a user would hand in)."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    table = pa.table({n: codes[:, j].astype(np.int64) for j, n in enumerate(names)})
    pacsv.write_csv(table, str(path))
    return path


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--shape", choices=sorted(SHAPES), required=True)
    ap.add_argument("--rows", type=int, default=10_000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--out", type=Path, required=True)
    ap.add_argument("--truth-out", type=Path)
    args = ap.parse_args(argv)
    net = make_network(args.shape, args.seed)
    write_csv(args.out, net.names, sample(net, args.rows, args.seed))
    if args.truth_out:
        args.truth_out.write_text(json.dumps({"edges": net.edges()}), encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
