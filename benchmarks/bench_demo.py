"""
Time `geosp demo` end to end, stage by stage, with 1 and 2 fit workers.

Prints wall-clock seconds per stage and the total as a fraction of the one-minute
budget for a 2-core laptop; the fit-stage speed-up of 2 workers over 1 is measured
in the same run. Usage: python benchmarks/bench_demo.py
"""

import tempfile
import time

BUDGET_S = 60.0


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


if __name__ == "__main__":
    main()
