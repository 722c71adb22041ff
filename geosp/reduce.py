"""
Field reduction of SP surveys: electrode offset and drift, base ties, loop
closure, terrain effect and outlier flags.

The entry point is :func:`reduce_survey`. Its keyword-only options are the
keys of the ``[reduce]`` section of the project file.

Decomposition of the result (all in mV, see ``geosp.models.Stations``)::

    sp_mv = sp_raw_mv - drift_mv - tie_mv - terrain_mv

* Gradient surveys: ``sp_raw_mv`` is the plain integration of the readings
  as read (no offset correction, no adjustment) from the reference station
  along a breadth-first spanning tree of the readings (earlier readings
  first). ``drift_mv`` is the electrode-offset correction integrated along
  the same path. ``tie_mv`` is what the network adjustment changed
  (integrated corrected value minus adjusted potential). The reference
  station has all three at 0.
* Total-field surveys: ``sp_raw_mv`` is the file value (the mean over
  reoccupations of a repeated station), ``drift_mv`` is 0 and ``tie_mv`` is
  the base-tie correction interpolated in time plus, when a reference
  station is named, the constant that brings it to 0 mV (no reference
  named: values stay relative to the survey's own base).
* ``terrain_mv`` is ``b * (elevation - median elevation)`` where the terrain
  correction applies, else 0.

Base ties: every station id that occurs more than once with times is a base
or tie station; the changes of its value since its first occupation are
interpolated linearly in time and subtracted from every reading inside its
time span (averaged where spans overlap; no tie outside every span). Repeats
then collapse to one station (first position, mean values).

References
----------
* [Ghilani2010]_ levelling-network adjustment, standardized residuals.
* [Telford1990]_, [RevilJardani2013]_ SP field procedure (gradient and fixed-base surveys).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import breadth_first_order, connected_components

from geosp._network import adjust_network
from geosp.errors import InputError, InputErrors, OptionError, format_rows
from geosp.models import Reduction

_MODES = ("auto", "leapfrog", "fixed_lead")
_DOWNWEIGHT = 1e6  # variance multiplier of a leg found to be a blunder
_MAX_SNOOP = 20  # at most this many blunders are down-weighted, one per solve
# A reading this many robust standard deviations (1.4826 MAD) away from the running median of
# its line's readings stands out (the outlier rule of common practice, applied to gradients).
_READING_OUTLIER_Z = 4.0
_STEP_REACH = 3  # stations on each side whose median potentials measure a step
# Fewest independent loops for the loop-closure variance factor to scale the network covariance.
_MIN_LOOPS_FOR_FACTOR = 10
_SAME_PLACE_M = 5.0  # repeated station ids farther apart than this get a warning
_DECISIVE_CHI2 = 10.0  # mode "auto" picks a mode only when loop chi2 differ by more than this


class _Notes(list):
    """Warnings issued with :func:`warnings.warn` and kept as text."""

    def add(self, text):
        warnings.warn(text, UserWarning, stacklevel=4)
        self.append(text)


def reduce_survey(
    survey,
    *,
    drift=True,
    mode="auto",
    reading_sigma_mv=1.0,
    station_sigma_mv=5.0,
    blunder_sigma=3.0,
    terrain="auto",
    terrain_corridor_m=300.0,
    terrain_min_stations=10,
    terrain_slope_mv_per_m="auto",
    terrain_refine=True,
    outlier_window=7,
    outlier_mads=4.0,
    outlier_weight=0.25,
    max_offset_mv=5.0,
    max_drift_mv_per_day=1.0,
):
    """
    Reduce raw SP field data to a total-field map referenced to one station.

    Parameters
    ----------
    survey : geosp.models.Survey
        Stations in the working CRS (repeated ``station_id`` = reoccupations
        of a base or tie station), optional gradient readings and electrode
        checks, faults, optional DEM and reference station (for gradient
        readings the default is the first station read, the from-station of
        the first reading in file order).
    drift : bool, optional
        Correct gradient readings for the electrode-pair offset δ(t),
        interpolated linearly in time between the electrode checks of each
        day. Default True.
    mode : {"auto", "leapfrog", "fixed_lead"}, optional
        How the electrode pair moved. ``"leapfrog"``: the rear electrode
        moves ahead each step, so the pair's roles swap and the offset enters
        reading k of a line (file order, k = 0, 1, ...) as (-1)**k δ; the
        first reading of each line has the pair as in the checks.
        ``"fixed_lead"``: the same electrode leads, each reading carries +δ.
        ``"auto"``: both are tried and the one with the smaller loop-closure
        χ² is kept; when loop closure cannot tell them apart (or there are
        no loops) leapfrog, the usual field practice, is assumed with a
        warning.
        Default "auto".
    reading_sigma_mv : float, optional
        1-sigma noise of one gradient reading, mV. Default 1.0.
    station_sigma_mv : float, optional
        1-sigma soil and contact noise of a station value, mV (common
        practice 5-10 mV). Added in quadrature to the network uncertainty in
        ``sigma_mv``. Default 5.0.
    blunder_sigma : float, optional
        Standardized-residual threshold for a blunder leg. The threshold used
        is raised to the two-sided Bonferroni 5 % level for large networks so
        that a blunder-free network trips it with probability about 5 %. Legs
        above it are down-weighted one at a time (data snooping) and named in
        the warnings. Default 3.0.
    terrain : {"auto", True, False}, optional
        Remove a linear SP-elevation trend. ``"auto"``: only when the survey
        has a DEM. Default "auto".
    terrain_corridor_m : float, optional
        Stations closer than this to a mapped fault, m, are left out of the
        slope estimate (upflow anomalies often sit under highs). Default 300.
    terrain_min_stations : int, optional
        Minimum number of stations for the slope estimate. Default 10.
    terrain_slope_mv_per_m : "auto" or float, optional
        SP change per metre of elevation, mV/m. ``"auto"`` estimates it
        (Theil-Sen) from the stations away from the faults; a number is used
        as given. Default "auto".
    terrain_refine : bool, optional
        With an estimated slope, let the pipeline re-estimate it once after
        the fit from all stations with the fitted sources removed
        (:func:`refine_terrain_slope`) and re-run the later stages: anomalies
        reach beyond any fault corridor, and upflows often sit under highs,
        so the first estimate is biased where they do. Default True.
    outlier_window : int, optional
        Running-median window along each line, stations (5-7 is common
        practice). Default 7.
    outlier_mads : float, optional
        Flag stations farther than this many 1.4826·MAD from the running
        median (after removing the line's median step); the MAD scale is
        never taken below ``max(station_sigma_mv, reading_sigma_mv)``, so
        deviations within the stated noise are not flagged. Default 4.0.
    outlier_weight : float, optional
        Weight given to flagged stations (they are never dropped). Default 0.25.
    max_offset_mv : float, optional
        Warn when an electrode check exceeds this offset, mV (common practice:
        recondition above about 5 mV). Default 5.0.
    max_drift_mv_per_day : float, optional
        Warn when the offset changes by more than this between the first and
        last check of a day, mV (common practice: below about 1 mV/day).
        Default 1.0.

    Returns
    -------
    geosp.models.Reduction
        Reduced stations (one per station id; ``sp_mv`` in mV relative to the
        reference), QC tables, terrain and network summaries, profiles per
        line and the warnings issued. ``qc`` holds DataFrames: ``legs`` (one
        row per reading, largest |standardized residual| first: offset,
        correction, residual, standardized residual before and after
        down-weighting, redundancy, flag, ``source_row``), ``loops`` (one
        row per independent loop: misclosure and its sigma in mV), ``lines``,
        ``days`` (electrode checks and drift per day), ``checks``,
        ``integration`` (readings from the reference and the 1-sigma of the
        plain integration, sqrt(n) * reading_sigma_mv) and, for total-field
        surveys, ``ties``. ``network`` holds ``chi2``, ``dof``, ``p_value``
        (after down-weighting blunders), ``chi2_initial``, ``mode``,
        ``blunders`` (DataFrame), ``sigma_scale`` and more; it is empty
        without readings. ``terrain`` holds ``applied``, ``slope_mv_per_m``,
        ``ci_lo``, ``ci_hi`` (95 %), ``n_used``, ``n_near_faults``,
        ``reference_elevation_m``. ``profiles`` maps line id to arrays
        ``station_id``, ``distance_m``, ``raw_mv``, ``reduced_mv``,
        ``sigma_mv``, ``flag``.

    Raises
    ------
    InputError
        Readings on unknown stations, readings with time running backwards
        within a day on a line, duplicate readings, an unknown reference
        station, or lines not connected to the reference.
    OptionError
        An option outside its range.

    Notes
    -----
    Network adjustment: every reading is an observation
    ``V(to) - V(from) = dv_mv - s_k δ(t_k)`` with variance
    ``reading_sigma_mv**2``; the node potentials are solved by sparse
    weighted least squares with the reference at 0 (see
    ``geosp._network``), as for a levelling network [Ghilani2010]_.
    ``network["chi2"]`` is compared with its degrees of freedom (the number
    of independent loops). Station ``sigma_mv`` combines the exact
    posterior network variance, scaled by ``sqrt(max(1, chi2/dof))``, with
    ``station_sigma_mv``.

    References
    ----------
    * [Ghilani2010]_
    * [Telford1990]_
    """
    check_reduce_options(mode=mode, reading_sigma_mv=reading_sigma_mv, station_sigma_mv=station_sigma_mv,
                         blunder_sigma=blunder_sigma, terrain=terrain, terrain_corridor_m=terrain_corridor_m,
                         terrain_min_stations=terrain_min_stations,
                         terrain_slope_mv_per_m=terrain_slope_mv_per_m, outlier_window=outlier_window,
                         outlier_mads=outlier_mads, outlier_weight=outlier_weight)
    notes = _Notes()
    readings = survey.readings
    gradient = readings is not None and len(readings.dv_mv) > 0
    qc = {}
    network = {}
    if gradient:
        stations = _collapse_stations(survey.stations, notes)
        st, info = _reduce_gradient(
            stations, readings, survey.electrode_checks, survey.reference_station, notes,
            drift=drift, mode=mode, reading_sigma=reading_sigma_mv, blunder_sigma=blunder_sigma,
            window=outlier_window, max_offset=max_offset_mv, max_drift=max_drift_mv_per_day,
            station_sigma=station_sigma_mv)
        network, qc, lines = info["network"], info["qc"], info["lines"]
    else:
        st, qc["ties"] = _tie_total_field(survey.stations, survey.reference_station, notes)
        qc["days"] = pd.DataFrame()
        lines = _lines_from_stations(st)
    value = st.sp_raw_mv - st.drift_mv - st.tie_mv
    net_sigma = np.where(np.isfinite(st.sigma_mv), st.sigma_mv, 0.0)

    flag, weight = st.flag.copy(), st.weight.copy()
    _flag_outliers(value, st, lines, flag, weight, notes, window=outlier_window,
                   mads=outlier_mads, floor=max(station_sigma_mv, reading_sigma_mv),
                   outlier_weight=outlier_weight)

    use_terrain = (survey.dem is not None) if terrain == "auto" else bool(terrain)
    terrain_mv, terrain_info = _terrain_effect(
        value, st, survey.faults, flag, notes, apply=use_terrain,
        corridor_m=terrain_corridor_m, min_stations=terrain_min_stations,
        slope=None if terrain_slope_mv_per_m == "auto" else float(terrain_slope_mv_per_m))
    terrain_info["refine"] = bool(terrain_refine) and terrain_slope_mv_per_m == "auto"

    sigma = np.where(np.isfinite(value), np.hypot(net_sigma, station_sigma_mv), np.nan)
    st = st.replace(sp_mv=value - terrain_mv, terrain_mv=terrain_mv, flag=flag,
                    weight=weight, sigma_mv=sigma)
    qc["lines"] = _line_table(st, lines, qc.get("legs"))
    profiles = _profiles(st, lines)
    qc.setdefault("loops", pd.DataFrame())
    qc.setdefault("legs", pd.DataFrame())
    return Reduction(stations=st, qc=qc, terrain=terrain_info, network=network,
                     profiles=profiles, warnings=tuple(notes))


# --------------------------------------------------------------------------- options

def check_reduce_options(**options):
    """
    Refuse out-of-range ``[reduce]`` options with an OptionError (exit 2).

    Takes :func:`reduce_survey`'s keyword options (missing ones at their
    defaults); called by :func:`reduce_survey`, by every run before anything
    is written and by ``geosp check``.
    """
    import inspect

    a = {name: p.default for name, p in inspect.signature(reduce_survey).parameters.items()
         if p.default is not inspect.Parameter.empty}
    a.update(options)
    _check_options(a["mode"], a["reading_sigma_mv"], a["station_sigma_mv"], a["blunder_sigma"], a["terrain"],
                   a["terrain_corridor_m"], a["terrain_min_stations"], a["outlier_window"], a["outlier_mads"],
                   a["outlier_weight"])
    slope = a["terrain_slope_mv_per_m"]
    if slope != "auto" and not (isinstance(slope, (int, float)) and not isinstance(slope, bool)
                                and np.isfinite(slope)):
        from .errors import OptionError

        raise OptionError("[reduce]", f"terrain_slope_mv_per_m = {slope!r} must be "
                          "\"auto\" or a number in mV/m.", "For example terrain_slope_mv_per_m = -0.5.")


def _check_options(mode, reading_sigma, station_sigma, blunder_sigma, terrain, corridor,
                   min_stations, window, mads, outlier_weight):
    where = "[reduce]"
    problems = []
    if mode not in _MODES:
        problems.append(f"mode = {mode!r} is not one of {', '.join(_MODES)}.")
    for name, value in (("reading_sigma_mv", reading_sigma), ("blunder_sigma", blunder_sigma),
                        ("outlier_mads", mads)):
        if not (isinstance(value, (int, float)) and value > 0):
            problems.append(f"{name} = {value!r} must be a number > 0.")
    for name, value in (("station_sigma_mv", station_sigma), ("terrain_corridor_m", corridor)):
        if not (isinstance(value, (int, float)) and value >= 0):
            problems.append(f"{name} = {value!r} must be a number >= 0.")
    if terrain not in ("auto", True, False):
        problems.append(f"terrain = {terrain!r} must be \"auto\", true or false.")
    if not (isinstance(window, int) and window >= 3):
        problems.append(f"outlier_window = {window!r} must be an integer >= 3.")
    if not (isinstance(min_stations, int) and min_stations >= 3):
        problems.append(f"terrain_min_stations = {min_stations!r} must be an integer >= 3.")
    if not (isinstance(outlier_weight, (int, float)) and 0 <= outlier_weight <= 1):
        problems.append(f"outlier_weight = {outlier_weight!r} must be between 0 and 1.")
    if problems:
        raise OptionError("project file", " ".join(problems),
                          "Fix the value in the [reduce] section.", where=where)


# --------------------------------------------------------------------------- stations

def _collapse_stations(stations, notes):
    """One station per id (first occurrence), warning when repeats are far apart."""
    ids = stations.station_id
    _, first, inverse, counts = np.unique(ids, return_index=True, return_inverse=True,
                                          return_counts=True)
    if np.all(counts == 1):
        return stations
    _warn_spread(stations, inverse, counts, notes)
    keep = np.sort(first)
    return stations.subset(keep)


def _warn_spread(stations, inverse, counts, notes):
    e0 = np.full(len(counts), np.nan)
    n0 = np.full(len(counts), np.nan)
    order = np.arange(len(inverse))[::-1]
    e0[inverse[order]] = stations.easting[order]
    n0[inverse[order]] = stations.northing[order]
    spread = np.hypot(stations.easting - e0[inverse], stations.northing - n0[inverse])
    far = np.flatnonzero(spread > _SAME_PLACE_M)
    if len(far):
        notes.add(
            f"stations: repeated station ids lie more than {_SAME_PLACE_M:g} m apart at rows "
            f"{format_rows([f'{stations.source_row[i]} ({stations.station_id[i]})' for i in far])}; "
            "the first position is used.")


def _tie_total_field(stations, reference, notes):
    """Base ties from reoccupied stations, then collapse repeats; returns (Stations, table)."""
    n = len(stations)
    raw = stations.sp_mv.astype(float)
    times = stations.time.astype("datetime64[s]")
    tsec = np.where(np.isnat(times), np.nan, times.astype("int64").astype(float))
    ids = stations.station_id
    uniq, first, inverse, counts = np.unique(ids, return_index=True, return_inverse=True,
                                             return_counts=True)
    tie_sum = np.zeros(n)
    tie_n = np.zeros(n)
    rows = []
    for g in np.flatnonzero(counts > 1):
        members = np.flatnonzero(inverse == g)
        ok = members[np.isfinite(tsec[members]) & np.isfinite(raw[members])]
        if len(ok) < 2:
            notes.add(f"stations: station {uniq[g]} is repeated without times; its repeats "
                      "are averaged and not used as a base tie.")
            continue
        ok = ok[np.argsort(tsec[ok], kind="stable")]
        t_g, d_g = tsec[ok], raw[ok] - raw[ok[0]]
        inside = np.isfinite(tsec) & (tsec >= t_g[0]) & (tsec <= t_g[-1])
        tie_sum[inside] += np.interp(tsec[inside], t_g, d_g)
        tie_n[inside] += 1
        rows.append({"station_id": uniq[g], "n_occupations": len(ok),
                     "first_time": times[ok[0]], "last_time": times[ok[-1]],
                     "max_change_mv": float(np.max(np.abs(d_g)))})
    tie = np.divide(tie_sum, tie_n, out=np.zeros(n), where=tie_n > 0)
    if rows:
        outside = np.flatnonzero((tie_n == 0) & (counts[inverse] == 1))
        if len(outside):
            notes.add(f"stations: {len(outside)} stations were read outside every base-tie "
                      "time span and are not tied.")
    if np.any(counts > 1):
        _warn_spread(stations, inverse, counts, notes)
    keep = np.sort(first)
    group = inverse[keep]
    mean_raw = np.bincount(inverse, weights=np.nan_to_num(raw), minlength=len(uniq))
    n_fin = np.bincount(inverse, weights=np.isfinite(raw).astype(float), minlength=len(uniq))
    mean_raw = np.where(n_fin > 0, mean_raw / np.maximum(n_fin, 1), np.nan)
    mean_tie = np.bincount(inverse, weights=tie, minlength=len(uniq)) / counts
    st = stations.subset(keep)
    sp_raw = mean_raw[group]
    tie_mv = mean_tie[group]
    if reference:
        at = np.flatnonzero(st.station_id == reference)
        if len(at) == 0:
            raise InputError("project file", f"reference_station {reference!r} is not a station.",
                             "Name a station id from the stations file.", where="[readings]")
        tie_mv = tie_mv + (sp_raw[at[0]] - tie_mv[at[0]])
    flag = st.flag.copy()
    weight = st.weight.copy()
    missing = ~np.isfinite(sp_raw)
    flag[missing] = "no value"
    weight[missing] = 0.0
    st = st.replace(sp_raw_mv=sp_raw, drift_mv=np.zeros(len(st)), tie_mv=tie_mv,
                    sigma_mv=np.zeros(len(st)), flag=flag, weight=weight)
    return st, pd.DataFrame(rows)


# --------------------------------------------------------------------------- readings

def _check_readings(readings, station_ids):
    path = readings.path or "readings"
    m = len(readings.dv_mv)
    line = np.asarray(readings.line_id, dtype=str)
    frm = np.asarray(readings.from_id, dtype=str)
    to = np.asarray(readings.to_id, dtype=str)
    rows = np.asarray(readings.source_row)
    time = np.asarray(readings.time).astype("datetime64[s]")
    dv = np.asarray(readings.dv_mv, dtype=float)
    known = set(station_ids.tolist())
    problems = []
    bad = [i for i in range(m) if frm[i] not in known or to[i] not in known]
    if bad:
        names = [f"line {rows[i]} ({frm[i] if frm[i] not in known else to[i]})" for i in bad]
        problems.append(InputError(path, f"readings on unknown stations at {format_rows(names)}.",
                                   "Add the stations to the stations file or correct the ids."))
    same = np.flatnonzero(frm == to)
    if len(same):
        problems.append(InputError(path, "from and to are the same station at "
                                   f"{format_rows([f'line {rows[i]}' for i in same])}.",
                                   "Correct the station ids."))
    nan = np.flatnonzero(~np.isfinite(dv))
    if len(nan):
        problems.append(InputError(path, "the reading is empty or not a number at "
                                   f"{format_rows([f'line {rows[i]}' for i in nan])}.",
                                   "Enter the reading in mV or delete the row."))
    day = time.astype("datetime64[D]")
    frame = pd.DataFrame({"line": line, "frm": frm, "to": to, "time": time, "day": day})
    dup = np.flatnonzero(frame.duplicated(["line", "frm", "to", "time"], keep="first").to_numpy())
    if len(dup):
        problems.append(InputError(path, "duplicate readings (same line, from, to and time) at "
                                   f"{format_rows([f'line {rows[i]}' for i in dup])}.",
                                   "Delete the repeated rows."))
    back = []
    for _, idx in frame.groupby(["line", "day"], sort=False, dropna=False).indices.items():
        t = time[np.sort(idx)]
        ok = ~np.isnat(t)
        tt = t[ok]
        where = np.sort(idx)[ok]
        prev = np.maximum.accumulate(tt.astype("int64")) if len(tt) else tt
        back += [int(where[j]) for j in range(1, len(tt)) if tt[j].astype("int64") < prev[j - 1]]
    if back:
        problems.append(InputError(path, "time runs backwards within a day on a line at "
                                   f"{format_rows([f'line {rows[i]} ({line[i]})' for i in sorted(back)])}.",
                                   "Check the times (ISO 8601, one time zone) and the row order."))
    if problems:
        raise InputErrors(problems)


def _electrode_offsets(readings, checks, notes, *, max_offset, max_drift):
    """δ(t) per reading (mV, NaN where no check that day) and the per-day table."""
    time = np.asarray(readings.time).astype("datetime64[s]")
    m = len(time)
    delta = np.full(m, np.nan)
    rday = time.astype("datetime64[D]")
    if checks is None or len(checks.offset_mv) == 0:
        notes.add("no electrode checks: gradient readings are not corrected for the electrode "
                  "offset (common practice: check the pair at the start and end of each day).")
        days = pd.DataFrame({"day": np.unique(rday[~np.isnat(rday)])})
        return delta, days
    path = checks.path or "electrode checks"
    ctime = np.asarray(checks.time).astype("datetime64[s]")
    coff = np.asarray(checks.offset_mv, dtype=float)
    crow = np.asarray(checks.source_row)
    good = ~np.isnat(ctime) & np.isfinite(coff)
    big = np.flatnonzero(good & (np.abs(coff) > max_offset))
    if len(big):
        notes.add(f"{path}: electrode offset above {max_offset:g} mV at "
                  f"{format_rows([f'line {crow[i]} ({coff[i]:.1f} mV)' for i in big])} "
                  "(common practice: recondition the electrodes above about 5 mV).")
    cday = ctime.astype("datetime64[D]")
    rows = []
    no_check = []
    for day in np.unique(np.concatenate([rday[~np.isnat(rday)], cday[good]])):
        ck = np.flatnonzero(good & (cday == day))
        rr = np.flatnonzero(rday == day)
        ck = ck[np.argsort(ctime[ck], kind="stable")]
        row = {"day": day, "n_checks": len(ck), "n_readings": len(rr),
               "first_offset_mv": np.nan, "last_offset_mv": np.nan, "drift_mv": np.nan,
               "corrected": False}
        if len(ck):
            t0 = ctime[ck].astype("int64").astype(float)
            delta[rr] = np.interp(time[rr].astype("int64").astype(float), t0, coff[ck])
            change = coff[ck[-1]] - coff[ck[0]]
            row.update(first_offset_mv=coff[ck[0]], last_offset_mv=coff[ck[-1]],
                       drift_mv=change if len(ck) > 1 else np.nan, corrected=len(rr) > 0)
            if len(ck) > 1 and abs(change) > max_drift:
                notes.add(f"{path}: the electrode offset changed by {change:+.1f} mV on {day} "
                          f"(above {max_drift:g} mV/day, common practice); shade the electrodes "
                          "and check them more often.")
        elif len(rr):
            no_check.append(str(day))
        rows.append(row)
    if no_check:
        notes.add(f"{path}: no electrode check on {format_rows(no_check)}; readings of those "
                  "days are not corrected for drift.")
    if np.isnat(rday).any():
        notes.add(f"{readings.path or 'readings'}: {int(np.isnat(rday).sum())} readings have no "
                  "time and are not corrected for drift.")
    return delta, pd.DataFrame(rows)


def _step_signs(line, mode):
    """+1 per reading for fixed_lead; (-1)**k along each line (file order) for leapfrog."""
    if mode == "fixed_lead":
        return np.ones(len(line))
    k = pd.Series(np.arange(len(line))).groupby(np.asarray(line)).cumcount().to_numpy()
    return np.where(k % 2 == 0, 1.0, -1.0)


def _reduce_gradient(stations, readings, checks, reference, notes, *, drift, mode,
                     reading_sigma, blunder_sigma, window, max_offset, max_drift, station_sigma):
    path = readings.path or "readings"
    _check_readings(readings, stations.station_id)
    line = np.asarray(readings.line_id, dtype=str).astype(object)
    frm = np.asarray(readings.from_id, dtype=str)
    to = np.asarray(readings.to_id, dtype=str)
    rows = np.asarray(readings.source_row)
    dv = np.asarray(readings.dv_mv, dtype=float)
    m = len(dv)
    index = {s: i for i, s in enumerate(stations.station_id.tolist())}
    s_from = np.array([index[s] for s in frm], dtype=np.int64)
    s_to = np.array([index[s] for s in to], dtype=np.int64)
    used = np.unique(np.concatenate([s_from, s_to]))
    node_of = np.full(len(stations), -1)
    node_of[used] = np.arange(len(used))
    f, t = node_of[s_from], node_of[s_to]
    n = len(used)

    if not reference:
        reference = frm[0]
    if reference not in index:
        raise InputError("project file", f"reference_station {reference!r} is not a station.",
                         "Name a station id from the stations file.", where="[readings]")
    ref = node_of[index[reference]]
    if ref < 0:
        raise InputError(path, f"the reference station {reference!r} has no readings.",
                         "Name a station that was read, or leave reference_station empty.")
    graph = coo_matrix((np.ones(m), (f, t)), shape=(n, n))
    _, comp = connected_components(graph, directed=False)
    loose = np.flatnonzero(comp[f] != comp[ref])
    if len(loose):
        lines_off = sorted(set(line[loose].tolist()))
        raise InputError(path, f"lines {format_rows(lines_off)} are not connected to the "
                         f"reference station {reference} (readings at "
                         f"{format_rows([f'line {rows[i]}' for i in loose])}).",
                         "Add tie readings that join these lines to the rest of the survey, "
                         "or reduce them as a separate survey.")

    if drift:
        delta, days = _electrode_offsets(readings, checks, notes, max_offset=max_offset,
                                         max_drift=max_drift)
        have = np.isfinite(delta)
    else:
        delta, days, have = np.full(m, np.nan), pd.DataFrame(), np.zeros(m, bool)
    if drift and have.any():
        modes = ["leapfrog", "fixed_lead"] if mode == "auto" else [mode]
    else:
        modes = [mode if mode != "auto" else "none"]
    variance = np.full(m, float(reading_sigma) ** 2)
    runs = {}
    for md in modes:
        corr = np.zeros(m) if md == "none" else np.where(have, _step_signs(line, md) * delta, 0.0)
        runs[md] = _adjust_with_snooping(n, f, t, dv - corr, variance, ref, line, blunder_sigma,
                                         window)
        runs[md]["correction"] = corr
    if len(modes) == 2:
        lf, fl = runs["leapfrog"], runs["fixed_lead"]
        gap = lf["first"]["chi2"] - fl["first"]["chi2"]
        if lf["first"]["dof"] > 0 and abs(gap) > _DECISIVE_CHI2:
            chosen = "leapfrog" if gap < 0 else "fixed_lead"
        else:
            chosen = "leapfrog"
            notes.add("mode = \"auto\": loop closure cannot tell leapfrog from fixed-lead readings "
                      f"(χ² differs by {gap:+.1f}); the electrode offset is subtracted as in "
                      "leapfrog, the usual field practice. Set mode in [reduce] if the lead "
                      "electrode stayed fixed.")
    else:
        chosen = modes[0]
    run = runs[chosen]
    res, corr = run["final"], run["correction"]

    # Plain integration along a breadth-first spanning tree from the reference.
    raw_node, drift_node, n_steps = _integrate_tree(n, f, t, dv, corr, ref)
    x = res["potential"]
    dof, chi2 = res["dof"] - run["n_down"], res["chi2"]
    p_value = float(stats.chi2.sf(chi2, dof)) if dof > 0 else np.nan
    scale = float(np.sqrt(max(1.0, chi2 / dof))) if dof > 0 else 1.0
    if dof > 0 and p_value < 0.01:
        notes.add(f"{path}: loop closure χ² = {chi2:.1f} for {dof} independent loops "
                  f"(p = {p_value:.2g}): reading_sigma_mv = {reading_sigma:g} mV is optimistic or "
                  "there are blunders; station uncertainties are scaled by "
                  f"{scale:.2f}.")

    k = len(stations)
    sp_raw = np.full(k, np.nan)
    drift_mv = np.zeros(k)
    tie_mv = np.zeros(k)
    sigma = np.full(k, np.nan)
    sp_raw[used] = raw_node
    drift_mv[used] = drift_node
    tie_mv[used] = raw_node - drift_node - x
    sigma[used] = res["sigma"] * scale
    flag = stations.flag.copy()
    weight = stations.weight.copy()
    unread = np.setdiff1d(np.arange(k), used)
    if len(unread):
        notes.add(f"stations: {len(unread)} stations have no gradient reading "
                  f"({format_rows(stations.station_id[unread].tolist())}); they get no value.")
        flag[unread] = "no reading"
        weight[unread] = 0.0
    line_ids = stations.line_id.copy()
    first_line = pd.Series(np.concatenate([line, line])).groupby(
        np.concatenate([s_from, s_to])).first()
    empty = np.flatnonzero((line_ids == "") & np.isin(np.arange(k), first_line.index))
    line_ids[empty] = first_line.loc[empty].to_numpy()
    st = stations.replace(sp_raw_mv=sp_raw, drift_mv=drift_mv, tie_mv=tie_mv, sigma_mv=sigma,
                          flag=flag, weight=weight, line_id=line_ids)

    legs = pd.DataFrame({
        "line_id": line, "from_id": frm, "to_id": to,
        "time": np.asarray(readings.time).astype("datetime64[s]"), "source_row": rows,
        "dv_mv": dv, "offset_mv": delta, "correction_mv": corr,
        "residual_mv": res["residual"], "std_residual": run["first"]["std_residual"],
        "std_residual_final": res["std_residual"], "redundancy": res["redundancy"],
        "flag": run["leg_flag"],
    })
    suspect = (np.abs(legs["std_residual_final"].to_numpy()) > blunder_sigma) & (legs["flag"] == "")
    legs.loc[suspect, "flag"] = "suspect: standardized residual above blunder_sigma"
    unchecked = legs[legs["flag"].str.startswith("unchecked")]
    if len(unchecked):
        text = [f"line {r.source_row} ({r.line_id}: {r.from_id} -> {r.to_id})" for r in unchecked.itertuples()]
        notes.add(f"{path}: {len(unchecked)} readings that no loop checks (line ends beyond the last tie) stand "
                  f"out from their neighbours: {format_rows(text)}. The stations beyond them carry that "
                  "uncertainty; re-read these legs or tie the line ends to check them.")
    blunders = legs[legs["flag"].str.startswith("blunder")].copy()
    if len(blunders):
        text = [f"line {r.source_row} ({r.line_id}: {r.from_id} -> {r.to_id} at {r.time}, "
                f"w = {r.std_residual:+.1f})" for r in blunders.itertuples()]
        notes.add(f"{path}: blunder legs found by loop closure and down-weighted: "
                  f"{format_rows(text)}. Re-read these legs.")
    order = np.argsort(-np.nan_to_num(np.abs(legs["std_residual"].to_numpy()), nan=-1.0),
                       kind="stable")
    legs = legs.iloc[order].reset_index(drop=True)  # largest standardized residual first
    loops = _loop_table(run["first"], stations.station_id[used], line)
    network = {
        "chi2": chi2, "dof": int(dof), "p_value": p_value,
        "chi2_initial": run["first"]["chi2"], "dof_initial": run["first"]["dof"],
        "variance_factor": chi2 / dof if dof > 0 else np.nan, "sigma_scale": scale,
        "n_readings": m, "n_stations": n, "n_loops": int(run["first"]["dof"]),
        "reference": reference, "mode": chosen, "covariance": res["covariance"],
        "reading_sigma_mv": float(reading_sigma), "blunder_threshold": run["threshold"],
        "blunders": blunders.reset_index(drop=True),
        # Correlated error of the reduced potentials for fits. The variance factor is the
        # loop-closure estimate where enough loops support it (common practice: a posteriori
        # variance of unit weight), else at least 1, as for sigma_mv.
        "station_covariance": res["covariance_model"].for_stations(
            node_of, factor=(chi2 / dof if dof >= _MIN_LOOPS_FOR_FACTOR else scale ** 2),
            independent_sigma_mv=station_sigma),
    }
    if len(modes) == 2:
        network["chi2_by_mode"] = {md: runs[md]["first"]["chi2"] for md in modes}
    integration = pd.DataFrame({"station_id": stations.station_id[used], "n_readings": n_steps,
                                "raw_sigma_mv": np.sqrt(n_steps) * float(reading_sigma)})
    qc = {"legs": legs, "loops": loops, "days": days, "checks": _check_table(checks),
          "integration": integration}
    lines = _lines_from_readings(line, s_from, s_to)
    return st, {"network": network, "qc": qc, "lines": lines}


def _adjust_with_snooping(n, f, t, obs, variance, ref, line, blunder_sigma, window):
    """Adjust, then down-weight the worst blunder leg and re-adjust while one exceeds the threshold."""
    var = variance.copy()
    first = adjust_network(n, f, t, obs, var, ref)
    n_red = int(np.sum(np.isfinite(first["std_residual"])))
    bonferroni = stats.norm.isf(0.025 / max(n_red, 1))
    threshold = float(max(blunder_sigma, bonferroni))
    score = _gradient_anomaly(obs, line, window)
    flag = np.full(len(obs), "", dtype=object)
    res = first
    n_down = 0
    for _ in range(_MAX_SNOOP):
        w = np.abs(res["std_residual"])
        w[flag != ""] = np.nan
        if not np.isfinite(w).any() or np.nanmax(w) <= threshold:
            break
        worst = int(np.nanargmax(w))
        same = np.flatnonzero((res["edge_chain"] == res["edge_chain"][worst]) & (flag == ""))
        pick = int(same[np.argmax(score[same])])
        flag[pick] = (f"blunder: standardized residual {first['std_residual'][pick]:+.1f}, "
                      "down-weighted")
        var[pick] *= _DOWNWEIGHT
        n_down += 1
        res = adjust_network(n, f, t, obs, var, ref)
    res, n_local = _snoop_single_readings(n, f, t, obs, var, ref, line, res, first, flag,
                                          blunder_sigma, window, _MAX_SNOOP - n_down)
    if _unchecked_readings(first, obs, var, line, window, flag):
        res = adjust_network(n, f, t, obs, var, ref)
    return {"first": first, "final": res, "leg_flag": flag, "n_down": n_down + n_local,
            "threshold": threshold}


def _line_scale(anomaly, line):
    """Robust standard deviation of the gradient anomalies of each reading's line (1.4826 × median)."""
    scale = np.zeros(len(anomaly))
    for idx in pd.Series(np.arange(len(anomaly))).groupby(np.asarray(line)).indices.values():
        scale[idx] = 1.4826 * np.median(anomaly[idx])
    return scale


