"""Output folders can never destroy the user's files, and nothing half-written survives.

Each case builds a tiny landscape (the four squares of ``test_errors_cli``) in its own
folder, runs the command line (in a subprocess, or in this process where a function is
patched to act at a chosen moment) and compares every file under the folder, byte for
byte, before and after: a refused ``--out`` changes nothing, and no staging folder
(``.NAME.partial-*``) or set-aside folder (``.NAME.old-*``) is left behind. A refused
``--out`` is exit code 2 with exactly one line on stderr, naming ``--out``. A folder holding
anything trophoscape did not write is never deleted: ``--force`` keeps it, renamed.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import re
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import geopandas
import pytest

import trophoscape
from trophoscape.cli import program as cli
from trophoscape.io import folder as outputs
from trophoscape.report import run as run_folder
from trophoscape.errors import InputError

from test_errors_cli import (CANDIDATE, EXPLOSIVE, collection, features, middle, run_cli,
                             scenario)


def shown(exc) -> str:
    """An error as the command line prints it (options, where Python names parameters)."""
    from trophoscape.cli.program import FLAGS
    from trophoscape.errors import render_params

    return exc.render(FLAGS) if hasattr(exc, "render") else render_params(exc, FLAGS)

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


def every_path(folder: Path) -> list[str]:
    """Every path under ``folder``, relative, POSIX, a folder with a trailing "/"."""
    return sorted(p.relative_to(folder).as_posix() + ("/" if p.is_dir() else "")
                  for p in folder.rglob("*"))


def main_here(folder: Path, monkeypatch, capsys, *argv) -> tuple[int, list[str]]:
    """``trophoscape ARGV`` in this process, run from ``folder``: exit code, stderr lines."""
    monkeypatch.chdir(folder)
    capsys.readouterr()
    code = cli.main([str(a) for a in argv])
    return code, capsys.readouterr().err.splitlines()


def staging_file(folder: Path, pid: int, *, host: str | None = None, started=None) -> None:
    """The tag of a staging or set-aside folder, as a process ``pid`` would write it."""
    info = {"pid": pid, "host": host or socket.gethostname(), "started": started}
    (folder / ".trophoscape-staging").write_text(json.dumps(info), encoding="utf-8")


def write_shapefile_valley(folder: Path) -> Path:
    """``s.toml`` reading its patches from the folder ``shp`` (a folder of shapefiles)."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "p.geojson").write_text(collection(features()), encoding="utf-8")
    (folder / "shp").mkdir()
    geopandas.read_file(folder / "p.geojson").to_file(folder / "shp" / "patches.shp",
                                                      engine="pyogrio")
    (folder / "p.geojson").unlink()
    (folder / "s.toml").write_text(scenario(patches={"path": "shp"}), encoding="utf-8")
    return folder / "s.toml"


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
        "notes.txt); give a new or empty folder, or add --force to write there anyway (the "
        "folder is then kept, renamed to mine.replaced-YYYYmmdd-HHMMSS)")
    assert snapshot(tmp_path) == before
    # with --force the new output takes the folder's place; the user's folder is kept,
    # renamed, and a one-line notice names it
    done = run_cli(tmp_path, "run", "s.toml", "--out", "mine", "--no-maps", "--quiet",
                   "--force")
    assert done.returncode == 0, done.stderr
    kept = sorted(tmp_path.glob("mine.replaced-*"))
    assert len(kept) == 1 and re.fullmatch(r"mine\.replaced-\d{8}-\d{6}", kept[0].name)
    assert done.stderr.splitlines() == [
        f"note: mine held files trophoscape did not write; that folder was kept, renamed to "
        f"{kept[0].name}"]
    assert snapshot(kept[0]) == {"notes.txt": b"keep me\n"}
    assert {"patches.gpkg", "patches.csv", "timeseries.nc", "summary.json",
            outputs.MARKER_NAME} == {p.name for p in mine.iterdir()}
    assert leftovers(tmp_path) == []


def test_force_on_a_marked_folder_with_a_user_file_keeps_both(tmp_path, monkeypatch, capsys):
    # "mixed": trophoscape's files and one of the user's; --force keeps them all, renamed,
    # and a second --force run picks a name of its own for the folder it keeps
    write_valley(tmp_path)
    code, _ = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                        "--no-maps", "--quiet")
    assert code == 0
    (tmp_path / "out" / "thesis.txt").write_text("chapter 1\n", encoding="utf-8")
    old = snapshot(tmp_path / "out")
    for k in (1, 2):
        code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                              "--no-maps", "--quiet", "--force")
        assert code == 0 and len(err) == 1 and err[0].startswith("note: out held files "), err
        (tmp_path / "out" / "thesis.txt").write_text("chapter 1\n", encoding="utf-8")
    kept = sorted(tmp_path.glob("out.replaced-*"))
    assert len(kept) == 2 and kept[1].name in err[0]
    assert snapshot(kept[0]) == old  # the first folder, whole: the user's file and the run
    assert (kept[1] / "thesis.txt").read_text(encoding="utf-8") == "chapter 1\n"
    assert leftovers(tmp_path) == []


