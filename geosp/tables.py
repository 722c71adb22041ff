"""
Turn the step results (dataclasses and source rows) into the GeoDataFrames of
the published layers: ``stations``, ``fault_segments``, ``sources`` and
``sources_3d``.

Nothing here touches the file system; :func:`geosp.io.layers.write_layers`
writes the frames this module builds.

Sign convention (the contract's): ``jump_mv`` is the jump of the total
potential across a fault patch, the dip-direction side minus the other side.
With ``jump_mv > 0`` the surface SP is positive on the dip-direction side of
the trace. The dip direction is ``strike_deg + 90`` (right-hand rule), so the
unit vector across the trace toward the dip direction is
``(cos(strike), -sin(strike))`` in (east, north), the same local frame as
:class:`geosp.models.FaultSegment`.
"""

from __future__ import annotations

import math

import geopandas as gpd
import numpy as np
import pandas as pd
from shapely.geometry import LineString, Point, Polygon

__all__ = [
    "STATION_FIELDS",
    "SEGMENT_FIELDS",
    "SOURCE_FIELDS",
    "POLE_PAIR_FIELDS",
    "BURIED_LINE_FIELDS",
    "stations_frame",
    "segments_frame",
    "sources_frame",
    "sources_3d_frame",
    "footprint_half_width",
]

#: Fields of the ``stations`` layer, in order (contract), then allowed extras.
STATION_FIELDS = ("station_id", "line_id", "sp_mv", "sp_raw_mv", "drift_mv", "terrain_mv",
                  "tie_mv", "model_mv", "residual_mv", "flag")
STATION_EXTRAS = ("elev_m", "sigma_mv", "weight")

#: Fields of the ``fault_segments`` layer, in order (contract), then extras.
SEGMENT_FIELDS = ("fault_id", "segment_id", "length_m", "n_stations", "score", "detected",
                  "polarity", "note")
SEGMENT_EXTRAS = ("threshold", "noise_mv", "cultural", "false_alarm_p", "marginal")

#: Fields of the ``sources`` layer, in order (contract).
SOURCE_FIELDS = ("source_id", "fault_id", "segment_id", "model", "top_x", "top_y",
                 "strike_deg", "dip_deg", "dip_dir_deg", "top_depth_m", "bottom_depth_m",
                 "length_m", "jump_mv", "top_depth_lo_m", "top_depth_hi_m", "jump_lo_mv",
                 "jump_hi_mv", "rms_mv", "chi2_red", "n_stations", "bic_gain", "sigma_ratio",
                 "flags")
#: Extra fields of a ``pole_pair`` row: the negative pole (m) and the pole
#: strength (mV·m, potential = k / distance). The positive pole is at
#: ``top_x``, ``top_y``, ``top_depth_m``.
POLE_PAIR_FIELDS = ("neg_x", "neg_y", "neg_depth_m", "pole_k_mv_m")
#: Extra field of a ``buried_line`` row: the strength per unit length (mV,
#: potential = k ∫ ds / R along the line). Its centre is at ``top_x``,
#: ``top_y``, its depth ``top_depth_m``, its direction ``strike_deg`` and its
#: length ``length_m``.
BURIED_LINE_FIELDS = ("line_k_mv",)
#: Models of cultural sources: drawn as a line (two poles, or a buried line) with a band about it.
CULTURAL_MODELS = ("pole_pair", "buried_line")

_TEXT_SOURCE_FIELDS = ("source_id", "fault_id", "segment_id", "model", "flags")
_INT_SOURCE_FIELDS = ("n_stations",)

#: Half-width (m) of a footprint never goes below this.
MIN_HALF_WIDTH_M = 1.0
#: Without ``location_sd_m``, the half-width of a near-vertical footprint is
#: this fraction of the top depth (common practice: horizontal position of a
#: buried edge is known to a fraction of its depth).
DEPTH_FRACTION = 0.1
#: A pole pair's footprint half-width is at most this many times its positive pole's depth
#: (never less than POLE_MIN_REACH_M): the linearised location uncertainty of two poles that sit
#: together is degenerate (kilometres for a pole 13 m deep under dense stations).
POLE_REACH_DEPTHS = 3.0
POLE_MIN_REACH_M = 25.0


