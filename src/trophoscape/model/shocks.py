"""Shocks: sudden changes to a running patch network, applied at given times.

A shock (predator removal, prey crash, habitat loss, patch loss, mortality pulse, harvest,
link cut) is a small frozen object holding *resolved* patch positions. It turns into one or
more :class:`events <StateScale>`; each event has a ``time`` and an
``apply(system, y) -> (system, y)`` method, which :func:`trophoscape.integrate.ode.simulate`
calls at that time before integrating on with the returned system. Events only rebuild what
they change (:meth:`~trophoscape.model.system.CoupledSystem.with_model` for a new
:class:`~trophoscape.model.dynamics.LocalModel`, ``dataclasses.replace`` of the system for new
movement operators), so applying one is cheap.

Shock kinds are a table, ``SHOCK_KINDS``, like the growth forms of :mod:`trophoscape.model.dynamics`.
Each kind lists the scenario keys it takes (``takes``) and those it needs (``needs``);
:mod:`trophoscape.scenario` reads that table to validate ``[[shock]]`` tables, and
:func:`build_shocks` resolves their patch ids against the landscape.

Parameter shocks compose by multiplication (factors) and addition (removal rates). Each
parameter shock is a set of *modifiers*, active from ``at`` until ``at + duration`` (or for
good), and :func:`shock_events` turns the modifiers of all shocks together into events that
*set* the parameter, at every time a modifier starts or ends, to its value from the
unshocked parameters (:attr:`ShockContext.model`) and the modifiers active from that time on:

* ``capacity = K × (f1 × f2 × ...)``, the factors of the active habitat losses;
* ``mortality = m × (f1 × f2 × ...) + (q1 + q2 + ...)``, the factors of the active mortality
  pulses, then the rates of the active predator harvests (a pulse does not scale a harvest);
* ``prey_harvest = q0 + (q1 + q2 + ...)``, the model's own rate (0 if it has none) plus
  the rates of the active prey harvests.

Products and sums run in the order of the shocks. A value is never the previous one undone
(a division or a subtraction would leave rounding residue), so when a shock ends the
parameter is, bit for bit, what it would be without that shock, and the unshocked value once
every shock of a patch has ended. State shocks multiply the state (two removals of a share s
leave ``(1 - s)**2``); link cuts and patch losses add up the arcs they remove.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd

from .dynamics import LocalModel
from ..errors import InputError
from .system import SPECIES

__all__ = [
    "SHOCK_KINDS",
    "ShockContext",
    "Shock",
    "PredatorRemoval",
    "PreyCrash",
    "HabitatLoss",
    "PatchLoss",
    "MortalityPulse",
    "Harvest",
    "LinkCut",
    "StateScale",
    "ParameterShift",
    "Rewire",
    "build_shocks",
    "shock_events",
    "shocked_patches",
]


# --------------------------------------------------------------------------------- context
@dataclass(frozen=True, eq=False)
class ShockContext:
    """What events need beyond the system: the network and how each species moves.

    Parameters
    ----------
    network : trophoscape.model.network.Network
        The network the system's movement operators were built from.
    dispersal : dict
        Per species (``"prey"``, ``"predator"``): ``{"emigration_rate": ndarray (n,),
        "scale_km": ndarray (n,)}``, as on :class:`trophoscape.workflows.study.Study`.
    survival_per_km : float
        Share of dispersers surviving each km (arcs without a fixed survival).
    model : LocalModel
        The local model before any shock; temporary changes are computed from it.
    """

    network: object
    dispersal: dict
    survival_per_km: float
    model: LocalModel

    @classmethod
    def from_study(cls, study) -> "ShockContext":
        return cls(network=study.network, dispersal=study.dispersal,
                   survival_per_km=study.scenario["dispersal.survival_per_km"],
                   model=study.model)


# ---------------------------------------------------------------------------------- events
@dataclass(frozen=True, eq=False)
class StateScale:
    """Multiply the abundance of one species in some patches by ``factor``.

    ``factor = 0`` clears the patches (patch loss); ``1 - share`` removes a share.
    """

    time: float
    species: str
    index: np.ndarray  # int positions, shape (k,)
    factor: float

    def apply(self, system, y):
        y = np.array(y, dtype=float)
        n = system.n_patches
        offset = SPECIES.index(self.species) * n
        y[offset + self.index] *= self.factor
        return system, y


@dataclass(frozen=True, eq=False)
class ParameterShift:
    """Set a local-model parameter in some patches to ``delta``, or add ``delta`` to it.

    Parameters
    ----------
    time : float
    name : str
        A key of the model's ``params``; one it does not have yet (``prey_harvest``) starts
        from zero.
    index : ndarray of int, shape (k,)
        Patch positions.
    delta : ndarray, shape (k,)
        The new values (``absolute``) or the change.
    absolute : bool
        Set rather than add. :func:`shock_events` writes every parameter shock this way, so
        that values never carry the rounding of earlier events; adding is for events made
        by hand.
    """

    time: float
    name: str
    index: np.ndarray
    delta: np.ndarray
    absolute: bool = False

    def apply(self, system, y):
        model = system.model
        n = system.n_patches
        # one shape for every parameter: a scalar one becomes per-patch beside a changed array
        params = {k: np.full(n, float(v)) if np.ndim(v) == 0 else v
                  for k, v in model.params.items()}
        value = np.array(params.get(self.name, np.zeros(n)), dtype=float)
        if self.absolute:
            value[self.index] = self.delta
        else:
            value[self.index] += self.delta
            if self.name != "prey_harvest":
                # a shift below zero would make a negative capacity or mortality
                value[self.index] = np.maximum(value[self.index], 0.0)
        params[self.name] = value
        new = LocalModel(growth=model.growth, response=model.response, params=params)
        return system.with_model(new), y


@dataclass(frozen=True, eq=False)
class Rewire:
    """Rebuild the movement operators without the arcs in ``removed`` (bool, (n_arcs,)).

    ``removed`` is cumulative: every arc removed by this or an earlier event, so that one
    patch loss followed by a link cut leaves neither.
    """

    time: float
    removed: np.ndarray
    context: ShockContext

    def apply(self, system, y):
        from .network import movement_operator

        net = self.context.network
        keep = ~self.removed
        masked = net.select(keep)
        ops = {s: movement_operator(masked, emigration_rate=self.context.dispersal[s]["emigration_rate"],
                                    scale_km=self.context.dispersal[s]["scale_km"],
                                    survival_per_km=self.context.survival_per_km)
               for s in SPECIES}
        return dataclasses.replace(system, prey_movement=ops["prey"],
                                   predator_movement=ops["predator"]), y


# ---------------------------------------------------------------------------------- shocks
@dataclass(frozen=True, eq=False)
class _Modifier:
    """One shock's change of a parameter on ``[start, end)``: times ``factor``, plus ``rate``."""

    start: float
    end: float  # math.inf for good
    name: str
    index: np.ndarray
    factor: float = 1.0
    rate: float = 0.0


