"""Write the demo landscape: an invented upland valley, "Vellmoor Vale".

Run from anywhere::

    python data/make_demo.py

It writes ``demo_patches.geojson`` and ``demo_corridors.geojson`` next to this script. The
output is the same on every run (fixed seed, no clock, no randomness outside ``RNG``). The place
and every patch are made up; the coordinates only put the valley somewhere plausible on land
inside UTM zone 32N so that ``crs = "auto"`` has a single zone to pick.

Layout (distances boundary to boundary):

- five groups of patches, each a loose cluster a few km across;
- "Upper fells" and "Mill basin" are joined by a chain of small stepping-stone patches whose
  gaps are under 4 km, so with ``max_distance_km = 4`` they form one network component;
- "Sedge fen" and "Eastern ridge" lie more than 4 km from everything else and are reached only
  through the hedgerow and stream corridors;
- "Far knoll" is a small group with no corridor at all: it stays a component of its own.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import shapely
import shapely.ops
from pyproj import Transformer
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from shapely import affinity
from shapely.geometry import LineString, Point, mapping

HERE = Path(__file__).resolve().parent
PATCHES_FILE = HERE / "demo_patches.geojson"
CORRIDORS_FILE = HERE / "demo_corridors.geojson"

SEED = 20240611
RNG = np.random.default_rng(SEED)

# The valley is built in UTM 32N metres (areas and gaps are easy to control there) and
# written in WGS 84 lon/lat, as RFC 7946 requires.
WORK_CRS = "EPSG:32632"
ORIGIN = (443_900.0, 5_299_900.0)  # about 8.25 E, 47.85 N
DECIMALS = 6  # about 0.1 m; keeps the file small

# name, centre (km from ORIGIN), spread of patch centres (km), number of patches,
# habitat classes with weights; the mean quality of each class is in HABITAT_QUALITY
GROUPS = [
    ("Upper fells", (0.0, 0.0), 2.0, 44,
     {"heath": 0.5, "scrub": 0.3, "dry grassland": 0.2}),
    ("Mill basin", (15.0, 2.0), 1.9, 40,
     {"wet meadow": 0.5, "scrub": 0.3, "fen": 0.2}),
    ("Sedge fen", (3.0, -15.5), 1.5, 30,
     {"fen": 0.5, "wet meadow": 0.4, "scrub": 0.1}),
    ("Eastern ridge", (20.0, -12.5), 1.3, 24,
     {"dry grassland": 0.5, "heath": 0.3, "scrub": 0.2}),
    ("Far knoll", (-14.0, -9.0), 0.7, 9,
     {"heath": 0.6, "dry grassland": 0.4}),
]
HABITAT_QUALITY = {"heath": 0.8, "scrub": 0.7, "dry grassland": 0.95, "wet meadow": 1.1, "fen": 1.0}

# Small patches along the gap between "Upper fells" and "Mill basin" (km from ORIGIN).
STEPPING_STONES = [(5.6, 0.9), (8.2, 1.0), (10.6, 1.6)]

# Corridors: (id, group a, group b, kind, survival or None)
CORRIDORS = [
    ("K1", "Upper fells", "Sedge fen", "hedgerow", 0.95),
    ("K2", "Mill basin", "Eastern ridge", "stream", 0.98),
    ("K3", "Sedge fen", "Eastern ridge", "hedgerow", None),
    ("K4", "Upper fells", "Mill basin", "stream", None),
]

MIN_AREA_KM2, MAX_AREA_KM2 = 0.05, 8.0
MIN_GAP_M = 60.0  # patches never touch: a survey maps them as separate polygons
N_SPLIT = 6  # patches cut in two by a lane or ditch: written as MultiPolygons


def blob(area_m2: float, centre: tuple[float, float]) -> shapely.Polygon:
    """An irregular, star-shaped outline of the given area around ``centre``.

    The radius is a random smooth function of the angle (a few low harmonics), so the outline
    is lobed but never self-intersecting; then it is stretched and turned, which keeps it
    star-shaped and simple.
    """
    n_vert = int(np.clip(14 + 6 * math.log1p(area_m2 / 1e5), 16, 48))
    theta = np.linspace(0.0, 2.0 * np.pi, n_vert, endpoint=False)
    theta = theta + RNG.uniform(-0.3, 0.3, n_vert) * (2.0 * np.pi / n_vert)
    k = np.arange(2, 8)
    amp = RNG.uniform(0.04, 0.25, k.size) / k ** 0.7
    phase = RNG.uniform(0.0, 2.0 * np.pi, k.size)
    log_r = (amp[:, None] * np.cos(k[:, None] * theta[None, :] + phase[:, None])).sum(axis=0)
    radius = np.exp(log_r + RNG.normal(0.0, 0.04, n_vert))
    shape = shapely.Polygon(np.column_stack([radius * np.cos(theta), radius * np.sin(theta)]))
    # Mostly compact; some long ones, like meadows along a stream (aspect up to about 3).
    stretch = 1.0 + RNG.beta(1.2, 3.0) * 0.75
    shape = affinity.scale(shape, xfact=stretch, yfact=1.0 / stretch, origin=(0, 0))
    shape = affinity.rotate(shape, RNG.uniform(0.0, 180.0), origin=(0, 0))
    factor = math.sqrt(area_m2 / shape.area)
    shape = affinity.scale(shape, xfact=factor, yfact=factor, origin=(0, 0))
    return affinity.translate(shape, *centre)


def split_in_two(shape: shapely.Polygon) -> shapely.MultiPolygon:
    """Cut a patch along a straight lane through its centre (a star-shaped patch falls in two)."""
    c = shape.centroid
    angle = RNG.uniform(0.0, np.pi)
    half = 4.0 * math.sqrt(shape.area)
    lane = LineString([(c.x - half * math.cos(angle), c.y - half * math.sin(angle)),
                       (c.x + half * math.cos(angle), c.y + half * math.sin(angle))])
    parts = shape.difference(lane.buffer(12.0, cap_style="flat"))
    assert parts.geom_type == "MultiPolygon" and len(parts.geoms) == 2, parts.geom_type
    return parts


# The two large groups each have one big core patch (km²), as valleys with a reserve core do.
CORE_AREA_KM2 = {"Upper fells": 7.6, "Mill basin": 5.3}


def place_one(area_km2, centre_m, spread_m, occupied):
    """Draw outlines around ``centre_m`` until one keeps MIN_GAP_M from every placed patch."""
    for attempt in range(2000):
        # Widen the search slowly if the spot is crowded.
        offset = RNG.normal(0.0, spread_m * (1.0 + attempt / 400.0), 2)
        shape = blob(area_km2 * 1e6, (centre_m[0] + offset[0], centre_m[1] + offset[1]))
        if not occupied or not shapely.intersects(
                shape.buffer(MIN_GAP_M), np.asarray(occupied)).any():
            occupied.append(shape)
            return shape
    raise RuntimeError("could not place a patch; loosen the layout")


def place_group(centre_km, spread_km, n, occupied, core_km2=None):
    """Place ``n`` patches around ``centre_km`` without overlaps; return their outlines."""
    areas_km2 = np.clip(RNG.lognormal(mean=math.log(0.35), sigma=1.05, size=n),
                        MIN_AREA_KM2, MAX_AREA_KM2)
    if core_km2 is not None:
        areas_km2[0] = core_km2
    # Largest first: big patches find room, small ones fill the gaps, as in a real mosaic.
    areas_km2 = np.sort(areas_km2)[::-1]
    centre_m = (ORIGIN[0] + 1e3 * centre_km[0], ORIGIN[1] + 1e3 * centre_km[1])
    return [place_one(a, centre_m, 1e3 * spread_km, occupied) for a in areas_km2]


def to_lonlat(geoms):
    """Project from UTM 32N to WGS 84, round to DECIMALS and orient rings for RFC 7946."""
    forward = Transformer.from_crs(WORK_CRS, "EPSG:4326", always_xy=True)
    lonlat = shapely.transform(np.asarray(geoms, dtype=object),
                               lambda xy: np.column_stack(forward.transform(xy[:, 0], xy[:, 1])))
    # set_precision snaps to the grid and keeps polygons valid; orient after, since snapping
    # may rebuild rings. RFC 7946: exterior rings counterclockwise.
    lonlat = shapely.set_precision(lonlat, 10.0 ** -DECIMALS)
    return shapely.orient_polygons(lonlat, exterior_cw=False)


def round_coords(obj):
    """Round nested coordinate lists so that the JSON text holds at most DECIMALS digits."""
    if isinstance(obj, (list, tuple)):
        return [round_coords(v) for v in obj]
    return round(float(obj), DECIMALS)


def write_geojson(path: Path, geoms, rows, name: str) -> None:
    """Write a FeatureCollection, one feature per line, and replace the file at the end."""
    lines = []
    for geom, row in zip(geoms, rows):
        g = mapping(geom)
        feature = {"type": "Feature", "properties": row,
                   "geometry": {"type": g["type"], "coordinates": round_coords(g["coordinates"])}}
        lines.append(json.dumps(feature, separators=(",", ":"), ensure_ascii=False))
    text = ('{"type":"FeatureCollection","name":' + json.dumps(name) + ',"features":[\n'
            + ",\n".join(lines) + "\n]}\n")
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)


def build():
    occupied: list = []
    shapes, rows = [], []
    group_of = []
    number = 1
    for gi, (gname, centre, spread, n, habitats) in enumerate(GROUPS):
        group_shapes = place_group(centre, spread, n, occupied, CORE_AREA_KM2.get(gname))
        # Number west to east inside a group, as an inventory sheet would.
        group_shapes.sort(key=lambda s: (s.centroid.x, s.centroid.y))
        classes = list(habitats)
        picks = RNG.choice(len(classes), size=len(group_shapes), p=list(habitats.values()))
        for shape, pick in zip(group_shapes, picks):
            habitat = classes[pick]
            quality = float(np.clip(HABITAT_QUALITY[habitat] + RNG.normal(0.0, 0.22), 0.4, 1.5))
            shapes.append(shape)
            group_of.append(gi)
            rows.append({"patch_id": f"V{number:03d}", "quality": round(quality, 2),
                         "habitat": habitat})
            number += 1
    for x_km, y_km in STEPPING_STONES:
        shape = place_one(RNG.uniform(0.06, 0.2),
                          (ORIGIN[0] + 1e3 * x_km, ORIGIN[1] + 1e3 * y_km), 150.0, occupied)
        shapes.append(shape)
        group_of.append(-1)
        rows.append({"patch_id": f"V{number:03d}",
                     "quality": round(float(RNG.uniform(0.5, 0.8)), 2), "habitat": "scrub"})
        number += 1

    # A few mid-sized patches are cut by a lane: one inventory record, two polygons.
    areas = np.array([s.area for s in shapes])
    candidates = np.flatnonzero((areas > 0.3e6) & (areas < 3e6))
    for i in RNG.choice(candidates, size=N_SPLIT, replace=False):
        shapes[i] = split_in_two(shapes[i])

    for shape, row in zip(shapes, rows):
        # Inventory habit: area in hectares to one decimal, measured on the survey projection.
        row["area_ha_reported"] = round(shape.area / 1e4, 1)

    corridors, corridor_rows = build_corridors(shapes, np.array(group_of))
    return shapes, rows, corridors, corridor_rows


def build_corridors(shapes, group_of):
    """Lines that meander from the nearest edge of one group to the nearest edge of another."""
    names = [g[0] for g in GROUPS]
    shapes = np.asarray(shapes, dtype=object)
    lines, rows = [], []
    for cid, ga, gb, kind, survival in CORRIDORS:
        a_idx = np.flatnonzero(group_of == names.index(ga))
        b_idx = np.flatnonzero(group_of == names.index(gb))
        tree = shapely.STRtree(shapes[b_idx])
        (src, dst), dist = tree.query_nearest(shapes[a_idx], return_distance=True, all_matches=False)
        best = np.argmin(dist)
        pa, pb = shapely.ops.nearest_points(shapes[a_idx[src[best]]], shapes[b_idx[dst[best]]])
        # Start and end a little inside the patches (a hedge runs into the meadow).
        pa = _nudge_inside(shapes[a_idx[src[best]]], pa)
        pb = _nudge_inside(shapes[b_idx[dst[best]]], pb)
        lines.append(_meander(pa, pb, wiggle_m=60.0 if kind == "hedgerow" else 180.0))
        row = {"corridor_id": cid, "kind": kind}
        if survival is not None:
            row["survival"] = survival
        rows.append(row)
    return lines, rows


def _nudge_inside(shape, point, depth=25.0):
    """Move a boundary point ``depth`` metres toward the patch's interior point."""
    part = shape if shape.geom_type == "Polygon" else min(shape.geoms, key=point.distance)
    inner = part.representative_point()
    d = point.distance(inner)
    if d == 0:
        return point
    t = min(depth / d, 1.0)
    moved = Point(point.x + t * (inner.x - point.x), point.y + t * (inner.y - point.y))
    return moved if shape.covers(moved) else point


