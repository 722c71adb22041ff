"""
Fault network cleaning: snap, node, simplify and split mapped fault traces
into straight-enough segments, the unit of detection and fitting.

Steps (docs/concepts.md, detection):

1. snap each trace end to a nearby end or trace within ``snap_m``;
2. node the network: split every trace where another one crosses or ends on
   it (nodes of degree >= 3 are junctions);
3. simplify each piece between nodes [DouglasPeucker1973]_;
4. split at strike changes above ``bend_deg`` and at ``max_length_m``;
5. merge slivers shorter than ``min_length_m`` into a neighbour of the same
   fault.

Segment ids are ``f"{fault_id}-{k:02d}"`` with k = 1, 2, ... along each fault
in its digitised order, so they stay stable when other faults change.
"""

from __future__ import annotations

import math

import numpy as np
import shapely
from scipy.spatial import cKDTree

from .errors import OptionError
from .models import FaultSegment

# Fallback station spacing (m) when none is given: used only for the "auto"
# simplification tolerance and sliver length.
_DEFAULT_SPACING_M = 25.0
# Node positions closer than this (m) are the same node.
_NODE_TOL_M = 1e-6


def make_segments(faults, *, snap_m=10.0, simplify_m="auto", bend_deg=20.0,
                  max_length_m=2500.0, min_length_m="auto", station_spacing_m=None):
    """
    Clean a fault network and cut it into straight-enough segments.

    Parameters
    ----------
    faults : tuple of Fault
        Mapped fault traces in the working CRS (m).
    snap_m : float
        Trace ends closer than this (m) to another trace's end, or to another
        trace, are moved onto it. Default 10 m.
    simplify_m : float or "auto"
        Douglas-Peucker tolerance (m). "auto": one station spacing.
    bend_deg : float
        A segment is split where the trace turns more than this (degrees)
        from the segment's running chord direction. Default 20°.
    max_length_m : float
        Longest segment (m); longer pieces are cut into equal parts.
        Default 2500 m (about 5 × the deepest template top).
    min_length_m : float or "auto"
        Pieces shorter than this (m) are merged into a neighbour on the same
        fault. "auto": three station spacings.
    station_spacing_m : float or None
        Station spacing (m) for the "auto" values; None (or not a positive
        number) uses 25 m.

    Returns
    -------
    segments : tuple of FaultSegment
        In fault order, then along each fault in its digitised order. The
        strike is the chord direction. Where the fault has a mapped dip
        direction the strike is oriented so that strike + 90° lies within
        90° of it (right-hand rule) and ``dip_known`` is True; otherwise the
        digitised direction is kept and the dip is NaN.

    Raises
    ------
    OptionError
        If an option is out of range.

    References
    ----------
    * [DouglasPeucker1973]_
    """
    spacing = _DEFAULT_SPACING_M if station_spacing_m is None else float(station_spacing_m)
    if not (np.isfinite(spacing) and spacing > 0):
        spacing = _DEFAULT_SPACING_M
    simplify = _auto_value(simplify_m, spacing, "simplify_m")
    min_length = _auto_value(min_length_m, 3.0 * spacing, "min_length_m")
    _check_positive(bend_deg=bend_deg, max_length_m=max_length_m)
    for name, value in (("snap_m", snap_m), ("simplify_m", simplify), ("min_length_m", min_length)):
        if not (np.isfinite(value) and value >= 0):
            raise OptionError("project file", f"{name} = {value!r} must be 0 or more (or \"auto\").",
                              "Give a distance in metres.", where=f"[detect] {name}")
    lines = [_clean_coords(f.coords) for f in faults]
    keep = [i for i, c in enumerate(lines) if c is not None]
    lines = _snap_ends([lines[i] for i in keep], snap_m)
    kept_faults = [faults[i] for i in keep]
    pieces_per_fault = _node(lines)
    segments = []
    all_pieces = []
    for fault, pieces in zip(kept_faults, pieces_per_fault):
        out = []
        for piece in pieces:
            piece = _simplify(piece, simplify)
            for part in _split_bends(piece, bend_deg):
                out.extend(_split_length(part, max_length_m))
        out = _merge_slivers(out, min_length)
        all_pieces.append(out)
    degree = _node_degree([p for pieces in all_pieces for p in pieces])
    for fault, pieces in zip(kept_faults, all_pieces):
        for k, piece in enumerate(pieces, start=1):
            segments.append(_make_segment(fault, f"{fault.fault_id}-{k:02d}", piece, degree))
    return tuple(segments)


