"""Running many independent tasks: a local process pool, or a Dask cluster.

Tasks are pure functions of their arguments (a scenario, a variant, a seed), so any worker
can run any task and a retried task gives the same answer. Results are handed to
``on_result`` as they complete, in the main process, so a caller can record each one at
once (an interrupted batch keeps what it had).

Dask is an optional dependency (``pip install "trophoscape[dask]"``); it is imported only
when a scheduler is asked for.
"""

from __future__ import annotations

import os
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from typing import Any, Callable, Iterable

from .errors import InputError

__all__ = ["run_tasks", "default_workers"]


def default_workers() -> int:
    """All the cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def _call(fn, task):
    """Run one task, returning ``(ok, value)`` so a failure travels back as data."""
    try:
        return True, fn(task)
    except Exception as exc:  # a failing task is recorded by the caller; the batch goes on
        return False, f"{type(exc).__name__}: {exc}"


def run_tasks(fn: Callable[[Any], Any], tasks: Iterable, *, on_result: Callable,
              workers: int | None = None, scheduler: str | None = None,
              dask_local: int | None = None, retries: int = 2, progress: bool = True,
              desc: str = "runs") -> None:
    """Run ``fn(task)`` for every task, in parallel, calling ``on_result`` as each finishes.

    Parameters
    ----------
    fn : callable
        A module-level (picklable) function of one task.
    tasks : iterable
        The tasks (picklable).
    on_result : callable
        ``on_result(task, ok, value)`` in the calling process: ``value`` is the result, or
        the error text when ``ok`` is False.
    workers : int, optional
        Local processes (default: all cores). ``workers=1`` runs in this process.
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:8786``).
    dask_local : int, optional
        Start a Dask ``LocalCluster`` on loopback with this many workers.
    retries : int
        Dask retries of a task whose worker was lost.
    """
    from tqdm.auto import tqdm

    tasks = list(tasks)
    bar = tqdm(total=len(tasks), disable=not progress, desc=desc, unit="run", delay=1.0)
    try:
        if scheduler is not None or dask_local is not None:
            _run_dask(fn, tasks, on_result, scheduler, dask_local, retries, bar)
            return
        workers = default_workers() if workers is None else int(workers)
        if workers < 1:
            raise InputError(f"must be at least 1, got {workers}", field="--workers")
        if workers == 1 or len(tasks) <= 1:
            for task in tasks:
                on_result(task, *_call(fn, task))
                bar.update(1)
            return
        with ProcessPoolExecutor(max_workers=min(workers, len(tasks))) as pool:
            pending = {pool.submit(_call, fn, task): task for task in tasks}
            while pending:
                done, _ = wait(pending, return_when=FIRST_COMPLETED)
                for future in done:
                    task = pending.pop(future)
                    on_result(task, *future.result())
                    bar.update(1)
    finally:
        bar.close()


def _run_dask(fn, tasks, on_result, scheduler, dask_local, retries, bar):
    try:
        from dask.distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise InputError('needs Dask: pip install "trophoscape[dask]"',
                         field="--scheduler" if scheduler else "--dask-local") from None
    cluster = None
    if scheduler is None:
        cluster = LocalCluster(n_workers=int(dask_local), threads_per_worker=1,
                               host="127.0.0.1", dashboard_address=None, processes=True)
    client = Client(cluster if cluster is not None else scheduler)
    try:
        futures = client.map(_call, [fn] * len(tasks), tasks, retries=retries, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        for future in as_completed(futures):
            on_result(tasks[index[future.key]], *future.result())
            bar.update(1)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
