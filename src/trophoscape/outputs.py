"""Writing a run's output folder: GeoPackage, CSV, NetCDF, JSON, maps and the report.

Everything is written into a staging folder beside the target and moved into place only
when every file is complete, so a failed run leaves no half-written output and an existing
folder keeps its old files until the new ones are whole.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import math
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np

from .errors import InputError
from .system import SPECIES

__all__ = ["staged_folder", "write_run", "write_run_files", "provenance", "file_sha256",
           "SeriesWriter", "SERIES_BLOCK_ROWS"]


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def provenance(study) -> dict:
    """Where a result came from: package version, input hashes, seed and time."""
    from . import __version__

    sc = study.scenario
    inputs = {"patches": study.landscape.path}
    for key in ("dispersal.corridors", "dispersal.links"):
        if sc[key]:
            inputs[key.split(".")[1]] = sc.resolve(sc[key])
    return {
        "package": "trophoscape",
        "version": __version__,
        "scenario_file": None if sc.path is None else str(Path(sc.path).resolve()),
        "scenario_sha256": sc.sha256,
        "input_sha256": {k: file_sha256(v) for k, v in inputs.items() if v is not None},
        "seed": sc["run.seed"],
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def _usual_mode(path, mode: int) -> None:
    """``mode`` less the umask: mkdtemp and mkstemp make their results private, and a
    result should get the permissions of any other file the user writes."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, mode & ~umask)


