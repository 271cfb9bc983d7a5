"""User text is shown literally: never parsed as maths in a figure, always escaped in a page.

Patch ids, the time unit, scenario names, corridor ids and sweep values come from the user's
files. In a figure, matplotlib treats text between two ``$`` as mathtext ("Writing
mathematical expressions" in the matplotlib docs), so "$x^2$" would be drawn as maths and
"$x^$" raise a ParseException; in a page, ``<``, ``&`` and quotes are markup (HTML Living
Standard; Python's :func:`html.escape` escapes them).

How a figure is checked: every string the Agg renderer is asked to draw is recorded (a spy on
``RendererAgg.draw_text``, which receives each line after matplotlib's maths preprocessing,
with ``ismath`` telling whether mathtext lays it out). A user string is shown literally when
the renderer draws exactly that string as plain text, and no mathtext drawn holds it.
"""

import html
import os
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import geopandas
import numpy as np
import pandas as pd
import pytest
import shapely

import trophoscape as ts
from trophoscape.cli.program import main as cli_main
from trophoscape.scenario import parse_scenario
from trophoscape.testing import grid_landscape

SRC = Path(__file__).resolve().parents[1] / "src"

# One id per kind of trouble: mathtext, a TeX command, markup, an entity, a quote, one dollar.
IDS = ["$x^2$", "\\alpha", "<script>alert(1)</script>", '&amp; "q" cost$5']
TIME_UNIT = "$x^2$ \\alpha"
NAME = 'Study $x^2$ \\alpha <script>alert(1)</script> &amp; "q"'
# fragments of the user text above; mathtext holding any of them means user text was parsed
MARKERS = ("x^2", "alpha", "script", "amp", "cost")


# ------------------------------------------------------------------------------- helpers


class Drawn(list):
    """(string, ismath) for every line the Agg renderer drew."""

    def plain(self):
        return {s for s, math in self if not math}

    def maths(self):
        return [s for s, math in self if math]


def spy_on_renderer(monkeypatch) -> Drawn:
    from matplotlib.backends.backend_agg import RendererAgg

    drawn, original = Drawn(), RendererAgg.draw_text

    def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
        drawn.append((s, bool(ismath)))
        return original(self, gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)

    monkeypatch.setattr(RendererAgg, "draw_text", draw_text)
    return drawn


def assert_literal(drawn: Drawn, expected):
    missing = [e for e in expected if e not in drawn.plain()]
    assert not missing, f"not drawn as plain text: {missing}; drawn: {sorted(drawn.plain())}"
    parsed = [s for s in drawn.maths() if any(m in s for m in MARKERS)]
    assert not parsed, f"user text laid out as mathtext: {parsed}"


class Page(HTMLParser):
    """Tags and the text of chosen elements, as an HTML parser reads the page (Python's
    html.parser unescapes character references as the HTML standard says)."""

    def __init__(self, text):
        super().__init__(convert_charrefs=True)
        self.tags, self.attrs, self.texts, self._open = [], [], {}, []
        self.feed(text)
        self.close()

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs += [v for _, v in attrs if v is not None]
        if tag not in ("img", "meta"):  # void elements have no end tag
            self._open.append(tag)

    def handle_endtag(self, tag):
        if self._open and self._open[-1] == tag:
            self._open.pop()

    def handle_data(self, data):
        if self._open:
            self.texts.setdefault(self._open[-1], []).append(data)

    def text(self, tag):
        return "".join(self.texts.get(tag, []))


ALLOWED_TAGS = {"html", "head", "meta", "title", "style", "body", "h1", "h2", "h3", "p",
                "small", "strong", "div", "table", "caption", "thead", "tbody", "tr", "th",
                "td", "figure", "img", "figcaption", "ul", "li", "a"}


def assert_page_is_safe(text):
    assert "<script" not in text.lower()
    assert "<script>alert(1)</script>" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text  # html.escape of the user text
    page = Page(text)
    assert set(page.tags) <= ALLOWED_TAGS, set(page.tags) - ALLOWED_TAGS
    assert not any(a.lower().lstrip().startswith("javascript:") for a in page.attrs)
    return page


