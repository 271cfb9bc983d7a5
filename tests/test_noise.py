"""Noise and replicates: the samplers against their definitions, demographic noise against the
exact stochastic simulation algorithm, reproducibility, and the replicate outputs."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st
import xarray as xr

from conftest import grid_study, make_model, make_system, write_grid_file
from trophoscape.errors import InputError
from trophoscape.integrate.noise import (NoiseModel, auto_step, covariance_root, fourier_features,
                                         kernel_correlation, spectral_frequencies)
from trophoscape.integrate.replicates import stack_state, stack_system, unstack_series
from trophoscape.scenario import parse_scenario
from trophoscape.integrate.ode import simulate


def _innovations(model, steps):
    """``steps`` successive environmental values z (one run), shape (steps, R, n)."""
    run = model.start()
    return np.stack([run._innovation() for _ in range(steps)])


def _step_means(model, steps):
    """``steps`` successive step averages of the growth noise (one run), shape (steps, R, n)."""
    run = model.start()
    return np.stack([run._advance("growth", model.environmental_sd).reshape(run.shape)
                     for _ in range(steps)])


@pytest.mark.parametrize("tau", [0.0, 0.3, 2.0])
@pytest.mark.parametrize("dt", [0.05, 0.5])
def test_noise_integrals_follow_the_ornstein_uhlenbeck_law(tau, dt):
    # for xi with cov(xi(t), xi(t+s)) = sigma²/(2 tau) exp(-|s|/tau), the integral over a
    # window T has variance sigma² tau (T/tau - 1 + exp(-T/tau)), and two windows of length T
    # whose starts are L apart (L >= T) have covariance
    # sigma²/(2 tau) tau² (1 - exp(-T/tau))² exp(-(L - T)/tau); white noise (tau = 0):
    # sigma² T and 0 (Uhlenbeck & Ornstein 1930, Phys. Rev. 36:823; from memory). The steps'
    # averages must give these whatever the noise step.
    sigma, reps, window, lag = 0.4, 4000, 1.0, 2.0
    model = NoiseModel(centroids_km=[[0.0, 0.0]], seeds=range(reps), environmental_sd=sigma,
                       correlation_km=None, correlation_time=tau, step=dt)
    per = int(round(window / dt))
    xi = _step_means(model, int(round((lag + window) / dt)))[:, :, 0]       # (steps, R)
    first = xi[:per].sum(axis=0) * dt
    second = xi[int(round(lag / dt)):int(round(lag / dt)) + per].sum(axis=0) * dt
    if tau == 0:
        var, cov = sigma ** 2 * window, 0.0
    else:
        var = sigma ** 2 * tau * (window / tau - 1 + np.exp(-window / tau))
        cov = sigma ** 2 / 2 * tau * (1 - np.exp(-window / tau)) ** 2 * np.exp(-(lag - window) / tau)
    lo, hi = st.chi2.ppf([0.0005, 0.9995], reps) / reps
    assert lo < np.mean(first ** 2) / var < hi
    assert lo < np.mean(second ** 2) / var < hi  # stationary from t = 0
    assert abs(np.mean(first) ) < 4 * np.sqrt(var / reps)
    assert abs(np.mean(first * second) - cov) < 4 * var / np.sqrt(reps)


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


@pytest.mark.parametrize("kernel", ["exponential", "gaussian"])
def test_rank_error_of_the_feature_correlation_at_several_distances(kernel):
    # one feature set of rank D errs on the correlation of two patches by about sqrt(v / D),
    # v = 1 - 7k²/4 + k(2d)/2 + k² k(2d)/4 with k = k(d) (the delta method on the
    # row-normalised random Fourier features of Rahimi & Recht 2007, worked out in
    # trophoscape.integrate.noise): sqrt(1/D) for distant pairs, 0 as they meet. The rms error over
    # independent feature sets must match it at every distance.
    rank, sets, length = 200, 2000, 1.0
    rng = np.random.default_rng(17)
    for d in (0.1, 0.5, 1.0, 2.0, 6.0):
        xy = np.array([[0.0, 0.0], [d, 0.0]])
        got = np.empty(sets)
        for i in range(sets):
            omega = spectral_frequencies(kernel, length, rank, rng)
            phi = fourier_features(xy, omega, rng.uniform(0.0, 2.0 * np.pi, rank))
            got[i] = phi[0] @ phi[1]
        k = float(kernel_correlation(d, kernel=kernel, length_km=length))
        k2 = float(kernel_correlation(2 * d, kernel=kernel, length_km=length))
        predicted = np.sqrt((1 - 7 * k * k / 4 + k2 / 2 + k * k * k2 / 4) / rank)
        rms = np.sqrt(np.mean((got - k) ** 2))
        # sampling sd of an rms over `sets` draws is about rms / sqrt(2 sets) = 1.6 %
        assert abs(rms / predicted - 1) < 0.08, (kernel, d, rms, predicted)


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


def test_environmental_noise_in_a_run_is_reproducible():
    n = 5
    system = make_system(make_model(n, growth="logistic", attack_rate=0.0, capacity=100.0),
                         area=np.ones(n))
    y0 = np.r_[np.full(n, 20.0), np.zeros(n)]
    xy = np.c_[np.arange(n) * 2.0, np.zeros(n)]
    kw = dict(duration=20.0, census_interval=0.5, extinction_abundance=0.0)

    def noisy(seeds):
        m = NoiseModel(centroids_km=xy, seeds=seeds, environmental_sd=0.4, correlation_km=3.0,
                       correlation_time=0.5, step=0.1)
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
    kw = dict(centroids_km=xy, environmental_sd=0.3, correlation_km=2.0, correlation_time=0.5)
    many = _innovations(NoiseModel(seeds=[5, 6, 7], **kw), 10)
    alone = _innovations(NoiseModel(seeds=[6], **kw), 10)
    assert np.array_equal(many[:, 1], alone[:, 0])


# ------------------------------------------------ environmental noise through the model
def _logistic_field(n, tau, *, census, step=None, duration=300.0, seed=5, sigma=0.1, r=0.5):
    """log N of n unlinked logistic prey patches (growth rate r, K = 1000) under
    environmental noise, after a burn-in of 20: shape (times, n), and the census times."""
    model = make_model(n, growth="logistic", growth_rate=r, capacity=1000.0,
                       attack_rate=0.0)
    system = make_system(model)
    xy = np.c_[np.arange(n) * 1000.0, np.zeros(n)]  # 1000 km apart: independent noise
    step = auto_step(model.params) if step is None else step
    noise = NoiseModel(centroids_km=xy, seeds=[seed], environmental_sd=sigma,
                       correlation_km=1.0, correlation_time=tau, step=step)
    traj = simulate(system, np.r_[np.full(n, 1000.0), np.zeros(n)], duration=duration,
                    census_interval=census, noise=noise, extinction_abundance=0.0)
    t = traj.data["time"].values
    return np.log(traj.data["prey"].values[t >= 20.0]), t[t >= 20.0]


def _sd_and_lag(logn, times, lag):
    x = logn - logn.mean(axis=0)
    k = int(round(lag / (times[1] - times[0])))
    return float(x.std()), float(np.mean(x[:-k] * x[k:]) / np.mean(x * x))


@pytest.mark.parametrize("tau", [0.0, 0.5])
def test_noisy_logistic_prey_matches_linear_theory_at_every_census_interval(tau):
    # near K, x = log(N/K) follows x' = -r x + xi: stationary variance sigma²/(2 r (1 + r tau))
    # and autocorrelation (e^{-r s} - r tau e^{-s/tau}) / (1 - r tau) at lag s (white noise:
    # e^{-r s}) — the linear response of a first-order system to Ornstein-Uhlenbeck noise
    # (Uhlenbeck & Ornstein 1930, Phys. Rev. 36:823; Gardiner 2009, Stochastic Methods, ch.
    # 3-4; from memory). The census interval only samples the same path: sd and lag-2
    # autocorrelation agree within 10 % across 0.1, 0.5 and 2.
    r, sigma, lag, n = 0.5, 0.1, 2.0, 60
    sd_theory = sigma / np.sqrt(2 * r * (1 + r * tau))
    rho_theory = (np.exp(-r * lag) if tau == 0 else
                  (np.exp(-r * lag) - r * tau * np.exp(-lag / tau)) / (1 - r * tau))
    got = {c: _sd_and_lag(*_logistic_field(n, tau, census=c), lag) for c in (0.1, 0.5, 2.0)}
    sds = np.array([v[0] for v in got.values()])
    rhos = np.array([v[1] for v in got.values()])
    assert sds.max() / sds.min() < 1.10 and rhos.max() / rhos.min() < 1.10, got
    # against theory: sd within 5 % (sampling error about 1.5 %, linearisation under 1 %),
    # lag-2 autocorrelation within 0.04 (its sampling sd is about 0.01)
    assert abs(sds[1] / sd_theory - 1) < 0.05, (sds, sd_theory)
    assert abs(rhos[1] - rho_theory) < 0.04, (rhos, rho_theory)


def test_noise_step_does_not_move_the_noisy_statistics():
    # a numerical setting: a third of the default noise step gives the same sd and lag-1
    # autocorrelation (different random paths, so within sampling error: consistency test
    # against the linear theory above, sigma²/(2 r (1 + r tau)), Uhlenbeck & Ornstein 1930)
    r, tau, sigma, n = 0.5, 0.5, 0.1, 60
    sd_theory = sigma / np.sqrt(2 * r * (1 + r * tau))
    rho_theory = (np.exp(-r) - r * tau * np.exp(-1 / tau)) / (1 - r * tau)
    for step in (0.2, 0.2 / 3):  # the default (a tenth of 1/0.5) and a third of it
        sd, rho = _sd_and_lag(*_logistic_field(n, tau, census=0.5, step=step), 1.0)
        assert abs(sd / sd_theory - 1) < 0.05, (step, sd, sd_theory)
        assert abs(rho - rho_theory) < 0.04, (step, rho, rho_theory)


@pytest.mark.parametrize("share", [0.0, 0.5, 0.9])
def test_moran_effect_through_the_model(tmp_path, share):
    # Moran (1953, Aust. J. Zool. 1:291; Royama 1992, Analytical Population Dynamics): two
    # identical unlinked populations with linear(ised) dynamics driven by noises of
    # correlation rho fluctuate with correlation rho. Two patches 100 km apart with a
    # correlation length of 1 km: the noise correlation is the shared share. Run through
    # the whole study (scenario, noise, stacked replicates, synchrony analysis); rank 20,000
    # keeps the feature error (sqrt(1/D) = 0.007) well inside the ±0.07 asked for.
    import trophoscape as ts
    from trophoscape.scenario import parse_scenario
    from trophoscape.testing import grid_landscape

    path = tmp_path / "two.gpkg"
    grid_landscape(1, 2, spacing_km=100.0, size_km=1.0).frame.to_file(path, driver="GPKG",
                                                                       engine="pyogrio")
    raw = {"patches": {"path": str(path)},
           "prey": {"capacity_density": 1000.0, "initial_density": 1000.0},
           "predator": {"initial_density": 0.0},
           "dispersal": {"kernel": "none"},
           "run": {"duration": 300.0, "burn_in": 20.0, "census_interval": 0.5,
                   "replicates": 4, "seed": 3},
           "analysis": {"stability": False, "capacity": False},
           "noise": {"environmental_sd": 0.1, "correlation_km": 1.0, "shared_share": share,
                     "correlation_time": 0.5, "rank": 20_000}}
    res = ts.run_study(ts.build_study(parse_scenario(raw, base_dir=tmp_path)))
    assert abs(res.summary["prey_synchrony"] - share) < 0.07, res.summary["prey_synchrony"]


# -------------------------------------------------------------------- scenario and study
MINIMAL = {"patches": {"path": "p.geojson"}}


def _parse(**sections):
    raw = {**MINIMAL, **sections}
    return parse_scenario(raw)


def test_noise_keys_are_checked():
    sc = _parse(noise={"environmental_sd": 0.2, "correlation_km": "regional",
                       "correlation_time": 0.5})
    assert sc["noise.correlation_km"] == "regional" and sc["noise.rank"] == 500
    assert sc["noise.correlation_time"] == 0.5 and sc["noise.noise_step"] == "auto"
    # the per-census-interval coefficient is refused with the way to convert it
    with pytest.raises(InputError, match=r"noise.autocorrelation': this key is retired.*"
                       r"correlation_time in time units instead \(a value a at census interval c "
                       r"becomes -c / ln\(a\)\)"):
        _parse(noise={"autocorrelation": 0.5})
    with pytest.raises(InputError, match="noise.correlation_time"):
        _parse(noise={"correlation_time": -1.0})
    with pytest.raises(InputError, match="noise.noise_step"):
        _parse(noise={"noise_step": 0})
    assert _parse(noise={"noise_step": 0.02})["noise.noise_step"] == 0.02
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
    from trophoscape.integrate.noise import replicate_seeds

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
    from trophoscape.report.figures import regional_extinction_probability

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
