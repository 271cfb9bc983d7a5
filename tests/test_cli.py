"""The command line end to end: the bundled demo once, and tiny landscapes of our own.

Every output file of the folder contract (SCENARIO.md, "Output folder") is opened with the
library that reads that format (pyogrio / geopandas, xarray + h5netcdf, json) and checked
against references outside trophoscape: areas against ``pyproj.Geod`` geodesic areas,
links and connected groups against ``networkx`` graphs built from the written links layer,
hashes against ``hashlib``, run settings against the scenario read with ``tomllib``.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import shutil
import stat
import subprocess
import sys
import tomllib
from pathlib import Path

import geopandas
import networkx as nx
import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
import xarray as xr
from pyproj import Geod

import trophoscape
from trophoscape.testing import grid_landscape

ROOT = Path(__file__).resolve().parents[1]
SRC = ROOT / "src"
DATA = ROOT / "data"
DEMO_TOML = DATA / "demo.toml"
GEOD = Geod(ellps="WGS84")
SPECIES = ("prey", "predator")
PER_SPECIES = ("persists", "occupancy", "mean", "cv", "last_extinction", "sync_local",
               "sync_region")
# SCENARIO.md, "Per-patch columns"
COLUMNS = ["patch_id", "area_km2", "links"] + [f"{s}_{c}" for s in SPECIES for c in PER_SPECIES]
CAUTION = "model projections for comparing options, not predictions of real populations"


def run_cli(*args, cwd=None, timeout=300) -> subprocess.CompletedProcess:
    """``python -m trophoscape ARGS`` with src/ first on the path (works installed or not)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(SRC), env.get("PYTHONPATH")]))
    return subprocess.run([sys.executable, "-m", "trophoscape", *map(str, args)], cwd=cwd,
                          env=env, capture_output=True, text=True, timeout=timeout)


def geodesic_area_km2(geometry: dict) -> float:
    # reference: pyproj.Geod.geometry_area_perimeter, geodesic polygon areas on the
    # ellipsoid (Karney 2013, "Algorithms for geodesics", J. Geodesy 87:43, from memory)
    return abs(GEOD.geometry_area_perimeter(shapely.geometry.shape(geometry))[0]) / 1e6


def read_csv(path) -> pd.DataFrame:
    return pd.read_csv(path, dtype={"patch_id": str}).set_index("patch_id")


def as_bool(series: pd.Series) -> np.ndarray:
    """Boolean-like values (True/False, 1/0, 'true'/'false') as bool; anything else fails."""
    text = series.astype(str).str.strip().str.lower()
    assert text.isin(["true", "false", "1", "0"]).all(), series.unique()
    return text.isin(["true", "1"]).to_numpy()


# ------------------------------------------------------------------ the demo, run once


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "demo-out"
    done = run_cli("demo", "--out", out, "--quiet")
    return done, out


@pytest.fixture(scope="module")
def demo_inputs():
    scenario = tomllib.loads(DEMO_TOML.read_text(encoding="utf-8"))
    patches_path = DEMO_TOML.parent / scenario["patches"]["path"]
    features = json.loads(patches_path.read_text(encoding="utf-8"))["features"]
    return scenario, patches_path, features


def test_demo_exits_zero_and_writes_every_file(demo):
    done, out = demo
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    for name in ("patches.gpkg", "patches.csv", "timeseries.nc", "summary.json",
                 "report.html"):
        assert (out / name).is_file() and (out / name).stat().st_size > 0, name
    pngs = sorted((out / "maps").glob("*.png"))
    assert pngs
    for png in pngs:  # PNG signature (ISO/IEC 15948, common practice to check)
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", png.name
    # no staging folder left beside the output
    assert not list(out.parent.glob(f".{out.name}.partial-*"))


def test_demo_geopackage_layers(demo, demo_inputs):
    _, out = demo
    _, _, features = demo_inputs
    layers = dict(pyogrio.list_layers(out / "patches.gpkg"))
    assert {"patches", "links"} <= set(layers)
    assert "Polygon" in layers["patches"] and layers["links"] == "LineString"
    patches = geopandas.read_file(out / "patches.gpkg", layer="patches")
    links = geopandas.read_file(out / "patches.gpkg", layer="links")
    assert len(patches) == len(features)
    assert patches.crs is not None and patches.crs.is_projected
    assert {"source", "target"} <= set(links.columns)
    ids = set(patches["patch_id"])
    assert set(links["source"]) <= ids and set(links["target"]) <= ids