def _unchecked_readings(first, obs, var, line, window, flag):
    """
    Readings no loop can check that stand out from their neighbours: their doubt becomes variance.

    A reading outside every loop (no redundancy: a line end beyond its last
    tie) cannot be tested by loop closure, yet a blunder there shifts every
    station beyond it. When it stands out from its neighbours along the line
    by more than ``_READING_OUTLIER_Z`` robust standard deviations and the
    potentials beyond it stay shifted by as much (a step, not a spike), its
    variance grows by the square of that departure, so the stations beyond
    carry the doubt in their ``sigma_mv`` and in the network covariance the
    fits use; the leg is flagged "unchecked". ``var`` and ``flag`` are
    updated in place; returns how many readings were so treated.
    """
    signed = _gradient_anomaly(obs, line, window, signed=True)
    anomaly = np.abs(signed)
    limit = _READING_OUTLIER_Z * np.maximum(_line_scale(anomaly, line), 1e-9)
    # A blunder is a step: the potentials beyond it stay shifted. A station off its line (a
    # spike) or a sharp local anomaly (a shallow pipe crossed by the line) stands out too, but
    # the potentials return within a few readings. So the step itself, the median of the
    # (detrended) potentials over the next readings minus that over the previous ones, must
    # stand out as well.
    step = np.zeros(len(signed))
    for idx in pd.Series(np.arange(len(signed))).groupby(np.asarray(line)).indices.values():
        idx = np.sort(idx)
        potential = np.concatenate([[0.0], np.cumsum(signed[idx])])  # at the stations along the line
        for k in range(len(idx)):
            before = potential[max(0, k + 1 - _STEP_REACH):k + 1]
            after = potential[k + 1:k + 1 + _STEP_REACH]
            step[idx[k]] = np.median(after) - np.median(before)
    out = (anomaly > limit) & (np.abs(step) > limit)
    pick = np.flatnonzero(~np.isfinite(first["std_residual"]) & (flag == "") & out)
    for i in pick:
        var[i] += anomaly[i] ** 2
        flag[i] = (f"unchecked: {anomaly[i]:.1f} mV off its neighbours where no loop checks it; "
                   "the stations beyond carry that uncertainty")
    return len(pick)


