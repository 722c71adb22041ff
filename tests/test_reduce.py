"""Tests of the field reduction (geosp.reduce) on synthetic surveys built in code."""

from __future__ import annotations

import warnings

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
    legs = red.qc["legs"]
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
    corr = red.qc["legs"]["correction_mv"].to_numpy()[:24]
    npt.assert_allclose(corr[0::2], delta_true(survey.readings.time[:24:2]), atol=1e-9)
    npt.assert_allclose(corr[1::2], -delta_true(survey.readings.time[1:24:2]), atol=1e-9)
    err = error_vs_truth(red, truth)
    npt.assert_allclose(err - err[0], 0.0, atol=1e-9)
    assert np.abs(red.stations.drift_mv).max() < 3.0


def dense_centred_rms(survey, reading_sigma):
    """Expected RMS of the reduced potentials about their mean, from the dense covariance.

    Independent of geosp: builds the incidence matrix of the readings, Q = sigma^2 (A'A)^-1
    with the reference column removed, and returns sqrt(trace(C Q C) / n) with C the
    centring matrix (errors "up to the reference constant").
    """
    ids = list(survey.stations.station_id)
    pos = {s: i for i, s in enumerate(ids)}
    rd = survey.readings
    m, n = len(rd.dv_mv), len(ids)
    a = np.zeros((m, n))
    a[np.arange(m), [pos[s] for s in rd.from_id]] = -1
    a[np.arange(m), [pos[s] for s in rd.to_id]] = 1
    ref = pos[survey.reference_station]
    a = np.delete(a, ref, axis=1)
    q = np.zeros((n, n))
    keep = np.delete(np.arange(n), ref)
    q[np.ix_(keep, keep)] = reading_sigma**2 * np.linalg.inv(a.T @ a)
    c = np.eye(n) - 1.0 / n
    return float(np.sqrt(np.trace(c @ q @ c) / n))


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
