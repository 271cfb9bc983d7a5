"""What the quasi-extinction rule costs the ODE solver: one run with the threshold at 0 (no
removals) and one with the scenario's threshold of 1 individual, on the ``bench_run``
synthetic study of N patches, census every 0.5.

It builds the study as ``bench_run`` does (``common.write_study_inputs``, then
``load_study``) and calls ``simulate`` directly, so only the integration is timed. Printed
per run: wall time, RHS evaluations, steps, restarts (steps taken again over a region, for
removals or, from 1,000 patches, for the patches a step left over the tolerance; the census
restarts nothing), removals per species, and peak memory of the process.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_removals.py 10000 20
    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_removals.py 100000 2
"""

from __future__ import annotations

import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_run import SCENARIO  # noqa: E402
from common import write_study_inputs  # noqa: E402

import trophoscape as ts  # noqa: E402
from trophoscape.integrate.ode import simulate


def main(n: int, duration: float) -> None:
    folder = Path(tempfile.mkdtemp())
    write_study_inputs(folder, n, SCENARIO)
    study = ts.load_study(folder / "scenario.toml")
    for threshold in (0.0, 1.0):
        start = time.perf_counter()
        traj = simulate(study.system, study.initial_state, duration=duration,
                        census_interval=0.5, extinction_abundance=threshold)
        st = traj.stats
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss // 1024
        print(f"{n} patches, {duration:g} time units, threshold {threshold:g}: "
              f"{time.perf_counter() - start:.1f} s, {st.nfev} RHS, {st.steps} steps, "
              f"{st.restarts} restarts, removals {st.removals}, peak {peak} MB", flush=True)


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 10_000,
         float(sys.argv[2]) if len(sys.argv) > 2 else 20.0)
