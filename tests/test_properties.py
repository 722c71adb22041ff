"""
Property-based checks (hypothesis) of invariants the other tests do not cover.

Physics (fault-patch forward model, physics.md): the potential of a patch is
a geometric object, so moving stations and patch together (translation),
turning them together about a vertical axis (rotation, with the strike), or
mirroring the stations across the plane through the patch's mid-length
normal to strike leaves it unchanged; and sources add (superposition for the
linear Laplace problem) for random source sets split at random.

Reduction (geosp._network.adjust_network): potential differences around any
closed loop sum to zero (Kirchhoff's voltage law), so exact readings close
every loop with zero misclosure and are reproduced exactly; reversing the
direction of a reading (swap from/to, negate) changes nothing; and the
least-squares solution is linear in the readings.

Tolerances: the forward model is evaluated in double precision through
trigonometric rotations of coordinates of order 10⁴ m, so agreement is to
1e-9 relative plus a 1e-9 mV floor; the network solve goes through a sparse
LU of a well-conditioned SPD system, so 1e-8 mV.
"""

from __future__ import annotations

import numpy as np
import numpy.testing as npt
from hypothesis import given, settings
from hypothesis import strategies as hs

from geosp._network import adjust_network
from geosp.physics.forward import fault_patch_sp, sources_sp

SETTINGS = settings(max_examples=25, deadline=None)


@hs.composite
def patches(draw):
    top = draw(hs.floats(5.0, 300.0))
    return dict(
        top_x=draw(hs.floats(-500.0, 500.0)), top_y=draw(hs.floats(-500.0, 500.0)),
        strike_deg=draw(hs.floats(0.0, 360.0)), dip_deg=draw(hs.floats(20.0, 90.0)),
        top_depth_m=top, bottom_depth_m=top + draw(hs.floats(20.0, 1000.0)),
        length_m=draw(hs.floats(50.0, 3000.0)), jump_mv=draw(hs.floats(-200.0, 200.0)),
    )


def stations(seed, n=60, half=2000.0):
    rng = np.random.default_rng(seed)
    return rng.uniform(-half, half, n), rng.uniform(-half, half, n)


@SETTINGS
@given(patch=patches(), seed=hs.integers(0, 2**16), shift=hs.tuples(hs.floats(-5e4, 5e4), hs.floats(-5e4, 5e4)))
def test_translation_of_stations_and_patch_together(patch, seed, shift):
    e, n = stations(seed)
    base = fault_patch_sp((e, n), **patch)
    moved = fault_patch_sp((e + shift[0], n + shift[1]),
                           **{**patch, "top_x": patch["top_x"] + shift[0], "top_y": patch["top_y"] + shift[1]})
    npt.assert_allclose(moved, base, rtol=1e-9, atol=1e-9)


@SETTINGS
@given(patch=patches(), seed=hs.integers(0, 2**16), turn=hs.floats(-360.0, 360.0))
def test_rotation_of_stations_with_the_strike(patch, seed, turn):
    # Turning the map clockwise by `turn` about the top-edge centre adds `turn` to the strike
    # (strike is measured clockwise from grid north).
    e, n = stations(seed)
    cx, cy = patch["top_x"], patch["top_y"]
    a = np.radians(turn)
    de, dn = e - cx, n - cy
    e2 = cx + de * np.cos(a) + dn * np.sin(a)
    n2 = cy - de * np.sin(a) + dn * np.cos(a)
    base = fault_patch_sp((e, n), **patch)
    turned = fault_patch_sp((e2, n2), **{**patch, "strike_deg": (patch["strike_deg"] + turn) % 360.0})
    npt.assert_allclose(turned, base, rtol=1e-9, atol=1e-9)


@SETTINGS
@given(patch=patches(), seed=hs.integers(0, 2**16))
def test_mirror_across_the_mid_length_plane(patch, seed):
    # The patch is symmetric about the vertical plane through its top-edge centre normal to
    # strike, so stations mirrored across that plane see the same potential.
    e, n = stations(seed)
    phi = np.radians(patch["strike_deg"])
    along_unit = np.array([np.sin(phi), np.cos(phi)])
    de, dn = e - patch["top_x"], n - patch["top_y"]
    along = de * along_unit[0] + dn * along_unit[1]
    e2, n2 = e - 2 * along * along_unit[0], n - 2 * along * along_unit[1]
    npt.assert_allclose(fault_patch_sp((e2, n2), **patch), fault_patch_sp((e, n), **patch), rtol=1e-9, atol=1e-9)