def _column(values, n, fill=np.nan, dtype=float):
    if values is None:
        return np.full(n, fill, dtype=dtype)
    values = np.asarray(values, dtype=dtype)
    if values.shape != (n,):
        raise ValueError(f"Got {values.size} values for {n} stations.")
    return values


def stations_frame(stations, model_mv=None, residual_mv=None):
    """
    Build the ``stations`` layer from a :class:`geosp.models.Stations`.

    Parameters
    ----------
    stations : Stations
        Stations in the working CRS (``sp_mv`` reduced, corrections filled).
    model_mv : array or None
        Modelled SP at each station in mV (sources plus regional); NaN when
        None.
    residual_mv : array or None
        Observed minus modelled SP in mV; when None and ``model_mv`` is given,
        ``sp_mv - model_mv``; NaN otherwise.

    Returns
    -------
    GeoDataFrame
        Point geometry in ``stations.crs`` with the columns of
        :data:`STATION_FIELDS` followed by ``elev_m``, ``sigma_mv`` and
        ``weight``. Text columns hold ``""`` for unknown values.
    """
    n = len(stations)
    model = _column(model_mv, n)
    if residual_mv is None:
        residual = np.asarray(stations.sp_mv, dtype=float) - model
    else:
        residual = _column(residual_mv, n)
    data = {
        "station_id": [str(v) for v in stations.station_id],
        "line_id": [str(v) for v in stations.line_id],
        "sp_mv": np.asarray(stations.sp_mv, dtype=float),
        "sp_raw_mv": np.asarray(stations.sp_raw_mv, dtype=float),
        "drift_mv": np.asarray(stations.drift_mv, dtype=float),
        "terrain_mv": np.asarray(stations.terrain_mv, dtype=float),
        "tie_mv": np.asarray(stations.tie_mv, dtype=float),
        "model_mv": model,
        "residual_mv": residual,
        "flag": [str(v) for v in stations.flag],
        "elev_m": np.asarray(stations.upward, dtype=float),
        "sigma_mv": np.asarray(stations.sigma_mv, dtype=float),
        "weight": np.asarray(stations.weight, dtype=float),
    }
    geometry = gpd.points_from_xy(stations.easting, stations.northing, crs=stations.crs)
    frame = gpd.GeoDataFrame(pd.DataFrame(data), geometry=geometry, crs=stations.crs)
    frame.attrs["geometry_type"] = "Point"
    return frame


def segments_frame(detections, crs):
    """
    Build the ``fault_segments`` layer from detection results.

    Parameters
    ----------
    detections : sequence of Detection
        One per fault segment.
    crs : str
        Working CRS of the segment coordinates.

    Returns
    -------
    GeoDataFrame
        LineString geometry with :data:`SEGMENT_FIELDS` (``detected`` as 0/1
        integer, ``polarity`` as +1/-1 integer, 0 when undetermined) followed
        by ``threshold`` (score threshold used), ``noise_mv``, ``cultural``
        (0/1: better explained by a shallow pole or pole pair),
        ``false_alarm_p`` (probability that noise alone scores this high
        anywhere in the survey) and ``marginal`` (0/1: not detected, but
        within a few times the false-alarm rate).
    """
    rows, geometry = [], []
    for det in detections:
        seg = det.segment
        rows.append({
            "fault_id": str(seg.fault_id),
            "segment_id": str(seg.segment_id),
            "length_m": float(seg.length_m),
            "n_stations": int(det.n_stations),
            "score": float(det.score),
            "detected": int(bool(det.detected)),
            "polarity": int(np.sign(det.polarity)) if np.isfinite(det.polarity) else 0,
            "note": str(det.note or ""),
            "threshold": float(det.threshold),
            "noise_mv": float(det.noise_mv),
            "cultural": int(bool(det.cultural)),
            "false_alarm_p": float(getattr(det, "false_alarm_p", np.nan)),
            "marginal": int(bool(getattr(det, "marginal", False))),
        })
        geometry.append(LineString(np.asarray(seg.coords, dtype=float)[:, :2]))
    columns = list(SEGMENT_FIELDS) + list(SEGMENT_EXTRAS)
    frame = pd.DataFrame(rows, columns=columns)
    frame = frame.astype({"n_stations": "int64", "detected": "int64", "polarity": "int64",
                          "cultural": "int64", "length_m": "float64", "score": "float64",
                          "threshold": "float64", "noise_mv": "float64", "false_alarm_p": "float64",
                          "marginal": "int64"})
    frame = gpd.GeoDataFrame(frame, geometry=gpd.GeoSeries(geometry, crs=crs), crs=crs)
    frame.attrs["geometry_type"] = "LineString"
    return frame


