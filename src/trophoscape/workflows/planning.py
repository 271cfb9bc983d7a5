"""Corridor planning: which candidate corridors to build, which links and patches matter most.

A planner has a baseline study, a list of candidate corridors (each with a cost) and a
budget. Every evaluation is one full run of a variant of the baseline network, scored on
every objective of :data:`OBJECTIVES`:

* **add-one**: each candidate added alone; the change in every objective (``gain_*``);
* **remove-one**: each existing link, and each patch, removed alone (the critical
  elements; ``loss_*``);
* **a budgeted set**: greedy by gain per cost, re-evaluating the remaining candidates after
  each addition; for up to :data:`EXHAUSTIVE_LIMIT` candidates also the exact best set by
  exhaustive search over the subsets within budget, and how far greedy is from it;
* **two-stage screening** for long candidate lists: rank every candidate by the cheap gain
  in metapopulation capacity λ_M (no simulation), then simulate the best ``k``.

Sign convention: every ``gain_*`` is positive when the change is good for the species. For
persistence, occupancy and capacity that is an increase; for synchrony it is a *decrease*
(patches that fluctuate out of step rescue one another, while synchronous ones can crash
together, so lower synchrony is better for regional survival). ``loss_*`` is ``-gain_*`` of
taking an element away: positive when losing it hurts.

A weighted combination of the gains ranks candidates (the *score*); capacity enters the
score as its relative change (gain ÷ baseline λ_M), so that km⁴ and shares can be weighed
together. The default weights are :data:`DEFAULT_WEIGHTS`: the predator's area-weighted
regional persistence (the share of habitat area where the predator is still present at
the end of the run), plus a tenth of the relative gain in its metapopulation capacity to
break ties.

Runs go to :func:`trophoscape.workflows.tasks.run_tasks`. A task is small and picklable: the
scenario (its values, not the built study, which holds read-only views and a mapping
proxy that do not pickle), the candidate arrays and the variant; each worker process
builds the baseline study once and keeps it for the tasks that follow.
"""

from __future__ import annotations

import hashlib
import json
import math
import sqlite3
import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd
import shapely

from ..errors import InputError, RunError, param
from ..model.network import (CORRIDOR_RESISTANCE, KERNELS, Network, corridor_resistances,
                             movement_operator, pair_distance_km, snap_line_ends, with_links,
                             without)
from ..model.system import SPECIES, CoupledSystem
from ..analysis.capacity import metapopulation_capacity
from ..io.ledger import Ledger
from ..io.tables import flatten_summary
from .tasks import ScenarioPayload, cached, forget, remember

__all__ = [
    "OBJECTIVES",
    "DEFAULT_WEIGHTS",
    "EXHAUSTIVE_LIMIT",
    "Candidates",
    "Variant",
    "read_candidates",
    "parse_weights",
    "Planner",
    "CorridorPlan",
    "CorridorSet",
    "GreedyGap",
    "plan_corridors",
    "check_plan_options",
    "read_link_list",
    "compare_results",
    "patch_differences",
    "evaluations_frame",
]

#: Objectives: name -> (what it is, +1 if higher is better, -1 if lower is better).
OBJECTIVES = {
    "predator_persistence": ("share of patches where the predator persists at the end", +1),
    "predator_area_persistence": ("the same, weighted by patch area", +1),
    "prey_persistence": ("share of patches where the prey persists at the end", +1),
    "prey_area_persistence": ("the same, weighted by patch area", +1),
    "predator_occupancy": ("mean over patches of the predator's occupancy after burn-in", +1),
    "prey_occupancy": ("mean over patches of the prey's occupancy after burn-in", +1),
    "predator_capacity": ("metapopulation capacity λ_M for the predator's dispersal (km⁴)", +1),
    "prey_capacity": ("metapopulation capacity λ_M for the prey's dispersal (km⁴)", +1),
    "predator_synchrony": ("mean pairwise correlation of predator numbers; lower is better "
                           "for regional survival", -1),
    "prey_synchrony": ("mean pairwise correlation of prey numbers; lower is better for "
                       "regional survival", -1),
}

#: Weights of the score when none are given: persistence first; the relative gain in the
#: predator's metapopulation capacity breaks ties between options that leave persistence
#: unchanged (on well-connected networks most of them do), with a tenth of the weight.
DEFAULT_WEIGHTS = {"predator_area_persistence": 1.0, "predator_capacity": 0.1}

#: Largest candidate list for which the exact best set is found by exhaustive search.
EXHAUSTIVE_LIMIT = 12

# below this a score difference is rounding, not a gain (scores are shares of order 1)
_TOL = 1e-9


# ------------------------------------------------------------------------------ candidates


@dataclass(frozen=True, eq=False)
class Candidates:
    """Candidate corridors snapped to the patches they join, in the file's order.

    Attributes
    ----------
    ids : ndarray of str, shape (k,)
    source, target : ndarray of int64, shape (k,)
        Patch positions of the two ends (``source`` holds the first point's patch).
    length_km : ndarray of float64, shape (k,)
        Length of the line (of a polygon's long axis).
    effective_km : ndarray of float64, shape (k,)
        The length the corridor acts as: ``length_km`` times its resistance
        (:func:`trophoscape.model.network.corridor_resistances`: the ``resistance``
        attribute, else the scenario's ``corridor_resistance`` divided by ``quality``), for
        the kernel, the survival per km and λ_M alike.
    survival : ndarray of float64, shape (k,)
        Share surviving the whole corridor; NaN for "``survival_per_km ** effective_km``".
    cost : ndarray of float64, shape (k,)
    frame : geopandas.GeoDataFrame or None
        The lines with every attribute of the file, for maps and layers (not sent to
        worker processes).
    path : pathlib.Path or None
    relink : dict or None
        With a resistance raster (:func:`relink_candidates`): for each candidate burnt
        into the ground alone, the patches within its reach (``affected_owner``,
        ``affected_patch``) and their kernel links searched again (``relink_owner``,
        ``relink_i``, ``relink_j``, ``relink_d`` straight and ``relink_e`` effective km).
    """

    ids: np.ndarray
    source: np.ndarray
    target: np.ndarray
    length_km: np.ndarray
    effective_km: np.ndarray
    survival: np.ndarray
    cost: np.ndarray
    frame: object = field(default=None, repr=False)
    path: Path | None = None
    relink: dict | None = field(default=None, repr=False)

    @property
    def n(self) -> int:
        return int(self.ids.size)

    def arrays(self) -> dict:
        """The numeric arrays alone (what a worker needs), as a picklable dict."""
        out = {k: np.asarray(getattr(self, k)) for k in
               ("ids", "source", "target", "length_km", "effective_km", "survival", "cost")}
        out.update({k: np.asarray(v) for k, v in (self.relink or {}).items()})
        return out


