"""
The noise model of a survey: what the data would scatter by with no source.

The covariance of the stations' SP values (mV²) is the sum of

* the reduction's network covariance (loop adjustment of gradient
  readings: Brownian bridges along the lines between loop crossings plus the
  junction part; zero for total-field input),
* independent station noise σ_w² / w_i (contact and soil noise, reading
  noise; ``w_i`` the station weight, below 1 for a flagged station), and
* a short-range spatially correlated part σ_c² exp(−d/ℓ) (geological
  noise: shallow soil and moisture variations that several neighbouring
  stations share).

σ_w, σ_c and ℓ are estimated from the residuals of the current survey model
by restricted maximum likelihood over tiles of the survey, with the network
part known (physics notes §4; the exponential model is a textbook
covariance, e.g. Cressie 1993, ch. 2 [Cressie1993]_).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg



@dataclass(frozen=True)
class NoiseModel:
    """
    Station noise: network part (optional), white part and correlated part.

    Attributes
    ----------
    white_sd_mv : float
        σ_w, independent noise of a station of weight 1 (mV).
    correlated_sd_mv : float
        σ_c, sd of the exponentially correlated part (mV).
    correlation_length_m : float
        ℓ (m).
    """

    white_sd_mv: float
    correlated_sd_mv: float = 0.0
    correlation_length_m: float = 1.0

    def covariance(self, easting, northing, weight, network=None):
        """
        Dense covariance (mV²) of the stations given.

        Parameters
        ----------
        easting, northing : (n,) arrays
            Positions (m).
        weight : (n,) array
            Station weights in (0, 1]; the white variance is divided by them.
        network : (n, n) array or None
            The network covariance block of these stations (mV²).
        """
        cov = np.zeros((easting.size, easting.size)) if network is None else np.array(network, float)
        if self.correlated_sd_mv > 0:
            d = np.hypot(easting[:, None] - easting[None, :], northing[:, None] - northing[None, :])
            cov += self.correlated_sd_mv**2 * np.exp(-d / self.correlation_length_m)
        cov[np.diag_indices_from(cov)] += self.white_sd_mv**2 / np.asarray(weight, dtype=float)
        return cov

    def describe(self):
        return (f"white {self.white_sd_mv:.1f} mV, correlated {self.correlated_sd_mv:.1f} mV over "
                f"{self.correlation_length_m:.0f} m")


class Whitener:
    """
    W = L⁻¹ for the Cholesky factor L of a covariance C (C = L Lᵀ), so that
    ordinary least squares on W·data and W·columns is generalised least
    squares on the data; applied by triangular solves.
    """

    def __init__(self, covariance):
        self.factor = linalg.cholesky(covariance, lower=True, overwrite_a=True, check_finite=False)

    def __call__(self, values):
        return linalg.solve_triangular(self.factor, values, lower=True, check_finite=False)

    def colour(self, white):
        """L·w: turns independent unit normals into draws of the noise."""
        return self.factor @ white

    @property
    def log_determinant(self):
        return 2.0 * float(np.sum(np.log(np.diag(self.factor))))


def _tiles(easting, northing, side):
    """Indices of the stations in each square tile of the given side (m)."""
    ix = np.floor((easting - easting.min()) / side).astype(int)
    iy = np.floor((northing - northing.min()) / side).astype(int)
    key = ix * (iy.max() + 1) + iy
    order = np.argsort(key, kind="stable")
    cuts = np.flatnonzero(np.diff(key[order])) + 1
    return [t for t in np.split(order, cuts) if t.size >= MIN_TILE_STATIONS]


#: Fewest stations in a tile for it to enter the likelihood.
MIN_TILE_STATIONS = 30
#: Most stations in one tile (larger tiles are split by halving their side).
MAX_TILE_STATIONS = 500
#: Most tiles used (an even spread of them): the estimate needs a few thousand stations at most.
MAX_TILES = 8
#: Tiles are at least this wide (m) and this many line spacings.
TILE_MIN_SIDE_M = 1500.0
TILE_LINES = 8.0


def estimate_noise(easting, northing, residual, weight, *, spacing, line_spacing, network=None,
                   floor_mv=0.5):
    """
    Fit a :class:`NoiseModel` to residuals (mV) of the survey model.

    Restricted maximum likelihood over square tiles of the survey, each with
    its own quadratic trend (a composite likelihood: tiles are taken as
    independent, which only wastes the information between them). The
    tile trend takes off what varies over a tile's width, the regional and
    broad anomalies of sources not yet in the model, so what is left is the
    short-range noise the model is for; the correlation length stays below a
    third of the tile (REML: Patterson & Thompson 1971, as in Cressie 1993
    §2.6 [Cressie1993]_). With C = σ²[(1 − ρ) diag(1/w) + ρ exp(−d/ℓ)] the
    scale σ² has a closed-form REML estimate for each (ρ, ℓ), which are
    searched on a grid and refined; a network part, known, is added to C.

    Parameters
    ----------
    easting, northing, residual, weight : (n,) arrays
        Station positions (m), residuals (mV) and weights.
    spacing, line_spacing : float
        Station and line spacing (m); set the tile size and the bounds of ℓ.
    network : (n, n) array or None
        Network covariance of these stations (mV²), taken as known.
    floor_mv : float
        Smallest white sd returned (mV): reading resolution.

    Returns
    -------
    NoiseModel
    """
    from scipy import optimize

    ok = np.flatnonzero(np.isfinite(residual) & (weight > 0))
    side = max(TILE_MIN_SIDE_M, TILE_LINES * line_spacing)
    tiles = []
    for tile in _tiles(easting[ok], northing[ok], side):
        parts = [ok[tile]]
        while any(p.size > MAX_TILE_STATIONS for p in parts):
            parts = [q for p in parts
                     for q in (_halves(easting, northing, p) if p.size > MAX_TILE_STATIONS else [p])]
        tiles += [p for p in parts if p.size >= MIN_TILE_STATIONS]
    if not tiles:
        sd = float(np.std(residual[ok])) if ok.size else 1.0
        return NoiseModel(max(sd, floor_mv))
    if len(tiles) > MAX_TILES:  # an even spread of the tiles, for speed
        tiles = [tiles[i] for i in np.linspace(0, len(tiles) - 1, MAX_TILES).round().astype(int)]
    data = []
    for t in tiles:
        x, y = easting[t], northing[t]
        d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
        u, v = (x - x.mean()) / 1000.0, (y - y.mean()) / 1000.0
        design = _independent(np.column_stack([np.ones(t.size), u, v, u * u, u * v, v * v]))
        net = network[np.ix_(t, t)] if network is not None else None
        data.append((d, design, residual[t], 1.0 / weight[t], net))
    dof = sum(r.size - x.shape[1] for _, x, r, _, _ in data)
    lo_len, hi_len = max(0.5 * spacing, 1.0), side / 3.0

    def criterion(rho, length, scale2=None):
        """(−REML log-likelihood, σ²) at (ρ, ℓ); σ² profiled unless given."""
        quad, logdet = 0.0, 0.0
        for d, design, r, inv_w, net in data:
            cov = rho * np.exp(-d / length)
            cov[np.diag_indices_from(cov)] += (1.0 - rho) * inv_w
            if net is not None:
                cov = cov + net / scale2
            try:
                factor = linalg.cho_factor(cov, lower=True, check_finite=False)
            except linalg.LinAlgError:
                return 1e30, 1.0
            ci_x = linalg.cho_solve(factor, design, check_finite=False)
            ci_r = linalg.cho_solve(factor, r, check_finite=False)
            xtcx = design.T @ ci_x
            beta = np.linalg.solve(xtcx, design.T @ ci_r)
            quad += float(r @ ci_r - (design.T @ ci_r) @ beta)
            logdet += 2.0 * float(np.sum(np.log(np.diag(factor[0])))) + np.linalg.slogdet(xtcx)[1]
        if scale2 is None:
            scale2 = quad / dof
            return 0.5 * (logdet + dof * math.log(scale2) + dof), scale2
        return 0.5 * (logdet + dof * math.log(scale2) + quad), scale2

    def evaluate(rho, length):
        if network is None:
            return criterion(rho, length)
        scale2 = float(np.mean([np.var(r) for _, _, r, _, _ in data]))
        for _ in range(3):  # fixed point of the REML scale with the network part known
            _, scale2 = criterion(rho, length, scale2)
            scale2 = max(scale2, 1e-6)
        return criterion(rho, length, scale2)

    best = None
    for rho in (0.0, 0.2, 0.4, 0.6, 0.8):
        for length in np.geomspace(lo_len, hi_len, 7):
            value, scale2 = evaluate(rho, length)
            if best is None or value < best[0]:
                best = (value, rho, length, scale2)
    _, rho0, length0, _ = best

    def objective(theta):
        rho = 1.0 / (1.0 + math.exp(-theta[0]))
        length = math.exp(np.clip(theta[1], math.log(lo_len), math.log(hi_len)))
        return evaluate(min(rho, 0.98), length)[0]

    start = [math.log(max(rho0, 0.02) / (1.0 - min(max(rho0, 0.02), 0.98))), math.log(length0)]
    sol = optimize.minimize(objective, start, method="Nelder-Mead",
                            options={"xatol": 0.05, "fatol": 0.05, "maxfev": 40})
    rho = min(1.0 / (1.0 + math.exp(-sol.x[0])), 0.98)
    length = math.exp(np.clip(sol.x[1], math.log(lo_len), math.log(hi_len)))
    if sol.fun > best[0]:
        rho, length = rho0, length0
    _, scale2 = evaluate(rho, length)
    white_sd = max(math.sqrt((1.0 - rho) * scale2), floor_mv)
    correlated_sd = math.sqrt(rho * scale2)
    if correlated_sd < 0.05 * white_sd:
        correlated_sd, length = 0.0, 1.0
    return NoiseModel(white_sd, correlated_sd, float(length))


def _independent(design):
    """The columns of a design that are linearly independent (a tile along one line has no y trend)."""
    _, r, pivot = linalg.qr(design, mode="economic", pivoting=True)
    diag = np.abs(np.diag(r))
    keep = np.sort(pivot[diag > 1e-8 * diag[0]])
    return design[:, keep]


def _halves(easting, northing, index):
    """Split a set of stations in two along its longer side."""
    x, y = easting[index], northing[index]
    if np.ptp(x) >= np.ptp(y):
        cut = x < np.median(x)
    else:
        cut = y < np.median(y)
    return [index[cut], index[~cut]]
