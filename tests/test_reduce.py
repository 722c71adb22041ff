"""Tests of the field reduction (geosp.reduce) on synthetic surveys built in code."""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np
import numpy.testing as npt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as hs
from scipy import stats

from geosp.errors import InputError
from geosp.models import ElectrodeChecks, Fault, Readings, Stations, Survey
from geosp.reduce import reduce_survey

DAY1 = np.datetime64("2026-03-02T08:00:00")
DAY2 = np.datetime64("2026-03-03T08:00:00")


def true_potential(easting, northing):
    """Smooth invented SP field, mV."""
    return 30 * np.sin(easting / 300.0) - 0.02 * northing + 15 * np.exp(-((easting - 400) ** 2) / 2e4)


def delta_true(time):
    """Invented electrode offset: 2 -> 2.8 mV on day 1, -1.5 -> -0.9 mV on day 2."""
    hours = (time - DAY1).astype("timedelta64[s]").astype(float) / 3600
    day2 = time >= DAY2
    h2 = (time - DAY2).astype("timedelta64[s]").astype(float) / 3600
    return np.where(day2, -1.5 + 0.6 * h2 / 10, 2.0 + 0.8 * hours / 10)


def grid_survey(*, n_rows=5, n_cols=25, tie_cols=(0, 8, 16, 24), spacing=25.0, noise=0.0,
                seed=0, mode="fixed_lead", offsets=True, blunder=None, step_s=60):
    """
    East-west lines on every row, read on day 1, and north-south tie lines read on day 2.

    Returns (survey, truth) where truth maps station id -> true potential (mV).
    ``blunder`` = (reading index, mV) adds a blunder to one reading.
    """
    rng = np.random.default_rng(seed)
    ids, east, north = [], [], []
    for r in range(n_rows):
        for c in range(n_cols):
            ids.append(f"S{r:02d}-{c:03d}")
            east.append(c * spacing)
            north.append(r * 4 * spacing)
    east, north = np.array(east), np.array(north)
    truth = dict(zip(ids, true_potential(east, north)))
    line, frm, to, time = [], [], [], []
    clock = DAY1
    for r in range(n_rows):
        for c in range(n_cols - 1):
            line.append(f"E{r}")
            frm.append(f"S{r:02d}-{c:03d}")
            to.append(f"S{r:02d}-{c + 1:03d}")
            time.append(clock)
            clock = clock + np.timedelta64(step_s, "s")
    clock = DAY2
    for c in tie_cols:
        for r in range(n_rows - 1):
            line.append(f"N{c}")
            frm.append(f"S{r:02d}-{c:03d}")
            to.append(f"S{r + 1:02d}-{c:03d}")
            time.append(clock)
            clock = clock + np.timedelta64(step_s, "s")
    time = np.array(time, dtype="datetime64[s]")
    line = np.array(line)
    m = len(line)
    dv = np.array([truth[b] - truth[a] for a, b in zip(frm, to)])
    k = np.array([np.sum(line[:i] == line[i]) for i in range(m)])
    sign = np.ones(m) if mode == "fixed_lead" else np.where(k % 2 == 0, 1.0, -1.0)
    if offsets:
        dv = dv + sign * delta_true(time)
    dv = dv + rng.normal(0.0, noise, m) if noise else dv
    if blunder is not None:
        dv[blunder[0]] += blunder[1]
    readings = Readings(line_id=line, from_id=np.array(frm), to_id=np.array(to), time=time,
                        dv_mv=dv, source_row=np.arange(2, m + 2), path="dipoles.csv")
    ctime = np.array([DAY1, DAY1 + np.timedelta64(10, "h"), DAY2, DAY2 + np.timedelta64(10, "h")],
                     dtype="datetime64[s]")
    checks = ElectrodeChecks(time=ctime, offset_mv=delta_true(ctime), source_row=np.arange(2, 6),
                             path="electrode_checks.csv")
    stations = Stations(station_id=ids, easting=east, northing=north, upward=np.full(len(ids), np.nan),
                        sp_mv=np.full(len(ids), np.nan), crs="EPSG:32633")
    survey = Survey(stations=stations, faults=(), crs="EPSG:32633", readings=readings,
                    electrode_checks=checks if offsets else None, reference_station=ids[0])
    return survey, truth


def reduce_quiet(survey, **options):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        return reduce_survey(survey, **options)


def legs_in_file_order(reduction):
    """The legs table (sorted by standardized residual) back in CSV row order."""
    return reduction.qc["legs"].sort_values("source_row").reset_index(drop=True)


def error_vs_truth(reduction, truth):
    st = reduction.stations
    return st.sp_mv - np.array([truth[s] for s in st.station_id])


