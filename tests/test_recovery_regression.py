"""
A fixed subset of the recovery benchmark (benchmarks/bench_recovery.py) as a regression guard.

Five crew-reduced surveys from the benchmark's generator (seeds 8, 16, 17, 30 and 40: 16
planted patches above the detectability floor, a pipeline, casings, source-free faults),
each run with `geosp run` and default settings and scored against the planted truth and the
Cramér–Rao bound of its stations. On 2026-12-05 these five gave recall 15/16, 6 false
sources in 21 claims, and the full 40-survey benchmark the figures in docs/accuracy.md.
The thresholds sit below the measured values: they catch a regression, they do not
measure accuracy (the benchmark does, outside CI).
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import bench_recovery  # noqa: E402
from recovery import score  # noqa: E402

pytestmark = pytest.mark.slow

SEEDS = (8, 16, 17, 30, 40)


@pytest.fixture(scope="module")
def scored(tmp_path_factory):
    root = tmp_path_factory.mktemp("recovery")
    scores = [bench_recovery.run_survey(seed, False, root / f"s{seed}") for seed in SEEDS]
    return scores, score.pool(scores)


def test_every_survey_runs(scored):
    scores, _ = scored
    assert [s["exit_code"] for s in scores] == [0] * len(SEEDS), [s["error"] for s in scores]


def test_recall_and_precision_hold(scored):
    _, pooled = scored
    assert pooled["required"] == 16
    assert pooled["recall"] >= 0.80, pooled  # measured 15/16
    assert pooled["precision"] >= 0.55, pooled  # measured 15/21


def test_depths_stay_near_the_cramer_rao_bound(scored):
    _, pooled = scored
    assert math.isfinite(pooled["median_top_over_crb_alone"])
    assert pooled["median_top_over_crb_alone"] <= 3.0, pooled  # full benchmark: 1.1
    assert pooled["median_abs_top_rel_error"] <= 0.5, pooled  # full benchmark: 0.19
    assert pooled["top_coverage"] >= 0.4, pooled  # full benchmark: 0.70
