"""Solver choice: explicit against implicit methods on a non-stiff and a stiff 1,000-patch run.

The 1,000-patch synthetic landscape of the other benchmarks (boundary distance, 2 km) is run
for 100 time units with a census every 0.5 and no quasi-extinction (threshold 0, so no
restarts and every method integrates the same ODE), from the start state of ``common.py``.
Cases: the benchmark's own dispersal (emigration 0.1 and 0.05 per year against local rates
of about 1: non-stiff), and a stiff one with emigration rates 50x the local rates (prey 50,
predator 50 x 0.4 = 20), plus intermediate multipliers to locate where the methods cross.

Methods: RK45, DOP853 (explicit); BDF with the sparse analytic Jacobian (sparse LU); LSODA
(scipy's, which gets no Jacobian from ``simulate`` and forms a dense one by differences);
BDF whose Newton systems are solved by GMRES with an incomplete-LU preconditioner (a
subclass that swaps scipy's LU functions, "BDF-GMRES"); and Strang splitting (Strang 1968,
SIAM J. Numer. Anal. 5:506): half a step of the local dynamics (RK45 per half step, tolerances
as the run's), a full step of dispersal by ``scipy.sparse.linalg.expm_multiply``, half a step
of local dynamics, with fixed steps of 0.5/k. The error is the largest absolute difference from
a DOP853 run at rtol = atol = 1e-10 over every census, relative to the largest abundance.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_solvers.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import time  # noqa: E402

import numpy as np  # noqa: E402
import scipy.integrate as si  # noqa: E402
import scipy.sparse as sp  # noqa: E402
import scipy.sparse.linalg as sla  # noqa: E402

import common  # noqa: E402
from common import assemble, table, versions  # noqa: E402
from synthetic import synthetic_landscape  # noqa: E402
import trophoscape.integrate.ode as simulate_module  # noqa: E402
from trophoscape.model.system import CoupledSystem

N = 1_000
DURATION = 100.0
CENSUS = 0.5
RTOL, ATOL = 1e-6, 1e-8


class KrylovBDF(si.BDF):
    """scipy's BDF with its sparse LU replaced by ILU-preconditioned GMRES."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)

        def lu(a):
            self.nlu += 1
            a = sp.csc_matrix(a)
            ilu = sla.spilu(a, drop_tol=1e-5, fill_factor=4)
            return a, sla.LinearOperator(a.shape, ilu.solve)

        def solve_lu(factors, b):
            a, pre = factors
            x, info = sla.gmres(a, b, M=pre, rtol=1e-10, atol=0.0, restart=30, maxiter=50)
            return x

        self.lu = lu
        self.solve_lu = solve_lu


simulate_module.METHODS["BDF-GMRES"] = KrylovBDF
simulate_module.IMPLICIT = (*simulate_module.IMPLICIT, "BDF-GMRES")


def strang(system, y0, k):
    """Strang splitting with ``k`` steps per census interval; returns the census record."""
    n = system.n_patches
    local = CoupledSystem(model=system.model, area_km2=system.area_km2,
                          prey_movement=sp.csr_array((n, n)),
                          predator_movement=sp.csr_array((n, n)), order="none")
    f = local.rhs_function()
    h = CENSUS / k
    mh = sp.csr_array(system.movement * h)
    times = simulate_module.census_times(DURATION, CENSUS)
    y = np.asarray(y0, float).copy()
    record = np.empty((times.size, y.size))
    record[0] = y
    nfev = 0

    def half(y):
        nonlocal nfev
        sol = si.solve_ivp(f, (0.0, h / 2), y, method="RK45", rtol=RTOL, atol=ATOL)
        nfev += sol.nfev
        return sol.y[:, -1]

    for c in range(1, times.size):
        for _ in range(k):
            y = half(y)
            y = sla.expm_multiply(mh, y)
            y = half(y)
        record[c] = y
    return record, nfev