def assign_stations(stations, segments, *, corridor_m):
    """
    Give each station to its nearest segment, within that segment's corridor.

    Parameters
    ----------
    stations : Stations
        Station positions in the working CRS (m).
    segments : sequence of FaultSegment
    corridor_m : float
        Half-width (m) of each segment's corridor, |t| <= corridor_m, which
        also extends corridor_m past both ends of the chord.

    Returns
    -------
    index : list of numpy.ndarray
        For each segment, the sorted indices of the stations it owns. A
        station inside several corridors belongs to the segment whose chord
        is nearest; a station outside every corridor belongs to none.
    """
    return assign_points(stations.easting, stations.northing, segments, corridor_m=corridor_m)


def assign_points(easting, northing, segments, *, corridor_m):
    """:func:`assign_stations` for plain coordinate arrays (m); same rule, same result."""
    easting = np.asarray(easting, dtype=float)
    northing = np.asarray(northing, dtype=float)
    best = np.full(easting.size, np.inf)
    owner = np.full(easting.size, -1)
    for j, seg in enumerate(segments):
        inside, dist = corridor_distance(seg, easting, northing, corridor_m)
        better = inside & (dist < best)
        best[better] = dist[better]
        owner[better] = j
    order = np.argsort(owner, kind="stable")
    bounds = np.searchsorted(owner[order], np.arange(len(segments) + 1))
    return [np.sort(order[bounds[j]:bounds[j + 1]]) for j in range(len(segments))]


def corridor_distance(segment, easting, northing, corridor_m):
    """
    Corridor membership and distance to the chord of a segment.

    Parameters
    ----------
    segment : FaultSegment
    easting, northing : array
        Station positions (m).
    corridor_m : float
        Corridor half-width and end extension (m).

    Returns
    -------
    inside : numpy.ndarray of bool
        ``-corridor_m <= s <= length + corridor_m`` and ``|t| <= corridor_m``.
    distance : numpy.ndarray
        Distance (m) from each station to the chord.
    """
    s, t = segment.to_local(easting, northing)
    length = segment.length_m
    inside = (np.abs(t) <= corridor_m) & (s >= -corridor_m) & (s <= length + corridor_m)
    beyond = np.maximum(np.maximum(-s, s - length), 0.0)
    return inside, np.hypot(beyond, t)


# --------------------------------------------------------------------------- helpers


def _auto_value(value, auto, name):
    if isinstance(value, str) and value == "auto":
        return auto
    try:
        return float(value)
    except (TypeError, ValueError):
        raise OptionError("project file", f"{name} = {value!r} is not a number.",
                          'Give a distance in metres or "auto".', where=f"[detect] {name}") from None


def _check_positive(**values):
    for name, value in values.items():
        if not (np.isfinite(value) and value > 0):
            raise OptionError("project file", f"{name} = {value!r} must be a positive number.",
                              "Give a positive value in the unit its name says.",
                              where=f"[detect] {name}")


def _clean_coords(coords):
    """Drop NaN and repeated vertices; None when fewer than two remain."""
    xy = np.asarray(coords, dtype=float).reshape(-1, 2)
    xy = xy[np.all(np.isfinite(xy), axis=1)]
    if len(xy) < 2:
        return None
    step = np.hypot(*np.diff(xy, axis=0).T)
    xy = xy[np.concatenate([[True], step > _NODE_TOL_M])]
    return xy if len(xy) >= 2 else None


