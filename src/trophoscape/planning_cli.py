"""The ``corridors`` and ``compare`` commands, and the files they write.

``trophoscape corridors SCENARIO.toml --candidates FILE --budget X --out DIR`` ranks candidate
corridors and picks a set within the budget; ``trophoscape compare A.toml B.toml ... --out DIR``
runs several scenarios and sets their results side by side. Both are thin shells over
:mod:`trophoscape.analysis.planning`; the output folder is checked before any run
(:func:`trophoscape.outputs.check_out`) and written through
:func:`trophoscape.outputs.staged_folder`, so it appears whole or not at all. While the
corridor runs go on, each finished run is appended to ``corridors.partial.csv`` in the
output folder (created with its marker before the runs; an earlier output folder there is
kept until the new one is whole): an interrupted ranking keeps what it had, and running the
same command again reads those rows back instead of running them again.
"""

from __future__ import annotations

import argparse
import html
import math
import re
import shutil
import time
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError
from .report import CAUTION

__all__ = ["add_parser", "run_corridors", "run_compare", "read_link_list",
           "write_corridors", "write_comparison"]

PARTIAL = "corridors.partial.csv"
SYNCHRONY_NOTE = ("Lower synchrony is better for regional survival: patches that fluctuate out "
                  "of step rescue one another, while synchronous ones can crash together. So "
                  "gain_*_synchrony is the fall in synchrony (positive is better).")

EPILOG_CORRIDORS = """examples:
  trophoscape corridors valley.toml --candidates options.gpkg --budget 120 --out plan
  trophoscape corridors valley.toml --candidates options.gpkg --budget 120 --out plan \\
      --weights predator_area_persistence=1,predator_capacity=0.2 --screen 20"""
EPILOG_COMPARE = """example:
  trophoscape compare option-a.toml option-b.toml --out compare-ab"""


def add_parser(subparsers) -> None:
    """Register the ``corridors`` and ``compare`` commands."""
    from .analysis.planning import DEFAULT_WEIGHTS, EXHAUSTIVE_LIMIT, OBJECTIVES

    from .cli import out_options

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
    p.add_argument("--candidates", type=Path, required=True,
                   help="GeoJSON / GeoPackage / Shapefile of candidate lines (or thin "
                        "polygons) with a 'cost' attribute; optional corridor_id, quality, "
                        "survival")
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


def read_link_list(path, study) -> list[tuple[int, int]]:
    """Links to test, from a CSV with columns ``source`` and ``target`` (patch ids).

    Returns
    -------
    list of (int, int)
        Patch positions; every pair must be linked in the scenario's network.

    Raises
    ------
    InputError
        Missing file or columns, an unknown patch id, a pair that is not linked.
    """
    path = Path(path)
    expected = "a CSV with columns source,target (patch ids of linked patches)"
    if not path.is_file():
        raise InputError(f"no such file; check the path, or give 'all' or 'none'; expected "
                         f"{expected}", file=path)
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.EmptyDataError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot be read ({type(exc).__name__}); expected {expected}",
                         file=path) from None
    table.columns = [str(c).strip() for c in table.columns]
    for column in ("source", "target"):
        if column not in table.columns:
            raise InputError(f"the table has no {column!r} column; add it: expected {expected}",
                             file=path, field=column)
    position = pd.Index(study.ids)
    ends = []
    for column in ("source", "target"):
        found = position.get_indexer(table[column].str.strip().to_numpy())
        if (found < 0).any():
            r = int(np.flatnonzero(found < 0)[0])
            raise InputError(f"no patch has id {table[column].iloc[r]!r}; use an id of the "
                             "patch file",
                             file=path, feature=r, field=column)
        ends.append(found)
    from .analysis.planning import _linked_pairs

    linked = {tuple(p) for p in _linked_pairs(study.network).tolist()}
    pairs = []
    for r, (a, b) in enumerate(zip(*ends)):
        pair = (min(a, b), max(a, b))
        if pair not in linked:
            raise InputError(f"patches {table['source'].iloc[r]!r} and "
                             f"{table['target'].iloc[r]!r} are not linked; list only links of "
                             "the network (layer 'links' of a run's patches.gpkg)", file=path,
                             feature=r, field="target")
        pairs.append(pair)
    return pairs


