"""Resistance: corridors' resistance, the matrix resistance, least-cost distances over a
raster, and the raster's bad input.

Outside references: Euclidean geometry through shapely (straight and detour lengths),
``scipy.sparse.csgraph.dijkstra`` on the same 8-neighbour grid graph, and the known worst
error of the octile (8-neighbour) metric against the straight line, ``sqrt(4 - 2 sqrt 2) - 1``
≈ 8.24 % at 22.5° off the axes (common practice in raster path analysis; the value follows
from the geometry: a path of a straight and a diagonal leg against the hypotenuse).
"""

from __future__ import annotations

import math
import warnings

import geopandas
import numpy as np
import pytest
import rasterio
import scipy.sparse as sp
import shapely
from affine import Affine
from scipy.sparse.csgraph import dijkstra

from trophoscape.errors import InputError, TrophoscapeWarning
from trophoscape.model.landscape import read_patches
from trophoscape.model.network import build_network
from trophoscape.model.resistance import read_resistance

X0, Y0 = 500_000.0, 5_000_000.0  # UTM zone 32N, metres
OCTILE_WORST = math.sqrt(4 - 2 * math.sqrt(2)) - 1


def write_patches(folder, boxes, name="patches.gpkg"):
    """boxes: (id, xmin_km, ymin_km, xmax_km, ymax_km) relative to (X0, Y0)."""
    geoms = [shapely.box(X0 + a * 1000, Y0 + b * 1000, X0 + c * 1000, Y0 + d * 1000)
             for _, a, b, c, d in boxes]
    path = folder / name
    geopandas.GeoDataFrame({"patch_id": [b[0] for b in boxes]}, geometry=geoms,
                           crs=32632).to_file(path, driver="GPKG", engine="pyogrio")
    return path


def write_raster(folder, values, *, cell_m, left_km, top_km, name="resistance.tif",
                 crs="EPSG:32632", nodata=None):
    values = np.asarray(values, dtype=np.float32)
    path = folder / name
    with rasterio.open(path, "w", driver="GTiff", width=values.shape[1],
                       height=values.shape[0], count=1, dtype="float32", crs=crs,
                       nodata=nodata,
                       transform=Affine(cell_m, 0.0, X0 + left_km * 1000, 0.0, -cell_m,
                                        Y0 + top_km * 1000)) as f:
        f.write(values, 1)
    return path


def surface_for(folder, land, raster):
    return read_resistance(raster, crs=land.crs,
                           patch_bounds=shapely.total_bounds(land.geometries))


def grid_reference(surface, land, a, b):
    """Least-cost distance a -> b by scipy's Dijkstra on the grid graph the module notes
    state: 8 neighbours, a step costs (c_u + c_v) / 2 times its length, the start patch's
    cells cost 0, and the distance ends half an orthogonal step into the target's cell."""
    labels = surface.patch_cells(land)
    cost = surface.values.astype(float).copy()
    cost[labels == a + 1] = 0.0
    rows, cols = cost.shape
    h, w = surface.cell_km
    index = np.arange(rows * cols).reshape(rows, cols)
    edges = []
    for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
        r0, r1 = max(0, -dr), rows - max(0, dr)
        c0, c1 = max(0, -dc), cols - max(0, dc)
        u = index[r0:r1, c0:c1]
        v = index[r0 + dr:r1 + dr, c0 + dc:c1 + dc]
        length = math.hypot(dr * h, dc * w)
        weight = (cost.ravel()[u] + cost.ravel()[v]) / 2 * length
        edges.append((u.ravel(), v.ravel(), weight.ravel()))
    u = np.concatenate([e[0] for e in edges])
    v = np.concatenate([e[1] for e in edges])
    wgt = np.concatenate([e[2] for e in edges])
    # zero-weight edges vanish from a sparse matrix; a tiny floor keeps them (the error,
    # 1e-300 per step, is far below the comparison's tolerance)
    graph = sp.coo_array((np.maximum(wgt, 1e-300), (u, v)), shape=(rows * cols,) * 2).tocsr()
    start = np.flatnonzero(labels.ravel() == a + 1)
    dist = dijkstra(graph, directed=False, indices=start, min_only=True)
    target = labels.ravel() == b + 1
    return float(np.min(dist[target] - 0.5 * cost.ravel()[target] * min(h, w)))


# ----------------------------------------------------------------- uniform resistance


