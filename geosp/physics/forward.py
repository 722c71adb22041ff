"""
Public forward models: argument handling, broadcasting, units (mV, degrees).

Formulas live once, in :mod:`geosp.physics._kernels` (numpy reference) and,
for the fault patch on the surface, :mod:`geosp.physics._fast` (compiled,
used when numba is installed). Conventions (docs/concepts-physics.md):
coordinates (easting, northing, up) in m, depths positive down, strike
clockwise from grid north, dip toward strike + 90°.
"""

import math

import numpy as np

from ..errors import InputError
from . import _fast, _kernels

_DEFAULT_CHUNK = 65_536


def _contrast_factors(sigma_ratio):
    """Potential scale on the +normal side and on the other side (§2.3)."""
    if sigma_ratio == 1.0:
        return 1.0, 1.0
    return 2.0 / (1.0 + sigma_ratio), 2.0 * sigma_ratio / (1.0 + sigma_ratio)


def patch_sp_local(along, across, *, centre_m, length_m, depth_top_m, depth_bottom_m,
                   dip_deg, jump_mv=1.0, sigma_ratio=1.0, depth_offset_m=0.0):
    """
    Surface SP (mV) of a uniform dipole layer on a rectangular fault patch, in
    the fault's local frame.

    Parameters
    ----------
    along, across : array
        Station coordinates in m: along strike from the local origin on the
        trace, and across it toward the dip direction (strike + 90°).
    centre_m, length_m : float
        Centre and length of the patch along strike (m).
    depth_top_m, depth_bottom_m : float or array
        Depths of the patch's top and bottom edges below the station datum
        (m, positive down); arrays broadcast against the stations.
    dip_deg : float
        Dip in degrees, in (0, 90] toward +across. Values in (90, 180) mean
        a plane dipping 180 − dip toward −across; the result equals that of
        strike + 180°, dip 180 − dip_deg and jump −jump_mv.
    jump_mv : float
        Potential jump across the patch, +across (+normal) side minus the
        other (mV). For dip ≤ 90° this is the dip-direction side, and a
        positive jump gives positive SP there.
    sigma_ratio : float
        Conductivity on the +normal side (the dip-direction side for dip ≤
        90°) over the other side. The potential on side i is scaled by
        2·σj/(σ1+σ2): exact for a vertical fault, an approximation for a
        dipping one (about 5 % of the peak for dip ≥ 80°, or dip ≥ 70° with
        a contrast ≤ 2; see docs/concepts-physics.md).
    depth_offset_m : float or array
        Added to both depths, per station: station elevation minus the
        ground elevation the depths refer to. With the patch held in
        absolute elevation this evaluates the flat-surface kernel with
        depths below each station's own (smoothed) ground, which keeps the
        terrain error near 1 % of the peak for broad relief of height 0.2·z_t
        and 4 % for 0.5·z_t (against 8 % and 18 % for a flat datum); relief
        above 0.2·z_t or slopes above about 15° deserve 5–10 % model error.
        Offsets below −½·``depth_top_m`` are raised to it (see
        :func:`effective_depth_offset`).

    Returns
    -------
    sp : array
        SP in mV, broadcast shape of the inputs.

    Notes
    -----
    V = jump·Ω/(2π) with Ω the closed-form solid angle of the patch, see
    :func:`geosp.physics._kernels.rectangle_solid_angle`. Uses the compiled
    kernel when numba is installed, the numpy kernel otherwise.

    References
    ----------
    * [Kellogg1929]_
    """
    along = np.asarray(along, dtype=float)
    across = np.asarray(across, dtype=float)
    offset = effective_depth_offset(depth_offset_m, depth_top_m)
    top = np.asarray(depth_top_m + offset, dtype=float)
    bottom = np.asarray(depth_bottom_m + offset, dtype=float)
    if not _fast.AVAILABLE:
        return _patch_sp_local_numpy(along, across, centre_m, length_m, top, bottom,
                                     dip_deg, jump_mv, sigma_ratio)
    if along.shape == across.shape:
        shape = along.shape
    else:
        shape = np.broadcast_shapes(along.shape, across.shape)
    if top.size > 1 or bottom.size > 1:
        shape = np.broadcast_shapes(shape, top.shape, bottom.shape)
    hw, fw = _contrast_factors(sigma_ratio)
    out = np.empty(shape)
    _fast.patch_sp_surface(
        _flat(along, shape), _flat(across, shape), _flat_depth(top, shape),
        _flat_depth(bottom, shape), float(centre_m), float(length_m),
        math.radians(dip_deg), float(jump_mv), hw, fw, out.reshape(-1),
    )
    return out


