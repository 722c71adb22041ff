"""
Speed and memory of the fault-patch forward model.

Prints station-patch evaluations per second of the production path
(``patch_sp_local``, compiled kernel when numba is installed; and
``sources_sp`` over many patches) beside, and as ratios to, a plain numpy
two-triangle solid angle on (N, 3) arrays, the numpy closed-form reference
kernel, a dense point-dipole sum and scipy quadrature, all in this run.
Then the compiled value and Jacobian kernels (``_fast``, called directly)
as ratios to an independent compiled reference written here: the
Van Oosterom & Strackee two-triangle solid angle in numba, one ``atan2``
per triangle, on the same stations (target for the value kernel: ≥ 0.9).
Then the peak traced memory of ``sources_sp`` for 10⁶ stations × 100
patches. Run: ``python benchmarks/bench_forward.py [--quick]``.
"""

import os

# One core for every method (numpy's BLAS would otherwise use threads).
for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import argparse  # noqa: E402
import math  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402

import numpy as np  # noqa: E402
from scipy import integrate  # noqa: E402

from geosp.physics import _fast, _kernels, patch_sp_local, sources_sp  # noqa: E402

try:
    from numba import njit  # noqa: E402
except ImportError:  # pragma: no cover - the compiled comparison is skipped
    njit = None

PATCH = dict(centre_m=100.0, length_m=800.0, depth_top_m=150.0, depth_bottom_m=600.0,
             dip_deg=60.0, jump_mv=1.0)
GEOMETRY = (100.0, 800.0, 150.0, 600.0, np.radians(60.0))


def rate(function, n_evaluations, *, repeat=3):
    """
    Best-of-``repeat`` evaluations per second of ``function()``, by CPU time
    of this process (the machine may be shared; every method here runs on
    one core) and by wall-clock time.
    """
    best_cpu = best_wall = np.inf
    for _ in range(repeat):
        start_cpu, start_wall = time.process_time(), time.perf_counter()
        function()
        best_cpu = min(best_cpu, time.process_time() - start_cpu)
        best_wall = min(best_wall, time.perf_counter() - start_wall)
    return n_evaluations / best_cpu, n_evaluations / best_wall


def dipole_sum(along, across, m):
    """Surface SP as m × m point dipoles with images (midpoint rule)."""
    centre, length, top, bottom, dip = GEOMETRY
    e = np.array([0.0, np.cos(dip), -np.sin(dip)])
    n = np.array([0.0, np.sin(dip), np.cos(dip)])
    ds, dw = length / m, (bottom - top) / np.sin(dip) / m
    s = centre - length / 2 + ds * (np.arange(m) + 0.5)
    w = top / np.sin(dip) + dw * (np.arange(m) + 0.5)
    S, W = np.meshgrid(s, w, indexing="ij")
    src = np.stack([S.ravel(), W.ravel() * e[1], W.ravel() * e[2]], axis=-1)
    out = np.empty(along.size)
    for i in range(along.size):
        d = np.array([along[i], across[i], 0.0]) - src
        out[i] = 2 * ds * dw * np.sum(d @ n / np.einsum("ij,ij->i", d, d) ** 1.5) / (4 * np.pi)
    return out


def quadrature(along, across):
    """Surface SP by scipy dblquad of the double-layer kernel, per station."""
    centre, length, top, bottom, dip = GEOMETRY
    e = np.array([0.0, np.cos(dip), -np.sin(dip)])
    n = np.array([0.0, np.sin(dip), np.cos(dip)])
    out = np.empty(along.size)
    for i in range(along.size):
        point = np.array([along[i], across[i], 0.0])

        def integrand(w, s):
            d = point - (np.array([s, 0.0, 0.0]) + w * e)
            return n @ d / np.linalg.norm(d) ** 3

        value, _ = integrate.dblquad(integrand, centre - length / 2, centre + length / 2,
                                     top / np.sin(dip), bottom / np.sin(dip),
                                     epsabs=1e-10, epsrel=1e-8)
        out[i] = value / (2 * np.pi)
    return out


