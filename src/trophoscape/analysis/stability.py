"""Linear stability of the coexistence state of the whole coupled system.

Three steps, each usable on its own:

1. :func:`coexistence_equilibrium` finds the interior equilibrium of the coupled ODE of
   :mod:`trophoscape.model.system` (prey and predator present in every patch).
2. :func:`leading_eigenvalues` computes the eigenvalues of the Jacobian there with the
   largest real parts.
3. :func:`classify` names what they mean for the dynamics near the equilibrium.

:func:`stability_analysis` runs all three and returns a summary.

Notes
-----
The root finder works on the unclipped equations in density variables ``u = y / A``
(individuals per km²):

* **unclipped**: ``CoupledSystem.rhs_function`` evaluates the local terms on ``max(y, 0)``,
  which is right for integration but makes the equations flat (and the Jacobian
  inconsistent) for negative components. An equilibrium with a negative component is a
  true root of the polynomial equations that the clipped function cannot land on, and it
  is what tells us that no interior equilibrium exists near the guess; so we solve the
  equations themselves and report such a root instead of hiding it.
* **densities**: patch areas may differ by orders of magnitude; in densities every
  component has the scale of the local parameters, which keeps the root finder's step
  control and the preconditioner well balanced. The Jacobian in densities is
  ``D⁻¹ J D`` (``D = diag(A, A)``), similar to ``J``, so eigenvalues are unchanged.

The pieces are the same ones ``system`` uses (``LocalModel.rates``, ``LocalModel.partials``
and ``CoupledSystem.movement``); a test checks that both agree on positive states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.optimize
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..model.dynamics import interior_equilibrium
from ..model.system import CoupledSystem, pack

__all__ = [
    "Equilibrium",
    "coexistence_equilibrium",
    "leading_eigenvalues",
    "classify",
    "stability_analysis",
    "STABILITY_LABELS",
    "DENSE_LIMIT",
    "DENSE_FALLBACK_LIMIT",
]

#: Largest state size (2 n) handled with dense linear algebra (root finding and eigenvalues).
#: Measured with one BLAS thread on grids of patches: at 2 n = 800 MINPACK's hybrid method
#: took 1 s and a dense eigenvalue solve 0.9 s, against 0.03 s for Newton–Krylov and 0.2 s
#: for ARPACK; at 2 n = 2000 the dense root finder took 20 s. Both grow as (2 n)³.
DENSE_LIMIT = 400
#: From this many states (2 × patches) on, the leading eigenvalues are first sought to a
#: relative tolerance of 1e-2 (:func:`_leading_sparse`).
QUICK_EIGEN_STATES = 40_000

#: Largest state size (2 n) for which a dense eigenvalue solve (LAPACK, about 4 s at 2,400)
#: takes over when ARPACK does not converge. Above it, ARPACK is retried with a relaxed
#: tolerance, then in shift-invert mode.
DENSE_FALLBACK_LIMIT = 3000

# Largest state size for which MINPACK's dense hybrid method takes over when Newton–Krylov
# stops with an error (about 10 s at 1,600; see DENSE_LIMIT), and the other way round.
_HYBR_FALLBACK_LIMIT = 4 * DENSE_LIMIT

# Errors a root finder or eigen-solver raises when the numbers go wrong (non-finite trial
# steps, a zero Newton step, a singular factor), as opposed to errors in our own code.
_NUMERICAL_ERRORS = (ValueError, ArithmeticError, np.linalg.LinAlgError, RuntimeError)

#: Every label :func:`classify` and :func:`stability_analysis` can return.
STABILITY_LABELS = (
    "stable point",
    "damped oscillation",
    "neutral oscillation",
    "sustained oscillation",
    "unstable",
    "neutral",
    "no interior equilibrium",
)


@dataclass(frozen=True)
class Equilibrium:
    """Result of :func:`coexistence_equilibrium`.

    Attributes
    ----------
    state : ndarray, shape (2 n,)
        Abundances laid out as in :mod:`trophoscape.model.system` (prey, then predator).
    residual_norm : float
        Largest ``|dy/dt| / A`` at ``state``: the residual in density per time unit
        (individuals km⁻² per time unit), so that it does not grow with patch size.
    converged : bool
        The residual is within tolerance (see :func:`coexistence_equilibrium`).
    method : str
        ``"closed form"``, ``"hybr"``, ``"newton"`` or ``"krylov"``.
    message : str
        What happened, in words; names negative components when there are any.
    """

    state: np.ndarray
    residual_norm: float
    converged: bool
    method: str
    message: str

    @property
    def interior(self) -> bool:
        """True when every component is positive (a coexistence state)."""
        return bool(np.all(self.state > 0))

    @property
    def found(self) -> bool:
        """Converged to an interior equilibrium."""
        return self.converged and self.interior


# --------------------------------------------------------------------------- equations
def _density_equations(system: CoupledSystem):
    """Unclipped equations in densities: ``fun(u) -> (2 n,)`` and ``jac(u) -> csc (2n, 2n)``."""
    n = system.n_patches
    area = np.concatenate([system.area_km2, system.area_km2])
    # D⁻¹ M D: row j scaled by 1/A_j, column i by A_i
    movement = sp.csc_array(sp.diags_array(1.0 / area) @ system.movement @ sp.diags_array(area))
    rates = system.model.rates
    partials = system.model.partials
    i = np.arange(n)
    rows = np.concatenate([i, i, n + i, n + i])
    cols = np.concatenate([i, n + i, i, n + i])

    def fun(u):
        dn, dp = rates(u[:n], u[n:])
        return np.concatenate([dn, dp]) + movement @ u

    def jac(u):
        blocks = partials(u[:n], u[n:])
        local = sp.csc_array((np.concatenate(blocks), (rows, cols)), shape=(2 * n, 2 * n))
        return sp.csc_array(local + movement)

    return fun, jac, area


def _closed_form_state(system: CoupledSystem):
    """Per-patch closed-form equilibrium in densities, shape (2 n,), NaN where none; or None."""
    try:
        n_star, p_star = interior_equilibrium(system.model)
    except NotImplementedError:
        return None
    return np.concatenate([n_star, p_star])


def _fill_missing(u, system: CoupledSystem):
    """Guess for patches without a local equilibrium: prey at capacity, a few predators.

    Such a patch may still hold both species at the coupled equilibrium (a sink fed by
    its neighbours), so it gets a small positive predator density rather than zero.
    """
    n = system.n_patches
    q = system.model.params
    u = u.copy()
    prey, pred = u[:n], u[n:]
    gap = ~(np.isfinite(prey) & np.isfinite(pred))
    if gap.any():
        fallback_prey = q["capacity"] if "capacity" in system.model.growth_form.needs else 1.0
        prey[gap] = np.broadcast_to(fallback_prey, (n,))[gap]
        typical = np.nanmedian(pred[~gap]) if (~gap).any() else np.nan
        pred[gap] = 0.01 * (typical if np.isfinite(typical) else prey[gap])
    return u


def _simulated_guess(system: CoupledSystem, duration):
    """End state (densities) of a short run from half capacity; for models without a closed form."""
    from ..integrate.ode import simulate

    n = system.n_patches
    q = system.model.params
    if "capacity" in system.model.growth_form.needs:
        prey = 0.5 * np.asarray(q["capacity"], float)
    else:
        prey = np.ones(n)
    if duration is None:
        # about 50 characteristic times of the slower of prey growth and predator death
        slow = min(np.median(q["growth_rate"]), np.median(q["mortality"]))
        duration = 50.0 / slow if slow > 0 else 100.0
    area = system.area_km2
    traj = simulate(system, pack(prey * area, 0.1 * prey * area), duration=duration,
                    census_interval=duration, extinction_abundance=0.0, method="LSODA")
    end = np.concatenate([traj.data["prey"].values[-1], traj.data["predator"].values[-1]])
    return end / np.concatenate([area, area])


def _residual(fun, u):
    r = fun(u)
    return float(np.max(np.abs(r))) if r.size else 0.0


def coexistence_equilibrium(system: CoupledSystem, *, guess=None, tol: float = 1e-10,
                            method: str = "auto", guess_duration=None) -> Equilibrium:
    """Interior (coexistence) equilibrium of the coupled ODE.

    Parameters
    ----------
    system : CoupledSystem
    guess : ndarray, shape (2 n,), optional
        Starting abundances (prey then predator), e.g. the end state of a
        :func:`trophoscape.integrate.ode.simulate` run. Default: the closed-form local
        equilibrium of every patch (:func:`trophoscape.model.dynamics.interior_equilibrium`),
        prey at capacity and a few predators where a patch has none; for models without a
        closed form, the end state of a short simulation (``guess_duration``).
    tol : float
        Convergence: the density residual (see :class:`Equilibrium`) must be at most
        ``tol * max(1, largest density)``. Also the root finder's relative step tolerance.
    method : {"auto", "hybr", "newton", "krylov"}
        "hybr": MINPACK's Powell hybrid method with the dense analytic Jacobian. "newton":
        Newton's method with the sparse analytic Jacobian, each step solved by GMRES
        preconditioned with the inverse of each patch's 2 × 2 block, with backtracking
        (:func:`_newton`). "krylov": scipy's Newton–Krylov (LGMRES inner solver,
        preconditioned with an incomplete LU of the Jacobian at the guess). "auto" takes
        "hybr" for ``2 n <= DENSE_LIMIT`` and "newton" above it; when one stops with an
        error or without converging, the next takes over from the guess ("newton", then
        "krylov"; "hybr" up to ``2 n = 4 DENSE_LIMIT``); the message says so.
    guess_duration : float, optional
        Length of the guessing simulation (default about 50 / min(growth rate, mortality)).

    Returns
    -------
    Equilibrium
        When the per-patch closed form is itself an equilibrium of the coupled system
        (identical patches with balanced dispersal), it is returned with method
        "closed form" after its residual has been checked. A root with a negative
        component is returned as found, ``interior`` False and the message saying so: no
        interior equilibrium lies near the guess. When every root finder stops with an
        error, the guess is returned, not converged, with their messages.

    Notes
    -----
    Cost: "hybr" factorises a dense (2 n × 2 n) matrix, O(n³); "newton" O(patches + links)
    per Jacobian product, a few dozen of them a step, and typically under ten steps (1.3 s
    at 100,000 patches and 427,393 links, where "krylov" had not converged after 22 s);
    "krylov" one sparse incomplete LU and O(patches + links) per residual evaluation.
    """
    if method not in ("auto", "hybr", "newton", "krylov"):
        raise ValueError(f"method must be 'auto', 'hybr', 'newton' or 'krylov', got "
                         f"{method!r}")
    fun, jac, area = _density_equations(system)
    m = system.n_state

    def tolerance(u):
        scale = float(np.max(np.abs(u))) if u.size and np.all(np.isfinite(u)) else 1.0
        return tol * max(1.0, scale)

    closed = _closed_form_state(system)
    if guess is None:
        if closed is not None and np.all(np.isfinite(closed)):
            res = _residual(fun, closed)
            if res <= tolerance(closed):
                return Equilibrium(closed * area, res, True, "closed form",
                                   "the local closed-form equilibrium of every patch is an "
                                   "equilibrium of the coupled system")
        u0 = (_fill_missing(closed, system) if closed is not None
              else _simulated_guess(system, guess_duration))
    else:
        guess = np.asarray(guess, dtype=float)
        if guess.shape != (m,):
            raise ValueError(f"guess must have shape ({m},), got {guess.shape}")
        u0 = guess / area

    if method == "auto":
        if m <= DENSE_LIMIT:
            methods = ["hybr", "newton", "krylov"]
        else:
            methods = ["newton", "krylov"] + (["hybr"] if m <= _HYBR_FALLBACK_LIMIT else [])
    else:
        methods = [method]
    stopped = []
    sol = None
    for k, method in enumerate(methods):
        try:
            sol = _root(method, fun, jac, u0, tol, tolerance(u0))
        except _NUMERICAL_ERRORS as exc:
            stopped.append(f"{method} stopped: {_first_line(exc)}")
            continue
        u = np.asarray(sol.x, dtype=float)
        if k + 1 < len(methods) and not (np.all(np.isfinite(u))
                                         and _residual(fun, u) <= tolerance(u)):
            stopped.append(f"{method} did not converge: {_first_line(sol.message)}")
            continue  # the next method tries from the guess
        break
    if sol is None:  # every root finder raised: report the guess, not converged
        res = _residual(fun, u0) if np.all(np.isfinite(u0)) else np.inf
        return Equilibrium(u0 * area, res, False, method,
                           f"no equilibrium found: {'; '.join(stopped)}")
    u = np.asarray(sol.x, dtype=float)
    res = _residual(fun, u) if np.all(np.isfinite(u)) else np.inf
    converged = bool(np.isfinite(res) and res <= tolerance(u))
    message = "; ".join(stopped + [str(sol.message)])
    if not converged:
        message = f"no equilibrium to tolerance (residual {res:.3g}): {message}"
    negative = np.flatnonzero(u <= 0)
    if negative.size:
        n = system.n_patches
        which = ", ".join(f"{'prey' if k < n else 'predator'} in patch {k % n}"
                          for k in negative[:5])
        more = f" and {negative.size - 5} more" if negative.size > 5 else ""
        message = (f"no interior equilibrium near the guess: the root has {negative.size} "
                   f"non-positive component(s) ({which}{more}); {message}")
    return Equilibrium(u * area, res, converged, method, message)


def _first_line(exc) -> str:
    """An exception in one line: its first line, else its class name."""
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _newton(fun, jac, u0, fatol: float, *, max_iterations: int = 100):
    """Newton's method with the sparse analytic Jacobian.

    Each step solves ``J δ = −F`` by GMRES (``scipy.sparse.linalg.gmres``, relative
    tolerance 1e-8) preconditioned with the exact inverse of each patch's 2 × 2 block of
    ``J`` (the local prey–predator terms and the movement matrix's diagonal), then
    backtracks (halving the step) until the largest residual falls (Armijo's condition on
    the max norm); it stops when the largest residual is at most ``fatol``. Cost per step:
    one Jacobian, a few dozen sparse products, no factorisation.
    """
    from scipy.optimize import OptimizeResult

    u = np.array(u0, dtype=float)
    F = fun(u)
    norm = float(np.max(np.abs(F))) if F.size else 0.0
    n = u.size // 2
    for it in range(max_iterations):
        if not np.isfinite(norm):
            raise FloatingPointError("the residual is not finite")
        if norm <= fatol:
            return OptimizeResult(x=u, success=True, nit=it,
                                  message=f"Newton converged in {it} steps")
        J = sp.csr_array(jac(u))
        # each patch's block: its two species on the main diagonal, their effect on each
        # other n places off it (the movement operator links one species' patches only)
        a, d = J.diagonal()[:n], J.diagonal()[n:]
        b, c = J.diagonal(n), J.diagonal(-n)
        det = a * d - b * c
        ok = np.abs(det) > 1e-300
        det = np.where(ok, det, 1.0)

        def block_inverse(v, a=a, b=b, c=c, d=d, det=det, ok=ok):
            x, y = v[:n], v[n:]
            px = np.where(ok, (d * x - b * y) / det, x / np.where(a != 0, a, 1.0))
            py = np.where(ok, (a * y - c * x) / det, y / np.where(d != 0, d, 1.0))
            return np.concatenate([px, py])

        M = spla.LinearOperator(J.shape, matvec=block_inverse, dtype=float)
        delta, _ = spla.gmres(J, -F, M=M, rtol=1e-8, restart=60, maxiter=20)
        step = 1.0
        while True:
            trial = u + step * delta
            Ft = fun(trial)
            nt = float(np.max(np.abs(Ft)))
            if np.isfinite(nt) and nt <= (1.0 - 1e-4 * step) * norm:
                break
            step *= 0.5
            if step < 1e-6:
                return OptimizeResult(x=u, success=False, nit=it,
                                      message="Newton's line search found no decrease")
        u, F, norm = trial, Ft, nt
    return OptimizeResult(x=u, success=norm <= fatol, nit=max_iterations,
                          message=f"Newton stopped after {max_iterations} steps")


def _root(method: str, fun, jac, u0, tol: float, fatol: float):
    """One root-finder call of :func:`coexistence_equilibrium`."""
    with np.errstate(all="ignore"):  # trial steps may overflow; the residual decides
        if method == "newton":
            return _newton(fun, jac, u0, fatol)
        if method == "hybr":
            return scipy.optimize.root(fun, u0, method="hybr", jac=lambda u: jac(u).toarray(),
                                       options={"xtol": tol})
        options = {"fatol": fatol, "maxiter": 200}
        preconditioner = _ilu_preconditioner(jac(u0))
        if preconditioner is not None:
            options["jac_options"] = {"inner_M": preconditioner}
        return scipy.optimize.root(fun, u0, method="krylov", options=options)


def _ilu_preconditioner(jacobian):
    """``LinearOperator`` applying an incomplete-LU inverse of ``jacobian``; None if singular."""
    try:
        ilu = spla.spilu(sp.csc_matrix(jacobian), drop_tol=1e-6, fill_factor=20)
    except (RuntimeError, ValueError):  # a singular or non-finite factor: run unpreconditioned
        return None
    return spla.LinearOperator(jacobian.shape, matvec=ilu.solve, dtype=float)


# --------------------------------------------------------------------------- eigenvalues
def _sort_leading(values, k):
    values = np.asarray(values, dtype=complex)
    # largest real part first; conjugates by imaginary part, positive first
    order = np.lexsort((-values.imag, -values.real))
    return values[order][:k]


def _leading(system: CoupledSystem, state, k: int, method: str):
    """The ``k`` leading eigenvalues and the solver that found them."""
    jacobian = system.jacobian_function()(0.0, np.asarray(state, dtype=float))
    m = jacobian.shape[0]
    k = int(min(k, m))
    if method == "auto":
        method = "dense" if m <= DENSE_LIMIT else "sparse"
    if method not in ("dense", "sparse"):
        raise ValueError(f"method must be 'auto', 'dense' or 'sparse', got {method!r}")
    if method == "sparse" and k < m - 1:
        values, how = _leading_sparse(sp.csr_array(jacobian), k, relaxed=m > DENSE_FALLBACK_LIMIT)
        if values is not None:
            return values, how
        if m > DENSE_FALLBACK_LIMIT:
            raise RuntimeError(f"no eigen-solver converged on the leading {k} eigenvalues of "
                               f"the {m} x {m} Jacobian (ARPACK, with a relaxed tolerance, "
                               "shift-invert), and it is too large for a dense solve")
        # below DENSE_FALLBACK_LIMIT LAPACK takes over: every eigenvalue, always converges
    values = scipy.linalg.eigvals(jacobian.toarray(), check_finite=False)
    return _sort_leading(values, k), "dense"


def _leading_sparse(matrix, k: int, *, relaxed: bool):
    """ARPACK on the sparse Jacobian: ``(values, how)``, or ``(None, None)`` if nothing converged.

    Regular mode, then a larger Krylov space; with ``relaxed``, then a relaxed tolerance and
    then shift-invert at a shift to the right of the spectrum (see :func:`leading_eigenvalues`).
    """
    m = matrix.shape[0]
    # a fixed random start keeps runs reproducible and, unlike a constant vector, is not
    # confined to the synchronous modes of a symmetric network
    v0 = np.random.default_rng(0).standard_normal(m)
    if m >= QUICK_EIGEN_STATES:
        # a large network's rightmost eigenvalues crowd together (at 100,000 patches the
        # two leading pairs were 1e-4 apart): ARPACK to 1e-6 took 29 s there, to 1e-2
        # 3.6 s, and moved the leading eigenvalue by 0.7 % (its real part) and 0.01 % (its
        # imaginary part): ample for the class and the period
        try:
            values = spla.eigs(matrix, k=min(k, 4), which="LR", v0=v0, ncv=min(30, m - 1),
                               tol=1e-2, maxiter=50 * m, return_eigenvectors=False)
            return _sort_leading(values, k), "sparse, tolerance 1e-2 (large network)"
        except spla.ArpackError:
            pass
    for ncv in (max(4 * k + 1, 40), max(8 * k + 1, 80)):
        try:
            # tol 1e-6 (relative): ample for the sign and period of the leading
            # eigenvalue, and 16x faster than machine precision on 10,000 patches
            values = spla.eigs(matrix, k=k, which="LR", v0=v0, ncv=min(ncv, m), tol=1e-6,
                               maxiter=50 * m, return_eigenvectors=False)
            return _sort_leading(values, k), "sparse"
        except spla.ArpackError:  # ArpackNoConvergence, or a breakdown
            continue
    if not relaxed:
        return None, None
    try:
        values = spla.eigs(matrix, k=k, which="LR", v0=v0, ncv=min(max(16 * k + 1, 160), m),
                           tol=1e-4, maxiter=200 * m, return_eigenvectors=False)
        return _sort_leading(values, k), "sparse, relaxed tolerance"
    except spla.ArpackError:
        pass
    # Gershgorin: every eigenvalue has real part at most max_i (J_ii + Σ_j≠i |J_ij|)
    diagonal = matrix.diagonal()
    right = float(np.max(diagonal + np.abs(matrix).sum(axis=1) - np.abs(diagonal)))
    sigma = right + 1e-3 * max(1.0, abs(right))
    want = min(max(3 * k, 12), m - 2)
    try:
        values = spla.eigs(sp.csc_array(matrix), k=want, sigma=sigma, which="LM", v0=v0,
                           tol=1e-8, return_eigenvectors=False)
        return _sort_leading(values, k), "shift-invert"
    except (spla.ArpackError, RuntimeError):  # RuntimeError: a singular LU factor
        return None, None


def leading_eigenvalues(system: CoupledSystem, state, *, k: int = 6,
                        method: str = "auto") -> np.ndarray:
    """Eigenvalues of the Jacobian at ``state`` with the largest real parts.

    Parameters
    ----------
    system : CoupledSystem
    state : ndarray, shape (2 n,)
        Abundances, e.g. ``coexistence_equilibrium(system).state``.
    k : int
        How many (at most ``2 n``).
    method : {"auto", "dense", "sparse"}
        "auto" is "dense" (all eigenvalues of the dense Jacobian, LAPACK) for
        ``2 n <= DENSE_LIMIT`` and "sparse" above it.

    Returns
    -------
    ndarray of complex, shape (k,)
        Sorted by real part, largest first (a conjugate pair: positive imaginary part first).

    Raises
    ------
    RuntimeError
        Above ``2 n = DENSE_FALLBACK_LIMIT``, when no solver of the fallback chain converges.

    Notes
    -----
    "sparse" calls ``scipy.sparse.linalg.eigs(J, which="LR")`` in ARPACK's regular mode,
    which needs only products with the sparse Jacobian (O(patches + links) each). We do not
    use shift-invert first: it needs a shift near the leading eigenvalues, which is what we
    are looking for, and a sparse LU whose fill-in on planar patch graphs grows quickly (see
    :func:`trophoscape.integrate.ode.choose_method`). If ARPACK does not converge, it is tried
    once more with a larger Krylov space; then, for ``2 n <= DENSE_FALLBACK_LIMIT``, the dense
    solve gives the answer. Above that, ARPACK is tried with tolerance 1e-4, then in
    shift-invert mode at a real shift ``σ`` to the right of every eigenvalue (Gershgorin's
    bound on the real parts), returning the eigenvalues nearest ``σ``: the rightmost ones
    unless an eigenvalue with a large imaginary part lies further right than a nearer
    one, so a "shift-invert" answer is a best effort; :func:`stability_analysis` records
    which solver answered (``eigenvalue_method``).
    """
    return _leading(system, state, k, method)[0]


def classify(eigenvalues, *, tol: float = 1e-8) -> str:
    """Name the local dynamics near an equilibrium from its leading eigenvalues.

    Parameters
    ----------
    eigenvalues : array_like of complex, shape (k,)
        Any set containing the eigenvalue(s) with the largest real part.
    tol : float
        Relative tolerance: real or imaginary parts within ``tol * max(1, max |λ|)`` of zero
        count as zero.

    Returns
    -------
    str
        By the eigenvalue with the largest real part (a conjugate pair counts as one):

        * "stable point": real and negative;
        * "damped oscillation": complex, negative real part;
        * "neutral oscillation": complex, real part zero within tolerance (a centre, as in
          the Lotka–Volterra model; the linearisation cannot decide nonlinear stability);
        * "sustained oscillation": complex, positive real part (the Hopf side: the
          equilibrium is unstable and populations cycle; the paradox of enrichment);
        * "unstable": real and positive;
        * "neutral": real and zero within tolerance.
    """
    values = np.asarray(eigenvalues, dtype=complex).ravel()
    if values.size == 0:
        raise ValueError("classify needs at least one eigenvalue")
    eps = tol * max(1.0, float(np.max(np.abs(values))))
    lead = _sort_leading(values, 1)[0]
    oscillating = abs(lead.imag) > eps
    if lead.real < -eps:
        return "damped oscillation" if oscillating else "stable point"
    if lead.real > eps:
        return "sustained oscillation" if oscillating else "unstable"
    return "neutral oscillation" if oscillating else "neutral"


def stability_analysis(system: CoupledSystem, *, guess=None, k: int = 6, tol: float = 1e-10,
                       eigen_method: str = "auto") -> dict:
    """Equilibrium, leading eigenvalue and stability class of the coupled system.

    Parameters
    ----------
    system : CoupledSystem
    guess : ndarray, shape (2 n,), optional
        Passed to :func:`coexistence_equilibrium`.
    k : int
        Eigenvalues computed (:func:`leading_eigenvalues`).
    tol : float
        Passed to :func:`coexistence_equilibrium`.
    eigen_method : {"auto", "dense", "sparse"}

    Returns
    -------
    dict
        ``equilibrium_found`` (bool: converged, every component positive),
        ``equilibrium_method`` (str), ``equilibrium_residual`` (float, density per time),
        ``leading_eigenvalue_real``, ``leading_eigenvalue_imag`` (float, per time unit;
        the imaginary part non-negative), ``stability`` (one of ``STABILITY_LABELS``),
        ``oscillation_period`` (``2π / |Im λ|`` where the leading eigenvalue is complex,
        else NaN), ``message`` (str), ``eigenvalue_method`` ("dense", "sparse",
        "sparse, tolerance 1e-2 (large network)", "sparse, relaxed tolerance" or
        "shift-invert"; None without eigenvalues; see
        :func:`leading_eigenvalues`), and per patch ``prey_equilibrium``,
        ``predator_equilibrium`` (ndarray, shape (n,), densities per km²).
        Without an interior equilibrium, ``stability`` is "no interior equilibrium" and
        the eigenvalue figures are NaN; the densities are those of the root found.
    """
    eq = coexistence_equilibrium(system, guess=guess, tol=tol)
    n = system.n_patches
    area = system.area_km2
    out = {
        "equilibrium_found": eq.found,
        "equilibrium_method": eq.method,
        "equilibrium_residual": eq.residual_norm,
        "leading_eigenvalue_real": np.nan,
        "leading_eigenvalue_imag": np.nan,
        "stability": "no interior equilibrium",
        "oscillation_period": np.nan,
        "message": eq.message,
        "eigenvalue_method": None,
        "prey_equilibrium": eq.state[:n] / area,
        "predator_equilibrium": eq.state[n:] / area,
    }
    if not eq.found:
        return out
    values, out["eigenvalue_method"] = _leading(system, eq.state, k, eigen_method)
    label = classify(values)
    lead = values[0]
    out["leading_eigenvalue_real"] = float(lead.real)
    out["leading_eigenvalue_imag"] = float(abs(lead.imag))
    out["stability"] = label
    if "oscillation" in label:
        out["oscillation_period"] = float(2.0 * np.pi / abs(lead.imag))
    return out
