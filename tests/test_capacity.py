"""Metapopulation capacity against its published definition and numpy's eigen-solvers."""

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg

from trophoscape.analysis import capacity
from trophoscape.analysis.capacity import (capacity_analysis, capacity_columns, landscape_matrix,
                                           metapopulation_capacity, patch_contributions)
from trophoscape.model.network import Network, build_network
from trophoscape.testing import chain_landscape, grid_landscape


def make_network(n, lo, hi, distance_km, origin="table"):
    """An undirected network from pairs (two arcs each), as build_network lays it out."""
    lo, hi = np.asarray(lo), np.asarray(hi)
    d = np.asarray(distance_km, float)
    nan = np.full(2 * lo.size, np.nan)
    return Network(ids=[f"p{i}" for i in range(n)], source=np.r_[lo, hi], target=np.r_[hi, lo],
                   distance_km=np.r_[d, d], weight=nan, survival=nan,
                   origin=np.full(2 * lo.size, origin), kernel="exponential",
                   max_distance_km=np.inf)


def random_network(rng, n, p_link):
    i, j = np.triu_indices(n, 1)
    keep = rng.random(i.size) < p_link
    return make_network(n, i[keep], j[keep], rng.uniform(0.5, 5.0, keep.sum()))


def dense_reference(n, lo, hi, d, area, scale):
    """M_ij = exp(-d_ij/L) A_i A_j, M_ii = 0, written out entry by entry."""
    m = np.zeros((n, n))
    for a, b, dist in zip(lo, hi, d):
        m[a, b] = m[b, a] = np.exp(-dist / scale) * area[a] * area[b]
    return m


def test_small_landscape_matches_numpy_on_the_dense_matrix():
    # Hanski & Ovaskainen (2000) Nature 404:755: λ_M is the leading eigenvalue of M;
    # reference: numpy.linalg.eigh on the matrix written out here.
    land = chain_landscape(5, spacing_km=3.0, size_km=1.0)
    net = build_network(land, max_distance_km=50.0)  # every pair linked
    area = land.area_km2 * np.array([1.0, 2.0, 0.5, 3.0, 1.5])
    n = 5
    lo, hi = np.triu_indices(n, 1)
    d = (hi - lo) * 3.0 - 1.0  # boundary gap between squares of side 1 km, 3 km apart
    ref = dense_reference(n, lo, hi, d, area, scale=2.0)
    values, vectors = np.linalg.eigh(ref)
    lam, x = metapopulation_capacity(net, area, scale_km=2.0)
    assert lam == pytest.approx(values[-1], rel=1e-4)  # UTM scale error in the distances
    np.testing.assert_allclose(x, np.abs(vectors[:, -1]), atol=1e-4)