def test_uniform_resistance_gives_the_straight_boundary_distance(tmp_path):
    # pairs of 1 km squares at several angles and gaps; on a 20 m grid the least-cost
    # distance is the shapely boundary distance within the octile error, plus a cell for
    # burning each square into the grid
    rng = np.random.default_rng(4)
    boxes, pairs = [("O", 0.0, 0.0, 1.0, 1.0)], []
    for k, angle in enumerate(np.deg2rad([0, 10, 22.5, 30, 45, 60, 80])):
        gap = rng.uniform(0.6, 2.5)
        r = 0.5 + gap + 0.8  # centre distance, roughly, for a box beyond the gap
        cx, cy = 0.5 + r * math.cos(angle), 0.5 + r * math.sin(angle)
        boxes.append((f"P{k}", cx - 0.5, cy - 0.5, cx + 0.5, cy + 0.5))
        pairs.append(k + 1)
    patches = write_patches(tmp_path, boxes)
    land = read_patches(patches, id_field="patch_id")
    raster = write_raster(tmp_path, np.full((300, 300), 1.0), cell_m=20.0, left_km=-1.0,
                          top_km=5.0)
    surface = surface_for(tmp_path, land, raster)
    i, j, km = surface.pairs_within(land, 4.0)
    found = {(int(a), int(b)): d for a, b, d in zip(i, j, km)}
    cell_km = 0.02
    for k in pairs:
        straight = shapely.distance(land.geometries[0], land.geometries[k]) / 1000.0
        got = found[(0, k)]
        assert straight - 2 * cell_km <= got <= straight * (1 + OCTILE_WORST) + 2 * cell_km


def test_resistance_scales_distances_and_max_distance_uses_them(tmp_path):
    patches = write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 3, 0, 4, 1), ("C", 7, 0, 8, 1)])
    land = read_patches(patches, id_field="patch_id")
    raster = write_raster(tmp_path, np.full((150, 500), 3.0), cell_m=20.0, left_km=-0.5,
                          top_km=2.0)
    surface = surface_for(tmp_path, land, raster)
    net = build_network(land, kernel="exponential", max_distance_km=9.0, resistance=surface)
    frame = net.links_frame(land).set_index(["source", "target"])
    # A–B: 2 km straight (consistency: the gap of the construction) at 3 per km; A–C is
    # 6 km straight, 18 in cost units, beyond 9: no link
    assert frame.loc[("A", "B"), "distance_km"] == pytest.approx(2.0, rel=1e-9)
    assert frame.loc[("A", "B"), "effective_distance_km"] == pytest.approx(6.0, rel=1e-9)
    assert ("A", "C") not in frame.index
    # without a raster, the matrix resistance does the same to straight distances
    plain = build_network(land, kernel="exponential", max_distance_km=9.0,
                          matrix_resistance=3.0).links_frame(land).set_index(
                              ["source", "target"])
    assert plain.loc[("A", "B"), "effective_distance_km"] == pytest.approx(6.0, rel=1e-12)
    # B–C: 3 km at 3 per km is 9, the limit itself (inclusive)
    assert plain.loc[("B", "C"), "effective_distance_km"] == pytest.approx(9.0, rel=1e-12)
    assert ("A", "C") not in plain.index


# ------------------------------------------------------------------- a wall with a gap


def test_a_wall_with_one_gap_gives_the_detour(tmp_path):
    # two squares 3 km apart, a wall of resistance 1000 halfway with one 200 m gap 2 km up:
    # the path goes round through the gap
    patches = write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 4, 0, 5, 1)])
    land = read_patches(patches, id_field="patch_id")
    cell = 50.0
    values = np.ones((120, 140))  # x -1..6 km, y -2..4 km
    col = int((2.5 + 1.0) * 1000 / cell)       # the wall at x = 2.5 km
    values[:, col:col + 2] = 1000.0
    gap_row = int((4.0 - 2.5) * 1000 / cell)   # gap centred at y = 2.5 km
    values[gap_row - 2:gap_row + 2, col:col + 2] = 1.0
    raster = write_raster(tmp_path, values, cell_m=cell, left_km=-1.0, top_km=4.0)
    surface = surface_for(tmp_path, land, raster)
    i, j, km = surface.pairs_within(land, 10.0)
    got = float(km[(i == 0) & (j == 1)][0])
    # Euclidean detour (shapely): from A's upper-right corner to the gap and down to B's
    # upper-left corner
    gap = shapely.Point(2.5, 2.5)
    detour = (shapely.distance(shapely.Point(1, 1), gap)
              + shapely.distance(gap, shapely.Point(4, 1)))
    assert got == pytest.approx(detour, rel=0.05)
    assert got > 3.0 * 1.1  # well above the straight 3 km
    # the same number as scipy's Dijkstra on the same grid graph, both directions
    assert got == pytest.approx(grid_reference(surface, land, 0, 1), rel=1e-9)
    assert got == pytest.approx(grid_reference(surface, land, 1, 0), rel=1e-9)


