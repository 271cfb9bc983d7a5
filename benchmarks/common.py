"""Shared pieces of the benchmarks: the model settings and the assembly of a coupled system.

``assemble`` builds the coupled system the way :func:`trophoscape.study.build_study` does
(per-patch parameter arrays, a :class:`~trophoscape.dynamics.LocalModel` with logistic prey and
Holling type II predation, one movement operator per species), without a scenario file.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import functools  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from trophoscape.dynamics import LocalModel  # noqa: E402
from trophoscape.network import build_network, movement_operator  # noqa: E402
from trophoscape.system import CoupledSystem, pack  # noqa: E402

#: Local model (per km², per year): prey growth r, capacity K = 300 × quality, Holling II.
LOCAL = dict(growth_rate=1.0, capacity_density=300.0, attack_rate=0.05, handling_time=0.1,
             conversion=0.3, mortality=0.4)
#: Dispersal per species: emigration rate (per year) and exponential-kernel scale (km).
DISPERSAL = {"prey": dict(emigration_rate=0.1, scale_km=1.0),
             "predator": dict(emigration_rate=0.05, scale_km=2.0)}
SURVIVAL_PER_KM = 0.97
#: max_distance_km giving about 8-9 links per patch on the synthetic landscapes.
MAX_DISTANCE_KM = {"boundary": 2.0, "centroid": 3.0}


def model_params(landscape) -> dict:
    """Per-patch parameter arrays, shape (n_patches,), as build_study makes them."""
    n = landscape.n_patches
    quality = landscape.frame["quality"].to_numpy(dtype=float)
    return {
        "growth_rate": np.full(n, LOCAL["growth_rate"]),
        "capacity": LOCAL["capacity_density"] * quality,
        "allee_density": np.full(n, 5.0),
        "attack_rate": np.full(n, LOCAL["attack_rate"]),
        "handling_time": np.full(n, LOCAL["handling_time"]),
        "interference": np.zeros(n),
        "conversion": np.full(n, LOCAL["conversion"]),
        "mortality": np.full(n, LOCAL["mortality"]),
    }


def assemble(landscape, *, distance="boundary", max_distance_km=None, network=None):
    """Network, local model, coupled system and a start state for a landscape.

    Returns
    -------
    network : trophoscape.network.Network
    model : trophoscape.dynamics.LocalModel
    system : trophoscape.system.CoupledSystem
    y0 : ndarray, shape (2 n_patches,)
        Prey 150 and predator 10 per km², each times a random factor 0.8-1.2 (seed 1), so
        that patches start out of step.
    """
    if network is None:
        network = build_network(
            landscape, kernel="exponential", distance=distance,
            max_distance_km=MAX_DISTANCE_KM[distance] if max_distance_km is None
            else max_distance_km)
    model = LocalModel(growth="logistic", response="holling2", params=model_params(landscape))
    ops = {s: movement_operator(network, emigration_rate=d["emigration_rate"],
                                scale_km=d["scale_km"], survival_per_km=SURVIVAL_PER_KM)
           for s, d in DISPERSAL.items()}
    system = CoupledSystem(model=model, area_km2=landscape.area_km2,
                           prey_movement=ops["prey"], predator_movement=ops["predator"])
    rng = np.random.default_rng(1)
    area = landscape.area_km2
    n = landscape.n_patches
    y0 = pack(150.0 * area * rng.uniform(0.8, 1.2, n), 10.0 * area * rng.uniform(0.8, 1.2, n))
    return network, model, system, y0


def versions() -> str:
    import scipy
    import shapely

    return (f"python {platform.python_version()}, numpy {np.__version__}, scipy "
            f"{scipy.__version__}, shapely {shapely.__version__}; "
            f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}; "
            f"{os.cpu_count()} CPUs")


def per_call(fn, *args, budget_s=1.0, repeats=7):
    """Median CPU seconds per call of ``fn(*args)`` over ``repeats`` batches (``budget_s`` in all).

    CPU time of this process (``time.process_time``), not wall time: the benchmark machine is
    shared, and time spent waiting for a core is not the code's cost.
    """
    fn(*args)
    t0 = time.process_time()
    fn(*args)
    one = max(time.process_time() - t0, 1e-7)
    number = max(1, int(budget_s / repeats / one))
    samples = []
    for _ in range(repeats):
        t0 = time.process_time()
        for _ in range(number):
            fn(*args)
        samples.append((time.process_time() - t0) / number)
    return float(np.median(samples))


def table(rows, headers):
    """Print rows (lists of str) as an aligned text table."""
    widths = [max(len(h), *(len(r[k]) for r in rows)) for k, h in enumerate(headers)]
    line = "  ".join(h.rjust(w) for h, w in zip(headers, widths))
    print(line)
    print("-" * len(line))
    for r in rows:
        print("  ".join(c.rjust(w) for c, w in zip(r, widths)))


def now() -> np.ndarray:
    """(wall, CPU) seconds; the machine is shared, so CPU time is given beside wall time."""
    return np.array([time.perf_counter(), time.process_time()])


def clock(stages: dict, name: str, fn):
    """``fn`` wrapped so that the (wall, CPU) seconds it takes add up in ``stages[name]``."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        t0 = now()
        try:
            return fn(*args, **kwargs)
        finally:
            stages[name] = stages.get(name, 0.0) + now() - t0
    return wrapper


def peak_mb() -> float:
    """Peak resident memory of this process so far, MB (ru_maxrss is in KiB on Linux)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