def read_candidates(path, landscape, *, snap_km: float = 0.1, layer=None,
                    corridor_resistance: float = CORRIDOR_RESISTANCE) -> Candidates:
    """Read a candidate-corridor file and snap each candidate to the two patches it joins.

    Parameters
    ----------
    path : str or path
        See :func:`trophoscape.model.landscape.read_candidates` (LineStrings or thin Polygons,
        ``cost`` required, ``corridor_id``, ``quality``, ``survival`` optional).
    landscape : Landscape or Study
        With a study, its landscape, and ``snap_km`` and ``corridor_resistance`` from its
        scenario (the arguments are then not needed).
    snap_km : float
        How far an end may lie from its patch (the scenario's ``corridor_snap_km``).
    layer : str or int, optional
    corridor_resistance : float
        The scenario's ``[dispersal] corridor_resistance``.

    Returns
    -------
    Candidates

    Raises
    ------
    InputError
        Everything :func:`trophoscape.model.landscape.read_candidates` raises, and a candidate
        that does not join two different patches.
    """
    from ..model.landscape import read_candidates as read_file

    if hasattr(landscape, "scenario") and hasattr(landscape, "landscape"):  # a Study
        snap_km = landscape.scenario["dispersal.corridor_snap_km"]
        corridor_resistance = landscape.scenario["dispersal.corridor_resistance"]
        landscape = landscape.landscape
    frame = read_file(path, crs=landscape.crs, layer=layer)
    return snap_candidates(frame, landscape, snap_km=snap_km, path=path,
                           corridor_resistance=corridor_resistance)


def snap_candidates(frame, landscape, *, snap_km: float = 0.1, path=None,
                    corridor_resistance: float = CORRIDOR_RESISTANCE) -> Candidates:
    """Snap candidate lines (a frame as :func:`trophoscape.model.landscape.read_candidates` returns)
    to patches, with the rules corridors follow in :func:`trophoscape.model.network.build_network`.

    Each end must lie within ``snap_km`` of a patch (an end on overlapping patches goes to
    the first in patch order), and the two ends at different patches.
    """
    snap_m = float(snap_km) * 1000.0
    has_ids = bool(frame.attrs.get("has_ids", "corridor_id" in frame.columns))
    ids = frame["corridor_id"].astype(str).to_numpy() if "corridor_id" in frame.columns else \
        np.arange(len(frame)).astype(str)

    def ref(c):
        return str(ids[c]) if has_ids else int(c)

    geoms = frame.geometry.to_numpy()
    k = geoms.size
    a, b = snap_line_ends(landscape, geoms, snap_m, path=path, ref=ref,
                          what="the candidate joins fewer than two patches: ")
    length = shapely.length(geoms) / 1000.0
    survival = frame["survival"].to_numpy(dtype=float) if "survival" in frame.columns else \
        np.full(k, np.nan)
    out = frame.copy()
    out["corridor_id"] = ids
    out["source"] = landscape.ids[a]
    out["target"] = landscape.ids[b]
    out["length_km"] = length
    return Candidates(ids=ids, source=a, target=b, length_km=length,
                      effective_km=length * corridor_resistances(frame, corridor_resistance),
                      survival=survival,
                      cost=frame["cost"].to_numpy(dtype=float), frame=out,
                      path=None if path is None else Path(path))