def loop_survey(dv, *, times=None, line=("A", "A", "A", "A"), reference="P1"):
    """Four stations in one closed loop P1 -> P2 -> P3 -> P4 -> P1."""
    ids = ["P1", "P2", "P3", "P4"]
    st = Stations(station_id=ids, easting=[0, 100, 100, 0], northing=[0, 0, 100, 100],
                  upward=np.full(4, np.nan), sp_mv=np.full(4, np.nan), crs="EPSG:32633")
    if times is None:
        times = DAY1 + np.arange(4) * np.timedelta64(60, "s")
    rd = Readings(line_id=np.array(line), from_id=np.array(ids), to_id=np.array(ids[1:] + ids[:1]),
                  time=np.asarray(times, dtype="datetime64[s]"), dv_mv=np.asarray(dv, float),
                  source_row=np.arange(2, 6), path="loop.csv")
    return Survey(stations=st, faults=(), crs="EPSG:32633", readings=rd, reference_station=reference)


# ------------------------------------------------------------------ sign and a hand-computed loop

def test_sign_of_dv_is_to_minus_from():
    # Contract: dv_mv = V(to) - V(from) as read. P1 -> P2 reads +10 mV, so with P1 as
    # reference P2 must be at +10 mV (a single open line: no loop, nothing adjusted).
    ids = ["P1", "P2", "P3"]
    st = Stations(station_id=ids, easting=[0, 50, 100], northing=[0, 0, 0], upward=[np.nan] * 3,
                  sp_mv=[np.nan] * 3, crs="EPSG:32633")
    rd = Readings(line_id=np.array(["A", "A"]), from_id=np.array(["P1", "P2"]),
                  to_id=np.array(["P2", "P3"]), time=np.array([DAY1, DAY1 + 60], "datetime64[s]"),
                  dv_mv=np.array([10.0, -4.0]), source_row=np.array([2, 3]), path="line.csv")
    red = reduce_quiet(Survey(stations=st, faults=(), crs="EPSG:32633", readings=rd), drift=False)
    npt.assert_allclose(red.stations.sp_mv, [0.0, 10.0, 6.0], atol=1e-12)
    assert red.network["reference"] == "P1"  # contract: default = the first station read
    assert red.network["dof"] == 0


def test_single_loop_misclosure_spread_equally():
    # Textbook levelling practice (Ghilani 2010, from memory): in one loop with equal weights
    # the misclosure is distributed equally over the legs. True potentials 0, 10, 25, 5 mV;
    # the readings carry +1 mV each, so the loop misclosure is +4 mV and each leg is
    # corrected by -1 mV, which restores the true potentials exactly (float round-off).
    dv = np.array([10.0, 15.0, -20.0, -5.0]) + 1.0
    red = reduce_quiet(loop_survey(dv), drift=False, reading_sigma_mv=2.0)
    npt.assert_allclose(red.stations.sp_mv, [0.0, 10.0, 25.0, 5.0], atol=1e-10)
    npt.assert_allclose(red.qc["legs"]["residual_mv"], 1.0, atol=1e-10)
    loops = red.qc["loops"]
    assert len(loops) == 1 and red.network["dof"] == 1
    npt.assert_allclose(abs(loops["misclosure_mv"].iloc[0]), 4.0, atol=1e-10)
    # Misclosure sigma = sigma_r * sqrt(n legs) = 2 * 2 = 4 mV; chi2 = 4**2 / (4 * 2**2) = 1.
    npt.assert_allclose(loops["sigma_mv"].iloc[0], 4.0, rtol=1e-12)
    npt.assert_allclose(red.network["chi2"], 1.0, rtol=1e-12)
    # Hand-computed posterior sigma of the opposite corner P3: two paths of 2 legs in parallel,
    # variance (2*4)*(2*4)/(16) = 4 mV^2 -> 2 mV (resistor-network analogy).
    net_sigma = np.sqrt(red.stations.sigma_mv**2 - 5.0**2)
    npt.assert_allclose(net_sigma[2], 2.0, rtol=1e-10)


# ------------------------------------------------------------------ drift, blunder, accuracy

