"""
The recovery benchmark's scorer on answers whose score is known by
construction: the truth itself, the truth shifted, nothing, and claims of
each false class.
"""

import math
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from recovery import score  # noqa: E402


def make_truth():
    """Two faults along north; F01 carries two patches, F02 none; one casing near F02."""
    faults = [
        {"fault_id": "F01", "vertices": [[1000.0, 0.0], [1000.0, 6000.0]], "dip_deg": 80.0,
         "dip_dir_deg": 90.0, "mapped": False, "source_free": False},
        {"fault_id": "F02", "vertices": [[3000.0, 0.0], [3000.0, 6000.0]], "dip_deg": 70.0,
         "dip_dir_deg": 270.0, "mapped": False, "source_free": True},
    ]

    def patch(pid, s0, s1, top, bottom, above=True):
        offset = top / math.tan(math.radians(80.0))
        return {"patch_id": pid, "fault_id": "F01", "s0_m": s0, "s1_m": s1,
                "top_x": 1000.0 + offset, "top_y": 0.5 * (s0 + s1), "strike_deg": 0.0, "dip_deg": 80.0,
                "dip_dir_deg": 90.0, "top_depth_m": top, "bottom_depth_m": bottom, "length_m": s1 - s0,
                "jump_mv": 150.0, "sigma_ratio": 1.0, "ground_m": 500.0, "above_floor": above}

    patches = [patch("P1", 500.0, 1700.0, 200.0, 800.0), patch("P2", 3000.0, 4000.0, 100.0, 600.0),
               patch("P3", 5000.0, 5600.0, 400.0, 700.0, above=False)]
    return {"seed": 1, "n_stations": 100, "faults": faults, "patches": patches,
            "cultural": [{"kind": "casing", "poles": [[3100.0, 2500.0, 50.0, -3000.0]], "on_fault": None}],
            "terrain": {"k_mv_per_m": -1.0}}


def answer_row(p, **change):
    """A sources-layer row that reports planted patch ``p`` exactly (with intervals around it)."""
    top, bottom = p["top_depth_m"], p["bottom_depth_m"]
    row = {"model": "fault_patch", "source_id": p["patch_id"] + "-fit", "fault_id": p["fault_id"],
           "top_x": p["top_x"], "top_y": p["top_y"], "strike_deg": p["strike_deg"], "dip_deg": p["dip_deg"],
           "length_m": p["length_m"], "top_depth_m": top, "bottom_depth_m": bottom,
           "top_depth_lo_m": 0.9 * top, "top_depth_hi_m": 1.1 * top,
           "geo_mean_depth_sd_m": 0.05 * math.sqrt(top * bottom), "ground_m": p["ground_m"], "flags": ""}
    row.update(change)
    return row


def result(rows, terrain=None):
    return {"sources": rows, "segments": [], "ok": True,
            "terrain": {"slope_mv_per_m": -1.1, "sd_mv_per_m": 0.1} if terrain is None else terrain}


def test_perfect_answer_scores_full_recall_and_precision_and_zero_error():
    truth = make_truth()
    bounds = {"P1": {"top_alone": 20.0, "top_joint": 25.0, "geo_alone": 10.0, "geo_joint": 12.0}}
    s = score.score_survey(truth, result([answer_row(p) for p in truth["patches"][:2]]), bounds)
    assert (s["n_required"], s["n_found"], s["n_false"]) == (2, 2, 0)
    pooled = score.pool([s])
    assert pooled["recall"] == 1.0 and pooled["precision"] == 1.0
    for row in s["patches"]:
        assert row["top_rel_error"] == pytest.approx(0.0, abs=1e-12)
        assert row["geo_rel_error"] == pytest.approx(0.0, abs=1e-12)
        assert row["top_covered"] and row["geo_covered"]
    assert s["patches"][0]["top_over_crb_alone"] == pytest.approx(0.0, abs=1e-9)
    # terrain: (-1.1 - -1.0) / 0.1 = -1 reported sigma
    assert s["terrain_z"] == pytest.approx(-1.0)
    assert pooled["terrain_within_2sd"] == 1.0


