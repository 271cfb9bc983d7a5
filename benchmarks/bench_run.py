"""A full run of 10,000 synthetic patches, stage by stage, with peak memory and census restarts.

The patch file (GeoPackage) and a scenario file are written to a temporary folder by a
separate process first, so that neither the generation time nor its memory counts. The run
then goes through the public API exactly as the command line does: ``load_study`` (scenario,
patches, network, system), ``run_study`` (simulate, persistence, synchrony) and
``write_run_files(maps=False)`` (``timeseries.nc`` written during the run, as the
command line does). Stage times come from wrapping the functions ``trophoscape.workflows.study``
calls (``read_patches``, ``build_network``, ``simulate``, ``persistence_table``,
``synchrony_table``); "system assembly" is what ``build_study`` spends besides reading the
patches and building the network, "analyses" is what ``run_study`` spends besides simulating.
Peak memory is the process's maximum resident set size (``ru_maxrss``), imports included.

Then the census restarts: the same system is integrated (1) by ``simulate`` as it is (the
solver restarts only when a census changed the state, with the step size it had reached),
(2) by ``simulate`` with a solver that ignores the step size it is handed (each restart
searches for a first step again), (3) by ``scipy.integrate.solve_ivp`` called once per census
interval with no ``first_step``, applying the same census between calls. Two diagnostic
variants follow: (4) restarts handed half the kept step, (5) ``atol = 1e-4`` individuals instead
of the default 1e-8. Rejected steps are counted from calls of scipy's ``rk_step`` (one per
attempted step) minus accepted steps.

Targets: end to end under 20 s; peak memory under 1 GB.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_run.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import scipy.integrate as si  # noqa: E402
import scipy.integrate._ivp.rk as rk  # noqa: E402

from common import now, table, timed_study, versions, write_study_inputs  # noqa: E402

import trophoscape.integrate.ode as simulate_module  # noqa: E402

N_PATCHES = 10_000

SCENARIO = """\
name = "benchmark: {n} synthetic patches"
time_unit = "year"

[patches]
path = "patches.gpkg"
id_field = "patch_id"
quality_field = "quality"

[prey]
growth = "logistic"
growth_rate = 1.0
capacity_density = 300.0
emigration_rate = 0.1
kernel_scale_km = 1.0
initial_density = 150.0

[predator]
mortality_rate = 0.4
conversion = 0.3
emigration_rate = 0.05
kernel_scale_km = 2.0
initial_density = 10.0

[predation]
response = "holling2"
attack_rate = 0.05
handling_time = 0.1

[dispersal]
kernel = "exponential"
max_distance_km = 2.0
distance = "boundary"
survival_per_km = 0.97

