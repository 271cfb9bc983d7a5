"""Linear stability of the coexistence state against published single-patch results."""

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize
import scipy.sparse
import scipy.sparse.linalg
from conftest import make_model, make_system

from trophoscape.analysis import stability
from trophoscape.analysis.stability import (_density_equations, classify, coexistence_equilibrium,
                                            leading_eigenvalues, stability_analysis)
from trophoscape.model.dynamics import LocalModel
from trophoscape.model.network import Network, build_network, movement_operator
from trophoscape.integrate.ode import simulate
from trophoscape.model.system import CoupledSystem, pack
from trophoscape.testing import grid_landscape

# Rosenzweig–MacArthur parameters (logistic prey, Holling type II)
R, A, H, E, M = 1.0, 1.0, 0.2, 0.4, 0.5
N_STAR = M / (A * (E - M * H))  # Rosenzweig & MacArthur (1963) Am. Nat. 97:209, from memory
K_HOPF = 2 * N_STAR + 1 / (A * H)  # Rosenzweig (1971) Science 171:385


def rm_model(n, capacity, **kw):
    return make_model(n, growth_rate=R, attack_rate=A, handling_time=H, conversion=E,
                      mortality=M, capacity=capacity, **kw)


def ring_system(n, capacity, rate=0.1):
    """n identical patches of equal area on a ring: the uniform state is an equilibrium."""
    i = np.arange(n)
    nan = np.full(2 * n, np.nan)
    net = Network(ids=[str(k) for k in i], source=np.r_[i, (i + 1) % n],
                  target=np.r_[(i + 1) % n, i], distance_km=np.ones(2 * n), weight=nan,
                  survival=nan, origin=np.full(2 * n, "table"), kernel="exponential",
                  max_distance_km=2.0)
    op = movement_operator(net, emigration_rate=rate, scale_km=1.0, survival_per_km=1.0)
    return make_system(rm_model(n, capacity), area=np.full(n, 2.0), prey_movement=op,
                       predator_movement=op)


def grid_system(rows, cols, rng, *, k_range=(3.0, 6.0), rate=(0.05, 0.02)):
    """Patches that differ in capacity and area, linked on a grid."""
    land = grid_landscape(rows, cols, spacing_km=2.0, size_km=1.0)
    net = build_network(land, max_distance_km=2.5)
    n = land.n_patches
    ops = [movement_operator(net, emigration_rate=e, scale_km=2.0, survival_per_km=0.95)
           for e in rate]
    params = dict(rm_model(n, 1.0).params, capacity=rng.uniform(*k_range, n))
    model = LocalModel(growth="logistic", response="holling2", params=params)
    return CoupledSystem(model=model, area_km2=rng.uniform(0.5, 3.0, n), prey_movement=ops[0],
                         predator_movement=ops[1])


def test_rosenzweig_macarthur_equilibrium():
    # N* = m/(a(e - m h)), P* = (r/a)(1 - N*/K)(1 + a h N*) (Rosenzweig & MacArthur 1963)
    k = 6.0
    p_star = (R / A) * (1 - N_STAR / k) * (1 + A * H * N_STAR)
    system = make_system(rm_model(1, k), area=[3.0])
    closed = coexistence_equilibrium(system)
    assert closed.method == "closed form" and closed.found
    np.testing.assert_allclose(closed.state, [3 * N_STAR, 3 * p_star], rtol=1e-12)
    # and the root finder reaches it from elsewhere
    found = coexistence_equilibrium(system, guess=[3.6 * N_STAR, 2.4 * p_star])
    assert found.method == "hybr" and found.found and found.residual_norm < 1e-10
    np.testing.assert_allclose(found.state, [3 * N_STAR, 3 * p_star], rtol=1e-9)


@pytest.mark.parametrize("system_of", [lambda k: make_system(rm_model(1, k)),
                                       lambda k: ring_system(8, k)])
