"""``timeseries.nc``: the census series as a CF-1.8 discrete sampling geometry (one time series per
patch, the patch polygons as CF geometries), written in blocks as a run goes
(:class:`SeriesWriter`) or at once (:func:`write_timeseries`).
"""

from __future__ import annotations

import collections
import contextlib
import itertools
import os
import shutil
import tempfile
import zlib
from pathlib import Path

import numpy as np

from ..model.system import SPECIES
from .folder import signals_deferred, usual_mode

__all__ = ["SeriesWriter", "write_timeseries", "SERIES_BLOCK_ROWS"]

#: Time rows of a NetCDF chunk, and the census rows a run hands the writer at a time.
SERIES_BLOCK_ROWS = 64


#: Chunk sizes along (time, patch, replicate): about 1 MB, so that one time slice or one
#: patch's whole series reads few chunks.
_CHUNK_LIMITS = (SERIES_BLOCK_ROWS, 4096, 16)


#: zlib level of the abundances' deflate filter (after HDF5's byte shuffle).
_DEFLATE_LEVEL = 4


#: Chunk length of the one-dimensional geometry variables (nodes, ring parts).
_GEOMETRY_CHUNK = 1 << 16


#: The version of the CF Conventions ``timeseries.nc`` follows (the ``Conventions``
#: attribute): a discrete sampling geometry of ``featureType = "timeSeries"`` (CF 1.8 §9),
#: one time series per patch, with the patch polygons as simple geometries (§7.5).
CF_CONVENTIONS = "CF-1.8"


#: The time axis of ``timeseries.nc``: ``days since TIME_ORIGIN`` in the ``365_day``
#: calendar (every year 365 days, no leap years). Model time 0 is 0001-01-01 00:00:00 and a
#: model year is 365 days, so model year t falls in calendar year 1 + t. The variable
#: ``model_time`` holds the census times themselves, bit for bit.
TIME_ORIGIN = "0001-01-01 00:00:00"


TIME_CALENDAR = "365_day"


#: Model time units (``time_unit`` of a scenario; case and a plural "s" ignored): the
#: udunits name ``model_time`` is written in, the unit of the time axis and the length of
#: one model unit in that unit. Any other unit (a generation, a season, a week, a month)
#: counts as a common year on the time axis, and ``model_time`` has units "1".
_CF_TIME_UNITS = {
    **dict.fromkeys(("year", "yr", "a", "annum", "common_year"), ("common_years", "days", 365)),
    **dict.fromkeys(("day", "d"), ("days", "days", 1)),
    **dict.fromkeys(("hour", "h", "hr"), ("hours", "hours", 1)),
    **dict.fromkeys(("minute", "min"), ("minutes", "minutes", 1)),
    **dict.fromkeys(("second", "s", "sec"), ("seconds", "seconds", 1)),
}


#: Names in ``timeseries.nc`` besides the abundances (``prey``, ``predator``).
_ID_VAR, _ID_LEN_DIM = "patch_id", "patch_id_strlen"


_GEOMETRY_VAR, _CRS_VAR = "patch_geometry", "crs"


def _cf_time(time_unit: str) -> tuple[float, dict, dict]:
    """How model time in ``time_unit`` is written: ``(factor, time, model_time)``.

    ``factor`` turns model time into the numbers of the time axis; ``time`` and
    ``model_time`` are the attributes of the time coordinate variable (CF 1.8 §4.4: units
    "UNIT since TIME_ORIGIN", calendar ``365_day``) and of the auxiliary coordinate holding
    model time as the run counted it.
    """
    name = str(time_unit).strip()
    key = name.lower()
    found = _CF_TIME_UNITS.get(key)
    if found is None and key.endswith("s"):
        found = _CF_TIME_UNITS.get(key[:-1])
    model_units, axis_units, factor = found or ("1", "days", 365)
    length = "a common year (365 days)" if factor == 365 else f"one {axis_units[:-1]}"
    note = f"one {name} of model time is {length}"
    if found is None:
        note += f" (the time unit {name!r} has no length in udunits)"
    time = {"standard_name": "time", "long_name": "time of the census",
            "units": f"{axis_units} since {TIME_ORIGIN}", "calendar": TIME_CALENDAR,
            "axis": "T",
            "comment": f"model time 0 is {TIME_ORIGIN} of the {TIME_CALENDAR} calendar and "
                       f"{note}; model_time holds model time exactly"}
    model_time = {"long_name": f"model time since the start of the run (time unit: {name})",
                  "units": model_units,
                  "comment": "the census times of the run, exactly as it counted them"}
    return float(factor), time, model_time


