"""Maps and report drawn in a second process (``report.run.MAPS_APART_MIN_PATCHES``).

Consistency tests: the folder written with the maps drawn apart must be the one written in
one process, an error in either process must end both and leave no output, and nothing may
keep running afterwards.
"""

import json
import multiprocessing
import os
import re
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from matplotlib.image import imread

import trophoscape as ts
from trophoscape.errors import InputError, RunError
from trophoscape.report import html as html_module
from trophoscape.report import run as run_module
from trophoscape.scenario import parse_scenario
from trophoscape.testing import grid_landscape

from conftest import Unrebuildable, count_calls

apart_possible = pytest.mark.skipif(
    not sys.platform.startswith("linux") or len(os.sched_getaffinity(0)) < 2,
    reason="the maps are drawn apart only on Linux with two cores")


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    folder = tmp_path_factory.mktemp("apart")
    land = grid_landscape(3, 4, spacing_km=1.5, size_km=1.0)
    land.frame.to_file(folder / "p.gpkg", driver="GPKG", engine="pyogrio")
    sc = parse_scenario({"name": "Apart check", "patches": {"path": "p.gpkg",
                                                             "id_field": "patch_id"},
                         "run": {"duration": 30.0, "burn_in": 5.0}}, base_dir=folder)
    return ts.run_study(ts.build_study(sc))


@pytest.fixture
def apart(monkeypatch):
    """Maps drawn apart from the first patch on; counts the processes started."""
    monkeypatch.setattr(run_module, "MAPS_APART_MIN_PATCHES", 1)
    return count_calls(monkeypatch, run_module, "InSecondProcess")


def no_process_left():
    return multiprocessing.active_children() == []


@apart_possible
def test_maps_drawn_apart_are_those_drawn_in_one_process(result, tmp_path, apart):
    ts.write_run(result, tmp_path / "apart")
    assert apart == [1]  # the second process was used
    run_module.MAPS_APART_MIN_PATCHES = 1 << 40  # (monkeypatch restores it)
    ts.write_run(result, tmp_path / "here")
    assert apart == [1]  # and not here
    maps = sorted(p.name for p in (tmp_path / "here" / "maps").iterdir())
    assert maps and maps == sorted(p.name for p in (tmp_path / "apart" / "maps").iterdir())
    for name in maps:
        np.testing.assert_array_equal(imread(tmp_path / "apart" / "maps" / name),
                                      imread(tmp_path / "here" / "maps" / name))
    assert ((tmp_path / "apart" / "patches.csv").read_bytes()
            == (tmp_path / "here" / "patches.csv").read_bytes())
    summaries = [json.loads((tmp_path / f / "summary.json").read_text("utf-8"))
                 for f in ("apart", "here")]
    for summary in summaries:
        summary["provenance"].pop("created")  # when the folder was written
    assert summaries[0] == summaries[1]
    # the report says when it was written; the rest is the same
    stamp = re.compile(r"Run \d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\+00:00")
    pages = [stamp.subn("Run (time)", (tmp_path / f / "report.html").read_text("utf-8"))
             for f in ("apart", "here")]
    assert pages[0][1] == 1 and pages[0] == pages[1]
    assert no_process_left()


@apart_possible
def test_an_error_while_drawing_apart_is_raised_here_and_nothing_is_written(
        result, tmp_path, apart, monkeypatch):
    def bad(*args, **kwargs):
        raise InputError("no such colour scheme", field="report.colours")

    monkeypatch.setattr(html_module, "write_figures_and_report", bad)
    with pytest.raises(InputError, match="no such colour scheme") as caught:
        ts.write_run(result, tmp_path / "out")
    assert caught.value.field == "report.colours"  # the same error, its parts whole
    assert apart == [1]
    assert not (tmp_path / "out").exists()
    assert no_process_left()


@apart_possible
def test_a_failure_writing_the_files_ends_the_drawing_process(result, tmp_path, apart,
                                                              monkeypatch):
    def slow(*args, **kwargs):
        time.sleep(120)

    def failing(*args, **kwargs):
        raise RunError("disk full")

    monkeypatch.setattr(html_module, "write_figures_and_report", slow)
    monkeypatch.setattr(run_module, "_write_files", failing)
    t0 = time.perf_counter()
    with pytest.raises(RunError, match="disk full"):
        ts.write_run(result, tmp_path / "out")
    assert time.perf_counter() - t0 < 60  # not waiting for the drawing
    assert apart == [1]
    assert no_process_left()
    assert not (tmp_path / "out").exists()