def hostile_patches(folder, rows=2, cols=2, name="p.gpkg"):
    land = grid_landscape(rows, cols, spacing_km=1.5, size_km=1.0)
    frame = land.frame[["geometry"]].copy()
    frame["pid"] = IDS[: len(frame)]
    path = folder / name
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    return land, path


def hostile_scenario(path, *, name=NAME, duration=6.0):
    return parse_scenario({
        "name": name, "time_unit": TIME_UNIT,
        "patches": {"path": path.name, "id_field": "pid"},
        "run": {"duration": duration, "burn_in": 2.0, "census_interval": 0.5, "seed": 7},
        "analysis": {"stability": False}}, base_dir=path.parent)


# ----------------------------------------------------------------------- a run's outputs


@pytest.fixture(scope="module")
def run_outputs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("literal_run")
    _, path = hostile_patches(folder)
    result = ts.run_study(ts.build_study(hostile_scenario(path)))
    with pytest.MonkeyPatch.context() as mp:
        drawn = spy_on_renderer(mp)
        ts.write_run(result, folder / "out")
    return folder / "out", drawn


def test_run_maps_draw_ids_and_time_unit_literally(run_outputs):
    out, drawn = run_outputs
    assert len(list((out / "maps").glob("*.png"))) >= 8
    # the time series panels are titled by patch id (4 patches: every one has a panel),
    # and every chart over time names the time unit
    assert_literal(drawn, [f"patch {pid}" for pid in IDS] + [f"time ({TIME_UNIT})"])
    # the renderer still lays out matplotlib's own maths (the symlog ticks 10^0, 10^1)
    assert any("10^" in s for s in drawn.maths())


def test_run_report_escapes_name_and_time_unit(run_outputs):
    out, _ = run_outputs
    text = (out / "report.html").read_text(encoding="utf-8")
    page = assert_page_is_safe(text)
    assert f"<h1>{html.escape(NAME)}</h1>" in text
    assert "&amp;amp; &quot;q&quot;" in text  # the entity and the quote are text, not markup
    # read back by an HTML parser, the page says exactly what the user wrote
    assert page.text("h1") == NAME
    assert page.text("title").startswith(NAME)
    assert f"per {TIME_UNIT}" in page.text("p")


# -------------------------------------------------------------------- drawing functions


@pytest.mark.parametrize("unit", [
    "$x^2$", "$x^$",            # mathtext; a ParseException if parsed
    "cost$5", "$", "$$",        # one dollar (matplotlib shows it as is), an empty formula
    "\\$x$", "a\\", "\\\\$\\frac$",  # backslashes before and after dollars
    "<b>&amp;</b> \"q\" 'q'"])
def test_time_unit_is_drawn_as_written(tmp_path, monkeypatch, unit):
    import xarray as xr

    from trophoscape.report.figures import occupancy_curve

    x = np.array([[5.0, 0.0], [3.0, 1.0], [0.0, 2.0]])  # (time, patch)
    data = xr.Dataset({"prey": (("time", "patch"), x), "predator": (("time", "patch"), x)},
                      coords={"time": [0.0, 1.0, 2.0], "patch": ["a", "b"]})
    drawn = spy_on_renderer(monkeypatch)
    path = occupancy_curve(data, path=tmp_path / "o.png", time_unit=unit)
    assert path.stat().st_size > 0
    assert f"time ({unit})" in drawn.plain()
    assert not drawn.maths()  # nothing in this chart is maths


