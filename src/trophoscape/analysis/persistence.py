"""Persistence of each species, patch by patch and over the region.

Per patch and species ``S`` (columns of the output table):

``S_persists``
    present at the end of the run (with replicates: in at least half of them).
``S_occupancy``
    share of census steps after burn-in with ``S`` present.
``S_mean``, ``S_cv``
    mean and coefficient of variation of abundance after burn-in.
``S_last_extinction``
    time of the last census at which a population present before was found gone (NaN if
    never).
``S_extinctions``, ``S_recolonisations``
    number of local extinctions (present -> absent) and recolonisations (absent -> present)
    between successive census steps, over the whole run.
``S_time_to_extinction``
    mean length of the occupied spells that ended in a local extinction (NaN where none did).
``S_margin``
    lowest abundance after burn-in divided by the quasi-extinction abundance: below 1 means
    the population was cleared at least once; a margin of 3 means it never came within a
    factor of 3 of the threshold.
``S_persistence_share``, ``S_persistence_low``, ``S_persistence_high``
    with replicates only: share of replicates in which the patch keeps ``S`` at the end,
    with its Wilson score interval (Wilson 1927).

A species is *present* in a patch at a census when its abundance is at least the
quasi-extinction abundance (any positive abundance when that is 0): a population below the
threshold that is growing from zero by immigration, or held there by a trickle of
immigrants, is not counted as present until it reaches the threshold.

Trajectories may carry a ``replicate`` dimension (last); per-patch figures are then
averaged over replicates.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..columns import PERSISTENCE_COLUMNS
from ..model.system import SPECIES
from ._blocks import blocks

__all__ = ["persistence_table", "regional_persistence", "occupancy_curve", "present",
           "wilson_interval", "PATCH_COLUMNS", "REGIONAL_KEYS"]

#: What the functions below give per species ``S``: columns ``S_<name>`` of
#: :func:`persistence_table` and keys ``S_<name>`` of :func:`regional_persistence`, then
#: those added with replicates (a failed analysis leaves them empty).
PATCH_COLUMNS = PERSISTENCE_COLUMNS  # names in trophoscape.columns
REGIONAL_KEYS = {1: ("regional_persistence", "area_persistence", "regional_extinction_time",
                     "regional_survival"),
                 "replicates": ("regional_survival_low", "regional_survival_high")}


def wilson_interval(successes, trials, *, confidence: float = 0.95):
    """Wilson score interval for a binomial proportion, vectorised.

    ``(p + z²/2n ± z sqrt(p(1-p)/n + z²/4n²)) / (1 + z²/n)`` with ``p = k/n`` and ``z`` the
    normal quantile (Wilson 1927, J. Am. Stat. Assoc. 22:209; from memory). It agrees with
    ``scipy.stats.binomtest(k, n).proportion_ci(method="wilson")``; this version takes arrays.

    Returns
    -------
    low, high : ndarray
        NaN where ``trials`` is 0.
    """
    from scipy.stats import norm

    k = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    z = norm.ppf(0.5 + confidence / 2.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = k / n
        z2n = z * z / n
        centre = (p + z2n / 2.0) / (1.0 + z2n)
        half = z * np.sqrt(p * (1.0 - p) / n + z2n / (4.0 * n)) / (1.0 + z2n)
    low = np.where(n > 0, np.clip(centre - half, 0.0, 1.0), np.nan)
    high = np.where(n > 0, np.clip(centre + half, 0.0, 1.0), np.nan)
    return low, high


def _cube(data, species):
    """Abundance as ``(time, patch, replicate)`` (a replicate axis of 1 when absent)."""
    x = data[species]
    if "replicate" in x.dims:
        x = x.transpose("time", "patch", "replicate")
        return _floating(x.values)
    return _floating(x.transpose("time", "patch").values)[:, :, None]


def _floating(values) -> np.ndarray:
    """The values as they are when floating point (float32 storage is not copied)."""
    values = np.asarray(values)
    return values if np.issubdtype(values.dtype, np.floating) else values.astype(float)


def present(x, extinction_abundance: float):
    """Presence: abundance at or above the quasi-extinction abundance (above 0 if that is 0)."""
    return x >= extinction_abundance if extinction_abundance > 0 else x > 0


def _spell_statistics(present: np.ndarray, time: np.ndarray):
    """Extinction counts and spell lengths from a presence cube ``(time, patch, rep)``.

    An occupied spell starts at time 0 (if present then) or at a recolonisation, and ends in
    an extinction; only spells that end are averaged.
    """
    lost = present[:-1] & ~present[1:]
    gained = ~present[:-1] & present[1:]
    n_lost = lost.sum(axis=0)
    # the start time of the spell each census belongs to, carried forward along time
    starts = np.zeros(present.shape, dtype=bool)
    starts[0] = present[0]
    starts[1:] = gained
    start_time = np.where(starts, time[:, None, None], -np.inf)
    start_time = np.maximum.accumulate(start_time, axis=0)
    # a spell that ends between census t and t+1 lasted time[t+1] - start_time[t]
    ended = np.where(lost, time[1:, None, None] - start_time[:-1], 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_spell = np.where(n_lost > 0, ended.sum(axis=0) / n_lost, np.nan)
    last_idx = lost.shape[0] - 1 - np.argmax(lost[::-1], axis=0)
    last = np.where(n_lost > 0, time[1:][last_idx], np.nan)
    return n_lost, gained.sum(axis=0), mean_spell, last


def persistence_table(traj, *, burn_in: float, extinction_abundance: float = 1.0,
                      species=SPECIES, confidence: float = 0.95) -> pd.DataFrame:
    """Per-patch persistence figures, indexed by patch id (columns: see the module notes).

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
        Abundances with dims ``(time, patch[, replicate])``.
    burn_in : float
        Times before this are left out of occupancy, mean, CV and margin.
    extinction_abundance : float
        The quasi-extinction abundance the run used (for ``S_margin``).
    """
    data = getattr(traj, "data", traj)
    time = np.asarray(data["time"].values, dtype=float)
    ids = data["patch"].values.astype(str)
    first = int(np.searchsorted(time, burn_in, side="left"))  # census times are sorted
    columns = {}
    for s in species:
        x = _cube(data, s)
        reps = x.shape[2]
        # blocks of patches bound the temporaries (a few copies of time x block x replicate)
        # however large the network; every block is vectorised
        parts = [_species_block(x[:, cols], time, first, extinction_abundance)
                 for cols in blocks(x.shape[1], x.shape[0] * reps, PATCH_BLOCK)]
        got = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
        kept = got["kept"]
        low, high = wilson_interval(kept, reps, confidence=confidence)
        counts = (lambda a: a[:, 0]) if reps == 1 else (lambda a: a.mean(axis=1))
        columns[f"{s}_persists"] = kept * 2 >= reps
        columns[f"{s}_occupancy"] = got["occupancy"]
        columns[f"{s}_mean"] = got["mean"].mean(axis=1)
        columns[f"{s}_cv"] = _nanmean_rows(got["cv"])
        columns[f"{s}_last_extinction"] = _nanmax_rows(got["last"])
        columns[f"{s}_extinctions"] = counts(got["lost"])
        columns[f"{s}_recolonisations"] = counts(got["gained"])
        columns[f"{s}_time_to_extinction"] = _nanmean_rows(got["spell"])
        columns[f"{s}_margin"] = got["margin"].min(axis=1)
        if reps > 1:  # an interval from one deterministic run would only mislead
            columns[f"{s}_persistence_share"] = kept / reps
            columns[f"{s}_persistence_low"] = low
            columns[f"{s}_persistence_high"] = high
    return pd.DataFrame(columns, index=pd.Index(ids, name="patch_id"))


#: Census values (time x patches x replicates) per block of :func:`persistence_table`.
PATCH_BLOCK = 4_000_000


def _species_block(x, time, first, extinction_abundance) -> dict:
    """Per-patch figures of one species for a block ``x`` of shape (time, patch, replicate).

    ``x`` may be float32 (as a study stores it): sums and moments are taken in float64.
    """
    here = present(x, extinction_abundance)
    xa = x[first:]
    mean = xa.mean(axis=0, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        cv = np.where(mean > 0, xa.std(axis=0, dtype=np.float64) / mean, np.nan)
        margin = (xa.min(axis=0).astype(np.float64) / extinction_abundance
                  if extinction_abundance > 0 else np.full(mean.shape, np.nan))
    n_lost, n_gained, spell, last = _spell_statistics(here, time)
    return {"kept": here[-1].sum(axis=1), "occupancy": here[first:].mean(axis=(0, 2)),
            "mean": mean, "cv": cv, "margin": margin, "lost": n_lost, "gained": n_gained,
            "spell": spell, "last": last}


def _nanmean_rows(a: np.ndarray) -> np.ndarray:
    """Mean over replicates ignoring NaN; NaN where a row has no value (no warning)."""
    ok = ~np.isnan(a)
    count = ok.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, np.where(ok, a, 0.0).sum(axis=1) / count, np.nan)


def _nanmax_rows(a: np.ndarray) -> np.ndarray:
    ok = ~np.isnan(a)
    return np.where(ok.any(axis=1), np.where(ok, a, -np.inf).max(axis=1), np.nan)


def occupancy_curve(traj, *, species=SPECIES, extinction_abundance: float = 1.0):
    """Share of patches occupied at each census, per species (mean over replicates).

    Occupied: abundance at or above ``extinction_abundance`` (:func:`present`).

    Returns
    -------
    pandas.DataFrame indexed by time, one column per species.
    """
    data = getattr(traj, "data", traj)
    time = np.asarray(data["time"].values, dtype=float)
    return pd.DataFrame({s: present(_cube(data, s), extinction_abundance).mean(axis=(1, 2))
                         for s in species},
                        index=pd.Index(time, name="time"))


def regional_persistence(table: pd.DataFrame, traj=None, *, species=SPECIES,
                         area_km2=None, confidence: float = 0.95,
                         extinction_abundance: float = 1.0) -> dict:
    """Network-level persistence figures.

    ``S_regional_persistence``
        share of patches where S persists at the end (mean over replicates).
    ``S_area_persistence``
        the same, weighted by patch area (when ``area_km2`` is given).
    ``S_regional_extinction_time``
        first census with S absent from every patch (NaN if it never happened; with
        replicates the earliest over replicates).
    ``S_regional_survival``, ``_low``, ``_high``
        share of replicates in which S is still present somewhere at the end, with its
        Wilson interval (the interval only with replicates).
    """
    out = {}
    data = None if traj is None else getattr(traj, "data", traj)
    for s in species:
        share = table[f"{s}_persistence_share"] if f"{s}_persistence_share" in table else \
            table[f"{s}_persists"].astype(float)
        out[f"{s}_regional_persistence"] = float(share.mean())
        if area_km2 is not None:
            w = np.asarray(area_km2, dtype=float)
            out[f"{s}_area_persistence"] = float(np.sum(w * share.to_numpy()) / w.sum())
        if data is not None:
            x = _cube(data, s)
            time = np.asarray(data["time"].values, dtype=float)
            anywhere = present(x, extinction_abundance).any(axis=1)  # (time, replicate)
            gone = ~anywhere
            first = np.where(gone.any(axis=0), time[np.argmax(gone, axis=0)], np.nan)
            out[f"{s}_regional_extinction_time"] = (float(np.nanmin(first))
                                                    if np.isfinite(first).any() else float("nan"))
            alive = int(anywhere[-1].sum())
            reps = anywhere.shape[1]
            out[f"{s}_regional_survival"] = alive / reps
            if reps > 1:
                low, high = wilson_interval(alive, reps, confidence=confidence)
                out[f"{s}_regional_survival_low"] = float(low)
                out[f"{s}_regional_survival_high"] = float(high)
    return out
