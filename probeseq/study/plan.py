"""Experiment planning: can the data a user expects answer the question?

Before a long acquisition, :func:`plan_experiment` simulates many small runs under the user's
conditions (metals, lattice, detection efficiency, lateral resolution) for each of the four
arrangements, analyses each with the full pipeline, and reports

* the expected confusion matrix (true arrangement x label given), and
* the smallest persistence lam that is told from random in at least ``power`` of the runs
  (default 0.8, the conventional power of a study design; common practice).

The simulated runs are small (a few hundred rods), so the figures are a guide for runs of that
size; larger runs can only do better. Each run is one task on a dask cluster (local by default,
or a running scheduler) or, without dask, in local worker processes
(:func:`probeseq.study.cluster.run_tasks`); every run has its own seed, so the plan is the same
whatever the workers.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError, ProbeseqError
from ..lattice.model import Lattice

__all__ = ['PlanResult', 'plan_experiment', 'LABELS']

#: most simulated runs per arrangement or per persistence of the scan (each is a full analysis)
MAX_RUNS_PER_CASE = 1000


#: the simulated runs' seeds are taken modulo this (numpy seeds are below 2**63)
SEED_SPACE = 2 ** 63 - 2 ** 20


#: most ions a plan may simulate over all its runs (about an hour of work on a 2-core machine)
MAX_PLAN_IONS = 3e8


LABELS = ("random", "short-repeat", "long-block", "interspersed", "rod-to-rod-copied", "undetermined")


PATTERN_LABEL = {"random": "random", "short-repeat": "short-repeat", "long-block": "long-block",
                 "copied": "rod-to-rod-copied", "interspersed": "interspersed"}


@dataclass(frozen=True)
class PlanResult:
    """Confusion matrix and detectable persistence for the planned conditions."""

    conditions: dict
    confusion: np.ndarray
    labels: tuple
    patterns: tuple
    accuracy: float
    persistences: tuple
    detection_rate: tuple
    smallest_detectable_persistence: float | None
    power: float
    n_runs: int

    def to_dict(self) -> dict:
        return {"conditions": self.conditions, "labels": list(self.labels), "patterns": list(self.patterns),
                "confusion": self.confusion.tolist(), "accuracy": self.accuracy,
                "persistence_scan": {"persistence": list(self.persistences), "share_not_random": list(self.detection_rate)},
                "smallest_detectable_persistence": self.smallest_detectable_persistence, "power": self.power,
                "n_runs": self.n_runs}


def _one(job):
    """Simulate and analyse one run; returns the label (runs in a worker process)."""
    import warnings

    from ..pipeline.analysis import analyze
    from ..pipeline.options import AnalysisOptions
    from ..simulation.simulate import simulate_run

    cfg, n_boot = job
    run = simulate_run(cfg)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            res = analyze(run.ions, cfg.metals, cfg.lattice, options=AnalysisOptions(seed=cfg.seed, n_boot=n_boot,
                                                                                     n_starts=2))
        except Exception as e:  # an unanalysable simulated run counts as undetermined
            return "undetermined", "undetermined", f"{type(e).__name__}: {e}"
    return res.classification.label, res.classification.along_rod, ""


def _run_jobs(jobs, kinds, workers, scheduler, progress, started) -> list:
    """The label of every simulated run, in the order of ``jobs``, one task per run."""
    from .cluster import run_tasks

    finished = []

    def lost(i, reason):
        kind, value = kinds[i]
        raise ProbeseqError(f"simulated run {i + 1} of {len(jobs)} ({kind} {value}) gave no result: {reason}")

    def done(i, result):
        finished.append(i)
        if progress:
            progress(len(finished), len(jobs))

    return run_tasks(_one, jobs, lost=lost, scheduler=scheduler, workers=workers, pool_default=2,
                     names=[f"plan-{kind}-{value}" for kind, value in kinds], done=done,
                     started=None if started is None else (lambda where: started(len(jobs), where)))


def plan_experiment(metals, lattice: Lattice, efficiency: float = 0.5, lateral_resolution_nm: float = 0.15,
                    composition=None, n_per_pattern: int = 4, persistences=(0.02, 0.05, 0.1, 0.2, 0.35),
                    n_per_persistence: int = 3, long_block_persistence: float = 0.9,
                    short_repeat_persistence: float = 0.5, copy_error: float = 0.05, top_radius_nm: float = 5.0,
                    depth_nm: float = 25.0, power: float = 0.8, n_boot: int = 60, seed: int = 0,
                    workers: int | None = None, scheduler: str | None = None, progress=None,
                    started=None) -> PlanResult:
    """Simulate runs under the given conditions and report what the analysis can tell apart.

    Parameters
    ----------
    metals : sequence of str
    lattice : Lattice
    efficiency : float
        Detection efficiency in (0, 1].
    lateral_resolution_nm : float, nm
        Lateral spread (standard deviation) of ion positions around their true place.
    n_per_pattern, n_per_persistence : int
        Simulated runs per arrangement and per persistence of the scan.
    workers : int, optional
        Local worker processes (ignored with a scheduler). Default: ``n_jobs`` of
        :func:`probeseq.runtime.configure` (the command line's ``--jobs``) when set, else one per
        core on a local dask cluster, or two processes without dask (one on a single core); never
        more than the cores.
    scheduler : str, optional
        Address of a running dask scheduler; default: the environment variable
        ``PROBESEQ_SCHEDULER``, else local (see :func:`probeseq.study.cluster.run_tasks`).
    progress, started : callable, optional
        ``progress(n_done, n_runs)`` as each simulated run is analysed; ``started(n_runs, where)``
        once the workers are ready (``where`` a :class:`probeseq.study.cluster.Workers`).

    Returns
    -------
    PlanResult

    Raises
    ------
    InputError
        A condition out of range, or a scheduler named without dask, unreachable or without workers.
    ProbeseqError
        A simulated run gave no result, also when tried again (its worker died, say).
    """
    from ..pipeline.options import AnalysisOptions
    from ..simulation.simulate import MAX_TOP_RADIUS_NM, SimConfig
    from ..utils.validate import check_number, check_seed

    if isinstance(metals, str):
        raise InputError(f"--metals must be a list of element symbols, got {metals!r:.60}")
    metals = tuple(metals)
    if len(metals) < 2:
        raise InputError(f"--metals needs at least two metals, got {list(metals)}")
    if not isinstance(lattice, Lattice):
        raise InputError(f"lattice must be a probeseq Lattice, got {type(lattice).__name__}")
    check_number(efficiency, "--detection-efficiency", 0, 1, lo_open=True)
    check_number(lateral_resolution_nm, "--lateral-blur (nm)", 0, lattice.nearest_rod_distance_nm,
                 hi_open=True)
    check_number(n_per_pattern, "--runs-per-pattern", 1, MAX_RUNS_PER_CASE, integer=True)
    check_number(n_per_persistence, "--runs-per-persistence", 1, MAX_RUNS_PER_CASE, integer=True)
    check_number(power, "power", 0, 1, lo_open=True)
    check_number(top_radius_nm, "--tip-radius (nm)", 0, MAX_TOP_RADIUS_NM, lo_open=True)
    check_number(depth_nm, "--depth (nm)", 0, lo_open=True)
    check_seed(seed)
    if not isinstance(seed, (int, np.integer)):
        raise InputError(f"--seed must be an integer from 0 to 2**63 - 1, got {seed!r:.40}")
    for name, lam in (("long_block_persistence", long_block_persistence),
                      ("short_repeat_persistence", short_repeat_persistence)):
        check_number(lam, name, 0, 1, hi_open=True)
    if workers is not None:
        check_number(workers, "workers", 1, integer=True)
    AnalysisOptions(seed=int(seed), n_boot=n_boot, n_starts=2)  # the analysis settings, checked before any work
    try:
        lams = tuple(sorted(float(v) for v in persistences))
    except (TypeError, ValueError):
        raise InputError(f"persistences must be numbers in (0, 1), got {persistences!r:.60}") from None
    if not lams or any(not 0 < v < 1 for v in lams):
        raise InputError(f"persistences must be numbers in (0, 1), got {list(lams)}")
    base = dict(metals=metals, composition=composition, eta=efficiency, sigma_xy_nm=lateral_resolution_nm,
                lattice=lattice, top_radius_nm=top_radius_nm, depth_nm=depth_nm, copy_error=copy_error)
    jobs, kinds = [], []
    s = (int(seed) * 100_003) % SEED_SPACE  # seeds of the simulated runs stay below 2**63
    patterns = ("random", "short-repeat", "long-block", "copied", "interspersed")
    for pat in patterns:
        lam = {"short-repeat": short_repeat_persistence, "long-block": long_block_persistence}.get(pat)
        for i in range(n_per_pattern):
            s += 1
            jobs.append((SimConfig(pattern=pat, persistence=lam, seed=s, **base), n_boot))
            kinds.append(("pattern", pat))
    one = jobs[0][0].expected_size()["ions"]
    total = one * (len(patterns) * n_per_pattern + len(lams) * n_per_persistence)
    if total > MAX_PLAN_IONS:
        raise InputError(f"the plan would simulate about {total:.2g} ions ({one:.2g} per run), more than its limit "
                         f"of {MAX_PLAN_IONS:.0e}; reduce --tip-radius, --depth or the runs per case")
    for lam in lams:
        for i in range(n_per_persistence):
            s += 1
            jobs.append((SimConfig(pattern="short-repeat", persistence=lam, seed=s, **base), n_boot))
            kinds.append(("scan", lam))
    results = _run_jobs(jobs, kinds, workers, scheduler, progress, started)
    conf = np.zeros((len(patterns), len(LABELS)), dtype=int)
    scan = {lam: [] for lam in lams}
    for (kind, val), (label, along, _) in zip(kinds, results):
        if kind == "pattern":
            conf[patterns.index(val), LABELS.index(label if label in LABELS else "undetermined")] += 1
        else:
            scan[val].append(along not in ("random", "undetermined"))
    right = sum(conf[i, LABELS.index(PATTERN_LABEL[p])] for i, p in enumerate(patterns))
    rates = tuple(float(np.mean(scan[lam])) for lam in lams)
    detect = next((lam for lam, r in zip(lams, rates) if r >= power), None)
    cond = {"metals": list(metals), "efficiency": efficiency, "lateral_resolution_nm": lateral_resolution_nm,
            "lattice": lattice.to_dict(), "top_radius_nm": top_radius_nm, "depth_nm": depth_nm,
            "long_block_persistence": long_block_persistence, "short_repeat_persistence": short_repeat_persistence,
            "copy_error": copy_error, "seed": seed}
    return PlanResult(conditions=cond, confusion=conf, labels=LABELS, patterns=patterns,
                      accuracy=float(right / conf.sum()), persistences=lams, detection_rate=rates,
                      smallest_detectable_persistence=detect, power=power, n_runs=len(jobs))
