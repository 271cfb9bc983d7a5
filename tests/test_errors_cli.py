"""Bad input through the command line: exit code 2, one exact line on stderr, no output left.

Each case writes a tiny landscape (four invented square patches near 11.2° E 46.3° N, ids
"A1".."A4") and a scenario into its own folder, breaks one thing, and runs
``trophoscape run s.toml --out out`` there. The expected texts are written out in full: they
are what a user reads, and each names the file, the feature (id, or 0-based position where
the file has no id field) and the field or key, and says what would be accepted. The rule
that a bad-input message names file, feature and field is the project's scenario contract
(SCENARIO.md, "Exit codes").
"""

from __future__ import annotations

import copy
import json
import os
import re
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import pytest

SRC = Path(__file__).resolve().parents[1] / "src"

# ------------------------------------------------------------------ the tiny valid inputs

LON0, LAT0 = 11.20, 46.30
SIDE_LON, SIDE_LAT, STEP_LON = 0.013, 0.009, 0.02  # about 1 km squares, 0.5 km apart


def square(k: int) -> dict:
    x0, y0 = LON0 + STEP_LON * k, LAT0
    x1, y1 = x0 + SIDE_LON, y0 + SIDE_LAT
    return {"type": "Polygon",
            "coordinates": [[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]]}


def features(n: int = 4) -> list[dict]:
    return [{"type": "Feature", "properties": {"pid": f"A{k + 1}", "quality": 1.0 - 0.1 * k},
             "geometry": square(k)} for k in range(n)]


def collection(feats) -> str:
    return json.dumps({"type": "FeatureCollection", "features": feats})


def patches_with(change) -> str:
    """The valid patch file with ``change(features)`` applied."""
    feats = features()
    change(feats)
    return collection(feats)


BASE = {
    "": {"name": "tiny"},
    "patches": {"path": "p.geojson", "id_field": "pid", "quality_field": "quality"},
    "dispersal": {"max_distance_km": 2.0},
    "run": {"duration": 2.0, "burn_in": 0.5, "census_interval": 0.5},
}


def _toml_value(v) -> str:
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return json.dumps(v)
    return repr(v)


def scenario(**sections) -> str:
    """The valid scenario with keys of some sections replaced (None removes a key)."""
    merged = copy.deepcopy(BASE)
    for name, keys in sections.items():
        target = merged.setdefault(name, {})
        for k, v in keys.items():
            if v is None:
                target.pop(k, None)
            else:
                target[k] = v
    lines = [f"{k} = {_toml_value(v)}" for k, v in merged.pop("").items()]
    for name, keys in merged.items():
        lines.append(f"[{name}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in keys.items()]
    return "\n".join(lines) + "\n"


def corridor(coords) -> str:
    return json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"corridor_id": "K1"},
         "geometry": {"type": "LineString", "coordinates": coords}}]})


def middle(k: int) -> tuple[float, float]:
    return LON0 + STEP_LON * k + SIDE_LON / 2, LAT0 + SIDE_LAT / 2


def run_cli(folder: Path, *args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(SRC), env.get("PYTHONPATH")]))
    return subprocess.run([sys.executable, "-m", "trophoscape", *args], cwd=folder, env=env,
                          capture_output=True, text=True, timeout=120)


# ------------------------------------------------------------------ the corpus


@dataclass
class Case:
    """One malformed input and the line a user should see.

    ``expected`` is the whole stderr line; input files appear as the scenario names them,
    names input files by their absolute path. With ``prefix`` set only the start is checked
    (the rest is a library's wording or a computed number). ``wrong_text``, ``extra_lines`` and
    ``accepted`` mark known defects of src/ (strict xfail: XPASS once fixed, then drop the mark).
    """

    id: str
    expected: str
    files: dict = field(default_factory=dict)  # name -> text; s.toml, p.geojson valid by default
    code: int = 2
    command: str = "run"
    prefix: bool = False
    wrong_text: str | None = None
    extra_lines: str | None = None
    accepted: str | None = None  # bad input that src/ currently accepts (exit 0)
    argv: tuple | None = None  # the whole command line, when not `COMMAND s.toml --out out`


_DROP = object()


def _set(i, key, value):
    def change(feats):
        if key == "geometry":
            feats[i]["geometry"] = value
        elif value is _DROP:
            feats[i]["properties"].pop(key)
        else:
            feats[i]["properties"][key] = value
    return change


def _scale_attribute(feats):
    for k, f in enumerate(feats):
        f["properties"]["scale"] = 0.0 if k == 3 else 1.5


LINKS = {"kernel": "none", "links": "l.csv"}
# exponential prey at r = 2000 per year, no predator: the run fails (exit 1)
#: Markers in a case's files: a named pipe or a folder instead of a file.
FIFO, FOLDER = "<named pipe>", "<folder>"

EXPLOSIVE = scenario(prey={"growth": "exponential", "growth_rate": 2000.0},
                     predator={"initial_density": 0.0})
CANDIDATE = json.dumps({"type": "FeatureCollection", "features": [
    {"type": "Feature", "properties": {"corridor_id": "K1", "cost": 1.0},
     "geometry": {"type": "LineString", "coordinates": [list(middle(0)), list(middle(2))]}}]})
