"""Collapse spread: front speeds against published results, arrival order, the command."""

import json

import geopandas
import networkx as nx
import numpy as np
import pandas as pd
import pytest
import shapely
from scipy.optimize import minimize_scalar

import trophoscape as ts
import trophoscape.cli.program as cli
from trophoscape.workflows import spread as sp
from trophoscape.model.dynamics import LocalModel
from trophoscape.model.network import build_network, movement_operator
from trophoscape.scenario import parse_scenario
from trophoscape.integrate.ode import simulate
from trophoscape.model.system import CoupledSystem, pack
from trophoscape.testing import chain_landscape, grid_landscape


def lattice_speed(growth, d_patch):
    """Linear spreading speed on a chain, patches per time, and the decay rate s* per patch:
    c* = min_{s>0} [growth + D'(e^s + e^-s - 2)] / s (Weinberger 1982, SIAM J. Math. Anal.
    13:353, from memory); minimised with scipy."""
    res = minimize_scalar(lambda s: (growth + d_patch * (np.exp(s) + np.exp(-s) - 2)) / s,
                          bounds=(1e-4, 30.0), method="bounded", options={"xatol": 1e-10})
    return res.fun, res.x


def chain_system(h, n, *, prey_rate, predator_rate, response="lotka_volterra", **params):
    land = chain_landscape(n, spacing_km=h, size_km=h / 2)
    # nearest neighbours only, each link weight 1: an emigrant goes left or right with
    # probability 1/2, so the per-link rate is D' = ε/2 and D = ε h²/2 (issue 4)
    net = build_network(land, kernel="step", max_distance_km=1.01 * h, distance="centroid")
    ops = [movement_operator(net, emigration_rate=e, scale_km=1.0, survival_per_km=1.0)
           for e in (prey_rate, predator_rate)]
    base = dict(growth_rate=1.0, capacity=10.0, allee_density=1.0, attack_rate=0.0,
                handling_time=0.0, interference=0.0, conversion=0.0, mortality=1.0)
    base.update(params)
    model = LocalModel(growth="logistic", response=response,
                       params={k: np.full(n, float(v)) for k, v in base.items()})
    system = CoupledSystem(model=model, area_km2=land.area_km2, prey_movement=ops[0],
                           predator_movement=ops[1])
    x = (land.centroids[:, 0] - land.centroids[0, 0]) / 1000.0
    return land, system, x


def measured_front(h, *, T=30.0, r=1.0, D=1.0, K=10.0):
    n = int((4.4 * np.sqrt(r * D) * T + 10) / h)
    land, system, x = chain_system(h, n, prey_rate=2 * D / h**2, predator_rate=0.0,
                                   growth_rate=r, capacity=K)
    area = land.area_km2
    start = np.where(x < 1.0, K, 0.0)
    traj = simulate(system, pack(start * area, np.zeros(n)), duration=T, census_interval=0.1,
                    extinction_abundance=0.0, rtol=1e-6, atol=1e-9)
    arrival = sp.crossing_times(traj["prey"].values / area, traj.time, K / 2)
    late = np.isfinite(arrival) & (arrival > T / 3)  # past the initial transient
    return x[late], arrival[late]


def test_fisher_kpp_front_speed_on_a_chain():
    # Fisher (1937) Ann. Eugen. 7:355; Kolmogorov, Petrovsky & Piskunov (1937): continuum
    # speed 2√(rD). On the chain the linear speed is Weinberger's c* (see lattice_speed);
    # a front from a local start lags by (3/(2λ*)) ln t (Bramson 1983, from memory), λ* the
    # decay rate of the critical front per km, so we also fit with that lag added back.
    r, D = 1.0, 1.0
    continuum = 2 * np.sqrt(r * D)
    gaps = []
    for h in (4.0, 2.0, 1.0, 0.5, 0.25):
        c_patches, s_star = lattice_speed(r, D / h**2)
        c_star = c_patches * h
        x, t = measured_front(h)
        plain = sp.front_speed(x, t)["speed"]
        corrected = sp.front_speed(x + 1.5 * h / s_star * np.log(t), t)["speed"]
        assert corrected == pytest.approx(c_star, rel=0.01), h
        assert c_star >= continuum  # the lattice speed is never below the continuum one
        gaps.append(corrected - continuum)
    assert plain == pytest.approx(c_star, rel=0.05)  # h = 0.25, no lag correction
    assert np.all(np.diff(gaps) < 0) and abs(gaps[-1]) < 0.01 * continuum


