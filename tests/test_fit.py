"""
Tests of the per-segment inversion (geosp.fit).

Synthetic surveys are forward-modelled with the verified fault-patch kernel
(geosp.physics.patch_sp_local, checked against physics notes §9 rows 6-7),
with Gaussian noise from a fixed seed; the fit must recover the known
sources within tolerances derived from the linearised 1-sigma of each setup.
"""

from dataclasses import replace

import numpy as np
import numpy.testing as npt
import pytest
from scipy import optimize

from geosp._network import adjust_network
from geosp.errors import OptionError
from geosp import fit as fit_module
from geosp.fit import fit_segment, fit_segments
from geosp.models import Detection, FaultSegment, Stations
from geosp.physics import fault_patch_sp, patch_sp_local, pole_pair_sp

ORIGIN = (512000.0, 4180000.0)  # invented survey area, UTM-like metres


def make_segment(strike_deg=30.0, length_m=2000.0, dip_deg=90.0, dip_known=True, name="F1-1",
                 origin=ORIGIN):
    phi = np.radians(strike_deg)
    end = (origin[0] + length_m * np.sin(phi), origin[1] + length_m * np.cos(phi))
    return FaultSegment("F1", name, np.array([origin, end]), strike_deg, length_m,
                        dip_deg=dip_deg, dip_known=dip_known)


def make_survey(segment, *, truth=None, noise_mv=1.0, seed=1, n_lines=9, spacing_m=25.0,
                half_width_m=1000.0, extra=None):
    """Profiles across the segment; SP = patch + regional plane + noise (mV)."""
    lines = np.linspace(0.1, 0.9, n_lines) * segment.length_m
    across = np.arange(-half_width_m, half_width_m + 1e-6, spacing_m)
    s, t = (a.ravel() for a in np.meshgrid(lines, across))
    easting, northing = segment.to_world(s, t)
    rng = np.random.default_rng(seed)
    data = 5.0 + 0.002 * s - 0.003 * t + noise_mv * rng.standard_normal(s.size)
    if truth is not None:
        data += patch_sp_local(
            s, t, centre_m=truth["centre_m"], length_m=truth["length_m"],
            depth_top_m=truth["top"], depth_bottom_m=truth["bottom"], dip_deg=truth["dip"],
            jump_mv=truth["jump"], sigma_ratio=truth.get("sigma_ratio", 1.0))
    if extra is not None:
        data += extra(easting, northing)
    stations = Stations(np.array([f"{segment.segment_id}-{i:04d}" for i in range(s.size)]),
                        easting, northing, np.zeros(s.size), data, "EPSG:32633",
                        sigma_mv=np.full(s.size, noise_mv))
    detection = Detection(segment, np.arange(s.size), s.size, 12.0, 1, True, 4.0, noise_mv, {})
    return stations, detection


TRUTH = {"centre_m": 1000.0, "length_m": 1500.0, "top": 150.0, "bottom": 600.0, "dip": 90.0,
         "jump": 100.0}
FAST = {"n_starts": 128, "n_local": 3}


def check_recovery(row, truth):
    # Tolerances: top depth 20 % and sqrt(z_t z_b) 10 %; the linearised 1-sigma of
    # these setups (printed in the row) is about 4 % and 2 %, so the bounds are
    # about 5 sigma and fail only for a real bias.
    assert row["top_depth_sd_m"] < 0.07 * truth["top"]
    assert abs(row["top_depth_m"] - truth["top"]) < 0.2 * truth["top"]
    geo_mean = np.sqrt(truth["top"] * truth["bottom"])
    assert abs(row["geo_mean_depth_m"] - geo_mean) < 0.1 * geo_mean
    assert row["top_depth_lo_m"] < row["top_depth_m"] < row["top_depth_hi_m"]
    assert row["jump_lo_mv"] < row["jump_mv"] < row["jump_hi_mv"]


def test_vertical_patch_recovered():
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH)
    fit = fit_segment(stations, detection, models=("fault_patch",), **FAST)
    assert fit.chosen == "fault_patch"
    (row,) = fit.sources
    check_recovery(row, TRUTH)
    assert row["dip_deg"] > 84.0  # true 90; linearised sd about 1 degree
    # f·(z_b − z_t) is resolved (physics notes §7): within 15 % (about 3 sigma).
    product = TRUTH["jump"] * (TRUTH["bottom"] - TRUTH["top"])
    assert abs(row["jump_height_mv_m"] - product) < 0.15 * product
    # noise is 1 mV, so a good fit has rms near 1 and chi2_red near 1
    assert 0.8 < row["rms_mv"] < 1.2 and 0.8 < row["chi2_red"] < 1.2


