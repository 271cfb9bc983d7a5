"""Resistance to movement: corridors' resistance, and least-cost distances over a raster.

Planners describe how hard the ground between patches is to cross with a *resistance
surface*: a raster whose cells give the cost of crossing one km of them relative to open
ground (1 = open ground, 10 = ten times as hard, 0.5 = twice as easy). With one, a link's
effective distance is its *least-cost distance*: the cheapest sum of cost × step length over
8-neighbour moves from the boundary of one patch to the boundary of the other.

The rule, exactly (what the tests check against ``scipy.sparse.csgraph.dijkstra``):

- The patches are burnt into the raster's grid (a cell belongs to a patch when its centre
  lies inside it; a patch smaller than a cell gets the cell of its representative point).
- Moving between two neighbouring cells ``a`` and ``b`` costs ``(c_a + c_b) / 2`` times the
  step length (a cell side, or the diagonal), as scikit-image's ``MCP_Geometric`` counts it;
  the cells of the patch the path starts from cost 0, so leaving it costs half a step of
  the first cell outside.
- The least-cost distance to another patch is the least cumulative cost at its cells, less
  half a step of the cell entered, so that it ends on the patch's boundary; the distance of
  a pair is the smaller of the two directions (they differ only by the diagonal entry step).
- Other patches' cells cost what the raster says: a path may cross a patch.
- Cells without a value (nodata) cannot be crossed; within the patches' extent they are
  refused (:func:`read_resistance`).
- Corridors are burnt into the raster: every cell a corridor line touches costs the
  corridor's resistance where that is lower than the cell's own.

On a uniform surface the result is the boundary distance measured along 8-neighbour moves,
which exceeds the straight distance by at most ``sqrt(4 - 2 sqrt 2) - 1`` ≈ 8.2 % (the
largest error of the octile metric, at 22.5° off the grid's axes), plus up to a cell from
burning the patches into the grid.

Each patch is searched once, on a window of the raster around it large enough that no
path within ``max_distance_km`` leaves it (its size follows from the lowest resistance in
the raster), so the cost per patch does not grow with the number of patches.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..machine import cores

__all__ = ["CORRIDOR_RESISTANCE", "corridor_resistances", "ResistanceSurface",
           "read_resistance", "MAX_RASTER_SHARE"]

#: Default cost of one km along a corridor relative to open ground
#: (``[dispersal] corridor_resistance``; the README states its basis).
CORRIDOR_RESISTANCE = 0.2

#: The largest share of the machine's memory a resistance raster (values, patch cells and
#: the search's work arrays: about 20 bytes a cell) may take; a larger one is refused.
MAX_RASTER_SHARE = 0.5
_BYTES_PER_CELL = 20


def corridor_resistances(frame, default: float) -> np.ndarray:
    """The resistance of each corridor line (cost per km relative to open ground): its
    ``resistance`` attribute where given, else ``default`` divided by its ``quality``
    attribute (1 where empty or absent), so that a corridor of quality 2 acts as half as
    long as one of quality 1. ``frame`` holds the values read and checked (NaN = empty)."""
    n = len(frame)
    quality = (frame["quality"].to_numpy(dtype=np.float64) if "quality" in frame.columns
               else np.full(n, np.nan))
    given = (frame["resistance"].to_numpy(dtype=np.float64) if "resistance" in frame.columns
             else np.full(n, np.nan))
    return np.where(np.isnan(given), default / np.where(np.isnan(quality), 1.0, quality),
                    given)


@dataclass(frozen=True, eq=False)
class ResistanceSurface:
    """A resistance raster in the landscape's CRS.

    Attributes
    ----------
    values : ndarray of float32, shape (rows, cols)
        Cost of crossing one km of each cell relative to open ground (> 0); NaN where the
        raster has no value.
    transform : affine.Affine
        Cell (row, col) → map coordinates (metres) of its upper-left corner, north up.
    path : Path or None
        The file it was read from (for messages).
    """

    values: np.ndarray
    transform: object
    path: Path | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(self.values.shape)

    @property
    def cell_km(self) -> tuple[float, float]:
        """Cell height and width in km."""
        return abs(self.transform.e) / 1000.0, abs(self.transform.a) / 1000.0

    def bounds(self) -> tuple[float, float, float, float]:
        """(xmin, ymin, xmax, ymax) of the raster in map coordinates."""
        rows, cols = self.shape
        t = self.transform
        xs = [t.c, t.c + t.a * cols]
        ys = [t.f, t.f + t.e * rows]
        return min(xs), min(ys), max(xs), max(ys)

    def burned(self, lines, resistance) -> "ResistanceSurface":
        """A copy with the cells that ``lines`` touch set to ``resistance`` (one value per
        line, or one for all) where that is lower than the raster's: corridors as part of
        the ground, for paths between any patches."""
        from rasterio import features

        lines = np.asarray(lines, dtype=object)
        value = np.broadcast_to(np.asarray(resistance, dtype=np.float32), lines.shape)
        if not lines.size:
            return self
        # the lowest resistance wins where lines cross: burn the highest first
        order = np.argsort(-value, kind="stable")
        burnt = features.rasterize(
            ((lines[k], float(value[k])) for k in order), out_shape=self.shape,
            transform=self.transform, fill=np.nan, dtype="float32", all_touched=True)
        values = np.fmin(self.values, burnt)  # NaN (not on a line) keeps the raster's value
        values[np.isnan(self.values)] = np.nan  # a line does not fill a hole in the raster
        return ResistanceSurface(values=values, transform=self.transform, path=self.path)

    # -- the patches on the grid

    def patch_cells(self, landscape) -> np.ndarray:
        """Patch position + 1 of each cell (0 outside every patch), shape (rows, cols).

        A cell belongs to a patch when its centre lies inside it (the patch with the
        smallest id where patches overlap); a patch with no such cell gets the cell of its
        representative point."""
        import shapely
        from rasterio import features

        n = landscape.n_patches
        geoms = landscape.geometries
        # where patches overlap, a cell goes to the one with the smallest id (burnt last),
        # whatever the order of the features
        by_id = np.argsort(landscape.ids.astype(str), kind="stable")[::-1]
        labels = features.rasterize(
            ((geoms[k], int(k) + 1) for k in by_id),
            out_shape=self.shape, transform=self.transform, fill=0, dtype="int32",
            all_touched=False)
        present = np.zeros(n + 1, dtype=bool)
        present[np.unique(labels)] = True
        missing = np.flatnonzero(~present[1:])
        if missing.size:
            points = shapely.get_coordinates(shapely.point_on_surface(geoms[missing]))
            rows, cols = self.rowcol(points[:, 0], points[:, 1])
            labels[rows, cols] = missing + 1
            present[:] = False
            present[np.unique(labels)] = True
            lost = np.flatnonzero(~present[1:])
            if lost.size:  # two small patches in one cell, or on another's only cell
                names = ", ".join(repr(str(landscape.ids[k])) for k in lost[:3])
                raise InputError(
                    f"patch(es) {names}{' and others' if lost.size > 3 else ''} share their "
                    f"only raster cell with another patch (cells of {self.cell_km[1] * 1000:g}"
                    " m); give a finer resistance raster", file=self.path,
                    field="dispersal.resistance")
        return labels

    def rowcol(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """The cell holding each point (clipped to the raster)."""
        t = self.transform  # north up (read_resistance refuses others)
        col = (np.asarray(x, dtype=float) - t.c) / t.a
        row = (np.asarray(y, dtype=float) - t.f) / t.e
        rows, cols = self.shape
        return (np.clip(np.floor(row).astype(np.int64), 0, rows - 1),
                np.clip(np.floor(col).astype(np.int64), 0, cols - 1))

    # -- least-cost distances

    def _window(self, labels, r0, r1, c0, c1, p):
        """A search's window: the patch cells, the costs (the source patch's cells 0, cells
        without a value impassable), the source's own cells and its edge cells, the starts."""
        lab = labels[r0:r1, c0:c1]
        cost = self.values[r0:r1, c0:c1].astype(np.float64)
        cost[~np.isfinite(cost)] = -1.0  # impassable
        own = lab == p + 1
        cost[own] = 0.0
        return lab, cost, own, np.argwhere(_edge_cells(own))

    @cached_property
    def value_range(self) -> tuple[float, float]:
        """The lowest and highest value in the raster (1, 1 when it has none), read once."""
        finite = self.values[np.isfinite(self.values)]
        return (float(finite.min()), float(finite.max())) if finite.size else (1.0, 1.0)

    def _reach(self, max_km: float) -> tuple[int, int]:
        """Cells a path of cost ``max_km`` can go at most, along rows and along columns."""
        value = self.value_range[0]
        h, w = self.cell_km
        return (int(math.ceil(max_km / (value * h))) + 2,
                int(math.ceil(max_km / (value * w))) + 2)

    def _search(self, labels, boxes, p: int, reach, max_km):
        """Least-cost distance (km) from patch ``p`` to every patch within ``max_km``:
        (positions, distances).

        The window around the patch reaches ``reach`` cells (:meth:`_reach`) on each side,
        which no path within ``max_km`` can leave; the search itself stops once the cheapest
        cell left costs more than ``max_km`` (:class:`_LimitedSearch`), so its time follows
        the ground within reach. (Windows that start small and grow while the search
        reaches their edge were slower on the benchmark: the searches were redone.)"""
        box = boxes[p]
        rows, cols = self.shape
        h, w = self.cell_km
        r0, r1 = max(box[0].start - reach[0], 0), min(box[0].stop + reach[0], rows)
        c0, c1 = max(box[1].start - reach[1], 0), min(box[1].stop + reach[1], cols)
        lab, cost, own, starts = self._window(labels, r0, r1, c0, c1, p)
        # a target's cell is entered at up to max_km plus half a step of it
        limit = max_km + 0.5 * float(np.max(cost[lab > 0], initial=0.0)) * min(h, w)
        cum, _ = _LimitedSearch(cost, limit, sampling=(h, w)).find_costs(starts)
        # end on the boundary: less half of the (orthogonal) step into the cell entered
        reached = (lab > 0) & ~own & np.isfinite(cum)
        found = lab[reached] - 1
        dist = cum[reached] - 0.5 * cost[reached] * min(h, w)
        keep = dist <= max_km * (1 + 1e-12)
        found, dist = found[keep], dist[keep]
        if not found.size:
            return np.empty(0, np.int64), np.empty(0)
        order = np.lexsort((dist, found))
        found, dist = found[order], dist[order]
        first = np.r_[True, found[1:] != found[:-1]]
        return found[first].astype(np.int64), np.maximum(dist[first], 0.0)

    def reach_km(self, max_km: float) -> float:
        """How far (straight, km) a path of cost ``max_km`` can go at most."""
        return max_km / self.value_range[0]

    def pairs_from(self, landscape, patches, max_km: float, *, workers=None):
        """The searches from ``patches`` alone: arrays ``(source, target, km)`` of every
        patch each reaches within ``max_km`` (one direction, in the order of ``patches``).

        From :data:`PARALLEL_MIN_PATCHES` searches on, they are shared out over ``workers``
        processes (default: the cores this process may use), forked from this one so that
        the raster is not copied; the result does not depend on how many."""
        from scipy import ndimage

        patches = np.asarray(patches, dtype=np.int64)
        labels = self.patch_cells(landscape)
        boxes = ndimage.find_objects(labels, max_label=landscape.n_patches)
        reach = self._reach(max_km)
        job = (self, labels, boxes, reach, max_km)
        n_workers = _workers(workers, patches.size)
        if n_workers > 1:
            import multiprocessing as mp
            from concurrent.futures import ProcessPoolExecutor
            from concurrent.futures.process import BrokenProcessPool

            from ..errors import RunError

            global _JOB
            chunks = np.array_split(patches, 8 * n_workers)
            _JOB = job
            try:
                with ProcessPoolExecutor(n_workers, mp_context=mp.get_context("fork")) as pool:
                    parts = list(pool.map(_search_chunk, chunks))
            except BrokenProcessPool:
                raise RunError("a process searching least-cost paths died (out of memory?); "
                               "give a coarser resistance raster") from None
            finally:
                _JOB = None
        else:
            parts = [_search_chunk(patches, job)]
        return tuple(np.concatenate([part[k] for part in parts]) for k in range(3))

    def pairs_within(self, landscape, max_km: float):
        """Pairs ``i < j`` whose least-cost distance is at most ``max_km``, and that
        distance: arrays ``(i, j, km)`` sorted by (i, j)."""
        src, dst, km = self.pairs_from(landscape, np.arange(landscape.n_patches), max_km)
        return _symmetric(src, dst, km, landscape.n_patches)

    def straight_costs(self, landscape, a, b) -> np.ndarray:
        """The cost (km) of the straight shortest line between patches ``a[k]`` and
        ``b[k]``, sampled every quarter cell, plus two cells at the raster's highest value: a
        bound on their least-cost distance (inf where the line crosses a cell without a
        value)."""
        import shapely

        a, b = np.asarray(a, dtype=np.int64), np.asarray(b, dtype=np.int64)
        h, w = self.cell_km
        geoms = landscape.geometries
        lines = shapely.segmentize(shapely.shortest_line(geoms[a], geoms[b]),
                                   250.0 * min(h, w))
        xy, which = shapely.get_coordinates(lines, return_index=True)
        same = which[1:] == which[:-1]
        mid = 0.5 * (xy[1:] + xy[:-1])[same]
        seg = np.hypot(*(xy[1:] - xy[:-1])[same].T) / 1000.0
        r, c = self.rowcol(mid[:, 0], mid[:, 1])
        cost = np.bincount(which[1:][same], weights=self.values[r, c] * seg,
                           minlength=a.size)
        return cost + 2 * max(h, w) * self.value_range[1]

    def between(self, landscape, source, target) -> np.ndarray:
        """Least-cost distance (km) of given pairs (say the rows of a links table), the
        smaller of the two directions as for :meth:`pairs_within`: one search from each
        patch named, reaching as far as the dearest straight line of its pairs
        (:meth:`straight_costs`) — no least-cost path is dearer. inf where none joins them."""
        source = np.asarray(source, dtype=np.int64)
        target = np.asarray(target, dtype=np.int64)
        n = landscape.n_patches
        out = np.full(source.size, np.inf)
        if not source.size:
            return out
        bound = self.straight_costs(landscape, source, target)
        ends = np.concatenate([source, target])
        limit = np.zeros(n)
        np.maximum.at(limit, ends, np.concatenate([bound, bound]))
        # where a straight line crosses a hole, any path within the whole raster
        whole = self.value_range[1] * sum(x * y for x, y in zip(self.shape, self.cell_km))
        limit[~np.isfinite(limit)] = whole
        from scipy import ndimage

        labels = self.patch_cells(landscape)
        boxes = ndimage.find_objects(labels, max_label=n)
        src, dst, km = _search_chunk(np.unique(ends), (self, labels, boxes, None, limit))
        i, j, d = _symmetric(src, dst, km, n)
        codes = i * max(n, 1) + j
        wanted = np.minimum(source, target) * max(n, 1) + np.maximum(source, target)
        if codes.size:
            pos = np.minimum(np.searchsorted(codes, wanted), codes.size - 1)
            hit = codes[pos] == wanted
            out[hit] = d[pos[hit]]
        return out

    def least_cost_path(self, landscape, a: int, b: int) -> np.ndarray:
        """The cells of the least-cost path from patch ``a``'s edge to patch ``b``, shape
        (k, 2) rows and columns, ``a``'s last cell first and ``b``'s first cell last.

        Searched on a window around both patches wide enough for any path cheaper than the
        straight one between them (the same costs as :meth:`pairs_within`)."""
        from scipy import ndimage
        from skimage.graph import MCP_Geometric

        labels = self.patch_cells(landscape)
        boxes = ndimage.find_objects(labels, max_label=landscape.n_patches)
        # the straight line's cost bounds the least cost, and so how far a path may stray
        h, w = self.cell_km
        bound = float(self.straight_costs(landscape, [a], [b])[0])
        reach = self._reach(bound) if np.isfinite(bound) else self.shape
        rows, cols = self.shape
        r0 = max(min(boxes[a][0].start, boxes[b][0].start) - reach[0], 0)
        r1 = min(max(boxes[a][0].stop, boxes[b][0].stop) + reach[0], rows)
        c0 = max(min(boxes[a][1].start, boxes[b][1].start) - reach[1], 0)
        c1 = min(max(boxes[a][1].stop, boxes[b][1].stop) + reach[1], cols)
        lab, cost, own, starts = self._window(labels, r0, r1, c0, c1, a)
        mcp = MCP_Geometric(cost, sampling=(h, w))
        cum, _ = mcp.find_costs(starts)
        target = (lab == b + 1) & np.isfinite(cum)
        if not target.any():
            raise InputError(f"no path over the raster joins patches {landscape.ids[a]!r} "
                             f"and {landscape.ids[b]!r} (cells without a value between "
                             "them)", file=self.path, field="dispersal.resistance")
        score = np.where(target, cum - 0.5 * cost * min(h, w), np.inf)
        end = np.unravel_index(int(np.argmin(score)), score.shape)
        path = np.asarray(mcp.traceback(end), dtype=np.int64)
        return path + np.array([r0, c0])