def test_shifted_answers_give_the_shift_as_error():
    truth = make_truth()
    p1 = truth["patches"][0]
    bounds = {"P1": {"top_alone": 50.0, "top_joint": 100.0, "geo_alone": 40.0, "geo_joint": 80.0}}
    # 50 % deeper top with a ±10 % interval around it: the truth is outside.
    rows = [answer_row(p1, top_depth_m=300.0, top_depth_lo_m=270.0, top_depth_hi_m=330.0)]
    s = score.score_survey(truth, result(rows), bounds)
    (row,) = s["patches"]
    assert row["top_rel_error"] == pytest.approx(0.5)
    assert row["geo_rel_error"] == pytest.approx(math.sqrt(300 * 800) / math.sqrt(200 * 800) - 1)
    assert row["top_over_crb_alone"] == pytest.approx(100.0 / 50.0)
    assert row["top_over_crb_joint"] == pytest.approx(100.0 / 100.0)
    assert row["top_covered"] is False
    # A depth reported on another ground level is moved onto the planted one:
    # ground 40 m higher and top 40 m deeper is the same elevation.
    rows = [answer_row(p1, ground_m=540.0, top_depth_m=240.0, bottom_depth_m=840.0,
                       top_depth_lo_m=230.0, top_depth_hi_m=250.0)]
    (row,) = score.score_survey(truth, result(rows), bounds)["patches"]
    assert row["top_rel_error"] == pytest.approx(0.0, abs=1e-12) and row["top_covered"]


def test_empty_answer_finds_nothing_and_claims_nothing():
    truth = make_truth()
    s = score.score_survey(truth, result([], terrain={}))
    pooled = score.pool([s])
    assert pooled["recall"] == 0.0 and pooled["found"] == 0 and pooled["required"] == 2
    assert math.isnan(pooled["precision"])  # no claims: precision undefined, not 1
    assert math.isnan(s["terrain_z"])


def test_false_claims_are_classed():
    truth = make_truth()
    p1, p2, p3 = truth["patches"]
    rows = [
        answer_row(p1),
        answer_row(p1, source_id="dup", top_y=p1["top_y"] + 100.0),          # duplicate of P1
        answer_row(p3),                                                       # real but below floor
        answer_row(p1, source_id="free", fault_id="F02", top_x=3020.0, top_y=800.0),  # source-free fault
        answer_row(p1, source_id="casing", fault_id="F02", top_x=3020.0, top_y=2500.0),  # at the casing
        answer_row(p1, source_id="gap", top_y=2350.0, length_m=400.0),        # F01 between P1 and P2
        {"model": "pole_pair", "source_id": "Q1", "fault_id": "F02", "top_x": 3100.0, "top_y": 2500.0},
    ]
    s = score.score_survey(truth, result(rows))
    assert s["false_by_class"] == {"duplicate": 1, "source-free fault": 1, "cultural": 1,
                                   "elsewhere": 1}
    assert s["n_found"] == 1 and s["n_other_models"] == 1
    # precision: P1 and the below-floor P3 are real; duplicate, source-free, cultural, elsewhere are not
    assert score.pool([s])["precision"] == pytest.approx(2 / 6)


def test_one_claim_cannot_find_two_patches():
    truth = make_truth()
    p1, p2 = truth["patches"][:2]
    # One long patch spanning P1 and P2: it finds the one it overlaps most (P1: 1200 m of P1's
    # 1200 m; P2: 1000 of 1000 as well, so the tie goes to one of them), never both.
    long_row = answer_row(p1, top_y=2250.0, length_m=3500.0)
    s = score.score_survey(truth, result([long_row]))
    assert s["n_found"] == 1 and s["n_false"] == 0


def test_targets_only_counts_leave_out_uncertain_sources():
    truth = make_truth()
    p1, p2, _ = truth["patches"]
    rows = [answer_row(p1, status="target"), answer_row(p2, status="uncertain"),
            answer_row(p1, source_id="free", fault_id="F02", top_x=3020.0, top_y=800.0, status="uncertain"),
            answer_row(p1, source_id="gap", top_y=2350.0, length_m=400.0, status="target")]
    pooled = score.pool([score.score_survey(truth, result(rows))])
    assert pooled["recall"] == 1.0 and pooled["precision"] == pytest.approx(2 / 4)
    # targets: P1 found (P2's source is uncertain); the claims are P1's and the one in the gap
    assert pooled["target_recall"] == pytest.approx(1 / 2)
    assert pooled["target_precision"] == pytest.approx(1 / 2)
