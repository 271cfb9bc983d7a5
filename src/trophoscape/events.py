"""Demographic noise: event-based runs in whole individuals.

With ``demographic = True`` a run is no longer an ODE: abundances are whole individuals
and change by random events (:func:`simulate_events`, which
:func:`trophoscape.simulate.simulate` calls in this mode). Event channels, per patch
unless said otherwise (propensities in individuals per time, from densities
``n = N/A``, ``p = P/A`` and scaled back by the area ``A``):

* prey birth (+1 prey) and prey death (-1 prey): the growth form split as
  ``g(n) = births - deaths`` (a modelling choice): exponential ``r n`` and 0; logistic
  ``r n`` and ``r n²/K``; strong Allee ``r n (n/T + n/K)`` and ``r n (1 + n²/(T K))``.
  The mean-field forms are used (``N²``, not ``N (N - 1)``), so the expected change at
  every state is exactly the ODE's right-hand side;
* prey eaten ``f(n, p) p`` (-1 prey) and predator birth ``e f(n, p) p`` (+1 predator),
  two independent channels (conversion as a predator birth, not tied to one prey);
* predator death ``m p`` (-1 predator); prey harvest ``q n`` (-1 prey) when a harvest
  shock set ``prey_harvest``;
* for each species, one channel per arc of its movement operator (-1 at the source,
  +1 at the target, propensity ``M_ij N_j``, which already carries the survival ``σ``)
  and one death-in-transit channel per patch (-1, propensity ``(ε_j - Σ_i M_ij) N_j``),
  so the expected flows are exactly ``M x``.

Time stepping is tau-leaping (Gillespie 2001, J. Chem. Phys. 115:1716): over a leap
``τ`` every channel ``j`` fires ``K_j ~ Poisson(a_j τ)`` times. ``τ`` follows Cao,
Gillespie & Petzold (2006, J. Chem. Phys. 124:044109): over the species ``i`` that
non-critical channels change (a superset of the paper's reactant species, so that a
population at 0 fed only by arrivals also bounds the leap), ``τ = min_i min(max(ε x_i / g_i, 1) / |μ_i|,
max(ε x_i / g_i, 1)² / σ²_i)`` with ``μ_i = Σ_j ν_ij a_j`` and ``σ²_i = Σ_j ν_ij² a_j``
over non-critical channels, ``ε = 0.03`` and ``g_i`` the highest order of a channel
consuming species ``i`` (prey: ``2 + 1/(x-1)`` for logistic and exponential growth,
``3 + 1/(x-1) + 2/(x-2)`` for the Allee form's cubic deaths; predator: 2). Critical
channels (Cao, Gillespie & Petzold 2005, J. Chem. Phys. 123:054104, from memory) are
those that would remove an individual from a population of fewer than 10: they do not
leap; the time to the next critical event is drawn exactly (exponential with their total
propensity) and at most one of them fires per leap. When the leap would be shorter than
``10 / a0`` (``a0`` the total propensity) the run takes up to 100 exact steps of the
direct method instead (Gillespie 1977, J. Phys. Chem. 81:2340). A leap that would make a
count negative is rejected and retried with half the step (the 2005 paper's rule). The
leap is cut at every census, noise step and shock time; by the memorylessness of the exponential
law this leaves the critical events exact.

The initial state and a state after a shock that scales it are made whole by stochastic
rounding (``floor(y) + Bernoulli(y - floor(y))``, mean-preserving). Census times stay:
the state is recorded there; environmental noise changes the rates at its own steps. The
quasi-extinction rule ``extinction_abundance`` is kept as in ODE runs: at each census,
local populations below it are set to 0; with the default of 1 individual it never acts,
since counts are whole and a population below 1 is already 0. Stacked replicates run one
by one in this mode (each with its own random streams), since one shared leap size
would couple them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from .dynamics import LocalModel

__all__ = ["local_propensities"]


# ------------------------------------------------------------------------- demographic
def _growth_split(growth: str, n, q):
    """Prey births and deaths (per km², per time) whose difference is the growth form."""
    r = q["growth_rate"]
    if growth == "exponential":
        return r * n, np.zeros_like(n)
    if growth == "logistic":
        return r * n, r * n * n / q["capacity"]
    if growth == "allee":
        k, t = q["capacity"], q["allee_density"]
        return r * n * (n / t + n / k), r * n * (1.0 + n * n / (t * k))
    raise ValueError(f"no birth/death split for growth form {growth!r}")  # pragma: no cover


def local_propensities(model: LocalModel, n, p) -> dict:
    """Per-patch event rates in density per time, each shaped like ``n``.

    Keys: ``prey_birth``, ``prey_death``, ``prey_eaten``, ``prey_harvest``,
    ``predator_birth``, ``predator_death``.
    """
    q = model.params
    births, deaths = _growth_split(model.growth, n, q)
    eaten = model.functional_response.value(n, p, q) * p
    # environmental noise adds to per-capita rates (trophoscape.noise), so a removal rate
    # can turn negative: its negative part is then a birth rate, and the expected change
    # is still the ODE's right-hand side
    harvest = q["prey_harvest"] * n if "prey_harvest" in q else np.zeros_like(n)
    death = q["mortality"] * p
    return {
        "prey_birth": births + np.maximum(-harvest, 0.0),
        "prey_death": deaths,
        "prey_eaten": eaten,
        "prey_harvest": np.maximum(harvest, 0.0),
        "predator_birth": q["conversion"] * eaten + np.maximum(-death, 0.0),
        "predator_death": np.maximum(death, 0.0),
    }


#: sign of each local channel's change: (species offset 0 = prey, 1 = predator, sign)
_LOCAL_CHANNELS = {"prey_birth": (0, 1.0), "prey_death": (0, -1.0), "prey_eaten": (0, -1.0),
                   "prey_harvest": (0, -1.0), "predator_birth": (1, 1.0),
                   "predator_death": (1, -1.0)}


@dataclass(frozen=True, eq=False)
class _Arcs:
    """Dispersal channels of one replicate's movement operator: arrivals and losses in transit."""

    source: np.ndarray   # (n_arcs,)
    target: np.ndarray   # (n_arcs,)
    rate: np.ndarray     # per individual at the source, (n_arcs,)
    lost: np.ndarray     # per-capita death in transit at each patch, (n,)

    @classmethod
    def from_operator(cls, m) -> "_Arcs":
        m = sp.coo_array(m)
        off = m.row != m.col
        n = m.shape[0]
        emigration = -m.diagonal()
        arrivals = np.bincount(m.col[off], weights=m.data[off], minlength=n)
        return cls(source=m.col[off].astype(np.int64), target=m.row[off].astype(np.int64),
                   rate=m.data[off].astype(float),
                   lost=np.maximum(emigration - arrivals, 0.0))