@apart_possible
def test_a_drawing_process_that_dies_is_a_run_error(result, tmp_path, apart, monkeypatch):
    def dies(*args, **kwargs):
        os._exit(3)

    monkeypatch.setattr(html_module, "write_figures_and_report", dies)
    with pytest.raises(RunError, match="exit code 3"):
        ts.write_run(result, tmp_path / "out")
    assert no_process_left()
    assert not (tmp_path / "out").exists()


def test_small_runs_and_workers_draw_in_their_own_process(monkeypatch):
    assert not run_module._apart(run_module.MAPS_APART_MIN_PATCHES - 1)
    monkeypatch.setattr(multiprocessing.current_process(), "_config",
                        {**multiprocessing.current_process()._config, "daemon": True})
    assert not run_module._apart(run_module.MAPS_APART_MIN_PATCHES)


class _Unpicklable(Exception):
    def __init__(self, text):
        super().__init__(text)
        self.callback = lambda: None  # does not pickle


@apart_possible
def test_an_error_that_cannot_be_rebuilt_here_keeps_its_type_and_text(result, tmp_path, apart,
                                                                      monkeypatch):
    def bad(*args, **kwargs):
        raise Unrebuildable("no colour", "the palette ran out")

    monkeypatch.setattr(html_module, "write_figures_and_report", bad)
    with pytest.raises(RunError, match="Unrebuildable: no colour because the palette ran out"
                       ) as caught:
        ts.write_run(result, tmp_path / "out")
    assert "in the process that drew the maps" in "".join(caught.value.__notes__)
    assert "the palette ran out" in "".join(caught.value.__notes__)  # its traceback
    assert no_process_left()


@apart_possible
def test_an_error_that_does_not_pickle_keeps_its_type_and_text(result, tmp_path, apart,
                                                             monkeypatch):
    def bad(*args, **kwargs):
        raise _Unpicklable("a colour map that cannot travel")

    monkeypatch.setattr(html_module, "write_figures_and_report", bad)
    with pytest.raises(RunError, match="_Unpicklable: a colour map that cannot travel"):
        ts.write_run(result, tmp_path / "out")
    assert no_process_left()
    assert not (tmp_path / "out").exists()


@apart_possible
def test_when_no_process_can_be_started_the_maps_are_drawn_here(result, tmp_path, apart,
                                                              monkeypatch):
    def no_fork(self):
        raise OSError(12, "Cannot allocate memory")

    monkeypatch.setattr(multiprocessing.context.ForkProcess, "start", no_fork)
    ts.write_run(result, tmp_path / "out")
    assert apart == [1]
    assert (tmp_path / "out" / "report.html").exists()
    assert len(list((tmp_path / "out" / "maps").iterdir())) > 5


@apart_possible
def test_the_maps_process_ends_when_its_parent_is_killed(tmp_path):
    # a parent killed with SIGKILL cannot stop it: the kernel (PR_SET_PDEATHSIG) or its
    # watch of the parent's pid must end it, not leave it drawing into a folder nobody owns
    import signal
    import subprocess

    script = f"""
import os, signal, sys, threading, time, multiprocessing
sys.path.insert(0, {str(Path(__file__).resolve().parent)!r})
import trophoscape as ts
from trophoscape.report import html, run
"""
    code = script + """
from trophoscape.scenario import parse_scenario
from trophoscape.testing import grid_landscape
from pathlib import Path
folder = Path(sys.argv[1])
land = grid_landscape(3, 4, spacing_km=1.5, size_km=1.0)
land.frame.to_file(folder / "p.gpkg", driver="GPKG", engine="pyogrio")
sc = parse_scenario({"name": "Kill check", "patches": {"path": "p.gpkg", "id_field": "patch_id"},
                     "run": {"duration": 10.0, "burn_in": 2.0}}, base_dir=folder)
result = ts.run_study(ts.build_study(sc))
run.MAPS_APART_MIN_PATCHES = 1
html.write_figures_and_report = lambda *a, **k: time.sleep(120)
def kill_me():
    time.sleep(3)
    print(" ".join(str(p.pid) for p in multiprocessing.active_children()), flush=True)
    os.kill(os.getpid(), signal.SIGKILL)
threading.Thread(target=kill_me, daemon=True).start()
ts.write_run(result, folder / "out")
"""
    out = subprocess.run([sys.executable, "-c", code, str(tmp_path)], capture_output=True,
                         text=True, timeout=120)
    assert out.returncode == -signal.SIGKILL, out.stderr[-2000:]
    pids = [int(p) for p in out.stdout.split()]
    assert len(pids) == 1  # the maps' process was running when the parent was killed

    def gone(pid):
        try:
            with open(f"/proc/{pid}/status") as f:
                return "\\tZ" in f.read()  # a zombie has ended
        except FileNotFoundError:
            return True

    deadline = time.monotonic() + 10
    while not gone(pids[0]) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert gone(pids[0])