def two_triangle_reference(along, across, centre, length, top, bottom, dip, out):
    """
    Independent compiled reference: surface SP (f = 1) of the patch as two
    triangles, Ω = 2·atan2(R₁·(R₂×R₃), |R₁||R₂||R₃| + (R₁·R₂)|R₃| +
    (R₁·R₃)|R₂| + (R₂·R₃)|R₁|) each, R_k = corner − station in (along,
    across, up); corners top@c−L/2, bottom@c−L/2, bottom@c+L/2, top@c+L/2.
    V = Ω/(2π) with the image. Written here from the triangle formula
    alone; it uses nothing from geosp.
    """
    cot = math.cos(dip) / math.sin(dip)
    s1, s2 = centre - 0.5 * length, centre + 0.5 * length
    t_top, t_bottom = top * cot, bottom * cot
    for i in range(along.shape[0]):
        x1, y1, z1 = s1 - along[i], t_top - across[i], -top
        x2, y2, z2 = s1 - along[i], t_bottom - across[i], -bottom
        x3, y3, z3 = s2 - along[i], t_bottom - across[i], -bottom
        x4, y4, z4 = s2 - along[i], t_top - across[i], -top
        n1 = math.sqrt(x1 * x1 + y1 * y1 + z1 * z1)
        n2 = math.sqrt(x2 * x2 + y2 * y2 + z2 * z2)
        n3 = math.sqrt(x3 * x3 + y3 * y3 + z3 * z3)
        n4 = math.sqrt(x4 * x4 + y4 * y4 + z4 * z4)
        d12 = x1 * x2 + y1 * y2 + z1 * z2
        d13 = x1 * x3 + y1 * y3 + z1 * z3
        d14 = x1 * x4 + y1 * y4 + z1 * z4
        d23 = x2 * x3 + y2 * y3 + z2 * z3
        d34 = x3 * x4 + y3 * y4 + z3 * z4
        triple_123 = (x1 * (y2 * z3 - z2 * y3) + y1 * (z2 * x3 - x2 * z3)
                      + z1 * (x2 * y3 - y2 * x3))
        triple_134 = (x1 * (y3 * z4 - z3 * y4) + y1 * (z3 * x4 - x3 * z4)
                      + z1 * (x3 * y4 - y3 * x4))
        denominator_123 = n1 * n2 * n3 + d12 * n3 + d13 * n2 + d23 * n1
        denominator_134 = n1 * n3 * n4 + d13 * n4 + d14 * n3 + d34 * n1
        out[i] = (math.atan2(triple_123, denominator_123)
                  + math.atan2(triple_134, denominator_134)) / math.pi
    return out


if njit is not None:
    two_triangle_reference = njit(fastmath=False)(two_triangle_reference)


def interleaved_rates(functions, n_evaluations, *, repeat):
    """
    Best-of-``repeat`` CPU-time rates of several functions, timed in turn
    in each round so that a change of machine load affects all of them.
    """
    best = [np.inf] * len(functions)
    for _ in range(repeat):
        for k, function in enumerate(functions):
            start = time.process_time()
            function()
            best[k] = min(best[k], time.process_time() - start)
    return [n_evaluations / b for b in best]


def compiled_comparison(along, across, repeat):
    """Print the compiled kernels' rates as ratios to the independent reference."""
    if njit is None or not _fast.AVAILABLE:
        print("compiled kernels: numba not installed, comparison skipped")
        return
    n = along.size
    centre, length, top, bottom, dip = GEOMETRY
    tops, bottoms = np.array([top]), np.array([bottom])
    reference_out, value_out, sp = np.empty(n), np.empty(n), np.empty(n)
    jac = np.empty((n, 5))

    def reference():
        two_triangle_reference(along, across, centre, length, top, bottom, dip, reference_out)

    def value():
        _fast.patch_sp_surface(along, across, tops, bottoms, centre, length, dip, 1.0, 1.0, 1.0,
                               value_out)

    def jacobian():
        _fast.patch_sp_jacobian_surface(along, across, tops, bottoms, centre, length, dip, 1.0,
                                        1.0, 1.0, sp, jac)

    for function in (reference, value, jacobian):  # compile / load the cache
        function()
    ref_rate, value_rate, jac_rate = interleaved_rates((reference, value, jacobian), n,
                                                       repeat=repeat)
    print(f"compiled kernels, {n} stations, one core, CPU time, best of {repeat} "
          "(ratio = this / reference):")
    print(f"{'kernel':48s} {'evals/s (CPU)':>14s} {'ratio':>10s}")
    for name, cpu in (("independent reference: numba two triangles", ref_rate),
                      ("geosp value kernel _fast.patch_sp_surface", value_rate),
                      ("geosp Jacobian _fast.patch_sp_jacobian_surface", jac_rate)):
        print(f"{name:48s} {cpu:14.4g} {cpu / ref_rate:10.3f}")
    print(f"value kernel / reference: {value_rate / ref_rate:.3f} (target >= 0.9)")
    print("max |value kernel - reference| (f = 1): "
          f"{np.abs(value_out - reference_out).max():.2e}, "
          f"Jacobian SP - value kernel: {np.abs(sp - value_out).max():.2e}")


