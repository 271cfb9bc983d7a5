"""What this process may use of the machine: its cores.

One answer for every part that splits work (the pools of worker processes, the threads that
search for links, the compiled kernels on numba's threads, the second process that draws the
maps). A pool's worker is given one core (:func:`one_core_only`), so that nothing in it starts
threads of its own beside the other workers.
"""

from __future__ import annotations

import os

__all__ = ["cores", "one_core_only"]

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
