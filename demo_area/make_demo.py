"""
Generate the bundled demo area: the invented Cindervale geothermal prospect.

Usage::

    python demo_area/make_demo.py [OUT_DIR]

``OUT_DIR`` defaults to the folder holding this script. Every planted quantity
is written to ``truth.json`` and ``truth_stations.csv``; ``README.md`` tells
the story. The run is deterministic: the CSV, JSON and TOML files come out
byte-identical on every run (same numpy/pandas versions). The GeoPackage
(``faults.gpkg``) and the shapefile's ``.dbf`` carry the write date, so those
two are not byte-stable; their content is.

Physics of the synthetic truth
------------------------------
* Fault patches: uniform dipole layers on rectangles,
  :func:`geosp.physics.forward.fault_patch_sp` [Kellogg1929]_, with depths
  taken below each station's own elevation (``ground_m`` = DEM ground above
  the patch's top edge).
* Pipeline: buried point poles on a half-space, V = k/r with k = ρI/(2π)
  [Telford1990]_, r from the station to a pole ``depth_m`` below it.
* Regional: a plane, ``gradient_mv_per_km`` uphill toward ``azimuth_deg``.
* Terrain: ``slope_mv_per_m × elevation`` (SP decreasing with elevation).
* Soil/contact noise and outlier spikes belong to the station (they appear in
  both gradient readings that touch it); reading noise, electrode offset and
  the blunder belong to one gradient reading.

Potentials are relative to the reference station (first station of line L01).
"""

import argparse
import json
import sys
from datetime import datetime, timedelta
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj
import rasterio
import shapely

try:
    from geosp.physics.forward import fault_patch_sp
except ImportError:  # run from a source checkout without an installed geosp
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from geosp.physics.forward import fault_patch_sp

SEED = 20260511
CRS = "EPSG:32633"
SURVEY_NAME = "Cindervale prospect, demo SP survey CV-26 (fictional)"

# Survey frame: lines run along azimuth LINE_AZ (coordinate p), and are
# stacked along azimuth CROSS_AZ (coordinate q), from ORIGIN (UTM 33N, m).
ORIGIN = (498000.0, 4500000.0)
LINE_AZ = 110.0
CROSS_AZ = 20.0
N_LINES = 25
LINE_SPACING_M = 150.0  # about the shallowest planted top depth (survey design)
STATION_SPACING_M = 25.0
STATIONS_PER_LINE = 181  # 4.5 km
TIE_STATION_INDEX = (30, 90, 150)  # ties cross the lines at these station numbers
POSITION_SD_M = 0.5  # pegging scatter about the planned grid
GPS_HEIGHT_SD_M = 3.0

DEM_CELL_M = 25.0
DEM_MARGIN_M = 600.0
DEM_NODATA = -9999.0

# Faults: (name, start (p, q) in the survey frame, [(azimuth_deg, length_m), ...],
# mapped dip, mapped dip direction); None = unknown (NULL in the GeoPackage).
FAULTS = [
    ("F-West", (900.0, 1700.0), [(10.0, 3000.0)], 85.0, 100.0),
    ("F-South", (450.0, -700.0), [(18.0, 2400.0)], None, None),
    ("F-Central", (1950.0, -600.0), [(15.0, 2700.0), (45.0, 2400.0)], None, None),
    ("F-East", (2900.0, -700.0), [(28.0, 5200.0)], 60.0, 118.0),
    ("F-Cross", (1300.0, 3080.0), None, 70.0, None),  # straight to F_CROSS_END
]
F_CROSS_END = (4500.0, 2800.0)

