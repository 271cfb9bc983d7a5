"""Optional compiled code for the local terms of the right-hand side (numba).

numpy evaluates the local terms of :func:`trophoscape.model.system._rhs` in about 16 passes over the
patches, each reading and writing whole arrays; this code does all of them in one pass
(clip, densities, growth, predation, scaling back by the area), reading each parameter once.
:func:`rhs_function` does that pass and the sparse product in one call on numba's threads,
summing each row in the order of scipy's CSR product (benchmarks/README.md, "Both cores for
the whole network's steps").

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

import os
import threading
import types

import numba
import numpy as np

from ..machine import cores

#: The kernels that run on numba's threads (the whole RHS here, the regions' groups in
#: :mod:`trophoscape.integrate.compiled`) take this lock: numba's workqueue thread pool
#: ends the process when two Python threads enter it at once. (Read it from this module at
#: the time of use: a forked process gets a new one, below.)
ONE_AT_A_TIME = threading.Lock()


def _new_lock_after_fork() -> None:
    # a process forked while another thread held the lock would inherit it held, with no
    # thread left to let it go (the stability analysis in a second process would wait on
    # it for ever); the forked process runs its kernels alone
    global ONE_AT_A_TIME
    ONE_AT_A_TIME = threading.Lock()


os.register_at_fork(after_in_child=_new_lock_after_fork)
#: The process that first ran a kernel on numba's threads (see :func:`threaded`).
_threads_started_in: int | None = None
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
    kernel = _compiled(function, options)
    if parallel:  # its one-thread twin, cached under its own name (see threaded)
        kernel.one_thread = _compiled(_twin(function), {**options, "parallel": False})
    return kernel


def _compiled(function, options):
    try:
        return numba.njit(cache=True, **options)(function)
    except RuntimeError:  # no writable cache folder (numba's words): compile in each process
        return numba.njit(cache=False, **options)(function)


def _twin(function):
    """A copy of ``function`` under another qualified name (numba names its cache files by
    it), so that a one-thread compilation of the same code is cached beside the other."""
    twin = types.FunctionType(function.__code__, function.__globals__, function.__name__,
                              function.__defaults__, function.__closure__)
    twin.__qualname__ = function.__qualname__ + "_one_thread"
    twin.__module__ = function.__module__
    twin.__doc__ = function.__doc__
    return twin


def threaded(kernel):
    """``kernel`` (compiled with ``jit(parallel=True)``) or its one-thread twin, which gives
    the same numbers bit for bit (every loop on numba's threads has independent iterations).

    The twin runs where numba has one thread or the process one core (``NUMBA_NUM_THREADS=1``,
    a pool's worker: :func:`trophoscape.machine.cores`), and in a process forked from
    one that already ran a kernel on numba's threads: numba's OpenMP layer ends such a
    process at its first parallel loop ("fork() called from a process already using GNU
    OpenMP"), and the pools that plan corridors or scan origins fork after the baseline run.
    """
    global _threads_started_in
    pid = os.getpid()
    if (cores() == 1 or numba.config.NUMBA_NUM_THREADS == 1
            or _threads_started_in not in (None, pid)):
        return kernel.one_thread
    _threads_started_in = pid
    return kernel


def on_threads(kernel, *args):
    """``kernel(*args)``, or its one-thread twin's, as :func:`threaded` chooses, holding
    :data:`ONE_AT_A_TIME`: how every kernel on numba's threads is called."""
    with ONE_AT_A_TIME:
        return threaded(kernel)(*args)


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


@jit(inline=True)
def _local_at(growth, response, harvest, v_n, v_p, area, q, x, dy, i):  # pragma: no cover
    """Patch ``i`` at abundances ``v_n, v_p``: clipped into ``x``, its local terms into
    ``dy`` (both of the whole state's size)."""
    n = area.size
    big_n = clipped(v_n)
    big_p = clipped(v_p)
    x[i] = big_n
    x[n + i] = big_p
    dy[i], dy[n + i] = local_one(growth, response, harvest, big_n, big_p, area[i], q, i)


@jit
def _local_terms(growth, response, harvest, y, area, q, x, dy):  # pragma: no cover - compiled
    n = area.size
    for i in range(n):
        _local_at(growth, response, harvest, y[i], y[n + i], area, q, x, dy, i)


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
        _local_at(growth, response, harvest, y[i], y[n + i], area, q, x, dy, i)
    for row in numba.prange(2 * n):
        dy[row] = _product(dy, indptr, indices, data, x, row)


@jit(inline=True)
def _product(dy, indptr, indices, data, x, row):  # pragma: no cover - compiled
    """``dy[row] + (M x)[row]``, summed in the order of the row's stored entries from
    ``dy[row]`` (as scipy's ``csr_matvec``), indices read as unsigned."""
    acc = dy[row]
    for k in range(np.uintp(indptr[row]), np.uintp(indptr[row + 1])):
        acc += data[k] * x[np.uintp(indices[k])]
    return acc


@jit(inline=True)
def _combined(K, coefficients, stages, c):  # pragma: no cover - compiled
    """``sum_l coefficients[l] K[l, c]`` over the first ``stages`` rows, in order."""
    acc = K[0, c] * coefficients[0]
    for l in range(1, stages):
        acc += K[l, c] * coefficients[l]
    return acc


@jit(parallel=True)
def _stage(growth, response, harvest, y, K, stages, coefficients, h, area, q, x, out, indptr,
           indices, data, y_out):  # pragma: no cover - compiled
    """One Runge–Kutta stage on numba's threads: the whole RHS (as :func:`_whole_rhs`) at
    ``y + (sum_l coefficients[l] K[l]) h`` over the first ``stages`` rows of ``K`` (the
    stage's state is never stored, only clipped into ``x``), into ``out``; with
    ``y_out`` of the state's size the state is stored there too (the step's end)."""
    n = area.size
    keep = y_out.size == y.size
    for i in numba.prange(n):
        v_n = y[i] + _combined(K, coefficients, stages, i) * h
        v_p = y[n + i] + _combined(K, coefficients, stages, n + i) * h
        if keep:
            y_out[i] = v_n
            y_out[n + i] = v_p
        _local_at(growth, response, harvest, v_n, v_p, area, q, x, out, i)
    for row in numba.prange(2 * n):
        out[row] = _product(out, indptr, indices, data, x, row)


def dense_coefficients(K, P):
    """``K.T @ P`` (the coefficients of scipy's Runge–Kutta interpolant, shape (n, columns of
    P)) by :func:`_dense_coefficients`, on numba's threads, one caller at a time."""
    Q = np.empty((K.shape[1], P.shape[1]))
    on_threads(_dense_coefficients, K, np.ascontiguousarray(P, dtype=np.float64), Q)
    return Q


@jit(parallel=True)
def _dense_coefficients(K, P, Q):  # pragma: no cover - compiled
    """``Q[c, j] = sum_l K[l, c] P[l, j]``, summed in order of ``l``."""
    for c in numba.prange(K.shape[1]):
        for j in range(P.shape[1]):
            acc = K[0, c] * P[0, j]
            for l in range(1, K.shape[0]):
                acc += K[l, c] * P[l, j]
            Q[c, j] = acc


def patch_errors(K, E, h, y, y_new, rtol, atol, per):
    """:func:`_patch_errors` (on numba's threads, one caller at a time)."""
    on_threads(_patch_errors, K, E, h, y, y_new, rtol, atol, per)


@jit(parallel=True)
def _patch_errors(K, E, h, y, y_new, rtol, atol, per):  # pragma: no cover - compiled
    """Each patch's larger scaled error of a Runge–Kutta step, into ``per`` (shape (n,)):
    ``|h sum_l E[l] K[l, c]| / (atol + max(|y_c|, |y_new_c|) rtol)`` over its two
    components; a NaN (in ``K``, ``y`` or ``y_new``) is kept, as numpy keeps it."""
    n = per.size
    stages = E.size
    for i in numba.prange(n):
        worst = 0.0
        for half in range(2):
            c = i + half * n
            big = abs(y[c])
            end = abs(y_new[c])
            if end > big or end != end:  # np.maximum's rule: a NaN is kept
                big = end
            err = abs(_combined(K, E, stages, c) * h) / (atol + big * rtol)
            if err > worst or err != err:
                worst = err
            if worst != worst:
                break
        per[i] = worst


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
    at once.

    The closure's ``stage`` attribute evaluates a Runge–Kutta stage, the stage's state and
    the RHS there, in one call (``stage(y, K, stages, coefficients, h, out, y_out=None)``,
    :func:`_stage`): the explicit solvers of :mod:`trophoscape.integrate.ode` use it."""
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
        on_threads(whole, growth, response, harvest, y, area, block, x, dy, indptr, indices,
                   data)
        return dy

    no_state = np.empty(0)

    def stage(y, K, stages, coefficients, h, out, y_out=None):
        """``out = rhs(y + (sum_l coefficients[l] K[l]) h)`` over the first ``stages`` rows
        of ``K``, in one call (:func:`_stage`); that state is stored in ``y_out`` if given."""
        on_threads(_stage, growth, response, harvest, y, K, stages, coefficients, h, area,
                   block, x, out, indptr, indices, data, no_state if y_out is None else y_out)

    rhs.stage = stage
    return rhs
