"""
Public fault-patch forward models: check values of physics notes §9, the
sign rule, invariants, the conductivity-contrast factor, the terrain
treatment, the compiled kernel against the numpy reference, and sources_sp.
"""

import numpy as np
import numpy.testing as npt
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from geosp.errors import InputError
from geosp.physics import _fast, _kernels, forward
from geosp.physics import (fault_patch_sp, patch_sp_gradient, patch_sp_local, pole_pair_sp,
                           sources_sp)
from physics_reference import dipole_sum

ROW6 = dict(centre_m=100.0, length_m=800.0, depth_top_m=150.0, depth_bottom_m=600.0)
ACROSS = np.array([100.0, 300.0, 700.0, 1500.0])


def world_stations(strike_deg, along, across):
    phi = np.radians(strike_deg)
    return (along * np.sin(phi) + across * np.cos(phi),
            along * np.cos(phi) - across * np.sin(phi))


def test_vertical_patch_matches_table_and_is_odd():
    # §9 row 6 ([V] brute force 4e-7); values quoted to 6 digits.
    expected = np.array([0.107230, 0.137357, 0.071502, 0.022345])
    along = np.full(4, 100.0)
    sp = patch_sp_local(along, ACROSS, dip_deg=90, **ROW6)
    npt.assert_allclose(sp, expected, atol=6e-7)
    # A vertical patch in uniform σ is odd in t (physics §6).
    npt.assert_allclose(patch_sp_local(along, -ACROSS, dip_deg=90, **ROW6), -sp, rtol=1e-13)


def test_dipping_patch_matches_table_in_world_coordinates():
    # §9 row 7 (strike 30°, dip 60°), quoted to 6 digits. Stations in world
    # coordinates through fault_patch_sp; top-edge centre at the trace
    # point above s_c displaced down-dip by z_t/tan(dip).
    plus = np.array([0.125081, 0.249297, 0.136666, 0.033986])
    minus = np.array([-0.058039, -0.069164, -0.040794, -0.015652])
    t = np.concatenate([ACROSS, -ACROSS])
    offset = 150.0 / np.tan(np.radians(60))
    e, n = world_stations(30.0, np.zeros(8), t)
    top_e, top_n = world_stations(30.0, 0.0, offset)
    sp = fault_patch_sp((e, n), top_x=top_e, top_y=top_n, strike_deg=30, dip_deg=60,
                        top_depth_m=150, bottom_depth_m=600, length_m=800, jump_mv=1.0)
    npt.assert_allclose(sp, np.concatenate([plus, minus]), atol=6e-7)


def test_shallow_dip_matches_table():
    # §9 row 8 (strike 120°, dip 35°), 6 digits.
    sp = patch_sp_local(np.full(3, 100.0), np.array([300.0, 700.0, -300.0]), dip_deg=35,
                        **ROW6)
    npt.assert_allclose(sp, [0.328322, 0.323318, -0.028524], atol=6e-7)


@pytest.mark.parametrize("dip", [90.0, 60.0, 35.0])
def test_surface_potential_matches_point_dipole_sum(dip):
    # Brute force: 300 × 300 point dipoles plus images (physics §2.1);
    # midpoint-rule error about 10/m² ≈ 1e-4 of f.
    along = np.array([100.0, 400.0, -250.0, 600.0])
    across = np.array([100.0, -300.0, 700.0, 40.0])
    points = np.stack([along, across, np.zeros(4)], axis=-1)
    expected = dipole_sum(points, 100.0, 800.0, 150.0, 600.0, np.radians(dip), m=300)
    sp = patch_sp_local(along, across, dip_deg=dip, **ROW6)
    npt.assert_allclose(sp, expected, atol=1.2e-4)