def test_a_sweep_with_force_keeps_the_folder_it_takes_the_place_of(tmp_path):
    write_valley(tmp_path)
    mine = tmp_path / "mine"
    (mine / "data").mkdir(parents=True)
    (mine / "data" / "field-notes.csv").write_text("site,count\nA,3\n", encoding="utf-8")
    before = snapshot(mine)
    done = run_cli(tmp_path, *SWEEP, "--out", "mine", "--force")
    assert done.returncode == 0, done.stderr
    kept = sorted(tmp_path.glob("mine.replaced-*"))
    assert len(kept) == 1 and snapshot(kept[0]) == before
    assert done.stderr.splitlines() == [
        f"note: mine held files trophoscape did not write; that folder was kept, renamed to "
        f"{kept[0].name}"]
    assert (mine / "sweep.csv").is_file() and (mine / "ledger.sqlite").is_file()
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


def test_a_file_in_a_subfolder_of_an_output_folder_needs_force(tmp_path, monkeypatch, capsys):
    write_valley(tmp_path)
    code, _ = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                        "--quiet")
    assert code == 0
    out = tmp_path / "out"
    # the marker lists every path trophoscape wrote, subfolders included
    assert marker(out)["files"] == [p for p in every_path(out) if p != outputs.MARKER_NAME]
    assert any(p.startswith("maps/") and p.endswith(".png") for p in marker(out)["files"])
    (out / "maps" / "my-sketch.txt").write_text("mine\n", encoding="utf-8")
    before = snapshot(tmp_path)
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                          "--no-maps")
    assert code == 2 and len(err) == 1, err
    assert err[0] == (
        "error: out: field '--out': holds maps/my-sketch.txt, which trophoscape did not "
        "write; move that elsewhere or give another folder, or add --force to write there "
        "anyway (the folder is then kept, renamed to out.replaced-YYYYmmdd-HHMMSS)")
    assert snapshot(tmp_path) == before
    # a folder of the user's among trophoscape's: named once, not file by file
    (out / "maps" / "my-sketch.txt").unlink()
    (out / "drafts" / "old").mkdir(parents=True)
    (out / "drafts" / "old" / "a.txt").write_text("a\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"holds drafts/, which trophoscape did not write;"):
        outputs.check_out(out)


def _earlier_run_folder(folder: Path) -> None:
    (folder / "maps").mkdir(parents=True)
    (folder / "maps" / "prey_occupancy.png").write_bytes(b"\x89PNG\r\n\x1a\n")
    (folder / "summary.json").write_text(
        json.dumps({"provenance": {"package": "trophoscape", "version": "0.0.9"}}),
        encoding="utf-8")
    (folder / "patches.csv").write_text("patch_id\n", encoding="utf-8")


def _earlier_sweep_folder(folder: Path) -> None:
    from trophoscape.workflows.sweep import open_ledger

    folder.mkdir(parents=True)
    ledger = open_ledger(folder / "ledger.sqlite")
    ledger.set_meta(format="1", scenario_sha256="0" * 64, keys="[]", created="then")
    ledger.close()
    (folder / "runs").mkdir()
    (folder / "runs" / "0123456789abcdef.json").write_text(
        json.dumps({"run_id": "0123456789abcdef", "status": "ok"}), encoding="utf-8")
    (folder / "sweep.csv").write_text("run_id\n0123456789abcdef\n", encoding="utf-8")


def _not_a_ledger(folder: Path) -> None:
    folder.mkdir(parents=True)
    (folder / "ledger.sqlite").write_text("my own notes, not a database\n", encoding="utf-8")
    (folder / "sweep.csv").write_text("a,b\n1,2\n", encoding="utf-8")


def _another_database(folder: Path) -> None:
    folder.mkdir(parents=True)
    conn = sqlite3.connect(folder / "ledger.sqlite")
    conn.execute("CREATE TABLE birds (name TEXT)")
    conn.commit()
    conn.close()


def _picture_among_the_maps(folder: Path) -> None:
    _earlier_run_folder(folder)
    (folder / "maps" / "holiday.jpg").write_bytes(b"\xff\xd8\xff")


def _thesis_among_the_runs(folder: Path) -> None:
    _earlier_sweep_folder(folder)
    (folder / "runs" / "thesis.docx").write_bytes(b"mine")


def _summary_of_something_else(folder: Path) -> None:
    folder.mkdir(parents=True)
    (folder / "summary.json").write_text(json.dumps({"total": 3}), encoding="utf-8")
    (folder / "patches.csv").write_text("patch_id\n", encoding="utf-8")


def _record_that_is_not_a_run(folder: Path) -> None:
    _earlier_sweep_folder(folder)
    (folder / "runs" / "0123456789abcdef.json").write_text("[1, 2, 3]", encoding="utf-8")


@pytest.mark.parametrize("build, extra", [
    (_earlier_run_folder, None),
    (_earlier_sweep_folder, None),
    (_not_a_ledger, "ledger.sqlite"),
    (_another_database, "ledger.sqlite"),
    (_picture_among_the_maps, "maps/holiday.jpg"),
    (_thesis_among_the_runs, "runs/thesis.docx"),
    (_summary_of_something_else, "summary.json"),
    (_record_that_is_not_a_run, "runs/0123456789abcdef.json"),
])
def test_an_output_folder_of_an_earlier_version_needs_real_evidence(tmp_path, build, extra):
    # no marker: a ledger that opens as a sweep's, a summary with trophoscape's provenance,
    # and nothing in any subfolder that trophoscape does not write; otherwise not ours
    folder = tmp_path / "old"
    build(folder)
    before = snapshot(tmp_path)
    if extra is None:
        assert outputs.check_out(folder) == folder.resolve()
    else:
        with pytest.raises(InputError) as info:
            outputs.check_out(folder)
        assert shown(info.value) == (
            f"{folder}: field '--out': is a folder trophoscape did not write (it holds "
            f"{extra}); give a new or empty folder, or add --force to write there anyway (the "
            "folder is then kept, renamed to old.replaced-YYYYmmdd-HHMMSS)")
    assert snapshot(tmp_path) == before  # looking, the ledger included, changes nothing


def test_an_output_folder_of_an_earlier_version_is_replaced_whole(tmp_path):
    write_valley(tmp_path)
    _earlier_run_folder(tmp_path / "old")
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    (mixed / "summary.json").write_text((tmp_path / "old" / "summary.json").read_text(),
                                        encoding="utf-8")
    (mixed / "thesis.docx").write_bytes(b"mine")
    done = run_cli(tmp_path, "run", "s.toml", "--out", "mixed", "--no-maps")
    assert "is a folder trophoscape did not write" in assert_refused(done)
    assert (mixed / "thesis.docx").read_bytes() == b"mine"
    done = run_cli(tmp_path, "run", "s.toml", "--out", "old", "--no-maps", "--quiet")
    assert done.returncode == 0, done.stderr
    assert not (tmp_path / "old" / "maps").exists()
    assert marker(tmp_path / "old")["command"] == "run"
    assert list(tmp_path.glob("old.replaced-*")) == []  # trophoscape's own: deleted


def test_ledger_recognition_matches_the_sweep_ledger(tmp_path):
    # consistency test: the ledger io.folder recognises is the one workflows.sweep writes
    from trophoscape.io.ledger import Ledger
    from trophoscape.report.sweep import sweep
    from trophoscape.workflows.sweep import SWEEP_COLUMNS

    write_valley(tmp_path)
    sweep(tmp_path / "s.toml", ["prey.growth_rate=0.5"], out=tmp_path / "sw", workers=1,
          plots=False)
    conn = sqlite3.connect(tmp_path / "sw" / "ledger.sqlite")
    try:
        found = {t: {r[1] for r in conn.execute(f"PRAGMA table_info({t})")}
                 for t in outputs.LEDGER_TABLES}
        keys = {r[0] for r in conn.execute("SELECT key FROM meta")}
    finally:
        conn.close()
    assert found["meta"] == set(outputs.LEDGER_TABLES["meta"])
    assert found["runs"] == set(outputs.LEDGER_TABLES["runs"]) | set(SWEEP_COLUMNS)
    assert outputs.LEDGER_META_KEYS <= keys
    assert set(outputs.LEDGER_TABLES) == set(re.findall(r"CREATE TABLE IF NOT EXISTS (\w+)",
                                                        Ledger.schema(SWEEP_COLUMNS)))


def test_a_ledger_of_an_earlier_version_reads_as_before(tmp_path):
    # consistency test: a ledger with the table an earlier version made (its CREATE
    # statement kept here verbatim) is opened, recorded into and read by today's code
    import json as _json

    from trophoscape.workflows.sweep import open_ledger

    path = tmp_path / "ledger.sqlite"
    conn = sqlite3.connect(path)
    conn.executescript("""
    CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
    CREATE TABLE IF NOT EXISTS runs (
        run_id    TEXT PRIMARY KEY,
        point     INTEGER NOT NULL,
        replicate INTEGER NOT NULL,
        seed      INTEGER NOT NULL,
        variant   TEXT NOT NULL,
        status    TEXT NOT NULL CHECK (status IN ('ok', 'failed')),
        error     TEXT,
        results   TEXT,
        seconds   REAL,
        finished  TEXT NOT NULL
    );""")
    conn.execute("INSERT INTO runs VALUES ('a', 0, 0, 7, ?, 'ok', NULL, ?, 1.5, 'then')",
                 (_json.dumps({"prey.growth_rate": 0.5}), _json.dumps({"x": 1.0})))
    conn.commit()
    conn.close()
    ledger = open_ledger(path)
    try:
        ledger.record("b", ok=False, error="boom", point=1, replicate=0, seed=8,
                      variant={"prey.growth_rate": 1.0})
        rows = ledger.rows()
        assert ledger.ok_ids() == {"a"}
    finally:
        ledger.close()
    assert [r["run_id"] for r in rows] == ["a", "b"]
    assert rows[0]["variant"] == {"prey.growth_rate": 0.5} and rows[0]["results"] == {"x": 1.0}
    assert rows[1]["status"] == "failed" and rows[1]["results"] == {}


# ------------------------------------------------------------------ inputs that are folders,
# ------------------------------------------------------------------ and folders by identity


@pytest.mark.parametrize("command", [
    ("run", "s.toml", "--no-maps"),
    ("sweep", "s.toml", "--vary", "prey.growth_rate=0.5,1", "--workers", "1", "--no-plots"),
])
def test_out_that_is_an_input_folder_is_refused_even_with_force(tmp_path, command):
    # the user's report: patches.path names a folder of shapefiles, and
    # `sweep ... --out shp --force` deleted them
    write_shapefile_valley(tmp_path)
    before = snapshot(tmp_path)
    done = run_cli(tmp_path, *command, "--out", "shp", "--force")
    assert assert_refused(done) == (
        "error: shp: field '--out': is the input folder shp; an output folder is replaced as "
        "a whole, so give a new folder for the outputs, e.g. --out shp-results")
    assert snapshot(tmp_path) == before


def test_a_folder_input_is_hashed_file_by_file(tmp_path, monkeypatch, capsys):
    write_shapefile_valley(tmp_path)
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                          "--no-maps", "--quiet")
    assert code == 0, err
    # the documented hash of a folder: each file by sorted relative path, a NUL, the file's
    # own SHA-256 in hex, a newline
    h = hashlib.sha256()
    for path in sorted((tmp_path / "shp").iterdir(), key=lambda p: p.name):
        h.update(path.name.encode() + b"\0"
                 + hashlib.sha256(path.read_bytes()).hexdigest().encode() + b"\n")
    summary = json.loads((tmp_path / "out" / "summary.json").read_text(encoding="utf-8"))
    assert summary["provenance"]["input_sha256"]["patches"] == h.hexdigest()
    assert len(list((tmp_path / "shp").iterdir())) >= 4  # .shp, .shx, .dbf, .prj at least


