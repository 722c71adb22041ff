"""
The pole pair: a positive and a negative point pole of equal strength,
V = k (1/r₊ − 1/r₋) on a half-space (physics notes §3, [Telford1990]_).

Shallow pairs are geosp's model of cultural and near-surface sources (steel
casings, pipelines under cathodic protection, fences, cables); they compete
with fault patches for an anomaly, and one that wins is reported as
``likely cultural``. A steel casing is the pair with its second pole
straight below the first, at the casing's foot (``single=True``): the
casing carries the current between its head and its foot.

Fitting frame: a :class:`~geosp.models.FaultSegment`, as for the fault
patch. Transformed parameters: ``pos_s``, ``pos_t`` (m), ``log_pos_depth``,
then ``sep_s``, ``sep_t`` (m, the second pole's offset) and
``log_neg_depth`` for a pair, or ``log_casing_length`` for a casing; the
strength k (mV·m) is linear.
"""

from __future__ import annotations

import math

import numpy as np

from .. import physics
from ._base import SourceModel

NAME = "pole_pair"
#: Deepest pole of a cultural pair (m) and farthest apart the two poles may
#: be (physics notes §3: a pair shallower than about 50 m and closer than
#: about 200 m flags a cultural or near-surface source).
MAX_DEPTH_M = 50.0
MAX_SEPARATION_M = 200.0
#: A casing: a pole at its head (this deep at most, m) and the opposite pole
#: straight below it, at its foot (this much deeper, m): a steel casing
#: carries the current between the two (physics notes §3).
SINGLE_MAX_DEPTH_M = 150.0
CASING_LENGTH_M = (50.0, 5000.0)


class PolePair(SourceModel):
    """
    One pole pair to fit in a frame, within a box of the frame.

    Parameters
    ----------
    frame : FaultSegment
    along, across : (n,) arrays
        Station positions in the frame (m).
    box : tuple
        (s_low, s_high, t_low, t_high) in m: where the poles may be.
    min_depth_m : float
        Shallowest pole (m).
    """

    name = NAME

    def __init__(self, frame, along, across, box, *, min_depth_m=2.0, single=False):
        self.frame = frame
        self.along, self.across = along, across
        self.single = bool(single)
        s0, s1, t0, t1 = box
        zlo = math.log(min_depth_m)
        if self.single:
            self.names = ["pos_s", "pos_t", "log_pos_depth", "log_casing_length"]
            self.lower = np.array([s0, t0, zlo, math.log(CASING_LENGTH_M[0])])
            self.upper = np.array([s1, t1, math.log(SINGLE_MAX_DEPTH_M), math.log(CASING_LENGTH_M[1])])
            return
        zhi = math.log(MAX_DEPTH_M)
        half = MAX_SEPARATION_M / math.sqrt(2.0)
        self.names = ["pos_s", "pos_t", "log_pos_depth", "sep_s", "sep_t", "log_neg_depth"]
        self.lower = np.array([s0, t0, zlo, -half, -half, zlo])
        self.upper = np.array([s1, t1, zhi, half, half, zhi])


    @property
    def label(self):
        """How the selection's history names this model."""
        return "pole" if self.single else "pole-pair"

    def natural(self, p):
        pos = (float(p[0]), float(p[1]), math.exp(p[2]))
        if self.single:
            return {"pos": pos, "neg": (pos[0], pos[1], pos[2] + math.exp(p[3]))}
        return {"pos": pos, "neg": (pos[0] + float(p[3]), pos[1] + float(p[4]), math.exp(p[5]))}

    def field(self, p, along=None, across=None, offset=None):
        """Unit-strength SP 1/r₊ − 1/r₋ (1/m) at the stations."""
        q = self.natural(p)
        along = self.along if along is None else along
        across = self.across if across is None else across
        (ps, pt, pz), (ns, nt, nz) = q["pos"], q["neg"]
        return physics.pole_pair_sp((along, across), pos_x=ps, pos_y=pt, pos_depth_m=pz,
                                    neg_x=ns, neg_y=nt, neg_depth_m=nz, k_mv_m=1.0)

    def jacobian(self, p):
        """Unit field and its derivatives (n, k) in the transformed parameters."""
        q = self.natural(p)
        g = self.field(p)
        partial = []
        for (s, t, z) in (q["pos"], q["neg"]):
            ds, dt = self.along - s, self.across - t
            r3 = (ds * ds + dt * dt + z * z) ** 1.5
            # ∂(1/r)/∂(s, t) of the pole and z·∂(1/r)/∂z
            partial.append((ds / r3, dt / r3, -z * z / r3))
        (ps, pt, pz), (ns, nt, nz) = partial
        if self.single:
            # the foot moves with the head; its depth is head depth + length
            z1, z2 = q["pos"][2], q["neg"][2]
            return g, np.column_stack([ps - ns, pt - nt, pz - nz * z1 / z2, -nz * (z2 - z1) / z2])
        # the negative pole moves with the positive one (separation parameters)
        return g, np.column_stack([ps - ns, pt - nt, pz, -ns, -nt, -nz])

    def separation(self, p):
        q = self.natural(p)
        (ps, pt, _), (ns, nt, _) = q["pos"], q["neg"]
        return math.hypot(ps - ns, pt - nt)

    def row(self, p, k_mv_m):
        """
        ``sources`` fields in world coordinates: the positive pole first (for
        a casing of negative strength, the sign is kept on ``pole_k_mv_m``
        so that its head stays first).
        """
        q = self.natural(p)
        pos, neg, k = q["pos"], q["neg"], float(k_mv_m)
        if k < 0 and not self.single:
            pos, neg, k = neg, pos, -k
        px, py = self.frame.to_world(pos[0], pos[1])
        nx, ny = self.frame.to_world(neg[0], neg[1])
        return {"model": NAME, "fault_id": self.frame.fault_id, "top_x": float(px),
                "top_y": float(py), "top_depth_m": float(pos[2]), "neg_x": float(nx),
                "neg_y": float(ny), "neg_depth_m": float(neg[2]), "pole_k_mv_m": k,
                "strike_deg": float(self.frame.strike_deg % 360.0),
                "dip_dir_deg": float((self.frame.strike_deg + 90.0) % 360.0)}
