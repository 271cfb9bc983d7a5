"""Synchrony: each figure against its published definition or a reference library."""

from __future__ import annotations

import tracemalloc

import networkx as nx
import numpy as np
import pandas as pd
import pytest
import scipy.signal
import xarray as xr

from trophoscape.analysis import synchrony as sy
from trophoscape.errors import InputError


def dataset(prey, predator=None, time=None, ids=None):
    """A trajectory Dataset from arrays of shape (T, n) or (T, n, replicates)."""
    prey = np.asarray(prey, dtype=float)
    predator = prey.copy() if predator is None else np.asarray(predator, dtype=float)
    t = np.arange(prey.shape[0], dtype=float) if time is None else time
    ids = [f"p{k}" for k in range(prey.shape[1])] if ids is None else ids
    dims = ("time", "patch", "replicate")[:prey.ndim]
    return xr.Dataset({"prey": (dims, prey), "predator": (dims, predator)},
                      coords={"time": t, "patch": ids})


def from_log(y):
    """Abundance whose log(1 + x) is exactly ``y``."""
    return np.expm1(y)


def reference_z(x, detrend=True):
    """Detrended, standardised log(1 + x) computed directly with scipy and numpy."""
    y = np.log1p(x)
    y = scipy.signal.detrend(y, axis=0) if detrend else y - y.mean(axis=0)
    return y / y.std(axis=0)


@pytest.fixture
def noisy(rng):
    t, n = 120, 9
    common = rng.standard_normal((t, 1))
    y = 3.0 + 0.3 * (0.7 * common + rng.standard_normal((t, n))) + 0.01 * np.arange(t)[:, None]
    return from_log(y)


# --------------------------------------------------------------------------------------------
# correlations with detrending


def test_detrended_series_match_scipy(noisy):
    # the transform is scipy.signal.detrend (reference library) of log(1 + x), standardised
    z, valid = sy.standardized_log_series(noisy, detrend=True)
    assert valid.all()
    np.testing.assert_allclose(z, reference_z(noisy), atol=1e-10)


def test_detrending_removes_a_shared_trend(rng):
    # two independent noises on a common straight-line trend: the raw correlation is the
    # trend's, the detrended one is that of the noises (near 0; common practice)
    t = 400
    trend = np.linspace(0.0, 3.0, t)[:, None]
    x = from_log(2.0 + trend + 0.2 * rng.standard_normal((t, 2)))
    ds = dataset(x)
    src, dst = np.array([0]), np.array([1])
    raw, _ = sy.synchrony_table(ds, burn_in=0, source=src, target=dst, weights=None,
                                detrend=False)
    det, _ = sy.synchrony_table(ds, burn_in=0, source=src, target=dst, weights=None)
    assert raw["prey_sync_local"].iloc[0] > 0.9
    assert abs(det["prey_sync_local"].iloc[0]) < 4 / np.sqrt(t)


def test_table_matches_numpy_corrcoef(noisy, rng):
    # Pearson correlation as computed by numpy.corrcoef (reference library) of the same series
    n = noisy.shape[1]
    ds = dataset(noisy)
    src = np.array([0, 0, 1, 2, 5, 7])
    dst = np.array([1, 3, 2, 8, 6, 8])
    w = rng.uniform(0.2, 1.0, src.size)
    table, summary = sy.synchrony_table(ds, burn_in=0, source=src, target=dst,
                                        weights={"prey": w, "predator": w}, species=("prey",))
    c = np.corrcoef(reference_z(noisy), rowvar=False)
    off = ~np.eye(n, dtype=bool)
    np.testing.assert_allclose(table["prey_sync_all"], (c * off).sum(axis=1) / (n - 1),
                               atol=1e-10)
    assert summary["prey_synchrony"] == pytest.approx(c[off].mean(), abs=1e-10)
    local = np.full(n, np.nan)
    for i in range(n):
        at = (src == i) | (dst == i)
        if at.any():
            local[i] = np.sum(w[at] * c[src[at], dst[at]]) / w[at].sum()
    np.testing.assert_allclose(table["prey_sync_local"], local, atol=1e-10)
    total = reference_z(noisy.sum(axis=1, keepdims=True))[:, 0]
    region = [np.corrcoef(reference_z(noisy)[:, i], total)[0, 1] for i in range(n)]
    np.testing.assert_allclose(table["prey_sync_region"], region, atol=1e-10)


