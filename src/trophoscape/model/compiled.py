"""Optional compiled code for the local terms of the right-hand side (numba).

numpy evaluates the local terms of :func:`trophoscape.model.system._rhs` in about 16 passes over the
patches, each reading and writing whole arrays; this code does all of them in one pass
(clip, densities, growth, predation, scaling back by the area), reading each parameter once.
:func:`rhs_function` does that pass and the sparse product in one call on numba's threads,
summing each row in the order of scipy's CSR product (benchmarks/README.md, "The whole RHS on
both cores").

It is used only where it pays (see ``system.COMPILED_MIN_PATCHES``) and only when numba is
installed (``pip install "trophoscape[fast]"``); the numpy path is the reference and the
fallback. The formulas below repeat those of :mod:`trophoscape.model.dynamics` operation for
operation, in the same order, so the two paths give the same numbers bit for bit
(``tests/test_compiled.py`` checks every growth form and response). A growth form or
response without a code here is simply evaluated by numpy.

This module imports numba at import time; :mod:`trophoscape.model.system` imports it only when a
system takes the compiled path (``system._compiled_module``), never at ``import trophoscape``.
"""

from __future__ import annotations

import threading

import numba
import numpy as np

#: The kernels that run on numba's threads (the whole RHS here, the regions' groups in
#: :mod:`trophoscape.integrate.compiled`) take this lock: numba's default thread pool
#: (workqueue) ends the process when two Python threads enter it at once.
ONE_AT_A_TIME = threading.Lock()
#: Growth forms and responses the compiled code knows, by their names in ``dynamics``.
GROWTH_CODES = {"exponential": 0, "logistic": 1, "allee": 2}
RESPONSE_CODES = {"lotka_volterra": 0, "holling2": 1, "holling3": 2, "beddington_deangelis": 3}
#: Rows of the parameter block the compiled code reads (unused rows are never read).
PARAMETER_ROWS = ("growth_rate", "capacity", "allee_density", "attack_rate", "handling_time",
                  "interference", "conversion", "mortality", "prey_harvest")


def jit(function=None, *, inline=False, parallel=False):
    """Compiled with numba, the machine code cached on disk when a folder for it is writable
    (else compiled in each process). ``inline``: inlined where compiled code calls it;
    ``parallel``: numba's ``prange`` runs on its threads. Shared by
    :mod:`trophoscape.integrate.compiled`.

    error_model="numpy": no Python zero-division checks, so the loop vectorises; a division by
    a zero area cannot occur (areas are checked positive when the landscape is read).
    """
    if function is None:
        return lambda f: jit(f, inline=inline, parallel=parallel)
    options = dict(error_model="numpy", boundscheck=False, nogil=True, parallel=parallel)
    if inline:
        options["inline"] = "always"
    try:
        return numba.njit(cache=True, **options)(function)
    except RuntimeError:  # no writable cache folder (numba's words): compile in each process
        return numba.njit(cache=False, **options)(function)


@jit(inline=True)
def clipped(v):  # pragma: no cover - compiled
    """``max(v, 0)`` that keeps a NaN, as ``np.maximum`` does (so a failing solve still
    shows it)."""
    return 0.0 if v < 0.0 else v


@jit(inline=True)
def local_one(growth, response, harvest, big_n, big_p, ai, q, i):  # pragma: no cover
    """The local terms of patch ``i`` (abundance per time) at abundances ``big_n, big_p``,
    already clipped at zero; ``q`` the parameter block (:data:`PARAMETER_ROWS`)."""
    dn = big_n / ai
    dp = big_p / ai
    if growth == 0:
        g = q[0, i] * dn
    elif growth == 1:
        g = q[0, i] * dn * (1.0 - dn / q[1, i])
    else:
        g = q[0, i] * dn * (1.0 - dn / q[1, i]) * (dn / q[2, i] - 1.0)
    a = q[3, i]
    if response == 0:
        f = a * dn
    elif response == 1:
        f = a * dn / (1.0 + a * q[4, i] * dn)
    elif response == 2:
        f = a * dn * dn / (1.0 + a * q[4, i] * dn * dn)
    else:
        f = a * dn / (1.0 + a * q[4, i] * dn + q[5, i] * dp)
    eaten = f * dp
    rate_n = g - eaten
    if harvest:
        rate_n = rate_n - q[8, i] * dn
    return rate_n * ai, (q[6, i] * eaten - q[7, i] * dp) * ai


