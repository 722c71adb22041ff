"""
End to end on the bundled demo area: every output is written and opens, and the
fitted sources are compared with what was planted (demo_area/truth.json).

Tolerances are those of the fitting stage on synthetic data: top depth within
20 % and √(top·bottom) within 10 % (demo_area/compare.py).
"""

import json

import numpy as np
import pytest

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    from geosp import pipeline

    out = tmp_path_factory.mktemp("demo")
    out, state = pipeline.demo(out, workers=2)
    return out, state


def test_every_output_exists_and_opens(demo_run):
    import pyogrio
    import rasterio

    out, _ = demo_run
    layers = {name for name, _ in pyogrio.list_layers(out / "interpretation.gpkg")}
    assert {"stations", "fault_segments", "sources", "sources_3d"} <= layers
    for name in ("sp_grid.tif", "sp_model.tif", "sp_residual.tif"):
        with rasterio.open(out / name) as src:
            band = src.read(1, masked=True)
            assert src.crs.to_epsg() == 32633 and band.count() > 1000
            assert src.tags().get("units") == "mV"
    html = (out / "map.html").read_text(encoding="utf-8")
    assert "non-unique" in html and "licensed professionals" in html
    report = (out / "report.html").read_text(encoding="utf-8")
    assert "non-unique" in report and "data:image/png;base64," in report
    provenance = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert provenance["geosp_version"] and "dipoles.csv" in provenance["inputs"]


def test_detected_sources_sit_on_the_planted_faults_with_the_planted_sign(demo_run):
    # Truth: demo_area/truth.json. P1 (vertical, F-Central), P2 (60°, F-East) and P3
    # (σ ratio 4, F-West) must be found within 500 m of the planted top edge with the
    # planted sign of the jump.
    from demo_area.compare import compare_sources

    _, state = demo_run
    table = compare_sources(state.fits.sources).set_index("planted")
    for planted in ("P1", "P2", "P3"):
        row = table.loc[planted]
        assert row["found"], planted
        assert row["offset_m"] < 500.0, (planted, row["offset_m"])
        assert np.sign(row["jump_mv"]) == np.sign(row["jump_true_mv"]), planted


_P3_MISSES = (
    "P3 (dip 85 deg, conductivity contrast 4) is fitted vertical at the dip bound with contrast 2.9: "
    "top 99 m (true 120 m, -17 %, within 20 %) but geometric-mean depth 288 +/- 18 m against 245 m "
    "(+17 %, 2.4 sd; tolerance 10 %). The run labels it 'uncertain' (bound:dip_deg). Measured on "
    "the survey-wide model at its defaults; the demo and this tolerance are unchanged.")


@pytest.mark.parametrize("planted", [
    "P1", "P2", pytest.param("P3", marks=pytest.mark.xfail(strict=True, reason=_P3_MISSES))])
def test_planted_patches_recovered(demo_run, planted):
    # Each planted patch on its own, so that the known miss on P3 cannot hide a regression on
    # P1 or P2 (tolerances in demo_area/compare.py).
    from demo_area.compare import compare_sources

    _, state = demo_run
    row = compare_sources(state.fits.sources).set_index("planted").loc[planted]
    assert row["found"], planted
    assert row["within_tolerance"], row[["top_depth_m", "top_depth_true_m", "geo_mean_m", "geo_mean_true_m"]]


def test_report_draws_each_segment_profile_once_and_at_most_the_cap(demo_run, monkeypatch):
    # On the demo three sources share segment F-East-01: its profile figure is drawn once. With
    # the cap at 2, two profiles are drawn (the targets' segments first) and the rest is said.
    from geosp import interpretation

    _, state = demo_run
    content = interpretation.report_content(state, title="demo")
    profiles = [n for n in content["figures"] if n.endswith("across the fault")]
    assert len(profiles) == len(set(profiles)) == len({r["segment_id"] for r in state.fits.sources})
    monkeypatch.setattr(interpretation, "MAX_PROFILE_FIGURES", 2)
    content = interpretation.report_content(state, title="demo")
    profiles = [n for n in content["figures"] if n.endswith("across the fault")]
    targets = {r["segment_id"] for r in state.fits.sources if r["status"] == "target"}
    assert len(profiles) == 2 and {p.split(":")[0] for p in profiles} <= targets
    assert any(s["heading"] == "Other profiles" for s in content["sections"])
