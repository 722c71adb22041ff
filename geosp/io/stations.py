"""
Read SP stations from Shapefile, GeoPackage, GeoJSON or CSV into a GeoDataFrame
with canonical columns: station_id, sp_mv, line_id, elev_m, time, sigma_mv, row.

``row`` is the 1-based line number in a CSV (header = line 1) or the feature
number in a vector file, used in messages.
"""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyproj

from ..errors import InputError, InputErrors, format_rows
from .vector import read_vector

# Largest |value| (mV) below which a whole SP data set looks like volts.
_VOLTS_LIMIT = 2.0


def _missing_columns(path, columns, wanted):
    problems = []
    lower = {c.lower(): c for c in columns}
    for key, name in wanted:
        if name and name not in columns:
            hint = ""
            if name.lower() in lower:
                hint = f" (the file has '{lower[name.lower()]}': names are case-sensitive)"
            else:
                import difflib

                close = difflib.get_close_matches(name, list(columns), n=1, cutoff=0.5)
                if close:
                    hint = f" (did you mean '{close[0]}'?)"
            problems.append(InputError(
                path, f"has no column '{name}' for {key}{hint}.",
                f"Columns in the file: {', '.join(map(str, columns))}. Set {key} = \"...\" in the project file."))
    return problems


def _row_labels(frame, mask, id_column="station_id"):
    labels = []
    for row, ident in zip(frame.loc[mask, "row"], frame.loc[mask, id_column] if id_column in frame else frame.loc[mask, "row"]):
        labels.append(f"{'line' if frame.attrs.get('csv') else 'feature'} {row} ({ident})")
    return labels


_ZONED = r"(?:[Zz]|[+-]\d\d(?::?\d\d)?)\s*$"


def parse_times(raw, path, column, labels, problems):
    """
    Parse ISO 8601 times into naive timestamps (offsets applied when given).

    All values with a time-zone offset (``Z``, ``+02:00``; offsets may differ)
    are converted to UTC; all values without one are kept as written. A
    column mixing the two is refused (the order of the readings would depend
    on a guess). Unparseable values are NaT; the caller reports them.

    Parameters
    ----------
    raw : pandas.Series
    path, column : for the message
    labels : callable
        Boolean mask -> list of row labels for the message.
    problems : list
        An InputError is appended for a mixture.
    """
    text = raw.astype("string").str.strip()
    zoned = text.str.contains(_ZONED, regex=True, na=False).to_numpy()
    present = text.notna().to_numpy() & (text.fillna("") != "").to_numpy()
    if zoned.any() and (present & ~zoned).any():
        problems.append(InputError(
            path, f"column '{column}' mixes times with a time zone ({format_rows(labels(zoned), cap=2)}) and "
            f"without one ({format_rows(labels(present & ~zoned), cap=2)}).",
            "Write every time the same way: all with an offset (2026-03-14T09:30:00+02:00) or all without."))
    times = pd.to_datetime(text.where(pd.Series(present, index=text.index)), errors="coerce", format="ISO8601",
                           utc=bool(zoned.any()))
    if getattr(times.dt, "tz", None) is not None:
        times = times.dt.tz_convert("UTC").dt.tz_localize(None)
    return times


def _numeric(frame, column, path, label, problems, *, allow_blank=False):
    raw = frame[column]
    values = pd.to_numeric(raw, errors="coerce").astype(float)
    blank = raw.isna() | (raw.astype(str).str.strip() == "")
    bad = values.isna() & ~blank
    if blank.any() and not allow_blank:
        problems.append(InputError(
            path, f"column '{label}' is blank at {format_rows(_row_labels(frame, blank))}.",
            "Enter the value or delete the row; blanks are never read as 0."))
    if bad.any():
        problems.append(InputError(
            path, f"column '{label}' is not a number at {format_rows(_row_labels(frame, bad))}.",
            "Use plain numbers with a decimal point (no units, no thousands separators)."))
    infinite = ~np.isfinite(values) & ~values.isna()
    if infinite.any():
        problems.append(InputError(
            path, f"column '{label}' is infinite at {format_rows(_row_labels(frame, infinite))}.",
            "Replace it with a measured value or delete the row."))
    return values


