"""
Per-segment inversion of SP stations for fault-patch sources, with uncertainties.

For each detected fault segment, :func:`fit_segment` fits competing models
to the stations of the segment's corridor (no source, one patch, two patches
along strike, a shallow pole pair), picks one by BIC and reports the chosen
sources as rows of the ``sources`` layer. :func:`fit_segments` fits every
segment (serially, over processes or on a Dask cluster) and re-solves all
accepted source strengths jointly with one regional plane.

Conventions are those of ``contract.md``: ``jump_mv`` is the dip-direction
side minus the other side; strike is clockwise from grid north, dip toward
strike + 90°.
"""

from __future__ import annotations

import difflib
import inspect
import logging
import time
import warnings
from dataclasses import replace
from functools import partial

import numpy as np
import pandas as pd
import shapely
from scipy import linalg, optimize, sparse
from scipy.spatial import cKDTree
from scipy.stats import qmc

from . import physics
from ._network import bridge_covariance
from .errors import InputError, OptionError
from .models import FitResult, SegmentFit
from .parallel import item_seed, map_segments, shared_pool
from .segments import assign_points, corridor_distance

logger = logging.getLogger(__name__)

_MODELS = ("fault_patch", "two_patches", "pole_pair")
_UNCERTAINTY = ("jacobian", "profile", "mcmc")
_HUBER_C = 1.345  # Huber (1964) tuning constant: 95 % efficiency for Gaussian noise
_REGIONAL_SCALE = 1000.0  # regional slopes are solved per km for conditioning
_MIN_STATIONS = 12  # one patch has 9 parameters; keep a few degrees of freedom
_POLE_MAX_DEPTH = 50.0  # m, "shallow" pole pair (physics.md §3, common practice)
_POLE_MAX_SEPARATION = 200.0  # m
_AUTO_WINDOW = 1.5  # fit window half-width over the detection corridor ("auto")
_JOINT_ROUNDS = 2  # joint fit + refits of interacting sources, at most this many times
_SOURCE_FIELDS = (
    "source_id", "fault_id", "segment_id", "model", "top_x", "top_y", "strike_deg", "dip_deg",
    "dip_dir_deg", "top_depth_m", "bottom_depth_m", "length_m", "jump_mv", "top_depth_lo_m",
    "top_depth_hi_m", "jump_lo_mv", "jump_hi_mv", "rms_mv", "chi2_red", "n_stations",
    "bic_gain", "sigma_ratio", "flags",
)


# --------------------------------------------------------------------------------------
# Forward models used by the fit (the physics lives in geosp.physics)
# --------------------------------------------------------------------------------------

def _pole_pair_local(along, across, pos, neg):
    """Unit-strength pole pair 1/r+ − 1/r− (1/m) in the local frame [Telford1990]_."""
    return physics.pole_pair_sp(
        (along, across), pos_x=pos[0], pos_y=pos[1], pos_depth_m=pos[2],
        neg_x=neg[0], neg_y=neg[1], neg_depth_m=neg[2], k_mv_m=1.0,
    )


# --------------------------------------------------------------------------------------
# Models: parameter layout, bounds and basis functions
# --------------------------------------------------------------------------------------

class _Model:
    """
    One candidate model in transformed nonlinear parameters ``p``.

    Patch models: per patch (s_c, log L, log z_t, log(z_b − z_t)), then the
    shared dip δ′ (degrees, from the +t side), then optionally the trace
    offset Δt (m) and log of the lobe ratio. Pole pair: (s+, t+, log z+,
    Δs, Δt, log z−). The linear parameters are one strength per column of
    the basis, then the regional plane (c0, c_s, c_t).
    """

    def __init__(self, name, data, bounds):
        self.name = name
        self.data = data
        b = bounds
        names, lower, upper = [], [], []
        if name in ("fault_patch", "two_patches"):
            self.n_patches = 1 if name == "fault_patch" else 2
            for j in range(self.n_patches):
                names += [f"centre{j}", f"log_length{j}", f"log_top{j}", f"log_height{j}"]
                lower += [b["centre"][0], np.log(b["length"][0]), np.log(b["top"][0]),
                          np.log(b["height"][0])]
                upper += [b["centre"][1], np.log(b["length"][1]), np.log(b["top"][1]),
                          np.log(b["height"][1])]
            names.append("dip")
            lower.append(b["dip"][0])
            upper.append(b["dip"][1])
            self.offset_index = self.ratio_index = None
            if b["offset"] > 0:
                self.offset_index = len(names)
                names.append("trace_offset")
                lower.append(-b["offset"])
                upper.append(b["offset"])
            if b["fit_ratio"]:
                self.ratio_index = len(names)
                names.append("log_ratio")
                lower.append(np.log(0.1))
                upper.append(np.log(10.0))
            self.n_columns = self.n_patches
        elif name == "pole_pair":
            self.n_patches = 0
            zlo, zhi = np.log(b["pole_depth"][0]), np.log(b["pole_depth"][1])
            sep = _POLE_MAX_SEPARATION / np.sqrt(2.0)
            names = ["pos_s", "pos_t", "log_pos_depth", "sep_s", "sep_t", "log_neg_depth"]
            lower = [b["s_span"][0], b["t_span"][0], zlo, -sep, -sep, zlo]
            upper = [b["s_span"][1], b["t_span"][1], zhi, sep, sep, zhi]
            self.n_columns = 1
        else:  # "none": regional plane only
            self.n_patches = 0
            self.n_columns = 0
        self.names = names
        self.lower = np.array(lower, dtype=float)
        self.upper = np.array(upper, dtype=float)
        self.k_nonlinear = len(names)
        self.k = self.k_nonlinear + self.n_columns + 3

    def canonical(self, p):
        """Patches sorted by along-strike centre (removes the label-switching symmetry)."""
        if self.n_patches < 2:
            return p
        blocks = p[:4 * self.n_patches].reshape(self.n_patches, 4)
        order = np.argsort(blocks[:, 0], kind="stable")
        q = p.copy()
        q[:4 * self.n_patches] = blocks[order].ravel()
        return q

    # natural parameters ---------------------------------------------------------------
    def patches(self, p):
        """List of dicts (centre, length, top, bottom) plus dip, offset, ratio."""
        out = []
        for j in range(self.n_patches):
            c, log_l, log_t, log_h = p[4 * j:4 * j + 4]
            top = np.exp(log_t)
            out.append({"centre": c, "length": np.exp(log_l), "top": top,
                        "bottom": top + np.exp(log_h)})
        dip = p[4 * self.n_patches]
        offset = p[self.offset_index] if self.offset_index is not None else 0.0
        ratio = np.exp(p[self.ratio_index]) if self.ratio_index is not None else 1.0
        return out, dip, offset, ratio

    def basis(self, p, along=None, across=None, offset=None):
        """
        Unit-strength columns (n, n_columns) at the stations (or at given local
        points with their depth offsets, m).
        """
        if along is None:
            along, across, offset = self.data["s"], self.data["t"], self.data["offset"]
        if self.name == "pole_pair":
            pos = (p[0], p[1], np.exp(p[2]))
            neg = (p[0] + p[3], p[1] + p[4], np.exp(p[5]))
            self.data["counter"][0] += 1
            return _pole_pair_local(along, across, pos, neg)[:, None]
        if self.n_columns == 0:
            return np.zeros((along.size, 0))
        patches, dip, shift, ratio = self.patches(p)
        cols = []
        for patch in patches:
            self.data["counter"][0] += 1
            cols.append(physics.patch_sp_local(
                along, across - shift, centre_m=patch["centre"], length_m=patch["length"],
                depth_top_m=patch["top"], depth_bottom_m=patch["bottom"], dip_deg=dip,
                jump_mv=1.0, sigma_ratio=ratio, depth_offset_m=offset,
            ))
        return np.column_stack(cols)

    def basis_jacobian(self, p, g0=None):
        """∂(basis)/∂p in the transformed parameters, shape (n, n_columns, k)."""
        if self.n_patches == 0 or not hasattr(physics, "patch_sp_local_jacobian"):
            return self._difference_jacobian(p, g0)
        along, across, depth_offset = self.data["s"], self.data["t"], self.data["offset"]
        patches, dip, offset, ratio = self.patches(p)
        k = self.k_nonlinear
        jac = np.zeros((along.size, self.n_patches, k))
        for j, patch in enumerate(patches):
            self.data["counter"][0] += 1
            g, dg = physics.patch_sp_local_jacobian(
                along, across - offset, centre_m=patch["centre"], length_m=patch["length"],
                depth_top_m=patch["top"], depth_bottom_m=patch["bottom"], dip_deg=dip,
                jump_mv=1.0, sigma_ratio=ratio, depth_offset_m=depth_offset,
            )
            height = patch["bottom"] - patch["top"]
            jac[:, j, 4 * j] = dg[:, 0]
            jac[:, j, 4 * j + 1] = patch["length"] * dg[:, 1]
            jac[:, j, 4 * j + 2] = patch["top"] * (dg[:, 2] + dg[:, 3])
            jac[:, j, 4 * j + 3] = height * dg[:, 3]
            jac[:, j, 4 * self.n_patches] = dg[:, 4]
            if self.ratio_index is not None:
                # g = g0·2/(1+r) on the +normal side and g0·2r/(1+r) on the other
                plus = (across - offset) > 0
                jac[:, j, self.ratio_index] = g * np.where(plus, -ratio, 1.0) / (1.0 + ratio)
        if self.offset_index is not None:
            i = self.offset_index
            step = 1e-6 * (self.upper[i] - self.lower[i])
            q = p.copy()
            q[i] = q[i] + step if q[i] + step <= self.upper[i] else q[i] - step
            g0 = self.basis(p) if g0 is None else g0
            jac[:, :, i] = (self.basis(q) - g0) / (q[i] - p[i])
        return jac

    def _difference_jacobian(self, p, g0=None):
        """Forward differences in the transformed parameters, (n, m, k)."""
        g0 = self.basis(p) if g0 is None else g0
        jac = np.empty(g0.shape + (self.k_nonlinear,))
        span = self.upper - self.lower
        for i in range(self.k_nonlinear):
            step = 1e-6 * max(span[i], 1e-3)
            q = p.copy()
            # step away from the nearer bound so that q stays feasible
            if q[i] + step > self.upper[i]:
                step = -step
            q[i] += step
            jac[:, :, i] = (self.basis(q) - g0) / step
        return jac

    def natural_transform(self, p):
        """Matrix T (n_natural, k_nonlinear): ∂natural/∂p, rows in ``natural_names`` order."""
        k = self.k_nonlinear
        if self.name == "pole_pair":
            t = np.eye(k)
            t[2, 2] = np.exp(p[2])
            t[5, 5] = np.exp(p[5])
            return t
        rows = []
        for j in range(self.n_patches):
            c, log_l, log_t, log_h = p[4 * j:4 * j + 4]
            for which in range(4):
                row = np.zeros(k)
                if which == 0:
                    row[4 * j] = 1.0
                elif which == 1:
                    row[4 * j + 1] = np.exp(log_l)
                elif which == 2:
                    row[4 * j + 2] = np.exp(log_t)
                else:  # bottom = exp(log_t) + exp(log_h)
                    row[4 * j + 2] = np.exp(log_t)
                    row[4 * j + 3] = np.exp(log_h)
                rows.append(row)
        for i in range(4 * self.n_patches, k):
            row = np.zeros(k)
            row[i] = np.exp(p[i]) if i == self.ratio_index else 1.0
            rows.append(row)
        return np.array(rows)

    @property
    def natural_names(self):
        if self.name == "pole_pair":
            return ["pos_s_m", "pos_t_m", "pos_depth_m", "sep_s_m", "sep_t_m", "neg_depth_m"]
        names = []
        for j in range(self.n_patches):
            names += [f"centre_m[{j}]", f"length_m[{j}]", f"top_depth_m[{j}]",
                      f"bottom_depth_m[{j}]"]
        names.append("dip_deg")
        if self.offset_index is not None:
            names.append("trace_offset_m")
        if self.ratio_index is not None:
            names.append("sigma_ratio")
        if self.n_patches == 1:
            names = [n.replace("[0]", "") for n in names]
        return names

    @property
    def linear_names(self):
        if self.name == "pole_pair":
            names = ["pole_k_mv_m"]
        elif self.n_patches == 1:
            names = ["jump_mv"]
        else:
            names = [f"jump_mv[{j}]" for j in range(self.n_columns)]
        return names + ["regional_mv", "regional_s_mv_per_km", "regional_t_mv_per_km"]


