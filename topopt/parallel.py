"""Run independent jobs in worker processes on this machine, results as they finish.

Used by ``compare`` (one job per build direction) and ``sweep`` (one job per case). Each
worker is a fresh interpreter ("spawn"): forking a process that already holds BLAS,
OpenMP or numba thread pools is not safe. Jobs should limit themselves to one BLAS
thread (see :func:`single_thread`), or the workers fight over the cores.
"""

from __future__ import annotations

import contextlib
import os
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from typing import Any


def single_thread():
    """Context in which BLAS / OpenMP libraries use one thread (created when entered)."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1)


def die_with_parent(parent_pid: int) -> None:
    """End this worker process when the process that started it ends, however it ends.

    On Linux the kernel sends SIGKILL when the parent dies (``prctl(PR_SET_PDEATHSIG)``);
    everywhere a watchdog thread also checks once a second whether the parent is still
    the one that started the worker (a dead parent's children are adopted by another
    process). Without this, workers of a killed ``sweep`` or ``compare`` computed on
    and then sat idle.
    """
    import signal
    import sys

    if sys.platform.startswith("linux"):
        with contextlib.suppress(Exception):
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            pr_set_pdeathsig = 1
            libc.prctl(pr_set_pdeathsig, int(signal.SIGKILL), 0, 0, 0)
    if os.getppid() != parent_pid:  # the parent died before the line above
        os._exit(1)

    def watch() -> None:
        while True:
            time.sleep(1.0)
            if os.getppid() != parent_pid:
                os._exit(1)

    threading.Thread(target=watch, name="die-with-parent", daemon=True).start()


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
    >>> # for key, value, error in process_map(pow, [("a", (2, 3), {})], workers=1): ...
    """
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=die_with_parent, initargs=(os.getpid(),))
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