#: Searches from at least this many patches are shared out over processes.
PARALLEL_MIN_PATCHES = 2_000
#: The searches' inputs, set while a pool of forked processes works on them.
_JOB = None


def _workers(workers, n: int) -> int:
    """How many processes to search ``n`` patches with (1 where fork is not available)."""
    import multiprocessing as mp

    if (n < PARALLEL_MIN_PATCHES or "fork" not in mp.get_all_start_methods()
            or mp.parent_process() is not None):  # not from inside a worker of a sweep
        return 1
    if workers is None:
        workers = cores()
    return max(1, min(int(workers), n))


def _search_chunk(patches, job=None):
    """The searches from some patches (in a forked process, with the inputs of ``_JOB``).
    ``job`` is ``(surface, labels, boxes, reach, max_km)``; with ``reach`` None, ``max_km``
    is an array of one limit per patch position."""
    surface, labels, boxes, reach, max_km = _JOB if job is None else job
    src, dst, km = [], [], []
    for p in np.asarray(patches, dtype=np.int64).tolist():  # one search per patch
        limit = float(max_km if reach is not None else max_km[p])
        found, dist = surface._search(labels, boxes, p,
                                      reach if reach is not None else surface._reach(limit),
                                      limit)
        src.append(np.full(found.size, p, dtype=np.int64))
        dst.append(found)
        km.append(dist)
    return (np.concatenate(src) if src else np.empty(0, np.int64),
            np.concatenate(dst) if dst else np.empty(0, np.int64),
            np.concatenate(km) if km else np.empty(0))