def test_least_cost_links_do_not_depend_on_patch_order(tmp_path):
    # consistency test: the same squares in reverse feature order give the same links
    rng = np.random.default_rng(11)
    corners = rng.uniform(0, 6, size=(12, 2))
    boxes = [(f"Q{k}", x, y, x + 0.4, y + 0.4) for k, (x, y) in enumerate(corners)]
    values = rng.uniform(0.5, 4.0, size=(180, 180))
    runs = []
    for order, name in ((boxes, "a.gpkg"), (boxes[::-1], "b.gpkg")):
        land = read_patches(write_patches(tmp_path, order, name=name), id_field="patch_id")
        raster = write_raster(tmp_path, values, cell_m=40.0, left_km=-0.6, top_km=6.6,
                              name=f"{name}.tif")
        frame = build_network(land, max_distance_km=3.0,
                              resistance=surface_for(tmp_path, land, raster)).links_frame(land)
        key = [tuple(sorted(p)) for p in zip(frame["source"], frame["target"])]
        runs.append(dict(zip(key, frame["effective_distance_km"])))
    assert runs[0].keys() == runs[1].keys() and len(runs[0]) > 5
    for k, v in runs[0].items():
        assert runs[1][k] == pytest.approx(v, rel=1e-9)


def test_a_raster_in_another_crs_is_reprojected(tmp_path):
    # the same uniform surface stored in geographic coordinates (EPSG:4326, pyproj for
    # the corners) gives the same distance within the reprojection's cell
    patches = write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 3, 0, 4, 1)])
    land = read_patches(patches, id_field="patch_id")
    import pyproj

    to_geo = pyproj.Transformer.from_crs(32632, 4326, always_xy=True)
    lon0, lat1 = to_geo.transform(X0 - 1000, Y0 + 2000)
    lon1, lat0 = to_geo.transform(X0 + 5000, Y0 - 1000)
    res = 0.0002
    width, height = int((lon1 - lon0) / res) + 4, int((lat1 - lat0) / res) + 4
    path = tmp_path / "geo.tif"
    with rasterio.open(path, "w", driver="GTiff", width=width, height=height, count=1,
                       dtype="float32", crs="EPSG:4326",
                       transform=Affine(res, 0.0, lon0 - 2 * res, 0.0, -res,
                                        lat1 + 2 * res)) as f:
        f.write(np.full((height, width), 2.0, np.float32), 1)
    surface = surface_for(tmp_path, land, path)
    i, j, km = surface.pairs_within(land, 10.0)
    cell = max(surface.cell_km)
    assert float(km[0]) == pytest.approx(4.0, abs=2 * 2.0 * cell)


# ---------------------------------------------------------------------------- bad input


@pytest.fixture
def two(tmp_path):
    patches = write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 3, 0, 4, 1)])
    return tmp_path, read_patches(patches, id_field="patch_id")


def refused(land, raster) -> str:
    with pytest.raises(InputError) as info:
        read_resistance(raster, crs=land.crs, patch_bounds=shapely.total_bounds(land.geometries))
    text = str(info.value)
    assert "\n" not in text and str(raster) in text
    return text


def test_a_raster_that_does_not_cover_the_patches(two):
    folder, land = two
    raster = write_raster(folder, np.ones((50, 50)), cell_m=50.0, left_km=-1.0, top_km=2.0)
    assert "does not cover the patches" in refused(land, raster)


def test_values_of_zero_or_below(two):
    folder, land = two
    values = np.ones((80, 140))
    values[10, 20] = 0.0
    raster = write_raster(folder, values, cell_m=50.0, left_km=-1.0, top_km=2.0)
    assert "value 0 or below, the first 0 at" in refused(land, raster)


def test_nodata_within_the_patches_extent(two):
    folder, land = two
    values = np.ones((80, 140))
    values[25, 60] = -9999.0  # x 2.0 km, y 0.75 km: between the patches
    raster = write_raster(folder, values, cell_m=50.0, left_km=-1.0, top_km=2.0,
                          nodata=-9999.0)
    assert "has no value (nodata) in 1 cell(s) within the patches' extent" in refused(
        land, raster)


def test_not_a_raster_and_no_crs(two):
    folder, land = two
    text_file = folder / "notes.tif"
    text_file.write_text("not a raster\n", encoding="utf-8")
    assert "cannot be read as a raster" in refused(land, text_file)
    raster = write_raster(folder, np.ones((80, 140)), cell_m=50.0, left_km=-1.0, top_km=2.0,
                          crs=None, name="bare.tif")
    assert "no coordinate reference system" in refused(land, raster)


def test_a_raster_too_large_for_memory(two, monkeypatch):
    from trophoscape.model import resistance

    folder, land = two
    raster = write_raster(folder, np.ones((80, 140)), cell_m=50.0, left_km=-1.0, top_km=2.0)
    monkeypatch.setattr(resistance, "_memory_bytes", lambda: 100_000)
    assert "80 × 140 cells, which need about" in refused(land, raster)


# ----------------------------------------------------------------------- corridor files


