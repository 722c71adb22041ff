"""
Time `geosp demo` end to end, stage by stage, with 1 and 2 fit workers, and
check that the run's BLAS thread control makes the environment irrelevant.

Prints wall-clock seconds per stage and the total as a fraction of the
one-minute budget for a 2-core laptop; the fit-stage speed-up of 2 workers
over 1 is measured in the same run. Then runs the demo as a command twice,
with ``OPENBLAS_NUM_THREADS`` unset and set to 1, and prints the ratio of
their wall times (geosp limits BLAS itself, so it should be close to 1).
Usage: python benchmarks/bench_demo.py [--skip-env]
"""

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

BUDGET_S = 60.0
THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def _demo_command_seconds(env):
    geosp = Path(sys.executable).with_name("geosp")
    with tempfile.TemporaryDirectory() as out:
        t0 = time.perf_counter()
        subprocess.run([str(geosp), "demo", "--out", out, "--workers", "1", "--quiet"], env=env,
                       check=True)
        return time.perf_counter() - t0


def main():
    from geosp import pipeline

    for workers in (1, 2):
        with tempfile.TemporaryDirectory() as out:
            t0 = time.perf_counter()
            _, state = pipeline.demo(out, workers=workers)
            total = time.perf_counter() - t0
        stages = ", ".join(f"{k} {v:.1f}" for k, v in state.timings.items() if k != "total")
        print(f"workers={workers}: total {total:.1f} s ({total / BUDGET_S:.2f} of the {BUDGET_S:.0f} s budget); "
              f"stages (s): {stages}")
        if workers == 1:
            fit_1 = state.timings.get("fit", float("nan"))
        else:
            print(f"fit stage speed-up with 2 workers: {fit_1 / state.timings.get('fit', float('nan')):.2f}x")
    if "--skip-env" in sys.argv:
        return
    unset = {k: v for k, v in os.environ.items() if k not in THREAD_VARIABLES}
    one = dict(unset, OPENBLAS_NUM_THREADS="1")
    t_unset = _demo_command_seconds(unset)
    t_one = _demo_command_seconds(one)
    print(f"geosp demo --workers 1: {t_unset:.1f} s with OPENBLAS_NUM_THREADS unset, {t_one:.1f} s with it "
          f"set to 1 (ratio {t_unset / t_one:.2f}; geosp limits BLAS itself)")


if __name__ == "__main__":
    main()
