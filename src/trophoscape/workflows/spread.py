"""Collapse spread: where a shock's effect arrives, in which order, and how fast it travels.

The study is run to the end of burn-in once; from that state two runs continue, a *baseline*
(nothing happens) and a *shocked* run (the same system plus the scenario's shocks), so the
only difference between them is the shock.

A species has *collapsed* in a patch when its abundance in the shocked run stays below
``share`` times the baseline's running mean (a centred window of ``window`` time units) for at
least ``sustained`` time units; the *arrival time* is the start of the first such interval
after the shock, and the *recovery time* the start of the first later interval of the same
length with abundance back at or above that level. The baseline is also tested with the same
rule (``baseline_collapse``): where a deep predator–prey cycle dips that low by itself, an
arrival there is not the shock's doing alone.

The species followed is the rule's ``species``; ``"auto"`` (the default) resolves to the prey
when every shock acts on the prey alone (``prey_crash``, ``habitat_loss``, a ``harvest`` of the
prey) and to the predator otherwise (:func:`followed_species`). A species absent from the
baseline at the shock time has no collapse to follow: that is an input error.

Distances are measured from the nearest shocked patch: along links (shortest path over arcs,
weighted by their distance; ``scipy.sparse.csgraph.dijkstra``) and in a straight line between
centroids (``scipy.spatial.cKDTree``). The front speed is the Theil–Sen slope of distance on
arrival time (``scipy.stats.theilslopes``), with its confidence interval.

Everything here is vectorised over patches (arrays of shape ``(time, patch)``).
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd
import scipy.sparse
import xarray as xr
from scipy.sparse.csgraph import dijkstra
from scipy.spatial import cKDTree

from ..errors import InputError
from .tasks import cached

__all__ = [
    "CollapseRule",
    "AUTO",
    "followed_species",
    "running_mean",
    "first_sustained",
    "collapse_times",
    "crossing_times",
    "network_distance_km",
    "straight_distance_km",
    "front_speed",
    "SpreadResult",
    "run_spread",
    "stratified_origins",
    "origin_scan",
]

_TOL = 1e-9

#: ``[spread] species`` value meaning "follow the species the shocks act on"
AUTO = "auto"

#: The one species a shock kind acts on; None where it acts on both (the patch and its
#: links go, links are cut). A harvest names its species itself (``Harvest.species``).
_KIND_SPECIES = {"predator_removal": "predator", "prey_crash": "prey", "habitat_loss": "prey",
                 "mortality_pulse": "predator", "patch_loss": None, "link_cut": None}


def acts_on(shock) -> str | None:
    """The one species a shock acts on (``"prey"`` or ``"predator"``), or None for both.

    Parameters
    ----------
    shock : trophoscape.model.shocks.Shock
    """
    species = getattr(shock, "species", None)
    return species if species is not None else _KIND_SPECIES.get(shock.kind)


def followed_species(shocks) -> str:
    """The species a spread analysis follows by default: the prey when every shock acts on
    the prey alone, the predator otherwise (also with no shocks).

    Parameters
    ----------
    shocks : sequence of trophoscape.model.shocks.Shock
    """
    shocks = list(shocks)
    return "prey" if shocks and all(acts_on(s) == "prey" for s in shocks) else "predator"


@dataclass(frozen=True)
class CollapseRule:
    """When a local population counts as collapsed (the ``[spread]`` section).

    Attributes
    ----------
    species : {"auto", "predator", "prey"}
        ``"auto"``: the species the shocks act on, see :func:`followed_species` and
        :meth:`resolve`.
    share : float
        Collapsed below this share of the baseline's running mean, 0 < share <= 1.
    sustained : float
        For at least this long (time units).
    window : float
        Width of the centred running mean of the baseline (time units).
    """

    species: str = AUTO
    share: float = 0.1
    sustained: float = 2.0
    window: float = 20.0

    @classmethod
    def from_scenario(cls, scenario) -> "CollapseRule":
        return cls(species=scenario["spread.species"], share=scenario["spread.collapse_share"],
                   sustained=scenario["spread.sustained"], window=scenario["spread.window"])

    def resolve(self, shocks) -> "CollapseRule":
        """This rule with ``"auto"`` replaced by the species the ``shocks`` act on."""
        if self.species != AUTO:
            return self
        return replace(self, species=followed_species(shocks))


# ------------------------------------------------------------------------------ time series
def running_mean(values, times, window: float) -> np.ndarray:
    """Centred running mean over ``[t - window/2, t + window/2]`` (shortened at the ends).

    Parameters
    ----------
    values : ndarray, shape (n_times, n_patches)
    times : ndarray, shape (n_times,), increasing
    window : float

    Returns
    -------
    ndarray, shape (n_times, n_patches)
    """
    values = np.asarray(values, dtype=float)
    times = np.asarray(times, dtype=float)
    lo = np.searchsorted(times, times - 0.5 * window - _TOL, side="left")
    hi = np.searchsorted(times, times + 0.5 * window + _TOL, side="right")
    total = np.vstack([np.zeros((1,) + values.shape[1:]), np.cumsum(values, axis=0)])
    return (total[hi] - total[lo]) / (hi - lo).reshape((-1,) + (1,) * (values.ndim - 1))


def first_sustained(flags, times, *, begin, sustained: float):
    """Start of the first run of True lasting at least ``sustained``, per column.

    A run starting at census time ``t_a`` and still True at ``t_b`` lasts ``t_b - t_a``; it
    qualifies once that reaches ``sustained``. Runs are looked for from row ``begin`` on.

    Parameters
    ----------
    flags : ndarray of bool, shape (n_times, n_patches)
    times : ndarray, shape (n_times,)
    begin : int or ndarray of int, shape (n_patches,)
        First row (per column) that may belong to a run.
    sustained : float

    Returns
    -------
    ndarray of int64, shape (n_patches,)
        Row where the first qualifying run starts; -1 where there is none.
    """
    flags = np.asarray(flags, dtype=bool)
    t_n, n = flags.shape
    rows = np.arange(t_n)[:, None]
    f = flags & (rows >= np.broadcast_to(np.asarray(begin), (n,))[None, :])
    last_false = np.maximum.accumulate(np.where(f, -1, rows), axis=0)
    run_start = np.minimum(last_false + 1, t_n - 1)
    lasted = np.asarray(times, float)[:, None] - np.asarray(times, float)[run_start]
    ok = f & (lasted >= sustained - _TOL)
    found = ok.any(axis=0)
    first = ok.argmax(axis=0)
    start = run_start[first, np.arange(n)]
    return np.where(found, start, -1).astype(np.int64)


def collapse_times(shocked, baseline, times, *, after: float, rule: CollapseRule):
    """Arrival and recovery of collapse in every patch.

    Parameters
    ----------
    shocked, baseline : ndarray, shape (n_times, n_patches)
        Abundance of the species in the shocked and the baseline run, on the same census
        times.
    times : ndarray, shape (n_times,)
    after : float
        Time of the shock; only census times after it count (the census at the shock time
        holds the state just before it).
    rule : CollapseRule

    Returns
    -------
    dict of str to ndarray, shape (n_patches,)
        ``arrival_time`` and ``recovered_at`` (NaN where none), ``baseline_collapse`` (bool:
        the baseline meets the rule by itself after the shock), ``baseline_present`` (bool:
        the species is present in the baseline after the shock).
    """
    times = np.asarray(times, dtype=float)
    shocked = np.asarray(shocked, dtype=float)
    baseline = np.asarray(baseline, dtype=float)
    level = rule.share * running_mean(baseline, times, rule.window)
    begin = int(np.searchsorted(times, after + _TOL, side="left"))
    below = shocked < level
    start = first_sustained(below, times, begin=begin, sustained=rule.sustained)
    reached = start >= 0
    arrival = np.where(reached, times[np.maximum(start, 0)], np.nan)
    # recovery: back at or above the level for as long, counted from the arrival on
    back = first_sustained(~below, times, begin=np.where(reached, start, times.size),
                           sustained=rule.sustained)
    recovered = np.where(back >= 0, times[np.maximum(back, 0)], np.nan)
    own = first_sustained(baseline < level, times, begin=begin, sustained=rule.sustained)
    present = (baseline[begin:] > 0).any(axis=0) if begin < times.size else np.zeros(
        shocked.shape[1], dtype=bool)
    return {"arrival_time": arrival, "recovered_at": recovered,
            "baseline_collapse": own >= 0, "baseline_present": present}


def crossing_times(values, times, level) -> np.ndarray:
    """First time each column rises to ``level``, interpolated linearly between censuses.

    For invasion fronts (a species spreading into empty patches).

    Parameters
    ----------
    values : ndarray, shape (n_times, n_patches)
    times : ndarray, shape (n_times,)
    level : float or ndarray, shape (n_patches,)

    Returns
    -------
    ndarray, shape (n_patches,)
        NaN where the level is never reached; ``times[0]`` where it is reached at the start.
    """
    values = np.asarray(values, dtype=float)
    times = np.asarray(times, dtype=float)
    level = np.broadcast_to(np.asarray(level, dtype=float), values.shape[1:])
    above = values >= level[None, :]
    found = above.any(axis=0)
    k = above.argmax(axis=0)
    cols = np.arange(values.shape[1])
    prev = np.maximum(k - 1, 0)
    v0, v1 = values[prev, cols], values[k, cols]
    t0, t1 = times[prev], times[k]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(v1 > v0, (level - v0) / (v1 - v0), 1.0)
    t = np.where(k == 0, times[0], t0 + np.clip(w, 0.0, 1.0) * (t1 - t0))
    return np.where(found, t, np.nan)


# -------------------------------------------------------------------------------- distances
def network_distance_km(network, origins) -> np.ndarray:
    """Shortest path along links from the nearest origin, by link distance.

    Parameters
    ----------
    network : trophoscape.model.network.Network
    origins : ndarray of bool, shape (n_patches,), or of int positions

    Returns
    -------
    ndarray, shape (n_patches,)
        km; 0 at the origins, inf where no path leads (another component, one-way arcs).
    """
    n = network.n_patches
    origins = _positions(origins, n)
    if origins.size == 0:
        return np.full(n, np.inf)
    src, dst, d = network.source, network.target, network.distance_km
    if src.size:
        # parallel routes: keep the shortest; touching patches (distance 0) still count as
        # linked, so lift zeros to a negligible length (csgraph ignores zero entries)
        key = network.arc_codes()
        order = np.lexsort((d, key))
        first = np.r_[True, key[order][1:] != key[order][:-1]]
        keep = order[first]
        src, dst, d = src[keep], dst[keep], np.maximum(d[keep], 1e-12)
    graph = scipy.sparse.csr_array((d, (src, dst)), shape=(n, n))
    out = dijkstra(graph, directed=True, indices=origins, min_only=True)
    out[origins] = 0.0
    return np.where(out < 1e-9, 0.0, out)


def straight_distance_km(centroids, origins) -> np.ndarray:
    """Straight-line distance (km) from each patch centroid to the nearest origin's.

    Parameters
    ----------
    centroids : ndarray, shape (n_patches, 2), metres in a projected CRS
    origins : ndarray of bool, shape (n_patches,), or of int positions
    """
    centroids = np.asarray(centroids, dtype=float)
    origins = _positions(origins, centroids.shape[0])
    if origins.size == 0:
        return np.full(centroids.shape[0], np.inf)
    d, _ = cKDTree(centroids[origins]).query(centroids, k=1)
    return d / 1000.0


def _positions(origins, n) -> np.ndarray:
    origins = np.asarray(origins)
    if origins.dtype == bool:
        return np.flatnonzero(origins)
    return origins.astype(np.int64).ravel()


def front_speed(distance, arrival, *, confidence: float = 0.95) -> dict:
    """Theil–Sen slope of distance on arrival time, with its confidence interval.

    Theil (1950); Sen (1968) (from memory); computed with ``scipy.stats.theilslopes``. Points
    with a non-finite distance or arrival, or at distance 0 (the origins), are left out.

    Returns
    -------
    dict
        ``speed`` (km per time unit), ``low``, ``high``, ``intercept`` (km), ``points``;
        NaN figures with fewer than two distinct arrival times.
    """
    from scipy.stats import theilslopes

    distance = np.asarray(distance, dtype=float)
    arrival = np.asarray(arrival, dtype=float)
    use = np.isfinite(distance) & np.isfinite(arrival) & (distance > 0)
    out = {"speed": np.nan, "low": np.nan, "high": np.nan, "intercept": np.nan,
           "points": int(use.sum()), "confidence": confidence}
    if use.sum() >= 2 and np.ptp(arrival[use]) > 0:
        slope, intercept, low, high = theilslopes(distance[use], arrival[use], alpha=confidence)
        out.update(speed=float(slope), low=float(low), high=float(high),
                   intercept=float(intercept))
    return out


# ------------------------------------------------------------------------------- the tables
def spread_table(times, shocked, baseline, *, ids, shock_time: float, origins, network,
                 centroids, rule: CollapseRule, confidence: float = 0.95):
    """The per-patch spread table and the network-level figures.

    Parameters
    ----------
    times : ndarray, shape (n_times,)
    shocked, baseline : ndarray, shape (n_times, n_patches)
        Abundance of ``rule.species``.
    ids : array of str, shape (n_patches,)
    shock_time : float
    origins : ndarray of bool, shape (n_patches,)
        The shocked patches.
    network : Network
    centroids : ndarray, shape (n_patches, 2)
    rule : CollapseRule

    Returns
    -------
    table : pandas.DataFrame, indexed by ``patch_id``
        ``arrival_time``, ``order`` (1 = first reached; ties share a rank; empty if never),
        ``network_distance_km``, ``distance_km``, ``recovered_at``, ``shocked``,
        ``baseline_collapse``.
    summary : dict
        ``reached_share`` (of all patches), ``reached``, ``front_speed_km_per_time`` (along
        straight-line distance) with ``front_speed_interval_km_per_time`` and
        ``front_speed_confidence``, ``front_speed_network_km_per_time`` (along network distance)
        with its interval, ``first_reached`` (up to ten ids, earliest first), ``species``,
        ``shock_time``, ``collapse_share``, ``sustained``, ``window``.
    """
    c = collapse_times(shocked, baseline, times, after=shock_time, rule=rule)
    arrival = c["arrival_time"]
    net_d = network_distance_km(network, origins)
    line_d = straight_distance_km(centroids, origins)
    index = pd.Index(np.asarray(ids).astype(str), name="patch_id")
    order = pd.Series(arrival, index=index).rank(method="min")
    table = pd.DataFrame({
        "arrival_time": arrival,
        "order": order.astype("Int64"),
        "network_distance_km": np.where(np.isfinite(net_d), net_d, np.nan),
        "distance_km": line_d,
        "recovered_at": c["recovered_at"],
        "shocked": np.asarray(origins, dtype=bool),
        "baseline_collapse": c["baseline_collapse"],
    }, index=index)
    reached = np.isfinite(arrival)
    by_time = np.lexsort((np.arange(arrival.size), np.where(reached, arrival, np.inf)))
    first = [str(index[i]) for i in by_time[:10] if reached[i]]
    line = front_speed(line_d, arrival, confidence=confidence)
    along = front_speed(net_d, arrival, confidence=confidence)
    summary = {
        "species": rule.species,
        "shock_time": float(shock_time),
        "collapse_share": rule.share,
        "sustained": rule.sustained,
        "window": rule.window,
        "shocked_patches": int(np.count_nonzero(origins)),
        "reached": int(reached.sum()),
        "reached_share": float(reached.mean()) if reached.size else float("nan"),
        "reached_unshocked": int((reached & ~np.asarray(origins, bool)).sum()),
        "baseline_collapse_patches": int(c["baseline_collapse"].sum()),
        "front_speed_km_per_time": line["speed"],
        "front_speed_interval_km_per_time": [line["low"], line["high"]],
        "front_speed_confidence": confidence,
        "front_speed_points": line["points"],
        "front_speed_network_km_per_time": along["speed"],
        "front_speed_network_interval_km_per_time": [along["low"], along["high"]],
        "first_reached": first,
        "mean_arrival_delay": (float(np.mean(arrival[reached] - shock_time))
                               if reached.any() else float("nan")),
    }
    return table, summary


# ----------------------------------------------------------------------------- the runs
@dataclass(frozen=True, eq=False)
class SpreadResult:
    """A spread analysis: the per-patch table, the summary and both runs.

    Attributes
    ----------
    table : pandas.DataFrame
        See :func:`spread_table`.
    summary : dict
    shocked : Trajectory
        The shocked run from time 0 to the end (burn-in included).
    baseline : Trajectory
        The baseline from the end of burn-in on.
    """

    table: pd.DataFrame
    summary: dict
    shocked: object
    baseline: object
    extras: dict = field(default_factory=dict, repr=False)


def _noise(study, part: int):
    """The scenario's ``[noise]`` for one part of a spread analysis (None without noise):
    0 for the burn-in, 1 for the runs after it. Both parts draw from streams spawned from
    the run's seed (``SeedSequence(seed).spawn(2)``), so the baseline and the shocked run
    share one noise path (common random numbers: they differ by the shocks alone), and the
    noise after burn-in starts from the process's stationary law."""
    from ..integrate.noise import replicate_seeds
    from .study import noise_model, run_seeds

    return noise_model(study, [replicate_seeds(run_seeds(study.scenario)[0], 2)[part]])


