"""Demographic noise: event-based runs in whole individuals.

With ``demographic = True`` a run is no longer an ODE: abundances are whole individuals
and change by random events (:func:`simulate_events`, which
:func:`trophoscape.integrate.ode.simulate` calls in this mode). Event channels, per patch
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
``τ`` every non-critical channel ``j`` fires ``K_j ~ Poisson(a_j τ)`` times, with its
propensity taken at the leap's estimated midpoint ``x + (τ/2) Σ_j ν_j a_j(x)`` (the same
paper's estimated-midpoint leap; not rounded to whole numbers, since the propensities are
defined at real states). The midpoint makes the mean of a leap right to second order in
``τ``: a first-order leap biases a linear birth–death process's mean by about
``-(b - d)² τ t / 2`` (relative). Measured at ``x0 = 5,000``, ``b = 0.5``, ``d = 0.8``,
``t = 2`` and the default tolerances, over 8 runs of 4,000 replicates: -0.08 % (-1.9 ± 0.3
standard errors of a run) first order, +0.005 % (+0.1 ± 0.3) with midpoints. A leap cut to
less than ``MIDPOINT_MIN_FRACTION`` of its allowed size skips the midpoint. Counts with
means below ``SPLIT_MEAN`` are drawn together by splitting one Poisson total, which gives
the same law (:func:`_poisson`).

The leap size, over the species ``i`` that non-critical channels change (a superset of the
2006 paper's reactant species, so that a population at 0 fed only by arrivals also bounds
the leap), with ``μ_i = Σ_j ν_ij a_j`` and ``σ²_i = Σ_j ν_ij² a_j`` over non-critical
channels and ``c_i = max(ε x_i / g_i, 1)``::

    τ = min_i min(c_i / |μ_i|,  c_i² / σ²_i,  max(ε_r x_i / g_i, 1) / σ²_i)

The first two terms are the leap condition of Cao, Gillespie & Petzold (2006, J. Chem.
Phys. 124:044109): the mean and the sd of the change of ``x_i`` over a leap at most
``ε x_i / g_i``, which keeps the relative change of every propensity below about ``ε =
0.03``. Near equilibrium they do not bound the leap: ``μ_i ≈ 0``, and the second term
grows like ``x_i``, so leaps outgrow the time fluctuations take to relax. A Poisson leap
map linearised about a stable equilibrium, ``δx' = (1 - λτ) δx + noise`` of variance
``σ² τ``, has the stationary variance ``σ²/(2λ)`` times ``1 / (1 - λτ/2)`` (with midpoint
leaps ``1 - λτ + λ²τ²/2`` instead of ``1 - λτ``, about ``1 + λτ``): logistic prey at ``K =
10,000`` had variance/K 1.32 and 1.76 at census 0.5 and 2 with the 2006 terms alone
(1.009 and 0.997, ± 0.011, with the bound below). The third term, the relaxation bound,
keeps ``τ g_i σ²_i / x_i <= ε_r = 0.02``. Its basis:
every propensity here has ``Σ_k x_k |∂a_j/∂x_k| <= g_i a_j`` for each species ``i`` its
channel changes (a total order at most ``g_i``; saturating responses only lower it) and
``|ν_ij| <= 1``, so the absolute row sums of ``D⁻¹ J D`` (``J`` the Jacobian of the drift,
``D = diag(x)``) are at most ``g_i σ²_i / x_i``, and by Gershgorin's theorem every
eigenvalue of ``τ J`` lies within ``ε_r`` of 0: the variance is inflated by at most about
``1 + ε_r`` (2 %). Measured on immigration–death (where ``λτ ≈ ε_r/2``; 10,000 copies,
± 0.007): variance/mean 1.072, 1.041, 1.026 and 1.006 at ``ε_r`` = 0.16, 0.08, 0.04 and
0.02, against 1.080, 1.039, 1.020 and 1.010 from the linear map. Below ``g_i / ε_r``
individuals (100 for ``g_i = 2``) the bound is one expected event per leap, the 2006
paper's floor. Near equilibrium it allows about ``g_i σ²_i / (ε_r x_i)`` leaps per time
unit whatever the population size (200 for logistic prey with ``r = 1``).

``g_i`` follows the 2006 paper's rule: the order of the highest-order channel that reads
species ``i``, raised where that channel needs several individuals of ``i``. Prey: ``2 +
1/(x-1)`` with logistic growth (deaths ``∝ N²``), 2 with exponential growth (predation
``∝ N P``), ``3 + 1/(x-1) + 2/(x-2)`` with the strong Allee form (deaths ``∝ N³``); with
Holling type III predation (``∝ N² P``, third order with two prey) at least ``(3/2)(2 +
1/(x-1))``. Predators: 2, or 3 with Holling type III.

Critical channels (Cao, Gillespie & Petzold 2005, J. Chem. Phys. 123:054104, from memory)
are those that would remove an individual from a population of fewer than 10: they do not
leap; the time to the next critical event is drawn exactly (exponential with their total
propensity) and at most one of them fires per leap. When the leap would be shorter than
``10 / a0`` (``a0`` the total propensity) the run takes up to 100 exact steps of the
direct method instead (Gillespie 1977, J. Phys. Chem. 81:2340). On networks of at least
``PARTIAL_MIN_CHANNELS`` channels an exact step recomputes only the propensities of the
channels that read a species the event changed (lists built once from the change matrix
and what each propensity reads), corrects the running total by the differences and finds
the next channel in two short cumulative sums (blocks of about ``√K`` channels); every
burst starts from a full recomputation, so rounding in the running sums cannot accumulate.
On smaller ones all propensities are recomputed after each event, which is as fast there.
A leap that would make a count negative is rejected and retried with half the step (the
2005 paper's rule). The leap is cut at every census, noise step and shock time; by the
memorylessness of the exponential law this leaves the critical events exact.

The initial state and a state after a shock that scales it are made whole by stochastic
rounding (``floor(y) + Bernoulli(y - floor(y))``, mean-preserving). Census times stay:
the state is recorded there; environmental noise changes the rates at its own steps. The
quasi-extinction rule ``extinction_abundance`` is the ODE runs' rule: a population that a
leap, an exact step or a shock takes from at least that many individuals to fewer (but not
0) is removed at once, never at a census; one below it that is not falling through it
(initial counts, immigrants) is kept. With the default of 1 individual it never acts, since
counts are whole and a population below 1 is already 0. Stacked replicates run one
by one in this mode (each with its own random streams), since one shared leap size
would couple them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from ..model.dynamics import LocalModel

__all__ = ["Channels", "EventStats", "advance_events", "event_channels", "leap_size",
           "simulate_events", "whole"]


# ------------------------------------------------------------------------- demographic
def _local_rates(model: LocalModel, q, n, p) -> tuple:
    """The six local propensities (density per time) in the order of ``_LOCAL_ORDER``, from
    parameters ``q`` shaped like ``n`` (or scalars)."""
    births, deaths = model.growth_form.split(n, q)
    eaten = model.functional_response.value(n, p, q) * p
    # environmental noise adds to per-capita rates (trophoscape.integrate.noise), so a removal rate
    # can turn negative: its negative part is then a birth rate, and the expected change
    # is still the ODE's right-hand side
    harvest = q["prey_harvest"] * n if "prey_harvest" in q else np.zeros_like(n)
    death = q["mortality"] * p
    return (births + np.maximum(-harvest, 0.0), deaths, eaten, np.maximum(harvest, 0.0),
            q["conversion"] * eaten + np.maximum(-death, 0.0), np.maximum(death, 0.0))


#: sign of each local channel's change: (species offset 0 = prey, 1 = predator, sign)
_LOCAL_CHANNELS = {"prey_birth": (0, 1.0), "prey_death": (0, -1.0), "prey_eaten": (0, -1.0),
                   "prey_harvest": (0, -1.0), "predator_birth": (1, 1.0),
                   "predator_death": (1, -1.0)}
#: the species of its own patch each local propensity reads: (prey, predator)
_LOCAL_READS = {"prey_birth": (True, False), "prey_death": (True, False),
                "prey_eaten": (True, True), "prey_harvest": (True, False),
                "predator_birth": (True, True), "predator_death": (False, True)}


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
#: Tolerance ε of the leap condition on each species' expected change and its variance
#: (Cao, Gillespie & Petzold 2006 recommend about 0.03).
LEAP_EPSILON = 0.03
#: Tolerance ε_r of the relaxation bound ``τ g_i σ²_i <= ε_r x_i`` (module notes): it bounds
#: the spectral radius of ``τ J`` (J the Jacobian of the drift) by ε_r, so the stationary
#: variance of a population near equilibrium is inflated by at most about
#: ``1 / (1 - ε_r)`` with midpoint leaps (``1 / (1 - ε_r / 2)`` without).
LEAP_RELAXATION = 0.02
#: Leaps from propensities at the estimated midpoint of the leap (Gillespie 2001): the mean
#: of a leap is then right to second order in τ.
LEAP_MIDPOINT = True
#: A leap cut to less than this fraction of the size the bounds allow (by a critical event,
#: a census or a noise step) skips the midpoint: its first-order error per time unit is at
#: most this fraction of a full first-order leap's (about -0.07 % / 8 on the mean of the
#: linear birth-death example of the module notes), and it saves a propensity evaluation.
MIDPOINT_MIN_FRACTION = 0.125
#: Channels that would take an individual from a population below this are critical.
CRITICAL_COUNT = 10
#: Exact steps instead of a leap shorter than this many mean waiting times 1/a0 ...
EXACT_FACTOR = 10.0
#: ... and how many exact steps in a row before a leap is tried again (the propensities are
#: recomputed in full at the start of each burst: no drift of the running total carries over).
EXACT_BURST = 100
#: Exact steps recompute only the propensities an event changes from this many channels up;
#: below it, recomputing them all is as fast (measured: 25 against 38 µs a step at 110
#: channels, 108 against 46 µs at 14,000).
PARTIAL_MIN_CHANNELS = 2048
#: Poisson means below this are drawn together, by splitting one Poisson total
#: (:func:`_poisson`).
SPLIT_MEAN = 0.25
#: Block length of the search in :func:`_poisson`.
SPLIT_BLOCK = 256

_LOCAL_ORDER = ("prey_birth", "prey_death", "prey_eaten", "prey_harvest", "predator_birth",
                "predator_death")


@dataclass
class EventStats:
    """What an event-based run did.

    ``leaps``, ``exact_steps``, ``rejected`` (leaps drawn again with half the step),
    ``evaluations`` (propensities of all channels computed: at a leap or burst start and at
    a leap's midpoint) and ``updates`` (propensities of only the channels an exact step
    changed). With a quasi-extinction threshold, ``removed_counts`` and
    ``removed_individuals`` (per species, shape (S,)) count the populations removed and the
    individuals they held.
    """

    leaps: int = 0
    exact_steps: int = 0
    rejected: int = 0
    evaluations: int = 0
    updates: int = 0
    removed_counts: object = None
    removed_individuals: object = None

    def remove(self, x, fell) -> None:
        """Set the populations ``fell`` (indices, no repeats) of ``x`` to 0 and count them."""
        if self.removed_counts is None:
            self.removed_counts = np.zeros(x.size, dtype=np.int64)
            self.removed_individuals = np.zeros(x.size)
        self.removed_counts[fell] += 1
        self.removed_individuals[fell] += x[fell]
        x[fell] = 0


@dataclass(frozen=True, eq=False)
class Channels:
    """A reaction network for :func:`advance_events`.

    Parameters
    ----------
    rates : callable
        ``rates(x) -> a``: the propensities of the ``K`` channels, ndarray shape (K,), >= 0,
        from the state ``x``, shape (S,) (int64 counts, or float64 at a leap's estimated
        midpoint). With ``depends`` it is also called as ``rates(x, which)``, ``which`` an
        int64 array of channel indices, and returns ``a[which]``.
    change : sparse array of int, shape (S, K)
        Change ``ν_ij`` (-1, 0 or +1) of species ``i`` when channel ``j`` fires.
    consumer : ndarray of int, shape (K,)
        The one species each channel removes an individual from, -1 if none (every channel
        here consumes at most one individual of one species).
    order : ndarray shape (S,) or callable ``order(x) -> (S,)``
        ``g_i`` of the leap-size rule (module notes).
    depends : sparse array, shape (S, K), optional
        Nonzero where channel ``j``'s propensity reads species ``i``. With it an exact step
        recomputes only the propensities of the channels that read a species the fired
        channel changed (lists built here, once); without it, all of them.
    """

    rates: object
    change: object
    consumer: np.ndarray
    order: object
    depends: object = None
    columns: object = field(init=False, repr=False)
    magnitude: object = field(init=False, repr=False)
    affected: object = field(init=False, repr=False)

    def __post_init__(self):
        change = sp.csr_array(self.change)
        object.__setattr__(self, "change", change)
        object.__setattr__(self, "columns", sp.csc_array(change))  # one channel's change
        object.__setattr__(self, "magnitude", abs(change))         # ν², as |ν| <= 1
        object.__setattr__(self, "consumer", np.asarray(self.consumer, dtype=np.int64))
        affected = None
        if self.depends is not None:
            # channel j fires -> the species it changes -> the channels reading them
            reads = sp.csr_array(sp.csr_array(self.depends) != 0, dtype=np.int64)
            hit = sp.csr_array(sp.csr_array(self.magnitude.T, dtype=np.int64) @ reads)
            hit.sort_indices()
            affected = (hit.indptr.astype(np.int64), hit.indices.astype(np.int64))
        object.__setattr__(self, "affected", affected)

    def with_rates(self, rates) -> "Channels":
        """The same channels with other propensities (e.g. noisy rates)."""
        new = object.__new__(Channels)
        for name in ("change", "consumer", "order", "depends", "columns", "magnitude",
                     "affected"):
            object.__setattr__(new, name, getattr(self, name))
        object.__setattr__(new, "rates", rates)
        return new


def leap_size(x, calm, channels: Channels, *, epsilon: float = LEAP_EPSILON,
              relaxation: float | None = LEAP_RELAXATION) -> float:
    """The leap ``τ`` allowed by the non-critical propensities ``calm`` at state ``x``.

    ``min_i`` over the species a non-critical channel changes of the Cao–Gillespie–Petzold
    (2006) bounds and, unless ``relaxation`` is None, the relaxation bound (module notes).
    ``inf`` when no species is changed.
    """
    mu = channels.change @ calm
    var = channels.magnitude @ calm
    # every species a non-critical channel changes, not only their reactants (the 2006
    # paper's set): a species at 0 fed by immigration alone must bound the leap too
    changed = var > 0
    if not changed.any():
        return np.inf
    order = channels.order
    g = order(x) if callable(order) else order
    xf = np.asarray(x, dtype=float)
    cap = np.maximum(epsilon * xf / g, 1.0)
    with np.errstate(divide="ignore"):
        tau = np.minimum(cap / np.abs(mu), cap * cap / var)
        if relaxation is not None and np.isfinite(relaxation):
            tau = np.minimum(tau, np.maximum(relaxation * xf / g, 1.0) / var)
    return float(tau[changed].min())


def _pick(a, cum, u) -> int:
    """The channel of propensities ``a`` (running sums ``cum``) whose share of the total holds
    ``u`` in [0, 1): the first running sum above ``u * total``; on rounding (a running sum a
    few ulp off the total) the last channel with a positive propensity before it."""
    j = min(int(np.searchsorted(cum, u * cum[-1], side="right")), a.size - 1)
    while j > 0 and a[j] <= 0:
        j -= 1
    return j


class _Direct:
    """Exact steps of the direct method (Gillespie 1977) with propensities kept up to date.

    The propensities ``a`` are held in blocks of about ``sqrt(K)`` channels with their block
    sums, so a channel is found in two short cumulative sums, and after an event only the
    channels that read a changed species are recomputed (``Channels.affected``); the block
    sums and the total are corrected by the differences.
    """

    def __init__(self, channels: Channels, a):
        self.channels = channels
        self.a = np.array(a, dtype=float)
        k = self.a.size
        self.width = max(32, int(np.sqrt(k)))
        self.starts = np.arange(0, k, self.width)
        self.resync()

    def resync(self):
        self.block = np.add.reduceat(self.a, self.starts)
        self.total = float(self.block.sum())
        self.floor = 1e-9 * self.total  # below this, a running total may be mostly rounding

    def pick(self, u) -> int:
        """The channel whose cumulative propensity first exceeds ``u * total``."""
        a, block, width = self.a, self.block, self.width
        target = u * self.total
        cum = block.cumsum()
        b = min(int(cum.searchsorted(target, side="right")), block.size - 1)
        lo = b * width
        inner = a[lo:lo + width].cumsum()
        j = int(inner.searchsorted(target - (cum[b - 1] if b else 0.0), side="right"))
        if j < inner.size and a[lo + j] > 0:
            return lo + j
        # rounding at a block's edge (running sums a few ulp off): search all of a
        return _pick(a, np.cumsum(a), u)

    def update(self, x, j, stats):
        """Recompute the propensities channel ``j``'s event changed (``x`` after it)."""
        ch = self.channels
        ptr, idx = ch.affected
        which = idx[ptr[j]:ptr[j + 1]]
        new = ch.rates(x, which)
        stats.updates += 1
        delta = new - self.a[which]
        self.a[which] = new
        np.add.at(self.block, which // self.width, delta)
        self.total += float(delta.sum())
        if not self.total > self.floor:
            self.resync()  # guard against cancellation as the total shrinks


def _poisson(rng, mean):
    """Independent Poisson counts with the given means, int64, shaped like ``mean`` (1-d).

    Channels with means below ``SPLIT_MEAN`` (most dispersal arcs in a short leap) are drawn
    together: their total is ``Poisson(Σ means)`` and each of its events goes to a channel
    with probability proportional to its mean. That gives independent Poisson counts with
    those means (the splitting property of the Poisson distribution; e.g. Kingman 1993,
    *Poisson Processes*, from memory) for the cost of a few passes over the means and a
    search per event, instead of one draw per channel. The search goes through block sums
    of ``SPLIT_BLOCK`` channels, then the cumulative sums of the blocks that were hit.
    """
    few = mean < SPLIT_MEAN
    counts = np.zeros(mean.size, dtype=np.int64)
    many = np.flatnonzero(~few)
    if many.size:
        counts[many] = rng.poisson(mean[many])
    width = SPLIT_BLOCK
    blocks = np.zeros(-(-mean.size // width) * width)
    np.copyto(blocks[:mean.size], mean, where=few)
    blocks = blocks.reshape(-1, width)
    cum = blocks.sum(axis=1).cumsum()
    total = int(rng.poisson(cum[-1])) if cum[-1] > 0 else 0
    if total:
        u = rng.random(total) * cum[-1]
        b = np.minimum(cum.searchsorted(u, side="right"), cum.size - 1)
        hit = np.unique(b)
        # the hit blocks' cumulative sums, offset by all blocks before: one rising sequence
        start = np.where(hit > 0, cum[np.maximum(hit - 1, 0)], 0.0)
        rising = (blocks[hit].cumsum(axis=1) + start[:, None]).ravel()
        at = np.minimum(rising.searchsorted(u, side="right"), rising.size - 1)
        j = hit[at // width] * width + at % width
        bad = ~(j < mean.size) | ~few[np.minimum(j, mean.size - 1)] \
            | (mean[np.minimum(j, mean.size - 1)] <= 0)
        if bad.any():  # rounding at a block's edge: search the small means one by one
            flat = np.where(few, mean, 0.0).cumsum()
            j[bad] = np.minimum(flat.searchsorted(u[bad] / cum[-1] * flat[-1], side="right"),
                                flat.searchsorted(flat[-1], side="left"))
        np.add.at(counts, j, 1)
    return counts


def _fallen(x, idx, data, threshold):
    """Of the species ``idx`` an event changed by ``data``: those it took from at least
    ``threshold`` to below it (and above 0)."""
    now = x[idx]
    return idx[(now < threshold) & (now > 0) & (now - data >= threshold)]


def _exact_burst(x, t, t_end, a, channels, rng, stats, burst, threshold=0.0):
    """Up to ``burst`` exact steps from ``t`` (propensities ``a`` at ``x``); returns (x, t).

    A population an event takes through ``threshold`` from above is removed at once."""
    columns = channels.columns
    if channels.affected is None or a.size < PARTIAL_MIN_CHANNELS:
        # few channels (or no dependency lists): recompute them all after every event
        for _ in range(burst):
            cum = np.cumsum(a)
            if not cum[-1] > 0:
                break
            wait = rng.exponential(1.0 / cum[-1])
            if t + wait >= t_end:
                return x, t_end  # no event before t_end; the waiting time is memoryless
            t += wait
            j = _pick(a, cum, rng.random())
            lo, hi = columns.indptr[j], columns.indptr[j + 1]
            x[columns.indices[lo:hi]] += columns.data[lo:hi]
            if threshold > 0:
                fell = _fallen(x, columns.indices[lo:hi], columns.data[lo:hi], threshold)
                if fell.size:
                    stats.remove(x, fell)
            stats.exact_steps += 1
            a = channels.rates(x)
            stats.evaluations += 1
        return x, t
    d = _Direct(channels, a)
    for _ in range(burst):
        if not d.total > 0:
            break
        wait = rng.exponential(1.0 / d.total)
        if t + wait >= t_end:
            return x, t_end  # no event before t_end; the waiting time is memoryless
        t += wait
        j = d.pick(rng.random())
        lo, hi = columns.indptr[j], columns.indptr[j + 1]
        x[columns.indices[lo:hi]] += columns.data[lo:hi]
        if threshold > 0:  # zeroed before the update, which rereads these species
            fell = _fallen(x, columns.indices[lo:hi], columns.data[lo:hi], threshold)
            if fell.size:
                stats.remove(x, fell)
        stats.exact_steps += 1
        d.update(x, j, stats)
    return x, t


def advance_events(x, t, t_end, channels: Channels, rng, *, stats=None,
                   epsilon: float = LEAP_EPSILON, relaxation: float | None = LEAP_RELAXATION,
                   midpoint: bool = LEAP_MIDPOINT, critical_count: int = CRITICAL_COUNT,
                   exact_factor: float = EXACT_FACTOR, exact_burst: int = EXACT_BURST,
                   threshold: float = 0.0):
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
    epsilon, relaxation, midpoint, critical_count, exact_factor, exact_burst
        See the module notes. ``relaxation=None`` switches the relaxation bound off (the
        2006 paper's leap condition alone); ``midpoint=False`` leaps from the propensities
        at the start of the leap.
    threshold : float
        Quasi-extinction: a population a step takes from at least this many individuals to
        fewer (but not 0) is removed at once (0: never).

    Returns
    -------
    ndarray of int64, shape (S,)
        Counts at ``t_end``.
    """
    stats = EventStats() if stats is None else stats
    rates, change = channels.rates, channels.change
    consumer = channels.consumer
    x = np.array(x, dtype=np.int64)
    # the count each channel consumes from (a sentinel that is never small if none)
    held_index = np.where(consumer >= 0, consumer, x.size)
    never = np.array([np.iinfo(np.int64).max])
    while t < t_end:
        a = rates(x)
        stats.evaluations += 1
        a0 = float(a.sum())
        if not a0 > 0:
            break  # nothing can happen any more
        # channels that would take an individual from a population below critical_count:
        # critical where their propensity is positive; none of them leaps
        small = np.concatenate([x, never])[held_index] < critical_count
        calm = np.where(small, 0.0, a)
        tau1 = leap_size(x, calm, channels, epsilon=epsilon, relaxation=relaxation)
        if tau1 < exact_factor / a0:
            x, t = _exact_burst(x, t, t_end, a, channels, rng, stats, exact_burst, threshold)
            continue
        a_critical = float(a[small].sum())
        drift = None
        while True:
            tau2 = rng.exponential(1.0 / a_critical) if a_critical > 0 else np.inf
            tau = min(tau1, tau2, t_end - t)
            fires = tau2 <= tau1 and tau2 < t_end - t
            if midpoint and tau > MIDPOINT_MIN_FRACTION * tau1:
                # propensities at the estimated midpoint x + (τ/2) Σ_j ν_j a_j (Gillespie
                # 2001; not rounded to whole numbers); channels of small populations leap
                # not at all, as at the start
                if drift is None:
                    drift = change @ a
                mid = np.maximum(x + 0.5 * tau * drift, 0.0)
                lam = np.where(small, 0.0, rates(mid))
                stats.evaluations += 1
            else:
                lam = calm
            k = _poisson(rng, lam * tau)
            if fires:  # exactly one critical event, chosen by its propensity
                pick = np.flatnonzero(small & (a > 0))
                j = pick[_pick(a[pick], np.cumsum(a[pick]), rng.random())]
                k[j] += 1
            new = x + change @ k
            if np.all(new >= 0):
                break
            tau1 = 0.5 * tau  # a leap that overdraws a population: halve and draw again
            stats.rejected += 1
        if threshold > 0:
            fell = np.flatnonzero((new < threshold) & (new > 0) & (x >= threshold))
            if fell.size:
                stats.remove(new, fell)
        x = new
        t += tau
        stats.leaps += 1
    return x


def _species_order(model, n_patches: int):
    """``order(x) -> g``, shape (2 n,), of the Cao–Gillespie–Petzold (2006) rule.

    ``g_i`` is the order of the highest-order channel that reads species ``i``, raised
    where that channel needs several individuals of ``i``: second order with two of ``i``,
    ``2 + 1/(x-1)``; third order with two of ``i``, ``(3/2)(2 + 1/(x-1))``; third order with
    three, ``3 + 1/(x-1) + 2/(x-2)``; one individual of ``i`` in a channel of order ``k``:
    ``k``. Prey: the larger of the growth form's order (``GrowthForm.prey_order``: logistic
    deaths ``r N²/(K A)`` need two prey, the strong Allee form's deaths three) and the
    response's (``Response.prey_order``: predation ``f(n) p`` is second order with one prey
    and one predator, Holling type III ``∝ N² P`` at low density third order with two prey).
    Predators: ``Response.predator_order`` (2; 3 with Holling type III).
    """
    growth, response = model.growth_form, model.functional_response
    pred = np.full(n_patches, float(response.predator_order))

    def order(x):
        xp = np.maximum(np.asarray(x[:n_patches], dtype=float), 3.0)
        prey = np.maximum(growth.prey_order(xp), response.prey_order(xp))
        return np.concatenate([prey, pred])

    return order


def _model_rates(model, area, prey, pred):
    """``rates(x, which=None)`` of the channels of :func:`event_channels`."""
    n = area.size
    k_local = len(_LOCAL_ORDER) * n
    # local channel j is kind j // n (in _LOCAL_ORDER) at patch j % n; a movement channel
    # is proportional to one species' count: that species and the coefficient (arc rate or
    # loss rate in transit)
    species = np.concatenate([np.zeros(k_local, np.int64), prey.source, np.arange(n),
                              pred.source + n, np.arange(n) + n])
    coef = np.concatenate([np.zeros(k_local), prey.rate, prey.lost, pred.rate, pred.lost])
    params = model.params
    # per-patch parameters as one (n, P) table, so that a subset is one row selection
    varying = [key for key, v in params.items() if np.ndim(v)]
    table = (np.column_stack([np.asarray(params[key], dtype=float) for key in varying])
             if varying else np.empty((n, 0)))
    fixed = {key: v for key, v in params.items() if not np.ndim(v)}

    def rates(x, which=None):
        if which is None:
            xf = np.asarray(x, dtype=float)
            big_n, big_p = xf[:n], xf[n:]
            local = _local_rates(model, params, big_n / area, big_p / area)
            a = np.concatenate([v * area for v in local]
                               + [prey.rate * big_n[prey.source], prey.lost * big_n,
                                  pred.rate * big_p[pred.source], pred.lost * big_p])
            return np.maximum(a, 0.0)
        out = np.empty(which.size)
        loc = which < k_local  # the six local blocks come first
        if loc.any():
            kd, at = np.divmod(which[loc], n)
            ar = area[at]
            q = dict(fixed)
            q.update(zip(varying, table[at].T))
            values = np.array(_local_rates(model, q, x[at] / ar, x[at + n] / ar))
            out[loc] = values[kd, np.arange(at.size)] * ar
        move = which[~loc]
        out[~loc] = coef[move] * x[species[move]]
        return np.maximum(out, 0.0)

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
        ``S = 2 n`` species in the state layout of :mod:`trophoscape.model.system`; ``K = 8 n +
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
    # (species index of the +1, species index of the -1) of each block of channels, and the
    # species each propensity reads (up to two: own patch's prey and predator)
    plus, minus, read_prey, read_pred = [], [], [], []
    for key in _LOCAL_ORDER:
        species, sign = _LOCAL_CHANNELS[key]
        plus.append(i + species * n if sign > 0 else none)
        minus.append(i + species * n if sign < 0 else none)
        reads_prey, reads_pred = _LOCAL_READS[key]
        read_prey.append(i if reads_prey else none)
        read_pred.append(i + n if reads_pred else none)
    for off, arcs in ((0, prey), (n, pred)):
        plus += [arcs.target + off, none]
        minus += [arcs.source + off, i + off]
        read_prey += [arcs.source + off, i + off]
        read_pred += [np.full(arcs.source.size, -1), none]
    plus, minus = np.concatenate(plus), np.concatenate(minus)
    k = plus.size
    cols = np.arange(k)
    rows = np.concatenate([plus[plus >= 0], minus[minus >= 0]])
    vals = np.concatenate([np.ones(np.count_nonzero(plus >= 0), np.int64),
                           -np.ones(np.count_nonzero(minus >= 0), np.int64)])
    change = sp.csr_array((vals, (rows, np.concatenate([cols[plus >= 0], cols[minus >= 0]]))),
                          shape=(2 * n, k))
    reads = np.concatenate([np.concatenate(read_prey), np.concatenate(read_pred)])
    by = np.concatenate([cols, cols])
    depends = sp.csr_array((np.ones(np.count_nonzero(reads >= 0), np.int8),
                            (reads[reads >= 0], by[reads >= 0])), shape=(2 * n, k))

    channels = Channels(rates=_model_rates(model, area, prey, pred), change=change,
                        consumer=minus, order=_species_order(model, n),
                        depends=depends)
    return _tag(channels, system, prey, pred)


def _tag(channels, system, prey, pred):
    # what the structure was built from, so that a system with new rates can reuse it
    object.__setattr__(channels, "_arcs", (prey, pred))
    object.__setattr__(channels, "_built_from", (system.prey_movement, system.predator_movement,
                                                 system.area_km2, system.model.growth,
                                                 system.model.response))
    return channels


def _same_structure(channels, system) -> bool:
    a, b, area, growth, response = channels._built_from
    return (a is system.prey_movement and b is system.predator_movement
            and area is system.area_km2 and growth == system.model.growth
            and response == system.model.response)


def whole(y, rng) -> np.ndarray:
    """Stochastic rounding ``floor(y) + Bernoulli(y - floor(y))`` (mean-preserving), int64."""
    y = np.maximum(np.asarray(y, dtype=float), 0.0)
    low = np.floor(y)
    return (low + (rng.random(y.shape) < (y - low))).astype(np.int64)


def _replicate_system(system, r: int, n: int):
    """Copy ``r`` of a stacked system (:func:`stack_system`)."""
    from ..model.system import CoupledSystem

    sl = slice(r * n, (r + 1) * n)
    model = system.model
    params = {k: (np.asarray(v)[sl] if np.ndim(v) else v) for k, v in model.params.items()}
    return CoupledSystem(
        model=LocalModel(growth=model.growth, response=model.response, params=params),
        area_km2=system.area_km2[sl], prey_movement=sp.csr_array(system.prey_movement[sl, sl]),
        predator_movement=sp.csr_array(system.predator_movement[sl, sl]), order="none",
        local_terms=system.local_terms)


def simulate_events(system, y0, *, duration: float, census_interval: float, noise,
                    extinction_abundance: float = 1.0, ids=None, time_unit: str = "year",
                    events=(), progress: bool = False):
    """An event-based run (demographic noise): whole individuals, tau-leaps and exact steps.

    Parameters are those of :func:`trophoscape.integrate.ode.simulate` (solver settings do not
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

    from ..errors import RunError
    from .trajectory import SolverStats, Trajectory, census_times
    from ..model.system import SPECIES

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
        for k in ("removals", "removed_individuals"):
            counts[k] = tuple(sum(v) for v in zip(*(getattr(p.stats, k) for p in parts)))
    else:
        n = total
        run = noise.start()
        rng = run.demographic_rngs[0]
        stats = EventStats()
        base = system
        record = np.empty((times.size, 2 * n))
        x = whole(y0, rng)  # initial abundances below the threshold are kept (as in ODE runs)
        level = float(extinction_abundance)
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
                current = run.interval(base)  # redrawn rates: new propensities, same channels
                channels = event_channels(
                    current, like=channels if _same_structure(channels, current) else None)
            if next_event < len(pending) and float(pending[next_event].time) <= t:
                while next_event < len(pending) and float(pending[next_event].time) <= t:
                    base, y = pending[next_event].apply(base, x.astype(float))
                    y = np.asarray(y, dtype=float)
                    # a shock that keeps the counts whole leaves them unchanged
                    before = x
                    x = y.astype(np.int64) if np.all(y == np.round(y)) else whole(y, rng)
                    if level > 0:  # a shock that takes a population through the threshold
                        fell = np.flatnonzero((before >= level) & (x < level) & (x > 0))
                        if fell.size:
                            stats.remove(x, fell)
                    next_event += 1
                current = run.interval(base, redraw=False)
                channels = event_channels(current)  # a shock may rewire: build anew
            stop = min(float(times[k]), next_noise * noise_step)
            if next_event < len(pending):
                stop = min(stop, float(pending[next_event].time))
            x = advance_events(x, t, stop, channels, rng, stats=stats, threshold=level)
            if x.max(initial=0) > 1e12:
                raise RunError(f"abundances passed 1e12 individuals by time {stop:.6g}: check "
                               "for explosive growth (e.g. exponential prey with no predator)")
            t = stop
            if t >= times[k]:  # the census only records
                record[k] = x
                k += 1
        counts = dict(nfev=stats.evaluations, steps=stats.leaps + stats.exact_steps,
                      restarts=stats.rejected)
        gone = (np.zeros(2 * n, np.int64) if stats.removed_counts is None
                else stats.removed_counts).reshape(2, n).sum(axis=1)
        held = (np.zeros(2 * n) if stats.removed_individuals is None
                else stats.removed_individuals).reshape(2, n).sum(axis=1)
        counts["removals"] = tuple(int(v) for v in gone)
        counts["removed_individuals"] = tuple(float(v) for v in held)
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

