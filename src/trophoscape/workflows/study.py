"""One study: a scenario with its landscape, network and coupled system, ready to run.

This is the Python API behind the command line: ``load_study(path)`` validates everything
(scenario, patch file, corridors, links table, per-patch parameters) and builds the system;
``run_study(study)`` integrates it and computes the analyses. Notebooks and scripts get the
same numbers as the CLI.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..analysis.capacity import capacity_analysis
from ..analysis.persistence import (occupancy_curve, persistence_table,
                                              regional_persistence)
from ..analysis.stability import stability_analysis
from ..analysis.synchrony import synchrony_analysis
from ..model.dynamics import (GROWTH_FORMS, PARAMETER_KEYS, LocalModel, fastest_rates,
                              interior_equilibrium)
from ..errors import InputError, TrophoscapeWarning, allowed_range
from ..model.landscape import Landscape, read_patches
from ..model.network import Network, arc_weights, build_network, movement_operator
from ..scenario import (INPUT_FILES, LARGEST, FieldRef, Scenario, bounds_of,
                                  check_regular_file, read_scenario)
from ..integrate.trajectory import Trajectory
from ..integrate.ode import RunSettings, simulate
from ..machine import blas_on_one_thread
from .tasks import InSecondProcess, second_process_possible
from ..model.system import SPECIES, CoupledSystem, pack

if TYPE_CHECKING:
    from ..integrate.noise import NoiseModel

__all__ = ["Study", "RunResult", "load_study", "build_study", "assemble_study", "run_study",
           "analyse", "run_seeds", "noise_model", "simulate_replicates"]


@dataclass(frozen=True, eq=False)
class Study:
    """Everything needed to run one scenario; arrays are in the fixed patch order."""

    scenario: Scenario
    landscape: Landscape
    network: Network
    model: LocalModel
    system: CoupledSystem
    initial_state: np.ndarray
    dispersal: dict = field(repr=False)  # per species: emigration_rate, scale_km arrays
    shocks: tuple = ()  # trophoscape.model.shocks objects from the [[shock]] tables
    # the resistance raster as read (trophoscape.model.resistance.ResistanceSurface, without
    # the corridors burnt in), or None: kept so that candidates and their evaluation do not
    # read it again
    ground: object = field(default=None, repr=False)

    @property
    def ids(self) -> np.ndarray:
        return self.landscape.ids

    def arc_weights(self, species: str) -> np.ndarray:
        """Kernel weight of every arc for ``species``, shape (n_arcs,)."""
        return arc_weights(self.network, scale_km=self.dispersal[species]["scale_km"])


@dataclass(frozen=True, eq=False)
class RunResult:
    """A finished run: the trajectory, the per-patch table and the network-level summary."""

    study: Study
    trajectory: Trajectory
    patches: pd.DataFrame
    summary: dict
    extras: dict = field(default_factory=dict, repr=False)
    #: ``timeseries.nc`` as the run wrote it (``run_study(series_to=...)``), or None
    series_file: Path | None = None


def load_study(path) -> Study:
    """Read a scenario file and everything it names; see :func:`build_study`."""
    return build_study(read_scenario(path))


def _per_patch(scenario: Scenario, landscape: Landscape, key: str) -> np.ndarray:
    """A parameter as an array of shape (n_patches,), checked against the key's range."""
    value = scenario[key]
    n = landscape.n_patches
    if not isinstance(value, FieldRef):
        return np.full(n, float(value))
    values = landscape.values(value.field, key=key)
    lo, hi, lo_open = bounds_of(key)
    huge = ~(np.abs(values) <= LARGEST)  # NaN and infinities too
    if huge.any():
        i = int(np.argmax(huge))
        capped = allowed_range(-LARGEST if lo is None else lo, LARGEST if hi is None else hi,
                               lo_open)
        raise InputError(f"value {float(values[i])!r} for {key} is not a finite number within "
                         f"the range trophoscape computes with; give {capped} in every "
                         "feature", file=landscape.path, feature=_feature(landscape, i),
                         field=value.field)
    bad = np.zeros(n, dtype=bool)
    if lo is not None:
        bad |= (values <= lo) if lo_open else (values < lo)
    if hi is not None:
        bad |= values > hi
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"value {float(values[i])!r} is out of range for {key}; give "
                         f"{allowed_range(lo, hi, lo_open)} in every feature",
                         file=landscape.path, feature=_feature(landscape, i), field=value.field)
    return values


def _feature(landscape: Landscape, i: int):
    return str(landscape.ids[i]) if landscape.has_id_field else i


