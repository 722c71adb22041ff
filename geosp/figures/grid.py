"""Map figure of a gridded SP result (matplotlib, Agg; nothing is saved or shown)."""

from __future__ import annotations

import numpy as np


def grid_figure(result, stations=None, faults=None, *, title="Gridded SP"):
    """
    Map of an SP grid with stations, fault traces, colour bar and scale bar.

    Parameters
    ----------
    result : GridResult or Raster
        Grid to draw (mV); NaN nodes stay blank.
    stations : Stations or None
        Station positions drawn as small dots (m, same CRS as the grid).
    faults : iterable or None
        Fault traces: (n, 2) arrays of easting, northing in m, or objects
        with a ``coords`` attribute (such as :class:`~geosp.models.Fault`).
    title : str, optional
        Axes title. Default "Gridded SP".

    Returns
    -------
    figure : matplotlib.figure.Figure
        A figure not attached to any GUI; the caller saves or embeds it.

    Notes
    -----
    The diverging colour map (RdBu_r) is centred on 0 mV with symmetric
    limits at the 99th percentile of |SP|, so red is positive and blue
    negative whatever the range.
    """
    from matplotlib.colors import TwoSlopeNorm
    from matplotlib.figure import Figure

    grid = getattr(result, "grid", result)
    values = np.asarray(grid.values, dtype=float)
    finite = values[np.isfinite(values)]
    limit = float(np.percentile(np.abs(finite), 99)) if finite.size else 1.0
    limit = limit if limit > 0 else 1.0

    fig = Figure(figsize=(7.5, 6.5), layout="constrained")
    ax = fig.add_subplot()
    d_north, d_east = grid.spacing if len(grid.easting) > 1 and len(grid.northing) > 1 else (1.0, 1.0)
    extent = (grid.easting[0] - d_east / 2, grid.easting[-1] + d_east / 2,
              grid.northing[0] - d_north / 2, grid.northing[-1] + d_north / 2)
    image = ax.imshow(np.ma.masked_invalid(values), origin="lower", extent=extent, cmap="RdBu_r",
                      norm=TwoSlopeNorm(vcenter=0.0, vmin=-limit, vmax=limit), interpolation="nearest")
    colorbar = fig.colorbar(image, ax=ax, shrink=0.8, extend="both")
    colorbar.set_label("SP (mV)")

    if stations is not None and len(stations):
        ax.plot(stations.easting, stations.northing, ".", color="0.15", markersize=1.2,
                alpha=0.6, label="stations", rasterized=True)
    for k, trace in enumerate(faults or ()):
        coords = np.asarray(getattr(trace, "coords", trace), dtype=float)
        ax.plot(coords[:, 0], coords[:, 1], "-", color="black", linewidth=1.6,
                label="fault traces" if k == 0 else None)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="upper right", fontsize="small", framealpha=0.8)

    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_aspect("equal")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.set_xlabel("Easting (m)")
    ax.set_ylabel("Northing (m)")
    ax.set_title(title, parse_math=False)
    _scale_bar(ax, extent)
    return fig


def _scale_bar(ax, extent):
    """A black bar about a fifth of the map width, with a round length in m or km."""
    width = extent[1] - extent[0]
    target = width / 5
    exponent = np.floor(np.log10(target))
    length = max(s * 10**exponent for s in (1, 2, 5) if s * 10**exponent <= target)
    x0 = extent[0] + 0.05 * width
    y0 = extent[2] + 0.05 * (extent[3] - extent[2])
    ax.plot([x0, x0 + length], [y0, y0], color="black", linewidth=3, solid_capstyle="butt")
    text = f"{length / 1000:g} km" if length >= 1000 else f"{length:g} m"
    ax.text(x0 + length / 2, y0 + 0.015 * (extent[3] - extent[2]), text, ha="center",
            va="bottom", fontsize="small")
