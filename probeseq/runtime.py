"""Performance plumbing in one place: thread counts, BLAS limits, start-up and fork-safety.

Nothing here changes a result; it only decides how the work is spread over the machine.

One setting, ``n_jobs``, given to :func:`configure` (the command line's ``--jobs``), is the budget
of the whole process:

* threads of the compiled kernels (numba's ``prange`` loops): ``n_jobs``, or all cores when None;
* the fused counting pass: at most ``n_jobs`` of its worker threads (its own default, two, when
  None; see :func:`default_threads`);
* worker processes of a batch (:func:`probeseq.study.batch.analyze_batch`) and of
  :func:`probeseq.study.plan.plan_experiment` when they are not given a count: ``n_jobs`` (their own
  defaults when None), each worker then running its kernels on its share of ``n_jobs``.

:func:`configure` also chooses numba's threading layer: the fork-safe ``'workqueue'`` unless the
user chose one (``NUMBA_THREADING_LAYER`` or ``numba.config.THREADING_LAYER``). Worker processes
and the table written by a forked child (:class:`Background`) run compiled kernels, and numba's
GNU OpenMP layer aborts a forked child that starts a parallel loop. The layer is set in the
environment when numba is not imported yet, else in numba's configuration; either way before
numba starts its threads.

The command line calls :func:`configure` once at start. Library users need not call it: the
first kernel use calls :func:`ensure`, which configures the defaults (all cores, the fork-safe
layer) once, so the default behaviour is the same with or without a call. Importing this module
imports nothing beyond the standard library.
"""

from __future__ import annotations

import operator
import os
import sys
import threading
import time
from contextlib import contextmanager

from .exceptions import InputError

__all__ = ['default_threads', 'configure', 'ensure', 'jobs', 'kernel_threads', 'pass_threads', 'worker_count', 'worker_jobs', 'single_threaded_blas', 'preload', 'Background', 'background_checksum', 'MAX_JOBS', 'FORK_SAFE_LAYER']

#: largest accepted ``n_jobs``: more than the cores of any machine this runs on; a larger value is a typo
MAX_JOBS = 1024


#: numba's threading layer used unless the user chose one (fork-safe, needs no extra library)
FORK_SAFE_LAYER = "workqueue"


_STATE = {"configured": False, "n_jobs": None, "layer_set": False, "limited": False}


_BLAS_CONTROLLER = []


_PRELOADED = []


def _check_jobs(n_jobs):
    """``n_jobs`` as an int (or None); raises a one-line InputError for anything else."""
    if n_jobs is None:
        return None
    if isinstance(n_jobs, bool):
        raise InputError(f"--jobs (n_jobs) must be a whole number from 1 to {MAX_JOBS}, got {n_jobs!r}")
    try:
        n = operator.index(n_jobs)
    except TypeError:
        raise InputError(f"--jobs (n_jobs) must be a whole number from 1 to {MAX_JOBS}, "
                         f"got {n_jobs!r:.40}") from None
    if not 1 <= n <= MAX_JOBS:
        raise InputError(f"--jobs (n_jobs) must be a whole number from 1 to {MAX_JOBS}, got {n}")
    return int(n)


def _choose_layer():
    """Use the fork-safe threading layer unless the user chose one (before numba starts threads)."""
    user_env = "NUMBA_THREADING_LAYER" in os.environ and not _STATE["layer_set"]
    if user_env:
        return
    numba = sys.modules.get("numba")
    if numba is None:
        os.environ["NUMBA_THREADING_LAYER"] = FORK_SAFE_LAYER  # read by numba when it is imported
        _STATE["layer_set"] = True
        return
    config = getattr(numba, "config", None)
    if config is not None and getattr(config, "THREADING_LAYER", "default") == "default":
        config.THREADING_LAYER = FORK_SAFE_LAYER
        os.environ["NUMBA_THREADING_LAYER"] = FORK_SAFE_LAYER  # the same for child processes
        _STATE["layer_set"] = True


