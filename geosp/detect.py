"""
Dipolar anomalies along fault segments: a matched filter of fault-patch
templates, calibrated by decoys, with a shallow pole-pair rival.

For each segment (docs/concepts.md, detection):

1. the stations it owns (nearest segment, inside its corridor) are put in
   its local frame (s along strike, t toward the dip direction);
2. unit-jump patch templates g_m spanning the segment are projected against
   the nuisance B = [1, s, t] with weights W, giving the amplitude â_m and
   its standard error; the score is max |â_m/σ_â| and the polarity its sign;
3. the same statistic is computed for about ``n_decoys`` copies of the
   segment placed at random positions and rotations in the survey, away from
   mapped faults; the threshold is their (1 − false_alarm_rate) quantile,
   and at least ``min_score``;
4. detected segments are compared with a shallow pole pair (cultural
   sources such as casings or pipelines), and detected segments whose
   anomaly footprints (inner half of the corridors) share more than half
   their stations keep only the higher score.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import replace

import numpy as np
from scipy import optimize
from scipy.spatial import ConvexHull, QhullError, cKDTree

from .errors import OptionError
from .models import Detection
from .physics import forward
from .segments import assign_points, corridor_distance

#: Fewest owned stations for a segment to be scored (3 regional terms, one
#: amplitude and enough residual degrees of freedom for the noise estimate).
_MIN_STATIONS = 10
#: Fewest decoys for a calibrated threshold; with fewer, min_score is used.
_MIN_DECOYS = 20
#: Delta BIC above which the shallow pole pair is "clearly" better
#: (strong evidence on the Kass & Raftery scale [KassRaftery1995]_, from memory).
_CULTURAL_DELTA_BIC = 6.0
#: Nonlinear parameters counted in the BIC: template depth and height ratio;
#: pole pair two positions and a depth.
_K_TEMPLATE = 3 + 1 + 2
_K_POLE_PAIR = 3 + 1 + 5
#: Decoys with at least this fraction of the segment's station count may fill
#: up the decoy set when too few have as many (a footprint aligned with the
#: survey lines catches whole lines at its edges, a rotated copy rarely does).
_PARTIAL_FRACTION = 0.8
#: Most rounds of scoring undetected segments again with detected anomalies removed.
_DEFLATION_ROUNDS = 3
#: Anomaly footprint of a segment for the shared-anomaly rule, as a fraction
#: of the corridor (half-width and end extension).
_FOOTPRINT = 0.5
#: Fraction of footprint stations two detected segments may share before the
#: lower score is treated as the same anomaly.
_SHARED_FRACTION = 0.5


def detect_dipoles(stations, segments, *, corridor_m="auto",
                   template_top_depths_m=(50.0, 100.0, 200.0, 400.0),
                   template_height_ratios=(2.0, 4.0), template_sigma_ratios=(1.0, 0.25, 4.0),
                   false_alarm_rate=0.01,
                   n_decoys=200, min_score=4.0, cultural_max_depth_m=50.0, seed=0,
                   progress=None):
    """
    Score every fault segment for a dipolar SP anomaly.

    Parameters
    ----------
    stations : Stations
        Reduced SP (``sp_mv``, mV) at station positions in the working CRS
        (m). Stations with NaN ``sp_mv`` or zero ``weight`` are ignored;
        ``weight`` multiplies 1/σ² and finite ``sigma_mv`` (mV) enter the
        noise model.
    segments : sequence of FaultSegment
        From :func:`geosp.segments.make_segments`.
    corridor_m : float or "auto"
        Half-width of each segment's corridor (m), also its extension past
        the ends. "auto": 3 × the deepest template top, kept between 2 and
        8 line spacings (line spacing estimated from the station density).
    template_top_depths_m : list of float
        Depths of the template patch tops (m). Default 50, 100, 200, 400.
    template_height_ratios : list of float
        Template bottom depth over top depth. Default 2 and 4.
    template_sigma_ratios : list of float
        Conductivity ratios across the fault (dip-direction side over the
        other) of the templates: a contrast makes one lobe of the anomaly
        stronger than the other (docs/concepts.md). Default 1, 1/4 and 4;
        ``[1.0]`` for uniform conductivity only.
    false_alarm_rate : float
        Fraction of source-free segments allowed to be detected; sets the
        decoy quantile (1 − rate). Default 0.01.
    n_decoys : int
        Decoys per segment for the threshold. Default 200.
    min_score : float
        Lowest threshold, whatever the decoys say. Default 4.
    cultural_max_depth_m : float
        Deepest pole of the shallow pole-pair rival (m); a pole pair that
        fits a detected anomaly clearly better (ΔBIC > 6) marks it cultural.
        Default 50 m.
    seed : int
        Seed of the decoy placement; results are reproducible per segment.
    progress : callable or None
        Called as ``progress(n_done, n_total)`` after each segment.

    Returns
    -------
    detections : tuple of Detection
        One per segment, in the order given. ``station_index`` holds the
        stations the segment owns (nearest segment, inside its corridor);
        ``best_template`` the best template's ``depth_top_m``,
        ``depth_bottom_m``, ``dip_deg``, its amplitude ``jump_mv`` ±
        ``jump_sigma_mv`` (mV), the ``corridor_m`` used and, for detected
        segments, ``pole_pair_delta_bic`` (BIC of the template minus BIC of
        the best shallow pole pair). ``note`` says why in a few words.
        Unscored segments (too few stations) have NaN score and polarity 0.

    Raises
    ------
    OptionError
        If an option is out of range.

    Notes
    -----
    Noise: for each footprint (segment or decoy) the unit-weight scatter s
    (mV) is the weighted RMS residual after the regional plane and the best
    template, with N − 4 degrees of freedom, so that with no reading errors
    the score is a t statistic. Where ``sigma_mv`` is finite the geological
    part s_g² = max(s² − mean σ_read², 0) is added to each station's own
    reading variance, σ_i² = s_g² + σ_read,i², and the score is recomputed
    with W = weight/σ_i². Decoys go through exactly the same steps, so the
    threshold absorbs correlated (geological) noise and the maximum over
    templates.

    Deflation: decoys that land on a strong anomaly inflate the threshold of
    every segment in a small survey. So once segments are detected, the
    fields of their best templates (over all stations) are subtracted and
    the undetected segments are scored again, decoys included, on what
    remains; this repeats while new segments are detected (at most
    ``_DEFLATION_ROUNDS`` times). A segment's own score never has its own
    template removed.

    References
    ----------
    * [Telford1990]_ (pole pair)
    * [Schwarz1978]_ (BIC)
    * [KassRaftery1995]_
    """
    depths = np.asarray(template_top_depths_m, dtype=float).ravel()
    ratios = np.asarray(template_height_ratios, dtype=float).ravel()
    contrasts = np.asarray(template_sigma_ratios, dtype=float).ravel()
    _check_options(depths, ratios, contrasts, false_alarm_rate, n_decoys, min_score,
                   cultural_max_depth_m, corridor_m, seed)
    segments = tuple(segments)
    valid = np.isfinite(stations.sp_mv) & np.isfinite(stations.easting) \
        & np.isfinite(stations.northing) & (np.asarray(stations.weight, dtype=float) > 0)
    valid_index = np.flatnonzero(valid)
    data = _SurveyArrays(stations, valid_index)
    if corridor_m == "auto":
        corridor = _auto_corridor(data, depths)
    else:
        corridor = float(corridor_m)
    owned = assign_points(data.easting, data.northing, segments, corridor_m=corridor)
    fault_tree = _fault_tree(segments, corridor)

    crowded = set()  # segments whose decoys had to come near mapped faults

    def score(j, values):
        if owned[j].size < _MIN_STATIONS:
            return _unscored(segments[j], data.index[owned[j]])
        setup = _SegmentSetup(segments[j], owned[j], data, corridor, depths, ratios, contrasts,
                              int(n_decoys), fault_tree, np.random.default_rng([int(seed), j]))
        if setup.n_decoys >= _MIN_DECOYS and setup.relax[0] < 1.0:
            crowded.add(j)
        return _detect_segment(setup, values, data, false_alarm_rate, float(min_score),
                               float(cultural_max_depth_m))

    detections = []
    for j in range(len(segments)):
        detections.append(score(j, data.data))
        if progress is not None:
            progress(j + 1, len(segments))
    detections = _resolve_shared(detections, stations, valid_index, corridor)
    removed = set()
    for _ in range(_DEFLATION_ROUNDS):
        kept = [j for j, d in enumerate(detections) if d.detected and j not in removed]
        if not kept:
            break
        removed.update(kept)
        field = sum(_template_field(detections[j], data) for j in sorted(removed))
        names = ", ".join(detections[j].segment.segment_id for j in sorted(removed)) \
            if len(removed) <= 3 else f"{len(removed)} detected segments"
        again = [j for j, d in enumerate(detections)
                 if not d.detected and np.isfinite(d.score) and "shares its anomaly" not in d.note]
        for j in again:
            d = score(j, data.data - field)
            detections[j] = replace(d, note=f"{d.note}; scored with the anomalies of {names} removed")
        detections = _resolve_shared(detections, stations, valid_index, corridor)
        if not any(detections[j].detected for j in again):
            break
    scored = sum(np.isfinite(d.score) for d in detections)
    if scored and len(crowded) > scored / 2:
        warnings.warn(
            f"detect: {len(crowded)} of {scored} segments could only be calibrated with decoys near "
            f"mapped faults: the {corridor:.0f} m corridor is wide for this survey, so decoys catch real "
            "anomalies and thresholds rise. If the expected source tops are shallower than the deepest "
            f"template ({depths.max():g} m), set [detect] template_top_depths_m to shallower depths "
            "(the corridor is 3 times the deepest).", stacklevel=2)
    return tuple(detections)


def _template_field(detection, data):
    """The best template of a detected segment times its amplitude, at every valid station (mV)."""
    t = detection.best_template
    segment = detection.segment
    along, across = segment.to_local(data.easting, data.northing)
    unit = forward.patch_sp_local(
        along, across, centre_m=segment.length_m / 2.0, length_m=segment.length_m,
        depth_top_m=t["depth_top_m"], depth_bottom_m=t["depth_bottom_m"], dip_deg=t["dip_deg"],
        sigma_ratio=t["sigma_ratio"])
    return t["jump_mv"] * np.asarray(unit, dtype=float)


# --------------------------------------------------------------------------- options


def _check_options(depths, ratios, contrasts, false_alarm_rate, n_decoys, min_score,
                   cultural_max_depth_m, corridor_m, seed):
    problems = []
    if depths.size == 0 or not np.all(np.isfinite(depths) & (depths > 0)):
        problems.append(("template_top_depths_m", "must be a list of positive depths in m"))
    if ratios.size == 0 or not np.all(np.isfinite(ratios) & (ratios > 1)):
        problems.append(("template_height_ratios", "must be a list of ratios above 1"))
    if contrasts.size == 0 or not np.all(np.isfinite(contrasts) & (contrasts > 0)):
        problems.append(("template_sigma_ratios", "must be a list of positive conductivity ratios"))
    if not 0 < false_alarm_rate < 1:
        problems.append(("false_alarm_rate", "must lie between 0 and 1 (e.g. 0.01)"))
    if not isinstance(seed, (int, np.integer)) or seed < 0:
        problems.append(("seed", "must be a whole number >= 0"))
    if int(n_decoys) < 0:
        problems.append(("n_decoys", "must be 0 or more"))
    if not np.isfinite(min_score) or min_score < 0:
        problems.append(("min_score", "must be a number >= 0"))
    if not (np.isfinite(cultural_max_depth_m) and cultural_max_depth_m > 0):
        problems.append(("cultural_max_depth_m", "must be a positive depth in m"))
    if corridor_m != "auto":
        try:
            ok = float(corridor_m) > 0
        except (TypeError, ValueError):
            ok = False
        if not ok:
            problems.append(("corridor_m", 'must be a positive distance in m or "auto"'))
    if problems:
        name, text = problems[0]
        listed = "; ".join(f"{n} {t}" for n, t in problems)
        raise OptionError("project file", f"[detect] {listed}.",
                          "Fix the value in the [detect] section.", where=f"[detect] {name}")


class _SurveyArrays:
    """Valid stations as plain arrays, with a cell index for footprint queries."""

    def __init__(self, stations, valid_index):
        self.index = valid_index
        self.easting = np.asarray(stations.easting, dtype=float)[valid_index]
        self.northing = np.asarray(stations.northing, dtype=float)[valid_index]
        self.data = np.asarray(stations.sp_mv, dtype=float)[valid_index]
        self.weight = np.asarray(stations.weight, dtype=float)[valid_index]
        sigma = np.asarray(stations.sigma_mv, dtype=float)[valid_index]
        self.read_var = np.where(np.isfinite(sigma) & (sigma > 0), sigma ** 2, np.nan)
        self.spacing = _station_spacing(self.easting, self.northing)
        self.grid = _CellIndex(self.easting, self.northing)


class _CellIndex:
    """Stations bucketed in square cells: fast lists of stations in a box."""

    def __init__(self, easting, northing, per_cell=16):
        self.easting, self.northing = easting, northing
        if easting.size == 0:
            self.order = np.empty(0, dtype=int)
            return
        self.west, self.south = float(easting.min()), float(northing.min())
        width = max(float(easting.max()) - self.west, float(northing.max()) - self.south, 1.0)
        n_side = max(1, int(math.sqrt(easting.size / per_cell)))
        self.size = width / n_side + 1e-9
        self.nx = int((float(easting.max()) - self.west) / self.size) + 1
        self.ny = int((float(northing.max()) - self.south) / self.size) + 1
        ix = ((easting - self.west) / self.size).astype(int)
        iy = ((northing - self.south) / self.size).astype(int)
        cell = iy * self.nx + ix
        self.order = np.argsort(cell, kind="stable")
        self.start = np.searchsorted(cell[self.order], np.arange(self.nx * self.ny + 1))

    def query(self, low, high):
        """Indices of stations inside the box [low, high] (2-vectors, m)."""
        if self.order.size == 0:
            return self.order
        ix0 = max(int((low[0] - self.west) // self.size), 0)
        ix1 = min(int((high[0] - self.west) // self.size), self.nx - 1)
        iy0 = max(int((low[1] - self.south) // self.size), 0)
        iy1 = min(int((high[1] - self.south) // self.size), self.ny - 1)
        if ix0 > ix1 or iy0 > iy1:
            return np.empty(0, dtype=int)
        rows = [self.order[self.start[iy * self.nx + ix0]:self.start[iy * self.nx + ix1 + 1]]
                for iy in range(iy0, iy1 + 1)]
        return np.concatenate(rows)


def _station_spacing(easting, northing):
    """Median nearest-neighbour distance (m); NaN for fewer than 2 stations."""
    if easting.size < 2:
        return np.nan
    dist, _ = cKDTree(np.column_stack([easting, northing])).query(
        np.column_stack([easting, northing]), k=2)
    positive = dist[:, 1][dist[:, 1] > 0]
    return float(np.median(positive)) if positive.size else np.nan


def _line_spacing(data):
    """
    Line spacing (m) from the station density: hull area per station over
    the station spacing (for a line survey, area per station = line spacing
    × station spacing).
    """
    if data.easting.size < 3 or not np.isfinite(data.spacing):
        return np.nan
    try:
        area = ConvexHull(np.column_stack([data.easting, data.northing])).volume
    except QhullError:
        return np.nan
    return area / data.easting.size / data.spacing


def _auto_corridor(data, depths):
    corridor = 3.0 * float(np.max(depths))
    line = _line_spacing(data)
    if np.isfinite(line) and line > 0:
        corridor = float(np.clip(corridor, 2.0 * line, 8.0 * line))
    return corridor


def _fault_tree(segments, corridor):
    """KD-tree of points along every segment trace, at most corridor/8 apart."""
    points = []
    step = max(corridor / 8.0, 1.0)
    for seg in segments:
        c = np.asarray(seg.coords, dtype=float)
        for a, b in zip(c[:-1], c[1:]):
            n = max(int(math.ceil(np.hypot(*(b - a)) / step)), 1)
            f = np.linspace(0.0, 1.0, n + 1)[:, None]
            points.append(a + f * (b - a))
    if not points:
        return None
    return cKDTree(np.vstack(points))


# --------------------------------------------------------------------------- templates


def _templates(segment, depths, ratios, contrasts):
    """List of (depth_top_m, depth_bottom_m, dip_deg, sigma_ratio) for a segment."""
    dips = [90.0]
    dip = segment.dip_deg
    if segment.dip_known and np.isfinite(dip) and 0 < dip < 90:
        dips = [float(dip), 90.0]
    return [(float(z), float(z * r), d, float(c))
            for d in dips for c in contrasts for z in depths for r in ratios]


def _template_matrix(along, across, length, templates):
    """(N, M) unit-jump template values (mV per mV of jump) at the stations."""
    out = np.empty((along.size, len(templates)))
    columns = {}
    for dip, contrast in sorted({t[2:] for t in templates}):
        idx = [m for m, t in enumerate(templates) if t[2:] == (dip, contrast)]
        top = np.array([templates[m][0] for m in idx])[None, :]
        bottom = np.array([templates[m][1] for m in idx])[None, :]
        block = forward.patch_sp_local(
            along[:, None], across[:, None], centre_m=length / 2.0, length_m=length,
            depth_top_m=top, depth_bottom_m=bottom, dip_deg=dip, sigma_ratio=contrast,
        )
        columns.update(zip(idx, np.asarray(block).reshape(along.size, len(idx)).T))
    for m in range(len(templates)):
        out[:, m] = columns[m]
    return out


# --------------------------------------------------------------------------- matched filter


def _project(columns, along, across, data, weights, starts):
    """
    Weighted projection of template columns against B = [1, s, t], per group.

    Parameters
    ----------
    columns : (N, M) array
        Template values.
    along, across, data, weights : (N,) arrays
        Local coordinates (m), data (mV) and weights W_ii.
    starts : (G,) int array
        Start of each contiguous, non-empty group of rows.

    Returns
    -------
    gpg : (G, M) array
        gᵀWΠg.
    gpd : (G, M) array
        gᵀWΠd.
    dpd : (G,) array
        dᵀWΠd, the regional-only weighted residual sum of squares.

    Notes
    -----
    Π = I − B(BᵀWB)⁻¹BᵀW, so that â = gᵀWΠd / gᵀWΠg and σ_â = (gᵀWΠg)^(−1/2)
    (docs/concepts.md, detection). Everything comes from per-group sums, so
    any number of footprints is handled in one pass.
    """
    scale = max(float(np.max(np.abs(along))) if along.size else 1.0, 1.0)
    basis = np.column_stack([np.ones_like(along), along / scale, across / scale])  # (N, 3)
    wb = basis * weights[:, None]
    btwb = np.add.reduceat(wb[:, :, None] * basis[:, None, :], starts, axis=0)  # (G, 3, 3)
    btwg = np.add.reduceat(wb[:, :, None] * columns[:, None, :], starts, axis=0)  # (G, 3, M)
    btwd = np.add.reduceat(wb * data[:, None], starts, axis=0)  # (G, 3)
    wg = columns * weights[:, None]
    gwg = np.add.reduceat(wg * columns, starts, axis=0)  # (G, M)
    gwd = np.add.reduceat(wg * data[:, None], starts, axis=0)  # (G, M)
    dwd = np.add.reduceat(weights * data * data, starts)  # (G,)
    # Ridge of 1e-12 relative keeps degenerate footprints (e.g. one line) solvable.
    ridge = 1e-12 * np.trace(btwb, axis1=1, axis2=2)[:, None, None] * np.eye(3)
    solve_g = np.linalg.solve(btwb + ridge, btwg)  # (G, 3, M)
    solve_d = np.linalg.solve(btwb + ridge, btwd[:, :, None])[:, :, 0]  # (G, 3)
    gpg = gwg - np.einsum("gkm,gkm->gm", btwg, solve_g)
    gpd = gwd - np.einsum("gkm,gk->gm", btwg, solve_d)
    dpd = dwd - np.einsum("gk,gk->g", btwd, solve_d)
    return gpg, gpd, dpd


def _score_groups(columns, along, across, data, weight, read_var, starts):
    """
    Matched-filter scores of contiguous groups of stations (see Notes of
    :func:`detect_dipoles` for the noise model).

    Returns a dict of (G,) arrays: ``score``, ``best`` (template index),
    ``amplitude`` (mV of jump), ``amplitude_sigma`` (mV), ``noise`` (mV,
    unit-weight scatter), ``chi2`` (best template, with final weights),
    ``weights`` ((N,) final W).
    """
    counts = np.diff(np.append(starts, along.size))
    gpg, gpd, dpd = _project(columns, along, across, data, weight, starts)
    tiny = 1e-300
    z = gpd / np.sqrt(np.maximum(gpg, tiny))
    z = np.where(gpg > tiny, z, 0.0)
    best = np.argmax(np.abs(z), axis=1)
    rows = np.arange(len(starts))
    rss = np.maximum(dpd - z[rows, best] ** 2, 0.0)
    dof = np.maximum(counts - 4, 1)
    s2 = np.maximum(rss / dof, 1e-12)
    group = np.repeat(rows, counts)
    if np.any(np.isfinite(read_var)):
        finite = np.isfinite(read_var)
        sums = np.bincount(group, weights=np.where(finite, read_var, 0.0), minlength=len(starts))
        nfin = np.bincount(group, weights=finite.astype(float), minlength=len(starts))
        mean_read = np.where(nfin > 0, sums / np.maximum(nfin, 1), 0.0)
        geo = np.maximum(s2 - mean_read, 0.0)
        var = np.where(finite, geo[group] + np.where(finite, read_var, 0.0), s2[group])
        var = np.maximum(var, 1e-12)
        weights = weight / var
        gpg, gpd, dpd = _project(columns, along, across, data, weights, starts)
        z = np.where(gpg > tiny, gpd / np.sqrt(np.maximum(gpg, tiny)), 0.0)
        best = np.argmax(np.abs(z), axis=1)
        sigma_a = 1.0 / np.sqrt(np.maximum(gpg[rows, best], tiny))
        score = np.abs(z[rows, best])
        chi2 = np.maximum(dpd - z[rows, best] ** 2, 0.0)
    else:
        weights = weight / s2[group]
        score = np.abs(z[rows, best]) / np.sqrt(s2)
        sigma_a = np.sqrt(s2 / np.maximum(gpg[rows, best], tiny))
        chi2 = rss / s2
    amplitude = gpd[rows, best] / np.maximum(gpg[rows, best], tiny)
    return {"score": score, "best": best, "amplitude": amplitude, "amplitude_sigma": sigma_a,
            "noise": np.sqrt(s2), "chi2": chi2, "weights": weights, "z": z}


# --------------------------------------------------------------------------- decoys


def _decoy_footprints(segment, n_real, data, corridor, n_decoys, fault_tree, rng):
    """
    Place up to ``n_decoys`` copies of the segment's corridor at random
    positions (centred near random stations) and rotations, with the trace at
    least ``corridor`` from every mapped fault and at least ``n_real``
    stations inside.

    When fewer than ``n_decoys`` such copies turn up in a few rounds of
    candidates, copies with at least 80 % of ``n_real`` stations fill the
    rest (a rotated copy of a footprint that happens to catch whole lines
    rarely catches as many). When fewer than _MIN_DECOYS are found at all,
    the fault distance is relaxed to corridor/2 (never further: decoys over
    a real anomaly would inflate the threshold).

    Returns (list of (along, across, valid-array index) per decoy,
    (fault-distance factor, share of decoys with fewer stations)).
    """
    length = segment.length_m
    if data.easting.size == 0 or n_decoys == 0:
        return [], (1.0, 0.0)
    jitter = data.spacing if np.isfinite(data.spacing) else 0.0
    n_part = int(math.ceil(_PARTIAL_FRACTION * n_real))
    full, part = [], []
    for relax in (1.0, 0.5):
        for _ in range(6):
            if len(full) >= n_decoys:
                break
            n_cand = 2 * n_decoys
            pick = rng.integers(0, data.easting.size, n_cand)
            centre = np.column_stack([data.easting[pick], data.northing[pick]])
            centre += rng.uniform(-jitter, jitter, size=(n_cand, 2))
            angle = rng.uniform(0.0, 2.0 * math.pi, n_cand)
            unit = np.column_stack([np.sin(angle), np.cos(angle)])  # along strike
            if fault_tree is not None:
                f = np.linspace(-0.5, 0.5, 9)
                pts = centre[:, None, :] + f[None, :, None] * length * unit[:, None, :]
                dist, _ = fault_tree.query(pts.reshape(-1, 2))
                far = dist.reshape(n_cand, -1).min(axis=1) >= relax * corridor
            else:
                far = np.ones(n_cand, dtype=bool)
            for k in np.flatnonzero(far):
                box = np.abs(unit[k]) * (length / 2.0 + corridor) + np.abs(unit[k][::-1]) * corridor
                near = data.grid.query(centre[k] - box, centre[k] + box)
                if near.size < n_part:
                    continue
                de = data.easting[near] - centre[k, 0]
                dn = data.northing[near] - centre[k, 1]
                along = de * unit[k, 0] + dn * unit[k, 1] + length / 2.0
                across = de * unit[k, 1] - dn * unit[k, 0]
                inside = (np.abs(across) <= corridor) & (along >= -corridor) \
                    & (along <= length + corridor)
                count = np.count_nonzero(inside)
                if count >= n_part:
                    (full if count >= n_real else part).append(
                        (along[inside], across[inside], near[inside]))
                if len(full) >= n_decoys:
                    break
        if len(full) + len(part) >= _MIN_DECOYS:
            break
    decoys = full[:n_decoys] + part[:max(n_decoys - len(full), 0)]
    short = (len(decoys) - min(len(full), n_decoys)) / max(len(decoys), 1)
    return decoys, (relax, short)


# --------------------------------------------------------------------------- one segment


class _SegmentSetup:
    """
    Everything about one segment that does not depend on the data values:
    local coordinates and templates of its stations and of its decoys.
    """

    def __init__(self, segment, pos, data, corridor, depths, ratios, contrasts, n_decoys,
                 fault_tree, rng):
        self.segment = segment
        self.pos = pos
        self.n = int(pos.size)
        self.corridor = corridor
        self.n_decoys_wanted = n_decoys
        self.templates = _templates(segment, depths, ratios, contrasts)
        length = segment.length_m
        self.along, self.across = segment.to_local(data.easting[pos], data.northing[pos])
        self.columns = _template_matrix(self.along, self.across, length, self.templates)
        decoys, self.relax = _decoy_footprints(segment, self.n, data, corridor, n_decoys,
                                               fault_tree, rng)
        self.n_decoys = len(decoys)
        if self.n_decoys >= _MIN_DECOYS:
            self.d_along = np.concatenate([d[0] for d in decoys])
            self.d_across = np.concatenate([d[1] for d in decoys])
            self.d_pos = np.concatenate([d[2] for d in decoys])
            self.starts = np.cumsum([0] + [d[0].size for d in decoys[:-1]])
            self.d_columns = _template_matrix(self.d_along, self.d_across, length,
                                              self.templates)

    def score(self, values, weight, read_var):
        """
        Scores of the segment and of its decoys for station arrays
        ``values`` (mV), ``weight`` and ``read_var`` (mV², NaN unknown), all
        indexed like the valid stations. Decoy scores are None when there
        are too few decoys.
        """
        pos = self.pos
        real = _score_groups(self.columns, self.along, self.across, values[pos], weight[pos],
                             read_var[pos], np.array([0]))
        decoy_scores = None
        if self.n_decoys >= _MIN_DECOYS:
            d = self.d_pos
            decoy_scores = _score_groups(self.d_columns, self.d_along, self.d_across, values[d],
                                         weight[d], read_var[d], self.starts)["score"]
        return real, decoy_scores


def _threshold(decoy_scores, false_alarm_rate, min_score):
    """Threshold and the decoys' (1 − rate) quantile (NaN without decoys)."""
    if decoy_scores is None:
        return float(min_score), np.nan
    quantile = float(np.quantile(decoy_scores, 1.0 - false_alarm_rate))
    return max(float(min_score), quantile), quantile


