"""
From a :class:`~geosp.interpret.engine.Selection` to what the pipeline
publishes: one :class:`~geosp.models.Detection` per fault segment, the rows
of the ``sources`` layer with their uncertainties, and the survey model at
the stations.

Uncertainties come from the whole model at once: the Jacobian of the
whitened residual with respect to every source's geometry and strength, the
regional and the terrain coefficient, so the terrain, regional and
correlated (network and geological) errors all reach every interval. The
covariance is scaled by the reduced χ² when that exceeds 1. Depths are
carried in logarithms, so their 16–84 % intervals are asymmetric. A
parameter that ends on its bound is not resolved by the data: its interval
is left open toward the bound and the source is reported as uncertain.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..models import Detection, FitResult, SegmentFit
from ..segments import corridor_distance
from .linear import NUISANCE_NAMES, TERRAIN

#: A parameter within this fraction of its range from a bound is "at the bound".
BOUND_FRACTION = 0.005
#: |correlation| above which a pair of parameters is flagged.
CORRELATION_FLAG = 0.95
#: A source whose top depth is uncertain by more than this factor (16–84 %
#: range, hi over lo), or whose top depth, dip or position along strike sits
#: on a bound, is drawn as uncertain, not as a target.
UNCERTAIN_FACTOR = 3.0
#: Marginal segments: false-alarm probability within this factor of the rate.
MARGINAL_FACTOR = 5.0
_Z84 = 1.0


def joint_covariance(selection, white):
    """
    Covariance of every parameter of the survey model (whitened Jacobian).

    Parameters
    ----------
    selection : Selection
    white : callable
        Whitens an (n, k) array at the selection's valid stations.

    Returns
    -------
    names : list of (source index or None, parameter name)
    covariance : (P, P) array
    s2 : float
        Scale applied (reduced χ², at least 1).
    """
    n_b = len(NUISANCE_NAMES)
    blocks, names = [], []
    strengths = selection.coef[n_b:]
    for i, s in enumerate(selection.sources):
        g, jac = s.model.jacobian(s.p)
        blocks.append(white(jac) * strengths[i])
        names += [(i, name) for name in s.model.names]
    for i, s in enumerate(selection.sources):
        blocks.append(white(s.column[:, None]))
        names.append((i, "strength"))
    blocks.append(white(selection.nuisance))
    names += [(None, name) for name in NUISANCE_NAMES]
    jac = np.hstack(blocks)
    scale = np.sqrt(np.sum(jac**2, axis=0))
    scale[scale == 0] = 1.0
    q = jac / scale
    cov = np.linalg.pinv(q.T @ q) / np.outer(scale, scale)
    dof = max(selection.n - jac.shape[1], 1)
    s2 = max(selection.chi2 / dof, 1.0)
    return names, cov * s2, s2


def _at_bound(model, p):
    span = model.upper - model.lower
    low = p <= model.lower + BOUND_FRACTION * span
    high = p >= model.upper - BOUND_FRACTION * span
    return low, high


_PARAMETER_LABEL = {"centre": "centre_m", "log_length": "length_m", "log_top": "top_depth_m",
                    "log_height": "height_m", "dip": "dip_deg", "log_ratio": "sigma_ratio",
                    "pos_s": "pole_s_m", "pos_t": "pole_t_m", "log_pos_depth": "pole_depth_m",
                    "neg_s": "neg_s_m", "neg_t": "neg_t_m", "log_neg_depth": "neg_depth_m",
                    "azimuth": "line_azimuth_deg", "log_depth": "line_depth_m"}


def source_rows(selection, names, cov, survey_xy, elevation):
    """
    Rows of the ``sources`` layer with intervals, flags and status.

    Returns
    -------
    list of dict
    """
    rows = []
    n_b = len(NUISANCE_NAMES)
    index = {name: k for k, name in enumerate(names)}
    x, y = survey_xy
    counters = {}
    for i, s in enumerate(selection.sources):
        strength = float(selection.coef[n_b + i])
        k_params = [index[(i, name)] for name in s.model.names]
        k_strength = index[(i, "strength")]
        sub = cov[np.ix_(k_params + [k_strength], k_params + [k_strength])]
        row = s.model.row(s.p, strength)
        owner = selection.segments[s.window.owner]
        counters[owner.segment_id] = counters.get(owner.segment_id, 0) + 1
        letter = "P" if s.kind == "fault" else "Q"
        row.update(source_id=f"{owner.segment_id}-{letter}{counters[owner.segment_id]}",
                   segment_id=owner.segment_id, fault_id=owner.fault_id)
        flags = []
        low, high = _at_bound(s.model, s.p)
        unresolved = [(_PARAMETER_LABEL.get(n, n), "low" if lo else "high")
                      for n, lo, hi in zip(s.model.names, low, high) if lo or hi]
        for label, side in unresolved:
            flags.append(f"bound:{label}")
        sd = np.sqrt(np.maximum(np.diag(sub), 0.0))
        with np.errstate(invalid="ignore", divide="ignore"):
            corr = sub / np.outer(sd, sd)
        labels = [_PARAMETER_LABEL.get(n, n) for n in s.model.names] + ["strength"]
        for a in range(len(labels)):
            for b in range(a + 1, len(labels)):
                if np.isfinite(corr[a, b]) and abs(corr[a, b]) > CORRELATION_FLAG:
                    flags.append(f"corr:{labels[a]}/{labels[b]}")
        near = _near_stations(s, x, y)
        row["n_stations"] = int(np.count_nonzero(near))
        residual = selection.data - selection.terrain_mv - selection.model_mv
        row["rms_mv"] = float(np.sqrt(np.mean(residual[near] ** 2))) if near.any() else math.nan
        row["chi2_red"] = float(selection.chi2 / max(selection.n - len(names), 1))
        row["bic_gain"] = float(s.gain - (s.model.k + 1) * math.log(selection.n))
        row["detection_score"] = float(s.score)
        row["false_alarm_p"] = float(s.p_value)
        if s.kind == "fault":
            _patch_uncertainty(row, s, sub, strength, unresolved)
            elev = elevation[near]
            if elev.size > 1 and np.ptp(elev) > 0.2 * row["top_depth_m"]:
                flags.append("terrain")
            if s.model.fit_ratio and row["dip_deg"] < 80.0:
                flags.append("dip-contrast approximation")
            spread = row["top_depth_hi_m"] / max(row["top_depth_lo_m"], 1e-9)
            # The top edge is what a drilling team aims at: a source is a target
            # when its top depth and dip are resolved (a bottom, length or
            # contrast on its bound leaves that interval open, not the top).
            unresolved_top = [u for u in unresolved if u[0] in ("top_depth_m", "dip_deg", "centre_m")]
            uncertain = bool(unresolved_top) or not np.isfinite(spread) or spread > UNCERTAIN_FACTOR
            row["status"] = "uncertain" if uncertain else "target"
        else:
            flags.append("likely cultural")
            names = s.model.names
            i_depth = names.index("log_depth" if "log_depth" in names else "log_pos_depth")
            row.setdefault("length_m", math.nan)
            row.update(top_depth_lo_m=math.nan, top_depth_hi_m=math.nan, jump_lo_mv=math.nan,
                       jump_hi_mv=math.nan, bottom_depth_m=math.nan,
                       jump_mv=math.nan, dip_deg=math.nan, sigma_ratio=1.0,
                       location_sd_m=float(math.hypot(sd[0], sd[1])),
                       top_depth_sd_m=float(row["top_depth_m"] * sd[i_depth]), status="cultural")
            if "pole_k_mv_m" in row:
                row["pole_k_joint_mv_m"] = row["pole_k_mv_m"]
        row["jump_joint_mv"] = row.get("jump_mv", math.nan)
        row["flags"] = "; ".join(dict.fromkeys(flags))
        rows.append(row)
    return rows


def _near_stations(s, x, y):
    """Stations where the source's field exceeds 5 % of its peak (at least the nearest 10)."""
    g = np.abs(s.column)
    peak = float(g.max()) if g.size else 0.0
    near = g >= 0.05 * peak if peak > 0 else np.zeros(g.size, bool)
    if np.count_nonzero(near) < 10 and g.size:
        near[np.argsort(-g)[:10]] = True
    return near


