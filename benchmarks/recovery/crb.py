"""
Cramér–Rao bounds for the planted patches of a synthetic survey.

The bound is the best standard deviation any unbiased estimator can reach on
that survey's station layout and noise: the square root of the diagonal of
the inverse Fisher information F = Jᵀ C⁻¹ J, where J holds the derivatives
of the noise-free data with respect to every parameter (nonlinear ones by
central differences of the benchmark's own forward model,
:func:`physics.patch_sp`; linear ones exactly) and C is the station noise
covariance the generator drew from (white plus an exponentially correlated
part). Gross outliers and, for raw readings, the reading and reduction errors
are left out, so the bound is a floor that the real problem cannot beat.

Two bounds per patch:

* ``alone``: the patch's own parameters plus the survey-wide nuisances (a
  constant, the quadratic regional, the terrain coefficient);
* ``joint``: every planted patch and the strengths of the cultural sources
  as well.

For the top depth z_t and the geometric-mean depth g = √(z_t z_b), the
standard deviation of g follows from the covariance of (z_t, z_b) by the
delta method, ∇g = (g / 2z_t, g / 2z_b).
"""

from __future__ import annotations

import copy
import math

import numpy as np
from scipy import linalg

from . import physics

# Nonlinear patch parameters: name -> (how to perturb a patch dict, relative or absolute step).
_DIP_STEP_DEG = 0.05


def _shift_along(patch, step):
    out = copy.deepcopy(patch)
    out["s0_m"] += step
    out["s1_m"] += step
    return out


def _stretch(patch, step):
    out = copy.deepcopy(patch)
    out["s0_m"] -= step / 2
    out["s1_m"] += step / 2
    out["length_m"] = out["s1_m"] - out["s0_m"]
    return out


def _set(name):
    def perturb(patch, step):
        out = copy.deepcopy(patch)
        out[name] = out[name] + step
        return out

    return perturb


def _ratio(patch, step):
    out = copy.deepcopy(patch)
    out["sigma_ratio"] = out["sigma_ratio"] * math.exp(step)
    return out


def patch_parameters(patch):
    """
    ``[(name, perturb, step)]`` for the nonlinear parameters of one patch.

    Steps: 10⁻³ of the depths and the length, 0.5 m along strike, 0.05° of
    dip, 10⁻³ in log σ ratio (only when the patch has a contrast).
    """
    params = [
        ("top_depth_m", _set("top_depth_m"), 1e-3 * patch["top_depth_m"]),
        ("bottom_depth_m", _set("bottom_depth_m"), 1e-3 * patch["bottom_depth_m"]),
        ("dip_deg", _set("dip_deg"), _DIP_STEP_DEG),
        ("length_m", _stretch, 1e-3 * patch["length_m"]),
        ("along_m", _shift_along, 0.5),
    ]
    if abs(patch.get("sigma_ratio", 1.0) - 1.0) > 1e-9:
        params.append(("log_sigma_ratio", _ratio, 1e-3))
    return params


def patch_columns(stations, patch):
    """
    Derivatives of one patch's surface SP (mV per unit parameter).

    Returns
    -------
    names : list of str
        The nonlinear parameters, then ``jump_mv``.
    columns : ndarray, shape (n_stations, n_parameters)
    """
    east, north, elev = stations
    names, columns = [], []
    for name, perturb, step in patch_parameters(patch):
        if name == "dip_deg" and patch["dip_deg"] + step > 90.0:
            # one-sided at a vertical patch (the dip is bounded at 90°)
            here = physics.patch_sp(east, north, elev, patch)
            below = physics.patch_sp(east, north, elev, perturb(patch, -step))
            column = (here - below) / step
        else:
            plus = physics.patch_sp(east, north, elev, perturb(patch, step))
            minus = physics.patch_sp(east, north, elev, perturb(patch, -step))
            column = (plus - minus) / (2 * step)
        names.append(name)
        columns.append(column)
    names.append("jump_mv")
    columns.append(physics.patch_sp(east, north, elev, patch) / patch["jump_mv"])
    return names, np.column_stack(columns)