def _unscored(segment, index):
    n = int(index.size)
    return Detection(
        segment=segment, station_index=index, n_stations=n, score=np.nan, polarity=0,
        detected=False, threshold=np.nan, noise_mv=np.nan, best_template={},
        note=f"too few stations ({n}; at least {_MIN_STATIONS} needed)",
    )


def _detect_segment(setup, values, data, false_alarm_rate, min_score, cultural_max_depth_m):
    """Detection of one segment from its setup and the station values (mV, valid stations)."""
    segment, pos, corridor, n_decoys = setup.segment, setup.pos, setup.corridor, setup.n_decoys_wanted
    index = data.index[pos]
    n = int(index.size)
    real, decoy_scores = setup.score(values, data.weight, data.read_var)
    score = float(real["score"][0])
    best = int(real["best"][0])
    threshold, quantile = _threshold(decoy_scores, false_alarm_rate, min_score)
    if decoy_scores is not None:
        how = f"decoys, {100 * false_alarm_rate:g} % false-alarm" if quantile >= min_score else \
            f"minimum score; decoys' {100 * (1 - false_alarm_rate):g}th percentile {quantile:.1f}"
        if setup.n_decoys < n_decoys:
            how += f", only {setup.n_decoys} decoys"
        if setup.relax[1] > 0:
            how += f", {100 * setup.relax[1]:.0f} % of decoys with 80-100 % of its {n} stations"
        if setup.relax[0] < 1.0:
            how += ", some decoys near mapped faults"
    else:
        how = (f"minimum score, not calibrated: only {setup.n_decoys} decoys with {n}+ stations "
               "fit in the survey away from mapped faults")
    detected = bool(score > threshold)
    relation = ">" if detected else "≤"
    note = f"score {score:.1f} {relation} threshold {threshold:.1f} ({how})"
    z_t, z_b, dip, contrast = setup.templates[best]
    best_template = {
        "depth_top_m": z_t, "depth_bottom_m": z_b, "dip_deg": dip, "sigma_ratio": contrast,
        "jump_mv": float(real["amplitude"][0]),
        "jump_sigma_mv": float(real["amplitude_sigma"][0]),
        "corridor_m": float(corridor),
    }
    polarity = 1 if real["amplitude"][0] >= 0 else -1
    cultural = False
    if detected:
        gain = _pole_pair_gain(segment, setup.along, setup.across, values[pos],
                               real["weights"], float(real["chi2"][0]), cultural_max_depth_m,
                               data.spacing)
        best_template["pole_pair_delta_bic"] = gain
        if gain > _CULTURAL_DELTA_BIC:
            cultural = True
            note += (f"; a shallow pole pair (≤ {cultural_max_depth_m:g} m) fits better"
                     f" (ΔBIC {gain:.0f}): likely cultural or near-surface")
    return Detection(
        segment=segment, station_index=index, n_stations=n, score=score, polarity=polarity,
        detected=detected, threshold=float(threshold), noise_mv=float(real["noise"][0]),
        best_template=best_template, cultural=cultural, note=note,
    )


