"""The optional compiled kernel for the local terms: the same numbers as the numpy path.

The numpy path is the reference (checked against closed forms and published results in
test_dynamics.py and test_system.py); the compiled kernel repeats its formulas operation for
operation, so the two must agree bit for bit, and so must whole trajectories.
"""

import numpy as np
import pytest
import scipy.sparse as sp

from trophoscape.model import system as system_module
from trophoscape.model.dynamics import GROWTH_FORMS, RESPONSES, LocalModel
from trophoscape.model.network import build_network, movement_operator
from trophoscape.integrate import ode as ode_module
from trophoscape.integrate.ode import simulate
from trophoscape.model.system import COMPILED_MIN_PATCHES, CoupledSystem
from trophoscape.testing import grid_landscape

from conftest import DEFAULTS, count_calls, make_model

compiled = pytest.importorskip("trophoscape.model.compiled", reason="numba is not installed")


def grid_operators(n_side=12):
    land = grid_landscape(n_side, n_side, spacing_km=1.0, size_km=0.5)
    net = build_network(land, kernel="exponential", max_distance_km=1.6)
    return [movement_operator(net, emigration_rate=rate, scale_km=1.0, survival_per_km=0.9)
            for rate in (0.3, 0.1)]


def varied_model(rng, n, growth, response, harvest=False):
    """Per-patch parameters that differ, so a row mix-up in the kernel would show."""
    params = {k: np.full(n, v) * rng.uniform(0.8, 1.2, n) for k, v in DEFAULTS.items()}
    params["interference"] = rng.uniform(0.0, 0.3, n)
    if harvest:
        params["prey_harvest"] = rng.uniform(0.0, 0.2, n)
    return LocalModel(growth=growth, response=response, params=params)


def pair(model, area, ops, order="none"):
    return [CoupledSystem(model=model, area_km2=area, prey_movement=ops[0],
                          predator_movement=ops[1], order=order, local_terms=k)
            for k in ("numpy", "compiled")]


def state(rng, n):
    y = rng.uniform(0.0, 120.0, 2 * n)
    y[rng.choice(2 * n, 12, replace=False)] = -1e-3  # the clipping path
    y[rng.choice(2 * n, 6, replace=False)] = 0.0
    return y


@pytest.fixture
def compiled_steps(monkeypatch):
    """Counts the steps taken by the compiled stages (ode._compiled_step)."""
    return count_calls(monkeypatch, ode_module, "_compiled_step")


@pytest.mark.parametrize("growth", sorted(GROWTH_FORMS))
@pytest.mark.parametrize("response", sorted(RESPONSES))
@pytest.mark.parametrize("harvest", [False, True])
def test_compiled_rhs_equals_numpy_bit_for_bit(rng, growth, response, harvest):
    ops = grid_operators()
    n = ops[0].shape[0]
    area = rng.uniform(0.2, 3.0, n)
    model = varied_model(rng, n, growth, response, harvest)
    y = state(rng, n)
    for order in ("none", "rcm"):
        ref, fast = pair(model, area, ops, order)
        assert (ref.local_terms_used, fast.local_terms_used) == ("numpy", "compiled")
        np.testing.assert_array_equal(fast.rhs_function()(0.0, y), ref.rhs_function()(0.0, y))
        yi = ref.to_internal(y)
        np.testing.assert_array_equal(fast.rhs_function(internal=True)(0.0, yi),
                                      ref.rhs_function(internal=True)(0.0, yi))


def test_compiled_rhs_is_the_same_on_any_number_of_threads(rng):
    # consistency test: the whole RHS runs on numba's threads, row by row, each row summed
    # in its own order; one thread or all of them must give the same bits
    import numba

    ops = grid_operators(20)
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "beddington_deangelis", True)
    ref, fast = pair(model, rng.uniform(0.2, 3.0, n), ops, order="rcm")
    y = state(rng, n)
    want = ref.rhs_function()(0.0, y)
    before = numba.get_num_threads()
    try:
        for threads in sorted({1, 2, numba.config.NUMBA_NUM_THREADS}):
            numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))
            np.testing.assert_array_equal(fast.rhs_function()(0.0, y), want)
    finally:
        numba.set_num_threads(before)


