"""Links, kernels and movement operators, checked against shapely, scipy and networkx."""

from __future__ import annotations

import json

import geopandas
import networkx as nx
import numpy as np
import pytest
import scipy.linalg
import scipy.stats
import shapely
from pyproj import Geod

from trophoscape.errors import InputError
from trophoscape.model.landscape import landscape_from_frame, read_patches
from trophoscape.model.network import (Network, arc_weights, build_network, kernel_weight,
                                       movement_operator)
from trophoscape.testing import chain_landscape, grid_landscape

UTM = "EPSG:32633"


def random_landscape(n=25, seed=3):
    """Rectangles of varied size scattered over 20 km x 20 km (some overlap or touch)."""
    rng = np.random.default_rng(seed)
    x = 500_000 + rng.uniform(0, 20_000, n)
    y = 5_000_000 + rng.uniform(0, 20_000, n)
    w, h = rng.uniform(200, 3000, (2, n))
    boxes = shapely.box(x, y, x + w, y + h)
    return landscape_from_frame(geopandas.GeoDataFrame(geometry=boxes, crs=UTM))


def brute_force_pairs(land, max_km, distance):
    """All ordered pairs i != j within max_km, by a double loop (tests only)."""
    geoms = land.frame.geometry.to_numpy()
    pairs = {}
    for i in range(land.n_patches):
        for j in range(land.n_patches):
            if i == j:
                continue
            if distance == "boundary":
                d = geoms[i].distance(geoms[j]) / 1000
            else:
                d = geoms[i].centroid.distance(geoms[j].centroid) / 1000
            if d <= max_km:
                pairs[(i, j)] = d
    return pairs


def write_lines(path, lines, properties=None, crs=UTM):
    frame = geopandas.GeoDataFrame(properties or {}, geometry=lines, crs=crs)
    frame.to_file(path, engine="pyogrio")
    return path


# ------------------------------------------------------------------ kernels


def test_kernels_match_scipy_distributions():
    # reference: scipy.stats — the exponential kernel is the survival function of an
    # exponential distribution with scale L; the gaussian kernel is a normal density
    # relative to its peak
    d = np.linspace(0, 20, 41)
    np.testing.assert_allclose(kernel_weight("exponential", d, 3.0),
                               scipy.stats.expon.sf(d, scale=3.0), rtol=1e-12)
    peak = scipy.stats.norm.pdf(0, scale=3.0)
    np.testing.assert_allclose(kernel_weight("gaussian", d, 3.0),
                               scipy.stats.norm.pdf(d, scale=3.0) / peak, rtol=1e-12)
    np.testing.assert_array_equal(kernel_weight("step", d, 3.0), np.ones_like(d))
    with pytest.raises(InputError) as err:
        kernel_weight("cauchy", d, 1.0)
    assert str(err.value) == ("field 'dispersal.kernel': unknown kernel 'cauchy'; give one "
                              "of 'exponential', 'gaussian', 'step'")


# ------------------------------------------------------------------ kernel links


@pytest.mark.parametrize("distance", ["boundary", "centroid"])
@pytest.mark.parametrize("max_km", [0.0, 1.5, 4.0])
def test_kernel_links_equal_brute_force_shapely(distance, max_km):
    # reference: shapely distance / centroid by an all-pairs loop on a small case
    land = random_landscape()
    net = build_network(land, kernel="exponential", max_distance_km=max_km, distance=distance)
    expected = brute_force_pairs(land, max_km, distance)
    got = dict(zip(zip(net.source.tolist(), net.target.tolist()), net.distance_km.tolist()))
    assert len(got) == net.n_arcs  # no parallel arcs without corridors
    assert got.keys() == expected.keys()
    np.testing.assert_allclose([got[k] for k in expected], list(expected.values()), rtol=1e-12,
                               atol=1e-12)
    assert (net.origin == "kernel").all()
    assert np.isnan(net.weight).all() and np.isnan(net.survival).all()
    keys = net.source * land.n_patches + net.target
    assert np.all(np.diff(keys) > 0)  # sorted by (source, target)


