"""Edge stability by resampling: properties on invented data, determinism, and the CHILD benchmark."""

from __future__ import annotations

import sys
from itertools import combinations
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.errors import ConfigError, DataError
from pipeline.independence.engine import EngineSettings
from pipeline.parallel import parallel_context
from pipeline.search import Knowledge, pc_stable_skeleton
from pipeline.stages import stability
from pipeline.stages.stability import _draw_rows

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))
from _common import true_skeleton  # noqa: E402

BENCHMARKS = Path(__file__).resolve().parent / "data" / "benchmarks"


def _strong_weak_null(seed: int, n: int, strong_noise: float, weak_noise: float) -> tuple[np.ndarray, list[str]]:
    """Invented binary data: a -> b strong, c -> d weak, e independent of everything."""
    rng = np.random.default_rng(seed)
    a, c, e = rng.integers(0, 2, n), rng.integers(0, 2, n), rng.integers(0, 2, n)
    b = (a + (rng.random(n) < strong_noise)) % 2
    d = (c + (rng.random(n) < weak_noise)) % 2
    return np.vstack([a, b, c, d, e]).astype(np.int8), ["a", "b", "c", "d", "e"]


def _collider(seed: int, n: int) -> tuple[np.ndarray, list[str]]:
    """Invented three-level data with a collider a -> c <- b and c -> d."""
    rng = np.random.default_rng(seed)
    a, b = rng.integers(0, 3, n), rng.integers(0, 3, n)
    c = np.where(rng.random(n) < 0.8, np.minimum(a + b, 2), rng.integers(0, 3, n))
    d = np.where(rng.random(n) < 0.8, c, rng.integers(0, 3, n))
    return np.vstack([a, b, c, d]).astype(np.int8), ["a", "b", "c", "d"]


def _load(name: str) -> tuple[np.ndarray, list[str], list[int], set[tuple[str, str]]]:
    """Coded data, names, level counts and true adjacencies of a shared benchmark set."""
    folder = BENCHMARKS / name
    if not (folder / "data.txt").is_file():
        pytest.skip(f"shared benchmark data not found at {folder}")
    with (folder / "data.txt").open(encoding="utf-8") as fh:
        names = fh.readline().split()
    raw = np.loadtxt(folder / "data.txt", skiprows=1, dtype=np.int64, ndmin=2)
    codes = np.vstack([np.unique(col, return_inverse=True)[1] for col in raw.T]).astype(np.int8)
    cards = [int(row.max()) + 1 for row in codes]
    return codes, names, cards, set(true_skeleton(name, BENCHMARKS))


def _precision(edges: frozenset[tuple[str, str]], truth: set[tuple[str, str]]) -> float:
    """Share of found adjacencies that are true (1.0 for an empty graph)."""
    return len(set(edges) & truth) / len(edges) if edges else 1.0


@settings(max_examples=8, deadline=None, derandomize=True)
@given(
    seed=st.integers(0, 2**31 - 1),
    n=st.integers(1200, 2400),
    strong_noise=st.floats(0.03, 0.15),
)
def test_strong_edge_stable_and_independent_pairs_rarely_linked(seed, n, strong_noise):
    """A strong edge is linked in nearly every half-sample, truly independent pairs in few (invented data)."""
    data, names = _strong_weak_null(seed, n, strong_noise, weak_noise=0.46)
    res = stability.run(data, names, [2] * 5, EngineSettings(), Knowledge(), resamples=20, seed=seed)
    assert res.linked[("a", "b")] >= 0.95
    assert res.linked[("a", "b")] >= res.linked[("c", "d")]
    independent = [p for p in combinations(names, 2) if p not in {("a", "b"), ("c", "d")}]
    # tolerance: at alpha 0.05 the expected share for an independent pair is about 0.05 (level-0
    # rejection rate); 0.15 for the mean over the 8 independent pairs leaves room for the overlap
    # between half-samples of one data set.
    assert np.mean([res.linked[p] for p in independent]) <= 0.15
    assert res.stable_edges == frozenset(p for p, s in res.linked.items() if s >= res.threshold)
    assert set(res.linked) == set(combinations(sorted(names), 2))


def test_strong_weak_and_independent_pair_in_one_seeded_case():
    """Seeded case: strong edge about always, weak edge in between, independent pair (a, e) seldom."""
    data, names = _strong_weak_null(11, 2000, strong_noise=0.1, weak_noise=0.46)
    res = stability.run(data, names, [2] * 5, EngineSettings(), Knowledge(), resamples=50, seed=5)
    assert res.linked[("a", "b")] == 1.0
    assert 0.1 <= res.linked[("c", "d")] <= 0.95
    assert res.linked[("a", "e")] <= 0.2  # expected about alpha = 0.05
    assert ("a", "b") in res.stable_edges and ("a", "e") not in res.stable_edges
    assert res.resamples == 50 and res.rows_per_resample == 1000 and res.caveat is None


