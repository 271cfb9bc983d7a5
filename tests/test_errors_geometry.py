"""Geometry sanity, the user's columns and patch ids, through the command line and directly.

The command-line cases reuse the tiny landscape of ``test_errors_cli`` (four invented squares
of about 1 km² near 11.2° E 46.3° N, ids "A1".."A4") and run ``trophoscape run s.toml --out
out --no-maps`` in a folder of their own, exactly as that corpus does. A bad input gives exit
2, one ``error:`` line with the exact text below, no traceback and nothing left behind. A
column named like one trophoscape computes is not an error: the run goes on (exit 0) with one
``warning:`` line, and the file's values are kept under NAME_input in ``patches.gpkg``.

Where a number is checked against something outside trophoscape, the source is named: the
EPSG areas of use as pyproj gives them, geodesic areas from pyproj.Geod (Karney 2013,
"Algorithms for geodesics", J. Geodesy 87), the 53-bit significand of IEEE 754 binary64.
"""

from __future__ import annotations

import copy
import json
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import geopandas
import numpy as np
import pandas as pd
import pyproj
import pytest
import shapely
from test_errors_cli import (LAT0, LON0, SIDE_LON, STEP_LON, Case, collection,
                             features, run_corpus, scenario, square)

from trophoscape.errors import InputError, TrophoscapeWarning
from trophoscape.model.landscape import (AREA_OF_USE_MARGIN_DEG, MIN_PATCH_AREA_KM2,
                                         computed_columns, landscape_from_frame, read_patches)

GEOD = pyproj.Geod(ellps="WGS84")

# ------------------------------------------------------------------ building the inputs


def changed(change) -> list[dict]:
    """The four valid features with ``change(features)`` applied."""
    feats = copy.deepcopy(features())
    change(feats)
    return feats


def prop(i, key, value):
    def change(feats):
        feats[i]["properties"][key] = value
    return change


def props(key, values):
    def change(feats):
        for f, v in zip(feats, values):
            f["properties"][key] = v
    return change


def geometry(i, geom):
    def change(feats):
        feats[i]["geometry"] = geom
    return change


def with_crs(feats, epsg: int) -> str:
    """A GeoJSON with the 2008 "crs" member (GDAL honours it; RFC 7946 dropped it)."""
    return json.dumps({"type": "FeatureCollection",
                       "crs": {"type": "name",
                               "properties": {"name": f"urn:ogc:def:crs:EPSG::{epsg}"}},
                       "features": feats})


def ring(x0, y0, x1, y1) -> dict:
    return {"type": "Polygon",
            "coordinates": [[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]]}


def squares_at(x0, y0, side, step) -> list[dict]:
    """The four features with their squares moved to (x0 + k step, y0), side ``side``."""
    feats = features()
    for k, f in enumerate(feats):
        f["geometry"] = ring(x0 + k * step, y0, x0 + k * step + side, y0 + side)
    return feats


def gpkg(frame: geopandas.GeoDataFrame) -> bytes:
    """``frame`` as the bytes of a GeoPackage (a CRS-less frame gives a CRS-less file)."""
    with tempfile.TemporaryDirectory() as folder, warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pyogrio: "'crs' was not provided"
        path = Path(folder) / "p.gpkg"
        frame.to_file(path, driver="GPKG", engine="pyogrio")
        return path.read_bytes()


def tiny_frame(shift_x=0.0, shift_y=0.0, crs=None, scale=1.0) -> geopandas.GeoDataFrame:
    """The four squares in lon/lat, moved and scaled, as a GeoDataFrame with ``crs``."""
    geoms = [shapely.geometry.shape(square(k)) for k in range(4)]
    geoms = shapely.transform(geoms, lambda xy: xy * scale + [shift_x, shift_y])
    return geopandas.GeoDataFrame({"pid": [f"A{k + 1}" for k in range(4)],
                                   "quality": [1.0, 0.9, 0.8, 0.7]},
                                  geometry=geoms, crs=crs)


GPKG = {"s.toml": scenario(patches={"path": "p.gpkg"})}
QUALITY_RULE = "give a number of at least 0 (named by patches.quality_field)"
TEXT_IDS = "store the patch ids as text (in quotes in a GeoJSON file)"
UTM32 = "EPSG:32632 (WGS 84 / UTM zone 32N)"
SAME_CRS = "store the file with the CRS of its coordinates"
SPLIT = ("check that its coordinates are in the units of the file's CRS {crs} and that the "
         "outline is drawn as meant (a polygon around a pole or across the antimeridian must "
         "be split), or remove the feature")