def test_compiled_rk23_steps_agree_with_numpy_to_rounding(rng, compiled_steps):
    # consistency test: the compiled stages serve RK23's tableau too (3 stages, 4 error
    # weights); the same steps and evaluations, values within 1e-6 tolerance units
    # (measured: 3.6e-13 absolute)
    ops = grid_operators()
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "holling2")
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])
    runs = [simulate(s, y0, duration=10.0, census_interval=0.5, extinction_abundance=0.0,
                     method="RK23")
            for s in pair(model, rng.uniform(0.2, 3.0, n), ops, order="rcm")]
    assert len(compiled_steps) == runs[1].stats.steps  # the compiled run took the compiled steps
    assert runs[1].stats.steps == runs[0].stats.steps > 100
    assert runs[1].stats.nfev == runs[0].stats.nfev
    for species in ("prey", "predator"):
        want = runs[0].data[species].values
        units = np.abs(runs[1].data[species].values - want) / (1e-8 + 1e-6 * np.abs(want))
        assert units.max() <= 1e-6


def test_compiled_run_is_the_same_on_any_number_of_threads(rng):
    # consistency test: stages, errors, regions on numba's threads, each component's sums
    # in one order; one thread or all of them must give the same run bit for bit
    import numba

    ops = grid_operators(20)
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "holling2")
    fast = pair(model, rng.uniform(0.2, 3.0, n), ops, order="rcm")[1]
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])
    if numba.config.NUMBA_NUM_THREADS < 2:
        pytest.skip("numba has one thread here (NUMBA_NUM_THREADS)")
    before = numba.get_num_threads()
    runs = []
    try:
        for threads in sorted({1, numba.config.NUMBA_NUM_THREADS}):
            numba.set_num_threads(threads)
            runs.append(simulate(fast, y0, duration=15.0, census_interval=0.5))
    finally:
        numba.set_num_threads(before)
    assert sum(runs[0].stats.removals) > 0
    for run in runs[1:]:
        assert run.stats.removals == runs[0].stats.removals
        for species in ("prey", "predator"):
            np.testing.assert_array_equal(run.data[species].values,
                                          runs[0].data[species].values)


def test_compiled_rhs_with_scalar_parameters_and_no_links(rng):
    # parameters may be scalars (CoupledSystem.with_model takes them); no links at all
    n = 30
    params = {k: float(v) for k, v in DEFAULTS.items()}
    params["interference"] = 0.1
    model = LocalModel(growth="logistic", response="beddington_deangelis", params=params)
    zero = sp.csr_array((n, n))
    ref, fast = pair(model, rng.uniform(0.5, 2.0, n), [zero, zero])
    y = state(rng, n)
    np.testing.assert_array_equal(fast.rhs_function()(0.0, y), ref.rhs_function()(0.0, y))


def test_compiled_rhs_keeps_nan(rng):
    # np.maximum keeps a NaN, so a failing solve shows up; the kernel's clip must too
    ops = grid_operators(4)
    n = ops[0].shape[0]
    ref, fast = pair(make_model(n=n), np.ones(n), ops)
    y = state(rng, n)
    y[3] = np.nan
    got, want = fast.rhs_function()(0.0, y), ref.rhs_function()(0.0, y)
    assert np.isnan(got[3])
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))


def test_compiled_trajectory_equals_numpy(rng, compiled_steps):
    ops = grid_operators()
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "holling2")
    area = rng.uniform(0.2, 3.0, n)
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])
    systems = pair(model, area, ops, order="rcm")
    # without the extinction rule: the compiled path evaluates each Runge-Kutta stage (its
    # state and RHS) and the step's errors in one compiled pass each (ode._compiled_step),
    # summing in another order than numpy's stage sums; the same steps, and values equal to
    # rounding (within 1e-6 tolerance units, atol + rtol |y|; measured: 7e-9)
    runs = [simulate(s, y0, duration=20.0, census_interval=0.5, extinction_abundance=0.0)
            for s in systems]
    assert len(compiled_steps) == runs[1].stats.steps > 0  # the compiled run took the compiled steps
    for species in ("prey", "predator"):
        want = runs[0].data[species].values
        units = np.abs(runs[1].data[species].values - want) / (1e-8 + 1e-6 * np.abs(want))
        assert units.max() <= 1e-6
    assert runs[1].stats.nfev == runs[0].stats.nfev
    # with it, the steps with removals are taken again by compiled code too
    # (trophoscape.integrate.compiled), whose sums run in another order. Rounding then grows
    # through the crash like any difference: the same removals, and every value within two
    # tolerance units (atol + rtol |y|) of numpy's (measured: 0.8)
    runs = [simulate(s, y0, duration=20.0, census_interval=0.5) for s in systems]
    assert sum(runs[0].stats.removals) > 0
    assert runs[1].stats.removals == runs[0].stats.removals
    for species in ("prey", "predator"):
        want = runs[0].data[species].values
        units = np.abs(runs[1].data[species].values - want) / (1e-8 + 1e-6 * np.abs(want))
        assert units.max() <= 2.0


