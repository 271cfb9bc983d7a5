"""Integration of a coupled system; the Trajectory it returns.

The system is a deterministic ODE integrated with one of scipy's ``OdeSolver`` classes
(:data:`METHODS`), with two rules that make every result independent of when the series is
recorded:

Quasi-extinction is an event of the integration, not of the census
    A local population that falls through ``extinction_abundance`` from above is removed at
    the moment it crosses (located on the solver's dense output). With the Runge–Kutta
    methods, a step that holds removals is taken again over the patches with removals and
    those around them, every removal at its own moment, and the whole network's solver
    goes on from the step's end (:mod:`trophoscape.integrate.retake`); with the implicit
    methods the step is cut back to the first crossing and the solver restarts there. A
    population below the threshold that is not falling through it (one growing from zero by
    immigration, a trickle-fed sink) is left alone. Census times only record the state, so
    the census interval changes what is recorded, never what happens.
Error control per patch
    The explicit Runge–Kutta methods take the largest scaled error over all components (a max
    norm) instead of scipy's root mean square, so one patch's accuracy does not dilute as
    quiet patches or replicates are added beside it. On networks of 1,000 patches and more
    (:data:`SPARE_SHARE`), a step is accepted when all but the few patches with the largest
    errors meet the tolerance, and those few are taken again over their region at their own
    step sizes, like a step with removals: one tiny, fast patch no longer sets the step of
    the whole network, and every patch still meets the tolerance in every step. Implicit
    methods keep scipy's norm with tolerances divided by the square root of the state size,
    which bounds the error of every component by the same tolerance.
"""

from __future__ import annotations

import dataclasses
import functools
from dataclasses import dataclass


import numpy as np
import scipy.integrate as si
import xarray as xr
from scipy.integrate._ivp import rk as _rk  # the step-size controller's constants

from ..errors import RunError
from ..machine import blas_on_one_thread
from ..model.system import SPECIES, CoupledSystem
from .crossings import NEAR, dense_at, falls_through_within
from .retake import StepRetaker
from .trajectory import SolverStats, Trajectory, census_times

__all__ = ["METHODS", "RunSettings", "STORAGE_DTYPE", "simulate", "choose_method"]

class _StageAware:
    """A Runge–Kutta solver that knows the compiled right-hand side's stage evaluation
    (``fun.stage``, :mod:`trophoscape.model.compiled`), if it has one."""

    def __init__(self, fun, t0, y0, t_bound, **options):
        self._stage = getattr(fun, "stage", None)
        super().__init__(fun, t0, y0, t_bound, **options)


class _MaxNormRK(_StageAware):
    """Error control by the largest scaled error over all components (a max norm).

    scipy's explicit Runge–Kutta classes take the root mean square of the scaled error over
    the whole state, so a patch's error may grow with the square root of the number of quiet
    patches beside it. Here every component must meet ``atol + rtol |y|`` on its own; a
    patch's accuracy is then the same alone, in a network of 100,000 patches or in a stack
    of replicates. Only the norm changes: the coefficients, the step-size controller and the
    dense output are scipy's.
    """

    #: Patches whose error may exceed the tolerance in an accepted step; they are taken
    #: again over a region (set per run by :func:`simulate`, see :data:`SPARE_SHARE`).
    spare = 0
    #: The patches over the tolerance in the last step tried (the accepted one, after a step).
    over = np.empty(0, dtype=np.int64)

    def _estimate_error_norm(self, K, h, scale):
        err = np.abs(self._estimate_error(K, h))
        err /= scale
        return _spared(self, err)

    def _step_impl(self):
        if self._stage is None or np.ndim(self.atol) or np.ndim(self.rtol):
            return super()._step_impl()
        return _compiled_step(self)

    def _dense_output_impl(self):
        """scipy's interpolant, its coefficients ``K.T @ P`` by compiled code on the
        compiled path (one pass on numba's threads; equal to BLAS's to rounding)."""
        if self._stage is None:
            return super()._dense_output_impl()
        from ..model.compiled import dense_coefficients

        return _rk.RkDenseOutput(self.t_old, self.t, self.y_old,
                                 dense_coefficients(self.K, self.P))


