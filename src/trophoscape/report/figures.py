"""Maps and charts of a run, written as PNG files.

matplotlib is imported inside the functions, so ``import trophoscape`` stays light. Figures are
drawn on a bare :class:`matplotlib.figure.Figure` with the Agg canvas rather than through
``pyplot``: that renders without a display and leaves the caller's pyplot backend and open
figures alone (switching the backend with ``matplotlib.use`` would break a notebook's inline
plots). Every file is written to a temporary name in the target folder and renamed, so a reader
never sees half a PNG.

Colours are chosen to stay readable for colour-blind readers: viridis / cividis for sequential
values, PuOr (centred on zero) for differences, and the Okabe & Ito (2008) palette for classes and
for the two species.

Text from the user (patch ids, column and class names, scenario names, the time unit, sweep
keys and values, titles given by callers) is drawn exactly as written: it goes through
:func:`_literal`, which escapes every ``$`` so that matplotlib's mathtext never parses it,
and every public function draws with ``text.usetex`` off, so a ``matplotlibrc`` that turns
TeX on cannot send it to LaTeX either.
"""

from __future__ import annotations

import functools
import math
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io.folder import write_atomic

__all__ = ["patch_map", "timeseries_panels", "occupancy_curve"]

DPI = 150
#: zlib level of the PNG files: 3 encodes a map about three times faster than Pillow's
#: default 6, for files about a tenth larger (the pixels are the same: PNG is lossless).
PNG_COMPRESS_LEVEL = 3
# Okabe & Ito (2008), "Color Universal Design", colour-blind-safe qualitative palette.
# Ordered so that the first few classes differ most (sky blue comes after yellow).
OKABE_ITO = ["#0072B2", "#E69F00", "#009E73", "#CC79A7", "#F0E442", "#56B4E9", "#D55E00",
             "#000000"]
PREY_STYLE = {"color": "#0072B2", "linestyle": "-"}
PREDATOR_STYLE = {"color": "#D55E00", "linestyle": "--"}
NO_VALUE_COLOUR = "#c8c8c8"
#: A map of classes colours at most this many: beyond it, the largest ``MAX_CLASSES - 1``
#: and the others together in :data:`OTHER_CLASSES_COLOUR`.
MAX_CLASSES = 20
OTHER_CLASSES_COLOUR = "#505050"
LINK_COLOUR = "#9a9a9a"
MAX_PANELS = 6


def _literal(text) -> str:
    """``text`` as a matplotlib string that is drawn exactly as written.

    matplotlib parses a string with an even number of unescaped ``$`` as mathtext (so a patch
    id "Site $A$" would lose its dollars and turn italic, and "$x^$" raise a ParseException
    while drawing). Escaping every ``$`` as ``\\$`` leaves no unescaped dollar; outside
    mathtext matplotlib draws a backslash as it is and turns each ``\\$`` back into ``$``
    (matplotlib, "Writing mathematical expressions", and ``Text._preprocess_math``), so the
    drawn text is ``text`` itself, backslashes included. Works the same for titles, labels,
    tick labels and legend entries, which a per-Text ``parse_math=False`` would not all reach.
    """
    return str(text).replace("$", r"\$")


def _panel_grid(n: int) -> tuple[int, int]:
    """Rows and columns for ``n`` small panels: one column for one, two up to four, else
    three."""
    ncols = 1 if n == 1 else 2 if n <= 4 else 3
    return math.ceil(n / ncols), ncols


def _plain_text(draw):
    """Run a drawing function with ``text.usetex`` off (whatever the user's matplotlibrc
    says), so every label is drawn by matplotlib and user text is never sent to TeX."""
    @functools.wraps(draw)
    def wrapper(*args, **kwargs):
        import matplotlib

        with matplotlib.rc_context({"text.usetex": False}):
            return draw(*args, **kwargs)
    return wrapper


# --------------------------------------------------------------------------------------------
# patch map


@_plain_text
def patch_map(patches, column, *, path, links=None, title=None, label=None, cmap=None,
              diverging=False, categorical=False, bool_labels=("present", "absent"),
              isolines=None, canvas=None) -> Path:
    """Draw one per-patch value as a map and save it as a PNG.

    Parameters
    ----------
    patches : geopandas.GeoDataFrame, n_patches rows
        Patch polygons in a projected CRS with metre units, one row per patch.
    column : str
        Column to colour by: numbers (NaN allowed), booleans, or classes (text).
        Patches without a value are drawn grey and listed as "no value".
    path : str or path-like
        PNG file to write; its folder must exist.
    links : geopandas.GeoDataFrame, optional
        LineStrings (links or corridors) drawn thin and light under the patches; reprojected to
        the patches' CRS if it has another one.
    title : str, optional
        Figure title; default the column name.
    label : str, optional
        Colourbar label for numbers (say the units), legend title for classes.
    cmap : str, optional
        A matplotlib colormap name; default "viridis", or "PuOr" when ``diverging``.
    diverging : bool
        Numbers around zero (differences): the colour scale is symmetric about 0.
    categorical : bool
        Treat the column as classes even if it holds numbers.
    bool_labels : (str, str)
        Legend words for True and False.
    isolines : int or sequence of float, optional
        For numbers: contour lines of the value over the patch centroids (a Delaunay
        triangulation of the patches that have a value), e.g. isochrones of an arrival
        time; an int asks for that many levels.
    canvas : MapCanvas, optional
        The patches' (and links') drawing prepared once for several maps of the same
        patches, in the same order (``links`` is then ignored); default: prepared here.

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    InputError
        If ``column`` is missing or the CRS is not projected in metres.
    """
    from matplotlib.colors import CenteredNorm
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    path = Path(path)
    if column not in patches.columns:
        raise InputError(f"no such column; available: {', '.join(map(str, patches.columns))}",
                         field=column)
    _check_metric(patches.crs, "patches")
    canvas = _canvas_for(patches, links, canvas)
    geoms = canvas.geoms
    values = patches[column]
    missing = values.isna().to_numpy()

    kind = _value_kind(values, categorical)
    handles = []
    colourbar = constant = None
    colours = np.tile(_rgba(NO_VALUE_COLOUR), (len(geoms), 1))
    if kind == "bool":
        # Works for bool, nullable "boolean" and object columns of True/False/NaN alike.
        present = values.astype("boolean").fillna(False).to_numpy(dtype=bool)
        for flag, word, colour in ((True, bool_labels[0], OKABE_ITO[0]),
                                   (False, bool_labels[1], OKABE_ITO[1])):
            chosen = (present == flag) & ~missing
            colours[chosen] = _rgba(colour)
            handles.append(Patch(facecolor=colour, edgecolor="0.3", label=_literal(word)))
    elif kind == "class":
        import pandas as pd

        text = values[~missing].astype(str)
        counts = text.value_counts()
        classes = sorted(counts.index)
        others = 0
        if len(classes) > MAX_CLASSES:
            # the largest classes (most patches; ties by name) get their own colours, the
            # others one colour together: a legend of hundreds of classes is unreadable,
            # and slow to draw
            largest = sorted(classes, key=lambda c: (-int(counts[c]), c))[:MAX_CLASSES - 1]
            others = len(classes) - len(largest)
            classes = sorted(largest)
        palette = _class_palette(len(classes))
        lookup = {c: palette[i] for i, c in enumerate(classes)}
        if classes:
            codes = pd.Index(classes).get_indexer(text)  # -1 for the others
            table = np.vstack([np.asarray(palette, dtype=float), _rgba(OTHER_CLASSES_COLOUR)])
            colours[np.flatnonzero(~missing)] = table[codes]  # code -1: the last row
        handles += [Patch(facecolor=lookup[c], edgecolor="0.3", label=_literal(c))
                    for c in classes]
        if others:
            handles.append(Patch(facecolor=OTHER_CLASSES_COLOUR, edgecolor="0.3",
                                 label=f"{others} more, each smaller"))
    else:
        import matplotlib

        numbers = values.to_numpy(dtype=float)
        missing = ~np.isfinite(numbers)
        finite = numbers[~missing]
        if finite.size:
            if diverging:
                half = float(np.abs(finite).max()) or 1.0
                norm = CenteredNorm(vcenter=0.0, halfrange=half)
            else:
                norm, constant = _sequential_norm(finite)
            colourmap = matplotlib.colormaps[cmap or ("PuOr" if diverging else "viridis")]
            colours[~missing] = colourmap(norm(finite))
            colourbar = (colourmap, norm)
    if missing.any():
        handles.append(Patch(facecolor=NO_VALUE_COLOUR, edgecolor="0.3", label="no value"))

    fig, ax = _map_figure(geoms)
    if canvas.draw(ax, colours):
        handles.append(Line2D([], [], color=LINK_COLOUR, linewidth=1.0, label="link"))
    _frame_map(ax, geoms, patches.crs)
    if kind == "number" and "patch_id" in patches.columns and finite.size >= 2 \
            and np.ptp(finite) > 0 and constant is None:
        _label_extremes(ax, geoms, numbers, patches["patch_id"].astype(str).to_numpy())
    contours = None
    if isolines is not None and kind == "number" and (~missing).sum() >= 3:
        contours = _isolines(ax, geoms[~missing], finite, isolines, handles)

    if colourbar is not None:
        from matplotlib.cm import ScalarMappable

        bar = fig.colorbar(ScalarMappable(norm=colourbar[1], cmap=colourbar[0]), ax=ax,
                           shrink=0.8, pad=0.02)
        bar.set_label(_literal(label or column))
        _colourbar_ticks(bar, constant, "every patch with a value" if missing.any()
                         else "every patch")
        if contours is not None:
            bar.add_lines(contours)
    if handles:
        # Beside the map when there is no colourbar, else in a row under it; constrained
        # layout makes room for "outside" figure legends.
        fig.legend(handles=handles,
                   title=_literal(label) if label and kind in ("bool", "class") else None,
                   loc="outside right upper" if colourbar is None else "outside lower center",
                   ncol=1 if colourbar is None else min(len(handles), 4),
                   frameon=False, fontsize=8, title_fontsize=8)
    ax.set_title(_literal(title or column), fontsize=11)
    return _save(fig, path)