def test_extinct_patch_has_no_correlation(noisy):
    x = noisy.copy()
    x[:, 4] = 0.0
    table, summary = sy.synchrony_table(dataset(x), burn_in=0, source=np.array([3]),
                                        target=np.array([4]), weights=None)
    assert np.isnan(table["prey_sync_all"].iloc[4])
    assert np.isnan(table["prey_sync_local"].iloc[4])
    assert np.isfinite(summary["prey_synchrony"])


def test_replicates_are_averaged(noisy, rng):
    # documented rule: compute per replicate, then average over replicates
    other = noisy[:, rng.permutation(noisy.shape[1])]
    both = np.stack([noisy, other], axis=-1)
    src, dst = np.array([0, 2]), np.array([1, 3])
    t2, s2 = sy.synchrony_table(dataset(both), burn_in=10, source=src, target=dst, weights=None)
    ta, sa = sy.synchrony_table(dataset(noisy), burn_in=10, source=src, target=dst,
                                weights=None)
    tb, sb = sy.synchrony_table(dataset(other), burn_in=10, source=src, target=dst,
                                weights=None)
    np.testing.assert_allclose(t2.to_numpy(), (ta.to_numpy() + tb.to_numpy()) / 2, atol=1e-12)
    assert s2["prey_synchrony"] == pytest.approx((sa["prey_synchrony"] + sb["prey_synchrony"])
                                                 / 2)


# --------------------------------------------------------------------------------------------
# phases (Kuramoto 1984, Chemical Oscillations, Waves, and Turbulence, from memory)


def test_kuramoto_identical_phases_give_one():
    theta = np.tile(np.linspace(-3, 3, 50)[:, None], (1, 7))
    r, psi = sy.kuramoto_order(theta)
    np.testing.assert_allclose(r, 1.0, atol=1e-12)
    np.testing.assert_allclose(np.exp(1j * psi), np.exp(1j * theta[:, 0]), atol=1e-12)


def test_kuramoto_evenly_spread_phases_give_zero(rng):
    n = 12
    theta = 2 * np.pi * np.arange(n)[None, :] / n + rng.uniform(0, 6, (30, 1))
    r, _ = sy.kuramoto_order(theta)
    np.testing.assert_allclose(r, 0.0, atol=1e-12)
    # independent uniform phases: N R² is about Exp(1), so R > 3/√N has chance e^-9
    n = 400
    r, _ = sy.kuramoto_order(rng.uniform(-np.pi, np.pi, (50, n)))
    assert (r < 3 / np.sqrt(n)).all()


def test_kuramoto_two_phases():
    delta = np.linspace(0.0, 2 * np.pi, 41)
    theta = np.stack([np.full_like(delta, 0.4), 0.4 + delta], axis=1)
    r, _ = sy.kuramoto_order(theta)
    np.testing.assert_allclose(r, np.abs(np.cos(delta / 2)), atol=1e-12)


def test_kuramoto_mean_square_for_independent_phases(rng):
    # E[R²] = 1/N for N independent uniform phases
    n, m = 8, 40_000
    r, _ = sy.kuramoto_order(rng.uniform(-np.pi, np.pi, (m, n)))
    r2 = r ** 2
    assert abs(r2.mean() - 1 / n) < 4 * r2.std() / np.sqrt(m)


def test_hilbert_phase_of_a_cosine():
    # the analytic signal of cos(ωt + φ) is exp(i(ωt + φ)) (scipy.signal.hilbert, reference
    # library); whole periods keep the FFT's periodic extension exact
    t = np.arange(400)
    omega = 2 * np.pi * 8 / t.size
    phi = np.array([0.0, 1.0, -2.5])
    z = np.cos(omega * t[:, None] + phi)
    theta = sy.analytic_phases(z, trim=0.1)
    kept = t[40:360]
    assert theta.shape == (320, 3)
    np.testing.assert_allclose(np.exp(1j * theta), np.exp(1j * (omega * kept[:, None] + phi)),
                               atol=1e-9)


