"""Synchrony of abundance between patches.

Series
    Correlations and phases use ``log(1 + abundance)`` over the census steps at or after
    burn-in, linearly detrended with :func:`scipy.signal.detrend` (``detrend=True``, the
    default; a slow drift, say a population still settling, would otherwise read as
    synchrony) and standardised to zero mean and unit variance (ddof 0). A series with no
    variation left (an extinct population, one at a stable equilibrium, or one with missing
    values) has no correlation or phase; it is left out (NaN). Community synchrony uses the
    abundance itself, as its definition does.

No n × n matrix
    Correlations along links come from the link list; the mean correlation over all pairs, and
    each patch's mean correlation with all others, from the sum of the standardised series,
    since for standardised ``z_i`` (ddof 0) ``corr_ij = mean_t z_ti z_tj`` and so
    ``Σ_{j≠i} corr_ij = mean_t z_ti (Σ_j z_tj) − 1``. Synchrony against distance uses every
    pair only when there are at most ``max_pairs`` of them, else a reproducible random sample.
    Memory and time are O(patches × census steps + links + pairs sampled).

Replicates
    With a ``replicate`` dim (last), every figure is computed per replicate and then averaged
    over the replicates where it is defined (a NaN in one replicate does not hide the others):
    per-patch columns, network-level summaries, the Kuramoto series R(t) (mean over replicates
    at each time), and the pair correlations behind synchrony against distance (averaged per
    pair before binning). Groups of patches are found once, on link correlations averaged
    over replicates.

Synchrony against distance
    Bins default to 12 equal-count bins of the pair distances. The default band is a circular
    moving-block bootstrap over census steps, not over pairs: pairs share patches and census
    steps, so resampling pairs (``band="pairs"``) gives a band several times too narrow
    (on an exponentially correlated test field it covered the true curve in about 10% of
    bins, the time band in about 90%).

Column and key names are per species ``S`` (``prey``, ``predator``): columns
``S_sync_local``, ``S_sync_region``, ``S_sync_all``, ``S_phase_locking``, ``S_sync_group``;
summary keys ``S_synchrony``, ``S_kuramoto_mean``, ``S_community_synchrony``,
``S_sync_half_distance_km``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import xarray as xr

from ..columns import SYNCHRONY_COLUMNS
from ..errors import InputError
from ..model.system import SPECIES
from ._blocks import blocks

__all__ = [
    "standardized_log_series",
    "analytic_phases",
    "kuramoto_order",
    "phase_locking",
    "community_synchrony",
    "synchrony_table",
    "phase_synchrony",
    "community_synchrony_summary",
    "synchrony_by_distance",
    "synchrony_groups",
    "synchrony_analysis",
    "PATCH_COLUMNS",
    "SUMMARY_KEYS",
]

#: What :func:`synchrony_analysis` adds per species ``S``: columns ``S_<name>`` of the patch
#: table and keys ``S_<name>`` of the summary (a failed analysis leaves them empty).
PATCH_COLUMNS = SYNCHRONY_COLUMNS  # names in trophoscape.columns
SUMMARY_KEYS = ("synchrony", "kuramoto_mean", "community_synchrony", "sync_half_distance_km")

_LINK_BLOCK = 1 << 20  # elements per block of link products (bounded memory)
_PHASE_BLOCK = 1 << 21  # elements per block of patch columns (Hilbert, detrend, sums)


# --------------------------------------------------------------------------------------------
# building blocks on plain arrays


#: Below this standard deviation of log(1 + abundance) (about 0.1 % fluctuations) a
#: population is at a steady state: its correlations would measure solver noise, not
#: synchrony, so it is left out.
MIN_VARIATION = 1e-3


def _column_blocks(shape):
    """Slices over the columns of an array of ``shape`` (n_times, n_patches), each block
    holding about ``_PHASE_BLOCK`` values."""
    return blocks(shape[1], shape[0], _PHASE_BLOCK)


def standardized_log_series(x: np.ndarray, *, detrend: bool = False):
    """Standardise ``log(1 + x)`` column by column, optionally after a linear detrend.

    Parameters
    ----------
    x : ndarray, shape (n_times, n_patches)
        Abundance; negative values count as 0.
    detrend : bool
        Remove each column's least-squares straight line first (:func:`scipy.signal.detrend`).

    Returns
    -------
    z : ndarray, shape (n_times, n_patches)
        Zero mean, unit variance (ddof 0); columns that hardly vary (standard deviation of
        ``log(1 + x)`` at most ``MIN_VARIATION``), or with a non-finite value, are all NaN.
    valid : ndarray of bool, shape (n_patches,)
    """
    x = np.asarray(x, dtype=float)
    finite = np.isfinite(x).all(axis=0)
    y = np.where(finite, x, 0.0)  # the one new array; the steps below work in place
    np.maximum(y, 0.0, out=y)
    np.log1p(y, out=y)
    if detrend and y.shape[0] > 1:
        from scipy.signal import detrend as linear_detrend  # slow import: only when used

        for cols in _column_blocks(y.shape):  # scipy's least squares copies its input
            y[:, cols] = linear_detrend(y[:, cols], axis=0, type="linear")
    else:
        y -= y.mean(axis=0)
    sd = np.sqrt(np.einsum("tj,tj->j", y, y) / max(y.shape[0], 1))  # no n_times x n copy
    valid = finite & (sd > MIN_VARIATION)
    y /= np.where(valid, sd, 1.0)
    y[:, ~valid] = np.nan
    return y, valid


def _pair_products(zt: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``mean_t zt[a, t] zt[b, t]`` for every pair, shape (n_pairs,).

    ``zt`` is patch-major, shape (n_patches, n_times), so gathering a patch reads contiguous
    memory; pairs go in blocks so memory stays bounded whatever the number of pairs.
    """
    t = zt.shape[1]
    out = np.empty(a.shape[0])
    for sl in blocks(a.shape[0], t, _LINK_BLOCK):  # loop over blocks of pairs, not pairs
        out[sl] = np.einsum("it,it->i", zt[a[sl]], zt[b[sl]]) / max(t, 1)
    return out