def run_corridors(args) -> int:
    """The ``corridors`` command; returns the exit code."""
    from .analysis.planning import parse_weights, read_candidates
    from .outputs import input_files, working_folder
    from .study import load_study

    if not math.isfinite(args.budget) or args.budget < 0:
        raise InputError(f"{args.budget!r} is out of range; give the total cost the chosen set "
                         "may reach, a number of at least 0 in the unit of 'cost'",
                         field="--budget")
    if args.screen is not None and args.screen < 1:
        raise InputError(f"{args.screen} is out of range; give how many candidates to "
                         "simulate, a whole number of at least 1", field="--screen")
    if args.exhaustive_limit < 0:
        raise InputError(f"{args.exhaustive_limit} is out of range; give a whole number of at "
                         "least 0 (0 turns the exhaustive search off)",
                         field="--exhaustive-limit")
    if args.workers is not None and args.workers < 1:
        raise InputError(f"{args.workers} is out of range; give a whole number of at least 1, "
                         "or leave --workers out to use every core", field="--workers")
    weights = parse_weights(args.weights)
    study = load_study(args.scenario)
    candidates = read_candidates(args.candidates, study.landscape, layer=args.layer,
                                 snap_km=study.scenario["dispersal.corridor_snap_km"])
    inputs = [*input_files(study.scenario), args.candidates]
    links_file = None
    if args.remove_links == "all":
        links = "all"
    elif args.remove_links == "none":
        links = None
    else:
        links = read_link_list(args.remove_links, study)
        links_file = Path(args.remove_links)
        inputs.append(links_file)
    # everything is validated: only now does the output folder appear (for the partial log);
    # an earlier output folder there stays until the new one is whole, and a folder made
    # here that got no row is removed again if the command fails
    with working_folder(args.out, command="corridors", allow=[PARTIAL], inputs=inputs,
                        force=args.force, reuse=True):
        started = time.perf_counter()
        plan = plan_corridors(study, candidates, budget=args.budget, weights=weights,
                              links=links, patches=args.remove_patches == "all",
                              screen=args.screen, exhaustive_limit=args.exhaustive_limit,
                              workers=args.workers, progress=not args.quiet,
                              log=args.out / PARTIAL, links_file=links_file)
        plan["timing"]["total_seconds"] = time.perf_counter() - started
        write_corridors(plan, args.out, maps=not args.no_maps, force=args.force,
                        inputs=inputs, checked=True)
    if not args.quiet:
        _print_plan(plan, args.out)
    return 0


