"""
The recovery benchmark's survey generator (benchmarks/recovery/generator.py):
determinism, the spread of its designs, the files it writes (accepted by
``geosp check``) and the raw leapfrog readings, which must integrate back to
the planted SP once the electrode offset is removed.
"""

import collections
import json
import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from recovery import generator, physics  # noqa: E402

SEEDS = range(1, 31)
SMALL_SEED = 70  # 820 stations, a pipeline, casings, mapped faults and a contrast


@pytest.fixture(scope="module")
def designs():
    return [generator.draw_design(seed) for seed in SEEDS]


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """The small survey written in both modes."""
    root = tmp_path_factory.mktemp("recovery")
    design = generator.draw_design(SMALL_SEED)
    out = {}
    for raw in (False, True):
        folder = root / ("raw" if raw else "reduced")
        out[raw] = (folder, generator.write_survey(design, folder, raw=raw))
    return design, out


# --------------------------------------------------------------------------- designs


def test_design_is_deterministic_per_seed_and_json_able():
    a, b = generator.draw_design(11), generator.draw_design(11)
    assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)
    assert json.dumps(generator.draw_design(12)) != json.dumps(a)


def test_survey_layouts_cover_the_required_ranges(designs):
    n = np.array([len(d["stations"]["STN"]) for d in designs])
    assert np.all((n >= 800) & (n <= 6000))
    assert np.mean((n >= 1000) & (n <= 4000)) >= 0.6
    size = np.array([max(d["layout"]["width_m"], d["layout"]["length_m"]) for d in designs])
    assert np.all((size >= 2000) & (size <= 8000)) and size.min() < 3000 and size.max() > 6000
    line = np.array([d["layout"]["line_spacing_m"] for d in designs])
    assert np.all((line >= 75) & (line <= 300)) and line.min() < 100 and line.max() > 250
    station = np.array([d["layout"]["station_spacing_m"] for d in designs])
    assert np.all((station >= 20) & (station <= 60)) and station.min() < 25 and station.max() > 50
    for d in designs:
        json.dumps(d)  # plain JSON types only
        kinds = collections.Counter(item["kind"] for item in d["layout"]["lines"])
        assert 2 <= kinds["tie"] <= 4
        assert len(set(d["stations"]["STN"])) == len(d["stations"]["STN"])
        assert d["reference_station"] == d["stations"]["STN"][0]
        assert d["crs"].startswith("EPSG:326") and 32610 <= int(d["crs"][5:]) <= 32660
        e, n_ = np.array(d["stations"]["E"]), np.array(d["stations"]["N"])
        assert 250_000 < e.min() and e.max() < 750_000 and 1_000_000 < n_.min() and n_.max() < 6_000_000
    bends = [item["bend_deg"] for d in designs for item in d["layout"]["lines"] if item["bend_deg"] > 0]
    assert sum(any(i["bend_deg"] > 0 for i in d["layout"]["lines"]) for d in designs) >= 5
    assert 10.0 <= min(bends) and max(bends) <= 40.0


def test_tie_lines_pass_through_main_line_stations(designs):
    # Loops close through the network: every tie chain holds main-line
    # stations where it crosses the lines, and consecutive chain stations
    # are at most a few station spacings apart.
    for d in designs[:10]:
        line_of = dict(zip(d["stations"]["STN"], d["stations"]["LINE"]))
        xy = dict(zip(d["stations"]["STN"], zip(d["stations"]["E"], d["stations"]["N"])))
        for item in d["layout"]["lines"]:
            chain = item["stations"]
            steps = np.hypot(*np.diff(np.array([xy[s] for s in chain]), axis=0).T)
            assert steps.max() < 2.5 * d["layout"]["station_spacing_m"]
            if item["kind"] == "tie":
                shared = [s for s in chain if line_of[s] != item["line"]]
                assert len(shared) >= 3 and all(line_of[s].startswith("L") for s in shared)


