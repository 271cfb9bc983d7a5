"""Why a 100,000-patch run takes more solver steps per time unit than a 10,000-patch run.

For each size the synthetic landscape (``synthetic.py``) and the benchmark model
(``common.assemble``) are integrated for ``WARM`` time units without the census (so that the
census restarts play no part), counting RHS evaluations per time unit. From the state then
reached, one RK45 trial step of a fixed size ``h`` is taken by hand, and its error estimate
is split by component the way scipy's RK45 weighs it: ``e_i = err_i / (atol + rtol |y_i|)``,
and the step is accepted when ``sqrt(mean(e_i^2)) <= 1``. The script reports which share of
``sum(e_i^2)`` the largest components carry, and which patches they are.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_steps.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import scipy.integrate as si  # noqa: E402
from scipy.integrate._ivp.rk import rk_step  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import assemble, table, versions  # noqa: E402
from synthetic import synthetic_landscape  # noqa: E402

from trophoscape.integrate.ode import simulate

WARM = 10.0
RTOL, ATOL = 1e-6, 1e-8
STEPS = (0.05, 0.2)


def trial_step(rhs, y, h):
    """Scaled squared error of each component for one RK45 step of size ``h`` from ``y``."""
    solver = si.RK45(rhs, 0.0, y, 1.0, first_step=h, rtol=RTOL, atol=ATOL)
    # scipy's own step (a private helper; the solver's step() would adapt h)
    y_new, _ = rk_step(rhs, 0.0, y, solver.f, h, solver.A, solver.B, solver.C, solver.K)
    err = h * (solver.K.T @ solver.E)
    scale = ATOL + np.maximum(np.abs(y), np.abs(y_new)) * RTOL
    return (err / scale) ** 2


def main():
    print("bench_steps:", versions())
    rows, worst = [], []
    for n in (10_000, 100_000):
        land = synthetic_landscape(n)
        _, model, system, y0 = assemble(land)
        traj = simulate(system, y0, duration=WARM, census_interval=0.5, extinction_abundance=0.0)
        y = np.concatenate([traj["prey"].values[-1], traj["predator"].values[-1]])
        rhs = system.rhs_function()
        area = np.concatenate([land.area_km2, land.area_km2])
        for h in STEPS:
            e = trial_step(rhs, y, h)
            top = np.argsort(e)[::-1]
            total = e.sum()
            rows.append([f"{n:,}", f"{traj.stats.nfev / WARM:.1f}", f"{h:g}",
                         f"{np.sqrt(e.mean()):.3g}", f"{e[top[0]] / total:.3f}",
                         f"{e[top[:10]].sum() / total:.3f}", f"{np.median(e):.2g}"])
        i = top[0]
        dens = y / area
        j = i % n
        worst.append([f"{n:,}", "prey" if i < n else "predator", str(j), f"{land.area_km2[j]:.4f}",
                      f"{y[i]:.3g}", f"{dens[j]:.3g}", f"{dens[n + j]:.3g}",
                      f"{land.area_km2.min():.4f}"])
    print(f"\nRHS evaluations per time unit without census, and the error of one RK45 trial step "
          f"(rtol {RTOL:g}, atol {ATOL:g}) from the state at t = {WARM:g}")
    table(rows, ["patches", "nfev / time", "h", "RMS scaled error", "share of largest",
                 "share of 10 largest", "median e^2"])
    print("\nThe component with the largest error")
    table(worst, ["patches", "species", "patch", "area km2", "abundance", "prey / km2",
                  "predator / km2", "smallest area km2"])


if __name__ == "__main__":
    main()