def run(system, y0, method, rtol=RTOL, atol=ATOL):
    t0, c0 = time.perf_counter(), time.process_time()
    traj = simulate_module.simulate(system, y0, duration=DURATION, census_interval=CENSUS,
                                    extinction_abundance=0.0, method=method, rtol=rtol,
                                    atol=atol)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    rec = np.concatenate([traj["prey"].values, traj["predator"].values], axis=1)
    return rec, wall, cpu, traj.stats


def main():
    print("bench_solvers:", versions())
    land = synthetic_landscape(N)
    rows, picks = [], []
    base = {s: dict(d) for s, d in common.DISPERSAL.items()}
    cases = [("non-stiff", None), ("x2", None), ("x10", None), ("stiff (50x local)", None)]
    # emigration multipliers: the benchmark's rates, then rates set to m x the local rates
    multipliers = {"non-stiff": None, "x2": 2.0, "x10": 10.0,
                   "stiff (50x local)": 50.0}
    for name, _ in cases:
        mult = multipliers[name]
        if mult is None:
            common.DISPERSAL.update({s: dict(d) for s, d in base.items()})
        else:  # prey against r = 1, predator against m = 0.4
            common.DISPERSAL["prey"]["emigration_rate"] = mult * common.LOCAL["growth_rate"]
            common.DISPERSAL["predator"]["emigration_rate"] = mult * common.LOCAL["mortality"]
        net, _, system, y0 = assemble(land, distance="boundary")
        ratio = system.stiffness_ratio(y0)
        label = f"{name} (ε {common.DISPERSAL['prey']['emigration_rate']:g}/" \
                f"{common.DISPERSAL['predator']['emigration_rate']:g})"
        ref, wall, cpu, _ = run(system, y0, "DOP853", rtol=1e-10, atol=1e-10)
        scale = np.abs(ref).max()
        rows.append([label, f"{ratio:.3g}", "DOP853 1e-10 (reference)", f"{wall:.2f}",
                     f"{cpu:.2f}", "-", "-", "-", "0"])
        best = {}
        for method in ("RK45", "DOP853", "BDF", "BDF-GMRES", "LSODA"):
            if method == "LSODA" and mult is not None and mult >= 10:
                rows.append([label, f"{ratio:.3g}", method, "skipped", "-", "-", "-", "-",
                             "dense finite-difference Jacobian of 2,000 unknowns"])
                continue
            try:
                rec, wall, cpu, st = run(system, y0, method)
            except Exception as exc:  # report and go on
                rows.append([label, f"{ratio:.3g}", method, "failed", "-", "-", "-", "-",
                             str(exc)[:40]])
                continue
            err = np.abs(rec - ref).max() / scale
            best[method] = cpu
            rows.append([label, f"{ratio:.3g}", method, f"{wall:.2f}", f"{cpu:.2f}",
                         str(st.nfev), str(st.njev), str(st.nlu), f"{err:.1e}"])
        for k in (1, 5):
            t0, c0 = time.perf_counter(), time.process_time()
            rec, nfev = strang(system, y0, k)
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            err = np.abs(rec - ref).max() / scale
            best[f"Strang h={CENSUS / k:g}"] = cpu
            rows.append([label, f"{ratio:.3g}", f"Strang, h = {CENSUS / k:g}", f"{wall:.2f}",
                         f"{cpu:.2f}", str(nfev), "-", "-", f"{err:.1e}"])
        fastest = min((m for m in best if not m.startswith("Strang")), key=best.get)
        picks.append((label, ratio, fastest, best))
    print()
    table(rows, ["case", "stiffness", "method", "wall s", "CPU s", "nfev", "njev", "nlu",
                 "rel. error"])
    print()
    for label, ratio, fastest, best in picks:
        print(f"{label}: stiffness ratio {ratio:.3g}; fastest scipy method {fastest} "
              f"({best[fastest]:.2f} s CPU); " + ", ".join(f"{m} {t:.2f}" for m, t in best.items()))


if __name__ == "__main__":
    main()