def test_predator_invasion_into_prey_at_capacity():
    # linear speed 2√(D_P (e f(K) - m)) (Dunbar 1983, J. Math. Biol.; Owen & Lewis 2001,
    # Bull. Math. Biol.; from memory); on the chain its lattice analogue with growth
    # e f(K) - m, f Holling II (Holling 1959). K = 5 is below the Hopf threshold 7.5.
    h, D_P, T = 0.5, 0.5, 40.0
    a, ht, e, m, K = 1.0, 0.2, 0.5, 0.5, 5.0
    growth = e * a * K / (1 + a * ht * K) - m
    c_patches, s_star = lattice_speed(growth, D_P / h**2)
    n = int((2.5 * 2 * np.sqrt(D_P * growth) * T + 10) / h)
    land, system, x = chain_system(h, n, prey_rate=0.0, predator_rate=2 * D_P / h**2,
                                   response="holling2", attack_rate=a, handling_time=ht,
                                   conversion=e, mortality=m, capacity=K)
    area = land.area_km2
    pred0 = np.where(x < 1.0, 0.5, 0.0)
    traj = simulate(system, pack(np.full(n, K) * area, pred0 * area), duration=T,
                    census_interval=0.1, extinction_abundance=0.0, rtol=1e-6, atol=1e-9)
    arrival = sp.crossing_times(traj["predator"].values / area, traj.time, 0.1)
    late = np.isfinite(arrival) & (arrival > T / 3)
    assert late.sum() > 20
    t = arrival[late]
    corrected = sp.front_speed(x[late] + 1.5 * h / s_star * np.log(t), t)["speed"]
    assert corrected == pytest.approx(c_patches * h, rel=0.03)
    assert sp.front_speed(x[late], t)["speed"] == pytest.approx(c_patches * h, rel=0.08)


# ------------------------------------------------------------------- chains as studies
def source_sink_file(tmp_path, n=8, isolated=False):
    """A chain where only patch "0" can feed predators; the rest are sinks kept by immigrants."""
    land = chain_landscape(n, spacing_km=2.0, size_km=1.0)
    frame = land.frame[["patch_id", "geometry"]].copy()
    frame["mortality"] = np.where(np.arange(n) == 0, 0.1, 0.3)
    if isolated:
        far = shapely.box(400_000.0, 5_000_000.0, 401_000.0, 5_001_000.0)
        frame = pd.concat([frame, geopandas.GeoDataFrame(
            {"patch_id": ["far"], "mortality": [0.1]}, geometry=[far], crs=frame.crs)],
            ignore_index=True)
    path = tmp_path / "chain.gpkg"
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    return path


def chain_scenario(path, shocks, **sections):
    raw = {"patches": {"path": str(path), "id_field": "patch_id"},
           "prey": {"capacity_density": 50.0, "emigration_rate": 0.0,
                    "initial_density": 50.0},
           "predator": {"mortality_rate": {"field": "mortality"}, "conversion": 0.5,
                        "emigration_rate": 0.1, "initial_density": 5.0},
           "predation": {"response": "lotka_volterra", "attack_rate": 0.01},
           "dispersal": {"kernel": "step", "max_distance_km": 1.5, "survival_per_km": 1.0},
           "run": {"duration": 160.0, "burn_in": 60.0, "census_interval": 0.5,
                   "extinction_abundance": 0.01},
           "spread": {"window": 10.0},
           "shock": shocks}
    for k, v in sections.items():
        raw.setdefault(k, {}).update(v)
    return parse_scenario(raw, path=path.parent / "s.toml", base_dir=path.parent)