def test_drift_recovered_and_blunder_leg_named():
    survey, truth = grid_survey(noise=0.0, blunder=(30, 40.0), mode="fixed_lead")
    red = reduce_quiet(survey, mode="fixed_lead")
    legs = legs_in_file_order(red)
    assert legs["source_row"].iloc[0] == 2
    w = np.abs(red.qc["legs"]["std_residual"].to_numpy())
    assert np.all(np.diff(w[np.isfinite(w)]) <= 0)  # the table lists the worst legs first
    # Before down-weighting, the whole chain S01-000 .. S01-008 (rows 26-33) shares the
    # largest |standardized residual| (legs in series cannot be told apart by closure alone).
    assert red.qc["legs"]["source_row"].iloc[0] in range(26, 34)
    # The offset applied to each reading must be the invented delta(t): it is linear
    # within each day, so interpolating the start/end checks recovers it to round-off.
    npt.assert_allclose(legs["offset_mv"], delta_true(survey.readings.time), atol=1e-9)
    npt.assert_allclose(legs["correction_mv"], delta_true(survey.readings.time), atol=1e-9)
    # The blunder leg (reading index 30: line E1, S01-006 -> S01-007, CSV row 32) is named.
    blunders = red.network["blunders"]
    assert list(blunders["source_row"]) == [32]
    assert (blunders["from_id"].iloc[0], blunders["to_id"].iloc[0]) == ("S01-006", "S01-007")
    assert any("line 32 (E1: S01-006 -> S01-007" in w for w in red.warnings)
    # With no reading noise, once the blunder is down-weighted every station is exact up to the
    # down-weighting leakage (variance x 1e6: 40 mV * 1e-6 * 18 legs << 1e-3 mV).
    err = error_vs_truth(red, truth)
    npt.assert_allclose(err - err[0], 0.0, atol=1e-3)
    # Decomposition of the contract: sp = raw - drift - tie - terrain.
    st = red.stations
    npt.assert_allclose(st.sp_mv, st.sp_raw_mv - st.drift_mv - st.tie_mv - st.terrain_mv, atol=1e-9)
    # The raw (uncorrected) integration carries the accumulated fixed-lead offset n*delta:
    # at S00-024 it is the sum of delta(t) over the 24 readings of line E0.
    i = list(st.station_id).index("S00-024")
    npt.assert_allclose(st.drift_mv[i], delta_true(survey.readings.time[:24]).sum(), rtol=1e-12)


def test_leapfrog_offsets_alternate_and_cancel():
    # Leapfrog: the pair's roles swap every step, so the offset enters as (-1)**k delta and
    # the accumulated offset stays at 0 or delta (physics.md §4).
    survey, truth = grid_survey(noise=0.0, mode="leapfrog")
    red = reduce_quiet(survey, mode="leapfrog")
    corr = legs_in_file_order(red)["correction_mv"].to_numpy()[:24]
    npt.assert_allclose(corr[0::2], delta_true(survey.readings.time[:24:2]), atol=1e-9)
    npt.assert_allclose(corr[1::2], -delta_true(survey.readings.time[1:24:2]), atol=1e-9)
    err = error_vs_truth(red, truth)
    npt.assert_allclose(err - err[0], 0.0, atol=1e-9)
    assert np.abs(red.stations.drift_mv).max() < 3.0


def _incidence(survey):
    """Incidence matrix of the readings (−1 at from, +1 at to), reference column removed; and the reference."""
    ids = list(survey.stations.station_id)
    pos = {s: i for i, s in enumerate(ids)}
    rd = survey.readings
    m, n = len(rd.dv_mv), len(ids)
    a = np.zeros((m, n))
    a[np.arange(m), [pos[s] for s in rd.from_id]] = -1
    a[np.arange(m), [pos[s] for s in rd.to_id]] = 1
    ref = pos[survey.reference_station]
    return np.delete(a, ref, axis=1), ref


def dense_centred_rms(survey, reading_sigma):
    """Expected RMS of the reduced potentials about their mean, from the dense covariance.

    Independent of geosp: builds the incidence matrix of the readings, Q = sigma^2 (A'A)^-1
    with the reference column removed, and returns sqrt(trace(C Q C) / n) with C the
    centring matrix (errors "up to the reference constant").
    """
    a, ref = _incidence(survey)
    n = a.shape[1] + 1
    q = np.zeros((n, n))
    keep = np.delete(np.arange(n), ref)
    q[np.ix_(keep, keep)] = reading_sigma**2 * np.linalg.inv(a.T @ a)
    c = np.eye(n) - 1.0 / n
    return float(np.sqrt(np.trace(c @ q @ c) / n))


def test_blunder_below_the_network_threshold_is_found_by_its_reading():
    # A 16 mV blunder on reading 30 (E1: S01-006 -> S01-007, CSV row 32) makes its chain
    # misclose at a standardized residual of about 3.1: above blunder_sigma (3) but below
    # the Bonferroni level for this network, so loop closure alone cannot name it. The
    # reading itself stands 16 mV off its neighbours (1 mV reading noise), and
    # down-weighting it closes the chain: it is named as the blunder.
    survey, truth = grid_survey(noise=1.0, seed=11, blunder=(30, 16.0), mode="fixed_lead")
    red = reduce_quiet(survey, mode="fixed_lead", reading_sigma_mv=1.0)
    worst = float(red.qc["legs"]["std_residual"].abs().max())
    assert 3.0 < worst < red.network["blunder_threshold"]
    blunders = red.network["blunders"]
    assert list(blunders["source_row"]) == [32]
    assert blunders["flag"].iloc[0].startswith("blunder: 17.0 mV off its neighbours")
    err = error_vs_truth(red, truth)
    assert np.sqrt(np.mean((err - err.mean()) ** 2)) <= 1.2 * dense_centred_rms(survey, 1.0)


