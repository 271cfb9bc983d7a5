"""Speed of the coupled right-hand side against a naive per-patch loop over a networkx graph.

For 1,000 and 10,000 synthetic patches both right-hand sides are built from the same network
(boundary distance, about 8 links per patch), checked to give the same dy/dt
(``np.allclose``), then timed. The naive one is what a user would write by hand: a Python loop
over the graph's nodes computing the local logistic / Holling type II terms, and for each node
a loop over its neighbours adding the dispersal flows; its dispersal coefficients are worked
out in plain Python from the link distances (not taken from trophoscape's operator), so the
check also checks the movement operator. At 100,000 patches only the vectorized RHS is timed.

The vectorized RHS timed is the one ``simulate`` integrates with explicit methods: in the
internal patch order that ``order="auto"`` picks (``rhs_function(internal=True)``), checked
against the user-order RHS, with the local terms evaluated as ``local_terms="auto"`` picks
(compiled with numba from 10,000 patches when numba is installed). At 10,000 patches and
more the numpy and the compiled local terms are both timed, checked equal bit for bit, and
both set against the bandwidth bound. Cost is given in ns per (patch + link) per call, with links =
distinct linked pairs.
Targets (issue 8): vectorized >= 100x faster than the loop at 1,000 patches (it was 213x);
the cost per (patch + link) at 100,000 within 1.3x of that at 10,000, in the spatial and in a
shuffled feature order; the RHS at 100,000 patches within 2x of the memory-bandwidth bound.

Memory bandwidth is measured in the same run with numpy on arrays far larger than the caches
(copy ``a[:] = b`` and triad ``a = b + s*c``, counted as STREAM does: 16 and 24 bytes per
element). The bound of one RHS call is the bytes it must move at least (state in, dy/dt out,
areas and the per-patch parameters the model reads, the CSR data, indices and indptr) divided
by the best measured bandwidth. The RHS as it was before the buffer changes (a copy of the
old code, ``previous_rhs_function``) is timed beside the current one, and the internal patch
orders (reverse Cuthill-McKee on the links, a Hilbert curve over the centroids) are compared
at 100,000 patches and on a 1,000,000-patch operator built from centroids alone.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_rhs.py
"""

from __future__ import annotations

import os

os.environ["OPENBLAS_NUM_THREADS"] = "1"

import math  # noqa: E402
import time  # noqa: E402

import networkx as nx  # noqa: E402
import numpy as np  # noqa: E402

from scipy.spatial import cKDTree  # noqa: E402

from common import (DISPERSAL, LOCAL, SURVIVAL_PER_KM, assemble, per_call,  # noqa: E402
                    table, versions)
from synthetic import synthetic_landscape  # noqa: E402
from trophoscape.model.dynamics import LocalModel
from trophoscape.model.network import Network, movement_operator
from trophoscape.model.system import CoupledSystem, compiled_available, locality, spatial_order


def bandwidth(n_bytes=512 * 2**20, repeats=5):
    """Best (copy, triad) bandwidth in bytes/s of numpy on float64 arrays of ``n_bytes`` each.

    STREAM counting: copy moves 16 bytes per element, triad 24 (write-allocate not counted).
    numpy does the triad in two passes (``a = s*c``, then ``a += b``); its figure is therefore
    lower than the hardware's, and the copy figure is the stricter bound.
    """
    m = n_bytes // 8
    a, b, c = np.zeros(m), np.ones(m), np.full(m, 2.0)
    copy = triad = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        np.copyto(a, b)
        copy = min(copy, time.perf_counter() - t0)
        t0 = time.perf_counter()
        np.multiply(c, 3.0, out=a)
        np.add(a, b, out=a)
        triad = min(triad, time.perf_counter() - t0)
    return 16 * m / copy, 24 * m / triad


def rhs_bytes(system) -> dict:
    """Bytes one RHS call must move at least, by part."""
    n = system.n_patches
    m = system.movement
    model = system.model
    used = {*model.growth_form.needs, *model.functional_response.needs, "conversion",
            "mortality"}
    return {"state in": 16 * n, "dy/dt out": 16 * n, "areas + parameters": 8 * n * (1 + len(used)),
            "CSR data": m.data.nbytes, "CSR indices": m.indices.nbytes,
            "CSR indptr": m.indptr.nbytes}