def parse_weights(text) -> dict:
    """Objective weights from ``"predator_persistence=1,capacity=0.5"`` or a mapping.

    A name without a species (``capacity``, ``persistence``, ``area_persistence``,
    ``occupancy``, ``synchrony``) means the predator's.

    Raises
    ------
    InputError
        An unknown objective (with the closest known name), or a weight that is not a
        finite number.
    """
    import difflib

    if text is None or (isinstance(text, str) and not text.strip()):
        return dict(DEFAULT_WEIGHTS)
    items = text.items() if isinstance(text, dict) else (
        part.split("=", 1) if "=" in part else (part, "")
        for part in (p.strip() for p in str(text).split(",")) if part)
    weights = {}
    for name, value in items:
        name = str(name).strip()
        if name not in OBJECTIVES and f"predator_{name}" in OBJECTIVES:
            name = f"predator_{name}"
        if name not in OBJECTIVES:
            close = difflib.get_close_matches(name, list(OBJECTIVES), n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise InputError(f"unknown objective {name!r}{hint}; expected NAME=WEIGHT with NAME "
                             f"one of {', '.join(OBJECTIVES)}", field=param("weights"))
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = math.nan
        if not math.isfinite(number):
            raise InputError(f"weight {value!r} of {name} is not a number; expected "
                             "NAME=WEIGHT, e.g. predator_persistence=1", field=param("weights"))
        weights[name] = number
    if not any(w != 0 for w in weights.values()):
        raise InputError("every weight is zero; give at least one objective a weight",
                         field=param("weights"))
    return weights


# ------------------------------------------------------------------------------ variants


@dataclass(frozen=True)
class Variant:
    """A change to the baseline network: candidates added, links cut, patches lost.

    Attributes
    ----------
    add : tuple of int
        Candidate positions, sorted.
    cut : tuple of (int, int)
        Unordered pairs of patch positions (lower first), sorted.
    lost : tuple of int
        Patch positions, sorted.
    """

    add: tuple = ()
    cut: tuple = ()
    lost: tuple = ()

    @classmethod
    def of(cls, add=(), cut=(), lost=()) -> "Variant":
        return cls(tuple(sorted({int(c) for c in add})),
                   tuple(sorted({(min(int(a), int(b)), max(int(a), int(b))) for a, b in cut})),
                   tuple(sorted({int(p) for p in lost})))

    def label(self, candidate_ids, patch_ids) -> str:
        """Stable JSON text naming the variant by ids (the partial-results log uses it)."""
        return json.dumps({"add": [str(candidate_ids[c]) for c in self.add],
                           "cut": [[str(patch_ids[a]), str(patch_ids[b])] for a, b in self.cut],
                           "lost": [str(patch_ids[p]) for p in self.lost]}, sort_keys=True)


def _variant_network(network: Network, cand: dict, variant: Variant) -> Network:
    net = network
    if variant.add and "relink_owner" in cand:
        net = _relinked(net, cand, np.asarray(variant.add, dtype=np.int64))
    if variant.add:
        k = np.asarray(variant.add, dtype=np.int64)
        net = with_links(net, cand["source"][k], cand["target"][k], cand["length_km"][k],
                         effective_distance_km=cand["effective_km"][k],
                         survival=cand["survival"][k], origin="corridor")
    if variant.cut or variant.lost:
        net = without(net, patches=variant.lost, links=variant.cut)
    return net


def _relinked(network: Network, cand: dict, added) -> Network:
    """The kernel links with the added candidates burnt into the ground
    (:func:`relink_candidates`): burning only lowers costs, so each pair keeps the shorter
    of its present effective distance and the one found again, and pairs found within
    ``max_distance_km`` for the first time are linked. A pair reached from several
    candidates' searches keeps its shortest (a path along two new corridors at once is not
    looked for); a candidate's own two patches keep their link beside it."""
    sel = np.isin(cand["relink_owner"], added)
    if not sel.any():
        return network
    i, j = cand["relink_i"][sel], cand["relink_j"][sel]
    d, e = cand["relink_d"][sel], cand["relink_e"][sel]
    code = network.pair_codes(i, j)
    order = np.lexsort((e, code))
    first = np.r_[True, code[order][1:] != code[order][:-1]]
    k = order[first]
    code, i, j, d, e = code[k], i[k], j[k], d[k], e[k]  # one per pair, sorted by code
    kernel = network.origin == "kernel"
    arc_code = network.pair_codes()
    pos = np.minimum(np.searchsorted(code, arc_code), code.size - 1)
    hit = kernel & (code[pos] == arc_code)
    effective = network.effective_distance_km.copy()
    effective[hit] = np.minimum(effective[hit], e[pos[hit]])
    net = Network(ids=network.ids, kernel=network.kernel,
                  max_distance_km=network.max_distance_km,
                  **{f: (effective if f == "effective_distance_km" else getattr(network, f))
                     for f in Network.ARC_FIELDS})
    new = ~np.isin(code, arc_code[kernel])
    if not new.any():
        return net
    return with_links(net, np.minimum(i, j)[new], np.maximum(i, j)[new], d[new],
                      effective_distance_km=e[new], origin="kernel")


def relink_candidates(candidates: Candidates, study) -> Candidates:
    """With a resistance raster, each candidate burnt into the ground while it is evaluated:
    the patches whose searches could reach it within ``max_distance_km`` are searched again
    on the ground with the candidate in it (at its resistance), so that pairs whose
    least-cost path now runs along it are linked as such. Without a raster, or without
    kernel links, the candidates are returned as they are."""
    from .candidates import _surface

    if (study.ground is None or study.network.kernel == "none"
            or candidates.n == 0 or candidates.frame is None):
        return candidates
    surface = _surface(study)
    land = study.landscape
    max_km = study.network.max_distance_km
    lines = candidates.frame.geometry.to_numpy()
    resistance = corridor_resistances(candidates.frame,
                                      study.scenario["dispersal.corridor_resistance"])
    tree = shapely.STRtree(land.geometries)
    # a burnt line touches cells up to a diagonal from it
    h, w = surface.cell_km
    reach_m = (surface.reach_km(max_km) + math.hypot(h, w)) * 1000.0
    parts = {k: [] for k in ("affected_owner", "affected_patch", "relink_owner", "relink_i",
                             "relink_j", "relink_e")}
    for c in range(candidates.n):  # a loop over candidates, each a few searches
        near = np.unique(tree.query(lines[c], predicate="dwithin", distance=reach_m))
        src, dst, km = surface.burned([lines[c]], resistance[c]).pairs_from(land, near, max_km)
        ends = {int(candidates.source[c]), int(candidates.target[c])}
        own = np.isin(src, list(ends)) & np.isin(dst, list(ends))
        src, dst, km = src[~own], dst[~own], km[~own]  # its own two patches: the corridor
        parts["affected_owner"].append(np.full(near.size, c))
        parts["affected_patch"].append(near)
        parts["relink_owner"].append(np.full(src.size, c))
        parts["relink_i"].append(src)
        parts["relink_j"].append(dst)
        parts["relink_e"].append(km)
    relink = {k: np.concatenate(v) for k, v in parts.items()}
    for k in ("affected_owner", "affected_patch", "relink_owner", "relink_i", "relink_j"):
        relink[k] = relink[k].astype(np.int64)
    relink["relink_d"] = pair_distance_km(land, relink["relink_i"], relink["relink_j"],
                                          study.scenario["dispersal.distance"])
    return replace(candidates, relink=relink)


def variant_study(study, candidates, variant: Variant):
    """The baseline study with a variant's network (and lost patches emptied).

    Parameters
    ----------
    study : Study
    candidates : Candidates or dict
        The candidates, or their :meth:`Candidates.arrays`.
    variant : Variant

    Returns
    -------
    Study
        Same scenario, landscape and local model; the network with the candidates added and
        the links cut; movement operators and the coupled system rebuilt from it; the
        initial state zero in lost patches (with no links left they stay empty, so a lost
        patch counts as one where neither species persists).
    """
    cand = candidates.arrays() if isinstance(candidates, Candidates) else candidates
    if not (variant.add or variant.cut or variant.lost):
        return study
    net = _variant_network(study.network, cand, variant)
    survival = study.scenario["dispersal.survival_per_km"]
    operators = {s: movement_operator(net, emigration_rate=study.dispersal[s]["emigration_rate"],
                                      scale_km=study.dispersal[s]["scale_km"],
                                      survival_per_km=survival) for s in SPECIES}
    system = CoupledSystem(model=study.model, area_km2=study.landscape.area_km2,
                           prey_movement=operators["prey"],
                           predator_movement=operators["predator"])
    initial = study.initial_state
    if variant.lost:
        initial = initial.copy()
        n = study.landscape.n_patches
        lost = np.asarray(variant.lost, dtype=np.int64)
        initial[lost] = 0.0
        initial[n + lost] = 0.0
    return replace(study, network=net, system=system, initial_state=initial)


def _capacity_kernel(network: Network) -> str:
    # as study.analyse does: a network without kernel links still gets λ_M from distances
    return network.kernel if network.kernel in KERNELS else "exponential"


def capacity_of(study, network: Network | None = None) -> dict:
    """λ_M of a network for each species' kernel scale: ``{S_capacity: float}``."""
    net = study.network if network is None else network
    area = study.landscape.area_km2
    return {f"{s}_capacity": metapopulation_capacity(
        net, area, scale_km=study.dispersal[s]["scale_km"], kernel=_capacity_kernel(net))[0]
        for s in SPECIES}


def objectives_of(result) -> dict:
    """Every objective of :data:`OBJECTIVES` for one finished run.

    Parameters
    ----------
    result : RunResult

    Returns
    -------
    dict
        One float per objective (NaN where undefined, e.g. synchrony when no series varies).
        Persistence figures come from the run's summary, which averages over replicates
        where there are several.
    """
    s, table = result.summary, result.patches
    out = {}
    for sp in SPECIES:
        out[f"{sp}_persistence"] = float(s[f"{sp}_regional_persistence"])
        out[f"{sp}_area_persistence"] = float(s[f"{sp}_area_persistence"])
        out[f"{sp}_occupancy"] = float(np.nanmean(table[f"{sp}_occupancy"].to_numpy(float)))
        out[f"{sp}_synchrony"] = float(s.get(f"{sp}_synchrony", math.nan))
    out.update(capacity_of(result.study))
    return {k: out[k] for k in OBJECTIVES}


# ------------------------------------------------------------------------------ workers


def _quick(scenario):
    """The scenario with the analyses no objective needs switched off (λ_M is ours)."""
    return scenario.with_values(analysis__stability=False, analysis__capacity=False)


@dataclass(frozen=True)
class _Task:
    source: ScenarioPayload
    candidates: dict
    variant: Variant


def _evaluate(task: _Task) -> dict:
    """One run of a variant (module level: the process pool pickles it by name)."""
    from .study import build_study, run_study

    study = cached(("planning", task.source.key),
                   lambda: build_study(_quick(task.source.scenario())))
    result = run_study(variant_study(study, task.candidates, task.variant))
    return objectives_of(result)


# ------------------------------------------------------------------------------ the planner


class Planner:
    """Evaluates variants of one baseline study, once each, and scores them.

    Parameters
    ----------
    study : Study
        The baseline (its own analyses settings do not matter: variants run without the
        stability and capacity analyses; λ_M is computed here).
    candidates : Candidates
    weights : dict, optional
        Objective -> weight; default :data:`DEFAULT_WEIGHTS`.
    workers : int, optional
        Processes for the runs (default all cores; 1 runs in this process).
    progress : bool
        Show a progress bar.
    log : path, optional
        Ledger file (:func:`open_evaluations`) in which every finished run is recorded at
        once. Runs already there from an interrupted planning of the same scenario and
        candidates are read back and not run again.

    Attributes
    ----------
    results : dict
        Variant -> objectives dict (None for a run that failed).
    failures : dict
        Variant -> error text.
    baseline : dict
        Objectives of the baseline.
    """

    def __init__(self, study, candidates: Candidates, *, weights=None, workers=None,
                 progress: bool = False, log=None):
        self.study = study
        self.candidates = candidates
        self.weights = dict(DEFAULT_WEIGHTS if weights is None else weights)
        self.workers = workers
        self.progress = progress
        self.source = ScenarioPayload.of(study.scenario)
        if candidates.relink is None:
            candidates = relink_candidates(candidates, study)
            self.candidates = candidates
        self._arrays = candidates.arrays()
        self.results: dict = {}
        self.failures: dict = {}
        self.runs = 0
        self.run_seconds = 0.0
        self.log = None if log is None else Path(log)
        self.fingerprint = self._fingerprint()
        if self.log is not None:
            self._read_log()
        # the main process works as a worker too (workers=1, or a single task), and forked
        # workers inherit this entry instead of rebuilding. Always replaced, never reused:
        # the key holds the scenario, not the patch file, which may have changed since.
        forget("planning")
        remember(("planning", self.source.key), replace(study, scenario=_quick(study.scenario)))
        self.evaluate([Variant()], desc="baseline")
        if self.results.get(Variant()) is None:
            raise RunError(f"the baseline run failed ({self.failures.get(Variant())}); check "
                           "the scenario with 'trophoscape run' first")
        self.baseline = self.results[Variant()]

    # -- bookkeeping

    def _fingerprint(self) -> str:
        arrays = self._arrays
        h = hashlib.sha256(self.source.key.encode())
        for k in sorted(arrays):
            h.update(k.encode())
            h.update(np.ascontiguousarray(arrays[k]).astype(str if k == "ids" else float)
                     .tobytes())
        return h.hexdigest()[:16]

    def _label(self, variant: Variant) -> str:
        return variant.label(self.candidates.ids, self.study.ids)

    def _ledger(self) -> Ledger:
        return open_evaluations(self.log)

    def _run_id(self, variant: Variant) -> str:
        text = f"{self.fingerprint}\n{self._label(variant)}"
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def _read_log(self):
        if not self.log.is_file():
            return
        try:
            ledger = self._ledger()
        except sqlite3.DatabaseError:  # not a ledger (the caller's folder checks make it ours)
            return
        try:
            rows = ledger.rows()
        finally:
            ledger.close()
        cand = {str(c): k for k, c in enumerate(self.candidates.ids)}
        patch = {str(p): k for k, p in enumerate(self.study.ids)}
        for row in rows:
            if row["fingerprint"] != self.fingerprint or row["status"] != "ok":
                continue
            try:
                spec = json.loads(row["variant"])
                variant = Variant.of([cand[c] for c in spec["add"]],
                                     [(patch[a], patch[b]) for a, b in spec["cut"]],
                                     [patch[p] for p in spec["lost"]])
                self.results[variant] = {k: float(row["results"][k]) for k in OBJECTIVES}
            except (KeyError, ValueError, TypeError):
                continue

    def _append_log(self, variant, values, error=None):
        if self.log is None:
            return
        ledger = self._ledger()
        try:
            ledger.record(self._run_id(variant), ok=error is None, error=error,
                          results=None if values is None else {k: float(values[k])
                                                               for k in OBJECTIVES},
                          fingerprint=self.fingerprint,
                          variant=self._label(variant))
        finally:
            ledger.close()

    # -- running

    def evaluate(self, variants, *, desc: str = "runs") -> None:
        """Run every variant not run yet (in parallel), recording each as it finishes."""
        from .tasks import run_tasks

        todo = [v for v in dict.fromkeys(variants) if v not in self.results]
        if not todo:
            return
        started = time.perf_counter()

        def done(task, ok, value):
            if ok:
                self.results[task.variant] = value
                self._append_log(task.variant, value)
            else:
                self.results[task.variant] = None
                self.failures[task.variant] = value
                self._append_log(task.variant, None, error=str(value))

        run_tasks(_evaluate, [_Task(self.source, self._arrays, v) for v in todo],
                  on_result=done, workers=self.workers, progress=self.progress, desc=desc)
        self.runs += len(todo)
        self.run_seconds += time.perf_counter() - started

    def gains(self, variant: Variant) -> dict:
        """``gain_*`` of a variant against the baseline (positive = better; NaN if failed)."""
        values = self.results.get(variant)
        if values is None:
            return {f"gain_{k}": math.nan for k in OBJECTIVES}
        return {f"gain_{k}": sign * (values[k] - self.baseline[k])
                for k, (_, sign) in OBJECTIVES.items()}

    def score(self, variant: Variant) -> float:
        """Weighted sum of the gains (capacity as its relative change); NaN if it failed."""
        if self.results.get(variant) is None:
            return math.nan
        return _score(self.gains(variant), self.baseline, self.weights)

    # -- add-one and remove-one

    def add_one(self, which=None) -> pd.DataFrame:
        """Every candidate (or the positions ``which``) added alone to the baseline.

        Returns
        -------
        pandas.DataFrame
            One row per candidate in file order, indexed by ``corridor_id``: ``source``,
            ``target`` (patch ids), ``length_km``, ``cost``, one ``gain_*`` per objective,
            ``score``, ``score_per_cost``, ``status`` ("ok", "not simulated" for a candidate
            screened out, or the failure).
        """
        cand = self.candidates
        which = range(cand.n) if which is None else which
        self.evaluate([Variant.of(add=[c]) for c in which], desc="candidates")
        rows = []
        for c in range(cand.n):
            v = Variant.of(add=[c])
            gains = self.gains(v)
            score = self.score(v)
            status = ("not simulated" if v not in self.results else
                      "ok" if self.results[v] is not None else f"failed: {self.failures[v]}")
            rows.append({"corridor_id": str(cand.ids[c]),
                         "source": str(self.study.ids[cand.source[c]]),
                         "target": str(self.study.ids[cand.target[c]]),
                         "length_km": float(cand.length_km[c]), "cost": float(cand.cost[c]),
                         **gains, "score": score,
                         "score_per_cost": _per_cost(score, cand.cost[c]), "status": status})
        return pd.DataFrame(rows).set_index("corridor_id")

    def remove_one(self, links="all", patches=True) -> pd.DataFrame:
        """Every existing link (or a list of pairs) and every patch removed alone.

        Parameters
        ----------
        links : "all", None, or sequence of (int, int)
            Links to test (unordered pairs of patch positions); "all": every linked pair.
        patches : bool or sequence of int
            True: every patch; or the positions to test.

        Returns
        -------
        pandas.DataFrame
            One row per element: ``kind`` ("link" or "patch"), ``element`` (patch id, or
            "A–B"), ``patch_a``, ``patch_b``, one ``loss_*`` per objective (positive: losing
            the element hurts), ``score_loss``, ``rank`` (1 = most critical, within its
            kind), ``status``.
        """
        net = self.study.network
        ids = self.study.ids
        if isinstance(links, str) and links == "all":
            pairs = net.linked_pairs()
        elif links is None:
            pairs = np.empty((0, 2), dtype=np.int64)
        else:
            pairs = np.asarray(list(links), dtype=np.int64).reshape(-1, 2)
        lost = (np.arange(net.n_patches) if patches is True else
                np.asarray([] if patches is False or patches is None else list(patches),
                           dtype=np.int64))
        variants = ([Variant.of(cut=[(a, b)]) for a, b in pairs]
                    + [Variant.of(lost=[p]) for p in lost])
        self.evaluate(variants, desc="critical elements")
        rows = []
        for v in variants:
            if v.cut:
                a, b = v.cut[0]
                kind, element, pa, pb = "link", f"{ids[a]}–{ids[b]}", str(ids[a]), str(ids[b])
            else:
                kind, element, pa, pb = "patch", str(ids[v.lost[0]]), str(ids[v.lost[0]]), ""
            gains = self.gains(v)
            status = "ok" if self.results[v] is not None else f"failed: {self.failures[v]}"
            rows.append({"kind": kind, "element": element, "patch_a": pa, "patch_b": pb,
                         **{f"loss_{k[5:]}": -g for k, g in gains.items()},
                         "score_loss": -self.score(v), "status": status})
        columns = ["kind", "element", "patch_a", "patch_b",
                   *[f"loss_{k}" for k in OBJECTIVES], "score_loss", "rank", "status"]
        if not rows:
            return pd.DataFrame(columns=columns)
        table = pd.DataFrame(rows)
        table["rank"] = (table.groupby("kind")["score_loss"]
                         .rank(ascending=False, method="min", na_option="bottom")
                         .astype(int))
        return table.sort_values(["kind", "rank", "element"], kind="stable")[columns] \
            .reset_index(drop=True)

    # -- sets within a budget

    def greedy(self, budget: float, pool=None) -> dict:
        """Greedy set within ``budget``: each step adds the candidate with the best gain in
        score per cost, re-evaluating every remaining candidate with the set chosen so far.

        Stops when no affordable candidate raises the score. A candidate of cost 0 with a
        positive gain goes first.

        Returns
        -------
        CorridorSet
            ``method="greedy"``: ``chosen`` in the order added, with its ``steps``.
        """
        cost = self.candidates.cost
        pool = list(range(self.candidates.n)) if pool is None else [int(c) for c in pool]
        chosen: list[int] = []
        spent, current, steps = 0.0, 0.0, []
        while True:
            options = [c for c in pool if c not in chosen
                       and cost[c] <= budget - spent + 1e-12 * max(1.0, abs(budget))]
            if not options:
                break
            trial = {c: Variant.of(add=chosen + [c]) for c in options}
            self.evaluate(trial.values(), desc=f"greedy step {len(chosen) + 1}")
            best, best_key = None, None
            for c in options:
                gain = self.score(trial[c]) - current
                if not gain > _TOL:
                    continue
                key = (_per_cost(gain, cost[c]), gain, -cost[c], -c)
                if best_key is None or key > best_key:
                    best, best_key = c, key
            if best is None:
                break
            gain = best_key[1]
            chosen.append(best)
            spent += float(cost[best])
            current += gain
            steps.append({"corridor_id": str(self.candidates.ids[best]), "gain": gain,
                          "cost": float(cost[best]), "score": current})
        return CorridorSet("greedy", tuple(chosen), spent, current, steps=tuple(steps))

    def exhaustive(self, budget: float, pool=None, *, limit: int = EXHAUSTIVE_LIMIT) -> dict:
        """The exact best set within ``budget``: every affordable subset is run.

        Parameters
        ----------
        budget : float
        pool : sequence of int, optional
            Candidate positions to choose from (default all).
        limit : int
            Refuse more candidates than this (2^k runs).

        Returns
        -------
        CorridorSet
            ``method="exhaustive"``: ``chosen`` sorted, with ``subsets`` (how many were
            run). Ties go to the cheaper, then the smaller set.
        """
        cost = self.candidates.cost
        pool = np.asarray(list(range(self.candidates.n)) if pool is None else list(pool),
                          dtype=np.int64)
        if pool.size > limit:
            raise InputError(f"{pool.size} candidates are too many for an exhaustive search "
                             f"(2^{pool.size} runs); at most {limit}: simulate fewer with "
                             f"{param('screen', 'K')}, or rely on the greedy set",
                             field=param("exhaustive_limit"))
        masks = np.arange(1, 1 << pool.size, dtype=np.int64)
        bits = (masks[:, None] >> np.arange(pool.size)) & 1
        total = bits @ cost[pool] if pool.size else np.zeros(0)
        feasible = total <= budget + 1e-12 * max(1.0, abs(budget))
        subsets = [Variant.of(add=pool[b.astype(bool)]) for b in bits[feasible]]
        self.evaluate(subsets, desc="exhaustive search")
        best, best_key = Variant(), (0.0, 0.0, 0)
        for v in subsets:
            s = self.score(v)
            if not math.isfinite(s):
                continue
            key = (s, -float(cost[list(v.add)].sum()), -len(v.add))
            # a rounding-level improvement is not a better set: keep the cheaper one
            if key[0] > best_key[0] + _TOL or (abs(key[0] - best_key[0]) <= _TOL
                                               and key[1:] > best_key[1:]):
                best, best_key = v, key
        return CorridorSet("exhaustive", tuple(best.add), float(cost[list(best.add)].sum()),
                           float(best_key[0]) if best.add else 0.0, subsets=len(subsets))

    # -- screening

    def screen(self, k: int) -> list[int]:
        """Two-stage option: the ``k`` candidates with the best gain in λ_M per cost.

        λ_M needs no simulation (one eigenvalue per candidate); the relative gains of the
        two species are added. A candidate of cost 0 with a gain ranks first.

        Returns
        -------
        list of int
            Candidate positions, best first.
        """
        values = self.capacity_gains()
        per = np.array([_per_cost(g, c) for g, c in zip(values, self.candidates.cost)])
        order = np.lexsort((np.arange(per.size), -values, -per))
        return [int(c) for c in order[:max(int(k), 0)]]

    def capacity_gains(self) -> np.ndarray:
        """Relative gain in λ_M (prey + predator) of each candidate alone, shape (k,)."""
        base = capacity_of(self.study)
        out = np.zeros(self.candidates.n)
        for c in range(self.candidates.n):  # one eigen-solve per candidate, not per patch
            net = _variant_network(self.study.network, self._arrays, Variant.of(add=[c]))
            cap = capacity_of(self.study, net)
            out[c] = sum(_relative(cap[key] - base[key], base[key]) for key in base)
        return out


def _relative(change: float, base: float) -> float:
    return change / base if base > 0 else change


def _score(gains: dict, baseline: dict, weights: dict) -> float:
    total = 0.0
    for name, w in weights.items():
        g = gains[f"gain_{name}"]
        if name.endswith("_capacity"):
            g = _relative(g, baseline[name])
        # an undefined change (synchrony of runs that settle to a steady state) counts as none
        total += w * (g if math.isfinite(g) else 0.0)
    return total


def _per_cost(gain: float, cost: float) -> float:
    if not math.isfinite(gain):
        return math.nan
    if cost > 0:
        return gain / cost
    return math.inf if gain > _TOL else (-math.inf if gain < -_TOL else 0.0)


def rank_candidates(table: pd.DataFrame, chosen_ids=()) -> pd.DataFrame:
    """Add ``rank`` (1 = largest score; ties by relative predator λ_M gain, then lower cost)
    and ``chosen`` to an :meth:`Planner.add_one` table."""
    t = table.copy()
    key = pd.DataFrame({"score": t["score"].fillna(-np.inf),
                        "cap": t["gain_predator_capacity"].fillna(-np.inf),
                        "cost": -t["cost"]}, index=t.index)
    order = key.sort_values(["score", "cap", "cost"], ascending=False, kind="stable").index
    t.loc[order, "rank"] = np.arange(1, len(t) + 1)
    t["rank"] = t["rank"].astype(int)
    t.loc[t["status"] == "not simulated", "rank"] = 0
    t["chosen"] = t.index.isin([str(c) for c in chosen_ids])
    return t


__all__ += ["rank_candidates"]


# ------------------------------------------------------------------------------ comparison


def compare_results(results) -> pd.DataFrame:
    """Network-level results of several runs side by side.

    Parameters
    ----------
    results : sequence of RunResult

    Returns
    -------
    pandas.DataFrame
        One row per run, in order, indexed by ``scenario`` (its name; repeated names get
        "(2)", "(3)"); a ``file`` column, then every numeric or text summary value
        (flattened by :func:`trophoscape.io.tables.flatten_summary`: ``solver_nfev``,
        ``stability_leading_eigenvalue_real``; provenance left out), then ``mean_`` of every
        objective computed per patch (occupancy) and λ_M where the summary lacks it.
    """
    rows, names = [], []
    for r in results:
        row = {"file": None if r.study.scenario.path is None else str(r.study.scenario.path)}
        for key, value in flatten_summary(r.summary).items():
            if key == "scenario" or key.startswith("provenance"):
                continue
            row[key] = value
        for sp in SPECIES:
            row[f"{sp}_mean_occupancy"] = float(np.nanmean(
                r.patches[f"{sp}_occupancy"].to_numpy(float)))
            if f"{sp}_metapopulation_capacity" not in row:
                row[f"{sp}_metapopulation_capacity"] = capacity_of(r.study)[f"{sp}_capacity"]
        name = r.study.scenario.name
        n = 2
        base = name
        while name in names:
            name, n = f"{base} ({n})", n + 1
        names.append(name)
        rows.append(row)
    return pd.DataFrame(rows, index=pd.Index(names, name="scenario"))


def patch_differences(reference, other, columns=("predator_occupancy", "prey_occupancy")
                      ) -> pd.DataFrame:
    """Per-patch differences ``other − reference`` for the patches both runs share by id.

    Parameters
    ----------
    reference, other : RunResult
    columns : sequence of str
        Per-patch numeric (or boolean, taken as 0/1) columns.

    Returns
    -------
    pandas.DataFrame
        Indexed by ``patch_id`` in ``other``'s patch order (shared patches only): for each
        column C, ``C_reference``, ``C_other`` and ``C_difference``.
    """
    a, b = reference.patches, other.patches
    shared = b.index[b.index.isin(a.index)]
    out = pd.DataFrame(index=pd.Index(shared, name="patch_id"))
    for c in columns:
        if c not in a.columns or c not in b.columns:
            raise InputError(f"no per-patch column {c!r} in both runs; expected one of "
                             f"{', '.join(sorted(set(a.columns) & set(b.columns)))}",
                             field=param("columns"))
        va = a.loc[shared, c].astype(float).to_numpy()
        vb = b.loc[shared, c].astype(float).to_numpy()
        out[f"{c}_reference"] = va
        out[f"{c}_other"] = vb
        out[f"{c}_difference"] = vb - va
    return out


def read_link_list(path, study) -> list[tuple[int, int]]:
    """Links to test, from a CSV with columns ``source`` and ``target`` (patch ids).

    Returns
    -------
    list of (int, int)
        Patch positions; every pair must be linked in the scenario's network.

    Raises
    ------
    InputError
        Missing file or columns, an unknown patch id, a pair that is not linked.
    """
    path = Path(path)
    expected = "a CSV with columns source,target (patch ids of linked patches)"
    if not path.is_file():
        raise InputError(f"no such file; check the path, or give 'all' or 'none'; expected "
                         f"{expected}", file=path)
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.EmptyDataError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot be read ({type(exc).__name__}); expected {expected}",
                         file=path) from None
    table.columns = [str(c).strip() for c in table.columns]
    for column in ("source", "target"):
        if column not in table.columns:
            raise InputError(f"the table has no {column!r} column; add it: expected {expected}",
                             file=path, field=column)
    position = pd.Index(study.ids)
    ends = []
    for column in ("source", "target"):
        found = position.get_indexer(table[column].str.strip().to_numpy())
        if (found < 0).any():
            r = int(np.flatnonzero(found < 0)[0])
            raise InputError(f"no patch has id {table[column].iloc[r]!r}; use an id of the "
                             "patch file",
                             file=path, feature=r, field=column)
        ends.append(found)

    linked = {tuple(p) for p in study.network.linked_pairs().tolist()}
    pairs = []
    for r, (a, b) in enumerate(zip(*ends)):
        pair = (min(a, b), max(a, b))
        if pair not in linked:
            raise InputError(f"patches {table['source'].iloc[r]!r} and "
                             f"{table['target'].iloc[r]!r} are not linked; list only links of "
                             "the network (layer 'links' of a run's patches.gpkg)", file=path,
                             feature=r, field="target")
        pairs.append(pair)
    return pairs


