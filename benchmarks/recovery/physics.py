"""
Forward models of the recovery benchmark: the SP of planted fault patches,
point poles, the regional trend and the terrain term, at survey stations.

This module is an independent discretisation of the physics, kept apart
from the package it grades: a fault patch is cut into small triangles whose
solid angles are summed (Van Oosterom & Strackee, 1983), with the mirror
image of the insulating ground surface. It uses numpy only.

Conventions
-----------
* Coordinates (easting, northing, up) in metres; depths positive down.
* A fault trace is a polyline ``[[x, y], ...]`` in the working CRS. Along
  it, ``s`` is the distance from the first vertex. ``dip_side`` = +1 means
  the fault dips to the right of the direction of increasing ``s`` (dip
  direction = azimuth of travel + 90°), −1 to the left.
* Strike φ clockwise from grid north, along-strike ŝ = (sin φ, cos φ, 0),
  dip direction d̂ = (cos φ, −sin φ, 0), down-dip ê = cos δ·d̂ − sin δ·û,
  normal n̂ = sin δ·d̂ + cos δ·û (into the dip-direction side).
* A uniform double layer of jump f (potential on the +n̂ side minus the
  other) gives V = f·Ω/(4π) in a full space, Ω the signed solid angle,
  positive on the +n̂ side. On the insulating flat ground its mirror image
  doubles it: V = f·Ω/(2π). f > 0 gives positive SP on the dip-direction
  side.

The patch dictionary
--------------------
:func:`patch_sp` reads these keys of a patch dict (as stored in
``truth.json``); they are the parameters a caller may change:

``fault_trace``
    The whole fault trace ``[[x, y], ...]`` (fixed geometry).
``dip_side``
    +1 or −1, see above (fixed).
``s0_m``, ``s1_m``
    The along-trace interval of the top edge, from the trace start (m).
    Moving both moves the patch along the trace; moving them apart changes
    its length. Beyond the trace ends the end pieces are extended straight.
``length_m``
    Optional; when present it must equal ``s1_m − s0_m`` within 1 mm
    (it is a record, not a parameter: change ``s0_m``/``s1_m`` instead).
``top_depth_m``, ``bottom_depth_m``
    Depths of the top and bottom edges below ``ground_m`` (m).
``dip_deg``
    Dip toward the ``dip_side`` (degrees, in (0, 180); above 90 the plane
    leans the other way).
``jump_mv``
    Jump across the patch, dip-direction side minus the other side (mV).
``sigma_ratio``
    Conductivity of the dip-direction side over the other (default 1);
    only for planar patches.
``ground_m``
    Ground elevation above the centre of the top edge (m); the patch is
    held at absolute elevation ``ground_m − depth``. None: flat ground at
    every station.

Every other key (``top_x``, ``strike_deg``, ...) is a derived record, see
:func:`patch_record`.

Each straight piece of the trace within [s0, s1] gives one planar quad with
the patch's dip; consecutive quads meet on the intersection line of their
planes (a mitre joint), so a patch across a bend is a continuous
non-planar ribbon without gaps or overlaps. The end edges run straight
down the dip of their piece, except within ``END_BLEND_M`` (20 m) of a
trace vertex, where they turn smoothly (within the piece's plane) toward
that vertex's mitre line: an end crossing a vertex then changes the patch
continuously. The number of triangles per piece is fixed (``n_along`` ×
``n_down`` quads, each two triangles), and a piece that appears when an end
crosses a vertex starts with zero area, so the SP is continuous in every
parameter and smooth away from those crossings.
"""

from __future__ import annotations

import math

import numpy as np

DEFAULT_N_ALONG = 8
DEFAULT_N_DOWN = 8
END_BLEND_M = 20.0
CHUNK_STATIONS = 1024
LENGTH_TOLERANCE_M = 1e-3
FOUR_PI = 4.0 * math.pi


# --------------------------------------------------------------------------- trace geometry


