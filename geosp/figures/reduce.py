"""
Figures of the field reduction: loop misclosures, profiles before and after,
electrode offsets.

Every function returns a :class:`matplotlib.figure.Figure` built without
pyplot (no global state, Agg canvas); the caller saves or embeds it.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure


def _empty(title, text):
    fig = Figure(figsize=(6, 3), layout="constrained")
    ax = fig.add_subplot()
    ax.set_title(title)
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes)
    ax.set_axis_off()
    return fig


def misclosure_figure(reduction):
    """
    Loop misclosures against their expected size, and standardized residuals of the legs.

    Parameters
    ----------
    reduction : geosp.models.Reduction

    Returns
    -------
    matplotlib.figure.Figure
        Left: misclosure (mV) of each independent loop with its ±2σ band
        (σ = reading σ·√n legs). Right: histogram of the legs' standardized
        residuals with the standard normal density and the blunder threshold.
        A one-panel note when the survey has no loops.
    """
    loops = reduction.qc.get("loops")
    legs = reduction.qc.get("legs")
    if loops is None or len(loops) == 0:
        return _empty("Loop closure", "No loops: the survey has no closed gradient loops.")
    net = reduction.network
    fig = Figure(figsize=(10, 4), layout="constrained")
    ax, bx = fig.subplots(1, 2)
    x = np.arange(1, len(loops) + 1)
    sig = loops["sigma_mv"].to_numpy()
    ax.fill_between(x, -2 * sig, 2 * sig, step="mid", color="0.85", label="±2σ expected")
    mis = loops["misclosure_mv"].to_numpy()
    bad = np.abs(mis) > 2 * sig
    ax.plot(x[~bad], mis[~bad], "o", color="tab:blue", label="misclosure")
    ax.plot(x[bad], mis[bad], "o", color="tab:red", label="misclosure > 2σ")
    ax.axhline(0.0, color="k", lw=0.8)
    ax.set_xlabel("loop number")
    ax.set_ylabel("misclosure (mV)")
    chi2, dof, p = net.get("chi2", np.nan), net.get("dof", 0), net.get("p_value", np.nan)
    ax.set_title(f"Loop misclosures: χ² = {chi2:.1f}, dof = {dof}, p = {p:.2g}")
    ax.legend(loc="best", fontsize="small")
    w = legs["std_residual"].to_numpy(dtype=float) if legs is not None and len(legs) else np.array([])
    w = w[np.isfinite(w)]
    if len(w):
        bins = np.linspace(min(-4.0, w.min()), max(4.0, w.max()), 41)
        bx.hist(w, bins=bins, density=True, color="tab:blue", alpha=0.6,
                label="legs (before down-weighting)")
        grid = np.linspace(bins[0], bins[-1], 400)
        bx.plot(grid, np.exp(-grid**2 / 2) / np.sqrt(2 * np.pi), "k", label="N(0, 1)")
        thr = net.get("blunder_threshold", np.nan)
        if np.isfinite(thr):
            for s in (-thr, thr):
                bx.axvline(s, color="tab:red", ls="--")
            bx.plot([], [], color="tab:red", ls="--", label=f"blunder threshold ±{thr:.1f}")
        bx.legend(loc="best", fontsize="small")
    bx.set_xlabel("standardized residual (dimensionless)")
    bx.set_ylabel("density (1 / unit)")
    bx.set_title("Standardized residuals of the gradient readings")
    return fig


def profiles_figure(reduction, max_lines=8):
    """
    Profiles per line before and after the reduction.

    Parameters
    ----------
    reduction : geosp.models.Reduction
    max_lines : int, optional
        At most this many lines (the longest first). Default 8.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per line: raw SP (``sp_raw_mv``) and reduced SP
        (``sp_mv``) in mV against distance along the line in m; flagged
        stations are circled.
    """
    profiles = reduction.profiles
    if not profiles:
        return _empty("SP profiles", "No survey lines to draw.")
    names = sorted(profiles, key=lambda k: -len(profiles[k]["distance_m"]))[:max_lines]
    fig = Figure(figsize=(9, 2.2 * len(names) + 0.6), layout="constrained")
    axes = np.atleast_1d(fig.subplots(len(names), 1, squeeze=False)[:, 0])
    for ax, name in zip(axes, names):
        p = profiles[name]
        d = p["distance_m"]
        ax.plot(d, p["raw_mv"], ".-", color="0.6", label="raw (integrated as read)")
        ax.plot(d, p["reduced_mv"], ".-", color="tab:blue", label="reduced")
        flagged = np.asarray(p["flag"]) != ""
        if flagged.any():
            ax.plot(d[flagged], p["reduced_mv"][flagged], "o", mfc="none", mec="tab:red", ms=9,
                    label="flagged")
        ax.set_ylabel("SP (mV)")
        ax.set_xlabel("distance along line (m)")
        ax.set_title(f"Line {name}", parse_math=False)
        ax.legend(loc="best", fontsize="small")
    fig.suptitle("SP profiles before and after reduction")
    return fig


def drift_figure(reduction):
    """
    Electrode-pair offsets measured in the checks and the piecewise-linear δ(t) applied.

    Parameters
    ----------
    reduction : geosp.models.Reduction

    Returns
    -------
    matplotlib.figure.Figure
        Offset (mV) against time: the checks as points, the interpolated
        offset at each gradient reading as a line per day. A one-panel note
        when the survey has no electrode checks.
    """
    checks = reduction.qc.get("checks")
    if checks is None or len(checks) == 0:
        return _empty("Electrode offset", "No electrode checks in this survey.")
    legs = reduction.qc.get("legs")
    fig = Figure(figsize=(9, 3.5), layout="constrained")
    ax = fig.add_subplot()
    if legs is not None and len(legs):
        t = legs["time"].to_numpy().astype("datetime64[s]")
        off = legs["offset_mv"].to_numpy(dtype=float)
        order = np.argsort(t, kind="stable")
        t, off = t[order], off[order]
        day = t.astype("datetime64[D]")
        for i, dd in enumerate(np.unique(day[~np.isnat(day)])):
            sel = (day == dd) & np.isfinite(off)
            ax.plot(t[sel], off[sel], "-", color="tab:blue",
                    label="offset applied to readings" if i == 0 else None)
    ct = checks["time"].to_numpy().astype("datetime64[s]")
    co = checks["offset_mv"].to_numpy(dtype=float)
    order = np.argsort(ct, kind="stable")
    ct, co = ct[order], co[order]
    cday = ct.astype("datetime64[D]")
    for i, dd in enumerate(np.unique(cday[~np.isnat(cday)])):
        sel = cday == dd
        ax.plot(ct[sel], co[sel], "--", color="tab:red", lw=0.8,
                label="δ(t), linear between checks" if i == 0 else None)
    ax.plot(ct, co, "o", color="tab:red", label="electrode checks")
    ax.axhline(0.0, color="k", lw=0.8)
    ax.set_xlabel("time (UTC)")
    ax.set_ylabel("electrode-pair offset (mV)")
    ax.set_title("Electrode offset and drift")
    ax.legend(loc="best", fontsize="small")
    fig.autofmt_xdate()
    return fig
