"""Reading patch files: CRS choice, areas and distances against pyproj.Geod, and the errors.

The places are invented: small patches in the Alps near 10.3° E 47.2° N, in the south at
146.7° E 42.3° S, and a wide spread of patches at 60° N.
"""

from __future__ import annotations

import json
import warnings

import geopandas
import numpy as np
import pandas as pd
import pytest
import shapely
from pyproj import CRS, Geod
from pyproj.aoi import AreaOfInterest
from pyproj.database import query_utm_crs_info

from trophoscape.errors import InputError, TrophoscapeWarning
from trophoscape.model.landscape import Landscape, landscape_from_frame, read_patches
from trophoscape.model.network import build_network

GEOD = Geod(ellps="WGS84")


def box_lonlat(lon0, lat0, dlon, dlat, step=0.001):
    """A lon/lat rectangle densified so its edges follow the same curve in every CRS."""
    return shapely.segmentize(shapely.box(lon0, lat0, lon0 + dlon, lat0 + dlat), step)


def write_geojson(path, geometries, properties=None, crs_member=None):
    features = []
    for k, geom in enumerate(geometries):
        props = {} if properties is None else properties[k]
        geo = geom if (geom is None or isinstance(geom, dict)) else shapely.geometry.mapping(geom)
        features.append({"type": "Feature", "properties": props, "geometry": geo})
    doc = {"type": "FeatureCollection", "features": features}
    if crs_member is not None:
        doc["crs"] = crs_member
    path.write_text(json.dumps(doc))
    return path


def geodesic_area_km2(polygon) -> float:
    return abs(GEOD.geometry_area_perimeter(polygon)[0]) / 1e6


def square(x, y, side=1.0):
    return {"type": "Polygon", "coordinates": [[[x, y], [x + side, y], [x + side, y + side],
                                                [x, y + side], [x, y]]]}


# ------------------------------------------------------------------ the reference itself


@pytest.mark.parametrize("ellps", ["GRS80", "WGS84"])
def test_geod_reproduces_vincenty_flinders_peak_to_buninyong(ellps):
    # A check of the reference library alone (pyproj), not of trophoscape: the geodesic
    # tests below rely on it. Vincenty (1975), Survey Review 23:88, worked example (from memory): Flinders Peak
    # -37°57'03.72030" 144°25'29.52440" to Buninyong -37°39'10.15610" 143°55'35.38390",
    # 54 972.271 m on GRS80 (WGS 84 differs in the 9th digit of the flattening).
    def deg(d, m, s):
        return np.sign(d) * (abs(d) + m / 60 + s / 3600)

    lat1, lon1 = deg(-37, 57, 3.72030), deg(144, 25, 29.52440)
    lat2, lon2 = deg(-37, 39, 10.15610), deg(143, 55, 35.38390)
    _, _, dist = Geod(ellps=ellps).inv(lon1, lat1, lon2, lat2)
    assert dist == pytest.approx(54972.271, abs=1e-3)


# ------------------------------------------------------------------ areas and distances


def test_areas_match_geodesic_polygon_areas(tmp_path):
    # reference: pyproj.Geod.geometry_area_perimeter (Karney 2013, J. Geodesy 87:43, from memory)
    polys = [box_lonlat(10.30, 47.20, 0.03, 0.02), box_lonlat(10.40, 47.25, 0.05, 0.01),
             shapely.segmentize(shapely.Polygon([(10.5, 47.1), (10.56, 47.1), (10.53, 47.14)]),
                                0.001)]
    land = read_patches(write_geojson(tmp_path / "p.geojson", polys))
    expected = [geodesic_area_km2(p) for p in polys]
    np.testing.assert_allclose(land.area_km2, expected, rtol=5e-3)
    # equal-area projection: far tighter than the 0.5% the contract asks
    np.testing.assert_allclose(land.area_km2, expected, rtol=1e-5)


def test_wide_landscape_gets_equal_area_projection_and_true_areas(tmp_path):
    polys = [box_lonlat(lon, 60.0, 0.1, 0.05, step=0.002) for lon in (0.0, 9.0, 20.0)]
    land = read_patches(write_geojson(tmp_path / "wide.geojson", polys))
    assert land.crs.coordinate_operation.method_name == "Lambert Azimuthal Equal Area"
    assert land.crs.is_projected
    np.testing.assert_allclose(land.area_km2, [geodesic_area_km2(p) for p in polys], rtol=5e-3)
    # the distance CRS is equal-area here, so planar areas agree with area_km2 too
    np.testing.assert_allclose(land.frame.area / 1e6, land.area_km2, rtol=1e-6)