def test_phase_synchrony_on_lagged_cycles():
    # cycles with fixed lags and one patch cycling faster: with whole periods the Hilbert
    # phases are exact, so R(t) and PLV follow their definitions evaluated on the known phases
    t = np.arange(600.0)
    omega = 2 * np.pi * 12 / t.size
    lags = np.array([0.0, 0.3, 0.6, 0.9, 1.2])
    known = np.column_stack([omega * t[:, None] + lags, 1.75 * omega * t])
    x = from_log(3.0 + np.cos(known))
    table, kuramoto, summary = sy.phase_synchrony(dataset(x), burn_in=0, trim=0.1,
                                                  detrend=False)
    kept = known[60:540]
    field = np.exp(1j * kept).mean(axis=1)
    r = kuramoto["prey"]
    assert r.dims == ("time",) and r.sizes["time"] == 480 and float(r["time"][0]) == 60.0
    np.testing.assert_allclose(r.values, np.abs(field), atol=1e-8)
    plv = np.abs(np.exp(1j * (kept - np.angle(field)[:, None])).mean(axis=0))
    np.testing.assert_allclose(table["prey_phase_locking"], plv, atol=1e-8)
    assert plv[:5].min() > 0.95 and plv[5] < 0.5  # locked lags vs. a drifting patch
    assert summary["prey_kuramoto_mean"] == pytest.approx(np.abs(field).mean(), abs=1e-8)


def test_identical_patches_are_fully_phase_locked(noisy):
    x = np.tile(noisy[:, :1], (1, 4))
    table, kuramoto, summary = sy.phase_synchrony(dataset(x), burn_in=5)
    np.testing.assert_allclose(table["prey_phase_locking"], 1.0, atol=1e-12)
    np.testing.assert_allclose(kuramoto["predator"].values, 1.0, atol=1e-12)
    assert summary["prey_kuramoto_mean"] == pytest.approx(1.0)


# --------------------------------------------------------------------------------------------
# community synchrony (Loreau & de Mazancourt 2008, Am. Nat. 172:E48, from memory)


def test_community_synchrony_perfect_and_compensating(rng):
    s = rng.standard_normal(200)
    together = np.column_stack([10 + s, 20 + 3 * s, 5 + 0.5 * s])
    assert sy.community_synchrony(together) == pytest.approx(1.0)
    opposed = np.column_stack([10 + s, 10 - s])
    assert sy.community_synchrony(opposed) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("rho", [-0.6, 0.0, 0.35, 0.9])
def test_community_synchrony_two_series(rng, rho):
    # two equal-variance series with sample correlation exactly ρ: φ = (1 + ρ)/2
    u, v = rng.standard_normal((2, 300))
    u, v = u - u.mean(), v - v.mean()
    v = v - (v @ u) / (u @ u) * u
    u, v = u / u.std(), v / v.std()
    x = np.column_stack([50 + u, 50 + rho * u + np.sqrt(1 - rho ** 2) * v])
    assert sy.community_synchrony(x) == pytest.approx((1 + rho) / 2, abs=1e-12)
    summary = sy.community_synchrony_summary(dataset(x), burn_in=0, species=("prey",))
    assert summary["prey_community_synchrony"] == pytest.approx((1 + rho) / 2, abs=1e-12)


# --------------------------------------------------------------------------------------------
# synchrony against distance (Bjørnstad & Falck 2001, Environ. Ecol. Stat. 8:53, from memory)


def exponential_field(seed, n=200, t=600, length_km=2.0, side_m=10_000.0):
    """Series whose correlation between patches is exp(-d/L): a Gaussian random field drawn
    through the Cholesky factor of its covariance (fine for 200 points, in the test only)."""
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0.0, side_m, (n, 2))
    d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1)) / 1000.0
    cov = np.exp(-d / length_km)
    factor = np.linalg.cholesky(cov + 1e-10 * np.eye(n))
    g = rng.standard_normal((t, n)) @ factor.T
    return dataset(from_log(3.0 + 0.3 * g)), xy, d, cov


def expected_bins(table, d, cov):
    iu = np.triu_indices(d.shape[0], 1)
    edges = np.r_[table["bin_lower_km"].to_numpy(), table["bin_upper_km"].to_numpy()[-1]]
    which = np.clip(np.searchsorted(edges, d[iu], side="right") - 1, 0, len(table) - 1)
    return np.bincount(which, weights=cov[iu]) / np.bincount(which)


