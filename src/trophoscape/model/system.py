"""The coupled ODE of a patch network: state layout, right-hand side and sparse Jacobian.

State layout (written down once): the flat vector ``y`` of length ``2 n`` holds abundances
(individuals), prey first, then predator, each in the fixed patch order::

    y = [N_0 .. N_{n-1}, P_0 .. P_{n-1}]

Local dynamics are evaluated on densities ``N / A`` (``A`` the patch area in km²) and scaled
back to abundances; dispersal is one sparse product with the block-diagonal movement
operator ``diag(M_prey, M_predator)``.

Internal patch order: the patches can be numbered internally so that linked patches get nearby
numbers (reverse Cuthill–McKee on the links, or a Hilbert curve over the centroids), which keeps
the sparse product's reads of the state within few cache lines, and so that, within runs of
``ROW_GROUP`` patches, rows with the same number of links follow each other (see
:func:`group_rows`).
Every public array (``y``, ``dy/dt``, Jacobian rows and columns, ``movement``) stays in the
user's patch order; only :meth:`CoupledSystem.rhs_function` with ``internal=True`` (and
``to_internal`` / ``to_user``) works in the internal order.
"""

from __future__ import annotations

import copy
import functools
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee

from .dynamics import LocalModel

try:  # y += A @ x in place, the routine behind scipy's CSR mat-vec (private, hence the guard)
    from scipy.sparse._sparsetools import csr_matvec as _csr_matvec
except ImportError:  # pragma: no cover - depends on the scipy version
    _csr_matvec = None

__all__ = ["CoupledSystem", "pack", "SPECIES", "spatial_order", "locality",
           "group_rows", "ORDER_MIN_PATCHES", "COMPILED_MIN_PATCHES",
           "compiled_available"]

#: ``order="auto"`` numbers the patches internally on networks of at least this many patches:
#: reverse Cuthill–McKee, then rows grouped by length in runs of ``ROW_GROUP``. It made the
#: whole RHS 1.5x faster at 1,000 patches, 1.8x at 10,000 and 1.9x at 100,000 on the
#: benchmark machine (benchmarks/README.md, `bench_rhs.py`). Smaller networks keep the user's
#: order (not measured there: the per-call overhead is most of such a call).
ORDER_MIN_PATCHES = 1_000
#: Length of the runs of consecutive internal positions within which rows are sorted by their
#: number of stored entries (:func:`group_rows`). 1,024 was the fastest of 128-4,096 at
#: 100,000 patches; 256 at 1,000,000 (benchmarks/README.md).
ROW_GROUP = 1_024

#: ``local_terms="auto"`` evaluates the local terms with compiled code (numba, optional) on
#: networks of at least this many patches: below it, importing numba and loading the code
#: (about 0.5 s) costs more than the compiled pass saves in a typical run (benchmarks/README.md,
#: "Compiled local terms").
COMPILED_MIN_PATCHES = 10_000

#: Species in state order.
SPECIES = ("prey", "predator")


def pack(prey, predator) -> np.ndarray:
    """Flat state ``y`` of shape ``(2 n,)`` from per-species arrays of shape ``(n,)``."""
    return np.concatenate([np.asarray(prey, float), np.asarray(predator, float)])


