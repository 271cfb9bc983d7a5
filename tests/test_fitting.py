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
    with pytest.raises(InputError, match="again \\(as feature 0\\)") as info:
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


# ------------------------------------------------------------------ helpers for whole fits


def four_patches(folder, text=CYCLING):
    """The four linked cycling patches of CYCLING (or ``text``), written into ``folder``;
    the study."""
    from trophoscape.workflows.study import load_study

    folder.mkdir(parents=True, exist_ok=True)
    boxes = [shapely.box(X0 + k * 2000, Y0, X0 + k * 2000 + 1000, Y0 + 1000) for k in range(4)]
    geopandas.GeoDataFrame({"patch_id": ["W1", "W2", "W3", "W4"]}, geometry=boxes,
                           crs=32632).to_file(folder / "p.gpkg", driver="GPKG",
                                              engine="pyogrio")
    (folder / "s.toml").write_text(text, encoding="utf-8")
    return load_study(folder / "s.toml")


def drawn_counts(study, truth, seed, observation="poisson", sd=0.2):
    """Yearly counts of both species in every patch, t = 1 … 20, drawn around a run of the
    study with ``truth`` in place (the runs a fit searches: no removals)."""
    from trophoscape.workflows.fitting import Counts, expected_counts, searched_study

    n = study.landscape.n_patches
    p, t, s = np.meshgrid(np.arange(n), np.arange(1.0, 21.0), [0, 1], indexing="ij")
    frame = Counts(patch=p.ravel(), time=t.ravel(), species=s.ravel(),
                   count=np.zeros(p.size))
    mean = expected_counts(searched_study(study, truth), frame)
    rng = np.random.default_rng(seed)
    count = (rng.poisson(mean).astype(float) if observation == "poisson"
             else mean * np.exp(rng.normal(0.0, sd, mean.size)))
    return Counts(patch=frame.patch, time=frame.time, species=frame.species, count=count)


def write_counts(path, study, counts):
    ids = np.asarray(study.ids, dtype=str)
    names = np.where(counts.species == 1, "predator", "prey")
    rows = [f"{ids[p]},{t:g},{s},{c:.17g}" for p, t, s, c in
            zip(counts.patch, counts.time, names, counts.count)]
    path.write_text("patch_id,time,species,count\n" + "\n".join(rows) + "\n", encoding="utf-8")
    return path


TRUTH = {"prey.growth_rate": 1.0, "predation.attack_rate": 0.05}


