"""Whole integrations in the internal patch order against the user's order, at 1,000,000 patches.

``simulate`` integrates a reordered system (``CoupledSystem(order=...)``) in its internal
order with explicit methods: the state stays in that order between census steps, and only
the census record and the shocks see the user's order. This script times ``simulate`` on the
1,000,000 point patches of ``bench_rhs.point_system`` (shuffled feature order, about 11
links per patch) for ``DURATION`` time units with a census every 0.5, in the user's order
(``order="none"``), in the order ``"auto"`` picks (reverse Cuthill–McKee, rows grouped by
length) and in a Hilbert order over the centroids. CPU seconds of this process; the time to
find the order is reported apart. It also checks that every run records the same trajectory.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_order.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_rhs import point_system  # noqa: E402
from common import peak_mb, table, versions  # noqa: E402

from trophoscape.integrate.ode import simulate
from trophoscape.model.system import CoupledSystem, spatial_order

N = 1_000_000
DURATION = 5.0


def main():
    print("bench_order:", versions())
    model, area, ops, centroids, y0, links = point_system(N, shuffle=True)
    print(f"{N:,} point patches, {links:,} links, {DURATION:g} time units, census 0.5")
    rows, reference = [], None
    for label in ("user order", "auto (RCM, rows grouped)", "Hilbert"):
        t0 = time.process_time()
        order = {"user order": "none", "auto (RCM, rows grouped)": "auto",
                 "Hilbert": None}[label]
        if order is None:
            order = spatial_order(centroids)
        system = CoupledSystem(model=model, area_km2=area, prey_movement=ops[0],
                               predator_movement=ops[1], order=order)
        setup = time.process_time() - t0
        t0 = time.process_time()
        traj = simulate(system, y0, duration=DURATION, census_interval=0.5)
        print(f"  {label}: {time.process_time() - t0:.1f} s CPU", flush=True)
        cpu = time.process_time() - t0
        prey = traj["prey"].values
        if reference is None:
            reference, base = prey, cpu
            gap = 0.0
        else:
            gap = float(np.abs(prey - reference).max() / np.abs(reference).max())
        st = traj.stats
        rows.append([label, "yes" if system.reordered else "no", f"{setup:.2f}", f"{cpu:.1f}",
                     f"{st.nfev:,}", f"{1e3 * cpu / st.nfev:.1f}", f"{base / cpu:.2f}x", f"{gap:.1e}"])
    table(rows, ["order", "reordered", "setup s", "simulate CPU s", "nfev", "ms per nfev",
                 "speed-up", "max gap"])
    print(f"peak RSS {peak_mb():.0f} MB")


if __name__ == "__main__":
    main()