def test_far_field_tends_to_dipole():
    # §9 row 9: stations at 2 / 10 / 40 km on bearing 36.87° from the trace
    # point above s_c; ratio to the dipole f·A·n·R/(2π|R|³) at the patch
    # centre, A = L(z_b − z_t)/sin δ. Quoted to 5-6 digits.
    strike, dip, top, bottom, length = 30.0, 60.0, 300.0, 700.0, 400.0
    distance = np.array([2000.0, 10000.0, 40000.0])
    bearing = np.radians(36.87)
    e, n = distance * np.sin(bearing), distance * np.cos(bearing)
    phi, d = np.radians(strike), np.radians(dip)
    along = e * np.sin(phi) + n * np.cos(phi)
    across = e * np.cos(phi) - n * np.sin(phi)
    sp = patch_sp_local(along, across, centre_m=0.0, length_m=length, depth_top_m=top,
                        depth_bottom_m=bottom, dip_deg=dip)
    mid = (top + bottom) / 2
    r = np.stack([along, across - mid / np.tan(d), np.full(3, mid)], axis=-1)
    normal = np.array([0.0, np.sin(d), np.cos(d)])
    area = length * (bottom - top) / np.sin(d)
    dipole = area * (r @ normal) / (2 * np.pi * np.linalg.norm(r, axis=1) ** 3)
    npt.assert_allclose(sp / dipole, [1.01296, 1.00052, 1.00003], atol=1e-5)


@pytest.mark.parametrize("strike", [0.0, 30.0, 137.0, 250.0, 359.0])
@pytest.mark.parametrize("dip", [30.0, 60.0, 90.0])
def test_positive_jump_gives_positive_sp_down_dip(strike, dip):
    # Sign rule of the contract (common practice convention fixed there):
    # f > 0 gives V > 0 at 500 m down the dip direction from the top edge,
    # and a smaller or negative value 500 m the other way.
    phi = np.radians(strike)
    dip_dir = np.array([np.cos(phi), -np.sin(phi)])
    e = np.array([500.0 * dip_dir[0], -500.0 * dip_dir[0]])
    n = np.array([500.0 * dip_dir[1], -500.0 * dip_dir[1]])
    sp = fault_patch_sp((e, n), top_x=0.0, top_y=0.0, strike_deg=strike, dip_deg=dip,
                        top_depth_m=100, bottom_depth_m=600, length_m=1500, jump_mv=50.0)
    assert sp[0] > 0
    assert sp[0] > sp[1]


def test_linear_in_jump():
    # V = f·Ω/(2π) is linear in f (physics §2.1).
    along = np.linspace(-900, 900, 37)
    across = np.linspace(-1200, 1500, 37)
    one = patch_sp_local(along, across, dip_deg=60, jump_mv=1.0, **ROW6)
    for f in (-80.0, 3.5, 250.0):
        npt.assert_allclose(patch_sp_local(along, across, dip_deg=60, jump_mv=f, **ROW6),
                            f * one, rtol=1e-13)


def test_steep_dip_beyond_90_equals_flipped_strike():
    # Dip δ′ in (90°, 150°) measured from +across means dip 180 − δ′ toward
    # −across; in the flipped frame (s, t) → (−s, −t) with the jump negated
    # it is the same patch (physics §7 reporting rule).
    rng = np.random.default_rng(3)
    along = rng.uniform(-2000, 2000, 200)
    across = rng.uniform(-2000, 2000, 200)
    for dip in (95.0, 120.0, 149.0):
        sp = patch_sp_local(along, across, dip_deg=dip, jump_mv=10.0, **ROW6)
        flipped = patch_sp_local(-along, -across, centre_m=-100.0, length_m=800.0,
                                 depth_top_m=150.0, depth_bottom_m=600.0,
                                 dip_deg=180.0 - dip, jump_mv=-10.0)
        npt.assert_allclose(sp, flipped, rtol=1e-11, atol=1e-12)
        assert np.all(np.isfinite(sp))