def test_arrival_increases_with_distance_on_a_chain(tmp_path):
    sc = chain_scenario(source_sink_file(tmp_path),
                        [{"kind": "patch_loss", "at": 80.0, "patches": ["0"]}])
    result = sp.run_spread(ts.build_study(sc))
    table = result.table
    reached = table.dropna(subset=["arrival_time"])
    assert len(reached) >= 4  # the sinks nearest the lost source collapse
    order = reached.sort_values("distance_km")
    assert order["arrival_time"].is_monotonic_increasing
    assert order.index[0] == "0" and order["arrival_time"].iloc[0] == pytest.approx(80.5)
    # centroid spacing 2 km; network (boundary) distance 1 km per link
    np.testing.assert_allclose(table["distance_km"], 2.0 * np.arange(8), rtol=1e-3)
    np.testing.assert_allclose(table["network_distance_km"], np.arange(8), rtol=1e-3)
    s = result.summary
    assert s["first_reached"][0] == "0" and s["reached"] == len(reached)
    assert s["front_speed_km_per_time"] > 0
    low, high = s["front_speed_interval_km_per_time"]
    assert low <= s["front_speed_km_per_time"] <= high
    # the shocked run continues the baseline: the same up to the shock, within the solver's
    # tolerance (its last steps differ: it must stop exactly at the shock time)
    before = result.baseline.data.sel(time=slice(None, 80.0))
    np.testing.assert_allclose(result.shocked.data["predator"].sel(time=before.time),
                               before["predator"], rtol=1e-5)
    assert result.shocked.time[0] == 0.0 and result.shocked.time[-1] == 160.0


def test_a_shock_in_an_isolated_patch_reaches_nobody(tmp_path):
    sc = chain_scenario(source_sink_file(tmp_path, isolated=True),
                        [{"kind": "patch_loss", "at": 80.0, "patches": ["far"]}])
    result = sp.run_spread(ts.build_study(sc))
    reached = result.table.dropna(subset=["arrival_time"]).index.tolist()
    assert reached == ["far"]
    assert np.isnan(result.table["network_distance_km"].drop("far")).all()
    assert result.summary["reached_unshocked"] == 0


def test_spread_needs_a_shock_after_burn_in(tmp_path):
    path = source_sink_file(tmp_path)
    with pytest.raises(ts.InputError, match="needs at least one"):
        sp.run_spread(ts.build_study(chain_scenario(path, [])))
    late = chain_scenario(path, [{"kind": "patch_loss", "at": 10.0, "patches": ["0"]}])
    with pytest.raises(ts.InputError) as info:
        sp.run_spread(ts.build_study(late))
    assert str(info.value).endswith(
        "field 'shock[0].at': 10 is before run.burn_in 60; set the shock at 60 or later (the "
        "spread is measured from the state after burn-in)")


# ------------------------------------------------------------------ the species followed
PREY_CRASH = [{"kind": "prey_crash", "at": 80.0, "patches": ["0", "1"], "share": 1.0}]
PREDATOR_REMOVAL = [{"kind": "predator_removal", "at": 80.0, "patches": ["0"], "share": 1.0}]
NO_PREDATORS = {"initial_density": 0.0}


@pytest.mark.parametrize("tables, species", [
    ([{"kind": "prey_crash", "share": 0.5}], "prey"),
    ([{"kind": "habitat_loss", "factor": 0.5}, {"kind": "harvest", "rate": 0.2,
                                                "species": "prey"}], "prey"),
    ([{"kind": "harvest", "rate": 0.2}], "predator"),  # a harvest takes the predator by default
    ([{"kind": "predator_removal", "share": 0.5}], "predator"),
    ([{"kind": "mortality_pulse", "factor": 2.0, "duration": 5.0}], "predator"),
    ([{"kind": "prey_crash", "share": 0.5}, {"kind": "patch_loss"}], "predator"),
    ([{"kind": "prey_crash", "share": 0.5}, {"kind": "link_cut", "links": [["0", "1"]]}],
     "predator"),
])
def test_the_shocks_decide_the_species_followed_by_default(tmp_path, tables, species):
    from trophoscape.model.shocks import build_shocks

    tables = [dict(t, at=80.0, **({} if "links" in t else {"patches": ["0"]})) for t in tables]
    sc = chain_scenario(tmp_path / "chain.gpkg", tables)
    assert sc["spread.species"] == sp.AUTO
    shocks = build_shocks(sc["shock"], ids=[str(i) for i in range(8)])
    assert sp.followed_species(shocks) == species
    rule = sp.CollapseRule.from_scenario(sc)
    assert rule.species == sp.AUTO and rule.resolve(shocks).species == species
    assert rule.resolve(shocks).share == rule.share
    other = "prey" if species == "predator" else "predator"
    assert sp.CollapseRule(species=other).resolve(shocks).species == other


