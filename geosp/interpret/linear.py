"""
The linear part of the survey model and the projections built on it.

V = c + regional(x, y) + k·(elevation − e₀) + Σ a_j g_j + noise

The nuisance columns are a constant, a quadratic regional in coordinates
scaled to the survey's half-size (so its coefficients are in mV over the
survey) and the terrain term, whose coefficient k is the SP-elevation slope
in mV/m. Source columns g_j are unit-strength fields of the sources at fixed
geometry; their strengths a_j are linear.

Everything here works on whitened arrays (``W·data`` and ``W·columns``, see
:class:`geosp.interpret.noise.Whitener`), so that ordinary least squares is
generalised least squares on the data.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

NUISANCE_NAMES = ("constant", "regional_x", "regional_y", "regional_xx", "regional_xy",
                  "regional_yy", "terrain_mv_per_m")
TERRAIN = NUISANCE_NAMES.index("terrain_mv_per_m")


@dataclass(frozen=True)
class Frame:
    """Centre and half-size of the survey (m) and the reference elevation (m)."""

    east0: float
    north0: float
    half_size: float
    elev0: float

    @classmethod
    def of(cls, easting, northing, elevation):
        east0 = 0.5 * (float(np.min(easting)) + float(np.max(easting)))
        north0 = 0.5 * (float(np.min(northing)) + float(np.max(northing)))
        half = 0.5 * max(float(np.ptp(easting)), float(np.ptp(northing)), 1.0)
        finite = np.isfinite(elevation)
        elev0 = float(np.median(elevation[finite])) if finite.any() else 0.0
        return cls(east0, north0, half, elev0)


def nuisance_columns(easting, northing, elevation, frame, *, terrain=True):
    """
    The nuisance design (n, 7): constant, x, y, x², xy, y² (scaled
    coordinates) and elevation − e₀ (m; zero where unknown, and everywhere
    when ``terrain`` is False, which leaves k undetermined and reported as
    zero).
    """
    x = (np.asarray(easting, float) - frame.east0) / frame.half_size
    y = (np.asarray(northing, float) - frame.north0) / frame.half_size
    elev = np.asarray(elevation, float) - frame.elev0
    elev = np.where(np.isfinite(elev), elev, 0.0) if terrain else np.zeros_like(x)
    return np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y, elev])


class Projector:
    """
    P = I − Q Qᵀ, the projection onto the complement of the span of some
    whitened columns (Q an orthonormal basis, from a thin QR with column
    pivoting; columns that add nothing are dropped).
    """

    def __init__(self, columns):
        columns = np.atleast_2d(np.asarray(columns, dtype=float))
        if columns.shape[1] == 0:
            self.q = np.zeros((columns.shape[0], 0))
            return
        scale = np.sqrt(np.sum(columns**2, axis=0))
        scale[scale == 0] = 1.0
        from scipy import linalg

        q, r, _ = linalg.qr(columns / scale, mode="economic", pivoting=True)
        diag = np.abs(np.diag(r))
        keep = diag > 1e-10 * max(float(diag.max()), 1e-300)
        self.q = q[:, keep]

    def __call__(self, values):
        return values - self.q @ (self.q.T @ values)

    @property
    def rank(self):
        return self.q.shape[1]


def solve(design, data):
    """
    Least squares of whitened ``data`` on whitened ``design``.

    Returns
    -------
    coef : (k,) array
    covariance : (k, k) array
        (AᵀA)⁻¹ (pseudo-inverse for rank-deficient designs): the covariance
        of the coefficients when the noise model is right.
    chi2 : float
        Sum of squared whitened residuals.
    """
    scale = np.sqrt(np.sum(design**2, axis=0))
    scale[scale == 0] = 1.0
    a = design / scale
    coef, _, _, _ = np.linalg.lstsq(a, data, rcond=None)
    residual = data - a @ coef
    gram_inverse = np.linalg.pinv(a.T @ a)
    return coef / scale, gram_inverse / np.outer(scale, scale), float(residual @ residual)


def match_scores(columns, data, project=None, column_norm2=None):
    """
    Matched-filter statistics z = gᵀr / ‖g‖ of projected whitened columns
    g = P·c against the projected whitened data r = P·d: each z is N(0, 1)
    when the data are the noise model's noise (physics notes §6).

    Parameters
    ----------
    columns : (n, m) array
        Whitened columns: already projected when ``project`` is None, else
        raw, and projected implicitly: gᵀr = cᵀ(P·d) and ‖g‖² = ‖c‖² − ‖Qᵀc‖²
        for P = I − QQᵀ, which never forms the (n, m) projected matrix.
    data : (n,) or (n, k) array
        Whitened data, projected when ``project`` is None.
    project : Projector or None
    column_norm2 : (m,) array or None
        ‖c‖² of the raw columns, when known.

    Returns
    -------
    z : (m,) array (0 for columns with no part outside the nuisance span)
    norm : (m,) array, ‖g‖ (1/σ of the amplitude estimate)
    """
    if project is None:
        norm2 = np.sum(columns**2, axis=0)
    else:
        data = project(data)
        if column_norm2 is None:
            column_norm2 = np.sum(columns**2, axis=0)
        inside = project.q.T @ columns
        norm2 = column_norm2 - np.sum(inside**2, axis=0)
        # a column (nearly) inside the span: its difference is rounding only
        norm2 = np.where(norm2 > 1e-12 * column_norm2, norm2, 0.0)
    norm = np.sqrt(norm2)
    with np.errstate(invalid="ignore", divide="ignore"):
        num = columns.T @ data
        z = np.where((norm > 0).reshape((-1,) + (1,) * (num.ndim - 1)),
                     num / np.where(norm > 0, norm, 1.0).reshape((-1,) + (1,) * (num.ndim - 1)), 0.0)
    return z, norm
