"""
Compiled (numba) version of the surface fault-patch kernel.

Same closed form as :func:`geosp.physics._kernels.rectangle_solid_angle`
evaluated at up = 0, one station at a time, without temporaries. The numpy
kernel stays the reference; tests hold this one to it. ``AVAILABLE`` is
False when numba is not installed, and callers fall back to numpy.
"""

import math

import numpy as np

try:
    from numba import njit
except ImportError:  # pragma: no cover - exercised only without numba
    AVAILABLE = False
    njit = None
else:
    AVAILABLE = True

from ._kernels import _IN_PLANE

_TWO_PI = 2.0 * math.pi


def _patch_sp_surface(along, across, top, bottom, centre, length, dip, jump,
                      factor_hw, factor_fw, out):
    """
    Fill ``out`` with the surface SP of one patch (units of ``jump``).

    ``along``, ``across`` and ``out`` have length n; ``top`` and ``bottom``
    have length n or 1 (one depth for all stations). Stations with h > 0
    (hanging-wall side) are scaled by ``factor_hw``, the others by
    ``factor_fw`` (conductivity-contrast factors; 1 for equal σ).
    """
    n = along.shape[0]
    sin_d = math.sin(dip)
    cos_d = math.cos(dip)
    per_top = top.shape[0] > 1
    per_bottom = bottom.shape[0] > 1
    s1 = centre - 0.5 * length
    s2 = centre + 0.5 * length
    scale_length = abs(length)
    coefficient = jump / _TWO_PI
    for i in range(n):
        zt = top[i] if per_top else top[0]
        zb = bottom[i] if per_bottom else bottom[0]
        t = across[i]
        h = t * sin_d
        factor = factor_hw if h > 0 else factor_fw
        tiny = _IN_PLANE * (scale_length + abs(zb))
        if abs(h) < tiny:
            h = -tiny if h < 0 else tiny
        w = t * cos_d
        a1 = s1 - along[i]
        a2 = s2 - along[i]
        b1 = zt / sin_d - w
        b2 = zb / sin_d - w
        h2 = h * h
        a1s = a1 * a1 + h2
        a2s = a2 * a2 + h2
        b1s = b1 * b1
        b2s = b2 * b2
        omega = (
            math.atan(a1 * b1 / (h * math.sqrt(a1s + b1s)))
            - math.atan(a1 * b2 / (h * math.sqrt(a1s + b2s)))
            - math.atan(a2 * b1 / (h * math.sqrt(a2s + b1s)))
            + math.atan(a2 * b2 / (h * math.sqrt(a2s + b2s)))
        )
        out[i] = coefficient * factor * omega
    return out


def _patch_sp_jacobian_surface(along, across, top, bottom, centre, length, dip, jump,
                               factor_hw, factor_fw, sp, jac):
    """
    Fill ``sp`` (n,) and ``jac`` (n, 5) with the surface SP of one patch and
    its derivatives with respect to (centre, length, top, bottom, dip per
    radian); same formulas as
    :func:`geosp.physics._kernels.rectangle_solid_angle_partials`.
    """
    n = along.shape[0]
    sin_d = math.sin(dip)
    cos_d = math.cos(dip)
    per_top = top.shape[0] > 1
    per_bottom = bottom.shape[0] > 1
    s1 = centre - 0.5 * length
    s2 = centre + 0.5 * length
    scale_length = abs(length)
    coefficient = jump / _TWO_PI
    a = np.empty(2)
    b = np.empty(2)
    d_a = np.empty(2)
    d_b = np.empty(2)
    for k in range(n):
        zt = top[k] if per_top else top[0]
        zb = bottom[k] if per_bottom else bottom[0]
        t = across[k]
        h = t * sin_d
        factor = coefficient * (factor_hw if h > 0 else factor_fw)
        tiny = _IN_PLANE * (scale_length + abs(zb))
        if abs(h) < tiny:
            h = -tiny if h < 0 else tiny
        w = t * cos_d
        a[0] = s1 - along[k]
        a[1] = s2 - along[k]
        b[0] = zt / sin_d - w
        b[1] = zb / sin_d - w
        h2 = h * h
        omega = 0.0
        d_h = 0.0
        d_a[0] = d_a[1] = d_b[0] = d_b[1] = 0.0
        for i in range(2):
            for j in range(2):
                sign = 1.0 if i == j else -1.0
                ai = a[i]
                bj = b[j]
                a2h2 = ai * ai + h2
                b2h2 = bj * bj + h2
                r = math.sqrt(ai * ai + bj * bj + h2)
                omega += sign * math.atan(ai * bj / (h * r))
                d_a[i] += sign * h * bj / (a2h2 * r)
                d_b[j] += sign * h * ai / (b2h2 * r)
                d_h -= sign * (ai * bj / r) * (1.0 / a2h2 + 1.0 / b2h2)
        sp[k] = factor * omega
        jac[k, 0] = factor * (d_a[0] + d_a[1])
        jac[k, 1] = factor * 0.5 * (d_a[1] - d_a[0])
        jac[k, 2] = factor * d_b[0] / sin_d
        jac[k, 3] = factor * d_b[1] / sin_d
        jac[k, 4] = factor * (d_b[0] * (h - zt * cos_d / (sin_d * sin_d))
                              + d_b[1] * (h - zb * cos_d / (sin_d * sin_d)) + d_h * w)
    return sp


if AVAILABLE:
    patch_sp_surface = njit(cache=True, fastmath=False)(_patch_sp_surface)
    patch_sp_jacobian_surface = njit(cache=True, fastmath=False)(_patch_sp_jacobian_surface)
else:  # pragma: no cover
    patch_sp_surface = None
    patch_sp_jacobian_surface = None
