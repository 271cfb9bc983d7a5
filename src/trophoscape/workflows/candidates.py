"""Candidate corridors found for the user: least-cost paths where the network is cut or thin.

``trophoscape corridors SCENARIO --candidates auto`` asks trophoscape to propose the
candidates itself. A pair of patches within ``[planning] search_km`` of each other (boundary
to boundary; default twice ``max_distance_km``) is a place for a corridor when the network
holds them at least :data:`WEAK_RATIO` times farther apart than the ground typically makes
such a gap: the shortest route between them along the links (in effective km) is at least
that many times their straight distance times the typical resistance (the matrix
resistance, or the resistance raster's median value), or there is none (they lie in
different connected groups). A river between two facing patches, crossed only far away, makes
such a place; so does a gap wider than ``max_distance_km``.

The places are taken shortest first, each patch in one candidate at most and each two
groups joined once, up to ``max_candidates``. Each candidate is drawn as the least-cost path
between the two patches over the resistance raster (the scenario's, with its corridors burnt
in), or as the shortest straight line between them without one. Its cost is its length times
``[planning] cost_per_km``, or the sum over its length of ``[planning] cost_raster`` (cost per
km of each cell) when given.

The result is an ordinary candidates table (``corridor_id``, ``cost``, lines), written as
``candidates.gpkg`` so that the user can edit it and run the command again with the file.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError, param

__all__ = ["find_candidates"]

#: A link that acts as this many times its straight length is weak (a candidate place).
WEAK_RATIO = 3.0


def find_candidates(study, *, max_candidates: int = 20):
    """Candidate corridors for a study (see the module notes).

    Parameters
    ----------
    study : Study
    max_candidates : int
        At most this many, shortest first.

    Returns
    -------
    geopandas.GeoDataFrame
        One row per candidate in the landscape's CRS: ``corridor_id`` ("auto01", ...),
        ``cost``, ``source`` and ``target`` (patch ids), ``length_km``, ``straight_km``
        (boundary to boundary), ``linked_as_km`` (the pair's present shortest route along
        the links, effective km; empty when there is none within reach), ``reason`` ("joins
        two groups" or "shortens a detour"); geometry a LineString from one patch's edge to
        the other's.

    Raises
    ------
    InputError
        ``max_candidates`` below 1, or nowhere to propose a corridor.
    """
    import geopandas
    import shapely
    from scipy.sparse import coo_array
    from scipy.sparse.csgraph import connected_components

    if isinstance(max_candidates, bool) or not isinstance(max_candidates, (int, np.integer)) \
            or max_candidates < 1:
        raise InputError(f"{max_candidates!r} is not a whole number of at least 1",
                         field=param("max_candidates"))
    sc = study.scenario
    land, net = study.landscape, study.network
    n = land.n_patches
    search_km = sc["planning.search_km"] or 2.0 * sc["dispersal.max_distance_km"]
    geoms = land.geometries
    i, j = shapely.STRtree(geoms).query(geoms, predicate="dwithin", distance=search_km * 1000)
    keep = i < j
    i, j = i[keep].astype(np.int64), j[keep].astype(np.int64)
    straight = shapely.distance(geoms[i], geoms[j]) / 1000.0
    graph = coo_array((np.ones(net.n_arcs), (net.source, net.target)), shape=(n, n))
    _, group = connected_components(graph, directed=False)
    apart = group[i] != group[j]
    # how far apart the network holds each pair: its shortest route along the links, in
    # effective km (inf between groups, or beyond what matters here)
    # what the ground typically makes of a straight km: the matrix resistance, or the
    # raster's median value (effective km are compared with effective km)
    surface = _surface(study)
    typical = (float(np.nanmedian(surface.values)) if surface is not None
               else sc["dispersal.matrix_resistance"])
    expected = typical * np.maximum(straight, 1e-3)
    along = _network_distance(net, i, j, limit=WEAK_RATIO * float(expected.max(initial=0.0)))
    place = along >= WEAK_RATIO * expected
    # shortest first; each patch in one candidate at most, each two groups joined once
    # ties broken by the patches' ids, so that the feature order does not matter
    ids = land.ids.astype(str)
    first_id = np.where(ids[i] <= ids[j], ids[i], ids[j])
    second_id = np.where(ids[i] <= ids[j], ids[j], ids[i])
    order = np.flatnonzero(place)
    order = order[np.lexsort((second_id[order], first_id[order], straight[order]))]
    used, joined, chosen = set(), set(), []
    for k in order.tolist():  # over the candidate places, not over patches
        a, b = int(i[k]), int(j[k])
        pair = (min(group[a], group[b]), max(group[a], group[b]))
        if a in used or b in used or (apart[k] and pair in joined):
            continue
        used.update((a, b))
        joined.add(pair)
        chosen.append(k)
        if len(chosen) == max_candidates:
            break
    chosen = np.asarray(chosen, dtype=np.int64)
    if not chosen.size:
        raise InputError(
            f"found no place for a corridor: every two patches within {search_km:g} km are "
            f"linked at less than {WEAK_RATIO:g} times their straight distance, directly or "
            "through others; raise [planning] search_km, or draw candidates yourself",
            file=sc.path, field="planning.search_km")
    # the pair's present route, for the table
    linked = np.where(np.isfinite(along), along, np.nan)
    # each candidate drawn from the patch with the smaller id
    swap = ids[i[chosen]] > ids[j[chosen]]
    i_c = np.where(swap, j[chosen], i[chosen])
    j_c = np.where(swap, i[chosen], j[chosen])
    lines = [_path(surface, land, int(a), int(b)) for a, b in zip(i_c, j_c)]
    lines = np.asarray(lines, dtype=object)
    length = shapely.length(lines) / 1000.0
    cost = _cost(sc, land, lines, length)
    width = max(2, len(str(chosen.size)))
    return geopandas.GeoDataFrame({
        "corridor_id": [f"auto{k + 1:0{width}d}" for k in range(chosen.size)],
        "cost": cost,
        "source": land.ids[i_c], "target": land.ids[j_c],
        "length_km": length, "straight_km": straight[chosen],
        "linked_as_km": linked[chosen],
        "reason": np.where(apart[chosen], "joins two groups", "shortens a detour"),
    }, geometry=list(lines), crs=land.crs)


def _network_distance(net, i, j, *, limit: float) -> np.ndarray:
    """Shortest route along the links from ``i[k]`` to ``j[k]`` (effective km; inf when
    longer than ``limit`` or not connected), by scipy's Dijkstra from each source, in
    blocks of sources so that memory stays bounded."""
    from scipy.sparse import coo_array
    from scipy.sparse.csgraph import dijkstra

    n = net.n_patches
    out = np.full(i.size, np.inf)
    edges = net.pair_table()
    if not len(edges) or not i.size:
        return out
    a, b = edges["a"].to_numpy(), edges["b"].to_numpy()
    w = np.maximum(edges["effective_distance_km"].to_numpy(), 1e-12)  # 0 would vanish
    graph = coo_array((w, (a, b)), shape=(n, n)).tocsr()
    sources = np.unique(i)
    block = max(1, (1 << 24) // max(n, 1))
    for start in range(0, sources.size, block):  # blocks of sources, not single patches
        part = sources[start:start + block]
        dist = dijkstra(graph, directed=False, indices=part, limit=limit)
        row = np.searchsorted(part, i)
        mine = (row < part.size) & (part[np.minimum(row, part.size - 1)] == i)
        out[mine] = dist[row[mine], j[mine]]
    return out


def _surface(study):
    """The study's resistance raster with its corridors burnt in (as the network was built
    on), or None."""
    if study.ground is None:
        return None
    sc = study.scenario
    if not sc["dispersal.corridors"]:
        return study.ground
    from ..model.landscape import read_corridors
    from ..model.resistance import corridor_resistances

    lines = read_corridors(sc.resolve(sc["dispersal.corridors"]), crs=study.landscape.crs)
    return study.ground.burned(lines.geometry.to_numpy(),
                               corridor_resistances(lines, sc["dispersal.corridor_resistance"]))


def _path(surface, land, a: int, b: int):
    """The line a candidate follows from patch ``a`` to patch ``b``."""
    import shapely

    if surface is None:
        return shapely.shortest_line(land.geometries[a], land.geometries[b])
    cells = surface.least_cost_path(land, a, b)
    t = surface.transform
    xy = np.column_stack([t.c + (cells[:, 1] + 0.5) * t.a, t.f + (cells[:, 0] + 0.5) * t.e])
    # from edge to edge: the ends moved onto the two outlines
    start = shapely.shortest_line(land.geometries[a], shapely.Point(xy[min(1, len(xy) - 1)]))
    end = shapely.shortest_line(shapely.Point(xy[max(len(xy) - 2, 0)]), land.geometries[b])
    points = np.vstack([shapely.get_coordinates(start)[:1], xy[1:-1],
                        shapely.get_coordinates(end)[-1:]])
    line = shapely.LineString(points) if len(points) >= 2 else shapely.shortest_line(
        land.geometries[a], land.geometries[b])
    return shapely.simplify(line, 0.5 * min(abs(t.a), abs(t.e)))


def _cost(sc, land, lines, length_km) -> np.ndarray:
    """``cost_per_km`` times the length, or the cost raster summed along each line."""
    if not sc["planning.cost_raster"]:
        return length_km * sc["planning.cost_per_km"]
    import shapely

    from ..model.resistance import read_resistance

    raster = read_resistance(sc.resolve(sc["planning.cost_raster"]), crs=land.crs,
                             patch_bounds=shapely.total_bounds(lines),
                             field="planning.cost_raster")
    step = 0.5 * min(abs(raster.transform.a), abs(raster.transform.e))
    out = np.empty(len(lines))
    for k, line in enumerate(lines):  # a few dozen candidates
        dense = shapely.segmentize(line, step)
        xy = shapely.get_coordinates(dense)
        mid = 0.5 * (xy[1:] + xy[:-1])
        seg = np.hypot(*(xy[1:] - xy[:-1]).T) / 1000.0
        r, c = raster.rowcol(mid[:, 0], mid[:, 1])
        out[k] = float(np.sum(raster.values[r, c] * seg))
    if not np.all(np.isfinite(out)):
        raise InputError("a candidate crosses cells of the cost raster without a value; give "
                         "every cell between the patches a cost", file=raster.path,
                         field="planning.cost_raster")
    return out