def _patch_uncertainty(row, s, sub, strength, unresolved):
    """Intervals of a fault patch from the covariance of its (p, strength)."""
    model, p = s.model, s.p
    names = model.names
    q = model.natural(p)
    k = len(names)
    sd = np.sqrt(np.maximum(np.diag(sub), 0.0))
    i_top, i_h, i_len, i_dip = (names.index(n) for n in ("log_top", "log_height", "log_length", "dip"))
    top, bottom = q["top"], q["bottom"]
    flip = q["dip"] > 90.0
    # top depth: log-normal 16–84 %, open toward a bound the fit sits on
    spread = min(_Z84 * float(sd[i_top]), 50.0)  # beyond e^50 the interval is simply open
    lo = top * math.exp(-spread)
    hi = top * math.exp(spread) if spread < 50.0 else math.inf
    if ("top_depth_m", "low") in unresolved:
        lo = math.exp(model.lower[i_top])
    if ("top_depth_m", "high") in unresolved or ("height_m", "high") in unresolved:
        hi = math.inf if ("top_depth_m", "high") in unresolved else hi
    # derived quantities by the delta method (gradients in p and strength)
    grad = np.zeros((4, k + 1))
    grad[0, i_top] = top  # top
    grad[1, i_top] = top  # bottom = top + height
    grad[1, i_h] = bottom - top
    g = math.sqrt(top * bottom)
    grad[2] = 0.5 * g * (grad[0] / top + grad[1] / bottom)  # √(top·bottom)
    rad = math.radians(q["dip"])
    grad[3, i_top] = top / math.tan(rad)  # across position z_t cot δ′
    grad[3, i_dip] = -top / math.sin(rad) ** 2 * math.pi / 180.0
    var = np.einsum("ij,jk,ik->i", grad, sub, grad)
    sd_derived = np.sqrt(np.maximum(var, 0.0))
    jump_sd = float(sd[k])
    jump = -strength if flip else strength
    row.update(
        top_depth_lo_m=float(lo), top_depth_hi_m=float(hi),
        jump_lo_mv=float(jump - jump_sd), jump_hi_mv=float(jump + jump_sd),
        geo_mean_depth_m=float(g), geo_mean_depth_sd_m=float(sd_derived[2]),
        jump_height_mv_m=float(jump * (bottom - top)),
        jump_height_sd_mv_m=float(abs(jump) * (bottom - top) * math.hypot(
            jump_sd / max(abs(jump), 1e-12), sd[i_h])),
        top_depth_sd_m=float(sd_derived[0]), bottom_depth_sd_m=float(sd_derived[1]),
        dip_sd_deg=float(sd[i_dip]), jump_sd_mv=jump_sd,
        length_sd_m=float(q["length"] * sd[i_len]), location_sd_m=float(sd_derived[3]),
    )


