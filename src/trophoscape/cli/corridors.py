"""The ``corridors`` and ``compare`` commands, and the files they write.

``trophoscape corridors SCENARIO.toml --candidates FILE --budget X --out DIR`` ranks candidate
corridors and picks a set within the budget; ``trophoscape compare A.toml B.toml ... --out DIR``
runs several scenarios and sets their results side by side. Both are thin shells over
:mod:`trophoscape.workflows.planning`; the output folder is checked before any run
(:func:`trophoscape.io.folder.check_out`) and written through
:func:`trophoscape.io.folder.staged_folder`, so it appears whole or not at all. While the
corridor runs go on, each finished run is recorded in ``corridors.partial.sqlite`` in the
output folder (created with its marker before the runs; an earlier output folder there is
kept until the new one is whole): an interrupted ranking keeps what it had, and running the
same command again reads those rows back instead of running them again.
"""

from __future__ import annotations

import argparse
from pathlib import Path


from ..report.corridors import compare_to_folder, corridors_to_folder

__all__ = ["add_parser"]


EPILOG_CORRIDORS = """examples:
  trophoscape corridors valley.toml --candidates options.gpkg --budget 120 --out plan
  trophoscape corridors valley.toml --candidates options.gpkg --budget 120 --out plan \\
      --weights predator_area_persistence=1,predator_capacity=0.2 --screen 20"""
EPILOG_COMPARE = """example:
  trophoscape compare option-a.toml option-b.toml --out compare-ab"""


def add_parser(subparsers) -> None:
    """Register the ``corridors`` and ``compare`` commands."""
    from ..workflows.planning import DEFAULT_WEIGHTS, EXHAUSTIVE_LIMIT, OBJECTIVES

    from .program import out_options

    fmt = argparse.RawDescriptionHelpFormatter
    names = ", ".join(OBJECTIVES)
    default = ",".join(f"{k}={v:g}" for k, v in DEFAULT_WEIGHTS.items())
    p = subparsers.add_parser(
        "corridors", help="rank candidate corridors and pick a set within a budget",
        description="Add each candidate corridor alone to the scenario's network and measure "
                    "what it changes; remove each existing link and patch alone to find the "
                    "critical ones; pick a set within the budget (greedy by gain per cost, "
                    "and the exact best set for up to "
                    f"{EXHAUSTIVE_LIMIT} candidates).",
        epilog=EPILOG_CORRIDORS, formatter_class=fmt)
    p.add_argument("scenario", type=Path, help="scenario file (TOML)")
    p.add_argument("--candidates", required=True, metavar="FILE|auto",
                   help="GeoJSON / GeoPackage / Shapefile of candidate lines (or thin "
                        "polygons) with a 'cost' attribute; optional corridor_id, quality, "
                        "resistance, survival. 'auto': let trophoscape find them (least-cost "
                        "paths where the network is cut or thin; written to candidates.gpkg; "
                        "a file named auto is ./auto)")
    p.add_argument("--max-candidates", type=int, default=20, metavar="N",
                   help="with --candidates auto: at most N candidates, shortest first "
                        "(default 20)")
    p.add_argument("--layer", default=None, help="layer of the candidates file")
    p.add_argument("--budget", type=float, required=True,
                   help="total cost the chosen set may reach (same unit as 'cost')")
    out_options(p)
    p.add_argument("--weights", default=None,
                   help=f"objective weights NAME=W,...; names: {names} (default {default})")
    p.add_argument("--remove-links", default="all", metavar="all|none|FILE",
                   help="links to test by removing each alone: every link (default), none, "
                        "or a CSV with columns source,target")
    p.add_argument("--remove-patches", default="all", choices=("all", "none"),
                   help="test every patch by removing it alone (default all)")
    p.add_argument("--screen", type=int, default=None, metavar="K",
                   help="two-stage: rank every candidate by its gain in metapopulation "
                        "capacity per cost (no simulation), then simulate only the best K")
    p.add_argument("--exhaustive-limit", type=int, default=EXHAUSTIVE_LIMIT, metavar="N",
                   help="exact best set by exhaustive search when at most N candidates are "
                        f"simulated (default {EXHAUSTIVE_LIMIT}; 0 turns it off)")
    p.add_argument("--workers", type=int, default=None, help="processes (default all cores)")
    p.add_argument("--no-maps", action="store_true",
                   help="skip the PNG maps and report.html (corridors.html is still written)")
    p.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    p.set_defaults(handler=run_corridors)

    c = subparsers.add_parser(
        "compare", help="run several scenarios and compare their results",
        description="Run each scenario, write one table of network-level results (one row "
                    "per scenario), per-patch difference maps against the first scenario for "
                    "patches shared by id, and each scenario's own output folder.",
        epilog=EPILOG_COMPARE, formatter_class=fmt)
    c.add_argument("scenarios", type=Path, nargs="+", help="scenario files (TOML), two or more")
    out_options(c)
    c.add_argument("--columns", default="predator_occupancy,prey_occupancy",
                   help="per-patch columns to difference (default "
                        "predator_occupancy,prey_occupancy)")
    c.add_argument("--no-runs", action="store_true",
                   help="skip each scenario's own output folder (runs/NAME)")
    c.add_argument("--no-maps", action="store_true", help="skip the PNG maps and reports")
    c.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    c.set_defaults(handler=run_compare)


# ---------------------------------------------------------------------------- corridors




def run_corridors(args) -> int:
    """The ``corridors`` command; returns the exit code."""
    links = {"all": "all", "none": None}.get(args.remove_links, args.remove_links)
    candidates = args.candidates if args.candidates == "auto" else Path(args.candidates)
    plan = corridors_to_folder(args.scenario, candidates, args.out, budget=args.budget,
                               max_candidates=args.max_candidates,
                               weights=args.weights, layer=args.layer, links=links,
                               patches=args.remove_patches == "all", screen=args.screen,
                               exhaustive_limit=args.exhaustive_limit, workers=args.workers,
                               maps=not args.no_maps, force=args.force,
                               progress=not args.quiet)
    if not args.quiet:
        _print_plan(plan, args.out)
    return 0


def _print_plan(plan, out) -> None:
    table = plan.table
    best = plan.best
    ids = plan.planner.candidates.ids
    print(f"wrote {out}")
    top = table[table["rank"] > 0].sort_values("rank").head(3)
    print("  best candidates: " + ", ".join(f"{i} (score {s:.3g})"
                                            for i, s in zip(top.index, top["score"])))
    print(f"  chosen within budget {plan.budget:g}: "
          f"{', '.join(str(ids[c]) for c in best.chosen) or 'none'} "
          f"(cost {best.cost:g}, score {best.score:.3g})")
    if plan.gap is not None and not plan.gap.same_set:
        print(f"  greedy falls short of the best set by {plan.gap.absolute:.3g}")
    print(f"  {plan.timing['runs']} runs in {plan.timing['total_seconds']:.1f} s")


# ---------------------------------------------------------------------------- compare




def run_compare(args) -> int:
    """The ``compare`` command; returns the exit code."""
    def announce(k, n, study):
        print(f"running {k + 1}/{n}: {study.scenario.name}")

    compare_to_folder(args.scenarios, args.out, columns=args.columns, maps=not args.no_maps,
                      runs=not args.no_runs, force=args.force, progress=not args.quiet,
                      on_run=None if args.quiet else announce)
    if not args.quiet:
        print(f"wrote {args.out}")
    return 0