def test_blunder_no_loop_can_check_becomes_uncertainty_of_the_stations_beyond():
    # Tie lines at columns 0, 8 and 16 only: readings 16-23 of row 0 (S00-016 -> S00-024) are a
    # line end that no loop checks. A 30 mV blunder on reading 20 (CSV row 22) cannot be found
    # by loop closure and shifts S00-021..024 by 30 mV. It stands out from its neighbours
    # along the line, so its departure becomes variance: the stations beyond carry about
    # 30 mV of uncertainty, the ones before it do not. (Common practice: an unchecked line end
    # is only as good as its worst reading.)
    survey, _ = grid_survey(noise=1.0, seed=3, tie_cols=(0, 8, 16), blunder=(20, 30.0))
    red = reduce_quiet(survey, reading_sigma_mv=1.0)
    legs = red.qc["legs"]
    unchecked = legs[legs["flag"].str.startswith("unchecked")]
    assert list(unchecked["source_row"]) == [22]
    sigma = dict(zip(red.stations.station_id, red.stations.sigma_mv))
    station_sigma = 5.0  # reduce_survey's default station_sigma_mv, added in quadrature
    beyond = [np.sqrt(sigma[f"S00-{c:03d}"] ** 2 - station_sigma**2) for c in range(21, 25)]
    before = [np.sqrt(sigma[f"S00-{c:03d}"] ** 2 - station_sigma**2) for c in range(16, 21)]
    assert min(beyond) > 25.0 and max(before) < 5.0
    # The same survey without the blunder: nothing stands out, nothing is inflated.
    clean, _ = grid_survey(noise=1.0, seed=3, tie_cols=(0, 8, 16))
    red = reduce_quiet(clean, reading_sigma_mv=1.0)
    assert not red.qc["legs"]["flag"].str.startswith("unchecked").any()


def test_misclosure_spread_over_a_chain_is_only_suspect():
    # The same 16 mV, spread as 2 mV on each of the 8 readings of that chain (rows 26-33):
    # the chain misclosure is the same, but no single reading stands out, so nothing is
    # named a blunder; the chain's legs are marked suspect instead.
    survey, _ = grid_survey(noise=1.0, seed=11, mode="fixed_lead")
    dv = survey.readings.dv_mv.copy()
    dv[24:32] += 2.0
    survey = replace(survey, readings=replace(survey.readings, dv_mv=dv))
    red = reduce_quiet(survey, mode="fixed_lead", reading_sigma_mv=1.0)
    assert red.network["blunders"].empty
    legs = red.qc["legs"]
    suspect = legs[legs["flag"].str.startswith("suspect")]
    assert set(suspect["source_row"]) == set(range(26, 34))


def test_reduced_matches_truth_within_noise_budget():
    # Drift, 1 mV reading noise and one 40 mV blunder. Stated budget: the RMS (about the mean)
    # of reduced minus true potentials should be the reading-noise-implied RMS from the dense
    # covariance of this network (independent numpy inverse); allow 1.2x for one realisation.
    survey, truth = grid_survey(noise=1.0, seed=11, blunder=(30, 40.0), mode="fixed_lead")
    red = reduce_quiet(survey, mode="fixed_lead", reading_sigma_mv=1.0)
    err = error_vs_truth(red, truth)
    rms = np.sqrt(np.mean((err - err.mean()) ** 2))
    budget = dense_centred_rms(survey, 1.0)
    assert rms <= 1.2 * budget, (rms, budget)
    assert list(red.network["blunders"]["source_row"]) == [32]
    # Without the drift correction the fixed-lead offset accumulates (about 2.4 mV per
    # reading), far outside the budget: the check can fail.
    raw = error_vs_truth(reduce_quiet(survey, drift=False), truth)
    assert np.sqrt(np.mean((raw - raw.mean()) ** 2)) > 5 * budget


# ------------------------------------------------------------------ statistics of the closure

@pytest.mark.slow
def test_closure_chi2_follows_chi_square_distribution():
    # Theory: with Gaussian reading noise of the stated sigma, the weighted sum of squared
    # residuals of a least-squares adjustment is chi-square with dof = number of independent
    # loops [Ghilani2010]. 200 small networks (3 lines x 9 stations, 3 ties: dof 4);
    # one-sample KS test against scipy.stats.chi2(dof) at the 1 % level (a fixed seed, so
    # the outcome is deterministic; a wrong dof or weight moves the p-value to ~0).
    chi2, dof, pvals = [], set(), []
    for seed in range(200):
        survey, _ = grid_survey(n_rows=3, n_cols=9, tie_cols=(0, 4, 8), noise=1.5, seed=seed,
                                offsets=False)
        red = reduce_quiet(survey, drift=False, reading_sigma_mv=1.5, blunder_sigma=np.inf)
        chi2.append(red.network["chi2"])
        dof.add(red.network["dof"])
        pvals.append(red.network["p_value"])
    assert dof == {4}
    assert stats.kstest(chi2, stats.chi2(4).cdf).pvalue > 0.01
    # The reported p-values are then uniform on [0, 1].
    assert stats.kstest(pvals, "uniform").pvalue > 0.01
    # Misstated noise (true 1.5 mV, stated 1.0 mV) must be detected by the same test.
    wrong = [c * 1.5**2 for c in chi2]
    assert stats.kstest(wrong, stats.chi2(4).cdf).pvalue < 1e-6