def _sequential_norm(finite):
    """``(Normalize, constant)`` for finite values; ``constant`` is their one value or None.

    Values equal up to rounding get a scale around that value (so the colour is mid-range)
    and ``constant`` is set, so that the colourbar can say so instead of inventing a range.
    """
    from matplotlib.colors import Normalize

    lo, hi = float(np.min(finite)), float(np.max(finite))
    if hi - lo > 1e-9 * max(abs(lo), abs(hi)):
        return Normalize(lo, hi), None
    constant = 0.5 * (lo + hi) + 0.0  # + 0.0 turns -0.0 into 0.0
    half = 0.5 * (abs(constant) or 1.0)
    return Normalize(constant - half, constant + half), constant


def _colourbar_ticks(bar, constant, what):
    """One tick naming the value when every item has it; otherwise ticks without an offset."""
    if constant is not None:
        bar.set_ticks([constant], labels=[f"{constant:.4g} ({what})"])
    elif hasattr(bar.formatter, "set_useOffset"):
        bar.formatter.set_useOffset(False)  # an offset ("1e-9+9.97e-1") hides the values


def _label_extremes(ax, geoms, numbers, ids):
    """Name the patches with the highest and the lowest value, so a reader can find them."""
    import shapely

    for i, word in ((int(np.nanargmax(numbers)), "highest"), (int(np.nanargmin(numbers)),
                                                              "lowest")):
        ties = int(np.sum(numbers == numbers[i])) - 1
        if ties > 2:  # a value many patches share singles nothing out
            continue
        name = f"{ids[i]} and {ties} more" if ties else ids[i]
        x, y = shapely.get_coordinates(shapely.point_on_surface(geoms[i]))[0] / 1e3
        ax.annotate(_literal(f"{name} ({word}: {numbers[i] + 0.0:.3g})"), (x, y),
                    xytext=(6, 6),
                    textcoords="offset points", fontsize=7, zorder=7,
                    bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "0.5",
                          "alpha": 0.85},
                    arrowprops={"arrowstyle": "-", "color": "0.3", "lw": 0.6})


def _isolines(ax, geoms, values, levels, handles):
    """Contour lines of per-patch values over a triangulation of the patch centroids."""
    import shapely
    from matplotlib.lines import Line2D
    from matplotlib.tri import Triangulation

    xy = shapely.get_coordinates(shapely.centroid(geoms)) / 1e3  # the map is drawn in km
    try:
        tri = Triangulation(xy[:, 0], xy[:, 1])
    except (ValueError, RuntimeError):  # collinear or duplicate points: no surface to contour
        return
    if np.ptp(values) <= 0:
        return
    lines = ax.tricontour(tri, values, levels=levels, colors="0.15", linewidths=0.7,
                          linestyles="--", zorder=6)
    handles.append(Line2D([], [], color="0.15", linewidth=0.7, linestyle="--",
                          label="isoline (levels marked on the colour bar)"))
    return lines


def _value_kind(values, categorical):
    """'bool', 'class' or 'number' for a column that may hold NaN."""
    from pandas.api import types

    present = values.dropna()
    if types.is_bool_dtype(values.dtype) or (
            len(present) and present.map(lambda v: isinstance(v, (bool, np.bool_))).all()):
        return "bool"
    if categorical or not types.is_numeric_dtype(values.dtype):
        return "class"
    return "number"


def _class_palette(n):
    if n <= len(OKABE_ITO):
        return [_rgba(c) for c in OKABE_ITO[:n]]
    import matplotlib

    # More classes than a colour-blind-safe palette holds: fall back on a long one.
    return [tuple(c) for c in matplotlib.colormaps["tab20"](np.linspace(0, 1, n))]


def _rgba(colour):
    from matplotlib.colors import to_rgba

    return np.asarray(to_rgba(colour))


def _check_metric(crs, what):
    if crs is None or not crs.is_projected:
        raise InputError(f"{what} must be in a projected CRS in metres (e.g. a UTM zone), "
                         f"got {crs.to_string() if crs is not None else 'no CRS'}", field="crs")
    unit = crs.axis_info[0].unit_name if crs.axis_info else ""
    if unit not in ("metre", "meter"):
        raise InputError(f"{what} must have metre units, got {unit!r}", field="crs")


def _map_figure(geoms):
    """A figure shaped like the patches' bounding box (width 7.5 in)."""
    from matplotlib.figure import Figure

    x0, y0, x1, y1 = _bounds(geoms)
    aspect = (y1 - y0) / max(x1 - x0, 1.0)
    fig = Figure(figsize=(7.5, float(np.clip(5.2 * aspect + 1.6, 4.0, 9.5))),
                 layout="constrained")
    return fig, fig.add_subplot()


def _bounds(geoms):
    import shapely

    return shapely.total_bounds(geoms)


#: From this many patches on, a map draws the patches as an image rasterised once per set of
#: maps (:func:`_burn`), not as one vector path per patch: at a map's size such a network is a
#: texture, and drawing 100,000 paths (and half a million links) cost seconds per map.
RASTER_MIN_PATCHES = 20_000
#: Cells along the longer side of that image (about the map's width in pixels).
RASTER_CELLS = 1200