def _num(row, key, default=np.nan):
    value = row.get(key, default)
    try:
        value = float(value)
    except (TypeError, ValueError):
        return default
    return value


def footprint_half_width(row):
    """
    Half-width (m) given to a footprint that would otherwise be too thin.

    ``location_sd_m`` (the 1-sigma horizontal location uncertainty of the
    source) when the row has a positive one, else :data:`DEPTH_FRACTION`
    times the top depth (the mean pole depth for a pole pair); never less
    than :data:`MIN_HALF_WIDTH_M`. For a pole pair, at most
    :data:`POLE_REACH_DEPTHS` times the positive pole's depth (at least
    :data:`POLE_MIN_REACH_M`).
    """
    sd = _num(row, "location_sd_m")
    if str(row.get("model", "")) in CULTURAL_MODELS:
        top = _num(row, "top_depth_m")
        cap = max(POLE_REACH_DEPTHS * top, POLE_MIN_REACH_M) if np.isfinite(top) else np.inf
        if np.isfinite(sd) and sd > 0:
            return max(min(sd, cap), MIN_HALF_WIDTH_M)
        depth = np.nanmean([top, _num(row, "neg_depth_m")])
        return max(min(DEPTH_FRACTION * abs(depth), cap), MIN_HALF_WIDTH_M)
    if np.isfinite(sd) and sd > 0:
        return max(sd, MIN_HALF_WIDTH_M)
    depth = _num(row, "top_depth_m")
    if not np.isfinite(depth):
        depth = 0.0
    return max(DEPTH_FRACTION * abs(depth), MIN_HALF_WIDTH_M)


def _patch_corners(row):
    """
    Corners of a patch as ``(x, y, depth)``: top-left, top-right,
    bottom-right, bottom-left ("left" = the start of the strike direction),
    and the half-width used when the footprint had to be widened (else 0).
    """
    x0, y0 = _num(row, "top_x"), _num(row, "top_y")
    strike, dip = _num(row, "strike_deg"), _num(row, "dip_deg")
    top, bottom, length = _num(row, "top_depth_m"), _num(row, "bottom_depth_m"), _num(row, "length_m")
    values = (x0, y0, strike, dip, top, bottom, length)
    if not all(np.isfinite(values)) or not 0 < dip <= 90 or length < 0:
        raise ValueError(
            f"Source {row.get('source_id', '?')!s}: cannot build a footprint from "
            f"top_x={x0}, top_y={y0}, strike_deg={strike}, dip_deg={dip}, "
            f"top_depth_m={top}, bottom_depth_m={bottom}, length_m={length}. "
            "Give finite values with 0 < dip_deg <= 90 and length_m >= 0."
        )
    phi = math.radians(strike)
    along = np.array([math.sin(phi), math.cos(phi)])
    across = np.array([math.cos(phi), -math.sin(phi)])  # toward the dip direction
    offset = 0.0 if dip >= 90 else (bottom - top) / math.tan(math.radians(dip))
    centre = np.array([x0, y0])
    half_len = max(length, 2 * MIN_HALF_WIDTH_M) / 2
    return centre, along, across, half_len, offset, top, bottom


def _cultural_line(row):
    """
    The two ends ``(x, y)`` and their depths of a cultural source: the two
    poles of a pole pair, or the ends of a buried line.
    """
    if str(row.get("model", "")) == "buried_line":
        centre = np.array([_num(row, "top_x"), _num(row, "top_y")])
        strike, length, depth = _num(row, "strike_deg"), _num(row, "length_m"), _num(row, "top_depth_m")
        if not (np.all(np.isfinite(centre)) and np.isfinite(strike) and length >= 0):
            raise ValueError(
                f"Source {row.get('source_id', '?')!s}: a buried_line row needs finite top_x, top_y, "
                "strike_deg and a length_m >= 0 (m)."
            )
        phi = math.radians(strike)
        half = 0.5 * length * np.array([math.sin(phi), math.cos(phi)])
        return centre - half, centre + half, depth, depth
    pos = np.array([_num(row, "top_x"), _num(row, "top_y")])
    neg = np.array([_num(row, "neg_x"), _num(row, "neg_y")])
    if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(neg))):
        raise ValueError(
            f"Source {row.get('source_id', '?')!s}: a pole_pair row needs finite top_x, top_y, "
            "neg_x and neg_y (m)."
        )
    return pos, neg, _num(row, "top_depth_m", 0.0), _num(row, "neg_depth_m", 0.0)


