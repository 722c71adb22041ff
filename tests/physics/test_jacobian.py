"""
Analytic derivatives of the fault patch (physics notes §2.4) against
central differences of the forward model, the oracle the notes prescribe.
"""

import numpy as np
import numpy.testing as npt
import pytest

from geosp.physics import (JACOBIAN_PARAMETERS, _fast, _kernels, patch_sp_gradient, patch_sp_local,
                           patch_sp_local_jacobian)


def stations(seed, n=60, keep_off_plane=0.05, dip=60.0):
    rng = np.random.default_rng(seed)
    along = rng.uniform(-2500, 2500, n)
    across = rng.uniform(-2500, 2500, n)
    # Central differences must not straddle the plane (V jumps there).
    near = np.abs(across) < keep_off_plane * 2500
    across[near] += np.sign(across[near] + 1e-9) * keep_off_plane * 2500
    return along, across


def central_difference(params, name, along, across, step):
    plus, minus = dict(params), dict(params)
    plus[name] += step
    minus[name] -= step
    return (patch_sp_local(along, across, **plus) - patch_sp_local(along, across, **minus)) / (
        2 * step)


CASES = [
    dict(centre_m=100.0, length_m=800.0, depth_top_m=150.0, depth_bottom_m=600.0, dip_deg=90.0),
    dict(centre_m=-300.0, length_m=1500.0, depth_top_m=80.0, depth_bottom_m=1200.0,
         dip_deg=60.0, jump_mv=45.0),
    dict(centre_m=0.0, length_m=600.0, depth_top_m=250.0, depth_bottom_m=700.0, dip_deg=35.0,
         jump_mv=-20.0, sigma_ratio=3.0),
    dict(centre_m=200.0, length_m=2000.0, depth_top_m=100.0, depth_bottom_m=400.0,
         dip_deg=125.0, jump_mv=10.0),
]


def _check_against_differences(params, along, across, jac):
    """Every Jacobian column against central differences of the forward model."""
    for column, name in enumerate(JACOBIAN_PARAMETERS):
        step = 1e-5 if name == "dip_deg" else 1e-3
        numeric = central_difference(params, name, along, across, step)
        npt.assert_allclose(jac[:, column], numeric, rtol=1e-6,
                            atol=1e-9 * np.abs(numeric).max(), err_msg=name)


@pytest.mark.parametrize("case", range(len(CASES)))
def test_jacobian_matches_central_differences(case):
    # Steps of about 1e-6 of the geometry scale (1e-3 m; 1e-5 degree):
    # truncation error ~ step² ≈ 1e-12 relative, round-off ~ ε·V/step
    # ≈ 1e-13 absolute; 1e-6 relative plus 1e-9 of the column's largest
    # value is well above both.
    params = CASES[case]
    along, across = stations(case)
    sp, jac = patch_sp_local_jacobian(along, across, **params)
    assert jac.shape == (along.size, 5)
    npt.assert_allclose(sp, patch_sp_local(along, across, **params), rtol=1e-12, atol=1e-15)
    _check_against_differences(params, along, across, jac)


def test_jacobian_with_per_station_depth_offsets():
    # Terrain offsets shift both depths per station; the derivatives with
    # respect to the reference depths are unchanged in form.
    params = dict(CASES[1], depth_offset_m=np.linspace(-39, 60, 60))
    along, across = stations(9)
    _, jac = patch_sp_local_jacobian(along, across, **params)
    _check_against_differences(params, along, across, jac)


def test_offsets_below_half_the_top_depth_are_raised_consistently():
    # Stations more than z_t/2 below the datum see the patch as if z_t/2 below
    # it; value and derivatives (central differences) follow that rule.
    top = CASES[1]["depth_top_m"]
    low = np.linspace(-2.0 * top, -0.6 * top, 60)
    along, across = stations(9)
    params = dict(CASES[1], depth_offset_m=low)
    npt.assert_allclose(patch_sp_local(along, across, **params),
                        patch_sp_local(along, across, **dict(CASES[1], depth_offset_m=-0.5 * top)),
                        rtol=1e-12)
    _, jac = patch_sp_local_jacobian(along, across, **params)
    _check_against_differences(params, along, across, jac)