@settings(max_examples=15, deadline=None)
@given(seed=hs.integers(0, 10_000), ref_index=hs.integers(0, 44))
def test_reference_choice_changes_potentials_by_a_constant(seed, ref_index):
    # Property of the least-squares adjustment: fixing a different node at 0 shifts every
    # potential by the same constant (the solution is unique up to the datum).
    survey, _ = grid_survey(n_rows=3, n_cols=15, tie_cols=(0, 7, 14), noise=1.0, seed=seed,
                            offsets=False)
    base = reduce_quiet(survey, drift=False, blunder_sigma=np.inf)
    other = survey.stations.station_id[ref_index]
    moved = reduce_quiet(Survey(stations=survey.stations, faults=(), crs=survey.crs,
                                readings=survey.readings, reference_station=other),
                         drift=False, blunder_sigma=np.inf)
    shift = moved.stations.sp_mv - base.stations.sp_mv
    npt.assert_allclose(shift, shift[0], atol=1e-9)
    npt.assert_allclose(moved.stations.sp_mv[ref_index], 0.0, atol=1e-12)
    npt.assert_allclose(moved.network["chi2"], base.network["chi2"], rtol=1e-9)


def test_auto_mode_picks_leapfrog_when_loops_can_tell():
    # Loops that go out and back along the same line see the leapfrog/fixed-lead difference
    # only through the drift; a single loop read out on one line and back on another with a
    # large offset (6 mV, above the common-practice 5 mV: warned) makes it decisive.
    n = 12
    ids = [f"A{i:02d}" for i in range(n)]
    east = np.r_[np.arange(6) * 50.0, np.arange(6)[::-1] * 50.0]
    north = np.r_[np.zeros(6), np.full(6, 100.0)]
    v = true_potential(east, north)
    frm, to = ids, ids[1:] + ids[:1]
    times = DAY1 + np.arange(n) * np.timedelta64(300, "s")
    k = np.arange(n)
    dv = np.array([v[(i + 1) % n] - v[i] for i in range(n)]) + np.where(k % 2 == 0, 6.0, -6.0)
    st = Stations(station_id=ids, easting=east, northing=north, upward=np.full(n, np.nan),
                  sp_mv=np.full(n, np.nan), crs="EPSG:32633")
    rd = Readings(line_id=np.array(["L1"] * n), from_id=np.array(frm), to_id=np.array(to),
                  time=times, dv_mv=dv, source_row=np.arange(2, n + 2), path="ring.csv")
    ck = ElectrodeChecks(time=np.array([DAY1, DAY1 + np.timedelta64(2, "h")], "datetime64[s]"),
                         offset_mv=np.array([6.0, 6.0]), source_row=np.array([2, 3]), path="ck.csv")
    survey = Survey(stations=st, faults=(), crs="EPSG:32633", readings=rd, electrode_checks=ck)
    with pytest.warns(UserWarning, match="common practice"):
        red = reduce_survey(survey, reading_sigma_mv=0.5, station_sigma_mv=0.0)
    # Fixed-lead would leave a misclosure of 12 x 6 = 72 mV: chi2 = 72^2/(12*0.25) = 1728.
    assert red.network["mode"] == "leapfrog"
    npt.assert_allclose(red.network["chi2_by_mode"]["fixed_lead"], 72.0**2 / (12 * 0.25), rtol=1e-9)
    npt.assert_allclose(red.stations.sp_mv, v - v[0], atol=1e-9)


# ------------------------------------------------------------------ warnings and bad input

def test_warns_on_large_offset_drift_and_days_without_checks():
    survey, _ = grid_survey(noise=0.0)
    checks = ElectrodeChecks(time=np.array([DAY1, DAY1 + np.timedelta64(10, "h")], "datetime64[s]"),
                             offset_mv=np.array([2.0, 7.5]), source_row=np.array([2, 3]),
                             path="electrode_checks.csv")
    survey = Survey(stations=survey.stations, faults=(), crs=survey.crs, readings=survey.readings,
                    electrode_checks=checks, reference_station=survey.reference_station)
    with pytest.warns(UserWarning) as record:
        red = reduce_survey(survey, mode="fixed_lead")
    text = " ".join(str(w.message) for w in record)
    assert "line 3 (7.5 mV)" in text and "common practice" in text  # offset above 5 mV
    assert "changed by +5.5 mV on 2026-03-02" in text  # drift above 1 mV/day
    assert "no electrode check on 2026-03-03" in text
    assert set(red.warnings) >= {str(w.message) for w in record if "electrode" in str(w.message)}
    days = red.qc["days"].set_index("day")
    assert not days.loc[np.datetime64("2026-03-03"), "corrected"]
    day2 = survey.readings.time >= DAY2
    npt.assert_allclose(legs_in_file_order(red)["correction_mv"].to_numpy()[day2], 0.0)