#: Magnitudes no SP survey produces: beyond them a value is a unit or typing error (mV; m).
MAX_ABS_SP_MV = 1e5
ELEVATION_RANGE_M = (-1000.0, 9000.0)


def refuse_outside(values, low, high, path, label, labels, problems, fix):
    """Add an InputError naming the rows whose finite value lies outside [low, high]."""
    values = np.asarray(values, dtype=float)
    bad = np.isfinite(values) & ((values < low) | (values > high))
    if bad.any():
        problems.append(InputError(path, f"column '{label}' holds values outside {low:g} to {high:g} at "
                                   f"{format_rows(labels(bad))}.", fix))


def read_stations(config, *, crs=None):
    """
    Read the stations named by a project's [stations] section.

    Parameters
    ----------
    config : dict
        The [stations] section (paths already resolved).
    crs : str or None
        Working CRS to reproject to; None keeps the file's CRS.

    Returns
    -------
    stations : geopandas.GeoDataFrame
        Canonical columns (see module docstring); CRS set.
    """
    path = Path(config["path"])
    suffix = path.suffix.lower()
    problems = []
    if suffix == ".csv" or suffix == ".txt":
        frame = _read_csv_points(path, config, problems)
    else:
        if not path.exists():
            raise InputError(path, "the stations file does not exist.", "Check [stations] path in the project file.")
        gdf, layer = read_vector(path, layer=config.get("layer", ""), what="stations file")
        if gdf.crs is None:
            raise InputError(path, f"layer '{layer}' has no CRS (missing .prj?).",
                             "Assign the CRS in your GIS and export again, or give the .prj file.")
        geom_types = set(gdf.geometry.geom_type.dropna().unique())
        if not geom_types <= {"Point", "MultiPoint"}:
            raise InputError(path, f"layer '{layer}' has {', '.join(sorted(geom_types))} geometries; stations must be points.",
                             "Export the station points, not lines or polygons.")
        gdf = gdf.copy()
        gdf["row"] = np.arange(1, len(gdf) + 1)
        empty = gdf.geometry.is_empty | gdf.geometry.isna()
        frame = gdf
        wanted = [("id", config["id"]), ("value_mv", config.get("value_mv", "")), ("line", config.get("line", "")),
                  ("elevation", config.get("elevation", "")), ("time", config.get("time", "")),
                  ("sigma_mv", config.get("sigma_mv", ""))]
        missing = _missing_columns(path, list(gdf.columns), wanted)
        if missing:
            raise InputErrors(missing)
        frame["station_id"] = gdf[config["id"]].astype(str).str.strip()
        if empty.any():
            problems.append(InputError(path, f"empty geometry at {format_rows(_row_labels(frame, empty))}.",
                                       "Give every station a position or delete it."))
        frame = frame[~empty]
        if (frame.geometry.geom_type == "MultiPoint").any():
            frame = frame.set_geometry(frame.geometry.centroid)
    frame.attrs["csv"] = suffix in (".csv", ".txt")
    canonical = gpd.GeoDataFrame({"station_id": frame["station_id"].astype(str).str.strip(),
                                  "row": frame["row"].to_numpy()}, geometry=frame.geometry.values, crs=frame.crs)
    canonical.attrs["csv"] = frame.attrs["csv"]
    ids = canonical["station_id"]
    blank_id = ids.isin(["", "nan", "None", "<NA>"])
    if blank_id.any():
        problems.append(InputError(path, f"station id is blank at {format_rows(_row_labels(canonical, blank_id, 'row'))}.",
                                   f"Give every station an id in column '{config['id']}'."))
    if config.get("value_mv"):
        values = _numeric(frame, config["value_mv"], path, config["value_mv"], problems)
        canonical["sp_mv"] = values.to_numpy() * float(config.get("value_scale", 1.0) or 1.0)
        refuse_outside(canonical["sp_mv"], -MAX_ABS_SP_MV, MAX_ABS_SP_MV, path, config["value_mv"],
                       lambda mask: _row_labels(canonical, mask), problems,
                       "That is no SP reading (in mV after value_scale): check the units and the row.")
    else:
        canonical["sp_mv"] = np.nan
    canonical["line_id"] = frame[config["line"]].astype(str).str.strip().to_numpy() if config.get("line") else ""
    if config.get("elevation"):
        canonical["elev_m"] = _numeric(frame, config["elevation"], path, config["elevation"], problems,
                                       allow_blank=True).to_numpy()
        refuse_outside(canonical["elev_m"], *ELEVATION_RANGE_M, path, config["elevation"],
                       lambda mask: _row_labels(canonical, mask), problems,
                       "Elevations are in metres above sea level: check the units and the row.")
    else:
        canonical["elev_m"] = np.nan
    if config.get("sigma_mv"):
        canonical["sigma_mv"] = _numeric(frame, config["sigma_mv"], path, config["sigma_mv"], problems,
                                         allow_blank=True).to_numpy()
    else:
        canonical["sigma_mv"] = np.nan
    if config.get("time"):
        times = parse_times(frame[config["time"]], path, config["time"],
                            lambda mask: _row_labels(canonical, mask), problems)
        bad = times.isna() & frame[config["time"]].notna()
        if bad.any():
            problems.append(InputError(path, f"column '{config['time']}' is not an ISO 8601 time at "
                                       f"{format_rows(_row_labels(canonical, bad.to_numpy()))}.",
                                       "Write times like 2026-03-14T09:30:00."))
        canonical["time"] = times
    else:
        canonical["time"] = pd.NaT
    if problems:
        raise InputErrors(problems)
    if crs is not None and canonical.crs != pyproj.CRS.from_user_input(crs):
        canonical = canonical.to_crs(crs)
    _check_duplicates(canonical, path, config)
    _check_volts(canonical, path, config)
    return canonical


