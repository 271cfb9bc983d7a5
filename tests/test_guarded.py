"""No analysis can lose a run: a failing analysis is recorded, warned about and left empty,
and everything else is written; hard but valid networks run every analysis."""

import json
import math
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import scipy.sparse.linalg
from conftest import count_calls, grid_study, write_grid_file

import trophoscape as ts
import trophoscape.workflows.study
from trophoscape.analysis.stability import STABILITY_LABELS
from trophoscape.cli.program import main as cli_main
from trophoscape.errors import TrophoscapeWarning
from trophoscape.scenario import parse_scenario
from trophoscape.testing import chain_landscape, grid_landscape

ON = {"stability": True, "capacity": True}

# per analysis: the function analyse() calls, the words of its warning, and the suffixes of
# its per-patch columns and summary keys (README, output section)
ANALYSES = {
    "persistence": ("persistence_table", "the persistence analysis",
                    ("persists", "occupancy", "mean", "cv", "last_extinction", "extinctions",
                     "recolonisations", "time_to_extinction", "margin"),
                    ("regional_persistence", "area_persistence", "regional_extinction_time",
                     "regional_survival")),
    "synchrony": ("synchrony_analysis", "the synchrony analysis",
                  ("sync_local", "sync_region", "sync_all", "phase_locking", "sync_group"),
                  ("synchrony", "kuramoto_mean", "community_synchrony",
                   "sync_half_distance_km")),
    "stability": ("stability_analysis", "the stability analysis", ("equilibrium",), ()),
    "capacity": ("capacity_analysis", "metapopulation capacity",
                 ("capacity_share", "capacity_drop"),
                 ("metapopulation_capacity", "capacity_drop_method")),
}


def names_of(analysis):
    _, _, columns, keys = ANALYSES[analysis]
    cols = [f"{s}_{c}" for s in ("prey", "predator") for c in columns]
    keys = [f"{s}_{k}" for s in ("prey", "predator") for k in keys]
    if analysis == "stability":
        keys = ["stability", "stability_details"]
    return cols, keys


def same(a, b):
    """Equal, with NaN equal to NaN, through dicts and lists."""
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return bool(a == b)


@pytest.fixture(scope="module")
def grid_file(tmp_path_factory):
    return write_grid_file(tmp_path_factory.mktemp("guarded"))


@pytest.fixture(scope="module")
def baseline(grid_file):
    """Every analysis on, nothing failing."""
    return ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))


def fail_with(monkeypatch, function, exc):
    def broken(*args, **kwargs):
        raise exc

    monkeypatch.setattr(trophoscape.workflows.study, function, broken)


def test_nothing_failed_is_an_empty_list(baseline, tmp_path):
    assert baseline.summary["analysis_errors"] == []
    ts.write_run(baseline, tmp_path / "out", maps=False)
    summary = json.loads((tmp_path / "out" / "summary.json").read_text(encoding="utf-8"))
    assert summary["analysis_errors"] == []
    # with every analysis on, each one wrote its columns (some with values) and keys
    for analysis in ANALYSES:
        cols, keys = names_of(analysis)
        assert baseline.patches[cols].notna().any().any(), analysis
        assert all(k in baseline.summary for k in keys)


