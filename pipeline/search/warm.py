"""What a local worker loads before its first search level: the test engine and its compiled kernels.

Passed to `pipeline.parallel.parallel_context` as its warm-up, so the pool of workers knows nothing
of the search.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["warm_worker"]


def warm_worker(_shared: Any, task: int) -> int:
    """Import the test engine and load its compiled kernels in a worker (one tiny test per set size)."""
    from ..independence.engine import CIEngine, EngineSettings
    from .skeleton import pc_stable_skeleton

    rng = np.random.default_rng(task)
    data = rng.integers(0, 2, size=(5, 256)).astype(np.int8)
    names = ["a", "b", "c", "d", "e"]
    engine = CIEngine(data, names, [2] * 5)
    for given in ((), ("c",), ("c", "d"), ("c", "d", "e")):
        engine.test("a", "b", given)
    # the kernels a search level uses, over distinct weighted rows and over plain rows
    for compress in (True, False):
        pc_stable_skeleton(data, names, [2] * 5, EngineSettings(compress_rows=compress))
    return task
