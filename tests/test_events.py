"""Demographic noise (event-based runs): the tau-leaping engine and whole-model runs against
closed forms and exact stochastic simulation."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st

from conftest import make_model, make_system
from trophoscape.noise import NoiseModel, stack_state, stack_system
from trophoscape.simulate import simulate


# ---------------------------------------------------------------------- demographic noise
def _ssa_linear_birth_death(x0, b, d, t_end, reps, rng):
    """Exact stochastic simulation (Gillespie 1977, J. Phys. Chem. 81:2340, direct method) of
    a linear birth-death process; returns the counts at ``t_end``."""
    out = np.empty(reps)
    for k in range(reps):
        x, t = x0, 0.0
        while x > 0:
            total = (b + d) * x
            t += rng.exponential(1.0 / total)
            if t > t_end:
                break
            x += 1 if rng.random() < b / (b + d) else -1
        out[k] = x
    return out


def test_demographic_noise_against_exact_ssa_for_linear_birth_death():
    # one patch, prey born at rate b and removed at rate d per capita, no predator: a linear
    # birth-death process. Mean x0 e^{(b-d)t} and variance
    # x0 (b+d)/(b-d) e^{(b-d)t} (e^{(b-d)t} - 1) (Kendall 1948, Ann. Math. Stat. 19:1;
    # from memory); compared with the analytic moments and with an exact SSA run.
    b, d, x0, t_end, reps = 0.5, 0.8, 60.0, 2.0, 600
    params = make_model(1, growth="exponential", growth_rate=b, attack_rate=0.0).params
    params = {**params, "prey_harvest": np.array([d])}
    from trophoscape.dynamics import LocalModel

    system = make_system(LocalModel(growth="exponential", response="holling2", params=params))
    model = NoiseModel(centroids_km=[[0.0, 0.0]], seeds=range(reps), demographic=True,
                       prey_movement=sp.csr_array((1, 1)), predator_movement=sp.csr_array((1, 1)))
    traj = simulate(stack_system(system, reps), stack_state(np.array([x0, 0.0]), reps),
                    duration=t_end, census_interval=0.05, extinction_abundance=0.0, noise=model)
    got = traj.data["prey"].values[-1]
    g = np.exp((b - d) * t_end)
    mean, var = x0 * g, x0 * (b + d) / (b - d) * g * (g - 1.0)
    assert abs(got.mean() - mean) < 4 * np.sqrt(var / reps)
    exact = _ssa_linear_birth_death(int(x0), b, d, t_end, reps, np.random.default_rng(9))
    assert abs(exact.mean() - mean) < 4 * np.sqrt(var / reps)  # the SSA itself, as a check
    assert abs(got.mean() - exact.mean()) < 4 * np.sqrt(2 * var / reps)
    # variances: chi-square interval of the sample variance (normal approximation)
    lo, hi = st.chi2.ppf([0.0005, 0.9995], reps - 1) / (reps - 1)
    assert lo * 0.9 < got.var(ddof=1) / var < hi * 1.1  # 10% allowance: first-order scheme


def test_demographic_noise_moves_individuals_along_links():
    # two patches, prey only, no growth: dispersal alone. The total is conserved exactly
    # (survival 1), each move is a random event, and the mean follows expm(M t) (scipy).
    from scipy.linalg import expm

    eps = 0.4
    m = sp.csr_array(np.array([[-eps, eps], [eps, -eps]]))
    params = make_model(2, growth="exponential", growth_rate=0.0, attack_rate=0.0).params
    from trophoscape.dynamics import LocalModel

    system = make_system(LocalModel(growth="exponential", response="holling2", params=params),
                         prey_movement=m)
    reps = 400
    model = NoiseModel(centroids_km=[[0.0, 0.0], [1.0, 0.0]], seeds=range(reps),
                       demographic=True, prey_movement=m, predator_movement=sp.csr_array((2, 2)))
    y0 = np.array([50.0, 30.0, 0.0, 0.0])  # away from zero, where clipping would add mass
    traj = simulate(stack_system(system, reps), stack_state(y0, reps), duration=1.0,
                    census_interval=0.1, extinction_abundance=0.0, noise=model)
    x = traj.data["prey"].values[-1].reshape(reps, 2)
    assert np.allclose(x.sum(axis=1), 80.0)
    expected = expm(m.toarray() * 1.0) @ y0[:2]
    # each individual switches patch an even number of times or not: it ends in the other
    # patch with p = (1 - e^{-2 eps t})/2, so patch 1 holds Bin(50, p) + Bin(30, 1 - p),
    # variance 80 p (1 - p) (two-state Markov chain; common practice)
    p = (1 - np.exp(-2 * eps * 1.0)) / 2
    assert abs(x[:, 1].mean() - expected[1]) < 4 * np.sqrt(80 * p * (1 - p) / reps)
    assert x[:, 1].std() > 0.5 * np.sqrt(80 * p * (1 - p))


# --------------------------------------------------- event-based engine (tau-leaping + SSA)
def _immigration_death(nu, mu):
    """One species, immigration at rate nu and death mu x: channels for advance_events."""
    from trophoscape.events import Channels

    return Channels(rates=lambda x: np.array([nu, mu * x[0]], dtype=float),
                    change=sp.csr_array(np.array([[1, -1]])), consumer=np.array([-1, 0]),
                    order=np.ones(1))  # both channels first order (g = 1)


def _ssa_immigration_death(nu, mu, t_end, reps, rng):
    """Exact SSA (Gillespie 1977, J. Phys. Chem. 81:2340, direct method) from x = 0."""
    out = np.empty(reps)
    for k in range(reps):
        x, t = 0, 0.0
        while True:
            total = nu + mu * x
            t += rng.exponential(1.0 / total)
            if t > t_end:
                break
            x += 1 if rng.random() * total < nu else -1
        out[k] = x
    return out


@pytest.mark.parametrize("nu,mu,reps", [(4.0, 0.5, 400), (400.0, 1.0, 200)])
def test_immigration_death_is_poisson_with_mean_nu_over_mu(nu, mu, reps):
    # started empty, the immigration-death process is Poisson with mean
    # (nu/mu)(1 - e^{-mu t}) at every t, and Poisson(nu/mu) when stationary (the M/M/inf
    # queue; Kendall 1948, Ann. Math. Stat. 19:1, from memory). Small mean: critical
    # channels and exact steps; large mean: tau-leaps.
    from trophoscape.events import EventStats, advance_events

    t_end = 20.0 / mu
    chans = _immigration_death(nu, mu)
    stats = EventStats()
    rng = np.random.default_rng(5)
    got = np.array([advance_events(np.zeros(1, np.int64), 0.0, t_end, chans, rng,
                                   stats=stats)[0] for _ in range(reps)], dtype=float)
    mean = nu / mu * (1 - np.exp(-mu * t_end))
    assert abs(got.mean() - mean) < 4 * np.sqrt(mean / reps)
    lo, hi = st.chi2.ppf([0.0005, 0.9995], reps - 1) / (reps - 1)  # sample variance / var
    assert lo < got.var(ddof=1) / mean < hi
    if nu / mu > 100:
        assert stats.leaps > 0  # exact steps only while the population is small
        # far fewer steps than events: about 2 nu t_end events per run
        assert stats.leaps + stats.exact_steps < 0.1 * 2 * nu * t_end * reps
    else:
        assert stats.exact_steps > 0
        exact = _ssa_immigration_death(nu, mu, t_end, reps, np.random.default_rng(6))
        assert abs(got.mean() - exact.mean()) < 4 * np.sqrt(2 * mean / reps)


def test_extinction_by_time_t_of_a_subcritical_birth_death_process():
    # linear birth-death with b < d from x0: P(X_t = 0) = p0(t)^x0 with
    # p0(t) = d (e^{(b-d)t} - 1) / (b e^{(b-d)t} - d) (Kendall 1948, Ann. Math. Stat. 19:1,
    # from memory), through the whole model (births b n, harvest d n) and an in-test SSA
    b, d, x0, t_end, reps = 0.5, 0.8, 5, 4.0, 400
    from trophoscape.dynamics import LocalModel

    params = make_model(1, growth="exponential", growth_rate=b, attack_rate=0.0).params
    params = {**params, "prey_harvest": np.array([d])}
    system = make_system(LocalModel(growth="exponential", response="holling2", params=params))
    model = NoiseModel(centroids_km=[[0.0, 0.0]], seeds=range(reps), demographic=True)
    traj = simulate(stack_system(system, reps), stack_state(np.array([x0, 0.0]), reps),
                    duration=t_end, census_interval=1.0, noise=model)
    got = traj.data["prey"].values
    assert np.all(got == np.round(got))  # whole individuals
    g = np.exp((b - d) * t_end)
    p_ext = (d * (g - 1) / (b * g - d)) ** x0
    share = np.mean(got[-1] == 0)
    se = np.sqrt(p_ext * (1 - p_ext) / reps)
    assert abs(share - p_ext) < 4 * se
    exact = _ssa_linear_birth_death(x0, b, d, t_end, reps, np.random.default_rng(3))
    assert abs(np.mean(exact == 0) - p_ext) < 4 * se
    # extinct stays extinct (no immigration): the share only grows over the census times
    assert np.all(np.diff((got == 0).mean(axis=1)) >= 0)


def _predator_prey_patches(n, rng, area=1.0):
    """A ring of n patches with logistic prey, Holling II predators and dispersal."""
    from trophoscape.dynamics import LocalModel

    model = make_model(n, capacity=400.0, attack_rate=0.02, handling_time=0.1,
                       conversion=0.5, mortality=0.3)
    i = np.arange(n)
    eps = 0.1
    ring = sp.csr_array((np.full(2 * n, eps / 2 * 0.9), (np.r_[(i + 1) % n, (i - 1) % n],
                                                         np.r_[i, i])), shape=(n, n))
    m = sp.csr_array(ring - sp.diags_array(np.full(n, eps)))  # 10% die in transit
    return make_system(LocalModel(growth=model.growth, response=model.response,
                                  params=model.params), area=np.full(n, area),
                       prey_movement=m, predator_movement=m)


def test_event_run_is_reproducible_and_integer():
    rng = np.random.default_rng(0)
    system = _predator_prey_patches(5, rng)
    y0 = np.r_[np.full(5, 200.4), np.full(5, 20.0)]
    model = NoiseModel(centroids_km=np.c_[np.arange(5.0), np.zeros(5)], seeds=[11],
                       demographic=True, environmental_sd=0.3, correlation_km=2.0)
    a = simulate(system, y0, duration=5.0, census_interval=0.5, noise=model)
    b = simulate(system, y0, duration=5.0, census_interval=0.5, noise=model)
    other = simulate(system, y0, duration=5.0, census_interval=0.5,
                     noise=dataclasses_replace(model, seeds=(12,)))
    for s in ("prey", "predator"):  # same seed, same numbers bit for bit (common practice)
        assert np.array_equal(a.data[s].values, b.data[s].values)
        v = a.data[s].values
        assert np.all(v == np.round(v)) and np.all(v >= 0)
    assert not np.array_equal(a.data["prey"].values, other.data["prey"].values)


def dataclasses_replace(obj, **kw):
    import dataclasses

    return dataclasses.replace(obj, **kw)


def test_dispersal_only_conserves_the_total_exactly():
    # two patches, dispersal alone with survival 1: every event moves one individual, so
    # the total is an invariant at every census (integers, exactly; common practice), and
    # the mean of patch 1 follows the two-state Markov chain as in the test above
    eps = 0.4
    m = sp.csr_array(np.array([[-eps, eps], [eps, -eps]]))
    from trophoscape.dynamics import LocalModel

    params = make_model(2, growth="exponential", growth_rate=0.0, attack_rate=0.0,
                        mortality=0.0).params
    system = make_system(LocalModel(growth="exponential", response="holling2", params=params),
                         prey_movement=m, predator_movement=m)
    reps = 200
    model = NoiseModel(centroids_km=[[0.0, 0.0], [1.0, 0.0]], seeds=range(reps),
                       demographic=True)
    y0 = np.array([500.0, 3.0, 7.0, 0.0])
    traj = simulate(stack_system(system, reps), stack_state(y0, reps), duration=3.0,
                    census_interval=0.5, noise=model)
    prey = traj.data["prey"].values.reshape(-1, reps, 2)
    pred = traj.data["predator"].values.reshape(-1, reps, 2)
    assert np.all(prey.sum(axis=2) == 503) and np.all(pred.sum(axis=2) == 7)
    p = (1 - np.exp(-2 * eps * 3.0)) / 2
    mean1 = 500 * p + 3 * (1 - p)
    assert abs(prey[-1, :, 1].mean() - mean1) < 4 * np.sqrt(503 * p * (1 - p) / reps)


def test_twenty_patch_run_takes_seconds():
    # speed target of the event-based mode: 20 patches, a few hundred individuals each,
    # 50 time units (a budget, not a reference value)
    import time

    rng = np.random.default_rng(1)
    system = _predator_prey_patches(20, rng)
    y0 = np.r_[np.full(20, 300.0), np.full(20, 30.0)]
    model = NoiseModel(centroids_km=np.c_[np.arange(20.0), np.zeros(20)], seeds=[4],
                       demographic=True)
    start = time.perf_counter()
    traj = simulate(system, y0, duration=50.0, census_interval=1.0, noise=model)
    elapsed = time.perf_counter() - start
    assert elapsed < 20.0, elapsed
    assert traj.stats.steps < 50_000  # leaps, not one step per event
    assert traj.data["prey"].values[-1].sum() > 0
