"""Tests for geosp.tables: the published layers built from step results."""

import math

import numpy as np
import numpy.testing as npt
import pytest
from shapely.geometry import Polygon

from geosp import tables
from geosp.models import Detection, FaultSegment, Stations

CRS = "EPSG:32633"


def make_stations():
    return Stations(
        station_id=["A-001", "A-002", "B-001"],
        easting=[500000.0, 500050.0, 500100.0],
        northing=[4000000.0, 4000010.0, 4000020.0],
        upward=[100.0, 101.0, np.nan],
        sp_mv=[-10.0, 5.0, 30.0],
        crs=CRS,
        line_id=["A", "A", "B"],
        sp_raw_mv=[-8.0, 7.5, 33.0],
        drift_mv=[1.0, 1.5, 2.0],
        tie_mv=[1.0, 1.0, 1.0],
        terrain_mv=[0.0, 0.0, 0.0],
        flag=["", "outlier", ""],
    )


def patch_row(**changes):
    row = dict(source_id="S1", fault_id="F1", segment_id="F1-1", model="fault_patch",
               top_x=500000.0, top_y=4000000.0, strike_deg=0.0, dip_deg=60.0,
               dip_dir_deg=90.0, top_depth_m=20.0, bottom_depth_m=120.0, length_m=200.0,
               jump_mv=50.0, top_depth_lo_m=15.0, top_depth_hi_m=26.0, jump_lo_mv=40.0,
               jump_hi_mv=61.0, rms_mv=2.1, chi2_red=1.1, n_stations=40, bic_gain=35.0,
               sigma_ratio=1.0, flags=("bound hit",), location_sd_m=8.0)
    row.update(changes)
    return row


def test_stations_frame_has_contract_fields_and_residual():
    stations = make_stations()
    frame = tables.stations_frame(stations, model_mv=[-9.0, 4.0, 28.0])
    assert list(frame.columns[:10]) == list(tables.STATION_FIELDS)
    assert frame.crs == CRS
    # residual = observed - modelled (definition in the contract).
    npt.assert_allclose(frame["residual_mv"], [-1.0, 1.0, 2.0])
    npt.assert_allclose(frame.geometry.x, stations.easting)
    assert list(frame["flag"]) == ["", "outlier", ""]
    # Reduction identity of models.Stations: sp = raw - drift - tie - terrain.
    npt.assert_allclose(frame["sp_raw_mv"] - frame["drift_mv"] - frame["tie_mv"]
                        - frame["terrain_mv"], frame["sp_mv"])


def test_stations_frame_without_model_is_nan():
    frame = tables.stations_frame(make_stations())
    assert frame["model_mv"].isna().all() and frame["residual_mv"].isna().all()


def test_segments_frame_types_and_values():
    seg = FaultSegment("F1", "F1-2", np.array([[0.0, 0.0], [0.0, 300.0]]), 0.0, 300.0)
    det = Detection(seg, np.arange(5), 5, 4.5, -1, True, 3.2, 1.5, {}, note="clear")
    other = Detection(seg, np.arange(2), 2, 0.7, 1, False, 3.2, 1.5, {}, cultural=True)
    frame = tables.segments_frame([det, other], CRS)
    assert list(frame.columns[:8]) == list(tables.SEGMENT_FIELDS)
    assert list(frame["detected"]) == [1, 0] and frame["detected"].dtype == "int64"
    assert list(frame["polarity"]) == [-1, 1] and frame["polarity"].dtype == "int64"
    assert list(frame["cultural"]) == [0, 1]
    assert frame.geometry.iloc[0].length == pytest.approx(300.0)


def test_dipping_patch_footprint_matches_hand_computation():
    # Hand computation: strike 0 (north), dip 60° toward east (strike + 90).
    # Horizontal offset of the bottom edge = (120 - 20) / tan(60°) = 57.735 m.
    # Footprint = rectangle 200 m along strike (north) by 57.735 m east.
    frame = tables.sources_frame([patch_row()], CRS)
    poly = frame.geometry.iloc[0]
    offset = 100.0 / math.tan(math.radians(60.0))
    expected = Polygon([(500000.0, 3999900.0), (500000.0, 4000100.0),
                        (500000.0 + offset, 4000100.0), (500000.0 + offset, 3999900.0)])
    # Same construction in float64: area to 1e-9 relative, shapes equal to 1 µm.
    assert poly.area == pytest.approx(200.0 * offset, rel=1e-9)
    assert poly.symmetric_difference(expected).area < 1e-6