def test_spread_species_is_checked_in_the_scenario(tmp_path):
    with pytest.raises(ts.InputError) as info:
        chain_scenario(tmp_path / "chain.gpkg", PREY_CRASH, spread={"species": "prey_"})
    assert info.value.field == "spread.species" and "did you mean 'prey'?" in str(info.value)


def test_a_prey_crash_without_predators_follows_the_prey(tmp_path):
    # prey do not move in this chain, so patches emptied of prey stay empty: exactly the two
    # crashed patches collapse, one census after the shock
    sc = chain_scenario(source_sink_file(tmp_path), PREY_CRASH, predator=NO_PREDATORS)
    study = ts.build_study(sc)
    result = sp.run_spread(study)
    s = result.summary
    assert s["species"] == "prey"
    assert s["reached_share"] == pytest.approx(2 / 8) and s["reached"] == 2
    reached = result.table.dropna(subset=["arrival_time"])
    assert sorted(reached.index) == ["0", "1"]
    assert (reached["arrival_time"] > 80.0).all() and (reached["arrival_time"] <= 81.0).all()
    # the origin scan follows the same species: the crash empties each origin of prey
    scan = sp.origin_scan(study, [0, 5], workers=1, progress=False)
    assert (scan["status"] == "ok").all() and scan["origin_collapses"].all()
    assert (scan["cascade_size"] == 0).all()


def test_a_predator_removal_follows_the_predator_by_default(tmp_path):
    path = source_sink_file(tmp_path)
    result = sp.run_spread(ts.build_study(chain_scenario(path, PREDATOR_REMOVAL)))
    assert result.summary["species"] == "predator"
    reached = result.table.dropna(subset=["arrival_time"])
    assert "0" in reached.index  # the source, emptied of predators, refills only slowly
    # consistency test: the default gives the same table as naming the predator
    named = sp.run_spread(ts.build_study(chain_scenario(path, PREDATOR_REMOVAL,
                                                        spread={"species": "predator"})))
    pd.testing.assert_frame_equal(result.table, named.table)
    assert named.summary["species"] == "predator"


def test_spread_runs_take_the_run_settings_of_a_study(tmp_path):
    # consistency test: the shocked and baseline runs record their census as a study does
    # (float32, as timeseries.nc holds it; RunSettings.from_scenario is the one source)
    from trophoscape.integrate.ode import STORAGE_DTYPE, RunSettings

    study = ts.build_study(chain_scenario(source_sink_file(tmp_path), PREDATOR_REMOVAL))
    result = sp.run_spread(study)
    for traj in (result.shocked, result.baseline):
        assert traj.data["prey"].dtype == STORAGE_DTYPE == np.float32
    settings = RunSettings.from_scenario(study.scenario)
    assert settings.census_interval == study.scenario["run.census_interval"]
    assert settings.options(duration=3.0)["duration"] == 3.0


@pytest.mark.parametrize("run", [
    {"census_interval": 0.25},
    {"rtol": 1e-8, "atol": 1e-10},
    {"method": "BDF"},
])
def test_arrival_times_do_not_follow_the_numerical_settings(tmp_path, run):
    # consistency test: where and when the collapse arrives is the scenario's, not the
    # solver's; arrival is read at census times, so two census grids may differ by one
    # interval (0.5 here), and nothing else may move more than that
    path = source_sink_file(tmp_path)
    lost = [{"kind": "patch_loss", "at": 80.0, "patches": ["0"]}]
    ref = sp.run_spread(ts.build_study(chain_scenario(path, lost)))
    other = sp.run_spread(ts.build_study(chain_scenario(path, lost, run=run)))
    a, b = ref.table["arrival_time"], other.table["arrival_time"]
    assert a.notna().sum() >= 4
    assert (a.isna() == b.isna()).all()
    np.testing.assert_allclose(b[a.notna()], a[a.notna()], atol=0.5 + 1e-9)
    assert list(ref.table["order"].dropna()) == list(other.table["order"].dropna())


