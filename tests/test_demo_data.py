"""
Checks of the bundled demo area (demo_area/): the shipped files read, agree
with one another, and reproduce the planted truth by independent means.

References used below: pyproj (coordinate transforms), the point-dipole
(double-layer) integral with an image for the insulating surface
[Kellogg1929]_, the half-space point pole V = k/r [Telford1990]_, and the
contrast factor of physics.md §2.3.
"""

import hashlib
import importlib.util
import json
import tomllib
from pathlib import Path

import geopandas as gpd
import numpy as np
import numpy.testing as npt
import pandas as pd
import pyproj
import pytest
import rasterio
from scipy.interpolate import RegularGridInterpolator
from shapely import Point

DEMO = Path(__file__).resolve().parents[1] / "demo_area"
CRS = "EPSG:32633"
TEXT_FILES = ["stations_gps.csv", "dipoles.csv", "electrode_checks.csv", "truth_stations.csv",
              "truth.json", "project.toml", "project_total_field.toml"]


@pytest.fixture(scope="module")
def truth():
    return json.loads((DEMO / "truth.json").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def shp():
    return gpd.read_file(DEMO / "stations.shp", engine="pyogrio")


@pytest.fixture(scope="module")
def gps():
    return pd.read_csv(DEMO / "stations_gps.csv", dtype={"lon": float, "lat": float})


@pytest.fixture(scope="module")
def dipoles():
    return pd.read_csv(DEMO / "dipoles.csv")


@pytest.fixture(scope="module")
def checks():
    return pd.read_csv(DEMO / "electrode_checks.csv", parse_dates=["time"])


@pytest.fixture(scope="module")
def truth_stations():
    return pd.read_csv(DEMO / "truth_stations.csv").set_index("STN")


def test_shipped_files_exist_and_read(shp, gps, dipoles, checks):
    for name in TEXT_FILES + ["stations.shp", "stations.shx", "stations.dbf", "stations.prj",
                              "stations.cpg", "faults.gpkg", "dem.tif", "README.md",
                              "__init__.py", "make_demo.py"]:
        assert (DEMO / name).is_file(), name
    assert shp.crs == pyproj.CRS(CRS)
    assert list(shp.columns) == ["STN", "LINE", "SP_mV", "ELEV", "geometry"]
    assert list(gps.columns) == ["STN", "LINE", "lon", "lat", "ELEV_GPS"]
    assert list(dipoles.columns) == ["LINE", "FROM", "TO", "TIME", "DV_mV"]
    assert list(checks.columns) == ["time", "offset_mv"]
    assert 4000 <= len(gps) <= 6000  # "a few thousand stations"
    assert gps["STN"].is_unique and set(gps["STN"]) == set(shp["STN"])
    assert (DEMO / "stations.cpg").read_text().strip().upper() in {"UTF-8", "UTF8"}
    total = sum(p.stat().st_size for p in DEMO.iterdir() if p.is_file())
    assert total < 3_000_000


def test_project_files_use_contract_keys():
    # Keys as fixed in the user contract (design/contract.md, "Project file").
    allowed = {
        "survey": {"name", "crs"},
        "stations": {"path", "layer", "id", "value_mv", "line", "elevation", "lon", "lat",
                     "x", "y", "crs"},
        "readings": {"path", "line", "from", "to", "time", "value_mv", "electrode_checks",
                     "reference_station"},
        "faults": {"path", "layer", "id", "dip_deg", "dip_dir_deg"},
        "dem": {"path"},
    }
    gps_ids = set(pd.read_csv(DEMO / "stations_gps.csv")["STN"])
    for name in ("project.toml", "project_total_field.toml"):
        project = tomllib.loads((DEMO / name).read_text(encoding="utf-8"))
        stages = {"reduce", "grid", "detect", "fit", "publish"}
        assert set(project) <= set(allowed) | stages, name
        for section, keys in project.items():
            if section in stages:
                continue  # stage options: checked by geosp's own loader below
            assert set(keys) <= allowed[section], (name, section)
            for key in ("path", "electrode_checks"):
                if key in keys:
                    assert (DEMO / keys[key]).is_file(), (name, keys[key])
        from geosp.pipeline import load_project

        load_project(DEMO / name)  # raises on any unknown stage option
        assert project["survey"]["crs"] == CRS
    full = tomllib.loads((DEMO / "project.toml").read_text(encoding="utf-8"))
    assert "value_mv" not in full["stations"] and "readings" in full
    assert full["readings"]["reference_station"] in gps_ids
    total = tomllib.loads((DEMO / "project_total_field.toml").read_text(encoding="utf-8"))
    assert total["stations"]["value_mv"] == "SP_mV" and "readings" not in total


def test_gps_positions_match_shapefile_utm(shp, gps):
    # Reference: pyproj (always_xy). Tolerance 0.01 m: lon/lat carry 7
    # decimals, so rounding moves a point by at most 0.5e-7° = 5.6 mm north
    # and 4.2 mm east at 40.6° N (7.0 mm combined).
    to_utm = pyproj.Transformer.from_crs("EPSG:4326", CRS, always_xy=True)
    east, north = to_utm.transform(gps["lon"].to_numpy(), gps["lat"].to_numpy())
    ref = shp.set_index("STN").loc[gps["STN"]]
    npt.assert_allclose(east, ref.geometry.x.to_numpy(), atol=0.01, rtol=0)
    npt.assert_allclose(north, ref.geometry.y.to_numpy(), atol=0.01, rtol=0)
    # Handheld heights are noisy (a few m) but unbiased against the DEM ground.
    dz = gps["ELEV_GPS"].to_numpy() - ref["ELEV"].to_numpy()
    assert abs(dz.mean()) < 0.5 and 1.0 < dz.std() < 5.0


def test_leapfrog_integration_reproduces_shapefile_differences(shp, dipoles, checks, truth):
    # Independent check: a plain cumulative sum of the raw readings along each
    # run, with no drift, offset or loop correction, must match the total-field
    # differences of the shapefile within what was planted: reading noise
    # (sigma_r*sqrt(n), 5 sigma) plus 0.1 mV rounding per reading (uniform,
    # sd 0.029) plus the leapfrog offset, which in leapfrog never accumulates
    # beyond one offset plus half the drift within the day (physics.md §4).
    sp = shp.set_index("STN")["SP_mV"]
    sigma_r = truth["noise"]["reading_sd_mv"]
    sd_step = np.hypot(sigma_r, 0.1 / np.sqrt(12))
    offset_bound = checks["offset_mv"].abs().max() + (
        checks.groupby(checks["time"].dt.date)["offset_mv"].agg(lambda v: v.max() - v.min()).max())
    blunder = truth["blunder"]
    for run, readings in dipoles.groupby("LINE", sort=False):
        assert (readings["FROM"].to_numpy()[1:] == readings["TO"].to_numpy()[:-1]).all(), run
        integrated = readings["DV_mV"].cumsum().to_numpy()
        expected = (sp.loc[readings["TO"]].to_numpy() - sp.loc[readings["FROM"].iloc[0]])
        n = np.arange(1, len(readings) + 1)
        residual = integrated - expected
        if run == blunder["line"]:
            k = list(readings.index).index(blunder["row"])
            assert readings.loc[blunder["row"], "FROM"] == blunder["from"]
            # The blunder shows as a step of its planted size in the residual.
            step = residual[k] - (residual[k - 1] if k else 0.0)
            assert abs(step - blunder["error_mv"]) < 5 * sd_step + 2 * offset_bound
            residual[k:] -= blunder["error_mv"]
        assert np.all(np.abs(residual) <= 5 * sd_step * np.sqrt(n) + offset_bound + 0.01), run


def test_runs_form_loops_and_lines_are_complete(dipoles, gps, truth):
    # Every tie run passes through one station of every survey line, using
    # the line's own station id, so line and tie readings close loops.
    lines = truth["survey"]["lines"]
    for tie, k in zip(truth["survey"]["tie_lines"], truth["survey"]["tie_crossing_station_numbers"]):
        touched = set(dipoles.loc[dipoles["LINE"] == tie, ["FROM", "TO"]].to_numpy().ravel())
        assert {f"{line}-{k:03d}" for line in lines} <= touched
    counts = dipoles.groupby("LINE").size()
    stations_per_line = gps.groupby("LINE").size()
    for line in lines:
        assert counts[line] == stations_per_line[line] - 1
    assert set(dipoles["FROM"]) | set(dipoles["TO"]) == set(gps["STN"])


def test_electrode_checks_bracket_each_field_day(dipoles, checks):
    # Common practice (physics.md §4): check the pair at the start and end of
    # each day; offsets of a few mV, drift a few mV per day.
    times = pd.to_datetime(dipoles["TIME"])
    assert times.groupby(times.dt.date).apply(lambda t: t.is_monotonic_increasing).all()
    for day, t in times.groupby(times.dt.date):
        day_checks = checks.loc[checks["time"].dt.date == day, "time"]
        assert len(day_checks) >= 2
        assert day_checks.min() < t.min() and day_checks.max() > t.max()
    assert 10 <= times.dt.date.nunique() <= 16  # two lines a day
    assert checks["offset_mv"].abs().max() <= 6.5
    gaps = times.diff().dt.total_seconds()
    same_run = dipoles["LINE"].eq(dipoles["LINE"].shift())
    assert gaps[same_run].between(30, 120).all()  # about one reading a minute


def _bilinear_reference(path, east, north):
    with rasterio.open(path) as src:
        values = src.read(1).astype(float)
        t = src.transform
    xc = t.c + (np.arange(values.shape[1]) + 0.5) * t.a
    yc = t.f + (np.arange(values.shape[0]) + 0.5) * t.e
    interp = RegularGridInterpolator((yc[::-1], xc), values[::-1], method="linear")
    return interp(np.c_[north, east])


def test_dem_covers_every_station(shp):
    with rasterio.open(DEMO / "dem.tif") as src:
        assert src.crs == rasterio.crs.CRS.from_string(CRS)
        assert src.res == (25.0, 25.0) and src.dtypes[0] == "float32"
        left, bottom, right, top = src.bounds
        nodata = src.nodata
    x, y = shp.geometry.x.to_numpy(), shp.geometry.y.to_numpy()
    margin = 200.0
    assert x.min() - margin > left and x.max() + margin < right
    assert y.min() - margin > bottom and y.max() + margin < top
    # Independent bilinear interpolation (scipy) between cell centres
    # reproduces the shapefile's ELEV, rounded to 0.01 m.
    elev = _bilinear_reference(DEMO / "dem.tif", x, y)
    assert np.all(np.isfinite(elev)) and not np.any(elev == nodata)
    npt.assert_allclose(elev, shp["ELEV"].to_numpy(), atol=0.006, rtol=0)
    assert 100.0 <= elev.max() - elev.min() <= 300.0


def test_faults_layer_has_bend_crossing_and_unknown_dips(truth):
    faults = gpd.read_file(DEMO / "faults.gpkg", layer="faults", engine="pyogrio")
    assert faults.crs == pyproj.CRS("EPSG:4326")
    assert {"FAULT", "dip", "dip_dir"} <= set(faults.columns)
    assert 5 <= len(faults) <= 7 and faults["FAULT"].is_unique
    assert faults["dip"].isna().any() and faults["dip"].notna().any()
    utm = faults.to_crs(CRS).set_index("FAULT")
    assert (utm.length > 2000).all()
    # A bend: two limbs with strikes more than 20° apart.
    bends = 0
    for geom in utm.geometry:
        xy = np.asarray(geom.coords)
        az = np.degrees(np.arctan2(np.diff(xy[:, 0]), np.diff(xy[:, 1])))
        bends += np.any(np.abs(np.diff(az)) > 20)
    assert bends >= 1
    names = list(utm.index)
    crossings = [(a, b) for i, a in enumerate(names) for b in names[i + 1:]
                 if utm.geometry[a].crosses(utm.geometry[b])]
    assert crossings
    assert set(truth["source_free_faults"]) <= set(names)
    # Trace vertices in truth.json (UTM) match the reprojected layer (pyproj).
    for name, fault in truth["faults"].items():
        npt.assert_allclose(np.asarray(utm.geometry[name].coords), fault["vertices_xy"], atol=0.01)


def test_truth_sources_follow_contract_schema(truth):
    faults = gpd.read_file(DEMO / "faults.gpkg", layer="faults", engine="pyogrio").to_crs(CRS)
    faults = faults.set_index("FAULT")
    keys = {"model", "top_x", "top_y", "strike_deg", "dip_deg", "dip_dir_deg", "top_depth_m",
            "bottom_depth_m", "length_m", "jump_mv", "sigma_ratio", "fault_id"}
    sources = truth["sources"]
    assert len(sources) == 3
    assert sorted(s["dip_deg"] for s in sources) == [60.0, 85.0, 90.0]
    assert any(s["sigma_ratio"] >= 3 for s in sources)
    for src in sources:
        assert keys <= set(src)
        assert src["fault_id"] in faults.index and src["fault_id"] not in truth["source_free_faults"]
        # Contract: dip direction = strike + 90° (right-hand rule).
        assert (src["dip_dir_deg"] - src["strike_deg"]) % 360 == pytest.approx(90.0, abs=1e-3)
        assert 100 <= src["top_depth_m"] <= 300 and 400 <= src["bottom_depth_m"] <= 1200
        assert 800 <= src["length_m"] <= 2000 and 60 <= abs(src["jump_mv"]) <= 200
        # The top-edge centre lies top_depth·cot(dip) down-dip of the mapped trace
        # (shapely distance to the reprojected trace; 0.05 m for vertex rounding).
        offset = src["top_depth_m"] / np.tan(np.radians(src["dip_deg"]))
        distance = faults.geometry[src["fault_id"]].distance(Point(src["top_x"], src["top_y"]))
        assert distance == pytest.approx(offset, abs=0.05)
        # Mapped dips (where given) agree with the planted ones.
        mapped = faults.loc[src["fault_id"], "dip"]
        if np.isfinite(mapped):
            assert mapped == src["dip_deg"]


def _brute_force_patch(east, north, up, src, m=200):
    """
    Surface SP (mV) of a patch as a sum of m×m point dipoles plus their images
    (on the surface the image doubles the full-space term: V = f/(2π)·Σ n·R/|R|³ dA)
    [Kellogg1929]_; conductivity contrast by the factor of physics.md §2.3.
    Depths are below each station's own elevation (``up`` - ``ground_m`` added,
    but never less than half the top depth: the model's rule for stations deep
    below the patch datum), with the plane through the mapped trace point, as
    truth.json states.
    """
    phi, dip = np.radians(src["strike_deg"]), np.radians(src["dip_deg"])
    s_hat = np.array([np.sin(phi), np.cos(phi), 0.0])
    d_hat = np.array([np.cos(phi), -np.sin(phi), 0.0])
    n_hat = np.sin(dip) * d_hat + np.array([0.0, 0.0, np.cos(dip)])
    trace = np.array([src["top_x"], src["top_y"], 0.0]) - src["top_depth_m"] / np.tan(dip) * d_hat
    out = np.empty(len(east))
    for i, (e, n, u) in enumerate(zip(east, north, up)):
        shift = max(u - src["ground_m"], -0.5 * src["top_depth_m"])
        w_top = (src["top_depth_m"] + shift) / np.sin(dip)
        w_bot = (src["bottom_depth_m"] + shift) / np.sin(dip)
        ds, dw = src["length_m"] / m, (w_bot - w_top) / m
        s = -src["length_m"] / 2 + (np.arange(m) + 0.5) * ds
        w = w_top + (np.arange(m) + 0.5) * dw
        down_dip = np.cos(dip) * d_hat - np.array([0.0, 0.0, np.sin(dip)])
        points = trace + s[:, None, None] * s_hat + w[None, :, None] * down_dip
        r = np.array([e, n, 0.0]) - points
        dist = np.linalg.norm(r, axis=-1)
        omega = np.sum(r @ n_hat / dist**3) * ds * dw
        value = src["jump_mv"] * omega / (2 * np.pi)
        ratio = src["sigma_ratio"]
        across = (np.array([e, n, 0.0]) - trace) @ d_hat
        value *= 2.0 / (1.0 + ratio) if across > 0 else 2.0 * ratio / (1.0 + ratio)
        out[i] = value
    return out


def test_truth_reproduces_shapefile_sp_by_brute_force(shp, truth, truth_stations):
    # Independent forward sum: patches as 200×200 point dipoles with images,
    # the pipeline as half-space poles V = k/r [Telford1990]_, plus the
    # regional plane and terrain slope from truth.json and the per-station
    # noise realisation from truth_stations.csv. Tolerance: point-dipole sums
    # with m² elements are good to about 10/m² of the patch signal
    # (physics.md §9), plus rounding (SP_mV to 0.01 mV, truth columns to 0.001 mV).
    ids = {truth["reference_station"]["id"], truth["pipeline"]["expected"]["station_min"]["station"]}
    for src in truth["sources"]:
        ids |= {src["expected"]["station_max"]["station"], src["expected"]["station_min"]["station"]}
    ids |= {o["station"] for o in truth["outliers"][:2]}
    ids = sorted(ids)
    rows = shp.set_index("STN").loc[ids]
    east, north = rows.geometry.x.to_numpy(), rows.geometry.y.to_numpy()
    elev = truth_stations.loc[ids, "elev_m"].to_numpy()
    patches = np.array([_brute_force_patch(east, north, elev, src) for src in truth["sources"]])
    poles = np.asarray(truth["pipeline"]["poles"])
    pipe = truth["pipeline"]
    r = np.sqrt((east[:, None] - poles[:, 0]) ** 2 + (north[:, None] - poles[:, 1]) ** 2
                + pipe["depth_m"] ** 2)
    pipeline = (pipe["k_mv_m"] / r).sum(axis=1)
    reg = truth["regional"]
    az = np.radians(reg["azimuth_deg"])
    regional = reg["gradient_mv_per_km"] / 1000 * (
        (east - reg["origin_x"]) * np.sin(az) + (north - reg["origin_y"]) * np.cos(az))
    terrain = truth["terrain"]["slope_mv_per_m"] * elev
    noise = truth_stations.loc[ids, ["soil_noise_mv", "outlier_mv"]].sum(axis=1).to_numpy()
    potential = patches.sum(axis=0) + pipeline + regional + terrain + noise
    ref = ids.index(truth["reference_station"]["id"])
    predicted = potential - potential[ref]
    assert potential[ref] == pytest.approx(truth["reference_station"]["true_potential_mv"], abs=0.02)
    tol = 10 / 200**2 * (np.abs(patches).sum(axis=0) + np.abs(patches[:, ref]).sum()) + 0.01
    npt.assert_array_less(np.abs(predicted - rows["SP_mV"].to_numpy()), tol)
    # The planted anomaly signs: each source's positive lobe is where truth.json says.
    for src, values in zip(truth["sources"], patches):
        i_max = ids.index(src["expected"]["station_max"]["station"])
        i_min = ids.index(src["expected"]["station_min"]["station"])
        assert values[i_max] > 0 > values[i_min]


def _load_generator():
    spec = importlib.util.spec_from_file_location("geosp_demo_generator", DEMO / "make_demo.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_regeneration_is_byte_identical(tmp_path):
    # Determinism: the text outputs are byte-identical on a rerun; the
    # GeoPackage and DBF carry write dates, so compare their content instead.
    _load_generator().make_demo(tmp_path)
    for name in TEXT_FILES:
        digest = [hashlib.sha256(p.read_bytes()).hexdigest() for p in (DEMO / name, tmp_path / name)]
        assert digest[0] == digest[1], name
    with rasterio.open(DEMO / "dem.tif") as a, rasterio.open(tmp_path / "dem.tif") as b:
        npt.assert_array_equal(a.read(1), b.read(1))
        assert a.transform == b.transform
    for name, layer in (("faults.gpkg", "faults"), ("stations.shp", None)):
        shipped = gpd.read_file(DEMO / name, layer=layer, engine="pyogrio")
        fresh = gpd.read_file(tmp_path / name, layer=layer, engine="pyogrio")
        pd.testing.assert_frame_equal(shipped.drop(columns="geometry"), fresh.drop(columns="geometry"))
        assert shipped.geometry.geom_equals_exact(fresh.geometry, tolerance=0).all()
