"""Synchrony analyses on 10,000 patches × 2,000 census steps, without an n × n matrix.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_synchrony.py

The series are synthetic (AR(1) noise with a shared regional component), the links come
from a cKDTree over random points (about 6 per patch); the figures are times per stage and
peak memory, against an n × n float64 matrix (800 MB at 10,000 patches) that is never built.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import resource  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402
from scipy.spatial import cKDTree  # noqa: E402

from trophoscape.analysis import synchrony as sy

N, T = 10_000, 2_000


def series(rng):
    shared = np.cumsum(rng.standard_normal(T)) * 0.02
    x = np.empty((T, N), dtype=np.float64)
    x[0] = rng.standard_normal(N)
    noise = rng.standard_normal((T, N))
    for t in range(1, T):  # synthetic input, not the analysis
        x[t] = 0.7 * x[t - 1] + noise[t]
    return np.expm1(5.0 + 0.05 * x + shared[:, None])


def main():
    rng = np.random.default_rng(2026)
    points = rng.uniform(0, 100_000, (N, 2))
    pairs = cKDTree(points).query_pairs(r=1_400.0, output_type="ndarray")
    source = np.concatenate([pairs[:, 0], pairs[:, 1]])
    target = np.concatenate([pairs[:, 1], pairs[:, 0]])
    abundance = series(rng)
    data = xr.Dataset({"prey": (("time", "patch"), abundance),
                       "predator": (("time", "patch"), abundance[:, ::-1].copy())},
                      coords={"time": np.arange(T, dtype=float),
                              "patch": np.array([f"P{i}" for i in range(N)], dtype=object)})
    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    weights = {s: np.ones(source.size) for s in ("prey", "predator")}
    stages = {}
    t0 = time.process_time()
    sy.synchrony_table(data, burn_in=0.0, source=source, target=target, weights=weights)
    stages["synchrony_table (local, region, all, mean pairwise)"] = time.process_time() - t0
    t0 = time.process_time()
    sy.synchrony_analysis(data, burn_in=0.0, source=source, target=target, weights=weights,
                          centroids=points, seed=0)
    stages["synchrony_analysis (everything, both species)"] = time.process_time() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{N:,} patches x {T:,} census steps, {source.size:,} arcs; data "
          f"{abundance.nbytes / 2**20 * 2:.0f} MB; a dense n x n matrix would be "
          f"{N * N * 8 / 2**20:.0f} MB")
    for name, secs in stages.items():
        print(f"{name:55s} {secs:7.2f} s CPU")
    print(f"peak memory (ru_maxrss): {peak:.0f} MB (before the analyses: {base:.0f} MB)")


if __name__ == "__main__":
    main()
