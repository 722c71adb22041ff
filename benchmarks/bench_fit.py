"""
Benchmark of the per-segment fit.

1. One segment, 500 stations, one fault patch with profile-likelihood
   uncertainty: wall time and number of forward-model calls (target ≤ 1 s).
2. Twelve segments fitted with 1 and with 2 worker processes: the speed-up.

Run:  python benchmarks/bench_fit.py
"""

import time

import numpy as np

from geosp.fit import fit_segment, fit_segments
from geosp.models import Detection, FaultSegment, Stations
from geosp.physics import patch_sp_local


def _segment(name, origin, strike_deg=35.0, length_m=2000.0):
    phi = np.radians(strike_deg)
    end = (origin[0] + length_m * np.sin(phi), origin[1] + length_m * np.cos(phi))
    return FaultSegment(name.split("-")[0], name, np.array([origin, end]), strike_deg, length_m,
                        dip_deg=70.0, dip_known=True)


def _survey(segment, *, n_lines=5, n_per_line=100, seed=0, noise_mv=3.0):
    """Invented survey: profiles across the segment over one patch plus a regional plane."""
    lines = np.linspace(0.1, 0.9, n_lines) * segment.length_m
    across = np.linspace(-1200.0, 1200.0, n_per_line)
    s, t = (a.ravel() for a in np.meshgrid(lines, across))
    rng = np.random.default_rng(seed)
    sp = patch_sp_local(s, t, centre_m=1000.0, length_m=1400.0, depth_top_m=180.0,
                        depth_bottom_m=700.0, dip_deg=70.0, jump_mv=120.0)
    sp += 4.0 + 0.002 * s + noise_mv * rng.standard_normal(s.size)
    easting, northing = segment.to_world(s, t)
    return easting, northing, sp


def bench_one_segment():
    segment = _segment("B1-1", (400000.0, 5100000.0))
    easting, northing, sp = _survey(segment)
    n = sp.size
    stations = Stations([f"B{i}" for i in range(n)], easting, northing, np.zeros(n), sp,
                        "EPSG:32632", sigma_mv=np.full(n, 3.0))
    detection = Detection(segment, np.arange(n), n, 15.0, 1, True, 4.0, 3.0, {})
    fit_segment(stations, detection, models=("fault_patch",), n_starts=64, n_local=2)  # warm-up
    start = time.perf_counter()
    fit = fit_segment(stations, detection, models=("fault_patch",), uncertainty="profile")
    seconds = time.perf_counter() - start
    row = fit.sources[0]
    print(f"one segment, {n} stations, fault_patch + profile likelihood: {seconds:.2f} s, "
          f"{fit.n_forward} forward calls ({1e6 * seconds / fit.n_forward:.0f} µs each incl. "
          f"solve); top depth {row['top_depth_m']:.0f} m "
          f"[{row['top_depth_lo_m']:.0f}, {row['top_depth_hi_m']:.0f}] (true 180)")
    start = time.perf_counter()
    fit = fit_segment(stations, detection, uncertainty="profile")
    seconds = time.perf_counter() - start
    print(f"same with all models (none, fault_patch, two_patches, pole_pair): {seconds:.2f} s, "
          f"{fit.n_forward} forward calls, chosen {fit.chosen}")


def bench_twelve_segments():
    parts, detections, start = [], [], 0
    for i in range(12):
        segment = _segment(f"B{i + 1}-1", (400000.0 + 5000.0 * (i % 4), 5100000.0 + 5000.0 * (i // 4)))
        easting, northing, sp = _survey(segment, n_lines=4, n_per_line=60, seed=i)
        parts.append((easting, northing, sp))
        detections.append(Detection(segment, np.arange(sp.size) + start, sp.size, 10.0, 1, True,
                                    4.0, 3.0, {}))
        start += sp.size
    easting, northing, sp = (np.concatenate(a) for a in zip(*parts))
    n = sp.size
    stations = Stations([f"B{i}" for i in range(n)], easting, northing, np.zeros(n), sp,
                        "EPSG:32632", sigma_mv=np.full(n, 3.0))
    options = dict(models=("fault_patch", "pole_pair"), uncertainty="profile", n_starts=256,
                   n_local=4)
    times = {}
    for workers in (1, 2):
        begin = time.perf_counter()
        result = fit_segments(stations, detections, workers=workers, **options)
        times[workers] = time.perf_counter() - begin
        print(f"12 segments ({n} stations), workers={workers}: {times[workers]:.1f} s, "
              f"{len(result.sources)} sources")
    print(f"speed-up with 2 workers: {times[1] / times[2]:.2f}x "
          "(includes starting 2 spawned processes)")


if __name__ == "__main__":
    bench_one_segment()
    bench_twelve_segments()