def test_misspelt_corridor_attributes_are_named(tmp_path):
    from trophoscape.model.landscape import read_candidates

    line = shapely.LineString([(X0, Y0), (X0 + 1000, Y0)])
    path = tmp_path / "c.gpkg"
    geopandas.GeoDataFrame({"Cost": [1.0], "resistence": [0.1]}, geometry=[line],
                           crs=32632).to_file(path, driver="GPKG", engine="pyogrio")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with pytest.raises(InputError, match="no 'cost' attribute"):
            read_candidates(path, crs=pyproj_crs())
    said = [str(w.message) for w in caught if issubclass(w.category, TrophoscapeWarning)]
    assert any("'Cost' is not read; did you mean 'cost'" in s for s in said)
    assert any("'resistence' is not read; did you mean 'resistance'" in s for s in said)


def pyproj_crs():
    import pyproj

    return pyproj.CRS.from_epsg(32632)


def test_corridors_are_burnt_into_the_raster(tmp_path):
    # A and B 6 km apart on ground of resistance 10; a corridor A–B at 0.2 per km; C sits
    # 0.5 km beside the corridor's middle. C–B: without the corridor 10 x the straight gap;
    # with it, about 0.5 km at 10 to reach the corridor and 3 km along it at 0.2 (Euclidean
    # geometry of the construction), far less.
    patches = write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 7, 0, 8, 1),
                                       ("C", 3.5, 1.0, 4.5, 2.0)])
    land = read_patches(patches, id_field="patch_id")
    raster = write_raster(tmp_path, np.full((100, 200), 10.0), cell_m=50.0, left_km=-0.5,
                          top_km=4.0)
    line = shapely.LineString([(X0 + 1000, Y0 + 500), (X0 + 7000, Y0 + 500)])
    corridors = tmp_path / "corridors.gpkg"
    geopandas.GeoDataFrame({"corridor_id": ["K"]}, geometry=[line], crs=32632).to_file(
        corridors, driver="GPKG", engine="pyogrio")
    surface = surface_for(tmp_path, land, raster)

    def effective(**kw):
        frame = build_network(land, max_distance_km=60.0, resistance=surface,
                              **kw).links_frame(land)
        frame = frame[frame["origin"].str.contains("kernel")]
        return frame.set_index(["source", "target"])["effective_distance_km"]

    plain = effective()
    straight = shapely.distance(land.geometries[1], land.geometries[2]) / 1000.0
    assert plain.loc[("B", "C")] == pytest.approx(10 * straight, rel=OCTILE_WORST + 0.02)
    burnt = effective(corridors=corridors, corridor_resistance=0.2)
    expected = 0.5 * 10 + 2.5 * 0.2  # down to the corridor, then along it to B's edge
    assert burnt.loc[("B", "C")] == pytest.approx(expected, rel=0.15)
    assert burnt.loc[("B", "C")] < 0.3 * plain.loc[("B", "C")]
    # A–B's own kernel link is the way across the ground beside the corridor (6 km at 10),
    # not a second copy of the corridor (which is A–B's corridor arc, 6 km at 0.2)
    net = build_network(land, max_distance_km=70.0, resistance=surface, corridors=corridors,
                        corridor_resistance=0.2)
    ab = (net.source == 0) & (net.target == 1)
    kernel = net.effective_distance_km[ab & (net.origin == "kernel")]
    corridor = net.effective_distance_km[ab & (net.origin == "corridor")]
    assert kernel.size == 1 and kernel[0] == pytest.approx(60.0, rel=0.02)
    assert corridor.size == 1 and corridor[0] == pytest.approx(6 * 0.2, rel=1e-9)


# ------------------------------------------------------------- patches from a raster


def write_classes(folder, values, *, cell_m=100.0, name="landcover.tif", crs="EPSG:32632",
                  nodata=0):
    values = np.asarray(values, dtype=np.int16)
    path = folder / name
    with rasterio.open(path, "w", driver="GTiff", width=values.shape[1],
                       height=values.shape[0], count=1, dtype="int16", crs=crs, nodata=nodata,
                       transform=Affine(cell_m, 0.0, X0, 0.0, -cell_m, Y0)) as f:
        f.write(values, 1)
    return path


def classes_map():
    grid = np.full((40, 60), 1, dtype=np.int16)    # class 1: farmland
    grid[5:15, 5:20] = 3                            # woodland block, 150 cells
    grid[15:20, 20:25] = 3                          # touches the block at a corner only
    grid[25:35, 40:50] = 3                          # a second wood, 100 cells
    grid[30:32, 10:12] = 3                          # a copse of 4 cells
    grid[25:35, 20:30] = 5                          # wetland, another class
    grid[0, :] = 0                                  # a row without data
    return grid


