"""Integration of a coupled system between census steps; the Trajectory it returns.

Between census steps the system is a deterministic ODE integrated with one of scipy's
``OdeSolver`` classes. At each census time abundances are read off the solver's dense
output; local populations below the quasi-extinction abundance (and tiny negative values
left by the integrator) are set to zero. The solver keeps running across census times
while the census changes nothing, and when it must restart it starts with the step size
it had reached (halved, since the zeroed components make the first step after a census
harder), so the census does not cost a fresh step-size search each time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.integrate as si
import xarray as xr

from .errors import RunError
from .system import SPECIES, CoupledSystem

__all__ = ["METHODS", "SolverStats", "Trajectory", "census_times", "simulate", "choose_method"]

#: scipy solvers by the names ``solve_ivp`` uses.
METHODS = {
    "RK23": si.RK23,
    "RK45": si.RK45,
    "DOP853": si.DOP853,
    "Radau": si.Radau,
    "BDF": si.BDF,
    "LSODA": si.LSODA,
}
#: Methods that take the sparse analytic Jacobian.
IMPLICIT = ("Radau", "BDF")


@dataclass(frozen=True)
class SolverStats:
    """What the solver did: as on scipy's ``OdeResult`` plus the census restarts."""

    method: str
    nfev: int
    njev: int
    nlu: int
    steps: int
    restarts: int
    status: int
    message: str

    @property
    def success(self) -> bool:
        return self.status == 0

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


@dataclass(frozen=True, eq=False)
class Trajectory:
    """Abundances over time, backed by an xarray Dataset.

    Attributes
    ----------
    data : xarray.Dataset
        Variables ``prey`` and ``predator`` (individuals), dims ``("time", "patch")`` (and
        ``replicate`` last when there are several); coordinate ``patch`` holds the ids.
    stats : SolverStats
        Solver statistics.
    """

    data: xr.Dataset
    stats: SolverStats

    @property
    def time(self) -> np.ndarray:
        return self.data["time"].values

    @property
    def ids(self) -> np.ndarray:
        return self.data["patch"].values

    def __getitem__(self, species: str) -> xr.DataArray:
        return self.data[species]


def census_times(duration: float, census_interval: float) -> np.ndarray:
    """Census times ``0, Δ, 2Δ, ...`` up to and including ``duration``."""
    k = int(np.floor(duration / census_interval + 1e-9))
    times = np.arange(k + 1) * census_interval
    if duration - times[-1] > 1e-9 * max(1.0, duration):
        times = np.append(times, duration)
    return times


def choose_method(method: str) -> str:
    """Resolve ``"auto"`` to a scipy method name.

    Explicit Runge–Kutta (RK45) is the default: on the non-stiff runs typical of patch
    networks it was far faster than BDF with a sparse Jacobian, whose LU factorisation
    fills in on planar graphs (see ``benchmarks/README.md``).
    """
    return "RK45" if method == "auto" else method


def _census(y, threshold):
    """Quasi-extinction: zero every abundance below ``threshold`` (and every negative)."""
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


