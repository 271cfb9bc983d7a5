"""timeseries.nc as the CF community's own tools read it, and patches.gpkg as GDAL reads it.

References outside trophoscape, each named where it is used:

* the CF checker (``cfchecks``, package ``cfchecker``) against CF-1.8, with the local
  standard-name, area-type and region tables of ``tests/data`` (a subset of the CF tables;
  see ``tests/data/README.md``);
* cfdm, the reference implementation of the CF data model, for what the file means: a
  discrete sampling geometry of time series (CF Conventions 1.8, §9 Discrete Sampling
  Geometries) whose patches carry polygon geometries (§7.5 Geometries) in a CRS given by a
  grid mapping with ``crs_wkt`` (§5.6);
* xarray with cftime for the time axis (§4.4 Time Coordinate, §4.4.1 Calendar: ``365_day``);
* shapely and pyproj for the polygons rebuilt from the file's node arrays, compared with the
  GeoPackage as geopandas reads it, areas in a Lambert azimuthal equal-area projection;
* GDAL's ``ogrinfo`` for the GeoPackage.

The CF checker, cfdm and ogrinfo are required in CI (the test extra installs cfchecker and
cfdm; .ci/run installs Debian's gdal-bin and libudunits2-0): there a missing one fails the
test with what to install. Elsewhere (a fresh machine running the README's test command
without those system packages) such a test is skipped with the same message, as the
browser test of the report is.
"""

from __future__ import annotations

import logging
import os
import re
import shutil
import subprocess
import tomllib
from pathlib import Path

import cftime
import geopandas
import netCDF4
import numpy as np
import pyproj
import pytest
import shapely
import xarray as xr

import trophoscape as ts
from trophoscape.scenario import parse_scenario

from conftest import grid_study, write_grid_file

ROOT = Path(__file__).resolve().parents[1]
TABLES = Path(__file__).resolve().parent / "data"
DEMO_TOML = ROOT / "data" / "demo.toml"
SPECIES = ("prey", "predator")
DAYS_PER_MODEL_YEAR = 365  # the README: one model year is one year of the 365_day calendar


def _missing(what: str) -> None:
    """Fail in CI, which installs everything these tests need; skip elsewhere."""
    if os.environ.get("CI"):
        pytest.fail(f"{what} (CI installs it, so this test fails rather than skips)",
                    pytrace=False)
    pytest.skip(what)


def _udunits() -> None:
    import ctypes.util

    if ctypes.util.find_library("udunits2") is None:
        _missing("the udunits2 library is not installed (Debian: libudunits2-0); the CF "
                 "checker and cfdm load it")


def required(command: str, how: str) -> str:
    path = shutil.which(command)
    if path is None:
        _missing(f"{command} is not installed; {how}")
    if command == "cfchecks":
        _udunits()
    return path


def cfdm_module():
    _udunits()
    try:
        import cfdm
    except ImportError as exc:  # pragma: no cover - CI installs it with the test extra
        _missing(f"cfdm cannot be imported ({exc}); pip install '.[test]' installs it")
    return cfdm


def cf_check(path: Path) -> dict:
    """Run the CF checker on ``path`` against CF-1.8 with the local tables."""
    exe = required("cfchecks", "pip install cfchecker (with Debian's libudunits2-0)")
    done = subprocess.run(
        [exe, "-v", "1.8", "-s", str(TABLES / "cf-standard-name-table-subset.xml"),
         "-a", str(TABLES / "cf-area-type-table-empty.xml"),
         "-r", str(TABLES / "cf-standardized-region-list-empty.xml"), str(path)],
        capture_output=True, text=True, timeout=300)
    text = done.stdout + done.stderr
    counts = dict(re.findall(r"^(ERRORS detected|WARNINGS given|INFORMATION messages): (\d+)",
                             text, flags=re.M))
    assert len(counts) == 3, f"the CF checker did not finish:\n{text[-3000:]}"
    return {"errors": int(counts["ERRORS detected"]), "warnings": int(counts["WARNINGS given"]),
            "messages": [line for line in text.splitlines()
                         if line.startswith(("FATAL", "ERROR", "WARN"))],
            "text": text}


