"""Compile the analysis's kernels once per machine, before the first analysis (``probeseq prepare``).

The compiled kernels (numba, ``cache=True``) are built on their first use and kept on disk beside
the package's modules (or in numba's cache folder when those cannot be written); every later
process loads them in milliseconds. Built on first use, they made the first analysis after an
install take about a minute, most of it compiling: the parallel decoding kernels (fit and decode,
about 12 s together) and the geometry and counting kernels of the count stage (about 25 s). The
decoding kernels are built once for each number of metals (their loops over the metals are
unrolled), so a first run with 3 metals after runs with 2 compiles again.

:func:`compile_kernels` fills the cache for every kernel an analysis uses, for each number of
metals asked, without writing any file of the user's: everything it writes goes to a temporary
folder that is removed at the end. It runs these parts (:func:`kernel_parts`):

* ``analysis``: a small run simulated in memory (:func:`probeseq.simulation.simulate.simulate_run`)
  with the first number of metals, written as a float32 HDF5 ion file (like the bundled sample)
  and analysed as ``probeseq analyze`` analyses one (:func:`probeseq.pipeline.analysis.analyze_file`,
  streamed, then :func:`probeseq.pipeline.analysis.write_analysis` without figures: the few
  kernels they call take the types the analysis has built them for);
* ``decoding``: for each further number of metals, the decoding stage
  (:func:`probeseq.pipeline.stages.decode_stage`) on counts drawn from the rod model, with soft
  evidence as the count stage makes it (:func:`drawn_columns`): the only kernels whose compiled
  form depends on the number of metals are those of :mod:`probeseq.decoding.rodchain`, and they
  take their arrays in one form whatever the caller holds. The first of these parts also runs the
  statistics, whose kernels are then found compiled by the ``analysis`` part;
* ``text``: the count stage of the same simulated run written as a text file, whose float64
  positions the counting kernels are built for separately (float64 HDF5 files use them too).

The parts run in worker processes (``jobs``; default: the command line's ``--jobs``, else one per
core, at most one per part), taken in order as processes come free: with two, one runs the whole
analysis while the other decodes for the further numbers of metals, and the text file's count
stage goes to the first free. Measured on a shared two-core machine (``bench_firstrun.py``):
43-52 s, then 8-11 s for the first analysis of the bundled sample, as for a later one (53-55 s
without this step). A second call finds every kernel cached and takes a few seconds. What a run
compiles anyway is what other options need: with ``--drawn-metals`` the decode kernel for the
counts and the counting pass without soft evidence (about 6 s, once per number of metals).
"""

from __future__ import annotations

import os
import tempfile
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from .. import runtime
from ..exceptions import InputError

__all__ = ['DEFAULT_METAL_COUNTS', 'MAX_METAL_COUNT', 'KernelPart', 'PartResult', 'kernel_parts', 'compile_kernels']

#: numbers of metals compiled for by default
DEFAULT_METAL_COUNTS = (2, 3, 4)

#: metal symbols of the simulated and drawn runs, in channel order (the first two as in the sample)
_SYMBOLS = ("Co", "Zn", "Ni", "Cu", "Fe", "Mn")

#: largest number of metals a run can be prepared for
MAX_METAL_COUNT = len(_SYMBOLS)

#: the simulated run: small (about 15,000 ions, ranged and registered like a real one)
_SIMULATION = dict(pattern="long-block", top_radius_nm=5.0, depth_nm=12.0, seed=7)


@dataclass(frozen=True)
class KernelPart:
    """One part of :func:`compile_kernels`, run in one process.

    Attributes
    ----------
    kind : {"analysis", "decoding", "text"}
        ``analysis``: every stage of a simulated run read from an HDF5 file; ``decoding``: the
        decoding stage; ``text``: the count stage of a run read from a text file.
    n_metals : int
        Number of metals of the run.
    statistics : bool
        With ``decoding``: the statistics of the decoded rods too (their kernels do not depend on
        the number of metals: compiled here, while the ``analysis`` part is still counting, they
        are found in the cache when it gets to them).
    """

    kind: str
    n_metals: int
    statistics: bool = False

    @property
    def name(self) -> str:
        """What the part compiles, in words."""
        if self.kind == "analysis":
            return f"every stage of an analysis, {self.n_metals} metals"
        if self.kind == "decoding":
            return f"decoding{' and statistics' if self.statistics else ''}, {self.n_metals} metals"
        return "count stage of a text ion file (float64 positions)"