@pytest.mark.parametrize("max_km", [0.0, 1.5, 4.0])
def test_kernel_links_found_on_threads_are_those_found_in_one_call(monkeypatch, max_km):
    # consistency test: from network.THREADED_MIN_PATCHES the search and the distances run
    # in chunks on threads; the network must be the one built in one call, array for array,
    # and still the all-pairs result (reference: shapely distance by an all-pairs loop)
    import trophoscape.model.network as network_module

    land = random_landscape()
    one = build_network(land, kernel="exponential", max_distance_km=max_km)
    monkeypatch.setattr(network_module, "THREADED_MIN_PATCHES", 1)
    monkeypatch.setattr(network_module, "cores", lambda: 3)  # three chunks on any machine
    threaded = build_network(land, kernel="exponential", max_distance_km=max_km)
    for name in ("source", "target", "distance_km"):
        np.testing.assert_array_equal(getattr(threaded, name), getattr(one, name))
    expected = brute_force_pairs(land, max_km, "boundary")
    assert set(zip(threaded.source.tolist(), threaded.target.tolist())) == expected.keys()


def test_touching_patches_are_at_boundary_distance_zero():
    land = chain_landscape(3, spacing_km=1.0, size_km=1.0)  # squares sharing edges
    net = build_network(land, max_distance_km=0.0)
    assert net.n_links == 2
    np.testing.assert_array_equal(net.distance_km, 0.0)


def test_grid_link_count_on_a_large_grid():
    # a rows x cols lattice with nearest neighbours only has rows(cols-1) + cols(rows-1)
    # links (common practice; networkx.grid_2d_graph as the reference)
    rows, cols = 40, 50
    land = grid_landscape(rows, cols, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="step", max_distance_km=1.2)
    assert net.n_links == nx.grid_2d_graph(rows, cols).number_of_edges()
    assert net.summary()["components"] == 1


# ------------------------------------------------------------------ summary and networkx


def test_summary_and_networkx_components():
    # three clusters and one far patch
    boxes = [shapely.box(500_000 + dx, 5_000_000 + dy, 501_000 + dx, 5_001_000 + dy)
             for dx, dy in [(0, 0), (1500, 0), (0, 1500), (10_000, 0), (11_500, 0),
                            (30_000, 0), (30_000, 30_000)]]
    land = landscape_from_frame(
        geopandas.GeoDataFrame({"name": list("ABCDEFG")}, geometry=boxes, crs=UTM),
        id_field="name")
    net = build_network(land, kernel="step", max_distance_km=1.0)
    graph = net.to_networkx()
    assert isinstance(graph, nx.Graph) and not graph.is_directed()
    assert list(graph.nodes) == list("ABCDEFG")
    assert graph.nodes["D"]["index"] == 3
    # reference: networkx.number_connected_components
    summary = net.summary()
    assert summary["components"] == nx.number_connected_components(graph) == 4
    assert summary["links"] == graph.number_of_edges() == net.n_links
    assert summary["isolated"] == [n for n in graph if graph.degree(n) == 0]
    assert summary["isolated"] == ["F", "G"]
    np.testing.assert_array_equal(net.links_per_patch(), [graph.degree(n) for n in graph])
    assert graph.edges["A", "B"]["distance_km"] == pytest.approx(0.5)
    assert graph.edges["A", "B"]["origin"] == "kernel"


def test_pair_and_arc_codes():
    # linked_pairs against networkx's edge list of the same graph (reference: networkx);
    # the codes themselves are a consistency test of their definition
    land = grid_landscape(3, 4, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="exponential", max_distance_km=2.5)
    graph = nx.Graph()
    graph.add_nodes_from(range(net.n_patches))
    graph.add_edges_from(zip(net.source.tolist(), net.target.tolist()))
    edges = sorted(tuple(sorted(e)) for e in graph.edges)
    assert [tuple(p) for p in net.linked_pairs().tolist()] == edges
    np.testing.assert_array_equal(net.pair_codes(net.source, net.target),
                                  net.pair_codes(net.target, net.source))
    lo, hi = net.positions_of(net.pair_codes())
    np.testing.assert_array_equal(lo, np.minimum(net.source, net.target))
    np.testing.assert_array_equal(hi, np.maximum(net.source, net.target))
    a, b = net.positions_of(net.arc_codes())
    np.testing.assert_array_equal(a, net.source)
    np.testing.assert_array_equal(b, net.target)


def test_links_frame_lines_join_representative_points():
    land = grid_landscape(2, 2, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="step", max_distance_km=1.0)
    links = net.links_frame(land)
    assert len(links) == net.n_links == 4
    assert links.crs == land.crs
    assert list(links.columns) == ["source", "target", "distance_km", "origin",
                                   "effective_distance_km", "geometry"]
    inside = shapely.point_on_surface(land.frame.geometry.to_numpy())
    for row in links.itertuples():
        a, b = int(row.source), int(row.target)
        ends = shapely.get_coordinates(row.geometry)
        np.testing.assert_allclose(ends, shapely.get_coordinates(inside[[a, b]]))


