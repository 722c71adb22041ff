"""
Tests of the segment executors (geosp.parallel) and executor independence of fits.
"""

import math

import numpy as np
import numpy.testing as npt
import pytest

from geosp.errors import OptionError
from geosp.fit import fit_segments
from geosp.models import Detection, Stations
from geosp.parallel import item_seed, map_segments, resolve_workers

from test_fit import FAST, TRUTH, make_segment, make_survey


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


def _three_segment_survey():
    parts = []
    for i, (strike, jump) in enumerate(((30.0, 100.0), (120.0, -80.0), (75.0, 60.0))):
        seg = make_segment(name=f"F{i + 1}-1", strike_deg=strike,
                           origin=(512000.0 + 6000.0 * i, 4180000.0))
        parts.append(make_survey(seg, truth=dict(TRUTH, jump=jump), n_lines=4, spacing_m=50.0,
                                 seed=20 + i))
    stations = Stations(
        np.concatenate([p[0].station_id for p in parts]),
        np.concatenate([p[0].easting for p in parts]),
        np.concatenate([p[0].northing for p in parts]),
        np.zeros(sum(len(p[0]) for p in parts)),
        np.concatenate([p[0].sp_mv for p in parts]), "EPSG:32633",
        sigma_mv=np.ones(sum(len(p[0]) for p in parts)))
    detections, start = [], 0
    for st, det in parts:
        detections.append(Detection(det.segment, np.arange(len(st)) + start, len(st), 10.0, 1,
                                    True, 4.0, 1.0, {}))
        start += len(st)
    return stations, detections


def _assert_same(a, b):
    assert [f.chosen for f in a.fits] == [f.chosen for f in b.fits]
    npt.assert_array_equal(a.model_mv, b.model_mv)
    assert len(a.sources) == len(b.sources)
    for ra, rb in zip(a.sources, b.sources):
        assert ra.keys() == rb.keys()
        for key in ra:
            if isinstance(ra[key], float):
                npt.assert_array_equal(ra[key], rb[key])
            else:
                assert ra[key] == rb[key]


@pytest.mark.slow
def test_fit_results_identical_across_executors():
    # Each segment's random numbers come from (seed, segment_id), so the serial
    # run, a process pool and a Dask cluster must agree bit for bit.
    stations, detections = _three_segment_survey()
    options = dict(models=("fault_patch", "pole_pair"), uncertainty="profile", seed=11, **FAST)
    serial = fit_segments(stations, detections, workers=1, **options)
    assert len(serial.sources) == 3
    pooled = fit_segments(stations, detections, workers=2, **options)
    _assert_same(serial, pooled)
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None, processes=True) as cluster:
        calls = []
        on_dask = fit_segments(stations, detections, scheduler=cluster.scheduler_address,
                               progress=lambda i, n: calls.append(i), **options)
    _assert_same(serial, on_dask)
    assert calls[-1] == 3


def test_missing_dask_gives_install_hint(monkeypatch):
    import sys

    # A None entry in sys.modules makes the import fail as if dask were absent.
    monkeypatch.setitem(sys.modules, "dask.distributed", None)
    with pytest.raises(OptionError, match="pip install"):
        map_segments(math.sqrt, [1.0], scheduler="tcp://127.0.0.1:8786")