class Shock:
    """Interface: ``events(context) -> list of events``; ``patches`` the positions hit.

    A kind that changes parameters also gives ``modifiers()``, which :func:`shock_events`
    composes with those of the other shocks; its ``events`` are those of the shock alone.
    """

    kind: ClassVar[str]
    #: scenario keys this kind accepts besides ``kind`` and ``at``
    takes: ClassVar[tuple[str, ...]]
    #: of those, the keys without a default
    needs: ClassVar[tuple[str, ...]]

    def events(self, context: ShockContext) -> list:  # pragma: no cover - interface
        raise NotImplementedError

    def modifiers(self) -> tuple:
        """The parameter changes of the shock; empty for one that acts through events."""
        return ()


class _ParameterShock(Shock):
    """A shock made of parameter modifiers; alone, its events are their schedule."""

    def events(self, context):
        return _parameter_events(self.modifiers(), context)


def _end(at, duration):
    return math.inf if duration is None else float(at) + float(duration)


def _base_at(value, index: np.ndarray) -> np.ndarray:
    """An unshocked parameter (scalar or per patch) at some patch positions, as floats."""
    value = np.asarray(value, dtype=float)
    return value[index] if value.ndim else np.full(index.size, float(value))


def _parameter_events(modifiers, context: ShockContext) -> list:
    """Events setting each modified parameter at every start and end of a modifier.

    At each such time the patches of the modifiers starting or ending then get the
    unshocked value times the product of the active factors plus the sum of the active
    rates, both in the order of ``modifiers``; a modifier is active on ``[start, end)``.
    """
    out = []
    for name in dict.fromkeys(m.name for m in modifiers):  # first-seen order
        mods = [m for m in modifiers if m.name == name]
        size = 1 + max(int(np.max(m.index, initial=-1)) for m in mods)
        base = context.model.params.get(name, 0.0)  # prey_harvest may be absent: none
        times = sorted({m.start for m in mods} | {m.end for m in mods if m.end < math.inf})
        for t in times:
            touched = np.unique(np.concatenate(
                [m.index for m in mods if t == m.start or t == m.end])).astype(np.int64)
            if not touched.size:
                continue
            scale, add = np.ones(size), np.zeros(size)
            for m in mods:
                if m.start <= t < m.end:
                    scale[m.index] *= m.factor
                    add[m.index] += m.rate
            value = _base_at(base, touched) * scale[touched] + add[touched]
            out.append(ParameterShift(t, name, touched, value, absolute=True))
    return out


