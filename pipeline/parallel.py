"""The one place that maps tasks to workers: serial, local processes (joblib), or a dask cluster.

Workers are module-level functions over plain data; results come back in task order, so the
outcome never depends on the number of workers nor on who ran which task. The large shared array
(the coded table) is passed as a read-only memory map to local workers and scattered once to a dask
cluster's workers.

With ``jobs`` = n on this machine the run's own process is one of the n: it takes tasks from the
same list as its n - 1 worker processes, and a worker gets tasks only once it has warmed up. On the
two-core machine a second worker process cost a second start-up (interpreter, numba, scipy.special,
compiled kernels: about a second of processor time) while the run's process waited with nothing to
do, and a level whose tasks end before the workers are warm is run by the run's process alone.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
import threading
from concurrent.futures import FIRST_COMPLETED, wait
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


_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS",
                "VECLIB_MAXIMUM_THREADS", "NUMBA_NUM_THREADS", "NUMEXPR_NUM_THREADS")


def _worker_env(processes: int) -> dict[str, str]:
    """Thread limits of the numeric libraries in each worker: the cores shared among the processes that
    compute (as joblib sets them for its own pools), unless the environment sets them already."""
    per = str(max((os.cpu_count() or 1) // max(processes, 1), 1))
    return {var: os.environ.get(var, per) for var in _THREAD_VARS}


class _Share:
    """The tasks of one `map` on a local pool, handed out one at a time to the run's process and to
    the workers; each result stored at its task's place."""

    def __init__(self, n: int) -> None:
        self.results: list[Any] = [None] * n
        self._n = n
        self._next = 0
        self._lock = threading.Lock()
        self.stopped = False
        self.to_workers = 0  # tasks handed to the workers
        self.error: BaseException | None = None

    def take(self, worker: bool = False) -> int | None:
        with self._lock:
            if self.stopped or self._next >= self._n:
                return None
            i = self._next
            self._next += 1
            if worker:
                self.to_workers += 1
            return i

    def exhausted(self) -> bool:
        """Whether every task has been handed out (or the map stopped)."""
        with self._lock:
            return self.stopped or self._next >= self._n

    def stop(self, error: BaseException | None = None) -> None:
        with self._lock:
            self.stopped = True
            if error is not None and self.error is None:
                self.error = error


