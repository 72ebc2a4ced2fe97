"""Run independent jobs in worker processes on this machine, results as they finish.

Used by ``compare`` (one job per build direction) and ``sweep`` (one job per case). Each
worker is a fresh interpreter ("spawn"): forking a process that already holds BLAS,
OpenMP or numba thread pools is not safe. Jobs should limit themselves to one BLAS
thread (see :func:`single_thread`), or the workers fight over the cores.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterable, Iterator
from typing import Any


def single_thread():
    """Context in which BLAS / OpenMP libraries use one thread (created when entered)."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1)


def process_map(
    func: Callable[..., Any], jobs: Iterable[tuple[Any, tuple, dict]], *, workers: int
) -> Iterator[tuple[Any, Any, BaseException | None]]:
    """Call ``func(*args, **kwargs)`` for each ``(key, args, kwargs)`` in worker processes.

    Yields ``(key, value, None)`` for a job that returned and ``(key, None, error)`` for
    one that raised (or whose worker died), in the order they finish. ``func`` and the
    arguments must be picklable (module-level functions, plain data). When the caller
    is interrupted or stops iterating, running workers are ended at once rather than
    awaited.

    Examples
    --------
    >>> list(process_map(pow, [("a", (2, 3), {}), ("b", (2, 0.5), {})], workers=1))
    [('a', 8, None), ('b', 1.4142135623730951, None)]
    """
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"))
    try:
        futures = {pool.submit(func, *args, **kwargs): key for key, args, kwargs in jobs}
        for future in as_completed(futures):
            try:
                yield futures[future], future.result(), None
            except Exception as exc:  # noqa: BLE001 - handed to the caller
                yield futures[future], None, exc
    except BaseException:
        # ProcessPoolExecutor has no public way to stop busy workers before Python 3.14.
        for process in list(getattr(pool, "_processes", {}).values()):
            with contextlib.suppress(Exception):
                process.terminate()
        pool.shutdown(wait=False, cancel_futures=True)
        raise
    pool.shutdown(wait=True)