def test_fit_command_writes_its_folder_and_the_fitted_scenario_is_accepted(tmp_path):
    # the whole command: estimates.csv, fitted.toml, summary.json, figures and report; the
    # log-likelihood in summary.json is scipy.stats' negative-binomial log pmf summed at the
    # fitted counts (outside reference); AIC is 2k - 2 log L with k counting the two
    # dispersions; fitted.toml, written into another folder, is accepted by check, run and
    # corridors and holds the estimates
    import json
    import tomllib

    import pandas as pd
    from scipy import stats

    from trophoscape.cli import main
    from trophoscape.workflows.study import load_study

    study = four_patches(tmp_path / "inputs")
    counts = drawn_counts(study, TRUTH, seed=3)
    counts_path = write_counts(tmp_path / "inputs" / "counts.csv", study, counts)
    scenario = tmp_path / "inputs" / "s.toml"
    scenario.write_text(CYCLING + '[fit]\nestimate = ["prey.growth_rate", '
                        '"predation.attack_rate"]\nobservation = "negative_binomial"\n'
                        "starts = 2\n[[shock]]\nkind = \"predator_removal\"\nat = 15.0\n"
                        'patches = ["W1"]\nshare = 0.5\n', encoding="utf-8")
    out = tmp_path / "results" / "fit"
    assert main(["fit", str(scenario), "--counts", str(counts_path), "--out", str(out),
                 "--quiet"]) == 0
    for name in ("estimates.csv", "fitted.toml", "summary.json", "fitted_counts.csv",
                 "report.html", "figures/fit_patches.png", "figures/fit_scatter.png",
                 "figures/fit_profiles.png"):
        assert (out / name).is_file(), name
    est = pd.read_csv(out / "estimates.csv")
    assert list(est.columns[:4]) == ["parameter", "estimate", "low", "high"]
    assert list(est["parameter"]) == list(TRUTH)
    assert est["lower_bound"].tolist() == pytest.approx([v / 100 for v in (0.7, 0.07)])
    assert est["upper_bound"].tolist() == pytest.approx([v * 100 for v in (0.7, 0.07)])
    assert (est["low"] < est["estimate"]).all() and (est["estimate"] < est["high"]).all()
    summary = json.loads((out / "summary.json").read_text())
    fitted = pd.read_csv(out / "fitted_counts.csv")
    k = np.where(fitted["species"] == "predator", summary["dispersion_predator"],
                 summary["dispersion_prey"])
    mu = fitted["expected"].to_numpy()
    want = stats.nbinom.logpmf(fitted["count"], k, k / (k + mu)).sum()
    assert summary["log_likelihood"] == pytest.approx(want, rel=1e-9)
    assert summary["quantities_estimated"] == 4
    assert summary["aic"] == pytest.approx(2 * 4 - 2 * summary["log_likelihood"])
    assert summary["starts"] == 2 and 1 <= summary["starts_agreeing"] <= 2
    assert summary["model_runs"] > 10 and isinstance(summary["converged"], bool)
    # fitted.toml: paths resolve from its folder, estimates in place, [fit] and shocks kept
    raw = tomllib.loads((out / "fitted.toml").read_text())
    assert raw["patches"]["path"] == "../../inputs/p.gpkg"
    assert raw["fit"]["observation"] == "negative_binomial" and raw["shock"][0]["at"] == 15.0
    again = load_study(out / "fitted.toml")
    for _, row in est.iterrows():
        assert again.scenario[row["parameter"]] == pytest.approx(row["estimate"], rel=1e-15)
    assert main(["check", str(out / "fitted.toml")]) == 0
    assert main(["run", str(out / "fitted.toml"), "--out", str(tmp_path / "run"), "--no-maps",
                 "--quiet"]) == 0
    line = geopandas.GeoDataFrame(
        {"corridor_id": ["K1"], "cost": [1.0]},
        geometry=[shapely.LineString([(X0 + 1000, Y0 + 500), (X0 + 2000, Y0 + 500)])],
        crs=32632)
    line.to_file(tmp_path / "k.gpkg", driver="GPKG", engine="pyogrio")
    assert main(["corridors", str(out / "fitted.toml"), "--candidates",
                 str(tmp_path / "k.gpkg"), "--budget", "5", "--out",
                 str(tmp_path / "plan"), "--no-maps", "--quiet", "--workers", "1"]) == 0


def test_a_fit_does_not_depend_on_numerical_settings(tmp_path):
    # consistency test across settings that must not matter: the number of processes
    # (identical), the census interval (identical: counts are read at their own times),
    # the order of the patches in the patch file, and tighter tolerances or another solver
    # (within 1e-3)
    from dataclasses import replace

    from trophoscape.workflows.fitting import Counts, fit_counts
    from trophoscape.workflows.study import load_study

    study = four_patches(tmp_path / "a")
    counts = drawn_counts(study, TRUTH, seed=5)

    def fit(s, c=counts, **kw):
        return fit_counts(s, c, list(TRUTH), observation="poisson", starts=1,
                          intervals=False, **kw).estimates

    base = fit(study, workers=1)
    assert fit(study, workers=2) == base
    coarse = replace(study, scenario=study.scenario.with_values(run__census_interval=2.0))
    assert fit(coarse, workers=1) == base
    for changes in ({"run__rtol": 1e-7, "run__atol": 1e-9}, {"run__method": "DOP853"}):
        other = replace(study, scenario=study.scenario.with_values(**changes))
        for key, value in fit(other, workers=1).items():
            assert value == pytest.approx(base[key], rel=1e-3), (changes, key)
    # the profile intervals too: identical with one or two workers, close at tighter
    # tolerances
    def ends(s, workers):
        f = fit_counts(s, counts, list(TRUTH), observation="poisson", starts=1,
                       workers=workers)
        return [f.low[k] for k in TRUTH] + [f.high[k] for k in TRUTH]

    one = ends(study, 1)
    assert ends(study, 2) == one
    tight = replace(study, scenario=study.scenario.with_values(run__rtol=1e-7, run__atol=1e-9))
    assert ends(tight, 1) == pytest.approx(one, rel=1e-3)
    # the same patches in reverse order: the counts follow their ids
    folder = tmp_path / "b"
    folder.mkdir()
    frame = geopandas.read_file(tmp_path / "a" / "p.gpkg").iloc[::-1]
    frame.to_file(folder / "p.gpkg", driver="GPKG", engine="pyogrio")
    (folder / "s.toml").write_text(CYCLING, encoding="utf-8")
    flipped = load_study(folder / "s.toml")
    where = {pid: k for k, pid in enumerate(flipped.ids)}
    moved = Counts(patch=np.array([where[study.ids[p]] for p in counts.patch]),
                   time=counts.time, species=counts.species, count=counts.count)
    for key, value in fit(flipped, moved, workers=1).items():
        assert value == pytest.approx(base[key], rel=1e-4), key


