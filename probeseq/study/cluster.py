"""Where the runs of a batch or a plan are worked: a dask cluster, or local processes without dask.

:func:`run_tasks` runs one function on every job, one task per job, and returns the results in
the order of the jobs, whatever the number of workers or the order in which they finish. Each
job carries its own seed, so a result depends on its job alone and the results are the same as a
serial run's.

Where the tasks go:

* ``scheduler`` given (or the environment variable :data:`SCHEDULER_ENV`): the dask scheduler at
  that address (``tcp://HOST:PORT``), which must be reachable within :data:`CONNECT_TIMEOUT_S`
  and have at least one worker. The workers need probeseq installed and the same paths
  (a shared file system).
* else, with dask installed (``pip install probeseq[cluster]``): a local dask cluster started for
  the work, one single-threaded worker process per core (or per ``workers``), closed afterwards.
* else: local worker processes (a process pool), as before dask was supported; one worker runs
  the tasks in this process.

A task whose worker process dies is run once more (dask's ``allowed_failures`` of the local
cluster, or a new process pool; a facility's scheduler applies its own limit), and a task that
raises is run once more (``retries=1``); after that the caller's ``lost`` gives its result (a
failed run, say). dask is imported only here, and only when tasks run, so ``import probeseq``
stays light.

Examples
--------
>>> from probeseq.study.cluster import run_tasks                       # doctest: +SKIP
>>> run_tasks(abs, [-1, -2, 3], lost=lambda i, why: None, workers=2)    # doctest: +SKIP
[1, 2, 3]
"""

from __future__ import annotations

import importlib.util
import logging
import os
import threading
import uuid
from contextlib import ExitStack
from dataclasses import dataclass
from typing import Callable, Optional

from .. import runtime
from ..exceptions import InputError, ProbeseqError

__all__ = ['SCHEDULER_ENV', 'CLUSTER_EXTRA', 'CONNECT_TIMEOUT_S', 'RETRIES', 'Workers', 'scheduler_address',
           'dask_available', 'usable_cores', 'run_tasks']

#: environment variable naming the dask scheduler of batches and plans when ``--scheduler`` is not given
SCHEDULER_ENV = "PROBESEQ_SCHEDULER"


#: how to install the optional dependencies of the cluster
CLUSTER_EXTRA = "pip install probeseq[cluster]"


#: seconds to reach a scheduler and to see its first worker before giving up
CONNECT_TIMEOUT_S = 10.0


#: times a task is run again after its worker died or it raised
RETRIES = 1


_LOST_WORKER = "the worker process running it died, also when the run was tried again"


_CANCELLED = "the scheduler cancelled it (was the scheduler or the connection lost?)"


@dataclass(frozen=True)
class Workers:
    """Where the tasks run.

    Attributes
    ----------
    kind : {"local-cluster", "scheduler", "processes", "this-process"}
        A local dask cluster started for the work, a running dask scheduler, a local process
        pool (dask not installed), or this process alone (dask not installed, one worker).
    count : int
        Tasks that can run at once (worker threads; each task runs single-threaded on its worker).
    address : str or None
        The scheduler's address (kind "scheduler").
    """

    kind: str
    count: int
    address: Optional[str] = None

    def __str__(self) -> str:
        n, s = self.count, "" if self.count == 1 else "s"
        if self.kind == "local-cluster":
            return f"a local dask cluster of {n} single-threaded worker{s}"
        if self.kind == "scheduler":
            return f"the dask scheduler at {self.address} ({n} worker thread{s})"
        where = "this process" if self.kind == "this-process" else f"{n} local processes"
        return f"{where} ({CLUSTER_EXTRA} to use a dask cluster)"


def scheduler_address(scheduler: str | None = None) -> tuple:
    """The dask scheduler to use and where it was named.

    Parameters
    ----------
    scheduler : str, optional
        An address such as ``tcp://10.0.0.5:8786``; when None, the environment variable
        :data:`SCHEDULER_ENV` is read (empty means not set).

    Returns
    -------
    (str or None, str)
        The address (None: no scheduler, work locally) and its origin (``--scheduler`` or the
        variable's name), for messages.

    Raises
    ------
    InputError
        An empty ``scheduler``.
    """
    if scheduler is not None:
        text = str(scheduler).strip()
        if not text:
            raise InputError("--scheduler: empty address; give the dask scheduler as HOST:PORT or tcp://HOST:PORT")
        return text, "--scheduler"
    text = os.environ.get(SCHEDULER_ENV, "").strip()
    return (text or None), SCHEDULER_ENV


