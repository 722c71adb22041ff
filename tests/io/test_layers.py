"""Tests for geosp.io.layers (GeoPackage) and geosp.io.atomic."""

import sqlite3
import xml.etree.ElementTree as ET

import numpy as np
import numpy.testing as npt
import pyogrio
import pytest

from geosp import tables
from geosp.errors import InputError
from geosp.io.atomic import atomic_path, ensure_not_input
from geosp.io.layers import read_layers, station_ramp, write_layers
from geosp.models import Detection, FaultSegment, Stations

CRS = "EPSG:32633"


def make_layers():
    stations = Stations(
        station_id=["A-001", "A-002", "B-001", "B-002"],
        easting=[500000.0, 500050.0, 500100.0, 500150.0],
        northing=[4000000.0, 4000010.0, 4000020.0, 4000030.0],
        upward=[100.0, 101.0, np.nan, 99.0], sp_mv=[-40.0, 5.0, 30.0, 12.0], crs=CRS,
        line_id=["A", "A", "B", "B"], flag=["", "outlier", "", "ß ünïcode"],
    )
    seg = FaultSegment("F1", "F1-1", np.array([[500000.0, 3999900.0], [500000.0, 4000100.0]]),
                       0.0, 200.0)
    dets = [Detection(seg, np.arange(4), 4, 4.2, -1, True, 3.0, 2.0, {}, note="clear"),
            Detection(seg, np.arange(2), 2, 1.1, 1, False, 3.0, 2.0, {})]
    rows = [dict(source_id="S1", fault_id="F1", segment_id="F1-1", model="fault_patch",
                 top_x=500000.0, top_y=4000000.0, strike_deg=0.0, dip_deg=60.0,
                 dip_dir_deg=90.0, top_depth_m=20.0, bottom_depth_m=120.0, length_m=200.0,
                 jump_mv=50.0, top_depth_lo_m=15.0, top_depth_hi_m=26.0, jump_lo_mv=40.0,
                 jump_hi_mv=61.0, rms_mv=2.1, chi2_red=1.1, n_stations=40, bic_gain=35.0,
                 sigma_ratio=1.0, flags=("bound hit", "strong correlation"),
                 location_sd_m=8.0),
            dict(source_id="S2", fault_id="F1", segment_id="F1-1", model="pole_pair",
                 top_x=500010.0, top_y=4000000.0, top_depth_m=5.0, neg_x=500030.0,
                 neg_y=4000000.0, neg_depth_m=6.0, pole_k_mv_m=100.0, n_stations=7)]
    return {
        "stations": tables.stations_frame(stations, model_mv=[-38.0, 4.0, 29.0, 10.0]),
        "fault_segments": tables.segments_frame(dets, CRS),
        "sources": tables.sources_frame(rows, CRS),
        "sources_3d": tables.sources_3d_frame(rows, CRS, ground_m=100.0),
    }


def test_round_trip_every_layer_and_field(tmp_path):
    layers = make_layers()
    path = write_layers(tmp_path / "interpretation.gpkg", layers)
    back = read_layers(path)
    assert list(back) == list(layers)
    for name, frame in layers.items():
        got = back[name]
        assert got.crs == frame.crs, name
        assert list(got.columns) == list(frame.columns), name
        for column in frame.columns:
            if column == "geometry":
                assert got.geometry.geom_equals_exact(frame.geometry, tolerance=1e-6).all()
                assert got.geometry.has_z.tolist() == frame.geometry.has_z.tolist()
                continue
            expected, actual = frame[column], got[column]
            if expected.dtype.kind in "f":
                assert actual.dtype.kind == "f", (name, column)
                npt.assert_allclose(actual, expected, equal_nan=True)
            elif expected.dtype.kind in "iu":
                # Integers stay integers (contract: detected 0/1, polarity +1/-1).
                assert actual.dtype.kind in "iu", (name, column, actual.dtype)
                assert actual.tolist() == expected.tolist()
            else:
                assert actual.fillna("").tolist() == expected.tolist(), (name, column)
    assert back["fault_segments"]["polarity"].tolist() == [-1, 1]
    # Field names written out literally from contract.md ("GeoPackage layers").
    contract = {
        "stations": ["station_id", "line_id", "sp_mv", "sp_raw_mv", "drift_mv", "terrain_mv",
                     "tie_mv", "model_mv", "residual_mv", "flag"],
        "fault_segments": ["fault_id", "segment_id", "length_m", "n_stations", "score",
                           "detected", "polarity", "note"],
        "sources": ["source_id", "fault_id", "segment_id", "model", "top_x", "top_y",
                    "strike_deg", "dip_deg", "dip_dir_deg", "top_depth_m", "bottom_depth_m",
                    "length_m", "jump_mv", "top_depth_lo_m", "top_depth_hi_m", "jump_lo_mv",
                    "jump_hi_mv", "rms_mv", "chi2_red", "n_stations", "bic_gain",
                    "sigma_ratio", "flags"],
    }
    contract["sources_3d"] = contract["sources"]
    text = {"station_id", "line_id", "flag", "fault_id", "segment_id", "note", "source_id",
            "model", "flags"}
    integer = {"n_stations", "detected", "polarity"}
    for name, fields in contract.items():
        assert list(back[name].columns[:len(fields)]) == fields, name
        for field in fields:
            kind = back[name][field].dtype.kind
            expected = "O" if field in text else "i" if field in integer else "f"
            # pandas 3 reads text as the str dtype (kind "O" or "T"), not object.
            assert kind == expected or (expected == "O" and kind in "OTU"), (name, field, kind)


