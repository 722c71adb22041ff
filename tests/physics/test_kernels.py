"""
Kernels of the fault patch: closed-form rectangle solid angle, the
Van Oosterom & Strackee triangle form, the subsurface image potential and
the in-plane safety. Check values are the numbered rows of physics notes §9.
"""

import numpy as np
import numpy.testing as npt
import pytest

from geosp.physics import _kernels
from physics_reference import dipole_sum, patch_frame, quadrature_solid_angle

# Two closed forms evaluated in float64 agree to round-off; 1e-12 leaves
# room for a few ulps in arctan/sqrt over sums of four terms.
CLOSED = 1e-12


def both_solid_angles(along, across, up, *patch):
    closed = _kernels.rectangle_solid_angle(along, across, up, *patch)
    triangles = _kernels.rectangle_solid_angle_triangles(along, across, up, *patch)
    return closed, triangles


@pytest.mark.parametrize("side, depth", [(2.0, 1.0), (1.0, 3.0), (5.0, 0.2)])
def test_square_on_axis_matches_arcsin_formula(side, depth):
    # §9 row 2 (symmetry; cube face from centre): Ω = 4 arcsin(s²/(s² + 4d²))
    # for a square of side s seen on its axis at distance d. A vertical
    # square centred at depth 10 m, station at across = d at the same depth.
    expected = 4 * np.arcsin(side**2 / (side**2 + 4 * depth**2))
    patch = (0.0, side, 10 - side / 2, 10 + side / 2, np.pi / 2)
    for omega in both_solid_angles(0.0, depth, -10.0, *patch):
        npt.assert_allclose(omega, expected, rtol=CLOSED)


def test_cube_face_is_one_sixth_of_sphere():
    # §9 row 2: a = d = 1 gives 4π/6 = 2.0943951 (a cube face seen from the
    # cube's centre); value to 8 digits from the notes.
    patch = (0.0, 2.0, 9.0, 11.0, np.pi / 2)
    for omega in both_solid_angles(0.0, 1.0, -10.0, *patch):
        npt.assert_allclose(omega, 4 * np.pi / 6, rtol=CLOSED)
        npt.assert_allclose(omega, 2.0943951, atol=1e-7)


def test_rectangle_on_axis_matches_table_value():
    # §9 row 3: 2a × 2b on its axis, 4 arcsin(ab/√((a²+d²)(b²+d²))) with
    # a = 1, b = 2.5, d = 0.7 gives 3.6360082 (8 digits quoted).
    a, b, d = 1.0, 2.5, 0.7
    expected = 4 * np.arcsin(a * b / np.sqrt((a * a + d * d) * (b * b + d * d)))
    npt.assert_allclose(expected, 3.6360082, atol=1e-7)
    patch = (0.0, 2 * a, 20 - b, 20 + b, np.pi / 2)
    for omega in both_solid_angles(0.0, d, -20.0, *patch):
        npt.assert_allclose(omega, expected, rtol=CLOSED)


def test_rectangle_above_corner_is_pi_over_six():
    # §9 row 4: above a corner of an a × b rectangle,
    # arctan(ab/(d√(a²+b²+d²))); a = b = d = 1 gives π/6.
    patch = (0.5, 1.0, 5.0, 6.0, np.pi / 2)  # along 0..1, depth 5..6
    for omega in both_solid_angles(0.0, 1.0, -5.0, *patch):
        npt.assert_allclose(omega, np.pi / 6, rtol=CLOSED)


def test_unit_triangle_from_origin_is_minus_pi_over_two():
    # §9 row 5 (symmetry: one octant is 4π/8): the origin lies behind the
    # normal (1,1,1) of the triangle (e1, e2, e3), so Ω = −π/2.
    e1, e2, e3 = np.eye(3)
    omega = _kernels.triangle_solid_angle(np.zeros(3), e1, e2, e3)
    npt.assert_allclose(omega, -np.pi / 2, rtol=CLOSED)
    # Reversing the vertex order flips the sign.
    npt.assert_allclose(_kernels.triangle_solid_angle(np.zeros(3), e1, e3, e2), np.pi / 2,
                        rtol=CLOSED)


def test_triangle_wide_view_needs_atan2():
    # Physics notes §2.2 pitfall: 0.01 above the inside of a unit right
    # triangle the view is nearly a hemisphere (Ω close to 2π, D < 0).
    # Reference: scipy dblquad of the kernel over the triangle; the
    # integrand is smooth (h = 0.01 vs cell sizes) so 1e-8 relative holds.
    from scipy import integrate

    v1, v2, v3 = np.array([0.0, 0, 0]), np.array([1.0, 0, 0]), np.array([0.0, 1, 0])
    point = np.array([0.25, 0.25, 0.01])
    omega = _kernels.triangle_solid_angle(point, v1, v2, v3)

    def integrand(y, x):
        d = point - np.array([x, y, 0.0])
        return d[2] / np.linalg.norm(d) ** 3

    reference, _ = integrate.dblquad(integrand, 0, 1, 0, lambda x: 1 - x,
                                     epsabs=1e-12, epsrel=1e-12)
    assert omega > 6.0
    npt.assert_allclose(omega, reference, rtol=1e-8)


