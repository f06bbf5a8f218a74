"""Where the pieces of a large computation run: in threads, or in worker processes forked from this one.

The fit's blocks of rows and the projection's chunks of loans are pure functions of data this
process holds, so they can run anywhere; their results are taken in the items' order, so every
sum is the same bits whatever ran it (:func:`ordered_map` in threads, :func:`chunk_map` in
threads or processes, :class:`ProcessPool` in processes kept for many calls: the fit's Newton
passes). Threads suit a piece whose whole result must come back (the projection's
writers and ``on_chunk`` consumers) or whose input arrives as it is read (the fit's first pass);
but much of a piece's time goes to NumPy calls that keep the interpreter lock (``cumsum``,
``cumprod``, ``bincount``, many small elementwise passes), so two threads barely beat one.
Processes do scale: a worker forked from this process shares its arrays and files copy-on-write,
computes its pieces, and sends back only what a piece reduces to (pooled sums, per-loan values).
Pieces whose sums are large (by cell, by segment and age) are grouped so that a worker sends a
group's sums once; every route adds the same groups the same way.
"""

from __future__ import annotations

import ctypes
import itertools
import multiprocessing
import signal
import sys
import warnings
from collections import deque
from concurrent.futures import ThreadPoolExecutor

from threadpoolctl import threadpool_limits

__all__ = ["ProcessPool", "can_fork", "chunk_map", "ordered_map", "worth_forking"]

_TASKS: dict[int, object] = {}
"""The function of each :class:`ProcessPool`, by number: a forked worker finds it here (it was copied with
the process), so only the pool's number crosses to the worker with each item."""
_numbers = itertools.count()


def can_fork() -> bool:
    """Whether worker processes can be forked here: on Linux (macOS's system libraries are not safe to fork
    with threads running, and Windows has no fork)."""
    return sys.platform.startswith("linux") and "fork" in multiprocessing.get_all_start_methods()


def worth_forking(n_items: int, workers: int) -> bool:
    """Whether ``n_items`` pieces of work go to ``workers`` forked processes: more than one worker, at least two
    pieces each (fewer would leave a worker idle for a fork's cost), and a platform that can fork."""
    return workers > 1 and n_items >= 2 * workers and can_fork()


def chunk_map(fn, items, workers: int, *, processes: bool):
    """``fn`` of each item, yielded in the items' order: in ``workers`` forked processes when ``processes`` and
    :func:`worth_forking`, else in threads (:func:`ordered_map`)."""
    items = list(items)
    if not (processes and worth_forking(len(items), workers)):
        yield from ordered_map(fn, items, workers)
        return
    with ProcessPool(fn, workers) as pool:
        yield from pool.map(items)


class ProcessPool:
    """``workers`` processes forked from this one, that compute ``fn(item, *args)`` for the items of each
    :meth:`map`, yielded in the items' order.

    ``fn`` and what it reads are copied with the processes when they are forked, here; each item and the
    call's ``args`` are sent to a worker, and its result back. So one pool serves many calls over the
    same data (a fit's Newton passes over its stored blocks, with each pass's coefficients as ``args``),
    and each worker keeps its memory from call to call. At most two items a worker are in flight, which
    bounds the memory. Use it as a context manager: leaving stops the workers.
    """

    def __init__(self, fn, workers: int):
        self.workers = workers
        self._number = next(_numbers)
        _TASKS[self._number] = fn
        try:
            # The workers run NumPy on arrays they inherited and never touch the parent's other threads' state
            # (DuckDB's and Arrow's pools sit idle), which is the hazard Python's fork warning is about.
            with warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=r".*fork\(\) may lead to deadlocks", category=DeprecationWarning)
                self._pool = multiprocessing.get_context("fork").Pool(workers, initializer=_start_worker)
        except BaseException:
            del _TASKS[self._number]
            raise

    def map(self, items, *args):
        waiting: deque = deque()
        for item in items:
            waiting.append(self._pool.apply_async(_call, (self._number, item, args)))
            if len(waiting) >= 2 * self.workers:
                yield waiting.popleft().get()
        while waiting:
            yield waiting.popleft().get()

    def close(self) -> None:
        """Stop the workers (any item still in flight is dropped)."""
        self._pool.terminate()
        self._pool.join()
        _TASKS.pop(self._number, None)

    def __enter__(self) -> ProcessPool:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def ordered_map(fn, items, threads: int):
    """``fn`` of each item, computed by ``threads`` threads, yielded in the items' order.

    NumPy's large loops and BLAS release the GIL, so pieces are computed partly in parallel; the caller adds
    the results in order, so the sums are the same bits for any number of threads. BLAS runs on one
    thread inside (the blocks are the parallel work, and a product then never depends on how BLAS
    splits it). At most ``threads + 1`` results wait, which bounds the memory.
    """
    with threadpool_limits(limits=1, user_api="blas"):
        if threads <= 1:
            yield from map(fn, items)
            return
        with ThreadPoolExecutor(max_workers=threads) as pool:
            waiting: deque = deque()
            for item in items:
                waiting.append(pool.submit(fn, item))
                if len(waiting) > threads:
                    yield waiting.popleft().result()
            while waiting:
                yield waiting.popleft().result()


def _start_worker() -> None:
    """Each worker is one core's worth: BLAS inside it stays on one thread (as in :func:`ordered_map`). And its
    arrays (a few hundred kB to a few MB each, allocated and freed many times a piece) come from the C heap
    it keeps, not from fresh pages of the system every time: glibc hands blocks above its mmap threshold
    (128 kB until it adapts) to the system on every free, and every new one then starts with page faults."""
    _start_worker.limits = threadpool_limits(limits=1, user_api="blas")
    _keep_freed_memory()
    # The run's handlers (SIGTERM and SIGHUP raise, to remove unfinished outputs) belong to the run's process: a
    # worker writes nothing, and the pool stops it with SIGTERM, which must end it at once.
    for name in ("SIGTERM", "SIGHUP"):
        if hasattr(signal, name):
            signal.signal(getattr(signal, name), signal.SIG_DFL)


def _keep_freed_memory() -> None:
    """Raise glibc's mmap and trim thresholds for this process (a worker's lifetime); nothing elsewhere."""
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:  # not glibc
        return
    m_trim_threshold, m_mmap_threshold = -1, -3  # mallopt parameters of glibc's malloc.h
    libc.mallopt(m_mmap_threshold, 32 * 2**20)  # the largest glibc allows
    libc.mallopt(m_trim_threshold, 256 * 2**20)


def _call(number: int, item, args: tuple):
    return _TASKS[number](item, *args)