# ------------------------------------------------------------------ event-based runs
#: Tolerance ε of the leap size (Cao, Gillespie & Petzold 2006 recommend about 0.03).
LEAP_EPSILON = 0.03
#: Channels that would take an individual from a population below this are critical.
CRITICAL_COUNT = 10
#: Exact steps instead of a leap shorter than this many mean waiting times 1/a0 ...
EXACT_FACTOR = 10.0
#: ... and how many exact steps in a row before a leap is tried again.
EXACT_BURST = 100

_LOCAL_ORDER = ("prey_birth", "prey_death", "prey_eaten", "prey_harvest", "predator_birth",
                "predator_death")


@dataclass
class EventStats:
    """What an event-based run did: leaps, exact steps, rejected leaps, propensity calls."""

    leaps: int = 0
    exact_steps: int = 0
    rejected: int = 0
    evaluations: int = 0


@dataclass(frozen=True, eq=False)
class Channels:
    """A reaction network for :func:`advance_events`.

    Parameters
    ----------
    rates : callable
        ``rates(x) -> a``: the propensities of the ``K`` channels, ndarray shape (K,), >= 0,
        from the counts ``x``, int64 shape (S,).
    change : sparse array of int, shape (S, K)
        Change ``ν_ij`` (-1, 0 or +1) of species ``i`` when channel ``j`` fires.
    consumer : ndarray of int, shape (K,)
        The one species each channel removes an individual from, -1 if none (every channel
        here consumes at most one individual of one species).
    order : ndarray shape (S,) or callable ``order(x) -> (S,)``
        ``g_i`` of the leap-size rule: the highest order of a channel consuming species ``i``.
    """

    rates: object
    change: object
    consumer: np.ndarray
    order: object
    columns: object = field(init=False, repr=False)
    magnitude: object = field(init=False, repr=False)

    def __post_init__(self):
        change = sp.csr_array(self.change)
        object.__setattr__(self, "change", change)
        object.__setattr__(self, "columns", sp.csc_array(change))  # one channel's change
        object.__setattr__(self, "magnitude", abs(change))         # ν², as |ν| <= 1
        object.__setattr__(self, "consumer", np.asarray(self.consumer, dtype=np.int64))

    def with_rates(self, rates) -> "Channels":
        """The same channels with other propensities (e.g. noisy rates)."""
        new = object.__new__(Channels)
        for name in ("change", "consumer", "order", "columns", "magnitude"):
            object.__setattr__(new, name, getattr(self, name))
        object.__setattr__(new, "rates", rates)
        return new