def test_dipping_patch_recovered_and_world_position_consistent():
    truth = dict(TRUTH, dip=60.0)
    segment = make_segment(dip_deg=60.0)
    stations, detection = make_survey(segment, truth=truth)
    fit = fit_segment(stations, detection, models=("fault_patch",), **FAST)
    (row,) = fit.sources
    check_recovery(row, truth)
    assert abs(row["dip_deg"] - 60.0) < 5.0
    assert row["strike_deg"] == pytest.approx(30.0) and row["dip_dir_deg"] == pytest.approx(120.0)
    # Independent path: the world-coordinate forward model of the contract's
    # row fields reproduces the fitted source part at the stations.
    sp = fault_patch_sp((stations.easting, stations.northing), **{
        k: row[k] for k in ("top_x", "top_y", "strike_deg", "dip_deg", "top_depth_m",
                            "bottom_depth_m", "length_m", "jump_mv", "sigma_ratio")})
    npt.assert_allclose(sp, fit.source_mv, atol=1e-6 * np.abs(fit.source_mv).max())


def test_unknown_dip_direction_reported_with_sign_rule():
    # Local dip 120 degrees from the +t side = 60 degrees toward strike - 90.
    truth = dict(TRUTH, dip=120.0)
    segment = make_segment(dip_known=False, dip_deg=np.nan)
    stations, detection = make_survey(segment, truth=truth)
    fit = fit_segment(stations, detection, models=("fault_patch",), **FAST)
    (row,) = fit.sources
    # contract sign rule: strike + 180, dip 180 - 120 = 60, jump negated
    assert row["strike_deg"] == pytest.approx(210.0)
    assert abs(row["dip_deg"] - 60.0) < 5.0
    assert row["jump_mv"] < 0 and row["jump_lo_mv"] < row["jump_mv"] < row["jump_hi_mv"]
    check_recovery(row, truth)
    sp = fault_patch_sp((stations.easting, stations.northing), **{
        k: row[k] for k in ("top_x", "top_y", "strike_deg", "dip_deg", "top_depth_m",
                            "bottom_depth_m", "length_m", "jump_mv", "sigma_ratio")})
    npt.assert_allclose(sp, fit.source_mv, atol=1e-6 * np.abs(fit.source_mv).max())


def test_conductivity_contrast_recovered():
    # Vertical fault, so the lobe factor 2σj/(σ1+σ2) is exact (physics notes §2.3).
    truth = dict(TRUTH, sigma_ratio=4.0)
    segment = make_segment()
    stations, detection = make_survey(segment, truth=truth)
    fit = fit_segment(stations, detection, models=("fault_patch",), fit_sigma_ratio=True, **FAST)
    (row,) = fit.sources
    check_recovery(row, truth)
    assert abs(np.log(row["sigma_ratio"] / 4.0)) < np.log(1.25)
    assert "dip-contrast approximation" not in row["flags"] or row["dip_deg"] < 89.5


def test_contrast_is_fitted_when_detection_found_one_sided_lobes():
    # fit_sigma_ratio = "auto" (the default) frees the ratio when the best detection
    # template had a contrast, and holds it at 1 otherwise.
    truth = dict(TRUTH, sigma_ratio=4.0)
    segment = make_segment()
    stations, detection = make_survey(segment, truth=truth)
    contrast = replace(detection, best_template={"sigma_ratio": 4.0})
    (row,) = fit_segment(stations, contrast, models=("fault_patch",), **FAST).sources
    check_recovery(row, truth)
    assert abs(np.log(row["sigma_ratio"] / 4.0)) < np.log(1.25)
    uniform = replace(detection, best_template={"sigma_ratio": 1.0})
    (row,) = fit_segment(stations, uniform, models=("fault_patch",), **FAST).sources
    assert row["sigma_ratio"] == 1.0


def test_variable_projection_matches_joint_least_squares():
    # Reference: scipy least_squares over all nine parameters (geometry, jump
    # and regional together), started from the truth; at the optimum both must
    # agree to optimiser tolerance.
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH, noise_mv=2.0, n_lines=5,
                                      spacing_m=50.0)
    fit = fit_segment(stations, detection, models=("fault_patch",), huber=False,
                      uncertainty="jacobian", **FAST)
    s, t = segment.to_local(stations.easting, stations.northing)
    _check_against_joint_least_squares(fit, s, t, stations.sp_mv, lambda r: r / 2.0)