def test_a_symlinked_out_is_judged_by_the_folder_it_leads_to(tmp_path):
    data, scen = write_geopackage_valley(tmp_path)
    (tmp_path / "link").symlink_to(data, target_is_directory=True)
    before = snapshot(data)
    done = run_cli(tmp_path, "run", str(scen / "s.toml"), "--out", "link", "--force",
                   "--no-maps")
    assert assert_refused(done) == (
        "error: link: field '--out': is the folder of the input patches.gpkg; an output "
        "folder is replaced as a whole, so give a new folder for the outputs, e.g. --out "
        "link/results")
    assert snapshot(data) == before
    # a link to an output folder: the folder it leads to is replaced, the link stays
    (tmp_path / "real-out").mkdir()
    (tmp_path / "to-out").symlink_to(tmp_path / "real-out", target_is_directory=True)
    done = run_cli(tmp_path, "run", str(scen / "s.toml"), "--out", "to-out", "--no-maps",
                   "--quiet")
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "to-out").is_symlink()
    assert (tmp_path / "real-out" / "summary.json").is_file()
    assert leftovers(tmp_path) == []


def _bind_mounts_work() -> bool:
    if not sys.platform.startswith("linux") or shutil.which("unshare") is None:
        return False
    try:
        done = subprocess.run(["unshare", "-rm", "true"], capture_output=True, timeout=20)
    except (OSError, subprocess.SubprocessError):
        return False
    return done.returncode == 0


