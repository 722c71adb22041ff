"""
Compare a geosp run on the demo area with what was planted (truth.json).

Used by the end-to-end test and by docs/make_demo_results.py. The
tolerances are those the fitting stage promises on synthetic data: top depth
within 20 % and the geometric-mean depth √(top·bottom) within 10 %.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
TOP_DEPTH_RTOL = 0.20
GEO_MEAN_RTOL = 0.10
# A fitted source counts as "at the pipeline" when its top edge lies this close to the route.
PIPELINE_REACH_M = 500.0


def load_truth(path=None):
    with open(path or HERE / "truth.json", encoding="utf-8") as handle:
        return json.load(handle)


def _angle_diff(a, b):
    return abs((a - b + 180.0) % 360.0 - 180.0)


def compare_sources(sources, truth=None):
    """
    One row per planted patch with the nearest fitted fault patch on the same fault.

    ``sources``: iterable of source rows (dicts) or a DataFrame with the
    ``sources`` layer fields. The jump is compared in the planted dip
    direction's sense (a fit with the opposite dip direction has its jump
    negated, which is exact for a vertical patch). Depths are compared as
    elevations: a fit whose depths refer to another ground level
    (``ground_m``) than the planted one is shifted onto the planted ground
    before the comparison.
    """
    truth = truth or load_truth()
    frame = pd.DataFrame(list(sources) if not isinstance(sources, pd.DataFrame) else sources)
    rows = []
    for planted in truth["sources"]:
        row = {"planted": planted["source_id"], "fault_id": planted["fault_id"],
               "top_depth_true_m": planted["top_depth_m"], "bottom_depth_true_m": planted["bottom_depth_m"],
               "dip_true_deg": planted["dip_deg"], "jump_true_mv": planted["jump_mv"],
               "length_true_m": planted["length_m"]}
        candidates = pd.DataFrame()
        if len(frame):
            on_fault = frame["fault_id"].astype(str).str.split("/").str[0] == planted["fault_id"]
            candidates = frame[on_fault & (frame["model"] == "fault_patch")]
        if len(candidates) == 0:
            row.update(found=False, within_tolerance=False)
            rows.append(row)
            continue
        distance = np.hypot(candidates["top_x"] - planted["top_x"], candidates["top_y"] - planted["top_y"])
        best = candidates.iloc[int(np.argmin(distance.to_numpy()))]
        flipped = _angle_diff(best["dip_dir_deg"], planted["dip_dir_deg"]) > 90.0
        ground = best.get("ground_m", np.nan)
        shift = float(planted["ground_m"] - ground) if np.isfinite(ground) else 0.0
        top, bottom = best["top_depth_m"] + shift, best["bottom_depth_m"] + shift
        geo_true = np.sqrt(planted["top_depth_m"] * planted["bottom_depth_m"])
        geo_fit = np.sqrt(top * bottom)
        row.update(
            found=True, source_id=best["source_id"], offset_m=float(distance.min()),
            datum_shift_m=shift, top_depth_m=float(top),
            top_depth_lo_m=float(best.get("top_depth_lo_m", np.nan) + shift),
            top_depth_hi_m=float(best.get("top_depth_hi_m", np.nan) + shift), bottom_depth_m=float(bottom),
            geo_mean_true_m=float(geo_true), geo_mean_m=float(geo_fit), dip_deg=float(best["dip_deg"]),
            jump_mv=float(-best["jump_mv"] if flipped else best["jump_mv"]), length_m=float(best["length_m"]),
        )
        row["top_depth_error"] = row["top_depth_m"] / planted["top_depth_m"] - 1.0
        row["geo_mean_error"] = geo_fit / geo_true - 1.0
        row["within_tolerance"] = bool(abs(row["top_depth_error"]) <= TOP_DEPTH_RTOL
                                       and abs(row["geo_mean_error"]) <= GEO_MEAN_RTOL)
        rows.append(row)
    return pd.DataFrame(rows)


def false_sources(sources, truth=None):
    """Fitted fault sources on source-free faults and near the pipeline (both should be empty)."""
    truth = truth or load_truth()
    frame = pd.DataFrame(list(sources) if not isinstance(sources, pd.DataFrame) else sources)
    if not len(frame):
        return {"source_free_faults": [], "at_pipeline": []}
    patches = frame[frame["model"] == "fault_patch"]
    base = patches["fault_id"].astype(str).str.split("/").str[0]
    on_clean = patches[base.isin(truth["source_free_faults"])]["source_id"].tolist()
    pipe = truth["pipeline"]
    a = np.array([pipe["start_x"], pipe["start_y"]])
    b = np.array([pipe["end_x"], pipe["end_y"]])
    p = patches[["top_x", "top_y"]].to_numpy(dtype=float)
    u = np.clip(((p - a) @ (b - a)) / ((b - a) @ (b - a)), 0.0, 1.0)
    dist = np.hypot(*(p - (a + u[:, None] * (b - a))).T) if len(p) else np.array([])
    at_pipe = patches["source_id"][dist < PIPELINE_REACH_M].tolist() if len(p) else []
    return {"source_free_faults": on_clean, "at_pipeline": at_pipe}
