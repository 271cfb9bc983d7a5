"""Many quasi-extinctions close together, against scipy's event location.

The reference is ``scipy.integrate.solve_ivp`` (DOP853, tolerances 1e-12) with one terminal
event per component (the population falling through the threshold), restarted at each event
with that component set to zero: scipy's documented event location, one removal at a time.
A population at zero that regrows from immigrants stays below the threshold in these
networks, so it never falls through it again (the armed rule of :mod:`trophoscape.integrate.ode`
then agrees with scipy's event direction).

These networks crash as a whole, so neighbouring populations cross within one solver step of
each other: the case where a removal changes the course of the next one.
"""

import numpy as np
import pytest
import scipy.integrate as si
import scipy.sparse as sp

from conftest import make_model, make_system
from trophoscape.integrate.ode import simulate
from trophoscape.model.system import CoupledSystem

LEVEL = 1.0


def _scipy_removals(system, y0, duration, times):
    """The state at ``times`` and the crossings ``(time, component)``, by scipy."""
    rhs = system.rhs_function()

    def falls(i):
        def event(t, y):
            return y[i] - LEVEL
        event.terminal, event.direction = True, -1
        return event

    events = [falls(i) for i in range(y0.size)]
    out = np.full((times.size, y0.size), np.nan)
    crossings = []
    t0, y = 0.0, y0.copy()
    while True:
        sol = si.solve_ivp(rhs, (t0, duration), y, method="DOP853", rtol=1e-12, atol=1e-12,
                           events=events, dense_output=True)
        assert sol.status in (0, 1)
        stop = sol.t[-1]
        inside = (times >= t0) & ((times < stop) if sol.status == 1 else (times <= stop))
        if inside.any():
            out[inside] = sol.sol(times[inside]).T
        if sol.status == 0:
            return out, crossings
        i = min((i for i in range(y0.size) if sol.t_events[i].size),
                key=lambda i: sol.t_events[i][0])
        t0 = float(sol.t_events[i][0])
        y = sol.y_events[i][0].copy()
        crossings.append((t0, i))
        y[i] = 0.0


def _links(n, seed, rate):
    """A random sparse network: each patch sends ``rate`` per capita, shared among its
    neighbours (columns sum to zero where a patch has neighbours)."""
    rng = np.random.default_rng(seed)
    a = np.triu((rng.random((n, n)) < 3.0 / n).astype(float), 1)
    a = a + a.T
    degree = a.sum(axis=0)
    movement = rate * a / np.where(degree > 0, degree, 1.0)
    movement -= np.diag(rate * (degree > 0))
    return sp.csr_array(movement)


def _declining_network():
    """30 predator populations without prey, dying at different rates, linked."""
    n = 30
    rng = np.random.default_rng(1)
    model = make_model(n=n, growth="exponential", growth_rate=0.0)
    model.params["mortality"][:] = rng.uniform(0.2, 1.0, n)
    system = make_system(model, predator_movement=_links(n, 2, 0.5))
    y0 = np.concatenate([np.zeros(n), rng.uniform(5.0, 50.0, n)])
    return system, y0, 12.0


def _crashing_network(predator_rate=0.3):
    """16 patches of prey and predators (Rosenzweig–MacArthur) started with many predators,
    so that prey crash through the threshold, then predators starve through it, at nearby
    times in linked patches; both species disperse."""
    n = 16
    rng = np.random.default_rng(3)
    model = make_model(n=n, capacity=40.0)
    area = rng.uniform(0.5, 2.0, n)
    system = make_system(model, area=area, prey_movement=_links(n, 4, 0.05),
                         predator_movement=_links(n, 5, predator_rate))
    y0 = np.concatenate([rng.uniform(3.0, 8.0, n), rng.uniform(40.0, 80.0, n)])
    return system, y0, 10.0


