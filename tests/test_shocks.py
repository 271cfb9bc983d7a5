"""Shocks: each kind against a closed form, events in the simulation, scenario errors."""

import numpy as np
import pytest
import scipy.sparse as sp

import trophoscape as ts
from conftest import make_model, make_system
from trophoscape.errors import InputError
from trophoscape.model.network import build_network, movement_operator
from trophoscape.scenario import parse_scenario
from trophoscape.model.shocks import (SHOCK_KINDS, Harvest, HabitatLoss, LinkCut, MortalityPulse,
                                      PatchLoss, PredatorRemoval, PreyCrash, ShockContext,
                                      build_shocks, shock_events)
from trophoscape.integrate.ode import simulate
from trophoscape.model.system import SPECIES, CoupledSystem, pack
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


# -------------------------------------------------------------------- overlapping shocks
def params_after(shocks, context, system, t):
    """The model's parameters once every event at or before ``t`` has acted (as simulate)."""
    for event in shock_events(shocks, context):
        if event.time <= t:
            system, _ = event.apply(system, np.zeros(2 * system.n_patches))
    return system.model.params


def logistic(n0, k, t):
    # n(t) = K n0 e^{t} / (K + n0 (e^{t} - 1)) for r = 1 (Verhulst 1838, from memory)
    return k * n0 * np.exp(t) / (k + n0 * (np.exp(t) - 1.0))


def test_overlapping_habitat_losses_multiply_and_end_exactly():
    # two halvings of K leave K / 4 while both act; 0.5 * 0.5 is exact in binary floating
    # point, so equality is fair; once both end, K itself, bit for bit
    land, net, system, ctx = chain_context(3)
    base = ctx.model.params["capacity"]
    shocks = [HabitatLoss(at=1.0, patches=np.array([1]), factor=0.5, duration=4.0),
              HabitatLoss(at=2.0, patches=np.array([1, 2]), factor=0.5, duration=5.0)]

    def capacity(t):
        return params_after(shocks, ctx, system, t)["capacity"]

    np.testing.assert_array_equal(capacity(1.5), [base[0], base[1] * 0.5, base[2]])
    np.testing.assert_array_equal(capacity(3.0), [base[0], base[1] * 0.25, base[2] * 0.5])
    np.testing.assert_array_equal(capacity(5.0), [base[0], base[1] * 0.5, base[2] * 0.5])
    np.testing.assert_array_equal(capacity(7.0), base)


def _twice_on_one_patch(shock, y0, duration, **model_values):
    """One isolated patch run tightly with the same shock given twice, census every 1."""
    model = make_model(1, **model_values)
    ctx = ShockContext(network=None, dispersal={}, survival_per_km=1.0, model=model)
    return simulate(make_system(model), y0, duration=duration, census_interval=1.0,
                    extinction_abundance=0.0, rtol=1e-10, atol=1e-12,
                    events=shock_events([shock, shock], ctx))


def test_two_halvings_of_capacity_run_as_one_quartering():
    # one isolated logistic patch at K = 50, two halvings from t = 1 to t = 4: logistic growth
    # towards K / 4, then back towards K (closed form between events). An additive shift
    # would have made K zero here and the run fail.
    traj = _twice_on_one_patch(HabitatLoss(at=1.0, patches=np.array([0]), factor=0.5,
                                           duration=3.0),
                               pack([50.0], [0.0]), 8.0, growth="logistic", attack_rate=0.0)
    n = traj["prey"].values[:, 0]
    n4 = logistic(50.0, 12.5, 3.0)
    np.testing.assert_allclose(n[4], n4, rtol=1e-7)
    np.testing.assert_allclose(n[8], logistic(n4, 50.0, 4.0), rtol=1e-7)


def test_identical_zero_pulses_act_as_one():
    land, net, system, ctx = chain_context(3, mortality=0.4)

    def pulse():
        return MortalityPulse(at=2.0, patches=np.array([0, 1]), factor=0.0, duration=3.0)

    y0 = pack(np.full(3, 30.0), np.full(3, 4.0))
    kw = dict(duration=12.0, census_interval=0.5, rtol=1e-9, atol=1e-9)
    one = simulate(system, y0, events=shock_events([pulse()], ctx), **kw)
    two = simulate(system, y0, events=shock_events([pulse(), pulse()], ctx), **kw)
    # consistency test: 0 * 0 = 0, so the two runs see the same rates at the same times
    for s in SPECIES:
        np.testing.assert_array_equal(two[s].values, one[s].values)
    assert np.all(params_after([pulse(), pulse()], ctx, system, 3.0)["mortality"][:2] == 0.0)
    # after both, the unshocked mortality exactly (an additive shift left it doubled)
    np.testing.assert_array_equal(params_after([pulse(), pulse()], ctx, system, 5.0)["mortality"],
                                  ctx.model.params["mortality"])


