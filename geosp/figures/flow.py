"""Cross-section figure of a primary-flow model (matplotlib, Agg; nothing is saved or shown)."""

from __future__ import annotations

import numpy as np


def _section(result, values):
    """The (x, z) slice of a cell array: itself in 2-D, the profile's y in 3-D."""
    if values is None or result.mesh.ndim == 2:
        return values
    y = result.mesh.centres[1]
    return values[:, int(np.argmin(np.abs(y - result.model.profile_y_m))), :]


def _outlines(result):
    """Region outlines in the section as (name, x, z) arrays."""
    out = []
    for region in result.model.regions:
        shape = np.asarray(region.shape, dtype=float)
        if result.mesh.ndim == 2:
            closed = np.vstack([shape, shape[:1]])
            out.append((region.name, closed[:, 0], closed[:, 1]))
        else:
            x0, x1, y0, y1, z0, z1 = shape
            if y0 <= result.model.profile_y_m <= y1:
                out.append((region.name, np.array([x0, x1, x1, x0, x0]),
                            np.array([z0, z0, z1, z1, z0])))
    return out


def section_figure(result, *, title=None, depth_m=None):
    """
    Section of a flow model with the surface SP profile above it.

    Parameters
    ----------
    result : geosp.flow.FlowResult
        Solved model (in 3-D the section is taken at the profile's y).
    title : str or None, optional
        Figure title; default the model title.
    depth_m : float or None, optional
        Deepest depth drawn (m); default the model's core depth.

    Returns
    -------
    figure : matplotlib.figure.Figure
        Top: modelled SP along the profile (mV) and observed stations, if
        any. Bottom: V (mV) in colour (diverging map centred on 0), contours
        of temperature (K, solid) or else pressure (MPa, dashed), region
        outlines, depth increasing downward.
    """
    from matplotlib.colors import TwoSlopeNorm
    from matplotlib.figure import Figure

    model, mesh = result.model, result.mesh
    x0, x1 = model.core_x_m
    bottom = model.depth_m if depth_m is None else float(depth_m)
    xc, zc = mesh.centres[0], mesh.centres[-1]
    xs = (xc >= x0) & (xc <= x1)
    zs = zc <= bottom
    figure = Figure(figsize=(9.0, 7.5), constrained_layout=True)
    top, sec = figure.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [1, 2]})

    top.plot(result.profile_x_m, result.profile_mv, color="k", lw=1.5, label="model")
    if result.station_x_m is not None:
        top.plot(result.station_x_m, result.observed_mv, "o", ms=4, mfc="none", color="C3",
                 label=f"observed (RMS {result.rms_mv:.1f} mV)")
        top.legend(loc="best", fontsize=8)
    top.axhline(0.0, color="0.6", lw=0.6)
    top.set_ylabel("SP (mV)")
    top.set_title(title if title is not None else (model.title or "Primary-flow section"),
                  parse_math=False)

    v = _section(result, result.potential_mv)[np.ix_(xs, zs)]
    limit = float(np.nanpercentile(np.abs(v), 99)) or 1.0
    mesh_image = sec.pcolormesh(xc[xs], zc[zs], v.T, shading="nearest", cmap="RdBu_r",
                                norm=TwoSlopeNorm(0.0, -limit, limit))
    colorbar = figure.colorbar(mesh_image, ax=sec, shrink=0.9, pad=0.01)
    colorbar.set_label("V (mV)")
    temperature = _section(result, result.temperature_k)
    pressure = _section(result, result.pressure_pa)
    if temperature is not None:
        lines = sec.contour(xc[xs], zc[zs], temperature[np.ix_(xs, zs)].T, colors="k",
                            linewidths=0.7, levels=8)
        sec.clabel(lines, fontsize=7, fmt="+%.0f K")  # temperature above the surface temperature
    elif pressure is not None:
        lines = sec.contour(xc[xs], zc[zs], 1e-6 * pressure[np.ix_(xs, zs)].T, colors="k",
                            linewidths=0.7, linestyles="--", levels=8)
        sec.clabel(lines, fontsize=7, fmt="%.2g MPa")
    import shapely

    view = shapely.box(x0, 0.0, x1, bottom)
    for name, x, z in _outlines(result):
        sec.plot(x, z, color="0.2", lw=1.0)
        visible = shapely.Polygon(np.column_stack([x, z])).buffer(0).intersection(view)
        if not visible.is_empty and visible.area > 0:
            spot = visible.representative_point()
            sec.text(spot.x, spot.y, name, fontsize=8, parse_math=False, ha="center", va="center",
                     color="0.1", bbox={"fc": "white", "ec": "none", "alpha": 0.6, "pad": 1})
    sec.set_xlim(x0, x1)
    sec.set_ylim(bottom, 0.0)
    sec.set_xlabel("x (m)")
    sec.set_ylabel("depth (m)")
    return figure