def plan_corridors(study, candidates, *, budget, weights=None, links="all", patches=True,
                   screen=None, exhaustive_limit=12, workers=None, progress=False, log=None,
                   links_file=None):
    """Every step of the ``corridors`` command, without writing files.

    ``links_file``: the file ``links`` was read from (:func:`read_link_list`), an input the
    output folder must not hold (kept in the plan as ``links_file``).

    Returns
    -------
    dict
        ``planner`` (the :class:`~trophoscape.analysis.planning.Planner`), ``table``
        (ranked candidates), ``critical`` (remove-one table), ``greedy``, ``exhaustive``
        (or None), ``best`` (the set reported as chosen), ``gap``, ``screened`` (positions
        simulated, or None), ``budget``, ``timing``.
    """
    from .analysis.planning import Planner, rank_candidates

    timing = {}
    t = time.perf_counter()
    planner = Planner(study, candidates, weights=weights, workers=workers, progress=progress,
                      log=log)
    timing["baseline_seconds"] = time.perf_counter() - t
    pool = None
    capacity_gain = None
    if screen is not None and screen < candidates.n:
        t = time.perf_counter()
        pool = planner.screen(screen)
        capacity_gain = planner.capacity_gains()
        timing["screen_seconds"] = time.perf_counter() - t
    t = time.perf_counter()
    table = planner.add_one(pool)
    timing["add_one_seconds"] = time.perf_counter() - t
    if capacity_gain is not None:
        table["screen_capacity_gain"] = capacity_gain
    t = time.perf_counter()
    greedy = planner.greedy(budget, pool)
    timing["greedy_seconds"] = time.perf_counter() - t
    simulated = candidates.n if pool is None else len(pool)
    exhaustive = None
    if 0 < simulated <= exhaustive_limit:
        t = time.perf_counter()
        exhaustive = planner.exhaustive(budget, pool, limit=exhaustive_limit)
        timing["exhaustive_seconds"] = time.perf_counter() - t
    best = exhaustive if exhaustive is not None else greedy
    gap = None
    if exhaustive is not None:
        absolute = exhaustive["score"] - greedy["score"]
        gap = {"absolute": absolute,
               "relative": absolute / exhaustive["score"] if exhaustive["score"] > 0 else 0.0,
               "same_set": sorted(greedy["chosen"]) == sorted(exhaustive["chosen"])}
    ids = candidates.ids
    table = rank_candidates(table, [ids[c] for c in best["chosen"]])
    table["in_greedy_set"] = table.index.isin([str(ids[c]) for c in greedy["chosen"]])
    t = time.perf_counter()
    critical = planner.remove_one(links=links, patches=patches)
    timing["remove_one_seconds"] = time.perf_counter() - t
    timing["runs"] = planner.runs
    timing["run_seconds"] = planner.run_seconds
    return {"planner": planner, "table": table, "critical": critical, "greedy": greedy,
            "exhaustive": exhaustive, "best": best, "gap": gap,
            "screened": pool, "budget": float(budget), "timing": timing,
            "links_file": None if links_file is None else Path(links_file)}


def _set_json(result, ids):
    if result is None:
        return None
    out = {k: v for k, v in result.items() if k != "chosen"}
    out["chosen"] = [str(ids[c]) for c in result["chosen"]]
    return out