@pytest.mark.skipif(not _bind_mounts_work(), reason="needs unshare and a mount namespace")
def test_the_same_folder_by_another_path_is_still_an_input_folder(tmp_path):
    # A folder reached by two paths that no resolve() unifies: here a bind mount (in a
    # private mount namespace); on macOS and Windows, the same folder written in other
    # letter case. Folders are compared by identity, so --out view/data is refused.
    real = tmp_path / "real"
    write_valley(real / "data")
    (tmp_path / "view").mkdir()
    before = snapshot(real)
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(SRC), env.get("PYTHONPATH")]))
    script = 'mount --bind "$1" "$2" && exec "$3" -m trophoscape run "$4" --out "$5" --force'
    done = subprocess.run(
        ["unshare", "-rm", "sh", "-c", script, "sh", str(real), str(tmp_path / "view"),
         sys.executable, "real/data/s.toml", "view/data"],
        cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120)
    assert assert_refused(done) == (
        "error: view/data: field '--out': is the folder of the input p.geojson; an output "
        "folder is replaced as a whole, so give a new folder for the outputs, e.g. --out "
        "view/data/results")
    assert snapshot(real) == before


def _never_replaced(tmp_path: Path):
    package = Path(trophoscape.__file__).resolve().parent
    cases = [
        (Path("/"), "is the root of the file system;"),
        (Path("/trophoscape-test-no-such-folder"),
         "is a folder directly under the root of the file system, which is never replaced;"),
        (package, "is the Python installation or the trophoscape package that is running"),
        (package.parent, "holds the Python installation or the trophoscape package that is "
                         "running"),
        (tmp_path / "home", "is your home folder;"),
        (tmp_path, "holds your home folder;"),
    ]
    prefix = Path(sys.prefix).resolve()
    if len(prefix.parts) > 2:  # not /usr, which is refused as a folder under the root
        cases.append((prefix, "is the Python installation or the trophoscape package that "
                              "is running"))
    if os.path.ismount("/dev/shm"):
        cases.append((Path("/dev/shm"), "is a mount point, which cannot be replaced;"))
    return cases


def test_folders_that_are_never_replaced_even_with_force(tmp_path, monkeypatch):
    (tmp_path / "home").mkdir()
    monkeypatch.setattr(Path, "home", classmethod(lambda cls: tmp_path / "home"))
    for folder, words in _never_replaced(tmp_path):
        with pytest.raises(InputError) as info:
            outputs.check_out(folder, force=True)
        text = shown(info.value)
        assert words in text and "field '--out'" in text and "\n" not in text, (folder, text)


# ------------------------------------------------------------------ messages


def test_a_symbolic_link_loop_in_out_is_one_line(tmp_path, monkeypatch, capsys):
    write_valley(tmp_path)
    os.symlink("loop", tmp_path / "loop")
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "loop",
                          "--no-maps")
    assert code == 2
    assert err == ["error: loop: field '--out': is a symbolic link that leads back to itself "
                   "(a loop); remove the loop, or give another folder, e.g. --out results"]


