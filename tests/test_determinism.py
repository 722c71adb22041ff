"""
Same inputs and seed, same numbers: whatever the number of workers, and run after run.

A synthetic survey carries two planted fault patches (forward model
:func:`geosp.physics.forward.fault_patch_sp`, verified against physics.md
§9) on two mapped faults. The pipeline's
fit stage is run with one and with two worker processes, and the whole
pipeline twice; the layers (and rasters) must agree exactly -- every
per-segment random stream is seeded from (seed, segment id), so the
executor must not matter (geosp.parallel).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from shapely.geometry import MultiLineString

from geosp.cli import main
from geosp.io.layers import read_layers
from geosp.physics.forward import fault_patch_sp
from tests.conftest import write_survey

pytestmark = pytest.mark.slow

E0, N0 = 500000.0, 4500000.0
OPTIONS = """
[detect]
n_null = 300
n_starts = 16

[publish]
map = false
report = false
"""


def planted_survey():
    """Stations on 15 lines 100 m apart (25 m spacing), two faults each with a patch, small seeded noise."""
    e, n = np.meshgrid(E0 + np.arange(15) * 100.0, N0 + np.arange(41) * 25.0, indexing="ij")
    e, n = e.ravel(), n.ravel()
    sp = np.zeros(e.size)
    for top_x, jump in ((E0 + 350.0, 80.0), (E0 + 1050.0, -70.0)):
        sp += fault_patch_sp((e, n), top_x=top_x, top_y=N0 + 500.0, strike_deg=0.0, dip_deg=70.0,
                             top_depth_m=60.0, bottom_depth_m=200.0, length_m=300.0, jump_mv=jump)
    sp += np.random.default_rng(7).normal(0.0, 0.5, e.size)
    line = np.repeat([f"L{i + 1}" for i in range(15)], 41)
    frame = pd.DataFrame({"STN": [f"{a}-{k % 41:03d}" for k, a in enumerate(line)], "LINE": line, "E": e, "N": n,
                          "SP_mV": sp.round(4), "ELEV": 1000.0})
    fault = MultiLineString([[(x, N0 - 200.0), (x, N0 + 1200.0)] for x in (E0 + 350.0, E0 + 1050.0)])
    return frame, fault


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("determinism")
    frame, fault = planted_survey()
    project = write_survey(folder / "s", "gpkg", frame=frame, fault=fault, extra_project=OPTIONS)
    outs = {}
    for name, workers in (("first", "1"), ("second", "1"), ("two_workers", "2")):
        outs[name] = folder / name
        assert main(["run", str(project), "--out", str(outs[name]), "--workers", workers, "--quiet"]) == 0
    return outs


def test_two_runs_write_identical_layers_and_rasters(runs):
    import rasterio

    first, second = read_layers(runs["first"] / "interpretation.gpkg"), read_layers(runs["second"] / "interpretation.gpkg")
    assert list(first) == list(second) == ["stations", "fault_segments", "sources", "sources_3d"]
    for name in first:
        pd.testing.assert_frame_equal(first[name], second[name], check_exact=True)
    for tif in ("sp_grid.tif", "sp_model.tif", "sp_residual.tif"):
        with rasterio.open(runs["first"] / tif) as a, rasterio.open(runs["second"] / tif) as b:
            np.testing.assert_array_equal(a.read(1), b.read(1))


def test_one_or_two_workers_give_the_same_sources(runs):
    one = read_layers(runs["first"] / "interpretation.gpkg")
    two = read_layers(runs["two_workers"] / "interpretation.gpkg")
    segments = one["fault_segments"]
    # The comparison means something only if several segments were fitted in parallel.
    assert len(segments) >= 2 and segments["detected"].sum() >= 2, segments
    assert len(one["sources"]) >= 2
    for name in ("sources", "sources_3d", "stations", "fault_segments"):
        pd.testing.assert_frame_equal(one[name], two[name], check_exact=True)
