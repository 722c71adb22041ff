"""
The formulas: plain numpy on broadcastable arrays, SI units, no checks.

Conventions (docs/concepts-physics.md): local frame with ``s`` along strike,
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


def triangle_solid_angle(points, v1, v2, v3):
    """
    Signed solid angle (sr) of the triangle (v1, v2, v3) seen from ``points``.

    Van Oosterom & Strackee form tan(Ω/2) = N/D with ``atan2`` (D < 0 when
    the triangle fills a wide view) and the numerator rewritten as
    N = (r − v1)·((v2 − v1) × (v3 − v1)), which keeps full relative
    precision in the far field [VanOosterom1983]_. Positive on the side that
    (v2 − v1) × (v3 − v1) points to. ``points`` has shape (..., 3); the
    vertices broadcast against it.
    """
    points = np.asarray(points, dtype=float)
    r1 = points - v1
    r2 = points - v2
    r3 = points - v3
    normal = np.cross(np.asarray(v2, float) - v1, np.asarray(v3, float) - v1)
    numerator = np.einsum("...k,...k->...", r1, np.broadcast_to(normal, r1.shape))
    n1 = np.sqrt(np.einsum("...k,...k->...", r1, r1))
    n2 = np.sqrt(np.einsum("...k,...k->...", r2, r2))
    n3 = np.sqrt(np.einsum("...k,...k->...", r3, r3))
    denominator = (
        n1 * n2 * n3
        + np.einsum("...k,...k->...", r1, r2) * n3
        + np.einsum("...k,...k->...", r1, r3) * n2
        + np.einsum("...k,...k->...", r2, r3) * n1
    )
    return 2.0 * np.arctan2(numerator, denominator)


def patch_vertices(centre, length, depth_top, depth_bottom, dip):
    """
    Corners (4, 3) of a patch as (across, along, up) coordinates, in the
    order top@c−L/2, bottom@c−L/2, bottom@c+L/2, top@c+L/2, which makes the
    triangle normal equal to the patch normal n = ê × ŝ.

    The local frame (along, across, up) is left-handed (ŝ × d̂ = −û), so
    vector products use the right-handed order (across, along, up).
    """
    cot = np.cos(dip) / np.sin(dip)
    s1, s2 = centre - length / 2, centre + length / 2
    top_t, top_u = depth_top * cot, -depth_top
    bottom_t, bottom_u = depth_bottom * cot, -depth_bottom
    return np.array(
        [[top_t, s1, top_u], [bottom_t, s1, bottom_u],
         [bottom_t, s2, bottom_u], [top_t, s2, top_u]], dtype=float
    )


def rectangle_solid_angle_triangles(along, across, up, centre, length, depth_top,
                                    depth_bottom, dip):
    """
    Signed solid angle (sr) of the patch of :func:`rectangle_solid_angle`,
    computed as two Van Oosterom & Strackee triangles; an independent
    cross-check of the closed form. Scalar patch parameters only.
    """
    points = np.stack(np.broadcast_arrays(
        np.asarray(across, float), np.asarray(along, float), np.asarray(up, float)
    ), axis=-1)
    v = patch_vertices(centre, length, depth_top, depth_bottom, dip)
    return (triangle_solid_angle(points, v[0], v[1], v[2])
            + triangle_solid_angle(points, v[0], v[2], v[3]))


def polygon_solid_angle_gradient(points, vertices):
    """
    Gradient (sr/m) of the signed solid angle of a planar polygon with
    respect to the observation point, as an edge sum (the Biot–Savart form
    [Kellogg1929]_): ∇Ω = −Σ_k (A_k × B_k)(|A_k| + |B_k|) /
    (|A_k||B_k|(|A_k||B_k| + A_k·B_k)), A_k = v_k − r, B_k = v_{k+1} − r,
    vertices in the order that defines the normal, all in one right-handed
    frame. ``points`` (..., 3); ``vertices`` a sequence of m corners, each
    (3,) or broadcastable to ``points``. Returns (..., 3).
    """
    points = np.asarray(points, dtype=float)
    vertices = np.asarray(vertices, dtype=float)
    grad = np.zeros(points.shape)
    m = len(vertices)
    for k in range(m):
        a = vertices[k] - points
        b = vertices[(k + 1) % m] - points
        na = np.sqrt(np.einsum("...k,...k->...", a, a))
        nb = np.sqrt(np.einsum("...k,...k->...", b, b))
        dot = np.einsum("...k,...k->...", a, b)
        weight = (na + nb) / (na * nb * (na * nb + dot))
        grad -= np.cross(a, b) * weight[..., None]
    return grad


def rectangle_solid_angle_partials(along, across, up, centre, length, depth_top,
                                   depth_bottom, dip):
    """
    Solid angle of :func:`rectangle_solid_angle` and its partial
    derivatives with respect to (centre, length, depth_top, depth_bottom,
    dip), the last per radian. Returns ``(omega, d_omega)`` with
    ``d_omega`` of shape (5, ...) (physics notes §2.4, from
    g = arctan(ab/(hR)): ∂g/∂a = hb/((a²+h²)R), ∂g/∂b = ha/((b²+h²)R),
    ∂g/∂h = −(ab/R)[1/(a²+h²) + 1/(b²+h²)]).
    """
    sin_d, cos_d = np.sin(dip), np.cos(dip)
    h = across * sin_d + up * cos_d
    w = across * cos_d - up * sin_d
    scale = np.abs(length) + np.abs(depth_bottom)
    tiny = _IN_PLANE * scale
    h = np.where(np.abs(h) < tiny, np.where(h < 0, -tiny, tiny), h)
    a = (centre - length / 2 - along, centre + length / 2 - along)
    b = (depth_top / sin_d - w, depth_bottom / sin_d - w)
    h2 = h * h
    omega = 0.0
    d_a = [0.0, 0.0]
    d_b = [0.0, 0.0]
    d_h = 0.0
    for i in range(2):
        for j in range(2):
            sign = 1.0 if i == j else -1.0
            ai, bj = a[i], b[j]
            a2h2 = ai * ai + h2
            b2h2 = bj * bj + h2
            r = np.sqrt(ai * ai + bj * bj + h2)
            omega = omega + sign * np.arctan(ai * bj / (h * r))
            d_a[i] = d_a[i] + sign * h * bj / (a2h2 * r)
            d_b[j] = d_b[j] + sign * h * ai / (b2h2 * r)
            d_h = d_h - sign * (ai * bj / r) * (1.0 / a2h2 + 1.0 / b2h2)
    d_centre = d_a[0] + d_a[1]
    d_length = (d_a[1] - d_a[0]) / 2
    d_top = d_b[0] / sin_d
    d_bottom = d_b[1] / sin_d
    d_dip = (d_b[0] * (h - depth_top * cos_d / sin_d**2)
             + d_b[1] * (h - depth_bottom * cos_d / sin_d**2)
             + d_h * w)
    d_omega = np.stack(np.broadcast_arrays(d_centre, d_length, d_top, d_bottom, d_dip))
    return omega, d_omega


def point_pole_potential(d_east, d_north, up, depth, k):
    """
    Potential of a point current source at ``depth`` (m, positive down) in a
    half-space with an insulating flat surface, at offsets (d_east,
    d_north) and height ``up`` ≤ 0 (m). ``k = ρI/(2π)`` (potential × length):
    V = k/r on the surface, V = (k/2)(1/r + 1/r_image) below it
    [Telford1990]_.
    """
    horizontal2 = d_east * d_east + d_north * d_north
    r = np.sqrt(horizontal2 + (up + depth) ** 2)
    r_image = np.sqrt(horizontal2 + (up - depth) ** 2)
    return 0.5 * k * (1.0 / r + 1.0 / r_image)


def dipole_potential(d_east, d_north, up, depth, k, p_east, p_north, p_up):
    """
    Potential of a point dipole at ``depth`` (m, positive down) with unit
    polarization (p_east, p_north, p_up) (from − to + pole) in a half-space
    with an insulating flat surface: V = K p·R/|R|³ on the surface, with
    R = station − centre; below it (K/2)(p·R/R³ + p′·R′/R′³) with the image
    dipole p′ = (p_e, p_n, −p_u) at height +depth. For a sphere of radius a
    carrying a double layer f₀cos θ, K = 2a²f₀/3 [Yungul1950]_.
    """
    def term(dz, pz):
        r2 = d_east * d_east + d_north * d_north + dz * dz
        return (p_east * d_east + p_north * d_north + pz * dz) / (r2 * np.sqrt(r2))

    return 0.5 * k * (term(up + depth, p_up) + term(up - depth, -p_up))


def sheet_angle_2d(across, up, depth_top, depth_bottom, dip):
    """
    Signed angle (rad) subtended at (across, up) by a 2-D sheet in the
    (across, up) plane from depth_top to depth_bottom (m, positive down),
    dipping ``dip`` (rad) toward +across from the surface trace at
    across = 0. Positive on the +normal (hanging-wall) side.
    """
    cot = np.cos(dip) / np.sin(dip)
    ax, ay = depth_top * cot - across, -depth_top - up
    bx, by = depth_bottom * cot - across, -depth_bottom - up
    return np.arctan2(ax * by - ay * bx, ax * bx + ay * by)


def strip_potential_2d(across, depth_top, depth_bottom, dip, jump):
    """
    Surface potential of a 2-D double layer (a sheet polarized normal to
    itself) of jump ``jump`` in a half-space: V = (jump/π)·angle, the 2-D
    limit of the fault patch (physics notes §2.6; [Kellogg1929]_).
    """
    return jump / np.pi * sheet_angle_2d(across, 0.0, depth_top, depth_bottom, dip)


def inclined_sheet_potential_2d(across, depth_top, depth_bottom, dip, k):
    """
    Surface potential of a 2-D sheet polarized along its dip (the classical
    inclined sheet, [Paul1965]_): V = k·ln(r_lower²/r_upper²), with r the
    distances from the station to the sheet's lower and upper edges; k > 0
    puts the positive pole at the upper edge.
    """
    cot = np.cos(dip) / np.sin(dip)
    r_upper2 = (across - depth_top * cot) ** 2 + depth_top**2
    r_lower2 = (across - depth_bottom * cot) ** 2 + depth_bottom**2
    return k * np.log(r_lower2 / r_upper2)
