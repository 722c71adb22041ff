"""
The recovery benchmark's forward physics (benchmarks/recovery/physics.py),
an independent discretisation: each patch is cut into triangles whose
Van Oosterom & Strackee solid angles are summed, with the ground's mirror
image. Checked against the package's closed form (once), scipy quadrature
of the point-dipole kernel, the 2-D strip limit, superposition and hand
values.
"""

import math
import sys
from pathlib import Path

import numpy as np
import numpy.testing as npt
import pytest
from scipy import integrate

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from recovery import physics  # noqa: E402

E0, N0 = 512_000.0, 3_480_000.0  # an invented UTM-like origin


def straight_patch(*, strike=30.0, dip=75.0, side=1, top=120.0, bottom=700.0, s0=1500.0,
                   s1=2700.0, jump=100.0, sigma_ratio=1.0, ground=None):
    """A patch on a straight trace of azimuth ``strike`` starting at (E0, N0)."""
    direction = np.array([math.sin(math.radians(strike)), math.cos(math.radians(strike))])
    trace = [[E0, N0], (np.array([E0, N0]) + 5000.0 * direction).tolist()]
    return {"fault_trace": trace, "dip_side": side, "s0_m": s0, "s1_m": s1, "length_m": s1 - s0,
            "top_depth_m": top, "bottom_depth_m": bottom, "dip_deg": dip, "jump_mv": jump,
            "sigma_ratio": sigma_ratio, "ground_m": ground}


def station_grid(centre, half=2500.0, n=23):
    e, n_ = np.meshgrid(np.linspace(-half, half, n), np.linspace(-half, half, n))
    return centre[0] + e.ravel(), centre[1] + n_.ravel()


def frame(strike_deg, dip_deg):
    """Unit vectors ŝ, d̂, ê, n̂ of the sign conventions (east, north, up)."""
    phi, delta = math.radians(strike_deg), math.radians(dip_deg)
    s = np.array([math.sin(phi), math.cos(phi), 0.0])
    d = np.array([math.cos(phi), -math.sin(phi), 0.0])
    up = np.array([0.0, 0.0, 1.0])
    return s, d, math.cos(delta) * d - math.sin(delta) * up, math.sin(delta) * d + math.cos(delta) * up


# --------------------------------------------------------------------------- 1. the closed form


@pytest.mark.parametrize("dip", [60.0, 75.0, 90.0])
@pytest.mark.parametrize("sigma_ratio", [1.0, 4.0])
@pytest.mark.parametrize("jump", [150.0, -80.0])
@pytest.mark.parametrize("side", [1, -1])
def test_triangles_match_the_closed_form_of_the_package(dip, sigma_ratio, jump, side):
    # Outside reference: geosp's closed-form rectangle (four corner
    # arctangents), a different formula from the triangle sum. Both are
    # exact for a planar rectangle, so they agree to round-off: 1e-9 of the
    # jump leaves room for float64 sums over 256 triangles and for
    # coordinates of 10⁶ m.
    from geosp.physics.forward import fault_patch_sp

    patch = straight_patch(strike=37.0, dip=dip, side=side, jump=jump, sigma_ratio=sigma_ratio)
    record = physics.patch_record(dict(patch, ground_m=0.0))
    # offset by 7.3 m so that no station sits on the plane of a vertical
    # patch (where the closed form nudges the station to one side)
    east, north = station_grid((record["top_x"] + 7.3, record["top_y"] - 4.1))
    closed = dict(top_x=record["top_x"], top_y=record["top_y"], strike_deg=record["strike_deg"],
                  dip_deg=dip, length_m=patch["length_m"], jump_mv=jump, sigma_ratio=sigma_ratio)
    tol = 1e-9 * abs(jump)

    # flat ground
    ours = physics.patch_sp(east, north, None, patch)
    theirs = fault_patch_sp((east, north), top_depth_m=patch["top_depth_m"],
                            bottom_depth_m=patch["bottom_depth_m"], **closed)
    npt.assert_allclose(ours, theirs, rtol=0, atol=tol)
    assert np.ptp(theirs) > 0.05 * abs(jump)  # the comparison is not between near-zeros

    # station elevations with the patch held at absolute elevation: each
    # station sees the patch shifted down by its elevation minus ground_m
    # (never less than −top/2), horizontal position unchanged. The closed
    # form takes that as per-station depths.
    rng = np.random.default_rng(3)
    ground = 1250.0
    elev = ground + rng.uniform(-120.0, 150.0, east.size)
    shift = np.maximum(elev - ground, -0.5 * patch["top_depth_m"])
    ours = physics.patch_sp(east, north, elev, dict(patch, ground_m=ground))
    theirs = fault_patch_sp((east, north), top_depth_m=patch["top_depth_m"] + shift,
                            bottom_depth_m=patch["bottom_depth_m"] + shift, **closed)
    npt.assert_allclose(ours, theirs, rtol=0, atol=tol)
    if dip == 90.0:
        # For a vertical patch the package's own ground_m path is the same
        # convention (the plane does not move sideways when shifted).
        theirs = fault_patch_sp((east, north, elev), top_depth_m=patch["top_depth_m"],
                                bottom_depth_m=patch["bottom_depth_m"], ground_m=ground, **closed)
        npt.assert_allclose(ours, theirs, rtol=0, atol=tol)