def test_centroid_and_boundary_distances_match_geodesics(tmp_path):
    # reference: pyproj.Geod.inv; inside one UTM zone planar distances are within 0.1% of
    # geodesic ones (Snyder 1987, USGS Professional Paper 1395, from memory)
    s = 0.0005  # tiny squares, so projected centroids sit on the lon/lat centres
    centres = [(10.30, 47.20), (10.38, 47.23), (10.33, 47.29)]
    tiny = [box_lonlat(x - s / 2, y - s / 2, s, s, step=s) for x, y in centres]
    land = read_patches(write_geojson(tmp_path / "c.geojson", tiny))
    net = build_network(land, distance="centroid", max_distance_km=50, kernel="step")
    lon = np.array([c[0] for c in centres])
    lat = np.array([c[1] for c in centres])
    _, _, geodesic = GEOD.inv(lon[net.source], lat[net.source], lon[net.target], lat[net.target])
    np.testing.assert_allclose(net.distance_km, geodesic / 1000, rtol=1e-3)

    # two rectangles one above the other: the gap runs along a meridian
    pair = [box_lonlat(10.30, 47.00, 0.01, 0.01), box_lonlat(10.30, 47.10, 0.01, 0.01)]
    land = read_patches(write_geojson(tmp_path / "b.geojson", pair))
    net = build_network(land, distance="boundary", max_distance_km=50, kernel="step")
    _, _, gap = GEOD.inv(10.305, 47.01, 10.305, 47.10)
    np.testing.assert_allclose(net.distance_km, [gap / 1000] * 2, rtol=1e-3)


# ------------------------------------------------------------------ CRS choice


@pytest.mark.parametrize("lon, lat", [(10.3, 47.2), (146.7, -42.3), (-70.6, -33.4), (2.2, 0.5)])
def test_auto_crs_is_the_utm_zone_pyproj_lists(tmp_path, lon, lat):
    # reference: pyproj.database.query_utm_crs_info (the EPSG dataset's WGS 84 UTM zones)
    polys = [box_lonlat(lon, lat, 0.02, 0.02), box_lonlat(lon + 0.05, lat + 0.01, 0.02, 0.02)]
    land = read_patches(write_geojson(tmp_path / "p.geojson", polys))
    info = query_utm_crs_info(datum_name="WGS 84", area_of_interest=AreaOfInterest(
        lon, lat, lon + 0.07, lat + 0.03))
    assert len(info) == 1
    assert land.crs == CRS.from_epsg(int(info[0].code))


def test_projected_file_keeps_its_crs_and_explicit_crs_is_used(tmp_path):
    # EPSG:3035 (ETRS89-extended / LAEA Europe) is equal-area by definition (EPSG dataset)
    boxes = [shapely.box(4321000 + 3000 * k, 3210000, 4322500 + 3000 * k, 3211000)
             for k in range(3)]
    frame = geopandas.GeoDataFrame({"name": ["a", "b", "c"]}, geometry=boxes, crs="EPSG:3035")
    path = tmp_path / "p.gpkg"
    frame.to_file(path, engine="pyogrio")
    land = read_patches(path, id_field="name")
    assert land.crs == CRS.from_epsg(3035)
    np.testing.assert_allclose(land.area_km2, [1.5, 1.5, 1.5], rtol=1e-6)
    assert list(land.ids) == ["a", "b", "c"]
    utm = read_patches(path, crs="EPSG:32632")
    assert utm.crs == CRS.from_epsg(32632)
    np.testing.assert_allclose(utm.area_km2, land.area_km2, rtol=1e-9)


def test_geographic_crs_option_is_rejected(tmp_path):
    path = write_geojson(tmp_path / "p.geojson", [box_lonlat(10.3, 47.2, 0.01, 0.01)])
    with pytest.raises(InputError) as err:
        read_patches(path, crs="EPSG:4326")
    assert str(err.value) == (
        "field 'patches.crs': 'EPSG:4326' is a geographic (degrees) CRS; distances and areas "
        "need a projected CRS: give 'auto' or one in metres such as a UTM zone 'EPSG:326NN'")
    with pytest.raises(InputError) as err:
        read_patches(path, crs="EPSG:99999999")
    assert str(err.value) == (
        "field 'patches.crs': 'EPSG:99999999' is not a CRS pyproj understands; give "
        "'auto' or a projected CRS in metres such as 'EPSG:3035'")


