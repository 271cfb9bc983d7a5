"""The scenario file (TOML) -> a validated, frozen Scenario.

Every key of the contract (``SCENARIO.md`` in the project's shared notes, summarised in the
README) is listed once in ``SCHEMA`` with its default and its check; nothing else in the
package knows the key names. Unknown sections and keys are errors that suggest the closest
known name, so a misspelt key is never silently ignored. Nothing in a scenario is executed.
"""

from __future__ import annotations

import difflib
import hashlib
import math
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from collections.abc import Mapping
from typing import Any, Callable

from .model.dynamics import GROWTH_FORMS, RESPONSES
from .model.network import CORRIDOR_RESISTANCE
from .errors import InputError, RunError, allowed_range

__all__ = ["Scenario", "FieldRef", "SCHEMA", "read_scenario", "parse_scenario"]


@dataclass(frozen=True)
class FieldRef:
    """A parameter taken per patch from an attribute of the patch file."""

    field: str


@dataclass(frozen=True)
class Key:
    """One scenario key: default, what it accepts, and whether it may be per patch."""

    default: Any
    check: Callable[[Any], str | None]
    per_patch: bool = False
    doc: str = ""


# ----------------------------------------------------------------------- value checks
#: The largest magnitude of a scenario number or per-patch value: far beyond any rate,
#: density or time in use, and far enough from float64's 1.8e308 that products of a few
#: of them in the equations stay finite.
LARGEST = 1e12
#: The scenario keys that name input files, and what each file is (for messages).
INPUT_FILES = {"patches.path": "patch file", "dispersal.corridors": "corridor file",
               "dispersal.links": "links table", "dispersal.resistance": "resistance raster",
               "planning.cost_raster": "cost raster"}
#: A scenario is a short text: larger files are refused before they are read.
MAX_SCENARIO_BYTES = 1 << 20
def _number(lo=None, hi=None, *, lo_open=False, integer=False):
    wanted = allowed_range(lo, hi, lo_open, integer=integer)

    def check(v):
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            quoted = ""
            if isinstance(v, str):
                try:
                    float(v)
                    quoted = ", without quotes"
                except ValueError:
                    pass
            return f"{v!r} is not a number; give {wanted}{quoted}"
        if integer and not float(v).is_integer():
            return f"{v!r} is not a whole number; give {wanted}"
        if not math.isfinite(v):
            return f"{v!r} is not a finite number; give {wanted}"
        if lo is not None and (v <= lo if lo_open else v < lo) or hi is not None and v > hi:
            return f"{v!r} is out of range; give {wanted}"
        if not integer and abs(v) > LARGEST:
            capped = allowed_range(-LARGEST if lo is None else lo, LARGEST, lo_open)
            return (f"{v!r} is beyond the largest value trophoscape computes with "
                    f"({LARGEST:g}); give {capped}")
        return None

    check.bounds = (lo, hi, lo_open)
    return check


def _choice(*options, table=None):
    """A check that a value is one of ``options`` (or, with ``table``, one of its keys as
    they are when the value is checked, so that forms registered later count)."""
    def check(v):
        allowed = tuple(table) if table is not None else options
        if v not in allowed:
            close = (difflib.get_close_matches(v, [str(o) for o in allowed], n=1, cutoff=0.6)
                     if isinstance(v, str) else [])
            choices = ", ".join(repr(o) for o in allowed)
            if close:
                return f"{v!r} is not one of {choices}; did you mean {close[0]!r}?"
            return f"{v!r} is not one of the choices; give one of {choices}"
        return None

    return check


def _text(optional=False):
    def check(v):
        if v is None and optional:
            return None
        if not isinstance(v, str) or not v.strip():
            return f"{v!r} is not a text; give a non-empty text in quotes"
        return None

    return check


def _flag(v):
    if not isinstance(v, bool):
        return f"{v!r} is not true or false; write true or false (lower case, no quotes)"
    return None