def simulate(
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
) -> Trajectory:
    """Integrate ``system`` from ``y0`` with census steps every ``census_interval``.

    Parameters
    ----------
    system : CoupledSystem
    y0 : ndarray, shape (2 n_patches,)
        Initial abundances, laid out as in :mod:`trophoscape.system`.
    duration, census_interval : float
        In the scenario's time unit.
    extinction_abundance : float
        Local populations below this many individuals are set to zero at each census.
    method : str
        ``"auto"`` or a ``scipy.integrate.solve_ivp`` method name.
    rtol, atol : float
        Solver tolerances (``atol`` in individuals).
    ids : array of str, shape (n_patches,), optional
        Patch ids for the ``patch`` coordinate (default ``"0", "1", ...``).
    progress : bool
        Show a progress bar (it appears only on runs longer than two seconds).
    events : sequence, optional
        Shocks and other sudden changes (:mod:`trophoscape.shocks`): objects with a
        ``time`` and ``apply(system, y) -> (system, y)``. Integration stops at each event
        time, the event is applied, and integration restarts with the system it returns.
        A census at the same time records the state before the event. Events at or after
        ``duration`` are ignored; events at time 0 act before the first step.
    noise : optional
        Stochasticity applied at census steps: an object with ``start()`` returning a
        stateful run with ``interval(system, redraw=True) -> system`` (the system to
        integrate over the next census interval, with noisy rates); see
        :class:`trophoscape.noise.NoiseModel`. With noise the solver stops at every census
        and restarts with the step size it had reached. Without it (None) nothing changes.
        With demographic noise the run is event-based instead (whole individuals,
        :func:`trophoscape.noise.simulate_events`); ``method``, ``rtol`` and ``atol`` do not
        apply.
    dtype : numpy dtype
        Storage type of the recorded census states. The state is always integrated in
        float64; ``numpy.float32`` halves the memory of the time series (as written to
        ``timeseries.nc``), which is what :func:`trophoscape.study.run_study` uses. Each
        species' series is one contiguous ``(time, patch)`` block, so it is written to a
        file without another copy.
    sink : callable, optional
        ``sink(start, stop, record)``, called as the run goes each time ``sink_rows`` more
        census rows are recorded (and once for the last rows), with ``record`` the
        ``(species, time, patch)`` array in the user's patch order, rows ``start:stop`` new
        (:class:`trophoscape.outputs.SeriesWriter` writes them to NetCDF). Event-based
        (demographic) runs do not call it.
    sink_rows : int
        Census rows per call of ``sink``.

    Returns
    -------
    Trajectory

    Raises
    ------
    RunError
        When the solver fails; the message gives the time reached and what to try.
    """
    if noise is not None and getattr(noise, "demographic", False):
        # whole individuals and random events: no ODE (trophoscape.noise.simulate_events)
        from .noise import simulate_events

        traj = simulate_events(system, y0, duration=duration, census_interval=census_interval,
                               noise=noise, extinction_abundance=extinction_abundance, ids=ids,
                               time_unit=time_unit, events=events, progress=progress)
        # whole counts: exact in float32 up to 2**24 individuals per patch
        data = traj.data.assign({s: traj.data[s].astype(dtype) for s in SPECIES})
        return Trajectory(data=data, stats=traj.stats)
    method = choose_method(method)
    solver_cls = METHODS[method]
    n = system.n_patches
    times = census_times(float(duration), float(census_interval))
    # (species, time, patch): each species' series contiguous, held once
    record = np.empty((2, times.size, n), dtype=dtype)
    # a finite float64 state can still overflow a narrower storage type
    limit = float(np.finfo(dtype).max) if np.dtype(dtype).itemsize < 8 else None
    y, _ = _census(np.asarray(y0, dtype=float).copy(), extinction_abundance)
    record[:, 0] = y.reshape(2, n)

    noisy = noise is not None
    if noisy:
        run = noise.start()
        base = system  # the system without noise; events change it, noise perturbs it
        system = run.interval(base)
    # a reordered system (CoupledSystem.order) is integrated in its internal patch order with
    # explicit methods: no gather/scatter per RHS call, one per census and event instead.
    # Implicit methods take the Jacobian in the user's order and stay there.
    internal = system.reordered and method not in IMPLICIT
    rhs = system.rhs_function(internal=internal)
    options = dict(rtol=rtol, atol=atol)
    if method in IMPLICIT:
        options["jac"] = system.jacobian_function()

    def user_order(v):
        return system.to_user(v) if internal else v
    totals = dict(nfev=0, njev=0, nlu=0)
    steps = restarts = 0
    # events: the solver runs only up to the next one (its t_bound), so none is stepped over
    pending = sorted((e for e in events if float(e.time) < times[-1]),
                     key=lambda e: float(e.time))
    next_event = 0

    def bound():
        b = float(pending[next_event].time) if next_event < len(pending) else times[-1]
        # with noise the rates change at every census: never step across one
        return min(b, float(times[k])) if noisy and k < times.size else b

    def apply_events(t0, y_start):
        nonlocal system, rhs, next_event, base
        if next_event >= len(pending) or float(pending[next_event].time) > t0:
            return y_start
        y_start = user_order(y_start)  # events index patches in the user's order
        while next_event < len(pending) and float(pending[next_event].time) <= t0:
            if noisy:
                base, y_start = pending[next_event].apply(base, y_start)
            else:
                system, y_start = pending[next_event].apply(system, y_start)
            next_event += 1
        if noisy:  # the same noisy rates on the changed system, up to the next census
            system = run.interval(base, redraw=False)
        rhs = system.rhs_function(internal=internal)
        if method in IMPLICIT:
            options["jac"] = system.jacobian_function()
        y_start = np.asarray(y_start, dtype=float)
        # a rewired system may number its patches differently: back into its own order
        return system.to_internal(y_start) if internal else y_start

    def start(t0, y_start, first_step):
        y_start = apply_events(t0, y_start)
        if first_step is not None:
            first_step = min(first_step, bound() - t0)
        return solver_cls(rhs, t0, y_start, bound(), first_step=first_step, **options)

    def harvest(s):
        for key in totals:
            totals[key] += int(getattr(s, key, 0) or 0)

    def restart(old, t0, y_start, first_step):
        new = start(t0, y_start, first_step)
        _release(old)
        return new

    from tqdm.auto import tqdm

    bar = tqdm(total=times.size - 1, disable=not progress, delay=2.0, unit="census",
               desc="integrating", leave=False)
    k = 1
    sunk = 0  # census rows handed to the sink
    if not noisy:
        base = None
    solver = start(times[0], system.to_internal(y) if internal else y, None)
    status, message = 0, "The solver successfully reached the end of the integration interval."
    try:
        while k < times.size:
            if solver.status == "finished" and solver.t < times[k]:
                if next_event < len(pending) and solver.t >= float(pending[next_event].time):
                    harvest(solver)
                    h = getattr(solver, "h_abs", None) or solver.step_size
                    solver = restart(solver, solver.t, solver.y.copy(), 0.5 * h if h else None)
                    restarts += 1
                    continue
                raise RunError(  # pragma: no cover
                    'the solver stopped before the end of the run; try method = "BDF" or '
                    "looser rtol/atol")
            if noisy:  # the step wanted, before a census cuts it short
                h_wanted = getattr(solver, "h_abs", None)
            with np.errstate(over="ignore", invalid="ignore"):  # reported below instead
                outcome = solver.step()
            steps += 1
            if solver.status == "failed":
                harvest(solver)
                if np.abs(solver.y).max() > 1e12:
                    advice = ("abundances passed 1e12 individuals: check for explosive growth "
                              "(e.g. exponential prey with no predator)")
                else:
                    advice = ('try method = "BDF" or "Radau" for stiff runs, or looser '
                              "rtol/atol")
                raise RunError(f"the ODE solver ({method}) failed at time {solver.t:.6g}: "
                               f"{str(outcome).rstrip('.')}; {advice}")
            if not np.all(np.isfinite(solver.y)):
                harvest(solver)
                raise RunError(
                    f"the state became non-finite at time {solver.t:.6g} ({method}); "
                    "check for explosive growth (e.g. exponential prey with no predator)"
                )
            dense = None
            while k < times.size and times[k] <= solver.t:
                if times[k] == solver.t:
                    y_k = solver.y.copy()
                else:
                    dense = dense or solver.dense_output()
                    y_k = dense(times[k])
                y_k, changed = _census(y_k, extinction_abundance)
                if limit is not None and np.abs(y_k).max(initial=0.0) > limit:
                    harvest(solver)
                    raise RunError(
                        f"abundances passed {limit:.3g} individuals at time {times[k]:.6g}, "
                        f"more than the time series can store ({np.dtype(dtype).name}); check "
                        "for explosive growth (e.g. exponential prey with no predator)")
                record[:, k] = user_order(y_k).reshape(2, n)
                k += 1
                bar.update(1)
                if sink is not None and k - sunk == sink_rows:
                    sink(sunk, k, record)
                    sunk = k
                if noisy and k < times.size:
                    harvest(solver)
                    system = run.interval(base)
                    rhs = system.rhs_function(internal=internal)
                    if method in IMPLICIT:
                        options["jac"] = system.jacobian_function()
                    h = getattr(solver, "h_abs", None) or solver.step_size
                    # the last step was cut to end at the census: keep the one wanted
                    h = max(h or 0.0, h_wanted or 0.0) or None
                    first = (0.5 * h if changed else h) if h else None
                    solver = restart(solver, times[k - 1], y_k, first)
                    restarts += 1
                    break
                if changed and k < times.size:
                    harvest(solver)
                    # half the step reached: the full one was rejected at nearly every
                    # restart once the census had zeroed components (benchmarks/README.md)
                    h = getattr(solver, "h_abs", None) or solver.step_size
                    solver = restart(solver, times[k - 1], y_k, 0.5 * h)
                    restarts += 1
                    break
        harvest(solver)
        if sink is not None and sunk < k:  # the last rows, fewer than sink_rows
            sink(sunk, k, record)
    finally:
        bar.close()

    stats = SolverStats(method=method, steps=steps, restarts=restarts, status=status,
                        message=message, **totals)
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