@pytest.mark.parametrize("analysis", list(ANALYSES))
def test_a_failing_analysis_keeps_the_run(grid_file, baseline, monkeypatch, analysis):
    function, words, _, _ = ANALYSES[analysis]
    fail_with(monkeypatch, function, RuntimeError("forced failure\nwith a second line"))
    with pytest.warns(TrophoscapeWarning) as record:
        result = ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))
    assert result.summary["analysis_errors"] == [
        {"analysis": analysis, "reason": "RuntimeError: forced failure"}]
    messages = [str(w.message) for w in record if issubclass(w.category, TrophoscapeWarning)]
    assert messages == [
        f"{words} failed (RuntimeError: forced failure); the other results are written and "
        "its columns and figures are left empty; "
        + ("please report it with the scenario" if analysis in ("persistence", "synchrony")
           else f"set [analysis] {analysis} = false to skip it")]
    # consistency test: the same columns in the same order, and the same summary keys,
    # as when nothing fails
    assert list(result.patches.columns) == list(baseline.patches.columns)
    assert result.summary.keys() == baseline.summary.keys()
    cols, keys = names_of(analysis)
    assert result.patches[cols].isna().all().all()
    for k in keys:
        value = result.summary[k]
        assert value is None or math.isnan(value), k
    # everything else is exactly what the run gives when nothing fails (deterministic run)
    rest = [c for c in baseline.patches.columns if c not in cols]
    pd.testing.assert_frame_equal(result.patches[rest], baseline.patches[rest])
    for k in baseline.summary:
        if k not in keys and k != "analysis_errors":
            assert same(result.summary[k], baseline.summary[k]), k


def test_two_failures_are_both_recorded(grid_file, monkeypatch):
    fail_with(monkeypatch, "stability_analysis", ValueError("no good"))
    fail_with(monkeypatch, "capacity_analysis",
              scipy.sparse.linalg.ArpackNoConvergence("ARPACK error -1: No convergence",
                                                      np.zeros(0), np.zeros((0, 0))))
    with pytest.warns(TrophoscapeWarning) as record:
        result = ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))
    assert result.summary["analysis_errors"] == [
        {"analysis": "stability", "reason": "ValueError: no good"},
        {"analysis": "capacity", "reason": "ARPACK did not converge"}]
    assert len(record) == 2


def test_interrupts_are_not_swallowed(grid_file, monkeypatch):
    fail_with(monkeypatch, "capacity_analysis", KeyboardInterrupt())
    with pytest.raises(KeyboardInterrupt):
        ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))


def test_cli_run_exits_0_and_writes_the_failure(grid_file, tmp_path, monkeypatch, capsys):
    scenario = tmp_path / "s.toml"
    scenario.write_text(f'name = "Guarded"\n[patches]\npath = "{grid_file.as_posix()}"\n'
                        'id_field = "patch_id"\n[run]\nduration = 6.0\nburn_in = 2.0\n'
                        "[analysis]\nstability = true\ncapacity = true\n", encoding="utf-8")
    fail_with(monkeypatch, "capacity_analysis",
              scipy.sparse.linalg.ArpackNoConvergence("ARPACK error -1: No convergence",
                                                      np.zeros(0), np.zeros((0, 0))))
    # cli.main installs its own warning printer ("warning: ..." on stderr), which
    # pytest.warns cannot record through; catch_warnings lets the warning through the
    # test-wide error filter and puts the printer back afterwards
    with warnings.catch_warnings():
        warnings.simplefilter("always", TrophoscapeWarning)
        code = cli_main(["run", str(scenario), "--out", str(tmp_path / "out"), "--quiet"])
    assert code == 0
    err = capsys.readouterr().err.splitlines()
    assert ("warning: metapopulation capacity failed (ARPACK did not converge); the other "
            "results are written and its columns and figures are left empty; set [analysis] "
            "capacity = false to skip it") in err
    out = tmp_path / "out"
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["analysis_errors"] == [{"analysis": "capacity",
                                           "reason": "ARPACK did not converge"}]
    assert summary["prey_metapopulation_capacity"] is None
    assert summary["stability"] in STABILITY_LABELS
    table = pd.read_csv(out / "patches.csv", index_col="patch_id")
    assert table["prey_capacity_share"].isna().all() and table["prey_capacity_drop"].isna().all()
    assert table["prey_persists"].notna().all() and table["prey_equilibrium"].notna().all()
    report = (out / "report.html").read_text(encoding="utf-8")
    head = report.split("<h2>Persistence</h2>")[0]  # the box sits with the headline results
    assert "1 analysis(es) failed." in head
    assert "<strong>metapopulation capacity</strong>: ARPACK did not converge" in head
    assert not (out / "maps" / "prey_capacity_share.png").exists()  # no empty map