@pytest.mark.parametrize("case", range(len(CASES)))
def test_station_gradient_matches_central_differences(case):
    # Edge-sum (Biot–Savart form) gradient vs central differences of the
    # surface SP in along and across; step 1e-3 m as above.
    params = CASES[case]
    along, across = stations(case + 20)
    grad = patch_sp_gradient(along, across, **params)
    assert grad.shape == (along.size, 3)
    step = 1e-3
    d_along = (patch_sp_local(along + step, across, **params)
               - patch_sp_local(along - step, across, **params)) / (2 * step)
    d_across = (patch_sp_local(along, across + step, **params)
                - patch_sp_local(along, across - step, **params)) / (2 * step)
    for numeric, analytic in ((d_along, grad[:, 0]), (d_across, grad[:, 1])):
        npt.assert_allclose(analytic, numeric, rtol=1e-6, atol=1e-9 * np.abs(numeric).max())
    # Insulating surface: no vertical derivative there (physics §2.1).
    npt.assert_allclose(grad[:, 2], 0.0, atol=1e-14 * np.abs(grad).max())


def test_subsurface_gradient_matches_central_differences_with_image():
    # Below the surface the image term has its own gradient; checked in
    # all three directions against differences of the kernel potential.
    params = CASES[1]
    rng = np.random.default_rng(4)
    points = np.stack([rng.uniform(-1500, 1500, 20), rng.uniform(-1500, 1500, 20),
                       -rng.uniform(10, 1000, 20)], axis=-1)
    dip = np.radians(params["dip_deg"])
    h = points[:, 1] * np.sin(dip) + points[:, 2] * np.cos(dip)
    points = points[np.abs(h) > 50]
    grad = patch_sp_gradient(points[:, 0], points[:, 1], up_m=points[:, 2], **params)

    def potential(p):
        return _kernels.patch_potential(p[:, 0], p[:, 1], p[:, 2], params["centre_m"],
                                        params["length_m"], params["depth_top_m"],
                                        params["depth_bottom_m"], dip, params["jump_mv"])

    step = 1e-3
    for axis in range(3):
        shift = np.zeros(3)
        shift[axis] = step
        numeric = (potential(points + shift) - potential(points - shift)) / (2 * step)
        npt.assert_allclose(grad[:, axis], numeric, rtol=1e-6,
                            atol=1e-9 * np.abs(numeric).max())


def test_solid_angle_partials_match_triangle_form_differences():
    # Independent route for ∂Ω/∂(geometry): differences of the
    # Van Oosterom & Strackee two-triangle solid angle, not of the closed
    # form the partials come from. Subsurface stations included.
    rng = np.random.default_rng(8)
    along = rng.uniform(-1000, 1000, 30)
    across = rng.uniform(-1000, 1000, 30)
    up = -rng.uniform(0, 300, 30)
    geometry = [0.0, 900.0, 120.0, 700.0, np.radians(70)]
    h = across * np.sin(geometry[4]) + up * np.cos(geometry[4])
    keep = np.abs(h) > 30
    along, across, up = along[keep], across[keep], up[keep]
    _, partials = _kernels.rectangle_solid_angle_partials(along, across, up, *geometry)
    for k in range(5):
        step = 1e-7 if k == 4 else 1e-3
        plus, minus = list(geometry), list(geometry)
        plus[k] += step
        minus[k] -= step
        numeric = (_kernels.rectangle_solid_angle_triangles(along, across, up, *plus)
                   - _kernels.rectangle_solid_angle_triangles(along, across, up, *minus)) / (
            2 * step)
        npt.assert_allclose(partials[k], numeric, rtol=1e-5, atol=1e-8 * np.abs(numeric).max())


@pytest.mark.skipif(not _fast.AVAILABLE, reason="numba not installed")
@pytest.mark.parametrize("case", range(len(CASES)))
def test_compiled_jacobian_matches_numpy_reference(case, monkeypatch):
    # The numba Jacobian restates the numpy partials; agreement to
    # round-off (1e-12 of each column's largest value), per-station depths
    # included.
    params = dict(CASES[case], depth_offset_m=np.linspace(-30, 30, 60))
    along, across = stations(case + 40)
    across[:3] = 0.0  # in-plane stations take the same safety path
    sp, jac = patch_sp_local_jacobian(along, across, **params)
    monkeypatch.setattr(_fast, "AVAILABLE", False)
    sp_ref, jac_ref = patch_sp_local_jacobian(along, across, **params)
    assert jac_ref.shape == jac.shape == (60, 5)
    npt.assert_allclose(sp, sp_ref, rtol=0, atol=1e-12 * np.abs(sp_ref).max())
    for column in range(5):
        npt.assert_allclose(jac[:, column], jac_ref[:, column], rtol=0,
                            atol=1e-12 * np.abs(jac_ref[:, column]).max())
