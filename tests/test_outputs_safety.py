"""Output folders can never destroy the user's files, and nothing half-written survives.

Each case builds a tiny landscape (the four squares of ``test_errors_cli``) in its own
folder, runs the command line in a subprocess and compares every file under the folder,
byte for byte, before and after: a refused ``--out`` changes nothing, and no staging
folder (``.NAME.partial-*``) or set-aside folder (``.NAME.old-*``) is left behind. A refused
``--out`` is exit code 2 with exactly one line on stderr, naming ``--out``.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import geopandas
import pytest

import trophoscape
from trophoscape import outputs
from trophoscape.errors import InputError

from test_errors_cli import EXPLOSIVE, collection, features, run_cli, scenario

SRC = Path(__file__).resolve().parents[1] / "src"


# ------------------------------------------------------------------ helpers


def snapshot(folder: Path) -> dict:
    """Every file and folder under ``folder`` (hidden ones too): bytes, or None for a folder."""
    return {str(p.relative_to(folder)): (None if p.is_dir() else p.read_bytes())
            for p in sorted(folder.rglob("*"))}


def leftovers(folder: Path) -> list[str]:
    """Staging and set-aside folders anywhere under ``folder``."""
    return sorted(str(p.relative_to(folder)) for p in folder.rglob(".*")
                  if ".partial-" in p.name or ".old-" in p.name)


def assert_refused(done, *, starts: str | None = None):
    """Exit code 2, one line on stderr that names --out, no traceback."""
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr
    lines = done.stderr.splitlines()
    assert len(lines) == 1, done.stderr
    assert lines[0].startswith("error: ") and "field '--out'" in lines[0], lines[0]
    if starts is not None:
        assert lines[0].startswith(starts), lines[0]
    return lines[0]


def write_valley(folder: Path, *, text: str | None = None, patches: str = "p.geojson") -> Path:
    """The tiny scenario ``s.toml`` and its patch file in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "p.geojson").write_text(collection(features()), encoding="utf-8")
    (folder / "s.toml").write_text(text or scenario(), encoding="utf-8")
    return folder / "s.toml"


def write_geopackage_valley(tmp_path: Path) -> tuple[Path, Path]:
    """``data/patches.gpkg`` and, in a separate folder, ``scen/s.toml`` naming it."""
    data, scen = tmp_path / "data", tmp_path / "scen"
    data.mkdir()
    scen.mkdir()
    (data / "p.geojson").write_text(collection(features()), encoding="utf-8")
    frame = geopandas.read_file(data / "p.geojson")
    frame.to_file(data / "patches.gpkg", driver="GPKG", engine="pyogrio")
    (data / "p.geojson").unlink()
    (scen / "s.toml").write_text(scenario(patches={"path": "../data/patches.gpkg"}),
                                 encoding="utf-8")
    return data, scen


def marker(folder: Path) -> dict:
    return json.loads((folder / outputs.MARKER_NAME).read_text(encoding="utf-8"))


def dead_pid() -> int:
    """The id of a process that has ended (and was reaped)."""
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


# ------------------------------------------------------------------ outputs never on inputs


def test_out_dot_in_the_folder_of_the_geopackage(tmp_path):
    # the user's report: run from the folder holding patches.gpkg with --out .
    data, scen = write_geopackage_valley(tmp_path)
    before = snapshot(tmp_path)
    done = run_cli(data, "run", str(scen / "s.toml"), "--out", ".", "--no-maps")
    line = assert_refused(done)
    assert line == ("error: .: field '--out': is the folder of the input patches.gpkg; an "
                    "output folder is replaced as a whole, so give a new folder for the "
                    "outputs, e.g. --out results")
    assert snapshot(tmp_path) == before  # the GeoPackage is byte-identical; nothing added


def test_out_is_the_scenario_folder_by_absolute_path(tmp_path):
    data, scen = write_geopackage_valley(tmp_path)
    before = snapshot(tmp_path)
    done = run_cli(tmp_path, "run", str(scen / "s.toml"), "--out", str(scen), "--no-maps")
    line = assert_refused(done)
    assert line == (f"error: {scen}: field '--out': is the folder of the input s.toml; an "
                    "output folder is replaced as a whole, so give a new folder for the "
                    f"outputs, e.g. --out {scen / 'results'}")
    assert snapshot(tmp_path) == before


def test_out_holding_an_input_further_down_is_refused_even_with_force(tmp_path):
    data, scen = write_geopackage_valley(tmp_path)
    (tmp_path / "work").mkdir()
    before = snapshot(tmp_path)
    done = run_cli(tmp_path / "work", "run", str(scen / "s.toml"), "--out", str(tmp_path),
                   "--no-maps", "--force")
    line = assert_refused(done)
    assert "holds the input data/patches.gpkg;" in line
    assert snapshot(tmp_path) == before


