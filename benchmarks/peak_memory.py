"""Peak memory of a benchmark route: its process and the worker processes it forks, together."""

from __future__ import annotations

import os
import resource
import threading
from pathlib import Path

__all__ = ["PeakMemory"]


class PeakMemory:
    """The peak of this process and its worker processes together, sampled every 200 ms.

    Each process's proportional set size (``Pss`` of ``/proc/PID/smaps_rollup``): a page shared by k
    processes counts 1/k to each, so what a worker shares copy-on-write with its parent is counted
    once. A sample can miss a spike shorter than its interval, so :meth:`stop` also gives an upper
    bound that cannot: the largest resident set of this process (``ru_maxrss``) plus that of the
    largest worker (``RUSAGE_CHILDREN``) times ``workers``, which counts every shared page again.
    """

    def __init__(self, workers: int):
        self.workers = workers
        self.peak_kib = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)
        self._thread.start()

    @staticmethod
    def _tree(pid: int) -> list[int]:
        pids = [pid]
        for task in Path(f"/proc/{pid}/task").glob("*"):
            try:
                children = (task / "children").read_text().split()
            except OSError:
                continue
            for child in children:
                pids += PeakMemory._tree(int(child))
        return pids

    @staticmethod
    def _pss_kib(pid: int) -> int:
        try:
            for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
                if line.startswith("Pss:"):
                    return int(line.split()[1])
        except OSError:
            pass
        return 0

    def _sample(self) -> None:
        while not self._stop.wait(0.2):
            self.peak_kib = max(self.peak_kib, sum(self._pss_kib(p) for p in self._tree(os.getpid())))

    def stop(self) -> dict:
        """``peak_mib`` (sampled), ``bound_mib`` (the upper bound) and ``main_rss_mib`` (this process alone)."""
        self._stop.set()
        self._thread.join()
        main = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        worker = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        return {"peak_mib": max(self.peak_kib / 1024, 0.0), "bound_mib": main + self.workers * worker, "main_rss_mib": main}