# Hudson's Bay Company pelts (thousands), 1900-1920, as tabulated by Howard (2009, "Modeling
# Basics", Texas A&M University) and used by Carpenter (2018), "Predator-Prey Population
# Dynamics: the Lotka-Volterra model in Stan" (Stan case study, 28 January 2018).
HARE = [30.0, 47.2, 70.2, 77.4, 36.3, 20.6, 18.1, 21.4, 22.0, 25.4, 27.1, 40.3, 57.0, 76.6,
        52.3, 19.5, 11.2, 7.6, 14.6, 16.2, 24.7]
LYNX = [4.0, 6.1, 9.8, 35.2, 59.4, 41.7, 19.0, 13.0, 8.3, 9.1, 7.4, 8.0, 12.3, 19.5, 45.7,
        51.1, 29.7, 15.8, 9.7, 10.1, 8.6]


def test_lotka_volterra_fit_to_the_lynx_hare_pelts_matches_the_published_example(tmp_path):
    # A published worked example on a classic open dataset: Carpenter (2018) fits
    # du/dt = (a - b v) u, dv/dt = (-g + d u) v to the pelts above, with lognormal errors of
    # one sd per species and the initial state estimated (counts at t = 0 included), and
    # reports posterior means a = 0.55, b = 0.028, g = 0.80, d = 0.024, sd 0.25 and 0.25,
    # and 80 % intervals a 0.47-0.63, b 0.023-0.033, g 0.69-0.91, d 0.020-0.029 and sd
    # 0.20-0.31. (The case study prints b's interval as "0.23-0.33" for a mean of 0.028,
    # and swaps the labels of g and d; read here as their means say.) Its priors are weak,
    # so the maximum likelihood lies inside each 80 % interval. In our terms: one patch of
    # 1 km², exponential prey growth (a), the lotka_volterra response (b = attack rate),
    # predator mortality (g) and conversion (d = conversion x attack rate).
    from trophoscape.workflows.fitting import fit_counts, read_counts
    from trophoscape.workflows.study import load_study

    geopandas.GeoDataFrame({"patch_id": ["region"]}, geometry=[shapely.box(X0, Y0, X0 + 1000,
                                                                            Y0 + 1000)],
                           crs=32632).to_file(tmp_path / "one.gpkg", driver="GPKG",
                                              engine="pyogrio")
    (tmp_path / "lv.toml").write_text(
        '[patches]\npath = "one.gpkg"\nid_field = "patch_id"\n'
        '[prey]\ngrowth = "exponential"\ngrowth_rate = 1.0\ninitial_density = 10.0\n'
        "[predator]\nmortality_rate = 1.0\nconversion = 1.0\ninitial_density = 10.0\n"
        '[predation]\nresponse = "lotka_volterra"\nattack_rate = 0.05\n'
        '[dispersal]\nkernel = "none"\n'
        "[run]\nduration = 20\nburn_in = 0\nextinction_abundance = 0.0\n", encoding="utf-8")
    rows = ([f"region,{t},prey,{v}" for t, v in enumerate(HARE)]
            + [f"region,{t},predator,{v}" for t, v in enumerate(LYNX)])
    path = tmp_path / "pelts.csv"
    path.write_text("patch_id,time,species,count\n" + "\n".join(rows) + "\n")
    study = load_study(tmp_path / "lv.toml")
    keys = ["prey.growth_rate", "predation.attack_rate", "predator.mortality_rate",
            "predator.conversion", "prey.initial_density", "predator.initial_density"]
    fit = fit_counts(study, read_counts(path, study), keys, observation="lognormal",
                     starts=2)
    e = fit.estimates
    assert 0.47 <= e["prey.growth_rate"] <= 0.63
    assert 0.023 <= e["predation.attack_rate"] <= 0.033
    assert 0.69 <= e["predator.mortality_rate"] <= 0.91
    assert 0.020 <= e["predator.conversion"] * e["predation.attack_rate"] <= 0.029
    assert 0.20 <= fit.extras["prey"] <= 0.31 and 0.20 <= fit.extras["predator"] <= 0.31
    # our 95 % profile intervals hold the published posterior means
    for key, mean in (("prey.growth_rate", 0.55), ("predation.attack_rate", 0.028),
                      ("predator.mortality_rate", 0.80)):
        assert fit.low[key] < mean < fit.high[key], key
    assert fit.aic == pytest.approx(2 * 8 - 2 * fit.log_likelihood)