def test_faults_cover_the_required_ranges(designs):
    mapped, total = 0, 0
    for d in designs:
        faults = d["faults"]
        ids = [f["fault_id"] for f in faults]
        assert 4 <= len(faults) <= 10 and len(set(ids)) == len(ids)
        # 3–4 bends above 25° per survey
        assert 3 <= sum(b > 25.0 for f in faults for b in f["bends_deg"]) <= 4
        # some traces cross or meet
        from shapely.geometry import LineString

        lines = [LineString(f["vertices"]) for f in faults]
        assert any(lines[i].intersects(lines[j]) for i in range(len(lines)) for j in range(i + 1, len(lines)))
        assert any(f["source_free"] for f in faults)
        for f in faults:
            total += 1
            assert 55.0 <= f["dip_deg"] <= 90.0
            if f["mapped"]:
                mapped += 1
                assert f["mapped_dip_deg"] % 5 == 0 and abs(f["mapped_dip_deg"] - f["dip_deg"]) <= 2.5
                turn = (f["mapped_dip_dir_deg"] - f["dip_dir_deg"] + 180.0) % 360.0 - 180.0
                assert abs(turn) <= 2.5
            else:
                assert f["mapped_dip_deg"] is None and f["mapped_dip_dir_deg"] is None
    assert 0.65 <= 1 - mapped / total <= 0.85  # dips mostly not mapped
    assert sum(any(f["ends_on"] for f in d["faults"]) for d in designs) >= 5


def test_faults_run_past_the_survey_edge_in_some_surveys(designs):
    from shapely.geometry import LineString, MultiPoint

    outside = 0
    for d in designs:
        hull = MultiPoint(np.column_stack([d["stations"]["E"], d["stations"]["N"]])).convex_hull
        outside += any(not hull.contains(LineString(f["vertices"])) for f in d["faults"])
    assert outside >= 10


def test_patches_cover_the_required_ranges(designs):
    patches = [p for d in designs for p in d["patches"]]
    assert all(1 <= len(d["patches"]) <= 6 for d in designs)
    top = np.array([p["top_depth_m"] for p in patches])
    height = np.array([p["bottom_depth_m"] - p["top_depth_m"] for p in patches])
    length = np.array([p["s1_m"] - p["s0_m"] for p in patches])
    dip = np.array([p["dip_deg"] for p in patches])
    jump = np.array([p["jump_mv"] for p in patches])
    assert np.all((top >= 50) & (top <= 600)) and top.min() < 80 and top.max() > 400
    assert np.all((height >= 200) & (height <= 2000)) and height.min() < 300 and height.max() > 1200
    assert np.all((length >= 400) & (length <= 2500)) and length.max() > 2000
    assert np.all((dip >= 55) & (dip <= 90)) and dip.min() < 62 and dip.max() > 85
    assert (jump > 0).any() and (jump < 0).any()
    ratio = np.array([p["sigma_ratio"] for p in patches])
    contrast = ratio != 1.0
    assert 3 <= contrast.sum() < 0.5 * len(patches)
    assert np.all((ratio >= 1 / 8) & (ratio <= 8))
    assert all(p["dip_deg"] >= 75.0 and not p["bent"] for p in np.array(patches)[contrast])
    assert sum(p["bent"] for p in patches) >= 5
    above = np.array([p["above_floor"] for p in patches])
    assert above.mean() >= 0.75 and (~above).sum() >= 1
    two_on_one = 0
    for d in designs:
        faults = {f["fault_id"]: f for f in d["faults"]}
        by_fault = collections.defaultdict(list)
        for p in d["patches"]:
            by_fault[p["fault_id"]].append((p["s0_m"], p["s1_m"]))
            fault = faults[p["fault_id"]]
            assert not fault["source_free"]
            assert p["dip_deg"] == fault["dip_deg"] and p["dip_side"] == fault["dip_side"]
            assert p["fault_trace"] == fault["vertices"]
            assert p["length_m"] == pytest.approx(p["s1_m"] - p["s0_m"], abs=1e-9)
        for spans in by_fault.values():
            assert len(spans) <= 2
            if len(spans) == 2:
                two_on_one += 1
                (a0, a1), (b0, b1) = sorted(spans)
                assert a1 < b0  # non-overlapping along strike
    assert two_on_one >= 3


