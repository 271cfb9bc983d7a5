"""Sweeps: the --vary syntax, the ledger (nothing lost, nothing twice), executors, resume.

References: value grids against ``numpy.linspace`` and seeds against
``numpy.random.SeedSequence.spawn`` (NumPy documentation); network sizes against networkx
grid graphs; ledger consistency against SQLite's own ``PRAGMA integrity_check``. That a
finished run is recorded once, that an interrupted batch resumes without repeating or losing
runs, and that a retried pure task gives the same answer are common practice for batch
systems.
"""

from __future__ import annotations

import json
import math
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from trophoscape.cli import program as cli
from trophoscape.errors import InputError, RunError
from trophoscape.workflows.tasks import run_tasks
from trophoscape.report.sweep import sweep
from trophoscape.io.ledger import Ledger
from trophoscape.workflows.sweep import (LEDGER_NAME, TABLE_NAME, TIME_COLUMNS, parse_vary,
                                         plan_sweep, read_sweep_table)
from trophoscape.integrate.noise import replicate_seeds
from trophoscape.testing import grid_landscape


def shown(exc) -> str:
    """An error as the command line prints it (options, where Python names parameters)."""
    from trophoscape.cli.program import FLAGS
    from trophoscape.errors import render_params

    return exc.render(FLAGS) if hasattr(exc, "render") else render_params(exc, FLAGS)

SRC = Path(__file__).resolve().parents[1] / "src"
# Runs the command line in a subprocess.
RUNNER = "import sys, trophoscape.cli.program as c; sys.exit(c.main(sys.argv[1:]))"

SCENARIO = """
name = "sweep test"

[patches]
path = "grid.gpkg"
id_field = "patch_id"

[prey]
capacity_density = 300.0
initial_density = 150.0

[predator]
initial_density = 10.0
mortality_rate = 0.4
conversion = 0.3

[predation]
attack_rate = 0.05
handling_time = 0.1

[run]
duration = {duration}
burn_in = 1.0
census_interval = 0.5
"""


