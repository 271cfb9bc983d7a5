"""``trophoscape init``: a commented scenario template for a user's own patch file."""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd

from ..errors import InputError, param
from ..io.folder import write_atomic
from ..model.landscape import read_attributes

__all__ = ["guess_id_field", "write_template"]

PATCH_SUFFIXES = (".geojson", ".json", ".gpkg", ".shp")


def find_patch_file(folder: Path) -> Path:
    """The one patch file in ``folder`` (GeoJSON, GeoPackage or Shapefile)."""
    found = sorted(p for p in Path(folder).iterdir() if p.suffix.lower() in PATCH_SUFFIXES)
    if not found:
        raise InputError("no patch file here; expected a .geojson, .gpkg or .shp file, or "
                         f"name one with {param('patches')}", file=folder)
    if len(found) > 1:
        names = ", ".join(p.name for p in found)
        raise InputError(f"several patch files ({names}); choose one with {param('patches')}",
                         file=folder)
    return found[0]


def guess_id_field(table: pd.DataFrame) -> str | None:
    """A column that can serve as patch ids: unique, no blanks; names with "id" first."""
    def usable(col):
        values = table[col]
        return values.notna().all() and values.astype(str).str.strip().ne("").all() \
            and values.astype(str).is_unique

    ranked = sorted(table.columns, key=lambda c: (0 if "id" in c.lower() else 1, c))
    return next((c for c in ranked if usable(c)), None)


def toml_string(text) -> str:
    """``text`` as a TOML basic string: quotes, backslashes and control characters escaped
    (TOML v1.0.0, "String"), so any column or file name reads back as itself."""
    out = []
    for ch in str(text):
        if ch in ('"', "\\"):
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _plain(text) -> str:
    """Text for a comment line: on one line, control characters escaped."""
    return toml_string(text)[1:-1]


def _describe(table: pd.DataFrame) -> list[str]:
    lines = []
    for col in table.columns:
        values = table[col]
        if pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values):
            lines.append(f"#   {_plain(col)}: numbers, {values.min():g} to {values.max():g}"
                         + (f" ({int(values.isna().sum())} missing)" if values.isna().any()
                            else ""))
        else:
            sample = ", ".join(map(_plain, pd.unique(values.astype(str))[:3]))
            lines.append(f"#   {_plain(col)}: text, e.g. {sample}")
    return lines


def scenario_template(patch_file: Path, table: pd.DataFrame, *, relative_to: Path) -> str:
    """The text of a commented scenario for ``patch_file``."""
    id_field = guess_id_field(table)
    quality = next((c for c in table.columns if "quality" in c.lower()
                    and pd.api.types.is_numeric_dtype(table[c])), None)
    rel = os.path.relpath(patch_file, relative_to)
    id_line = (f'id_field = {toml_string(id_field)}            # unique in the file (guessed)'
               if id_field
               else '# id_field = "..."               # no unique column found: patches are '
                    'numbered 0, 1, ...')
    q_line = (f'quality_field = {toml_string(quality)}       # multiplies the prey carrying capacity'
              if quality else '# quality_field = "..."          # optional multiplier of '
                              'carrying capacity (>= 0)')
    attributes = "\n".join(_describe(table)) or "#   (none)"
    return f'''# trophoscape scenario for {_plain(patch_file.name)}
# Every key below shows its default; change what your study needs. Times are in time_unit,
# distances in km, densities per km², abundances in individuals. Any number in [prey],
# [predator] or [predation] may instead be taken per patch: key = {{ field = "ATTRIBUTE" }}.
#
# Attributes found in the patch file ({len(table)} patches):
{attributes}

name = {toml_string(patch_file.stem)}
time_unit = "year"

[patches]
path = {toml_string(rel)}
{id_line}
{q_line}
crs = "auto"                    # local UTM zone, or Lambert equal-area for wide extents

[prey]
growth = "logistic"             # "exponential" | "logistic" | "allee"
growth_rate = 1.0               # per time unit
capacity_density = 50.0         # carrying capacity per km² (times quality)
emigration_rate = 0.1           # per capita, per time unit
kernel_scale_km = 2.0           # scale of the dispersal kernel
initial_density = 40.0          # per km², or "equilibrium"

[predator]
mortality_rate = 0.5
conversion = 0.4                # predators produced per prey eaten
emigration_rate = 0.05
kernel_scale_km = 5.0
initial_density = 2.0           # 0 for a prey-only run

[predation]
response = "holling2"           # "lotka_volterra" | "holling2" | "holling3" | "beddington_deangelis"
attack_rate = 1.0               # km² searched per predator per time unit
handling_time = 0.2             # time units per prey eaten

[dispersal]
kernel = "exponential"          # "exponential" | "gaussian" | "step" | "none"
max_distance_km = 15.0          # no link beyond this
distance = "boundary"           # "boundary" (edge to edge) | "centroid"
survival_per_km = 0.97
# corridors = "corridors.geojson"   # LineStrings joining two patches
# links = "links.csv"               # source,target,weight[,survival][,directed]
# resistance = "resistance.tif"    # cost of crossing 1 km of each cell (> 0): least-cost links
# matrix_resistance = 1.0           # without a raster: straight distances count this much
# corridor_resistance = 0.2         # per km along a corridor (its own 'resistance' overrides)

[run]
duration = 400
burn_in = 100                   # analyses use times from here on
census_interval = 0.5           # when the state is recorded; the run does not depend on it
extinction_abundance = 1.0      # a local population falling through this is removed
seed = 1
'''


def write_template(folder, *, patches=None, name="scenario.toml", force=False) -> Path:
    """Write ``folder/name`` for the patch file in ``folder`` (or ``patches``)."""
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError("no such folder; create it and put the patch file in it, or check "
                         "the path", file=folder)
    patch_file = Path(patches) if patches else find_patch_file(folder)
    table = read_attributes(patch_file)
    if table.empty:
        raise InputError("the file holds no features; give a file with at least one patch "
                         "polygon", file=patch_file)
    target = folder / name
    if target.exists() and not force:
        raise InputError(f"already exists; use {param('force', True)} to replace it", file=target)
    text = scenario_template(patch_file.resolve(), table, relative_to=folder.resolve())
    return write_atomic(target, text)




