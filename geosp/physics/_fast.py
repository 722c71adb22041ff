"""
Compiled (numba) version of the surface fault-patch kernel and its Jacobian.

The numpy kernel :func:`geosp.physics._kernels.rectangle_solid_angle` stays
the reference; tests hold these kernels to it. They evaluate the same signed
solid angle at up = 0, one station at a time and without temporaries, but
as the rectangle split into two triangles (Van Oosterom & Strackee form,
physics notes §2.2, [VanOosterom1983]_). With the corners seen from the
station as R_ij = (a_i, b_j, −h) in patch coordinates,

    tan(Ω_k/2) = N/D_k,   N = h·L·W (the same for both triangles),
    D_k = |R₁||R₂||R₃| + (R₁·R₂)|R₃| + (R₁·R₃)|R₂| + (R₂·R₃)|R₁|,

and Ω/2 = Ω₁/2 + Ω₂/2 is the argument of (D₁ + iN)(D₂ + iN): one ``atan2``
instead of four ``atan`` (off the plane |Ω| < 2π, so Ω/2 lies in (−π, π)).
N = h·L·W is exact, which keeps full relative precision in the far field.

D_k loses digits for stations close to an edge of triangle k compared with
its size (|D_k + iN| small against |R₁||R₂||R₃|). The main loop marks those
stations with NaN and a second loop, run only when there are any,
evaluates them by the four-arctan corner sum of the numpy kernel. (Keeping
the four-arctan branch inside the main loop would slow every station by a
quarter, through the extra calls in the loop body.)

``AVAILABLE`` is False when numba is not installed, and callers fall back
to numpy.
"""

import math
import os
import sys

if "numba" not in sys.modules and "NUMBA_CACHE_DIR" not in os.environ:
    # Compiled kernels are cached in the user's cache folder, never in the installed package.
    try:
        from .._userdirs import user_cache_dir

        os.environ["NUMBA_CACHE_DIR"] = str(user_cache_dir() / "numba")
    except (ImportError, OSError):  # no writable cache folder: numba then caches nowhere it cannot
        pass

try:
    from numba import njit
except ImportError:  # pragma: no cover - exercised only without numba
    AVAILABLE = False
    njit = None
else:
    AVAILABLE = True

from ._kernels import _IN_PLANE

# A triangle with |D| + |N| below this fraction of |R₁||R₂||R₃| goes to the
# four-arctan form. D is a sum of seven terms up to |R₁||R₂||R₃|, each
# rounded to a few ulps, and |D + iN| ≥ (|D| + |N|)/√2, so elsewhere the
# triangle form's rounding error stays below about 1e-14 rad: the level at
# which rounding the station coordinates to doubles already moves Ω.
_NEAR_EDGE = 0.1


def _station(along, across, s1, s2, wt, wb, sin_d, cos_d, tiny):
    """
    Corner offsets (a1, a2, b1, b2), the signed distance h from the patch
    plane (moved to ±tiny when closer than that), the down-dip coordinate w
    and whether the station is on the hanging-wall side (h > 0 before the
    move), for a surface station.
    """
    h = across * sin_d
    hanging = h > 0
    if abs(h) < tiny:
        h = -tiny if h < 0 else tiny
    w = across * cos_d
    return s1 - along, s2 - along, wt - w, wb - w, h, w, hanging


def _half_solid_angle(a1, a2, b1, b2, h, area):
    """
    Ω/2 of the rectangle with corner offsets a1, a2 (along strike) and b1,
    b2 (down dip) seen from height h above its plane, as two triangles
    (a1b1, a1b2, a2b2) and (a1b1, a2b2, a2b1); ``area`` is the signed
    L·W = (a2 − a1)(b2 − b1). NaN when the station is too close to a
    triangle edge for this form (see ``_NEAR_EDGE``). Also returns the
    corner distances R11, R12, R21, R22 (R_ij² = a_i² + b_j² + h²).
    """
    h2 = h * h
    a11 = a1 * a1 + h2
    a22 = a2 * a2 + h2
    a12 = a1 * a2 + h2
    b11 = b1 * b1
    b22 = b2 * b2
    b12 = b1 * b2
    r11 = math.sqrt(a11 + b11)
    r12 = math.sqrt(a11 + b22)
    r21 = math.sqrt(a22 + b11)
    r22 = math.sqrt(a22 + b22)
    n = h * area
    p1 = r11 * r12 * r22
    p2 = r11 * r22 * r21
    d1 = p1 + (a11 + b12) * r22 + (a12 + b12) * r12 + (a12 + b22) * r11
    d2 = p2 + (a12 + b12) * r21 + (a12 + b11) * r22 + (a22 + b12) * r11
    an = abs(n)
    if abs(d1) + an < _NEAR_EDGE * p1 or abs(d2) + an < _NEAR_EDGE * p2:
        half = math.nan
    else:
        half = math.atan2(n * (d1 + d2), d1 * d2 - n * n)
    return half, r11, r12, r21, r22


