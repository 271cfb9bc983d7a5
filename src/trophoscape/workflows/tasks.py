"""Running many independent tasks: a local process pool, or a Dask cluster.

Tasks are pure functions of their arguments (a scenario, a variant, a seed), so any worker
can run any task and a retried task gives the same answer. Results are handed to
``on_result`` as they complete, in the main process, so a caller can record each one at
once (an interrupted batch keeps what it had).

What happens when things go wrong:

- A task that raises is not retried (the same inputs give the same error): its error text
  goes to ``on_result`` with ``ok=False`` and the batch goes on.
- A local worker process that dies (killed, out of memory) breaks Python's process pool; the
  pool is replaced and the tasks that were in flight are run again, each at most ``retries``
  more times before it is recorded as failed.
- A lost Dask worker is handled by Dask itself: the scheduler moves its tasks to other
  workers, up to its ``distributed.scheduler.allowed-failures`` setting (set to ``retries``
  for a LocalCluster we start); a task that keeps killing workers is recorded as failed.
- A parent that dies without stopping its pool (SIGKILL) takes the local workers with it:
  each ends within a second, instead of waiting for work for ever while holding memory and
  the caller's stdout and stderr (``_exit_with_parent``).
- Ctrl-C (KeyboardInterrupt) cancels what has not started, stops the local workers or
  cancels the Dask futures, and is raised again, so the caller exits with what it recorded.

One piece of work beside this process, in a forked second process that shares this one's
objects (a large run's maps, its stability analysis), is :class:`InSecondProcess`.

Dask is an optional dependency (``pip install "trophoscape[dask]"``); it is imported only
when a scheduler is asked for.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
import signal
import sys
import threading
import time
import tomllib
from collections import deque
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable

from ..errors import InputError, param
from ..machine import cores, one_core_only

__all__ = ["run_tasks", "default_workers", "check_workers", "ScenarioPayload", "cached",
           "init_worker_process", "InSecondProcess", "second_process_possible",
           "remember", "forget"]

#: Tasks kept in flight per local worker: enough to keep a worker busy between results,
#: few enough that a broken pool only has to re-run a handful.
IN_FLIGHT_PER_WORKER = 2


def default_workers() -> int:
    """All the cores this process may use (:func:`trophoscape.machine.cores`)."""
    return cores()


def _call(fn, task):
    """Run one task, returning ``(ok, value)`` so a failure travels back as data."""
    try:
        return True, fn(task)
    except Exception as exc:  # a failing task is recorded by the caller; the batch goes on
        return False, f"{type(exc).__name__}: {exc}"


def _ignore_sigint():
    # Ctrl-C in a terminal reaches every process of the group; the main process alone
    # decides what to do, so workers do not each print a traceback.
    signal.signal(signal.SIGINT, signal.SIG_IGN)


#: How often (seconds) a local worker checks that the process that started it is still there.
PARENT_POLL_SECONDS = 0.5

#: ``prctl`` option asking the kernel for a signal when the parent goes (linux/prctl.h).
_PR_SET_PDEATHSIG = 1


def _exit_with_parent(parent_pid: int | None) -> None:
    """Make this worker process end when the process that started it ends, however it ends.

    A parent killed with SIGKILL cannot stop its pool, and idle workers would otherwise wait
    for work for ever, holding memory and the caller's stdout and stderr. On Linux the kernel
    sends SIGTERM when the parent goes (``PR_SET_PDEATHSIG``; strictly, when the parent's
    thread that started the worker ends, and ``run_tasks`` stops its pool before returning
    from that thread). Everywhere, a daemon thread also checks the parent's pid twice a
    second and ends the process when it has changed (the worker was handed to another).
    ``parent_pid`` is the pid the worker's parent had when it started the pool, or None when
    not known (a forkserver parent), and then the parent at this moment is watched.
    """
    # A worker has nothing to clean up: SIGTERM (from the kernel, or from _stop_pool) ends
    # it at once, also in the middle of compiled code, whatever handler it inherited.
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    if sys.platform.startswith("linux"):
        try:
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGTERM), 0, 0, 0)
        except (OSError, AttributeError):  # no prctl: the thread below still watches
            pass
    if parent_pid is None:
        parent_pid = os.getppid()
    elif os.getppid() != parent_pid:  # the parent went before the kernel was asked
        os._exit(1)

    def watch():
        while True:
            time.sleep(PARENT_POLL_SECONDS)
            if os.getppid() != parent_pid:
                os._exit(1)

    threading.Thread(target=watch, name="trophoscape-parent-watch", daemon=True).start()


def init_worker_process(parent_pid: int | None) -> None:
    """The initializer of every local worker process (and of the second processes of
    :class:`InSecondProcess`: a large run's maps, its stability analysis): Ctrl-C is left to
    the parent, the process ends with its parent, and compiled kernels run on one thread."""
    _ignore_sigint()
    _exit_with_parent(parent_pid)
    # one core per worker (compiled kernels on one thread, no threads of its own). numba
    # reads its variable when it is imported, and refuses a change once its threads started
    one_core_only()
    if "numba" not in sys.modules:
        os.environ["NUMBA_NUM_THREADS"] = "1"


def second_process_possible() -> bool:
    """Whether work can be done in a forked second process beside this one: on Linux (no
    fork on Windows; macOS forks unsafely with its frameworks loaded), not in a daemonic
    process (Dask's workers are one: they may not start processes), with a second core,
    and with no other thread of the caller's running (a fork copies every lock as it is:
    one that another thread holds, say while it compiles or writes a file, would stay held
    in the new process; this package's daemon threads, a progress bar's among them, are
    left out, and its kernels' lock is made new in a forked process:
    ``model.compiled``)."""
    if not sys.platform.startswith("linux"):
        return False
    if multiprocessing.current_process().daemon:
        return False
    others = [t for t in threading.enumerate()
              if t is not threading.current_thread() and not t.daemon]
    return cores() > 1 and not others


class InSecondProcess:
    """``work()`` in a forked process, started by :meth:`start`; calling the object waits
    for it and returns its result, or raises its error here; :meth:`stop` ends it.

    Forked, the process shares this one's objects without copying them. The result comes
    back pickled. An error is the same exception when it can be passed over whole, else a
    :class:`~trophoscape.errors.RunError` with its type and text; either way the other
    process's traceback is added as a note, saying what it ``doing``. The process leaves
    Ctrl-C to this one (which stops it), and ends when this one ends, however it ends
    (:func:`init_worker_process`): it cannot work on after this one is gone. :meth:`start`
    returns False when no process could be started (the caller then does the work itself).
    """

    def __init__(self, work, *, doing: str, name: str):
        self._work = work
        self._doing = doing
        self._name = name
        self._process = None
        self._receive = None

    def start(self) -> bool:
        import gc
        import pickle
        import traceback
        import warnings

        context = multiprocessing.get_context("fork")
        receive, send = context.Pipe(duplex=False)
        parent = os.getpid()
        work = self._work

        def run():
            init_worker_process(parent)
            # the warnings go to the parent, which shows them under its own filters
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                try:
                    outcome = (True, work())
                except BaseException as exc:  # noqa: BLE001 - passed to the parent
                    try:
                        whole = pickle.dumps(exc)
                    except Exception:  # it does not pickle: its type and text
                        whole = None
                    outcome = (False, (whole, type(exc).__name__, str(exc),
                                       traceback.format_exc()))
            send.send(outcome + ([_portable_warning(w) for w in caught],))

        process = context.Process(target=run, name=self._name, daemon=True)
        # objects the collector would visit in the new process stay shared with this one
        # (the garbage collector writes to every object it visits: copy on write)
        gc.freeze()
        try:
            process.start()
        except Exception:  # no memory or no process left for a fork: the caller does it
            receive.close()
            return False
        finally:
            gc.unfreeze()
            send.close()
        self._process, self._receive = process, receive
        return True

    def __call__(self):
        import pickle
        import warnings

        from ..errors import RunError

        try:
            try:
                done, value, caught = self._receive.recv()
            except Exception:  # ended without a result, or one that cannot be rebuilt
                self._process.join()
                raise RunError(f"the process that {self._doing} ended without a result "
                               f"(exit code {self._process.exitcode})") from None
            self._process.join()
        except BaseException:
            self.stop()
            raise
        finally:
            self._receive.close()
        for category, message, filename, lineno in dict.fromkeys(caught):  # each once
            warnings.warn_explicit(message, category, filename, lineno)
        if done:
            return value
        whole, name, text, trace = value
        try:
            exc = pickle.loads(whole) if whole is not None else None
        except Exception:  # pickled, but cannot be rebuilt here
            exc = None
        if not isinstance(exc, BaseException):
            exc = RunError(f"{name}: {text}" if text else name)
            exc.original_type = name  # what it was in the other process
        exc.add_note(f"in the process that {self._doing}:\n" + trace)
        raise exc

    def stop(self) -> None:
        """End the process (if it still runs) and wait for it."""
        if self._process.is_alive():
            self._process.terminate()
        self._process.join()
        self._receive.close()


def _portable_warning(caught):
    """A warning caught in the other process as ``(category, message, filename, lineno)``
    that pickles: the category itself where it pickles (by its name), else
    ``UserWarning``."""
    import pickle

    category = caught.category
    try:
        pickle.dumps(category)
    except Exception:
        category = UserWarning
    return category, str(caught.message), caught.filename, caught.lineno


@dataclass(frozen=True, eq=False)
class ScenarioPayload:
    """A scenario as a worker gets it: plain data, nothing large, rebuilt on the worker.

    ``raw`` is the nested tables ``parse_scenario`` reads: the scenario's validated values
    (:meth:`of`, so a scenario changed in memory travels as it is) or its file's own tables
    (:meth:`from_text`, so that values a variant changes are validated with the file's
    defaults, as a sweep needs). ``key`` names it in a worker's cache (:func:`cached`).
    """

    raw: dict
    path: str | None
    base_dir: str
    text: str
    key: str

    @classmethod
    def of(cls, scenario) -> "ScenarioPayload":
        """The payload of a scenario's validated values."""
        from ..scenario import nested_tables

        return cls._make(nested_tables(scenario.values), scenario)

    @classmethod
    def from_text(cls, scenario) -> "ScenarioPayload":
        """The payload of the tables in a scenario's file text."""
        return cls._make(tomllib.loads(scenario.text), scenario)

    @classmethod
    def _make(cls, raw, scenario):
        key = hashlib.sha256(json.dumps([raw, str(scenario.base_dir), scenario.sha256],
                                        sort_keys=True, default=str).encode()).hexdigest()
        return cls(raw=raw, path=None if scenario.path is None else str(Path(scenario.path).resolve()),
                   base_dir=str(Path(scenario.base_dir).resolve()), text=scenario.text, key=key)

    def scenario(self, changes=None):
        """The scenario, with ``changes`` (``{"section.key": value}``) over its tables."""
        from ..scenario import parse_scenario, with_changes

        raw = self.raw if not changes else with_changes(self.raw, changes)
        return parse_scenario(raw, path=None if self.path is None else Path(self.path),
                              base_dir=Path(self.base_dir), text=self.text)


#: Per process: what :func:`cached` built (a worker builds a study once, not per task).
_CACHE: dict = {}


def cached(key, make):
    """``make()``, built once per process and key. The main process may put a value in
    before the workers start (:func:`remember`): forked workers then inherit it."""
    if key not in _CACHE:
        _CACHE[key] = make()
    return _CACHE[key]


def remember(key, value) -> None:
    """Put ``value`` in this process's cache under ``key``."""
    _CACHE[key] = value


def forget(key) -> None:
    """Drop ``key`` from this process's cache; a key ``(kind, ...)`` given as ``kind`` alone
    drops every entry of that kind."""
    for k in [k for k in _CACHE if k == key or (isinstance(k, tuple) and k[0] == key)]:
        del _CACHE[k]


def check_workers(workers) -> None:
    """Refuse a number of local processes below 1 (None: every core)."""
    if workers is not None and (isinstance(workers, bool) or int(workers) != workers
                                or workers < 1):
        raise InputError(f"{workers} is out of range; give a whole number of at least 1, "
                         f"or leave {param('workers')} out to use every core",
                         field=param("workers"))


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
        the error text when ``ok`` is False. Called exactly once per task.
    workers : int, optional
        Local processes (default: all cores). ``workers=1`` runs in this process.
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:8786``).
    dask_local : int, optional
        Start a Dask ``LocalCluster`` on loopback with this many workers.
    retries : int
        How many more times a task is run after its worker process was lost.

    Raises
    ------
    KeyboardInterrupt
        Re-raised after the workers were stopped; results handed over so far stay handed.
    """
    from tqdm.auto import tqdm

    tasks = list(tasks)
    if retries < 0:
        raise InputError(f"{retries} is out of range; give a whole number of at least 0",
                         field="retries")
    bar = tqdm(total=len(tasks), disable=not progress, desc=desc, unit="run", delay=1.0)
    try:
        if scheduler is not None or dask_local is not None:
            _run_dask(fn, tasks, on_result, scheduler, dask_local, retries, bar)
            return
        check_workers(workers)
        workers = default_workers() if workers is None else int(workers)
        if workers == 1 or len(tasks) <= 1:
            for task in tasks:
                on_result(task, *_call(fn, task))
                bar.update(1)
            return
        _run_pool(fn, tasks, on_result, min(workers, len(tasks)), retries, bar)
    finally:
        bar.close()


def _stop_pool(pool: ProcessPoolExecutor) -> None:
    """Cancel queued tasks and end the worker processes now, not when their tasks end."""
    processes = list((getattr(pool, "_processes", None) or {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for proc in processes:
        if proc.is_alive():
            proc.terminate()
    for proc in processes:
        proc.join(timeout=5)


def _run_pool(fn, tasks, on_result, workers, retries, bar):
    """The local pool, replaced whenever a worker process dies.

    A dead worker breaks the whole pool, and every task in flight is lost with it, not only
    the one that killed it. Those tasks become suspects and are run again one at a time, so
    that a task taking its worker down is known for sure and charged one attempt.
    """
    queue = deque(range(len(tasks)))
    suspects: deque = deque()
    attempts = [0] * len(tasks)
    # The default start method, named here so the workers know whose child they are: this
    # process, except under "forkserver", where the server starts them.
    context = multiprocessing.get_context()
    parent_pid = None if context.get_start_method() == "forkserver" else os.getpid()
    while queue or suspects:
        isolated = bool(suspects)
        source = suspects if isolated else queue
        pool = ProcessPoolExecutor(max_workers=1 if isolated else workers,
                                   mp_context=context, initializer=init_worker_process,
                                   initargs=(parent_pid,))
        try:
            lost = _drain(pool, fn, tasks, source, 1 if isolated else
                          IN_FLIGHT_PER_WORKER * workers, on_result, bar)
        except BaseException:
            _stop_pool(pool)
            raise
        _stop_pool(pool)
        if not isolated:
            suspects.extend(lost)
            continue
        for i in lost:  # at most one: it ran alone
            attempts[i] += 1
            if attempts[i] > retries:
                on_result(tasks[i], False, "WorkerLost: the worker process running this task "
                          f"died {attempts[i]} times (killed, or out of memory?)")
                bar.update(1)
            else:
                suspects.appendleft(i)


def _drain(pool, fn, tasks, source, limit, on_result, bar) -> list[int]:
    """Run the tasks of ``source`` with at most ``limit`` in flight; the lost ones if it broke."""
    pending: dict = {}
    while True:
        while source and len(pending) < limit:
            i = source.popleft()
            try:
                pending[pool.submit(_call, fn, tasks[i])] = i
            except BrokenProcessPool:
                source.appendleft(i)
                break
        if not pending:
            return []
        done, _ = wait(pending, return_when=FIRST_COMPLETED)
        lost = []
        for future in done:
            i = pending.pop(future)
            try:
                ok, value = future.result()
            except BrokenProcessPool:
                lost.append(i)
                continue
            on_result(tasks[i], ok, value)
            bar.update(1)
        if lost:
            for future, i in pending.items():
                if future.done() and not future.cancelled() and future.exception() is None:
                    on_result(tasks[i], *future.result())
                    bar.update(1)
                else:
                    lost.append(i)
            return lost


def _run_dask(fn, tasks, on_result, scheduler, dask_local, retries, bar):
    try:
        import dask
        from dask.distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise InputError('needs Dask: pip install "trophoscape[dask]"',
                         field=param("scheduler" if scheduler else "dask_local")) from None
    cluster = None
    client = None
    futures = []
    try:
        if scheduler is None:
            if int(dask_local) < 1:
                raise InputError(f"{dask_local} is out of range; give the number of local Dask "
                                 "workers, a whole number of at least 1", field=param("dask_local"))
            # A task is moved off a lost worker this many times before it counts as failed.
            with dask.config.set({"distributed.scheduler.allowed-failures": int(retries)}):
                # one thread per worker, numba's too (the compiled RHS and regions run on
                # numba's threads, as many as the machine has cores by default)
                cluster = LocalCluster(n_workers=int(dask_local), threads_per_worker=1,
                                       host="127.0.0.1", dashboard_address=None,
                                       processes=True, env={"NUMBA_NUM_THREADS": "1"})
            client = Client(cluster)
        else:
            try:
                client = Client(scheduler, timeout="30s")
            except (OSError, TimeoutError, ValueError) as exc:
                raise InputError(f"cannot reach a Dask scheduler at {scheduler!r} ({exc}); "
                                 "start one with `dask scheduler` and give its tcp:// address",
                                 field=param("scheduler")) from None
        # ``retries`` covers a task that raises on the worker outside ``_call`` (for example
        # when the task cannot be unpickled there); a lost worker is the scheduler's job.
        futures = client.map(_call, [fn] * len(tasks), tasks, retries=retries, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        for future in as_completed(futures):
            task = tasks[index[future.key]]
            try:
                ok, value = future.result()
            except Exception as exc:  # e.g. KilledWorker: the task took workers down with it
                ok, value = False, f"{type(exc).__name__}: {exc}"
            on_result(task, ok, value)
            future.release()
            bar.update(1)
    except BaseException:
        if client is not None and futures:
            try:
                client.cancel(futures)
            except Exception:  # pragma: no cover - the cluster may already be gone
                pass
        raise
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
