"""
Malformed-input corpus run through the command line in-process.

Every case builds its own files in ``tmp_path``. A bad input must give exit
code 2, one message on stderr that names the file (and the row or feature
where there is one), says what is wrong and how to fix it, no traceback, and
leave every file in the folder byte-for-byte as it was -- including a folder
of earlier outputs that the failed run was pointed at. Inputs geosp can
safely work around (a byte-order mark, faults or a DEM in another CRS) must
succeed instead.

The contract (exit codes, one message naming file/row/fix, atomic outputs)
is the reference; the checksums are sha256 of every file before and after.
"""

from __future__ import annotations

import hashlib
import textwrap
from dataclasses import dataclass
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from shapely.geometry import LineString, Point

from geosp.cli import main
from geosp.io.atomic import OUTPUT_NAMES
from tests.conftest import UTM, small_survey, write_survey

# Options that keep a whole run on the small survey to a few seconds (fewer bootstrap draws and
# starts than the defaults; the numbers are not looked at here).
FAST = textwrap.dedent("""
    [detect]
    n_null = 200
    n_starts = 8
    workers = 1

    [publish]
    map = false
    report = false
    """)


@dataclass
class Case:
    project: Path
    fragments: tuple = ()
    ok: bool = False
    out: Path | None = None
    command: str = "run"
    workers: bool = True  # pass --workers 1 on the command line