def build_study(scenario: Scenario) -> Study:
    """Validate the inputs a scenario names and build its coupled system.

    Raises
    ------
    InputError
        For anything wrong in the scenario, the patch file, the corridors or the links table;
        a problem with a scenario value names the scenario file.
    """
    try:
        return _build_study(scenario)
    except InputError as exc:
        if exc.file is None:
            raise InputError(exc.message, file=scenario.path, feature=exc.feature,
                             field=exc.field) from None
        raise


def _build_study(scenario: Scenario) -> Study:
    """Validate the inputs a scenario names and build its coupled system.

    Raises
    ------
    InputError
        For anything wrong in the scenario, the patch file, the corridors or the links table.
    """
    sc = scenario
    for key, what in INPUT_FILES.items():
        if sc[key]:
            check_regular_file(sc.resolve(sc[key]), what=what, folders=True)
    from ..model.habitat import habitat_patches, is_raster_path

    if is_raster_path(sc["patches.path"]):
        if sc["patches.id_field"] or sc["patches.layer"]:
            raise InputError("a habitat raster names its patches itself (h<row>_<col>); "
                             "leave out [patches] id_field and layer",
                             file=sc.path, field="patches.id_field" if sc["patches.id_field"]
                             else "patches.layer")
        landscape = habitat_patches(
            sc.resolve(sc["patches.path"]), habitat_values=sc["patches.habitat_values"],
            suitability_threshold=sc["patches.suitability_threshold"],
            min_area_km2=sc["patches.min_area_km2"], crs=sc["patches.crs"],
            fields=sc.fields_used())
    else:
        for key in ("patches.habitat_values", "patches.suitability_threshold"):
            if sc[key] is not None:
                raise InputError(f"{key} applies to a habitat raster (a .tif path), and "
                                 f"{sc['patches.path']!r} is a vector file; remove the key",
                                 file=sc.path, field=key)
        landscape = read_patches(
            sc.resolve(sc["patches.path"]), id_field=sc["patches.id_field"],
            crs=sc["patches.crs"], fields=sc.fields_used(), layer=sc["patches.layer"],
        )
    surface = None
    if sc["dispersal.resistance"]:
        import shapely

        from ..model.resistance import read_resistance

        surface = read_resistance(sc.resolve(sc["dispersal.resistance"]), crs=landscape.crs,
                                  patch_bounds=shapely.total_bounds(landscape.geometries))
    network = build_network(
        landscape,
        kernel=sc["dispersal.kernel"],
        max_distance_km=sc["dispersal.max_distance_km"],
        distance=sc["dispersal.distance"],
        corridors=sc.resolve(sc["dispersal.corridors"]) if sc["dispersal.corridors"] else None,
        links_table=sc.resolve(sc["dispersal.links"]) if sc["dispersal.links"] else None,
        corridor_snap_km=sc["dispersal.corridor_snap_km"],
        matrix_resistance=sc["dispersal.matrix_resistance"],
        corridor_resistance=sc["dispersal.corridor_resistance"],
        resistance=surface,
    )
    return assemble_study(sc, landscape, network, ground=surface)


#: Scenario keys that shape the landscape or the network: a study that changes one of them
#: must be built again from its files (:func:`build_study`), not re-assembled.
STRUCTURE_SECTIONS = ("patches",)
STRUCTURE_KEYS = ("dispersal.kernel", "dispersal.max_distance_km", "dispersal.distance",
                  "dispersal.corridors", "dispersal.links", "dispersal.corridor_snap_km",
                  "dispersal.resistance", "dispersal.matrix_resistance",
                  "dispersal.corridor_resistance")


