"""Warnings a practitioner would want before a run (``trophoscape check``).

Each check looks at a built study and returns plain advice: what was found, why it matters,
what to consider. None of them stops a run; they point at settings that make the results
hard to read or that contradict the data.
"""

from __future__ import annotations

import numpy as np
import shapely

from ..model import system as system_module
from ..model.dynamics import interior_equilibrium
from ..model.system import SPECIES

__all__ = ["practical_warnings", "typical_gap_km"]


def _some(ids, k=5) -> str:
    ids = [str(i) for i in ids]
    return ", ".join(ids[:k]) + (f" and {len(ids) - k} more" if len(ids) > k else "")


def typical_gap_km(landscape) -> float:
    """Median boundary-to-boundary distance from each patch to its nearest neighbour (km)."""
    geoms = landscape.geometries
    if geoms.size < 2:
        return float("nan")
    tree = shapely.STRtree(geoms)
    (_, _), dist = tree.query_nearest(geoms, exclusive=True, return_distance=True,
                                      all_matches=False)
    return float(np.median(dist) / 1000.0)


def nearest_gap_km(landscape, positions) -> np.ndarray:
    """Boundary-to-boundary distance (km) from each patch at ``positions`` to its nearest
    other patch, through the spatial index."""
    geoms = landscape.geometries
    if geoms.size < 2 or len(positions) == 0:
        return np.full(len(positions), np.nan)
    tree = shapely.STRtree(geoms)
    (_, _), dist = tree.query_nearest(geoms[np.asarray(positions)], exclusive=True,
                                      return_distance=True, all_matches=False)
    return np.asarray(dist, dtype=float) / 1000.0


def practical_warnings(study) -> list[str]:
    """Advice on a study, one sentence or two each; empty when nothing stands out."""
    sc = study.scenario
    land, net, model = study.landscape, study.network, study.model
    area = land.area_km2
    ids = land.ids
    out = []
    isolated = net.summary()["isolated"]
    if isolated:
        where = np.flatnonzero(np.isin(ids.astype(str), [str(i) for i in isolated]))
        gap = nearest_gap_km(land, where)
        if sc["dispersal.distance"] == "boundary" and np.isfinite(gap).any():
            fix = (f"If animals do cross, set [dispersal] max_distance_km above "
                   f"{np.nanmax(gap):.3g} km (the widest gap from one of them to its nearest "
                   "patch) or add corridors.")
        else:
            fix = "If animals do cross, raise [dispersal] max_distance_km or add corridors."
        out.append(f"{len(isolated)} patch(es) have no link ({_some(isolated)}): nothing moves "
                   f"in or out, so a local extinction there is permanent. {fix}")
    threshold = sc["run.extinction_abundance"]
    if threshold > 0 and "capacity" in model.growth_form.needs:
        small = model.params["capacity"] * area < threshold
        if small.any():
            out.append(f"{int(small.sum())} patch(es) hold fewer than {threshold:g} prey even at "
                       f"carrying capacity ({_some(ids[small])}): prey never count as present "
                       "there and the patches act only as stepping stones. If they should "
                       "hold prey, "
                       "check their area and quality, prey.capacity_density, or lower "
                       "run.extinction_abundance.")
        try:
            _, p_star = interior_equilibrium(model)
        except NotImplementedError:
            p_star = None
        if p_star is not None:
            low = np.isfinite(p_star) & (p_star * area < threshold)
            if low.any():
                out.append(f"{int(low.sum())} patch(es) would hold fewer than {threshold:g} "
                           f"predator(s) at the local equilibrium ({_some(ids[low])}): the "
                           "predator can live there only as part of the wider network, so "
                           "keep them linked; if they should hold predators on their own, "
                           "check their quality and prey.capacity_density.")
    gap = typical_gap_km(land)
    if np.isfinite(gap) and gap > 0:
        for s in SPECIES:
            scale = float(np.median(study.dispersal[s]["scale_km"]))
            if net.kernel in ("exponential", "gaussian") and scale < gap / 5:
                out.append(f"the {s} kernel scale ({scale:g} km) is far below the typical gap "
                           f"between neighbouring patches ({gap:.2g} km): emigrants still "
                           "leave at the emigration rate, but nearly all of them go to the "
                           f"nearest neighbour. If they travel farther, raise "
                           f"{s}.kernel_scale_km towards {gap:.2g} km.")
    if (land.n_patches >= system_module.COMPILED_MIN_PATCHES
            and not system_module.compiled_available()):
        out.append(f"with {land.n_patches:,} patches the local equations run faster compiled "
                   "(the integration 1.3x faster at 100,000 patches in our benchmark, with the "
                   "same results); numba is not installed: pip install 'trophoscape[fast]'.")
    rate = float(np.max(model.params["growth_rate"]))
    fastest = max(rate, float(np.max(model.params["mortality"])))
    if fastest > 0 and sc["run.census_interval"] > 0.5 / fastest:
        out.append(f"the census interval ({sc['run.census_interval']:g} {sc['time_unit']}) is "
                   f"coarse for local rates up to {fastest:g} per {sc['time_unit']}: the "
                   "recorded series may miss troughs and peaks (the run itself does not "
                   "change), and synchrony and occupancy are computed from it; consider "
                   f"run.census_interval <= {0.5 / fastest:.2g}.")
    return out
