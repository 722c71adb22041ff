"""
Benchmark of segmentation and detection: about 500 fault segments over
5·10⁴ stations (invented survey), with timings for subsets to show scaling.

Run:  python benchmarks/bench_detect.py [--n-decoys 100] [--sizes 50 125 250 500]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from geosp.detect import detect_dipoles
from geosp.models import Fault, Stations
from geosp.physics.forward import patch_sp_local
from geosp.segments import make_segments


def build_survey(seed=0):
    """Lines 200 m apart, stations every 100 m over 30 km × 33 km (49 966 stations)."""
    rng = np.random.default_rng(seed)
    x = np.arange(0.0, 30000.0 + 1, 100.0)
    y = np.arange(0.0, 33000.0 + 1, 200.0)
    east, north = (a.ravel() for a in np.meshgrid(x, y))
    faults = []
    # 250 faults of 3 km on a jittered 25 × 10 grid (800 m × 3300 m) in the
    # western 20 km, strikes N ± 8°: no crossings, two 1.5 km segments each
    # with max_length_m = 2500. The eastern 10 km stay free of mapped faults,
    # where decoys (trace ≥ one corridor from every fault) can go.
    for i in range(25):
        for j in range(10):
            cx = 400.0 + 800.0 * i + rng.uniform(-80, 80)
            cy = 1650.0 + 3300.0 * j + rng.uniform(-100, 100)
            phi = np.radians(rng.uniform(-8, 8))
            half = 1500.0 * np.array([np.sin(phi), np.cos(phi)])
            faults.append(Fault(f"F{i:02d}{j:02d}", np.array([[cx, cy] - half, [cx, cy] + half])))
    sp = 15.0 * np.sin(east / 7000.0) + 0.002 * north + rng.normal(0.0, 5.0, east.size)
    return east, north, sp, tuple(faults)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--n-decoys", type=int, default=100)
    parser.add_argument("--sizes", type=int, nargs="+", default=[50, 125, 250, 500])
    args = parser.parse_args(argv)

    east, north, sp, faults = build_survey()
    t0 = time.perf_counter()
    segments = make_segments(faults, station_spacing_m=100.0)
    t_seg = time.perf_counter() - t0
    print(f"make_segments: {len(faults)} faults -> {len(segments)} segments in {t_seg:.2f} s")
    # Plant patches (L = segment, z_t = 150 m, z_b = 600 m, 60 mV) under every
    # tenth segment.
    for seg in segments[::10]:
        s, t = seg.to_local(east, north)
        sp = sp + patch_sp_local(s, t, centre_m=seg.length_m / 2, length_m=seg.length_m,
                                 depth_top_m=150.0, depth_bottom_m=600.0, dip_deg=90.0,
                                 jump_mv=60.0)
    stations = Stations(np.arange(east.size).astype(str), east, north, np.zeros_like(east), sp,
                        "EPSG:32633")
    print(f"stations: {len(stations)}; n_decoys = {args.n_decoys}")
    rows = []
    for size in args.sizes:
        subset = segments[:size]
        t0 = time.perf_counter()
        dets = detect_dipoles(stations, subset, n_decoys=args.n_decoys)
        dt = time.perf_counter() - t0
        n_det = sum(d.detected for d in dets)
        n_cal = sum("not calibrated" not in d.note for d in dets)
        rows.append((size, dt))
        print(f"{size:4d} segments: {dt:7.1f} s  ({1e3 * dt / size:6.0f} ms/segment), "
              f"{n_det} detected, {n_cal} calibrated by decoys, "
              f"median stations/segment {np.median([d.n_stations for d in dets]):.0f}")
    if len(rows) > 1:
        sizes, times = np.array(rows, dtype=float).T
        slope = np.polyfit(np.log(sizes), np.log(times), 1)[0]
        print(f"scaling: time ∝ n_segments^{slope:.2f}")


if __name__ == "__main__":
    main()