# --------------------------------------------------------------------------- 2. quadrature, 2-D limit


def dipole_layer_quadrature(station, corner, along, down, normal, jump):
    """
    f/(4π) ∫∫ n̂·(r − r')/|r − r'|³ dA over the parallelogram corner + a·along
    + w·down (a, w in [0, 1]) plus its mirror image in the plane u = 0
    (mirrored points, mirrored normal), by scipy dblquad.
    """
    area = np.linalg.norm(np.cross(along, down))
    mirror = np.array([1.0, 1.0, -1.0])

    def integrand(w, a):
        source = corner + a * along + w * down
        total = 0.0
        for point, n in ((source, normal), (source * mirror, normal * mirror)):
            r = station - point
            total += n @ r / np.linalg.norm(r) ** 3
        return total

    value, _ = integrate.dblquad(integrand, 0.0, 1.0, 0.0, 1.0, epsabs=1e-13, epsrel=1e-11)
    return jump * area * value / (4.0 * math.pi)


@pytest.mark.parametrize("dip", [90.0, 62.0])
def test_triangles_match_quadrature_of_the_point_dipole_kernel(dip):
    # Outside reference: the double-layer potential as a surface integral
    # of point dipoles (Kellogg's definition), by scipy adaptive quadrature,
    # with the image written out independently. Stations on the surface,
    # one with an elevation (the patch shifted down by elev − ground_m).
    # Tolerance 1e-8 of the jump: dblquad is asked for 1e-11 relative on a
    # smooth integrand (the patch top is 150 m below every station).
    strike, top, bottom, jump, ground = 20.0, 150.0, 650.0, 120.0, 800.0
    patch = straight_patch(strike=strike, dip=dip, top=top, bottom=bottom, s0=1000.0, s1=1900.0,
                           jump=jump, ground=ground)
    s, d, e, n = frame(strike, dip)
    start = np.array([E0, N0, 0.0]) + 1000.0 * s + top / math.tan(math.radians(dip)) * d
    along = 900.0 * s
    down = (bottom - top) / math.sin(math.radians(dip)) * e
    stations = [(600.0, 250.0, ground), (1400.0, -300.0, ground), (1500.0, 40.0, ground + 60.0),
                (2600.0, 800.0, ground - 40.0)]
    for a, t, elev in stations:
        xy = np.array([E0, N0]) + a * s[:2] + t * d[:2]
        ours = physics.patch_sp(np.array([xy[0]]), np.array([xy[1]]), np.array([elev]), patch)[0]
        shift = max(elev - ground, -0.5 * top)
        corner = start - np.array([0.0, 0.0, top + shift])
        station = np.array([xy[0], xy[1], 0.0])
        expected = dipole_layer_quadrature(station, corner, along, down, n, jump)
        assert ours == pytest.approx(expected, abs=1e-8 * jump)