def write_scenario(folder: Path, duration=5.0) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    grid = folder / "grid.gpkg"
    if not grid.exists():
        land = grid_landscape(3, 3, spacing_km=2.0, size_km=1.0)
        land.frame.to_file(grid, driver="GPKG", engine="pyogrio")
    path = folder / "sweep.toml"
    path.write_text(SCENARIO.format(duration=duration), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    return write_scenario(tmp_path_factory.mktemp("scenario"))


def without_time(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.drop(columns=list(TIME_COLUMNS)).reset_index(drop=True)


def read_table(folder: Path) -> pd.DataFrame:
    return without_time(pd.read_csv(folder / TABLE_NAME))


def ledger_count(path: Path) -> int:
    if not path.exists():
        return 0
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5)
    try:
        return conn.execute("SELECT COUNT(*) FROM runs").fetchone()[0]
    except sqlite3.OperationalError:  # the table is not created yet
        return 0
    finally:
        conn.close()


def run_cli(argv, monkeypatch):
    return cli.main([str(a) for a in argv])


# ------------------------------------------------------------------------ --vary syntax
def test_range_is_an_inclusive_linspace():
    key, values = parse_vary("prey.growth_rate=0.5:1.5:11")
    assert key == "prey.growth_rate"
    # numpy.linspace(start, stop, num): num evenly spaced samples, both ends included
    np.testing.assert_allclose(values, np.linspace(0.5, 1.5, 11), rtol=0, atol=1e-12)
    assert values[0] == 0.5 and values[-1] == 1.5 and len(values) == 11
    assert parse_vary("run.duration=7:7:1") == ("run.duration", [7.0])


def test_lists_of_numbers_and_words():
    assert parse_vary("dispersal.max_distance_km=5,10,20") == (
        "dispersal.max_distance_km", [5, 10, 20])
    assert parse_vary("dispersal.kernel=exponential, gaussian") == (
        "dispersal.kernel", ["exponential", "gaussian"])
    assert parse_vary("analysis.stability=true,false") == ("analysis.stability", [True, False])
    # a key whose values are words keeps digits as text; a number key also takes its word
    assert parse_vary("patches.id_field=1,2") == ("patches.id_field", ["1", "2"])
    assert parse_vary("name=1,2") == ("name", ["1", "2"])
    assert parse_vary("prey.initial_density=equilibrium,40") == (
        "prey.initial_density", ["equilibrium", 40])


@pytest.mark.parametrize("arg, message", [
    ("prey.growth_rate", "field '--vary prey.growth_rate': must be KEY=VALUES, e.g. "
     "prey.growth_rate=0.5:1.5:11 or dispersal.max_distance_km=5,10,20"),
    ("prey.growt_rate=1,2", "field '--vary prey.growt_rate=1,2': unknown scenario key "
     "'prey.growt_rate'; did you mean 'prey.growth_rate'?"),
    ("zzz=1", "field '--vary zzz=1': unknown scenario key 'zzz'; keys are written "
     "section.key, e.g. 'prey.growth_rate'"),
    ("prey.growth_rate=", "field '--vary prey.growth_rate=': no values after '='; give "
     "START:STOP:COUNT or a comma list"),
    ("prey.growth_rate=1:2", "field '--vary prey.growth_rate=1:2': '1:2' is not a range "
     "START:STOP:COUNT; give e.g. 0.5:1.5:11"),
    ("prey.growth_rate=a:2:3", "field '--vary prey.growth_rate=a:2:3': START and STOP of the "
     "range 'a:2:3' are not both numbers; give numbers, e.g. 0.5:1.5:11"),
    ("prey.growth_rate=1:2:0", "field '--vary prey.growth_rate=1:2:0': COUNT '0' of the "
     "range is not a whole number of at least 1; give e.g. 0.5:1.5:11"),
    ("prey.growth_rate=1:2:x", "field '--vary prey.growth_rate=1:2:x': COUNT 'x' of the "
     "range is not a whole number of at least 1; give e.g. 0.5:1.5:11"),
    ("prey.growth_rate=1,,2", "field '--vary prey.growth_rate=1,,2': empty value in the list "
     "'1,,2'; remove the extra comma"),
    ("prey.growth_rate=1,1.0", "field '--vary prey.growth_rate=1,1.0': the value 1.0 is "
     "given twice; give each value once"),
])
def test_vary_syntax_errors(arg, message):
    with pytest.raises(InputError) as info:
        parse_vary(arg)
    assert shown(info.value) == message


@pytest.mark.parametrize("specs, message", [
    (["prey.growth_rate=-1,1"], "field '--vary prey.growth_rate=-1,1': prey.growth_rate: "
     "-1 is out of range; give a number of at least 0"),
    (["prey.growth_rate=fast"], "field '--vary prey.growth_rate=fast': prey.growth_rate: "
     "'fast' is not a number; give a number of at least 0"),
    (["dispersal.kernel=exponential,cubic"], "field '--vary dispersal.kernel=exponential,"
     "cubic': dispersal.kernel: 'cubic' is not one of the choices; give one of "
     "'exponential', 'gaussian', 'step', 'none'"),
    (["prey.growth_rate=1,2", "prey.growth_rate=3"], "field '--vary prey.growth_rate': the "
     "key 'prey.growth_rate' is varied twice; give all its values in one --vary"),
])
def test_bad_values_name_the_vary_argument(scenario, specs, message):
    with pytest.raises(InputError) as info:
        plan_sweep(scenario, specs)
    assert shown(info.value) == message


def test_a_combination_that_is_not_a_scenario(scenario, tmp_path):
    # burn_in 3 is fine with the base duration (5), and duration 2 with the base burn-in (1),
    # but not together
    with pytest.raises(InputError) as info:
        plan_sweep(scenario, ["run.duration=2,10", "run.burn_in=1,3"])
    assert shown(info.value) == (
        f"{scenario}: field '--vary': the point run.duration=2, run.burn_in=3 is not a valid "
        "scenario: run.burn_in: 3 is not below run.duration 2; shorten the burn-in or "
        "lengthen the run")
    # a table whose rows pair them well is a valid sweep; a bad cell is named by its row
    table = tmp_path / "t.csv"
    table.write_text("run.duration,run.burn_in\n10,6\n3,1\n", encoding="utf-8")
    assert len(plan_sweep(scenario, None, table=table)[1]) == 2
    table.write_text("run.duration,run.burn_in\n10,6\n3,-1\n", encoding="utf-8")
    with pytest.raises(InputError) as info:
        plan_sweep(scenario, None, table=table)
    assert shown(info.value) == (f"{table}: feature 1: field 'run.burn_in': -1 is out of "
                               "range; give a number of at least 0")
    with pytest.raises(InputError) as info:
        plan_sweep(scenario, ["run.duration=4,4.0"])
    assert shown(info.value) == ("field '--vary run.duration=4,4.0': the value 4.0 is given "
                               "twice; give each value once")


def test_cartesian_product_and_seeds(scenario):
    keys, runs, base = plan_sweep(scenario, ["prey.growth_rate=0.5:1.5:3",
                                             "dispersal.max_distance_km=5,10"], replicates=2)
    assert keys == ["prey.growth_rate", "dispersal.max_distance_km"]
    assert len(runs) == 3 * 2 * 2
    points = [r.values for r in runs if r.replicate == 0]
    assert points == [{"prey.growth_rate": g, "dispersal.max_distance_km": d}
                      for g in (0.5, 1.0, 1.5) for d in (5.0, 10.0)]
    assert len({r.run_id for r in runs}) == len(runs)
    # seeds: numpy.random.SeedSequence(seed).spawn(n), per the NumPy documentation
    children = np.random.SeedSequence(base["run.seed"]).spawn(2)
    expected = [int(c.generate_state(1, dtype=np.uint64)[0]) >> 1 for c in children]
    assert [r.seed for r in runs[:2]] == expected == replicate_seeds(base["run.seed"], 2)
    assert all(0 <= r.seed < 2**63 for r in runs)
    # more replicates later keep the first ones' seeds and ids (resume can extend a sweep)
    _, more, _ = plan_sweep(scenario, ["prey.growth_rate=0.5:1.5:3",
                                       "dispersal.max_distance_km=5,10"], replicates=3)
    assert {r.run_id: r.seed for r in runs} == {r.run_id: r.seed for r in more
                                                if r.replicate < 2}
    # 5 and 5.0 are the same distance, so the same run
    _, a, _ = plan_sweep(scenario, ["dispersal.max_distance_km=5"])
    _, b, _ = plan_sweep(scenario, ["dispersal.max_distance_km=5.0"])
    assert a[0].run_id == b[0].run_id


def test_sweep_table(tmp_path, scenario):
    table = tmp_path / "points.csv"
    table.write_text("prey.growth_rate,dispersal.kernel\n0.8,exponential\n1.2,gaussian\n",
                     encoding="utf-8")
    assert read_sweep_table(table) == [
        {"prey.growth_rate": 0.8, "dispersal.kernel": "exponential"},
        {"prey.growth_rate": 1.2, "dispersal.kernel": "gaussian"}]
    keys, runs, _ = plan_sweep(scenario, ["run.duration=4,5"], table=table)
    assert keys == ["prey.growth_rate", "dispersal.kernel", "run.duration"]
    assert len(runs) == 4
    bad = tmp_path / "bad.csv"
    bad.write_text("prey.growth_rat\n1\n", encoding="utf-8")
    with pytest.raises(InputError) as info:
        read_sweep_table(bad)
    assert shown(info.value) == (f"{bad}: field 'prey.growth_rat': unknown scenario key "
                               "'prey.growth_rat'; did you mean 'prey.growth_rate'?")
    bad.write_text("prey.growth_rate,run.duration\n1,5\n2,\n", encoding="utf-8")
    with pytest.raises(InputError) as info:
        read_sweep_table(bad)
    assert shown(info.value) == (f"{bad}: feature 1: field 'run.duration': empty cell; every "
                               "row needs a value for every column")
    bad.write_text("prey.growth_rate\n1\n1\n", encoding="utf-8")
    with pytest.raises(InputError) as info:
        read_sweep_table(bad)
    assert shown(info.value) == (f"{bad}: feature 1: field '--table': repeats row 0; give "
                               "each point once")


# ------------------------------------------------------------------------ sweeps
def test_sweep_local_pool_table_runs_and_plots(tmp_path, scenario):
    out = tmp_path / "out"
    frame = sweep(scenario, ["dispersal.max_distance_km=1.2,5", "prey.growth_rate=0.8,1.2"],
                  out=out, replicates=2, workers=2)
    assert len(frame) == 2 * 2 * 2 and (frame["status"] == "ok").all()
    on_disk = read_table(out)
    pd.testing.assert_frame_equal(on_disk, without_time(frame), check_dtype=False)
    # the variant reached the network: boundary gaps of 1 km (sides) and 1.41 km (corners)
    # on a 3 x 3 grid, so 1.2 km links the 12 edges of the grid graph and 5 km every pair
    grid_edges = nx.grid_2d_graph(3, 3).number_of_edges()
    links = frame.groupby("dispersal.max_distance_km")["links"].unique()
    assert list(links.loc[1.2]) == [grid_edges] and list(links.loc[5.0]) == [math.comb(9, 2)]
    # deterministic runs: replicates of a point agree exactly (no noise in this version)
    results = [c for c in frame.columns if c.startswith(("prey_", "predator_"))]
    for _, point in frame.groupby(["dispersal.max_distance_km", "prey.growth_rate"]):
        assert point["replicate"].tolist() == [0, 1]
        assert point[results].iloc[0].equals(point[results].iloc[1])
    assert {"solver_nfev", "solver_method", "prey_regional_persistence",
            "predator_synchrony"} <= set(frame.columns)
    # the columns come from io.tables.flatten_summary, the rule comparison.csv follows too
    assert {"stability_leading_eigenvalue_real", "quasi_extinction_predator_removals",
            "solver_removals"} <= set(frame.columns)
    assert not any(c.startswith("stability_details") for c in frame.columns)
    # one JSON per run, the same numbers as the table
    files = sorted((out / "runs").glob("*.json"))
    assert [f.stem for f in files] == sorted(frame["run_id"])
    one = json.loads(files[0].read_text())
    row = frame.set_index("run_id").loc[one["run_id"]]
    assert one["results"]["solver_nfev"] == row["solver_nfev"] and one["seed"] == row["seed"]
    from matplotlib.image import imread

    for result in ("prey_regional_persistence", "predator_regional_persistence",
                   "prey_synchrony", "predator_synchrony"):
        for key in ("dispersal.max_distance_km", "prey.growth_rate"):
            image = imread(out / "plots" / f"{result}_vs_{key}.png")
            assert image.shape[0] > 200 and image.shape[1] > 300


def test_existing_ledger_needs_resume(tmp_path, scenario, monkeypatch, capsys):
    out = tmp_path / "out"
    sweep(scenario, ["prey.growth_rate=0.8,1.2"], out=out, workers=1, plots=False)
    with pytest.raises(InputError) as info:
        sweep(scenario, ["prey.growth_rate=0.8,1.2"], out=out, workers=1)
    message = ("a sweep ledger is already here; add --resume to continue that sweep, add "
               "--force to start a new sweep in its place (its finished runs are then deleted), "
               "or give another --out folder")
    assert shown(info.value) == f"{out / LEDGER_NAME}: field '--out': {message}"
    # resuming a finished sweep runs nothing and writes the same table
    before = read_table(out)
    stamps = pd.read_csv(out / TABLE_NAME)["finished"].tolist()
    frame = sweep(scenario, ["prey.growth_rate=0.8,1.2"], out=out, workers=1, resume=True)
    assert frame["finished"].tolist() == stamps
    pd.testing.assert_frame_equal(read_table(out), before)
    # other keys, or a changed scenario, are not the same sweep
    with pytest.raises(InputError, match="this sweep varies"):
        sweep(scenario, ["prey.emigration_rate=0.1"], out=out, resume=True)
    changed = write_scenario(tmp_path / "changed", duration=6.0)
    with pytest.raises(InputError, match="the scenario file changed"):
        sweep(changed, ["prey.growth_rate=0.8,1.2"], out=out, resume=True)
    # through the command line: exit 2 with the message on one line
    code = run_cli(["sweep", scenario, "--vary", "prey.growth_rate=0.8,1.2", "--out", out],
                   monkeypatch)
    assert code == 2
    assert capsys.readouterr().err == f"error: {out / LEDGER_NAME}: field '--out': {message}\n"
    assert run_cli(["sweep", scenario, "--out", tmp_path / "none"], monkeypatch) == 2
    assert capsys.readouterr().err == ("error: field '--vary': nothing to vary: give --vary "
                                       "KEY=VALUES or --table FILE.csv\n")
    assert not (tmp_path / "none").exists()


def test_failing_variant_is_recorded_and_the_others_finish(tmp_path, scenario, monkeypatch,
                                                          capsys):
    out = tmp_path / "out"
    code = run_cli(["sweep", scenario, "--vary", "patches.id_field=patch_id,no_such_field",
                    "--vary", "prey.growth_rate=0.8,1.2", "--out", out, "--workers", "2",
                    "--quiet"], monkeypatch)
    assert code == 0
    table = pd.read_csv(out / TABLE_NAME)
    assert len(table) == 4
    ok = table[table["patches.id_field"] == "patch_id"]
    bad = table[table["patches.id_field"] == "no_such_field"]
    assert (ok["status"] == "ok").all() and ok["error"].isna().all()
    assert (bad["status"] == "failed").all() and bad["prey_regional_persistence"].isna().all()
    assert all(e.startswith("InputError: ") and "no_such_field" in e for e in bad["error"])
    assert "failed" in capsys.readouterr().err
    # resume runs the failed ones again (they fail again), without a second row for any run
    assert run_cli(["sweep", scenario, "--vary", "patches.id_field=patch_id,no_such_field",
                    "--vary", "prey.growth_rate=0.8,1.2", "--out", out, "--resume",
                    "--quiet"], monkeypatch) == 0
    conn = sqlite3.connect(out / LEDGER_NAME)
    statuses = conn.execute("SELECT status, COUNT(*) FROM runs GROUP BY status").fetchall()
    conn.close()
    assert sorted(statuses) == [("failed", 2), ("ok", 2)]


def test_every_run_failing_is_a_run_error(tmp_path, scenario):
    with pytest.raises(RunError, match="every run of the sweep failed; the first error: "
                                       "InputError: "):
        sweep(scenario, ["patches.id_field=nope1,nope2"], out=tmp_path / "out", workers=1)
    assert len(pd.read_csv(tmp_path / "out" / TABLE_NAME)) == 2


def test_python_api_takes_dicts(tmp_path, scenario):
    a = sweep(scenario, {"prey.growth_rate": [0.8, 1.2]}, out=tmp_path / "a", workers=1,
              plots=False)
    b = sweep(scenario, [{"prey.growth_rate": 0.8}, {"prey.growth_rate": 1.2}],
              out=tmp_path / "b", workers=1, plots=False)
    pd.testing.assert_frame_equal(without_time(a), without_time(b))


# ------------------------------------------------------------------------ interruptions
@pytest.fixture(scope="module")
def long_scenario(tmp_path_factory):
    # longer runs, so that a kill lands between the first and the last finished run
    return write_scenario(tmp_path_factory.mktemp("long"), duration=150.0)


LONG_VARY = ["prey.growth_rate=0.6:1.4:8", "dispersal.max_distance_km=3,6"]


@pytest.fixture(scope="module")
def reference(long_scenario, tmp_path_factory):
    out = tmp_path_factory.mktemp("reference") / "out"
    sweep(long_scenario, LONG_VARY, out=out, workers=2, plots=False)
    return read_table(out)


def _default_sigint():
    # as in a terminal: a shell running the test suite in the background (`pytest &` in a
    # script) starts it with SIGINT ignored, and children would inherit that
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def _cli_process(args):
    env = dict(os.environ, PYTHONPATH=str(SRC), OPENBLAS_NUM_THREADS="1")
    return subprocess.Popen([sys.executable, "-c", RUNNER, *map(str, args)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=_default_sigint)


def _wait_for_rows(ledger: Path, proc, total: int, timeout=60.0) -> int:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        n = ledger_count(ledger)
        if n >= 1:
            return n
        if proc.poll() is not None:
            pytest.fail(f"the sweep ended before it was interrupted: {proc.stderr.read()}")
        time.sleep(0.01)
    pytest.fail("no run finished in time")


def test_sigkill_then_resume_gives_the_uninterrupted_table(tmp_path, long_scenario,
                                                          reference):
    out = tmp_path / "out"
    args = ["sweep", long_scenario, *sum((["--vary", v] for v in LONG_VARY), []), "--out",
            out, "--no-plots", "--quiet"]
    proc = _cli_process([*args, "--workers", "1"])
    _wait_for_rows(out / LEDGER_NAME, proc, len(reference))
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    proc.stdout.close(), proc.stderr.close()
    done = ledger_count(out / LEDGER_NAME)
    assert 1 <= done < len(reference), "the kill should land mid-sweep"
    assert not (out / TABLE_NAME).exists()
    conn = sqlite3.connect(out / LEDGER_NAME)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    conn.close()
    resumed = subprocess.run([sys.executable, "-c", RUNNER, *map(str, args), "--resume"],
                             env=dict(os.environ, PYTHONPATH=str(SRC)), capture_output=True,
                             text=True, timeout=300)
    assert resumed.returncode == 0, resumed.stderr
    pd.testing.assert_frame_equal(read_table(out), reference)
    assert ledger_count(out / LEDGER_NAME) == len(reference)


def test_ctrl_c_leaves_a_consistent_ledger_and_exit_130(tmp_path, long_scenario, reference):
    out = tmp_path / "out"
    args = ["sweep", long_scenario, *sum((["--vary", v] for v in LONG_VARY), []), "--out",
            out, "--no-plots", "--quiet", "--workers", "2"]
    proc = _cli_process(args)
    _wait_for_rows(out / LEDGER_NAME, proc, len(reference))
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert "--resume" in err and "Traceback" not in err
    assert len(err.splitlines()) == 1, err  # one line, however the stop travelled
    conn = sqlite3.connect(out / LEDGER_NAME)
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    n, ok = conn.execute("SELECT COUNT(*), SUM(status = 'ok') FROM runs").fetchone()
    conn.close()
    assert 1 <= n < len(reference) and ok == n
    frame = sweep(long_scenario, LONG_VARY, out=out, workers=2, resume=True, plots=False)
    pd.testing.assert_frame_equal(without_time(frame), reference)


# ------------------------------------------------------------------------ Dask
def test_dask_local_cluster_gives_the_local_table(tmp_path, scenario):
    pytest.importorskip("distributed")
    vary = ["prey.growth_rate=0.6:1.4:3", "dispersal.max_distance_km=1.2,5"]
    local = sweep(scenario, vary, out=tmp_path / "local", workers=2, plots=False)
    dask = sweep(scenario, vary, out=tmp_path / "dask", dask_local=2, plots=False)
    pd.testing.assert_frame_equal(without_time(dask), without_time(local))
    assert (dask["status"] == "ok").all()


def test_dask_worker_killed_mid_sweep(tmp_path, long_scenario, reference, monkeypatch):
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address=None)
    client = distributed.Client(cluster)
    calls: dict[str, int] = {}
    record = Ledger.record

    def counting(self, run_id, **kw):
        calls[run_id] = calls.get(run_id, 0) + 1
        return record(self, run_id, **kw)

    monkeypatch.setattr(Ledger, "record", counting)
    out = tmp_path / "out"
    killed = {}

    def kill_one_worker():
        end = time.monotonic() + 120
        while time.monotonic() < end and not killed:
            n = ledger_count(out / LEDGER_NAME)
            if n >= 1:
                pid = next(iter(client.run(os.getpid).values()))
                os.kill(pid, signal.SIGKILL)
                killed.update(pid=pid, at=n)
            time.sleep(0.01)

    watcher = threading.Thread(target=kill_one_worker, daemon=True)
    watcher.start()
    try:
        frame = sweep(long_scenario, LONG_VARY, out=out, scheduler=cluster.scheduler_address,
                      plots=False)
    finally:
        watcher.join(timeout=10)
        client.close()
        cluster.close()
    assert killed and killed["at"] < len(reference), "the worker should die mid-sweep"
    assert sorted(calls.values()) == [1] * len(reference)  # every run recorded exactly once
    assert ledger_count(out / LEDGER_NAME) == len(reference)
    pd.testing.assert_frame_equal(without_time(frame), reference)


# ------------------------------------------------------------------------ the task runner
def _die_once(arg):
    marker, x = arg
    if x == 2 and not os.path.exists(marker):
        open(marker, "w").close()
        os._exit(1)  # as if the process were killed
    return x * 10


def _always_die(x):
    if x == 1:
        os._exit(1)
    return x


def test_a_lost_local_worker_is_replaced_and_its_task_rerun(tmp_path):
    marker = str(tmp_path / "died")
    seen = []
    run_tasks(_die_once, [(marker, x) for x in range(5)], workers=2, progress=False,
              on_result=lambda task, ok, value: seen.append((task[1], ok, value)))
    assert os.path.exists(marker)  # the worker did die
    assert sorted(seen) == [(x, True, x * 10) for x in range(5)]


def test_a_task_that_keeps_killing_workers_is_recorded_as_failed():
    seen = {}
    run_tasks(_always_die, range(4), workers=2, retries=1, progress=False,
              on_result=lambda task, ok, value: seen.setdefault(task, []).append((ok, value)))
    assert sorted(seen) == [0, 1, 2, 3] and all(len(v) == 1 for v in seen.values())
    assert seen[1][0][0] is False and seen[1][0][1].startswith("WorkerLost: ")
    assert [seen[k][0] for k in (0, 2, 3)] == [(True, 0), (True, 2), (True, 3)]


def test_flatten_summary_rule():
    # consistency test of the one flattening rule (io.tables.flatten_summary) on a made-up
    # summary: nesting at any depth, the "_details" prefix, a taken name, lists, non-finite
    import numpy as np

    from trophoscape.io.tables import flatten_summary

    summary = {
        "patches": np.int64(4), "stability": "damped", "growth": float("nan"),
        "stability_details": {"period": 9.5, "found": True, "vector": np.arange(3)},
        "solver": {"nfev": 10, "removals": [3, 1], "deep": {"x": float("inf")}},
        "quasi_extinction": {"prey": {"removals": 2}},
        "errors": [{"analysis": "stability", "reason": "no equilibrium"}],
        "empty": [],
        "model_details": {"rate": 2.0}, "model_rate": 1.0,
    }
    flat = flatten_summary(summary)
    assert flat == {
        "patches": 4, "stability": "damped", "growth": None,
        "stability_period": 9.5, "stability_found": True,
        "solver_nfev": 10, "solver_removals": "3;1", "solver_deep_x": None,
        "quasi_extinction_prey_removals": 2,
        "errors": '[{"analysis": "stability", "reason": "no equilibrium"}]',
        "empty": "", "model_details_rate": 2.0, "model_rate": 1.0,
    }
    assert type(flat["patches"]) is int