def _snap_ends(lines, snap_m):
    """
    Move each trace end onto a nearby end of another trace (preferred) or
    onto the nearest point of another trace, within ``snap_m``.
    """
    lines = [c.copy() for c in lines]
    if len(lines) < 2 or snap_m <= 0:
        return lines
    ends = np.array([[c[0], c[-1]] for c in lines])  # (n, 2, 2)
    owner = np.repeat(np.arange(len(lines)), 2)
    flat = ends.reshape(-1, 2)
    tree = cKDTree(flat)
    # 1. End to end: cluster ends within snap_m to their mean position.
    moved = flat.copy()
    for i, j in sorted(tree.query_pairs(snap_m)):
        if owner[i] != owner[j]:
            moved[j] = moved[i]
    for k, (i, end) in enumerate(zip(owner, (0, -1) * len(lines))):
        lines[i][end] = moved[k]
    # 2. Remaining dangling ends onto other traces (undershoots and overshoots).
    geoms = _linestrings(lines)
    strtree = shapely.STRtree(geoms)
    for k in range(len(flat)):
        i, end = owner[k], (0 if k % 2 == 0 else -1)
        point = shapely.points(lines[i][end])
        near = strtree.query(point, predicate="dwithin", distance=snap_m)
        near = [j for j in near if j != i]
        if not near:
            continue
        dist = shapely.distance(geoms[near], point)
        if np.min(dist) == 0:
            continue
        j = near[int(np.argmin(dist))]
        target = shapely.line_interpolate_point(geoms[j], shapely.line_locate_point(geoms[j], point))
        lines[i][end] = shapely.get_coordinates(target)[0]
    cleaned = [_clean_coords(c) for c in lines]
    return [c if c is not None else old for c, old in zip(cleaned, lines)]


def _linestrings(lines):
    out = np.empty(len(lines), dtype=object)
    out[:] = [shapely.LineString(c) for c in lines]
    return out


def _node(lines):
    """
    Split each trace at the points where other traces cross or touch it.

    Returns, for each trace, its pieces in digitised order. The network is
    noded with shapely (unary union of the traces); the cut points found
    there are located along each trace so that fault identity and digitised
    order survive.
    """
    geoms = _linestrings(lines)
    noded = shapely.unary_union(geoms)
    # Nodes of the noded network: the ends of its pieces.
    parts = shapely.get_parts(noded)
    if len(parts):
        piece_ends = np.vstack([shapely.get_coordinates(p)[[0, -1]] for p in parts])
    else:
        piece_ends = np.empty((0, 2))
    candidates = np.unique(np.round(piece_ends, 6), axis=0)
    out = []
    for coords, geom in zip(lines, geoms):
        length = shapely.length(geom)
        if len(candidates):
            pts = shapely.points(candidates)
            on = shapely.distance(geom, pts) < 1e-6 * max(1.0, length)
            cuts = shapely.line_locate_point(geom, pts[on])
            cuts = np.unique(cuts[(cuts > 1e-6) & (cuts < length - 1e-6)])
        else:
            cuts = np.empty(0)
        out.append(_cut_at(coords, cuts))
    return out


def _cumulative(coords):
    return np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(coords, axis=0).T))])


def _cut_at(coords, cuts):
    """Cut a polyline at distances ``cuts`` (m along it, sorted)."""
    if len(cuts) == 0:
        return [coords]
    dist = _cumulative(coords)
    edges = np.concatenate([[0.0], cuts, [dist[-1]]])
    pieces = []
    for a, b in zip(edges[:-1], edges[1:]):
        inner = (dist > a + 1e-9) & (dist < b - 1e-9)
        start = _point_at(coords, dist, a)
        end = _point_at(coords, dist, b)
        piece = np.vstack([start, coords[inner], end])
        pieces.append(piece)
    return pieces


def _point_at(coords, dist, d):
    e = np.interp(d, dist, coords[:, 0])
    n = np.interp(d, dist, coords[:, 1])
    return np.array([e, n])