def random_patches(count, rng):
    return [
        dict(model="fault_patch", top_x=rng.uniform(-3000, 3000), top_y=rng.uniform(-3000, 3000),
             strike_deg=rng.uniform(0, 360), dip_deg=rng.uniform(30, 90),
             top_depth_m=rng.uniform(50, 300), bottom_depth_m=rng.uniform(400, 1500),
             length_m=rng.uniform(300, 2000), jump_mv=rng.uniform(-100, 100))
        for _ in range(count)
    ]


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    parser.add_argument("--quick", action="store_true", help="smaller sizes")
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    n = 200_000 if args.quick else 1_000_000
    along = rng.uniform(-3000, 3000, n)
    across = rng.uniform(-3000, 3000, n)
    patch_sp_local(along[:10], across[:10], **PATCH)  # compile / load the cache

    rows = []
    production = rate(lambda: patch_sp_local(along, across, **PATCH), n)
    kernel = "numba" if _fast.AVAILABLE else "numpy (numba missing)"
    rows.append((f"production: patch_sp_local [{kernel}]", production))

    m_src = 20 if args.quick else 100
    n_src = 20_000 if args.quick else 100_000
    e, nn = along[:n_src], across[:n_src]
    patches = random_patches(m_src, rng)
    rows.append((f"production: sources_sp, {m_src} patches",
                 rate(lambda: sources_sp((e, nn), patches), n_src * m_src, repeat=2)))

    k = 200_000
    rows.append(("numpy closed form (reference kernel)",
                 rate(lambda: _kernels.patch_potential(along[:k], across[:k], 0.0, *GEOMETRY,
                                                       1.0), k)))
    rows.append(("(a) numpy two triangles, (N,3) arrays",
                 rate(lambda: _kernels.rectangle_solid_angle_triangles(
                     along[:k], across[:k], 0.0, *GEOMETRY), k)))
    k_dip, m = 2000, 50
    rows.append((f"(b1) dense point-dipole sum, {m}x{m} dipoles",
                 rate(lambda: dipole_sum(along[:k_dip], across[:k_dip], m), k_dip, repeat=1)))
    k_quad = 20
    rows.append(("(b2) scipy dblquad, rtol 1e-8",
                 rate(lambda: quadrature(along[:k_quad], across[:k_quad]), k_quad, repeat=1)))

    print(f"station-patch evaluations per second (one process, {n} stations for the "
          "production path)")
    print(f"{'method':48s} {'evals/s (CPU)':>14s} {'(wall)':>10s} {'production / this':>18s}")
    for name, (cpu, wall) in rows:
        print(f"{name:48s} {cpu:14.4g} {wall:10.4g} {production[0] / cpu:18.4g}")

    # Accuracy of the comparison methods at a few stations (mV for f = 1).
    few = slice(0, 20)
    reference = patch_sp_local(along[few], across[few], **PATCH)
    print("max |difference| from production at 20 stations (f = 1):")
    others = {
        "numpy closed form": _kernels.patch_potential(along[few], across[few], 0.0, *GEOMETRY,
                                                      1.0),
        "two triangles": _kernels.rectangle_solid_angle_triangles(
            along[few], across[few], 0.0, *GEOMETRY) / (2 * np.pi),
        "dipole sum 50x50": dipole_sum(along[few], across[few], 50),
        "dblquad": quadrature(along[few], across[few]),
    }
    for name, values in others.items():
        print(f"  {name:18s}{np.abs(values - reference).max():.2e}")

    compiled_comparison(along, across, repeat=5)

    n_mem = 200_000 if args.quick else 1_000_000
    m_mem = 20 if args.quick else 100
    e_mem = rng.uniform(-5000, 5000, n_mem)
    n_mem_arr = rng.uniform(-5000, 5000, n_mem)
    patches = random_patches(m_mem, rng)
    tracemalloc.start()
    start = time.perf_counter()
    sources_sp((e_mem, n_mem_arr), patches)
    elapsed = time.perf_counter() - start
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"sources_sp, {n_mem} stations x {m_mem} patches: {elapsed:.1f} s, "
          f"peak traced memory {peak / 2**20:.1f} MiB (inputs {2 * n_mem * 8 / 2**20:.1f} MiB "
          "not counted)")


if __name__ == "__main__":
    main()
