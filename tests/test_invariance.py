"""Results that must not depend on numerical settings: error control, census interval.

The per-patch error control and the quasi-extinction rule of :mod:`trophoscape.integrate.ode`
are checked against runs of scipy's own DOP853 (``scipy.integrate.solve_ivp``, a reference
library) at tight tolerances, and against runs of the same patch alone.
"""

import numpy as np
import pytest
import scipy.integrate as si
import scipy.sparse as sp
from scipy.optimize import brentq

from conftest import make_model, make_system
from trophoscape.integrate.replicates import stack_state, stack_system
from trophoscape.integrate.ode import simulate

# Rosenzweig-MacArthur with the defaults of conftest (r = 1, a = 1, h = 0.2, e = 0.4,
# m = 0.5): N* = m / (a (e - m h)) = 5/3 and the Hopf threshold K_H = 2 N* + 1/(a h) = 8.33
# (Rosenzweig 1971, Science 171:385; from memory): K = 30 cycles deeply, K = 5 settles.
CYCLING_K = 30.0


def _mixed_system(quiet: int):
    """Patch 0 cycles; ``quiet`` more patches sit at a steady state (prey at K, no predator)."""
    n = quiet + 1
    model = make_model(n=n, capacity=CYCLING_K)
    y0 = np.concatenate([np.full(n, CYCLING_K), np.zeros(n)])
    y0[0], y0[n] = 4.0, 1.0
    return make_system(model), y0


def _reference(duration, times):
    """The cycling patch alone by scipy's DOP853 at tight tolerances."""
    system, y0 = _mixed_system(0)
    sol = si.solve_ivp(system.rhs_function(), (0.0, duration), y0, method="DOP853",
                       rtol=1e-12, atol=1e-12, t_eval=times)
    assert sol.success
    return sol.y


def _relative_error(run, ref):
    """Largest deviation over the run, relative to the largest abundance, both species."""
    return max(np.max(np.abs(run[s] - ref[s])) / np.max(np.abs(ref[s])) for s in range(2))


@pytest.mark.parametrize("method", ["RK45", "DOP853", "RK23"])
@pytest.mark.parametrize("share", [0.0, None])
def test_one_cycling_patch_among_2000_quiet_ones_keeps_its_accuracy(monkeypatch, method, share):
    # A patch's accuracy must not depend on how many quiet patches share the system: with
    # scipy's RMS norm, 2,000 quiet patches let the cycling one drift by about 16 %.
    # share 0.0: no patch spared (ode.SPARE_SHARE), the quiet patches change nothing at all;
    # None: the default, where at 2,001 patches the cycling one is spared by the
    # whole-network steps and taken again over its region at its own step sizes.
    from trophoscape.integrate import ode

    if share is not None:
        monkeypatch.setattr(ode, "SPARE_SHARE", share)
    duration = 60.0
    lone_system, lone_y0 = _mixed_system(0)
    lone = simulate(lone_system, lone_y0, duration=duration, census_interval=0.5,
                    extinction_abundance=0.0, method=method)
    times = lone.time
    ref = _reference(duration, times)
    big_system, big_y0 = _mixed_system(2000)
    big = simulate(big_system, big_y0, duration=duration, census_interval=0.5,
                   extinction_abundance=0.0, method=method)
    lone_xy = [lone[s].values[:, 0] for s in ("prey", "predator")]
    big_xy = [big[s].values[:, 0] for s in ("prey", "predator")]
    assert np.ptp(ref[0][times > 20]) > 5.0  # it does cycle
    assert _relative_error(lone_xy, ref) < 0.01
    assert _relative_error(big_xy, ref) < 0.01
    if share == 0.0:
        # consistency test: the quiet patches add nothing to the error control at all
        assert big.stats.restarts == 0
        assert _relative_error(big_xy, lone_xy) < 1e-9
    else:
        # taken again at its own steps (by the Dormand–Prince pair, whatever the method), it
        # is as accurate against scipy as the patch alone, within a factor of 3 (measured:
        # 0.89 with RK45, 2.1 with DOP853, 0.81 with RK23)
        assert big.stats.restarts > 0
        assert _relative_error(big_xy, ref) <= 3.0 * _relative_error(lone_xy, ref)


def test_stock_rms_norm_would_dilute_the_error():
    # The failure the max norm prevents, shown with scipy's own RK45 (RMS norm): the test
    # above could fail. (Measured with scipy 1.17: 1.3e-5 alone, 1.5 % among 2,000.)
    duration = 60.0
    big_system, big_y0 = _mixed_system(2000)
    times = np.arange(0.0, duration + 0.25, 0.5)
    sol = si.solve_ivp(big_system.rhs_function(), (0.0, duration), big_y0, method="RK45",
                       rtol=1e-6, atol=1e-8, t_eval=times)
    n = 2001
    ref = _reference(duration, times)
    assert _relative_error([sol.y[0], sol.y[n]], ref) > 0.01


