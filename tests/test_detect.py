"""Tests of dipolar-anomaly detection along fault segments (geosp.detect) and its figure/table."""

import time
import warnings

import numpy as np
import numpy.testing as npt
import pytest
from scipy import stats

from geosp import detect
from geosp.detect import detect_dipoles
from geosp.errors import OptionError
from geosp.figures.detect import TABLE_COLUMNS, detection_figure, detection_table
from geosp.models import Fault, Stations
from geosp.segments import assign_points
from geosp.physics.forward import patch_sp_local, pole_pair_sp
from geosp.segments import make_segments

CRS = "EPSG:32633"


def _line_survey(half_width, station_spacing, line_spacing):
    """East-west lines ``line_spacing`` apart with stations every ``station_spacing`` (m)."""
    x = np.arange(-half_width, half_width + 1e-9, station_spacing)
    y = np.arange(-half_width, half_width + 1e-9, line_spacing)
    east, north = np.meshgrid(x, y)
    return east.ravel(), north.ravel()


def _stations(east, north, sp, **kw):
    return Stations(np.array([f"S{i}" for i in range(east.size)]), east, north,
                    np.zeros_like(east), sp, CRS, **kw)


def _regional(east, north):
    return 12.0 + 0.004 * east - 0.003 * north


# --------------------------------------------------------------------------- matched filter algebra


def test_projection_equals_dense_weighted_lstsq():
    # Reference: numpy.linalg.lstsq on W^1/2 [g, 1, s, t] (an independent
    # dense solve). By the Frisch-Waugh-Lovell theorem the coefficient of g
    # equals gᵀWΠd / gᵀWΠg and its standard error (for unit-variance
    # weights) is the square root of the (g, g) element of (AᵀWA)⁻¹.
    # Tolerance 1e-9: both are float64 solves of well-conditioned systems.
    rng = np.random.default_rng(11)
    sizes = [37, 120, 64]
    n = sum(sizes)
    along = rng.uniform(-800, 2300, n)
    across = rng.uniform(-900, 900, n)
    data = rng.normal(0, 10, n) + 0.01 * along
    weights = rng.uniform(0.2, 3.0, n)
    cols = detect._template_matrix(along, across, 1500.0,
                                   [(100.0, 400.0, 90.0, 1.0), (50.0, 200.0, 70.0, 4.0)])
    starts = np.cumsum([0] + sizes[:-1])
    gpg, gpd, dpd = detect._project(cols, along, across, data, weights, starts)
    for g, (a, b) in enumerate(zip(starts, np.append(starts[1:], n))):
        sw = np.sqrt(weights[a:b])
        for m in range(cols.shape[1]):
            design = np.column_stack([cols[a:b, m], np.ones(b - a), along[a:b], across[a:b]])
            coef, rss, *_ = np.linalg.lstsq(design * sw[:, None], data[a:b] * sw, rcond=None)
            npt.assert_allclose(gpd[g, m] / gpg[g, m], coef[0], rtol=1e-9)
            cov = np.linalg.inv((design * weights[a:b, None]).T @ design)
            npt.assert_allclose(1 / np.sqrt(gpg[g, m]), np.sqrt(cov[0, 0]), rtol=1e-9)
            # Residual sum of squares of the full model: dᵀWΠd − (gᵀWΠd)²/gᵀWΠg.
            npt.assert_allclose(dpd[g] - gpd[g, m] ** 2 / gpg[g, m], rss[0], rtol=1e-8)


# --------------------------------------------------------------------------- a planted patch