def test_a_new_subfolder_of_the_scenario_folder_is_allowed(tmp_path):
    # the README's tutorial writes my-valley/baseline beside my-valley/scenario.toml
    scenario_file = write_valley(tmp_path / "my-valley")
    done = run_cli(tmp_path, "run", str(scenario_file), "--out", "my-valley/baseline",
                   "--no-maps", "--quiet")
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "my-valley" / "baseline" / "patches.gpkg").is_file()
    assert marker(tmp_path / "my-valley" / "baseline")["command"] == "run"
    assert leftovers(tmp_path) == []


def test_empty_out_is_refused_before_the_run(tmp_path):
    # the scenario would fail to run (exit 1): exit 2 shows --out was checked first
    write_valley(tmp_path, text=EXPLOSIVE)
    before = snapshot(tmp_path)
    done = run_cli(tmp_path, "run", "s.toml", "--out", "")
    assert assert_refused(done) == ("error: field '--out': an empty name is not a folder; "
                                    "give the output folder a name, e.g. --out results")
    assert snapshot(tmp_path) == before


@pytest.mark.parametrize("command", [
    ("run", "s.toml"),
    ("sweep", "s.toml", "--vary", "prey.growth_rate=0.5,1"),
    ("corridors", "s.toml", "--candidates", "c.geojson", "--budget", "1"),
])
def test_out_naming_an_existing_file_is_refused_at_once(tmp_path, command):
    write_valley(tmp_path, text=EXPLOSIVE)
    (tmp_path / "results.txt").write_text("my own results\n", encoding="utf-8")
    before = snapshot(tmp_path)
    done = run_cli(tmp_path, *command, "--out", "results.txt")
    assert assert_refused(done) == (
        "error: results.txt: field '--out': is an existing file, not a folder; give the "
        "name of a new folder for the outputs, e.g. --out results")
    assert snapshot(tmp_path) == before


def test_out_is_the_current_folder(tmp_path):
    scenario_file = write_valley(tmp_path / "inputs")
    (tmp_path / "here").mkdir()
    before = snapshot(tmp_path)
    done = run_cli(tmp_path / "here", "run", str(scenario_file), "--out", ".", "--force")
    assert "is the current folder;" in assert_refused(done)
    assert snapshot(tmp_path) == before


# ------------------------------------------------------------------ replacing a folder


def test_a_folder_trophoscape_did_not_write_needs_force(tmp_path):
    write_valley(tmp_path)
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("keep me\n", encoding="utf-8")
    before = snapshot(tmp_path)
    done = run_cli(tmp_path, "run", "s.toml", "--out", "mine", "--no-maps")
    assert assert_refused(done) == (
        "error: mine: field '--out': is a folder trophoscape did not write (it holds "
        "notes.txt); give a new or empty folder, or add --force to replace it and "
        "everything in it")
    assert snapshot(tmp_path) == before
    # with --force the folder is replaced as a whole
    done = run_cli(tmp_path, "run", "s.toml", "--out", "mine", "--no-maps", "--quiet",
                   "--force")
    assert done.returncode == 0, done.stderr
    assert not (mine / "notes.txt").exists()
    assert {"patches.gpkg", "patches.csv", "timeseries.nc", "summary.json",
            outputs.MARKER_NAME} == {p.name for p in mine.iterdir()}
    assert leftovers(tmp_path) == []


def test_an_empty_existing_folder_is_fine(tmp_path):
    write_valley(tmp_path)
    (tmp_path / "empty").mkdir()
    done = run_cli(tmp_path, "run", "s.toml", "--out", "empty", "--no-maps", "--quiet")
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "empty" / "summary.json").is_file()
    assert leftovers(tmp_path) == []


def test_a_user_file_added_to_an_output_folder_needs_force(tmp_path):
    write_valley(tmp_path)
    assert run_cli(tmp_path, "run", "s.toml", "--out", "out", "--no-maps",
                   "--quiet").returncode == 0
    (tmp_path / "out" / "my-notes.txt").write_text("keep me\n", encoding="utf-8")
    before = snapshot(tmp_path)
    done = run_cli(tmp_path, "run", "s.toml", "--out", "out", "--no-maps")
    assert "holds my-notes.txt, which trophoscape did not write;" in assert_refused(done)
    assert snapshot(tmp_path) == before