def test_same_seed_gives_identical_figures_with_one_and_two_jobs():
    """Stability figures (linked and directed shares) are identical with jobs 1 and 2 for one seed."""
    data, names = _collider(3, 1500)
    kwargs = {"resamples": 12, "seed": 42, "orient_graph": True, "collider_rule": "conservative",
              "max_order": None}
    with parallel_context(jobs=1) as ctx1:
        one = stability.run(data, names, [3] * 4, EngineSettings(), Knowledge(), context=ctx1, **kwargs)
    with parallel_context(jobs=2) as ctx2:
        two = stability.run(data, names, [3] * 4, EngineSettings(), Knowledge(), context=ctx2, **kwargs)
    assert one == two
    assert one.directed[("a", "c")] > 0.5 and one.directed[("b", "c")] > 0.5  # the collider is found
    assert set(one.directed) == {(x, y) for p in one.linked for x, y in (p, p[::-1])}


def test_other_seed_draws_other_rows_and_rows_depend_only_on_seed_and_index():
    """Resample b's rows depend on (seed, b) only, not on B; subsamples have no repeated row."""
    five = np.random.SeedSequence(9).spawn(5)
    ten = np.random.SeedSequence(9).spawn(10)
    assert np.array_equal(_draw_rows(five[3], 1000, 500, "subsample"), _draw_rows(ten[3], 1000, 500, "subsample"))
    rows = _draw_rows(ten[7], 1000, 500, "subsample")
    assert len(np.unique(rows)) == 500 and rows.min() >= 0 and rows.max() < 1000
    assert not np.array_equal(rows, _draw_rows(ten[6], 1000, 500, "subsample"))
    boot = _draw_rows(ten[7], 1000, 1000, "bootstrap")
    assert len(boot) == 1000 and len(np.unique(boot)) < 1000  # with replacement: duplicates


def test_full_fraction_subsample_reproduces_the_single_search():
    """Subsampling every row gives the single search's skeleton in every resample, with a caveat."""
    data, names = _collider(8, 1200)
    single = pc_stable_skeleton(data, names, [3] * 4, EngineSettings())
    res = stability.run(data, names, [3] * 4, EngineSettings(), Knowledge(), resamples=3, fraction=1.0)
    assert res.stable_edges == single.edges
    assert set(res.linked.values()) <= {0.0, 1.0}
    assert res.caveat is not None and "resample_fraction" in res.caveat


def test_bootstrap_carries_the_anti_conservative_caveat():
    """Bootstrap resampling runs and says that duplicated rows make spurious edges look stable."""
    data, names = _strong_weak_null(2, 800, 0.1, 0.46)
    res = stability.run(data, names, [2] * 5, EngineSettings(), Knowledge(), resamples=5,
                        method="bootstrap", fraction=1.0)
    assert res.method == "bootstrap" and res.rows_per_resample == 800
    assert res.caveat is not None and "anti-conservative" in res.caveat


def test_knowledge_holds_in_every_resample():
    """Required pairs are linked and forbidden pairs unlinked in every resample."""
    data, names = _strong_weak_null(4, 1000, 0.1, 0.46)
    know = Knowledge.build(names, required=[("a", "e")], forbidden=[("a", "b")])
    res = stability.run(data, names, [2] * 5, EngineSettings(), know, resamples=6)
    assert res.linked[("a", "e")] == 1.0 and res.linked[("a", "b")] == 0.0


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({"method": "jackknife"}, ConfigError, "`search.resample_method`"),
        ({"resamples": 0}, ConfigError, "`search.resamples`"),
        ({"fraction": 1.5}, ConfigError, "`search.resample_fraction`"),
        ({"threshold": 0.0}, ConfigError, "`search.stable_threshold`"),
        ({"fraction": 0.001}, DataError, "rows per resample"),
    ],
)
def test_bad_arguments_are_refused(kwargs, error, match):
    """Wrong resampling settings raise the project's errors, naming the configuration key."""
    data, names = _strong_weak_null(1, 400, 0.1, 0.46)
    args = {"resamples": 5, **kwargs}
    with pytest.raises(error, match=match):
        stability.run(data, names, [2] * 5, EngineSettings(), Knowledge(), **args)


@pytest.mark.parametrize("alpha", [0.05, 0.2])
def test_child_stable_graph_precision_at_least_single_run(alpha):
    """On CHILD (2,000 rows), the stable graph's adjacency precision against the true graph is at least the single run's."""
    # Source: CHILD network (Spiegelhalter & Cowell 1992), sample and true graph from causal-learn's
    # test data, carried in tests/data/benchmarks/child.
    codes, names, cards, truth = _load("child")
    sub = codes[:, :2000]
    st_ = EngineSettings(alpha=alpha)
    single = pc_stable_skeleton(sub, names, cards, st_)
    res = stability.run(sub, names, cards, st_, Knowledge(), resamples=20, fraction=0.5, seed=0,
                        threshold=0.6)
    assert _precision(res.stable_edges, truth) >= _precision(single.edges, truth)
    assert len(res.stable_edges) >= 0.7 * len(truth)  # not bought with an empty graph
