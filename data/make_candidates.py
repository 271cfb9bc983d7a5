"""Write data/demo_candidates.geojson: candidate corridors for the invented demo landscape.

    python data/make_candidates.py

Deterministic. Each candidate is the straight shortest line between the boundaries of two
demo patches, with an invented cost (length × an invented unit cost × a site factor). The
choice mixes options a planner would list: links to the isolated "Far knoll" group, links
between groups, and a few short links inside a group that is already well connected.
For the demo only: not a real place, not real costs.
"""

from pathlib import Path

import geopandas as gpd
import numpy as np
import shapely

HERE = Path(__file__).resolve().parent
RNG = np.random.default_rng(20261202)
UNIT_COST_PER_KM = 40.0  # invented: thousand currency units per km of planted corridor


def main():
    patches = gpd.read_file(HERE / "demo_patches.geojson").to_crs("EPSG:32632")
    ids = patches["patch_id"].to_numpy()
    geoms = patches.geometry.to_numpy()
    tree = shapely.STRtree(geoms)
    number = np.array([int(i[1:]) for i in ids])
    # the demo numbers its groups in blocks (data/README.md); Far knoll is V139-V147
    is_far = (number >= 139) & (number <= 147)
    far = np.flatnonzero(is_far)
    rest = np.flatnonzero(~is_far)
    pairs = []
    # Far knoll to its two nearest outside patches
    gaps = shapely.distance(geoms[far][:, None], geoms[rest][None, :])
    for k in np.argsort(gaps.min(axis=0))[:2]:
        pairs.append((far[np.argmin(gaps[:, k])], rest[k]))
    # between groups: random pairs of patches 3-6 km apart
    a, b = tree.query(geoms, predicate="dwithin", distance=6000.0)
    keep = (a < b) & (shapely.distance(geoms[a], geoms[b]) > 3000.0) & ~is_far[a] & ~is_far[b]
    a, b = a[keep], b[keep]
    for k in RNG.choice(a.size, size=5, replace=False):
        pairs.append((a[k], b[k]))
    # inside a well-connected group: neighbours under 500 m apart
    a2, b2 = tree.query(geoms, predicate="dwithin", distance=500.0)
    keep2 = (a2 < b2) & (number[a2] < 60) & (number[b2] < 60)
    for k in RNG.choice(np.flatnonzero(keep2), size=2, replace=False):
        pairs.append((a2[k], b2[k]))
    lines = [shapely.shortest_line(geoms[i], geoms[j]) for i, j in pairs]  # a few lines only
    length_km = shapely.length(np.array(lines)) / 1000.0
    cost = np.round(np.maximum(length_km, 0.1) * UNIT_COST_PER_KM * RNG.uniform(0.8, 1.5, len(lines)), 1)
    frame = gpd.GeoDataFrame(
        {"corridor_id": [f"C{k + 1:02d}" for k in range(len(lines))],
         "cost": cost,
         # invented: planted hedgerows that animals follow act as a shorter, safer route
         # (a link of length length_km / quality); longer links get better-built corridors
         "quality": np.where(length_km > 3.0, 4.0, np.where(length_km > 1.0, 2.0, 1.0)),
         "joins": [f"{ids[i]}-{ids[j]}" for i, j in pairs]},
        geometry=lines, crs="EPSG:32632").to_crs("EPSG:4326")
    frame.to_file(HERE / "demo_candidates.geojson", driver="GeoJSON", engine="pyogrio",
                  layer_options={"COORDINATE_PRECISION": 6, "RFC7946": "YES"})
    print(frame.drop(columns="geometry").to_string(index=False))


if __name__ == "__main__":
    main()
