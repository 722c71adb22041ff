"""
Companion source models: point pole, pole pair, polarized sphere, 2-D fault
strip and 2-D inclined sheet (physics notes §2.6 and §3), checked against
handbook formulas, numerical integration and the 3-D patch.
"""

import math

import numpy as np
import numpy.testing as npt
import pytest
from scipy import integrate, optimize

from geosp.physics import (_kernels, inclined_sheet_2d_sp, patch_sp_local, point_pole_sp,
                           pole_pair_sp, sphere_sp, strip_2d_sp)


def test_point_pole_table_value():
    # §9 row 1 [Telford1990]: I = 1 A, ρ = 100 Ω·m, r = 100 m gives
    # ρI/(2πr) = 0.1591549 V. k = ρI/(2π) = 15915.49 mV·m; the pole 60 m
    # deep and 80 m off gives r = 100 m.
    k = 100.0 * 1.0 / (2 * np.pi) * 1e3
    sp = point_pole_sp((np.array([80.0, 0.0]), np.array([0.0, -80.0])), x=0.0, y=0.0,
                       depth_m=60.0, k_mv_m=k)
    npt.assert_allclose(sp, 159.1549, atol=1e-4)
    npt.assert_allclose(sp, 1e3 * 100 / (2 * np.pi * 100), rtol=1e-14)


def test_point_pole_sends_its_whole_current_through_a_hemisphere():
    # Telford et al. (1990): V = ρI/(2πr) on the surface is the half-space
    # solution for current I. Check by Gauss: the current −(1/ρ)∮∂V/∂n dA
    # through a buried hemisphere of radius R around the source (the
    # surface closes it and carries none) equals I. ∂V/∂n by central
    # differences (step 1e-5 R, error ~1e-10); quadrature to 1e-10.
    rho, current, depth, radius = 100.0, 2.5, 30.0, 100.0
    k = rho * current / (2 * np.pi)

    def outward_current(theta, phi):
        # theta from straight down (0) to horizontal (π/2).
        direction = np.array([np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi),
                              -np.cos(theta)])
        step = 1e-5 * radius
        outer = (radius + step) * direction
        inner = (radius - step) * direction
        dv = (_kernels.point_pole_potential(outer[0], outer[1], outer[2], depth, k)
              - _kernels.point_pole_potential(inner[0], inner[1], inner[2], depth, k))
        return -dv / (2 * step) / rho * radius**2 * np.sin(theta)

    total, _ = integrate.dblquad(outward_current, 0, 2 * np.pi, 0, np.pi / 2,
                                 epsabs=1e-12, epsrel=1e-10)
    npt.assert_allclose(total, current, rtol=1e-7)


def test_point_pole_at_depth_uses_image():
    # Below the surface the insulating boundary is the image source at
    # height +depth: V = (k/2)(1/r + 1/r_image) [Telford1990]; on the
    # surface both distances are equal and V = k/r.
    k, depth = 1000.0, 40.0
    value = _kernels.point_pole_potential(30.0, 0.0, -20.0, depth, k)
    r, r_image = np.hypot(30.0, 20.0), np.hypot(30.0, 60.0)
    npt.assert_allclose(value, 0.5 * k * (1 / r + 1 / r_image), rtol=1e-14)