# --------------------------------------------------------------------------------------
# Variable projection
# --------------------------------------------------------------------------------------

class _Whitener:
    """
    Applies W^½ to data or design columns, so that least squares on W^½r is
    weighted (or generalised) least squares on r.

    Independent noise: W^½ = diag(√w). Network covariance (generalised least
    squares), C = E + U Q Uᵀ with E = diag(var) plus the within-chain bridges
    (block diagonal) and U Q Uᵀ the low-rank part carried by the loop
    junctions: with L_E the Cholesky factor of E (sparse, block by block) and
    Ũ = L_E⁻¹ U Q^½ = P S Rᵀ, W^½ = (I + ŨŨᵀ)^(−½) L_E⁻¹ with
    (I + ŨŨᵀ)^(−½) = I − P (I − (I + S²)^(−½)) Pᵀ, so that (W^½)ᵀW^½ = C⁻¹
    exactly, at the cost of a sparse and two thin products per use.
    """

    def __init__(self, weights=None, var=None, parts=None):
        self.sw = self.inverse = self.p = None
        if parts is None:
            self.sw = np.sqrt(weights)
            return
        n = var.size
        chain = parts["chain"]
        rows, cols, vals = [], [], []
        single = np.flatnonzero(chain < 0)
        rows.append(single)
        cols.append(single)
        vals.append(1.0 / np.sqrt(var[single]))
        on_chain = np.flatnonzero(chain >= 0)
        for members in np.split(on_chain[np.argsort(chain[on_chain], kind="stable")],
                                np.flatnonzero(np.diff(np.sort(chain[on_chain]))) + 1):
            if members.size == 0:
                continue
            e = np.diag(var[members]) + bridge_covariance(parts["c"][members],
                                                          parts["total"][members])
            factor = linalg.cholesky(e, lower=True, check_finite=False)
            inv = linalg.solve_triangular(factor, np.eye(members.size), lower=True,
                                          check_finite=False)
            i, j = np.tril_indices(members.size)
            rows.append(members[i])
            cols.append(members[j])
            vals.append(inv[i, j])
        self.inverse = sparse.csr_matrix(
            (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n, n))
        q = parts["q"]
        if q.shape[0]:
            w, vec = np.linalg.eigh(q)
            ut = self.inverse @ (parts["u"] @ (vec * np.sqrt(np.clip(w, 0.0, None))))
            # left singular vectors of Ũ from the small Gram matrix ŨᵀŨ = R S² Rᵀ
            s2, r = np.linalg.eigh(ut.T @ ut)
            keep = s2 > 1e-12 * max(float(s2.max()), 1e-300)
            self.p = ut @ (r[:, keep] / np.sqrt(s2[keep]))
            self.shrink = 1.0 - 1.0 / np.sqrt(1.0 + s2[keep])

    def __call__(self, values):
        if self.inverse is None:
            return values * (self.sw if values.ndim == 1 else self.sw[:, None])
        out = self.inverse @ values
        if self.p is not None:
            if out.ndim == 1:
                out = out - self.p @ (self.shrink * (self.p.T @ out))
            else:
                out = out - self.p @ (self.shrink[:, None] * (self.p.T @ out))
        return out


class _Noise:
    """
    Noise of the stations of one fit: independent variances ``var`` (mV²,
    the station weights already divided in) plus, for reduced gradient
    surveys, the network covariance ``network`` (a :class:`_Network`,
    correlated along the lines between loop crossings; physics notes §4).
    """

    def __init__(self, var, network=None):
        self.var = np.asarray(var, dtype=float)
        self.network = network

    def whitener(self, robust):
        """W^½ with Huber weights ``robust`` applied to the independent part."""
        if self.network is None:
            return _Whitener(weights=robust / self.var)
        return _Whitener(var=self.var / robust, parts=self.network.parts)


class _Network:
    """
    Network covariance of a fit's stations in factored form
    (:meth:`geosp._network.NetworkCovariance.parts`) and the stations' own
    noise (mV).
    """

    def __init__(self, parts, independent_sigma_mv):
        self.parts = parts
        self.independent_sigma_mv = float(independent_sigma_mv)

    def subset(self, keep):
        p = self.parts
        parts = {"u": p["u"][keep], "q": p["q"], "chain": p["chain"][keep],
                 "c": p["c"][keep], "total": p["total"][keep]}
        return _Network(parts, self.independent_sigma_mv)

    def diagonal(self):
        """Network variance of each station (mV²)."""
        p = self.parts
        junction = np.einsum("ij,jk,ik->i", p["u"], p["q"], p["u"])
        return junction + np.where(p["chain"] >= 0, p["c"] - p["c"] ** 2 / p["total"], 0.0)


def _station_noise(weight, sigma, network=None):
    """
    Noise model of a fit's stations and each station's total sigma (mV, for
    the Huber weights): independent ``sigma`` (mV) divided by the station
    weights, or with ``network`` (a :class:`_Network` over the same stations)
    the stations' own noise plus the network covariance (generalised least
    squares).
    """
    if network is None:
        return _Noise(sigma ** 2 / weight), sigma
    own = max(network.independent_sigma_mv, 1e-3)
    return _Noise(own ** 2 / weight, network), np.sqrt(own ** 2 + network.diagonal())


