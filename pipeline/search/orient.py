"""Orientation of a skeleton: unshielded colliders, tiers, then Meek's (1995) rules R1-R3.

Colliders ``a -> b <- c`` for an unshielded triple ``a - b - c`` (a, c not adjacent) are decided by
one of three rules:

* ``plain``: a collider when b is not in the separating set of (a, c);
* ``conservative`` (Colombo & Maathuis 2014): every subset of the neighbours of a and of c is tested;
  a collider when no separating set found contains b, a non-collider when all do, otherwise the
  triple is *ambiguous*: flagged, never drawn as a collider, and not used by the rules below;
* ``majority``: as conservative, but a collider when fewer than half of the separating sets contain b,
  a non-collider when more than half do, ambiguous at exactly half.

Tiers orient every edge between tiers from the earlier to the later tier first. A collider that
contradicts an orientation already made is not drawn; its edges are marked ambiguous.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import combinations
from typing import Callable, Sequence

from ..pairs import pair_key
from .knowledge import Knowledge

__all__ = ["Orientation", "orient"]

Pair = tuple[str, str]


@dataclass(frozen=True)
class Orientation:
    """A partially directed graph: directed edges, undirected edges, ambiguous edges and triples."""

    directed: frozenset[tuple[str, str]]  # (tail, head)
    undirected: frozenset[Pair]
    ambiguous_edges: frozenset[Pair]
    colliders: tuple[tuple[str, str, str], ...]
    ambiguous_triples: tuple[tuple[str, str, str], ...]
    extra_tests: int = 0
    notes: dict[Pair, str] = field(default_factory=dict)

    def label(self, a: str, b: str) -> str:
        """`a -> b`, `b -> a`, `a -- b` or `ambiguous` for a linked pair."""
        if (a, b) in self.directed:
            return f"{a} -> {b}"
        if (b, a) in self.directed:
            return f"{b} -> {a}"
        p = pair_key(a, b)
        if p in self.ambiguous_edges:
            return "ambiguous"
        return f"{p[0]} -- {p[1]}"


_pair = pair_key


def orient(
    names: Sequence[str],
    edges: frozenset[Pair] | set[Pair],
    separating_sets: dict[Pair, tuple[str, ...]],
    *,
    rule: str = "plain",
    independent: Callable[[str, str, tuple[str, ...]], bool] | None = None,
    max_order: int | None = None,
    knowledge: Knowledge | None = None,
) -> Orientation:
    """Orient the skeleton `edges` into a partially directed graph.

    `independent(a, c, s)` answers a conditional-independence question; it is needed by the
    conservative and majority rules.

    Examples
    --------
    >>> o = orient(["a", "b", "c"], {("a", "b"), ("b", "c")}, {("a", "c"): ()})
    >>> o.label("a", "b"), o.label("b", "c")
    ('a -> b', 'c -> b')
    """
    knowledge = knowledge or Knowledge()
    adj: dict[str, set[str]] = {n: set() for n in names}
    for a, b in edges:
        adj[a].add(b)
        adj[b].add(a)
    directed: set[tuple[str, str]] = set()
    ambiguous_edges: set[Pair] = set()
    extra_tests = 0

    def is_undirected(a: str, b: str) -> bool:
        return b in adj[a] and (a, b) not in directed and (b, a) not in directed

    # Tiers: an earlier tier cannot be caused by a later one.
    for a, b in sorted(edges):
        ta, tb = knowledge.tier_of(a), knowledge.tier_of(b)
        if ta is not None and tb is not None and ta != tb:
            directed.add((a, b) if ta < tb else (b, a))

    triples = []
    for b in sorted(names):
        for a, c in combinations(sorted(adj[b]), 2):
            if c not in adj[a]:
                triples.append((a, b, c))

    colliders, non_colliders, ambiguous = [], set(), []
    for a, b, c in triples:
        if rule == "plain" or independent is None:
            is_collider = b not in separating_sets.get(_pair(a, c), ())
            (colliders.append((a, b, c)) if is_collider else non_colliders.add((a, b, c)))
            continue
        sets_found = []
        for side, other in ((a, c), (c, a)):
            pool = sorted(adj[side] - {other})
            top = len(pool) if max_order is None else min(len(pool), max_order)
            for size in range(top + 1):
                for s in combinations(pool, size):
                    extra_tests += 1
                    if independent(a, c, s):
                        sets_found.append(s)
        if not sets_found:
            sepset = separating_sets.get(_pair(a, c), ())
            sets_found = [sepset]
        share = sum(b in s for s in sets_found) / len(sets_found)
        if rule == "conservative":
            verdict = "collider" if share == 0 else "non" if share == 1 else "ambiguous"
        else:
            verdict = "collider" if share < 0.5 else "non" if share > 0.5 else "ambiguous"
        if verdict == "collider":
            colliders.append((a, b, c))
        elif verdict == "non":
            non_colliders.add((a, b, c))
        else:
            ambiguous.append((a, b, c))

    for a, b, c in colliders:
        if (b, a) in directed or (b, c) in directed:
            ambiguous_edges.update({_pair(a, b), _pair(b, c)})
            continue
        directed.add((a, b))
        directed.add((c, b))
    for a, b, c in ambiguous:
        for p in (_pair(a, b), _pair(b, c)):
            ambiguous_edges.add(p)
    ambiguous_set = {(a, b, c) for a, b, c in ambiguous} | {(c, b, a) for a, b, c in ambiguous}

    changed = True
    while changed:
        changed = False
        for x, y in sorted(edges):
            for a, b in ((x, y), (y, x)):
                if not is_undirected(a, b) or _pair(a, b) in ambiguous_edges:
                    continue
                # R1: c -> a - b, c and b not adjacent, triple not ambiguous  =>  a -> b
                if any(
                    (c, a) in directed and b not in adj[c] and (c, a, b) not in ambiguous_set
                    for c in adj[a]
                ):
                    directed.add((a, b))
                    changed = True
                    continue
                # R2: a -> c -> b and a - b  =>  a -> b
                if any((a, c) in directed and (c, b) in directed for c in adj[a] & adj[b]):
                    directed.add((a, b))
                    changed = True
                    continue
                # R3: a - c -> b, a - d -> b, c and d not adjacent, a - b  =>  a -> b
                mids = [c for c in adj[a] & adj[b] if is_undirected(a, c) and (c, b) in directed]
                if any(d not in adj[c] for c, d in combinations(mids, 2)):
                    directed.add((a, b))
                    changed = True
    undirected = frozenset(
        _pair(a, b) for a, b in edges if (a, b) not in directed and (b, a) not in directed
    )
    return Orientation(
        directed=frozenset(directed),
        undirected=undirected,
        ambiguous_edges=frozenset(ambiguous_edges & undirected),
        colliders=tuple(colliders),
        ambiguous_triples=tuple(ambiguous),
        extra_tests=extra_tests,
    )