CORRIDORS = {"corridors": "c.geojson"}
POLYGON_OPTIONS = "expected a Polygon or MultiPolygon: fix the feature or remove it"
QUALITY_RULE = "give a number of at least 0 (named by patches.quality_field)"
TOML_ADVICE = "; correct the file there (text values need quotes, sections [brackets])"
UNREADABLE = "cannot be read as a GeoJSON (.geojson), GeoPackage (.gpkg) or Shapefile (.shp)"
LINKS_COLUMNS = "columns source,target,weight[,survival][,directed]"

FIT_SCENARIO = scenario(patches={"id_field": "pid"}) + '[fit]\nestimate = ["prey.growth_rate"]\n'
COUNTS_HEAD = "patch_id,time,species,count\n"
FIT_ARGV = ("fit", "s.toml", "--counts", "c.csv", "--out", "out")

CASES = [
    # ---------------------------------------------------------------- the scenario file
    Case("toml-syntax",
         "error: s.toml: not valid TOML: Expected '=' after a key in a key/value pair "
         "(at line 12, column 6)" + TOML_ADVICE,
         {"s.toml": scenario() + "seed 2\n"}),
    Case("toml-bad-number",
         "error: s.toml: not valid TOML: Expected newline or end of document after a "
         "statement (at line 9, column 15)" + TOML_ADVICE,
         {"s.toml": scenario().replace("duration = 2.0", "duration = 2.0.1")}),
    Case("unknown-section",
         "error: s.toml: field 'preditor': unknown section or top-level key; "
         "did you mean 'predator'?",
         {"s.toml": scenario(preditor={"conversion": 0.1})}),
    Case("misspelt-key",
         "error: s.toml: field 'run.duraton': unknown key; did you mean 'duration'?",
         {"s.toml": scenario(run={"duraton": 3.0})}),
    Case("unknown-key-no-suggestion",
         "error: s.toml: field 'run.zzz': unknown key; [run] takes duration, burn_in, "
         "census_interval, extinction_abundance, method, rtol, atol, seed, replicates",
         {"s.toml": scenario(run={"zzz": 1})}),
    Case("wrong-type",
         "error: s.toml: field 'prey.growth_rate': 'fast' is not a number; give a number of "
         "at least 0",
         {"s.toml": scenario(prey={"growth_rate": "fast"})}),
    Case("out-of-range",
         "error: s.toml: field 'dispersal.survival_per_km': 1.5 is out of range; give a "
         "number from 0 to 1",
         {"s.toml": scenario(dispersal={"survival_per_km": 1.5})}),
    Case("bad-choice",
         "error: s.toml: field 'predation.response': 'holling4' is not one of "
         "'lotka_volterra', 'holling2', 'holling3', 'beddington_deangelis'; did you mean "
         "'holling3'?",
         {"s.toml": scenario(predation={"response": "holling4"})}),
    Case("burn-in-too-long",
         "error: s.toml: field 'run.burn_in': 5 is not below run.duration 2; shorten the "
         "burn-in or lengthen the run",
         {"s.toml": scenario(run={"burn_in": 5.0})}),
    Case("no-patch-path",
         "error: s.toml: field 'patches.path': is missing; add path = \"patches.geojson\" "
         "under [patches], naming the patch file (GeoJSON, GeoPackage or Shapefile) relative "
         "to the scenario",
         {"s.toml": scenario(patches={"path": None})}),
    Case("noise-autocorrelation-retired",
         "error: s.toml: field 'noise.autocorrelation': this key is retired: it correlated "
         "successive census intervals, so the noise changed with the census interval; give "
         "noise.correlation_time in time units instead (a value a at census interval c "
         "becomes -c / ln(a)), and note that noise.environmental_sd is now per sqrt(time "
         "unit) (README, \"Changes to the contract\")",
         {"s.toml": scenario(noise={"environmental_sd": 0.2, "autocorrelation": 0.5})}),
    Case("noise-step-zero",
         "error: s.toml: field 'noise.noise_step': 0 is out of range",
         {"s.toml": scenario(noise={"environmental_sd": 0.2, "noise_step": 0})}, prefix=True),
    Case("bad-field-ref",
         "error: s.toml: field 'prey.growth_rate': {'name': 'r'} is not a per-patch value; "
         "write { field = \"ATTRIBUTE\" } with a column of the patch file, or give one number",
         {"s.toml": scenario(prey={"growth_rate": {"name": "r"}})}),
    Case("geographic-crs",
         "error: s.toml: field 'patches.crs': 'EPSG:4326' is a geographic (degrees) CRS; "
         "distances and areas need a projected CRS: give 'auto' or one in metres such as a "
         "UTM zone 'EPSG:326NN'",
         {"s.toml": scenario(patches={"crs": "EPSG:4326"})}),
    Case("unknown-crs",
         "error: s.toml: field 'patches.crs': 'EPSG:999999' is not a CRS pyproj understands; "
         "give 'auto' or a projected CRS in metres such as 'EPSG:3035'",
         {"s.toml": scenario(patches={"crs": "EPSG:999999"})}),
    # ---------------------------------------------------------------- the patch file
    Case("missing-patch-file",
         "error: missing.geojson: no such file; check the path, which should name a "
         "GeoJSON (.geojson), GeoPackage (.gpkg) or Shapefile (.shp)",
         {"s.toml": scenario(patches={"path": "missing.geojson"})}),
    Case("missing-patch-file-check",
         "error: missing.geojson: no such file; check the path, which should name a "
         "GeoJSON (.geojson), GeoPackage (.gpkg) or Shapefile (.shp)",
         {"s.toml": scenario(patches={"path": "missing.geojson"})}, command="check"),
    Case("bad-json",
         "error: p.geojson: not valid JSON (Expecting ',' delimiter at line 1, "
         "column 923); expected a GeoJSON FeatureCollection",
         {"p.geojson": collection(features())[:-40]}),
    Case("json-not-geojson", f"error: p.geojson: {UNREADABLE}: ",
         {"p.geojson": "[1, 2, 3]"}, prefix=True),
    Case("not-a-geopackage", f"error: p.gpkg: {UNREADABLE}: ",
         {"s.toml": scenario(patches={"path": "p.gpkg"}), "p.gpkg": "not a database"},
         prefix=True),
    Case("empty-collection",
         "error: p.geojson: the file holds no features; give a file with at least one "
         "patch polygon (or name its layer with [patches] layer)",
         {"p.geojson": collection([])}),
    Case("null-geometry",
         f"error: p.geojson: feature 'A2': field 'geometry': geometry is null; "
         f"{POLYGON_OPTIONS}",
         {"p.geojson": patches_with(_set(1, "geometry", None))}),
    Case("point-geometry",
         f"error: p.geojson: feature 'A3': field 'geometry': geometry type is Point; "
         f"{POLYGON_OPTIONS}",
         {"p.geojson": patches_with(
             _set(2, "geometry", {"type": "Point", "coordinates": list(middle(2))}))}),
    Case("no-such-id-field",
         "error: p.geojson: field 'patch_id': no such attribute for patch ids; the file "
         "has: 'pid', 'quality'; name one of them in [patches] id_field, or leave id_field "
         "out to number the features",
         {"s.toml": scenario(patches={"id_field": "patch_id"})}),
    Case("missing-id",  # no id to name it by: its 0-based position
         "error: p.geojson: feature 2: field 'pid': patch id is empty; give every patch "
         "an id",
         {"p.geojson": patches_with(_set(2, "pid", _DROP))}),
    Case("duplicate-ids",
         "error: p.geojson: feature 'A2': field 'pid': id is not unique: features 1 "
         "and 3 both have it; give each patch its own id",
         {"p.geojson": patches_with(_set(3, "pid", "A2"))}),
    Case("quality-not-number",
         f"error: p.geojson: feature 'A3': field 'quality': value 'high' is not a "
         f"number; {QUALITY_RULE}",
         {"p.geojson": patches_with(_set(2, "quality", "high"))}),
    Case("quality-not-number-no-ids",  # without an id field features go by position
         f"error: p.geojson: feature 2: field 'quality': value 'high' is not a "
         f"number; {QUALITY_RULE}",
         {"s.toml": scenario(patches={"id_field": None}),
          "p.geojson": patches_with(_set(2, "quality", "high"))}),
    Case("quality-negative",
         f"error: p.geojson: feature 'A2': field 'quality': value -0.5 is out of "
         f"range; {QUALITY_RULE}",
         {"p.geojson": patches_with(_set(1, "quality", -0.5))}),
    Case("quality-missing",
         f"error: p.geojson: feature 'A2': field 'quality': value is missing; "
         f"{QUALITY_RULE}",
         {"p.geojson": patches_with(_set(1, "quality", None))}),
    Case("quality-true",
         f"error: p.geojson: feature 'A2': field 'quality': value True is "
         f"true/false; {QUALITY_RULE}",
         {"p.geojson": patches_with(_set(1, "quality", True))},
         accepted="a JSON true among numbers is read by GDAL as 1.0 and accepted silently"),
    Case("quality-zero-logistic",
         "error: p.geojson: feature 'A2': field 'quality': carrying capacity is zero "
         "(quality 0); give the patch a quality > 0 or remove it",
         {"p.geojson": patches_with(_set(1, "quality", 0))}),
    Case("field-ref-missing",
         "error: p.geojson: field 'r_local': no such attribute (named by "
         "prey.growth_rate); the file has: 'pid', 'quality'; add the column to the patch "
         "file or name one of these",
         {"s.toml": scenario(prey={"growth_rate": {"field": "r_local"}})}),
    Case("field-ref-out-of-range",
         "error: p.geojson: feature 'A4': field 'scale': value 0.0 is out of range for "
         "prey.kernel_scale_km; give a number above 0 in every feature",
         {"s.toml": scenario(prey={"kernel_scale_km": {"field": "scale"}}),
          "p.geojson": patches_with(_scale_attribute)}),
    Case("lon-out-of-range",
         "error: p.geojson: feature 'A1': field 'geometry': coordinates span x 191 to "
         "191.01, y 46.3 to 46.31, outside longitude -180..180 / latitude -90..90; GeoJSON "
         "coordinates are WGS 84 lon/lat (RFC 7946); reproject the file to EPSG:4326",
         {"p.geojson": patches_with(_set(0, "geometry", {"type": "Polygon", "coordinates": [
             [[191.0, 46.3], [191.01, 46.3], [191.01, 46.31], [191.0, 46.3]]]}))}),
    Case("zero-area",
         "error: p.geojson: feature 'A2': field 'geometry': polygon has zero area; "
         "redraw the patch with a positive area or remove the feature",
         {"p.geojson": patches_with(_set(1, "geometry", {"type": "Polygon", "coordinates": [
             [[11.22, 46.3], [11.23, 46.3], [11.235, 46.3], [11.22, 46.3]]]}))}),
    # ---------------------------------------------------------------- corridors
    Case("corridor-one-patch",  # the coordinates printed are in the metric CRS (see report)
         "error: c.geojson: feature 'K1': field 'geometry': its last point (",
         {"s.toml": scenario(dispersal=CORRIDORS),
          "c.geojson": corridor([list(middle(0)), [LON0 + 0.01, LAT0 + 0.1]])}, prefix=True),
    Case("corridor-same-patch",
         "error: c.geojson: feature 'K1': field 'geometry': both ends lie at patch "
         "'A2'; a corridor must join two different patches: move one end to the other "
         "patch",
         {"s.toml": scenario(dispersal=CORRIDORS),
          "c.geojson": corridor([list(middle(1)), [middle(1)[0] + 0.001, middle(1)[1]]])}),
    Case("corridor-polygon",
         "error: c.geojson: feature 0: field 'geometry': geometry type is Polygon; "
         "expected a LineString or MultiLineString: fix the feature or remove it",
         {"s.toml": scenario(dispersal=CORRIDORS), "c.geojson": collection(features()[:1])}),
    # ---------------------------------------------------------------- links tables
    Case("links-unknown-id",
         "error: l.csv: feature 1: field 'target': no patch has id 'B7'; use an id of the "
         "patch file (e.g. 'A1', 'A2', 'A3')",
         {"s.toml": scenario(dispersal=LINKS),
          "l.csv": "source,target,weight\nA1,A2,1.0\nA2,B7,0.5\n"}),
    Case("links-negative-weight",
         "error: l.csv: feature 1: field 'weight': value -0.5 is out of range; "
         "give a number above 0",
         {"s.toml": scenario(dispersal=LINKS),
          "l.csv": "source,target,weight\nA1,A2,1.0\nA2,A3,-0.5\n"}),
    Case("links-unknown-column",
         f"error: l.csv: field 'wieght': unknown column (did you mean 'weight'?); "
         f"expected {LINKS_COLUMNS}",
         {"s.toml": scenario(dispersal=LINKS), "l.csv": "source,target,wieght\nA1,A2,1.0\n"}),
    Case("links-to-itself",
         "error: l.csv: feature 1: field 'target': links patch 'A3' to itself; "
         "give two different patches or drop the row",
         {"s.toml": scenario(dispersal=LINKS),
          "l.csv": "source,target,weight\nA1,A2,1.0\nA3,A3,1.0\n"}),
    Case("links-directed-word",
         "error: l.csv: feature 0: field 'directed': value 'maybe' is not true/false; "
         "expected true, false, 1, 0, yes, no or empty (false)",
         {"s.toml": scenario(dispersal=LINKS),
          "l.csv": "source,target,weight,directed\nA1,A2,1.0,maybe\n"}),
    Case("links-missing-file",
         "error: nolinks.csv: no such file; check the path (relative to the scenario); "
         f"expected a CSV table with {LINKS_COLUMNS}",
         {"s.toml": scenario(dispersal={"kernel": "none", "links": "nolinks.csv"})}),
    # ---------------------------------------------------------------- parameters together
    Case("allee-above-capacity",  # capacity density 50 x quality 0.9 of A2 = 45 < 48
         "error: p.geojson: feature 'A2': field 'quality': carrying capacity 45 per km² "
         "(prey.capacity_density 50 × quality 0.9) is not above the Allee threshold "
         "prey.allee_density 48; raise the quality or lower the threshold",
         {"s.toml": scenario(
             prey={"growth": "allee", "capacity_density": 50.0, "allee_density": 48.0})}),
    # ---------------------------------------------------------------- the spread command
    Case("spread-species-absent",  # no predators, and a patch loss: the predator is followed
         "error: s.toml: field 'spread.species': the predator (followed by default: "
         "shock[0], a patch_loss, acts on both species) is absent from every patch at the "
         "shock time 0.5, so there is no collapse of it to follow; set species = \"prey\" "
         "under [spread], or give the predator an initial_density above 0 and check that it "
         "persists through burn-in",
         {"s.toml": scenario(predator={"initial_density": 0.0})
          + '[[shock]]\nkind = "patch_loss"\npatches = ["A1"]\n'}, command="spread"),
    # ---------------------------------------------------------------- the output folder
    # Checked before any run: the scenario of these cases would fail to run (exit 1), so
    # exit 2 with the --out message shows the check came first.
    Case("out-empty",
         "error: field '--out': an empty name is not a folder; give the output folder a "
         "name, e.g. --out results",
         {"s.toml": EXPLOSIVE}, argv=("run", "s.toml", "--out", "")),
    Case("out-input-folder",
         "error: .: field '--out': is the folder of the input p.geojson; an output folder is "
         "replaced as a whole, so give a new folder for the outputs, e.g. --out results",
         {"s.toml": EXPLOSIVE}, argv=("run", "s.toml", "--out", ".")),
    Case("out-holds-inputs",
         "error: ..: field '--out': holds the input out-holds-inputs/p.geojson; an output "
         "folder is replaced as a whole, so give a new folder for the outputs, e.g. --out "
         "../results",
         {"s.toml": EXPLOSIVE}, argv=("run", "s.toml", "--out", "..")),
    Case("out-existing-file",
         "error: taken.txt: field '--out': is an existing file, not a folder; give the name "
         "of a new folder for the outputs, e.g. --out results",
         {"s.toml": EXPLOSIVE, "taken.txt": "my notes\n"},
         argv=("run", "s.toml", "--out", "taken.txt")),
    Case("out-not-trophoscape",
         "error: mine: field '--out': is a folder trophoscape did not write (it holds "
         "notes.txt); give a new or empty folder, or add --force to write there anyway (the "
         "folder is then kept, renamed to mine.replaced-YYYYmmdd-HHMMSS)",
         {"s.toml": EXPLOSIVE, "mine/notes.txt": "my notes\n"},
         argv=("run", "s.toml", "--out", "mine", "--no-maps")),
    Case("demo-out-existing-file",
         "error: taken.txt: field '--out': is an existing file, not a folder; give the name "
         "of a new folder for the outputs, e.g. --out results",
         {"taken.txt": "my notes\n"}, argv=("demo", "--out", "taken.txt")),
    Case("sweep-out-existing-file",
         "error: taken.txt: field '--out': is an existing file, not a folder; give the name "
         "of a new folder for the outputs, e.g. --out results",
         {"taken.txt": "my notes\n"},
         argv=("sweep", "s.toml", "--vary", "prey.growth_rate=0.5,1", "--out", "taken.txt")),
    Case("sweep-out-input-folder",
         "error: .: field '--out': is the folder of the input p.geojson; an output folder is "
         "replaced as a whole, so give a new folder for the outputs, e.g. --out results",
         argv=("sweep", "s.toml", "--vary", "prey.growth_rate=0.5,1", "--out", ".")),
    Case("sweep-out-table-folder",
         "error: tables: field '--out': is the folder of the input points.csv; an output "
         "folder is replaced as a whole, so give a new folder for the outputs, e.g. --out "
         "tables/results",
         {"tables/points.csv": "prey.growth_rate\n0.5\n1.0\n"},
         argv=("sweep", "s.toml", "--table", "tables/points.csv", "--out", "tables")),
    Case("corridors-out-existing-file",
         "error: taken.txt: field '--out': is an existing file, not a folder; give the name "
         "of a new folder for the outputs, e.g. --out results",
         {"taken.txt": "my notes\n"},
         argv=("corridors", "s.toml", "--candidates", "c.geojson", "--budget", "1", "--out",
               "taken.txt")),
    Case("corridors-out-candidates-folder",
         "error: options: field '--out': is the folder of the input c.geojson; an output "
         "folder is replaced as a whole, so give a new folder for the outputs, e.g. --out "
         "options/results",
         {"options/c.geojson": CANDIDATE},
         argv=("corridors", "s.toml", "--candidates", "options/c.geojson", "--budget", "1",
               "--out", "options")),
    Case("spread-out-input-folder",
         "error: .: field '--out': is the folder of the input p.geojson; an output folder is "
         "replaced as a whole, so give a new folder for the outputs, e.g. --out results",
         {"s.toml": scenario() + '[[shock]]\nkind = "patch_loss"\npatches = ["A1"]\n'},
         argv=("spread", "s.toml", "--out", ".")),
    Case("compare-out-input-folder",
         "error: other: field '--out': is the folder of the input b.toml; an output folder is "
         "replaced as a whole, so give a new folder for the outputs, e.g. --out "
         "other/results",
         {"other/b.toml": scenario(patches={"path": "../p.geojson"})},
         argv=("compare", "s.toml", "other/b.toml", "--out", "other")),
    # ------------------------------------------- shapes and sizes that cannot work (issue 17)
    Case("shock-not-a-table",
         "error: s.toml: field 'shock': is not a list of shock tables; write each shock as a "
         "[[shock]] table (double brackets) with its keys below it",
         {"s.toml": "shock = 5\n" + scenario()}),
    Case("toml-nested-deep",
         "error: s.toml: not valid for trophoscape: values are nested too deeply (arrays or "
         "tables inside one another hundreds of levels deep); a scenario needs at most a few "
         "levels",
         {"s.toml": scenario() + "x = " + "[" * 50_000 + "]" * 50_000 + "\n"}),
    Case("scenario-too-large",
         "error: s.toml: is 2,097,331 bytes, more than the 1,048,576 a scenario file may have; "
         "check that this is the right file",
         {"s.toml": scenario() + "#" + "x" * (2 << 20) + "\n"}),
    Case("scenario-is-a-named-pipe",
         "error: s.toml: is not a regular file (a named pipe, device or socket); give the path "
         "of a scenario file saved on disk",
         {"s.toml": FIFO}, command="check"),
    Case("scenario-is-a-folder",
         "error: s.toml: is a folder, not a scenario file; give the path of the file itself",
         {"s.toml": FOLDER}),
    Case("patch-file-is-a-named-pipe",
         "error: p.geojson: is not a regular file (a named pipe, device or socket); give the "
         "path of a patch file saved on disk",
         {"p.geojson": FIFO}, command="check"),
    Case("census-rows-beyond-memory",
         "error: s.toml: field 'run.census_interval': the run would record 2,000,000,001 census "
         "rows × 4 patches × 2 species × 1 replicate(s), about 192 GB of memory, more than "
         "this machine's ",
         {"s.toml": scenario(run={"census_interval": 1e-9})}, prefix=True),
    Case("census-rows-beyond-memory-check",
         "error: s.toml: field 'run.census_interval': the run would record 2,000,000,001 census "
         "rows",
         {"s.toml": scenario(run={"census_interval": 1e-9})}, command="check", prefix=True),
    Case("replicates-beyond-memory",
         "error: s.toml: field 'run.replicates': the run would record 6 census rows × 4 "
         "patches × 2 species × 1,000,000,000 replicate(s), about 704 GB of memory",
         {"s.toml": scenario(run={"replicates": 1_000_000_000},
                             noise={"environmental_sd": 0.1})}, prefix=True),
    Case("noise-steps-beyond-limit",
         "error: s.toml: field 'noise.noise_step': the run would take 2,000,000,000 noise steps "
         "of 1e-09 time units (at most 10,000,000; each restarts the solver); give a longer "
         "noise_step",
         {"s.toml": scenario(noise={"environmental_sd": 0.1, "noise_step": 1e-9})}),
    Case("growth-rate-1e300",
         "error: s.toml: field 'prey.growth_rate': 1e+300 is beyond the largest value "
         "trophoscape computes with (1e+12); give a number from 0 to 1e+12",
         {"s.toml": scenario(prey={"growth_rate": 1e300})}),
    Case("growth-rate-too-fast-for-the-solver",
         "error: s.toml: field 'prey.growth_rate': a rate of 1e+12 per time unit over "
         "run.duration 2 spans 2e+12 of its time scales: the solver (RK45) would need at "
         "least about that many steps (at most 1e+08); check the rate's time unit, or use "
         "run.method = \"BDF\" for such fast rates",
         {"s.toml": scenario(prey={"growth_rate": 1e12})}),
    Case("attack-rate-1e308",
         "error: s.toml: field 'predation.attack_rate': 1e+308 is beyond the largest value "
         "trophoscape computes with (1e+12); give a number from 0 to 1e+12",
         {"s.toml": scenario(predation={"attack_rate": 1e308})}),
    Case("per-patch-value-1e308",
         "error: p.geojson: feature 'A3': field 'r': value 1e+308 for prey.growth_rate is not a "
         "finite number within the range trophoscape computes with; give a number from 0 to "
         "1e+12 in every feature",
         {"s.toml": scenario(prey={"growth_rate": {"field": "r"}}),
          "p.geojson": patches_with(lambda fs: [f["properties"].__setitem__(
              "r", 1e308 if f["properties"]["pid"] == "A3" else 1.0) for f in fs])}),
    Case("per-patch-value-1e400",
         "error: p.geojson: feature 0: field 'r': the number is beyond the range of 64-bit "
         "floating point (about ±1.8e308; inf as read); give a finite number",
         {"s.toml": scenario(prey={"growth_rate": {"field": "r"}}),
          "p.geojson": collection(features()).replace('"quality": 1.0',
                                                      '"r": 1e400, "quality": 1.0')}),
    Case("geojson-nested-deep",
         "error: p.geojson: not a GeoJSON FeatureCollection: arrays or objects are nested "
         "thousands of levels deep; export the file again",
         {"p.geojson": '{"type": "FeatureCollection", "features": [{"type": "Feature", '
                       '"properties": {"x": ' + "[" * 100_000 + "]" * 100_000
                       + '}, "geometry": null}]}'}),
    Case("sweep-count-too-large",
         "error: field '--vary prey.growth_rate=0:1:100000000': COUNT 100,000,000 is more "
         "points than a sweep may have (at most 1,000,000 runs); give a smaller COUNT",
         argv=("sweep", "s.toml", "--vary", "prey.growth_rate=0:1:100000000", "--out", "sw")),
    Case("sweep-product-too-large",
         "error: field '--vary': the sweep would have 1,000 × 1,001 = 1,001,000 points, more "
         "than the 1,000,000 runs a sweep may have; vary fewer values",
         argv=("sweep", "s.toml", "--vary", "prey.growth_rate=0:1:1000", "--vary",
               "predator.mortality_rate=0:1:1001", "--out", "sw")),
    Case("sweep-point-missing-patch-file",
         "error: missing.geojson: field 'patches.path': the patch file of the point "
         "patches.path='missing.geojson' does not exist; check the path (it is relative to the "
         "scenario's folder)",
         argv=("sweep", "s.toml", "--vary", "patches.path=p.geojson,missing.geojson", "--out",
               "sw")),
    Case("sweep-point-beyond-memory",
         "error: s.toml: field 'run.census_interval': the point run.census_interval=1e-09: the "
         "run would record 2,000,000,001 census rows",
         argv=("sweep", "s.toml", "--vary", "run.census_interval=0.5,1e-9", "--out", "sw"),
         prefix=True),
    # ---------------------------------------------------------------- fit: counts and [fit]
    Case("fit-unknown-patch",
         "error: c.csv: feature 1: field 'patch_id': unknown patch 'A9'; give the id of a "
         "patch of the scenario's patch file",
         {"s.toml": FIT_SCENARIO, "c.csv": COUNTS_HEAD + "A1,1,prey,30\nA9,1,prey,30\n"},
         argv=FIT_ARGV),
    Case("fit-count-not-a-number",
         "error: c.csv: feature 0: field 'count': 'a few' is not a finite number",
         {"s.toml": FIT_SCENARIO, "c.csv": COUNTS_HEAD + "A1,1,prey,a few\n"}, argv=FIT_ARGV),
    Case("fit-negative-count",
         "error: c.csv: feature 0: field 'count': count -3 is negative; give a count of at "
         "least 0",
         {"s.toml": FIT_SCENARIO, "c.csv": COUNTS_HEAD + "A1,1,prey,-3\n"}, argv=FIT_ARGV),
    Case("fit-time-outside-the-run",
         "error: c.csv: feature 0: field 'time': time 9 is outside the run (0 to 2); give "
         "times from the start of the run, in its time unit",
         {"s.toml": FIT_SCENARIO, "c.csv": COUNTS_HEAD + "A1,9,prey,3\n"}, argv=FIT_ARGV),
    Case("fit-unknown-species",
         "error: c.csv: feature 0: field 'species': 'hare' is not a species; give prey or "
         "predator",
         {"s.toml": FIT_SCENARIO, "c.csv": COUNTS_HEAD + "A1,1,hare,3\n"}, argv=FIT_ARGV),
    Case("fit-fewer-counts-than-quantities",
         "error: c.csv: field 'count': the table has 2 counts, fewer than the 3 quantities the "
         "fit estimates (2 scenario values and 1 observation sd); add counts or estimate "
         "fewer values",
         {"s.toml": FIT_SCENARIO.replace('["prey.growth_rate"]',
                                         '["prey.growth_rate", "predation.attack_rate"]'),
          "c.csv": COUNTS_HEAD + "A1,1,prey,30\nA2,1,prey,20\n"}, argv=FIT_ARGV),
    Case("fit-estimate-not-a-key",
         "error: s.toml: field 'fit.estimate': 'prey.growth' is not a number, so it cannot be "
         "estimated",
         {"s.toml": FIT_SCENARIO.replace("prey.growth_rate", "prey.growth"),
          "c.csv": COUNTS_HEAD + "A1,1,prey,30\n"}, argv=FIT_ARGV),
    Case("fit-a-structure-key",
         "error: s.toml: field 'fit.estimate': dispersal.max_distance_km shapes the patches or "
         "the network, which a fit keeps as they are; estimate rates and densities instead",
         {"s.toml": FIT_SCENARIO.replace("prey.growth_rate", "dispersal.max_distance_km"),
          "c.csv": COUNTS_HEAD + "A1,1,prey,30\n"}, argv=FIT_ARGV),
    Case("fit-a-run-setting",
         "error: s.toml: field 'fit.estimate': run.duration is not a value of the model (a "
         "fit estimates keys of [prey], [predator], [predation], [dispersal]); estimate "
         "rates and densities instead",
         {"s.toml": FIT_SCENARIO.replace("prey.growth_rate", "run.duration"),
          "c.csv": COUNTS_HEAD + "A1,1,prey,30\n"}, argv=FIT_ARGV),
    Case("fit-no-fit-section",
         "error: s.toml: field 'fit.estimate': the scenario has nothing to estimate; add a "
         "[fit] section with estimate = [\"prey.growth_rate\", ...]",
         {"c.csv": COUNTS_HEAD + "A1,1,prey,30\n"}, argv=FIT_ARGV),
    # ---------------------------------------------------------------- a failed run: exit 1
    Case("explosive-growth",  # exponential prey at r = 2000 per year, no predator
         "error: the run failed: ",
         {"s.toml": EXPLOSIVE}, code=1, prefix=True),
]