@pytest.mark.filterwarnings("ignore:'crs' was not provided:UserWarning")
def test_shapefile_without_crs_is_read_as_lonlat(tmp_path):
    polys = [box_lonlat(10.30, 47.20, 0.02, 0.02), box_lonlat(10.35, 47.20, 0.02, 0.02)]
    path = tmp_path / "nocrs.shp"
    geopandas.GeoDataFrame({"code": [7, 9]}, geometry=polys).to_file(path, engine="pyogrio")
    assert not (tmp_path / "nocrs.prj").exists()
    land = read_patches(path, id_field="code")
    assert list(land.ids) == ["7", "9"]
    assert land.crs == CRS.from_epsg(32632)
    np.testing.assert_allclose(land.area_km2, [geodesic_area_km2(p) for p in polys], rtol=1e-5)


# ------------------------------------------------------------------ the frame


def test_frame_keeps_order_attributes_and_metric_geometry(tmp_path):
    polys = [box_lonlat(10.30 + 0.03 * k, 47.2, 0.02, 0.02) for k in range(4)]
    props = [{"site": f"S{k}", "quality": q, "note": "x"} for k, q in
             zip([3, 1, 2, 0], [0.5, 1.0, 2.0, 0.0])]
    land = read_patches(write_geojson(tmp_path / "p.geojson", polys, props), id_field="site",
                        fields={"quality": "patches.quality_field"})
    assert isinstance(land, Landscape)
    assert list(land.ids) == ["S3", "S1", "S2", "S0"]
    assert list(land.frame.columns) == ["patch_id", "area_km2", "site", "quality", "note",
                                        "geometry"]
    assert land.frame.index.equals(pd.RangeIndex(4))
    assert land.n_patches == 4 and land.has_id_field
    assert land.values("quality").dtype == np.float64
    np.testing.assert_array_equal(land.values("quality"), [0.5, 1.0, 2.0, 0.0])
    assert land.centroids.shape == (4, 2)
    # centroids are in metres: neighbours 0.03° apart at 47.2° N are ~2.27 km apart
    # (Geod.inv as the reference)
    _, _, d = GEOD.inv(10.31, 47.21, 10.34, 47.21)
    assert np.hypot(*(land.centroids[1] - land.centroids[0])) == pytest.approx(d, rel=1e-3)
    assert land.repaired == ()


def test_frame_without_crs_in_memory_and_order_ids():
    frame = geopandas.GeoDataFrame(geometry=[box_lonlat(10.3, 47.2, 0.01, 0.01),
                                             box_lonlat(10.4, 47.2, 0.01, 0.01)])
    land = landscape_from_frame(frame)
    assert list(land.ids) == ["0", "1"] and not land.has_id_field
    assert land.path is None


def test_invalid_polygon_is_repaired_with_a_warning(tmp_path):
    # a bow-tie: two triangles meeting at a point; shapely.make_valid splits it in two
    bow = shapely.Polygon([(10.30, 47.20), (10.32, 47.22), (10.32, 47.20), (10.30, 47.22)])
    good = box_lonlat(10.40, 47.20, 0.01, 0.01)
    path = write_geojson(tmp_path / "p.geojson", [good, bow], [{"n": "ok"}, {"n": "bow"}])
    with pytest.warns(TrophoscapeWarning) as record:
        land = read_patches(path, id_field="n")
    assert [str(w.message) for w in record] == [
        f"{path}: feature 'bow': geometry was invalid and has been repaired (shapely "
        "make_valid); check its outline in a GIS if its area looks wrong"]
    assert land.repaired == ("bow",)
    assert land.frame.geometry.is_valid.all()
    fixed = shapely.make_valid(bow)
    assert land.area_km2[1] == pytest.approx(geodesic_area_km2(fixed), rel=1e-3)


def test_valid_file_emits_no_warning(tmp_path):
    path = write_geojson(tmp_path / "p.geojson", [box_lonlat(10.3, 47.2, 0.01, 0.01)])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        read_patches(path)


# ------------------------------------------------------------------ errors, exact messages


def raises(fn, *args, **kwargs) -> str:
    with pytest.raises(InputError) as err:
        fn(*args, **kwargs)
    return str(err.value)


