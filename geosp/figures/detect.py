"""Figures and tables of the detection step (fault segments scored for dipolar anomalies)."""

from __future__ import annotations

import numpy as np
import pandas as pd

#: Columns of :func:`detection_table`, in order.
TABLE_COLUMNS = ("fault_id", "segment_id", "length_m", "n_stations", "score", "threshold",
                 "false_alarm_p", "polarity", "detected", "marginal", "cultural", "note")


def detection_table(detections):
    """
    One row per segment, highest score first.

    Parameters
    ----------
    detections : sequence of Detection

    Returns
    -------
    table : pandas.DataFrame
        Columns ``fault_id``, ``segment_id``, ``length_m`` (m),
        ``n_stations``, ``score``, ``threshold``, ``false_alarm_p``,
        ``polarity`` (+1/−1, 0 when not scored), ``detected``, ``marginal``,
        ``cultural`` and ``note``; segments that could not be scored (NaN
        score) come last.
    """
    rows = [{
        "fault_id": d.segment.fault_id,
        "segment_id": d.segment.segment_id,
        "length_m": float(d.segment.length_m),
        "n_stations": int(d.n_stations),
        "score": float(d.score),
        "threshold": float(d.threshold),
        "false_alarm_p": float(getattr(d, "false_alarm_p", np.nan)),
        "polarity": int(d.polarity),
        "detected": bool(d.detected),
        "marginal": bool(getattr(d, "marginal", False)),
        "cultural": bool(d.cultural),
        "note": d.note,
    } for d in detections]
    table = pd.DataFrame(rows, columns=list(TABLE_COLUMNS))
    table = table.sort_values("score", ascending=False, na_position="last", kind="stable")
    return table.reset_index(drop=True)


def detection_figure(detections, stations=None, *, ax=None):
    """
    Map of the fault segments coloured by detection score.

    Detected segments are drawn bold, cultural ones dashed, segments that
    could not be scored grey; stations, when given, are faint dots.

    Parameters
    ----------
    detections : sequence of Detection
    stations : Stations or None
        Station positions for the background (m, working CRS).
    ax : matplotlib.axes.Axes or None
        Axes to draw on; a new figure is made when None.

    Returns
    -------
    figure : matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt
    from matplotlib import colors
    from matplotlib.cm import ScalarMappable
    from matplotlib.lines import Line2D

    if ax is None:
        figure, ax = plt.subplots(figsize=(7.5, 6.5), layout="constrained")
    else:
        figure = ax.figure
    if stations is not None and len(stations):
        ax.scatter(stations.easting, stations.northing, s=2, c="0.75", linewidths=0,
                   label="stations", zorder=1)
    scores = np.array([d.score for d in detections], dtype=float)
    finite = scores[np.isfinite(scores)]
    vmax = max(float(finite.max()), 1.0) if finite.size else 1.0
    norm = colors.Normalize(vmin=0.0, vmax=vmax)
    cmap = plt.get_cmap("viridis")
    for d in detections:
        xy = np.asarray(d.segment.coords, dtype=float)
        if np.isfinite(d.score):
            colour = cmap(norm(d.score))
        else:
            colour = "0.6"
        width = 3.5 if d.detected else 1.2
        style = "--" if d.cultural else "-"
        ax.plot(xy[:, 0], xy[:, 1], color=colour, lw=width, ls=style, zorder=3,
                solid_capstyle="round")
        if d.detected:
            mid = xy[len(xy) // 2] if len(xy) > 2 else xy.mean(axis=0)
            ax.annotate(d.segment.segment_id, mid, xytext=(4, 4), textcoords="offset points",
                        fontsize=7, zorder=4, parse_math=False)
    figure.colorbar(ScalarMappable(norm=norm, cmap=cmap), ax=ax,
                    label="score (max |â/σ_â| over templates)")
    handles = [Line2D([], [], color="k", lw=3.5, label="detected"),
               Line2D([], [], color="k", lw=1.2, label="not detected"),
               Line2D([], [], color="k", lw=3.5, ls="--", label="cultural (a pole pair or buried line fits better)"),
               Line2D([], [], color="0.6", lw=1.2, label="not scored")]
    if stations is not None and len(stations):
        handles.append(Line2D([], [], color="0.75", marker=".", ls="", label="stations"))
    ax.legend(handles=handles, loc="best", fontsize=8, framealpha=0.8)
    ax.set_aspect("equal", adjustable="datalim")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.set_xlabel("easting (m)")
    ax.set_ylabel("northing (m)")
    ax.set_title("Fault segments scored for dipolar SP anomalies")
    return figure