def test_an_explicit_species_wins_over_the_shocks(tmp_path):
    path = source_sink_file(tmp_path)
    prey = sp.run_spread(ts.build_study(chain_scenario(path, PREY_CRASH)))
    predator = sp.run_spread(ts.build_study(chain_scenario(path, PREY_CRASH,
                                                           spread={"species": "predator"})))
    assert prey.summary["species"] == "prey" and predator.summary["species"] == "predator"
    # the prey collapse stays in the crashed patches (prey do not move); the predators of the
    # source starve there, and the sinks they fed collapse after them, further away later
    assert sorted(prey.table.dropna(subset=["arrival_time"]).index) == ["0", "1"]
    starved = predator.table.dropna(subset=["arrival_time"])
    assert {"0", "1", "2"} <= set(starved.index) and len(starved) > 3
    assert starved.loc["2", "arrival_time"] > starved.loc["0", "arrival_time"]
    # and a rule handed in by the caller wins over the scenario: removing predators never
    # drives the prey down, so no prey collapse
    rule = sp.CollapseRule(species="prey", window=10.0)
    result = sp.run_spread(ts.build_study(chain_scenario(path, PREDATOR_REMOVAL)), rule=rule)
    assert result.summary["species"] == "prey" and result.summary["reached"] == 0


def test_a_followed_species_absent_after_burn_in_is_an_input_error(tmp_path, monkeypatch):
    path = source_sink_file(tmp_path)
    named = chain_scenario(path, PREY_CRASH, predator=NO_PREDATORS,
                           spread={"species": "predator"})
    with pytest.raises(ts.InputError) as info:
        sp.run_spread(ts.build_study(named))
    err = info.value
    assert err.file == str(path.parent / "s.toml") and err.field == "spread.species"
    assert err.message.startswith("the predator is absent from every patch at the shock "
                                  "time 80")
    wrong, advice = err.message.split("; ")
    assert 'set species = "prey" under [spread]' in advice and "initial_density" in advice
    assert "\n" not in str(err)
    # by default, the message says which shock made the predator the species followed
    default = chain_scenario(path, [{"kind": "patch_loss", "at": 80.0, "patches": ["0"]}],
                             predator=NO_PREDATORS)
    with pytest.raises(ts.InputError, match=r"shock\[0\], a patch_loss, acts on both species"):
        sp.run_spread(ts.build_study(default))
    # the origin scan checks once, before any origin is run
    import trophoscape.workflows.tasks

    def no_tasks(*args, **kwargs):
        raise AssertionError("origins were dispatched")

    monkeypatch.setattr(trophoscape.workflows.tasks, "run_tasks", no_tasks)
    with pytest.raises(ts.InputError) as scan_info:
        sp.origin_scan(ts.build_study(named), [0, 1], workers=1, progress=False)
    assert str(scan_info.value) == str(err)


# --------------------------------------------------------------------------- the pieces
def test_running_mean_matches_pandas_centred_rolling(rng):
    # pandas (reference library): centred rolling mean with shortened windows at the ends
    x = rng.normal(size=(60, 3))
    t = np.arange(60) * 0.5
    got = sp.running_mean(x, t, window=3.0)  # 7 samples
    want = pd.DataFrame(x).rolling(7, center=True, min_periods=1).mean().to_numpy()
    np.testing.assert_allclose(got, want, rtol=1e-12)