@dataclass(frozen=True)
class CorridorSet:
    """A set of corridors one search chose.

    Attributes
    ----------
    method : {"greedy", "exhaustive"}
    chosen : tuple of int
        Candidate positions (the greedy set in the order added; the exhaustive one sorted).
    cost, score : float
        Total cost, and the score of the network with the set added.
    steps : tuple of dict
        Greedy only: per addition ``corridor_id``, ``gain``, ``cost`` and ``score`` after it.
    subsets : int or None
        Exhaustive only: how many subsets within the budget were run.
    """

    method: str
    chosen: tuple
    cost: float
    score: float
    steps: tuple = ()
    subsets: int | None = None

    def as_json(self, ids) -> dict:
        """The set as ``corridors.json`` holds it, with candidate ids."""
        extra = ({"steps": [dict(s) for s in self.steps]} if self.method == "greedy"
                 else {"subsets": self.subsets})
        return {"cost": self.cost, "score": self.score, **extra,
                "chosen": [str(ids[c]) for c in self.chosen]}


@dataclass(frozen=True)
class GreedyGap:
    """How far the greedy set falls short of the exhaustive one: ``absolute`` (in score),
    ``relative`` (of the best score; 0 when it is not positive), ``same_set``."""

    absolute: float
    relative: float
    same_set: bool

    @classmethod
    def between(cls, greedy: CorridorSet, exhaustive: CorridorSet) -> "GreedyGap":
        absolute = exhaustive.score - greedy.score
        return cls(absolute=absolute,
                   relative=absolute / exhaustive.score if exhaustive.score > 0 else 0.0,
                   same_set=sorted(greedy.chosen) == sorted(exhaustive.chosen))