@contextlib.contextmanager
def staged_folder(out):
    """Yield a fresh staging folder; on success move its files into ``out``.

    On an exception the staging folder is removed and ``out`` is left as it was.
    """
    out = Path(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        staging = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    except OSError as exc:  # a file in the way, no permission, a read-only disk
        raise InputError(f"cannot create the output folder here ({exc.strerror.lower()}); give "
                         "--out a folder that can be created and written to",
                         file=out, field="--out") from None
    _usual_mode(staging, 0o777)
    try:
        yield staging
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    if not out.exists():
        os.rename(staging, out)
        return
    for src in sorted(staging.rglob("*")):
        if src.is_file():
            dst = out / src.relative_to(staging)
            dst.parent.mkdir(parents=True, exist_ok=True)
            os.replace(src, dst)
    shutil.rmtree(staging, ignore_errors=True)


def _json_ready(obj):
    if isinstance(obj, dict):
        return {str(k): _json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_ready(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_json(path, obj):
    Path(path).write_text(json.dumps(_json_ready(obj), indent=2) + "\n", encoding="utf-8")


def patches_frame(result):
    """The patch polygons with the user's attributes and every per-patch result column."""
    frame = result.study.landscape.frame
    table = result.patches
    keep = [c for c in frame.columns if c not in table.columns and c != "patch_id"]
    gdf = frame[["patch_id"]].join(frame[keep])
    for col in table.columns:
        gdf[col] = table[col].to_numpy()
    return gdf.set_geometry("geometry")


#: Time rows of a NetCDF chunk, and the census rows a run hands the writer at a time.
SERIES_BLOCK_ROWS = 64
#: Chunk sizes along (time, patch, replicate): about 1 MB, so that one time slice or one
#: patch's whole series reads few chunks.
_CHUNK_LIMITS = (SERIES_BLOCK_ROWS, 4096, 16)


class SeriesWriter:
    """``timeseries.nc`` (NetCDF4, CF attributes, abundances as float32) written as a run goes.

    The coordinates, patch areas and attributes are written first (by xarray); the two
    abundance variables are then filled block by block, as census rows arrive from
    :func:`trophoscape.simulate.simulate` (its ``sink``), in chunks of
    ``SERIES_BLOCK_ROWS`` time rows, compressed. The file is written under a temporary name
    beside ``path`` and renamed by :meth:`finish` once every row is in; :meth:`abort`
    (or an exception inside a ``with`` block) deletes it, so ``path`` is whole or absent.

    Parameters
    ----------
    path : path
        The file to write.
    study : Study
        Patch ids, areas, the scenario (attributes).
    times : ndarray, shape (n_times,)
        Census times.
    seeds : sequence of int, optional
        One per replicate: dims ``(time, patch, replicate)`` and a ``seed`` coordinate.
    """

    def __init__(self, path, *, study, times, seeds=None):
        import h5netcdf
        import xarray as xr

        from . import __version__

        self.path = Path(path)
        sc = study.scenario
        n = study.landscape.n_patches
        dims = ("time", "patch") if seeds is None else ("time", "patch", "replicate")
        self.shape = (len(times), n) + (() if seeds is None else (len(seeds),))
        coords = {
            "time": ("time", np.asarray(times, dtype=float),
                     {"units": sc["time_unit"], "long_name": "time", "standard_name": "time",
                      "axis": "T"}),
            "patch": ("patch", np.asarray(study.ids).astype(str), {"long_name": "patch id"}),
        }
        if seeds is not None:
            coords["replicate"] = ("replicate", np.arange(len(seeds)),
                                   {"long_name": "replicate"})
            coords["seed"] = ("replicate", np.asarray(seeds, dtype=np.int64),
                              {"long_name": "seed of the replicate's random numbers"})
        skeleton = xr.Dataset(
            {"area_km2": ("patch", study.landscape.area_km2,
                          {"units": "km2", "long_name": "patch area"})},
            coords=coords,
            attrs=dict(title=f"trophoscape run: {sc.name}", Conventions="CF-1.8",
                       source=f"trophoscape {__version__}", scenario=sc.text,
                       time_unit=sc["time_unit"]))
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.partial-", dir=self.path.parent)
        os.close(fd)
        self._tmp = Path(tmp)
        _usual_mode(self._tmp, 0o666)
        self.rows_written = 0
        self._file = None
        try:
            skeleton.to_netcdf(self._tmp, engine="h5netcdf")
            self._file = h5netcdf.File(self._tmp, "a")
            chunks = tuple(max(1, int(min(size, limit)))
                           for size, limit in zip(self.shape, _CHUNK_LIMITS))
            self._vars = []
            for name in SPECIES:
                var = self._file.create_variable(
                    name, dims, np.float32, chunks=chunks, compression="gzip",
                    compression_opts=4, fillvalue=np.float32(np.nan))
                var.attrs.update(units="1", long_name=f"{name} abundance (individuals)")
                if seeds is not None:
                    var.attrs["coordinates"] = "seed"
                self._vars.append(var)
        except BaseException:
            self.abort()
            raise

    def __enter__(self):
        return self

    def __exit__(self, kind, value, tb):
        if kind is None:
            self.finish()
        else:
            self.abort()

    def write(self, start: int, blocks) -> None:
        """Rows ``start ..`` of each species: ``blocks`` is (prey, predator), each of shape
        (rows, n_patches) or (rows, n_patches, n_replicates)."""
        for var, block in zip(self._vars, blocks):
            block = np.asarray(block, dtype=np.float32)
            var[start:start + block.shape[0]] = block
        self.rows_written = max(self.rows_written, start + np.shape(blocks[0])[0])

    def sink_options(self, replicates: int | None = None) -> dict:
        """``sink`` and ``sink_rows`` for :func:`trophoscape.simulate.simulate`.

        The sink takes ``(start, stop, record)``, with ``record`` the run's (species, time,
        state patch) array; with ``replicates`` the state holds that many stacked copies of
        the network (``noise.stack_system``), which become the ``replicate`` dimension.
        """
        def sink(start, stop, record):
            blocks = record[:, start:stop]
            if replicates is not None:
                from .noise import unstack_series

                blocks = unstack_series(blocks, replicates)
            self.write(start, blocks)

        return {"sink": sink, "sink_rows": SERIES_BLOCK_ROWS}

    def finish(self, trajectory=None) -> Path:
        """Write the rows not written yet (from ``trajectory``), close and rename into place."""
        try:
            if self.rows_written < self.shape[0]:
                if trajectory is None:
                    raise ValueError(f"{self.shape[0] - self.rows_written} census rows of "
                                     f"{self.path.name} were never written")
                start = self.rows_written
                self.write(start, [trajectory.data[s].values[start:] for s in SPECIES])
            self._file.close()
            self._file = None
            os.replace(self._tmp, self.path)
        except BaseException:
            self.abort()
            raise
        return self.path

    def abort(self) -> None:
        """Close and delete the partial file."""
        if self._file is not None:
            with contextlib.suppress(Exception):
                self._file.close()
            self._file = None
        self._tmp.unlink(missing_ok=True)


def write_timeseries(path, result):
    """NetCDF4 time series (CF attributes), abundances as float32.

    A run started with ``run_study(..., series_to=...)`` wrote its file as it went; that
    file is copied. Otherwise the series are written from memory by the same writer.
    """
    path = Path(path)
    streamed = result.series_file
    if streamed is not None and Path(streamed).exists():
        if Path(streamed).resolve() != path.resolve():
            shutil.copyfile(streamed, path)
        return
    data = result.trajectory.data
    seeds = data["seed"].values if "replicate" in data.dims else None
    with SeriesWriter(path, study=result.study, times=data["time"].values,
                      seeds=seeds) as writer:
        writer.write(0, [data[s].values for s in SPECIES])


def write_run(result, out, *, maps: bool = True, geojson: bool = False) -> Path:
    """Write the whole output folder of a run, atomically.

    Parameters
    ----------
    result : RunResult
    out : path
        The output folder (created if needed; files already there are replaced one by one
        only once every new file is complete).
    maps : bool
        Draw PNG maps and the HTML report.
    geojson : bool
        Also write ``patches.geojson`` (WGS 84, as RFC 7946 wants).
    """
    out = Path(out)
    with staged_folder(out) as stage:
        write_run_files(result, stage, maps=maps, geojson=geojson)
    return out


def write_run_files(result, stage, *, maps: bool = True, geojson: bool = False) -> None:
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
    gdf.to_file(stage / "patches.gpkg", layer="patches", driver="GPKG", engine="pyogrio")
    links.to_file(stage / "patches.gpkg", layer="links", driver="GPKG", engine="pyogrio")
    if geojson:
        gdf.to_crs("EPSG:4326").to_file(stage / "patches.geojson", driver="GeoJSON",
                                        engine="pyogrio")
    result.patches.to_csv(stage / "patches.csv", index=True)
    write_timeseries(stage / "timeseries.nc", result)
    write_json(stage / "summary.json", summary)
    if maps:
        from .report import write_figures_and_report

        write_figures_and_report(stage, result, gdf, links, summary)