def trace_arc_lengths(trace):
    """
    Cumulative distance along a polyline at each vertex (m).

    Parameters
    ----------
    trace : array_like, shape (m, 2)
        Vertices (x, y) in m.

    Returns
    -------
    numpy.ndarray, shape (m,)
        0 at the first vertex.
    """
    xy = np.asarray(trace, dtype=float)
    steps = np.hypot(*np.diff(xy, axis=0).T)
    return np.concatenate([[0.0], np.cumsum(steps)])


def point_on_trace(trace, s):
    """
    Point at distance ``s`` along a polyline; beyond its ends the end
    pieces are extended straight.

    Parameters
    ----------
    trace : array_like, shape (m, 2)
    s : float or array_like
        Distance from the first vertex (m), may be negative or exceed the
        trace length.

    Returns
    -------
    numpy.ndarray, shape (2,) or (..., 2)
    """
    xy = np.asarray(trace, dtype=float)
    cum = trace_arc_lengths(xy)
    s = np.asarray(s, dtype=float)
    j = np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(xy) - 2)
    fraction = (s - cum[j]) / (cum[j + 1] - cum[j])
    return xy[j] + fraction[..., None] * (xy[j + 1] - xy[j])


def interval_polyline(trace, s0, s1):
    """
    The part of a trace between ``s0`` and ``s1`` (s0 < s1).

    Parameters
    ----------
    trace : array_like, shape (m, 2)
    s0, s1 : float
        Along-trace distances (m).

    Returns
    -------
    numpy.ndarray, shape (k, 2)
        The point at s0, the trace vertices strictly inside (s0, s1), the
        point at s1.
    """
    xy = np.asarray(trace, dtype=float)
    cum = trace_arc_lengths(xy)
    inner = [xy[j] for j in range(1, len(xy) - 1) if s0 < cum[j] < s1]
    return np.array([point_on_trace(xy, s0), *inner, point_on_trace(xy, s1)])


def dip_directions(polyline, dip_side):
    """
    Horizontal unit dip direction of each piece of a polyline.

    Parameters
    ----------
    polyline : numpy.ndarray, shape (k, 2)
    dip_side : {+1, -1}
        +1: to the right of the direction of travel.

    Returns
    -------
    numpy.ndarray, shape (k - 1, 2)
    """
    step = np.diff(polyline, axis=0)
    unit = step / np.hypot(*step.T)[:, None]
    return dip_side * np.column_stack([unit[:, 1], -unit[:, 0]])


def mitre(a, b):
    """
    Horizontal offset per unit offset distance at a joint of two pieces
    with unit offset directions ``a`` and ``b``: the point where the two
    offset pieces meet, (a + b)/(1 + a·b).
    """
    return (a + b) / (1.0 + a @ b)


def _smoothstep(x):
    x = min(max(x, 0.0), 1.0)
    return x * x * (3.0 - 2.0 * x)


def end_offset(trace, dip_side, s):
    """
    Horizontal offset per unit offset distance of a patch end at ``s``.

    Parameters
    ----------
    trace : array_like, shape (m, 2)
    dip_side : {+1, -1}
    s : float
        Along-trace position of the end (m).

    Returns
    -------
    numpy.ndarray, shape (2,)
        The dip direction of the trace piece holding ``s``; within
        ``END_BLEND_M`` of an inner trace vertex it turns smoothly toward
        that vertex's mitre (reached at the vertex), so that the end edge
        stays in the piece's plane and the patch changes continuously when
        an end crosses a vertex.
    """
    xy = np.asarray(trace, dtype=float)
    cum = trace_arc_lengths(xy)
    directions = dip_directions(xy, dip_side)
    j = int(np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(xy) - 2))
    own = directions[j]
    near = [k for k in (j, j + 1) if 1 <= k <= len(xy) - 2]
    if not near:
        return own
    k = min(near, key=lambda v: abs(s - cum[v]))
    weight = 1.0 - _smoothstep(abs(s - cum[k]) / END_BLEND_M)
    if weight == 0.0:
        return own
    return (1.0 - weight) * own + weight * mitre(directions[k - 1], directions[k])