# a 1 km long sliver 0.5 mm wide: 5e-7 km², half the minimum
SLIVER = ring(LON0 + STEP_LON, LAT0, LON0 + STEP_LON + SIDE_LON, LAT0 + 4.5e-9)
# the polar cap north of 89° drawn as a lon/lat box: degenerate once projected
POLAR_BOX = ring(-180.0, 89.0, 180.0, 90.0)
ALL_COMPUTED = sorted(computed_columns() - {"patch_id", "area_km2"})


@dataclass
class GeometryCase(Case):
    """A :class:`Case`; with ``code`` 0 ``expected`` is the one ``warning:`` line, and
    ``kept`` maps a column of out/patches.gpkg to the values it must hold."""

    kept: dict | None = None


CASES = [
    # ------------------------------------------------------------ coordinates and the CRS
    GeometryCase(
        "utm-holding-degrees",  # the case of the issue: 1e-10 km² patches before
        f"error: p.geojson: feature 'A1': field 'geometry': coordinates x 11.2 to 11.213, y "
        f"46.3 to 46.309 look like longitude/latitude degrees, but the file's CRS {UTM32} is "
        "projected (unit: metre); store the file with the CRS of its coordinates (EPSG:4326 "
        "for longitude/latitude)",
        {"p.geojson": with_crs(features(), 32632)}),
    GeometryCase(
        "feet-crs-holding-degrees",  # degrees of Long Island in a CRS in US survey feet
        "error: p.gpkg: feature 'A1': field 'geometry': coordinates x -73.4 to -73.387, y "
        "40.8 to 40.809 look like longitude/latitude degrees, but the file's CRS EPSG:2263 "
        "(NAD83 / New York Long Island (ftUS)) is projected (unit: US survey foot); store the "
        "file with the CRS of its coordinates (EPSG:4326 for longitude/latitude)",
        {**GPKG, "p.gpkg": gpkg(tiny_frame(-84.6, -5.5, crs="EPSG:2263"))}),
    GeometryCase(
        "feet-crs-tiny-numbers",  # numbers near its false origin: not degrees there, but specks
        "error: p.gpkg: feature 'A1': field 'geometry': patch area is 1.09e-11 km², below the "
        "minimum of 1e-06 km² (1 m²); "
        + SPLIT.format(crs="EPSG:2263 (NAD83 / New York Long Island (ftUS))"),
        {**GPKG, "p.gpkg": gpkg(tiny_frame(crs="EPSG:2263"))}),
    GeometryCase(
        "km-read-as-metres",  # UTM kilometres: 0.5 km squares become 0.25 m²
        "error: p.geojson: feature 'A1': field 'geometry': patch area is 2.49e-07 km², below "
        f"the minimum of 1e-06 km² (1 m²); {SPLIT.format(crs=UTM32)}",
        {"p.geojson": with_crs(squares_at(650.0, 5130.0, 0.5, 1.0), 32632)}),
    GeometryCase(
        "national-grid-holding-utm",  # UTM 32N numbers declared as British National Grid
        "error: p.gpkg: feature 'A1': field 'geometry': coordinates x 650000 to 651000, y "
        "5.13e+06 to 5.131e+06 lie at 157.2°E 83.67°N, more than 15° outside the area the "
        "file's CRS EPSG:27700 (OSGB36 / British National Grid) is made for (9.01°W 49.75°N "
        f"to 2.01°E 61.01°N); {SAME_CRS}",
        {**GPKG, "p.gpkg": gpkg(geopandas.GeoDataFrame(
            {"pid": ["A1", "A2"], "quality": [1.0, 1.0]},
            geometry=[shapely.box(650000, 5130000, 651000, 5131000),
                      shapely.box(652000, 5130000, 653000, 5131000)], crs="EPSG:27700"))}),
    GeometryCase(
        "no-place-on-earth",  # an easting of 100,000 km
        "error: p.geojson: feature 'A2': field 'geometry': coordinates x 1e+08 to "
        "1.00001e+08, y 5.13e+06 to 5.131e+06 are no place on the Earth in the file's CRS "
        f"{UTM32}; {SAME_CRS}",
        {"p.geojson": with_crs(squares_at(650000.0, 5130000.0, 1000.0, 2000.0)[:1] + [
            {**features()[1], "geometry": ring(1e8, 5130000.0, 1e8 + 1000.0, 5131000.0)}],
            32632)}),
    GeometryCase(
        "etrs89-in-australia",  # a geographic CRS for Europe holding points near Sydney
        "error: p.gpkg: feature 'A1': field 'geometry': coordinates x 151.2 to 151.213, y "
        "-33.9 to -33.891 lie at 151.2°E 33.9°S, more than 15° outside the area the file's "
        "CRS EPSG:4258 (ETRS89) is made for (16.1°W 33.26°N to 38.01°E 84.73°N); "
        + SAME_CRS,
        {**GPKG, "p.gpkg": gpkg(tiny_frame(140.0, -80.2, crs="EPSG:4258"))}),
    GeometryCase(
        "no-crs-metres",  # a file without CRS is read as lon/lat: metres do not fit
        "error: p.gpkg: feature 'A1': field 'geometry': coordinates span x 650000 to 651000, y "
        "5.13e+06 to 5.131e+06, outside longitude -180..180 / latitude -90..90; the file has "
        "no CRS, so WGS 84 lon/lat was assumed; store the file with its CRS",
        {**GPKG, "p.gpkg": gpkg(geopandas.GeoDataFrame(
            {"pid": ["A1"], "quality": [1.0]},
            geometry=[shapely.box(650000, 5130000, 651000, 5131000)]))}),
    # ------------------------------------------------------------ patches too small
    GeometryCase(
        "polar-box",  # a cap north of 89° drawn as a lon/lat box
        "error: p.geojson: feature 'A2': field 'geometry': patch area is 1.53e-12 km², below "
        "the minimum of 1e-06 km² (1 m²); " + SPLIT.format(crs="EPSG:4326 (WGS 84)"),
        {"p.geojson": collection(changed(geometry(1, POLAR_BOX)))}),
    GeometryCase(
        "sliver",  # 1 km long, 0.5 mm wide
        "error: p.geojson: feature 'A2': field 'geometry': patch area is 5.01e-07 km², below the "
        "minimum of 1e-06 km² (1 m²); " + SPLIT.format(crs="EPSG:4326 (WGS 84)"),
        {"p.geojson": collection(changed(geometry(1, SLIVER)))}),
    GeometryCase(
        "collapsed-to-a-point",  # every corner the same point: no area at all
        "error: p.geojson: feature 'A3': field 'geometry': polygon has zero area; redraw the "
        "patch with a positive area or remove the feature",
        {"p.geojson": collection(changed(geometry(2, {"type": "Polygon", "coordinates": [
            [[11.25, 46.3], [11.25, 46.3], [11.25, 46.3], [11.25, 46.3]]]})))}),
    # ------------------------------------------------------------ ids
    GeometryCase(
        "id-1e20",  # was: "not unique", naming -9223372036854775808
        "error: p.geojson: feature 0: field 'pid': id 1e+20 is a number beyond 2^53 = "
        "9007199254740992, too large to be read exactly (such numbers lose digits, so "
        f"different ids can become equal); {TEXT_IDS}",
        {"p.geojson": collection(changed(props("pid", [1e20, 1e20 + 2e4, 2e20, 3e20])))}),
    GeometryCase(
        "id-1e21-later",  # the first id too large is feature 2
        "error: p.geojson: feature 2: field 'pid': id 1e+21 is a number beyond 2^53 = "
        "9007199254740992, too large to be read exactly (such numbers lose digits, so "
        f"different ids can become equal); {TEXT_IDS}",
        {"p.geojson": collection(changed(props("pid", [1, 2, 1e21, 4])))}),
    GeometryCase(
        "ids-text-and-number-collide",  # "2" and 2 are the same id once read as text
        "error: p.geojson: feature '2': field 'pid': id is not unique: features 1 and 2 both "
        "have it; give each patch its own id",
        {"p.geojson": collection(changed(props("pid", ["A1", "2", 2, "A4"])))}),
    # ------------------------------------------------------------ per-patch values as lists
    GeometryCase(
        "growth-rate-list",  # was blamed on A1, the first feature
        "error: p.geojson: feature 'A3': field 'r': value [1.0, 2.0] is a list of 2 values; "
        "give a number of at least 0 (named by prey.growth_rate)",
        {"s.toml": scenario(prey={"growth_rate": {"field": "r"}}),
         "p.geojson": collection(changed(props("r", [1.0, 1.0, [1.0, 2.0], 1.0])))}),
    GeometryCase(
        "quality-list-no-ids",  # without an id field: its position
        "error: p.geojson: feature 3: field 'quality': value [0.5, 0.7, 0.9] is a list of 3 "
        f"values; {QUALITY_RULE}",
        {"s.toml": scenario(patches={"id_field": None}),
         "p.geojson": collection(changed(prop(3, "quality", [0.5, 0.7, 0.9])))}),
    GeometryCase(
        "quality-empty-list",
        f"error: p.geojson: feature 'A2': field 'quality': value [] is an empty list; "
        f"{QUALITY_RULE}",
        {"p.geojson": collection(changed(prop(1, "quality", [])))}),
    # ------------------------------------------------------------ columns trophoscape computes
    GeometryCase(
        "area-as-quality",  # the case of the issue: the file's areas were replaced
        "warning: p.geojson: field 'area_km2': the file's column has the name of a column "
        "trophoscape computes; the file's values are kept as 'area_km2_input' in the patch "
        "table and outputs, and scenario keys naming 'area_km2' still read them; rename the "
        "column in the file to silence this",
        {"s.toml": scenario(patches={"quality_field": "area_km2"}),
         "p.geojson": collection(changed(props("area_km2", [1.0, 2.0, 5.0, 4.0])))},
        code=0, kept={"area_km2_input": [1.0, 2.0, 5.0, 4.0]}),
    GeometryCase(
        "patch-id-column-unused",  # ids by position, and a patch_id column beside them
        "warning: p.geojson: field 'patch_id': the file's column has the name of a column "
        "trophoscape computes; the file's values are kept as 'patch_id_input' in the patch "
        "table and outputs, and scenario keys naming 'patch_id' still read them; rename the "
        "column in the file to silence this; set [patches] id_field = \"patch_id\" to take "
        "the ids from it",
        {"s.toml": scenario(patches={"id_field": None}),
         "p.geojson": collection(changed(props("patch_id", ["N", "E", "S", "W"])))},
        code=0, kept={"patch_id": ["0", "1", "2", "3"], "patch_id_input": ["N", "E", "S", "W"]}),
    GeometryCase(
        "every-computed-name",  # an earlier run's columns, a "geometry" attribute, ...
        "warning: p.geojson: fields "
        + ", ".join(repr(c) for c in ALL_COMPUTED[:3])
        + f" and {len(ALL_COMPUTED) - 3} more: the file's columns have names of columns "
        f"trophoscape computes; the file's values are kept as '{ALL_COMPUTED[0]}_input' (and "
        "so on) in the patch table and outputs, and scenario keys naming "
        f"'{ALL_COMPUTED[0]}' still read them; rename the column in the file to silence this",
        {"p.geojson": collection(changed(lambda feats: [
            f["properties"].update({c: 100.0 + k for c in ALL_COMPUTED})
            for k, f in enumerate(feats)]))},
        code=0, kept={f"{c}_input": [100.0, 101.0, 102.0, 103.0] for c in ALL_COMPUTED}),
]


