"""Figures: each function writes a readable PNG, and importing the module stays light."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

gpd = pytest.importorskip("geopandas")
xr = pytest.importorskip("xarray")
from shapely.geometry import LineString, box  # noqa: E402

from trophoscape.report import figures as plot
from trophoscape.errors import InputError

SRC = Path(__file__).resolve().parents[1] / "src"


def read_png(path):
    from matplotlib.image import imread

    return imread(path)


@pytest.fixture
def patches():
    """A 4 x 3 grid of 1 km squares, 1 km apart, in UTM zone 32N (EPSG:32632)."""
    x0, y0 = 440_000.0, 5_300_000.0
    squares = [box(x0 + 2000 * i, y0 + 2000 * j, x0 + 2000 * i + 1000, y0 + 2000 * j + 1000)
               for j in range(3) for i in range(4)]
    n = len(squares)
    frame = gpd.GeoDataFrame({
        "patch_id": [f"P{k}" for k in range(n)],
        "prey_mean": np.linspace(5.0, 60.0, n),
        "difference": np.linspace(-3.0, 1.5, n),
        "prey_persists": [bool(k % 3) for k in range(n)],
        "habitat": ["heath", "fen", "scrub"] * (n // 3),
    }, geometry=squares, crs="EPSG:32632")
    frame.loc[2, "prey_mean"] = np.nan
    return frame


def test_patch_map_boolean_with_missing(tmp_path, patches):
    flags = patches["prey_persists"].astype(object)
    flags.iloc[0] = np.nan
    for column in (flags, flags.astype("boolean")):
        frame = patches.assign(prey_persists=column)
        out = plot.patch_map(frame, "prey_persists", path=tmp_path / "b.png")
        assert_png(out)


@pytest.fixture
def links(patches):
    c = patches.geometry.centroid
    lines = [LineString([c[i], c[i + 1]]) for i in range(len(c) - 1)]
    return gpd.GeoDataFrame({"source": range(len(lines))}, geometry=lines, crs=patches.crs)


@pytest.fixture
def dataset():
    time = np.arange(0.0, 100.5, 0.5)
    ids = [f"P{k}" for k in range(12)]
    phase = np.linspace(0.0, np.pi, len(ids))
    prey = 50.0 + 40.0 * np.sin(0.3 * time[:, None] + phase[None, :])
    predator = 10.0 + 8.0 * np.sin(0.3 * time[:, None] + phase[None, :] - 1.0)
    predator[time > 70.0, 3:] = 0.0  # predator lost in most patches late on
    return xr.Dataset(
        {"prey": (("time", "patch"), prey), "predator": (("time", "patch"), predator)},
        coords={"time": time, "patch": ids})


def assert_png(path):
    # A PNG file starts with these 8 bytes (PNG specification, W3C 2003, section 5.2).
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    image = read_png(path)
    assert image.ndim == 3 and image.shape[0] > 100 and image.shape[1] > 100
    # Not a blank canvas: some pixels differ from the first one.
    assert np.ptp(image[..., :3]) > 0.1


@pytest.mark.parametrize("column, options", [
    ("prey_mean", {"label": "mean prey abundance (individuals)"}),
    ("difference", {"diverging": True, "label": "change (individuals)"}),
    ("prey_persists", {"title": "Prey present at the end"}),
    ("habitat", {"label": "habitat"}),
])
def test_patch_map_writes_png(tmp_path, patches, links, column, options):
    out = plot.patch_map(patches, column, path=tmp_path / f"{column}.png", links=links, **options)
    assert out == tmp_path / f"{column}.png"
    assert_png(out)
    # Written atomically: no temporary file left beside it.
    assert sorted(p.name for p in tmp_path.iterdir()) == [f"{column}.png"]


def test_patch_map_size_follows_dpi(tmp_path, patches):
    # savefig at 150 dpi: pixels = inches x dpi (matplotlib documentation, savefig "dpi").
    out = plot.patch_map(patches, "prey_mean", path=tmp_path / "m.png")
    image = read_png(out)
    assert image.shape[1] == round(7.5 * plot.DPI)


def test_patch_map_rejects_lon_lat(tmp_path, patches):
    with pytest.raises(InputError, match="projected"):
        plot.patch_map(patches.to_crs("EPSG:4326"), "prey_mean", path=tmp_path / "m.png")
    assert not list(tmp_path.iterdir())


def test_patch_map_rejects_unknown_column(tmp_path, patches):
    with pytest.raises(InputError, match="no such column") as caught:
        plot.patch_map(patches, "prey_men", path=tmp_path / "m.png")
    assert caught.value.field == "prey_men"


def test_nice_scale_length():
    # 1-2-5 series of round lengths (common practice in map making).
    assert plot._nice_length(30.0) == 5.0
    assert plot._nice_length(12.0) == 2.0
    assert plot._nice_length(4.0) == 0.5


def test_timeseries_panels(tmp_path, dataset):
    out = plot.timeseries_panels(dataset, ["P0", "P4", "P7"], path=tmp_path / "ts.png",
                                 burn_in=20.0)
    assert_png(out)


def test_timeseries_panels_uses_first_replicate(tmp_path, dataset):
    stacked = xr.concat([dataset, dataset * 2.0], dim="replicate").transpose(
        "time", "patch", "replicate")
    out = plot.timeseries_panels(stacked, ["P1"], path=tmp_path / "ts.png", time_unit="month")
    assert_png(out)


def test_timeseries_panels_rejects_bad_ids(tmp_path, dataset):
    with pytest.raises(InputError, match="P99"):
        plot.timeseries_panels(dataset, ["P0", "P99"], path=tmp_path / "ts.png")
    with pytest.raises(InputError, match="1 to 6"):
        plot.timeseries_panels(dataset, [f"P{k}" for k in range(7)], path=tmp_path / "ts.png")


def test_occupancy_curve(tmp_path, dataset):
    out = plot.occupancy_curve(dataset, path=tmp_path / "occ.png")
    assert_png(out)


def test_occupancy_curve_counts_presence_as_the_persistence_figures_do(tmp_path, dataset,
                                                                      monkeypatch):
    # consistency test against trophoscape.analysis.persistence.occupancy_curve: immigrants
    # gathering below the extinction abundance (0.5 predators) do not make a patch occupied
    from matplotlib.axes import Axes

    from trophoscape.analysis.persistence import occupancy_curve

    dataset = dataset.copy(deep=True)
    dataset["predator"].values[dataset["time"].values > 70.0, 3:] = 0.5
    drawn = {}
    real = Axes.plot

    def capture(self, x, y, *args, label=None, **kwargs):
        drawn[label] = np.asarray(y)
        return real(self, x, y, *args, label=label, **kwargs)

    monkeypatch.setattr(Axes, "plot", capture)
    out = plot.occupancy_curve(dataset, path=tmp_path / "occ.png", extinction_abundance=1.0,
                               burn_in=20.0)
    assert_png(out)
    expected = occupancy_curve(dataset, extinction_abundance=1.0)
    for s in ("prey", "predator"):
        np.testing.assert_allclose(drawn[s], expected[s].to_numpy())
    assert drawn["predator"][-1] == pytest.approx(3 / 12)


def test_occupancy_curve_needs_both_species(tmp_path, dataset):
    with pytest.raises(InputError, match="predator"):
        plot.occupancy_curve(dataset.drop_vars("predator"), path=tmp_path / "occ.png")


def test_import_does_not_load_matplotlib():
    # Optional heavy packages stay unloaded until used (geopandas tests/test_api.py does the
    # same check for its optional dependencies; common practice).
    env = dict(os.environ, PYTHONPATH=str(SRC))
    code = "import trophoscape.report.figures, sys; print('matplotlib' in sys.modules)"
    result = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                            text=True, check=True)
    assert result.stdout.strip() == "False"


def test_does_not_touch_pyplot_backend(tmp_path, patches):
    # Drawing on a bare Figure leaves pyplot unimported (so a notebook keeps its backend).
    env = dict(os.environ, PYTHONPATH=str(SRC))
    code = ("import sys, geopandas as gpd; from shapely.geometry import box;"
            "from trophoscape.report.figures import patch_map;"
            "g = gpd.GeoDataFrame({'v': [1.0, 2.0]}, geometry=[box(0, 0, 1e3, 1e3),"
            " box(2e3, 0, 3e3, 1e3)], crs='EPSG:32632');"
            f"patch_map(g, 'v', path={str(tmp_path / 'm.png')!r});"
            "print('matplotlib.pyplot' in sys.modules)")
    result = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                            text=True, check=True)
    assert result.stdout.strip() == "False"


def test_isolines_are_drawn(tmp_path):
    # isochrones: contour lines over the patch centroids change the picture (common practice)
    import matplotlib.image as mpimg

    from trophoscape.testing import grid_landscape

    land = grid_landscape(5, 6, spacing_km=1.5, size_km=1.0)
    frame = land.frame[["patch_id", "geometry"]].copy()
    frame["arrival_time"] = np.hypot(*(land.centroids - land.centroids[0]).T) / 1000.0
    from trophoscape.report.figures import patch_map

    plain = patch_map(frame, "arrival_time", path=tmp_path / "plain.png")
    lines = patch_map(frame, "arrival_time", path=tmp_path / "lines.png", isolines=4)
    a, b = mpimg.imread(plain), mpimg.imread(lines)
    assert a.shape == b.shape
    assert np.abs(a - b).max() > 0.2


def _drawn_texts(monkeypatch):
    """Collect every text a map draws (monkeypatched around the saving step)."""
    import matplotlib.text

    import trophoscape.report.figures as plot

    texts, save = [], plot._save

    def keep(fig, path):
        texts.extend(t.get_text() for t in fig.findobj(matplotlib.text.Text))
        return save(fig, path)

    monkeypatch.setattr(plot, "_save", keep)
    return texts


def test_constant_map_says_so_and_labels_no_extremes(tmp_path, monkeypatch):
    # values equal up to rounding: one tick "(every patch)", no offset such as "1e-9+9.97e-1",
    # and no "highest"/"lowest" labels that would single out a rounding error
    from trophoscape.report.figures import patch_map
    from trophoscape.testing import grid_landscape

    land = grid_landscape(2, 3, spacing_km=1.5, size_km=1.0)
    frame = land.frame[["patch_id", "geometry"]].copy()
    frame["share"] = 1.0 + np.array([0.0, 1e-12, -1e-12, 0.0, 0.0, 0.0])
    texts = _drawn_texts(monkeypatch)
    patch_map(frame, "share", path=tmp_path / "c.png")
    assert "1 (every patch)" in texts
    assert not any("highest" in t or "lowest" in t or "e-" in t for t in texts)
    texts.clear()
    frame["share"] = [-0.0, 0.5, 0.2, 0.3, 0.1, 0.4]
    patch_map(frame, "share", path=tmp_path / "z.png")
    lowest = [t for t in texts if "lowest" in t]
    assert lowest == [f"{frame['patch_id'].iloc[0]} (lowest: 0)"]
    assert any("highest: 0.5" in t for t in texts)
    texts.clear()
    frame["share"] = [2.5, np.nan, np.nan, np.nan, np.nan, np.nan]  # one patch with a value
    patch_map(frame, "share", path=tmp_path / "one.png")
    assert "2.5 (every patch with a value)" in texts


def test_empty_synchrony_charts_say_why(tmp_path, monkeypatch):
    # when every series is constant or extinct there is nothing to draw: the chart says so
    import pandas as pd
    import xarray as xr

    from trophoscape.report.figures import kuramoto_plot, synchrony_distance_plot

    texts = _drawn_texts(monkeypatch)
    empty = pd.DataFrame({"distance_km": [0.5], "correlation": [np.nan], "low": [np.nan],
                          "high": [np.nan], "pairs": [0]})
    synchrony_distance_plot({"prey": empty}, path=tmp_path / "d.png")
    assert any("no pair of patches" in t for t in texts)
    texts.clear()
    r = xr.DataArray(np.full(5, np.nan), dims=("time",), coords={"time": np.arange(5.0)})
    kuramoto_plot({"prey": r}, path=tmp_path / "k.png")
    assert any("no phases to compare" in t for t in texts)
    texts.clear()
    kuramoto_plot({"prey": r.fillna(0.5)}, path=tmp_path / "k2.png")
    assert not any("no phases" in t for t in texts)


# ------------------------------------------------------------------ maps of many patches


def _awkward_patches():
    """Squares, a square with a hole, a two-part patch, a patch smaller than a raster cell
    and an empty geometry, in UTM zone 32N (EPSG:32632)."""
    from shapely.geometry import MultiPolygon, Polygon

    x0, y0 = 440_000.0, 5_300_000.0
    holed = Polygon(box(x0, y0, x0 + 3000, y0 + 3000).exterior.coords,
                    [box(x0 + 1000, y0 + 1000, x0 + 2000, y0 + 2000).exterior.coords])
    parts = MultiPolygon([box(x0 + 4000, y0, x0 + 5000, y0 + 1000),
                          box(x0 + 4000, y0 + 2000, x0 + 5000, y0 + 3000)])
    tiny = box(x0 + 6000, y0 + 100, x0 + 6002, y0 + 102)  # 2 m across
    squares = [box(x0 + 6000 + 1500 * k, y0 + 1500, x0 + 7000 + 1500 * k, y0 + 2500)
               for k in range(3)]
    geoms = [holed, parts, tiny, Polygon(), *squares]
    return gpd.GeoDataFrame({"patch_id": [f"Q{k}" for k in range(len(geoms))],
                             "v": np.arange(len(geoms), dtype=float)},
                            geometry=geoms, crs="EPSG:32632")


def test_vector_paths_are_the_rings_of_each_patch():
    # consistency test: the paths built for all patches at once hold each patch's rings as
    # shapely gives them one patch at a time (outer counterclockwise, holes clockwise), in km
    import shapely
    from matplotlib.path import Path as MplPath

    frame = _awkward_patches()
    paths = plot.MapCanvas(frame, raster=False).paths()
    assert len(paths) == len(frame)
    oriented = shapely.orient_polygons(frame.geometry.values, exterior_cw=False)
    for geom, path in zip(oriented, paths):
        if geom.is_empty:
            assert len(path.vertices) == 1
            continue
        rings = [r for part in getattr(geom, "geoms", [geom])
                 for r in (part.exterior, *part.interiors)]
        want = np.concatenate([np.asarray(r.coords) for r in rings]) / 1e3
        np.testing.assert_array_equal(path.vertices, want)
        assert (path.codes == MplPath.MOVETO).sum() == len(rings)
        assert (path.codes == MplPath.CLOSEPOLY).sum() == len(rings)


def test_raster_cells_belong_to_the_patch_shapely_puts_them_in(monkeypatch):
    # the rasterised patches against shapely's point-in-polygon test (the outside
    # reference) at every cell centre; a patch smaller than a cell still has its cell;
    # links mark the cells they cross
    import shapely

    monkeypatch.setattr(plot, "RASTER_CELLS", 120)
    frame = _awkward_patches()
    line = gpd.GeoDataFrame(geometry=[LineString([(441_000, 5_302_710), (449_030, 5_302_710),
                                                  (449_030, 5_310_000)])], crs="EPSG:32632")
    canvas = plot.MapCanvas(frame, line, raster=True)
    labels, lines, (left, right, bottom, top) = canvas.grid()
    h, w = labels.shape
    cx = (left + (np.arange(w) + 0.5) * (right - left) / w) * 1e3
    cy = (top - (np.arange(h) + 0.5) * (top - bottom) / h) * 1e3
    X, Y = np.meshgrid(cx, cy)
    tiny = 2
    for k, geom in enumerate(frame.geometry.values):
        inside = shapely.contains_xy(geom, X, Y) if not geom.is_empty else np.zeros_like(X, bool)
        if k == tiny:
            assert (labels == k + 1).sum() == 1 and not inside.any()
            continue
        disagree = (labels == k + 1) != inside
        assert disagree.sum() <= 0.01 * max(inside.sum(), 1), k  # centres on an edge only
    assert not (labels == 4).any()  # the empty geometry has no cell
    # the horizontal part fills its row; the vertical part runs up from it to the map's
    # edge (beyond it, off the map); nothing below
    size = (top - bottom) * 1e3 / h
    row = int(np.argmin(abs(cy - 5_302_710)))
    assert lines[row].sum() >= 0.9 * 8_000 / size
    assert not lines[cy < 5_302_710 - size].any()
    assert lines[:row, int(np.argmin(abs(cx - 449_030)))].all()


def test_a_raster_map_colours_each_patch_as_the_vector_map_does(tmp_path):
    # consistency test between the two ways of drawing: at the centre of a large patch the
    # raster map and the vector map show the same colour
    frame = _awkward_patches()
    got = {}
    for raster in (False, True):
        path = plot.patch_map(frame, "v", path=tmp_path / f"m{raster}.png",
                              canvas=plot.MapCanvas(frame, raster=raster))
        got[raster] = read_png(path)
    assert got[False].shape == got[True].shape
    # the two-part patch's lower square: the same pixel in both (the axes are the same)
    import matplotlib

    colour = matplotlib.colormaps["viridis"](1 / 6)[:3]
    for image in got.values():
        near = np.all(np.abs(image[..., :3] - colour) < 0.02, axis=-1)
        assert near.sum() > 100
    a = np.all(np.abs(got[False][..., :3] - colour) < 0.02, axis=-1)
    b = np.all(np.abs(got[True][..., :3] - colour) < 0.02, axis=-1)
    assert (a & b).sum() > 0.8 * min(a.sum(), b.sum())


def test_size_classes_hold_equal_numbers_of_patches_and_their_shares(tmp_path):
    # consistency test against a direct count: quintiles of area, the share of patches
    # with the flag in each, unknown flags left out
    rng = np.random.default_rng(3)
    area = rng.lognormal(0.0, 1.0, 500)
    flags = (rng.uniform(size=500) < np.clip(area / area.max() * 3, 0, 1)).astype(float)
    flags[:7] = np.nan
    edges, shares, counts = plot.size_class_shares(area, flags, classes=5)
    assert edges.size == 6 and edges[0] == area.min() and edges[-1] == area.max()
    for k in range(5):
        inside = (area >= edges[k]) & ((area < edges[k + 1]) if k < 4 else (area <= edges[5]))
        known = inside & np.isfinite(flags)
        assert counts[k] == known.sum()
        assert shares[k] == pytest.approx(flags[known].mean())
    assert abs(counts.sum() - 493) == 0
    # the axis labels count every patch of a class, whatever a species' unknown values
    labels = plot.size_class_labels(area, classes=5)
    assert [int(t.split("(")[1].split()[0]) for t in labels] == [100] * 5
    assert labels[0].startswith(f"{area.min():.3g}–")
    path = plot.size_class_plot(area, {"prey": flags, "predator": 1 - np.nan_to_num(flags)},
                                path=tmp_path / "s.png")
    assert read_png(path).shape[0] > 100


def test_a_corridor_map_on_a_shared_canvas_is_the_same_map(patches, tmp_path):
    # consistency test: the corridor map drawn on a canvas prepared once (as `corridors`
    # shares it with the map of critical patches) is pixel for pixel the one drawn alone; a
    # canvas of other patches is refused
    cx, cy = 440_500.0, 5_300_500.0
    candidates = gpd.GeoDataFrame(
        {"v": [1.0, np.nan]},
        geometry=[LineString([(cx, cy), (cx + 2000, cy)]),
                  LineString([(cx, cy), (cx, cy + 2000)])], crs="EPSG:32632")
    alone = plot.corridor_map(patches, candidates, "v", path=tmp_path / "a.png",
                              chosen=[True, False])
    shared = plot.corridor_map(patches, candidates, "v", path=tmp_path / "b.png",
                               chosen=[True, False], canvas=plot.MapCanvas(patches))
    np.testing.assert_array_equal(read_png(alone), read_png(shared))
    with pytest.raises(ValueError, match="other patches"):
        plot.corridor_map(patches, candidates, "v", path=tmp_path / "c.png",
                          canvas=plot.MapCanvas(patches.iloc[:3]))


def test_a_map_of_many_classes_colours_the_largest_and_groups_the_rest(tmp_path, monkeypatch):
    # 300 synchrony-like groups: the legend names the 19 largest and one entry for the rest
    # (a legend of 300 entries took most of a 100,000-patch report's drawing time)
    from matplotlib.figure import Figure

    from trophoscape.report.figures import MAX_CLASSES, patch_map
    from trophoscape.testing import grid_landscape

    land = grid_landscape(20, 20, spacing_km=1.5, size_km=1.0)
    frame = land.frame[["patch_id", "geometry"]].copy()
    groups = np.arange(400) % 300  # groups 0-99 hold two patches, 100-299 one
    frame["group"] = [f"group {g}" for g in groups]
    seen = {}
    legend = Figure.legend

    def spy(self, *args, **kwargs):
        seen["labels"] = [h.get_label() for h in kwargs["handles"]]
        return legend(self, *args, **kwargs)

    monkeypatch.setattr(Figure, "legend", spy)
    patch_map(frame, "group", path=tmp_path / "g.png", categorical=True)
    labels = seen["labels"]
    assert len(labels) == MAX_CLASSES
    assert labels[-1] == "281 more, each smaller"
    # the coloured ones are among the largest (two patches each), by name
    assert labels[:-1] == sorted(f"group {g}" for g in range(100))[:MAX_CLASSES - 1]
