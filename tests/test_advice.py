"""Practical warnings of `trophoscape check`."""

import shapely

import trophoscape as ts
from trophoscape.analysis.advice import practical_warnings, typical_gap_km
from trophoscape.scenario import parse_scenario
from trophoscape.testing import grid_landscape


def study_of(tmp_path, **sections):
    land = grid_landscape(2, 3, spacing_km=2.0, size_km=1.0)
    frame = land.frame.drop(columns=["area_km2"])  # trophoscape computes it (a clash warns)
    # move the last patch far away: isolated
    frame.loc[5, "geometry"] = shapely.affinity.translate(frame.geometry[5], xoff=50_000)
    path = tmp_path / "p.gpkg"
    frame.to_file(path, driver="GPKG", engine="pyogrio")
    raw = {"patches": {"path": "p.gpkg", "id_field": "patch_id"},
           "run": {"duration": 10.0, "burn_in": 1.0}}
    for k, v in sections.items():
        raw.setdefault(k, {}).update(v)
    return ts.build_study(parse_scenario(raw, base_dir=tmp_path)), land


def test_typical_gap_against_a_grid(tmp_path):
    # squares of 1 km at 2 km spacing: the nearest boundary is 1 km away (common practice)
    _, land = study_of(tmp_path)
    assert abs(typical_gap_km(land) - 1.0) < 1e-9


def test_warnings_name_what_they_found(tmp_path):
    study, _ = study_of(tmp_path, prey={"kernel_scale_km": 0.1, "capacity_density": 0.5},
                        run={"census_interval": 2.0})
    notes = practical_warnings(study)
    text = " | ".join(notes)
    assert "1 patch(es) have no link (5)" in text
    # the advice names the distance that would link it: its nearest boundary-to-boundary gap,
    # found here by brute force with shapely.distance (the outside reference)
    geoms = study.landscape.geometries
    gap = min(shapely.distance(geoms[5], g) for g in geoms[:5]) / 1000.0
    assert f"set [dispersal] max_distance_km above {gap:.3g} km" in text
    assert "raise prey.kernel_scale_km towards" in text
    assert "6 patch(es) hold fewer than 1 prey even at carrying capacity" in text
    assert "the prey kernel scale (0.1 km) is far below the typical gap" in text
    assert "the census interval (2 year) is coarse" in text


def test_no_warnings_for_a_reasonable_setup(tmp_path):
    study, _ = study_of(tmp_path, dispersal={"max_distance_km": 100.0})
    assert practical_warnings(study) == []


def test_large_networks_hear_about_the_compiled_kernel_only_without_numba(tmp_path,
                                                                         monkeypatch):
    import trophoscape.model.system as system_module

    study, _ = study_of(tmp_path, dispersal={"max_distance_km": 100.0})
    monkeypatch.setattr(system_module, "COMPILED_MIN_PATCHES", 6)
    monkeypatch.setattr(system_module, "_compiled_module", lambda: None)
    (note,) = practical_warnings(study)
    assert note.startswith("with 6 patches the local equations run faster compiled")
    assert note.endswith("numba is not installed: pip install 'trophoscape[fast]'.")
    monkeypatch.setattr(system_module, "_compiled_module", lambda: object())
    assert practical_warnings(study) == []