def test_contrast_factor_values():
    # §9 row 13 ([D], FV-verified): σ1 = 1 (footwall), σ2 = 10 (hanging
    # wall) gives a1 = 20/11 on side 1 and a2 = 2/11 on side 2.
    along = np.full(4, 100.0)
    base = patch_sp_local(along, np.concatenate([ACROSS[:2], -ACROSS[:2]]), dip_deg=90,
                          **ROW6)
    scaled = patch_sp_local(along, np.concatenate([ACROSS[:2], -ACROSS[:2]]), dip_deg=90,
                            sigma_ratio=10.0, **ROW6)
    npt.assert_allclose(scaled[:2], 2 / 11 * base[:2], rtol=1e-13)
    npt.assert_allclose(scaled[2:], 20 / 11 * base[2:], rtol=1e-13)


def test_contrast_keeps_jump_and_normal_current_for_vertical_fault():
    # Physics §2.3: with the factors the potential still jumps by f across
    # the patch, and σ·∂V/∂n is continuous across the plane outside it
    # (current continuity). Checked by differences 1e-3 m either side of
    # the surface trace outside the patch (smooth there: 1e-6 relative).
    f, ratio = 40.0, 10.0  # sigma_hw / sigma_fw
    kw = dict(centre_m=0.0, length_m=800.0, depth_top_m=150.0, depth_bottom_m=600.0,
              dip_deg=90.0, jump_mv=f, sigma_ratio=ratio)
    step = 1e-3
    along = np.array([-2000.0, 0.0, 900.0])
    plus = (patch_sp_local(along, 2 * step, **kw) - patch_sp_local(along, step, **kw)) / step
    minus = (patch_sp_local(along, -step, **kw) - patch_sp_local(along, -2 * step, **kw)) / step
    npt.assert_allclose(ratio * plus, 1.0 * minus, rtol=1e-4)
    # Jump across the patch itself at depth: mean factor (a1 + a2)/2 = 1.
    hw, fw = forward._contrast_factors(ratio)
    npt.assert_allclose((hw + fw) / 2, 1.0, rtol=1e-15)


def test_half_plane_reaching_surface_gives_constant_sides():
    # §9 row 10 and §1 item 2: a sheet from the surface to great depth and
    # length is a uniform unbounded layer: V is constant on each side,
    # (π − δ)/π and −δ/π (δ = 60°: 0.6667 / −0.3333), and the horizontal
    # gradient vanishes far from the edges. Edges at 1e-3 m and 1e8 m put
    # the residual below 1e-5.
    for dip in (60.0, 90.0, 40.0):
        d = np.radians(dip)
        kw = dict(centre_m=0.0, length_m=2e8, depth_top_m=1e-3, depth_bottom_m=1e8,
                  dip_deg=dip)
        across = np.array([50.0, 300.0, 2000.0, -50.0, -300.0, -2000.0])
        sp = patch_sp_local(np.zeros(6), across, **kw)
        npt.assert_allclose(sp[:3], (np.pi - d) / np.pi, atol=1e-5)
        npt.assert_allclose(sp[3:], -d / np.pi, atol=1e-5)
        # Horizontal gradient → 0: the only edge left is the top edge 1e-3 m
        # down, whose pull at ≥ 50 m is about f·1e-3/(π·50²) ≈ 1e-7 per m,
        # against ~f/z_t for a buried patch.
        grad = patch_sp_gradient(np.zeros(6), across, **kw)
        npt.assert_allclose(grad, 0.0, atol=1e-6)
    npt.assert_allclose((np.pi - np.radians(60)) / np.pi, 0.6667, atol=1e-4)


