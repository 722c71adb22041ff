"""
Recovery benchmark: how often geosp finds the planted sources on synthetic
surveys it was never tuned to, with default settings.

Draws N surveys from the generator of varied designs
(``benchmarks/recovery/generator.py``), writes each as input files, runs
``geosp run`` on it with nothing chosen per survey, scores the
interpretation against the truth (``recovery/score.py``) and against the
Cramér–Rao bound of that survey (``recovery/crb.py``), and prints one summary
line plus a per-survey table. Deterministic per seed.

Usage::

    python benchmarks/bench_recovery.py --n 40            # crew-reduced total field
    python benchmarks/bench_recovery.py --n 40 --raw      # raw leapfrog readings
    python benchmarks/bench_recovery.py --n 40 --doc docs/accuracy.md   # both, and the page

Options: ``--seed0`` first seed (survey k uses seed0 + k), ``--workers``
surveys run side by side (each ``geosp run`` in one process), ``--keep DIR``
keeps every survey's files and outputs, ``--json PATH`` where the summary goes
(default: ``recovery-<mode>.json`` in the working folder), ``--timeout`` per
survey in seconds.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from recovery import crb, generator, score  # noqa: E402

DEFAULT_TIMEOUT_S = 1200


# --------------------------------------------------------------------------- one survey


def _geosp_command(project, out):
    return [sys.executable, "-c", "import sys; from geosp.cli import main; sys.exit(main())",
            "run", str(project), "--out", str(out), "--workers", "1", "--quiet"]


def run_survey(seed, raw, folder, timeout=DEFAULT_TIMEOUT_S):
    """
    Generate, run, score one survey; return its score dict (JSON-able).

    A run that fails or times out scores as finding nothing; its exit code
    and the last lines of its error output are kept.
    """
    import pandas as pd
    from threadpoolctl import threadpool_limits

    folder = Path(folder)
    design = generator.draw_design(seed)
    truth = generator.write_survey(design, folder, raw=raw)
    out = folder / "out"
    env = {k: v for k, v in os.environ.items() if k not in ("PROJ_DATA", "PROJ_LIB", "GDAL_DATA")}
    t0 = time.perf_counter()
    try:
        done = subprocess.run(_geosp_command(folder / "project.toml", out), capture_output=True,
                              text=True, timeout=timeout, env=env)
        code, err = done.returncode, done.stderr
    except subprocess.TimeoutExpired:
        code, err = -1, f"timed out after {timeout} s"
    seconds = time.perf_counter() - t0
    result = score.read_result(out) if code == 0 else {"sources": [], "segments": [], "terrain": None,
                                                        "ok": False}
    stations = pd.read_csv(folder / truth.get("components_file", "truth_stations.csv"))
    with threadpool_limits(limits=1, user_api="blas"):
        bounds = crb.survey_bounds(truth, (stations["E"].to_numpy(), stations["N"].to_numpy(),
                                           stations["ELEV"].to_numpy()))
    scored = score.score_survey(truth, result, bounds)
    scored.update(raw=raw, exit_code=code, seconds=round(seconds, 1),
                  error=err.strip().splitlines()[-3:] if code != 0 else [],
                  n_faults=len(truth["faults"]),
                  n_cultural=len(truth.get("cultural", ())),
                  design={k: truth.get(k) for k in ("extent_m", "line_spacing_m", "station_spacing_m")},
                  bounds=bounds)
    return json.loads(json.dumps(scored, default=_json_default))


def _json_default(value):
    import numpy as np

    if isinstance(value, (np.floating,)):
        return float(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    raise TypeError(f"not JSON-able: {type(value).__name__}")


def _run_one(job):
    seed, raw, root, timeout = job
    folder = Path(root) / f"survey_{seed:05d}_{'raw' if raw else 'reduced'}"
    return run_survey(seed, raw, folder, timeout)


# --------------------------------------------------------------------------- many surveys


def run_benchmark(n, seed0, *, raw, workers, root, timeout=DEFAULT_TIMEOUT_S, say=print):
    """Score ``n`` surveys (seeds ``seed0 .. seed0 + n - 1``); return (scores, pooled)."""
    jobs = [(seed0 + k, raw, str(root), timeout) for k in range(n)]
    scores = []
    say(_table_header())
    if workers > 1:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            for scored in pool.map(_run_one, jobs):
                scores.append(scored)
                say(_table_row(scored))
    else:
        for job in jobs:
            scored = _run_one(job)
            scores.append(scored)
            say(_table_row(scored))
    return scores, score.pool(scores)


def _fmt(value, digits=2):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return f"{value:.{digits}f}"


def _table_header():
    return (f"{'seed':>6} {'stations':>8} {'faults':>6} {'req':>4} {'found':>5} {'claims':>6} {'false':>5} "
            f"{'|dtop|':>7} {'top/CRB':>7} {'|dgeo|':>7} {'geo/CRB':>7} {'k_z':>6} {'s':>6}  exit / false classes")


def _table_row(s):
    import numpy as np

    rows = s["patches"]
    top = np.median([abs(r["top_rel_error"]) for r in rows]) if rows else math.nan
    geo = np.median([abs(r["geo_rel_error"]) for r in rows]) if rows else math.nan
    top_crb = np.nanmedian([r["top_over_crb_alone"] for r in rows]) if rows else math.nan
    geo_crb = np.nanmedian([r["geo_over_crb_alone"] for r in rows]) if rows else math.nan
    classes = ", ".join(f"{k} {v}" for k, v in sorted(s["false_by_class"].items()))
    note = f"exit {s['exit_code']}" + (f"; {classes}" if classes else "")
    if s["exit_code"] != 0 and s["error"]:
        note += f"; {s['error'][-1][:80]}"
    return (f"{s['seed']:>6} {s['n_stations']:>8} {s['n_faults']:>6} {s['n_required']:>4} {s['n_found']:>5} "
            f"{s['n_claims']:>6} {s['n_false']:>5} {_fmt(top):>7} {_fmt(top_crb, 1):>7} {_fmt(geo):>7} "
            f"{_fmt(geo_crb, 1):>7} {_fmt(s['terrain_z'], 1):>6} {s['seconds']:>6.0f}  {note}")


def summary_line(pooled, *, raw):
    n_false = sum(n for kind, n in pooled["false_by_class"].items() if kind != "below floor")
    return (f"{'raw readings' if raw else 'reduced input'}: {pooled['surveys']} surveys "
            f"({pooled['failed_runs']} failed runs): recall {_fmt(pooled['recall'])} "
            f"({pooled['found']}/{pooled['required']}), precision {_fmt(pooled['precision'])} "
            f"(targets only: recall {_fmt(pooled['target_recall'])}, precision "
            f"{_fmt(pooled['target_precision'])}) "
            f"(false: {n_false}), "
            f"median |rel. error| top {_fmt(pooled['median_abs_top_rel_error'])} "
            f"geo-mean {_fmt(pooled['median_abs_geo_rel_error'])}, "
            f"median |error|/CRB top {_fmt(pooled['median_top_over_crb_alone'], 1)} "
            f"(joint {_fmt(pooled['median_top_over_crb_joint'], 1)}) "
            f"geo-mean {_fmt(pooled['median_geo_over_crb_alone'], 1)} "
            f"(joint {_fmt(pooled['median_geo_over_crb_joint'], 1)}), "
            f"16-84 % coverage top {_fmt(pooled['top_coverage'])} geo-mean {_fmt(pooled['geo_coverage'])}, "
            f"terrain within 2 sd {_fmt(pooled['terrain_within_2sd'])} of {pooled['terrain_surveys']}")


# --------------------------------------------------------------------------- accuracy page


def _doc_table(pooled_by_mode):
    lines = ["| figure | reduced input | raw readings |", "|---|---|---|"]
    rows = [
        ("surveys (failed runs)", lambda p: f"{p['surveys']} ({p['failed_runs']})"),
        ("planted patches above the floor", lambda p: str(p["required"])),
        ("recall", lambda p: f"{_fmt(p['recall'])} ({p['found']}/{p['required']})"),
        ("precision", lambda p: f"{_fmt(p['precision'])} ({p['claims']} claims)"),
        ("the same for sources reported as targets (status `target`)",
         lambda p: f"recall {_fmt(p['target_recall'])}, precision {_fmt(p['target_precision'])} "
                   f"({p['target_claims']} claims)"),
        ("false sources by class", lambda p: ", ".join(f"{k} {v}" for k, v in sorted(p["false_by_class"].items()))
         or "none"),
        ("median \\|relative error\\| of the top depth", lambda p: _fmt(p["median_abs_top_rel_error"])),
        ("median \\|relative error\\| of √(top·bottom)", lambda p: _fmt(p["median_abs_geo_rel_error"])),
        ("median \\|error\\| / Cramér–Rao σ, top depth (patch alone / joint)",
         lambda p: f"{_fmt(p['median_top_over_crb_alone'], 1)} / {_fmt(p['median_top_over_crb_joint'], 1)}"),
        ("median \\|error\\| / Cramér–Rao σ, √(top·bottom) (alone / joint)",
         lambda p: f"{_fmt(p['median_geo_over_crb_alone'], 1)} / {_fmt(p['median_geo_over_crb_joint'], 1)}"),
        ("16–84 % interval contains the true top depth", lambda p: _fmt(p["top_coverage"])),
        ("±1σ of √(top·bottom) contains the truth", lambda p: _fmt(p["geo_coverage"])),
        ("terrain coefficient within 2 reported σ",
         lambda p: f"{_fmt(p['terrain_within_2sd'])} of {p['terrain_surveys']} surveys"),
        ("seconds of `geosp run` per survey, median / largest (two surveys at a time on two cores)",
         lambda p: _timing_cell(p, "run_seconds")),
        ("the same per 3,000 stations", lambda p: _timing_cell(p, "seconds_per_3000")),
    ]
    for label, get in rows:
        cells = [get(pooled_by_mode[m]) if m in pooled_by_mode else "–" for m in ("reduced", "raw")]
        lines.append(f"| {label} | {cells[0]} | {cells[1]} |")
    return "\n".join(lines)


def timing(scores):
    """Median and largest wall time of the surveys' ``geosp run`` (s), whole and per 3,000 stations."""
    import numpy as np

    ran = [s for s in scores if s.get("exit_code") == 0 and s.get("n_stations")]
    if not ran:
        return {}
    seconds = np.array([s["seconds"] for s in ran], float)
    per = seconds * 3000.0 / np.array([s["n_stations"] for s in ran], float)
    return {"run_seconds": [float(np.median(seconds)), float(seconds.max())],
            "seconds_per_3000": [float(np.median(per)), float(per.max())]}