def _check_against_joint_least_squares(fit, s, t, d, whiten):
    """
    Reference: scipy least_squares over all nine parameters (geometry, jump and
    regional together) on ``whiten``(residual), started from the truth; the fit's
    χ² and parameters must agree to optimiser tolerance.
    """
    (row,) = fit.sources

    def residual(q):
        sc, length, top, bottom, dip, f, c0, cs, ct = q
        g = patch_sp_local(s, t, centre_m=sc, length_m=length, depth_top_m=top,
                           depth_bottom_m=bottom, dip_deg=dip, jump_mv=f)
        return whiten(d - g - c0 - cs * s - ct * t)

    q0 = [1000.0, 1500.0, 150.0, 600.0, 89.0, 100.0, 5.0, 0.002, -0.003]
    ref = optimize.least_squares(residual, q0, bounds=([-1e4, 10, 10, 20, 30, -1e3, -1e3, -1, -1],
                                                      [1e4, 1e4, 1e3, 1e4, 90, 1e3, 1e3, 1, 1]),
                                 x_scale="jac", xtol=1e-12, ftol=1e-12, gtol=1e-12)
    chi2_ref = 2 * ref.cost
    chi2 = float(fit.selection.set_index("model").loc["fault_patch", "chi2"])
    assert abs(chi2 - chi2_ref) < 1e-4 * chi2_ref
    # Parameters agree to a small fraction of their 1-sigma (tolerance of the optimisers).
    for value, key, sd_key in ((ref.x[2], "top_depth_m", "top_depth_sd_m"),
                               (ref.x[3], "bottom_depth_m", "bottom_depth_sd_m")):
        assert abs(row[key] - value) < 0.05 * row[sd_key]
    assert abs(row["jump_mv"] - ref.x[5]) < 0.05 * (row["jump_hi_mv"] - row["jump_lo_mv"])
    return ref


