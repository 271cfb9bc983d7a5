"""Internal patch order: a renumbered system gives the same dy/dt, Jacobian and trajectory."""

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.sparse.csgraph import reverse_cuthill_mckee

from trophoscape.model.network import build_network, movement_operator
from trophoscape.integrate.ode import simulate
from trophoscape.model.system import (ORDER_MIN_PATCHES, CoupledSystem, group_rows, locality,
                                      spatial_order)
from trophoscape.testing import grid_landscape

from conftest import make_model


def scattered_system(rng, n_side=12, order="rcm"):
    """A grid of patches fed to the system in a random order, so that reordering matters."""
    land = grid_landscape(n_side, n_side, spacing_km=1.0, size_km=0.5)
    net = build_network(land, kernel="exponential", max_distance_km=1.6)
    n = land.n_patches
    shuffle = rng.permutation(n)
    ops = [movement_operator(net, emigration_rate=rate, scale_km=1.0, survival_per_km=0.9)
           for rate in (0.3, 0.1)]
    ops = [sp.csr_array(m[shuffle][:, shuffle]) for m in ops]
    model = make_model(n=n, capacity=60.0)
    for v in model.params.values():  # per-patch values that differ, so a mix-up would show
        v *= rng.uniform(0.8, 1.2, n)
    area = rng.uniform(0.5, 3.0, n)

    def make(o):
        return CoupledSystem(model=model, area_km2=area, prey_movement=ops[0],
                             predator_movement=ops[1], order=o)

    return make("none"), make(order), land.centroids[shuffle], n


def test_reordered_rhs_and_jacobian_equal_user_order(rng):
    plain, ordered, _, n = scattered_system(rng)
    assert not plain.reordered and ordered.reordered
    y = rng.uniform(0.0, 80.0, 2 * n)
    y[rng.choice(2 * n, 10, replace=False)] = -1e-3  # the clipping path too
    # same sums taken in another order: equal to rounding (common practice)
    np.testing.assert_allclose(ordered.rhs_function()(0.0, y), plain.rhs_function()(0.0, y),
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(ordered.jacobian_function()(0.0, y).toarray(),
                               plain.jacobian_function()(0.0, y).toarray(), rtol=0, atol=0)
    # the internal form is the same map, conjugated by the permutation
    inner = ordered.rhs_function(internal=True)(0.0, ordered.to_internal(y))
    np.testing.assert_allclose(ordered.to_user(inner), plain.rhs_function()(0.0, y),
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(ordered.to_user(ordered.to_internal(y)), y)


def test_reference_rhs_against_dense_product(rng):
    # dispersal part against a dense matrix product (numpy as the outside reference)
    plain, ordered, _, n = scattered_system(rng)
    y = rng.uniform(1.0, 80.0, 2 * n)
    zero = make_model(n=n, growth="exponential", growth_rate=0.0, mortality=0.0,
                      attack_rate=0.0)
    for order in ("none", "rcm"):
        s = CoupledSystem(model=zero, area_km2=plain.area_km2,
                          prey_movement=plain.prey_movement,
                          predator_movement=plain.predator_movement, order=order)
        np.testing.assert_allclose(s.rhs_function()(0.0, y), plain.movement.toarray() @ y,
                                   rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("order", ["rcm", "hilbert"])
def test_simulate_same_with_any_internal_order(rng, order):
    plain, _, centroids, n = scattered_system(rng)
    if order == "hilbert":
        order = spatial_order(centroids)
    ordered = CoupledSystem(model=plain.model, area_km2=plain.area_km2,
                            prey_movement=plain.prey_movement,
                            predator_movement=plain.predator_movement, order=order)
    assert ordered.reordered
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])
    opts = dict(duration=20.0, census_interval=0.5, rtol=1e-9, atol=1e-9)
    a = simulate(plain, y0, **opts)
    b = simulate(ordered, y0, **opts)
    for s in ("prey", "predator"):
        np.testing.assert_allclose(b[s].values, a[s].values, rtol=1e-7, atol=1e-6)
    # the quasi-extinction rule removes the same populations whatever the numbering
    assert a.stats.removals == b.stats.removals
    np.testing.assert_allclose(b.stats.removed_individuals, a.stats.removed_individuals,
                               rtol=1e-9)


def test_rcm_and_hilbert_improve_locality(rng):
    plain, ordered, centroids, n = scattered_system(rng, n_side=30)
    m = plain.movement
    pair = lambda p: np.concatenate([p, p + n])  # noqa: E731
    before = locality(m)
    # scipy's reverse Cuthill-McKee (Cuthill & McKee 1969, from memory) as the reference order
    pat = sp.csr_matrix(abs(plain.prey_movement) + abs(plain.prey_movement.T))
    rcm = np.asarray(reverse_cuthill_mckee(pat, symmetric_mode=True), dtype=np.int64)
    np.testing.assert_array_equal(ordered.permutation, rcm)
    assert locality(m, pair(rcm)) < 0.7 * before
    assert locality(m, pair(spatial_order(centroids))) < 0.7 * before


def test_hilbert_order_visits_neighbouring_cells():
    # on a full 2^k grid a Hilbert curve steps between edge-adjacent cells only
    # (Hilbert 1891, Math. Ann. 38:459, the defining property)
    k = 4
    xy = np.stack(np.meshgrid(np.arange(2 ** k), np.arange(2 ** k)), axis=-1).reshape(-1, 2)
    xy = xy[np.random.default_rng(3).permutation(xy.shape[0])]
    path = xy[spatial_order(xy.astype(float), bits=k)]
    steps = np.abs(np.diff(path, axis=0)).sum(axis=1)
    assert np.all(steps == 1)
    assert np.unique(path, axis=0).shape[0] == xy.shape[0]


def test_group_rows_sorts_each_run_by_row_length(rng):
    plain, _, _, n = scattered_system(rng, n_side=20)
    block = plain.movement
    base = rng.permutation(n)
    grouped = group_rows(block, base, size=64)
    length = np.diff(block.indptr)
    np.testing.assert_array_equal(np.sort(grouped), np.arange(n))
    assert np.unique(length[:n]).size > 2  # the grid's edges and corners have fewer links
    for start in range(0, n, 64):
        run, was = grouped[start:start + 64], base[start:start + 64]
        np.testing.assert_array_equal(np.sort(run), np.sort(was))  # same patches per run
        assert np.all(np.diff(length[run]) >= 0)
        # ties keep the given order
        for value in np.unique(length[run]):
            np.testing.assert_array_equal(run[length[run] == value], was[length[was] == value])


def test_auto_groups_rows_on_large_networks(rng):
    side = int(np.ceil(np.sqrt(ORDER_MIN_PATCHES)))
    plain, ordered, _, n = scattered_system(rng, n_side=side, order="auto")
    assert n >= ORDER_MIN_PATCHES and ordered.reordered
    length = np.diff(ordered._internal["movement"].indptr)[:n]
    # fewer changes of row length along the internal rows than in the user's order
    assert (np.count_nonzero(np.diff(length))
            < 0.5 * np.count_nonzero(np.diff(np.diff(plain.movement.indptr)[:n])))
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])
    opts = dict(duration=5.0, census_interval=0.5, rtol=1e-9, atol=1e-9)
    a, b = simulate(plain, y0, **opts), simulate(ordered, y0, **opts)
    for s in ("prey", "predator"):
        np.testing.assert_allclose(b[s].values, a[s].values, rtol=1e-7, atol=1e-6)