def read_csv_text(path):
    """
    Read a comma-separated UTF-8 file (a byte-order mark is fine) as text columns.

    Raises InputError for text that is not UTF-8, a semicolon-separated
    file, or anything pandas cannot parse.
    """
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, na_values=[""], skipinitialspace=True,
                            encoding="utf-8")
    except UnicodeDecodeError as err:
        raise InputError(path, f"is not UTF-8 text (byte 0x{err.object[err.start]:02x} at byte {err.start}).",
                         "Save it as 'CSV UTF-8' from your spreadsheet or editor.") from None
    except Exception as err:
        text = str(err).strip().splitlines()[0][:200] if str(err).strip() else type(err).__name__
        raise InputError(path, f"cannot be read as CSV ({text}).",
                         "Save it as comma-separated text with one header line.") from None
    if len(frame.columns) == 1 and ";" in str(frame.columns[0]):
        raise InputError(path, "is semicolon-separated; geosp reads comma-separated files.",
                         "Save it as comma-separated CSV with a decimal point (not a decimal comma).")
    return frame


def _read_csv_points(path, config, problems):
    if not path.exists():
        raise InputError(path, "the stations file does not exist.", "Check [stations] path in the project file.")
    frame = read_csv_text(path)
    if len(frame) == 0:
        raise InputError(path, "has a header but no stations.", "Add the station rows.")
    frame["row"] = np.arange(2, len(frame) + 2)
    frame.attrs["csv"] = True
    lon, lat, x, y = (config.get(k, "") for k in ("lon", "lat", "x", "y"))
    if x or y:
        if not (x and y):
            raise InputError(path, "give both x and y column names in [stations].", "Add x = \"...\" and y = \"...\".")
        if not config.get("crs"):
            raise InputError(path, "x/y columns need their CRS.",
                             "Add crs = \"EPSG:....\" to [stations], or use lon/lat columns in WGS 84.")
        try:
            point_crs = pyproj.CRS.from_user_input(config["crs"])
        except pyproj.exceptions.CRSError:
            raise InputError(path, f"[stations] crs = {config['crs']!r} is not a known CRS.",
                             "Use an EPSG code such as \"EPSG:32633\" or a WKT string.") from None
        if point_crs.is_geographic:
            raise InputError(path, f"x/y are declared in a geographic CRS ({point_crs.name}).",
                             "For longitude/latitude use lon = \"...\" and lat = \"...\" instead of x/y; "
                             "x/y must be projected coordinates in metres.")
        xcol, ycol = x, y
    else:
        lon = lon or "lon"
        lat = lat or "lat"
        point_crs = pyproj.CRS.from_epsg(4326)
        xcol, ycol = lon, lat
    wanted = [("id", config["id"]), ("x" if x else "lon", xcol), ("y" if y else "lat", ycol),
              ("value_mv", config.get("value_mv", "")), ("line", config.get("line", "")),
              ("elevation", config.get("elevation", "")), ("time", config.get("time", "")),
              ("sigma_mv", config.get("sigma_mv", ""))]
    missing = _missing_columns(path, list(frame.columns), wanted)
    if missing:
        raise InputErrors(missing)
    frame["station_id"] = frame[config["id"]].fillna("").astype(str)
    xs = _numeric(frame, xcol, path, xcol, problems)
    ys = _numeric(frame, ycol, path, ycol, problems)
    if not (x or y):
        bad = (xs.abs() > 180) | (ys.abs() > 90)
        if bad.any():
            problems.append(InputError(path, f"longitude/latitude out of range at {format_rows(_row_labels(frame, bad))}.",
                                       "lon must be within ±180 and lat within ±90 degrees (WGS 84); "
                                       "for projected coordinates use x/y with their crs."))
    if problems:
        raise InputErrors(problems)
    return gpd.GeoDataFrame(frame, geometry=gpd.points_from_xy(xs, ys, crs=point_crs), crs=point_crs)