def _number_or(word, **bounds):
    inner = _number(**bounds)

    def check(v):
        if v == word:
            return None
        msg = inner(v)
        return None if msg is None else f"{msg}, or {word!r}"

    check.bounds = inner.bounds
    return check


_nonneg = _number(0)


def _optional(inner):
    """``inner``, or nothing (the key left out)."""
    def check(v):
        return None if v is None else inner(v)

    return check


def _number_list(v):
    """A non-empty list of numbers (TOML array), or nothing."""
    if v is None:
        return None
    if (not isinstance(v, list) or not v
            or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in v)):
        return f"{v!r} is not a list of numbers; give e.g. [3, 4] (square brackets)"
    if any(not math.isfinite(float(x)) for x in v):
        return f"{v!r} holds a value that is not finite; give finite numbers"
    return None


_pos = _number(0, lo_open=True)

SCHEMA: dict[str, dict[str, Key]] = {
    "": {
        "name": Key(None, _text(optional=True), doc="title of the study"),
        "time_unit": Key("year", _text(), doc="unit of every time and rate"),
    },
    "patches": {
        "path": Key(None, _text(), doc="patch file, relative to the scenario"),
        "id_field": Key(None, _text(optional=True)),
        "quality_field": Key(None, _text(optional=True)),
        "crs": Key("auto", _text()),
        "layer": Key(None, _text(optional=True), doc="layer of a GeoPackage"),
        "habitat_values": Key(None, _number_list,
                              doc="a raster path: cell values that are habitat"),
        "suitability_threshold": Key(None, _optional(_number()),
                                     doc="a raster path: cells of at least this are habitat"),
        "min_area_km2": Key(0.0, _nonneg, doc="a raster path: smaller patches are dropped"),
    },
    "prey": {
        "growth": Key("logistic", _choice(table=GROWTH_FORMS)),
        "growth_rate": Key(1.0, _nonneg, per_patch=True),
        "capacity_density": Key(50.0, _pos, per_patch=True),
        "allee_density": Key(5.0, _pos, per_patch=True),
        "emigration_rate": Key(0.1, _nonneg, per_patch=True),
        "kernel_scale_km": Key(2.0, _pos, per_patch=True),
        "initial_density": Key(40.0, _number_or("equilibrium", lo=0), per_patch=True),
    },
    "predator": {
        "mortality_rate": Key(0.5, _nonneg, per_patch=True),
        "conversion": Key(0.4, _nonneg, per_patch=True),
        "emigration_rate": Key(0.05, _nonneg, per_patch=True),
        "kernel_scale_km": Key(5.0, _pos, per_patch=True),
        "initial_density": Key(2.0, _number_or("equilibrium", lo=0), per_patch=True),
    },
    "predation": {
        "response": Key("holling2", _choice(table=RESPONSES)),
        "attack_rate": Key(1.0, _nonneg, per_patch=True),
        "handling_time": Key(0.2, _nonneg, per_patch=True),
        "interference": Key(0.0, _nonneg, per_patch=True),
    },
    "dispersal": {
        "kernel": Key("exponential", _choice("exponential", "gaussian", "step", "none")),
        "max_distance_km": Key(15.0, _pos),
        "distance": Key("boundary", _choice("boundary", "centroid")),
        "survival_per_km": Key(0.97, _number(0, 1)),
        "corridors": Key(None, _text(optional=True)),
        "links": Key(None, _text(optional=True)),
        "corridor_snap_km": Key(0.1, _nonneg, doc="how far a corridor end may be from its patch"),
        "resistance": Key(None, _text(optional=True),
                          doc="GeoTIFF: cost of crossing one km of each cell relative to open "
                              "ground; links then act as their least-cost distance"),
        "matrix_resistance": Key(1.0, _pos,
                                 doc="without a resistance raster: cost of one km between "
                                     "patches relative to open ground"),
        "corridor_resistance": Key(CORRIDOR_RESISTANCE, _pos,
                                   doc="cost of one km along a corridor relative to open "
                                       "ground, unless the corridor's 'resistance' says "
                                       "otherwise"),
    },
    "run": {
        "duration": Key(400.0, _pos),
        "burn_in": Key(100.0, _nonneg),
        "census_interval": Key(0.5, _pos),
        "extinction_abundance": Key(1.0, _nonneg),
        "method": Key("auto", _choice("auto", "RK45", "RK23", "DOP853", "Radau", "BDF", "LSODA")),
        "rtol": Key(1e-6, _number(0, 1, lo_open=True)),
        "atol": Key(1e-8, _pos),
        "seed": Key(1, _number(0, integer=True)),
        "replicates": Key(1, _number(1, integer=True)),
    },
    "planning": {
        "cost_per_km": Key(1.0, _pos, doc="cost of one km of a candidate corridor that "
                                         "trophoscape draws itself"),
        "cost_raster": Key(None, _text(optional=True),
                           doc="GeoTIFF of the cost of one km of corridor in each cell "
                               "(instead of cost_per_km)"),
        "search_km": Key(None, _optional(_pos),
                         doc="how far apart two patches may be for a candidate between "
                             "them (default twice max_distance_km)"),
    },
    "analysis": {
        "stability": Key(True, _flag, doc="equilibrium and leading eigenvalues of the network"),
        "capacity": Key(True, _flag, doc="metapopulation capacity and each patch's share"),
        "synchrony_pairs": Key(200_000, _number(10, integer=True),
                               doc="pairs sampled for synchrony against distance"),
    },
    "noise": {
        "environmental_sd": Key(0.0, _nonneg,
                                doc="intensity of the noise in the prey's per-capita growth "
                                    "rate, per sqrt(time unit): over a time T it multiplies "
                                    "prey abundance by exp(X), sd(X) = environmental_sd "
                                    "sqrt(T) (0: no environmental noise)"),
        "predator_mortality_sd": Key(0.0, _nonneg,
                                     doc="the same for the predator's per-capita mortality "
                                         "(an independent field)"),
        "correlation_km": Key(10.0, _number_or("regional", lo=0, lo_open=True),
                              doc='spatial correlation length, or "regional" (one shared value)'),
        "kernel": Key("exponential", _choice("exponential", "gaussian"),
                      doc="how correlation decays with the distance between patch centroids"),
        "shared_share": Key(0.0, _number(0, 1),
                            doc="share of the variance common to every patch (Moran effect)"),
        "correlation_time": Key(0.0, _nonneg,
                                doc="time units over which the noise keeps its value "
                                    "(Ornstein-Uhlenbeck correlation time; 0: white noise)"),
        "noise_step": Key("auto", _number_or("auto", lo=0, lo_open=True),
                          doc='time units the noise is held over; "auto": a tenth of '
                              "1 / max(prey growth rate, predator mortality rate)"),
        "demographic": Key(False, _flag,
                           doc="births, deaths, predation and moves as random events "
                               "(tau-leaping with exact steps for small counts)"),
        "rank": Key(500, _number(1, 100_000, integer=True),
                    doc="random Fourier features per replicate"),
    },
    "spread": {
        "species": Key("auto", _choice("auto", "prey", "predator"),
                       doc='the species whose collapse is followed; "auto": the prey when '
                           "every shock acts on the prey, else the predator"),
        "collapse_share": Key(0.1, _number(0, 1, lo_open=True),
                              doc="collapsed: below this share of the baseline's running mean"),
        "sustained": Key(2.0, _pos, doc="for at least this long (time units)"),
        "window": Key(20.0, _pos, doc="width of the baseline's centred running mean"),
    },
    "fit": {
        "estimate": Key((), lambda v: _estimate_keys(v),
                        doc="numeric scenario keys to estimate from counts, as "
                            "'section.key'"),
        "observation": Key("lognormal", _choice("lognormal", "poisson", "negative_binomial"),
                           doc="how counts scatter around the model's expectation"),
        "detection": Key(1.0, _number(0, 1, lo_open=True),
                         doc="share of the individuals of a patch a survey counts"),
        "bounds": Key(None, lambda v: _bounds_table(v),
                      doc="per estimated key, [low, high] (default a hundredth to a hundred "
                          "times the scenario's value)"),
        "starts": Key(4, _number(1, 50, integer=True),
                      doc="starting points of the search: the scenario's values, then points "
                          "drawn (run.seed) within a factor of 3 of them"),
    },
}


