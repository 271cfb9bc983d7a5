"""Parameter sweeps: one scenario, many variants and replicates, every finished run recorded.

A sweep is a list of *runs*: every point of the sweep (a set of scenario values, the
Cartesian product of the ``--vary`` values and/or the rows of a sweep table) times every
replicate. Each run is a pure function of (scenario text, variant, seed), computed by
:func:`run_point` on any worker (a local process or a Dask worker), which re-reads the
scenario from its text and builds the study itself; nothing large is pickled.

Every finished run is written at once, from the main process, to a results ledger: an SQLite
file ``ledger.sqlite`` in the output folder (WAL journal, one transaction per run, the run id
as primary key). ``resume=True`` skips the runs already recorded as ok, re-runs failed ones,
and never records a run twice. The table ``sweep.csv`` is regenerated from the ledger when the
sweep ends; ``runs/<run_id>.json`` holds each run's results; ``plots/`` shows each key result
against each varied value.

The output folder is checked before anything runs (:func:`trophoscape.io.folder.check_out`)
and made with its marker when the sweep starts, because the ledger lives there from the
first run on (an earlier output folder there is replaced then; a sweep's own folder is kept
with ``resume``). The table and plots are written through
:func:`trophoscape.io.folder.staged_folder`, which carries the ledger and ``runs/`` over (hard
links) and replaces the folder as a whole, so they appear whole or not at all.

Replicates of a point get seeds from ``numpy.random.SeedSequence(seed).spawn(replicates)``,
where ``seed`` is the point's ``run.seed``; so replicate r has the same seed at every point
(common random numbers across points, common practice in simulation experiments) and adding
replicates later keeps the seeds of the earlier ones.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import itertools
import json
import math
import os
import sqlite3
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

from ..errors import InputError, param
from ..io.folder import write_atomic
from ..io.ledger import Ledger, now
from ..io.tables import flatten_summary
from ..integrate.noise import replicate_seeds
from ..scenario import with_changes
from .tasks import ScenarioPayload

__all__ = ["parse_vary", "run_ledger", "read_sweep_table", "plan_sweep", "open_ledger",
           "SweepRun", "KEY_RESULTS",
           "LEDGER_NAME", "TABLE_NAME"]

#: The sweep's parameter of varied values (``--vary`` on the command line), in messages.
VARY = param("variants_or_vary_specs")

LEDGER_NAME = "ledger.sqlite"
TABLE_NAME = "sweep.csv"
#: What a sweep keeps from one session to the next: the ledger (with SQLite's WAL files)
#: and the per-run records.
WORKING_NAMES = (LEDGER_NAME, f"{LEDGER_NAME}-wal", f"{LEDGER_NAME}-shm", "runs")
#: Every path a sweep's folder may come to hold, as patterns of the folder's marker
#: (``*``: any part of one name; a folder ends in "/"): the ledger, the per-run records (and
#: the temporary file of one being written), the table and the plots.
SWEEP_NAMES = (LEDGER_NAME, f"{LEDGER_NAME}-wal", f"{LEDGER_NAME}-shm", "runs/",
               "runs/*.json", "runs/.*.tmp", TABLE_NAME, "plots/", "plots/*.png")
#: Network-level results drawn against every varied value.
KEY_RESULTS = ("prey_regional_persistence", "predator_regional_persistence",
               "prey_synchrony", "predator_synchrony")
#: Columns of the table that depend on when and how fast a run went, not on its inputs.
TIME_COLUMNS = ("seconds", "finished")
LEDGER_FORMAT = "1"


# ------------------------------------------------------------------------------ the plan
def _all_keys() -> list[str]:
    from ..scenario import SCHEMA

    return [f"{s}.{k}" if s else k for s, keys in SCHEMA.items() for k in keys]


def _check_key(key: str, *, field: str, file=None, feature=None) -> None:
    keys = _all_keys()
    if key in keys:
        return
    close = difflib.get_close_matches(key, keys, n=1, cutoff=0.6)
    hint = f"; did you mean {close[0]!r}?" if close else (
        "; keys are written section.key, e.g. 'prey.growth_rate'")
    raise InputError(f"unknown scenario key {key!r}{hint}", file=file, feature=feature,
                     field=field)


def _kind(key: str) -> str:
    """"text", "flag" or "number": how a key's values are written (from its schema check)."""
    from ..scenario import SCHEMA

    section, _, name = key.rpartition(".")
    check = SCHEMA[section][name].check
    if hasattr(check, "bounds"):  # the schema's numeric checks carry their range
        return "number"
    return "flag" if check(True) is None else "text"


