"""
Synthetic SP surveys of varied design for the recovery benchmark.

:func:`draw_design` draws an invented survey from a seed: station lines and
tie lines, a DEM, fault traces, buried fault patches, cultural sources, a
regional trend, a terrain term and the noise levels. :func:`write_survey`
writes it as the files a field crew would hand over (stations, fault
traces, DEM and, in raw mode, leapfrog gradient readings with electrode
checks), a project file with inputs only, and the planted truth.

Every SP value comes from :mod:`physics`, an independent discretisation;
nothing here uses the package under test. Random numbers: the design is
drawn from ``default_rng(seed)``; station noise from ``default_rng([seed,
1])`` and the raw readings from ``default_rng([seed, 2])``, so one seed
gives the same sources and station values in both modes.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from pathlib import Path

import numpy as np

from . import physics

# --------------------------------------------------------------------------- ranges

SURVEY_SIZE_M = (2000.0, 8000.0)        # longest side of the line grid
ASPECT = (0.5, 1.0)                      # shorter side over longer side
LINE_SPACING_M = (75.0, 300.0)
STATION_SPACING_M = (20.0, 60.0)
N_STATIONS = (800, 6000)                 # hard limits
N_STATIONS_TYPICAL = (1000, 4000)        # accepted always; outside only at ATYPICAL_ACCEPT
ATYPICAL_ACCEPT = 0.25
N_TIES = (2, 4)
TIE_TURN_DEG = 30.0                      # ties cross the lines at 90 ± this
LINE_BEND_DEG = (10.0, 40.0)
N_FAULTS = (4, 10)
BIG_BENDS = (3, 4)                       # bends above 25° per survey, all faults together
BIG_BEND_DEG = (26.0, 45.0)
SMALL_BEND_DEG = (5.0, 20.0)
MAPPED_FRACTION = 0.25                   # faults with a mapped dip and dip direction
FAULT_DIP_DEG = (55.0, 90.0)
N_PATCHES = (1, 6)
TOP_DEPTH_M = (50.0, 600.0)
HEIGHT_M = (200.0, 2000.0)
PATCH_LENGTH_M = (400.0, 2500.0)
JUMP_MV = (40.0, 400.0)
MAX_JUMP_MV = 1500.0
CONTRAST_MIN_DIP_DEG = 75.0
SIGMA_RATIO = (1.5, 8.0)                 # magnitude; either way across the fault
PIPELINE_PROBABILITY = 0.4
PIPELINE_MV = (15.0, 50.0)               # median |V| of the stations within 30 m of the pipe
CASING_PROBABILITY = 0.5
CASING_ON_FAULT = 0.5
TERRAIN_K_MV_PER_M = (-2.5, -0.3)
RELIEF_M = (50.0, 800.0)
MAX_SLOPE_DEG = 20.0                     # 99th percentile of the slope over the survey
DEM_MARGIN_M = 1200.0
WHITE_SD_MV = (2.0, 8.0)
CORRELATED_SD_MV = (1.0, 4.0)
CORRELATION_LENGTH_M = (100.0, 500.0)
OUTLIER_FRACTION = (0.002, 0.01)
OUTLIER_MV = (20.0, 100.0)
READING_SD_MV = (0.3, 1.0)
CHECK_SD_MV = (0.1, 0.3)
OFFSET_START_MV = (0.5, 4.0)
DRIFT_MV_PER_DAY = (0.5, 4.0)
READING_GAP_S = (40.0, 90.0)
DAY_HOURS = (8.0, 9.0)
BLUNDERS = (1, 3)
BLUNDER_MV = (15.0, 60.0)
FLOOR_MV = 25.0
FLOOR_NOISE_FACTOR = 6.0

FLOOR_RULE = (
    f"A planted patch is above the floor when its noise-free peak-to-peak SP at the stations "
    f"(that patch alone) is at least max({FLOOR_MV:g} mV, {FLOOR_NOISE_FACTOR:g} × the white "
    f"station-noise standard deviation)."
)

RANGES_TEXT = "\n".join([
    f"- survey {SURVEY_SIZE_M[0] / 1000:g}–{SURVEY_SIZE_M[1] / 1000:g} km across, line spacing "
    f"{LINE_SPACING_M[0]:g}–{LINE_SPACING_M[1]:g} m, station spacing {STATION_SPACING_M[0]:g}–"
    f"{STATION_SPACING_M[1]:g} m, {N_STATIONS[0]}–{N_STATIONS[1]} stations (mostly "
    f"{N_STATIONS_TYPICAL[0]}–{N_STATIONS_TYPICAL[1]}); {N_TIES[0]}–{N_TIES[1]} tie lines across "
    f"the lines; blocks of lines bent by {LINE_BEND_DEG[0]:g}–{LINE_BEND_DEG[1]:g}° part way",
    f"- {N_FAULTS[0]}–{N_FAULTS[1]} mapped faults, {BIG_BENDS[0]}–{BIG_BENDS[1]} bends above 25° per "
    f"survey, some crossing or ending on another fault, some running past the survey edge; dip "
    f"{FAULT_DIP_DEG[0]:g}–{FAULT_DIP_DEG[1]:g}°, mapped (to 5°) on about "
    f"{MAPPED_FRACTION:.0%} of the faults, unknown on the rest",
    f"- {N_PATCHES[0]}–{N_PATCHES[1]} fault patches per survey, at most two per fault, some faults "
    f"source-free: top {TOP_DEPTH_M[0]:g}–{TOP_DEPTH_M[1]:g} m, height {HEIGHT_M[0]:g}–"
    f"{HEIGHT_M[1]:g} m, length {PATCH_LENGTH_M[0]:g}–{PATCH_LENGTH_M[1]:g} m along the trace "
    f"(some across a bend), jump of either sign {JUMP_MV[0]:g}–{JUMP_MV[1]:g} mV (log-uniform; "
    f"most raised above the floor), a conductivity contrast 1/{SIGMA_RATIO[1]:g}–"
    f"{SIGMA_RATIO[1]:g} on some planar patches dipping {CONTRAST_MIN_DIP_DEG:g}° or more",
    "- cultural sources: a buried pipeline (point poles 1–3 m deep, 20–50 m apart, tens of mV) "
    "in some surveys; steel well casings (a negative pole or pole pair, top 20–100 m, 20–200 mV "
    "at the wellhead), some on a fault trace",
    f"- a regional trend of 0–10 mV/km plus a quadratic of up to 20 mV over the survey; terrain "
    f"relief {RELIEF_M[0]:g}–{RELIEF_M[1]:g} m with an SP-elevation coefficient "
    f"{TERRAIN_K_MV_PER_M[0]:g} to {TERRAIN_K_MV_PER_M[1]:g} mV/m",
    f"- station noise: white {WHITE_SD_MV[0]:g}–{WHITE_SD_MV[1]:g} mV plus an exponentially "
    f"correlated part of {CORRELATED_SD_MV[0]:g}–{CORRELATED_SD_MV[1]:g} mV over "
    f"{CORRELATION_LENGTH_M[0]:g}–{CORRELATION_LENGTH_M[1]:g} m; "
    f"{OUTLIER_FRACTION[0]:.1%}–{OUTLIER_FRACTION[1]:.0%} gross outliers of "
    f"±{OUTLIER_MV[0]:g}–{OUTLIER_MV[1]:g} mV",
    f"- raw mode: leapfrog readings {READING_GAP_S[0]:g}–{READING_GAP_S[1]:g} s apart with "
    f"{READING_SD_MV[0]:g}–{READING_SD_MV[1]:g} mV reading noise, an electrode offset of "
    f"{OFFSET_START_MV[0]:g}–{OFFSET_START_MV[1]:g} mV drifting {DRIFT_MV_PER_DAY[0]:g}–"
    f"{DRIFT_MV_PER_DAY[1]:g} mV per day (checked at the start, middle and end of each day), "
    f"{BLUNDERS[0]}–{BLUNDERS[1]} blunders of {BLUNDER_MV[0]:g}–{BLUNDER_MV[1]:g} mV",
])

NOISE_STREAM = 1
READINGS_STREAM = 2


# --------------------------------------------------------------------------- small helpers


def _uniform(rng, bounds):
    return float(rng.uniform(*bounds))


def _log_uniform(rng, bounds):
    return float(math.exp(rng.uniform(math.log(bounds[0]), math.log(bounds[1]))))


def _unit(azimuth_deg):
    a = math.radians(azimuth_deg)
    return np.array([math.sin(a), math.cos(a)])


def _floor(white_sd):
    return max(FLOOR_MV, FLOOR_NOISE_FACTOR * white_sd)


def _round_xy(points):
    return np.round(np.asarray(points, dtype=float), 2)


# --------------------------------------------------------------------------- survey layout


def _draw_dimensions(rng):
    """Grid size and spacings whose station count is in range; returns a dict."""
    for _ in range(10_000):
        size = _uniform(rng, SURVEY_SIZE_M)
        short = size * _uniform(rng, ASPECT)
        width, length = (size, short) if rng.random() < 0.5 else (short, size)
        line_spacing = _log_uniform(rng, LINE_SPACING_M)
        station_spacing = _uniform(rng, STATION_SPACING_M)
        n_lines = int(width // line_spacing) + 1
        estimate = n_lines * (int(length // station_spacing) + 1) + 3 * width / station_spacing
        if _count_accepted(rng, estimate) and n_lines >= 4:
            return {"width_m": width, "length_m": length, "line_spacing_m": line_spacing,
                    "station_spacing_m": station_spacing, "n_lines": n_lines}
    raise RuntimeError("no survey dimensions found")  # pragma: no cover


def _count_accepted(rng, n):
    if not N_STATIONS[0] <= n <= N_STATIONS[1]:
        return False
    typical = N_STATIONS_TYPICAL[0] <= n <= N_STATIONS_TYPICAL[1]
    return typical or rng.random() < ATYPICAL_ACCEPT


def _line_local(rng, dims, j, bend):
    """Vertices (u along, v across) of main line j, with an optional bend (u_b, ±angle)."""
    length = dims["length_m"]
    v = j * dims["line_spacing_m"] + rng.uniform(-0.05, 0.05) * dims["line_spacing_m"]
    u0 = rng.uniform(-0.04, 0.04) * length
    u1 = length + rng.uniform(-0.04, 0.04) * length
    if bend is None:
        return np.array([[u0, v], [u1, v]])
    u_b, angle = bend
    rest = u1 - u_b
    a = math.radians(angle)
    return np.array([[u0, v], [u_b, v], [u_b + rest * math.cos(a), v + rest * math.sin(a)]])


def _bend_blocks(rng, n_lines):
    """{line index: (fraction along, signed angle)} for a bent block at either edge."""
    bends = {}
    quarter = max(1, n_lines // 4)
    west = rng.random() < 0.55
    east = rng.random() < 0.45
    if west:
        m = int(rng.integers(1, quarter + 1))
        fraction, angle = rng.uniform(0.3, 0.7), _uniform(rng, LINE_BEND_DEG)
        bends.update({j: (fraction, -angle) for j in range(m)})
    if east:
        m = int(rng.integers(1, quarter + 1))
        fraction, angle = rng.uniform(0.3, 0.7), _uniform(rng, LINE_BEND_DEG)
        bends.update({n_lines - 1 - j: (fraction, angle) for j in range(m)})
    return bends


def _to_world(local, frame):
    centre, along, across = frame
    local = np.asarray(local, dtype=float)
    return centre + local[:, :1] * along + local[:, 1:2] * across


def _stations_along(vertices, spacing):
    """Points every ``spacing`` m along a polyline, from its first vertex."""
    cum = physics.trace_arc_lengths(vertices)
    return physics.point_on_trace(vertices, np.arange(0.0, cum[-1] + 1e-9, spacing))


def _main_lines(rng, dims, frame):
    bends = _bend_blocks(rng, dims["n_lines"])
    lines = []
    for j in range(dims["n_lines"]):
        bend = None
        if j in bends:
            fraction, angle = bends[j]
            bend = (fraction * dims["length_m"], angle)
        local = _line_local(rng, dims, j, bend)
        name = f"L{j + 1:02d}"
        world = _round_xy(_to_world(local, frame))
        points = _round_xy(_stations_along(world, dims["station_spacing_m"]))
        ids = [f"{name}-{k + 1:03d}" for k in range(len(points))]
        lines.append({"line": name, "kind": "main", "vertices": world.tolist(),
                      "bend_deg": abs(bend[1]) if bend else 0.0, "stations": ids, "xy": points})
    return lines


def _tie_lines(rng, dims, frame, mains):
    """Tie lines across the main lines; they pass through the main-line station at each crossing."""
    import shapely
    from scipy.spatial import cKDTree
    from shapely.geometry import LineString, Point

    spacing = dims["station_spacing_m"]
    main_xy = np.vstack([m["xy"] for m in mains])
    main_ids = [s for m in mains for s in m["stations"]]
    tree = cKDTree(main_xy)
    n_ties = int(rng.integers(N_TIES[0], N_TIES[1] + 1))
    width, length = dims["width_m"], dims["length_m"]
    ties = []
    for k in range(n_ties):
        u = length * (k + 0.5) / n_ties + rng.uniform(-0.15, 0.15) * length / n_ties
        turn = math.radians(rng.uniform(-TIE_TURN_DEG, TIE_TURN_DEG))
        half = (0.5 * width + 0.03 * width + spacing) / math.cos(turn)
        direction = np.array([math.sin(turn), math.cos(turn)])
        centre = np.array([u, 0.5 * width])
        local = np.array([centre - half * direction, centre + half * direction])
        world = _round_xy(_to_world(local, frame))
        tie = LineString(world)
        crossings = []  # (distance along the tie, station index)
        first = 0
        for m in mains:
            hit = tie.intersection(LineString(m["vertices"]))
            for point in getattr(hit, "geoms", [hit]):
                if point.is_empty or point.geom_type != "Point":
                    continue
                index = first + int(np.argmin(np.hypot(*(m["xy"] - [point.x, point.y]).T)))
                crossings.append((tie.project(Point(main_xy[index])), index))
            first += len(m["xy"])
        own = _stations_along(world, spacing)
        along = shapely.line_locate_point(tie, shapely.points(own))
        keep = np.ones(len(own), dtype=bool)
        for position, _ in crossings:
            keep &= np.abs(along - position) >= 0.6 * spacing
        near, _ = tree.query(own)
        keep &= near >= 0.45 * spacing
        own, along = _round_xy(own[keep]), along[keep]
        name = f"T{k + 1:02d}"
        own_ids = [f"{name}-{i + 1:03d}" for i in range(len(own))]
        order = sorted([(a, own_ids[i]) for i, a in enumerate(along)]
                       + [(a, main_ids[index]) for a, index in crossings], key=lambda pair: pair[0])
        ties.append({"line": name, "kind": "tie", "vertices": world.tolist(), "bend_deg": 0.0,
                     "stations": [station for _, station in order], "xy": own, "own_ids": own_ids,
                     "shared": [main_ids[index] for _, index in crossings]})
    return ties


def _draw_layout(rng, origin):
    """Main and tie lines and the station table (ids, lines, coordinates)."""
    for _ in range(200):
        dims = _draw_dimensions(rng)
        azimuth = rng.uniform(0.0, 180.0)
        along = _unit(azimuth)
        across = np.array([along[1], -along[0]])
        centre = np.asarray(origin) - 0.5 * dims["length_m"] * along - 0.5 * dims["width_m"] * across
        frame = (centre, along, across)
        mains = _main_lines(rng, dims, frame)
        ties = _tie_lines(rng, dims, frame, mains)
        n = sum(len(m["xy"]) for m in mains) + sum(len(t["xy"]) for t in ties)
        # A crew ties every line into the network (else its readings float
        # free of the reference station): every main line crosses a tie.
        crossed = {station.rsplit("-", 1)[0] for t in ties for station in t["shared"]}
        if N_STATIONS[0] <= n <= N_STATIONS[1] and all(m["line"] in crossed for m in mains):
            break
    stn, line, east, north = [], [], [], []
    for item in mains:
        stn += item["stations"]
        line += [item["line"]] * len(item["stations"])
        east += item["xy"][:, 0].tolist()
        north += item["xy"][:, 1].tolist()
    for item in ties:
        stn += item["own_ids"]
        line += [item["line"]] * len(item["own_ids"])
        east += item["xy"][:, 0].tolist() if len(item["xy"]) else []
        north += item["xy"][:, 1].tolist() if len(item["xy"]) else []
    lines = [{k: v for k, v in item.items() if k not in ("xy", "own_ids")} for item in mains + ties]
    stations = {"STN": stn, "LINE": line, "E": east, "N": north}
    layout = dict(dims, azimuth_deg=azimuth, lines=lines)
    return layout, stations


# --------------------------------------------------------------------------- terrain


def _draw_terrain(rng, east, north):
    """DEM parameters: a tilt and Gaussian hills scaled to the drawn relief and slope cap."""
    west, east_, south, north_ = east.min(), east.max(), north.min(), north.max()
    size = max(east_ - west, north_ - south)
    cell = float(rng.choice([25.0, 30.0, 40.0, 50.0]))
    x0 = math.floor((west - DEM_MARGIN_M) / cell) * cell
    y0 = math.floor((south - DEM_MARGIN_M) / cell) * cell
    ncols = int(math.ceil((east_ + DEM_MARGIN_M - x0) / cell))
    nrows = int(math.ceil((north_ + DEM_MARGIN_M - y0) / cell))
    hills = []
    for _ in range(int(rng.integers(3, 7))):
        cx = rng.uniform(west - 0.2 * size, east_ + 0.2 * size)
        cy = rng.uniform(south - 0.2 * size, north_ + 0.2 * size)
        width = rng.uniform(0.15, 0.45) * size
        hills.append([cx, cy, rng.uniform(-1.0, 1.0), width, width * rng.uniform(0.5, 1.0),
                      rng.uniform(0.0, 180.0)])
    tilt = _unit(rng.uniform(0.0, 360.0)) * rng.uniform(0.0, 0.6) / size
    terrain = {"base_m": 0.0, "tilt": tilt.tolist(), "hills": hills, "scale": 1.0, "cell_m": cell,
               "west": x0, "south": y0, "ncols": ncols, "nrows": nrows,
               "centre": [0.5 * (west + east_), 0.5 * (south + north_)]}
    x, y, z = dem_grid(terrain)
    inside = _survey_nodes(x, y, (west, east_, south, north_))
    relief = float(z[inside].max() - z[inside].min())
    gy, gx = np.gradient(z.astype(float), cell)
    slope = float(np.percentile(np.hypot(gx, gy)[inside], 99))
    target = _log_uniform(rng, RELIEF_M)
    scale = target / relief
    scale = min(scale, math.tan(math.radians(MAX_SLOPE_DEG)) / slope)
    terrain.update(scale=scale, base_m=float(rng.uniform(200.0, 2400.0)),
                   k_mv_per_m=_uniform(rng, TERRAIN_K_MV_PER_M))
    x, y, z = dem_grid(terrain)
    terrain["relief_m"] = float(z[inside].max() - z[inside].min())
    return terrain


def _survey_nodes(x, y, extent):
    west, east, south, north = extent
    return ((x[None, :] >= west) & (x[None, :] <= east)
            & (y[:, None] >= south) & (y[:, None] <= north))


def dem_grid(terrain):
    """
    The DEM of a design on its grid.

    Parameters
    ----------
    terrain : dict
        ``design["terrain"]``.

    Returns
    -------
    x : numpy.ndarray, shape (ncols,)
        Cell-centre eastings, west to east.
    y : numpy.ndarray, shape (nrows,)
        Cell-centre northings, south to north.
    z : numpy.ndarray, shape (nrows, ncols), float32
        Elevation (m); row 0 is the southernmost.
    """
    cell = terrain["cell_m"]
    x = terrain["west"] + (np.arange(terrain["ncols"]) + 0.5) * cell
    y = terrain["south"] + (np.arange(terrain["nrows"]) + 0.5) * cell
    gx, gy = np.meshgrid(x, y)
    cx, cy = terrain["centre"]
    z = terrain["tilt"][0] * (gx - cx) + terrain["tilt"][1] * (gy - cy)
    for hx, hy, amplitude, wa, wb, rotation in terrain["hills"]:
        r = math.radians(rotation)
        a = (gx - hx) * math.sin(r) + (gy - hy) * math.cos(r)
        b = (gx - hx) * math.cos(r) - (gy - hy) * math.sin(r)
        z = z + amplitude * np.exp(-0.5 * ((a / wa) ** 2 + (b / wb) ** 2))
    z = terrain["base_m"] + terrain["scale"] * (z - np.mean(z))
    return x, y, z.astype(np.float32)


def sample_dem(terrain, east, north, grid=None):
    """
    Bilinear interpolation of the float32 DEM between cell centres.

    Parameters
    ----------
    terrain : dict
    east, north : array_like
    grid : tuple, optional
        ``dem_grid(terrain)`` when already computed.

    Returns
    -------
    numpy.ndarray
        Elevations (m), NaN outside the cell-centre extent.
    """
    x, y, z = grid if grid is not None else dem_grid(terrain)
    z = z.astype(float)
    fx = (np.asarray(east, dtype=float) - x[0]) / (x[1] - x[0])
    fy = (np.asarray(north, dtype=float) - y[0]) / (y[1] - y[0])
    inside = (fx >= 0) & (fx <= len(x) - 1) & (fy >= 0) & (fy <= len(y) - 1)
    i = np.clip(np.floor(fx).astype(int), 0, len(x) - 2)
    j = np.clip(np.floor(fy).astype(int), 0, len(y) - 2)
    tx, ty = fx - i, fy - j
    value = ((1 - tx) * (1 - ty) * z[j, i] + tx * (1 - ty) * z[j, i + 1]
             + (1 - tx) * ty * z[j + 1, i] + tx * ty * z[j + 1, i + 1])
    return np.where(inside, value, np.nan)


# --------------------------------------------------------------------------- faults


def _bend_plan(rng, n_faults):
    """Turn angles (signed, degrees) per fault: 3–4 big bends in all, some small ones."""
    plan = [[] for _ in range(n_faults)]
    n_big = int(rng.integers(BIG_BENDS[0], BIG_BENDS[1] + 1))
    slots = rng.permutation(np.repeat(np.arange(n_faults), 2))[:n_big]
    for f in slots:
        plan[f].append(_uniform(rng, BIG_BEND_DEG))
    for f in range(n_faults):
        if rng.random() < 0.35 and len(plan[f]) < 2:
            plan[f].append(_uniform(rng, SMALL_BEND_DEG))
    signed = []
    for angles in plan:
        turns, total = [], 0.0
        for angle in rng.permutation(angles):
            sign = -1.0 if total > 0 else 1.0 if total < 0 else rng.choice([-1.0, 1.0])
            turns.append(sign * float(angle))
            total += turns[-1]
        signed.append(turns)
    return signed


def _fault_polyline(rng, turns, length, anchor):
    """A polyline of ``length`` m with the given turns, passing through ``anchor``."""
    fractions = np.sort(rng.uniform(0.2, 0.8, len(turns)))
    while len(fractions) > 1 and np.min(np.diff(fractions)) < 0.15:
        fractions = np.sort(rng.uniform(0.2, 0.8, len(turns)))
    azimuth = rng.uniform(0.0, 360.0)
    points = [np.zeros(2)]
    edges = np.concatenate([[0.0], fractions, [1.0]]) * length
    for k in range(len(edges) - 1):
        points.append(points[-1] + (edges[k + 1] - edges[k]) * _unit(azimuth))
        if k < len(turns):
            azimuth += turns[k]
    points = np.array(points)
    at = physics.point_on_trace(points, rng.uniform(0.25, 0.75) * length)
    return points - at + anchor


def _inside_length(line, hull):
    return line.intersection(hull).length


def _too_close(line, others, hull):
    """More than a quarter of the trace inside the survey lies within 250 m of another fault."""
    import shapely

    if not others:
        return False
    vertices = np.asarray(line.coords)
    xy = physics.point_on_trace(vertices, np.arange(0.0, line.length, 100.0))
    xy = xy[shapely.contains_xy(hull, xy[:, 0], xy[:, 1])]
    if len(xy) == 0:
        return False
    points = shapely.points(xy)
    distance = np.min([shapely.distance(other, points) for other in others], axis=0)
    return bool(np.mean(distance < 250.0) > 0.25)


def _meet_another(rng, lines):
    """End one fault on another (a T-junction) when that keeps most of it."""
    from shapely.geometry import LineString

    order = rng.permutation(len(lines))
    for i in order:
        line = lines[i]
        for j in range(len(lines)):
            if j == i:
                continue
            hit = line.intersection(lines[j])
            points = [g for g in getattr(hit, "geoms", [hit]) if g.geom_type == "Point"]
            if not points:
                continue
            s = max(line.project(p) for p in points)
            coords = np.asarray(line.coords)
            cum = physics.trace_arc_lengths(coords)
            if s > 0.6 * line.length and s > cum[-2] + 50.0:  # keep every bend
                keep = [c for c, d in zip(coords, cum) if d < s - 1.0]
                end = line.interpolate(s)
                lines[i] = LineString([*keep, (end.x, end.y)])
                return int(i), int(j)
    return None


def _fault_lines(rng, hull, size):
    """Traces of 4–10 faults, at least two of which cross or meet; (lines, meeting pair)."""
    from shapely.geometry import LineString, Point

    inner = hull.buffer(-0.05 * size)
    minx, miny, maxx, maxy = inner.bounds
    most = min(N_FAULTS[1], N_FAULTS[0] + int(size // 1000.0))  # fewer on small surveys
    n = int(rng.integers(N_FAULTS[0], most + 1))
    for attempt in range(10_000):
        if attempt and attempt % 20 == 0 and n > N_FAULTS[0]:
            n -= 1  # too crowded for this many separate traces
        lines = []
        for turns in _bend_plan(rng, n):
            for _ in range(200):
                anchor = np.array([rng.uniform(minx, maxx), rng.uniform(miny, maxy)])
                if not inner.contains(Point(*anchor)):
                    continue
                length = max(1500.0, rng.uniform(0.5, 1.5) * size)
                line = LineString(_round_xy(_fault_polyline(rng, turns, length, anchor)))
                if _inside_length(line, hull) >= 800.0 and not _too_close(line, lines, hull):
                    lines.append(line)
                    break
        if len(lines) < n:
            continue
        met = _meet_another(rng, lines) if rng.random() < 0.5 else None
        if any(lines[i].intersects(lines[j]) for i in range(n) for j in range(i + 1, n)):
            return lines, met
    raise RuntimeError("no fault set found")  # pragma: no cover


def _draw_faults(rng, hull, size):
    """Fault traces, dips, dip sides and which are mapped."""
    lines, met = _fault_lines(rng, hull, size)
    faults = []
    for k, line in enumerate(lines):
        vertices = _round_xy(np.asarray(line.coords))
        side = int(rng.choice([-1, 1]))
        dip = _uniform(rng, FAULT_DIP_DEG)
        chord = vertices[-1] - vertices[0]
        dip_dir = (math.degrees(math.atan2(chord[0], chord[1])) + 90.0 * side) % 360.0
        mapped = bool(rng.random() < MAPPED_FRACTION)
        faults.append({
            "fault_id": f"F{k + 1:02d}", "vertices": vertices.tolist(), "dip_deg": dip,
            "dip_dir_deg": dip_dir, "dip_side": side, "mapped": mapped,
            "mapped_dip_deg": float(5 * round(dip / 5)) if mapped else None,
            "mapped_dip_dir_deg": float((5 * round(dip_dir / 5)) % 360) if mapped else None,
            "bends_deg": _bends(vertices), "source_free": True,
            "ends_on": None,
        })
    if met is not None:
        faults[met[0]]["ends_on"] = faults[met[1]]["fault_id"]
    return faults


def _bends(vertices):
    step = np.diff(np.asarray(vertices), axis=0)
    az = np.degrees(np.arctan2(step[:, 0], step[:, 1]))
    turn = (np.diff(az) + 180.0) % 360.0 - 180.0
    return [float(abs(t)) for t in turn]


# --------------------------------------------------------------------------- patches


def _inside_interval(vertices, hull):
    """(s_start, s_end) of the longest stretch of a trace inside the survey."""
    import shapely

    cum = physics.trace_arc_lengths(vertices)
    s = np.arange(0.0, cum[-1], 10.0)
    xy = physics.point_on_trace(vertices, s)
    inside = shapely.contains_xy(hull, xy[:, 0], xy[:, 1])
    best, start = (0.0, 0.0), None
    for k, flag in enumerate(np.append(inside, False)):
        if flag and start is None:
            start = k
        if not flag and start is not None:
            if s[k - 1] - s[start] > best[1] - best[0]:
                best = (float(s[start]), float(s[k - 1]))
            start = None
    return best


def _patch_interval(rng, fault, window, taken, want_bent):
    """An along-trace interval [s0, s1] on a fault, or None."""
    vertices = np.asarray(fault["vertices"])
    cum = physics.trace_arc_lengths(vertices)
    total = cum[-1]
    length = _uniform(rng, PATCH_LENGTH_M)
    inner = [c for c in cum[1:-1] if window[0] <= c <= window[1]]
    if want_bent and inner:
        centre = float(rng.choice(inner)) + rng.uniform(-0.35, 0.35) * length
    else:
        centre = rng.uniform(*window)
    s0, s1 = max(0.0, centre - 0.5 * length), min(float(total), centre + 0.5 * length)
    if s1 - s0 < PATCH_LENGTH_M[0]:
        return None
    if any(min(abs(s0 - c), abs(s1 - c)) < physics.END_BLEND_M + 10.0 for c in cum[1:-1]):
        return None
    if any(s0 < b + 100.0 and a - 100.0 < s1 for a, b in taken):
        return None
    return s0, s1


def _patch_valid(patch, terrain, grid):
    """The top edge stays below the ground and the mitred pieces do not fold over."""
    top, bottom, _ = physics.patch_edges(patch)
    for j in range(len(top) - 1):
        t, b = top[j + 1, :2] - top[j, :2], bottom[j + 1, :2] - bottom[j, :2]
        if t @ b < 0.3 * (t @ t):
            return False
    line = top[:, :2]
    cum = physics.trace_arc_lengths(line)
    points = physics.point_on_trace(line, np.linspace(0, cum[-1], 50))
    ground = sample_dem(terrain, points[:, 0], points[:, 1], grid)
    if not np.all(np.isfinite(ground)):
        return False
    return bool(np.all(ground - patch["ground_m"] >= -0.5 * patch["top_depth_m"]))


def _draw_patch(rng, fault, window, taken, terrain, grid, stations, floor, patch_id):
    """One planted patch on ``fault`` (a dict as in truth.json), or None."""
    east, north, elev = stations
    want_bent = rng.random() < 0.45
    for _ in range(60):
        interval = _patch_interval(rng, fault, window, taken, want_bent)
        if interval is None:
            continue
        top = _log_uniform(rng, TOP_DEPTH_M)
        patch = {
            "patch_id": patch_id, "fault_id": fault["fault_id"], "fault_trace": fault["vertices"],
            "dip_side": fault["dip_side"], "s0_m": interval[0], "s1_m": interval[1],
            "length_m": interval[1] - interval[0], "top_depth_m": top,
            "bottom_depth_m": top + _log_uniform(rng, HEIGHT_M), "dip_deg": fault["dip_deg"],
            "jump_mv": 0.0, "sigma_ratio": 1.0, "ground_m": 0.0,
        }
        record = physics.patch_record(patch)
        ground = sample_dem(terrain, [record["top_x"]], [record["top_y"]], grid)[0]
        if not np.isfinite(ground):
            continue
        patch["ground_m"] = float(ground)
        if not _patch_valid(patch, terrain, grid):
            continue
        bent = len(physics.interval_polyline(fault["vertices"], *interval)) > 2
        if not bent and patch["dip_deg"] >= CONTRAST_MIN_DIP_DEG and rng.random() < 0.4:
            patch["sigma_ratio"] = _log_uniform(rng, SIGMA_RATIO) ** float(rng.choice([-1, 1]))
        sign = float(rng.choice([-1.0, 1.0]))
        patch["jump_mv"] = sign * _log_uniform(rng, JUMP_MV)
        # One quad per piece is exact for planar pieces and quick.
        ptp = float(np.ptp(physics.patch_sp(east, north, elev, patch, n_along=1, n_down=1)))
        if ptp < floor and rng.random() < 0.8:
            factor = floor * rng.uniform(1.2, 3.0) / max(ptp, 1e-12)
            if abs(patch["jump_mv"]) * factor <= MAX_JUMP_MV:
                patch["jump_mv"] *= factor
                ptp *= factor
        patch.update(physics.patch_record(patch))
        patch.update(peak_to_peak_mv=ptp, above_floor=bool(ptp >= floor))
        return patch
    return None


def _draw_patches(rng, faults, hull, terrain, grid, stations, floor):
    windows = {f["fault_id"]: _inside_interval(np.asarray(f["vertices"]), hull) for f in faults}
    usable = [f for f in faults if windows[f["fault_id"]][1] - windows[f["fault_id"]][0] >= 600.0]
    n = int(rng.integers(N_PATCHES[0], N_PATCHES[1] + 1))
    two_on_one = n >= 2 and rng.random() < 0.4
    n_faults = max(1, min(n - int(two_on_one), len(usable), len(faults) - 1))
    chosen = [usable[i] for i in rng.choice(len(usable), n_faults, replace=False)]
    counts = [1] * n_faults
    for i in rng.permutation(n_faults)[:max(0, n - n_faults)]:
        counts[i] = 2
    patches, taken = [], {}
    for fault, count in zip(chosen, counts):
        for _ in range(count):
            patch = _draw_patch(rng, fault, windows[fault["fault_id"]], taken.get(fault["fault_id"], []),
                                terrain, grid, stations, floor, f"P{len(patches) + 1:02d}")
            if patch is not None:
                patches.append(patch)
                taken.setdefault(fault["fault_id"], []).append((patch["s0_m"], patch["s1_m"]))
                fault["source_free"] = False
    for _ in range(50):  # every survey plants at least one patch
        if patches:
            break
        fault = usable[int(rng.integers(len(usable)))]
        patch = _draw_patch(rng, fault, windows[fault["fault_id"]], [], terrain, grid, stations, floor, "P01")
        if patch is not None:
            patches.append(patch)
            fault["source_free"] = False
    return patches


# --------------------------------------------------------------------------- cultural sources


def _pipeline(rng, hull, stations):
    """A buried pipeline across the survey as a line of shallow poles, or None."""
    import shapely
    from shapely.geometry import LineString

    east, north, elev = stations
    minx, miny, maxx, maxy = hull.bounds
    size = math.hypot(maxx - minx, maxy - miny)
    anchor = np.array([rng.uniform(minx, maxx), rng.uniform(miny, maxy)])
    anchor = np.array(hull.centroid.coords[0]) + 0.6 * (anchor - np.array(hull.centroid.coords[0]))
    azimuth = rng.uniform(0.0, 180.0)
    turn = rng.uniform(10.0, 30.0) * rng.choice([-1, 1]) if rng.random() < 0.5 else 0.0
    start = anchor - size * _unit(azimuth)
    path = np.array([start, anchor, anchor + size * _unit(azimuth + turn)])
    line = LineString(path).intersection(hull.buffer(300.0))
    if line.is_empty or line.geom_type != "LineString":
        return None
    spacing = rng.uniform(20.0, 50.0)
    depth = rng.uniform(1.0, 3.0)
    s = np.arange(0.0, line.length, spacing)
    points = np.array([[p.x, p.y] for p in (line.interpolate(x) for x in s)])
    unit = np.abs(physics.pole_sp(east, north, elev, pole_table(points, depth, 1.0)))
    # Scale to the typical anomaly of the stations near the pipe, not to the
    # one station that happens to sit over a pole.
    distance = shapely.distance(line, shapely.points(np.column_stack([east, north])))
    near = unit[distance <= 30.0]
    typical = np.median(near) if near.size >= 5 else np.max(unit)
    k = rng.choice([-1.0, 1.0]) * rng.uniform(*PIPELINE_MV) / typical
    return {"kind": "pipeline", "poles": pole_table(points, depth, k), "on_fault": None,
            "line": _round_xy(np.asarray(line.coords)).tolist(), "spacing_m": spacing,
            "depth_m": depth}


def pole_table(points, depth, k):
    """``[[x, y, depth, k], ...]`` for poles of one depth and strength."""
    points = np.asarray(points, dtype=float).reshape(-1, 2)
    return [[float(x), float(y), float(depth), float(k)] for x, y in _round_xy(points)]


def _casing(rng, hull, faults, windows):
    """A steel well casing: a negative pole or pole pair, sometimes on a fault trace."""
    from shapely.geometry import Point

    on_fault = None
    candidates = [f for f in faults if windows[f["fault_id"]][1] > windows[f["fault_id"]][0]]
    if candidates and rng.random() < CASING_ON_FAULT:
        fault = candidates[int(rng.integers(len(candidates)))]
        s = rng.uniform(*windows[fault["fault_id"]])
        xy = physics.point_on_trace(fault["vertices"], s)
        on_fault = fault["fault_id"]
    else:
        minx, miny, maxx, maxy = hull.bounds
        inner = hull.buffer(-0.1 * min(maxx - minx, maxy - miny))
        xy = np.array(hull.centroid.coords[0])
        for _ in range(1000):
            candidate = np.array([rng.uniform(minx, maxx), rng.uniform(miny, maxy)])
            if inner.contains(Point(*candidate)):
                xy = candidate
                break
    top = rng.uniform(20.0, 100.0)
    wellhead = rng.uniform(20.0, 200.0)
    if rng.random() < 0.6:
        bottom = rng.uniform(300.0, 1500.0)
        k = -wellhead / (1.0 / top - 1.0 / bottom)
        poles = pole_table(xy, top, k) + pole_table(xy, bottom, -k)
    else:
        k = -wellhead * top
        poles = pole_table(xy, top, k)
    return {"kind": "casing", "poles": poles, "on_fault": on_fault, "wellhead_mv": -wellhead}


def _draw_cultural(rng, hull, faults, stations):
    items = []
    if rng.random() < PIPELINE_PROBABILITY:
        pipe = _pipeline(rng, hull, stations)
        if pipe is not None:
            items.append(pipe)
    if rng.random() < CASING_PROBABILITY:
        windows = {f["fault_id"]: _inside_interval(np.asarray(f["vertices"]), hull) for f in faults}
        for _ in range(int(rng.integers(1, 4))):
            items.append(_casing(rng, hull, faults, windows))
    east, north, elev = stations
    for item in items:
        values = physics.pole_sp(east, north, elev, item["poles"])
        item["peak_mv"] = float(values[np.argmax(np.abs(values))])
    return items


# --------------------------------------------------------------------------- regional, noise


def _draw_regional(rng, east, north):
    centre = [float(np.round(np.mean([east.min(), east.max()]))),
              float(np.round(np.mean([north.min(), north.max()])))]
    gradient = rng.uniform(0.0, 10.0) * _unit(rng.uniform(0.0, 360.0))
    q = rng.normal(size=3)
    x = np.linspace(east.min(), east.max(), 9)[:, None] - centre[0]
    y = np.linspace(north.min(), north.max(), 9)[None, :] - centre[1]
    x, y = x / 1000.0, y / 1000.0
    size = np.max(np.abs(q[0] * x * x + q[1] * x * y + q[2] * y * y))
    q = q * rng.uniform(0.0, 20.0) / size
    return {"centre": centre, "c_x": float(gradient[0]), "c_y": float(gradient[1]),
            "c_xx": float(q[0]), "c_xy": float(q[1]), "c_yy": float(q[2]),
            "formula": "V = c_x*x + c_y*y + c_xx*x^2 + c_xy*x*y + c_yy*y^2 (mV), x, y in km "
                       "east and north of centre"}


def _draw_noise(rng):
    return {"white_sd_mv": _uniform(rng, WHITE_SD_MV),
            "correlated_sd_mv": _uniform(rng, CORRELATED_SD_MV),
            "correlation_length_m": _uniform(rng, CORRELATION_LENGTH_M),
            "outlier_fraction": _uniform(rng, OUTLIER_FRACTION),
            "outlier_mv": list(OUTLIER_MV),
            "reading_sd_mv": _uniform(rng, READING_SD_MV)}


def _draw_reading_plan(rng, lines):
    reversed_lines = [item["line"] for k, item in enumerate(lines) if k > 0 and rng.random() < 0.3]
    start = dt.datetime(2031, 1, 1) + dt.timedelta(days=int(rng.integers(0, 700)))
    return {"reversed_lines": reversed_lines, "start_date": start.date().isoformat(),
            "check_sd_mv": _uniform(rng, CHECK_SD_MV), "n_blunders": int(rng.integers(BLUNDERS[0],
                                                                                      BLUNDERS[1] + 1))}


# --------------------------------------------------------------------------- the design


def draw_design(seed):
    """
    Draw one synthetic survey design.

    Parameters
    ----------
    seed : int
        Everything follows from it (``numpy.random.default_rng(seed)``).

    Returns
    -------
    dict
        JSON-able: ``seed``, ``crs``, ``layout`` (lines and tie lines with
        their station chains), ``stations`` (columns STN, LINE, E, N, ELEV),
        ``terrain`` (DEM parameters and ``k_mv_per_m``), ``faults``,
        ``patches`` (as :func:`physics.patch_sp` reads them),
        ``cultural``, ``regional``, ``noise``, ``floor_mv`` and
        ``readings`` (the plan of the raw readings).
    """
    from shapely.geometry import MultiPoint

    rng = np.random.default_rng(seed)
    zone = int(rng.integers(10, 61))
    origin = (float(rng.uniform(330_000.0, 670_000.0)), float(rng.uniform(1_100_000.0, 5_900_000.0)))
    layout, stations = _draw_layout(rng, origin)
    east, north = np.asarray(stations["E"]), np.asarray(stations["N"])
    terrain = _draw_terrain(rng, east, north)
    grid = dem_grid(terrain)
    elev = np.round(sample_dem(terrain, east, north, grid), 2)
    stations["ELEV"] = elev.tolist()
    hull = MultiPoint(np.column_stack([east, north])).convex_hull
    size = max(layout["width_m"], layout["length_m"])
    faults = _draw_faults(rng, hull, size)
    noise = _draw_noise(rng)
    floor = _floor(noise["white_sd_mv"])
    xyz = (east, north, elev)
    patches = _draw_patches(rng, faults, hull, terrain, grid, xyz, floor)
    cultural = _draw_cultural(rng, hull, faults, xyz)
    regional = _draw_regional(rng, east, north)
    readings = _draw_reading_plan(rng, layout["lines"])
    return {
        "seed": int(seed), "crs": f"EPSG:{32600 + zone}", "layout": layout, "stations": stations,
        "reference_station": stations["STN"][0], "terrain": terrain, "faults": faults,
        "patches": patches, "cultural": cultural, "regional": regional, "noise": noise,
        "floor_mv": floor, "readings": readings,
    }


# --------------------------------------------------------------------------- realisations


def exponential_noise(east, north, sd, length, rng):
    """
    A zero-mean Gaussian field with covariance sd²·exp(−d/length) at the
    stations, drawn exactly (Cholesky factor of the station covariance).

    Parameters
    ----------
    east, north : numpy.ndarray
    sd, length : float
    rng : numpy.random.Generator

    Returns
    -------
    numpy.ndarray
    """
    from scipy import linalg
    from scipy.spatial.distance import pdist, squareform

    xy = np.column_stack([east, north])
    cov = squareform(pdist(xy))
    np.multiply(cov, -1.0 / length, out=cov)
    np.exp(cov, out=cov)
    cov *= sd * sd
    cov[np.diag_indices_from(cov)] += 1e-9 * sd * sd
    factor = linalg.cholesky(cov, lower=True, overwrite_a=True, check_finite=False)
    return factor @ rng.standard_normal(len(xy))


def station_noise(design, east, north):
    """
    Station noise of a design: white, correlated and gross outliers (mV).

    Parameters
    ----------
    design : dict
    east, north : numpy.ndarray

    Returns
    -------
    dict of numpy.ndarray
        ``noise_white``, ``noise_correlated``, ``outliers``.
    """
    rng = np.random.default_rng([design["seed"], NOISE_STREAM])
    noise = design["noise"]
    n = len(east)
    white = noise["white_sd_mv"] * rng.standard_normal(n)
    correlated = exponential_noise(east, north, noise["correlated_sd_mv"],
                                   noise["correlation_length_m"], rng)
    outliers = np.zeros(n)
    count = max(1, int(round(noise["outlier_fraction"] * n)))
    where = rng.choice(n, count, replace=False)
    outliers[where] = rng.choice([-1.0, 1.0], count) * rng.uniform(*noise["outlier_mv"], count)
    return {"noise_white": white, "noise_correlated": correlated, "outliers": outliers}


def station_table(design):
    """
    Every station of a design with each SP component (mV).

    Returns
    -------
    pandas.DataFrame
        STN, LINE, E, N, ELEV, one column per patch, ``cultural``,
        ``regional``, ``terrain``, ``noise_white``, ``noise_correlated``,
        ``outliers``, ``total`` and ``sp_mv`` (total minus the total at the
        reference station).
    """
    import pandas as pd

    frame = pd.DataFrame({k: design["stations"][k] for k in ("STN", "LINE", "E", "N", "ELEV")})
    components = physics.survey_components(design, frame)
    signal = components.pop("signal")
    noise = station_noise(design, frame["E"].to_numpy(), frame["N"].to_numpy())
    for name, values in {**components, **noise}.items():
        frame[name] = values
    frame["total"] = signal + sum(noise.values())
    reference = int(np.flatnonzero(frame["STN"].to_numpy() == design["reference_station"])[0])
    frame["sp_mv"] = frame["total"] - frame["total"].iloc[reference]
    return frame


# --------------------------------------------------------------------------- raw readings


class _Clock:
    """Field time: days of 8–9 h with checks at the start, a midday base revisit and the end."""

    def __init__(self, rng, start_date):
        self.rng = rng
        self.date = dt.datetime.fromisoformat(start_date)
        self.checks = []  # (time, day index)
        self.day = -1
        self._new_day()

    def _new_day(self):
        self.day += 1
        day = self.date + dt.timedelta(days=self.day)
        self.day_start = day + dt.timedelta(hours=7.5, minutes=float(self.rng.uniform(0, 45)))
        self.day_end = self.day_start + dt.timedelta(hours=float(self.rng.uniform(*DAY_HOURS)))
        self.midday_done = False
        self.now = self.day_start
        self.checks.append((self.now, self.day))
        self.now += dt.timedelta(minutes=float(self.rng.uniform(5, 15)))

    def advance(self, seconds):
        """Time of the next reading, ``seconds`` after the previous one."""
        self.now += dt.timedelta(seconds=float(seconds))
        if not self.midday_done and self.now >= self.day_start + 0.5 * (self.day_end - self.day_start):
            self.now += dt.timedelta(minutes=float(self.rng.uniform(10, 20)))
            self.checks.append((self.now, self.day))
            self.now += dt.timedelta(minutes=float(self.rng.uniform(20, 45)))
            self.midday_done = True
        if self.now > self.day_end:
            self.checks.append((self.now, self.day))
            self._new_day()
        return self.now, self.day

    def close(self):
        self.now += dt.timedelta(minutes=float(self.rng.uniform(5, 15)))
        self.checks.append((self.now, self.day))


def _schedule(rng, design):
    """Readings in field order: (line, from, to, time, day, k within the line)."""
    clock = _Clock(rng, design["readings"]["start_date"])
    rows = []
    reversed_lines = set(design["readings"]["reversed_lines"])
    for item in design["layout"]["lines"]:
        chain = list(item["stations"])
        if item["line"] in reversed_lines:
            chain = chain[::-1]
        clock.advance(rng.uniform(300, 1200))
        for k, (a, b) in enumerate(zip(chain[:-1], chain[1:])):
            time, day = clock.advance(rng.uniform(*READING_GAP_S)) if k else (clock.now, clock.day)
            rows.append((item["line"], a, b, time, day, k))
    clock.close()
    return rows, clock.checks


def _offsets(rng, checks):
    """True electrode offset at each check; piecewise linear in time within a day."""
    by_day = {}
    for time, day in checks:
        by_day.setdefault(day, []).append(time)
    knots = {}
    for day, times in by_day.items():
        start = rng.choice([-1.0, 1.0]) * rng.uniform(*OFFSET_START_MV)
        drift = rng.choice([-1.0, 1.0]) * rng.uniform(*DRIFT_MV_PER_DAY)
        t0, t1 = times[0], times[-1]
        span = max((t1 - t0).total_seconds(), 1.0)
        values = [start + drift * (t - t0).total_seconds() / span for t in times]
        for i in range(1, len(values) - 1):
            values[i] += rng.normal(0.0, 0.15 * abs(drift))
        knots[day] = ([(t - t0).total_seconds() for t in times], values, t0)
    return knots


def _offset_at(knots, time, day):
    seconds, values, t0 = knots[day]
    return float(np.interp((time - t0).total_seconds(), seconds, values))


def raw_readings(design, potentials):
    """
    Leapfrog gradient readings and electrode checks of a design.

    Parameters
    ----------
    design : dict
    potentials : mapping
        Station id -> station potential (mV; the true SP with station noise).

    Returns
    -------
    readings : pandas.DataFrame
        LINE, FROM, TO, TIME, DV_mV (rounded to 0.1) and, for checking,
        ``k`` (index within the line), ``sign`` (+1/−1), ``offset_mv``
        (true offset), ``blunder_mv``.
    checks : pandas.DataFrame
        ``time``, ``offset_mv`` (rounded to 0.01) and ``true_offset_mv``.
    """
    import pandas as pd

    rng = np.random.default_rng([design["seed"], READINGS_STREAM])
    rows, checks = _schedule(rng, design)
    knots = _offsets(rng, checks)
    sd = design["noise"]["reading_sd_mv"]
    table = pd.DataFrame(rows, columns=["LINE", "FROM", "TO", "time", "day", "k"])
    table["sign"] = np.where(table["k"] % 2 == 0, 1.0, -1.0)
    table["offset_mv"] = [_offset_at(knots, t, d) for t, d in zip(table["time"], table["day"])]
    blunder = np.zeros(len(table))
    where = rng.choice(np.arange(1, len(table)), design["readings"]["n_blunders"], replace=False)
    blunder[where] = rng.choice([-1.0, 1.0], len(where)) * rng.uniform(*BLUNDER_MV, len(where))
    table["blunder_mv"] = blunder
    true_dv = np.array([potentials[b] - potentials[a] for a, b in zip(table["FROM"], table["TO"])])
    value = true_dv + table["sign"] * table["offset_mv"] + sd * rng.standard_normal(len(table)) + blunder
    table["DV_mV"] = np.round(value, 1)
    table["TIME"] = [t.isoformat(timespec="seconds") for t in table["time"]]
    check_sd = design["readings"]["check_sd_mv"]
    true = np.array([_offset_at(knots, t, d) for t, d in checks])
    check_table = pd.DataFrame({
        "time": [t.isoformat(timespec="seconds") for t, _ in checks],
        "offset_mv": np.round(true + check_sd * rng.standard_normal(len(true)), 2),
        "true_offset_mv": true,
    })
    return table.drop(columns=["time"]), check_table


# --------------------------------------------------------------------------- writing


def _project_text(design, raw):
    crs = design["crs"]
    lines = [
        "[survey]", f'name = "synthetic survey {design["seed"]}"', f'crs = "{crs}"', "",
        "[stations]", 'path = "stations.csv"', 'id = "STN"', 'line = "LINE"', 'x = "E"', 'y = "N"',
        f'crs = "{crs}"',
    ]
    if not raw:
        lines.append('value_mv = "SP_mV"')
    lines += ['elevation = "ELEV"', ""]
    if raw:
        lines += ["[readings]", 'path = "dipoles.csv"', 'line = "LINE"', 'from = "FROM"', 'to = "TO"',
                  'time = "TIME"', 'value_mv = "DV_mV"', 'electrode_checks = "electrode_checks.csv"',
                  f'reference_station = "{design["reference_station"]}"', ""]
    lines += ["[faults]", 'path = "faults.gpkg"', 'layer = "faults"', 'id = "FAULT"', 'dip_deg = "dip"',
              'dip_dir_deg = "dip_dir"', "", "[dem]", 'path = "dem.tif"', ""]
    return "\n".join(lines)


def _write_dem(design, path):
    import rasterio
    from rasterio.transform import Affine

    terrain = design["terrain"]
    x, y, z = dem_grid(terrain)
    cell = terrain["cell_m"]
    north = terrain["south"] + terrain["nrows"] * cell
    profile = {"driver": "GTiff", "width": terrain["ncols"], "height": terrain["nrows"], "count": 1,
               "dtype": "float32", "crs": design["crs"], "nodata": -9999.0, "compress": "deflate",
               "transform": Affine(cell, 0.0, terrain["west"], 0.0, -cell, north)}
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(z[::-1], 1)
        dst.update_tags(units="m")


def _write_faults(design, path):
    import geopandas as gpd
    from shapely.geometry import LineString

    faults = design["faults"]
    frame = gpd.GeoDataFrame({
        "FAULT": [f["fault_id"] for f in faults],
        "dip": [f["mapped_dip_deg"] if f["mapped"] else None for f in faults],
        "dip_dir": [f["mapped_dip_dir_deg"] if f["mapped"] else None for f in faults],
    }, geometry=[LineString(f["vertices"]) for f in faults], crs=design["crs"])
    frame["dip"] = frame["dip"].astype("float64")
    frame["dip_dir"] = frame["dip_dir"].astype("float64")
    frame.to_file(path, layer="faults", driver="GPKG", engine="pyogrio")


_PATCH_TRUTH_KEYS = ("patch_id", "fault_id", "s0_m", "s1_m", "top_x", "top_y", "strike_deg", "dip_deg",
                     "dip_dir_deg", "top_depth_m", "bottom_depth_m", "length_m", "jump_mv", "sigma_ratio",
                     "ground_m", "bent", "fault_trace", "dip_side", "vertices_xyz")


def _truth(design, table, raw, readings_info):
    east, north = table["E"].to_numpy(), table["N"].to_numpy()
    floor = design["floor_mv"]
    patches = []
    for patch in design["patches"]:
        out = {k: patch[k] for k in _PATCH_TRUTH_KEYS}
        out["peak_to_peak_mv"] = float(np.ptp(table[patch["patch_id"]].to_numpy()))
        out["above_floor"] = bool(out["peak_to_peak_mv"] >= floor)
        patches.append(out)
    faults = [{"fault_id": f["fault_id"], "vertices": f["vertices"], "dip_deg": f["dip_deg"],
               "dip_dir_deg": f["dip_dir_deg"], "dip_side": f["dip_side"], "mapped": f["mapped"],
               "mapped_dip_deg": f["mapped_dip_deg"], "mapped_dip_dir_deg": f["mapped_dip_dir_deg"],
               "source_free": f["source_free"], "bends_deg": f["bends_deg"], "ends_on": f["ends_on"]}
              for f in design["faults"]]
    noise = dict(design["noise"])
    if not raw:
        noise["reading_sd_mv"] = None
    layout = design["layout"]
    return {
        "seed": design["seed"], "raw": bool(raw), "crs": design["crs"], "n_stations": int(len(table)),
        "extent_m": [float(east.min()), float(east.max()), float(north.min()), float(north.max())],
        "line_spacing_m": layout["line_spacing_m"], "station_spacing_m": layout["station_spacing_m"],
        "line_azimuth_deg": layout["azimuth_deg"],
        "lines": [{k: item[k] for k in ("line", "kind", "vertices", "bend_deg")} for item in layout["lines"]],
        "reference_station": design["reference_station"], "noise": noise, "floor_mv": floor,
        "floor_rule": FLOOR_RULE, "faults": faults, "patches": patches, "cultural": design["cultural"],
        "regional": design["regional"],
        "terrain": {"k_mv_per_m": design["terrain"]["k_mv_per_m"], "relief_m": design["terrain"]["relief_m"],
                    "dem_cell_m": design["terrain"]["cell_m"]},
        "readings": readings_info,
        "components_file": "truth_stations.csv",
    }


def write_survey(design, folder, *, raw=False):
    """
    Write a design as survey files plus its truth.

    Parameters
    ----------
    design : dict
        From :func:`draw_design`.
    folder : str or Path
        Created if needed; files in it are overwritten.
    raw : bool
        False: ``stations.csv`` carries the reduced total field ``SP_mV``.
        True: stations without values, plus ``dipoles.csv`` (leapfrog
        readings) and ``electrode_checks.csv``.

    Returns
    -------
    dict
        The truth, as written to ``truth.json``.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    table = station_table(design)
    stations = table[["STN", "LINE", "E", "N", "ELEV"]].copy()
    if not raw:
        stations["SP_mV"] = table["sp_mv"].round(2)
    stations.to_csv(folder / "stations.csv", index=False, float_format="%.2f")
    _write_faults(design, folder / "faults.gpkg")
    _write_dem(design, folder / "dem.tif")
    readings_info = None
    if raw:
        potentials = dict(zip(table["STN"], table["sp_mv"]))
        readings, checks = raw_readings(design, potentials)
        readings[["LINE", "FROM", "TO", "TIME", "DV_mV"]].to_csv(folder / "dipoles.csv", index=False,
                                                                  float_format="%.1f")
        checks[["time", "offset_mv"]].to_csv(folder / "electrode_checks.csv", index=False,
                                             float_format="%.2f")
        blunders = readings[readings["blunder_mv"] != 0.0]
        readings_info = {
            "n_readings": int(len(readings)), "n_days": int(readings["TIME"].str[:10].nunique()),
            "reading_sd_mv": design["noise"]["reading_sd_mv"],
            "check_sd_mv": design["readings"]["check_sd_mv"],
            "reversed_lines": design["readings"]["reversed_lines"],
            "blunders": [{"index": int(i), "line": r.LINE, "from": r.FROM, "to": r.TO, "time": r.TIME,
                          "error_mv": float(r.blunder_mv)} for i, r in blunders.iterrows()],
            "checks": checks[["time", "true_offset_mv"]].to_dict("records"),
        }
    (folder / "project.toml").write_text(_project_text(design, raw), encoding="utf-8")
    columns = ["STN", "E", "N", "ELEV"] + [p["patch_id"] for p in design["patches"]] + [
        "cultural", "regional", "terrain", "noise_white", "noise_correlated", "outliers", "total", "sp_mv"]
    table[columns].to_csv(folder / "truth_stations.csv", index=False, float_format="%.6f")
    truth = _truth(design, table, raw, readings_info)
    (folder / "truth.json").write_text(json.dumps(truth, indent=1), encoding="utf-8")
    return truth
