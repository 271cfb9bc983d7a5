import numpy as np
import pytest
import scipy.sparse as sp

from trophoscape.model.dynamics import LocalModel
from trophoscape.model.system import CoupledSystem

DEFAULTS = dict(growth_rate=1.0, capacity=50.0, allee_density=5.0, attack_rate=1.0,
                handling_time=0.2, interference=0.0, conversion=0.4, mortality=0.5)


def make_model(n=1, growth="logistic", response="holling2", **values):
    params = {k: np.full(n, float(values.get(k, v))) for k, v in DEFAULTS.items()}
    return LocalModel(growth=growth, response=response, params=params)


def make_system(model, area=None, prey_movement=None, predator_movement=None):
    n = model.n_patches
    zero = sp.csr_array((n, n))
    area = np.ones(n) if area is None else np.asarray(area, float)
    return CoupledSystem(model=model, area_km2=area,
                         prey_movement=zero if prey_movement is None else prey_movement,
                         predator_movement=zero if predator_movement is None else predator_movement)


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)


def write_grid_file(folder):
    """A 3 × 4 grid of 1 km squares, 2 km apart, as a GeoPackage in ``folder``."""
    from trophoscape.testing import grid_landscape

    land = grid_landscape(3, 4, spacing_km=2.0, size_km=1.0)
    path = folder / "grid.gpkg"
    land.frame.to_file(path, driver="GPKG", engine="pyogrio")
    return path


def grid_study(path, *, duration, **sections):
    """A study of the grid file: census every 0.5, burn-in 2, stability and capacity off;
    ``sections`` add or override scenario keys by section."""
    import trophoscape as ts
    from trophoscape.scenario import parse_scenario

    raw = {"patches": {"path": str(path), "id_field": "patch_id"},
           "run": {"duration": duration, "burn_in": 2.0, "census_interval": 0.5},
           "analysis": {"stability": False, "capacity": False}}
    for k, v in sections.items():
        raw.setdefault(k, {}).update(v)
    return ts.build_study(parse_scenario(raw, base_dir=path.parent))


def count_calls(monkeypatch, owner, name) -> list:
    """Replace ``owner.name`` (a callable) by one that records each call and calls it;
    returns the list that grows by one item per call."""
    calls = []
    original = getattr(owner, name)

    def counted(*args, **kwargs):
        calls.append(1)
        return original(*args, **kwargs)

    monkeypatch.setattr(owner, name, counted)
    return calls


def _refuse(*args):
    raise TypeError("cannot be rebuilt")


class Unrebuildable(Exception):
    """An error that pickles but cannot be rebuilt in the other process (the second
    processes' tests)."""

    def __init__(self, what, why):
        super().__init__(f"{what} because {why}")

    def __reduce__(self):
        return _refuse, self.args