def _simplify(coords, tolerance):
    """Douglas-Peucker simplification keeping both ends [DouglasPeucker1973]_."""
    if tolerance <= 0 or len(coords) <= 2:
        return coords
    simple = shapely.simplify(shapely.LineString(coords), tolerance, preserve_topology=False)
    xy = shapely.get_coordinates(simple)
    return xy if len(xy) >= 2 else coords[[0, -1]]


def _bearing(vector):
    return math.degrees(math.atan2(vector[0], vector[1])) % 360.0


def _turn(a, b):
    """Smallest angle (degrees) between bearings a and b."""
    d = abs(a - b) % 360.0
    return min(d, 360.0 - d)


def _split_bends(coords, bend_deg):
    """
    Split where an edge turns more than ``bend_deg`` from the chord of the
    part built so far (catches both sharp bends and gradual curves).
    """
    parts = []
    start = 0
    for i in range(1, len(coords) - 1):
        chord = coords[i] - coords[start]
        edge = coords[i + 1] - coords[i]
        if _turn(_bearing(chord), _bearing(edge)) > bend_deg:
            parts.append(coords[start:i + 1])
            start = i
    parts.append(coords[start:])
    return parts


def _split_length(coords, max_length):
    """Cut a polyline into equal parts no longer than ``max_length`` (m)."""
    dist = _cumulative(coords)
    n = int(math.ceil(dist[-1] / max_length - 1e-9))
    if n <= 1:
        return [coords]
    return _cut_at(coords, dist[-1] * np.arange(1, n) / n)


def _merge_slivers(pieces, min_length):
    """
    Merge pieces shorter than ``min_length`` into an adjacent piece of the
    same fault (the one whose strike is closer), repeating until none is
    left or the fault has a single piece.
    """
    pieces = list(pieces)
    while len(pieces) > 1:
        lengths = [_cumulative(p)[-1] for p in pieces]
        k = int(np.argmin(lengths))
        if lengths[k] >= min_length:
            break
        options = []
        for j in (k - 1, k + 1):
            if 0 <= j < len(pieces) and np.allclose(
                    pieces[min(j, k)][-1], pieces[max(j, k)][0], atol=1e-6):
                turn = _turn(_bearing(pieces[j][-1] - pieces[j][0]),
                             _bearing(pieces[k][-1] - pieces[k][0]))
                options.append((turn, j))
        if not options:
            break
        _, j = min(options)
        a, b = min(j, k), max(j, k)
        pieces[a:b + 1] = [np.vstack([pieces[a], pieces[b][1:]])]
    return pieces


def _node_degree(pieces):
    """Number of piece ends at each node (rounded position -> count)."""
    degree = {}
    for p in pieces:
        for xy in (p[0], p[-1]):
            key = _key(xy)
            degree[key] = degree.get(key, 0) + 1
    return degree


def _key(xy):
    return (round(float(xy[0]), 3), round(float(xy[1]), 3))


def _make_segment(fault, segment_id, coords, degree):
    coords = np.asarray(coords, dtype=float)
    chord = coords[-1] - coords[0]
    strike = _bearing(chord)
    dip_dir = float(fault.dip_dir_deg)
    dip_known = bool(np.isfinite(dip_dir))
    if dip_known and _turn((strike + 90.0) % 360.0, dip_dir % 360.0) > 90.0:
        coords = coords[::-1].copy()
        strike = (strike + 180.0) % 360.0
    dip = float(fault.dip_deg) if dip_known else np.nan
    junction = tuple(i for i, xy in enumerate((coords[0], coords[-1]))
                     if degree.get(_key(xy), 0) >= 3)
    return FaultSegment(
        fault_id=str(fault.fault_id), segment_id=segment_id, coords=coords,
        strike_deg=float(strike), length_m=float(np.hypot(*chord)), dip_deg=dip,
        dip_known=dip_known, junction_ends=junction,
    )
