"""The Python API: building a study from a scenario, solver choices, the initial state."""

import subprocess
import sys

import numpy as np
import pytest

import trophoscape as ts
from trophoscape.model.dynamics import interior_equilibrium
from trophoscape.errors import InputError
from trophoscape.scenario import parse_scenario
from trophoscape.testing import grid_landscape


@pytest.fixture
def grid_file(tmp_path):
    land = grid_landscape(3, 4, spacing_km=2.0, size_km=1.0)
    frame = land.frame.copy()
    frame["quality"] = np.linspace(0.5, 1.5, land.n_patches)
    frame["r_local"] = np.linspace(0.8, 1.2, land.n_patches)
    path = tmp_path / "grid.gpkg"
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    return path


def scenario(path, **sections):
    raw = {"patches": {"path": str(path), "id_field": "patch_id", "quality_field": "quality"},
           "run": {"duration": 20.0, "burn_in": 5.0, "census_interval": 0.5}}
    for k, v in sections.items():
        raw.setdefault(k, {}).update(v)
    return parse_scenario(raw, base_dir=path.parent)


def test_import_is_light():
    # `import trophoscape` must not pull in matplotlib, geopandas or numba (STYLE.md habit 8)
    code = ("import sys, trophoscape, trophoscape.model.system; "
            "print(sorted(m for m in ('matplotlib', 'geopandas', 'numba') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "[]"


def test_per_patch_parameters_and_quality(grid_file):
    study = ts.build_study(scenario(grid_file, prey={"growth_rate": {"field": "r_local"}}))
    p = study.model.params
    np.testing.assert_allclose(p["growth_rate"], np.linspace(0.8, 1.2, 12))
    np.testing.assert_allclose(p["capacity"], 50.0 * np.linspace(0.5, 1.5, 12))
    # initial state is density × area, in individuals
    np.testing.assert_allclose(study.initial_state[:12], 40.0 * study.landscape.area_km2)


def test_equilibrium_start_stays_put_without_dispersal(grid_file):
    # starting at the closed-form Rosenzweig–MacArthur equilibrium of each patch (below the
    # Hopf threshold), isolated patches stay there (Rosenzweig & MacArthur 1963, from memory)
    sc = scenario(grid_file, prey={"initial_density": "equilibrium", "capacity_density": 5.0,
                                   "emigration_rate": 0.0},
                  predator={"initial_density": "equilibrium", "emigration_rate": 0.0},
                  run={"extinction_abundance": 0.0, "rtol": 1e-10, "atol": 1e-12})
    study = ts.build_study(sc)
    n_star, p_star = interior_equilibrium(study.model)
    assert np.all(np.isfinite(n_star))
    result = ts.run_study(study)
    area = study.landscape.area_km2
    np.testing.assert_allclose(result.trajectory["prey"].values[-1], n_star * area, rtol=1e-6)
    np.testing.assert_allclose(result.trajectory["predator"].values[-1], p_star * area,
                               rtol=1e-6)


@pytest.mark.parametrize("method", ["BDF", "Radau", "LSODA", "DOP853"])
def test_methods_agree_with_rk45(grid_file, method):
    # implicit methods get the sparse analytic Jacobian; all solvers agree within tolerance
    base = scenario(grid_file, run={"rtol": 1e-8, "atol": 1e-8, "extinction_abundance": 0.0})
    ref = ts.run_study(ts.build_study(base)).trajectory
    other = ts.run_study(ts.build_study(base.with_values(run__method=method))).trajectory
    assert other.stats.method == method
    if method in ("BDF", "Radau"):
        assert other.stats.njev > 0
    np.testing.assert_allclose(other["prey"].values, ref["prey"].values, rtol=1e-4, atol=1e-4)


def test_zero_quality_is_a_clear_error(grid_file, tmp_path):
    import geopandas as gpd

    frame = gpd.read_file(grid_file)
    frame.loc[3, "quality"] = 0.0
    path = tmp_path / "zero.gpkg"
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    with pytest.raises(InputError) as info:
        ts.build_study(scenario(path))
    assert str(info.value) == (
        f"{path}: feature '{frame.loc[3, 'patch_id']}': field 'quality': carrying capacity is "
        "zero (quality 0); give the patch a quality > 0 or remove it")


def test_failed_solve_is_a_run_error(grid_file):
    # explosive exponential growth with no predator overflows: a RunError, not a traceback
    sc = scenario(grid_file, prey={"growth": "exponential", "growth_rate": 400.0},
                  predator={"initial_density": 0.0}, run={"duration": 20.0})
    with pytest.raises(ts.RunError, match="non-finite|failed|explosive growth"):
        ts.run_study(ts.build_study(sc))