@pytest.mark.parametrize("network", [_declining_network, _crashing_network])
@pytest.mark.parametrize("method", ["RK45", "DOP853", "RK23"])
def test_nearby_removals_match_scipys_event_restarts(network, method):
    system, y0, duration = network()
    times = np.linspace(0.0, duration, 41)
    reference, crossings = _scipy_removals(system, y0, duration, times)
    assert len(crossings) >= 12  # the case meant: many removals, close together
    gaps = np.diff(sorted(t for t, _ in crossings))
    assert np.min(gaps) < 0.05
    run = simulate(system, y0, duration=duration, census_interval=duration / 40,
                   extinction_abundance=LEVEL, method=method, rtol=1e-6, atol=1e-8)
    got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
    assert sum(run.stats.removals) == len(crossings)
    assert sum(run.stats.removed_individuals) == pytest.approx(len(crossings) * LEVEL,
                                                               rel=1e-6)
    # as close as the solver's tolerances allow: 1e-4 individuals (these populations hold
    # up to a few hundred individuals)
    assert np.max(np.abs(got - reference)) <= 1e-4


@pytest.mark.parametrize("network", [_declining_network, _crashing_network])
def test_nearby_removals_converge_as_tolerances_tighten(network):
    # consistency test across tolerances, with scipy's event restarts as the yardstick: a
    # tighter tolerance never takes the run further away, and a hundredfold tighter one
    # brings it at least 20 times closer. (Per decade the gain can be smaller: at rtol 1e-7
    # the error of populations of 30 to 80 individuals is the solver's own, about 1e-6,
    # whatever the removals do.)
    system, y0, duration = network()
    times = np.linspace(0.0, duration, 41)
    reference, _ = _scipy_removals(system, y0, duration, times)
    errors = []
    for rtol in (1e-5, 1e-6, 1e-7):
        run = simulate(system, y0, duration=duration, census_interval=duration / 40,
                       extinction_abundance=LEVEL, rtol=rtol, atol=rtol * 1e-2)
        got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
        errors.append(float(np.max(np.abs(got - reference))))
    assert errors[1] <= errors[0] and errors[2] <= errors[1], errors
    assert errors[2] <= errors[0] / 20.0, errors


def _max_error(system, y0, duration, method, rtol, columns=None):
    times = np.linspace(0.0, duration, 41)
    reference, crossings = _scipy_removals(system, y0, duration, times)
    run = simulate(system, y0, duration=duration, census_interval=duration / 40,
                   extinction_abundance=LEVEL, method=method, rtol=rtol, atol=rtol * 1e-2)
    got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
    keep = slice(None) if columns is None else columns
    assert sum(run.stats.removals) == len(crossings)
    return float(np.max(np.abs(got[:, keep] - reference[:, keep])))


@pytest.mark.parametrize("method", ["RK45", "DOP853"])
def test_a_removal_changes_the_other_species_of_a_patch_that_loses_one_later(method):
    # Prey in patch A decline (3 -> 1 at rate 1) and send 0.5 per capita to patch B's prey;
    # B's predators die out at rate 1.5 and cross the threshold 0.02 later. A's removal stops
    # the immigrants to B's prey from then on, before B's own removal: B's prey must show it
    # (scipy's event restarts as the reference; from a review of a batching prototype,
    # which lost it)
    model = make_model(n=2, growth="exponential", growth_rate=0.0, attack_rate=0.0)
    model.params["growth_rate"][:] = [-1.0, 0.0]
    model.params["mortality"][:] = [0.0, 1.5]
    movement = sp.csr_array(np.array([[-0.5, 0.0], [0.5, 0.0]]))
    system = make_system(model, prey_movement=movement)
    y0 = np.array([3.0, 50.0, 0.0, 3.1])
    assert _max_error(system, y0, 2.0, method, 1e-6) <= 1e-4
    assert _max_error(system, y0, 2.0, method, 1e-9) <= 1e-6


@pytest.mark.parametrize("method, rate", [("DOP853", 3.0), ("RK45", 10.0)])
def test_removals_in_a_crash_with_fast_dispersal(method, rate):
    # predators moving 10 to 30 times faster than in the crashing network: neighbours'
    # removals change each other within one solver step (scipy's event restarts as the
    # reference)
    system, y0, duration = _crashing_network(predator_rate=rate)
    assert _max_error(system, y0, duration, method, 1e-6) <= 1e-4


