"""
Score one geosp interpretation against the planted truth of a synthetic survey.

Everything here works on plain dicts: the truth as written by
``generator.write_survey`` (``truth.json``) and the interpretation as read
from geosp's outputs by :func:`read_result` (the ``sources`` and
``fault_segments`` layers of ``interpretation.gpkg`` and ``run.json``), so
the scorer can be tested on hand-made answers.

Matching rule
-------------
A reported ``fault_patch`` row claims a source on its fault. It is matched to
a planted patch on the same fault when their along-trace extents overlap by
at least ``MIN_OVERLAP`` of the shorter one, or when the reported top-edge
centre projects inside the planted extent. Each planted patch takes at most
one claim (the one with the largest overlap); every other claim is a false
source, classed as

* ``duplicate``: it overlaps a planted patch already taken by another claim;
* ``below floor``: it matches a planted patch below the detectability floor
  (a real source, so not counted against precision, nor toward recall);
* ``cultural``: it lies within ``CULTURAL_REACH_M`` of a pipeline or casing
  pole;
* ``source-free fault``: its fault carries no planted patch;
* ``elsewhere``: anything else.

Rows of other models (``pole_pair``, ``buried_line``) are geosp saying "cultural or
near-surface"; they are not claims of a fault source and are only counted.

Depths are compared as elevations: a reported top depth refers to the
reported ``ground_m``, the planted one to the planted ``ground_m``, so the
reported depths are moved onto the planted ground before comparing.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

MIN_OVERLAP = 0.3
CULTURAL_REACH_M = 400.0


# --------------------------------------------------------------------------- reading


def read_result(out_dir):
    """
    The parts of a geosp output folder the scorer needs.

    Returns
    -------
    dict
        ``sources`` (list of row dicts of the ``sources`` layer, geometry
        dropped), ``segments`` (list of row dicts of ``fault_segments``),
        ``terrain`` (the ``terrain`` entry of run.json or None) and ``ok``
        (False when the GeoPackage is missing).
    """
    import pyogrio

    out_dir = Path(out_dir)
    gpkg = out_dir / "interpretation.gpkg"
    result = {"sources": [], "segments": [], "terrain": None, "ok": gpkg.exists()}
    if not gpkg.exists():
        return result
    layers = {name for name, _ in pyogrio.list_layers(gpkg)}
    for layer, key in (("sources", "sources"), ("fault_segments", "segments")):
        if layer in layers:
            frame = pyogrio.read_dataframe(gpkg, layer=layer, read_geometry=False)
            result[key] = [_clean(row) for row in frame.to_dict("records")]
    run_json = out_dir / "run.json"
    if run_json.exists():
        result["terrain"] = json.loads(run_json.read_text(encoding="utf-8")).get("terrain")
    return result


def _clean(row):
    out = {}
    for key, value in row.items():
        if isinstance(value, (np.floating, float)):
            value = float(value)
        elif isinstance(value, (np.integer,)):
            value = int(value)
        out[key] = value
    return out


# --------------------------------------------------------------------------- geometry


def _number(value, default=math.nan):
    try:
        value = float(value)
    except (TypeError, ValueError):
        return default
    return value if math.isfinite(value) else default


def _fault_line(fault):
    from shapely.geometry import LineString

    return LineString(fault["vertices"])


def _reported_extent(row, line):
    """Along-trace interval (m from the trace start) of a reported patch's top edge."""
    strike = math.radians(_number(row.get("strike_deg"), 0.0))
    half = 0.5 * _number(row.get("length_m"), 0.0)
    x, y = _number(row.get("top_x")), _number(row.get("top_y"))
    ends = [(x - half * math.sin(strike), y - half * math.cos(strike)),
            (x + half * math.sin(strike), y + half * math.cos(strike))]
    from shapely.geometry import Point

    along = sorted(line.project(Point(e)) for e in ends)
    centre = line.project(Point(x, y))
    return along[0], along[1], centre


def _overlap(a0, a1, b0, b1):
    shorter = max(min(a1 - a0, b1 - b0), 1e-9)
    return max(0.0, min(a1, b1) - max(a0, b0)) / shorter


def _fault_of(row):
    return str(row.get("fault_id", "")).split("/")[0]


def _near_cultural(row, truth):
    x, y = _number(row.get("top_x")), _number(row.get("top_y"))
    for item in truth.get("cultural", ()):
        for pole in item["poles"]:
            if math.hypot(pole[0] - x, pole[1] - y) <= CULTURAL_REACH_M:
                return True
    return False


# --------------------------------------------------------------------------- matching