# ------------------------------------------------------------------------------ runs


def write_odd_patches(folder: Path) -> tuple[Path, geopandas.GeoDataFrame]:
    """Patches in ETRS89 / LAEA Europe (EPSG:3035) with what a GIS file may hold: holes,
    a MultiPolygon, rings drawn clockwise and anticlockwise, ids beyond ASCII."""
    x0, y0 = 4_300_000.0, 2_900_000.0

    def square(cx, cy, half, cw=False):
        ring = [(cx - half, cy - half), (cx + half, cy - half), (cx + half, cy + half),
                (cx - half, cy + half)]
        return ring[::-1] if cw else ring

    features = {
        # exterior clockwise and hole anticlockwise: both the wrong way round for CF
        "Süd": shapely.Polygon(square(x0, y0, 500, cw=True), [square(x0, y0, 150)]),
        # two parts, the second clockwise
        "東": shapely.MultiPolygon([shapely.Polygon(square(x0 + 3000, y0, 250)),
                                   shapely.Polygon(square(x0 + 3000, y0 + 900, 250, cw=True))]),
        "a b": shapely.Polygon([(x0 + 6000, y0 - 400), (x0 + 6600, y0 - 400),
                                (x0 + 6300, y0 + 300)]),
        # two holes, in a polygon drawn anticlockwise
        "two-holes": shapely.Polygon(square(x0, y0 + 3000, 600),
                                     [square(x0 - 300, y0 + 3000, 100, cw=True),
                                      square(x0 + 300, y0 + 3000, 100)]),
        "5": shapely.Polygon(square(x0 + 3000, y0 + 3000, 400, cw=True)),
    }
    frame = geopandas.GeoDataFrame({"patch_id": list(features)},
                                   geometry=list(features.values()), crs="EPSG:3035")
    path = folder / "odd.gpkg"
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    return path, frame


@pytest.fixture(scope="module")
def odd_run(tmp_path_factory):
    """A run streamed to timeseries.nc as it goes, census every 0.1 year, then its folder."""
    folder = tmp_path_factory.mktemp("odd")
    path, frame = write_odd_patches(folder)
    study = grid_study(path, duration=4.0, run={"census_interval": 0.1, "burn_in": 1.0})
    result = ts.run_study(study, series_to=folder / "series.nc")
    out = ts.write_run(result, folder / "out", maps=False)
    return {"result": result, "out": out, "nc": out / "timeseries.nc", "frame": frame,
            "duration": 4.0, "interval": 0.1}


@pytest.fixture(scope="module")
def mercator_run(tmp_path_factory):
    """Patches in Web Mercator (EPSG:3857), a projection with no CF grid mapping."""
    folder = tmp_path_factory.mktemp("mercator")
    x0, y0 = 1_113_000.0, 5_942_000.0  # about 10° E, 47° N
    shapes = [shapely.box(x0, y0, x0 + 1500, y0 + 1500),
              shapely.Polygon([(x0 + 3000, y0), (x0 + 4500, y0 + 200), (x0 + 3500, y0 + 1800)]),
              shapely.box(x0, y0 + 3000, x0 + 1200, y0 + 4000)]
    frame = geopandas.GeoDataFrame({"patch_id": ["m1", "m2", "m3"]}, geometry=shapes,
                                   crs="EPSG:3857")
    path = folder / "mercator.gpkg"
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    study = grid_study(path, duration=2.0, run={"burn_in": 1.0})
    result = ts.run_study(study, series_to=folder / "series.nc")
    out = ts.write_run(result, folder / "out", maps=False)
    return {"result": result, "out": out, "nc": out / "timeseries.nc", "frame": frame}