@pytest.fixture(scope="module")
def planted():
    """
    Lines 200 m apart, stations every 25 m, 5 mV white noise and a planar
    regional. F1 (dip 75° east, mapped) carries a patch L = 1500 m,
    z_t = 150 m, z_b = 600 m, jump −80 mV; F2, 3 km west, carries nothing.
    """
    rng = np.random.default_rng(2024)
    east, north = _line_survey(4500.0, 25.0, 200.0)
    faults = (
        Fault("F1", np.array([[0.0, -750.0], [0.0, 750.0]]), dip_deg=75.0, dip_dir_deg=90.0),
        Fault("F2", np.array([[-3000.0, -900.0], [-3000.0, 900.0]])),
    )
    segments = make_segments(faults, station_spacing_m=25.0)
    s, t = segments[0].to_local(east, north)
    sp = patch_sp_local(s, t, centre_m=750.0, length_m=1500.0, depth_top_m=150.0,
                        depth_bottom_m=600.0, dip_deg=75.0, jump_mv=-80.0)
    weight = rng.uniform(0.5, 1.0, east.size)
    noise = rng.normal(0.0, 5.0, east.size) / np.sqrt(weight)
    stations = _stations(east, north, sp + _regional(east, north) + noise, weight=weight)
    calls = []
    start = time.perf_counter()
    detections = detect_dipoles(stations, segments, progress=lambda i, n: calls.append((i, n)))
    return {"stations": stations, "segments": segments, "detections": detections,
            "calls": calls, "seconds": time.perf_counter() - start}


def test_planted_patch_is_detected_with_its_polarity(planted):
    d = planted["detections"][0]
    assert d.segment.segment_id == "F1-01"
    assert d.detected, d.note
    # A negative jump gives negative SP on the dip-direction side: polarity −1
    # (contract sign convention).
    assert d.polarity == -1
    assert d.best_template["jump_mv"] < 0
    assert not d.cultural, d.note
    # The broad patch anomaly is far better fitted by the template than by
    # any pole pair 50 m deep or less.
    assert d.best_template["pole_pair_delta_bic"] < 0
    assert d.score > d.threshold >= 4.0
    assert d.note.startswith(f"score {d.score:.1f} > threshold {d.threshold:.1f}")
    # The unit-weight noise estimate recovers the 5 mV planted (σ_i = 5/√w_i)
    # to within sampling error and template mismatch (common practice: 20 %).
    assert 4.0 < d.noise_mv < 6.0


def test_source_free_fault_is_not_detected(planted):
    d = planted["detections"][1]
    assert d.segment.segment_id == "F2-01"
    assert not d.detected, d.note
    assert d.score <= d.threshold
    assert "≤ threshold" in d.note


def test_public_amplitude_equals_weighted_lstsq_of_the_best_template(planted):
    # Reference: dense numpy lstsq with weights stations.weight (the noise
    # scale does not change the estimate when no reading errors are given).
    d = planted["detections"][0]
    st = planted["stations"].subset(d.station_index)
    s, t = d.segment.to_local(st.easting, st.northing)
    bt = d.best_template
    g = patch_sp_local(s, t, centre_m=d.segment.length_m / 2, length_m=d.segment.length_m,
                       depth_top_m=bt["depth_top_m"], depth_bottom_m=bt["depth_bottom_m"],
                       dip_deg=bt["dip_deg"], sigma_ratio=bt["sigma_ratio"])
    sw = np.sqrt(st.weight)
    design = np.column_stack([g, np.ones_like(s), s, t]) * sw[:, None]
    coef = np.linalg.lstsq(design, st.sp_mv * sw, rcond=None)[0]
    npt.assert_allclose(bt["jump_mv"], coef[0], rtol=1e-8)
    # The score is |â|/σ_â with σ_â from the residual scatter: check the
    # t statistic against the dense solve (N − 4 degrees of freedom).
    resid = st.sp_mv * sw - design @ coef
    s2 = resid @ resid / (s.size - 4)
    cov = s2 * np.linalg.inv(design.T @ design)
    npt.assert_allclose(d.score, abs(coef[0]) / np.sqrt(cov[0, 0]), rtol=1e-8)


