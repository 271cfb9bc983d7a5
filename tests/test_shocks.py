"""Shocks: each kind against a closed form, events in the simulation, scenario errors."""

import numpy as np
import pytest
import scipy.sparse as sp

import trophoscape as ts
from conftest import make_model, make_system
from trophoscape.errors import InputError
from trophoscape.network import build_network, movement_operator
from trophoscape.scenario import parse_scenario
from trophoscape.shocks import (SHOCK_KINDS, Harvest, HabitatLoss, LinkCut, MortalityPulse,
                                PatchLoss, PredatorRemoval, PreyCrash, ShockContext,
                                build_shocks, shock_events)
from trophoscape.simulate import simulate
from trophoscape.system import CoupledSystem, pack
from trophoscape.testing import chain_landscape, grid_landscape


def chain_context(n=4, prey_rate=0.2, predator_rate=0.1, **model_values):
    land = chain_landscape(n, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="step", max_distance_km=1.5)
    dispersal = {"prey": {"emigration_rate": np.full(n, prey_rate), "scale_km": np.ones(n)},
                 "predator": {"emigration_rate": np.full(n, predator_rate),
                              "scale_km": np.ones(n)}}
    ops = {s: movement_operator(net, emigration_rate=d["emigration_rate"], scale_km=1.0,
                                survival_per_km=1.0) for s, d in dispersal.items()}
    model = make_model(n, **model_values)
    system = CoupledSystem(model=model, area_km2=land.area_km2, prey_movement=ops["prey"],
                           predator_movement=ops["predator"])
    return land, net, system, ShockContext(network=net, dispersal=dispersal,
                                           survival_per_km=1.0, model=model)


def apply_all(shocks, context, system, y):
    for event in shock_events(shocks, context):
        system, y = event.apply(system, y)
    return system, y


def test_removal_and_crash_leave_the_rest():
    # removing a share s leaves (1 - s) of the population (definition; common practice)
    land, net, system, ctx = chain_context()
    y = pack(np.arange(1.0, 5.0) * 10, np.arange(1.0, 5.0))
    _, out = apply_all([PredatorRemoval(at=1.0, patches=np.array([1, 2]), share=0.9),
                        PreyCrash(at=1.0, patches=np.array([3]), share=0.25)], ctx, system, y)
    np.testing.assert_allclose(out[4:], [1.0, 0.2, 0.3, 4.0])
    np.testing.assert_allclose(out[:4], [10.0, 20.0, 30.0, 30.0])
    assert y[5] == 2.0  # the caller's state is not changed in place


def test_habitat_loss_for_a_duration_follows_logistic_and_restores_capacity():
    # one isolated logistic patch at K = 50; capacity halved from t = 1 to t = 4; between
    # events the closed form n(t) = K n0 e^{rt} / (K + n0 (e^{rt} - 1)) holds (Verhulst 1838,
    # from memory)
    model = make_model(1, growth="logistic", attack_rate=0.0)
    system = make_system(model)
    ctx = ShockContext(network=None, dispersal={}, survival_per_km=1.0, model=model)
    shock = HabitatLoss(at=1.0, patches=np.array([0]), factor=0.5, duration=3.0)
    events = shock_events([shock], ctx)
    traj = simulate(system, pack([50.0], [0.0]), duration=8.0, census_interval=1.0,
                    extinction_abundance=0.0, rtol=1e-10, atol=1e-12, events=events)
    n = traj["prey"].values[:, 0]

    def logistic(n0, k, t):
        return k * n0 * np.exp(t) / (k + n0 * (np.exp(t) - 1.0))

    n4 = logistic(50.0, 25.0, 3.0)
    np.testing.assert_allclose(n[4], n4, rtol=1e-7)
    np.testing.assert_allclose(n[8], logistic(n4, 50.0, 4.0), rtol=1e-7)
    end_system, _ = apply_all([shock], ctx, system, np.zeros(2))
    assert end_system.model.params["capacity"][0] == pytest.approx(50.0, rel=1e-12)


