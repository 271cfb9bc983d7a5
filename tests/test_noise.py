"""Noise and replicates: the samplers against their definitions, demographic noise against the
exact stochastic simulation algorithm, reproducibility, and the replicate outputs."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st
import xarray as xr

from conftest import grid_study, make_model, make_system, write_grid_file
from trophoscape.errors import InputError
from trophoscape.noise import (NoiseModel, covariance_root, kernel_correlation,
                               lognormal_multiplier, unstack_series,
                               stack_state, stack_system)
from trophoscape.scenario import parse_scenario
from trophoscape.simulate import simulate


def _innovations(model, steps):
    """``steps`` successive environmental values z (one run), shape (steps, R, n)."""
    run = model.start()
    return np.stack([run._advance("growth").reshape(run.shape) for _ in range(steps)])


def test_lognormal_multiplier_has_mean_one(rng):
    # E[exp(sd Z - sd²/2)] = 1 for Z ~ N(0, 1): the lognormal mean exp(mu + sd²/2)
    # (Aitchison & Brown 1957, The Lognormal Distribution; from memory)
    for sd in (0.1, 0.5, 1.0):
        m = lognormal_multiplier(rng.standard_normal(400_000), sd)
        se = np.sqrt(np.expm1(sd * sd) / m.size)  # sd of the lognormal with mean 1
        assert abs(m.mean() - 1.0) < 4 * se
    # and the sampler's own field has unit variance at every patch, so the correction holds
    model = NoiseModel(centroids_km=[[0, 0], [3, 1], [7, 7]], seeds=range(2000),
                       environmental_sd=0.5, correlation_km=4.0)
    z = _innovations(model, 1)[0]
    mult = lognormal_multiplier(z, 0.5)
    se = np.sqrt(np.expm1(0.25) / z.shape[0])
    assert np.all(np.abs(mult.mean(axis=0) - 1.0) < 4 * se)


@pytest.mark.parametrize("kernel", ["exponential", "gaussian"])
def test_sampled_spatial_correlation_matches_the_kernel(kernel):
    # random Fourier features are unbiased for a stationary kernel (Rahimi & Recht 2007,
    # "Random features for large-scale kernel machines"): over independent feature draws
    # (one per replicate) the correlation of the field at distance d is k(d)
    length = 5.0
    distances = np.array([1.0, 2.5, 5.0, 10.0])
    # point 0 at the origin, the others along a diagonal at the test distances
    xy = np.vstack([[0.0, 0.0], np.c_[distances, distances] / np.sqrt(2.0)])
    reps = 3000
    model = NoiseModel(centroids_km=xy, seeds=range(reps), environmental_sd=0.3,
                       correlation_km=length, kernel=kernel)
    z = _innovations(model, 1)[0]                                  # (R, n)
    target = kernel_correlation(distances, kernel=kernel, length_km=length)
    for j, rho in enumerate(target, start=1):
        r = np.corrcoef(z[:, 0], z[:, j])[0, 1]
        se = (1 - rho ** 2) / np.sqrt(reps)  # sd of a sample correlation (Fisher 1915)
        assert abs(r - rho) < 4 * se + 0.01, (kernel, distances[j - 1], r, rho)


def test_one_feature_set_is_within_its_rank_error():
    # within one replicate: the covariance Phi Phi^T errs by about sqrt(1/(2D)) per entry
    xy = np.array([[0.0, 0.0], [2.0, 0.0], [0.0, 6.0], [9.0, 9.0]])
    model = NoiseModel(centroids_km=xy, seeds=[7], environmental_sd=0.2, correlation_km=3.0,
                       rank=2000)
    z = _innovations(model, 20_000)[:, 0, :]
    d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    target = kernel_correlation(d, kernel="exponential", length_km=3.0)
    got = np.corrcoef(z.T)
    bound = 4 * np.sqrt(1 / (2 * 2000)) + 4 / np.sqrt(20_000)
    assert np.all(np.abs(got - target) < bound)
    assert np.allclose(np.diag(np.cov(z.T)), 1.0, atol=4 * np.sqrt(2 / 20_000))


def test_covariance_root_reproduces_the_feature_covariance(rng):
    # L Lᵀ = Φ Φᵀ, so L z (z ~ N(0, I_n)) has the law of Φ w (w ~ N(0, I_D)); checked
    # against numpy's product, for a regular stack and one with two patches at one place
    # (a singular Φ Φᵀ: the eigen-decomposition path)
    phi = rng.standard_normal((3, 6, 40))
    phi /= np.linalg.norm(phi, axis=2, keepdims=True)
    singular = phi.copy()
    singular[:, 1] = singular[:, 0]
    for f in (phi, singular):
        root = covariance_root(f)
        assert root.shape == (3, 6, 6) and np.all(np.isfinite(root))
        np.testing.assert_allclose(root @ root.transpose(0, 2, 1), f @ f.transpose(0, 2, 1),
                                   atol=1e-12)
    # a run with fewer patches than features draws from the root: one normal per patch
    model = NoiseModel(centroids_km=[[0.0, 0.0], [1.0, 0.0], [0.0, 2.0]], seeds=[4],
                       environmental_sd=0.2, correlation_km=3.0, rank=50)
    assert model.start().features.shape == (1, 3, 3)


def test_unstack_series_inverts_the_stacked_layout(rng):
    # stack_system puts patch i of replicate r at r * n + i
    reps, n, t = 3, 4, 5
    each = rng.standard_normal((reps, t, n))
    stacked = np.concatenate(list(each), axis=-1)                  # (t, R n)
    cube = unstack_series(stacked, reps)                             # (t, n, R)
    assert cube.shape == (t, n, reps)
    np.testing.assert_array_equal(cube, each.transpose(1, 2, 0))
    two = unstack_series(np.stack([stacked, -stacked]), reps)       # leading axes kept
    np.testing.assert_array_equal(two[1], -cube)


def test_regional_setting_and_shared_share():
    xy = np.array([[0.0, 0.0], [500.0, 0.0]])  # far apart: the kernel part is ~0
    same = _innovations(NoiseModel(centroids_km=xy, seeds=[3], environmental_sd=0.2,
                                   correlation_km=None), 50)[:, 0, :]
    assert np.array_equal(same[:, 0], same[:, 1])
    mixed = _innovations(NoiseModel(centroids_km=xy, seeds=range(4000), environmental_sd=0.2,
                                    correlation_km=1.0, shared_share=0.4), 1)[0]
    r = np.corrcoef(mixed[:, 0], mixed[:, 1])[0, 1]
    assert abs(r - 0.4) < 4 * (1 - 0.4 ** 2) / np.sqrt(4000)


def test_ar1_autocorrelation_and_stationary_variance():
    # AR(1) z_k = a z_{k-1} + sqrt(1 - a²) e_k: lag-k autocorrelation a^k, variance 1
    # (Box & Jenkins 1970, Time Series Analysis; from memory); reddened environmental noise
    # as in Ripa & Lundberg (1996), Proc. R. Soc. B 263:1751 (from memory)
    a, steps = 0.7, 40_000
    model = NoiseModel(centroids_km=[[0.0, 0.0]], seeds=[11], environmental_sd=0.2,
                       correlation_km=None, autocorrelation=a)
    z = _innovations(model, steps)[:, 0, 0]
    se = np.sqrt((1 - a ** 2) / steps)  # Bartlett's formula for the lag-1 estimate
    assert abs(np.corrcoef(z[:-1], z[1:])[0, 1] - a) < 4 * se
    assert abs(np.corrcoef(z[:-2], z[2:])[0, 1] - a ** 2) < 6 * se
    assert abs(z.var() - 1.0) < 0.05


def test_moran_effect_on_linear_ar1_populations():
    # Moran (1953) Aust. J. Zool. 1:291: identical linear populations x_t = b x_{t-1} + z_t with
    # no dispersal, driven by noises of correlation rho, correlate at rho
    xy = np.array([[0.0, 0.0], [3.0, 4.0]])  # 5 km apart
    length = 8.0
    rho = float(kernel_correlation(5.0, kernel="gaussian", length_km=length))
    model = NoiseModel(centroids_km=xy, seeds=range(40), environmental_sd=0.2,
                       correlation_km=length, kernel="gaussian")
    z = _innovations(model, 2000)                                  # (T, R, 2)
    x = np.zeros_like(z)
    for t in range(1, z.shape[0]):
        x[t] = 0.5 * x[t - 1] + z[t]
    r = np.array([np.corrcoef(x[100:, k, 0], x[100:, k, 1])[0, 1] for k in range(40)])
    # the spread over replicates holds both the time-sampling and the feature error
    assert abs(r.mean() - rho) < 4 * r.std(ddof=1) / np.sqrt(r.size)


def test_environmental_noise_in_a_run_is_reproducible_and_mean_preserving():
    n = 5
    system = make_system(make_model(n, growth="logistic", attack_rate=0.0, capacity=100.0),
                         area=np.ones(n))
    y0 = np.r_[np.full(n, 20.0), np.zeros(n)]
    xy = np.c_[np.arange(n) * 2.0, np.zeros(n)]
    kw = dict(duration=20.0, census_interval=0.5, extinction_abundance=0.0)

    def noisy(seeds):
        m = NoiseModel(centroids_km=xy, seeds=seeds, environmental_sd=0.4, correlation_km=3.0,
                       autocorrelation=0.3)
        return simulate(stack_system(system, len(seeds)), stack_state(y0, len(seeds)),
                        noise=m, **kw)

    a, b = noisy([1, 2]), noisy([1, 2])
    assert np.array_equal(a.data["prey"].values, b.data["prey"].values)  # bit for bit
    c = noisy([1, 3])
    first = slice(0, n)
    assert np.array_equal(a.data["prey"].values[:, first], c.data["prey"].values[:, first]) \
        or np.allclose(a.data["prey"].values[:, first], c.data["prey"].values[:, first],
                       rtol=1e-4)  # replicate 0 has seed 1 in both
    assert not np.allclose(a.data["prey"].values[:, n:], c.data["prey"].values[:, n:])
    # the noise is really there, and the no-noise path is the deterministic one
    plain = simulate(system, y0, **kw)
    assert not np.allclose(a.data["prey"].values[:, first], plain.data["prey"].values)
    again = simulate(system, y0, noise=None, **kw)
    assert np.array_equal(plain.data["prey"].values, again.data["prey"].values)


def test_replicate_noise_does_not_depend_on_the_others():
    xy = np.c_[np.arange(4.0), np.zeros(4)]
    kw = dict(centroids_km=xy, environmental_sd=0.3, correlation_km=2.0, autocorrelation=0.5)
    many = _innovations(NoiseModel(seeds=[5, 6, 7], **kw), 10)
    alone = _innovations(NoiseModel(seeds=[6], **kw), 10)
    assert np.array_equal(many[:, 1], alone[:, 0])


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


# -------------------------------------------------------------------- scenario and study
MINIMAL = {"patches": {"path": "p.geojson"}}


def _parse(**sections):
    raw = {**MINIMAL, **sections}
    return parse_scenario(raw)


def test_noise_keys_are_checked():
    sc = _parse(noise={"environmental_sd": 0.2, "correlation_km": "regional",
                       "autocorrelation": 0.5})
    assert sc["noise.correlation_km"] == "regional" and sc["noise.rank"] == 500
    with pytest.raises(InputError, match=r"noise.autocorrelation': 1.0 is out of range; give a "
                       r"number of at least 0 and below 1"):
        _parse(noise={"autocorrelation": 1.0})
    with pytest.raises(InputError, match="noise.correlation_km"):
        _parse(noise={"correlation_km": 0})
    with pytest.raises(InputError, match="did you mean 'environmental_sd'"):
        _parse(noise={"enviromental_sd": 0.2})
    with pytest.raises(InputError, match="replicates other than 1 need noise"):
        _parse(run={"replicates": 3})
    assert _parse(run={"replicates": 3}, noise={"demographic": True})["run.replicates"] == 3


@pytest.fixture
def grid_file(tmp_path):
    return write_grid_file(tmp_path)


def _study(path, **sections):
    return grid_study(path, duration=12.0, **sections)


def test_replicates_seeds_outputs_and_figure(grid_file, tmp_path):
    import trophoscape as ts
    from trophoscape.sweep import replicate_seeds

    study = _study(grid_file, run={"replicates": 4, "seed": 42},
                   noise={"environmental_sd": 0.5, "correlation_km": 3.0, "demographic": True},
                   predator={"initial_density": 0.5})
    res = ts.run_study(study)
    assert res.summary["seeds"] == replicate_seeds(42, 4)  # SeedSequence(42).spawn(4)
    assert res.trajectory.data["prey"].dims == ("time", "patch", "replicate")
    # event-based runs are stored like ODE runs: float32, here whole counts (exact below 2**24)
    prey = res.trajectory.data["prey"].values
    assert prey.dtype == np.float32 and np.array_equal(prey, np.round(prey))
    again = ts.run_study(study)
    for s in ("prey", "predator"):  # same seed, same numbers, bit for bit
        assert np.array_equal(res.trajectory.data[s].values, again.trajectory.data[s].values)
    # shares with a Wilson interval (Wilson 1927), as scipy computes it
    share = res.patches["predator_persistence_share"].iloc[0]
    lo = res.patches["predator_persistence_low"].iloc[0]
    ref = st.binomtest(int(round(share * 4)), 4).proportion_ci(method="wilson")
    assert lo == pytest.approx(ref.low)

    out = ts.write_run(res, tmp_path / "out")
    with xr.open_dataset(out / "timeseries.nc", engine="h5netcdf") as ds:
        assert ds["predator"].dims == ("time", "patch", "replicate")
        assert list(ds["seed"].values) == res.summary["seeds"]
    assert (out / "maps" / "predator_regional_extinction.png").stat().st_size > 0
    assert "gone from every patch" in (out / "report.html").read_text()

    one_by_one = ts.run_study(study, stacked=False)  # same noise, integrated apart
    assert np.allclose(one_by_one.trajectory.data["prey"].values[0],
                       res.trajectory.data["prey"].values[0])


def test_regional_extinction_probability_with_wilson_band():
    from trophoscape.plot import regional_extinction_probability

    # 3 of 5 replicates lose the predator everywhere, at census 1, 2 and 2
    x = np.ones((4, 2, 5))
    x[1:, :, 0] = 0
    x[2:, :, 1] = 0
    x[2:, :, 2] = 0
    x[2, 0, 3] = 0  # one patch only: not regional
    ds = xr.Dataset({"predator": (("time", "patch", "replicate"), x),
                     "prey": (("time", "patch", "replicate"), x)},
                    coords={"time": [0.0, 1.0, 2.0, 3.0]})
    curve = regional_extinction_probability(ds)
    assert list(curve["share"]) == [0.0, 0.2, 0.6, 0.6]
    ref = st.binomtest(3, 5).proportion_ci(method="wilson")  # Wilson (1927), via scipy
    assert curve["low"].iloc[2] == pytest.approx(ref.low)
    assert curve["high"].iloc[2] == pytest.approx(ref.high)


# --------------------------------------------------- event-based engine (tau-leaping + SSA)
def _immigration_death(nu, mu):
    """One species, immigration at rate nu and death mu x: channels for advance_events."""
    from trophoscape.noise import Channels

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
    from trophoscape.noise import EventStats, advance_events

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
