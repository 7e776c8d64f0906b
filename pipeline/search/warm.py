"""What a local worker loads before its first search level: the test engine and its compiled kernels.

Passed to `pipeline.parallel.parallel_context` as its warm-up, so the pool of workers knows nothing
of the search.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["warm_worker"]


def warm_worker(_shared: Any, task: int) -> int:
    """Import the test engine and load its compiled kernels in a worker (one tiny test per set size).

    Also raises the worker pool's leak guard: it restarts a worker whose resident memory grew by
    300 MB since its first task, and the pages of the memory-mapped tables a worker reads count as
    its own (a 1,000,000-row table of scores is 320 MB), so it would restart healthy workers and
    throw away their engines and caches (measured on a 300,000-row numeric extract). The engines
    cap their caches themselves.
    """
    try:
        from joblib.externals.loky import process_executor

        if isinstance(getattr(process_executor, "_MAX_MEMORY_LEAK_SIZE", None), int):
            process_executor._MAX_MEMORY_LEAK_SIZE = max(process_executor._MAX_MEMORY_LEAK_SIZE, 16 * 1024**3)
    except ImportError:  # pragma: no cover - another pool
        pass
    from ..independence.engine import CIEngine, EngineSettings
    from .skeleton import pc_stable_skeleton

    rng = np.random.default_rng(task)
    data = rng.integers(0, 2, size=(5, 256)).astype(np.int8)
    data.flags.writeable = False  # as the tables of a run are (memory maps): the same compiled kernels
    names = ["a", "b", "c", "d", "e"]
    engine = CIEngine(data, names, [2] * 5, EngineSettings(compress_rows=False))
    for given in ((), ("c",), ("c", "d"), ("c", "d", "e")):
        engine.test("a", "b", given)
    # the kernels a search level uses, over distinct weighted rows and over plain rows
    for compress in (True, False):
        pc_stable_skeleton(data, names, [2] * 5, EngineSettings(compress_rows=compress))
    import gc

    gc.freeze()  # the modules just loaded are long-lived: the collector need not rescan them (see api._frozen_heap)
    return task
