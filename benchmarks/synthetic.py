"""Synthetic patch landscapes for the benchmarks: many irregular polygons, clustered in space.

The landscape is invented: patch centres come from a cluster process (cluster centres uniform
over a square, members scattered around their centre with a normal spread), patch areas are
lognormal (median ``median_area_km2``), and each patch is an irregular star-shaped polygon
(a few vertices at jittered angles and radii, stretched and rotated). A star-shaped ring
around its own centre never crosses itself, so every polygon is valid without a repair.

Everything is built with numpy and shapely 2 array functions; 100,000 patches take a couple of
seconds. Run as a script to write a GeoPackage::

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/synthetic.py 10000 /tmp/patches.gpkg
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import geopandas  # noqa: E402
import numpy as np  # noqa: E402
import shapely  # noqa: E402

from trophoscape.model.landscape import Landscape, landscape_from_frame

__all__ = ["synthetic_frame", "synthetic_landscape", "write_patches"]

#: South-west corner of the square the patches lie in (UTM zone 32 N, about 47° N, 9° E).
ORIGIN_M = (300_000.0, 5_100_000.0)
#: The corner of landscapes too wide for a UTM zone, in EPSG:3035 (central Europe).
WIDE_ORIGIN_M = (3_300_000.0, 2_300_000.0)


def _star_polygons(rng, centres, area_km2, vertices):
    """Irregular star-shaped polygons of given areas around given centres.

    Parameters
    ----------
    centres : ndarray, shape (m, 2), metres
    area_km2 : ndarray, shape (m,)
    vertices : int
        Vertices per ring (before closing).

    Returns
    -------
    ndarray of shapely Polygon, shape (m,)
    """
    m = centres.shape[0]
    k = np.arange(vertices)
    # jittered angles stay strictly increasing (jitter < half a step), so the ring is simple
    theta = (k + rng.uniform(-0.35, 0.35, (m, vertices))) * (2 * np.pi / vertices)
    radius = rng.uniform(0.6, 1.4, (m, vertices))
    x, y = radius * np.cos(theta), radius * np.sin(theta)
    # an elongated, rotated outline, as patches along valleys or field edges are
    stretch = rng.uniform(1.0, 2.5, (m, 1))
    x *= stretch
    y /= stretch
    phi = rng.uniform(0, np.pi, (m, 1))
    x, y = x * np.cos(phi) - y * np.sin(phi), x * np.sin(phi) + y * np.cos(phi)
    # shoelace area of the unit outline, then scale it to the wanted area
    unit_area = 0.5 * np.abs(np.sum(x * np.roll(y, -1, axis=1) - np.roll(x, -1, axis=1) * y,
                                    axis=1))
    scale = np.sqrt(area_km2 * 1e6 / unit_area)[:, None]
    coords = np.stack([centres[:, :1] + x * scale, centres[:, 1:] + y * scale], axis=-1)
    return shapely.polygons(coords)


def synthetic_frame(n: int, *, seed: int = 0, median_area_km2: float = 0.3,
                    area_sigma: float = 0.9, spacing_km: float = 1.6, cluster_size: float = 25,
                    cluster_spread_km: float = 3.0, vertices: int = 9, overlap: bool = False,
                    shuffle: bool = False, crs: str | None = None) -> geopandas.GeoDataFrame:
    """A GeoDataFrame of ``n`` synthetic patch polygons.

    Parameters
    ----------
    n : int
        Number of patches.
    seed : int
        Seed of the random generator (same seed, same landscape).
    median_area_km2, area_sigma : float
        Patch areas are lognormal: median ``median_area_km2``, log-sd ``area_sigma``.
    spacing_km : float
        The square's side is ``spacing_km * sqrt(n)``: the mean density (one patch per
        ``spacing_km²``) does not change with ``n``, so links per patch do not either.
        (Without ``overlap`` the final map is scaled by about 1.1 to restore the median
        area after overlapping patches are dropped, so the spacing grows by as much.)
    cluster_size : float
        Mean number of patches per cluster (Poisson).
    cluster_spread_km : float
        Standard deviation of a member's offset from its cluster centre.
    vertices : int
        Vertices per polygon.
    overlap : bool
        Keep patches that overlap another one. By default one of each overlapping pair is
        dropped (and more are drawn), as patches of a habitat map do not overlap.
    shuffle : bool
        Random feature order. By default features come cluster by cluster, so patches near
        each other in space are near each other in the file.
    crs : str, optional
        Projected CRS in metres. By default UTM zone 32N (EPSG:32632) with the corner at
        ``ORIGIN_M``; a square wider than 600 km (more than about 140,000 patches) does not
        fit a UTM zone's area of use, which trophoscape checks, so it goes in the
        pan-European equal-area CRS (EPSG:3035) with its corner at ``WIDE_ORIGIN_M``.

    Returns
    -------
    geopandas.GeoDataFrame
        ``n`` rows; columns ``patch_id`` ("p0", "p1", ...), ``quality`` (0.5 to 1.5),
        ``geometry``.
    """
    rng = np.random.default_rng(seed)
    side = spacing_km * 1000.0 * np.sqrt(n)
    if crs is None:
        wide = side * 1.15 > 600_000.0  # 1.15: the scaling after overlaps are dropped
        crs, corner = ("EPSG:3035", WIDE_ORIGIN_M) if wide else ("EPSG:32632", ORIGIN_M)
    else:
        corner = ORIGIN_M
    geoms = np.empty(0, dtype=object)
    while geoms.size < n:
        want = int((n - geoms.size) * 1.25) + 16
        n_clusters = max(1, int(np.ceil(want / cluster_size)))
        hubs = rng.uniform(0, side, (n_clusters, 2))
        members = rng.poisson(cluster_size, n_clusters)
        centres = np.repeat(hubs, members, axis=0)
        centres += rng.normal(0, cluster_spread_km * 1000.0, centres.shape)
        centres = np.mod(centres, side) + np.asarray(corner)  # wrap: no edge pile-up
        area = median_area_km2 * np.exp(area_sigma * rng.standard_normal(centres.shape[0]))
        new = _star_polygons(rng, centres, area, vertices)
        if not overlap:
            # drop one of each overlapping pair among the new, then any new one that
            # overlaps a patch already kept
            a, b = shapely.STRtree(new).query(new, predicate="intersects")
            new = np.delete(new, np.unique(b[a < b]))
            if geoms.size:
                hit = shapely.STRtree(geoms).query(new, predicate="intersects")[0]
                new = np.delete(new, np.unique(hit))
        geoms = np.concatenate([geoms, new])
    geoms = geoms[:n]
    if not overlap:
        # dropping overlaps removes big patches more often than small ones; scaling the
        # whole map (positions and sizes alike) restores the median and keeps it overlap-free
        factor = np.sqrt(median_area_km2 * 1e6 / np.median(shapely.area(geoms)))
        origin = np.asarray(corner)
        geoms = shapely.transform(geoms, lambda xy: origin + (xy - origin) * factor)
    if shuffle:
        geoms = geoms[rng.permutation(n)]
    return geopandas.GeoDataFrame(
        {"patch_id": np.char.add("p", np.arange(n).astype(str)),
         "quality": rng.uniform(0.5, 1.5, n)},
        geometry=geoms, crs=crs)


def synthetic_landscape(n: int, **options) -> Landscape:
    """A trophoscape Landscape of ``n`` synthetic patches; options as :func:`synthetic_frame`."""
    return landscape_from_frame(synthetic_frame(n, **options), id_field="patch_id")


def write_patches(n: int, path, **options) -> Path:
    """Write ``n`` synthetic patches as a GeoPackage (layer "patches"); returns the path."""
    path = Path(path)
    synthetic_frame(n, **options).to_file(path, layer="patches", driver="GPKG",
                                          engine="pyogrio")
    return path


if __name__ == "__main__":
    import time

    count = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000
    t0 = time.perf_counter()
    frame = synthetic_frame(count)
    t1 = time.perf_counter()
    land = landscape_from_frame(frame, id_field="patch_id")
    t2 = time.perf_counter()
    a = land.area_km2
    print(f"{count} patches: generated in {t1 - t0:.2f} s, Landscape in {t2 - t1:.2f} s; "
          f"area median {np.median(a):.3f} km², 5-95% {np.percentile(a, 5):.3f}-"
          f"{np.percentile(a, 95):.3f} km², total {a.sum():.0f} km²; CRS {land.crs.to_string()}")
    if len(sys.argv) > 2:
        print("wrote", write_patches(count, sys.argv[2]))