def test_layer_styles_readable_and_data_layers_listed(tmp_path):
    path = write_layers(tmp_path / "out.gpkg", make_layers())
    listed = {row[0]: row[1] for row in pyogrio.list_layers(path)}
    for name, kind in (("stations", "Point"), ("fault_segments", "LineString"),
                       ("sources", "Polygon"), ("sources_3d", "Polygon Z")):
        assert listed[name] == kind
    with sqlite3.connect(path) as con:
        cols = [r[1] for r in con.execute("PRAGMA table_info(layer_styles)")]
        rows = con.execute("SELECT f_table_name, f_geometry_column, styleQML, styleSLD, "
                           "useAsDefault, update_time FROM layer_styles").fetchall()
        kind = con.execute("SELECT data_type FROM gpkg_contents "
                           "WHERE table_name = 'layer_styles'").fetchone()
    for col in ("f_table_catalog", "f_table_schema", "f_table_name", "f_geometry_column",
                "styleName", "styleQML", "styleSLD", "useAsDefault", "description", "owner",
                "ui", "update_time"):
        assert col in cols
    assert kind == ("attributes",)
    styled = {r[0]: r for r in rows}
    assert set(styled) == {"stations", "fault_segments", "sources", "sources_3d"}
    for name, geom_col, qml, sld, default, stamp in rows:
        assert geom_col == "geom" and default == 1
        # ISO-8601 text timestamp (GeoPackage/SQLite convention) ending in Z.
        assert len(stamp) == 20 and stamp[10] == "T" and stamp.endswith("Z")
        # Both style documents are well-formed XML (parsed by the stdlib).
        ET.fromstring(qml.split("\n", 1)[1])
        ET.fromstring(sld.split("\n", 1)[1])
    stations_qml = ET.fromstring(styled["stations"][2].split("\n", 1)[1])
    renderer = stations_qml.find("renderer-v2")
    assert renderer.get("attr") == "sp_mv" and renderer.get("type") == "graduatedSymbol"
    segments_qml = ET.fromstring(styled["fault_segments"][2].split("\n", 1)[1])
    filters = [r.get("filter") for r in segments_qml.iter("rule")]
    assert any('"detected" = 1' in f for f in filters)


def test_station_ramp_is_centred_on_zero():
    edges = station_ramp([-40.0, 5.0, 30.0, 12.0, np.nan])
    # 98th percentile of |v| is 39.4 -> rounded up to 50 ("nice" 1-2-2.5-5 steps).
    npt.assert_allclose(edges, np.linspace(-50, 50, 9))
    assert 0.0 in edges


def test_write_layers_failure_keeps_previous_file(tmp_path):
    path = tmp_path / "interpretation.gpkg"
    write_layers(path, make_layers())
    before = path.read_bytes()
    bad = make_layers()
    bad["broken"] = "not a frame"
    with pytest.raises(Exception):
        write_layers(path, bad)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["interpretation.gpkg"]


def test_empty_sources_layer_round_trips(tmp_path):
    layers = {"sources": tables.sources_frame([], CRS)}
    back = read_layers(write_layers(tmp_path / "e.gpkg", layers))
    assert len(back["sources"]) == 0
    assert list(back["sources"].columns[:23]) == list(tables.SOURCE_FIELDS)


def test_atomic_path_replaces_only_on_success(tmp_path):
    target = tmp_path / "run.json"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            tmp.write_text("half")
            raise RuntimeError("boom")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["run.json"]
    with atomic_path(target) as tmp:
        assert tmp.parent == target.parent and tmp.suffix == ".json"
        tmp.write_text("new")
    assert target.read_text() == "new"


def test_ensure_not_input_refuses_overwrite(tmp_path):
    stations = tmp_path / "map.html"
    stations.write_text("x")
    ensure_not_input(tmp_path / "out", [stations, None])
    with pytest.raises(InputError, match="map.html"):
        ensure_not_input(tmp_path, [tmp_path / "faults.gpkg", stations])