def assemble_study(scenario: Scenario, landscape, network, ground=None) -> Study:
    """The local model, movement operators, coupled system, initial state and shocks of a
    scenario on a landscape and network already built (from the same scenario, or from one
    that differs only outside :data:`STRUCTURE_KEYS` and the ``[patches]`` section): what a
    fit does for each trial of its rates, without reading any file again."""
    sc = scenario
    n = landscape.n_patches
    params = {name: _per_patch(sc, landscape, key) for name, key in PARAMETER_KEYS.items()}
    quality = (landscape.values(sc["patches.quality_field"], key="patches.quality_field")
               if sc["patches.quality_field"] else np.ones(n))
    params["capacity"] = params["capacity"] * quality
    form = GROWTH_FORMS[sc["prey.growth"]]
    for name in form.positive:
        if np.any(params[name] <= 0):
            i = int(np.argmax(params[name] <= 0))
            if name == "capacity":
                raise InputError(
                    "carrying capacity is zero (quality 0); give the patch a quality > 0 or "
                    "remove it", file=landscape.path, feature=_feature(landscape, i),
                    field=sc["patches.quality_field"] or "prey.capacity_density")
            raise InputError(f"is {params[name][i]:g} in this patch; give a value above 0",
                             file=landscape.path, feature=_feature(landscape, i),
                             field=PARAMETER_KEYS[name])
    for name, words in form.below_capacity.items():
        if np.any(params[name] >= params["capacity"]):
            i = int(np.argmax(params[name] >= params["capacity"]))
            qf = sc["patches.quality_field"]
            made_of = (f"prey.capacity_density {sc['prey.capacity_density']:g} × {qf} "
                       f"{quality[i]:g}" if qf else "prey.capacity_density")
            raise InputError(
                f"carrying capacity {params['capacity'][i]:g} per km² ({made_of}) is not above "
                f"{words} {PARAMETER_KEYS[name]} {params[name][i]:g}; raise the quality or lower "
                "the threshold",
                file=landscape.path, feature=_feature(landscape, i),
                field=qf or "prey.capacity_density")
    model = LocalModel(growth=form.name, response=sc["predation.response"], params=params)

    dispersal, operators = {}, {}
    for s in SPECIES:
        rate = _per_patch(sc, landscape, f"{s}.emigration_rate")
        scale = _per_patch(sc, landscape, f"{s}.kernel_scale_km")
        dispersal[s] = {"emigration_rate": rate, "scale_km": scale}
        operators[s] = movement_operator(network, emigration_rate=rate, scale_km=scale,
                                         survival_per_km=sc["dispersal.survival_per_km"])
    system = CoupledSystem(model=model, area_km2=landscape.area_km2,
                           prey_movement=operators["prey"],
                           predator_movement=operators["predator"])
    initial = _initial_state(sc, landscape, model)
    from ..model.shocks import build_shocks

    shocks = build_shocks(sc["shock"], ids=landscape.ids, network=network, file=sc.path)
    check_run_size(sc, n, model.params, emigration={s: d["emigration_rate"]
                                                    for s, d in dispersal.items()})
    return Study(scenario=sc, landscape=landscape, network=network, model=model, ground=ground,
                 system=system, initial_state=initial, dispersal=dispersal, shocks=shocks)


def shock_schedule(study) -> tuple:
    """The timed events of the study's ``[[shock]]`` tables, as a run takes them."""
    if not study.shocks:
        return ()
    from ..model.shocks import ShockContext, shock_events

    return shock_events(study.shocks, ShockContext.from_study(study))


def physical_memory() -> int:
    """Bytes of memory of this machine (8 GiB where the system does not say)."""
    try:
        return int(os.sysconf("SC_PHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, ValueError, OSError):  # pragma: no cover - not on Linux
        return 8 << 30


#: Most noise steps a run may take (each restarts the solver).
MAX_NOISE_STEPS = 10_000_000
#: Most time scales of the fastest per-capita rate a run with an explicit solver may span:
#: such a solver needs at least about that many steps (its stability limit).
MAX_TIME_SCALES = 1e8
#: Bytes of working memory per stored census value: the float32 series itself, and the
#: float64 copies the analyses make of one species and replicate at a time.
_BYTES_PER_VALUE = 12


def run_size(sc: Scenario, n_patches: int) -> dict:
    """What a run of the scenario will hold: census rows, replicates, stored values and the
    memory they need (an estimate, in bytes)."""
    rows = math.floor(sc["run.duration"] / sc["run.census_interval"] + 1e-9) + 2
    reps = int(sc["run.replicates"])
    values = 2.0 * rows * n_patches * reps
    features = 0.0
    if sc["noise.correlation_km"] != "regional" and (sc["noise.environmental_sd"] > 0
                                                     or sc["noise.predator_mortality_sd"] > 0):
        features = 8.0 * reps * n_patches * min(n_patches, sc["noise.rank"])
    return {"rows": rows, "replicates": reps, "values": values,
            "bytes": values * _BYTES_PER_VALUE + features}


def _size_words(b: float) -> str:
    for unit, scale in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6)):
        if b >= scale:
            return f"{b / scale:.3g} {unit}"
    return f"{b:.0f} bytes"