@dataclass(frozen=True, eq=False)
class _Removal(Shock):
    """Remove a share of one species in some patches at time ``at``."""

    species: ClassVar[str]
    takes: ClassVar = ("patches", "share")
    needs: ClassVar = ("patches", "share")
    at: float
    patches: np.ndarray
    share: float

    def events(self, context):
        return [StateScale(self.at, self.species, self.patches, 1.0 - self.share)]


class PredatorRemoval(_Removal):
    """Remove a share of the predators in some patches at time ``at`` (a cull, a disease)."""

    kind: ClassVar[str] = "predator_removal"
    species: ClassVar[str] = "predator"


class PreyCrash(_Removal):
    """Remove a share of the prey in some patches at time ``at``."""

    kind: ClassVar[str] = "prey_crash"
    species: ClassVar[str] = "prey"


@dataclass(frozen=True, eq=False)
class HabitatLoss(_ParameterShock):
    """Carrying capacity times ``factor`` (> 0) from ``at``, for ``duration`` or for good.

    Has no effect on exponential prey growth, which has no carrying capacity.
    """

    kind: ClassVar[str] = "habitat_loss"
    takes: ClassVar = ("patches", "factor", "duration")
    needs: ClassVar = ("patches", "factor")
    at: float
    patches: np.ndarray
    factor: float
    duration: float | None = None

    def modifiers(self):
        return (_Modifier(float(self.at), _end(self.at, self.duration), "capacity",
                          self.patches, factor=float(self.factor)),)


@dataclass(frozen=True, eq=False)
class MortalityPulse(_ParameterShock):
    """Predator mortality times ``factor`` (>= 0) from ``at``, for ``duration`` or for good."""

    kind: ClassVar[str] = "mortality_pulse"
    takes: ClassVar = ("patches", "factor", "duration")
    needs: ClassVar = ("patches", "factor")
    at: float
    patches: np.ndarray
    factor: float
    duration: float | None = None

    def modifiers(self):
        return (_Modifier(float(self.at), _end(self.at, self.duration), "mortality",
                          self.patches, factor=float(self.factor)),)


@dataclass(frozen=True, eq=False)
class Harvest(_ParameterShock):
    """A constant per-capita removal ``rate`` of one species from ``at`` on.

    For the predator it adds to the mortality rate; for the prey it is the ``prey_harvest``
    term of :meth:`trophoscape.model.dynamics.LocalModel.rates` (``- q n``). With ``duration`` it
    stops after that time.
    """

    kind: ClassVar[str] = "harvest"
    takes: ClassVar = ("patches", "rate", "species", "duration")
    needs: ClassVar = ("patches", "rate")
    at: float
    patches: np.ndarray
    rate: float
    species: str = "predator"
    duration: float | None = None

    def modifiers(self):
        name = "mortality" if self.species == "predator" else "prey_harvest"
        return (_Modifier(float(self.at), _end(self.at, self.duration), name, self.patches,
                          rate=float(self.rate)),)


@dataclass(frozen=True, eq=False)
class PatchLoss(Shock):
    """The patches are gone from ``at`` on: populations zeroed, every link to them removed."""

    kind: ClassVar[str] = "patch_loss"
    takes: ClassVar = ("patches",)
    needs: ClassVar = ("patches",)
    at: float
    patches: np.ndarray

    def events(self, context):
        net = context.network
        gone = np.zeros(net.n_patches, dtype=bool)
        gone[self.patches] = True
        removed = gone[net.source] | gone[net.target]
        return [StateScale(self.at, s, self.patches, 0.0) for s in SPECIES] + [
            Rewire(self.at, removed, context)]


@dataclass(frozen=True, eq=False)
class LinkCut(Shock):
    """Links between pairs of patches cut from ``at`` on (both directions, every route).

    ``pairs`` is an int array of shape (k, 2) of patch positions.
    """

    kind: ClassVar[str] = "link_cut"
    takes: ClassVar = ("links",)
    needs: ClassVar = ("links",)
    at: float
    pairs: np.ndarray

    @property
    def patches(self) -> np.ndarray:
        return np.unique(self.pairs)

    def events(self, context):
        net = context.network
        removed = np.isin(net.pair_codes(), net.pair_codes(self.pairs[:, 0], self.pairs[:, 1]))
        return [Rewire(self.at, removed, context)]