class _Problem:
    """Weighted data, variable projection and optimisation for one model."""

    def __init__(self, model, data, white):
        self.model = model
        self.data = data
        self.white = white  # W^½ (a _Whitener)
        self.dw = white(data["d"])
        self.regional_w = white(data["regional"])

    def solve(self, p, fixed=None):
        """
        Linear parameters for ``p`` by weighted least squares.

        ``fixed`` = (column, value) holds one source strength fixed (profile of
        a jump). Returns (x, weighted residual, basis, weighted design).
        """
        g = self.model.basis(p)
        aw = np.hstack([self.white(g), self.regional_w])
        rhs = self.dw
        if fixed is not None:
            col, value = fixed
            rhs = rhs - value * aw[:, col]
            free = np.delete(np.arange(aw.shape[1]), col)
            xf = np.linalg.lstsq(aw[:, free], rhs, rcond=None)[0]
            x = np.empty(aw.shape[1])
            x[free] = xf
            x[col] = value
            return x, self.dw - aw @ x, g, aw
        x = np.linalg.lstsq(aw, rhs, rcond=None)[0]
        return x, self.dw - aw @ x, g, aw

    def residual(self, p, fixed=None):
        return self.solve(p, fixed)[1]

    def cost(self, p, fixed=None):
        r = self.residual(p, fixed)
        return float(r @ r)

    def kaufman_jacobian(self, p, fixed=None, free=None):
        """Kaufman (1975) approximation −Π⊥ W½ (∂A/∂θ) x̂ of the reduced Jacobian."""
        x, _, g, aw = self.solve(p, fixed)
        dg = self.model.basis_jacobian(p, g)  # (n, m, k)
        m = self.model.n_columns
        v = self.white(np.einsum("nmk,m->nk", dg, x[:m]))
        cols = np.arange(aw.shape[1])
        if fixed is not None:
            cols = np.delete(cols, fixed[0])
        q, _ = np.linalg.qr(aw[:, cols])
        jac = -(v - q @ (q.T @ v))
        return jac if free is None else jac[:, free]

    def local_fit(self, p0, *, fixed=None, hold=None, max_nfev=200):
        """
        TRF from ``p0`` within the bounds; ``hold`` = (index, value) fixes one
        nonlinear parameter (profile likelihood). Returns (p, cost).
        """
        lower, upper = self.model.lower, self.model.upper
        free = np.arange(self.model.k_nonlinear)
        p_base = np.array(p0, dtype=float)
        if hold is not None:
            p_base[hold[0]] = hold[1]
            free = np.delete(free, hold[0])
        if free.size == 0:
            return p_base, self.cost(p_base, fixed)

        def full(z):
            p = p_base.copy()
            p[free] = z
            return p

        span = upper[free] - lower[free]
        z0 = np.clip(p_base[free], lower[free] + 1e-9 * span, upper[free] - 1e-9 * span)
        result = optimize.least_squares(
            lambda z: self.residual(full(z), fixed),
            z0,
            jac=lambda z: self.kaufman_jacobian(full(z), fixed, free),
            bounds=(lower[free], upper[free]),
            method="trf",
            x_scale="jac",
            max_nfev=max_nfev,
        )
        p = full(result.x)
        return p, self.cost(p, fixed)

    def global_fit(self, rng, n_starts, n_local):
        """Sobol search of the reduced cost, then TRF from the best distinct points."""
        k = self.model.k_nonlinear
        sobol = qmc.Sobol(d=k, scramble=True, seed=rng)
        u = sobol.random_base2(max(1, int(np.ceil(np.log2(max(n_starts, 2))))))
        points = self.model.lower + u * (self.model.upper - self.model.lower)
        costs = np.array([self.cost(p) for p in points])
        order = np.argsort(costs)
        chosen = []
        for i in order:
            if len(chosen) >= n_local:
                break
            if all(np.max(np.abs(u[i] - u[j])) > 0.1 for j in chosen):
                chosen.append(i)
        minima = [self.local_fit(points[i]) for i in chosen]
        minima = [(self.model.canonical(p), cost) for p, cost in minima]
        minima.sort(key=lambda item: item[1])
        return minima


# --------------------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------------------

def _fit_ratio(option, detection):
    """Whether the conductivity ratio is a free parameter (``fit_sigma_ratio``)."""
    if option == "auto":
        return float((detection.best_template or {}).get("sigma_ratio", 1.0)) != 1.0
    return bool(option)


def _check_options(models, n_starts, n_local, uncertainty, dip_range_deg, huber_passes,
                   fit_sigma_ratio):
    if not (fit_sigma_ratio == "auto" or isinstance(fit_sigma_ratio, (bool, np.bool_))):
        raise OptionError("[fit] fit_sigma_ratio", f"got {fit_sigma_ratio!r}.",
                          'Use true, false or "auto".')
    unknown = [m for m in models if m not in _MODELS]
    if unknown:
        raise OptionError("[fit] models", f"unknown model(s) {unknown}.",
                          f"Choose from {list(_MODELS)}.")
    if uncertainty not in _UNCERTAINTY:
        raise OptionError("[fit] uncertainty", f"got {uncertainty!r}.",
                          f"Choose one of {list(_UNCERTAINTY)}.")
    if int(n_starts) < 1 or int(n_local) < 1 or int(huber_passes) < 1:
        raise OptionError("[fit]", "n_starts, n_local and huber_passes must be at least 1.",
                          "Use positive whole numbers.")
    lo, hi = (float(v) for v in dip_range_deg)
    if not 0.0 < lo < hi <= 90.0:
        raise OptionError("[fit] dip_range_deg", f"got {list(dip_range_deg)}.",
                          "Give [low, high] with 0 < low < high <= 90 degrees.")


def _huber_loss(u):
    """Huber (1964) loss on standardised residuals; equals u² inside ±c."""
    a = np.abs(u)
    return np.where(a <= _HUBER_C, u * u, 2.0 * _HUBER_C * a - _HUBER_C ** 2)


def _bound_flags(model, p):
    flags = []
    span = model.upper - model.lower
    near = (p - model.lower < 1e-3 * span) | (model.upper - p < 1e-3 * span)
    for i in np.flatnonzero(near):
        name = model.names[i]
        if name == "dip" and model.upper[i] == 90.0 and p[i] > 89.0:
            continue  # vertical is a physical limit, not an arbitrary bound
        base = name.rstrip("0123456789")
        label = _BOUND_LABELS.get(base, base)
        if model.n_patches > 1 and base != name:
            label = f"{label}[{name[len(base):]}]"
        flags.append(f"bound:{label}")
    return flags


_BOUND_LABELS = {"centre": "centre_m", "log_length": "length_m", "log_top": "top_depth_m",
                 "log_height": "height_m", "dip": "dip_deg", "trace_offset": "trace_offset_m",
                 "log_ratio": "sigma_ratio", "log_pos_depth": "pos_depth_m",
                 "log_neg_depth": "neg_depth_m", "sep_s": "separation_m", "sep_t": "separation_m"}


def _covariance(problem, p, x, s2):
    """
    Linearised covariance of (natural nonlinear, linear) parameters: s²(JᵀWJ)⁻¹ by SVD.
    """
    model = problem.model
    g = model.basis(p)
    m = model.n_columns
    dg = model.basis_jacobian(p, g)
    j_theta = problem.white(np.einsum("nmk,m->nk", dg, x[:m]))
    aw = np.hstack([problem.white(g), problem.regional_w])
    jac = np.hstack([j_theta, aw])
    _, sv, vt = np.linalg.svd(jac, full_matrices=False)
    keep = sv > sv[0] * 1e-10
    inv = (vt[keep].T / sv[keep] ** 2) @ vt[keep]
    cov_t = s2 * inv
    k = model.k_nonlinear
    t_nat = model.natural_transform(p)
    n_nat = t_nat.shape[0]
    full_t = np.zeros((n_nat + aw.shape[1], k + aw.shape[1]))
    full_t[:n_nat, :k] = t_nat
    full_t[n_nat:, k:] = np.eye(aw.shape[1])
    cov = full_t @ cov_t @ full_t.T
    names = model.natural_names + model.linear_names
    return cov, names, cov_t


def _terrain_offsets(elevation, across, used, spacing, terrain):
    """
    Depth offsets (m) of the stations from the fit's datum, and the datum (m).

    The datum is the median elevation of the used stations within two
    station spacings (at least 50 m) of the trace, else of all used stations;
    without elevations (or with ``terrain`` off) the offsets are 0 and the
    datum NaN.
    """
    known = np.isfinite(elevation)
    if not terrain or not np.any(known & used):
        return np.zeros(elevation.size), np.nan
    near = known & used & (np.abs(across) <= max(50.0, 2.0 * spacing))
    pool = elevation[near] if near.sum() >= 3 else elevation[known & used]
    ground = float(np.median(pool))
    return np.where(known, elevation - ground, 0.0), ground


def _station_spacing(s, t):
    if s.size < 2:
        return 1.0
    dist, _ = cKDTree(np.column_stack([s, t])).query(np.column_stack([s, t]), k=2)
    return float(np.median(dist[:, 1]))


# --------------------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------------------