def test_compiled_lotka_volterra_keeps_its_first_integral():
    # V = e a n - m ln n + a p - r ln p is constant along Lotka–Volterra orbits (Lotka 1925;
    # Volterra 1926; Murray 2002, Mathematical Biology I, §3.1, from memory); uncoupled
    # patches each keep their own V
    n = 3
    values = dict(growth_rate=1.0, attack_rate=0.1, mortality=1.5, conversion=0.75)
    model = make_model(n=n, growth="exponential", response="lotka_volterra", **values)
    zero = sp.csr_array((n, n))
    fast = CoupledSystem(model=model, area_km2=np.ones(n), prey_movement=zero,
                         predator_movement=zero, local_terms="compiled")
    y0 = np.array([10.0, 15.0, 30.0, 5.0, 8.0, 12.0])
    traj = simulate(fast, y0, duration=30.0, census_interval=0.05, method="DOP853",
                    rtol=1e-11, atol=1e-11, extinction_abundance=0.0)
    prey, predator = traj.data["prey"].values, traj.data["predator"].values
    v = 0.75 * 0.1 * prey - 1.5 * np.log(prey) + 0.1 * predator - 1.0 * np.log(predator)
    assert np.all(np.ptp(v, axis=0) < 1e-7 * np.abs(v[0]))
    assert np.all(np.ptp(prey, axis=0) > 5.0)  # they really cycle


def test_auto_kernel_by_size_and_availability(rng, monkeypatch):
    ops = grid_operators(4)
    n = ops[0].shape[0]
    model = make_model(n=n)

    def make(local_terms="auto"):
        return CoupledSystem(model=model, area_km2=np.ones(n), prey_movement=ops[0],
                             predator_movement=ops[1], local_terms=local_terms)

    assert make().local_terms_used == "numpy"  # small network: numpy
    monkeypatch.setattr(system_module, "COMPILED_MIN_PATCHES", n)
    assert make().local_terms_used == "compiled"
    assert make("numpy").local_terms_used == "numpy"
    # with_model (noise, shocks) and stacking replicates keep the choice
    assert make().with_model(make_model(n=n, growth_rate=2.0)).local_terms_used == "compiled"
    from trophoscape.integrate.replicates import stack_system

    assert stack_system(make("numpy"), 3).local_terms_used == "numpy"
    assert stack_system(make("compiled"), 3).local_terms == "compiled"
    # a growth form the kernel does not know is evaluated by numpy
    monkeypatch.setattr(compiled, "GROWTH_CODES", {"exponential": 0})
    assert make().local_terms_used == "numpy"
    assert make("compiled").local_terms_used == "numpy"
    assert COMPILED_MIN_PATCHES >= 1_000


def test_without_numba_auto_falls_back_and_compiled_says_what_to_do(monkeypatch):
    ops = grid_operators(4)
    n = ops[0].shape[0]
    monkeypatch.setattr(system_module, "_compiled_module", lambda: None)
    monkeypatch.setattr(system_module, "COMPILED_MIN_PATCHES", 1)
    auto = CoupledSystem(model=make_model(n=n), area_km2=np.ones(n), prey_movement=ops[0],
                         predator_movement=ops[1])
    assert auto.local_terms_used == "numpy"
    assert np.all(np.isfinite(auto.rhs_function()(0.0, np.full(2 * n, 5.0))))
    with pytest.raises(ValueError, match=r"local_terms='compiled' needs numba, which is not "
                                         r"installed; install it with pip install"):
        CoupledSystem(model=make_model(n=n), area_km2=np.ones(n), prey_movement=ops[0],
                      predator_movement=ops[1], local_terms="compiled")
    with pytest.raises(ValueError, match="local_terms must be"):
        CoupledSystem(model=make_model(n=n), area_km2=np.ones(n), prey_movement=ops[0],
                      predator_movement=ops[1], local_terms="fortran")