def test_auto_keeps_user_order_on_small_networks(rng):
    plain, ordered, _, n = scattered_system(rng, order="auto")
    assert not ordered.reordered
    with pytest.raises(ValueError):
        CoupledSystem(model=plain.model, area_km2=plain.area_km2,
                      prey_movement=plain.prey_movement,
                      predator_movement=plain.predator_movement, order=np.zeros(n, int))


def test_simulate_in_internal_order_with_events_and_noise(rng):
    # a reordered system is integrated in its internal order; shocks index patches and
    # noise fields are drawn in the user's order, so both must land on the same patches
    from trophoscape.integrate.noise import NoiseModel
    from trophoscape.model.shocks import ParameterShift, StateScale

    plain, ordered, centroids, n = scattered_system(rng)
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])
    hit = rng.choice(n, 15, replace=False)
    events = (StateScale(time=5.0, species="predator", index=hit, factor=0.05),
              ParameterShift(time=8.0, name="mortality", index=hit[:5], delta=np.full(5, 0.5)))
    noise = NoiseModel(centroids_km=centroids, seeds=(7,), environmental_sd=0.2,
                       correlation_km=3.0)
    opts = dict(duration=20.0, census_interval=0.5, rtol=1e-9, atol=1e-9, events=events,
                noise=noise)
    a = simulate(plain, y0, **opts)
    b = simulate(ordered, y0, **opts)
    assert b.stats.restarts == a.stats.restarts > 0
    for s in ("prey", "predator"):
        np.testing.assert_allclose(b[s].values, a[s].values, rtol=1e-7, atol=1e-6)
    # and the shock did act where it was aimed (the predators of `hit` fell at t = 5)
    k = int(np.searchsorted(a.time, 5.0))
    assert np.all(b["predator"].values[k + 1, hit] < 0.2 * b["predator"].values[k, hit])
