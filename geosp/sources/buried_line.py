"""
The buried line: a horizontal line of current sources of uniform strength,
V = k ∫ ds / R along it (the point pole k/r integrated over the line;
physics notes §3, [Telford1990]_).

A pipeline or cable that leaks or takes current along its length (cathodic
protection, a bare metal pipe across ground of changing redox) makes a
ridge or trough of SP along its course that neither a pole pair nor a fault
patch follows; as a cultural rival, a buried line competes with the fault
patch for an anomaly where a line of infrastructure crosses a fault. One
that wins is reported as ``likely cultural``.

Fitting frame: a :class:`~geosp.models.FaultSegment`, as for the fault
patch. Transformed parameters: ``pos_s``, ``pos_t`` (m, the line's centre),
``azimuth`` (degrees from the frame's strike, clockwise, in [−90°, 90°]),
``log_length`` and ``log_depth``; the strength k (mV) is linear.
"""

from __future__ import annotations

import math

import numpy as np

from .. import physics
from ._base import SourceModel

NAME = "buried_line"
#: Deepest line (m): buried infrastructure lies within tens of metres of the surface.
MAX_DEPTH_M = 50.0
#: Longest line (m): longer lines look the same over a window of a few kilometres.
MAX_LENGTH_M = 20000.0


class BuriedLine(SourceModel):
    """
    One buried line to fit in a frame, its centre within a box of the frame.

    Parameters
    ----------
    frame : FaultSegment
    along, across : (n,) arrays
        Station positions in the frame (m).
    box : tuple
        (s_low, s_high, t_low, t_high) in m: where the centre may be.
    min_depth_m : float
        Shallowest line (m).
    min_length_m : float
        Shortest line (m).
    """

    name = NAME
    #: How the selection's history names this model.
    label = "buried-line"

    def __init__(self, frame, along, across, box, *, min_depth_m=2.0, min_length_m=200.0):
        self.frame = frame
        self.along, self.across = along, across
        s0, s1, t0, t1 = box
        self.names = ["pos_s", "pos_t", "azimuth", "log_length", "log_depth"]
        self.lower = np.array([s0, t0, -90.0, math.log(min_length_m), math.log(min_depth_m)])
        self.upper = np.array([s1, t1, 90.0, math.log(MAX_LENGTH_M), math.log(MAX_DEPTH_M)])


    def natural(self, p):
        return {"centre": (float(p[0]), float(p[1])), "azimuth": float(p[2]),
                "length": math.exp(p[3]), "depth": math.exp(p[4])}

    def _local(self, p, along=None, across=None):
        """Station positions along and across the line, from its centre (m)."""
        q = self.natural(p)
        along = self.along if along is None else along
        across = self.across if across is None else across
        theta = math.radians(q["azimuth"])
        ds, dt = along - q["centre"][0], across - q["centre"][1]
        c, s = math.cos(theta), math.sin(theta)
        return ds * c + dt * s, -ds * s + dt * c, q

    def field(self, p, along=None, across=None, offset=None):
        """Unit-strength SP ∫ ds / R (dimensionless) at the stations."""
        u, v, q = self._local(p, along, across)
        return physics.line_integral(u, v, length_m=q["length"], depth_m=q["depth"])

    def jacobian(self, p):
        """Unit field and its derivatives (n, k) in the transformed parameters."""
        u, v, q = self._local(p)
        half, z = 0.5 * q["length"], q["depth"]
        h = np.sqrt(v * v + z * z)
        a, b = half - u, half + u
        ra, rb = np.sqrt(h * h + a * a), np.sqrt(h * h + b * b)
        g = np.arcsinh(a / h) + np.arcsinh(b / h)
        # f = asinh(a/h) + asinh(b/h); d asinh(a/h) = (h da − a dh) / (h R_a)
        df_da, df_db = 1.0 / ra, 1.0 / rb
        df_dh = -(a / ra + b / rb) / h
        theta = math.radians(q["azimuth"])
        c, s = math.cos(theta), math.sin(theta)
        # u = ds c + dt s, v = −ds s + dt c with ds = along − s₀, dt = across − t₀
        du = (-c, -s, v * math.pi / 180.0)  # ∂u/∂(s₀, t₀, azimuth in degrees)
        dv = (s, -c, -u * math.pi / 180.0)
        dh_dv = v / h
        cols = []
        for k in range(3):
            cols.append(-df_da * du[k] + df_db * du[k] + df_dh * dh_dv * dv[k])
        cols.append((df_da + df_db) * half)  # ∂/∂log L: a and b both grow by L/2
        cols.append(df_dh * (z * z / h))  # ∂/∂log z: dh = z² / h
        return g, np.column_stack(cols)

    def ends(self, p):
        """The two ends of the line in the frame, ((s, t), (s, t))."""
        q = self.natural(p)
        theta = math.radians(q["azimuth"])
        (s0, t0), half = q["centre"], 0.5 * q["length"]
        d = np.array([math.cos(theta), math.sin(theta)]) * half
        return (s0 - d[0], t0 - d[1]), (s0 + d[0], t0 + d[1])

    def row(self, p, k_mv):
        """``sources`` fields in world coordinates: the centre, direction, length and depth."""
        q = self.natural(p)
        x, y = self.frame.to_world(*q["centre"])
        return {"model": NAME, "fault_id": self.frame.fault_id, "top_x": float(x), "top_y": float(y),
                "top_depth_m": q["depth"], "length_m": q["length"],
                "strike_deg": float((self.frame.strike_deg + q["azimuth"]) % 180.0),
                "line_k_mv": float(k_mv)}