def test_patches_from_land_cover_classes(tmp_path):
    from trophoscape.model.habitat import habitat_patches

    path = write_classes(tmp_path, classes_map())
    land = habitat_patches(path, habitat_values=[3])
    # 8-connectivity: the corner-touching cells join the block (one patch of 175 cells)
    frame = land.frame.set_index("patch_id")
    assert sorted(frame.index) == ["h25_40", "h30_10", "h5_5"]
    assert list(frame.loc[["h5_5", "h25_40", "h30_10"], "habitat_cells"]) == [175, 100, 4]
    # areas from the equal-area projection: cells x (0.1 km)², within the UTM scale factor
    # near the central meridian (0.9996; common practice) and the projection's own rounding
    np.testing.assert_allclose(frame.loc[["h5_5", "h25_40", "h30_10"], "area_km2"],
                               [1.75, 1.0, 0.04], rtol=2e-3)
    assert frame.loc["h5_5"].geometry.geom_type == "MultiPolygon"  # meets itself at a corner
    # min_area_km2 drops the copse; classes 3 and 5 together add the wetland as a patch
    assert list(habitat_patches(path, habitat_values=[3], min_area_km2=0.5).ids) == [
        "h5_5", "h25_40"]
    both = habitat_patches(path, habitat_values=[3, 5])
    assert list(both.ids) == ["h5_5", "h25_20", "h25_40", "h30_10"]


def test_patch_ids_stay_when_another_part_of_the_map_changes(tmp_path):
    from trophoscape.model.habitat import habitat_patches

    first = habitat_patches(write_classes(tmp_path, classes_map(), name="a.tif"),
                            habitat_values=[3])
    changed = classes_map()
    changed[2:4, 50:58] = 3                         # a new wood in the north-east
    second = habitat_patches(write_classes(tmp_path, changed, name="b.tif"),
                             habitat_values=[3])
    assert set(first.ids) < set(second.ids)
    a = first.frame.set_index("patch_id")["area_km2"]
    b = second.frame.set_index("patch_id")["area_km2"]
    np.testing.assert_allclose(b.loc[a.index], a, rtol=1e-9)


def test_patches_from_a_suitability_score_and_bad_rules(tmp_path):
    from trophoscape.model.habitat import habitat_patches

    score = np.zeros((30, 30), dtype=np.int16)
    score[5:10, 5:10] = 80
    score[20:25, 20:25] = 40
    path = write_classes(tmp_path, score, nodata=-1)
    land = habitat_patches(path, suitability_threshold=50)
    assert list(land.ids) == ["h5_5"]
    assert float(land.frame["mean_value"].iloc[0]) == 80.0
    for kw, words in (({}, "needs one rule"),
                      ({"habitat_values": [1], "suitability_threshold": 2}, "not both"),
                      ({"habitat_values": [7]}, "no cell is habitat"),
                      ({"suitability_threshold": 50, "min_area_km2": 5.0},
                       "no habitat patch has 5 km² or more")):
        with pytest.raises(InputError) as info:
            habitat_patches(path, **kw)
        assert words in str(info.value) and str(path) in str(info.value)


def test_a_scenario_with_a_habitat_raster_builds_its_network(tmp_path):
    from trophoscape.scenario import parse_scenario
    from trophoscape.workflows.study import build_study

    write_classes(tmp_path, classes_map())
    raw = {"patches": {"path": "landcover.tif", "habitat_values": [3],
                       "quality_field": "mean_value"},
           "dispersal": {"max_distance_km": 2.0}}
    study = build_study(parse_scenario(raw, base_dir=tmp_path))
    assert study.landscape.n_patches == 3 and study.network.n_links >= 1
    raw["patches"]["id_field"] = "patch_id"
    with pytest.raises(InputError, match="names its patches itself"):
        build_study(parse_scenario(raw, base_dir=tmp_path))


# ------------------------------------------------------------------ candidates found


def two_groups(folder, reverse=False):
    """Two groups of two squares, 3 km apart (beyond max_distance_km = 2), and a raster of
    open ground with a wall at x = 2.5 km open only at y = 4.5 km (north of every patch)."""
    boxes = [("A", 0, 0, 1, 1), ("B", 0, 1.5, 1, 2.5), ("C", 4, 0, 5, 1), ("D", 4, 1.5, 5, 2.5)]
    write_patches(folder, boxes[::-1] if reverse else boxes)
    cell = 50.0
    values = np.ones((160, 160))  # x -1..7 km, y -2..6 km
    col = int((2.5 + 1.0) * 1000 / cell)
    values[:, col:col + 2] = 100.0
    gap_row = int((6.0 - 4.5) * 1000 / cell)
    values[gap_row - 2:gap_row + 2, col:col + 2] = 1.0
    write_raster(folder, values, cell_m=cell, left_km=-1.0, top_km=6.0)
    scenario = folder / "s.toml"
    scenario.write_text(
        '[patches]\npath = "patches.gpkg"\nid_field = "patch_id"\n'
        '[dispersal]\nmax_distance_km = 2.0\nresistance = "resistance.tif"\n'
        '[planning]\ncost_per_km = 10.0\nsearch_km = 4.0\n'
        '[run]\nduration = 20\nburn_in = 5\n'
        '[analysis]\nstability = false\ncapacity = false\n', encoding="utf-8")
    return scenario