def test_demo_timeseries(demo, demo_inputs):
    _, out = demo
    scenario, _, features = demo_inputs
    ids = [str(f["properties"][scenario["patches"]["id_field"]]) for f in features]
    run = scenario["run"]
    with xr.open_dataset(out / "timeseries.nc", engine="h5netcdf") as ds:
        for s in SPECIES:
            assert ds[s].dims == ("time", "patch")
            assert "units" in ds[s].attrs
            assert np.all(np.isfinite(ds[s].values)) and np.all(ds[s].values >= 0)
            # stored as float32 in compressed chunks (netCDF-4 / HDF5 chunked storage)
            assert ds[s].dtype == np.float32
            chunks = ds[s].encoding["chunksizes"]
            assert chunks is not None and all(1 <= c <= d for c, d in zip(chunks, ds[s].shape))
        # patch_id = the ids of the input file, in the file's order (CF timeseries_id)
        assert [str(p) for p in ds["patch_id"].values] == ids
        assert ds["patch_id"].attrs["cf_role"] == "timeseries_id"
        time = ds["model_time"].values
        assert "units" in ds["model_time"].attrs
    steps = round(run["duration"] / run["census_interval"])
    np.testing.assert_allclose(time, np.arange(steps + 1) * run["census_interval"])


def test_demo_summary_keys(demo, demo_inputs):
    _, out = demo
    scenario, _, features = demo_inputs
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    for key in ("patches", "links", "components", "solver", "provenance"):
        assert key in summary, key
    for s in SPECIES:
        assert 0.0 <= summary[f"{s}_regional_persistence"] <= 1.0
        sync = summary[f"{s}_synchrony"]
        assert sync is None or -1.0 <= sync <= 1.0
    assert summary["patches"] == len(features)
    assert {"method", "nfev", "njev", "status"} <= set(summary["solver"])
    assert summary["solver"]["status"] == 0 and summary["solver"]["nfev"] > 0
    # the evaluation of the local terms, and the earlier name of the key (README, "Changes
    # to the contract"), until it is removed
    assert summary["solver"]["local_terms"] in ("numpy", "compiled")
    assert summary["solver"]["local_kernel"] == summary["solver"]["local_terms"]
    prov = summary["provenance"]
    assert {"version", "scenario_sha256", "input_sha256", "seed", "created"} <= set(prov)
    assert prov["version"] == trophoscape.__version__
    assert prov["seed"] == scenario["run"]["seed"]
    created = dt.datetime.fromisoformat(prov["created"])
    assert created.tzinfo is not None
    assert abs(dt.datetime.now(dt.timezone.utc) - created) < dt.timedelta(hours=1)


def test_demo_provenance_hashes_are_the_files_sha256(demo, demo_inputs):
    # reference: hashlib.sha256 of the files' bytes (FIPS 180-4)
    _, out = demo
    scenario, patches_path, _ = demo_inputs
    prov = json.loads((out / "summary.json").read_text(encoding="utf-8"))["provenance"]
    digest = prov["input_sha256"]
    if isinstance(digest, dict):
        assert digest["patches"] == hashlib.sha256(patches_path.read_bytes()).hexdigest()
        corridors = DEMO_TOML.parent / scenario["dispersal"]["corridors"]
        assert digest["corridors"] == hashlib.sha256(corridors.read_bytes()).hexdigest()
    else:
        assert digest == hashlib.sha256(patches_path.read_bytes()).hexdigest()
    assert prov["scenario_sha256"] == hashlib.sha256(DEMO_TOML.read_bytes()).hexdigest()


def _check_patch_table(table: pd.DataFrame, ids, areas_km2):
    assert list(table.index.astype(str)) == list(ids)
    np.testing.assert_allclose(table["area_km2"].to_numpy(float), areas_km2, rtol=0.01)
    assert (table["area_km2"] > 0).all()
    assert (table["links"] >= 0).all()
    assert np.array_equal(table["links"].to_numpy(), table["links"].to_numpy().round())
    for s in SPECIES:
        occ = table[f"{s}_occupancy"].to_numpy(float)
        assert np.all((occ >= 0) & (occ <= 1))
        persists = as_bool(table[f"{s}_persists"])
        # present at the end means present at the last census after burn-in
        assert np.all(occ[persists] > 0)
        assert np.all(table[f"{s}_mean"].to_numpy(float) >= 0)
        for c in ("sync_local", "sync_region"):
            values = table[f"{s}_{c}"].to_numpy(float)
            ok = ~np.isnan(values)
            assert np.all(np.abs(values[ok]) <= 1 + 1e-9)
        # a patch without links has no local synchrony (SCENARIO.md)
        assert np.all(np.isnan(table[f"{s}_sync_local"].to_numpy(float)[table["links"] == 0]))