def _default_is_text(key: str) -> bool:
    return _kind(key) == "text"


def _token(text: str, key: str):
    """One value as written on the command line or in a table cell: number, bool or text."""
    text = text.strip()
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "'\"":
        return text[1:-1]
    kind = _kind(key)
    if kind == "text":
        return text
    if kind == "flag":
        return {"true": True, "false": False}.get(text.lower(), text)
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        return text


def _tidy(x: float) -> float:
    # linspace steps such as 0.7000000000000001 would give ugly labels and unstable ids
    return float(f"{x:.12g}")


#: Most runs (points × replicates) a sweep may plan: a ledger row, a JSON file and a table
#: row each; more is a typing slip (a COUNT with extra zeros), not a study.
MAX_SWEEP_RUNS = 1_000_000


def parse_vary(arg: str) -> tuple[str, list]:
    """Parse one ``KEY=SPEC`` argument of ``--vary``.

    ``SPEC`` is ``START:STOP:COUNT`` (COUNT evenly spaced numbers from START to STOP, both
    included, as :func:`numpy.linspace`) or a comma-separated list of numbers or words.

    Returns
    -------
    key : str
    values : list
        In the order given.

    Raises
    ------
    InputError
        Naming the argument (``field='--vary KEY=SPEC'``), for a missing ``=``, an unknown
        key, a malformed range, an empty or repeated value.

    Examples
    --------
    >>> parse_vary("prey.growth_rate=0.5:1.5:3")
    ('prey.growth_rate', [0.5, 1.0, 1.5])
    >>> parse_vary("dispersal.kernel=exponential,gaussian")
    ('dispersal.kernel', ['exponential', 'gaussian'])
    """
    field = f"{VARY} {arg}"
    key, eq, spec = arg.partition("=")
    key, spec = key.strip(), spec.strip()
    if not eq or not key:
        raise InputError("must be KEY=VALUES, e.g. prey.growth_rate=0.5:1.5:11 or "
                         "dispersal.max_distance_km=5,10,20", field=field)
    _check_key(key, field=field)
    if not spec:
        raise InputError("no values after '='; give START:STOP:COUNT or a comma list",
                         field=field)
    if ":" in spec and "," not in spec and not _default_is_text(key):
        parts = spec.split(":")
        if len(parts) != 3:
            raise InputError(f"{spec!r} is not a range START:STOP:COUNT; give e.g. 0.5:1.5:11",
                             field=field)
        try:
            start, stop = float(parts[0]), float(parts[1])
        except ValueError:
            raise InputError(f"START and STOP of the range {spec!r} are not both numbers; give "
                             "numbers, e.g. 0.5:1.5:11", field=field) from None
        try:
            count = int(parts[2])
        except ValueError:
            count = 0
        if count > MAX_SWEEP_RUNS:
            raise InputError(f"COUNT {count:,} is more points than a sweep may have (at most "
                             f"{MAX_SWEEP_RUNS:,} runs); give a smaller COUNT", field=field)
        if count < 1 or not math.isfinite(start) or not math.isfinite(stop):
            raise InputError(f"COUNT {parts[2]!r} of the range is not a whole number of at "
                             "least 1; give e.g. 0.5:1.5:11" if count < 1 else
                             f"START and STOP of the range {spec!r} are not both finite; give "
                             "finite numbers, e.g. 0.5:1.5:11", field=field)
        if count == 1:
            values = [_tidy(start)]
        else:
            step = (stop - start) / (count - 1)
            values = [_tidy(start + k * step) for k in range(count - 1)] + [_tidy(stop)]
    else:
        items = [s for s in spec.split(",")]
        if any(not s.strip() for s in items):
            raise InputError(f"empty value in the list {spec!r}; remove the extra comma",
                             field=field)
        values = [_token(s, key) for s in items]
    seen = set()
    for v in values:
        number = isinstance(v, (int, float)) and not isinstance(v, bool)
        marker = repr(float(v)) if number else json.dumps(v)
        if marker in seen:
            raise InputError(f"the value {v!r} is given twice; give each value once",
                             field=field)
        seen.add(marker)
    return key, values


