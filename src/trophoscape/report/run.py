"""A run's whole output folder: the patch layers, tables, series, summary, figures and report.
"""

from __future__ import annotations

from pathlib import Path

from ..io.folder import staged_folder
from ..io.series import write_timeseries
from ..io.tables import patches_frame, provenance, write_json
from ..scenario import input_files
from ..workflows.tasks import InSecondProcess, second_process_possible

__all__ = ["run_to_folder", "write_run", "write_run_files", "MAPS_APART_MIN_PATCHES"]

#: From this many patches, on Linux (where processes fork safely) with a second core,
#: the maps and the report are drawn in a second process while this one writes the patch
#: layers, tables and series (the two take about the same time at 100,000 patches). Forked,
#: the process shares the run's results without copying them. Below it, everything is
#: written in this process, in the same order; the files are the same either way.
MAPS_APART_MIN_PATCHES = 20_000


def run_to_folder(study, out, *, maps: bool = True, geojson: bool = False, force: bool = False,
                  progress: bool = False, command: str = "run", on_accepted=None):
    """Run a study and write its whole output folder: what ``trophoscape run`` does.

    The output folder is checked and staged before the run, which writes ``timeseries.nc``
    into it as it goes; the folder is put in place once every file is whole.

    Parameters
    ----------
    study : Study
    out : path
        The output folder (see :func:`trophoscape.io.folder.check_out` for what is refused).
    maps, geojson, force :
        As for :func:`write_run`.
    progress : bool
        A progress bar on stderr.
    command : str
        The command recorded in the folder's marker.
    on_accepted : callable, optional
        Called with the study once the output folder is accepted, before the run (the
        command line prints the network summary there, so that a refused folder is the only
        thing it says).

    Returns
    -------
    RunResult
    """
    from ..workflows.study import run_study

    with staged_folder(out, force=force, inputs=input_files(study.scenario),
                       command=command) as stage:
        if on_accepted is not None:
            on_accepted(study)
        result = run_study(study, progress=progress, series_to=stage / "timeseries.nc")
        write_run_files(result, stage, maps=maps, geojson=geojson)
    return result


def write_run(result, out, *, maps: bool = True, geojson: bool = False,
              force: bool = False, sections=()) -> Path:
    """Write the whole output folder of a run, atomically.

    Parameters
    ----------
    result : RunResult
    out : path
        The output folder (created if needed; an earlier output folder there is replaced as
        a whole once every new file is complete; see :func:`check_out` for what is refused).
    maps : bool
        Draw PNG maps and the HTML report.
    geojson : bool
        Also write ``patches.geojson`` (WGS 84, as RFC 7946 wants).
    force : bool
        Replace an existing folder even when trophoscape did not write it.
    sections : sequence of str
        HTML of sections to add after the run's own in the report
        (:func:`trophoscape.report.html.section_html`).
    """
    out = Path(out)
    with staged_folder(out, force=force, inputs=input_files(result.study.scenario),
                       command="write_run") as stage:
        write_run_files(result, stage, maps=maps, geojson=geojson, sections=sections)
    return out


def write_run_files(result, stage, *, maps: bool = True, geojson: bool = False,
                    sections=()) -> None:
    """The files of :func:`write_run`, written into ``stage``, a folder from
    :func:`staged_folder` (the command line opens it before the run, so that the run
    writes ``timeseries.nc`` there as it goes)."""
    stage = Path(stage)
    gdf = patches_frame(result)
    links = result.study.network.links_frame(result.study.landscape)
    summary = dict(result.summary)
    summary["crs"] = result.study.landscape.crs.to_string()
    summary["repaired_geometries"] = list(result.study.landscape.repaired)
    summary["provenance"] = provenance(result.study)
    def draw():
        from .html import write_figures_and_report

        write_figures_and_report(stage, result, gdf, links, summary, sections)

    apart = (InSecondProcess(draw, doing="drew the maps and the report",
                             name="trophoscape-maps")
             if maps and _apart(len(gdf)) else None)
    if apart is not None and not apart.start():
        apart = None  # no process could be started: drawn here, after the files
    try:
        _write_files(result, stage, gdf, links, summary, geojson)
    except BaseException:
        if apart is not None:
            apart.stop()
        raise
    if apart is not None:
        apart()  # waits for it, raises its error here
    elif maps:
        draw()


def _write_files(result, stage, gdf, links, summary, geojson) -> None:
    gdf.to_file(stage / "patches.gpkg", layer="patches", driver="GPKG", engine="pyogrio")
    links.to_file(stage / "patches.gpkg", layer="links", driver="GPKG", engine="pyogrio")
    if geojson:
        gdf.to_crs("EPSG:4326").to_file(stage / "patches.geojson", driver="GeoJSON",
                                        engine="pyogrio")
    result.patches.to_csv(stage / "patches.csv", index=True)
    write_timeseries(stage / "timeseries.nc", result)
    write_json(stage / "summary.json", summary)


def _apart(n_patches: int) -> bool:
    """Whether the maps of a run of ``n_patches`` are drawn in a second process."""
    return n_patches >= MAPS_APART_MIN_PATCHES and second_process_possible()
