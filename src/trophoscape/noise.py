"""Environmental and demographic noise.

With environmental noise alone a run stays a deterministic ODE between census steps
(:mod:`trophoscape.simulate`) whose rates are redrawn at each census, so the same scipy
solvers serve deterministic and noisy runs. With demographic noise the run is event-based
(whole individuals, tau-leaping with exact steps for small counts; see below).

Environmental noise
    For every census interval ``k`` each patch gets a multiplier of its prey growth rate
    (and, optionally, of its predator mortality), held fixed over that interval::

        r_ik = r_i exp(sd z_ik - sd² / 2),    z_ik ~ N(0, 1)

    The ``- sd²/2`` makes the multiplier's mean exactly 1, since ``E[exp(sd Z)] =
    exp(sd²/2)`` for a standard normal ``Z`` (the lognormal mean; common practice). ``z`` is
    correlated in space and optionally in time:

    * space: ``corr(z_i, z_j) = s + (1 - s) k(d_ij)`` with ``d_ij`` the distance between the
      patch centroids, ``k`` the kernel ``exp(-d/L)`` ("exponential") or
      ``exp(-d²/(2 L²))`` ("gaussian") and ``s`` the *shared share*: the part of the variance
      from one regional value common to every patch (the Moran effect; Moran 1953).
      ``correlation_km = "regional"`` means ``s = 1``: every patch gets the same multiplier.
    * time: AR(1), ``z_k = a z_{k-1} + sqrt(1 - a²) e_k`` (reddened noise; Ripa &
      Lundberg 1996, Proc. R. Soc. B 263:1751, from memory), started from the stationary
      law, so ``z_k`` has unit variance at every step and lag-1 autocorrelation ``a``.

    Sampling is low rank: the kernel part is ``Φ w`` with ``w ~ N(0, I_D)`` and ``Φ`` the
    random Fourier features of the stationary kernel (Rahimi & Recht 2007, "Random features
    for large-scale kernel machines", NIPS 20): ``φ_i = sqrt(2/D) cos(ω·x_i + b)`` with
    ``b ~ U(0, 2π)`` and ``ω`` drawn from the kernel's spectral density: normal with sd
    ``1/L`` for the Gaussian kernel; for ``exp(-d/L)`` in 2-D a bivariate Student t with
    1 degree of freedom and scale ``1/L`` (the Fourier transform of ``exp(-|x|/L)`` in two
    dimensions is proportional to ``(1 + L²|ω|²)^(-3/2)``). Each row of ``Φ`` is scaled to
    unit length so that every patch's marginal variance is exactly 1 (the mean-preserving
    correction needs it exactly); correlations carry the Monte Carlo error of ``D``
    features, an sd of about ``sqrt(1/(2D))`` (0.03 at the default rank ``D = 500``).
    ``Φ`` is drawn once per replicate; each step then costs O(patches × D), never
    O(patches²), and memory is patches × D per replicate. With fewer patches than features
    the field is drawn as ``L z`` instead, ``L Lᵀ = Φ Φᵀ`` (:func:`covariance_root`): the
    same law from ``patches`` normals per step (O(patches²) per step, below O(patches × D)).

Demographic noise
    Event-based runs (whole individuals): see :mod:`trophoscape.events`.

Replicates
    A :class:`NoiseModel` holds one seed per replicate; replicate ``r`` draws every number
    from two generators of its own, ``SeedSequence(seeds[r]).spawn(2)``: the first for the
    environment (its Fourier features first, then one field per census interval), the second
    for demographic counts. So the same seeds give the same numbers bit for bit, and the
    environmental values of
    replicate ``r`` do not depend on how many replicates run or whether they are integrated
    stacked (one block-diagonal system) or one by one.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from .dynamics import LocalModel

__all__ = ["KERNELS", "DEFAULT_RANK", "NoiseModel", "NoiseRun", "spectral_frequencies",
           "fourier_features", "kernel_correlation", "lognormal_multiplier",
           "stack_system"]

#: Spatial correlation kernels of environmental noise.
KERNELS = ("exponential", "gaussian")
#: Random Fourier features per replicate: correlation error sd about sqrt(1/(2 D)) = 0.03.
DEFAULT_RANK = 500


# ------------------------------------------------------------------------- spatial field
def kernel_correlation(d_km, *, kernel: str, length_km: float) -> np.ndarray:
    """The target correlation ``k(d)`` of the kernel part, any shape."""
    d = np.asarray(d_km, dtype=float) / length_km
    return np.exp(-d) if kernel == "exponential" else np.exp(-0.5 * d * d)


def spectral_frequencies(kernel: str, length_km: float, rank: int, rng) -> np.ndarray:
    """Frequencies ``ω`` (per km), shape (rank, 2), from the kernel's spectral density.

    Gaussian ``exp(-d²/2L²)``: ``ω ~ N(0, I / L²)``. Exponential ``exp(-d/L)`` in 2-D: a
    bivariate Student t with 1 degree of freedom, ``ω = Z / (L |W|)`` with ``Z ~ N(0, I₂)``
    and ``W ~ N(0, 1)`` (Rahimi & Recht 2007; the t law as a normal over a chi variable).
    """
    z = rng.standard_normal((rank, 2))
    if kernel == "gaussian":
        return z / length_km
    w = np.abs(rng.standard_normal((rank, 1)))
    return z / (length_km * w)


def fourier_features(xy_km: np.ndarray, omega: np.ndarray, phase: np.ndarray) -> np.ndarray:
    """Random Fourier features, rows scaled to unit length.

    Parameters
    ----------
    xy_km : ndarray, shape (n, 2)
        Points (patch centroids) in km.
    omega : ndarray, shape (D, 2)
    phase : ndarray, shape (D,)

    Returns
    -------
    ndarray, shape (n, D)
        ``Φ`` with ``Φ Φᵀ ≈ k(d)`` and unit diagonal exactly.
    """
    phi = np.cos(xy_km @ omega.T + phase)
    norm = np.sqrt(np.einsum("ij,ij->i", phi, phi))
    return phi / np.where(norm > 0, norm, 1.0)[:, None]


def covariance_root(features: np.ndarray) -> np.ndarray:
    """``L`` with ``L Lᵀ = Φ Φᵀ``, for stacks of feature matrices Φ of shape (n, D).

    The field ``Φ w`` with ``w ~ N(0, I_D)`` is Gaussian with covariance ``Φ Φᵀ``, and so is
    ``L z`` with ``z ~ N(0, I_n)``: with fewer patches than features (n < D) a field then
    takes n normal draws and an n × n product instead of D draws and an n × D product. ``L``
    is the Cholesky factor, or, where ``Φ Φᵀ`` is singular (patches sharing a centroid), the
    symmetric root from its eigen-decomposition with round-off negatives set to zero
    (Golub & Van Loan 2013, Matrix Computations, §4.2; from memory).

    Parameters
    ----------
    features : ndarray, shape (R, n, D)

    Returns
    -------
    ndarray, shape (R, n, n)
    """
    cov = features @ features.transpose(0, 2, 1)
    try:
        return np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        values, vectors = np.linalg.eigh(cov)
        return vectors * np.sqrt(np.clip(values, 0.0, None))[:, None, :]


def lognormal_multiplier(z, sd: float) -> np.ndarray:
    """``exp(sd z - sd²/2)``: mean 1 when ``z`` is standard normal."""
    return np.exp(sd * np.asarray(z) - 0.5 * sd * sd)


# ----------------------------------------------------------------------------- the model
@dataclass(frozen=True, eq=False)
class NoiseModel:
    """Settings of the noise of a run, with one seed per replicate.

    Parameters
    ----------
    centroids_km : ndarray, shape (n_patches, 2)
        Patch centroids in km (any metric CRS); distances between them set correlations.
    seeds : sequence of int, length n_replicates
    environmental_sd : float
        sd of the log multiplier of prey growth rate per census interval (0: none).
    mortality_sd : float
        The same for predator mortality (an independent field with the same correlation).
    correlation_km : float or None
        Length ``L`` of the kernel; None when the noise is wholly regional.
    kernel : {"exponential", "gaussian"}
    shared_share : float in [0, 1]
        Share of the variance from one value common to all patches (1 with
        ``correlation_km=None``).
    autocorrelation : float in [0, 1)
        AR(1) coefficient between successive census intervals.
    demographic : bool
        Census-step demographic fluctuations (see the module notes).
    prey_movement, predator_movement : sparse array (n_patches, n_patches), optional
        One replicate's movement operators; needed for demographic noise in dispersal.
    rank : int
        Random Fourier features per replicate.
    """

    centroids_km: np.ndarray
    seeds: tuple
    environmental_sd: float = 0.0
    mortality_sd: float = 0.0
    correlation_km: float | None = 10.0
    kernel: str = "exponential"
    shared_share: float = 0.0
    autocorrelation: float = 0.0
    demographic: bool = False
    prey_movement: object = field(default=None, repr=False)
    predator_movement: object = field(default=None, repr=False)
    rank: int = DEFAULT_RANK

    def __post_init__(self):
        object.__setattr__(self, "seeds", tuple(int(s) for s in self.seeds))
        object.__setattr__(self, "centroids_km", np.asarray(self.centroids_km, dtype=float))
        if self.correlation_km is None:
            object.__setattr__(self, "shared_share", 1.0)

    @property
    def n_patches(self) -> int:
        return int(self.centroids_km.shape[0])

    @property
    def n_replicates(self) -> int:
        return len(self.seeds)

    @property
    def environmental(self) -> bool:
        return self.environmental_sd > 0 or self.mortality_sd > 0

    @property
    def active(self) -> bool:
        return self.environmental or self.demographic

    def for_replicates(self, index) -> "NoiseModel":
        """The same settings for some of the replicates (their seeds)."""
        idx = np.atleast_1d(index)
        return dataclasses.replace(self, seeds=tuple(self.seeds[int(i)] for i in idx))

    def start(self) -> "NoiseRun":
        """A fresh, stateful run of the noise (random generators from the seeds)."""
        return NoiseRun(self)


class NoiseRun:
    """The noise of one run of :func:`trophoscape.simulate.simulate`: call in census order.

    The system it perturbs holds ``n_replicates`` copies of the network one after another
    (``stack_system``; one copy when there is one replicate), patch ``i`` of replicate ``r``
    at position ``r * n + i``.
    """

    def __init__(self, model: NoiseModel):
        self.model = model
        # two streams per replicate, so that the number of draws demographic noise takes
        # (which depends on the state) never shifts the environmental values
        streams = [np.random.SeedSequence(s).spawn(2) for s in model.seeds]
        self.rngs = [np.random.default_rng(a) for a, _ in streams]
        self.demographic_rngs = [np.random.default_rng(b) for _, b in streams]
        n, reps = model.n_patches, model.n_replicates
        self.z = {}
        self.features = None
        if model.environmental and model.shared_share < 1.0:
            xy = model.centroids_km - model.centroids_km.mean(axis=0)  # small phases: precise
            feats = []
            for rng in self.rngs:
                omega = spectral_frequencies(model.kernel, model.correlation_km, model.rank, rng)
                phase = rng.uniform(0.0, 2.0 * np.pi, model.rank)
                feats.append(fourier_features(xy, omega, phase))
            self.features = np.stack(feats)                      # (R, n, D)
            if n < model.rank:
                # fewer patches than features: the same Gaussian law from n normals
                self.features = covariance_root(self.features)   # (R, n, n)
        self.multipliers = {}
        self.shape = (reps, n)

    # -- environmental
    def _innovation(self) -> np.ndarray:
        """One standard-normal field per replicate, shape (R, n), correlated as documented."""
        m = self.model
        reps, n = self.shape
        s = m.shared_share
        # each replicate draws from its own stream, in the same order as when run alone
        # (features first, then the shared value); the products are then one batched matmul
        weights = np.empty((reps, self.features.shape[2])) if s < 1.0 else None
        shared = np.empty(reps) if s > 0.0 else None
        for r, rng in enumerate(self.rngs):
            if weights is not None:
                rng.standard_normal(out=weights[r])
            if shared is not None:
                shared[r] = rng.standard_normal()
        out = np.zeros(self.shape)
        if weights is not None:
            out += np.sqrt(1.0 - s) * np.matmul(self.features, weights[:, :, None])[:, :, 0]
        if shared is not None:
            out += np.sqrt(s) * shared[:, None]
        return out

    def _advance(self, name: str) -> np.ndarray:
        a = self.model.autocorrelation
        e = self._innovation()
        z = self.z.get(name)
        z = e if z is None else a * z + np.sqrt(1.0 - a * a) * e
        self.z[name] = z
        return z.reshape(-1)

    def interval(self, system, *, redraw: bool = True):
        """The system for the next census interval: ``system`` with noisy rates.

        ``system`` is the run's system without noise (shocks may change it); the unperturbed
        rates are always read from it. ``redraw=False`` applies the multipliers of the
        current interval again (to a system a shock changed within the interval).
        """
        m = self.model
        if not m.environmental:
            return system
        if redraw or not self.multipliers:
            if m.environmental_sd > 0:
                self.multipliers["growth_rate"] = lognormal_multiplier(
                    self._advance("growth"), m.environmental_sd)
            if m.mortality_sd > 0:
                self.multipliers["mortality"] = lognormal_multiplier(
                    self._advance("mortality"), m.mortality_sd)
        params = dict(system.model.params)
        for name, factor in self.multipliers.items():
            params[name] = np.asarray(params[name]) * factor
        model = system.model
        new = LocalModel(growth=model.growth, response=model.response, params=params)
        return system.with_model(new)


# --------------------------------------------------------------------------- stacking
def stack_system(system, replicates: int):
    """``replicates`` copies of a system as one block-diagonal system.

    Patch ``i`` of copy ``r`` sits at position ``r * n + i`` (so the state is
    ``[N(copy 0), N(copy 1), ..., P(copy 0), P(copy 1), ...]``). Built through
    :class:`~trophoscape.system.CoupledSystem`'s constructor: parameters and areas tiled,
    movement operators ``scipy.sparse.block_diag``.
    """
    from .system import CoupledSystem

    if replicates == 1:
        return system
    model = system.model
    params = {k: np.tile(np.asarray(v), replicates) for k, v in model.params.items()}
    tiled = LocalModel(growth=model.growth, response=model.response, params=params)
    return CoupledSystem(
        model=tiled, area_km2=np.tile(system.area_km2, replicates),
        prey_movement=sp.csr_array(sp.block_diag([system.prey_movement] * replicates,
                                                 format="csr")),
        predator_movement=sp.csr_array(sp.block_diag([system.predator_movement] * replicates,
                                                     format="csr")),
        kernel=system.kernel)


def unstack_series(series: np.ndarray, replicates: int) -> np.ndarray:
    """Series of a stacked system, ``(..., R n)`` over its patches, as ``(..., n, R)``.

    A view where numpy can make one (the inverse of the layout of :func:`stack_system`).
    """
    return series.reshape(*series.shape[:-1], replicates, -1).swapaxes(-1, -2)


def stack_state(y: np.ndarray, replicates: int) -> np.ndarray:
    """A state of one copy, shape (2 n,), repeated for the stacked system, shape (2 R n,)."""
    n = y.size // 2
    return np.concatenate([np.tile(y[:n], replicates), np.tile(y[n:], replicates)])


__all__ += ["stack_state"]
