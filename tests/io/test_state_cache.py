"""
The stage cache between single-stage commands (geosp.io.state; docs/outputs.md, "The .geosp/
cache folder"): open formats only, never code; used only when its inputs and options are the
ones of this run; a cache that was altered or written by someone else is never loaded.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import sys

import numpy as np
import pytest

from geosp.cli import main
from geosp.io import state as cache
from tests.conftest import small_survey, write_survey
from tests.test_robustness import FAST

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def full_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cache")
    project = write_survey(folder / "s", "shp", extra_project=FAST)
    out = folder / "out"
    assert main(["run", str(project), "--out", str(out), "--quiet"]) == 0
    return project, out


def _copy(full_run, tmp_path):
    import shutil

    project, out = full_run
    shutil.copytree(project.parent, tmp_path / "s")
    shutil.copytree(out, tmp_path / "out")
    return tmp_path / "s" / project.name, tmp_path / "out"


def _layer(out, name):
    import pyogrio

    return pyogrio.read_dataframe(out / "interpretation.gpkg", layer=name)


def _edit(project, old, new):
    project.write_text(project.read_text(encoding="utf-8").replace(old, new), encoding="utf-8")


def _run(args, capsys):
    code = main(args)
    text = capsys.readouterr()
    return code, text.out + text.err


def test_cache_holds_open_formats_only(full_run):
    _, out = full_run
    names = sorted(p.name for p in (out / ".geosp").iterdir())
    assert names == ["arrays.npz", "manifest.json", "state.json"]
    json.loads((out / ".geosp" / "state.json").read_text(encoding="utf-8"))
    with np.load(out / ".geosp" / "arrays.npz", allow_pickle=False) as npz:  # raises on any pickled array
        for name in npz.files:
            assert npz[name].dtype != object


def test_single_stage_rerun_reuses_the_cache_and_gives_the_same_layers(full_run, tmp_path, capsys):
    project, out = _copy(full_run, tmp_path)
    sources = _layer(out, "sources")
    segments = _layer(out, "fault_segments")
    code, text = _run(["publish", str(project), "--out", str(out)], capsys)
    assert code == 0, text
    assert "reusing reduce, grid, detect, fit" in text
    assert sources.drop(columns="geometry").equals(_layer(out, "sources").drop(columns="geometry"))
    # Detection re-run alone starts from the reduction's own stations, not the ones the fit corrected.
    code, text = _run(["detect", str(project), "--out", str(out)], capsys)
    assert code == 0, text
    assert "reusing reduce, grid" in text
    again = _layer(out, "fault_segments")
    cols = [c for c in segments.columns if c != "geometry"]
    assert segments[cols].equals(again[cols])


def test_changed_input_file_runs_every_stage_again(full_run, tmp_path, capsys):
    import geopandas as gpd

    project, out = _copy(full_run, tmp_path)
    stations = project.parent / "stations.shp"
    gdf = gpd.read_file(stations)
    gdf.loc[0, "SP_mV"] += 5.0
    gdf.to_file(stations)
    code, text = _run(["publish", str(project), "--out", str(out)], capsys)
    assert code == 0, text
    assert "reusing" not in text
    assert "changed since it was written" in text
    assert "geosp: reduce ..." in text and "geosp: fit ..." in text


def test_changed_stage_option_reruns_that_stage_and_later_ones(full_run, tmp_path, capsys):
    project, out = _copy(full_run, tmp_path)
    _edit(project, "n_null = 200", "n_null = 250")
    code, text = _run(["publish", str(project), "--out", str(out)], capsys)
    assert code == 0, text
    assert "reusing reduce, grid from" in text
    assert "'detect' changed" in text
    assert "geosp: detect ..." in text and "geosp: fit ..." in text
    assert "geosp: reduce ..." not in text


def test_missing_input_is_an_input_error_even_with_a_cache(full_run, tmp_path, capsys):
    project, out = _copy(full_run, tmp_path)
    _edit(project, "stations.shp", "gone.shp")
    code, text = _run(["grid", str(project), "--out", str(out)], capsys)
    assert code == 2, text
    assert "gone.shp" in text


def test_altered_cache_is_never_loaded(full_run, tmp_path, capsys):
    """Someone edits a number and fixes the checksum in the manifest: the signature no longer holds."""
    project, out = _copy(full_run, tmp_path)
    folder = out / ".geosp"
    tree = (folder / "state.json").read_text(encoding="utf-8").replace("0.", "1.", 1)
    (folder / "state.json").write_text(tree, encoding="utf-8")
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    manifest["sha256"]["state.json"] = hashlib.sha256(tree.encode("utf-8")).hexdigest()
    (folder / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    code, text = _run(["publish", str(project), "--out", str(out)], capsys)
    assert code == 0, text
    assert "has been altered" in text
    assert "geosp: reduce ..." in text


class _Trap:
    """Unpickling this runs code: it creates the file named in the pickle."""

    def __init__(self, path):
        self.path = path

    def __reduce__(self):
        return (os.mkdir, (self.path,))


def test_a_pickle_in_the_cache_folder_is_never_unpickled(full_run, tmp_path, capsys):
    project, out = _copy(full_run, tmp_path)
    marker = tmp_path / "code-ran"
    (out / ".geosp" / "state.pkl").write_bytes(pickle.dumps(_Trap(str(marker))))
    code, text = _run(["publish", str(project), "--out", str(out)], capsys)
    assert code == 0, text
    assert not marker.exists()
    assert not (out / ".geosp" / "state.pkl").exists()


def test_signed_tree_naming_a_foreign_class_is_refused(tmp_path, monkeypatch):
    """Even a correctly signed file cannot make the cache build something outside its list."""
    monkeypatch.setattr(cache, "user_cache_dir", lambda: tmp_path)
    keys = {"reduce": "k"}
    cache.write_state(tmp_path / "out", version="v", keys=keys, products={"reduce": {"warnings": []}})
    folder = tmp_path / "out" / ".geosp"
    evil = {"format": 1, "stages": {"reduce": {"$id": 0, "$object": ["os", "system"], "attrs": []}}}
    blob = json.dumps(evil).encode()
    (folder / "state.json").write_bytes(blob)
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["sha256"]["state.json"] = hashlib.sha256(blob).hexdigest()
    manifest.pop("hmac")
    manifest["hmac"] = cache._sign(cache._user_key(), manifest)
    (folder / "manifest.json").write_text(json.dumps(manifest))
    products, note = cache.read_state(tmp_path / "out", version="v", keys=keys, stages=["reduce"])
    assert products == {}
    assert "os.system" in note


def test_round_trip_keeps_values_types_and_shared_objects(tmp_path, monkeypatch):
    """Arrays of every kind, frames, sparse matrices, non-finite floats and shared references."""
    import pandas as pd
    import scipy.sparse as sp

    from geosp.models import Stations

    monkeypatch.setattr(cache, "user_cache_dir", lambda: tmp_path)
    frame, _ = small_survey(n_lines=2, n_per_line=5)
    stations = Stations(station_id=frame.STN.to_numpy(), easting=frame.E.to_numpy(),
                        northing=frame.N.to_numpy(), upward=frame.ELEV.to_numpy(),
                        sp_mv=frame.SP_mV.to_numpy(), crs="EPSG:32633", line_id=frame.LINE.to_numpy())
    table = pd.DataFrame({"id": ["a", "b"], "t": np.array(["2026-01-01", "2026-01-02"], dtype="datetime64[s]"),
                          "x": [1.5, np.nan]})
    products = {"reduce": {"stations": stations, "again": stations, "table": table,
                           "normal": sp.csc_matrix(np.array([[2.0, 0.0], [1.0, 3.0]])),
                           "numbers": (np.nan, -np.inf, 3, "text", None, True),
                           "mixed": np.array(["a", None], dtype=object), "warnings": ["w"]}}
    cache.write_state(tmp_path / "out", version="v", keys={"reduce": "k"}, products=products)
    got, note = cache.read_state(tmp_path / "out", version="v", keys={"reduce": "k"}, stages=["reduce"])
    assert note is None
    back = got["reduce"]
    assert back["again"] is back["stations"]
    np.testing.assert_array_equal(back["stations"].easting, stations.easting)
    assert back["stations"].station_id.dtype == object and list(back["stations"].station_id) == list(frame.STN)
    pd.testing.assert_frame_equal(back["table"], table, check_dtype=False)
    np.testing.assert_array_equal(back["normal"].toarray(), [[2.0, 0.0], [1.0, 3.0]])
    assert np.isnan(back["numbers"][0]) and back["numbers"][1:] == (-np.inf, 3, "text", None, True)
    assert list(back["mixed"]) == ["a", None]


def test_another_version_or_changed_key_is_not_used(tmp_path, monkeypatch):
    monkeypatch.setattr(cache, "user_cache_dir", lambda: tmp_path)
    products = {"reduce": {"warnings": []}, "grid": {"warnings": []}}
    cache.write_state(tmp_path / "out", version="1", keys={"reduce": "a", "grid": "b"}, products=products)
    assert cache.read_state(tmp_path / "out", version="2", keys={"reduce": "a", "grid": "b"},
                            stages=["reduce", "grid"])[0] == {}
    got, note = cache.read_state(tmp_path / "out", version="1", keys={"reduce": "a", "grid": "c"},
                                 stages=["reduce", "grid"])
    assert list(got) == ["reduce"] and "'grid' changed" in note


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX file modes")
def test_user_key_is_private(tmp_path, monkeypatch):
    monkeypatch.setattr(cache, "user_cache_dir", lambda: tmp_path)
    assert cache._user_key() is not None
    assert (tmp_path / "cache-key").stat().st_mode & 0o077 == 0


def test_docs_name_the_cache_files():
    """docs/outputs.md describes the cache as it is: keep code and docs in step."""
    from pathlib import Path

    text = (Path(__file__).resolve().parents[2] / "docs" / "outputs.md").read_text(encoding="utf-8")
    for name in ("state.json", "arrays.npz", "manifest.json"):
        assert f"`{name}`" in text