def nuisance_columns(stations, truth):
    """Constant, quadratic regional (scaled coordinates) and the terrain term."""
    east, north, elev = stations
    x = (east - east.mean()) / 1000.0
    y = (north - north.mean()) / 1000.0
    names = ["constant", "regional_x", "regional_y", "regional_xx", "regional_xy", "regional_yy",
             "terrain_k"]
    return names, np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y, elev])


def cultural_columns(stations, truth):
    """One strength (scale) column per cultural source."""
    east, north, elev = stations
    names, columns = [], []
    for k, item in enumerate(truth.get("cultural", ())):
        names.append(f"cultural_{k}")
        columns.append(physics.pole_sp(east, north, elev, item["poles"]))
    return names, (np.column_stack(columns) if columns else np.zeros((east.size, 0)))


def noise_covariance(stations, noise):
    """White plus exponentially correlated station noise (mV²)."""
    east, north, _ = stations
    white = noise["white_sd_mv"] ** 2
    corr_sd = noise.get("correlated_sd_mv", 0.0) or 0.0
    length = noise.get("correlation_length_m", 1.0) or 1.0
    d = np.hypot(east[:, None] - east[None, :], north[:, None] - north[None, :])
    cov = corr_sd**2 * np.exp(-d / length)
    cov[np.diag_indices_from(cov)] += white
    return cov


def _whitener(cov):
    factor = linalg.cholesky(cov, lower=True)
    return lambda a: linalg.solve_triangular(factor, a, lower=True)


def _inverse_fisher(whitened):
    """(JᵀC⁻¹J)⁻¹ from whitened columns, with column scaling for conditioning."""
    scale = np.sqrt((whitened**2).sum(axis=0))
    scale[scale == 0] = 1.0
    q = whitened / scale
    fisher = q.T @ q
    inverse = linalg.pinvh(fisher)
    return inverse / np.outer(scale, scale)


def depth_bounds(names, covariance, patch, prefix=""):
    """Standard deviations of the top depth and of √(top·bottom) from a covariance."""
    i = names.index(prefix + "top_depth_m")
    j = names.index(prefix + "bottom_depth_m")
    top, bottom = patch["top_depth_m"], patch["bottom_depth_m"]
    g = math.sqrt(top * bottom)
    grad = np.array([g / (2 * top), g / (2 * bottom)])
    sub = covariance[np.ix_([i, j], [i, j])]
    return math.sqrt(max(covariance[i, i], 0.0)), math.sqrt(max(float(grad @ sub @ grad), 0.0))


def survey_bounds(truth, stations):
    """
    Cramér–Rao standard deviations of every planted patch's top depth and
    geometric-mean depth, the patch alone and all sources jointly.

    Parameters
    ----------
    truth : dict
        ``truth.json`` content.
    stations : tuple of arrays
        ``(east, north, elev)`` of every station (m).

    Returns
    -------
    dict
        ``{patch_id: {"top_alone", "geo_alone", "top_joint", "geo_joint"}}``
        in metres.
    """
    stations = tuple(np.asarray(a, dtype=float) for a in stations)
    white = _whitener(noise_covariance(stations, truth["noise"]))
    nuisance_names, nuisance = nuisance_columns(stations, truth)
    cultural_names, cultural = cultural_columns(stations, truth)
    blocks = []
    for patch in truth["patches"]:
        names, columns = patch_columns(stations, patch)
        blocks.append((patch, names, white(columns)))
    nuisance_w = white(nuisance)
    cultural_w = white(cultural) if cultural.shape[1] else cultural
    out = {}
    for patch, names, columns in blocks:
        cov = _inverse_fisher(np.hstack([columns, nuisance_w]))
        top_alone, geo_alone = depth_bounds(names + nuisance_names, cov, patch)
        out[patch["patch_id"]] = {"top_alone": top_alone, "geo_alone": geo_alone}
    all_names, all_columns = [], []
    for patch, names, columns in blocks:
        all_names += [f"{patch['patch_id']}:{n}" for n in names]
        all_columns.append(columns)
    all_columns += [cultural_w, nuisance_w]
    cov = _inverse_fisher(np.hstack(all_columns))
    all_names += cultural_names + nuisance_names
    for patch, _, _ in blocks:
        top_joint, geo_joint = depth_bounds(all_names, cov, patch, prefix=f"{patch['patch_id']}:")
        out[patch["patch_id"]].update(top_joint=top_joint, geo_joint=geo_joint)
    return out