def read_sweep_table(path) -> list[dict]:
    """Read a sweep table: a CSV file with one column per scenario key, one row per point.

    Raises
    ------
    InputError
        For a missing file, an unknown key as a column header (with the closest known one),
        an empty cell (naming the row, 0-based, and the column) or a repeated row.
    """
    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except FileNotFoundError:
        raise InputError("sweep table not found; check the path", file=path,
                         field=param("table")) from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"cannot read the sweep table ({exc}); save it as a CSV text file",
                         file=path, field=param("table")) from None
    rows = [r for r in rows if any(c.strip() for c in r)]
    if not rows:
        raise InputError("the sweep table is empty; give a header of scenario keys and one "
                         "row per point", file=path, field=param("table"))
    header = [h.strip() for h in rows[0]]
    for h in header:
        if not h:
            raise InputError("empty column name in the header; head every column with a "
                             "scenario key, e.g. prey.growth_rate", file=path, field=param("table"))
        _check_key(h, file=path, field=h)
    if len(set(header)) != len(header):
        dup = next(h for h in header if header.count(h) > 1)
        raise InputError("column given twice; give each key one column", file=path,
                         field=dup)
    if len(rows) == 1:
        raise InputError("the sweep table has a header but no rows; add one row per point",
                         file=path, field=param("table"))
    points, seen = [], {}
    for i, row in enumerate(rows[1:]):
        if len(row) != len(header):
            raise InputError(f"has {len(row)} cells, the header {len(header)}; give every row "
                             "one cell per column", file=path, feature=i, field=param("table"))
        point = {}
        for h, cell in zip(header, row):
            if not cell.strip():
                raise InputError("empty cell; every row needs a value for every column",
                                 file=path, feature=i, field=h)
            point[h] = _token(cell, h)
        marker = json.dumps(point, sort_keys=True)
        if marker in seen:
            raise InputError(f"repeats row {seen[marker]}; give each point once", file=path,
                             feature=i, field=param("table"))
        seen[marker] = i
        points.append(point)
    return points


@dataclass(frozen=True)
class SweepRun:
    """One run of a sweep: what a worker needs, and nothing large.

    ``variant`` is a tuple of ``(key, value)`` pairs in the sweep's key order; the scenario
    travels as the tables of its file (:meth:`ScenarioPayload.from_text`), so a variant's
    values are validated with the file's own defaults.
    """

    run_id: str
    point: int
    replicate: int
    seed: int
    variant: tuple
    scenario: ScenarioPayload

    @property
    def values(self) -> dict:
        return dict(self.variant)


