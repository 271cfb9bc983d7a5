"""What this process may use of the machine: its cores.

One answer for every part that splits work (the pools of worker processes, the threads that
search for links, the compiled kernels on numba's threads, the second process that draws the
maps). A pool's worker is given one core (:func:`one_core_only`), so that nothing in it starts
threads of its own beside the other workers. While the compiled kernels hold the cores, the
BLAS library gets one thread (:func:`blas_on_one_thread`).
"""

from __future__ import annotations

import contextlib
import os

__all__ = ["cores", "one_core_only", "blas_on_one_thread"]

_one_core = False


def cores() -> int:
    """The cores this process may use: those it may be scheduled on (all of the machine's
    where that cannot be asked), or 1 in a pool's worker."""
    if _one_core:
        return 1
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def one_core_only() -> None:
    """From now on this process uses one core (a pool's worker)."""
    global _one_core
    _one_core = True



@contextlib.contextmanager
def blas_on_one_thread(when: bool = True):
    """Inside the block (``when`` true) the BLAS libraries loaded in this process (numpy's
    and scipy's OpenBLAS) use one thread, as with ``OPENBLAS_NUM_THREADS=1`` (threadpoolctl).

    The compiled kernels run on numba's threads on every core; OpenBLAS's own threads, woken
    by any small product, wait for work by spinning on the same cores. A 100,000-patch run
    took 70-75 s without this and 48 s with it (benchmarks/README.md, sixteenth session).
    """
    if not when:
        yield
        return
    try:
        from threadpoolctl import ThreadpoolController
    except ImportError:  # pragma: no cover - a dependency; without it, BLAS as it is
        yield
        return
    # the libraries loaded now (0.3 ms to look): scipy's may load after numpy's
    with ThreadpoolController().limit(limits=1, user_api="blas"):
        yield