def test_cultural_terrain_regional_and_noise_cover_their_ranges(designs):
    kinds = collections.Counter(c["kind"] for d in designs for c in d["cultural"])
    assert kinds["pipeline"] >= 5 and kinds["casing"] >= 5
    casings = [c for d in designs for c in d["cultural"] if c["kind"] == "casing"]
    assert sum(c["on_fault"] is not None for c in casings) >= 3
    for c in casings:
        poles = np.array(c["poles"])
        assert poles[0, 3] < 0 and 20 <= poles[0, 2] <= 100
        assert 20 <= -c["wellhead_mv"] <= 200
    for d in designs:
        for c in d["cultural"]:
            if c["kind"] == "pipeline":
                poles = np.array(c["poles"])
                assert np.all((poles[:, 2] >= 1) & (poles[:, 2] <= 3))
                assert np.hypot(*np.diff(poles[:, :2], axis=0).T).max() <= 50.01
                assert 15 <= abs(c["peak_mv"]) <= 150
        terrain = d["terrain"]
        assert 50 <= terrain["relief_m"] <= 800 and -2.5 <= terrain["k_mv_per_m"] <= -0.3
        assert 25 <= terrain["cell_m"] <= 50
        noise = d["noise"]
        assert 2 <= noise["white_sd_mv"] <= 8 and 1 <= noise["correlated_sd_mv"] <= 4
        assert 100 <= noise["correlation_length_m"] <= 500 and 0.002 <= noise["outlier_fraction"] <= 0.01
        assert 0.3 <= noise["reading_sd_mv"] <= 1.0
        assert d["floor_mv"] == max(25.0, 6 * noise["white_sd_mv"])
    relief = [d["terrain"]["relief_m"] for d in designs]
    assert min(relief) < 100 and max(relief) > 400
    assert generator.FLOOR_RULE and generator.RANGES_TEXT.startswith("- ")


def test_correlated_noise_has_the_exponential_covariance():
    # Outside reference: the covariance model itself, sd²·exp(−d/L). Over
    # 20 000 draws at five stations the sample covariance is within
    # 5 sd² / sqrt(20 000) ≈ 0.035 sd² of it (about 5 standard errors).
    east = np.array([0.0, 50.0, 120.0, 400.0, 1000.0])
    north = np.array([0.0, 0.0, 90.0, 0.0, 300.0])
    rng = np.random.default_rng(5)
    sd, length = 3.0, 250.0
    draws = np.array([generator.exponential_noise(east, north, sd, length, rng) for _ in range(20_000)])
    distance = np.hypot(east[:, None] - east[None, :], north[:, None] - north[None, :])
    np.testing.assert_allclose(np.cov(draws.T), sd**2 * np.exp(-distance / length), atol=0.035 * sd**2)


# --------------------------------------------------------------------------- written files


def test_geosp_check_accepts_both_modes(written):
    # Outside reference: the package's own input validation (exit code 0).
    from geosp.cli import main

    _, out = written
    for raw, (folder, _) in out.items():
        assert main(["check", str(folder / "project.toml")]) == 0


def test_written_files_match_the_truth(written):
    design, out = written
    (reduced, truth), (raw, truth_raw) = out[False], out[True]
    stations = pd.read_csv(reduced / "stations.csv")
    assert list(stations.columns) == ["STN", "LINE", "E", "N", "ELEV", "SP_mV"]
    assert list(pd.read_csv(raw / "stations.csv").columns) == ["STN", "LINE", "E", "N", "ELEV"]
    table = pd.read_csv(reduced / "truth_stations.csv")
    # same sources and station values in both modes
    pd.testing.assert_frame_equal(table, pd.read_csv(raw / "truth_stations.csv"))
    assert truth["patches"] == truth_raw["patches"] and truth["raw"] is False and truth_raw["raw"] is True
    np.testing.assert_allclose(stations["SP_mV"], table["sp_mv"], atol=0.0051)
    ref = truth["reference_station"]
    assert stations.loc[stations.STN == ref, "SP_mV"].item() == 0.0
    components = [p["patch_id"] for p in truth["patches"]] + [
        "cultural", "regional", "terrain", "noise_white", "noise_correlated", "outliers"]
    np.testing.assert_allclose(table[components].sum(axis=1), table["total"], atol=1e-5)
    # terrain and regional columns by their stated formulas (hand arithmetic)
    np.testing.assert_allclose(table["terrain"], truth["terrain"]["k_mv_per_m"] * table["ELEV"], atol=1e-5)
    reg = truth["regional"]
    x = (table["E"] - reg["centre"][0]) / 1000.0
    y = (table["N"] - reg["centre"][1]) / 1000.0
    expected = reg["c_x"] * x + reg["c_y"] * y + reg["c_xx"] * x * x + reg["c_xy"] * x * y + reg["c_yy"] * y * y
    np.testing.assert_allclose(table["regional"], expected, atol=1e-5)
    for p in truth["patches"]:
        assert p["peak_to_peak_mv"] == pytest.approx(np.ptp(table[p["patch_id"]]), abs=1e-5)
        assert p["above_floor"] == (p["peak_to_peak_mv"] >= truth["floor_mv"])
        assert len(p["vertices_xyz"]) >= 4
    for key in ("seed", "raw", "crs", "n_stations", "extent_m", "line_spacing_m", "station_spacing_m",
                "reference_station", "noise", "floor_mv", "faults", "patches", "cultural", "regional",
                "terrain", "components_file"):
        assert key in truth
    assert truth["n_stations"] == len(stations) == len(table)
    assert json.loads((reduced / "truth.json").read_text()) == truth