@dataclass(frozen=True)
class PartResult:
    """What one part did.

    Attributes
    ----------
    part : KernelPart
    seconds : float
        Wall time of the part in its process, s.
    compiled : int
        Kernels (one per argument types) compiled; the others it used were loaded from the cache.
    """

    part: KernelPart
    seconds: float
    compiled: int


def _check_counts(n_metals) -> tuple:
    """The numbers of metals as a tuple of distinct ints from 2 to :data:`MAX_METAL_COUNT`, in order."""
    try:
        values = [n_metals] if isinstance(n_metals, (int, np.integer)) else list(n_metals)
    except TypeError:
        raise InputError(f"--metal-counts (n_metals) must be whole numbers, got {n_metals!r:.40}") from None
    out = []
    for v in values:
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or not 2 <= v <= MAX_METAL_COUNT:
            raise InputError(f"--metal-counts (n_metals) must be whole numbers from 2 to {MAX_METAL_COUNT}, "
                             f"got {v!r:.40}")
        if int(v) not in out:
            out.append(int(v))
    if not out:
        raise InputError("--metal-counts (n_metals): give at least one number of metals")
    return tuple(out)


def kernel_parts(n_metals=DEFAULT_METAL_COUNTS) -> tuple:
    """The parts :func:`compile_kernels` runs for these numbers of metals, longest first.

    Parameters
    ----------
    n_metals : int or sequence of int
        Numbers of metals (2 to :data:`MAX_METAL_COUNT`).

    Returns
    -------
    tuple of KernelPart
        The whole analysis with the first number, the decoding with each further one (the first
        of them with the statistics), and the count stage of a text file.

    Raises
    ------
    InputError
        A number of metals out of range, or none.
    """
    counts = _check_counts(n_metals)
    further = tuple(KernelPart("decoding", k, statistics=i == 0) for i, k in enumerate(counts[1:]))
    return (KernelPart("analysis", counts[0]),) + further + (KernelPart("text", counts[0]),)


def compile_kernels(n_metals=DEFAULT_METAL_COUNTS, jobs: Optional[int] = None,
                    progress: Optional[Callable[[PartResult], None]] = None,
                    started: Optional[Callable[[tuple, int], None]] = None) -> list:
    """Compile (or find in the cache) every kernel an analysis uses, for each number of metals.

    Parameters
    ----------
    n_metals : int or sequence of int
        Numbers of metals to compile the decoding for (2 to :data:`MAX_METAL_COUNT`).
    jobs : int, optional
        Worker processes (1: every part in this process, one after the other). Default: ``n_jobs``
        of :func:`probeseq.runtime.configure` (the command line's ``--jobs``) when set, else one
        per core; never more than there are parts.
    progress : callable, optional
        Called with each :class:`PartResult` as its part finishes.
    started : callable, optional
        Called as ``started(parts, n_processes)`` once the arguments are checked, before any work.

    Returns
    -------
    list of PartResult
        One per part of :func:`kernel_parts`, in that order.

    Raises
    ------
    InputError
        A bad number of metals or of jobs.
    """
    parts = kernel_parts(n_metals)
    if jobs is not None and (isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer))
                             or not 1 <= jobs <= runtime.MAX_JOBS):
        raise InputError(f"--jobs (jobs) must be a whole number from 1 to {runtime.MAX_JOBS}, got {jobs!r:.40}")
    n = min(int(runtime.worker_count(jobs, _cores())), len(parts))
    runtime.ensure()  # the fork-safe threading layer, before any worker starts
    if started:
        started(parts, n)
    with tempfile.TemporaryDirectory(prefix="probeseq-prepare-") as tmp:
        lock = str(Path(tmp) / "cache.lock")
        if n == 1:
            results = []
            for p in parts:
                results.append(run_part(p, lock))
                if progress:
                    progress(results[-1])
            return results
        return _in_workers(parts, n, lock, progress)