# --------------------------------------------------------------------------- pole pair rival


def _pole_pair_columns(along, across, poles):
    """
    Unit-strength pole-pair values 1/r₊ − 1/r₋ (1/m) at the stations for
    poles given as rows (s₊, t₊, s₋, t₋, depth), via the public forward
    model in the local frame [Telford1990]_.
    """
    out = np.empty((along.size, len(poles)))
    for m, (sp, tp, sn, tn, h) in enumerate(poles):
        out[:, m] = forward.pole_pair_sp((along, across), pos_x=sp, pos_y=tp, pos_depth_m=h,
                                         neg_x=sn, neg_y=tn, neg_depth_m=h, k_mv_m=1.0)
    return out


def _pole_pair_gain(segment, along, across, data, weights, chi2_template, max_depth, spacing):
    """
    BIC(best template) − BIC(best shallow pole pair), both with the regional
    plane and the same weights. Poles
    share a depth ≤ max_depth and lie ≤ 4·max_depth apart; searched on a
    coarse grid of the stations at the regional-removed extremes, then
    polished with bounded least squares.
    """
    n = along.size
    ones = np.array([0])
    # Regional-removed residual for the extremes.
    basis = np.column_stack([np.ones(n), along, across]) * np.sqrt(weights)[:, None]
    coef = np.linalg.lstsq(basis, data * np.sqrt(weights), rcond=None)[0]
    resid = data - np.column_stack([np.ones(n), along, across]) @ coef
    k = min(6, n // 2)
    high = np.argsort(resid)[-k:]
    low = np.argsort(resid)[:k]
    depth_grid = max_depth * np.array([0.1, 0.2, 0.4, 0.7, 1.0])
    max_sep = 4.0 * max_depth
    poles = []
    for i in high:
        for j in low:
            ds, dt = along[j] - along[i], across[j] - across[i]
            sep = math.hypot(ds, dt)
            if sep > max_sep:
                # Too far apart for one pair: put the other pole max_sep from
                # this extreme, toward the opposite one (and vice versa).
                f = max_sep / sep
                pairs = [(along[i], across[i], along[i] + f * ds, across[i] + f * dt),
                         (along[j] - f * ds, across[j] - f * dt, along[j], across[j])]
            else:
                pairs = [(along[i], across[i], along[j], across[j])]
            for pair in pairs:
                for h in depth_grid:
                    poles.append((*pair, h))
    cols = _pole_pair_columns(along, across, poles)
    gpg, gpd, dpd = _project(cols, along, across, data, weights, ones)
    chi2 = dpd[0] - gpd[0] ** 2 / np.maximum(gpg[0], 1e-300)
    m = int(np.argmin(chi2))
    best_chi2 = float(chi2[m])
    # Polish: move both poles and the depth (bounded), amplitude and regional linear.
    start = np.array(poles[m], dtype=float)
    reach = max(2.0 * (spacing if np.isfinite(spacing) else 25.0), 10.0)
    lower = start - np.array([reach, reach, reach, reach, start[4] - 0.5])
    upper = start + np.array([reach, reach, reach, reach, max_depth - start[4]])
    lower[4], upper[4] = 0.5, max_depth
    start[4] = np.clip(start[4], lower[4] + 1e-9, upper[4] - 1e-9)
    sw = np.sqrt(weights)
    design = np.column_stack([np.ones(n), along, across])

    def residual(p):
        g = _pole_pair_columns(along, across, [p])
        a = np.column_stack([g, design]) * sw[:, None]
        x = np.linalg.lstsq(a, data * sw, rcond=None)[0]
        return a @ x - data * sw

    try:
        sol = optimize.least_squares(residual, start, bounds=(lower, upper), max_nfev=200,
                                     x_scale=np.array([reach] * 4 + [max_depth]))
        sep = math.hypot(sol.x[0] - sol.x[2], sol.x[1] - sol.x[3])
        if sep <= max_sep:
            best_chi2 = min(best_chi2, float(np.sum(sol.fun ** 2)))
    except (ValueError, np.linalg.LinAlgError):
        pass
    bic_template = chi2_template + _K_TEMPLATE * math.log(n)
    bic_pair = best_chi2 + _K_POLE_PAIR * math.log(n)
    return float(bic_template - bic_pair)


# --------------------------------------------------------------------------- junctions


def _resolve_shared(detections, stations, valid_index, corridor):
    """
    Where two detected segments' anomaly footprints share more than half the
    stations of the smaller one, keep the higher score detected and note the
    other. The footprint is the inner half of the corridor (|t| and the end
    extension ≤ corridor/2 = 1.5 × the deepest template top with the auto
    corridor), where a patch anomaly is strongest; whole corridors would
    merge genuinely separate anomalies on parallel faults closer than the
    corridor width.
    """
    detected = [i for i, d in enumerate(detections) if d.detected]
    if len(detected) < 2:
        return detections
    easting = np.asarray(stations.easting, dtype=float)[valid_index]
    northing = np.asarray(stations.northing, dtype=float)[valid_index]
    sets = {}
    boxes = {}
    for i in detected:
        seg = detections[i].segment
        inside, _ = corridor_distance(seg, easting, northing, _FOOTPRINT * corridor)
        sets[i] = np.flatnonzero(inside)
        c = np.asarray(seg.coords)
        boxes[i] = (c[:, 0].min() - corridor, c[:, 0].max() + corridor,
                    c[:, 1].min() - corridor, c[:, 1].max() + corridor)
    order = sorted(detected, key=lambda i: -detections[i].score)
    kept = []
    out = list(detections)
    for i in order:
        shared_with = None
        for j in kept:
            a, b = boxes[i], boxes[j]
            if a[1] < b[0] or b[1] < a[0] or a[3] < b[2] or b[3] < a[2]:
                continue
            common = np.intersect1d(sets[i], sets[j], assume_unique=True).size
            smaller = min(sets[i].size, sets[j].size)
            if smaller and common > _SHARED_FRACTION * smaller:
                shared_with = j
                break
        if shared_with is None:
            kept.append(i)
            continue
        other = detections[shared_with]
        d = out[i]
        out[i] = replace(d, detected=False, note=(
            f"{d.note}; shares its anomaly with {other.segment.segment_id} "
            f"(score {other.score:.1f}), kept there"))
    return out