# ------------------------------------------------------------------ running the cases


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory) -> dict:
    """Every case run once through the CLI, as test_errors_cli runs its corpus."""
    return run_corpus(CASES, tmp_path_factory.mktemp("bad-geometry"))


def test_cases_are_many_and_named_once():
    ids = [c.id for c in CASES]
    assert len(set(ids)) == len(ids)
    assert 15 <= len(CASES) <= 25
    assert sum(c.code == 2 for c in CASES) >= 15


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_exit_code_no_traceback_nothing_left(case, outcomes):
    got = outcomes[case.id]
    assert got.returncode == case.code, got.stderr
    assert "Traceback" not in got.stderr
    assert not list(got.folder.glob(".*partial*"))
    if case.code == 2:
        assert not (got.folder / "out").exists()
        assert sum(line.startswith("error: ") for line in got.stderr.splitlines()) == 1
    else:
        assert (got.folder / "out" / "patches.gpkg").is_file()
        assert not any(line.startswith("error: ") for line in got.stderr.splitlines())


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_one_exact_line(case, outcomes):
    got = outcomes[case.id]
    assert got.stderr.endswith("\n")
    assert got.stderr.splitlines() == [case.expected], got.stderr


@pytest.mark.parametrize("case", [c for c in CASES if c.kept],
                         ids=[c.id for c in CASES if c.kept])
