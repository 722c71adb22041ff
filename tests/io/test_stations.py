"""Station and fault readers: every format, CRS handling, and the validation messages."""

import numpy as np
import numpy.testing as npt
import pandas as pd
import pyproj
import pytest

from geosp.errors import InputError
from geosp.io.faults import read_faults
from geosp.io.project import read_project
from geosp.io.stations import read_stations
from tests.conftest import UTM, small_survey, write_survey


def _read(project_path, crs=UTM):
    project = read_project(project_path)
    return read_stations(project.stations, crs=crs), project


@pytest.mark.parametrize("fmt", ["shp", "gpkg", "geojson", "csv", "csv_xy"])
def test_every_format_round_trips_positions_and_values(tmp_path, fmt):
    frame, _ = small_survey()
    stations, _ = _read(write_survey(tmp_path / fmt, fmt))
    assert list(stations["station_id"]) == list(frame["STN"])
    npt.assert_allclose(stations["sp_mv"], frame["SP_mV"])
    npt.assert_allclose(stations["elev_m"], frame["ELEV"])
    # Positions: lon/lat written with 9 decimals (~0.1 mm) and GeoJSON in WGS 84 round trip
    # through pyproj; 1 mm is far below any survey's GNSS error.
    npt.assert_allclose(stations.geometry.x, frame["E"], atol=1e-3)
    npt.assert_allclose(stations.geometry.y, frame["N"], atol=1e-3)
    assert list(stations["line_id"].unique())[:2] == ["L01", "L02"]


def test_zipped_shapefile_reads_like_the_plain_one(tmp_path):
    import zipfile

    project = write_survey(tmp_path / "z", "shp")
    folder = project.parent
    with zipfile.ZipFile(folder / "stations.zip", "w") as z:
        for part in folder.glob("stations.*"):
            if part.suffix != ".zip":
                z.write(part, part.name)
    project.write_text(project.read_text().replace("stations.shp", "stations.zip"))
    stations, _ = _read(project)
    assert len(stations) == 5 * 41


def _snyder_utm(lat_deg, lon_deg, lon0_deg, a, f, k0=0.9996):
    """Transverse Mercator by the series of Snyder (1987), Map Projections: A Working Manual,
    USGS Prof. Paper 1395, eqs. 8-9 to 8-15 (from memory); independent of PROJ."""
    e2 = f * (2 - f)
    ep2 = e2 / (1 - e2)
    phi = np.radians(lat_deg)
    lam = np.radians(lon_deg - lon0_deg)
    n_ = a / np.sqrt(1 - e2 * np.sin(phi) ** 2)
    t = np.tan(phi) ** 2
    c = ep2 * np.cos(phi) ** 2
    aa = lam * np.cos(phi)
    m = a * ((1 - e2 / 4 - 3 * e2**2 / 64 - 5 * e2**3 / 256) * phi
             - (3 * e2 / 8 + 3 * e2**2 / 32 + 45 * e2**3 / 1024) * np.sin(2 * phi)
             + (15 * e2**2 / 256 + 45 * e2**3 / 1024) * np.sin(4 * phi)
             - (35 * e2**3 / 3072) * np.sin(6 * phi))
    x = k0 * n_ * (aa + (1 - t + c) * aa**3 / 6 + (5 - 18 * t + t**2 + 72 * c - 58 * ep2) * aa**5 / 120)
    y = k0 * (m + n_ * np.tan(phi) * (aa**2 / 2 + (5 - t + 9 * c + 4 * c**2) * aa**4 / 24
                                      + (61 - 58 * t + t**2 + 600 * c - 330 * ep2) * aa**6 / 720))
    return x, y


def test_snyder_worked_example_reproduced():
    # Snyder (1987) p. 61 worked example (values from memory): Clarke 1866, central meridian
    # 75° W, k0 = 0.9996, point 40°30' N, 73°30' W -> x = 127 106.5 m, y = 4 484 124.4 m.
    x, y = _snyder_utm(40.5, -73.5, -75.0, 6378206.4, 1 / 294.9786982)
    assert abs(x - 127106.5) < 0.2 and abs(y - 4484124.4) < 0.2
    tm = pyproj.Transformer.from_crs("EPSG:4326", "+proj=tmerc +lon_0=-75 +k=0.9996 +ellps=clrk66 +units=m",
                                     always_xy=True)
    px, py = tm.transform(-73.5, 40.5)
    assert abs(px - 127106.5) < 0.2 and abs(py - 4484124.4) < 0.2


