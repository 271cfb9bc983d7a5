"""The coupled ODE of a patch network: state layout, right-hand side and sparse Jacobian.

State layout (written down once): the flat vector ``y`` of length ``2 n`` holds abundances
(individuals), prey first, then predator, each in the fixed patch order::

    y = [N_0 .. N_{n-1}, P_0 .. P_{n-1}]

Local dynamics are evaluated on densities ``N / A`` (``A`` the patch area in km²) and scaled
back to abundances; dispersal is one sparse product with the block-diagonal movement
operator ``diag(M_prey, M_predator)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from .dynamics import LocalModel

__all__ = ["CoupledSystem", "pack", "unpack", "SPECIES"]

#: Species in state order.
SPECIES = ("prey", "predator")


def pack(prey, predator) -> np.ndarray:
    """Flat state ``y`` of shape ``(2 n,)`` from per-species arrays of shape ``(n,)``."""
    return np.concatenate([np.asarray(prey, float), np.asarray(predator, float)])


def unpack(y):
    """Per-species views ``(prey, predator)`` of a flat state (or ``(2 n, k)`` block)."""
    n = y.shape[0] // 2
    return y[:n], y[n:]


@dataclass(frozen=True, eq=False)
class CoupledSystem:
    """The whole network as one ODE system ``dy/dt = rhs(t, y)``.

    Parameters
    ----------
    model : LocalModel
        Local dynamics with per-patch parameter arrays, shape (n_patches,).
    area_km2 : ndarray, shape (n_patches,)
        Patch areas.
    prey_movement, predator_movement : sparse array, shape (n_patches, n_patches)
        Movement operators (``dx/dt = M x``) from :func:`trophoscape.network.movement_operator`.

    Notes
    -----
    ``rhs`` evaluates the local terms on ``max(y, 0)``: deep predator–prey cycles push
    abundances towards zero, where a Runge–Kutta stage may step slightly below it; clipping
    keeps such a stage from feeding back negative growth. The census step then clears what
    is left (:mod:`trophoscape.simulate`).
    """

    model: LocalModel
    area_km2: np.ndarray
    prey_movement: sp.sparray
    predator_movement: sp.sparray
    movement: sp.csr_array = field(init=False, repr=False)

    def __post_init__(self):
        n = self.n_patches
        for name in ("prey_movement", "predator_movement"):
            if getattr(self, name).shape != (n, n):
                raise ValueError(f"{name} must have shape ({n}, {n})")
        block = sp.csr_array(sp.block_diag([self.prey_movement, self.predator_movement],
                                           format="csr"))
        if block.nnz < np.iinfo(np.int32).max:  # 32-bit indices: a faster sparse product
            block.indices = block.indices.astype(np.int32)
            block.indptr = block.indptr.astype(np.int32)
        object.__setattr__(self, "movement", block)
        object.__setattr__(self, "area_km2", np.asarray(self.area_km2, dtype=float))

    @property
    def n_patches(self) -> int:
        return int(self.area_km2.shape[0])

    @property
    def n_state(self) -> int:
        return 2 * self.n_patches

    def rhs_function(self):
        """Return the pure closure ``rhs(t, y) -> dy/dt`` (arrays of shape (2 n,))."""
        n = self.n_patches
        area = self.area_km2
        movement = self.movement
        rates = self.model.rates
        out = np.empty(2 * n)

        def rhs(t, y):
            x = np.maximum(y, 0.0)
            dn, dp = rates(x[:n] / area, x[n:] / area)
            out[:n] = dn
            out[n:] = dp
            out[:n] *= area
            out[n:] *= area
            # solve_ivp keeps what we return; hand it a fresh array.
            return out + movement @ x

        return rhs

    def jacobian_sparsity(self) -> sp.csr_array:
        """Sparsity pattern of the Jacobian: the local 2×2 blocks plus the links."""
        n = self.n_patches
        i = np.arange(n)
        rows = np.concatenate([i, i, n + i, n + i])
        cols = np.concatenate([i, n + i, i, n + i])
        local = sp.csr_array((np.ones(4 * n), (rows, cols)), shape=(2 * n, 2 * n))
        pattern = local + abs(self.movement)
        pattern.data[:] = 1.0
        return sp.csr_array(pattern)

    def jacobian_function(self):
        """Return ``jac(t, y) -> sparse csc array (2 n, 2 n)``, the analytic Jacobian.

        Entries in abundance equal the partials of the local rates in density (the area
        cancels); dispersal contributes the constant movement operator. Where a component is
        negative, ``rhs`` sees it as zero; the Jacobian is evaluated at the clipped state.
        """
        n = self.n_patches
        area = self.area_km2
        i = np.arange(n)
        rows = np.concatenate([i, i, n + i, n + i])
        cols = np.concatenate([i, n + i, i, n + i])
        movement = sp.csc_array(self.movement)
        partials = self.model.partials

        def jac(t, y):
            x = np.maximum(y, 0.0)
            blocks = partials(x[:n] / area, x[n:] / area)
            local = sp.csc_array((np.concatenate(blocks), (rows, cols)), shape=(2 * n, 2 * n))
            return local + movement

        return jac
