"""Persistence figures on constructed series, and the Wilson interval."""

import numpy as np
import pytest
import xarray as xr
from scipy.stats import binomtest

from trophoscape.analysis.persistence import (occupancy_curve, persistence_table,
                                              regional_persistence, wilson_interval)


def dataset(prey, predator=None, time=None):
    prey = np.asarray(prey, float)
    predator = np.zeros_like(prey) if predator is None else np.asarray(predator, float)
    dims = ("time", "patch", "replicate")[:prey.ndim]
    time = np.arange(prey.shape[0], dtype=float) if time is None else time
    coords = {"time": time, "patch": [f"P{i}" for i in range(prey.shape[1])]}
    return xr.Dataset({"prey": (dims, prey), "predator": (dims, predator)}, coords=coords)


def test_counts_spells_and_margin_on_a_constructed_series():
    # patch P0: present 0-2, gone 3, back 4-6, gone 7-8, back 9 (two extinctions, two
    # recolonisations; spells of 3 and 3 time units end in extinction)
    p0 = [5, 4, 3, 0, 2, 6, 8, 0, 0, 7]
    p1 = [9] * 10                       # never lost
    table = persistence_table(dataset(np.array([p0, p1]).T), burn_in=4.0,
                              extinction_abundance=2.0)
    row, steady = table.loc["P0"], table.loc["P1"]
    assert row["prey_extinctions"] == 2 and row["prey_recolonisations"] == 2
    assert row["prey_time_to_extinction"] == pytest.approx(3.0)
    assert row["prey_last_extinction"] == 7.0
    assert row["prey_persists"]
    assert row["prey_occupancy"] == pytest.approx(4 / 6)       # t = 4..9
    assert row["prey_margin"] == 0.0                            # cleared after burn-in
    assert steady["prey_margin"] == pytest.approx(4.5)
    assert steady["prey_extinctions"] == 0 and np.isnan(steady["prey_time_to_extinction"])
    assert np.isnan(steady["prey_last_extinction"])
    assert steady["prey_cv"] == 0.0


def test_regional_figures():
    prey = np.array([[5, 5, 0, 0], [5, 0, 0, 0]]).T      # both gone by t = 2
    table = persistence_table(dataset(prey), burn_in=0.0)
    out = regional_persistence(table, dataset(prey), area_km2=[3.0, 1.0])
    assert out["prey_regional_persistence"] == 0.0
    assert out["prey_regional_extinction_time"] == 2.0
    assert out["prey_regional_survival"] == 0.0
    curve = occupancy_curve(dataset(prey))
    np.testing.assert_allclose(curve["prey"], [1.0, 0.5, 0.0, 0.0])


def test_replicates_give_shares_with_wilson_intervals():
    rng = np.random.default_rng(7)
    reps = 40
    keep = rng.uniform(size=(3, reps)) < np.array([[0.9], [0.5], [0.1]])
    prey = np.ones((5, 3, reps)) * 10
    prey[-1] = np.where(keep, 10.0, 0.0)
    table = persistence_table(dataset(prey), burn_in=0.0)
    k = keep.sum(axis=1)
    np.testing.assert_allclose(table["prey_persistence_share"], k / reps)
    for i in range(3):
        ci = binomtest(int(k[i]), reps).proportion_ci(method="wilson")
        assert table["prey_persistence_low"].iloc[i] == pytest.approx(ci.low, abs=1e-12)
        assert table["prey_persistence_high"].iloc[i] == pytest.approx(ci.high, abs=1e-12)
    assert list(table["prey_persists"]) == list(k * 2 >= reps)


# Newcombe (1998), Stat. Med. 17:857, worked examples for the Wilson score interval
# (values from memory; they agree with scipy's binomtest(...).proportion_ci("wilson"))
NEWCOMBE = [(81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0, 0.1611),
            (1, 29, 0.0061, 0.1718)]


@pytest.mark.parametrize("k,n,low,high", NEWCOMBE)
def test_wilson_interval_against_newcombe(k, n, low, high):
    got_low, got_high = wilson_interval(k, n)
    assert float(got_low) == pytest.approx(low, abs=5e-5)
    assert float(got_high) == pytest.approx(high, abs=5e-5)
    ci = binomtest(k, n).proportion_ci(method="wilson")
    assert float(got_low) == pytest.approx(ci.low, abs=1e-12)
    assert float(got_high) == pytest.approx(ci.high, abs=1e-12)


@pytest.mark.parametrize("reps", [1, 3])
def test_blocks_and_float32_storage_give_the_same_table(monkeypatch, reps):
    # the table is computed over blocks of patches to bound memory; block edges must not
    # matter, and float32 storage (as a study records it) must agree with float64 to float32
    # rounding (IEEE 754 single precision, about 6e-8 relative)
    import trophoscape.analysis.persistence as persistence

    rng = np.random.default_rng(3)
    shape = (40, 23) + ((reps,) if reps > 1 else ())
    x = rng.lognormal(1.0, 1.0, shape) * (rng.uniform(size=shape) > 0.3)
    whole = persistence_table(dataset(x), burn_in=10.0)
    monkeypatch.setattr(persistence, "PATCH_BLOCK", 40 * reps * 4)  # blocks of 4 patches
    blocked = persistence_table(dataset(x), burn_in=10.0)
    assert list(blocked.columns) == list(whole.columns)
    for c in whole.columns:
        np.testing.assert_allclose(blocked[c].to_numpy(float), whole[c].to_numpy(float),
                                   rtol=1e-12, err_msg=c)
    narrow = dataset(x)
    narrow["prey"] = narrow["prey"].astype(np.float32)
    single = persistence_table(narrow, burn_in=10.0)
    for c in whole.columns:
        np.testing.assert_allclose(single[c].to_numpy(float), whole[c].to_numpy(float),
                                   rtol=1e-6, err_msg=c)
