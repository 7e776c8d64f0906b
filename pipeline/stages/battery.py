"""Marginal battery: the order-0 test of every pair of signals, run in parallel."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..independence.engine import EngineSettings
from ..parallel import ParallelContext
from ..search.knowledge import Knowledge
from ..search.skeleton import SearchState, SignalExtras, pc_stable_skeleton
from ._evidence import tests_frame

__all__ = ["Marginal", "run"]


@dataclass(frozen=True)
class Marginal:
    """The order-0 tests and the search state they leave (the skeleton stage goes on from it)."""

    tests: pd.DataFrame
    state: SearchState


def run(
    data: np.ndarray,
    names: list[str],
    cards: list[int],
    settings: EngineSettings,
    knowledge: Knowledge,
    context: ParallelContext | None = None,
    extras: SignalExtras | None = None,
) -> Marginal:
    """Test every pair that is not forbidden with the empty conditioning set."""
    captured: list[SearchState] = []
    pc_stable_skeleton(
        data, names, cards, settings, max_order=0, knowledge=knowledge, context=context,
        on_level=captured.append, extras=extras,
    )
    if captured:
        state = captured[-1]
    else:  # fewer than two signals, or every pair forbidden
        state = SearchState(level=1, edges=set())
    return Marginal(tests=tests_frame(state.tests.columns(), names), state=state)