def test_the_files_values_reach_the_outputs(case, outcomes):
    out = outcomes[case.id].folder / "out"
    written = geopandas.read_file(out / "patches.gpkg", layer="patches", engine="pyogrio")
    for column, values in case.kept.items():
        assert written[column].tolist() == values, column
    # trophoscape's own columns hold what it computed, not the file's numbers
    table = pd.read_csv(out / "patches.csv", dtype={"patch_id": str})
    assert written["area_km2"].tolist() == pytest.approx(table["area_km2"].tolist())
    assert written["area_km2"].tolist() == pytest.approx([1.0019] * 4, rel=1e-3)


def test_area_of_the_file_used_as_quality_gives_the_capacities(outcomes):
    # capacity density 50 (the default) × the file's area_km2 column, not the computed areas
    import trophoscape as ts

    folder = outcomes["area-as-quality"].folder
    with pytest.warns(TrophoscapeWarning, match="area_km2_input"):
        study = ts.load_study(folder / "s.toml")
    np.testing.assert_allclose(study.model.params["capacity"], [50.0, 100.0, 250.0, 200.0])


# ------------------------------------------------------------------ the CRS, directly


def square_lonlat(lon, lat, side_deg=0.01):
    return shapely.box(lon, lat, lon + side_deg, lat + side_deg)


