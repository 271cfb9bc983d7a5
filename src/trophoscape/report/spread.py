"""The folder of ``spread``: the shocked run's folder with the spread columns, ``spread.csv``,
``spread.json``, the spread maps and, with an origin scan, ``origins.csv``.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError, param

__all__ = ["spread_to_folder", "write_spread"]

def spread_to_folder(scenario, out, *, origins=None, workers=None, maps: bool = True,
                     geojson: bool = False, force: bool = False, progress: bool = False):
    """Follow a shock's collapse through the network and write the folder: what
    ``trophoscape spread`` does.

    ``origins``: None (no origin scan), ``"all"`` (every patch as an origin) or a number of
    origins (at least 1) spread over the landscape
    (:func:`~trophoscape.workflows.spread.stratified_origins`, seeded by ``run.seed``).
    The output folder is checked before the runs. Returns the
    :class:`~trophoscape.workflows.spread.SpreadResult`.
    """
    from ..io.folder import check_out
    from ..scenario import input_files
    from ..workflows.spread import origin_scan, run_spread, stratified_origins
    from ..workflows.study import Study, load_study
    from ..workflows.tasks import check_workers

    if origins is not None and origins != "all" and (
            isinstance(origins, bool) or not isinstance(origins, int) or origins < 1):
        raise InputError(f"{origins!r} is not a whole number of at least 1 or 'all'; give "
                         f"e.g. {param('origins', 50)}, or {param('origins', 'all')}",
                         field=param("origins"))
    check_workers(workers)
    study = scenario if isinstance(scenario, Study) else load_study(scenario)
    check_out(out, inputs=input_files(study.scenario), force=force)  # before the runs
    result = run_spread(study, progress=progress)
    scan = None
    if origins is not None:
        chosen = (None if origins == "all" else
                  stratified_origins(study.landscape.centroids, origins,
                                     seed=study.scenario["run.seed"]))
        scan = origin_scan(study, chosen, workers=workers, progress=progress)
    write_spread(study, result, out, scan=scan, maps=maps, geojson=geojson, force=force,
                 checked=True)
    return result


def write_spread(study, result, out, *, scan=None, maps=True, geojson=False,
                 force=False, checked=False) -> Path:
    """Write the spread outputs (and the shocked run's folder) into ``out``, atomically.

    Parameters
    ----------
    study : Study
    result : trophoscape.workflows.spread.SpreadResult
    out : path
    scan : pandas.DataFrame, optional
        From :func:`trophoscape.workflows.spread.origin_scan`.
    force : bool
        Write to ``out`` even when it is a folder trophoscape did not write (that folder is
        kept, renamed to ``NAME.replaced-YYYYmmdd-HHMMSS``).
    checked : bool
        ``out`` went through :func:`trophoscape.io.folder.check_out` already (before the
        runs); a folder that changed since is dealt with when the new one is put in place.
    """
    from ..scenario import input_files
    from ..io.tables import provenance, write_json
    from ..io.folder import staged_folder
    from .run import write_run
    from ..workflows.study import RunResult, analyse

    out = Path(out)
    table, summary, extras = analyse(study, result.shocked)
    table = table.join(result.table[SPREAD_COLUMNS])
    summary["spread"] = result.summary
    run = RunResult(study=study, trajectory=result.shocked, patches=table, summary=summary,
                    extras=extras)
    spread_summary = dict(result.summary)
    spread_summary["scenario"] = study.scenario.name
    spread_summary["time_unit"] = study.scenario["time_unit"]
    spread_summary["shocks"] = [dict(t) for t in study.scenario["shock"]]
    spread_summary["provenance"] = provenance(study)
    with staged_folder(out, force=force, inputs=input_files(study.scenario),
                       command="spread", checked=checked) as stage:
        # the spread's maps first, so that the run's report is written once, with them
        sections = [_spread_maps(stage, study, result, scan)] if maps else []
        write_run(run, stage, maps=maps, geojson=geojson, sections=sections)
        result.table[SPREAD_COLUMNS].to_csv(stage / "spread.csv", index=True)
        write_json(stage / "spread.json", spread_summary)
        if scan is not None:
            scan.to_csv(stage / "origins.csv", index=True)
    return out


def _spread_maps(stage: Path, study, result, scan) -> str:
    """Draw the spread's maps into ``stage/maps``; return the report section showing them."""
    from .figures import MapCanvas, arrival_distance_plot, patch_map
    from .html import section_html

    folder = stage / "maps"
    folder.mkdir(exist_ok=True)
    land = study.landscape
    links = study.network.links_frame(land)
    frame = land.frame[["patch_id", "geometry"]].copy()
    for col in ("arrival_time", "distance_km", "network_distance_km"):
        frame[col] = result.table[col].to_numpy()
    unit = study.scenario["time_unit"]
    species = result.summary["species"]
    canvas = MapCanvas(frame, links)  # prepared once for both maps
    patch_map(frame, "arrival_time", path=folder / "spread_arrival.png", canvas=canvas,
              title=f"Arrival of {species} collapse", label=f"arrival time ({unit})",
              cmap="viridis_r", isolines=6)
    s = result.summary
    arrival_distance_plot(result.table["distance_km"].to_numpy(),
                          result.table["arrival_time"].to_numpy(),
                          path=folder / "spread_arrival_distance.png",
                          speed=s["front_speed_km_per_time"],
                          interval=s["front_speed_interval_km_per_time"],
                          shock_time=s["shock_time"], time_unit=unit)
    if scan is not None:
        frame["cascade_share"] = scan["cascade_share"].reindex(
            land.ids.astype(str)).to_numpy(dtype=float)
        patch_map(frame, "cascade_share", path=folder / "origin_vulnerability.png",
                  canvas=canvas, title="Origins: share of other patches a collapse reaches",
                  label="share of patches reached", cmap="magma_r")
    speed = s["front_speed_km_per_time"]
    figures = [
        (f"Arrival of {species} collapse", folder / "spread_arrival.png",
         "When collapse reached each patch after the shock; dashed lines are isochrones, "
         "grey patches were never reached."),
        ("Arrival time against distance", folder / "spread_arrival_distance.png",
         "Each dot is a reached patch; the line is the robust (Theil–Sen) front speed."),
    ]
    if scan is not None:
        figures.append(("Worst origins", folder / "origin_vulnerability.png",
                        "Each patch coloured by the share of the other patches a collapse "
                        "starting there reaches: the darkest are the origins to watch."))
    intro = (f"Shock at {s['shock_time']:g} {unit}; collapse reached "
             f"{s['reached_share']:.0%} of the patches"
             + (f", at {speed:.3g} km per {unit}." if speed is not None
                and speed == speed else "."))
    return section_html("Collapse spread", figures, intro=intro)


SPREAD_COLUMNS = ["arrival_time", "order", "network_distance_km", "distance_km",
                  "recovered_at", "shocked", "baseline_collapse"]
