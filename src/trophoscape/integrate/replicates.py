"""Replicates as one system: R copies of a network side by side (block-diagonal movement), and
the state and series reshaped between the stacked and the per-replicate layouts.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ..model.dynamics import LocalModel

__all__ = ["stack_system", "stack_state", "unstack_series"]

# --------------------------------------------------------------------------- stacking
def stack_system(system, replicates: int):
    """``replicates`` copies of a system as one block-diagonal system.

    Patch ``i`` of copy ``r`` sits at position ``r * n + i`` (so the state is
    ``[N(copy 0), N(copy 1), ..., P(copy 0), P(copy 1), ...]``). Built through
    :class:`~trophoscape.model.system.CoupledSystem`'s constructor: parameters and areas tiled,
    movement operators ``scipy.sparse.block_diag``.
    """
    from ..model.system import CoupledSystem

    if replicates == 1:
        return system
    model = system.model
    params = {k: np.tile(np.asarray(v), replicates) for k, v in model.params.items()}
    tiled = LocalModel(growth=model.growth, response=model.response, params=params)
    return CoupledSystem(
        model=tiled, area_km2=np.tile(system.area_km2, replicates),
        prey_movement=sp.csr_array(sp.block_diag([system.prey_movement] * replicates,
                                                 format="csr")),
        predator_movement=sp.csr_array(sp.block_diag([system.predator_movement] * replicates,
                                                     format="csr")),
        local_terms=system.local_terms)


def unstack_series(series: np.ndarray, replicates: int) -> np.ndarray:
    """Series of a stacked system, ``(..., R n)`` over its patches, as ``(..., n, R)``.

    A view where numpy can make one (the inverse of the layout of :func:`stack_system`).
    """
    return series.reshape(*series.shape[:-1], replicates, -1).swapaxes(-1, -2)


def stack_state(y: np.ndarray, replicates: int) -> np.ndarray:
    """A state of one copy, shape (2 n,), repeated for the stacked system, shape (2 R n,)."""
    n = y.size // 2
    return np.concatenate([np.tile(y[:n], replicates), np.tile(y[n:], replicates)])
