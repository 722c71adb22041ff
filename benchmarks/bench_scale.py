"""
Scale benchmark: 10^5 stations and 10^3 fault segments through reduce -> grid -> detect -> fit.

Synthetic survey (invented): north-south lines 100 m apart with stations every 25 m
(250 lines x 400 stations = 10^5 by default, 25 km x 10 km), 50 straight fault traces
crossing the area cut into segments of at most ``max_length_m`` (so that there are about
10^3), and an SP field made of fault patches planted on every fifth fault
(geosp.physics.forward.sources_sp) plus 1 mV Gaussian noise.

The survey model works block by block on a survey this size (geosp.interpret.blocks);
options that keep it tractable (stated in the output too):
  [detect] n_null = 200 (default 1000), n_starts = 8 (default 32),
           max_length_m chosen for ~10^3 segments
  [grid]   defaults (cell size "auto", capped by max_nodes)

Prints the wall time of each stage and the peak resident memory of the process
(resource.getrusage ru_maxrss, which includes every earlier stage; worker processes are
reported separately as RUSAGE_CHILDREN), and with --tracemalloc the peak of Python/numpy
allocations within each stage. Target: under 2 GB.

Run: python benchmarks/bench_scale.py [--lines 250 --per-line 400 --faults 50 --segments 1000 --workers 1]
(about 20-30 min on one core; --lines 60 gives a 2.4x10^4-station run in a few minutes)
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import tracemalloc
import warnings

import numpy as np

from geosp.grid import grid_stations, station_spacing
from geosp.interpret import detect_sources, fit_sources
from geosp.interpret.blocks import plan_blocks
from geosp.models import Fault, Stations, Survey
from geosp.physics.forward import sources_sp
from geosp.reduce import reduce_survey
from geosp.segments import make_segments

CRS = "EPSG:32633"
E0, N0 = 500000.0, 4500000.0


def make_survey(n_lines, per_line, n_faults, *, seed=0):
    """Stations, faults and planted sources; returns (Survey, number of planted patches)."""
    rng = np.random.default_rng(seed)
    e, n = np.meshgrid(E0 + np.arange(n_lines) * 100.0, N0 + np.arange(per_line) * 25.0, indexing="ij")
    e, n = e.ravel(), n.ravel()
    width, height = n_lines * 100.0, per_line * 25.0
    # Faults: near north-south traces spread evenly across the area, slightly oblique.
    faults, rows = [], []
    for k in range(n_faults):
        x = E0 + (k + 0.5) * width / n_faults
        tilt = rng.uniform(-0.05, 0.05) * height
        coords = np.array([[x - tilt / 2, N0 - 100.0], [x + tilt / 2, N0 + height + 100.0]])
        faults.append(Fault(fault_id=f"F{k:03d}", coords=coords, dip_deg=np.nan, dip_dir_deg=np.nan,
                            source_row=k + 1))
        if k % 5 == 0:
            strike = float(np.degrees(np.arctan2(coords[1, 0] - coords[0, 0], coords[1, 1] - coords[0, 1])) % 360)
            for frac in (0.25, 0.7):
                t = frac
                rows.append(dict(model="fault_patch", top_x=coords[0, 0] + t * (coords[1, 0] - coords[0, 0]),
                                 top_y=coords[0, 1] + t * (coords[1, 1] - coords[0, 1]), strike_deg=strike,
                                 dip_deg=70.0, top_depth_m=60.0, bottom_depth_m=300.0, length_m=400.0,
                                 jump_mv=float(rng.choice([-1, 1]) * rng.uniform(40, 80))))
    sp = sources_sp((e, n), rows) + rng.normal(0.0, 1.0, e.size)
    line = np.repeat(np.array([f"L{i:03d}" for i in range(n_lines)]), per_line)
    ids = np.char.add(np.char.add(line, "-"), np.tile(np.arange(per_line).astype(str), n_lines))
    stations = Stations(station_id=ids, easting=e, northing=n, upward=np.full(e.size, np.nan), sp_mv=sp, crs=CRS,
                        line_id=line)
    return Survey(stations=stations, faults=tuple(faults), crs=CRS, name="Scale benchmark"), len(rows)


def rss_mb(who=resource.RUSAGE_SELF):
    return resource.getrusage(who).ru_maxrss / 1024.0  # kB on Linux


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    parser.add_argument("--lines", type=int, default=250)
    parser.add_argument("--per-line", type=int, default=400)
    parser.add_argument("--faults", type=int, default=50)
    parser.add_argument("--segments", type=int, default=1000, help="target number of fault segments")
    parser.add_argument("--workers", type=int, default=1)
    parser.add_argument("--tracemalloc", action="store_true", help="peak Python/numpy allocations per stage")
    args = parser.parse_args(argv)

    t0 = time.perf_counter()
    survey, n_planted = make_survey(args.lines, args.per_line, args.faults)
    height = args.per_line * 25.0 + 200.0
    max_length = height / max(args.segments // args.faults, 1) * 1.01
    print(f"survey: {len(survey.stations.station_id)} stations, {args.faults} faults, {n_planted} planted patches "
          f"(built in {time.perf_counter() - t0:.1f} s, RSS {rss_mb():.0f} MB)")
    n_blocks = len(plan_blocks(survey.stations.easting, survey.stations.northing))
    print(f"options: detect n_null=200, n_starts=8, max_length_m={max_length:.0f}, workers={args.workers}; "
          f"the survey model runs in {n_blocks} block(s)")
    results = {}

    def stage(name, func):
        if args.tracemalloc:
            tracemalloc.start()
        start = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            value = func()
        elapsed = time.perf_counter() - start
        peak = ""
        if args.tracemalloc:
            peak = f", traced peak {tracemalloc.get_traced_memory()[1] / 2**20:.0f} MB"
            tracemalloc.stop()
        results[name] = elapsed
        print(f"{name:<8s} {elapsed:8.1f} s   max RSS so far {rss_mb():7.0f} MB{peak}", flush=True)
        return value

    reduction = stage("reduce", lambda: reduce_survey(survey))
    stations = reduction.stations
    grid = stage("grid", lambda: grid_stations(stations))
    spacing = station_spacing(stations)
    segments = stage("segment", lambda: make_segments(survey.faults, station_spacing_m=spacing,
                                                      max_length_m=max_length))
    network = reduction.network.get("station_covariance")
    selection, detections = stage("detect", lambda: detect_sources(
        stations, segments, network=network, n_null=200, n_starts=8, workers=args.workers))
    n_detected = sum(d.detected for d in detections)
    result = stage("fit", lambda: fit_sources(selection, stations, detections, network=network))
    fits = result.fits
    grid_shape = grid.grid.values.shape
    print(f"segments {len(segments)}, detected {n_detected}, sources {len(fits.sources)}, grid {grid_shape}")
    total = sum(results.values())
    peak = max(rss_mb(), rss_mb(resource.RUSAGE_CHILDREN))
    print(f"total    {total:8.1f} s   peak RSS {rss_mb():.0f} MB "
          f"(largest worker {rss_mb(resource.RUSAGE_CHILDREN):.0f} MB) -> {'under' if peak < 2048 else 'OVER'} the 2 GB target")
    return 0


if __name__ == "__main__":
    sys.exit(main())