def effective_depth_offset(depth_offset_m, depth_top_m):
    """
    Per-station depth offsets (m) as the patch kernels use them.

    A station lower than the patch datum by more than half the top depth
    (a deep valley beside the patch) would put the top edge above it,
    outside the half-space model; its offset is raised to −½·z_t, so that
    the shifted top depth is never less than half the datum's.

    Parameters
    ----------
    depth_offset_m : float or array
        Station elevation minus the datum of the depths (m).
    depth_top_m : float or array
        Top depth below the datum (m, positive).

    Returns
    -------
    offset : numpy.ndarray
        ``max(depth_offset_m, −depth_top_m/2)``.
    """
    offset = np.asarray(depth_offset_m, dtype=float)
    if offset.ndim == 0 and offset == 0.0:
        return offset
    return np.maximum(offset, -0.5 * np.asarray(depth_top_m, dtype=float))


def _flat(values, shape):
    if values.shape != shape:
        values = np.broadcast_to(values, shape)
    return np.ascontiguousarray(values).reshape(-1)


def _flat_depth(values, shape):
    if values.size == 1:
        return values.reshape(1)
    return _flat(values, shape)


def _patch_sp_local_numpy(along, across, centre, length, top, bottom, dip_deg, jump,
                          sigma_ratio):
    """Numpy reference path of :func:`patch_sp_local` (same arguments, depths final)."""
    dip = np.radians(dip_deg)
    sp = _kernels.patch_potential(along, across, 0.0, centre, length, top, bottom, dip, jump)
    if sigma_ratio != 1.0:
        hw, fw = _contrast_factors(sigma_ratio)
        h = across * np.sin(dip)
        sp = sp * np.where(h > 0, hw, fw)
    return sp


def _station_arrays(coordinates, ground_m):
    """Easting, northing and per-station depth offset (m) from ``coordinates``."""
    easting, northing = (np.asarray(c, dtype=float) for c in coordinates[:2])
    depth_offset = 0.0
    if ground_m is not None and len(coordinates) > 2 and np.isfinite(ground_m):
        upward = np.asarray(coordinates[2], dtype=float)
        depth_offset = np.where(np.isfinite(upward), upward - ground_m, 0.0)
    return easting, northing, depth_offset


def fault_patch_sp(coordinates, *, top_x, top_y, strike_deg, dip_deg, top_depth_m,
                   bottom_depth_m, length_m, jump_mv, sigma_ratio=1.0, ground_m=None):
    """
    Surface SP (mV) of a fault patch given in world coordinates (the
    ``sources`` layer schema of the contract).

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing[, upward])`` of the stations in m; ``upward``
        (elevation) is used only together with ``ground_m``.
    top_x, top_y : float
        Horizontal position of the centre of the patch's top edge (m).
    strike_deg, dip_deg : float
        Strike clockwise from grid north; dip toward strike + 90° (degrees).
    top_depth_m, bottom_depth_m : float
        Depths below ground of the top and bottom edges (m).
    length_m, jump_mv, sigma_ratio : float
        See :func:`patch_sp_local`.
    ground_m : float or None
        Ground elevation above the top edge (m). With it and station
        elevations, depths are taken below each station's own elevation
        (the patch is held in absolute elevation; see
        :func:`patch_sp_local` for the error bounds).

    Returns
    -------
    sp : array
        SP in mV, broadcast shape of ``easting`` and ``northing``.
    """
    easting, northing, depth_offset = _station_arrays(coordinates, ground_m)
    phi = np.radians(strike_deg)
    dip = np.radians(dip_deg)
    # Trace point above the top-edge centre: back up-dip by top_depth/tan(dip).
    offset = top_depth_m * np.cos(dip) / np.sin(dip)
    origin_e = top_x - offset * np.cos(phi)
    origin_n = top_y + offset * np.sin(phi)
    de, dn = easting - origin_e, northing - origin_n
    along = de * np.sin(phi) + dn * np.cos(phi)
    across = de * np.cos(phi) - dn * np.sin(phi)
    return patch_sp_local(
        along, across, centre_m=0.0, length_m=length_m, depth_top_m=top_depth_m,
        depth_bottom_m=bottom_depth_m, dip_deg=dip_deg, jump_mv=jump_mv,
        sigma_ratio=sigma_ratio, depth_offset_m=depth_offset,
    )