@pytest.mark.parametrize("method", ["RK45", "DOP853"])
def test_a_large_patch_elsewhere_does_not_change_the_removals(method):
    # the crashing network beside one unlinked patch of 1e8 prey: its size must not change
    # the accuracy of what happens in the others (scipy's event restarts as the reference)
    system, y0, duration = _crashing_network()
    n = system.n_patches
    model = make_model(n=n + 1, capacity=40.0)
    area = np.append(system.area_km2, 1e8 / 40.0)
    empty = sp.csr_array((1, 1))
    big = make_system(model, area=area,
                      prey_movement=sp.csr_array(sp.block_diag([system.prey_movement, empty])),
                      predator_movement=sp.csr_array(sp.block_diag([system.predator_movement,
                                                                    empty])))
    z0 = np.concatenate([y0[:n], [1e8], y0[n:], [0.0]])
    network = np.r_[0:n, n + 1:2 * n + 1]
    assert _max_error(big, z0, duration, method, 1e-6, columns=network) <= 1e-4


@pytest.mark.parametrize("setting", [{"GROW": 0.0}, {"WHOLE": 0.0}, {"ROUNDS": 0}])
def test_the_region_taken_again_does_not_change_the_removals(monkeypatch, setting):
    # A step with removals is taken again over a region around them
    # (trophoscape.integrate.retake); here the region grows at any change outside it, or is the
    # whole network at once, and the result still meets scipy's event restarts.
    from trophoscape.integrate import retake

    for name, value in setting.items():
        monkeypatch.setattr(retake, name, value)
    system, y0, duration = _crashing_network()
    assert _max_error(system, y0, duration, "RK45", 1e-6) <= 1e-4


def _side_by_side(copies):
    """``copies`` unlinked copies of the crashing network, each started from other numbers
    of predators, as one system; and each copy's system and start."""
    system, y0, duration = _crashing_network()
    n = system.n_patches
    starts = [np.concatenate([y0[:n], y0[n:] * (1.0 + 0.1 * c)]) for c in range(copies)]
    model = make_model(n=copies * n, capacity=40.0)
    big = make_system(model, area=np.tile(system.area_km2, copies),
                      prey_movement=sp.csr_array(sp.block_diag([system.prey_movement] * copies)),
                      predator_movement=sp.csr_array(
                          sp.block_diag([system.predator_movement] * copies)))
    z0 = np.concatenate([np.concatenate([s[:n] for s in starts]),
                         np.concatenate([s[n:] for s in starts])])
    return big, z0, system, starts, duration


@pytest.mark.parametrize("variant", [None, "compiled", "spared"])
def test_networks_side_by_side_each_meet_scipys_event_restarts(monkeypatch, variant):
    # Three unlinked networks in one run crash at different times, so a solver step holds
    # removals in several of them: each is taken again with its own clock and step size, and
    # each must meet scipy's event restarts of that network alone (also by the other paths
    # of the step taken again, see _as below).
    big, z0, system, starts, duration = _side_by_side(3)
    n = system.n_patches
    times = np.linspace(0.0, duration, 41)
    run = simulate(_as(big, variant, monkeypatch), z0, duration=duration,
                   census_interval=duration / 40, extinction_abundance=LEVEL, rtol=1e-6,
                   atol=1e-8)
    total = 0
    for c, start in enumerate(starts):
        reference, crossings = _scipy_removals(system, start, duration, times)
        total += len(crossings)
        got = np.concatenate([run["prey"].values[:, c * n:(c + 1) * n],
                              run["predator"].values[:, c * n:(c + 1) * n]], axis=1)
        assert np.max(np.abs(got - reference)) <= 1e-4
    assert sum(run.stats.removals) == total


def test_removals_do_not_depend_on_patch_order():
    # consistency test: the side-by-side networks numbered in a random order give the same
    # removals and the same course per patch
    big, z0, *_ , duration = _side_by_side(3)
    n = big.n_patches
    perm = np.random.default_rng(7).permutation(n)
    shuffled = CoupledSystem(model=big.model, area_km2=big.area_km2,
                             prey_movement=big.prey_movement,
                             predator_movement=big.predator_movement, order=perm)
    runs = [simulate(s, z0, duration=duration, census_interval=duration / 40,
                     extinction_abundance=LEVEL, rtol=1e-6, atol=1e-8) for s in (big, shuffled)]
    assert runs[0].stats.removals == runs[1].stats.removals
    for name in ("prey", "predator"):
        assert np.max(np.abs(runs[0][name].values - runs[1][name].values)) <= 1e-5