def test_every_growth_form_and_response_has_a_kernel_code():
    # a new entry in the tables would silently run on numpy only; make that a decision
    assert set(compiled.GROWTH_CODES) == set(GROWTH_FORMS)
    assert set(compiled.RESPONSE_CODES) == set(RESPONSES)


def test_kernel_still_compiles_where_numba_cannot_cache():
    # numba raises RuntimeError when it finds no cache folder it may use (a read-only
    # install); an unknown locator class set in the environment takes the same path
    import os
    import subprocess
    import sys

    code = ("import numpy as np; from trophoscape.model import compiled as c; "
            "from trophoscape.model.dynamics import LocalModel; "
            "q = {k: np.ones(3) for k in c.PARAMETER_ROWS[:-1]}; "
            "f = c.local_terms_function(LocalModel('logistic', 'holling2', q), np.ones(3)); "
            "y = np.arange(6.0); x = np.empty(6); dy = f(y, x); "
            "import scipy.sparse as sp; "
            "w = c.rhs_function(LocalModel('logistic', 'holling2', q), np.ones(3), "
            "sp.csr_array((6, 6))); assert w(0.0, y).tolist() == dy.tolist(); "
            "K = np.stack([dy, dy]); out = np.empty(6); "
            "w.stage(y, K, 1, np.zeros(1), 0.5, out); assert out.tolist() == dy.tolist(); "
            "print(c._local_terms._cache.__class__.__name__ + ',' + "
            "c._whole_rhs._cache.__class__.__name__ + ',' + "
            "c._stage._cache.__class__.__name__, dy.tolist())")
    env = dict(os.environ, NUMBA_CACHE_LOCATOR_CLASSES="no_such_module.NoLocator")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert out.returncode == 0, out.stderr
    name, values = out.stdout.split(" ", 1)
    assert name == "NullCache,NullCache,NullCache"  # compiled, not cached (local terms,
    # whole RHS, a Runge-Kutta stage)
    # logistic r n (1 - n/K) - a n p / (1 + a h n) with every parameter 1, n = 0..2, p = 3..5
    n, p = np.arange(3.0), np.arange(3.0, 6.0)
    np.testing.assert_allclose(eval(values)[:3], n * (1 - n) - n * p / (1 + n))
    # the same for the compiled integration of regions (trophoscape.integrate.compiled)
    code = ("import numpy as np, scipy.sparse as sp; "
            "from trophoscape.integrate import compiled as c; "
            "m = sp.csr_array(np.array([[0., 2., 0.], [3., 0., 0.], [0., 0., 0.]])); "
            "r = c._groups(np.arange(3), m.indptr, m.indices, np.full(6, -1)); "
            "print(c.run_groups._cache.__class__.__name__, c._groups._cache.__class__.__name__, "
            "c.region_setup._cache.__class__.__name__, c.corrections._cache.__class__.__name__, "
            "c.joined._cache.__class__.__name__, [r[0].tolist(), r[1]])")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert out.returncode == 0, out.stderr
    *names, values = out.stdout.split(" ", 5)
    assert names == ["NullCache"] * 5
    assert eval(values) == [[0, 0, 1], 2]  # patches 0 and 1 linked, 2 alone


def test_compiled_regions_from_several_threads_at_once():
    # numba's default thread pool (workqueue) ends the process when two Python threads
    # enter a parallel kernel at once (numba's documentation, "The Threading Layers"); the
    # compiled regions take turns, so four threads simulating at once finish, each with the
    # same removals. In a subprocess: without the turns the whole process is aborted.
    import os
    import subprocess
    import sys
    from pathlib import Path

    tests = Path(__file__).resolve().parent
    code = (
        "import sys, threading; sys.path.insert(0, %r)\n"
        "import test_removals as T\n"
        "from trophoscape.model.system import CoupledSystem\n"
        "from trophoscape.integrate.ode import simulate\n"
        "big, z0, *_, d = T._side_by_side(60)\n"
        "c = CoupledSystem(model=big.model, area_km2=big.area_km2, "
        "prey_movement=big.prey_movement, predator_movement=big.predator_movement, "
        "local_terms='compiled')\n"
        "out = {}\n"
        "def work(k):\n"
        "    out[k] = simulate(c, z0, duration=d, census_interval=0.25).stats.removals\n"
        "threads = [threading.Thread(target=work, args=(k,)) for k in range(4)]\n"
        "[t.start() for t in threads]; [t.join() for t in threads]\n"
        "print(len(set(out.values())), len(out))\n" % str(tests))
    env = dict(os.environ, NUMBA_THREADING_LAYER="workqueue", NUMBA_NUM_THREADS="2")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                         timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.split() == ["1", "4"]