def test_rerun_without_maps_leaves_no_map_or_report_of_the_earlier_run(tmp_path):
    write_valley(tmp_path, text=scenario(**{"": {"name": "first"}}))
    done = run_cli(tmp_path, "run", "s.toml", "--out", "out", "--quiet")
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "out" / "report.html").is_file() and (tmp_path / "out" / "maps").is_dir()
    (tmp_path / "s.toml").write_text(scenario(**{"": {"name": "second"}}), encoding="utf-8")
    done = run_cli(tmp_path, "run", "s.toml", "--out", "out", "--quiet", "--no-maps")
    assert done.returncode == 0, done.stderr
    out = tmp_path / "out"
    assert sorted(p.name for p in out.iterdir()) == sorted(
        [outputs.MARKER_NAME, "patches.csv", "patches.gpkg", "summary.json", "timeseries.nc"])
    assert json.loads((out / "summary.json").read_text())["scenario"] == "second"
    info = marker(out)
    assert info["command"] == "run" and info["version"] == trophoscape.__version__
    assert sorted(info["files"]) == ["patches.csv", "patches.gpkg", "summary.json",
                                     "timeseries.nc"]
    assert leftovers(tmp_path) == []


def test_an_output_folder_of_an_earlier_version_is_recognised(tmp_path):
    # no marker: summary.json with trophoscape's provenance and only names trophoscape
    # writes; replaced without --force. With a file of the user's, it is not recognised.
    write_valley(tmp_path)
    old = tmp_path / "old"
    (old / "maps").mkdir(parents=True)
    (old / "maps" / "prey_occupancy.png").write_bytes(b"\x89PNG\r\n\x1a\n")
    (old / "summary.json").write_text(json.dumps({"provenance": {"package": "trophoscape"}}),
                                      encoding="utf-8")
    (old / "patches.csv").write_text("patch_id\n", encoding="utf-8")
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    (mixed / "summary.json").write_text((old / "summary.json").read_text(), encoding="utf-8")
    (mixed / "thesis.docx").write_bytes(b"mine")
    done = run_cli(tmp_path, "run", "s.toml", "--out", "mixed", "--no-maps")
    assert "is a folder trophoscape did not write" in assert_refused(done)
    assert (mixed / "thesis.docx").read_bytes() == b"mine"
    done = run_cli(tmp_path, "run", "s.toml", "--out", "old", "--no-maps", "--quiet")
    assert done.returncode == 0, done.stderr
    assert not (old / "maps").exists()
    assert marker(old)["command"] == "run"


# ------------------------------------------------------------------ nothing half-written


def _run_process(folder: Path, *args):
    env = dict(os.environ, PYTHONPATH=str(SRC), OPENBLAS_NUM_THREADS="1")
    return subprocess.Popen([sys.executable, "-m", "trophoscape", *args], cwd=folder, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))