def _simulate(study, y0, duration, *, events=(), progress=False, offset=0.0, part=1):
    from ..integrate.ode import RunSettings, simulate
    from ..integrate.trajectory import Trajectory

    settings = RunSettings.from_scenario(study.scenario)
    traj = simulate(study.system, y0, ids=study.ids, progress=progress, events=events,
                    noise=_noise(study, part), **settings.options(duration=duration))
    if offset:
        data = traj.data.assign_coords(time=traj.data["time"] + offset)
        data["time"].attrs.update(traj.data["time"].attrs)
        traj = Trajectory(data=data, stats=traj.stats)
    return traj


def _burn_in(study, *, progress=False):
    """The burn-in run and the state it ends in, shape (2 n,)."""
    burn_in = study.scenario["run.burn_in"]
    if burn_in <= 0:
        return None, np.asarray(study.initial_state, dtype=float)
    traj = _simulate(study, study.initial_state, burn_in, progress=progress, part=0)
    last = np.concatenate([traj.data[s].values[-1] for s in ("prey", "predator")])
    return traj, last


def _check_shocks(study, shocks):
    sc = study.scenario
    if not shocks:
        raise InputError("the spread analysis needs at least one [[shock]] table; add one, "
                         "e.g. [[shock]] with kind = \"predator_removal\" and patches = [...]",
                         file=sc.path, field="shock")
    for i, shock in enumerate(shocks):
        if shock.at < sc["run.burn_in"]:
            raise InputError(f"{shock.at:g} is before run.burn_in {sc['run.burn_in']:g}; set "
                             f"the shock at {sc['run.burn_in']:g} or later (the spread is "
                             "measured from the state after burn-in)", file=sc.path,
                             field=f"shock[{i}].at")


