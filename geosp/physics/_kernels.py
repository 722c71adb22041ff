"""
The formulas: plain numpy on broadcastable arrays, SI units, no checks.

Conventions (docs/concepts.md): local frame with ``s`` along strike,
``t`` across toward the dip direction, ``u`` up; depths positive down.
The patch normal n = sin(dip)·d + cos(dip)·u points into the hanging wall,
so a positive jump gives positive potential on the dip-direction side.
"""

import numpy as np

# Stations closer than this fraction of the patch scale to the fault plane are
# moved to a signed distance of that size: the solid angle is continuous there
# (zero on the plane outside the patch) but the closed form divides by h.
_IN_PLANE = 1e-9


def rectangle_solid_angle(along, across, up, centre, length, depth_top, depth_bottom, dip):
    """
    Signed solid angle (sr) of a rectangular patch in a dipping plane.

    The plane contains the along-strike axis through the local origin at the
    surface and dips ``dip`` (radians) toward +across. The patch spans
    ``centre ± length/2`` along strike and depths ``depth_top`` to
    ``depth_bottom`` (m, positive down). Positive on the +normal
    (hanging-wall) side. Closed form as a sum of four corner rectangles
    seen from the foot of the perpendicular [Kellogg1929]_.
    """
    sin_d, cos_d = np.sin(dip), np.cos(dip)
    h = across * sin_d + up * cos_d
    w = across * cos_d - up * sin_d
    scale = np.abs(length) + np.abs(depth_bottom)
    tiny = _IN_PLANE * scale
    h = np.where(np.abs(h) < tiny, np.where(h < 0, -tiny, tiny), h)
    a1 = centre - length / 2 - along
    a2 = centre + length / 2 - along
    b1 = depth_top / sin_d - w
    b2 = depth_bottom / sin_d - w
    h2 = h * h
    omega = (
        np.arctan(a1 * b1 / (h * np.sqrt(a1 * a1 + b1 * b1 + h2)))
        - np.arctan(a1 * b2 / (h * np.sqrt(a1 * a1 + b2 * b2 + h2)))
        - np.arctan(a2 * b1 / (h * np.sqrt(a2 * a2 + b1 * b1 + h2)))
        + np.arctan(a2 * b2 / (h * np.sqrt(a2 * a2 + b2 * b2 + h2)))
    )
    return omega


def patch_potential(along, across, up, centre, length, depth_top, depth_bottom, dip, jump):
    """
    Potential (same units as ``jump``) of a uniform double layer on a patch in
    a half-space with an insulating flat surface at up = 0 (image method):
    V = jump·(Ω(r) + Ω(r_image))/(4π); on the surface V = jump·Ω/(2π).
    """
    omega = rectangle_solid_angle(along, across, up, centre, length, depth_top, depth_bottom, dip)
    if np.all(np.asarray(up) == 0):
        return jump * omega / (2 * np.pi)
    omega_image = rectangle_solid_angle(
        along, across, -np.asarray(up), centre, length, depth_top, depth_bottom, dip
    )
    return jump * (omega + omega_image) / (4 * np.pi)