@pytest.fixture(scope="module")
def replicate_run(tmp_path_factory):
    """Three replicates of the 3 × 4 grid, written from memory by write_run."""
    folder = tmp_path_factory.mktemp("replicates")
    grid = write_grid_file(folder)
    study = grid_study(grid, duration=4.0, run={"replicates": 3, "seed": 7},
                       noise={"environmental_sd": 0.3, "correlation_km": 3.0})
    result = ts.run_study(study)
    assert result.series_file is None
    out = ts.write_run(result, folder / "out", maps=False)
    return {"result": result, "out": out, "nc": out / "timeseries.nc", "grid": grid}


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """The bundled demo (MultiPolygons in lon/lat, run in UTM 32N), cut to 4 years."""
    raw = tomllib.loads(DEMO_TOML.read_text(encoding="utf-8"))
    raw["run"].update(duration=4.0, burn_in=1.0)
    raw.setdefault("analysis", {}).update(stability=False, capacity=False)
    study = ts.build_study(parse_scenario(raw, base_dir=DEMO_TOML.parent))
    folder = tmp_path_factory.mktemp("demo")
    result = ts.run_study(study, series_to=folder / "series.nc")
    out = ts.write_run(result, folder / "out", maps=False)
    return {"result": result, "out": out, "nc": out / "timeseries.nc"}


@pytest.fixture(params=["odd", "replicates", "demo", "mercator"])
def any_run(request):
    return request.getfixturevalue(f"{request.param}_run".replace("replicates", "replicate"))


# ---------------------------------------------------------------------- CF checker


def test_cf_checker_finds_nothing_wrong(any_run):
    report = cf_check(any_run["nc"])
    assert report["errors"] == 0, "\n".join(report["messages"])
    assert report["warnings"] == 0, "\n".join(report["messages"])
    # the checker went through the geometry and grid mapping variables too
    for name in ("time", "patch_id", "patch_geometry", "node_x", "node_count", "crs", "prey"):
        assert f"Checking variable: {name}\n" in report["text"]


def test_cf_checker_with_these_tables_does_report_errors(odd_run, tmp_path):
    # the same file with the unit of the issue (time in udunits' "year", no reference time):
    # the checker run as above must say so (CF 1.8 §4.4), or a clean report means nothing
    broken = tmp_path / "broken.nc"
    shutil.copyfile(odd_run["nc"], broken)
    with netCDF4.Dataset(broken, "a") as ds:
        ds["time"].units = "year"
        ds["area_km2"].units = "square furlongs"
    report = cf_check(broken)
    assert report["errors"] >= 2
    assert "ERROR: (4.4): Invalid units and/or reference time" in report["messages"]
    assert "ERROR: (3.1): Invalid units: square furlongs" in report["messages"]


# --------------------------------------------------------------------------- cfdm


def read_cf_fields(path, caplog):
    cfdm = cfdm_module()
    with caplog.at_level(logging.WARNING):
        fields = cfdm.read(str(path), warnings=True)
    return {f.nc_get_variable(): f for f in fields}


def assert_no_noncompliance(fields, caplog):
    # cfdm 1.13 logs "Field incomplete or non-standard due to non-CF-compliant dataset" for
    # every field when warnings=True, its own example files included; what it found is the
    # report after "Report:", and each field's dataset_compliance(), which must be empty
    # apart from the CF version it checked against
    for record in caplog.records:
        message = record.getMessage()
        if "non-CF-compliant" in message:
            assert message.rstrip().endswith("Report:\n{}"), message
    for name, field in fields.items():
        found = {k: v for k, v in field.dataset_compliance().items() if k != "CF version"}
        assert found == {}, (name, found)