[run]
duration = 200
burn_in = 50
census_interval = 0.5
extinction_abundance = 1.0
method = "auto"
rtol = 1e-6
atol = 1e-8
"""



def census_per_interval(system, y0, *, duration, census_interval, threshold, rtol, atol):
    """Reference variant: ``solve_ivp`` once per census interval, no first_step carried."""
    times = simulate_module.census_times(duration, census_interval)
    rhs = system.rhs_function()
    y, _ = simulate_module._census(np.asarray(y0, float).copy(), threshold)
    nfev = steps = 0
    record = np.empty((times.size, y.size))
    record[0] = y
    for k in range(1, times.size):
        sol = si.solve_ivp(rhs, (times[k - 1], times[k]), y, method="RK45", rtol=rtol,
                           atol=atol)
        if sol.status != 0:
            raise RuntimeError(sol.message)
        nfev += sol.nfev
        steps += sol.t.size - 1
        y, _ = simulate_module._census(sol.y[:, -1], threshold)
        record[k] = y
    return record, nfev, steps


class ForgetfulRK45(si.RK45):
    """RK45 that ignores ``first_step``: every (re)start searches for a first step again."""

    def __init__(self, *args, first_step=None, **kwargs):
        super().__init__(*args, first_step=None, **kwargs)


class HalfStepRK45(si.RK45):
    """RK45 that restarts with half the step it is handed (a candidate fix, see README)."""

    def __init__(self, *args, first_step=None, **kwargs):
        super().__init__(*args, first_step=None if first_step is None else 0.5 * first_step,
                         **kwargs)


def main():
    print("bench_run:", versions())
    folder = Path(tempfile.mkdtemp(prefix="trophoscape-bench-"))
    t0 = time.perf_counter()
    write_study_inputs(folder, N_PATCHES, SCENARIO.format(n=N_PATCHES))
    print(f"input: {N_PATCHES:,} patches written to {folder} in "
          f"{time.perf_counter() - t0:.1f} s (separate process, not counted)")

    timed = timed_study(folder)
    STAGES, study, result = timed["stages"], timed["study"], timed["result"]
    load, run, total = timed["load"], timed["run"], timed["total"]
    base_mb, mem = timed["base_mb"], timed["peak_mb"]
    stages = [
        ("landscape (read GeoPackage, validate, areas)", STAGES["read_patches"]),
        ("network (build_network, boundary 2 km)", STAGES["build_network"]),
        ("system assembly (scenario, parameters, operators)",
         load - STAGES["read_patches"] - STAGES["build_network"]),
        ("simulate (200 years, 400 census steps; integration)",
         STAGES["simulate"] - STAGES["series_blocks"]),
        ("timeseries.nc blocks, during the run", STAGES["series_blocks"]),
        ("analyses: persistence_table", STAGES["persistence_table"]),
        ("analyses: synchrony_analysis", STAGES["synchrony_analysis"]),
        ("analyses: stability_analysis", STAGES["stability_analysis"]),
        ("analyses: capacity_analysis (both species)", STAGES["capacity_analysis"]),
        ("analyses: rest of run_study (tables, summary)",
         run - STAGES["simulate"] - STAGES["persistence_table"] - STAGES["synchrony_analysis"]
         - STAGES["stability_analysis"] - STAGES["capacity_analysis"]),
        ("write_run_files(maps=False)", timed["write"]),
        ("end to end", total),
    ]
    print()
    table([[name, f"{secs[0]:.2f}", f"{secs[1]:.2f}", f"{100 * secs[0] / total[0]:.0f}%"]
           for name, secs in stages], ["stage", "wall s", "CPU s", "share"])
    stats = result.trajectory.stats
    n_census = result.trajectory.time.size - 1
    links = result.summary["links"]
    sizes = {p.name: p.stat().st_size / 1e6 for p in (folder / "out").iterdir()}
    print(f"\n{N_PATCHES:,} patches, {links:,} links; outputs: "
          + ", ".join(f"{k} {v:.1f} MB" for k, v in sorted(sizes.items())))
    print(f"peak memory (ru_maxrss): {mem:.0f} MB (after imports, before the run: "
          f"{base_mb:.0f} MB)")
    print(f"solver: {stats.method}, steps {stats.steps}, nfev {stats.nfev}, restarts "
          f"{stats.restarts} of {n_census} census steps, nfev per census step "
          f"{stats.nfev / n_census:.1f}, nfev per solver step {stats.nfev / stats.steps:.2f}")
    print(f"target: end to end under 20 s: {total[0]:.1f} s wall ({total[1]:.1f} s CPU) -> "
          f"{'PASS' if total[0] < 20 else 'MISS'}")
    print(f"target: peak memory under 1 GB: {mem:.0f} MB -> "
          f"{'PASS' if mem < 1024 else 'MISS'}")

    # ---- census restarts: keeping the step size against throwing it away
    sc = study.scenario
    opts = dict(duration=sc["run.duration"], census_interval=sc["run.census_interval"],
                extinction_abundance=sc["run.extinction_abundance"], rtol=sc["run.rtol"],
                atol=sc["run.atol"])
    simulate = simulate_module.simulate
    rows = []

    def row(name, seconds, nfev, steps, restarts, gap="-"):
        rows.append([name, f"{seconds[0]:.2f}", f"{seconds[1]:.2f}", str(nfev), str(steps),
                     str(restarts), f"{nfev / n_census:.1f}", gap])

    t0 = now()
    keep = simulate(study.system, study.initial_state, method="RK45", **opts)
    t_keep = now() - t0
    row("simulate as is (keeps step size)", t_keep, keep.stats.nfev, keep.stats.steps,
        keep.stats.restarts)
    ref = np.concatenate([keep["prey"].values, keep["predator"].values], axis=1)

    original = simulate_module.METHODS["RK45"]
    simulate_module.METHODS["RK45"] = ForgetfulRK45
    try:
        t0 = now()
        forget = simulate(study.system, study.initial_state, method="RK45", **opts)
        t_forget = now() - t0
    finally:
        simulate_module.METHODS["RK45"] = original
    row("simulate, restarts forget step size", t_forget, forget.stats.nfev,
        forget.stats.steps, forget.stats.restarts, _gap(ref, _state(forget)))

    t0 = now()
    record, nfev, steps = census_per_interval(
        study.system, study.initial_state, duration=opts["duration"],
        census_interval=opts["census_interval"], threshold=opts["extinction_abundance"],
        rtol=opts["rtol"], atol=opts["atol"])
    t_ivp = now() - t0
    row("solve_ivp per census interval", t_ivp, nfev, steps, n_census, _gap(ref, record))

    # where the kept step goes wrong: the first step after a restart, counted by rk_step calls
    calls = [0]
    rk_step = rk.rk_step

    def counted(*args, **kwargs):
        calls[0] += 1
        return rk_step(*args, **kwargs)

    rk.rk_step = counted
    try:
        simulate(study.system, study.initial_state, method="RK45", **opts)
        rejected_keep = calls[0] - keep.stats.steps
        calls[0] = 0
        simulate_module.METHODS["RK45"] = HalfStepRK45
        t0 = now()
        half = simulate(study.system, study.initial_state, method="RK45", **opts)
        t_half = now() - t0
        rejected_half = calls[0] - half.stats.steps
    finally:
        rk.rk_step = rk_step
        simulate_module.METHODS["RK45"] = original
    row("simulate, restarts with half the kept step", t_half, half.stats.nfev,
        half.stats.steps, half.stats.restarts, _gap(ref, _state(half)))

    loose = dict(opts, atol=1e-4)
    t0 = now()
    coarse = simulate(study.system, study.initial_state, method="RK45", **loose)
    t_coarse = now() - t0
    row("simulate as is, atol = 1e-4 individuals", t_coarse, coarse.stats.nfev,
        coarse.stats.steps, coarse.stats.restarts, _gap(ref, _state(coarse)))
    print()
    table(rows, ["integration (RK45, rtol 1e-6)", "wall s", "CPU s", "nfev", "steps",
                 "restarts", "nfev/census", "final-state gap"])
    print(f"keeping the step size vs forgetting it: {t_forget[1] / t_keep[1]:.2f}x CPU time, "
          f"{forget.stats.nfev / keep.stats.nfev:.2f}x nfev; vs solve_ivp per census "
          f"interval: {t_ivp[1] / t_keep[1]:.2f}x CPU time, {nfev / keep.stats.nfev:.2f}x nfev")
    print(f"rejected steps: {rejected_keep} with the kept step ({keep.stats.restarts} "
          f"restarts), {rejected_half} when restarting with half of it")


def _state(traj):
    return np.concatenate([traj["prey"].values, traj["predator"].values], axis=1)


def _gap(ref, other):
    """Largest difference of the final state, relative to the largest final abundance."""
    return f"{np.abs(ref[-1] - other[-1]).max() / np.abs(ref[-1]).max():.1e}"


if __name__ == "__main__":
    main()
