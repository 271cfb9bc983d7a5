"""The folder of ``sweep``: the ledger and per-run records as the runs finish, then the sweep
table and its plots, put in place whole (see :mod:`trophoscape.workflows.sweep` for the runs and
the ledger)."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Mapping, Sequence

from ..errors import InputError, RunError, param
from ..io.folder import write_atomic
from ..workflows.sweep import (KEY_RESULTS, LEDGER_NAME, SWEEP_NAMES, TABLE_NAME, WORKING_NAMES,
                               plan_sweep, run_ledger)

__all__ = ["sweep"]


def _write_table(frame, out: Path) -> Path:
    path = out / TABLE_NAME
    write_atomic(path, frame.to_csv(index=False))
    return path


def _write_plots(frame, keys: Sequence[str], out: Path) -> list[Path]:
    from ..report.figures import sweep_plot

    ok = frame[frame["status"] == "ok"]
    if ok.empty or not keys:
        return []
    folder = out / "plots"
    folder.mkdir(exist_ok=True)
    written = []
    for result in KEY_RESULTS:
        if result not in ok.columns or ok[result].isna().all():
            continue
        for key in keys:
            others = [k for k in keys if k != key]
            written.append(sweep_plot(ok, result, key, group_by=others,
                                      path=folder / f"{result}_vs_{key}.png"))
    return written


# ------------------------------------------------------------------------------ the sweep
def _table_files(spec, table) -> list[Path]:
    """The sweep tables among the sweep's inputs (as :func:`_as_points` finds them)."""
    files = [] if table is None else [Path(table)]
    if isinstance(spec, (str, os.PathLike)):
        spec = [spec]
    if spec is None or isinstance(spec, Mapping):
        return files
    for s in spec:
        if isinstance(s, os.PathLike) or (isinstance(s, str) and s.endswith(".csv")
                                          and "=" not in s):
            files.append(Path(s))
    return files


def sweep(scenario_path, variants_or_vary_specs=None, *, out, replicates: int = 1,
          workers: int | None = None, scheduler: str | None = None,
          dask_local: int | None = None, resume: bool = False, table=None,
          plots: bool = True, progress: bool = False, retries: int = 2,
          force: bool = False):
    """Run a parameter sweep of a scenario, recording every run as it finishes.

    Parameters
    ----------
    scenario_path : path
        The scenario file (TOML).
    variants_or_vary_specs : list of str, dict, list of dict, or None
        ``["prey.growth_rate=0.5:1.5:11", "dispersal.max_distance_km=5,10,20"]`` (the
        ``--vary`` syntax; a ``.csv`` path among them is read as a sweep table), or
        ``{"prey.growth_rate": [0.5, 1.0]}``, or explicit points
        ``[{"prey.growth_rate": 0.5}, ...]``. Groups combine as a Cartesian product.
    out : path
        Output folder: ``ledger.sqlite``, ``sweep.csv``, ``runs/``, ``plots/``. It may not
        be or hold an input, and an existing folder trophoscape did not write needs
        ``force`` (:func:`trophoscape.io.folder.check_out`).
    replicates : int
        Runs per point, seeds from ``SeedSequence(run.seed).spawn(replicates)``.
    workers : int, optional
        Local processes (default all cores).
    scheduler : str, optional
        Address of a running Dask scheduler.
    dask_local : int, optional
        Start a Dask LocalCluster with this many workers on loopback.
    resume : bool
        Continue the sweep recorded in ``out``: skip the runs already ok. Without it an
        existing ledger in ``out`` is an error.
    table : path, optional
        A sweep table (CSV, one column per key, one row per point).
    plots : bool
        Draw ``plots/<result>_vs_<key>.png``.
    progress : bool
        A progress bar on stderr.
    retries : int
        Re-runs of a run whose worker was lost.
    force : bool
        Write to ``out`` even when it is a folder trophoscape did not write (that folder is
        kept, renamed to ``NAME.replaced-YYYYmmdd-HHMMSS``), or replace an earlier sweep's
        folder without ``resume``.

    Returns
    -------
    pandas.DataFrame
        The sweep table, as written to ``sweep.csv`` (one row per run).

    Raises
    ------
    InputError
        For a bad scenario, key, value or table, a bad ``out`` (see
        :func:`trophoscape.io.folder.check_out`), or an existing ledger without ``resume``.
    RunError
        When every run failed (the table and ledger are still written).
    KeyboardInterrupt
        After Ctrl-C; the ledger keeps every run finished so far.
    """
    from ..io.folder import check_out, staged_folder, working_folder
    from ..scenario import input_files
    from ..workflows.tasks import run_tasks

    keys, runs, scenario = plan_sweep(scenario_path, variants_or_vary_specs,
                                      replicates=replicates, table=table)
    inputs = [*input_files(scenario, [r.values for r in runs]),
              *_table_files(variants_or_vary_specs, table)]
    # checked once, before anything runs; the folders below take this check as done
    check_out(out, inputs=inputs, force=force)
    out = Path(out)
    ledger_path = out / LEDGER_NAME
    if ledger_path.exists() and not resume and not force:
        raise InputError(f"a sweep ledger is already here; add {param('resume', True)} to "
                         f"continue that sweep, add {param('force', True)} to start a new "
                         "sweep in its place (its finished runs are then deleted), or give "
                         f"another {param('out')} folder", file=ledger_path, field=param("out"))
    # the ledger lives in the output folder from the first run on
    with working_folder(out, command="sweep", allow=SWEEP_NAMES, force=force,
                        reuse=resume and ledger_path.exists(), checked=True):
        (out / "runs").mkdir(exist_ok=True)
        for stale in (out / "runs").glob(".*.tmp"):
            stale.unlink(missing_ok=True)  # left by a process killed while renaming
        frame = run_ledger(ledger_path, out, scenario, keys, runs, workers=workers,
                            scheduler=scheduler, dask_local=dask_local, retries=retries,
                            progress=progress, run_tasks=run_tasks)
    import pandas as pd

    # The table and plots, staged; the ledger and runs/ are carried into the new folder.
    with staged_folder(out, force=force, command="sweep", keep=WORKING_NAMES,
                       allow=SWEEP_NAMES, checked=True) as stage:
        # the table as written (what a reader of sweep.csv gets: NaN for missing values)
        frame = pd.read_csv(_write_table(frame, stage))
        if plots:
            _write_plots(frame, keys, stage)
    planned = {r.run_id for r in runs}
    mine = frame[frame["run_id"].isin(planned)]
    if len(mine) and (mine["status"] != "ok").all():
        first = mine["error"].iloc[0]
        raise RunError(f"every run of the sweep failed; the first error: {first} (see "
                       f"{out / TABLE_NAME}); fix that and run the sweep again")
    return frame