def _require_species(study, rule, baseline, shock_time, *, by_default: bool) -> None:
    """Raise an InputError when ``rule.species`` is absent from every patch of the baseline
    at the shock time (the last census at or before it): nothing to follow."""
    species = rule.species
    times = np.asarray(baseline.time, dtype=float)
    row = max(int(np.searchsorted(times, shock_time + _TOL, side="right")) - 1, 0)
    if np.any(np.asarray(baseline[species].isel(time=row).values) > 0):
        return
    other = "prey" if species == "predator" else "predator"
    why = ""
    if by_default:
        if species == "prey":
            why = " (followed by default: every shock acts on the prey)"
        else:
            i, shock = next((i, s) for i, s in enumerate(study.shocks) if acts_on(s) != "prey")
            target = "the predator" if acts_on(shock) == "predator" else "both species"
            why = f" (followed by default: shock[{i}], a {shock.kind}, acts on {target})"
    raise InputError(f"the {species}{why} is absent from every patch at the shock time "
                     f"{shock_time:g}, so there is no collapse of it to follow; set species = "
                     f"\"{other}\" under [spread], or give the {species} an initial_density "
                     "above 0 and check that it persists through burn-in",
                     file=study.scenario.path, field="spread.species")


def _join(first, second):
    """One trajectory from a burn-in run and its continuation (which repeats its last time)."""
    from ..integrate.trajectory import SolverStats, Trajectory

    if first is None:
        return second
    data = xr.concat([first.data, second.data.isel(time=slice(1, None))], dim="time",
                     data_vars="all")
    data["time"].attrs.update(first.data["time"].attrs)
    a, b = first.stats, second.stats
    stats = SolverStats(method=a.method, nfev=a.nfev + b.nfev, njev=a.njev + b.njev,
                        nlu=a.nlu + b.nlu, steps=a.steps + b.steps,
                        restarts=a.restarts + b.restarts, status=max(a.status, b.status),
                        message=b.message)
    return Trajectory(data=data, stats=stats)