def configure(n_jobs: int | None = None) -> None:
    """Set the process's thread and worker budget and numba's threading layer.

    Parameters
    ----------
    n_jobs : int, optional
        Threads of the compiled kernels, and worker processes of a batch or a plan when they
        are not given a count; from 1 to :data:`MAX_JOBS`. None (the default): all cores for the
        kernels, the batch's and plan's own defaults for the workers. A count above numba's
        thread pool (``NUMBA_NUM_THREADS``, by default the number of cores) gives the whole pool.

    Raises
    ------
    InputError
        ``n_jobs`` is not a whole number from 1 to :data:`MAX_JOBS`.

    Notes
    -----
    Call it again to change the setting, e.g. ``configure(None)`` to go back to all cores. The
    threading layer is chosen only when numba has not started its threads yet; numba is imported
    here only when ``n_jobs`` limits the threads, so a call with the defaults costs nothing at
    start-up and leaves numba exactly as it would be without the call.
    """
    n = _check_jobs(n_jobs)
    _choose_layer()
    _STATE["n_jobs"] = n
    _STATE["configured"] = True
    if n is not None or (_STATE["limited"] and "numba" in sys.modules):
        _apply_threads()


def ensure() -> None:
    """Configure the defaults once if :func:`configure` was never called, then apply the thread
    count in the calling thread (numba's count is per thread) once ``n_jobs`` has ever limited it.
    Called before kernels run; costs microseconds after the first call."""
    if not _STATE["configured"]:
        configure(None)
    elif _STATE["limited"] and "numba" in sys.modules:
        _apply_threads()


def _apply_threads() -> int:
    """Set numba's thread count of the calling thread from ``n_jobs``; returns it."""
    import numba

    n_max = int(numba.config.NUMBA_NUM_THREADS)
    n = _STATE["n_jobs"]
    if n is not None:
        _STATE["limited"] = True  # from now on every thread is set explicitly (numba's count is per thread)
    n = n_max if n is None else min(n, n_max)
    if numba.get_num_threads() != n:
        numba.set_num_threads(n)
    return n


def jobs() -> int | None:
    """The ``n_jobs`` last given to :func:`configure` (None: not limited)."""
    return _STATE["n_jobs"]


def kernel_threads() -> int:
    """Threads the compiled kernels use in the calling thread (configuring the defaults first
    when needed); imports numba."""
    ensure()
    return _apply_threads()


def pass_threads() -> int | None:
    """Worker threads of the fused counting pass: None (the pass's own default) unless ``n_jobs``
    is set, else at most ``n_jobs`` of the default."""
    n = _STATE["n_jobs"]
    if n is None:
        return None

    return max(1, min(n, default_threads()))


def worker_count(workers: int | None, default: int) -> int:
    """Worker processes to use: ``workers`` when given, else ``n_jobs`` when set, else ``default``."""
    if workers is not None:
        return workers
    n = _STATE["n_jobs"]
    return default if n is None else n