def test_exponential_decay_within_the_band():
    length = 2.0
    ds, xy, d, cov = exponential_field(11, length_km=length)
    tables, summary = sy.synchrony_by_distance(ds, burn_in=0, centroids=xy, species=("prey",))
    t = tables["prey"]
    assert list(t.columns) == ["bin_lower_km", "bin_upper_km", "distance_km", "correlation",
                               "low", "high", "pairs"]
    assert t["pairs"].sum() == 200 * 199 // 2  # all pairs: fewer than max_pairs
    expect = expected_bins(t, d, cov)  # mean of exp(-d/L) over each bin's pairs
    inside = (t["low"] <= expect) & (expect <= t["high"])
    half_width = (t["high"] - t["low"]) / 2
    # a 95% band: over 20 seeds of this field about 90% of bins covered the truth (never
    # fewer than 7 of 12) and every bin was within 1.5 half-widths of it
    assert inside.sum() >= 7
    assert (np.abs(t["correlation"] - expect) <= 1.5 * half_width).all()
    # the definition gives d1 + L ln 2 for exp(-d/L), d1 the first bin's mean distance
    d1 = t["distance_km"].iloc[0]
    assert summary["prey_sync_half_distance_km"] == pytest.approx(d1 + length * np.log(2),
                                                                  rel=0.08)


def test_pair_band_is_narrower_than_time_band():
    # pairs share patches and census steps, so resampling pairs understates the error
    ds, xy, _, _ = exponential_field(3, n=80, t=300)
    by_time, _ = sy.synchrony_by_distance(ds, burn_in=0, centroids=xy, species=("prey",))
    by_pair, _ = sy.synchrony_by_distance(ds, burn_in=0, centroids=xy, species=("prey",),
                                          band="pairs")
    w_time = (by_time["prey"]["high"] - by_time["prey"]["low"]).to_numpy()
    w_pair = (by_pair["prey"]["high"] - by_pair["prey"]["low"]).to_numpy()
    np.testing.assert_allclose(by_time["prey"]["correlation"], by_pair["prey"]["correlation"])
    assert np.median(w_pair / w_time) < 0.7


def test_pair_sample_is_reproducible_and_distinct():
    ds, xy, _, _ = exponential_field(5, n=120, t=50)
    kw = dict(burn_in=0, centroids=xy, species=("prey",), max_pairs=2000, n_boot=20)
    a, _ = sy.synchrony_by_distance(ds, seed=7, **kw)
    b, _ = sy.synchrony_by_distance(ds, seed=7, **kw)
    c, _ = sy.synchrony_by_distance(ds, seed=8, **kw)
    pd.testing.assert_frame_equal(a["prey"], b["prey"])
    assert a["prey"]["pairs"].sum() == 2000
    assert not np.allclose(a["prey"]["correlation"], c["prey"]["correlation"])
    rng = np.random.default_rng(1)
    i, j = sy._sample_pairs(np.arange(120), 2000, rng)
    assert (i < j).all() and np.unique(i * 120 + j).size == 2000


def test_half_distance_interpolates():
    # linear interpolation between bin distances (common practice): 0.8 at 1 km, 0.2 at 3 km
    # falls to 0.4 at 1 + (0.8 - 0.4)/(0.8 - 0.2) * 2 km
    table = pd.DataFrame({"distance_km": [1.0, 3.0, 5.0], "correlation": [0.8, 0.2, 0.1],
                          "pairs": [5, 5, 5]})
    assert sy.half_distance(table) == pytest.approx(1 + 0.4 / 0.6 * 2)
    never = table.assign(correlation=[0.8, 0.7, 0.6])
    assert np.isnan(sy.half_distance(never))
    noise = table.assign(low=[-0.1, -0.3, -0.4])  # first bin not clearly above 0
    assert np.isnan(sy.half_distance(noise))
    assert sy.half_distance(table.assign(low=[0.7, 0.1, 0.0])) == pytest.approx(1 + 0.4 / 0.6 * 2)


def test_bad_centroids_are_refused(noisy):
    with pytest.raises(InputError, match="centroids must have shape"):
        sy.synchrony_by_distance(dataset(noisy), burn_in=0, centroids=np.zeros((3, 2)))


# --------------------------------------------------------------------------------------------
# groups (Louvain communities via igraph; Blondel et al. 2008, J. Stat. Mech., from memory)


