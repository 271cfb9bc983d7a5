import numpy as np
import pytest
import scipy.sparse as sp

from trophoscape.dynamics import LocalModel
from trophoscape.system import CoupledSystem

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