def test_an_undefined_error_estimate_stops_the_run_with_a_run_error():
    # robustness (from a review): with atol = 0 a removed population has no error scale, the
    # regional step's error is 0/0; the run must stop with a RunError, not loop on NaN
    from trophoscape.errors import RunError

    model = make_model(n=2, growth="exponential", growth_rate=0.0)
    model.params["growth_rate"][:] = [0.5, 0.5]
    model.params["mortality"][:] = [1.0, 0.3]
    system = make_system(model, predator_movement=sp.csr_array(np.array([[-0.1, 0.1],
                                                                         [0.1, -0.1]])))
    with pytest.raises(RunError, match="not a number"):
        simulate(system, np.array([5.0, 5.0, 3.0, 30.0]), duration=3.0, census_interval=0.5,
                 extinction_abundance=LEVEL, rtol=1e-6, atol=0.0)


def test_many_census_times_within_steps_with_removals():
    # a census every 0.01 puts many census times inside each solver step with removals:
    # every one must meet scipy's event restarts, and the times shared with a census every
    # 0.25 must be the same numbers (a consistency test: the census only records)
    system, y0, duration = _crashing_network()
    fine = np.linspace(0.0, duration, 1001)
    reference, crossings = _scipy_removals(system, y0, duration, fine)
    runs = [simulate(system, y0, duration=duration, census_interval=interval,
                     extinction_abundance=LEVEL, rtol=1e-6, atol=1e-8)
            for interval in (duration / 1000, duration / 40)]
    got = np.concatenate([runs[0]["prey"].values, runs[0]["predator"].values], axis=1)
    assert sum(runs[0].stats.removals) == len(crossings)
    assert np.max(np.abs(got - reference)) <= 1e-4
    coarse = np.concatenate([runs[1]["prey"].values, runs[1]["predator"].values], axis=1)
    assert np.max(np.abs(got[::25] - coarse)) <= 1e-9


# --- The same references, by the other paths of the step taken again ------------------------
# "compiled": the regions' groups integrated by trophoscape.integrate.compiled (numba), which
# the compiled local terms bring with them (networks of 10,000 patches and more by default).
# "spared": whole-network steps that leave their few slowest patches to the regions
# (ode.SPARE_SHARE, from 1,000 patches by default), here forced on these small networks.


def _as(system, variant, monkeypatch):
    """``system`` for ``variant`` ("compiled" or "spared"; see above; None: as it is)."""
    if variant is None:
        return system
    if variant == "spared":
        from trophoscape.integrate import ode

        # a fifth of the patches may miss the tolerance in a whole-network step
        monkeypatch.setattr(ode, "SPARE_SHARE", 0.2)
        return system
    pytest.importorskip("numba", reason="numba is not installed")
    return CoupledSystem(model=system.model, area_km2=system.area_km2,
                         prey_movement=system.prey_movement,
                         predator_movement=system.predator_movement, local_terms="compiled")


VARIANTS = ["compiled", "spared"]


@pytest.mark.parametrize("variant", VARIANTS)
@pytest.mark.parametrize("network", [_declining_network, _crashing_network])
@pytest.mark.parametrize("method", ["RK45", "DOP853"])
def test_other_paths_match_scipys_event_restarts(monkeypatch, variant, network, method):
    # scipy's event restarts (DOP853, 1e-12) as the reference, as above
    system, y0, duration = network()
    times = np.linspace(0.0, duration, 41)
    reference, crossings = _scipy_removals(system, y0, duration, times)
    run = simulate(_as(system, variant, monkeypatch), y0, duration=duration,
                   census_interval=duration / 40, extinction_abundance=LEVEL, method=method,
                   rtol=1e-6, atol=1e-8)
    got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
    assert sum(run.stats.removals) == len(crossings)
    assert np.max(np.abs(got - reference)) <= 1e-4


@pytest.mark.parametrize("variant", VARIANTS)
def test_other_paths_with_fast_dispersal_and_a_fine_census(monkeypatch, variant):
    # the fast-dispersal crash and a census every 0.01 (census times inside the steps taken
    # again), against scipy's event restarts
    system, y0, duration = _crashing_network(predator_rate=3.0)
    fine = np.linspace(0.0, duration, 1001)
    reference, crossings = _scipy_removals(system, y0, duration, fine)
    run = simulate(_as(system, variant, monkeypatch), y0, duration=duration,
                   census_interval=duration / 1000, extinction_abundance=LEVEL, rtol=1e-6,
                   atol=1e-8)
    got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
    assert sum(run.stats.removals) == len(crossings)
    assert np.max(np.abs(got - reference)) <= 1e-4