def point_pole_sp(coordinates, *, x, y, depth_m, k_mv_m, ground_m=None):
    """
    Surface SP (mV) of a point current source (pole) in a half-space.

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing[, upward])`` of the stations in m.
    x, y : float
        Horizontal position of the pole (m).
    depth_m : float
        Depth of the pole below ground (m, positive).
    k_mv_m : float
        Strength k = ρI/(2π) in mV·m (ρ in Ω·m, I in mA gives mV·m).
    ground_m : float or None
        Ground elevation above the pole; with station elevations, depths are
        taken below each station's own elevation.

    Returns
    -------
    sp : array
        V = k/r in mV, shape of the station coordinates.

    Notes
    -----
    Kernel: :func:`geosp.physics._kernels.point_pole_potential`.

    References
    ----------
    * [Telford1990]_
    """
    easting, northing, depth_offset = _station_arrays(coordinates, ground_m)
    return _kernels.point_pole_potential(
        easting - x, northing - y, 0.0, depth_m + depth_offset, k_mv_m
    )


def pole_pair_sp(coordinates, *, pos_x, pos_y, pos_depth_m, neg_x, neg_y, neg_depth_m,
                 k_mv_m, ground_m=None):
    """
    Surface SP (mV) of a positive and a negative point pole of equal
    strength: V = k(1/r₊ − 1/r₋).

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing[, upward])`` of the stations in m.
    pos_x, pos_y, pos_depth_m : float
        Position and depth below ground (m) of the positive pole.
    neg_x, neg_y, neg_depth_m : float
        Position and depth below ground (m) of the negative pole.
    k_mv_m : float
        Strength k = ρI/(2π) in mV·m.
    ground_m : float or None
        As in :func:`point_pole_sp`.

    Returns
    -------
    sp : array
        SP in mV, shape of the station coordinates.

    References
    ----------
    * [Telford1990]_
    """
    easting, northing, depth_offset = _station_arrays(coordinates, ground_m)
    positive = _kernels.point_pole_potential(
        easting - pos_x, northing - pos_y, 0.0, pos_depth_m + depth_offset, k_mv_m
    )
    negative = _kernels.point_pole_potential(
        easting - neg_x, northing - neg_y, 0.0, neg_depth_m + depth_offset, k_mv_m
    )
    return positive - negative


def line_integral(along, across, *, length_m, depth_m):
    """
    ∫ ds / R along a horizontal segment of a line (dimensionless), seen from
    points at ``along``, ``across`` (m) of its centre, the segment at depth
    ``depth_m`` (scalar or per point): asinh(a/h) + asinh(b/h) with
    a, b = L/2 ∓ along and h = √(across² + depth²).
    """
    h = np.sqrt(np.asarray(across, float) ** 2 + np.asarray(depth_m, float) ** 2)
    half = 0.5 * length_m
    return np.arcsinh((half - along) / h) + np.arcsinh((half + along) / h)


def buried_line_sp(coordinates, *, x, y, azimuth_deg, length_m, depth_m, k_mv, ground_m=None):
    """
    Surface SP (mV) of a horizontal line of current sources of uniform
    strength (a buried pipeline or cable that leaks or takes current along
    its length) on a half-space: V = k ∫ ds / R over the line, the point-pole
    potential k/r integrated along it (physics notes §3, [Telford1990]_).

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing[, upward])`` of the stations in m.
    x, y : float
        Centre of the line (m).
    azimuth_deg : float
        Direction of the line, clockwise from grid north (degrees).
    length_m, depth_m : float
        Length of the line and its depth below ground (m).
    k_mv : float
        Strength per unit length, ρI′/(2π) in mV (I′ the current per metre).
    ground_m : float or None
        As in :func:`point_pole_sp`.

    Returns
    -------
    sp : array
        SP in mV, shape of the station coordinates.
    """
    easting, northing, depth_offset = _station_arrays(coordinates, ground_m)
    phi = math.radians(azimuth_deg)
    dx, dy = easting - x, northing - y
    along = dx * math.sin(phi) + dy * math.cos(phi)
    across = dx * math.cos(phi) - dy * math.sin(phi)
    return k_mv * line_integral(along, across, length_m=length_m, depth_m=depth_m + depth_offset)