def test_demo_per_patch_columns_in_csv_and_gpkg(demo, demo_inputs):
    _, out = demo
    scenario, _, features = demo_inputs
    ids = [str(f["properties"][scenario["patches"]["id_field"]]) for f in features]
    areas = [geodesic_area_km2(f["geometry"]) for f in features]
    csv = read_csv(out / "patches.csv")
    assert [c for c in COLUMNS if c != "patch_id" and c not in csv.columns] == []
    _check_patch_table(csv, ids, areas)
    layer = geopandas.read_file(out / "patches.gpkg", layer="patches")
    assert [c for c in COLUMNS if c not in layer.columns] == []
    layer = layer.set_index("patch_id")
    _check_patch_table(layer, ids, areas)
    # the same numbers in both files
    for col in COLUMNS[1:]:
        a, b = csv[col], layer[col]
        if col.endswith("_persists"):
            assert np.array_equal(as_bool(a), as_bool(b)), col
        else:
            np.testing.assert_allclose(a.to_numpy(float), b.to_numpy(float), rtol=1e-12,
                                       err_msg=col)
    # the user's own attributes travel with the polygons
    assert set(features[0]["properties"]) <= set(layer.columns) | {"patch_id"}


def test_demo_regional_persistence_is_the_mean_of_persists(demo):
    _, out = demo
    csv = read_csv(out / "patches.csv")
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    for s in SPECIES:
        assert summary[f"{s}_regional_persistence"] == pytest.approx(
            as_bool(csv[f"{s}_persists"]).mean(), abs=1e-12)


def test_demo_links_and_components_against_networkx(demo):
    # reference: networkx.number_connected_components on a graph of the written links
    # (Hagberg, Schult & Swart 2008, "Exploring network structure ... using NetworkX")
    _, out = demo
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    links = geopandas.read_file(out / "patches.gpkg", layer="links")
    csv = read_csv(out / "patches.csv")
    graph = nx.Graph()
    graph.add_nodes_from(csv.index)
    graph.add_edges_from(zip(links["source"].astype(str), links["target"].astype(str)))
    assert summary["links"] == len(links) == graph.number_of_edges()  # one row per pair
    assert summary["components"] == nx.number_connected_components(graph)
    degree = dict(graph.degree())
    assert csv["links"].tolist() == [degree[i] for i in csv.index]
    if "isolated_patches" in summary:
        assert summary["isolated_patches"] == sum(d == 0 for d in degree.values())


def test_demo_persistence_columns_agree_with_the_timeseries(demo, demo_inputs):
    # the per-patch table and the NetCDF describe the same run; "after burn-in" is read as
    # census times t >= burn_in
    _, out = demo
    scenario, _, _ = demo_inputs
    burn_in = scenario["run"]["burn_in"]
    # present: at least the quasi-extinction abundance (README, "Quasi-extinction")
    level = scenario["run"]["extinction_abundance"]
    csv = read_csv(out / "patches.csv")
    with xr.open_dataset(out / "timeseries.nc", engine="h5netcdf") as ds:
        after = ds["model_time"].values >= burn_in
        for s in SPECIES:
            x = ds[s].values.astype(np.float64)
            assert np.array_equal(as_bool(csv[f"{s}_persists"]), x[-1] >= level), s
            np.testing.assert_allclose(csv[f"{s}_occupancy"], (x[after] >= level).mean(axis=0),
                                       atol=1e-12, err_msg=s)
            # float32 storage in the NetCDF: agree to single precision
            np.testing.assert_allclose(csv[f"{s}_mean"], x[after].mean(axis=0), rtol=1e-5,
                                       atol=1e-6, err_msg=s)