def match_sources(truth, sources):
    """
    Pair reported fault patches with planted ones.

    Parameters
    ----------
    truth : dict
        ``truth.json`` content.
    sources : list of dict
        Rows of the ``sources`` layer.

    Returns
    -------
    matches : dict
        ``{patch_id: row}`` for every planted patch that a claim found.
    false : list of (row, class)
        Every claim that is not a match, with its class (see module notes).
    other_models : list of dict
        Rows of models other than ``fault_patch``.
    """
    faults = {f["fault_id"]: f for f in truth["faults"]}
    lines = {fid: _fault_line(f) for fid, f in faults.items()}
    patches = truth["patches"]
    claims = [r for r in sources if r.get("model") == "fault_patch"]
    other = [r for r in sources if r.get("model") != "fault_patch"]
    candidates = []  # (overlap, claim index, patch index)
    extents = {}
    for i, row in enumerate(claims):
        fid = _fault_of(row)
        if fid not in lines:
            continue
        a0, a1, centre = _reported_extent(row, lines[fid])
        extents[i] = (a0, a1)
        for k, patch in enumerate(patches):
            if patch["fault_id"] != fid:
                continue
            overlap = _overlap(a0, a1, patch["s0_m"], patch["s1_m"])
            inside = patch["s0_m"] <= centre <= patch["s1_m"]
            if overlap >= MIN_OVERLAP or inside:
                candidates.append((max(overlap, 1e-6 if inside else 0.0), i, k))
    matches, taken_claims, touched = {}, set(), {}
    for overlap, i, k in sorted(candidates, key=lambda c: -c[0]):
        touched.setdefault(i, []).append(k)
        pid = patches[k]["patch_id"]
        if pid in matches or i in taken_claims:
            continue
        matches[pid] = claims[i]
        taken_claims.add(i)
    false = []
    free = {f["fault_id"] for f in truth["faults"] if f.get("source_free")}
    planted_faults = {p["fault_id"] for p in patches}
    for i, row in enumerate(claims):
        if i in taken_claims:
            continue
        ks = touched.get(i, [])
        if ks:
            below = all(not patches[k]["above_floor"] for k in ks)
            kind = "below floor" if below else "duplicate"
        elif _near_cultural(row, truth):
            kind = "cultural"
        elif _fault_of(row) in free or _fault_of(row) not in planted_faults:
            kind = "source-free fault"
        else:
            kind = "elsewhere"
        false.append((row, kind))
    # A match to a below-floor patch is a real source but not a required one.
    return matches, false, other


# --------------------------------------------------------------------------- errors


def _on_planted_ground(row, patch):
    """Reported (top, bottom) depths moved onto the planted ground level."""
    ground = _number(row.get("ground_m"))
    shift = patch["ground_m"] - ground if math.isfinite(ground) else 0.0
    return (_number(row.get("top_depth_m")) + shift, _number(row.get("bottom_depth_m")) + shift,
            shift)


def patch_errors(row, patch, bound=None):
    """
    Errors of one found patch.

    Parameters
    ----------
    row : dict
        The matched ``sources`` row.
    patch : dict
        The planted patch (truth).
    bound : dict or None
        Cramér–Rao standard deviations for this patch: ``top_alone``,
        ``top_joint``, ``geo_alone``, ``geo_joint`` (m).

    Returns
    -------
    dict
        Relative errors, errors over the bounds, and whether the reported
        16–84 % intervals contain the truth.
    """
    top, bottom, shift = _on_planted_ground(row, patch)
    true_top, true_bottom = patch["top_depth_m"], patch["bottom_depth_m"]
    geo = math.sqrt(top * bottom) if top > 0 and bottom > 0 else math.nan
    true_geo = math.sqrt(true_top * true_bottom)
    lo = _number(row.get("top_depth_lo_m")) + shift
    hi = _number(row.get("top_depth_hi_m")) + shift
    geo_sd = _number(row.get("geo_mean_depth_sd_m"))
    out = {
        "patch_id": patch["patch_id"], "source_id": row.get("source_id"),
        "top_true_m": true_top, "top_m": top, "geo_true_m": true_geo, "geo_m": geo,
        "top_rel_error": top / true_top - 1.0, "geo_rel_error": geo / true_geo - 1.0,
        "top_covered": bool(lo <= true_top <= hi) if math.isfinite(lo) and math.isfinite(hi) else None,
        "geo_covered": (bool(abs(geo - true_geo) <= geo_sd) if math.isfinite(geo_sd) and math.isfinite(geo)
                        else None),
        "flags": row.get("flags") or "",
    }
    for name, error in (("top", top - true_top), ("geo", geo - true_geo)):
        for kind in ("alone", "joint"):
            sd = (bound or {}).get(f"{name}_{kind}", math.nan)
            out[f"{name}_over_crb_{kind}"] = abs(error) / sd if sd and math.isfinite(sd) else math.nan
    return out


# --------------------------------------------------------------------------- one survey