def segment_detections(selection, stations, *, false_alarm_rate, corridor_m):
    """One Detection per segment of ``selection.segments``."""
    out = []
    easting = np.asarray(stations.easting, float)
    northing = np.asarray(stations.northing, float)
    owned = {}
    for j, w in enumerate(selection.windows):
        owned.setdefault(w.owner, []).append(j)
    sources_of = {}
    for s in selection.sources:
        sources_of.setdefault(s.window.owner, []).append(s)
    for k, seg in enumerate(selection.segments):
        inside, _ = corridor_distance(seg, easting, northing, corridor_m)
        index = np.flatnonzero(inside)
        windows = owned.get(k, [])
        found = sources_of.get(k, [])
        if not windows:
            out.append(Detection(segment=seg, station_index=index, n_stations=int(index.size),
                                 score=np.nan, polarity=0, detected=False, threshold=selection.threshold,
                                 noise_mv=selection.noise.white_sd_mv, best_template={},
                                 note="not scored: too few stations near this segment",
                                 false_alarm_p=np.nan))
            continue
        j = windows[int(np.argmax(selection.window_scores[windows]))]
        score = float(selection.window_scores[j])
        p = float(selection.window_p[j])
        sign = float(selection.window_signs[j])
        window = selection.windows[j]
        same = abs((window.frame.strike_deg - seg.strike_deg + 180.0) % 360.0 - 180.0) < 90.0
        polarity = int(np.sign(sign) * (1 if same else -1)) if sign else 0
        best = dict(zip(("depth_top_m", "depth_bottom_m", "dip_deg", "sigma_ratio"), selection.window_best[j]))
        faults = [s for s in found if s.kind == "fault"]
        cultural = [s for s in found if s.kind != "fault"]
        detected = bool(faults)
        if found:
            first = min(found, key=lambda s: s.p_value)
            score, p = float(first.score), float(first.p_value)
            best = dict(first.template)
        marginal = (not detected) and not cultural and p <= MARGINAL_FACTOR * false_alarm_rate
        if detected:
            note = (f"source found: score {score:.1f} above the threshold {selection.threshold:.1f} "
                    f"(false-alarm probability {p:.2g} over the survey)")
        elif cultural:
            what = {"buried_line": "a buried line (pipeline, cable)"}.get(cultural[0].model.name,
                                                                        "a shallow pole pair")
            note = f"anomaly (score {score:.1f}) explained better by {what}: likely cultural or near-surface"
        elif marginal and score > selection.threshold:
            note = (f"marginal: score {score:.1f} above the threshold {selection.threshold:.1f} "
                    f"(false-alarm probability {p:.2g}), but no source fitted here explained "
                    "enough of it; worth a second look")
        elif marginal:
            note = (f"marginal: score {score:.1f} below the threshold {selection.threshold:.1f} "
                    f"(false-alarm probability {p:.2g}); worth a second look")
        else:
            note = (f"no source: score {score:.1f} below the threshold {selection.threshold:.1f} "
                    f"(false-alarm probability {p:.2g})")
        out.append(Detection(segment=seg, station_index=index, n_stations=int(index.size), score=score,
                             polarity=polarity, detected=detected, threshold=float(selection.threshold),
                             noise_mv=float(selection.noise.white_sd_mv), best_template=best,
                             cultural=bool(cultural) and not detected, note=note, false_alarm_p=p,
                             marginal=bool(marginal)))
    return tuple(out)


