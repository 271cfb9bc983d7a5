"""The task runner: every task once, failures recorded as data."""

import math
import signal
import time

import pytest

from trophoscape.errors import InputError
from trophoscape.workflows.tasks import run_tasks


def shown(exc) -> str:
    """An error as the command line prints it (options, where Python names parameters)."""
    from trophoscape.cli.program import FLAGS
    from trophoscape.errors import render_params

    return exc.render(FLAGS) if hasattr(exc, "render") else render_params(exc, FLAGS)


def _square_or_fail(x):
    if x == 3:
        raise ValueError("three is not allowed")
    return x * x


@pytest.mark.parametrize("workers", [1, 2])
def test_every_task_once_and_failures_recorded(workers):
    seen = {}
    run_tasks(_square_or_fail, range(6), workers=workers, progress=False,
              on_result=lambda task, ok, value: seen.setdefault(task, (ok, value)))
    assert sorted(seen) == list(range(6))
    assert seen[3] == (False, "ValueError: three is not allowed")
    assert all(seen[k] == (True, k * k) for k in (0, 1, 2, 4, 5))


def test_workers_must_be_positive():
    with pytest.raises(InputError) as info:
        run_tasks(math.sqrt, [1.0, 4.0], workers=0, progress=False, on_result=print)
    # a Python caller reads the parameter, the command line its option
    assert str(info.value).startswith("parameter 'workers': 0 is out of range")
    assert "or leave workers out to use every core" in str(info.value)
    assert shown(info.value).startswith("field '--workers': 0 is out of range")
    assert "or leave --workers out to use every core" in shown(info.value)


# ------------------------------------------------------------------------ a killed parent
def _alive(proc) -> bool:
    """Whether ``proc`` (a psutil.Process) still runs: gone and zombie both count as ended."""
    import psutil

    try:
        return proc.is_running() and proc.status() != psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return False


def test_pool_workers_end_when_the_sweep_is_killed(tmp_path):
    """SIGKILL leaves the parent no chance to stop its pool; the workers must notice alone,
    and let go of the caller's stdout and stderr, which they share."""
    psutil = pytest.importorskip("psutil")
    from test_sweep import _cli_process, write_scenario

    # long enough that the two workers are still busy when the kill lands
    scenario = write_scenario(tmp_path / "scenario", duration=600.0)
    proc = _cli_process(["sweep", scenario, "--vary", "prey.growth_rate=0.6:1.4:20",
                         "--vary", "dispersal.max_distance_km=3,6", "--out", tmp_path / "out",
                         "--no-plots", "--quiet", "--workers", "2"])
    workers = []
    try:
        parent = psutil.Process(proc.pid)
        end = time.monotonic() + 60
        while time.monotonic() < end:
            assert proc.poll() is None, f"the sweep ended early: {proc.stderr.read()}"
            workers = [p for p in parent.children(recursive=True) if _alive(p)]
            if len(workers) >= 2 and all(p.cpu_times().user > 0.2 for p in workers):
                break  # both exist and are working on runs
            time.sleep(0.05)
        else:
            pytest.fail(f"no two busy workers in time (found {len(workers)})")
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=10)
        end = time.monotonic() + 5
        while time.monotonic() < end and any(_alive(p) for p in workers):
            time.sleep(0.05)
        left = [p.pid for p in workers if _alive(p)]
        assert not left, f"worker processes {left} outlived their killed parent"
        # with the workers gone, nothing holds the pipes: the caller reads to the end
        proc.communicate(timeout=5)
    finally:
        for p in workers:
            if _alive(p):
                p.kill()
        if proc.poll() is None:
            proc.kill()
        proc.communicate()


def _cores_here(task):
    from trophoscape.machine import cores

    return cores()


def test_a_pools_worker_uses_one_core_and_this_process_its_own():
    # consistency test: one answer to "how many cores" (trophoscape.machine.cores) serves
    # the pools, the link search's threads, numba's kernels and the maps' process; a pool's
    # worker gets one core, so that it starts no threads of its own beside the others
    import os

    from trophoscape.machine import cores
    from trophoscape.workflows.tasks import run_tasks

    assert cores() == len(os.sched_getaffinity(0))
    got = {}
    run_tasks(_cores_here, [1, 2, 3], on_result=lambda t, ok, v: got.update({t: (ok, v)}),
              workers=2)
    assert got == {1: (True, 1), 2: (True, 1), 3: (True, 1)}