def run_spread(study, *, rule: CollapseRule | None = None, progress: bool = False,
               confidence: float = 0.95) -> SpreadResult:
    """Baseline and shocked runs from the state after burn-in, and the spread of collapse.

    Parameters
    ----------
    study : trophoscape.workflows.study.Study
        With at least one shock, every shock at or after ``run.burn_in``.
    rule : CollapseRule, optional
        Default: the scenario's ``[spread]`` section. A species of ``"auto"`` is resolved
        from the study's shocks (:meth:`CollapseRule.resolve`); the summary's ``species`` is
        the resolved one.

    Raises
    ------
    InputError
        No shock, a shock before the end of burn-in, or the followed species absent from
        every patch of the baseline at the shock time.
    """
    from ..model.shocks import ShockContext, shock_events, shocked_patches

    sc = study.scenario
    given = rule or CollapseRule.from_scenario(sc)
    _check_shocks(study, study.shocks)
    rule = given.resolve(study.shocks)
    burn_in = sc["run.burn_in"]
    rest = sc["run.duration"] - burn_in
    shock_time = min(float(s.at) for s in study.shocks)
    first_traj, y_burn = _burn_in(study, progress=progress)
    baseline = _simulate(study, y_burn, rest, progress=progress, offset=burn_in)
    _require_species(study, rule, baseline, shock_time, by_default=given.species == AUTO)
    events = shock_events(study.shocks, ShockContext.from_study(study), time_offset=-burn_in)
    shocked = _simulate(study, y_burn, rest, events=events, progress=progress, offset=burn_in)
    origins = shocked_patches(study.shocks, study.landscape.n_patches)
    table, summary = spread_table(
        baseline.time, shocked[rule.species].values, baseline[rule.species].values,
        ids=study.ids, shock_time=shock_time, origins=origins, network=study.network,
        centroids=study.landscape.centroids, rule=rule, confidence=confidence)
    return SpreadResult(table=table, summary=summary, shocked=_join(first_traj, shocked),
                        baseline=baseline)


