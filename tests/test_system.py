"""The coupled system: Jacobian, dispersal, conservation, synchronous state."""

import itertools

import numpy as np
import pytest
import scipy.linalg as sl
import scipy.sparse as sp

from trophoscape.model.dynamics import GROWTH_FORMS, RESPONSES
from trophoscape.integrate.ode import simulate

from conftest import make_model, make_system


def random_operator(rng, n, rate, density=0.3, survival=1.0):
    """A movement operator built by the rule of SCENARIO.md, written densely for a check."""
    w = rng.uniform(0.1, 1.0, (n, n)) * (rng.uniform(size=(n, n)) < density)
    np.fill_diagonal(w, 0.0)
    m = np.zeros((n, n))
    out = w.sum(axis=1)
    for i in range(n):  # dense reference, not on a hot path
        if out[i] > 0:
            m[:, i] += rate * w[i] / out[i] * survival
            m[i, i] -= rate
    return sp.csr_array(m)


@pytest.mark.parametrize("growth,response", list(itertools.product(GROWTH_FORMS, RESPONSES)))
def test_analytic_jacobian_matches_finite_differences(rng, growth, response):
    n = 7
    model = make_model(n=n, growth=growth, response=response, interference=0.3,
                       allee_density=4.0, capacity=40.0)
    system = make_system(model, area=rng.uniform(0.5, 3.0, n),
                         prey_movement=random_operator(rng, n, 0.3),
                         predator_movement=random_operator(rng, n, 0.1, survival=0.9))
    rhs, jac = system.rhs_function(), system.jacobian_function()
    y = rng.uniform(1.0, 30.0, 2 * n)
    analytic = jac(0.0, y).toarray()
    numeric = np.empty((2 * n, 2 * n))
    for k in range(2 * n):  # central differences, column by column (test only)
        h = 1e-6 * max(1.0, abs(y[k]))
        e = np.zeros(2 * n)
        e[k] = h
        numeric[:, k] = (rhs(0, y + e) - rhs(0, y - e)) / (2 * h)
    np.testing.assert_allclose(analytic, numeric, rtol=1e-6, atol=1e-7)
    # the sparsity pattern covers every non-zero
    pattern = system.jacobian_sparsity().toarray() != 0
    assert np.all(pattern[np.abs(analytic) > 0])


def dispersal_only(rng, n, survival=1.0):
    model = make_model(n=n, growth="exponential", growth_rate=0.0, mortality=0.0,
                       attack_rate=0.0)
    m_prey = random_operator(rng, n, 0.4, survival=survival)
    return make_system(model, prey_movement=m_prey, predator_movement=random_operator(rng, n, 0.2)), m_prey


def test_dispersal_only_equals_matrix_exponential(rng):
    # x(t) = expm(M t) x0 for the linear system x' = M x (scipy.linalg.expm as reference)
    n = 12
    system, m = dispersal_only(rng, n, survival=0.95)
    x0 = np.zeros(2 * n)
    x0[:n] = rng.uniform(0, 100, n)
    traj = simulate(system, x0, duration=5.0, census_interval=0.5, method="DOP853",
                    rtol=1e-11, atol=1e-12, extinction_abundance=0.0)
    for k, t in enumerate(traj.time):
        exact = sl.expm(m.toarray() * t) @ x0[:n]
        np.testing.assert_allclose(traj["prey"].values[k], exact, rtol=1e-8, atol=1e-9)


def test_dispersal_conserves_total_with_full_survival(rng):
    # with survival 1 the columns of M sum to zero: the regional total is constant (SCENARIO.md)
    n = 15
    system, m = dispersal_only(rng, n)
    # consistency test of the test's own operator (built by random_operator above), not of
    # trophoscape: its columns must sum to zero for the check below to mean anything
    np.testing.assert_allclose(np.asarray(m.sum(axis=0)).ravel(), 0.0, atol=1e-14)
    x0 = np.concatenate([rng.uniform(0, 100, n), rng.uniform(0, 10, n)])
    traj = simulate(system, x0, duration=20.0, census_interval=1.0, method="RK45",
                    rtol=1e-10, atol=1e-10, extinction_abundance=0.0)
    total = traj["prey"].values.sum(axis=1)
    np.testing.assert_allclose(total, total[0], rtol=1e-9)


def test_identical_linked_patches_stay_in_step():
    # the synchronous state is invariant under symmetric coupling (Pecora & Carroll 1998,
    # Phys. Rev. Lett. 80:2109, from memory): two identical patches started alike stay alike
    model = make_model(n=2, growth="logistic", response="holling2", capacity=80.0,
                       attack_rate=0.5, handling_time=0.3, conversion=0.4, mortality=0.3)
    link = sp.csr_array(np.array([[-0.2, 0.2], [0.2, -0.2]]))
    system = make_system(model, area=[2.0, 2.0], prey_movement=link, predator_movement=link * 0.5)
    traj = simulate(system, np.array([50.0, 50.0, 4.0, 4.0]), duration=200.0,
                    census_interval=0.5, rtol=1e-8, atol=1e-10, extinction_abundance=0.0)
    prey = traj["prey"].values
    assert np.ptp(prey[traj.time > 50, 0]) > 10  # it oscillates
    np.testing.assert_allclose(prey[:, 0], prey[:, 1], rtol=1e-9)
    from trophoscape.analysis.synchrony import synchrony_table

    table, summary = synchrony_table(traj, burn_in=50.0, source=np.array([0]),
                                     target=np.array([1]),
                                     weights={"prey": np.ones(1), "predator": np.ones(1)})
    assert summary["prey_synchrony"] == pytest.approx(1.0, abs=1e-9)
    np.testing.assert_allclose(table["prey_sync_local"], 1.0, atol=1e-9)


