"""Fitting to survey counts, first part: the counts table and its bad input."""

from __future__ import annotations

import geopandas
import numpy as np
import pytest
import shapely

from trophoscape.errors import InputError
from trophoscape.workflows.fitting import read_counts

X0, Y0 = 500_000.0, 5_000_000.0


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    from trophoscape.workflows.study import load_study

    folder = tmp_path_factory.mktemp("counts")
    boxes = [shapely.box(X0 + k * 2000, Y0, X0 + k * 2000 + 1000, Y0 + 1000) for k in range(3)]
    geopandas.GeoDataFrame({"patch_id": ["W1", "W2", "W3"]}, geometry=boxes,
                           crs=32632).to_file(folder / "p.gpkg", driver="GPKG",
                                              engine="pyogrio")
    (folder / "s.toml").write_text('[patches]\npath = "p.gpkg"\nid_field = "patch_id"\n'
                                   '[run]\nduration = 20\nburn_in = 5\n', encoding="utf-8")
    return load_study(folder / "s.toml")


def write(tmp_path, text, name="counts.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_a_counts_table_is_read_in_its_order(tmp_path, study):
    path = write(tmp_path, "patch_id,time,species,count\nW2,0,prey,120\nW1,5.5,predator,3\n"
                           "W3,20,prey,0.5\n")
    counts = read_counts(path, study)
    assert counts.n == 3
    assert counts.patch.tolist() == [1, 0, 2] and counts.species.tolist() == [0, 1, 0]
    np.testing.assert_array_equal(counts.time, [0.0, 5.5, 20.0])
    np.testing.assert_array_equal(counts.count, [120.0, 3.0, 0.5])
    # columns in another order and extra columns are fine
    other = write(tmp_path, "count,note,species,time,patch_id\n7,x,predator,1,W1\n", "o.csv")
    assert read_counts(other, study).count.tolist() == [7.0]


@pytest.mark.parametrize("body, observation, words, field, row", [
    ("W9,1,prey,3", "lognormal", "unknown patch 'W9'", "patch_id", 0),
    ("W1,1,deer,3", "lognormal", "'deer' is not a species", "species", 0),
    ("W1,soon,prey,3", "lognormal", "'soon' is not a finite number", "time", 0),
    ("W1,1,prey,many", "lognormal", "'many' is not a finite number", "count", 0),
    ("W1,25,prey,3", "lognormal", "time 25 is outside the run (0 to 20)", "time", 0),
    ("W1,1,prey,-2", "poisson", "count -2 is negative", "count", 0),
    ("W1,1,prey,2.5", "poisson", "not a whole number, which the poisson model needs",
     "count", 0),
    ("W1,1,prey,0", "lognormal", "a count of 0 has no density under the lognormal", "count", 0),
])
def test_bad_counts_are_refused_naming_row_and_column(tmp_path, study, body, observation,
                                                      words, field, row):
    path = write(tmp_path, "patch_id,time,species,count\nW2,0,prey,4\n" + body + "\n")
    with pytest.raises(InputError) as info:
        read_counts(path, study, observation=observation)
    text = str(info.value)
    assert "\n" not in text and str(path) in text and words in text
    assert f"feature {row + 1}" in text and f"'{field}'" in text


def test_a_count_given_twice_and_missing_columns(tmp_path, study):
    path = write(tmp_path, "patch_id,time,species,count\nW1,2,prey,4\nW2,2,prey,4\n"
                           "W1,2,prey,5\n")
    with pytest.raises(InputError, match="again \\(also row 0\\)") as info:
        read_counts(path, study)
    assert "feature 2" in str(info.value)
    with pytest.raises(InputError, match="no 'count' column \\('counts' is close\\)"):
        read_counts(write(tmp_path, "patch_id,time,species,counts\nW1,1,prey,2\n", "m.csv"),
                    study)
    with pytest.raises(InputError, match="the file is empty"):
        read_counts(write(tmp_path, "\n", "e.csv"), study)


def test_expected_counts_do_not_depend_on_the_census_interval(tmp_path, study):
    # consistency test across a numerical setting: counts at times off the census grid
    # (1.25, 3.7) get the abundance the run has then, whatever the census interval; and at
    # a census time, the value a census run records there
    from trophoscape.integrate.ode import RunSettings, simulate
    from trophoscape.workflows.fitting import expected_counts

    path = write(tmp_path, "patch_id,time,species,count\nW1,1.25,prey,10\nW2,3.7,predator,2\n"
                           "W3,3,prey,5\n")
    counts = read_counts(path, study)
    from dataclasses import replace

    got = [expected_counts(replace(study, scenario=study.scenario.with_values(
        run__census_interval=c)), counts, detection=0.5) for c in (0.5, 2.0)]
    np.testing.assert_array_equal(got[0], got[1])
    fine = simulate(study.system, study.initial_state,
                    **RunSettings.from_scenario(study.scenario).options(
                        duration=4.0, census_interval=0.05, dtype=np.float64))
    t = fine.time
    want = [fine["prey"].values[np.argmin(abs(t - 1.25)), 0],
            fine["predator"].values[np.argmin(abs(t - 3.7)), 1],
            fine["prey"].values[np.argmin(abs(t - 3.0)), 2]]
    np.testing.assert_allclose(got[0], 0.5 * np.asarray(want), rtol=1e-4)


def test_reassembled_rates_give_the_system_a_rebuild_gives(study):
    # consistency test: changing rates on the kept landscape and network gives the same
    # right-hand side as building the changed scenario from its files
    from trophoscape.workflows.fitting import with_rates
    from trophoscape.workflows.study import build_study

    changes = {"prey.growth_rate": 1.7, "predator.emigration_rate": 0.3}
    quick = with_rates(study, changes)
    full = build_study(study.scenario.with_values(prey__growth_rate=1.7,
                                                  predator__emigration_rate=0.3))
    y = np.linspace(1.0, 50.0, 2 * study.landscape.n_patches)
    np.testing.assert_array_equal(quick.system.rhs_function()(0.0, y),
                                  full.system.rhs_function()(0.0, y))
    with pytest.raises(InputError, match="shapes the patches or the network"):
        with_rates(study, {"dispersal.max_distance_km": 3.0})


def test_the_log_likelihood_sums_the_observation_densities(tmp_path, study):
    # the Poisson log-likelihood of the counts is scipy's log pmf summed at the expected
    # counts (scipy.stats as the outside reference for the densities)
    from scipy import stats

    from trophoscape.workflows.fitting import expected_counts, log_likelihood

    path = write(tmp_path, "patch_id,time,species,count\nW1,1,prey,40\nW2,2,predator,3\n"
                           "W3,4,prey,0\n")
    counts = read_counts(path, study, observation="poisson")
    mu = expected_counts(study, counts, detection=0.8)
    ll = log_likelihood(study, counts, observation="poisson", detection=0.8)
    assert ll == pytest.approx(float(np.sum(stats.poisson.logpmf(counts.count, mu))),
                               rel=1e-10)
    # a different growth rate gives another likelihood: the changes reach the run
    other = log_likelihood(study, counts, observation="poisson", detection=0.8,
                           changes={"prey.growth_rate": 2.5})
    assert other != ll


CYCLING = """[patches]
path = "p.gpkg"
id_field = "patch_id"
[prey]
growth_rate = 0.7
capacity_density = 300.0
initial_density = 100.0
kernel_scale_km = 1.0
emigration_rate = 0.1
[predator]
mortality_rate = 0.4
conversion = 0.3
initial_density = 10.0
kernel_scale_km = 2.0
emigration_rate = 0.05
[predation]
attack_rate = 0.07
handling_time = 0.1
[run]
duration = 20
burn_in = 5
"""


def test_a_fit_recovers_the_rates_counts_were_drawn_from(tmp_path):
    # recovery (common practice for checking an estimator): four linked patches whose prey
    # and predators cycle (N* = 30.8 per km², K = 300); Poisson counts drawn at yearly
    # surveys from a run with known rates (growth 1.0, attack 0.05); the fit starts from
    # the scenario's guesses (0.7, 0.07) and comes back within 15 %, with AIC 2k - 2 log L
    from trophoscape.workflows.fitting import Counts, expected_counts, fit_counts, with_rates
    from trophoscape.workflows.study import load_study

    boxes = [shapely.box(X0 + k * 2000, Y0, X0 + k * 2000 + 1000, Y0 + 1000) for k in range(4)]
    geopandas.GeoDataFrame({"patch_id": ["W1", "W2", "W3", "W4"]}, geometry=boxes,
                           crs=32632).to_file(tmp_path / "p.gpkg", driver="GPKG",
                                              engine="pyogrio")
    (tmp_path / "s.toml").write_text(CYCLING, encoding="utf-8")
    study = load_study(tmp_path / "s.toml")
    truth = {"prey.growth_rate": 1.0, "predation.attack_rate": 0.05}
    grid = [(p, t, s) for p in range(4) for t in np.arange(1.0, 21.0) for s in (0, 1)]
    patch, time, species = (np.array(v) for v in zip(*grid))
    frame = Counts(patch=patch.astype(np.int64), time=time.astype(float),
                   species=species.astype(np.int64), count=np.zeros(len(grid)))
    mean = expected_counts(with_rates(study, truth), frame)
    drawn = np.random.default_rng(7).poisson(mean).astype(float)
    counts = Counts(patch=frame.patch, time=frame.time, species=frame.species, count=drawn)
    fit = fit_counts(study, counts, list(truth), observation="poisson", starts=2)
    for key, value in truth.items():
        assert fit.estimates[key] == pytest.approx(value, rel=0.15), key
    assert fit.aic == pytest.approx(2 * 2 - 2 * fit.log_likelihood)
    assert fit.converged and fit.evaluations > 10 and fit.agreeing >= 1


def test_the_fit_section_of_a_scenario(tmp_path):
    # the [fit] keys are checked when the scenario is read (consistency test of the checks)
    from trophoscape.scenario import parse_scenario

    raw = {"patches": {"path": "p.gpkg"},
           "fit": {"estimate": ["prey.growth_rate", "predation.attack_rate"],
                   "observation": "negative_binomial", "detection": 0.6,
                   "bounds": {"prey.growth_rate": [0.1, 5.0]}}}
    sc = parse_scenario(raw)
    assert sc["fit.estimate"] == ["prey.growth_rate", "predation.attack_rate"]
    assert sc["fit.bounds"] == {"prey.growth_rate": [0.1, 5.0]}
    assert sc.with_values(prey__growth_rate=2.0)["fit.bounds"] == sc["fit.bounds"]
    for fit, words in (
            ({"estimate": ["predation.atack_rate"]}, "did you mean 'predation.attack_rate'"),
            ({"estimate": ["prey.growth"]}, "is not a number, so it cannot be estimated"),
            ({"estimate": "prey.growth_rate"}, "is not a list"),
            ({"estimate": ["prey.growth_rate", "prey.growth_rate"]}, "named twice"),
            ({"bounds": {"prey.growth_rate": [5.0, 1.0]}}, "give [low, high] with 0 < low"),
            ({"detection": 0.0}, "fit.detection"),
            ({"observation": "gamma"}, "fit.observation")):
        with pytest.raises(InputError) as info:
            parse_scenario({"patches": {"path": "p.gpkg"}, "fit": fit})
        assert words in str(info.value)


def test_expected_counts_do_not_depend_on_tolerances_or_solver(tmp_path, study):
    # consistency test across numerical settings: the expected counts at tighter
    # tolerances, or from another explicit solver, agree to the tolerance's order (and to
    # a millionth of an individual where a trickle of immigrants holds a few 1e-8)
    from dataclasses import replace

    from trophoscape.workflows.fitting import expected_counts

    path = write(tmp_path, "patch_id,time,species,count\nW1,1.25,prey,10\nW2,3.7,predator,2\n"
                           "W3,3,prey,5\n")
    counts = read_counts(path, study)
    base = expected_counts(study, counts)
    for changes in ({"run__rtol": 1e-9, "run__atol": 1e-11}, {"run__method": "DOP853"}):
        other = expected_counts(replace(study, scenario=study.scenario.with_values(**changes)),
                                counts)
        np.testing.assert_allclose(other, base, rtol=1e-4, atol=1e-6)