@settings(max_examples=60, deadline=None)
@given(
    dip=st.floats(5.0, 90.0),
    top=st.floats(10.0, 500.0),
    height=st.floats(10.0, 3000.0),
    length=st.floats(20.0, 5000.0),
    f=st.floats(-500.0, 500.0).filter(lambda v: abs(v) > 1e-3),
)
def test_peak_to_peak_never_exceeds_jump(dip, top, height, length, f):
    # Physics §1 item 4 ([V], equal σ): |V| ≤ f(π − δ)/π on the
    # hanging-wall side and ≤ fδ/π on the other, so peak-to-peak ≤ |f|.
    d = np.radians(dip)
    grid = np.linspace(-3, 3, 61) * (top + height)
    along, across = np.meshgrid(grid + 0.0, grid)
    sp = patch_sp_local(along, across, centre_m=0.0, length_m=length, depth_top_m=top,
                        depth_bottom_m=top + height, dip_deg=dip, jump_mv=f)
    slack = 1e-9 * abs(f)
    assert sp.max() - sp.min() <= abs(f) + slack
    hanging = across > 0
    assert np.all(np.abs(sp[hanging]) <= abs(f) * (np.pi - d) / np.pi + slack)
    assert np.all(np.abs(sp[~hanging]) <= abs(f) * d / np.pi + slack)


def test_depth_offset_is_depth_below_each_station():
    # Terrain treatment (physics §2.5): depths below each station's own
    # ground. A station 40 m above the patch's reference ground sees the
    # same patch 40 m deeper; checked against the plain kernel.
    along = np.array([0.0, 200.0, 400.0])
    across = np.array([150.0, -100.0, 600.0])
    offsets = np.array([40.0, -25.0, 0.0])
    sp = patch_sp_local(along, across, dip_deg=70, depth_offset_m=offsets, **ROW6)
    for i in range(3):
        single = _kernels.patch_potential(along[i], across[i], 0.0, 100.0, 800.0,
                                          150.0 + offsets[i], 600.0 + offsets[i],
                                          np.radians(70), 1.0)
        npt.assert_allclose(sp[i], single, rtol=1e-13)
    # World form: elevations with ground_m give the same offsets; a NaN
    # elevation falls back to the flat datum.
    e, n = world_stations(0.0, along, across)
    top_e, top_n = world_stations(0.0, 100.0, 150.0 / np.tan(np.radians(70)))
    kw = dict(top_x=top_e, top_y=top_n, strike_deg=0.0, dip_deg=70.0, top_depth_m=150.0,
              bottom_depth_m=600.0, length_m=800.0, jump_mv=1.0)
    with_ground = fault_patch_sp((e, n, 500.0 + offsets), ground_m=500.0, **kw)
    npt.assert_allclose(with_ground, sp, rtol=1e-12)
    flat = fault_patch_sp((e, n, np.array([np.nan, 0, 0])), ground_m=0.0, **kw)
    npt.assert_allclose(flat[0], fault_patch_sp((e, n), **kw)[0], rtol=1e-13)


@pytest.mark.skipif(not _fast.AVAILABLE, reason="numba not installed")
def test_compiled_kernel_matches_numpy_reference():
    # The numba kernel restates the numpy closed form; they must agree to
    # round-off (1e-12 of f), including per-station depths, contrast and
    # in-plane stations.
    rng = np.random.default_rng(11)
    along = rng.uniform(-3000, 3000, 2000)
    across = rng.uniform(-3000, 3000, 2000)
    across[:20] = 0.0
    offsets = rng.uniform(-50, 50, 2000)
    for dip, ratio, offset in ((90.0, 1.0, 0.0), (35.0, 3.0, offsets), (120.0, 0.2, offsets)):
        compiled = patch_sp_local(along, across, dip_deg=dip, jump_mv=7.0, sigma_ratio=ratio,
                                  depth_offset_m=offset, **ROW6)
        reference = forward._patch_sp_local_numpy(
            along, across, 100.0, 800.0, 150.0 + np.asarray(offset), 600.0 + np.asarray(offset),
            dip, 7.0, ratio)
        npt.assert_allclose(compiled, reference, rtol=0, atol=1e-12 * 7.0)