def test_cfdm_reads_time_series_at_patches_with_polygons(replicate_run, caplog):
    fields = read_cf_fields(replicate_run["nc"], caplog)
    assert_no_noncompliance(fields, caplog)
    result = replicate_run["result"]
    frame = geopandas.read_file(replicate_run["out"] / "patches.gpkg", layer="patches")
    assert {"prey", "predator"} <= set(fields)
    for name in SPECIES:
        field = fields[name]
        assert field.get_property("featureType") == "timeSeries"
        assert field.data.shape == (9, 12, 3)  # census every 0.5 over 4 years
        # the time axis: dates of the 365_day calendar from 0001-01-01
        time = field.dimension_coordinate("time")
        assert time.get_property("calendar") == "365_day"
        assert str(time.get_property("units")).startswith("days since 0001-01-01")
        np.testing.assert_array_equal(time.data.array, np.arange(9) * 0.5 * 365)
        # the replicates: a realization axis, with the seeds along it
        realization = field.dimension_coordinate("realization")
        assert list(realization.data.array) == [0, 1, 2]
        seed = field.auxiliary_coordinate("long_name=seed of the replicate's random numbers")
        assert list(seed.data.array) == result.summary["seeds"]
        # the patches: ids (the one cf_role), a point inside each, polygons as geometry
        ids = field.auxiliary_coordinate("cf_role=timeseries_id")
        assert [str(v) for v in ids.data.array] == list(frame["patch_id"])
        lat = field.auxiliary_coordinate("latitude").data.array
        lon = field.auxiliary_coordinate("longitude").data.array
        # lon/lat of a point inside each patch, on the CRS's datum (WGS 84 here)
        to_xy = pyproj.Transformer.from_crs(4326, frame.crs, always_xy=True)
        points = shapely.points(np.column_stack(to_xy.transform(lon, lat)))
        assert shapely.contains(frame.geometry.values, points).all()
        for axis in ("x", "y"):
            coord = field.auxiliary_coordinate(f"projection_{axis}_coordinate")
            assert coord.get_geometry() == "polygon"
            nodes = coord.bounds.data.array  # (patch, part, node)
            want = shapely.get_coordinates(frame.geometry.exterior.values)[:, "xy".index(axis)]
            np.testing.assert_allclose(np.ma.compressed(nodes), want, rtol=0, atol=1e-6)
        # the CRS: a CF grid mapping holding the GeoPackage's CRS as WKT
        (reference,) = field.coordinate_references().values()
        conversion = reference.coordinate_conversion
        assert conversion.get_parameter("grid_mapping_name") == "transverse_mercator"
        wkt = pyproj.CRS.from_wkt(conversion.get_parameter("crs_wkt"))
        assert wkt.equals(frame.crs)


def test_cfdm_finds_nothing_wrong_in_the_demo(demo_run, caplog):
    # (cfdm 1.13 reads char arrays as ASCII, so the odd run's ids "Süd" and "東" stop it;
    # xarray and netCDF4 read them by the variable's _Encoding: test_layout_as_xarray_shows_it)
    fields = read_cf_fields(demo_run["nc"], caplog)
    assert_no_noncompliance(fields, caplog)
    field = fields["prey"]
    ids = demo_run["result"].study.ids
    assert field.data.shape == (9, len(ids))
    assert field.get_property("featureType") == "timeSeries"
    coord_ids = field.auxiliary_coordinate("cf_role=timeseries_id").data.array
    assert [str(v) for v in coord_ids] == [str(i) for i in ids]
    for axis in ("x", "y"):
        coord = field.auxiliary_coordinate(f"projection_{axis}_coordinate")
        assert coord.get_geometry() == "polygon"
    (reference,) = field.coordinate_references().values()
    wkt = reference.coordinate_conversion.get_parameter("crs_wkt")
    assert pyproj.CRS.from_wkt(wkt).equals(demo_run["result"].study.landscape.crs)


# ---------------------------------------------------------------------------- time


