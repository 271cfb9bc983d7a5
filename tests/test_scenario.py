"""Scenario parsing: defaults, checks and the exact error texts users see."""

import pytest

from trophoscape.errors import InputError
from trophoscape.scenario import SCHEMA, FieldRef, read_scenario

MINIMAL = '[patches]\npath = "p.geojson"\n'


def write(tmp_path, text, name="s.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_every_default_is_filled(tmp_path):
    sc = read_scenario(write(tmp_path, MINIMAL))
    for section, keys in SCHEMA.items():
        for key, spec in keys.items():
            full = f"{section}.{key}" if section else key
            if full != "patches.path":
                assert sc[full] == spec.default, full
    assert sc.name == "s"
    assert sc.resolve(sc["patches.path"]) == tmp_path / "p.geojson"


def test_per_patch_field_reference(tmp_path):
    sc = read_scenario(write(tmp_path, MINIMAL + '[prey]\ngrowth_rate = { field = "r" }\n'))
    assert sc["prey.growth_rate"] == FieldRef("r")
    assert sc.fields_used() == {"r": "prey.growth_rate"}


def test_integers_become_floats(tmp_path):
    sc = read_scenario(write(tmp_path, MINIMAL + "[run]\nduration = 50\nburn_in = 10\n"))
    assert sc["run.duration"] == 50.0 and isinstance(sc["run.duration"], float)


def test_with_values_rechecks(tmp_path):
    sc = read_scenario(write(tmp_path, MINIMAL))
    assert sc.with_values(run__duration=50.0, run__burn_in=5.0)["run.duration"] == 50.0
    with pytest.raises(InputError, match="run.duration"):
        sc.with_values(run__duration=-1.0)


CASES = [
    ("[patches]\npath = 'p.geojson'\n[prey]\ngrowth_rte = 1.0\n",
     "s.toml: field 'prey.growth_rte': unknown key; did you mean 'growth_rate'?"),
    ("[patches]\npath = 'p.geojson'\n[preditor]\nconversion = 0.1\n",
     "s.toml: field 'preditor': unknown section or top-level key; did you mean 'predator'?"),
    ("[patches]\nid_field = 'x'\n",
     "s.toml: field 'patches.path': is missing; add path = \"patches.geojson\" under "
     "[patches], naming the patch file (GeoJSON, GeoPackage or Shapefile) relative to the "
     "scenario"),
    (MINIMAL + "[prey]\ngrowth_rate = -1\n",
     "s.toml: field 'prey.growth_rate': -1 is out of range; give a number of at least 0"),
    (MINIMAL + "[prey]\ngrowth_rate = 'fast'\n",
     "s.toml: field 'prey.growth_rate': 'fast' is not a number; give a number of at least 0"),
    (MINIMAL + "[prey]\ngrowth = 'gompertz'\n",
     "s.toml: field 'prey.growth': 'gompertz' is not one of the choices; give one of "
     "'exponential', 'logistic', 'allee'"),
    (MINIMAL + "[predation]\nresponse = 'holling4'\n",
     "s.toml: field 'predation.response': 'holling4' is not one of 'lotka_volterra', "
     "'holling2', 'holling3', 'beddington_deangelis'; did you mean 'holling3'?"),
    (MINIMAL + "[run]\nduration = 10\nburn_in = 20\n",
     "s.toml: field 'run.burn_in': 20 is not below run.duration 10; shorten the burn-in or "
     "lengthen the run"),
    (MINIMAL + "[dispersal]\nsurvival_per_km = 1.5\n",
     "s.toml: field 'dispersal.survival_per_km': 1.5 is out of range; give a number from 0 to 1"),
    (MINIMAL + "[prey]\ninitial_density = 'lots'\n",
     "s.toml: field 'prey.initial_density': 'lots' is not a number; give a number of at "
     "least 0, or 'equilibrium'"),
    (MINIMAL + "[prey]\ngrowth_rate = { column = 'r' }\n",
     "s.toml: field 'prey.growth_rate': {'column': 'r'} is not a per-patch value; write "
     "{ field = \"ATTRIBUTE\" } with a column of the patch file, or give one number"),
    (MINIMAL + "[noise]\nenvironmental_sd = -0.2\n",
     "s.toml: field 'noise.environmental_sd': -0.2 is out of range; give a number of at "
     "least 0"),
    (MINIMAL + "[run]\nreplicates = 3\n",
     "s.toml: field 'run.replicates': replicates other than 1 need noise "
     "(noise.environmental_sd > 0, noise.predator_mortality_sd > 0 or noise.demographic = "
     "true): without it every replicate is the same run; set replicates = 1 or add noise"),
    (MINIMAL + "[run]\nseed = 1.5\n", "s.toml: field 'run.seed': 1.5 is not a whole number; give a whole number of at least 0"),
    (MINIMAL + "[run]\nduration = inf\n", "s.toml: field 'run.duration': inf is not a finite number; give a number above 0"),
    ("[patches]\npath = 'p.geojson'\n[run]\nduration = = 5\n",
     "s.toml: not valid TOML: Invalid value (at line 4, column 12); correct the file there "
     "(text values need quotes, sections [brackets])"),
    ("[patches]\npath = 'p.geojson'\n[run]\nduration = 5\nburn_in = 'x\n",
     "s.toml: not valid TOML: Expected \"'\" (at the end, line 5); correct the file there "
     "(text values need quotes, sections [brackets])"),
]


@pytest.mark.parametrize("text,message", CASES)
def test_error_messages(tmp_path, monkeypatch, text, message):
    monkeypatch.chdir(tmp_path)
    write(tmp_path, text)
    with pytest.raises(InputError) as info:
        read_scenario("s.toml")
    assert str(info.value) == message


def test_missing_scenario_file(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    with pytest.raises(InputError) as info:
        read_scenario("nothing.toml")
    assert str(info.value) == ("nothing.toml: scenario file not found; check the path (a "
                                "relative path starts from the current folder)")
