"""
The survey model on synthetic surveys: selection, joint fits, terrain, sign
conventions of the published rows, and the false-alarm rate of the null.

The data are built with geosp's closed-form patch (itself checked against
independent quadrature in tests/physics) plus a regional plane, a terrain
term and noise of known statistics, so every planted quantity is known.
"""

import math

import numpy as np
import numpy.testing as npt
import pytest
from scipy import stats

from geosp.interpret import detect_sources, interpret_survey
from geosp.interpret.linear import NUISANCE_NAMES, nuisance_columns
from geosp.models import Fault
from geosp.physics.forward import sources_sp

from interpret_synthetic import E0, N0, build_survey, patch

FAST = dict(n_null=400, n_starts=16)


def _fault_rows(result):
    return [r for r in result.fits.sources if r["model"] == "fault_patch"]


@pytest.mark.slow
def test_two_interacting_sources_the_terrain_and_the_regional_are_recovered():
    # Two patches on parallel faults 700 m apart (their anomalies overlap),
    # k = −1.2 mV/m over 240 m of relief, a regional plane; white noise 2 mV.
    faults = [Fault("FA", np.array([[E0 + 1100.0, N0 - 500.0], [E0 + 1100.0, N0 + 2500.0]])),
              Fault("FB", np.array([[E0 + 1800.0, N0 - 500.0], [E0 + 1800.0, N0 + 2500.0]]))]
    planted = [patch(E0 + 1100.0, N0 + 900.0, top_depth_m=120.0, bottom_depth_m=500.0, jump_mv=160.0),
               patch(E0 + 1800.0, N0 + 1000.0, top_depth_m=200.0, bottom_depth_m=700.0, jump_mv=-140.0)]
    stations, segments, truth = build_survey(sources=planted, faults=faults, k=-1.2, white=2.0, seed=3)
    result = interpret_survey(stations, segments, **FAST)
    rows = _fault_rows(result)
    assert sorted(r["fault_id"] for r in rows) == ["FA", "FB"]
    for row in rows:
        true = planted[0] if row["fault_id"] == "FA" else planted[1]
        shift = true["ground_m"] - row["ground_m"]  # compare as elevations
        assert row["top_depth_m"] + shift == pytest.approx(true["top_depth_m"], rel=0.25)
        geo = math.sqrt((row["top_depth_m"] + shift) * (row["bottom_depth_m"] + shift))
        assert geo == pytest.approx(math.sqrt(true["top_depth_m"] * true["bottom_depth_m"]), rel=0.2)
        # the jump in the planted dip-direction's sense (a vertical patch may be
        # published from either side: strike + 180 and the jump negated)
        same_side = abs((row["dip_dir_deg"] - (true["strike_deg"] + 90.0) + 180.0) % 360.0 - 180.0) < 90.0
        assert np.sign(row["jump_mv"]) * (1 if same_side else -1) == np.sign(true["jump_mv"])
    # The terrain coefficient within 3 of its reported sd (and the sd is sane).
    k, k_sd = result.terrain["slope_mv_per_m"], result.terrain["sd_mv_per_m"]
    assert 0 < k_sd < 0.2
    assert abs(k - truth["k"]) < 3 * k_sd


def _uneven(x, y):
    """Station weights: a quarter of the stations (a block) four times noisier (weight 1/16)."""
    return np.where((x > E0 + 2000.0) & (y > N0 + 600.0), 1.0 / 16.0, 1.0)


@pytest.mark.slow
def test_linear_part_is_dense_generalised_least_squares():
    # Reference: with the geometry fixed at the selection's, the strengths,
    # regional and terrain coefficient are (XᵀC⁻¹X)⁻¹XᵀC⁻¹d with C⁻¹ from
    # numpy.linalg.inv of the noise model's covariance, station weights
    # included (uneven here, so a whitener ignoring them would differ).
    planted = [patch(E0 + 1500.0, N0 + 900.0, jump_mv=120.0)]
    stations, segments, _ = build_survey(sources=planted, white=2.5, correlated=1.5, length=250.0,
                                         seed=8, n_lines=9, line_spacing=200.0, weights=_uneven)
    calls = []
    selection, _ = detect_sources(stations, segments, progress=lambda *a: calls.append(a), **FAST)
    assert selection.sources
    # Progress milestones: numbered steps with a note, the total known (and reached) only at the end.
    assert [c[0] for c in calls] == list(range(1, len(calls) + 1))
    assert all(c[1] is None for c in calls[:-1]) and calls[-1][1] == calls[-1][0]
    assert calls[-1][2] == f"{len(selection.sources)} sources"
    i = selection.valid_index
    x, y, e = stations.easting[i], stations.northing[i], stations.upward[i]
    design = np.column_stack([nuisance_columns(x, y, e, selection.frame)] + [s.column for s in selection.sources])
    data = stations.sp_mv[i] + stations.terrain_mv[i]
    inv = np.linalg.inv(selection.noise.covariance(x, y, stations.weight[i]))
    expected = np.linalg.solve(design.T @ inv @ design, design.T @ inv @ data)
    npt.assert_allclose(selection.coef, expected, rtol=1e-6, atol=1e-8)