def test_long_vertical_patch_tends_to_the_2d_strip():
    # Outside reference: the 2-D strip, V(t) = (f/π)[arctan(z_b/t) −
    # arctan(z_t/t)] at mid-strike (a standard line-integral result). The
    # patch is 2·10⁶ m long; the missing ends change V by at most
    # f·|t|·(z_b − z_t)/(2π·(L/2)²) < 3e-7·f at |t| ≤ 3000 m, so 1e-6 of f.
    top, bottom, jump = 100.0, 600.0, 100.0
    half = 1.0e6
    patch = straight_patch(strike=0.0, dip=90.0, top=top, bottom=bottom, s0=-half, s1=half,
                           jump=jump)
    t = np.array([-3000.0, -700.0, -50.0, 30.0, 245.0, 1000.0, 3000.0])
    ours = physics.patch_sp(E0 + t, np.full(t.size, N0), None, patch)
    expected = jump / math.pi * (np.arctan(bottom / t) - np.arctan(top / t))
    npt.assert_allclose(ours, expected, rtol=0, atol=1e-6 * jump)


def test_far_field_is_a_dipole_of_moment_jump_times_area():
    # Outside reference: far away a double layer is a point dipole of
    # moment f·A along n̂; on the insulating surface V = f·A·n̂·R/(2π R³).
    # The next term is of order (size/R)² ≈ 1.5e-3 at 30 km, so 1 %.
    strike, dip, top, bottom = 50.0, 70.0, 200.0, 900.0
    patch = straight_patch(strike=strike, dip=dip, top=top, bottom=bottom, s0=1000.0, s1=2000.0)
    s, d, e, n = frame(strike, dip)
    width = (bottom - top) / math.sin(math.radians(dip))
    centre = (np.array([E0, N0, 0.0]) + 1500.0 * s
              + 0.5 * (top + bottom) / math.tan(math.radians(dip)) * d
              - 0.5 * (top + bottom) * np.array([0.0, 0.0, 1.0]))
    for direction in (d, -d, s, (d + s) / math.sqrt(2)):
        station = centre * np.array([1.0, 1.0, 0.0]) + 30_000.0 * direction
        r = station - centre
        expected = patch["jump_mv"] * 1000.0 * width * (n @ r) / (2 * math.pi * np.linalg.norm(r) ** 3)
        ours = physics.patch_sp(np.array([station[0]]), np.array([station[1]]), None, patch)[0]
        assert ours == pytest.approx(expected, rel=1e-2, abs=1e-6)


# --------------------------------------------------------------------------- signs, exactness


@pytest.mark.parametrize("side", [1, -1])
@pytest.mark.parametrize("dip", [55.0, 90.0])
def test_positive_jump_is_positive_500_m_down_the_dip_direction(side, dip):
    # Sign rule: f > 0 gives positive SP on the dip-direction side, checked
    # 500 m from the trace on both sides.
    patch = straight_patch(strike=120.0, dip=dip, side=side, jump=50.0)
    record = physics.patch_record(dict(patch, ground_m=0.0))
    middle = physics.point_on_trace(patch["fault_trace"], 0.5 * (patch["s0_m"] + patch["s1_m"]))
    dip_dir = np.array([math.sin(math.radians(record["dip_dir_deg"])),
                        math.cos(math.radians(record["dip_dir_deg"]))])
    east, north = (middle + np.outer([500.0, -500.0], dip_dir)).T
    v = physics.patch_sp(east, north, None, patch)
    assert v[0] > 0.0 > v[1]
    # The recorded dip direction is the side the patch leans toward.
    top, bottom, _ = physics.patch_edges(patch)
    lean = (bottom[0, :2] - top[0, :2]) @ dip_dir
    assert lean >= 0.0 if dip < 90.0 else abs(lean) < 1e-9


