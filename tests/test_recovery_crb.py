"""
The recovery benchmark's Cramér–Rao bound against a brute-force Monte-Carlo
spread of an efficient estimator.

Reference: for Gaussian noise and a model that is close to linear over the
spread of the estimates (high signal-to-noise), the maximum-likelihood
estimator is unbiased and reaches the Cramér–Rao bound (textbook asymptotic
efficiency, e.g. Kay 1993, Fundamentals of Statistical Signal Processing,
ch. 7, from memory). So the standard deviation of least-squares estimates
over many noise realisations must match the bound computed from the Fisher
information, within the sampling error of a standard deviation from R
realisations (relative sd about 1/√(2R): 6 % at R = 150; the tolerance of
±25 % allows four of those plus a little non-linearity).
"""

import copy
import math
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from recovery import crb, physics  # noqa: E402

WHITE_SD = 1.0
REALISATIONS = 150


def simple_case():
    """A 1 km patch on a straight north-south fault under a 19 × 19 grid of stations."""
    rng = np.random.default_rng(5)
    e, n = np.meshgrid(np.linspace(-900.0, 900.0, 19), np.linspace(-900.0, 900.0, 19))
    east, north = e.ravel(), n.ravel()
    elev = 500.0 + rng.normal(0.0, 20.0, east.size)  # some relief so the terrain term is estimable
    patch = {"patch_id": "P1", "fault_id": "F1", "fault_trace": [[0.0, -3000.0], [0.0, 3000.0]],
             "dip_side": 1, "s0_m": 2500.0, "s1_m": 3500.0, "length_m": 1000.0,
             "top_depth_m": 100.0, "bottom_depth_m": 400.0, "dip_deg": 75.0, "jump_mv": 300.0,
             "sigma_ratio": 1.0, "ground_m": 500.0}
    truth = {"patches": [patch], "cultural": [],
             "noise": {"white_sd_mv": WHITE_SD, "correlated_sd_mv": 0.0, "correlation_length_m": 1.0}}
    return (east, north, elev), patch, truth


def _patch_from(p, base):
    log_top, log_height, dip, length, along = p
    top = math.exp(log_top)
    out = copy.deepcopy(base)
    centre = 0.5 * (base["s0_m"] + base["s1_m"]) + along
    out.update(top_depth_m=top, bottom_depth_m=top + math.exp(log_height), dip_deg=dip,
               s0_m=centre - length / 2, s1_m=centre + length / 2, length_m=length, jump_mv=1.0)
    return out


def _fit(data, stations, base, nuisance):
    """
    Variable projection: nonlinear (log top, log height, dip, length, along
    shift), linear jump and nuisances; returns (top, bottom).
    """
    east, north, elev = stations

    def residual(p):
        g = physics.patch_sp(east, north, elev, _patch_from(p, base))
        a = np.column_stack([g, nuisance])
        x = np.linalg.lstsq(a, data, rcond=None)[0]
        return (a @ x - data) / WHITE_SD

    top, bottom = base["top_depth_m"], base["bottom_depth_m"]
    start = np.array([math.log(top), math.log(bottom - top), base["dip_deg"], base["length_m"], 0.0])
    sol = optimize.least_squares(residual, start, x_scale=np.array([0.1, 0.1, 2.0, 50.0, 20.0]),
                                 bounds=([math.log(10.0), math.log(20.0), 30.0, 200.0, -400.0],
                                         [math.log(400.0), math.log(3000.0), 90.0, 3000.0, 400.0]))
    fitted = _patch_from(sol.x, base)
    return fitted["top_depth_m"], fitted["bottom_depth_m"]


@pytest.mark.slow
def test_crb_matches_monte_carlo_spread_of_least_squares():
    stations, patch, truth = simple_case()
    bounds = crb.survey_bounds(truth, stations)["P1"]
    _, nuisance = crb.nuisance_columns(stations, truth)
    clean = physics.patch_sp(*stations, patch)
    rng = np.random.default_rng(123)
    tops, geos = [], []
    for _ in range(REALISATIONS):
        data = clean + rng.normal(0.0, WHITE_SD, clean.size)
        top, bottom = _fit(data, stations, patch, nuisance)
        tops.append(top)
        geos.append(math.sqrt(top * bottom))
    # Unbiased to well within the spread (the premise of the comparison).
    assert abs(np.mean(tops) - patch["top_depth_m"]) < 0.3 * bounds["top_alone"]
    ratio_top = np.std(tops, ddof=1) / bounds["top_alone"]
    ratio_geo = np.std(geos, ddof=1) / bounds["geo_alone"]
    assert 0.75 < ratio_top < 1.25, ratio_top
    assert 0.75 < ratio_geo < 1.25, ratio_geo


def test_joint_bound_is_never_tighter_than_the_bound_alone():
    # Freeing more parameters can only widen a Cramér–Rao bound (the inverse
    # of a Schur complement grows); a second patch nearby makes it wider.
    stations, patch, truth = simple_case()
    second = copy.deepcopy(patch)
    second.update(patch_id="P2", s0_m=3600.0, s1_m=4300.0, length_m=700.0, jump_mv=-80.0)
    truth["patches"].append(second)
    out = crb.survey_bounds(truth, stations)
    for pid in ("P1", "P2"):
        assert out[pid]["top_joint"] >= out[pid]["top_alone"] * (1 - 1e-9)
        assert out[pid]["geo_joint"] >= out[pid]["geo_alone"] * (1 - 1e-9)
    assert out["P1"]["top_joint"] > 1.01 * out["P1"]["top_alone"]


def test_bound_scales_with_the_noise():
    # The Fisher information scales as 1/σ², so the bound scales as σ (exact).
    stations, _, truth = simple_case()
    a = crb.survey_bounds(truth, stations)["P1"]
    truth["noise"]["white_sd_mv"] = 2 * WHITE_SD
    b = crb.survey_bounds(truth, stations)["P1"]
    assert b["top_alone"] == pytest.approx(2 * a["top_alone"], rel=1e-6)
    assert b["geo_alone"] == pytest.approx(2 * a["geo_alone"], rel=1e-6)
