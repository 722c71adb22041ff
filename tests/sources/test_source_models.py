"""
The source models' own parts: fields against independent formulas,
Jacobians against central differences, and the sign rules of their rows.
"""

import math

import numpy as np
import numpy.testing as npt
import pytest

from geosp.models import FaultSegment
from geosp.physics.forward import fault_patch_sp, pole_pair_sp
from geosp.sources.fault_patch import FaultPatch
from geosp.sources.pole_pair import PolePair

FRAME = FaultSegment("F1", "F1-01", np.array([[1000.0, 2000.0], [1600.0, 2800.0]]), 36.8699, 1000.0,
                     dip_known=False)


def _stations(n=80, seed=0):
    rng = np.random.default_rng(seed)
    return rng.uniform(-600.0, 1600.0, n), rng.uniform(-700.0, 700.0, n)


def _central_difference(model, p, steps):
    cols = []
    for i, h in enumerate(steps):
        q1, q2 = p.copy(), p.copy()
        q1[i] += h
        q2[i] -= h
        cols.append((model.field(q1) - model.field(q2)) / (2 * h))
    return np.column_stack(cols)


BOUNDS = {"centre": (-500.0, 1500.0), "length": (100.0, 3000.0), "top": (10.0, 2000.0),
          "height": (10.0, 5000.0), "dip": (30.0, 150.0)}


@pytest.mark.parametrize("dip", [60.0, 90.0, 118.0])
@pytest.mark.parametrize("fit_ratio", [False, True])
def test_fault_patch_jacobian_matches_central_differences(dip, fit_ratio):
    # Reference: central differences of the model's own field (step 1e-5
    # of each transformed parameter's scale; truncation error ~h², so 1e-5
    # relative to the largest column entry).
    along, across = _stations()
    offset = np.linspace(-20.0, 30.0, along.size)
    model = FaultPatch(FRAME, along, across, offset, 500.0, BOUNDS, fit_ratio=fit_ratio)
    p = model.pack(400.0, 800.0, 120.0, 600.0, dip, 3.0)
    _, jac = model.jacobian(p)
    steps = [1e-2, 1e-5, 1e-5, 1e-5, 1e-4] + ([1e-5] if fit_ratio else [])
    numeric = _central_difference(model, p, steps)
    for k in range(model.k):
        npt.assert_allclose(jac[:, k], numeric[:, k], atol=1e-5 * np.abs(numeric[:, k]).max() + 1e-12)


@pytest.mark.parametrize("single", [False, True])
def test_pole_pair_field_and_jacobian(single):
    # Reference: V = k(1/r₊ − 1/r₋) written out [Telford1990]; Jacobian by
    # central differences (relative 1e-6).
    along, across = _stations(seed=1)
    model = PolePair(FRAME, along, across, (-500.0, 1500.0, -600.0, 600.0), single=single)
    p = np.array([300.0, 50.0, math.log(30.0), math.log(800.0)]) if single else \
        np.array([300.0, 50.0, math.log(30.0), 120.0, -40.0, math.log(15.0)])
    q = model.natural(p)
    (ps, pt, pz), (ns, nt, nz) = q["pos"], q["neg"]
    expected = 1 / np.sqrt((along - ps) ** 2 + (across - pt) ** 2 + pz**2) \
        - 1 / np.sqrt((along - ns) ** 2 + (across - nt) ** 2 + nz**2)
    npt.assert_allclose(model.field(p), expected, rtol=1e-12)
    if single:
        assert (ns, nt, nz) == pytest.approx((ps, pt, 830.0))
    _, jac = model.jacobian(p)
    numeric = _central_difference(model, p, [1e-3] * model.k)
    npt.assert_allclose(jac, numeric, rtol=1e-6, atol=1e-6 * np.abs(numeric).max())


@pytest.mark.parametrize("dip", [70.0, 90.0, 115.0])
@pytest.mark.parametrize("ratio", [1.0, 3.0])
def test_fault_patch_row_reproduces_its_field_through_the_public_forward_model(dip, ratio):
    # The row (contract's sign rule: δ′ > 90 is reported as strike + 180,
    # dip 180 − δ′, jump negated, ratio inverted) given to fault_patch_sp
    # must give back the model's own field × jump.
    along, across = _stations(seed=2)
    easting, northing = FRAME.to_world(along, across)
    elev = 500.0 + 0.02 * along
    model = FaultPatch(FRAME, along, across, elev - 505.0, 505.0, dict(BOUNDS, dip=(30.0, 150.0)),
                       fit_ratio=ratio != 1.0)
    p = model.pack(350.0, 900.0, 150.0, 700.0, dip, ratio)
    row = model.row(p, 120.0)
    assert 0 < row["dip_deg"] <= 90
    assert row["dip_dir_deg"] == pytest.approx((row["strike_deg"] + 90.0) % 360.0)
    keys = ("top_x", "top_y", "strike_deg", "dip_deg", "top_depth_m", "bottom_depth_m", "length_m",
            "jump_mv", "sigma_ratio", "ground_m")
    published = fault_patch_sp((easting, northing, elev), **{k: row[k] for k in keys})
    npt.assert_allclose(published, 120.0 * model.field(p), rtol=1e-8,
                        atol=1e-9 * 120.0 * np.abs(model.field(p)).max())