def check_run_size(sc: Scenario, n_patches: int, params=None, emigration=None) -> None:
    """Refuse up front a run that cannot fit in this machine's memory, would take more than
    :data:`MAX_NOISE_STEPS` noise steps, or (with an explicit solver) whose fastest
    per-capita rate spans more than :data:`MAX_TIME_SCALES` of its time scales; the
    estimate is in the message."""
    size = run_size(sc, n_patches)
    memory = physical_memory()
    if size["bytes"] > memory:
        field = "run.replicates" if size["replicates"] > size["rows"] else "run.census_interval"
        raise InputError(
            f"the run would record {size['rows']:,} census rows × {n_patches:,} patches × 2 "
            f"species × {size['replicates']:,} replicate(s), about "
            f"{_size_words(size['bytes'])} of memory, more than this machine's "
            f"{_size_words(memory)}; lengthen run.census_interval, shorten run.duration or "
            "run fewer replicates", file=sc.path, field=field)
    if params is not None and (sc["noise.environmental_sd"] > 0
                               or sc["noise.predator_mortality_sd"] > 0):
        from ..integrate.noise import resolve_step

        step = resolve_step(sc["noise.noise_step"], params)
        count = sc["run.duration"] / step
        if count > MAX_NOISE_STEPS:
            raise InputError(
                f"the run would take {count:,.0f} noise steps of {step:g} time units (at most "
                f"{MAX_NOISE_STEPS:,}; each restarts the solver); give a longer noise_step",
                file=sc.path, field="noise.noise_step")
    from ..integrate.ode import IMPLICIT, choose_method

    if params is not None and choose_method(sc["run.method"]) not in IMPLICIT + ("LSODA",):
        fastest = {PARAMETER_KEYS[k]: v for k, v in fastest_rates(params).items()}
        if emigration:
            fastest.update({f"{s}.emigration_rate": v for s, v in
                            fastest_rates(emigration, names=tuple(emigration)).items()})
        key = max(fastest, key=fastest.get)
        scales = fastest[key] * sc["run.duration"]
        if scales > MAX_TIME_SCALES:
            raise InputError(
                f"a rate of {fastest[key]:g} per time unit over run.duration "
                f"{sc['run.duration']:g} spans {scales:.3g} of its time scales: the solver "
                f"({choose_method(sc['run.method'])}) would need at least about that many "
                f"steps (at most {MAX_TIME_SCALES:.0e}); check the rate's time unit, or "
                'use run.method = "BDF" for such fast rates', file=sc.path, field=key)


def _initial_state(sc: Scenario, landscape: Landscape, model: LocalModel) -> np.ndarray:
    area = landscape.area_km2
    densities = {}
    eq = None
    for s in SPECIES:
        key = f"{s}.initial_density"
        if sc[key] == "equilibrium":
            if eq is None:
                try:
                    eq = interior_equilibrium(model)
                except NotImplementedError as exc:
                    raise InputError(f"'equilibrium' is not available here ({exc}); give a "
                                     "density per km²", file=sc.path, field=key) from None
                missing = np.isnan(eq[0])
                if missing.any():
                    warnings.warn(
                        f"{sc.path or landscape.path}: {int(missing.sum())} patch(es) have no coexistence "
                        "equilibrium (the predator cannot persist there); they start with prey "
                        "at carrying capacity and no predator; give a predator density per "
                        "km² instead of 'equilibrium' if they should start with predators",
                        TrophoscapeWarning, stacklevel=3)
                    k = model.params["capacity"]
                    eq = (np.where(missing, k, eq[0]), np.where(missing, 0.0, eq[1]))
            densities[s] = eq[SPECIES.index(s)]
        else:
            densities[s] = _per_patch(sc, landscape, key)
    return pack(densities["prey"] * area, densities["predator"] * area)


def run_seeds(scenario: Scenario) -> list[int]:
    """The seed of every replicate.

    One replicate uses ``run.seed`` itself; ``R > 1`` replicates use
    ``SeedSequence(run.seed).spawn(R)`` (:func:`trophoscape.integrate.noise.replicate_seeds`), so
    replicate ``r`` draws the same environmental noise as a single run whose ``run.seed`` is
    that replicate's seed (as a sweep runs it).
    """
    reps = scenario["run.replicates"]
    if reps == 1:
        return [int(scenario["run.seed"])]
    from ..integrate.noise import replicate_seeds

    return replicate_seeds(scenario["run.seed"], reps)