# Planted fault patches: fault, limb index, distance of the patch centre along
# that limb from its start (m), and the patch parameters.
PATCHES = [
    dict(source_id="P1", fault_id="F-Central", limb=0, along_m=1500.0, dip_deg=90.0,
         top_depth_m=150.0, bottom_depth_m=900.0, length_m=1600.0, jump_mv=180.0,
         sigma_ratio=1.0),
    dict(source_id="P2", fault_id="F-East", limb=0, along_m=2700.0, dip_deg=60.0,
         top_depth_m=200.0, bottom_depth_m=700.0, length_m=1400.0, jump_mv=160.0,
         sigma_ratio=1.0),
    dict(source_id="P3", fault_id="F-West", limb=0, along_m=1100.0, dip_deg=85.0,
         top_depth_m=120.0, bottom_depth_m=500.0, length_m=1200.0, jump_mv=-200.0,
         sigma_ratio=4.0),
]
SOURCE_FREE_FAULTS = ["F-South", "F-Cross"]

PIPELINE = dict(start_pq=(3650.0, -250.0), end_pq=(4650.0, 1050.0), spacing_m=50.0,
                depth_m=15.0, k_mv_m=-150.0)
REGIONAL = dict(gradient_mv_per_km=5.0, azimuth_deg=60.0)
TERRAIN_SLOPE_MV_PER_M = -0.6
SOIL_SD_MV = 4.0
READING_SD_MV = 0.5
N_OUTLIERS = 7
BLUNDER = dict(line="L05", from_station="L05-060", to_station="L05-061", error_mv=40.0)