def _profile_network(stations, segment, reading_sd):
    """
    The network covariance of leapfrog-style readings along each profile, with
    one tie line across the profiles' middle stations (geosp._network, checked
    against a dense inverse in tests/test_network.py).
    """
    s, t = segment.to_local(stations.easting, stations.northing)
    lines = np.unique(np.round(s, 6))
    f, to = [], []
    middles = []
    for value in lines:
        members = np.flatnonzero(np.isclose(s, value))
        members = members[np.argsort(t[members])]
        f += members[:-1].tolist()
        to += members[1:].tolist()
        middles.append(members[members.size // 2])
    f += middles[:-1]
    to += middles[1:]
    f, to = np.array(f), np.array(to)
    result = adjust_network(s.size, f, to, np.zeros(f.size), np.full(f.size, reading_sd ** 2),
                            middles[0])
    return result["covariance_model"].for_stations(np.arange(s.size), independent_sigma_mv=2.0)


def test_network_whitening_inverts_the_covariance():
    # The structured whitener W (block-diagonal bridges plus a low-rank junction part)
    # must satisfy WᵀW = (C + diag(var))⁻¹; reference: numpy.linalg.inv of the dense matrix.
    segment = make_segment()
    stations, _ = make_survey(segment, n_lines=4, spacing_m=100.0)
    covariance = _profile_network(stations, segment, 1.0)
    index = np.arange(stations.sp_mv.size)
    var = np.random.default_rng(3).uniform(2.0, 6.0, index.size)
    noise = fit_module._Noise(var, fit_module._network_part(covariance, index))
    w = noise.whitener(np.ones(index.size))(np.eye(index.size))
    expected = np.linalg.inv(covariance.block(index) + np.diag(var))
    npt.assert_allclose(w.T @ w, expected, atol=1e-10 * np.abs(expected).max())


def test_generalised_least_squares_matches_whitened_joint_least_squares():
    # Leapfrog readings leave errors that are correlated along each line (physics
    # notes §4). With the network covariance C given, the fit minimises
    # rᵀ(C + σ²I)⁻¹r. Reference: scipy least_squares over all nine parameters on
    # the residual whitened by numpy's own Cholesky factor, started from the truth;
    # at the optimum both must agree to optimiser tolerance.
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH, noise_mv=2.0, n_lines=5,
                                      spacing_m=50.0)
    covariance = _profile_network(stations, segment, 1.0)
    index = np.arange(stations.sp_mv.size)
    network = covariance.block(index)
    rng = np.random.default_rng(8)
    d = stations.sp_mv + np.linalg.cholesky(network + 1e-9 * np.eye(index.size)) @ \
        rng.standard_normal(index.size)
    stations = replace(stations, sp_mv=d)
    options = {**fit_module._fit_defaults(), "models": ("fault_patch",), "huber": False,
               "uncertainty": "jacobian", **FAST}
    fit = fit_module._fit_segment(stations, detection, options,
                                  network=fit_module._network_part(covariance, index))
    (row,) = fit.sources
    s, t = segment.to_local(stations.easting, stations.northing)
    factor = np.linalg.cholesky(network + 4.0 * np.eye(network.shape[0]))
    ref = _check_against_joint_least_squares(fit, s, t, d, lambda r: np.linalg.solve(factor, r))
    # The plain fit of the same data (stations independent) lands elsewhere: the check can fail.
    plain = fit_segment(stations, detection, models=("fault_patch",), huber=False,
                        uncertainty="jacobian", **FAST)
    assert abs(plain.sources[0]["top_depth_m"] - ref.x[2]) > 0.05 * row["top_depth_sd_m"]


def test_no_source_model_chosen_without_anomaly():
    segment = make_segment()
    stations, detection = make_survey(segment, truth=None, noise_mv=3.0, n_lines=5,
                                      spacing_m=50.0)
    fit = fit_segment(stations, detection, n_starts=128, n_local=3)
    assert fit.chosen == "none"
    assert fit.sources == ()
    assert set(fit.selection["model"]) == {"none", "fault_patch", "two_patches", "pole_pair"}
    # BIC definition: chi2 + k ln N (Schwarz 1978)
    n = len(stations)
    npt.assert_allclose(fit.selection["bic"], fit.selection["chi2"] + fit.selection["k"] * np.log(n))


def test_shallow_pole_pair_chosen_and_flagged_cultural():
    segment = make_segment()
    pos_e, pos_n = segment.to_world(900.0, 150.0)
    neg_e, neg_n = segment.to_world(1000.0, 150.0)

    def casing(easting, northing):
        return pole_pair_sp((easting, northing), pos_x=pos_e, pos_y=pos_n, pos_depth_m=20.0,
                            neg_x=neg_e, neg_y=neg_n, neg_depth_m=20.0, k_mv_m=2000.0)

    stations, detection = make_survey(segment, truth=None, noise_mv=1.0, n_lines=9,
                                      spacing_m=25.0, extra=casing)
    fit = fit_segment(stations, detection, n_starts=128, n_local=3, uncertainty="jacobian")
    assert fit.chosen == "pole_pair"
    (row,) = fit.sources
    assert row["model"] == "pole_pair" and "likely cultural" in row["flags"]
    # positions within one station spacing, strength within 10 %
    assert np.hypot(row["top_x"] - pos_e, row["top_y"] - pos_n) < 25.0
    assert np.hypot(row["neg_x"] - neg_e, row["neg_y"] - neg_n) < 25.0
    assert abs(row["pole_k_mv_m"] - 2000.0) < 200.0


def test_source_rows_have_contract_fields():
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH, n_lines=5, spacing_m=50.0)
    fit = fit_segment(stations, detection, models=("fault_patch",), **FAST)
    contract = ["source_id", "fault_id", "segment_id", "model", "top_x", "top_y", "strike_deg",
                "dip_deg", "dip_dir_deg", "top_depth_m", "bottom_depth_m", "length_m",
                "jump_mv", "top_depth_lo_m", "top_depth_hi_m", "jump_lo_mv", "jump_hi_mv",
                "rms_mv", "chi2_red", "n_stations", "bic_gain", "sigma_ratio", "flags"]
    extra = ["geo_mean_depth_m", "geo_mean_depth_sd_m", "jump_height_mv_m",
             "jump_height_sd_mv_m", "top_depth_sd_m", "bottom_depth_sd_m", "dip_sd_deg",
             "jump_sd_mv", "length_sd_m", "location_sd_m", "ground_m"]
    (row,) = fit.sources
    assert list(row) == contract + extra
    assert row["source_id"] == "F1-1-P1" and isinstance(row["flags"], str)
    assert row["sigma_ratio"] == 1.0
    # profile-likelihood curves reach Δχ²/s² = 1 on both sides
    values, dchi2 = fit.profiles["top_depth_m"]
    assert dchi2.min() == 0.0 and dchi2[0] > 1.0 and dchi2[-1] > 1.0
    assert fit.correlation.loc["top_depth_m", "jump_mv"] > 0.5  # physics notes §7: +0.96
    assert fit.n_forward > 0 and fit.weights.shape == (len(stations),)


def test_outlier_down_weighted_by_huber():
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH)
    sp = stations.sp_mv.copy()
    sp[10] += 80.0  # a blunder of 80 sigma
    stations = stations.replace(sp_mv=sp)
    fit = fit_segment(stations, detection, models=("fault_patch",), uncertainty="jacobian",
                      **FAST)
    # Huber weight min(1, 1.345 σ/|r|) ≈ 1.345/80 for the blunder
    assert fit.weights[10] < 0.05
    assert np.median(fit.weights) == 1.0
    check_recovery(fit.sources[0], TRUTH)


def test_bad_options_rejected():
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH, n_lines=3, spacing_m=100.0)
    with pytest.raises(OptionError, match="models"):
        fit_segment(stations, detection, models=("patch",))
    with pytest.raises(OptionError, match="uncertainty"):
        fit_segment(stations, detection, uncertainty="bootstrap")
    with pytest.raises(OptionError, match="dip_range_deg"):
        fit_segment(stations, detection, dip_range_deg=(60.0, 100.0))