def dask_available() -> bool:
    """True when dask's distributed scheduler can be imported (the ``cluster`` extra)."""
    return importlib.util.find_spec("dask") is not None and importlib.util.find_spec("distributed") is not None


def usable_cores() -> int:
    """Processors this process may run on (at least 1)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def _one_line(text) -> str:
    return " ".join(str(text).split())


def _reason(exc: BaseException) -> str:
    """One line on why a task gave no result."""
    if type(exc).__name__ == "KilledWorker":
        return _LOST_WORKER
    if type(exc).__name__ == "CancelledError":
        return _CANCELLED
    return f"failed on its worker, also when tried again ({type(exc).__name__}: {_one_line(exc)[:300]})"


def _task(job, fn, n_jobs):
    """Run one job on a worker, with the kernels' thread budget of that worker (None: all cores)."""
    runtime.configure(n_jobs)
    return fn(job)


def run_tasks(fn: Callable, jobs, *, lost: Callable, scheduler: str | None = None, workers: int | None = None,
              pool_default: int = 2, names=None, done: Optional[Callable] = None,
              started: Optional[Callable] = None) -> list:
    """Run ``fn(job)`` for every job, one task per job; the results in the order of ``jobs``.

    Parameters
    ----------
    fn : callable
        A module-level function (it is sent to worker processes by reference). It should return
        a result for a failed job rather than raise; a raise counts as a failure of the task.
    jobs : iterable
        Its arguments, one per task; picklable.
    lost : callable
        ``lost(i, reason)`` gives the result of job ``i`` when no task gave one (its worker died
        twice, or it raised twice; ``reason`` is one line). It may raise to stop the work.
    scheduler : str, optional
        Address of a running dask scheduler; default: the environment variable
        :data:`SCHEDULER_ENV`, else work locally.
    workers : int, optional
        Local workers (ignored with a scheduler). Default: ``n_jobs`` of
        :func:`probeseq.runtime.configure` when set, else one per core with dask, else
        ``pool_default``; never more than the cores or the jobs.
    pool_default : int
        Default number of local processes without dask.
    names : sequence of str, optional
        A name per job, shown in the scheduler's task keys.
    done : callable, optional
        ``done(i, result)`` as each job finishes, in the order they finish.
    started : callable, optional
        ``started(where)`` with a :class:`Workers` once the workers are ready, before any result.

    Returns
    -------
    list
        One result per job, in the order of ``jobs``.

    Raises
    ------
    InputError
        ``workers`` is not a positive whole number; a scheduler was named but dask is not
        installed, the address is malformed or unreachable within :data:`CONNECT_TIMEOUT_S`, or
        it has no worker.
    """
    jobs = list(jobs)
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise InputError(f"workers must be a positive whole number, got {workers!r:.40}")
    address, origin = scheduler_address(scheduler)
    have_dask = dask_available()
    if address is not None and not have_dask:
        raise InputError(f"{origin} {address}: running on a dask scheduler needs dask; {CLUSTER_EXTRA}")
    if not jobs:
        return []
    names = [str(n) for n in names] if names is not None else [str(i) for i in range(len(jobs))]
    cap = min(usable_cores(), len(jobs))
    if have_dask:
        n = max(1, min(runtime.worker_count(workers, usable_cores()), cap))
        return _run_dask(fn, jobs, names, address, origin, n, lost, done, started)
    n = max(1, min(runtime.worker_count(workers, pool_default), cap))
    return _run_pool(fn, jobs, n, lost, done, started)


