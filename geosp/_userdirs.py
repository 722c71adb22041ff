"""geosp's folder in the user's cache folder (the numba cache and the stage cache's key live there)."""

from __future__ import annotations

from pathlib import Path


def user_cache_dir():
    """``<user cache folder>/geosp`` (for example ``~/.cache/geosp`` on Linux), created when missing."""
    import platformdirs

    path = Path(platformdirs.user_cache_dir("geosp", appauthor=False))
    path.mkdir(parents=True, exist_ok=True)
    return path