@dataclass(frozen=True, eq=False)
class CorridorPlan:
    """What :func:`plan_corridors` found.

    Attributes
    ----------
    planner : Planner
        Its runs and their scores.
    table : pandas.DataFrame
        The candidates, ranked (as ``corridors.csv``).
    critical : pandas.DataFrame
        The remove-one table (as ``critical.csv``).
    greedy, exhaustive : CorridorSet
        The sets chosen by each search; ``exhaustive`` is None when the search did not run.
    best : CorridorSet
        The set reported as chosen: the exhaustive one when it ran, else the greedy one.
    gap : GreedyGap or None
        How far the greedy set falls short of the exhaustive one.
    screened : list or None
        Positions of the candidates simulated after screening (None: every candidate).
    budget : float
    timing : dict
        Seconds per stage, and the number of runs.
    links_file : Path or None
        The file the links to remove were read from (an input the output may not hold).
    """

    planner: "Planner"
    table: pd.DataFrame
    critical: pd.DataFrame
    greedy: CorridorSet
    exhaustive: CorridorSet | None
    best: CorridorSet
    gap: GreedyGap | None
    screened: list | None
    budget: float
    timing: dict
    links_file: Path | None = None


def check_plan_options(*, budget, screen=None, exhaustive_limit=12, workers=None,
                       weights=None) -> dict:
    """Refuse options a corridor plan cannot use, before anything runs; return the weights
    (:func:`parse_weights`)."""
    from .tasks import check_workers

    if isinstance(budget, bool) or not isinstance(budget, (int, float)) \
            or not math.isfinite(budget) or budget < 0:
        raise InputError(f"{budget!r} is out of range; give the total cost the chosen set "
                         "may reach, a number of at least 0 in the unit of 'cost'",
                         field=param("budget"))
    if screen is not None and (isinstance(screen, bool) or int(screen) != screen or screen < 1):
        raise InputError(f"{screen} is out of range; give how many candidates to "
                         "simulate, a whole number of at least 1", field=param("screen"))
    if isinstance(exhaustive_limit, bool) or int(exhaustive_limit) != exhaustive_limit \
            or exhaustive_limit < 0:
        raise InputError(f"{exhaustive_limit} is out of range; give a whole number of at "
                         "least 0 (0 turns the exhaustive search off)",
                         field=param("exhaustive_limit"))
    check_workers(workers)
    return parse_weights(weights)


