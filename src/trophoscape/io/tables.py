"""Tables of a result: the patch layer with every per-patch column, provenance, and JSON as
written to ``summary.json`` (non-finite numbers as null).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from pathlib import Path

import numpy as np

from .folder import file_sha256

__all__ = ["patches_frame", "provenance", "write_json", "flatten_summary"]

def provenance(study) -> dict:
    """Where a result came from: package version, input hashes, seed and time."""
    from .. import __version__

    sc = study.scenario
    inputs = {"patches": study.landscape.path}
    for key in ("dispersal.corridors", "dispersal.links"):
        if sc[key]:
            inputs[key.split(".")[1]] = sc.resolve(sc[key])
    return {
        "package": "trophoscape",
        "version": __version__,
        "scenario_file": None if sc.path is None else str(Path(sc.path).resolve()),
        "scenario_sha256": sc.sha256,
        "input_sha256": {k: file_sha256(v) for k, v in inputs.items() if v is not None},
        "seed": sc["run.seed"],
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def _json_ready(obj):
    if isinstance(obj, dict):
        return {str(k): _json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_ready(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_json(path, obj):
    Path(path).write_text(json.dumps(_json_ready(obj), indent=2) + "\n", encoding="utf-8")


def patches_frame(result):
    """The patch polygons with the user's attributes and every per-patch result column."""
    frame = result.study.landscape.frame
    table = result.patches
    keep = [c for c in frame.columns if c not in table.columns and c != "patch_id"]
    gdf = frame[["patch_id"]].join(frame[keep])
    for col in table.columns:
        gdf[col] = table[col].to_numpy()
    return gdf.set_geometry("geometry")


def flatten_summary(summary) -> dict:
    """Every value of a run's summary that fits one table cell, as one flat dict: the rule by
    which ``sweep.csv`` and ``comparison.csv`` turn ``summary.json`` into columns.

    - A nested table's keys take the table's key as prefix, without a trailing ``_details``
      (``solver`` → ``solver_nfev``; ``stability_details`` → ``stability_oscillation_period``;
      ``quasi_extinction`` → ``quasi_extinction_prey_removals``), at any depth. When that name
      is taken, the full key is kept (``stability_details_...``).
    - Numbers, booleans and text are kept; numpy scalars become Python ones; NaN, infinities
      and None become None (an empty cell).
    - A list of numbers or text becomes its items joined by ";" (``solver_removals``); a list
      of tables becomes its JSON text (``analysis_errors``); other values (arrays, objects)
      have no cell and are left out.
    """
    out: dict = {}

    def cell(value):
        if isinstance(value, np.generic):
            value = value.item()
        if value is None or isinstance(value, (bool, str)):
            return True, value
        if isinstance(value, (int, float)):
            return True, value if math.isfinite(value) else None
        if isinstance(value, (list, tuple)):
            items = [v.item() if isinstance(v, np.generic) else v for v in value]
            if all(isinstance(v, (bool, int, float, str)) for v in items):
                return True, ";".join(map(str, items))
            if all(isinstance(v, dict) for v in items):
                return True, json.dumps(items, default=str)
        return False, None

    def walk(table, prefix: str, full: str) -> None:
        for key, value in table.items():
            if isinstance(value, dict):
                short = key[:-len("_details")] if key.endswith("_details") else key
                walk(value, f"{prefix}{short}_", f"{full}{key}_")
                continue
            name = f"{prefix}{key}"
            if name in summary or name in out:
                name = f"{full}{key}"
            fits, v = cell(value)
            if fits and name not in out:
                out[name] = v

    walk(summary, "", "")
    return out