def _wait_for_series(folder: Path, proc, timeout=60.0) -> Path:
    """The staging folder, once the run is writing timeseries.nc into it."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        for stage in folder.glob(".out.partial-*"):
            if list(stage.glob(".timeseries.nc.partial-*")):
                return stage
        if proc.poll() is not None:
            pytest.fail(f"the run ended before it was stopped: {proc.stderr.read()}")
        time.sleep(0.02)
    pytest.fail("the run did not start writing its series in time")


@pytest.mark.parametrize("signum, code, word", [(signal.SIGTERM, 143, "terminated"),
                                                (signal.SIGINT, 130, "interrupted")])
def test_a_stopped_run_leaves_nothing(tmp_path, signum, code, word):
    # a run of several tens of seconds (20,000 years, census every half year)
    write_valley(tmp_path, text=scenario(run={"duration": 20000.0}))
    before = snapshot(tmp_path)
    proc = _run_process(tmp_path, "run", "s.toml", "--out", "out", "--no-maps", "--quiet")
    stage = _wait_for_series(tmp_path, proc)
    assert stage.name.startswith(f".out.partial-{proc.pid}-")  # the PID is in the name
    proc.send_signal(signum)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == code, err
    assert err.splitlines() == [f"{word}; no output was written"]
    assert not (tmp_path / "out").exists()
    assert snapshot(tmp_path) == before


def test_stale_staging_folders_are_removed_only_when_their_process_is_gone(tmp_path):
    write_valley(tmp_path)
    gone, alive = dead_pid(), os.getpid()
    stale = tmp_path / f".out.partial-{gone}-abcd1234"
    live = tmp_path / f".out.partial-{alive}-efgh5678"
    other_name = tmp_path / f".other.partial-{gone}-ijkl9012"
    not_ours = tmp_path / ".out.partial-notapid"
    for folder in (stale, live, other_name, not_ours):
        folder.mkdir()
        (folder / "timeseries.nc").write_bytes(b"half")
    done = run_cli(tmp_path, "run", "s.toml", "--out", "out", "--no-maps", "--quiet")
    assert done.returncode == 0, done.stderr
    assert not stale.exists()
    assert live.is_dir() and other_name.is_dir() and not_ours.is_dir()
    assert (tmp_path / "out" / "summary.json").is_file()


def test_an_old_folder_set_aside_by_a_killed_process_is_put_back(tmp_path):
    # killed between renaming the old folder aside and the new one into place
    out = tmp_path / "out"
    aside = tmp_path / f".out.old-{dead_pid()}-0a1b2c3d"
    aside.mkdir()
    (aside / "summary.json").write_text("{}", encoding="utf-8")
    assert outputs.check_out(out) == out.resolve()
    assert (out / "summary.json").read_text() == "{}" and not aside.exists()
    # with the new folder in place, such a folder is deleted instead
    aside.mkdir()
    outputs.check_out(out, force=True)
    assert not aside.exists() and (out / "summary.json").is_file()


def test_a_failed_write_removes_its_staging_folder_and_keeps_the_old_folder(tmp_path):
    out = tmp_path / "out"
    with outputs.staged_folder(out, command="test") as stage:
        (stage / "a.txt").write_text("first", encoding="utf-8")
    before = snapshot(tmp_path)
    with pytest.raises(RuntimeError):
        with outputs.staged_folder(out, command="test") as stage:
            (stage / "a.txt").write_text("second", encoding="utf-8")
            raise RuntimeError("fails half-way")
    assert snapshot(tmp_path) == before


# ------------------------------------------------------------------ sweep


SWEEP = ("sweep", "s.toml", "--vary", "prey.growth_rate=0.5,1", "--workers", "1",
         "--no-plots", "--quiet")


@pytest.mark.parametrize("out, message", [
    ("", "error: field '--out': an empty name is not a folder;"),
    (".", "error: .: field '--out': is the folder of the input p.geojson;"),
    ("taken.txt", "error: taken.txt: field '--out': is an existing file, not a folder;"),
    ("mine", "error: mine: field '--out': is a folder trophoscape did not write"),
])
def test_sweep_to_an_invalid_out(tmp_path, out, message):
    write_valley(tmp_path)
    (tmp_path / "taken.txt").write_text("mine\n", encoding="utf-8")
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "notes.txt").write_text("mine\n", encoding="utf-8")
    before = snapshot(tmp_path)
    done = run_cli(tmp_path, *SWEEP, "--out", out)
    assert_refused(done, starts=message)
    assert snapshot(tmp_path) == before


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0,
                    reason="permissions do not bind the superuser")
def test_sweep_to_a_read_only_place(tmp_path):
    write_valley(tmp_path)
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        done = run_cli(tmp_path, *SWEEP, "--out", "locked/sweep")
        assert assert_refused(done) == (
            "error: locked/sweep: field '--out': cannot create the output folder here "
            "(permission denied); give --out a folder that can be created and written to")
        assert list(locked.iterdir()) == []
    finally:
        locked.chmod(0o755)


@pytest.mark.skipif(not Path("/sys/kernel").is_dir(), reason="needs Linux's /sys")
def test_sweep_where_no_folder_can_be_made(tmp_path):
    # /sys takes no new folders, whatever the permissions say (also for the superuser)
    write_valley(tmp_path)
    done = run_cli(tmp_path, *SWEEP, "--out", "/sys/trophoscape-sweep-test")
    assert_refused(done, starts="error: /sys/trophoscape-sweep-test: field '--out': cannot "
                                "create the output folder here (")


def test_sweep_folder_is_marked_and_replaces_an_earlier_output_whole(tmp_path):
    write_valley(tmp_path)
    assert run_cli(tmp_path, "run", "s.toml", "--out", "out", "--quiet",
                   "--no-maps").returncode == 0
    done = run_cli(tmp_path, *SWEEP, "--out", "out")
    assert done.returncode == 0, done.stderr
    out = tmp_path / "out"
    assert sorted(p.name for p in out.iterdir()) == sorted(
        [outputs.MARKER_NAME, "ledger.sqlite", "runs", "sweep.csv"])
    assert marker(out)["command"] == "sweep"
    assert len(list((out / "runs").glob("*.json"))) == 2
    # resuming keeps the ledger and writes the table again, whole
    done = run_cli(tmp_path, *SWEEP, "--out", "out", "--resume")
    assert done.returncode == 0, done.stderr
    assert (out / "ledger.sqlite").is_file() and (out / "sweep.csv").is_file()
    assert leftovers(tmp_path) == []


# ------------------------------------------------------------------ the Python API


def test_write_run_checks_its_folder(tmp_path):
    scenario_file = write_valley(tmp_path)
    result = trophoscape.run_study(trophoscape.load_study(scenario_file))
    with pytest.raises(InputError) as info:
        trophoscape.write_run(result, tmp_path, maps=False)
    assert "is the folder of the input p.geojson" in str(info.value)
    out = trophoscape.write_run(result, tmp_path / "api", maps=False)
    assert marker(out)["command"] == "write_run"