def write_corridors(plan, out, *, maps: bool = True, baseline=None, force: bool = False,
                    inputs=None, checked: bool = False) -> Path:
    """Write the ``corridors`` output folder (atomically; the partial log is then removed).

    Files: ``corridors.csv``, ``critical.csv``, ``chosen.csv``, ``corridors.json``,
    ``corridors.gpkg`` (layers ``candidates``, ``critical_links``, ``critical_patches``),
    ``evaluations.csv`` (every run), ``corridors.html`` (the Corridor planning section alone)
    and, with ``maps``, ``maps/corridors_gain_per_cost.png``, ``maps/critical_patches.png``
    and ``report.html``: the report of the network as it is (as ``trophoscape run`` writes it,
    with its maps) followed by the Corridor planning section.

    Parameters
    ----------
    baseline : RunResult, optional
        The run of the network as it is, for ``report.html``; run here when not given (the
        planner's own baseline run skips the stability and capacity analyses).
    force : bool
        Write to ``out`` even when it is a folder trophoscape did not write (that folder is
        kept, renamed to ``NAME.replaced-YYYYmmdd-HHMMSS``).
    inputs : list of path, optional
        The input files, which ``out`` must not hold (default: the scenario's, the
        candidates file and the ``--remove-links`` file of the plan).
    checked : bool
        ``out`` went through :func:`trophoscape.outputs.check_out` already (before the
        runs); a folder that changed since is dealt with when the new one is put in place.
    """
    import geopandas

    from .analysis.planning import DEFAULT_WEIGHTS, OBJECTIVES
    from .outputs import file_sha256, input_files, provenance, staged_folder, write_json

    out = Path(out)
    planner = plan["planner"]
    study = planner.study
    cand = planner.candidates
    if inputs is None:
        inputs = [*input_files(study.scenario), cand.path, plan.get("links_file")]
    table = plan["table"]
    ordered = ["source", "target", "length_km", "cost", *[f"gain_{k}" for k in OBJECTIVES],
               "score", "score_per_cost", "rank", "chosen", "in_greedy_set"]
    ordered += [c for c in table.columns if c not in ordered]
    table = table[ordered]
    critical = plan["critical"]
    ids = cand.ids
    best = plan["best"]
    steps = []
    if plan["exhaustive"] is not None:
        for c in best["chosen"]:
            steps.append({"method": "exhaustive", "step": "", "corridor_id": str(ids[c]),
                          "cost": float(cand.cost[c]), "score_gain": "", "score_after": ""})
    for k, s in enumerate(plan["greedy"]["steps"], start=1):
        steps.append({"method": "greedy", "step": k, "corridor_id": s["corridor_id"],
                      "cost": s["cost"], "score_gain": s["gain"], "score_after": s["score"]})
    chosen = pd.DataFrame(steps, columns=["method", "step", "corridor_id", "cost", "score_gain",
                                          "score_after"])
    summary = {
        "baseline": planner.baseline,
        "objectives": {k: {"meaning": m, "better": "higher" if s > 0 else "lower"}
                       for k, (m, s) in OBJECTIVES.items()},
        "gain_sign": "every gain_* is positive when the change is good for the species; "
                     "loss_* is positive when losing the element hurts",
        "synchrony": SYNCHRONY_NOTE,
        "weights": planner.weights,
        "default_weights": DEFAULT_WEIGHTS,
        "score": "sum of weight x gain; capacity gains enter as their relative change "
                 "(gain / baseline metapopulation capacity); an undefined gain counts as 0",
        "budget": plan["budget"],
        "chosen_by": "exhaustive" if plan["exhaustive"] is not None else "greedy",
        "chosen": [str(ids[c]) for c in best["chosen"]],
        "chosen_cost": best["cost"],
        "chosen_score": best["score"],
        "greedy": _set_json(plan["greedy"], ids),
        "exhaustive": _set_json(plan["exhaustive"], ids),
        "greedy_gap": plan["gap"],
        "screened": None if plan["screened"] is None else {
            "method": "gain in metapopulation capacity (prey + predator, relative) per cost",
            "simulated": [str(ids[c]) for c in plan["screened"]]},
        "failed_runs": {planner._label(v): msg for v, msg in planner.failures.items()},
        "timing": plan["timing"],
        "candidates_file": None if cand.path is None else str(cand.path),
        "candidates_sha256": None if cand.path is None else file_sha256(cand.path),
        "caution": CAUTION,
        "provenance": provenance(study),
    }
    frame = cand.frame.copy()
    for c in table.columns:
        if c not in ("source", "target", "length_km", "cost"):
            frame[c] = table.loc[frame["corridor_id"], c].to_numpy()
    land = study.landscape
    links_frame = study.network.links_frame(land)
    with staged_folder(out, force=force, inputs=inputs, command="corridors",
                       allow=(PARTIAL,), checked=checked) as stage:
        table.to_csv(stage / "corridors.csv", index=True)
        critical.to_csv(stage / "critical.csv", index=False)
        chosen.to_csv(stage / "chosen.csv", index=False)
        write_json(stage / "corridors.json", summary)
        frame.to_file(stage / "corridors.gpkg", layer="candidates", driver="GPKG",
                      engine="pyogrio")
        link_rows = critical[critical["kind"] == "link"]
        if len(link_rows):
            key = links_frame["source"] + "–" + links_frame["target"]
            lines = links_frame.set_index(key).loc[link_rows["element"]]
            layer = geopandas.GeoDataFrame(link_rows.drop(columns=["kind"]).reset_index(drop=True),
                                           geometry=lines.geometry.to_numpy(), crs=land.crs)
            layer.to_file(stage / "corridors.gpkg", layer="critical_links", driver="GPKG",
                          engine="pyogrio")
        patch_rows = critical[critical["kind"] == "patch"].set_index("element")
        patches = land.frame[["patch_id", "area_km2", "geometry"]].copy()
        if len(patch_rows):
            for c in patch_rows.columns:
                if c.startswith("loss_") or c in ("score_loss", "rank", "status"):
                    patches[c] = patch_rows[c].reindex(patches["patch_id"]).to_numpy()
            patches.to_file(stage / "corridors.gpkg", layer="critical_patches", driver="GPKG",
                            engine="pyogrio")
        log = out / PARTIAL
        if log.is_file():
            shutil.copyfile(log, stage / "evaluations.csv")
        figures = {}
        if maps:
            from .plot import corridor_map, patch_map

            (stage / "maps").mkdir()
            frame["gain_per_cost_map"] = frame["score_per_cost"].replace(
                [np.inf, -np.inf], np.nan)
            figures["gain"] = corridor_map(
                land.frame, frame, "gain_per_cost_map",
                path=stage / "maps" / "corridors_gain_per_cost.png",
                chosen=frame["chosen"].to_numpy(bool), links=links_frame,
                title="Candidate corridors: score gained per unit cost",
                label="score per unit cost")
            if len(patch_rows):
                figures["patches"] = patch_map(
                    patches, "score_loss", path=stage / "maps" / "critical_patches.png",
                    links=links_frame, title="Patches: score lost if the patch is lost",
                    label="score lost")
        blocks = corridor_blocks(plan, summary, table, critical, figures)
        (stage / "corridors.html").write_text(_corridors_page(blocks, summary),
                                              encoding="utf-8")
        if maps:
            from .report import add_section, write_report

            if baseline is None:
                from .study import run_study

                baseline = run_study(study)
            report = write_report(stage, baseline)
            add_section(report, "Corridor planning", blocks=blocks, anchor="corridors")
    (out / PARTIAL).unlink(missing_ok=True)
    return out