def test_a_stack_of_256_replicates_keeps_each_copys_accuracy():
    # 256 copies of (1 cycling + 7 quiet patches) as one block-diagonal system: each copy is
    # integrated as accurately as the 8-patch system alone (max norm over the stack).
    duration = 40.0
    system, y0 = _mixed_system(7)
    lone = simulate(system, y0, duration=duration, census_interval=0.5,
                    extinction_abundance=0.0)
    stacked = simulate(stack_system(system, 256), stack_state(y0, 256), duration=duration,
                       census_interval=0.5, extinction_abundance=0.0)
    ref = _reference(duration, lone.time)
    n = 8
    for r in (0, 255):
        copy = [stacked[s].values[:, r * n] for s in ("prey", "predator")]
        assert _relative_error(copy, ref) < 0.01
        # consistency test: identical copies take the lone system's steps exactly
        np.testing.assert_allclose(copy[0], lone["prey"].values[:, 0], rtol=1e-12)
    assert stacked.stats.steps == lone.stats.steps


# ------------------------------------------------------------ the quasi-extinction rule
def _source_and_sink():
    """Patch 0 a source at its steady state; patch 1 a good empty patch 5 km away.

    The source sends the sink a trickle of predators (a fraction of an individual per time
    unit); the sink has prey at capacity, where the predator grows (e f(K) > m).
    """
    model = make_model(n=2, capacity=5.0)  # below K_H: a stable coexistence point
    n_star = 0.5 / (1.0 * (0.4 - 0.5 * 0.2))
    p_star = 1.0 * (1 - n_star / 5.0) * (1 + 1.0 * 0.2 * n_star)  # (r/a)(1 - N*/K)(1 + a h N*)
    area = np.array([40.0, 40.0])
    trickle = 0.002  # per capita, per time unit, source to sink only
    predator = sp.csr_array(np.array([[0.0, 0.0], [trickle, 0.0]]))
    system = make_system(model, area=area, predator_movement=predator)
    y0 = np.array([n_star * 40.0, 5.0 * 40.0, p_star * 40.0, 0.0])
    return system, y0


@pytest.mark.parametrize("census", [0.1, 0.25, 0.5, 1.0, 2.0])
def test_trickle_fed_sink_fills_at_every_census_interval(census):
    # Before, a census zeroed the sink's few immigrants unless more than one individual
    # arrived within one census interval, so it filled only at long census intervals.
    system, y0 = _source_and_sink()
    duration = 60.0
    run = simulate(system, y0, duration=duration, census_interval=census,
                   extinction_abundance=1.0)
    # reference: scipy's DOP853 without any rule (the sink never falls through the threshold)
    sol = si.solve_ivp(system.rhs_function(), (0.0, duration), y0, method="DOP853",
                       rtol=1e-10, atol=1e-12)
    sink_ref = sol.y[3, -1]
    assert sink_ref > 10.0  # the sink fills
    assert run["predator"].values[-1, 1] == pytest.approx(sink_ref, rel=0.05)
    assert sum(run.stats.removals) == 0


def test_a_population_falling_through_the_threshold_is_removed_where_it_crosses():
    # Pure decay x' = -mu x from x0 crosses the threshold at t* = ln(x0 / theta) / mu
    # (common practice): the population must be removed then, whatever the census.
    model = make_model(n=1, growth="exponential", growth_rate=0.0)
    system = make_system(model)
    mu, x0, theta = 0.5, 50.0, 1.0
    y0 = np.array([0.0, x0])
    model.params["mortality"][:] = mu
    t_star = np.log(x0 / theta) / mu
    for census in (0.1, 0.7, 3.0):
        run = simulate(system, y0, duration=15.0, census_interval=census,
                       extinction_abundance=theta)
        p = run["predator"].values[:, 0]
        t = run.time
        np.testing.assert_allclose(p[t < t_star - 1e-6], x0 * np.exp(-mu * t[t < t_star - 1e-6]),
                                   rtol=1e-5)
        assert np.all(p[t > t_star + 1e-6] == 0.0)
        assert run.stats.removals == (0, 1)
        assert run.stats.removed_individuals[1] == pytest.approx(theta, rel=1e-6)