#: Shock kinds by their scenario name.
SHOCK_KINDS: dict[str, type[Shock]] = {
    cls.kind: cls for cls in (PredatorRemoval, PreyCrash, HabitatLoss, PatchLoss,
                              MortalityPulse, Harvest, LinkCut)
}


def shock_events(shocks, context: ShockContext, *, time_offset: float = 0.0) -> list:
    """The events of some shocks, in time order: parameters composed, rewiring cumulative.

    The modifiers of all parameter shocks are scheduled together (see the module notes):
    each parameter event sets the value from the unshocked model and every shock active from
    its time on, so overlapping shocks multiply (factors) or add (rates) and each ends exactly.

    Parameters
    ----------
    shocks : sequence of Shock
    context : ShockContext
    time_offset : float
        Added to every event time (``-burn_in`` to continue a run started after burn-in).

    Returns
    -------
    list of events, sorted by time (stable: shocks at the same time keep their order)
    """
    modifiers = [m for shock in shocks for m in shock.modifiers()]
    events = [e for shock in shocks if not shock.modifiers() for e in shock.events(context)]
    events += _parameter_events(modifiers, context)
    events.sort(key=lambda e: float(e.time))
    removed = None
    out = []
    for e in events:
        if isinstance(e, Rewire):
            removed = e.removed if removed is None else (removed | e.removed)
            e = dataclasses.replace(e, removed=removed)
        if time_offset:
            e = dataclasses.replace(e, time=float(e.time) + time_offset)
        out.append(e)
    return out


def shocked_patches(shocks, n_patches: int) -> np.ndarray:
    """Boolean mask, shape (n_patches,), of the patches any of the shocks hits."""
    hit = np.zeros(n_patches, dtype=bool)
    for shock in shocks:
        hit[shock.patches] = True
    return hit


# ------------------------------------------------------------------- scenario -> shocks
def _positions(ids: pd.Index, wanted, *, file, field: str) -> np.ndarray:
    found = ids.get_indexer([str(w) for w in wanted])
    missing = np.flatnonzero(found < 0)
    if missing.size:
        sample = ", ".join(repr(str(i)) for i in ids[:3])
        raise InputError(f"no patch has id {str(wanted[int(missing[0])])!r}; use ids of the "
                         f"patch file's id field (e.g. {sample})", file=file, field=field)
    return found.astype(np.int64)


def build_shocks(tables, *, ids, network=None, file=None) -> tuple[Shock, ...]:
    """Shock objects from validated ``[[shock]]`` tables, ids resolved to positions.

    Parameters
    ----------
    tables : sequence of mapping
        As :func:`trophoscape.scenario.parse_scenario` leaves them under ``"shock"``: every
        key of the kind filled in (``at``, ``patches``, ...).
    ids : array of str, shape (n_patches,)
        Patch ids in the fixed order.
    network : Network, optional
        Needed to check that the pairs of a ``link_cut`` are linked.
    file : path, optional
        The scenario file, for error messages.

    Raises
    ------
    InputError
        An unknown patch id, or a ``link_cut`` pair that no link joins; the field names the
        shock by its 0-based position among the ``[[shock]]`` tables (``shock[0].patches``).
    """
    index = pd.Index(np.asarray(ids, dtype=str))
    n = index.size
    out = []
    for i, table in enumerate(tables):
        kind = table["kind"]
        cls = SHOCK_KINDS[kind]
        values = {"at": float(table["at"])}
        for key in cls.takes:
            value = table.get(key)
            if key == "patches":
                value = (np.arange(n, dtype=np.int64) if value == "all" else
                         _positions(index, list(value), file=file,
                                    field=f"shock[{i}].patches"))
            elif key == "links":
                flat = _positions(index, [p for pair in value for p in pair], file=file,
                                  field=f"shock[{i}].links")
                value = flat.reshape(-1, 2)
                if network is not None:
                    nn = max(n, 1)
                    arcs = np.unique(network.source * nn + network.target)
                    linked = np.isin(value[:, 0] * nn + value[:, 1], arcs) | np.isin(
                        value[:, 1] * nn + value[:, 0], arcs)
                    if not linked.all():
                        k = int(np.flatnonzero(~linked)[0])
                        a, b = value[k]
                        raise InputError(f"no link joins {index[a]!r} and {index[b]!r}; "
                                         "list only linked pairs (layer links of patches.gpkg)", file=file,
                                         field=f"shock[{i}].links")
            if value is None and key not in cls.needs:
                continue
            values["pairs" if key == "links" else key] = value
        out.append(cls(**values))
    return tuple(out)