def test_two_driven_blocks_form_two_groups(rng):
    n_a, n_b, t = 14, 10, 300
    drive = rng.standard_normal((t, 2))
    y = np.column_stack([drive[:, [0]].repeat(n_a, 1), drive[:, [1]].repeat(n_b, 1)])
    y = 3.0 + 0.3 * (y + 0.4 * rng.standard_normal(y.shape))
    block = np.r_[np.zeros(n_a, int), np.ones(n_b, int)]
    graph = nx.gnp_random_graph(n_a + n_b, 0.5, seed=2)
    a, b = np.array(graph.edges()).T  # links within and across the blocks
    assert (block[a] != block[b]).sum() > 10
    x = from_log(y)
    x[:, 3] = 0.0  # one patch without a series
    groups = sy.synchrony_groups(dataset(x), burn_in=0, source=a, target=b, seed=4)
    g = groups["prey_sync_group"].to_numpy()
    assert g[3] == -1
    keep = g >= 0
    assert set(g[keep]) == {0, 1}
    # one label per block, the larger block (13 patches with a series) is group 0
    assert (g[keep & (block == 0)] == 0).all() and (g[keep & (block == 1)] == 1).all()


def test_groups_follow_the_patches_not_their_order(rng):
    # consistency test: six weakly coupled blocks of patches with noisy, overlapping
    # drives, so that the communities are not obvious; the same patches and links in
    # another order give every patch the same group (groups are found on the patches in
    # the order of their ids)
    n, t = 60, 200
    drive = rng.standard_normal((t, 6))
    block = np.arange(n) % 6
    y = 3.0 + 0.3 * (drive[:, block] + 1.2 * rng.standard_normal((t, n)))
    graph = nx.random_geometric_graph(n, 0.3, seed=5)
    a, b = np.array(graph.edges()).T
    ids = [f"p{k:02d}" for k in range(n)]
    base = sy.synchrony_groups(dataset(from_log(y), ids=ids), burn_in=0, source=a, target=b,
                               seed=3)["prey_sync_group"]
    assert base.nunique() > 2
    perm = rng.permutation(n)
    where = np.argsort(perm)  # new position of each old patch
    moved = sy.synchrony_groups(dataset(from_log(y[:, perm]), ids=[ids[k] for k in perm]),
                                burn_in=0, source=where[a], target=where[b],
                                seed=3)["prey_sync_group"]
    assert (moved.loc[base.index] == base).all()


# --------------------------------------------------------------------------------------------
# everything at once, memory, plots


def test_synchrony_analysis_agrees_with_the_parts():
    ds, xy, d, _ = exponential_field(2, n=60, t=200)
    i, j = np.nonzero(np.triu(d < 2.0, 1))
    src, dst = np.r_[i, j], np.r_[j, i]
    w = {"prey": np.exp(-d[src, dst]), "predator": np.ones(src.size)}
    table, summary, extras = sy.synchrony_analysis(ds, burn_in=20, source=src, target=dst,
                                                   weights=w, centroids=xy, seed=3)
    for s in ("prey", "predator"):
        for c in ("sync_local", "sync_region", "sync_all", "phase_locking", "sync_group"):
            assert f"{s}_{c}" in table.columns
        for k in ("synchrony", "kuramoto_mean", "community_synchrony", "sync_half_distance_km"):
            assert np.isfinite(summary[f"{s}_{k}"])
    t1, s1 = sy.synchrony_table(ds, burn_in=20, source=src, target=dst, weights=w)
    p1, k1, s2 = sy.phase_synchrony(ds, burn_in=20)
    g1 = sy.synchrony_groups(ds, burn_in=20, source=src, target=dst, seed=3)
    b1, s3 = sy.synchrony_by_distance(ds, burn_in=20, centroids=xy, seed=3)
    s4 = sy.community_synchrony_summary(ds, burn_in=20)
    pd.testing.assert_frame_equal(table[t1.columns], t1)
    pd.testing.assert_frame_equal(table[p1.columns], p1)
    pd.testing.assert_frame_equal(table[g1.columns], g1)
    pd.testing.assert_frame_equal(extras["by_distance"]["prey"], b1["prey"])
    xr.testing.assert_allclose(extras["kuramoto"]["prey"], k1["prey"])
    assert summary == pytest.approx({**s1, **s2, **s3, **s4})


def test_no_dense_patch_by_patch_matrix(rng):
    # 3,000 patches: an n × n float matrix alone would take 72 MB; the whole analysis must
    # stay far below that (tracemalloc sees numpy's allocations)
    n, t = 3000, 40
    x = from_log(3.0 + 0.3 * rng.standard_normal((t, n)))
    ds = dataset(x)
    src = rng.integers(0, n, 6000)
    dst = (src + rng.integers(1, n, 6000)) % n
    xy = rng.uniform(0, 50_000, (n, 2))
    tracemalloc.start()  # the groups' networkx graph is left out: slow to trace, and sparse
    try:
        sy.synchrony_table(ds, burn_in=0, source=src, target=dst, weights=None)
        sy.phase_synchrony(ds, burn_in=0)
        sy.community_synchrony_summary(ds, burn_in=0)
        sy.synchrony_by_distance(ds, burn_in=0, centroids=xy, max_pairs=20_000, n_boot=50)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 30e6


