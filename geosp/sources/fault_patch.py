"""
The fault patch: a uniform dipole layer on a rectangle in a fault plane.

Everything geosp knows about this source model lives here: its parameters
in the fitting frame, their bounds and transforms, its field and Jacobian at
the stations (over :func:`geosp.physics.patch_sp_local`), and its row of the
``sources`` layer with the contract's sign rule.

Fitting frame. A :class:`~geosp.models.FaultSegment` gives the frame: ``s``
along strike from the trace origin, ``t`` toward strike + 90°. The dip δ′
is measured from the +t side, in [30°, 90°] when the fault's dip direction
is mapped (then +t is the dip direction) and in [30°, 150°] when it is not
(δ′ > 90° is a plane dipping 180° − δ′ toward −t). Transformed parameters:
``centre`` (m), ``log_length``, ``log_top``, ``log_height`` (height =
bottom − top), ``dip`` (δ′, degrees) and, when fitted, ``log_ratio`` (the
conductivity ratio of the +t side over the −t side). The strength (the jump,
mV) is linear.
"""

from __future__ import annotations

import math

import numpy as np

from .. import physics
from ._base import SourceModel

NAME = "fault_patch"
#: Lowest dip tried (degrees).
MIN_DIP_DEG = 30.0
#: Conductivity ratio bounds when the ratio is fitted (physics notes §2.3).
RATIO_BOUNDS = (0.1, 10.0)


class FaultPatch(SourceModel):
    """
    One fault patch to fit in a segment's frame.

    Parameters
    ----------
    frame : FaultSegment
        The fitting frame (see module notes).
    along, across : (n,) arrays
        Station positions in the frame (m).
    offset : (n,) array
        Station elevation minus the patch datum ``ground_m`` (m); zero for
        a flat datum.
    ground_m : float
        Elevation the depths refer to (m; NaN for a flat datum).
    bounds : dict
        ``centre``, ``length``, ``top``, ``height`` as (low, high) in m,
        ``dip`` as (low, high) in degrees.
    fit_ratio : bool
        Fit the conductivity ratio across the fault.
    """

    name = NAME
    per_station = ("along", "across", "offset")

    def __init__(self, frame, along, across, offset, ground_m, bounds, *, fit_ratio=False):
        self.frame = frame
        self.along, self.across, self.offset = along, across, offset
        self.ground_m = ground_m
        self.fit_ratio = bool(fit_ratio)
        b = bounds
        self.names = ["centre", "log_length", "log_top", "log_height", "dip"]
        lower = [b["centre"][0], math.log(b["length"][0]), math.log(b["top"][0]),
                 math.log(b["height"][0]), b["dip"][0]]
        upper = [b["centre"][1], math.log(b["length"][1]), math.log(b["top"][1]),
                 math.log(b["height"][1]), b["dip"][1]]
        if self.fit_ratio:
            self.names.append("log_ratio")
            lower.append(math.log(RATIO_BOUNDS[0]))
            upper.append(math.log(RATIO_BOUNDS[1]))
        self.lower = np.array(lower, dtype=float)
        self.upper = np.array(upper, dtype=float)


    # parameters -------------------------------------------------------------------------

    def natural(self, p):
        """Dict of centre, length, top, bottom (m), dip (δ′, degrees), ratio."""
        top = math.exp(p[2])
        return {"centre": float(p[0]), "length": math.exp(p[1]), "top": top,
                "bottom": top + math.exp(p[3]), "dip": float(p[4]),
                "ratio": math.exp(p[5]) if self.fit_ratio else 1.0}

    def pack(self, centre, length, top, bottom, dip, ratio=1.0):
        """Transformed parameters from natural ones (clipped into the bounds)."""
        p = [centre, math.log(length), math.log(top), math.log(max(bottom - top, 1e-6)), dip]
        if self.fit_ratio:
            p.append(math.log(ratio))
        return np.clip(np.array(p, dtype=float), self.lower, self.upper)

    # field ------------------------------------------------------------------------------

    def field(self, p, along=None, across=None, offset=None):
        """Unit-jump SP (mV per mV of jump) at the stations (or at given points)."""
        q = self.natural(p)
        along = self.along if along is None else along
        across = self.across if across is None else across
        offset = self.offset if offset is None else offset
        return physics.patch_sp_local(
            along, across, centre_m=q["centre"], length_m=q["length"], depth_top_m=q["top"],
            depth_bottom_m=q["bottom"], dip_deg=q["dip"], jump_mv=1.0, sigma_ratio=q["ratio"],
            depth_offset_m=offset)

    def jacobian(self, p):
        """Unit-jump SP (n,) and its derivatives (n, k) in the transformed parameters."""
        q = self.natural(p)
        g, d = physics.patch_sp_local_jacobian(
            self.along, self.across, centre_m=q["centre"], length_m=q["length"],
            depth_top_m=q["top"], depth_bottom_m=q["bottom"], dip_deg=q["dip"], jump_mv=1.0,
            sigma_ratio=q["ratio"], depth_offset_m=self.offset)
        jac = np.empty((g.size, self.k))
        height = q["bottom"] - q["top"]
        jac[:, 0] = d[:, 0]
        jac[:, 1] = q["length"] * d[:, 1]
        jac[:, 2] = q["top"] * (d[:, 2] + d[:, 3])
        jac[:, 3] = height * d[:, 3]
        jac[:, 4] = d[:, 4]
        if self.fit_ratio:
            # g = g₀·2/(1+r) on the +normal side and g₀·2r/(1+r) on the other
            plus = self.across * math.sin(math.radians(q["dip"])) > 0
            r = q["ratio"]
            jac[:, 5] = g * np.where(plus, -r, 1.0) / (1.0 + r)
        return g, jac

    # derived quantities --------------------------------------------------------------------

    def natural_jacobian(self, p):
        """∂(top, bottom, length, centre, dip)/∂p: rows in that order, (5, k)."""
        q = self.natural(p)
        out = np.zeros((5, self.k))
        out[0, 2] = q["top"]
        out[1, 2] = q["top"]
        out[1, 3] = q["bottom"] - q["top"]
        out[2, 1] = q["length"]
        out[3, 0] = 1.0
        out[4, 4] = 1.0
        return out

    def top_across(self, p):
        """Across-strike position of the top edge (m): z_t·cot δ′."""
        q = self.natural(p)
        return q["top"] / math.tan(math.radians(q["dip"]))

    def row(self, p, jump_mv):
        """
        The ``sources`` fields of this patch in world coordinates with the
        contract's sign rule (a plane leaning toward −t is reported with
        strike + 180°, dip 180° − δ′, the jump negated and the ratio
        inverted).
        """
        q = self.natural(p)
        frame = self.frame
        flip = q["dip"] > 90.0
        dip = 180.0 - q["dip"] if flip else q["dip"]
        strike = (frame.strike_deg + (180.0 if flip else 0.0)) % 360.0
        top_x, top_y = frame.to_world(q["centre"], self.top_across(p))
        return {
            "model": NAME, "fault_id": frame.fault_id,
            "top_x": float(top_x), "top_y": float(top_y), "strike_deg": float(strike),
            "dip_deg": float(dip), "dip_dir_deg": float((strike + 90.0) % 360.0),
            "top_depth_m": float(q["top"]), "bottom_depth_m": float(q["bottom"]),
            "length_m": float(q["length"]), "jump_mv": float(-jump_mv if flip else jump_mv),
            "sigma_ratio": float(1.0 / q["ratio"] if flip else q["ratio"]),
            "ground_m": float(self.ground_m),
        }