def _snoop_single_readings(n, f, t, obs, var, ref, line, res, first, flag, blunder_sigma, window,
                           budget):
    """
    Blunders below the network-wide threshold, located by two independent signs.

    A chain whose standardized residual is still above ``blunder_sigma`` (but
    below the Bonferroni level, so the network test alone cannot name it) is
    taken to hold a blunder when (1) one of its readings stands out from its
    neighbours along the line by more than ``_READING_OUTLIER_Z`` robust
    standard deviations and (2) down-weighting that one reading brings the
    chain's standardized residual below ``blunder_sigma``. Otherwise the
    chain stays "suspect". ``var`` and ``flag`` are updated in place;
    returns the final adjustment and the number of legs down-weighted.
    """
    anomaly = _gradient_anomaly(obs, line, window)
    scale = _line_scale(anomaly, line)
    tried, n_down = set(), 0
    while n_down < budget:
        w = np.abs(res["std_residual"])
        w[flag != ""] = np.nan
        chain = res["edge_chain"]
        open_ = np.isfinite(w) & (w > blunder_sigma) & ~np.isin(chain, list(tried))
        if not open_.any():
            break
        worst = int(np.flatnonzero(open_)[np.argmax(w[open_])])
        tried.add(int(chain[worst]))
        same = np.flatnonzero((chain == chain[worst]) & (flag == ""))
        pick = int(same[np.argmax(anomaly[same])])
        if not anomaly[pick] > _READING_OUTLIER_Z * scale[pick]:
            continue
        trial_var = var.copy()
        trial_var[pick] *= _DOWNWEIGHT
        trial = adjust_network(n, f, t, obs, trial_var, ref)
        rest = np.abs(trial["std_residual"][same[same != pick]])
        if rest.size and np.nanmax(rest, initial=0.0) > blunder_sigma:
            continue
        var[pick] = trial_var[pick]
        flag[pick] = (f"blunder: {anomaly[pick]:.1f} mV off its neighbours, in a chain misclosing "
                      f"at standardized residual {first['std_residual'][pick]:+.1f}; down-weighted")
        res = trial
        n_down += 1
    return res, n_down


