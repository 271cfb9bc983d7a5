"""`trophoscape init`: the template parses, matches the documented defaults, guesses ids."""

import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from trophoscape.errors import InputError
from trophoscape.scenario import SCHEMA, read_scenario
from trophoscape.workflows.template import guess_id_field, write_template

DEMO = Path(__file__).resolve().parents[1] / "data" / "demo_patches.geojson"


def test_template_parses_and_keeps_the_defaults(tmp_path):
    (tmp_path / "p.geojson").write_bytes(DEMO.read_bytes())
    target = write_template(tmp_path)
    sc = read_scenario(target)
    assert sc["patches.id_field"] == "patch_id"
    assert sc["patches.quality_field"] == "quality"
    for section, keys in SCHEMA.items():
        if section in ("", "patches"):
            continue
        for key, spec in keys.items():
            assert sc[f"{section}.{key}"] == spec.default, f"{section}.{key}"
    with pytest.raises(InputError, match="already exists; use force=True"):
        write_template(tmp_path)


def test_guess_id_field_prefers_unique_id_columns():
    table = pd.DataFrame({"name": ["a", "b", "b"], "code": [1, 2, 3], "site_id": ["x", "y", "z"]})
    assert guess_id_field(table) == "site_id"
    assert guess_id_field(table.drop(columns="site_id")) == "code"
    assert guess_id_field(pd.DataFrame({"v": [1, 1]})) is None


def test_init_command_then_check(tmp_path):
    (tmp_path / "valley.geojson").write_bytes(DEMO.read_bytes())
    env_src = str(Path(__file__).resolve().parents[1] / "src")
    run = [sys.executable, "-m", "trophoscape"]
    env = {"PYTHONPATH": env_src, "PATH": "/usr/bin:/bin"}
    done = subprocess.run(run + ["init", str(tmp_path)], capture_output=True, text=True, env=env)
    assert done.returncode == 0, done.stderr
    check = subprocess.run(run + ["check", str(tmp_path / "scenario.toml")],
                           capture_output=True, text=True, env=env)
    assert check.returncode == 0, check.stderr
    assert "patches    150" in check.stdout


def test_names_with_quotes_and_backslashes_read_back(tmp_path):
    # a file name and column names holding a quote, a backslash and a newline: the template
    # writes them as TOML basic strings with escapes (TOML v1.0.0, "String"), so the
    # scenario reads back naming the same file and columns
    import geopandas as gpd
    from shapely.geometry import box

    name = 'my "best" site\\s.geojson'
    frame = gpd.GeoDataFrame({'site "id"': ["a", "b"], "quality\\x\nnew": [1.0, 0.5]},
                             geometry=[box(0, 0, 1000, 1000), box(3000, 0, 4000, 1000)],
                             crs="EPSG:32632")
    frame.to_file(tmp_path / name, driver="GeoJSON", engine="pyogrio")
    target = write_template(tmp_path)
    sc = read_scenario(target)
    assert sc["patches.id_field"] == 'site "id"'
    assert sc["patches.quality_field"] == "quality\\x\nnew"
    assert sc.resolve(sc["patches.path"]) == tmp_path / name
    assert sc["name"] == 'my "best" site\\s'
    # the attribute comments stay comments: every line is blank, a comment or TOML
    for line in target.read_text(encoding="utf-8").splitlines():
        assert not line.startswith("new"), line