def advance_events(x, t, t_end, channels: Channels, rng, *, stats=None,
                   epsilon: float = LEAP_EPSILON, critical_count: int = CRITICAL_COUNT,
                   exact_factor: float = EXACT_FACTOR, exact_burst: int = EXACT_BURST):
    """Run a reaction network from ``t`` to exactly ``t_end``: tau-leaps and exact steps.

    Parameters
    ----------
    x : ndarray of int64, shape (S,)
        Counts of the ``S`` species at ``t`` (not changed; a new array is returned).
    t, t_end : float
    channels : Channels
    rng : numpy.random.Generator
    stats : EventStats, optional
        Counters, updated in place.
    epsilon, critical_count, exact_factor, exact_burst
        See the module notes.

    Returns
    -------
    ndarray of int64, shape (S,)
        Counts at ``t_end``.
    """
    stats = EventStats() if stats is None else stats
    rates, change, columns = channels.rates, channels.change, channels.columns
    magnitude, consumer, order = channels.magnitude, channels.consumer, channels.order
    x = np.array(x, dtype=np.int64)
    consumes = consumer >= 0
    held_index = np.where(consumes, consumer, 0)
    never = np.iinfo(np.int64).max
    while t < t_end:
        a = rates(x)
        stats.evaluations += 1
        a0 = float(a.sum())
        if not a0 > 0:
            break  # nothing can happen any more
        held = np.where(consumes, x[held_index], never)
        critical = (held < critical_count) & (a > 0)
        calm = np.where(critical, 0.0, a)
        tau1 = np.inf
        if calm.any():
            mu = change @ calm
            var = magnitude @ calm
            # every species a non-critical channel changes, not only their reactants (the
            # 2006 paper's set): a species at 0 fed by immigration alone must bound the leap
            reactant = var > 0
            g = order(x) if callable(order) else order
            bound = np.maximum(epsilon * x / g, 1.0)
            with np.errstate(divide="ignore"):
                tau_i = np.minimum(bound / np.abs(mu), bound * bound / var)
            if reactant.any():
                tau1 = float(tau_i[reactant].min())
        if tau1 < exact_factor / a0:
            # exact steps of the direct method (Gillespie 1977)
            for _ in range(exact_burst):
                wait = rng.exponential(1.0 / a0)
                if t + wait >= t_end:
                    t = t_end  # no event before t_end; the waiting time is memoryless
                    break
                t += wait
                j = int(np.searchsorted(np.cumsum(a), rng.random() * a0, side="right"))
                j = min(j, a.size - 1)
                lo, hi = columns.indptr[j], columns.indptr[j + 1]
                x[columns.indices[lo:hi]] += columns.data[lo:hi]
                stats.exact_steps += 1
                a = rates(x)
                stats.evaluations += 1
                a0 = float(a.sum())
                if not a0 > 0:
                    break
            continue
        a_critical = float(a[critical].sum())
        while True:
            tau2 = rng.exponential(1.0 / a_critical) if a_critical > 0 else np.inf
            tau = min(tau1, tau2, t_end - t)
            fires = tau2 <= tau1 and tau2 < t_end - t
            k = rng.poisson(calm * tau)
            if fires:  # exactly one critical event, chosen by its propensity
                pick = np.flatnonzero(critical)
                w = np.cumsum(a[pick])
                j = pick[min(int(np.searchsorted(w, rng.random() * w[-1], side="right")),
                             pick.size - 1)]
                k[j] += 1
            new = x + change @ k
            if np.all(new >= 0):
                break
            tau1 *= 0.5  # a leap that overdraws a population: halve and draw again
            stats.rejected += 1
        x = new
        t += tau
        stats.leaps += 1
    return x


