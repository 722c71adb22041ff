"""The project file: defaults, relative paths, unknown keys, types, template."""

import tomllib

import pytest

from geosp.errors import InputError
from geosp.io.project import TEMPLATE, read_project, write_template


def _write(tmp_path, text):
    path = tmp_path / "p.toml"
    path.write_text(text)
    return path


MINIMAL = '[stations]\npath = "s.shp"\nid = "STN"\nvalue_mv = "SP"\n[faults]\npath = "f.gpkg"\n'


def test_minimal_project_gets_defaults_and_resolved_paths(tmp_path):
    project = read_project(_write(tmp_path, MINIMAL), stage_defaults={"grid": {"cell_size_m": "auto"}})
    assert project.stations["path"] == str((tmp_path / "s.shp").resolve())
    assert project.stations["line"] == ""
    assert project.stages["grid"] == {"cell_size_m": "auto"}
    assert project.readings is None and project.dem is None


def test_unknown_key_suggests_nearest(tmp_path):
    with pytest.raises(InputError) as err:
        read_project(_write(tmp_path, MINIMAL + 'layr = "x"\n'))
    assert "unknown key 'layr' in [faults]" in str(err.value)
    assert "Did you mean 'layer'" in str(err.value)


def test_unknown_stage_option_suggests_nearest(tmp_path):
    with pytest.raises(InputError) as err:
        read_project(_write(tmp_path, MINIMAL + "[grid]\ncell_sise_m = 20\n"),
                     stage_defaults={"grid": {"cell_size_m": "auto"}})
    assert "Did you mean 'cell_size_m'" in str(err.value)


def test_wrong_type_and_missing_section_reported_together(tmp_path):
    text = '[stations]\npath = "s.shp"\nid = "STN"\n[reduce]\ndrift = "yes"\n'
    with pytest.raises(InputError) as err:
        read_project(_write(tmp_path, text), stage_defaults={"reduce": {"drift": True}})
    message = str(err.value)
    assert "2 problems" in message
    assert "drift = 'yes' has the wrong type" in message and "true or false" in message
    assert "[faults] section is missing" in message


def test_true_or_false_may_replace_auto_where_the_option_takes_both(tmp_path):
    defaults = {"reduce": {"terrain": "auto", "terrain_corridor_m": "auto"},
                "fit": {"fit_sigma_ratio": "auto"}}
    text = MINIMAL + "[reduce]\nterrain = false\n[fit]\nfit_sigma_ratio = true\n"
    project = read_project(_write(tmp_path, text), stage_defaults=defaults)
    assert project.stages["reduce"]["terrain"] is False
    assert project.stages["fit"]["fit_sigma_ratio"] is True
    # A number-or-"auto" option still refuses true/false.
    with pytest.raises(InputError) as err:
        read_project(_write(tmp_path, MINIMAL + "[reduce]\nterrain_corridor_m = true\n"),
                     stage_defaults=defaults)
    assert "terrain_corridor_m = True has the wrong type" in str(err.value)


def test_toml_syntax_error_names_file(tmp_path):
    path = _write(tmp_path, "[stations\npath = s.shp\n")
    with pytest.raises(InputError) as err:
        read_project(path)
    assert "p.toml" in str(err.value) and "not valid TOML" in str(err.value)


def test_template_is_valid_toml_and_refuses_to_overwrite(tmp_path):
    tomllib.loads(TEMPLATE)
    path = write_template(tmp_path / "new.toml")
    data = tomllib.loads(path.read_text())
    assert set(data) == {"survey", "stations", "faults"}
    with pytest.raises(InputError, match="already exists"):
        write_template(path)
