"""Persistence of each species, patch by patch.

Columns (for each species ``S``): ``S_persists`` (present at the end), ``S_occupancy``
(share of census steps after burn-in with S present), ``S_mean`` and ``S_cv`` (abundance
after burn-in), ``S_last_extinction`` (time of the last census at which a present
population was found gone; NaN if that never happened).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..system import SPECIES

__all__ = ["persistence_table", "regional_persistence"]


def _values(traj, species):
    data = getattr(traj, "data", traj)
    return data["time"].values, np.asarray(data[species].values, dtype=float), data["patch"].values


def persistence_table(traj, *, burn_in: float, species=SPECIES) -> pd.DataFrame:
    """Per-patch persistence figures, indexed by patch id.

    Parameters
    ----------
    traj : Trajectory or xarray.Dataset
        Abundances with dims ``(time, patch)``.
    burn_in : float
        Times before this are left out of occupancy, mean and CV.

    Returns
    -------
    pandas.DataFrame, one row per patch (index ``patch_id``).
    """
    columns = {}
    ids = None
    for s in species:
        time, x, ids = _values(traj, s)
        present = x > 0
        after = time >= burn_in
        xa = x[after]
        mean = xa.mean(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            cv = np.where(mean > 0, xa.std(axis=0) / mean, np.nan)
        lost = present[:-1] & ~present[1:]                      # (time - 1, patch)
        # the last census index at which the population was found gone
        any_lost = lost.any(axis=0)
        last_idx = lost.shape[0] - 1 - np.argmax(lost[::-1], axis=0)
        last = np.where(any_lost, time[1:][last_idx], np.nan)
        columns[f"{s}_persists"] = present[-1]
        columns[f"{s}_occupancy"] = present[after].mean(axis=0)
        columns[f"{s}_mean"] = mean
        columns[f"{s}_cv"] = cv
        columns[f"{s}_last_extinction"] = last
    table = pd.DataFrame(columns, index=pd.Index(ids.astype(str), name="patch_id"))
    return table


def regional_persistence(table: pd.DataFrame, species=SPECIES) -> dict:
    """Share of patches where each species persists (``S_regional_persistence``)."""
    return {f"{s}_regional_persistence": float(table[f"{s}_persists"].mean()) for s in species}
