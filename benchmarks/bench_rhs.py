"""Speed of the coupled right-hand side against a naive per-patch loop over a networkx graph.

For 1,000 and 10,000 synthetic patches both right-hand sides are built from the same network
(boundary distance, about 8 links per patch), checked to give the same dy/dt
(``np.allclose``), then timed. The naive one is what a user would write by hand: a Python loop
over the graph's nodes computing the local logistic / Holling type II terms, and for each node
a loop over its neighbours adding the dispersal flows; its dispersal coefficients are worked
out in plain Python from the link distances (not taken from trophoscape's operator), so the
check also checks the movement operator. At 100,000 patches only the vectorized RHS is timed.

Cost is given in ns per (patch + link) per call, with links = distinct linked pairs.
Targets: vectorized >= 200x faster than the loop at 1,000 patches; the cost per
(patch + link) at 100,000 within 1.3x of that at 10,000.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_rhs.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import math  # noqa: E402
import time  # noqa: E402

import networkx as nx  # noqa: E402
import numpy as np  # noqa: E402

from common import (DISPERSAL, LOCAL, SURVIVAL_PER_KM, assemble, per_call,  # noqa: E402
                    table, versions)
from synthetic import synthetic_landscape  # noqa: E402


def naive_graph(landscape, network):
    """A networkx DiGraph with everything the hand-written loop needs as plain floats.

    Node i: area, K, prey/predator emigration rate (0 for a patch with no links: it sends
    nobody). Edge i -> j: per-capita rate at which each species' individuals of i arrive in
    j, ``eps_i * survival**d * w_ij / sum_k w_ik`` with an exponential kernel ``w = exp(-d/L)``.
    """
    g = nx.DiGraph()
    area = landscape.area_km2.tolist()
    capacity = (LOCAL["capacity_density"]
                * landscape.frame["quality"].to_numpy(dtype=float)).tolist()
    for i in range(landscape.n_patches):
        g.add_node(i, area=area[i], K=capacity[i], out_prey=0.0, out_predator=0.0)
    for i, j, d in zip(network.source.tolist(), network.target.tolist(),
                       network.distance_km.tolist()):
        g.add_edge(i, j, distance=d)
    for i in g.nodes:
        nbrs = g[i]
        if not nbrs:
            continue
        for s, disp in DISPERSAL.items():
            w = {j: math.exp(-e["distance"] / disp["scale_km"]) for j, e in nbrs.items()}
            total = sum(w.values())
            for j, e in nbrs.items():
                e[f"to_{s}"] = (disp["emigration_rate"] * SURVIVAL_PER_KM ** e["distance"]
                                * w[j] / total)
            g.nodes[i][f"out_{s}"] = disp["emigration_rate"]
    return g


def naive_rhs_function(g):
    """The hand-written RHS: one Python pass over nodes, and over each node's neighbours."""
    n = g.number_of_nodes()
    r, a, h = LOCAL["growth_rate"], LOCAL["attack_rate"], LOCAL["handling_time"]
    e, m = LOCAL["conversion"], LOCAL["mortality"]

    def rhs(t, y):
        dy = np.zeros(2 * n)
        for i, node in g.nodes(data=True):
            A = node["area"]
            N = max(y[i], 0.0)
            P = max(y[n + i], 0.0)
            dn, dp = N / A, P / A
            f = a * dn / (1.0 + a * h * dn)
            dy[i] += A * (r * dn * (1.0 - dn / node["K"]) - f * dp)
            dy[n + i] += A * (e * f * dp - m * dp)
            dy[i] -= node["out_prey"] * N
            dy[n + i] -= node["out_predator"] * P
            for j, link in g[i].items():
                dy[j] += link["to_prey"] * N
                dy[n + j] += link["to_predator"] * P
        return dy

    return rhs


def main():
    print("bench_rhs:", versions())
    rows, cost = [], {}
    rng = np.random.default_rng(7)
    for n, naive, shuffle in ((1_000, True, False), (10_000, True, False),
                              (100_000, False, False), (10_000, False, True),
                              (100_000, False, True)):
        t0 = time.perf_counter()
        land = synthetic_landscape(n, shuffle=shuffle)
        net, _, system, y0 = assemble(land, distance="boundary")
        setup = time.perf_counter() - t0
        rhs = system.rhs_function()
        y = y0 * rng.uniform(0.5, 1.5, y0.size)
        y[rng.choice(y.size, y.size // 50, replace=False)] = -1e-3  # the clipping path
        units = n + net.n_links
        t_vec = per_call(rhs, 0.0, y)
        ns_vec = t_vec / units * 1e9
        cost[(n, shuffle)] = ns_vec
        label = f"{n:,}" + (" shuffled" if shuffle else "")
        if naive:
            g = naive_graph(land, net)
            slow = naive_rhs_function(g)
            ref = slow(0.0, y)
            got = rhs(0.0, y)
            scale = np.abs(ref).max()
            same = np.allclose(got, ref, rtol=1e-9, atol=1e-12 * scale)
            if not same:
                raise SystemExit(f"RHS mismatch at n={n}: max abs diff "
                                 f"{np.abs(got - ref).max():.3g} (scale {scale:.3g})")
            t_naive = per_call(slow, 0.0, y, budget_s=3.0, repeats=3)
            rows.append([label, f"{net.n_links:,}", f"{2 * net.n_links / n:.1f}",
                         f"{t_vec * 1e3:.3f}", f"{ns_vec:.1f}", f"{t_naive * 1e3:.1f}",
                         f"{t_naive / units * 1e9:.0f}", f"{t_naive / t_vec:.0f}x",
                         "yes" if same else "NO", f"{setup:.1f}"])
        else:
            rows.append([label, f"{net.n_links:,}", f"{2 * net.n_links / n:.1f}",
                         f"{t_vec * 1e3:.3f}", f"{ns_vec:.1f}", "-", "-", "-", "-",
                         f"{setup:.1f}"])
    print()
    table(rows, ["patches", "links", "links/patch", "vec ms/call", "vec ns/(p+l)",
                 "naive ms/call", "naive ns/(p+l)", "speed-up", "allclose", "setup s"])
    ratio = cost[(100_000, False)] / cost[(10_000, False)]
    ratio_s = cost[(100_000, True)] / cost[(10_000, True)]
    speed = float(rows[0][7][:-1])
    print()
    print(f"target: vectorized >= 200x the naive loop at 1,000 patches: {speed:.0f}x "
          f"-> {'PASS' if speed >= 200 else 'MISS'}")
    print(f"target: cost per (patch+link) at 100k within 1.3x of 10k: {ratio:.2f}x "
          f"-> {'PASS' if ratio <= 1.3 else 'MISS'} (shuffled feature order: {ratio_s:.2f}x)")


if __name__ == "__main__":
    main()
