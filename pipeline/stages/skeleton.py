"""Skeleton search stage: PC-stable from the marginal battery on, checkpointed level by level,
then optional orientation, then the evidence table."""

from __future__ import annotations

import copy
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from ..independence.engine import CIEngine, EngineSettings
from ..independence.result import CITestResult
from ..parallel import ParallelContext
from ..runs import atomic_write_text
from ..search.knowledge import Knowledge
from ..search.orient import Orientation, orient
from ..search.skeleton import SearchState, SkeletonResult, TestRecord, pc_stable_skeleton
from ._evidence import evidence_frame, tests_frame

__all__ = ["SearchOutcome", "run", "state_to_json", "state_from_json"]


@dataclass(frozen=True)
class SearchOutcome:
    """The skeleton, its orientation and the two tables that explain them."""

    skeleton: SkeletonResult
    orientation: Orientation | None
    tests: pd.DataFrame
    evidence: pd.DataFrame


def state_to_json(state: SearchState) -> str:
    """Serialise a search state (plain JSON, nothing executable)."""
    return json.dumps(
        {
            "level": state.level,
            "edges": sorted(state.edges),
            "separating_sets": [[list(k), list(v)] for k, v in sorted(state.separating_sets.items())],
            "removed_by": [[list(k), v] for k, v in sorted(state.removed_by.items())],
            "disagreements": sorted(state.disagreements),
            "tests": [[t.level, t.result.to_dict()] for t in state.tests],
        }
    )


def state_from_json(text: str) -> SearchState:
    """Read back a state written by `state_to_json`."""
    d = json.loads(text)
    tests = []
    for level, r in d["tests"]:
        r = dict(r)
        r["given"] = tuple(r["given"])
        tests.append(TestRecord(level=level, result=CITestResult(**r)))
    return SearchState(
        level=d["level"],
        edges={tuple(e) for e in d["edges"]},  # type: ignore[misc]
        separating_sets={tuple(k): tuple(v) for k, v in d["separating_sets"]},  # type: ignore[misc]
        removed_by={tuple(k): v for k, v in d["removed_by"]},  # type: ignore[misc]
        tests=tests,
        disagreements={tuple(e) for e in d["disagreements"]},  # type: ignore[misc]
    )


def run(
    data: np.ndarray,
    names: list[str],
    cards: list[int],
    settings: EngineSettings,
    knowledge: Knowledge,
    marginal_state: SearchState,
    *,
    max_order: int | None,
    orient_graph: bool = False,
    collider_rule: str = "conservative",
    context: ParallelContext | None = None,
    checkpoint: Path | None = None,
    stability: dict[tuple[str, str], float] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> SearchOutcome:
    """Go on from the marginal battery to the full skeleton; resume from `checkpoint` if present."""
    state = copy.deepcopy(marginal_state)
    if checkpoint is not None and checkpoint.is_file():
        state = state_from_json(checkpoint.read_text(encoding="utf-8"))

    def save(s: SearchState) -> None:
        if checkpoint is not None:
            atomic_write_text(checkpoint, state_to_json(s))

    skeleton = pc_stable_skeleton(
        data, names, cards, settings, max_order=max_order, knowledge=knowledge, context=context,
        resume=state, on_level=save, progress=progress,
    )
    orientation = None
    records = list(skeleton.tests)
    phases = ["battery" if r.level == 0 else "skeleton" for r in records]
    if orient_graph:
        engine = CIEngine(data, names, cards, settings)
        asked: dict[tuple[str, str, tuple[str, ...]], bool] = {}

        def independent(a: str, c: str, s: tuple[str, ...]) -> bool:
            key = (min(a, c), max(a, c), tuple(sorted(s)))
            if key not in asked:
                r = engine.test(key[0], key[1], key[2])
                records.append(TestRecord(level=len(s), result=r))
                phases.append("orientation")
                asked[key] = r.independent
            return asked[key]

        orientation = orient(
            names, skeleton.edges, skeleton.separating_sets, rule=collider_rule,
            independent=independent, max_order=max_order, knowledge=knowledge,
        )
    tests = tests_frame(records, phases)
    evidence = evidence_frame(skeleton, knowledge, settings.alpha, orientation, stability)
    return SearchOutcome(skeleton=skeleton, orientation=orientation, tests=tests, evidence=evidence)