def test_classes_legend_title_and_extremes_are_drawn_as_written(tmp_path, monkeypatch):
    from trophoscape.report.figures import patch_map

    land = grid_landscape(2, 2, spacing_km=1.5, size_km=1.0)
    frame = land.frame[["geometry"]].copy()
    frame["patch_id"] = IDS
    frame["kind"] = ["$a$", "$a$", "\\beta $b$", np.nan]
    frame["value"] = [1.0, 2.0, 3.0, 4.0]
    drawn = spy_on_renderer(monkeypatch)
    patch_map(frame, "kind", path=tmp_path / "k.png", title="Kinds of $x^2$",
              label="kind ($)")
    patch_map(frame, "value", path=tmp_path / "v.png", title=NAME, label=TIME_UNIT)
    assert_literal(drawn, ["$a$", "\\beta $b$", "Kinds of $x^2$", "kind ($)", NAME,
                           TIME_UNIT, f"{IDS[3]} (highest: 4)", f"{IDS[0]} (lowest: 1)"])


def test_sweep_values_and_keys_are_drawn_as_written(tmp_path, monkeypatch):
    from trophoscape.report.figures import sweep_plot

    files = ["a$x^2$.gpkg", "b$.gpkg", "<c>&amp;.gpkg"]
    table = pd.DataFrame({"patches.path": files * 2,
                          "prey.growth_rate": [0.5] * 3 + [1.5] * 3,
                          "predator_regional_persistence": np.linspace(0.1, 0.6, 6)})
    drawn = spy_on_renderer(monkeypatch)
    sweep_plot(table, "predator_regional_persistence", "patches.path",
               group_by=["prey.growth_rate"], path=tmp_path / "s.png")
    sweep_plot(table.assign(**{"prey.growth_rate": ["$x$", "$y$"] * 3}),
               "predator_regional_persistence", "patches.path",
               group_by=["prey.growth_rate"], path=tmp_path / "t.png")
    assert_literal(drawn, [*files, "prey.growth_rate = $x$", "prey.growth_rate = $y$"])


def test_spread_and_corridor_charts_draw_user_text_as_written(tmp_path, monkeypatch):
    from trophoscape.report.figures import arrival_distance_plot, corridor_map

    drawn = spy_on_renderer(monkeypatch)
    arrival_distance_plot([0.0, 1.0, 2.0, 3.0], [1.0, 2.0, 3.5, 4.0], path=tmp_path / "a.png",
                          speed=1.0, interval=(0.8, 1.2), shock_time=0.5, time_unit=TIME_UNIT,
                          title=NAME)
    land = grid_landscape(1, 3, spacing_km=1.5, size_km=1.0)
    c = land.centroids
    candidates = geopandas.GeoDataFrame(
        {"v": [1.0, 2.0]}, geometry=[shapely.LineString([c[0], c[1]]),
                                     shapely.LineString([c[1], c[2]])], crs=land.crs)
    corridor_map(land.frame, candidates, "v", path=tmp_path / "c.png", chosen=[True, False],
                 title="$x^2$ corridors", label="gain per $")
    assert_literal(drawn, [f"arrival time ({TIME_UNIT})", NAME,
                           f"front speed 1 km/{TIME_UNIT}", "$x^2$ corridors", "gain per $"])


def test_usetex_in_the_users_settings_does_not_reach_user_text(tmp_path, monkeypatch):
    # a matplotlibrc with text.usetex = True would hand every label to LaTeX (where "$", "\"
    # and "&" are markup); the figures are drawn by matplotlib itself whatever it says
    import matplotlib

    from trophoscape.report.figures import arrival_distance_plot

    drawn = spy_on_renderer(monkeypatch)
    with matplotlib.rc_context({"text.usetex": True}):
        arrival_distance_plot([0.0, 1.0], [1.0, 2.0], path=tmp_path / "a.png",
                              time_unit=TIME_UNIT, title=NAME)
        assert matplotlib.rcParams["text.usetex"]  # the caller's setting is left as it was
    assert_literal(drawn, [NAME, f"arrival time ({TIME_UNIT})"])


# ----------------------------------------------------------------- corridors and compare