def _running_median(values, window):
    """Centred running median with truncated windows at the ends (NaNs ignored)."""
    half = window // 2
    padded = np.concatenate([np.full(half, np.nan), values, np.full(half, np.nan)])
    view = np.lib.stride_tricks.sliding_window_view(padded, 2 * half + 1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(view, axis=1)


def _gradient_anomaly(obs, line, window, *, signed=False):
    """|reading - running median of the line's readings| (signed on request): ranks legs within a chain."""
    score = np.zeros(len(obs))
    for idx in pd.Series(np.arange(len(obs))).groupby(np.asarray(line)).indices.values():
        idx = np.sort(idx)
        score[idx] = obs[idx] - _running_median(obs[idx], window)
    score = np.nan_to_num(score)
    return score if signed else np.abs(score)


def _integrate_tree(n, f, t, dv, corr, ref):
    """Integrate readings (and corrections) from the reference along a BFS spanning tree."""
    lo, hi = np.minimum(f, t), np.maximum(f, t)
    key = lo * n + hi
    uniq, first = np.unique(key, return_index=True)
    graph = coo_matrix((first + 1.0, (lo[first], hi[first])), shape=(n, n)).tocsr()
    order, pred = breadth_first_order(graph, ref, directed=False, return_predecessors=True)
    raw, dri = np.zeros(n), np.zeros(n)
    steps = np.zeros(n, dtype=np.int64)
    nodes = order[1:]
    p = pred[nodes]
    e = first[np.searchsorted(uniq, np.minimum(p, nodes) * n + np.maximum(p, nodes))]
    sign = np.where(f[e] == p, 1.0, -1.0)
    d_raw, d_cor = (sign * dv[e]).tolist(), (sign * corr[e]).tolist()
    rl, dl, sl = raw.tolist(), dri.tolist(), steps.tolist()
    for node, parent, a, b in zip(nodes.tolist(), p.tolist(), d_raw, d_cor):
        rl[node] = rl[parent] + a
        dl[node] = dl[parent] + b
        sl[node] = sl[parent] + 1
    return np.array(rl), np.array(dl), np.array(sl)


def _loop_table(res, node_ids, line):
    chains = res["chains"]
    ec = res["edge_chain"]
    chain_lines = [set() for _ in range(len(chains["a"]))]
    for c, name in zip(ec.tolist(), line.tolist()):
        chain_lines[c].add(name)
    rows = []
    for i, loop in enumerate(res["loops"]):
        k = loop["closing_chain"]
        names = sorted(set().union(*(chain_lines[c] for c in loop["chains"])))
        rows.append({
            "loop": i + 1,
            "closing_from": node_ids[chains["a"][k]], "closing_to": node_ids[chains["b"][k]],
            "lines": ", ".join(names), "n_legs": loop["n_legs"],
            "misclosure_mv": loop["misclosure_mv"], "sigma_mv": loop["sigma_mv"],
            "ratio": loop["misclosure_mv"] / loop["sigma_mv"],
        })
    return pd.DataFrame(rows, columns=["loop", "closing_from", "closing_to", "lines", "n_legs",
                                       "misclosure_mv", "sigma_mv", "ratio"])


def _check_table(checks):
    if checks is None:
        return pd.DataFrame(columns=["time", "offset_mv", "source_row"])
    return pd.DataFrame({"time": np.asarray(checks.time).astype("datetime64[s]"),
                         "offset_mv": np.asarray(checks.offset_mv, dtype=float),
                         "source_row": np.asarray(checks.source_row)})


# --------------------------------------------------------------------------- lines

def _lines_from_readings(line, s_from, s_to):
    """Line id -> station indices in reading order (first appearance)."""
    out = {}
    for name, idx in pd.Series(np.arange(len(line))).groupby(np.asarray(line), sort=False).indices.items():
        idx = np.sort(idx)
        seq = np.column_stack([s_from[idx], s_to[idx]]).ravel()
        _, first = np.unique(seq, return_index=True)
        out[str(name)] = seq[np.sort(first)]
    return out


def _lines_from_stations(st):
    """Line id -> station indices ordered along the line's principal axis ("" = no line)."""
    out = {}
    for name, idx in pd.Series(np.arange(len(st))).groupby(st.line_id.astype(str), sort=False).indices.items():
        idx = np.sort(idx)
        if name == "" or len(idx) < 2:
            out[str(name)] = idx
            continue
        xy = np.column_stack([st.easting[idx], st.northing[idx]])
        xy = xy - xy.mean(axis=0)
        axis = np.linalg.svd(xy, full_matrices=False)[2][0]
        out[str(name)] = idx[np.argsort(xy @ axis, kind="stable")]
    return out


def _line_residual(values, window):
    """Values minus their running median, after removing the line's median step (trend)."""
    ok = np.isfinite(values)
    steps = np.diff(values[ok])
    trend = (np.median(steps) if len(steps) else 0.0) * np.cumsum(ok)
    detrended = values - trend
    return detrended - _running_median(detrended, window)


def _flag_outliers(value, st, lines, flag, weight, notes, *, window, mads, floor, outlier_weight):
    """Flag stations far from the running median along their line (never dropped)."""
    resid = np.full(len(value), np.nan)
    for name, idx in lines.items():
        if len(idx) < 3:
            continue
        if name == "":
            from scipy.spatial import cKDTree
            ok = idx[np.isfinite(value[idx])]
            if len(ok) < 3:
                continue
            tree = cKDTree(np.column_stack([st.easting[ok], st.northing[ok]]))
            _, nb = tree.query(np.column_stack([st.easting[ok], st.northing[ok]]),
                               k=min(window, len(ok)))
            resid[ok] = value[ok] - np.median(value[ok][nb], axis=1)
            continue
        r = _line_residual(value[idx], window)
        better = np.isnan(resid[idx]) | (np.abs(r) > np.abs(resid[idx]))
        resid[idx[better]] = r[better]
    fin = np.isfinite(resid)
    if fin.sum() < 3:
        return
    scale = max(1.4826 * np.median(np.abs(resid[fin] - np.median(resid[fin]))), floor)
    out = np.flatnonzero(fin & (np.abs(resid) > mads * scale))
    for i in out:
        flag[i] = f"outlier: {abs(resid[i]):.0f} mV from the running median"
        weight[i] = min(weight[i], outlier_weight)
    if len(out):
        notes.add(f"stations: {len(out)} stations flagged as outliers (more than {mads:g} × "
                  f"{scale:.1f} mV from the running median) and down-weighted: "
                  f"{format_rows(st.station_id[out].tolist())}.")


def refine_terrain_slope(reduction, source_mv):
    """
    Re-estimate the terrain slope with the fitted sources removed.

    Theil-Sen slope of (SP before the terrain correction − fitted sources)
    against elevation over every unflagged station with a known elevation.

    Parameters
    ----------
    reduction : Reduction
        A reduction whose terrain correction was estimated.
    source_mv : array
        Modelled SP of the fitted sources at every station, mV.

    Returns
    -------
    dict or None
        ``slope_mv_per_m``, ``ci_lo``, ``ci_hi`` (95 %), ``n_used``; None when
        too few stations have an elevation.
    """
    st = reduction.stations
    value = st.sp_mv + st.terrain_mv - np.asarray(source_mv, dtype=float)
    use = np.isfinite(value) & np.isfinite(st.upward) & (st.flag == "")
    if use.sum() < 10:
        return None
    slope, _, lo, hi = stats.theilslopes(value[use], st.upward[use], alpha=0.95)
    return {"slope_mv_per_m": float(slope), "ci_lo": float(lo), "ci_hi": float(hi), "n_used": int(use.sum())}


def _terrain_effect(value, st, faults, flag, notes, *, apply, corridor_m, min_stations, slope=None):
    info = {"applied": False, "slope_mv_per_m": np.nan, "ci_lo": np.nan, "ci_hi": np.nan,
            "n_used": 0, "n_near_faults": 0, "reference_elevation_m": np.nan,
            "corridor_m": float(corridor_m), "method": "Theil-Sen, 95 % interval"}
    terrain_mv = np.zeros(len(value))
    if not apply:
        return terrain_mv, info
    elev = st.upward
    if slope is not None:
        ref_elev = float(np.median(elev[np.isfinite(elev)])) if np.isfinite(elev).any() else 0.0
        terrain_mv = np.where(np.isfinite(elev), slope * (elev - ref_elev), 0.0)
        info.update(applied=True, slope_mv_per_m=float(slope), reference_elevation_m=ref_elev,
                    method="slope given in the project file")
        return terrain_mv, info
    known = np.isfinite(elev) & np.isfinite(value)
    near = np.zeros(len(value), bool)
    lines = [np.asarray(fl.coords, float) for fl in faults if len(fl.coords) >= 2]
    if lines and corridor_m > 0:
        import shapely
        geom = shapely.multilinestrings([shapely.linestrings(c) for c in lines])
        dist = shapely.distance(shapely.points(st.easting, st.northing), geom)
        near = dist < corridor_m
    use = known & ~near & (flag == "")
    info["n_near_faults"] = int(np.sum(known & near))
    if use.sum() < min_stations:
        notes.add(f"terrain correction skipped: only {int(use.sum())} stations with a known "
                  f"elevation lie farther than {corridor_m:g} m from the faults "
                  f"(terrain_min_stations = {min_stations}).")
        return terrain_mv, info
    slope, _, lo, hi = stats.theilslopes(value[use], elev[use], alpha=0.95)
    ref_elev = float(np.median(elev[np.isfinite(elev)]))
    terrain_mv = np.where(np.isfinite(elev), slope * (elev - ref_elev), 0.0)
    if (~np.isfinite(elev)).any():
        notes.add(f"terrain correction: {int((~np.isfinite(elev)).sum())} stations have no "
                  "elevation and are not corrected.")
    info.update(applied=True, slope_mv_per_m=float(slope), ci_lo=float(lo), ci_hi=float(hi),
                n_used=int(use.sum()), reference_elevation_m=ref_elev)
    return terrain_mv, info


def _line_table(st, lines, legs):
    rows = []
    by_line = legs.groupby("line_id", sort=False).indices if legs is not None and len(legs) else {}
    for name, idx in lines.items():
        row = {"line_id": name, "n_stations": len(idx),
               "max_abs_tie_mv": float(np.nanmax(np.abs(st.tie_mv[idx]))) if len(idx) else np.nan,
               "n_flagged": int(np.sum(st.flag[idx] != ""))}
        if name in by_line:
            sel = legs.iloc[by_line[name]]
            row.update(n_readings=len(sel), sum_dv_mv=float(sel["dv_mv"].sum()),
                       sum_correction_mv=float(sel["correction_mv"].sum()),
                       max_abs_std_residual=float(np.nanmax(np.abs(sel["std_residual"])))
                       if sel["std_residual"].notna().any() else np.nan)
        rows.append(row)
    return pd.DataFrame(rows)


def _profiles(st, lines):
    out = {}
    for name, idx in lines.items():
        if name == "" or len(idx) < 2:
            continue
        step = np.hypot(np.diff(st.easting[idx]), np.diff(st.northing[idx]))
        out[name] = {
            "station_id": st.station_id[idx],
            "distance_m": np.concatenate([[0.0], np.cumsum(step)]),
            "raw_mv": st.sp_raw_mv[idx], "reduced_mv": st.sp_mv[idx],
            "sigma_mv": st.sigma_mv[idx], "flag": st.flag[idx],
        }
    return out