def _check_length(patch):
    length = patch.get("length_m")
    if length is not None and abs(length - (patch["s1_m"] - patch["s0_m"])) > LENGTH_TOLERANCE_M:
        raise ValueError("patch length_m must equal s1_m - s0_m; change s0_m and s1_m to change "
                         f"the length (got {length} and {patch['s1_m'] - patch['s0_m']}).")


def patch_edges(patch):
    """
    Top and bottom edges of a patch in 3-D.

    Parameters
    ----------
    patch : dict
        See the module notes.

    Returns
    -------
    top, bottom : numpy.ndarray, shape (k, 3)
        Edge points (x, y, u) with u = −depth below ``ground_m`` (the
        datum frame); point j of both edges lies on the plane of pieces j−1
        and j.
    normals : numpy.ndarray, shape (k - 1, 3)
        Unit normal n̂ of each piece (toward the dip-direction side).
    """
    _check_length(patch)
    s0, s1 = float(patch["s0_m"]), float(patch["s1_m"])
    if not s1 > s0:
        raise ValueError(f"patch needs s1_m > s0_m (got {s0}, {s1}).")
    top, bottom = float(patch["top_depth_m"]), float(patch["bottom_depth_m"])
    if not 0.0 < top < bottom:
        raise ValueError(f"patch needs 0 < top_depth_m < bottom_depth_m (got {top}, {bottom}).")
    dip = math.radians(float(patch["dip_deg"]))
    if not 0.0 < dip < math.pi:
        raise ValueError(f"patch dip_deg must be in (0, 180) (got {patch['dip_deg']}).")
    side = int(patch["dip_side"])
    line = interval_polyline(patch["fault_trace"], s0, s1)
    directions = dip_directions(line, side)
    per_depth = np.empty_like(line)
    per_depth[0] = end_offset(patch["fault_trace"], side, s0)
    per_depth[-1] = end_offset(patch["fault_trace"], side, s1)
    for j in range(1, len(line) - 1):
        per_depth[j] = mitre(directions[j - 1], directions[j])
    per_depth *= math.cos(dip) / math.sin(dip)
    top_xy = line + top * per_depth
    bottom_xy = line + bottom * per_depth
    top_3d = np.column_stack([top_xy, np.full(len(line), -top)])
    bottom_3d = np.column_stack([bottom_xy, np.full(len(line), -bottom)])
    normals = np.column_stack([math.sin(dip) * directions, np.full(len(directions), math.cos(dip))])
    return top_3d, bottom_3d, normals


def patch_triangles(patch, n_along=DEFAULT_N_ALONG, n_down=DEFAULT_N_DOWN):
    """
    Oriented triangles covering a patch, in the datum frame.

    Parameters
    ----------
    patch : dict
        See the module notes.
    n_along, n_down : int
        Quads per piece along the trace and down the dip; each quad is cut
        into two triangles.

    Returns
    -------
    numpy.ndarray, shape (n_pieces * n_along * n_down * 2, 3, 3)
        Vertices (x, y, u) ordered so that (v2 − v1) × (v3 − v1) points
        along the piece normal n̂.
    """
    top, bottom, _ = patch_edges(patch)
    alpha = np.linspace(0.0, 1.0, n_along + 1)[:, None, None]
    beta = np.linspace(0.0, 1.0, n_down + 1)[None, :, None]
    side = int(patch["dip_side"])
    out = []
    for j in range(len(top) - 1):
        upper = (1 - alpha) * top[j] + alpha * top[j + 1]
        lower = (1 - alpha) * bottom[j] + alpha * bottom[j + 1]
        grid = (1 - beta) * upper + beta * lower  # (n_along + 1, n_down + 1, 3)
        a, b = grid[:-1, :-1], grid[:-1, 1:]     # top-left, bottom-left
        c, d = grid[1:, :-1], grid[1:, 1:]       # top-right, bottom-right
        # (a, b, c): down × along; this points along n̂ when the dip side is
        # to the right of travel (dip_side = +1), so swap for −1.
        first = np.stack([a, b, c] if side > 0 else [a, c, b], axis=-2)
        second = np.stack([c, b, d] if side > 0 else [c, d, b], axis=-2)
        out.append(first.reshape(-1, 3, 3))
        out.append(second.reshape(-1, 3, 3))
    return np.concatenate(out)


