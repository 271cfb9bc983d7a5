"""The ``trophoscape spread`` command: where a shock's collapse goes first, and how fast.

Registered by ``cli.program`` through ``COMMAND_MODULES`` (``add_parser``). Writes, atomically
(:func:`trophoscape.io.folder.staged_folder`):

* the usual run folder of the *shocked* run (burn-in included), with the spread columns added
  to ``patches.gpkg`` / ``patches.csv`` and the spread figures under ``"spread"`` in
  ``summary.json``;
* ``spread.csv`` (per patch: ``patch_id``, ``arrival_time``, ``order``,
  ``network_distance_km``, ``distance_km``, ``recovered_at``, then ``shocked`` and
  ``baseline_collapse``) and ``spread.json`` (network-level figures and provenance);
* ``maps/spread_arrival.png`` and ``maps/spread_arrival_distance.png``;
* with ``--origins``: ``origins.csv`` and ``maps/origin_vulnerability.png``.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from ..report.spread import spread_to_folder

__all__ = ["add_parser"]

EPILOG = ("examples:\n  trophoscape spread valley.toml --out results/spread\n"
          "  trophoscape spread valley.toml --out results/scan --origins 50")



def add_parser(subparsers) -> argparse.ArgumentParser:
    """Register ``spread`` on the CLI's subparsers."""
    p = subparsers.add_parser(
        "spread", help="follow the collapse a shock sets off, patch by patch",
        description="Run the scenario's [[shock]] tables against a baseline from the same "
                    "state after burn-in; write arrival times of collapse, distances, the "
                    "front speed and maps. With --origins, shock each origin in turn.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    from .program import out_options

    p.add_argument("scenario", type=Path, help="scenario file (TOML) with [[shock]] tables")
    out_options(p)
    p.add_argument("--origins", metavar="N|all", default=None,
                   help="also scan origins: a spatially stratified sample of N patches, or "
                        "'all'; the scenario's shocks are aimed at each in turn")
    p.add_argument("--workers", type=int, default=None,
                   help="processes for the origin scan (default: all cores)")
    p.add_argument("--geojson", action="store_true", help="also write patches.geojson")
    p.add_argument("--no-maps", action="store_true", help="skip the PNG maps and the report")
    p.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    p.set_defaults(handler=run_command)
    return p


def _origin_count(text):
    """``--origins``: "all", a whole number of at least 1, None, or else the text as given
    (the library refuses it, quoting it)."""
    if text is None or text == "all":
        return text
    try:
        n = int(text)
    except ValueError:
        return text
    return n if n >= 1 else text


def run_command(args) -> int:
    """Handler of ``trophoscape spread``; returns the exit code."""
    result = spread_to_folder(args.scenario, args.out, origins=_origin_count(args.origins),
                              workers=args.workers, maps=not args.no_maps,
                              geojson=args.geojson, force=args.force, progress=not args.quiet)
    if not args.quiet:
        s = result.summary
        speed = s["front_speed_km_per_time"]
        print(f"wrote {args.out}")
        print(f"  {s['species']} collapse reached {s['reached_share']:.0%} of patches"
              + (f"; front speed {speed:.3g} km per {result.shocked.data['time'].attrs['units']}"
                 if np.isfinite(speed) else ""))
    return 0
