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
