"""Optional compiled code for the local terms of the right-hand side (numba).

numpy evaluates the local terms of :func:`trophoscape.model.system._rhs` in about 16 passes over the
patches, each reading and writing whole arrays; this code does all of them in one pass
(clip, densities, growth, predation, scaling back by the area), reading each parameter once.
The sparse product stays scipy's (a compiled product was slower, benchmarks/README.md).

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

import numba
import numpy as np

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
