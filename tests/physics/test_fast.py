"""
The compiled fault-patch kernels (``_fast``: value and Jacobian, both from
the two-triangle form with one atan2 per station) against the numpy
reference kernels of ``_kernels`` (the four-arctan closed form, itself held
to quadrature, dipole sums and the table values in test_kernels.py), the
numpy two-triangle form in the far field, and central differences.

Cases beyond those of test_forward.py and test_jacobian.py: dips 30–90°,
stations on and near the trace and the top edge, beyond the patch ends, in
the far field (r/L = 1e4), depths given per station for top or bottom only,
a conductivity contrast, and shallow tops that send stations near an edge to
the four-arctan second pass.
"""

import numpy as np
import numpy.testing as npt
import pytest

from geosp.physics import _fast, _kernels

pytestmark = pytest.mark.skipif(not _fast.AVAILABLE, reason="numba not installed")

DIPS = [30.0, 45.0, 60.0, 75.0, 90.0]
JUMP = 7.0
HW, FW = 0.5, 1.5  # contrast factors of σ ratio 3 (hanging wall / other side)


def stations(dip_deg, centre, length, top, rng):
    """Random near-field stations plus the awkward ones, as (along, across)."""
    cot = 1.0 / np.tan(np.radians(dip_deg))
    half = length / 2
    groups = [
        # near field, up to three patch sizes away
        (rng.uniform(-3, 3, 400) * length + centre, rng.uniform(-3, 3, 400) * length),
        # on the trace (h = 0: the in-plane safety) and just off it
        (np.linspace(centre - 2 * length, centre + 2 * length, 41), np.zeros(41)),
        (rng.uniform(-2, 2, 60) * length + centre,
         np.repeat([1e-9, -1e-9, 1e-4, -1e-4, 1.0, -1.0], 10)),
        # above the top edge and within a few top depths of it
        (rng.uniform(-1.5, 1.5, 120) * half + centre, top * cot + rng.normal(0, top, 120)),
        # beyond the patch ends along strike
        (centre + np.sign(rng.uniform(-1, 1, 100)) * (half + rng.exponential(0.2, 100) * length),
         rng.uniform(-1, 1, 100) * length),
    ]
    along = np.concatenate([g[0] for g in groups])
    across = np.concatenate([g[1] for g in groups])
    return along, across


def side_factor(across, dip):
    """The kernels' contrast rule: HW where h = t·sin(dip) > 0, FW elsewhere."""
    return np.where(across * np.sin(dip) > 0, HW, FW)


def compiled_value(along, across, top, bottom, centre, length, dip):
    out = np.empty(along.size)
    _fast.patch_sp_surface(along, across, np.atleast_1d(top), np.atleast_1d(bottom), centre,
                           length, dip, JUMP, HW, FW, out)
    return out


def compiled_jacobian(along, across, top, bottom, centre, length, dip):
    sp = np.empty(along.size)
    jac = np.empty((along.size, 5))
    _fast.patch_sp_jacobian_surface(along, across, np.atleast_1d(top), np.atleast_1d(bottom),
                                     centre, length, dip, JUMP, HW, FW, sp, jac)
    return sp, jac


def depth_variants(top, bottom, n, rng):
    """(top, bottom) as one pair, both per station, top only, bottom only."""
    offsets = rng.uniform(-0.3, 0.3, n) * top
    return [(top, bottom), (top + offsets, bottom + offsets), (top + offsets, bottom),
            (top, bottom + offsets)]


def near_edge_count(along, across, top, bottom, centre, length, dip):
    """How many stations the main loop hands to the four-arctan second pass."""
    sin_d, cos_d = np.sin(dip), np.cos(dip)
    wt, wb = top / sin_d, bottom / sin_d
    tiny = _kernels._IN_PLANE * (abs(length) + abs(bottom))
    count = 0
    for s, t in zip(along, across):
        a1, a2, b1, b2, h, _, _ = _fast._station(s, t, centre - length / 2, centre + length / 2,
                                                 wt, wb, sin_d, cos_d, tiny)
        count += np.isnan(_fast._half_solid_angle(a1, a2, b1, b2, h, length * (wb - wt))[0])
    return count


