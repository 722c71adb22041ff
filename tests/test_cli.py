"""The command line: exit codes, messages naming file and row, `check` summaries, `init`."""

import subprocess
import sys

import geopandas as gpd
import numpy as np
import pytest
from shapely.geometry import LineString, Point, Polygon

from geosp import __version__
from geosp.cli import main
from tests.conftest import UTM, small_survey, write_survey


def run(capsys, *args):
    code = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return code, out, err


def _summary_body(text):
    # The extent and spacing lines depend on positions; lon/lat round trips differ by < 1 mm,
    # so the printed (rounded) summary must be identical across formats.
    return [line for line in text.splitlines() if not line.startswith("Survey")]


def test_check_prints_the_same_summary_for_shapefile_geopackage_and_lonlat_csv(tmp_path, capsys):
    outputs = []
    for fmt in ("shp", "gpkg", "csv"):
        code, out, err = run(capsys, "check", write_survey(tmp_path / fmt, fmt))
        assert code == 0, err
        outputs.append(_summary_body(out))
    assert outputs[0] == outputs[1] == outputs[2]
    text = "\n".join(outputs[0])
    assert "205 on 5 lines" in text and "spacing median 25.0 m" in text
    assert "EPSG:32633" in text and "UTM zone of the stations' centroid" in text
    assert "1 traces" in text or "1 trace" in text