def _numeric_key(name) -> str | None:
    """Why ``name`` is not a numeric scenario key that a fit could estimate, or None."""
    if not isinstance(name, str) or "." not in name:
        return f"{name!r} is not a scenario key; write it as 'section.key'"
    section, _, key = name.partition(".")
    spec = SCHEMA.get(section, {}).get(key)
    if spec is None or section == "fit":
        known = [f"{s}.{k}" for s, keys in SCHEMA.items() for k in keys if s != "fit"]
        close = difflib.get_close_matches(name, known, n=1)
        return (f"{name!r} is not a scenario key" + (f"; did you mean {close[0]!r}?"
                                                      if close else ""))
    if isinstance(spec.default, bool) or not isinstance(spec.default, (int, float)):
        return f"{name!r} is not a number, so it cannot be estimated"
    return None


def _estimate_keys(v):
    if not isinstance(v, (list, tuple)):
        return f"{v!r} is not a list; give e.g. [\"prey.growth_rate\", \"predation.attack_rate\"]"
    for name in v:
        why = _numeric_key(name)
        if why:
            return why
    if len(set(v)) != len(v):
        return "a key is named twice; name each once"
    return None


def _bounds_table(v):
    if v is None:
        return None
    if not isinstance(v, dict):
        return (f"{v!r} is not a table; give e.g. {{\"prey.growth_rate\" = [0.1, 5.0]}}")
    for name, pair in v.items():
        why = _numeric_key(name)
        if why:
            return why
        if (not isinstance(pair, (list, tuple)) or len(pair) != 2
                or any(isinstance(x, bool) or not isinstance(x, (int, float)) for x in pair)
                or not 0 < pair[0] < pair[1] or not math.isfinite(pair[1])):
            return (f"the bounds of {name} are {pair!r}; give [low, high] with "
                    "0 < low < high")
    return None

