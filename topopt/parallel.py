"""Run independent jobs in worker processes on this machine, results as they finish.

Used by ``compare`` (one job per build direction) and ``sweep`` (one job per case). Each
worker is a fresh interpreter ("spawn"): forking a process that already holds BLAS,
OpenMP or numba thread pools is not safe. Jobs should limit themselves to one BLAS
thread (see :func:`single_thread`), or the workers fight over the cores.
"""

from __future__ import annotations

import contextlib
import os
import sys
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from typing import Any


def single_thread():
    """Context in which BLAS / OpenMP libraries use one thread (created when entered)."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1)


@contextlib.contextmanager
def workers_skip_main_script():
    """Start worker processes without running the caller's ``__main__`` script in them.

    A spawned worker normally imports the parent's main script (as ``__mp_main__``) so
    that functions defined there can be unpickled. Our jobs call functions of
    ``topopt`` only, and a plain user script without an ``if __name__ == "__main__":``
    guard would run again in every worker, start workers of its own and fail. The
    spawn start method finds the script through ``__main__.__file__`` and
    ``__main__.__spec__`` (``multiprocessing.spawn.get_preparation_data``), so both are
    hidden while workers start and put back afterwards.
    """
    main = sys.modules.get("__main__")
    if main is None:
        yield
        return
    missing = object()
    saved = {name: getattr(main, name, missing) for name in ("__file__", "__spec__")}
    try:
        if saved["__file__"] is not missing:
            del main.__file__
        main.__spec__ = None
        yield
    finally:
        for name, value in saved.items():
            if value is missing:
                with contextlib.suppress(AttributeError):
                    delattr(main, name)
            else:
                setattr(main, name, value)


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
    >>> list(process_map(pow, [("a", (2, 3), {}), ("b", (2, 0.5), {})], workers=1))
    [('a', 8, None), ('b', 1.4142135623730951, None)]
    """
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=die_with_parent, initargs=(os.getpid(),))
    try:
        # Workers start as jobs are submitted (all of them here, before any result is
        # awaited); a function of the main script needs the script in the workers.
        starting = (contextlib.nullcontext() if getattr(func, "__module__", "") == "__main__"
                    else workers_skip_main_script())
        with starting:
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