def _species_order(growth: str, n_patches: int):
    """``order(x) -> g``, shape (2 n,), of the Cao–Gillespie–Petzold (2006) rule."""
    pred = np.full(n_patches, 2.0)

    def order(x):
        xp = np.maximum(x[:n_patches].astype(float), 3.0)
        if growth == "allee":
            prey = 3.0 + 1.0 / (xp - 1.0) + 2.0 / (xp - 2.0)
        else:
            prey = 2.0 + 1.0 / (xp - 1.0)
        return np.concatenate([prey, pred])

    return order


def _model_rates(model, area, prey, pred):
    n = area.size

    def rates(x):
        xf = x.astype(float)
        big_n, big_p = xf[:n], xf[n:]
        local = local_propensities(model, big_n / area, big_p / area)
        a = np.concatenate([local[key] * area for key in _LOCAL_ORDER]
                           + [prey.rate * big_n[prey.source], prey.lost * big_n,
                              pred.rate * big_p[pred.source], pred.lost * big_p])
        return np.maximum(a, 0.0)

    return rates


def event_channels(system, like=None) -> Channels:
    """The channels of a coupled system for :func:`advance_events`.

    Parameters
    ----------
    system : CoupledSystem
        One copy of the network (``n`` patches).
    like : Channels, optional
        Channels of a system with the same movement operators, areas and growth form
        (e.g. before the environmental rates were redrawn): only the propensities are
        rebuilt.

    Returns
    -------
    Channels
        ``S = 2 n`` species in the state layout of :mod:`trophoscape.system`; ``K = 8 n +
        arcs(prey) + arcs(predator)`` channels: six local blocks of ``n`` (in the order of
        ``_LOCAL_ORDER``), then prey arcs, prey losses in transit, predator arcs and losses.
    """
    n = system.n_patches
    area = system.area_km2
    model = system.model
    if like is not None:
        prey, pred = like._arcs
        return _tag(like.with_rates(_model_rates(model, area, prey, pred)), system, prey, pred)
    prey = _Arcs.from_operator(system.prey_movement)
    pred = _Arcs.from_operator(system.predator_movement)
    i = np.arange(n)
    none = np.full(n, -1)
    # (species index of the +1, species index of the -1) of each block of channels
    plus, minus = [], []
    for key in _LOCAL_ORDER:
        species, sign = _LOCAL_CHANNELS[key]
        plus.append(i + species * n if sign > 0 else none)
        minus.append(i + species * n if sign < 0 else none)
    for off, arcs in ((0, prey), (n, pred)):
        plus += [arcs.target + off, none]
        minus += [arcs.source + off, i + off]
    plus, minus = np.concatenate(plus), np.concatenate(minus)
    k = plus.size
    cols = np.arange(k)
    rows = np.concatenate([plus[plus >= 0], minus[minus >= 0]])
    vals = np.concatenate([np.ones(np.count_nonzero(plus >= 0), np.int64),
                           -np.ones(np.count_nonzero(minus >= 0), np.int64)])
    change = sp.csr_array((vals, (rows, np.concatenate([cols[plus >= 0], cols[minus >= 0]]))),
                          shape=(2 * n, k))

    channels = Channels(rates=_model_rates(model, area, prey, pred), change=change,
                        consumer=minus, order=_species_order(model.growth, n))
    return _tag(channels, system, prey, pred)


