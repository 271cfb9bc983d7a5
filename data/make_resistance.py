"""Write the demo's resistance raster: how hard the ground of Vellmoor Vale is to cross.

Run from anywhere (after ``make_demo.py``)::

    python data/make_resistance.py

It writes ``demo_resistance.tif`` next to this script: a GeoTIFF in UTM zone 32N (EPSG:32632)
with 100 m cells over the patches and 3 km around them, the same on every run (no clock, no
randomness). Every feature is invented, like the valley itself:

- open farmland, the reference: 1 per km;
- the river Vell, about 300 m wide, winding north to south through the chain of stepping
  stones between the upper fells and the mill basin, at 30 per km (hard to cross), with one
  ford at 3 far to the south;
- the valley road, straight from south-west to north-east, at 15 per km, with one
  underpass at 1;
- hedgerows every 3 km east to west and north to south, at 0.5 per km (easy to follow).

Values are cost per km relative to open ground (``[dispersal] resistance``).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
PATCHES_FILE = HERE / "demo_patches.geojson"
RASTER_FILE = HERE / "demo_resistance.tif"
CELL_M = 100.0
MARGIN_M = 3000.0

OPEN, RIVER, FORD, ROAD, UNDERPASS, HEDGE = 1.0, 30.0, 3.0, 15.0, 1.0, 0.5
HEDGE_EVERY_M = 3000.0
#: Easting of the river's middle course: 6.9 km east of the valley's origin in make_demo.py
#: (443,900 m), between the first two stepping stones (5.6 and 8.2 km).
RIVER_X = 443_900.0 + 6_900.0


def patch_bounds_utm() -> tuple[float, float, float, float]:
    from pyproj import Transformer

    data = json.loads(PATCHES_FILE.read_text(encoding="utf-8"))
    lon, lat = [], []
    for feature in data["features"]:
        geom = feature["geometry"]
        polys = geom["coordinates"] if geom["type"] == "MultiPolygon" else [geom["coordinates"]]
        for poly in polys:
            for ring in poly:
                for x, y in ring:
                    lon.append(x)
                    lat.append(y)
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32632", always_xy=True)
    x, y = to_utm.transform(np.asarray(lon), np.asarray(lat))
    return float(x.min()), float(y.min()), float(x.max()), float(y.max())


def surface() -> tuple[np.ndarray, tuple[float, float]]:
    """The raster's values (rows top to bottom) and its upper-left corner."""
    x0, y0, x1, y1 = patch_bounds_utm()
    left = math.floor((x0 - MARGIN_M) / CELL_M) * CELL_M
    top = math.ceil((y1 + MARGIN_M) / CELL_M) * CELL_M
    cols = int(math.ceil((x1 + MARGIN_M - left) / CELL_M))
    rows = int(math.ceil((top - (y0 - MARGIN_M)) / CELL_M))
    xs = left + (np.arange(cols) + 0.5) * CELL_M
    ys = top - (np.arange(rows) + 0.5) * CELL_M
    X, Y = np.meshgrid(xs, ys)
    values = np.full((rows, cols), OPEN)
    # hedgerows: a lattice of lines one cell wide
    on_x = np.abs(((X - left) % HEDGE_EVERY_M) - HEDGE_EVERY_M / 2) < CELL_M / 2
    on_y = np.abs(((Y - top) % HEDGE_EVERY_M) - HEDGE_EVERY_M / 2) < CELL_M / 2
    values[on_x | on_y] = HEDGE
    # the river Vell: winding north to south through the gap between the upper fells and
    # the mill basin, between two of the stepping stones (make_demo.py), about 300 m wide
    centre = RIVER_X + 900.0 * np.sin((Y - top) / 4000.0)
    river = np.abs(X - centre) < 150.0
    values[river] = RIVER
    span = ys[0] - ys[-1]
    for share in (0.9,):  # one ford, far to the south
        fy = ys[0] - share * span
        values[river & (np.abs(Y - fy) < 150.0)] = FORD
    # the valley road: a straight band from south-west to north-east, 100 m wide
    a = np.array([x0 - MARGIN_M, y0 - MARGIN_M])
    b = np.array([x1 + MARGIN_M, y1 + MARGIN_M])
    d = (b - a) / np.linalg.norm(b - a)
    along = (X - a[0]) * d[0] + (Y - a[1]) * d[1]
    across = (X - a[0]) * -d[1] + (Y - a[1]) * d[0]
    road = np.abs(across) < 50.0
    values[road] = ROAD
    total = float(np.linalg.norm(b - a))
    values[road & (np.abs(along - 0.55 * total) < 100.0)] = UNDERPASS
    return values.astype(np.float32), (left, top)


def main() -> None:
    import rasterio
    from affine import Affine

    values, (left, top) = surface()
    with rasterio.open(RASTER_FILE, "w", driver="GTiff", width=values.shape[1],
                       height=values.shape[0], count=1, dtype="float32", crs="EPSG:32632",
                       transform=Affine(CELL_M, 0.0, left, 0.0, -CELL_M, top),
                       compress="deflate", predictor=3) as out:
        out.write(values, 1)
    size = RASTER_FILE.stat().st_size
    assert size < 200_000, size  # small enough to ship with the package
    print(f"wrote {RASTER_FILE.name}: {values.shape[0]} x {values.shape[1]} cells, {size:,} "
          "bytes")


if __name__ == "__main__":
    main()