def test_candidates_found_join_the_groups_along_the_least_cost_path(tmp_path):
    from trophoscape.workflows.candidates import find_candidates
    from trophoscape.workflows.study import load_study

    study = load_study(two_groups(tmp_path))
    found = find_candidates(study, max_candidates=5)
    # two groups: one candidate, between the closest pair (3 km apart, straight)
    assert len(found) == 1
    row = found.iloc[0]
    assert {row["source"], row["target"]} in ({"A", "C"}, {"B", "D"})
    assert row["reason"] == "joins two groups" and np.isnan(row["linked_as_km"])
    assert row["straight_km"] == pytest.approx(3.0, rel=1e-9)
    line = row.geometry
    # it runs through the gap in the wall: up from B's top edge to y = 4.5 km and down
    # again (Euclidean length of the detour, shapely), not straight through the wall
    top = shapely.get_coordinates(line)[:, 1].max()
    assert top == pytest.approx(Y0 + 4500, abs=150)
    # from the west patch's upper corner (x 1 km, y 1 or 2.5 km) to the gap (2.5, 4.5) and
    # down to the east patch's (4, same y)
    corner_y = 1.0 if {row["source"], row["target"]} == {"A", "C"} else 2.5
    detour = 2 * math.hypot(1.5, 4.5 - corner_y)
    assert row["length_km"] == pytest.approx(detour, rel=0.1)
    assert row["cost"] == pytest.approx(10.0 * row["length_km"], rel=1e-12)
    # its ends lie on the two patches' outlines
    land = study.landscape
    a, b = (list(land.ids).index(row[k]) for k in ("source", "target"))
    ends = shapely.get_coordinates(line)[[0, -1]]
    assert shapely.distance(land.geometries[a], shapely.Point(ends[0])) < 1e-6
    assert shapely.distance(land.geometries[b], shapely.Point(ends[1])) < 1e-6


def test_corridors_auto_writes_candidates_to_edit_and_give_back(tmp_path):
    import pandas as pd

    from trophoscape.report.corridors import corridors_to_folder

    scenario = two_groups(tmp_path)
    out = tmp_path / "auto"
    corridors_to_folder(scenario, "auto", out, budget=100.0, links=None, patches=False,
                        workers=1, maps=False)
    found = geopandas.read_file(out / "candidates.gpkg")
    assert list(found.columns[:4]) == ["corridor_id", "cost", "source", "target"]
    first = pd.read_csv(out / "corridors.csv", dtype={"corridor_id": str})
    # consistency test: the same candidates given back as a file rank the same
    again = tmp_path / "again"
    corridors_to_folder(scenario, out / "candidates.gpkg", again, budget=100.0, links=None,
                        patches=False, workers=1, maps=False)
    second = pd.read_csv(again / "corridors.csv", dtype={"corridor_id": str})
    pd.testing.assert_frame_equal(first[["corridor_id", "rank", "score"]],
                                  second[["corridor_id", "rank", "score"]])
    assert not (again / "candidates.gpkg").exists()


def test_the_command_takes_auto_and_refuses_a_bad_count(tmp_path, capsys):
    from trophoscape.cli import main

    scenario = two_groups(tmp_path)
    code = main(["corridors", str(scenario), "--candidates", "auto", "--budget", "50",
                 "--out", str(tmp_path / "o"), "--max-candidates", "0", "--quiet"])
    assert code == 2
    err = capsys.readouterr().err
    assert "--max-candidates" in err and "at least 1" in err and "\n" == err[-1:]
    assert not (tmp_path / "o").exists()
    code = main(["corridors", str(scenario), "--candidates", "auto", "--budget", "50",
                 "--out", str(tmp_path / "o"), "--workers", "1", "--no-maps", "--quiet",
                 "--remove-links", "none", "--remove-patches", "none"])
    assert code == 0 and (tmp_path / "o" / "candidates.gpkg").is_file()


