"""Event-based (demographic) runs: 1,000 patches for 100 time units, leaps and exact steps.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_events.py [--case NAME]

``NAME`` is ``small``, ``large``, ``exact`` or ``all`` (the default).

The landscape is invented (``synthetic.py``: 1,000 clustered polygons, median area 0.3 km²)
and the model is ``common.py``'s (logistic prey, K = 300 × quality per km², Holling type II,
dispersal of both species along boundary-distance links). Three cases:

* ``small``: the patch areas as they are: tens of prey and a few predators per patch, so
  many channels are critical (fewer than 10 individuals) and most leaps are cut short by
  the next critical event;
* ``large``: every area × 30: hundreds to thousands of individuals per patch, the regime in
  which tau-leaping does the work;
* ``exact``: the ``small`` case for ``EXACT_DURATION`` time units with exact steps only
  (``exact_factor=inf``): the cost of one exact step of the direct method.

The run is :func:`trophoscape.integrate.events.advance_events` from one census (every 1 time unit) to
the next, from the whole-number start state of ``common.assemble``, as
:func:`trophoscape.integrate.events.simulate_events` drives it (without recording the census). Run it
against an older checkout with ``PYTHONPATH=/path/to/old/src`` to compare: only the names
that existed before are used, and counters that did not exist are shown as "-".
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import assemble, versions  # noqa: E402
from synthetic import synthetic_landscape  # noqa: E402

import trophoscape.integrate.events as ev  # noqa: E402
from trophoscape.model.system import CoupledSystem

N_PATCHES = 1_000
DURATION = 100.0
CENSUS = 1.0
EXACT_DURATION = 0.5
#: case -> (area factor, duration, keyword arguments of advance_events)
CASES = {"small": (1.0, DURATION, {}), "large": (30.0, DURATION, {}),
         "exact": (1.0, EXACT_DURATION, {"exact_factor": np.inf})}


def build(case: str):
    land = synthetic_landscape(N_PATCHES, seed=0)
    _, model, system, y0 = assemble(land)
    k = CASES[case][0]
    system = CoupledSystem(model=model, area_km2=system.area_km2 * k,
                           prey_movement=system.prey_movement,
                           predator_movement=system.predator_movement)
    return system, y0 * k


def run(case: str, seed: int = 7):
    system, y0 = build(case)
    _, duration, options = CASES[case]
    rng = np.random.default_rng(seed)
    x = ev.whole(y0, rng)
    channels = ev.event_channels(system)
    stats = ev.EventStats()
    n = system.n_patches
    w0, c0 = time.perf_counter(), time.process_time()
    t = 0.0
    while t < duration:
        stop = min(t + CENSUS, duration)
        x = ev.advance_events(x, t, stop, channels, rng, stats=stats, **options)
        t = stop
    wall, cpu = time.perf_counter() - w0, time.process_time() - c0
    return {
        "case": case, "channels": int(channels.change.shape[1]), "wall": wall, "cpu": cpu,
        "leaps": stats.leaps, "exact": stats.exact_steps, "rejected": stats.rejected,
        "evaluations": stats.evaluations,
        "updates": getattr(stats, "updates", None),
        "prey": int(x[:n].sum()), "predator": int(x[n:].sum()),
        "prey_patches": int(np.count_nonzero(x[:n])),
        "predator_patches": int(np.count_nonzero(x[n:])),
        "start_prey": float(y0[:n].sum()), "start_predator": float(y0[n:].sum()),
    }


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--case", choices=(*CASES, "all"), default="all")
    args = parser.parse_args()
    cases = tuple(CASES) if args.case == "all" else (args.case,)
    print(versions())
    print(f"trophoscape.integrate.events from {ev.__file__}")
    print(f"{N_PATCHES:,} patches, census every {CENSUS:g}")
    for case in cases:
        r = run(case)
        fmt = (lambda v: "-" if v is None else f"{v:,}")
        factor, duration, options = CASES[case]
        print(f"[{case}] area x{factor:g}, {duration:g} time units {options or ''}, "
              f"{r['channels']:,} channels; start "
              f"{r['start_prey']:,.0f} prey, {r['start_predator']:,.0f} predators")
        print(f"  wall {r['wall']:.1f} s, CPU {r['cpu']:.1f} s; leaps {r['leaps']:,}, exact "
              f"steps {r['exact']:,}, rejected leaps {r['rejected']:,}; full propensity "
              f"evaluations {r['evaluations']:,}, partial (dependency) updates "
              f"{fmt(r['updates'])}")
        print(f"  end: {r['prey']:,} prey in {r['prey_patches']} patches, {r['predator']:,} "
              f"predators in {r['predator_patches']} patches")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