def test_two_zero_pulses_on_a_lone_predator_pause_its_decay():
    # no prey: p' = -m p, and m = 0 during the pulses, so p(t) = p0 exp(-m (t - 3))
    # (elementary)
    traj = _twice_on_one_patch(MortalityPulse(at=1.0, patches=np.array([0]), factor=0.0,
                                              duration=3.0),
                               pack([0.0], [100.0]), 6.0, mortality=0.5)
    expected = 100.0 * np.exp(-0.5 * (traj.time - np.clip(traj.time - 1.0, 0.0, 3.0)))
    np.testing.assert_allclose(traj["predator"].values[:, 0], expected, rtol=1e-7)


def test_overlapping_pulses_multiply_their_factors():
    # m f alone, m f g while both act, m g once f has ended, m after both (elementary);
    # 3.0 * 0.2 is not exact in binary, hence a tolerance of a few units in the last place
    f, g = 3.0, 0.2
    land, net, system, ctx = chain_context(2, mortality=0.3)
    m = ctx.model.params["mortality"][0]
    shocks = [MortalityPulse(at=1.0, patches=np.array([0]), factor=f, duration=3.0),
              MortalityPulse(at=2.0, patches=np.array([0]), factor=g, duration=4.0)]

    def mortality(t):
        return params_after(shocks, ctx, system, t)["mortality"]

    assert mortality(1.0)[0] == pytest.approx(m * f, rel=1e-15)
    assert mortality(3.0)[0] == pytest.approx(m * f * g, rel=1e-15)
    assert mortality(4.0)[0] == pytest.approx(m * g, rel=1e-15)
    assert mortality(6.0)[0] == m
    assert np.all(mortality(3.0)[1:] == ctx.model.params["mortality"][1:])
    # consistency test: with f over, the value is that of g alone, bit for bit
    assert mortality(4.0)[0] == params_after(shocks[1:], ctx, system, 4.0)["mortality"][0]


def test_overlapping_harvests_add_their_rates():
    # predator: m f + q1 + q2 (a pulse scales the mortality, not the harvests); prey: q1 + q2
    # (the definitions of the module); back to m and to no harvest after all end
    land, net, system, ctx = chain_context(2, mortality=0.4)
    m = ctx.model.params["mortality"][0]
    shocks = [Harvest(at=1.0, patches=np.array([0]), rate=0.1, duration=4.0),
              Harvest(at=2.0, patches=np.array([0]), rate=0.25, duration=2.0),
              MortalityPulse(at=3.0, patches=np.array([0]), factor=2.0, duration=3.0),
              Harvest(at=1.0, patches=np.array([1]), rate=0.2, species="prey", duration=4.0),
              Harvest(at=2.0, patches=np.array([1]), rate=0.3, species="prey", duration=2.0)]

    def params(t):
        return params_after(shocks, ctx, system, t)

    assert params(1.5)["mortality"][0] == pytest.approx(m + 0.1, rel=1e-15)
    assert params(3.5)["mortality"][0] == pytest.approx(2 * m + 0.35, rel=1e-15)
    assert params(4.5)["mortality"][0] == pytest.approx(2 * m + 0.1, rel=1e-15)
    assert params(5.5)["mortality"][0] == 2 * m
    np.testing.assert_allclose(params(3.5)["prey_harvest"], [0.0, 0.5], rtol=1e-15)
    np.testing.assert_array_equal(params(7.0)["mortality"], ctx.model.params["mortality"])
    np.testing.assert_array_equal(params(7.0)["prey_harvest"], 0.0)


def test_overlapping_prey_harvests_slow_exponential_growth_by_their_sum():
    # n' = (r - q1 - q2) n while both act (elementary)
    r, q1, q2 = 0.3, 0.2, 0.3
    model = make_model(1, growth="exponential", growth_rate=r, attack_rate=0.0)
    system = make_system(model)
    ctx = ShockContext(network=None, dispersal={}, survival_per_km=1.0, model=model)
    shocks = [Harvest(at=1.0, patches=np.array([0]), rate=q1, species="prey", duration=4.0),
              Harvest(at=2.0, patches=np.array([0]), rate=q2, species="prey", duration=2.0)]
    traj = simulate(system, pack([10.0], [0.0]), duration=6.0, census_interval=1.0,
                    extinction_abundance=0.0, rtol=1e-10, atol=1e-12,
                    events=shock_events(shocks, ctx))
    expected = 10.0 * np.exp(r * 6.0 - q1 * 4.0 - q2 * 2.0)
    assert traj["prey"].values[-1, 0] == pytest.approx(expected, rel=1e-7)