# ------------------------------------------------------------------ running the corpus


@dataclass
class Outcome:
    folder: Path
    returncode: int
    stderr: str


def write_case_files(folder: Path, files: dict) -> None:
    """The valid inputs with a case's files over them: text, bytes, FIFO or FOLDER."""
    files = {"s.toml": scenario(), "p.geojson": collection(features()), **files}
    for name, data in files.items():
        (folder / name).parent.mkdir(parents=True, exist_ok=True)
        if data == FIFO:
            os.mkfifo(folder / name)
        elif data == FOLDER:
            (folder / name).mkdir()
        elif isinstance(data, bytes):
            (folder / name).write_bytes(data)
        else:
            (folder / name).write_text(data, encoding="utf-8")


def run_corpus(cases, root: Path) -> dict[str, Outcome]:
    """Every case run once through the CLI, each in its own folder under ``root`` (in
    parallel: each call is ~1 s of start-up)."""

    def one(case: Case) -> Outcome:
        folder = root / case.id
        folder.mkdir()
        write_case_files(folder, case.files)
        args = [case.command, "s.toml"]
        if case.command in ("run", "spread"):
            args += ["--out", "out", "--no-maps"]
        if case.argv is not None:
            args = list(case.argv)
        done = run_cli(folder, *args)
        return Outcome(folder, done.returncode, done.stderr)

    with ThreadPoolExecutor(max_workers=max(2, os.cpu_count() or 2)) as pool:
        return dict(zip((c.id for c in cases), pool.map(one, cases)))


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory) -> dict[str, Outcome]:
    return run_corpus(CASES, tmp_path_factory.mktemp("bad-inputs"))


