"""
Public forward models: argument checks, broadcasting, units (mV, degrees).

Formulas live once, in :mod:`geosp.physics._kernels`.
"""

import numpy as np

from . import _kernels


def patch_sp_local(along, across, *, centre_m, length_m, depth_top_m, depth_bottom_m,
                   dip_deg, jump_mv=1.0, sigma_ratio=1.0, depth_offset_m=0.0):
    """
    Surface SP (mV) of a uniform dipole layer on a rectangular fault patch, in
    the fault's local frame.

    Parameters
    ----------
    along, across : array
        Station coordinates in m: along strike from the local origin on the
        trace, and across it toward the dip direction (strike + 90°).
    centre_m, length_m : float
        Centre and length of the patch along strike (m).
    depth_top_m, depth_bottom_m : float or array
        Depths of the patch's top and bottom edges below the station datum
        (m, positive down).
    dip_deg : float
        Dip in degrees, in (0, 90] toward +across (values above 90 dip
        toward -across).
    jump_mv : float
        Potential jump across the patch, dip-direction side minus the other
        (mV). Positive gives positive SP on the dip-direction side.
    sigma_ratio : float
        Conductivity on the dip-direction side over the other side. The
        potential on side i is scaled by 2·σj/(σ1+σ2): exact for a vertical
        fault, an approximation for a dipping one (docs/concepts.md).
    depth_offset_m : float or array
        Added to both depths, per station: station elevation minus the
        reference ground elevation of the patch (terrain treatment).

    Returns
    -------
    sp : array
        SP in mV, broadcast shape of the inputs.
    """
    along = np.asarray(along, dtype=float)
    across = np.asarray(across, dtype=float)
    dip = np.radians(dip_deg)
    top = depth_top_m + np.asarray(depth_offset_m, dtype=float)
    bottom = depth_bottom_m + np.asarray(depth_offset_m, dtype=float)
    sp = _kernels.patch_potential(along, across, 0.0, centre_m, length_m, top, bottom, dip, jump_mv)
    if sigma_ratio != 1.0:
        # sigma_ratio = sigma_hw / sigma_fw; hanging-wall side (+normal) is scaled by 2·sigma_fw/(sum).
        hw = 2.0 / (1.0 + sigma_ratio)
        fw = 2.0 * sigma_ratio / (1.0 + sigma_ratio)
        h = across * np.sin(dip)
        sp = sp * np.where(h > 0, hw, fw)
    return sp


def fault_patch_sp(coordinates, *, top_x, top_y, strike_deg, dip_deg, top_depth_m,
                   bottom_depth_m, length_m, jump_mv, sigma_ratio=1.0, ground_m=None):
    """
    Surface SP (mV) of a fault patch given in world coordinates (the
    ``sources`` layer schema of the contract).

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing[, upward])`` of the stations in m.
    top_x, top_y : float
        Horizontal position of the centre of the patch's top edge (m).
    strike_deg, dip_deg : float
        Strike clockwise from grid north; dip toward strike + 90°.
    top_depth_m, bottom_depth_m : float
        Depths below ground of the top and bottom edges (m).
    length_m, jump_mv, sigma_ratio : float
        See :func:`patch_sp_local`.
    ground_m : float or None
        Ground elevation above the top edge. With it and station
        elevations, depths are taken below each station's own elevation
        (the patch is held in absolute elevation).
    """
    easting, northing = (np.asarray(c, dtype=float) for c in coordinates[:2])
    phi = np.radians(strike_deg)
    dip = np.radians(dip_deg)
    # Trace point above the top-edge centre: back up-dip by top_depth/tan(dip).
    offset = top_depth_m * np.cos(dip) / np.sin(dip)
    origin_e = top_x - offset * np.cos(phi)
    origin_n = top_y + offset * np.sin(phi)
    de, dn = easting - origin_e, northing - origin_n
    along = de * np.sin(phi) + dn * np.cos(phi)
    across = de * np.cos(phi) - dn * np.sin(phi)
    depth_offset = 0.0
    if ground_m is not None and len(coordinates) > 2 and np.isfinite(ground_m):
        upward = np.asarray(coordinates[2], dtype=float)
        depth_offset = np.where(np.isfinite(upward), upward - ground_m, 0.0)
    return patch_sp_local(
        along, across, centre_m=0.0, length_m=length_m, depth_top_m=top_depth_m,
        depth_bottom_m=bottom_depth_m, dip_deg=dip_deg, jump_mv=jump_mv,
        sigma_ratio=sigma_ratio, depth_offset_m=depth_offset,
    )