def test_hopf_threshold(system_of):
    # Rosenzweig (1971) Science 171:385, paradox of enrichment: the leading eigenvalue's
    # real part changes sign at K_H = 2 N* + 1/(a h); stable below, cycles above. For n
    # identical patches with equal dispersal of both species, the synchronous mode carries
    # the local eigenvalues and the other modes are shifted left (Pecora & Carroll 1998,
    # Phys. Rev. Lett. 80:2109, from memory).
    below = stability_analysis(system_of(0.95 * K_HOPF))
    above = stability_analysis(system_of(1.05 * K_HOPF))
    assert below["equilibrium_found"] and above["equilibrium_found"]
    assert below["leading_eigenvalue_real"] < 0 < above["leading_eigenvalue_real"]
    assert below["stability"] == "damped oscillation"
    assert above["stability"] == "sustained oscillation"
    np.testing.assert_allclose(below["prey_equilibrium"], N_STAR, rtol=1e-10)
    assert below["oscillation_period"] == pytest.approx(
        2 * np.pi / below["leading_eigenvalue_imag"])


def test_ring_uses_the_closed_form_and_matches_one_patch():
    single = stability_analysis(make_system(rm_model(1, 0.9 * K_HOPF)))
    ring = stability_analysis(ring_system(8, 0.9 * K_HOPF))
    assert ring["equilibrium_method"] == "closed form"
    assert ring["leading_eigenvalue_real"] == pytest.approx(single["leading_eigenvalue_real"],
                                                            abs=1e-10)
    assert ring["leading_eigenvalue_imag"] == pytest.approx(single["leading_eigenvalue_imag"],
                                                            rel=1e-10)


def test_lotka_volterra_centre():
    # Lotka–Volterra: equilibrium (m/(e a), r/a), eigenvalues ±i√(r m), period 2π/√(r m)
    # (Murray 2002, Mathematical Biology I §3.1, from memory). Numbers of the SciPy Cookbook
    # "Lotka–Volterra tutorial": r = 1, a = 0.1, m = 1.5, e a = 0.075, equilibrium (20, 10),
    # small-oscillation period 5.130199320647456.
    model = make_model(1, growth="exponential", response="lotka_volterra", growth_rate=1.0,
                       attack_rate=0.1, mortality=1.5, conversion=0.75)
    system = make_system(model)
    eq = coexistence_equilibrium(system)
    np.testing.assert_allclose(eq.state, [20.0, 10.0], rtol=1e-12)
    values = leading_eigenvalues(system, eq.state, k=2)
    np.testing.assert_allclose(values, [1j * np.sqrt(1.5), -1j * np.sqrt(1.5)], atol=1e-12)
    result = stability_analysis(system)
    assert result["stability"] == "neutral oscillation"
    assert result["oscillation_period"] == pytest.approx(5.130199320647456, rel=1e-12)


def test_heterogeneous_patches_match_a_long_run(rng):
    # below the Hopf threshold of every patch (K < K_H) the coexistence state attracts
    # (Rosenzweig 1971); a tight DOP853 run (scipy) from nearby must end on the root found
    system = grid_system(3, 4, rng)
    eq = coexistence_equilibrium(system)
    assert eq.method == "hybr" and eq.found and eq.residual_norm < 1e-8
    result = stability_analysis(system)
    assert result["leading_eigenvalue_real"] < 0
    rate = -result["leading_eigenvalue_real"]
    start = eq.state * rng.uniform(0.8, 1.2, eq.state.size)
    duration = 30.0 / rate  # the slowest mode decays by e^-30
    traj = simulate(system, start, duration=duration, census_interval=duration,
                    extinction_abundance=0.0, method="DOP853", rtol=1e-11, atol=1e-12)
    end = pack(traj["prey"].values[-1], traj["predator"].values[-1])
    np.testing.assert_allclose(end, eq.state, rtol=1e-6)


def test_krylov_agrees_with_hybr(rng):
    system = grid_system(8, 10, rng)
    dense = coexistence_equilibrium(system, method="hybr")
    sparse = coexistence_equilibrium(system, method="krylov")
    assert dense.found and sparse.found and sparse.method == "krylov"
    assert sparse.residual_norm < 1e-8
    np.testing.assert_allclose(sparse.state, dense.state, rtol=1e-7)


def test_sparse_eigenvalues_agree_with_dense(rng):
    # scipy.sparse.linalg.eigs (ARPACK, chosen automatically at 240 patches) against all
    # eigenvalues from scipy.linalg.eigvals (LAPACK) of the dense Jacobian
    system = grid_system(12, 20, rng)
    eq = coexistence_equilibrium(system)
    assert eq.found and eq.method == "newton"
    sparse = leading_eigenvalues(system, eq.state, k=6)
    dense = scipy.linalg.eigvals(system.jacobian_function()(0, eq.state).toarray())
    dense = dense[np.lexsort((-dense.imag, -dense.real))]
    # the last of six may be half of a conjugate pair that ARPACK cut off: compare four
    np.testing.assert_allclose(sparse[:4], dense[:4], rtol=1e-8, atol=1e-10)


