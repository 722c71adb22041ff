"""
Where a fault source may be: windows sliding along every mapped fault, each
with a family of unit-jump patch templates.

A window is a stretch of a fault trace of one of a few lengths, stepped by
half its length, so that a source anywhere along a fault, of any of those
lengths, lines up with some window within a quarter of its length, whatever
the fault's segmentation (a source that spans the cut between two segments
is one window, not two). The template patch of a window lies under the
chord of that stretch. Each window is owned by the segment that holds its
centre, which is where a source found there is reported.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..models import FaultSegment
from ..physics import forward

#: Window lengths (m) tried along every fault.
WINDOW_LENGTHS_M = (700.0, 1400.0, 2800.0)
#: Fewest stations within a corridor of the window for it to be a candidate.
MIN_STATIONS = 12


@dataclass(frozen=True)
class Window:
    """
    One candidate window: a straight stretch of a fault in its own frame.

    ``frame`` is a :class:`FaultSegment` whose trace is the chord of the
    stretch (its local frame: ``s`` from the chord start along strike, ``t``
    toward strike + 90°); ``owner`` is the index of the segment that holds
    the window's centre; ``s0``, ``s1`` locate the stretch along the fault
    chain (m).
    """

    frame: FaultSegment
    owner: int
    chain: int
    s0: float
    s1: float


def fault_chains(segments):
    """
    Join each fault's segments end to end into chains (polylines).

    Returns
    -------
    list of (fault_id, coords (k, 2), [(segment index, s_start, s_end), ...])
        The pieces give each segment's stretch along its chain (m).
    """
    chains = []
    tol = 1.0
    by_fault = {}
    for i, seg in enumerate(segments):
        by_fault.setdefault(seg.fault_id, []).append(i)
    for fault_id, members in by_fault.items():
        current, pieces = None, []
        for i in members:
            c = np.asarray(segments[i].coords, dtype=float)
            if current is not None and np.hypot(*(c[0] - current[-1])) <= tol:
                pass
            elif current is not None and np.hypot(*(c[-1] - current[-1])) <= tol:
                c = c[::-1]
            elif current is not None and len(pieces) == 1 and np.hypot(*(c[0] - current[0])) <= tol:
                current = current[::-1]
                pieces = [(pieces[0][0], 0.0, pieces[0][2])]
            elif current is not None and len(pieces) == 1 and np.hypot(*(c[-1] - current[0])) <= tol:
                current = current[::-1]
                pieces = [(pieces[0][0], 0.0, pieces[0][2])]
                c = c[::-1]
            else:
                if current is not None:
                    chains.append((fault_id, current, pieces))
                current, pieces = c[:1], []
            start = _length(current)
            current = np.vstack([current, c[1:]])
            pieces.append((i, start, _length(current)))
        if current is not None:
            chains.append((fault_id, current, pieces))
    return chains


def _length(coords):
    return float(np.sum(np.hypot(*np.diff(coords, axis=0).T))) if len(coords) > 1 else 0.0


def point_at(coords, s):
    """The point at arc length ``s`` (m) along a polyline (clipped to its ends)."""
    seg = np.hypot(*np.diff(coords, axis=0).T)
    cum = np.concatenate([[0.0], np.cumsum(seg)])
    s = float(np.clip(s, 0.0, cum[-1]))
    k = int(np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(seg) - 1))
    f = (s - cum[k]) / seg[k] if seg[k] > 0 else 0.0
    return coords[k] + f * (coords[k + 1] - coords[k])


def _window_frame(chain_coords, s0, s1, owner_segment, window_id):
    a, b = point_at(chain_coords, s0), point_at(chain_coords, s1)
    d = b - a
    length = float(np.hypot(*d))
    strike = math.degrees(math.atan2(d[0], d[1])) % 360.0
    # Keep the owner's sense of the dip direction when it is mapped.
    if owner_segment.dip_known:
        diff = (strike - owner_segment.strike_deg + 180.0) % 360.0 - 180.0
        if abs(diff) > 90.0:
            a, b, strike = b, a, (strike + 180.0) % 360.0
    return FaultSegment(owner_segment.fault_id, window_id, np.array([a, b]), strike, length,
                        owner_segment.dip_deg, owner_segment.dip_known)


def make_windows(segments, easting, northing, *, corridor_m, lengths=WINDOW_LENGTHS_M):
    """
    Candidate windows along every fault chain with at least
    :data:`MIN_STATIONS` stations within ``corridor_m`` of their chord.

    Returns
    -------
    windows : list of Window
    chains : list, as :func:`fault_chains`
    """
    from scipy.spatial import cKDTree

    tree = cKDTree(np.column_stack([easting, northing]))
    windows = []
    chains = fault_chains(segments)
    for c, (fault_id, coords, pieces) in enumerate(chains):
        total = _length(coords)
        for length in lengths:
            length = min(length, total)
            if length <= 0:
                continue
            n_steps = max(int(math.ceil((total - length) / (0.5 * length))), 0)
            starts = np.linspace(0.0, total - length, n_steps + 1) if n_steps else np.array([0.0])
            for s0 in starts:
                s1 = s0 + length
                mid = 0.5 * (s0 + s1)
                owner = next((i for i, a, b in pieces if a <= mid <= b), pieces[-1][0])
                frame = _window_frame(coords, s0, s1, segments[owner],
                                      f"{fault_id}@{s0:.0f}-{s1:.0f}")
                centre = point_at(coords, mid)
                radius = 0.5 * length + corridor_m
                near = tree.query_ball_point(centre, radius)
                if len(near) < MIN_STATIONS:
                    continue
                along, across = frame.to_local(easting[near], northing[near])
                inside = (np.abs(across) <= corridor_m) & (along > -corridor_m) \
                    & (along < frame.length_m + corridor_m)
                if np.count_nonzero(inside) < MIN_STATIONS:
                    continue
                if any(w.chain == c and abs(w.s0 - s0) < 1.0 and abs(w.s1 - s1) < 1.0 for w in windows):
                    continue
                windows.append(Window(frame, owner, c, float(s0), float(s1)))
    return windows, chains


def templates_for(window, depths, ratios, contrasts):
    """
    (depth_top_m, depth_bottom_m, dip_deg, sigma_ratio) of a window's
    templates. The dip is measured from the window's +t side: the mapped dip
    and vertical where the dip direction is mapped; otherwise vertical and
    60° toward either side (values above 90 lean toward −t). Contrasts are
    tried on vertical templates only (where the factor is exact).
    """
    frame = window.frame
    if frame.dip_known and np.isfinite(frame.dip_deg) and 0 < frame.dip_deg < 90:
        dips = [float(frame.dip_deg), 90.0]
    else:
        dips = [90.0, 60.0, 120.0]
    out = []
    for z in depths:
        for r in ratios:
            for dip in dips:
                out.append((float(z), float(z * r), dip, 1.0))
            for c in contrasts:
                if c != 1.0:
                    out.append((float(z), float(z * r), 90.0, float(c)))
    return out


def template_columns(window, templates, easting, northing, offset):
    """
    Unit-jump template fields (mV per mV of jump) at the stations, (n, m);
    ``offset`` is each station's elevation minus the window's datum (m).
    """
    frame = window.frame
    along, across = frame.to_local(easting, northing)
    out = np.empty((easting.size, len(templates)))
    for m, (top, bottom, dip, ratio) in enumerate(templates):
        out[:, m] = forward.patch_sp_local(
            along, across, centre_m=0.5 * frame.length_m, length_m=frame.length_m,
            depth_top_m=top, depth_bottom_m=bottom, dip_deg=dip, sigma_ratio=ratio,
            depth_offset_m=offset)
    return out