def segment_fits(selection, detections, rows, stations):
    """SegmentFit records for the report's profile figures (one per segment with a source)."""
    n_all = len(stations)
    model_all = np.full(n_all, np.nan)
    model_all[selection.valid_index] = selection.model_mv
    n_b = len(NUISANCE_NAMES)
    fits = []
    for det in detections:
        mine = [(i, s) for i, s in enumerate(selection.sources)
                if selection.segments[s.window.owner].segment_id == det.segment.segment_id]
        if not mine:
            continue
        index = det.station_index
        position = np.full(n_all, -1)
        position[selection.valid_index] = np.arange(selection.valid_index.size)
        pos = position[index]
        ok = pos >= 0
        source_mv = np.full(index.size, np.nan)
        source_mv[ok] = sum(selection.coef[n_b + i] * s.column[pos[ok]] for i, s in mine)
        predicted = np.full(index.size, np.nan)
        predicted[ok] = model_all[index[ok]]
        seg_rows = tuple(r for r in rows if r["segment_id"] == det.segment.segment_id)
        chosen = "fault_patch" if any(s.kind == "fault" for _, s in mine) else mine[0][1].model.name
        selection_table = pd.DataFrame([{"model": r["model"], "bic_gain": r["bic_gain"]} for r in seg_rows])
        weights = np.zeros(index.size)
        weights[ok] = 1.0
        fits.append(SegmentFit(
            segment=det.segment, station_index=index, chosen=chosen, sources=seg_rows,
            predicted_mv=predicted, source_mv=source_mv, selection=selection_table, profiles={},
            correlation=None, flags=tuple(f for r in seg_rows for f in str(r.get("flags", "")).split("; ") if f),
            weights=weights))
    return tuple(fits)


def regional_dict(selection):
    """Coefficients of the survey-wide regional (quadratic in scaled coordinates)."""
    frame = selection.frame
    coef = selection.coef[:len(NUISANCE_NAMES)]
    return {"kind": "quadratic", "east0_m": frame.east0, "north0_m": frame.north0,
            "half_size_m": frame.half_size,
            "coef_mv": [float(c) for c in coef[:TERRAIN]]}


def fit_result(selection, detections, rows, stations):
    """The :class:`FitResult` of the survey model."""
    n_all = len(stations)
    model = np.full(n_all, np.nan)
    model[selection.valid_index] = selection.model_mv
    sp = np.asarray(stations.sp_mv, float)
    return FitResult(fits=segment_fits(selection, detections, rows, stations), model_mv=model,
                     residual_mv=sp - model, regional=regional_dict(selection), sources=tuple(rows))