def test_compiled_region_groups_match_scipy_connected_components(rng):
    # the compiled regions find their groups by union-find; reference: scipy.sparse.csgraph
    # .connected_components on the links among the same patches (random sparse graphs)
    from scipy.sparse.csgraph import connected_components

    from trophoscape.integrate import compiled

    for trial in range(30):
        n = int(rng.integers(5, 400))
        a = sp.random_array((n, n), density=float(rng.uniform(0.001, 0.02)), random_state=rng,
                            format="csr")
        links = sp.csr_array(abs(a) + abs(a).T)
        patches = np.sort(rng.choice(n, size=int(rng.integers(1, n + 1)), replace=False))
        position = np.full(2 * n, -1, dtype=np.int64)
        label, count = compiled._groups(patches, links.indptr, links.indices, position)
        assert np.all(position == -1)
        want_count, want = connected_components(links[patches][:, patches], directed=False)
        assert count == want_count
        # the same partition: labels correspond one to one
        pairs = set(zip(label.tolist(), want.tolist()))
        assert len(pairs) == count
        # numbered in the order of each group's first patch
        first = [int(np.flatnonzero(label == g)[0]) for g in range(count)]
        assert first == sorted(first)
        # joined: the members in the groups that hold any of the new patches
        new = rng.choice(patches, size=min(3, patches.size), replace=False)
        mark = np.zeros(2 * n, dtype=bool)
        got = compiled.joined(patches, np.sort(new), links.indptr, links.indices, position,
                              mark)
        assert not mark.any() and np.all(position == -1)
        np.testing.assert_array_equal(got, patches[np.isin(want, want[np.isin(patches, new)])])