def noise_model(study: Study, seeds) -> "NoiseModel | None":
    """The study's ``[noise]`` settings as a :class:`~trophoscape.integrate.noise.NoiseModel`, or None
    when the scenario has no noise."""
    from ..integrate.noise import NoiseModel, resolve_step

    sc = study.scenario
    corr = sc["noise.correlation_km"]
    step = resolve_step(sc["noise.noise_step"], study.system.model.params)
    model = NoiseModel(
        centroids_km=study.landscape.centroids / 1000.0, seeds=tuple(seeds),
        environmental_sd=sc["noise.environmental_sd"],
        mortality_sd=sc["noise.predator_mortality_sd"],
        correlation_km=None if corr == "regional" else float(corr),
        kernel=sc["noise.kernel"], shared_share=sc["noise.shared_share"],
        correlation_time=sc["noise.correlation_time"], step=step,
        demographic=sc["noise.demographic"], rank=sc["noise.rank"])
    return model if model.active else None


def _stacked_events(events, n: int, reps: int):
    """Events of one copy, for the stacked system of ``reps`` copies; None if one cannot be."""
    import dataclasses

    from ..model.shocks import ParameterShift, StateScale

    offsets = (np.arange(reps) * n)[:, None]
    out = []
    for e in events:
        if isinstance(e, StateScale):
            out.append(dataclasses.replace(e, index=(e.index[None, :] + offsets).ravel()))
        elif isinstance(e, ParameterShift):
            out.append(dataclasses.replace(e, index=(e.index[None, :] + offsets).ravel(),
                                           delta=np.tile(np.asarray(e.delta), reps)))
        else:  # rewiring rebuilds one copy's operators: run the replicates one by one
            return None
    return out


def simulate_replicates(study: Study, *, seeds, noise=None, events=(), stacked=None,
                        progress: bool = False, writer=None) -> Trajectory:
    """Integrate every replicate of a study; dims ``(time, patch, replicate)``.

    Parameters
    ----------
    seeds : sequence of int, length R > 1
        One per replicate; a coordinate ``seed`` along ``replicate``.
    noise : NoiseModel, optional
        With one seed per replicate (the same ``seeds``).
    events : sequence
        Shock events of one copy of the network.
    stacked : bool or None
        Integrate all replicates as one block-diagonal system (solver overhead paid once) or
        one by one. None: stacked unless a shock rewires the network.
    writer : trophoscape.io.series.SeriesWriter, optional
        Stacked, the census rows are written to it as the run goes; one by one, the caller
        writes them at the end (``writer.finish(trajectory)``).

    Notes
    -----
    Stacked, the solver's error control (a max norm over every component) holds each
    replicate to the tolerances as if it ran alone, but the step size is shared and a step
    with a quasi-extinction in one replicate is taken again over that replicate's patches
    around it, then restarts all of them from its end; one by one, each replicate keeps
    its own step size. The noise of each replicate is the same either way; the integration
    errors differ at the level of the tolerances.
    """
    from ..integrate.replicates import stack_state, stack_system, unstack_series

    sc = study.scenario
    reps = len(seeds)
    n = study.landscape.n_patches
    common = RunSettings.from_scenario(sc).options(progress=progress)
    stacked_events = _stacked_events(events, n, reps)
    if stacked is None:
        # event-based (demographic) runs take one leap size per run: replicates one by one
        demographic = noise is not None and getattr(noise, "demographic", False)
        stacked = stacked_events is not None and not demographic
    elif stacked and stacked_events is None:
        raise ValueError("replicates with shocks that rewire the network run one by one")
    if stacked:
        big = simulate(stack_system(study.system, reps), stack_state(study.initial_state, reps),
                       events=stacked_events, noise=noise,
                       **({} if writer is None else writer.sink_options(replicates=reps)),
                       **common)
        cubes = {s: unstack_series(big.data[s].values, reps) for s in SPECIES}
        stats = big.stats
        time = big.data["time"]
    else:
        runs = [simulate(study.system, study.initial_state, events=events,
                         noise=None if noise is None else noise.for_replicates(r), **common)
                for r in range(reps)]
        cubes = {s: np.stack([t.data[s].values for t in runs], axis=-1) for s in SPECIES}
        stats = _sum_stats([t.stats for t in runs])
        time = runs[0].data["time"]
    import xarray as xr

    data = xr.Dataset(
        {s: (("time", "patch", "replicate"), cubes[s],
             {"units": "individuals", "long_name": f"{s} abundance"}) for s in SPECIES},
        coords={"time": time,
                "patch": ("patch", np.asarray(study.ids, dtype=object), {"long_name": "patch id"}),
                "replicate": ("replicate", np.arange(reps), {"long_name": "replicate"}),
                "seed": ("replicate", np.asarray(seeds, dtype=np.int64),
                         {"long_name": "seed of the replicate's random numbers"})},
    )
    return Trajectory(data=data, stats=stats)


