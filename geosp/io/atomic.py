"""
Atomic output: a failed run never leaves a half-written file where a good one was, and a
folder never holds the outputs of two runs (docs/outputs.md, "How outputs are written").

:func:`atomic_path` writes one file under a temporary name and moves it into place.
:func:`output_set` writes a whole set: it locks the output folder against a second run,
has the run write every output into a staging folder, and then moves the set into place
under a journal; an earlier run's outputs that the new set does not contain are removed. A
run stopped before the move leaves the old set untouched; one stopped during the move (only
SIGKILL or a power cut: an interrupt finishes it first) leaves the journal, and the next geosp
run into the folder finishes the move before anything else.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import threading
import uuid
from pathlib import Path

from geosp.errors import InputError

__all__ = ["OUTPUT_NAMES", "atomic_path", "ensure_not_input", "output_set"]

#: File names geosp writes in an output folder (contract).
OUTPUT_NAMES = ("interpretation.gpkg", "targets.csv", "sources.kml", "sp_grid.tif", "sp_distance.tif",
                "sp_model.tif", "sp_residual.tif", "map.html", "map.pdf", "report.html", "run.json")

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


CACHE_DIR = ".geosp"
_LOCK, _JOURNAL, _STAGING = "lock", "swap.json", "staging-"


def _lock(out_dir):
    """
    Hold ``OUT/.geosp/lock`` (an OS file lock, released by the OS if the process dies).

    The file is removed again on release (:func:`_unlock`), so a run leaves no
    lock behind. A process that opened the file just before it was removed
    would lock a file no longer in the folder; the inode check below refuses that.
    """
    import filelock

    path = out_dir / CACHE_DIR / _LOCK
    refused = InputError(out_dir, "another geosp run is writing into this folder now.",
                         "Wait for it to finish, or give this run another folder with --out.")
    lock = filelock.FileLock(path, timeout=0, thread_local=False)
    try:
        lock.acquire()
    except filelock.Timeout:
        raise refused from None
    fd = getattr(getattr(lock, "_context", None), "lock_file_fd", None)
    try:
        stale = fd is not None and os.stat(path).st_ino != os.fstat(fd).st_ino
    except FileNotFoundError:
        stale = True
    if stale:
        lock.release()
        raise refused
    return lock


def _unlock(lock, out_dir):
    with contextlib.suppress(OSError):  # while still held (on Windows an open file stays)
        (out_dir / CACHE_DIR / _LOCK).unlink()
    lock.release()


def _finish_swap(out_dir):
    """Move a staged set into place as its journal says (idempotent); True when there was one."""
    journal = out_dir / CACHE_DIR / _JOURNAL
    if not journal.exists():
        return False
    plan = json.loads(journal.read_text(encoding="utf-8"))
    staging = out_dir / CACHE_DIR / Path(plan["staging"]).name
    for name in plan["new"]:
        name = Path(name).name
        if (staging / name).exists():
            os.replace(staging / name, out_dir / name)
    for name in plan["remove"]:
        with contextlib.suppress(FileNotFoundError):
            (out_dir / Path(name).name).unlink()
    shutil.rmtree(staging, ignore_errors=True)
    journal.unlink()  # last: until it is gone, a later run finishes this swap
    return True


@contextlib.contextmanager
def _interrupt_after():
    """
    Hold a Ctrl-C (SIGINT) until the block is done, then raise it: the moves
    of a committed output set are few and quick, and are never left half done.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught = []
    previous = signal.signal(signal.SIGINT, lambda *_: caught.append(True))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
    if caught:
        raise KeyboardInterrupt


def _clean(out_dir):
    """Remove what an interrupted writer may have left: staging folders and temporary files."""
    cache = out_dir / CACHE_DIR
    for path in cache.glob(_STAGING + "*"):
        shutil.rmtree(path, ignore_errors=True)
    for path in list(out_dir.glob(".*.tmp-*")) + list(cache.glob(".*.tmp")):
        with contextlib.suppress(FileNotFoundError, IsADirectoryError):
            path.unlink()


@contextlib.contextmanager
def output_set(out_dir, *, say=None, output_names=OUTPUT_NAMES):
    """
    Lock ``out_dir`` and yield a staging folder; on success, move what was written there into place.

    The yielded folder is empty; the caller writes the new outputs into it.
    When the block ends normally, the staged files replace those of the same
    name, and every name of ``output_names`` that was not staged is removed
    (it belongs to an earlier run). On an exception nothing in ``out_dir``
    changes. A second ``output_set`` on the same folder, from this or another
    process, raises :class:`InputError` while the first holds it.

    Parameters
    ----------
    out_dir : str or Path
        The output folder (created when missing; removed again if this call
        created it and the run fails before anything was moved into it).
    say : callable, optional
        Receives a line of text when an interrupted run's outputs are moved
        into place first.
    output_names : sequence of str
        The names a run may write (default: the contract's outputs).
    """
    out_dir = Path(out_dir)
    created = not out_dir.exists()
    make_output_dir(out_dir)
    cache_created = not (out_dir / CACHE_DIR).exists()
    committed = False
    try:
        (out_dir / CACHE_DIR).mkdir(exist_ok=True)
        lock = _lock(out_dir)
    except BaseException:
        if created:
            shutil.rmtree(out_dir, ignore_errors=True)
        elif cache_created:
            with contextlib.suppress(OSError):
                (out_dir / CACHE_DIR).rmdir()
        raise
    try:
        if _finish_swap(out_dir) and say:
            say(f"geosp: moved the outputs of an interrupted run into place in {out_dir} first")
        _clean(out_dir)
        staging = out_dir / CACHE_DIR / f"{_STAGING}{uuid.uuid4().hex[:8]}"
        staging.mkdir()
        try:
            yield staging
            new = sorted(p.name for p in staging.iterdir() if p.is_file())
            # run.json last: its checksums describe the others, so it is the last to appear.
            new.sort(key=lambda n: n == "run.json")
            remove = [n for n in output_names if n not in new and (out_dir / n).exists()]
            plan = {"staging": staging.name, "new": new, "remove": remove}
            with _interrupt_after():
                with atomic_path(out_dir / CACHE_DIR / _JOURNAL) as tmp:
                    tmp.write_text(json.dumps(plan), encoding="utf-8")
                committed = True
                _finish_swap(out_dir)
        finally:
            if not committed:
                shutil.rmtree(staging, ignore_errors=True)
    finally:
        _unlock(lock, out_dir)
        if created and not committed:
            shutil.rmtree(out_dir, ignore_errors=True)
        elif cache_created and not committed:
            with contextlib.suppress(OSError):  # only when nothing was written into it
                (out_dir / CACHE_DIR).rmdir()
