"""Run independent tasks (fits, evidence runs) in worker processes.

The tasks of a comparison — one model's fit and evidence, one prior-sensitivity evidence —
share nothing, so they run side by side on the machine's cores. Each task is a plain
callable with no arguments; the results come back in the order of the tasks, so the
caller's output does not depend on which worker finished first, and a task computes
exactly what it computes in the parent (same seed, same numbers: ``jobs=1`` and ``jobs=N``
give bit-identical results).

Workers are started with the ``fork`` method (Linux, the platform diskfield is run on):
the task list is inherited by the children, so tasks may close over models and builder
functions that do not pickle; only the results travel back (pickled). Where ``fork`` is
not available the tasks run one after another in the calling process.

BLAS: each worker limits OpenBLAS to one thread (numpy's and scipy's bundled copies) so
that N workers on N cores do not oversubscribe them.

Errors: a :class:`diskfield.errors.DiskfieldError` raised in a worker is re-raised in the
parent as the same class with the same message and attributes (some of these classes do
not survive pickling as they are). Ctrl-C stops the workers (they receive the same
signal); each task checkpoints as it would in the parent, so ``--resume`` continues.
"""
from __future__ import annotations

import ctypes
import glob
import multiprocessing
import os
import time
from concurrent.futures import ProcessPoolExecutor, as_completed

from .errors import DiskfieldError, OptionError

__all__ = ["usable_cores", "check_jobs", "run_tasks"]

_TASKS: list = []  # the running task list, inherited by forked workers


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the OS tells)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


def check_jobs(jobs, n_tasks: int, option: str = "--jobs") -> int:
    """Number of worker processes: ``jobs`` (None: usable cores), capped at ``n_tasks``."""
    if jobs is None:
        jobs = usable_cores()
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise OptionError(option, jobs, "a whole number >= 1 (1: no worker processes)")
    return max(1, min(jobs, n_tasks))


def run_tasks(tasks, jobs: int, on_done=None) -> list:
    """Run ``tasks`` (callables without arguments) on ``jobs`` processes.

    Parameters
    ----------
    tasks : sequence of callable
        Run in this order when ``jobs == 1``; with more workers, submitted in this order
        (put the longest first).
    jobs : int
        Worker processes; 1 runs everything in the calling process.
    on_done : callable, optional
        ``on_done(index, result, seconds)`` in the parent as each task finishes.

    Returns
    -------
    list
        The results in the order of ``tasks``.
    """
    tasks = list(tasks)
    if jobs <= 1 or len(tasks) <= 1 or "fork" not in multiprocessing.get_all_start_methods():
        return [_run_here(i, t, on_done) for i, t in enumerate(tasks)]
    from .likelihood import compile_kernels

    compile_kernels()  # once here: the forked workers inherit the compiled code
    global _TASKS
    _TASKS = tasks
    results = [None] * len(tasks)
    pool = ProcessPoolExecutor(max_workers=jobs, mp_context=multiprocessing.get_context("fork"),
                               initializer=_single_thread_blas)
    try:
        futures = {pool.submit(_run_in_worker, i): i for i in range(len(tasks))}
        for fut in as_completed(futures):
            i = futures[fut]
            status, payload, seconds = fut.result()
            if status == "error":
                raise _rebuild_error(*payload)
            results[i] = payload
            if on_done is not None:
                on_done(i, payload, seconds)
    except BaseException:
        pool.shutdown(wait=False, cancel_futures=True)
        raise
    finally:
        _TASKS = []
    pool.shutdown(wait=True)
    return results


def _run_here(i, task, on_done):
    t0 = time.perf_counter()
    result = task()
    if on_done is not None:
        on_done(i, result, time.perf_counter() - t0)
    return result


def _run_in_worker(i):
    t0 = time.perf_counter()
    try:
        result = _TASKS[i]()
    except DiskfieldError as exc:
        return "error", (type(exc), exc.args, dict(exc.__dict__)), time.perf_counter() - t0
    return "ok", result, time.perf_counter() - t0


def _rebuild_error(cls, args, state):
    exc = cls.__new__(cls)
    Exception.__init__(exc, *args)
    exc.__dict__.update(state)
    return exc


def _single_thread_blas() -> None:
    """Limit the OpenBLAS copies bundled with numpy and scipy to one thread (best effort:
    environment variables no longer act once the library is loaded, as after a fork)."""
    import numpy
    import scipy

    for package in (numpy, scipy):
        libs = os.path.join(os.path.dirname(os.path.dirname(package.__file__)),
                            f"{package.__name__}.libs")
        for path in glob.glob(os.path.join(libs, "*openblas*.so*")):
            try:
                lib = ctypes.CDLL(path)
            except OSError:
                continue
            for name in ("scipy_openblas_set_num_threads64_", "scipy_openblas_set_num_threads",
                         "openblas_set_num_threads64_", "openblas_set_num_threads"):
                setter = getattr(lib, name, None)
                if setter is not None:
                    setter(1)
                    break
