"""A run's whole output folder: the patch layers, tables, series, summary, figures and report.
"""

from __future__ import annotations

import gc
import multiprocessing
import os
import pickle
import sys
import traceback
from pathlib import Path

from ..errors import RunError
from ..machine import cores
from ..io.folder import staged_folder
from ..io.series import write_timeseries
from ..io.tables import patches_frame, provenance, write_json
from ..scenario import input_files

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

    apart = _InSecondProcess(draw) if maps and _apart(len(gdf)) else None
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
    if n_patches < MAPS_APART_MIN_PATCHES:
        return False
    if not sys.platform.startswith("linux"):
        return False  # no fork on Windows; macOS forks unsafely with its frameworks loaded
    if multiprocessing.current_process().daemon:
        return False  # a daemonic process (Dask's workers are) may not start processes
    return cores() > 1


class _InSecondProcess:
    """``work()`` in a forked process, started now; calling the object waits for it and
    raises its error here; :meth:`stop` ends it.

    The error is the same exception when it can be passed over whole, else a
    :class:`RunError` with its type and text; either way the other process's traceback is
    added as a note. The process leaves Ctrl-C to this one (which stops it), and ends when
    this one ends, however it ends (:func:`~trophoscape.workflows.tasks.init_worker_process`):
    it cannot draw on after this one is gone. :meth:`start` returns False when no process
    could be started (the caller then does the work itself)."""

    def __init__(self, work):
        self._work = work
        self._process = None
        self._receive = None

    def start(self) -> bool:
        from ..workflows.tasks import init_worker_process

        context = multiprocessing.get_context("fork")
        receive, send = context.Pipe(duplex=False)
        parent = os.getpid()
        work = self._work

        def run():
            init_worker_process(parent)
            try:
                work()
                outcome = None
            except BaseException as exc:  # noqa: BLE001 - passed to the parent
                try:
                    whole = pickle.dumps(exc)
                except Exception:  # it does not pickle: its type and text
                    whole = None
                outcome = (whole, type(exc).__name__, str(exc), traceback.format_exc())
            send.send(outcome)

        process = context.Process(target=run, name="trophoscape-maps", daemon=True)
        # objects the collector would visit in the new process stay shared with this one
        # (the garbage collector writes to every object it visits: copy on write)
        gc.freeze()
        try:
            process.start()
        except OSError:  # no memory or no process left for a fork: draw here
            receive.close()
            return False
        finally:
            gc.unfreeze()
            send.close()
        self._process, self._receive = process, receive
        return True

    def __call__(self) -> None:
        try:
            try:
                outcome = self._receive.recv()
            except Exception:  # ended without a result, or one that cannot be rebuilt
                self._process.join()
                raise RunError("drawing the maps and the report in a second process ended "
                               f"without a result (exit code {self._process.exitcode})"
                               ) from None
            self._process.join()
        except BaseException:
            self.stop()
            raise
        finally:
            self._receive.close()
        if outcome is None:
            return
        whole, name, text, trace = outcome
        try:
            exc = pickle.loads(whole) if whole is not None else None
        except Exception:  # pickled, but cannot be rebuilt here
            exc = None
        if not isinstance(exc, BaseException):
            exc = RunError(f"{name}: {text}" if text else name)
        exc.add_note("in the process that drew the maps and the report:\n" + trace)
        raise exc

    def stop(self) -> None:
        if self._process.is_alive():
            self._process.terminate()
        self._process.join()
        self._receive.close()