def test_first_sustained_and_collapse_rule():
    t = np.arange(12) * 0.5
    flags = np.zeros((12, 3), dtype=bool)
    flags[2:5, 0] = True       # 1.0 long: too short
    flags[6:11, 0] = True      # 2.0 long, from t = 3.0
    flags[1:12, 1] = True      # from t = 0.5, but searched from row 4 on
    start = sp.first_sustained(flags, t, begin=np.array([0, 4, 0]), sustained=2.0)
    assert start.tolist() == [6, 4, -1]
    base = np.full((12, 1), 10.0)
    shocked = base.copy()
    shocked[4:9] = 0.5          # below 10% from t = 2 to 4, then back
    c = sp.collapse_times(shocked, base, t, after=1.0,
                          rule=sp.CollapseRule(share=0.1, sustained=2.0, window=2.0))
    assert c["arrival_time"][0] == 2.0 and np.isnan(c["recovered_at"][0])  # back for < 2
    shocked[9:] = 10.0
    longer = np.vstack([shocked, np.full((4, 1), 10.0)])
    c = sp.collapse_times(longer, np.full((16, 1), 10.0), np.arange(16) * 0.5, after=1.0,
                          rule=sp.CollapseRule(share=0.1, sustained=2.0, window=2.0))
    assert c["recovered_at"][0] == 4.5 and not c["baseline_collapse"][0]


def test_distances_match_networkx_and_brute_force(rng):
    land = grid_landscape(4, 5, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="exponential", max_distance_km=2.5)
    origins = np.zeros(20, dtype=bool)
    origins[[0, 13]] = True
    got = sp.network_distance_km(net, origins)
    # networkx (reference library): multi-source Dijkstra over the same links
    want = nx.multi_source_dijkstra_path_length(net.to_networkx(), {"0", "13"},
                                                weight="distance_km")
    np.testing.assert_allclose(got, [want[i] for i in land.ids], rtol=1e-9)
    line = sp.straight_distance_km(land.centroids, origins)
    brute = np.min(np.hypot(*(land.centroids[:, None, :] - land.centroids[origins][None]).T),
                   axis=0) / 1000.0
    np.testing.assert_allclose(line, brute, rtol=1e-12)


def test_stratified_origins_take_one_from_each_run_of_the_curve():
    land = grid_landscape(10, 10, spacing_km=1.0, size_km=0.5)
    pick = sp.stratified_origins(land.centroids, 10, seed=3)
    assert pick.size == 10 and np.unique(pick).size == 10
    rows = land.frame["row"].to_numpy()[pick]
    assert rows.min() <= 2 and rows.max() >= 7  # spread over the landscape
    np.testing.assert_array_equal(sp.stratified_origins(land.centroids, 500), np.arange(100))


# ------------------------------------------------------------------------------ command
@pytest.fixture
def spread_command(monkeypatch):
    return cli.main


def write_toml(path, sc_dir, shocks):
    lines = [f'[patches]\npath = "{sc_dir / "chain.gpkg"}"\nid_field = "patch_id"\n',
             "[prey]\ncapacity_density = 50.0\nemigration_rate = 0.0\ninitial_density = 50.0\n",
             '[predator]\nmortality_rate = { field = "mortality" }\nconversion = 0.5\n'
             "emigration_rate = 0.1\ninitial_density = 5.0\n",
             '[predation]\nresponse = "lotka_volterra"\nattack_rate = 0.01\n',
             '[dispersal]\nkernel = "step"\nmax_distance_km = 1.5\nsurvival_per_km = 1.0\n',
             "[run]\nduration = 120\nburn_in = 60\nextinction_abundance = 0.01\n",
             "[spread]\nwindow = 10.0\n"]
    lines += [shocks]
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def test_spread_command_writes_its_files(tmp_path, spread_command):
    source_sink_file(tmp_path)
    toml = write_toml(tmp_path / "s.toml", tmp_path,
                      '[[shock]]\nkind = "patch_loss"\nat = 70\npatches = ["0"]\n')
    out = tmp_path / "out"
    code = spread_command(["spread", str(toml), "--out", str(out), "--origins", "3",
                           "--workers", "1", "--quiet"])
    assert code == 0
    table = pd.read_csv(out / "spread.csv", dtype={"patch_id": str})
    assert table.columns[:6].tolist() == ["patch_id", "arrival_time", "order",
                                          "network_distance_km", "distance_km", "recovered_at"]
    summary = json.loads((out / "spread.json").read_text())
    for key in ("reached_share", "front_speed_km_per_time", "first_reached",
                "front_speed_interval_km_per_time"):
        assert key in summary
    assert summary["first_reached"][0] == "0"
    origins = pd.read_csv(out / "origins.csv", dtype={"origin_id": str})
    assert len(origins) == 3 and (origins["status"] == "ok").all()
    for name in ("patches.gpkg", "timeseries.nc", "summary.json", "maps/spread_arrival.png",
                 "maps/spread_arrival_distance.png", "maps/origin_vulnerability.png"):
        assert (out / name).is_file(), name
    patches = pd.read_csv(out / "patches.csv", dtype={"patch_id": str})
    assert "arrival_time" in patches.columns
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "<h2>Collapse spread</h2>" in report and "Worst origins" in report
    assert report.index("<h2>Collapse spread</h2>") < report.index("<p><small>Run ")


