"""Run a campaign's tasks on Dask distributed, streaming each result to disk as it arrives.

Every task is a pure function of (configuration, seed): the seed of task ``i`` is the
``i``-th child of ``numpy.random.SeedSequence(campaign_seed)``, so results do not depend on
the number of workers, on the order tasks finish in, or on whether the campaign was resumed.
"""
from __future__ import annotations

import contextlib
import os
import socket
import time
import traceback
import uuid
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..errors import OptionError
from .store import ResultStore

__all__ = ["Task", "RunReport", "task_seed", "open_client", "run_tasks", "SINGLE_THREAD_ENV"]

#: Thread-pool variables pinned to 1 in every worker: a fit is vectorised over walkers and
#: one task per core is the parallel unit, so nested BLAS/OpenMP threads only oversubscribe.
SINGLE_THREAD_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1",
                     "MKL_NUM_THREADS": "1", "NUMEXPR_NUM_THREADS": "1"}


def task_seed(campaign_seed: int, index: int) -> np.random.SeedSequence:
    """The seed of task ``index``: child ``index`` of ``SeedSequence(campaign_seed)``.

    Identical to ``SeedSequence(campaign_seed).spawn(n)[index]`` for any ``n > index``,
    without spawning the others.
    """
    return np.random.SeedSequence(int(campaign_seed), spawn_key=(int(index),))


@dataclass(frozen=True)
class Task:
    """One unit of work: ``fn(*args)`` must return a JSON-serialisable dict.

    Attributes
    ----------
    task_id : str
        Unique within the campaign; also the result file's name (letters, digits, ``_-``).
    fn : callable
        A module-level (picklable) pure function.
    args : tuple
        Its arguments — typically (configuration dataclass, SeedSequence).
    meta : dict
        Small JSON-serialisable facts stored beside the result (e.g. the simulation index).
    """

    task_id: str
    fn: Callable
    args: tuple
    meta: dict = field(default_factory=dict)


@dataclass
class RunReport:
    """What one call of :func:`run_tasks` did.

    Attributes
    ----------
    n_total : int
        Tasks in the campaign.
    n_skipped : int
        Tasks already finished on disk (resume), not run again.
    n_run : int
        Tasks run and finished in this call.
    failed : list of dict
        Tasks that failed after their retries (also written to ``failed/``).
    wall_time_s : float
        Wall time of the call [s].
    n_workers : int
        Workers of the cluster used.
    """

    n_total: int
    n_skipped: int
    n_run: int = 0
    failed: list = field(default_factory=list)
    wall_time_s: float = 0.0
    n_workers: int = 0


def _execute(fn, args):
    """Worker-side wrapper: run the task and attach timing and worker facts."""
    start, cpu = time.perf_counter(), time.process_time()
    result = fn(*args)
    return {"result": result, "wall_time_s": time.perf_counter() - start,
            "cpu_time_s": time.process_time() - cpu,
            "worker": {"host": socket.gethostname(), "pid": os.getpid(),
                       "omp_num_threads": os.environ.get("OMP_NUM_THREADS")}}


def _scheduler_address(scheduler: str | None) -> str | None:
    return scheduler or os.environ.get("DASK_SCHEDULER_ADDRESS") or None


@contextlib.contextmanager
def open_client(scheduler: str | None = None, workers: int | None = None):
    """A Dask client: an existing cluster, or a loopback ``LocalCluster`` (closed on exit).

    Parameters
    ----------
    scheduler : str, optional
        Address of an existing scheduler (``tcp://host:8786``); default: the
        ``DASK_SCHEDULER_ADDRESS`` environment variable; if neither, a local cluster.
    workers : int, optional
        Worker processes of the local cluster (one thread each); default: the CPU count.
        Not used when connecting to an existing cluster (its size is the cluster's).
    """
    from distributed import Client, LocalCluster

    if workers is not None and int(workers) < 1:
        raise OptionError("--workers", workers, "a positive integer")
    address = _scheduler_address(scheduler)
    if address:
        with _connect(address) as client:
            yield client
        return
    n = int(workers) if workers else (os.cpu_count() or 1)
    # no dashboard; the scheduler's own HTTP routes on a free port (by default they take 8787,
    # and a second local cluster, e.g. two campaigns at once, warned that it was taken)
    with LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None, scheduler_kwargs={"dashboard_address": ":0"},
                      env=dict(SINGLE_THREAD_ENV)) as cluster, \
            Client(cluster) as client:
        yield client


def _connect(address: str):
    from distributed import Client

    try:
        return Client(address, timeout="20s")
    except (OSError, TimeoutError) as err:
        source = "--scheduler" if not os.environ.get("DASK_SCHEDULER_ADDRESS") else \
            "--scheduler (or DASK_SCHEDULER_ADDRESS)"
        raise OptionError(source, address, "the address of a running Dask scheduler, e.g. "
                          f"tcp://host:8786 (connecting failed: {err})") from None


def _failure_record(task: Task, future, retries: int) -> dict:
    err = future.exception()
    tb = future.traceback()
    lines = traceback.format_exception(type(err), err, tb) if tb is not None else [repr(err)]
    return {"error_type": type(err).__name__, "message": str(err), "attempts": retries + 1,
            "traceback": "".join(lines[-6:]), "meta": task.meta}


def _progress(futures, enabled: bool, desc: str):
    from distributed import as_completed
    from tqdm.auto import tqdm

    iterator = as_completed(futures)
    return tqdm(iterator, total=len(futures), desc=desc, disable=not enabled, unit="task")


def run_tasks(tasks: list[Task], store: ResultStore, client, *, retries: int = 2,
              progress: bool = True, desc: str = "campaign") -> RunReport:
    """Run the tasks not yet finished in ``store`` on ``client``; write each result as it lands.

    Parameters
    ----------
    tasks : list of Task
        The whole campaign (finished ones are skipped).
    store : ResultStore
        Where results and failures go.
    client : distributed.Client
    retries : int
        Extra attempts of a failing task before it is reported as failed.
    progress : bool
        Show a tqdm progress bar on stderr.
    desc : str
        Label of the progress bar.

    Returns
    -------
    RunReport
    """
    start = time.perf_counter()
    done = store.finished_ids()
    todo = [t for t in tasks if t.task_id not in done]
    report = RunReport(n_total=len(tasks), n_skipped=len(tasks) - len(todo),
                       n_workers=len(client.scheduler_info().get("workers", {})))
    token = uuid.uuid4().hex[:8]
    futures = {client.submit(_execute, t.fn, t.args, key=f"diskfield-{desc}-{t.task_id}-{token}",
                             pure=False, retries=retries): t for t in todo}
    try:
        for future in _progress(list(futures), progress, desc):
            _collect(future, futures[future], store, report, retries)
    except BaseException:
        client.cancel(list(futures))
        raise
    report.wall_time_s = time.perf_counter() - start
    return report


def _collect(future, task: Task, store: ResultStore, report: RunReport, retries: int) -> None:
    if future.status == "finished":
        payload = future.result()
        store.write_result(task.task_id, {"meta": task.meta, **payload})
        report.n_run += 1
    else:
        failure = _failure_record(task, future, retries)
        store.write_failure(task.task_id, failure)
        report.failed.append({"task_id": task.task_id, **failure})
    future.release()
