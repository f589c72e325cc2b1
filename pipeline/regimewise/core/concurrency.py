"""Independent model fits of one stage on several cores, with the same numbers as one core.

A stage that fits several models which do not depend on each other (the regime stage's side-by-side regimes and
cross-fitted fold regimes; the evaluate stage's outcome models per fold and estimates per regime) hands them to
:func:`run_concurrently` as callables. With ``threads`` above 1 they run
on threads of the stage's own process: the arrays they read (records, design matrix, probabilities) are shared,
not copied, and numpy releases the interpreter lock in its array loops, so two fits proceed at once.

Every BLAS call inside is held to one thread (:func:`threadpoolctl.threadpool_limits`): a multi-threaded BLAS
may sum in another order, so the same records would give numbers that differ in the last digits with the
number of cores. Each task computes exactly what it would compute alone, and results come back in the order
of the tasks, so the outputs are identical byte for byte whatever ``threads`` is.

Memory: glibc's allocator gives each thread that allocates its own arena and keeps memory freed there for reuse,
so two threads filling and freeing large arrays hold more than one would. :func:`share_allocator_arenas` asks it
for one arena shared by all threads (``mallopt(M_ARENA_MAX, 1)``); a workflow job calls it before any thread
starts. At 100,000 episodes x 12 it lowered the evaluate stage's peak on two threads by about 150 MB (13%) with no
measurable cost in time (bench/RESULTS.md). Nothing changes elsewhere than glibc, and no number depends on it.

Time: glibc serves every allocation above 32 MB (its largest threshold) with a fresh ``mmap`` and returns it to
the system when freed, so each temporary column of a large cohort (12 million decisions: 96 MB a column) is
faulted in and zeroed by the kernel page by page, again at every use. :func:`keep_freed_memory` serves them from
the heap instead and keeps freed memory there for the next array (``mallopt(M_MMAP_MAX, 0)`` and a trim threshold
of 2 GiB). At 1M episodes x 12 it cut the evaluate stage's system time from 45 to 16 s and its wall time by 18%,
for 3% more peak memory (bench/RESULTS.md).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import multiprocessing
import sys
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor
from typing import TypeVar

from threadpoolctl import threadpool_limits

T = TypeVar("T")

# glibc's mallopt parameter numbers (malloc.h)
M_TRIM_THRESHOLD = -1
M_MMAP_MAX = -4
M_ARENA_MAX = -8
KEPT_FREE_BYTES = 2**31 - 1  # the largest trim threshold mallopt takes (an int): 2 GiB


def _mallopt(parameter: int, value: int) -> bool:
    """glibc's ``mallopt``; True if it took the setting, False elsewhere (another C library, another system)."""
    try:
        mallopt = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").mallopt
    except (OSError, AttributeError):
        return False
    return bool(mallopt(ctypes.c_int(parameter), ctypes.c_int(value)))


def share_allocator_arenas() -> bool:
    """Ask glibc's allocator for one arena shared by every thread of this process; True if it took the setting.

    Call it before any thread starts (arenas already made stay). Without glibc (another C library, another
    system) nothing changes and the answer is False.
    """
    return _mallopt(M_ARENA_MAX, 1)


def keep_freed_memory() -> bool:
    """Ask glibc's allocator to serve large arrays from its heap and keep up to 2 GiB freed there for reuse,
    rather than map each one afresh from the system (the module's notes); True if it took both settings.

    The process's resident memory then stays at its peak until it ends, which is what a workflow job needs. Without
    glibc nothing changes and the answer is False.
    """
    return _mallopt(M_MMAP_MAX, 0) & _mallopt(M_TRIM_THRESHOLD, KEPT_FREE_BYTES)


def run_concurrently(tasks: Sequence[Callable[[], T]], threads: int = 1) -> list[T]:
    """The results of ``tasks`` (callables without arguments), in their order; up to ``threads`` at once.

    Tasks must not write to shared objects (each returns what it computed). With ``threads`` 1, or a single
    task, they run one after the other in this thread. An exception in a task is raised here.
    """
    threads = max(1, int(threads))
    with threadpool_limits(limits=1):
        if threads == 1 or len(tasks) <= 1:
            return [task() for task in tasks]
        with ThreadPoolExecutor(max_workers=min(threads, len(tasks))) as pool:
            return list(pool.map(lambda task: task(), tasks))


_FORKED_TASKS: Sequence[Callable] = ()  # the tasks of the forked workers, which inherit them when forked


def _run_forked(index: int):
    return _FORKED_TASKS[index]()


def can_fork() -> bool:
    """Whether worker processes can be forked here (not on Windows; on macOS forks are unsafe and Python does
    not start them by default)."""
    return sys.platform != "darwin" and "fork" in multiprocessing.get_all_start_methods()


def run_in_processes(tasks: Sequence[Callable[[], T]], processes: int = 1) -> list[T]:
    """The results of ``tasks`` (callables without arguments), in their order; up to ``processes`` at once.

    For tasks that hold the interpreter lock most of the time (drawing figures, string work), which threads
    would run one at a time: each runs in a worker process forked from this one, so it sees this process's
    objects without copying them, and sends back only its result (which must pickle). Workers take the tasks in
    their order as they become free: give the longest first. With ``processes`` 1, a single task, or where
    processes cannot be forked (:func:`can_fork`), they run one after the other in this process, with the same
    results. An exception in a task is raised here.
    """
    processes = min(max(1, int(processes)), len(tasks))
    if processes <= 1 or not can_fork():
        return [task() for task in tasks]
    global _FORKED_TASKS
    _FORKED_TASKS = list(tasks)  # inherited by the workers, forked at the first task; a dead one raises here
    try:
        with ProcessPoolExecutor(processes, mp_context=multiprocessing.get_context("fork")) as pool:
            return list(pool.map(_run_forked, range(len(tasks))))
    finally:
        _FORKED_TASKS = ()