def test_pole_pair_row_reproduces_its_field():
    along, across = _stations(seed=3)
    easting, northing = FRAME.to_world(along, across)
    for single, p in ((True, np.array([200.0, -30.0, math.log(40.0), math.log(900.0)])),
                      (False, np.array([200.0, -30.0, math.log(20.0), 80.0, 60.0, math.log(10.0)]))):
        model = PolePair(FRAME, along, across, (-500.0, 1500.0, -600.0, 600.0), single=single)
        for k in (-500.0, 700.0):
            row = model.row(p, k)
            published = pole_pair_sp((easting, northing), pos_x=row["top_x"], pos_y=row["top_y"],
                                     pos_depth_m=row["top_depth_m"], neg_x=row["neg_x"], neg_y=row["neg_y"],
                                     neg_depth_m=row["neg_depth_m"], k_mv_m=row["pole_k_mv_m"])
            npt.assert_allclose(published, k * model.field(p), rtol=1e-10)


def test_buried_line_field_against_quadrature_and_jacobian():
    # Reference: the point-pole potential 1/r of [Telford1990] integrated along
    # the line by scipy.integrate.quad; Jacobian by central differences.
    from scipy import integrate

    from geosp.sources.buried_line import BuriedLine

    along, across = _stations(n=25, seed=4)
    model = BuriedLine(FRAME, along, across, (-500.0, 1500.0, -600.0, 600.0), min_depth_m=2.0)
    p = np.array([300.0, -40.0, 35.0, math.log(1200.0), math.log(6.0)])
    q = model.natural(p)
    theta = math.radians(q["azimuth"])
    direction = np.array([math.cos(theta), math.sin(theta)])
    expected = []
    for s, t in zip(along, across):
        def inverse_r(u, s=s, t=t):
            ds, dt = q["centre"][0] + u * direction[0] - s, q["centre"][1] + u * direction[1] - t
            return 1.0 / math.sqrt(ds * ds + dt * dt + q["depth"] ** 2)
        half = 0.5 * q["length"]
        expected.append(integrate.quad(inverse_r, -half, half, limit=400, epsabs=1e-12, epsrel=1e-10)[0])
    npt.assert_allclose(model.field(p), expected, rtol=1e-8)
    _, jac = model.jacobian(p)
    numeric = _central_difference(model, p, [1e-2, 1e-2, 1e-4, 1e-5, 1e-5])
    npt.assert_allclose(jac, numeric, rtol=1e-5, atol=1e-6 * np.abs(numeric).max())


def test_buried_line_row_reproduces_its_field_and_its_ends():
    from geosp.physics.forward import buried_line_sp
    from geosp.sources.buried_line import BuriedLine

    along, across = _stations(seed=5)
    easting, northing = FRAME.to_world(along, across)
    model = BuriedLine(FRAME, along, across, (-500.0, 1500.0, -600.0, 600.0))
    for azimuth in (-80.0, 0.0, 45.0):
        p = np.array([250.0, 30.0, azimuth, math.log(2000.0), math.log(4.0)])
        row = model.row(p, -35.0)
        assert 0.0 <= row["strike_deg"] < 180.0
        published = buried_line_sp((easting, northing), x=row["top_x"], y=row["top_y"],
                                   azimuth_deg=row["strike_deg"], length_m=row["length_m"],
                                   depth_m=row["top_depth_m"], k_mv=row["line_k_mv"])
        npt.assert_allclose(published, -35.0 * model.field(p), rtol=1e-10)
        # the ends in the frame, mapped to the world, lie length_m apart along strike_deg
        (s0, t0), (s1, t1) = model.ends(p)
        (x0, y0), (x1, y1) = FRAME.to_world(s0, t0), FRAME.to_world(s1, t1)
        assert math.hypot(x1 - x0, y1 - y0) == pytest.approx(2000.0)
        heading = math.degrees(math.atan2(x1 - x0, y1 - y0)) % 180.0
        assert heading == pytest.approx(row["strike_deg"], abs=1e-9)
