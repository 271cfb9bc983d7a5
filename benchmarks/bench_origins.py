"""Origin scan on the demo: every patch shocked in turn, on 1 worker and on all cores.

    OPENBLAS_NUM_THREADS=1 PYTHONPATH=src python benchmarks/bench_origins.py [N_ORIGINS]

The demo scenario (data/demo.toml) with one shock added: 95 % of the predators removed at the
end of burn-in. The demo has 150 patches, so "every patch" is 150 origins.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from trophoscape.workflows.spread import origin_scan
from trophoscape.workflows.tasks import default_workers
from trophoscape.workflows.study import load_study

DATA = Path(__file__).resolve().parents[1] / "data"
SHOCK = '''
[[shock]]
kind = "predator_removal"
share = 0.95
patches = ["V001"]
'''


def main():
    folder = Path(tempfile.mkdtemp(prefix="trophoscape-origins-"))
    for name in ("demo_patches.geojson", "demo_corridors.geojson"):
        (folder / name).write_bytes((DATA / name).read_bytes())
    (folder / "demo.toml").write_text((DATA / "demo.toml").read_text() + SHOCK)
    study = load_study(folder / "demo.toml")
    n = study.landscape.n_patches
    count = int(sys.argv[1]) if len(sys.argv) > 1 else n
    origins = np.arange(min(count, n))
    rows = []
    for workers in sorted({1, default_workers()}):
        subset = origins if workers > 1 else origins[: max(8, len(origins) // 8)]
        t0 = time.perf_counter()
        table = origin_scan(study, subset, workers=workers, progress=False)
        secs = time.perf_counter() - t0
        rows.append((workers, len(subset), secs, secs / len(subset),
                     int((table["status"] == "ok").sum())))
    print(f"demo: {n} patches; shock: predator_removal 0.95 at the end of burn-in")
    print("workers  origins  wall s  s/origin  ok")
    for w, k, secs, per, ok in rows:
        print(f"{w:7d}  {k:7d}  {secs:6.1f}  {per:8.2f}  {ok}")
    if len(rows) == 2:
        print(f"speed-up per origin with {rows[1][0]} workers: {rows[0][3] / rows[1][3]:.2f}x")


if __name__ == "__main__":
    main()
