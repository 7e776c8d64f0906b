"""The one place that maps tasks to workers: serial, local processes (joblib), or a dask cluster.

Workers are module-level functions over plain data; results come back in task order, so the
outcome never depends on the number of workers. The large shared array (the coded table) is passed
as a read-only memory map to local workers and scattered once to a dask cluster's workers.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
import threading
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator, Sequence

import numpy as np

from .errors import ConfigError

__all__ = ["ParallelContext", "parallel_context", "share_array"]


def share_array(data: np.ndarray, folder: str | os.PathLike[str] | None = None) -> np.ndarray:
    """Return `data` as a read-only memory map (saved once to `folder` or a temporary folder)."""
    if isinstance(data, np.memmap):
        return data
    base = os.fspath(folder) if folder is not None else tempfile.mkdtemp(prefix="edgeproof-")
    path = os.path.join(base, "codes.npy")
    if not os.path.isfile(path):
        # written under a temporary name and renamed: a reader never maps a half-written file, and
        # a process that has the old file mapped keeps reading it
        fd, tmp = tempfile.mkstemp(prefix=".codes.", suffix=".npy", dir=base)
        with os.fdopen(fd, "wb") as fh:
            np.save(fh, np.ascontiguousarray(data))
        os.replace(tmp, path)
    return np.load(path, mmap_mode="r")


@dataclass
class ParallelContext:
    """Runs ``fn(shared, task)`` for every task, in task order.

    On a dask cluster every numpy array in `shared` (itself or the items of a tuple) is scattered
    once per context with ``broadcast=True`` and only its future travels with the tasks, so the
    coded table reaches each worker once per run however many batteries and tests use it.
    """

    jobs: int
    backend: str
    _parallel: Any = None
    _client: Any = None
    _scattered: list[tuple[Any, Any]] = field(default_factory=list)  # (object, future); kept alive
    _warming: threading.Thread | None = None
    _stack: contextlib.ExitStack | None = None  # the local pool, opened on first need (`prepare`)
    warm_up: Callable[[Any, int], Any] | None = None  # run once in each local worker when the pool opens

    def prepare(self) -> None:
        """Open the local pool and start its workers in the background (imports, compiled kernels),
        once; a run calls it when a stage has work to do, so a run whose stages are all reused
        never starts a worker."""
        if self.backend != "local" or self._parallel is not None:
            return
        from joblib import Parallel

        self._stack = contextlib.ExitStack()
        self._parallel = self._stack.enter_context(Parallel(n_jobs=self.jobs, backend="loky", batch_size=1))
        self._start_warm_up()

    def close(self) -> None:
        """Wait for the warm-up and close the local pool (if it was opened)."""
        self._finish_warm_up()
        if self._stack is not None:
            self._stack.close()
            self._stack = None
            self._parallel = None

    def map(self, fn: Callable[[Any, Any], Any], shared: Any, tasks: Sequence[Any]) -> list[Any]:
        """Apply `fn` to each task with the shared payload; results in task order."""
        if not tasks:
            return []
        self.prepare()
        if self._parallel is None and self._client is None:
            return [fn(shared, t) for t in tasks]
        if self._client is not None:
            payload = self._remote(shared)
            futures = self._client.map(fn, [payload] * len(tasks), list(tasks), pure=False)
            return self._client.gather(futures)
        from joblib import delayed

        self._finish_warm_up()
        return list(self._parallel(delayed(fn)(shared, t) for t in tasks))

    def _start_warm_up(self) -> None:
        """Start the local workers and run `warm_up` in each, in the background while the caller goes on."""
        from joblib import delayed

        fn = self.warm_up
        if fn is None:
            return

        def warm() -> None:
            with contextlib.suppress(Exception):  # best effort: a real failure shows in the first map
                self._parallel(delayed(fn)(None, i) for i in range(self.jobs))

        self._warming = threading.Thread(target=warm, name="edgeproof-warm-up", daemon=True)
        self._warming.start()

    def _finish_warm_up(self) -> None:
        if self._warming is not None:
            self._warming.join()
            self._warming = None

    def _remote(self, shared: Any) -> Any:
        """`shared` with its numpy arrays replaced by the futures of their broadcast copies."""
        if isinstance(shared, tuple) and any(isinstance(x, np.ndarray) for x in shared):
            arrays = [x for x in shared if isinstance(x, np.ndarray)]
            self._scatter_new(arrays)
            return tuple(self._future(x) if isinstance(x, np.ndarray) else x for x in shared)
        self._scatter_new([shared])
        return self._future(shared)

    def _scatter_new(self, objects: list[Any]) -> None:
        """Send the objects not on the workers yet to every worker, in one scatter call."""
        new = [o for o in objects if all(held is not o for held, _ in self._scattered)]
        new = [o for i, o in enumerate(new) if all(o is not p for p in new[:i])]
        if new:
            futures = self._client.scatter(new, broadcast=True, hash=False)
            self._scattered.extend(zip(new, futures))

    def _future(self, obj: Any) -> Any:
        """The future of an object already scattered."""
        return next(future for held, future in self._scattered if held is obj)

    @property
    def width(self) -> int:
        """How many tasks can run at once (for chunking)."""
        if self._client is not None:
            info = self._client.scheduler_info()
            return max(1, sum(w.get("nthreads", 1) for w in info.get("workers", {}).values()))
        return max(1, self.jobs)


@contextlib.contextmanager
def parallel_context(jobs: int = 1, backend: str = "local", scheduler: str | None = None,
                     warm_up: Callable[[Any, int], Any] | None = None) -> Iterator[ParallelContext]:
    """Open the workers once for a whole run (a local process pool or a dask client).

    `warm_up(None, i)` runs once in each local worker when the pool opens (the caller's imports and
    compiled code), so the pool itself knows nothing of what its tasks do.
    """
    if backend == "dask":
        if not scheduler:
            raise ConfigError(
                "`parallel.backend` = dask needs `parallel.scheduler` = tcp://HOST:PORT of a running scheduler."
            )
        try:
            from distributed import Client
        except ImportError as err:  # pragma: no cover - depends on the install
            raise ConfigError(
                "`parallel.backend` = dask needs dask.distributed: pip install 'edgeproof[cluster]'."
            ) from err
        try:
            client = Client(scheduler, timeout="8s", set_as_default=False)
        except OSError as err:
            raise ConfigError(
                f"Cannot reach the dask scheduler at `{scheduler}`; start it or fix `parallel.scheduler`."
            ) from err
        try:
            yield ParallelContext(jobs=jobs, backend=backend, _client=client)
        finally:
            client.close()
        return
    n = (os.cpu_count() or 1) if jobs == -1 else jobs
    if n <= 1:
        yield ParallelContext(jobs=1, backend="serial")
        return
    ctx = ParallelContext(jobs=n, backend="local", warm_up=warm_up)  # the pool opens when a stage first has work (`prepare`)
    try:
        yield ctx
    finally:
        ctx.close()