def test_large_system_goes_sparse(rng):
    # above the dense limit: Newton–Krylov and ARPACK chosen automatically; the root
    # solves the equations, and shift-invert ARPACK (scipy) around the leading eigenvalue
    # finds that same eigenvalue
    system = grid_system(24, 30, rng)
    eq = coexistence_equilibrium(system)
    assert eq.method == "newton" and eq.found and eq.residual_norm < 1e-8
    lead = leading_eigenvalues(system, eq.state, k=4)[0]
    jacobian = scipy.sparse.csc_array(system.jacobian_function()(0, eq.state), dtype=complex)
    near = scipy.sparse.linalg.eigs(jacobian, k=1, sigma=lead + 1e-3, which="LM",
                                    return_eigenvectors=False)
    assert abs(near[0] - lead) < 1e-9


def test_no_interior_equilibrium_is_reported():
    # the predator cannot invade when K <= N* (Rosenzweig & MacArthur 1963): the only
    # roots with a predator have P* <= 0
    system = make_system(rm_model(2, 0.8 * N_STAR))
    eq = coexistence_equilibrium(system)
    assert not eq.interior
    assert "non-positive" in eq.message
    result = stability_analysis(system)
    assert not result["equilibrium_found"]
    assert result["stability"] == "no interior equilibrium"
    assert np.isnan(result["leading_eigenvalue_real"])


def test_no_closed_form_uses_a_short_run():
    # Holling type III: e a n²/(1 + a h n²) = m gives n*² = m / (a (e - m h))
    # (Holling 1959, Can. Entomol. 91:385, from memory; set dp/dt = 0)
    system = make_system(make_model(1, response="holling3", capacity=5.0))
    eq = coexistence_equilibrium(system)
    assert eq.found
    a, h, e, m = 1.0, 0.2, 0.4, 0.5
    assert eq.state[0] == pytest.approx(np.sqrt(m / (a * (e - m * h))), rel=1e-10)


def test_density_equations_match_the_system(rng):
    # common practice: the solver's equations are the system's, rescaled to densities
    system = grid_system(3, 3, rng)
    fun, jac, area = _density_equations(system)
    y = rng.uniform(1.0, 5.0, system.n_state)
    np.testing.assert_allclose(fun(y / area) * area, system.rhs_function()(0.0, y), rtol=1e-12)
    d = np.diag(area)
    np.testing.assert_allclose(d @ jac(y / area).toarray() @ np.linalg.inv(d),
                               system.jacobian_function()(0.0, y).toarray(), atol=1e-12)


@pytest.mark.parametrize("values, label", [
    ([-0.5, -1.0], "stable point"),
    ([-0.1 + 2j, -0.1 - 2j, -3.0], "damped oscillation"),
    ([0.1 + 2j, 0.1 - 2j, -3.0], "sustained oscillation"),
    ([0.2, -0.1 + 1j, -0.1 - 1j], "unstable"),
    ([1e-14 + 1j, 1e-14 - 1j], "neutral oscillation"),
    ([0.0, -1.0], "neutral"),
])
def test_classify(values, label):
    # the leading eigenvalue decides (linearisation; Strogatz 1994, Nonlinear Dynamics and
    # Chaos §6.3, from memory)
    assert classify(values) == label


# ------------------------------------------------------------------ uniform chains and fallbacks
def chain_system(n, capacity, rate=0.1):
    """n identical patches of equal area in a row, each linked to its neighbours (a links
    table): the end patches have one neighbour, so the uniform state is not an equilibrium."""
    i = np.arange(n - 1)
    nan = np.full(2 * (n - 1), np.nan)
    net = Network(ids=[str(k) for k in range(n)], source=np.r_[i, i + 1], target=np.r_[i + 1, i],
                  distance_km=np.ones(2 * (n - 1)), weight=nan, survival=nan,
                  origin=np.full(2 * (n - 1), "table"), kernel="exponential",
                  max_distance_km=2.0)
    op = movement_operator(net, emigration_rate=rate, scale_km=2.0, survival_per_km=0.97)
    return make_system(rm_model(n, capacity), area=np.ones(n), prey_movement=op,
                       predator_movement=op)