def test_two_removals_at_once_leave_the_square_of_what_one_leaves():
    # removing a share s twice removes 1 - (1 - s)^2 (common practice)
    s = 0.4
    land, net, system, ctx = chain_context(3)
    y = pack(np.full(3, 20.0), np.full(3, 5.0))
    shocks = [PredatorRemoval(at=1.0, patches=np.array([0, 2]), share=s) for _ in range(2)]
    _, out = apply_all(shocks + [PreyCrash(at=1.0, patches=np.array([1]), share=s)] * 2,
                       ctx, system, y)
    np.testing.assert_allclose(out[3:], [5.0 * (1 - s) ** 2, 5.0, 5.0 * (1 - s) ** 2])
    np.testing.assert_allclose(out[:3], [20.0, 20.0 * (1 - s) ** 2, 20.0])


def test_a_temporary_shock_inside_a_permanent_one_ends_on_the_permanent_value():
    # factors chosen to round (0.3, 0.7, 0.1, 3.3): undoing by division would miss by a bit
    land, net, system, ctx = chain_context(3, mortality=0.45)
    hit = np.array([0, 2])
    permanent = [HabitatLoss(at=1.0, patches=hit, factor=0.3),
                 MortalityPulse(at=1.0, patches=hit, factor=0.1),
                 Harvest(at=1.0, patches=hit, rate=0.07)]
    temporary = [HabitatLoss(at=2.0, patches=hit, factor=0.7, duration=3.0),
                 MortalityPulse(at=2.0, patches=hit, factor=3.3, duration=3.0),
                 Harvest(at=2.0, patches=hit, rate=0.11, duration=3.0)]
    both = permanent + temporary
    k, m = ctx.model.params["capacity"], ctx.model.params["mortality"]
    during, after = params_after(both, ctx, system, 3.0), params_after(both, ctx, system, 6.0)
    np.testing.assert_allclose(during["capacity"][hit], k[hit] * 0.3 * 0.7, rtol=1e-15)
    np.testing.assert_allclose(during["mortality"][hit], m[hit] * 0.1 * 3.3 + 0.07 + 0.11,
                               rtol=1e-15)
    np.testing.assert_allclose(after["capacity"][hit], k[hit] * 0.3, rtol=1e-15)
    np.testing.assert_allclose(after["mortality"][hit], m[hit] * 0.1 + 0.07, rtol=1e-15)
    # consistency test: bit for bit the value before the temporary shock and the value of
    # the permanent shocks alone
    before = params_after(both, ctx, system, 1.5)
    alone = params_after(permanent, ctx, system, 6.0)
    for name in ("capacity", "mortality"):
        np.testing.assert_array_equal(after[name], before[name])
        np.testing.assert_array_equal(after[name], alone[name])
    assert after["capacity"][1] == k[1] and after["mortality"][1] == m[1]


def test_any_set_of_ended_shocks_leaves_the_unshocked_parameters(rng):
    # random overlapping pulses, harvests and habitat losses on random patches of random
    # rates: once the last has ended every parameter is the unshocked one, bit for bit
    n = 6
    land, net, system, ctx = chain_context(n, mortality=0.37, capacity=41.3)
    shocks = []
    for _ in range(12):
        at = float(rng.uniform(0.0, 5.0))
        duration = float(rng.uniform(0.1, 5.0))
        patches = rng.choice(n, int(rng.integers(1, n + 1)), replace=False)
        kind = rng.integers(3)
        if kind == 0:
            shocks.append(MortalityPulse(at=at, patches=patches,
                                         factor=float(rng.uniform(0.0, 4.0)),
                                         duration=duration))
        elif kind == 1:
            shocks.append(Harvest(at=at, patches=patches, rate=float(rng.uniform(0, 0.5)),
                                  species=str(rng.choice(["prey", "predator"])),
                                  duration=duration))
        else:
            shocks.append(HabitatLoss(at=at, patches=patches,
                                      factor=float(rng.uniform(0.05, 1.0)),
                                      duration=duration))
    end = params_after(shocks, ctx, system, 10.0)
    for name in ("capacity", "mortality"):
        np.testing.assert_array_equal(end[name], ctx.model.params[name])
    np.testing.assert_array_equal(end.get("prey_harvest", np.zeros(n)), 0.0)


def test_scalar_parameters_become_per_patch_where_a_shock_acts():
    # a model given one value for every patch: a shock of one patch leaves the others alone
    values = {k: float(v[0]) for k, v in make_model(1).params.items()}
    model = ts.LocalModel(growth="logistic", response="holling2", params=values)
    zero = sp.csr_array((3, 3))
    system = CoupledSystem(model=model, area_km2=np.ones(3), prey_movement=zero,
                           predator_movement=zero)
    ctx = ShockContext(network=None, dispersal={}, survival_per_km=1.0, model=model)
    shocks = [MortalityPulse(at=1.0, patches=np.array([1]), factor=2.0, duration=1.0)]
    mid = params_after(shocks, ctx, system, 1.0)
    m = values["mortality"]
    np.testing.assert_array_equal(mid["mortality"], [m, 2.0 * m, m])
    np.testing.assert_array_equal(mid["capacity"], np.full(3, values["capacity"]))
    np.testing.assert_array_equal(params_after(shocks, ctx, system, 2.0)["mortality"], m)


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
