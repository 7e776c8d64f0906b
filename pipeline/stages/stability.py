"""Edge stability: rerun the skeleton search on random resamples of the rows and count each edge.

Stability selection (Meinshausen & Buhlmann 2010) draws half of the rows without replacement,
reruns the search on each draw and keeps the edges found in a large share of the draws. Here:

* resample ``b`` of ``B`` draws its rows with ``np.random.default_rng(SeedSequence(seed).spawn(B)[b])``,
  so its rows depend only on ``(seed, b)`` and the figures are identical for any number of workers;
* ``subsample`` draws ``round(fraction * rows)`` rows without replacement (default half);
  ``bootstrap`` draws as many with replacement (``fraction = 1`` is the classical bootstrap). Duplicated
  rows make the tests anti-conservative, so spurious edges look stable; the result says so in ``caveat``;
* each resample is one task of a parallel battery; inside a task the search runs serially;
* the figures are shares of the ``B`` resamples: ``linked[(a, b)]`` with ``a < b`` by name for every
  pair, and, when orienting, ``directed[(a, b)]`` for ``a -> b`` and ``directed[(b, a)]`` for ``b -> a``.
"""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from itertools import combinations
from typing import Any

import numpy as np

from ..errors import ConfigError, DataError
from ..independence.engine import CIEngine, EngineSettings
from ..pairs import pair_key
from ..parallel import ParallelContext, share_array
from ..search.knowledge import Knowledge
from ..search.orient import orient
from ..search.skeleton import SignalExtras, pc_stable_skeleton

__all__ = ["StabilityResult", "run"]

Pair = tuple[str, str]

_METHODS = ("subsample", "bootstrap")
_BOOTSTRAP_CAVEAT = (
    "Bootstrap resampling draws rows with replacement: duplicated rows make every test "
    "anti-conservative (too many small p-values), so spurious edges look stable; prefer "
    "`search.resample_method: subsample`."
)
_FULL_CAVEAT = (
    "Subsampling with `search.resample_fraction` = 1 reuses every row in every resample: all "
    "resamples give the same graph, so the figures are only 0 or 1; use a fraction below 1 (e.g. 0.5)."
)


@dataclass(frozen=True)
class StabilityResult:
    """How often each pair was linked (and each edge directed) over the resamples."""

    linked: dict[Pair, float]  # (a, b), a < b by name, for every pair -> share of resamples linked
    directed: dict[tuple[str, str], float]  # (tail, head) -> share with tail -> head; {} without orientation
    stable_edges: frozenset[Pair]  # pairs with linked share >= threshold
    resamples: int
    method: str
    fraction: float
    seed: int
    threshold: float = 0.6
    rows_per_resample: int = 0
    caveat: str | None = None
    counts: dict[Pair, int] = field(default_factory=dict)  # resamples in which each pair was linked

    def stability(self, a: str, b: str) -> float:
        """Share of resamples in which the pair was linked (order of the names does not matter)."""
        return self.linked[pair_key(a, b)]


def _draw_rows(child: np.random.SeedSequence, n_rows: int, take: int, method: str) -> np.ndarray:
    """Row indices of one resample, sorted (without replacement for subsample)."""
    rng = np.random.default_rng(child)
    if method == "subsample":
        rows = rng.choice(n_rows, size=take, replace=False)
    else:
        rows = rng.integers(0, n_rows, size=take)
    return np.sort(rows)


def _draw_blocks(child: np.random.SeedSequence, n_rows: int, take: int, block: int) -> np.ndarray:
    """Rows of one resample of time-ordered rows: whole blocks of `block` consecutive windows, drawn
    without replacement (blocks keep the persistence within them, as in Kunsch 1989)."""
    rng = np.random.default_rng(child)
    starts = np.arange(0, n_rows, block)
    chosen = np.sort(rng.choice(starts.size, size=max(1, round(starts.size * take / n_rows)), replace=False))
    return np.concatenate([np.arange(starts[i], min(starts[i] + block, n_rows)) for i in chosen])


def _sub_extras(extras: SignalExtras, rows: np.ndarray) -> SignalExtras:
    """The scores and previous windows of a resample (a previous window left out of it is no partner)."""
    prev = None
    if extras.prev is not None:
        pos = np.full(len(extras.prev), -1, dtype=np.int64)
        pos[rows] = np.arange(rows.size)
        old = np.asarray(extras.prev)[rows]
        prev = np.where(old >= 0, pos[np.maximum(old, 0)], -1)
    return replace(extras, scores=np.ascontiguousarray(np.asarray(extras.scores)[:, rows]), prev=prev)


def _resample_worker(shared: tuple[Any, ...], task: tuple[int, np.random.SeedSequence]):
    """Run the search on one resample; return its edges and, when orienting, its directed edges."""
    data, names, cards, settings, knowledge, max_order, orient_graph, collider_rule, take, method, extras = shared
    _, child = task
    if extras is not None and extras.prev is not None:
        rows = _draw_blocks(child, data.shape[1], take, max(10, int(4 * max(extras.series_length, 1.0) ** (1 / 3))))
    else:
        rows = _draw_rows(child, data.shape[1], take, method)
    sub = np.ascontiguousarray(data[:, rows])
    sub_extras = _sub_extras(extras, rows) if extras is not None else None
    skeleton = pc_stable_skeleton(sub, names, cards, settings, max_order=max_order, knowledge=knowledge,
                                  extras=sub_extras)
    if not orient_graph:
        return skeleton.edges, None
    engine = sub_extras.engine(sub, names, cards, settings, None) if sub_extras is not None else CIEngine(
        sub, names, cards, settings)
    asked: dict[tuple[str, str, tuple[str, ...]], bool] = {}

    def independent(a: str, c: str, s: tuple[str, ...]) -> bool:
        key = (min(a, c), max(a, c), tuple(sorted(s)))
        if key not in asked:
            asked[key] = engine.test(key[0], key[1], key[2]).independent
        return asked[key]

    orientation = orient(
        names, skeleton.edges, skeleton.separating_sets, rule=collider_rule,
        independent=independent, max_order=max_order, knowledge=knowledge,
    )
    return skeleton.edges, orientation.directed


