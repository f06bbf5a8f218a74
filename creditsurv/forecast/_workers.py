"""Where a projection's chunks run: in threads, or in worker processes forked from this one.

A chunk is a pure function of the book, so it can run anywhere; its results are taken in the
chunks' order, so every sum is the same bits whatever ran it. Threads suit a chunk whose whole
projection must come back (writers, ``on_chunk`` consumers); but much of a chunk's time goes to
NumPy calls that keep the interpreter lock (``cumsum``, ``cumprod``, ``bincount``, small
elementwise passes), so two threads barely beat one. Processes do scale: a worker forked from
this process shares the book's arrays copy-on-write, computes its chunks, and sends back only
what a chunk reduces to (per-loan values and pooled sums, about a hundredth of the chunk).
"""

from __future__ import annotations

import ctypes
import itertools
import multiprocessing
import os
import sys
import warnings
from collections import deque

from threadpoolctl import threadpool_limits

from ..errors import ProjectionError
from ..model import ordered_map

__all__ = ["can_fork", "chunk_map", "worker_count"]

_TASKS: dict[int, tuple] = {}
"""The work of each running :func:`chunk_map`, by number: a forked worker finds it here (it was copied
with the process), so only a chunk's number crosses to the worker."""
_numbers = itertools.count()


def worker_count(workers: int | None) -> int:
    """Threads or processes a projection runs its chunks in: ``workers``, or one per core this process may use."""
    if workers is None:
        try:
            return max(len(os.sched_getaffinity(0)), 1)
        except AttributeError:  # not on Linux
            return max(os.cpu_count() or 1, 1)
    if int(workers) < 1:
        raise ProjectionError(f"workers must be at least 1, got {workers}")
    return int(workers)


def can_fork() -> bool:
    """Whether worker processes can be forked here: on Linux (macOS's system libraries are not safe to fork
    with threads running, and Windows has no fork)."""
    return sys.platform.startswith("linux") and "fork" in multiprocessing.get_all_start_methods()


def chunk_map(fn, items, workers: int, *, processes: bool):
    """``fn`` of each item, yielded in the items' order: in ``workers`` forked processes when ``processes`` (and
    the platform can fork, and there are at least two items per worker), else in threads (:func:`ordered_map`)."""
    items = list(items)
    if not (processes and workers > 1 and len(items) >= 2 * workers and can_fork()):
        yield from ordered_map(fn, items, workers)
        return
    number = next(_numbers)
    _TASKS[number] = (fn, items)
    try:
        # The workers run NumPy on arrays they inherited and never touch the parent's other threads' state
        # (DuckDB's and Arrow's pools sit idle), which is the hazard Python's fork warning is about.
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=r".*fork\(\) may lead to deadlocks", category=DeprecationWarning)
            pool = multiprocessing.get_context("fork").Pool(workers, initializer=_start_worker)
        with pool:
            waiting: deque = deque()  # at most two chunks a worker in flight, which bounds the memory
            for i in range(len(items)):
                waiting.append(pool.apply_async(_run, ((number, i),)))
                if len(waiting) >= 2 * workers:
                    yield waiting.popleft().get()
            while waiting:
                yield waiting.popleft().get()
    finally:
        del _TASKS[number]


def _start_worker() -> None:
    """Each worker is one core's worth: BLAS inside it stays on one thread (as in :func:`ordered_map`). And its
    chunks' arrays (a few hundred kB to a few MB each, allocated and freed many times a chunk) come from the
    C heap it keeps, not from fresh pages of the system every time: glibc hands blocks above its mmap threshold
    (128 kB until it adapts) to the system on every free, and every new one then starts with page faults."""
    _start_worker.limits = threadpool_limits(limits=1, user_api="blas")
    _keep_freed_memory()


def _keep_freed_memory() -> None:
    """Raise glibc's mmap and trim thresholds for this process (a worker's lifetime); nothing elsewhere."""
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:  # not glibc
        return
    m_trim_threshold, m_mmap_threshold = -1, -3  # mallopt parameters of glibc's malloc.h
    libc.mallopt(m_mmap_threshold, 32 * 2**20)  # the largest glibc allows
    libc.mallopt(m_trim_threshold, 256 * 2**20)


def _run(task: tuple[int, int]):
    fn, items = _TASKS[task[0]]
    return fn(items[task[1]])