# ------------------------------------------------------------------------------ origin scan
def stratified_origins(centroids, n: int, *, seed: int = 1) -> np.ndarray:
    """A spatially stratified sample of ``n`` patch positions.

    Patches are put in Morton (Z-curve) order of their centroids and cut into ``n`` runs of
    (nearly) equal length; one patch is drawn at random from each run, so the sample spreads
    over the whole landscape (common practice).

    Returns
    -------
    ndarray of int64, shape (min(n, n_patches),), sorted
    """
    centroids = np.asarray(centroids, dtype=float)
    m = centroids.shape[0]
    if n >= m:
        return np.arange(m, dtype=np.int64)
    span = np.ptp(centroids, axis=0)
    span[span == 0] = 1.0
    q = ((centroids - centroids.min(axis=0)) / span * 65535).astype(np.uint64)
    code = np.zeros(m, dtype=np.uint64)
    for bit in range(16):  # 16 bit planes, not patches: vectorised over patches
        code |= ((q[:, 0] >> np.uint64(bit)) & np.uint64(1)) << np.uint64(2 * bit)
        code |= ((q[:, 1] >> np.uint64(bit)) & np.uint64(1)) << np.uint64(2 * bit + 1)
    order = np.argsort(code, kind="stable")
    edges = np.linspace(0, m, n + 1).astype(np.int64)
    rng = np.random.default_rng(seed)
    pick = edges[:-1] + (rng.random(n) * np.diff(edges)).astype(np.int64)
    return np.sort(order[pick])


