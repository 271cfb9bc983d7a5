"""Observation models of survey counts, against scipy.stats (a general-purpose reference
library): the Poisson and negative-binomial probability mass functions and the lognormal
density of the count itself."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from trophoscape.analysis.observation import (OBSERVATION_MODELS, log_density,
                                              lognormal_log_pdf, negative_binomial_log_pmf,
                                              poisson_log_pmf)


@pytest.fixture
def counts(rng):
    mean = rng.uniform(0.1, 400.0, 500)
    return mean, rng.poisson(mean).astype(float)


def test_poisson_matches_scipy(counts):
    mean, count = counts
    np.testing.assert_allclose(poisson_log_pmf(count, mean), stats.poisson.logpmf(count, mean),
                               rtol=1e-10, atol=1e-10)
    # a zero mean: a zero count is certain, any other impossible (scipy agrees)
    assert poisson_log_pmf(0.0, 0.0) == 0.0 and poisson_log_pmf(3.0, 0.0) == -np.inf


@pytest.mark.parametrize("k", [0.3, 2.0, 50.0])
def test_negative_binomial_matches_scipy(counts, k):
    mean, count = counts
    # scipy's nbinom(n, p) counts failures before n successes: mean n(1-p)/p, so n = k and
    # p = k / (k + mean) give mean `mean` and variance mean + mean²/k
    ref = stats.nbinom.logpmf(count, k, k / (k + mean))
    np.testing.assert_allclose(negative_binomial_log_pmf(count, mean, k), ref, rtol=1e-9,
                               atol=1e-9)
    assert stats.nbinom.var(k, k / (k + 10.0)) == pytest.approx(10.0 + 100.0 / k)


def test_lognormal_is_the_density_of_the_count_itself(counts):
    mean, _ = counts
    count = mean * np.exp(np.random.default_rng(3).normal(0, 0.4, mean.size))  # not integers
    sd = 0.4
    # scipy's lognorm(s, scale): log X ~ N(log scale, s²), density of X itself
    ref = stats.lognorm.logpdf(count, sd, scale=mean)
    np.testing.assert_allclose(lognormal_log_pdf(count, mean, sd), ref, rtol=1e-10)
    assert lognormal_log_pdf(0.0, 5.0, sd) == -np.inf


def test_the_dispatcher_knows_every_model():
    # consistency test: each named model gives its function's values
    count, mean = np.array([0.0, 3.0, 7.0]), np.array([1.0, 2.5, 9.0])
    assert set(OBSERVATION_MODELS) == {"lognormal", "poisson", "negative_binomial"}
    np.testing.assert_array_equal(log_density("poisson", count, mean),
                                  poisson_log_pmf(count, mean))
    np.testing.assert_array_equal(log_density("negative_binomial", count, mean, 2.0),
                                  negative_binomial_log_pmf(count, mean, 2.0))
    np.testing.assert_array_equal(log_density("lognormal", count[1:], mean[1:], 0.5),
                                  lognormal_log_pdf(count[1:], mean[1:], 0.5))
    with pytest.raises(ValueError, match="unknown observation model"):
        log_density("gamma", count, mean)