def test_oblique_strike_footprint_points_to_dip_direction():
    # Strike 45°: dip direction 135° (south-east). The far corners must lie
    # south-east of the top edge by offset * (cos 45°, -sin 45°).
    row = patch_row(strike_deg=45.0, dip_deg=30.0, dip_dir_deg=135.0, length_m=100.0)
    poly = tables.sources_frame([row], CRS).geometry.iloc[0]
    offset = 100.0 / math.tan(math.radians(30.0))
    assert poly.area == pytest.approx(100.0 * offset, rel=1e-9)
    centroid = poly.centroid
    npt.assert_allclose([centroid.x - 500000.0, centroid.y - 4000000.0],
                        [offset / 2 * math.cos(math.radians(45)),
                         -offset / 2 * math.sin(math.radians(45))], atol=1e-6)


def test_vertical_patch_footprint_never_zero_width():
    row = patch_row(dip_deg=90.0, location_sd_m=8.0)
    poly = tables.sources_frame([row], CRS).geometry.iloc[0]
    # +/- location_sd_m about the trace: 200 m x 16 m.
    assert poly.area == pytest.approx(200.0 * 16.0, rel=1e-9)
    bounds = poly.bounds
    assert bounds[0] == pytest.approx(500000.0 - 8.0) and bounds[2] == pytest.approx(500008.0)
    # Without location_sd_m: 10 % of the top depth (20 m) -> +/- 2 m.
    row.pop("location_sd_m")
    poly = tables.sources_frame([row], CRS).geometry.iloc[0]
    assert poly.area == pytest.approx(200.0 * 4.0, rel=1e-9)


def test_pole_pair_footprint_and_fields():
    row = dict(source_id="P1", fault_id="F2", segment_id="F2-1", model="pole_pair",
               top_x=1000.0, top_y=2000.0, top_depth_m=5.0, neg_x=1030.0, neg_y=2040.0,
               neg_depth_m=7.0, pole_k_mv_m=250.0, location_sd_m=3.0, flags=[])
    frame = tables.sources_frame([row, patch_row()], CRS)
    poly = frame.geometry.iloc[0]
    # Buffered 50 m segment (3-4-5 triangle): area = 2*3*50 + pi*3^2 (buffer
    # of a segment); the polygonal circle approximation loses < 1 %.
    assert poly.area == pytest.approx(2 * 3.0 * 50.0 + math.pi * 9.0, rel=1e-2)
    for name in tables.POLE_PAIR_FIELDS:
        assert name in frame.columns
    assert np.isnan(frame["neg_x"].iloc[1])
    assert frame["flags"].tolist() == ["", "bound hit"]
    assert frame["n_stations"].dtype == "int64"


def test_buried_line_footprint_3d_and_fields():
    # A line 400 m long toward 30° (centre 1000, 2000), 4 m deep, location sd 5 m:
    # a band of 2·5·400 plus two half-discs (buffer of a segment), ends 200 m either side.
    row = dict(source_id="Q1", fault_id="F2", segment_id="F2-1", model="buried_line",
               top_x=1000.0, top_y=2000.0, strike_deg=30.0, length_m=400.0, top_depth_m=4.0,
               line_k_mv=-12.0, location_sd_m=5.0, flags=[])
    frame = tables.sources_frame([row, patch_row()], CRS)
    poly = frame.geometry.iloc[0]
    assert poly.area == pytest.approx(2 * 5.0 * 400.0 + math.pi * 25.0, rel=1e-2)
    end = (1000.0 + 200.0 * math.sin(math.radians(30.0)), 2000.0 + 200.0 * math.cos(math.radians(30.0)))
    assert poly.buffer(1e-6).contains(Polygon([end, (end[0] + 1, end[1]), (end[0], end[1] + 1)]).centroid)
    assert "line_k_mv" in frame.columns and np.isnan(frame["line_k_mv"].iloc[1])
    solid = tables.sources_3d_frame([row], CRS, ground_m=300.0).geometry.iloc[0]
    npt.assert_allclose(sorted(set(np.asarray(solid.exterior.coords)[:, 2])), [296.0])


