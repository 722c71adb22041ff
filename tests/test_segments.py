"""Tests of fault network cleaning and segmentation (geosp.segments)."""

import numpy as np
import numpy.testing as npt
import pytest
import shapely

from geosp.errors import OptionError
from geosp.models import Fault, Stations
from geosp.segments import assign_stations, make_segments


def _fault(fault_id, coords, **kw):
    return Fault(fault_id, np.asarray(coords, dtype=float), **kw)


def _by_id(segments):
    return {s.segment_id: s for s in segments}


def test_bent_fault_splits_at_bend_with_chord_strikes():
    # Hand-worked geometry: north for 1000 m, then north-east for 1000 m.
    # Strike of each chord: atan2(dE, dN) = 0° and 45°; turn 45° > 20°.
    c = 1000 / np.sqrt(2)
    segs = make_segments((_fault("A", [[0, 0], [0, 1000], [c, 1000 + c]]),))
    assert [s.segment_id for s in segs] == ["A-01", "A-02"]
    npt.assert_allclose([s.strike_deg for s in segs], [0.0, 45.0], atol=1e-9)
    npt.assert_allclose([s.length_m for s in segs], [1000.0, 1000.0], rtol=1e-12)
    npt.assert_allclose(segs[0].coords[-1], [0, 1000])
    npt.assert_allclose(segs[1].coords[0], [0, 1000])
    # A bend is not a junction (degree 2).
    assert segs[0].junction_ends == () and segs[1].junction_ends == ()


def test_gentle_bend_below_threshold_is_kept():
    # Turn of 10° < bend_deg = 20°: one segment whose strike is the chord
    # bearing, atan2(sin 10°, 1 + cos 10°) = 5° (isosceles, hand-worked).
    b = np.radians(10.0)
    segs = make_segments((_fault("A", [[0, 0], [0, 1000], [1000 * np.sin(b), 1000 + 1000 * np.cos(b)]]),))
    assert len(segs) == 1
    npt.assert_allclose(segs[0].strike_deg, 5.0, atol=1e-9)


def test_crossing_faults_are_noded_into_junctions():
    # Two faults crossing at the origin: four segments, each with one end on
    # the degree-4 node at (0, 0).
    segs = _by_id(make_segments((
        _fault("A", [[-600, 0], [600, 0]]),
        _fault("B", [[0, -600], [0, 600]]),
    )))
    assert sorted(segs) == ["A-01", "A-02", "B-01", "B-02"]
    for sid, end in (("A-01", 1), ("A-02", 0), ("B-01", 1), ("B-02", 0)):
        assert segs[sid].junction_ends == (end,)
        npt.assert_allclose(segs[sid].coords[end], [0, 0], atol=1e-9)
    npt.assert_allclose([segs[k].length_m for k in sorted(segs)], 600.0, rtol=1e-12)


def test_undershooting_end_is_snapped_onto_the_other_trace():
    # B stops 6 m short of A (within snap_m = 10 m): its end moves onto A,
    # A is split there, and the node (degree 3) is a junction of all three.
    segs = _by_id(make_segments((
        _fault("A", [[-600, 0], [600, 0]]),
        _fault("B", [[100, 800], [100, 6]]),
    ), snap_m=10.0))
    assert sorted(segs) == ["A-01", "A-02", "B-01"]
    npt.assert_allclose(segs["B-01"].coords[-1], [100, 0], atol=1e-9)
    assert segs["B-01"].junction_ends == (1,)
    assert segs["A-01"].junction_ends == (1,) and segs["A-02"].junction_ends == (0,)
    npt.assert_allclose(segs["A-01"].length_m, 700.0)


def test_end_beyond_snap_distance_is_left_alone():
    segs = _by_id(make_segments((
        _fault("A", [[-600, 0], [600, 0]]),
        _fault("B", [[100, 800], [100, 30]]),
    ), snap_m=10.0))
    assert sorted(segs) == ["A-01", "B-01"]
    assert all(s.junction_ends == () for s in segs.values())


def test_short_sliver_is_merged_into_a_neighbour():
    # With no simplification the jog (0,1000)-(40,1040) (56.6 m, turns of 45°)
    # would be its own piece; it is shorter than 3 station spacings (75 m)
    # and must be merged, keeping the trace's total length (hand-worked:
    # 1000 + 40·√2 + 960 m of path).
    coords = [[0, 0], [0, 1000], [40, 1040], [40, 2000]]
    segs = make_segments((_fault("A", coords),), simplify_m=1.0, station_spacing_m=25.0)
    assert len(segs) == 2
    path = sum(shapely.length(shapely.LineString(s.coords)) for s in segs)
    npt.assert_allclose(path, 1000 + 40 * np.sqrt(2) + 960, rtol=1e-12)
    assert min(s.length_m for s in segs) > 75.0
    # Without merging (min_length_m = 0) the jog stays a segment of its own.
    assert len(make_segments((_fault("A", coords),), simplify_m=1.0, min_length_m=0.0)) == 3


def test_simplification_removes_small_wiggles():
    # Vertices 5 m off a straight trace vanish with a 25 m Douglas-Peucker
    # tolerance [DouglasPeucker1973]: one straight segment results.
    y = np.linspace(0, 2000, 41)
    x = 5.0 * (-1.0) ** np.arange(41)
    x[[0, -1]] = 0.0
    segs = make_segments((_fault("A", np.column_stack([x, y])),), station_spacing_m=25.0)
    assert len(segs) == 1 and len(segs[0].coords) == 2


