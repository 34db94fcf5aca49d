"""Thread budget of the compiled steps (distance transforms, thinning) and of solves run side by side.

One analysis uses every core it may run on by default. A batch running
several samples side by side gives each sample its share instead, so that
workers x threads never exceeds the cores (oversubscribed threads make
every sample slower).
"""

from __future__ import annotations

import os
from contextlib import contextmanager

import numba

__all__ = ["threads", "limit_threads", "available_cores", "thread_map", "start_threads"]

_budget: int | None = None
_started = False


def start_threads() -> None:
    """Start numba's thread pool once, its idle OpenMP threads sleeping; the environment is left as it was.

    Idle OpenMP threads (numba's usual threading layer) spin by default. On
    a machine where other processes use the cores, a spinning thread takes
    the time slice that another of ours needs at the next barrier, and each
    of the few hundred parallel steps of a thinning then costs a time slice:
    measured on a busy 2-core machine, a 128^3 volume took 0.63 s on two
    threads against 0.06 s on one, and 0.05 s with sleeping idle threads,
    which cost nothing measurable on an idle machine. The OpenMP runtime
    reads ``OMP_WAIT_POLICY`` once, when it loads: it is set to ``PASSIVE``
    for that moment only (unless the user set it), so neither importing
    vesselflow nor running it changes the process environment.
    """
    global _started
    if _started:
        return
    _started = True
    from numba.np.ufunc import parallel

    key = "OMP_WAIT_POLICY"
    if key in os.environ:  # the user's choice stands
        parallel._launch_threads()
        return
    os.environ[key] = "PASSIVE"
    try:
        parallel._launch_threads()
    finally:
        os.environ.pop(key, None)


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity where the OS tells)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def threads() -> int:
    """Threads a compiled step may use now."""
    start_threads()
    n = _budget if _budget is not None else available_cores()
    return max(1, min(n, numba.config.NUMBA_NUM_THREADS))


@contextmanager
def limit_threads(n):
    """Run the enclosed steps with at most ``n`` threads each.

    Sets numba's thread count for the calling thread (numba keeps it per
    thread) and the budget the distance transforms read.
    """
    global _budget
    start_threads()
    previous_budget, previous_numba = _budget, numba.get_num_threads()
    _budget = max(1, int(n))
    numba.set_num_threads(threads())
    try:
        yield
    finally:
        _budget = previous_budget
        numba.set_num_threads(previous_numba)


def thread_map(fn, items) -> list:
    """``[fn(x) for x in items]``, run on up to :func:`threads` threads, results in order.

    For work that spends its time outside the GIL (SuperLU's triangular
    solves in the flow step): each call must not touch shared mutable state,
    so the results do not depend on the number of threads.
    """
    items = list(items)
    workers = min(len(items), threads())
    if workers <= 1:
        return [fn(x) for x in items]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(workers) as pool:
        return list(pool.map(fn, items))