#: Keys that meant something else in earlier versions: refused with what to write instead.
RETIRED: dict[tuple[str, str], str] = {
    ("noise", "autocorrelation"): (
        "this key is retired: it correlated successive census intervals, so the noise "
        "changed with the census interval; give noise.correlation_time in time units "
        "instead (a value a at census interval c becomes -c / ln(a)), and note that "
        "noise.environmental_sd is now per sqrt(time unit) (README, \"Changes to the "
        "contract\")"),
}


@dataclass(frozen=True)
class Scenario:
    """A validated scenario.

    ``values`` maps ``"section.key"`` (top-level keys without a section) to the value, with
    every default filled in; per-patch parameters are :class:`FieldRef`. ``path`` is the
    scenario file (or None for a scenario built in code) and ``base_dir`` the folder that
    relative paths are resolved against.
    """

    values: MappingProxyType
    path: Path | None = None
    base_dir: Path = field(default_factory=Path.cwd)
    text: str = ""
    sha256: str = ""  # of the file's bytes (of ``text`` for a scenario built in code)

    def __post_init__(self):
        if not self.sha256:
            object.__setattr__(self, "sha256",
                               hashlib.sha256(self.text.encode("utf-8")).hexdigest())

    def __getitem__(self, key: str):
        return self.values[key]

    @property
    def name(self) -> str:
        return self.values["name"] or (self.path.stem if self.path else "scenario")

    def resolve(self, relative: str) -> Path:
        """A path of the scenario, resolved against the scenario's folder."""
        p = Path(relative).expanduser()
        return p if p.is_absolute() else (self.base_dir / p)

    def fields_used(self) -> dict[str, str]:
        """Patch attributes the scenario names, mapped to the key naming each."""
        used = {}
        if self.values["patches.quality_field"]:
            used[self.values["patches.quality_field"]] = "patches.quality_field"
        for key, value in self.values.items():
            if isinstance(value, FieldRef):
                used.setdefault(value.field, key)
        return used

    def with_values(self, **changes) -> "Scenario":
        """A copy with some ``section.key`` values replaced (checked like the file's).

        Keys are given with ``__`` for the dot: ``with_values(run__duration=50)``.
        """
        raw = nested_tables(dict(self.values))
        for k, v in changes.items():
            section, _, key = k.rpartition("__")
            raw.setdefault(section, {})[key] = v
        return parse_scenario(raw, path=self.path, base_dir=self.base_dir, text=self.text)