def test_result_does_not_depend_on_the_triangulation():
    # A planar polygon's solid angle is the exact sum of its triangles'
    # (the solid angle is additive), so 1×1, 8×8 and 13×5 quads agree to
    # round-off (1e-10 of the jump).
    patch = straight_patch(dip=64.0)
    east, north = station_grid((E0 + 1000.0, N0 + 1800.0))
    base = physics.patch_sp(east, north, None, patch, n_along=1, n_down=1)
    for n_along, n_down in ((8, 8), (13, 5)):
        other = physics.patch_sp(east, north, None, patch, n_along=n_along, n_down=n_down)
        npt.assert_allclose(other, base, rtol=0, atol=1e-10 * patch["jump_mv"])


def test_mirror_image_doubles_the_full_space_potential_on_the_surface():
    # For a station on the plane of reflection the image subtends the same
    # solid angle (V = fΩ/(2π) = 2·fΩ/(4π)); checked term by term.
    patch = straight_patch(dip=58.0)
    triangles = physics.patch_triangles(patch, 3, 2)
    points = np.array([[E0 + 300.0, N0 + 1700.0, 0.0], [E0 - 800.0, N0 + 900.0, 0.0]])
    v1, v2, v3 = triangles[:, 0], triangles[:, 1], triangles[:, 2]
    p = points[:, None, :]
    direct = physics.triangle_solid_angles(p - v1, p - v2, p - v3, np.cross(v2 - v1, v3 - v1)).sum(1)
    npt.assert_allclose(physics.surface_solid_angle(points, triangles), 2 * direct, rtol=1e-12)


def test_contrast_scales_each_side_by_the_conductivity_factor():
    # Contrast model: side i is multiplied by 2σ_j/(σ1 + σ2); with ratio r
    # (dip-direction side over the other) that is 2/(1 + r) on the
    # dip-direction side and 2r/(1 + r) on the other (a hand identity).
    patch = straight_patch(strike=0.0, dip=80.0, sigma_ratio=3.0)
    east = E0 + np.array([900.0, -900.0])  # dip direction is east (strike 0, side +1)
    north = np.full(2, N0 + 2000.0)
    plain = physics.patch_sp(east, north, None, dict(patch, sigma_ratio=1.0))
    contrast = physics.patch_sp(east, north, None, patch)
    npt.assert_allclose(contrast / plain, [2 / 4, 6 / 4], rtol=1e-12)


def test_inconsistent_length_is_refused():
    patch = straight_patch()
    with pytest.raises(ValueError, match="length_m"):
        physics.patch_sp(np.array([E0]), np.array([N0]), None, dict(patch, length_m=patch["length_m"] + 5))


# --------------------------------------------------------------------------- 3. bent patches


def bent_trace(bend_deg, first=2000.0, second=2500.0, azimuth=10.0):
    a = np.array([E0, N0])
    b = a + first * np.array([math.sin(math.radians(azimuth)), math.cos(math.radians(azimuth))])
    turn = math.radians(azimuth + bend_deg)
    c = b + second * np.array([math.sin(turn), math.cos(turn)])
    return [a.tolist(), b.tolist(), c.tolist()]


def test_vertical_bent_patch_is_the_sum_of_its_straight_pieces():
    # Superposition: a double layer on a union of surfaces is the sum of
    # the layers. For a vertical fault each piece is a rectangle on its own
    # straight trace; sums agree to round-off (1e-9 of the jump).
    trace = bent_trace(35.0)
    patch = {"fault_trace": trace, "dip_side": -1, "s0_m": 1300.0, "s1_m": 3100.0,
             "top_depth_m": 80.0, "bottom_depth_m": 900.0, "dip_deg": 90.0, "jump_mv": 70.0,
             "ground_m": None}
    east, north = station_grid(trace[1], half=3000.0)
    bent = physics.patch_sp(east, north, None, patch)
    first = dict(patch, fault_trace=trace[:2], s0_m=1300.0, s1_m=2000.0)
    second = dict(patch, fault_trace=trace[1:], s0_m=0.0, s1_m=1100.0)
    pieces = physics.patch_sp(east, north, None, first) + physics.patch_sp(east, north, None, second)
    npt.assert_allclose(bent, pieces, rtol=0, atol=1e-9 * patch["jump_mv"])
    assert physics.patch_record(dict(patch, ground_m=0.0))["bent"]