def test_control_characters_in_out_are_quoted_on_one_line(tmp_path, monkeypatch, capsys):
    write_valley(tmp_path)
    (tmp_path / "two\nlines").write_text("a file\n", encoding="utf-8")
    mine = tmp_path / "tab\there"
    mine.mkdir()
    (mine / "new\nnote.txt").write_text("mine\n", encoding="utf-8")
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out",
                          "two\nlines", "--no-maps")
    assert code == 2
    assert err == ["error: 'two\\nlines': field '--out': is an existing file, not a folder; "
                   "give the name of a new folder for the outputs, e.g. --out results"]
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out",
                          "tab\there", "--no-maps")
    assert code == 2
    assert err == ["error: 'tab\\there': field '--out': is a folder trophoscape did not write "
                   "(it holds 'new\\nnote.txt'); give a new or empty folder, or add --force to "
                   "write there anyway (the folder is then kept, renamed to "
                   "'tab\\there'.replaced-YYYYmmdd-HHMMSS)"]


def test_an_existing_ledger_names_out_and_force(tmp_path, monkeypatch, capsys):
    write_valley(tmp_path)
    code, _ = main_here(tmp_path, monkeypatch, capsys, *SWEEP, "--out", "out")
    assert code == 0
    before = snapshot(tmp_path)
    code, err = main_here(tmp_path, monkeypatch, capsys, *SWEEP, "--out", "out")
    assert code == 2
    assert err == [f"error: {Path('out') / 'ledger.sqlite'}: field '--out': a sweep ledger is "
                   "already here; add --resume to continue that sweep, add --force to start "
                   "a new sweep in its place (its finished runs are then deleted), or give "
                   "another --out folder"]
    assert snapshot(tmp_path) == before


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
    assert re.fullmatch(rf"\.out\.partial-{proc.pid}-[0-9a-f]{{8}}", stage.name)
    tag = json.loads((stage / ".trophoscape-staging").read_text(encoding="utf-8"))
    assert tag["pid"] == proc.pid and tag["host"] == socket.gethostname()
    proc.send_signal(signum)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == code, err
    assert err.splitlines() == [f"{word}; no output was written"]
    assert not (tmp_path / "out").exists()
    assert snapshot(tmp_path) == before


def _wait_until_the_command_runs(proc, timeout=60.0) -> None:
    """Until the command has begun its work: numpy's compiled core is mapped into the
    process (Linux: /proc/PID/maps, proc(5)), which only the command's body loads (the
    command line module does not). Before that the interpreter itself is starting (site,
    runpy), and a Ctrl-C there gets the interpreter's own one-word report, which no program
    can change."""
    end = time.monotonic() + timeout
    while time.monotonic() < end and proc.poll() is None:
        try:
            if "_multiarray_umath" in Path(f"/proc/{proc.pid}/maps").read_text():
                return
        except OSError:
            return
        time.sleep(0.005)


def test_an_error_that_a_ctrl_c_caused_ends_as_the_stop(tmp_path, monkeypatch, capsys):
    # Python wraps a KeyboardInterrupt raised while a class is created (a lazy import of a
    # module defining a dataclass) in a RuntimeError; the recorded stop wins: exit 130, one
    # line, no traceback (seen once in the random-moment test below)
    from trophoscape import errors

    write_valley(tmp_path)
    before = snapshot(tmp_path)

    def interrupted_import(*args, **kwargs):
        errors.note_stop(KeyboardInterrupt)
        raise RuntimeError("Error calling __set_name__ on 'Field' instance")

    monkeypatch.setattr(run_folder, "run_to_folder", interrupted_import)
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                          "--quiet")
    assert code == 130 and err == ["interrupted; no output was written"]
    assert snapshot(tmp_path) == before


def test_the_warning_printer_is_the_commands_only(tmp_path, monkeypatch, capsys):
    import warnings

    write_valley(tmp_path)
    mine = warnings.showwarning
    code, _ = main_here(tmp_path, monkeypatch, capsys, "check", "s.toml")
    assert code == 0 and warnings.showwarning is mine


def test_ctrl_c_at_random_moments_always_stops_the_run(tmp_path):
    # 20 runs of a few seconds, each sent SIGINT at a random moment from when the command
    # has begun its work (the interpreter's own start-up comes first: no program can handle
    # a signal before its first line runs) to about the time a whole run takes, maps drawn
    # in a quarter of them. Every run that was still going when the signal came must end with exit 130, one
    # line, no traceback, and either no output at all or the whole output when the signal
    # came after it was put in place; a signal after the command ended (during the
    # interpreter's shutdown) is ignored: exit 0, the whole output, nothing on stderr.
    rng = random.Random(20261202)
    text = scenario(run={"duration": 100.0, "burn_in": 1.0, "census_interval": 0.5})
    write_valley(tmp_path, text=text)
    before = snapshot(tmp_path)
    start = time.monotonic()
    done = _run_process(tmp_path, "run", "s.toml", "--out", "whole", "--quiet", "--no-maps")
    done.communicate(timeout=120)
    whole = time.monotonic() - start
    assert done.returncode == 0
    shutil.rmtree(tmp_path / "whole")
    tries = 0
    outcomes = []
    while tries < 20:
        assert len(outcomes) < 40, outcomes  # most runs must still be going at the signal
        maps = () if len(outcomes) % 4 == 0 else ("--no-maps",)
        proc = _run_process(tmp_path, "run", "s.toml", "--out", "out", "--quiet", *maps)
        _wait_until_the_command_runs(proc)
        time.sleep(rng.uniform(0.0, 0.9 * whole))
        if proc.poll() is not None:  # finished before the signal: not a try
            proc.communicate()
            outcomes.append("finished")
            shutil.rmtree(tmp_path / "out", ignore_errors=True)
            continue
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
        outcomes.append(proc.returncode)
        if proc.returncode == 0:  # the command had ended: the signal came during shutdown
            assert err == "" and (tmp_path / "out" / "summary.json").is_file(), err
            shutil.rmtree(tmp_path / "out")
            assert snapshot(tmp_path) == before
            continue
        tries += 1
        assert proc.returncode == 130, err
        assert "Traceback" not in err and "Exception ignored" not in err, err
        lines = err.splitlines()
        assert len(lines) == 1, err
        if lines[0] == "interrupted; no output was written":
            assert not (tmp_path / "out").exists()
        else:
            assert lines[0] == "interrupted; the output was written to out", err
            assert (tmp_path / "out" / "summary.json").is_file()
            shutil.rmtree(tmp_path / "out")
        assert snapshot(tmp_path) == before, outcomes  # no staging folder, nothing else