def fit_segment(stations, detection, *, models=_MODELS, n_starts=512, n_local=8,
                uncertainty="profile", huber=True, huber_passes=4, dip_range_deg=(30.0, 90.0),
                fit_sigma_ratio="auto", max_trace_offset_m=0.0, min_bic_gain=10.0,
                terrain=True, mcmc_steps=1500, mcmc_walkers=32, seed=0):
    """
    Fit fault-patch sources (and rival models) to the stations of one segment.

    The stations ``detection.station_index`` are put in the segment's local
    frame (``s`` along strike, ``t`` toward the dip direction). Each
    candidate model is fitted by variable projection [Golub1973]_,
    [Kaufman1975]_: the nonlinear geometry θ is searched with Sobol points
    and refined with bounded trust-region least squares, while the source
    strengths and a regional plane ``c0 + c_s·s + c_t·t`` are solved
    linearly for every θ. The potential of a patch is
    :func:`geosp.physics.patch_sp_local`.

    Parameters
    ----------
    stations : Stations
        All stations; ``sp_mv`` (mV) is fitted, ``sigma_mv`` (mV) gives the
        noise where finite (else ``detection.noise_mv``), and ``weight``
        multiplies 1/σ².
    detection : Detection
        The segment and its corridor stations.
    models : list of str
        Candidate source models besides "none" (regional plane only):
        "fault_patch" (one rectangular patch), "two_patches" (two patches
        along strike sharing the dip) and "pole_pair" (a shallow pair of
        point poles: depth at most 50 m, separation at most 200 m, the
        signature of casings, pipelines and cables). Default: all three.
    n_starts : int
        Sobol points of the global search per model (rounded up to a power
        of 2). Default 512.
    n_local : int
        Trust-region refinements from the best distinct Sobol points.
        Default 8.
    uncertainty : {"profile", "jacobian", "mcmc"}
        "jacobian": linearised covariance only (16/84 % as ±1σ, in log depth);
        "profile": plus profile likelihood of the top depth and the jump
        (the 16/84 % bounds where Δχ²/s² = 1); "mcmc": an affine-invariant
        ensemble sampler [Goodman2010]_ (needs ``emcee``) with the linear
        parameters marginalised analytically. Default "profile".
    huber : bool
        Iteratively reweighted least squares with Huber weights
        min(1, 1.345 σ/|r|) [Huber1964]_. Default True.
    huber_passes : int
        Number of reweighting passes (3–5 is usual). Default 4.
    dip_range_deg : list of 2 floats
        Dip bounds in degrees toward the mapped dip direction when the
        segment's dip direction is known; otherwise the dip δ′ is searched
        in [low, 180 − low] from the +t side and reported with the
        contract's sign rule. Default [30, 90].
    fit_sigma_ratio : bool or "auto"
        Fit the conductivity ratio across the fault (dip-direction side over
        the other side, 0.1–10), exact for vertical faults only. "auto": fit
        it when the segment's best detection template has a contrast (one
        lobe of the anomaly stronger than the other). Default "auto".
    max_trace_offset_m : float
        Fit a shift of the trace across strike up to this many metres
        (0 = trace fixed at the mapped position). Default 0.
    min_bic_gain : float
        A source model is accepted only when its BIC is lower than that of
        the no-source model by at least this much ("very strong" evidence is
        ΔBIC > 10 on the Kass & Raftery scale [Kass1995]_); two patches
        must also beat one patch by this much. Default 10.
    terrain : bool
        Hold the patches in absolute elevation: the depths of the fit refer
        to a datum, the median elevation of the stations within two station
        spacings (at least 50 m) of the trace, and each station sees them
        shifted by its own elevation minus the datum (physics notes §2.5;
        the pole pair stays on a flat datum). Reported depths are below
        this datum, given as ``ground_m``. Stations without elevation take
        the datum. Default True (False: flat datum at every station).
    mcmc_steps, mcmc_walkers : int
        Chain length and ensemble size for ``uncertainty="mcmc"``.
        Defaults 1500 and 32.
    seed : int
        Seed of the search and of the sampler; combined with the segment id
        so that every segment draws its own reproducible numbers. Default 0.

    Returns
    -------
    fit : SegmentFit
        Chosen model, source rows (``sources`` layer fields plus
        uncertainty fields), predictions (mV), model-selection table,
        profile-likelihood curves (Δχ²/s²), correlations and flags.

    Raises
    ------
    InputError
        If the segment has fewer usable stations than the one-patch model
        has parameters (plus 3).
    OptionError
        For unknown models or uncertainty methods, or bad bounds.

    Notes
    -----
    Bounds: s_c within the segment ± ¼ of its length; L from 3 station
    spacings to 1.5 × the segment; z_t from z_min = max(10 m, ½ spacing) to
    half the corridor half-width; z_b − z_t from z_min to 4 × the corridor
    half-width. The χ² used for model selection is the Huber loss at the
    final weights (plain χ² without ``huber``); BIC = χ² + k ln N [Schwarz1978]_,
    AIC = χ² + 2k [Akaike1974]_. s² = χ²/(N − k) scales every interval.

    References
    ----------
    * [Golub1973]_, [Kaufman1975]_, [Huber1964]_, [Akaike1974]_, [Schwarz1978]_,
      [Kass1995]_, [Goodman2010]_
    """
    options = dict(models=models, n_starts=n_starts, n_local=n_local, uncertainty=uncertainty,
                   huber=huber, huber_passes=huber_passes, dip_range_deg=dip_range_deg,
                   fit_sigma_ratio=fit_sigma_ratio, max_trace_offset_m=max_trace_offset_m,
                   min_bic_gain=min_bic_gain, terrain=terrain, mcmc_steps=mcmc_steps,
                   mcmc_walkers=mcmc_walkers, seed=seed)
    return _fit_segment(stations, detection, options)


class _Setup:
    """Data, weights, local frame, terrain datum and bounds of one segment's fit window."""

    def __init__(self, stations, detection, options, background=None, network=None):
        segment = self.segment = detection.segment
        index = self.index = np.asarray(detection.station_index, dtype=int)
        d_all = np.asarray(stations.sp_mv, dtype=float)[index]
        if background is not None:
            d_all = d_all - background
        weight = np.asarray(stations.weight, dtype=float)[index]
        sigma = np.asarray(stations.sigma_mv, dtype=float)[index]
        noise = float(detection.noise_mv) if np.isfinite(detection.noise_mv) and \
            detection.noise_mv > 0 else np.nan
        sigma = np.where(np.isfinite(sigma) & (sigma > 0), sigma, noise)
        used = self.used = np.isfinite(d_all) & (weight > 0)
        s_all, t_all = segment.to_local(stations.easting[index], stations.northing[index])
        self.s_all, self.t_all = np.asarray(s_all, float), np.asarray(t_all, float)
        n = self.n = int(used.sum())
        if n < _MIN_STATIONS:
            raise InputError(
                f"segment {segment.segment_id}", f"only {n} usable stations in the fit window.",
                "Widen the window ([fit] window_m) or skip this segment.",
            )
        s, t, d = self.s_all[used], self.t_all[used], d_all[used]
        if not np.all(np.isfinite(sigma[used])):
            # no noise estimate: robust scatter about a plane (1.4826·MAD, common practice)
            plane = np.column_stack([np.ones(n), s, t])
            res = d - plane @ np.linalg.lstsq(plane, d, rcond=None)[0]
            fallback = max(1.4826 * np.median(np.abs(res - np.median(res))), 1e-3)
            sigma = np.where(np.isfinite(sigma), sigma, fallback)
        self.s, self.t, self.d = s, t, d
        if network is not None:
            network = network.subset(index).subset(np.flatnonzero(used))
        self.noise, self.sig = _station_noise(weight[used], sigma[used], network)
        spacing = _station_spacing(s, t)
        self.elevation = np.asarray(stations.upward, dtype=float)[index]
        self.offset_all, self.ground = _terrain_offsets(
            self.elevation, self.t_all, used, spacing, options["terrain"])
        half = float(np.max(np.abs(t))) if n else 1.0
        seg_len = float(segment.length_m)
        z_min = max(10.0, 0.5 * spacing)
        len_lo = 3.0 * spacing
        dip_lo, dip_hi = (float(v) for v in options["dip_range_deg"])
        if not segment.dip_known:
            dip_hi = 180.0 - dip_lo
        self.bounds = {
            "centre": (-0.25 * seg_len, 1.25 * seg_len),
            "length": (len_lo, max(1.5 * seg_len, 2.0 * len_lo)),
            "top": (z_min, max(half / 2.0, 3.0 * z_min)),
            "height": (z_min, max(4.0 * half, 3.0 * z_min)),
            "dip": (dip_lo, dip_hi),
            "offset": float(options["max_trace_offset_m"]),
            "fit_ratio": _fit_ratio(options["fit_sigma_ratio"], detection),
            "pole_depth": (z_min, max(_POLE_MAX_DEPTH, 2.0 * z_min)),
            "s_span": (float(s.min()), float(s.max())),
            "t_span": (float(t.min()), float(t.max())),
        }
        self.counter = [0]
        self.data = {"s": s, "t": t, "d": d, "counter": self.counter,
                     "offset": self.offset_all[used],
                     "regional": np.column_stack([np.ones(n), s / _REGIONAL_SCALE,
                                                  t / _REGIONAL_SCALE])}