# --------------------------------------------------------------------------- solid angles


def triangle_solid_angles(r1, r2, r3, normal):
    """
    Signed solid angles of triangles (Van Oosterom & Strackee, 1983).

    Parameters
    ----------
    r1, r2, r3 : numpy.ndarray, shape (..., 3)
        Station minus each vertex, r − v_i.
    normal : numpy.ndarray, shape (..., 3)
        (v2 − v1) × (v3 − v1), broadcast against ``r1``.

    Returns
    -------
    numpy.ndarray, shape (...)
        Ω = 2·atan2(N, D), positive on the side ``normal`` points to, with
        N = (r − v1)·((v2 − v1) × (v3 − v1)) and
        D = |R1||R2||R3| + (R1·R2)|R3| + (R1·R3)|R2| + (R2·R3)|R1|.
    """
    n1 = np.sqrt(np.einsum("...k,...k->...", r1, r1))
    n2 = np.sqrt(np.einsum("...k,...k->...", r2, r2))
    n3 = np.sqrt(np.einsum("...k,...k->...", r3, r3))
    numerator = np.einsum("...k,...k->...", r1, normal)
    denominator = (n1 * n2 * n3 + np.einsum("...k,...k->...", r1, r2) * n3
                   + np.einsum("...k,...k->...", r1, r3) * n2
                   + np.einsum("...k,...k->...", r2, r3) * n1)
    return 2.0 * np.arctan2(numerator, denominator)


def surface_solid_angle(points, triangles):
    """
    Solid angle of triangles plus their mirror image about each station's
    own ground plane, at stations on that plane.

    Parameters
    ----------
    points : numpy.ndarray, shape (n, 3)
        Stations (x, y, u); the ground plane of station i is u = points[i, 2].
    triangles : numpy.ndarray, shape (t, 3, 3)
        Oriented triangles below the ground planes.

    Returns
    -------
    numpy.ndarray, shape (n,)
        Σ Ω(triangles) + Σ Ω(images); the image of a triangle is mirrored
        in u and has its vertex order reversed so that its normal is the
        mirror of the original one.
    """
    v1, v2, v3 = triangles[:, 0], triangles[:, 1], triangles[:, 2]
    normal = np.cross(v2 - v1, v3 - v1)
    mirror = np.array([1.0, 1.0, -1.0])
    image_normal = np.cross((v3 - v1) * mirror, (v2 - v1) * mirror)
    out = np.empty(len(points))
    for start in range(0, len(points), CHUNK_STATIONS):
        p = points[start:start + CHUNK_STATIONS, None, :]
        r1, r2, r3 = p - v1, p - v2, p - v3
        direct = triangle_solid_angles(r1, r2, r3, normal)
        # Image vertex about the plane u = u_i: M v = (x, y, 2u_i − u), so
        # r − M v = M (r − v) for a station on that plane.
        image = triangle_solid_angles(r1 * mirror, r3 * mirror, r2 * mirror, image_normal)
        out[start:start + CHUNK_STATIONS] = direct.sum(axis=1) + image.sum(axis=1)
    return out


# --------------------------------------------------------------------------- sources


def station_shifts(elev, patch):
    """
    Per-station vertical shift of the patch (m), station elevation minus
    ``ground_m``, never below −top_depth/2.

    Parameters
    ----------
    elev : array or None
        Station elevations (m).
    patch : dict

    Returns
    -------
    numpy.ndarray or float
        0 when ``elev`` or ``ground_m`` is None.
    """
    ground = patch.get("ground_m")
    if elev is None or ground is None:
        return 0.0
    shift = np.asarray(elev, dtype=float) - float(ground)
    return np.maximum(shift, -0.5 * float(patch["top_depth_m"]))


