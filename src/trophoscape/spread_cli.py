"""The ``trophoscape spread`` command: where a shock's collapse goes first, and how fast.

Registered by ``cli.py`` through ``COMMAND_MODULES`` (``add_parser``). Writes, atomically
(:func:`trophoscape.outputs.staged_folder`):

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

from .errors import InputError

__all__ = ["add_parser", "run_command", "write_spread"]

EPILOG = ("examples:\n  trophoscape spread valley.toml --out results/spread\n"
          "  trophoscape spread valley.toml --out results/scan --origins 50")

SPREAD_COLUMNS = ["arrival_time", "order", "network_distance_km", "distance_km",
                  "recovered_at", "shocked", "baseline_collapse"]


def add_parser(subparsers) -> argparse.ArgumentParser:
    """Register ``spread`` on the CLI's subparsers."""
    p = subparsers.add_parser(
        "spread", help="follow the collapse a shock sets off, patch by patch",
        description="Run the scenario's [[shock]] tables against a baseline from the same "
                    "state after burn-in; write arrival times of collapse, distances, the "
                    "front speed and maps. With --origins, shock each origin in turn.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    from .cli import out_options

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
    if text is None:
        return None
    if text == "all":
        return "all"
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise InputError(f"{text!r} is not a whole number of at least 1 or 'all'; give e.g. "
                         "--origins 50, or --origins all", field="--origins")
    return n


def run_command(args) -> int:
    """Handler of ``trophoscape spread``; returns the exit code."""
    from .analysis.spread import origin_scan, run_spread, stratified_origins
    from .outputs import check_out, input_files
    from .study import load_study

    count = _origin_count(args.origins)
    study = load_study(args.scenario)
    check_out(args.out, inputs=input_files(study.scenario), force=args.force)  # before the runs
    result = run_spread(study, progress=not args.quiet)
    scan = None
    if count is not None:
        origins = (None if count == "all" else
                   stratified_origins(study.landscape.centroids, count,
                                      seed=study.scenario["run.seed"]))
        scan = origin_scan(study, origins, workers=args.workers, progress=not args.quiet)
    write_spread(study, result, args.out, scan=scan, maps=not args.no_maps,
                 geojson=args.geojson, force=args.force, checked=True)
    if not args.quiet:
        s = result.summary
        speed = s["front_speed_km_per_time"]
        print(f"wrote {args.out}")
        print(f"  {s['species']} collapse reached {s['reached_share']:.0%} of patches"
              + (f"; front speed {speed:.3g} km per {study.scenario['time_unit']}"
                 if np.isfinite(speed) else ""))
    return 0


def write_spread(study, result, out, *, scan=None, maps=True, geojson=False,
                 force=False, checked=False) -> Path:
    """Write the spread outputs (and the shocked run's folder) into ``out``, atomically.

    Parameters
    ----------
    study : Study
    result : trophoscape.analysis.spread.SpreadResult
    out : path
    scan : pandas.DataFrame, optional
        From :func:`trophoscape.analysis.spread.origin_scan`.
    force : bool
        Write to ``out`` even when it is a folder trophoscape did not write (that folder is
        kept, renamed to ``NAME.replaced-YYYYmmdd-HHMMSS``).
    checked : bool
        ``out`` went through :func:`trophoscape.outputs.check_out` already (before the
        runs); a folder that changed since is dealt with when the new one is put in place.
    """
    from .outputs import input_files, provenance, staged_folder, write_json, write_run
    from .study import RunResult, analyse

    out = Path(out)
    table, summary, extras = analyse(study, result.shocked)
    table = table.join(result.table[SPREAD_COLUMNS])
    summary["spread"] = result.summary
    run = RunResult(study=study, trajectory=result.shocked, patches=table, summary=summary,
                    extras=extras)
    spread_summary = dict(result.summary)
    spread_summary["scenario"] = study.scenario.name
    spread_summary["time_unit"] = study.scenario["time_unit"]
    spread_summary["shocks"] = [dict(t) for t in study.scenario["shock"]]
    spread_summary["provenance"] = provenance(study)
    with staged_folder(out, force=force, inputs=input_files(study.scenario),
                       command="spread", checked=checked) as stage:
        write_run(run, stage, maps=maps, geojson=geojson)
        result.table[SPREAD_COLUMNS].to_csv(stage / "spread.csv", index=True)
        write_json(stage / "spread.json", spread_summary)
        if scan is not None:
            scan.to_csv(stage / "origins.csv", index=True)
        if maps:
            _spread_maps(stage, study, result, scan)
    return out


def _spread_maps(stage: Path, study, result, scan) -> None:
    from .plot import arrival_distance_plot, patch_map

    folder = stage / "maps"
    folder.mkdir(exist_ok=True)
    land = study.landscape
    links = study.network.links_frame(land)
    frame = land.frame[["patch_id", "geometry"]].copy()
    for col in ("arrival_time", "distance_km", "network_distance_km"):
        frame[col] = result.table[col].to_numpy()
    unit = study.scenario["time_unit"]
    species = result.summary["species"]
    patch_map(frame, "arrival_time", path=folder / "spread_arrival.png", links=links,
              title=f"Arrival of {species} collapse", label=f"arrival time ({unit})",
              cmap="viridis_r", isolines=6)
    s = result.summary
    arrival_distance_plot(result.table["distance_km"].to_numpy(),
                          result.table["arrival_time"].to_numpy(),
                          path=folder / "spread_arrival_distance.png",
                          speed=s["front_speed_km_per_time"],
                          interval=s["front_speed_interval_km_per_time"],
                          shock_time=s["shock_time"], time_unit=unit)
    if scan is not None:
        frame["cascade_share"] = scan["cascade_share"].reindex(
            land.ids.astype(str)).to_numpy(dtype=float)
        patch_map(frame, "cascade_share", path=folder / "origin_vulnerability.png",
                  links=links, title="Origins: share of other patches a collapse reaches",
                  label="share of patches reached", cmap="magma_r")
    report = stage / "report.html"
    if report.exists():
        from .report import add_section

        speed = s["front_speed_km_per_time"]
        figures = [
            (f"Arrival of {species} collapse", folder / "spread_arrival.png",
             "When collapse reached each patch after the shock; dashed lines are isochrones, "
             "grey patches were never reached."),
            ("Arrival time against distance", folder / "spread_arrival_distance.png",
             "Each dot is a reached patch; the line is the robust (Theil–Sen) front speed."),
        ]
        if scan is not None:
            figures.append(("Worst origins", folder / "origin_vulnerability.png",
                            "Each patch coloured by the share of the other patches a collapse "
                            "starting there reaches: the darkest are the origins to watch."))
        intro = (f"Shock at {s['shock_time']:g} {unit}; collapse reached "
                 f"{s['reached_share']:.0%} of the patches"
                 + (f", at {speed:.3g} km per {unit}." if speed is not None
                    and speed == speed else "."))
        add_section(report, "Collapse spread", figures, intro=intro)