def _prepare(payload, scan: str):
    """The scan's study, burn-in state and baseline, once per process and scan (the main
    process puts them in before the workers fork; a scan of its own id, so a worker that
    outlives it never reuses them for a patch file changed since)."""
    from .study import build_study

    return cached(("scan", scan), lambda: _scan_state(build_study(payload.scenario())))


def _scan_state(study):
    sc = study.scenario
    _, y_burn = _burn_in(study)
    baseline = _simulate(study, y_burn, sc["run.duration"] - sc["run.burn_in"],
                         offset=sc["run.burn_in"])
    return study, y_burn, baseline


def _retarget(tables, origin_id):
    out = []
    for t in tables:
        t = dict(t)
        if t["kind"] == "link_cut":
            continue
        t["patches"] = (origin_id,)
        out.append(t)
    return out


def _scan_one(task):
    """One origin of a scan (a module-level function, so a process pool can run it)."""
    from ..model.shocks import ShockContext, build_shocks, shock_events

    payload, scan, origin, rule, tables = task
    study, y_burn, baseline = _prepare(payload, scan)
    sc = study.scenario
    burn_in = sc["run.burn_in"]
    origin_id = str(study.ids[origin])
    shocks = build_shocks(_retarget(tables, origin_id), ids=study.ids, network=study.network)
    events = shock_events(shocks, ShockContext.from_study(study), time_offset=-burn_in)
    shocked = _simulate(study, y_burn, sc["run.duration"] - burn_in, events=events,
                        offset=burn_in)
    mask = np.zeros(study.landscape.n_patches, dtype=bool)
    mask[origin] = True
    shock_time = min(float(s.at) for s in shocks)
    table, summary = spread_table(
        baseline.time, shocked[rule.species].values, baseline[rule.species].values,
        ids=study.ids, shock_time=shock_time, origins=mask, network=study.network,
        centroids=study.landscape.centroids, rule=rule)
    others = table[~table["shocked"]]
    delay = others["arrival_time"].dropna() - shock_time
    return {
        "origin_id": origin_id,
        "cascade_size": int(others["arrival_time"].notna().sum()),
        "cascade_share": float(others["arrival_time"].notna().mean()) if len(others) else np.nan,
        "mean_arrival_delay": float(delay.mean()) if len(delay) else np.nan,
        "first_arrival_delay": float(delay.min()) if len(delay) else np.nan,
        "origin_collapses": bool(table["arrival_time"].notna().iloc[origin]),
        "front_speed_km_per_time": summary["front_speed_km_per_time"],
    }