def test_time_decodes_to_documented_dates_and_model_time_is_exact(odd_run):
    step, duration = odd_run["interval"], odd_run["duration"]
    census = np.arange(round(duration / step) + 1) * step  # census i at i x interval
    with xr.open_dataset(odd_run["nc"]) as ds:  # decode_times=True, xarray's default
        assert ds["time"].attrs["standard_name"] == "time"
        assert ds["time"].encoding["calendar"] == "365_day"
        dates = ds["time"].values
        assert all(isinstance(d, cftime.DatetimeNoLeap) for d in dates)
        # model time t is the date 0001-01-01 + 365 t days of the 365_day calendar
        origin = cftime.DatetimeNoLeap(1, 1, 1)
        seconds = np.array([(d - origin).total_seconds() for d in dates])
        np.testing.assert_allclose(seconds, census * DAYS_PER_MODEL_YEAR * 86400,
                                   rtol=0, atol=1e-6)
        whole = np.flatnonzero(np.isclose(census, np.round(census)))
        assert [dates[i] for i in whole] == [cftime.DatetimeNoLeap(1 + int(round(census[i])), 1, 1)
                                             for i in whole]
        # and model_time holds the census times bit for bit
        assert ds["model_time"].dims == ("time",)
        assert ds["model_time"].attrs["units"] == "common_years"
        np.testing.assert_array_equal(ds["model_time"].values, census)
        # the documented way back from dates: cftime.date2num in common years
        back = cftime.date2num(dates, "days since 0001-01-01 00:00:00", "365_day") / 365
        np.testing.assert_allclose(back, census, rtol=0, atol=1e-12)
    with xr.open_dataset(odd_run["nc"], decode_times=False) as raw:
        np.testing.assert_array_equal(raw["model_time"].values, census)
        np.testing.assert_array_equal(raw["time"].values, census * 365)
        assert raw["time"].attrs["units"] == "days since 0001-01-01 00:00:00"


@pytest.mark.parametrize("unit, days, model_units", [("day", 1, "days"),
                                                     ("generation", 365, "1")])
def test_other_time_units(tmp_path, unit, days, model_units):
    grid = write_grid_file(tmp_path)
    raw = {"time_unit": unit, "patches": {"path": str(grid), "id_field": "patch_id"},
           "run": {"duration": 3.0, "burn_in": 1.0, "census_interval": 0.5},
           "analysis": {"stability": False, "capacity": False}}
    study = ts.build_study(parse_scenario(raw, base_dir=tmp_path))
    result = ts.run_study(study, series_to=tmp_path / "series.nc")
    census = np.arange(7) * 0.5
    with xr.open_dataset(result.series_file) as ds:
        origin = cftime.DatetimeNoLeap(1, 1, 1)
        seconds = np.array([(d - origin).total_seconds() for d in ds["time"].values])
        np.testing.assert_allclose(seconds, census * days * 86400, rtol=0, atol=1e-6)
        np.testing.assert_array_equal(ds["model_time"].values, census)
        assert ds["model_time"].attrs["units"] == model_units
        assert ds.attrs["time_unit"] == unit
    report = cf_check(result.series_file)
    assert report["errors"] == 0 and report["warnings"] == 0, "\n".join(report["messages"])


# ------------------------------------------------------------------ xarray layout