# ------------------------------------------------------------------ movement operator


def test_columns_sum_to_zero_with_survival_one():
    land = random_landscape(n=30)
    net = build_network(land, kernel="gaussian", max_distance_km=3.0)
    rate = np.linspace(0.05, 0.5, land.n_patches)
    scale = np.linspace(0.5, 4.0, land.n_patches)
    M = movement_operator(net, emigration_rate=rate, scale_km=scale, survival_per_km=1.0)
    assert M.shape == (30, 30)
    # conservation of individuals (SCENARIO.md "Dispersal, exactly"; common practice)
    np.testing.assert_allclose(M.sum(axis=0), 0.0, atol=1e-15)
    has_links = net.links_per_patch() > 0
    np.testing.assert_allclose(M.diagonal(), np.where(has_links, -rate, 0.0))
    offdiag = M.toarray() - np.diag(M.diagonal())
    assert (offdiag >= 0).all()


def test_operator_entries_follow_the_dispersal_rule():
    # the rule written out for one patch of a chain: from patch 1, shares w_1j / sum_k w_1k
    land = chain_landscape(4, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="exponential", max_distance_km=3.5, distance="centroid")
    eps, L, s = 0.3, 2.0, 0.9
    M = movement_operator(net, emigration_rate=eps, scale_km=L, survival_per_km=s).toarray()
    d = np.array([2.0, 2.0])  # patch 1's neighbours 0 and 2 at 2 km (3 is 4 km away)
    w = np.exp(-d / L)
    np.testing.assert_allclose(M[[0, 2], 1], eps * w / w.sum() * s ** d)
    assert M[3, 1] == 0.0
    assert M[1, 1] == pytest.approx(-eps)


def test_total_decays_at_the_common_survival_rate():
    # reference: scipy.linalg.expm; with survival s on every arc and every patch linked the
    # total obeys dT/dt = -eps (1 - s) T (SCENARIO.md rule; common practice)
    land = grid_landscape(3, 4, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="exponential", max_distance_km=3.0, distance="centroid")
    assert (net.links_per_patch() > 0).all()
    eps = 0.4
    # all centroid distances here are 2 km or 2.83 km: fix survival per arc instead
    fixed = Network(ids=net.ids, source=net.source, target=net.target,
                    distance_km=net.distance_km, weight=net.weight,
                    survival=np.full(net.n_arcs, 0.8), origin=net.origin, kernel=net.kernel,
                    max_distance_km=net.max_distance_km)
    M = movement_operator(fixed, emigration_rate=eps, scale_km=1.5, survival_per_km=0.5)
    x0 = np.random.default_rng(1).uniform(10, 100, land.n_patches)
    for t in (0.5, 2.0, 7.0):
        total = (scipy.linalg.expm(M.toarray() * t) @ x0).sum()
        assert total == pytest.approx(x0.sum() * np.exp(-eps * (1 - 0.8) * t), rel=1e-10)


def test_isolated_patch_sends_and_receives_nobody():
    boxes = [shapely.box(500_000 + dx, 5_000_000, 501_000 + dx, 5_001_000)
             for dx in (0, 2000, 4000, 40_000)]
    land = landscape_from_frame(geopandas.GeoDataFrame(geometry=boxes, crs=UTM))
    net = build_network(land, kernel="exponential", max_distance_km=5.0)
    M = movement_operator(net, emigration_rate=0.5, scale_km=2.0, survival_per_km=0.95)
    dense = M.toarray()
    np.testing.assert_array_equal(dense[:, 3], 0.0)
    np.testing.assert_array_equal(dense[3, :], 0.0)
    assert net.summary()["isolated"] == ["3"]


@pytest.mark.parametrize("n", [2, 3, 7])
def test_step_kernel_on_a_path_is_the_random_walk_generator(n):
    # reference: networkx.path_graph; with the step kernel each patch splits its emigrants
    # evenly among its neighbours, so M = eps (A D^-1 - I) (common practice)
    land = chain_landscape(n, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="step", max_distance_km=1.5)
    eps = 0.2
    M = movement_operator(net, emigration_rate=eps, scale_km=1.0, survival_per_km=1.0)
    A = nx.to_numpy_array(nx.path_graph(n), nodelist=range(n))
    expected = eps * (A / A.sum(axis=0) - np.eye(n))
    np.testing.assert_allclose(M.toarray(), expected, atol=1e-15)


