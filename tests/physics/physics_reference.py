"""
Independent reference calculations for the physics tests: direct numerical
integration of the double-layer kernel and brute-force point-dipole sums.

Nothing here calls geosp; the geometry is rebuilt from the conventions of the
physics notes §0 (local frame: s along strike, t toward the dip direction,
u up; n = sin(dip)·t̂ + cos(dip)·û; down-dip ê = cos(dip)·t̂ − sin(dip)·û).
"""

import numpy as np
from scipy import integrate


def patch_frame(dip):
    """Down-dip unit vector and normal as (s, t, u) components."""
    e = np.array([0.0, np.cos(dip), -np.sin(dip)])
    n = np.array([0.0, np.sin(dip), np.cos(dip)])
    return e, n


def quadrature_solid_angle(point, centre, length, top, bottom, dip, *, mirror=False):
    """
    Ω(r) = ∫∫ n·(r − r′)/|r − r′|³ dA′ over the patch, by scipy ``dblquad``
    on the patch's own (s′, w′) coordinates [Kellogg1929]; ``mirror`` uses the
    patch mirrored in the surface (u → −u, n_u → −n_u).
    """
    e, n = patch_frame(dip)
    flip = np.array([1.0, 1.0, -1.0])
    if mirror:
        e, n = e * flip, n * flip
    point = np.asarray(point, dtype=float)
    sin_d = np.sin(dip)

    def integrand(w, s):
        r_src = np.array([s, 0.0, 0.0]) + w * e
        d = point - r_src
        return n @ d / np.linalg.norm(d) ** 3

    value, _ = integrate.dblquad(
        integrand, centre - length / 2, centre + length / 2, top / sin_d, bottom / sin_d,
        epsabs=1e-13, epsrel=1e-11,
    )
    return value


def dipole_sum(points, centre, length, top, bottom, dip, *, m=200):
    """
    Potential (jump 1) of a patch at ``points`` (k, 3) in (s, t, u) as a sum
    of m × m point dipoles of moment n·dA at the cell midpoints, each
    n·R/(4π|R|³), plus their mirror images in the surface (position and
    normal with u → −u). Midpoint-rule error is O(1/m²).
    """
    e, n = patch_frame(dip)
    flip = np.array([1.0, 1.0, -1.0])
    sin_d = np.sin(dip)
    ds = length / m
    dw = (bottom - top) / sin_d / m
    s = centre - length / 2 + ds * (np.arange(m) + 0.5)
    w = top / sin_d + dw * (np.arange(m) + 0.5)
    S, W = np.meshgrid(s, w, indexing="ij")
    src = np.stack([S.ravel(), W.ravel() * e[1], W.ravel() * e[2]], axis=-1)
    out = []
    for point in np.atleast_2d(points):
        total = 0.0
        for position, normal in ((src, n), (src * flip, n * flip)):
            d = point - position
            r3 = np.einsum("ij,ij->i", d, d) ** 1.5
            total += np.sum(d @ normal / r3)
        out.append(ds * dw * total / (4 * np.pi))
    return np.array(out)