def score_survey(truth, result, bounds=None):
    """
    Score one interpretation.

    Parameters
    ----------
    truth : dict
    result : dict
        As returned by :func:`read_result`.
    bounds : dict or None
        ``{patch_id: {...}}`` Cramér–Rao standard deviations (see
        :func:`patch_errors`).

    Returns
    -------
    dict
        Counts (planted above the floor, found, claims, false by class),
        per-patch error rows, and the terrain coefficient's error over its
        reported sigma.
    """
    bounds = bounds or {}
    matches, false, other = match_sources(truth, result.get("sources", []))
    required = [p for p in truth["patches"] if p["above_floor"]]
    found = [p for p in required if p["patch_id"] in matches]
    classes = {}
    for _, kind in false:
        classes[kind] = classes.get(kind, 0) + 1
    counted_false = sum(n for kind, n in classes.items() if kind != "below floor")
    true_claims = len(matches)
    errors = [patch_errors(matches[p["patch_id"]], p, bounds.get(p["patch_id"])) for p in found]
    # The same counts for the sources geosp calls targets (status "target"),
    # leaving out those it draws as uncertain.
    is_target = lambda row: str(row.get("status", "target")) == "target"  # noqa: E731
    target_found = [p for p in found if is_target(matches[p["patch_id"]])]
    target_true = sum(is_target(r) for r in matches.values())
    target_false = sum(is_target(r) for r, kind in false if kind != "below floor")
    terrain = result.get("terrain") or {}
    k_true = truth["terrain"]["k_mv_per_m"]
    k = _number(terrain.get("slope_mv_per_m"))
    k_sd = _number(terrain.get("sd_mv_per_m"))
    return {
        "seed": truth.get("seed"), "ok": bool(result.get("ok")),
        "n_stations": truth.get("n_stations"),
        "n_planted": len(truth["patches"]), "n_required": len(required), "n_found": len(found),
        "n_claims": true_claims + counted_false + classes.get("below floor", 0),
        "n_true_claims": true_claims + classes.get("below floor", 0),
        "n_false": counted_false, "false_by_class": classes, "n_other_models": len(other),
        "patches": errors,
        "n_target_found": len(target_found), "n_target_claims": target_true + target_false,
        "n_target_true": target_true,
        "terrain_true": k_true, "terrain": k, "terrain_sd": k_sd,
        "terrain_z": (k - k_true) / k_sd if math.isfinite(k) and math.isfinite(k_sd) and k_sd > 0 else math.nan,
    }


# --------------------------------------------------------------------------- pooled


def _median(values):
    values = [v for v in values if v is not None and math.isfinite(v)]
    return float(np.median(values)) if values else math.nan


def _fraction(flags):
    flags = [f for f in flags if f is not None]
    return float(np.mean(flags)) if flags else math.nan


def pool(scores):
    """
    Pooled figures over surveys.

    Returns
    -------
    dict
        ``recall`` (found / required), ``precision`` (true claims / claims),
        medians of |relative error| and of |error| / Cramér–Rao σ for the top
        depth and √(top·bottom) (patch alone and joint bound), coverage of
        the 16–84 % intervals, the share of surveys whose terrain coefficient
        lies within 2 reported σ, false sources by class, and the number of
        surveys whose run failed.
    """
    required = sum(s["n_required"] for s in scores)
    found = sum(s["n_found"] for s in scores)
    claims = sum(s["n_claims"] for s in scores)
    true_claims = sum(s["n_true_claims"] for s in scores)
    rows = [r for s in scores for r in s["patches"]]
    classes = {}
    for s in scores:
        for kind, n in s["false_by_class"].items():
            classes[kind] = classes.get(kind, 0) + n
    terrain_z = [s["terrain_z"] for s in scores if math.isfinite(s["terrain_z"])]
    target_claims = sum(s.get("n_target_claims", 0) for s in scores)
    target_true = sum(s.get("n_target_true", 0) for s in scores)
    target_found = sum(s.get("n_target_found", 0) for s in scores)
    return {
        "surveys": len(scores), "failed_runs": sum(not s["ok"] for s in scores),
        "target_recall": target_found / required if required else math.nan,
        "target_precision": target_true / target_claims if target_claims else math.nan,
        "target_claims": target_claims,
        "required": required, "found": found, "claims": claims,
        "recall": found / required if required else math.nan,
        "precision": true_claims / claims if claims else math.nan,
        "false_by_class": classes,
        "median_abs_top_rel_error": _median([abs(r["top_rel_error"]) for r in rows]),
        "median_abs_geo_rel_error": _median([abs(r["geo_rel_error"]) for r in rows]),
        "median_top_over_crb_alone": _median([r["top_over_crb_alone"] for r in rows]),
        "median_top_over_crb_joint": _median([r["top_over_crb_joint"] for r in rows]),
        "median_geo_over_crb_alone": _median([r["geo_over_crb_alone"] for r in rows]),
        "median_geo_over_crb_joint": _median([r["geo_over_crb_joint"] for r in rows]),
        "top_coverage": _fraction([r["top_covered"] for r in rows]),
        "geo_coverage": _fraction([r["geo_covered"] for r in rows]),
        "terrain_within_2sd": (float(np.mean([abs(z) <= 2.0 for z in terrain_z])) if terrain_z else math.nan),
        "terrain_surveys": len(terrain_z),
    }