def worker_jobs(n_workers: int) -> int | None:
    """``n_jobs`` for each of ``n_workers`` worker processes: an equal share of ``n_jobs`` (at
    least one), or None (all cores, as before) when ``n_jobs`` is not set. Give it to
    :func:`configure` as the workers' initializer."""
    n = _STATE["n_jobs"]
    return None if n is None else max(1, n // max(1, int(n_workers)))


# ---------------------------------------------------------------------- BLAS
@contextmanager
def single_threaded_blas():
    """Limit BLAS/LAPACK to one thread inside the block.

    The fits' matrices are small, and a second BLAS thread on a busy two-core machine costs far
    more than it gives (measured: a 3000 x 16 SVD took 0.25 s with two threads against 2 ms with
    one). The loaded libraries are inspected once per process (inspecting them took 40 ms with
    numba's libraries loaded), then each limit costs microseconds. Without threadpoolctl, or when
    it cannot inspect the libraries, the block runs as is.
    """
    try:
        ctl = _blas_controller().limit(limits=1, user_api="blas")
    except Exception:  # threadpoolctl missing or unable to inspect the libraries: run as is
        ctl = None
    try:
        yield
    finally:
        if ctl is not None:
            ctl.restore_original_limits()


def _blas_controller():
    """threadpoolctl's view of the loaded BLAS libraries, made on first use (raises ImportError
    without threadpoolctl)."""
    if not _BLAS_CONTROLLER:
        from threadpoolctl import ThreadpoolController

        _BLAS_CONTROLLER.append(ThreadpoolController())
    return _BLAS_CONTROLLER[0]


# ---------------------------------------------------------------------- start-up
def preload(warm=None) -> float:
    """Import the libraries the count stage uses and start numba's compiled-code runtime,
    once per process; returns the seconds it took (0 after the first call).

    This is library start-up, not data work: the pipeline (:func:`probeseq.pipeline.stages.start_up`)
    runs it before its clock starts and records it as ``timings_s.startup``. It configures the
    runtime defaults first (:func:`ensure`), so the threading layer is chosen before numba is
    imported.

    Parameters
    ----------
    warm : callable, optional
        Called once, after numba's thread count is applied: the caller's own imports and first
        compiled call (this module imports no stage, so data flow one way).
    """
    ensure()
    if _PRELOADED:
        return 0.0
    t = time.perf_counter()
    import h5py  # noqa: F401
    import scipy.ndimage  # noqa: F401
    import scipy.optimize  # noqa: F401
    import scipy.signal  # noqa: F401
    import scipy.spatial  # noqa: F401
    import scipy.special  # noqa: F401

    try:
        _blas_controller()
    except Exception:  # threadpoolctl missing or unable to inspect the libraries
        pass
    ensure()  # numba is imported now: apply the thread count
    if warm is not None:
        warm()
    _PRELOADED.append(True)
    return time.perf_counter() - t


# ---------------------------------------------------------------------- background work
def background_checksum(fn, path, out: dict):
    """Thread body: ``out["hex"] = fn(path)`` (or a one-line InputError, for the caller to
    re-raise), run at the lowest scheduling priority where the system allows it, so it only takes
    CPU time the other work leaves.

    Parameters
    ----------
    fn : callable
        Checksum function of a path, returning its hex digest.
    path : str or Path
    out : dict
        Receives ``"hex"``.
    """
    try:
        os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), 19)
    except (AttributeError, OSError):
        pass
    try:
        out["hex"] = fn(path)
    except BaseException as e:  # re-raised in the calling thread
        out["hex"] = InputError(f"{path}: could not read the file for its checksum ({e})")


class Background:
    """Run ``fn(*args)`` in a forked child process (no pickling: the child inherits the data), so
    a long table write uses another core while figures are drawn. Where fork is not available, or
    in a daemonic process (a dask worker of a batch, which may not have children), it runs in
    place, at once.

    Parameters
    ----------
    fn : callable
    *args
        Its arguments.

    Notes
    -----
    The child may run compiled kernels; the fork-safe threading layer (:func:`configure`) keeps
    that safe, so the layer is settled (:func:`ensure`) before forking.
    """

    def __init__(self, fn, *args):
        import multiprocessing as mp

        self.proc = None
        if not can_fork_child():
            fn(*args)
            return
        ensure()
        self.proc = mp.get_context("fork").Process(target=_child_main, args=(fn, *args), daemon=True)
        self.proc.start()

    def join(self, what: str):
        """Wait for the child; raise a one-line InputError naming ``what`` if it failed."""
        if self.proc is None:
            return
        self.proc.join()
        if self.proc.exitcode != 0:
            raise InputError(f"writing {what} failed (exit code {self.proc.exitcode})")

    def kill(self):
        """Stop the child if it still runs (after an error in the parent)."""
        if self.proc is not None and self.proc.is_alive():
            self.proc.terminate()
            self.proc.join()


def can_fork_child() -> bool:
    """Whether this process may fork a :class:`Background` child that runs beside it (fork is
    available and this is not a daemonic process, such as a dask worker)."""
    import multiprocessing as mp

    try:
        mp.get_context("fork")
    except ValueError:
        return False
    return not mp.current_process().daemon


class FolderChild:
    """A :class:`Background` child that writes into a private ``folder`` while this process goes
    on (the work ahead of the output stage: :class:`probeseq.outputs.figurejobs.FiguresAhead`,
    :class:`probeseq.pipeline.analysis.TablesAhead`). Subclasses set :attr:`folder` and call
    :meth:`start`; nothing is started where :func:`can_fork_child` says no."""

    folder = None
    _child = None

    def start(self, fn, *args) -> None:
        """Fork the child running ``fn(*args)`` (nothing where this process cannot fork)."""
        if can_fork_child():
            self._child = Background(fn, *args)

    @property
    def started(self) -> bool:
        """Whether a child was started."""
        return self._child is not None and self._child.proc is not None

    @property
    def running(self) -> bool:
        """Whether the child is still at work."""
        return self.started and self._child.proc.is_alive()

    def wait(self) -> bool:
        """Wait for the child; whether it ended well (False when none was started)."""
        if not self.started:
            return False
        self._child.proc.join()
        return self._child.proc.exitcode == 0

    def discard(self) -> None:
        """Stop the child if it still runs and remove the folder (after an error, or once collected)."""
        import shutil

        if self._child is not None:
            self._child.kill()
        if self.folder is not None:
            shutil.rmtree(self.folder, ignore_errors=True)