def mean_pairwise(z: np.ndarray, valid: np.ndarray) -> float:
    """Mean Pearson correlation over all pairs of valid patches (exact, O(n T)).

    Parameters
    ----------
    z : ndarray, shape (n_times, n_patches)
    valid : ndarray of bool, shape (n_patches,)
    """
    k = int(valid.sum())
    if k < 2:
        return float("nan")
    total = _valid_total(z, valid)
    return float(((total * total).mean() - k) / (k * (k - 1)))


def _valid_total(z, valid):
    """``z[:, valid].sum(axis=1)`` without copying ``z[:, valid]`` whole."""
    total = np.zeros(z.shape[0])
    for cols in _column_blocks(z.shape):
        total += z[:, cols][:, valid[cols]].sum(axis=1)
    return total


def mean_correlation_with_all(z: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Each patch's mean correlation with every other valid patch (exact, O(n T)).

    Parameters
    ----------
    z : ndarray, shape (n_times, n_patches)
    valid : ndarray of bool, shape (n_patches,)

    Returns
    -------
    ndarray, shape (n_patches,)
        ``(mean_t z_ti Σ_j z_tj − 1) / (k − 1)`` over the ``k`` valid patches; NaN for invalid
        patches and when fewer than two are valid.
    """
    k = int(valid.sum())
    out = np.full(z.shape[1], np.nan)
    if k < 2:
        return out
    total = _valid_total(z, valid)
    for cols in _column_blocks(z.shape):  # (total @ z) / T, block by block
        idx = np.flatnonzero(valid[cols]) + cols.start
        out[idx] = (total @ z[:, idx] / z.shape[0] - 1.0) / (k - 1)
    return out


def analytic_phases(z: np.ndarray, *, trim: float = 0.1) -> np.ndarray:
    """Instantaneous phases from the analytic signal, with the ends discarded.

    Parameters
    ----------
    z : ndarray, shape (n_times, n_patches)
        Detrended, standardised series; NaN columns give NaN phases.
    trim : float in [0, 0.5)
        Share of the series dropped at each end, where the Hilbert transform of a finite
        series is distorted (edge effects; common practice).

    Returns
    -------
    theta : ndarray, shape (n_kept, n_patches)
        ``angle(hilbert(z))`` in (−π, π] for the kept times ``[k, n_times − k)``,
        ``k = floor(trim · n_times)``.
    """
    lo, hi = _trim_window(z.shape[0], trim)
    theta = np.full((hi - lo, z.shape[1]), np.nan)
    from scipy.signal import hilbert  # slow import: only when used

    for cols in _column_blocks(z.shape):  # blocks of patches bound the complex buffer
        block = z[:, cols]
        ok = np.isfinite(block).all(axis=0)
        h = hilbert(np.where(ok, block, 0.0), axis=0)[lo:hi]
        theta[:, cols] = np.where(ok, np.angle(h), np.nan)
    return theta


def _trim_window(n_times: int, trim: float) -> tuple[int, int]:
    if not 0.0 <= trim < 0.5:
        raise InputError(f"trim must be in [0, 0.5), got {trim!r}", field="trim")
    k = int(np.floor(trim * n_times))
    return k, n_times - k


def kuramoto_order(theta: np.ndarray):
    """Kuramoto order parameter ``R(t) e^{iψ(t)} = mean_j e^{iθ_j(t)}``.

    Parameters
    ----------
    theta : ndarray, shape (n_times, n_patches)
        Phases in radians; NaN columns (patches without a phase) are left out.

    Returns
    -------
    R : ndarray, shape (n_times,)
        In [0, 1]; NaN when no patch has a phase.
    psi : ndarray, shape (n_times,)
        Phase of the mean field.

    Notes
    -----
    Kuramoto (1984), Chemical Oscillations, Waves, and Turbulence (from memory).
    """
    ok = np.isfinite(theta).all(axis=0)
    if not ok.any():
        nan = np.full(theta.shape[0], np.nan)
        return nan, nan.copy()
    field = np.zeros(theta.shape[0], dtype=complex)
    for cols in _column_blocks(theta.shape):  # blocks bound the complex temporaries
        field += np.exp(1j * theta[:, cols][:, ok[cols]]).sum(axis=1)
    field /= np.count_nonzero(ok)
    return np.abs(field), np.angle(field)


def phase_locking(theta: np.ndarray, psi: np.ndarray) -> np.ndarray:
    """Phase-locking value of each patch with a reference phase.

    Parameters
    ----------
    theta : ndarray, shape (n_times, n_patches)
    psi : ndarray, shape (n_times,)

    Returns
    -------
    ndarray, shape (n_patches,)
        ``|mean_t exp(i(θ_i − ψ))|`` in [0, 1]: 1 for a constant phase lag, near 0 when the
        lag wanders; NaN where θ or ψ is missing.
    """
    out = np.empty(theta.shape[1])
    for cols in _column_blocks(theta.shape):  # blocks bound the complex temporaries
        out[cols] = np.abs(np.exp(1j * (theta[:, cols] - psi[:, None])).mean(axis=0))
    return out


def community_synchrony(x: np.ndarray) -> float:
    """Community synchrony ``φ = var(Σ_i x_i) / (Σ_i sd(x_i))²``.

    Parameters
    ----------
    x : ndarray, shape (n_times, n_patches)
        Abundance; patches with a non-finite value are left out.

    Returns
    -------
    float
        In [0, 1] (both terms with ddof 0): 1 when all series move perfectly together, 0 when
        the total is constant. NaN when no series varies.

    Notes
    -----
    Loreau & de Mazancourt (2008), Am. Nat. 172:E48 (from memory).
    """
    x = np.asarray(x, dtype=float)
    finite = np.isfinite(x).all(axis=0)
    if x.shape[0] < 2 or not finite.any():
        return float("nan")
    sd_sum, total = 0.0, np.zeros(x.shape[0])
    for cols in _column_blocks(x.shape):  # blocks bound the temporaries of std
        block = x[:, cols][:, finite[cols]]
        sd_sum += block.std(axis=0).sum()
        total += block.sum(axis=1)
    if not sd_sum > 0:
        return float("nan")
    return float(total.var() / sd_sum ** 2)


# --------------------------------------------------------------------------------------------
# trajectories: per species and replicate, then averaged


def _dataset(traj):
    data = getattr(traj, "data", traj)
    if not isinstance(data, xr.Dataset):
        raise InputError("expected a Trajectory or an xarray.Dataset", field="traj")
    return data


def _replicates(data, name: str, after: np.ndarray):
    """The abundance of one species as a list of arrays of shape (n_times_after, n_patches)."""
    if name not in data.data_vars:
        raise InputError(f"the results have no variable {name!r}; found "
                         f"{', '.join(map(str, data.data_vars)) or 'none'}", field=name)
    var = data[name]
    dims = var.dims
    if dims[:2] != ("time", "patch") or not set(dims) <= {"time", "patch", "replicate"}:
        raise InputError(f"dims must be ('time', 'patch'[, 'replicate']), got {dims}", field=name)
    kept = np.flatnonzero(after)
    if kept.size and kept[-1] - kept[0] + 1 == kept.size:  # a tail of the run: a view
        values = var.values[kept[0]:kept[-1] + 1]
    else:
        values = var.values[after]
    values = np.asarray(values, dtype=float)  # one float64 copy of the kept times only
    if values.ndim == 2:
        return [values]
    return [values[:, :, r] for r in range(values.shape[2])]


class _Mean:
    """Average of arrays over replicates, ignoring NaN (no warning for all-NaN slots)."""

    def __init__(self):
        self.total = None
        self.count = None

    def add(self, value):
        value = np.asarray(value, dtype=float)
        ok = np.isfinite(value)
        if self.total is None:
            self.total = np.zeros(value.shape)
            self.count = np.zeros(value.shape)
        self.total += np.where(ok, value, 0.0)
        self.count += ok

    def get(self):
        with np.errstate(invalid="ignore", divide="ignore"):
            out = np.where(self.count > 0, self.total / np.maximum(self.count, 1), np.nan)
        return out if out.ndim else float(out)


def _after(data, burn_in: float) -> np.ndarray:
    after = data["time"].values >= burn_in
    if not after.any():
        raise InputError(f"burn_in {burn_in!r} leaves no census step (last time "
                         f"{data['time'].values[-1]!r})", field="burn_in")
    return after


def _arcs(source, target, n: int):
    source = np.asarray(source, dtype=np.int64).ravel()
    target = np.asarray(target, dtype=np.int64).ravel()
    if source.shape != target.shape:
        raise InputError(f"source and target need the same length, got {source.size} and "
                         f"{target.size}", field="source")
    if source.size and (min(source.min(), target.min()) < 0
                        or max(source.max(), target.max()) >= n):
        raise InputError(f"links must join patch positions 0..{n - 1}", field="source")
    return source, target


def _weights(weights, species: str, m: int) -> np.ndarray:
    if weights is None:
        return np.ones(m)
    w = np.asarray(weights[species] if isinstance(weights, dict) else weights, dtype=float)
    if w.shape != (m,):
        raise InputError(f"weights for {species} must have one value per link ({m}), "
                         f"got shape {w.shape}", field="weights")
    return w


def _local_from_links(r, source, target, w, n):
    """Link-weighted mean correlation with linked patches, counting each arc at both ends."""
    ends = np.concatenate([source, target])
    w2 = np.concatenate([w, w])
    r2 = np.concatenate([r, r])
    ok = np.isfinite(r2) & (w2 > 0)
    num = np.bincount(ends[ok], weights=(w2 * r2)[ok], minlength=n)
    den = np.bincount(ends[ok], weights=w2[ok], minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / den, np.nan)


def _region(x, z, detrend):
    total_z, total_ok = standardized_log_series(x.sum(axis=1, keepdims=True), detrend=detrend)
    if not total_ok[0]:
        return np.full(z.shape[1], np.nan)
    return total_z[:, 0] @ z / z.shape[0]  # NaN stays NaN for series without a value


def _run(data, *, burn_in, species, parts, detrend=True, source=None, target=None,
         weights=None, trim=0.1, pairs=None):
    """One pass over species and replicates computing the requested ``parts``.

    Returns, per species, a dict of replicate-averaged results. ``pairs`` maps species to
    the plan of :func:`_distance_plan` (pairs whose correlations are wanted, and their bins).
    """
    after = _after(data, burn_in)
    n = data.sizes["patch"]
    if source is not None:
        source, target = _arcs(source, target, n)
    out = {}
    for s in species:
        acc = {}

        def add(key, value):
            acc.setdefault(key, _Mean()).add(value)

        w = _weights(weights, s, source.size) if "table" in parts else None
        for x in _replicates(data, s, after):
            if parts & {"table", "links", "phase", "pairs"}:
                z, valid = standardized_log_series(x, detrend=detrend)
                add("valid", valid.astype(float))
            if parts & {"links", "table", "pairs"}:
                zt = np.ascontiguousarray(z.T)
            if parts & {"links", "table"}:
                r = _pair_products(zt, source, target)
                add("links", r)
            if "table" in parts:
                add("local", _local_from_links(r, source, target, w, n))
                add("region", _region(x, z, detrend))
                add("all", mean_correlation_with_all(z, valid))
                add("synchrony", mean_pairwise(z, valid))
            if "pairs" in parts:
                plan = pairs[s]
                r_pairs, per_time = _binned_products(zt, plan["a"], plan["b"], plan["bin"],
                                                     plan["edges"].size - 1)
                add("pairs", r_pairs)
                add("per_time", per_time)
            if parts & {"links", "table", "pairs"}:
                del zt
            if "phase" in parts:
                theta = analytic_phases(z, trim=trim)
                del z
                big_r, psi = kuramoto_order(theta)
                add("kuramoto", big_r)
                add("kuramoto_mean", np.nanmean(big_r) if np.isfinite(big_r).any() else np.nan)
                add("plv", phase_locking(theta, psi))
                del theta
            if "community" in parts:
                add("community", community_synchrony(x))
        out[s] = {key: value.get() for key, value in acc.items()}
    return out


def _patch_index(data) -> pd.Index:
    return pd.Index(data["patch"].values.astype(str), name="patch_id")


def synchrony_table(traj, *, burn_in: float, source, target, weights, species=SPECIES,
                    detrend: bool = True):
    """Per-patch synchrony and the network-level mean pairwise synchrony.

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
        ``prey``, ``predator`` with dims (time, patch[, replicate]).
    burn_in : float
        Census steps at times >= burn_in are analysed.
    source, target : ndarray of int, shape (n_arcs,)
        The links, as directed arcs in patch-index order (an undirected link may appear
        once or twice: it counts once per direction for each end).
    weights : dict of str to ndarray, shape (n_arcs,), or None
        Per species, the weight of each arc in the link-weighted mean (the kernel weight);
        None weighs every arc 1.
    species : sequence of str
    detrend : bool
        Linearly detrend ``log(1 + abundance)`` before correlating (default True).

    Returns
    -------
    table : pandas.DataFrame, indexed by patch id
        ``S_sync_local`` (link-weighted mean correlation with linked patches; NaN without
        links), ``S_sync_region`` (correlation with the regional total, transformed the same
        way) and ``S_sync_all`` (mean correlation with every other patch whose series varies).
    summary : dict
        ``S_synchrony``: mean pairwise correlation over all pairs of patches whose series vary.
    """
    data = _dataset(traj)
    res = _run(data, burn_in=burn_in, species=species, parts={"table"}, detrend=detrend,
               source=source, target=target, weights=weights)
    columns, summary = {}, {}
    for s in species:
        columns[f"{s}_sync_local"] = res[s]["local"]
        columns[f"{s}_sync_region"] = res[s]["region"]
        columns[f"{s}_sync_all"] = res[s]["all"]
        summary[f"{s}_synchrony"] = res[s]["synchrony"]
    return pd.DataFrame(columns, index=_patch_index(data)), summary


def _kept_time(data, burn_in, trim):
    time = data["time"].values[_after(data, burn_in)]
    lo, hi = _trim_window(time.size, trim)
    return time[lo:hi]


def phase_synchrony(traj, *, burn_in: float, species=SPECIES, trim: float = 0.1,
                    detrend: bool = True):
    """Phase synchrony: Kuramoto order parameter and per-patch phase locking.

    Phases are the angle of the analytic signal (:func:`scipy.signal.hilbert`) of each
    detrended, standardised ``log(1 + abundance)`` series after burn-in, with a share ``trim``
    of the series dropped at each end.

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
    burn_in : float
    species : sequence of str
    trim : float in [0, 0.5)
    detrend : bool

    Returns
    -------
    table : pandas.DataFrame, indexed by patch id
        ``S_phase_locking``: ``PLV_i = |mean_t exp(i(θ_i − ψ))|`` with ψ the phase of the
        regional mean field ``mean_j exp(iθ_j)`` (patch i included); NaN without a phase.
    kuramoto : dict of str to xarray.DataArray, dims ("time",)
        ``R(t) = |mean_j exp(iθ_j(t))|`` over the kept times (Kuramoto 1984).
    summary : dict
        ``S_kuramoto_mean``: the mean of R(t) over the kept times.
    """
    data = _dataset(traj)
    res = _run(data, burn_in=burn_in, species=species, parts={"phase"}, detrend=detrend,
               trim=trim)
    time = _kept_time(data, burn_in, trim)
    table, kuramoto, summary = {}, {}, {}
    for s in species:
        table[f"{s}_phase_locking"] = res[s]["plv"]
        kuramoto[s] = _kuramoto_array(res[s]["kuramoto"], time, data, s)
        summary[f"{s}_kuramoto_mean"] = res[s]["kuramoto_mean"]
    return pd.DataFrame(table, index=_patch_index(data)), kuramoto, summary


def _kuramoto_array(values, time, data, s):
    return xr.DataArray(np.asarray(values, dtype=float), dims=("time",),
                        coords={"time": time}, name=f"{s}_kuramoto",
                        attrs={"long_name": f"Kuramoto order parameter R(t), {s}",
                               "units": "1",
                               "time_unit": data["time"].attrs.get("units", "")})


def community_synchrony_summary(traj, *, burn_in: float, species=SPECIES) -> dict:
    """``S_community_synchrony`` per species (Loreau & de Mazancourt 2008), see
    :func:`community_synchrony`; on abundance after burn-in, averaged over replicates."""
    data = _dataset(traj)
    res = _run(data, burn_in=burn_in, species=species, parts={"community"})
    return {f"{s}_community_synchrony": res[s]["community"] for s in species}


# --------------------------------------------------------------------------------------------
# synchrony against distance


def _centroids(centroids, n: int) -> np.ndarray:
    c = np.asarray(centroids, dtype=float)
    if c.shape != (n, 2):
        raise InputError(f"centroids must have shape ({n}, 2) (x, y in metres per patch), "
                         f"got {c.shape}", field="centroids")
    if not np.isfinite(c).all():
        bad = int(np.flatnonzero(~np.isfinite(c).all(axis=1))[0])
        raise InputError("centroid is not a finite number", feature=bad, field="centroids")
    return c


def _candidates(data, s, after) -> np.ndarray:
    """Patches whose series varies in at least one replicate (cheap, before any transform)."""
    keep = np.zeros(data.sizes["patch"], dtype=bool)
    for x in _replicates(data, s, after):
        keep |= np.isfinite(x).all(axis=0) & (np.ptp(x, axis=0) > 0)
    return keep


def _sample_pairs(index: np.ndarray, max_pairs: int, rng) -> tuple[np.ndarray, np.ndarray]:
    """All pairs of ``index`` when there are at most ``max_pairs``, else a random sample of
    ``max_pairs`` distinct pairs (uniform over unordered pairs)."""
    k = index.size
    total = k * (k - 1) // 2
    if total <= max_pairs:
        a, b = np.triu_indices(k, 1)
        return index[a], index[b]
    chosen = np.empty(0, dtype=np.int64)
    while chosen.size < max_pairs:  # a few rounds at most: duplicates are rare when k² ≫ m
        need = max_pairs - chosen.size
        a = rng.integers(0, k, size=need + need // 8 + 16)
        b = rng.integers(0, k, size=a.size)
        a, b = a[a != b], b[a != b]
        code = np.minimum(a, b) * k + np.maximum(a, b)
        fresh = np.setdiff1d(np.unique(code), chosen, assume_unique=True)
        chosen = np.concatenate([chosen, rng.permutation(fresh)[:need]])
    chosen = np.sort(chosen)
    return index[chosen // k], index[chosen % k]


def _bin_edges(d, bins):
    if np.ndim(bins) == 0:
        count = int(bins)
        if count < 1:
            raise InputError(f"bins must be >= 1, got {bins!r}", field="bins")
        if d.size == 0:
            return np.array([0.0, 0.0])
        edges = np.quantile(d, np.linspace(0.0, 1.0, count + 1))
        return np.unique(edges)  # tied distances can merge bins
    edges = np.asarray(bins, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or not np.all(np.diff(edges) > 0):
        raise InputError("bins must be a number of bins or increasing bin edges in km",
                         field="bins")
    return edges


def _distance_plan(data, species, after, centroids, max_pairs, bins, seed):
    """Per species: the pairs (sorted by bin), their distances, bins and a generator."""
    n = data.sizes["patch"]
    xy = _centroids(centroids, n)
    if int(max_pairs) < 1:
        raise InputError(f"max_pairs must be >= 1, got {max_pairs!r}", field="max_pairs")
    plans = {}
    for s in species:
        rng = np.random.default_rng(seed)
        a, b = _sample_pairs(np.flatnonzero(_candidates(data, s, after)), int(max_pairs), rng)
        dist = np.hypot(*(xy[a] - xy[b]).T) / 1000.0
        edges = _bin_edges(dist, bins)
        nb = edges.size - 1
        which = np.searchsorted(edges, dist, side="right") - 1
        which[dist == edges[-1]] = nb - 1  # the last edge closes the last bin
        inside = (which >= 0) & (which < nb)
        order = np.argsort(which[inside], kind="stable")
        plans[s] = {"a": a[inside][order], "b": b[inside][order],
                    "dist": dist[inside][order], "bin": which[inside][order],
                    "edges": edges, "rng": rng}
    return plans


def _binned_products(zt, a, b, which, nb):
    """Per pair correlation, shape (n_pairs,), and per bin and time the mean product of the
    standardised series over the bin's valid pairs, shape (n_bins, n_times)."""
    import scipy.sparse

    t = zt.shape[1]
    r = np.empty(a.shape[0])
    sums = np.zeros((nb, t))
    counts = np.zeros(nb)
    for sl in blocks(a.shape[0], t, _LINK_BLOCK):  # loop over blocks of pairs, not pairs
        prod = zt[a[sl]] * zt[b[sl]]
        r[sl] = prod.mean(axis=1)
        ok = np.isfinite(r[sl])
        member = scipy.sparse.csr_array(
            (ok.astype(float), (which[sl], np.arange(ok.size))), shape=(nb, ok.size))
        sums += member @ np.where(ok[:, None], prod, 0.0)
        counts += member.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        per_time = np.where(counts[:, None] > 0, sums / np.maximum(counts, 1)[:, None], np.nan)
    return r, per_time


def _binned_table(plan, r, per_time, *, band, n_boot, block, level):
    """The table of synchrony against distance from one species' plan and pair results."""
    edges, which, dist, rng = plan["edges"], plan["bin"], plan["dist"], plan["rng"]
    nb = edges.size - 1
    r = np.asarray(r, dtype=float).reshape(-1)
    ok = np.isfinite(r)
    pairs = np.bincount(which[ok], minlength=nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_d = np.bincount(which[ok], weights=dist[ok], minlength=nb) / pairs
        mean_r = np.bincount(which[ok], weights=r[ok], minlength=nb) / pairs
    low = np.full(nb, np.nan)
    high = np.full(nb, np.nan)
    tail = 100.0 * (1.0 - level) / 2.0
    if n_boot > 0 and band == "time" and per_time is not None and np.ndim(per_time) == 2:
        # Circular moving-block bootstrap over census steps: the bin mean is the time mean of
        # per_time, so resampling blocks of time resamples the whole realisation at once,
        # keeping both the autocorrelation of the series and the dependence between pairs.
        q = np.asarray(per_time, dtype=float)
        t = q.shape[1]
        length = int(block) if block else max(1, int(np.ceil(t ** (1.0 / 3.0))))
        length = min(max(length, 1), t)
        blocks = -(-t // length)
        begin = rng.integers(0, t, size=(n_boot, blocks))
        index = ((begin[:, :, None] + np.arange(length)) % t).reshape(n_boot, -1)[:, :t]
        means = q[:, index].mean(axis=2)  # (n_bins, n_boot)
        has = np.isfinite(means).all(axis=1) & (pairs > 0)
        if has.any():
            low[has], high[has] = np.percentile(means[has], [tail, 100.0 - tail], axis=1)
    elif n_boot > 0 and band == "pairs":
        values = r[ok]
        starts = np.concatenate([[0], np.cumsum(pairs)])  # pairs are sorted by bin
        for k in range(nb):  # loop over bins (a dozen), each resampled in one operation
            m = pairs[k]
            if m == 0:
                continue
            chunk = values[starts[k]:starts[k + 1]]
            means = chunk[rng.integers(0, m, size=(n_boot, m))].mean(axis=1)
            low[k], high[k] = np.percentile(means, [tail, 100.0 - tail])
    elif band not in ("time", "pairs"):
        raise InputError(f"band must be 'time' or 'pairs', got {band!r}", field="band")
    table = pd.DataFrame({"bin_lower_km": edges[:-1], "bin_upper_km": edges[1:],
                          "distance_km": mean_d, "correlation": mean_r, "low": low,
                          "high": high, "pairs": pairs})
    table.attrs.update({"band": band, "level": level, "n_boot": int(n_boot)})
    return table


def half_distance(table: pd.DataFrame) -> float:
    """Distance (km) at which binned synchrony first falls to half its first-bin value.

    Linear interpolation between the mean distances of consecutive bins (bins without pairs
    skipped). NaN if the first bin's correlation is not positive, or its band (``low``, when
    there is one) reaches down to 0 — half of noise is no distance — or if the curve never
    falls to half of it. For a correlation ``exp(−d/L)`` this is about ``d₁ + L ln 2``,
    ``d₁`` the first bin's mean distance.
    """
    t = table[table["pairs"] > 0]
    d = t["distance_km"].to_numpy(dtype=float)
    c = t["correlation"].to_numpy(dtype=float)
    if c.size < 2 or not c[0] > 0:
        return float("nan")
    if "low" in t.columns and np.isfinite(t["low"].iloc[0]) and not t["low"].iloc[0] > 0:
        return float("nan")
    half = c[0] / 2.0
    below = np.flatnonzero(c[1:] <= half)
    if below.size == 0:
        return float("nan")
    k = below[0] + 1
    c0, c1, d0, d1 = c[k - 1], c[k], d[k - 1], d[k]
    return float(d0 + (c0 - half) / (c0 - c1) * (d1 - d0)) if c0 != c1 else float(d0)


def synchrony_by_distance(traj, *, burn_in: float, species=SPECIES, centroids,
                          max_pairs: int = 200_000, bins=12, n_boot: int = 200, seed: int = 0,
                          detrend: bool = True, band: str = "time", block=None,
                          level: float = 0.95):
    """Correlation between patches against the straight-line distance between their centroids.

    A binned, nonparametric estimate of how synchrony decays with distance, with a bootstrap
    band: the idea of the nonparametric spatial covariance function of Bjørnstad & Falck
    (2001), Environ. Ecol. Stat. 8:53 (from memory), estimated by bin means.

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
    burn_in : float
    species : sequence of str
    centroids : ndarray, shape (n_patches, 2)
        Patch centroids in metres (a projected CRS).
    max_pairs : int
        All pairs of patches with varying series are used when there are at most this many;
        else a random sample of this many distinct pairs drawn with
        ``numpy.random.default_rng(seed)`` (the same sample for the same input and seed).
    bins : int or sequence of float
        A number of equal-count bins (edges at quantiles of the pair distances, so each bin
        holds about the same number of pairs and the bands are comparable), or increasing
        bin edges in km (pairs outside them are left out).
    n_boot : int
        Bootstrap resamples (0: no band).
    seed : int
    detrend : bool
    band : {"time", "pairs"}
        ``"time"`` (default): circular moving-block bootstrap over census steps, blocks of
        ``block`` steps (default ``ceil(T^(1/3))``; use a block longer than the population
        cycle for strongly cycling series). This is the sampling error of the bin means for
        the landscape at hand. ``"pairs"``: resample pairs within each bin; much narrower,
        since pairs share patches and census steps, it shows only the spread over pairs.
    block : int, optional
    level : float
        Coverage of the percentile band.

    Returns
    -------
    tables : dict of str to pandas.DataFrame
        Per species, one row per bin: ``bin_lower_km``, ``bin_upper_km``, ``distance_km``
        (mean distance of its pairs), ``correlation`` (mean over its pairs), ``low``,
        ``high`` (the band), ``pairs`` (pairs with a correlation).
    summary : dict
        ``S_sync_half_distance_km``: see :func:`half_distance`.
    """
    data = _dataset(traj)
    after = _after(data, burn_in)
    plans = _distance_plan(data, species, after, centroids, max_pairs, bins, seed)
    res = _run(data, burn_in=burn_in, species=species, parts={"pairs"}, detrend=detrend,
               pairs=plans)
    tables, summary = {}, {}
    for s in species:
        tables[s] = _binned_table(plans[s], res[s]["pairs"], res[s]["per_time"], band=band,
                                  n_boot=n_boot, block=block, level=level)
        summary[f"{s}_sync_half_distance_km"] = half_distance(tables[s])
    return tables, summary


# --------------------------------------------------------------------------------------------
# groups of patches that move together


def _groups_from_links(r, source, target, valid, seed, resolution, rank=None):
    """Louvain communities of the graph of links with positive correlation.

    igraph's ``community_multilevel`` (the Louvain method of Blondel et al. 2008, compiled)
    on the patches in the order of ``rank`` (a patch's place among the ids; default the
    patch order), with igraph's random numbers drawn from ``random.Random(seed)``: so the
    groups follow the patches' ids, not their order in the file. Groups are numbered by
    size, largest first, ties by their first patch in ``rank`` order.
    """
    import random

    import igraph

    n = valid.size
    rank = np.arange(n) if rank is None else np.asarray(rank, dtype=np.int64)
    a, b = np.minimum(source, target), np.maximum(source, target)
    keep = (a != b) & np.isfinite(r) & (r > 0) & valid[a] & valid[b]
    a, b, r = rank[a[keep]], rank[b[keep]], r[keep]
    a, b = np.minimum(a, b), np.maximum(a, b)
    # an undirected link stored as two arcs (or parallel routes) is one edge: mean correlation
    code, inverse = np.unique(a * n + b, return_inverse=True)
    weight = np.bincount(inverse, weights=r) / np.bincount(inverse)
    nodes = np.sort(rank[valid])  # the patches with a series, in id order
    where = np.full(n, -1, dtype=np.int64)
    where[nodes] = np.arange(nodes.size)
    graph = igraph.Graph(n=nodes.size,
                         edges=np.column_stack([where[code // n], where[code % n]]))
    igraph.set_random_number_generator(random.Random(seed))
    try:
        membership = np.asarray(graph.community_multilevel(
            weights=weight, resolution=resolution).membership, dtype=np.int64)
    finally:
        igraph.set_random_number_generator(random)
    by_rank = np.full(n, -1, dtype=np.int64)
    if nodes.size:
        size = np.bincount(membership)
        first = np.full(size.size, n, dtype=np.int64)
        np.minimum.at(first, membership, nodes)
        order = np.lexsort((first, -size))
        number = np.empty_like(order)
        number[order] = np.arange(order.size)
        by_rank[nodes] = number[membership]
    return by_rank[rank]


def synchrony_groups(traj, *, burn_in: float, source, target, species=SPECIES, seed: int = 0,
                     resolution: float = 1.0, detrend: bool = True) -> pd.DataFrame:
    """Groups of linked patches whose populations move together.

    The graph has one node per patch with a varying series and one edge per linked pair with a
    positive correlation (weight: the correlation; with replicates, the mean over replicates);
    groups are its communities by the Louvain method (Blondel et al. 2008, J. Stat. Mech.
    P10008, from memory; igraph's ``community_multilevel``) with the given ``seed`` and
    ``resolution``, on the patches in the order of their ids (so the groups do not depend on
    the order of the patch file).

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
    burn_in : float
    source, target : ndarray of int, shape (n_arcs,)
    species : sequence of str
    seed : int
    resolution : float
        Louvain resolution: above 1 favours smaller groups.
    detrend : bool

    Returns
    -------
    pandas.DataFrame, indexed by patch id
        ``S_sync_group``: int, 0 for the largest group, 1 the next...; -1 for patches without a
        varying series. A patch with no positive link is a group of its own.
    """
    data = _dataset(traj)
    res = _run(data, burn_in=burn_in, species=species, parts={"links"}, detrend=detrend,
               source=source, target=target)
    return _groups_table(data, res, source, target, species, seed, resolution)


def _groups_table(data, res, source, target, species, seed, resolution):
    n = data.sizes["patch"]
    source, target = _arcs(source, target, n)
    ids = np.asarray(data["patch"].values).astype(str)
    rank = np.empty(n, dtype=np.int64)
    rank[np.argsort(ids, kind="stable")] = np.arange(n)
    columns = {}
    for s in species:
        valid = np.asarray(res[s]["valid"]) > 0  # a varying series in some replicate
        r = res[s].get("links", np.empty(0))
        r = np.asarray(r, dtype=float).reshape(-1)
        columns[f"{s}_sync_group"] = _groups_from_links(r, source, target, valid, seed,
                                                        resolution, rank)
    return pd.DataFrame(columns, index=_patch_index(data))


# --------------------------------------------------------------------------------------------
# everything at once


def synchrony_analysis(traj, *, burn_in: float, source, target, weights, centroids,
                       species=SPECIES, seed: int = 0, detrend: bool = True, trim: float = 0.1,
                       max_pairs: int = 200_000, bins=12, n_boot: int = 200,
                       band: str = "time", block=None, resolution: float = 1.0):
    """All synchrony figures of a run in one pass over the series.

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
        ``prey``, ``predator`` with dims (time, patch[, replicate]).
    burn_in : float
    source, target : ndarray of int, shape (n_arcs,)
        Links as arcs in patch order (``Network.source``, ``Network.target``).
    weights : dict of str to ndarray, shape (n_arcs,), or None
        Per species arc weights for ``S_sync_local``.
    centroids : ndarray, shape (n_patches, 2), or None
        Centroids in metres; None skips synchrony against distance.
    species : sequence of str
    seed : int
        For the pair sample, the bootstrap and the Louvain groups.
    detrend, trim, max_pairs, bins, n_boot, band, block, resolution
        See :func:`synchrony_table`, :func:`phase_synchrony`, :func:`synchrony_by_distance`
        and :func:`synchrony_groups`.

    Returns
    -------
    table : pandas.DataFrame, indexed by patch id
        Per species ``S_sync_local``, ``S_sync_region``, ``S_sync_all``, ``S_phase_locking``,
        ``S_sync_group``.
    summary : dict
        Per species ``S_synchrony``, ``S_kuramoto_mean``, ``S_community_synchrony``,
        ``S_sync_half_distance_km``.
    extras : dict
        ``"kuramoto"``: {species: DataArray R(t)}; ``"by_distance"``: {species: DataFrame}
        (empty when ``centroids`` is None).
    """
    data = _dataset(traj)
    n = data.sizes["patch"]
    after = _after(data, burn_in)
    source, target = _arcs(source, target, n)
    parts = {"table", "phase", "community"}
    plans = {}
    if centroids is not None:
        parts.add("pairs")
        plans = _distance_plan(data, species, after, centroids, max_pairs, bins, seed)
    res = _run(data, burn_in=burn_in, species=species, parts=parts, detrend=detrend,
               source=source, target=target, weights=weights, trim=trim, pairs=plans)
    groups = _groups_table(data, res, source, target, species, seed, resolution)
    time = _kept_time(data, burn_in, trim)
    columns, summary = {}, {}
    extras = {"kuramoto": {}, "by_distance": {}}
    for s in species:
        q = res[s]
        columns[f"{s}_sync_local"] = q["local"]
        columns[f"{s}_sync_region"] = q["region"]
        columns[f"{s}_sync_all"] = q["all"]
        columns[f"{s}_phase_locking"] = q["plv"]
        columns[f"{s}_sync_group"] = groups[f"{s}_sync_group"].to_numpy()
        summary[f"{s}_synchrony"] = q["synchrony"]
        summary[f"{s}_kuramoto_mean"] = q["kuramoto_mean"]
        summary[f"{s}_community_synchrony"] = q["community"]
        extras["kuramoto"][s] = _kuramoto_array(q["kuramoto"], time, data, s)
        if centroids is not None:
            table = _binned_table(plans[s], q["pairs"], q["per_time"], band=band,
                                  n_boot=n_boot, block=block, level=0.95)
            extras["by_distance"][s] = table
            summary[f"{s}_sync_half_distance_km"] = half_distance(table)
        else:
            summary[f"{s}_sync_half_distance_km"] = float("nan")
    return pd.DataFrame(columns, index=_patch_index(data)), summary, extras