def _with_readings(survey, **changes):
    rd = survey.readings
    fields = dict(line_id=rd.line_id, from_id=rd.from_id, to_id=rd.to_id, time=rd.time,
                  dv_mv=rd.dv_mv, source_row=rd.source_row, path=rd.path)
    fields.update(changes)
    return Survey(stations=survey.stations, faults=(), crs=survey.crs, readings=Readings(**fields),
                  reference_station=survey.reference_station)


def test_unknown_stations_are_listed_with_rows():
    survey, _ = grid_survey(offsets=False)
    to = survey.readings.to_id.copy()
    to[[3, 5, 7, 9, 11, 13, 15]] = "X-99"
    with pytest.raises(InputError) as err:
        reduce_quiet(_with_readings(survey, to_id=to), drift=False)
    msg = str(err.value)
    assert "dipoles.csv" in msg and "unknown stations" in msg
    assert "line 5 (X-99)" in msg and "and 2 more" in msg  # capped list


def test_time_running_backwards_and_duplicates_are_input_errors():
    survey, _ = grid_survey(offsets=False)
    time = survey.readings.time.copy()
    time[10] = time[9] - np.timedelta64(600, "s")
    with pytest.raises(InputError, match=r"time runs backwards .* line 12 \(E0\)"):
        reduce_quiet(_with_readings(survey, time=time), drift=False)
    rd = survey.readings
    dup = {name: np.r_[getattr(rd, name), getattr(rd, name)[4:5]]
           for name in ("line_id", "from_id", "to_id", "time", "dv_mv")}
    dup["source_row"] = np.r_[rd.source_row, 999]
    with pytest.raises(InputError, match=r"duplicate readings .* line 999"):
        reduce_quiet(_with_readings(survey, **dup), drift=False)


def test_network_not_connected_to_reference_names_lines():
    survey, _ = grid_survey(offsets=False)
    rd = survey.readings
    keep = ~np.isin(rd.line_id, ["N0", "N8", "N16", "N24"]) | (rd.line_id == "N0")
    keep &= ~((rd.line_id == "N0") & np.isin(rd.from_id, ["S02-000", "S03-000"]))
    sub = {name: getattr(rd, name)[keep] for name in
           ("line_id", "from_id", "to_id", "time", "dv_mv", "source_row")}
    with pytest.raises(InputError) as err:
        reduce_quiet(_with_readings(survey, **sub), drift=False)
    msg = str(err.value)
    assert "not connected to the reference station S00-000" in msg
    assert "E3, E4" in msg and "E0" not in msg.split("(readings")[0]


def test_bad_option_is_an_option_error():
    from geosp.errors import OptionError
    survey, _ = grid_survey(offsets=False)
    with pytest.raises(OptionError, match="mode = 'zigzag'"):
        reduce_survey(survey, mode="zigzag")


# ------------------------------------------------------------------ total field: ties, outliers, terrain

def total_field_survey(values, east, north, *, ids=None, times=None, line=None, upward=None,
                       faults=(), dem=False, reference=""):
    n = len(values)
    st = Stations(station_id=ids if ids is not None else [f"T{i:03d}" for i in range(n)],
                  easting=east, northing=north,
                  upward=upward if upward is not None else np.full(n, np.nan), sp_mv=values,
                  crs="EPSG:32633", line_id=line, time=times)
    from geosp.models import Raster
    grid = Raster(easting=np.array([0.0, 1.0]), northing=np.array([0.0, 1.0]),
                  values=np.zeros((2, 2)), crs="EPSG:32633", units="m") if dem else None
    return Survey(stations=st, faults=tuple(faults), crs="EPSG:32633", dem=grid,
                  reference_station=reference)


def test_base_ties_remove_linear_drift_and_collapse_repeats():
    # Fixed-base survey: the base B reoccupied every 2 h; the whole reading set drifts by a
    # piecewise-linear d(t) with breaks at the reoccupations, which linear interpolation of the
    # base readings removes exactly (physics.md §4, base ties).
    rng = np.random.default_rng(4)
    n_rover = 40
    t_rover = DAY1 + np.sort(rng.uniform(0, 6 * 3600, n_rover)).astype("timedelta64[s]")
    t_base = DAY1 + np.array([0, 2, 4, 6]) * np.timedelta64(3600, "s")
    d_base = np.array([0.0, 3.0, 5.0, 4.0])

    def d(t):
        return np.interp((t - DAY1).astype(float), (t_base - DAY1).astype(float), d_base)

    east = rng.uniform(0, 1000, n_rover)
    north = rng.uniform(0, 1000, n_rover)
    v = true_potential(east, north)
    ids = ["B"] * 4 + [f"R{i:02d}" for i in range(n_rover)]
    times = np.r_[t_base, t_rover].astype("datetime64[s]")
    values = np.r_[np.full(4, 0.0) + d_base, v + d(t_rover)]
    survey = total_field_survey(values, np.r_[np.full(4, 500.0), east], np.r_[np.full(4, 500.0), north],
                                ids=ids, times=times, reference="B")
    red = reduce_quiet(survey)
    st = red.stations
    assert len(st) == n_rover + 1 and len(set(st.station_id)) == len(st)
    npt.assert_allclose(st.sp_mv[1:], v, atol=1e-9)
    npt.assert_allclose(st.sp_mv[0], 0.0, atol=1e-12)
    npt.assert_allclose(st.tie_mv[1:], d(t_rover), atol=1e-9)
    npt.assert_allclose(st.sp_raw_mv[0], d_base.mean())  # the base's raw value: mean of its readings
    npt.assert_allclose(st.sp_mv, st.sp_raw_mv - st.drift_mv - st.tie_mv - st.terrain_mv, atol=1e-12)
    assert red.qc["ties"]["max_change_mv"].iloc[0] == 5.0
    assert red.network == {}