def test_error_missing_file(tmp_path):
    path = tmp_path / "nothere.geojson"
    assert raises(read_patches, path) == (
        f"{path}: no such file; check the path, which should name a GeoJSON (.geojson), "
        "GeoPackage (.gpkg) or Shapefile (.shp)")


def test_error_bad_json(tmp_path):
    path = tmp_path / "bad.geojson"
    path.write_text('{"type": "FeatureCollection", "features": [}')
    assert raises(read_patches, path) == (
        f"{path}: not valid JSON (Expecting value at line 1, column 44); expected a GeoJSON "
        "FeatureCollection")


def test_error_empty_collection(tmp_path):
    path = write_geojson(tmp_path / "empty.geojson", [])
    assert raises(read_patches, path) == (
        f"{path}: the file holds no features; give a file with at least one patch polygon "
        "(or name its layer with [patches] layer)")


def test_error_null_geometry(tmp_path):
    path = write_geojson(tmp_path / "p.geojson", [square(10, 47, 0.01), None],
                         [{"id": "A"}, {"id": "B"}])
    assert raises(read_patches, path, id_field="id") == (
        f"{path}: feature 'B': field 'geometry': geometry is null; expected a Polygon or "
        "MultiPolygon: fix the feature or remove it")
    assert raises(read_patches, path) == (
        f"{path}: feature 1: field 'geometry': geometry is null; expected a Polygon or "
        "MultiPolygon: fix the feature or remove it")


def test_error_point_geometry(tmp_path):
    path = write_geojson(tmp_path / "p.geojson",
                         [square(10, 47, 0.01), {"type": "Point", "coordinates": [10, 47]}])
    assert raises(read_patches, path) == (
        f"{path}: feature 1: field 'geometry': geometry type is Point; expected a Polygon or "
        "MultiPolygon: fix the feature or remove it")


def test_error_missing_id_field(tmp_path):
    path = write_geojson(tmp_path / "p.geojson", [square(10, 47, 0.01)], [{"name": "A"}])
    assert raises(read_patches, path, id_field="patch") == (
        f"{path}: field 'patch': no such attribute for patch ids; the file has: 'name'; name "
        "one of them in [patches] id_field, or leave id_field out to number the features")


def test_error_duplicate_ids(tmp_path):
    path = write_geojson(tmp_path / "p.geojson",
                         [square(10 + k * 0.02, 47, 0.01) for k in range(4)],
                         [{"id": v} for v in ("W1", "W2", "W3", "W2")])
    assert raises(read_patches, path, id_field="id") == (
        f"{path}: feature 'W2': field 'id': id is not unique: features 1 and 3 both have it; "
        "give each patch its own id")


def test_error_null_id(tmp_path):
    path = write_geojson(tmp_path / "p.geojson",
                         [square(10 + k * 0.02, 47, 0.01) for k in range(2)],
                         [{"id": "W1"}, {"id": None}])
    assert raises(read_patches, path, id_field="id") == (
        f"{path}: feature 1: field 'id': patch id is empty; give every patch an id")


def test_error_non_numeric_quality_field(tmp_path):
    path = write_geojson(tmp_path / "p.geojson",
                         [square(10 + k * 0.02, 47, 0.01) for k in range(2)],
                         [{"id": "W1", "quality": "1.5"}, {"id": "W2", "quality": "high"}])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pyogrio notes the mixed-type column
        message = raises(read_patches, path, id_field="id",
                         fields={"quality": "[patches].quality_field"})
    assert message == (
        f"{path}: feature 'W2': field 'quality': value 'high' is not a number; give a "
        "number of at least 0 (named by [patches].quality_field)")


def test_error_negative_field_value(tmp_path):
    path = write_geojson(tmp_path / "p.geojson",
                         [square(10 + k * 0.02, 47, 0.01) for k in range(3)],
                         [{"id": f"W{k}", "quality": q} for k, q in enumerate([1.0, 0.0, -1.0])])
    assert raises(read_patches, path, id_field="id", fields={"quality": "[patches].quality_field"}
                  ) == (f"{path}: feature 'W2': field 'quality': value -1.0 is out of range; "
                        "give a number of at least 0 (named by [patches].quality_field)")
    land = read_patches(path, id_field="id")
    assert raises(land.values, "quality") == (
        f"{path}: feature 'W2': field 'quality': value -1.0 is out of range; give a number "
        "of at least 0")
    assert raises(land.values, "qualty", key="prey.growth_rate") == (
        f"{path}: field 'qualty': no such attribute (named by prey.growth_rate); the file has: "
        "'id', 'quality'; add the column to the patch file or name one of these")