def nested_tables(flat: dict) -> dict:
    """A scenario's flat ``section.key`` values as the nested tables ``parse_scenario``
    reads (``[[shock]]`` tables included)."""
    out: dict = {}
    for k, v in flat.items():
        section, _, key = k.rpartition(".")
        if isinstance(v, FieldRef):
            v = {"field": v.field}
        if v is None:
            continue
        if k == "shock":
            v = [{key: (list(x) if isinstance(x, tuple) else x) for key, x in t.items()
                  if x is not None} for t in v]
        if section:
            out.setdefault(section, {})[key] = v
        else:
            out[key] = v
    return out


def with_changes(raw: dict, changes) -> dict:
    """Scenario tables (as ``parse_scenario`` reads them) with some ``section.key`` values
    replaced (a copy)."""
    out = {k: (dict(v) if isinstance(v, dict) else v) for k, v in raw.items()}
    for key, value in dict(changes).items():
        section, _, name = key.rpartition(".")
        if section:
            table = out.get(section)
            out[section] = dict(table) if isinstance(table, dict) else {}
            out[section][name] = value
        else:
            out[name] = value
    return out


def _suggest(word, options):
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


def check_regular_file(path, *, what: str, limit: int | None = None,
                       folders: bool = False) -> None:
    """Refuse, before opening it, a path that is not a regular file (a named pipe or a
    device would block or never end), or is larger than ``limit`` bytes. ``folders``: a
    folder is accepted too (some GIS formats are folders).

    A missing file is left to the reader, whose message says so.
    """
    import stat

    try:
        info = os.stat(path)
    except FileNotFoundError:
        return
    except OSError as exc:
        raise InputError(f"cannot read the {what} ({exc.strerror or exc}); check that it is a "
                         "readable file", file=path) from None
    if stat.S_ISDIR(info.st_mode):
        if folders:
            return
        raise InputError(f"is a folder, not a {what}; give the path of the file itself",
                         file=path)
    if not stat.S_ISREG(info.st_mode):
        raise InputError(f"is not a regular file (a named pipe, device or socket); give the "
                         f"path of a {what} saved on disk", file=path)
    if limit is not None and info.st_size > limit:
        raise InputError(f"is {info.st_size:,} bytes, more than the {limit:,} a {what} may "
                         "have; check that this is the right file", file=path)