@pytest.mark.parametrize("method", ["RK45", "RK23", "DOP853"])
@pytest.mark.parametrize("atol", [1e-8, 1.0])
def test_a_population_that_rises_to_the_threshold_and_falls_back_is_removed(method, atol):
    # Patch 0 (X = 1000 predators, no prey) sends predators to patch 1 at rate c and loses
    # them at k; patch 1 loses them at mu. With a = k + c, patch 1 holds (common practice:
    # the linear two-compartment solution)
    #     x1(t) = c X / (mu - a) (exp(-a t) - exp(-mu t)),
    # which starts at 0, peaks at 1.2 individuals at t = ln(mu/a) / (mu - a) and falls
    # back through 1. Having reached the threshold it counts as present, so it is removed
    # where it falls through, at the later root t2 of x1 = 1, whichever solver takes the
    # steps, and even when a step spans the whole rise and fall (atol = 1 individual).
    # Refilled from 0 after t2 it peaks lower and stays below the threshold.
    a, mu, X = 0.5, 1.0, 1000.0
    c = 2.4 / X  # c X / (mu - a) * 0.25 = 1.2 at the peak
    model = make_model(n=2, growth="exponential", growth_rate=0.0)
    model.params["mortality"][:] = [a - c, mu]
    predator = sp.csr_array(np.array([[-c, 0.0], [c, 0.0]]))
    system = make_system(model, predator_movement=predator)
    y0 = np.array([0.0, 0.0, X, 0.0])

    def x1(t):
        return c * X / (mu - a) * (np.exp(-a * t) - np.exp(-mu * t))

    t_peak = np.log(mu / a) / (mu - a)
    t2 = float(brentq(lambda t: x1(t) - 1.0, t_peak, 20.0))
    run = simulate(system, y0, duration=10.0, census_interval=2.5, extinction_abundance=1.0,
                   method=method, rtol=1e-3 if atol == 1.0 else 1e-6, atol=atol)
    assert run.stats.removals == (0, 1)
    assert run.stats.removed_individuals[1] == pytest.approx(1.0, rel=1e-6)
    assert x1(t_peak) == pytest.approx(1.2, rel=1e-12) and 1.0 < t2 < 10.0


def test_a_removal_matches_scipys_terminal_event_and_restart():
    # Reference: scipy's solve_ivp with a terminal event where patch 0's predators fall to
    # the threshold, restarted from that state with patch 0 emptied (scipy's documented event
    # location). Patch 0 sends predators to patch 1 and receives some back, so the removal's
    # timing shows in both patches afterwards: what patch 1 received, and the immigrants
    # gathering again in patch 0 (below the threshold, so never removed again).
    model = make_model(n=2, growth="exponential", growth_rate=0.0)
    model.params["mortality"][:] = [0.6, 0.05]
    movement = sp.csr_array(np.array([[-0.3, 0.02], [0.3, -0.02]]))
    system = make_system(model, predator_movement=movement)
    y0 = np.array([0.0, 0.0, 40.0, 10.0])
    theta, duration = 1.0, 12.0
    rhs = system.rhs_function()

    def falls(t, y):
        return y[2] - theta
    falls.terminal, falls.direction = True, -1
    first = si.solve_ivp(rhs, (0.0, duration), y0, method="DOP853", rtol=1e-12, atol=1e-12,
                         events=falls, dense_output=True)
    t_cross = first.t_events[0][0]
    y_cross = first.y_events[0][0].copy()
    y_cross[2] = 0.0
    second = si.solve_ivp(rhs, (t_cross, duration), y_cross, method="DOP853", rtol=1e-12,
                          atol=1e-12)
    times = np.arange(0.0, duration + 1e-9, 0.5)
    run = simulate(system, y0, duration=duration, census_interval=0.5,
                   extinction_abundance=theta)
    assert run.stats.removals == (0, 1)
    got = run["predator"].values
    after = times > t_cross
    np.testing.assert_allclose(got[~after, 0], first.sol(times[~after])[2], rtol=1e-5)
    np.testing.assert_allclose(got[-1], second.y[2:, -1], rtol=1e-4)
    assert 0.0 < got[-1, 0] < theta  # immigrants gathering again, left alone


# ------------------------------------------------------------------ the demo, end to end
@pytest.fixture(scope="module")
def demo_scenario():
    from pathlib import Path

    from trophoscape.scenario import read_scenario

    return read_scenario(Path(__file__).parents[1] / "data" / "demo.toml")


def _demo_run(scenario, **changes):
    from trophoscape.workflows.study import build_study, run_study

    return run_study(build_study(scenario.with_values(**changes)))


PERSISTENCE_COLUMNS = ("persists", "occupancy", "extinctions", "recolonisations",
                       "last_extinction", "time_to_extinction")
SYNCHRONY_COLUMNS = ("sync_local", "sync_region", "sync_all", "phase_locking")


