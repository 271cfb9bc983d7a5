"""Reading and validating the input files: patch polygons, corridor lines, links tables.

A patch file (GeoJSON, GeoPackage or Shapefile) becomes a :class:`Landscape`: a validated
GeoDataFrame in a metric CRS with one row per patch in the user's feature order, a string id
per patch and its area in km² from an equal-area projection. This module is the only place
that reads vector files; :mod:`trophoscape.model.network` calls :func:`read_corridors` and
:func:`read_links_table` from here.

Every problem with a file raises :class:`~trophoscape.errors.InputError` naming the file, the
feature (its id where the file has an id field, else its 0-based position) and the field.

Three rules on what a patch file may hold:

* **Coordinates must fit the file's CRS.** Numbers that look like longitude/latitude degrees
  (every |x| <= 180, |y| <= 90) in a projected CRS whose area of use contains them read as
  degrees are refused, and so is a feature that lies more than :data:`AREA_OF_USE_MARGIN_DEG`
  outside the CRS's area of use (EPSG's bounds, from pyproj) or that cannot be converted to
  longitude/latitude at all.
* **Patches have at least** :data:`MIN_PATCH_AREA_KM2` (1 m²).
* **The user's attributes are never overwritten.** A column of the file named like a column
  trophoscape computes (:func:`computed_columns`: ``patch_id``, ``area_km2``, ``links``,
  ``geometry`` and the per-species result columns of ``patches.gpkg``) is kept under its
  name plus ``_input`` (``area_km2_input``) with a warning, and scenario keys naming it still
  read the file's values. A column holding exactly what trophoscape computes (a file that
  trophoscape wrote, read back in; the id column named ``patch_id``) is replaced silently:
  nothing is lost.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import operator
import re
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import geopandas
import numpy as np
import pandas as pd
import pyproj
import shapely

from ..columns import computed_columns
from ..errors import InputError, TrophoscapeWarning, allowed_range

__all__ = [
    "Landscape",
    "read_patches",
    "landscape_from_frame",
    "read_corridors",
    "read_links_table",
    "read_candidates",
    "computed_columns",
    "MIN_PATCH_AREA_KM2",
    "AREA_OF_USE_MARGIN_DEG",
]

#: The smallest patch accepted, in km² (1 m²). Smaller than any habitat patch a model of
#: populations per km² can mean, yet about 10,000 times the area a 1 km² patch gets when its
#: degrees are read as metres (1e-10 km²), and far above what a polygon around a pole or a
#: sliver of a few millimetres leaves: such patches are refused rather than simulated.
MIN_PATCH_AREA_KM2 = 1e-6
#: How far (degrees of longitude or latitude) a feature may lie outside the area of use of
#: its CRS (EPSG's bounds, ``pyproj.CRS.area_of_use``). Data are routinely kept in a
#: neighbouring UTM zone (all of Norway, 4.5° E to 31° E, is mapped in UTM zone 33N, made for
#: 12° E to 18° E), so only features further away than this are refused.
AREA_OF_USE_MARGIN_DEG = 15.0
#: Whole numbers beyond 2^53 lose digits in a float64 (IEEE 754 double precision).
_EXACT_FLOAT_INT = 2.0 ** 53

_POLYGON, _MULTIPOLYGON = 3, 6  # shapely.get_type_id codes
_LINESTRING, _MULTILINESTRING = 1, 5
_VECTOR_FORMATS = "a GeoJSON (.geojson), GeoPackage (.gpkg) or Shapefile (.shp)"
_TRUE = frozenset({"true", "1", "yes"})
_FALSE = frozenset({"false", "0", "no", ""})
_LINKS_REQUIRED = ("source", "target", "weight")
_LINKS_OPTIONAL = ("survival", "directed")


@dataclass(frozen=True, eq=False)
class Landscape:
    """Habitat patches, validated, in a metric CRS, in the user's feature order.

    Attributes
    ----------
    frame : geopandas.GeoDataFrame, n_patches rows
        RangeIndex in the file's feature order; columns ``patch_id`` (str), ``area_km2``
        (float, from an equal-area projection), every attribute of the file, ``geometry``
        (Polygon or MultiPolygon in the metric CRS).
    path : pathlib.Path or None
        The patch file (None for a landscape built in memory).
    repaired : tuple of str
        Ids of the patches whose invalid geometry was repaired with ``shapely.make_valid``.
    id_field : str or None
        The attribute the ids came from; None when ids are the feature order "0", "1", ...
    renamed : mapping of str to str
        Columns of the file whose names trophoscape computes (see :func:`computed_columns`),
        each mapped to the column of ``frame`` that holds its values: ``area_km2`` ->
        ``area_km2_input``, or its own name where trophoscape's column holds the same values
        (an earlier output read back in, the id column ``patch_id``). :meth:`values` reads a
        field by its name in the file.

    Examples
    --------
    >>> from trophoscape.testing import chain_landscape
    >>> land = chain_landscape(3, spacing_km=2.0, size_km=1.0)
    >>> land.n_patches, land.ids.tolist()
    (3, ['0', '1', '2'])
    """

    frame: geopandas.GeoDataFrame
    path: Path | None = None
    repaired: tuple[str, ...] = ()
    id_field: str | None = None
    renamed: Mapping[str, str] = dataclasses.field(default_factory=dict)

    @cached_property
    def ids(self) -> np.ndarray:
        """Patch ids, ndarray of str, shape (n_patches,)."""
        return _readonly(self.frame["patch_id"].to_numpy(dtype=str))

    @property
    def n_patches(self) -> int:
        return len(self.frame)

    @property
    def has_id_field(self) -> bool:
        """True when ids come from an attribute of the file (messages then name patches by id)."""
        return self.id_field is not None

    @cached_property
    def area_km2(self) -> np.ndarray:
        """Patch areas in km² from an equal-area projection, ndarray, shape (n_patches,)."""
        return _readonly(self.frame["area_km2"].to_numpy(dtype=np.float64))

    @property
    def crs(self) -> pyproj.CRS:
        """The metric (projected, metres) CRS of ``frame``."""
        return self.frame.crs

    @cached_property
    def centroids(self) -> np.ndarray:
        """Patch centroids in metres in :attr:`crs`, ndarray, shape (n_patches, 2)."""
        return _readonly(shapely.get_coordinates(shapely.centroid(self.geometries)))

    @cached_property
    def geometries(self) -> np.ndarray:
        """Patch polygons as shapely geometries, ndarray of object, shape (n_patches,)."""
        return _readonly(self.frame.geometry.to_numpy())

    def feature(self, i: int) -> str | int:
        """How messages name patch ``i``: its id with an id field, else its position."""
        return str(self.ids[i]) if self.has_id_field else int(i)

    def values(self, field: str, *, key: str | None = None) -> np.ndarray:
        """A numeric patch attribute, checked present, numeric, finite and >= 0.

        Parameters
        ----------
        field : str
            Name of the attribute in the patch file (also when its column was renamed in
            :attr:`frame` because trophoscape computes a column of that name).
        key : str, optional
            The scenario key that named the attribute; error messages mention it.

        Returns
        -------
        ndarray of float64, shape (n_patches,)

        Raises
        ------
        InputError
            Naming the file, the first bad feature and the field.
        """
        refs = self.ids if self.has_id_field else None
        back = {kept: name for name, kept in self.renamed.items()}
        computed = (self.frame.geometry.name, "patch_id", "area_km2")
        have = [back.get(c, c) for c in self.frame.columns if c not in computed or c in back]
        column = self.renamed.get(field, None if field in computed else field)
        return _attribute_values(self.frame, field, key=key, path=self.path, refs=refs,
                                 column=column, have=have)


def read_patches(path, *, id_field=None, crs="auto", fields=None, layer=None) -> Landscape:
    """Read and validate a patch file.

    Parameters
    ----------
    path : str or path
        GeoJSON, GeoPackage or Shapefile of Polygon / MultiPolygon features.
    id_field : str, optional
        Attribute holding unique patch ids (converted with ``str``); default: the feature
        order "0", "1", ...
    crs : str or pyproj.CRS, default "auto"
        Metric CRS for distances. "auto": keep a projected file's CRS; for lon/lat data the
        local UTM zone when the patches span at most 6° of longitude, otherwise a Lambert
        azimuthal equal-area projection centred on them. Anything else must be a projected
        CRS in metres that pyproj accepts (e.g. "EPSG:3035").
    fields : mapping of str to str, or sequence of str, optional
        Numeric attributes to check now (present, numeric, finite, >= 0), each mapped to the
        scenario key that named it (for the messages).
    layer : str or int, optional
        Layer of a multi-layer file (GeoPackage).

    Returns
    -------
    Landscape

    Raises
    ------
    InputError
        Unreadable or empty file, null / empty / non-polygon geometry, a patch of zero area
        or below :data:`MIN_PATCH_AREA_KM2`, lon/lat out of range, coordinates that cannot
        be in the file's CRS (degrees in a projected CRS, far outside its area of use),
        missing / null / duplicate ids, numeric ids too large to keep exactly (beyond 2^53),
        bad numeric fields, a CRS that is not projected.

    Warns
    -----
    TrophoscapeWarning
        For each invalid geometry repaired with ``shapely.make_valid``; once for the
        columns of the file named like a column trophoscape computes, which are kept under
        another name (see :func:`computed_columns` and the module's docstring).

    Notes
    -----
    A GeoJSON file carries WGS 84 lon/lat coordinates (RFC 7946, Butler et al. 2016); a file
    without any CRS is read as lon/lat too, after checking its coordinates are in range.
    Areas always come from a Lambert azimuthal equal-area projection centred on the data
    (Snyder 1987, USGS Professional Paper 1395), whatever the CRS used for distances.
    """
    path = Path(path)
    frame = _read_vector(path, layer=layer, geometry_attribute=True)
    return landscape_from_frame(frame, id_field=id_field, crs=crs, fields=fields, path=path)


def landscape_from_frame(gdf, *, id_field=None, crs="auto", fields=None, path=None) -> Landscape:
    """Validate an in-memory GeoDataFrame of patch polygons; see :func:`read_patches`.

    Parameters
    ----------
    gdf : geopandas.GeoDataFrame
        One row per patch; its order is kept. A frame without a CRS is taken as lon/lat.
    id_field, crs, fields
        As in :func:`read_patches`.
    path : str or path, optional
        Where the frame came from, for messages.

    Returns
    -------
    Landscape
    """
    path = None if path is None else Path(path)
    target = None if _is_auto(crs) else _user_crs(crs)
    if len(gdf) == 0:
        raise InputError("the file holds no features; give a file with at least one patch "
                         "polygon (or name its layer with [patches] layer)", file=path)
    frame = gdf.reset_index(drop=True)
    ids = _ids(frame, id_field, path=path, what="patch")
    refs = ids if id_field is not None else None
    geoms = shapely.force_2d(frame.geometry.to_numpy())
    _check_types(geoms, (_POLYGON, _MULTIPOLYGON), "a Polygon or MultiPolygon", path=path,
                 refs=refs)
    source, assumed = (frame.crs, False) if frame.crs is not None else (
        pyproj.CRS.from_epsg(4326), True)
    _check_coordinates(geoms, source, path=path, refs=refs, assumed=assumed)
    have = [c for c in frame.columns if c != frame.geometry.name]
    wanted = fields.items() if isinstance(fields, Mapping) else ((f, None) for f in fields or ())
    for name, key in wanted:
        _attribute_values(frame, name, key=key, path=path, refs=refs, have=have)

    invalid = ~shapely.is_valid(geoms)
    if invalid.any():
        geoms = geoms.copy()
        geoms[invalid] = _polygonal_part(shapely.make_valid(geoms[invalid]))

    lon_lo, lon_hi, lat_lo, lat_hi = _lonlat_extent(geoms, source)
    lon_c, lat_c = _wrap_lon((lon_lo + lon_hi) / 2), (lat_lo + lat_hi) / 2
    if target is None:
        target = metric_crs(source, lon_span=lon_hi - lon_lo, lon_c=lon_c, lat_c=lat_c)
    series = geopandas.GeoSeries(geoms, crs=source)
    area_km2 = series.to_crs(equal_area_crs(lon_c, lat_c)).area.to_numpy() / 1e6
    tiny = ~(area_km2 >= MIN_PATCH_AREA_KM2)  # NaN too: a repair left no polygonal part
    if tiny.any():
        i = int(np.flatnonzero(tiny)[0])
        if not area_km2[i] > 0:
            raise InputError("polygon has zero area; redraw the patch with a positive area or "
                             "remove the feature", file=path, feature=_ref(refs, i),
                             field="geometry")
        raise InputError(
            f"patch area is {area_km2[i]:.3g} km², below the minimum of "
            f"{MIN_PATCH_AREA_KM2:g} km² (1 m²); check that its coordinates are in the units "
            f"of the file's CRS {_crs_text(source)} and that the outline is drawn as meant (a "
            "polygon around a pole or across the antimeridian must be split), or remove the "
            "feature", file=path, feature=_ref(refs, i), field="geometry")
    for i in np.flatnonzero(invalid):
        where = f"{path}: " if path is not None else ""
        warnings.warn(f"{where}{_feature_text(_ref(refs, i))}: geometry was invalid and has "
                      "been repaired (shapely make_valid); check its outline in a GIS if its "
                      "area looks wrong", TrophoscapeWarning, stacklevel=3)

    computed = {"patch_id": ids, "area_km2": area_km2}
    attributes, renamed = _keep_user_columns(frame, computed, id_field=id_field, path=path)
    out = pd.concat([pd.DataFrame(computed), attributes], axis=1)
    out = geopandas.GeoDataFrame(out, geometry=series.to_crs(target).values, crs=target)
    return Landscape(frame=out, path=path, repaired=tuple(ids[invalid].tolist()),
                     id_field=id_field, renamed=renamed)


def _keep_user_columns(frame, computed: dict, *, id_field, path):
    """The attributes of ``frame`` with every clash with a computed column renamed.

    A column named like a computed one (:func:`computed_columns`) is kept as NAME_input
    (NAME_input2, ... if that is taken too) with one warning for the file; it is dropped
    silently when nothing is lost: the id column itself, or every value present equal to
    what trophoscape computes (``computed``: the columns computed now, by name).

    Returns
    -------
    (pandas.DataFrame, dict)
        The attributes without the geometry, and the file's clashing names mapped to the
        column holding their values.
    """
    geometry = frame.geometry.name
    attributes = frame.drop(columns=[geometry])
    reserved = computed_columns()
    clashes = [c for c in attributes.columns if c in reserved]
    renamed, moved = {}, {}
    taken = set(attributes.columns) | reserved
    for name in clashes:
        if name == id_field == "patch_id" or (
                name in computed and _same_values(attributes[name], computed[name])):
            renamed[name] = name
            continue
        new, k = f"{name}_input", 1
        while new in taken:
            k += 1
            new = f"{name}_input{k}"
        taken.add(new)
        renamed[name] = moved[name] = new
    attributes = attributes.drop(columns=[c for c, new in renamed.items() if c == new])
    attributes = attributes.rename(columns=moved)
    if moved:
        where = f"{path}: " if path is not None else ""
        names = list(moved)
        if len(names) == 1:
            what = f"field {names[0]!r}: the file's column has the name of a column"
        else:
            listed = ", ".join(repr(c) for c in names[:3])
            more = f" and {len(names) - 3} more" if len(names) > 3 else ""
            what = f"fields {listed}{more}: the file's columns have names of columns"
        example = next(iter(moved.items()))
        hint = ("; set [patches] id_field = \"patch_id\" to take the ids from it"
                if "patch_id" in moved and id_field is None else "")
        warnings.warn(f"{where}{what} trophoscape computes; the file's values are kept as "
                      f"{example[1]!r}{' (and so on)' if len(names) > 1 else ''} in the patch "
                      f"table and outputs, and scenario keys naming {example[0]!r} still read "
                      f"them; rename the column in the file to silence this{hint}",
                      TrophoscapeWarning, stacklevel=3)
    return attributes, renamed


def _same_values(column: pd.Series, computed: np.ndarray) -> bool:
    """True when every value present in ``column`` equals ``computed`` (numbers to 1e-6,
    relative: an area written by trophoscape and read back agrees far closer)."""
    column = column.reset_index(drop=True)
    present = column.notna().to_numpy()
    if computed.dtype.kind in "US":
        return bool(np.all(column.astype(str).to_numpy()[present] == computed[present]))
    if not pd.api.types.is_numeric_dtype(column) or pd.api.types.is_bool_dtype(column):
        return False
    values = column.to_numpy(dtype=np.float64, na_value=np.nan)[present]
    return bool(np.allclose(values, computed[present], rtol=1e-6, atol=0.0))


def metric_crs(source, *, lon_span: float, lon_c: float, lat_c: float) -> pyproj.CRS:
    """The "auto" metric CRS: keep a projected metric source, else UTM or equal-area.

    Parameters
    ----------
    source : pyproj.CRS
        CRS of the data.
    lon_span, lon_c, lat_c : float
        Longitude span of the data and its centre (degrees).

    Returns
    -------
    pyproj.CRS
        ``source`` if it is projected in metres; else the WGS 84 UTM zone of the centre
        (north or south by the centre's latitude) when ``lon_span <= 6``; else a Lambert
        azimuthal equal-area projection centred on the data.
    """
    if source.is_projected and _in_metres(source):
        return source
    if lon_span <= 6.0:
        zone = int((lon_c + 180.0) // 6.0) % 60 + 1
        return pyproj.CRS.from_epsg((32600 if lat_c >= 0 else 32700) + zone)
    return equal_area_crs(lon_c, lat_c)


def equal_area_crs(lon_c: float, lat_c: float) -> pyproj.CRS:
    """Lambert azimuthal equal-area projection on WGS 84 centred at (lon_c, lat_c), metres."""
    return pyproj.CRS.from_proj4(
        f"+proj=laea +lat_0={lat_c:.6f} +lon_0={lon_c:.6f} +x_0=0 +y_0=0 +datum=WGS84 "
        "+units=m +no_defs")


def read_corridors(path, *, crs, layer=None) -> geopandas.GeoDataFrame:
    """Read and validate a file of corridor lines, reprojected into ``crs``.

    Parameters
    ----------
    path : str or path
        GeoJSON / GeoPackage / Shapefile of LineString or MultiLineString features, with
        optional attributes ``corridor_id`` (unique ids), ``survival`` (share of dispersers
        surviving the whole corridor, 0 to 1; empty means "from survival_per_km"),
        ``resistance`` (cost per km along the corridor, > 0) and ``quality`` (> 0; see
        :func:`trophoscape.model.network.corridor_resistances`).
    crs : pyproj.CRS
        The landscape's metric CRS.
    layer : str or int, optional
        Layer of a multi-layer file.

    Returns
    -------
    geopandas.GeoDataFrame
        RangeIndex in the file's order; the file's attributes (``corridor_id`` as str,
        ``survival`` as float with NaN for empty); geometry LineStrings in ``crs``
        (a MultiLineString is merged into one line).

    Raises
    ------
    InputError
        Unreadable or empty file, null / non-line geometry, parts that do not join into one
        line, zero length, null / duplicate ids, bad survival values.
    """
    path = Path(path)
    frame = _read_vector(path, layer=layer)
    if len(frame) == 0:
        raise InputError("the file holds no features; expected LineString corridors",
                         file=path)
    has_ids = "corridor_id" in frame.columns
    ids = _ids(frame, "corridor_id" if has_ids else None, path=path, what="corridor")
    refs = ids if has_ids else None
    geoms = shapely.force_2d(frame.geometry.to_numpy())
    _check_types(geoms, (_LINESTRING, _MULTILINESTRING), "a LineString or MultiLineString",
                 path=path, refs=refs)
    source, assumed = (frame.crs, False) if frame.crs is not None else (
        pyproj.CRS.from_epsg(4326), True)
    _check_coordinates(geoms, source, path=path, refs=refs, assumed=assumed)
    geoms = _merged_lines(geoms, path=path, refs=refs)
    lines = geopandas.GeoSeries(geoms, crs=source).to_crs(crs)
    _refuse_first(~(lines.length.to_numpy() > 0),
                  "line has zero length; draw the corridor as a line from one patch to "
                  "another, or remove the feature", path=path, refs=refs)
    out = frame.drop(columns=[frame.geometry.name])
    _warn_near_names(out.columns, CORRIDOR_ATTRIBUTES, path=path)
    if has_ids:
        out["corridor_id"] = ids
    if "survival" in out.columns:
        out["survival"] = _numbers(out["survival"], path=path, refs=refs, field="survival",
                                   lo=0.0, hi=1.0, allow_missing=True)
    for name in ("quality", "resistance"):
        if name in out.columns:
            out[name] = _numbers(out[name], path=path, refs=refs, field=name, lo=0.0,
                                 lo_open=True, allow_missing=True)
    return geopandas.GeoDataFrame(out, geometry=lines.values, crs=crs)


#: Attributes trophoscape reads from a corridor file (the README lists them).
CORRIDOR_ATTRIBUTES = ("corridor_id", "survival", "quality", "resistance")
#: Attributes trophoscape reads from a candidate-corridor file.
CANDIDATE_ATTRIBUTES = (*CORRIDOR_ATTRIBUTES, "cost")


def _warn_near_names(columns, known, *, path) -> None:
    """A warning for each column whose name is close to, but not, an attribute trophoscape
    reads (``resistence``, ``Cost``): its values would be silently ignored otherwise."""
    lowered = {k.lower(): k for k in known}
    for column in map(str, columns):
        if column in known:
            continue
        close = ([lowered[column.lower()]] if column.lower() in lowered
                 else difflib.get_close_matches(column, known, n=1, cutoff=0.8))
        if close:
            warnings.warn(f"{path}: attribute {column!r} is not read; did you mean "
                          f"{close[0]!r}? (the attributes read are "
                          f"{', '.join(map(repr, known))})", TrophoscapeWarning, stacklevel=3)


def read_candidates(path, *, crs, layer=None) -> geopandas.GeoDataFrame:
    """Read and validate a file of candidate corridors (not yet built), reprojected into ``crs``.

    Parameters
    ----------
    path : str or path
        GeoJSON / GeoPackage / Shapefile of LineString or MultiLineString features, or of
        thin Polygon / MultiPolygon features (a strip of land drawn as an area). Attributes:
        ``cost`` (required, a finite number >= 0, in the user's own unit), ``corridor_id``
        (optional unique ids; default the feature order), ``quality`` (optional, > 0,
        default 1), ``resistance`` (optional, > 0: cost per km along the corridor; see
        :func:`trophoscape.model.network.corridor_resistances`) and ``survival`` (optional,
        0 to 1, the share of dispersers surviving the whole corridor; empty means "from
        survival_per_km").
    crs : pyproj.CRS
        The landscape's metric CRS.
    layer : str or int, optional
        Layer of a multi-layer file.

    Returns
    -------
    geopandas.GeoDataFrame
        RangeIndex in the file's order; columns ``corridor_id`` (str: the id, or "0", "1",
        ... without an id field), ``cost``, ``quality`` (1 where empty), ``survival`` (NaN
        where empty), ``drawn_as`` ("line" or "polygon"); geometry one LineString per
        candidate in ``crs``. The frame's ``attrs["has_ids"]`` says whether ids came from
        the file (messages then name candidates by id, else by position).

    Raises
    ------
    InputError
        Unreadable or empty file, null / empty / other geometry, line parts that do not
        join, zero length, null / duplicate ids, a missing cost, a cost that is negative
        or not a number, bad quality or survival values.

    Notes
    -----
    A polygon becomes the long axis of its minimum rotated rectangle
    (``shapely.oriented_envelope``): the segment between the midpoints of the rectangle's
    two short sides. Its ends are then snapped to patches like the ends of a line, and its
    length is the rectangle's length, so a bent strip counts as straight (draw bent
    corridors as lines to have their length measured along the bends).
    """
    path = Path(path)
    frame = _read_vector(path, layer=layer)
    if len(frame) == 0:
        raise InputError("the file holds no features; expected candidate corridors "
                         "(LineStrings or thin Polygons with a cost)", file=path)
    has_ids = "corridor_id" in frame.columns
    ids = _ids(frame, "corridor_id" if has_ids else None, path=path, what="candidate")
    refs = ids if has_ids else None
    geoms = shapely.force_2d(frame.geometry.to_numpy())
    _check_types(geoms, (_LINESTRING, _MULTILINESTRING, _POLYGON, _MULTIPOLYGON),
                 "a LineString, MultiLineString or (thin) Polygon", path=path, refs=refs)
    source, assumed = (frame.crs, False) if frame.crs is not None else (
        pyproj.CRS.from_epsg(4326), True)
    _check_coordinates(geoms, source, path=path, refs=refs, assumed=assumed)
    _warn_near_names([c for c in frame.columns if c != frame.geometry.name],
                     CANDIDATE_ATTRIBUTES, path=path)
    if "cost" not in frame.columns:
        have = ", ".join(repr(c) for c in frame.columns if c != frame.geometry.name)
        raise InputError(f"the file has no 'cost' attribute (it has: {have or 'none'}); "
                         "add a 'cost' column with a number >= 0 for every candidate",
                         file=path, field="cost")
    cost = _numbers(frame["cost"], path=path, refs=refs, field="cost", lo=0.0)
    quality = (_numbers(frame["quality"], path=path, refs=refs, field="quality", lo=0.0,
                        lo_open=True, allow_missing=True)
               if "quality" in frame.columns else np.full(len(frame), np.nan))
    survival = (_numbers(frame["survival"], path=path, refs=refs, field="survival", lo=0.0,
                         hi=1.0, allow_missing=True)
                if "survival" in frame.columns else np.full(len(frame), np.nan))
    resistance = (_numbers(frame["resistance"], path=path, refs=refs, field="resistance",
                           lo=0.0, lo_open=True, allow_missing=True)
                  if "resistance" in frame.columns else None)
    projected = geopandas.GeoSeries(geoms, crs=source).to_crs(crs).to_numpy()
    kind = shapely.get_type_id(projected)
    area = np.isin(kind, (_POLYGON, _MULTIPOLYGON))
    lines = projected.copy()
    if area.any():
        lines[area] = _long_axis(projected[area])
    lines = _merged_lines(lines, path=path, refs=refs)
    _refuse_first(~(shapely.length(lines) > 0),
                  "candidate has zero length; draw it as a line or a strip from one patch to "
                  "another, or remove the feature", path=path, refs=refs)
    out = frame.drop(columns=[frame.geometry.name]).copy()
    out["corridor_id"] = ids
    out["cost"] = cost
    out["quality"] = np.where(np.isnan(quality), 1.0, quality)
    out["survival"] = survival
    if resistance is not None:
        out["resistance"] = resistance
    out["drawn_as"] = np.where(area, "polygon", "line")
    result = geopandas.GeoDataFrame(out, geometry=lines, crs=crs)
    result.attrs["has_ids"] = has_ids
    return result


def _long_axis(polygons: np.ndarray) -> np.ndarray:
    """Long axis of each polygon's minimum rotated rectangle, LineStrings of shape (k,)."""
    boxes = shapely.oriented_envelope(polygons)
    # a rectangle has 5 ring points; a degenerate one (a segment or a point) has fewer
    coords, owner = shapely.get_coordinates(shapely.boundary(boxes), return_index=True)
    counts = np.bincount(owner, minlength=polygons.size)
    out = np.empty(polygons.size, dtype=object)
    ring = counts == 5
    if ring.any():
        c = coords[np.isin(owner, np.flatnonzero(ring))].reshape(-1, 5, 2)
        side0 = np.hypot(*(c[:, 1] - c[:, 0]).T)
        side1 = np.hypot(*(c[:, 2] - c[:, 1]).T)
        along0 = (side0 >= side1)[:, None]
        # long sides 0-1 and 2-3: the axis joins the midpoints of sides 3-0 and 1-2
        a = np.where(along0, 0.5 * (c[:, 3] + c[:, 0]), 0.5 * (c[:, 0] + c[:, 1]))
        b = np.where(along0, 0.5 * (c[:, 1] + c[:, 2]), 0.5 * (c[:, 2] + c[:, 3]))
        out[ring] = shapely.linestrings(np.stack([a, b], axis=1))
    rest = np.flatnonzero(~ring)
    if rest.size:
        # a flat "polygon" (its rectangle is a segment or a point): the segment itself, or
        # an empty line that the zero-length check then reports
        flat = shapely.get_coordinates(boxes[rest], return_index=True)
        first = np.unique(flat[1], return_index=True)[1]
        last = np.r_[first[1:], flat[1].size] - 1
        ends = np.stack([flat[0][first], flat[0][last]], axis=1)
        segments = shapely.linestrings(ends)
        out[rest] = shapely.LineString()
        out[rest[np.unique(flat[1])]] = segments
    return out


def read_links_table(path) -> pd.DataFrame:
    """Read and check a links table (CSV) without looking at patch ids.

    Parameters
    ----------
    path : str or path
        CSV with a header row: ``source``, ``target``, ``weight`` and optionally
        ``survival`` (0 to 1; empty means "from survival_per_km") and ``directed``
        (true/false, 1/0, yes/no; empty means false).

    Returns
    -------
    pandas.DataFrame
        RangeIndex = 0-based data row (the "feature" in messages); columns ``source``,
        ``target`` (str), ``weight``, ``survival`` (float, NaN for empty), ``directed`` (bool).

    Raises
    ------
    InputError
        Missing or unreadable file, missing or unknown columns, empty ids, weights that are
        not finite numbers > 0, survival outside [0, 1], directed values not boolean-like.
    """
    path = Path(path)
    expected = "columns source,target,weight[,survival][,directed]"
    if not path.is_file():
        raise InputError(f"no such file; check the path (relative to the scenario); expected "
                         f"a CSV table with {expected}", file=path)
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except pd.errors.EmptyDataError:
        raise InputError(f"the file is empty; write a header row with {expected}",
                         file=path) from None
    except (pd.errors.ParserError, UnicodeDecodeError, OSError) as exc:
        raise InputError(f"cannot be read as CSV ({_first_line(exc)}); expected {expected}",
                         file=path) from exc
    table.columns = [str(c).strip() for c in table.columns]
    known = _LINKS_REQUIRED + _LINKS_OPTIONAL
    for column in table.columns:
        if column not in known:
            close = difflib.get_close_matches(column, known, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise InputError(f"unknown column{hint}; expected {expected}", file=path,
                             field=column)
    for column in _LINKS_REQUIRED:
        if column not in table.columns:
            raise InputError(f"the table has no {column!r} column; expected {expected}",
                             file=path, field=column)
    table = table.apply(lambda col: col.str.strip())
    for column in ("source", "target"):
        empty = (table[column] == "").to_numpy()
        if empty.any():
            raise InputError("patch id is missing; fill in the id of a patch", file=path,
                             feature=int(np.flatnonzero(empty)[0]), field=column)
    out = pd.DataFrame({"source": table["source"].astype(str),
                        "target": table["target"].astype(str)})
    blank = table == ""
    out["weight"] = _numbers(table["weight"].mask(blank["weight"]), path=path, refs=None,
                             field="weight", lo=0.0, lo_open=True)
    out["survival"] = (
        _numbers(table["survival"].mask(blank["survival"]), path=path, refs=None,
                 field="survival", lo=0.0, hi=1.0, allow_missing=True)
        if "survival" in table.columns else np.full(len(table), np.nan))
    if "directed" in table.columns:
        text = table["directed"].str.lower()
        bad = ~text.isin(_TRUE | _FALSE).to_numpy()
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"value {table['directed'].iloc[i]!r} is not true/false; expected "
                             "true, false, 1, 0, yes, no or empty (false)", file=path,
                             feature=i, field="directed")
        out["directed"] = text.isin(_TRUE).to_numpy()
    else:
        out["directed"] = False
    return out


# ---------------------------------------------------------------- helpers


def _read_vector(path: Path, *, layer=None, geometry_attribute=False) -> geopandas.GeoDataFrame:
    """The file as a GeoDataFrame. With ``geometry_attribute``, an attribute of the file
    named like the geometry column ("geometry"), which the reader would drop, is kept as a
    column of that name and the geometry column gets another name."""
    frame = _read_vector_file(path, layer=layer)
    if geometry_attribute:
        import pyogrio

        name = frame.geometry.name
        try:
            order = list(pyogrio.read_info(path, layer=layer)["fields"])
            values = (pyogrio.read_dataframe(path, layer=layer, read_geometry=False,
                                             columns=[name])[name] if name in order else None)
        except Exception:  # noqa: BLE001 - the file was read once already: keep that
            values = None
        if values is not None and len(values) == len(frame):
            other = "_".join(("", name, "of_file"))
            while other in frame.columns:
                other = "_" + other
            frame = frame.rename_geometry(other)
            frame[name] = values.to_numpy()
            # the file's order of attributes (messages list them in it), geometry last
            first = [c for c in order if c in frame.columns]
            frame = frame[first + [c for c in frame.columns if c not in first]]
    return frame


def _read_vector_file(path: Path, *, layer=None) -> geopandas.GeoDataFrame:
    if not path.exists():
        raise InputError(f"no such file; check the path, which should name {_VECTOR_FORMATS}",
                         file=path)
    try:
        with warnings.catch_warnings():
            # a text value among numbers: the field checks that follow report it properly
            warnings.filterwarnings("ignore", message="Could not parse column",
                                    category=UserWarning)
            return geopandas.read_file(path, engine="pyogrio", layer=layer)
    except Exception as exc:  # pyogrio/GDAL raise several unrelated types for unreadable data
        if (path.suffix.lower() in (".geojson", ".json") and path.is_file()
                and path.stat().st_size <= MAX_JSON_DIAGNOSIS_BYTES):
            # GDAL's message names a character position: Python's reader can say more
            try:
                data = json.loads(path.read_text(encoding="utf-8"))
            except json.JSONDecodeError as bad:
                raise InputError(f"not valid JSON ({bad.msg} at line {bad.lineno}, column "
                                 f"{bad.colno}); expected a GeoJSON FeatureCollection",
                                 file=path) from exc
            except RecursionError:
                raise InputError("not a GeoJSON FeatureCollection: arrays or objects are "
                                 "nested thousands of levels deep; export the file again",
                                 file=path) from None
            except (OSError, UnicodeDecodeError, MemoryError):
                data = None
            _non_finite_property(data, path)
        raise InputError(f"cannot be read as {_VECTOR_FORMATS}: {_first_line(exc)}; check "
                         "that it opens in a GIS, or export it again", file=path) from exc


#: A GeoJSON file GDAL cannot read is read again by Python's JSON reader, to name what is
#: wrong, only up to this size (it is held in memory whole).
MAX_JSON_DIAGNOSIS_BYTES = 64 << 20


def _non_finite_property(data, path: Path) -> None:
    """Name the first feature and property holding a number beyond float64 (such as
    1e400, which GDAL refuses and Python reads as infinity)."""
    features = data.get("features") if isinstance(data, dict) else None
    if not isinstance(features, list):
        return
    for i, feature in enumerate(features):  # the error path only: the file is already bad
        props = feature.get("properties") if isinstance(feature, dict) else None
        if not isinstance(props, dict):
            continue
        for key, value in props.items():
            if isinstance(value, float) and not math.isfinite(value):
                raise InputError(f"the number is beyond the range of 64-bit floating point "
                                 f"(about ±1.8e308; {value!r} as read); give a finite number",
                                 file=path, feature=i, field=str(key))


def _first_line(exc: BaseException) -> str:
    """The gist of a GDAL/pyogrio error: first line, without the path or driver advice."""
    text = str(exc).strip()
    if not text:
        return type(exc).__name__
    text = text.splitlines()[0].split("; It might help")[0].rstrip(".")
    return re.sub(r"^'[^']*' ", "", text)


def _is_auto(crs) -> bool:
    return crs is None or (isinstance(crs, str) and crs.strip().lower() == "auto")


def _user_crs(crs) -> pyproj.CRS:
    key = "patches.crs"
    try:
        parsed = pyproj.CRS.from_user_input(crs)
    except pyproj.exceptions.CRSError:
        raise InputError(f"{crs!r} is not a CRS pyproj understands; give 'auto' or a "
                         "projected CRS in metres such as 'EPSG:3035'", field=key) from None
    if not parsed.is_projected:
        kind = "a geographic (degrees)" if parsed.is_geographic else "not a projected"
        raise InputError(f"{crs!r} is {kind} CRS; distances and areas need a projected CRS: "
                         "give 'auto' or one in metres such as a UTM zone 'EPSG:326NN'",
                         field=key)
    if not _in_metres(parsed):
        raise InputError(f"{crs!r} is not in metres; give 'auto' or a projected CRS in metres "
                         "such as 'EPSG:3035'", field=key)
    return parsed


def _in_metres(crs: pyproj.CRS) -> bool:
    return all(axis.unit_conversion_factor == 1.0 for axis in crs.axis_info[:2])


def _ids(frame, id_field, *, path, what: str) -> np.ndarray:
    """Ids as str in feature order; checks presence, nulls and uniqueness."""
    n = len(frame)
    if id_field is None:
        return np.arange(n).astype(str)
    if id_field not in frame.columns or id_field == frame.geometry.name:
        have = ", ".join(repr(c) for c in frame.columns if c != frame.geometry.name)
        raise InputError(f"no such attribute for {what} ids; the file has: {have or 'none'}; "
                         "name one of them in [patches] id_field, or leave id_field out to "
                         "number the features", file=path, field=id_field)
    column = frame[id_field].reset_index(drop=True)
    missing = column.isna().to_numpy()
    if pd.api.types.is_float_dtype(column) and not missing.any():
        values = column.to_numpy(dtype=np.float64)
        # beyond 2^53 a float64 no longer holds every whole number: two ids of the file may
        # have become one number, and the digits shown are not the file's
        huge = ~(np.abs(values) <= _EXACT_FLOAT_INT)
        if huge.any():
            i = int(np.flatnonzero(huge)[0])
            problem = (f"id {float(values[i])!r} is not a finite number"
                       if not np.isfinite(values[i]) else
                       f"id {float(values[i])!r} is a number beyond 2^53 = 9007199254740992, "
                       "too large to be read exactly (such numbers lose digits, so different "
                       "ids can become equal)")
            raise InputError(f"{problem}; store the {what} ids as text (in quotes in a "
                             "GeoJSON file)", file=path, feature=i, field=id_field)
        # integer ids read as float (GDAL does this when a column has gaps): "7", not "7.0"
        whole = values == np.round(values)
        text = np.where(whole, np.where(whole, values, 0.0).astype(np.int64).astype(str),
                        values.astype(str))
        column = pd.Series(text, dtype=object)
    ids = column.astype(str).str.strip().to_numpy(dtype=object)
    missing = missing | (ids == "")
    if missing.any():
        raise InputError(f"{what} id is empty; give every {what} an id", file=path,
                         feature=int(np.flatnonzero(missing)[0]), field=id_field)
    ids = ids.astype(str)
    dup = pd.Series(ids).duplicated().to_numpy()
    if dup.any():
        j = int(np.flatnonzero(dup)[0])
        i = int(np.flatnonzero(ids == ids[j])[0])
        raise InputError(f"id is not unique: features {i} and {j} both have it; give each "
                         f"{what} its own id", file=path, feature=str(ids[j]), field=id_field)
    return ids


def _ref(refs, i: int) -> str | int:
    return str(refs[i]) if refs is not None else int(i)


def _feature_text(ref) -> str:
    return f"feature {ref!r}" if isinstance(ref, str) else f"feature {ref}"


def _check_types(geoms: np.ndarray, allowed: tuple[int, ...], expected: str, *, path, refs):
    missing = shapely.is_missing(geoms)
    empty = ~missing & shapely.is_empty(geoms)
    wrong = ~missing & ~empty & ~np.isin(shapely.get_type_id(geoms), allowed)
    bad = missing | empty | wrong
    if not bad.any():
        return
    i = int(np.flatnonzero(bad)[0])
    if missing[i]:
        problem = "geometry is null"
    elif empty[i]:
        problem = "geometry is empty"
    else:
        problem = f"geometry type is {geoms[i].geom_type}"
    raise InputError(f"{problem}; expected {expected}: fix the feature or remove it",
                     file=path, feature=_ref(refs, i), field="geometry")


def _refuse_first(mask, message, *, path, refs, field="geometry") -> None:
    """Raise the :class:`InputError` of the first feature where ``mask`` holds, if any;
    ``message`` is the text, or a function of the feature's position giving it."""
    hits = np.flatnonzero(mask)
    if hits.size:
        i = int(hits[0])
        raise InputError(message(i) if callable(message) else message, file=path,
                         feature=_ref(refs, i), field=field)


def _merged_lines(geoms, *, path, refs):
    """Lines with every MultiLineString merged into one LineString (a copy where any is);
    refuses one whose parts do not join."""
    multi = shapely.get_type_id(geoms) == _MULTILINESTRING
    if not multi.any():
        return geoms
    geoms = geoms.copy()
    geoms[multi] = shapely.line_merge(geoms[multi])
    _refuse_first(shapely.get_type_id(geoms) != _LINESTRING,
                  "the parts of this MultiLineString do not join into one line; merge them "
                  "into one continuous line from patch to patch", path=path, refs=refs)
    return geoms


def _check_lonlat(geoms: np.ndarray, *, path, refs, assumed: bool):
    bounds = shapely.bounds(geoms)
    bad = ((bounds[:, 0] < -180) | (bounds[:, 2] > 180) | (bounds[:, 1] < -90)
           | (bounds[:, 3] > 90) | ~np.isfinite(bounds).all(axis=1))
    if not bad.any():
        return
    i = int(np.flatnonzero(bad)[0])
    x0, y0, x1, y1 = bounds[i]
    if assumed:
        why = "the file has no CRS, so WGS 84 lon/lat was assumed; store the file with its CRS"
    elif path is not None and path.suffix.lower() in (".geojson", ".json"):
        why = "GeoJSON coordinates are WGS 84 lon/lat (RFC 7946); reproject the file to EPSG:4326"
    else:
        why = ("the file's CRS is in degrees, so these coordinates do not fit it; store the "
               "file with its true CRS")
    raise InputError(f"coordinates span x {x0:.6g} to {x1:.6g}, y {y0:.6g} to {y1:.6g}, outside "
                     f"longitude -180..180 / latitude -90..90; {why}", file=path,
                     feature=_ref(refs, i), field="geometry")


def _check_coordinates(geoms: np.ndarray, source: pyproj.CRS, *, path, refs, assumed: bool):
    """Coordinates that cannot be in ``source`` raise, naming the first such feature.

    Geographic: longitude -180..180, latitude -90..90. Projected: numbers that look like
    degrees (|x| <= 180 and |y| <= 90 throughout) lying inside the CRS's area of use when read
    as longitude/latitude; coordinates that do not convert to longitude/latitude. Both: a
    feature centre more than :data:`AREA_OF_USE_MARGIN_DEG` outside the area of use.
    """
    if not (source.is_geographic or source.is_projected):
        raise InputError(f"the file's CRS {_crs_text(source)} is neither geographic nor "
                         "projected, so its coordinates cannot be placed on the Earth; store "
                         "the file in a projected CRS in metres or in longitude/latitude",
                         file=path, field="geometry")
    if source.is_geographic:
        _check_lonlat(geoms, path=path, refs=refs, assumed=assumed)
    if assumed:
        return
    bounds = shapely.bounds(geoms)
    x = (bounds[:, 0] + bounds[:, 2]) / 2
    y = (bounds[:, 1] + bounds[:, 3]) / 2
    area = _area_of_use(source)

    def where(i):
        x0, y0, x1, y1 = bounds[i]
        return f"coordinates x {x0:.6g} to {x1:.6g}, y {y0:.6g} to {y1:.6g}"

    if source.is_projected and area is not None:
        degrees = (np.abs(bounds[:, [0, 2]]) <= 180).all(axis=1) & (
            np.abs(bounds[:, [1, 3]]) <= 90).all(axis=1)
        degrees &= (_outside_lon(x, area) == 0) & (_outside_lat(y, area) == 0)
        unit = source.axis_info[0].unit_name if source.axis_info else "metre"
        _refuse_first(degrees, lambda i: (
            f"{where(i)} look like longitude/latitude degrees, but the file's CRS "
            f"{_crs_text(source)} is projected (unit: {unit}); store the file with the CRS "
            "of its coordinates (EPSG:4326 for longitude/latitude)"), path=path, refs=refs)
    if source.is_projected:
        try:
            to_lonlat = pyproj.Transformer.from_crs(source, 4326, always_xy=True)
            with np.errstate(all="ignore"):
                lon, lat = to_lonlat.transform(x, y, errcheck=False)
        except pyproj.exceptions.ProjError as exc:
            raise InputError(f"the file's CRS {_crs_text(source)} cannot be converted to "
                             f"longitude/latitude ({_first_line(exc)}); store the file in a "
                             "CRS with an EPSG code", file=path, field="geometry") from None
        lon, lat = np.asarray(lon, dtype=float), np.asarray(lat, dtype=float)
        lost = ~(np.isfinite(lon) & np.isfinite(lat) & (np.abs(lat) <= 90))
        _refuse_first(lost, lambda i: (
            f"{where(i)} are no place on the Earth in the file's CRS {_crs_text(source)}; "
            "store the file with the CRS of its coordinates"), path=path, refs=refs)
    else:
        lon, lat = x, y
    if area is None:
        return
    far = ((_outside_lon(lon, area) > AREA_OF_USE_MARGIN_DEG)
           | (_outside_lat(lat, area) > AREA_OF_USE_MARGIN_DEG))
    if far.any():
        i = int(np.flatnonzero(far)[0])
        raise InputError(
            f"{where(i)} lie at {_lonlat_text(lon[i], lat[i])}, more than "
            f"{AREA_OF_USE_MARGIN_DEG:g}° outside the area the file's CRS {_crs_text(source)} "
            f"is made for ({_lonlat_text(area.west, area.south)} to "
            f"{_lonlat_text(area.east, area.north)}); store the file with the CRS of its "
            "coordinates", file=path, feature=_ref(refs, i), field="geometry")


def _area_of_use(crs: pyproj.CRS):
    """The CRS's area of use (degrees), also for a CRS read without one (a .prj file) that
    pyproj matches to an EPSG code; None when there is none."""
    if crs.area_of_use is not None:
        return crs.area_of_use
    try:
        match = crs.to_authority(min_confidence=70)
        return pyproj.CRS.from_authority(*match).area_of_use if match else None
    except pyproj.exceptions.CRSError:
        return None


def _outside_lon(lon: np.ndarray, area) -> np.ndarray:
    """Degrees of longitude from ``lon`` to the area's west..east band (0 inside); the band
    may cross the antimeridian (west > east)."""
    width = (area.east - area.west) % 360.0
    if width == 0.0 and area.east != area.west:  # -180 to 180: the whole globe
        return np.zeros(np.shape(lon))
    d = (np.asarray(lon, dtype=float) - area.west) % 360.0
    return np.where(d <= width, 0.0, np.minimum(d - width, 360.0 - d))


def _outside_lat(lat: np.ndarray, area) -> np.ndarray:
    lat = np.asarray(lat, dtype=float)
    return np.maximum(np.maximum(area.south - lat, lat - area.north), 0.0)


def _lonlat_text(lon: float, lat: float) -> str:
    """12.5°E 46.3°N."""
    return (f"{abs(lon):.4g}°{'W' if lon < 0 else 'E'} {abs(lat):.4g}°{'S' if lat < 0 else 'N'}")


def _crs_text(crs: pyproj.CRS) -> str:
    """EPSG:32632 (WGS 84 / UTM zone 32N), or the CRS's name when it has no code."""
    # pyproj's to_authority: the code of the CRS, or of an equivalent one in its database
    try:
        code = crs.to_authority(min_confidence=90)
    except pyproj.exceptions.CRSError:
        code = None
    if code:
        return f"{code[0]}:{code[1]} ({crs.name})"
    return repr(crs.name) if crs.name and crs.name != "unknown" else "(one without a name)"


def _lonlat_extent(geoms: np.ndarray, source: pyproj.CRS) -> tuple[float, float, float, float]:
    """(lon_min, lon_max, lat_min, lat_max) of the data; lon_max passes 180 across the dateline."""
    if source.is_geographic:
        # degrees of any geographic datum are within ~0.01° of WGS 84: enough to pick a centre
        b = shapely.bounds(geoms)
        lo, hi = np.nanmin(b[:, 0]), np.nanmax(b[:, 2])
        shift = np.where(b[:, 2] < 0, 360.0, 0.0)
        lo2, hi2 = np.nanmin(b[:, 0] + shift), np.nanmax(b[:, 2] + shift)
        if hi2 - lo2 < hi - lo:  # the patches straddle the antimeridian
            lo, hi = lo2, hi2
        return float(lo), float(hi), float(np.nanmin(b[:, 1])), float(np.nanmax(b[:, 3]))
    to_lonlat = pyproj.Transformer.from_crs(source, 4326, always_xy=True)
    lo, lat_lo, hi, lat_hi = to_lonlat.transform_bounds(*shapely.total_bounds(geoms),
                                                        densify_pts=21)
    if hi < lo:
        hi += 360.0
    return float(lo), float(hi), float(lat_lo), float(lat_hi)


def _wrap_lon(lon: float) -> float:
    return (lon + 180.0) % 360.0 - 180.0


def _polygonal_part(geoms: np.ndarray) -> np.ndarray:
    """Keep only the polygons of each geometry (make_valid may add lines or points)."""
    out = geoms.copy()
    mixed = ~np.isin(shapely.get_type_id(geoms), (_POLYGON, _MULTIPOLYGON))
    if mixed.any():
        parts, owner = shapely.get_parts(geoms[mixed], return_index=True)
        # a collection may hold a MultiPolygon: flatten once more
        parts, sub = shapely.get_parts(parts, return_index=True)
        owner = owner[sub]
        keep = shapely.get_type_id(parts) == _POLYGON
        # a geometry left with no polygon stays None and fails the zero-area check
        merged = np.full(int(mixed.sum()), None, dtype=object)
        if keep.any():
            shapely.multipolygons(parts[keep], indices=owner[keep], out=merged)
        out[mixed] = merged
    return out


_SAME = object()


def _attribute_values(frame, field: str, *, key, path, refs, column=_SAME,
                      have=None) -> np.ndarray:
    """The file's attribute ``field`` as numbers >= 0, read from ``frame[column]`` (the
    column holding it, ``field`` itself unless renamed; None: the file has no such
    attribute); ``have`` lists the file's attributes for the message."""
    named = f" (named by {key})" if key else ""
    column = field if column is _SAME else column
    if column is None or column not in frame.columns or column == frame.geometry.name:
        if have is None:
            have = [c for c in frame.columns
                    if c not in (frame.geometry.name, "patch_id", "area_km2")]
        listed = ", ".join(repr(c) for c in have)
        raise InputError(f"no such attribute{named}; the file has: {listed or 'none'}; add "
                         "the column to the patch file or name one of these", file=path,
                         field=field)
    return _numbers(frame[column], path=path, refs=refs, field=field, lo=0.0, named=named)


def _numbers(column: pd.Series, *, path, refs, field: str, lo: float, hi: float | None = None,
             lo_open: bool = False, allow_missing: bool = False, named: str = "") -> np.ndarray:
    """A column as float64, shape (n,); the first bad value raises, naming its feature."""
    rule = allowed_range(lo, hi, lo_open)

    def fail(i, problem):
        raise InputError(f"{problem}; give {rule}{named}", file=path, feature=_ref(refs, i),
                         field=field)

    column = column.reset_index(drop=True)
    if pd.api.types.is_bool_dtype(column):
        fail(0, f"value {column.iloc[0]!r} is true/false")
    if column.dtype == object:
        column = _single_values(column, fail)
    absent = column.isna().to_numpy()
    numeric = pd.to_numeric(column, errors="coerce")
    text = np.flatnonzero(numeric.isna().to_numpy() & ~absent)
    if text.size:
        fail(int(text[0]), f"value {column.iloc[int(text[0])]!r} is not a number")
    if absent.any() and not allow_missing:
        fail(int(np.flatnonzero(absent)[0]), "value is missing")
    values = numeric.to_numpy(dtype=np.float64, na_value=np.nan)
    present = ~absent
    bad = present & ~np.isfinite(values)
    bad |= present & ((values <= lo) if lo_open else (values < lo))
    if hi is not None:
        bad |= present & (values > hi)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        fail(i, f"value {float(values[i])!r} is out of range")
    return values


def _single_values(column: pd.Series, fail) -> pd.Series:
    """Lists of one value replaced by that value; the first list of another length fails.

    GDAL reads a GeoJSON property that holds a list in some features as a list in every
    feature (a number ``1.5`` becomes ``[1.5]``), so only the lists of other lengths are
    the file's lists.
    """
    # builtins mapped over the cells (type, len, itemgetter): no Python-level loop body
    is_list = column.map(type).isin([list, tuple, np.ndarray]).to_numpy()
    if not is_list.any():
        return column
    lists = column[is_list]
    sizes = lists.map(len).to_numpy(dtype=np.int64)
    wrong = np.flatnonzero(sizes != 1)
    if wrong.size:
        i = int(lists.index[wrong[0]])
        shown = np.asarray(column.iloc[i], dtype=object).tolist()
        size = int(sizes[wrong[0]])
        fail(i, f"value {shown!r} is " + (f"a list of {size} values" if size else
                                          "an empty list"))
    column = column.copy()
    column[is_list] = lists.map(operator.itemgetter(0))
    return column


def _readonly(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


def read_attributes(path, *, layer=None) -> pd.DataFrame:
    """The attribute table of a patch file, without geometries (for ``trophoscape init``)."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"no such file; check the path, which should name {_VECTOR_FORMATS}",
                         file=path)
    import pyogrio

    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="Could not parse column",
                                    category=UserWarning)
            return pyogrio.read_dataframe(path, layer=layer, read_geometry=False)
    except Exception as exc:  # GDAL raises several unrelated types for unreadable data
        raise InputError(f"cannot be read as {_VECTOR_FORMATS}: {_first_line(exc)}; check "
                         "that it opens in a GIS, or export it again", file=path) from exc