def test_compiled_corrections_equal_numpy(rng):
    # consistency test: what a region sends to the components just outside it, by the
    # compiled pass and by the numpy reference (retake.StepRetaker._corrections), summed in
    # the same order, so bit for bit
    from trophoscape.integrate.retake import StepRetaker

    ops = grid_operators()
    n = ops[0].shape[0]
    system = CoupledSystem(model=make_model(n), area_km2=np.ones(n), prey_movement=ops[0],
                           predator_movement=ops[1], local_terms="numpy")
    area, model, movement = system.parts()
    both = [StepRetaker(area, model, movement, compiled=flag) for flag in (False, True)]
    assert both[0].compiled is None and both[1].compiled is not None
    for _ in range(10):
        members = np.sort(rng.choice(n, size=int(rng.integers(1, n // 2)), replace=False))
        sent = rng.normal(size=2 * n)
        (t0, c0), (t1, c1) = (r._corrections(members, sent) for r in both)
        assert t0.size > 0
        np.testing.assert_array_equal(t1, t0)
        np.testing.assert_array_equal(c1, c0)
        assert not both[1]._mark.any() and np.all(both[1]._position == -1)



def test_compiled_corrections_are_the_same_with_the_species_apart_or_not(rng):
    # consistency test: with the species' links apart (a block-diagonal operator, as the
    # system builds it), the compiled pass does each species on its own thread; the
    # components reached and their changes must be those of one pass and of the numpy
    # reference, bit for bit, in the parallel kernel and its one-thread twin. An operator
    # with a link between the species is not taken apart, and is still summed right.
    from trophoscape.integrate import compiled
    from trophoscape.integrate.retake import StepRetaker

    ops = grid_operators()
    n = ops[0].shape[0]
    system = CoupledSystem(model=make_model(n), area_km2=np.ones(n), prey_movement=ops[0],
                           predator_movement=ops[1], local_terms="numpy")
    area, model, movement = system.parts()
    # and with links between the species: the prey of patch i reached by the predators of
    # patch i + 5 (as if they were carried by them), the predators of i by the prey of i + 3
    far = np.arange(n)
    cross = sp.csr_array((np.r_[np.full(n, 0.05), np.full(n, 0.02)],
                          (np.r_[far, far + n], np.r_[(far + 5) % n + n, (far + 3) % n])),
                         shape=(2 * n, 2 * n))
    crossed = sp.csr_array(movement + cross)
    for operator, apart in ((movement, True), (crossed, False)):
        numpy_path, compiled_path = (StepRetaker(area, model, operator, compiled=flag)
                                     for flag in (False, True))
        assert compiled_path._apart is apart
        t = compiled_path._transposed
        for _ in range(6):
            members = np.sort(rng.choice(n, size=int(rng.integers(1, n // 2)), replace=False))
            sent = rng.normal(size=2 * n)
            want = numpy_path._corrections(members, sent)
            runs = [kernel(members, n, t.indptr, t.indices, t.data, sent,
                           compiled_path._mark, compiled_path._position, split)
                    for kernel in (compiled.corrections, compiled.corrections.one_thread)
                    for split in ((True, False) if apart else (False,))]
            for targets, change in runs + [compiled_path._corrections(members, sent)]:
                np.testing.assert_array_equal(targets, want[0])
                np.testing.assert_array_equal(change.view(np.int64), want[1].view(np.int64))
            assert not compiled_path._mark.any() and np.all(compiled_path._position == -1)


@pytest.mark.parametrize("kind", [0, 1])
def test_region_setup_is_the_same_in_any_number_of_parts(rng, kind):
    # consistency test: the region's rows are built in runs on numba's threads, each in
    # its own stretch of the buffers; every array must be the same bit for bit in 1, 2, 3
    # or 7 runs and in the one-thread twin (kind 0: scipy's Runge-Kutta interpolant, 1:
    # DOP853's form)
    from trophoscape.integrate import compiled
    from trophoscape.integrate.retake import StepRetaker

    ops = grid_operators()
    n = ops[0].shape[0]
    system = CoupledSystem(model=make_model(n), area_km2=np.ones(n), prey_movement=ops[0],
                           predator_movement=ops[1], local_terms="numpy")
    retaker = StepRetaker(*system.parts(), compiled=True)
    links, movement = retaker.links, retaker.movement
    for _ in range(4):
        patches = np.sort(rng.choice(n, size=int(rng.integers(1, n // 2)), replace=False))
        y_old = rng.uniform(0.0, 50.0, 2 * n)
        coef = rng.normal(scale=4.0, size=(2 * n, 4 if kind == 0 else 7))
        args = (patches, n, links.indptr, links.indices, movement.indptr, movement.indices,
                movement.data, retaker._position, kind, y_old, coef, 0.3)
        runs = [compiled.region_setup(*args, parts) for parts in (1, 2, 3, 7)]
        runs.append(compiled.region_setup.one_thread(*args, 2))
        first = runs[0]
        assert first[9].size > 0 and first[4].size > 0  # sources kept, and links within
        assert np.count_nonzero(first[6]) > 0  # sources summed
        for other in runs[1:]:
            for a, b in zip(first, other):
                np.testing.assert_array_equal(np.asarray(b).view(np.uint8),
                                              np.asarray(a).view(np.uint8))
        assert np.all(retaker._position == -1)



@pytest.mark.parametrize("kind", ["rk", "dop853"])
def test_crossings_found_in_compiled_passes_are_numpys(rng, kind):
    # consistency test: the populations that fall through the threshold in a whole
    # network's step, found in two compiled passes (ode._crossed_compiled: the step's ends,
    # then the points on the interpolant of those near the threshold) and by the numpy
    # lines of simulate with crossings.falls_through_within, must be the same, on
    # interpolants of scipy's Runge-Kutta form and of DOP853's, NaN included
    import scipy.integrate as si

    from trophoscape.integrate.crossings import NEAR, falls_through_within
    from trophoscape.integrate.ode import _crossed_compiled, _on

    size, level = 4000, 2.0
    for _ in range(5):
        y_prev = level * rng.uniform(0.3, 2.0, size)
        y = y_prev * rng.uniform(0.6, 1.4, size)
        y[:5] = [np.nan, level, level * (1 + NEAR), level * (1 - NEAR), 0.0]
        above = rng.random(size) < 0.7
        # the first: just above the threshold at the start, NaN at the end, not armed, a
        # dip on its interpolant: not near the threshold (NaN), so not looked at
        y_prev[0], above[0] = 1.01 * level, False
        if kind == "rk":  # x + h sum_j Q_j theta**(j + 1), Q drawn to make dips
            q = rng.normal(scale=4.0, size=(size, 4))
            q[0] = [-10.0, 0.0, 0.0, 0.0]
            dense = si._ivp.rk.RkDenseOutput(0.0, 0.4, y_prev, q)
        else:
            factors = rng.normal(scale=1.5, size=(7, size))
            factors[0] = y - y_prev
            factors[:, 0] = [-50.0, 0, 0, 0, 0, 0, 0]
            dense = si._ivp.rk.Dop853DenseOutput(0.0, 0.4, y_prev, factors)

        class Solver:  # what _crossed_compiled reads of a solver
            def dense_output(self):
                return dense
        solver = Solver()
        solver.y = y
        now, crossed, got_dense = _crossed_compiled(solver, y_prev, above, level)
        want_now = y >= level
        want = above & ~want_now
        near = np.flatnonzero(~want & (np.minimum(y_prev, y) < (1.0 + NEAR) * level)
                              & (np.maximum(y_prev, y) > (1.0 - NEAR) * level))
        dips = near[falls_through_within(_on(dense), near, level, above[near])]
        want[dips] = True
        assert dips.size > 0 and got_dense is dense
        np.testing.assert_array_equal(now, want_now)
        np.testing.assert_array_equal(crossed, want)



def _numpy_crossings(solver, y_prev, above, level):
    """The numpy lines of ode.simulate that _crossed_compiled replaces on the compiled path
    (kept in simulate for the other solvers): the reference for the test below."""
    from trophoscape.integrate.crossings import NEAR, falls_through_within
    from trophoscape.integrate.ode import _on

    y = solver.y
    now = y >= level
    crossed = above & ~now
    near = np.flatnonzero(~crossed & (np.minimum(y_prev, y) < (1.0 + NEAR) * level)
                          & (np.maximum(y_prev, y) > (1.0 - NEAR) * level))
    dense = None
    if near.size:
        dense = solver.dense_output()
        crossed[near[falls_through_within(_on(dense), near, level, above[near])]] = True
    return now, crossed, dense


def test_a_run_with_compiled_crossings_is_the_run_with_numpys(rng, monkeypatch):
    # consistency test: the whole run (removals and all) with the network's crossings found
    # in compiled passes, and with them found by the numpy lines, bit for bit
    ops = grid_operators(20)
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "holling2")
    fast = pair(model, rng.uniform(0.2, 3.0, n), ops, order="rcm")[1]
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])
    compiled_calls = count_calls(monkeypatch, ode_module, "_crossed_compiled")
    compiled_run = simulate(fast, y0, duration=15.0, census_interval=0.5)
    assert len(compiled_calls) > 20
    monkeypatch.setattr(ode_module, "_crossed_compiled", _numpy_crossings)
    numpy_run = simulate(fast, y0, duration=15.0, census_interval=0.5)
    assert sum(compiled_run.stats.removals) > 0
    assert compiled_run.stats.removals == numpy_run.stats.removals
    assert compiled_run.stats.nfev == numpy_run.stats.nfev
    for species in ("prey", "predator"):
        np.testing.assert_array_equal(compiled_run.data[species].values,
                                      numpy_run.data[species].values)


def test_stability_in_a_process_forked_after_compiled_runs_is_the_same(rng, monkeypatch):
    # consistency test: the stability analysis beside the others runs in a process forked
    # after this one ran kernels on numba's threads (its compiled guess takes the
    # one-thread twins there); its results must be this process's, bit for bit
    from trophoscape.analysis.stability import stability_analysis
    from trophoscape.workflows.tasks import InSecondProcess, second_process_possible

    if not second_process_possible():
        pytest.skip("a second process is forked only on Linux with two cores")
    ops = grid_operators(20)
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "beddington_deangelis")
    fast = pair(model, rng.uniform(0.5, 2.0, n), ops)[1]
    assert fast.local_terms_used == "compiled"
    simulate(fast, np.concatenate([np.full(n, 40.0), np.full(n, 3.0)]), duration=2.0,
             census_interval=0.5)
    here = stability_analysis(fast)
    process = InSecondProcess(lambda: stability_analysis(fast), doing="computed stability",
                              name="trophoscape-test")
    assert process.start()
    there = process()
    assert there.keys() == here.keys()
    for key, value in here.items():
        if isinstance(value, np.ndarray):
            np.testing.assert_array_equal(there[key], value)
        else:
            assert there[key] == value or (value != value and there[key] != there[key])


_POOL_RUN = {}


def _pool_job(task):
    run = simulate(_POOL_RUN["system"], _POOL_RUN["y0"], duration=10.0, census_interval=0.5)
    return run.data["prey"].values, run.stats.removals


def test_a_pool_forked_after_compiled_runs_gives_the_same_runs(rng):
    # numba's OpenMP layer ends a forked process at its first parallel loop once its parent
    # ran one ("fork() called from a process already using GNU OpenMP"); corridor planning
    # and origin scans fork their pools after the baseline run. The workers take the kernels'
    # one-thread twins (model.compiled.threaded): every task must finish, bit for bit the
    # run made here (consistency test)
    from trophoscape.workflows.tasks import run_tasks

    ops = grid_operators()
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "holling2")
    fast = pair(model, rng.uniform(0.2, 3.0, n), ops, order="rcm")[1]
    y0 = np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)])

    _POOL_RUN.update(system=fast, y0=y0)  # forked workers inherit it
    job = _pool_job
    here = job(0)
    assert sum(here[1]) > 0  # the regions' kernel ran too
    got = {}
    run_tasks(job, [1, 2, 3], on_result=lambda task, ok, value: got.update({task: (ok, value)}),
              workers=2)
    assert sorted(got) == [1, 2, 3]
    for ok, value in got.values():
        assert ok, value
        np.testing.assert_array_equal(value[0], here[0])
        assert value[1] == here[1]


def _forked_run(queue):
    value = _pool_job(0)
    queue.put((value[0].tobytes(), value[1]))


def test_a_process_forked_after_compiled_runs_takes_the_one_thread_kernels(rng):
    # the same for any forked process, not only a pool's worker (which is told to use one
    # thread): the kernels see they run in a child of the process that started numba's
    # threads (consistency test: bit for bit the run made here)
    import multiprocessing

    ops = grid_operators()
    n = ops[0].shape[0]
    model = varied_model(rng, n, "logistic", "holling2")
    _POOL_RUN.update(system=pair(model, rng.uniform(0.2, 3.0, n), ops, order="rcm")[1],
                     y0=np.concatenate([rng.uniform(20, 60, n), rng.uniform(1, 5, n)]))
    here = _pool_job(0)
    context = multiprocessing.get_context("fork")
    queue = context.Queue()
    child = context.Process(target=_forked_run, args=(queue,))
    child.start()
    import queue as queues

    got = None
    for _ in range(300):  # until the child sends, or ends without sending (killed)
        try:
            got = queue.get(timeout=1)
            break
        except queues.Empty:
            if not child.is_alive():
                break
    child.join(timeout=60)
    assert child.exitcode == 0
    assert got == (here[0].tobytes(), here[1])


def test_patch_errors_keep_a_nan_as_numpy_does():
    # consistency test against numpy's formula (scipy's error estimate over the scale
    # atol + max(|y|, |y_new|) rtol, np.maximum keeping a NaN), per patch the larger of its
    # two components
    rng = np.random.default_rng(5)
    n, stages = 6, 7
    K = rng.normal(size=(stages, 2 * n))
    E = rng.normal(size=stages)
    y, y_new = rng.uniform(1, 5, 2 * n), rng.uniform(1, 5, 2 * n)
    y_new[1] = np.nan  # in the scale only (K finite)
    y[n + 4] = np.nan
    per = np.empty(n)
    compiled.patch_errors(K, E, 0.3, y, y_new, 1e-6, 1e-8, per)
    err = np.abs(np.dot(K.T, E) * 0.3) / (1e-8 + np.maximum(np.abs(y), np.abs(y_new)) * 1e-6)
    want = np.maximum(err[:n], err[n:])
    np.testing.assert_array_equal(np.isnan(per), np.isnan(want))
    assert np.isnan(per[1]) and np.isnan(per[4])
    ok = ~np.isnan(want)
    np.testing.assert_allclose(per[ok], want[ok], rtol=1e-13)


def test_dense_coefficients_equal_numpys_product():
    # consistency test: the compiled interpolant's coefficients are scipy's K.T @ P (BLAS)
    # to rounding, for RK45's and RK23's interpolants
    import scipy.integrate as si

    rng = np.random.default_rng(9)
    for method in (si.RK45, si.RK23):
        K = rng.normal(size=(method.n_stages + 1, 500))
        np.testing.assert_allclose(compiled.dense_coefficients(K, method.P), K.T @ method.P,
                                   rtol=1e-13, atol=1e-15)