def run_id_of(variant: Mapping, replicate: int) -> str:
    """A stable id of a run: a hash of its variant (keys sorted) and its replicate number."""
    text = json.dumps({"variant": dict(variant), "replicate": int(replicate)},
                      sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def _scenario_for(text: str, path, base_dir, variant: Mapping):
    from ..scenario import parse_scenario

    raw = tomllib.loads(text)
    return parse_scenario(with_changes(raw, variant), path=None if path is None else Path(path),
                          base_dir=Path(base_dir), text=text)


def _describe(variant: Mapping) -> str:
    return ", ".join(f"{k}={v!r}" for k, v in variant.items())


def _as_points(spec, *, table=None) -> tuple[list[str], list[dict], dict]:
    """Keys, points and where each key came from (for messages), from the sweep's inputs.

    ``spec`` is a list of --vary strings (a ``.csv`` path among them is a sweep table), a
    dict of value lists, or a list of dicts (explicit points); groups combine as a Cartesian
    product. ``origins[key]`` is ``("vary", argument)`` or ``("table", path, rows)``.
    """
    groups: list[tuple[list[str], list[dict]]] = []
    origins: dict[str, tuple] = {}

    def add_table(path):
        rows = read_sweep_table(path)
        groups.append((list(rows[0]), rows))
        for k in rows[0]:
            origins.setdefault(k, ("table", Path(path), rows))

    if table is not None:
        add_table(table)
    if spec is None:
        spec = []
    if isinstance(spec, (str, os.PathLike)):
        spec = [spec]
    if isinstance(spec, Mapping):
        for key, values in spec.items():
            _check_key(key, field=f"{VARY} {key}")
            values = list(values) if isinstance(values, (list, tuple, range)) else [values]
            if not values:
                raise InputError("no values; give KEY=VALUES, e.g. prey.growth_rate=0.5,1,1.5",
                                 field=f"{VARY} {key}")
            groups.append(([key], [{key: v} for v in values]))
            origins.setdefault(key, ("vary", key))
    else:
        spec = list(spec)
        if spec and all(isinstance(s, Mapping) for s in spec):
            keys = list(spec[0])
            for i, point in enumerate(spec):
                if list(point) != keys:
                    raise InputError(f"point {i} has keys {list(point)}, point 0 has {keys}; "
                                     "give every point the same keys", field=VARY)
                for k in keys:
                    _check_key(k, field=VARY)
                    origins.setdefault(k, ("vary", k))
            groups.append((keys, [dict(p) for p in spec]))
        else:
            for s in spec:
                if isinstance(s, Mapping):
                    raise InputError(f"give either {VARY} strings or a list of dicts, not both",
                                     field=VARY)
                if isinstance(s, os.PathLike) or (str(s).endswith(".csv") and "=" not in str(s)):
                    add_table(s)
                    continue
                key, values = parse_vary(str(s))
                groups.append(([key], [{key: v} for v in values]))
                origins.setdefault(key, ("vary", str(s)))
    keys: list[str] = []
    for group_keys, _ in groups:
        for k in group_keys:
            if k in keys:
                raise InputError(f"the key {k!r} is varied twice; give all its values in one "
                                 f"{VARY}", field=f"{VARY} {k}")
            keys.append(k)
    if not groups:
        return [], [{}], origins
    total = math.prod(len(rows) for _, rows in groups)
    if total > MAX_SWEEP_RUNS:
        sizes = " × ".join(f"{len(rows):,}" for _, rows in groups)
        raise InputError(f"the sweep would have {sizes} = {total:,} points, more than the "
                         f"{MAX_SWEEP_RUNS:,} runs a sweep may have; vary fewer values",
                         field=VARY)
    points = [dict(itertools.chain.from_iterable(p.items() for p in combo))
              for combo in itertools.product(*(rows for _, rows in groups))]
    return keys, points, origins


def _value_error(scenario, exc: InputError, point: dict, origins: dict) -> InputError:
    """The error of a point that is not a scenario, naming the argument or table cell at fault.

    A value that is wrong on its own (in the base scenario) is blamed on the --vary argument
    or the table cell it came from; otherwise the combination is.
    """
    key = exc.field
    if key in point and key in origins:
        try:
            _scenario_for(scenario.text, scenario.path, scenario.base_dir, {key: point[key]})
        except InputError as alone:
            origin = origins[key]
            if origin[0] == "vary":
                return InputError(f"{key}: {alone.message}", field=f"{VARY} {origin[1]}")
            _, path, rows = origin
            row = next(i for i, r in enumerate(rows) if r.get(key) == point[key])
            return InputError(alone.message, file=path, feature=row, field=key)
    return InputError(f"the point {_describe(point)} is not a valid scenario: "
                      f"{exc.field}: {exc.message}", file=scenario.path, field=VARY)


def plan_sweep(scenario_path, variants_or_vary_specs=None, *, replicates: int = 1,
               table=None) -> tuple[list[str], list[SweepRun], Any]:
    """Check a sweep and list its runs, without running anything.

    Every point is validated as a whole scenario here, so a bad value is an
    :class:`InputError` before the first run starts.

    Returns
    -------
    keys : list of str
        The varied keys, in order.
    runs : list of SweepRun
        Point by point (the last key varies fastest), replicate by replicate.
    scenario : Scenario
        The base scenario.
    """
    from ..scenario import read_scenario

    scenario = read_scenario(scenario_path)
    if isinstance(replicates, bool) or not isinstance(replicates, int) or replicates < 1:
        raise InputError(f"{replicates!r} is not a whole number of at least 1; give the "
                         f"number of replicates per point, e.g. {param('replicates', 10)}",
                         field=param("replicates"))
    keys, points, origins = _as_points(variants_or_vary_specs, table=table)
    if len(points) * replicates > MAX_SWEEP_RUNS:
        raise InputError(f"{len(points):,} points × {replicates:,} replicates = "
                         f"{len(points) * replicates:,} runs, more than the "
                         f"{MAX_SWEEP_RUNS:,} a sweep may have; run fewer replicates or "
                         "points", field=param("replicates"))
    runs = []
    checked_files: dict = {}
    payload = ScenarioPayload.from_text(scenario)
    seen_points: dict[tuple, dict] = {}
    for p, point in enumerate(points):
        try:
            sc = _scenario_for(scenario.text, scenario.path, scenario.base_dir, point)
        except InputError as exc:
            raise _value_error(scenario, exc, point, origins) from None
        except TypeError:
            raise InputError(f"the point {_describe(point)} holds a value a scenario cannot "
                             "hold (numbers, words, true/false)", field=VARY) from None
        # The validated value is the canonical one (5 and 5.0 are the same distance).
        canonical = tuple((k, _canonical(sc[k], point[k])) for k in keys)
        if canonical in seen_points:
            raise InputError(f"the points {_describe(seen_points[canonical])} and "
                             f"{_describe(point)} are the same scenario; give each once",
                             field=VARY)
        seen_points[canonical] = point
        _check_point_inputs(sc, point, checked_files)
        for r, seed in enumerate(replicate_seeds(sc["run.seed"], replicates)):
            runs.append(SweepRun(run_id=run_id_of(dict(canonical), r), point=p, replicate=r,
                                 seed=seed, variant=canonical, scenario=payload))
    return keys, runs, scenario


def _check_point_inputs(sc, point: dict, checked: dict) -> None:
    """Before any run starts: the files a point names exist, and its run fits in memory
    (the patch count read from the file's header, once per file)."""
    from ..scenario import INPUT_FILES, check_regular_file
    from .study import check_run_size

    for key, what in INPUT_FILES.items():
        if not sc[key]:
            continue
        path = sc.resolve(sc[key])
        if path not in checked:
            if not Path(path).exists():
                where = f" of the point {_describe(point)}" if key in point else ""
                raise InputError(f"the {what}{where} does not exist; check the path (it is "
                                 "relative to the scenario's folder)", file=path, field=key)
            check_regular_file(path, what=what, folders=True)
            checked[path] = (_feature_count(path, sc["patches.layer"]) if key == "patches.path"
                             else None)
    n = checked.get(sc.resolve(sc["patches.path"]))
    if n:
        try:
            check_run_size(sc, n)
        except InputError as exc:
            raise InputError(f"the point {_describe(point)}: {exc.message}", file=exc.file,
                             field=exc.field) from None


def _feature_count(path, layer=None) -> int | None:
    """Features in a GIS file's layer from its header, without reading them (None if
    unknown)."""
    try:
        import pyogrio

        return int(pyogrio.read_info(path, layer=layer)["features"]) or None
    except Exception:  # noqa: BLE001 - the run's own reader reports unreadable files
        return None


def _canonical(validated, given):
    from ..scenario import FieldRef

    if isinstance(validated, FieldRef):
        return given
    return validated


# ------------------------------------------------------------------------------ the task
def run_point(task: SweepRun) -> dict:
    """Run one point of a sweep from scratch: scenario text -> study -> results.

    A pure function of the task: the scenario is parsed from its text, the variant applied,
    ``run.seed`` set to the run's seed, the study built and run (no maps, no files).

    Returns
    -------
    dict
        ``results`` (see :func:`trophoscape.io.tables.flatten_summary`) and ``seconds`` (wall time of the run).
    """
    from .study import build_study, run_study

    t0 = time.perf_counter()
    sc = task.scenario.scenario({**task.values, "run.seed": task.seed})
    result = run_study(build_study(sc))
    return {"results": flatten_summary(result.summary),
            "seconds": round(time.perf_counter() - t0, 4)}


# ------------------------------------------------------------------------------ the ledger
#: The columns of a sweep's runs in its ledger (:class:`trophoscape.io.ledger.Ledger`).
SWEEP_COLUMNS = {"point": "INTEGER NOT NULL", "replicate": "INTEGER NOT NULL",
                 "seed": "INTEGER NOT NULL", "variant": "TEXT NOT NULL"}


def open_ledger(path) -> Ledger:
    """A sweep's ledger: one row per finished run, with its point, replicate, seed and the
    values of the varied keys (``variant``, JSON)."""
    return Ledger(path, SWEEP_COLUMNS, json_columns=("variant",))


# ------------------------------------------------------------------------------ outputs
def sweep_frame(ledger: Ledger, keys: Sequence[str], runs: Sequence[SweepRun] = ()):
    """The sweep table from the ledger: runs of the plan in plan order, then any others.

    Columns: ``run_id``, the varied keys, ``seed``, ``replicate``, every network-level result,
    ``status``, ``error``, ``seconds``, ``finished``.
    """
    import pandas as pd

    rows = {r["run_id"]: r for r in ledger.rows()}
    order = [r.run_id for r in runs if r.run_id in rows]
    order += sorted(set(rows) - set(order), key=lambda i: (rows[i]["point"],
                                                          rows[i]["replicate"], i))
    result_cols: dict[str, None] = {}
    for i in order:
        result_cols.update(dict.fromkeys(rows[i]["results"]))
    records = []
    for i in order:
        r = rows[i]
        rec = {"run_id": i}
        rec.update({k: r["variant"].get(k) for k in keys})
        rec["seed"] = r["seed"]
        rec["replicate"] = r["replicate"]
        rec.update({c: r["results"].get(c) for c in result_cols})
        rec.update(status=r["status"], error=r["error"], seconds=r["seconds"],
                   finished=r["finished"])
        records.append(rec)
    columns = (["run_id", *keys, "seed", "replicate", *result_cols, "status", "error",
                *TIME_COLUMNS])
    return pd.DataFrame.from_records(records, columns=columns)


def run_ledger(ledger_path: Path, out: Path, scenario, keys, runs, *, run_tasks, **options):
    """Run the runs not yet recorded as ok in the ledger, recording each as it finishes;
    return the sweep table from the ledger."""
    try:
        ledger = open_ledger(ledger_path)
        meta = ledger.meta()
    except sqlite3.DatabaseError as exc:
        raise InputError(f"the sweep's ledger cannot be read ({exc}); it is damaged or not a "
                         f"trophoscape ledger; start the sweep again in another {param('out')} folder",
                         file=ledger_path,
                         field=param("resume")) from None
    try:
        started = {"format": LEDGER_FORMAT, "scenario_sha256": scenario.sha256,
                   "keys": json.dumps(keys)}
        if meta:
            if meta.get("scenario_sha256") != scenario.sha256:
                raise InputError("the scenario file changed since this sweep began; restore "
                                 f"it, or start the new sweep in another {param('out')} folder",
                                 file=ledger_path, field=param("resume"))
            if meta.get("keys") != started["keys"]:
                raise InputError(f"this sweep varies {json.loads(meta['keys'])}, not {keys}; "
                                 f"vary the same keys, or use another {param('out')} folder",
                                 file=ledger_path, field=param("resume"))
        else:
            ledger.set_meta(**started, created=now())
        done = ledger.ok_ids()
        todo = [r for r in runs if r.run_id not in done]

        def on_result(run: SweepRun, ok: bool, value) -> None:
            results = value["results"] if ok else None
            seconds = value["seconds"] if ok else None
            error = None if ok else str(value)
            finished = now()
            record = {"run_id": run.run_id, "variant": run.values, "replicate": run.replicate,
                      "seed": run.seed, "status": "ok" if ok else "failed", "error": error,
                      "results": results, "seconds": seconds, "finished": finished}
            write_atomic(out / "runs" / f"{run.run_id}.json",
                          json.dumps(record, indent=2, default=str) + "\n")
            ledger.record(run.run_id, ok=ok, results=results, error=error, seconds=seconds,
                          finished=finished, point=run.point, replicate=run.replicate,
                          seed=run.seed, variant=run.values)

        if todo:
            # Imported before the pool starts: forked local workers then start warm instead
            # of each importing scipy, geopandas and the analyses again.
            from . import study  # noqa: F401

            run_tasks(run_point, todo, on_result=on_result, desc="sweep", **options)
        return sweep_frame(ledger, keys, runs)
    finally:
        ledger.close()


