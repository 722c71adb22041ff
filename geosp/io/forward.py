"""Inputs and outputs of `geosp forward`: a sources layer and a set of stations."""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd

from ..errors import InputError, InputErrors, format_rows
from .vector import read_vector

FAULT_PATCH_FIELDS = ("top_x", "top_y", "strike_deg", "dip_deg", "top_depth_m", "bottom_depth_m",
                      "length_m", "jump_mv")
POLE_PAIR_FIELDS = ("top_x", "top_y", "top_depth_m", "neg_x", "neg_y", "neg_depth_m", "pole_k_mv_m")
BURIED_LINE_FIELDS = ("top_x", "top_y", "strike_deg", "length_m", "top_depth_m", "line_k_mv")


def read_forward_inputs(sources_path, stations_path, *, layer="sources"):
    """Read and check the sources layer and the stations for a forward calculation."""
    sources, layer = read_vector(Path(sources_path), layer=layer, what="sources file")
    if "model" not in sources.columns:
        raise InputError(sources_path, f"layer '{layer}' has no 'model' field.",
                         "Use the sources layer schema (docs/outputs.md): model = fault_patch, pole_pair or buried_line.")
    if sources.crs is None:
        raise InputError(sources_path, f"layer '{layer}' has no CRS.", "Write it with its projected CRS.")
    problems = []
    for i, row in sources.reset_index(drop=True).iterrows():
        where = f"feature {i + 1} ({row.get('source_id', '')})"
        need = {"fault_patch": FAULT_PATCH_FIELDS, "pole_pair": POLE_PAIR_FIELDS,
                "buried_line": BURIED_LINE_FIELDS}.get(row["model"])
        if need is None:
            problems.append(InputError(sources_path, f"{where}: unknown model {row['model']!r}.",
                                       "Use fault_patch, pole_pair or buried_line."))
            continue
        bad = [f for f in need if f not in row or pd.isna(row[f])]
        if bad:
            problems.append(InputError(sources_path, f"{where}: {row['model']} needs {', '.join(bad)}.",
                                       "Fill these fields (units in their names)."))
        elif row["model"] == "fault_patch" and not (0 < row["dip_deg"] <= 90 and
                                                     0 < row["top_depth_m"] < row["bottom_depth_m"]):
            problems.append(InputError(sources_path, f"{where}: needs 0 < dip_deg <= 90 and "
                                       "0 < top_depth_m < bottom_depth_m.", "Correct the patch geometry."))
    if problems:
        raise InputErrors(problems)
    stations_path = Path(stations_path)
    if stations_path.suffix.lower() in (".csv", ".txt"):
        stations = _read_points_csv(stations_path, sources.crs)
    else:
        stations, _ = read_vector(stations_path, what="stations file")
        if stations.crs is None:
            raise InputError(stations_path, "has no CRS.", "Assign one in your GIS and export again.")
        if not set(stations.geometry.geom_type.unique()) <= {"Point"}:
            raise InputError(stations_path, "stations must be points.", "Export the station points.")
    return sources, stations


def _read_points_csv(path, sources_crs):
    if not path.exists():
        raise InputError(path, "the stations file does not exist.", "Check the path.")
    frame = pd.read_csv(path)
    cols = {c.lower(): c for c in frame.columns}
    if "x" in cols and "y" in cols:
        xs, ys, crs = frame[cols["x"]], frame[cols["y"]], sources_crs
    elif "lon" in cols and "lat" in cols:
        xs, ys, crs = frame[cols["lon"]], frame[cols["lat"]], "EPSG:4326"
    else:
        raise InputError(path, "needs columns x,y (in the sources' CRS) or lon,lat (WGS 84).",
                         f"Columns found: {', '.join(frame.columns)}.")
    xs = pd.to_numeric(xs, errors="coerce")
    ys = pd.to_numeric(ys, errors="coerce")
    bad = xs.isna() | ys.isna()
    if bad.any():
        raise InputError(path, f"coordinates are blank or not numbers at "
                         f"{format_rows([f'line {i + 2}' for i in np.flatnonzero(bad.to_numpy())])}.",
                         "Fix or delete these rows.")
    return gpd.GeoDataFrame(frame, geometry=gpd.points_from_xy(xs, ys), crs=crs)


def write_forward_output(stations, out):
    """Write stations with model_mv to .gpkg or .csv atomically."""
    from .atomic import atomic_path

    suffix = out.suffix.lower()
    if suffix not in (".gpkg", ".csv"):
        raise InputError(out, "unsupported output format.", "Use a .gpkg or .csv file name.")
    out.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(out) as tmp:
        if suffix == ".gpkg":
            stations.to_file(tmp, layer="forward", driver="GPKG")
        else:
            frame = pd.DataFrame(stations.drop(columns="geometry"))
            for column, values in (("y", stations.geometry.y), ("x", stations.geometry.x)):
                if column not in frame:
                    frame.insert(0, column, values)
            frame.to_csv(tmp, index=False)
    return out
