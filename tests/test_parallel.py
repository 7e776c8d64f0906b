"""The local pool: the run's process takes tasks beside its workers, results in task order, errors raised."""

from __future__ import annotations

import operator
import os
import time

import pytest

from pipeline.parallel import parallel_context


def _pid_after(pause: float, task: int) -> tuple[int, int]:
    """The task and the process that ran it, after a pause (so that both processes get tasks)."""
    time.sleep(pause)
    return task, os.getpid()


def _sleep_warm_up(_shared, task):
    """A worker warm-up that outlasts the test's map (a worker still starting)."""
    time.sleep(20)
    return task


def _quick_warm_up(_shared, task):
    return task


def test_results_in_task_order_from_both_processes():
    """Forty tasks on a two-job pool come back in task order, some run by the worker and some by the run's
    own process (the worker warm before the map, so a slow start cannot leave it out)."""
    with parallel_context(jobs=2, warm_up=_quick_warm_up) as ctx:
        ctx.prepare()
        ctx._finish_warm_up()
        out = ctx.map(_pid_after, 0.02, list(range(40)))
    assert [t for t, _ in out] == list(range(40))
    assert {p for _, p in out} - {os.getpid()}  # the worker took some
    assert os.getpid() in {p for _, p in out}  # and so did this process


def test_tasks_never_wait_for_a_worker_still_warming_up():
    """While the worker's warm-up runs, the run's own process takes every task and the map returns."""
    with parallel_context(jobs=2, warm_up=_sleep_warm_up) as ctx:
        out = ctx.map(_pid_after, 0.0, list(range(12)))
        assert not any(f.done() for f in ctx._warming)
        ctx._executor.shutdown(kill_workers=True)  # not 20 s more for the sleeping warm-up
        ctx._warming = []
    assert out == [(t, os.getpid()) for t in range(12)]


def test_one_task_opens_no_pool():
    """A map of a single task runs in the run's own process and starts no worker."""
    with parallel_context(jobs=2) as ctx:
        assert ctx.map(operator.mul, 3, [5]) == [15]
        assert not ctx.opened
        assert ctx.map(operator.mul, 3, [5, 6]) == [15, 18]
        assert ctx.opened


@pytest.mark.parametrize("bad", [0, 39])
def test_an_error_in_any_task_is_raised(bad):
    """A task that fails (the first or the last, whichever process takes it) raises its error from the map."""
    tasks = [1.0 + i for i in range(40)]
    tasks[bad] = 0.0
    with parallel_context(jobs=2) as ctx:
        with pytest.raises(ZeroDivisionError):
            ctx.map(operator.truediv, 1.0, tasks)
        assert ctx.map(operator.truediv, 1.0, [1.0, 2.0, 4.0]) == [1.0, 0.5, 0.25]  # the pool still works


def test_no_ahead_start_when_told():
    """`ahead` off: a stage's notice (`prepare`) opens no pool; the first map of several tasks does."""
    with parallel_context(jobs=2) as ctx:
        ctx.ahead = False
        ctx.prepare()
        assert not ctx.opened
        assert ctx.map(operator.mul, 2, [1, 2, 3]) == [2, 4, 6]
        assert ctx.opened


def test_a_failed_map_does_not_wait_for_a_worker_still_warming_up():
    """A task of the run's own process that fails while the worker still warms up raises at once: the map
    returns before the warm-up ends."""
    with parallel_context(jobs=2, warm_up=_sleep_warm_up) as ctx:
        with pytest.raises(ZeroDivisionError):
            ctx.map(operator.truediv, 1.0, [1.0, 0.0, 2.0])
        assert not any(f.done() for f in ctx._warming)
        ctx._executor.shutdown(kill_workers=True)  # not 20 s more for the sleeping warm-up
        ctx._warming = []
