"""
Atomic output: a failed run never leaves a half-written file where a good one was.
"""

from __future__ import annotations

import contextlib
import os
import uuid
from pathlib import Path

from geosp.errors import InputError

__all__ = ["OUTPUT_NAMES", "atomic_path", "ensure_not_input"]

#: File names geosp writes in an output folder (contract).
OUTPUT_NAMES = ("interpretation.gpkg", "sp_grid.tif", "sp_distance.tif", "sp_model.tif", "sp_residual.tif",
                "map.html", "report.html", "run.json")

# Side files SQLite or GDAL may leave beside a temporary file.
_SIDECARS = ("-journal", "-wal", "-shm", ".aux.xml")


def _remove_quietly(path):
    for candidate in [Path(path)] + [Path(str(path) + s) for s in _SIDECARS]:
        with contextlib.suppress(FileNotFoundError):
            candidate.unlink()


@contextlib.contextmanager
def atomic_path(path):
    """
    Write a file under a temporary name, then move it into place.

    The temporary file is in the same folder as ``path`` (so the final
    ``os.replace`` is atomic on one file system) and keeps the same suffix
    (so drivers that look at the extension still work). On success it
    replaces ``path``; on any exception it is removed and ``path`` is left as
    it was.

    Parameters
    ----------
    path : str or Path
        Final file path.

    Yields
    ------
    Path
        Temporary path to write to. It does not exist yet.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> target = pathlib.Path(tempfile.mkdtemp()) / "note.txt"
    >>> with atomic_path(target) as tmp:
    ...     _ = tmp.write_text("done")
    >>> target.read_text()
    'done'
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.stem}.tmp-{uuid.uuid4().hex[:8]}{path.suffix}")
    try:
        yield tmp
        if not tmp.exists():
            raise FileNotFoundError(f"Nothing was written to the temporary file for {path}.")
        os.replace(tmp, path)
    except BaseException:
        _remove_quietly(tmp)
        raise
    finally:
        for side in _SIDECARS:
            with contextlib.suppress(FileNotFoundError):
                Path(str(tmp) + side).unlink()


def ensure_not_input(out_dir, input_paths, *, output_names=OUTPUT_NAMES):
    """
    Refuse an output folder where an output would overwrite an input.

    Parameters
    ----------
    out_dir : str or Path
        Output folder.
    input_paths : iterable of str or Path
        Every input file of the run (None entries are ignored).
    output_names : sequence of str, optional
        File names written in ``out_dir``. Default: the contract's outputs.

    Raises
    ------
    InputError
        Naming the input that would be overwritten and how to avoid it.
    """
    out_dir = Path(out_dir)
    input_paths = list(input_paths)
    if out_dir.exists() and not out_dir.is_dir():
        real_out = os.path.normcase(os.path.realpath(out_dir))
        is_input = any(item and os.path.normcase(os.path.realpath(Path(item))) == real_out for item in input_paths)
        raise InputError(out_dir, ("is an input file" if is_input else "is a file") + ", not an output folder.",
                         "Give --out a folder (new or existing), for example --out results.")
    outputs = {os.path.normcase(os.path.realpath(out_dir / name)): name for name in output_names}
    for item in input_paths:
        if item is None or item == "":
            continue
        real = os.path.normcase(os.path.realpath(Path(item)))
        if real in outputs:
            raise InputError(
                item,
                f"is an input, and writing the output '{outputs[real]}' in {out_dir} would "
                "overwrite it.",
                "Choose another output folder with --out, or rename the input file.",
            )


def make_output_dir(out_dir):
    """Create the output folder (and parents); an InputError when it cannot be."""
    out_dir = Path(out_dir)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(out_dir, f"the output folder cannot be created ({err.strerror}).",
                         "Give --out a folder you can write to, outside any input file.") from None
    return out_dir