FIRST_DAY = datetime(2026, 5, 11)
# Field days: the runs (lines) read that day, in order. Even-numbered lines are
# walked back from their last station.
DAYS = [[f"L{2 * d + 1:02d}", f"L{2 * d + 2:02d}"] for d in range(N_LINES // 2)] \
    + [[f"L{N_LINES:02d}"]] * (N_LINES % 2) + [["T1", "T2", "T3"]]


def _unit(azimuth_deg):
    """Unit vector (east, north) of an azimuth clockwise from grid north."""
    a = np.radians(azimuth_deg)
    return np.array([np.sin(a), np.cos(a)])


def _frame_to_world(p, q):
    """Survey-frame (p along lines, q across) to UTM easting, northing (m)."""
    p, q = np.asarray(p, dtype=float), np.asarray(q, dtype=float)
    up, uq = _unit(LINE_AZ), _unit(CROSS_AZ)
    return ORIGIN[0] + p * up[0] + q * uq[0], ORIGIN[1] + p * up[1] + q * uq[1]


def _world_to_frame(east, north):
    """Inverse of :func:`_frame_to_world`."""
    de, dn = np.asarray(east) - ORIGIN[0], np.asarray(north) - ORIGIN[1]
    up, uq = _unit(LINE_AZ), _unit(CROSS_AZ)
    return de * up[0] + dn * up[1], de * uq[0] + dn * uq[1]


def _station_id(line, number):
    return f"{line}-{number:03d}"


def _make_stations(rng):
    """Station table and the reading order of every run (line or tie)."""
    rows, runs = [], {}
    for j in range(N_LINES):
        line = f"L{j + 1:02d}"
        ids = []
        for k in range(STATIONS_PER_LINE):
            sid = _station_id(line, k)
            rows.append((sid, line, k * STATION_SPACING_M, j * LINE_SPACING_M))
            ids.append(sid)
        runs[line] = ids
    per_gap = int(round(LINE_SPACING_M / STATION_SPACING_M))
    for t, k in enumerate(TIE_STATION_INDEX):
        tie = f"T{t + 1}"
        ids = []
        for m in range((N_LINES - 1) * per_gap + 1):
            if m % per_gap == 0:  # crossing: the line's own station
                sid = _station_id(f"L{m // per_gap + 1:02d}", k)
            else:
                sid = _station_id(tie, m)
                rows.append((sid, tie, k * STATION_SPACING_M, m * STATION_SPACING_M))
            ids.append(sid)
        runs[tie] = ids
    table = pd.DataFrame(rows, columns=["STN", "LINE", "p", "q"])
    east, north = _frame_to_world(table["p"].to_numpy(), table["q"].to_numpy())
    table["x"] = np.round(east + rng.normal(0.0, POSITION_SD_M, len(table)), 2)
    table["y"] = np.round(north + rng.normal(0.0, POSITION_SD_M, len(table)), 2)
    return table, runs


def _dem_surface(east, north):
    """Invented gentle hills (m above sea level), smooth, slopes below 10°."""
    p, q = _world_to_frame(east, north)

    def hill(height, p0, q0, width):
        return height * np.exp(-((p - p0) ** 2 + (q - q0) ** 2) / (2.0 * width**2))

    return (430.0 - 0.012 * p + 0.010 * q
            + hill(150.0, 2600.0, 3000.0, 850.0)
            + hill(90.0, 800.0, 600.0, 600.0)
            + hill(40.0, 1500.0, 1900.0, 400.0)
            - hill(50.0, 3900.0, 900.0, 700.0))


def _make_dem(stations):
    """DEM array (rows north to south, float32) and its transform."""
    d = DEM_CELL_M
    west = np.floor((stations["x"].min() - DEM_MARGIN_M) / d) * d
    east = np.ceil((stations["x"].max() + DEM_MARGIN_M) / d) * d
    south = np.floor((stations["y"].min() - DEM_MARGIN_M) / d) * d
    north = np.ceil((stations["y"].max() + DEM_MARGIN_M) / d) * d
    n_cols, n_rows = int(round((east - west) / d)), int(round((north - south) / d))
    xc = west + (np.arange(n_cols) + 0.5) * d
    yc = north - (np.arange(n_rows) + 0.5) * d
    grid_e, grid_n = np.meshgrid(xc, yc)
    values = np.round(_dem_surface(grid_e, grid_n), 2).astype(np.float32)
    return values, rasterio.Affine(d, 0.0, west, 0.0, -d, north)


def _sample_bilinear(values, transform, east, north):
    """Bilinear interpolation between DEM cell centres (m)."""
    d = transform.a
    col = (np.asarray(east) - transform.c) / d - 0.5
    row = (transform.f - np.asarray(north)) / d - 0.5
    c0 = np.clip(np.floor(col).astype(int), 0, values.shape[1] - 2)
    r0 = np.clip(np.floor(row).astype(int), 0, values.shape[0] - 2)
    fc, fr = col - c0, row - r0
    v = values.astype(float)
    return ((1 - fr) * ((1 - fc) * v[r0, c0] + fc * v[r0, c0 + 1])
            + fr * ((1 - fc) * v[r0 + 1, c0] + fc * v[r0 + 1, c0 + 1]))


def _fault_vertices():
    """World vertices (m) of every fault trace, in digitised order."""
    out = {}
    for name, start_pq, limbs, _, _ in FAULTS:
        start = np.array(_frame_to_world(*start_pq))
        if limbs is None:
            verts = [start, np.array(_frame_to_world(*F_CROSS_END))]
        else:
            verts = [start]
            for azimuth, length in limbs:
                verts.append(verts[-1] + length * _unit(azimuth))
        out[name] = [np.round(v, 2) for v in verts]
    return out


def _azimuth(a, b):
    return float(np.degrees(np.arctan2(b[0] - a[0], b[1] - a[1])) % 360.0)


def _patch_geometry(patch, vertices):
    """Trace point, strike and top-edge centre of a planted patch."""
    verts = vertices[patch["fault_id"]]
    a, b = verts[patch["limb"]], verts[patch["limb"] + 1]
    strike = _azimuth(a, b)
    trace = a + patch["along_m"] * _unit(strike)
    dip = np.radians(patch["dip_deg"])
    offset = patch["top_depth_m"] * np.cos(dip) / np.sin(dip)
    top = trace + offset * _unit(strike + 90.0)
    return trace, strike, top


def _patch_kwargs(src):
    keys = ("top_x", "top_y", "strike_deg", "dip_deg", "top_depth_m", "bottom_depth_m",
            "length_m", "jump_mv", "sigma_ratio", "ground_m")
    return {k: src[k] for k in keys}


def _expected_profile(src):
    """Across-strike profile of one patch alone (flat ground) through its centre."""
    t = np.arange(-3000.0, 3000.0 + 1.0, 5.0)
    dd = _unit(src["dip_dir_deg"])
    east = src["trace_x"] + t * dd[0]
    north = src["trace_y"] + t * dd[1]
    kwargs = _patch_kwargs(src)
    kwargs["ground_m"] = None
    v = fault_patch_sp((east, north), **kwargs)
    i_max, i_min = int(np.argmax(v)), int(np.argmin(v))
    return {
        "profile": "flat ground, this source alone, across strike through the patch centre; "
                   "across_m from the trace, positive toward the dip direction",
        "max_mv": round(float(v[i_max]), 3), "max_across_m": float(t[i_max]),
        "max_x": round(float(east[i_max]), 2), "max_y": round(float(north[i_max]), 2),
        "min_mv": round(float(v[i_min]), 3), "min_across_m": float(t[i_min]),
        "min_x": round(float(east[i_min]), 2), "min_y": round(float(north[i_min]), 2),
        "positive_lobe": ("dip-direction side" if t[i_max] > 0 else "side opposite the dip direction"),
    }


def _pipeline_poles():
    start = np.array(_frame_to_world(*PIPELINE["start_pq"]))
    end = np.array(_frame_to_world(*PIPELINE["end_pq"]))
    n = int(np.floor(np.hypot(*(end - start)) / PIPELINE["spacing_m"])) + 1
    frac = np.arange(n) * PIPELINE["spacing_m"] / np.hypot(*(end - start))
    return np.round(start + frac[:, None] * (end - start), 2), start, end


def _pipeline_sp(east, north, poles):
    """Half-space point poles V = k/r [Telford1990]_ (mV)."""
    r = np.sqrt((east[:, None] - poles[None, :, 0]) ** 2
                + (north[:, None] - poles[None, :, 1]) ** 2 + PIPELINE["depth_m"] ** 2)
    return (PIPELINE["k_mv_m"] / r).sum(axis=1)


def _schedule(rng, runs):
    """Reading times of every run and the electrode-check times of every day."""
    times, checks = {}, []
    for d, day_runs in enumerate(DAYS):
        day = FIRST_DAY + timedelta(days=d)
        t = day + timedelta(hours=7, minutes=30 + int(rng.integers(0, 11)))
        day_checks = [t]
        for i, run in enumerate(day_runs):
            t = t + timedelta(minutes=int(rng.integers(15, 21)) if i == 0 else int(rng.integers(30, 46)))
            steps = rng.integers(50, 76, len(runs[run]) - 1)
            run_times = [t]
            for s in steps[1:]:
                run_times.append(run_times[-1] + timedelta(seconds=int(s)))
            times[run] = run_times
            t = run_times[-1] + timedelta(minutes=10 if i < len(day_runs) - 1 else 15)
            day_checks.append(t)
        checks.append(day_checks)
    return times, checks


def _electrode_offsets(rng, checks):
    """Offset (mV) at every check; piecewise-linear drift within each day."""
    values = []
    for day_checks in checks:
        start = rng.uniform(1.0, 3.0) * rng.choice([-1.0, 1.0])
        drift = rng.uniform(1.0, 3.0) * rng.choice([-1.0, 1.0])
        t0, t1 = day_checks[0], day_checks[-1]
        day_values = []
        for i, t in enumerate(day_checks):
            frac = (t - t0) / (t1 - t0)
            wobble = 0.0 if i in (0, len(day_checks) - 1) else rng.normal(0.0, 0.3)
            day_values.append(round(start + drift * frac + wobble, 1))
        values.append(day_values)
    return values


def _offset_at(t, day_checks, day_values):
    x = [(c - day_checks[0]).total_seconds() for c in day_checks]
    return float(np.interp((t - day_checks[0]).total_seconds(), x, day_values))


def _iso(t):
    return t.strftime("%Y-%m-%dT%H:%M:%S")


def _write_csv(frame, path):
    frame.to_csv(path, index=False, lineterminator="\n")


def make_demo(out_dir, seed=SEED):
    """
    Write every demo file into ``out_dir``; return the truth dictionary.
    ``seed`` other than the shipped one gives another realisation of the
    noise, drift, outliers and pegging scatter (same survey and sources).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)

    stations, runs = _make_stations(rng)
    x, y = stations["x"].to_numpy(), stations["y"].to_numpy()
    to_wgs84 = pyproj.Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    lon, lat = to_wgs84.transform(x, y)
    dem, transform = _make_dem(stations)
    elev = _sample_bilinear(dem, transform, x, y)
    stations["elev_m"] = elev

    # --- planted sources -------------------------------------------------
    vertices = _fault_vertices()
    sources = []
    for patch in PATCHES:
        trace, strike, top = _patch_geometry(patch, vertices)
        ground = float(_sample_bilinear(dem, transform, top[0], top[1]))
        src = {
            "source_id": patch["source_id"], "model": "fault_patch", "fault_id": patch["fault_id"],
            "top_x": round(float(top[0]), 2), "top_y": round(float(top[1]), 2),
            "strike_deg": round(strike, 4), "dip_deg": patch["dip_deg"],
            "dip_dir_deg": round((strike + 90.0) % 360.0, 4),
            "top_depth_m": patch["top_depth_m"], "bottom_depth_m": patch["bottom_depth_m"],
            "length_m": patch["length_m"], "jump_mv": patch["jump_mv"],
            "sigma_ratio": patch["sigma_ratio"], "ground_m": round(ground, 3),
            "trace_x": round(float(trace[0]), 2), "trace_y": round(float(trace[1]), 2),
        }
        sources.append(src)
    components = {}
    for src in sources:
        components[src["source_id"]] = fault_patch_sp((x, y, elev), **_patch_kwargs(src))
    poles, pipe_start, pipe_end = _pipeline_poles()
    components["pipeline"] = _pipeline_sp(x, y, poles)
    ref = 0  # first station of the first line
    az = np.radians(REGIONAL["azimuth_deg"])
    components["regional"] = REGIONAL["gradient_mv_per_km"] / 1000.0 * (
        (x - x[ref]) * np.sin(az) + (y - y[ref]) * np.cos(az))
    components["terrain"] = TERRAIN_SLOPE_MV_PER_M * elev
    components["soil_noise"] = rng.normal(0.0, SOIL_SD_MV, len(stations))

    crossings = {sid for ids in (runs[f"T{t + 1}"] for t in range(len(TIE_STATION_INDEX)))
                 for sid in ids if sid.startswith("L")}
    eligible = [i for i, sid in enumerate(stations["STN"])
                if i != ref and sid not in crossings and not sid.endswith(("-000", "-180"))]
    picked = sorted(rng.choice(eligible, N_OUTLIERS, replace=False).tolist())
    spikes = np.zeros(len(stations))
    spikes[picked] = np.round(rng.uniform(30.0, 80.0, N_OUTLIERS) * rng.choice([-1.0, 1.0], N_OUTLIERS), 1)
    components["outlier"] = spikes

    potential = sum(components.values())
    sp = potential - potential[ref]
    v_of = dict(zip(stations["STN"], potential))

    # --- field schedule, electrode drift, gradient readings ----------------
    times, checks = _schedule(rng, runs)
    offsets = _electrode_offsets(rng, checks)
    rows = []
    for d, day_runs in enumerate(DAYS):
        for run in day_runs:
            ids = runs[run]
            if run.startswith("L") and int(run[1:]) % 2 == 0 or run == "T2":
                ids = ids[::-1]
            for k in range(len(ids) - 1):
                t = times[run][k]
                sign = 1.0 if k % 2 == 0 else -1.0  # leapfrog: the pair swaps roles each step
                dv = (v_of[ids[k + 1]] - v_of[ids[k]] + sign * _offset_at(t, checks[d], offsets[d])
                      + rng.normal(0.0, READING_SD_MV))
                rows.append((run, ids[k], ids[k + 1], _iso(t), dv))
    dipoles = pd.DataFrame(rows, columns=["LINE", "FROM", "TO", "TIME", "DV_mV"])
    hit = dipoles.index[(dipoles["FROM"] == BLUNDER["from_station"])
                        & (dipoles["TO"] == BLUNDER["to_station"])]
    blunder_row = int(hit[0])
    dipoles.loc[blunder_row, "DV_mV"] += BLUNDER["error_mv"]
    dipoles["DV_mV"] = dipoles["DV_mV"].round(1)

    # --- files -------------------------------------------------------------
    gps = pd.DataFrame({
        "STN": stations["STN"], "LINE": stations["LINE"],
        "lon": [f"{v:.7f}" for v in lon], "lat": [f"{v:.7f}" for v in lat],
        "ELEV_GPS": [f"{v:.1f}" for v in elev + rng.normal(0.0, GPS_HEIGHT_SD_M, len(elev))],
    })
    _write_csv(gps, out / "stations_gps.csv")
    dipoles_out = dipoles.copy()
    dipoles_out["DV_mV"] = [f"{v:.1f}" for v in dipoles["DV_mV"]]
    _write_csv(dipoles_out, out / "dipoles.csv")
    check_rows = [(_iso(t), f"{v:.1f}") for day_checks, day_values in zip(checks, offsets)
                  for t, v in zip(day_checks, day_values)]
    _write_csv(pd.DataFrame(check_rows, columns=["time", "offset_mv"]), out / "electrode_checks.csv")

    shp = gpd.GeoDataFrame(
        {"STN": stations["STN"], "LINE": stations["LINE"],
         "SP_mV": np.round(sp, 2), "ELEV": np.round(elev, 2)},
        geometry=gpd.points_from_xy(x, y), crs=CRS,
    )
    for ext in (".shp", ".shx", ".dbf", ".prj", ".cpg"):
        (out / f"stations{ext}").unlink(missing_ok=True)
    shp.to_file(out / "stations.shp", driver="ESRI Shapefile", engine="pyogrio", encoding="UTF-8")

    fault_rows = []
    for name, _, _, dip, dip_dir in FAULTS:
        verts = vertices[name]
        lon_v, lat_v = to_wgs84.transform([v[0] for v in verts], [v[1] for v in verts])
        fault_rows.append({"FAULT": name, "dip": np.nan if dip is None else dip,
                           "dip_dir": np.nan if dip_dir is None else dip_dir,
                           "geometry": shapely.LineString(np.round(np.c_[lon_v, lat_v], 8))})
    faults = gpd.GeoDataFrame(fault_rows, geometry="geometry", crs="EPSG:4326")
    (out / "faults.gpkg").unlink(missing_ok=True)
    faults.to_file(out / "faults.gpkg", layer="faults", driver="GPKG", engine="pyogrio")

    with rasterio.open(
        out / "dem.tif", "w", driver="GTiff", height=dem.shape[0], width=dem.shape[1], count=1,
        dtype="float32", crs=CRS, transform=transform, nodata=DEM_NODATA,
        compress="deflate", predictor=3, tiled=True, blockxsize=256, blockysize=256,
    ) as dst:
        dst.write(dem, 1)
        dst.update_tags(units="m", description="Invented terrain of the Cindervale demo area")

    (out / "project.toml").write_text(_project_toml(), encoding="utf-8", newline="\n")
    (out / "project_total_field.toml").write_text(_project_total_field_toml(), encoding="utf-8",
                                                  newline="\n")

    # --- truth -------------------------------------------------------------
    comp_cols = {f"{k}_mv": np.round(v, 3) for k, v in components.items()}
    truth_stations = pd.DataFrame({"STN": stations["STN"], "LINE": stations["LINE"],
                                   "x": x, "y": y, "elev_m": np.round(elev, 3), **comp_cols,
                                   "potential_mv": np.round(potential, 3), "sp_mv": np.round(sp, 3)})
    _write_csv(truth_stations, out / "truth_stations.csv")

    for src in sources:
        src["expected"] = _expected_profile(src)
        at = components[src["source_id"]]
        i_max, i_min = int(np.argmax(at)), int(np.argmin(at))
        src["expected"]["station_max"] = {"station": stations["STN"][i_max], "mv": round(float(at[i_max]), 3)}
        src["expected"]["station_min"] = {"station": stations["STN"][i_min], "mv": round(float(at[i_min]), 3)}
    i_pipe = int(np.argmin(components["pipeline"]))
    truth = {
        "about": "Everything planted in the Cindervale demo area (invented). Coordinates in "
                 "EPSG:32633 metres; potentials in mV; depths below ground, positive down.",
        "survey": {"name": SURVEY_NAME, "crs": CRS, "seed": seed,
                   "n_stations": int(len(stations)), "n_readings": int(len(dipoles)),
                   "lines": [f"L{j + 1:02d}" for j in range(N_LINES)],
                   "tie_lines": [f"T{t + 1}" for t in range(len(TIE_STATION_INDEX))],
                   "line_azimuth_deg": LINE_AZ, "line_spacing_m": LINE_SPACING_M,
                   "station_spacing_m": STATION_SPACING_M,
                   "tie_crossing_station_numbers": list(TIE_STATION_INDEX),
                   "field_days": [(FIRST_DAY + timedelta(days=d)).strftime("%Y-%m-%d") for d in range(len(DAYS))],
                   "runs_per_day": DAYS,
                   "reversed_runs": [r for day in DAYS for r in day
                                     if (r.startswith("L") and int(r[1:]) % 2 == 0) or r == "T2"]},
        "reference_station": {
            "id": stations["STN"][ref], "x": float(x[ref]), "y": float(y[ref]),
            "elev_m": round(float(elev[ref]), 3),
            "true_potential_mv": round(float(potential[ref]), 3),
            "components_mv": {k: round(float(v[ref]), 3) for k, v in components.items()},
            "note": "Every planted SP value is potential minus this station's potential.",
        },
        "terrain_treatment": "Patch depths are taken below each station's own elevation: "
                             "fault_patch_sp(..., ground_m) adds (station elevation - ground_m) "
                             "to both depths (never less than -top_depth_m/2), keeping the plane "
                             "through the mapped trace point.",
        "sources": sources,
        "source_free_faults": SOURCE_FREE_FAULTS,
        "pipeline": {
            "model": "point_poles", "formula": "V = k / r, r = sqrt(horizontal^2 + depth^2)",
            "k_mv_m": PIPELINE["k_mv_m"], "depth_m": PIPELINE["depth_m"],
            "spacing_m": PIPELINE["spacing_m"],
            "start_x": round(float(pipe_start[0]), 2), "start_y": round(float(pipe_start[1]), 2),
            "end_x": round(float(pipe_end[0]), 2), "end_y": round(float(pipe_end[1]), 2),
            "poles": poles.tolist(),
            "expected": {"station_min": {"station": stations["STN"][i_pipe],
                                         "mv": round(float(components["pipeline"][i_pipe]), 3)}},
        },
        "regional": {**REGIONAL, "origin_x": float(x[ref]), "origin_y": float(y[ref]),
                     "formula": "gradient/1000 * ((x-origin_x) sin(az) + (y-origin_y) cos(az))"},
        "terrain": {"slope_mv_per_m": TERRAIN_SLOPE_MV_PER_M, "formula": "slope * elev_m",
                    "elevation_source": "dem.tif, bilinear between cell centres"},
        "noise": {"soil_contact_sd_mv": SOIL_SD_MV, "reading_sd_mv": READING_SD_MV,
                  "reading_rounding_mv": 0.1, "position_sd_m": POSITION_SD_M,
                  "gps_height_sd_m": GPS_HEIGHT_SD_M},
        "electrode": {
            "convention": "Leapfrog: within each run (line or tie, in reading order) reading k "
                          "(k = 0, 1, ...) carries +offset(t) for even k and -offset(t) for odd k; "
                          "offset(t) is linear in time between the day's electrode checks.",
            "checks": [{"day": (FIRST_DAY + timedelta(days=d)).strftime("%Y-%m-%d"),
                        "times": [_iso(t) for t in checks[d]], "offset_mv": offsets[d]}
                       for d in range(len(DAYS))],
        },
        "outliers": [{"station": stations["STN"][i], "spike_mv": float(spikes[i])} for i in picked],
        "blunder": {"line": BLUNDER["line"], "from": BLUNDER["from_station"],
                    "to": BLUNDER["to_station"], "row": blunder_row, "csv_line": blunder_row + 2,
                    "error_mv": BLUNDER["error_mv"],
                    "note": "row is the 0-based data row of dipoles.csv; csv_line counts the header as line 1"},
        "faults": {name: {"dip": dip, "dip_dir": dip_dir,
                          "vertices_xy": [[float(c) for c in v] for v in vertices[name]]}
                   for name, _, _, dip, dip_dir in FAULTS},
    }
    (out / "truth.json").write_text(json.dumps(truth, indent=2) + "\n", encoding="utf-8", newline="\n")
    return truth


# Sections shared by both demo project files.
_FAULTS_DEM = '''[faults]
path = "faults.gpkg"
layer = "faults"
id = "FAULT"
dip_deg = "dip"
dip_dir_deg = "dip_dir"

[dem]
path = "dem.tif"

'''

_DETECT = '''# [detect]   # options: see docs/project-file.md (false-alarm rate, templates, cultural rivals)
# [fit]      # options: see docs/project-file.md
'''


def _project_toml():
    return f'''# Cindervale demo area (invented): full reduction from raw leapfrog readings.
# Station positions come from handheld GPS (lon/lat, WGS 84); SP values come
# from the gradient readings, corrected for electrode drift and tied at loops.

[survey]
name = "{SURVEY_NAME}"
crs = "{CRS}"

[stations]
path = "stations_gps.csv"
id = "STN"
line = "LINE"
lon = "lon"
lat = "lat"

[readings]
path = "dipoles.csv"
line = "LINE"
from = "FROM"
to = "TO"
time = "TIME"
value_mv = "DV_mV"
electrode_checks = "electrode_checks.csv"
reference_station = "L01-000"

''' + _FAULTS_DEM + '''[reduce]
mode = "leapfrog"             # the crew stepped the rear electrode ahead each reading

''' + _DETECT


def _project_total_field_toml():
    return f'''# Cindervale demo area (invented): stations already reduced to total field
# by the field crew (SP relative to station L01-000).

[survey]
name = "{SURVEY_NAME}"
crs = "{CRS}"

[stations]
path = "stations.shp"
id = "STN"
value_mv = "SP_mV"
line = "LINE"
elevation = "ELEV"

''' + _FAULTS_DEM + _DETECT


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    parser.add_argument("out_dir", nargs="?", default=str(Path(__file__).resolve().parent),
                        help="output folder (default: the folder of this script)")
    args = parser.parse_args(argv)
    truth = make_demo(args.out_dir)
    print(f"wrote demo area to {args.out_dir}: {truth['survey']['n_stations']} stations, "
          f"{truth['survey']['n_readings']} readings")
    return 0


if __name__ == "__main__":
    sys.exit(main())