class MapCanvas:
    """The drawing of one set of patches (and links), prepared once and shared by every map
    of them: only the colours change from map to map.

    Below :data:`RASTER_MIN_PATCHES` the patches are vector paths (one compound path per
    patch, holes and parts included) and the links line segments; from it on, both are
    rasterised onto one grid (patches by cell centres, with a patch smaller than a cell
    given the cell of a point inside it; links as the cells they cross, shown where no
    patch is), and a map is a lookup of the patches' colours on that grid.

    Parameters
    ----------
    patches : geopandas.GeoDataFrame
        Polygons in a projected CRS in metres.
    links : geopandas.GeoDataFrame, optional
        LineStrings, reprojected to the patches' CRS if needed.
    raster : bool, optional
        Force one way of drawing (default: by the number of patches).
    """

    def __init__(self, patches, links=None, *, raster=None):
        self.geoms = np.asarray(patches.geometry.values, dtype=object)
        self.crs = patches.crs
        if links is not None and len(links):
            if links.crs is not None and self.crs is not None and links.crs != self.crs:
                links = links.to_crs(self.crs)
            self.links = np.asarray(links.geometry.values, dtype=object)
        else:
            self.links = None
        self.raster = len(self.geoms) >= RASTER_MIN_PATCHES if raster is None else raster
        self._paths = self._segments = self._grid = None

    # -- vectors --------------------------------------------------------------------
    def paths(self):
        """One matplotlib Path per patch, in km, rings oriented (outer counterclockwise,
        holes clockwise) so holes stay empty whatever the fill rule."""
        if self._paths is None:
            import shapely
            from matplotlib.path import Path as MplPath

            n = len(self.geoms)
            oriented = shapely.orient_polygons(self.geoms, exterior_cw=False)
            parts, part_of = shapely.get_parts(oriented, return_index=True)
            rings, ring_of = shapely.get_rings(parts, return_index=True)
            xy, coord_of = shapely.get_coordinates(rings, return_index=True)
            codes = np.full(len(xy), MplPath.LINETO, dtype=MplPath.code_type)
            if len(xy):
                starts = np.r_[0, np.flatnonzero(np.diff(coord_of)) + 1]
                codes[starts] = MplPath.MOVETO
                codes[np.r_[starts[1:], len(xy)] - 1] = MplPath.CLOSEPOLY
            owner = part_of[ring_of[coord_of]] if len(xy) else np.empty(0, dtype=np.int64)
            cuts = np.cumsum(np.bincount(owner, minlength=n))[:-1]
            vertices = xy / 1e3
            empty = np.zeros((1, 2))
            self._paths = [MplPath(v, c) if len(v) else MplPath(empty)
                           for v, c in zip(np.split(vertices, cuts), np.split(codes, cuts))]
        return self._paths

    def segments(self):
        """The links as line segments in km (one polyline per part)."""
        if self._segments is None:
            import shapely

            parts = shapely.get_parts(self.links)
            parts = parts[~shapely.is_empty(parts)]
            coords, index = shapely.get_coordinates(parts, return_index=True)
            cuts = np.flatnonzero(np.diff(index)) + 1
            self._segments = np.split(coords / 1e3, cuts)
        return self._segments

    # -- raster -----------------------------------------------------------------------
    def grid(self):
        """``(labels, links, extent)``: patch position + 1 per cell (0 none), whether a link
        crosses the cell (or None), and the grid's extent in km (left, right, bottom,
        top)."""
        if self._grid is None:
            import shapely

            x0, y0, x1, y1 = _bounds(self.geoms)
            cell = max(x1 - x0, y1 - y0, 1.0) / RASTER_CELLS
            width = max(1, int(math.ceil((x1 - x0) / cell)))
            height = max(1, int(math.ceil((y1 - y0) / cell)))

            def cells(xy):
                col = np.clip(((xy[:, 0] - x0) / cell).astype(np.int64), 0, width - 1)
                row = np.clip(((y1 - xy[:, 1]) / cell).astype(np.int64), 0, height - 1)
                return row, col

            keep = np.flatnonzero(~shapely.is_missing(self.geoms)
                                  & ~shapely.is_empty(self.geoms))
            labels = np.zeros((height, width), dtype=np.int32)
            if keep.size:
                _burn(labels, self.geoms[keep], keep + 1, x0, y1, cell)
                # a patch smaller than a cell, holding no cell centre, takes the cell of a
                # point inside it where no other patch does
                shown = np.bincount(labels.ravel(), minlength=len(self.geoms) + 1)[1:] > 0
                small = keep[~shown[keep]]
                if small.size:
                    row, col = cells(shapely.get_coordinates(
                        shapely.point_on_surface(self.geoms[small])))
                    free = labels[row, col] == 0
                    labels[row[free], col[free]] = small[free] + 1
            lines = None
            if self.links is not None:
                # sampled every half cell along each link: the cells it crosses
                dense = shapely.segmentize(self.links[~shapely.is_missing(self.links)],
                                           cell / 2.0)
                xy = shapely.get_coordinates(dense)
                inside = ((xy[:, 0] >= x0) & (xy[:, 0] <= x0 + width * cell)
                          & (xy[:, 1] <= y1) & (xy[:, 1] >= y1 - height * cell))
                lines = np.zeros((height, width), dtype=bool)
                lines[cells(xy[inside])] = True  # beyond the patches: off the map
            extent = (x0 / 1e3, (x0 + width * cell) / 1e3, (y1 - height * cell) / 1e3,
                      y1 / 1e3)
            self._grid = (labels, lines, extent)
        return self._grid

    # -- drawing ------------------------------------------------------------------------
    def draw(self, ax, colours) -> bool:
        """Draw the links, then the patches in ``colours`` (RGBA rows in patch order), on
        ``ax`` (in km); True if links were drawn."""
        from matplotlib.collections import LineCollection, PathCollection

        if self.raster:
            labels, lines, extent = self.grid()
            table = np.zeros((len(colours) + 2, 4), dtype=np.uint8)
            table[1:-1] = np.round(np.clip(colours, 0, 1) * 255).astype(np.uint8)
            table[-1, :3] = np.round(_rgba(LINK_COLOUR)[:3] * 255).astype(np.uint8)
            table[-1, 3] = 204  # alpha 0.8, as the vector links
            index = labels
            if lines is not None:  # links show where no patch is
                index = np.where((labels == 0) & lines, len(colours) + 1, labels)
            ax.imshow(table[index], extent=extent, origin="upper", interpolation="nearest",
                      zorder=2)
            return lines is not None
        if self.links is not None:
            ax.add_collection(LineCollection(self.segments(), colors=LINK_COLOUR,
                                             linewidths=0.6, alpha=0.8, zorder=1))
        ax.add_collection(PathCollection(self.paths(), facecolors=colours,
                                         edgecolors="#404040", linewidths=0.35, zorder=2))
        return self.links is not None


def _burn(labels, geoms, values, x0, y1, cell):
    """Write ``values`` into the cells of ``labels`` whose centre lies inside each of
    ``geoms`` (the grid's top left corner at ``x0, y1``, square cells of ``cell`` metres);
    where polygons overlap, the largest value (with increasing values, the later polygon's,
    as GDAL's rasterisation burns them).

    Every polygon is tested at the cell centres within its bounding box, all in one
    vectorised call of shapely's point-in-polygon test.
    """
    import shapely

    height, width = labels.shape
    box = shapely.bounds(geoms)  # (minx, miny, maxx, maxy) per polygon
    col0 = np.clip(np.ceil((box[:, 0] - x0) / cell - 0.5), 0, width).astype(np.int64)
    col1 = np.clip(np.floor((box[:, 2] - x0) / cell - 0.5), -1, width - 1).astype(np.int64)
    row0 = np.clip(np.ceil((y1 - box[:, 3]) / cell - 0.5), 0, height).astype(np.int64)
    row1 = np.clip(np.floor((y1 - box[:, 1]) / cell - 0.5), -1, height - 1).astype(np.int64)
    cols = np.maximum(col1 - col0 + 1, 0)
    rows = np.maximum(row1 - row0 + 1, 0)
    count = cols * rows  # cell centres within each bounding box
    owner = np.repeat(np.arange(len(geoms)), count)
    k = np.arange(int(count.sum())) - np.repeat(np.cumsum(count) - count, count)
    row = row0[owner] + k // cols[owner]
    col = col0[owner] + k % cols[owner]
    shapely.prepare(geoms)
    try:
        inside = shapely.contains_xy(geoms[owner], x0 + (col + 0.5) * cell,
                                     y1 - (row + 0.5) * cell)
    finally:
        shapely.destroy_prepared(geoms)
    np.maximum.at(labels, (row[inside], col[inside]), np.asarray(values)[owner[inside]])