def test_pole_pair_footprint_is_not_widened_by_a_degenerate_location_sd():
    # A casing pole 13 m deep whose linearised location sd came out at 20 km: the disc is at
    # most 3 x 13 = 39 m in radius (docs/outputs.md, footprint rule); the field keeps 20 km.
    row = dict(source_id="Q1", fault_id="F2", segment_id="F2-1", model="pole_pair",
               top_x=1000.0, top_y=2000.0, top_depth_m=13.0, neg_x=1000.0, neg_y=2000.0,
               neg_depth_m=4966.0, pole_k_mv_m=250.0, location_sd_m=19971.0, flags=[])
    frame = tables.sources_frame([row], CRS)
    assert frame.geometry.iloc[0].area == pytest.approx(math.pi * 39.0**2, rel=1e-2)
    assert frame["location_sd_m"].iloc[0] == 19971.0


def test_sources_3d_z_is_ground_minus_depth():
    frame = tables.sources_3d_frame([patch_row()], CRS, ground_m=350.0)
    coords = np.asarray(frame.geometry.iloc[0].exterior.coords)
    assert frame.geometry.iloc[0].has_z
    # Corners: top edge at 350 - 20 = 330 m, bottom edge at 350 - 120 = 230 m.
    npt.assert_allclose(sorted(set(coords[:, 2])), [230.0, 330.0])
    bottom = coords[coords[:, 2] == 230.0]
    npt.assert_allclose(bottom[:, 0], 500000.0 + 100.0 / math.tan(math.radians(60.0)))
    # Without ground: z = -depth.
    coords = np.asarray(tables.sources_3d_frame([patch_row()], CRS).geometry.iloc[0].exterior.coords)
    npt.assert_allclose(sorted(set(coords[:, 2])), [-120.0, -20.0])


def test_bad_geometry_row_is_rejected_with_id():
    with pytest.raises(ValueError, match="S9"):
        tables.sources_frame([patch_row(source_id="S9", dip_deg=0.0)], CRS)


def test_empty_inputs_give_empty_frames_with_columns():
    assert list(tables.sources_frame([], CRS).columns[:23]) == list(tables.SOURCE_FIELDS)
    assert len(tables.segments_frame([], CRS)) == 0


def test_targets_table_has_wgs84_position_and_elevation_above_sea_level():
    # Reference: pyproj for the position (an independent transform of the same point) and
    # ground − depth for the elevation. Uncertain rows follow the targets; cultural ones are left out.
    import pyproj

    rows = [dict(patch_row(), source_id="U1", status="uncertain", ground_m=500.0),
            dict(patch_row(), source_id="T1", status="target", ground_m=1200.0),
            dict(source_id="C1", model="pole_pair", status="cultural", top_x=1000.0, top_y=2000.0,
                 top_depth_m=5.0, neg_x=1030.0, neg_y=2040.0, neg_depth_m=7.0, pole_k_mv_m=250.0, flags=[])]
    sources = tables.sources_frame(rows, CRS)
    table = tables.targets_frame(sources)
    assert list(table["source_id"]) == ["T1", "U1"]
    assert list(table.columns) == list(tables.TARGET_COLUMNS)
    target = next(r for r in rows if r["source_id"] == "T1")
    lon, lat = pyproj.Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(target["top_x"],
                                                                                      target["top_y"])
    assert table.loc[0, "lon"] == pytest.approx(lon, abs=1e-7) and table.loc[0, "lat"] == pytest.approx(lat, abs=1e-7)
    assert table.loc[0, "top_elevation_m"] == pytest.approx(1200.0 - target["top_depth_m"], abs=0.05)