@pytest.mark.parametrize("epsg", [32632, 25833, 3035, 3857, 2263, 27700, 2154])
def test_degrees_in_a_projected_crs_are_refused(epsg):
    # reference: the EPSG area of use of each CRS as pyproj gives it; a square of degrees at
    # its middle, stored as if it were the CRS's own units
    area = pyproj.CRS.from_epsg(epsg).area_of_use
    lon, lat = (area.west + area.east) / 2, (area.south + area.north) / 2
    frame = geopandas.GeoDataFrame(geometry=[square_lonlat(lon, lat)], crs=f"EPSG:{epsg}")
    with pytest.raises(InputError, match=f"look like longitude/latitude degrees, but the "
                                         f"file's CRS EPSG:{epsg} "):
        landscape_from_frame(frame)


def test_degrees_outside_the_area_of_use_are_not_taken_for_degrees():
    # 5 m squares at x 150, y 60 of UTM 32N: read as degrees (150° E) they are far from the
    # zone (6° E to 12° E, EPSG via pyproj), so the degree rule does not fire; they lie at
    # the zone's false origin, 1.5° west of it, within the margin: only their size is wrong
    assert pyproj.CRS.from_epsg(32632).area_of_use.bounds == (6.0, 0.0, 12.0, 84.0)
    frame = geopandas.GeoDataFrame(geometry=[shapely.box(150, 60, 155, 65)], crs="EPSG:32632")
    land = landscape_from_frame(frame)
    # 25 m², against pyproj.Geod's geodesic area of the same corners in lon/lat
    lonlat = geopandas.GeoSeries(land.frame.geometry).to_crs(4326).iloc[0]
    geodesic = abs(GEOD.geometry_area_perimeter(lonlat)[0]) / 1e6
    assert land.area_km2[0] == pytest.approx(geodesic, rel=1e-6)
    # and 25 m² of the plane divided by the projection's areal scale there (pyproj factors)
    lon, lat = lonlat.centroid.x, lonlat.centroid.y
    scale = pyproj.Proj("EPSG:32632").get_factors(lon, lat).areal_scale
    assert land.area_km2[0] == pytest.approx(25e-6 / scale, rel=1e-6)