def plan_corridors(study, candidates, *, budget, weights=None, links="all", patches=True,
                   screen=None, exhaustive_limit=12, workers=None, progress=False, log=None,
                   links_file=None):
    """Every step of the ``corridors`` command, without writing files.

    ``budget`` (at least 0, in the unit of the candidates' cost), ``screen`` (at least 1, or
    None for every candidate), ``exhaustive_limit`` (at least 0; 0 turns the exhaustive
    search off), ``workers`` (at least 1, or None for every core) and ``weights`` (a mapping
    or ``"NAME=WEIGHT,..."``) are checked here (:func:`check_plan_options`).

    ``links_file``: the file ``links`` was read from (:func:`read_link_list`), an input the
    output folder must not hold (kept in the plan as ``links_file``).

    Returns
    -------
    CorridorPlan
    """
    weights = check_plan_options(budget=budget, screen=screen, exhaustive_limit=exhaustive_limit,
                                 workers=workers, weights=weights)
    timing = {}
    t = time.perf_counter()
    planner = Planner(study, candidates, weights=weights, workers=workers, progress=progress,
                      log=log)
    timing["baseline_seconds"] = time.perf_counter() - t
    pool = None
    capacity_gain = None
    if screen is not None and screen < candidates.n:
        t = time.perf_counter()
        pool = planner.screen(screen)
        capacity_gain = planner.capacity_gains()
        timing["screen_seconds"] = time.perf_counter() - t
    t = time.perf_counter()
    table = planner.add_one(pool)
    timing["add_one_seconds"] = time.perf_counter() - t
    if capacity_gain is not None:
        table["screen_capacity_gain"] = capacity_gain
    t = time.perf_counter()
    greedy = planner.greedy(budget, pool)
    timing["greedy_seconds"] = time.perf_counter() - t
    simulated = candidates.n if pool is None else len(pool)
    exhaustive = None
    if 0 < simulated <= exhaustive_limit:
        t = time.perf_counter()
        exhaustive = planner.exhaustive(budget, pool, limit=exhaustive_limit)
        timing["exhaustive_seconds"] = time.perf_counter() - t
    best = exhaustive if exhaustive is not None else greedy
    gap = None if exhaustive is None else GreedyGap.between(greedy, exhaustive)
    ids = candidates.ids
    table = rank_candidates(table, [ids[c] for c in best.chosen])
    table["in_greedy_set"] = table.index.isin([str(ids[c]) for c in greedy.chosen])
    t = time.perf_counter()
    critical = planner.remove_one(links=links, patches=patches)
    timing["remove_one_seconds"] = time.perf_counter() - t
    timing["runs"] = planner.runs
    timing["run_seconds"] = planner.run_seconds
    return CorridorPlan(planner=planner, table=table, critical=critical, greedy=greedy,
                        exhaustive=exhaustive, best=best, gap=gap, screened=pool,
                        budget=float(budget), timing=timing,
                        links_file=None if links_file is None else Path(links_file))


