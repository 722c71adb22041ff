"""
Tests of the executors (geosp.parallel).
"""

import math
import time

import numpy as np
import numpy.testing as npt
import pytest

from geosp.errors import OptionError
from geosp.parallel import item_seed, map_segments, resolve_workers


def _seed_draws(key):
    return item_seed(7, key).random(3)


def _blas_threads(_item):
    from threadpoolctl import threadpool_info

    return sorted({pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"})


@pytest.mark.parametrize("workers", [1, 2])
def test_every_work_item_runs_with_one_blas_thread(workers):
    # threadpoolctl reads the BLAS library's own thread count; without a limit
    # OpenBLAS runs one thread per core (2 here), which stalls small solves.
    from geosp.parallel import limit_blas

    with limit_blas(2):
        before = _blas_threads(None)
        assert map_segments(_blas_threads, [0, 1], workers=workers) == [[1], [1]]
        assert _blas_threads(None) == before  # the caller's limit is back


def test_map_segments_serial_keeps_order_and_reports_progress():
    calls = []
    out = map_segments(math.sqrt, [9.0, 4.0, 1.0], workers=1,
                       progress=lambda i, n: calls.append((i, n)))
    assert out == [3.0, 2.0, 1.0]
    assert calls == [(0, 3), (1, 3), (2, 3), (3, 3)]


def test_process_pool_keeps_order_and_item_seed_is_stable():
    # Python's hash() of a str differs between processes (hash randomisation);
    # the per-segment seed must not. Spawned workers draw the same numbers,
    # and results come back in item order whatever order they finish in.
    keys = [f"F{i}-{j}" for i in (1, 10) for j in (1, 2, 3)]
    here = [_seed_draws(k) for k in keys]
    calls = []
    there = map_segments(_seed_draws, keys, workers=2, progress=lambda i, n: calls.append(i))
    for a, b in zip(here, there):
        npt.assert_array_equal(a, b)
    assert not np.allclose(here[0], here[1])  # different segments draw differently
    assert calls == list(range(len(keys) + 1))


def _refuse(item):
    if item == 1:  # the first item fails last: the message must still be its own
        time.sleep(1.0)
    raise OptionError("[detect]", f"item {item} is out of range.", "Fix it.", where="[detect] n_starts")


def test_error_raised_in_a_worker_reaches_the_caller_whole():
    """
    An input error raised inside a worker process arrives as itself (exit 2), not as a broken
    pool, and it is the first failed item's whichever worker finished first.
    """
    with pytest.raises(OptionError, match="item 1 is out of range") as caught:
        map_segments(_refuse, [1, 2], workers=2)
    assert caught.value.where == "[detect] n_starts"


def test_resolve_workers():
    assert resolve_workers(1) == 1
    assert resolve_workers(3) == 3
    assert resolve_workers(None) >= 1 and resolve_workers("auto") == resolve_workers(None)
    for bad in (0, -2, "many", 1.5, True):
        with pytest.raises(OptionError, match="workers"):
            resolve_workers(bad)


def test_bad_scheduler_address():
    with pytest.raises(OptionError, match="tcp://HOST:PORT"):
        map_segments(math.sqrt, [1.0], scheduler="localhost:8786")


def test_missing_dask_gives_install_hint(monkeypatch):
    import sys

    # A None entry in sys.modules makes the import fail as if dask were absent.
    monkeypatch.setitem(sys.modules, "dask.distributed", None)
    with pytest.raises(OptionError, match="pip install"):
        map_segments(math.sqrt, [1.0], scheduler="tcp://127.0.0.1:8786")


def _assert_same_rows(a, b):
    assert len(a) == len(b)
    for ra, rb in zip(a, b):
        assert ra.keys() == rb.keys()
        for key in ra:
            if isinstance(ra[key], float):
                npt.assert_array_equal(ra[key], rb[key])
            else:
                assert ra[key] == rb[key]


@pytest.mark.slow
def test_blocked_survey_model_is_identical_across_executors(monkeypatch):
    # A survey cut into blocks: every block is one work item whose random
    # numbers come from (seed, block number), so the serial run, a process
    # pool and a Dask cluster must agree bit for bit.
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent / "interpret"))
    from interpret_synthetic import E0, N0, build_survey, patch

    from geosp.interpret import blocks, detect_sources, fit_sources
    from geosp.models import Fault

    faults = [Fault("FA", np.array([[E0 + 600.0, N0 - 500.0], [E0 + 600.0, N0 + 2500.0]])),
              Fault("FB", np.array([[E0 + 1500.0, N0 - 500.0], [E0 + 1500.0, N0 + 2500.0]]))]
    shape = dict(top_depth_m=100.0, bottom_depth_m=400.0, length_m=800.0)
    planted = [patch(E0 + 600.0, N0 + 600.0, jump_mv=160.0, **shape),
               patch(E0 + 1500.0, N0 + 900.0, jump_mv=-150.0, **shape)]
    stations, segments, _ = build_survey(sources=planted, faults=faults, white=2.0, seed=5, extent=2100.0,
                                         n_lines=11, spacing=40.0, line_spacing=180.0)
    # Small blocks for a small survey (the defaults cut only surveys of thousands of stations).
    monkeypatch.setattr(blocks, "MAX_BLOCK_STATIONS", 400)
    monkeypatch.setattr(blocks, "MARGIN_M", 400.0)
    plan = blocks.plan_blocks(stations.easting, stations.northing)
    assert len(plan) >= 4
    options = dict(n_null=200, n_starts=4, seed=3)

    def run(**executor):
        selection, detections = detect_sources(stations, segments, **options, **executor)
        return fit_sources(selection, stations, detections)

    serial = run(workers=1)
    assert sorted(r["fault_id"] for r in serial.fits.sources) == ["FA", "FB"]
    # The blocked survey model also goes through the stage cache unchanged (geosp.io.state).
    import tempfile

    from geosp.io import state as cache

    selection, detections = detect_sources(stations, segments, **options, workers=1)
    with tempfile.TemporaryDirectory() as folder:
        monkeypatch.setattr(cache, "user_cache_dir", lambda: Path(folder))
        products = {"detect": {"selection": selection, "detections": detections, "warnings": []}}
        cache.write_state(Path(folder) / "out", version="v", keys={"detect": "k"}, products=products)
        back, note = cache.read_state(Path(folder) / "out", version="v", keys={"detect": "k"}, stages=["detect"])
    assert note is None
    again = fit_sources(back["detect"]["selection"], stations, back["detect"]["detections"])
    _assert_same_rows(serial.fits.sources, again.fits.sources)
    pooled = run(workers=2)
    _assert_same_rows(serial.fits.sources, pooled.fits.sources)
    npt.assert_array_equal(serial.fits.model_mv, pooled.fits.model_mv)
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None, processes=True) as cluster:
        on_dask = run(scheduler=cluster.scheduler_address)
    _assert_same_rows(serial.fits.sources, on_dask.fits.sources)
    npt.assert_array_equal(serial.terrain["slope_mv_per_m"], on_dask.terrain["slope_mv_per_m"])