second_process = pytest.mark.skipif(
    not __import__("trophoscape.workflows.tasks", fromlist=["x"]).second_process_possible(),
    reason="a second process is forked only on Linux with two cores")


@second_process
def test_a_process_forked_while_a_thread_holds_the_kernels_lock_can_take_it():
    # consistency test: a fork copies a lock as it is; the kernels' lock held by another
    # thread at the fork must be free in the new process (made new there), else a compiled
    # run in it (the stability analysis's simulated guess) would wait for ever
    import threading

    from trophoscape.model import compiled
    from trophoscape.workflows.tasks import InSecondProcess

    held, release = threading.Event(), threading.Event()

    def hold():
        with compiled.ONE_AT_A_TIME:
            held.set()
            release.wait(30)

    holder = threading.Thread(target=hold, daemon=True)
    holder.start()
    held.wait(10)
    try:
        process = InSecondProcess(lambda: compiled.ONE_AT_A_TIME.acquire(timeout=5),
                                  doing="took the lock", name="trophoscape-test")
        assert process.start()
        assert process() is True
    finally:
        release.set()
        holder.join()


@second_process
def test_results_warnings_and_errors_come_back_from_the_second_process():
    # consistency test: what the work returns, the warnings it gives (shown here under
    # this process's filters, each once) and its errors (the same exception, or one that
    # keeps the other's type name when it cannot be rebuilt here)
    import warnings

    import numpy as np

    from trophoscape.errors import RunError, TrophoscapeWarning
    from trophoscape.workflows.tasks import InSecondProcess

    def work():
        for _ in range(3):
            warnings.warn("a patch with no links", TrophoscapeWarning)
        return {"equilibrium": np.arange(5.0)}

    process = InSecondProcess(work, doing="worked", name="trophoscape-test")
    assert process.start()
    with pytest.warns(TrophoscapeWarning, match="a patch with no links") as shown:
        got = process()
    assert len(shown) == 1
    assert got["equilibrium"].tolist() == [0.0, 1.0, 2.0, 3.0, 4.0]

    from conftest import Unrebuildable

    def fails():
        raise Unrebuildable("the matrix", "no pivot")

    process = InSecondProcess(fails, doing="worked", name="trophoscape-test")
    assert process.start()
    with pytest.raises(RunError, match="Unrebuildable: the matrix because no pivot") as caught:
        process()
    assert caught.value.original_type == "Unrebuildable"
    assert "in the process that worked" in "".join(caught.value.__notes__)


def test_no_second_process_while_another_thread_of_the_caller_runs():
    # a fork while another (non-daemon) thread of the caller runs could copy a lock it
    # holds: the work is then done on a thread instead
    import threading

    from trophoscape.workflows import tasks

    stop = threading.Event()
    other = threading.Thread(target=stop.wait, args=(30,))
    other.start()
    try:
        assert not tasks.second_process_possible()
    finally:
        stop.set()
        other.join()


def test_blas_has_one_thread_while_the_compiled_kernels_run(monkeypatch):
    # against threadpoolctl's own report of the BLAS libraries loaded (the reference for
    # their thread counts): a run on the compiled path keeps BLAS on one thread, as
    # OPENBLAS_NUM_THREADS=1 would, and gives it back afterwards; a numpy run leaves it be
    import numpy as np
    import scipy.linalg
    from threadpoolctl import threadpool_info, threadpool_limits

    from trophoscape.integrate import ode
    from trophoscape.machine import blas_on_one_thread

    assert scipy.linalg.blas  # scipy's BLAS loaded too

    def blas_threads():
        return sorted({i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"})

    with threadpool_limits(limits=2, user_api="blas"):
        assert blas_threads() == [2]
        with blas_on_one_thread():
            assert blas_threads() == [1]
        assert blas_threads() == [2]
        with blas_on_one_thread(False):
            assert blas_threads() == [2]
        seen = []
        monkeypatch.setattr(ode, "_simulate", lambda system, y0, **options: seen.append(
            (system.local_terms_used, blas_threads())))

        class System:
            local_terms_used = "compiled"
        ode.simulate(System(), np.ones(2), duration=1.0, census_interval=0.5)
        System.local_terms_used = "numpy"
        ode.simulate(System(), np.ones(2), duration=1.0, census_interval=0.5)
        assert seen == [("compiled", [1]), ("numpy", [2])]
        assert blas_threads() == [2]