# Shallow tops (5 m under a 2 km patch; 1 mm, a fault reaching the
# surface) put stations near the trace within 10 % of the triangles' size
# from the top edge, where the triangle denominators lose digits: those go
# to the four-arctan second pass.
GEOMETRIES = [(100.0, 800.0, 150.0, 600.0), (-300.0, 2000.0, 5.0, 1200.0),
              (0.0, 300.0, 50.0, 1500.0), (0.0, 1000.0, 1e-3, 800.0)]


@pytest.mark.parametrize("dip_deg", DIPS)
@pytest.mark.parametrize("geometry", range(len(GEOMETRIES)))
def test_value_kernel_matches_numpy_closed_form(dip_deg, geometry):
    # Reference: the numpy four-arctan closed form, times the contrast
    # factor of each side. The two forms round differently: each of the
    # few atan/sqrt/products is good to about 1 ulp of terms no larger
    # than π, so they agree to a few 1e-16 rad absolute (1e-15 of f) and,
    # where the value is not small, to 1e-13 relative.
    centre, length, top, bottom = GEOMETRIES[geometry]
    dip = np.radians(dip_deg)
    rng = np.random.default_rng(geometry * 100 + int(dip_deg))
    along, across = stations(dip_deg, centre, length, top, rng)
    scale = JUMP / (2 * np.pi) * side_factor(across, dip)
    for zt, zb in depth_variants(top, bottom, along.size, rng):
        compiled = compiled_value(along, across, zt, zb, centre, length, dip)
        reference = scale * _kernels.rectangle_solid_angle(along, across, 0.0, centre, length,
                                                           zt, zb, dip)
        npt.assert_allclose(compiled, reference, rtol=1e-13, atol=1e-15 * JUMP)


def test_shallow_top_exercises_the_four_arctan_pass():
    # The near-edge geometry above must really reach the second pass
    # (otherwise that pass would go untested), and at only a few stations.
    centre, length, top, bottom = GEOMETRIES[1]
    dip = np.radians(60.0)
    along, across = stations(60.0, centre, length, top, np.random.default_rng(160))
    marked = near_edge_count(along, across, top, bottom, centre, length, dip)
    assert 0 < marked < 0.2 * along.size


@pytest.mark.parametrize("dip_deg", DIPS)
def test_far_field_keeps_relative_precision(dip_deg):
    # r/L = 1e4 in all directions (off the plane by more than 1e-3 of r).
    # Reference 1: the numpy two-triangle form, whose numerator
    # (r − v1)·((v2 − v1) × (v3 − v1)) and all-positive denominator keep
    # full relative precision here, as does the compiled N = h·L·W: 1e-12
    # relative covers the rounding of the ~20 operations and of the
    # station coordinates. Reference 2: the four-arctan form, which
    # cancels four O(1) terms down to ~1e-8, so only its absolute
    # precision (1e-15 of f) can be asked for.
    centre, length, top, bottom = GEOMETRIES[0]
    dip = np.radians(dip_deg)
    rng = np.random.default_rng(int(dip_deg))
    bearing = rng.uniform(0, 2 * np.pi, 500)
    along = centre + 1e4 * length * np.cos(bearing)
    across = 1e4 * length * np.sin(bearing)
    keep = np.abs(across * np.sin(dip)) > 1e-3 * 1e4 * length
    along, across = along[keep], across[keep]
    scale = JUMP / (2 * np.pi) * side_factor(across, dip)
    compiled = compiled_value(along, across, top, bottom, centre, length, dip)
    triangles = scale * _kernels.rectangle_solid_angle_triangles(along, across, 0.0, centre,
                                                                 length, top, bottom, dip)
    npt.assert_allclose(compiled, triangles, rtol=1e-12, atol=0)
    closed = scale * _kernels.rectangle_solid_angle(along, across, 0.0, centre, length, top,
                                                    bottom, dip)
    npt.assert_allclose(compiled, closed, rtol=0, atol=1e-15 * JUMP)


@pytest.mark.parametrize("dip_deg", DIPS)
def test_positive_jump_gives_positive_sp_down_dip_in_both_kernels(dip_deg):
    # Sign rule (physics notes): f > 0 gives V > 0 at 500 m down the dip
    # direction from the top edge, and less 500 m up-dip from it. A
    # reversed corner order would flip this without changing |V|.
    centre, length, top, bottom = 0.0, 1500.0, 100.0, 600.0
    dip = np.radians(dip_deg)
    edge = top / np.tan(dip)
    along = np.array([centre, centre])
    across = np.array([edge + 500.0, edge - 500.0])
    value = compiled_value(along, across, top, bottom, centre, length, dip)
    sp, _ = compiled_jacobian(along, across, top, bottom, centre, length, dip)
    for v in (value, sp):
        assert v[0] > 0
        assert v[0] > v[1]


