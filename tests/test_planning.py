"""Corridor planning and network comparison, on small landscapes built here.

The landscapes are rows of 1 km square patches 1.5 km apart (linked by the kernel, which
reaches 3 km) and "sink" patches farther out whose carrying capacity is below the prey
density at which the predator breaks even, N* = m / (a (e − m h)). Alone, a sink loses its
predator (its growth rate at the prey's carrying capacity, e f(K) − m, is negative:
Rosenzweig & MacArthur 1963, "Graphical representation and stability conditions of
predator-prey interactions", from memory); linked to the row it keeps predators that
immigrate. So a corridor to a sink "reconnects a patch that otherwise loses its predator".
"""

from __future__ import annotations

import base64
import json
from html.parser import HTMLParser

import geopandas
import networkx as nx
import numpy as np
import pandas as pd
import pyogrio
import pytest
import scipy.linalg
import shapely

import trophoscape as ts
import trophoscape.cli.program as cli
from trophoscape.workflows import planning as pl
from trophoscape.analysis.capacity import landscape_matrix, metapopulation_capacity
from trophoscape.errors import InputError
from trophoscape.report.html import CAUTION
from trophoscape.model.network import build_network, movement_operator, with_links, without
from trophoscape.scenario import parse_scenario
from trophoscape.testing import grid_landscape


def shown(exc) -> str:
    """An error as the command line prints it (options, where Python names parameters)."""
    from trophoscape.cli.program import FLAGS
    from trophoscape.errors import render_params

    return exc.render(FLAGS) if hasattr(exc, "render") else render_params(exc, FLAGS)

CRS = "EPSG:32633"
X0, Y0 = 500_000.0, 5_000_000.0
# Holling type II parameters of the test scenarios: N* = 0.4 / (0.05 (0.3 - 0.04)) = 30.8
# per km²; a sink of quality 0.15 has K = 22.5 < N*.
SINK_QUALITY = 0.15
ROW = [("A", 0.0, 1.0), ("B", 1.5, 1.0), ("C", 3.0, 1.0), ("D", 4.5, 1.0)]
# the facing edges of D (x = 4.5 ± 0.5 km) and of a 2 km sink S at x = 10 km
EDGES = {"D": 5.0, "S": 9.0}


def _square(x_km, size_km):
    h = size_km * 500.0
    return shapely.box(X0 + x_km * 1000 - h, Y0 - h, X0 + x_km * 1000 + h, Y0 + h)


def write_patches(folder, specs, name="patches.gpkg"):
    """specs: (id, x_km, size_km, quality); all patches on the line y = 0."""
    frame = geopandas.GeoDataFrame(
        {"patch_id": [s[0] for s in specs], "quality": [s[3] for s in specs]},
        geometry=[_square(s[1], s[2]) for s in specs], crs=CRS)
    path = folder / name
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    return path


def write_lines(folder, specs, centres, name="candidates.gpkg", **extra_columns):
    """specs: (corridor_id, patch_a, patch_b, cost, quality): centre-to-centre lines."""
    rows = []
    for cid, a, b, cost, quality in specs:
        line = shapely.LineString([(X0 + centres[a] * 1000, Y0), (X0 + centres[b] * 1000, Y0)])
        rows.append({"corridor_id": cid, "cost": cost, "quality": quality, "geometry": line})
    frame = geopandas.GeoDataFrame(rows, geometry="geometry", crs=CRS)
    for k, v in extra_columns.items():
        frame[k] = v
    path = folder / name
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    return path


def raw_scenario(patches, **sections):
    raw = {"patches": {"path": str(patches), "id_field": "patch_id", "quality_field": "quality"},
           "prey": {"capacity_density": 150.0, "initial_density": 100.0,
                    "kernel_scale_km": 1.0, "emigration_rate": 0.1},
           "predator": {"mortality_rate": 0.4, "conversion": 0.3, "initial_density": 10.0,
                        "kernel_scale_km": 5.0, "emigration_rate": 0.05},
           "predation": {"attack_rate": 0.05, "handling_time": 0.1},
           # corridors as easy to cross as open ground: the landscapes here were built
           # for corridors that act as their length (divided by their quality)
           "dispersal": {"max_distance_km": 3.0, "survival_per_km": 0.97,
                         "corridor_resistance": 1.0},
           "run": {"duration": 150.0, "burn_in": 75.0, "census_interval": 1.0},
           "analysis": {"stability": False, "capacity": False}}
    for k, v in sections.items():
        raw.setdefault(k, {}).update(v)
    return raw


def to_toml(raw) -> str:
    def value(v):
        return json.dumps(v) if isinstance(v, str) else repr(v).lower() if isinstance(v, bool) \
            else repr(v)

    lines = []
    for section, keys in raw.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {value(v)}" for k, v in keys.items()]
    return "\n".join(lines) + "\n"