def test_total_field_without_repeats_has_zero_ties():
    east = np.arange(30) * 20.0
    v = true_potential(east, 0 * east)
    red = reduce_quiet(total_field_survey(v, east, 0 * east, line=["L"] * 30))
    npt.assert_array_equal(red.stations.tie_mv, 0.0)
    npt.assert_allclose(red.stations.sp_mv, v)
    assert set(red.profiles) == {"L"}
    npt.assert_allclose(red.profiles["L"]["distance_m"], east)


def test_outlier_flagged_with_reason_and_down_weighted_not_dropped():
    # Running median over 7 stations and 4 x 1.4826 MAD (physics.md §4, common practice).
    # 2 mV Gaussian noise; a 40 mV spike at station 17 is about 20 sigma out: flagged, and
    # with this seed no other station exceeds 4 x max(MAD scale, station_sigma_mv).
    rng = np.random.default_rng(2)
    east = np.arange(60) * 20.0
    v = true_potential(east, 0 * east) + rng.normal(0, 2.0, 60)
    v[17] += 40.0
    red = reduce_quiet(total_field_survey(v, east, 0 * east, line=["L"] * 60),
                       station_sigma_mv=2.0)
    st = red.stations
    flagged = np.flatnonzero(st.flag != "")
    assert list(flagged) == [17]
    assert st.flag[17].startswith("outlier: ") and "mV from the running median" in st.flag[17]
    assert 30 <= float(st.flag[17].split()[1]) <= 50
    assert st.weight[17] == 0.25 and np.all(np.delete(st.weight, 17) == 1.0)
    npt.assert_allclose(st.sp_mv, v)  # never dropped or changed
    assert len(st) == 60


def test_terrain_slope_recovered_away_from_fault_corridor():
    # SP = b * elevation + a positive anomaly under a ridge along a fault (upflow), 1 mV noise.
    # True b = -0.8 mV/m. The Theil-Sen slope on stations farther than 300 m from the fault
    # must bracket b in its 95 % interval; using every station (corridor 0) is biased by the
    # anomaly that sits on the high ground (the pitfall in physics.md §4).
    rng = np.random.default_rng(8)
    e, n = np.meshgrid(np.arange(0, 2000, 50.0), np.arange(0, 2000, 50.0))
    e, n = e.ravel(), n.ravel()
    dist = np.abs(e - 1000.0)
    elev = 600 + 40 * np.exp(-(dist / 400) ** 2) + 0.02 * n
    sp = -0.8 * elev + 60 * np.exp(-(dist / 100) ** 2) + rng.normal(0, 1.0, e.size)
    fault = Fault("F1", np.array([[1000.0, -100.0], [1000.0, 2100.0]]))
    survey = total_field_survey(sp, e, n, upward=elev, faults=[fault], dem=True)
    red = reduce_quiet(survey, station_sigma_mv=1.0)
    ter = red.terrain
    assert ter["applied"] and ter["ci_lo"] <= -0.8 <= ter["ci_hi"]
    assert abs(ter["slope_mv_per_m"] + 0.8) < 0.05
    assert ter["n_near_faults"] == np.sum(dist < 300)
    npt.assert_allclose(red.stations.terrain_mv,
                        ter["slope_mv_per_m"] * (elev - np.median(elev)), rtol=1e-12)
    biased = reduce_quiet(survey, station_sigma_mv=1.0, terrain_corridor_m=0.0).terrain
    assert not (biased["ci_lo"] <= -0.8 <= biased["ci_hi"])
    # "auto" without a DEM: no terrain correction.
    no_dem = total_field_survey(sp, e, n, upward=elev, faults=[fault], dem=False)
    assert not reduce_quiet(no_dem).terrain["applied"]


# ------------------------------------------------------------------ figures

