"""
Grid SP stations onto a regular raster for display, QC and diagnostics.

Stations are dense along survey lines and sparse across them, so the grid
between lines is an interpolation, never data: sources are fitted to the
stations, not to grid nodes. The steps are

1. estimate the along-line station spacing and the line spacing
   (:func:`station_spacing`, :func:`line_spacing`);
2. block-reduce (median) at about a third of the line spacing, one block per
   line, to offset along-line oversampling;
3. fit a damped Green's-function spline in tension [WesselBercovici1998]_
   (tension 0 gives the biharmonic spline of [Sandwell1987]_), locally in
   overlapping windows blended by a partition of unity so that 10⁵ stations
   grid in seconds;
4. choose tension and damping by spatially blocked cross-validation
   (leave lines out, or blocks at least one line spacing wide);
5. mask nodes farther than ``mask_distance_m`` from every station or outside
   the convex hull of the stations, widened by half a cell diagonal so that
   the node nearest to every station holds a value (a lone masked node with at
   least 7 of its 8 neighbours kept is kept too).

Nothing here reads or writes files.

References
----------
.. [Sandwell1987] Sandwell (1987) Biharmonic spline interpolation of GEOS-3
   and SEASAT altimeter data. Geophys. Res. Lett. 14, 139–142.
.. [SmithWessel1990] Smith & Wessel (1990) Gridding with continuous curvature
   splines in tension. Geophysics 55, 293–305.
.. [WesselBercovici1998] Wessel & Bercovici (1998) Interpolation with splines
   in tension: a Green's function approach. Math. Geol. 30, 77–93.
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pandas as pd
from scipy import linalg, special
from scipy.spatial import ConvexHull, cKDTree
from scipy.spatial import QhullError
from scipy.spatial.distance import cdist

from geosp.errors import InputError, OptionError
from geosp.models import GridResult, Raster

logger = logging.getLogger(__name__)

__all__ = ["grid_stations", "grid_like", "sample_grid", "line_spacing", "station_spacing"]

#: Tension values tried by cross-validation (0 = biharmonic, towards 1 = membrane).
TENSIONS = (0.0, 0.3, 0.6, 0.9)
#: Damping values tried by cross-validation (dimensionless, see grid_stations).
DAMPINGS = (1e-4, 1e-3, 1e-2, 1e-1)
_METHODS = ("tension_spline", "biharmonic_spline")
_CV_MODES = ("lines", "blocks", "random", "none")
_MARGIN_LINES = 2.0  # data margin around each window, in line spacings
_BLEND = 0.25  # width of the blending ramp between windows, as a fraction of the window
_CV_WINDOWS = 10  # windows used for cross-validation when there are more
_TABLE_STEP = 2.5e-4  # kernel table step, in line spacings
_MAX_TABLE = 10_000_000  # entries of a kernel table (80 MB): a window wider than this allows is a data error
_SAMPLE = 3000  # stations sampled to estimate spacings
_MIN_WINDOW_POINTS = 6  # fewer reduced points than this: the window is skipped


# ---------------------------------------------------------------------------
# Green's functions


def _green_tension(r, p):
    """
    Green's function of the spline in tension, g(r) = K0(p r) + ln(p r).

    Solves ∇²(∇² − p²) g ∝ δ in 2-D [WesselBercovici1998]_. Finite at 0, where
    g(0) = ln 2 − γ (γ = Euler's constant).

    Parameters
    ----------
    r : array
        Distance (any unit, same as 1/p).
    p : float
        Tension wavenumber, > 0.
    """
    z = p * np.asarray(r, dtype=float)
    out = np.full(z.shape, math.log(2.0) - np.euler_gamma)
    pos = z > 0
    out[pos] = special.k0(z[pos]) + np.log(z[pos])
    return out


def _tension_wavenumber(tension):
    """p (per line spacing) for a tension t in [0, 1): p = sqrt(t / (1 − t))."""
    return math.sqrt(tension / (1.0 - tension))


def _kernel_exact(r, tension):
    """
    Conditionally positive-definite spline kernel φ(r) in line-spacing units.

    t = 0: φ = r² (ln r − 1), the biharmonic Green's function [Sandwell1987]_.
    t > 0: φ = 4 (g(0) − g(r)) / p² with g from :func:`_green_tension`; the
    shift by g(0) and the scale 4/p² leave the interpolant unchanged and make
    φ tend to the biharmonic kernel (plus a multiple of r², which the linear
    trend absorbs) as t → 0.
    """
    r = np.asarray(r, dtype=float)
    if tension == 0:
        out = np.zeros(r.shape)
        pos = r > 0
        out[pos] = r[pos] ** 2 * (np.log(r[pos]) - 1.0)
        return out
    p = _tension_wavenumber(tension)
    return 4.0 * (math.log(2.0) - np.euler_gamma - _green_tension(r, p)) / p**2


class _KernelTable:
    """φ(r) tabulated on a uniform step for fast linear interpolation (relative error ~1e-8)."""

    def __init__(self, tension, r_max):
        self.tension = tension
        self.step = _TABLE_STEP
        n = int(math.ceil(r_max / self.step)) + 2
        self.values = _kernel_exact(np.arange(n) * self.step, tension)
        self.n = n

        self.slopes = np.diff(self.values)

    def __call__(self, r):
        """φ at distances ``r`` (line spacings); ``r`` is overwritten."""
        r *= 1.0 / self.step
        i = r.astype(np.intp)
        r -= i
        r *= np.take(self.slopes, i, mode="clip")
        r += np.take(self.values, i, mode="clip")
        return r


def _distances(a, b):
    """Euclidean distance matrix between (n, 2) and (m, 2) arrays."""
    return cdist(a, b)


# ---------------------------------------------------------------------------
# Spacings


def _valid_xy(stations):
    ok = np.isfinite(stations.easting) & np.isfinite(stations.northing)
    return stations.easting[ok], stations.northing[ok], np.asarray(stations.line_id, dtype=str)[ok]


def _sample_index(n, rng):
    return np.arange(n) if n <= _SAMPLE else rng.choice(n, _SAMPLE, replace=False)


def _station_spacing(x, y):
    """Median distance (m) to the nearest other station (duplicates ignored)."""
    xy = np.column_stack([x, y])
    if len(xy) < 2:
        return float("nan")
    tree = cKDTree(xy)
    rng = np.random.default_rng(0)
    idx = _sample_index(len(xy), rng)
    dist, _ = tree.query(xy[idx], k=min(len(xy), 4))
    dist = dist[:, 1:]
    dist = np.where(dist > 0, dist, np.inf).min(axis=1)
    dist = dist[np.isfinite(dist)]
    return float(np.median(dist)) if dist.size else float("nan")


def _line_direction(x, y):
    """
    Dominant along-line direction (radians from the easting axis) and its strength.

    Axial mean of the nearest-neighbour vectors (angles doubled so that
    opposite vectors agree); strength 1 for parallel straight lines, near 0
    for scattered stations.
    """
    xy = np.column_stack([x, y])
    tree = cKDTree(xy)
    idx = _sample_index(len(xy), np.random.default_rng(1))
    _, nn = tree.query(xy[idx], k=2)
    d = xy[nn[:, 1]] - xy[idx]
    keep = np.hypot(d[:, 0], d[:, 1]) > 0
    angle = np.arctan2(d[keep, 1], d[keep, 0])
    mean = np.mean(np.exp(2j * angle)) if angle.size else 0.0
    return float(np.angle(mean) / 2), float(abs(mean))


def _has_lines(line):
    names = set(np.unique(line)) - {""}
    return len(names) >= 2


def _line_spacing(x, y, line):
    """
    Line spacing (m) from the station pattern.

    With line ids: median distance, across the station's own line, to the
    nearest station on another line running within 30° of it (tie lines that
    cross do not count). Without: the along-line direction is the axial mean of the
    nearest-neighbour vectors; for each station, the nearest station lying
    across the line (within one station spacing along the line and more than
    half a station spacing across) gives one across-line distance; the
    median is the line spacing. For scattered stations (no dominant
    direction) it is the mean spacing sqrt(hull area / n).
    """
    n = len(x)
    if n < 3:
        return float("nan")
    xy = np.column_stack([x, y])
    tree = cKDTree(xy)
    rng = np.random.default_rng(2)
    idx = _sample_index(n, rng)
    d_station = _station_spacing(x, y)
    if line is not None and _has_lines(line):
        # Only lines running within 30° of the station's own count (a tie line crossing it is
        # no measure of the spacing), and the distance is taken across the station's line.
        names, code = np.unique(line, return_inverse=True)
        direction = np.full((names.size, 2), np.nan)
        for j in range(names.size):
            members = xy[code == j]
            if names[j] != "" and len(members) >= 3 and np.ptp(members, axis=0).max() > 0:
                _, _, vt = np.linalg.svd(members - members.mean(axis=0), full_matrices=False)
                direction[j] = vt[0]
        found = np.full(len(idx), np.nan)
        todo = np.arange(len(idx))
        todo = todo[np.isfinite(direction[code[idx[todo]], 0])]
        for k in (64, 512, 4096):
            k = min(k, n)
            _, nn = tree.query(xy[idx[todo]], k=k)
            own = direction[code[idx[todo]]]
            cos = np.abs(np.einsum("ij,ikj->ik", own, direction[code[nn]]))
            other = (code[nn] != code[idx[todo]][:, None]) & (line[nn] != "") & (cos >= math.cos(math.radians(30.0)))
            normal = np.column_stack([-own[:, 1], own[:, 0]])
            across = np.abs(np.einsum("ikj,ij->ik", xy[nn] - xy[idx[todo]][:, None, :], normal))
            across = np.where(other & (across > 0.5 * d_station), across, np.inf)
            has = np.isfinite(across).any(axis=1)
            found[todo[has]] = across[has].min(axis=1)
            todo = todo[~has]
            if todo.size == 0 or k == n:
                break
        found = found[np.isfinite(found)]
        if found.size >= min(10, len(idx)):
            return float(np.median(found))
    angle, strength = _line_direction(x, y)
    if strength < 0.3:
        # Scattered stations: the mean spacing sqrt(area / n) stands in for
        # the line spacing.
        try:
            area = ConvexHull(xy - xy.mean(axis=0)).volume
        except QhullError:
            return d_station
        return max(d_station, math.sqrt(area / n))
    along = np.array([math.cos(angle), math.sin(angle)])
    across = np.array([-along[1], along[0]])
    found = np.full(len(idx), np.nan)
    todo = np.arange(len(idx))
    for k in (64, 512, 4096):
        k = min(k, n)
        _, nn = tree.query(xy[idx[todo]], k=k)
        delta = xy[nn] - xy[idx[todo]][:, None, :]
        ds = np.abs(delta @ along)
        du = np.abs(delta @ across)
        ok = (ds <= d_station) & (du > 0.5 * d_station)
        du = np.where(ok, du, np.inf).min(axis=1)
        has = np.isfinite(du)
        found[todo[has]] = du[has]
        todo = todo[~has]
        if todo.size == 0 or k == n:
            break
    found = found[np.isfinite(found)]
    return float(np.median(found)) if found.size else d_station


def station_spacing(stations):
    """
    Typical along-line station spacing.

    Parameters
    ----------
    stations : Stations
        Stations in a projected CRS (metres).

    Returns
    -------
    spacing : float
        Median distance to the nearest other station, in m (NaN for fewer
        than two stations). Duplicated positions are ignored.
    """
    x, y, _ = _valid_xy(stations)
    return _station_spacing(x, y)


def line_spacing(stations):
    """
    Typical distance between survey lines.

    Parameters
    ----------
    stations : Stations
        Stations in a projected CRS (metres), with ``line_id`` when known.

    Returns
    -------
    spacing : float
        In m. With line ids (at least two lines), the median distance across
        a station's line to the nearest station on another line within 30° of
        it (crossing tie lines do not count). Without, the median
        across-line distance to the nearest station on a neighbouring line,
        the lines' direction being the dominant direction of the
        nearest-neighbour vectors (this assumes roughly parallel lines). NaN for fewer
        than three stations. Scattered stations (no dominant direction of
        the nearest-neighbour vectors) give the mean spacing
        sqrt(convex-hull area / n) instead.
    """
    x, y, line = _valid_xy(stations)
    return _line_spacing(x, y, line)


# ---------------------------------------------------------------------------
# Block reduction, windows and the local spline


def _block_reduce(x, y, v, w, line, size):
    """Median of coordinates and values per (line, block); mean weight. Returns arrays."""
    ix = np.floor((x - x.min()) / size).astype(np.int64)
    iy = np.floor((y - y.min()) / size).astype(np.int64)
    codes, line_index = np.unique(line, return_inverse=True)
    key = (line_index.astype(np.int64) * (iy.max() + 1) + iy) * (ix.max() + 1) + ix
    frame = pd.DataFrame({"key": key, "x": x, "y": y, "v": v, "w": w, "line": line_index})
    grouped = frame.groupby("key", sort=True)
    median = grouped[["x", "y", "v"]].median()
    other = grouped.agg(w=("w", "mean"), line=("line", "first"))
    return (median["x"].to_numpy(), median["y"].to_numpy(), median["v"].to_numpy(),
            other["w"].to_numpy(), codes[other["line"].to_numpy()], len(median))


class _Windows:
    """
    Overlapping square windows on a lattice, blended by a partition of unity.

    Window (i, j) owns the core [x0 + i S, x0 + (i+1) S] × [...]; its weight
    ramps linearly from 0 to 1 over a band of width b centred on each core
    edge (except at the outer edges), so the weights of all windows sum to 1.
    Its spline is fitted to the data within the weight's support plus a
    margin m.
    """

    def __init__(self, x0, y0, size, nx, ny, margin):
        self.x0, self.y0, self.size, self.nx, self.ny, self.margin = x0, y0, size, nx, ny, margin
        self.blend = _BLEND * size if (nx > 1 or ny > 1) else 0.0

    @classmethod
    def plan(cls, region, n_points, area, max_points, spacing_line):
        west, east, south, north = region
        margin = _MARGIN_LINES * spacing_line
        width, height = east - west, north - south
        if n_points <= max_points:
            return cls(west, south, max(width, height, spacing_line) * (1 + 1e-9), 1, 1, margin)
        density = n_points / max(area, 1e-12)
        size = (math.sqrt(max_points / density) - 2 * margin) / (1 + _BLEND)
        size = max(size, 2 * spacing_line)
        nx = max(1, int(math.ceil(width / size)))
        ny = max(1, int(math.ceil(height / size)))
        return cls(west, south, size, nx, ny, margin)

    def _weights_1d(self, coord, i, n, origin):
        lo, hi = origin + i * self.size, origin + (i + 1) * self.size
        b = self.blend

        def ramp(z):
            if b == 0:
                return (z >= 0).astype(float)
            return np.clip(z / b + 0.5, 0.0, 1.0)

        left = np.ones_like(coord) if i == 0 else ramp(coord - lo)
        right = np.zeros_like(coord) if i == n - 1 else ramp(coord - hi)
        return left - right

    def support(self, i, j):
        """(west, east, south, north) where window (i, j) has nonzero weight."""
        h = self.blend / 2
        west = -np.inf if i == 0 else self.x0 + i * self.size - h
        east = np.inf if i == self.nx - 1 else self.x0 + (i + 1) * self.size + h
        south = -np.inf if j == 0 else self.y0 + j * self.size - h
        north = np.inf if j == self.ny - 1 else self.y0 + (j + 1) * self.size + h
        return west, east, south, north

    def weights(self, i, j, x, y):
        return (self._weights_1d(x, i, self.nx, self.x0) * self._weights_1d(y, j, self.ny, self.y0))

    def data_box(self, i, j, region):
        west, east, south, north = self.support(i, j)
        rw, re, rs, rn = region
        m = self.margin
        return (max(west, rw) - m, min(east, re) + m, max(south, rs) - m, min(north, rn) + m)

    def core_index(self, x, y):
        i = np.clip(np.floor((x - self.x0) / self.size).astype(int), 0, self.nx - 1)
        j = np.clip(np.floor((y - self.y0) / self.size).astype(int), 0, self.ny - 1)
        return i, j

    def __iter__(self):
        for j in range(self.ny):
            for i in range(self.nx):
                yield i, j


def _in_box(x, y, box):
    west, east, south, north = box
    return (x >= west) & (x <= east) & (y >= south) & (y <= north)


class _Projection:
    """
    Householder reflections H = H3 H2 H1 with H P = [R; 0] for P = [1, ξ, η].

    With c = Hᵀ [0; γ] (so that Pᵀ c = 0), the spline system reduces to
    (H M Hᵀ)₂₂ γ = (H v)₂ with M = Φ + λ W⁻¹, which is positive definite
    for a conditionally positive-definite kernel (order 2), so a Cholesky
    factorisation solves it; then R a = (H v)₁ − (H M Hᵀ)₁₂ γ.
    H is kept as I − W Yᵀ (W, Y of shape (n, 3)), so H M Hᵀ is one rank-6
    update of M.
    """

    def __init__(self, xy):
        n = len(xy)
        poly = np.column_stack([np.ones(n), xy])
        w_cols, y_cols = [], []
        for k in range(3):
            u = poly[:, k].copy()
            u[:k] = 0.0
            norm = np.linalg.norm(u)
            u[k] += math.copysign(norm, u[k])
            length = np.linalg.norm(u)
            if length > 0:
                u /= length
            poly -= 2.0 * np.outer(u, u @ poly)
            if w_cols:
                big_w, big_y = np.column_stack(w_cols), np.column_stack(y_cols)
                y_new = 2.0 * (u - big_y @ (big_w.T @ u))
            else:
                y_new = 2.0 * u
            w_cols.append(u)
            y_cols.append(y_new)
        self.w, self.y = np.column_stack(w_cols), np.column_stack(y_cols)
        self.r = poly[:3, :3]

    def apply(self, matrix):
        """H M Hᵀ for a symmetric (n, n) matrix (a new array)."""
        a = matrix @ self.y
        b = a - 0.5 * self.w @ (self.y.T @ a)
        return matrix - np.hstack([self.w, b]) @ np.hstack([b, self.w]).T

    def apply_diagonal(self, diagonal):
        """H D Hᵀ for D = diag(``diagonal``)."""
        diagonal = np.asarray(diagonal, dtype=float)
        if np.ptp(diagonal) == 0:
            return diagonal[0] * np.eye(len(diagonal))  # H is orthogonal
        return self.apply(np.diag(diagonal))

    def vector(self, v):
        """H v."""
        return v - self.w @ (self.y.T @ v)

    def back(self, gamma):
        """c = Hᵀ [0; γ]."""
        x = np.concatenate([np.zeros(3), gamma])
        return x - self.y @ (self.w.T @ x)

    def solve(self, kernel_part, diagonal_part, v, damping):
        m = kernel_part + damping * diagonal_part
        hv = self.vector(v)
        try:
            factor = linalg.cho_factor(m[3:, 3:], check_finite=False)
            gamma = linalg.cho_solve(factor, hv[3:], check_finite=False)
        except linalg.LinAlgError:
            gamma = linalg.lstsq(m[3:, 3:], hv[3:], check_finite=False)[0]
        a = linalg.lstsq(self.r, hv[:3] - m[:3, 3:] @ gamma, check_finite=False)[0]
        return self.back(gamma), a


class _LocalSpline:
    """Damped spline s(x) = Σ c_k φ(|x − x_k|) + a0 + a1 ξ + a2 η, coordinates in line spacings."""

    def __init__(self, kernel, centre, scale):
        self.kernel, self.centre, self.scale = kernel, np.asarray(centre), scale

    def _scaled(self, x, y):
        return np.column_stack([(x - self.centre[0]) / self.scale, (y - self.centre[1]) / self.scale])

    def matrix(self, x, y):
        xy = self._scaled(x, y)
        return xy, self.kernel(_distances(xy, xy))

    @staticmethod
    def solve(phi, xy, v, w, damping):
        """Solve (Φ + λ W⁻¹) c + P a = v, Pᵀ c = 0; returns (c, a)."""
        projected = _Projection(xy)
        return projected.solve(projected.apply(phi), projected.apply_diagonal(1.0 / w), v, damping)

    def predict(self, xy_data, c, a, x, y):
        xy = self._scaled(x, y)
        out = np.empty(len(xy))
        chunk = max(1, 100_000 // max(len(xy_data), 1))  # keep temporaries in cache
        for start in range(0, len(xy), chunk):
            part = xy[start:start + chunk]
            out[start:start + chunk] = self.kernel(_distances(part, xy_data)) @ c + a[0] + part @ a[1:]
        return out


def _one_blas_thread():
    """Limit BLAS to one thread: the local systems are small and threads only contend."""
    from .parallel import limit_blas

    return limit_blas(1)


def _fit_windows(windows, region, px, py, pv, pw, tension, damping, scale, targets):
    """
    Fit the spline in every window and blend predictions at ``targets`` (x, y).

    Returns the blended values (NaN where no window had enough data).
    """
    tx, ty = targets
    r_max = _table_reach(windows, scale)
    kernel = _KernelTable(tension, r_max)
    total = np.zeros(len(tx))
    weight = np.zeros(len(tx))
    for i, j in windows:
        box = windows.support(i, j)
        sel_t = np.flatnonzero(_in_box(tx, ty, box))
        if sel_t.size == 0:
            continue
        dbox = windows.data_box(i, j, region)
        sel = np.flatnonzero(_in_box(px, py, dbox))
        if sel.size < _MIN_WINDOW_POINTS:
            continue
        centre = ((dbox[0] + dbox[1]) / 2, (dbox[2] + dbox[3]) / 2)
        spline = _LocalSpline(kernel, centre, scale)
        xy, phi = spline.matrix(px[sel], py[sel])
        c, a = spline.solve(phi, xy, pv[sel], pw[sel], damping)
        wt = windows.weights(i, j, tx[sel_t], ty[sel_t])
        total[sel_t] += wt * spline.predict(xy, c, a, tx[sel_t], ty[sel_t])
        weight[sel_t] += wt
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(weight > 0, total / weight, np.nan)


def _table_reach(windows, scale):
    """Largest distance (line spacings) between two points of one window's data box."""
    side = windows.size + windows.blend + 2 * windows.margin
    return 1.5 * math.sqrt(2) * side / scale + 1.0


# ---------------------------------------------------------------------------
# Cross-validation


def _fold_ids(px, py, line, cv, folds, spacing_line, angle, seed):
    """Fold number of each reduced point, and the CV mode actually used."""
    rng = np.random.default_rng(seed)
    n = len(px)
    if cv == "lines" and not _has_lines(line):
        logger.info("no line ids: cross-validating with blocks one line spacing wide instead of lines")
        cv = "blocks"
    if cv == "lines":
        names, index = np.unique(line, return_inverse=True)
        across = np.array([-math.sin(angle), math.cos(angle)])
        position = pd.Series(np.column_stack([px, py]) @ across).groupby(index).mean()
        rank = np.empty(len(names), dtype=int)
        rank[position.sort_values(kind="stable").index.to_numpy()] = np.arange(len(names))
        k = min(folds, len(names))
        # Interleave: neighbouring lines fall in different folds, so each
        # test line keeps its neighbours in the training set.
        return (rank % k)[index], cv, k
    if cv == "blocks":
        bx = np.floor((px - px.min()) / spacing_line).astype(np.int64)
        by = np.floor((py - py.min()) / spacing_line).astype(np.int64)
        _, block = np.unique(bx * (by.max() + 1) + by, return_inverse=True)
        k = min(folds, block.max() + 1)
        assign = rng.permutation(block.max() + 1) % k
        return assign[block], cv, k
    k = min(folds, n)
    return rng.permutation(n) % k, cv, k


def _cross_validate(windows, region, px, py, pv, pw, fold, k, tensions, dampings, scale, seed):
    """Pooled CV residuals for each (tension, damping) over a sample of windows."""
    rng = np.random.default_rng(seed)
    core_i, core_j = windows.core_index(px, py)
    candidates = [(i, j) for i, j in windows if np.count_nonzero((core_i == i) & (core_j == j)) >= 3]
    if len(candidates) > _CV_WINDOWS:
        pick = rng.choice(len(candidates), _CV_WINDOWS, replace=False)
        candidates = [candidates[p] for p in sorted(pick)]
    r_max = _table_reach(windows, scale)
    tables = {t: _KernelTable(t, r_max) for t in tensions}
    windows_data = []
    for i, j in candidates:
        dbox = windows.data_box(i, j, region)
        sel = np.flatnonzero(_in_box(px, py, dbox))
        in_core = (core_i[sel] == i) & (core_j[sel] == j)
        centre = ((dbox[0] + dbox[1]) / 2, (dbox[2] + dbox[3]) / 2)
        windows_data.append((sel, in_core, centre))
    # Two stages: every tension at the middle damping, then every damping
    # at the best tension.
    middle = sorted(dampings)[(len(dampings) - 1) // 2]
    first = _cv_scores(windows_data, tables, tensions, (middle,), px, py, pv, pw, fold, k, scale)
    best_t = min(first, key=lambda key: first[key][0] / max(first[key][1], 1))[0]
    rest = tuple(d for d in dampings if d != middle)
    second = _cv_scores(windows_data, tables, (best_t,), rest, px, py, pv, pw, fold, k, scale) if rest else {}
    rows = []
    for (t, d), (s, n) in {**first, **second}.items():
        rows.append({"tension": t, "damping": d,
                     "cv_rmse_mv": math.sqrt(s / n) if n else float("nan"), "n_test": n})
    return pd.DataFrame(rows).sort_values(["tension", "damping"], ignore_index=True)


def _cv_scores(windows_data, tables, tensions, dampings, px, py, pv, pw, fold, k, scale):
    """Sum of squared CV residuals and their count for each (tension, damping)."""
    sq = {(t, d): 0.0 for t in tensions for d in dampings}
    count = {(t, d): 0 for t in tensions for d in dampings}
    for sel, in_core, centre in windows_data:
        for t in tensions:
            spline = _LocalSpline(tables[t], centre, scale)
            xy, phi = spline.matrix(px[sel], py[sel])
            for f in range(k):
                test = in_core & (fold[sel] == f)
                train = fold[sel] != f
                if not test.any() or np.count_nonzero(train) < _MIN_WINDOW_POINTS:
                    continue
                projection = _Projection(xy[train])
                kernel_part = projection.apply(phi[np.ix_(train, train)])
                diagonal_part = projection.apply_diagonal(1.0 / pw[sel][train])
                cross = phi[np.ix_(test, train)]
                for d in dampings:
                    c, a = projection.solve(kernel_part, diagonal_part, pv[sel][train], d)
                    pred = cross @ c + a[0] + xy[test] @ a[1:]
                    res = pv[sel][test] - pred
                    sq[(t, d)] += float(np.sum(res**2))
                    count[(t, d)] += int(res.size)
    return {key: (sq[key], count[key]) for key in sq}


# ---------------------------------------------------------------------------
# Public entry points


def _nice(value, *, up=False):
    """Round to 1, 2, 2.5 or 5 × 10^k (down unless ``up``)."""
    if not np.isfinite(value) or value <= 0:
        return value
    exponent = math.floor(math.log10(value))
    steps = np.array([1.0, 2.0, 2.5, 5.0, 10.0]) * 10.0**exponent
    if up:
        return float(steps[np.searchsorted(steps, value * (1 - 1e-12))])
    return float(steps[np.searchsorted(steps, value * (1 + 1e-12), side="right") - 1])


def _nodes(x, y, cell):
    west, east = math.floor(x.min() / cell) * cell, math.ceil(x.max() / cell) * cell
    south, north = math.floor(y.min() / cell) * cell, math.ceil(y.max() / cell) * cell
    easting = west + cell * np.arange(int(round((east - west) / cell)) + 1)
    northing = south + cell * np.arange(int(round((north - south) / cell)) + 1)
    return easting, northing


def _candidates(value, name, default):
    if isinstance(value, str):
        if value != "cv":
            raise OptionError("[grid]", f"{name} = {value!r} is not understood.",
                              f"Use \"cv\" or a number (or a list of numbers) for {name}.")
        return tuple(default)
    values = tuple(float(v) for v in np.atleast_1d(value))
    if not values:
        raise OptionError("[grid]", f"{name} is an empty list.", f"Use \"cv\" or give at least one value for {name}.")
    return values


def check_grid_options(**options):
    """
    Refuse out-of-range ``[grid]`` options with an OptionError (exit 2).

    Takes :func:`grid_stations`'s keyword options (missing ones at their
    defaults): the checks it makes first, called by every run before
    anything is written and by ``geosp check``.
    """
    import inspect

    a = {name: p.default for name, p in inspect.signature(grid_stations).parameters.items()
         if p.default is not inspect.Parameter.empty}
    a.update(options)
    _check_options(a["method"], a["cv"], _candidates(a["tension"], "tension", TENSIONS),
                   _candidates(a["damping"], "damping", DAMPINGS))


def _check_options(method, cv, tensions, dampings):
    if method not in _METHODS:
        raise OptionError("[grid]", f"method = {method!r} is not known.", f"Use one of {', '.join(_METHODS)}.")
    if cv not in _CV_MODES:
        raise OptionError("[grid]", f"cv = {cv!r} is not known.", f"Use one of {', '.join(_CV_MODES)}.")
    if any(not 0 <= t < 1 for t in tensions):
        raise OptionError("[grid]", f"tension {tensions} is outside [0, 1).",
                          "Use values from 0 (biharmonic) up to, say, 0.95.")
    if any(d <= 0 for d in dampings):
        raise OptionError("[grid]", f"damping {dampings} must be positive.", "Use values such as 1e-3.")
    if cv == "none" and (len(tensions) > 1 or len(dampings) > 1):
        raise OptionError("[grid]", "cv = \"none\" needs a single tension and a single damping.",
                          "Give numbers for tension and damping, or use cv = \"lines\".")


def grid_stations(
    stations,
    *,
    method="tension_spline",
    cell_size_m="auto",
    tension="cv",
    damping="cv",
    block_size_m="auto",
    mask_distance_m="auto",
    cv="lines",
    cv_folds=5,
    max_points=400,
    max_nodes=1_500_000,
    seed=0,
):
    """
    Grid station SP values with a damped spline in tension.

    Parameters
    ----------
    stations : Stations
        Stations in a projected CRS (metres). ``sp_mv`` (mV) is gridded;
        stations with NaN ``sp_mv``, non-finite coordinates or zero
        ``weight`` are ignored. ``weight`` scales each station's damping
        (a block's damping is ``damping / mean weight``).
    method : {"tension_spline", "biharmonic_spline"}, optional
        Interpolator. ``"tension_spline"`` (default) uses the Green's
        function g(r) = K0(p r) + ln(p r) [WesselBercovici1998]_;
        ``"biharmonic_spline"`` fixes the tension at 0, which is the spline
        of [Sandwell1987]_ (it can overshoot between lines).
    cell_size_m : float or "auto", optional
        Node spacing in m. "auto" (default): a quarter of the line spacing
        when lines are more than two station spacings apart, else half the
        station spacing, rounded down to 1, 2, 2.5 or 5 × 10^k, and enlarged
        if the grid would exceed ``max_nodes``.
    tension : float, list of floats or "cv", optional
        Tension t in [0, 1): 0 is the biharmonic (minimum-curvature) spline,
        values towards 1 a membrane. The tension wavenumber is
        p = sqrt(t / (1 − t)) / line spacing. "cv" (default) tries
        0, 0.3, 0.6 and 0.9 and keeps the one with the smallest CV RMSE.
    damping : float, list of floats or "cv", optional
        Damping λ > 0 added to the kernel diagonal (kernel in line-spacing
        units, so λ is dimensionless): 0 would interpolate exactly, larger
        values smooth more. "cv" (default) tries 1e-4, 1e-3, 1e-2 and 1e-1.
    block_size_m : float or "auto", optional
        Side of the median block reduction in m; "auto" (default) is a third
        of the line spacing. Blocks never mix lines.
    mask_distance_m : float or "auto", optional
        Nodes farther than this from every station are NaN; "auto"
        (default) is 0.6 × the line spacing (measured across the lines,
        crossing tie lines left out). Nodes outside the convex hull of the
        stations (widened by half a cell diagonal, so that every station's
        nearest node has a value) are NaN too; a lone NaN node whose 8
        neighbours are all but one kept is kept.
    cv : {"lines", "blocks", "random", "none"}, optional
        Cross-validation folds. "lines" (default): whole lines are left out,
        neighbouring lines in different folds (needs line ids; otherwise
        "blocks" is used). "blocks": square blocks one line spacing wide.
        "random": random points, which rewards along-line interpolation and
        underestimates the error between lines (for comparison only).
        "none": no cross-validation (needs a single tension and damping).
    cv_folds : int, optional
        Number of folds. Default 5.
    max_points : int, optional
        Target number of reduced points in one local spline window; more
        points are split into overlapping windows. Default 400.
    max_nodes : int, optional
        Most grid nodes allowed (rows × columns). Default 1 500 000.
    seed : int, optional
        Seed for fold assignment and the choice of CV windows. Default 0.

    Returns
    -------
    result : GridResult
        ``grid`` (mV, NaN outside the mask), ``distance`` (m to the nearest
        station, unmasked), ``method``, ``params`` (chosen cell size, tension,
        damping, spacings, window layout...), ``cv_rmse_mv`` (NaN with
        ``cv="none"``), ``mask_distance_m`` and ``cv_table`` (pandas
        DataFrame with one row per tension and damping tried). ``grid.tags``
        holds units, method, parameters, ``cv_rmse_mv`` and
        ``mask_distance_m`` for the GeoTIFF.

    Raises
    ------
    InputError
        If fewer than 3 usable stations remain or they are collinear.
    OptionError
        For an unknown method or CV mode, out-of-range values, or a cell
        size giving more than ``max_nodes`` nodes.

    Notes
    -----
    The spline is s(x) = Σ c_k φ(|x − x_k|) + a0 + a1 x + a2 y with
    Σ c_k = Σ c_k x_k = Σ c_k y_k = 0 and (Φ + λ W⁻¹) c + P a = v, where
    φ = 4 (g(0) − g(r)) / p² for t > 0 (g from [WesselBercovici1998]_,
    g(0) = ln 2 − γ) and φ = r² (ln r − 1) for t = 0 [Sandwell1987]_.
    Splines in tension suppress the overshoot of minimum-curvature
    splines [SmithWessel1990]_.

    For speed, reduced points are split into square windows on a lattice,
    each fitted with its data plus a margin of two line spacings; window
    predictions are blended with piecewise-linear weights that sum to one.
    CV fits the same windows (a sample of at most 16) and scores points in
    each window's core.

    Values between lines are interpolated, not measured: fit sources to
    stations, never to grid nodes.
    """
    with _one_blas_thread():
        return _grid_stations(stations, method, cell_size_m, tension, damping, block_size_m,
                              mask_distance_m, cv, cv_folds, max_points, max_nodes, seed)


def _grid_stations(stations, method, cell_size_m, tension, damping, block_size_m,
                   mask_distance_m, cv, cv_folds, max_points, max_nodes, seed):
    tensions = _candidates(tension, "tension", TENSIONS)
    dampings = _candidates(damping, "damping", DAMPINGS)
    if method == "biharmonic_spline":
        tensions = (0.0,)
    _check_options(method, cv, tensions, dampings)

    x, y, v, w, line = _usable(stations)
    spacing_station = _station_spacing(x, y)
    spacing_line = _line_spacing(x, y, line)
    if not np.isfinite(spacing_line) or spacing_line <= 0:
        spacing_line = spacing_station
    angle, _ = _line_direction(x, y)

    block = _auto(block_size_m, spacing_line / 3, "block_size_m")
    mask_distance = _auto(mask_distance_m, 0.6 * spacing_line, "mask_distance_m")
    cell = _cell_size(cell_size_m, x, y, spacing_station, spacing_line, max_nodes)
    easting, northing = _nodes(x, y, cell)

    px, py, pv, pw, pline, n_blocks = _block_reduce(x, y, v, w, line, block)
    hull = _hull(x, y)
    region = (easting[0], easting[-1], northing[0], northing[-1])
    windows = _Windows.plan(region, len(px), hull.volume, max_points, spacing_line)
    reach = _table_reach(windows, spacing_line)
    if reach / _TABLE_STEP > _MAX_TABLE:
        raise InputError(
            "stations", f"the stations span {(region[1] - region[0]) / 1000:.0f} × "
            f"{(region[3] - region[2]) / 1000:.0f} km with lines about {spacing_line:.0f} m apart, so one "
            f"interpolation window would reach {reach:.0f} line spacings.",
            "Look for stations with wrong coordinates (a typo or another CRS) and remove them, or grid "
            "separate survey areas separately.")

    if cv != "none":
        fold, cv_used, k = _fold_ids(px, py, pline, cv, cv_folds, spacing_line, angle, seed)
        table = _cross_validate(windows, region, px, py, pv, pw, fold, k, tensions, dampings,
                                spacing_line, seed)
        best = table["cv_rmse_mv"].idxmin() if table["cv_rmse_mv"].notna().any() else 0
        best_t, best_d = float(table.loc[best, "tension"]), float(table.loc[best, "damping"])
        cv_rmse = float(table.loc[best, "cv_rmse_mv"])
    else:
        table, cv_used, k = None, "none", 0
        best_t, best_d, cv_rmse = tensions[0], dampings[0], float("nan")

    distance, inside = _distance_and_mask(easting, northing, x, y, hull, mask_distance)
    params = {
        "method": method,
        "cell_size_m": cell,
        "block_size_m": block,
        "tension": best_t,
        "damping": best_d,
        "tension_length_m": (spacing_line / _tension_wavenumber(best_t)) if best_t > 0 else None,
        "line_spacing_m": spacing_line,
        "station_spacing_m": spacing_station,
        "mask_distance_m": mask_distance,
        "cv": cv_used,
        "cv_folds": k,
        "n_stations": len(x),
        "n_blocks": int(n_blocks),
        "max_points": max_points,
        "window_size_m": windows.size,
        "window_margin_m": windows.margin,
        "windows": [windows.nx, windows.ny],
    }
    values = _evaluate(windows, region, params, px, py, pv, pw, easting, northing, inside)
    return _result(easting, northing, values, distance, stations.crs, params, cv_rmse, table)


def _usable(stations):
    v = np.asarray(stations.sp_mv, dtype=float)
    w = np.asarray(stations.weight, dtype=float)
    ok = (np.isfinite(stations.easting) & np.isfinite(stations.northing) & np.isfinite(v)
          & np.isfinite(w) & (w > 0))
    if np.count_nonzero(ok) < 3:
        raise InputError("stations", f"only {np.count_nonzero(ok)} stations have an SP value and a "
                         "positive weight; gridding needs at least 3.",
                         "Check the sp_mv column and the reduction flags.")
    return (stations.easting[ok], stations.northing[ok], v[ok], w[ok],
            np.asarray(stations.line_id, dtype=str)[ok])


def _auto(value, default, name):
    if isinstance(value, str):
        if value != "auto":
            raise OptionError("[grid]", f"{name} = {value!r} is not understood.",
                              f"Use \"auto\" or a distance in metres for {name}.")
        return float(default)
    if not value > 0:
        raise OptionError("[grid]", f"{name} = {value} must be positive.", f"Give {name} in metres.")
    return float(value)


def _cell_size(cell_size_m, x, y, spacing_station, spacing_line, max_nodes):
    def count(cell):
        return ((math.ceil(x.max() / cell) - math.floor(x.min() / cell) + 1)
                * (math.ceil(y.max() / cell) - math.floor(y.min() / cell) + 1))

    if cell_size_m == "auto":
        raw = spacing_line / 4 if spacing_line > 2 * spacing_station else spacing_station / 2
        cell = _nice(raw)
        while count(cell) > max_nodes:
            cell = _nice(cell * max(1.01, math.sqrt(count(cell) / max_nodes)), up=True)
        return cell
    cell = _auto(cell_size_m, 0.0, "cell_size_m")
    if count(cell) > max_nodes:
        raise OptionError("[grid]", f"cell_size_m = {cell} gives {count(cell)} nodes, more than "
                          f"max_nodes = {max_nodes}.", "Use a larger cell size or raise max_nodes.")
    return cell


def _hull(x, y):
    try:
        return ConvexHull(np.column_stack([x - x.mean(), y - y.mean()]))
    except QhullError:
        raise InputError("stations", "all usable stations lie on one straight line (or one point), "
                         "so there is no area to grid.",
                         "Grid surveys with at least two lines; plot single lines as profiles.") from None


def _distance_and_mask(easting, northing, x, y, hull, mask_distance):
    ge, gn = np.meshgrid(easting, northing)
    tree = cKDTree(np.column_stack([x, y]))
    distance, _ = tree.query(np.column_stack([ge.ravel(), gn.ravel()]))
    distance = distance.reshape(ge.shape)
    inside = distance <= mask_distance
    # A lone blank node among grid nodes (at least 7 of its 8 neighbours kept), where two lines
    # run a little wider apart than usual, is kept too: a pinhole says nothing a reader can use.
    from scipy import ndimage

    neighbours = ndimage.convolve(inside.astype(np.int8), np.ones((3, 3), np.int8), mode="constant")
    inside |= neighbours >= 7
    cand = np.flatnonzero(inside)
    eq = hull.equations
    pts = np.column_stack([ge.ravel()[cand] - x.mean(), gn.ravel()[cand] - y.mean()])
    # Nodes within half a cell diagonal outside the hull stay: the hull runs through the outer
    # stations, and the node nearest to each of them must hold a value.
    cell = max(abs(easting[1] - easting[0]) if len(easting) > 1 else 0.0,
               abs(northing[1] - northing[0]) if len(northing) > 1 else 0.0)
    tol = max(0.5 * math.sqrt(2.0) * cell, 1e-9 * max(np.ptp(x), np.ptp(y), 1.0))
    out_hull = np.any(pts @ eq[:, :2].T + eq[:, 2] > tol, axis=1)
    inside.ravel()[cand[out_hull]] = False
    return distance, inside


def _evaluate(windows, region, params, px, py, pv, pw, easting, northing, inside):
    ge, gn = np.meshgrid(easting, northing)
    values = np.full(ge.shape, np.nan)
    idx = np.flatnonzero(inside)
    if idx.size:
        values.ravel()[idx] = _fit_windows(
            windows, region, px, py, pv, pw, params["tension"], params["damping"],
            params["line_spacing_m"], (ge.ravel()[idx], gn.ravel()[idx]))
    return values


def _result(easting, northing, values, distance, crs, params, cv_rmse, table):
    tags = {
        "units": "mV",
        "method": params["method"],
        "cv_rmse_mv": cv_rmse,
        "mask_distance_m": params["mask_distance_m"],
        "parameters": "; ".join(f"{k}={v}" for k, v in params.items() if k != "method"),
    }
    for key in ("cell_size_m", "tension", "damping", "block_size_m", "line_spacing_m", "cv"):
        tags[key] = params[key]
    grid = Raster(easting, northing, values, crs, units="mV", tags=tags)
    dist = Raster(easting, northing, distance, crs, units="m",
                  tags={"units": "m", "description": "distance to the nearest station"})
    return GridResult(grid=grid, distance=dist, method=params["method"], params=params,
                      cv_rmse_mv=cv_rmse, mask_distance_m=params["mask_distance_m"], cv_table=table)


def grid_like(result, stations, values):
    """
    Grid other per-station values the way ``result`` was gridded.

    Uses the same nodes, mask, block size, windows, tension and damping as
    ``result`` (no new cross-validation), for example to grid residuals or
    modelled SP comparably with the observed grid.

    Parameters
    ----------
    result : GridResult
        Output of :func:`grid_stations`.
    stations : Stations
        Station positions (and weights, line ids) for ``values``.
    values : array, shape (n,)
        Value at each station in mV; NaN values are ignored.

    Returns
    -------
    grid : Raster
        In mV, NaN where ``result.grid`` is NaN.
    """
    values = np.asarray(values, dtype=float)
    if values.shape != (len(stations),):
        raise ValueError(f"Got {values.size} values for {len(stations)} stations.")
    x, y, v, w, line = _usable(stations.replace(sp_mv=values))
    p = result.params
    px, py, pv, pw, _, _ = _block_reduce(x, y, v, w, line, p["block_size_m"])
    g = result.grid
    region = (g.easting[0], g.easting[-1], g.northing[0], g.northing[-1])
    nx, ny = p["windows"]
    windows = _Windows(region[0], region[2], p["window_size_m"], nx, ny, p["window_margin_m"])
    inside = np.isfinite(g.values)
    with _one_blas_thread():
        out = _evaluate(windows, region, p, px, py, pv, pw, g.easting, g.northing, inside)
    return Raster(g.easting, g.northing, out, g.crs, units="mV", tags=dict(g.tags, cv_rmse_mv=float("nan")))


def sample_grid(raster, easting, northing):
    """
    Bilinear interpolation of a raster at points.

    Parameters
    ----------
    raster : Raster
        Grid with at least 2 × 2 nodes (for example a DEM in m).
    easting, northing : array
        Point coordinates in the raster's CRS, in m; any matching shapes.

    Returns
    -------
    values : array
        Same shape as ``easting``; NaN outside the node extent or where a
        surrounding node is NaN.
    """
    easting, northing = np.broadcast_arrays(np.asarray(easting, float), np.asarray(northing, float))
    e, n, grid = raster.easting, raster.northing, np.asarray(raster.values, float)
    if len(e) < 2 or len(n) < 2:
        raise ValueError("sample_grid needs at least 2 × 2 nodes.")
    fx = (easting - e[0]) / (e[1] - e[0])
    fy = (northing - n[0]) / (n[1] - n[0])
    inside = (fx >= 0) & (fx <= len(e) - 1) & (fy >= 0) & (fy <= len(n) - 1)
    fx = np.where(inside, fx, 0.0)
    fy = np.where(inside, fy, 0.0)
    i = np.clip(np.floor(fx).astype(np.int64), 0, len(e) - 2)
    j = np.clip(np.floor(fy).astype(np.int64), 0, len(n) - 2)
    tx, ty = fx - i, fy - j
    out = ((1 - tx) * (1 - ty) * grid[j, i] + tx * (1 - ty) * grid[j, i + 1]
           + (1 - tx) * ty * grid[j + 1, i] + tx * ty * grid[j + 1, i + 1])
    return np.where(inside, out, np.nan)