def test_demo_persistence_does_not_depend_on_the_census_interval(demo_scenario):
    # Regression guard: before, the predator's regional persistence on the demo was 0.540,
    # 0.627 and 0.987 at census intervals 0.1, 0.5 and 2 (consistency test across settings).
    runs = {c: _demo_run(demo_scenario, run__census_interval=c) for c in (0.1, 0.5, 2.0)}
    persistence = [r.summary["predator_regional_persistence"] for r in runs.values()]
    occupancy = [r.patches["predator_occupancy"].mean() for r in runs.values()]
    assert np.ptp(persistence) <= 0.02
    assert np.ptp(occupancy) <= 0.02
    # the integration itself is the same run: the census only records it
    removed = {r.summary["quasi_extinction"]["predator"]["removals"] for r in runs.values()}
    assert len(removed) == 1
    assert len({r.trajectory.stats.nfev for r in runs.values()}) == 1
    for r in runs.values():  # the rule did act: the demo loses and regains local populations
        assert r.summary["quasi_extinction"]["prey"]["removals"] > 0


def test_demo_results_converge_as_tolerances_tighten(demo_scenario):
    # Ten-fold tighter rtol and atol change no persistence column and no synchrony value by
    # more than 1e-3 (consistency test across tolerances).
    loose = _demo_run(demo_scenario)
    tight = _demo_run(demo_scenario, run__rtol=demo_scenario["run.rtol"] / 10,
                      run__atol=demo_scenario["run.atol"] / 10)
    for s in ("prey", "predator"):
        for c in PERSISTENCE_COLUMNS + SYNCHRONY_COLUMNS:
            a = loose.patches[f"{s}_{c}"].to_numpy(dtype=float)
            b = tight.patches[f"{s}_{c}"].to_numpy(dtype=float)
            np.testing.assert_array_equal(np.isnan(a), np.isnan(b))
            ok = ~np.isnan(a)
            assert np.max(np.abs(a[ok] - b[ok]), initial=0.0) <= 1e-3, f"{s}_{c}"
        for key in ("regional_persistence", "area_persistence", "synchrony", "kuramoto_mean",
                    "community_synchrony"):
            assert abs(loose.summary[f"{s}_{key}"] - tight.summary[f"{s}_{key}"]) <= 1e-3
        # the same local populations removed
        assert (loose.summary["quasi_extinction"][s]["removals"]
                == tight.summary["quasi_extinction"][s]["removals"])


@pytest.mark.parametrize("method", ["DOP853", "RK23"])
def test_demo_results_do_not_depend_on_the_solver(demo_scenario, method):
    # Another explicit method takes other steps; a population dipping through the threshold
    # between two step ends must still be removed (found on the interpolant), so the same
    # populations go and the same patches persist (consistency test across solvers; before
    # the dips were looked for, DOP853 removed 533 prey populations against RK45's 535).
    reference = _demo_run(demo_scenario)
    other = _demo_run(demo_scenario, run__method=method)
    for s in ("prey", "predator"):
        assert (other.summary["quasi_extinction"][s]["removals"]
                == reference.summary["quasi_extinction"][s]["removals"])
        for c in PERSISTENCE_COLUMNS:
            a = reference.patches[f"{s}_{c}"].to_numpy(dtype=float)
            b = other.patches[f"{s}_{c}"].to_numpy(dtype=float)
            ok = ~np.isnan(a)
            np.testing.assert_array_equal(np.isnan(a), np.isnan(b))
            assert np.max(np.abs(a[ok] - b[ok]), initial=0.0) <= 1e-3, f"{s}_{c}"


def test_a_spared_patch_beside_patches_with_no_error_keeps_the_step_near_its_own():
    # (from a review) beside quiet patches at an exact steady state the error of every other
    # patch is 0, and a step that spares the cycling patch grew tenfold a step to the whole
    # run, leaving its region to integrate the whole run at once (which failed on longer
    # runs). The step is now held within about ode.SPARE_STEPS of what the spared patch
    # needs; the patch still meets scipy's solve_ivp (DOP853, 1e-12).
    from trophoscape.integrate import ode

    duration = 60.0
    lone_system, lone_y0 = _mixed_system(0)
    lone = simulate(lone_system, lone_y0, duration=duration, census_interval=0.5,
                    extinction_abundance=0.0)
    big_system, big_y0 = _mixed_system(1000)  # 1,001 patches: one spared
    big = simulate(big_system, big_y0, duration=duration, census_interval=0.5,
                   extinction_abundance=0.0)
    assert int(ode.SPARE_SHARE * 1001) == 1 and big.stats.restarts > 0
    assert big.stats.steps >= lone.stats.steps / (2.0 * ode.SPARE_STEPS)
    ref = _reference(duration, lone.time)
    big_xy = [big[s].values[:, 0] for s in ("prey", "predator")]
    assert _relative_error(big_xy, ref) < 0.01