def test_stale_staging_folders_are_removed_only_when_surely_abandoned(tmp_path):
    write_valley(tmp_path)
    gone, alive = dead_pid(), os.getpid()
    folders = {
        "stale": (f".out.partial-{gone}-abcd1234", {}),
        "stale old, output in place": (f".out.old-{gone}-0011aabb", {}),
        "pid taken by a later process": (f".out.partial-{alive}-feed0001",
                                          {"pid": alive, "started": "1"}),
        "alive": (f".out.partial-{alive}-efab5678", {"pid": alive}),
        "no tag": (f".out.partial-{gone}-ccdd0011", None),
        "other host": (f".out.partial-{gone}-aabb2233", {"host": "elsewhere.example"}),
        "other name": (f".other.partial-{gone}-a1b2c3d4", {}),
        "seven hex digits": (f".out.partial-{gone}-abc1234", {}),
        "not hex": (f".out.partial-{gone}-ghij5678", {}),
        "not ours": (".out.partial-notapid", {}),
    }
    for name, tag in folders.values():
        (tmp_path / name).mkdir()
        (tmp_path / name / "timeseries.nc").write_bytes(b"half")
        if tag is not None:
            pid = int(re.search(r"-(\d+)-", name)[1]) if re.search(r"-(\d+)-", name) else gone
            tag = {"pid": pid, **tag}
            staging_file(tmp_path / name, tag.pop("pid"), **tag)
    (tmp_path / "out").mkdir()
    done = run_cli(tmp_path, "run", "s.toml", "--out", "out", "--no-maps", "--quiet")
    assert done.returncode == 0, done.stderr
    removed = {k for k, (name, _) in folders.items() if not (tmp_path / name).exists()}
    assert removed == {"stale", "stale old, output in place", "pid taken by a later process"}
    assert (tmp_path / "out" / "summary.json").is_file()


def test_an_old_folder_set_aside_by_a_killed_process_is_put_back(tmp_path):
    # killed between renaming the old folder aside and the new one into place
    out = tmp_path / "out"
    aside = tmp_path / f".out.old-{dead_pid()}-0a1b2c3d"
    aside.mkdir()
    (aside / "summary.json").write_text("{}", encoding="utf-8")
    staging_file(aside, int(aside.name.split("-")[1]))
    assert outputs.check_out(out) == out.resolve()
    assert snapshot(out) == {"summary.json": b"{}"} and not aside.exists()  # tag removed
    # with the new folder in place, such a folder is deleted instead
    aside.mkdir()
    staging_file(aside, int(aside.name.split("-")[1]))
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


def _two_runs(tmp_path: Path, monkeypatch, capsys) -> dict:
    """A first run's folder ``out``; the scenario then renamed "second" for the next run."""
    write_valley(tmp_path, text=scenario(**{"": {"name": "first"}}))
    code, _ = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                        "--no-maps", "--quiet")
    assert code == 0
    (tmp_path / "s.toml").write_text(scenario(**{"": {"name": "second"}}), encoding="utf-8")
    return snapshot(tmp_path / "out")


def _scenario_name(folder: Path) -> str:
    return json.loads((folder / "summary.json").read_text(encoding="utf-8"))["scenario"]


@pytest.mark.parametrize("moment", ["after the set-aside", "after the new folder is in"])
@pytest.mark.parametrize("signum, code, word", [(signal.SIGTERM, 143, "terminated"),
                                                (signal.SIGINT, 130, "interrupted")])
def test_a_signal_during_the_swap_waits_for_it(tmp_path, monkeypatch, capsys, moment, signum,
                                               code, word):
    _two_runs(tmp_path, monkeypatch, capsys)
    out = (tmp_path / "out").resolve()
    if moment == "after the set-aside":
        set_aside = outputs._set_aside

        def signalled(real):
            aside = set_aside(real)
            os.kill(os.getpid(), signum)
            return aside

        monkeypatch.setattr(outputs, "_set_aside", signalled)
    else:
        rename = os.rename

        def signalled(src, dst, *args, **kwargs):
            rename(src, dst, *args, **kwargs)
            if Path(dst) == out:
                os.kill(os.getpid(), signum)

        monkeypatch.setattr(os, "rename", signalled)
    handlers = signal.getsignal(signal.SIGTERM), signal.getsignal(signal.SIGINT)
    code_seen, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                               "--no-maps", "--quiet")
    assert code_seen == code
    assert err == [f"{word}; the output was written to out"]
    assert _scenario_name(out) == "second"
    assert leftovers(tmp_path) == []
    assert (signal.getsignal(signal.SIGTERM), signal.getsignal(signal.SIGINT)) == handlers