def _param(case: Case, reason: str | None):
    reason = case.accepted or reason
    marks = [pytest.mark.xfail(strict=True, reason=reason)] if reason else []
    return pytest.param(case, id=case.id, marks=marks)


def test_corpus_is_large_and_has_unique_ids():
    ids = [c.id for c in CASES]
    assert len(set(ids)) == len(ids)
    assert sum(c.code == 2 for c in CASES) >= 20


@pytest.mark.parametrize("case", [_param(c, None) for c in CASES])
def test_exit_code_no_traceback_no_output(case, outcomes):
    got = outcomes[case.id]
    assert got.returncode == case.code, got.stderr
    assert "Traceback" not in got.stderr
    # outputs are whole or absent: no folder, no staging folder beside it (SCENARIO.md)
    assert not (got.folder / "out").exists()
    if case.argv is not None and "--out" in case.argv:  # the case's own --out, if it made none
        out = case.argv[case.argv.index("--out") + 1]
        made_by_case = any(name == out or name.startswith(out + "/") for name in case.files)
        if out.strip(". /") and not made_by_case:
            assert not (got.folder / out).exists()
    assert not list(got.folder.glob(".out.partial-*"))
    assert not list(got.folder.glob(".*partial*"))
    # exactly one line says what went wrong
    assert sum(line.startswith("error: ") for line in got.stderr.splitlines()) == 1


