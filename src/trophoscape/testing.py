"""Small synthetic landscapes for tests and examples, built in memory.

Patches are axis-aligned squares in a UTM CRS (by default zone 33 N, EPSG:32633) around the
point x = 500 km, y = 5000 km (the zone's central meridian, about 45° N), so that planar
distances are close to true ones. Ids are the feature order "0", "1", ... (row by row).
"""

from __future__ import annotations

import geopandas
import numpy as np
import shapely

from .model.landscape import Landscape, landscape_from_frame

__all__ = ["grid_landscape", "chain_landscape"]

_ORIGIN_M = (500_000.0, 5_000_000.0)


def grid_landscape(rows: int, cols: int, *, spacing_km: float, size_km: float,
                   crs="EPSG:32633") -> Landscape:
    """A rows × cols grid of square patches.

    Parameters
    ----------
    rows, cols : int
        Grid shape; patch ``r * cols + c`` sits in row r, column c.
    spacing_km : float
        Distance between the centres of neighbouring patches.
    size_km : float
        Side of each square; boundary gap between neighbours is ``spacing_km - size_km``.
    crs : str, default "EPSG:32633"
        A projected CRS in metres.

    Returns
    -------
    Landscape
        Attributes ``row`` and ``col`` (int). Areas come from the equal-area projection, so
        they differ from ``size_km**2`` by the UTM scale error (under 0.1% here).

    Examples
    --------
    >>> grid_landscape(2, 3, spacing_km=2.0, size_km=1.0).n_patches
    6
    """
    if rows < 1 or cols < 1:
        raise ValueError(f"rows and cols must be >= 1, got {rows} and {cols}")
    if not size_km > 0 or not spacing_km > 0:
        raise ValueError("spacing_km and size_km must be > 0")
    r, c = np.divmod(np.arange(rows * cols), cols)
    x = _ORIGIN_M[0] + c * spacing_km * 1000.0
    y = _ORIGIN_M[1] + r * spacing_km * 1000.0
    half = size_km * 500.0
    squares = shapely.box(x - half, y - half, x + half, y + half)
    frame = geopandas.GeoDataFrame({"row": r, "col": c}, geometry=squares, crs=crs)
    return landscape_from_frame(frame)


def chain_landscape(n: int, *, spacing_km: float, size_km: float) -> Landscape:
    """A row of ``n`` square patches, west to east; see :func:`grid_landscape`."""
    return grid_landscape(1, n, spacing_km=spacing_km, size_km=size_km)
