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


def _jit(function):
    """Compiled with numba, the machine code cached on disk when a folder for it is writable.

    error_model="numpy": no Python zero-division checks, so the loop vectorises; a division by
    a zero area cannot occur (areas are checked positive when the landscape is read).
    """
    options = dict(error_model="numpy", boundscheck=False, nogil=True)
    try:
        return numba.njit(cache=True, **options)(function)
    except RuntimeError:  # no writable cache folder (numba's words): compile in each process
        return numba.njit(cache=False, **options)(function)


@_jit
def _local_terms(growth, response, harvest, y, area, q, x, dy):  # pragma: no cover - compiled
    n = area.size
    r, k, t, a, h, c, e, m, hv = q[0], q[1], q[2], q[3], q[4], q[5], q[6], q[7], q[8]
    for i in range(n):
        big_n = y[i]
        big_p = y[n + i]
        # max(y, 0) that keeps a NaN (np.maximum does), so a failing solve still shows it
        if big_n < 0.0:
            big_n = 0.0
        if big_p < 0.0:
            big_p = 0.0
        x[i] = big_n
        x[n + i] = big_p
        ai = area[i]
        dn = big_n / ai
        dp = big_p / ai
        if growth == 0:
            g = r[i] * dn
        elif growth == 1:
            g = r[i] * dn * (1.0 - dn / k[i])
        else:
            g = r[i] * dn * (1.0 - dn / k[i]) * (dn / t[i] - 1.0)
        if response == 0:
            f = a[i] * dn
        elif response == 1:
            f = a[i] * dn / (1.0 + a[i] * h[i] * dn)
        elif response == 2:
            f = a[i] * dn * dn / (1.0 + a[i] * h[i] * dn * dn)
        else:
            f = a[i] * dn / (1.0 + a[i] * h[i] * dn + c[i] * dp)
        eaten = f * dp
        rate_n = g - eaten
        if harvest:
            rate_n = rate_n - hv[i] * dn
        dy[i] = rate_n * ai
        dy[n + i] = (e[i] * eaten - m[i] * dp) * ai


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
    params = model.params
    block = np.empty((len(PARAMETER_ROWS), n))
    for row, name in enumerate(PARAMETER_ROWS):
        block[row] = params.get(name, 0.0)
    growth = GROWTH_CODES[model.growth]
    response = RESPONSE_CODES[model.response]
    harvest = "prey_harvest" in params
    terms = _local_terms

    def local(y, x):
        dy = np.empty(2 * n)
        terms(growth, response, harvest, y, area, block, x, dy)
        return dy

    return local