def _tag(channels, system, prey, pred):
    # what the structure was built from, so that a system with new rates can reuse it
    object.__setattr__(channels, "_arcs", (prey, pred))
    object.__setattr__(channels, "_built_from", (system.prey_movement, system.predator_movement,
                                                 system.area_km2, system.model.growth))
    return channels


def _same_structure(channels, system) -> bool:
    a, b, area, growth = channels._built_from
    return (a is system.prey_movement and b is system.predator_movement
            and area is system.area_km2 and growth == system.model.growth)


def whole(y, rng) -> np.ndarray:
    """Stochastic rounding ``floor(y) + Bernoulli(y - floor(y))`` (mean-preserving), int64."""
    y = np.maximum(np.asarray(y, dtype=float), 0.0)
    low = np.floor(y)
    return (low + (rng.random(y.shape) < (y - low))).astype(np.int64)


def _replicate_system(system, r: int, n: int):
    """Copy ``r`` of a stacked system (:func:`stack_system`)."""
    from .system import CoupledSystem

    sl = slice(r * n, (r + 1) * n)
    model = system.model
    params = {k: (np.asarray(v)[sl] if np.ndim(v) else v) for k, v in model.params.items()}
    return CoupledSystem(
        model=LocalModel(growth=model.growth, response=model.response, params=params),
        area_km2=system.area_km2[sl], prey_movement=sp.csr_array(system.prey_movement[sl, sl]),
        predator_movement=sp.csr_array(system.predator_movement[sl, sl]), order="none",
        kernel=system.kernel)


