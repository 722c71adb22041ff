"""
Interrupted runs: a `geosp run` killed mid-way never leaves a half-written output.

A good run's outputs are written first; a second run into the same folder is
then killed (SIGINT or SIGKILL) at several moments, found by watching the
folder. Afterwards the folder must hold either the earlier set byte for byte or
the whole new set (every file listed with its checksum in the new run.json), each
file opening in its own reader (pyogrio for the GeoPackage, rasterio for the
GeoTIFFs, json for run.json, a closing </html> for the pages); a hard kill during
the move may instead leave the journal, and the next run completes the new set.
After SIGINT no temporary files may be left. The reference is docs/outputs.md,
"How outputs are written".
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from geosp.cli import main
from tests.conftest import write_survey
from tests.test_robustness import FAST

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[1]
# The fast options, but with the map and report on so the run has several outputs to write.
OPTIONS = FAST.replace("map = false", "map = true").replace("report = false", "report = true")
OUTPUTS = ("interpretation.gpkg", "targets.csv", "sources.kml", "sp_grid.tif", "sp_distance.tif",
           "sp_model.tif", "sp_residual.tif", "map.html", "map.pdf", "report.html", "run.json")


def digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def temporary_files(out):
    """Files a writer leaves only while it works: dot-names in the folder and in the state cache."""
    found = [p.name for p in out.iterdir() if p.name.startswith(".") and p.is_file()]
    cache = out / ".geosp"
    if cache.is_dir():
        found += [f".geosp/{p.name}" for p in cache.iterdir()
                  if p.name not in ("state.json", "arrays.npz", "manifest.json")]
    return found


def readable(path):
    """Open an output in the reader a user would use; raise if it is not a complete file."""
    name = path.name
    if name.endswith(".gpkg"):
        import pyogrio

        layers = [n for n, _ in pyogrio.list_layers(path)]
        assert "stations" in layers
        for layer in layers:
            pyogrio.read_dataframe(path, layer=layer)
    elif name.endswith(".tif"):
        import rasterio

        with rasterio.open(path) as src:
            src.read(1)
    elif name.endswith(".json"):
        json.loads(path.read_text(encoding="utf-8"))
    elif name.endswith(".csv"):
        import pandas as pd

        assert list(pd.read_csv(path).columns)[:2] == ["source_id", "status"]
    elif name.endswith(".pdf"):
        data = path.read_bytes()
        assert data.startswith(b"%PDF") and data.rstrip().endswith(b"%%EOF")
    elif name.endswith(".kml"):
        assert path.read_text(encoding="utf-8").rstrip().endswith("</kml>")
    elif name.endswith(".html"):
        assert path.read_text(encoding="utf-8").rstrip().endswith("</html>")


@pytest.fixture(scope="module")
def good_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("interrupt")
    project = write_survey(folder / "s", "shp", extra_project=OPTIONS)
    out = folder / "out"
    assert main(["run", str(project), "--out", str(out), "--quiet", "--workers", "1"]) == 0
    assert all((out / name).exists() for name in OUTPUTS)
    return project, out


def _copy(out, target):
    import shutil

    shutil.copytree(out, target)
    return target


def _stat(path):
    try:
        st = path.stat()
        return st.st_ino, st.st_mtime_ns
    except FileNotFoundError:
        return None


def _moment(name, out):
    """A predicate on the folder that becomes true at the moment to kill."""
    start = time.monotonic()
    first = {n: _stat(out / n) for n in OUTPUTS}
    if name == "while_loading":
        return lambda: time.monotonic() - start > 0.3
    if name == "first_output_replaced":
        return lambda: _stat(out / "interpretation.gpkg") != first["interpretation.gpkg"]
    if name == "staging":  # outputs are being written into the staging folder
        return lambda: any((out / ".geosp").glob("staging-*/*"))
    if name == "map_replaced":  # the report is being made
        return lambda: _stat(out / "map.html") != first["map.html"]
    raise ValueError(name)


CASES = [("SIGINT", "while_loading"), ("SIGINT", "staging"), ("SIGINT", "first_output_replaced"),
         ("SIGKILL", "staging"), ("SIGKILL", "first_output_replaced")]


def whole_set(out, before):
    """'old' or 'new' when the folder holds one run's outputs; fails on a mixture."""
    now = {name: digest(out / name) for name in OUTPUTS if (out / name).exists()}
    if now == before:
        return "old"
    listed = json.loads((out / "run.json").read_text(encoding="utf-8"))["outputs"]
    assert set(now) == set(listed) | {"run.json"}, ("a mixture of two runs", sorted(now), sorted(listed))
    assert all(now[name] == listed[name] for name in listed), "a file does not belong to its run.json"
    assert now["run.json"] != before["run.json"]
    return "new"


@pytest.mark.parametrize("sig,moment", CASES, ids=[f"{s}-{m}" for s, m in CASES])
def test_killed_run_leaves_earlier_or_complete_outputs(good_run, tmp_path, sig, moment):
    project, good = good_run
    out = _copy(good, tmp_path / "out")
    before = {name: digest(out / name) for name in OUTPUTS}
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen([sys.executable, "-m", "geosp.cli", "run", str(project), "--out", str(out),
                             "--quiet", "--workers", "1"], cwd=tmp_path, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    ready = _moment(moment, out)
    fired = False
    deadline = time.monotonic() + 120
    while proc.poll() is None and time.monotonic() < deadline:
        if ready():
            proc.send_signal(getattr(signal, sig))
            fired = True
            break
        time.sleep(0.002)
    _, err = proc.communicate(timeout=120)
    err = err.decode(errors="replace")
    assert fired, f"the run ended before the moment '{moment}' was seen: {err}"
    if sig == "SIGINT":
        # 130 when geosp caught the interrupt; -SIGINT when it came before the handler was set up;
        # 0 when the run's work was done first (the command ignores Ctrl-C once its outputs are
        # complete; with the stage cache warm a run can end within the first second).
        assert proc.returncode in (130, -signal.SIGINT, 0), (proc.returncode, err)
        assert "Traceback" not in err or proc.returncode == -signal.SIGINT
        assert temporary_files(out) == [], "an interrupted run left temporary files"
    else:
        assert proc.returncode == -signal.SIGKILL
    journal = out / ".geosp" / "swap.json"
    if journal.exists():  # killed during the move: the next run finishes it first
        assert sig == "SIGKILL"
        assert main(["publish", str(project), "--out", str(out), "--quiet"]) == 0
        assert not journal.exists()
    kind = whole_set(out, before)
    for name in OUTPUTS:
        assert (out / name).exists(), f"{name} disappeared"
        readable(out / name)
    if moment == "while_loading" and proc.returncode != 0:
        assert kind == "old", "nothing may change before the stages ran"
    if moment == "first_output_replaced" and sig == "SIGINT":
        assert kind == "new", "an interrupt during the move lets it finish"