def test_the_other_species_case_by_the_compiled_path(monkeypatch):
    # the two-patch case above (a removal in A changes B's prey before B's own removal)
    model = make_model(n=2, growth="exponential", growth_rate=0.0, attack_rate=0.0)
    model.params["growth_rate"][:] = [-1.0, 0.0]
    model.params["mortality"][:] = [0.0, 1.5]
    movement = sp.csr_array(np.array([[-0.5, 0.0], [0.5, 0.0]]))
    system = _as(make_system(model, prey_movement=movement), "compiled", monkeypatch)
    y0 = np.array([3.0, 50.0, 0.0, 3.1])
    assert _max_error(system, y0, 2.0, "RK45", 1e-6) <= 1e-4
    assert _max_error(system, y0, 2.0, "RK45", 1e-9) <= 1e-6


def test_spared_patches_without_removals_meet_scipy(monkeypatch):
    # with the rule off (threshold 0), the only steps taken again are those that left patches
    # over the tolerance: the run must still meet scipy's solve_ivp (DOP853, 1e-12), and
    # converge as the tolerance tightens
    from trophoscape.integrate import ode

    system, y0, duration = _crashing_network(predator_rate=3.0)
    times = np.linspace(0.0, duration, 41)
    reference = si.solve_ivp(system.rhs_function(), (0.0, duration), y0, method="DOP853",
                             rtol=1e-12, atol=1e-12, t_eval=times).y.T
    monkeypatch.setattr(ode, "SPARE_SHARE", 0.2)
    errors = []
    for rtol in (1e-6, 1e-8):
        run = simulate(system, y0, duration=duration, census_interval=duration / 40,
                       extinction_abundance=0.0, rtol=rtol, atol=rtol * 1e-2)
        assert run.stats.restarts > 0  # steps were taken again over spared patches
        got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
        errors.append(np.max(np.abs(got - reference)))
    assert errors[0] <= 1e-4
    assert errors[1] <= errors[0] / 20


def test_compiled_and_numpy_regions_agree(monkeypatch):
    # consistency test: the compiled and the numpy integration of the regions take the same
    # removals and agree within the tolerance (their sums are taken in other orders, and
    # rounding grows through a crash like any difference; tests/test_compiled.py)
    big, z0, *_, duration = _side_by_side(3)
    runs = [simulate(s, z0, duration=duration, census_interval=duration / 40,
                     extinction_abundance=LEVEL, rtol=1e-6, atol=1e-8)
            for s in (big, _as(big, "compiled", monkeypatch))]
    assert runs[0].stats.removals == runs[1].stats.removals
    for name in ("prey", "predator"):
        want = runs[0][name].values
        assert np.max(np.abs(runs[1][name].values - want) / (1e-8 + 1e-6 * np.abs(want))) <= 2.0


def test_links_stored_with_a_zero_rate_are_no_links(monkeypatch):
    # (from a review) a movement operator may store arcs with a zero rate (no individual
    # arrives alive: survival_per_km = 0); the regions' groups know no such link, and the
    # compiled path read another group's values through them. Both paths must meet scipy's
    # event restarts (here: unlinked declining predators).
    from trophoscape.model.network import build_network, movement_operator
    from trophoscape.testing import grid_landscape

    land = grid_landscape(4, 4, spacing_km=1.0, size_km=0.5)
    movement = movement_operator(build_network(land, kernel="exponential",
                                               max_distance_km=1.6),
                                 emigration_rate=0.3, scale_km=1.0, survival_per_km=0.0)
    assert (movement.data == 0).sum() > 0  # zeros stored
    n = movement.shape[0]
    model = make_model(n=n, growth="exponential", growth_rate=0.0)
    model.params["mortality"][:] = np.linspace(0.3, 1.0, n)
    y0 = np.concatenate([np.zeros(n), np.linspace(5.0, 40.0, n)])
    system = CoupledSystem(model=model, area_km2=np.ones(n), prey_movement=movement,
                           predator_movement=movement)
    times = np.linspace(0.0, 6.0, 13)
    reference, crossings = _scipy_removals(system, y0, 6.0, times)
    for variant in (None, "compiled"):
        s = system if variant is None else _as(system, variant, monkeypatch)
        run = simulate(s, y0, duration=6.0, census_interval=0.5, extinction_abundance=LEVEL)
        got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
        assert sum(run.stats.removals) == len(crossings)
        assert np.max(np.abs(got - reference)) <= 1e-4


