"""Orientation: colliders, Meek's rules R1-R3, the conservative rule and tiers."""

from __future__ import annotations

import numpy as np

from pipeline.independence import CIEngine, EngineSettings
from pipeline.search import Knowledge, orient, pc_stable_skeleton


def _p(a, b):
    return (a, b) if a <= b else (b, a)


def test_collider_on_generated_data_is_oriented():
    """Data drawn from a -> b <- c give the v-structure a -> b <- c (Spirtes, Glymour & Scheines 2000)."""
    rng = np.random.default_rng(0)
    n = 5000
    a = rng.integers(0, 2, n)
    c = rng.integers(0, 2, n)
    b = (a + c + (rng.random(n) < 0.1)) % 3
    data = np.vstack([a, b, c]).astype(np.int8)
    names = ["a", "b", "c"]
    sk = pc_stable_skeleton(data, names, [2, 3, 2], EngineSettings())
    assert sk.edges == {("a", "b"), ("b", "c")}
    eng = CIEngine(data, names, [2, 3, 2])
    o = orient(names, sk.edges, sk.separating_sets, rule="conservative",
               independent=lambda x, y, s: eng.test(x, y, s).independent)
    assert o.directed == {("a", "b"), ("c", "b")}


def test_meek_r1_chain_after_collider():
    """R1 (Meek 1995): a -> b <- c and b - d with d not adjacent to a or c orients b -> d."""
    edges = {_p("a", "b"), _p("c", "b"), _p("b", "d")}
    seps = {_p("a", "c"): (), _p("a", "d"): ("b",), _p("c", "d"): ("b",)}
    o = orient(list("abcd"), edges, seps)
    assert o.directed == {("a", "b"), ("c", "b"), ("b", "d")}


def test_meek_r2_avoids_cycle():
    """R2 (Meek 1995): a -> c -> b with a - b orients a -> b."""
    # a -> c <- d is a collider; R1 then gives c -> b (d, b not adjacent); R2 then gives a -> b.
    edges = {_p("a", "c"), _p("d", "c"), _p("c", "b"), _p("a", "b")}
    seps = {_p("a", "d"): (), _p("d", "b"): ("c",)}
    o = orient(list("abcd"), edges, seps)
    assert ("a", "c") in o.directed and ("c", "b") in o.directed
    assert ("a", "b") in o.directed


def test_meek_r3_two_colliders():
    """R3 (Meek 1995): a - c -> b, a - d -> b, c and d not adjacent, a - b orients a -> b."""
    edges = {_p("a", "c"), _p("a", "d"), _p("c", "b"), _p("d", "b"), _p("a", "b")}
    seps = {_p("c", "d"): ("a",)}
    o = orient(list("abcd"), edges, seps)
    assert {("c", "b"), ("d", "b")} <= o.directed
    assert ("a", "b") in o.directed
    assert o.label("a", "c") == "a -- c" and o.label("a", "d") == "a -- d"


def test_conservative_rule_marks_ambiguous_triple():
    """Conservative rule (Colombo & Maathuis 2014): b in some separating sets and not others makes the triple ambiguous."""
    edges = {_p("a", "b"), _p("b", "c")}
    seps = {_p("a", "c"): ()}

    def independent(x, y, s):  # a and c are independent given {} and given {b}
        return True

    o = orient(["a", "b", "c"], edges, seps, rule="conservative", independent=independent)
    assert o.ambiguous_triples == (("a", "b", "c"),)
    assert not o.directed
    assert o.label("a", "b") == "ambiguous"
    plain = orient(["a", "b", "c"], edges, seps)
    assert plain.directed == {("a", "b"), ("c", "b")}


def test_tiers_orient_earlier_to_later():
    """An edge between tiers points from the earlier tier to the later one."""
    names = ["deploy", "latency", "errors"]
    know = Knowledge.build(names, tiers=[["deploy"], ["latency", "errors"]])
    edges = {_p("deploy", "latency"), _p("latency", "errors")}
    seps = {_p("deploy", "errors"): ("latency",)}
    o = orient(names, edges, seps, knowledge=know)
    assert ("deploy", "latency") in o.directed
    assert ("latency", "errors") in o.directed  # then R1