def _run_again_refused(tmp_path, monkeypatch, capsys):
    """Run into ``out`` once more, expecting exit 2 with one line and the results kept in
    one ``out.new-*`` folder: ``(that line, the kept folder)``."""
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                          "--no-maps", "--quiet")
    assert code == 2 and len(err) == 1, err
    kept = sorted(tmp_path.glob("out.new-*"))
    assert len(kept) == 1
    return err[0], kept[0]


def test_a_failed_swap_puts_the_old_folder_back_and_keeps_the_results(tmp_path, monkeypatch,
                                                                      capsys):
    old = _two_runs(tmp_path, monkeypatch, capsys)
    out = (tmp_path / "out").resolve()
    rename = os.rename

    def busy(src, dst, *args, **kwargs):
        if Path(dst) == out and ".partial-" in Path(src).name:
            raise OSError(16, "Device or resource busy")
        return rename(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "rename", busy)
    err, kept = _run_again_refused(tmp_path, monkeypatch, capsys)
    assert err == (
        f"error: out: field '--out': cannot be replaced (device or resource busy), so the "
        f"folder was left as it was and the new results were kept in {kept.name}; move "
        "them into place yourself, or deal with that and run again (or add --force)")
    assert snapshot(tmp_path / "out") == old
    assert _scenario_name(kept) == "second" and marker(kept)["command"] == "run"
    assert leftovers(tmp_path) == []


def test_a_file_appearing_during_the_run_keeps_the_results(tmp_path, monkeypatch, capsys):
    # an office suite's lock file appears in the old folder while the run goes on
    old = _two_runs(tmp_path, monkeypatch, capsys)
    write = run_folder.write_run_files

    def and_a_lock_file(result, stage, **options):
        write(result, stage, **options)
        (tmp_path / "out" / ".~lock.patches.csv#").write_text("user,host\n", encoding="utf-8")

    monkeypatch.setattr(run_folder, "write_run_files", and_a_lock_file)
    err, kept = _run_again_refused(tmp_path, monkeypatch, capsys)
    assert err == (
        "error: out: field '--out': holds .~lock.patches.csv#, which trophoscape did not write "
        "and which appeared during the run, so the folder was left as it was and the new "
        f"results were kept in {kept.name}; move them into place yourself, or deal with "
        "that and run again (or add --force)")
    now = snapshot(tmp_path / "out")
    assert now.pop(".~lock.patches.csv#") == b"user,host\n" and now == old
    assert _scenario_name(kept) == "second"
    assert leftovers(tmp_path) == []


def test_the_sigterm_handler_is_restored_after_main(tmp_path, monkeypatch, capsys):
    write_valley(tmp_path)
    before = signal.getsignal(signal.SIGTERM), signal.getsignal(signal.SIGINT)
    for argv in (("run", "s.toml", "--out", "out", "--no-maps", "--quiet"),  # exit 0
                 ("run", "s.toml", "--out", "s.toml")):  # exit 2
        main_here(tmp_path, monkeypatch, capsys, *argv)
        assert (signal.getsignal(signal.SIGTERM), signal.getsignal(signal.SIGINT)) == before


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


def ledger_rows(path: Path) -> dict[str, tuple]:
    """run_id -> (status, finished) of every row of a sweep ledger (read-only)."""
    conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    try:
        return {r[0]: (r[1], r[2]) for r in
                conn.execute("SELECT run_id, status, finished FROM runs")}
    finally:
        conn.close()


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
    assert marker(out)["files"] == [p for p in every_path(out) if p != outputs.MARKER_NAME]
    assert len(list((out / "runs").glob("*.json"))) == 2
    rows = ledger_rows(out / "ledger.sqlite")
    records = {p.name: p.read_bytes() for p in (out / "runs").glob("*.json")}
    assert len(rows) == 2 and {s for s, _ in rows.values()} == {"ok"}
    # resuming keeps the ledger: no run is repeated, every row and its finishing time and
    # every run's record stay as they were; the table is written again, whole
    done = run_cli(tmp_path, *SWEEP, "--out", "out", "--resume")
    assert done.returncode == 0, done.stderr
    assert ledger_rows(out / "ledger.sqlite") == rows
    assert {p.name: p.read_bytes() for p in (out / "runs").glob("*.json")} == records
    import pandas as pd

    table = pd.read_csv(out / "sweep.csv")
    assert dict(zip(table["run_id"], table["finished"])) == {k: f for k, (_, f) in rows.items()}
    assert leftovers(tmp_path) == []


def test_a_terminated_sweep_keeps_its_ledger_and_resumes(tmp_path):
    # three runs of a few seconds each; SIGTERM once the first is in the ledger
    write_valley(tmp_path, text=scenario(run={"duration": 1500.0}))
    argv = ("sweep", "s.toml", "--vary", "prey.growth_rate=0.5,0.75,1", "--workers", "1",
            "--no-plots", "--quiet", "--out", "out")
    proc = _run_process(tmp_path, *argv)
    runs = tmp_path / "out" / "runs"
    end = time.monotonic() + 120
    while not list(runs.glob("*.json")):
        if proc.poll() is not None or time.monotonic() > end:
            proc.kill()
            pytest.fail(f"no run finished before the sweep ended: {proc.communicate()}")
        time.sleep(0.05)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err
    assert err.splitlines() == [
        f"terminated; the finished runs are kept in {Path('out') / 'ledger.sqlite'}; run the "
        "same command with --resume to finish the sweep"]
    rows = ledger_rows(tmp_path / "out" / "ledger.sqlite")
    assert 1 <= len(rows) < 3
    assert {p.stem for p in runs.glob("*.json")} == set(rows)
    assert leftovers(tmp_path) == []
    done = run_cli(tmp_path, *argv, "--resume")
    assert done.returncode == 0, done.stderr
    after = ledger_rows(tmp_path / "out" / "ledger.sqlite")
    assert len(after) == 3 and {k: after[k] for k in rows} == rows  # none repeated
    assert leftovers(tmp_path) == []


