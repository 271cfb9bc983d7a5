"""Patches from a habitat raster: connected habitat cells become patch polygons.

Planners often hold habitat as a land-cover map or a suitability surface rather than as
polygons. A cell is *habitat* when its value is one of ``habitat_values`` (land-cover
classes) or at least ``suitability_threshold`` (a suitability score); cells without a value
are not habitat. Habitat cells that touch at an edge or at a corner (8-connectivity) form one
patch; its outline is the union of its cells (a patch whose cells meet only at a corner is a
MultiPolygon touching itself there). Patches smaller than ``min_area_km2`` are dropped.

Each patch is named ``h<row>_<col>`` after its first cell in the raster's row order (top row
first, then left to right), so a patch keeps its id from one run to the next, and when
another part of the map changes. Areas come from the equal-area projection, as for vector
patches (:func:`trophoscape.model.landscape.landscape_from_frame`). The patch layer carries
``habitat_cells`` (cells in the patch) and ``mean_value`` (the mean raster value over them:
a suitability score can serve as ``[patches] quality_field = "mean_value"``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["is_raster_path", "habitat_patches"]

#: File suffixes read as rasters by ``[patches] path`` (others are vector files).
RASTER_SUFFIXES = (".tif", ".tiff", ".vrt", ".img")


def is_raster_path(path) -> bool:
    """Whether ``[patches] path`` names a raster (by its suffix, see :data:`RASTER_SUFFIXES`)."""
    return Path(path).suffix.lower() in RASTER_SUFFIXES


def habitat_patches(path, *, habitat_values=None, suitability_threshold=None,
                    min_area_km2: float = 0.0, crs="auto", fields=None):
    """The patches of a habitat raster, as a :class:`~trophoscape.model.landscape.Landscape`.

    Parameters
    ----------
    path : str or path
        A single-band raster GDAL reads (GeoTIFF), with a CRS.
    habitat_values : sequence of numbers, optional
        Cell values that are habitat (land-cover classes).
    suitability_threshold : float, optional
        Cells of at least this value are habitat. Give this or ``habitat_values``.
    min_area_km2 : float
        Smaller patches are dropped.
    crs, fields
        As for :func:`trophoscape.model.landscape.read_patches`.

    Raises
    ------
    InputError
        A file that is not a raster or has no CRS, neither or both of the two rules, a
        raster too large for memory, or no patch left: one line naming the file and the
        problem.
    """
    import geopandas
    import rasterio
    import shapely
    from rasterio import features
    from rasterio.errors import RasterioError
    from scipy import ndimage

    from .landscape import landscape_from_frame
    from .resistance import _BYTES_PER_CELL, MAX_RASTER_SHARE, _memory_bytes, _short

    path = Path(path)
    if (habitat_values is None) == (suitability_threshold is None):
        raise InputError("a habitat raster needs one rule for which cells are habitat: give "
                         "[patches] habitat_values (land-cover classes) or "
                         "suitability_threshold (a lowest score), not both",
                         file=path, field="patches.habitat_values")
    try:
        src = rasterio.open(path)
    except (RasterioError, OSError) as exc:
        raise InputError(f"cannot be read as a raster ({_short(exc)}); give a GeoTIFF of "
                         "habitat classes or suitability", file=path,
                         field="patches.path") from None
    with src:
        if src.crs is None:
            raise InputError("the raster has no coordinate reference system; save it with "
                             "one", file=path, field="patches.path")
        need = src.width * src.height * _BYTES_PER_CELL
        have = _memory_bytes()
        if need > MAX_RASTER_SHARE * have:
            raise InputError(
                f"the raster has {src.height:,} × {src.width:,} cells, which need about "
                f"{need / 2**30:.1f} GB, more than {MAX_RASTER_SHARE:.0%} of this machine's "
                f"{have / 2**30:.1f} GB; give a coarser raster, or clip it", file=path,
                field="patches.path")
        try:
            band = src.read(1, masked=True)
        except RasterioError as exc:
            raise InputError(f"its cells cannot be read ({_short(exc)}); the file may be "
                             "damaged or cut short", file=path, field="patches.path") from None
        transform, raster_crs = src.transform, src.crs
    values = band.data.astype(np.float64)
    valid = ~np.ma.getmaskarray(band) & np.isfinite(values)
    if habitat_values is not None:
        habitat = valid & np.isin(values, np.asarray(habitat_values, dtype=np.float64))
    else:
        habitat = valid & (values >= float(suitability_threshold))
    labels, count = ndimage.label(habitat, structure=np.ones((3, 3), dtype=bool))
    if count == 0:
        rule = (f"values {list(habitat_values)}" if habitat_values is not None
                else f"values of at least {suitability_threshold:g}")
        raise InputError(f"no cell is habitat ({rule}); check the rule against the "
                         "raster's values", file=path, field="patches.habitat_values"
                         if habitat_values is not None else "patches.suitability_threshold")
    if min_area_km2 > 0 and raster_crs.is_projected:
        # patches far below the smallest area are dropped before they are outlined (half
        # the area, in cells of the raster's own CRS: its scale error is far smaller)
        unit = raster_crs.linear_units_factor[1] if raster_crs.linear_units_factor else 1.0
        cell_km2 = abs(transform.a * transform.e) * unit * unit / 1e6
        cells = np.bincount(labels.ravel(), minlength=count + 1)
        small = np.flatnonzero(cells * cell_km2 < 0.5 * float(min_area_km2))
        small = small[small > 0]
        if small.size:
            keep = np.ones(count + 1, dtype=bool)
            keep[small] = False
            habitat = keep[labels] & habitat
            labels, count = ndimage.label(habitat, structure=np.ones((3, 3), dtype=bool))
        if count == 0:
            biggest = float(cells[1:].max()) * cell_km2
            raise InputError(f"no habitat patch has {min_area_km2:g} km² or more (the largest "
                             f"has about {biggest:.3g} km²); lower [patches] min_area_km2",
                             file=path, field="patches.min_area_km2")
    index = np.arange(1, count + 1)
    # the first cell of each patch in row order: its id
    flat = np.flatnonzero(labels.ravel())
    first = np.full(count + 1, -1, dtype=np.int64)
    order = np.argsort(labels.ravel()[flat], kind="stable")
    sorted_labels = labels.ravel()[flat][order]
    starts = np.flatnonzero(np.r_[True, sorted_labels[1:] != sorted_labels[:-1]])
    first[sorted_labels[starts]] = flat[order][starts]
    rows, cols = np.divmod(first[1:], labels.shape[1])
    cells = np.bincount(labels.ravel(), minlength=count + 1)[1:]
    mean = np.asarray(ndimage.mean(values, labels=labels, index=index), dtype=np.float64)
    # outlines: 4-connected pieces of each label, joined per label
    pieces, owner = [], []
    for geom, value in features.shapes(labels.astype(np.int32), mask=labels > 0,
                                       connectivity=4, transform=transform):
        pieces.append(shapely.geometry.shape(geom))
        owner.append(int(value))
    owner = np.asarray(owner, dtype=np.int64)
    pieces = np.asarray(pieces, dtype=object)
    outline = np.empty(count, dtype=object)
    by = np.argsort(owner, kind="stable")
    bounds = np.flatnonzero(np.r_[True, owner[by][1:] != owner[by][:-1], True])
    for a, b in zip(bounds[:-1], bounds[1:]):  # one union per patch of several pieces
        group = pieces[by[a:b]]
        outline[owner[by[a]] - 1] = group[0] if group.size == 1 else shapely.union_all(group)
    frame = geopandas.GeoDataFrame(
        {"patch_id": [f"h{r}_{c}" for r, c in zip(rows.tolist(), cols.tolist())],
         "habitat_cells": cells, "mean_value": mean},
        geometry=list(outline), crs=raster_crs)
    land = landscape_from_frame(frame, id_field="patch_id", crs=crs, fields=fields, path=path)
    keep = land.area_km2 >= float(min_area_km2)
    if not keep.any():
        raise InputError(f"no habitat patch has {min_area_km2:g} km² or more (the largest has "
                         f"{float(land.area_km2.max()):.3g} km²); lower [patches] "
                         "min_area_km2", file=path, field="patches.min_area_km2")
    if not keep.all():
        land = landscape_from_frame(frame[keep].reset_index(drop=True), id_field="patch_id",
                                    crs=crs, fields=fields, path=path)
    return land
