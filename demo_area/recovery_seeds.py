"""
How often does the demo pipeline recover the planted patches? Regenerate the
demo area with other seeds (same survey, sources and noise levels; another
realisation of the noise, drift, outliers and pegging scatter), run the whole
pipeline on each and count the patches found within the fitting tolerances
(top depth 20 %, √(top·bottom) 10 %) and the false sources.

Usage::

    python demo_area/recovery_seeds.py [N_SEEDS] [--workers W]

Seeds are 1 … N (default 6); the shipped demo uses its own seed. Each run
takes about a minute on two cores.
"""

import argparse
import sys
import tempfile
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    parser.add_argument("n_seeds", nargs="?", type=int, default=6)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)

    from demo_area.compare import compare_sources, false_sources
    from demo_area.make_demo import make_demo
    from geosp import pipeline

    rows = []
    for seed in range(1, args.n_seeds + 1):
        with tempfile.TemporaryDirectory() as tmp:
            area, out = Path(tmp) / "area", Path(tmp) / "out"
            truth = make_demo(area, seed=seed)
            _, state = pipeline.execute(area / "project.toml", ("reduce", "grid", "detect", "fit"),
                                        out=out, workers=args.workers)
            table = compare_sources(state.fits.sources, truth)
            false = false_sources(state.fits.sources, truth)
        n_false = len(false["source_free_faults"]) + len(false["at_pipeline"])
        for r in table.itertuples():
            rows.append({"seed": seed, "planted": r.planted, "found": bool(r.found),
                         "top_error": getattr(r, "top_depth_error", float("nan")),
                         "geo_mean_error": getattr(r, "geo_mean_error", float("nan")),
                         "within": bool(r.within_tolerance), "false_sources": n_false})
        print(table[["planted", "found", "top_depth_m", "top_depth_true_m", "geo_mean_m", "geo_mean_true_m",
                     "within_tolerance"]].round(1).to_string(index=False), f"\nseed {seed}: false sources {n_false}",
              flush=True)
    frame = pd.DataFrame(rows)
    summary = frame.groupby("planted").agg(
        found=("found", "mean"), within=("within", "mean"),
        top_error_rms=("top_error", lambda v: float((v ** 2).mean() ** 0.5)),
        geo_mean_error_rms=("geo_mean_error", lambda v: float((v ** 2).mean() ** 0.5)))
    print(summary.round(3).to_string())
    every = frame.groupby("seed")["within"].all()
    print(f"all three within tolerance in {int(every.sum())} of {every.size} seeds; "
          f"false sources in {int((frame.groupby('seed')['false_sources'].first() > 0).sum())} seeds")


if __name__ == "__main__":
    main()
