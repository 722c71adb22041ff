"""Reading primary-flow model files and profile stations (geosp.io.flowmodel)."""

from pathlib import Path

import numpy.testing as npt
import pandas as pd
import pytest

from geosp.errors import InputError
from geosp.io.flowmodel import read_flow_model, read_section_stations, write_flow_profile

EXAMPLE = Path(__file__).resolve().parents[2] / "docs" / "examples" / "upflow_section.toml"

MINIMAL = """
[mesh]
x_m = [-500.0, 500.0]
depth_m = 400.0
cell_m = 50.0

[background]
sigma_s_m = 0.02
c_p_v_pa = -1e-7
permeability_m2 = 1e-13

[[region]]
name = "zone"
polygon = [[-50, 0], [50, 0], [50, 400], [-50, 400]]
hydraulic_conductivity_m_s = 1e-6

[[source]]
point = [0.0, 300.0]
rate_m3_s = 1e-5
"""


def write(tmp_path, text, name="model.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_example_model_reads(tmp_path):
    # Reference: the example's own values (docs/examples/upflow_section.toml).
    model = read_flow_model(EXAMPLE)
    assert model.ndim == 2 and model.cell_m == 25.0 and model.heat_advection
    assert [r.name for r in model.regions] == ["hanging wall", "fault zone"]
    assert {s.equation for s in model.sources} == {"pressure"}
    assert model.fixed[0].equation == "heat" and model.fixed[0].value == 180.0
    assert model.crs == "EPSG:32611"


def test_properties_inherit_and_convert_units(tmp_path):
    # Reference: k/η = K/(ρ_w g) with ρ_w = 1000 kg/m³, g = 9.81 m/s² (hydraulics
    # textbook relation), and k/η = k/1e-3 Pa·s for water by default (common practice).
    model = read_flow_model(write(tmp_path, MINIMAL))
    assert model.background.mobility_m2_pa_s == pytest.approx(1e-13 / 1e-3)
    zone = model.regions[0]
    assert zone.mobility_m2_pa_s == pytest.approx(1e-6 / (1000 * 9.81))
    assert zone.sigma_s_m == 0.02 and zone.c_p_v_pa == -1e-7  # inherited
    assert model.sources[0].kind == "point" and model.sources[0].equation == "pressure"


def test_unknown_key_suggests_nearest(tmp_path):
    # Reference: difflib nearest match, as elsewhere in geosp's input checks.
    text = MINIMAL.replace("sigma_s_m = 0.02", "sigma_sm = 0.02")
    with pytest.raises(InputError) as err:
        read_flow_model(write(tmp_path, text))
    message = str(err.value)
    assert "model.toml" in message and "[background]" in message
    assert "unknown key 'sigma_sm'" in message and "Did you mean 'sigma_s_m'?" in message


def test_every_problem_reported_together(tmp_path):
    text = MINIMAL.replace("cell_m = 50.0", "cell_m = -5").replace(
        "polygon = [[-50, 0], [50, 0], [50, 400], [-50, 400]]", "polygon = [[0, 0], [1, 1]]"
    ).replace("rate_m3_s = 1e-5", "rate_m3_s = 1e-5\npower_w = 3.0")
    with pytest.raises(InputError) as err:
        read_flow_model(write(tmp_path, text))
    message = str(err.value)
    assert "3 problems" in message
    assert "'cell_m' = -5 must be positive" in message
    assert "[[region]] 1 (zone)" in message and "at least 3 points" in message
    assert "exactly one of 'rate_m3_s'" in message


def test_bad_toml_and_missing_file(tmp_path):
    with pytest.raises(InputError, match="not valid TOML"):
        read_flow_model(write(tmp_path, "[mesh\nx_m = 1"))
    with pytest.raises(InputError, match="does not exist"):
        read_flow_model(tmp_path / "nope.toml")
    with pytest.raises(InputError, match=r"\[mesh\] table is missing"):
        read_flow_model(write(tmp_path, "[background]\nsigma_s_m = 1.0\n"))


def test_three_d_needs_boxes(tmp_path):
    text = MINIMAL.replace("x_m = [-500.0, 500.0]", "x_m = [-500.0, 500.0]\ny_m = [-500.0, 500.0]")
    with pytest.raises(InputError, match="'polygon' is for sections"):
        read_flow_model(write(tmp_path, text))
    text = text.replace("polygon = [[-50, 0], [50, 0], [50, 400], [-50, 400]]",
                        "box = [-50, 50, -100, 100, 0, 400]").replace(
        "point = [0.0, 300.0]", "point = [0.0, 0.0, 300.0]")
    model = read_flow_model(write(tmp_path, text))
    assert model.ndim == 3 and model.core_y_m == (-500.0, 500.0)
    npt.assert_array_equal(model.regions[0].shape, [-50, 50, -100, 100, 0, 400])


def test_stations_csv_and_profile_round_trip(tmp_path):
    from geosp import flow

    stations = tmp_path / "obs.csv"
    pd.DataFrame({"x_m": [-200.0, 0.0, 200.0], "sp_mv": [1.0, 5.0, -2.0]}).to_csv(
        stations, index=False)
    x, sp = read_section_stations(stations)
    npt.assert_array_equal(sp, [1.0, 5.0, -2.0])
    bad = tmp_path / "bad.csv"
    bad.write_text("x_m,sp_mv\n1,2\n3,\n", encoding="utf-8")
    with pytest.raises(InputError, match="line 3"):
        read_section_stations(bad)
    wrong = tmp_path / "wrong.csv"
    wrong.write_text("x,sp_mv\n1,2\n", encoding="utf-8")
    with pytest.raises(InputError, match="Did you mean 'x' for 'x_m'"):
        read_section_stations(wrong)
    model = read_flow_model(write(tmp_path, MINIMAL))
    result = flow.run_flow_model(model, stations=(x, sp))
    out = write_flow_profile(result, tmp_path / "profile.csv")
    table = pd.read_csv(out)
    profile = table[table.point == "profile"]
    npt.assert_allclose(profile.model_mv, result.profile_mv, rtol=1e-5)
    npt.assert_allclose(table[table.point == "station"].residual_mv, result.residual_mv,
                        rtol=1e-5, atol=1e-9)
    with pytest.raises(InputError, match="no map position"):
        write_flow_profile(result, tmp_path / "profile.gpkg")


def test_georeferenced_profile_gpkg(tmp_path):
    # Reference: azimuth 90° puts +x due east of origin_xy (grid bearing convention).
    import geopandas as gpd

    from geosp import flow

    text = MINIMAL + '\n[profile]\norigin_xy = [1000.0, 2000.0]\ncrs = "EPSG:32611"\n'
    result = flow.run_flow_model(read_flow_model(write(tmp_path, text)))
    frame = gpd.read_file(write_flow_profile(result, tmp_path / "p.gpkg"),
                          layer="section_profile")
    npt.assert_allclose(frame.geometry.x, 1000.0 + result.profile_x_m, atol=1e-6)
    npt.assert_allclose(frame.geometry.y, 2000.0, atol=1e-6)
    assert frame.crs.to_epsg() == 32611


def test_fluid_temperature_only_on_fluid_sources(tmp_path):
    text = MINIMAL.replace("rate_m3_s = 1e-5", "rate_m3_s = 1e-5\nfluid_temperature_k = 150.0")
    assert read_flow_model(write(tmp_path, text)).sources[0].fluid_temperature_k == 150.0
    text = MINIMAL.replace("rate_m3_s = 1e-5", "power_w = 1e3\nfluid_temperature_k = 150.0")
    with pytest.raises(InputError, match="'fluid_temperature_k' belongs to fluid sources"):
        read_flow_model(write(tmp_path, text))