def _cores() -> int:
    """The CPUs this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _in_workers(parts, n: int, lock: str, progress) -> list:
    """Run the parts in ``n`` worker processes, in order as workers come free (the first, the
    longest, starts at once); returns the results in the order of ``parts``."""
    from concurrent.futures import ProcessPoolExecutor, as_completed

    results = {}
    with ProcessPoolExecutor(max_workers=n, initializer=runtime.configure,
                             initargs=(runtime.worker_jobs(n),)) as pool:
        futures = {pool.submit(run_part, p, lock): i for i, p in enumerate(parts)}
        for f in as_completed(futures):
            i = futures[f]
            results[i] = f.result()
            if progress:
                progress(results[i])
    return [results[i] for i in range(len(parts))]


def run_part(part: KernelPart, lock: Optional[str] = None) -> PartResult:
    """Run one part in this process; returns its wall time and the kernels it compiled.

    Parameters
    ----------
    part : KernelPart
    lock : str, optional
        A lock file shared by the processes of one :func:`compile_kernels`: numba's cache index of
        a kernel is read, extended and written back when a compiled form is saved, and two
        processes saving forms of the same kernel at once could lose one; the lock makes the saves
        one at a time.

    Returns
    -------
    PartResult
    """
    t0 = time.perf_counter()
    runtime.ensure()
    with _counting_compiles() as compiled, _cache_saves_locked(lock), warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the simulated run's notes are of no interest here
        with tempfile.TemporaryDirectory(prefix="probeseq-prepare-part-") as tmp:
            _PARTS[part.kind](part, Path(tmp))
    return PartResult(part=part, seconds=time.perf_counter() - t0, compiled=len(compiled))


# ---------------------------------------------------------------------- the parts
def _simulated(n_metals: int):
    from ..simulation.simulate import simulate_run

    return simulate_run(metals=_SYMBOLS[:n_metals], **_SIMULATION)


def _analysis(part: KernelPart, tmp: Path):
    """Every stage of a small simulated run read from a float32 HDF5 file, and its tables written."""
    from ..io.readers import write_ions
    from .analysis import analyze_file, write_analysis
    from .options import AnalysisOptions

    run = _simulated(part.n_metals)
    path = write_ions(run.ions, tmp / "ions.h5", dtype=np.float32)
    res = analyze_file(path, run.config.metals, run.lattice, options=AnalysisOptions())
    write_analysis(res, tmp / "out", report=False)
    _copy_passes(res.columns, res.decoded)


def _copy_passes(columns, decoded):
    """The copy-aware decoding's passes, as the analysis calls them when neighbouring rods agree
    (from the counts; run here whether or not they do)."""
    from dataclasses import replace

    from ..decoding.copies import decode_copies

    decode_copies(replace(columns, evidence=None), decoded.params, None, max_iter=2)


def _text(part: KernelPart, tmp: Path):
    """The count stage of the same run from a text file (float64 positions)."""
    from ..io.readers import write_ions
    from .options import AnalysisOptions
    from .stages import count_file

    run = _simulated(part.n_metals)
    path = write_ions(run.ions, tmp / "ions.csv")
    count_file(path, run.config.metals, run.lattice, options=AnalysisOptions())


def _decoding(part: KernelPart, tmp: Path):
    """The decoding stage (and the statistics) on counts and soft evidence drawn from the rod model."""
    from .options import AnalysisOptions
    from .stages import decode_stage

    cols, opts = drawn_columns(part.n_metals), AnalysisOptions()
    dec, _ = decode_stage(cols, opts)
    _copy_passes(cols, dec)
    if part.statistics:
        from ..statistics.summary import compute_statistics

        compute_statistics(dec, cols, n_boot=opts.n_boot, random_state=opts.seed)


_PARTS = {"analysis": _analysis, "decoding": _decoding, "text": _text}


def drawn_columns(n_metals: int, n_rods: int = 30, n_sites: int = 160, seed: int = 0):
    """Counts and soft evidence of ``n_rods`` rods drawn from the rod model, as the count stage
    gives them (float32 whole counts, float32 evidence in steps of 1/16, a read-only mask).

    Parameters
    ----------
    n_metals : int
        Metals (channels), named from ``Co, Zn, Ni, Cu, Fe, Mn`` in that order.
    n_rods, n_sites : int
        Size of the count array.
    seed : int
        Random seed.

    Returns
    -------
    RodColumns
        Rods on a square grid 2.6 nm apart, site pitch 0.227 nm, every metal 0.9 visible.
    """
    from ..lattice.rodcolumns import RodColumns
    from ..simulation.simulate import markov_sequences

    rng = np.random.default_rng(seed)
    k = int(n_metals)
    metals = _SYMBOLS[:k]
    seq = markov_sequences(rng, n_rods, n_sites, np.full(k, 1.0 / k), 0.8)
    own = (seq[..., None] == np.arange(k)) & (rng.random((n_rods, n_sites, 1)) < 0.5)
    counts = (own + rng.poisson(0.05, (n_rods, n_sites, k))).astype(np.float32)
    evidence = (counts * np.float32(0.75) + rng.integers(0, 3, counts.shape) / np.float32(16)).astype(np.float32)
    mask = np.ones((n_rods, n_sites), bool)
    mask[:, : n_sites // 10] = rng.random((n_rods, 1)) < 0.5  # some rods start deeper
    mask.flags.writeable = False
    side = int(np.ceil(np.sqrt(n_rods)))
    xy = 2.6 * np.stack([np.arange(n_rods) % side, np.arange(n_rods) // side], axis=1).astype(float)
    i, j = np.triu_indices(n_rods, 1)
    near = np.abs(np.hypot(*(xy[i] - xy[j]).T) - 2.6) < 1e-6
    share = {m: 0.9 for m in metals}
    params = {"visibility": share, "evidence": {"capture": share, "own_scale": {m: 0.75 for m in metals}}}
    return RodColumns(counts=counts, mask=mask, metals=metals, rod_xy_nm=xy, tilt=np.zeros(2), z_ref_nm=0.0,
                      site_z_nm=0.227 * np.arange(n_sites), pitch_nm=0.227,
                      neighbours=np.stack([i[near], j[near]], axis=1), params=params, evidence=evidence)


# ---------------------------------------------------------------------- numba's compiles and cache saves
@contextmanager
def _counting_compiles():
    """Collect the kernels of this package compiled inside the block (numba's compile events fire
    only when a kernel is compiled, not when it is loaded from the cache)."""
    from numba.core import event

    compiled = []

    class _Listener(event.Listener):
        depth = 0

        def on_start(self, ev):
            self.depth += 1

        def on_end(self, ev):
            self.depth -= 1
            fn = getattr(ev.data.get("dispatcher"), "py_func", None)
            if self.depth == 0 and fn is not None and fn.__module__.startswith(__package__.split(".")[0] + "."):
                compiled.append(f"{fn.__module__}.{fn.__qualname__}")

    listener = _Listener()
    event.register("numba:compile", listener)
    try:
        yield compiled
    finally:
        event.unregister("numba:compile", listener)


@contextmanager
def _cache_saves_locked(lock: Optional[str]):
    """Hold the file lock ``lock`` around each save of numba's cache (POSIX; elsewhere unlocked)."""
    try:
        import fcntl
        from numba.core.caching import IndexDataCacheFile
    except ImportError:  # no POSIX locks, or another numba layout: saves as numba makes them
        yield
        return
    if lock is None or not hasattr(IndexDataCacheFile, "save"):
        yield
        return
    save = IndexDataCacheFile.save

    def locked_save(self, key, data):
        with open(lock, "a") as f:
            fcntl.flock(f, fcntl.LOCK_EX)
            try:
                return save(self, key, data)
            finally:
                fcntl.flock(f, fcntl.LOCK_UN)

    IndexDataCacheFile.save = locked_save
    try:
        yield
    finally:
        IndexDataCacheFile.save = save