def test_synchrony_plots(tmp_path):
    from matplotlib.image import imread

    from trophoscape.report import figures as plot

    ds, xy, d, _ = exponential_field(4, n=60, t=200)
    i, j = np.nonzero(np.triu(d < 2.0, 1))
    _, _, extras = sy.synchrony_analysis(ds, burn_in=0, source=i, target=j, weights=None,
                                         centroids=xy)
    for out in (plot.synchrony_distance_plot(extras["by_distance"], path=tmp_path / "d.png"),
                plot.kuramoto_plot(extras["kuramoto"], path=tmp_path / "k.png")):
        # a PNG file starts with these 8 bytes (PNG specification, W3C 2003, section 5.2)
        assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        image = imread(out)
        assert image.shape[0] > 300 and image.shape[1] > 500
        assert image[..., :3].std() > 0.05  # something is drawn
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.png", "k.png"]  # no temp files


@pytest.mark.parametrize("rho", [0.0, 0.4, 0.8])
def test_moran_effect_two_ar1_populations(rho):
    # Moran (1953), Aust. J. Zool. 1:291: two populations with identical linear dynamics
    # (here AR(1), y' = 0.6 y + noise), no dispersal, driven by noises with correlation rho,
    # are correlated at rho. log(1 + abundance) is made exactly the AR(1) series.
    import xarray as xr

    from trophoscape.analysis.synchrony import synchrony_table

    rng = np.random.default_rng(1953)
    steps = 40_000
    cov = np.array([[1.0, rho], [rho, 1.0]])
    noise = rng.multivariate_normal([0.0, 0.0], cov, size=steps) * 0.05
    y = np.empty((steps, 2))
    y[0] = 0.0
    for t in range(1, steps):  # the series itself (test only)
        y[t] = 0.6 * y[t - 1] + noise[t]
    abundance = np.expm1(5.0 + y)
    data = xr.Dataset({"prey": (("time", "patch"), abundance),
                       "predator": (("time", "patch"), abundance)},
                      coords={"time": np.arange(steps, dtype=float), "patch": ["a", "b"]})
    _, summary = synchrony_table(data, burn_in=0.0, source=np.array([0]), target=np.array([1]),
                                 weights=None)
    # sampling error of a correlation from ~T/((1+a)/(1-a)) = T/4 effective samples
    se = (1 - rho ** 2) / np.sqrt(steps / 4)
    assert summary["prey_synchrony"] == pytest.approx(rho, abs=4 * se + 1e-3)


def test_blocks_of_patches_do_not_change_the_results(rng, monkeypatch):
    # the O(n T) figures are computed over blocks of patches to bound memory; block edges
    # must not matter (the same sums in another grouping: equal to rounding)
    n, t = 23, 120
    shared = rng.standard_normal(t)
    x = np.exp(1.0 + 0.3 * (0.6 * shared[:, None] + rng.standard_normal((t, n))))
    x[:, 4] = 5.0  # a constant series: left out
    data = dataset(x)
    src, dst = np.arange(n - 1), np.arange(1, n)
    opts = dict(burn_in=0.0, source=src, target=dst, weights=None,
                centroids=rng.uniform(0, 5000, (n, 2)), species=("prey",), n_boot=20)
    whole = sy.synchrony_analysis(data, **opts)
    monkeypatch.setattr(sy, "_PHASE_BLOCK", 3 * t)  # blocks of 3 patches
    blocked = sy.synchrony_analysis(data, **opts)
    for c in whole[0].columns:
        np.testing.assert_allclose(blocked[0][c], whole[0][c], rtol=1e-10, atol=1e-12,
                                   err_msg=c)
    for k, v in whole[1].items():
        assert blocked[1][k] == pytest.approx(v, rel=1e-10, abs=1e-12, nan_ok=True), k
    np.testing.assert_allclose(blocked[2]["kuramoto"]["prey"], whole[2]["kuramoto"]["prey"],
                               rtol=1e-10)