def _check(resamples: int, fraction: float, method: str, threshold: float, n_rows: int) -> int:
    """Validate the arguments; return the number of rows per resample."""
    if method not in _METHODS:
        raise ConfigError(f"`search.resample_method` = {method!r}; use subsample or bootstrap.")
    if resamples < 1:
        raise ConfigError(f"`search.resamples` = {resamples}; use at least 1 (0 turns resampling off).")
    if not 0.0 < fraction <= 1.0:
        raise ConfigError(f"`search.resample_fraction` = {fraction}; use a share in (0, 1], e.g. 0.5.")
    if not 0.0 < threshold <= 1.0:
        raise ConfigError(f"`search.stable_threshold` = {threshold}; use a share in (0, 1], e.g. 0.6.")
    take = round(fraction * n_rows)
    if take < 2:
        raise DataError(
            f"Resampling {fraction} of {n_rows} rows leaves {take} rows per resample; "
            "raise `search.resample_fraction` or use a larger extract."
        )
    return take


def _shares(names: Sequence[str], outcomes: list[tuple[frozenset, frozenset | None]], orient_graph: bool):
    """Count edges over the resamples: (counts, linked shares, directed shares)."""
    b_total = len(outcomes)
    pairs = list(combinations(sorted(names), 2))
    counts = {p: 0 for p in pairs}
    heads = {(a, b): 0 for p in pairs for a, b in (p, p[::-1])} if orient_graph else {}
    for edges, directed in outcomes:
        for p in edges:
            counts[p] += 1
        for d in directed or ():
            heads[d] += 1
    linked = {p: c / b_total for p, c in counts.items()}
    return counts, linked, {d: c / b_total for d, c in heads.items()}


def _map_resamples(shared: tuple[Any, ...], tasks: list, context: ParallelContext | None) -> list:
    """One task per resample; local workers get the coded table once, as a read-only memory map."""
    if context is None:
        return [_resample_worker(shared, t) for t in tasks]
    data = shared[0]
    if context.backend != "local" or isinstance(data, np.memmap):
        return context.map(_resample_worker, shared, tasks)
    folder = tempfile.mkdtemp(prefix="edgeproof-stability-")
    try:
        mapped = (share_array(data, folder), *shared[1:])
        return context.map(_resample_worker, mapped, tasks)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def run(
    data: np.ndarray,
    names: Sequence[str],
    cards: Sequence[int],
    settings: EngineSettings,
    knowledge: Knowledge,
    *,
    resamples: int,
    fraction: float = 0.5,
    method: str = "subsample",
    max_order: int | None = None,
    orient_graph: bool = False,
    collider_rule: str = "conservative",
    seed: int = 0,
    context: ParallelContext | None = None,
    threshold: float = 0.6,
    extras: SignalExtras | None = None,
) -> StabilityResult:
    """Rerun the skeleton search on random resamples of the rows and report how often each edge appears.

    Parameters
    ----------
    data : coded table shaped (variables, rows), -1 for missing.
    names, cards : variable names and level counts, in the order of `data`.
    settings : the test settings; the same as the single run's.
    knowledge : required and forbidden pairs and tiers (required pairs are linked in every resample).
    resamples : number of resamples B (at least 1).
    fraction : share of the rows drawn per resample.
    method : ``"subsample"`` (without replacement) or ``"bootstrap"`` (with replacement).
    max_order, orient_graph, collider_rule : as for the single search.
    seed : root of the resample seeds (``np.random.SeedSequence(seed).spawn(resamples)``).
    context : where the resamples run (one task per resample; serial when None).
    threshold : a pair is stable when linked in at least this share of the resamples.
    extras : numeric scores and previous windows (as for the search); with time-ordered rows a resample
        is made of whole blocks of consecutive windows, so the persistence inside a block stays.

    Returns
    -------
    StabilityResult

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> x = rng.integers(0, 2, 800); y = (x + (rng.random(800) < .1)) % 2; z = rng.integers(0, 2, 800)
    >>> res = run(np.vstack([x, y, z]).astype(np.int8), ["x", "y", "z"], [2, 2, 2], EngineSettings(),
    ...           Knowledge(), resamples=10, seed=3)
    >>> res.linked[("x", "y")], sorted(res.stable_edges)
    (1.0, [('x', 'y')])
    """
    data = data if isinstance(data, np.memmap) else np.asarray(data)
    names = list(names)
    n_rows = int(data.shape[1])
    take = _check(resamples, fraction, method, threshold, n_rows)
    tasks = list(enumerate(np.random.SeedSequence(seed).spawn(resamples)))
    shared = (data, names, [int(c) for c in cards], settings, knowledge, max_order, orient_graph,
              collider_rule, take, method, extras)
    outcomes = _map_resamples(shared, tasks, context)
    counts, linked, directed = _shares(names, outcomes, orient_graph)
    if method == "bootstrap":
        caveat: str | None = _BOOTSTRAP_CAVEAT
    else:
        caveat = _FULL_CAVEAT if take == n_rows else None
    return StabilityResult(
        linked=linked, directed=directed,
        stable_edges=frozenset(p for p, s in linked.items() if s >= threshold),
        resamples=resamples, method=method, fraction=float(fraction), seed=int(seed),
        threshold=float(threshold), rows_per_resample=take, caveat=caveat, counts=counts,
    )