RANK_ROWS = 20  # rows of each table in the report; the CSV files hold every row


def corridor_blocks(plan, summary, table, critical, figures) -> list:
    """The Corridor planning section as report blocks (:func:`trophoscape.report.add_section`):
    what was done, the chosen set and the greedy–exhaustive gap, the ranking table, the two
    maps with a sentence each on how to read them, the critical elements."""
    from .analysis.planning import OBJECTIVES
    from .report import Html, figures_html, table_html

    weights = ", ".join(f"{k} × {v:g}" for k, v in summary["weights"].items())
    ranked = table.reset_index().sort_values("rank")
    ranked = ranked[ranked["rank"] > 0]
    blocks = [
        f"{len(table)} candidate corridors, budget {plan['budget']:g}. Each candidate was added "
        "alone to the network and the run repeated; the gains are changes against the network "
        "as it is, positive when good for the species. The score weighs "
        f"them: {weights} (capacity as its relative change).",
        SYNCHRONY_NOTE,
    ]
    greedy, exhaustive, gap = plan["greedy"], plan["exhaustive"], plan["gap"]

    def names(key):
        return ", ".join(summary[key]["chosen"]) or "none"

    blocks.append(f"Greedy set (best score gained per cost, re-evaluated after each addition): "
                  f"{names('greedy')}, cost {greedy['cost']:g}, score {greedy['score']:.4g}.")
    if exhaustive is not None:
        if gap["same_set"] or gap["absolute"] <= 1e-9:
            verdict = "Greedy found the best set."
        else:
            verdict = (f"Greedy falls short of the best set by {gap['absolute']:.4g} in score "
                       f"({gap['relative']:.1%} of the best).")
        blocks.append(f"Best set by exhaustive search over the {exhaustive['subsets']} subsets "
                      f"within budget: {names('exhaustive')}, cost {exhaustive['cost']:g}, "
                      f"score {exhaustive['score']:.4g}. {verdict}")
    else:
        blocks.append("No exhaustive search (too many candidates); the greedy set is reported "
                      "as chosen and may fall short of the best set.")
    if plan["screened"] is not None:
        blocks.append(f"Two-stage screening: only the {len(plan['screened'])} candidates with the "
                      "largest gain in metapopulation capacity per cost were simulated.")
    chosen = ", ".join(summary["chosen"]) or "none"
    blocks.append(Html(f"<p><strong>Chosen set ({summary['chosen_by']}):</strong> "
                       f"{html.escape(chosen)}, cost {summary['chosen_cost']:g} of the budget "
                       f"{plan['budget']:g}.</p>"))
    gains = ["gain_predator_area_persistence", "gain_predator_capacity",
             "gain_predator_synchrony"]
    gains += [f"gain_{k}" for k in summary["weights"] if f"gain_{k}" not in gains
              and k in OBJECTIVES]
    shown = f"the first {RANK_ROWS} of {len(ranked)}; " if len(ranked) > RANK_ROWS else ""
    blocks.append(Html("<h3>Candidates, best first</h3>"))
    blocks.append(table_html(
        ranked, ["rank", "corridor_id", "source", "target", "cost", *gains, "score",
                 "score_per_cost", "chosen"], n=RANK_ROWS,
        caption=f"Ranked by score ({shown}corridors.csv has every candidate and objective). "
                "A gain of 0 means the candidate changes nothing that objective measures."))
    if "gain" in figures:
        blocks.append(figures_html([(
            "Candidate corridors: score gained per unit cost", figures["gain"],
            "Each candidate line is coloured by the score it adds per unit cost (brighter is "
            "better value); the chosen set has a dark casing; thin grey lines are the existing "
            "links.")]))
    if len(critical):
        blocks.append(Html("<h3>Critical elements</h3>"))
        blocks.append("Each existing link and patch removed alone and the run repeated; the "
                      "loss is what the score falls by without it, so the top rows are the "
                      "ones to protect first.")
        for kind, what in (("link", "Links"), ("patch", "Patches")):
            rows = critical[critical["kind"] == kind]
            if len(rows):
                blocks.append(table_html(
                    rows, ["rank", "element", "loss_predator_area_persistence",
                           "loss_predator_capacity", "score_loss"], n=RANK_ROWS,
                    caption=f"{what}, most critical first (critical.csv has every row)."))
        if "patches" in figures:
            blocks.append(figures_html([(
                "Patches: score lost if the patch is lost", figures["patches"],
                "Each patch coloured by how much the score falls when that patch alone is "
                "lost (brighter is a larger loss): the brightest are the patches the network "
                "can least spare.")]))
    return blocks