def test_least_cost_distances_converge_as_cells_shrink(tmp_path):
    # consistency test across a numerical setting: the wall-and-gap landscape drawn at 100,
    # 50 and 25 m cells gives the same detour within the grid's own error (a cell or two
    # at each end, and the octile bound on the legs)
    patches = write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 4, 0, 5, 1)])
    land = read_patches(patches, id_field="patch_id")
    got = {}
    for cell in (100.0, 50.0, 25.0):
        n_x, n_y = int(7000 / cell), int(6000 / cell)
        values = np.ones((n_y, n_x))
        col = int(3500 / cell)
        values[:, col:col + max(1, int(100 / cell))] = 1000.0
        gap = int(1500 / cell)
        values[gap - int(100 / cell):gap + int(100 / cell), col:col + max(1, int(100 / cell))] = 1
        raster = write_raster(tmp_path, values, cell_m=cell, left_km=-1.0, top_km=4.0,
                              name=f"r{int(cell)}.tif")
        i, j, km = surface_for(tmp_path, land, raster).pairs_within(land, 12.0)
        got[cell] = float(km[(i == 0) & (j == 1)][0])
    assert got[50.0] == pytest.approx(got[25.0], rel=0.03)
    assert got[100.0] == pytest.approx(got[25.0], rel=0.06)


def test_a_candidate_is_burnt_into_the_ground_while_it_is_evaluated(tmp_path):
    # A wall (1000 per km) with no gap parts the west patches A, B from the east ones C, D.
    # Candidate K joins A and C across it at 0.2 per km. Burnt into the ground, it links B
    # and D too: 0.8 km down from B's edge to K, 3 km along it at 0.2, 0.8 km up to D, about
    # 2.2 km (Euclidean geometry of the construction), within max_distance_km = 3.
    from trophoscape.workflows import planning
    from trophoscape.workflows.study import load_study

    write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 0, 1.3, 1, 2.3),
                             ("C", 4, 0, 5, 1), ("D", 4, 1.3, 5, 2.3)])
    values = np.ones((140, 160))  # x -1..7 km, y -2..5 km at 50 m
    values[:, 70:72] = 1000.0      # the wall at x = 2.5 km
    write_raster(tmp_path, values, cell_m=50.0, left_km=-1.0, top_km=5.0)
    line = shapely.LineString([(X0 + 1000, Y0 + 500), (X0 + 4000, Y0 + 500)])
    geopandas.GeoDataFrame({"corridor_id": ["K"], "cost": [1.0]}, geometry=[line],
                           crs=32632).to_file(tmp_path / "k.gpkg", driver="GPKG",
                                              engine="pyogrio")
    (tmp_path / "s.toml").write_text(
        '[patches]\npath = "patches.gpkg"\nid_field = "patch_id"\n'
        '[dispersal]\nmax_distance_km = 3.0\nresistance = "resistance.tif"\n',
        encoding="utf-8")
    study = load_study(tmp_path / "s.toml")
    candidates = planning.read_candidates(tmp_path / "k.gpkg", study)
    burnt = planning.relink_candidates(candidates, study)
    assert set(burnt.relink["affected_patch"].tolist()) == {0, 1, 2, 3}
    ids = list(study.ids)

    def kernel_links(net):
        frame = net.links_frame(study.landscape)
        frame = frame[frame["origin"].str.contains("kernel")]
        return dict(zip(zip(frame["source"], frame["target"]), frame["effective_distance_km"]))

    before = kernel_links(study.network)
    assert ("B", "D") not in before and ("A", "C") not in before
    with_k = planning._variant_network(study.network, burnt.arrays(),
                                       planning.Variant.of(add=[0]))
    after = kernel_links(with_k)
    assert after[("B", "D")] == pytest.approx(2.2, rel=0.1)
    assert after[("A", "B")] == pytest.approx(before[("A", "B")], rel=1e-6)  # untouched
    # the candidate's own link is there as before, as a corridor
    frame = with_k.links_frame(study.landscape).set_index(["source", "target"])
    assert "corridor" in frame.loc[("A", "C"), "origin"]
    assert ids == ["A", "B", "C", "D"]


def test_least_cost_links_do_not_depend_on_the_number_of_processes(tmp_path, monkeypatch):
    # consistency test: the searches shared out over two forked processes give what one
    # process gives
    from trophoscape.model import resistance

    rng = np.random.default_rng(5)
    corners = rng.uniform(0, 6, size=(15, 2))
    land = read_patches(write_patches(tmp_path, [(f"Q{k}", x, y, x + 0.4, y + 0.4)
                                                 for k, (x, y) in enumerate(corners)]),
                        id_field="patch_id")
    raster = write_raster(tmp_path, rng.uniform(0.5, 4.0, size=(180, 180)), cell_m=40.0,
                          left_km=-0.6, top_km=6.6)
    surface = surface_for(tmp_path, land, raster)
    monkeypatch.setattr(resistance, "PARALLEL_MIN_PATCHES", 1)
    one = surface.pairs_from(land, np.arange(land.n_patches), 3.0, workers=1)
    two = surface.pairs_from(land, np.arange(land.n_patches), 3.0, workers=2)
    assert one[0].size > 10
    for a, b in zip(one, two):
        np.testing.assert_array_equal(a, b)


