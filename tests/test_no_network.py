"""
A whole run works with the network cut off, and never modifies its inputs.

Sockets are blocked in-process (connect, connect_ex, create_connection and
name lookups raise and are recorded); the pipeline then runs every stage on
a small survey with one worker and publishes the map and report. The
contract's "the map works offline" and "basemap tiles off by default" are
the reference: no connection may even be attempted. The inputs' sha256
checksums must be the same after the run.
"""

from __future__ import annotations

import hashlib
import socket

import pytest

from geosp.cli import main
from tests.conftest import write_survey
from tests.test_robustness import FAST

pytestmark = pytest.mark.slow


def test_full_run_needs_no_network_and_leaves_inputs_alone(tmp_path, monkeypatch, capsys):
    project = write_survey(tmp_path / "s", "gpkg", extra_project=FAST.replace("false", "true"))
    inputs = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in project.parent.iterdir()}
    attempts = []

    def refuse(name):
        def blocked(*args, **kwargs):
            attempts.append((name, args[1:] if name.startswith("socket.") else args))
            raise OSError(f"network access blocked in this test ({name})")
        return blocked

    monkeypatch.setattr(socket.socket, "connect", refuse("socket.connect"))
    monkeypatch.setattr(socket.socket, "connect_ex", refuse("socket.connect_ex"))
    monkeypatch.setattr(socket, "create_connection", refuse("create_connection"))
    monkeypatch.setattr(socket, "getaddrinfo", refuse("getaddrinfo"))
    # The block works: a connection attempt raises.
    with pytest.raises(OSError):
        socket.create_connection(("192.0.2.1", 80), timeout=0.1)
    attempts.clear()

    out = tmp_path / "out"
    code = main(["run", str(project), "--out", str(out), "--workers", "1", "--quiet"])
    _, err = capsys.readouterr()
    assert code == 0, err
    assert attempts == [], f"geosp tried to reach the network: {attempts}"
    for name in ("interpretation.gpkg", "sp_grid.tif", "map.html", "report.html", "run.json"):
        assert (out / name).stat().st_size > 0
    after = {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in project.parent.iterdir()}
    assert after == inputs, "the run changed, added or removed files in the input folder"