def _polygon_nodes(geometries) -> dict:
    """The patch polygons as the arrays of CF simple geometries (CF 1.8 §7.5).

    Every Polygon and MultiPolygon is split into its rings (its parts): the exterior ring of
    each polygon, then its interior rings (holes), nodes in order with the ring closed
    (the first node repeated last, which CF allows). Exterior rings run anticlockwise and
    interior rings clockwise, as CF requires; rings drawn the other way are reversed.

    Returns
    -------
    dict
        ``x``, ``y`` (float64, one per node), ``node_count`` (nodes per geometry, int32),
        ``part_node_count`` (nodes per ring, int32) and ``interior_ring`` (1 for a hole,
        else 0, int32, one per ring).
    """
    import shapely

    geoms = np.asarray(geometries, dtype=object)
    polygons, owner = shapely.get_parts(geoms, return_index=True)
    rings, ring_polygon = shapely.get_rings(polygons, return_index=True)
    # get_rings gives each polygon's exterior ring first, then its holes
    interior = np.zeros(len(rings), dtype=bool)
    interior[1:] = ring_polygon[1:] == ring_polygon[:-1]
    flip = shapely.is_ccw(rings) == interior
    if flip.any():
        rings = rings.copy()
        rings[flip] = shapely.reverse(rings[flip])
    xy = shapely.get_coordinates(rings)
    part_nodes = shapely.get_num_coordinates(rings)
    node_count = np.bincount(owner[ring_polygon], weights=part_nodes, minlength=len(geoms))
    return {"x": xy[:, 0], "y": xy[:, 1], "node_count": node_count.astype(np.int32),
            "part_node_count": part_nodes.astype(np.int32),
            "interior_ring": interior.astype(np.int32)}