def test_margin_keeps_a_country_in_a_neighbouring_utm_zone():
    # Norway in ETRS89 / UTM 33N (EPSG:25833, made for 12° E to 18° E): its east end near
    # 30° E 70° N is 12° outside the area of use, inside the margin; 40° E is refused
    crs = pyproj.CRS.from_epsg(25833)
    assert crs.area_of_use.east == pytest.approx(18.01)
    to_utm = pyproj.Transformer.from_crs(4326, crs, always_xy=True)
    kept, refused = (shapely.transform(square_lonlat(lon, 70.0, 0.05), to_utm.transform,
                                       interleaved=False) for lon in (30.0, 40.0))
    land = landscape_from_frame(geopandas.GeoDataFrame(geometry=[kept], crs=crs))
    geodesic = abs(GEOD.geometry_area_perimeter(square_lonlat(30.0, 70.0, 0.05))[0]) / 1e6
    assert land.area_km2[0] == pytest.approx(geodesic, rel=1e-3)
    assert 40.0 - 18.01 > AREA_OF_USE_MARGIN_DEG > 30.0 - 18.01
    with pytest.raises(InputError, match=r"more than 15° outside the area the file's CRS "
                                         r"EPSG:25833 \(ETRS89 / UTM zone 33N\) is made for"):
        landscape_from_frame(geopandas.GeoDataFrame(geometry=[refused], crs=crs))


def test_crs_read_without_area_of_use_still_checked():
    # an ESRI-style WKT (as in a .prj file) carries no area of use; pyproj matches it to
    # EPSG:32632, whose area of use then applies
    esri = pyproj.CRS.from_wkt(pyproj.CRS.from_epsg(32632).to_wkt("WKT1_ESRI"))
    assert esri.area_of_use is None
    assert esri.to_epsg(min_confidence=70) == 32632
    frame = geopandas.GeoDataFrame(geometry=[square_lonlat(11.2, 46.3)], crs=esri)
    with pytest.raises(InputError, match="look like longitude/latitude degrees"):
        landscape_from_frame(frame)


def test_feet_crs_with_true_feet_gives_geodesic_areas():
    # a 1000 × 1000 US survey feet square in EPSG:2263 (1 ftUS = 1200/3937 m, NIST), its
    # area against pyproj.Geod's geodesic area of its corners (densified edges)
    crs = pyproj.CRS.from_epsg(2263)
    x, y = pyproj.Transformer.from_crs(4326, crs, always_xy=True).transform(-73.0, 40.8)
    box = shapely.segmentize(shapely.box(x, y, x + 1000.0, y + 1000.0), 50.0)
    land = landscape_from_frame(geopandas.GeoDataFrame(geometry=[box], crs=crs))
    lonlat = geopandas.GeoSeries([box], crs=crs).to_crs(4326).iloc[0]
    geodesic = abs(GEOD.geometry_area_perimeter(lonlat)[0]) / 1e6
    assert land.area_km2[0] == pytest.approx(geodesic, rel=1e-6)
    # and near the plane's own figure: the Lambert conic scale there is within 1e-4 of 1
    assert land.area_km2[0] == pytest.approx((1000 * 1200 / 3937) ** 2 / 1e6, rel=3e-4)


# ------------------------------------------------------------------ the minimum area


def test_minimum_area_is_one_square_metre():
    # consistency test: the documented value (module docstring, README)
    assert MIN_PATCH_AREA_KM2 == 1e-6


@pytest.mark.parametrize("side_m, refused", [(0.9, True), (1.1, False)])
def test_minimum_area_boundary(side_m, refused):
    # squares of 0.81 m² and 1.21 m² in UTM 32N; their geodesic areas (pyproj.Geod) are on
    # either side of 1 m² as well
    x, y = 650_000.0, 5_130_000.0
    box = shapely.box(x, y, x + side_m, y + side_m)
    lonlat = geopandas.GeoSeries([box], crs=32632).to_crs(4326).iloc[0]
    geodesic_m2 = abs(GEOD.geometry_area_perimeter(lonlat)[0])
    assert (geodesic_m2 < 1.0) == refused
    frame = geopandas.GeoDataFrame(geometry=[box], crs="EPSG:32632")
    if refused:
        with pytest.raises(InputError, match=r"below the minimum of 1e-06 km² \(1 m²\)"):
            landscape_from_frame(frame)
    else:
        assert landscape_from_frame(frame).area_km2[0] * 1e6 == pytest.approx(geodesic_m2,
                                                                              rel=1e-6)


