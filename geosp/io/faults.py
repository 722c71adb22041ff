"""Read mapped fault traces (LineString/MultiLineString) into Fault objects in the working CRS."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import shapely

from ..errors import InputError, InputErrors, format_rows
from ..models import Fault
from .vector import read_vector


def read_faults(config, *, crs):
    """
    Read the [faults] section's layer.

    Z values are dropped. Each part of a MultiLineString becomes its own
    trace (id suffixed with ``/2``, ``/3``...). Dip and dip direction are
    read when their columns are named; blanks mean unknown.

    Returns
    -------
    faults : tuple of Fault
    """
    path = Path(config["path"])
    gdf, layer = read_vector(path, layer=config.get("layer", ""), what="faults file")
    if gdf.crs is None:
        raise InputError(path, f"layer '{layer}' has no CRS (missing .prj?).",
                         "Assign the CRS in your GIS and export again.")
    problems = []
    for key in ("id", "dip_deg", "dip_dir_deg"):
        name = config.get(key, "")
        if name and name not in gdf.columns:
            problems.append(InputError(path, f"layer '{layer}' has no column '{name}' for {key}.",
                                       f"Columns: {', '.join(c for c in gdf.columns if c != 'geometry')}."))
    if problems:
        raise InputErrors(problems)
    gdf = gdf.to_crs(pyproj.CRS.from_user_input(crs))
    ids = (gdf[config["id"]].astype(str).str.strip().to_numpy() if config.get("id")
           else np.array([f"F{i + 1}" for i in range(len(gdf))]))
    feature = [f"feature {i + 1} ({ident})" for i, ident in enumerate(ids)]
    if config.get("id"):
        seen = {}
        for i, ident in enumerate(ids):
            seen.setdefault(ident, []).append(i + 1)
        for ident, rows in seen.items():
            if len(rows) > 1:
                problems.append(InputError(
                    path, f"fault id '{ident}' in column '{config['id']}' is used by features "
                    f"{format_rows(rows)}.",
                    "Give each fault its own id (several pieces of one fault: one MultiLineString), "
                    "or leave [faults] id out to number them."))

    def numbers(key, low, high, what):
        if not config.get(key):
            return np.full(len(gdf), np.nan)
        raw = gdf[config[key]]
        values = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
        bad = (np.isnan(values) & raw.notna().to_numpy() & (raw.astype(str).str.strip() != "").to_numpy()) | \
              (np.isfinite(values) & ((values < low) | (values > high)))
        if bad.any():
            problems.append(InputError(path, f"{what} '{config[key]}' is not a number within {low}–{high} at "
                                       f"{format_rows([feature[i] for i in np.flatnonzero(bad)])}.",
                                       "Leave it blank when unknown (it is then fitted)."))
        return values

    dips = numbers("dip_deg", 0.0, 90.0, "dip")
    dip_dirs = numbers("dip_dir_deg", 0.0, 360.0, "dip direction")
    faults = []
    kinds = set()
    for i, geom in enumerate(gdf.geometry):
        if geom is None or geom.is_empty:
            problems.append(InputError(path, f"{feature[i]} in layer '{layer}' has no geometry.",
                                       "Delete the feature or digitise its trace."))
            continue
        geom = shapely.force_2d(geom)
        if geom.geom_type == "LineString":
            parts = [geom]
        elif geom.geom_type == "MultiLineString":
            parts = list(geom.geoms)
        else:
            kinds.add(geom.geom_type)
            problems.append(InputError(path, f"{feature[i]} in layer '{layer}' is a {geom.geom_type}; faults must be lines.",
                                       "Export the fault traces as LineString or MultiLineString."))
            continue
        for k, part in enumerate(parts):
            coords = np.asarray(part.coords, dtype=float)[:, :2]
            keep = np.r_[True, np.any(np.diff(coords, axis=0) != 0, axis=1)]
            coords = coords[keep]
            if len(coords) < 2 or not np.all(np.isfinite(coords)):
                problems.append(InputError(path, f"{feature[i]} in layer '{layer}' has a degenerate trace "
                                           "(fewer than two distinct vertices, or NaN coordinates).",
                                           "Redraw the trace or delete the feature."))
                continue
            ident = ids[i] if len(parts) == 1 else f"{ids[i]}/{k + 1}"
            faults.append(Fault(fault_id=ident, coords=coords, dip_deg=float(dips[i]),
                                dip_dir_deg=float(dip_dirs[i]), source_row=i + 1))
    if problems:
        raise InputErrors(problems)
    return tuple(faults)