def _two_segment_survey(seed=3):
    seg_a = make_segment(name="F1-1")
    seg_b = make_segment(name="F2-1", strike_deg=120.0, origin=(ORIGIN[0] + 6000, ORIGIN[1]))
    st_a, det_a = make_survey(seg_a, truth=TRUTH, n_lines=5, spacing_m=50.0, seed=seed)
    truth_b = dict(TRUTH, jump=-80.0, top=200.0)
    st_b, det_b = make_survey(seg_b, truth=truth_b, n_lines=5, spacing_m=50.0, seed=seed + 1)
    n_a = len(st_a)
    stations = Stations(np.concatenate([st_a.station_id, st_b.station_id]),
                        np.concatenate([st_a.easting, st_b.easting]),
                        np.concatenate([st_a.northing, st_b.northing]),
                        np.zeros(n_a + len(st_b)),
                        np.concatenate([st_a.sp_mv, st_b.sp_mv]), "EPSG:32633",
                        sigma_mv=np.ones(n_a + len(st_b)))
    det_b = Detection(seg_b, np.arange(len(st_b)) + n_a, len(st_b), 9.0, -1, True, 4.0, 1.0, {})
    return stations, [det_a, det_b]


def test_fit_segments_joint_solve_explains_data():
    stations, detections = _two_segment_survey()
    calls = []
    result = fit_segments(stations, detections, workers=1, models=("fault_patch",),
                          uncertainty="jacobian", progress=lambda i, n: calls.append((i, n)),
                          **FAST)
    assert calls[-1] == (2, 2)
    assert [f.chosen for f in result.fits] == ["fault_patch", "fault_patch"]
    assert len(result.sources) == 2
    # the two synthetic surveys have different regional planes; the joint solve
    # has one plane, so residuals carry that mismatch but stay far below the anomaly
    npt.assert_allclose(result.residual_mv, stations.sp_mv - result.model_mv)
    assert np.sqrt(np.mean(result.residual_mv ** 2)) < 10.0
    jumps = [r["jump_mv"] for r in result.sources]
    assert jumps[0] > 50 and jumps[1] < -40


def test_overlapping_segments_keep_stronger():
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH, n_lines=5, spacing_m=50.0)
    twin = Detection(make_segment(name="F1-2", strike_deg=31.0), detection.station_index,
                     detection.n_stations, 5.0, 1, True, 4.0, 1.0, {})
    result = fit_segments(stations, [detection, twin], workers=1, models=("fault_patch",),
                          uncertainty="jacobian", **FAST)
    assert len(result.fits) == 2
    assert len(result.sources) == 1  # the weaker of two fits sharing all stations is dropped


@pytest.mark.slow
def test_profile_interval_coverage():
    # Frequentist check of the profile-likelihood interval (Δχ²/s² = 1 gives
    # the central 68 % for a well-behaved likelihood): the interval must contain
    # the true top depth in 60-76 % of noise realizations. 120 realizations
    # give a binomial sd of 4.3 %, so the band is about ±1.9 sd around 68 %.
    truth = {"centre_m": 1000.0, "length_m": 1500.0, "top": 150.0, "bottom": 600.0,
             "dip": 90.0, "jump": 100.0}
    segment = make_segment()
    hits = jump_hits = 0
    n_real = 120
    for k in range(n_real):
        stations, detection = make_survey(segment, truth=truth, noise_mv=3.0, n_lines=3,
                                          spacing_m=50.0, seed=1000 + k)
        fit = fit_segment(stations, detection, models=("fault_patch",), n_starts=32,
                          n_local=2, seed=k)
        row = fit.sources[0]
        hits += row["top_depth_lo_m"] <= truth["top"] <= row["top_depth_hi_m"]
        jump_hits += row["jump_lo_mv"] <= truth["jump"] <= row["jump_hi_mv"]
    assert 0.60 <= hits / n_real <= 0.76
    assert 0.60 <= jump_hits / n_real <= 0.76


@pytest.mark.slow
def test_mcmc_interval_agrees_with_profile():
    # Two independent routes to the 16/84 % bounds: profile likelihood and an
    # ensemble sampler (flat priors in the transformed parameters, linear
    # parameters marginalised). They coincide only where the likelihood is
    # close to Gaussian, so use a well-resolved survey (top depth sd ~4 %);
    # tolerance 25 % of the interval width covers the Monte Carlo error of a
    # 1500-step chain. (Where z_b is unresolved, the marginal and the profile
    # differ by the prior volume, as expected.)
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH)
    prof = fit_segment(stations, detection, models=("fault_patch",), **FAST).sources[0]
    mcmc = fit_segment(stations, detection, models=("fault_patch",), uncertainty="mcmc",
                       **FAST).sources[0]
    for lo, hi in (("top_depth_lo_m", "top_depth_hi_m"), ("jump_lo_mv", "jump_hi_mv")):
        width = prof[hi] - prof[lo]
        assert abs(mcmc[lo] - prof[lo]) < 0.25 * width
        assert abs(mcmc[hi] - prof[hi]) < 0.25 * width