def _limited_search_class():
    from skimage.graph import MCP_Geometric

    class LimitedSearch(MCP_Geometric):
        """scikit-image's ``MCP_Geometric`` that stops once the cheapest cell on its heap
        costs more than ``limit`` (its documented ``goal_reached`` hook): every cell within
        ``limit`` is then final, and cells beyond it stay unreached (inf)."""

        def __init__(self, costs, limit, *, sampling):
            super().__init__(costs, sampling=sampling)
            self.limit = float(limit)

        def goal_reached(self, index, cumcost):
            return 2 if cumcost > self.limit else 0

    return LimitedSearch


def _LimitedSearch(costs, limit, *, sampling):
    global _LIMITED
    if _LIMITED is None:
        _LIMITED = _limited_search_class()
    return _LIMITED(costs, limit, sampling=sampling)


_LIMITED = None


def _edge_cells(mask: np.ndarray) -> np.ndarray:
    """Cells of ``mask`` with a neighbour (8-connected) outside it, or on the array's edge."""
    from scipy import ndimage

    inner = ndimage.binary_erosion(mask, structure=np.ones((3, 3), bool), border_value=0)
    return mask & ~inner


def _symmetric(i, j, km, n):
    """One entry per unordered pair, the smaller of its two directions; sorted."""
    lo, hi = np.minimum(i, j), np.maximum(i, j)
    key = lo * max(n, 1) + hi
    order = np.lexsort((km, key))
    key, km = key[order], km[order]
    first = np.r_[True, key[1:] != key[:-1]] if key.size else np.zeros(0, bool)
    key, km = key[first], km[first]
    return key // max(n, 1), key % max(n, 1), km