def test_layout_as_xarray_shows_it(odd_run, replicate_run):
    frame = odd_run["frame"]
    with xr.open_dataset(odd_run["nc"]) as ds:
        assert ds.attrs["Conventions"] == "CF-1.8" and ds.attrs["featureType"] == "timeSeries"
        for name in SPECIES:
            assert ds[name].dims == ("time", "patch")
            assert ds[name].dtype == np.float32
            assert ds[name].encoding["chunksizes"][0] == min(ds.sizes["time"], 64)
        # patch ids: a char array decoded as text, a coordinate along patch, no index
        assert list(ds["patch_id"].values) == list(frame["patch_id"])
        assert ds["patch_id"].attrs["cf_role"] == "timeseries_id"
        assert "patch" not in ds.indexes
        # the README's way to select by id
        by_id = ds.set_xindex("patch_id")
        np.testing.assert_array_equal(by_id["prey"].sel(patch_id="東").values,
                                      ds["prey"].isel(patch=1).values)
        # every variable says what it is
        for name, var in ds.variables.items():
            assert var.attrs.get("long_name"), name
    with netCDF4.Dataset(odd_run["nc"]) as raw:
        # no fill value on any coordinate variable (CF 1.8 §2.5.1); NaN only fills the series
        for name, var in raw.variables.items():
            if name in raw.dimensions:
                assert "_FillValue" not in var.ncattrs(), name
        assert raw["patch_id"].dtype == np.dtype("S1")  # char, not a string coordinate
    with xr.open_dataset(replicate_run["nc"]) as ds:
        for name in SPECIES:
            assert ds[name].dims == ("time", "patch", "replicate")
        assert list(ds["replicate"].values) == [0, 1, 2]
        assert ds["replicate"].attrs["standard_name"] == "realization"
        assert list(ds["seed"].values) == replicate_run["result"].summary["seeds"]
        assert ds["seed"].dtype == np.int64


# ---------------------------------------------------------------------- polygons


def polygons_from_file(path) -> tuple[np.ndarray, pyproj.CRS]:
    """Rebuild the patch polygons from the CF simple-geometry variables (CF 1.8 §7.5)."""
    with netCDF4.Dataset(path) as ds:
        container = ds[ds["prey"].geometry]
        assert container.geometry_type == "polygon"
        xname, yname = container.node_coordinates.split()
        xy = np.column_stack([ds[xname][:].data, ds[yname][:].data])
        node_count = ds[container.node_count][:].data
        n = len(node_count)
        if "part_node_count" in container.ncattrs():
            part_nodes = ds[container.part_node_count][:].data
        else:  # one ring per patch
            part_nodes = node_count
        if "interior_ring" in container.ncattrs():
            interior = ds[container.interior_ring][:].data.astype(bool)
        else:
            interior = np.zeros(len(part_nodes), dtype=bool)
        crs = pyproj.CRS.from_wkt(ds[container.grid_mapping].crs_wkt)
    ring_of_node = np.repeat(np.arange(len(part_nodes)), part_nodes)
    rings = shapely.linearrings(xy, indices=ring_of_node)
    # the patch of each ring: rings are stored patch after patch
    patch_of_ring = np.searchsorted(np.cumsum(node_count), np.cumsum(part_nodes) - 1,
                                    side="right")
    # a polygon per exterior ring, with the interior rings that follow it
    polygon_of_ring = np.cumsum(~interior) - 1
    polygons = shapely.polygons(rings, indices=polygon_of_ring)
    patch_of_polygon = patch_of_ring[~interior]
    shapes = shapely.multipolygons(polygons, indices=patch_of_polygon)
    assert len(shapes) == n
    return shapes, crs, rings, interior


def equal_area(frame) -> pyproj.CRS:
    # as landscape.py computes patch areas: Lambert azimuthal equal-area on WGS 84 centred on
    # the data (built here from its PROJ definition, not with trophoscape's function)
    lon, lat = frame.to_crs(4326).union_all().centroid.coords[0]
    return pyproj.CRS.from_proj4(f"+proj=laea +lat_0={lat} +lon_0={lon} +datum=WGS84 +units=m")