def test_terrain_flag_when_relief_exceeds_fifth_of_top_depth():
    # physics notes §2.5: relief above 0.2 z_t in the footprint deserves a flag
    segment = make_segment()
    stations, detection = make_survey(segment, truth=TRUTH, n_lines=5, spacing_m=50.0)
    flat = fit_segment(stations, detection, models=("fault_patch",), uncertainty="jacobian",
                       **FAST)
    assert "terrain" not in flat.sources[0]["flags"]
    s, t = segment.to_local(stations.easting, stations.northing)
    hilly = stations.replace(upward=40.0 * np.exp(-(t / 300.0) ** 2))  # 40 m > 0.2 × 150 m
    fit = fit_segment(hilly, detection, models=("fault_patch",), uncertainty="jacobian", **FAST)
    assert "terrain" in fit.sources[0]["flags"].split("; ")


def test_fit_segments_rejects_unknown_option_and_skips_sparse_segment():
    stations, detections = _two_segment_survey()
    with pytest.raises(OptionError, match="n_start .did you mean n_starts"):
        fit_segments(stations, detections, workers=1, n_start=16)
    # the second segment's window keeps 5 stations with readings
    windows = fit_module._fit_windows(stations, detections, "auto")
    blank = np.setdiff1d(windows[1], windows[0])[5:]
    sp = np.array(stations.sp_mv, dtype=float)
    sp[blank] = np.nan
    with pytest.warns(UserWarning, match="only 5 usable stations"):
        result = fit_segments(stations.replace(sp_mv=sp), detections, workers=1,
                              models=("fault_patch",), uncertainty="jacobian", **FAST)
    assert len(result.fits) == 1


def test_figures_and_parameter_table():
    from matplotlib.figure import Figure

    from geosp.figures.fit import likelihood_figure, parameter_table, profiles_figure

    truth = dict(TRUTH, dip=120.0)  # flipped dip: the jump is reported negated
    segment = make_segment(dip_known=False, dip_deg=np.nan)
    stations, detection = make_survey(segment, truth=truth, n_lines=5, spacing_m=50.0)
    fit = fit_segment(stations, detection, models=("fault_patch",), **FAST)
    row = fit.sources[0]
    table = parameter_table(fit).set_index("parameter")
    top = table.loc["top depth (m)"]
    assert top["value"] == row["top_depth_m"] and top["p16"] == row["top_depth_lo_m"]
    jump = table.loc["jump (mV)"]
    assert jump["p16"] < jump["value"] < jump["p84"] and jump["value"] < 0
    dip = table.loc["dip (°)"]  # linearised ±1σ where no interval is computed
    assert dip["interval"] == "±1σ" and dip["p84"] - dip["p16"] == pytest.approx(2 * dip["sd"])

    figure = profiles_figure(fit, stations)
    assert isinstance(figure, Figure) and len(figure.axes) == 4
    ax = figure.axes[0]
    residual = [line for line in ax.get_lines() if line.get_label() == "residual"][0]
    models = [line for line in ax.get_lines() if line.get_label() in ("model", "_model")]
    assert len(models) >= 1
    obs_x = ax.containers[0].lines[0].get_xdata()
    obs_y = ax.containers[0].lines[0].get_ydata()
    # the plotted model equals observed minus plotted residual, station by station
    model_y = np.concatenate([m.get_ydata() for m in models])
    npt.assert_allclose(np.sort(model_y), np.sort(obs_y - residual.get_ydata()))
    npt.assert_allclose(residual.get_xdata(), obs_x)
    on_axis = np.isin(np.round(fit.predicted_mv, 9), np.round(model_y, 9))
    assert on_axis.sum() == model_y.size  # plotted model values are the fit's predictions

    figure = likelihood_figure(fit)
    assert len(figure.axes) == 2
    for ax, lo, hi in zip(figure.axes, ("top_depth_lo_m", "jump_lo_mv"),
                          ("top_depth_hi_m", "jump_hi_mv")):
        values, dchi2 = ax.get_lines()[0].get_data()
        # the curve passes through Δχ²/s² = 1 at the reported 16 % and 84 % bounds
        for bound in (row[lo], row[hi]):
            assert np.interp(bound, values, dchi2) == pytest.approx(1.0, abs=0.02)
    empty = likelihood_figure(replace(fit, profiles={}))
    assert len(empty.axes) == 1