def _canvas_for(patches, links, canvas):
    """``canvas`` if given (checked to be of these patches), else one prepared here."""
    if canvas is None:
        return MapCanvas(patches, links)
    if len(canvas.geoms) != len(patches):
        raise ValueError("the canvas was prepared for other patches")
    return canvas


def _frame_map(ax, geoms, crs):
    """Limits, km axes, scale bar and north arrow."""
    x0, y0, x1, y1 = _bounds(geoms) / 1e3
    pad = 0.04 * max(x1 - x0, y1 - y0, 0.1)
    ax.set_xlim(x0 - pad, x1 + pad)
    ax.set_ylim(y0 - pad, y1 + pad)
    ax.set_aspect("equal")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.set_xlabel("easting (km)", fontsize=9)
    ax.set_ylabel("northing (km)", fontsize=9)
    ax.tick_params(labelsize=8)
    code = crs.to_epsg() if crs is not None else None
    ax.text(0.99, 0.01, f"EPSG:{code}" if code else _literal(crs.name), transform=ax.transAxes,
            ha="right", va="bottom", fontsize=7, color="0.4")
    _scale_bar(ax)
    _north_arrow(ax)


def _nice_length(span_km):
    """A round length near a fifth of the map width: 1, 2 or 5 times a power of ten (km)."""
    target = span_km / 5.0
    power = 10.0 ** math.floor(math.log10(target))
    return max(m * power for m in (1, 2, 5) if m * power <= target)


def _scale_bar(ax):
    from matplotlib.patches import Rectangle

    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    length = _nice_length(x1 - x0)
    height = 0.012 * (y1 - y0)
    left, bottom = x0 + 0.04 * (x1 - x0), y0 + 0.04 * (y1 - y0)
    # Two halves, black and white, so the bar reads on any background.
    for k, face in enumerate(("black", "white")):
        ax.add_patch(Rectangle((left + k * length / 2, bottom), length / 2, height,
                               facecolor=face, edgecolor="black", linewidth=0.6, zorder=5))
    text = f"{length:g} km"
    ax.text(left + length / 2, bottom + 2.2 * height, text, ha="center", va="bottom",
            fontsize=8, zorder=5)


def _north_arrow(ax):
    # Up is grid north of the projection; close enough to true north inside one UTM zone.
    ax.annotate("N", xy=(0.95, 0.97), xytext=(0.95, 0.85), xycoords="axes fraction",
                textcoords="axes fraction", ha="center", va="center", fontsize=10,
                fontweight="bold", zorder=5,
                arrowprops={"arrowstyle": "-|>", "color": "black", "linewidth": 1.2,
                            "shrinkA": 7, "shrinkB": 0})


# --------------------------------------------------------------------------------------------
# time series


@_plain_text
def timeseries_panels(dataset, patch_ids, *, path, time_unit="year", burn_in=None) -> Path:
    """Prey and predator abundance over time, one small panel per patch.

    Parameters
    ----------
    dataset : xarray.Dataset
        Variables ``prey`` and ``predator`` with dims ``(time, patch)`` (abundance, individuals)
        and a ``patch`` coordinate of ids; with a ``replicate`` dim, replicate 0 is drawn.
    patch_ids : sequence of str, 1 to 6 items
        Patches to draw, in panel order.
    path : str or path-like
        PNG file to write.
    time_unit : str
        Unit of the ``time`` coordinate, for the axis label.
    burn_in : float, optional
        Times before this are shaded as burn-in.

    Returns
    -------
    pathlib.Path
        The file written.

    Notes
    -----
    The y axis is logarithmic above 1 individual and linear from 0 to 1, so deep troughs and
    local extinctions (abundance 0) both show.
    """
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    path = Path(path)
    dataset = _first_replicate(_check_dataset(dataset))
    patch_ids = [str(p) for p in ([patch_ids] if isinstance(patch_ids, str) else patch_ids)]
    if not 1 <= len(patch_ids) <= MAX_PANELS:
        raise InputError(f"give 1 to {MAX_PANELS} patch ids, got {len(patch_ids)}",
                         field="patch_ids")
    known = {str(p) for p in dataset["patch"].values}
    unknown = [p for p in patch_ids if p not in known]
    if unknown:
        raise InputError(f"no such patch in the results: {', '.join(unknown)}", field="patch_ids")
    ids = dataset["patch"].astype(str)
    time = dataset["time"].values

    n = len(patch_ids)
    nrows, ncols = _panel_grid(n)
    # A single panel gets extra width so the legend row above it fits.
    fig = Figure(figsize=(max(3.3 * ncols + 0.6, 5.6), 2.3 * nrows + 0.9), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, sharex=True, sharey=True, squeeze=False)
                         ).ravel()
    top = 1.0
    for ax, pid in zip(axes, patch_ids):
        column = int(np.flatnonzero(ids.values == pid)[0])
        prey = dataset["prey"].isel(patch=column).values
        predator = dataset["predator"].isel(patch=column).values
        top = max(top, np.nanmax(prey, initial=0.0), np.nanmax(predator, initial=0.0))
        if burn_in is not None:
            ax.axvspan(time[0], burn_in, color="0.92", zorder=0, linewidth=0)
        ax.plot(time, prey, linewidth=1.1, **PREY_STYLE)
        ax.plot(time, predator, linewidth=1.1, **PREDATOR_STYLE)
        ax.set_title(_literal(f"patch {pid}"), fontsize=9)
        ax.tick_params(labelsize=8)
        ax.grid(True, which="major", color="0.9", linewidth=0.5)
    for ax in axes[n:]:
        ax.set_visible(False)
    for ax in axes[:n]:
        ax.set_yscale("symlog", linthresh=1.0, linscale=0.4)
        ax.set_ylim(-0.1, top * 1.6)  # a little below 0 so a zero line clears the axis
        ax.set_xlim(time[0], time[-1])
    # Shared axes hide inner tick labels; the hidden empty panel would leave a gap on the last row.
    for ax in axes[max(n - ncols, 0):n]:
        ax.tick_params(labelbottom=True)
    handles = [Line2D([], [], linewidth=1.4, label="prey", **PREY_STYLE),
               Line2D([], [], linewidth=1.4, label="predator", **PREDATOR_STYLE)]
    if burn_in is not None:
        handles.append(Patch(facecolor="0.92", label="burn-in (not analysed)"))
    fig.legend(handles=handles, loc="outside upper center", ncol=len(handles), frameon=False,
               fontsize=9)
    fig.supxlabel(_literal(f"time ({time_unit})"), fontsize=9)
    fig.supylabel("abundance (individuals)", fontsize=9)
    return _save(fig, path)


@_plain_text
def occupancy_curve(dataset, *, path, time_unit="year", extinction_abundance=1.0,
                    burn_in=None) -> Path:
    """Share of patches where each species is present over time: abundance at or above
    ``extinction_abundance`` (above 0 if that is 0), as every persistence figure counts it
    (:func:`trophoscape.analysis.persistence.present`).

    Parameters
    ----------
    dataset : xarray.Dataset
        Variables ``prey`` and ``predator`` with dims ``(time, patch[, replicate])``.
        With replicates the line is their mean and the band their range.
    path : str or path-like
        PNG file to write.
    time_unit : str
        Unit of the ``time`` coordinate, for the axis label.
    extinction_abundance : float
        The run's quasi-extinction abundance: a population below it (immigrants gathering
        in an emptied patch) does not count as present.
    burn_in : float, optional
        Shade the burn-in (left out of the persistence figures).

    Returns
    -------
    pathlib.Path
        The file written.
    """
    from matplotlib.figure import Figure

    path = Path(path)
    dataset = _check_dataset(dataset)
    time = dataset["time"].values
    fig = Figure(figsize=(6.4, 3.6), layout="constrained")
    ax = fig.add_subplot()
    if burn_in is not None:
        ax.axvspan(time[0], burn_in, color="0.92", zorder=0, linewidth=0,
                   label="burn-in (not analysed)")
    from ..analysis.persistence import present

    for name, style in (("prey", PREY_STYLE), ("predator", PREDATOR_STYLE)):
        x = dataset[name]
        # Missing values (a failed replicate) are left out of the share, not counted as absent.
        share = present(x, float(extinction_abundance)).sum("patch") / x.notnull().sum("patch")
        if "replicate" in share.dims:
            ax.fill_between(time, share.min("replicate").values, share.max("replicate").values,
                            color=style["color"], alpha=0.18, linewidth=0)
            share = share.mean("replicate")
        ax.plot(time, share.values, linewidth=1.4, label=_literal(name), **style)
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlim(time[0], time[-1])
    ax.set_xlabel(_literal(f"time ({time_unit})"), fontsize=9)
    ax.set_ylabel("share of patches occupied", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, color="0.9", linewidth=0.5)
    ax.legend(frameon=False, fontsize=9, loc="lower right")  # the burn-in band is on the left
    n_patches = dataset.sizes["patch"]
    ax.set_title(f"Occupied patches (of {n_patches})", fontsize=10)
    return _save(fig, path)


