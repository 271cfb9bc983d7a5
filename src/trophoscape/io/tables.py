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

__all__ = ["patches_frame", "provenance", "write_json"]

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
