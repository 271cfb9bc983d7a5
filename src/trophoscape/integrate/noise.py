"""Environmental noise, and replicates stacked into one system.

With environmental noise alone a run stays a deterministic ODE between noise steps
(:mod:`trophoscape.integrate.ode`): the noise is held over each step of its own clock (``step``,
in time units from ``t = 0``, never the census interval), so the same scipy solvers serve
deterministic and noisy runs. Demographic noise (whole individuals, random events) is in
:mod:`trophoscape.integrate.events`.

Environmental noise
    A continuous-time process added to the per-capita rates of each patch: the prey's
    per-capita growth gets ``+ ξ_i(t)`` and, optionally, the predator's per-capita mortality
    an independent ``+ η_i(t)``::

        dN_i/dt = (the model's terms) + ξ_i(t) N_i,    dP_i/dt = (...) - η_i(t) P_i

    (environmental stochasticity as a random per-capita growth rate; Lande, Engen &
    Sæther 2003, *Stochastic Population Dynamics in Ecology and Conservation*, ch. 1;
    from memory). ``ξ`` is a stationary Gaussian process with mean 0 and, in time, the
    Ornstein–Uhlenbeck covariance ``cov(ξ(t), ξ(t + s)) = σ²/(2τ) exp(-|s|/τ)``: ``σ``
    (``environmental_sd``) is its intensity per √(time unit) — the integral of ``ξ`` over a
    window ``T`` much longer than ``τ`` has sd ``σ √T``, so over such a window the noise
    multiplies abundance by ``exp(X)``, sd(X) = ``σ √T`` — and ``τ`` (``correlation_time``)
    its correlation time. ``τ = 0`` is the white-noise limit (the derivative of a Wiener
    process with intensity ``σ``), read as the limit of smooth noise (Stratonovich; Wong &
    Zakai 1965, Ann. Math. Stat. 36:1560, from memory), so the noise does not move the long-run
    growth rate of log abundance.

    On the noise clock (steps ``[t_k, t_k + Δ)``, ``t_k = k Δ``) each step holds the
    step's *average* ``(1/Δ) ∫ ξ dt``, drawn exactly with the process value at the step's
    end from their joint Gaussian law given the value at its start (Gillespie 1996, Phys.
    Rev. E 54:2084, "Exact numerical simulation of the Ornstein-Uhlenbeck process and its
    integral"), in units of the stationary sd, ``a = exp(-Δ/τ)``::

        z_{k+1} = a z_k + sqrt(1 - a²) e₁
        J_k     = τ (1 - a) z_k + β e₁ + γ e₂          (J_k = ∫ z dt over the step)
        β = τ (1 - a)² / sqrt(1 - a²),   β² + γ² = τ² (2Δ/τ - 3 + 4a - a²)

    and ``ξ̄_k = σ / sqrt(2τ) · J_k / Δ`` (white noise: ``ξ̄_k = σ e₁ / √Δ``). So the
    noise's integral over every step is exact whatever ``Δ``, ``τ`` or the census interval;
    holding it within the step is the only approximation, of second order in ``λΔ`` for a
    population relaxing at rate ``λ`` (for ``x' = -λ x + ξ`` with white ``ξ`` the stationary
    variance is ``1 - (λΔ)²/12`` of the exact one; common practice, worked out for this
    scheme). ``z`` starts from its stationary law.

    In space, ``e₁`` and ``e₂`` are standard-normal fields with ``corr(e_i, e_j) = s + (1 - s)
    k(d_ij)``: ``d_ij`` the distance between the patch centroids, ``k`` the kernel ``exp(-d/L)``
    ("exponential") or ``exp(-d²/(2 L²))`` ("gaussian") and ``s`` the *shared share*, the part
    of the variance from one regional value common to every patch (the Moran effect; Moran
    1953, Aust. J. Zool. 1:291). ``correlation_km = "regional"`` means ``s = 1``: every patch
    gets the same noise.

    Sampling is low rank: the kernel part is ``Φ w`` with ``w ~ N(0, I_D)`` and ``Φ`` the
    random Fourier features of the stationary kernel (Rahimi & Recht 2007, "Random features
    for large-scale kernel machines", NIPS 20): ``φ_i = sqrt(2/D) cos(ω·x_i + b)`` with
    ``b ~ U(0, 2π)`` and ``ω`` drawn from the kernel's spectral density: normal with sd
    ``1/L`` for the Gaussian kernel; for ``exp(-d/L)`` in 2-D a bivariate Student t with
    1 degree of freedom and scale ``1/L`` (the Fourier transform of ``exp(-|x|/L)`` in two
    dimensions is proportional to ``(1 + L²|ω|²)^(-3/2)``). Each row of ``Φ`` is scaled to
    unit length so that every patch's marginal variance is exactly 1; correlations carry
    the Monte Carlo error of ``D`` features. For two patches whose kernel correlation is
    ``k = k(d)`` (and ``k₂ = k(2d)``, the kernel at twice their distance) the sampled
    correlation has sd about ``sqrt(v / D)`` with ``v = 1 - 7k²/4 + k₂/2 + k² k₂/4`` (the
    delta method on the row-normalised features, worked out here): ``sqrt(1/D)`` = 0.045 for
    distant pairs at the default rank ``D = 500``, falling to 0 as the patches meet.
    ``Φ`` is drawn once per replicate; each step then costs O(patches × D), never
    O(patches²), and memory is patches × D per replicate. With fewer patches than features
    the field is drawn as ``L z`` instead, ``L Lᵀ = Φ Φᵀ`` (:func:`covariance_root`): the
    same law from ``patches`` normals per step (O(patches²) per step, below O(patches × D)).

Demographic noise
    Event-based runs (whole individuals): see :mod:`trophoscape.integrate.events`.

Replicates
    A :class:`NoiseModel` holds one seed per replicate; replicate ``r`` draws every number
    from two generators of its own, ``SeedSequence(seeds[r]).spawn(2)``: the first for the
    environment (its Fourier features first, then two fields per noise step and noisy
    rate), the second for demographic counts. So the same seeds give the same numbers bit for bit, and the
    environmental values of
    replicate ``r`` do not depend on how many replicates run or whether they are integrated
    stacked (one block-diagonal system) or one by one.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..model.dynamics import LocalModel, fastest_rates

__all__ = ["KERNELS", "NoiseModel", "NoiseRun",
           "spectral_frequencies", "fourier_features", "kernel_correlation",
           "auto_step", "resolve_step", "replicate_seeds"]

#: Spatial correlation kernels of environmental noise.
KERNELS = ("exponential", "gaussian")
#: Random Fourier features per replicate: correlation error sd sqrt(1/D) = 0.045 for
#: distant pairs (module notes).
DEFAULT_RANK = 500
#: ``noise_step = "auto"``: this share of the fastest local time scale (see :func:`auto_step`).
DEFAULT_STEP_SHARE = 0.1


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


def ou_step(tau: float, dt: float):
    """Coefficients of one exact step of a unit-variance Ornstein–Uhlenbeck process.

    For ``z`` with ``cov(z(t), z(t + s)) = exp(-|s|/τ)`` and a step ``Δ``: the value at the
    step's end and the step's integral ``J = ∫ z dt`` given the value ``z₀`` at its start are
    ``z₁ = a z₀ + c e₁`` and ``J = m z₀ + β e₁ + γ e₂`` with ``e₁, e₂`` independent standard
    normals (Gillespie 1996, Phys. Rev. E 54:2084).

    Returns
    -------
    tuple of float
        ``(a, c, m, beta, gamma)``.
    """
    x = dt / tau
    a = float(np.exp(-x))
    one_minus_a = float(-np.expm1(-x))
    c = float(np.sqrt(one_minus_a * (1.0 + a)))
    if x < 1e-3:  # series: 2x - 3 + 4e^-x - e^-2x = 2x³/3 - x⁴/2 + 7x⁵/30 - ...
        var_j = tau * tau * x ** 3 * (2.0 / 3.0 - x / 2.0 + 7.0 * x * x / 30.0)
    else:
        var_j = tau * tau * (2.0 * x + 4.0 * float(np.expm1(-x)) - float(np.expm1(-2.0 * x)))
    beta = tau * one_minus_a ** 2 / c
    gamma = float(np.sqrt(max(var_j - beta * beta, 0.0)))
    return a, c, tau * one_minus_a, beta, gamma


def auto_step(params, share: float = DEFAULT_STEP_SHARE) -> float:
    """The default noise step: ``share`` of the fastest local time scale.

    That time scale is ``1 / max(prey growth rate, predator mortality rate)`` over the
    patches (the rates a patch relaxes or cycles at are of that order). The correlation
    time does not enter: the step's noise integral is exact for any ``τ`` (module notes).
    """
    fastest = max(fastest_rates(params).values())
    return share / fastest if fastest > 0 else 0.1


def resolve_step(setting, params) -> float:
    """The noise step a ``noise.noise_step`` setting gives: the number, or for ``"auto"``
    :func:`auto_step` of the model's parameters."""
    return auto_step(params) if setting == "auto" else float(setting)


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
        ``σ``: intensity of the noise in the prey's per-capita growth rate, per √(time
        unit) (0: none; module notes).
    mortality_sd : float
        The same for the predator's per-capita mortality (an independent field with the
        same correlation).
    correlation_km : float or None
        Length ``L`` of the kernel; None when the noise is wholly regional.
    kernel : {"exponential", "gaussian"}
    shared_share : float in [0, 1]
        Share of the variance from one value common to all patches (1 with
        ``correlation_km=None``).
    correlation_time : float
        ``τ`` in time units; 0 is white noise.
    step : float
        ``Δ``, the noise step in time units: the noise is held over ``[kΔ, (k+1)Δ)``.
    demographic : bool
        Births, deaths and moves as random events (:mod:`trophoscape.integrate.events`).
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
    correlation_time: float = 0.0
    step: float = 0.05
    demographic: bool = False
    rank: int = DEFAULT_RANK

    def __post_init__(self):
        object.__setattr__(self, "seeds", tuple(int(s) for s in self.seeds))
        object.__setattr__(self, "centroids_km", np.asarray(self.centroids_km, dtype=float))
        if self.correlation_km is None:
            object.__setattr__(self, "shared_share", 1.0)
        if not (self.step > 0 and np.isfinite(self.step)):
            raise ValueError(f"the noise step must be a positive number of time units, not "
                             f"{self.step!r}")

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
    """The noise of one run of :func:`trophoscape.integrate.ode.simulate`: one call of
    :meth:`interval` per noise step, in order.

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
        self.rates = {}
        self.shape = (reps, n)
        tau = float(model.correlation_time)
        self._ou = ou_step(tau, float(model.step)) if tau > 0 else None

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

    def _advance(self, name: str, sd: float) -> np.ndarray:
        """The next step's average of the noise ``name`` (per time unit), shape (R n,)."""
        dt = float(self.model.step)
        e1 = self._innovation()
        if self._ou is None:  # white noise: the step's integral is σ √Δ e₁
            return (sd / np.sqrt(dt) * e1).reshape(-1)
        tau = float(self.model.correlation_time)
        a, c, m, beta, gamma = self._ou
        e2 = self._innovation()
        z = self.z.get(name)
        if z is None:
            z = self._innovation()  # the stationary law at t = 0
        integral = m * z + beta * e1 + gamma * e2
        self.z[name] = a * z + c * e1
        return (sd / np.sqrt(2.0 * tau) * integral / dt).reshape(-1)

    def interval(self, system, *, redraw: bool = True):
        """The system for the next noise step: ``system`` with the noise added to its rates.

        ``system`` is the run's system without noise (shocks may change it); the unperturbed
        rates are always read from it. ``redraw=False`` applies the noise of the current
        step again (to a system a shock changed within the step).
        """
        m = self.model
        if not m.environmental:
            return system
        if redraw or not self.rates:
            # fixed order of draws: growth first, then mortality
            if m.environmental_sd > 0:
                self.rates["growth"] = self._advance("growth", m.environmental_sd)
            if m.mortality_sd > 0:
                self.rates["mortality"] = self._advance("mortality", m.mortality_sd)
        params = dict(system.model.params)
        size = self.shape[0] * self.shape[1]
        if "growth" in self.rates:
            # a per-capita gain ξ is a negative per-capita removal of the prey
            harvest = np.broadcast_to(np.asarray(params.get("prey_harvest", 0.0), dtype=float),
                                      (size,))
            params["prey_harvest"] = harvest - self.rates["growth"]
        if "mortality" in self.rates:
            params["mortality"] = (np.broadcast_to(np.asarray(params["mortality"], dtype=float),
                                                   (size,)) + self.rates["mortality"])
        model = system.model
        new = LocalModel(growth=model.growth, response=model.response, params=params)
        return system.with_model(new)










def replicate_seeds(seed: int, replicates: int) -> list[int]:
    """Seeds of the replicates: ``SeedSequence(seed).spawn(replicates)``, 63-bit integers.

    63 bits so that a seed fits a TOML integer and an SQLite INTEGER (both signed 64-bit).
    """
    import numpy as np

    children = np.random.SeedSequence(int(seed)).spawn(int(replicates))
    return [int(c.generate_state(1, dtype=np.uint64)[0] >> np.uint64(1)) for c in children]