def test_polar_cap_drawn_with_its_edge_is_kept():
    # the cap north of 80° drawn with points along 80° N is a real patch; its straight-edged
    # square in the polar projection is smaller than the geodesic cap (pyproj.Geod), but not
    # by more than the inscribed square's share 2/π
    cap = shapely.segmentize(shapely.Polygon(
        [(-180, 80), (-90, 80), (0, 80), (90, 80), (180, 80), (180, 90), (-180, 90)]), 1.0)
    land = landscape_from_frame(geopandas.GeoDataFrame(geometry=[cap], crs=4326))
    assert land.area_km2[0] > 1e6
    ring80 = shapely.Polygon([(lon, 80.0) for lon in np.linspace(-180, 180, 721)[:-1]])
    geodesic = abs(GEOD.geometry_area_perimeter(ring80)[0]) / 1e6
    assert 2 / np.pi * geodesic * 0.99 < land.area_km2[0] <= geodesic * 1.001


# ------------------------------------------------------------------ columns trophoscape computes


@pytest.mark.parametrize("name", sorted(computed_columns() - {"geometry"}))
def test_every_computed_name_keeps_the_files_values(name):
    frame = tiny_frame(crs=4326)
    frame[name] = [7.5, 8.5, 9.5, 10.5]
    with pytest.warns(TrophoscapeWarning, match=f"field '{name}': .* kept as '{name}_input'"):
        land = landscape_from_frame(frame, id_field="pid")
    assert land.frame[f"{name}_input"].tolist() == [7.5, 8.5, 9.5, 10.5]
    np.testing.assert_array_equal(land.values(name), [7.5, 8.5, 9.5, 10.5])
    assert land.ids.tolist() == ["A1", "A2", "A3", "A4"]


def test_input_name_taken_too():
    frame = tiny_frame(crs=4326)
    frame["area_km2"] = 3.0
    frame["area_km2_input"] = 4.0
    with pytest.warns(TrophoscapeWarning, match="kept as 'area_km2_input2'"):
        land = landscape_from_frame(frame, fields={"area_km2": "patches.quality_field"})
    assert land.frame["area_km2_input"].tolist() == [4.0] * 4
    assert land.values("area_km2").tolist() == [3.0] * 4
    assert land.values("area_km2_input").tolist() == [4.0] * 4


def test_a_file_trophoscape_wrote_reads_back_silently(tmp_path):
    # consistency test: patch_id and area_km2 as trophoscape wrote them are its own values;
    # replacing them loses nothing, so no warning (warnings are errors in this suite)
    from trophoscape.testing import grid_landscape

    land = grid_landscape(2, 3, spacing_km=2.0, size_km=1.0)
    land.frame.to_file(tmp_path / "g.gpkg", driver="GPKG", engine="pyogrio")
    for id_field in (None, "patch_id"):
        again = read_patches(tmp_path / "g.gpkg", id_field=id_field)
        assert not [c for c in again.frame.columns if c.endswith("_input")]
        np.testing.assert_array_equal(again.area_km2, land.area_km2)
        assert again.values("area_km2").tolist() == again.area_km2.tolist()


def test_computed_area_without_such_column_is_no_attribute():
    frame = tiny_frame(crs=4326)
    land = landscape_from_frame(frame, id_field="pid")
    with pytest.raises(InputError, match="field 'area_km2': no such attribute; the file "
                                         "has: 'pid', 'quality'"):
        land.values("area_km2")


def test_geometry_attribute_of_the_file_is_kept(tmp_path):
    # pyogrio would drop a property named "geometry"; it is kept as geometry_input
    feats = features()
    for k, f in enumerate(feats):
        f["properties"]["geometry"] = 5.0 + k
    (tmp_path / "p.geojson").write_text(collection(feats), encoding="utf-8")
    with pytest.warns(TrophoscapeWarning, match="field 'geometry': .* 'geometry_input'"):
        land = read_patches(tmp_path / "p.geojson", id_field="pid")
    assert land.frame["geometry_input"].tolist() == [5.0, 6.0, 7.0, 8.0]
    assert land.frame.geometry.name == "geometry"
    assert land.values("geometry").tolist() == [5.0, 6.0, 7.0, 8.0]


