"""Figures and tables of the fit step: profiles across the fault and parameters."""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

#: Rows of :func:`parameter_table` per fault-patch source: (label, value field, 1σ field,
#: 16 % field, 84 % field); missing fields are blank.
_PATCH_PARAMETERS = (
    ("top depth (m)", "top_depth_m", "top_depth_sd_m", "top_depth_lo_m", "top_depth_hi_m"),
    ("bottom depth (m)", "bottom_depth_m", "bottom_depth_sd_m", None, None),
    ("geometric-mean depth √(z_t z_b) (m)", "geo_mean_depth_m", "geo_mean_depth_sd_m",
     None, None),
    ("jump (mV)", "jump_mv", "jump_sd_mv", "jump_lo_mv", "jump_hi_mv"),
    ("jump × height (mV·m)", "jump_height_mv_m", "jump_height_sd_mv_m", None, None),
    ("length (m)", "length_m", "length_sd_m", None, None),
    ("dip (°)", "dip_deg", "dip_sd_deg", None, None),
    ("strike (°)", "strike_deg", None, None, None),
    ("trace position across strike (m, 1σ)", None, "location_sd_m", None, None),
    ("conductivity ratio", "sigma_ratio", None, None, None),
)
_POLE_PARAMETERS = (
    ("positive pole depth (m)", "top_depth_m", "top_depth_sd_m", None, None),
    ("negative pole depth (m)", "neg_depth_m", None, None, None),
    ("pole strength k (mV·m)", "pole_k_mv_m", None, None, None),
)

_LINE_PARAMETERS = (
    ("line depth (m)", "top_depth_m", "top_depth_sd_m", None, None),
    ("line length (m)", "length_m", None, None, None),
    ("line direction (°)", "strike_deg", None, None, None),
    ("strength per unit length (mV)", "line_k_mv", None, None, None),
)


def _value(row, key):
    if key is None or key not in row:
        return np.nan
    try:
        return float(row[key])
    except (TypeError, ValueError):
        return np.nan


def parameter_table(fit):
    """
    Parameters of the chosen sources of one segment with their uncertainties.

    Parameters
    ----------
    fit : SegmentFit

    Returns
    -------
    table : pandas.DataFrame
        Columns ``source_id``, ``parameter`` (with units), ``value``,
        ``sd`` (linearised 1σ), ``p16`` and ``p84`` (16th and 84th
        percentiles) and ``interval`` ("16–84 %" when the row carries
        percentiles, from the covariance of the whole model with depths in
        logarithms; "±1σ" when they are the linearised value ± 1σ, blank
        when unknown). Empty when no source was accepted.
    """
    rows = []
    for source in fit.sources:
        spec = {"pole_pair": _POLE_PARAMETERS, "buried_line": _LINE_PARAMETERS}.get(source.get("model"),
                                                                                   _PATCH_PARAMETERS)
        for label, key, sd_key, lo_key, hi_key in spec:
            value, sd = _value(source, key), _value(source, sd_key)
            lo, hi = _value(source, lo_key), _value(source, hi_key)
            how = "16–84 %"
            if not (np.isfinite(lo) and np.isfinite(hi)):
                how = "±1σ" if np.isfinite(value) and np.isfinite(sd) else ""
                lo, hi = (value - sd, value + sd) if how else (np.nan, np.nan)
            rows.append({"source_id": source["source_id"], "parameter": label, "value": value,
                         "sd": sd, "p16": lo, "p84": hi, "interval": how})
    return pd.DataFrame(rows, columns=["source_id", "parameter", "value", "sd", "p16", "p84",
                                       "interval"])


def profiles_figure(fit, stations, *, n_profiles=None):
    """
    Observed, modelled and residual SP along profiles across the fault.

    Stations of the fit are grouped by their along-strike position into 2–4
    bins (quantiles) and plotted against their distance across the trace
    (toward the dip direction of the segment's local frame).

    Parameters
    ----------
    fit : SegmentFit
    stations : Stations
        The stations the fit's ``station_index`` refers to.
    n_profiles : int or None
        Number of profiles (2–4); by default 4 with at least 80 stations,
        3 with 40, else 2.

    Returns
    -------
    figure : matplotlib.figure.Figure
    """
    index = np.asarray(fit.station_index, dtype=int)
    segment = fit.segment
    s, t = segment.to_local(np.asarray(stations.easting)[index],
                            np.asarray(stations.northing)[index])
    s, t = np.asarray(s, float), np.asarray(t, float)
    observed = np.asarray(stations.sp_mv, dtype=float)[index]
    model = np.asarray(fit.predicted_mv, dtype=float)
    residual = observed - model
    sigma = np.asarray(stations.sigma_mv, dtype=float)[index]
    finite = np.isfinite(residual)
    if not np.all(np.isfinite(sigma)):
        scatter = np.std(residual[finite]) if finite.any() else np.nan
        sigma = np.where(np.isfinite(sigma), sigma, scatter)
    line_id = np.asarray(stations.line_id, dtype=str)[index] if stations.line_id is not None \
        else np.full(index.size, "")
    line_key = np.where(line_id != "", line_id, np.char.mod("s%.0f", np.round(s / 25.0)))
    if n_profiles is None:
        n_profiles = 4 if index.size >= 80 else 3 if index.size >= 40 else 2
    n_profiles = int(np.clip(n_profiles, 2, 4))
    # whole survey lines (or along-strike positions) go to one bin, by their mean position
    keys, inverse = np.unique(line_key, return_inverse=True)
    key_s = np.array([s[inverse == k].mean() for k in range(keys.size)]) if s.size else np.zeros(1)
    edges = np.quantile(key_s, np.linspace(0.0, 1.0, n_profiles + 1))
    key_bin = np.clip(np.searchsorted(edges, key_s, side="right") - 1, 0, n_profiles - 1)
    station_bin = key_bin[inverse] if s.size else np.zeros(0, dtype=int)
    figure = Figure(figsize=(8.0, 2.4 * n_profiles + 0.6), layout="constrained")
    axes = figure.subplots(n_profiles, 1, sharex=True, squeeze=False)[:, 0]
    for k, ax in enumerate(axes):
        pick = np.flatnonzero(station_bin == k)
        pick = pick[np.argsort(t[pick])]
        if pick.size:
            ax.errorbar(t[pick], observed[pick], yerr=sigma[pick], fmt="o", ms=3, color="0.2",
                        ecolor="0.6", elinewidth=0.8, label="observed")
            # one model curve per survey line (or per along-strike position), so
            # that neighbouring lines in the same bin do not zigzag
            bin_keys = line_key[pick]
            for n_key, key in enumerate(dict.fromkeys(bin_keys)):
                mine = pick[bin_keys == key]
                ax.plot(t[mine], model[mine], "-", color="tab:red", lw=1.5,
                        label="model" if n_key == 0 else "_model")
            ax.plot(t[pick], residual[pick], ".", color="tab:blue", ms=4, label="residual")
        ax.axvline(0.0, color="0.5", lw=0.8, ls="--")
        ax.axhline(0.0, color="0.8", lw=0.6)
        ax.set_ylabel("SP (mV)")
        if pick.size:
            ax.set_title(f"along strike {s[pick].min():.0f}–{s[pick].max():.0f} m", fontsize=9,
                         loc="left")
        if k == 0:
            ax.legend(fontsize=8, loc="best")
    axes[-1].set_xlabel("distance across the trace, toward strike + 90° (m)")
    figure.suptitle(f"Segment {segment.segment_id}: chosen model {fit.chosen}", fontsize=10,
                     parse_math=False)
    return figure