def _child_main(fn, *args):
    """A :class:`Background` child: the default actions of the stop signals first. The child
    inherits the command's handlers, which turn SIGTERM/SIGHUP into an exception; when the parent
    stops it (:meth:`Background.kill`) or the terminal stops the whole group, it should end
    quietly, not print a traceback beside the command's one-line message."""
    import signal

    for name in ("SIGTERM", "SIGHUP", "SIGINT"):
        sig = getattr(signal, name, None)
        if sig is not None:
            try:
                signal.signal(sig, signal.SIG_DFL)
            except (OSError, ValueError):
                pass
    fn(*args)


def in_parts(fn, n: int, threads: int, *, parts_per_thread: int = 1, min_items: int = 1) -> None:
    """Call ``fn(lo, hi)`` on consecutive parts ``[lo, hi)`` of ``range(n)``, side by side on
    ``threads`` Python threads (for compiled kernels that release the GIL).

    Parameters
    ----------
    fn : callable
        ``fn(lo, hi)``; each part should write only its own outputs, so that results do not depend
        on the number of threads or on the order the parts run in.
    n : int
        Items to split (rods, runs, pairs).
    threads : int
        Threads to use; 1 (or a single part) calls ``fn(0, n)`` here.
    parts_per_thread : int
        Parts per thread (more parts even out items of unequal cost).
    min_items : int
        Fewest items per part.

    An exception in any part is raised here after every part has ended.

    The threads are those of one pool kept for the process (:func:`_part_pool`): the statistics of
    a large run call this a few hundred times, and starting new threads each time cost about 0.6 s
    of 4.4 s. A call from inside a part (a nested call) gets threads of its own, so no part ever
    waits for a thread its caller holds.
    """
    from concurrent.futures import ThreadPoolExecutor, wait

    threads = max(1, int(threads))
    k = max(1, min(parts_per_thread * threads, n // max(1, int(min_items))))
    if threads == 1 or k == 1:
        fn(0, n)
        return
    edges = [n * i // k for i in range(k + 1)]
    if getattr(_PART_THREAD, "inside", False):
        with ThreadPoolExecutor(max_workers=min(threads, k)) as pool:
            jobs = [pool.submit(fn, edges[i], edges[i + 1]) for i in range(k)]
    else:
        pool = _part_pool(min(threads, k))
        jobs = [pool.submit(fn, edges[i], edges[i + 1]) for i in range(k)]
        wait(jobs)
    for job in jobs:
        job.result()


#: the pool of :func:`in_parts` (made on first use), a flag set in its threads, and the lock that
#: guards the pool's making
_PART_POOL = {"pool": None, "size": 0}
_PART_THREAD = threading.local()
_PART_LOCK = threading.Lock()


def _mark_part_thread() -> None:
    _PART_THREAD.inside = True


def _part_pool(size: int):
    """The process's pool of part threads, with at least ``size`` threads."""
    from concurrent.futures import ThreadPoolExecutor

    p = _PART_POOL
    with _PART_LOCK:
        if p["pool"] is None or p["size"] < size:
            if p["pool"] is not None:
                p["pool"].shutdown(wait=False)  # a smaller one: its threads end when their parts do
            p.update(pool=ThreadPoolExecutor(max_workers=size, thread_name_prefix="probeseq-part",
                                             initializer=_mark_part_thread), size=size)
        return p["pool"]


def _forget_parts_after_fork() -> None:
    """In a forked child: the pool object came along but its threads did not, and the lock may have
    been held by a thread that is not there either; start both afresh."""
    global _PART_LOCK
    _PART_LOCK = threading.Lock()
    _PART_POOL.update(pool=None, size=0)


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_parts_after_fork)


def default_threads() -> int:
    """Worker threads of the counting pass: two when the process may run on two or more CPUs,
    else one."""
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        n = os.cpu_count() or 1
    return 2 if n >= 2 else 1
