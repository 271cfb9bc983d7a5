"""Metapopulation capacity of a patch network, and what each patch contributes to it.

The metapopulation capacity ``λ_M`` of Hanski & Ovaskainen (2000, Nature 404:755) is the
leading eigenvalue of the landscape matrix::

    M_ij = exp(-α d_ij) A_i A_j    (i ≠ j),    M_ii = 0,

with ``A`` the patch areas, ``d_ij`` the distance between patches and ``1/α`` the
dispersal kernel scale of the species. A species persists in the landscape (in their
patch-occupancy model) iff ``λ_M`` exceeds its ratio of extinction to colonisation rate;
comparing ``λ_M`` across layouts ranks them for that species whatever that ratio is.

Our choice, not theirs: ``M`` has entries only for pairs of patches that the network links
(kernel links within ``max_distance_km``, corridors, links-table rows). Pairs farther apart
count as zero, so ``M`` is sparse with O(links) entries instead of dense n × n. With
``max_distance_km`` several kernel scales long, the truncated tail is negligible.

Eigen-solvers. Up to ``DENSE_LIMIT`` patches every eigenvalue here comes from LAPACK
(``scipy.linalg.eigh``), which always converges. Above it, ARPACK (``eigsh``) with a
fallback chain when it does not converge: ARPACK again with a relaxed tolerance and a larger
Krylov space, then shift-invert ARPACK at a shift just above the Perron bound (the largest
row sum, which no eigenvalue exceeds, so the eigenvalue nearest the shift is the largest),
then LOBPCG; a fallback's answer is kept only if its residual is small. Uniform chains are
the hard case for plain ARPACK: their leading eigenvalues crowd together.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import connected_components

from ..model.network import KERNELS, Network, kernel_weight, per_patch_array

__all__ = [
    "landscape_matrix",
    "metapopulation_capacity",
    "patch_contributions",
    "capacity_analysis",
    "capacity_columns",
    "DENSE_LIMIT",
]

#: Above this many patches in the leading component, the drop in capacity when a patch is
#: lost is an estimate (see :func:`patch_contributions`) instead of an exact eigenvalue
#: per patch.
EXACT_DROP_LIMIT = 2000

#: Largest matrix (patches, or patches of the leading component for the drops) whose
#: eigenvalues come from dense LAPACK solves. Measured with two BLAS threads: the largest
#: eigenpair of a dense 2,000 × 2,000 symmetric matrix in 0.25 s (32 MB), all of them in
#: under 2 s; at 3,000 the time jumps to several seconds.
DENSE_LIMIT = 2000

# Components up to this size get their drops from one batched LAPACK call on c copies of the
# block (c³ numbers: 2 MB at 64).
_BATCH_SIZE = 64
# ARPACK's tolerance on the second try, and the relative residual a fallback must reach.
_RELAXED_TOL = 1e-8
_ACCEPT_RESIDUAL = 1e-7
# ARPACK restarts allowed on the first and second tries. scipy's default (10 n) lets a
# uniform chain of 20,000 patches, whose leading eigenvalues crowd together, take 190 s
# before converging; with these caps it fails over in about 5 s to shift-invert, which
# takes 0.03 s (one thread; benchmarks in the notes of _largest_iterative).
_RESTARTS = 1000
_RELAXED_RESTARTS = 100


def _pair_scale(scale_km, n: int, lo, hi) -> np.ndarray:
    scale = per_patch_array(scale_km, n, "scale_km", positive=True)  # the network's own check
    # per-patch scales: a pair uses the mean of its two patches' scales, so M stays symmetric
    return 0.5 * (scale[lo] + scale[hi])


def landscape_matrix(network: Network, area_km2, *, scale_km,
                     kernel: str = "exponential") -> sp.csr_array:
    """The sparse symmetric landscape matrix of Hanski & Ovaskainen (2000).

    Parameters
    ----------
    network : Network
        Only linked pairs enter (see the module notes: this truncation is ours).
    area_km2 : array_like, shape (n_patches,)
        Patch areas.
    scale_km : float or array_like, shape (n_patches,)
        Kernel scale ``L = 1/α`` of the species; with one scale per patch, a pair uses the
        mean of its two patches' scales.
    kernel : {"exponential", "gaussian", "step"}
        ``exp(-d/L)`` is the kernel of Hanski & Ovaskainen; the others are offered for
        species whose dispersal the scenario models with them.

    Returns
    -------
    scipy.sparse.csr_array, shape (n_patches, n_patches)
        ``M_ij = k(d_ij) A_i A_j`` for linked pairs, zero diagonal, symmetric.

    Notes
    -----
    Arcs are taken as unordered pairs, so a one-way links-table row links the pair both
    ways here, and a pair joined by several routes (a kernel link and a corridor) enters
    once, with its largest kernel weight (its shortest route), not summed. ``d_ij`` is the
    arc's ``effective_distance_km`` (a corridor's length times its resistance); fixed link weights of a
    links table are not used.
    """
    n = network.n_patches
    area = np.asarray(area_km2, dtype=np.float64)
    if area.shape != (n,):
        raise ValueError(f"area_km2 must have shape ({n},), got {area.shape}")
    if kernel not in KERNELS:
        raise ValueError(f"kernel must be one of {sorted(KERNELS)}, got {kernel!r}")
    src, dst = network.source, network.target
    off = src != dst
    lo = np.minimum(src, dst)[off]
    hi = np.maximum(src, dst)[off]
    if lo.size == 0:
        return sp.csr_array((n, n))
    weight = kernel_weight(kernel, network.effective_distance_km[off],
                           _pair_scale(scale_km, n, lo, hi))
    key = network.pair_codes(lo, hi)
    order = np.argsort(key, kind="stable")
    key, weight = key[order], weight[order]
    start = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    weight = np.maximum.reduceat(weight, start)  # one entry per pair: its best route
    i, j = network.positions_of(key[start])
    value = weight * area[i] * area[j]
    matrix = sp.coo_array((np.concatenate([value, value]),
                           (np.concatenate([i, j]), np.concatenate([j, i]))), shape=(n, n))
    return sp.csr_array(matrix.tocsr())


def _leading_pair(matrix, v0=None):
    """Largest eigenvalue of a symmetric non-negative matrix and its unit eigenvector ≥ 0."""
    n = matrix.shape[0]
    if n == 0:
        return 0.0, np.zeros(0)
    if matrix.nnz == 0:
        return 0.0, np.zeros(n)
    if n <= DENSE_LIMIT:
        values, vectors = scipy.linalg.eigh(matrix.toarray(), subset_by_index=[n - 1, n - 1])
        value, vector = float(values[0]), vectors[:, 0]
    else:
        # a positive start (the Perron vector is positive) and a fixed one, for reproducibility
        start = np.ones(n) if v0 is None else v0
        value, vector = _largest_iterative(sp.csr_array(matrix), start, tol=1e-12)
    # The leading eigenspace of a non-negative symmetric matrix is spanned by the
    # non-negative Perron vectors of the components that attain λ (disjoint supports),
    # so |x| is in it too: this fixes the sign.
    vector = np.abs(vector)
    return max(value, 0.0), vector / np.linalg.norm(vector)


def _residual(matrix, value, vector) -> float:
    """``‖M x − λ x‖ / (|λ| ‖x‖)``; infinite for a zero or non-finite answer."""
    norm = float(np.linalg.norm(vector))
    if not (np.isfinite(value) and norm > 0 and np.all(np.isfinite(vector))):
        return np.inf
    scale = abs(value) if value != 0 else 1.0
    return float(np.linalg.norm(matrix @ vector - value * vector)) / (scale * norm)


def _largest_iterative(matrix, start, *, tol: float):
    """Largest eigenvalue and an eigenvector of a large symmetric non-negative sparse matrix.

    Tries, in order, until one converges: ARPACK (``eigsh``, Lanczos) at ``tol``; ARPACK at
    ``_RELAXED_TOL`` with a larger Krylov space; shift-invert ARPACK at a
    shift ``σ`` just above the largest row sum (every eigenvalue of a non-negative matrix
    is at most that, so the one nearest ``σ`` is the largest, and ``M − σI`` cannot be
    singular); LOBPCG from ``start``. The answers of the fallbacks are kept only when their
    relative residual is below ``_ACCEPT_RESIDUAL``.

    Measured on a uniform chain (one BLAS thread): at 3,000 patches the first try runs
    out of restarts in 0.6 s and the second converges in 0.2 s; at 20,000 both run out
    (3.4 s and about 3 s) and shift-invert converges in 0.03 s.

    Raises
    ------
    RuntimeError
        When none of them gives an answer, naming the size and what was tried.
    """
    n = matrix.shape[0]
    start = np.asarray(start, dtype=float)
    if n <= 2:  # eigsh needs k < n; a 2 × 2 problem costs nothing dense
        values, vectors = scipy.linalg.eigh(matrix.toarray())
        return float(values[-1]), vectors[:, -1]
    try:
        values, vectors = spla.eigsh(matrix, k=1, which="LA", v0=start, tol=tol,
                                     maxiter=_RESTARTS)
        return float(values[0]), vectors[:, 0]
    except spla.ArpackError:
        pass
    tried = ["ARPACK"]
    try:
        values, vectors = spla.eigsh(matrix, k=1, which="LA", v0=start, tol=_RELAXED_TOL,
                                     ncv=min(n, 64), maxiter=_RELAXED_RESTARTS)
        if _residual(matrix, values[0], vectors[:, 0]) <= _ACCEPT_RESIDUAL:
            return float(values[0]), vectors[:, 0]
    except spla.ArpackError:
        pass
    tried.append("ARPACK with a relaxed tolerance")
    bound = float(np.max(np.abs(matrix).sum(axis=1)))
    sigma = bound * (1.0 + 1e-6) + np.finfo(float).tiny
    try:
        values, vectors = spla.eigsh(sp.csc_array(matrix), k=1, sigma=sigma, which="LM",
                                     v0=start, tol=_RELAXED_TOL)
        if _residual(matrix, values[0], vectors[:, 0]) <= _ACCEPT_RESIDUAL:
            return float(values[0]), vectors[:, 0]
    except (spla.ArpackError, RuntimeError):  # RuntimeError: a singular LU factor
        pass
    tried.append("shift-invert ARPACK")
    # LOBPCG on a block of a few vectors (a lone vector stalls on crowded eigenvalues); it
    # warns rather than raising when it stops short, and the residual below decides
    block = np.column_stack([start] + [np.random.default_rng(k).random(n) for k in range(3)])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        values, vectors = spla.lobpcg(matrix, block, largest=True, tol=1e-10,
                                      maxiter=max(200, min(n, 2000)))
    best = int(np.argmax(values))
    if _residual(matrix, values[best], vectors[:, best]) <= _ACCEPT_RESIDUAL:
        return float(values[best]), vectors[:, best]
    tried.append("LOBPCG")
    raise RuntimeError(f"no eigen-solver converged on the largest eigenvalue of the {n} x {n} "
                       f"landscape matrix (tried {', '.join(tried)})")


def metapopulation_capacity(network: Network, area_km2, *, scale_km,
                            kernel: str = "exponential") -> tuple[float, np.ndarray]:
    """Metapopulation capacity ``λ_M`` and the leading eigenvector of the landscape matrix.

    Parameters
    ----------
    network, area_km2, scale_km, kernel
        As for :func:`landscape_matrix`.

    Returns
    -------
    lambda_m : float
        Leading eigenvalue of :func:`landscape_matrix` (km⁴, areas squared), 0 when no
        patch is linked.
    eigenvector : ndarray, shape (n_patches,)
        Unit length, non-negative; all zero when no patch is linked.

    Notes
    -----
    A dense symmetric solve (``scipy.linalg.eigh``, largest eigenpair only) up to
    ``DENSE_LIMIT`` patches; above, ``scipy.sparse.linalg.eigsh(k=1, which="LA")`` (ARPACK,
    products with the sparse matrix only) with the fallbacks of the module notes.

    Raises
    ------
    RuntimeError
        Above ``DENSE_LIMIT`` patches, when no solver of the fallback chain converges.
    """
    matrix = landscape_matrix(network, area_km2, scale_km=scale_km, kernel=kernel)
    return _leading_pair(matrix)


def _drops_exact(matrix, vector, lam):
    """Exact fall in λ when each patch is removed, shape (n,).

    Only the connected component holding the leading eigenvector's largest entry can
    lower λ: removing any other patch leaves that component, and λ, untouched (with ties
    between components another component keeps λ, which this also gets right).
    """
    n = matrix.shape[0]
    drops = np.zeros(n)
    _, label = connected_components(matrix, directed=False)
    members = np.flatnonzero(label == label[int(np.argmax(vector))])
    rest = np.flatnonzero(label != label[int(np.argmax(vector))])
    # the best the rest of the landscape can do on its own
    lam_rest = _leading_pair(matrix[rest][:, rest])[0] if rest.size else 0.0
    sub = sp.csr_array(matrix[members][:, members])
    c = members.size
    if c <= 1:
        return drops
    if c <= _BATCH_SIZE:
        # one batched LAPACK call: every copy of the block with one row and column zeroed
        # (its nonzero eigenvalues are those of the block without that patch)
        block = sub.toarray()
        stack = np.broadcast_to(block, (c, c, c)).copy()
        k = np.arange(c)
        stack[k, k, :] = 0.0
        stack[k, :, k] = 0.0
        without = np.linalg.eigvalsh(stack)[:, -1]
    elif c <= DENSE_LIMIT:
        without = lam - _drops_from_spectrum(sub.toarray())
    else:
        without = _without_iterative(sub, vector[members], lam)
    drops[members] = lam - np.maximum(np.maximum(without, 0.0), lam_rest)
    return np.maximum(drops, 0.0)  # rounding cannot make a loss raise λ (Perron–Frobenius)


def _drops_from_spectrum(block, iterations: int = 200):
    """Fall in the largest eigenvalue of a connected symmetric non-negative ``block`` when
    each row and column is removed in turn, from one dense eigendecomposition, shape (c,).

    With ``B = Q diag(λ) Qᵀ`` (``λ_1`` the largest), Cramer's rule gives
    ``det(B_k − μI) / det(B − μI) = [(B − μI)⁻¹]_kk = Σ_j Q_kj² / (λ_j − μ)`` for ``B_k``,
    ``B`` without row and column k. So the largest eigenvalue of ``B_k`` is the root of
    that sum in ``[λ_2, λ_1]`` (Cauchy interlacing puts it there). In the drop
    ``δ = λ_1 − μ``, with ``w_j = Q_kj²`` and gaps ``g_j = λ_1 − λ_j``, the root solves

        f(δ) = w_1 / δ − Σ_{j≥2} w_j / (g_j − δ) = 0,    0 < δ ≤ g_2,

    and ``f`` falls strictly from +∞, so bisection finds it for every patch at once
    (O(c²) per step). The Rayleigh–Ritz bound ``δ ≤ λ_1 w_1 / (1 − w_1)`` (see
    :func:`patch_contributions`) narrows the first bracket. Cost O(c³) for the
    decomposition instead of one eigen-solve per patch.
    """
    values, vectors = scipy.linalg.eigh(block)
    lam = values[-1]
    gap = lam - values[::-1]              # g_1 = 0 ≤ g_2 ≤ ... (descending eigenvalues)
    weight = vectors[:, ::-1] ** 2        # row k: w_j of patch k, same order
    w1, rest_w, rest_g = weight[:, 0], weight[:, 1:], gap[1:]
    with np.errstate(divide="ignore", invalid="ignore"):
        bound = np.where(w1 < 1.0, lam * w1 / (1.0 - w1), np.inf)
    lo = np.zeros(block.shape[0])
    hi = np.minimum(bound * (1.0 + 1e-9), rest_g[0] if rest_g.size else np.inf)
    hi = np.where(np.isfinite(hi), hi, lam)
    # stop at the rounding of δ, or far below that of λ for drops near zero
    eps = np.finfo(float).eps
    floor = 1e-6 * eps * abs(lam)
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            f = w1 / mid - (rest_w / (rest_g[None, :] - mid[:, None])).sum(axis=1)
        # f > 0: the root is above mid; f ≤ 0 (or -inf next to the pole g_2): below
        right = f > 0
        lo = np.where(right, mid, lo)
        hi = np.where(right, hi, mid)
        if np.all(hi - lo <= 4.0 * eps * hi + floor):
            break
    return 0.5 * (lo + hi)


def _without_iterative(sub, x, lam):
    """λ of the component without each patch, one sparse eigen-solve per patch, shape (c,).

    For components above ``DENSE_LIMIT`` (only when ``exact_limit`` allows them). The patch
    is masked out of the matrix rather than sliced out (that adds an eigenvalue 0, harmless
    for the largest one), and each solve starts from the eigenvector with the patch zeroed,
    which is close to the answer, so ARPACK needs few iterations; :func:`_largest_iterative`
    supplies the fallbacks.
    """
    c = sub.shape[0]
    share = x * x
    # 0 <= drop <= λ x²/(1 - x²) (see patch_contributions); where that bound is below
    # the rounding of an eigen-solve the bound is the answer and no solve is needed
    # (this spares most patches when the eigenvector is concentrated in a few)
    without = lam - lam * share / (1.0 - share)
    keep = np.ones(c)
    for k in np.flatnonzero(share / (1.0 - share) > 1e-13):
        keep[k] = 0.0
        masked = sp.csr_array(sp.diags_array(keep) @ sub @ sp.diags_array(keep))
        start = keep * (x + 1e-12)  # ARPACK rejects a zero start; keep the rest positive
        without[k] = _largest_iterative(masked, start, tol=0.0)[0]
        keep[k] = 1.0
    return without


def patch_contributions(network: Network, area_km2, *, scale_km, kernel: str = "exponential",
                        exact_limit: int = EXACT_DROP_LIMIT):
    """What each patch contributes to the metapopulation capacity.

    Parameters
    ----------
    network, area_km2, scale_km, kernel
        As for :func:`landscape_matrix`.
    exact_limit : int
        Largest leading component for which drops are computed exactly.

    Returns
    -------
    lambda_m : float
    share : ndarray, shape (n_patches,)
        ``x_i²`` of the unit leading eigenvector: the patch's share of ``λ_M`` (the shares
        sum to 1; zero when no patch is linked). This is the patch value of Ovaskainen &
        Hanski (2001, Theor. Pop. Biol. 60:281, from memory).
    drop : ndarray, shape (n_patches,)
        Fall in ``λ_M`` when the patch is lost (its row and column removed).
    exact : bool
        True when ``drop`` is exact, False when it is the estimate described below.

    Notes
    -----
    Exact drops: the largest eigenvalue of the landscape without the patch for every patch
    of the component that carries ``λ_M`` (patches elsewhere have drop 0). For a component
    of c patches: one batched dense call up to 64 patches; up to ``DENSE_LIMIT``, one dense
    eigendecomposition of the component and a root of a rational function per patch (see
    ``_drops_from_spectrum``); above, one sparse eigen-solve per patch.

    Above ``exact_limit``, an estimate from the unit leading eigenvector x. Write
    ``M = [[0, bᵀ], [b, M']]`` with patch i first and ``M'`` the landscape without it.
    The naive first-order perturbation ``Δλ ≈ xᵀ E x = 2 x_i (M x)_i = 2 λ x_i²`` (E the
    removed row and column) is not valid here: E is not small, and the second-order term
    is of the same order x_i². Two facts give the right size instead:

    * Rayleigh–Ritz: the trial vector x with x_i set to 0 gives
      ``λ' ≥ (λ - 2 λ x_i²) / (1 - x_i²)``, so ``drop ≤ λ x_i² / (1 - x_i²)``;
    * the eigen-equations ``λ x_i = b·y``, ``b x_i + M' y = λ y`` give, for small x_i and a
      gap between the two leading eigenvalues of ``M'``, ``drop = λ x_i² + O(x_i⁴)``.

    So we report ``λ x_i² / (1 - x_i²)``: an upper bound on the drop, and right to leading
    order for patches with small shares (on large networks, almost all of them). It is
    labelled as an estimate (``capacity_drop_approx``).
    """
    matrix = landscape_matrix(network, area_km2, scale_km=scale_km, kernel=kernel)
    lam, vector = _leading_pair(matrix)
    share = vector * vector
    n = matrix.shape[0]
    if lam == 0.0:
        return 0.0, share, np.zeros(n), True
    _, label = connected_components(matrix, directed=False)
    component = int(np.sum(label == label[int(np.argmax(vector))]))
    if component <= exact_limit:
        return lam, share, _drops_exact(matrix, vector, lam), True
    # with λ > 0 at least two patches share x, so every share is below 1; and losing a
    # patch cannot take λ below 0, so the drop is at most λ
    estimate = lam * share / (1.0 - share)
    return lam, share, np.minimum(estimate, lam), False


def capacity_analysis(network: Network, area_km2, *, scale_km, kernel: str = "exponential",
                      exact_limit: int = EXACT_DROP_LIMIT) -> tuple[pd.DataFrame, dict]:
    """Per-patch contributions to the metapopulation capacity of one species.

    Parameters
    ----------
    network, area_km2, scale_km, kernel
        As for :func:`landscape_matrix`.
    exact_limit : int
        See :func:`patch_contributions`.

    Returns
    -------
    table : pandas.DataFrame
        Indexed by patch id (``patch_id``), in patch order: ``capacity_share`` (x_i², sums
        to 1) and ``capacity_drop`` (exact fall in λ_M without the patch), or
        ``capacity_drop_approx`` in its place when the estimate was used.
    summary : dict
        ``metapopulation_capacity`` (λ_M, km⁴) and ``capacity_drop_method``
        ("exact" or "estimate").
    """
    lam, share, drop, exact = patch_contributions(network, area_km2, scale_km=scale_km,
                                                  kernel=kernel, exact_limit=exact_limit)
    drop_name = "capacity_drop" if exact else "capacity_drop_approx"
    table = pd.DataFrame({"capacity_share": share, drop_name: drop},
                         index=pd.Index(network.ids.astype(str), name="patch_id"))
    summary = {"metapopulation_capacity": float(lam),
               "capacity_drop_method": "exact" if exact else "estimate"}
    return table, summary


def capacity_columns(network: Network, *, exact_limit: int = EXACT_DROP_LIMIT) -> list[str]:
    """The columns :func:`capacity_analysis` gives on ``network``, without computing them.

    For a table that keeps its columns when the analysis fails. The drop column is
    ``capacity_drop`` when no connected group of linked patches is larger than
    ``exact_limit``, else ``capacity_drop_approx``: the name a run gives when the largest
    group carries ``λ_M``, as it does unless a smaller group has much larger patches.
    """
    n = network.n_patches
    src, dst = np.asarray(network.source), np.asarray(network.target)
    off = src != dst
    graph = sp.coo_array((np.ones(int(off.sum())), (src[off], dst[off])), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    largest = int(np.bincount(label).max()) if n else 0
    exact = largest <= exact_limit
    return ["capacity_share", "capacity_drop" if exact else "capacity_drop_approx"]