def test_a_sweep_checks_its_out_once(tmp_path, monkeypatch):
    from trophoscape.report.sweep import sweep

    write_valley(tmp_path)
    calls = []
    check_out = outputs.check_out

    def counted(*args, **kwargs):
        calls.append(args)
        return check_out(*args, **kwargs)

    monkeypatch.setattr(outputs, "check_out", counted)
    sweep(tmp_path / "s.toml", ["prey.growth_rate=0.5"], out=tmp_path / "sw", workers=1,
          plots=False)
    assert len(calls) == 1 and (tmp_path / "sw" / "sweep.csv").is_file()


# ------------------------------------------------------------------ corridors


def _corridor_valley(folder: Path) -> None:
    write_valley(folder)
    (folder / "c.geojson").write_text(CANDIDATE, encoding="utf-8")


def test_a_failed_corridors_command_leaves_the_users_empty_folder_alone(tmp_path, monkeypatch,
                                                                       capsys):
    from trophoscape.workflows import planning

    _corridor_valley(tmp_path)
    (tmp_path / "plan").mkdir()

    def stopped(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(planning, "plan_corridors", stopped)
    for out in ("plan", "new-plan"):
        code, err = main_here(tmp_path, monkeypatch, capsys, "corridors", "s.toml",
                              "--candidates", "c.geojson", "--budget", "1", "--out", out,
                              "--no-maps", "--quiet")
        assert code == 130 and err == ["interrupted; no output was written"]
    assert (tmp_path / "plan").is_dir() and list((tmp_path / "plan").iterdir()) == []
    assert not (tmp_path / "new-plan").exists()
    assert leftovers(tmp_path) == []


def test_write_corridors_refuses_the_folder_of_the_links_file(tmp_path):
    from trophoscape.workflows.planning import read_candidates
    from trophoscape.workflows.planning import plan_corridors, read_link_list
    from trophoscape.report.corridors import write_corridors

    _corridor_valley(tmp_path)
    (tmp_path / "lk").mkdir()
    links_file = tmp_path / "lk" / "links.csv"
    links_file.write_text("source,target\nA1,A2\n", encoding="utf-8")
    study = trophoscape.load_study(tmp_path / "s.toml")
    candidates = read_candidates(tmp_path / "c.geojson", study.landscape)
    plan = plan_corridors(study, candidates, budget=1.0,
                          links=read_link_list(links_file, study), patches=False, workers=1,
                          links_file=links_file)
    before = snapshot(tmp_path / "lk")
    with pytest.raises(InputError, match="is the folder of the input links.csv;"):
        write_corridors(plan, tmp_path / "lk", maps=False, force=True)
    assert snapshot(tmp_path / "lk") == before


# ------------------------------------------------------------------ the Python API


def test_write_run_checks_its_folder(tmp_path):
    scenario_file = write_valley(tmp_path)
    result = trophoscape.run_study(trophoscape.load_study(scenario_file))
    with pytest.raises(InputError) as info:
        trophoscape.write_run(result, tmp_path, maps=False)
    assert "is the folder of the input p.geojson" in shown(info.value)
    out = trophoscape.write_run(result, tmp_path / "api", maps=False)
    assert marker(out)["command"] == "write_run"


def test_a_full_disk_is_one_line_with_exit_1_and_leaves_nothing(tmp_path, monkeypatch, capsys):
    # a failure of the machine, not of the input (ENOSPC while the outputs are written,
    # as pyogrio raises it): exit 1, one line naming the file, the staging folder removed
    import errno

    write_valley(tmp_path)
    before = snapshot(tmp_path)

    def full(result, stage, **kw):
        raise OSError(errno.ENOSPC, "No space left on device", str(stage / "patches.gpkg"))

    monkeypatch.setattr(run_folder, "write_run_files", full)
    code, err = main_here(tmp_path, monkeypatch, capsys, "run", "s.toml", "--out", "out",
                          "--quiet")
    assert code == 1
    assert len(err) == 1 and err[0].startswith("error: could not read or write "), err
    assert err[0].endswith("patches.gpkg: No space left on device; free space or fix the "
                           "folder, then run again"), err
    assert snapshot(tmp_path) == before


def test_a_damaged_ledger_with_resume_is_one_line(tmp_path):
    # a sweep folder whose ledger.sqlite was overwritten with other bytes: --resume names
    # the ledger and exits 2 instead of an sqlite3 traceback
    write_valley(tmp_path)
    args = ("sweep", "s.toml", "--vary", "prey.growth_rate=1,2", "--out", "sw", "--workers", "1")
    assert run_cli(tmp_path, *args).returncode == 0
    ledger = tmp_path / "sw" / "ledger.sqlite"
    ledger.write_bytes(b"not a database " * 100)
    for extra in (tmp_path / "sw").glob("ledger.sqlite-*"):
        extra.unlink()
    done = run_cli(tmp_path, *args, "--resume")
    assert done.returncode == 2, done.stderr
    assert done.stderr.splitlines() == [
        f"error: {Path('sw') / 'ledger.sqlite'}: field '--resume': the sweep's ledger cannot "
        "be read (file is not a database); it is damaged or not a trophoscape ledger; start "
        "the sweep again in another --out folder"]