def test_sub_threshold_sink_is_left_alone_and_removals_restart_cheaply(rng):
    # A sink patch where immigrant predators die fast stays below one individual: it never
    # falls through the threshold from above, so the rule leaves it alone (before, a census
    # zeroed it at every step). A step with removals is taken again over the region around
    # them and the solver restarts at the step's end with the step size already reached: at
    # most one restart per removal, and about one step's evaluations per removal, not a
    # fresh step-size search (consistency test of the solver budget).
    n = 30
    model = make_model(n=n, growth="logistic", response="holling2", capacity=60.0,
                       attack_rate=0.3, handling_time=0.1, conversion=0.3, mortality=0.4)
    model.params["mortality"][5] = 200.0
    link = random_operator(rng, n, 0.05, density=0.5)
    system = make_system(model, area=np.full(n, 2.0), prey_movement=link, predator_movement=link)
    y0 = np.concatenate([np.full(n, 80.0), np.full(n, 4.0)])
    y0[n + 5] = 0.0
    free = simulate(system, y0, duration=100, census_interval=0.5, extinction_abundance=0.0)
    ruled = simulate(system, y0, duration=100, census_interval=0.5, extinction_abundance=1.0)
    assert free.stats.restarts == 0
    sink = ruled["predator"].values[:, 5]
    assert np.all(sink < 1.0) and sink[-1] > 0  # fed, below the threshold, never cut
    assert 0 < ruled.stats.restarts <= sum(ruled.stats.removals)
    # (the region's evaluations counted in whole-network evaluations)
    assert ruled.stats.nfev <= free.stats.nfev + 10 * sum(ruled.stats.removals) + 2


def test_with_model_shares_the_network_and_gives_the_rebuilt_rhs(rng):
    # swapping the local model (as noise and shocks do each interval) must not rebuild the
    # movement operator, and must give the same dy/dt as a system built from scratch
    n = 12
    model = make_model(n=n, capacity=60.0, attack_rate=0.3)
    link = random_operator(rng, n, 0.1, density=0.5)
    system = make_system(model, area=rng.uniform(0.5, 2.0, n), prey_movement=link,
                         predator_movement=link * 0.5)
    params = dict(model.params, growth_rate=model.params["growth_rate"] * rng.uniform(0.5, 2, n))
    other = type(model)(growth=model.growth, response=model.response, params=params)
    swapped = system.with_model(other)
    assert swapped.movement is system.movement
    assert swapped.model is other and system.model is model
    rebuilt = make_system(other, area=system.area_km2, prey_movement=link,
                          predator_movement=link * 0.5)
    y = rng.uniform(0.0, 50.0, 2 * n)
    np.testing.assert_array_equal(swapped.rhs_function()(0.0, y), rebuilt.rhs_function()(0.0, y))
    with pytest.raises(ValueError, match="shape"):
        system.with_model(make_model(n=n + 1))


def test_float32_storage_records_the_float64_run_rounded(rng):
    # the state is integrated in float64 whatever the storage type: a float32 record is the
    # float64 record rounded once (IEEE 754 round to nearest), not a float32 integration
    n = 8
    model = make_model(n=n, capacity=80.0, attack_rate=0.5, handling_time=0.3)
    link = random_operator(rng, n, 0.2, density=0.5)
    system = make_system(model, area=np.full(n, 2.0), prey_movement=link, predator_movement=link)
    y0 = np.concatenate([rng.uniform(20, 80, n), rng.uniform(1, 5, n)])
    runs = {dt: simulate(system, y0, duration=30.0, census_interval=0.5, dtype=dt)
            for dt in (np.float64, np.float32)}
    for species in ("prey", "predator"):
        wide, narrow = runs[np.float64][species].values, runs[np.float32][species].values
        assert narrow.dtype == np.float32 and narrow.flags.c_contiguous
        np.testing.assert_array_equal(narrow, wide.astype(np.float32))
    assert runs[np.float32].stats == runs[np.float64].stats


def test_finished_solvers_are_freed_at_once(rng, monkeypatch):
    # scipy's solvers hold closures over themselves (a reference cycle); with the cyclic
    # garbage collector off, a run with a restart at every census (here: an event that
    # changes nothing, every 0.5) must still free each finished solver (and its stage
    # arrays) as soon as the next one starts
    import gc
    import weakref

    import scipy.integrate as si

    import trophoscape.integrate.ode as simulate_module

    alive = []

    class Counted(si.RK45):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            alive.append(weakref.ref(self))

    monkeypatch.setitem(simulate_module.METHODS, "RK45", Counted)
    n = 30
    model = make_model(n=n, growth="logistic", response="holling2", capacity=60.0,
                       attack_rate=0.3, handling_time=0.1, conversion=0.3, mortality=0.4)
    link = random_operator(rng, n, 0.05, density=0.5)
    system = make_system(model, area=np.full(n, 2.0), prey_movement=link, predator_movement=link)
    y0 = np.concatenate([np.full(n, 80.0), np.full(n, 4.0)])
    gc.disable()
    try:
        from trophoscape.model.shocks import StateScale

        events = [StateScale(t, "prey", np.array([0]), 1.0) for t in np.arange(0.5, 20, 0.5)]
        traj = simulate(system, y0, duration=20, census_interval=0.5, method="RK45",
                        events=events)
        assert traj.stats.restarts >= 30 and len(alive) == traj.stats.restarts + 1
        assert sum(r() is not None for r in alive) <= 1
    finally:
        gc.enable()