@pytest.mark.parametrize("case", [_param(c, c.wrong_text) for c in CASES])
def test_message_text(case, outcomes):
    got = outcomes[case.id]
    expected = case.expected.replace("{dir}", str(got.folder))
    lines = got.stderr.splitlines()
    assert lines, "nothing on stderr"
    last = lines[-1]
    if case.prefix:
        assert last.startswith(expected), last
        assert len(last) > len(expected)
    else:
        assert last == expected


@pytest.mark.parametrize("case", [_param(c, c.extra_lines) for c in CASES])
def test_stderr_is_exactly_one_line(case, outcomes):
    got = outcomes[case.id]
    assert got.stderr.endswith("\n")
    assert len(got.stderr.splitlines()) == 1, got.stderr


def test_messages_name_the_file_and_feature(outcomes):
    # the rule of the contract, checked on the texts themselves: a message about a patch,
    # corridor or links file names that file and, for a per-feature problem, the feature
    for case in CASES:
        if case.code != 2 or case.accepted:
            continue
        line = outcomes[case.id].stderr.splitlines()[-1]
        named = [n for n in ("s.toml", "p.geojson", "p.gpkg", "c.geojson", "l.csv",
                             "missing.geojson", "nolinks.csv", "c.csv", "field '--out'",
                             "field '--vary") if n in line]  # or the argument at fault
        if case.wrong_text is None:
            assert named, line
        feature = re.search(r": feature ('[^']+'|\d+): ", case.expected)
        if feature:
            assert feature.group(0) in line, line


