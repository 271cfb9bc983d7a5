"""The HTML report renders in a real headless browser (Debian's chromium)."""

import os
import shutil
import subprocess

import geopandas
import numpy as np
import pytest
import shapely

import trophoscape as ts
from trophoscape.cli.program import main as cli_main
from trophoscape.report.html import CAUTION
from trophoscape.scenario import parse_scenario
from trophoscape.testing import grid_landscape

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
# CI installs chromium (.ci/run); elsewhere the test is skipped when it is missing
needs_browser = pytest.mark.skipif(CHROMIUM is None and not os.environ.get("CI"),
                                   reason="chromium is not installed")


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    land = grid_landscape(3, 4, spacing_km=1.5, size_km=1.0)
    frame = land.frame.copy()
    frame["quality"] = np.linspace(0.6, 1.4, land.n_patches)
    frame.to_file(folder / "p.gpkg", driver="GPKG", engine="pyogrio")
    sc = parse_scenario({"name": "Report check", "patches": {"path": "p.gpkg",
                                                              "id_field": "patch_id",
                                                              "quality_field": "quality"},
                         "run": {"duration": 60.0, "burn_in": 10.0}}, base_dir=folder)
    result = ts.run_study(ts.build_study(sc))
    ts.write_run(result, folder / "out")
    return folder / "out" / "report.html"


@pytest.fixture(scope="module")
def corridor_report(tmp_path_factory):
    """``trophoscape corridors`` on the same kind of grid, two candidates, nothing removed."""
    folder = tmp_path_factory.mktemp("corridor_report")
    land = grid_landscape(2, 3, spacing_km=1.5, size_km=1.0)
    land.frame.to_file(folder / "p.gpkg", driver="GPKG", engine="pyogrio")
    c = land.centroids
    lines = [shapely.LineString([c[0], c[5]]), shapely.LineString([c[2], c[3]])]
    geopandas.GeoDataFrame({"corridor_id": ["diagonal", "across"], "cost": [2.0, 1.0]},
                           geometry=lines, crs=land.crs).to_file(
        folder / "cand.gpkg", driver="GPKG", engine="pyogrio")
    (folder / "s.toml").write_text('name = "Corridor report check"\n[patches]\n'
                                   'path = "p.gpkg"\nid_field = "patch_id"\n'
                                   "[run]\nduration = 60.0\nburn_in = 10.0\n",
                                   encoding="utf-8")
    assert cli_main(["corridors", str(folder / "s.toml"), "--candidates",
                     str(folder / "cand.gpkg"), "--budget", "2", "--out", str(folder / "out"),
                     "--remove-links", "none", "--remove-patches", "none", "--workers", "1",
                     "--quiet"]) == 0
    return folder / "out" / "report.html"


def test_report_is_self_contained_and_cautious(report):
    text = report.read_text(encoding="utf-8")
    assert CAUTION in text
    assert "Report check" in text
    assert "http://" not in text and "https://" not in text  # nothing fetched from outside
    assert text.count("data:image/png;base64,") >= 8
    # the scenario in plain words, with the article its kernel takes (common practice: English)
    assert ("Dispersal follows an exponential kernel" in text
            or "Dispersal follows a gaussian kernel" in text
            or "Dispersal follows a step kernel" in text), text[:2000]


def test_corridor_report_is_the_run_report_with_a_corridor_section(corridor_report):
    text = corridor_report.read_text(encoding="utf-8")
    assert CAUTION in text and "Corridor report check" in text
    assert "http://" not in text and "https://" not in text
    head, section = text.split('<h2 id="corridors">Corridor planning</h2>')
    assert "Headline results" in head and head.count("data:image/png;base64,") >= 8
    assert section.count("data:image/png;base64,") == 1  # the candidate map (no patch removed)
    assert "<td>diagonal</td>" in section and "<td>across</td>" in section
    assert (corridor_report.parent / "corridors.html").is_file()


@needs_browser
@pytest.mark.parametrize("which", ["report", "corridor_report"])
def test_report_renders_in_headless_chromium(which, request, tmp_path):
    report = request.getfixturevalue(which)
    shot = tmp_path / "report.png"
    profile = tmp_path / "profile"
    subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                    "--no-first-run", "--disable-background-networking",
                    "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
                    "--hide-scrollbars", "--window-size=1200,2400", f"--screenshot={shot}",
                    report.as_uri()], check=True, capture_output=True, timeout=120)
    import matplotlib.image as mpimg

    pixels = mpimg.imread(shot)
    assert pixels.shape[0] == 2400 and pixels.shape[1] == 1200
    # a rendered page with text and figures, not a blank or an error page
    assert pixels[..., :3].std() > 0.05
    assert (pixels[..., :3].mean(axis=2) < 0.5).mean() > 0.01


def test_headline_counts_the_removed_local_populations():
    # consistency test: the row repeats summary.json's quasi_extinction counts
    from trophoscape.report.html import _headline_rows

    summary = {"solver": {"method": "RK45", "nfev": 10},
               "quasi_extinction": {"prey": {"removals": 1535, "individuals_removed": 1535.0},
                                    "predator": {"removals": 66, "individuals_removed": 66.0}}}
    rows = dict(_headline_rows(summary))
    assert rows["local populations removed (quasi-extinction rule)"] == (
        "prey 1,535, predator 66")
    assert not any(k.startswith("local populations") for k in dict(_headline_rows(
        {"solver": summary["solver"]})))


def test_headline_says_when_the_local_equations_ran_compiled():
    from trophoscape.report.html import _headline_rows

    base = {"solver": {"method": "RK45", "nfev": 30125, "local_terms": "numpy"}}
    rows = dict(_headline_rows(base))
    assert rows["solver"] == "RK45, 30125 right-hand-side evaluations"
    base["solver"]["local_terms"] = "compiled"
    assert dict(_headline_rows(base))["solver"] == (
        "RK45, 30125 right-hand-side evaluations, local equations compiled")