def study_of(patches, **sections):
    return ts.build_study(parse_scenario(raw_scenario(patches, **sections),
                                         base_dir=patches.parent))


def centres_of(specs):
    return {s[0]: s[1] for s in specs}


def area_share(study, patch_id):
    # definition of area-weighted persistence: the persisting patches' share of the area
    # (common practice)
    area = study.landscape.area_km2
    return float(area[list(study.ids).index(patch_id)] / area.sum())


def run_cli(monkeypatch, *args):
    return cli.main([str(a) for a in args])


# ------------------------------------------------------------------ one sink: ranking


class _Page(HTMLParser):
    """The headings, tables (rows of cell texts) and embedded PNGs of a page, in order, read
    with the standard library's HTML parser (the outside reference for the markup)."""

    def __init__(self, text):
        super().__init__()
        self.items, self._cell, self._row, self._heading = [], None, None, None
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag in ("h1", "h2", "h3"):
            self._heading = [tag, attrs.get("id"), ""]
        elif tag == "table":
            self.items.append(["table", []])
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = ""
        elif tag == "img":
            self.items.append(["img", attrs.get("src", "")])

    def handle_endtag(self, tag):
        if tag in ("h1", "h2", "h3") and self._heading:
            self.items.append(["heading", *self._heading])
            self._heading = None
        elif tag in ("td", "th") and self._cell is not None:
            self._row.append(self._cell.strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.items[-1][1].append(self._row)
            self._row = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data
        if self._heading is not None:
            self._heading[2] += data

    def after(self, heading_id):
        """The items after the heading with that id, up to the next heading of its level."""
        at = next(k for k, it in enumerate(self.items)
                  if it[0] == "heading" and it[2] == heading_id)
        level = self.items[at][1]
        out = []
        for it in self.items[at + 1:]:
            if it[0] == "heading" and it[1] <= level:
                break
            out.append(it)
        return out


def _png_bytes(src):
    assert src.startswith("data:image/png;base64,")
    return base64.b64decode(src.split(",", 1)[1])


@pytest.fixture(scope="module")
def one_sink(tmp_path_factory):
    folder = tmp_path_factory.mktemp("one_sink")
    specs = [(i, x, s, 1.0) for i, x, s in ROW] + [("S", 10.0, 2.0, SINK_QUALITY)]
    patches = write_patches(folder, [(s[0], s[1], s[2], s[3]) for s in specs])
    centres = centres_of(specs)
    cands = write_lines(folder, [("R", "D", "S", 2.0, 5.0),     # reconnects the sink
                                 ("W", "B", "C", 1.0, 1.0),     # joins two linked patches
                                 ("V", "A", "C", 1.5, 1.0)],    # the same, farther
                        centres)
    study = study_of(patches)
    candidates = pl.read_candidates(cands, study.landscape, corridor_resistance=1.0)
    planner = pl.Planner(study, candidates, workers=1)
    return {"folder": folder, "patches": patches, "candidates_path": cands, "study": study,
            "candidates": candidates, "planner": planner, "centres": centres}


def test_reconnecting_candidate_ranks_first(one_sink):
    planner, study = one_sink["planner"], one_sink["study"]
    table = pl.rank_candidates(planner.add_one())
    # the premise: alone, the sink loses its predator
    base = ts.run_study(study).patches
    assert not base.loc["S", "predator_persists"]
    assert base.loc[["A", "B", "C", "D"], "predator_persists"].all()
    assert table.loc["R", "rank"] == 1
    # its gain is exactly the sink's share of the habitat area (the sink is rescued, nothing
    # else changes its persistence)
    assert table.loc["R", "gain_predator_area_persistence"] == pytest.approx(
        area_share(study, "S"), rel=1e-12)
    assert table.loc["R", "gain_predator_persistence"] == pytest.approx(1 / 5)
    # corridors between patches the kernel already links add no persistence: ranked last
    assert set(table.loc[["W", "V"], "rank"]) == {2, 3}
    assert (table.loc[["W", "V"], "gain_predator_area_persistence"] == 0).all()
    assert table.loc["R", "score_per_cost"] == pytest.approx(table.loc["R", "score"] / 2.0)


def test_snapping_and_candidate_attributes(one_sink):
    cand, study = one_sink["candidates"], one_sink["study"]
    ids = list(study.ids)
    assert [ids[i] for i in cand.source] == ["D", "B", "A"]
    assert [ids[i] for i in cand.target] == ["S", "C", "C"]
    # centre-to-centre lengths of the construction (common practice: planar distance in a
    # UTM zone); quality 5 makes R act as a line a fifth as long
    np.testing.assert_allclose(cand.length_km, [5.5, 1.5, 3.0], rtol=1e-12)
    np.testing.assert_allclose(cand.effective_km, [1.1, 1.5, 3.0], rtol=1e-12)


def test_screening_by_capacity_keeps_the_reconnecting_candidate(one_sink):
    planner = one_sink["planner"]
    gains = planner.capacity_gains()
    # W and V run parallel to kernel links that are shorter (boundary to boundary), so λ_M,
    # which keeps each pair's best route, does not move; R links a new pair
    assert gains[0] > 0
    np.testing.assert_allclose(gains[1:], 0.0, atol=1e-12)
    assert planner.screen(1) == [0]
    table = pl.rank_candidates(planner.add_one([0]).assign())
    assert table.loc["R", "rank"] == 1


def test_weights_and_sign_of_synchrony(one_sink):
    planner = one_sink["planner"]
    v = pl.Variant.of(add=[0])
    gains = planner.gains(v)
    after, before = planner.results[v], planner.baseline
    # lower synchrony is better: the gain is the fall in synchrony
    assert gains["gain_predator_synchrony"] == pytest.approx(
        before["predator_synchrony"] - after["predator_synchrony"])
    weights = {"predator_capacity": 2.0, "prey_persistence": 1.0}
    expected = (2.0 * gains["gain_predator_capacity"] / before["predator_capacity"]
                + gains["gain_prey_persistence"])
    assert pl._score(gains, before, weights) == pytest.approx(expected)


def test_parse_weights():
    assert pl.parse_weights(None) == pl.DEFAULT_WEIGHTS
    assert pl.parse_weights("predator_persistence=1, capacity=0.5") == {
        "predator_persistence": 1.0, "predator_capacity": 0.5}
    with pytest.raises(InputError) as err:
        pl.parse_weights("predator_persistance=1")
    assert shown(err.value).startswith("field '--weights': unknown objective "
                                     "'predator_persistance' (did you mean "
                                     "'predator_persistence'?)")
    with pytest.raises(InputError, match="weight 'x' of predator_capacity is not a number"):
        pl.parse_weights("capacity=x")


def test_parallel_runs_match_and_partial_log_is_reused(one_sink, tmp_path):
    study, cand = one_sink["study"], one_sink["candidates"]
    log = tmp_path / "corridors.partial.sqlite"
    first = pl.Planner(study, cand, workers=2, log=log)
    table2 = first.add_one()
    # tasks are pure: two processes give the numbers one process gives
    table1 = one_sink["planner"].add_one()
    gains = [c for c in table1.columns if c.startswith("gain_")]
    np.testing.assert_allclose(table2[gains].to_numpy(float), table1[gains].to_numpy(float),
                               rtol=1e-12, atol=1e-15)
    rows = pl.evaluations_frame(log)
    assert len(rows) == 4 and (rows["status"] == "ok").all()   # baseline + 3 candidates
    # an interrupted ranking restarted with the same log runs nothing again
    again = pl.Planner(study, cand, workers=1, log=log)
    again.add_one()
    assert again.runs == 0
    np.testing.assert_allclose(again.add_one()[gains].to_numpy(float),
                               table1[gains].to_numpy(float), rtol=1e-12)


# ------------------------------------------------------------------ budgeted sets


@pytest.fixture(scope="module")
def two_sinks(tmp_path_factory):
    """Sinks at both ends of the row: each reconnecting candidate rescues its own sink."""
    folder = tmp_path_factory.mktemp("two_sinks")
    specs = ([("W1", -5.5, 1.0, SINK_QUALITY)] + [(i, x, s, 1.0) for i, x, s in ROW]
             + [("E1", 10.0, 2.0, SINK_QUALITY)])
    patches = write_patches(folder, specs)
    cands = write_lines(folder, [("L", "A", "W1", 1.0, 5.0), ("R", "D", "E1", 1.0, 5.0),
                                 ("M", "B", "C", 1.0, 1.0)], centres_of(specs))
    study = study_of(patches)
    # persistence alone: the score is then exactly additive over independent rescues
    candidates = pl.read_candidates(cands, study.landscape, corridor_resistance=1.0)
    return pl.Planner(study, candidates, workers=1, weights={"predator_area_persistence": 1.0})


def test_greedy_equals_exhaustive_when_gains_add_up(two_sinks):
    planner = two_sinks
    a, b = pl.Variant.of(add=[0]), pl.Variant.of(add=[1])
    both = pl.Variant.of(add=[0, 1])
    planner.evaluate([a, b, both])
    # the premise: the two rescues are independent, so the gains add up
    assert planner.score(both) == pytest.approx(planner.score(a) + planner.score(b), rel=1e-12)
    assert planner.score(a) > 0 and planner.score(b) > 0
    greedy = planner.greedy(2.0)
    exact = planner.exhaustive(2.0)
    # with an additive score and equal costs the greedy choice is optimal (the top k by
    # gain; Nemhauser, Wolsey & Fisher 1978, "An analysis of approximations for maximizing
    # submodular set functions", from memory: greedy is exact for modular functions)
    assert sorted(greedy.chosen) == list(exact.chosen) == [0, 1]
    assert greedy.score == pytest.approx(exact.score, rel=1e-12)
    # every subset within the budget was run: 3 singles and 3 pairs
    assert exact.subsets == 6


@pytest.fixture(scope="module")
def complements(tmp_path_factory):
    """Two weak corridors to one large sink rescue it only together; a cheap corridor
    rescues a small sink alone."""
    folder = tmp_path_factory.mktemp("complements")
    specs = ([("W1", -5.5, 1.0, SINK_QUALITY)] + [(i, x, s, 1.0) for i, x, s in ROW]
             + [("E1", 10.0, 2.0, SINK_QUALITY)])
    patches = write_patches(folder, specs)
    cands = write_lines(folder, [("R1", "D", "E1", 1.0, 1.0), ("R2", "C", "E1", 1.0, 1.3),
                                 ("L", "A", "W1", 1.0, 5.0)], centres_of(specs))
    raw = raw_scenario(patches)
    raw["patches"]["path"] = patches.name
    scenario = folder / "scenario.toml"
    scenario.write_text(to_toml(raw), encoding="utf-8")
    return {"folder": folder, "scenario": scenario, "candidates": cands}


def test_report_states_gap_when_gains_do_not_add_up(complements, monkeypatch):
    folder = complements["folder"]
    out = folder / "plan"
    code = run_cli(monkeypatch, "corridors", complements["scenario"], "--candidates",
                   complements["candidates"], "--budget", 2, "--out", out, "--workers", 1,
                   "--weights", "predator_area_persistence=1", "--quiet")
    assert code == 0
    summary = json.loads((out / "corridors.json").read_text())
    table = pd.read_csv(out / "corridors.csv", dtype={"corridor_id": str}).set_index(
        "corridor_id")
    # the premise: R1 and R2 are worth nothing alone and much together (not additive)
    assert table.loc["R1", "score"] == 0 and table.loc["R2", "score"] == 0
    assert summary["exhaustive"]["chosen"] == ["R1", "R2"]
    assert summary["greedy"]["chosen"] == ["L"]
    gap = summary["greedy_gap"]
    assert gap["absolute"] == pytest.approx(summary["exhaustive"]["score"]
                                            - summary["greedy"]["score"])
    assert gap["absolute"] > 0 and not gap["same_set"]
    report = (out / "corridors.html").read_text()
    assert f"Greedy falls short of the best set by {gap['absolute']:.4g}" in report
    assert "Lower synchrony is better for regional survival" in report
    # report.html: the network as it is, as `run` reports it, then the corridor section
    full = (out / "report.html").read_text(encoding="utf-8")
    assert full.index(CAUTION) < full.index("Headline results") < full.index(
        'id="corridors"')
    assert "http://" not in full and "https://" not in full  # self-contained
    page = _Page(full)
    h2 = [it[3] for it in page.items if it[0] == "heading" and it[1] == "h2"]
    assert h2[:2] == ["Headline results", "Persistence"] and h2[-1] == "Corridor planning"
    section = page.after("corridors")
    text = full[full.index('id="corridors"'):]
    assert f"Greedy falls short of the best set by {gap['absolute']:.4g}" in text
    assert "Chosen set (exhaustive):</strong> R1, R2" in text
    # the two corridor maps, embedded: the very PNG files of maps/
    images = [_png_bytes(it[1]) for it in section if it[0] == "img"]
    assert images == [(out / "maps" / "corridors_gain_per_cost.png").read_bytes(),
                      (out / "maps" / "critical_patches.png").read_bytes()]
    assert "Each candidate line is coloured by the score it adds per unit cost" in text
    assert "Each patch coloured by how much the score falls" in text
    # the ranking table: one row per ranked candidate, in rank order, as corridors.csv has it
    ranking = next(it[1] for it in section if it[0] == "table")
    assert ranking[0][:2] == ["rank", "corridor id"]
    by_rank = table[table["rank"] > 0].sort_values("rank")
    assert [r[1] for r in ranking[1:]] == list(by_rank.index)
    assert [int(r[0]) for r in ranking[1:]] == list(by_rank["rank"])
    assert [r[-1] for r in ranking[1:]] == ["yes" if c else "no" for c in by_rank["chosen"]]
    # the baseline part of the report is the run's: its own maps are in maps/ as well
    assert (out / "maps" / "predator_occupancy.png").is_file()
    # the outputs of the contract (SCENARIO.md, "Other commands and their files")
    assert list(table.columns[:4]) == ["source", "target", "length_km", "cost"]
    assert {"rank", "chosen"} <= set(table.columns)
    assert sum(c.startswith("gain_") for c in table.columns) == len(pl.OBJECTIVES)
    assert set(table.index[table["chosen"]]) == {"R1", "R2"}
    assert summary["weights"] == {"predator_area_persistence": 1.0}
    layers = [name for name, _ in pyogrio.list_layers(out / "corridors.gpkg")]
    assert {"candidates", "critical_links", "critical_patches"} <= set(layers)
    lines = geopandas.read_file(out / "corridors.gpkg", layer="candidates")
    assert sorted(lines["corridor_id"]) == ["L", "R1", "R2"]
    assert (out / "maps" / "corridors_gain_per_cost.png").stat().st_size > 0
    assert not list(out.glob("corridors.partial.*"))
    evaluations = pd.read_csv(out / "evaluations.csv")
    assert len(evaluations) == summary["timing"]["runs"]
    # the columns of evaluations.csv before the ledger (a CSV log) are still there, in order
    assert list(evaluations.columns[:len(pl.OBJECTIVES) + 3]) == [
        "fingerprint", "variant", *pl.OBJECTIVES, "status"]
    assert (evaluations["status"] == "ok").all()
    critical = pd.read_csv(out / "critical.csv")
    assert set(critical["kind"]) == {"link", "patch"}
    # every link was tested: the pairs within 3 km edge to edge, found by brute force with
    # shapely.distance as the outside reference
    poly = geopandas.read_file(folder / "patches.gpkg").set_index("patch_id").geometry
    expected = {frozenset((a, b)) for a in poly.index for b in poly.index
                if a < b and shapely.distance(poly[a], poly[b]) <= 3000.0}
    tested = {frozenset(e.split("–")) for e in critical.loc[critical["kind"] == "link",
                                                             "element"]}
    assert tested == expected
    graph = nx.Graph([tuple(e) for e in tested])
    assert nx.is_connected(graph) and graph.number_of_nodes() == 4  # the row; sinks apart


# ------------------------------------------------------------------ remove-one


def test_remove_one_finds_the_critical_corridor(tmp_path):
    specs = [(i, x, s, 1.0) for i, x, s in ROW] + [("S", 10.0, 2.0, SINK_QUALITY)]
    patches = write_patches(tmp_path, specs)
    # an existing corridor from D's east edge to S's west edge, survived by all who enter it
    corridors = write_lines(tmp_path, [("K", "D", "S", 0.0, 1.0)], EDGES, name="corridors.gpkg",
                            survival=1.0)
    study = study_of(patches, dispersal={"corridors": str(corridors)})
    empty = pl.Candidates(ids=np.array([], dtype=str), source=np.array([], dtype=np.int64),
                          target=np.array([], dtype=np.int64), length_km=np.array([]),
                          effective_km=np.array([]), survival=np.array([]), cost=np.array([]))
    planner = pl.Planner(study, empty, workers=1)
    assert planner.baseline["predator_persistence"] == 1.0
    table = planner.remove_one()
    links = table[table["kind"] == "link"].set_index("element")
    assert links.loc["D–S", "rank"] == 1
    assert links.loc["D–S", "loss_predator_area_persistence"] == pytest.approx(
        area_share(study, "S"), rel=1e-12)
    patches_ = table[table["kind"] == "patch"].set_index("element")
    # a lost patch counts as one where neither species persists: losing the sink costs
    # exactly its area share of prey persistence
    assert patches_.loc["S", "loss_prey_area_persistence"] == pytest.approx(
        area_share(study, "S"), rel=1e-12)
    # 5 pairs of the row within 3 km edge to edge (A–B, A–C, B–C, B–D, C–D) and the corridor
    assert len(patches_) == 5 and len(links) == 6
    assert (links.drop(index="D–S")["loss_predator_area_persistence"] == 0).all()


# ------------------------------------------------------------------ networks and λ_M


def test_adding_a_link_never_lowers_capacity(rng):
    # Perron–Frobenius: the spectral radius of a non-negative matrix does not decrease when
    # an entry grows (Horn & Johnson 1985, "Matrix Analysis", Thm 8.1.18, from memory);
    # with_links only adds routes and the landscape matrix keeps each pair's best one
    for trial in range(25):
        land = grid_landscape(3, 4, spacing_km=float(rng.uniform(1.5, 4.0)),
                              size_km=float(rng.uniform(0.3, 1.2)))
        net = build_network(land, kernel="exponential",
                            max_distance_km=float(rng.uniform(0.5, 4.0)))
        area = land.area_km2
        base, _ = metapopulation_capacity(net, area, scale_km=2.0)
        k = int(rng.integers(1, 4))
        a = rng.integers(0, land.n_patches, k)
        b = (a + rng.integers(1, land.n_patches, k)) % land.n_patches
        bigger = with_links(net, a, b, rng.uniform(0.1, 8.0, k))
        after, _ = metapopulation_capacity(bigger, area, scale_km=2.0)
        assert after >= base * (1 - 1e-12) - 1e-12
        # and the value is the leading eigenvalue of the matrix (scipy dense solve)
        dense = landscape_matrix(bigger, area, scale_km=2.0).toarray()
        assert after == pytest.approx(scipy.linalg.eigvalsh(dense)[-1], rel=1e-9, abs=1e-12)


def test_with_links_and_without_keep_the_network_rules():
    land = grid_landscape(1, 4, spacing_km=2.0, size_km=1.0)
    net = build_network(land, kernel="exponential", max_distance_km=1.5)
    assert net.n_links == 3
    more = with_links(net, [0], [3], [4.0], survival=[1.0])
    assert more.n_links == 4 and net.n_links == 3       # the original is untouched
    move = movement_operator(more, emigration_rate=0.2, scale_km=1.0, survival_per_km=1.0)
    # with survival 1 individuals are conserved: columns sum to zero (SCENARIO.md,
    # "Dispersal, exactly")
    np.testing.assert_allclose(move.sum(axis=0), 0.0, atol=1e-15)
    back = without(more, links=[(3, 0)])
    assert back.n_arcs == net.n_arcs
    np.testing.assert_array_equal(back.source, net.source)
    cut = without(net, patches=[1])
    assert cut.links_per_patch().tolist() == [0, 0, 1, 1]
    assert cut.ids.tolist() == net.ids.tolist()


# ------------------------------------------------------------------ candidate-file errors


def _write(folder, frame, name="bad.gpkg"):
    path = folder / name
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    return path


@pytest.fixture
def row_study(tmp_path):
    specs = [(i, x, s, 1.0) for i, x, s in ROW]
    return study_of(write_patches(tmp_path, specs)), tmp_path


def _line(x0_km, x1_km, y_km=0.0):
    return shapely.LineString([(X0 + x0_km * 1000, Y0 + y_km * 1000),
                               (X0 + x1_km * 1000, Y0 + y_km * 1000)])


def test_candidate_errors(row_study):
    study, folder = row_study
    land = study.landscape
    cases = [
        (geopandas.GeoDataFrame({"corridor_id": ["X", "Y"], "cost": [1.0, 2.0]},
                                geometry=[_line(0, 3), _line(0, 3, y_km=4.0)], crs=CRS),
         "feature 'Y': field 'geometry': the candidate joins fewer than two patches: its "
         "first point (500000.0, 5004000.0) is not within 0.1 km of any patch; each end "
         "must lie on or near a patch: move the point onto its patch, or raise [dispersal] "
         "corridor_snap_km"),
        (geopandas.GeoDataFrame({"corridor_id": ["X"], "cost": [1.0]},
                                geometry=[_line(-0.2, 0.2)], crs=CRS),
         "feature 'X': field 'geometry': the candidate joins fewer than two patches: both "
         "ends lie at patch 'A'; a corridor must join two different patches: move one end to "
         "the other patch"),
        (geopandas.GeoDataFrame({"corridor_id": ["X", "Y"], "cost": [1.0, -3.0]},
                                geometry=[_line(0, 3), _line(1.5, 4.5)], crs=CRS),
         "feature 'Y': field 'cost': value -3.0 is out of range; give a number of at "
         "least 0"),
        (geopandas.GeoDataFrame({"corridor_id": ["X", "X"], "cost": [1.0, 1.0]},
                                geometry=[_line(0, 3), _line(1.5, 4.5)], crs=CRS),
         "feature 'X': field 'corridor_id': id is not unique: features 0 and 1 both have "
         "it; give each candidate its own id"),
        (geopandas.GeoDataFrame({"name": ["X"]}, geometry=[_line(0, 3)], crs=CRS),
         "field 'cost': the file has no 'cost' attribute (it has: 'name'); add a 'cost' "
         "column with a number >= 0 for every candidate"),
        (geopandas.GeoDataFrame({"cost": [1.0, 1.0]}, geometry=[_line(0, 3), _line(0, 9)],
                                crs=CRS),
         "feature 1: field 'geometry': the candidate joins fewer than two patches: its last "
         "point (509000.0, 5000000.0) is not within 0.1 km of any patch; each end must lie "
         "on or near a patch: move the point onto its patch, or raise [dispersal] "
         "corridor_snap_km"),
    ]
    for k, (frame, message) in enumerate(cases):
        path = _write(folder, frame, f"bad{k}.gpkg")
        with pytest.raises(InputError) as err:
            pl.read_candidates(path, land)
        assert shown(err.value) == f"{path}: {message}"


def test_thin_polygon_candidates_use_their_long_axis(row_study):
    study, folder = row_study
    # a 3.4 km × 0.1 km strip from inside A to inside C: its long axis runs from x = -0.2 to
    # 3.2 km (the midpoints of the short sides; plane geometry, common practice)
    strip = shapely.box(X0 - 200, Y0 - 50, X0 + 3200, Y0 + 50)
    path = _write(folder, geopandas.GeoDataFrame({"cost": [4.0]}, geometry=[strip], crs=CRS),
                  "strip.gpkg")
    cand = pl.read_candidates(path, study.landscape, corridor_resistance=1.0)
    assert [study.ids[cand.source[0]], study.ids[cand.target[0]]] == ["A", "C"]
    assert cand.length_km[0] == pytest.approx(3.4, rel=1e-12)
    assert cand.frame["drawn_as"].tolist() == ["polygon"]


def test_cli_bad_candidates_exit_2_without_output(row_study, monkeypatch, capsys):
    study, folder = row_study
    raw = raw_scenario(folder / "patches.gpkg")
    scenario = folder / "s.toml"
    scenario.write_text(to_toml(raw), encoding="utf-8")
    bad = _write(folder, geopandas.GeoDataFrame({"cost": [-1.0]}, geometry=[_line(0, 3)],
                                                crs=CRS))
    out = folder / "never"
    assert run_cli(monkeypatch, "corridors", scenario, "--candidates", bad, "--budget", 1,
                   "--out", out, "--quiet") == 2
    assert capsys.readouterr().err.strip() == (
        f"error: {bad}: feature 0: field 'cost': value -1.0 is out of range; give a "
        "number of at least 0")
    assert not out.exists()
    assert run_cli(monkeypatch, "corridors", scenario, "--candidates", bad, "--budget", -1,
                   "--out", out, "--quiet") == 2
    assert not out.exists()


def test_the_python_call_writes_what_the_command_writes(complements, monkeypatch):
    # consistency test: corridors_to_folder is the corridors command, from Python
    folder = complements["folder"]
    assert run_cli(monkeypatch, "corridors", complements["scenario"], "--candidates",
                   complements["candidates"], "--budget", 2, "--out", folder / "cli",
                   "--workers", 1, "--no-maps", "--quiet") == 0
    plan = ts.corridors_to_folder(complements["scenario"], complements["candidates"],
                                  folder / "py", budget=2, workers=1, maps=False)
    for name in ("corridors.csv", "critical.csv"):
        a = pd.read_csv(folder / "cli" / name)
        b = pd.read_csv(folder / "py" / name)
        pd.testing.assert_frame_equal(a, b)
    assert sorted(p.name for p in (folder / "cli").iterdir()) == sorted(
        p.name for p in (folder / "py").iterdir())
    assert [str(i) for i in plan.table.index] == list(
        pd.read_csv(folder / "py" / "corridors.csv", dtype={"corridor_id": str})["corridor_id"])
    # refused like the command, naming the parameter
    with pytest.raises(InputError) as info:
        ts.corridors_to_folder(complements["scenario"], complements["candidates"],
                               folder / "bad", budget=-1)
    assert str(info.value).startswith("parameter 'budget': -1 is out of range")
    assert not (folder / "bad").exists()


# ------------------------------------------------------------------ compare


def test_compare_gives_the_expected_difference_for_a_shared_patch(tmp_path, monkeypatch):
    specs = [(i, x, s, 1.0) for i, x, s in ROW] + [("S", 10.0, 2.0, SINK_QUALITY)]
    patches_a = write_patches(tmp_path, specs, "a.gpkg")
    # B: the same patches plus one more (not shared), and a corridor D–S of survival 1
    patches_b = write_patches(tmp_path, specs + [("X", -1.5, 1.0, 1.0)], "b.gpkg")
    corridors = write_lines(tmp_path, [("K", "D", "S", 0.0, 1.0)], EDGES, name="k.gpkg",
                            survival=1.0)
    raw_a = raw_scenario(patches_a.name)
    raw_b = raw_scenario(patches_b.name, dispersal={"corridors": corridors.name,
                                                   "kernel": "exponential"})
    (tmp_path / "a.toml").write_text(to_toml(raw_a), encoding="utf-8")
    (tmp_path / "b.toml").write_text(to_toml(raw_b), encoding="utf-8")
    out = tmp_path / "cmp"
    assert run_cli(monkeypatch, "compare", tmp_path / "a.toml", tmp_path / "b.toml",
                   "--out", out, "--quiet", "--no-runs") == 0
    table = pd.read_csv(out / "comparison.csv").set_index("scenario")
    assert list(table.index) == ["a", "b"]
    assert table.loc["a", "patches"] == 5 and table.loc["b", "patches"] == 6
    # flattened by the rule sweep.csv follows (io.tables.flatten_summary): no provenance
    assert {"quasi_extinction_predator_removals", "solver_nfev"} <= set(table.columns)
    assert not any(c.startswith(("stability_details", "provenance")) for c in table.columns)
    diff = pd.read_csv(out / "differences_b_minus_a.csv", dtype={"patch_id": str}).set_index(
        "patch_id")
    # only shared ids; in A the sink cannot hold the predator (e f(K) − m < 0, see the module
    # notes), so its occupancy after burn-in is 0; in B the corridor keeps predators there at
    # every census, occupancy 1: the difference is exactly 1
    assert sorted(diff.index) == ["A", "B", "C", "D", "S"]
    assert diff.loc["S", "predator_occupancy_reference"] == 0.0
    assert diff.loc["S", "predator_occupancy_difference"] == 1.0
    assert diff.loc["A", "predator_occupancy_difference"] == 0.0
    assert (out / "maps" / "difference_predator_occupancy_b_minus_a.png").stat().st_size > 0
    # report.html: both scenarios in words, the caution, the headline table, the maps
    text = (out / "report.html").read_text(encoding="utf-8")
    assert CAUTION in text and "5 habitat patches" in text and "6 habitat patches" in text
    page = _Page(text)
    headline = next(it[1] for it in page.items if it[0] == "table")
    assert headline[0][1:] == ["a", "b"]
    rows = {r[0]: r[1:] for r in headline[1:]}
    assert rows["predator: the same, weighted by area"] == [
        f"{table.loc[k, 'predator_area_persistence']:.1%}" for k in ("a", "b")]
    images = [_png_bytes(it[1]) for it in page.items if it[0] == "img"]
    assert images == [(out / "maps" / f"difference_{c}_b_minus_a.png").read_bytes()
                      for c in ("predator_occupancy", "prey_occupancy")]
    assert "purple where it is higher in b, orange where it is lower" in text
    assert table.loc["b", "predator_area_persistence"] > table.loc["a",
                                                                   "predator_area_persistence"]


# ------------------------------------------------------------------ corridor resistance


def test_a_corridor_easy_to_cross_rescues_a_sink_a_straight_link_does_not(tmp_path):
    # The sink S cannot hold the predator alone (module notes: K < N*). A corridor from D's
    # edge to S's edge, 4 km long at resistance 0.05, acts as 0.2 km, well under the
    # kernel scale of 1 km: the predator persists in S and λ_M rises. A straight link of
    # the same 4 km (a kernel link, max_distance_km raised to reach it) acts as 4 km: its
    # weight e^-4 against e^-0.5 for D's link to C sends S too few predators.
    specs = [(i, x, s, 1.0) for i, x, s in ROW] + [("S", 10.0, 2.0, SINK_QUALITY)]
    patches = write_patches(tmp_path, specs)
    corridor = write_lines(tmp_path, [("K", "D", "S", 0.0, 1.0)], EDGES, name="k.gpkg",
                           resistance=0.05)
    predator = {"kernel_scale_km": 1.0}
    with_corridor = study_of(patches, predator=predator,
                             dispersal={"corridors": str(corridor)})
    straight = study_of(patches, predator=predator, dispersal={"max_distance_km": 4.0})
    links = straight.network.links_frame(straight.landscape).set_index(["source", "target"])
    assert links.loc[("D", "S"), "effective_distance_km"] == pytest.approx(4.0, rel=1e-9)
    frame = with_corridor.network.links_frame(with_corridor.landscape).set_index(
        ["source", "target"])
    assert frame.loc[("D", "S"), "effective_distance_km"] == pytest.approx(0.2, rel=1e-9)
    assert frame.loc[("D", "S"), "distance_km"] == pytest.approx(4.0, rel=1e-9)
    persists = {}
    for name, study in (("corridor", with_corridor), ("straight", straight)):
        result = ts.run_study(study)
        row = result.patches.loc["S"]
        persists[name] = bool(row["predator_persists"])
    assert persists == {"corridor": True, "straight": False}
    assert (pl.capacity_of(with_corridor)["predator_capacity"]
            > pl.capacity_of(straight)["predator_capacity"])