def _sum_stats(all_stats):
    from ..integrate.trajectory import SolverStats

    first = all_stats[0]
    worst = max(all_stats, key=lambda st: abs(st.status))
    return SolverStats(method=first.method,
                       **{k: sum(getattr(st, k) for st in all_stats)
                          for k in ("nfev", "njev", "nlu", "steps", "restarts")},
                       status=worst.status, message=worst.message,
                       **{k: tuple(sum(v) for v in zip(*(getattr(st, k) for st in all_stats)))
                          for k in ("removals", "removed_individuals")})


def quasi_extinction_summary(stats) -> dict:
    """What the quasi-extinction rule removed, per species: ``removals`` (local populations
    that fell through the threshold) and ``individuals_removed``, summed over replicates."""
    return {s: {"removals": int(stats.removals[i]),
                "individuals_removed": float(stats.removed_individuals[i])}
            for i, s in enumerate(SPECIES)}


def run_study(study: Study, *, progress: bool = False, stacked=None,
              series_to=None) -> RunResult:
    """Integrate a study and run the analyses on the result.

    With ``[run] replicates = R > 1`` the trajectory has dims ``(time, patch, replicate)``
    and a ``seed`` coordinate; ``stacked`` chooses how replicates are integrated (see
    :func:`simulate_replicates`).

    ``series_to``: a path for ``timeseries.nc``, written as the run goes, in blocks of
    ``SERIES_BLOCK_ROWS`` census rows (under a temporary name, renamed when the last row is
    in, deleted if the run fails). :func:`trophoscape.report.run.write_run` then takes
    that file instead of writing the series again. Replicates run one by one and event-based
    (demographic) runs write theirs when the integration ends.

    Returns
    -------
    RunResult
        ``patches`` holds the per-patch columns of the output contract (indexed by patch id,
        in the user's order); ``summary`` the network-level figures and solver statistics;
        ``extras`` what the figures need beyond those (curves, binned tables).
    """
    sc = study.scenario
    events = shock_schedule(study)
    seeds = run_seeds(sc)
    noise = noise_model(study, seeds)
    writer = None
    if series_to is not None:
        from ..integrate.trajectory import census_times
        from ..io.series import SeriesWriter

        writer = SeriesWriter(series_to, study=study,
                              times=census_times(sc["run.duration"], sc["run.census_interval"]),
                              seeds=None if len(seeds) == 1 else seeds)
    try:
        if len(seeds) == 1:
            traj = simulate(
                study.system, study.initial_state, ids=study.ids, progress=progress,
                events=events, noise=noise, **RunSettings.from_scenario(sc).options(),
                **({} if writer is None else writer.sink_options()),
            )
        else:
            traj = simulate_replicates(study, seeds=seeds, noise=noise, events=events,
                                       stacked=stacked, progress=progress, writer=writer)
    except BaseException:
        if writer is not None:
            writer.abort()
        raise
    if writer is not None:
        writer.finish(traj)  # deletes the file itself if this fails
    # on a large network the analyses run beside each other on every core: BLAS's own
    # threads would spin on the same cores (machine.blas_on_one_thread)
    with blas_on_one_thread(study.system.n_patches >= STABILITY_BESIDE_MIN_PATCHES):
        table, summary, extras = analyse(study, traj)
    summary["replicates"] = len(seeds)
    summary["seeds"] = seeds
    summary["quasi_extinction"] = quasi_extinction_summary(traj.stats)
    if noise is not None:
        summary["noise"] = {k.split(".", 1)[1]: sc[k] for k in sc.values
                            if k.startswith("noise.")}
        summary["noise"]["noise_step_used"] = float(noise.step)
    return RunResult(study=study, trajectory=traj, patches=table, summary=summary,
                     extras=extras, series_file=None if writer is None else writer.path)


#: From this many patches the stability analysis (which needs the system, not the run) is
#: computed beside persistence and synchrony, which are computed here: in a forked second
#: process on Linux with a second core, else on a second thread; its numbers and where they
#: go are the same either way. A process does not share Python's lock: on a thread, ARPACK's
#: Python loop and synchrony's took turns at Python's lock, and the two took 7.6 s where
#: synchrony alone took 6.3 s (benchmarks/README.md, sixteenth session). Should persistence
#: or synchrony be interrupted, the process is stopped (a thread finishes its computation on
#: its own and its result is dropped; as a daemon it cannot keep the process alive).
STABILITY_BESIDE_MIN_PATCHES = 20_000


