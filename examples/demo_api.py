"""Run the bundled demo through the Python API and look at a few results.

    python examples/demo_api.py [OUTPUT_FOLDER]
"""

import sys

import trophoscape as ts
from trophoscape.cli import demo_scenario_path

study = ts.load_study(demo_scenario_path())
print(study.network.summary()["patches"], "patches,", study.network.n_links, "links")

result = ts.run_study(study)
table = result.patches
print("prey persists in", f"{table['prey_persists'].mean():.0%}", "of patches;",
      "predator in", f"{table['predator_persists'].mean():.0%}")

# the five patches whose predator numbers move most closely with their neighbours
print(table["predator_sync_local"].nlargest(5))

# time series are an xarray Dataset: the regional predator total over time
regional = result.trajectory.data["predator"].sum("patch")
print("regional predators at the end:", float(regional[-1]))

if len(sys.argv) > 1:
    ts.write_run(result, sys.argv[1])
    print("wrote", sys.argv[1])