def line_intersection(p, u, q, v):
    """Point where p + a·u meets q + b·v (2-D)."""
    a, _ = np.linalg.solve(np.column_stack([u, -v]), q - p)
    return p + a * u


def test_dipping_bent_patch_is_the_sum_of_its_planar_pieces_by_quadrature():
    # Superposition with each planar piece (a trapezoid) integrated by
    # scipy quadrature of the point-dipole kernel with its image. The pieces
    # are built here independently: the top and bottom edges of each piece
    # are the trace pieces moved down-dip, and consecutive pieces meet where
    # their edges at equal depth intersect. Tolerance as for the rectangle.
    bend, dip, top, bottom, jump = 30.0, 60.0, 150.0, 500.0, 90.0
    trace = np.array(bent_trace(bend, azimuth=0.0))
    patch = {"fault_trace": trace.tolist(), "dip_side": 1, "s0_m": 1400.0, "s1_m": 2800.0,
             "top_depth_m": top, "bottom_depth_m": bottom, "dip_deg": dip, "jump_mv": jump,
             "ground_m": None}
    cot = 1.0 / math.tan(math.radians(dip))
    turn = math.radians(bend)
    start, corner = trace[0] + 1400.0 * np.array([0.0, 1.0]), trace[1]
    end = corner + 800.0 * np.array([math.sin(turn), math.cos(turn)])
    pieces = [(start, corner, 0.0), (corner, end, bend)]  # (from, to, strike) on the trace
    stations = [(trace[1][0] + 700.0, trace[1][1] - 100.0), (trace[1][0] - 600.0, trace[1][1] + 500.0),
                (trace[1][0] + 300.0, trace[1][1] + 900.0)]
    for x, y in stations:
        ours = physics.patch_sp(np.array([x]), np.array([y]), None, patch)[0]
        expected = 0.0
        for k, (p, q, strike) in enumerate(pieces):
            s_hat, d_hat, _, n_hat = frame(strike, dip)
            corners = {}
            for depth in (top, bottom):
                offset = depth * cot * d_hat[:2]
                a, b = p + offset, q + offset
                other = pieces[1 - k]
                o_s, o_d, _, _ = frame(other[2], dip)
                o_off = depth * cot * o_d[:2]
                # the end at the bend is where this edge meets the other piece's edge
                if k == 0:
                    b = line_intersection(p + offset, s_hat[:2], other[0] + o_off, o_s[:2])
                else:
                    a = line_intersection(q + offset, -s_hat[:2], other[1] + o_off, -o_s[:2])
                corners[depth] = (np.append(a, -depth), np.append(b, -depth))
            (ta, tb), (ba, bb) = corners[top], corners[bottom]
            expected += trapezoid_quadrature(np.array([x, y, 0.0]), ta, tb, ba, bb, n_hat, jump)
        assert ours == pytest.approx(expected, abs=1e-8 * jump)


def trapezoid_quadrature(station, ta, tb, ba, bb, normal, jump):
    """f/(4π) ∫∫ over the planar quad (bilinear map) of the dipole kernel plus image."""
    mirror = np.array([1.0, 1.0, -1.0])

    def integrand(w, a):
        top = ta + a * (tb - ta)
        bottom = ba + a * (bb - ba)
        point = top + w * (bottom - top)
        jac = np.linalg.norm(np.cross((1 - w) * (tb - ta) + w * (bb - ba), bottom - top))
        total = 0.0
        for q, n in ((point, normal), (point * mirror, normal * mirror)):
            r = station - q
            total += n @ r / np.linalg.norm(r) ** 3
        return total * jac

    value, _ = integrate.dblquad(integrand, 0.0, 1.0, 0.0, 1.0, epsabs=1e-13, epsrel=1e-11)
    return jump * value / (4.0 * math.pi)