def locality(matrix, order=None) -> float:
    """Mean number of distinct 64-byte cache lines of ``x`` one row of ``matrix @ x`` reads.

    Parameters
    ----------
    matrix : sparse array, shape (m, m)
    order : ndarray of int, shape (m,), optional
        Internal numbering to measure: internal position ``k`` holds row/column
        ``order[k]`` (default: the order as given).

    Returns
    -------
    float
        Between 1 (all of a row's entries in one line of 8 float64) and the stored entries
        per row (none share a line). The cost of a sparse mat-vec on a state larger than the
        cache grows with it.
    """
    a = sp.csr_array(matrix)
    m = a.shape[0]
    if m == 0 or a.nnz == 0:
        return 1.0
    if order is not None:
        a = _permuted(a, np.asarray(order))
    rows = np.repeat(np.arange(m, dtype=np.int64), np.diff(a.indptr))
    key = rows * (m // 8 + 1) + a.indices.astype(np.int64) // 8
    key.sort()
    return float((np.count_nonzero(np.diff(key)) + 1) / m)


def spatial_order(centroids, bits: int = 16) -> np.ndarray:
    """Patch order along a Hilbert curve through the centroids.

    Parameters
    ----------
    centroids : ndarray, shape (n, 2)
        Patch centroids in a projected CRS.
    bits : int
        Resolution of the curve: a 2**bits × 2**bits grid over the bounding square.

    Returns
    -------
    ndarray of int64, shape (n,)
        ``order[k]`` is the patch at position ``k`` of the curve (ties keep the input order).

    Notes
    -----
    The index is computed for all points at once with integer bit operations, one pass per
    level of the curve, by the rotate-and-reflect rule of the Hilbert curve (Hilbert 1891,
    Math. Ann. 38:459; the iterative form is common practice, from memory).
    """
    c = np.asarray(centroids, dtype=np.float64).reshape(-1, 2)
    if c.shape[0] == 0:
        return np.empty(0, dtype=np.int64)
    lo = c.min(axis=0)
    span = max(float((c.max(axis=0) - lo).max()), 1e-300)
    cells = (1 << bits) - 1
    q = np.clip(((c - lo) / span * cells).round(), 0, cells).astype(np.int64)
    x, y = q[:, 0].copy(), q[:, 1].copy()
    index = np.zeros(c.shape[0], dtype=np.int64)
    s = 1 << (bits - 1)
    while s > 0:
        rx = (x & s) > 0
        ry = (y & s) > 0
        index += s * s * ((3 * rx.astype(np.int64)) ^ ry.astype(np.int64))
        # rotate the quadrant so that the sub-curve starts and ends where the next one joins
        flip = ~ry & rx
        x = np.where(flip, s - 1 - x, x)
        y = np.where(flip, s - 1 - y, y)
        x, y = np.where(ry, x, y), np.where(ry, y, x)
        s >>= 1
    return np.argsort(index, kind="stable")


def group_rows(matrix, order, size: int = ROW_GROUP) -> np.ndarray:
    """``order`` with the patches of each run of ``size`` positions sorted by row length.

    Parameters
    ----------
    matrix : sparse array, shape (2 n, 2 n)
        The block-diagonal movement operator (prey rows, then predator rows).
    order : ndarray of int, shape (n,)
        A patch order (``order[k]`` is the patch at position ``k``).
    size : int
        Run length.

    Returns
    -------
    ndarray of int64, shape (n,)
        Within each run ``order[k*size:(k+1)*size]`` the same patches, sorted by the number
        of stored entries of their prey row, then of their predator row (ties keep ``order``).

    Notes
    -----
    The loop over a row's entries in a CSR product ends at a different count on each row.
    In a mixed order the processor mispredicts that end about once per row, which on the
    synthetic landscapes (4–28 entries per row) cost as much as the arithmetic. With rows of
    equal length next to each other the end is predicted; keeping the sort within short runs
    keeps the locality of ``order`` (measured: benchmarks/README.md, "Rows grouped by
    length"; the effect of branch misprediction on short inner loops is common practice).
    """
    a = sp.csr_array(matrix)
    order = np.asarray(order, dtype=np.int64)
    n = order.size
    length = np.diff(a.indptr)
    run = np.arange(n) // max(int(size), 1)
    return order[np.lexsort((np.arange(n), length[n + order], length[order], run))]


def _permuted(a, order):
    """``a`` renumbered: entry (i, j) moves to (pos[i], pos[j]) with ``order[pos[i]] = i``."""
    a = sp.csr_array(a[order][:, order])
    a.sort_indices()
    return a


def _int32(a):
    if a.nnz < np.iinfo(np.int32).max:  # 32-bit indices: a faster sparse product
        a.indices = a.indices.astype(np.int32)
        a.indptr = a.indptr.astype(np.int32)
    return a


@functools.cache
def _compiled_module():
    """The module of compiled local terms, or None when numba is not installed (or fails to load)."""
    try:
        from . import compiled as _compiled
    except ImportError:
        return None
    return _compiled


def compiled_available() -> bool:
    """True when the optional compiled code for the local terms can be used (numba)."""
    return _compiled_module() is not None


def _numpy_local_terms(model, area):
    """``local(y, x) -> dy``: ``x = max(y, 0)`` in place, and a new array of the local terms,
    by numpy.

    The reference evaluation; :func:`trophoscape.model.compiled.local_terms_function` is the same
    in one compiled pass.
    """
    n = area.size
    rates = model.rates
    area2 = np.concatenate([area, area])
    dens = np.empty(2 * n)
    # max(y, 0) against an array of zeros: numpy 2.4 takes its vectorised loop for two arrays
    # but not for an array and a scalar (0.045 against 0.091 ms at 100,000 patches)
    zero = np.zeros(2 * n)

    def local(y, x):
        np.maximum(y, zero, out=x)
        np.divide(x, area2, out=dens)
        dn, dp = rates(dens[:n], dens[n:])
        dy = np.empty(2 * n)
        np.multiply(dn, area, out=dy[:n])
        np.multiply(dp, area, out=dy[n:])
        return dy

    return local


def _local_terms(model, area, compiled: bool):
    """``local(y, x) -> dy`` (see :func:`_numpy_local_terms`), compiled or by numpy."""
    if compiled:
        return _compiled_module().local_terms_function(model, area)
    return _numpy_local_terms(model, area)


def _rhs(n, area, model, movement, compiled=False):
    """``rhs(t, y)`` for a state in the order of ``area`` / ``model`` / ``movement``.

    ``compiled=True`` evaluates the whole of it with compiled code on numba's threads
    (:func:`trophoscape.model.compiled.rhs_function`, same numbers bit for bit).

    Buffers for the clipped state and the densities are allocated once; each call still
    returns a fresh array, because scipy's Runge–Kutta solvers keep the returned derivative
    (``self.f``) and reuse it after a rejected step, while the stages call ``rhs`` again.
    """
    if compiled:
        return _compiled_module().rhs_function(model, area, movement)
    x = np.empty(2 * n)
    m = 2 * n
    local = _numpy_local_terms(model, area)
    indptr, indices, data = movement.indptr, movement.indices, movement.data

    def rhs(t, y):
        dy = local(y, x)  # x = max(y, 0), dy = local terms
        if _csr_matvec is not None:
            _csr_matvec(m, m, indptr, indices, data, x, dy)  # dy += M x, no temporary
        else:  # pragma: no cover
            dy += movement @ x
        return dy

    return rhs


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
        Movement operators (``dx/dt = M x``) from :func:`trophoscape.model.network.movement_operator`.
    order : {"auto", "none", "rcm"} or ndarray of int, shape (n_patches,)
        Internal patch numbering. "auto" (default): on networks of at least
        ``ORDER_MIN_PATCHES`` patches, reverse Cuthill–McKee on the links
        (:func:`scipy.sparse.csgraph.reverse_cuthill_mckee`) with rows grouped by length
        (:func:`group_rows`); on smaller ones the user's order. "rcm": reverse Cuthill–McKee
        alone; "none": the user's order; an array: that order (``order[k]`` is the patch at
        internal position ``k``), e.g. ``spatial_order(centroids)``. Results do not depend on
        it beyond rounding (the sums of the sparse product are taken in another order).
    local_terms : {"auto", "numpy", "compiled"}
        How the local terms of ``rhs`` are evaluated. "numpy": elementwise numpy, the
        reference. "compiled": one compiled pass (numba, the optional extra
        ``trophoscape[fast]``) wherever it knows the model's growth form and response;
        without numba, a ValueError. "auto" (default): "compiled" on networks of at least
        ``COMPILED_MIN_PATCHES`` patches when numba is installed, else "numpy". Both give
        the same numbers bit for bit; see :attr:`local_terms_used` for the one in use.

    Notes
    -----
    ``rhs`` evaluates the local terms on ``max(y, 0)``: deep predator–prey cycles push
    abundances towards zero, where a Runge–Kutta stage may step slightly below it; clipping
    keeps such a stage from feeding back negative growth. The census step then clears what
    is left (:mod:`trophoscape.integrate.ode`).
    """

    model: LocalModel
    area_km2: np.ndarray
    prey_movement: sp.sparray
    predator_movement: sp.sparray
    order: object = "auto"
    local_terms: str = "auto"
    movement: sp.csr_array = field(init=False, repr=False)
    permutation: np.ndarray = field(init=False, repr=False)
    _internal: dict = field(init=False, repr=False)

    def __post_init__(self):
        object.__setattr__(self, "area_km2", np.asarray(self.area_km2, dtype=float))
        n = self.n_patches
        for name in ("prey_movement", "predator_movement"):
            if getattr(self, name).shape != (n, n):
                raise ValueError(f"{name} must have shape ({n}, {n})")
        if self.local_terms not in ("auto", "numpy", "compiled"):
            raise ValueError(f"local_terms must be 'auto', 'numpy' or 'compiled', got {self.local_terms!r}")
        if self.local_terms == "compiled" and not compiled_available():
            raise ValueError("local_terms='compiled' needs numba, which is not installed; "
                             "install it with pip install 'trophoscape[fast]', or use "
                             "local_terms='auto'")
        block = _int32(sp.csr_array(sp.block_diag([self.prey_movement, self.predator_movement],
                                                  format="csr")))
        object.__setattr__(self, "movement", block)
        perm = self._choose_order(block)
        object.__setattr__(self, "permutation", perm)
        internal = {}
        if perm is not None:
            perm2 = np.concatenate([perm, perm + n])
            internal = {
                "perm2": perm2,
                "inverse2": np.argsort(perm2),
                "movement": _int32(_permuted(block, perm2)),
                "area": self.area_km2[perm],
            }
        object.__setattr__(self, "_internal", internal)

    def _choose_order(self, block):
        """Internal order ``(n,)`` of int64, or None for the user's order."""
        n = self.n_patches
        order = self.order
        if isinstance(order, str):
            if order not in ("auto", "none", "rcm"):
                raise ValueError(f"order must be 'auto', 'none', 'rcm' or an array, got {order!r}")
            if order == "none" or n < 2 or (order == "auto" and n < ORDER_MIN_PATCHES):
                return None
            links = block[:n, :n] + block[n:, n:]
            links = abs(links) + abs(links.T)
            perm = reverse_cuthill_mckee(sp.csr_matrix(links), symmetric_mode=True)
            perm = np.asarray(perm, dtype=np.int64)
            if order == "auto":
                perm = group_rows(block, perm)
            return perm
        perm = np.asarray(order, dtype=np.int64)
        if perm.shape != (n,) or not np.array_equal(np.sort(perm), np.arange(n)):
            raise ValueError(f"order must be a permutation of 0..{n - 1}")
        return None if np.array_equal(perm, np.arange(n)) else perm

    def with_model(self, model: LocalModel) -> "CoupledSystem":
        """The same network with other local dynamics (e.g. noisy or shocked rates).

        Areas, movement operators and the internal order are shared with this system, not
        rebuilt: ``dataclasses.replace`` would assemble the block-diagonal operator again,
        which on a stack of replicates costs more than the RHS evaluations of a census
        interval (benchmarks/README.md). ``model`` must have per-patch parameters of the
        same length.
        """
        for key, value in model.params.items():
            if np.ndim(value) and np.shape(value) != (self.n_patches,):
                raise ValueError(f"parameter {key!r} must have shape ({self.n_patches},)")
        new = copy.copy(self)
        object.__setattr__(new, "model", model)
        return new

    @property
    def local_terms_used(self) -> str:
        """The evaluation of the local terms that ``rhs`` uses: "numpy" or "compiled"."""
        if self.local_terms == "numpy" or (self.local_terms == "auto"
                                      and self.n_patches < COMPILED_MIN_PATCHES):
            return "numpy"
        module = _compiled_module()
        return "compiled" if module is not None and module.supports(self.model) else "numpy"

    @property
    def reordered(self) -> bool:
        """True when patches are numbered internally in another order than the user's."""
        return self.permutation is not None

    def to_internal(self, y):
        """A state (or ``(2 n, k)`` block) in the user's order, in the internal order."""
        return y if not self.reordered else np.asarray(y)[self._internal["perm2"]]

    def to_user(self, y):
        """A state (or ``(2 n, k)`` block) in the internal order, in the user's order."""
        return y if not self.reordered else np.asarray(y)[self._internal["inverse2"]]

    @property
    def n_patches(self) -> int:
        return int(self.area_km2.shape[0])

    @property
    def n_state(self) -> int:
        return 2 * self.n_patches

    def rhs_function(self, internal: bool = False):
        """Return the closure ``rhs(t, y) -> dy/dt`` (arrays of shape (2 n,)).

        Parameters
        ----------
        internal : bool
            False (default): ``y`` and ``dy/dt`` in the user's patch order; on a reordered
            system the sparse product runs in the internal order, with a gather before and a
            scatter after. True: ``y`` and ``dy/dt`` in the internal order (convert with
            :meth:`to_internal` / :meth:`to_user`), with no gather or scatter: the fastest
            form for an integrator that keeps the whole run in the internal order.

        Notes
        -----
        Each call returns a fresh array (scipy's solvers keep it); the closure keeps work
        buffers, so one closure must not be called from several threads at once.
        """
        n = self.n_patches
        area = self.area_km2
        compiled = self.local_terms_used == "compiled"
        if not self.reordered:
            return _rhs(n, area, self.model, self.movement, compiled)
        perm = self.permutation
        inner = self._internal
        if internal:
            model = LocalModel(growth=self.model.growth, response=self.model.response,
                               params={k: np.asarray(v)[perm] if np.ndim(v) else v
                                       for k, v in self.model.params.items()})
            return _rhs(n, inner["area"], model, inner["movement"], compiled)
        perm2, inverse2 = inner["perm2"], inner["inverse2"]
        movement = inner["movement"]
        local = _local_terms(self.model, area, compiled)
        clipped = np.empty(2 * n)
        x = np.empty(2 * n)

        def rhs(t, y):
            dy = local(y, clipped)  # the local terms and max(y, 0), in the user's order
            np.take(clipped, perm2, out=x)
            dy += (movement @ x)[inverse2]
            return dy

        return rhs

    def parts(self, internal: bool = False):
        """``(area_km2, model, movement)`` in the order of :meth:`rhs_function`'s state:
        the user's order, or the internal one (``internal=True``). ``rhs`` is the local terms
        of ``model`` on ``max(y, 0)`` plus ``movement @ max(y, 0)``."""
        if not (internal and self.reordered):
            return self.area_km2, self.model, self.movement
        perm = self.permutation
        model = LocalModel(growth=self.model.growth, response=self.model.response,
                           params={k: np.asarray(v)[perm] if np.ndim(v) else v
                                   for k, v in self.model.params.items()})
        return self._internal["area"], model, self._internal["movement"]

    def stiffness_ratio(self, y) -> float:
        """How much faster dispersal is than the local dynamics, at state ``y``.

        Parameters
        ----------
        y : ndarray, shape (2 n,)
            State in the user's order (e.g. the initial state).

        Returns
        -------
        float
            ``ρ_move / ρ_local``: ``ρ_move`` bounds the spectral radius of the movement
            operator by Gershgorin's theorem on its columns (the largest ``|M_jj| + Σ_i≠j |M_ij|``,
            at most twice the largest emigration rate); ``ρ_local`` is the largest modulus of an
            eigenvalue of a patch's 2×2 local Jacobian at ``y`` (at least 1e-12). Explicit
            Runge–Kutta steps are limited to about ``3 / ρ_move`` by stability, while the
            dynamics need steps of about ``1 / ρ_local``; a ratio well above one means a
            stiff run (see benchmarks/README.md for where the methods cross over).
        """
        n = self.n_patches
        if n == 0:
            return 0.0
        m = sp.csc_array(self.movement)
        # the column's absolute sum bounds |λ| for every Gershgorin disc of that column
        rho_move = float(np.max(np.abs(m).sum(axis=0))) if m.nnz else 0.0
        x = np.maximum(np.asarray(y, dtype=float), 0.0)
        a, b, c, d = self.model.partials(x[:n] / self.area_km2, x[n:] / self.area_km2)
        half_trace = 0.5 * (a + d)
        root = np.sqrt((half_trace * half_trace - (a * d - b * c)).astype(complex))
        rho_local = float(np.max(np.maximum(np.abs(half_trace + root),
                                            np.abs(half_trace - root))))
        return rho_move / max(rho_local, 1e-12)

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
