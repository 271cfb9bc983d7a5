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
    "Landscape": "landscape",
    "read_patches": "landscape",
    "landscape_from_frame": "landscape",
    "Network": "network",
    "build_network": "network",
    "movement_operator": "network",
    "LocalModel": "dynamics",
    "interior_equilibrium": "dynamics",
    "CoupledSystem": "system",
    "Trajectory": "simulate",
    "simulate": "simulate",
    "Study": "study",
    "RunResult": "study",
    "load_study": "study",
    "build_study": "study",
    "run_study": "study",
    "write_run": "outputs",
    "persistence_table": "analysis",
    "synchrony_table": "analysis",
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