def test_check_writes_nothing(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    before = sorted(p.name for p in project.parent.iterdir())
    assert run(capsys, "check", project)[0] == 0
    assert sorted(p.name for p in project.parent.iterdir()) == before


@pytest.mark.parametrize("section,option,fragment", [
    ("reduce", 'mode = "sideways"', "mode"),
    ("reduce", 'terrain_slope_mv_per_m = "steep"', "terrain_slope_mv_per_m"),
    ("grid", 'method = "kriging-ish"', "method"),
    ("detect", "n_null = 3", "n_null"),
    ("detect", "workers = -1", "workers"),
])
def test_check_refuses_bad_stage_options(tmp_path, capsys, section, option, fragment):
    """`geosp check` validates every stage's options, as a run does before it writes anything."""
    project = write_survey(tmp_path / "s", "shp", extra_project=f"[{section}]\n{option}\n")
    code, out, err = run(capsys, "check", project)
    assert code == 2, (out, err)
    assert err.count("geosp: error:") == 1 and fragment in err


def test_version_and_help(capsys):
    with pytest.raises(SystemExit) as exit_:
        main(["--version"])
    assert exit_.value.code == 0 and __version__ in capsys.readouterr().out
    with pytest.raises(SystemExit):
        main(["--help"])
    assert "examples:" in capsys.readouterr().out


def test_init_writes_a_template_that_checks_once_paths_are_filled(tmp_path, capsys):
    target = tmp_path / "new.toml"
    code, out, _ = run(capsys, "init", target)
    assert code == 0 and target.exists() and "geosp check" in out
    code, _, err = run(capsys, "init", target)
    assert code == 2 and "already exists" in err


def _bad(tmp_path, capsys, project, *fragments):
    code, out, err = run(capsys, "check", project)
    assert code == 2, (out, err)
    assert "Traceback" not in err
    for fragment in fragments:
        assert fragment in err, (fragment, err)
    return err


def test_missing_stations_file(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    for part in project.parent.glob("stations.*"):
        part.unlink()
    _bad(tmp_path, capsys, project, "stations.shp", "does not exist")


def test_unsupported_format(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    (project.parent / "stations.xlsx").write_text("x")
    project.write_text(project.read_text().replace("stations.shp", "stations.xlsx"))
    _bad(tmp_path, capsys, project, "stations.xlsx", "unsupported")


def test_blank_value_names_the_csv_line(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "csv")
    csv = project.parent / "stations.csv"
    lines = csv.read_text().splitlines()
    cells = lines[7].split(",")
    cells[lines[0].split(",").index("SP_mV")] = ""  # SP_mV of the station on file line 8
    lines[7] = ",".join(cells)
    csv.write_text("\n".join(lines) + "\n")
    _bad(tmp_path, capsys, project, "stations.csv", "blank at line 8 (L01-006)")


def test_text_value_names_the_feature(tmp_path, capsys):
    frame, fault = small_survey()
    frame["SP_mV"] = frame["SP_mV"].astype(object)
    frame.loc[3, "SP_mV"] = "n/a"
    _bad(tmp_path, capsys, write_survey(tmp_path / "s", "gpkg", frame=frame, fault=fault),
         "stations.gpkg", "not a number at feature 4 (L01-003)")


def test_volts_instead_of_millivolts(tmp_path, capsys):
    frame, fault = small_survey()
    frame["SP_mV"] = frame["SP_mV"] / 1000.0
    _bad(tmp_path, capsys, write_survey(tmp_path / "s", "shp", frame=frame, fault=fault),
         "stations.shp", "look like volts", "value_scale = 1000")


def test_duplicate_ids_with_different_positions(tmp_path, capsys):
    frame, fault = small_survey()
    frame.loc[10, "STN"] = frame.loc[3, "STN"]
    _bad(tmp_path, capsys, write_survey(tmp_path / "s", "shp", frame=frame, fault=fault),
         "stations.shp", "duplicate station ids at different positions: L01-003 (features 4, 11")


def test_geographic_xy(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "csv_xy")
    project.write_text(project.read_text().replace(f'crs = "{UTM}"', 'crs = "EPSG:4326"'))
    _bad(tmp_path, capsys, project, "stations.csv", "geographic CRS", "lon")


def test_no_crs_for_xy(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "csv_xy")
    project.write_text(project.read_text().replace(f'crs = "{UTM}"\n', ""))
    _bad(tmp_path, capsys, project, "stations.csv", "x/y columns need their CRS")


def test_empty_fault_layer(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    gpd.GeoDataFrame({"FAULT": []}, geometry=[], crs=UTM).to_file(project.parent / "faults.gpkg", layer="faults")
    _bad(tmp_path, capsys, project, "faults.gpkg", "empty")


def test_faults_of_the_wrong_geometry_type(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    gpd.GeoDataFrame({"FAULT": ["A", "B"], "dip": [80.0, 80.0], "dip_dir": [90.0, 90.0]},
                     geometry=[LineString([(500400, 4499000), (500400, 4501000)]),
                               Polygon([(0, 0), (1, 0), (1, 1)])], crs=UTM).to_file(
        project.parent / "faults.gpkg", layer="faults")
    _bad(tmp_path, capsys, project, "faults.gpkg", "feature 2 (B)", "Polygon", "must be lines")


def test_faults_out_of_reach(tmp_path, capsys):
    frame, _ = small_survey()
    far = LineString([(600000, 4500000), (600000, 4501000)])
    _bad(tmp_path, capsys, write_survey(tmp_path / "s", "shp", frame=frame, fault=far),
         "faults.gpkg", "none of the 1 faults comes within", "CRS")


def test_dem_that_does_not_cover_the_stations(tmp_path, capsys):
    import rasterio
    from rasterio.transform import from_origin

    project = write_survey(tmp_path / "s", "shp")
    dem = project.parent / "dem.tif"
    # Covers only the western half of the stations.
    with rasterio.open(dem, "w", driver="GTiff", height=60, width=20, count=1, dtype="float32", crs=UTM,
                       transform=from_origin(499800.0, 4501400.0, 25.0, 25.0)) as dst:
        dst.write(np.full((60, 20), 1000.0, dtype="float32"), 1)
    project.write_text(project.read_text() + '\n[dem]\npath = "dem.tif"\n')
    _bad(tmp_path, capsys, project, "dem.tif", "does not cover", "of 205 stations", "(feature")


def test_readings_on_unknown_stations(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    (project.parent / "dv.csv").write_text(
        "LINE,FROM,TO,TIME,DV\nL01,L01-000,L01-001,2026-03-01T09:00:00,1.5\n"
        "L01,L01-001,L01-999,2026-03-01T09:01:00,0.5\n")
    project.write_text(project.read_text().replace('value_mv = "SP_mV"\n', "") + textwrap_readings())
    _bad(tmp_path, capsys, project, "dv.csv", "L01-999 (line 3)")


def textwrap_readings():
    return ('\n[readings]\npath = "dv.csv"\nline = "LINE"\nfrom = "FROM"\nto = "TO"\ntime = "TIME"\n'
            'value_mv = "DV"\n')


def test_unknown_project_key_suggests(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    project.write_text(project.read_text() + "\n[grid]\ncell_sise_m = 20\n")
    _bad(tmp_path, capsys, project, "project.toml", "cell_sise_m", "cell_size_m")


def test_missing_project_file(tmp_path, capsys):
    _bad(tmp_path, capsys, tmp_path / "nope.toml", "nope.toml", "does not exist", "geosp init")


def test_forward_predicts_a_pole_at_stations(tmp_path, capsys):
    # Reference: V = k (1/r+ - 1/r-) on a half-space surface for a pole pair, from the point-pole
    # formula V = rho I / (2 pi r) (Telford et al. 1990); the negative pole is 1000 km away.
    sources = gpd.GeoDataFrame(
        {"source_id": ["S1"], "model": ["pole_pair"], "top_x": [500000.0], "top_y": [4500000.0],
         "top_depth_m": [30.0], "neg_x": [1.5e6], "neg_y": [4500000.0], "neg_depth_m": [30.0],
         "pole_k_mv_m": [-2000.0]},
        geometry=[Point(500000.0, 4500000.0).buffer(5)], crs=UTM)
    sources.to_file(tmp_path / "src.gpkg", layer="sources")
    (tmp_path / "st.csv").write_text("name,x,y\nA,500040,4500000\nB,500000,4500100\n")
    code, out, err = run(capsys, "forward", tmp_path / "src.gpkg", tmp_path / "st.csv", "--out", tmp_path / "p.csv")
    assert code == 0, err
    import pandas as pd

    result = pd.read_csv(tmp_path / "p.csv")
    far = np.hypot(1.5e6 - np.array([500040.0, 500000.0]), [0.0, 100.0])
    expected = -2000.0 * (1 / np.hypot([40.0, 100.0], 30.0) - 1 / np.hypot(far, 30.0))
    np.testing.assert_allclose(result["model_mv"], expected, rtol=1e-5)


def test_forward_refuses_stations_far_from_every_source(tmp_path, capsys):
    """Coordinates typed ten times too large put every station thousands of km away: exit 2, not 0 mV."""
    sources = gpd.GeoDataFrame(
        {"source_id": ["S1"], "model": ["pole_pair"], "top_x": [500000.0], "top_y": [4500000.0],
         "top_depth_m": [30.0], "neg_x": [500500.0], "neg_y": [4500000.0], "neg_depth_m": [30.0],
         "pole_k_mv_m": [-2000.0]},
        geometry=[Point(500000.0, 4500000.0).buffer(5)], crs=UTM)
    sources.to_file(tmp_path / "src.gpkg", layer="sources")
    (tmp_path / "st.csv").write_text("name,x,y\nA,5000400,45000000\n")
    code, out, err = run(capsys, "forward", tmp_path / "src.gpkg", tmp_path / "st.csv")
    assert code == 2, (out, err)
    assert "st.csv" in err and "no station lies within" in err and "EPSG:32633" not in out
    code, _, err = run(capsys, "forward", tmp_path / "missing.gpkg", tmp_path / "st.csv")
    assert code == 2 and "does not exist" in err and "geosp forward" in err


def test_real_exit_code_and_no_traceback_in_a_subprocess(tmp_path):
    project = write_survey(tmp_path / "s", "shp")
    (project.parent / "stations.shx").unlink()
    proc = subprocess.run([sys.executable, "-m", "geosp.cli", "check", str(project)], capture_output=True, text=True)
    assert proc.returncode == 2
    assert "stations.shx is missing" in proc.stderr and "Traceback" not in proc.stderr


def test_section_command_runs_the_example_model(tmp_path, capsys):
    # The invented example in docs/examples; the solver itself is checked against closed forms
    # in tests/test_flow.py. Here: the command writes its three outputs and reports the misfit.
    from pathlib import Path

    examples = Path(__file__).resolve().parents[1] / "docs" / "examples"
    code, out, err = run(capsys, "section", examples / "upflow_section.toml", "--stations",
                         examples / "upflow_stations.csv", "--out", tmp_path / "sec")
    assert code == 0, err
    assert {p.name for p in (tmp_path / "sec").iterdir()} >= {"section_profile.csv", "section.png"}
    assert "Misfit" in out and "RMS" in out
    import pandas as pd

    profile = pd.read_csv(tmp_path / "sec" / "section_profile.csv")
    stations = profile[profile["point"] == "station"]
    assert (profile["point"] == "profile").sum() > 10 and profile["model_mv"].notna().all()
    assert len(stations) > 0 and stations["residual_mv"].notna().all()


def test_section_command_refuses_a_bad_model(tmp_path, capsys):
    bad = tmp_path / "m.toml"
    bad.write_text('[mesh]\nx_m = [0, 100]\ndepth_m = 50\ncell_m = 5\n[background]\nsigma_sm = 0.01\n')
    code, _, err = run(capsys, "section", bad, "--out", tmp_path / "o")
    assert code == 2 and "m.toml" in err and "Traceback" not in err


def test_permission_denied_is_exit_2_naming_the_file(tmp_path, capsys, monkeypatch):
    """Running as root ignores file modes, so the reader is made to raise what a locked file raises."""
    import geosp.pipeline

    project = write_survey(tmp_path / "s", "shp")

    def refuse(_project):
        raise PermissionError(13, "Permission denied", str(tmp_path / "s" / "stations.shp"))

    monkeypatch.setattr(geosp.pipeline, "load_survey", refuse)
    code, out, err = run(capsys, "check", project)
    assert code == 2
    assert "stations.shp: permission denied" in err and "internal error" not in err


def test_disk_full_is_exit_2_and_keeps_the_earlier_outputs(tmp_path, capsys, monkeypatch):
    import errno

    import geosp.pipeline
    from tests.test_robustness import FAST

    project = write_survey(tmp_path / "s", "shp", extra_project=FAST)
    out = tmp_path / "out"
    assert run(capsys, "run", project, "--out", out, "--quiet")[0] == 0
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}

    def full(*_args, **_kw):
        raise OSError(errno.ENOSPC, "No space left on device", str(out / ".geosp" / "staging" / "map.html"))

    monkeypatch.setattr(geosp.pipeline, "write_outputs", full)
    code, _, err = run(capsys, "run", project, "--out", out, "--quiet")
    assert code == 2
    assert "the disk is full" in err
    assert {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()} == before


def test_symlink_loop_is_exit_2(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp")
    loop = tmp_path / "s" / "loop.shp"
    loop.symlink_to(loop)
    project.write_text(project.read_text().replace('path = "stations.shp"', 'path = "loop.shp"'))
    code, out, err = run(capsys, "check", project)
    assert code == 2, err
    assert "loop.shp" in err and "internal error" not in err


@pytest.mark.slow
def test_report_and_run_json_show_no_local_folders(tmp_path, capsys):
    """Warnings name input files relative to the project folder: a shared report leaks no local paths."""
    import json

    from tests.test_robustness import readings_survey

    def blunder(table):
        table.loc[5, "DV"] += 40.0  # on a line no loop checks: warned about, naming dv.csv
        return table

    project = readings_survey(tmp_path, mutate=blunder)
    project.write_text(project.read_text().replace("report = false", "report = true"))
    out = tmp_path / "out"
    code, _, err = run(capsys, "run", project, "--out", out, "--quiet")
    assert code == 0, err
    record = json.loads((out / "run.json").read_text())
    assert any(w.startswith("dv.csv: ") for w in record["warnings"]), record["warnings"]
    for name in ("run.json", "report.html"):
        assert str(tmp_path) not in (out / name).read_text(encoding="utf-8"), name
    assert "stations.shp" in record["inputs"] and "dv.csv" in record["inputs"]


def test_check_refuses_a_bad_colour_range(tmp_path, capsys):
    project = write_survey(tmp_path / "s", "shp", extra_project="[publish]\nsp_range_mv = -5\n")
    code, out, err = run(capsys, "check", project)
    assert code == 2 and "sp_range_mv" in err