def _check_duplicates(stations, path, config):
    """Repeated ids must be reoccupations (same place, with a time); different ids may not share a place."""
    problems = []
    metric = stations if not stations.crs.is_geographic else stations.to_crs(stations.geometry.estimate_utm_crs())
    e = metric.geometry.x.to_numpy()
    n = metric.geometry.y.to_numpy()
    has_time = stations["time"].notna().to_numpy()
    label = "line" if stations.attrs.get("csv") else "feature"
    dup = stations["station_id"].duplicated(keep=False).to_numpy()
    if dup.any():
        moved, untimed = [], []
        for ident, group in stations[dup].groupby("station_id", sort=False):
            idx = group.index
            spread = np.hypot(e[stations.index.get_indexer(idx)] - e[stations.index.get_indexer(idx)].mean(),
                              n[stations.index.get_indexer(idx)] - n[stations.index.get_indexer(idx)].mean()).max()
            rows = ", ".join(str(r) for r in group["row"])
            if spread > 1.0:
                moved.append(f"{ident} ({label}s {rows}, {2 * spread:.0f} m apart)")
            elif not has_time[stations.index.get_indexer(idx)].all() and group["sp_mv"].nunique(dropna=False) > 1:
                untimed.append(f"{ident} ({label}s {rows})")
        if moved:
            problems.append(InputError(path, f"duplicate station ids at different positions: {format_rows(moved)}.",
                                       "Give each station its own id, or correct the position of the repeat."))
        if untimed:
            problems.append(InputError(path, f"duplicate station ids with different values and no time: {format_rows(untimed)}.",
                                       "Add a time column (and time = \"...\") so repeats are read as base reoccupations, "
                                       "or delete the repeat."))
    first = ~stations["station_id"].duplicated().to_numpy()
    if first.sum() > 1:
        from scipy.spatial import cKDTree

        pts = np.column_stack([e[first], n[first]])
        pairs = cKDTree(pts).query_pairs(0.01)
        clashes = []
        sub = stations[first]
        for i, j in sorted(pairs):
            a, b = sub.iloc[i], sub.iloc[j]
            if not (np.isnan(a["sp_mv"]) and np.isnan(b["sp_mv"])) and a["sp_mv"] != b["sp_mv"]:
                clashes.append(f"{a['station_id']} ({label} {a['row']}) and {b['station_id']} ({label} {b['row']})")
        if clashes:
            problems.append(InputError(path, f"different stations at the same position with different values: "
                                       f"{format_rows(clashes)}.",
                                       "Check the coordinates; if it is a reoccupation use the same id and a time."))
    if problems:
        raise InputErrors(problems)


def _check_volts(stations, path, config):
    values = stations["sp_mv"].to_numpy()
    finite = values[np.isfinite(values)]
    if finite.size >= 5 and float(config.get("value_scale", 1.0) or 1.0) == 1.0:
        largest = np.abs(finite).max()
        if 0 < largest < _VOLTS_LIMIT:
            raise InputError(path, f"the SP values look like volts, not millivolts (largest |value| {largest:.3g}).",
                             "geosp expects mV. Add value_scale = 1000 to [stations] if the file is in volts.")