def test_bent_patch_tends_to_the_planar_one_as_the_bend_vanishes():
    # As the bend angle ε → 0 the ribbon tends to the rectangle, and the
    # difference is first order in ε: shrinking ε tenfold shrinks it about
    # tenfold (ratio between 5 and 20), and at ε = 1e-7° it is round-off.
    east, north = station_grid((E0 + 800.0, N0 + 2000.0), half=3000.0)

    def patch(bend):
        return {"fault_trace": bent_trace(bend), "dip_side": 1, "s0_m": 1200.0, "s1_m": 2900.0,
                "top_depth_m": 90.0, "bottom_depth_m": 1100.0, "dip_deg": 66.0, "jump_mv": 100.0,
                "ground_m": None}

    planar = physics.patch_sp(east, north, None, patch(0.0))
    gaps = [np.max(np.abs(physics.patch_sp(east, north, None, patch(b)) - planar)) for b in (1.0, 0.1, 0.01)]
    assert 5.0 < gaps[0] / gaps[1] < 20.0 and 5.0 < gaps[1] / gaps[2] < 20.0
    tiny = physics.patch_sp(east, north, None, patch(1e-7))
    npt.assert_allclose(tiny, planar, rtol=0, atol=1e-6)


def test_patch_is_continuous_when_an_end_crosses_a_trace_vertex():
    # No re-triangulation jump: moving s0 across the bend by ±1 mm changes
    # V by O(1 mm × dV/ds), far below 1e-4 mV; the along-strike derivative
    # from steps of 0.5 m and 0.05 m agrees (the benchmark's bound uses
    # central differences).
    east, north = station_grid((E0 + 500.0, N0 + 2000.0), half=2500.0, n=15)
    base = {"fault_trace": bent_trace(28.0), "dip_side": 1, "s1_m": 3200.0, "top_depth_m": 100.0,
            "bottom_depth_m": 800.0, "dip_deg": 70.0, "jump_mv": 100.0, "ground_m": None}
    before = physics.patch_sp(east, north, None, dict(base, s0_m=2000.0 - 1e-3))
    after = physics.patch_sp(east, north, None, dict(base, s0_m=2000.0 + 1e-3))
    npt.assert_allclose(before, after, rtol=0, atol=1e-4)

    def shifted(ds):
        return physics.patch_sp(east, north, None, dict(base, s0_m=1400.0 + ds, s1_m=3200.0 + ds))

    coarse = (shifted(0.5) - shifted(-0.5)) / 1.0
    fine = (shifted(0.05) - shifted(-0.05)) / 0.1
    npt.assert_allclose(fine, coarse, rtol=0, atol=1e-4 * np.max(np.abs(coarse)) + 1e-9)


# --------------------------------------------------------------------------- 4. poles


def test_point_pole_hand_values():
    # By hand: k = 1000 mV·m, pole 30 m deep, station 40 m away
    # horizontally: r = 50 m, V = 20 mV. A pair with the negative pole 80 m
    # deep under the same point: r₋ = √(40² + 80²) = 89.4427 m,
    # V = 1000(1/50 − 1/89.4427) = 20 − 11.18034 = 8.81966 mV.
    east, north = np.array([E0 + 40.0]), np.array([N0])
    single = physics.pole_sp(east, north, None, [[E0, N0, 30.0, 1000.0]])
    assert single[0] == pytest.approx(20.0, rel=1e-12)
    pair = physics.pole_sp(east, north, None, [[E0, N0, 30.0, 1000.0], [E0, N0, 80.0, -1000.0]])
    assert pair[0] == pytest.approx(8.81966, abs=1e-5)
    # Directly above a 2 m deep pole of k = −50 mV·m: −25 mV.
    above = physics.pole_sp(np.array([E0]), np.array([N0]), np.array([900.0]), [[E0, N0, 2.0, -50.0]])
    assert above[0] == pytest.approx(-25.0, rel=1e-12)
