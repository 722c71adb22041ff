"""
Executors for independent per-segment work: in-process, local processes or a Dask cluster.

Every executor returns results in the order of the items, so a computation
whose randomness is seeded per item (see :func:`item_seed`) gives identical
results whatever runs it.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import logging
import multiprocessing
import os
from concurrent.futures import ProcessPoolExecutor, as_completed

import numpy as np

from .errors import OptionError

logger = logging.getLogger(__name__)


def item_seed(seed, key):
    """
    A reproducible random generator for one item of work.

    Parameters
    ----------
    seed : int
        The run's seed.
    key : str
        A stable name of the item (for example a segment id).

    Returns
    -------
    rng : numpy.random.Generator
        Seeded from ``(seed, sha256(key))``; unlike Python's ``hash()`` this
        does not change between processes or sessions.
    """
    digest = hashlib.sha256(str(key).encode("utf-8")).digest()
    words = [int.from_bytes(digest[i:i + 4], "little") for i in range(0, 16, 4)]
    return np.random.default_rng(np.random.SeedSequence([int(seed), *words]))


def limit_blas(threads=1):
    """
    Context manager: BLAS and LAPACK use at most ``threads`` threads within it.

    geosp's linear algebra is many small solves (gridding windows, segment
    fits, whiteners). On those, a multi-threaded BLAS only adds contention,
    and on a loaded machine it can be many times slower than one thread;
    parallel work comes from processes or Dask workers instead.

    Parameters
    ----------
    threads : int
        Highest number of BLAS threads (1 or more).

    Returns
    -------
    threadpoolctl.threadpool_limits
        Restores the previous limits on exit.
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=int(threads), user_api="blas")


def _single_threaded(func, item):
    """``func(item)`` with one BLAS thread (how every work item runs, wherever it runs)."""
    with limit_blas(1):
        return func(item)


def resolve_workers(workers):
    """
    Number of worker processes for a ``workers`` option.

    Parameters
    ----------
    workers : int, str or None
        None or ``"auto"``: all cores; a positive integer: that many.

    Returns
    -------
    n : int

    Raises
    ------
    OptionError
        For anything else.
    """
    if workers is None or (isinstance(workers, str) and workers.strip().lower() == "auto"):
        return max(1, os.cpu_count() or 1)
    try:
        n = int(workers)
    except (TypeError, ValueError):
        n = 0
    if isinstance(workers, bool) or n < 1 or (isinstance(workers, float) and workers != n):
        raise OptionError(
            "workers", f"got {workers!r}.", 'Give a positive whole number of processes or "auto".'
        )
    return n


def map_segments(func, items, *, workers=None, scheduler=None, progress=None):
    """
    Apply ``func`` to every item, serially, over local processes or on a Dask cluster.

    Parameters
    ----------
    func : callable
        A picklable (module-level) function of one item; with processes or
        Dask, ``func`` and the items are pickled and sent to the workers.
    items : sequence
        The work items.
    workers : int, "auto" or None
        None or "auto": one process per core; 1: run in this process, in
        order; N > 1: a pool of N spawned processes. Ignored when
        ``scheduler`` is given.
    scheduler : str or None
        Address of a running Dask scheduler, e.g. ``"tcp://10.0.0.5:8786"``.
        Needs the optional ``dask[distributed]`` package.
    progress : callable or None
        Called as ``progress(n_done, n_total)`` in this process after each item.

    Returns
    -------
    results : list
        ``func(item)`` for each item, in the order of ``items``.

    Raises
    ------
    OptionError
        For a bad ``workers`` value, a malformed scheduler address or a
        missing Dask installation.
    """
    items = list(items)
    total = len(items)
    if progress is not None:
        progress(0, total)
    func = functools.partial(_single_threaded, func)
    if scheduler:
        return _map_dask(func, items, scheduler, progress)
    n = resolve_workers(workers)
    if n == 1 or total <= 1:
        results = []
        for i, item in enumerate(items):
            results.append(func(item))
            if progress is not None:
                progress(i + 1, total)
        return results
    return _map_processes(func, items, min(n, total), progress)


_THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                     "NUMBA_NUM_THREADS")


@contextlib.contextmanager
def _single_threaded_children():
    """
    Spawned workers start with one BLAS/OpenMP thread each (they read these
    variables at start-up), so N workers do not oversubscribe N cores.
    """
    saved = {name: os.environ.get(name) for name in _THREAD_VARIABLES}
    for name in _THREAD_VARIABLES:
        os.environ[name] = "1"
    try:
        yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value


#: The process pool of an active :func:`shared_pool` block, or None.
_SHARED = None


@contextlib.contextmanager
def shared_pool(workers=None, scheduler=None):
    """
    Within the block, :func:`map_segments` calls that use local processes
    share one pool of ``workers`` spawned processes instead of starting a
    pool each (a stage that maps several times pays the start-up once).
    Does nothing with one worker, with a Dask scheduler or inside another
    such block.
    """
    global _SHARED
    if _SHARED is not None or scheduler or resolve_workers(workers) == 1:
        yield
        return
    context = multiprocessing.get_context("spawn")
    with _single_threaded_children(), \
            ProcessPoolExecutor(max_workers=resolve_workers(workers), mp_context=context) as pool:
        _SHARED = pool
        try:
            yield
        finally:
            _SHARED = None


def _map_processes(func, items, n, progress):
    if _SHARED is not None:
        return _collect(_SHARED, func, items, progress)
    context = multiprocessing.get_context("spawn")
    with _single_threaded_children(), \
            ProcessPoolExecutor(max_workers=n, mp_context=context) as pool:
        return _collect(pool, func, items, progress)


def _collect(pool, func, items, progress):
    """
    Results in item order. When items fail, the pending ones are cancelled,
    the running ones are let finish, and the error of the first failed item
    in item order is raised: the same message whichever worker was quicker.
    """
    results = [None] * len(items)
    futures = {pool.submit(func, item): i for i, item in enumerate(items)}
    failed = {}
    for done, future in enumerate(as_completed(futures), start=1):
        error = future.exception() if not future.cancelled() else None
        if error is not None:
            if not failed:
                for other in futures:
                    other.cancel()
            failed[futures[future]] = error
        elif not future.cancelled():
            results[futures[future]] = future.result()
        if progress is not None and not failed:
            progress(done, len(items))
    if failed:
        raise failed[min(failed)]
    return results


def _map_dask(func, items, scheduler, progress):
    if not isinstance(scheduler, str) or "://" not in scheduler:
        raise OptionError(
            "scheduler", f"got {scheduler!r}.",
            "Give the Dask scheduler address as tcp://HOST:PORT.",
        )
    try:
        from dask.distributed import Client, as_completed as dask_completed
    except ImportError as err:
        raise OptionError(
            "scheduler", f"a Dask scheduler was given but Dask is not installed ({err}).",
            "Install it with: pip install 'geosp[dask]' (or pip install 'dask[distributed]').",
        ) from err
    try:
        client = Client(scheduler, timeout="20s")
    except OSError as err:
        raise OptionError(
            "scheduler", f"cannot reach the Dask scheduler at {scheduler} ({err}).",
            "Check the address and that the scheduler is running.",
        ) from err
    try:
        # Items can be large (a block's stations, a fit's covariance factor):
        # send them to the workers directly rather than inside the task graph.
        scattered = client.scatter(list(items))
        futures = [client.submit(func, item, pure=False) for item in scattered]
        index = {future.key: i for i, future in enumerate(futures)}
        results = [None] * len(items)
        for done, future in enumerate(dask_completed(futures), start=1):
            results[index[future.key]] = future.result()
            if progress is not None:
                progress(done, len(items))
        return results
    finally:
        client.close()