def test_project_file_names_inputs_only(written):
    import tomllib

    _, out = written
    for raw, (folder, truth) in out.items():
        project = tomllib.loads((folder / "project.toml").read_text())
        assert set(project) == {"survey", "stations", "faults", "dem"} | ({"readings"} if raw else set())
        assert project["survey"]["name"] == f"synthetic survey {SMALL_SEED}"
        assert project["stations"]["crs"] == project["survey"]["crs"] == truth["crs"]
        assert ("value_mv" in project["stations"]) is not raw
        if raw:
            assert project["readings"]["reference_station"] == truth["reference_station"]


def test_dem_and_faults_files(written):
    import geopandas as gpd
    import rasterio

    design, out = written
    folder, truth = out[False]
    with rasterio.open(folder / "dem.tif") as dem:
        assert dem.dtypes[0] == "float32" and dem.nodata == -9999.0
        assert dem.profile["compress"].lower() == "deflate" and 25 <= dem.res[0] <= 50
        west, east, south, north = truth["extent_m"]
        b = dem.bounds
        assert b.left <= west - 1000 and b.right >= east + 1000
        assert b.bottom <= south - 1000 and b.top >= north + 1000
        z = dem.read(1)
        # each station elevation lies within its four surrounding cell centres
        stations = pd.read_csv(folder / "stations.csv")
        col = (stations.E - b.left) / dem.res[0] - 0.5
        row = (b.top - stations.N) / dem.res[1] - 0.5
        i, j = np.floor(col).astype(int), np.floor(row).astype(int)
        corners = np.stack([z[j, i], z[j, i + 1], z[j + 1, i], z[j + 1, i + 1]])
        assert np.all(stations.ELEV >= corners.min(axis=0) - 0.006)
        assert np.all(stations.ELEV <= corners.max(axis=0) + 0.006)
    faults = gpd.read_file(folder / "faults.gpkg", layer="faults")
    assert list(faults["FAULT"]) == [f["fault_id"] for f in truth["faults"]]
    for f, (_, row) in zip(truth["faults"], faults.iterrows()):
        assert math.isnan(row["dip"]) == (not f["mapped"])
        assert np.allclose(np.asarray(row.geometry.coords), f["vertices"])


def test_patch_in_truth_reproduces_its_column(written):
    # The truth's patch dicts are self-contained for the forward model.
    design, out = written
    folder, truth = out[False]
    table = pd.read_csv(folder / "truth_stations.csv")
    patch = truth["patches"][0]
    values = physics.patch_sp(table.E.to_numpy(), table.N.to_numpy(), table.ELEV.to_numpy(), patch)
    np.testing.assert_allclose(values, table[patch["patch_id"]], atol=1e-5)


# --------------------------------------------------------------------------- raw readings


def corrected_readings(folder):
    """Readings minus (−1)^k × the electrode offset interpolated in time between checks (per day)."""
    readings = pd.read_csv(folder / "dipoles.csv")
    checks = pd.read_csv(folder / "electrode_checks.csv")
    r_time = pd.to_datetime(readings.TIME).astype("int64").to_numpy() / 1e9
    c_time = pd.to_datetime(checks.time).astype("int64").to_numpy() / 1e9
    r_day, c_day = readings.TIME.str[:10].to_numpy(), checks.time.str[:10].to_numpy()
    offset = np.full(len(readings), np.nan)
    for day in np.unique(r_day):
        here, known = r_day == day, c_day == day
        offset[here] = np.interp(r_time[here], c_time[known], checks.offset_mv.to_numpy()[known])
    k = readings.groupby("LINE").cumcount().to_numpy()
    sign = np.where(k % 2 == 0, 1.0, -1.0)  # leapfrog: the pair swaps roles each step
    return readings, readings.DV_mV.to_numpy() - sign * offset, offset