# ------------------------------------------------------------ parameters and options
def test_a_library_error_names_the_parameter_and_the_command_line_its_option(tmp_path):
    # the same refusal read from Python (parameters) and from the command line (options)
    from trophoscape.errors import InputError
    from trophoscape.io.folder import check_out

    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "notes.txt").write_text("x", encoding="utf-8")
    with pytest.raises(InputError) as info:
        check_out(tmp_path / "mine")
    text = str(info.value)
    assert "parameter 'out'" in text and "add force=True to write there anyway" in text
    assert "--" not in text
    write_case_files(tmp_path, {})
    got = run_cli(tmp_path, "run", "s.toml", "--out", "mine")
    assert got.returncode == 2
    assert "field '--out'" in got.stderr and "add --force to write there anyway" in got.stderr


def test_every_option_in_the_flag_table_exists():
    # consistency test: FLAGS maps parameters to options (or positional arguments) the
    # parser really has
    from trophoscape.cli.program import FLAGS, _parser

    parser = _parser()
    options = set()
    for action in parser._subparsers._group_actions:
        for sub in action.choices.values():
            for a in sub._actions:
                options.update(a.option_strings or [a.dest])
    assert set(FLAGS.values()) <= options, set(FLAGS.values()) - options


def test_every_parameter_a_message_names_has_its_option():
    # consistency test: each errors.param("name") in the library has an entry in FLAGS, so the
    # command line never shows a parameter under a made-up option
    import ast

    import trophoscape
    from trophoscape.cli.program import FLAGS

    root = Path(trophoscape.__file__).parent
    named = set()
    for path in root.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if (isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
                    and node.func.id == "param" and node.args):
                named |= {c.value for c in ast.walk(node.args[0])
                          if isinstance(c, ast.Constant) and isinstance(c.value, str)}
    assert len(named) > 10  # the scan sees the calls
    assert named - set(FLAGS) == set(), named - set(FLAGS)


def test_no_library_message_names_a_command_line_option():
    # consistency test: outside cli/, text that reaches users names parameters
    # (errors.param), never options; docstrings and comments may mention options
    import ast

    import trophoscape

    root = Path(trophoscape.__file__).parent
    found = []
    for path in root.rglob("*.py"):
        if "cli" in path.relative_to(root).parts:
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        docstrings = {id(n.body[0].value) for n in ast.walk(tree)
                      if isinstance(n, (ast.Module, ast.FunctionDef, ast.ClassDef,
                                        ast.AsyncFunctionDef))
                      and n.body and isinstance(n.body[0], ast.Expr)
                      and isinstance(n.body[0].value, ast.Constant)}
        for node in ast.walk(tree):
            if (isinstance(node, ast.Constant) and isinstance(node.value, str)
                    and id(node) not in docstrings and re.search(r"--[a-z]", node.value)):
                found.append(f"{path.relative_to(root)}:{node.lineno}: {node.value!r}")
    assert found == [], found