def test_a_value_the_counts_do_not_determine_is_reported(tmp_path):
    # identifiability: the predator's emigration rate in patches without links (no one
    # leaves a patch without links, so the rate leaves no trace in the counts): its profile
    # stays flat to both bounds, and the fit says so; the growth rate is determined
    from trophoscape.workflows.fitting import Counts, fit_counts

    study = four_patches(tmp_path, CYCLING + '[dispersal]\nkernel = "none"\n')
    counts = drawn_counts(study, TRUTH, seed=2)
    keep = counts.species == 1
    only = Counts(patch=counts.patch[keep], time=counts.time[keep],
                  species=counts.species[keep], count=counts.count[keep])
    fit = fit_counts(study, only, ["prey.growth_rate", "predator.emigration_rate"],
                     observation="poisson", starts=1,
                     bounds={"predator.emigration_rate": [0.01, 0.2]})
    assert fit.open_ends["predator.emigration_rate"] == ["low", "high"]
    assert fit.low["predator.emigration_rate"] == pytest.approx(0.01)
    assert fit.high["predator.emigration_rate"] == pytest.approx(0.2)
    assert any("predator.emigration_rate is not identifiable" in w for w in fit.warnings)
    assert not fit.open_ends["prey.growth_rate"]


@pytest.mark.slow
def test_intervals_cover_the_values_counts_were_drawn_from(tmp_path):
    # recovery and coverage (common practice for checking an estimator and its intervals):
    # 50 sets of Poisson counts drawn with seeds 0-49 from the four linked cycling patches
    # with known rates; every estimate within 15 % of its value, and each 95 % profile
    # interval covering the value in at least 90 % of the sets
    from trophoscape.workflows.fitting import fit_counts

    study = four_patches(tmp_path)
    truth = {"prey.growth_rate": 1.0, "predation.attack_rate": 0.05,
             "predator.mortality_rate": 0.4}
    covered = {k: 0 for k in truth}
    for seed in range(50):
        fit = fit_counts(study, drawn_counts(study, truth, seed), list(truth),
                         observation="poisson", starts=2, seed=seed)
        for key, value in truth.items():
            assert fit.estimates[key] == pytest.approx(value, rel=0.15), (seed, key)
            covered[key] += fit.low[key] <= value <= fit.high[key]
    assert all(c >= 45 for c in covered.values()), covered


def test_the_fitted_scenario_reads_back_as_the_scenario_with_the_estimates(tmp_path):
    # consistency test of the TOML writer, read back by the standard library's tomllib
    # (the outside reference for TOML v1.0.0) and the scenario reader: every value but the
    # estimates as it was, file paths resolving to the same files from another folder, and
    # awkward text (quotes, backslashes, accents, a tab) kept exactly
    from trophoscape.report.fitting import fitted_scenario_text
    from trophoscape.scenario import read_scenario as load_scenario

    inputs = tmp_path / "in"
    four_patches(inputs)
    text = ('name = "Tal \\"Süd\\" \\\\ option\\tB"\n' + CYCLING
            + '[fit]\nestimate = ["prey.growth_rate"]\n'
              'bounds = { "prey.growth_rate" = [0.1, 5.0] }\n'
              '[[shock]]\nkind = "predator_removal"\nat = 5.0\npatches = ["W1", "W2"]\n'
              "share = 0.5\n"
              '[[shock]]\nkind = "link_cut"\nat = 7.0\nlinks = [["W1", "W2"]]\n')
    (inputs / "s.toml").write_text(text, encoding="utf-8")
    before = load_scenario(inputs / "s.toml")
    out = tmp_path / "elsewhere" / "deep"
    out.mkdir(parents=True)
    (out / "fitted.toml").write_text(fitted_scenario_text(before, {"prey.growth_rate": 1.234},
                                                          out), encoding="utf-8")
    after = load_scenario(out / "fitted.toml")
    assert after["prey.growth_rate"] == 1.234
    assert after.name == before.name == 'Tal "Süd" \\ option\tB'
    assert after.resolve(after["patches.path"]).resolve() == \
        before.resolve(before["patches.path"]).resolve()
    for key, value in before.values.items():
        if key not in ("prey.growth_rate", "patches.path"):
            assert after[key] == value, key