def sphere_sp(coordinates, *, x, y, depth_m, k_mv_m2, azimuth_deg=0.0,
              elevation_deg=90.0, ground_m=None):
    """
    Surface SP (mV) of a polarized sphere (a buried dipole).

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing[, upward])`` of the stations in m.
    x, y, depth_m : float
        Horizontal position and depth below ground of the centre (m).
    k_mv_m2 : float
        K = 2a²f₀/3 in mV·m² for a sphere of radius a (m) with a surface
        double layer f₀·cos θ (mV); only K is identifiable.
    azimuth_deg : float
        Azimuth of the horizontal part of the polarization (from the − to
        the + pole), clockwise from grid north. Default 0.
    elevation_deg : float
        Elevation of the polarization above the horizontal (degrees);
        90 puts the + pole up, −90 the − pole up (common for
        sulphide-type bodies). Default 90.
    ground_m : float or None
        As in :func:`point_pole_sp`.

    Returns
    -------
    sp : array
        V = K·p·R/|R|³ in mV, with R from the centre to the station.

    Notes
    -----
    Kernel: :func:`geosp.physics._kernels.dipole_potential`. With vertical
    polarization the half-width at half maximum is 0.7664·depth; with
    horizontal polarization the extremes sit at ±depth/√2.

    References
    ----------
    * [Yungul1950]_
    """
    easting, northing, depth_offset = _station_arrays(coordinates, ground_m)
    azimuth, elevation = np.radians(azimuth_deg), np.radians(elevation_deg)
    return _kernels.dipole_potential(
        easting - x, northing - y, 0.0, depth_m + depth_offset, k_mv_m2,
        np.cos(elevation) * np.sin(azimuth), np.cos(elevation) * np.cos(azimuth),
        np.sin(elevation),
    )


def strip_2d_sp(across, *, depth_top_m, depth_bottom_m, dip_deg, jump_mv):
    """
    Surface SP (mV) of a 2-D fault strip: a sheet polarized normal to
    itself, infinite along strike.

    Parameters
    ----------
    across : array
        Distance from the surface trace toward the dip direction (m).
    depth_top_m, depth_bottom_m : float
        Depths of the top and bottom edges (m, positive down).
    dip_deg : float
        Dip toward +across (degrees, (0, 180); above 90 dips toward −across).
    jump_mv : float
        Potential jump, +normal (dip-direction) side minus the other (mV).

    Returns
    -------
    sp : array
        V = (f/π)·(signed angle subtended by the strip), in mV.

    Notes
    -----
    The 2-D limit of :func:`patch_sp_local`; for a vertical strip
    V = (f/π)[arctan(z_b/t) − arctan(z_t/t)], peak at t = √(z_t z_b).

    References
    ----------
    * [Kellogg1929]_
    """
    return _kernels.strip_potential_2d(
        np.asarray(across, dtype=float), depth_top_m, depth_bottom_m,
        np.radians(dip_deg), jump_mv,
    )


def inclined_sheet_2d_sp(across, *, depth_top_m, depth_bottom_m, dip_deg, k_mv):
    """
    Surface SP (mV) of a 2-D sheet polarized along its dip (the classical
    inclined sheet), a rival to :func:`strip_2d_sp` for profile quick-looks.

    Parameters
    ----------
    across : array
        Distance from the sheet's surface trace (projected up-dip) toward
        the dip direction (m).
    depth_top_m, depth_bottom_m : float
        Depths of the upper and lower edges (m, positive down).
    dip_deg : float
        Dip toward +across (degrees).
    k_mv : float
        Strength K (mV); K > 0 puts the positive pole at the upper edge.

    Returns
    -------
    sp : array
        V = K·ln(r_lower²/r_upper²) in mV.

    References
    ----------
    * [Paul1965]_
    """
    return _kernels.inclined_sheet_potential_2d(
        np.asarray(across, dtype=float), depth_top_m, depth_bottom_m,
        np.radians(dip_deg), k_mv,
    )


_PATCH_FIELDS = ("top_x", "top_y", "strike_deg", "dip_deg", "top_depth_m",
                 "bottom_depth_m", "length_m", "jump_mv")
_POLE_PAIR_FIELDS = ("top_x", "top_y", "top_depth_m", "neg_x", "neg_y", "neg_depth_m",
                     "pole_k_mv_m")
_BURIED_LINE_FIELDS = ("top_x", "top_y", "strike_deg", "length_m", "top_depth_m", "line_k_mv")


def _number(row, name):
    value = row.get(name)
    try:
        value = float(value)
    except (TypeError, ValueError):
        return math.nan
    return value


def _optional(row, name, default):
    value = _number(row, name)
    return default if not math.isfinite(value) else value


