"""End to end at scale: 10,000 and 100,000 synthetic patches, stage by stage, with peak memory.

For each size a GeoPackage of synthetic patches (``synthetic.py``, not counted) and a scenario
file are written to a temporary folder, then a fresh child process runs the study exactly as
the command line does: ``load_study`` (read the GeoPackage, build the network, assemble the
system), ``run_study`` (200 time units, a census every 0.5, so 400 census steps; persistence,
synchrony, capacity; ``[analysis] stability = false`` by default; ``timeseries.nc`` written
into the staged output folder as the run goes) and ``write_run_files(maps=False)``.
Each size runs in its own process so that its peak resident memory (``ru_maxrss``) is its own.
Stage times are wall and CPU (``time.process_time``) seconds; the machine is shared. CPU
seconds are the whole process's over the stage (all its threads, numba's included). From
20,000 patches two stages run in forked processes beside this one, on Linux with two cores:
the stability analysis (its own wall and CPU seconds reported, written back by the child;
on a second thread elsewhere, whose CPU the stages beside it then count) and the maps and
the report; their CPU is not in this process's, and their memory is reported with this
process's while each runs (PSS summed, ``common.TreeMemory``).

Targets (issue 8): cost per patch at 100,000 within 2x of that at 10,000; peak memory under 4 GB.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_scale.py
    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_scale.py --sizes 100000 \
        --stability --profile /tmp/scale.prof
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from bench_run import SCENARIO  # noqa: E402
from common import (table, timed_study, versions,  # noqa: E402
                    write_study_inputs)


def child(folder: Path, profile: str | None, kernel: str, maps: bool = False) -> dict:
    """Run one study in this process; return stage (wall, CPU) seconds and peak memory."""
    timed = timed_study(folder, profile=profile, kernel=kernel, maps=maps)
    got, load, run = timed["stages"], timed["load"], timed["run"]
    result = timed["result"]
    rows = {
        "landscape (read GeoPackage)": got["read_patches"],
        "network (boundary 2 km)": got["build_network"],
        "system assembly": load - got["read_patches"] - got["build_network"],
        "simulate (integration)": got["simulate"] - got["series_blocks"],
        "timeseries.nc blocks, during the run": got["series_blocks"],
        "analyses after the run (wall)": got["analyse"],
        "  of which persistence_table": got["persistence_table"],
        "  of which synchrony_analysis": got["synchrony_analysis"],
        "  stability_analysis (beside, from 20,000)": got["stability_analysis"],
        "  of which capacity_analysis": got["capacity_analysis"],
        "rest of run_study": run - got["simulate"] - got["analyse"],
        ("write_run_files(maps=True): files, maps, report" if maps
         else "write_run_files(maps=False)"): timed["write"],
        "end to end": timed["total"],
    }
    stats = result.trajectory.stats
    sizes = {p.name: p.stat().st_size / 1e6 for p in (folder / "out").iterdir()}
    return {"stages": {k: v.tolist() for k, v in rows.items()},
            "peak_mb": timed["peak_mb"], "base_mb": timed["base_mb"],
            "write_tree_mb": timed["write_tree_mb"],
            "analyses_tree_mb": timed["analyses_tree_mb"],
            "links": result.summary["links"],
            "solver": {"method": stats.method, "steps": stats.steps, "nfev": stats.nfev,
                       "restarts": stats.restarts,
                       "local_terms": result.summary["solver"]["local_terms"]},
            "outputs_mb": sizes}


def prepare(n: int, stability: bool, duration: float) -> Path:
    folder = Path(tempfile.mkdtemp(prefix=f"trophoscape-scale-{n}-"))
    text = SCENARIO.format(n=n).replace("duration = 200", f"duration = {duration:g}")
    # the burn-in must end before the run does
    text = text.replace("burn_in = 50", f"burn_in = {min(50.0, duration / 2):g}")
    write_study_inputs(folder, n, text + "\n[analysis]\nstability = %s\n"
                       % ("true" if stability else "false"))
    return folder


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[10_000, 100_000])
    ap.add_argument("--stability", action="store_true", help="run stability_analysis too")
    ap.add_argument("--profile", help="cProfile output file (largest size only)")
    ap.add_argument("--kernel", choices=["auto", "numpy"], default="auto",
                    help="numpy: keep the local terms on numpy at every size")
    ap.add_argument("--maps", action="store_true", help="write the maps and the report too")
    ap.add_argument("--duration", type=float, default=200.0, help="time units (default 200)")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print("RESULT " + json.dumps(child(Path(args.child), args.profile, args.kernel,
                                           args.maps)))
        return
    print("bench_scale:", versions())
    results = {}
    for n in args.sizes:
        folder = prepare(n, args.stability, args.duration)
        cmd = [sys.executable, __file__, "--child", str(folder), "--kernel", args.kernel]
        if args.maps:
            cmd.append("--maps")
        if args.profile and n == max(args.sizes):
            cmd += ["--profile", args.profile]
        t0 = time.perf_counter()
        out = subprocess.run(cmd, check=True, capture_output=True, text=True,
                             env={**os.environ, "PYTHONPATH": os.environ.get("PYTHONPATH", "src")})
        line = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT ")][-1]
        results[n] = json.loads(line[7:])
        r = results[n]
        print(f"\n{n:,} patches, {r['links']:,} links ({time.perf_counter() - t0:.0f} s in the "
              f"child); peak RSS {r['peak_mb']:.0f} MB (imports {r['base_mb']:.0f} MB); while the "
              f"analyses run, with the stability's process (PSS summed) "
              f"{r['analyses_tree_mb']:.0f} MB; while the files are written, with the maps' "
              f"process {r['write_tree_mb']:.0f} MB; solver "
              f"{r['solver']}; outputs " + ", ".join(f"{k} {v:.1f} MB"
                                                    for k, v in sorted(r["outputs_mb"].items())))
        total = np.array(r["stages"]["end to end"])
        table([[k, f"{v[0]:.2f}", f"{v[1]:.2f}", f"{100 * v[0] / total[0]:.0f}%",
                f"{v[1] / n * 1e6:.0f}"] for k, v in r["stages"].items()],
              ["stage", "wall s", "CPU s", "share", "CPU us/patch"])
    if len(results) >= 2:
        small, big = min(results), max(results)
        print()
        for k in results[small]["stages"]:
            a = np.array(results[small]["stages"][k]) / small
            b = np.array(results[big]["stages"][k]) / big
            if a[1] > 0:
                print(f"  per-patch ratio {big:,} / {small:,}, {k}: {b[1] / a[1]:.2f}x CPU, "
                      f"{b[0] / a[0]:.2f}x wall")
        a = np.array(results[small]["stages"]["end to end"]) / small
        b = np.array(results[big]["stages"]["end to end"]) / big
        print(f"target: cost per patch at {big:,} within 2x of {small:,}: {b[1] / a[1]:.2f}x CPU "
              f"({b[0] / a[0]:.2f}x wall) -> {'PASS' if b[1] / a[1] <= 2 else 'MISS'}")
    for n, r in results.items():
        # the processes of the maps and of the stability analysis counted
        peak = max(r["peak_mb"], r["write_tree_mb"], r["analyses_tree_mb"])
        print(f"target: peak memory under 4 GB at {n:,}: {peak:.0f} MB -> "
              f"{'PASS' if peak < 4096 else 'MISS'}")


if __name__ == "__main__":
    main()