def _meander(pa, pb, wiggle_m):
    """A line from pa to pb bending sideways along the way (smooth, zero at both ends)."""
    n = 24
    s = np.linspace(0.0, 1.0, n)
    dx, dy = pb.x - pa.x, pb.y - pa.y
    length = math.hypot(dx, dy)
    nx, ny = -dy / length, dx / length
    k = np.arange(1, 4)
    coef = RNG.normal(0.0, wiggle_m, k.size) / k
    side = (coef[:, None] * np.sin(np.pi * k[:, None] * s[None, :])).sum(axis=0)
    return LineString(np.column_stack([pa.x + s * dx + side * nx, pa.y + s * dy + side * ny]))


def check(shapes_ll, rows, lines_ll, corridor_rows):
    """Re-read what was written and check the promises made in data/README.md."""
    inverse = Transformer.from_crs("EPSG:4326", WORK_CRS, always_xy=True)
    def to_utm(geoms):
        return shapely.transform(np.asarray(geoms, dtype=object),
                                 lambda xy: np.column_stack(inverse.transform(xy[:, 0], xy[:, 1])))
    patches = to_utm(shapes_ll)
    assert 120 <= len(patches) <= 180, len(patches)
    assert shapely.is_valid(patches).all()
    km2 = shapely.area(patches) / 1e6
    assert km2.min() >= 0.045 and km2.max() <= 8.05, (km2.min(), km2.max())
    assert sum(g.geom_type == "MultiPolygon" for g in shapes_ll) == N_SPLIT
    assert len({r["patch_id"] for r in rows}) == len(rows)
    lines = to_utm(lines_ll)
    tree = shapely.STRtree(patches)
    for line, row in zip(lines, corridor_rows):
        ends = [Point(c) for c in (line.coords[0], line.coords[-1])]
        hit = [tree.query_nearest(e, max_distance=50.0) for e in ends]
        assert all(len(h) == 1 for h in hit) and hit[0][0] != hit[1][0], row
    # Components of the kernel network at max_distance_km = 4 (demo.toml), boundary to boundary:
    # fells + stepping stones + basin, fen, ridge, knoll.
    i, j = tree.query(patches, predicate="dwithin", distance=4000.0)
    graph = coo_matrix((np.ones(i.size), (i, j)), shape=(len(patches),) * 2)
    _, label = connected_components(graph, directed=False)
    sizes = sorted(np.bincount(label).tolist(), reverse=True)
    assert sizes == [44 + 40 + len(STEPPING_STONES), 30, 24, 9], sizes
    assert PATCHES_FILE.stat().st_size < 1.5e6


def main():
    shapes, rows, corridors, corridor_rows = build()
    shapes_ll = to_lonlat(shapes)
    lines_ll = to_lonlat(corridors)
    write_geojson(PATCHES_FILE, shapes_ll, rows, "demo_patches")
    write_geojson(CORRIDORS_FILE, lines_ll, corridor_rows, "demo_corridors")
    check(shapes_ll, rows, lines_ll, corridor_rows)
    print(f"wrote {PATCHES_FILE.name} ({len(rows)} patches, "
          f"{PATCHES_FILE.stat().st_size / 1e3:.0f} kB) and {CORRIDORS_FILE.name} "
          f"({len(corridor_rows)} corridors)")


if __name__ == "__main__":
    main()