def test_demo_report_is_self_contained(demo):
    _, out = demo
    text = (out / "report.html").read_text(encoding="utf-8")
    lower = text.lower()
    assert "<html" in lower
    assert CAUTION in " ".join(text.split())
    for external in ('src="http', "src='http", 'src="//', "<link ", "@import", "url(http"):
        assert external not in lower, external
    sources = [chunk.split('"', 1)[0] for chunk in text.split('src="')[1:]]
    assert sources and all(s.startswith("data:") for s in sources)


# ------------------------------------------------------------------ check and --help


def test_check_prints_the_summary_and_creates_nothing(tmp_path, demo):
    scenario = tomllib.loads(DEMO_TOML.read_text(encoding="utf-8"))
    for name in (DEMO_TOML.name, scenario["patches"]["path"],
                 scenario["dispersal"]["corridors"]):
        shutil.copy(DATA / name, tmp_path / name)
    before = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    done = run_cli("check", DEMO_TOML.name, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*")) == before
    n = len(json.loads((tmp_path / scenario["patches"]["path"]).read_text())["features"])
    lines = done.stdout.splitlines()
    assert any(line.split()[:2] == ["patches", str(n)] for line in lines), done.stdout
    # the network it prints is the one the demo run wrote
    links = len(geopandas.read_file(demo[1] / "patches.gpkg", layer="links"))
    assert any(line.split()[:2] == ["links", str(links)] for line in lines), done.stdout


def test_check_of_the_bundled_scenario_runs_from_the_repo():
    done = run_cli("check", "data/demo.toml", cwd=ROOT)
    assert done.returncode == 0, done.stderr
    assert "patches" in done.stdout and "links" in done.stdout


@pytest.mark.parametrize("command", ["run", "check", "demo"])
def test_help_shows_an_example(command):
    done = run_cli(command, "--help")
    assert done.returncode == 0, done.stderr
    assert "example:" in done.stdout
    assert any(line.strip().startswith(f"trophoscape {command} ")
               for line in done.stdout.splitlines()), done.stdout


# ------------------------------------------------------------------ a tiny landscape

LON0, LAT0 = 11.20, 46.30  # invented: four ~1 km squares in a row, 0.5 km apart


def tiny_features(n=4):
    out = []
    for k in range(n):
        x0, y0 = LON0 + 0.02 * k, LAT0
        box = shapely.segmentize(shapely.box(x0, y0, x0 + 0.013, y0 + 0.009), 0.001)
        out.append({"type": "Feature",
                    "properties": {"pid": f"A{k + 1}", "quality": 1.0 - 0.1 * k},
                    "geometry": shapely.geometry.mapping(box)})
    return out


TINY_TOML = """name = "{name}"
[patches]
path = "p.geojson"
id_field = "pid"
quality_field = "quality"
[predation]
attack_rate = 0.3
[dispersal]
max_distance_km = 2.0
[run]
duration = 2
burn_in = 0.5
census_interval = 0.5
"""


def write_tiny(folder: Path, name="tiny") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    doc = {"type": "FeatureCollection", "features": tiny_features()}
    (folder / "p.geojson").write_text(json.dumps(doc), encoding="utf-8")
    path = folder / "s.toml"
    path.write_text(TINY_TOML.format(name=name), encoding="utf-8")
    return path


def test_api_gives_the_same_patch_table_as_the_cli(tmp_path):
    scenario = write_tiny(tmp_path)
    done = run_cli("run", "s.toml", "--out", "cli-out", "--no-maps", "--geojson", "--quiet",
                   cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    cli = read_csv(tmp_path / "cli-out" / "patches.csv")

    result = trophoscape.run_study(trophoscape.load_study(scenario))
    api = result.patches
    assert list(api.index) == list(cli.index) == ["A1", "A2", "A3", "A4"]
    assert list(api.columns) == list(cli.columns)
    for col in api.columns:
        if col.endswith("_persists"):
            assert np.array_equal(api[col].to_numpy(bool), as_bool(cli[col])), col
        else:
            np.testing.assert_allclose(api[col].to_numpy(float), cli[col].to_numpy(float),
                                       rtol=1e-12, err_msg=col)
    # written by the API, the file is the CLI's byte for byte
    trophoscape.write_run(result, tmp_path / "api-out", maps=False)
    assert ((tmp_path / "api-out" / "patches.csv").read_bytes()
            == (tmp_path / "cli-out" / "patches.csv").read_bytes())

    # areas against geodesic areas of the input polygons, and of the --geojson copy
    expected = [geodesic_area_km2(f["geometry"]) for f in tiny_features()]
    np.testing.assert_allclose(cli["area_km2"], expected, rtol=0.01)
    copy = json.loads((tmp_path / "cli-out" / "patches.geojson").read_text())
    np.testing.assert_allclose([geodesic_area_km2(f["geometry"]) for f in copy["features"]],
                               expected, rtol=1e-3)


def test_grid_geopackage_links_follow_the_grid_graph(tmp_path):
    # 2 x 3 squares of 1 km, centres 2 km apart: boundary gaps of 1 km to the side and
    # sqrt(2) km across the diagonal, so a 1.2 km reach links exactly the grid neighbours.
    # reference: networkx.grid_2d_graph
    land = grid_landscape(2, 3, spacing_km=2.0, size_km=1.0)
    land.frame[["row", "col", "geometry"]].to_file(tmp_path / "g.gpkg", layer="patches",
                                                   engine="pyogrio")
    (tmp_path / "s.toml").write_text(
        '[patches]\npath = "g.gpkg"\n[dispersal]\nmax_distance_km = 1.2\n'
        "[run]\nduration = 2\nburn_in = 0.5\ncensus_interval = 0.5\n", encoding="utf-8")
    done = run_cli("run", "s.toml", "--out", "out", "--no-maps", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    csv = read_csv(tmp_path / "out" / "patches.csv")
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    grid = nx.grid_2d_graph(2, 3)
    # ids are the feature order "0".."5", row by row
    assert list(csv.index) == [str(r * 3 + c) for r in range(2) for c in range(3)]
    assert csv["links"].tolist() == [grid.degree[(r, c)] for r in range(2) for c in range(3)]
    assert summary["links"] == grid.number_of_edges()
    assert summary["components"] == nx.number_connected_components(grid)
    assert summary["crs"] == "EPSG:32633"  # a projected file keeps its CRS
    np.testing.assert_allclose(csv["area_km2"], 1.0, rtol=1e-3)  # UTM scale error < 0.1%


def test_second_run_into_the_same_folder_replaces_the_files(tmp_path):
    write_tiny(tmp_path, name="first")
    assert run_cli("run", "s.toml", "--out", "out", "--no-maps", "--quiet",
                   cwd=tmp_path).returncode == 0
    names = sorted(p.relative_to(tmp_path / "out") for p in (tmp_path / "out").rglob("*"))
    write_tiny(tmp_path, name="second")
    done = run_cli("run", "s.toml", "--out", "out", "--no-maps", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["scenario"] == "second"
    with xr.open_dataset(tmp_path / "out" / "timeseries.nc", engine="h5netcdf") as ds:
        assert "second" in ds.attrs["title"]
    assert sorted(p.relative_to(tmp_path / "out")
                  for p in (tmp_path / "out").rglob("*")) == names
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "p.geojson", "s.toml"]


def test_output_folder_has_the_usual_permissions(tmp_path):
    # common practice: a new folder gets 0777 minus the process umask
    write_tiny(tmp_path)
    (tmp_path / "plain").mkdir()
    done = run_cli("run", "s.toml", "--out", "out", "--no-maps", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    mode = stat.S_IMODE((tmp_path / "out").stat().st_mode)
    assert mode == stat.S_IMODE((tmp_path / "plain").stat().st_mode)


def test_scenario_hash_is_the_files_sha256_with_crlf_line_ends(tmp_path):
    # reference: hashlib.sha256 of the file's bytes (FIPS 180-4)
    path = write_tiny(tmp_path)
    path.write_bytes(path.read_bytes().replace(b"\n", b"\r\n"))
    done = run_cli("run", "s.toml", "--out", "out", "--no-maps", "--quiet", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    prov = json.loads((tmp_path / "out" / "summary.json").read_text())["provenance"]
    assert prov["scenario_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()


def test_an_output_folder_that_cannot_be_made_is_an_input_error(tmp_path):
    # a file where the output folder's parent should be: one line, exit code 2, and the
    # error comes before the run, not after it
    blocker = tmp_path / "afile"
    blocker.write_text("not a folder", encoding="utf-8")
    done = run_cli("demo", "--out", blocker / "out", "--quiet")
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert done.stderr.strip().splitlines() == [
        f"error: {blocker / 'out'}: field '--out': cannot create the output folder here "
        "(file exists); give --out a folder that can be created and written to"]
    assert [p.name for p in tmp_path.iterdir()] == ["afile"]