def test_permanent_habitat_loss_and_mortality_pulse_change_parameters():
    land, net, system, ctx = chain_context(mortality=0.4)
    new, _ = apply_all([HabitatLoss(at=0.0, patches=np.array([0, 3]), factor=0.2)], ctx,
                       system, np.zeros(8))
    np.testing.assert_allclose(new.model.params["capacity"], [10.0, 50.0, 50.0, 10.0])
    events = shock_events([MortalityPulse(at=2.0, patches=np.array([1]), factor=3.0,
                                          duration=5.0)], ctx)
    assert [e.time for e in events] == [2.0, 7.0]
    mid, _ = events[0].apply(system, np.zeros(8))
    np.testing.assert_allclose(mid.model.params["mortality"], [0.4, 1.2, 0.4, 0.4])
    end, _ = events[1].apply(mid, np.zeros(8))
    np.testing.assert_allclose(end.model.params["mortality"], 0.4)


def test_mortality_pulse_on_a_lone_predator_is_exponential_decay():
    # no prey: p' = -m p, so p(t) = p0 exp(-m t) with m tripled during the pulse (elementary)
    model = make_model(1, mortality=0.5)
    system = make_system(model)
    ctx = ShockContext(network=None, dispersal={}, survival_per_km=1.0, model=model)
    events = shock_events([MortalityPulse(at=1.0, patches=np.array([0]), factor=3.0,
                                          duration=2.0)], ctx)
    traj = simulate(system, pack([0.0], [100.0]), duration=5.0, census_interval=1.0,
                    extinction_abundance=0.0, rtol=1e-10, atol=1e-12, events=events)
    expected = 100.0 * np.exp(-0.5 * 1.0 - 1.5 * 2.0 - 0.5 * 2.0)
    assert traj["predator"].values[-1, 0] == pytest.approx(expected, rel=1e-7)


def test_harvest_at_rate_q_turns_growth_r_into_r_minus_q():
    # exponential prey n' = r n with harvest q from t = 2: n = n0 e^{2r} e^{(r - q)(t - 2)}
    # (elementary); the predator alone decays at m + q
    r, q, m, qp = 0.3, 0.5, 0.2, 0.1
    model = make_model(2, growth="exponential", growth_rate=r, attack_rate=0.0, mortality=m)
    system = make_system(model)
    ctx = ShockContext(network=None, dispersal={}, survival_per_km=1.0, model=model)
    shocks = [Harvest(at=2.0, patches=np.array([0]), rate=q, species="prey"),
              Harvest(at=2.0, patches=np.array([1]), rate=qp, species="predator")]
    traj = simulate(system, pack([10.0, 10.0], [0.0, 50.0]), duration=6.0,
                    census_interval=1.0, extinction_abundance=0.0, rtol=1e-10, atol=1e-12,
                    events=shock_events(shocks, ctx))
    t = traj.time
    prey = np.where(t <= 2, 10 * np.exp(r * t), 10 * np.exp(2 * r + (r - q) * (t - 2)))
    np.testing.assert_allclose(traj["prey"].values[:, 0], prey, rtol=1e-7)
    np.testing.assert_allclose(traj["prey"].values[:, 1], 10 * np.exp(r * t), rtol=1e-7)
    pred = np.where(t <= 2, 50 * np.exp(-m * t), 50 * np.exp(-2 * m - (m + qp) * (t - 2)))
    np.testing.assert_allclose(traj["predator"].values[:, 1], pred, rtol=1e-7)


def test_prey_harvest_jacobian_matches_finite_differences(rng):
    # the analytic Jacobian against central differences (common practice)
    n = 3
    model = make_model(n)
    params = dict(model.params, prey_harvest=np.array([0.1, 0.4, 0.0]))
    model = ts.LocalModel(growth="logistic", response="holling2", params=params)
    system = make_system(model, area=[1.0, 2.0, 0.5])
    y = rng.uniform(1.0, 30.0, 2 * n)
    rhs, jac = system.rhs_function(), system.jacobian_function()
    step = 1e-6
    fd = np.column_stack([(rhs(0, y + step * e) - rhs(0, y - step * e)) / (2 * step)
                          for e in np.eye(2 * n)])
    np.testing.assert_allclose(jac(0, y).toarray(), fd, rtol=1e-6, atol=1e-7)