def dense_leading(system, state):
    """All eigenvalues of the dense Jacobian (scipy.linalg.eigvals, LAPACK), leading first."""
    values = scipy.linalg.eigvals(system.jacobian_function()(0, state).toarray())
    return values[np.lexsort((-values.imag, -values.real))]


def test_400_patch_chain_runs_and_matches_dense():
    # the chain of the ArpackNoConvergence report: Newton–Krylov and ARPACK chosen
    # automatically (800 states); reference: LAPACK on the dense Jacobian at the root
    system = chain_system(400, 0.9 * K_HOPF)
    result = stability_analysis(system)
    assert result["equilibrium_found"] and result["equilibrium_method"] == "newton"
    assert result["eigenvalue_method"] == "sparse"
    eq = coexistence_equilibrium(system)
    ref = dense_leading(system, eq.state)[0]
    assert result["leading_eigenvalue_real"] == pytest.approx(ref.real, rel=1e-8)
    assert result["leading_eigenvalue_imag"] == pytest.approx(abs(ref.imag), rel=1e-8)
    # below the Hopf threshold of every patch the coexistence state attracts (Rosenzweig 1971)
    assert result["stability"] == "damped oscillation"


def failing_eigs(monkeypatch):
    """Make scipy's eigs raise ArpackNoConvergence in ARPACK's regular mode."""
    real = scipy.sparse.linalg.eigs

    def eigs(matrix, *args, **kwargs):
        if kwargs.get("sigma") is None:
            raise scipy.sparse.linalg.ArpackNoConvergence("no convergence (forced)",
                                                          np.zeros(0), np.zeros((0, 0)))
        return real(matrix, *args, **kwargs)

    monkeypatch.setattr(scipy.sparse.linalg, "eigs", eigs)


@pytest.fixture
def small_sparse(monkeypatch):
    """The sparse solvers on a 60-patch chain (120 states): the dense limit lowered to 100."""
    monkeypatch.setattr(stability, "DENSE_LIMIT", 100)
    return chain_system(60, 0.9 * K_HOPF)


def test_dense_solve_takes_over_when_arpack_fails(monkeypatch, small_sparse):
    # sparse by default; ARPACK forced to fail, LAPACK answers
    system = small_sparse
    assert stability_analysis(system)["eigenvalue_method"] == "sparse"
    eq = coexistence_equilibrium(system)
    ref = dense_leading(system, eq.state)
    failing_eigs(monkeypatch)
    result = stability_analysis(system)
    assert result["eigenvalue_method"] == "dense"
    assert result["leading_eigenvalue_real"] == pytest.approx(ref[0].real, rel=1e-12)


def test_shift_invert_takes_over_above_the_dense_fallback(monkeypatch, small_sparse):
    # above DENSE_FALLBACK_LIMIT (lowered here) with ARPACK's regular mode failing:
    # shift-invert to the right of the spectrum finds the leading pair (LAPACK reference)
    system = small_sparse
    eq = coexistence_equilibrium(system)
    ref = dense_leading(system, eq.state)
    failing_eigs(monkeypatch)
    monkeypatch.setattr(stability, "DENSE_FALLBACK_LIMIT", 110)
    values = leading_eigenvalues(system, eq.state, k=4)
    np.testing.assert_allclose(values[:2], ref[:2], rtol=1e-8)
    assert stability_analysis(system)["eigenvalue_method"] == "shift-invert"


def test_every_eigen_solver_failing_is_a_clear_error(monkeypatch, small_sparse):
    system = small_sparse
    eq = coexistence_equilibrium(system)

    def eigs(*args, **kwargs):
        raise scipy.sparse.linalg.ArpackNoConvergence("forced", np.zeros(0), np.zeros((0, 0)))

    monkeypatch.setattr(scipy.sparse.linalg, "eigs", eigs)
    monkeypatch.setattr(stability, "DENSE_FALLBACK_LIMIT", 110)
    with pytest.raises(RuntimeError, match="no eigen-solver converged .* 120 x 120 Jacobian"):
        leading_eigenvalues(system, eq.state, k=4)