def test_spread_command_bad_input_exits_2_and_writes_nothing(tmp_path, spread_command,
                                                             capsys):
    source_sink_file(tmp_path)
    toml = write_toml(tmp_path / "s.toml", tmp_path,
                      '[[shock]]\nkind = "patch_loss"\nat = 70\npatches = ["nowhere"]\n')
    out = tmp_path / "out"
    assert spread_command(["spread", str(toml), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.strip() == (f"error: {toml}: field 'shock[0].patches': no patch has id "
                           "'nowhere'; use ids of the patch file's id field (e.g. '0', '1', '2')")
    assert not out.exists()


def test_spread_command_with_the_followed_species_absent_exits_2(tmp_path, spread_command,
                                                                capsys):
    source_sink_file(tmp_path)
    toml = write_toml(tmp_path / "s.toml", tmp_path,
                      '[[shock]]\nkind = "predator_removal"\nat = 70\nshare = 1.0\n'
                      'patches = ["0"]\n')
    text = toml.read_text(encoding="utf-8")
    toml.write_text(text.replace("initial_density = 5.0", "initial_density = 0.0"),
                    encoding="utf-8")
    out = tmp_path / "out"
    assert spread_command(["spread", str(toml), "--out", str(out), "--quiet"]) == 2
    captured = capsys.readouterr()
    lines = captured.err.splitlines()
    assert len(lines) == 1 and "Traceback" not in captured.err
    assert lines[0].startswith(f"error: {toml}: field 'spread.species': the predator "
                               "(followed by default: shock[0], a predator_removal, acts on "
                               "the predator) is absent")
    assert captured.out == ""
    assert not out.exists() and not list(tmp_path.glob(".*partial*"))


def test_spread_honours_the_noise_section(tmp_path):
    # [noise] reaches the spread runs: the baseline differs from the deterministic one, the
    # same seed gives the same numbers (consistency test), and the shocked run equals the
    # baseline up to the shock (common random numbers: they differ by the shock alone)
    path = source_sink_file(tmp_path)
    noisy = {"environmental_sd": 0.2, "correlation_km": "regional", "correlation_time": 1.0}
    plain = sp.run_spread(ts.build_study(chain_scenario(path, PREDATOR_REMOVAL)))
    one = sp.run_spread(ts.build_study(chain_scenario(path, PREDATOR_REMOVAL, noise=noisy)))
    two = sp.run_spread(ts.build_study(chain_scenario(path, PREDATOR_REMOVAL, noise=noisy)))
    base, plain_base = one.baseline["predator"].values, plain.baseline["predator"].values
    assert base.shape == plain_base.shape
    assert np.max(np.abs(base - plain_base)) > 0.05 * np.max(plain_base)
    np.testing.assert_array_equal(base, two.baseline["predator"].values)
    times = np.asarray(one.baseline.time, dtype=float)
    shocked = one.shocked["predator"].sel(time=times).values
    before = times < 80.0
    np.testing.assert_allclose(shocked[before], base[before], rtol=1e-9, atol=1e-9)
    assert not np.allclose(shocked[~before], base[~before])
    other = sp.run_spread(ts.build_study(chain_scenario(path, PREDATOR_REMOVAL, noise=noisy,
                                                        run={"seed": 2})))
    assert not np.array_equal(base, other.baseline["predator"].values)