# ---------------------------------------------------------------------- dask
def _probe(address: str, origin: str):
    """Reach the scheduler once, without a client (a client that cannot connect leaves noise at exit)."""
    import asyncio

    from distributed.comm import connect
    from distributed.security import Security

    async def knock():
        comm = await connect(address, timeout=CONNECT_TIMEOUT_S, **Security().get_connection_args("client"))
        await comm.close()

    def run(box):  # in a thread of its own: the caller may be inside an event loop (a notebook)
        try:
            asyncio.run(knock())
        except BaseException as e:  # noqa: BLE001 - handed to the caller below
            box.append(e)

    box = []
    thread = threading.Thread(target=run, args=(box,), daemon=True)
    thread.start()
    thread.join(CONNECT_TIMEOUT_S + 5.0)
    if thread.is_alive():
        box.append(asyncio.TimeoutError(f"no answer after {CONNECT_TIMEOUT_S:g} s"))
    if not box:
        return
    e = box[0]
    if isinstance(e, (ValueError, TypeError)):
        raise InputError(f"{origin} {address}: not a usable dask scheduler address ({_one_line(e)[:200]}); "
                         "give HOST:PORT or tcp://HOST:PORT")
    raise InputError(f"could not reach the dask scheduler at {address} ({origin}) within "
                     f"{CONNECT_TIMEOUT_S:g} s: {_one_line(e)[:200] or type(e).__name__}")


def _connect(stack: ExitStack, address: str, origin: str):
    """A client of the running scheduler at ``address`` with at least one worker."""
    from distributed import Client

    _probe(address, origin)
    try:
        client = stack.enter_context(Client(address, timeout=CONNECT_TIMEOUT_S, set_as_default=False))
    except (OSError, ValueError, TypeError) as e:
        raise InputError(f"could not connect to the dask scheduler at {address} ({origin}): "
                         f"{_one_line(e)[:200]}") from None
    try:
        client.wait_for_workers(1, timeout=CONNECT_TIMEOUT_S)
    except (TimeoutError, OSError):
        raise InputError(f"the dask scheduler at {address} ({origin}) has no worker (waited "
                         f"{CONNECT_TIMEOUT_S:g} s); start workers for it") from None
    return client, Workers("scheduler", max(1, sum(client.nthreads().values())), address)


def _local_cluster(stack: ExitStack, n: int):
    """A local cluster of ``n`` single-threaded worker processes and its client."""
    import multiprocessing

    import dask
    from distributed import Client, LocalCluster

    if "fork" in multiprocessing.get_all_start_methods():
        # forked workers start at once with what this process has imported, and a user's script
        # needs no ``if __name__ == "__main__":`` guard (as with the process pool); held while the
        # cluster lives, for the workers that replace dead ones too
        stack.enter_context(dask.config.set({"distributed.worker.multiprocessing-method": "fork"}))
        runtime.ensure()  # the fork-safe threading layer, before the workers start
    try:
        # no per-worker memory cap (a large run may need more than 1/n of the memory; --jobs
        # gives fewer workers); a worker that dies is replaced and its task run once more
        cluster = stack.enter_context(LocalCluster(
            n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None, memory_limit=0,
            silence_logs=logging.CRITICAL,
            # no dashboard; the scheduler's small web server on any free port, not a fixed one
            scheduler_kwargs={"allowed_failures": RETRIES, "dashboard": False, "dashboard_address": ":0"}))
        client = stack.enter_context(Client(cluster, set_as_default=False))
    except (OSError, RuntimeError, TimeoutError) as e:
        raise ProbeseqError(f"could not start a local dask cluster of {n} workers: {_one_line(e)[:200]}") from None
    return client, Workers("local-cluster", n)