def test_root_finder_error_hands_over_to_the_other_method(monkeypatch, small_sparse):
    # when Newton's method raises, scipy's Newton–Krylov takes over; when that raises too
    # ("Function returned non-finite results"), MINPACK's hybrid method; each finds the
    # same root (consistency test between three root finders)
    import trophoscape.analysis.stability as stability

    system = small_sparse
    expected = coexistence_equilibrium(system)
    assert expected.method == "newton"

    def newton(*args, **kwargs):
        raise FloatingPointError("the residual is not finite")

    monkeypatch.setattr(stability, "_newton", newton)
    eq = coexistence_equilibrium(system)
    assert eq.found and eq.method == "krylov"
    assert "newton stopped: the residual is not finite" in eq.message
    np.testing.assert_allclose(eq.state, expected.state, rtol=1e-8)
    real = scipy.optimize.root

    def root(fun, x0, method=None, **kwargs):
        if method == "krylov":
            raise ValueError("Function returned non-finite results")
        return real(fun, x0, method=method, **kwargs)

    monkeypatch.setattr(scipy.optimize, "root", root)
    eq = coexistence_equilibrium(system)
    assert eq.found and eq.method == "hybr"
    assert "krylov stopped: Function returned non-finite results" in eq.message
    np.testing.assert_allclose(eq.state, expected.state, rtol=1e-8)


def test_every_root_finder_raising_is_reported_not_raised(monkeypatch, small_sparse):
    import trophoscape.analysis.stability as stability

    system = small_sparse

    def root(*args, **kwargs):
        raise np.linalg.LinAlgError("singular matrix")

    monkeypatch.setattr(scipy.optimize, "root", root)
    monkeypatch.setattr(stability, "_newton", root)
    result = stability_analysis(system)
    assert not result["equilibrium_found"]
    assert "newton stopped: singular matrix" in result["message"]
    assert "krylov stopped: singular matrix" in result["message"]
    assert "hybr stopped: singular matrix" in result["message"]
    assert np.isnan(result["leading_eigenvalue_real"])


def test_the_quick_eigenvalues_of_large_networks_agree_with_dense(monkeypatch):
    # the tolerance used from QUICK_EIGEN_STATES on, forced onto a 400-patch chain (800
    # states) and checked against LAPACK's dense eigenvalues at the same root (the outside
    # reference): the leading eigenvalue within 2 %, the same class
    import trophoscape.analysis.stability as stability

    system = chain_system(400, 0.9 * K_HOPF)
    eq = coexistence_equilibrium(system)
    assert eq.found
    ref = dense_leading(system, eq.state)
    monkeypatch.setattr(stability, "QUICK_EIGEN_STATES", 10)
    quick, how = stability._leading(system, eq.state, 6, "sparse")
    assert how == "sparse, tolerance 1e-2 (large network)"
    assert abs(quick[0] - ref[0]) <= 0.02 * abs(ref[0])
    assert classify(quick) == classify(ref) == "damped oscillation"


def test_the_large_network_equilibrium_and_eigenvalues_do_not_depend_on_patch_order(rng):
    # consistency test across patch order: the same 240 patches (480 states: Newton's
    # method and ARPACK) numbered in a random order give the same equilibrium, patch by
    # patch, and the same leading eigenvalues
    system = grid_system(12, 20, rng)
    n = system.n_patches
    perm = rng.permutation(n)
    model = LocalModel(growth=system.model.growth, response=system.model.response,
                       params={k: np.asarray(v)[perm] if np.ndim(v) else v
                               for k, v in system.model.params.items()})
    shuffled = CoupledSystem(model=model, area_km2=system.area_km2[perm],
                             prey_movement=system.prey_movement[perm][:, perm],
                             predator_movement=system.predator_movement[perm][:, perm])
    first, second = stability_analysis(system), stability_analysis(shuffled)
    assert first["equilibrium_method"] == second["equilibrium_method"] == "newton"
    for s in ("prey", "predator"):
        np.testing.assert_allclose(second[f"{s}_equilibrium"], first[f"{s}_equilibrium"][perm],
                                   rtol=1e-7)
    assert second["leading_eigenvalue_real"] == pytest.approx(
        first["leading_eigenvalue_real"], rel=1e-5, abs=1e-9)
    assert second["leading_eigenvalue_imag"] == pytest.approx(
        first["leading_eigenvalue_imag"], rel=1e-5, abs=1e-9)
    assert second["stability"] == first["stability"]
