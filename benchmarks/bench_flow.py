"""
Speed of the primary-flow finite-volume solves (geosp.flow).

For 2-D sections (sparse LU) and 3-D boxes (classical-AMG CG when pyamg is
installed, else Jacobi CG) at 3–4 mesh sizes, prints the wall-clock time of
one pressure solve plus one SP solve, cells per second, and the growth
exponent b of time ∝ cells^b from a log-log fit. Run:
``python benchmarks/bench_flow.py [--quick]``.
"""

import os

for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from geosp import flow  # noqa: E402
from geosp.models import FlowSource  # noqa: E402


def one_case(core, depth, cell):
    """Pressure of a point source, then SP with a dipping C_P contact; returns (cells, s)."""
    mesh = flow.make_mesh(core, depth, cell)
    centres = mesh.grid()
    x, z = centres[0], centres[-1]
    c_p = np.where(x > 0.3 * z, -1e-7, -3e-7)
    point = [0.2 * depth] + ([0.0] if mesh.ndim == 3 else []) + [0.6 * depth]
    source = flow._source_vector(mesh, [FlowSource("q", "pressure", "point",
                                                   np.array(point), 1e-5)])
    start = time.perf_counter()
    p = flow.solve_pressure(mesh, 1e-10, source=source)
    flow.solve_sp(mesh, np.where(x > 0.3 * z, 0.05, 0.01), c_p=c_p, pressure=p)
    return mesh.n_cells, time.perf_counter() - start


def run(label, cases):
    cells, seconds = [], []
    print(f"\n{label}")
    print(f"{'cells':>10} {'seconds':>9} {'cells/s':>10}")
    for args in cases:
        n, s = one_case(*args)
        cells.append(n)
        seconds.append(s)
        print(f"{n:>10d} {s:>9.2f} {n / s:>10.0f}")
    slope = np.polyfit(np.log(cells), np.log(seconds), 1)[0]
    print(f"time grows as cells^{slope:.2f}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    parser.add_argument("--quick", action="store_true", help="smaller meshes")
    args = parser.parse_args()
    cells_2d = (40.0, 20.0, 10.0) if args.quick else (40.0, 20.0, 10.0, 4.0)
    run("2-D section, 2 km x 1 km core (pressure + SP, sparse LU)",
        [([(-1000.0, 1000.0)], 1000.0, h) for h in cells_2d])
    cells_3d = (100.0, 70.0, 50.0) if args.quick else (100.0, 70.0, 50.0, 40.0)
    run("3-D box, 2 km x 2 km x 1 km core (pressure + SP, AMG-CG)",
        [([(-1000.0, 1000.0), (-1000.0, 1000.0)], 1000.0, h) for h in cells_3d])


if __name__ == "__main__":
    main()
