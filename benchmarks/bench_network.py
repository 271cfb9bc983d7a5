"""Time of build_network on synthetic polygon landscapes (10,000 and 100,000 patches).

Boundary distance (shapely STRtree, ``dwithin``) with max_distance_km = 2.0 and centroid
distance (scipy cKDTree) with max_distance_km = 3.0; both give about 8-9 links per patch on
these landscapes. Each case is built twice and the faster time is kept. The boundary case is
also split into its main parts (index query, exact distances, the rest of build_network).
Target: 100,000 polygons (boundary distance) in under 15 s.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_network.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import time  # noqa: E402

import numpy as np  # noqa: E402
import shapely  # noqa: E402

from common import MAX_DISTANCE_KM, table, versions  # noqa: E402
from synthetic import synthetic_landscape  # noqa: E402
from trophoscape.model.network import build_network


def timed(fn, repeats=2):
    """Best wall seconds, best CPU seconds (the machine is shared) and the last result."""
    best, cpu, out = np.inf, np.inf, None
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        best = min(best, time.perf_counter() - t0)
        cpu = min(cpu, time.process_time() - c0)
    return best, cpu, out


def boundary_parts(land, max_km):
    """Seconds spent in the STRtree query and in the exact distances of the boundary case."""
    geoms = land.geometries
    t0 = time.perf_counter()
    found = shapely.STRtree(geoms).query(geoms, predicate="dwithin", distance=max_km * 1000.0)
    t1 = time.perf_counter()
    upper = found[0] < found[1]
    shapely.distance(geoms[found[0][upper]], geoms[found[1][upper]])
    t2 = time.perf_counter()
    return t1 - t0, t2 - t1


def main():
    print("bench_network:", versions())
    rows, results = [], {}
    for n in (10_000, 100_000):
        land = synthetic_landscape(n)
        for distance in ("boundary", "centroid"):
            max_km = MAX_DISTANCE_KM[distance]
            secs, cpu, net = timed(lambda: build_network(land, kernel="exponential",
                                                    distance=distance, max_distance_km=max_km))
            lpp = net.links_per_patch()
            parts = "-"
            if distance == "boundary":
                q, d = boundary_parts(land, max_km)
                parts = f"query {q:.2f} + distance {d:.2f} + rest {max(secs - q - d, 0):.2f}"
            results[(n, distance)] = secs
            rows.append([f"{n:,}", distance, f"{max_km:g}", f"{secs:.2f}", f"{cpu:.2f}",
                         f"{secs / n * 1e6:.1f}", f"{net.n_links:,}", f"{lpp.mean():.1f}",
                         f"{np.percentile(lpp, 5):.0f}-{np.percentile(lpp, 95):.0f}",
                         f"{(lpp == 0).sum()}", parts])
    print()
    table(rows, ["patches", "distance", "max km", "wall s", "CPU s", "us/patch", "links",
                 "links/patch", "5-95%", "isolated", "boundary split (s)"])
    t = results[(100_000, "boundary")]
    print()
    print(f"target: 100,000 polygons (boundary) under 15 s: {t:.1f} s -> "
          f"{'PASS' if t < 15 else 'MISS'}; growth 10k -> 100k: "
          f"{t / results[(10_000, 'boundary')]:.1f}x (boundary), "
          f"{results[(100_000, 'centroid')] / results[(10_000, 'centroid')]:.1f}x (centroid)")


if __name__ == "__main__":
    main()
