"""Single-patch dynamics against published analytic results."""

import numpy as np
import pytest
import scipy.integrate as si
import scipy.optimize as so

from trophoscape.model.dynamics import RESPONSES, interior_equilibrium
from trophoscape.integrate.ode import simulate

from conftest import make_model, make_system

TIGHT = dict(rtol=1e-10, atol=1e-12, extinction_abundance=0.0)


def run(system, y0, duration, census=0.01, method="DOP853", **kw):
    opts = {**TIGHT, **kw}
    return simulate(system, np.asarray(y0, float), duration=duration, census_interval=census,
                    method=method, **opts)


def test_exponential_matches_closed_form():
    # n(t) = n0 exp(r t), doubling time ln 2 / r (elementary; common practice)
    model = make_model(growth="exponential", growth_rate=0.3)
    traj = run(make_system(model), [5.0, 0.0], 10.0, census=0.5)
    t = traj.time
    np.testing.assert_allclose(traj["prey"].values[:, 0], 5.0 * np.exp(0.3 * t), rtol=1e-8)
    assert traj.stats.success


def test_exponential_decline_to_threshold_time():
    # time to fall from n0 to θ at net rate -μ is ln(n0/θ)/μ (common practice); with the
    # quasi-extinction census the population is zeroed at the first census below θ.
    model = make_model(growth="exponential", growth_rate=0.0, mortality=0.0)
    # a negative growth rate is not a scenario value, but the model allows it
    model.params["growth_rate"][:] = -0.2
    traj = simulate(make_system(model), np.array([100.0, 0.0]), duration=40.0,
                    census_interval=0.01, method="DOP853", rtol=1e-10, atol=1e-12,
                    extinction_abundance=1.0)
    gone = traj.time[np.argmax(traj["prey"].values[:, 0] == 0)]
    expected = np.log(100.0 / 1.0) / 0.2
    assert expected <= gone <= expected + 0.011


def test_logistic_matches_verhulst_closed_form():
    # n(t) = K n0 e^{rt} / (K + n0 (e^{rt} - 1))  (Verhulst 1838, from memory)
    r, k, n0 = 0.8, 40.0, 2.0
    model = make_model(growth="logistic", growth_rate=r, capacity=k)
    traj = run(make_system(model), [n0, 0.0], 20.0, census=0.25)
    t = traj.time
    exact = k * n0 * np.exp(r * t) / (k + n0 * (np.exp(r * t) - 1.0))
    np.testing.assert_allclose(traj["prey"].values[:, 0], exact, rtol=1e-8)


def test_allee_threshold_separates_extinction_from_capacity():
    # strong Allee effect: below the threshold T the population dies out, above it grows to K
    # (Courchamp, Berec & Gascoigne 2008, from memory)
    model = make_model(n=2, growth="allee", growth_rate=0.5, capacity=30.0, allee_density=6.0)
    traj = run(make_system(model), [5.9, 6.1, 0.0, 0.0], 80.0, census=1.0)
    end = traj["prey"].values[-1]
    assert end[0] < 1e-3
    assert end[1] == pytest.approx(30.0, rel=1e-6)


# SciPy Cookbook, "Lotka-Volterra tutorial" (scipy-cookbook, LotkaVolterraTutorial.ipynb):
# r = 1, a = 0.1, m = 1.5, e a = 0.075; equilibrium (20, 10).
LV = dict(growth_rate=1.0, attack_rate=0.1, mortality=1.5, conversion=0.75)


def lv_invariant(n, p, r=1.0, a=0.1, m=1.5, e=0.75):
    # V = e a n - m ln n + a p - r ln p  (Lotka 1925; Volterra 1926; Murray 2002 §3.1, from memory)
    return e * a * n - m * np.log(n) + a * p - r * np.log(p)


def test_lotka_volterra_equilibrium_and_invariant():
    model = make_model(growth="exponential", response="lotka_volterra", **LV)
    n_star, p_star = interior_equilibrium(model)
    assert n_star[0] == pytest.approx(20.0) and p_star[0] == pytest.approx(10.0)
    traj = run(make_system(model), [10.0, 5.0], 30.0, census=0.05)
    v = lv_invariant(traj["prey"].values[:, 0], traj["predator"].values[:, 0])
    assert np.ptp(v) < 1e-7 * abs(v[0])
    assert np.ptp(traj["prey"].values[:, 0]) > 20  # it really cycles


def test_lotka_volterra_small_oscillation_period():
    # eigenvalues ±i sqrt(r m): period 2π/sqrt(r m) = 5.130199320647456 here (cookbook value)
    model = make_model(growth="exponential", response="lotka_volterra", **LV)
    traj = run(make_system(model), [20.02, 10.0], 60.0, census=0.001)
    x = traj["prey"].values[:, 0] - 20.0
    t = traj.time
    up = np.flatnonzero((x[:-1] < 0) & (x[1:] >= 0))
    crossings = t[up] - x[up] * (t[up + 1] - t[up]) / (x[up + 1] - x[up])
    period = np.diff(crossings).mean()
    assert period == pytest.approx(2 * np.pi / np.sqrt(1.0 * 1.5), rel=1e-4)
    assert period == pytest.approx(5.130199320647456, rel=1e-4)