def test_lonlat_csv_lands_where_the_snyder_series_puts_it(tmp_path):
    # Reference: Snyder's series (above) for WGS 84 in UTM zone 33 N (false easting 500 km);
    # the series is good to millimetres within 3° of the central meridian.
    rng = np.random.default_rng(1)
    lon = 15 + rng.uniform(-2, 2, 20)
    lat = rng.uniform(10, 60, 20)
    frame = pd.DataFrame({"STN": [f"S{i}" for i in range(20)], "SP": rng.normal(0, 20, 20), "lon": lon, "lat": lat})
    frame.to_csv(tmp_path / "s.csv", index=False)
    config = {"path": str(tmp_path / "s.csv"), "id": "STN", "value_mv": "SP", "lon": "lon", "lat": "lat"}
    stations = read_stations(config, crs=UTM)
    x, y = _snyder_utm(lat, lon, 15.0, 6378137.0, 1 / 298.257223563)
    npt.assert_allclose(stations.geometry.x, x + 500000.0, atol=0.01)
    npt.assert_allclose(stations.geometry.y, y, atol=0.01)


def _csv(tmp_path, rows, header="STN,SP,lon,lat"):
    path = tmp_path / "s.csv"
    path.write_text(header + "\n" + "\n".join(rows) + "\n")
    return {"path": str(path), "id": "STN", "value_mv": "SP", "lon": "lon", "lat": "lat"}


GOOD = [f"S{i},{10 + i},15.{i:04d},45.0" for i in range(6)]


def test_blank_and_text_values_are_reported_with_line_numbers(tmp_path):
    rows = list(GOOD)
    rows[1] = "S1,,15.0001,45.0"
    rows[3] = "S3,12 mV,15.0003,45.0"
    with pytest.raises(InputError) as err:
        read_stations(_csv(tmp_path, rows))
    text = str(err.value)
    assert "s.csv" in text
    assert "blank at line 3 (S1)" in text
    assert "not a number at line 5 (S3)" in text
    assert "never read as 0" in text


def test_values_in_volts_are_refused_with_the_fix(tmp_path):
    rows = [f"S{i},0.0{i}5,15.{i:04d},45.0" for i in range(6)]
    with pytest.raises(InputError, match="look like volts.*value_scale = 1000"):
        read_stations(_csv(tmp_path, rows))


def test_duplicate_id_at_two_places_is_refused(tmp_path):
    rows = list(GOOD)
    rows[4] = "S1,14,15.0100,45.0"
    with pytest.raises(InputError, match=r"duplicate station ids at different positions: S1 \(lines 3, 6"):
        read_stations(_csv(tmp_path, rows))


def test_two_stations_at_one_place_with_different_values_are_refused(tmp_path):
    rows = list(GOOD)
    rows[4] = "S4,99,15.0001,45.0"
    with pytest.raises(InputError, match="same position with different values: S1 .line 3. and S4 .line 6."):
        read_stations(_csv(tmp_path, rows))


def test_missing_column_suggests_the_near_one(tmp_path):
    config = _csv(tmp_path, GOOD, header="STN,SP_mv,lon,lat")
    with pytest.raises(InputError, match="no column 'SP' for value_mv .did you mean 'SP_mv'"):
        read_stations(config)


def test_xy_declared_geographic_is_refused(tmp_path):
    config = _csv(tmp_path, GOOD, header="STN,SP,x,y")
    config.update(x="x", y="y", crs="EPSG:4326", lon="", lat="")
    with pytest.raises(InputError, match="geographic CRS.*use lon"):
        read_stations(config)


def test_missing_shx_is_named(tmp_path):
    project = write_survey(tmp_path / "m", "shp")
    (project.parent / "stations.shx").unlink()
    with pytest.raises(InputError, match="stations.shx is missing"):
        _read(project)


def test_missing_prj_means_no_crs(tmp_path):
    project = write_survey(tmp_path / "p", "shp")
    (project.parent / "stations.prj").unlink()
    with pytest.raises(InputError, match="has no CRS"):
        _read(project)


def test_faults_reprojected_and_dips_read(tmp_path):
    project = read_project(write_survey(tmp_path / "f", "shp"))
    faults = read_faults(project.faults, crs="EPSG:32634")
    assert len(faults) == 1 and faults[0].fault_id == "F-A"
    assert faults[0].dip_deg == 80.0 and faults[0].dip_dir_deg == 90.0
    # Reference: pyproj moves the first vertex from zone 33 to zone 34.
    x, y = pyproj.Transformer.from_crs(UTM, "EPSG:32634", always_xy=True).transform(500400.0, 4499700.0)
    npt.assert_allclose(faults[0].coords[0], [x, y], atol=1e-6)