def test_pole_pair_far_field_is_dipole():
    # Telford et al. (1990): far from a pair of separation d,
    # V → ρI·d·cos γ/(2πr²) = k·d·cos γ/r², γ from the − to + pole axis.
    # Poles 5 m deep and d = 2 m apart; at r = 3 km the corrections are
    # of order (d/r)² and (depth/r)², below 1e-5.
    k, d = 800.0, 2.0
    gamma = np.radians([0.0, 30.0, 75.0, 140.0, 200.0])
    r = 3000.0
    e, n = r * np.cos(gamma), r * np.sin(gamma)
    sp = pole_pair_sp((e, n), pos_x=d / 2, pos_y=0.0, pos_depth_m=5.0, neg_x=-d / 2,
                      neg_y=0.0, neg_depth_m=5.0, k_mv_m=k)
    npt.assert_allclose(sp, k * d * np.cos(gamma) / r**2, rtol=1e-5, atol=1e-12)
    # A horizontal pair is odd along its axis and linear in k.
    line = np.linspace(-300, 300, 61)
    kw = dict(pos_x=10.0, pos_y=0.0, pos_depth_m=20.0, neg_x=-10.0, neg_y=0.0,
              neg_depth_m=20.0)
    profile = pole_pair_sp((line, np.zeros(61)), k_mv_m=k, **kw)
    npt.assert_allclose(profile, -profile[::-1], atol=1e-12 * k)
    npt.assert_allclose(pole_pair_sp((line, np.zeros(61)), k_mv_m=-3 * k, **kw),
                        -3 * profile, rtol=1e-14)


def test_sphere_equals_quadrature_of_polarized_double_layer():
    # §3 and §9 row 14: a sphere of radius a with a double layer f0·cos θ
    # is outside exactly a dipole; on the surface of a half-space
    # V = K·p·R/R³ with K = 2a²f0/3 [Yungul1950]. Reference: dblquad of the
    # double-layer kernel f(r′)·n′·(r − r′)/(4π|r − r′|³) over the sphere,
    # doubled for the surface image; smooth integrand, so 1e-8 relative.
    a, f0, depth = 30.0, 50.0, 100.0
    azimuth, elevation = np.radians(70.0), np.radians(30.0)
    p = np.array([np.cos(elevation) * np.sin(azimuth), np.cos(elevation) * np.cos(azimuth),
                  np.sin(elevation)])
    centre = np.array([10.0, -20.0, -depth])
    stations = np.array([[10.0, -20.0, 0.0], [150.0, 40.0, 0.0], [-90.0, -200.0, 0.0]])
    sp = sphere_sp((stations[:, 0], stations[:, 1]), x=10.0, y=-20.0, depth_m=depth,
                   k_mv_m2=2 * a * a * f0 / 3, azimuth_deg=70.0, elevation_deg=30.0)
    for value, station in zip(sp, stations):
        def integrand(theta, phi):
            normal = np.array([np.sin(theta) * np.cos(phi), np.sin(theta) * np.sin(phi),
                               np.cos(theta)])
            d = station - (centre + a * normal)
            return (f0 * (normal @ p) * (normal @ d) / np.linalg.norm(d) ** 3
                    * a * a * np.sin(theta))

        full_space, _ = integrate.dblquad(integrand, 0, 2 * np.pi, 0, np.pi,
                                          epsabs=1e-12, epsrel=1e-11)
        npt.assert_allclose(value, 2 * full_space / (4 * np.pi), rtol=1e-8)


def test_sphere_profile_widths():
    # §9 row 14 [V]: vertical polarization gives a half-width at half
    # maximum x½ = 0.76642·h (so h = 1.305·x½); horizontal polarization
    # puts the extremes at ±h/√2. Root finding to 1e-12 m.
    h = 250.0

    def vertical(x):
        return sphere_sp((np.atleast_1d(x), np.zeros(1)), x=0.0, y=0.0, depth_m=h,
                         k_mv_m2=1e6, elevation_deg=90.0)[0]

    peak = vertical(0.0)
    half = optimize.brentq(lambda x: vertical(x) - peak / 2, 1.0, 3 * h, xtol=1e-12)
    npt.assert_allclose(half / h, 0.76642, atol=5e-6)
    # The − pole up (sulphide-type) flips the sign.
    npt.assert_allclose(sphere_sp((np.zeros(1), np.zeros(1)), x=0.0, y=0.0, depth_m=h,
                                  k_mv_m2=1e6, elevation_deg=-90.0), -peak, rtol=1e-14)

    def horizontal(x):
        return sphere_sp((np.atleast_1d(x), np.zeros(1)), x=0.0, y=0.0, depth_m=h,
                         k_mv_m2=1e6, azimuth_deg=90.0, elevation_deg=0.0)[0]

    top = optimize.minimize_scalar(lambda x: -horizontal(x), bounds=(1, 3 * h),
                                   method="bounded", options={"xatol": 1e-9})
    bottom = optimize.minimize_scalar(horizontal, bounds=(-3 * h, -1), method="bounded",
                                      options={"xatol": 1e-9})
    npt.assert_allclose([top.x, bottom.x], [h / np.sqrt(2), -h / np.sqrt(2)], rtol=1e-6)