def read_scenario(path) -> Scenario:
    """Read and validate a scenario file.

    Raises
    ------
    InputError
        For an unreadable file, a TOML syntax error (with its line), an unknown section or
        key (with the closest known name), or a value of the wrong type or range.
    """
    path = Path(path)
    try:
        check_regular_file(path, what="scenario file", limit=MAX_SCENARIO_BYTES)
        raw_bytes = path.read_bytes()
        text = raw_bytes.decode("utf-8")
    except FileNotFoundError:
        raise InputError("scenario file not found; check the path (a relative path starts "
                         "from the current folder)", file=path) from None
    except UnicodeDecodeError:
        raise InputError("cannot read the scenario file: it is not UTF-8 text; save it as "
                         "UTF-8 (plain text) and try again", file=path) from None
    except OSError as exc:
        raise InputError(f"cannot read the scenario file ({exc.strerror or exc}); check that "
                         "it is a readable file", file=path) from None
    try:
        raw = tomllib.loads(text)
    except RecursionError:
        raise InputError("not valid for trophoscape: values are nested too deeply (arrays "
                         "or tables inside one another hundreds of levels deep); a scenario "
                         "needs at most a few levels", file=path) from None
    except tomllib.TOMLDecodeError as exc:
        detail = str(exc)
        if detail.endswith("(at end of document)"):
            detail = detail.replace("(at end of document)",
                                    f"(at the end, line {text.count(chr(10)) or 1})")
        raise InputError(f"not valid TOML: {detail}; correct the file there (text values "
                         "need quotes, sections [brackets])", file=path) from None
    sc = parse_scenario(raw, path=path, base_dir=path.parent, text=text)
    object.__setattr__(sc, "sha256", hashlib.sha256(raw_bytes).hexdigest())
    return sc


def parse_scenario(raw: dict, *, path=None, base_dir=None, text: str = "") -> Scenario:
    """Validate a scenario given as nested dictionaries (as ``tomllib`` returns them)."""
    file = path
    values: dict[str, Any] = {}
    sections = [s for s in SCHEMA if s]
    for name, content in raw.items():
        if name in SCHEMA[""] or name == "shock":
            continue
        if name not in SCHEMA:
            hint = _suggest(name, sections + list(SCHEMA[""])) or (
                f"; the sections are {', '.join(sections)}")
            raise InputError(f"unknown section or top-level key{hint}", file=file, field=name)
        if not isinstance(content, dict):
            raise InputError(f"{content!r} is not a section; write [{name}] on a line of its "
                             "own with its keys below it", file=file, field=name)
        for key in content:
            if (name, key) in RETIRED:
                raise InputError(RETIRED[name, key], file=file, field=f"{name}.{key}")
            if key not in SCHEMA[name]:
                hint = _suggest(key, SCHEMA[name]) or (
                    f"; [{name}] takes {', '.join(SCHEMA[name])}")
                raise InputError(f"unknown key{hint}",
                                 file=file, field=f"{name}.{key}")

    for section, keys in SCHEMA.items():
        given = raw if section == "" else raw.get(section, {})
        for key, spec in keys.items():
            full = f"{section}.{key}" if section else key
            if key not in given:
                if spec.default is None and section == "patches" and key == "path":
                    raise InputError("is missing; add path = \"patches.geojson\" under "
                                     "[patches], naming the patch file (GeoJSON, GeoPackage or "
                                     "Shapefile) relative to the scenario", file=file, field=full)
                values[full] = spec.default
                continue
            value = given[key]
            if spec.per_patch and isinstance(value, dict):
                if set(value) != {"field"} or not isinstance(value["field"], str):
                    raise InputError(f"{value!r} is not a per-patch value; write "
                                     '{ field = "ATTRIBUTE" } with a column of the patch file, '
                                     "or give one number", file=file, field=full)
                values[full] = FieldRef(value["field"])
                continue
            problem = spec.check(value)
            if problem:
                raise InputError(problem, file=file, field=full)
            if isinstance(spec.default, float) and isinstance(value, int) and not isinstance(value, bool):
                value = float(value)
            values[full] = value

    run = values
    if run["run.burn_in"] >= run["run.duration"]:
        raise InputError(f"{run['run.burn_in']:g} is not below run.duration "
                         f"{run['run.duration']:g}; shorten the burn-in or lengthen the run",
                         file=file, field="run.burn_in")
    if run["run.census_interval"] > run["run.duration"]:
        raise InputError(f"{run['run.census_interval']:g} is longer than run.duration "
                         f"{run['run.duration']:g}; give a census interval at most the duration",
                         file=file, field="run.census_interval")
    if values["dispersal.kernel"] == "none" and not (values["dispersal.links"] or values["dispersal.corridors"]):
        pass  # a network of isolated patches is allowed (no dispersal)
    if run["run.replicates"] != 1 and not (values["noise.environmental_sd"] > 0
                                           or values["noise.predator_mortality_sd"] > 0
                                           or values["noise.demographic"]):
        # identical deterministic copies would give a falsely narrow Wilson interval
        raise InputError("replicates other than 1 need noise (noise.environmental_sd > 0, "
                         "noise.predator_mortality_sd > 0 or noise.demographic = true): "
                         "without it every replicate is the same run; set replicates = 1 "
                         "or add noise", file=file, field="run.replicates")
    values["shock"] = _parse_shocks(raw.get("shock", []), values, file)
    values["run.seed"] = int(values["run.seed"])
    values["analysis.synchrony_pairs"] = int(values["analysis.synchrony_pairs"])
    values["run.replicates"] = int(values["run.replicates"])
    values["noise.rank"] = int(values["noise.rank"])
    base = Path(base_dir) if base_dir is not None else Path.cwd()
    return Scenario(values=MappingProxyType(values), path=None if path is None else Path(path),
                    base_dir=base, text=text)