def snapshot(folder):
    """sha256 of every file under ``folder`` (relative path -> digest)."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(Path(folder).rglob("*")) if p.is_file()}


def fake_outputs(out):
    """A folder of earlier outputs (arbitrary bytes under every output name)."""
    out.mkdir(parents=True, exist_ok=True)
    for i, name in enumerate(OUTPUT_NAMES + ("sp_distance.tif",)):
        (out / name).write_bytes(f"earlier output {i} {name}\n".encode() * 10)
    return out


def project_with(tmp, fmt="shp", *, frame=None, fault=None, extra=""):
    return write_survey(tmp / "s", fmt, frame=frame, fault=fault, extra_project=extra)


def edit(path, old, new):
    text = path.read_text()
    assert old in text, (old, text)
    path.write_text(text.replace(old, new))


# --------------------------------------------------------------------------- builders

def readings_survey(tmp, *, mutate=None, n_lines=3, n_per_line=11):
    """
    Station positions (no values) plus leapfrog readings along each line and
    ties between the lines' first stations; ``mutate(frame)`` edits the
    readings table before it is written.
    """
    folder = tmp / "s"
    frame, fault = small_survey(n_lines=n_lines, n_per_line=n_per_line, spacing=50.0)
    project = write_survey(folder, "shp", frame=frame, fault=fault)
    edit(project, 'value_mv = "SP_mV"\n', "")
    sp = dict(zip(frame.STN, frame.SP_mV))
    rows = []
    t0 = np.datetime64("2026-03-02T08:00:00")
    k = 0
    for i in range(n_lines):
        ids = [f"L{i + 1:02d}-{j:03d}" for j in range(n_per_line)]
        for a, b in zip(ids[:-1], ids[1:]):
            rows.append(("L%02d" % (i + 1), a, b, str(t0 + np.timedelta64(2 * k, "m")), round(sp[b] - sp[a], 3)))
            k += 1
    for i in range(n_lines - 1):
        a, b = f"L{i + 1:02d}-000", f"L{i + 2:02d}-000"
        rows.append(("TIE", a, b, str(t0 + np.timedelta64(2 * k, "m")), round(sp[b] - sp[a], 3)))
        k += 1
    table = pd.DataFrame(rows, columns=["LINE", "FROM", "TO", "TIME", "DV"])
    if mutate is not None:
        table = mutate(table)
    table.to_csv(folder / "dv.csv", index=False)
    project.write_text(project.read_text() + textwrap.dedent("""
        [readings]
        path = "dv.csv"
        line = "LINE"
        from = "FROM"
        to = "TO"
        time = "TIME"
        value_mv = "DV"
        """) + FAST)
    return project


def write_dem(path, *, crs=UTM, west=499500.0, north=4501500.0, cell=25.0, shape=(120, 100), value=None,
              nodata=None):
    import rasterio
    from rasterio.transform import from_origin

    data = np.full(shape, 1000.0, dtype="float32") if value is None else np.full(shape, value, dtype="float32")
    with rasterio.open(path, "w", driver="GTiff", height=shape[0], width=shape[1], count=1, dtype="float32",
                       crs=crs, transform=from_origin(west, north, cell, cell), nodata=nodata) as dst:
        dst.write(data, 1)
    return path


def with_dem(project, **kwargs):
    write_dem(project.parent / "dem.tif", **kwargs)
    project.write_text(project.read_text() + '\n[dem]\npath = "dem.tif"\n')
    return project


def csv_lines(project):
    csv = project.parent / "stations.csv"
    return csv, csv.read_text().splitlines()


def set_csv_cell(project, line_no, column, value):
    """Set ``column`` on 1-based file line ``line_no`` of stations.csv."""
    csv, lines = csv_lines(project)
    header = lines[0].split(",")
    cells = lines[line_no - 1].split(",")
    cells[header.index(column)] = value
    lines[line_no - 1] = ",".join(cells)
    csv.write_text("\n".join(lines) + "\n")


# Each builder returns a Case; the id says what is wrong.

def c_shp_missing_shx(tmp):
    p = project_with(tmp)
    (p.parent / "stations.shx").unlink()
    return Case(p, ("stations.shp", "stations.shx is missing", "GeoPackage"))


def c_shp_missing_dbf(tmp):
    p = project_with(tmp)
    (p.parent / "stations.dbf").unlink()
    return Case(p, ("stations.shp", "stations.dbf is missing"))


def c_shp_missing_prj(tmp):
    p = project_with(tmp)
    (p.parent / "stations.prj").unlink()
    return Case(p, ("stations.shp", "no CRS", ".prj"))


def c_shp_truncated(tmp):
    p = project_with(tmp)
    shp = p.parent / "stations.shp"
    data = shp.read_bytes()
    shp.write_bytes(data[: len(data) // 3])
    return Case(p, ("stations.shp", "truncated", f"has {len(data) // 3} bytes of the {len(data)}", "Copy the file"))


def c_shp_header_only(tmp):
    p = project_with(tmp)
    shp = p.parent / "stations.shp"
    shp.write_bytes(shp.read_bytes()[:50])
    return Case(p, ("stations.shp", "truncated", "has 50 bytes"))


def c_shx_truncated(tmp):
    p = project_with(tmp)
    shx = p.parent / "stations.shx"
    shx.write_bytes(shx.read_bytes()[:-40])
    return Case(p, ("stations.shp", "truncated", "stations.shx"))


def c_gpkg_truncated(tmp):
    p = project_with(tmp, "gpkg")
    gpkg = p.parent / "stations.gpkg"
    data = gpkg.read_bytes()
    gpkg.write_bytes(data[: len(data) // 2])
    return Case(p, ("stations.gpkg", "corrupted"))


def c_gpkg_garbage_inside(tmp):
    p = project_with(tmp, "gpkg")
    gpkg = p.parent / "stations.gpkg"
    data = bytearray(gpkg.read_bytes())
    rng = np.random.default_rng(1)
    data[1024:] = rng.integers(0, 256, len(data) - 1024, dtype=np.uint8).tobytes()
    gpkg.write_bytes(bytes(data))
    return Case(p, ("stations.gpkg",))


def c_text_renamed_gpkg(tmp):
    p = project_with(tmp)
    (p.parent / "faults.gpkg").write_text("FAULT,x,y\nF-A,500400,4500000\n")
    return Case(p, ("faults.gpkg", "cannot be opened"))


def c_broken_geojson(tmp):
    p = project_with(tmp, "geojson")
    gj = p.parent / "stations.geojson"
    gj.write_text(gj.read_text()[:-200])
    return Case(p, ("stations.geojson",))


def c_polygons_as_stations(tmp):
    p = project_with(tmp, "gpkg")
    frame, _ = small_survey()
    gpd.GeoDataFrame(frame.drop(columns=["E", "N"]),
                     geometry=[Point(e, n).buffer(3) for e, n in zip(frame.E, frame.N)], crs=UTM).to_file(
        p.parent / "stations.gpkg", layer="stations")
    return Case(p, ("stations.gpkg", "Polygon", "must be points"))


def c_points_as_faults(tmp):
    p = project_with(tmp)
    gpd.GeoDataFrame({"FAULT": ["A"], "dip": [80.0], "dip_dir": [90.0]}, geometry=[Point(500400, 4500500)],
                     crs=UTM).to_file(p.parent / "faults.gpkg", layer="faults")
    return Case(p, ("faults.gpkg", "feature 1 (A)", "Point", "must be lines"))


def c_empty_station_layer(tmp):
    p = project_with(tmp, "gpkg")
    gpd.GeoDataFrame({"STN": [], "SP_mV": [], "LINE": [], "ELEV": []}, geometry=[], crs=UTM).to_file(
        p.parent / "stations.gpkg", layer="stations")
    return Case(p, ("stations.gpkg", "empty"))


def c_csv_header_only(tmp):
    p = project_with(tmp, "csv")
    csv, lines = csv_lines(p)
    csv.write_text(lines[0] + "\n")
    return Case(p, ("stations.csv", "no stations"))


def c_csv_zero_bytes(tmp):
    p = project_with(tmp, "csv")
    (p.parent / "stations.csv").write_bytes(b"")
    return Case(p, ("stations.csv", "CSV"))


def c_nan_value_gpkg(tmp):
    frame, fault = small_survey()
    frame.loc[5, "SP_mV"] = np.nan
    return Case(project_with(tmp, "gpkg", frame=frame, fault=fault), ("stations.gpkg", "blank at feature 6 (L01-005)"))


def c_inf_value_csv(tmp):
    p = project_with(tmp, "csv")
    set_csv_cell(p, 12, "SP_mV", "inf")
    return Case(p, ("stations.csv", "infinite at line 12 (L01-010)"))


def c_text_value_csv(tmp):
    p = project_with(tmp, "csv")
    set_csv_cell(p, 20, "SP_mV", "12mV")
    return Case(p, ("stations.csv", "not a number at line 20 (L01-018)"))


def c_text_lon_csv(tmp):
    p = project_with(tmp, "csv")
    set_csv_cell(p, 4, "lon", "east")
    return Case(p, ("stations.csv", "'lon'", "line 4 (L01-002)"))


def c_lat_out_of_range(tmp):
    p = project_with(tmp, "csv")
    set_csv_cell(p, 6, "lat", "140.5")
    return Case(p, ("stations.csv", "out of range at line 6 (L01-004)"))


def c_blank_station_id(tmp):
    p = project_with(tmp, "csv")
    set_csv_cell(p, 9, "STN", "")
    return Case(p, ("stations.csv", "station id is blank at line 9"))


def c_volts_csv(tmp):
    frame, fault = small_survey()
    frame["SP_mV"] = (frame["SP_mV"] / 1000.0).round(6)
    return Case(project_with(tmp, "csv_xy", frame=frame, fault=fault), ("stations.csv", "volts", "value_scale = 1000"))


def c_duplicate_ids_untimed(tmp):
    frame, fault = small_survey()
    extra = frame.iloc[[7]].copy()
    extra["SP_mV"] += 5.0
    frame = pd.concat([frame, extra], ignore_index=True)
    return Case(project_with(tmp, "csv_xy", frame=frame, fault=fault),
                ("stations.csv", "different values and no time", "L01-007 (lines 9, 207)"))


def c_same_place_two_ids(tmp):
    frame, fault = small_survey()
    frame.loc[30, ["E", "N"]] = frame.loc[29, ["E", "N"]].to_numpy()
    return Case(project_with(tmp, "shp", frame=frame, fault=fault),
                ("stations.shp", "same position", "L01-029 (feature 30) and L01-030 (feature 31)"))


def c_missing_value_column(tmp):
    p = project_with(tmp)
    edit(p, 'value_mv = "SP_mV"', 'value_mv = "sp_mv"')
    return Case(p, ("stations.shp", "no column 'sp_mv'", "SP_mV"))


def c_semicolon_csv(tmp):
    p = project_with(tmp, "csv")
    csv, lines = csv_lines(p)
    csv.write_text("\n".join(line.replace(",", ";") for line in lines) + "\n")
    return Case(p, ("stations.csv", "semicolon", "comma"))


def c_latin1_csv(tmp):
    frame, fault = small_survey()
    frame.loc[3, "STN"] = "Peña-3"
    p = project_with(tmp, "csv_xy", frame=frame, fault=fault)
    csv = p.parent / "stations.csv"
    csv.write_bytes(csv.read_text(encoding="utf-8").encode("latin-1"))
    return Case(p, ("stations.csv", "UTF-8"))


def c_faults_missing_prj(tmp):
    p = project_with(tmp)
    frame, fault = small_survey()
    gpd.GeoDataFrame({"FAULT": ["F-A"], "dip": [80.0], "dip_dir": [90.0]}, geometry=[fault], crs=UTM).to_file(
        p.parent / "faults.shp")
    (p.parent / "faults.prj").unlink()
    edit(p, 'path = "faults.gpkg"', 'path = "faults.shp"')
    return Case(p, ("faults.shp", "no CRS"))


def c_fault_one_vertex(tmp):
    p = project_with(tmp)
    gpd.GeoDataFrame({"FAULT": ["A", "B"], "dip": [80.0, 80.0], "dip_dir": [90.0, 90.0]},
                     geometry=[LineString([(500400, 4499800), (500420, 4501300)]),
                               LineString([(500300, 4500000), (500300, 4500000)])], crs=UTM).to_file(
        p.parent / "faults.gpkg", layer="faults")
    return Case(p, ("faults.gpkg", "feature 2 (B)", "degenerate"))


def c_fault_dip_out_of_range(tmp):
    p = project_with(tmp)
    _, fault = small_survey()
    gpd.GeoDataFrame({"FAULT": ["F-A"], "dip": [120.0], "dip_dir": [90.0]}, geometry=[fault], crs=UTM).to_file(
        p.parent / "faults.gpkg", layer="faults")
    return Case(p, ("faults.gpkg", "dip", "feature 1 (F-A)"))


def c_fault_missing_id_column(tmp):
    p = project_with(tmp)
    edit(p, 'id = "FAULT"', 'id = "NAME"')
    return Case(p, ("faults.gpkg", "no column 'NAME'"))


def c_faults_file_missing(tmp):
    p = project_with(tmp)
    (p.parent / "faults.gpkg").unlink()
    return Case(p, ("faults.gpkg", "does not exist"))


def c_gpkg_two_layers(tmp):
    p = project_with(tmp, "gpkg")
    gpd.GeoDataFrame({"STN": ["X"]}, geometry=[Point(500000, 4500000)], crs=UTM).to_file(
        p.parent / "stations.gpkg", layer="other")
    return Case(p, ("stations.gpkg", "2 layers", "layer ="))


def c_gpkg_wrong_layer(tmp):
    p = project_with(tmp, "gpkg")
    edit(p, 'path = "stations.gpkg"', 'path = "stations.gpkg"\nlayer = "points"')
    return Case(p, ("stations.gpkg", "no layer 'points'", "stations"))


def c_dem_all_nodata(tmp):
    return Case(with_dem(project_with(tmp), value=-9999.0, nodata=-9999.0), ("dem.tif", "nodata only"))


def c_dem_not_covering_csv(tmp):
    p = project_with(tmp, "csv")
    # Covers the northern half of the lines only.
    return Case(with_dem(p, north=4501500.0, shape=(24, 100)), ("dem.tif", "does not cover", "(line 2)"))


def c_dem_text(tmp):
    p = with_dem(project_with(tmp))
    (p.parent / "dem.tif").write_text("not a raster\n")
    return Case(p, ("dem.tif", "cannot be read as a raster"))


def c_dem_no_crs(tmp):
    return Case(with_dem(project_with(tmp), crs=None), ("dem.tif", "no coordinate reference system"))


def c_dem_missing(tmp):
    p = project_with(tmp)
    p.write_text(p.read_text() + '\n[dem]\npath = "nowhere/dem.tif"\n')
    return Case(p, ("dem.tif", "not found"))


def c_project_unknown_section(tmp):
    p = project_with(tmp)
    p.write_text(p.read_text() + "\n[fits]\nn_starts = 3\n")
    return Case(p, ("project.toml", "unknown section [fits]", "[fit]"))


def c_project_bad_type(tmp):
    p = project_with(tmp)
    p.write_text(p.read_text() + '\n[detect]\nn_null = "many"\n')
    return Case(p, ("project.toml", "n_null", "wrong type", "a number"))


def c_project_bad_bool(tmp):
    p = project_with(tmp)
    p.write_text(p.read_text() + '\n[detect]\ncultural = "yes"\n')
    return Case(p, ("project.toml", "cultural", "true or false"))


def c_project_no_faults(tmp):
    p = project_with(tmp)
    text = p.read_text()
    p.write_text(text[: text.index("[faults]")])
    return Case(p, ("project.toml", "[faults] section is missing"))


def c_project_no_station_id(tmp):
    p = project_with(tmp)
    edit(p, 'id = "STN"\n', "")
    return Case(p, ("project.toml", "[stations] needs 'id'"))


def c_project_section_as_value(tmp):
    p = project_with(tmp)
    p.write_text('dem = "dem.tif"\n' + p.read_text())
    return Case(p, ("project.toml", "'dem' must be a section"))


def c_project_bad_toml(tmp):
    p = project_with(tmp)
    edit(p, 'path = "faults.gpkg"', "path = faults.gpkg")
    return Case(p, ("project.toml", "not valid TOML", "quotes"))


def c_project_is_a_folder(tmp):
    folder = tmp / "survey.toml"
    folder.mkdir()
    return Case(folder, ("survey.toml", "is a folder"))


def c_project_crs_geographic(tmp):
    p = project_with(tmp)
    edit(p, 'name = "Test survey"', 'name = "Test survey"\ncrs = "EPSG:4326"')
    return Case(p, ("project.toml", "geographic", "projected CRS"))


def c_project_crs_unknown(tmp):
    p = project_with(tmp)
    edit(p, 'name = "Test survey"', 'name = "Test survey"\ncrs = "EPSG:999999"')
    return Case(p, ("project.toml", "not a known CRS"))


def c_project_bad_option_value(tmp):
    p = project_with(tmp)
    p.write_text(p.read_text() + '\n[detect]\nfalse_alarm_rate = 2.0\n')
    return Case(p, ("false_alarm_rate", "between 0 and 1"))


def c_out_is_an_input_file(tmp):
    p = project_with(tmp, "csv")
    return Case(p, ("stations.csv", "--out"), out=p.parent / "stations.csv")


def c_out_is_input_folder_with_output_name(tmp):
    p = project_with(tmp)
    (p.parent / "faults.gpkg").rename(p.parent / "interpretation.gpkg")
    edit(p, 'path = "faults.gpkg"', 'path = "interpretation.gpkg"')
    return Case(p, ("interpretation.gpkg", "is an input", "--out"), out=p.parent)


def c_out_is_the_project_file(tmp):
    p = project_with(tmp)
    return Case(p, ("project.toml", "--out"), out=p)


def c_readings_unknown_from(tmp):
    def mutate(t):
        t.loc[4, "FROM"] = "L09-004"
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("dv.csv", "L09-004 (line 6)"))


def c_readings_backwards_in_time(tmp):
    def mutate(t):
        t.loc[6, "TIME"] = "2026-03-02T07:00:00"
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("dv.csv", "time runs backwards", "line 8 (L01)"))


def c_readings_duplicate(tmp):
    # The repeat follows its original (file line 5), so it is file line 6 and time does not run back.
    repeat = lambda t: pd.concat([t.iloc[:4], t.iloc[[3]], t.iloc[4:]], ignore_index=True)  # noqa: E731
    return Case(readings_survey(tmp, mutate=repeat), ("dv.csv", "duplicate readings", "at line 6."))


def c_readings_self(tmp):
    def mutate(t):
        t.loc[2, "TO"] = t.loc[2, "FROM"]
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("dv.csv", "to itself", "line 4"))


def c_readings_bad_time(tmp):
    def mutate(t):
        t.loc[9, "TIME"] = "02/03/2026 10:00"
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("dv.csv", "ISO 8601", "line 11"))


def c_readings_text_value(tmp):
    def mutate(t):
        t["DV"] = t["DV"].astype(object)
        t.loc[1, "DV"] = "n/a"
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("dv.csv", "not a number at line 3"))


def c_readings_line_not_tied(tmp):
    return Case(readings_survey(tmp, mutate=lambda t: t[t.LINE != "TIE"].reset_index(drop=True)),
                ("dv.csv", "not connected", "tie readings"))


def c_readings_reference_unknown(tmp):
    p = readings_survey(tmp)
    edit(p, 'value_mv = "DV"', 'value_mv = "DV"\nreference_station = "Z-1"')
    return Case(p, ("reference_station 'Z-1'",))


def c_readings_checks_missing(tmp):
    p = readings_survey(tmp)
    edit(p, 'value_mv = "DV"', 'value_mv = "DV"\nelectrode_checks = "checks.csv"')
    return Case(p, ("checks.csv", "does not exist"))


def c_out_inside_an_input_file(tmp):
    p = project_with(tmp, "csv")
    return Case(p, ("stations.csv", "cannot be created", "--out"), out=p.parent / "stations.csv" / "results")


def c_run_two_stations_only(tmp):
    frame, fault = small_survey(n_lines=1, n_per_line=2)
    return Case(project_with(tmp, frame=frame, fault=fault, extra=FAST), ("stations",))


def c_station_far_from_the_others(tmp):
    frame, fault = small_survey()
    frame.loc[4, "E"] = 1.0e9  # a typing error of the easting
    return Case(project_with(tmp, "csv_xy", frame=frame, fault=fault),
                ("stations.csv", "1 station(s) lie more than 200 km", "L01-004 (line 6", "coordinates"))


def c_value_scale_auto(tmp):
    p = project_with(tmp)
    edit(p, 'elevation = "ELEV"', 'elevation = "ELEV"\nvalue_scale = "auto"')
    return Case(p, ("project.toml", "value_scale", "wrong type", "a number"))


def c_value_scale_zero(tmp):
    p = project_with(tmp)
    edit(p, 'elevation = "ELEV"', 'elevation = "ELEV"\nvalue_scale = 0')
    return Case(p, ("project.toml", "value_scale = 0", "non-zero", "1000 for volts"))


def c_grid_method_unknown(tmp):
    return Case(project_with(tmp, extra=FAST + '\n[grid]\nmethod = "kriging"\n'), ("method = 'kriging'", "tension_spline"))


def c_detect_height_ratio_below_one(tmp):
    return Case(project_with(tmp, extra=FAST.replace("workers = 1", "workers = 1\ntemplate_height_ratios = [0.5]")),
                ("template_height_ratios", "above 1"))


def c_detect_workers_zero_in_project(tmp):
    return Case(project_with(tmp, extra=FAST.replace("workers = 1", "workers = 0")), ("workers", "positive whole number"),
                workers=False)


def c_detect_template_depth_text(tmp):
    return Case(project_with(tmp, extra=FAST.replace("workers = 1", 'workers = 1\ntemplate_top_depths_m = ["a"]')),
                ("template_top_depths_m",))


def c_detect_negative_seed(tmp):
    return Case(project_with(tmp, extra=FAST.replace("workers = 1", "workers = 1\nseed = -1")), ("seed",))


def c_detect_null_too_small(tmp):
    return Case(project_with(tmp, extra=FAST.replace("n_null = 200", "n_null = 5")), ("n_null", "100"))


def c_grid_negative_seed(tmp):
    return Case(project_with(tmp, extra=FAST + "\n[grid]\nseed = -1\n"), ("seed",))


def test_grid_with_a_far_station_fails_cleanly():
    """
    A station 10^6 km away (a coordinate typo that a caller skipped the load-time check
    for) must give an InputError from the gridding, not an attempt to allocate hundreds of GB.
    """
    from geosp.errors import GeospError
    from geosp.grid import grid_stations
    from geosp.models import Stations

    frame, _ = small_survey()
    e = frame.E.to_numpy().copy()
    e[4] = 1.0e9
    stations = Stations(station_id=frame.STN.to_numpy(), easting=e, northing=frame.N.to_numpy(),
                        upward=np.full(len(e), np.nan), sp_mv=frame.SP_mV.to_numpy(), crs=UTM,
                        line_id=frame.LINE.to_numpy())
    import resource

    if not Path("/proc/self/status").exists():
        pytest.skip("needs Linux /proc to cap the address space safely")
    # Cap the address space (current size + 8 GB) so a runaway allocation fails at once
    # even where the kernel overcommits memory.
    size = next(int(line.split()[1]) * 1024 for line in Path("/proc/self/status").read_text().splitlines()
                if line.startswith("VmSize:"))
    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    resource.setrlimit(resource.RLIMIT_AS, (size + 8 * 2**30, hard))
    try:
        with pytest.raises(GeospError, match="wrong coordinates"):
            grid_stations(stations)
    finally:
        resource.setrlimit(resource.RLIMIT_AS, (soft, hard))


def c_fault_ids_repeated(tmp):
    p = project_with(tmp)
    gpd.GeoDataFrame({"FAULT": ["F-A", "F-A"], "dip": [80.0, 80.0], "dip_dir": [90.0, 90.0]},
                     geometry=[LineString([(500400, 4499800), (500420, 4501300)]),
                               LineString([(500700, 4499800), (500720, 4501300)])], crs=UTM).to_file(
        p.parent / "faults.gpkg", layer="faults")
    return Case(p, ("faults.gpkg", "fault id 'F-A'", "features 1, 2"))


def c_sp_value_absurd(tmp):
    frame, fault = small_survey()
    frame.loc[7, "SP_mV"] = 1e300
    return Case(project_with(tmp, "gpkg", frame=frame, fault=fault),
                ("stations.gpkg", "SP_mV", "outside", "feature 8 (L01-007)"))


def c_elevation_in_millimetres(tmp):
    frame, fault = small_survey()
    frame.loc[3, "ELEV"] = 1_000_000.0
    return Case(project_with(tmp, frame=frame, fault=fault), ("stations.shp", "ELEV", "feature 4 (L01-003)"))


def c_reading_absurd(tmp):
    def mutate(t):
        t.loc[4, "DV"] = -3e12
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("dv.csv", "DV", "line 6"))


def c_readings_mixed_time_zones(tmp):
    def mutate(t):
        t.loc[:5, "TIME"] = t.loc[:5, "TIME"] + "+02:00"
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("dv.csv", "mixes times with a time zone", "line 2",
                                                      "line 8"))


def c_faults_geojson_projected_without_crs(tmp):
    import json

    p = project_with(tmp)
    (p.parent / "faults.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"FAULT": "F-A", "dip": 80, "dip_dir": 90},
         "geometry": {"type": "LineString", "coordinates": [[500400, 4499800], [500420, 4501300]]}}]}))
    edit(p, 'path = "faults.gpkg"', 'path = "faults.geojson"')
    return Case(p, ("faults.geojson", "cannot be degrees", "RFC 7946"))


def c_project_path_with_nul(tmp):
    p = project_with(tmp)
    edit(p, 'path = "faults.gpkg"', 'path = "faults\\u0000.gpkg"')
    return Case(p, ("[faults] path", "NUL"))


def c_detect_starts_absurd(tmp):
    return Case(project_with(tmp, extra=FAST.replace("n_starts = 8", "n_starts = 1e20")), ("n_starts",))


def c_detect_number_of_600_digits(tmp):
    return Case(project_with(tmp, extra=FAST.replace("n_starts = 8", "n_starts = " + "9" * 600)),
                ("n_starts", "(600 digits)"))


# Work-arounds: these must succeed (``geosp check``), with the fragment in the summary.

def ok_bom_csv(tmp):
    p = project_with(tmp, "csv")
    csv = p.parent / "stations.csv"
    csv.write_bytes(b"\xef\xbb\xbf" + csv.read_bytes())
    return Case(p, ("205 on 5 lines",), ok=True, command="check")


def ok_crlf_csv(tmp):
    p = project_with(tmp, "csv")
    csv = p.parent / "stations.csv"
    csv.write_bytes(csv.read_bytes().replace(b"\n", b"\r\n"))
    return Case(p, ("205 on 5 lines",), ok=True, command="check")


def ok_faults_in_geographic_crs(tmp):
    p = project_with(tmp)
    _, fault = small_survey()
    gpd.GeoDataFrame({"FAULT": ["F-A"], "dip": [80.0], "dip_dir": [90.0]}, geometry=[fault], crs=UTM).to_crs(
        4326).to_file(p.parent / "faults.gpkg", layer="faults")
    # The 1.63 km trace keeps its length after reprojection to the working CRS.
    return Case(p, ("1 traces, 1.6 km in all", "EPSG:32633"), ok=True, command="check")


def ok_dem_in_geographic_crs(tmp):
    # The DEM spans about 2.6 x 3.3 km around the stations, in degrees.
    p = project_with(tmp)
    return Case(with_dem(p, crs="EPSG:4326", west=14.99, north=40.66, cell=0.0003, shape=(110, 100)),
                ("DEM", "covers every station", "elevations 1000–1000 m"), ok=True, command="check")


def ok_one_fault_far_away(tmp):
    p = project_with(tmp)
    _, fault = small_survey()
    gpd.GeoDataFrame({"FAULT": ["F-A", "F-FAR"], "dip": [80.0, 80.0], "dip_dir": [90.0, 90.0]},
                     geometry=[fault, LineString([(530000, 4500000), (530000, 4501000)])], crs=UTM).to_file(
        p.parent / "faults.gpkg", layer="faults")
    return Case(p, ("Fault F-FAR (feature 2)", "outside the survey"), ok=True, command="check")


def ok_stations_geographic_gpkg(tmp):
    p = project_with(tmp, "gpkg")
    gdf = gpd.read_file(p.parent / "stations.gpkg").to_crs(4326)
    gdf.to_file(p.parent / "stations.gpkg", layer="stations")
    return Case(p, ("205 on 5 lines", "EPSG:32633"), ok=True, command="check")


def ok_line_with_one_station(tmp):
    frame, fault = small_survey()
    frame = pd.concat([frame, pd.DataFrame([{"STN": "X-1", "LINE": "X", "E": 500300.0, "N": 4500333.0,
                                            "SP_mV": 5.0, "ELEV": 1000.0}])], ignore_index=True)
    return Case(project_with(tmp, frame=frame, fault=fault), ("206 on 6 lines",), ok=True, command="check")


def ok_project_file_with_byte_order_mark(tmp):
    p = project_with(tmp)
    p.write_bytes(b"\xef\xbb\xbf" + p.read_bytes())
    return Case(p, ("205 on 5 lines",), ok=True, command="check")


def ok_readings_all_with_offsets(tmp):
    def mutate(t):
        t["TIME"] = t["TIME"] + "+02:00"
        return t
    return Case(readings_survey(tmp, mutate=mutate), ("gradient readings",), ok=True, command="check")


CASES = [v for k, v in sorted(globals().items()) if k.startswith("c_")]
# These were failures of the stage code (exit 1); the project loader now refuses them with exit 2.
OK_CASES = [v for k, v in sorted(globals().items()) if k.startswith("ok_")]


def _run(capsys, case, tmp_path):
    args = [case.command, str(case.project)]
    if case.command != "check":
        args += ["--out", str(case.out), "--quiet"] + (["--workers", "1"] if case.workers else [])
    code = main(args)
    out, err = capsys.readouterr()
    return code, out, err


def test_corpus_is_large_enough():
    assert len(CASES) + len(OK_CASES) >= 40


@pytest.mark.parametrize("build", CASES, ids=[c.__name__[2:] if callable(c) else c.id for c in CASES])
def test_bad_input_exits_2_with_one_message_and_touches_nothing(build, tmp_path, capsys):
    case = build(tmp_path)
    if case.out is None:
        case.out = fake_outputs(tmp_path / "earlier_run")
    before = snapshot(tmp_path)
    code, out, err = _run(capsys, case, tmp_path)
    assert code == 2, (out, err)
    assert "Traceback" not in err and "internal error" not in err
    assert err.count("geosp: error:") == 1 and err.startswith("geosp: error:"), err
    for fragment in case.fragments:
        assert fragment in err, (fragment, err)
    assert snapshot(tmp_path) == before, "a failed run changed or left files"


@pytest.mark.parametrize("build", OK_CASES, ids=[c.__name__[3:] for c in OK_CASES])
def test_inputs_geosp_can_work_around(build, tmp_path, capsys):
    case = build(tmp_path)
    before = snapshot(tmp_path)
    code, out, err = _run(capsys, case, tmp_path)
    assert code == 0, err
    for fragment in case.fragments:
        assert fragment in out, (fragment, out)
    assert snapshot(tmp_path) == before


# --------------------------------------------------------------------------- hostile text in the pages

CHROMIUM = "/usr/bin/chromium"
HOSTILE = ('<img src=x onerror="window.__pwned=1">', "</script><script>window.__pwned=2</script>",
           '"><svg onload=window.__pwned=3>',
           # Template syntax: folium compiles rendered text as a Jinja template a
           # second time, so these would be evaluated (A49B), break the page
           # ({%raw%}) or trip the offline guard (the escaped @import).
           "A{{7*7}}B", "{%raw%}", "C{#D", "@import 'http://evil.example.invalid/x.css';",
           # matplotlib reads $...$ as mathematics (see TEMPLATE_FAULT, which reaches the figures).
           r"$\frac$")
TEMPLATE_FAULT = r"F{{6*7}} $\frac$"  # $...$ would be read by matplotlib as mathematics


@pytest.mark.slow
@pytest.mark.browser
@pytest.mark.skipif(not Path(CHROMIUM).exists(), reason=f"{CHROMIUM} is missing (Debian chromium package)")
def test_hostile_values_reach_the_pages_as_text_only(tmp_path, capsys):
    """
    Station ids, a line id, the fault name, a file name and the survey name
    carry markup that runs script if a page inserts it unescaped, and
    template syntax that runs if any text is compiled as a template; after a
    whole run both pages, opened in chromium, show every value verbatim and
    never run it, and the GeoPackage and run.json hold it verbatim.
    """
    import json
    import sqlite3
    import tomllib

    sync_api = pytest.importorskip("playwright.sync_api", reason="python playwright is not installed")
    frame, fault = small_survey()
    station_ids = {}
    for k, text in enumerate(HOSTILE):
        row = 3 + 25 * k
        frame.loc[row, "STN"] = f"{text}-{k}"
        station_ids[row] = f"{text}-{k}"
    frame.loc[frame.LINE == "L02", "LINE"] = HOSTILE[1]
    # A basemap attribution is user text too (the tiles themselves are blocked below).
    publish = FAST.replace("false", "true") + (f'tiles = "https://tiles.example.invalid/{{z}}/{{x}}/{{y}}.png"\n'
                                               f"tiles_attribution = {json.dumps('Invented tiles ' + HOSTILE[2])}\n")
    project = write_survey(tmp_path / "s", "gpkg", frame=frame, fault=fault, extra_project=publish)
    fault_file = "faults {{7*7}} $x$.gpkg"
    gpd.GeoDataFrame({"FAULT": [HOSTILE[0] + TEMPLATE_FAULT], "dip": [80.0], "dip_dir": [90.0]},
                     geometry=[fault], crs=UTM).to_file(project.parent / fault_file, layer="faults")
    edit(project, 'path = "faults.gpkg"', f"path = {json.dumps(fault_file)}")
    name = " ".join(HOSTILE)
    edit(project, 'name = "Test survey"', f"name = {json.dumps(name)}")  # a TOML basic string
    out = tmp_path / "out"
    code = main(["run", str(project), "--out", str(out), "--workers", "1", "--quiet"])
    assert code == 0, capsys.readouterr().err

    # The GeoPackage holds the ids as given (read with sqlite3, not with geosp).
    with sqlite3.connect(out / "interpretation.gpkg") as db:
        ids = {r[0] for r in db.execute("SELECT station_id FROM stations")}
        lines = {r[0] for r in db.execute("SELECT line_id FROM stations")}
        faults = {r[0] for r in db.execute("SELECT fault_id FROM fault_segments")}
    assert set(station_ids.values()) <= ids
    assert HOSTILE[1] in lines
    assert faults == {HOSTILE[0] + TEMPLATE_FAULT}
    # run.json keeps the project text as written and names the input files.
    provenance = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert tomllib.loads(provenance["project_text"])["survey"]["name"] == name
    assert fault_file in provenance["inputs"]

    with sync_api.sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=CHROMIUM, args=[
            "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
            "--no-first-run", "--disable-sync"])
        try:
            for page_name in ("map.html", "report.html"):
                page = browser.new_page()
                page.route("**/*", lambda r: r.continue_() if r.request.url.startswith(("file:", "data:"))
                           else r.abort())
                page.goto((out / page_name).as_uri())
                page.wait_for_load_state("load")
                page.wait_for_timeout(500)
                assert page.evaluate("typeof window.__pwned") == "undefined", page_name
                assert page.evaluate("document.querySelectorAll('img[src=\"x\"], svg[onload]').length") == 0
                text = page.inner_text("body")
                # The survey name (every value) is the title of both pages.
                for value in HOSTILE:
                    assert value in text, (page_name, value)
                assert "A49B" not in text and "F42" not in text
                if page_name == "map.html":
                    attribution = page.inner_text(".leaflet-control-attribution")
                    assert "Invented tiles " + HOSTILE[2] in attribution
                    # Popups and tooltips show a feature's HTML; read it as the browser shows it.
                    shown = page.evaluate("""() => {
                        const map = Object.values(window).find(v => v instanceof L.Map);
                        const out = {stations: [], faults: []};
                        const as_text = h => { const d = document.createElement('div');
                                               d.innerHTML = h; return d.textContent; };
                        map.eachLayer(l => {
                            const p = l.feature && l.feature.properties;
                            if (p && p.Station !== undefined) out.stations.push(as_text(p.Station));
                            if (p && p.Fault !== undefined) out.faults.push(as_text(p.Fault));
                        });
                        return out;
                    }""")
                    assert set(station_ids.values()) <= set(shown["stations"])
                    assert set(shown["faults"]) == {HOSTILE[0] + TEMPLATE_FAULT}
                else:
                    assert HOSTILE[0] + TEMPLATE_FAULT in text
                page.close()
        finally:
            browser.close()