def previous_rhs_function(system):
    """The RHS as it was before the buffer changes (copied from system.py, 2026-12-01)."""
    n = system.n_patches
    area = system.area_km2
    movement = system.movement
    rates = system.model.rates
    out = np.empty(2 * n)

    def rhs(t, y):
        x = np.maximum(y, 0.0)
        dn, dp = rates(x[:n] / area, x[n:] / area)
        out[:n] = dn
        out[n:] = dp
        out[:n] *= area
        out[n:] *= area
        return out + movement @ x

    return rhs


def point_system(n, *, shuffle, seed=0):
    """A CoupledSystem of ``n`` point patches (centroid distance, about 11 links per patch).

    Points come from the cluster process of synthetic.py (clusters of 25, 3 km spread) with
    no polygons, so a 1,000,000-patch operator is built in seconds.
    """
    rng = np.random.default_rng(seed)
    side = 1700.0 * np.sqrt(n)
    hubs = rng.uniform(0, side, (n // 25 + 1, 2))
    c = np.mod(np.repeat(hubs, 25, axis=0)[:n] + rng.normal(0, 3000.0, (n, 2)), side)
    if shuffle:
        c = c[rng.permutation(n)]
    pairs = cKDTree(c).query_pairs(r=2600.0, output_type="ndarray")
    i, j = pairs[:, 0], pairs[:, 1]
    d = np.hypot(*(c[i] - c[j]).T) / 1000.0
    nan = np.full(2 * i.size, np.nan)
    net = Network(ids=np.arange(n).astype(str), source=np.r_[i, j], target=np.r_[j, i],
                  distance_km=np.r_[d, d], weight=nan, survival=nan,
                  origin=np.full(2 * i.size, "kernel"), kernel="exponential",
                  max_distance_km=2.6)
    ops = [movement_operator(net, emigration_rate=v["emigration_rate"], scale_km=v["scale_km"],
                             survival_per_km=SURVIVAL_PER_KM) for v in DISPERSAL.values()]
    params = {k: np.full(n, float(v)) for k, v in dict(
        growth_rate=1.0, capacity=300.0, allee_density=5.0, attack_rate=0.05,
        handling_time=0.1, interference=0.0, conversion=0.3, mortality=0.4).items()}
    params["capacity"] = params["capacity"] * rng.uniform(0.5, 1.5, n)
    model = LocalModel(growth="logistic", response="holling2", params=params)
    area = 0.3 * np.exp(0.9 * rng.standard_normal(n))
    y0 = np.concatenate([150.0 * area, 10.0 * area]) * rng.uniform(0.8, 1.2, 2 * n)
    return model, area, ops, c, y0, int(i.size)


def compare_orders(label, model, area, ops, centroids, y, units, rows):
    """Time the RHS with each internal order; check each against the user order."""
    n = area.size
    pair = lambda p: np.concatenate([p, p + n])  # noqa: E731
    systems = {}
    systems["user order"] = CoupledSystem(model=model, area_km2=area, prey_movement=ops[0],
                                          predator_movement=ops[1], order="none")
    t_rcm = time.process_time()
    systems["RCM"] = CoupledSystem(model=model, area_km2=area, prey_movement=ops[0],
                                   predator_movement=ops[1], order="rcm")
    t_rcm = time.process_time() - t_rcm
    t_hil = time.process_time()
    hil = spatial_order(centroids)
    t_hil = time.process_time() - t_hil
    systems["Hilbert"] = CoupledSystem(model=model, area_km2=area, prey_movement=ops[0],
                                       predator_movement=ops[1], order=hil)
    systems["auto (RCM, rows grouped)"] = CoupledSystem(
        model=model, area_km2=area, prey_movement=ops[0], predator_movement=ops[1])
    base = systems["user order"].rhs_function()(0.0, y)
    ref = None
    for name, s in systems.items():
        perm = s.permutation
        loc = locality(s.movement, None if perm is None else pair(perm))
        rhs = s.rhs_function()
        if not np.allclose(rhs(0.0, y), base, rtol=1e-12, atol=1e-12 * np.abs(base).max()):
            raise SystemExit(f"{label} {name}: RHS differs from the user order")
        t_user = per_call(rhs, 0.0, y)
        ref = t_user if ref is None else ref
        inner = s.rhs_function(internal=True)
        yi = s.to_internal(y)
        if not np.allclose(s.to_user(inner(0.0, yi)), base, rtol=1e-12,
                           atol=1e-12 * np.abs(base).max()):
            raise SystemExit(f"{label} {name}: internal RHS differs")
        t_inner = per_call(inner, 0.0, yi)
        extra = {"RCM": f"{t_rcm:.2f}", "Hilbert": f"{t_hil:.2f}"}.get(name, "-")
        rows.append([label, name, f"{loc:.2f}", f"{t_user * 1e3:.2f}",
                     f"{t_user / units * 1e9:.1f}", f"{ref / t_user:.2f}x",
                     f"{t_inner * 1e3:.2f}", f"{ref / t_inner:.2f}x", extra])


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


def with_kernel(system, kernel):
    """The same system with its local terms evaluated by ``kernel``."""
    return CoupledSystem(model=system.model, area_km2=system.area_km2,
                         prey_movement=system.prey_movement,
                         predator_movement=system.predator_movement, local_terms=kernel)


def main():
    print("bench_rhs:", versions(), "; numba:", "yes" if compiled_available() else "no")
    bw_copy, bw_triad = bandwidth()
    print(f"memory bandwidth (numpy, 512 MiB arrays, best of 5): copy {bw_copy / 1e9:.1f} GB/s, "
          f"triad {bw_triad / 1e9:.1f} GB/s")
    rows, cost, before_after, bound_rows, order_rows, kernel_rows = [], {}, [], [], [], []
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
        # what simulate integrates: the RHS in the internal order chosen by order="auto"
        inner = system.rhs_function(internal=True)
        yi = system.to_internal(y)
        user = rhs(0.0, y)
        if not np.allclose(system.to_user(inner(0.0, yi)), user, rtol=1e-12,
                           atol=1e-12 * np.abs(user).max()):
            raise SystemExit("internal and user-order RHS differ")
        t_vec = per_call(inner, 0.0, yi)
        t_user = per_call(rhs, 0.0, y)
        kernel_times = {system.local_terms_used: t_vec}
        if n >= 10_000 and compiled_available():
            for kernel in ("numpy", "compiled"):
                if kernel in kernel_times:
                    continue
                other = with_kernel(system, kernel)
                fn = other.rhs_function(internal=True)
                if not np.array_equal(fn(0.0, yi), inner(0.0, yi)):
                    raise SystemExit(f"{kernel} local terms differ from {system.local_terms_used}")
                kernel_times[kernel] = per_call(fn, 0.0, yi)
            kernel_rows.append([f"{n:,}" + (" shuffled" if shuffle else ""),
                                f"{kernel_times['numpy'] * 1e3:.3f}",
                                f"{kernel_times['compiled'] * 1e3:.3f}",
                                f"{kernel_times['numpy'] / kernel_times['compiled']:.2f}x",
                                system.local_terms_used])
        ns_vec = t_vec / units * 1e9
        cost[(n, shuffle)] = ns_vec
        label = f"{n:,}" + (" shuffled" if shuffle else "")
        old = previous_rhs_function(system)
        # the same sums in another order (the local term is now the accumulator's start)
        if not np.allclose(old(0.0, y), rhs(0.0, y), rtol=1e-12,
                           atol=1e-12 * np.abs(old(0.0, y)).max()):
            raise SystemExit("previous and current RHS differ")
        t_old = per_call(old, 0.0, y)
        before_after.append([label, f"{t_old * 1e3:.3f}", f"{t_user * 1e3:.3f}",
                             f"{t_old / t_user:.2f}x", f"{t_vec * 1e3:.3f}",
                             f"{t_old / t_vec:.2f}x", "yes" if system.reordered else "no"])
        if n >= 100_000:
            parts = rhs_bytes(system)
            total = sum(parts.values())
            for kernel, t_k in sorted(kernel_times.items()):
                bound_rows.append([label, kernel + (" (auto)" if kernel == system.local_terms_used
                                                    else ""),
                                   f"{total / 1e6:.1f}", f"{t_k * 1e3:.2f}",
                                   f"{total / bw_copy * 1e3:.2f}", f"{t_k * bw_copy / total:.2f}",
                                   f"{total / bw_triad * 1e3:.2f}",
                                   f"{t_k * bw_triad / total:.2f}", f"{total / t_k / 1e9:.1f}"])
            if shuffle:
                compare_orders(label, system.model, system.area_km2,
                               [system.prey_movement, system.predator_movement],
                               land.centroids, y, units, order_rows)
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
    for shuffle in (True, False):
        model, area, ops, cen, y1, links = point_system(1_000_000, shuffle=shuffle)
        y1[rng.choice(y1.size, y1.size // 50, replace=False)] = -1e-3
        compare_orders("1,000,000 points" + (" shuffled" if shuffle else ""), model, area,
                       ops, cen, y1, 1_000_000 + links, order_rows)
        del model, area, ops, cen, y1
    print()
    table(rows, ["patches", "links", "links/patch", "vec ms/call", "vec ns/(p+l)",
                 "naive ms/call", "naive ns/(p+l)", "speed-up", "allclose", "setup s"])
    print("\nRHS before the buffer changes, now in the user's order, and now in the internal "
          "order (median CPU ms per call)")
    table(before_after, ["patches", "before ms", "user order ms", "speed-up", "internal ms",
                         "speed-up", "reordered"])
    if kernel_rows:
        print("\nLocal terms by numpy or compiled (internal-order RHS, median CPU ms per call)")
        table(kernel_rows, ["patches", "numpy ms", "compiled ms", "speed-up", "auto picks"])
    print("\nRHS against the memory-bandwidth bound (ratio = RHS time / bound)")
    table(bound_rows, ["patches", "local terms", "MB/call", "RHS ms", "bound ms (copy)",
                       "ratio (copy)", "bound ms (triad)", "ratio (triad)", "RHS GB/s"])
    print("\nInternal patch order (median CPU ms per call; speed-up against the user order)")
    table(order_rows, ["case", "order", "lines/row", "rhs ms", "ns/(p+l)", "speed-up",
                       "internal rhs ms", "speed-up", "order s"])
    ratio = cost[(100_000, False)] / cost[(10_000, False)]
    ratio_s = cost[(100_000, True)] / cost[(10_000, True)]
    speed = float(rows[0][7][:-1])
    worst = max(float(r[5]) for r in bound_rows if r[1].endswith("(auto)"))
    print()
    print(f"target: vectorized >= 100x the naive loop at 1,000 patches: {speed:.0f}x "
          f"-> {'PASS' if speed >= 100 else 'MISS'}")
    print(f"target: cost per (patch+link) at 100k within 1.3x of 10k: {ratio:.2f}x "
          f"-> {'PASS' if ratio <= 1.3 else 'MISS'}; shuffled feature order: {ratio_s:.2f}x "
          f"-> {'PASS' if ratio_s <= 1.3 else 'MISS'}")
    print(f"target: RHS at 100k within 2x of the bandwidth bound (copy bandwidth, the "
          f"stricter; local terms as local_terms='auto' picks): {worst:.2f}x "
          f"-> {'PASS' if worst <= 2 else 'MISS'}")
    numpy_rows = [float(r[5]) for r in bound_rows if r[1].startswith("numpy")]
    if numpy_rows and not bound_rows[0][1].startswith("numpy (auto)"):
        print(f"   (with numpy local terms, the fallback without numba: {max(numpy_rows):.2f}x)")


if __name__ == "__main__":
    main()