def _footprint(row):
    """Surface footprint polygon of one source row (see :func:`sources_frame`)."""
    if str(row.get("model", "")) in CULTURAL_MODELS:
        pos, neg, _, _ = _cultural_line(row)
        half = footprint_half_width(row)
        if np.allclose(pos, neg):
            return Point(pos).buffer(half, quad_segs=8)
        return LineString([pos, neg]).buffer(half, quad_segs=8)
    centre, along, across, half_len, offset, _, _ = _patch_corners(row)
    half = footprint_half_width(row)
    if abs(offset) >= 2 * half:
        near, far = 0.0, offset
    else:
        # Near-vertical: centre a band of +/- half-width on the projected patch.
        mid = offset / 2
        near, far = mid - half, mid + half
    corners = [centre - half_len * along + near * across,
               centre + half_len * along + near * across,
               centre + half_len * along + far * across,
               centre - half_len * along + far * across]
    return Polygon(corners)


def _clean_value(value):
    if isinstance(value, (list, tuple, set, np.ndarray)):
        return "; ".join(str(v) for v in value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        return float(value)
    if isinstance(value, (np.bool_, bool)):
        return int(value)
    return value


def _source_table(rows):
    rows = [dict(r) for r in rows]
    extras = []
    for r in rows:
        for key in r:
            if key not in SOURCE_FIELDS and key != "geometry" and key not in extras:
                extras.append(key)
    model_fields = POLE_PAIR_FIELDS + BURIED_LINE_FIELDS
    ordered_extras = [k for k in model_fields if k in extras] + [k for k in extras if k not in model_fields]
    columns = list(SOURCE_FIELDS) + ordered_extras
    data = {}
    for key in columns:
        values = [_clean_value(r.get(key)) for r in rows]
        if key in _TEXT_SOURCE_FIELDS:
            data[key] = pd.Series(["" if v is None else str(v) for v in values], dtype=str)
        elif key in _INT_SOURCE_FIELDS:
            data[key] = pd.Series([0 if v is None or v != v else int(v) for v in values],
                                  dtype="int64")
        elif all(isinstance(v, str) for v in values if v is not None) and any(
                isinstance(v, str) for v in values):
            data[key] = pd.Series(["" if v is None else v for v in values], dtype=str)
        else:
            data[key] = pd.Series([np.nan if v is None else v for v in values], dtype="float64")
    return pd.DataFrame(data, columns=columns), rows


def data_coverage(easting, northing, reach_m):
    """
    The area the stations cover: their convex hull widened by ``reach_m``
    (m). Footprints are clipped to it (what lies beyond the stations is
    not seen by the data).
    """
    import shapely

    points = shapely.multipoints(np.column_stack([easting, northing]))
    return shapely.convex_hull(points).buffer(float(reach_m))


def sources_frame(rows, crs, *, coverage=None):
    """
    Build the ``sources`` layer: one surface-footprint polygon per source.

    Parameters
    ----------
    rows : sequence of dict
        Source rows keyed by the contract's field names
        (:data:`SOURCE_FIELDS`); missing numbers become NaN and missing text
        ``""``. ``flags`` may be a string or a sequence of strings (joined
        with ``"; "``). Extra keys (for example ``location_sd_m``,
        ``geo_mean_depth_m``) are kept as extra columns. ``pole_pair`` rows
        carry :data:`POLE_PAIR_FIELDS`.
    crs : str
        Working CRS of ``top_x``/``top_y``.
    coverage : shapely Polygon or None
        Clip every footprint to this area (see :func:`data_coverage`); a
        footprint wholly outside it keeps its shape (the row is still the
        model's).

    Returns
    -------
    GeoDataFrame
        Polygon geometry, :data:`SOURCE_FIELDS` first, then extras.

    Raises
    ------
    ValueError
        If a row lacks the geometry fields its model needs.

    Notes
    -----
    The footprint of a ``fault_patch`` row is the horizontal projection of
    the patch. The top edge, of length ``length_m``, is centred on
    (``top_x``, ``top_y``) along strike; the bottom edge lies
    ``(bottom_depth_m - top_depth_m) / tan(dip_deg)`` metres further toward
    the dip direction (``strike_deg + 90``). When that offset is smaller than
    twice the half-width of :func:`footprint_half_width` (a near-vertical
    patch), the footprint is a band of plus and minus that half-width about
    the projected patch instead, so it is never of zero width: by default
    ``location_sd_m`` either side, or 10 % of the top depth, at least 1 m.

    A ``pole_pair`` footprint is the segment joining the two poles buffered
    by the same half-width; a ``buried_line`` footprint is the line buffered
    by it.

    Sign convention: ``jump_mv`` is the jump of the total potential across
    the patch, dip-direction side minus the other side; with ``jump_mv > 0``
    the surface SP is positive on the dip-direction side of the trace.
    ``dip_dir_deg`` is ``strike_deg + 90`` (right-hand rule); the footprint
    is built from ``strike_deg`` so the two cannot disagree. Depths are
    below ground, positive down.
    """
    table, rows = _source_table(rows)
    shapes = [_footprint(r) for r in rows]
    if coverage is not None:
        clipped = [shape.intersection(coverage) for shape in shapes]
        shapes = [c if c.geom_type == "Polygon" and not c.is_empty else
                  (max(c.geoms, key=lambda g: g.area) if hasattr(c, "geoms") and c.area > 0 else shape)
                  for c, shape in zip(clipped, shapes)]
    geometry = gpd.GeoSeries(shapes, crs=crs)
    frame = gpd.GeoDataFrame(table, geometry=geometry, crs=crs)
    frame.attrs["geometry_type"] = "Polygon"
    return frame


def _ground_values(ground_m, n):
    if ground_m is None:
        return np.zeros(n)
    ground = np.asarray(ground_m, dtype=float)
    if ground.ndim == 0:
        ground = np.full(n, float(ground))
    if ground.shape != (n,):
        raise ValueError(f"ground_m has {ground.size} values for {n} sources; give one or one per source.")
    return np.where(np.isfinite(ground), ground, 0.0)


def _patch_3d(row, ground):
    if str(row.get("model", "")) in CULTURAL_MODELS:
        pos, neg, depth_pos, depth_neg = _cultural_line(row)
        z_pos, z_neg = ground - depth_pos, ground - depth_neg
        half = footprint_half_width(row)
        d = neg - pos
        norm = float(np.hypot(*d))
        perp = np.array([0.0, 1.0]) if norm == 0 else np.array([-d[1], d[0]]) / norm
        a, b = pos + half * perp, pos - half * perp
        c, e = neg - half * perp, neg + half * perp
        return Polygon([(*a, z_pos), (*b, z_pos), (*c, z_neg), (*e, z_neg)])
    centre, along, across, half_len, offset, top, bottom = _patch_corners(row)
    tl = centre - half_len * along
    tr = centre + half_len * along
    br = tr + offset * across
    bl = tl + offset * across
    z_top, z_bot = ground - top, ground - bottom
    return Polygon([(*tl, z_top), (*tr, z_top), (*br, z_bot), (*bl, z_bot)])


def sources_3d_frame(rows, crs, ground_m=None):
    """
    Build the ``sources_3d`` layer: each patch as a 3-D polygon.

    Parameters
    ----------
    rows : sequence of dict
        Source rows as for :func:`sources_frame`.
    crs : str
        Working CRS.
    ground_m : float, array of shape (n_rows,) or None
        Ground elevation (m) above each source's top edge; 0 when None or
        NaN, in which case z is minus the depth.

    Returns
    -------
    GeoDataFrame
        PolygonZ geometry (corners: top edge start, top edge end, bottom
        edge end, bottom edge start; z = ground_m - depth in m) with the
        same columns as :func:`sources_frame`. A ``pole_pair`` row becomes a
        thin ribbon from the positive pole (at ``top_depth_m``) to the
        negative pole (at ``neg_depth_m``).
    """
    table, rows = _source_table(rows)
    ground = _ground_values(ground_m, len(rows))
    geometry = gpd.GeoSeries([_patch_3d(r, g) for r, g in zip(rows, ground)], crs=crs)
    frame = gpd.GeoDataFrame(table, geometry=geometry, crs=crs)
    frame.attrs["geometry_type"] = "Polygon Z"
    return frame


#: Columns of targets.csv (docs/outputs.md), in order.
TARGET_COLUMNS = ("source_id", "status", "fault_id", "segment_id", "top_x", "top_y", "lon", "lat", "ground_m",
                  "top_depth_m", "top_depth_lo_m", "top_depth_hi_m", "top_elevation_m", "geo_mean_depth_m",
                  "geo_mean_depth_sd_m", "bottom_depth_m", "strike_deg", "dip_deg", "dip_dir_deg", "length_m",
                  "jump_mv", "flags")


def targets_frame(sources):
    """
    The fault-patch sources as a plain table for a drilling program (``targets.csv``).

    ``target`` rows first, then ``uncertain`` ones (listed with their status,
    not to be drilled on their own); cultural sources left out. Adds the
    top edge centre in longitude and latitude (WGS 84) and its elevation
    above sea level (``ground_m`` − ``top_depth_m``; NaN without a DEM).
    """
    import pyproj

    columns = list(TARGET_COLUMNS)
    if sources is None or len(sources) == 0 or "model" not in sources:
        return pd.DataFrame(columns=columns)
    frame = pd.DataFrame(sources.drop(columns="geometry", errors="ignore"))
    frame = frame[frame["model"] == "fault_patch"].copy()
    order = {"target": 0, "uncertain": 1}
    if "status" in frame:
        frame = frame[frame["status"].isin(order)].sort_values("status", key=lambda s: s.map(order), kind="stable")
    if len(frame) and sources.crs is not None:
        to_wgs84 = pyproj.Transformer.from_crs(sources.crs, "EPSG:4326", always_xy=True)
        frame["lon"], frame["lat"] = to_wgs84.transform(frame["top_x"].to_numpy(), frame["top_y"].to_numpy())
    ground = frame["ground_m"] if "ground_m" in frame else np.nan
    frame["top_elevation_m"] = ground - frame["top_depth_m"] if len(frame) else np.nan
    for name in columns:
        if name not in frame:
            frame[name] = np.nan
    frame = frame[columns].reset_index(drop=True)
    numeric = [c for c in columns if c not in ("source_id", "status", "fault_id", "segment_id", "flags")]
    frame[numeric] = frame[numeric].apply(pd.to_numeric, errors="coerce")
    return frame.round({**{c: 1 for c in numeric}, "lon": 7, "lat": 7, "geo_mean_depth_sd_m": 1})


def kml_frame(sources):
    """Source footprints in WGS 84 with a Name and a Description, for a globe viewer (``sources.kml``)."""
    import geopandas as gpd

    def describe(row):
        status = row.get("status") or ""
        if row.get("model") == "pole_pair":
            return f"{status}; pole pair, positive pole {_num(row, 'top_depth_m'):.0f} m deep"
        if row.get("model") == "buried_line":
            return (f"{status}; buried line (pipeline or cable?) {_num(row, 'length_m'):.0f} m long toward "
                    f"{_num(row, 'strike_deg'):.0f} deg, {_num(row, 'top_depth_m'):.0f} m deep")
        top_elev = _num(row, "ground_m") - _num(row, "top_depth_m")
        elevation = f", top at {top_elev:.0f} m above sea level" if np.isfinite(top_elev) else ""
        return (f"{status}; fault patch on {row.get('fault_id', '')}: top {_num(row, 'top_depth_m'):.0f} m deep"
                f"{elevation}; sqrt(top x bottom) {_num(row, 'geo_mean_depth_m'):.0f} m; dip "
                f"{_num(row, 'dip_deg'):.0f} deg toward {_num(row, 'dip_dir_deg'):.0f} deg; jump "
                f"{_num(row, 'jump_mv'):.0f} mV. A model, not an observation.")

    rows = sources.drop(columns="geometry").to_dict("records")
    return gpd.GeoDataFrame({"Name": [str(r.get("source_id", "")) for r in rows],
                             "Description": [describe(r) for r in rows]},
                            geometry=sources.geometry.values, crs=sources.crs).to_crs(4326)