def test_two_patches_along_strike_recovered():
    # Two patches of opposite jump on one 3-km segment: the two-patch model must
    # win by BIC and recover both (same tolerances as one patch); patches are
    # ordered along strike, so swapping labels is not reported as a second minimum.
    segment = make_segment(length_m=3000.0)
    second = {"centre_m": 2300.0, "length_m": 1000.0, "top": 300.0, "bottom": 900.0,
              "dip": 90.0, "jump": -120.0}
    first = dict(TRUTH, centre_m=800.0, length_m=1000.0)

    def second_patch(easting, northing):
        s, t = segment.to_local(easting, northing)
        return patch_sp_local(s, t, centre_m=second["centre_m"], length_m=second["length_m"],
                              depth_top_m=second["top"], depth_bottom_m=second["bottom"],
                              dip_deg=90.0, jump_mv=second["jump"])

    stations, detection = make_survey(segment, truth=first, extra=second_patch, n_lines=12,
                                      spacing_m=25.0)
    fit = fit_segment(stations, detection, models=("fault_patch", "two_patches"),
                      n_starts=256, n_local=4, uncertainty="jacobian")
    assert fit.chosen == "two_patches"
    assert "multimodal" not in fit.flags
    rows = fit.sources
    assert [r["source_id"] for r in rows] == ["F1-1-P1", "F1-1-P2"]
    for row, truth in zip(rows, (first, second)):
        s, _ = segment.to_local(row["top_x"], row["top_y"])
        assert abs(s - truth["centre_m"]) < 100.0
        assert abs(row["top_depth_m"] - truth["top"]) < 0.2 * truth["top"]
        geo_mean = np.sqrt(truth["top"] * truth["bottom"])
        assert abs(row["geo_mean_depth_m"] - geo_mean) < 0.1 * geo_mean
        assert np.sign(row["jump_mv"]) == np.sign(truth["jump"])
        assert row["dip_deg"] == rows[0]["dip_deg"]  # shared dip


# --------------------------------------------------------------------------------------
# Terrain, fit windows across segment cuts, and interacting sources
# --------------------------------------------------------------------------------------

def _area_stations(xs, ys, values, elevation=None, noise_mv=1.0):
    e, n = (a.ravel() for a in np.meshgrid(xs, ys))
    up = np.zeros(e.size) if elevation is None else elevation(e, n)
    data = values(e, n, up) + noise_mv * np.random.default_rng(7).standard_normal(e.size)
    return Stations(np.array([f"S{i:05d}" for i in range(e.size)]), e, n, up, data,
                    "EPSG:32633", sigma_mv=np.full(e.size, noise_mv))


def _row_depths(row, ground):
    """Top and sqrt(top·bottom) below a given ground level (the planted one)."""
    shift = ground - row["ground_m"] if np.isfinite(row.get("ground_m", np.nan)) else 0.0
    top, bottom = row["top_depth_m"] + shift, row["bottom_depth_m"] + shift
    return top, np.sqrt(top * bottom)


def test_terrain_held_patch_recovered_and_flat_datum_is_biased():
    # Physics notes §2.5: depths below each station's own elevation. The data come
    # from the world forward model with ground_m (an independent code path from
    # the fit's local frame); relief 120 m over a 150 m top is 0.8 z_t.
    segment = make_segment()
    truth = dict(top_x=0.0, top_y=0.0, strike_deg=30.0, dip_deg=90.0, top_depth_m=150.0,
                 bottom_depth_m=600.0, length_m=1500.0, jump_mv=100.0, ground_m=500.0)
    truth["top_x"], truth["top_y"] = segment.to_world(1000.0, 0.0)

    def hill(e, n):
        s, t = segment.to_local(e, n)
        return 500.0 + 120.0 * np.exp(-((t - 250.0) / 300.0) ** 2)

    def values(e, n, up):
        return 3.0 + fault_patch_sp((e, n, up), **truth)

    s_grid = segment.to_world(np.linspace(100, 1900, 9)[:, None], np.arange(-1000, 1001, 25.0)[None, :])
    stations = Stations(np.array([f"S{i:05d}" for i in range(s_grid[0].size)]),
                        s_grid[0].ravel(), s_grid[1].ravel(), hill(s_grid[0].ravel(), s_grid[1].ravel()),
                        values(s_grid[0].ravel(), s_grid[1].ravel(), hill(s_grid[0].ravel(), s_grid[1].ravel()))
                        + np.random.default_rng(3).standard_normal(s_grid[0].size),
                        "EPSG:32633", sigma_mv=np.ones(s_grid[0].size))
    detection = Detection(segment, np.arange(len(stations)), len(stations), 12.0, 1, True, 4.0,
                          1.0, {})
    geo_true = np.sqrt(150.0 * 600.0)
    (row,) = fit_segment(stations, detection, models=("fault_patch",), **FAST).sources
    top, geo = _row_depths(row, truth["ground_m"])
    assert abs(top - 150.0) < 0.2 * 150.0 and abs(geo - geo_true) < 0.1 * geo_true
    assert "terrain" in row["flags"]
    (flat,) = fit_segment(stations, detection, models=("fault_patch",), terrain=False,
                          **FAST).sources
    assert np.isnan(flat["ground_m"])
    flat_top = flat["top_depth_m"] + (truth["ground_m"] - np.median(stations.upward))
    # the flat datum misses by more than the terrain-held fit
    assert abs(flat_top - 150.0) > abs(top - 150.0)


