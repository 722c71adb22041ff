"""A printable interpretation map (A4 landscape PDF): SP grid, fault decisions, source outlines."""

from __future__ import annotations

import numpy as np

from .grid import _scale_bar

#: Line styles by fault-segment decision and by source status (the web map's, docs/outputs.md).
SEGMENT_STYLE = {"detected": ("black", 2.4, "-"), "marginal": ("#1b7837", 1.6, (0, (6, 4))),
                 "cultural": ("#8c510a", 1.6, (0, (1, 3))), "no": ("0.45", 1.0, (0, (5, 5)))}
SOURCE_STYLE = {"target": ("#7b3294", 1.8, "-"), "uncertain": ("#7b3294", 1.0, (0, (4, 3))),
                "cultural": ("#8c510a", 1.0, (0, (1, 2)))}


def printable_map(grid, segments, sources, *, title, cautions, amplitude, note=""):
    """
    The interpretation on one A4 landscape page.

    Parameters
    ----------
    grid : Raster or None
        Gridded SP (mV), working CRS.
    segments, sources : GeoDataFrame or None
        The ``fault_segments`` and ``sources`` layers (working CRS).
    title : str
    cautions : sequence of str
        Printed under the map.
    amplitude : float
        Half-range of the SP colour scale (mV), as on the web map.
    note : str
        A line under the cautions (for example the CRS).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.colors import TwoSlopeNorm
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    fig = Figure(figsize=(11.69, 8.27), layout="constrained")
    ax = fig.add_subplot()
    extent = None
    if grid is not None:
        d_north, d_east = grid.spacing if len(grid.easting) > 1 and len(grid.northing) > 1 else (1.0, 1.0)
        extent = (grid.easting[0] - d_east / 2, grid.easting[-1] + d_east / 2,
                  grid.northing[0] - d_north / 2, grid.northing[-1] + d_north / 2)
        image = ax.imshow(np.ma.masked_invalid(np.asarray(grid.values, float)), origin="lower", extent=extent,
                          cmap="RdBu_r", norm=TwoSlopeNorm(vcenter=0.0, vmin=-amplitude, vmax=amplitude),
                          interpolation="nearest", rasterized=True)
        fig.colorbar(image, ax=ax, shrink=0.7, extend="both").set_label("SP (mV)")
    handles = []
    if segments is not None and len(segments):
        for decision, (colour, width, dash) in SEGMENT_STYLE.items():
            chosen = segments[_decisions(segments) == decision]
            for geom in chosen.geometry:
                x, y = geom.xy
                ax.plot(x, y, color=colour, linewidth=width, linestyle=dash)
        labels = {"detected": "fault segment with a source", "marginal": "marginal: worth a second look",
                  "cultural": "anomaly explained by a cultural source", "no": "no anomaly detected"}
        handles += [Line2D([], [], color=c, linewidth=w, linestyle=d, label=labels[k])
                    for k, (c, w, d) in SEGMENT_STYLE.items()]
    if sources is not None and len(sources):
        for _, row in sources.iterrows():
            colour, width, dash = SOURCE_STYLE.get(str(row.get("status") or "target"), SOURCE_STYLE["target"])
            for part in getattr(row.geometry, "geoms", [row.geometry]):
                x, y = part.exterior.xy
                ax.plot(x, y, color=colour, linewidth=width, linestyle=dash)
            if row.get("status") == "target":
                ax.annotate(str(row.get("source_id", "")), (row["top_x"], row["top_y"]), fontsize=7,
                            xytext=(4, 4), textcoords="offset points", color=colour)
        labels = {"target": "source footprint (model)", "uncertain": "uncertain source: not a target",
                  "cultural": "likely cultural (pipe, casing)"}
        handles += [Line2D([], [], color=c, linewidth=w, linestyle=d, label=labels[k])
                    for k, (c, w, d) in SOURCE_STYLE.items()]
    if extent is not None:
        ax.set_xlim(extent[0], extent[1])
        ax.set_ylim(extent[2], extent[3])
        _scale_bar(ax, extent)
        _north_arrow(ax, extent)
    ax.set_aspect("equal")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.set_xlabel("Easting (m)")
    ax.set_ylabel("Northing (m)")
    ax.set_title(title, parse_math=False)
    if handles:
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 0.35), fontsize=7, frameon=False)
    text = "  ".join(f"• {c}" for c in cautions)
    fig.text(0.01, 0.005, text + (f"\n{note}" if note else ""), fontsize=7, va="bottom", wrap=True,
             parse_math=False)
    return fig


def _decisions(segments):
    detected = segments["detected"].astype(bool).to_numpy() if "detected" in segments else np.zeros(len(segments), bool)
    marginal = segments["marginal"].fillna(False).astype(bool).to_numpy() if "marginal" in segments else 0 * detected
    cultural = segments["cultural"].fillna(False).astype(bool).to_numpy() if "cultural" in segments else 0 * detected
    return np.where(detected, "detected", np.where(cultural, "cultural", np.where(marginal, "marginal", "no")))


def _north_arrow(ax, extent):
    """An arrow toward grid north in the upper right corner (the working CRS's north)."""
    width, height = extent[1] - extent[0], extent[3] - extent[2]
    x, y = extent[1] - 0.06 * width, extent[3] - 0.16 * height
    ax.annotate("N", xy=(x, y + 0.1 * height), xytext=(x, y), ha="center", va="top", fontsize=9,
                arrowprops={"arrowstyle": "-|>", "color": "black"})