def test_lotka_volterra_against_tight_scipy_reference():
    # cookbook state at t = 15 recomputed with a tight DOP853 run (REFERENCES.md advice)
    def f(t, y):
        n, p = y
        return [n - 0.1 * n * p, 0.075 * n * p - 1.5 * p]

    ref = si.solve_ivp(f, (0, 15), [10.0, 5.0], method="DOP853", rtol=1e-12, atol=1e-12)
    model = make_model(growth="exponential", response="lotka_volterra", **LV)
    traj = run(make_system(model), [10.0, 5.0], 15.0, census=0.5, method="RK45",
               rtol=1e-9, atol=1e-10)
    got = [traj["prey"].values[-1, 0], traj["predator"].values[-1, 0]]
    np.testing.assert_allclose(got, ref.y[:, -1], rtol=1e-6)


# Rosenzweig–MacArthur (logistic prey, Holling type II)
RM = dict(growth_rate=1.0, attack_rate=1.0, handling_time=0.5, conversion=0.5, mortality=0.1)


def rm_threshold():
    a, h, e, m = RM["attack_rate"], RM["handling_time"], RM["conversion"], RM["mortality"]
    n_star = m / (a * (e - m * h))
    return n_star, 2 * n_star + 1 / (a * h)


def test_rosenzweig_macarthur_equilibrium_closed_form_is_a_root():
    # N* = m/(a(e - m h)), P* = (r/a)(1 - N*/K)(1 + a h N*) (Rosenzweig & MacArthur 1963,
    # from memory); checked as a root of the right-hand side with scipy.optimize
    model = make_model(growth="logistic", response="holling2", capacity=2.0, **RM)
    n_star, p_star = interior_equilibrium(model)
    expected_n, _ = rm_threshold()
    assert n_star[0] == pytest.approx(expected_n)
    rhs = make_system(model).rhs_function()
    root = so.fsolve(lambda y: rhs(0, y), [0.3, 1.0], xtol=1e-13)
    np.testing.assert_allclose([n_star[0], p_star[0]], root, rtol=1e-9)


@pytest.mark.parametrize("side", ["below", "above"])
def test_paradox_of_enrichment_hopf_threshold(side):
    # K_H = 2N* + 1/(a h): stable below, limit cycle above (Rosenzweig 1971, Science 171:385)
    _, k_h = rm_threshold()
    k = k_h * (0.8 if side == "below" else 1.25)
    model = make_model(growth="logistic", response="holling2", capacity=k, **RM)
    n_star, p_star = interior_equilibrium(model)
    traj = run(make_system(model), [n_star[0] * 1.1, p_star[0]], 600.0, census=0.5,
               method="RK45", rtol=1e-9, atol=1e-12)
    late = traj["prey"].values[traj.time > 500, 0]
    amplitude = np.ptp(late) / n_star[0]
    if side == "below":
        assert amplitude < 1e-3
    else:
        assert amplitude > 0.5


def test_deep_cycle_runs_to_the_end_without_negative_abundance():
    # deep paradox-of-enrichment cycles (r=1, a=5, h=0.5, e=0.5, m=0.3, K=5) dip close to zero;
    # the run must finish, never go negative (DESIGN.md positivity requirement)
    model = make_model(n=3, growth="logistic", response="holling2", growth_rate=1.0,
                       attack_rate=5.0, handling_time=0.5, conversion=0.5, mortality=0.3,
                       capacity=5.0)
    y0 = np.array([4.0, 2.0, 1.0, 0.5, 1.0, 2.0]) * 100
    traj = simulate(make_system(model, area=[100, 100, 100]), y0, duration=400,
                    census_interval=0.5, rtol=1e-6, atol=1e-8, extinction_abundance=1e-6)
    assert traj.stats.success
    for s in ("prey", "predator"):
        assert np.all(traj[s].values >= 0)
        assert np.all(np.isfinite(traj[s].values))


def test_beddington_deangelis_equals_holling2_without_interference(rng):
    # Beddington 1975; DeAngelis et al. 1975: identical when c = 0 (from memory)
    n = rng.uniform(0, 50, 20)
    p = rng.uniform(0, 5, 20)
    q = {"attack_rate": np.full(20, 0.7), "handling_time": np.full(20, 0.3),
         "interference": np.zeros(20)}
    bd, h2 = RESPONSES["beddington_deangelis"], RESPONSES["holling2"]
    np.testing.assert_allclose(bd.value(n, p, q), h2.value(n, p, q), rtol=1e-14)
    np.testing.assert_allclose(bd.dn(n, p, q), h2.dn(n, p, q), rtol=1e-14)


def test_holling_half_saturation_points():
    # type II: saturates at 1/h, half at n = 1/(a h); type III: half at 1/sqrt(a h)
    # (Holling 1959, from memory)
    a, h = 0.8, 0.25
    q = {"attack_rate": np.array([a]), "handling_time": np.array([h])}
    two, three = RESPONSES["holling2"], RESPONSES["holling3"]
    assert two.value(np.array([1 / (a * h)]), None, q)[0] == pytest.approx(0.5 / h)
    assert two.value(np.array([1e9]), None, q)[0] == pytest.approx(1 / h, rel=1e-6)
    assert three.value(np.array([1 / np.sqrt(a * h)]), None, q)[0] == pytest.approx(0.5 / h)