@pytest.mark.parametrize("dip_deg", DIPS)
@pytest.mark.parametrize("geometry", range(len(GEOMETRIES)))
def test_jacobian_kernel_matches_numpy_partials(dip_deg, geometry):
    # Reference: the numpy closed form and its partials
    # (rectangle_solid_angle_partials), times jump/(2π) and the side
    # factor. SP as in the value test. The partials are sums of corner
    # terms with alternating signs, rounded in a different order here;
    # near the trace the terms of the centre and length columns (sums and
    # differences of the two end terms) reach ~1e3 times the column's
    # largest value, so the two agree to 1e-12 of that value. Stations
    # moved off the plane by the in-plane safety (h = ±1e-9 of the patch
    # scale) have terms ~1/h, 1e9 times larger: there the two roundings
    # (both equally far from the exact partials) agree to 1e-6 of it.
    centre, length, top, bottom = GEOMETRIES[geometry]
    dip = np.radians(dip_deg)
    rng = np.random.default_rng(geometry * 100 + int(dip_deg) + 1)
    along, across = stations(dip_deg, centre, length, top, rng)
    scale = JUMP / (2 * np.pi) * side_factor(across, dip)
    for zt, zb in depth_variants(top, bottom, along.size, rng):
        sp, jac = compiled_jacobian(along, across, zt, zb, centre, length, dip)
        omega, partials = _kernels.rectangle_solid_angle_partials(along, across, 0.0, centre,
                                                                  length, zt, zb, dip)
        npt.assert_allclose(sp, scale * omega, rtol=1e-13, atol=1e-15 * JUMP)
        moved = np.abs(across * np.sin(dip)) < _kernels._IN_PLANE * (length + np.abs(zb))
        assert moved.sum() >= 41  # the stations on the trace
        for column in range(5):
            reference = scale * partials[column]
            largest = np.abs(reference).max()
            npt.assert_allclose(jac[~moved, column], reference[~moved], rtol=0,
                                atol=1e-12 * largest, err_msg=str(column))
            npt.assert_allclose(jac[moved, column], reference[moved], rtol=0,
                                atol=1e-6 * largest, err_msg=str(column))


@pytest.mark.parametrize("geometry", range(3))
def test_jacobian_kernel_matches_central_differences_of_value_kernel(geometry):
    # Reference: central differences of the compiled value kernel (an
    # independent route to the derivatives; the value kernel is held to
    # the numpy closed form above). Top depth per station, bottom one
    # value, dip 45°. Steps 1e-6 of the geometry (1e-3 m, 1e-6 rad):
    # truncation ~ (step/distance)² ≤ 1e-7 relative for stations ≥ 3 m
    # from any edge, round-off ~ ε·V/step ≈ 1e-13 absolute; stations
    # within 1 % of the length of the plane are dropped (V jumps there).
    centre, length, top, bottom = GEOMETRIES[geometry]
    dip = np.radians(45.0)
    rng = np.random.default_rng(geometry + 7)
    along, across = stations(45.0, centre, length, top, rng)
    keep = np.abs(across) * np.sin(dip) > 0.01 * length
    along, across = along[keep], across[keep]
    zt = top + rng.uniform(-0.3, 0.3, along.size) * top
    _, jac = compiled_jacobian(along, across, zt, bottom, centre, length, dip)
    params = [centre, length, zt, bottom, dip]
    for column in range(5):
        step = 1e-6 if column == 4 else 1e-3
        plus, minus = list(params), list(params)
        plus[column] = params[column] + step
        minus[column] = params[column] - step
        numeric = (compiled_value(along, across, plus[2], plus[3], plus[0], plus[1], plus[4])
                   - compiled_value(along, across, minus[2], minus[3], minus[0], minus[1],
                                    minus[4])) / (2 * step)
        npt.assert_allclose(jac[:, column], numeric, rtol=1e-6,
                            atol=1e-9 * np.abs(numeric).max(), err_msg=str(column))
