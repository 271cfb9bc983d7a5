"""Observation models: how likely survey counts are, given the abundances a run predicts.

A survey counts a share of the individuals of a patch (``detection``, 1 by default): the
expected count is ``detection × abundance``. Three models of the count around it:

- ``"poisson"``: a Poisson count with that mean (integer counts);
- ``"negative_binomial"``: a negative binomial count with that mean and dispersion ``k``
  (variance ``μ + μ²/k``; integer counts), for counts more variable than Poisson;
- ``"lognormal"``: ``log(count)`` normal around ``log(expected)`` with standard deviation
  ``sd``; the density is that of the count itself (so it includes the ``1/count``
  Jacobian), and counts may be any positive number (indices, thousands of animals). A
  count of 0 has no density under it: give such data a count model.

Each function returns the log density of every observation, vectorised over arrays. An
expected count of 0 gives probability 1 to a zero count and 0 to any other (Poisson and
negative binomial); a lognormal expectation must be positive.
"""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln, xlogy

__all__ = ["OBSERVATION_MODELS", "log_density", "poisson_log_pmf", "negative_binomial_log_pmf",
           "lognormal_log_pdf"]

#: The observation models, and the name of their extra parameter (None for Poisson).
OBSERVATION_MODELS = {"lognormal": "sd", "poisson": None, "negative_binomial": "dispersion"}


def poisson_log_pmf(count, mean) -> np.ndarray:
    """log P(count) under Poisson(mean): ``count log(mean) − mean − log(count!)``."""
    count = np.asarray(count, dtype=float)
    mean = np.asarray(mean, dtype=float)
    return xlogy(count, mean) - mean - gammaln(count + 1.0)


def negative_binomial_log_pmf(count, mean, dispersion) -> np.ndarray:
    """log P(count) under the negative binomial of mean ``mean`` and dispersion ``k``
    (variance ``mean + mean²/k``): with ``p = k / (k + mean)``,
    ``log Γ(count + k) − log Γ(k) − log(count!) + k log p + count log(1 − p)``."""
    count = np.asarray(count, dtype=float)
    mean = np.asarray(mean, dtype=float)
    k = np.asarray(dispersion, dtype=float)
    return (gammaln(count + k) - gammaln(k) - gammaln(count + 1.0)
            + k * (np.log(k) - np.log(k + mean)) + xlogy(count, mean)
            - xlogy(count, k + mean))


def lognormal_log_pdf(count, expected, sd) -> np.ndarray:
    """log density of ``count`` when ``log(count)`` is normal around ``log(expected)`` with
    standard deviation ``sd``: ``−log(count) − log(sd √(2π)) − (log count − log expected)² /
    (2 sd²)``; ``−inf`` for a count of 0 or below."""
    count = np.asarray(count, dtype=float)
    expected = np.asarray(expected, dtype=float)
    sd = np.asarray(sd, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (np.log(count) - np.log(expected)) / sd
        out = -np.log(count) - np.log(sd) - 0.5 * np.log(2.0 * np.pi) - 0.5 * z * z
    return np.where(count > 0, out, -np.inf)


def log_density(model: str, count, expected, extra=None) -> np.ndarray:
    """The log density of each count under ``model`` (see the module notes); ``extra`` is
    the model's parameter (``sd`` or ``dispersion``; ignored for Poisson)."""
    if model == "poisson":
        return poisson_log_pmf(count, expected)
    if model == "negative_binomial":
        return negative_binomial_log_pmf(count, expected, extra)
    if model == "lognormal":
        return lognormal_log_pdf(count, expected, extra)
    raise ValueError(f"unknown observation model {model!r}; one of {sorted(OBSERVATION_MODELS)}")