def _check_dataset(dataset):
    for name in ("prey", "predator"):
        if name not in dataset.data_vars:
            raise InputError(f"the results need a variable {name!r}; found "
                             f"{', '.join(map(str, dataset.data_vars)) or 'none'}", field=name)
        dims = dataset[name].dims
        if dims[:2] != ("time", "patch") or not set(dims) <= {"time", "patch", "replicate"}:
            raise InputError(f"dims must be ('time', 'patch'[, 'replicate']), got {dims}",
                             field=name)
    return dataset


def _first_replicate(dataset):
    if "replicate" in dataset.dims:
        return dataset.isel(replicate=0)
    return dataset


# --------------------------------------------------------------------------------------------
# saving


def _save(fig, path: Path) -> Path:
    """Render with Agg into a temporary file beside ``path``, then rename it into place."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    try:
        write_atomic(path, lambda handle: fig.savefig(
            handle, format="png", dpi=DPI, pil_kwargs={"compress_level": PNG_COMPRESS_LEVEL}))
    finally:
        fig.clear()  # a bare Figure is not registered with pyplot; clearing frees it
    return path


# --------------------------------------------------------------------------------------------
# synchrony


_SPECIES_STYLES = {"prey": PREY_STYLE, "predator": PREDATOR_STYLE}


def _species_style(name, k):
    # Species other than the two usual ones take the next colours of the safe palette.
    return _SPECIES_STYLES.get(name, {"color": OKABE_ITO[(k + 2) % len(OKABE_ITO)],
                                      "linestyle": "-"})


@_plain_text
def synchrony_distance_plot(tables, *, path, title="Synchrony against distance") -> Path:
    """Correlation between patches against the distance between them, with bootstrap bands.

    Parameters
    ----------
    tables : dict of str to pandas.DataFrame
        Per species, the table of :func:`trophoscape.analysis.synchrony.synchrony_by_distance`
        (columns ``distance_km``, ``correlation``, ``low``, ``high``, ``pairs``).
    path : str or path-like
        PNG file to write.
    title : str

    Returns
    -------
    pathlib.Path
        The file written.
    """
    from matplotlib.figure import Figure

    path = Path(path)
    need = ("distance_km", "correlation", "low", "high", "pairs")
    for name, table in tables.items():
        missing = [c for c in need if c not in table.columns]
        if missing:
            raise InputError(f"the table for {name} lacks {', '.join(missing)}", field=name)
    fig = Figure(figsize=(6.4, 3.8), layout="constrained")
    ax = fig.add_subplot()
    ax.axhline(0.0, color="0.45", linewidth=0.8, zorder=1)
    top, bottom, right = 0.0, 0.0, 0.0
    for k, (name, table) in enumerate(tables.items()):
        t = table[table["pairs"] > 0]
        if not len(t):
            continue
        style = _species_style(name, k)
        d = t["distance_km"].to_numpy(float)
        if np.isfinite(t["low"]).any():
            ax.fill_between(d, t["low"].to_numpy(float), t["high"].to_numpy(float),
                            color=style["color"], alpha=0.2, linewidth=0, zorder=2)
        ax.plot(d, t["correlation"].to_numpy(float), marker="o", markersize=3.5,
                linewidth=1.4, label=_literal(name), zorder=3, **style)
        values = t[["correlation", "low", "high"]].to_numpy(float)
        values = values[np.isfinite(values)]
        if values.size:
            top, bottom = max(top, values.max()), min(bottom, values.min())
        right = max(right, float(t["bin_upper_km"].max()) if "bin_upper_km" in t else d.max())
    # Fit the data (with the zero line in view) rather than the full [-1, 1] range, so a weak
    # decay is not squeezed into a strip.
    span = max(top - bottom, 0.1)
    ax.set_ylim(max(bottom - 0.08 * span, -1.05), min(top + 0.12 * span, 1.05))
    ax.set_xlim(0.0, right * 1.02 if right > 0 else 1.0)
    ax.set_xlabel("distance between patch centroids (km)", fontsize=9)
    ax.set_ylabel("correlation of detrended\nlog(1 + abundance)", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, color="0.9", linewidth=0.5)
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        from matplotlib.patches import Patch

        level = next((t.attrs["level"] for t in tables.values() if "level" in t.attrs), 0.95)
        handles.append(Patch(facecolor="0.6", alpha=0.35, label=f"{level:.0%} bootstrap band"))
        ax.legend(handles=handles, frameon=False, fontsize=8, loc="upper right")
    else:
        _no_data(ax, "no pair of patches with fluctuating abundances to correlate\n"
                     "(every series after burn-in is constant or extinct)")
    ax.set_title(_literal(title), fontsize=10)
    return _save(fig, path)


def _no_data(ax, text):
    """Say in the middle of an empty chart why it is empty."""
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", fontsize=9,
            color="0.35")


@_plain_text
def kuramoto_plot(series, *, path, time_unit="year", title="Phase synchrony") -> Path:
    """Kuramoto order parameter R(t) of each species over time, with its mean.

    Parameters
    ----------
    series : dict of str to xarray.DataArray
        Per species, R(t) with a ``time`` coordinate (values in [0, 1]), as returned by
        :func:`trophoscape.analysis.synchrony.phase_synchrony`.
    path : str or path-like
        PNG file to write.
    time_unit : str
        Unit of the ``time`` coordinate, for the axis label.
    title : str

    Returns
    -------
    pathlib.Path
        The file written.
    """
    from matplotlib.figure import Figure

    path = Path(path)
    fig = Figure(figsize=(6.4, 3.6), layout="constrained")
    ax = fig.add_subplot()
    lo, hi = np.inf, -np.inf
    for k, (name, r) in enumerate(series.items()):
        if "time" not in r.dims:
            raise InputError(f"R(t) for {name} needs a 'time' dim, got {r.dims}", field=name)
        time = np.asarray(r["time"].values, dtype=float)
        values = np.asarray(r.values, dtype=float)
        if not np.isfinite(values).any():
            continue
        colour = _species_style(name, k)["color"]
        mean = float(np.nanmean(values))
        ax.plot(time, values, color=colour, linewidth=1.1, linestyle="-", label=_literal(name),
                zorder=3)
        ax.axhline(mean, color=colour, linewidth=1.2, linestyle=(0, (5, 3)), zorder=4,
                   label=_literal(f"{name} mean {mean:.2f}"))
        lo, hi = min(lo, time.min()), max(hi, time.max())
    ax.set_ylim(0.0, 1.02)
    if np.isfinite(lo) and hi > lo:
        ax.set_xlim(lo, hi)
    ax.set_xlabel(_literal(f"time ({time_unit})"), fontsize=9)
    ax.set_ylabel("order parameter R (0 = no phase\nagreement, 1 = all in phase)", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, color="0.9", linewidth=0.5)
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        # Above the axes: R(t) uses the whole height, so any inside corner would cover it.
        fig.legend(handles=handles, labels=labels, loc="outside upper center",
                   ncol=min(len(handles), 4), frameon=False, fontsize=8)
    else:
        _no_data(ax, "no phases to compare\n(every series after burn-in is constant or "
                     "extinct)")
    ax.set_title(_literal(title), fontsize=10)
    return _save(fig, path)


__all__ += ["synchrony_distance_plot", "kuramoto_plot"]


# --------------------------------------------------------------------------------------------
# sweeps


@_plain_text
def sweep_plot(table, result, key, *, path, group_by=(), max_groups=len(OKABE_ITO)) -> Path:
    """One network-level result of a sweep against one varied value, and save it as a PNG.

    Parameters
    ----------
    table : pandas.DataFrame, one row per run
        The sweep table (columns named by scenario key, and the result columns).
    result : str
        Result column (numbers or booleans) for the y axis.
    key : str
        Varied key for the x axis: numbers are placed by value, anything else as classes.
    path : str or path-like
        PNG file to write.
    group_by : sequence of str
        Other varied keys: one line per combination of their values (up to ``max_groups``;
        with more, all points are drawn in one colour and the line is the mean over them).
    max_groups : int

    Returns
    -------
    pathlib.Path
        The file written.
    """
    import pandas as pd
    from matplotlib.figure import Figure

    path = Path(path)
    for col in (result, key, *group_by):
        if col not in table.columns:
            raise InputError(f"the sweep table has no column {col!r}", field=col)
    data = table[[key, result, *group_by]].copy()
    # booleans (True = 1) and missing results (None) as floats
    data[result] = pd.to_numeric(data[result].map(
        lambda v: np.nan if v is None else float(v) if isinstance(v, (bool, np.bool_)) else v),
        errors="coerce")
    numeric_x = pd.api.types.is_numeric_dtype(data[key]) and not pd.api.types.is_bool_dtype(
        data[key])
    if numeric_x:
        data["_x"] = data[key].astype(float)
        ticks = None
    else:
        classes = list(dict.fromkeys(data[key].astype(str)))
        data["_x"] = data[key].astype(str).map({c: i for i, c in enumerate(classes)})
        ticks = classes
    groups = list(group_by)
    if groups and data.groupby(groups, dropna=False).ngroups > max_groups:
        groups = []
    fig = Figure(figsize=(6.4, 3.8), layout="constrained")
    ax = fig.add_subplot()
    parts = data.groupby(groups, dropna=False, sort=False) if groups else [((), data)]
    for k, (label, part) in enumerate(parts):
        colour = OKABE_ITO[k % len(OKABE_ITO)]
        ax.plot(part["_x"], part[result], linestyle="none", marker="o", markersize=3,
                color=colour, alpha=0.45, zorder=2)
        mean = part.groupby("_x")[result].mean().sort_index()
        if not isinstance(label, tuple):
            label = (label,)
        text = _literal(", ".join(f"{g} = {v}" for g, v in zip(groups, label))) or None
        ax.plot(mean.index, mean.to_numpy(), marker="o", markersize=4.5, linewidth=1.4,
                color=colour, label=text, zorder=3)
    if ticks is not None:
        ax.set_xticks(range(len(ticks)), [_literal(t) for t in ticks],
                      rotation=30 if len(ticks) > 4 else 0)
    ax.ticklabel_format(axis="y", useOffset=False)  # an offset hides values near 1
    ax.set_xlabel(_literal(key), fontsize=9)
    ax.set_ylabel(_literal(result.replace("_", " ")), fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, color="0.9", linewidth=0.5)
    if groups:
        ax.legend(frameon=False, fontsize=8, loc="best")
    ax.set_title(_literal(f"{result.replace('_', ' ')} against {key}\n(dots: runs; line: "
                          "mean of the replicates)"), fontsize=10)
    return _save(fig, path)


__all__ += ["sweep_plot"]


# --------------------------------------------------------------------------------------------
# corridor planning


@_plain_text
def corridor_map(patches, candidates, column, *, path, chosen=None, links=None, title=None,
                 label=None, cmap="viridis", canvas=None) -> Path:
    """Candidate corridors coloured by a value (e.g. gain per cost) over the patches.

    Parameters
    ----------
    patches : geopandas.GeoDataFrame, n_patches rows
        Patch polygons in a projected CRS in metres; drawn in a light neutral fill.
    candidates : geopandas.GeoDataFrame, k rows
        Candidate lines; reprojected to the patches' CRS if needed.
    column : str
        Numeric column of ``candidates`` to colour by; NaN (and ±inf) drawn grey, dashed.
    path : str or path-like
        PNG file to write; its folder must exist.
    chosen : array_like of bool, shape (k,), optional
        Candidates of the chosen set, drawn with a dark casing.
    links : geopandas.GeoDataFrame, optional
        Existing links, drawn thin and light under everything.
    title, label : str, optional
        Figure title (default the column) and colourbar label.
    cmap : str
        A sequential matplotlib colormap.
    canvas : MapCanvas, optional
        The patches (and ``links``) prepared once for several maps (see :func:`patch_map`);
        ``links`` is then ignored.

    Returns
    -------
    pathlib.Path
    """
    import matplotlib
    from matplotlib.cm import ScalarMappable
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    path = Path(path)
    if column not in candidates.columns:
        raise InputError(f"no such column; available: {', '.join(map(str, candidates.columns))}",
                         field=column)
    _check_metric(patches.crs, "patches")
    if candidates.crs is not None and candidates.crs != patches.crs:
        candidates = candidates.to_crs(patches.crs)
    geoms = np.asarray(patches.geometry.values, dtype=object)
    lines = np.asarray(candidates.geometry.values, dtype=object)
    values = candidates[column].to_numpy(dtype=float)
    finite = np.isfinite(values)
    chosen = np.zeros(len(lines), bool) if chosen is None else np.asarray(chosen, bool)

    import shapely

    extent = np.concatenate([geoms, lines]) if len(lines) else geoms
    fig, ax = _map_figure(extent)
    handles = []
    background = np.tile(_rgba("#e9e6df"), (len(geoms), 1))
    if _canvas_for(patches, links, canvas).draw(ax, background):
        handles.append(Line2D([], [], color=LINK_COLOUR, linewidth=1.0, label="existing link"))

    segments = [shapely.get_coordinates(g) / 1e3 for g in lines]
    if chosen.any():
        ax.add_collection(LineCollection([s for s, c in zip(segments, chosen) if c],
                                         colors="black", linewidths=5.0, zorder=3,
                                         capstyle="round"))
        handles.append(Line2D([], [], color="black", linewidth=4.0, label="chosen set"))
    colourmap = matplotlib.colormaps[cmap]
    norm = constant = None
    colours = np.tile(_rgba(NO_VALUE_COLOUR), (len(lines), 1))
    if finite.any():
        norm, constant = _sequential_norm(values[finite])
        colours[finite] = colourmap(norm(values[finite]))
    styles = np.where(finite, "solid", "dashed")
    ax.add_collection(LineCollection(segments, colors=colours, linewidths=2.6, zorder=4,
                                     linestyles=list(styles), capstyle="round"))
    if (~finite).any():
        handles.append(Line2D([], [], color=NO_VALUE_COLOUR, linewidth=2.0, linestyle="--",
                              label="no value"))
    _frame_map(ax, extent, patches.crs)
    if norm is not None:
        bar = fig.colorbar(ScalarMappable(norm=norm, cmap=colourmap), ax=ax, shrink=0.8,
                           pad=0.02)
        bar.set_label(_literal(label or column))
        _colourbar_ticks(bar, constant, "every candidate" if finite.all()
                         else "every candidate with a value")
    if handles:
        fig.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 4),
                   frameon=False, fontsize=8)
    ax.set_title(_literal(title or column), fontsize=11)
    return _save(fig, path)


__all__ += ["corridor_map"]


# --------------------------------------------------------------------------------------------
# collapse spread

__all__ += ["arrival_distance_plot"]


@_plain_text
def arrival_distance_plot(distance_km, arrival_time, *, path, speed=None, interval=None,
                          shock_time=None, time_unit="year",
                          title="Arrival of collapse against distance") -> Path:
    """Arrival time of collapse against distance from the nearest shocked patch.

    Parameters
    ----------
    distance_km, arrival_time : array_like, shape (n_patches,)
        NaN arrival for patches never reached (left out and counted in the legend).
    path : str or path-like
        PNG file to write.
    speed : float, optional
        Front speed (km per time unit); drawn as the line ``distance = speed (t - t0)``
        through the median point, with ``interval`` (low, high) as a band of slopes.
    shock_time : float, optional
        Drawn as a vertical line.

    Returns
    -------
    pathlib.Path
    """
    from matplotlib.figure import Figure

    path = Path(path)
    d = np.asarray(distance_km, dtype=float)
    t = np.asarray(arrival_time, dtype=float)
    if d.shape != t.shape:
        raise InputError(f"distance and arrival differ in shape: {d.shape} and {t.shape}",
                         field="arrival_time")
    reached = np.isfinite(t) & np.isfinite(d)
    fig = Figure(figsize=(6.4, 4.0), layout="constrained")
    ax = fig.add_subplot()
    ax.scatter(t[reached], d[reached], s=14, color=OKABE_ITO[0], alpha=0.8, linewidths=0,
               label=f"reached ({int(reached.sum())})", zorder=3)
    if shock_time is not None:
        ax.axvline(shock_time, color=OKABE_ITO[6], linewidth=1.0, linestyle=":",
                   label="shock", zorder=2)
    use = reached & (d > 0)
    if speed is not None and np.isfinite(speed) and use.sum() >= 2:
        t0, d0 = float(np.median(t[use])), float(np.median(d[use]))
        grid = np.linspace(t[use].min(), t[use].max(), 50)
        if interval is not None and np.all(np.isfinite(interval)):
            lo, hi = (d0 + s * (grid - t0) for s in interval)
            ax.fill_between(grid, np.minimum(lo, hi), np.maximum(lo, hi), color=OKABE_ITO[1],
                            alpha=0.2, linewidth=0, zorder=1)
        ax.plot(grid, d0 + speed * (grid - t0), color=OKABE_ITO[1], linewidth=1.5,
                label=_literal(f"front speed {speed:.3g} km/{time_unit}"), zorder=4)
    never = int((~np.isfinite(t)).sum())
    if never:
        ax.plot([], [], " ", label=f"never reached: {never}")
    ax.set_xlabel(_literal(f"arrival time ({time_unit})"), fontsize=9)
    ax.set_ylabel("distance from the nearest shocked patch (km)", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, color="0.9", linewidth=0.5)
    ax.legend(frameon=False, fontsize=8, loc="best")
    ax.set_title(_literal(title), fontsize=10)
    return _save(fig, path)


# --------------------------------------------------------------------------------------------
# replicates


def regional_extinction_probability(dataset, species="predator", *, confidence=0.95):
    """Share of replicates in which ``species`` is gone from every patch by each census.

    Regional extinction is for good (no patch is left to recolonise from), so "gone by t"
    and "gone at t" agree; the share is taken of the replicates, with its Wilson score
    interval (:func:`trophoscape.analysis.persistence.wilson_interval`).

    Parameters
    ----------
    dataset : xarray.Dataset
        ``species`` with dims ``(time, patch, replicate)``.

    Returns
    -------
    pandas.DataFrame indexed by time: ``share``, ``low``, ``high``, ``replicates``.
    """
    import pandas as pd

    from ..analysis.persistence import wilson_interval

    x = dataset[species].transpose("time", "patch", "replicate").values
    gone = ~(x > 0).any(axis=1)                                   # (time, replicate)
    gone_by = np.logical_or.accumulate(gone, axis=0)
    k = gone_by.sum(axis=1)
    reps = gone_by.shape[1]
    low, high = wilson_interval(k, np.full(k.shape, reps), confidence=confidence)
    time = np.asarray(dataset["time"].values, dtype=float)
    return pd.DataFrame({"share": k / reps, "low": low, "high": high,
                         "replicates": np.full(k.shape, reps)},
                        index=pd.Index(time, name="time"))


@_plain_text
def regional_extinction_plot(dataset, *, path, species="predator", time_unit="year",
                             confidence=0.95) -> Path:
    """The probability that ``species`` is regionally extinct by time t, with its band.

    Parameters
    ----------
    dataset : xarray.Dataset
        ``prey`` and ``predator`` with dims ``(time, patch, replicate)``.
    path : str or path-like
        PNG file to write.
    species : str
    time_unit : str
    confidence : float
        Of the Wilson score band.

    Returns
    -------
    pathlib.Path
    """
    from matplotlib.figure import Figure

    path = Path(path)
    dataset = _check_dataset(dataset)
    if "replicate" not in dataset[species].dims:
        raise InputError("a probability over replicates needs a 'replicate' dim",
                         field=species)
    curve = regional_extinction_probability(dataset, species, confidence=confidence)
    style = _species_style(species, 0)
    fig = Figure(figsize=(6.4, 3.6), layout="constrained")
    ax = fig.add_subplot()
    t = curve.index.to_numpy()
    ax.fill_between(t, curve["low"], curve["high"], color=style["color"], alpha=0.2,
                    linewidth=0, step="post", label=f"{confidence:.0%} Wilson interval")
    ax.step(t, curve["share"], where="post", color=style["color"], linewidth=1.4,
            label="share of replicates")
    ax.set_ylim(-0.02, 1.02)
    ax.set_xlim(t[0], t[-1])
    ax.set_xlabel(_literal(f"time ({time_unit})"), fontsize=9)
    ax.set_ylabel(_literal(f"probability the {species} is\ngone from every patch"), fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(True, color="0.9", linewidth=0.5)
    ax.legend(frameon=False, fontsize=8, loc="upper left")
    ax.set_title(_literal(f"Regional extinction of the {species} by time t "
                          f"({int(curve['replicates'].iloc[0])} replicates)"), fontsize=10)
    return _save(fig, path)


__all__ += ["regional_extinction_probability", "regional_extinction_plot"]


# --------------------------------------------------------------------------------------------
# fitting to survey counts

#: Patches drawn in the figure of observed against fitted counts.
MAX_FIT_PANELS = 9


@_plain_text
def fitted_counts_panels(course, observed, *, path, time_unit="year") -> Path:
    """Observed counts (points) and the fitted model's expected counts (lines) over time,
    one small panel per patch.

    Parameters
    ----------
    course : dict
        Patch id → ``(times, prey, predator)``, the expected counts along the fitted run
        (arrays of the same length).
    observed : dict
        Patch id → ``(times, counts, species)`` of its survey rows (species 0 prey,
        1 predator).
    path : str or path-like
    """
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    ids = list(course)[:MAX_FIT_PANELS]
    n = max(len(ids), 1)
    nrows, ncols = _panel_grid(n)
    fig = Figure(figsize=(max(3.3 * ncols + 0.6, 5.6), 2.2 * nrows + 1.0), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, sharex=True, squeeze=False)).ravel()
    for ax, pid in zip(axes, ids):
        t, prey, predator = course[pid]
        ax.plot(t, prey, linewidth=1.1, **PREY_STYLE)
        ax.plot(t, predator, linewidth=1.1, **PREDATOR_STYLE)
        ot, oc, os_ = observed.get(pid, (np.empty(0), np.empty(0), np.empty(0)))
        for s, style in ((0, PREY_STYLE), (1, PREDATOR_STYLE)):
            pick = os_ == s
            ax.plot(ot[pick], oc[pick], linestyle="none", marker="o" if s == 0 else "s",
                    markersize=3.2, markerfacecolor="none", color=style["color"])
        top = max(1.0, np.nanmax(np.r_[prey, predator, oc], initial=0.0))
        ax.set_yscale("symlog", linthresh=1.0, linscale=0.4)
        ax.set_ylim(-0.1, top * 1.6)
        ax.set_title(_literal(f"patch {pid}"), fontsize=9)
        ax.tick_params(labelsize=8, labelbottom=True)
        ax.grid(True, which="major", color="0.9", linewidth=0.5)
    for ax in axes[len(ids):]:
        ax.set_visible(False)
    handles = [Line2D([], [], linewidth=1.4, label="prey, fitted", **PREY_STYLE),
               Line2D([], [], linestyle="none", marker="o", markerfacecolor="none",
                      color=PREY_STYLE["color"], label="prey, counted"),
               Line2D([], [], linewidth=1.4, label="predator, fitted", **PREDATOR_STYLE),
               Line2D([], [], linestyle="none", marker="s", markerfacecolor="none",
                      color=PREDATOR_STYLE["color"], label="predator, counted")]
    fig.legend(handles=handles, loc="outside upper center", ncol=4, frameon=False, fontsize=8)
    fig.supxlabel(_literal(f"time ({time_unit})"), fontsize=9)
    fig.supylabel("count (individuals)", fontsize=9)
    return _save(fig, Path(path))


@_plain_text
def observed_fitted_scatter(observed, expected, species, *, path) -> Path:
    """Every count against the fitted model's expected count, log–log, with the 1:1 line."""
    from matplotlib.figure import Figure

    observed = np.asarray(observed, dtype=float)
    expected = np.asarray(expected, dtype=float)
    species = np.asarray(species)
    fig = Figure(figsize=(4.6, 4.4), layout="constrained")
    ax = fig.subplots()
    shift = 1.0  # log(1 + count): zeros show
    for s, (name, style) in enumerate((("prey", PREY_STYLE), ("predator", PREDATOR_STYLE))):
        pick = species == s
        if pick.any():
            ax.plot(expected[pick] + shift, observed[pick] + shift, linestyle="none",
                    marker="o" if s == 0 else "s", markersize=2.5, alpha=0.5,
                    color=style["color"], label=name)
    both = np.r_[observed, expected] + shift
    lo, hi = float(np.nanmin(both, initial=1.0)), float(np.nanmax(both, initial=10.0))
    ax.plot([lo, hi], [lo, hi], color="0.3", linewidth=0.8, label="1:1")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("fitted expected count + 1", fontsize=9)
    ax.set_ylabel("observed count + 1", fontsize=9)
    ax.legend(frameon=False, fontsize=8)
    ax.grid(True, color="0.9", linewidth=0.5)
    return _save(fig, Path(path))