def test_strip_half_plane_from_surface():
    # §9 row 10: a half-plane from the surface dipping δ gives
    # V(0⁺) = (π − δ)/π and V(0⁻) = −δ/π; δ = 60°: 0.6667 / −0.3333.
    for dip in (30.0, 60.0, 90.0, 120.0):
        d = np.radians(dip)
        sp = strip_2d_sp(np.array([1e-3, -1e-3]), depth_top_m=1e-9, depth_bottom_m=1e12,
                         dip_deg=dip, jump_mv=1.0)
        npt.assert_allclose(sp, [(np.pi - d) / np.pi, -d / np.pi], atol=1e-5)
    sp = strip_2d_sp(np.array([1e-3, -1e-3]), depth_top_m=1e-9, depth_bottom_m=1e12,
                     dip_deg=60.0, jump_mv=1.0)
    npt.assert_allclose(sp, [0.6667, -0.3333], atol=1e-4)


def test_vertical_strip_peaks_and_slope():
    # §9 rows 11–12 and §2.6: for a vertical strip the peak is at
    # t* = √(z_t z_b) with value (f/π)(π/2 − 2 arctan√(z_t/z_b)):
    # z_t = 1, z_b = 3 → f/6 at √3; z_t = 1, z_b = 4 → 0.204833 at 2.
    # The slope at the trace is (f/π)(1/z_t − 1/z_b) = 0.238732 (z_b = 4)
    # and the tails fall as f(z_b − z_t)/(πt).
    npt.assert_allclose(strip_2d_sp(np.sqrt(3.0), depth_top_m=1, depth_bottom_m=3,
                                    dip_deg=90, jump_mv=1), 1 / 6, rtol=1e-13)
    for bottom, t_star, peak in ((3.0, np.sqrt(3.0), 1 / 6), (4.0, 2.0, 0.204833)):
        result = optimize.minimize_scalar(
            lambda t: -strip_2d_sp(t, depth_top_m=1, depth_bottom_m=bottom, dip_deg=90,
                                   jump_mv=1), bounds=(0.1, 10), method="bounded",
            options={"xatol": 1e-10})
        npt.assert_allclose(result.x, t_star, rtol=1e-6)
        npt.assert_allclose(-result.fun, peak, atol=5e-7)
    eps = 1e-6
    slope = (strip_2d_sp(eps, depth_top_m=1, depth_bottom_m=4, dip_deg=90, jump_mv=1)
             - strip_2d_sp(-eps, depth_top_m=1, depth_bottom_m=4, dip_deg=90, jump_mv=1)) / (
        2 * eps)
    npt.assert_allclose(slope, 0.238732, atol=5e-7)
    t = np.array([1e3, 1e4])
    tail = strip_2d_sp(t, depth_top_m=1, depth_bottom_m=4, dip_deg=90, jump_mv=1)
    npt.assert_allclose(tail, 3 / (np.pi * t), rtol=1e-5)
    # Odd about a vertical strip.
    x = np.linspace(-20, 20, 41)
    npt.assert_allclose(strip_2d_sp(x, depth_top_m=1, depth_bottom_m=4, dip_deg=90,
                                    jump_mv=2.0),
                        -strip_2d_sp(-x, depth_top_m=1, depth_bottom_m=4, dip_deg=90,
                                     jump_mv=2.0), atol=1e-15)