def _corridors_page(blocks, summary) -> str:
    """``corridors.html``: the Corridor planning section on its own page, with the caution."""
    from .report import Html, footer_text, page_html, section_html

    study_name = summary["provenance"].get("scenario_file") or "scenario"
    caution = Html(f'<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>')
    body = section_html("Corridor planning", blocks=[caution, *blocks], anchor="corridors")
    body += ("<p>The same section, after the network as it is (scenario, headline results and "
             'maps), is in <a href="report.html">report.html</a> when the maps were drawn.</p>')
    return page_html(f"Corridor planning: {Path(study_name).stem}", body,
                     footer_text(summary["provenance"]))


def _print_plan(plan, out) -> None:
    table = plan["table"]
    best = plan["best"]
    ids = plan["planner"].candidates.ids
    print(f"wrote {out}")
    top = table[table["rank"] > 0].sort_values("rank").head(3)
    print("  best candidates: " + ", ".join(f"{i} (score {s:.3g})"
                                            for i, s in zip(top.index, top["score"])))
    print(f"  chosen within budget {plan['budget']:g}: "
          f"{', '.join(str(ids[c]) for c in best['chosen']) or 'none'} "
          f"(cost {best['cost']:g}, score {best['score']:.3g})")
    if plan["gap"] is not None and not plan["gap"]["same_set"]:
        print(f"  greedy falls short of the best set by {plan['gap']['absolute']:.3g}")
    print(f"  {plan['timing']['runs']} runs in {plan['timing']['total_seconds']:.1f} s")


# ---------------------------------------------------------------------------- compare


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]+", "-", text).strip("-") or "scenario"