# ------------------------------------------------------------------ hard but valid networks
def test_400_patch_chain_with_a_links_table(tmp_path):
    # the reported case: 400 identical squares in a row, a links table joining neighbours,
    # a logistic prey invading from the west end. Every analysis runs; λ_M (Hanski &
    # Ovaskainen 2000, Nature 404:755) matches scipy.linalg.eigh of
    # M_ij = exp(-d_ij/L) A_i A_j over the linked pairs, written out here
    land = chain_landscape(400, spacing_km=2.0, size_km=1.0)
    frame = land.frame.copy()
    frame["prey_start"] = np.where(np.arange(400) < 5, 40.0, 0.0)
    frame["predator_start"] = np.where(np.arange(400) < 5, 2.0, 0.0)
    frame.to_file(tmp_path / "chain.gpkg", driver="GPKG", engine="pyogrio")
    ids = list(land.ids)
    pd.DataFrame({"source": ids[:-1], "target": ids[1:], "weight": 1.0}).to_csv(
        tmp_path / "links.csv", index=False)
    sc = parse_scenario({
        "patches": {"path": "chain.gpkg", "id_field": "patch_id"},
        "prey": {"growth": "logistic", "initial_density": {"field": "prey_start"}},
        "predator": {"initial_density": {"field": "predator_start"}},
        "dispersal": {"kernel": "none", "links": "links.csv"},
        "run": {"duration": 4.0, "burn_in": 1.0, "census_interval": 0.5},
        "analysis": ON}, base_dir=tmp_path)
    study = ts.build_study(sc)
    result = ts.run_study(study)  # a project warning would fail the test (pyproject)
    s = result.summary
    assert s["analysis_errors"] == []
    assert s["stability"] in STABILITY_LABELS and s["stability_details"]["equilibrium_found"]
    net = study.network
    first = net.source < net.target
    assert first.sum() == 399
    for species in ("prey", "predator"):
        scale = sc[f"{species}.kernel_scale_km"]  # one value for every patch here
        m = np.zeros((400, 400))
        for i, j, d in zip(net.source[first], net.target[first], net.distance_km[first]):
            m[i, j] = m[j, i] = np.exp(-d / scale) * land.area_km2[i] * land.area_km2[j]
        values, vectors = scipy.linalg.eigh(m)
        assert s[f"{species}_metapopulation_capacity"] == pytest.approx(values[-1], rel=1e-10)
        np.testing.assert_allclose(result.patches[f"{species}_capacity_share"],
                                   vectors[:, -1] ** 2, atol=1e-10)
    assert result.patches["prey_capacity_drop"].notna().all()


def test_an_empty_unlinked_group_runs_every_analysis(tmp_path):
    # a grid where patches 8-11 have no links and start with no population at all
    land = grid_landscape(3, 4, spacing_km=2.0, size_km=1.0)
    frame = land.frame.copy()
    empty = np.arange(12) >= 8
    frame["prey_start"] = np.where(empty, 0.0, 40.0)
    frame["predator_start"] = np.where(empty, 0.0, 2.0)
    frame.to_file(tmp_path / "grid.gpkg", driver="GPKG", engine="pyogrio")
    ids = list(land.ids)
    pd.DataFrame({"source": ids[:7], "target": ids[1:8], "weight": 1.0}).to_csv(
        tmp_path / "links.csv", index=False)
    sc = parse_scenario({
        "patches": {"path": "grid.gpkg", "id_field": "patch_id"},
        "prey": {"initial_density": {"field": "prey_start"}},
        "predator": {"initial_density": {"field": "predator_start"}},
        "dispersal": {"kernel": "none", "links": "links.csv"},
        "run": {"duration": 6.0, "burn_in": 2.0, "census_interval": 0.5},
        "analysis": ON}, base_dir=tmp_path)
    result = ts.run_study(ts.build_study(sc))
    assert result.summary["analysis_errors"] == []
    table = result.patches
    assert not table["prey_persists"][empty].any()  # nothing ever arrives there
    # unlinked patches carry no share of λ_M and lose none of it (Perron–Frobenius)
    assert np.all(table["prey_capacity_share"][empty] == 0)
    assert np.all(table["prey_capacity_drop"][empty] == 0)
    assert table["prey_capacity_share"][~empty].sum() == pytest.approx(1.0)
    assert result.summary["stability"] in STABILITY_LABELS