@pytest.mark.parametrize("dip", [90.0, 60.0, 35.0, 115.0])
def test_strip_is_long_patch_at_mid_strike(dip):
    # §2.6: the 2-D strip equals the 3-D rectangle at mid-strike when the
    # patch is long. With L = 1e6 m the ends contribute O((z/L)²) ≈ 1e-6.
    across = np.linspace(-3000, 3000, 25)
    strip = strip_2d_sp(across, depth_top_m=150, depth_bottom_m=600, dip_deg=dip,
                        jump_mv=1.0)
    patch = patch_sp_local(np.zeros(25), across, centre_m=0.0, length_m=1e6,
                           depth_top_m=150, depth_bottom_m=600, dip_deg=dip)
    npt.assert_allclose(strip, patch, atol=2e-6)


@pytest.mark.parametrize("dip", [90.0, 50.0])
def test_inclined_sheet_equals_integrated_line_dipoles(dip):
    # §3 (b) [Paul1965]: a sheet polarized along dip is a row of 2-D line
    # dipoles pointing up-dip (K > 0: + pole at the upper edge); each has
    # potential ∝ p·R/|R|², doubled on the surface by its image. Reference
    # by scipy quad of 2K·∫ p·R/|R|² dℓ; smooth integrand, 1e-9 relative.
    d = np.radians(dip)
    top, bottom, k = 40.0, 400.0, 12.0
    e = np.array([np.cos(d), -np.sin(d)])  # down-dip in (across, up)
    start = np.array([top / np.tan(d), -top])
    extent = (bottom - top) / np.sin(d)
    across = np.array([-500.0, -60.0, 0.0, 30.0, 200.0, 900.0])
    sp = inclined_sheet_2d_sp(across, depth_top_m=top, depth_bottom_m=bottom, dip_deg=dip,
                              k_mv=k)
    for value, t in zip(sp, across):
        def integrand(ell):
            r = np.array([t, 0.0]) - (start + ell * e)
            return (-e) @ r / (r @ r)

        reference, _ = integrate.quad(integrand, 0, extent, epsabs=1e-13, epsrel=1e-12)
        npt.assert_allclose(value, 2 * k * reference, rtol=1e-9)
    if dip == 90.0:
        # A vertical sheet polarized along dip gives an even profile.
        npt.assert_allclose(
            inclined_sheet_2d_sp(-across, depth_top_m=top, depth_bottom_m=bottom, dip_deg=dip,
                                 k_mv=k), sp, rtol=1e-13)


def test_buried_line_is_the_limit_of_a_row_of_poles():
    # A row of point poles k = k′·Δ every Δ metres [Telford1990] tends to the
    # line of strength k′ for stations much farther from it than Δ
    # (midpoint rule; 0.5 % here, 150 m or more away with Δ = 5 m).
    from geosp.physics import buried_line_sp, point_pole_sp

    spacing, length, depth, k_line = 5.0, 3000.0, 2.0, 4.0
    s = np.arange(-0.5 * length + 0.5 * spacing, 0.5 * length, spacing)
    phi = math.radians(60.0)
    px, py = 100.0 + s * math.sin(phi), -50.0 + s * math.cos(phi)
    e = np.array([300.0, -400.0, 900.0, 100.0 + 200.0 * math.cos(phi)])
    n = np.array([-300.0, 250.0, 900.0, -50.0 - 200.0 * math.sin(phi)])
    rows = sum(point_pole_sp((e, n), x=x, y=y, depth_m=depth, k_mv_m=k_line * spacing) for x, y in zip(px, py))
    line = buried_line_sp((e, n), x=100.0, y=-50.0, azimuth_deg=60.0, length_m=length, depth_m=depth,
                          k_mv=k_line)
    npt.assert_allclose(line, rows, rtol=5e-3)