def test_patch_loss_isolates_the_patch():
    land, net, system, ctx = chain_context(5, attack_rate=0.0)
    new, y = apply_all([PatchLoss(at=1.0, patches=np.array([2]))], ctx, system,
                       np.full(10, 7.0))
    assert y[2] == 0.0 and y[7] == 0.0
    for m in (new.prey_movement, new.predator_movement):
        dense = sp.csr_array(m).toarray()
        assert not dense[2].any() and not dense[:, 2].any()
        # every other column still sums to zero: individuals conserved (SCENARIO.md rule)
        np.testing.assert_allclose(dense.sum(axis=0), 0.0, atol=1e-12)
        assert dense[1, 0] > 0 and dense[3, 4] > 0
    # zeroed and cut off, the patch stays empty for good
    events = shock_events([PatchLoss(at=1.0, patches=np.array([2]))], ctx)
    traj = simulate(system, pack(np.full(5, 40.0), np.full(5, 2.0)), duration=10.0,
                    census_interval=0.5, events=events)
    assert np.all(traj["prey"].values[3:, 2] == 0.0)
    assert np.all(traj["prey"].values[3:, 1] > 0.0)


def test_link_cut_removes_both_directions_and_later_cuts_accumulate():
    land, net, system, ctx = chain_context(4)
    shocks = [LinkCut(at=1.0, pairs=np.array([[0, 1]])), LinkCut(at=2.0, pairs=np.array([[3, 2]]))]
    events = shock_events(shocks, ctx)
    mid, _ = events[0].apply(system, np.zeros(8))
    end, _ = events[1].apply(mid, np.zeros(8))
    d = end.prey_movement.toarray()
    assert d[0, 1] == d[1, 0] == d[2, 3] == d[3, 2] == 0.0
    assert d[1, 2] > 0 and d[2, 1] > 0
    assert d[0, 0] == 0.0  # patch 0 has no link left, so it sends nobody


def test_events_leave_default_runs_unchanged_and_census_sees_the_state_before():
    land, net, system, ctx = chain_context(4)
    y0 = pack(np.full(4, 30.0), np.full(4, 3.0))
    kw = dict(duration=20.0, census_interval=0.5)
    a = simulate(system, y0, **kw)
    b = simulate(system, y0, events=(), **kw)
    np.testing.assert_array_equal(a["prey"].values, b["prey"].values)
    c = simulate(system, y0, events=shock_events(
        [PredatorRemoval(at=5.0, patches=np.array([0, 1, 2, 3]), share=1.0)], ctx), **kw)
    k = int(np.searchsorted(c.time, 5.0))
    np.testing.assert_allclose(c["predator"].values[:k + 1], a["predator"].values[:k + 1],
                               rtol=1e-4)
    assert np.all(c["predator"].values[k + 1:] == 0.0)


def test_every_kind_is_in_the_table():
    assert set(SHOCK_KINDS) == {"predator_removal", "prey_crash", "habitat_loss",
                                "patch_loss", "mortality_pulse", "harvest", "link_cut"}


# ------------------------------------------------------------------------ scenario errors
BASE = {"patches": {"path": "p.gpkg"}}


def parse_shock(**table):
    return parse_scenario(dict(BASE, shock=[table]), path="s.toml")