def _two_cut_segments(length_each=1200.0, strike=0.0, origin=(0.0, 0.0), fault="FA"):
    phi = np.radians(strike)
    unit = np.array([np.sin(phi), np.cos(phi)])
    a = np.asarray(origin, dtype=float)
    b = a + length_each * unit
    c = b + length_each * unit
    return [FaultSegment(fault, f"{fault}-01", np.array([a, b]), strike, length_each,
                         dip_deg=90.0, dip_known=True),
            FaultSegment(fault, f"{fault}-02", np.array([b, c]), strike, length_each,
                         dip_deg=90.0, dip_known=True)]


def _detections(stations, segments, detected, corridor=600.0):
    from geosp.segments import assign_points
    owned = assign_points(stations.easting, stations.northing, segments, corridor_m=corridor)
    return [Detection(seg, own, own.size, 20.0 if det else 1.0, 1, det, 5.0, 1.0,
                      {"corridor_m": corridor}) for seg, own, det in zip(segments, owned, detected)]


def test_source_across_a_segment_cut_is_fitted_whole():
    # A fault cut into two collinear segments (a length split); the planted patch
    # runs 700 m into each. The fit window follows the fault past the cut.
    segments = _two_cut_segments()
    truth = dict(top_x=0.0, top_y=1200.0, strike_deg=0.0, dip_deg=90.0, top_depth_m=150.0,
                 bottom_depth_m=600.0, length_m=1400.0, jump_mv=100.0)
    stations = _area_stations(np.arange(-1000, 1001, 25.0), np.arange(-400, 2801, 200.0),
                              lambda e, n, up: 2.0 + fault_patch_sp((e, n), **truth))
    detections = _detections(stations, segments, [True, False])
    result = fit_segments(stations, detections, workers=1, models=("fault_patch",), **FAST)
    (row,) = result.sources
    assert abs(row["length_m"] - 1400.0) < 0.1 * 1400.0
    assert abs(row["top_y"] - 1200.0) < 50.0
    top, geo = _row_depths(row, 0.0)
    assert abs(top - 150.0) < 0.2 * 150.0 and abs(geo - 300.0) < 0.1 * 300.0


def test_interacting_sources_fitted_jointly():
    # Two parallel faults 900 m apart, each with a strong patch: the flank of one
    # lies in the other's window. Joint refinement recovers both; each row names
    # its group.
    seg_a = _two_cut_segments(2400.0, origin=(0.0, 0.0), fault="FA")[0]
    seg_b = _two_cut_segments(2400.0, origin=(900.0, 0.0), fault="FB")[0]
    truths = [dict(top_x=0.0, top_y=1200.0, strike_deg=0.0, dip_deg=90.0, top_depth_m=150.0,
                   bottom_depth_m=900.0, length_m=1600.0, jump_mv=180.0),
              dict(top_x=900.0, top_y=1100.0, strike_deg=0.0, dip_deg=90.0, top_depth_m=200.0,
                   bottom_depth_m=700.0, length_m=1400.0, jump_mv=-150.0)]
    stations = _area_stations(
        np.arange(-1200, 2101, 25.0), np.arange(0, 2401, 200.0),
        lambda e, n, up: 2.0 + 0.004 * e + sum(fault_patch_sp((e, n), **t) for t in truths))
    detections = _detections(stations, [seg_a, seg_b], [True, True], corridor=600.0)
    result = fit_segments(stations, detections, workers=1, models=("fault_patch",), **FAST)
    assert len(result.sources) == 2
    for row, truth in zip(sorted(result.sources, key=lambda r: r["top_x"]), truths):
        assert row["joint_group"] == "FA-01,FB-01"
        top, geo = _row_depths(row, 0.0)
        geo_true = np.sqrt(truth["top_depth_m"] * truth["bottom_depth_m"])
        assert abs(top - truth["top_depth_m"]) < 0.2 * truth["top_depth_m"]
        assert abs(geo - geo_true) < 0.1 * geo_true