def test_raw_readings_integrate_back_to_the_truth(written):
    # Outside reference: the planted station potentials. After removing the
    # leapfrog offset, each reading differs from the true potential
    # difference by the reading noise (plus rounding to 0.1 mV and the
    # check noise): its sd lies within 20 % of sqrt(σ_r² + 0.1²/12 + σ_c²)
    # and its mean within 4 standard errors of 0. Integrated along a whole
    # line the error is a random walk, within 4·σ·√n at the end.
    design, out = written
    folder, truth = out[True]
    table = pd.read_csv(folder / "truth_stations.csv").set_index("STN")
    readings, corrected, offset = corrected_readings(folder)
    assert np.all(np.isfinite(offset))
    assert readings.FROM.iloc[0] == truth["reference_station"]
    true_dv = table.loc[readings.TO, "sp_mv"].to_numpy() - table.loc[readings.FROM, "sp_mv"].to_numpy()
    residual = corrected - true_dv
    blunders = {b["index"] for b in truth["readings"]["blunders"]}
    assert 1 <= len(blunders) <= 3
    for i in blunders:
        assert 15.0 - 3.0 <= abs(residual[i]) <= 60.0 + 3.0
    clean = np.delete(residual, sorted(blunders))
    sigma_r, sigma_c = truth["noise"]["reading_sd_mv"], truth["readings"]["check_sd_mv"]
    expected = math.sqrt(sigma_r**2 + 0.1**2 / 12 + sigma_c**2)
    assert 0.8 * sigma_r <= clean.std() <= 1.2 * expected
    assert abs(clean.mean()) <= 4 * expected / math.sqrt(clean.size)
    # the sign convention matters: the same offset on every reading does not fit
    fixed = readings.DV_mV.to_numpy() - offset - true_dv
    assert np.delete(fixed, sorted(blunders)).std() > 2 * clean.std()
    # integrate along the first line from the reference station
    first = readings.LINE == readings.LINE.iloc[0]
    chain = readings[first]
    walk = np.cumsum(corrected[first.to_numpy()])
    truth_walk = table.loc[chain.TO, "sp_mv"].to_numpy()
    bad = np.zeros(len(readings))  # a blunder on this line is taken out at its known size
    bad[sorted(blunders)] = residual[sorted(blunders)]
    walk -= np.cumsum(bad[first.to_numpy()])
    assert abs(walk[-1] - truth_walk[-1]) <= 4 * expected * math.sqrt(len(chain))


def test_readings_follow_field_practice(written):
    design, out = written
    folder, truth = out[True]
    readings = pd.read_csv(folder / "dipoles.csv")
    checks = pd.read_csv(folder / "electrode_checks.csv")
    time = pd.to_datetime(readings.TIME)
    gaps = time.diff().dt.total_seconds().to_numpy()[1:]
    same_line = (readings.LINE.to_numpy()[1:] == readings.LINE.to_numpy()[:-1])
    assert np.all(gaps > 0)
    assert np.median(gaps[same_line]) >= 40 and np.quantile(gaps[same_line], 0.9) <= 91
    assert "+" not in readings.TIME.iloc[0] and "Z" not in readings.TIME.iloc[0]
    per_day = checks.groupby(checks.time.str[:10]).size()
    assert per_day.min() >= 2 and per_day.max() <= 3
    days = time.dt.date.nunique()
    assert days == truth["readings"]["n_days"] == len(per_day)
    span = time.groupby(time.dt.date).agg(lambda t: (t.max() - t.min()).total_seconds() / 3600)
    assert span.iloc[:-1].max() <= 9.0
    # every line and tie line is read once as a chain of consecutive stations
    assert set(readings.LINE) == {item["line"] for item in design["layout"]["lines"]}
    for line, rows in readings.groupby("LINE", sort=False):
        assert (rows.FROM.to_numpy()[1:] == rows.TO.to_numpy()[:-1]).all()
    assert truth["readings"]["reversed_lines"]