def test_computed_columns_cover_a_runs_patch_table(tmp_path):
    # consistency test: every column of a run's patch table (single run and replicates,
    # capacity on) is one computed_columns() knows, so none can replace a user's column
    import trophoscape as ts
    from trophoscape.io.tables import patches_frame
    from trophoscape.scenario import parse_scenario

    frame = tiny_frame(crs=4326)
    frame["links"] = [9.0, 9.0, 9.0, 9.0]
    frame["prey_mean"] = [1.0, 2.0, 3.0, 4.0]
    frame.to_file(tmp_path / "p.gpkg", driver="GPKG", engine="pyogrio")
    for replicates in (1, 2):
        raw = {"patches": {"path": "p.gpkg", "id_field": "pid", "quality_field": "quality"},
               "dispersal": {"max_distance_km": 2.0},
               "run": {"duration": 2.0, "burn_in": 0.5, "census_interval": 0.5,
                       "replicates": replicates},
               "noise": {"environmental_sd": 0.1} if replicates > 1 else {},
               "analysis": {"capacity": True}}
        with pytest.warns(TrophoscapeWarning, match="'links', 'prey_mean': "):
            study = ts.build_study(parse_scenario(raw, base_dir=tmp_path))
        result = ts.run_study(study)
        assert set(result.patches.columns) <= computed_columns()
        written = patches_frame(result)
        assert written["links_input"].tolist() == [9.0] * 4
        assert written["prey_mean_input"].tolist() == [1.0, 2.0, 3.0, 4.0]
        assert written["links"].tolist() == result.patches["links"].tolist()


# ------------------------------------------------------------------ ids and lists, directly


def test_whole_number_ids_up_to_2_53_are_exact():
    # IEEE 754 binary64 has a 53-bit significand: every whole number up to 2^53 is exact
    frame = tiny_frame(crs=4326)
    frame["pid"] = [2.0 ** 53, -(2.0 ** 53), 7.0, 2.5]
    land = landscape_from_frame(frame, id_field="pid")
    assert land.ids.tolist() == ["9007199254740992", "-9007199254740992", "7", "2.5"]
    frame["pid"] = [2.0 ** 53 + 2, 1.0, 2.0, 3.0]
    with pytest.raises(InputError, match=r"feature 0: field 'pid': id 9007199254740994\.0 "
                                         r"is a number beyond 2\^53"):
        landscape_from_frame(frame, id_field="pid")


def test_int64_ids_beyond_2_53_are_kept(tmp_path):
    # a GeoPackage INTEGER column is 64-bit (GeoPackage 1.3, OGC 12-128r18): kept exactly
    frame = tiny_frame(crs=4326)
    frame["pid"] = np.array([2 ** 53 + 1, 2 ** 62, -(2 ** 63), 10 ** 18 + 1], dtype=np.int64)
    frame.to_file(tmp_path / "p.gpkg", driver="GPKG", engine="pyogrio")
    land = read_patches(tmp_path / "p.gpkg", id_field="pid")
    assert land.ids.tolist() == [str(2 ** 53 + 1), str(2 ** 62), str(-(2 ** 63)),
                                 str(10 ** 18 + 1)]


def test_mixed_text_and_number_ids_are_kept_as_text(tmp_path):
    # consistency test: GDAL reads a property holding text and numbers as text, numbers
    # written as it formats them; large ones are then kept as that text, not refused
    (tmp_path / "p.geojson").write_text(
        collection(changed(props("pid", ["A1", 2, 3.5, 1e20]))), encoding="utf-8")
    land = read_patches(tmp_path / "p.geojson", id_field="pid")
    assert land.ids.tolist() == ["A1", "2", "3.5", "1e+20"]


def test_lists_of_one_value_are_that_value():
    # GDAL turns every value of a property into a list once one feature holds a list
    frame = tiny_frame(crs=4326)
    frame["r"] = pd.Series([np.array([1.5]), np.array([2.0]), None, np.array([0.5])],
                           dtype=object)
    land = landscape_from_frame(frame, id_field="pid")
    with pytest.raises(InputError, match="feature 'A3': field 'r': value is missing"):
        land.values("r")
    frame["r"] = pd.Series([np.array([1.5]), np.array([2.0]), [1.0], (0.5,)], dtype=object)
    np.testing.assert_array_equal(
        landscape_from_frame(frame, id_field="pid").values("r"), [1.5, 2.0, 1.0, 0.5])


def test_the_whole_corpus_has_at_least_100_cases():
    # the bad-input corpus of the command line: this file's cases and test_errors_cli.py's
    from test_errors_cli import CASES as CLI_CASES

    ids = [c.id for c in CLI_CASES] + [c.id for c in CASES]
    assert len(set(ids)) == len(ids)
    assert len(ids) >= 100, len(ids)
