"""geosp writes its compiled-kernel cache to the user's cache folder, never into the installed package."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

pytest.importorskip("numba")


@pytest.mark.skipif(sys.platform != "linux", reason="XDG_CACHE_HOME sets the cache folder on Linux")
def test_numba_cache_goes_to_the_user_cache_folder(tmp_path):
    import geosp

    package = Path(geosp.__file__).parent
    before = set(package.rglob("*.nbi"))
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    code = ("import numpy as np\n"
            "from geosp.physics.forward import fault_patch_sp\n"
            "v = fault_patch_sp((np.array([10.0]), np.array([20.0])), top_x=0, top_y=0, strike_deg=0, dip_deg=80,\n"
            "                   top_depth_m=50, bottom_depth_m=300, length_m=400, jump_mv=100)\n"
            "import os; print(os.environ['NUMBA_CACHE_DIR'])\n")
    done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    assert Path(done.stdout.strip()) == tmp_path / "geosp" / "numba"
    assert list((tmp_path / "geosp" / "numba").rglob("*.nbi")), "nothing was cached in the user cache folder"
    assert set(package.rglob("*.nbi")) == before, "the kernel cache was written into the package"