def test_error_missing_field_value(tmp_path):
    path = write_geojson(tmp_path / "p.geojson",
                         [square(10 + k * 0.02, 47, 0.01) for k in range(2)],
                         [{"quality": 1.0}, {"quality": None}])
    assert raises(read_patches, path, fields=["quality"]) == (
        f"{path}: feature 1: field 'quality': value is missing; give a number of at least 0")


def test_error_longitude_out_of_range(tmp_path):
    path = write_geojson(tmp_path / "p.geojson", [square(10, 47, 0.01), square(200, 47, 0.01)])
    assert raises(read_patches, path) == (
        f"{path}: feature 1: field 'geometry': coordinates span x 200 to 200.01, y 47 to 47.01, "
        "outside longitude -180..180 / latitude -90..90; GeoJSON coordinates are WGS 84 lon/lat "
        "(RFC 7946); reproject the file to EPSG:4326")


@pytest.mark.filterwarnings("ignore:'crs' was not provided:UserWarning")
def test_error_projected_coordinates_without_crs(tmp_path):
    path = tmp_path / "nocrs.shp"
    geopandas.GeoDataFrame(geometry=[shapely.box(500000, 5000000, 501000, 5001000)]).to_file(
        path, engine="pyogrio")
    assert raises(read_patches, path) == (
        f"{path}: feature 0: field 'geometry': coordinates span x 500000 to 501000, y 5e+06 to "
        "5.001e+06, outside longitude -180..180 / latitude -90..90; the file has no CRS, so "
        "WGS 84 lon/lat was assumed; store the file with its CRS")


def test_error_zero_area_polygon(tmp_path):
    flat = {"type": "Polygon", "coordinates": [[[10, 47], [10.01, 47], [10.02, 47], [10, 47]]]}
    path = write_geojson(tmp_path / "p.geojson", [square(10, 47.1, 0.01), flat],
                         [{"id": "A"}, {"id": "F"}])
    assert raises(read_patches, path, id_field="id") == (
        f"{path}: feature 'F': field 'geometry': polygon has zero area; redraw the patch with "
        "a positive area or remove the feature")


def test_repair_keeps_only_the_polygonal_part(tmp_path):
    # a square with a spike out and back along one line: shapely.make_valid returns the
    # square plus a dangling line (a GeometryCollection); only the square is kept
    spiky = shapely.Polygon([(10.30, 47.20), (10.32, 47.20), (10.34, 47.20), (10.32, 47.20),
                             (10.32, 47.22), (10.30, 47.22)])
    fixed = shapely.make_valid(spiky)
    assert fixed.geom_type == "GeometryCollection"  # the case this test is about
    path = write_geojson(tmp_path / "p.geojson", [spiky])
    with pytest.warns(TrophoscapeWarning, match="feature 0: geometry was invalid"):
        land = read_patches(path)
    assert land.repaired == ("0",)
    assert set(land.frame.geometry.geom_type) <= {"Polygon", "MultiPolygon"}
    square_only = shapely.Polygon([(10.30, 47.20), (10.32, 47.20), (10.32, 47.22),
                                   (10.30, 47.22)])
    assert land.area_km2[0] == pytest.approx(geodesic_area_km2(square_only), rel=1e-3)


def test_patches_across_the_antimeridian(tmp_path):
    # reference: pyproj.Geod.inv; patches at 179.98° E and 179.98° W are about 2.7 km apart, not
    # half the world: the auto CRS must be a UTM zone at the dateline (60 N or 1 N)
    polys = [box_lonlat(179.97, 52.0, 0.01, 0.01), box_lonlat(-179.98, 52.0, 0.01, 0.01)]
    land = read_patches(write_geojson(tmp_path / "p.geojson", polys))
    assert land.crs.to_epsg() in (32601, 32660)
    np.testing.assert_allclose(land.area_km2, [geodesic_area_km2(p) for p in polys], rtol=1e-4)
    net = build_network(land, distance="boundary", max_distance_km=10, kernel="step")
    _, _, gap = GEOD.inv(179.98, 52.005, -179.98, 52.005)
    assert net.distance_km[0] == pytest.approx(gap / 1000, rel=1e-3)
