"""Fitting the demo to survey counts: time and model runs.

Counts are drawn once (seed 1) from the demo scenario (``data/demo.toml``, 150 patches):
every patch, both species, yearly from t = 0 to 20 (6,300 counts), Poisson around the
abundance of the deterministic run without removals below the extinction threshold, the model
a fit searches (``--removals`` draws them from the run with removals, as ``trophoscape run``
simulates it: the fit then warns, and its intervals need not cover the values). Six rates are then estimated from starting
guesses 30 % off the values the counts were drawn from, with 95 % profile-likelihood intervals:

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_fitting.py [--starts 2]

The target (issue: fitting): six parameters of the demo from 20 years of counts in every patch
in under 2 minutes on the 2-core CI machine, with the number of model runs reported.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from common import peak_mb, table, versions  # noqa: E402
from trophoscape.workflows.fitting import Counts, expected_counts, fit_counts  # noqa: E402
from trophoscape.workflows.study import load_study  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "data" / "demo.toml"
KEYS = ["prey.growth_rate", "prey.capacity_density", "predation.attack_rate",
        "predation.handling_time", "predator.mortality_rate", "predator.conversion"]
#: Starting guesses: the demo's values times these.
OFF = [1.3, 0.7, 1.3, 0.7, 1.3, 0.7]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--starts", type=int, default=2)
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--years", type=int, default=20)
    ap.add_argument("--removals", action="store_true")
    args = ap.parse_args()
    study = load_study(DEMO)
    n = study.landscape.n_patches
    patch, time_, species = np.meshgrid(np.arange(n), np.arange(args.years + 1.0), [0, 1],
                                        indexing="ij")
    frame = Counts(patch=patch.ravel(), time=time_.ravel().astype(float),
                   species=species.ravel(), count=np.zeros(patch.size))
    truth = {k: float(study.scenario[k]) for k in KEYS}
    from dataclasses import replace

    drawn_from = study if args.removals else replace(
        study, scenario=study.scenario.with_values(run__extinction_abundance=0.0))
    mean = expected_counts(drawn_from, frame)
    counts = Counts(patch=frame.patch, time=frame.time, species=frame.species,
                    count=np.random.default_rng(1).poisson(mean).astype(float))
    guess = study.scenario.with_values(**{k.replace(".", "__"): truth[k] * f
                                          for k, f in zip(KEYS, OFF)})

    start = time.perf_counter()
    fit = fit_counts(replace(study, scenario=guess), counts, KEYS, observation="poisson",
                     starts=args.starts, workers=args.workers)
    seconds = time.perf_counter() - start
    print(versions())
    print(f"{n} patches, {counts.n} counts, {len(KEYS)} parameters, {args.starts} starts: "
          f"{seconds:.1f} s, {fit.evaluations} model runs, peak {peak_mb():.0f} MB; "
          f"log L {fit.log_likelihood:.2f}, starts agreeing {fit.agreeing}")
    rows = [[k, f"{truth[k]:.4g}", f"{truth[k] * f:.4g}", f"{fit.estimates[k]:.4g}",
             f"{fit.low[k]:.4g} – {fit.high[k]:.4g}",
             "yes" if fit.low[k] <= truth[k] <= fit.high[k] else "no"]
            for k, f in zip(KEYS, OFF)]
    table(rows, ["parameter", "drawn from", "start", "estimate", "95 % interval", "covers"])
    for w in fit.warnings:
        print("warning:", w)


if __name__ == "__main__":
    main()
