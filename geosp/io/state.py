"""Cache of the stage results between single-stage commands (``OUT/.geosp/state.pkl``)."""

from __future__ import annotations

import os
import pickle
import tempfile
from pathlib import Path

STATE_DIR = ".geosp"
STATE_FILE = "state.pkl"


def state_path(out):
    return Path(out) / STATE_DIR / STATE_FILE


def write_state(out, state):
    """Write the run state atomically (temp file in the same folder, then rename)."""
    path = state_path(out)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".state-", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as handle:
            pickle.dump(state, handle, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def read_state(out, *, version):
    """The cached state, or None when there is none or it was written by another geosp version."""
    path = state_path(out)
    if not path.exists():
        return None
    try:
        with open(path, "rb") as handle:
            state = pickle.load(handle)
    except Exception:
        return None
    if getattr(state, "version", None) != version:
        return None
    return state
