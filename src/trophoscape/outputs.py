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

from .system import SPECIES

__all__ = ["staged_folder", "write_run", "provenance", "file_sha256"]


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


@contextlib.contextmanager
def staged_folder(out):
    """Yield a fresh staging folder; on success move its files into ``out``.

    On an exception the staging folder is removed and ``out`` is left as it was.
    """
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(staging, 0o777 & ~umask)  # mkdtemp makes it private; the result should not be
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


def write_timeseries(path, result):
    """NetCDF4 time series (CF attributes), abundances as float32."""
    from . import __version__

    sc = result.study.scenario
    ds = result.trajectory.data.copy()  # shallow: the series are not copied
    for s in SPECIES:
        if ds[s].dtype != np.float32:
            ds[s] = ds[s].astype("float32")
        ds[s].attrs.update(units="1", long_name=f"{s} abundance (individuals)")
    ds["patch"] = ds["patch"].astype(str)
    ds["area_km2"] = ("patch", result.study.landscape.area_km2,
                      {"units": "km2", "long_name": "patch area"})
    ds["time"].attrs.update(units=sc["time_unit"], standard_name="time", axis="T")
    ds.attrs.update(
        title=f"trophoscape run: {sc.name}",
        Conventions="CF-1.8",
        source=f"trophoscape {__version__}",
        scenario=sc.text,
        time_unit=sc["time_unit"],
    )
    # chunks of about 1 MB: one time slice or one patch's whole series reads few of them
    shape = ds[SPECIES[0]].shape
    chunks = tuple(max(1, int(min(size, limit))) for size, limit in
                   zip(shape, (64, 4096, 16)[:len(shape)]))
    encoding = {s: {"zlib": True, "complevel": 4, "chunksizes": chunks} for s in SPECIES}
    ds.to_netcdf(path, engine="h5netcdf", encoding=encoding)


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
    gdf = patches_frame(result)
    links = result.study.network.links_frame(result.study.landscape)
    summary = dict(result.summary)
    summary["crs"] = result.study.landscape.crs.to_string()
    summary["repaired_geometries"] = list(result.study.landscape.repaired)
    summary["provenance"] = provenance(result.study)
    with staged_folder(out) as stage:
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
    return out