@pytest.mark.slow
def test_detection_scores_use_the_station_weights():
    # Reference: the matched-filter score of every template of a window,
    # z = gᵀC⁻¹Πd / √(gᵀC⁻¹Πg) with the nuisance projected out, computed
    # densely with the noise model's covariance and the uneven weights.
    from geosp.interpret import candidates

    stations, segments, _ = build_survey(sources=(), white=2.0, seed=2, weights=_uneven,
                                         n_lines=9, line_spacing=200.0)
    selection, _ = detect_sources(stations, segments, n_null=200, n_starts=4, false_alarm_rate=1e-6)
    assert not selection.sources
    i = selection.valid_index
    x, y, e = stations.easting[i], stations.northing[i], stations.upward[i]
    b = nuisance_columns(x, y, e, selection.frame)
    inv = np.linalg.inv(selection.noise.covariance(x, y, stations.weight[i]))
    d = stations.sp_mv[i] + stations.terrain_mv[i]
    proj = np.eye(x.size) - b @ np.linalg.solve(b.T @ inv @ b, b.T @ inv)  # Π, GLS nuisance projector
    for j in (0, len(selection.windows) // 2):
        window = selection.windows[j]
        along, across = window.frame.to_local(x, y)
        # the templates' datum: stations within two spacings (60 m) of the window trace
        near = (np.abs(across) <= 60.0) & (along >= 0) & (along <= window.frame.length_m)
        ground = float(np.median(e[near])) if near.any() else float(np.median(e))
        family = candidates.templates_for(window, (50.0, 100.0, 200.0, 400.0, 800.0), (3.0,), (0.25, 4.0))
        g = candidates.template_columns(window, family, x, y, e - ground)
        pg = proj @ g
        z = (pg.T @ inv @ (proj @ d)) / np.sqrt(np.einsum("ij,ik,kj->j", pg, inv, pg))
        assert selection.window_scores[j] == pytest.approx(np.max(np.abs(z)), rel=1e-5)


@pytest.mark.slow
def test_one_anomaly_across_a_segment_cut_is_one_source():
    # A straight 5 km fault is cut into two segments (max 2500 m); the patch
    # straddles the cut.
    fault = Fault("FC", np.array([[E0 + 1500.0, N0 - 1500.0], [E0 + 1500.0, N0 + 3500.0]]))
    planted = [patch(E0 + 1500.0, N0 + 1000.0, length_m=1400.0, jump_mv=150.0)]
    stations, segments, _ = build_survey(sources=planted, faults=[fault], white=2.0, seed=5)
    assert len(segments) == 2
    rows = _fault_rows(interpret_survey(stations, segments, **FAST))
    assert len(rows) == 1
    assert rows[0]["length_m"] == pytest.approx(1400.0, rel=0.35)


def _pipeline(x, y, elev):
    """A pipeline crossing the fault at 11° toward 11°: point poles 2 m deep every 25 m [Telford1990]."""
    from geosp.physics.forward import point_pole_sp

    s = np.arange(-1600.0, 1600.0, 25.0)
    unit = np.array([600.0, 3000.0]) / math.hypot(600.0, 3000.0)
    total = np.zeros(x.size)
    for a in s:
        total += point_pole_sp((x, y), x=E0 + 1500.0 + a * unit[0], y=N0 + 1000.0 + a * unit[1], depth_m=2.0,
                               k_mv_m=-75.0)
    return total


@pytest.mark.slow
def test_a_pipeline_across_a_fault_is_taken_by_a_buried_line_not_a_fault_patch():
    # No fault source at all: a leaking pipeline (a row of shallow poles, not geosp's line
    # formula) crosses the fault. It must not come out as a fault patch; a buried line
    # along the pipe takes the anomaly.
    stations, segments, _ = build_survey(white=3.0, seed=21, extra=_pipeline)
    result = interpret_survey(stations, segments, **FAST)
    assert _fault_rows(result) == []
    lines = [r for r in result.fits.sources if r["model"] == "buried_line"]
    assert lines and all(r["status"] == "cultural" for r in lines)
    azimuth = math.degrees(math.atan2(600.0, 3000.0))
    assert abs((lines[0]["strike_deg"] - azimuth + 90.0) % 180.0 - 90.0) < 10.0
    assert lines[0]["line_k_mv"] < 0


@pytest.mark.slow
def test_deep_vertical_patch_with_a_contrast_is_not_put_shallow():
    # The wrong-basin case: a vertical patch 500 m deep with a conductivity
    # contrast of 4 (one lobe four times the other).
    planted = [patch(E0 + 1500.0, N0 + 1000.0, top_depth_m=500.0, bottom_depth_m=1500.0, jump_mv=250.0,
                     length_m=2000.0, sigma_ratio=4.0)]
    stations, segments, _ = build_survey(sources=planted, white=2.0, seed=11, extent=4000.0,
                                         line_spacing=200.0, n_lines=16)
    rows = _fault_rows(interpret_survey(stations, segments, **FAST))
    assert len(rows) == 1
    row = rows[0]
    shift = planted[0]["ground_m"] - row["ground_m"]
    assert row["top_depth_m"] + shift == pytest.approx(500.0, rel=0.35)
    assert row["top_depth_lo_m"] + shift < 500.0 < row["top_depth_hi_m"] + shift or row["status"] == "uncertain"


@pytest.mark.slow
@pytest.mark.parametrize("digitised_against_dip", [False, True])
@pytest.mark.parametrize("mapped", [False, True])
@pytest.mark.parametrize("ratio", [1.0, 4.0])
def test_published_rows_reproduce_the_fitted_field(digitised_against_dip, mapped, ratio):
    # The published row, run through the public forward model, must give the
    # model's own field at every station (the sign rules: strike + 180, dip
    # 180 − δ′, jump negated and σ ratio inverted for a plane leaning toward
    # −t), whatever the digitising direction, mapped dip and contrast.
    dip = 75.0 if ratio == 1.0 else 85.0  # contrasts on near-vertical faults (where the factor holds)
    coords = np.array([[E0 + 1500.0, N0 - 500.0], [E0 + 1500.0, N0 + 2500.0]])
    if digitised_against_dip:
        coords = coords[::-1]
    fault = Fault("FD", coords, dip_deg=dip if mapped else np.nan, dip_dir_deg=270.0 if mapped else np.nan)
    planted = [patch(E0 + 1500.0 - 150.0 / math.tan(math.radians(dip)), N0 + 1000.0, strike_deg=180.0,
                     dip_deg=dip, jump_mv=150.0, sigma_ratio=ratio)]
    stations, segments, _ = build_survey(sources=planted, faults=[fault], white=1.5, seed=4)
    result = interpret_survey(stations, segments, **FAST)
    rows = _fault_rows(result)
    assert len(rows) == 1
    row = rows[0]
    sel = result.selection
    (i, source), = [(i, s) for i, s in enumerate(sel.sources) if s.kind == "fault"]
    strength = sel.coef[len(NUISANCE_NAMES) + i]
    v = sel.valid_index
    coords3 = (stations.easting[v], stations.northing[v], stations.upward[v])
    npt.assert_allclose(sources_sp(coords3, [row]), strength * source.column, rtol=1e-6,
                        atol=1e-6 * np.abs(source.column).max() * abs(strength))
    # and the published geometry is the planted one (dip direction 270, jump > 0)
    assert abs((row["dip_dir_deg"] - 270.0 + 180.0) % 360.0 - 180.0) < 30.0
    assert row["jump_mv"] > 0
    if ratio != 1.0:
        assert row["sigma_ratio"] > 1.5


@pytest.mark.slow
def test_false_alarm_rate_of_source_free_surveys():
    # Source-free surveys (white + correlated noise, regional, terrain) with
    # the rate set to 0.2: a survey reports a fault source with probability
    # 0.2 if the null is calibrated. Binomial test (two-sided, 1 %): with 30
    # surveys the count must lie in the central 99 % of Binomial(30, 0.2).
    alarms = 0
    n = 30
    for seed in range(n):
        stations, segments, _ = build_survey(sources=(), white=3.0, correlated=2.0, length=200.0,
                                             seed=100 + seed, n_lines=9, line_spacing=200.0,
                                             extent=2400.0)
        selection, _ = detect_sources(stations, segments, false_alarm_rate=0.2, cultural=False,
                                      n_null=400, n_starts=8)
        alarms += any(s.kind == "fault" for s in selection.sources)
    lo, hi = stats.binom.ppf([0.005, 0.995], n, 0.2)
    assert lo <= alarms <= hi, (alarms, lo, hi)