def _refusals(monkeypatch):
    """Record whether each step taken again was refused (True) or taken (False)."""
    from trophoscape.integrate import retake

    outcomes = []
    original = retake.StepRetaker.retake

    def spy(self, *args, **kwargs):
        out = original(self, *args, **kwargs)
        outcomes.append(out is None)
        return out

    monkeypatch.setattr(retake.StepRetaker, "retake", spy)
    return outcomes


@pytest.mark.parametrize("method", ["RK45", "DOP853"])
def test_a_step_whose_region_would_be_most_of_the_network_is_taken_shorter(monkeypatch,
                                                                           method):
    # From ode.REFUSE_MIN_PATCHES patches on, a step whose region of removals grows to most
    # of the network (retake.WHOLE) from more than one patch is refused and taken again at
    # half the length: on a network mostly in one piece, the whole network would be one
    # group whose every removal cuts its steps (DOP853's long steps at 100,000 patches never
    # finished). Here the threshold is lowered so that the 16-patch crash meets it; the
    # result must still meet scipy's event restarts, with every removal, some steps must
    # have been refused, and refused steps are not restarts (at most one per removal).
    from trophoscape.integrate import ode

    monkeypatch.setattr(ode, "REFUSE_MIN_PATCHES", 16)
    outcomes = _refusals(monkeypatch)
    system, y0, duration = _crashing_network()
    times = np.linspace(0.0, duration, 41)
    reference, crossings = _scipy_removals(system, y0, duration, times)
    run = simulate(system, y0, duration=duration, census_interval=duration / 40,
                   extinction_abundance=LEVEL, method=method, rtol=1e-6, atol=1e-8)
    got = np.concatenate([run["prey"].values, run["predator"].values], axis=1)
    assert any(outcomes) and not all(outcomes)
    assert sum(run.stats.removals) == len(crossings)
    assert run.stats.restarts <= len(crossings)
    assert np.max(np.abs(got - reference)) <= 1e-4


def test_removals_at_the_same_moment_everywhere_are_not_refused_for_ever(monkeypatch):
    # 1,000 identical patches on a ring (every patch sends as much as it receives) crash at
    # the same moment, so every step holding that moment has a region of the whole network
    # however short it is: the step is refused at most ode.MAX_REFUSALS times in a row, then
    # taken over the whole network (without the cap the run never ended). Each patch then
    # follows the lone patch, whose removals scipy's event restarts give.
    from trophoscape.integrate import ode

    outcomes = _refusals(monkeypatch)
    n = 1000
    i, j = np.arange(n), (np.arange(n) + 1) % n
    ring = np.zeros((n, n))
    ring[i, j] = ring[j, i] = 0.15
    ring[i, i] = -0.3
    system = make_system(make_model(n=n, capacity=40.0),
                         prey_movement=sp.csr_array(0.1 * ring),
                         predator_movement=sp.csr_array(ring))
    y0 = np.concatenate([np.full(n, 5.0), np.full(n, 60.0)])
    lone, lone_y0 = make_system(make_model(n=1, capacity=40.0)), np.array([5.0, 60.0])
    duration = 10.0
    times = np.linspace(0.0, duration, 21)
    reference, crossings = _scipy_removals(lone, lone_y0, duration, times)
    assert len(crossings) >= 1
    run = simulate(system, y0, duration=duration, census_interval=duration / 20,
                   extinction_abundance=LEVEL, rtol=1e-6, atol=1e-8)
    in_a_row = max(len(r) for r in "".join("x" if o else "." for o in outcomes).split("."))
    assert 1 <= in_a_row <= ode.MAX_REFUSALS
    assert sum(run.stats.removals) == n * len(crossings)
    for s, name in enumerate(("prey", "predator")):
        assert np.max(np.abs(run[name].values - reference[:, [s]])) <= 1e-4
