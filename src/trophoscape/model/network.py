"""Links between patches, dispersal kernels and the per-species movement operators.

A :class:`Network` holds directed arcs between patches in the fixed patch order of the
landscape: kernel links between every pair of patches within ``max_distance_km`` (found through
a spatial index), corridors (lines joining two patches) and rows of a links table. An
undirected link is stored as two arcs. :func:`movement_operator` turns the arcs into the
sparse matrix ``M`` of ``dx/dt = M x`` for one species.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import geopandas
import networkx as nx
import numpy as np
import pandas as pd
import scipy.sparse
import shapely
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ..errors import InputError, allowed_range
from ..machine import cores
from .landscape import Landscape, read_corridors, read_links_table
from .resistance import CORRIDOR_RESISTANCE, corridor_resistances

__all__ = [
    "Network",
    "KERNELS",
    "kernel_weight",
    "build_network",
    "arc_weights",
    "movement_operator",
]


def _exponential(d, scale):
    return np.exp(-d / scale)


def _gaussian(d, scale):
    return np.exp(-(d * d) / (2.0 * scale * scale))


def _step(d, scale):
    return np.ones(np.broadcast(d, scale).shape)


#: Dispersal kernels: name -> f(distance_km, scale_km), both broadcast as arrays.
KERNELS = {"exponential": _exponential, "gaussian": _gaussian, "step": _step}
_KERNEL_NAMES = (*KERNELS, "none")
_DISTANCES = ("boundary", "centroid")
_ORIGINS = ("corridor", "kernel", "table")  # sorted: _edge_table codes by searchsorted
_CODE = {name: k for k, name in enumerate(_ORIGINS)}


def kernel_weight(kernel: str, distance_km, scale_km) -> np.ndarray:
    """Weight of a link of length ``distance_km`` under a dispersal kernel.

    Parameters
    ----------
    kernel : {"exponential", "gaussian", "step"}
    distance_km : array_like, shape (m,)
    scale_km : float or array_like, shape (m,)
        Kernel scale L > 0.

    Returns
    -------
    ndarray of float64, shape (m,)
        ``exp(-d/L)``, ``exp(-d²/(2L²))`` or 1.

    Examples
    --------
    >>> kernel_weight("exponential", [0.0, 2.0], 2.0).round(4).tolist()
    [1.0, 0.3679]
    """
    if kernel not in KERNELS:
        raise InputError(f"unknown kernel {kernel!r}; give one of "
                         f"{', '.join(map(repr, KERNELS))}", field="dispersal.kernel")
    d = np.asarray(distance_km, dtype=np.float64)
    return KERNELS[kernel](d, np.asarray(scale_km, dtype=np.float64))


@dataclass(frozen=True, eq=False)
class Network:
    """Directed arcs between patches, in the fixed patch order.

    Attributes
    ----------
    ids : ndarray of str, shape (n_patches,)
    source, target : ndarray of int64, shape (n_arcs,)
        Arc i -> j as patch positions; an undirected link is two arcs. Sorted by
        (source, target); parallel arcs (say a kernel link and a corridor) are two routes.
    distance_km : ndarray of float64, shape (n_arcs,)
        Straight boundary or centroid distance; a corridor's length for a corridor.
    weight : ndarray of float64, shape (n_arcs,)
        Fixed weight; NaN means "the species' kernel of ``effective_distance_km``".
    survival : ndarray of float64, shape (n_arcs,)
        Fixed share surviving the trip; NaN means ``survival_per_km ** effective_distance_km``.
    origin : ndarray of str, shape (n_arcs,)
        "kernel", "corridor" or "table".
    kernel : str
        "exponential", "gaussian", "step" or "none".
    max_distance_km : float
        No kernel link with a longer effective distance.
    effective_distance_km : ndarray of float64, shape (n_arcs,)
        The distance the arc acts as for kernels and transit survival: ``distance_km`` times
        the matrix resistance, the least-cost distance over a resistance surface, or a
        corridor's length times its resistance. Default (None): ``distance_km``.
    """

    ids: np.ndarray
    source: np.ndarray
    target: np.ndarray
    distance_km: np.ndarray
    weight: np.ndarray
    survival: np.ndarray
    origin: np.ndarray
    kernel: str
    max_distance_km: float
    effective_distance_km: np.ndarray | None = None

    def __post_init__(self):
        arrays = {
            "ids": np.asarray(self.ids, dtype=str),
            "source": np.asarray(self.source, dtype=np.int64),
            "target": np.asarray(self.target, dtype=np.int64),
            "distance_km": np.asarray(self.distance_km, dtype=np.float64),
            "weight": np.asarray(self.weight, dtype=np.float64),
            "survival": np.asarray(self.survival, dtype=np.float64),
            "origin": np.asarray(self.origin, dtype=str),
        }
        arrays["effective_distance_km"] = (
            arrays["distance_km"].copy() if self.effective_distance_km is None
            else np.asarray(self.effective_distance_km, dtype=np.float64))
        m = arrays["source"].shape
        for name in ("target", "distance_km", "weight", "survival", "origin",
                     "effective_distance_km"):
            if arrays[name].shape != m:
                raise ValueError(f"Network.{name} has shape {arrays[name].shape}, expected {m}")
        n = arrays["ids"].size
        if m[0] and (min(arrays["source"].min(), arrays["target"].min()) < 0
                     or max(arrays["source"].max(), arrays["target"].max()) >= n):
            raise ValueError(f"Network arcs must join patch positions 0..{n - 1}")
        if self.kernel not in _KERNEL_NAMES:
            raise ValueError(f"Network.kernel must be one of {_KERNEL_NAMES}, got {self.kernel!r}")
        for name, array in arrays.items():
            array.flags.writeable = False
            object.__setattr__(self, name, array)

    @property
    def n_patches(self) -> int:
        return int(self.ids.size)

    #: The per-arc arrays, in the order :meth:`select` and :meth:`merged` keep them.
    ARC_FIELDS = ("source", "target", "distance_km", "effective_distance_km", "weight",
                  "survival", "origin")

    def select(self, keep) -> "Network":
        """The network with only the arcs ``keep`` (a boolean mask or positions), in order."""
        keep = np.asarray(keep)
        return Network(ids=self.ids, kernel=self.kernel, max_distance_km=self.max_distance_km,
                       **{f: getattr(self, f)[keep] for f in self.ARC_FIELDS})

    @property
    def n_arcs(self) -> int:
        return int(self.source.size)

    @property
    def n_links(self) -> int:
        """Number of distinct unordered pairs of patches that are linked."""
        return int(self._pairs()[0].size)

    def pair_codes(self, a=None, b=None) -> np.ndarray:
        """One integer per unordered pair of positions ``{a, b}``, ``min * n + max`` (the
        same for ``a -> b`` and ``b -> a``); without arguments, of every arc."""
        a = self.source if a is None else np.asarray(a, dtype=np.int64)
        b = self.target if b is None else np.asarray(b, dtype=np.int64)
        return np.minimum(a, b) * max(self.n_patches, 1) + np.maximum(a, b)

    def arc_codes(self, a=None, b=None) -> np.ndarray:
        """One integer per ordered pair ``a -> b``, ``a * n + b``; without arguments, of
        every arc."""
        a = self.source if a is None else np.asarray(a, dtype=np.int64)
        b = self.target if b is None else np.asarray(b, dtype=np.int64)
        return a * max(self.n_patches, 1) + b

    def positions_of(self, codes) -> tuple[np.ndarray, np.ndarray]:
        """The two positions of pair or arc codes: ``(code // n, code % n)``."""
        n = max(self.n_patches, 1)
        codes = np.asarray(codes)
        return codes // n, codes % n

    def linked_pairs(self) -> np.ndarray:
        """Distinct unordered linked pairs ``(lo, hi)``, shape (n_links, 2), sorted."""
        return np.stack(self._pairs(), axis=1)

    def _pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """Distinct unordered linked pairs (lo, hi), each shape (n_links,), sorted."""
        return self.positions_of(np.unique(self.pair_codes()))

    def links_per_patch(self) -> np.ndarray:
        """Number of distinct patches linked to each patch (either direction).

        Returns
        -------
        ndarray of int64, shape (n_patches,)
        """
        lo, hi = self._pairs()
        n = self.n_patches
        return np.bincount(lo, minlength=n) + np.bincount(hi, minlength=n)

    def is_symmetric(self) -> bool:
        """True when every arc i -> j has an arc j -> i (no one-way table rows)."""
        return np.array_equal(np.unique(self.arc_codes()),
                              np.unique(self.arc_codes(self.target, self.source)))

    def summary(self) -> dict:
        """Network-level figures.

        Returns
        -------
        dict
            ``patches``, ``links`` (distinct linked pairs), ``components`` (weakly connected)
            and ``isolated`` (ids of patches without any link).
        """
        n = self.n_patches
        graph = scipy.sparse.coo_array((np.ones(self.n_arcs), (self.source, self.target)),
                                       shape=(n, n)).tocsr()
        components = connected_components(graph, directed=True, connection="weak")[0] if n else 0
        return {
            "patches": n,
            "links": self.n_links,
            "components": int(components),
            "isolated": [str(i) for i in self.ids[self.links_per_patch() == 0]],
        }

    def _edge_table(self, directed: bool) -> pd.DataFrame:
        """One row per linked pair (ordered if ``directed``): a, b, distance_km, origin.

        Parallel routes are merged: the shortest distance and the shortest effective
        distance, and the origins joined by "+".
        """
        if directed:
            a, b = self.source, self.target
        else:
            a, b = np.minimum(self.source, self.target), np.maximum(self.source, self.target)
        key = a * max(self.n_patches, 1) + b
        order = np.argsort(key, kind="stable")
        key = key[order]
        start = np.flatnonzero(np.r_[True, key[1:] != key[:-1]]) if key.size else key
        code = np.searchsorted(_ORIGINS, self.origin[order])  # _ORIGINS is sorted
        # one bit per origin, OR-ed over a pair's routes, then named by a lookup table
        mask = np.bitwise_or.reduceat(1 << code, start) if key.size else code
        names = np.array(["+".join(o for k, o in enumerate(_ORIGINS) if m >> k & 1)
                          for m in range(1 << len(_ORIGINS))])
        return pd.DataFrame({
            "a": a[order][start], "b": b[order][start],
            "distance_km": (np.minimum.reduceat(self.distance_km[order], start)
                            if key.size else np.empty(0)),
            "effective_distance_km": (
                np.minimum.reduceat(self.effective_distance_km[order], start)
                if key.size else np.empty(0)),
            "origin": names[mask],
        })

    def pair_table(self) -> pd.DataFrame:
        """One row per linked pair, sorted by :meth:`pair_codes`: positions ``a < b``, the
        shortest ``distance_km`` and ``effective_distance_km`` of its routes, ``origin``."""
        return self._edge_table(directed=False)

    def to_networkx(self) -> nx.Graph:
        """The network as a networkx graph.

        Returns
        -------
        networkx.Graph or networkx.DiGraph
            Nodes are the ids in patch order with attribute ``index``; edges carry
            ``distance_km`` and ``effective_distance_km`` (shortest route) and ``origin`` ("kernel", "corridor", "table",
            joined by "+" for parallel routes). A DiGraph when some arc has no reverse
            (a one-way links-table row), else a Graph.
        """
        directed = not self.is_symmetric()
        graph = nx.DiGraph() if directed else nx.Graph()
        edges = self._edge_table(directed)
        names = self.ids.tolist()
        graph.add_nodes_from((name, {"index": i}) for i, name in enumerate(names))
        graph.add_edges_from(
            (names[a], names[b], {"distance_km": d, "effective_distance_km": e, "origin": o})
            for a, b, d, e, o in zip(edges["a"].tolist(), edges["b"].tolist(),
                                     edges["distance_km"].tolist(),
                                     edges["effective_distance_km"].tolist(),
                                     edges["origin"].tolist())
        )
        return graph

    def links_frame(self, landscape: Landscape) -> geopandas.GeoDataFrame:
        """One line per distinct linked pair, for maps and GIS layers.

        Parameters
        ----------
        landscape : Landscape
            The landscape the network was built from.

        Returns
        -------
        geopandas.GeoDataFrame
            Columns ``source``, ``target`` (ids; source is the earlier patch), ``distance_km``
            (shortest straight route), ``origin``, ``effective_distance_km`` (shortest
            effective route); geometry a LineString between representative points
            (``shapely.point_on_surface``) of the two patches, in the landscape's CRS.
        """
        if not np.array_equal(landscape.ids, self.ids):
            raise ValueError("links_frame needs the landscape the network was built from "
                             "(its patch ids differ)")
        edges = self._edge_table(directed=False)
        a, b = edges["a"].to_numpy(), edges["b"].to_numpy()
        points = shapely.get_coordinates(shapely.point_on_surface(landscape.geometries))
        lines = shapely.linestrings(np.stack([points[a], points[b]], axis=1).reshape(-1, 2, 2))
        return geopandas.GeoDataFrame(
            {"source": self.ids[a], "target": self.ids[b],
             "distance_km": edges["distance_km"].to_numpy(),
             "origin": edges["origin"].to_numpy(),
             "effective_distance_km": edges["effective_distance_km"].to_numpy()},
            geometry=lines, crs=landscape.crs)


def build_network(landscape: Landscape, *, kernel="exponential", max_distance_km=15.0,
                  distance="boundary", corridors=None, links_table=None, corridor_snap_km=0.1,
                  base_dir=None, matrix_resistance=1.0,
                  corridor_resistance=None, resistance=None) -> Network:
    """Links between the patches of a landscape.

    Parameters
    ----------
    landscape : Landscape
    kernel : {"exponential", "gaussian", "step", "none"}
        Kernel links join every pair of patches within ``max_distance_km``; "none" makes none
        (the corridors and the links table alone then define the network).
    max_distance_km : float
        No kernel link with a longer effective distance (inclusive).
    distance : {"boundary", "centroid"}
        Edge-to-edge distance (0 for touching patches) or distance between centroids; used
        for kernel links and links-table rows. With a resistance surface, the effective
        distance is the least-cost distance from boundary to boundary either way.
    corridors : str or path, optional
        Lines joining two patches; see :func:`trophoscape.model.landscape.read_corridors`. Each end
        must lie within ``corridor_snap_km`` of a patch, the two ends at different patches.
        A corridor links both ways; its distance is its length and its effective distance its
        length times its resistance (:func:`corridor_resistances`); its weight is the kernel
        of its effective distance (1 when ``kernel="none"``); its survival the ``survival``
        attribute or, where empty, ``survival_per_km`` to the power of its effective
        distance.
    links_table : str or path, optional
        CSV of ``source,target,weight[,survival][,directed]``; see
        :func:`trophoscape.model.landscape.read_links_table`. Ids must be patch ids.
    corridor_snap_km : float
        How far a corridor end may be from its patch.
    base_dir : str or path, optional
        Folder that relative ``corridors`` / ``links_table`` paths are read from.
    matrix_resistance : float
        Without a resistance surface: the cost of crossing one km between patches relative
        to open ground (> 0); kernel links and links-table rows act as their distance times
        it.
    corridor_resistance : float, optional
        The cost of one km along a corridor (> 0), unless the corridor's ``resistance``
        attribute says otherwise; default :data:`CORRIDOR_RESISTANCE`.
    resistance : ResistanceSurface, optional
        A resistance surface (:func:`trophoscape.model.resistance.read_resistance`): kernel
        links then join the pairs whose least-cost distance is within ``max_distance_km``,
        and act as that distance; links-table rows act as their pair's least-cost distance.
        The corridors are burnt into it first (:meth:`ResistanceSurface.burned`), so that
        paths between other patches may use them too.

    Returns
    -------
    Network

    Raises
    ------
    InputError
        Bad options, or a problem in the corridors file or the links table.

    Notes
    -----
    Pairs come from a spatial index: ``shapely.STRtree`` with the ``dwithin`` predicate for
    boundary distances, ``scipy.spatial.cKDTree.query_pairs`` for centroids, so the cost is
    O(n log n + links), not O(n²).
    """
    if kernel not in _KERNEL_NAMES:
        raise InputError(f"unknown kernel {kernel!r}; give one of "
                         f"{', '.join(map(repr, _KERNEL_NAMES))}", field="dispersal.kernel")
    if distance not in _DISTANCES:
        raise InputError(f"unknown distance {distance!r}; give 'boundary' or 'centroid'",
                         field="dispersal.distance")
    max_distance_km = _nonnegative(max_distance_km, "dispersal.max_distance_km")
    corridor_snap_km = _nonnegative(corridor_snap_km, "dispersal.corridor_snap_km")
    matrix_resistance = _positive(matrix_resistance, "dispersal.matrix_resistance")
    corridor_resistance = _positive(
        CORRIDOR_RESISTANCE if corridor_resistance is None else corridor_resistance,
        "dispersal.corridor_resistance")

    parts = []
    ground = resistance
    if corridors is not None:
        lines, corridor_part = _corridor_arcs(landscape, _resolve(corridors, base_dir), kernel,
                                              corridor_snap_km * 1000.0, corridor_resistance)
        if resistance is not None:  # corridors are part of the ground to cross
            resistance = resistance.burned(lines.geometry.to_numpy(),
                                           corridor_resistances(lines, corridor_resistance))
    if kernel != "none":
        if resistance is not None:
            i, j, e = resistance.pairs_within(landscape, max_distance_km)
            if corridors is not None and i.size:
                i, j, e = _unburnt_ends(ground, landscape, corridor_part, i, j, e,
                                        max_distance_km)
            d = pair_distance_km(landscape, i, j, distance)
        else:
            i, j, d = _kernel_pairs(landscape, max_distance_km / matrix_resistance * 1000.0,
                                    distance)
            e = d * matrix_resistance
        nan = np.full(2 * i.size, np.nan)
        parts.append((np.concatenate([i, j]), np.concatenate([j, i]), np.concatenate([d, d]),
                      np.concatenate([e, e]), nan, nan, _CODE["kernel"]))
    if corridors is not None:
        parts.append(corridor_part)
    if links_table is not None:
        src, dst, d, weight, survival, code = _table_arcs(
            landscape, _resolve(links_table, base_dir), distance)
        e = (resistance.between(landscape, src, dst) if resistance is not None
             else d * matrix_resistance)
        parts.append((src, dst, d, e, weight, survival, code))

    if parts:
        source, target, dist, effective, weight, survival, origin = (
            np.concatenate([np.broadcast_to(p[k], p[0].shape) for p in parts])
            for k in range(7))
    else:
        source = target = np.empty(0, dtype=np.int64)
        dist = effective = weight = survival = np.empty(0)
        origin = np.empty(0, dtype=np.int64)
    order = np.lexsort((dist, origin, target, source))
    return Network(
        ids=landscape.ids, source=source[order], target=target[order],
        distance_km=dist[order], effective_distance_km=effective[order],
        weight=weight[order], survival=survival[order],
        origin=np.asarray(_ORIGINS)[origin[order]], kernel=kernel,
        max_distance_km=max_distance_km,
    )


def arc_weights(network: Network, *, scale_km) -> np.ndarray:
    """Weight of every arc for one species: the fixed weight, else its kernel.

    Parameters
    ----------
    network : Network
    scale_km : float or array_like, shape (n_patches,)
        Kernel scale L > 0, per source patch.

    Returns
    -------
    ndarray of float64, shape (n_arcs,)
    """
    weight = network.weight
    free = np.isnan(weight)
    if not free.any():
        return weight.copy()
    if network.kernel == "none":
        raise ValueError("an arc without a fixed weight in a network with kernel 'none'")
    scale = per_patch_array(scale_km, network.n_patches, "kernel_scale_km", positive=True)
    out = weight.copy()
    out[free] = kernel_weight(network.kernel, network.effective_distance_km[free],
                              scale[network.source[free]])
    return out


def movement_operator(network: Network, *, emigration_rate, scale_km,
                      survival_per_km) -> scipy.sparse.csr_array:
    """Sparse movement operator ``M`` of one species, with ``dx/dt = M x``.

    Parameters
    ----------
    network : Network
    emigration_rate : float or array_like, shape (n_patches,)
        Per-capita emigration rate ε >= 0 of each (source) patch, per time unit.
    scale_km : float or array_like, shape (n_patches,)
        Kernel scale L > 0 of each source patch (ignored for fixed weights).
    survival_per_km : float
        Share of dispersers surviving each km, in [0, 1] (for arcs without fixed survival).

    Returns
    -------
    scipy.sparse.csr_array, shape (n_patches, n_patches)

    Notes
    -----
    For each arc i -> j with weight w_ij and survival σ_ij::

        M[j, i] += ε_i · σ_ij · w_ij / Σ_k w_ik
        M[i, i] -= ε_i            if Σ_k w_ik > 0

    (the rule of the scenario contract, "Dispersal, exactly"). A patch with no arc of
    positive weight sends nobody. With every σ = 1 each column sums to zero, so the total is
    conserved; parallel arcs are separate routes and their entries add up.

    Examples
    --------
    >>> from trophoscape.testing import chain_landscape
    >>> net = build_network(chain_landscape(2, spacing_km=2.0, size_km=1.0), kernel="step")
    >>> movement_operator(net, emigration_rate=0.5, scale_km=1.0,
    ...                   survival_per_km=1.0).toarray().tolist()
    [[-0.5, 0.5], [0.5, -0.5]]
    """
    n = network.n_patches
    rate = per_patch_array(emigration_rate, n, "emigration_rate", positive=False)
    survival_per_km = float(survival_per_km)
    if not 0.0 <= survival_per_km <= 1.0:
        raise InputError(f"{survival_per_km!r} is out of range; give a number from 0 to 1",
                         field="survival_per_km")
    src, dst = network.source, network.target
    weight = arc_weights(network, scale_km=scale_km)
    survival = np.where(np.isnan(network.survival),
                        survival_per_km ** network.effective_distance_km, network.survival)
    total = np.bincount(src, weights=weight, minlength=n)
    sends = total > 0
    share = np.divide(weight, total[src], out=np.zeros_like(weight), where=total[src] > 0)
    leaving = np.flatnonzero(sends)
    rows = np.concatenate([dst, leaving])
    cols = np.concatenate([src, leaving])
    vals = np.concatenate([rate[src] * share * survival, -rate[leaving]])
    # coo -> csr sums the duplicates that parallel routes produce
    return scipy.sparse.coo_array((vals, (rows, cols)), shape=(n, n)).tocsr()


# ---------------------------------------------------------------- helpers


def _positive(value, key: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = np.nan
    if not (np.isfinite(number) and number > 0):
        raise InputError(f"{value!r} is out of range; give a number above 0", field=key)
    return number


def _nonnegative(value, key: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = np.nan
    if not (np.isfinite(number) and number >= 0):
        raise InputError(f"{value!r} is out of range; give a number of at least 0", field=key)
    return number


def per_patch_array(value, n: int, name: str, *, positive: bool) -> np.ndarray:
    """A number or an array of shape (n,) as a checked float array of shape (n,)."""
    array = np.asarray(value, dtype=np.float64)
    if array.ndim == 0:
        array = np.full(n, float(array))
    if array.shape != (n,):
        raise ValueError(f"{name} must be a number or an array of shape ({n},), "
                         f"got shape {array.shape}")
    bad = ~np.isfinite(array) | ((array <= 0) if positive else (array < 0))
    if bad.any():
        rule = allowed_range(0, None, positive)
        raise InputError(f"{float(array[bad][0])!r} is out of range; give {rule}",
                         feature=int(np.flatnonzero(bad)[0]), field=name)
    return array


def _resolve(path, base_dir) -> Path:
    path = Path(path)
    return path if base_dir is None or path.is_absolute() else Path(base_dir) / path


#: From this many patches the search for pairs within the kernel's reach and their boundary
#: distances run in chunks on as many threads as there are cores (shapely lets go of Python's
#: lock in both): the same pairs, in the same order, as in one call.
THREADED_MIN_PATCHES = 20_000


def _on_threads(part, size: int, n_patches: int):
    """``part(lo, hi)`` over ``[0, size)`` in consecutive chunks, one per core from
    :data:`THREADED_MIN_PATCHES` patches (else one call), concatenated in order along the
    last axis."""
    chunks = min(cores(), 8) if n_patches >= THREADED_MIN_PATCHES and size > 1 else 1
    if chunks == 1:
        return part(0, size)
    edges = np.linspace(0, size, chunks + 1).astype(np.int64)
    with ThreadPoolExecutor(chunks) as pool:
        parts = list(pool.map(part, edges[:-1], edges[1:]))
    return np.concatenate(parts, axis=-1)


def _pairs_within(geoms, max_m: float) -> np.ndarray:
    """Every pair of ``geoms`` within ``max_m`` of each other, both ways and each with
    itself, as shapely's ``STRtree.query(geoms, "dwithin")`` gives them: shape (2, k),
    sorted by the first row."""
    tree = shapely.STRtree(geoms)
    tree.query(geoms[:1], predicate="dwithin", distance=max_m)  # built before the threads

    def part(lo, hi):
        found = tree.query(geoms[lo:hi], predicate="dwithin", distance=max_m)
        found[0] += lo
        return found

    return _on_threads(part, geoms.size, geoms.size)


def _kernel_pairs(landscape: Landscape, max_m: float, distance: str):
    """Pairs i < j within ``max_m`` metres and their distance in km, each shape (k,)."""
    if distance == "centroid":
        tree = cKDTree(landscape.centroids)
        pairs = tree.query_pairs(r=max_m, output_type="ndarray").astype(np.int64)
        i, j = pairs[:, 0], pairs[:, 1]
        d = np.hypot(*(landscape.centroids[i] - landscape.centroids[j]).T)
    else:
        geoms = landscape.geometries
        found = _pairs_within(geoms, max_m)
        i, j = found[0].astype(np.int64), found[1].astype(np.int64)
        upper = i < j
        i, j = i[upper], j[upper]
        d = _on_threads(lambda lo, hi: shapely.distance(geoms[i[lo:hi]], geoms[j[lo:hi]]),
                        i.size, geoms.size)
    keep = d <= max_m  # the index is inclusive; keep the rule exact in floating point
    return i[keep], j[keep], d[keep] / 1000.0


def _unburnt_ends(ground, landscape, corridor_part, i, j, e, max_km):
    """Kernel links ``(i, j, e)`` found on the ground with the corridors burnt in, with the
    pairs a corridor joins measured on the ground without them: the corridor is that pair's
    own route (its arc), and its kernel link is the way across the ground beside it (as
    without a raster), not a second copy of the corridor."""
    n = landscape.n_patches
    a, b = corridor_part[0], corridor_part[1]
    ends = np.unique(np.concatenate([a, b]))
    src, dst, km = ground.pairs_from(landscape, ends, max_km)
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    key = lo * max(n, 1) + hi
    order = np.lexsort((km, key))
    key, km = key[order], km[order]
    first = np.r_[True, key[1:] != key[:-1]] if key.size else np.zeros(0, bool)
    plain_key, plain_km = key[first], km[first]  # sorted by key
    joined = np.unique(np.minimum(a, b) * max(n, 1) + np.maximum(a, b))
    codes = i * max(n, 1) + j  # i < j
    on_corridor = np.isin(codes, joined)
    pos = np.minimum(np.searchsorted(plain_key, codes), max(plain_key.size - 1, 0))
    found = plain_key.size > 0
    has_plain = (plain_key[pos] == codes) if found else np.zeros(codes.size, dtype=bool)
    e = np.where(on_corridor & has_plain, plain_km[pos] if found else e, e)
    keep = ~on_corridor | has_plain
    return i[keep], j[keep], e[keep]


def pair_distance_km(landscape: Landscape, i, j, distance: str) -> np.ndarray:
    """Straight distance (km) of pairs of patches: ``"boundary"`` (edge to edge) or
    ``"centroid"``."""
    if distance == "centroid":
        return np.hypot(*(landscape.centroids[i] - landscape.centroids[j]).T) / 1000.0
    return shapely.distance(landscape.geometries[i], landscape.geometries[j]) / 1000.0


def _corridor_arcs(landscape: Landscape, path: Path, kernel: str, snap_m: float,
                   corridor_resistance: float):
    lines = read_corridors(path, crs=landscape.crs)
    refs = lines["corridor_id"].to_numpy() if "corridor_id" in lines.columns else None
    geoms = lines.geometry.to_numpy()
    k = geoms.size
    a, b = snap_line_ends(landscape, geoms, snap_m, path=path,
                          ref=lambda c: _corridor_ref(refs, c))
    length_km = shapely.length(geoms) / 1000.0
    effective = length_km * corridor_resistances(lines, corridor_resistance)
    weight = np.full(k, 1.0 if kernel == "none" else np.nan)
    survival = (lines["survival"].to_numpy(dtype=np.float64) if "survival" in lines.columns
                else np.full(k, np.nan))
    return lines, (np.concatenate([a, b]), np.concatenate([b, a]), np.tile(length_km, 2),
                   np.tile(effective, 2), np.tile(weight, 2), np.tile(survival, 2),
                   _CODE["corridor"])



def snap_line_ends(landscape: Landscape, geoms, snap_m: float, *, path, ref, what=""):
    """The patches at the two ends of each line, ``(first_end, last_end)`` index arrays.

    Each end must lie within ``snap_m`` metres of a patch (an end on two overlapping patches
    takes the first in patch order), and the two ends at different patches; otherwise an
    InputError names the file, the line (``ref(c)``) and the field 'geometry'. ``what``
    starts the message (e.g. "the candidate joins fewer than two patches: ").
    """
    k = geoms.size
    ends = np.concatenate([shapely.get_point(geoms, 0), shapely.get_point(geoms, -1)])
    tree = shapely.STRtree(landscape.geometries)
    # the index needs a positive search radius; an end inside a patch is at distance 0
    (which, patch), gap = tree.query_nearest(ends, max_distance=max(snap_m, 1e-6),
                                             return_distance=True, all_matches=True)
    order = np.lexsort((patch, which))
    which, patch, gap = which[order], patch[order], gap[order]
    first = np.r_[True, which[1:] != which[:-1]] if which.size else which.astype(bool)
    near = first & (gap <= snap_m)
    nearest = np.full(2 * k, -1, dtype=np.int64)
    nearest[which[near]] = patch[near]
    loose = np.flatnonzero(nearest < 0)
    if loose.size:
        e = int(loose[0])
        x, y = shapely.get_coordinates(ends[e])[0]
        raise InputError(
            f"{what}its {'first' if e < k else 'last'} point ({x:.1f}, {y:.1f}) is not within "
            f"{snap_m / 1000:g} km of any patch; each end "
            f"{'must' if what else 'of a corridor must'} lie on or near a patch: move the "
            "point onto its patch, or raise [dispersal] corridor_snap_km",
            file=path, feature=ref(e % k), field="geometry")
    a, b = nearest[:k], nearest[k:]
    same = np.flatnonzero(a == b)
    if same.size:
        c = int(same[0])
        raise InputError(
            f"{what}both ends lie at patch {landscape.feature(int(a[c]))!r}; a corridor must "
            "join two different patches: move one end to the other patch", file=path,
            feature=ref(c), field="geometry")
    return a, b


def _corridor_ref(refs, c: int):
    return str(refs[c]) if refs is not None else int(c)


def _table_arcs(landscape: Landscape, path: Path, distance: str):
    table = read_links_table(path)
    position = pd.Index(landscape.ids)
    ends = {}
    for column in ("source", "target"):
        found = position.get_indexer(table[column].to_numpy())
        unknown = np.flatnonzero(found < 0)
        if unknown.size:
            r = int(unknown[0])
            sample = ", ".join(repr(str(i)) for i in landscape.ids[:3])
            raise InputError(f"no patch has id {table[column].iloc[r]!r}; use an id of the "
                             f"patch file (e.g. {sample})", file=path, feature=r,
                             field=column)
        ends[column] = found.astype(np.int64)
    s, t = ends["source"], ends["target"]
    loop = np.flatnonzero(s == t)
    if loop.size:
        r = int(loop[0])
        raise InputError(f"links patch {table['source'].iloc[r]!r} to itself; give two "
                         "different patches or drop the row", file=path, feature=r,
                         field="target")
    both = ~table["directed"].to_numpy(dtype=bool)
    rows = np.concatenate([np.arange(len(table)), np.flatnonzero(both)])
    src = np.concatenate([s, t[both]])
    dst = np.concatenate([t, s[both]])
    key = src * landscape.n_patches + dst
    order = np.argsort(key, kind="stable")
    repeat = np.flatnonzero(key[order][1:] == key[order][:-1])
    if repeat.size:
        p = int(repeat[0])
        first, again = sorted((int(rows[order[p]]), int(rows[order[p + 1]])))
        raise InputError(f"links {str(landscape.ids[src[order[p]]])!r} to "
                         f"{str(landscape.ids[dst[order[p]]])!r} again (also in feature {first}); "
                         "give each link once", file=path, feature=again, field="target")
    weight = table["weight"].to_numpy(dtype=np.float64)[rows]
    survival = table["survival"].to_numpy(dtype=np.float64)[rows]
    return (src, dst, pair_distance_km(landscape, src, dst, distance), weight, survival,
            _CODE["table"])


# ---------------------------------------------------------------- variants of a network


def with_links(network: Network, source, target, distance_km, *, weight=None, survival=None,
               origin: str = "corridor", both_ways: bool = True,
               effective_distance_km=None) -> Network:
    """A new network with extra links; ``network`` is left as it was.

    Parameters
    ----------
    network : Network
    source, target : array_like of int, shape (k,)
        Patch positions of the new links' ends.
    distance_km : array_like of float, shape (k,)
        Length of each new link.
    weight : array_like of float, shape (k,), optional
        Fixed weights; NaN or None means "the species' kernel of the effective distance" (1
        for a network with kernel "none", which has no kernel to fall back on).
    survival : array_like of float, shape (k,), optional
        Fixed share surviving the trip; NaN or None means ``survival_per_km ** effective``.
    origin : {"corridor", "kernel", "table"}
    both_ways : bool
        Each new link is two arcs (i -> j and j -> i), as corridors are.
    effective_distance_km : array_like of float, shape (k,), optional
        The distance each new link acts as (default ``distance_km``).

    Returns
    -------
    Network
        Arcs re-sorted by (source, target) as :func:`build_network` sorts them; a link
        parallel to an existing one is a second route (their entries add up in
        :func:`movement_operator`).
    """
    if origin not in _ORIGINS:
        raise ValueError(f"origin must be one of {_ORIGINS}, got {origin!r}")
    s = np.asarray(source, dtype=np.int64).ravel()
    t = np.asarray(target, dtype=np.int64).ravel()
    d = np.broadcast_to(np.asarray(distance_km, dtype=np.float64), s.shape)
    e = d if effective_distance_km is None else np.broadcast_to(
        np.asarray(effective_distance_km, dtype=np.float64), s.shape)
    fallback = 1.0 if network.kernel == "none" else np.nan
    w = np.broadcast_to(np.asarray(np.nan if weight is None else weight, dtype=np.float64),
                        s.shape)
    w = np.where(np.isnan(w), fallback, w)
    sv = np.broadcast_to(np.asarray(np.nan if survival is None else survival,
                                    dtype=np.float64), s.shape)
    if both_ways:
        s, t = np.concatenate([s, t]), np.concatenate([t, s])
        d, e, w, sv = np.tile(d, 2), np.tile(e, 2), np.tile(w, 2), np.tile(sv, 2)
    source_ = np.concatenate([network.source, s])
    target_ = np.concatenate([network.target, t])
    dist = np.concatenate([network.distance_km, d])
    code = np.concatenate([np.searchsorted(_ORIGINS, network.origin),
                           np.full(s.size, _CODE[origin])])
    order = np.lexsort((dist, code, target_, source_))
    return Network(
        ids=network.ids, source=source_[order], target=target_[order], distance_km=dist[order],
        effective_distance_km=np.concatenate([network.effective_distance_km, e])[order],
        weight=np.concatenate([network.weight, w])[order],
        survival=np.concatenate([network.survival, sv])[order],
        origin=np.asarray(_ORIGINS)[code[order]], kernel=network.kernel,
        max_distance_km=network.max_distance_km)


def without(network: Network, *, patches=(), links=()) -> Network:
    """A new network without some links, or without every link of some patches.

    Parameters
    ----------
    network : Network
    patches : sequence of int
        Patch positions that lose every arc (in and out). The patches stay in the network,
        so positions and ids keep the fixed patch order; to model a lost patch, the caller
        also empties it (a patch with no links sends and receives nobody).
    links : sequence of (int, int)
        Unordered pairs of patch positions; every arc between the two (both directions,
        every route: kernel, corridor, table) is removed.

    Returns
    -------
    Network
    """
    keep = np.ones(network.n_arcs, dtype=bool)
    lost = np.asarray(list(patches), dtype=np.int64)
    if lost.size:
        keep &= ~(np.isin(network.source, lost) | np.isin(network.target, lost))
    pairs = np.asarray(list(links), dtype=np.int64).reshape(-1, 2)
    if pairs.size:
        keep &= ~np.isin(network.pair_codes(), network.pair_codes(pairs[:, 0], pairs[:, 1]))
    return network.select(keep)


__all__ += ["with_links", "without", "pair_distance_km"]
