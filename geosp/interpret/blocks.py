"""
Large surveys as overlapping spatial blocks.

The survey model needs the dense covariance of its stations, which is fine
for a few thousand and impossible for 10⁵. A large survey is therefore cut
into square cores, each modelled together with a margin of the surrounding
stations: a source near a core's edge is fitted with its neighbours from
the next block, and every source and every segment is reported by the one
block whose core holds it. Blocks are independent work items, so they run
serially, over local processes or on a Dask cluster with the same results.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Most stations one block (core and margin) may hold.
MAX_BLOCK_STATIONS = 6000
#: Width of the margin around every core (m): the reach of a source's field.
MARGIN_M = 1000.0


@dataclass(frozen=True)
class Block:
    """One block: the stations of its core and margin, and its core's box."""

    number: int
    index: np.ndarray  # station indices (into the survey's stations), core and margin
    box: tuple  # (west, east, south, north) of the core (m)

    def in_core(self, x, y):
        w, e, s, n = self.box
        x, y = np.asarray(x), np.asarray(y)
        return (x >= w) & (x < e) & (y >= s) & (y < n)


def plan_blocks(easting, northing, *, margin=None, max_stations=None):
    """
    Cut the survey into square cores with margins of at most ``max_stations``
    (default :data:`MAX_BLOCK_STATIONS`) stations; ``margin`` in m (default
    :data:`MARGIN_M`).

    Returns
    -------
    list of Block
        One block holding every station when the survey is small enough.
    """
    max_stations = MAX_BLOCK_STATIONS if max_stations is None else max_stations
    margin = MARGIN_M if margin is None else margin
    x, y = np.asarray(easting, float), np.asarray(northing, float)
    ok = np.isfinite(x) & np.isfinite(y)
    west, east = float(x[ok].min()), float(x[ok].max())
    south, north = float(y[ok].min()), float(y[ok].max())
    everything = Block(0, np.flatnonzero(ok), (west, east + 1e-6, south, north + 1e-6))
    if ok.sum() <= max_stations:
        return [everything]
    area = max((east - west) * (north - south), 1.0)
    density = ok.sum() / area
    side = max(math.sqrt(max_stations / density) - 2.0 * margin, 0.25 * margin)
    while True:
        blocks = _cut(x, y, ok, west, east, south, north, side, margin)
        if max(b.index.size for b in blocks) <= max_stations or side <= 0.25 * margin:
            return blocks
        side *= 0.8


def _cut(x, y, ok, west, east, south, north, side, margin):
    nx = max(int(math.ceil((east - west) / side)), 1)
    ny = max(int(math.ceil((north - south) / side)), 1)
    sx = (east - west) / nx + 1e-6
    sy = (north - south) / ny + 1e-6
    blocks = []
    for i in range(nx):
        for j in range(ny):
            box = (west + i * sx, west + (i + 1) * sx, south + j * sy, south + (j + 1) * sy)
            core = ok & (x >= box[0]) & (x < box[1]) & (y >= box[2]) & (y < box[3])
            if not core.any():
                continue
            near = ok & (x >= box[0] - margin) & (x < box[1] + margin) \
                & (y >= box[2] - margin) & (y < box[3] + margin)
            blocks.append(Block(len(blocks), np.flatnonzero(near), box))
    return blocks


def segments_near(segments, block, margin=None):
    """Indices of the segments that come within the block (core and margin, default :data:`MARGIN_M`)."""
    margin = MARGIN_M if margin is None else margin
    w, e, s, n = block.box
    out = []
    for k, seg in enumerate(segments):
        c = np.asarray(seg.coords, float)
        if c[:, 0].max() >= w - margin and c[:, 0].min() <= e + margin \
                and c[:, 1].max() >= s - margin and c[:, 1].min() <= n + margin:
            out.append(k)
    return out


def segment_midpoint(segment):
    c = np.asarray(segment.coords, float)
    lengths = np.hypot(*np.diff(c, axis=0).T)
    half = 0.5 * lengths.sum()
    k = int(np.searchsorted(np.cumsum(lengths), half))
    k = min(k, len(lengths) - 1)
    before = lengths[:k].sum()
    f = (half - before) / lengths[k] if lengths[k] > 0 else 0.0
    return c[k] + f * (c[k + 1] - c[k])