@pytest.mark.parametrize("table,message", [
    ({"kind": "predator_remval", "patches": ["0"], "share": 0.5},
     "s.toml: field 'shock[0].kind': unknown shock kind 'predator_remval'; did you mean "
     "'predator_removal'?"),
    ({"kind": "predator_removal", "patches": ["0"], "share": 1.5},
     "s.toml: field 'shock[0].share': 1.5 is out of range; give a number from 0 to 1"),
    ({"kind": "prey_crash", "patches": ["0"], "share": -0.1},
     "s.toml: field 'shock[0].share': -0.1 is out of range; give a number from 0 to 1"),
    ({"kind": "mortality_pulse", "patches": "all", "factor": -1.0},
     "s.toml: field 'shock[0].factor': -1.0 is out of range; give a number of at least 0"),
    ({"kind": "mortality_pulse", "patches": "all", "factor": 2.0, "duration": 0},
     "s.toml: field 'shock[0].duration': 0 is out of range; give a number above 0"),
    ({"kind": "habitat_loss", "patches": "all", "factor": 0.0},
     "s.toml: field 'shock[0].factor': must be > 0 for habitat_loss (a capacity of zero is "
     "undefined); use kind = \"patch_loss\" to remove a patch"),
    ({"kind": "predator_removal", "patches": ["0"], "share": 0.5, "factor": 2.0},
     "s.toml: field 'shock[0].factor': does not apply to a predator_removal shock, which "
     "takes at, patches, share; remove it or change the kind"),
    ({"kind": "harvest", "patches": ["0"]},
     "s.toml: field 'shock[0].rate': is missing; a harvest shock needs it (per-capita "
     "removal rate (harvest)): add rate = ... to this [[shock]] table"),
    ({"kind": "patch_loss", "patchs": ["0"]},
     "s.toml: field 'shock[0].patchs': unknown key; did you mean 'patches'?"),
    ({"patches": ["0"]},
     "s.toml: field 'shock[0].kind': is missing; add kind = one of 'predator_removal', "
     "'prey_crash', "
     "'habitat_loss', 'patch_loss', 'mortality_pulse', 'harvest', 'link_cut'"),
    ({"kind": "patch_loss", "patches": ["0"], "at": 900},
     "s.toml: field 'shock[0].at': 900 is not before the end of the run (run.duration 400); "
     "set the shock earlier or lengthen the run"),
])
def test_shock_table_errors(table, message):
    with pytest.raises(InputError) as info:
        parse_shock(**table)
    assert str(info.value) == message


def test_shock_tables_parse_with_defaults_and_survive_with_values():
    sc = parse_shock(kind="harvest", patches=["a", "b"], rate=1)
    t = sc["shock"][0]
    assert dict(t) == {"kind": "harvest", "at": 100.0, "patches": ("a", "b"), "rate": 1.0,
                       "species": "predator", "duration": None}
    again = sc.with_values(run__duration=300.0)
    assert dict(again["shock"][0]) == dict(t)
    assert parse_scenario(dict(BASE))["shock"] == ()


def test_unknown_ids_and_unlinked_pairs_are_named():
    land = grid_landscape(2, 2, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="step", max_distance_km=1.2)  # no diagonal links
    tables = [{"kind": "predator_removal", "at": 1.0, "patches": ("0", "9"), "share": 0.5}]
    with pytest.raises(InputError) as info:
        build_shocks(tables, ids=land.ids, network=net, file="s.toml")
    assert str(info.value) == ("s.toml: field 'shock[0].patches': no patch has id '9'; "
                               "use ids of the patch file's id field (e.g. '0', '1', '2')")
    cut = [{"kind": "link_cut", "at": 1.0, "links": (("0", "1"), ("0", "3"))}]
    with pytest.raises(InputError) as info:
        build_shocks(cut, ids=land.ids, network=net, file="s.toml")
    assert str(info.value) == ("s.toml: field 'shock[0].links': no link joins '0' and '3'; "
                               "list only linked pairs (layer links of patches.gpkg)")
    (ok,) = build_shocks([{"kind": "link_cut", "at": 1.0, "links": (("0", "1"),)}],
                         ids=land.ids, network=net)
    np.testing.assert_array_equal(ok.pairs, [[0, 1]])