def simulate_events(system, y0, *, duration: float, census_interval: float, noise,
                    extinction_abundance: float = 1.0, ids=None, time_unit: str = "year",
                    events=(), progress: bool = False):
    """An event-based run (demographic noise): whole individuals, tau-leaps and exact steps.

    Parameters are those of :func:`trophoscape.simulate.simulate` (solver settings do not
    apply). ``noise`` is a :class:`NoiseModel` with ``demographic=True``; its environmental
    settings, if any, redraw the rates at every noise step as in ODE runs. A system stacked for
    ``R > 1`` replicates (:func:`stack_system`) is run copy by copy, replicate ``r`` with its
    own seed, and the results are laid out as the stacked run's would be.

    Returns
    -------
    Trajectory
        Abundances in individuals (whole numbers stored as float64); ``stats.steps`` counts
        leaps plus exact steps, ``stats.nfev`` propensity evaluations, ``stats.restarts``
        rejected leaps.
    """
    import xarray as xr

    from .errors import RunError
    from .simulate import SolverStats, Trajectory, census_times, _census
    from .system import SPECIES

    reps = noise.n_replicates
    total = system.n_patches
    times = census_times(float(duration), float(census_interval))
    y0 = np.asarray(y0, dtype=float)
    if reps > 1:
        n = total // reps
        if n * reps != total:
            raise ValueError(f"a stacked system of {total} patches is not {reps} copies")
        if len(events):
            raise ValueError("event-based replicates with shocks run one by one: pass one "
                             "copy of the system per replicate")
        parts = [simulate_events(_replicate_system(system, r, n),
                                 np.concatenate([y0[r * n:(r + 1) * n],
                                                 y0[total + r * n:total + (r + 1) * n]]),
                                 duration=duration, census_interval=census_interval,
                                 noise=noise.for_replicates(r),
                                 extinction_abundance=extinction_abundance,
                                 time_unit=time_unit)
                 for r in range(reps)]
        record = np.concatenate([np.concatenate([p.data[s].values for p in parts], axis=1)
                                 for s in SPECIES], axis=1)
        counts = {k: sum(getattr(p.stats, k) for p in parts)
                  for k in ("nfev", "steps", "restarts")}
    else:
        n = total
        run = noise.start()
        rng = run.demographic_rngs[0]
        stats = EventStats()
        base = system
        record = np.empty((times.size, 2 * n))
        x = whole(y0, rng)
        x = _census(x.astype(float), extinction_abundance)[0].astype(np.int64)
        record[0] = x
        pending = sorted((e for e in events if float(e.time) < times[-1]),
                         key=lambda e: float(e.time))
        next_event = 0
        current = run.interval(base)
        channels = event_channels(current)
        environmental = getattr(noise, "environmental", False)
        noise_step = float(noise.step) if environmental else np.inf
        next_noise = 1  # the next noise step starts at next_noise * noise_step
        t, k = float(times[0]), 1
        while k < times.size:
            if environmental and t >= next_noise * noise_step:
                while next_noise * noise_step <= t:
                    next_noise += 1
                new = run.interval(base)  # redrawn rates: new propensities, same channels
                if new is not current:
                    current = new
                    channels = event_channels(
                        current, like=channels if _same_structure(channels, current) else None)
            if next_event < len(pending) and float(pending[next_event].time) <= t:
                while next_event < len(pending) and float(pending[next_event].time) <= t:
                    base, y = pending[next_event].apply(base, x.astype(float))
                    y = np.asarray(y, dtype=float)
                    # a shock that keeps the counts whole leaves them unchanged
                    x = y.astype(np.int64) if np.all(y == np.round(y)) else whole(y, rng)
                    next_event += 1
                current = run.interval(base, redraw=False)
                channels = event_channels(current)  # a shock may rewire: build anew
            stop = min(float(times[k]), next_noise * noise_step)
            if next_event < len(pending):
                stop = min(stop, float(pending[next_event].time))
            x = advance_events(x, t, stop, channels, rng, stats=stats)
            if x.max(initial=0) > 1e12:
                raise RunError(f"abundances passed 1e12 individuals by time {stop:.6g}: check "
                               "for explosive growth (e.g. exponential prey with no predator)")
            t = stop
            if t >= times[k]:
                x = _census(x.astype(float), extinction_abundance)[0].astype(np.int64)
                record[k] = x
                k += 1
        counts = dict(nfev=stats.evaluations, steps=stats.leaps + stats.exact_steps,
                      restarts=stats.rejected)
    stats_out = SolverStats(method="tau-leap", njev=0, nlu=0, status=0,
                            message="event-based run (tau-leaping with exact steps) completed.",
                            **counts)
    ids = np.asarray([str(i) for i in range(total)] if ids is None else ids, dtype=object)
    data = xr.Dataset(
        {name: (("time", "patch"), record[:, s * total:(s + 1) * total],
                {"units": "individuals", "long_name": f"{name} abundance"})
         for s, name in enumerate(SPECIES)},
        coords={"time": ("time", times, {"units": time_unit, "long_name": "time"}),
                "patch": ("patch", ids, {"long_name": "patch id"})},
    )
    return Trajectory(data=data, stats=stats_out)


__all__ += ["Channels", "EventStats", "advance_events", "event_channels", "simulate_events", "whole",
            "LEAP_EPSILON", "CRITICAL_COUNT", "EXACT_FACTOR", "EXACT_BURST"]