def _timing_cell(pooled, key):
    if key not in pooled:
        return "–"
    median, largest = pooled[key]
    return f"{median:.0f} / {largest:.0f}"


def write_accuracy_page(path, pooled_by_mode, *, n, seed0, command):
    from recovery.docs import accuracy_page

    text = accuracy_page(_doc_table(pooled_by_mode), n=n, seed0=seed0, command=command,
                         floor_rule=generator.FLOOR_RULE, ranges=generator.RANGES_TEXT)
    Path(path).write_text(text, encoding="utf-8")


# --------------------------------------------------------------------------- command line


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    parser.add_argument("--n", type=int, default=40, help="number of surveys (default 40)")
    parser.add_argument("--seed0", type=int, default=1, help="seed of the first survey (default 1)")
    parser.add_argument("--workers", type=int, default=1, help="surveys run side by side (default 1)")
    parser.add_argument("--raw", action="store_true", help="raw leapfrog readings instead of reduced values")
    parser.add_argument("--keep", type=Path, default=None, help="keep every survey's files and outputs here")
    parser.add_argument("--json", type=Path, default=None, help="summary JSON (default recovery-<mode>.json)")
    parser.add_argument("--timeout", type=float, default=DEFAULT_TIMEOUT_S, help="seconds per survey")
    parser.add_argument("--doc", type=Path, default=None,
                        help="run both modes and write this accuracy page (docs/accuracy.md)")
    args = parser.parse_args(argv)

    modes = [False, True] if args.doc else [args.raw]
    pooled_by_mode = {}
    with tempfile.TemporaryDirectory() as scratch:
        root = args.keep or Path(scratch)
        root.mkdir(parents=True, exist_ok=True)
        for raw in modes:
            mode = "raw" if raw else "reduced"
            t0 = time.perf_counter()
            scores, pooled = run_benchmark(args.n, args.seed0, raw=raw, workers=args.workers, root=root,
                                           timeout=args.timeout)
            pooled["seconds"] = round(time.perf_counter() - t0, 1)
            pooled.update(timing(scores))
            line = summary_line(pooled, raw=raw)
            print(line)
            pooled_by_mode[mode] = pooled
            target = args.json if (args.json and len(modes) == 1) else Path(f"recovery-{mode}.json")
            target.write_text(json.dumps({"summary": line, "pooled": pooled, "seed0": args.seed0, "n": args.n,
                                          "surveys": scores}, indent=1, default=_json_default),
                              encoding="utf-8")
    if args.doc:
        command = f"python benchmarks/bench_recovery.py --n {args.n} --seed0 {args.seed0} --doc {args.doc}"
        write_accuracy_page(args.doc, pooled_by_mode, n=args.n, seed0=args.seed0, command=command)
        print(f"wrote {args.doc}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