@pytest.mark.parametrize("name", ["odd_run", "demo_run", "replicate_run", "mercator_run"])
def test_polygons_in_the_file_have_the_areas_of_the_geopackage(request, name):
    run = request.getfixturevalue(name)
    shapes, crs, rings, interior = polygons_from_file(run["nc"])
    gpkg = geopandas.read_file(run["out"] / "patches.gpkg", layer="patches")
    if name == "mercator_run":
        # no CF grid mapping for Web Mercator: the nodes are longitude/latitude on WGS 84
        assert crs.equals(gpkg.crs.geodetic_crs) and crs.is_geographic
    else:
        assert crs.equals(gpkg.crs)
    with xr.open_dataset(run["nc"]) as ds:
        assert list(ds["patch_id"].values) == list(gpkg["patch_id"])
        area_km2 = ds["area_km2"].values
    target = equal_area(gpkg)
    from_file = geopandas.GeoSeries(shapes, crs=crs).to_crs(target).area.to_numpy() / 1e6
    from_gpkg = gpkg.geometry.to_crs(target).area.to_numpy() / 1e6
    np.testing.assert_allclose(from_file, from_gpkg, rtol=1e-9)
    np.testing.assert_allclose(from_file, gpkg["area_km2"], rtol=1e-6)
    np.testing.assert_allclose(area_km2, gpkg["area_km2"], rtol=0)
    # the same shapes, not just the same areas: nothing left over either way
    mine = shapely.force_2d(gpkg.geometry.to_crs(crs).values)
    left_over = shapely.area(shapely.symmetric_difference(shapes, mine))
    assert (left_over <= 1e-9 * shapely.area(mine)).all(), left_over
    # CF 1.8 §7.5: exterior rings anticlockwise, interior rings clockwise
    ccw = shapely.is_ccw(rings)
    assert ccw[~interior].all() and not ccw[interior].any()
    holes = shapely.get_num_interior_rings(shapely.get_parts(gpkg.geometry.values)).sum()
    assert interior.sum() == holes


def test_odd_patches_keep_holes_and_parts(odd_run):
    shapes, _, _, interior = polygons_from_file(odd_run["nc"])
    frame = odd_run["frame"]
    assert interior.sum() == 3  # one hole in "Süd", two in "two-holes"
    assert shapely.get_num_geometries(shapes).tolist() == [1, 2, 1, 1, 1]
    # areas of the drawn shapes in their own (equal-area) CRS: squares less their holes
    np.testing.assert_allclose(shapely.area(shapes),
                               [1000**2 - 300**2, 2 * 500**2, 600 * 700 / 2,
                                1200**2 - 2 * 200**2, 800**2], rtol=1e-12)
    np.testing.assert_allclose(shapely.area(shapes), frame.area, rtol=1e-12)


# ---------------------------------------------------------------------- GeoPackage


def ogr_layers(text: str) -> dict:
    """Layer name -> (feature count, CRS) from ``ogrinfo -so -al``."""
    layers = {}
    for block in re.split(r"^Layer name: ", text, flags=re.M)[1:]:
        name = block.splitlines()[0].strip()
        count = int(re.search(r"^Feature Count: (\d+)", block, flags=re.M).group(1))
        wkt = re.search(r"^Layer SRS WKT:\n(.*?)^Data axis to CRS axis mapping",
                        block, flags=re.M | re.S).group(1)
        layers[name] = (count, pyproj.CRS.from_wkt(wkt))
    return layers


@pytest.mark.parametrize("name", ["odd_run", "demo_run", "mercator_run"])
def test_ogrinfo_lists_both_layers_with_crs_and_counts(request, name):
    run = request.getfixturevalue(name)
    exe = required("ogrinfo", "install GDAL's command line tools (Debian: gdal-bin)")
    done = subprocess.run([exe, "-so", "-al", str(run["out"] / "patches.gpkg")],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert "using driver `GPKG'" in done.stdout
    layers = ogr_layers(done.stdout)
    assert set(layers) == {"patches", "links"}
    crs = run["result"].study.landscape.crs
    n_links = len(geopandas.read_file(run["out"] / "patches.gpkg", layer="links"))
    assert layers["patches"][0] == len(run["result"].study.ids)
    assert layers["links"][0] == n_links > 0
    for count, layer_crs in layers.values():
        assert layer_crs.equals(crs)
