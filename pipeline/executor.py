"""Runs per-file tasks in worker processes (or in-process for one worker).

The contract between the runner and a worker is plain data: a ``FileTask`` in, a ``FileOutcome``
out (dicts, strings and numpy arrays; no database handle, no shared memory, no global
settings), so another engine (e.g. a distributed one) can take the same tasks.
"""
from __future__ import annotations

import multiprocessing as mp
import os
from typing import Callable, Iterable, Iterator, TypeVar

T = TypeVar("T")
R = TypeVar("R")


def _context() -> mp.context.BaseContext:
    # fork is cheapest on Linux and workers touch nothing but their task; elsewhere spawn.
    return mp.get_context("fork" if os.name == "posix" and hasattr(os, "fork") else "spawn")


def run_tasks(fn: Callable[[T], R], tasks: Iterable[T], workers: int, *, chunksize: int = 16) -> Iterator[R]:
    """Yield ``fn(task)`` for every task, in completion order (order does not matter to callers)."""
    tasks = list(tasks)
    if workers <= 1 or len(tasks) <= 1:
        for t in tasks:
            yield fn(t)
        return
    with _context().Pool(processes=workers) as pool:
        yield from pool.imap_unordered(fn, tasks, chunksize=chunksize)