def test_failing_persistence_with_replicates_keeps_the_replicate_columns(grid_file, monkeypatch):
    # consistency test: with replicates persistence has three more columns per species
    # and two more summary keys; a failure leaves the same ones
    def study():
        return grid_study(grid_file, duration=4.0, run={"replicates": 2},
                          noise={"environmental_sd": 0.1})

    base = ts.run_study(study())
    assert "prey_persistence_share" in base.patches.columns
    fail_with(monkeypatch, "persistence_table", RuntimeError("forced failure"))
    with pytest.warns(TrophoscapeWarning, match="^the persistence analysis failed"):
        result = ts.run_study(study())
    assert list(result.patches.columns) == list(base.patches.columns)
    assert result.summary.keys() == base.summary.keys()
    assert result.patches["prey_persistence_share"].isna().all()
    assert math.isnan(result.summary["prey_regional_survival_low"])


@pytest.fixture(params=["process", "thread"])
def stability_beside(monkeypatch, request):
    """The stability analysis beside the others from the first patch on, in a second
    process (where one can be forked) or on a second thread; counts the ones started."""
    study_module = trophoscape.workflows.study
    monkeypatch.setattr(study_module, "STABILITY_BESIDE_MIN_PATCHES", 1)
    if request.param == "thread":
        monkeypatch.setattr(study_module, "second_process_possible", lambda: False)
    elif not study_module.second_process_possible():
        pytest.skip("no second process here (Linux with two cores only)")
    return count_calls(monkeypatch, study_module,
                       "InSecondProcess" if request.param == "process" else "_Beside")


def test_stability_beside_the_others_gives_the_same_results(grid_file, baseline,
                                                             stability_beside):
    # consistency test: the same table, columns in the same order, and the same summary
    result = ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))
    assert stability_beside == [1]
    pd.testing.assert_frame_equal(result.patches, baseline.patches)
    assert same(result.summary, baseline.summary)


def test_stability_failing_beside_the_others_is_recorded_the_same(grid_file, baseline,
                                                                   stability_beside,
                                                                   monkeypatch):
    fail_with(monkeypatch, "stability_analysis", RuntimeError("forced failure"))
    with pytest.warns(TrophoscapeWarning, match="the stability analysis failed"):
        result = ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))
    assert stability_beside == [1]
    assert result.summary["analysis_errors"] == [
        {"analysis": "stability", "reason": "RuntimeError: forced failure"}]
    assert list(result.patches.columns) == list(baseline.patches.columns)
    assert result.patches[["prey_equilibrium", "predator_equilibrium"]].isna().all().all()
    # an interrupt there is raised here, not swallowed
    fail_with(monkeypatch, "stability_analysis", KeyboardInterrupt())
    with pytest.raises(KeyboardInterrupt):
        ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))


def test_an_interrupt_here_stops_the_stability_analysis_beside(grid_file, stability_beside,
                                                                monkeypatch):
    # Ctrl-C during synchrony must not wait for the stability analysis beside, and must not
    # leave its process behind (a thread, a daemon, is left to finish on its own)
    import multiprocessing
    import time

    monkeypatch.setattr(trophoscape.workflows.study, "stability_analysis",
                        lambda system: time.sleep(120))
    fail_with(monkeypatch, "synchrony_analysis", KeyboardInterrupt())
    t0 = time.perf_counter()
    with pytest.raises(KeyboardInterrupt):
        ts.run_study(grid_study(grid_file, duration=6.0, analysis=ON))
    assert time.perf_counter() - t0 < 60
    assert stability_beside == [1]
    assert multiprocessing.active_children() == []