def test_sparse_path_matches_numpy(rng, monkeypatch):
    # as above, on a network above the dense limit (lowered here), so ARPACK
    # (scipy.sparse.linalg.eigsh) answers
    monkeypatch.setattr(capacity, "DENSE_LIMIT", 100)
    n = 150
    net = random_network(rng, n, 0.05)
    area = rng.uniform(0.5, 3.0, n)
    lo = np.minimum(net.source, net.target)[: net.n_arcs // 2]
    hi = np.maximum(net.source, net.target)[: net.n_arcs // 2]
    ref = dense_reference(n, lo, hi, net.distance_km[: net.n_arcs // 2], area, scale=1.5)
    np.testing.assert_allclose(landscape_matrix(net, area, scale_km=1.5).toarray(), ref,
                               rtol=1e-12)
    lam, x = metapopulation_capacity(net, area, scale_km=1.5)
    values, vectors = np.linalg.eigh(ref)
    assert lam == pytest.approx(values[-1], rel=1e-10)
    np.testing.assert_allclose(x, np.abs(vectors[:, -1]), atol=1e-8)


def test_two_patches():
    # Hanski & Ovaskainen (2000): two patches, λ_M = A1 A2 exp(-α d)
    net = make_network(2, [0], [1], [4.0])
    lam, x = metapopulation_capacity(net, [2.0, 3.0], scale_km=2.5)
    assert lam == pytest.approx(2.0 * 3.0 * np.exp(-4.0 / 2.5), rel=1e-12)
    np.testing.assert_allclose(x, [2 ** -0.5, 2 ** -0.5])


def test_parallel_routes_count_once_with_the_shortest():
    # a kernel link and a corridor joining the same pair: one entry, the nearer route
    # (our rule); the value is then the two-patch result of Hanski & Ovaskainen (2000)
    nan = np.full(4, np.nan)
    net = Network(ids=["a", "b"], source=[0, 0, 1, 1], target=[1, 1, 0, 0],
                  distance_km=[3.0, 1.0, 3.0, 1.0], weight=nan, survival=nan,
                  origin=["kernel", "corridor", "kernel", "corridor"], kernel="exponential",
                  max_distance_km=5.0)
    lam, _ = metapopulation_capacity(net, [1.0, 1.0], scale_km=1.0)
    assert lam == pytest.approx(np.exp(-1.0), rel=1e-12)


def test_one_way_row_links_both_ways():
    nan = np.full(1, np.nan)
    net = Network(ids=["a", "b"], source=[0], target=[1], distance_km=[2.0], weight=nan,
                  survival=nan, origin=["table"], kernel="exponential", max_distance_km=5.0)
    m = landscape_matrix(net, [1.0, 2.0], scale_km=1.0).toarray()
    np.testing.assert_allclose(m, m.T)
    assert m[0, 1] == pytest.approx(2.0 * np.exp(-2.0))


@pytest.mark.parametrize("n", [20, 120])  # dense and (limit lowered) ARPACK paths
def test_more_area_or_shorter_distances_never_lower_capacity(rng, n, monkeypatch):
    monkeypatch.setattr(capacity, "DENSE_LIMIT", 64)
    # Perron–Frobenius: the spectral radius of a non-negative matrix does not decrease
    # when an entry increases (Perron 1907; Frobenius 1912; from memory)
    for _ in range(5):
        net = random_network(rng, n, 4.0 / n)
        area = rng.uniform(0.2, 4.0, n)
        lam, _ = metapopulation_capacity(net, area, scale_km=2.0)
        bigger = area.copy()
        bigger[rng.integers(n)] *= 1.5
        assert metapopulation_capacity(net, bigger, scale_km=2.0)[0] >= lam * (1 - 1e-12)
        half = net.n_arcs // 2
        shorter = make_network(n, net.source[:half], net.target[:half],
                               net.distance_km[:half] * rng.uniform(0.3, 1.0, half))
        assert metapopulation_capacity(shorter, area, scale_km=2.0)[0] >= lam * (1 - 1e-12)


def test_adding_a_link_never_lowers_capacity(rng):
    # Perron–Frobenius, as above: a new link adds positive entries to M
    n = 40
    for _ in range(5):
        net = random_network(rng, n, 0.08)
        area = rng.uniform(0.2, 4.0, n)
        lam, _ = metapopulation_capacity(net, area, scale_km=2.0)
        half = net.n_arcs // 2
        linked = set(zip(net.source[:half].tolist(), net.target[:half].tolist()))
        a, b = next((a, b) for a, b in zip(*np.triu_indices(n, 1)) if (a, b) not in linked)
        more = make_network(n, np.r_[net.source[:half], a], np.r_[net.target[:half], b],
                            np.r_[net.distance_km[:half], 3.0])
        assert metapopulation_capacity(more, area, scale_km=2.0)[0] > lam


@pytest.mark.parametrize("n", [12, 100])
def test_homogeneous_ring_has_equal_shares(n):
    # a ring of equal patches at equal spacing is a circulant matrix, whose leading
    # eigenvector is constant (Davis 1979, Circulant Matrices, from memory), so every
    # share x_i² is 1/n; λ_M is then the row sum 2 A² exp(-α d)
    i = np.arange(n)
    net = make_network(n, i, (i + 1) % n, np.full(n, 2.0))
    lam, share, drop, exact = patch_contributions(net, np.full(n, 1.5), scale_km=1.0)
    np.testing.assert_allclose(share, 1.0 / n, rtol=1e-9)
    assert lam == pytest.approx(2 * 1.5 ** 2 * np.exp(-2.0), rel=1e-10)
    assert exact
    np.testing.assert_allclose(drop, drop[0], rtol=1e-6)  # symmetric: every loss alike


def exact_drops_numpy(m):
    lam = np.linalg.eigvalsh(m)[-1]
    n = m.shape[0]
    out = np.empty(n)
    for k in range(n):
        keep = np.arange(n) != k
        out[k] = lam - np.linalg.eigvalsh(m[np.ix_(keep, keep)])[-1]
    return out


# batched dense, one eigendecomposition, and (dense limit lowered) one ARPACK solve per patch
@pytest.mark.parametrize("shape, dense_limit", [((5, 6), 2000), ((9, 10), 2000), ((9, 10), 64)])
def test_exact_drop_matches_numpy_and_the_estimate_bounds_it(rng, shape, dense_limit,
                                                             monkeypatch):
    monkeypatch.setattr(capacity, "DENSE_LIMIT", dense_limit)
    land = grid_landscape(*shape, spacing_km=2.0, size_km=1.0)
    net = build_network(land, max_distance_km=4.0)
    area = land.area_km2 * rng.uniform(0.8, 1.25, land.n_patches)
    m = landscape_matrix(net, area, scale_km=2.0).toarray()
    reference = exact_drops_numpy(m)  # numpy.linalg.eigvalsh without each patch in turn
    lam, share, drop, exact = patch_contributions(net, area, scale_km=2.0)
    assert exact
    np.testing.assert_allclose(drop, reference, rtol=1e-7, atol=1e-12 * lam)
    _, share2, estimate, exact2 = patch_contributions(net, area, scale_km=2.0, exact_limit=0)
    assert not exact2
    np.testing.assert_array_equal(share, share2)
    # same sign (a loss never raises λ: Perron–Frobenius), the estimate an upper bound
    # (Rayleigh–Ritz: Courant–Fischer min-max theorem; Horn & Johnson 1985, Matrix
    # Analysis, from memory) and within a factor 2 of the exact drop on this network
    assert np.all(drop > 0) and np.all(estimate > 0)
    assert np.all(drop <= estimate * (1 + 1e-9))
    assert np.all(estimate <= 2.0 * drop)
    assert np.corrcoef(drop, estimate)[0, 1] > 0.95


def test_drops_with_two_components(rng):
    # patches outside the component that carries λ_M cannot lower it; checked against
    # numpy on the dense matrix
    a = make_network(8, [0, 1, 2, 4, 5, 6], [1, 2, 3, 5, 6, 7], rng.uniform(1, 3, 6))
    area = np.r_[np.full(4, 3.0), np.full(4, 1.0)]
    m = landscape_matrix(a, area, scale_km=2.0).toarray()
    _, _, drop, _ = patch_contributions(a, area, scale_km=2.0)
    np.testing.assert_allclose(drop, exact_drops_numpy(m), atol=1e-12)
    assert np.all(drop[4:] == 0)


def test_no_links():
    net = make_network(3, [], [], [])
    lam, x = metapopulation_capacity(net, [1.0, 2.0, 3.0], scale_km=1.0)
    assert lam == 0.0 and np.all(x == 0)
    table, summary = capacity_analysis(net, [1.0, 2.0, 3.0], scale_km=1.0)
    assert summary["metapopulation_capacity"] == 0.0
    assert np.all(table["capacity_drop"] == 0)


def test_capacity_analysis_table():
    land = grid_landscape(3, 4, spacing_km=2.0, size_km=1.0)
    net = build_network(land, max_distance_km=3.0)
    table, summary = capacity_analysis(net, land.area_km2, scale_km=2.0)
    assert list(table.index) == list(land.ids) and table.index.name == "patch_id"
    assert list(table.columns) == ["capacity_share", "capacity_drop"]
    assert table["capacity_share"].sum() == pytest.approx(1.0)  # unit eigenvector
    assert summary["capacity_drop_method"] == "exact"
    lam = metapopulation_capacity(net, land.area_km2, scale_km=2.0)[0]
    assert summary["metapopulation_capacity"] == pytest.approx(lam)
    approx, summary2 = capacity_analysis(net, land.area_km2, scale_km=2.0, exact_limit=0)
    assert list(approx.columns) == ["capacity_share", "capacity_drop_approx"]
    assert summary2["capacity_drop_method"] == "estimate"


def test_bad_shapes():
    net = make_network(2, [0], [1], [1.0])
    with pytest.raises(ValueError, match="area_km2"):
        landscape_matrix(net, [1.0], scale_km=1.0)
    with pytest.raises(ValueError, match="kernel"):
        landscape_matrix(net, [1.0, 1.0], scale_km=1.0, kernel="cauchy")


# ------------------------------------------------------------------ uniform chains and fallbacks
def uniform_chain(n, gap_km=1.0):
    """n patches in a row, each linked to its neighbours, all gaps equal (a links table)."""
    i = np.arange(n - 1)
    return make_network(n, i, i + 1, np.full(n - 1, gap_km))


def chain_reference(n, area, gap_km, scale_km):
    """λ_M and the exact drops of a uniform chain of identical patches, in closed form.

    M = c T with c = A² exp(-d/L) and T the adjacency matrix of a path of n nodes, whose
    eigenvalues are 2 cos(kπ/(n+1)), k = 1..n (the tridiagonal Toeplitz matrix; Gregory &
    Karney 1969, A Collection of Matrices for Testing Computational Algorithms, from memory).
    Losing patch k leaves two chains of k and n-1-k patches; λ is the longer one's.
    """
    c = area ** 2 * np.exp(-gap_km / scale_km)
    lam = 2 * c * np.cos(np.pi / (n + 1))
    longer = np.maximum(np.arange(n), n - 1 - np.arange(n))
    return lam, lam - 2 * c * np.cos(np.pi / (longer + 1))


def test_400_patch_chain_of_identical_patches():
    # the case of the ArpackNoConvergence report: 400 identical squares in a row, linked
    # to their neighbours. Check: Hanski & Ovaskainen (2000) λ_M against the closed form of
    # the chain (above) and scipy.linalg.eigh of the matrix written out here; the drops
    # against the closed form.
    n, area, gap, scale = 400, 1.0, 1.0, 2.0
    net = uniform_chain(n, gap)
    i = np.arange(n - 1)
    ref_matrix = dense_reference(n, i, i + 1, np.full(n - 1, gap), np.full(n, area), scale)
    values, vectors = scipy.linalg.eigh(ref_matrix)
    lam_ref, drop_ref = chain_reference(n, area, gap, scale)
    assert values[-1] == pytest.approx(lam_ref, rel=1e-12)  # the two references agree
    table, summary = capacity_analysis(net, np.full(n, area), scale_km=scale)
    assert summary["metapopulation_capacity"] == pytest.approx(lam_ref, rel=1e-12)
    assert summary["capacity_drop_method"] == "exact"
    np.testing.assert_allclose(table["capacity_share"], vectors[:, -1] ** 2, atol=1e-10)
    np.testing.assert_allclose(table["capacity_drop"], drop_ref, rtol=1e-8, atol=1e-13 * lam_ref)
    # the end patches matter least, the middle ones most (the chain breaks in two)
    assert table["capacity_drop"].iloc[0] == table["capacity_drop"].min()
    assert table["capacity_drop"].iloc[n // 2 - 1] == pytest.approx(drop_ref.max(), rel=1e-8)


def test_chain_landscape_matches_the_dense_definition():
    # the same chain as a user builds it: trophoscape.testing squares, kernel links to the
    # neighbours only (gap 1 km; the next patch is 3 km away). Reference: Hanski &
    # Ovaskainen (2000) M_ij = exp(-d_ij/L) A_i A_j over the network's pairs, written out,
    # and scipy.linalg.eigh; drops of a few patches against eigh without the patch.
    land = chain_landscape(400, spacing_km=2.0, size_km=1.0)
    net = build_network(land, max_distance_km=1.5)
    lo = np.minimum(net.source, net.target)
    hi = np.maximum(net.source, net.target)
    assert sorted(set(zip(lo.tolist(), hi.tolist()))) == [(k, k + 1) for k in range(399)]
    first = net.source < net.target
    ref = dense_reference(400, lo[first], hi[first], net.distance_km[first], land.area_km2,
                          scale=5.0)
    values, vectors = scipy.linalg.eigh(ref)
    lam, share, drop, exact = patch_contributions(net, land.area_km2, scale_km=5.0)
    assert exact and lam == pytest.approx(values[-1], rel=1e-12)
    np.testing.assert_allclose(share, vectors[:, -1] ** 2, atol=1e-10)
    for k in (0, 57, 199, 200, 399):
        keep = np.arange(400) != k
        without = scipy.linalg.eigh(ref[np.ix_(keep, keep)], eigvals_only=True)[-1]
        assert drop[k] == pytest.approx(values[-1] - without, rel=1e-7, abs=1e-13 * lam)


def test_one_patch():
    net = make_network(1, [], [], [])
    table, summary = capacity_analysis(net, [2.0], scale_km=1.0)
    assert summary["metapopulation_capacity"] == 0.0
    assert table.shape == (1, 2) and table.iloc[0].tolist() == [0.0, 0.0]


def test_identical_patches_all_linked():
    # M = c (J - I) for n identical patches at equal distances: λ_M = (n - 1) c, every
    # share 1/n, and losing any patch leaves (n - 2) c (eigenvalues of J - I: n - 1 and -1)
    n, c = 90, 1.5 ** 2 * np.exp(-2.0)
    lo, hi = np.triu_indices(n, 1)
    net = make_network(n, lo, hi, np.full(lo.size, 2.0))
    lam, share, drop, exact = patch_contributions(net, np.full(n, 1.5), scale_km=1.0)
    assert exact and lam == pytest.approx((n - 1) * c, rel=1e-12)
    np.testing.assert_allclose(share, 1.0 / n, rtol=1e-9)
    np.testing.assert_allclose(drop, c, rtol=1e-9)


def test_isolated_patches_and_an_unlinked_group_beside_a_chain():
    # patches with no links (and a linked pair far smaller than the chain) add nothing to
    # λ_M and lose nothing (Perron–Frobenius: the spectrum of a block-diagonal matrix is
    # the union of its blocks'); the chain's part is its closed form
    n = 60
    i = np.arange(n - 1)
    net = make_network(n + 5, np.r_[i, n + 3], np.r_[i + 1, n + 4], np.r_[np.ones(n - 1), 1.0])
    area = np.r_[np.ones(n), np.full(5, 0.5)]
    table, summary = capacity_analysis(net, area, scale_km=2.0)
    lam_ref, drop_ref = chain_reference(n, 1.0, 1.0, 2.0)
    assert summary["metapopulation_capacity"] == pytest.approx(lam_ref, rel=1e-12)
    assert np.all(table["capacity_share"].iloc[n:] == 0)
    assert np.all(table["capacity_drop"].iloc[n:] == 0)
    np.testing.assert_allclose(table["capacity_drop"].iloc[:n], drop_ref, rtol=1e-8)


def failing_arpack(monkeypatch, *, shift_invert_fails=False):
    """Make scipy's eigsh raise ArpackNoConvergence in regular mode (and in shift-invert)."""
    real = scipy.sparse.linalg.eigsh

    def eigsh(matrix, *args, **kwargs):
        if kwargs.get("sigma") is None or shift_invert_fails:
            raise scipy.sparse.linalg.ArpackNoConvergence("no convergence (forced)",
                                                          np.zeros(0), np.zeros((0, 0)))
        return real(matrix, *args, **kwargs)

    monkeypatch.setattr(scipy.sparse.linalg, "eigsh", eigsh)


@pytest.mark.parametrize("shift_invert_fails", [False, True])  # shift-invert, then LOBPCG
def test_fallbacks_when_arpack_does_not_converge(monkeypatch, shift_invert_fails):
    # the sparse path (forced on the 400-patch chain by lowering the dense limit) with
    # ARPACK failing: the fallback answers, checked against the closed form of the chain
    monkeypatch.setattr(capacity, "DENSE_LIMIT", 50)
    failing_arpack(monkeypatch, shift_invert_fails=shift_invert_fails)
    lam, x = metapopulation_capacity(uniform_chain(400), np.ones(400), scale_km=2.0)
    lam_ref, _ = chain_reference(400, 1.0, 1.0, 2.0)
    assert lam == pytest.approx(lam_ref, rel=1e-10)
    k = np.arange(1, 401)  # the leading eigenvector of the path: sin(kπ/(n+1)), normalised
    ref = np.sin(k * np.pi / 401)
    np.testing.assert_allclose(x, ref / np.linalg.norm(ref), atol=1e-5)


def test_drops_fall_back_per_patch(monkeypatch):
    # a component above the dense limit gets one sparse solve per patch; with ARPACK's
    # regular mode failing every time, shift-invert answers (closed form as above)
    monkeypatch.setattr(capacity, "DENSE_LIMIT", 50)
    failing_arpack(monkeypatch)
    lam, _, drop, exact = patch_contributions(uniform_chain(120), np.ones(120), scale_km=2.0)
    lam_ref, drop_ref = chain_reference(120, 1.0, 1.0, 2.0)
    assert exact and lam == pytest.approx(lam_ref, rel=1e-10)
    np.testing.assert_allclose(drop, drop_ref, rtol=1e-6, atol=1e-12)


def test_every_solver_failing_is_a_clear_error(monkeypatch):
    monkeypatch.setattr(capacity, "DENSE_LIMIT", 50)
    failing_arpack(monkeypatch, shift_invert_fails=True)
    monkeypatch.setattr(scipy.sparse.linalg, "lobpcg",
                        lambda a, x, **kw: (np.zeros(x.shape[1]), np.zeros_like(x)))
    with pytest.raises(RuntimeError, match="no eigen-solver converged .* 400 x 400 .*LOBPCG"):
        metapopulation_capacity(uniform_chain(400), np.ones(400), scale_km=2.0)


def test_capacity_columns_name_what_the_analysis_gives():
    # consistency test: the names a failed analysis leaves in the table are those a
    # successful one writes
    net = uniform_chain(30)
    for limit in (0, 100):
        table, _ = capacity_analysis(net, np.ones(30), scale_km=2.0, exact_limit=limit)
        assert capacity_columns(net, exact_limit=limit) == list(table.columns)