def test_triangle_far_field_keeps_precision():
    # Far from a triangle Ω → A·n·R/R³ with relative corrections of order
    # (a/R)² about the centroid (dipole expansion [Kellogg1929]). At
    # R/a = 1e6 that is 1e-12, while the naive triple product would lose
    # about ε(R/a)² = 1e-4; the rewritten numerator keeps ~1e-15.
    v1, v2, v3 = np.array([0.0, 0, 0]), np.array([1.0, 0, 0]), np.array([0.0, 1, 0])
    centroid = (v1 + v2 + v3) / 3
    normal = np.cross(v2 - v1, v3 - v1)  # |normal| = 2A
    for direction in ([0.3, 0.4, 0.866], [1.0, -2.0, 0.5], [0.0, 0.6, -0.8]):
        direction = np.asarray(direction) / np.linalg.norm(direction)
        point = centroid + 1e6 * direction
        r = point - centroid
        dipole = 0.5 * normal @ r / np.linalg.norm(r) ** 3
        omega = _kernels.triangle_solid_angle(point, v1, v2, v3)
        npt.assert_allclose(omega, dipole, rtol=1e-9)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_closed_form_matches_quadrature_of_double_layer_kernel(seed):
    # Reference: direct scipy dblquad of n·(r−r′)/|r−r′|³ over the patch
    # (Kellogg 1929 double-layer potential). Stations are kept at least
    # 20 % of the patch size off the plane so the integrand is smooth and
    # the adaptive quadrature reaches ~1e-10; 1e-8 relative (plus 1e-10 sr
    # absolute for near-zero values) is safely above that.
    rng = np.random.default_rng(seed)
    length = rng.uniform(200, 2000)
    top = rng.uniform(20, 300)
    bottom = top + rng.uniform(100, 1500)
    dip = np.radians(rng.uniform(25, 90))
    centre = rng.uniform(-300, 300)
    patch = (centre, length, top, bottom, dip)
    _, n = patch_frame(dip)
    scale = length + bottom
    for _ in range(3):
        s = rng.uniform(-1.5, 1.5) * length
        t = rng.uniform(-1.5, 1.5) * bottom
        u = -rng.uniform(0, 1.2) * bottom
        # Keep away from the plane (h is the distance to it).
        h = t * np.sin(dip) + u * np.cos(dip)
        if abs(h) < 0.2 * scale:
            t += np.sign(h or 1.0) * 0.2 * scale / np.sin(dip)
        reference = quadrature_solid_angle((s, t, u), *patch)
        for omega in both_solid_angles(s, t, u, *patch):
            npt.assert_allclose(omega, reference, rtol=1e-8, atol=1e-10)


def test_triangles_match_closed_form_on_random_stations():
    # Two independent closed forms (corner rectangles vs two
    # Van Oosterom & Strackee triangles [VanOosterom1983]) over many
    # stations, surface and subsurface, patches dipping both ways.
    rng = np.random.default_rng(7)
    along = rng.uniform(-3000, 3000, 500)
    across = rng.uniform(-3000, 3000, 500)
    up = -rng.uniform(0, 100, 500)
    for dip_deg in (20, 45, 60, 89.9, 90, 120, 145):
        patch = (150.0, 1200.0, 80.0, 900.0, np.radians(dip_deg))
        closed, triangles = both_solid_angles(along, across, up, *patch)
        npt.assert_allclose(closed, triangles, rtol=0, atol=1e-12)


def test_subsurface_potential_matches_quadrature_with_image():
    # Below the surface V = f(Ω(r) + Ω_image(r))/(4π) (physics §2.1). The
    # image term is checked against dblquad over the mirrored patch.
    patch = (0.0, 600.0, 100.0, 500.0, np.radians(60))
    for point in ((100.0, 400.0, -50.0), (-200.0, -150.0, -300.0), (50.0, 900.0, -700.0)):
        expected = (quadrature_solid_angle(point, *patch)
                    + quadrature_solid_angle(point, *patch, mirror=True)) / (4 * np.pi)
        value = _kernels.patch_potential(*point, *patch, 1.0)
        npt.assert_allclose(value, expected, rtol=1e-8, atol=1e-12)