def test_symmetric_rates_relax_at_the_algebraic_connectivity():
    # reference: networkx.algebraic_connectivity, and Fiedler (1973), Czech. Math. J. 23:298
    # (from memory): with symmetric per-link rate D the slowest mode decays at D * lambda_2.
    # On a ring every patch has two neighbours, so the step kernel gives D = eps / 2; the
    # ring's Laplacian spectrum is 2 (1 - cos(2 pi k / n)) (common practice).
    n = 8
    angles = 2 * np.pi * np.arange(n) / n
    x = 500_000 + 5000 * np.cos(angles)
    y = 5_000_000 + 5000 * np.sin(angles)
    land = landscape_from_frame(geopandas.GeoDataFrame(
        geometry=shapely.buffer(shapely.points(x, y), 300), crs=UTM))
    side = 2 * 5 * np.sin(np.pi / n)
    net = build_network(land, kernel="step", max_distance_km=side * 1.01, distance="centroid")
    assert (net.links_per_patch() == 2).all()
    eps = 0.6
    M = movement_operator(net, emigration_rate=eps, scale_km=1.0, survival_per_km=1.0)
    eigen = np.sort(np.linalg.eigvals(M.toarray()).real)[::-1]
    lam2 = nx.algebraic_connectivity(nx.cycle_graph(n), method="tracemin_lu", tol=1e-12)
    assert lam2 == pytest.approx(2 * (1 - np.cos(2 * np.pi / n)), rel=1e-8)
    assert eigen[0] == pytest.approx(0.0, abs=1e-12)
    assert -eigen[1] == pytest.approx(eps / 2 * lam2, rel=1e-8)


def test_movement_operator_rejects_bad_rates():
    net = build_network(chain_landscape(3, spacing_km=2.0, size_km=1.0), max_distance_km=2.0)
    with pytest.raises(InputError) as err:
        movement_operator(net, emigration_rate=[0.1, -0.2, 0.1], scale_km=1.0,
                          survival_per_km=0.9)
    assert str(err.value) == ("feature 1: field 'emigration_rate': -0.2 is out of range; "
                              "give a number of at least 0")
    with pytest.raises(InputError) as err:
        movement_operator(net, emigration_rate=0.1, scale_km=1.0, survival_per_km=1.2)
    assert str(err.value) == ("field 'survival_per_km': 1.2 is out of range; give a number "
                              "from 0 to 1")


# ------------------------------------------------------------------ links table


def named_chain(n=4):
    land = chain_landscape(n, spacing_km=2.0, size_km=1.0)
    frame = land.frame.drop(columns=["patch_id", "area_km2"]).assign(
        name=[f"P{k}" for k in range(n)])
    return landscape_from_frame(frame, id_field="name")


def test_links_table_rows_and_directed_rows(tmp_path):
    land = named_chain(4)
    (tmp_path / "links.csv").write_text(
        "source,target,weight,survival,directed\n"
        "P0,P3,2.0,0.5,no\n"
        "P1, P2 ,1.0,,TRUE\n")
    net = build_network(land, kernel="none", links_table="links.csv", base_dir=tmp_path)
    assert list(zip(net.source.tolist(), net.target.tolist())) == [(0, 3), (1, 2), (3, 0)]
    np.testing.assert_array_equal(net.weight, [2.0, 1.0, 2.0])
    np.testing.assert_array_equal(net.survival[[0, 2]], [0.5, 0.5])
    assert np.isnan(net.survival[1])
    assert (net.origin == "table").all()
    # boundary distance between the squares (reference: shapely.distance)
    geoms = land.frame.geometry.to_numpy()
    assert net.distance_km[0] == pytest.approx(geoms[0].distance(geoms[3]) / 1000)
    graph = net.to_networkx()
    assert graph.is_directed()
    assert graph.has_edge("P1", "P2") and not graph.has_edge("P2", "P1")
    assert nx.number_weakly_connected_components(graph) == net.summary()["components"] == 2
    M = movement_operator(net, emigration_rate=0.1, scale_km=1.0, survival_per_km=0.9).toarray()
    assert M[2, 1] == pytest.approx(0.1 * 0.9 ** net.distance_km[1])
    assert M[1, 2] == 0.0 and M[2, 2] == 0.0  # P2 has no outgoing arc
    assert M[3, 0] == pytest.approx(0.1 * 0.5)


