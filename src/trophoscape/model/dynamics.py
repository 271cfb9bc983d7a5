"""Local predator–prey dynamics: growth forms and functional responses.

Every function here works on densities (individuals per km²) held as arrays of shape
``(n_patches,)``; parameters are arrays of the same shape (a constant is broadcast once,
when the model is built), so patches may differ in any parameter.

The local equations, in prey density ``n`` and predator density ``p``::

    dn/dt = g(n) - f(n, p) p
    dp/dt = e f(n, p) p - m p

with ``g`` a growth form and ``f`` a functional response (predation per predator).

Growth forms and responses are small classes, each holding everything the tool needs of it:
its equation and partial derivatives, the split into births and deaths that demographic noise
draws from, the order of its events for the leap-size rule, the words the report uses, the
checks of its parameters and what it gives the closed-form equilibrium. They are held in the
tables ``GROWTH_FORMS`` and ``RESPONSES``; adding one is writing one class and registering
it (:func:`register_growth_form`, :func:`register_response`; see DEVELOPERS.md).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np

__all__ = [
    "GROWTH_FORMS",
    "RESPONSES",
    "GrowthForm",
    "Response",
    "register_growth_form",
    "register_response",
    "LocalModel",
    "Exponential",
    "Logistic",
    "StrongAllee",
    "LotkaVolterra",
    "HollingII",
    "HollingIII",
    "BeddingtonDeAngelis",
    "interior_equilibrium",
    "fastest_rates",
]


# --------------------------------------------------------------------------- growth forms
class GrowthForm:
    """Prey growth ``g(n)`` per unit area; ``q`` holds per-patch parameter arrays.

    A subclass sets ``name`` (the scenario's ``prey.growth`` value), ``needs`` (parameters,
    keys of ``PARAMETER_KEYS``) and writes ``value``, ``dn``, ``split`` and ``prey_order``;
    the other attributes have defaults.
    """

    name: ClassVar[str]
    needs: ClassVar[tuple[str, ...]]
    #: How the report names the form ("Prey grow by the WORDS form"); default: ``name``.
    words: ClassVar[str | None] = None
    #: Parameters that must be above 0 in every patch (checked when a study is built).
    positive: ClassVar[tuple[str, ...]] = ()
    #: Parameters that must lie below the carrying capacity in every patch, and how a
    #: message names each ("the Allee threshold").
    below_capacity: ClassVar[dict[str, str]] = {}
    #: Whether :func:`interior_equilibrium` may take ``p* = g(n*) / f(n*)`` as the
    #: coexistence equilibrium (one interior equilibrium).
    closed_form_equilibrium: ClassVar[bool] = False

    @staticmethod
    def value(n, q):  # pragma: no cover - interface
        raise NotImplementedError

    @staticmethod
    def dn(n, q):  # pragma: no cover - interface
        raise NotImplementedError

    @staticmethod
    def split(n, q):  # pragma: no cover - interface
        """``(births, deaths)``, both >= 0, whose difference is ``value`` (demographic noise
        draws the two as separate events)."""
        raise NotImplementedError

    @staticmethod
    def prey_order(x):  # pragma: no cover - interface
        """Order of the highest-order growth event in the prey count ``x`` (>= 3), as the
        leap-size rule of Cao, Gillespie & Petzold (2006) takes it: 1 for a first-order
        event, ``2 + 1/(x-1)`` for a second-order one needing two prey, and so on."""
        raise NotImplementedError


class Exponential(GrowthForm):
    """Exponential growth ``g(n) = r n`` (Malthus 1798; common practice)."""

    name = "exponential"
    needs = ("growth_rate",)
    closed_form_equilibrium = True

    @staticmethod
    def value(n, q):
        return q["growth_rate"] * n

    @staticmethod
    def dn(n, q):
        return q["growth_rate"] * np.ones_like(n)

    @staticmethod
    def split(n, q):
        return q["growth_rate"] * n, np.zeros_like(n)

    @staticmethod
    def prey_order(x):
        return np.ones_like(x)  # births: first order


class Logistic(GrowthForm):
    """Logistic growth ``g(n) = r n (1 - n/K)`` (Verhulst 1838, from memory)."""

    name = "logistic"
    needs = ("growth_rate", "capacity")
    positive = ("capacity",)
    closed_form_equilibrium = True

    @staticmethod
    def value(n, q):
        return q["growth_rate"] * n * (1.0 - n / q["capacity"])

    @staticmethod
    def dn(n, q):
        return q["growth_rate"] * (1.0 - 2.0 * n / q["capacity"])

    @staticmethod
    def split(n, q):
        r = q["growth_rate"]
        return r * n, r * n * n / q["capacity"]

    @staticmethod
    def prey_order(x):
        return 2.0 + 1.0 / (x - 1.0)  # deaths r N²/(K A) need two prey


class StrongAllee(GrowthForm):
    """Strong Allee effect ``g(n) = r n (1 - n/K)(n/T - 1)``, ``0 < T < K``.

    Below the threshold density ``T`` the population declines to zero; 0 and K are stable,
    T unstable (Courchamp, Berec & Gascoigne 2008, *Allee Effects in Ecology and
    Conservation*, from memory).
    """

    name = "allee"
    needs = ("growth_rate", "capacity", "allee_density")
    positive = ("capacity",)
    below_capacity = {"allee_density": "the Allee threshold"}

    @staticmethod
    def value(n, q):
        return q["growth_rate"] * n * (1.0 - n / q["capacity"]) * (n / q["allee_density"] - 1.0)

    @staticmethod
    def dn(n, q):
        r, k, t = q["growth_rate"], q["capacity"], q["allee_density"]
        # d/dn of r (n - n²/K)(n/T - 1)
        return r * ((1.0 - 2.0 * n / k) * (n / t - 1.0) + (n - n * n / k) / t)

    @staticmethod
    def split(n, q):
        r, k, t = q["growth_rate"], q["capacity"], q["allee_density"]
        return r * n * (n / t + n / k), r * n * (1.0 + n * n / (t * k))

    @staticmethod
    def prey_order(x):
        return 3.0 + 1.0 / (x - 1.0) + 2.0 / (x - 2.0)  # deaths need three prey


GROWTH_FORMS: dict[str, type[GrowthForm]] = {
    cls.name: cls for cls in (Exponential, Logistic, StrongAllee)
}


# --------------------------------------------------------------------------- responses
class Response:
    """Predation per predator ``f(n, p)`` and its partial derivatives.

    A subclass sets ``name`` (the scenario's ``predation.response`` value), ``needs`` and
    ``words``, and writes ``value`` and ``dn`` (and ``dp`` when ``f`` depends on the predator
    density); the other methods have defaults.
    """

    name: ClassVar[str]
    needs: ClassVar[tuple[str, ...]]
    #: How the report names the response ("predators eat them with a WORDS response").
    words: ClassVar[str]
    #: Order of a predation event in the predator count (the leap-size rule).
    predator_order: ClassVar[float] = 2.0

    @staticmethod
    def prey_order(x):
        """Order of a predation event in the prey count ``x`` (>= 3): 2 when one prey and
        one predator meet."""
        return np.full(np.shape(x), 2.0)

    @staticmethod
    def equilibrium_prey(q):
        """Prey density where the predator's growth is zero with no predators
        (``e f(n*, 0) = m``) in closed form, NaN where there is none; None when the
        response has no closed form."""
        return None

    @staticmethod
    def value(n, p, q):  # pragma: no cover - interface
        raise NotImplementedError

    @staticmethod
    def dn(n, p, q):  # pragma: no cover - interface
        raise NotImplementedError

    @staticmethod
    def dp(n, p, q):
        return np.zeros_like(n)


class LotkaVolterra(Response):
    """Type I (linear) response ``f = a n`` (Lotka 1925; Volterra 1926)."""

    name = "lotka_volterra"
    needs = ("attack_rate",)
    words = "linear (Lotka–Volterra, type I)"

    @staticmethod
    def equilibrium_prey(q):
        return _prey_where_predators_break_even(q["mortality"], q["conversion"] * q["attack_rate"])

    @staticmethod
    def value(n, p, q):
        return q["attack_rate"] * n

    @staticmethod
    def dn(n, p, q):
        return q["attack_rate"] * np.ones_like(n)


class HollingII(Response):
    """Holling type II ``f = a n / (1 + a h n)`` (Holling 1959, Can. Entomol. 91:385).

    Saturates at ``1/h``; half of it at ``n = 1/(a h)``.
    """

    name = "holling2"
    needs = ("attack_rate", "handling_time")
    words = "Holling type II"

    @staticmethod
    def value(n, p, q):
        a = q["attack_rate"]
        return a * n / (1.0 + a * q["handling_time"] * n)

    @staticmethod
    def equilibrium_prey(q):
        a, m = q["attack_rate"], q["mortality"]
        return _prey_where_predators_break_even(m, a * (q["conversion"] - m * q["handling_time"]))

    @staticmethod
    def dn(n, p, q):
        a = q["attack_rate"]
        d = 1.0 + a * q["handling_time"] * n
        return a / (d * d)


class HollingIII(Response):
    """Holling type III ``f = a n² / (1 + a h n²)`` (Holling 1959, from memory)."""

    name = "holling3"
    needs = ("attack_rate", "handling_time")
    words = "Holling type III"
    predator_order = 3.0

    @staticmethod
    def prey_order(x):
        # ∝ N² P at low density: third order with two prey and one predator
        return 1.5 * (2.0 + 1.0 / (x - 1.0))

    @staticmethod
    def value(n, p, q):
        a = q["attack_rate"]
        return a * n * n / (1.0 + a * q["handling_time"] * n * n)

    @staticmethod
    def dn(n, p, q):
        a = q["attack_rate"]
        d = 1.0 + a * q["handling_time"] * n * n
        return 2.0 * a * n / (d * d)


class BeddingtonDeAngelis(Response):
    """Beddington–DeAngelis ``f = a n / (1 + a h n + c p)``.

    Predator interference ``c``; equals Holling type II when ``c = 0`` (Beddington 1975,
    J. Anim. Ecol. 44:331; DeAngelis, Goldstein & O'Neill 1975, Ecology 56:881; from memory).
    """

    name = "beddington_deangelis"
    needs = ("attack_rate", "handling_time", "interference")
    words = "Beddington–DeAngelis"

    @staticmethod
    def equilibrium_prey(q):
        if not np.all(q["interference"] == 0):
            return None  # with interference n* depends on p*: no closed form here
        return HollingII.equilibrium_prey(q)

    @staticmethod
    def value(n, p, q):
        a = q["attack_rate"]
        return a * n / (1.0 + a * q["handling_time"] * n + q["interference"] * p)

    @staticmethod
    def dn(n, p, q):
        a, c = q["attack_rate"], q["interference"]
        d = 1.0 + a * q["handling_time"] * n + c * p
        return a * (1.0 + c * p) / (d * d)

    @staticmethod
    def dp(n, p, q):
        a, c = q["attack_rate"], q["interference"]
        d = 1.0 + a * q["handling_time"] * n + c * p
        return -a * n * c / (d * d)


RESPONSES: dict[str, type[Response]] = {
    cls.name: cls for cls in (LotkaVolterra, HollingII, HollingIII, BeddingtonDeAngelis)
}


def _prey_where_predators_break_even(m, denom):
    """``n* = m / denom``, NaN where ``denom <= 0`` (the predator cannot grow at any prey
    density)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(denom > 0, m / denom, np.nan)

def _check_form(cls, base, required) -> None:
    missing = [m for m in required if getattr(cls, m, None) is getattr(base, m, None)]
    if missing:
        raise TypeError(f"{cls.__name__} must define {', '.join(missing)}")
    if not getattr(cls, "name", None) or not isinstance(getattr(cls, "needs", None), tuple):
        raise TypeError(f"{cls.__name__} must set name and needs (a tuple of parameters)")
    unknown = [p for p in cls.needs if p not in PARAMETER_KEYS]
    if unknown:
        raise ValueError(f"{cls.__name__} needs {unknown}, which no scenario key sets; add them "
                         "to PARAMETER_KEYS (and the scenario's SCHEMA) first")
    checked = [*getattr(cls, "positive", ()), *getattr(cls, "below_capacity", {})]
    stray = [p for p in checked if p not in cls.needs]
    if stray:
        raise ValueError(f"{cls.__name__} checks {stray}, which are not among its needs")
    if cls.name in GROWTH_FORMS or cls.name in RESPONSES:
        raise ValueError(f"the name {cls.name!r} is taken; give the new form a name of its own "
                         "(the compiled evaluation and saved scenarios read forms by name)")


def register_growth_form(cls: type[GrowthForm]) -> type[GrowthForm]:
    """Add a growth form to ``GROWTH_FORMS``: every part of the tool then takes it as a
    ``prey.growth`` value. Checks that the class writes what the tool needs."""
    _check_form(cls, GrowthForm, ("value", "dn", "split", "prey_order"))
    GROWTH_FORMS[cls.name] = cls
    return cls


def register_response(cls: type[Response]) -> type[Response]:
    """Add a functional response to ``RESPONSES`` (a ``predation.response`` value)."""
    _check_form(cls, Response, ("value", "dn"))
    if not getattr(cls, "words", None):
        raise TypeError(f"{cls.__name__} must set words (how the report names it)")
    RESPONSES[cls.name] = cls
    return cls


def fastest_rates(params, names=("growth_rate", "mortality")) -> dict[str, float]:
    """The largest magnitude over the patches of each named per-capita rate (0 when absent):
    what sets the fastest local time scale."""
    return {k: float(np.max(np.abs(np.asarray(params.get(k, 0.0), dtype=float)), initial=0.0))
            for k in names}


#: Parameters of the local model and the scenario key each comes from.
PARAMETER_KEYS = {
    "growth_rate": "prey.growth_rate",
    "capacity": "prey.capacity_density",
    "allee_density": "prey.allee_density",
    "attack_rate": "predation.attack_rate",
    "handling_time": "predation.handling_time",
    "interference": "predation.interference",
    "conversion": "predator.conversion",
    "mortality": "predator.mortality_rate",
}


@dataclass(frozen=True, eq=False)
class LocalModel:
    """The local predator–prey model of every patch.

    Parameters
    ----------
    growth : str
        A key of ``GROWTH_FORMS``.
    response : str
        A key of ``RESPONSES``.
    params : dict of str to ndarray, shape (n_patches,)
        ``growth_rate``, ``capacity`` (K, per km²), ``allee_density``, ``attack_rate``,
        ``handling_time``, ``interference``, ``conversion``, ``mortality``; each broadcast to
        one value per patch.
    """

    growth: str
    response: str
    params: dict = field(repr=False)

    def __post_init__(self):
        if self.growth not in GROWTH_FORMS:
            raise ValueError(f"growth must be one of {sorted(GROWTH_FORMS)}, got {self.growth!r}")
        if self.response not in RESPONSES:
            raise ValueError(f"response must be one of {sorted(RESPONSES)}, got {self.response!r}")
        sizes = {np.shape(v) for v in self.params.values()}
        if len(sizes) > 1:
            raise ValueError(f"parameter arrays differ in shape: {sorted(sizes)}")

    @property
    def growth_form(self) -> type[GrowthForm]:
        return GROWTH_FORMS[self.growth]

    @property
    def functional_response(self) -> type[Response]:
        return RESPONSES[self.response]

    @property
    def n_patches(self) -> int:
        return int(np.shape(self.params["growth_rate"])[0])

    def rates(self, n, p):
        """Local rates of change of density ``(dn/dt, dp/dt)``, arrays like ``n``.

        An optional parameter ``prey_harvest`` (per-capita removal rate q of the prey, set by
        a harvest shock; absent means 0) adds ``- q n`` to ``dn/dt``.
        """
        q = self.params
        f = self.functional_response.value(n, p, q)
        eaten = f * p
        dn = self.growth_form.value(n, q) - eaten
        if "prey_harvest" in q:
            dn = dn - q["prey_harvest"] * n
        return dn, q["conversion"] * eaten - q["mortality"] * p

    def partials(self, n, p):
        """The four partial derivatives of the local rates (per patch, in density).

        Returns ``(dndn, dndp, dpdn, dpdp)``, each shaped like ``n``.
        """
        q = self.params
        resp = self.functional_response
        f = resp.value(n, p, q)
        fn = resp.dn(n, p, q)
        fp = resp.dp(n, p, q)
        e = q["conversion"]
        dndn = self.growth_form.dn(n, q) - fn * p
        if "prey_harvest" in q:
            dndn = dndn - q["prey_harvest"]
        dndp = -(f + fp * p)
        dpdn = e * fn * p
        dpdp = e * (f + fp * p) - q["mortality"]
        return dndn, dndp, dpdn, dpdp


def interior_equilibrium(model: LocalModel):
    """Closed-form coexistence equilibrium of the local model, in densities.

    Available when the response gives the prey density at which predators break even in
    closed form (``Response.equilibrium_prey``: Lotka–Volterra, Holling type II,
    Beddington–DeAngelis without interference) and the growth form allows
    ``p* = g(n*) / f(n*)`` (``GrowthForm.closed_form_equilibrium``: logistic, exponential),
    as in the Lotka–Volterra and Rosenzweig–MacArthur models:

    * Lotka–Volterra: ``n* = m / (e a)``, ``p* = g(n*) / (a n*)``.
    * Rosenzweig–MacArthur: ``n* = m / (a (e - m h))``,
      ``p* = (r/a)(1 - n*/K)(1 + a h n*)`` (Rosenzweig & MacArthur 1963, Am. Nat. 97:209,
      from memory).

    Returns
    -------
    n_star, p_star : ndarray, shape (n_patches,)
        NaN where no positive equilibrium exists (the predator cannot invade: ``K <= n*``,
        or ``e <= m h``).

    Raises
    ------
    NotImplementedError
        For other model combinations (no closed form; use a root finder).
    """
    q = model.params
    n_star = model.functional_response.equilibrium_prey(q)
    if n_star is None:
        raise NotImplementedError(f"no closed-form equilibrium for response {model.response!r}")
    if not model.growth_form.closed_form_equilibrium:
        raise NotImplementedError(f"no closed-form equilibrium for growth {model.growth!r}")
    with np.errstate(divide="ignore", invalid="ignore"):
        g = model.growth_form.value(n_star, q)
        f = model.functional_response.value(n_star, np.zeros_like(n_star), q)
        p_star = g / f
    ok = np.isfinite(n_star) & np.isfinite(p_star) & (n_star > 0) & (p_star > 0)
    return np.where(ok, n_star, np.nan), np.where(ok, p_star, np.nan)
