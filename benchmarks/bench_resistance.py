"""Least-cost links over a resistance raster: time and memory per patch as patches grow.

An invented landscape: a square raster of resistance values (a smooth random field from 1 to
10, crossed by a "river" of 50 and with "hedgerows" of 0.5), and synthetic patches
(``synthetic.py``) scaled into it so that the density of patches, and so the work per patch,
stays the same at every size. For each size the script times
``ResistanceSurface.pairs_within`` (one least-cost search per patch) and reports seconds per
patch, links found and the peak memory of the process.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_resistance.py \
        --sizes 1000 10000 --cell-m 25 --max-km 1.5

The target (issue: resistance surfaces): 10,000 patches on a 5,000 × 5,000 raster in under
60 s and 4 GB, with the cost per patch flat from 1,000 to 10,000 patches.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
import shapely  # noqa: E402
from affine import Affine  # noqa: E402
from scipy import ndimage  # noqa: E402

from common import peak_mb, table, versions  # noqa: E402
from synthetic import ORIGIN_M, synthetic_frame  # noqa: E402
from trophoscape.model.landscape import landscape_from_frame  # noqa: E402
from trophoscape.model.resistance import ResistanceSurface  # noqa: E402


def surface(cells: int, cell_m: float, seed: int = 0) -> ResistanceSurface:
    """An invented resistance raster ``cells`` × ``cells`` with its corner at ORIGIN_M."""
    rng = np.random.default_rng(seed)
    coarse = rng.uniform(0, 1, (cells // 50 + 2, cells // 50 + 2))
    field = ndimage.zoom(coarse, cells / (coarse.shape[0] - 1), order=1)[:cells, :cells]
    values = (1.0 + 9.0 * field).astype(np.float32)
    rows = np.arange(cells)
    river = (np.abs(rows[:, None] - (cells / 2 + cells / 8 * np.sin(rows[None, :] / cells
                                                                     * 6.0))) < 2)
    values[river] = 50.0
    values[:, ::cells // 20] = 0.5  # hedgerows, north to south
    transform = Affine(cell_m, 0.0, ORIGIN_M[0], 0.0, -cell_m, ORIGIN_M[1] + cells * cell_m)
    return ResistanceSurface(values=values, transform=transform)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[1000, 10000])
    ap.add_argument("--cells", type=int, default=5000, help="raster side at the largest size")
    ap.add_argument("--cell-m", type=float, default=25.0)
    ap.add_argument("--max-km", type=float, default=1.5)
    args = ap.parse_args()
    print(versions())
    rows = []
    largest = max(args.sizes)
    for n in args.sizes:
        # the same density of patches at every size: the raster's side grows with sqrt(n)
        cells = int(args.cells * np.sqrt(n / largest))
        side_m = cells * args.cell_m
        frame = synthetic_frame(n, seed=1)
        xy = shapely.get_coordinates(frame.geometry.values)
        lo, hi = xy.min(axis=0), xy.max(axis=0)
        scale = 0.9 * side_m / float((hi - lo).max())
        origin = np.asarray(ORIGIN_M)
        frame = frame.set_geometry(shapely.transform(
            frame.geometry.values, lambda p: origin + 0.05 * side_m + (p - lo) * scale))
        land = landscape_from_frame(frame, id_field="patch_id")
        surf = surface(cells, args.cell_m)
        t0 = time.perf_counter()
        i, j, km = surf.pairs_within(land, args.max_km)
        seconds = time.perf_counter() - t0
        rows.append([f"{n:,}", f"{cells:,}²", f"{seconds:.1f}", f"{1e3 * seconds / n:.2f}",
                     f"{i.size:,}", f"{peak_mb():,.0f}"])
        print(rows[-1], flush=True)
    table(rows, ["patches", "raster", "seconds", "ms per patch", "links", "peak MB"])


if __name__ == "__main__":
    main()