def test_links_table_adds_to_kernel_links_as_parallel_routes(tmp_path):
    land = named_chain(3)
    (tmp_path / "links.csv").write_text("source,target,weight\nP0,P1,3\n")
    net = build_network(land, kernel="exponential", max_distance_km=1.5,
                        links_table=tmp_path / "links.csv")
    assert net.n_arcs == 6 and net.n_links == 2
    assert list(net.origin[:2]) == ["kernel", "table"]
    w = arc_weights(net, scale_km=2.0)
    np.testing.assert_allclose(w[:2], [np.exp(-0.5), 3.0])
    assert net.to_networkx().edges["P0", "P1"]["origin"] == "kernel+table"


def raises(fn, *args, **kwargs) -> str:
    with pytest.raises(InputError) as err:
        fn(*args, **kwargs)
    return str(err.value)


def test_error_links_table_unknown_id(tmp_path):
    path = tmp_path / "links.csv"
    path.write_text("source,target,weight\nP0,P1,1\nP2,Q9,1\n")
    assert raises(build_network, named_chain(), links_table=path) == (
        f"{path}: feature 1: field 'target': no patch has id 'Q9'; use an id of the "
        "patch file (e.g. 'P0', 'P1', 'P2')")


def test_error_links_table_negative_weight(tmp_path):
    path = tmp_path / "links.csv"
    path.write_text("source,target,weight\nP0,P1,1\nP1,P2,-0.5\n")
    assert raises(build_network, named_chain(), links_table=path) == (
        f"{path}: feature 1: field 'weight': value -0.5 is out of range; give a number "
        "above 0")


def test_error_links_table_other_rows(tmp_path):
    path = tmp_path / "links.csv"
    land = named_chain()
    path.write_text("source,target,weight\nP1,P1,1\n")
    assert raises(build_network, land, links_table=path) == (
        f"{path}: feature 0: field 'target': links patch 'P1' to itself; give two "
        "different patches or drop the row")
    path.write_text("source,target,weight\nP0,P1,1\nP1,P0,2\n")
    assert raises(build_network, land, links_table=path) == (
        f"{path}: feature 1: field 'target': links 'P0' to 'P1' again (also in feature 0); "
        "give each link once")
    path.write_text("source,target,wieght\nP0,P1,1\n")
    assert raises(build_network, land, links_table=path) == (
        f"{path}: field 'wieght': unknown column (did you mean 'weight'?); expected columns "
        "source,target,weight[,survival][,directed]")
    path.write_text("source,target,weight,survival\nP0,P1,1,1.5\n")
    assert raises(build_network, land, links_table=path) == (
        f"{path}: feature 0: field 'survival': value 1.5 is out of range; give a number "
        "from 0 to 1")
    path.write_text("source,target,weight,directed\nP0,P1,1,maybe\n")
    assert raises(build_network, land, links_table=path) == (
        f"{path}: feature 0: field 'directed': value 'maybe' is not true/false; expected true, "
        "false, 1, 0, yes, no or empty (false)")
    missing = tmp_path / "none.csv"
    assert raises(build_network, land, links_table=missing) == (
        f"{missing}: no such file; check the path (relative to the scenario); expected a CSV "
        "table with columns source,target,weight[,survival][,directed]")


# ------------------------------------------------------------------ corridors


def test_corridor_links_both_ways_with_its_length(tmp_path):
    boxes = [shapely.box(500_000 + dx, 5_000_000, 501_000 + dx, 5_001_000)
             for dx in (0, 20_000, 40_000)]
    land = landscape_from_frame(geopandas.GeoDataFrame(geometry=boxes, crs=UTM))
    bend = shapely.LineString([(500_900, 5_000_500), (510_000, 5_004_000),
                               (520_050, 5_000_500)])  # ends 50 m outside patch 1
    straight = shapely.LineString([(521_000, 5_000_200), (540_000, 5_000_200)])
    path = write_lines(tmp_path / "corridors.gpkg", [bend, straight],
                       {"corridor_id": ["north", "south"], "survival": [0.7, None]})
    net = build_network(land, kernel="none", corridors=path)
    assert list(zip(net.source.tolist(), net.target.tolist())) == [(0, 1), (1, 0), (1, 2), (2, 1)]
    np.testing.assert_allclose(net.distance_km,
                               np.repeat([bend.length, straight.length], 2) / 1000)
    np.testing.assert_array_equal(net.weight, 1.0)
    np.testing.assert_array_equal(net.survival[:2], 0.7)
    assert np.isnan(net.survival[2:]).all()
    assert (net.origin == "corridor").all()
    assert net.summary()["components"] == 1
    with_kernel = build_network(land, kernel="exponential", max_distance_km=5, corridors=path)
    assert np.isnan(with_kernel.weight).all()


