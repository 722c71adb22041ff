"""
Benchmark: grid 10⁵ stations on survey lines and compare with linear griddata.

An invented smooth SP field (Gaussian anomalies from 350 m to 800 m wide, a
pair forming a dipole-like anomaly, a regional gradient) is sampled on 100
east-west lines 100 m apart with stations every 10 m (10⁵ stations over
10 km × 10 km), plus 1 mV Gaussian noise. Each method grids onto the same
nodes; errors are measured against the noise-free field at nodes inside the
mask, overall and between lines (nodes at least 25 m from a line).

Run with ``python benchmarks/bench_grid.py`` (about a minute on one core).
"""

import argparse
import time

import numpy as np
from scipy.interpolate import griddata

from geosp.grid import grid_stations
from geosp.models import Stations


def field(x, y):
    """Invented SP field in mV."""
    def gauss(x0, y0, s, a):
        return a * np.exp(-((x - x0) ** 2 + (y - y0) ** 2) / (2 * s**2))

    return (gauss(3000, 4000, 800, -120) + gauss(6500, 6000, 500, 60) + gauss(5000, 2500, 350, -45)
            + gauss(5200, 3200, 350, 45) + gauss(8000, 8500, 400, -70) + 0.004 * x)


def survey(n_lines=100, per_line=1000, line_spacing=100.0, noise=1.0, seed=0):
    rng = np.random.default_rng(seed)
    along = np.linspace(0, 10_000, per_line)
    x = np.concatenate([along + rng.uniform(-5, 5) for _ in range(n_lines)])
    y = np.repeat(np.arange(n_lines) * line_spacing, per_line) + rng.normal(0, 2, n_lines * per_line)
    line = np.repeat([f"L{i:03d}" for i in range(n_lines)], per_line)
    sp = field(x, y) + rng.normal(0, noise, x.size)
    return Stations(np.arange(x.size).astype(str), x, y, np.zeros(x.size), sp, "EPSG:32611", line_id=line)


def timed(func):
    wall, cpu = time.perf_counter(), time.process_time()
    out = func()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def rmse(a, b):
    ok = np.isfinite(a) & np.isfinite(b)
    return float(np.sqrt(np.mean((a[ok] - b[ok]) ** 2)))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    parser.add_argument("--lines", type=int, default=100)
    parser.add_argument("--per-line", type=int, default=1000)
    parser.add_argument("--noise", type=float, default=1.0)
    args = parser.parse_args(argv)

    stations = survey(args.lines, args.per_line, noise=args.noise)
    result, wall_cv, cpu_cv = timed(lambda: grid_stations(stations))
    p = result.params
    fixed, wall_fixed, cpu_fixed = timed(
        lambda: grid_stations(stations, tension=p["tension"], damping=p["damping"], cv="none"))
    g = result.grid
    ge, gn = np.meshgrid(g.easting, g.northing)
    inside = np.isfinite(g.values)
    e, n = ge[inside], gn[inside]
    truth = field(e, n)
    between = np.abs((n + 50) % 100 - 50) >= 25
    linear, wall_lin, cpu_lin = timed(
        lambda: griddata((stations.easting, stations.northing), stations.sp_mv, (e, n), method="linear"))

    from scipy.spatial import Delaunay

    _, wall_tri, cpu_tri = timed(lambda: Delaunay(np.column_stack([stations.easting, stations.northing])))
    spline = g.values[inside]
    rows = [
        ("grid_stations (with CV)", wall_cv, cpu_cv, rmse(spline, truth), rmse(spline[between], truth[between])),
        ("grid_stations (fixed)", wall_fixed, cpu_fixed, rmse(fixed.grid.values[inside], truth),
         rmse(fixed.grid.values[inside][between], truth[between])),
        ("griddata linear", wall_lin, cpu_lin, rmse(linear, truth), rmse(linear[between], truth[between])),
    ]
    print(f"{len(stations)} stations on {args.lines} lines, noise {args.noise} mV; "
          f"{inside.sum()} nodes in the mask ({g.values.shape[1]} x {g.values.shape[0]}, "
          f"cell {p['cell_size_m']} m)")
    print(f"chosen: tension {p['tension']}, damping {p['damping']}, blocks {p['n_blocks']}, "
          f"windows {p['windows']}; CV ({p['cv']}) RMSE {result.cv_rmse_mv:.3f} mV")
    print(f"{'method':26s} {'wall s':>8s} {'cpu s':>8s} {'rmse mV':>9s} {'between':>9s}")
    for name, wall, cpu, err, err_between in rows:
        print(f"{name:26s} {wall:8.2f} {cpu:8.2f} {err:9.3f} {err_between:9.3f}")
    lin = rows[2]
    for name, wall, cpu, err, err_between in rows[:2]:
        print(f"{name}: error ratio to linear {err / lin[3]:.2f} (between lines {err_between / lin[4]:.2f}), "
              f"cpu-time ratio {cpu / lin[2]:.2f}, wall-time ratio {wall / lin[1]:.2f}")
    print(f"(griddata = Delaunay triangulation {cpu_tri:.2f} s cpu + point location and "
          f"interpolation {cpu_lin - cpu_tri:.2f} s cpu; point location is slow on long thin "
          f"triangles between lines. grid_stations cpu / triangulation alone: {cpu_cv / cpu_tri:.1f})")
    print(result.cv_table.to_string(index=False))


if __name__ == "__main__":
    main()