def _four_arctan(a1, a2, b1, b2, h):
    """Solid angle by the corner sum, with the operations of the numpy kernel."""
    h2 = h * h
    a1s = a1 * a1 + h2
    a2s = a2 * a2 + h2
    b1s = b1 * b1
    b2s = b2 * b2
    return (
        math.atan(a1 * b1 / (h * math.sqrt(a1s + b1s)))
        - math.atan(a1 * b2 / (h * math.sqrt(a1s + b2s)))
        - math.atan(a2 * b1 / (h * math.sqrt(a2s + b1s)))
        + math.atan(a2 * b2 / (h * math.sqrt(a2s + b2s)))
    )


def _redo_near_edges(along, across, top, bottom, s1, s2, length, sin_d, cos_d,
                     scale_hw, scale_fw, out):
    """
    Replace the NaN marks in ``out`` by scale·Ω/2 from the four-arctan form
    (``scale_hw`` on the hanging-wall side, ``scale_fw`` on the other).
    """
    per_top = top.shape[0] > 1
    per_bottom = bottom.shape[0] > 1
    for i in range(along.shape[0]):
        if out[i] == out[i]:
            continue
        zt = top[i] if per_top else top[0]
        zb = bottom[i] if per_bottom else bottom[0]
        tiny = _IN_PLANE * (abs(length) + abs(zb))
        a1, a2, b1, b2, h, _, hanging = _station(along[i], across[i], s1, s2, zt / sin_d,
                                                 zb / sin_d, sin_d, cos_d, tiny)
        out[i] = (scale_hw if hanging else scale_fw) * 0.5 * _four_arctan(a1, a2, b1, b2, h)


def _sp_station(along, across, s1, s2, wt, wb, tiny, area, sin_d, cos_d, scale_hw, scale_fw):
    """scale·Ω/2 at one surface station (NaN near a triangle edge)."""
    a1, a2, b1, b2, h, _, hanging = _station(along, across, s1, s2, wt, wb, sin_d, cos_d, tiny)
    half = _half_solid_angle(a1, a2, b1, b2, h, area)[0]
    return (scale_hw if hanging else scale_fw) * half


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
    s1 = centre - 0.5 * length
    s2 = centre + 0.5 * length
    # V = jump·Ω/(2π) = (jump/π)·(Ω/2)
    scale_hw = jump / math.pi * factor_hw
    scale_fw = jump / math.pi * factor_fw
    marked = 0
    if top.shape[0] > 1 or bottom.shape[0] > 1:
        # per-station depths: index 0 for a single depth (no branch in the loop)
        step_t = 1 if top.shape[0] > 1 else 0
        step_b = 1 if bottom.shape[0] > 1 else 0
        for i in range(n):
            zb = bottom[i * step_b]
            wt = top[i * step_t] / sin_d
            wb = zb / sin_d
            value = _sp_station(along[i], across[i], s1, s2, wt, wb,
                                _IN_PLANE * (abs(length) + abs(zb)), length * (wb - wt),
                                sin_d, cos_d, scale_hw, scale_fw)
            marked += value != value
            out[i] = value
    else:
        # one depth pair: the patch terms are loop invariants
        wt = top[0] / sin_d
        wb = bottom[0] / sin_d
        tiny = _IN_PLANE * (abs(length) + abs(bottom[0]))
        area = length * (wb - wt)
        for i in range(n):
            value = _sp_station(along[i], across[i], s1, s2, wt, wb, tiny, area,
                                sin_d, cos_d, scale_hw, scale_fw)
            marked += value != value
            out[i] = value
    if marked:
        _redo_near_edges(along, across, top, bottom, s1, s2, length, sin_d, cos_d,
                         scale_hw, scale_fw, out)
    return out