def _beside(work):
    """``work()`` started beside this thread: in a forked second process where one can be
    started (:func:`~trophoscape.workflows.tasks.second_process_possible`; it does not
    share Python's lock with this one; its result and warnings come back pickled), else on
    a second thread. Call the object for the result."""
    if second_process_possible():
        process = InSecondProcess(work, doing="computed the stability analysis",
                                  name="trophoscape-stability")
        if process.start():
            return process
    return _Beside(work)


class _Beside:
    """``work()`` on a daemon thread, started now; calling the object waits for it and
    returns its result or raises its exception. A daemon thread cannot keep the process
    running after the command ends."""

    def __init__(self, work):
        import threading

        self._outcome = None

        def run():
            try:
                self._outcome = (True, work())
            except BaseException as exc:  # noqa: BLE001 - raised again in the caller
                self._outcome = (False, exc)

        self._thread = threading.Thread(target=run, name="trophoscape-stability", daemon=True)
        self._thread.start()

    def __call__(self):
        self._thread.join()
        done, value = self._outcome
        if not done:
            raise value
        return value


#: Per-patch columns of the output contract, in order (SCENARIO.md); others follow.
CONTRACT_COLUMNS = ("persists", "occupancy", "mean", "cv", "last_extinction", "sync_local",
                    "sync_region")


def _persistence_and_synchrony(study, traj, guarded, reps, level):
    """The persistence and synchrony analyses of :func:`analyse`, each run ``guarded``."""
    from ..analysis import persistence as persistence_module
    from ..analysis import synchrony as synchrony_module

    sc = study.scenario
    burn_in = sc["run.burn_in"]
    net = study.network
    area = study.landscape.area_km2

    def persistence():
        pers = persistence_table(traj, burn_in=burn_in, extinction_abundance=level)
        return (pers, regional_persistence(pers, traj, area_km2=area, extinction_abundance=level),
                {"occupancy": occupancy_curve(traj, extinction_abundance=level)})

    kinds = (1, "replicates") if reps > 1 else (1,)
    per_patch = [c for kind in kinds for c in persistence_module.PATCH_COLUMNS[kind]]
    regional = [k for kind in kinds for k in persistence_module.REGIONAL_KEYS[kind]]
    report = "please report it with the scenario"
    guarded("persistence", persistence,
            columns=[f"{s}_{c}" for s in SPECIES for c in per_patch],
            keys=[f"{s}_{k}" for s in SPECIES for k in regional],
            label="the persistence analysis", advice=report)

    def synchrony():
        return synchrony_analysis(
            traj, burn_in=burn_in, source=net.source, target=net.target,
            weights={s: study.arc_weights(s) for s in SPECIES},
            centroids=study.landscape.centroids, seed=sc["run.seed"],
            max_pairs=sc["analysis.synchrony_pairs"],
        )

    guarded("synchrony", synchrony,
            columns=[f"{s}_{c}" for s in SPECIES for c in synchrony_module.PATCH_COLUMNS],
            keys=[f"{s}_{k}" for s in SPECIES for k in synchrony_module.SUMMARY_KEYS],
            label="the synchrony analysis", advice=report)