def test_conductivity_contrast_template_matches_a_one_sided_anomaly():
    # A vertical patch with conductivity ratio 4 across the fault: the potential
    # is 2σ_other/(σ1+σ2) times the uniform one on each side (physics notes §2.3,
    # the forward kernel), so one lobe is 4 times the other. By matched-filter
    # theory the template of the same shape gives the largest score, so the
    # ratio-4 template must win, and must score above the uniform family alone.
    rng = np.random.default_rng(5)
    east, north = _line_survey(3000.0, 25.0, 200.0)
    faults = (Fault("F1", np.array([[0.0, -900.0], [0.0, 900.0]])),)
    segments = make_segments(faults, station_spacing_m=25.0)
    s, t = segments[0].to_local(east, north)
    sp = patch_sp_local(s, t, centre_m=900.0, length_m=1800.0, depth_top_m=100.0,
                        depth_bottom_m=400.0, dip_deg=90.0, jump_mv=-60.0, sigma_ratio=4.0)
    stations = _stations(east, north, sp + _regional(east, north) + rng.normal(0, 3.0, east.size))
    options = dict(template_top_depths_m=[50.0, 100.0, 200.0], n_decoys=40)
    (with_contrast,) = detect_dipoles(stations, segments, **options)
    (uniform,) = detect_dipoles(stations, segments, template_sigma_ratios=[1.0], **options)
    assert with_contrast.best_template["sigma_ratio"] == 4.0
    assert uniform.best_template["sigma_ratio"] == 1.0
    assert with_contrast.score > 1.2 * uniform.score, (with_contrast.score, uniform.score)


def _two_faults(jump_west, seed):
    """A strong patch (−400 mV) on F1 and a patch of ``jump_west`` mV on F2, 1.8 km west."""
    east, north = _line_survey(3000.0, 25.0, 200.0)
    faults = (Fault("F1", np.array([[0.0, -900.0], [0.0, 900.0]])),
              Fault("F2", np.array([[-1800.0, -900.0], [-1800.0, 900.0]])))
    segments = make_segments(faults, station_spacing_m=25.0)
    sp = np.zeros(east.size)
    for segment, jump in zip(segments, (-400.0, jump_west)):
        s, t = segment.to_local(east, north)
        sp += patch_sp_local(s, t, centre_m=900.0, length_m=1800.0, depth_top_m=100.0,
                             depth_bottom_m=400.0, dip_deg=90.0, jump_mv=jump)
    rng = np.random.default_rng(seed)
    noise = rng.normal(0.0, 5.0, east.size)
    return _stations(east, north, sp + _regional(east, north) + noise), segments


def test_detected_anomalies_are_removed_before_scoring_the_rest(monkeypatch):
    # In a small survey many decoys catch the strong F1 anomaly and inflate the
    # threshold of F2. Once F1 is detected its template field is removed and F2
    # is scored again: the threshold falls back to what the noise supports
    # and the −40 mV patch on F2 is found. Without that step it is missed.
    stations, segments = _two_faults(-40.0, seed=1)
    options = dict(template_top_depths_m=[50.0, 100.0, 200.0], seed=1)
    strong, weak = detect_dipoles(stations, segments, **options)
    assert strong.detected and weak.detected, weak.note
    assert "with the anomalies of F1-01 removed" in weak.note
    monkeypatch.setattr(detect, "_DEFLATION_ROUNDS", 0)
    _, plain = detect_dipoles(stations, segments, **options)
    assert not plain.detected, plain.note
    assert weak.threshold < 0.5 * plain.threshold


@pytest.mark.slow
def test_source_free_fault_beside_a_strong_anomaly_keeps_its_false_alarm_rate():
    # 40 noise realizations, F2 without a source, scored after F1's anomaly is
    # removed: at the 1 % false-alarm rate, 3 or more detections out of 40 have
    # binomial probability below 1 % (scipy.stats.binom).
    hits = 0
    for run in range(40):
        stations, segments = _two_faults(0.0, seed=100 + run)
        _, free = detect_dipoles(stations, segments, template_top_depths_m=[50.0, 100.0, 200.0],
                                 seed=run)
        hits += bool(free.detected)
    assert stats.binom.sf(hits - 1, 40, 0.01) > 0.01, hits