def test_numpy_fallback_gives_same_shape_and_values(monkeypatch):
    # Without numba the numpy kernel is used; results agree to round-off
    # and keep the broadcast shape of the inputs.
    along, across = np.meshgrid(np.linspace(-500, 500, 7), np.linspace(-800, 800, 5))
    fast = patch_sp_local(along, across, dip_deg=60, **ROW6)
    monkeypatch.setattr(_fast, "AVAILABLE", False)
    slow = patch_sp_local(along, across, dip_deg=60, **ROW6)
    assert slow.shape == fast.shape == (5, 7)
    npt.assert_allclose(slow, fast, rtol=0, atol=1e-13)
    scalar = patch_sp_local(100.0, 300.0, dip_deg=60, **ROW6)
    assert np.shape(scalar) == ()


def make_sources():
    return [
        dict(source_id="A", model="fault_patch", top_x=100.0, top_y=-200.0, strike_deg=30.0,
             dip_deg=60.0, top_depth_m=150.0, bottom_depth_m=600.0, length_m=800.0,
             jump_mv=80.0, sigma_ratio=2.0),
        dict(source_id="B", model="fault_patch", top_x=-900.0, top_y=500.0, strike_deg=300.0,
             dip_deg=90.0, top_depth_m=80.0, bottom_depth_m=900.0, length_m=1500.0,
             jump_mv=-40.0, ground_m=120.0),
        dict(source_id="C", model="pole_pair", top_x=400.0, top_y=400.0, top_depth_m=20.0,
             neg_x=450.0, neg_y=300.0, neg_depth_m=35.0, pole_k_mv_m=500.0),
    ]


def test_sources_sp_sums_rows_and_chunks_identically():
    # Superposition of potentials (linear Laplace problem); chunking only
    # changes the loop order over stations, so results are bit-identical.
    rng = np.random.default_rng(5)
    e = rng.uniform(-2000, 2000, 1001)
    n = rng.uniform(-2000, 2000, 1001)
    up = 120.0 + rng.uniform(-30, 30, 1001)
    rows = make_sources()
    a, b, c = rows
    skip = ("source_id", "model")
    expected = (
        fault_patch_sp((e, n, up), **{k: v for k, v in a.items() if k not in skip})
        + fault_patch_sp((e, n, up), **{k: v for k, v in b.items() if k not in skip})
        + pole_pair_sp((e, n, up), pos_x=400.0, pos_y=400.0, pos_depth_m=20.0, neg_x=450.0,
                       neg_y=300.0, neg_depth_m=35.0, k_mv_m=500.0)
    )
    whole = sources_sp((e, n, up), rows)
    npt.assert_allclose(whole, expected, rtol=1e-13, atol=1e-13)
    chunked = sources_sp((e, n, up), rows, chunk_size=7)
    npt.assert_array_equal(chunked, whole)
    # A DataFrame (NaN where a field does not apply) gives the same answer.
    frame = pd.DataFrame(rows)
    npt.assert_array_equal(sources_sp((e, n, up), frame, chunk_size=100), whole)
    # A row without a model is a fault patch; extra layer fields are ignored.
    bare = {k: v for k, v in a.items() if k != "model"}
    bare.update(fault_id="F1", flags="", top_depth_lo_m=np.nan)
    npt.assert_array_equal(sources_sp((e, n, up), [bare]), sources_sp((e, n, up), [a]))
    # Shape of the station arrays is kept.
    grid = sources_sp((e[:1000].reshape(20, 50), n[:1000].reshape(20, 50)), rows)
    assert grid.shape == (20, 50)


def test_sources_sp_reports_every_bad_row():
    rows = make_sources()
    rows[0]["dip_deg"] = 120.0
    rows[2]["neg_x"] = None
    rows.append(dict(source_id="D", model="sphere", top_x=0.0))
    with pytest.raises(InputError) as info:
        sources_sp((np.zeros(3), np.zeros(3)), rows)
    text = str(info.value)
    assert "row 0 (source_id A)" in text and "dip_deg" in text
    assert "row 2 (source_id C)" in text and "neg_x" in text
    assert "row 3" in text and "'sphere'" in text