# ----------------------------------------------------------------------- [[shock]] tables
def _ids_list(v, *, allow_all):
    if allow_all and v == "all":
        return None
    if (not isinstance(v, (list, tuple)) or not v
            or not all(isinstance(x, (str, int)) and not isinstance(x, bool) for x in v)):
        alternative = ' or "all"' if allow_all else ""
        return f"{v!r} is not a list of patch ids; give a list such as [\"A\", \"B\"]{alternative}"
    return None


def _pairs_list(v):
    if (not isinstance(v, (list, tuple)) or not v
            or not all(isinstance(p, (list, tuple)) and len(p) == 2 and not _ids_list(p, allow_all=False)
                       for p in v)):
        return f'{v!r} is not a list of pairs of patch ids; give pairs such as [["A", "B"]]'
    if any(str(a) == str(b) for a, b in v):
        return "a pair names the same patch twice; give two different patch ids in each pair"
    return None


#: Keys of a [[shock]] table besides ``kind``: default and check. ``None`` means "no default".
SHOCK_KEYS: dict[str, Key] = {
    "at": Key(None, _nonneg, doc="time of the shock; default run.burn_in"),
    "patches": Key(None, lambda v: _ids_list(v, allow_all=True), doc='ids, or "all"'),
    "share": Key(None, _number(0, 1), doc="share removed"),
    "factor": Key(None, _nonneg, doc="capacity or mortality multiplier"),
    "duration": Key(None, _pos, doc="temporary shocks; omit for permanent"),
    "rate": Key(None, _nonneg, doc="per-capita removal rate (harvest)"),
    "species": Key("predator", _choice("prey", "predator"), doc="harvested species"),
    "links": Key(None, _pairs_list, doc="pairs of ids (link_cut)"),
}