def test_corridor_in_lonlat_is_reprojected(tmp_path):
    # reference: pyproj.Geod.geometry_length for the corridor's geodesic length
    def patch(lon, lat):
        return shapely.segmentize(shapely.box(lon, lat, lon + 0.01, lat + 0.01), 0.001)

    doc = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {}, "geometry": shapely.geometry.mapping(p)}
        for p in (patch(10.30, 47.20), patch(10.50, 47.20))]}
    (tmp_path / "p.geojson").write_text(json.dumps(doc))
    land = read_patches(tmp_path / "p.geojson")
    line = shapely.segmentize(shapely.LineString([(10.305, 47.205), (10.505, 47.205)]), 0.001)
    path = write_lines(tmp_path / "c.geojson", [line], crs="EPSG:4326")
    net = build_network(land, kernel="none", corridors=path)
    geodesic = Geod(ellps="WGS84").geometry_length(line) / 1000
    np.testing.assert_allclose(net.distance_km, [geodesic] * 2, rtol=1e-3)


def test_error_corridor_touching_only_one_patch(tmp_path):
    land = chain_landscape(2, spacing_km=20.0, size_km=1.0)
    line = shapely.LineString([(500_000, 5_000_000), (510_000, 5_000_000)])
    path = write_lines(tmp_path / "c.geojson", [line], {"corridor_id": ["C1"]})
    assert raises(build_network, land, corridors=path) == (
        f"{path}: feature 'C1': field 'geometry': its last point (510000.0, 5000000.0) is not "
        "within 0.1 km of any patch; each end of a corridor must lie on or near a patch: "
        "move the point onto its patch, or raise [dispersal] corridor_snap_km")
    inside = shapely.LineString([(500_000, 5_000_000), (500_200, 5_000_300)])
    path = write_lines(tmp_path / "c2.geojson", [inside])
    assert raises(build_network, land, corridors=path) == (
        f"{path}: feature 0: field 'geometry': both ends lie at patch 0; a corridor must join "
        "two different patches: move one end to the other patch")


def test_error_corridor_geometry_and_survival(tmp_path):
    land = chain_landscape(2, spacing_km=20.0, size_km=1.0)
    path = write_lines(tmp_path / "c.geojson", [shapely.Point(500_000, 5_000_000)])
    assert raises(build_network, land, corridors=path) == (
        f"{path}: feature 0: field 'geometry': geometry type is Point; expected a LineString "
        "or MultiLineString: fix the feature or remove it")
    line = shapely.LineString([(500_000, 5_000_000), (520_000, 5_000_000)])
    path = write_lines(tmp_path / "s.geojson", [line], {"survival": [1.5]})
    assert raises(build_network, land, corridors=path) == (
        f"{path}: feature 0: field 'survival': value 1.5 is out of range; give a number "
        "from 0 to 1")


def test_bad_options_are_rejected():
    land = chain_landscape(2, spacing_km=2.0, size_km=1.0)
    assert raises(build_network, land, kernel="levy") == (
        "field 'dispersal.kernel': unknown kernel 'levy'; give one of 'exponential', "
        "'gaussian', 'step', 'none'")
    assert raises(build_network, land, distance="edge") == (
        "field 'dispersal.distance': unknown distance 'edge'; give 'boundary' or "
        "'centroid'")
    assert raises(build_network, land, max_distance_km=-1) == (
        "field 'dispersal.max_distance_km': -1 is out of range; give a number of at least 0")


def test_no_links_at_all():
    land = chain_landscape(3, spacing_km=10.0, size_km=1.0)
    net = build_network(land, kernel="none")
    assert net.n_arcs == 0 and net.n_links == 0
    M = movement_operator(net, emigration_rate=0.3, scale_km=1.0, survival_per_km=0.9)
    assert M.nnz == 0 and M.shape == (3, 3)
    assert net.summary() == {"patches": 3, "links": 0, "components": 3,
                             "isolated": ["0", "1", "2"]}
    assert len(net.links_frame(land)) == 0