@_plain_text
def profile_panels(profiles, *, path) -> Path:
    """Each estimated value's profile: the fall of the log-likelihood from its maximum as
    the value is held away from its estimate (the other values re-estimated), with the
    1.92 line that bounds the 95 % interval.

    ``profiles``: key → ``(values, log_likelihoods, estimate, low, high)``.
    """
    from matplotlib.figure import Figure

    keys = list(profiles)
    n = max(len(keys), 1)
    nrows, ncols = _panel_grid(n)
    fig = Figure(figsize=(max(3.3 * ncols + 0.6, 5.0), 2.4 * nrows + 0.6), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False)).ravel()
    from matplotlib.ticker import MaxNLocator

    for ax, key in zip(axes, keys):
        values, ll, estimate, low, high = profiles[key]
        values, ll = np.asarray(values, dtype=float), np.asarray(ll, dtype=float)
        top = float(np.nanmax(np.r_[ll, -np.inf]))
        fall = top - ll
        ok = np.isfinite(fall)
        values, fall = values[ok], fall[ok]
        order = np.argsort(values)
        values, fall = values[order], fall[order]
        if values.size > 1:
            # between the points computed, the signed root of twice the fall is taken as
            # linear in the log-value (it is exactly so for a normal likelihood)
            root = np.sign(np.log(values) - np.log(estimate)) * np.sqrt(2 * fall)
            x = np.geomspace(values[0], values[-1], 200)
            ax.plot(x, 0.5 * np.interp(np.log(x), np.log(values), root) ** 2,
                    color=OKABE_ITO[0], linewidth=1.0)
        ax.plot(values, fall, linestyle="none", marker="o", markersize=3.5,
                color=OKABE_ITO[0])
        ax.axhline(1.92, color=OKABE_ITO[6], linewidth=0.9, linestyle="--")
        ax.axvline(estimate, color="0.3", linewidth=0.8)
        for end in (low, high):
            if np.isfinite(end):
                ax.axvline(end, color=OKABE_ITO[6], linewidth=0.8, linestyle=":")
        ax.xaxis.set_major_locator(MaxNLocator(4))
        ax.set_title(_literal(key), fontsize=9)
        ax.tick_params(labelsize=7)
        ax.set_ylim(bottom=-0.1)
        ax.grid(True, color="0.9", linewidth=0.5)
    for ax in axes[len(keys):]:
        ax.set_visible(False)
    fig.supylabel("fall of log-likelihood from its maximum", fontsize=9)
    fig.supxlabel("value held (others re-estimated); dashed: 1.92, the 95 % interval's edge",
                  fontsize=8)
    return _save(fig, Path(path))