@dataclass
class ParallelContext:
    """Runs ``fn(shared, task)`` for every task, in task order.

    Locally (``backend`` "local") the run's process is one of the `jobs` processes that compute: it
    runs tasks itself while ``jobs - 1`` worker processes take the others (see the module's note).
    On a dask cluster every numpy array in `shared` (itself or the items of a tuple) is scattered
    once per context with ``broadcast=True`` and only its future travels with the tasks, so the
    coded table reaches each worker once per run however many batteries and tests use it.
    """

    jobs: int
    backend: str
    _executor: Any = None  # the local worker processes (joblib's executor: large arrays travel as memory maps)
    _client: Any = None
    _scattered: list[tuple[Any, Any]] = field(default_factory=list)  # (object, future); kept alive
    _warming: list[Any] = field(default_factory=list)  # the warm-up futures, one per worker
    _opened: bool = False
    warm_up: Callable[[Any, int], Any] | None = None  # run once in each local worker when the pool opens
    ahead: bool = True  # whether `prepare` (a stage's notice that work may follow) opens the local pool

    @property
    def workers(self) -> int:
        """Worker processes of a local pool (the run's own process computes too)."""
        return max(self.jobs - 1, 0) if self.backend == "local" else 0

    @property
    def opened(self) -> bool:
        """Whether workers run (a local pool opened, or a cluster)."""
        return self._client is not None or self._executor is not None

    def prepare(self) -> None:
        """Open the local pool ahead of its first tasks and start its workers in the background
        (imports, compiled kernels), once, unless `ahead` is off (the caller expects too little work
        to repay a worker's start-up: the pool then opens with the first map of more than one task).
        A run calls it when a stage has work to do, so a run whose stages are all reused never starts
        a worker."""
        if self.ahead:
            self._open()

    def _open(self) -> None:
        if self.backend != "local" or self._opened:
            return
        from joblib.executor import get_memmapping_executor

        self._opened = True
        self._executor = get_memmapping_executor(self.workers, timeout=300, env=_worker_env(self.jobs))
        if self.warm_up is not None:
            self._warming = [self._executor.submit(self.warm_up, None, i) for i in range(self.workers)]

    def close(self) -> None:
        """Wait for the warm-up and let go of the temporary memory maps the pool made of large arrays
        (as joblib's own pools do when they end); the worker processes stay for the process (joblib's
        reusable executor ends them when idle or at exit)."""
        self._finish_warm_up()
        if self._executor is not None:
            manager = getattr(self._executor, "_temp_folder_manager", None)
            if manager is not None:
                manager._clean_temporary_resources(force=False, allow_non_empty=True)
            self._executor = None

    def map(self, fn: Callable[[Any, Any], Any], shared: Any, tasks: Sequence[Any]) -> list[Any]:
        """Apply `fn` to each task with the shared payload; results in task order."""
        if not tasks:
            return []
        if len(tasks) == 1 and self._client is None and self._executor is None:
            return [fn(shared, tasks[0])]  # one task: this process runs it, and no pool opens for it
        self._open()
        if self._client is not None:
            payload = self._remote(shared)
            futures = self._client.map(fn, [payload] * len(tasks), list(tasks), pure=False)
            return self._client.gather(futures)
        if self._executor is None:
            return [fn(shared, t) for t in tasks]
        return self._share(fn, shared, list(tasks))

    def _share(self, fn: Callable[[Any, Any], Any], shared: Any, tasks: list[Any]) -> list[Any]:
        """Run the tasks here and in the workers at once: this process takes the next task whenever it
        is free; a thread hands the workers one task each at a time once their warm-up is over (a
        level that ends before that never waits for them)."""
        share = _Share(len(tasks))
        feeder = threading.Thread(target=self._feed, args=(fn, shared, tasks, share),
                                  name="edgeproof-feed", daemon=True)
        feeder.start()
        try:
            while (i := share.take()) is not None:
                share.results[i] = fn(shared, tasks[i])
        except BaseException:
            share.stop()
            feeder.join()  # the tasks already with the workers end first
            raise
        if share.to_workers:  # otherwise the feeder never got one, and never will
            feeder.join()
        if share.error is not None:
            raise share.error
        return share.results

    def _feed(self, fn: Callable[[Any, Any], Any], shared: Any, tasks: list[Any], share: _Share) -> None:
        """Hand the workers tasks (one in flight per worker) until none is left; an error stops the map."""
        # a worker's failed warm-up shows in its first task; a map that ended (or failed) meanwhile does
        # not wait for the warm-up
        while self._warming and wait(self._warming, timeout=0.05).not_done:
            if share.exhausted():
                return
        executor = self._executor
        running: dict[Any, int] = {}  # future -> task index
        try:
            while True:
                while len(running) < self.workers and (i := share.take(worker=True)) is not None:
                    running[executor.submit(fn, shared, tasks[i])] = i
                if not running:
                    return
                done, _ = wait(running, return_when=FIRST_COMPLETED)
                for future in done:
                    share.results[running.pop(future)] = future.result()
        except BaseException as err:  # noqa: BLE001 - raised by the map's own thread
            share.stop(err)
            wait(running)

    def _finish_warm_up(self) -> None:
        if self._warming:
            wait(self._warming)
            self._warming = []

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
    # the run's process computes too: n - 1 worker processes, opened when a stage first has work (`prepare`)
    ctx = ParallelContext(jobs=n, backend="local", warm_up=warm_up)
    try:
        yield ctx
    finally:
        ctx.close()
