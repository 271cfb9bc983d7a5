"""trophoscape: coupled predator–prey dynamics on networks of habitat patches.

The public API is re-exported here and loaded on first use, so ``import trophoscape`` stays
light (it imports neither geopandas nor matplotlib).

Examples
--------
>>> import trophoscape as ts                                   # doctest: +SKIP
>>> study = ts.load_study("data/demo.toml")                    # doctest: +SKIP
>>> result = ts.run_study(study)                               # doctest: +SKIP
>>> ts.write_run(result, "out/demo")                           # doctest: +SKIP
"""

from importlib import import_module

__version__ = "0.1.0"

_EXPORTS = {
    "InputError": "errors",
    "RunError": "errors",
    "TrophoscapeError": "errors",
    "TrophoscapeWarning": "errors",
    "Scenario": "scenario",
    "read_scenario": "scenario",
    "parse_scenario": "scenario",
    "Landscape": "model.landscape",
    "read_patches": "model.landscape",
    "landscape_from_frame": "model.landscape",
    "Network": "model.network",
    "build_network": "model.network",
    "movement_operator": "model.network",
    "LocalModel": "model.dynamics",
    "interior_equilibrium": "model.dynamics",
    "CoupledSystem": "model.system",
    "Trajectory": "integrate.trajectory",
    "simulate": "integrate.ode",
    "persistence_table": "analysis",
    "synchrony_table": "analysis",
    "Study": "workflows.study",
    "RunResult": "workflows.study",
    "load_study": "workflows.study",
    "build_study": "workflows.study",
    "run_study": "workflows.study",
    "plan_corridors": "workflows.planning",
    "run_spread": "workflows.spread",
    "read_counts": "workflows.fitting",
    "fit_counts": "workflows.fitting",
    "fit_to_folder": "report.fitting",
    "run_to_folder": "report.run",
    "corridors_to_folder": "report.corridors",
    "compare_to_folder": "report.corridors",
    "spread_to_folder": "report.spread",
    "write_run": "report.run",
    "write_corridors": "report.corridors",
    "write_comparison": "report.corridors",
    "write_spread": "report.spread",
    "sweep": "report.sweep",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'trophoscape' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
