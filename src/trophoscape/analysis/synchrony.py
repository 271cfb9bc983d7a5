"""Synchrony of abundance between patches.

Correlations are Pearson correlations of ``log(1 + abundance)`` over the census steps after
burn-in. Nothing here builds an ``n × n`` matrix: correlations along links come from the
link list, and the mean over all pairs from the sum of standardised series, since for
series ``z_i`` standardised to zero mean and unit variance (ddof 0)
``Σ_{i≠j} corr_ij = (1/T) Σ_t (Σ_i z_ti)² − n``.
A series with no variation (an extinct population, or one at a stable equilibrium) has no
correlation; it is left out (NaN).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..system import SPECIES

__all__ = ["standardized_log_series", "link_correlations", "synchrony_table", "mean_pairwise"]

_LINK_BLOCK = 1 << 20  # elements per block of link products (bounded memory)


def standardized_log_series(x: np.ndarray):
    """Standardise ``log(1 + x)`` column by column.

    Parameters
    ----------
    x : ndarray, shape (n_times, n_patches)

    Returns
    -------
    z : ndarray, shape (n_times, n_patches)
        Zero mean, unit variance (ddof 0); columns without variation are all NaN.
    valid : ndarray of bool, shape (n_patches,)
    """
    y = np.log1p(np.maximum(x, 0.0))
    y = y - y.mean(axis=0)
    sd = np.sqrt((y * y).mean(axis=0))
    valid = sd > 1e-12 * (1.0 + np.abs(np.log1p(np.maximum(x, 0.0))).max(axis=0, initial=0.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(valid, y / np.where(valid, sd, 1.0), np.nan)
    return z, valid


def link_correlations(z: np.ndarray, source: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Correlation along each link, ``shape (n_links,)``, in blocks of bounded memory."""
    t = z.shape[0]
    out = np.empty(source.shape[0])
    step = max(1, _LINK_BLOCK // max(t, 1))
    for start in range(0, source.shape[0], step):  # loop over blocks, not links
        s, g = source[start:start + step], target[start:start + step]
        out[start:start + step] = np.einsum("ti,ti->i", z[:, s], z[:, g]) / t
    return out


def mean_pairwise(z: np.ndarray, valid: np.ndarray) -> float:
    """Mean Pearson correlation over all pairs of valid patches (exact, O(n T))."""
    k = int(valid.sum())
    if k < 2:
        return float("nan")
    total = z[:, valid].sum(axis=1)
    return float(((total * total).mean() - k) / (k * (k - 1)))


def synchrony_table(traj, *, burn_in: float, source, target, weights, species=SPECIES):
    """Per-patch synchrony and the network-level mean pairwise synchrony.

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
    burn_in : float
    source, target : ndarray of int, shape (n_arcs,)
        The links, as directed arcs in patch-index order (an undirected link may appear
        once or twice: it counts once per direction for each end).
    weights : dict of str to ndarray, shape (n_arcs,)
        Per species, the weight of each arc in the link-weighted mean (the kernel weight).

    Returns
    -------
    table : pandas.DataFrame
        ``S_sync_local`` (link-weighted mean correlation with linked patches; NaN without
        links) and ``S_sync_region`` (correlation with the regional total).
    summary : dict
        ``S_synchrony``: mean pairwise correlation over all pairs of patches whose series vary.
    """
    data = getattr(traj, "data", traj)
    time = data["time"].values
    after = time >= burn_in
    ids = data["patch"].values.astype(str)
    n = ids.size
    source = np.asarray(source, dtype=np.int64)
    target = np.asarray(target, dtype=np.int64)
    columns, summary = {}, {}
    for s in species:
        x = np.asarray(data[s].values, dtype=float)[after]
        z, valid = standardized_log_series(x)
        # each end of an arc sees the arc: local synchrony counts both directions
        ends = np.concatenate([source, target])
        w = np.concatenate([weights[s], weights[s]])
        r = link_correlations(z, source, target)
        r2 = np.concatenate([r, r])
        ok = np.isfinite(r2) & (w > 0)
        num = np.bincount(ends[ok], weights=(w * r2)[ok], minlength=n)
        den = np.bincount(ends[ok], weights=w[ok], minlength=n)
        with np.errstate(invalid="ignore", divide="ignore"):
            columns[f"{s}_sync_local"] = np.where(den > 0, num / den, np.nan)
        total_z, total_ok = standardized_log_series(x.sum(axis=1, keepdims=True))
        if total_ok[0]:
            columns[f"{s}_sync_region"] = (z * total_z).mean(axis=0)
        else:
            columns[f"{s}_sync_region"] = np.full(n, np.nan)
        summary[f"{s}_synchrony"] = mean_pairwise(z, valid)
    return pd.DataFrame(columns, index=pd.Index(ids, name="patch_id")), summary
