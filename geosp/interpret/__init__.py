"""
The survey model: sources selected and fitted together with the regional,
the terrain coefficient and a fitted noise model (see :mod:`.engine`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import blocks as blocking
from .engine import Selection, select_sources
from .linear import NUISANCE_NAMES, TERRAIN
from .results import fit_result, joint_covariance, segment_detections, source_rows

__all__ = ["Interpretation", "detect_sources", "fit_sources", "interpret_survey", "Selection"]


@dataclass(frozen=True)
class Blocked:
    """The selections of a survey cut into blocks (see :mod:`.blocks`), already interpreted."""

    blocks: tuple
    results: tuple  # Interpretation per block
    segment_block: tuple  # block number that reports each segment


@dataclass(frozen=True)
class Interpretation:
    """Detections per segment, the fit result, the stations with the final terrain correction."""

    detections: tuple
    fits: object  # FitResult
    stations: object  # Stations with terrain_mv and sp_mv from the survey model
    terrain: dict
    noise: dict
    selection: Selection


def detect_sources(stations, segments, *, network=None, estimate_terrain=True, false_alarm_rate=0.05,
                   n_null=1000, template_top_depths_m=(50.0, 100.0, 200.0, 400.0, 800.0),
                   template_height_ratios=(3.0,), template_sigma_ratios=(0.25, 4.0), cultural=True,
                   max_sources=40, n_starts=32, seed=0, workers=1, scheduler=None, progress=None):
    """
    Select the sources of a survey with the survey-wide model.

    Parameters
    ----------
    stations : Stations
        Reduced stations (``sp_mv + terrain_mv`` is modelled).
    segments : sequence of FaultSegment
        From :func:`geosp.segments.make_segments`.
    network : NetworkCovariance or None
        The reduction's network covariance (gradient readings).
    estimate_terrain : bool
        Estimate the SP-elevation coefficient in the model (False: keep the
        stations' own terrain correction and add no terrain term).
    false_alarm_rate : float
        Chance that a survey with no source at all reports one: the
        threshold is this upper quantile of the largest score over the
        whole survey under the fitted noise model (parametric bootstrap).
        Default 0.05.
    n_null : int
        Bootstrap draws of the null. Default 1000.
    template_top_depths_m : list of float
        Top depths (m) of the templates scored in every window along the
        faults; also the depth families the fits start from. Default 50,
        100, 200, 400 and 800 m.
    template_height_ratios : list of float
        Template bottom depth over top depth. Default 3.
    template_sigma_ratios : list of float
        Conductivity contrasts across the fault tried on vertical templates
        (besides none). Default 1/4 and 4.
    cultural : bool
        Let a shallow pole pair, a casing (a pole at its head and one at its
        foot) or a buried line (pipeline, cable) compete for every anomaly;
        one that fits clearly better is reported as likely cultural.
        Default True.
    max_sources : int
        Most sources in one survey (or in one block of a large survey).
        Default 40.
    n_starts : int
        Quasi-random starts scored for every new source besides the depth
        families. Default 32.
    seed : int
        Seed of the bootstrap and of the starts. Default 0.
    workers : int or "auto"
        Processes for the independent work: the blocks of a large survey,
        else the fits from several starts (1: in this process). Results do
        not depend on it. Default 1.
    scheduler : str or None
        Address of a Dask scheduler (``tcp://HOST:PORT``) to run that work
        on instead. Default None.
    progress : callable or None
        ``progress(done, total[, note])``: milestones of the survey model
        (total None until the end), or blocks done for a survey in blocks.

    Returns
    -------
    selection : Selection or Blocked
    detections : tuple of Detection
        One per segment (``false_alarm_p``, ``marginal`` filled).

    Notes
    -----
    A survey of more than :data:`geosp.interpret.blocks.MAX_BLOCK_STATIONS`
    stations is modelled in overlapping blocks (:mod:`geosp.interpret.blocks`).
    """
    options = dict(false_alarm_rate=false_alarm_rate, n_null=n_null,
                   template_top_depths_m=template_top_depths_m,
                   template_height_ratios=template_height_ratios,
                   template_sigma_ratios=template_sigma_ratios, cultural=cultural,
                   max_sources=max_sources, n_starts=n_starts)
    check_detect_options(seed=seed, **options)
    from ..parallel import map_segments, resolve_workers, shared_pool

    resolve_workers(workers)
    plan = blocking.plan_blocks(stations.easting, stations.northing)
    with shared_pool(workers, scheduler):
        if len(plan) == 1:
            selection = select_sources(stations, segments, network=network, terrain=estimate_terrain,
                                       seed=seed, workers=workers, scheduler=scheduler, progress=progress,
                                       **options)
            detections = segment_detections(selection, stations, false_alarm_rate=false_alarm_rate,
                                            corridor_m=_report_corridor(selection))
            return selection, detections
        items = []
        for block in plan:
            near = blocking.segments_near(segments, block)
            items.append((stations.subset(block.index), tuple(segments[k] for k in near),
                          _network_view(network, block.index), estimate_terrain,
                          dict(options, seed=seed + block.number)))
        results = map_segments(_interpret_block, items, workers=workers, scheduler=scheduler,
                               progress=progress)
    return _merge_detections(plan, items, results, segments, stations)


def _network_view(network, index):
    """The network covariance seen by the stations at ``index`` only."""
    if network is None:
        return None
    return network.for_stations(np.asarray(network.station_node)[index], network.factor,
                                network.independent_sigma_mv)


def _interpret_block(item):
    """Select and fit the sources of one block (a work item for any executor)."""
    stations, segments, network, estimate_terrain, options = item
    rate = options["false_alarm_rate"]
    selection = select_sources(stations, segments, network=network, terrain=estimate_terrain, **options)
    detections = segment_detections(selection, stations, false_alarm_rate=rate,
                                    corridor_m=_report_corridor(selection))
    return fit_sources(selection, stations, detections, network=network, keep_selection=False)


def _merge_detections(plan, items, results, segments, stations):
    """One Detection per segment from the block whose core holds its midpoint."""
    owner = []
    for seg in segments:
        mid = blocking.segment_midpoint(seg)
        inside = [b.number for b in plan if b.in_core(mid[0], mid[1])]
        if not inside:  # off every core (outside the stations' box): the nearest core
            centres = [((b.box[0] + b.box[1]) / 2, (b.box[2] + b.box[3]) / 2) for b in plan]
            inside = [int(np.argmin([math.hypot(mid[0] - c[0], mid[1] - c[1]) for c in centres]))]
        owner.append(inside[0])
    from dataclasses import replace

    detections = []
    for k, seg in enumerate(segments):
        block = plan[owner[k]]
        det = next((d for d in results[owner[k]].detections if d.segment.segment_id == seg.segment_id), None)
        if det is None:
            det = _unscored(seg, stations)
        else:
            det = replace(det, station_index=block.index[det.station_index])
        detections.append(det)
    return Blocked(tuple(plan), tuple(results), tuple(owner)), tuple(detections)


def _unscored(segment, stations):
    from ..models import Detection

    return Detection(segment=segment, station_index=np.zeros(0, dtype=int), n_stations=0, score=np.nan,
                     polarity=0, detected=False, threshold=np.nan, noise_mv=np.nan, best_template={},
                     note="not scored: no stations near this segment")


def check_detect_options(*, false_alarm_rate=0.05, n_null=1000,
                         template_top_depths_m=(50.0, 100.0, 200.0, 400.0, 800.0),
                         template_height_ratios=(3.0,), template_sigma_ratios=(0.25, 4.0), cultural=True,
                         max_sources=40, n_starts=32, seed=0, **_):
    """
    Refuse out-of-range ``[detect]`` options with one message listing all of
    them (exit 2). Called by :func:`detect_sources` and by ``geosp check``.

    Raises
    ------
    OptionError
    """
    problems = []

    def numbers(values):
        try:
            array = np.asarray(values, dtype=float).ravel()
        except (TypeError, ValueError):
            return None
        return array if array.size and np.all(np.isfinite(array)) else None

    def whole(value, low, high):
        return isinstance(value, (int, np.integer)) and not isinstance(value, bool) and low <= value <= high

    if not (isinstance(false_alarm_rate, (int, float)) and not isinstance(false_alarm_rate, bool)
            and 0.0 < false_alarm_rate < 1.0):
        problems.append(("false_alarm_rate", f"= {false_alarm_rate!r} must lie between 0 and 1 (e.g. 0.05)"))
    if not whole(n_null, 100, 100_000):
        problems.append(("n_null", f"= {n_null!r} must be a whole number from 100 to 100000"))
    depths = numbers(template_top_depths_m)
    if depths is None or np.any(depths <= 0) or np.any(depths > 20_000):
        problems.append(("template_top_depths_m", "must be a list of depths in m, each above 0 and at most 20000"))
    ratios = numbers(template_height_ratios)
    if ratios is None or np.any(ratios <= 1) or np.any(ratios > 1000):
        problems.append(("template_height_ratios", "must be a list of bottom/top ratios above 1 (e.g. [3.0])"))
    contrasts = numbers(template_sigma_ratios) if len(np.atleast_1d(template_sigma_ratios)) else np.array([1.0])
    if contrasts is None or np.any(contrasts <= 0) or np.any(contrasts > 1000):
        problems.append(("template_sigma_ratios", "must be a list of positive conductivity ratios (or [])"))
    if not isinstance(cultural, bool):
        problems.append(("cultural", f"= {cultural!r} must be true or false"))
    if not whole(max_sources, 0, 10_000):
        problems.append(("max_sources", f"= {max_sources!r} must be a whole number from 0 to 10000"))
    if not whole(n_starts, 0, 100_000):
        problems.append(("n_starts", f"= {n_starts!r} must be a whole number from 0 to 100000"))
    if not whole(seed, 0, 2**63 - 1):
        problems.append(("seed", f"= {seed!r} must be a whole number, 0 or more"))
    if problems:
        from ..errors import OptionError

        name = problems[0][0]
        text = "; ".join(f"{n} {t}" for n, t in problems)
        raise OptionError("project file", f"[detect] {text}.",
                          "Fix the value in the [detect] section, or remove it to use the default.",
                          where=f"[detect] {name}")


def _report_corridor(selection):
    """Half-width (m) of the station band a segment's profile figure shows."""
    tops = [s.model.natural(s.p)["top"] for s in selection.sources if s.kind == "fault"]
    return max(3.0 * max(tops), 300.0) if tops else 500.0


def fit_sources(selection, stations, detections, *, network=None, keep_selection=True):
    """
    Uncertainties of the selected sources and the survey model's products.

    Parameters
    ----------
    selection : Selection or Blocked
    stations : Stations
        The stations the selection was made on.
    detections : tuple of Detection
    network : NetworkCovariance or None
        The reduction's network covariance (as given to :func:`detect_sources`).
    keep_selection : bool
        Keep the selection in the result (it holds the fields of every source
        at every station).

    Returns
    -------
    Interpretation
        ``stations`` carry the survey model's terrain correction
        (``terrain_mv`` = k̂·(elevation − e₀), ``sp_mv`` corrected by it).
    """
    if isinstance(selection, Blocked):
        return _merge_blocks(selection, stations, detections)
    valid = selection.valid_index
    white = selection.whitener(stations.easting[valid], stations.northing[valid], network)
    names, cov, s2 = joint_covariance(selection, white)
    key = (None, NUISANCE_NAMES[TERRAIN])
    terrain = bool(selection.terrain)
    k = float(selection.coef[TERRAIN]) if terrain else 0.0
    k_sd = float(math.sqrt(max(cov[names.index(key), names.index(key)], 0.0))) if terrain else math.nan
    elev = np.asarray(stations.upward, float)
    if terrain:
        old = np.asarray(stations.terrain_mv, float)
        new = np.where(np.isfinite(elev), k * (elev - selection.frame.elev0), 0.0)
        stations = stations.replace(terrain_mv=new, sp_mv=np.asarray(stations.sp_mv, float) + old - new)
    rows = source_rows(selection, names, cov, (stations.easting[valid], stations.northing[valid]),
                       elev[valid])
    fits = fit_result(selection, detections, rows, stations)
    terrain_info = None
    if terrain:
        terrain_info = {
            "applied": True, "slope_mv_per_m": k, "ci_lo": k - 1.959964 * k_sd,
            "ci_hi": k + 1.959964 * k_sd, "sd_mv_per_m": k_sd,
            "reference_elevation_m": selection.frame.elev0, "n_used": int(selection.n),
            "method": "estimated in the survey model with the sources present (generalised least "
                      "squares), 95 % interval"}
    noise = {"white_sd_mv": selection.noise.white_sd_mv,
             "correlated_sd_mv": selection.noise.correlated_sd_mv,
             "correlation_length_m": selection.noise.correlation_length_m,
             "covariance_scale": s2, "threshold": selection.threshold, "history": list(selection.history)}
    return Interpretation(detections, fits, stations, terrain_info, noise,
                          selection if keep_selection else None)


def _merge_blocks(blocked, stations, detections):
    """One Interpretation from the blocks': each source, segment and station from its core's block."""
    from ..models import FitResult

    n = len(stations)
    terrain_mv = np.asarray(stations.terrain_mv, float).copy()
    model = np.full(n, np.nan)
    rows, fits, regional, ks, noise = [], [], [], [], []
    reported = {d.segment.segment_id for d in detections}
    for block, result in zip(blocked.blocks, blocked.results):
        core = block.in_core(stations.easting[block.index], stations.northing[block.index])
        index = block.index[core]
        terrain_mv[index] = np.asarray(result.stations.terrain_mv)[core]
        model[index] = np.asarray(result.fits.model_mv)[core]
        mine = {seg_id for seg_id, b in zip(_segment_ids(detections), blocked.segment_block) if b == block.number}
        for row in result.fits.sources:
            if block.in_core(row["top_x"], row["top_y"]):
                rows.append(dict(row, block=block.number))
        for fit in result.fits.fits:
            if fit.segment.segment_id in mine and fit.segment.segment_id in reported:
                from dataclasses import replace

                fits.append(replace(fit, station_index=block.index[fit.station_index]))
        regional.append(dict(result.fits.regional, box=list(block.box)))
        if result.terrain:
            ks.append((result.terrain["slope_mv_per_m"], result.terrain["sd_mv_per_m"]))
        noise.append(dict(result.noise, block=block.number, box=list(block.box)))
    old = np.asarray(stations.terrain_mv, float)
    stations = stations.replace(terrain_mv=terrain_mv, sp_mv=np.asarray(stations.sp_mv, float) + old - terrain_mv)
    terrain_info = None
    if ks:
        k = np.array([a for a, _ in ks])
        w = np.array([1.0 / max(b, 1e-9) ** 2 for _, b in ks])
        mean, sd = float(np.sum(w * k) / w.sum()), float(1.0 / math.sqrt(w.sum()))
        terrain_info = {"applied": True, "slope_mv_per_m": mean, "ci_lo": mean - 1.959964 * sd,
                        "ci_hi": mean + 1.959964 * sd, "sd_mv_per_m": sd,
                        "n_used": int(np.isfinite(stations.sp_mv).sum()),
                        "per_block_mv_per_m": [round(float(v), 4) for v in k],
                        "method": "estimated in the survey model block by block (each block's own slope "
                                  "corrects its core's stations); the survey value is their "
                                  "inverse-variance mean, 95 % interval"}
    fits_result = FitResult(fits=tuple(fits), model_mv=model,
                            residual_mv=np.asarray(stations.sp_mv, float) - model,
                            regional={"kind": "blocks", "blocks": regional}, sources=tuple(rows))
    return Interpretation(detections, fits_result, stations, terrain_info, {"blocks": noise}, None)


def _segment_ids(detections):
    return [d.segment.segment_id for d in detections]


def interpret_survey(stations, segments, *, network=None, **options):
    """:func:`detect_sources` then :func:`fit_sources` (see both)."""
    selection, detections = detect_sources(stations, segments, network=network, **options)
    return fit_sources(selection, stations, detections, network=network)
