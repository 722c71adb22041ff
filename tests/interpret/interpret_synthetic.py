"""Synthetic surveys for the survey-model tests, built in code with fixed seeds."""

from __future__ import annotations

import numpy as np

from geosp.models import Fault, Stations
from geosp.physics.forward import fault_patch_sp
from geosp.segments import make_segments

CRS = "EPSG:32633"
E0, N0 = 500000.0, 4500000.0


def exponential_noise(x, y, sd, length, rng):
    """A draw of a zero-mean field with covariance sd² exp(−d/length) (Cholesky, exact)."""
    if sd <= 0:
        return np.zeros(x.size)
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    factor = np.linalg.cholesky(sd**2 * np.exp(-d / length) + 1e-9 * np.eye(x.size))
    return factor @ rng.standard_normal(x.size)


def elevation_at(x, y, *, extent=3000.0, relief=120.0):
    """The invented smooth terrain of these surveys (m)."""
    return 500.0 + relief * np.sin((np.asarray(x) - E0) / extent * np.pi) \
        * np.cos((np.asarray(y) - N0) / extent * 2.0)


def build_survey(*, sources=(), faults=None, k=-1.0, regional=(0.0, 3.0, -2.0), white=3.0,
                 correlated=0.0, length=200.0, seed=0, n_lines=13, line_spacing=150.0,
                 spacing=30.0, extent=3000.0, weights=None, relief=120.0, extra=None):
    """
    Stations on east-west lines over a square survey, with SP = sources
    (``fault_patch_sp`` rows) + regional plane (mV, mV/km east, mV/km north)
    + k·elevation + white and exponentially correlated noise, plus
    ``extra(x, y, elev)`` (mV) when given.

    Returns (Stations, segments, truth dict).
    """
    rng = np.random.default_rng(seed)
    xs, ys, line = [], [], []
    for j in range(n_lines):
        y = N0 + j * line_spacing
        x = E0 + np.arange(0.0, extent + 1e-6, spacing)
        xs.append(x)
        ys.append(np.full(x.size, y))
        line += [f"L{j:02d}"] * x.size
    x, y = np.concatenate(xs), np.concatenate(ys)
    elev = elevation_at(x, y, extent=extent, relief=relief)
    signal = np.zeros(x.size)
    for row in sources:
        signal += fault_patch_sp((x, y, elev), **row)
    c, ge, gn = regional
    signal += c + ge * (x - E0) / 1000.0 + gn * (y - N0) / 1000.0 + k * elev
    if extra is not None:
        signal += extra(x, y, elev)
    noise = rng.normal(0.0, white, x.size) + exponential_noise(x, y, correlated, length, rng)
    ids = [f"S{i:05d}" for i in range(x.size)]
    w = np.ones(x.size) if weights is None else np.asarray(weights(x, y), float)
    stations = Stations(station_id=ids, easting=x, northing=y, upward=elev, sp_mv=signal + noise,
                        crs=CRS, line_id=line, weight=w, sigma_mv=np.full(x.size, np.nan))
    if faults is None:
        faults = [Fault("F1", np.array([[E0 + 1500.0, N0 - 500.0], [E0 + 1500.0, N0 + 2500.0]]))]
    segments = make_segments(tuple(faults), station_spacing_m=spacing)
    return stations, segments, {"k": k, "regional": regional, "sources": list(sources)}


def patch(top_x, top_y, *, relief=120.0, **kw):
    """
    A fault_patch row with defaults; depths below the ground above its top
    edge, each station seeing it below its own elevation (``ground_m``).
    """
    row = dict(top_x=top_x, top_y=top_y, strike_deg=0.0, dip_deg=90.0, top_depth_m=150.0,
               bottom_depth_m=600.0, length_m=1200.0, jump_mv=150.0, sigma_ratio=1.0,
               ground_m=float(elevation_at(top_x, top_y, relief=relief)))
    row.update(kw)
    return row