def _memory_bytes() -> int:
    try:
        return int(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return 8 << 30


def read_resistance(path, *, crs, patch_bounds, field="dispersal.resistance"
                    ) -> ResistanceSurface:
    """Read a resistance raster (GeoTIFF or any single-band raster GDAL reads) into ``crs``.

    Parameters
    ----------
    path : str or path
    crs : pyproj.CRS
        The landscape's metric CRS; a raster in another CRS is reprojected onto a grid of
        about the same cell size (nearest neighbour, so class values stay as they are).
    patch_bounds : (xmin, ymin, xmax, ymax)
        The patches' extent in ``crs``: the raster must cover it, with a value in every
        cell of it.

    Raises
    ------
    InputError
        A file that is not a raster or has no CRS, a raster too large for memory, one that
        does not cover the patches, values of 0 or below, or cells without a value within
        the patches' extent: one line naming the file and the problem.
    """
    import rasterio
    from rasterio.errors import RasterioError
    from rasterio.warp import Resampling, calculate_default_transform, reproject

    path = Path(path)
    try:
        src = rasterio.open(path)
    except (RasterioError, OSError) as exc:
        raise InputError(f"cannot be read as a raster ({_short(exc)}); give a GeoTIFF of "
                         "resistance values", file=path, field=field) from None
    with src:
        if src.crs is None:
            raise InputError("the raster has no coordinate reference system; save it with "
                             "one (for example as a GeoTIFF with its CRS)", file=path,
                             field=field)
        try:
            source_crs = src.crs
            same = source_crs == rasterio.crs.CRS.from_wkt(crs.to_wkt())
        except (RasterioError, ValueError) as exc:
            raise InputError(f"its coordinate reference system cannot be read ({_short(exc)})",
                             file=path, field=field) from None
        if same:
            transform, width, height = src.transform, src.width, src.height
        else:
            try:
                transform, width, height = calculate_default_transform(
                    source_crs, crs.to_wkt(), src.width, src.height, *src.bounds)
            except (RasterioError, ValueError) as exc:
                raise InputError(f"cannot be reprojected into the patches' CRS "
                                 f"({_short(exc)})", file=path, field=field) from None
        cells = int(width) * int(height)
        need = cells * _BYTES_PER_CELL
        have = _memory_bytes()
        if need > MAX_RASTER_SHARE * have:
            raise InputError(
                f"the raster has {height:,} × {width:,} cells, which need about "
                f"{need / 2**30:.1f} GB, more than {MAX_RASTER_SHARE:.0%} of this machine's "
                f"{have / 2**30:.1f} GB; give a coarser raster, or clip it to the patches",
                file=path, field=field)
        nodata = src.nodata
        try:
            if same:
                values = src.read(1, masked=True).astype(np.float32).filled(np.nan)
            else:
                values = np.full((height, width), np.nan, dtype=np.float32)
                reproject(source=rasterio.band(src, 1), destination=values,
                          src_transform=src.transform, src_crs=source_crs, src_nodata=nodata,
                          dst_transform=transform, dst_crs=crs.to_wkt(), dst_nodata=np.nan,
                          resampling=Resampling.nearest)
        except RasterioError as exc:
            raise InputError(f"its cells cannot be read ({_short(exc)}); the file may be "
                             "damaged or cut short", file=path, field=field) from None
    if transform.b != 0 or transform.d != 0 or transform.e >= 0:
        raise InputError("the raster is rotated or not north up; save it north up",
                         file=path, field=field)
    surface = ResistanceSurface(values=values, transform=transform, path=path)
    xmin, ymin, xmax, ymax = surface.bounds()
    px0, py0, px1, py1 = patch_bounds
    if px0 < xmin or py0 < ymin or px1 > xmax or py1 > ymax:
        raise InputError(
            f"does not cover the patches: they span x {px0:.0f} to {px1:.0f}, y {py0:.0f} "
            f"to {py1:.0f}, the raster x {xmin:.0f} to {xmax:.0f}, y {ymin:.0f} to "
            f"{ymax:.0f} (in the patches' CRS); give a raster over the whole landscape",
            file=path, field=field)
    bad = np.isfinite(values) & ~(values > 0)
    if bad.any():
        r, c = np.argwhere(bad)[0]
        x, y = _centre(transform, r, c)
        raise InputError(f"holds {int(bad.sum()):,} cell(s) of value 0 or below, the first "
                         f"{float(values[r, c]):g} at ({x:.1f}, {y:.1f}); a resistance is the "
                         "cost of crossing one km relative to open ground: give values above "
                         "0", file=path, field=field)
    r0, c0 = surface.rowcol(px0, py1)
    r1, c1 = surface.rowcol(px1, py0)
    gaps = ~np.isfinite(values[r0:r1 + 1, c0:c1 + 1])
    if gaps.any():
        r, c = np.argwhere(gaps)[0]
        x, y = _centre(transform, r + r0, c + c0)
        raise InputError(f"has no value (nodata) in {int(gaps.sum()):,} cell(s) within the "
                         f"patches' extent, the first at ({x:.1f}, {y:.1f}); give every cell "
                         "between the patches a resistance", file=path, field=field)
    return surface


def _centre(transform, row, col) -> tuple[float, float]:
    return (transform.c + (col + 0.5) * transform.a + (row + 0.5) * transform.b,
            transform.f + (col + 0.5) * transform.d + (row + 0.5) * transform.e)


def _short(exc) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:200].rstrip(". ")