@jit
def _local_terms(growth, response, harvest, y, area, q, x, dy):  # pragma: no cover - compiled
    n = area.size
    for i in range(n):
        big_n = clipped(y[i])
        big_p = clipped(y[n + i])
        x[i] = big_n
        x[n + i] = big_p
        dy[i], dy[n + i] = local_one(growth, response, harvest, big_n, big_p, area[i], q, i)


@jit(parallel=True)
def _whole_rhs(growth, response, harvest, y, area, q, x, dy, indptr, indices,
               data):  # pragma: no cover - compiled
    """The whole right-hand side on numba's threads: the local terms (as
    :func:`_local_terms`), then ``dy += M x`` row by row, each row summed in the order of its
    stored entries starting from the local term, which is the order of scipy's CSR product
    (``csr_matvec``), so the numbers are those of the numpy path bit for bit whatever the
    number of threads (rows are independent). The indices are read as unsigned: with signed
    ones numba checks each for a negative (wrap-around) index, and the product took 2.4 ms
    instead of 1.0 at 100,000 patches."""
    n = area.size
    for i in numba.prange(n):
        big_n = clipped(y[i])
        big_p = clipped(y[n + i])
        x[i] = big_n
        x[n + i] = big_p
        dy[i], dy[n + i] = local_one(growth, response, harvest, big_n, big_p, area[i], q, i)
    for row in numba.prange(2 * n):
        acc = dy[row]
        k = np.uintp(indptr[row])
        end = np.uintp(indptr[row + 1])
        while k < end:
            acc += data[k] * x[np.uintp(indices[k])]
            k += np.uintp(1)
        dy[row] = acc


def parameter_block(model, n):
    """The parameters of ``model`` as the block the compiled code reads, shape (9, n)."""
    params = model.params
    block = np.empty((len(PARAMETER_ROWS), n))
    for row, name in enumerate(PARAMETER_ROWS):
        block[row] = params.get(name, 0.0)
    return block


def codes(model):
    """``(growth, response, harvest)`` codes of ``model`` for the compiled code."""
    return (GROWTH_CODES[model.growth], RESPONSE_CODES[model.response],
            "prey_harvest" in model.params)


def supports(model) -> bool:
    """True when the compiled code knows the model's growth form and response."""
    return model.growth in GROWTH_CODES and model.response in RESPONSE_CODES


def local_terms_function(model, area):
    """``local(y, x) -> dy``: ``x = max(y, 0)`` in place, and a new array of the local terms,
    in abundance.

    Parameters
    ----------
    model : trophoscape.model.dynamics.LocalModel
        Parameters per patch (arrays of shape (n,) or scalars), in the order of ``area``.
    area : ndarray, shape (n,)
        Patch areas, km².

    Returns
    -------
    callable
        ``local(y, x)`` with ``y``, ``x`` float64 arrays of shape (2 n,); writes ``x`` in
        place and returns ``dy``, shape (2 n,).
    """
    area = np.ascontiguousarray(area, dtype=np.float64)
    n = area.size
    block = parameter_block(model, n)
    growth, response, harvest = codes(model)
    terms = _local_terms

    def local(y, x):
        dy = np.empty(2 * n)
        terms(growth, response, harvest, y, area, block, x, dy)
        return dy

    return local


def rhs_function(model, area, movement):
    """``rhs(t, y) -> dy/dt`` of the whole network in one compiled call on numba's threads:
    the local terms of ``model`` and the sparse product with ``movement`` (CSR, shape
    (2 n, 2 n), in the order of ``area``). Bit for bit the numpy path's
    (:func:`trophoscape.model.system._rhs`); each call returns a fresh array and reuses one
    buffer for the clipped state, so one closure must not be called from several threads
    at once."""
    area = np.ascontiguousarray(area, dtype=np.float64)
    n = area.size
    block = parameter_block(model, n)
    growth, response, harvest = codes(model)
    indptr, indices = movement.indptr, movement.indices
    data = np.ascontiguousarray(movement.data, dtype=np.float64)
    x = np.empty(2 * n)
    whole = _whole_rhs

    def rhs(t, y):
        dy = np.empty(2 * n)
        with ONE_AT_A_TIME:
            whole(growth, response, harvest, y, area, block, x, dy, indptr, indices, data)
        return dy

    return rhs