def test_wide_corridor_in_a_small_survey_is_warned_about():
    # A 4 km survey and templates to 400 m (a 1200 m corridor): the decoys cannot
    # all keep away from the mapped fault, so the user is told to use shallower
    # templates. With 50-100 m templates the decoys fit and nothing is said.
    east, north = _line_survey(2000.0, 25.0, 150.0)
    faults = (Fault("F1", np.array([[0.0, -600.0], [0.0, 600.0]])),)
    segments = make_segments(faults, station_spacing_m=25.0)
    noise = np.random.default_rng(0).normal(0.0, 5.0, east.size)
    stations = _stations(east, north, _regional(east, north) + noise)
    with pytest.warns(UserWarning, match="set \\[detect\\] template_top_depths_m to shallower"):
        (wide,) = detect_dipoles(stations, segments, template_top_depths_m=[100.0, 400.0],
                                 n_decoys=60, seed=1)
    assert "some decoys near mapped faults" in wide.note
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        detect_dipoles(stations, segments, template_top_depths_m=[50.0, 100.0], n_decoys=60, seed=1)


def test_stations_belong_to_their_nearest_segment(planted):
    a, b = planted["detections"]
    assert np.intersect1d(a.station_index, b.station_index).size == 0
    st = planted["stations"]
    # F1 lies at x = 0 and F2 at x = -3000: owned stations are on the right side of x = -1500.
    assert np.all(st.easting[a.station_index] > -1500)
    assert np.all(st.easting[b.station_index] < -1500)


def test_progress_is_reported_per_segment(planted):
    assert planted["calls"] == [(1, 2), (2, 2)]


def test_detection_table_and_figure(planted):
    table = detection_table(planted["detections"])
    assert tuple(table.columns) == TABLE_COLUMNS
    assert list(table.segment_id) == ["F1-01", "F2-01"]  # sorted by score
    assert table.detected.tolist() == [True, False]
    figure = detection_figure(planted["detections"], planted["stations"])
    ax = figure.axes[0]
    widths = sorted(line.get_linewidth() for line in ax.lines)
    assert widths == [1.2, 3.5]  # detected segment drawn bold
    assert len(figure.axes) == 2  # map and colour bar
    import matplotlib.pyplot as plt

    plt.close(figure)


# --------------------------------------------------------------------------- rivals and junctions


def test_shallow_pole_pair_next_to_fault_is_flagged_cultural():
    # A pipeline crossing the fault under cathodic protection: poles 20 m
    # deep, 100 m apart, 50 m either side of the trace, on a survey line;
    # V = k(1/r+ − 1/r−) [Telford1990], k = 2 V·m (peak about 100 mV).
    # (A pair 150 m or more off the trace barely correlates with the
    # 1200 m templates and is not detected at all.)
    rng = np.random.default_rng(5)
    east, north = _line_survey(3000.0, 25.0, 100.0)
    segments = make_segments((Fault("P", np.array([[0.0, -600.0], [0.0, 600.0]])),),
                             station_spacing_m=25.0)
    sp = pole_pair_sp((east, north), pos_x=-50.0, pos_y=0.0, pos_depth_m=20.0,
                      neg_x=50.0, neg_y=0.0, neg_depth_m=20.0, k_mv_m=2000.0)
    stations = _stations(east, north, sp + _regional(east, north) + rng.normal(0, 3.0, east.size))
    (d,) = detect_dipoles(stations, segments, template_top_depths_m=[50, 100, 200],
                          n_decoys=100)
    assert d.detected, d.note
    assert d.cultural, d.note
    assert "pole pair" in d.note
    assert d.best_template["pole_pair_delta_bic"] > 6.0


def test_shared_anomaly_keeps_the_higher_score():
    # Two parallel faults 100 m apart over one patch: their corridors share
    # almost all stations, so only the higher score stays detected.
    rng = np.random.default_rng(8)
    east, north = _line_survey(3000.0, 25.0, 100.0)
    faults = (Fault("A", np.array([[0.0, -500.0], [0.0, 500.0]])),
              Fault("B", np.array([[100.0, -500.0], [100.0, 500.0]])))
    segments = make_segments(faults, station_spacing_m=25.0)
    s, t = segments[0].to_local(east, north)
    sp = patch_sp_local(s, t, centre_m=500.0, length_m=1000.0, depth_top_m=60.0,
                        depth_bottom_m=240.0, dip_deg=90.0, jump_mv=120.0)
    stations = _stations(east, north, sp + rng.normal(0, 3.0, east.size))
    a, b = detect_dipoles(stations, segments, template_top_depths_m=[50, 100, 200], n_decoys=100)
    assert a.score > b.score
    assert a.detected
    assert not b.detected
    assert "shares its anomaly with A-01" in b.note