def _source_calls(sources):
    """Check the rows of a ``sources`` table; return (function, kwargs) per row."""
    if hasattr(sources, "to_dict") and hasattr(sources, "columns"):
        rows = sources.to_dict("records")
    else:
        rows = list(sources)
    calls, problems = [], []
    for index, row in enumerate(rows):
        label = f"row {index}"
        if "source_id" in row and row["source_id"] is not None:
            label += f" (source_id {row['source_id']})"
        model = row.get("model")
        if model is None or model == "" or (isinstance(model, float) and math.isnan(model)):
            model = "fault_patch"
        if model == "fault_patch":
            fields = _PATCH_FIELDS
        elif model == "pole_pair":
            fields = _POLE_PAIR_FIELDS
        elif model == "buried_line":
            fields = _BURIED_LINE_FIELDS
        else:
            problems.append(f"{label}: unknown model {model!r}; use 'fault_patch', 'pole_pair' or "
                            "'buried_line'")
            continue
        values = {name: _number(row, name) for name in fields}
        missing = [name for name, value in values.items() if not math.isfinite(value)]
        if missing:
            problems.append(f"{label}: {model} needs numbers in {', '.join(missing)}")
            continue
        ground = _optional(row, "ground_m", None)
        if model == "fault_patch":
            bad = []
            if not 0.0 < values["dip_deg"] <= 90.0:
                bad.append("dip_deg must be in (0, 90]")
            if not 0.0 < values["top_depth_m"] < values["bottom_depth_m"]:
                bad.append("need 0 < top_depth_m < bottom_depth_m")
            if not values["length_m"] > 0.0:
                bad.append("length_m must be positive")
            if bad:
                problems.append(f"{label}: " + "; ".join(bad))
                continue
            kwargs = dict(values, sigma_ratio=_optional(row, "sigma_ratio", 1.0),
                          ground_m=ground)
            calls.append((fault_patch_sp, kwargs))
        elif model == "buried_line":
            if not (values["top_depth_m"] > 0.0 and values["length_m"] >= 0.0):
                problems.append(f"{label}: a buried line needs top_depth_m > 0 and length_m >= 0")
                continue
            kwargs = dict(x=values["top_x"], y=values["top_y"], azimuth_deg=values["strike_deg"],
                          length_m=values["length_m"], depth_m=values["top_depth_m"],
                          k_mv=values["line_k_mv"], ground_m=ground)
            calls.append((buried_line_sp, kwargs))
        else:
            if not (values["top_depth_m"] > 0.0 and values["neg_depth_m"] > 0.0):
                problems.append(f"{label}: pole depths must be positive")
                continue
            kwargs = dict(pos_x=values["top_x"], pos_y=values["top_y"],
                          pos_depth_m=values["top_depth_m"], neg_x=values["neg_x"],
                          neg_y=values["neg_y"], neg_depth_m=values["neg_depth_m"],
                          k_mv_m=values["pole_k_mv_m"], ground_m=ground)
            calls.append((pole_pair_sp, kwargs))
    if problems:
        shown = problems[:5]
        text = "; ".join(shown)
        if len(problems) > 5:
            text += f"; and {len(problems) - 5} more"
        raise InputError("sources", text,
                         "Fix these rows of the sources table (fields as in the sources layer).")
    return calls


def sources_sp(coordinates, sources, *, chunk_size=_DEFAULT_CHUNK):
    """
    Surface SP (mV) of a set of sources, summed, at the stations.

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing[, upward])`` of the stations in m (same shape).
    sources : pandas.DataFrame or iterable of dict
        Rows of the ``sources`` layer schema. ``model`` is ``"fault_patch"``
        (fields top_x, top_y, strike_deg, dip_deg, top_depth_m,
        bottom_depth_m, length_m, jump_mv, optional sigma_ratio and
        ground_m; see :func:`fault_patch_sp`) or ``"pole_pair"`` (positive
        pole at top_x, top_y, top_depth_m; negative pole at neg_x, neg_y,
        neg_depth_m; strength pole_k_mv_m in mV·m; optional ground_m; see
        :func:`pole_pair_sp`) or ``"buried_line"`` (centre top_x, top_y,
        direction strike_deg, length_m, depth top_depth_m, strength
        line_k_mv in mV; see :func:`buried_line_sp`). A missing or empty ``model`` means
        ``fault_patch``; other fields of the layer are ignored.
    chunk_size : int
        Stations evaluated at a time; memory grows with it, not with the
        number of stations times sources. Default 65536.

    Returns
    -------
    sp : array
        Summed SP in mV, shape of the station coordinates.

    Raises
    ------
    InputError
        Listing every row with an unknown model or missing or impossible
        fields.
    """
    calls = _source_calls(sources)
    arrays = np.broadcast_arrays(*(np.asarray(c, dtype=float) for c in coordinates))
    shape = arrays[0].shape
    flat = [a.reshape(-1) for a in arrays]
    n = flat[0].size
    out = np.zeros(n)
    step = max(1, int(chunk_size))
    for start in range(0, n, step):
        part = tuple(a[start:start + step] for a in flat)
        block = out[start:start + step]
        for function, kwargs in calls:
            block += function(part, **kwargs)
    return out.reshape(shape)