def run_compare(args) -> int:
    """The ``compare`` command; returns the exit code."""
    from .outputs import check_out, input_files
    from .study import load_study, run_study

    if len(args.scenarios) < 2:
        raise InputError(f"needs at least two scenarios, got {len(args.scenarios)}; give two "
                         "or more scenario files, the first being the reference",
                         field="scenarios")
    columns = [c.strip() for c in args.columns.split(",") if c.strip()]
    studies = [load_study(p) for p in args.scenarios]
    inputs = [f for study in studies for f in input_files(study.scenario)]
    check_out(args.out, inputs=inputs, force=args.force)  # before the runs
    results = []
    for k, study in enumerate(studies):
        if not args.quiet:
            print(f"running {k + 1}/{len(studies)}: {study.scenario.name}")
        results.append(run_study(study, progress=not args.quiet))
    write_comparison(results, args.out, columns=columns, maps=not args.no_maps,
                     runs=not args.no_runs, force=args.force, checked=True)
    if not args.quiet:
        print(f"wrote {args.out}")
    return 0


def write_comparison(results, out, *, columns=("predator_occupancy", "prey_occupancy"),
                     maps: bool = True, runs: bool = True, force: bool = False,
                     checked: bool = False) -> Path:
    """Write the ``compare`` output folder (atomically).

    Files: ``comparison.csv`` (one row per scenario), ``differences_<B>_minus_<A>.csv`` per
    scenario after the first (the reference A), ``maps/difference_<column>_<B>_minus_<A>.png``
    (diverging colours centred on 0), ``report.html`` (the scenarios in plain words, the
    headline results side by side, the difference maps; with ``maps``), and ``runs/<name>/``
    (each scenario's own output folder, with its maps and report) unless ``runs`` is False.
    ``force`` writes to ``out`` even when it is a folder trophoscape did not write (that
    folder is kept, renamed to ``NAME.replaced-YYYYmmdd-HHMMSS``); ``checked``: ``out`` went
    through :func:`trophoscape.outputs.check_out` already, before the runs.
    """
    from .analysis.planning import compare_results, patch_differences
    from .outputs import input_files, staged_folder, write_json, write_run

    table = compare_results(results)
    slugs = []
    for name in table.index:
        s = _slug(name)
        while s in slugs:
            s += "-2"
        slugs.append(s)
    diffs = [patch_differences(results[0], r, columns) for r in results[1:]]
    drawn = []
    inputs = [f for r in results for f in input_files(r.study.scenario)]
    with staged_folder(out, force=force, inputs=inputs, command="compare",
                       checked=checked) as stage:
        table.to_csv(stage / "comparison.csv", index=True)
        write_json(stage / "comparison.json", {
            "reference": table.index[0], "scenarios": list(table.index),
            "differences": "other − reference, for patches shared by id",
            "synchrony": "lower synchrony is better for regional survival",
            "caution": CAUTION})
        for k, (diff, r) in enumerate(zip(diffs, results[1:]), start=1):
            stem = f"{slugs[k]}_minus_{slugs[0]}"
            diff.to_csv(stage / f"differences_{stem}.csv", index=True)
            if maps and len(diff):
                from .plot import patch_map

                (stage / "maps").mkdir(exist_ok=True)
                frame = r.study.landscape.frame.set_index("patch_id").loc[diff.index]
                frame = frame[["geometry"]].reset_index()
                for c in columns:
                    frame[c] = diff[f"{c}_difference"].to_numpy()
                    path = patch_map(frame.set_geometry("geometry"), c,
                                     path=stage / "maps" / f"difference_{c}_{stem}.png",
                                     diverging=True,
                                     title=f"{c.replace('_', ' ')}: {table.index[k]} − "
                                           f"{table.index[0]}",
                                     label=f"difference in {c} (other − reference)")
                    drawn.append((c, table.index[k], path))
        if runs:
            for slug, r in zip(slugs, results):
                write_run(r, stage / "runs" / slug, maps=maps)
        if maps:
            from .report import write_comparison_report

            write_comparison_report(stage, results, table, drawn,
                                    runs=[f"runs/{s}" for s in slugs] if runs else None)
    return Path(out)