def _fit_segment(stations, detection, options, background=None, start=None, network=None):
    """
    Body of :func:`fit_segment`. ``background`` (mV at ``station_index``) is
    subtracted from the data first (the fields of sources fitted on other
    segments); ``start`` = (model name, p) adds a local refinement from ``p``
    to that model's global search; ``network`` (a :class:`_Network` over
    ``stations``) makes every fit generalised least squares.
    """
    start_time = time.perf_counter()
    models = options["models"]
    models = (models,) if isinstance(models, str) else tuple(models)
    _check_options(models, options["n_starts"], options["n_local"], options["uncertainty"],
                   options["dip_range_deg"], options["huber_passes"], options["fit_sigma_ratio"])
    setup = _Setup(stations, detection, options, background, network)
    segment, index, used, n = setup.segment, setup.index, setup.used, setup.n
    s, t, d, sig, noise, data = setup.s, setup.t, setup.d, setup.sig, setup.noise, setup.data
    s_all, t_all, offset_all = setup.s_all, setup.t_all, setup.offset_all
    counter, scale = setup.counter, _REGIONAL_SCALE
    rng = item_seed(options["seed"], segment.segment_id)
    fits = {}
    for name in ("none",) + models:
        model = _Model(name, data, setup.bounds)
        fits[name] = _fit_model(
            model, data, noise, sig, rng, n_starts=options["n_starts"], n_local=options["n_local"],
            huber=options["huber"], huber_passes=options["huber_passes"],
            start=start[1] if start is not None and name == start[0] else None)
    min_bic_gain, uncertainty = options["min_bic_gain"], options["uncertainty"]
    mcmc_steps, mcmc_walkers = options["mcmc_steps"], options["mcmc_walkers"]

    # model selection ---------------------------------------------------------------------
    rows = []
    for name, res in fits.items():
        k = res["model"].k
        rows.append({"model": name, "k": k, "chi2": res["chi2"],
                     "aic": res["chi2"] + 2 * k, "bic": res["chi2"] + k * np.log(n)})
    selection = pd.DataFrame(rows)
    bic = dict(zip(selection["model"], selection["bic"]))
    gains = {m: bic["none"] - bic[m] for m in models}
    selection["bic_gain"] = [0.0 if m == "none" else gains[m] for m in selection["model"]]
    eligible = [m for m in models if gains[m] >= min_bic_gain]
    if "two_patches" in eligible and "fault_patch" in eligible \
            and bic["fault_patch"] - bic["two_patches"] < min_bic_gain:
        eligible.remove("two_patches")  # a second patch must earn its parameters too
    chosen = min(eligible, key=lambda m: bic[m]) if eligible else "none"

    best = fits[chosen]
    model = best["model"]
    problem = _Problem(model, data, noise.whitener(best["robust"]))
    p, x = best["p"], best["x"]
    g = model.basis(p)
    source_used = g @ x[:model.n_columns] if model.n_columns else np.zeros(n)
    regional_used = data["regional"] @ x[model.n_columns:]

    flags, sources, profiles, correlation, ambiguities = [], [], {}, None, ()
    if chosen != "none":
        white_residual = problem.white(d - source_used - regional_used)
        chi2_plain = float(white_residual @ white_residual)
        dof = max(n - model.k, 1)
        s2 = chi2_plain / dof
        cov, names, cov_t = _covariance(problem, p, x, s2)
        sd = np.sqrt(np.maximum(np.diag(cov), 0.0))
        with np.errstate(invalid="ignore", divide="ignore"):
            corr = cov / np.outer(sd, sd)
        correlation = pd.DataFrame(corr, index=names, columns=names)
        flags += _bound_flags(model, p)
        for i in range(len(names)):
            for j in range(i + 1, len(names)):
                if np.isfinite(corr[i, j]) and abs(corr[i, j]) > 0.95:
                    flags.append(f"corr:{names[i]}/{names[j]}")
        ambiguities = tuple(best["ambiguities"])
        if ambiguities:
            flags.append("multimodal")
        intervals, profiles = _intervals(
            problem, model, p, x, s2, cov_t, uncertainty, rng, mcmc_steps, mcmc_walkers)
        stats = {
            "rms_mv": float(np.sqrt(np.mean((d - source_used - regional_used) ** 2))),
            "chi2_red": float(best["chi2"] / dof),
            "n_stations": n,
            "bic_gain": float(gains[chosen]),
        }
        if model.name == "pole_pair":
            sources.append(_pole_row(segment, model, p, x, cov, names, stats, flags))
            flags.append("likely cultural")
        else:
            sources += _patch_rows(segment, model, p, x, cov, names, stats, flags, intervals,
                                   s, t, setup.elevation[used], setup.ground)
            if model.patches(p)[1] > 90.0 and "jump_mv" in profiles:
                # report the jump profile in the contract's sign (dip-direction side minus other)
                values, dchi2 = profiles["jump_mv"]
                profiles["jump_mv"] = (-values[::-1], dchi2[::-1])
    flags = list(dict.fromkeys(flags))

    predicted = np.full(index.size, np.nan)
    source_mv = np.full(index.size, np.nan)
    g_all = model.basis(p, s_all, t_all, offset_all) if model.n_columns \
        else np.zeros((index.size, 0))
    src_all = g_all @ x[:model.n_columns] if model.n_columns else np.zeros(index.size)
    reg_all = np.column_stack([np.ones(index.size), s_all / scale, t_all / scale]) \
        @ x[model.n_columns:]
    predicted[:] = src_all + reg_all
    source_mv[:] = src_all
    weights = np.zeros(index.size)
    weights[used] = best["robust"]
    return SegmentFit(
        segment=segment, station_index=index, chosen=chosen, sources=tuple(sources),
        predicted_mv=predicted, source_mv=source_mv, selection=selection, profiles=profiles,
        correlation=correlation, flags=tuple(flags), n_forward=int(counter[0]),
        seconds=time.perf_counter() - start_time, ambiguities=ambiguities, weights=weights,
        params=np.asarray(p, dtype=float),
    )


def _fit_model(model, data, noise, sig, rng, *, n_starts, n_local, huber, huber_passes,
               start=None, search=True):
    """
    Global search (``search``) and/or a local refinement from ``start`` (the
    better wins), then Huber IRLS, for one model; returns a dict with p, x,
    χ², weights.
    """
    d = data["d"]
    robust = np.ones(d.size)
    minima = []
    p = np.zeros(0)
    passes = huber_passes if huber else 1
    for i in range(passes):
        problem = _Problem(model, data, noise.whitener(robust))
        if model.k_nonlinear == 0:
            p = np.zeros(0)
        elif i == 0:
            minima = problem.global_fit(rng, n_starts, n_local) if search else []
            if start is not None:
                q, cost = problem.local_fit(np.clip(start, model.lower, model.upper))
                minima = sorted(minima + [(model.canonical(q), cost)], key=lambda m: m[1])
            p = minima[0][0]
        else:
            p, _ = problem.local_fit(p)
            p = model.canonical(p)
        x, _, g, _ = problem.solve(p)
        pred = (g @ x[:model.n_columns] if model.n_columns else 0.0) \
            + data["regional"] @ x[model.n_columns:]
        u = (d - pred) / sig
        if not huber:
            break
        new = np.minimum(1.0, _HUBER_C / np.maximum(np.abs(u), 1e-12))
        change = np.max(np.abs(new - robust))
        robust = new
        if change < 1e-3:
            break
    problem = _Problem(model, data, noise.whitener(robust))
    x, _, g, _ = problem.solve(p)
    pred = (g @ x[:model.n_columns] if model.n_columns else 0.0) \
        + data["regional"] @ x[model.n_columns:]
    u = (d - pred) / sig
    if noise.network is None:
        weight_station = sig ** 2 / noise.var  # the user's station weights
        chi2 = float(np.sum(weight_station * (_huber_loss(u) if huber else u * u)))
    else:  # generalised least squares: the whitened residual with the final Huber weights
        r = problem.white(d - pred)
        chi2 = float(r @ r)
    ambiguities = _distinct_minima(problem, p, minima) if model.k_nonlinear else []
    return {"model": model, "p": p, "x": x, "chi2": chi2, "robust": robust,
            "ambiguities": ambiguities}


def _distinct_minima(problem, best_p, minima):
    """Other minima with Δχ² < 4 separated from the best one by a barrier."""
    best_cost = problem.cost(best_p)
    out = []
    span = problem.model.upper - problem.model.lower
    for p, _ in minima[1:]:
        c = problem.cost(p)
        if c - best_cost >= 4.0 or np.max(np.abs(p - best_p) / span) < 0.02:
            continue
        mid = problem.cost(0.5 * (p + best_p))
        if mid > max(c, best_cost) + 1.0:
            patches, dip, offset, ratio = problem.model.patches(p) if \
                problem.model.n_patches else ([], np.nan, 0.0, 1.0)
            item = {"delta_chi2": c - best_cost, "dip_deg": float(dip)}
            if patches:
                item.update(top_depth_m=float(patches[0]["top"]),
                            bottom_depth_m=float(patches[0]["bottom"]),
                            centre_m=float(patches[0]["centre"]),
                            length_m=float(patches[0]["length"]))
            out.append(item)
    return out


def _intervals(problem, model, p, x, s2, cov_t, uncertainty, rng, mcmc_steps, mcmc_walkers):
    """16/84 % bounds of each patch's top depth and jump (profile, linearised or MCMC)."""
    out, profiles = [], {}
    if model.name == "pole_pair":
        return out, profiles
    chi2_min = problem.cost(p)
    sd_t = np.sqrt(np.maximum(np.diag(cov_t), 0.0))
    k = model.k_nonlinear
    for j in range(model.n_patches):
        it = 4 * j + 2
        top = np.exp(p[it])
        sd_log = sd_t[it]
        sd_f = sd_t[k + j]
        lin = {"top": (top * np.exp(-sd_log), top * np.exp(sd_log)),
               "jump": (x[j] - sd_f, x[j] + sd_f)}
        if uncertainty == "jacobian":
            out.append(lin)
            continue
        if uncertainty == "mcmc":
            out.append(_mcmc_interval(problem, p, s2, cov_t, j, rng, mcmc_steps, mcmc_walkers))
            continue
        # profile of log z_t
        step = min(max(sd_log, 0.02), 1.0)
        values, dchi2, lo, hi = _profile(
            p[it], step, model.lower[it], model.upper[it],
            lambda v, start: problem.local_fit(start, hold=(it, v), max_nfev=100),
            p, chi2_min, s2)
        top_int = (float(np.exp(lo)), float(np.exp(hi)))
        # profile of the jump (linear parameter held fixed)
        step_f = max(sd_f, 1e-6 * max(abs(x[j]), 1.0))
        f_values, f_dchi2, flo, fhi = _profile(
            x[j], step_f, -np.inf, np.inf,
            lambda v, start: problem.local_fit(start, fixed=(j, v), max_nfev=100),
            p, chi2_min, s2)
        out.append({"top": top_int, "jump": (float(flo), float(fhi))})
        if j == 0:
            profiles["top_depth_m"] = (np.exp(values), dchi2)
            profiles["jump_mv"] = (f_values, f_dchi2)
    return out, profiles


def _profile(best, step, lower, upper, refit, p_best, chi2_min, s2):
    """
    Profile Δχ²/s² of one parameter outward from the optimum.

    Walks with growing steps until Δχ²/s² > 4 or a bound, then refines each
    crossing of Δχ²/s² = 1 by Brent's method. Returns (values, dchi2, lo, hi);
    a side that never reaches 1 returns its bound.
    """
    values, dchi2 = [best], [0.0]
    crossings = []

    def evaluate(v, start):
        p, cost = refit(v, start)
        delta = max(cost - chi2_min, 0.0) / s2
        values.append(v)
        dchi2.append(delta)
        return delta, p

    for direction in (-1.0, 1.0):
        bound = lower if direction < 0 else upper
        h = step
        for _ in range(6):  # shrink a first step that overshoots far past Δ = 4
            v = float(np.clip(best + direction * h, lower, upper))
            delta, p = evaluate(v, p_best)
            if delta <= 9.0:
                break
            h /= 3.0
        prev = (best, 0.0, p_best)
        crossing = bound
        for factor in (2.0, 3.0, 4.5, 6.5, 9.0, 13.0, 18.0, None):
            if delta >= 1.0:
                crossing = _refine_crossing(prev, (v, delta, p), evaluate)
                break
            if v == bound or factor is None:
                break
            prev = (v, delta, p)
            v = float(np.clip(best + direction * h * factor, lower, upper))
            delta, p = evaluate(v, p)
        crossings.append(crossing)
    order = np.argsort(values)
    return np.asarray(values)[order], np.asarray(dchi2)[order], crossings[0], crossings[1]


