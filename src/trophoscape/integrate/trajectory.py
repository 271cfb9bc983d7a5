"""What an integration returns: the census series (:class:`Trajectory`), the solver's counters
(:class:`SolverStats`) and the census times.

Shared by the ODE solver (:mod:`trophoscape.integrate.ode`) and the event-based engine
(:mod:`trophoscape.integrate.events`), so neither imports the other for them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

__all__ = ["SolverStats", "Trajectory", "census_times"]

@dataclass(frozen=True)
class SolverStats:
    """What the solver did: as on scipy's ``OdeResult``, plus restarts and removals.

    ``restarts`` counts the times the solver was started afresh inside the run (after a
    quasi-extinction, a shock, or a census with noisy rates). ``removals`` and
    ``removed_individuals`` count, per species (prey, predator), the local populations the
    quasi-extinction rule removed and the individuals they held.
    """

    method: str
    nfev: int
    njev: int
    nlu: int
    steps: int
    restarts: int
    status: int
    message: str
    removals: tuple = (0, 0)
    removed_individuals: tuple = (0.0, 0.0)

    @property
    def success(self) -> bool:
        return self.status == 0

    def as_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


@dataclass(frozen=True, eq=False)
class Trajectory:
    """Abundances over time, backed by an xarray Dataset.

    Attributes
    ----------
    data : xarray.Dataset
        Variables ``prey`` and ``predator`` (individuals), dims ``("time", "patch")`` (and
        ``replicate`` last when there are several); coordinate ``patch`` holds the ids.
    stats : SolverStats
        Solver statistics.
    """

    data: xr.Dataset
    stats: SolverStats

    @property
    def time(self) -> np.ndarray:
        return self.data["time"].values

    @property
    def ids(self) -> np.ndarray:
        return self.data["patch"].values

    def __getitem__(self, species: str) -> xr.DataArray:
        return self.data[species]


def census_times(duration: float, census_interval: float) -> np.ndarray:
    """Census times ``0, Δ, 2Δ, ...`` up to and including ``duration``."""
    k = int(np.floor(duration / census_interval + 1e-9))
    times = np.arange(k + 1) * census_interval
    if duration - times[-1] > 1e-9 * max(1.0, duration):
        times = np.append(times, duration)
    return times