def _compiled_step(solver):
    """scipy's ``RungeKutta._step_impl`` (the same step-size controller, its constants
    ``SAFETY``, ``MIN_FACTOR``, ``MAX_FACTOR`` and the same ``K``, ``f``, ``y_old`` for the
    dense output), with each stage's state and right-hand side evaluated by the compiled
    ``rhs.stage`` and the patches' errors by :func:`trophoscape.model.compiled.patch_errors`,
    each in one pass on numba's threads, instead of numpy's stage sums and temporaries
    (passes over the whole state that made a third of a large run's time). The sums are
    taken in another order than numpy's, so the two agree to rounding, not bit for bit
    (``tests/test_compiled.py``)."""
    from ..model.compiled import patch_errors

    t = solver.t
    y = solver.y
    max_step = solver.max_step
    rtol = float(solver.rtol)
    atol = float(solver.atol)
    min_step = 10 * np.abs(np.nextafter(t, solver.direction * np.inf) - t)
    if solver.h_abs > max_step:
        h_abs = max_step
    elif solver.h_abs < min_step:
        h_abs = min_step
    else:
        h_abs = solver.h_abs
    K = solver.K
    stages = solver.n_stages
    per = np.empty(solver.n // 2)
    step_accepted = False
    step_rejected = False
    while not step_accepted:
        if h_abs < min_step:
            return False, solver.TOO_SMALL_STEP
        h = h_abs * solver.direction
        t_new = t + h
        if solver.direction * (t_new - solver.t_bound) > 0:
            t_new = solver.t_bound
        h = t_new - t
        h_abs = np.abs(h)
        K[0] = solver.f
        for s in range(1, stages):
            solver._stage(y, K, s, solver.A[s], h, K[s])
        y_new = np.empty_like(y)
        f_new = np.empty_like(y)
        solver._stage(y, K, stages, solver.B, h, f_new, y_new)
        K[-1] = f_new
        solver.nfev += stages
        patch_errors(K, solver.E, h, y, y_new, rtol, atol, per)
        error_norm = _spared_per(solver, per)
        if error_norm < 1:
            if error_norm == 0:
                factor = _rk.MAX_FACTOR
            else:
                factor = min(_rk.MAX_FACTOR, _rk.SAFETY * error_norm ** solver.error_exponent)
            if step_rejected:
                factor = min(1, factor)
            h_abs *= factor
            step_accepted = True
        else:
            h_abs *= max(_rk.MIN_FACTOR, _rk.SAFETY * error_norm ** solver.error_exponent)
            step_rejected = True
    solver.h_previous = h
    solver.y_old = y
    solver.t = t_new
    solver.y = y_new
    solver.h_abs = h_abs
    solver.f = f_new
    return True, None


def _spared(solver, err) -> float:
    """:func:`_spared_per` of the scaled errors ``err`` of every component."""
    if not solver.spare:
        return float(err.max(initial=0.0))
    return _spared_per(solver, err.reshape(2, -1).max(axis=0))


def _spared_per(solver, per) -> float:
    """The error norm of a step in which up to ``solver.spare`` patches may miss the
    tolerance: the largest scaled error of the others (the ``spare + 1``-th largest of the
    patches' errors, both species of a patch together), and at least the largest divided by
    :data:`SPARE_STEPS` ``** (order + 1)``, so that the step stays within about
    ``SPARE_STEPS`` steps of what the spared patches need (beside patches with no error at
    all it would grow to the whole run). The patches over the tolerance are left in
    ``solver.over``; a step accepted with some is taken again over them.
    """
    if not solver.spare:
        return float(per.max(initial=0.0))
    worst = float(per.max(initial=0.0))
    if not worst >= 1.0:  # every patch meets the tolerance (a NaN is returned as it is: the
        solver.over = np.empty(0, dtype=np.int64)  # step is rejected)
        return worst
    over = np.flatnonzero(per >= 1.0)
    spare = solver.spare
    solver.over = over
    floor = worst / SPARE_STEPS ** (solver.error_estimator_order + 1)
    if over.size > spare:  # rejected: the (spare + 1)-th largest is among them
        return max(floor, float(np.partition(per[over], over.size - spare - 1)
                                [over.size - spare - 1]))
    # the (spare + 1)-th largest: among the errors of at least 1e-2 when there are enough
    # of those (one pass over the network), else among all
    some = per[per >= 1e-2]
    if some.size <= spare:
        some = per
    return max(floor, float(np.partition(some, some.size - spare - 1)[some.size - spare - 1]))


class RK23(_MaxNormRK, si.RK23):
    """scipy's RK23 (Bogacki–Shampine 3(2)) with a max-norm error control."""


class RK45(_MaxNormRK, si.RK45):
    """scipy's RK45 (Dormand–Prince 5(4)) with a max-norm error control."""


class DOP853(_StageAware, si.DOP853):
    """scipy's DOP853 with its combined 5th/3rd-order error estimate taken per component.

    scipy combines the two estimates over the whole state (Hairer, Nørsett & Wanner 1993,
    Solving Ordinary Differential Equations I, §II.10); the same formula is applied to each
    component on its own and the largest is kept (or, with ``spare`` patches, as in
    :func:`_spared`).
    """

    spare = _MaxNormRK.spare
    over = _MaxNormRK.over

    def _estimate_error_norm(self, K, h, scale):
        err5 = np.dot(K.T, self.E5) / scale
        err3 = np.dot(K.T, self.E3) / scale
        e5 = err5 * err5
        denom = e5 + 0.01 * (err3 * err3)
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.where(denom > 0, e5 / np.sqrt(denom), 0.0)
        ratio *= abs(h)
        return _spared(self, ratio)


#: Solvers by the names ``solve_ivp`` uses. The explicit ones control the error per
#: component (max norm); the implicit ones and LSODA are scipy's own, given tolerances
#: divided by the square root of the state size (:func:`_tolerances`).
METHODS = {
    "RK23": RK23,
    "RK45": RK45,
    "DOP853": DOP853,
    "Radau": si.Radau,
    "BDF": si.BDF,
    "LSODA": si.LSODA,
}
#: Methods whose error control is per component.
MAX_NORM = ("RK23", "RK45", "DOP853")
#: In a network of ``n`` patches, a whole-network Runge–Kutta step is accepted when every
#: patch but the ``int(SPARE_SHARE * n)`` with the largest errors meets the tolerance; those
#: few are then taken again over a region at their own step sizes
#: (:mod:`trophoscape.integrate.retake`), so one fast patch no longer sets the step of all.
#: Below ``1 / SPARE_SHARE`` patches no patch is spared.
SPARE_SHARE = 1e-3
#: A step that spares patches is at most about this many times the step they need: their
#: largest error counts, divided by ``SPARE_STEPS ** (order + 1)``.
SPARE_STEPS = 10.0
#: From this many patches on, a step whose region of removals would grow to most of the
#: network from more than one patch is tried again at half the length
#: (:meth:`trophoscape.integrate.retake.StepRetaker.retake`, ``refuse``), at most
#: :data:`MAX_REFUSALS` times between two steps taken again (where populations fall at the
#: same moment everywhere, a shorter step does not help): on a large network mostly in one
#: piece, that region is one group cut at every removal. Smaller networks take it as it is.
REFUSE_MIN_PATCHES = 1_000
MAX_REFUSALS = 4
#: Methods that take the sparse analytic Jacobian.
IMPLICIT = ("Radau", "BDF")


def _tolerances(method: str, rtol: float, atol: float, size: int) -> tuple[float, float]:
    """The tolerances handed to the solver so that every component meets ``rtol, atol``.

    A root-mean-square norm of the scaled error below 1 over ``size`` components allows one
    component an error of ``sqrt(size)`` times the tolerance; dividing the tolerances by
    ``sqrt(size)`` makes the norm a Euclidean one, which bounds every component.
    """
    if method in MAX_NORM or size <= 1:
        return rtol, atol
    root = float(np.sqrt(size))
    return rtol / root, atol / root


def _initial_step(fun, t0, y0, t_bound, order, rtol, atol) -> float:
    """A first step size by the rule of Hairer, Nørsett & Wanner (1993, §II.4), max norm.

    The rule scipy uses, with the max norm of :class:`_MaxNormRK` in place of the root mean
    square, so the first step of a large network is as careful as that of its busiest patch.
    """
    interval = abs(t_bound - t0)
    if y0.size == 0 or interval == 0.0:
        return interval or 1.0
    scale = atol + np.abs(y0) * rtol
    f0 = fun(t0, y0)
    d0 = float(np.max(np.abs(y0) / scale))
    d1 = float(np.max(np.abs(f0) / scale))
    h0 = 1e-6 if d0 < 1e-5 or d1 < 1e-5 else 0.01 * d0 / d1
    h0 = min(h0, interval)
    f1 = fun(t0 + h0, y0 + h0 * f0)
    d2 = float(np.max(np.abs(f1 - f0) / scale)) / h0
    if d1 <= 1e-15 and d2 <= 1e-15:
        h1 = max(1e-6, h0 * 1e-3)
    else:
        h1 = (0.01 / max(d1, d2)) ** (1.0 / (order + 1))
    return min(100 * h0, h1, interval)


def first_crossing(dense, index, level: float, t_old: float, t_new: float) -> float:
    """The earliest time in ``(t_old, t_new]`` at which a component falls to ``level``.

    For solvers whose interpolant is not per component (BDF, Radau, LSODA); the Runge–Kutta
    methods find crossings on each component's interpolant instead, dips between step ends
    included (:mod:`trophoscape.integrate.crossings`, :mod:`trophoscape.integrate.retake`).

    Parameters
    ----------
    dense : callable
        The step's dense output, ``t -> y(t)``.
    index : ndarray of int
        Components at or above ``level`` at ``t_old`` and below it at ``t_new``.

    Returns
    -------
    float
        A time ``t`` with some component of ``index`` below ``level`` and every one at or
        above it a hair earlier: the right end of a bracket narrowed by the Illinois
        variant of regula falsi (Dowell & Jarratt 1971, BIT 11:168; from memory) to
        ``1e-12`` of the step, so the state there always has a component to remove.
    """
    def gap(t):
        return float(np.min(dense(t)[index])) - level

    a, b = float(t_old), float(t_new)
    fa, fb = gap(a), gap(b)
    if fa < 0:  # already below at the start: act at once
        return a
    width = 1e-12 * (b - a) + 4 * np.spacing(b)
    side = 0
    for i in range(200):
        if b - a <= width:
            break
        # Illinois steps, with a bisection every fourth so the bracket always shrinks
        c = 0.5 * (a + b) if i % 4 == 3 else b - fb * (b - a) / (fb - fa)
        if not a < c < b:
            c = 0.5 * (a + b)
        fc = gap(c)
        if fc < 0:
            b, fb = c, fc
            if side == -1:
                fa *= 0.5
            side = -1
        else:
            a, fa = c, fc
            if side == 1:
                fb *= 0.5
            side = 1
    return b


def _crossed_compiled(solver, y_prev, above, level):
    """``(now, crossed, dense)`` of an accepted step of the whole network, as the numpy
    lines in :func:`simulate` find them (``dense``: the step's interpolant, None where no
    population came near the threshold), in compiled passes on numba's threads: the
    step's ends first, then, for those near the threshold at either end, the points of
    :func:`~trophoscape.integrate.crossings.falls_through_within` on the interpolant."""
    from ..model.compiled import on_threads
    from . import compiled
    from .crossings import LOOKS, interpolant_arrays

    y = solver.y
    now = np.empty(y.size, dtype=bool)
    crossed = np.empty(y.size, dtype=bool)
    close = np.empty(y.size, dtype=bool)
    count = on_threads(compiled.step_ends, y_prev, y, above, float(level), NEAR, now, crossed,
                       close)
    if not count:
        return now, crossed, None
    dense = solver.dense_output()
    kind, y_old, coef, h = interpolant_arrays(dense)
    grid = np.linspace(0.0, 1.0, LOOKS + 1)  # the points of falls_through_within
    on_threads(compiled.falls_between, close, above, float(level), kind, y_old, coef, h, grid,
               crossed)
    return now, crossed, dense


def _on(dense):
    """``at(index, x)`` of :mod:`trophoscape.integrate.crossings` for a step's dense output."""
    return lambda index, x: dense_at(dense, index, x)


def choose_method(method: str) -> str:
    """Resolve ``"auto"`` to a scipy method name.

    Explicit Runge–Kutta (RK45) is the default: on the non-stiff runs typical of patch
    networks it was far faster than BDF with a sparse Jacobian, whose LU factorisation
    fills in on planar graphs (see ``benchmarks/README.md``).
    """
    return "RK45" if method == "auto" else method


def _census(y, threshold):
    """Zero every abundance below ``threshold`` (and every negative).

    The rule of event-based (demographic) runs at census times; ODE runs remove populations
    as they fall through the threshold instead (:func:`simulate`).
    """
    low = y < threshold
    if threshold <= 0:
        low = y < 0
    if np.any(low & (y != 0)):
        y = np.where(low, 0.0, y)
        return y, True
    return y, False


def _release(solver) -> None:
    """Free a finished solver's arrays now, not at the next cyclic garbage collection.

    scipy's solvers hold closures over themselves (``fun``, and ``jac`` for implicit
    methods), a reference cycle that only the cyclic collector breaks; a run with a census
    restart every interval allocates few Python objects, so that collector seldom runs and
    dead solvers piled up: at 100,000 patches, about 20 MB each and 1.6 GB in all.
    """
    for name in ("fun", "jac", "fun_single", "fun_vectorized"):
        if name in vars(solver):
            setattr(solver, name, None)


#: Storage type of a study's time series: the state is integrated in float64 and each census
#: recorded in float32, as ``timeseries.nc`` holds it (7 significant digits, half the memory
#: of a 100,000-patch run), so the analyses see exactly what the file holds.
STORAGE_DTYPE = np.float32


@dataclass(frozen=True)
class RunSettings:
    """The settings of :func:`simulate` a scenario's ``[run]`` section gives: one place where
    a scenario becomes solver settings, for every workflow (a study, its replicates, the
    spread runs)."""

    duration: float
    census_interval: float
    extinction_abundance: float
    method: str
    rtol: float
    atol: float
    time_unit: str
    dtype: type = STORAGE_DTYPE

    @classmethod
    def from_scenario(cls, scenario) -> "RunSettings":
        sc = scenario
        return cls(duration=sc["run.duration"], census_interval=sc["run.census_interval"],
                   extinction_abundance=sc["run.extinction_abundance"],
                   method=sc["run.method"], rtol=sc["run.rtol"], atol=sc["run.atol"],
                   time_unit=sc["time_unit"])

    def options(self, **changes) -> dict:
        """Keyword arguments of :func:`simulate`, with ``changes`` (``duration``, say)."""
        return {**dataclasses.asdict(self), **changes}


def _simulate(
    system: CoupledSystem,
    y0,
    *,
    duration: float,
    census_interval: float,
    extinction_abundance: float = 1.0,
    method: str = "auto",
    rtol: float = 1e-6,
    atol: float = 1e-8,
    ids=None,
    time_unit: str = "year",
    progress: bool = False,
    events=(),
    noise=None,
    dtype=np.float64,
    sink=None,
    sink_rows: int = 64,
    output_times=None,
) -> Trajectory:
    """Integrate ``system`` from ``y0`` with census steps every ``census_interval``.

    Parameters
    ----------
    system : CoupledSystem
    y0 : ndarray, shape (2 n_patches,)
        Initial abundances, laid out as in :mod:`trophoscape.model.system`.
    duration, census_interval : float
        In the scenario's time unit. The census interval only says when the state is
        recorded.
    extinction_abundance : float
        A local population that falls through this many individuals from above (in the
        integration or through a shock) is removed at that moment; one below it that is
        not falling through it (growing from zero, fed by immigrants) is left alone. 0
        turns the rule off.
    method : str
        ``"auto"`` or a ``scipy.integrate.solve_ivp`` method name.
    rtol, atol : float
        Solver tolerances (``atol`` in individuals).
    ids : array of str, shape (n_patches,), optional
        Patch ids for the ``patch`` coordinate (default ``"0", "1", ...``).
    progress : bool
        Show a progress bar (it appears only on runs longer than two seconds).
    events : sequence, optional
        Shocks and other sudden changes (:mod:`trophoscape.model.shocks`): objects with a
        ``time`` and ``apply(system, y) -> (system, y)``. Integration stops at each event
        time, the event is applied, and integration restarts with the system it returns.
        A census at the same time records the state before the event. Events at or after
        ``duration`` are ignored; events at time 0 act before the first step.
    noise : optional
        Environmental noise held over the steps of its own clock: an object with a ``step``
        (time units) and ``start()`` returning a stateful run with ``interval(system,
        redraw=True) -> system`` (the system to integrate over the next noise step, with
        noisy rates); see :class:`trophoscape.integrate.noise.NoiseModel`. The solver stops at every
        noise step (``k * step`` from time 0) and restarts with the step size it had
        reached; census times do not stop it. Without noise (None) nothing changes.
        With demographic noise the run is event-based instead (whole individuals,
        :func:`trophoscape.integrate.events.simulate_events`); ``method``, ``rtol`` and ``atol`` do not
        apply.
    dtype : numpy dtype
        Storage type of the recorded census states. The state is always integrated in
        float64; ``numpy.float32`` halves the memory of the time series (as written to
        ``timeseries.nc``), which is what :func:`trophoscape.workflows.study.run_study` uses. Each
        species' series is one contiguous ``(time, patch)`` block, so it is written to a
        file without another copy.
    sink : callable, optional
        ``sink(start, stop, record)``, called as the run goes each time ``sink_rows`` more
        census rows are recorded (and once for the last rows), with ``record`` the
        ``(species, time, patch)`` array in the user's patch order, rows ``start:stop`` new
        (:class:`trophoscape.io.series.SeriesWriter` writes them to NetCDF). Event-based
        (demographic) runs do not call it.
    sink_rows : int
        Census rows per call of ``sink``.
    output_times : array_like, optional
        Record the state at these times (and at 0) instead of every ``census_interval``,
        within ``[0, duration]``: the run ends at the last of them. ODE runs only; the
        recorded values do not depend on where they fall (the solver's dense output between
        its own steps, as on the census grid).

    Returns
    -------
    Trajectory

    Raises
    ------
    RunError
        When the solver fails; the message gives the time reached and what to try.
    """
    if noise is not None and getattr(noise, "demographic", False):
        # whole individuals and random events: no ODE (trophoscape.integrate.events.simulate_events)
        from .events import simulate_events

        if output_times is not None:
            raise ValueError("output_times is for ODE runs; event-based runs record the "
                             "census grid")

        traj = simulate_events(system, y0, duration=duration, census_interval=census_interval,
                               noise=noise, extinction_abundance=extinction_abundance, ids=ids,
                               time_unit=time_unit, events=events, progress=progress)
        # whole counts: exact in float32 up to 2**24 individuals per patch
        data = traj.data.assign({s: traj.data[s].astype(dtype) for s in SPECIES})
        return Trajectory(data=data, stats=traj.stats)
    method = choose_method(method)
    solver_cls = METHODS[method]
    n = system.n_patches
    if output_times is None:
        times = census_times(float(duration), float(census_interval))
    else:  # the state recorded at these times instead (they include 0)
        times = np.union1d(0.0, np.asarray(output_times, dtype=float))
        if times[0] < 0 or times[-1] > float(duration) * (1 + 1e-12):
            raise ValueError("output_times must lie within 0 and duration")
    # (species, time, patch): each species' series contiguous, held once
    record = np.empty((2, times.size, n), dtype=dtype)
    # a finite float64 state can still overflow a narrower storage type
    limit = float(np.finfo(dtype).max) if np.dtype(dtype).itemsize < 8 else None
    level = float(extinction_abundance)
    rule = level > 0
    y = np.asarray(y0, dtype=float).copy()
    # tiny negatives (a Runge-Kutta stage, a numerical residue) are recorded as zero
    record[:, 0] = np.maximum(y, 0.0).reshape(2, n)

    noisy = noise is not None
    if noisy:
        noise_step = float(noise.step)
        next_noise = 1  # the next noise step starts at next_noise * noise_step
        run = noise.start()
        base = system  # the system without noise; events change it, noise perturbs it
        system = run.interval(base)
    # a reordered system (CoupledSystem.order) is integrated in its internal patch order with
    # explicit methods: no gather/scatter per RHS call, one per census and event instead.
    # Implicit methods take the Jacobian in the user's order and stay there.
    internal = system.reordered and method not in IMPLICIT
    rhs = system.rhs_function(internal=internal)
    rtol_used, atol_used = _tolerances(method, rtol, atol, 2 * n)
    options = dict(rtol=rtol_used, atol=atol_used)
    if method in IMPLICIT:
        options["jac"] = system.jacobian_function()

    def user_order(v):
        return system.to_user(v) if internal else v
    spare = min(int(SPARE_SHARE * n), n - 1) if method in MAX_NORM else 0
    totals = dict(nfev=0, njev=0, nlu=0)
    local_evaluations = 0.0  # of steps taken again over regions, in whole-network evaluations
    steps = restarts = 0
    removals = np.zeros(2, dtype=np.int64)
    removed = np.zeros(2)
    # events: the solver runs only up to the next one (its t_bound), so none is stepped over
    pending = sorted((e for e in events if float(e.time) < times[-1]),
                     key=lambda e: float(e.time))
    next_event = 0

    def bound():
        b = float(pending[next_event].time) if next_event < len(pending) else times[-1]
        # with noise the rates change at every noise step: never step across one
        return min(b, next_noise * noise_step) if noisy else b

    def remove(y_now, falling):
        """Quasi-extinction of the components ``falling`` (bool): zeroed, counted."""
        if not falling.any():
            return y_now
        halves = falling.reshape(2, -1)
        removals[:] += halves.sum(axis=1)
        removed[:] += np.where(halves, y_now.reshape(2, -1), 0.0).sum(axis=1)
        y_now = y_now.copy()
        y_now[falling] = 0.0
        return y_now

    def apply_events(t0, y_start):
        nonlocal system, rhs, next_event, base
        if next_event >= len(pending) or float(pending[next_event].time) > t0:
            return y_start
        y_start = user_order(y_start)  # events index patches in the user's order
        above = y_start >= level
        while next_event < len(pending) and float(pending[next_event].time) <= t0:
            if noisy:
                base, y_start = pending[next_event].apply(base, y_start)
            else:
                system, y_start = pending[next_event].apply(system, y_start)
            next_event += 1
        if noisy:  # the same noisy rates on the changed system, up to the next noise step
            system = run.interval(base, redraw=False)
        rhs = system.rhs_function(internal=internal)
        if method in IMPLICIT:
            options["jac"] = system.jacobian_function()
        y_start = np.asarray(y_start, dtype=float)
        if rule:  # a shock that takes a population through the threshold removes it
            # (one it empties outright removed it itself: no individuals for the rule)
            y_start = remove(y_start, above & (y_start < level) & (y_start > 0))
        # a rewired system may number its patches differently: back into its own order
        return system.to_internal(y_start) if internal else y_start

    def start(t0, y_start, first_step):
        y_start = apply_events(t0, y_start)
        if bound() <= t0:  # nothing to integrate before the next census or event
            first_step = None
        elif first_step is not None:
            first_step = min(first_step, bound() - t0)
        elif method in MAX_NORM:
            first_step = _initial_step(rhs, t0, y_start, bound(), solver_cls.error_estimator_order,
                                       rtol_used, atol_used)
            totals["nfev"] += 2
        solver = solver_cls(rhs, t0, y_start, bound(), first_step=first_step, **options)
        if method in MAX_NORM:
            solver.spare = spare
        return solver

    def add_counts(s):
        for key in totals:
            totals[key] += int(getattr(s, key, 0) or 0)

    def restart(old, t0, y_start, first_step, counted=True):
        """A fresh solver from ``(t0, y_start)``; the old one's counts kept, its arrays freed.
        ``counted``: in ``restarts`` (not a step refused, which is taken again shorter)."""
        nonlocal restarts, above
        add_counts(old)
        new = start(t0, y_start, first_step)
        _release(old)
        restarts += counted
        # which components can fall through the threshold from here
        above = new.y >= level
        return new

    refusals = 0  # steps refused since the last step taken again

    def refusable():
        return n >= REFUSE_MIN_PATCHES and refusals < MAX_REFUSALS

    def refused(old, t_old, y_prev):
        """The step from ``t_old`` tried again at half the length."""
        nonlocal refusals
        refusals += 1
        return restart(old, t_old, y_prev.copy(), 0.5 * (old.t - t_old), counted=False)

    def step_wanted(s):
        return getattr(s, "h_abs", None) or s.step_size

    def store(k, y_k):
        y_k = np.maximum(y_k, 0.0)
        if limit is not None and y_k.max(initial=0.0) > limit:
            raise RunError(
                f"abundances passed {limit:.3g} individuals at time {times[k]:.6g}, "
                f"more than the time series can store ({np.dtype(dtype).name}); check "
                "for explosive growth (e.g. exponential prey with no predator)")
        record[:, k] = user_order(y_k).reshape(2, n)

    from tqdm.auto import tqdm

    bar = tqdm(total=times.size - 1, disable=not progress, delay=2.0, unit="census",
               desc="integrating", leave=False)
    k = 1
    sunk = 0  # census rows handed to the sink
    if not noisy:
        base = None
    solver = start(times[0], system.to_internal(y) if internal else y, None)
    # components at or above the threshold at the last step's end: those can fall through it
    # (kept by restart from then on)
    above = solver.y >= level
    status, message = 0, "The solver successfully reached the end of the integration interval."
    h_wanted = None
    # Runge-Kutta solvers interpolate each component on its own: dips can be looked for
    per_component = isinstance(solver, si._ivp.rk.RungeKutta)
    # steps with removals are taken again over the region they change (Runge-Kutta methods)
    retakers = []  # [(system, its retaker)]: one, for the system integrated now

    def retaker():
        if retakers and retakers[0][0] is system:
            return retakers[0][1]
        area, model, movement = system.parts(internal)
        old = retakers[0][1] if retakers else None
        # noise and shocks change the rates, seldom the links: those are shared
        new = StepRetaker(area, model, movement, share=old,
                          compiled=system.local_terms_used == "compiled")
        retakers[:] = [(system, new)]
        return new
    try:
        while k < times.size:
            if solver.status == "finished" and solver.t < times[k]:
                if noisy and solver.t >= next_noise * noise_step:
                    # a new noise step: new rates from here
                    while next_noise * noise_step <= solver.t:
                        next_noise += 1
                    system = run.interval(base)
                    rhs = system.rhs_function(internal=internal)
                    if method in IMPLICIT:
                        options["jac"] = system.jacobian_function()
                    h = step_wanted(solver)
                    # the last step was cut to end at the noise step: keep the one wanted
                    h = max(h or 0.0, h_wanted or 0.0) or None
                    solver = restart(solver, solver.t, solver.y.copy(), h)
                    continue
                if next_event < len(pending) and solver.t >= float(pending[next_event].time):
                    h = step_wanted(solver)
                    solver = restart(solver, solver.t, solver.y.copy(), 0.5 * h if h else None)
                    continue
                raise RunError(  # pragma: no cover
                    'the solver stopped before the end of the run; try method = "BDF" or '
                    "looser rtol/atol")
            if noisy:  # the step wanted, before a noise step cuts it short
                h_wanted = getattr(solver, "h_abs", None)
            t_old, y_prev = solver.t, solver.y
            with np.errstate(over="ignore", invalid="ignore"):  # reported below instead
                outcome = solver.step()
            steps += 1
            if solver.status == "failed":
                add_counts(solver)
                if np.abs(solver.y).max() > 1e12:
                    advice = ("abundances passed 1e12 individuals: check for explosive growth "
                              "(e.g. exponential prey with no predator)")
                else:
                    advice = ('try method = "BDF" or "Radau" for stiff runs, or looser '
                              "rtol/atol")
                raise RunError(f"the ODE solver ({method}) failed at time {solver.t:.6g}: "
                               f"{str(outcome).rstrip('.')}; {advice}")
            if not np.all(np.isfinite(solver.y)):
                add_counts(solver)
                raise RunError(
                    f"the state became non-finite at time {solver.t:.6g} ({method}); "
                    "check for explosive growth (e.g. exponential prey with no predator)"
                )
            dense = None
            t_end = solver.t  # the state is known up to here
            falling = None
            retaken = None
            # patches that missed the tolerance in the step (at most `spare`)
            over = solver.over if spare and solver.t > t_old else None
            if over is not None and not over.size:
                over = None
            if over is not None and not rule:  # taken again over a region, with no removals
                dense = solver.dense_output()
                inside = times[k:np.searchsorted(times, solver.t, side="right")]
                retaken = retaker().retake(
                    t_old, y_prev, solver.t, solver.y, dense, over, -np.inf,
                    np.zeros(2 * n, dtype=bool), rtol_used, atol_used, census=inside,
                    refuse=refusable())
                if retaken is None:  # a region of most of the network: a shorter step
                    solver = refused(solver, t_old, y_prev)
                    continue
                local_evaluations += retaken.evaluations
            elif rule and solver.t > t_old:  # (a restart at the bound: a step of zero length)
                # the compiled right-hand side's solvers look in compiled passes
                looked = per_component and getattr(solver, "_stage", None) is not None
                if looked:
                    now, crossed, dense = _crossed_compiled(solver, y_prev, above, level)
                else:
                    now = solver.y >= level
                    crossed = above & ~now
                if per_component and not looked:
                    # those near the threshold at either end may have dipped through it, or
                    # risen to it and fallen back, between the step's ends
                    near = np.flatnonzero(~crossed
                                          & (np.minimum(y_prev, solver.y) < (1.0 + NEAR) * level)
                                          & (np.maximum(y_prev, solver.y) > (1.0 - NEAR) * level))
                    if near.size:
                        dense = solver.dense_output()
                        crossed[near[falls_through_within(_on(dense), near, level,
                                                          above[near])]] = True
                if (crossed.any() or over is not None) and per_component:
                    # the step taken again over the patches with removals (and those that
                    # missed the tolerance) and around them
                    dense = dense or solver.dense_output()
                    inside = times[k:np.searchsorted(times, solver.t, side="right")]
                    patches = np.flatnonzero(crossed) % n
                    if over is not None:
                        patches = np.concatenate([patches, over])
                    retaken = retaker().retake(
                        t_old, y_prev, solver.t, solver.y, dense, patches, level,
                        above, rtol_used, atol_used, census=inside, refuse=refusable())
                    if retaken is None:  # too many removals for one step: a shorter one
                        solver = refused(solver, t_old, y_prev)
                        continue
                    removals[:] += retaken.removals
                    removed[:] += retaken.removed
                    local_evaluations += retaken.evaluations
                    now = retaken.y >= level
                elif crossed.any():
                    # implicit methods: the step is cut back to the first crossing, which is
                    # removed there, and the solver restarts
                    dense = dense or solver.dense_output()
                    t_end = first_crossing(dense, np.flatnonzero(crossed), level, t_old,
                                           solver.t)
                    y_end = dense(t_end) if t_end < solver.t else solver.y.copy()
                    falling = above & (y_end < level)
                    now = y_end >= level
                    now[falling] = False
                above = now
            if retaken is not None:  # at most MAX_REFUSALS refused between two taken
                refusals = 0
            first_row = k
            while k < times.size and times[k] <= t_end and (falling is None or times[k] < t_end):
                if retaken is not None and times[k] == solver.t:
                    y_k = retaken.y
                elif times[k] == solver.t:
                    y_k = solver.y
                else:
                    dense = dense or solver.dense_output()
                    y_k = dense(times[k])
                    if retaken is not None:
                        y_k[retaken.components] = retaken.census[k - first_row]
                try:
                    store(k, y_k)
                except RunError:
                    add_counts(solver)
                    raise
                k += 1
                bar.update(1)
                if sink is not None and k - sunk == sink_rows:
                    sink(sunk, k, record)
                    sunk = k
            if retaken is not None:
                # (a new solver evaluates the right-hand side at its start: on the
                # compiled path a whole evaluation on numba's threads costs less than one
                # of only the rows the region changed; benchmarks/README.md, sixteenth
                # session)
                solver = restart(solver, t_end, retaken.y, step_wanted(solver))
            if falling is not None:
                # half the step reached: the full one was often rejected right after a
                # population was zeroed (benchmarks/README.md)
                h = step_wanted(solver)
                solver = restart(solver, t_end, remove(y_end, falling), 0.5 * h if h else None)
        add_counts(solver)
        if sink is not None and sunk < k:  # the last rows, fewer than sink_rows
            sink(sunk, k, record)
    finally:
        bar.close()

    # the regional steps, counted as the whole-network evaluations they amount to
    totals["nfev"] += int(np.ceil(local_evaluations))
    stats = SolverStats(method=method, steps=steps, restarts=restarts, status=status,
                        message=message, removals=tuple(int(v) for v in removals),
                        removed_individuals=tuple(float(v) for v in removed), **totals)
    ids = np.asarray([str(i) for i in range(n)] if ids is None else ids, dtype=object)
    data = xr.Dataset(
        {
            name: (("time", "patch"), record[s],
                   {"units": "individuals", "long_name": f"{name} abundance"})
            for s, name in enumerate(SPECIES)
        },
        coords={"time": ("time", times, {"units": time_unit, "long_name": "time"}),
                "patch": ("patch", ids, {"long_name": "patch id"})},
    )
    return Trajectory(data=data, stats=stats)


@functools.wraps(_simulate)
def simulate(system, y0, **options):
    # the compiled kernels hold every core: BLAS on one thread meanwhile (machine)
    with blas_on_one_thread(getattr(system, "local_terms_used", None) == "compiled"):
        return _simulate(system, y0, **options)