def _contrast_factors(points, patch, top, normals):
    ratio = float(patch.get("sigma_ratio", 1.0))
    if ratio == 1.0:
        return 1.0
    if len(normals) != 1:
        raise ValueError("a conductivity contrast is only modelled on a planar patch.")
    side = (points - top[0]) @ normals[0]
    return np.where(side > 0.0, 2.0 / (1.0 + ratio), 2.0 * ratio / (1.0 + ratio))


def patch_sp(east, north, elev, patch, *, n_along=None, n_down=None):
    """
    Surface SP (mV) of one planted fault patch at the stations.

    Parameters
    ----------
    east, north : array_like
        Station coordinates (m), same shape.
    elev : array_like or None
        Station elevations (m). With the patch's ``ground_m``, the patch is
        held at absolute elevation and station i sees it on a flat ground at
        its own elevation: the patch shifted down by elev_i − ground_m
        (horizontal position unchanged, shift never below −top_depth/2).
        None: flat ground at ``ground_m`` for every station.
    patch : dict
        See the module notes for the keys read.
    n_along, n_down : int, optional
        Quads per straight piece along the trace and down the dip (default
        8 and 8). A planar polygon's solid angle is the exact sum of its
        triangles', so the result does not depend on them beyond round-off.

    Returns
    -------
    numpy.ndarray
        SP in mV, shape of ``east``.
    """
    east = np.asarray(east, dtype=float)
    north = np.asarray(north, dtype=float)
    shape = east.shape
    triangles = patch_triangles(patch, n_along or DEFAULT_N_ALONG, n_down or DEFAULT_N_DOWN)
    top, _, normals = patch_edges(patch)
    origin = top[0, :2].copy()
    triangles = triangles - np.array([*origin, 0.0])
    top = top - np.array([*origin, 0.0])
    shift = np.broadcast_to(station_shifts(elev, patch), shape).reshape(-1)
    points = np.column_stack([east.reshape(-1) - origin[0], north.reshape(-1) - origin[1], shift])
    omega = surface_solid_angle(points, triangles)
    factor = _contrast_factors(points, patch, top, normals)
    return (float(patch["jump_mv"]) * factor * omega / FOUR_PI).reshape(shape)


def pole_sp(east, north, elev, poles):
    """
    Surface SP (mV) of point poles on a half-space.

    Parameters
    ----------
    east, north : array_like
        Station coordinates (m).
    elev : array_like or None
        Not used: a pole's depth is taken below each station's own ground
        (the poles are shallow and follow the ground).
    poles : array_like, shape (p, 4)
        ``[x, y, depth_m, k_mv_m]`` per pole, k = ρI/(2π) in mV·m.

    Returns
    -------
    numpy.ndarray
        V = Σ k / r, r the distance from the station to the pole at its
        depth below the station's ground, shape of ``east``.
    """
    east = np.asarray(east, dtype=float)
    north = np.asarray(north, dtype=float)
    table = np.asarray(poles, dtype=float).reshape(-1, 4)
    flat_e, flat_n = east.reshape(-1), north.reshape(-1)
    out = np.zeros(flat_e.size)
    for start in range(0, flat_e.size, CHUNK_STATIONS):
        de = flat_e[start:start + CHUNK_STATIONS, None] - table[None, :, 0]
        dn = flat_n[start:start + CHUNK_STATIONS, None] - table[None, :, 1]
        r = np.sqrt(de * de + dn * dn + table[None, :, 2] ** 2)
        out[start:start + CHUNK_STATIONS] = (table[None, :, 3] / r).sum(axis=1)
    return out.reshape(east.shape)


def regional_sp(east, north, regional):
    """
    Regional trend (mV): a plane plus a quadratic.

    Parameters
    ----------
    east, north : array_like
    regional : dict
        ``centre`` [x, y] (m) and coefficients ``c_x``, ``c_y`` (mV/km),
        ``c_xx``, ``c_xy``, ``c_yy`` (mV/km²) of
        V = c_x·x + c_y·y + c_xx·x² + c_xy·x·y + c_yy·y², with x, y in km
        from the centre.

    Returns
    -------
    numpy.ndarray
    """
    x = (np.asarray(east, dtype=float) - regional["centre"][0]) / 1000.0
    y = (np.asarray(north, dtype=float) - regional["centre"][1]) / 1000.0
    return (regional["c_x"] * x + regional["c_y"] * y + regional["c_xx"] * x * x
            + regional["c_xy"] * x * y + regional["c_yy"] * y * y)


