"""A 64-run sweep: one worker against all cores, and the Dask path against the local pool.

The scenario is a 6 × 6 grid of 1 km² patches 2 km apart (``trophoscape.testing``), written
to a GeoPackage in a temporary folder, with the benchmark model of ``common.py`` (logistic
prey, K = 300 per km², Holling II) and 200 years at a census every 0.5. The sweep varies
``prey.growth_rate`` over 16 values and ``dispersal.max_distance_km`` over 4 (64 runs), and
goes through the public API, :func:`trophoscape.report.sweep.sweep`, as the command line does
(ledger, per-run JSON, ``sweep.csv``; plots off, as they are the same work for every
executor). Times are wall-clock seconds of the whole call: starting the pool or cluster,
running, recording, writing the table. ``trophoscape.workflows.study`` is imported before any timing,
so the one-worker run does not pay the imports; forked local workers inherit them, while
Dask workers (started with ``spawn``) import them again, which is part of the Dask overhead.

The executors must give the same table; the script checks that first.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_sweep.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

import pandas as pd  # noqa: E402

from common import LOCAL, table, versions  # noqa: E402
import trophoscape.workflows.study  # noqa: E402,F401  (imports paid before timing)
from trophoscape.workflows.tasks import default_workers
from trophoscape.report.sweep import sweep
from trophoscape.workflows.sweep import TIME_COLUMNS
from trophoscape.testing import grid_landscape

SCENARIO = f"""
name = "sweep benchmark"

[patches]
path = "grid.gpkg"
id_field = "patch_id"

[prey]
capacity_density = {LOCAL['capacity_density']}
initial_density = 150.0

[predator]
initial_density = 10.0
mortality_rate = {LOCAL['mortality']}
conversion = {LOCAL['conversion']}

[predation]
attack_rate = {LOCAL['attack_rate']}
handling_time = {LOCAL['handling_time']}

[run]
duration = 200.0
burn_in = 50.0
census_interval = 0.5
"""
VARY = ["prey.growth_rate=0.6:1.4:16", "dispersal.max_distance_km=2,4,6,8"]


def timed(label, scenario, folder, **executor):
    t0 = time.perf_counter()
    frame = sweep(scenario, VARY, out=folder / label, plots=False, **executor)
    wall = time.perf_counter() - t0
    assert (frame["status"] == "ok").all(), frame.loc[frame["status"] != "ok", "error"]
    return wall, frame


def cluster_start_stop(n):
    """Seconds to start a LocalCluster of ``n`` workers, connect, and close it (no tasks)."""
    from dask.distributed import Client, LocalCluster

    t0 = time.perf_counter()
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, host="127.0.0.1",
                           dashboard_address=None, processes=True)
    Client(cluster).close()
    cluster.close()
    return time.perf_counter() - t0


def main():
    cores = default_workers()
    load = os.getloadavg()[0]
    startup = None
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        grid_landscape(6, 6, spacing_km=2.0, size_km=1.0).frame.to_file(
            folder / "grid.gpkg", driver="GPKG", engine="pyogrio")
        scenario = folder / "bench.toml"
        scenario.write_text(SCENARIO, encoding="utf-8")
        runs = {}
        runs["local pool, 1 worker"] = timed("one", scenario, folder, workers=1)
        runs[f"local pool, {cores} workers"] = timed("pool", scenario, folder, workers=cores)
        try:
            import distributed  # noqa: F401
        except ImportError:
            print("dask.distributed is not installed: the Dask rows are left out")
        else:
            runs[f"Dask LocalCluster, {cores} workers"] = timed("dask", scenario, folder,
                                                              dask_local=cores)
            startup = cluster_start_stop(cores)
    frames = [f.drop(columns=list(TIME_COLUMNS)) for _, f in runs.values()]
    same = all(f.equals(frames[0]) for f in frames[1:])
    print(f"sweep benchmark: 64 runs of a 36-patch scenario; {versions()}")
    print(f"load average (1 min) before: {load:.2f}, after: {os.getloadavg()[0]:.2f}")
    print(f"every executor gives the same table: {'yes' if same else 'NO'}")
    one = runs["local pool, 1 worker"][0]
    pool = runs[f"local pool, {cores} workers"][0]
    rows = []
    for label, (wall, frame) in runs.items():
        per_run = pd.to_numeric(frame["seconds"]).median()
        rows.append([label, f"{wall:.2f}", f"{len(frame) / wall:.2f}", f"{per_run:.3f}",
                     f"{one / wall:.2f}x", f"{wall - pool:+.2f}"])
    table(rows, ["executor", "wall s", "runs/s", "median s per run", "speed-up vs 1",
                 "vs local pool s"])
    if startup is not None:
        print(f"of the Dask overhead, starting and stopping an idle LocalCluster of {cores} "
              f"workers takes {startup:.2f} s")


if __name__ == "__main__":
    main()
