"""Replicates with environmental noise: stacked (one block-diagonal system) against one by one.

Case 1: the bundled demo (``data/demo.toml``, every patch of it) with environmental noise on
(``environmental_sd = 0.2``, ``correlation_km = 2``, ``autocorrelation = 0.3``), 100
replicates, duration shortened to ``DEMO_DURATION`` years (census every 0.5 years).
Case 2: a 4 × 5 grid of 20 patches (``benchmarks/common.py`` model), the same noise,
256 replicates, duration ``GRID_DURATION``.

Each case times :func:`trophoscape.workflows.study.simulate_replicates` only (no analyses) as CPU
seconds of this process, stacked and one by one, and reports the ratio. It also times the
per-interval cost of the noise itself: drawing the field and rebuilding the system's
parameters (``NoiseRun.interval``: a new ``LocalModel`` swapped into the ``CoupledSystem``
with ``with_model``, which shares the movement operators instead of rebuilding them).

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_replicates.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import per_call, table, versions  # noqa: E402

from trophoscape.integrate.replicates import stack_system
from trophoscape.scenario import parse_scenario, read_scenario
from trophoscape.workflows.study import build_study, noise_model, run_seeds, simulate_replicates

ROOT = Path(__file__).resolve().parents[1]
DEMO_DURATION = 50.0
GRID_DURATION = 100.0
NOISE = {"environmental_sd": 0.2, "correlation_km": 2.0, "autocorrelation": 0.3}


def demo_study(replicates):
    sc = read_scenario(ROOT / "data" / "demo.toml")
    sc = sc.with_values(run__duration=DEMO_DURATION, run__burn_in=10.0,
                        run__replicates=replicates,
                        **{f"noise__{k}": v for k, v in NOISE.items()})
    return build_study(sc)


def grid_study(replicates, folder):
    from trophoscape.testing import grid_landscape

    land = grid_landscape(4, 5, spacing_km=1.5, size_km=1.0)
    frame = land.frame.copy()
    frame["quality"] = np.linspace(0.5, 1.5, land.n_patches)
    path = Path(folder) / "grid20.gpkg"
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    raw = {"patches": {"path": str(path), "id_field": "patch_id", "quality_field": "quality"},
           "prey": {"capacity_density": 300.0, "kernel_scale_km": 1.0,
                    "initial_density": 150.0},
           "predator": {"mortality_rate": 0.4, "conversion": 0.3, "initial_density": 10.0},
           "predation": {"attack_rate": 0.05, "handling_time": 0.1},
           "dispersal": {"max_distance_km": 2.0},
           "run": {"duration": GRID_DURATION, "burn_in": 10.0, "replicates": replicates},
           "noise": dict(NOISE)}
    return build_study(parse_scenario(raw, base_dir=path.parent))


def timed(fn):
    t0 = time.process_time()
    out = fn()
    return time.process_time() - t0, out


def compare(name, study):
    seeds = run_seeds(study.scenario)
    noise = noise_model(study, seeds)
    t_stack, a = timed(lambda: simulate_replicates(study, seeds=seeds, noise=noise,
                                                   stacked=True))
    t_one, b = timed(lambda: simulate_replicates(study, seeds=seeds, noise=noise,
                                                 stacked=False))
    diff = float(np.nanmax(np.abs(a.data["prey"].values - b.data["prey"].values)
                           / (1.0 + np.abs(b.data["prey"].values))))
    return [name, str(study.landscape.n_patches), str(len(seeds)), f"{t_stack:.2f}",
            f"{t_one:.2f}", f"{t_one / t_stack:.1f}x", f"{a.stats.nfev}", f"{b.stats.nfev}",
            f"{diff:.1e}"]


def interval_cost(name, study):
    seeds = run_seeds(study.scenario)
    noise = noise_model(study, seeds)
    rows = []
    for label, system, model in (
            ("one replicate", study.system, noise.for_replicates(0)),
            (f"stacked x{len(seeds)}", stack_system(study.system, len(seeds)), noise)):
        run = model.start()
        cost = per_call(lambda: run.interval(system), budget_s=1.0)
        rhs = system.rhs_function()
        y = np.ones(system.n_state)
        rhs_cost = per_call(lambda: rhs(0.0, y), budget_s=0.5)
        rows.append([name, label, f"{cost * 1e3:.3f}", f"{rhs_cost * 1e3:.3f}",
                     f"{cost / rhs_cost:.1f}"])
    return rows


def main():
    import tempfile

    print(versions())
    with tempfile.TemporaryDirectory() as tmp:
        demo, grid = demo_study(100), grid_study(256, tmp)
        print(f"\nReplicates, CPU seconds of simulate_replicates (demo: {DEMO_DURATION:g} years, "
              f"grid: {GRID_DURATION:g} years; census 0.5 years)")
        table([compare("demo", demo), compare("grid 4x5", grid)],
              ["case", "patches", "replicates", "stacked s", "one by one s", "ratio",
               "nfev stacked", "nfev one by one", "max rel diff"])
        print("\nNoise per census interval: draw the field and rebuild the system (ms), "
              "against one RHS evaluation")
        table(interval_cost("demo", demo) + interval_cost("grid 4x5", grid),
              ["case", "system", "interval ms", "rhs ms", "interval / rhs"])


if __name__ == "__main__":
    main()