#: The ledger of a ranking's runs while it goes on (:func:`open_evaluations`); the
#: pattern also covers SQLite's journal files beside it.
PARTIAL = "corridors.partial.sqlite"
PARTIAL_FILES = PARTIAL + "*"
#: The columns of a ranking's runs in its ledger: the fingerprint of the scenario and
#: candidates (rows of another fingerprint are kept but not reused) and the variant's label.
EVALUATION_COLUMNS = {"fingerprint": "TEXT NOT NULL", "variant": "TEXT NOT NULL"}


def open_evaluations(path) -> Ledger:
    """The ledger of a corridor ranking's runs (:class:`trophoscape.io.ledger.Ledger`)."""
    return Ledger(path, EVALUATION_COLUMNS, allow_nan=True)


def evaluations_frame(path) -> pd.DataFrame:
    """Every run in a ranking's ledger, in the order run: ``fingerprint``, ``variant`` (ids
    of the corridors added, links cut and patches lost, JSON), the objectives, ``status``
    ("ok", or "failed: " and the reason), ``finished`` (UTC, ISO 8601)."""
    ledger = open_evaluations(path)
    try:
        rows = ledger.rows()
    finally:
        ledger.close()
    records = [{"fingerprint": r["fingerprint"], "variant": r["variant"],
                **{k: r["results"].get(k, math.nan) for k in OBJECTIVES},
                "status": "ok" if r["status"] == "ok" else f"failed: {r['error']}",
                "finished": r["finished"]} for r in rows]
    return pd.DataFrame.from_records(
        records, columns=["fingerprint", "variant", *OBJECTIVES, "status", "finished"])