def test_candidates_found_do_not_depend_on_the_feature_order(tmp_path):
    # consistency test: the same squares in reverse feature order give the same candidates
    from trophoscape.workflows.candidates import find_candidates
    from trophoscape.workflows.study import load_study

    found = []
    for reverse in (False, True):
        folder = tmp_path / str(reverse)
        folder.mkdir()
        found.append(find_candidates(load_study(two_groups(folder, reverse)), max_candidates=5))
    columns = ["corridor_id", "source", "target", "straight_km", "reason"]
    assert found[0][columns].equals(found[1][columns])
    np.testing.assert_allclose(found[0]["length_km"], found[1]["length_km"], rtol=1e-9)


def test_an_integer_raster_with_nodata_reads_and_a_damaged_one_is_refused(two):
    folder, land = two
    values = np.full((80, 140), 2, dtype=np.uint8)
    values[0, 0] = 255  # nodata, outside the patches' extent
    path = folder / "classes.tif"
    with rasterio.open(path, "w", driver="GTiff", width=140, height=80, count=1,
                       dtype="uint8", crs="EPSG:32632", nodata=255,
                       transform=Affine(50.0, 0.0, X0 - 1000, 0.0, -50.0, Y0 + 2000)) as f:
        f.write(values, 1)
    surface = read_resistance(path, crs=land.crs,
                              patch_bounds=shapely.total_bounds(land.geometries))
    assert np.isnan(surface.values[0, 0]) and surface.values[40, 70] == 2.0
    damaged = folder / "damaged.tif"
    damaged.write_bytes(path.read_bytes()[:600])
    text = refused(land, damaged)
    assert "cannot be read" in text or "cells cannot be read" in text


def test_two_small_patches_in_one_cell_are_refused(tmp_path):
    # two 20 m squares inside one 100 m cell: neither has a cell of its own
    patches = write_patches(tmp_path, [("a", 0.01, 0.01, 0.03, 0.03),
                                       ("b", 0.05, 0.05, 0.07, 0.07), ("c", 2, 0, 3, 1)])
    land = read_patches(patches, id_field="patch_id")
    raster = write_raster(tmp_path, np.ones((40, 60)), cell_m=100.0, left_km=-1.0, top_km=2.0)
    surface = surface_for(tmp_path, land, raster)
    with pytest.raises(InputError, match="share their only raster cell") as info:
        surface.pairs_within(land, 3.0)
    assert str(raster) in str(info.value)


def test_links_table_rows_act_as_their_least_cost_distance(tmp_path):
    # consistency test: a links-table row between two patches acts as the least-cost
    # distance the kernel search finds for that pair (both measured the same way), and a
    # row between patches no path joins within the raster is inf
    patches = write_patches(tmp_path, [("A", 0, 0, 1, 1), ("B", 4, 0, 5, 1), ("C", 0, 3, 1, 4)])
    land = read_patches(patches, id_field="patch_id")
    values = np.ones((120, 140))   # x -1..6 km, y -2..4 km at 50 m
    values[:, 70:72] = 1000.0       # a wall at x = 2.5 km with a gap 1.5 km up
    values[50:54, 70:72] = 1.0
    raster = write_raster(tmp_path, values, cell_m=50.0, left_km=-1.0, top_km=4.0)
    surface = surface_for(tmp_path, land, raster)
    i, j, km = surface.pairs_within(land, 12.0)
    kernel = dict(zip(zip(i.tolist(), j.tolist()), km.tolist()))
    rows = surface.between(land, [1, 0], [0, 2])  # B->A (the other way round), A->C
    assert rows[0] == pytest.approx(kernel[(0, 1)], rel=1e-12)
    assert rows[1] == pytest.approx(kernel[(0, 2)], rel=1e-12)


def test_overlapping_patches_share_cells_by_id_not_by_feature_order(tmp_path):
    # consistency test: where two patches overlap, the shared cells go to the same patch
    # whichever comes first in the file, so the links are the same
    # P1 lies inside P2, near its east edge
    boxes = [("P1", 1.4, 0.6, 1.9, 1.1), ("P2", 0, 0, 2.0, 2.0), ("P3", 3.5, 0, 4.5, 1)]
    runs = []
    for order, name in ((boxes, "a.gpkg"), (boxes[::-1], "b.gpkg")):
        land = read_patches(write_patches(tmp_path, order, name=name), id_field="patch_id")
        raster = write_raster(tmp_path, np.full((100, 120), 2.0), cell_m=50.0, left_km=-0.5,
                              top_km=3.0, name=f"{name}.tif")
        i, j, km = surface_for(tmp_path, land, raster).pairs_within(land, 8.0)
        ids = land.ids
        runs.append({tuple(sorted((ids[a], ids[b]))): d for a, b, d in zip(i, j, km)})
    assert runs[0].keys() == runs[1].keys()
    for k, v in runs[0].items():
        assert runs[1][k] == pytest.approx(v, rel=1e-9)