def test_figures_are_labelled_matplotlib_figures():
    from matplotlib.figure import Figure

    from geosp.figures.reduce import drift_figure, misclosure_figure, profiles_figure
    survey, _ = grid_survey(noise=1.0, seed=3, blunder=(30, 40.0))
    red = reduce_quiet(survey, mode="fixed_lead")
    for fig in (misclosure_figure(red), profiles_figure(red, max_lines=3), drift_figure(red)):
        assert isinstance(fig, Figure)
        axes = [ax for ax in fig.axes if ax.get_visible()]
        assert all(ax.get_title() and ax.get_xlabel() for ax in axes)
        assert all("(" in ax.get_ylabel() for ax in axes)  # units in the label
        fig.canvas.draw()  # renders with the Agg canvas
    assert len(profiles_figure(red, max_lines=3).axes) == 3
    assert misclosure_figure(red).axes[0].get_title().startswith("Loop misclosures: χ²")
    # A total-field survey has no loops and no checks: a one-panel note, no error.
    east = np.arange(10) * 20.0
    tf = reduce_quiet(total_field_survey(true_potential(east, 0 * east), east, 0 * east))
    assert isinstance(misclosure_figure(tf), Figure) and isinstance(drift_figure(tf), Figure)


def test_station_without_readings_is_flagged_not_given_a_value():
    survey, _ = grid_survey(offsets=False)
    st = survey.stations
    extra = Stations(station_id=np.append(st.station_id, "LONE"), easting=np.r_[st.easting, 5000.0],
                     northing=np.r_[st.northing, 0.0], upward=np.r_[st.upward, np.nan],
                     sp_mv=np.r_[st.sp_mv, np.nan], crs=st.crs)
    survey = Survey(stations=extra, faults=(), crs=st.crs, readings=survey.readings)
    with pytest.warns(UserWarning, match="1 stations have no gradient reading"):
        red = reduce_survey(survey, drift=False)
    assert red.stations.flag[-1] == "no reading" and red.stations.weight[-1] == 0.0
    assert np.isnan(red.stations.sp_mv[-1])
    # The plain integration's sigma grows as sqrt(n) * sigma_r (physics.md §4, integration).
    integ = red.qc["integration"].set_index("station_id")
    assert integ.loc["S00-024", "n_readings"] == 24
    npt.assert_allclose(integ.loc["S00-024", "raw_sigma_mv"], np.sqrt(24.0))


# ------------------------------------------------------------------ the error model, pinned


def _dense_adjustment(survey, reading_sigma):
    """Least squares of the readings by numpy alone: (posterior variances, chi2, dof)."""
    a, ref = _incidence(survey)
    rd = survey.readings
    m, n = a.shape[0], a.shape[1] + 1
    x, *_ = np.linalg.lstsq(a, rd.dv_mv, rcond=None)
    r = rd.dv_mv - a @ x
    chi2 = float(r @ r) / reading_sigma**2
    var = np.zeros(n)
    var[np.delete(np.arange(n), ref)] = reading_sigma**2 * np.diag(np.linalg.inv(a.T @ a))
    return var, chi2, m - (n - 1)


def test_network_chi2_above_its_dof_scales_the_station_sigma():
    # Readings with 2.5 mV noise reduced with reading_sigma_mv = 1 (a draw in which no leg is
    # flagged): loop closure gives χ²/dof = 2.6, and the stations' network uncertainty is the
    # posterior one scaled by sqrt(χ²/dof) (a posteriori variance of unit weight, as for a
    # levelling network [Ghilani2010]), combined in quadrature with station_sigma_mv.
    # Reference: the dense least squares above.
    survey, _ = grid_survey(noise=2.5, seed=2, offsets=False)
    red = reduce_quiet(survey, reading_sigma_mv=1.0, station_sigma_mv=2.0, drift=False)
    assert (red.qc["legs"]["flag"] == "").all()
    var, chi2, dof = _dense_adjustment(survey, 1.0)
    assert red.network["chi2"] == pytest.approx(chi2, rel=1e-6) and red.network["dof"] == dof
    assert chi2 / dof > 2.0
    expected = np.sqrt(var * chi2 / dof + 2.0**2)
    order = [list(survey.stations.station_id).index(s) for s in red.stations.station_id]
    npt.assert_allclose(red.stations.sigma_mv, expected[order], rtol=1e-6)


def test_blunder_test_level_is_five_percent_bonferroni():
    # The blunder threshold is the two-sided 5 % Bonferroni level over the legs that loops
    # check, max(blunder_sigma, z(0.025 / n)) [Ghilani2010]. Pinned against scipy, and by
    # simulation: blunder-free networks are flagged at most about 5 % of the time (binomial
    # test at the 1 % level).
    survey, _ = grid_survey(noise=1.0, seed=8, offsets=False)
    red = reduce_quiet(survey, reading_sigma_mv=1.0, drift=False)
    n_checked = int(np.isfinite(red.qc["legs"]["std_residual"]).sum())
    assert red.network["blunder_threshold"] == pytest.approx(max(3.0, stats.norm.isf(0.025 / n_checked)))
    flagged = 0
    for seed in range(100):
        s, _ = grid_survey(noise=1.0, seed=2000 + seed, offsets=False)
        flagged += int(len(reduce_quiet(s, reading_sigma_mv=1.0, drift=False).network["blunders"]) > 0)
    assert stats.binomtest(flagged, 100, 0.05, alternative="greater").pvalue > 0.01, flagged