# --------------------------------------------------------------------------------------------
# a summary of many patches


def size_class_shares(area_km2, flags, *, classes: int = 5):
    """Patches in size classes (quantiles of area) and, per class, the share of them where
    ``flags`` is True: ``(edges, shares, counts)``, ``edges`` of length classes + 1 (fewer
    where many patches share an area), NaN flags left out of the shares."""
    area = np.asarray(area_km2, dtype=float)
    flags = np.asarray(flags, dtype=float)
    edges = np.unique(np.quantile(area, np.linspace(0.0, 1.0, classes + 1)))
    if edges.size < 2:
        edges = np.array([area.min(), area.max()])
    which = np.clip(np.searchsorted(edges, area, side="right") - 1, 0, edges.size - 2)
    known = np.isfinite(flags)
    counts = np.bincount(which[known], minlength=edges.size - 1)
    hits = np.bincount(which[known], weights=flags[known], minlength=edges.size - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        shares = np.where(counts > 0, hits / np.maximum(counts, 1), np.nan)
    return edges, shares, counts


def size_class_labels(area_km2, *, classes: int = 5) -> list[str]:
    """The size classes' labels: the range of area and how many patches each holds (all of
    them, whatever a species' values; the classes depend on the areas only)."""
    edges, _, sizes = size_class_shares(area_km2, np.zeros(np.size(area_km2)), classes=classes)
    return [f"{a:.3g}–{b:.3g}\n({c} patches)" for a, b, c in zip(edges[:-1], edges[1:], sizes)]


@_plain_text
def size_class_plot(area_km2, persists: dict, *, path, classes: int = 5) -> Path:
    """Share of patches where each species is present at the end, by patch-size class
    (quintiles of area): a view of a large network that a map of its patches cannot give.

    ``persists``: species name → per-patch booleans (NaN where unknown).
    """
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 3.4), layout="constrained")
    ax = fig.subplots()
    names = list(persists)
    width = 0.8 / max(len(names), 1)
    for k, name in enumerate(names):
        edges, shares, _ = size_class_shares(area_km2, persists[name], classes=classes)
        x = np.arange(shares.size)
        style = _SPECIES_STYLES.get(name, {"color": OKABE_ITO[k % len(OKABE_ITO)]})
        ax.bar(x + (k - (len(names) - 1) / 2) * width, shares, width=width,
               color=style["color"], label=_literal(name))
    if names:
        labels = size_class_labels(area_km2, classes=classes)
        ax.set_xticks(np.arange(len(labels)), labels, fontsize=7)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("share of patches where present at the end", fontsize=8)
    ax.set_xlabel("patch area (km²), classes of equal numbers of patches", fontsize=8)
    ax.tick_params(axis="y", labelsize=8)
    ax.grid(True, axis="y", color="0.9", linewidth=0.5)
    fig.legend(loc="outside upper center", ncol=max(len(names), 1), frameon=False, fontsize=8)
    return _save(fig, Path(path))