def test_one_value_a_value_on_its_bound_and_a_value_limited_above(tmp_path):
    # consistency tests of the edges of the search: a fit of one value gets its interval;
    # a value whose bound stops the search short of what the counts ask for is estimated on
    # that bound, its interval open there and a warning says so; a survival (at most 1 by
    # the scenario's rules) is searched within what the scenario accepts
    from trophoscape.workflows.fitting import fit_counts

    study = four_patches(tmp_path)
    counts = drawn_counts(study, TRUTH, seed=11, observation="lognormal")
    one = fit_counts(study, counts, ["prey.growth_rate"], observation="lognormal", starts=1)
    assert one.low["prey.growth_rate"] < one.estimates["prey.growth_rate"] \
        < one.high["prey.growth_rate"]
    capped = fit_counts(study, counts, ["prey.growth_rate"], observation="lognormal",
                        starts=1, bounds={"prey.growth_rate": [0.2, 0.9]})
    assert capped.estimates["prey.growth_rate"] == pytest.approx(0.9, rel=1e-5)
    assert "high" in capped.open_ends["prey.growth_rate"]
    assert capped.high["prey.growth_rate"] == pytest.approx(0.9, rel=1e-5)
    assert any("estimated on its upper bound" in w for w in capped.warnings)
    survival = fit_counts(study, counts, ["dispersal.survival_per_km"],
                          observation="lognormal", starts=1)
    assert 0 < survival.low["dispersal.survival_per_km"] \
        <= survival.high["dispersal.survival_per_km"] <= 1.0
    # the range searched, as estimates.csv reports it, is the one the scenario accepts
    low, high = survival.bounds["dispersal.survival_per_km"]
    assert high <= 1.0 and low == pytest.approx(study.scenario["dispersal.survival_per_km"] / 100)


def test_the_pool_is_used_and_left_behind_by_nothing(tmp_path, monkeypatch):
    # consistency test: with two workers the runs of the differences go to a pool (which
    # the settings test relies on to compare with one worker), and the pool is gone after
    # the fit
    import trophoscape.workflows.fitting as fitting

    study = four_patches(tmp_path)
    counts = drawn_counts(study, TRUTH, seed=4)
    pools = []
    original = fitting._Likelihood.expected_many

    def spy(self, thetas):
        out = original(self, thetas)
        if self.pool is not None:
            pools.extend((self.pool._processes or {}).values())
        return out

    monkeypatch.setattr(fitting._Likelihood, "expected_many", spy)
    fitting.fit_counts(study, counts, list(TRUTH), observation="poisson", starts=1,
                       intervals=False, workers=2)
    assert pools, "no pool was started"

    def running(pid):  # read from the kernel: Process.is_alive() can miss a reaped child
        import os

        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return False
        return open(f"/proc/{pid}/stat").read().split(")")[-1].split()[0] != "Z"

    assert not any(running(proc.pid) for proc in pools)
    assert fitting._JOB is None


def test_counts_a_fit_cannot_use_are_refused(tmp_path):
    # bad input in Python calls (consistency test of the checks): a count of a species
    # absent from the start; bounds of a value not estimated; a counted species with fewer
    # than 3 counts under a model that estimates its scatter
    from trophoscape.workflows.fitting import Counts, fit_counts

    study = four_patches(tmp_path / "a", CYCLING.replace("initial_density = 10.0",
                                                         "initial_density = 0.0"))
    counts = drawn_counts(four_patches(tmp_path / "b"), TRUTH, seed=1)
    with pytest.raises(InputError, match="absent from the start") as info:
        fit_counts(study, counts, ["prey.growth_rate"], observation="poisson")
    assert "'count'" in str(info.value) and "feature" in str(info.value)
    good = four_patches(tmp_path / "c")
    with pytest.raises(InputError, match="not estimated"):
        fit_counts(good, counts, ["prey.growth_rate"], observation="poisson",
                   bounds={"predation.attack_rate": [0.01, 0.1]})
    few = np.flatnonzero(counts.species == 1)[:2]
    keep = np.r_[np.flatnonzero(counts.species == 0), few]
    thin = Counts(patch=counts.patch[keep], time=counts.time[keep],
                  species=counts.species[keep], count=counts.count[keep])
    with pytest.raises(InputError, match="2 count\\(s\\) of predator"):
        fit_counts(good, thin, ["prey.growth_rate"], observation="negative_binomial")