@SETTINGS
@given(rows=hs.lists(patches(), min_size=2, max_size=6), seed=hs.integers(0, 2**16), data=hs.data())
def test_sources_add_whatever_the_split(rows, seed, data):
    e, n = stations(seed)
    cut = data.draw(hs.integers(1, len(rows) - 1))
    order = data.draw(hs.permutations(range(len(rows))))
    rows = [dict(rows[i], model="fault_patch") for i in order]
    whole = sources_sp((e, n), rows)
    parts = sources_sp((e, n), rows[:cut]) + sources_sp((e, n), rows[cut:])
    single = sum(fault_patch_sp((e, n), **{k: v for k, v in r.items() if k != "model"}) for r in rows)
    scale = max(1.0, float(np.abs(single).max()))
    npt.assert_allclose(whole, parts, rtol=1e-12, atol=1e-12 * scale)
    npt.assert_allclose(whole, single, rtol=1e-12, atol=1e-12 * scale)


# --------------------------------------------------------------------------- reduction network

@hs.composite
def networks(draw):
    """A connected multigraph: a random spanning tree, extra legs (loops), and repeated legs."""
    n = draw(hs.integers(3, 40))
    rng = np.random.default_rng(draw(hs.integers(0, 2**32 - 1)))
    parent = [int(rng.integers(0, k)) for k in range(1, n)]
    f, t = list(range(1, n)), parent
    for _ in range(draw(hs.integers(1, 2 * n))):
        a, b = rng.choice(n, 2, replace=False)
        f.append(int(a))
        t.append(int(b))
    f, t = np.array(f), np.array(t)
    flip = rng.random(len(f)) < 0.5  # reading direction is arbitrary
    f, t = np.where(flip, t, f), np.where(flip, f, t)
    potential = rng.normal(0.0, 30.0, n)
    variance = rng.uniform(0.2, 4.0, len(f))
    reference = int(draw(hs.integers(0, n - 1)))
    return n, f, t, potential, variance, reference, rng


@SETTINGS
@given(net=networks())
def test_exact_readings_close_every_loop(net):
    n, f, t, x, var, ref, _ = net
    result = adjust_network(n, f, t, x[t] - x[f], var, ref)
    assert result["dof"] == len(f) - n + 1 and len(result["loops"]) == result["dof"]
    npt.assert_allclose([loop["misclosure_mv"] for loop in result["loops"]], 0.0, atol=1e-8)
    npt.assert_allclose(result["residual"], 0.0, atol=1e-8)
    npt.assert_allclose(result["chi2"], 0.0, atol=1e-12)
    npt.assert_allclose(result["potential"], x - x[ref], atol=1e-8)


@SETTINGS
@given(net=networks())
def test_reversing_readings_changes_nothing(net):
    n, f, t, x, var, ref, rng = net
    obs = x[t] - x[f] + rng.normal(0.0, 1.0, len(f))
    base = adjust_network(n, f, t, obs, var, ref)
    flip = rng.random(len(f)) < 0.5
    f2, t2, obs2 = np.where(flip, t, f), np.where(flip, f, t), np.where(flip, -obs, obs)
    other = adjust_network(n, f2, t2, obs2, var, ref)
    npt.assert_allclose(other["potential"], base["potential"], atol=1e-8)
    npt.assert_allclose(other["sigma"], base["sigma"], atol=1e-8)
    npt.assert_allclose(other["chi2"], base["chi2"], rtol=1e-8, atol=1e-10)
    npt.assert_allclose(np.where(flip, -other["residual"], other["residual"]), base["residual"], atol=1e-8)


@SETTINGS
@given(net=networks(), a=hs.floats(-3.0, 3.0), b=hs.floats(-3.0, 3.0))
def test_adjustment_is_linear_in_the_readings(net, a, b):
    n, f, t, x, var, ref, rng = net
    obs1 = rng.normal(0.0, 10.0, len(f))
    obs2 = rng.normal(0.0, 10.0, len(f))
    p1 = adjust_network(n, f, t, obs1, var, ref)["potential"]
    p2 = adjust_network(n, f, t, obs2, var, ref)["potential"]
    p = adjust_network(n, f, t, a * obs1 + b * obs2, var, ref)["potential"]
    npt.assert_allclose(p, a * p1 + b * p2, atol=1e-8 * (1 + abs(a) + abs(b)) * 10)