def _parse_shocks(tables, values, file) -> tuple:
    """Validate the ``[[shock]]`` array of tables; ids are checked later, against the patches."""
    from .model.shocks import SHOCK_KINDS

    if isinstance(tables, Mapping) or not isinstance(tables, (list, tuple)):
        raise InputError("is not a list of shock tables; write each shock as a [[shock]] "
                         "table (double brackets) with its keys below it",
                         file=file, field="shock")
    out = []
    kinds = ", ".join(repr(k) for k in SHOCK_KINDS)
    for i, table in enumerate(tables):
        where = f"shock[{i}]"
        if not isinstance(table, Mapping):
            raise InputError(f"{table!r} is not a shock table; write the shock's keys on "
                             "the lines below its [[shock]] line", file=file, field=where)
        table = dict(table)
        if "kind" not in table:
            raise InputError(f"is missing; add kind = one of {kinds}", file=file,
                             field=f"{where}.kind")
        kind = table["kind"]
        if kind not in SHOCK_KINDS:
            hint = _suggest(str(kind), SHOCK_KINDS) if isinstance(kind, str) else ""
            raise InputError(f"unknown shock kind {kind!r}{hint or f'; give one of {kinds}'}",
                             file=file, field=f"{where}.kind")
        cls = SHOCK_KINDS[kind]
        for key in table:
            if key == "kind":
                continue
            if key not in SHOCK_KEYS:
                hint = _suggest(key, SHOCK_KEYS) or f"; a shock takes kind, {', '.join(SHOCK_KEYS)}"
                raise InputError(f"unknown key{hint}", file=file, field=f"{where}.{key}")
            if key != "at" and key not in cls.takes:
                raise InputError(f"does not apply to a {kind} shock, which takes at, "
                                 f"{', '.join(cls.takes)}; remove it or change the kind",
                                 file=file, field=f"{where}.{key}")
        shock = {"kind": kind}
        for key in ("at",) + cls.takes:
            spec = SHOCK_KEYS[key]
            if key not in table:
                if key in cls.needs:
                    raise InputError(f"is missing; a {kind} shock needs it ({spec.doc}): "
                                     f"add {key} = ... to this [[shock]] table",
                                     file=file, field=f"{where}.{key}")
                shock[key] = values["run.burn_in"] if key == "at" else spec.default
                continue
            value = table[key]
            problem = spec.check(value)
            if problem:
                raise InputError(problem, file=file, field=f"{where}.{key}")
            if key == "factor" and kind == "habitat_loss" and value == 0:
                raise InputError("must be > 0 for habitat_loss (a capacity of zero is undefined); "
                                 "use kind = \"patch_loss\" to remove a patch", file=file,
                                 field=f"{where}.{key}")
            if key in ("patches", "links") and value != "all":
                value = (tuple(str(x) for x in value) if key == "patches"
                         else tuple((str(a), str(b)) for a, b in value))
            elif isinstance(value, int) and not isinstance(value, bool) and key != "species":
                value = float(value)
            shock[key] = value
        if shock["at"] >= values["run.duration"]:
            raise InputError(f"{shock['at']:g} is not before the end of the run "
                             f"(run.duration {values['run.duration']:g}); set the shock earlier "
                             "or lengthen the run", file=file, field=f"{where}.at")
        out.append(MappingProxyType(shock))
    return tuple(out)


def bounds_of(full_key: str):
    """``(lo, hi, lo_open)`` of a numeric key, for checking per-patch values."""
    section, _, key = full_key.rpartition(".")
    return getattr(SCHEMA[section][key].check, "bounds", (None, None, False))


def input_files(scenario, variants=()) -> list[Path]:
    """The files a scenario reads: the patch file, corridors, links, the scenario file.

    ``variants`` are mappings of scenario keys to values (a sweep's points): a path key
    among them names another input, resolved against the scenario's folder.
    """
    files = [Path(scenario.resolve(scenario[key])) for key in INPUT_FILES if scenario[key]]
    for variant in variants:
        for key in INPUT_FILES:
            value = dict(variant).get(key)
            if isinstance(value, str) and value:
                files.append(Path(scenario.resolve(value)))
    if scenario.path is not None:
        files.append(Path(scenario.path))
    return files


def demo_scenario_path() -> Path:
    """The bundled demo scenario (installed with the package, or the source tree's data/)."""
    from importlib.resources import files

    installed = Path(str(files("trophoscape"))) / "_demo_data" / "demo.toml"
    if installed.is_file():
        return installed
    source = Path(__file__).resolve().parents[2] / "data" / "demo.toml"
    if source.is_file():
        return source
    raise RunError("the demo data are missing from this installation; reinstall trophoscape")