def test_long_fault_splits_at_max_length_into_equal_parts():
    # 6000 m with max_length_m = 2500: ceil(6000/2500) = 3 parts of 2000 m.
    segs = make_segments((_fault("A", [[0, 0], [0, 6000]]),), max_length_m=2500.0)
    assert [s.segment_id for s in segs] == ["A-01", "A-02", "A-03"]
    npt.assert_allclose([s.length_m for s in segs], 2000.0, rtol=1e-12)
    npt.assert_allclose([s.coords[0][1] for s in segs], [0, 2000, 4000])


def test_mapped_dip_direction_orients_strike_right_handed():
    # Digitised southward (chord bearing 180°) with dip direction 95°:
    # right-hand rule needs strike + 90 within 90° of 95°, so the strike
    # becomes 0° and the trace is reversed (contract sign convention).
    segs = make_segments((_fault("A", [[0, 1000], [0, 0]], dip_deg=70.0, dip_dir_deg=95.0),))
    seg = segs[0]
    assert seg.dip_known and seg.dip_deg == 70.0
    npt.assert_allclose(seg.strike_deg, 0.0, atol=1e-9)
    turn = abs((seg.strike_deg + 90.0 - 95.0 + 180.0) % 360.0 - 180.0)
    assert turn <= 90.0
    npt.assert_allclose(seg.coords[0], [0, 0])
    # A point east of the trace (the dip-direction side) has t > 0.
    _, t = seg.to_local(300.0, 500.0)
    assert t > 0


def test_dip_direction_already_right_handed_keeps_digitised_order():
    segs = make_segments((_fault("A", [[0, 0], [1000, 0]], dip_deg=60.0, dip_dir_deg=170.0),))
    npt.assert_allclose(segs[0].strike_deg, 90.0, atol=1e-9)
    npt.assert_allclose(segs[0].coords[0], [0, 0])


def test_unknown_dip_keeps_digitised_direction_and_nan_dip():
    segs = make_segments((_fault("A", [[0, 1000], [0, 0]], dip_deg=70.0),))
    assert not segs[0].dip_known and np.isnan(segs[0].dip_deg)
    npt.assert_allclose(segs[0].strike_deg, 180.0, atol=1e-9)


def test_segment_ids_follow_digitised_order():
    # Numbering starts at the first digitised vertex even when the strike is
    # reversed by the mapped dip direction.
    segs = make_segments((_fault("F7", [[0, 6000], [0, 0]], dip_deg=80.0, dip_dir_deg=90.0),),
                         max_length_m=2500.0)
    assert [s.segment_id for s in segs] == ["F7-01", "F7-02", "F7-03"]
    # F7-01 covers the northern third (digitised first).
    assert min(s[1] for s in segs[0].coords) == pytest.approx(4000.0)


def test_bad_option_raises_option_error():
    with pytest.raises(OptionError, match="bend_deg"):
        make_segments((_fault("A", [[0, 0], [0, 100]]),), bend_deg=-5)
    with pytest.raises(OptionError, match="simplify_m"):
        make_segments((_fault("A", [[0, 0], [0, 100]]),), simplify_m="coarse")


def test_snap_zero_leaves_near_miss_unjoined():
    # snap_m = 0 turns snapping off: B stops 6 m short of A and stays apart.
    segs = make_segments((_fault("A", [[-600, 0], [600, 0]]), _fault("B", [[100, 800], [100, 6]])),
                         snap_m=0.0)
    assert sorted(s.segment_id for s in segs) == ["A-01", "B-01"]


def test_assign_stations_matches_brute_force_distances():
    # Reference: shapely point-to-line distances (independent of the local
    # frame), corridor membership from projections worked by hand.
    rng = np.random.default_rng(3)
    segs = make_segments((
        _fault("A", [[-1500, 0], [1500, 0]]),
        _fault("B", [[0, 300], [1200, 1500]]),
    ), max_length_m=5000.0)
    e = rng.uniform(-2500, 2500, 3000)
    n = rng.uniform(-1500, 2500, 3000)
    stations = Stations(np.arange(e.size).astype(str), e, n, np.zeros_like(e), np.zeros_like(e), "EPSG:32633")
    corridor = 400.0
    owned = assign_stations(stations, segs, corridor_m=corridor)
    points = shapely.points(e, n)
    dist = np.column_stack([shapely.distance(points, shapely.LineString(s.coords)) for s in segs])
    inside = np.zeros_like(dist, dtype=bool)
    for j, s in enumerate(segs):
        a, b = np.asarray(s.coords[0]), np.asarray(s.coords[-1])
        u = (b - a) / np.linalg.norm(b - a)
        along = (e - a[0]) * u[0] + (n - a[1]) * u[1]
        across = -(e - a[0]) * u[1] + (n - a[1]) * u[0]
        inside[:, j] = (np.abs(across) <= corridor) & (along >= -corridor) & (along <= s.length_m + corridor)
    expected_owner = np.where(inside.any(axis=1), np.argmin(np.where(inside, dist, np.inf), axis=1), -1)
    for j in range(len(segs)):
        npt.assert_array_equal(owned[j], np.flatnonzero(expected_owner == j))
    # Every station is owned at most once.
    flat = np.concatenate(owned)
    assert flat.size == np.unique(flat).size
