"""
Benchmark of the field reduction: network adjustment of 10^3, 10^4 and 10^5 gradient readings.

Synthetic survey: east-west lines of gradient readings tied by north-south lines every 40
stations (1 mV noise, no blunders). Prints the wall time of the network adjustment alone
(geosp._network.adjust_network) and of the whole reduce_survey call, and the scaling exponent
of each (slope of log time against log readings).

Run: python benchmarks/bench_reduce.py
"""

from __future__ import annotations

import time
import warnings

import numpy as np

from geosp._network import adjust_network
from geosp.models import Readings, Stations, Survey
from geosp.reduce import reduce_survey


def make_survey(n_readings, *, tie_every=40, seed=0):
    n_rows = max(4, int(round(np.sqrt(n_readings / 40))))
    n_cols = max(tie_every + 1, n_readings // n_rows)
    rng = np.random.default_rng(seed)
    r, c = np.meshgrid(np.arange(n_rows), np.arange(n_cols), indexing="ij")
    node = r * n_cols + c
    east, north = (c * 25.0).ravel(), (r * 100.0).ravel()
    truth = 30 * np.sin(east / 300.0) - 0.02 * north
    f = [node[:, :-1].ravel()]
    t = [node[:, 1:].ravel()]
    lines = [np.repeat([f"E{i}" for i in range(n_rows)], n_cols - 1)]
    for col in range(0, n_cols, tie_every):
        f.append(node[:-1, col])
        t.append(node[1:, col])
        lines.append(np.full(n_rows - 1, f"N{col}"))
    f, t, lines = np.concatenate(f), np.concatenate(t), np.concatenate(lines)
    m = len(f)
    ids = np.array([f"S{i}" for i in range(n_rows * n_cols)])
    dv = truth[t] - truth[f] + rng.normal(0, 1.0, m)
    times = np.datetime64("2026-03-02T00:00:00") + np.arange(m).astype("timedelta64[s]")
    readings = Readings(line_id=lines, from_id=ids[f], to_id=ids[t], time=times, dv_mv=dv,
                        source_row=np.arange(2, m + 2), path="bench.csv")
    stations = Stations(station_id=ids, easting=east, northing=north,
                        upward=np.full(len(ids), np.nan), sp_mv=np.full(len(ids), np.nan),
                        crs="EPSG:32633")
    survey = Survey(stations=stations, faults=(), crs="EPSG:32633", readings=readings)
    return survey, (len(ids), f, t, dv)


def main():
    sizes, t_net, t_all = [], [], []
    for target in (1_000, 10_000, 100_000):
        survey, (n, f, t, dv) = make_survey(target)
        m = len(dv)
        start = time.perf_counter()
        res = adjust_network(n, f, t, dv, np.ones(m), 0)
        t1 = time.perf_counter() - start
        start = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            red = reduce_survey(survey, drift=False)
        t2 = time.perf_counter() - start
        sizes.append(m)
        t_net.append(t1)
        t_all.append(t2)
        print(f"{m:>7d} readings, {n:>6d} stations, {res['dof']:>5d} loops: "
              f"adjustment {t1:7.3f} s, reduce_survey {t2:7.3f} s, "
              f"chi2/dof = {red.network['chi2'] / max(red.network['dof'], 1):.2f}, "
              f"covariance {res['covariance']}")
    ln = np.log(sizes)
    print(f"scaling exponent (time ~ readings^k): adjustment k = {np.polyfit(ln, np.log(t_net), 1)[0]:.2f}, "
          f"reduce_survey k = {np.polyfit(ln, np.log(t_all), 1)[0]:.2f}")


if __name__ == "__main__":
    main()
