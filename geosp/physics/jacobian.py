"""
Derivatives of the fault-patch forward model: with respect to the patch
parameters (for fits) and to the station position (for gradient readings).

Formulas: physics notes §2.4, in :mod:`geosp.physics._kernels`.
"""

import math

import numpy as np

from . import _fast, _kernels
from .forward import _contrast_factors, _flat, _flat_depth, effective_depth_offset

_DEG = math.pi / 180.0

#: Order of the columns of :func:`patch_sp_local_jacobian`.
JACOBIAN_PARAMETERS = ("centre_m", "length_m", "depth_top_m", "depth_bottom_m", "dip_deg")


def _side_factor(across, up, dip, sigma_ratio):
    if sigma_ratio == 1.0:
        return 1.0
    hw, fw = _contrast_factors(sigma_ratio)
    h = across * math.sin(dip) + up * math.cos(dip)
    return np.where(h > 0, hw, fw)


def patch_sp_local_jacobian(along, across, *, centre_m, length_m, depth_top_m,
                            depth_bottom_m, dip_deg, jump_mv=1.0, sigma_ratio=1.0,
                            depth_offset_m=0.0):
    """
    Surface SP of :func:`~geosp.physics.forward.patch_sp_local` and its
    analytic derivatives with respect to the patch geometry.

    Parameters
    ----------
    along, across, centre_m, length_m, depth_top_m, depth_bottom_m, dip_deg,
    jump_mv, sigma_ratio, depth_offset_m
        As in :func:`~geosp.physics.forward.patch_sp_local`.

    Returns
    -------
    sp : array
        SP in mV, broadcast shape of the inputs.
    jac : array
        Shape ``sp.shape + (5,)``: ∂sp/∂(centre_m, length_m, depth_top_m,
        depth_bottom_m) in mV/m and ∂sp/∂dip_deg in mV per degree
        (column order :data:`JACOBIAN_PARAMETERS`). The derivative with
        respect to ``jump_mv`` is ``sp / jump_mv`` (linear).

    Notes
    -----
    Sums of the derivatives of arctan(ab/(hR)) over the four corner
    rectangles, see
    :func:`geosp.physics._kernels.rectangle_solid_angle_partials`. With a
    conductivity contrast the side factor is constant on each side of the
    plane, so it scales the derivatives too. Uses the compiled kernel when
    numba is installed.
    """
    along = np.asarray(along, dtype=float)
    across = np.asarray(across, dtype=float)
    raw = np.asarray(depth_offset_m, dtype=float)
    offset = effective_depth_offset(raw, depth_top_m)
    sp, jac = _jacobian_at(along, across, centre_m, length_m, depth_top_m + offset,
                           depth_bottom_m + offset, math.radians(dip_deg), jump_mv, sigma_ratio)
    if raw.ndim:
        # raised offsets follow the top depth: shifted top ½z_t, bottom z_b − ½z_t
        raised = np.broadcast_to(raw < -0.5 * np.asarray(depth_top_m, dtype=float), sp.shape)
        if raised.any():
            jac[..., 2] = np.where(raised, 0.5 * (jac[..., 2] - jac[..., 3]), jac[..., 2])
    return sp, jac


def _jacobian_at(along, across, centre_m, length_m, top, bottom, dip, jump_mv, sigma_ratio):
    """SP and Jacobian for final (shifted) depths; dip in radians."""
    if _fast.AVAILABLE:
        top = np.asarray(top, dtype=float)
        bottom = np.asarray(bottom, dtype=float)
        shape = np.broadcast_shapes(along.shape, across.shape, top.shape, bottom.shape)
        hw, fw = _contrast_factors(sigma_ratio)
        sp = np.empty(shape)
        jac = np.empty(shape + (5,))
        _fast.patch_sp_jacobian_surface(
            _flat(along, shape), _flat(across, shape), _flat_depth(top, shape),
            _flat_depth(bottom, shape), float(centre_m), float(length_m), dip,
            float(jump_mv), hw, fw, sp.reshape(-1), jac.reshape(-1, 5),
        )
        jac[..., 4] *= _DEG
        return sp, jac
    return _patch_sp_local_jacobian_numpy(along, across, centre_m, length_m, top, bottom,
                                          dip, jump_mv, sigma_ratio)


def _patch_sp_local_jacobian_numpy(along, across, centre_m, length_m, top, bottom, dip,
                                   jump_mv, sigma_ratio):
    """Numpy reference path of :func:`patch_sp_local_jacobian` (depths final, dip in rad)."""
    omega, d_omega = _kernels.rectangle_solid_angle_partials(
        along, across, 0.0, centre_m, length_m, top, bottom, dip
    )
    scale = jump_mv / (2 * math.pi) * _side_factor(across, 0.0, dip, sigma_ratio)
    sp = scale * omega
    d_omega = d_omega.copy() if not d_omega.flags.writeable else d_omega
    d_omega[4] = d_omega[4] * _DEG
    jac = np.moveaxis(d_omega * scale, 0, -1)
    return sp, jac


def patch_sp_gradient(along, across, *, centre_m, length_m, depth_top_m, depth_bottom_m,
                      dip_deg, jump_mv=1.0, sigma_ratio=1.0, depth_offset_m=0.0, up_m=0.0):
    """
    Gradient of the fault-patch SP with respect to the station position.

    Parameters
    ----------
    along, across, centre_m, length_m, depth_top_m, depth_bottom_m, dip_deg,
    jump_mv, sigma_ratio, depth_offset_m
        As in :func:`~geosp.physics.forward.patch_sp_local`; depths are held
        fixed while the station moves.
    up_m : float or array
        Station height above the flat surface (m, ≤ 0). Default 0.

    Returns
    -------
    gradient : array
        Shape ``broadcast shape + (3,)``: ∂V/∂(along, across, up) in mV/m.
        On the surface the vertical component vanishes (insulating ground).

    Notes
    -----
    V = f(Ω(r) + Ω(r′))/(4π) with r′ the mirror image of r in the surface;
    ∇Ω is the edge sum of
    :func:`geosp.physics._kernels.polygon_solid_angle_gradient`.
    """
    along, across, up = np.broadcast_arrays(
        np.asarray(along, float), np.asarray(across, float), np.asarray(up_m, float)
    )
    offset = effective_depth_offset(depth_offset_m, depth_top_m)
    top = np.asarray(depth_top_m + offset, dtype=float)[..., None]
    bottom = np.asarray(depth_bottom_m + offset, dtype=float)[..., None]
    dip = math.radians(dip_deg)
    cot = math.cos(dip) / math.sin(dip)

    def corner(s, depth):
        s = np.broadcast_to(s, depth.shape)
        # Right-handed (across, along, up) order, see _kernels.patch_vertices.
        return np.concatenate([depth * cot, s, -depth], axis=-1)

    s1 = np.array([centre_m - length_m / 2])
    s2 = np.array([centre_m + length_m / 2])
    vertices = [corner(s1, top), corner(s1, bottom), corner(s2, bottom), corner(s2, top)]
    points = np.stack([across, along, up], axis=-1)
    mirror = np.array([1.0, 1.0, -1.0])
    grad = _kernels.polygon_solid_angle_gradient(points, vertices)
    grad_image = _kernels.polygon_solid_angle_gradient(points * mirror, vertices) * mirror
    factor = _side_factor(across, up, dip, sigma_ratio)
    grad = (grad + grad_image)[..., [1, 0, 2]]  # back to (along, across, up)
    return jump_mv / (4 * math.pi) * grad * np.asarray(factor)[..., None]