def _refine_crossing(inner, outer, evaluate):
    """Value where Δχ²/s² = 1 between two profile points (Brent on √Δ − 1)."""
    (v0, d0, p0), (v1, d1, _) = inner, outer
    if d0 >= 1.0 or not np.isfinite(v1):
        return v1

    known = {v0: np.sqrt(d0) - 1.0, v1: np.sqrt(d1) - 1.0}

    def root(v):
        if v in known:
            return known[v]
        return np.sqrt(evaluate(v, p0)[0]) - 1.0

    try:
        return float(optimize.brentq(root, v0, v1, xtol=1e-3 * abs(v1 - v0), maxiter=12))
    except (ValueError, RuntimeError):
        q0, q1 = np.sqrt(d0), np.sqrt(d1)
        return v0 + (1.0 - q0) / (q1 - q0) * (v1 - v0)


def _mcmc_interval(problem, p, s2, cov_t, j, rng, steps, walkers):
    """16/84 % of top depth and jump from emcee, x marginalised [Goodman2010]_."""
    try:
        import emcee
    except ImportError as err:
        raise OptionError("[fit] uncertainty", "'mcmc' needs the emcee package.",
                          "Install it with: pip install 'geosp[mcmc]'.") from err
    model = problem.model
    k = model.k_nonlinear

    def log_prob(q):
        if np.any(q < model.lower) or np.any(q > model.upper):
            return -np.inf
        x, r, g, aw = problem.solve(q)
        sign, logdet = np.linalg.slogdet(aw.T @ aw)
        if sign <= 0:
            return -np.inf
        return -0.5 * float(r @ r) / s2 - 0.5 * logdet

    walkers = max(int(walkers), 2 * k + 2)
    sd = np.sqrt(np.maximum(np.diag(cov_t)[:k], 1e-12))
    span = model.upper - model.lower
    start = p + np.minimum(sd, 0.05 * span) * rng.standard_normal((walkers, k))
    start = np.clip(start, model.lower + 1e-6 * span, model.upper - 1e-6 * span)
    sampler = emcee.EnsembleSampler(walkers, k, log_prob)
    sampler.random_state = np.random.RandomState(int(rng.integers(2 ** 31))).get_state()
    sampler.run_mcmc(start, int(steps), progress=False)
    chain = sampler.get_chain(discard=int(steps) // 2, thin=5, flat=True)
    tops = np.exp(chain[:, 4 * j + 2])
    jumps = []
    for q in chain[:: max(1, len(chain) // 400)]:
        x, r, g, aw = problem.solve(q)
        cov_x = s2 * np.linalg.pinv(aw.T @ aw)
        jumps.append(x[j] + np.sqrt(max(cov_x[j, j], 0.0)) * rng.standard_normal())
    return {"top": tuple(float(v) for v in np.percentile(tops, [16, 84])),
            "jump": tuple(float(v) for v in np.percentile(jumps, [16, 84]))}


def _patch_rows(segment, model, p, x, cov, names, stats, flags, intervals, s, t, elevation,
                ground):
    """Rows of the ``sources`` layer for a patch model (contract sign rule applied)."""
    patches, dip_local, offset, ratio = model.patches(p)
    sd = dict(zip(names, np.sqrt(np.maximum(np.diag(cov), 0.0))))
    flip = dip_local > 90.0
    dip = 180.0 - dip_local if flip else dip_local
    strike = (segment.strike_deg + (180.0 if flip else 0.0)) % 360.0
    sign = -1.0 if flip else 1.0
    ratio_out = (1.0 / ratio) if flip else ratio
    rows = []
    for j, patch in enumerate(patches):
        suffix = f"[{j}]" if model.n_patches > 1 else ""
        idx = {n: names.index(n) for n in names}
        i_top, i_bot = idx[f"top_depth_m{suffix}"], idx[f"bottom_depth_m{suffix}"]
        i_f, i_dip = idx[f"jump_mv{suffix}"], idx["dip_deg"]
        top, bottom, f = patch["top"], patch["bottom"], float(x[j])
        # derived: geometric-mean depth and strength × height, delta method
        gm = np.sqrt(top * bottom)
        grad_gm = np.zeros(len(names))
        grad_gm[i_top] = 0.5 * np.sqrt(bottom / top)
        grad_gm[i_bot] = 0.5 * np.sqrt(top / bottom)
        grad_fh = np.zeros(len(names))
        grad_fh[i_top], grad_fh[i_bot], grad_fh[i_f] = -f, f, bottom - top
        # across position of the top edge: offset + z_t·cot(δ′)
        rad = np.radians(dip_local)
        grad_loc = np.zeros(len(names))
        grad_loc[i_top] = np.cos(rad) / np.sin(rad)
        grad_loc[i_dip] = -top / np.sin(rad) ** 2 * np.pi / 180.0
        if "trace_offset_m" in idx:
            grad_loc[idx["trace_offset_m"]] = 1.0
        across_top = offset + top * np.cos(rad) / np.sin(rad)
        top_x, top_y = segment.to_world(patch["centre"], across_top)
        row_flags = list(flags)
        footprint = (np.abs(t - across_top) < 3 * top) & \
            (np.abs(s - patch["centre"]) < patch["length"] / 2 + top)
        elev = elevation[footprint]
        elev = elev[np.isfinite(elev)]
        if elev.size > 1 and np.ptp(elev) > 0.2 * top:
            row_flags.append("terrain")
        if model.ratio_index is not None and dip < 89.5:
            row_flags.append("dip-contrast approximation")
        interval = intervals[j] if j < len(intervals) else {"top": (np.nan, np.nan),
                                                            "jump": (np.nan, np.nan)}
        jlo, jhi = interval["jump"]
        if flip:
            jlo, jhi = -jhi, -jlo
        row = {
            "source_id": f"{segment.segment_id}-P{j + 1}",
            "fault_id": segment.fault_id,
            "segment_id": segment.segment_id,
            "model": "fault_patch",
            "top_x": float(top_x),
            "top_y": float(top_y),
            "strike_deg": float(strike),
            "dip_deg": float(dip),
            "dip_dir_deg": float((strike + 90.0) % 360.0),
            "top_depth_m": float(top),
            "bottom_depth_m": float(bottom),
            "length_m": float(patch["length"]),
            "jump_mv": sign * f,
            "top_depth_lo_m": float(interval["top"][0]),
            "top_depth_hi_m": float(interval["top"][1]),
            "jump_lo_mv": float(jlo),
            "jump_hi_mv": float(jhi),
            **stats,
            "sigma_ratio": float(ratio_out),
            "flags": "; ".join(dict.fromkeys(row_flags)),
            "geo_mean_depth_m": float(gm),
            "geo_mean_depth_sd_m": float(np.sqrt(max(grad_gm @ cov @ grad_gm, 0.0))),
            "jump_height_mv_m": float(sign * f * (bottom - top)),
            "jump_height_sd_mv_m": float(np.sqrt(max(grad_fh @ cov @ grad_fh, 0.0))),
            "top_depth_sd_m": float(sd[f"top_depth_m{suffix}"]),
            "bottom_depth_sd_m": float(sd[f"bottom_depth_m{suffix}"]),
            "dip_sd_deg": float(sd["dip_deg"]),
            "jump_sd_mv": float(sd[f"jump_mv{suffix}"]),
            "length_sd_m": float(sd[f"length_m{suffix}"]),
            "location_sd_m": float(np.sqrt(max(grad_loc @ cov @ grad_loc, 0.0))),
            "ground_m": float(ground),
        }
        rows.append(row)
    return rows


def _pole_row(segment, model, p, x, cov, names, stats, flags):
    """A ``pole_pair`` row: positive pole at top_x/top_y/top_depth_m, the other in neg_*."""
    pos_s, pos_t, pos_z = p[0], p[1], np.exp(p[2])
    neg_s, neg_t, neg_z = p[0] + p[3], p[1] + p[4], np.exp(p[5])
    k = float(x[0])
    if k < 0:  # keep the positive pole first
        (pos_s, pos_t, pos_z), (neg_s, neg_t, neg_z), k = (neg_s, neg_t, neg_z), \
            (pos_s, pos_t, pos_z), -k
    px, py = segment.to_world(pos_s, pos_t)
    nx, ny = segment.to_world(neg_s, neg_t)
    sd = dict(zip(names, np.sqrt(np.maximum(np.diag(cov), 0.0))))
    row = {
        "source_id": f"{segment.segment_id}-Q1",
        "fault_id": segment.fault_id,
        "segment_id": segment.segment_id,
        "model": "pole_pair",
        "top_x": float(px), "top_y": float(py),
        "strike_deg": float(segment.strike_deg % 360.0),
        "dip_deg": np.nan,
        "dip_dir_deg": float((segment.strike_deg + 90.0) % 360.0),
        "top_depth_m": float(pos_z), "bottom_depth_m": np.nan, "length_m": np.nan,
        "jump_mv": np.nan, "top_depth_lo_m": np.nan, "top_depth_hi_m": np.nan,
        "jump_lo_mv": np.nan, "jump_hi_mv": np.nan,
        **stats,
        "sigma_ratio": 1.0,
        "flags": "; ".join(dict.fromkeys(list(flags) + ["likely cultural"])),
        "geo_mean_depth_m": np.nan, "geo_mean_depth_sd_m": np.nan,
        "jump_height_mv_m": np.nan, "jump_height_sd_mv_m": np.nan,
        "top_depth_sd_m": float(sd.get("pos_depth_m", np.nan)),
        "bottom_depth_sd_m": np.nan, "dip_sd_deg": np.nan, "jump_sd_mv": np.nan,
        "length_sd_m": np.nan,
        "location_sd_m": float(np.hypot(sd.get("pos_s_m", np.nan), sd.get("pos_t_m", np.nan))),
        "neg_x": float(nx), "neg_y": float(ny), "neg_depth_m": float(neg_z),
        "pole_k_mv_m": k,
    }
    return row


# --------------------------------------------------------------------------------------
# All segments
# --------------------------------------------------------------------------------------

def _fit_one(item, options):
    """Worker entry: fit one segment given its own stations (picklable)."""
    stations, detection, original_index, network = item
    fit = _fit_segment(stations, detection, {**_fit_defaults(), **options}, network=network)
    return replace(fit, station_index=original_index)


def _network_part(covariance, index):
    """The network covariance over stations ``index`` (None without one)."""
    if covariance is None:
        return None
    return _Network(covariance.parts(index), covariance.independent_sigma_mv)


def fit_segments(stations, detections, *, window_m="auto", joint=True, covariance=None,
                 workers=None, scheduler=None, progress=None, **fit_options):
    """
    Fit every detected segment and re-solve all accepted source strengths jointly.

    Parameters
    ----------
    stations : Stations
        All stations (reduced ``sp_mv`` in mV).
    detections : sequence of Detection
        One per segment; only those with ``detected`` are fitted (model
        selection still decides whether a source is accepted). All of them
        (detected or not) decide which fault each station is nearest to.
    window_m : float or "auto"
        Half-width of each segment's fit window and its extension past the
        segment's ends along the fault (m). The window holds the stations
        whose nearest mapped fault is the segment's own, so a source that
        runs across the cut between two segments of one fault is fitted
        whole. "auto": 1.5 × the detection corridor. Default "auto".
    joint : bool
        Re-fit, together, the accepted fault-patch sources whose windows
        overlap (one regional plane), then refine each one with the fields
        of the others held fixed, so that one source's flank is not read as
        another's regional or depth. Default True.
    covariance : object or None
        Correlated error of ``sp_mv`` from the field reduction (the
        ``station_covariance`` of a gradient survey's network, see
        :class:`geosp._network.NetworkCovariance`): ``block(index)`` gives
        the covariance (mV²) between stations and ``independent_sigma_mv``
        their own noise. With it every fit is a generalised least-squares fit
        with that covariance; without it, stations are independent with
        ``sigma_mv``.
    workers : int, "auto" or None
        Processes for the segment fits (see :func:`geosp.parallel.map_segments`).
    scheduler : str or None
        Dask scheduler address ``tcp://HOST:PORT``; overrides ``workers``.
    progress : callable or None
        ``progress(n_done, n_total)`` after each segment.
    **fit_options
        Keyword options of :func:`fit_segment` (the ``[fit]`` keys).

    Returns
    -------
    result : FitResult
        ``fits`` per segment; ``sources`` the accepted rows with ``jump_mv``
        (or ``pole_k_mv_m``) re-solved jointly; ``model_mv`` and
        ``residual_mv`` at every station (mV); ``regional`` the joint plane.

    Notes
    -----
    Results do not depend on the executor: each segment's random numbers
    come from ``(seed, segment_id)``. Where two segments with accepted
    sources share more than half of the smaller station set, the segment
    with the lower ``bic_gain`` is dropped from the accepted sources (its
    fit is kept in ``fits`` and its sources get no row); the joint linear
    solve then avoids double-counting one anomaly.
    """
    if not (window_m == "auto" or (isinstance(window_m, (int, float))
                                   and not isinstance(window_m, bool) and window_m > 0)):
        raise OptionError("[fit] window_m", f"got {window_m!r}.",
                          'Give a positive distance in metres, or "auto".')
    known = set(inspect.signature(fit_segment).parameters) - {"stations", "detection"}
    unknown = sorted(set(fit_options) - known)
    if unknown:
        hints = [difflib.get_close_matches(name, known, n=1) for name in unknown]
        hint = "; ".join(f"{u} (did you mean {h[0]}?)" if h else u for u, h in zip(unknown, hints))
        raise OptionError("[fit]", f"unknown option(s): {hint}.",
                          f"Known options: {', '.join(sorted(known))}.")
    detections = list(detections)
    windows = _fit_windows(stations, detections, window_m)
    detections = [replace(det, station_index=windows[i]) for i, det in enumerate(detections)
                  if det.detected]
    sp = np.asarray(stations.sp_mv, dtype=float)
    usable = np.isfinite(sp) & (np.asarray(stations.weight, dtype=float) > 0)
    kept = []
    for det in detections:
        n_usable = int(usable[np.asarray(det.station_index, dtype=int)].sum())
        if n_usable < _MIN_STATIONS:
            warnings.warn(f"segment {det.segment.segment_id}: only {n_usable} usable stations; "
                          "not fitted.", stacklevel=2)
        else:
            kept.append(det)
    detections = kept
    items = []
    for det in detections:
        index = np.asarray(det.station_index, dtype=int)
        local = replace(det, station_index=np.arange(index.size))
        items.append((stations.subset(index), local, index, _network_part(covariance, index)))
    func = partial(_fit_one, options=dict(fit_options))
    with shared_pool(workers, scheduler):
        fits = tuple(map_segments(func, items, workers=workers, scheduler=scheduler,
                                  progress=progress))
        accepted = _resolve_overlaps(fits)
        if joint:
            fits = _refine_interacting(stations, fits, accepted, detections, fit_options,
                                       workers=workers, scheduler=scheduler, covariance=covariance)
    sources, model_mv, regional = _joint_solve(stations, fits, accepted, detections)
    residual = np.asarray(stations.sp_mv, dtype=float) - model_mv
    return FitResult(fits=fits, model_mv=model_mv, residual_mv=residual, regional=regional,
                     sources=tuple(sources))


def _fit_windows(stations, detections, window_m):
    """
    Station indices of each segment's fit window: inside ``window`` of the
    segment (across, and past its ends along strike) and nearest to the
    segment's own fault among all mapped segments.
    """
    segments = [det.segment for det in detections]
    easting = np.asarray(stations.easting, dtype=float)
    northing = np.asarray(stations.northing, dtype=float)
    owners = assign_points(easting, northing, segments, corridor_m=np.inf)
    fault = np.full(easting.size, -1)
    fault_ids = {fid: k for k, fid in enumerate(dict.fromkeys(s.fault_id for s in segments))}
    for j, own in enumerate(owners):
        fault[own] = fault_ids[segments[j].fault_id]
    out = []
    for det, seg in zip(detections, segments):
        if window_m == "auto":
            corridor = det.best_template.get("corridor_m", np.nan) if det.best_template else np.nan
            if not np.isfinite(corridor):
                _, t = seg.to_local(easting[det.station_index], northing[det.station_index])
                corridor = float(np.max(np.abs(t))) if np.size(t) else 0.0
            half = _AUTO_WINDOW * corridor
        else:
            half = float(window_m)
        inside, _ = corridor_distance(seg, easting, northing, half)
        out.append(np.flatnonzero(inside & (fault == fault_ids[seg.fault_id])))
    return out


def _window_polygon(segment, station_index, stations):
    """
    Rectangle (shapely) of a fit window in the segment's frame: the along-strike
    span of its stations and their largest distance across, on both sides (the
    stations nearer another fault are left out of the window, not its reach).
    """
    s, t = segment.to_local(np.asarray(stations.easting, dtype=float)[station_index],
                            np.asarray(stations.northing, dtype=float)[station_index])
    half = float(np.max(np.abs(t)))
    corners = np.array([[s.min(), -half], [s.max(), -half], [s.max(), half], [s.min(), half]])
    return shapely.Polygon(np.column_stack(segment.to_world(corners[:, 0], corners[:, 1])))


def _interaction_groups(stations, fits, accepted):
    """Groups (lists of fit indices, two or more) of accepted patch fits with overlapping windows."""
    patch = [i for i in accepted if fits[i].chosen in ("fault_patch", "two_patches")]
    windows = {i: _window_polygon(fits[i].segment, fits[i].station_index, stations)
               for i in patch}
    parent = {i: i for i in patch}

    def root(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    if patch:
        polygons = [windows[i] for i in patch]
        left, right = shapely.STRtree(polygons).query(polygons, predicate="intersects")
        for a, b in zip(left, right):
            if a < b:
                parent[root(patch[b])] = root(patch[a])
    groups = {}
    for i in patch:
        groups.setdefault(root(i), []).append(i)
    return [sorted(g) for g in groups.values() if len(g) > 1]


class _JointModel:
    """Several segments' patch models side by side on one station set (block basis)."""

    def __init__(self, members):
        self.members = members
        self.name = "joint"
        self.lower = np.concatenate([m.lower for m in members])
        self.upper = np.concatenate([m.upper for m in members])
        self.k_nonlinear = int(sum(m.k_nonlinear for m in members))
        self.n_columns = int(sum(m.n_columns for m in members))
        self.k = self.k_nonlinear + self.n_columns + 3
        self.n_patches = int(sum(m.n_patches for m in members))
        cuts = np.cumsum([0] + [m.k_nonlinear for m in members])
        cols = np.cumsum([0] + [m.n_columns for m in members])
        self.param_slices = [slice(a, b) for a, b in zip(cuts[:-1], cuts[1:])]
        self.column_slices = [slice(a, b) for a, b in zip(cols[:-1], cols[1:])]

    def split(self, p):
        return [p[sl] for sl in self.param_slices]

    def canonical(self, p):
        return np.concatenate([m.canonical(q) for m, q in zip(self.members, self.split(p))])

    def basis(self, p):
        return np.hstack([m.basis(q) for m, q in zip(self.members, self.split(p))])

    def basis_jacobian(self, p, g0=None):
        g0 = self.basis(p) if g0 is None else g0
        jac = np.zeros((g0.shape[0], self.n_columns, self.k_nonlinear))
        for m, q, ps, cs in zip(self.members, self.split(p), self.param_slices,
                                self.column_slices):
            jac[:, cs, ps] = m.basis_jacobian(q, g0[:, cs])
        return jac


def _refine_interacting(stations, fits, accepted, detections, options, *, workers, scheduler,
                        covariance=None):
    """
    Joint re-fit of each group of interacting accepted sources (see
    fit_segments): per round, the joint fit of every group (one work item
    per group), then every member of every group re-fitted alone (one work
    item per member, so that the members run in parallel). A group goes
    round again (at most ``_JOINT_ROUNDS`` rounds) while a member's chosen
    model changes and at least two of its members are patches.
    """
    groups = _interaction_groups(stations, fits, accepted)
    if not groups:
        return fits
    by_id = {det.segment.segment_id: det for det in detections}
    options = {**_fit_defaults(), **options}
    states = []
    for group in groups:
        union = np.unique(np.concatenate([fits[i].station_index for i in group]))
        local = {int(v): k for k, v in enumerate(union)}
        members = []
        for i in group:
            f = fits[i]
            own = np.array([local[int(v)] for v in f.station_index], dtype=int)
            members.append((replace(by_id[f.segment.segment_id], station_index=own), f.ambiguities))
        states.append({"group": group, "union": union, "stations": stations.subset(union),
                       "network": _network_part(covariance, union), "members": members,
                       "current": [(fits[i].chosen, fits[i].params) for i in group],
                       "name": ",".join(fits[i].segment.segment_id for i in group), "out": None})
    pending = list(range(len(states)))
    for _round in range(_JOINT_ROUNDS):
        pending = [g for g in pending if states[g]["out"] is None
                   or sum(c in ("fault_patch", "two_patches") for c, _p in states[g]["current"]) >= 2]
        if not pending:
            break
        joint = map_segments(
            partial(_joint_fields, options=options),
            [(states[g]["stations"], [det for det, _a in states[g]["members"]], states[g]["network"],
              states[g]["current"]) for g in pending],
            workers=workers, scheduler=scheduler)
        items, owners = [], []
        for g, (fields, parts) in zip(pending, joint):
            st = states[g]
            total = fields.sum(axis=0)
            for k, (det, _a) in enumerate(st["members"]):
                start = (st["current"][k][0], parts[k]) if k in parts else None
                items.append((st["stations"], det, (total - fields[k])[det.station_index], start,
                              st["network"]))
                owners.append(g)
        refits = map_segments(partial(_refit_member, options=options), items, workers=workers,
                              scheduler=scheduler)
        still = []
        for g in pending:
            st = states[g]
            out = []
            for (det, ambiguities), fit in zip(st["members"],
                                               [f for o, f in zip(owners, refits) if o == g]):
                flags = fit.flags
                if ambiguities and fit.sources and "multimodal" not in flags:
                    flags = flags + ("multimodal",)
                rows = tuple({**row, "joint_group": st["name"]} for row in fit.sources)
                out.append(replace(fit, station_index=st["union"][det.station_index], sources=rows,
                                   flags=flags))
            if [f.chosen for f in out] != [c for c, _p in st["current"]]:
                still.append(g)
            st["current"] = [(f.chosen, f.params) for f in out]
            st["out"] = out
        pending = still
    out = list(fits)
    for st in states:
        for i, fit in zip(st["group"], st["out"]):
            out[i] = fit
    return tuple(out)


def _fit_defaults():
    """Keyword defaults of :func:`fit_segment`."""
    return {name: par.default for name, par in inspect.signature(fit_segment).parameters.items()
            if par.default is not inspect.Parameter.empty}


def _joint_fields(item, options):
    """
    Worker entry: joint local fit of a group's patch models on the union of
    their windows (one regional plane, Huber IRLS), started from the
    members' current parameters. Returns the members' joint fields over the
    union's stations ((members, stations) array, zero for members that are
    not patches) and the joint parameters of the patch members by index.
    """
    stations, dets, network, current = item
    setups = [_Setup(stations, det, options, network=network) for det in dets]
    d = np.asarray(stations.sp_mv, dtype=float)
    weight = np.asarray(stations.weight, dtype=float)
    sigma = np.asarray(stations.sigma_mv, dtype=float)
    noise = np.full(d.size, np.nan)
    for setup in setups:
        own = setup.index[setup.used]
        noise[own] = np.where(np.isfinite(noise[own]), noise[own], setup.sig)
    sigma = np.where(np.isfinite(sigma) & (sigma > 0), sigma, noise)
    used = np.isfinite(d) & (weight > 0) & np.isfinite(sigma)
    e = np.asarray(stations.easting, dtype=float)[used]
    nth = np.asarray(stations.northing, dtype=float)[used]
    elevation = np.asarray(stations.upward, dtype=float)[used]
    counter = [0]
    data = {"d": d[used], "counter": counter,
            "regional": np.column_stack([np.ones(e.size), (e - e.mean()) / _REGIONAL_SCALE,
                                         (nth - nth.mean()) / _REGIONAL_SCALE])}
    noise, sig = _station_noise(weight[used], sigma[used],
                                None if network is None else network.subset(np.flatnonzero(used)))
    active = [k for k, (chosen, _p) in enumerate(current) if chosen in ("fault_patch", "two_patches")]
    models = []
    for k in active:
        s, t = setups[k].segment.to_local(e, nth)
        offset = np.where(np.isfinite(elevation) & np.isfinite(setups[k].ground),
                          elevation - setups[k].ground, 0.0)
        frame = {"s": np.asarray(s, float), "t": np.asarray(t, float), "offset": offset,
                 "counter": counter}
        models.append(_Model(current[k][0], frame, setups[k].bounds))
    joint_model = _JointModel(models)
    start = np.concatenate([np.clip(current[k][1], m.lower, m.upper) for k, m in zip(active, models)])
    best = _fit_model(joint_model, data, noise, sig, item_seed(options["seed"], "joint"),
                      n_starts=1, n_local=1, huber=options["huber"],
                      huber_passes=options["huber_passes"], start=start, search=False)
    fields = np.zeros((len(dets), d.size))
    parts = dict(zip(active, joint_model.split(best["p"])))
    for k, m, cs in zip(active, models, joint_model.column_slices):
        fields[k, used] = m.basis(parts[k]) @ best["x"][cs]
    return fields, parts


def _refit_member(item, options):
    """
    Worker entry: one member of an interacting group re-fitted alone (global
    search plus the joint solution as a start, model selection again) with
    the others' joint fields subtracted as ``background``; its intervals then
    hold the others fixed.
    """
    stations, det, background, start, network = item
    return _fit_segment(stations, det, options, background=background, start=start,
                        network=network)


def _resolve_overlaps(fits):
    """Indices of fits whose sources are kept (weaker of overlapping pairs dropped)."""
    candidates = [i for i, f in enumerate(fits) if f.sources]
    candidates.sort(key=lambda i: -max(r["bic_gain"] for r in fits[i].sources))
    kept = []
    for i in candidates:
        a = set(fits[i].station_index.tolist())
        clash = False
        for j in kept:
            b = set(fits[j].station_index.tolist())
            if len(a & b) > 0.5 * min(len(a), len(b)):
                clash = True
                logger.info("segment %s overlaps %s; its sources are dropped",
                            fits[i].segment.segment_id, fits[j].segment.segment_id)
                break
        if not clash:
            kept.append(i)
    return sorted(kept)


def _source_column(row, coordinates):
    """SP (mV) of one source row at unit strength (jump 1 mV or k 1 mV·m)."""
    unit = dict(row)
    unit["jump_mv"] = 1.0
    unit["pole_k_mv_m"] = 1.0
    return physics.sources_sp(coordinates, [unit])


def _joint_solve(stations, fits, accepted, detections):
    """All accepted strengths plus one regional plane, by weighted least squares."""
    e = np.asarray(stations.easting, dtype=float)
    nth = np.asarray(stations.northing, dtype=float)
    d = np.asarray(stations.sp_mv, dtype=float)
    sigma = np.asarray(stations.sigma_mv, dtype=float)
    noises = [det.noise_mv for det in detections if np.isfinite(det.noise_mv) and det.noise_mv > 0]
    fallback = float(np.median(noises)) if noises else 1.0
    sigma = np.where(np.isfinite(sigma) & (sigma > 0), sigma, fallback)
    weight = np.asarray(stations.weight, dtype=float)
    used = np.isfinite(d) & (weight > 0)
    rows = [dict(r) for i in accepted for r in fits[i].sources]
    e0 = float(np.mean(e[used])) if used.any() else 0.0
    n0 = float(np.mean(nth[used])) if used.any() else 0.0
    up = np.asarray(stations.upward, dtype=float)
    columns = [_source_column(r, (e, nth, up)) for r in rows]
    design = np.column_stack(columns + [np.ones(e.size), (e - e0) / _REGIONAL_SCALE,
                                        (nth - n0) / _REGIONAL_SCALE])
    sw = np.sqrt(weight / sigma ** 2)
    if used.sum() >= design.shape[1]:
        coef = np.linalg.lstsq(design[used] * sw[used, None], d[used] * sw[used], rcond=None)[0]
    else:
        coef = np.zeros(design.shape[1])
    model_mv = design @ coef
    # The reported strengths stay those of each segment's own fit (with their profile-likelihood
    # ranges); the joint values, which share one survey-wide regional, serve the model raster.
    for row, value in zip(rows, coef[:len(rows)]):
        if row["model"] == "pole_pair":
            row["pole_k_joint_mv_m"] = float(value)
        else:
            row["jump_joint_mv"] = float(value)
    regional = {"c0_mv": float(coef[-3]), "east_mv_per_m": float(coef[-2] / _REGIONAL_SCALE),
                "north_mv_per_m": float(coef[-1] / _REGIONAL_SCALE),
                "east0_m": e0, "north0_m": n0}
    return rows, model_mv, regional