def _jacobian_station(k, along, across, zt, zb, s1, s2, wt, wb, tiny, area, sin_d, cos_d,
                      inv_sin, cos_over_sin2, coefficient_hw, coefficient_fw, sp, jac):
    """
    Fill ``sp[k]`` (NaN near a triangle edge) and ``jac[k]`` at one surface
    station; returns whether ``sp[k]`` is marked.
    """
    a1, a2, b1, b2, h, w, hanging = _station(along, across, s1, s2, wt, wb, sin_d, cos_d, tiny)
    factor = coefficient_hw if hanging else coefficient_fw
    half, r11, r12, r21, r22 = _half_solid_angle(a1, a2, b1, b2, h, area)
    sp[k] = 2.0 * factor * half
    # Corner sums (signs +, −, −, + for a1b1, a1b2, a2b1, a2b2) of the
    # partials of g = arctan(ab/(hR)): ∂g/∂a = hb/((a²+h²)R),
    # ∂g/∂b = ha/((b²+h²)R), ∂g/∂h = −(ab/R)[1/(a²+h²) + 1/(b²+h²)].
    # Reciprocals from one division per group (products stay far from
    # overflow: R⁴ < 1e300 for any distance below 1e75 m).
    h2 = h * h
    qa1 = a1 * a1 + h2
    qa2 = a2 * a2 + h2
    qb1 = b1 * b1 + h2
    qb2 = b2 * b2 + h2
    inv_a = 1.0 / (qa1 * qa2)
    inv_b = 1.0 / (qb1 * qb2)
    ia1 = qa2 * inv_a
    ia2 = qa1 * inv_a
    ib1 = qb2 * inv_b
    ib2 = qb1 * inv_b
    r1112 = r11 * r12
    r2122 = r21 * r22
    inv_r = 1.0 / (r1112 * r2122)
    g11 = r12 * r2122 * inv_r
    g12 = r11 * r2122 * inv_r
    g21 = r22 * r1112 * inv_r
    g22 = r21 * r1112 * inv_r
    d_a1 = h * ia1 * (b1 * g11 - b2 * g12)
    d_a2 = h * ia2 * (b2 * g22 - b1 * g21)
    d_b1 = h * ib1 * (a1 * g11 - a2 * g21)
    d_b2 = h * ib2 * (a2 * g22 - a1 * g12)
    d_h = -(a1 * b1 * g11 * (ia1 + ib1) - a1 * b2 * g12 * (ia1 + ib2)
            - a2 * b1 * g21 * (ia2 + ib1) + a2 * b2 * g22 * (ia2 + ib2))
    jac[k, 0] = factor * (d_a1 + d_a2)
    jac[k, 1] = factor * 0.5 * (d_a2 - d_a1)
    jac[k, 2] = factor * d_b1 * inv_sin
    jac[k, 3] = factor * d_b2 * inv_sin
    jac[k, 4] = factor * (d_b1 * (h - zt * cos_over_sin2) + d_b2 * (h - zb * cos_over_sin2)
                          + d_h * w)
    return half != half


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
    inv_sin = 1.0 / sin_d
    cos_over_sin2 = cos_d / (sin_d * sin_d)
    s1 = centre - 0.5 * length
    s2 = centre + 0.5 * length
    coefficient_hw = jump / (2.0 * math.pi) * factor_hw
    coefficient_fw = jump / (2.0 * math.pi) * factor_fw
    marked = 0
    if top.shape[0] > 1 or bottom.shape[0] > 1:
        step_t = 1 if top.shape[0] > 1 else 0
        step_b = 1 if bottom.shape[0] > 1 else 0
        for k in range(n):
            zt = top[k * step_t]
            zb = bottom[k * step_b]
            wt = zt / sin_d
            wb = zb / sin_d
            marked += _jacobian_station(k, along[k], across[k], zt, zb, s1, s2, wt, wb,
                                        _IN_PLANE * (abs(length) + abs(zb)), length * (wb - wt),
                                        sin_d, cos_d, inv_sin, cos_over_sin2, coefficient_hw,
                                        coefficient_fw, sp, jac)
    else:
        zt = top[0]
        zb = bottom[0]
        wt = zt / sin_d
        wb = zb / sin_d
        tiny = _IN_PLANE * (abs(length) + abs(zb))
        area = length * (wb - wt)
        for k in range(n):
            marked += _jacobian_station(k, along[k], across[k], zt, zb, s1, s2, wt, wb, tiny,
                                        area, sin_d, cos_d, inv_sin, cos_over_sin2,
                                        coefficient_hw, coefficient_fw, sp, jac)
    if marked:
        _redo_near_edges(along, across, top, bottom, s1, s2, length, sin_d, cos_d,
                         2.0 * coefficient_hw, 2.0 * coefficient_fw, sp)
    return sp


if AVAILABLE:
    # Helpers first, so that the kernels compile against the compiled helpers.
    _station = njit(cache=True, fastmath=False, inline="always")(_station)
    _half_solid_angle = njit(cache=True, fastmath=False, inline="always")(_half_solid_angle)
    _four_arctan = njit(cache=True, fastmath=False)(_four_arctan)
    _redo_near_edges = njit(cache=True, fastmath=False)(_redo_near_edges)
    _sp_station = njit(cache=True, fastmath=False, inline="always")(_sp_station)
    _jacobian_station = njit(cache=True, fastmath=False, inline="always")(_jacobian_station)
    patch_sp_surface = njit(cache=True, fastmath=False)(_patch_sp_surface)
    patch_sp_jacobian_surface = njit(cache=True, fastmath=False)(_patch_sp_jacobian_surface)
else:  # pragma: no cover
    patch_sp_surface = None
    patch_sp_jacobian_surface = None
