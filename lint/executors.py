"""Where shards are scanned: in this process, in a local pool of processes, or elsewhere (a cluster executor
plugs in here).  An executor maps a function over work items and yields the results in the order of the items,
so the report is the same whatever runs the work."""
from __future__ import annotations

import multiprocessing
import os
from concurrent.futures import ProcessPoolExecutor
from typing import Callable, Iterable, Iterator


class LocalExecutor:
    """Runs work in this process (``jobs=1``) or in a pool of ``jobs`` processes.

    The pool starts its processes with forkserver rather than fork: a child forked from a process whose Arrow
    thread pools are running can deadlock.
    """

    def __init__(self, jobs: int = 1):
        if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
            raise ValueError(f"jobs must be a whole number >= 1, got {jobs!r} (hint: the number of cores)")
        self.jobs = jobs

    def map(self, fn: Callable, items: Iterable) -> Iterator:
        items = list(items)
        if self.jobs == 1 or len(items) < 2:
            yield from map(fn, items)
            return
        context = multiprocessing.get_context("forkserver" if os.name == "posix" else "spawn")
        with ProcessPoolExecutor(max_workers=min(self.jobs, len(items)), mp_context=context) as pool:
            yield from pool.map(fn, items)

    def describe(self) -> str:
        return "this process" if self.jobs == 1 else f"{self.jobs} local processes"