def _run_dask(fn, jobs, names, address, origin, n, lost, done, started) -> list:
    """The tasks on a dask cluster, at most one per worker thread at a time.

    The scheduler counts a worker's death against every task assigned to that worker, running or
    waiting; handing out no more tasks than there are threads keeps an innocent task from being
    counted against (and, on a second death, failed with) a task that kills its worker.
    """
    from distributed import as_completed

    results = [None] * len(jobs)
    with ExitStack() as stack:
        if address is None:
            client, where = _local_cluster(stack, n)
            # the kernels of each worker get their share of the cores (or of --jobs)
            n_jobs = max(1, (runtime.jobs() or usable_cores()) // n)
        else:
            client, where = _connect(stack, address, origin)
            n_jobs = None  # the worker machine decides (NUMBA_NUM_THREADS in its environment)
        if started is not None:
            started(where)
        token = uuid.uuid4().hex[:8]
        todo, index, live = list(range(len(jobs))), {}, set()
        pending = as_completed(loop=client.loop)

        def submit(width):
            while todo and len(live) < width:
                i = todo.pop(0)
                fut = client.submit(_task, jobs[i], fn=fn, n_jobs=n_jobs, retries=RETRIES, pure=False,
                                    key=f"probeseq-{_one_line(names[i])[:60]}-{i}-{token}")
                index[fut.key] = i
                live.add(fut)
                pending.add(fut)

        try:
            submit(where.count)
            for fut in pending:
                i = index[fut.key]
                live.discard(fut)
                if fut.status == "finished":
                    res = fut.result()
                elif fut.status == "cancelled":
                    res = lost(i, _CANCELLED)
                else:
                    res = lost(i, _reason(fut.exception()))
                results[i] = res
                fut.release()
                if done is not None:
                    done(i, res)
                # threads alive now: a dead worker is out until replaced; a facility's cluster may
                # also grow or shrink while the work runs
                submit(max(1, sum(client.nthreads().values())))
        except BaseException:
            client.cancel(list(live), force=True)
            raise
    return results


# ---------------------------------------------------------------------- without dask
def _run_pool(fn, jobs, n, lost, done, started) -> list:
    """The tasks in ``n`` local processes (or in this process when ``n`` is 1)."""
    results = [None] * len(jobs)
    if n == 1:
        if started is not None:
            started(Workers("this-process", 1))
        for i, job in enumerate(jobs):
            why = None
            for _ in range(RETRIES + 1):
                try:
                    res = fn(job)
                    break
                except Exception as e:  # noqa: PERF203 - a failed task is tried once more
                    why = _reason(e)
            else:
                res = lost(i, why)
            results[i] = res
            if done is not None:
                done(i, res)
        return results
    return _run_process_pool(fn, jobs, n, lost, done, started, results)


def _run_process_pool(fn, jobs, n, lost, done, started, results) -> list:
    """The tasks in process pools of ``n`` workers; a task that was running when a worker died is
    run once more alone, so that a second death is its own."""
    runtime.ensure()  # the fork-safe threading layer, before the workers start
    if started is not None:
        started(Workers("processes", n))
    tries = [0] * len(jobs)

    def finish(i, res):
        results[i] = res
        if done is not None:
            done(i, res)

    todo, suspects = list(range(len(jobs))), []
    while todo:
        # a worker that dies breaks the whole pool: the tasks not yet started go to a new one
        todo, broken = _pool_round(fn, jobs, todo, n, tries, finish, lost)
        suspects += broken
    for i in suspects:
        if _pool_round(fn, jobs, [i], 1, tries, finish, lost)[1]:
            finish(i, lost(i, _LOST_WORKER))
    return results


def _pool_round(fn, jobs, order, width, tries, finish, lost) -> tuple:
    """Run the jobs ``order`` with at most ``width`` at a time until done or a worker dies.

    Returns
    -------
    (list, list)
        The jobs not started and the jobs that were running when a worker died (both empty when
        every job finished).
    """
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
    from concurrent.futures.process import BrokenProcessPool

    todo, flying = list(order), {}
    with ProcessPoolExecutor(max_workers=width, initializer=runtime.configure,
                             initargs=(runtime.worker_jobs(width),)) as ex:
        while todo or flying:
            while todo and len(flying) < width:  # only as many submitted as run: a death hits only those
                i = todo.pop(0)
                flying[ex.submit(fn, jobs[i])] = i
            finished, _ = wait(flying, return_when=FIRST_COMPLETED)
            for fut in finished:
                i = flying.pop(fut)
                try:
                    res = fut.result()
                except BrokenProcessPool:
                    return todo, [i, *flying.values()]
                except Exception as e:  # the task raised: tried once more
                    tries[i] += 1
                    if tries[i] <= RETRIES:
                        todo.insert(0, i)
                        continue
                    res = lost(i, _reason(e))
                finish(i, res)
    return [], []