def origin_scan(study, origins=None, *, rule: CollapseRule | None = None, workers=None,
                progress: bool = True, scheduler=None, dask_local=None) -> pd.DataFrame:
    """Shock each origin in turn and measure the cascade it starts.

    The scenario's ``[[shock]]`` tables are the template: each origin gets the same shocks,
    aimed at that one patch instead of the tables' ``patches`` (``link_cut`` shocks are left
    out). Burn-in and the baseline are run once.

    Parameters
    ----------
    study : Study
    origins : array of int positions, optional
        Default: every patch.
    rule : CollapseRule, optional
        Default: the scenario's ``[spread]`` section; ``"auto"`` is resolved from the
        study's shocks, as in :func:`run_spread`.
    workers : int, optional
        Local processes (default all cores; 1 runs here); see
        :func:`trophoscape.workflows.tasks.run_tasks`.

    Raises
    ------
    InputError
        As :func:`run_spread` (checked once, before any origin runs), or no shock other
        than ``link_cut``.

    Returns
    -------
    pandas.DataFrame, one row per origin, indexed by ``origin_id``
        ``cascade_size`` (patches reached besides the origin), ``cascade_share`` (of the other
        patches), ``mean_arrival_delay`` and ``first_arrival_delay`` (time after the shock),
        ``origin_collapses`` (bool), ``front_speed_km_per_time``, ``status`` ("ok" or the
        error text of a failed run).
    """
    from .tasks import ScenarioPayload, forget, remember, run_tasks

    sc = study.scenario
    given = rule or CollapseRule.from_scenario(sc)
    _check_shocks(study, study.shocks)
    rule = given.resolve(study.shocks)
    tables = [dict(t) for t in sc["shock"]]
    aimed = _retarget(tables, "x")
    if not aimed:
        raise InputError("an origin scan needs a shock other than link_cut to aim at each "
                         "origin; add one, e.g. kind = \"predator_removal\"", file=sc.path,
                         field="shock")
    origins = (np.arange(study.landscape.n_patches) if origins is None
               else np.asarray(origins, dtype=np.int64))
    # burn-in and baseline are run once, here; forked workers inherit them through the cache
    state = _scan_state(study)
    _require_species(study, rule, state[2], min(float(t["at"]) for t in aimed),
                     by_default=given.species == AUTO)
    scan = uuid.uuid4().hex
    remember(("scan", scan), state)
    payload = ScenarioPayload.of(sc)
    rows = {}

    def on_result(task, ok, value):
        origin = task[2]
        rows[origin] = (dict(value, status="ok") if ok else
                        {"origin_id": str(study.ids[origin]), "status": value})

    try:
        run_tasks(_scan_one, [(payload, scan, int(o), rule, tables) for o in origins],
                  on_result=on_result, workers=workers, progress=progress,
                  scheduler=scheduler, dask_local=dask_local, desc="origins")
    finally:
        forget(("scan", scan))
    columns = ["origin_id", "cascade_size", "cascade_share", "mean_arrival_delay",
               "first_arrival_delay", "origin_collapses", "front_speed_km_per_time", "status"]
    frame = pd.DataFrame([rows[int(o)] for o in origins], columns=columns)
    frame["cascade_size"] = frame["cascade_size"].astype("Int64")
    return frame.set_index("origin_id")