def test_too_few_stations_is_noted():
    east, north = _line_survey(1000.0, 25.0, 100.0)
    stations = _stations(east, north, np.zeros_like(east))
    # Off the survey corner: within 505 m of the extended corridor lie only
    # the stations at x = 1000 m on the lines y = 800, 900, 1000 m.
    far = make_segments((Fault("X", np.array([[1500.0, 1300.0], [1500.0, 1500.0]])),))
    (d,) = detect_dipoles(stations, far, corridor_m=505.0, n_decoys=10)
    assert not d.detected
    assert d.n_stations == 3
    assert d.note.startswith("too few stations (3")
    assert np.isnan(d.score)
    # Unscored segments still appear in the table (last) and on the map (grey).
    table = detection_table([d])
    assert table.segment_id.tolist() == ["X-01"] and np.isnan(table.score[0])
    figure = detection_figure([d], stations)
    assert figure.axes[0].lines[0].get_color() == "0.6"
    import matplotlib.pyplot as plt

    plt.close(figure)


def test_bad_option_raises_option_error():
    east, north = _line_survey(500.0, 25.0, 100.0)
    stations = _stations(east, north, np.zeros_like(east))
    segs = make_segments((Fault("A", np.array([[0.0, -100.0], [0.0, 100.0]])),))
    with pytest.raises(OptionError, match="false_alarm_rate"):
        detect_dipoles(stations, segs, false_alarm_rate=1.5)


# --------------------------------------------------------------------------- false-alarm rate


@pytest.mark.slow
def test_false_alarm_rate_matches_decoy_calibration():
    # Source-free segment with fresh white noise in each of 400
    # realizations (min_score = 0, so the decoys alone set the threshold).
    # With exchangeable scores the chance to beat the decoys' 99th
    # percentile is about 1 %; the count must be consistent with
    # Binomial(400, 0.01): two-sided binomial test p > 0.001
    # (scipy.stats.binomtest; at 400 trials this accepts 0 to 11 detections).
    # The survey geometry, templates and decoy placement are built once and
    # reused; only the noise changes. The first realization goes through the
    # public detect_dipoles with the same seed to tie the two paths together.
    east, north = _line_survey(3000.0, 20.0, 100.0)
    segments = make_segments((Fault("Q", np.array([[0.0, -300.0], [0.0, 300.0]])),),
                             station_spacing_m=20.0)
    options = dict(template_top_depths_m=[25, 50, 100], min_score=0.0, n_decoys=200, seed=7)
    rng = np.random.default_rng(99)
    first = rng.normal(0.0, 5.0, east.size)
    (public,) = detect_dipoles(_stations(east, north, first), segments, **options)

    stations = _stations(east, north, first)
    data = detect._SurveyArrays(stations, np.arange(east.size))
    depths = np.asarray(options["template_top_depths_m"], dtype=float)
    corridor = detect._auto_corridor(data, depths)
    (pos,) = assign_points(data.easting, data.northing, segments, corridor_m=corridor)
    setup = detect._SegmentSetup(
        segments[0], pos, data, corridor, depths, np.array([2.0, 4.0]), np.array([1.0, 0.25, 4.0]),
        options["n_decoys"],
        detect._fault_tree(segments, corridor), np.random.default_rng([options["seed"], 0]))
    assert setup.n_decoys >= 150
    n_runs = 400
    hits = 0
    for run in range(n_runs):
        values = first if run == 0 else rng.normal(0.0, 5.0, east.size)
        real, decoys = setup.score(values, data.weight, data.read_var)
        threshold, _ = detect._threshold(decoys, 0.01, 0.0)
        if run == 0:
            npt.assert_allclose([real["score"][0], threshold], [public.score, public.threshold],
                                rtol=1e-12)
        hits += bool(real["score"][0] > threshold)
    assert stats.binomtest(hits, n_runs, 0.01).pvalue > 1e-3, hits