def test_subsurface_potential_matches_point_dipole_sum_with_images():
    # Brute force: 200 × 200 point dipoles plus their mirror images
    # (physics §2.1). Midpoint-rule error is about 10/m² of the peak
    # (§9 tolerances), so atol = 3e-4 for f = 1.
    patch = (0.0, 600.0, 100.0, 500.0, np.radians(60))
    points = np.array([[100.0, 400.0, -50.0], [-200.0, -150.0, -300.0],
                       [350.0, 600.0, 0.0], [0.0, -300.0, 0.0]])
    expected = dipole_sum(points, *patch, m=200)
    value = _kernels.patch_potential(points[:, 0], points[:, 1], points[:, 2], *patch, 1.0)
    npt.assert_allclose(value, expected, atol=3e-4)


def test_potential_jumps_by_f_across_the_layer():
    # A double layer of jump f makes V(+n side) − V(−n side) = f [Kellogg1929];
    # the image part is continuous there. Points 1e-6 m either side of the
    # patch interior: the smooth part changes by O(1e-6/100 m), so 1e-6.
    dip = np.radians(50)
    patch = (0.0, 800.0, 100.0, 600.0, dip)
    e, n = patch_frame(dip)
    for f in (1.0, -37.5):
        for depth in (150.0, 350.0, 550.0):
            centre = np.array([120.0, 0.0, 0.0]) + depth / np.sin(dip) * e
            plus = centre + 1e-6 * n
            minus = centre - 1e-6 * n
            jump = (_kernels.patch_potential(*plus, *patch, f)
                    - _kernels.patch_potential(*minus, *patch, f))
            npt.assert_allclose(jump, f, rtol=1e-6)


def test_stations_in_the_plane_are_finite_and_continuous():
    # Physics notes §2.2: a dipping plane contains its trace, so surface
    # stations on the trace have h = 0. Ω is continuous and zero there
    # (outside the patch). Neighbours 1e-6 m off the plane differ by
    # O(1e-6 × slope), slope < 1e-2 sr/m here.
    dip = np.radians(55)
    patch = (0.0, 1000.0, 50.0, 400.0, dip)
    along = np.linspace(-1500, 1500, 31)
    on = _kernels.rectangle_solid_angle(along, 0.0, 0.0, *patch)
    assert np.all(np.isfinite(on))
    # The safety moves h to 1e-9 of the patch scale (1.4e-6 m), so Ω is
    # of order that offset times the slope, well below 1e-7 sr.
    npt.assert_allclose(on, 0.0, atol=1e-7)
    for offset in (1e-6, -1e-6):
        near = _kernels.rectangle_solid_angle(along, offset, 0.0, *patch)
        npt.assert_allclose(near, on, atol=1e-7)
    # Below the bottom edge, inside the plane: also zero and continuous.
    e, n = patch_frame(dip)
    point = 600.0 / np.sin(dip) * e
    for shift in (0.0, 1e-6, -1e-6):
        p = point + shift * n
        value = _kernels.rectangle_solid_angle(p[0], p[1], p[2], *patch)
        assert np.isfinite(value)
        npt.assert_allclose(value, 0.0, atol=1e-7)
    # The triangle form agrees off the plane.
    far = _kernels.rectangle_solid_angle_triangles(along, 1e-3, 0.0, *patch)
    npt.assert_allclose(far, _kernels.rectangle_solid_angle(along, 1e-3, 0.0, *patch),
                        atol=1e-12)


def test_triangle_points_in_its_plane_are_finite():
    # Physics notes §2.2: in the plane outside a triangle N = 0 and D > 0,
    # so Ω = 0; on an edge N = D = 0 and atan2 returns 0 rather than NaN;
    # just above and below the inside Ω tends to ±2π (a jump of 4π).
    v1, v2, v3 = np.array([0.0, 0, 0]), np.array([1.0, 0, 0]), np.array([0.0, 1, 0])
    outside = np.array([[2.0, 2.0, 0.0], [-1.0, 0.5, 0.0], [0.5, -3.0, 0.0]])
    npt.assert_allclose(_kernels.triangle_solid_angle(outside, v1, v2, v3), 0.0, atol=1e-15)
    edge = np.array([[0.5, 0.0, 0.0], [0.5, 0.5, 0.0], [0.0, 0.0, 0.0]])
    assert np.all(np.isfinite(_kernels.triangle_solid_angle(edge, v1, v2, v3)))
    above = _kernels.triangle_solid_angle(np.array([0.2, 0.2, 1e-9]), v1, v2, v3)
    below = _kernels.triangle_solid_angle(np.array([0.2, 0.2, -1e-9]), v1, v2, v3)
    npt.assert_allclose([above, below], [2 * np.pi, -2 * np.pi], atol=1e-7)