def analyse(study: Study, traj: Trajectory):
    """Every analysis of one trajectory: ``(patch table, summary, extras)``.

    No analysis can lose a run. Each one (persistence, synchrony, stability, capacity) runs
    guarded: if it raises an ``Exception``, ``summary["analysis_errors"]`` gets
    ``{"analysis": name, "reason": one line}`` (the list is always there, empty when all
    ran), a one-line ``TrophoscapeWarning`` names it, and its per-patch columns and summary
    figures are kept under their usual names but empty (NaN columns; NaN or None in the
    summary, null in ``summary.json``), so that ``patches.csv`` has the same columns
    whatever failed. The other analyses are written as usual.
    """
    from scipy.sparse.linalg import ArpackNoConvergence

    from ..analysis.capacity import capacity_columns

    sc = study.scenario
    net = study.network
    area = study.landscape.area_km2
    parts = [pd.DataFrame({"area_km2": area, "links": net.links_per_patch()},
                          index=pd.Index(study.ids.astype(str), name="patch_id"))]
    index = parts[0].index
    net_summary = net.summary()
    summary = {
        "scenario": sc.name,
        "patches": net_summary["patches"],
        "links": net_summary["links"],
        "components": net_summary["components"],
        "isolated_patches": len(net_summary["isolated"]),
        "analysis_errors": [],
    }
    extras: dict = {}
    reps = traj.data.sizes.get("replicate", 1)
    # summary keys that hold text or a table: None, not NaN, when their analysis failed
    text_keys = {"stability", "stability_details", *(f"{s}_capacity_drop_method" for s in SPECIES)}

    def reason_of(exc: Exception) -> str:
        """Why an analysis failed, in one line (an error from the stability analysis's
        process that could not be rebuilt here keeps the name of its type)."""
        original = getattr(exc, "original_type", None)
        if isinstance(exc, ArpackNoConvergence) or original == ArpackNoConvergence.__name__:
            return "ARPACK did not converge"
        lines = str(exc).strip().splitlines()
        text = lines[0].strip() if lines else ""
        if original is not None and text.startswith(f"{original}: "):
            text = text[len(original) + 2:]
        if len(text) > 200:
            text = text[:199] + "…"
        name = original or type(exc).__name__
        return f"{name}: {text}" if text else name

    def guarded(name, run, *, columns, keys, label, advice):
        """``run()`` -> (table or None, summary figures, extras), merged in; on an Exception
        the failure is recorded and ``columns`` / ``keys`` are filled with NaN (None for
        the keys that hold text or a table)."""
        try:
            table, figures, more = run()
        except Exception as exc:  # noqa: BLE001 - any failure of an analysis, not Ctrl-C
            reason = reason_of(exc)
            summary["analysis_errors"].append({"analysis": name, "reason": reason})
            warnings.warn(f"{label} failed ({reason}); the other results are written and its "
                          f"columns and figures are left empty; {advice}",
                          TrophoscapeWarning, stacklevel=3)
            parts.append(pd.DataFrame(np.nan, index=index, columns=list(columns)))
            summary.update({k: None if k in text_keys else np.nan for k in keys})
            return
        if table is not None:
            parts.append(table)
        summary.update(figures)
        extras.update(more)

    level = sc["run.extinction_abundance"]
    stability_result = None
    if sc["analysis.stability"]:
        def compute_stability():
            return stability_analysis(study.system)

        stability_result = (_beside(compute_stability)
                            if study.system.n_patches >= STABILITY_BESIDE_MIN_PATCHES
                            else compute_stability)
    try:
        _persistence_and_synchrony(study, traj, guarded, reps, level)
    except BaseException:  # (Ctrl-C): the stability analysis beside is not waited for
        stop = getattr(stability_result, "stop", None)  # a process (a thread has none)
        if stop is not None:
            stop()
        raise

    if sc["analysis.stability"]:
        def stability():
            stab = stability_result()
            eq = pd.DataFrame({f"{s}_equilibrium": stab.pop(f"{s}_equilibrium")
                               for s in SPECIES}, index=index)
            return eq, {"stability": stab.pop("stability"), "stability_details": stab}, {}

        guarded("stability", stability, columns=[f"{s}_equilibrium" for s in SPECIES],
                keys=["stability", "stability_details"], label="the stability analysis",
                advice="set [analysis] stability = false to skip it")
    if sc["analysis.capacity"]:
        kernel = net.kernel if net.kernel in ("exponential", "gaussian", "step") else "exponential"

        def capacity():
            tables, figures = [], {}
            for s in SPECIES:
                cap, cap_summary = capacity_analysis(
                    net, area, scale_km=study.dispersal[s]["scale_km"], kernel=kernel)
                tables.append(cap.set_axis(index).add_prefix(f"{s}_"))
                figures.update({f"{s}_{k}": v for k, v in cap_summary.items()})
            return pd.concat(tables, axis=1), figures, {}

        guarded("capacity", capacity,
                columns=[f"{s}_{c}" for s in SPECIES for c in capacity_columns(net)],
                keys=[f"{s}_{k}" for s in SPECIES for k in ("metapopulation_capacity",
                                                            "capacity_drop_method")],
                label="metapopulation capacity",
                advice="set [analysis] capacity = false to skip it")

    table = pd.concat(parts, axis=1)
    ordered = ["area_km2", "links"] + [f"{s}_{c}" for s in SPECIES for c in CONTRACT_COLUMNS]
    ordered += sorted((c for c in table.columns if c not in ordered),
                      key=lambda c: (not c.startswith("prey_"), 0))
    summary["solver"] = {**traj.stats.as_dict(), "local_terms": study.system.local_terms_used,
                         # the earlier name, kept for scripts (README, "Changes to the contract")
                         "local_kernel": study.system.local_terms_used}
    return table[ordered], summary, extras
