"""Shared fixtures: small surveys written in every supported format, built in code."""

from __future__ import annotations

import textwrap

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from shapely.geometry import LineString

UTM = "EPSG:32633"


def small_survey(n_lines=5, n_per_line=41, spacing=25.0, line_spacing=200.0, origin=(500000.0, 4500000.0)):
    """A grid of stations on north-south lines with a smooth SP field (mV) and one fault across them."""
    e0, n0 = origin
    rows = []
    for i in range(n_lines):
        for k in range(n_per_line):
            e = e0 + i * line_spacing
            n = n0 + k * spacing
            sp = 30.0 * np.tanh((e - e0 - 400.0) / 150.0) + 0.01 * (n - n0)
            rows.append({"STN": f"L{i + 1:02d}-{k:03d}", "LINE": f"L{i + 1:02d}", "E": e, "N": n, "SP_mV": round(sp, 3),
                         "ELEV": 1000.0 + 0.02 * (n - n0)})
    frame = pd.DataFrame(rows)
    fault = LineString([(e0 + 400.0, n0 - 300.0), (e0 + 420.0, n0 + n_per_line * spacing + 300.0)])
    return frame, fault


def write_survey(folder, fmt="shp", *, frame=None, fault=None, extra_project=""):
    """Write stations (in ``fmt``), faults (GeoPackage) and a project file; return the project path."""
    if frame is None:
        frame, fault = small_survey()
    folder.mkdir(parents=True, exist_ok=True)
    gdf = gpd.GeoDataFrame(frame.drop(columns=["E", "N"]), geometry=gpd.points_from_xy(frame.E, frame.N), crs=UTM)
    station_keys = 'id = "STN"\nvalue_mv = "SP_mV"\nline = "LINE"\nelevation = "ELEV"'
    if fmt == "shp":
        gdf.to_file(folder / "stations.shp")
        path = "stations.shp"
    elif fmt == "gpkg":
        gdf.to_file(folder / "stations.gpkg", layer="stations")
        path = "stations.gpkg"
    elif fmt == "geojson":
        gdf.to_crs(4326).to_file(folder / "stations.geojson", driver="GeoJSON")
        path = "stations.geojson"
    elif fmt == "csv":
        ll = gdf.to_crs(4326)
        out = frame.drop(columns=["E", "N"]).copy()
        out["lon"] = ll.geometry.x.round(9)
        out["lat"] = ll.geometry.y.round(9)
        out.to_csv(folder / "stations.csv", index=False)
        path = "stations.csv"
        station_keys += '\nlon = "lon"\nlat = "lat"'
    elif fmt == "csv_xy":
        frame.to_csv(folder / "stations.csv", index=False)
        path = "stations.csv"
        station_keys += f'\nx = "E"\ny = "N"\ncrs = "{UTM}"'
    else:
        raise ValueError(fmt)
    gpd.GeoDataFrame({"FAULT": ["F-A"], "dip": [80.0], "dip_dir": [90.0]}, geometry=[fault], crs=UTM).to_file(
        folder / "faults.gpkg", layer="faults")
    project = folder / "project.toml"
    project.write_text(textwrap.dedent(f"""\
        [survey]
        name = "Test survey"

        [stations]
        path = "{path}"
        """) + station_keys + textwrap.dedent("""

        [faults]
        path = "faults.gpkg"
        id = "FAULT"
        dip_deg = "dip"
        dip_dir_deg = "dip_dir"
        """) + extra_project)
    return project


@pytest.fixture
def survey_dir(tmp_path):
    return tmp_path / "survey"