def test_corridor_ids_are_escaped_in_the_pages_and_drawn_as_written(tmp_path, monkeypatch):
    land, path = hostile_patches(tmp_path, rows=1, cols=3)
    c = land.centroids
    ids = ["<script>alert(1)</script>", "$x^2$ &amp; \"q\""]
    geopandas.GeoDataFrame({"corridor_id": ids, "cost": [1.0, 1.0]},
                           geometry=[shapely.LineString([c[0], c[2]]),
                                     shapely.LineString([c[0], c[1]])],
                           crs=land.crs).to_file(tmp_path / "cand.gpkg", driver="GPKG",
                                                 engine="pyogrio")
    (tmp_path / "s.toml").write_text(
        "name = 'Corridors $x^2$ <script>alert(1)</script>'\n"
        "time_unit = 'yr$'\n"
        "[patches]\npath = 'p.gpkg'\nid_field = 'pid'\n"
        "[run]\nduration = 4.0\nburn_in = 1.0\ncensus_interval = 0.5\n"
        "[analysis]\nstability = false\ncapacity = false\n", encoding="utf-8")
    drawn = spy_on_renderer(monkeypatch)
    assert cli_main(["corridors", str(tmp_path / "s.toml"), "--candidates",
                     str(tmp_path / "cand.gpkg"), "--budget", "2", "--out",
                     str(tmp_path / "out"), "--remove-links", "none", "--remove-patches",
                     "none", "--workers", "1", "--quiet"]) == 0
    for page in ("corridors.html", "report.html"):
        text = (tmp_path / "out" / page).read_text(encoding="utf-8")
        assert_page_is_safe(text)
        assert f"<td>{html.escape(ids[1])}</td>" in text  # the ranking table
        cells = Page(text).texts.get("td", [])
        assert ids[0] in cells and ids[1] in cells  # read back as the user wrote them
    assert_literal(drawn, [f"patch {pid}" for pid in IDS[:3]] + ["time (yr$)"])


def test_scenario_names_are_escaped_in_the_comparison_and_drawn_as_written(tmp_path,
                                                                         monkeypatch):
    from trophoscape.report.corridors import write_comparison

    _, path = hostile_patches(tmp_path)
    names = [NAME, "B $y$ & <i>"]
    results = [ts.run_study(ts.build_study(hostile_scenario(path, name=n, duration=4.0)))
               for n in names]
    drawn = spy_on_renderer(monkeypatch)
    write_comparison(results, tmp_path / "cmp", columns=("prey_occupancy",), runs=False)
    text = (tmp_path / "cmp" / "report.html").read_text(encoding="utf-8")
    page = assert_page_is_safe(text)
    assert "<i>" not in text and "&lt;i&gt;" in text
    assert names[0] in page.text("th") and names[1] in page.text("th")
    assert_literal(drawn, [f"prey occupancy: {names[1]} − {names[0]}"])


# ------------------------------------------------------------------------ the command line


def test_run_command_with_dollar_ids_writes_its_maps(tmp_path):
    land = grid_landscape(1, 3, spacing_km=1.5, size_km=1.0)
    frame = land.frame[["geometry"]].copy()
    frame["pid"] = ["Site $A$", "cost$5", "$x^$"]  # the last raised a ParseException
    frame.to_crs("EPSG:4326").to_file(tmp_path / "p.geojson", driver="GeoJSON",
                                      engine="pyogrio")
    (tmp_path / "s.toml").write_text(
        "name = 'Dollars $x^2$'\ntime_unit = '$t$'\n"
        "[patches]\npath = 'p.geojson'\nid_field = 'pid'\n"
        "[run]\nduration = 4.0\nburn_in = 1.0\ncensus_interval = 0.5\n"
        "[analysis]\nstability = false\ncapacity = false\n", encoding="utf-8")
    done = subprocess.run([sys.executable, "-m", "trophoscape", "run", "s.toml", "--out", "out",
                           "--quiet"], cwd=tmp_path, capture_output=True, text=True,
                          timeout=120, env=dict(os.environ, PYTHONPATH=str(SRC)))
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr and "ParseException" not in done.stderr
    pngs = sorted((tmp_path / "out" / "maps").glob("*.png"))
    assert {"timeseries.png", "occupancy.png"} <= {p.name for p in pngs}
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)
    text = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert Page(text).text("h1") == "Dollars $x^2$"
