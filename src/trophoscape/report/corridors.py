"""The folders of ``corridors`` and ``compare``: tables, layers, maps and the report page.

Written through :func:`trophoscape.io.folder.staged_folder`, so a folder appears whole or not
at all. While the corridor runs go on, each finished run is recorded in the ledger
``corridors.partial.sqlite`` in the output folder (:mod:`trophoscape.io.ledger`, as a sweep's):
an interrupted ranking keeps what it had, and running the same command again reads those runs
back instead of running them again. ``evaluations.csv`` is written from the ledger.
"""

from __future__ import annotations

import dataclasses
import html
import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, param
from ..workflows.planning import PARTIAL, PARTIAL_FILES, evaluations_frame
from .html import CAUTION

__all__ = ["corridors_to_folder", "compare_to_folder", "write_corridors", "write_comparison"]

#: The columns of ``candidates.gpkg`` (candidates found with ``--candidates auto``).
FOUND_COLUMNS = ("corridor_id", "cost", "source", "target", "length_km", "straight_km",
                 "linked_as_km", "reason")

def corridors_to_folder(scenario, candidates, out, *, budget, weights=None, layer=None,
                        links="all", patches=True, screen=None, exhaustive_limit=12,
                        workers=None, maps: bool = True, force: bool = False,
                        progress: bool = False, max_candidates: int = 20):
    """Rank candidate corridors, choose a set within the budget and write the folder: what
    ``trophoscape corridors`` does.

    Parameters
    ----------
    scenario : path or Study
        The scenario file (or a study built from it).
    candidates : path or "auto"
        The candidate corridors (lines with ``cost``; see the README), or "auto": found by
        :func:`trophoscape.workflows.candidates.find_candidates` (at most
        ``max_candidates``) and written to ``candidates.gpkg`` in ``out``.
    out : path
        The output folder. While the runs go on it holds ``corridors.partial.sqlite``: running
        the same call again reads those runs back instead of running them again.
    budget, weights, screen, exhaustive_limit, workers :
        As for :func:`trophoscape.workflows.planning.plan_corridors`.
    layer : str, optional
        The layer of a candidates file with several.
    links : "all", None or path
        Existing links to remove one at a time: every link, none, or those listed in a file
        (:func:`trophoscape.workflows.planning.read_link_list`).
    patches : bool
        Remove each patch one at a time too.
    maps, force, progress :
        Draw maps and the report; replace a folder trophoscape did not write (kept, renamed
        aside); a progress bar on stderr.

    Returns
    -------
    CorridorPlan
        The plan (see :func:`~trophoscape.workflows.planning.plan_corridors`).
    """
    import time

    from ..io.folder import working_folder
    from ..scenario import input_files
    from ..workflows.planning import (check_plan_options, plan_corridors, read_candidates,
                                      read_link_list)
    from ..workflows.study import Study, load_study

    weights = check_plan_options(budget=budget, screen=screen,
                                 exhaustive_limit=exhaustive_limit, workers=workers,
                                 weights=weights)
    study = scenario if isinstance(scenario, Study) else load_study(scenario)
    snap = {"snap_km": study.scenario["dispersal.corridor_snap_km"],
            "corridor_resistance": study.scenario["dispersal.corridor_resistance"]}
    if isinstance(candidates, str) and candidates == "auto":
        from ..workflows.candidates import find_candidates
        from ..workflows.planning import snap_candidates

        found = find_candidates(study, max_candidates=max_candidates)
        found.attrs["has_ids"] = True
        found.attrs["found"] = True
        candidates = snap_candidates(found, study.landscape, **snap)
        inputs = [*input_files(study.scenario)]
    else:
        candidates_file = Path(candidates)
        candidates = read_candidates(candidates_file, study.landscape, layer=layer, **snap)
        inputs = [*input_files(study.scenario), candidates_file]
    links_file = None
    if links is not None and links != "all":
        links_file = Path(links)
        links = read_link_list(links_file, study)
        inputs.append(links_file)
    out = Path(out)
    # everything is validated: only now does the output folder appear (for the partial log);
    # an earlier output folder there stays until the new one is whole, and a folder made
    # here that got no row is removed again if the call fails
    with working_folder(out, command="corridors", allow=[PARTIAL_FILES], inputs=inputs,
                        force=force, reuse=True):
        started = time.perf_counter()
        plan = plan_corridors(study, candidates, budget=budget, weights=weights, links=links,
                              patches=patches, screen=screen,
                              exhaustive_limit=exhaustive_limit, workers=workers,
                              progress=progress, log=out / PARTIAL, links_file=links_file)
        plan.timing["total_seconds"] = time.perf_counter() - started
        write_corridors(plan, out, maps=maps, force=force, inputs=inputs, checked=True)
    return plan


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
        ``out`` went through :func:`trophoscape.io.folder.check_out` already (before the
        runs); a folder that changed since is dealt with when the new one is put in place.
    """
    import geopandas

    from ..workflows.planning import DEFAULT_WEIGHTS, OBJECTIVES
    from ..io.folder import file_sha256, staged_folder
    from ..scenario import input_files
    from ..io.tables import provenance, write_json

    out = Path(out)
    planner = plan.planner
    study = planner.study
    cand = planner.candidates
    if inputs is None:
        inputs = [*input_files(study.scenario), cand.path, plan.links_file]
    table = plan.table
    ordered = ["source", "target", "length_km", "cost", *[f"gain_{k}" for k in OBJECTIVES],
               "score", "score_per_cost", "rank", "chosen", "in_greedy_set"]
    ordered += [c for c in table.columns if c not in ordered]
    table = table[ordered]
    critical = plan.critical
    ids = cand.ids
    best = plan.best
    steps = []
    if plan.exhaustive is not None:
        for c in best.chosen:
            steps.append({"method": "exhaustive", "step": "", "corridor_id": str(ids[c]),
                          "cost": float(cand.cost[c]), "score_gain": "", "score_after": ""})
    for k, s in enumerate(plan.greedy.steps, start=1):
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
        "budget": plan.budget,
        "chosen_by": "exhaustive" if plan.exhaustive is not None else "greedy",
        "chosen": [str(ids[c]) for c in best.chosen],
        "chosen_cost": best.cost,
        "chosen_score": best.score,
        "greedy": plan.greedy.as_json(ids),
        "exhaustive": None if plan.exhaustive is None else plan.exhaustive.as_json(ids),
        "greedy_gap": None if plan.gap is None else dataclasses.asdict(plan.gap),
        "screened": None if plan.screened is None else {
            "method": "gain in metapopulation capacity (prey + predator, relative) per cost",
            "simulated": [str(ids[c]) for c in plan.screened]},
        "failed_runs": {planner._label(v): msg for v, msg in planner.failures.items()},
        "timing": plan.timing,
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
                       allow=(PARTIAL_FILES,), checked=checked) as stage:
        table.to_csv(stage / "corridors.csv", index=True)
        critical.to_csv(stage / "critical.csv", index=False)
        chosen.to_csv(stage / "chosen.csv", index=False)
        write_json(stage / "corridors.json", summary)
        frame.to_file(stage / "corridors.gpkg", layer="candidates", driver="GPKG",
                      engine="pyogrio")
        if cand.frame is not None and cand.frame.attrs.get("found"):
            # the candidates trophoscape found, as a file to edit and give back
            found = cand.frame[[c for c in FOUND_COLUMNS if c in cand.frame.columns]]
            geopandas.GeoDataFrame(found, geometry=cand.frame.geometry.to_numpy(),
                                   crs=cand.frame.crs).to_file(
                stage / "candidates.gpkg", layer="candidates", driver="GPKG", engine="pyogrio")
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
            evaluations_frame(log).to_csv(stage / "evaluations.csv", index=False)
        figures = {}
        if maps:
            from .figures import MapCanvas, corridor_map, patch_map

            (stage / "maps").mkdir()
            canvas = MapCanvas(land.frame, links_frame)  # prepared once for both maps
            frame["gain_per_cost_map"] = frame["score_per_cost"].replace(
                [np.inf, -np.inf], np.nan)
            figures["gain"] = corridor_map(
                land.frame, frame, "gain_per_cost_map",
                path=stage / "maps" / "corridors_gain_per_cost.png",
                chosen=frame["chosen"].to_numpy(bool), canvas=canvas,
                title="Candidate corridors: score gained per unit cost",
                label="score per unit cost")
            if len(patch_rows):
                figures["patches"] = patch_map(
                    patches, "score_loss", path=stage / "maps" / "critical_patches.png",
                    canvas=canvas, title="Patches: score lost if the patch is lost",
                    label="score lost")
        blocks = corridor_blocks(plan, summary, table, critical, figures)
        (stage / "corridors.html").write_text(_corridors_page(blocks, summary),
                                              encoding="utf-8")
        if maps:
            from .html import section_html, write_report

            if baseline is None:
                from ..workflows.study import run_study

                baseline = run_study(study)
            write_report(stage, baseline, extra_sections=[
                section_html("Corridor planning", blocks=blocks, anchor="corridors")])
    for name in (PARTIAL, PARTIAL + "-wal", PARTIAL + "-shm"):
        (out / name).unlink(missing_ok=True)
    return out


def corridor_blocks(plan, summary, table, critical, figures) -> list:
    """The Corridor planning section as report blocks (:func:`trophoscape.report.html.section_html`):
    what was done, the chosen set and the greedy–exhaustive gap, the ranking table, the two
    maps with a sentence each on how to read them, the critical elements."""
    from ..workflows.planning import OBJECTIVES
    from .html import Html, figures_html, table_html

    weights = ", ".join(f"{k} × {v:g}" for k, v in summary["weights"].items())
    ranked = table.reset_index().sort_values("rank")
    ranked = ranked[ranked["rank"] > 0]
    blocks = [
        f"{len(table)} candidate corridors, budget {plan.budget:g}. Each candidate was added "
        "alone to the network and the run repeated; the gains are changes against the network "
        "as it is, positive when good for the species. The score weighs "
        f"them: {weights} (capacity as its relative change).",
        SYNCHRONY_NOTE,
    ]
    greedy, exhaustive, gap = plan.greedy, plan.exhaustive, plan.gap

    def names(key):
        return ", ".join(summary[key]["chosen"]) or "none"

    blocks.append(f"Greedy set (best score gained per cost, re-evaluated after each addition): "
                  f"{names('greedy')}, cost {greedy.cost:g}, score {greedy.score:.4g}.")
    if exhaustive is not None:
        if gap.same_set or gap.absolute <= 1e-9:
            verdict = "Greedy found the best set."
        else:
            verdict = (f"Greedy falls short of the best set by {gap.absolute:.4g} in score "
                       f"({gap.relative:.1%} of the best).")
        blocks.append(f"Best set by exhaustive search over the {exhaustive.subsets} subsets "
                      f"within budget: {names('exhaustive')}, cost {exhaustive.cost:g}, "
                      f"score {exhaustive.score:.4g}. {verdict}")
    else:
        blocks.append("No exhaustive search (too many candidates); the greedy set is reported "
                      "as chosen and may fall short of the best set.")
    if plan.screened is not None:
        blocks.append(f"Two-stage screening: only the {len(plan.screened)} candidates with the "
                      "largest gain in metapopulation capacity per cost were simulated.")
    chosen = ", ".join(summary["chosen"]) or "none"
    blocks.append(Html(f"<p><strong>Chosen set ({summary['chosen_by']}):</strong> "
                       f"{html.escape(chosen)}, cost {summary['chosen_cost']:g} of the budget "
                       f"{plan.budget:g}.</p>"))
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
    from .html import Html, footer_text, page_html, section_html

    study_name = summary["provenance"].get("scenario_file") or "scenario"
    caution = Html(f'<p class="caution"><strong>Caution.</strong> {html.escape(CAUTION)}</p>')
    body = section_html("Corridor planning", blocks=[caution, *blocks], anchor="corridors")
    body += ("<p>The same section, after the network as it is (scenario, headline results and "
             'maps), is in <a href="report.html">report.html</a> when the maps were drawn.</p>')
    return page_html(f"Corridor planning: {Path(study_name).stem}", body,
                     footer_text(summary["provenance"]))


def compare_to_folder(scenarios, out, *, columns=("predator_occupancy", "prey_occupancy"),
                      maps: bool = True, runs: bool = True, force: bool = False,
                      progress: bool = False, on_run=None) -> list:
    """Run several scenarios and set their results side by side: what ``trophoscape
    compare`` does.

    ``scenarios``: two or more scenario files (or studies), the first being the reference.
    ``columns``: per-patch columns to difference (a sequence, or ``"a,b"``). ``on_run`` is
    called as ``on_run(k, n, study)`` before each run (the command line prints it). The
    output folder is checked before the first run. Returns the list of
    :class:`~trophoscape.workflows.study.RunResult`.
    """
    from ..io.folder import check_out
    from ..scenario import input_files
    from ..workflows.study import Study, load_study, run_study

    scenarios = list(scenarios)
    if len(scenarios) < 2:
        raise InputError(f"needs at least two scenarios, got {len(scenarios)}; give two "
                         "or more scenario files, the first being the reference",
                         field=param("scenarios"))
    if isinstance(columns, str):
        columns = [c.strip() for c in columns.split(",") if c.strip()]
    studies = [s if isinstance(s, Study) else load_study(s) for s in scenarios]
    inputs = [f for study in studies for f in input_files(study.scenario)]
    check_out(out, inputs=inputs, force=force)  # before the runs
    results = []
    for k, study in enumerate(studies):
        if on_run is not None:
            on_run(k, len(studies), study)
        results.append(run_study(study, progress=progress))
    write_comparison(results, out, columns=columns, maps=maps, runs=runs, force=force,
                     checked=True)
    return results


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
    through :func:`trophoscape.io.folder.check_out` already, before the runs.
    """
    from ..workflows.planning import compare_results, patch_differences
    from ..scenario import input_files
    from ..io.folder import staged_folder
    from ..io.tables import write_json
    from .run import write_run

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
                from .figures import MapCanvas, patch_map

                (stage / "maps").mkdir(exist_ok=True)
                frame = r.study.landscape.frame.set_index("patch_id").loc[diff.index]
                frame = frame[["geometry"]].reset_index().set_geometry("geometry")
                canvas = MapCanvas(frame)  # the shared patches, prepared once for every map
                for c in columns:
                    frame[c] = diff[f"{c}_difference"].to_numpy()
                    path = patch_map(frame, c, canvas=canvas,
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
            from .html import write_comparison_report

            write_comparison_report(stage, results, table, drawn,
                                    runs=[f"runs/{s}" for s in slugs] if runs else None)
    return Path(out)


SYNCHRONY_NOTE = ("Lower synchrony is better for regional survival: patches that fluctuate out "
                  "of step rescue one another, while synchronous ones can crash together. So "
                  "gain_*_synchrony is the fall in synchrony (positive is better).")


RANK_ROWS = 20  # rows of each table in the report; the CSV files hold every row


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]+", "-", text).strip("-") or "scenario"