def terrain_sp(elev, terrain):
    """
    Terrain term (mV): ``k_mv_per_m`` × elevation.

    Parameters
    ----------
    elev : array_like
        Station elevations (m).
    terrain : dict
        With ``k_mv_per_m``.

    Returns
    -------
    numpy.ndarray
    """
    return float(terrain["k_mv_per_m"]) * np.asarray(elev, dtype=float)


def survey_components(design, stations):
    """
    Noise-free SP components (mV) of a design at stations.

    Parameters
    ----------
    design : dict
        From ``generator.draw_design``: ``patches``, ``cultural``,
        ``regional`` and ``terrain``.
    stations : mapping
        Arrays (or columns) ``E``, ``N`` and ``ELEV`` (m).

    Returns
    -------
    dict of numpy.ndarray
        One entry per patch (by ``patch_id``), then ``cultural`` (every
        pipeline and casing), ``regional``, ``terrain`` and ``signal`` (their
        sum). Station noise and outliers are drawn by the generator.
    """
    east = np.asarray(stations["E"], dtype=float)
    north = np.asarray(stations["N"], dtype=float)
    elev = np.asarray(stations["ELEV"], dtype=float)
    out = {}
    for patch in design["patches"]:
        out[patch["patch_id"]] = patch_sp(east, north, elev, patch)
    cultural = np.zeros(east.shape)
    for item in design.get("cultural", ()):
        cultural = cultural + pole_sp(east, north, elev, item["poles"])
    out["cultural"] = cultural
    out["regional"] = regional_sp(east, north, design["regional"])
    out["terrain"] = terrain_sp(elev, design["terrain"])
    out["signal"] = sum(out.values())
    return out


# --------------------------------------------------------------------------- derived records


def _azimuth(vector):
    return math.degrees(math.atan2(vector[0], vector[1])) % 360.0


def patch_record(patch):
    """
    Derived description of a patch (the truth fields besides its parameters).

    Parameters
    ----------
    patch : dict
        See the module notes; ``ground_m`` must be a number.

    Returns
    -------
    dict
        ``top_x``, ``top_y`` (trace point at the middle of [s0, s1] moved
        top_depth/tan(dip) toward the dip direction of the chord),
        ``strike_deg`` (chord of [s0, s1], turned by 180° when the fault
        dips to its left, so that the dip direction is strike + 90°),
        ``dip_dir_deg``, ``length_m``, ``bent`` (more than one piece) and
        ``vertices_xyz`` (top edge, then the bottom edge reversed, z =
        elevation).
    """
    s0, s1 = float(patch["s0_m"]), float(patch["s1_m"])
    trace = patch["fault_trace"]
    chord = point_on_trace(trace, s1) - point_on_trace(trace, s0)
    strike = _azimuth(chord)
    if int(patch["dip_side"]) < 0:
        strike = (strike + 180.0) % 360.0
    dip_dir = (strike + 90.0) % 360.0
    phi = math.radians(strike)
    dip = math.radians(float(patch["dip_deg"]))
    offset = float(patch["top_depth_m"]) * math.cos(dip) / math.sin(dip)
    middle = point_on_trace(trace, 0.5 * (s0 + s1))
    top, bottom, _ = patch_edges(patch)
    outline = np.vstack([top, bottom[::-1]])
    outline[:, 2] += float(patch["ground_m"])
    return {
        "top_x": float(middle[0] + offset * math.cos(phi)),
        "top_y": float(middle[1] - offset * math.sin(phi)),
        "strike_deg": strike,
        "dip_dir_deg": dip_dir,
        "length_m": s1 - s0,
        "bent": len(top) > 2,
        "vertices_xyz": outline.tolist(),
    }