def _grid_mapping(crs) -> dict:
    """The attributes of a CF grid mapping variable (CF 1.8 §5.6, Appendix F) for ``crs``:
    ``grid_mapping_name`` and its parameters as pyproj words them, and ``crs_wkt``, the CRS
    as OGC WKT (pyproj's WKT2 2019), which holds it whole where the CF parameters cannot."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a parameter CF has no word for: the WKT keeps it
        attrs = dict(crs.to_cf())
    attrs["crs_wkt"] = crs.to_wkt()
    attrs["long_name"] = f"coordinate reference system of the patch polygons ({crs.name})"
    return attrs


def _char_array(texts) -> np.ndarray:
    """Strings as a NetCDF char array (UTF-8, padded with NUL bytes), shape (n, length)."""
    encoded = np.char.encode(np.asarray(texts, dtype=str), "utf-8")
    length = max(1, encoded.dtype.itemsize)
    return encoded.astype(f"S{length}").view("S1").reshape(len(encoded), length)


class SeriesWriter:
    """``timeseries.nc`` (NetCDF4, CF-1.8, abundances as float32) written as a run goes.

    The file is a CF discrete sampling geometry of ``featureType = "timeSeries"`` in the
    orthogonal multidimensional representation (CF 1.8 §9.3.1): one time series per patch,
    the patch ids in ``patch_id`` (``cf_role = "timeseries_id"``, a char array), the patch
    polygons as CF simple geometries (§7.5) in the CRS of the run (grid mapping ``crs``, with
    the CRS as WKT), and ``lat``/``lon`` of a point inside each patch for readers that do not
    know geometries. Time is ``days since 0001-01-01`` in the ``365_day`` calendar (a model
    year is 365 days), and ``model_time`` holds the census times exactly (:func:`_cf_time`).

    Everything but the abundances is written first; the two abundance variables are then
    filled block by block, as census rows arrive from :func:`trophoscape.integrate.ode.simulate`
    (its ``sink``), in chunks of ``SERIES_BLOCK_ROWS`` time rows, compressed (HDF5's byte
    shuffle, then deflate: a third faster than deflate alone, and smaller). The file is
    written under a temporary name beside ``path`` and renamed by :meth:`finish` once every
    row is in; :meth:`abort` (or an exception inside a ``with`` block) deletes it, so
    ``path`` is whole or absent.

    Parameters
    ----------
    path : path
        The file to write.
    study : Study
        Patch ids, polygons, areas, the scenario (attributes).
    times : ndarray, shape (n_times,)
        Census times.
    seeds : sequence of int, optional
        One per replicate: dims ``(time, patch, replicate)``, a ``replicate`` coordinate
        (0, 1, ...) and a ``seed`` coordinate along it.
    """

    def __init__(self, path, *, study, times, seeds=None):
        import h5netcdf

        self.path = Path(path)
        n = study.landscape.n_patches
        dims = ("time", "patch") if seeds is None else ("time", "patch", "replicate")
        self.shape = (len(times), n) + (() if seeds is None else (len(seeds),))
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.partial-", dir=self.path.parent)
        os.close(fd)
        self._tmp = Path(tmp)
        usual_mode(self._tmp, 0o666)
        self.rows_written = 0
        self._file = None
        try:
            # a Ctrl-C inside h5netcdf's constructor would leave a half-made File whose
            # clean-up prints an error at exit: the signal waits until the file is open
            with signals_deferred():
                self._file = h5netcdf.File(self._tmp, "w")
            self._write_frame(study, np.asarray(times, dtype=np.float64), seeds)
            chunks = tuple(max(1, int(min(size, limit)))
                           for size, limit in zip(self.shape, _CHUNK_LIMITS))
            coordinates = (f"time model_time lat lon {_ID_VAR}"
                           + ("" if seeds is None else " seed"))
            self._vars = []
            self._chunks = chunks
            for name in SPECIES:
                var = self._file.create_variable(
                    name, dims, np.float32, chunks=chunks, compression="gzip",
                    compression_opts=_DEFLATE_LEVEL, shuffle=True,
                    fillvalue=np.float32(np.nan))
                var.attrs.update(
                    units="1", long_name=f"{name} abundance (individuals)",
                    coordinates=coordinates, geometry=_GEOMETRY_VAR, grid_mapping=_CRS_VAR,
                    cell_methods="time: point area: sum")
                self._vars.append(var)
        except BaseException:
            self.abort()
            raise

    def _write_frame(self, study, times, seeds) -> None:
        """Dimensions, coordinates, patch ids, areas, polygons and CRS: all but the series."""
        import pyproj
        import shapely

        from .. import __version__

        f = self._file
        land = study.landscape
        sc = study.scenario
        crs = pyproj.CRS.from_user_input(land.crs)
        to_lonlat = pyproj.Transformer.from_crs(crs, crs.geodetic_crs, always_xy=True)
        geometries = land.geometries
        mapping = _grid_mapping(crs)
        projected = "grid_mapping_name" in mapping
        if not projected:
            # a projection CF has no grid mapping for (Web Mercator, Equal Earth, ...): the
            # nodes go in longitude and latitude on its datum, with the WKT of that CRS
            geometries = shapely.transform(
                geometries, lambda xy: np.column_stack(to_lonlat.transform(xy[:, 0], xy[:, 1])))
            mapping = _grid_mapping(crs.geodetic_crs)
        nodes = _polygon_nodes(geometries)
        ids = _char_array(np.asarray(study.ids).astype(str))
        f.dimensions.update({"time": len(times), "patch": land.n_patches})
        if seeds is not None:
            f.dimensions["replicate"] = len(seeds)
        # rings as parts only where a patch has more than one (CF 1.8 Table 7.1)
        multipart = len(nodes["part_node_count"]) > land.n_patches
        holes = bool(nodes["interior_ring"].any())
        f.dimensions.update({_ID_LEN_DIM: ids.shape[1], "node": len(nodes["x"])})
        if multipart:
            f.dimensions["part"] = len(nodes["part_node_count"])
        f.attrs.update(
            Conventions=CF_CONVENTIONS, featureType="timeSeries",
            title=f"trophoscape run: {sc.name}", source=f"trophoscape {__version__}",
            scenario=sc.text, time_unit=sc["time_unit"])

        def put(name, dims, data, attrs, **options):
            var = f.create_variable(name, dims, data=data, **options)
            var.attrs.update(attrs)

        factor, time_attrs, model_time_attrs = _cf_time(sc["time_unit"])
        put("time", ("time",), times * factor, time_attrs)
        put("model_time", ("time",), times, model_time_attrs)
        put(_ID_VAR, ("patch", _ID_LEN_DIM), ids,
            {"cf_role": "timeseries_id", "long_name": "patch id", "_Encoding": "utf-8"})
        # a point inside each patch (the ends of the links layer's lines), as longitude and
        # latitude on the datum of the CRS
        inside = shapely.get_coordinates(shapely.point_on_surface(land.geometries))
        lon, lat = to_lonlat.transform(inside[:, 0], inside[:, 1])
        where = f"of a point inside the patch ({crs.geodetic_crs.name})"
        put("lat", ("patch",), np.asarray(lat, dtype=np.float64),
            {"standard_name": "latitude", "units": "degrees_north",
             "long_name": f"latitude {where}"})
        put("lon", ("patch",), np.asarray(lon, dtype=np.float64),
            {"standard_name": "longitude", "units": "degrees_east",
             "long_name": f"longitude {where}"})
        put("area_km2", ("patch",), np.asarray(land.area_km2, dtype=np.float64),
            {"standard_name": "cell_area", "units": "km2",
             "long_name": "patch area (from an equal-area projection)"})
        if seeds is not None:
            put("replicate", ("replicate",), np.arange(len(seeds), dtype=np.int32),
                {"standard_name": "realization", "units": "1", "long_name": "replicate"})
            put("seed", ("replicate",), np.asarray(seeds, dtype=np.int64),
                {"units": "1", "long_name": "seed of the replicate's random numbers"})
        geometry = {"geometry_type": "polygon", "node_count": "node_count",
                    "node_coordinates": "node_x node_y", "grid_mapping": _CRS_VAR,
                    "long_name": "patch polygons"}
        if multipart:
            geometry["part_node_count"] = "part_node_count"
        if holes:
            geometry["interior_ring"] = "interior_ring"
        put(_GEOMETRY_VAR, (), np.int32(0), geometry)

        def packed(size):
            return dict(chunks=(max(1, min(size, _GEOMETRY_CHUNK)),), compression="gzip",
                        compression_opts=4)

        for axis, lonlat, units in (("x", "longitude", "degrees_east"),
                                    ("y", "latitude", "degrees_north")):
            if projected:
                attrs = {"standard_name": f"projection_{axis}_coordinate", "units": "m",
                         "long_name": f"{axis} coordinate of the polygon nodes (in the CRS "
                                      "of the grid mapping crs)"}
            else:
                attrs = {"standard_name": lonlat, "units": units,
                         "long_name": f"{lonlat} of the polygon nodes (on the datum of crs)"}
            attrs["axis"] = axis.upper()
            put(f"node_{axis}", ("node",), nodes[axis], attrs, **packed(len(nodes[axis])))
        put("node_count", ("patch",), nodes["node_count"],
            {"long_name": "number of polygon nodes of each patch", "units": "1"})
        if multipart:
            put("part_node_count", ("part",), nodes["part_node_count"],
                {"long_name": "number of nodes of each polygon ring", "units": "1"},
                **packed(len(nodes["part_node_count"])))
        if holes:
            put("interior_ring", ("part",), nodes["interior_ring"],
                {"long_name": "whether a polygon ring is a hole (1) or an exterior ring (0)",
                 "flag_values": np.array([0, 1], dtype=np.int32),
                 "flag_meanings": "exterior_ring interior_ring"},
                **packed(len(nodes["interior_ring"])))
        put(_CRS_VAR, (), np.int32(0), mapping)

    def __enter__(self):
        return self

    def __exit__(self, kind, value, tb):
        if kind is None:
            self.finish()
        else:
            self.abort()

    def write(self, start: int, blocks) -> None:
        """Rows ``start ..`` of each species: ``blocks`` is (prey, predator), each of shape
        (rows, n_patches) or (rows, n_patches, n_replicates).

        Rows that fill whole chunks along time (the last ones may end with the series) are
        encoded here, each chunk as HDF5's filters would (byte shuffle, then deflate), on as
        many threads as this process has cores (zlib lets go of Python's lock), and stored
        as they are (HDF5's direct chunk write); other rows go through HDF5's filters.
        """
        blocks = [np.asarray(block, dtype=np.float32) for block in blocks]
        rows = blocks[0].shape[0]
        for block in blocks:  # (the chunks are cut by the file's shape, so checked here)
            if (block.shape != blocks[0].shape or block.shape[1:] != self.shape[1:]
                    or start + rows > self.shape[0]):
                raise ValueError(f"rows {start}..{start + block.shape[0]} of shape "
                                 f"{block.shape} do not fit {self.path.name}, of shape "
                                 f"{self.shape}")
        datasets = [_direct_dataset(var) for var in self._vars]
        whole = (start % self._chunks[0] == 0
                 and (rows % self._chunks[0] == 0 or start + rows == self.shape[0]))
        if whole and all(d is not None for d in datasets):
            self._write_chunks(datasets, start, blocks)
        else:
            for var, block in zip(self._vars, blocks):
                var[start:start + rows] = block
        self.rows_written = max(self.rows_written, start + rows)

    def _write_chunks(self, datasets, start, blocks) -> None:
        """Every chunk of ``blocks`` (rows from ``start``, whole chunks along time),
        encoded on threads a few at a time and written in order."""
        from concurrent.futures import ThreadPoolExecutor

        from ..machine import cores

        chunks = self._chunks
        rows = blocks[0].shape[0]
        origins = list(itertools.product(range(0, rows, chunks[0]),
                                         *(range(0, size, c) for size, c in
                                           zip(self.shape[1:], chunks[1:]))))
        jobs = [(dataset, block, origin) for dataset, block in zip(datasets, blocks)
                for origin in origins]
        workers = max(1, min(cores(), len(jobs)))
        pending = collections.deque()  # at most a few encoded chunks held at a time
        with ThreadPoolExecutor(workers, thread_name_prefix="trophoscape-series") as pool:
            for dataset, block, origin in jobs:
                pending.append((dataset, origin,
                                pool.submit(_encoded_chunk, block, origin, chunks)))
                if len(pending) > 2 * workers:
                    _store_chunk(start, *pending.popleft())
            while pending:
                _store_chunk(start, *pending.popleft())

    def sink_options(self, replicates: int | None = None) -> dict:
        """``sink`` and ``sink_rows`` for :func:`trophoscape.integrate.ode.simulate`.

        The sink takes ``(start, stop, record)``, with ``record`` the run's (species, time,
        state patch) array; with ``replicates`` the state holds that many stacked copies of
        the network (``noise.stack_system``), which become the ``replicate`` dimension.
        """
        def sink(start, stop, record):
            blocks = record[:, start:stop]
            if replicates is not None:
                from ..integrate.replicates import unstack_series

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


def _direct_dataset(var):
    """The HDF5 dataset of ``var`` (an h5netcdf variable) if its chunks can be written
    encoded here: shuffle then deflate at :data:`_DEFLATE_LEVEL` and no other filter, and an
    h5py that writes chunks as they are; else None."""
    dataset = getattr(var, "_h5ds", None)
    if dataset is None or not hasattr(dataset.id, "write_direct_chunk"):
        return None
    if (dataset.compression != "gzip" or dataset.compression_opts != _DEFLATE_LEVEL
            or not dataset.shuffle or dataset.fletcher32 or dataset.scaleoffset is not None
            or dataset.dtype != np.float32):
        return None
    return dataset


def _encoded_chunk(block, origin, chunks) -> bytes:
    """The chunk of ``block`` at ``origin`` as HDF5 stores it with the shuffle and deflate
    filters: padded to the chunk's shape with NaN (the fill value) where the data end, its
    bytes regrouped by position in each 4-byte value (HDF5's shuffle filter), then
    compressed by zlib (HDF5's deflate filter is zlib's ``compress2``)."""
    piece = block[tuple(slice(o, o + c) for o, c in zip(origin, chunks))]
    if piece.shape != tuple(chunks):
        full = np.full(chunks, np.nan, dtype=np.float32)
        full[tuple(slice(0, k) for k in piece.shape)] = piece
        piece = full
    shuffled = np.ascontiguousarray(piece).view(np.uint8).reshape(-1, 4).T.tobytes()
    return zlib.compress(shuffled, _DEFLATE_LEVEL)


def _store_chunk(start, dataset, origin, encoded) -> None:
    """Write one chunk encoded by :func:`_encoded_chunk` (a future) at ``origin`` (rows
    counted from ``start``)."""
    dataset.id.write_direct_chunk((start + origin[0], *origin[1:]), encoded.result())


def write_timeseries(path, result):
    """NetCDF4 time series (CF-1.8, see :class:`SeriesWriter`), abundances as float32.

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
