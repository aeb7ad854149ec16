"""Experiment planning: can the data a user expects answer the question?

Before a long acquisition, :func:`plan_experiment` simulates many small runs under the user's
conditions (metals, lattice, detection efficiency, lateral resolution) for each of the four
arrangements, analyses each with the full pipeline, and reports

* the expected confusion matrix (true arrangement x label given), and
* the smallest persistence lam that is told from random in at least ``power`` of the runs
  (default 0.8, the conventional power of a study design; common practice).

The simulated runs are small (a few hundred rods), so the figures are a guide for runs of that
size; larger runs can only do better.
"""

from __future__ import annotations

import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass

import numpy as np

from .exceptions import InputError
from .lattice import Lattice

__all__ = ["PlanResult", "plan_experiment", "LABELS"]

LABELS = ("random", "short-repeat", "long-block", "rod-to-rod-copied", "undetermined")
PATTERN_LABEL = {"random": "random", "short-repeat": "short-repeat", "long-block": "long-block",
                 "copied": "rod-to-rod-copied"}


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

    from .pipeline import AnalysisOptions, analyze
    from .simulate import simulate_run

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


def plan_experiment(metals, lattice: Lattice, efficiency: float = 0.5, lateral_resolution_nm: float = 0.15,
                    composition=None, n_per_pattern: int = 4, persistences=(0.02, 0.05, 0.1, 0.2, 0.35),
                    n_per_persistence: int = 3, long_block_persistence: float = 0.9,
                    short_repeat_persistence: float = 0.5, copy_error: float = 0.05, top_radius_nm: float = 5.0,
                    depth_nm: float = 25.0, power: float = 0.8, n_boot: int = 60, seed: int = 0,
                    workers: int | None = None, progress=None) -> PlanResult:
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
        Processes (default: all cores, at most 2 on this project's reference machine).

    Returns
    -------
    PlanResult
    """
    from .simulate import SimConfig

    metals = tuple(metals)
    if len(metals) < 2:
        raise InputError(f"--metals needs at least two metals, got {list(metals)}")
    if not 0 < efficiency <= 1:
        raise InputError(f"--efficiency must be in (0, 1], got {efficiency}")
    if not 0 <= lateral_resolution_nm < lattice.nearest_rod_distance_nm:
        raise InputError(f"--lateral-resolution must be in [0, {lattice.nearest_rod_distance_nm:.3g}) nm "
                         f"(the rod spacing), got {lateral_resolution_nm}")
    if n_per_pattern < 1 or n_per_persistence < 1:
        raise InputError("--runs-per-pattern and --runs-per-persistence must be >= 1")
    lams = tuple(sorted(float(v) for v in persistences))
    if any(not 0 < v < 1 for v in lams):
        raise InputError(f"persistences must be in (0, 1), got {list(lams)}")
    base = dict(metals=metals, composition=composition, eta=efficiency, sigma_xy_nm=lateral_resolution_nm,
                lattice=lattice, top_radius_nm=top_radius_nm, depth_nm=depth_nm, copy_error=copy_error)
    jobs, kinds = [], []
    s = int(seed) * 100_003
    patterns = ("random", "short-repeat", "long-block", "copied")
    for pat in patterns:
        lam = {"short-repeat": short_repeat_persistence, "long-block": long_block_persistence}.get(pat)
        for i in range(n_per_pattern):
            s += 1
            jobs.append((SimConfig(pattern=pat, persistence=lam, seed=s, **base), n_boot))
            kinds.append(("pattern", pat))
    for lam in lams:
        for i in range(n_per_persistence):
            s += 1
            jobs.append((SimConfig(pattern="short-repeat", persistence=lam, seed=s, **base), n_boot))
            kinds.append(("scan", lam))
    n_workers = workers or min(2, os.cpu_count() or 1)
    results = []
    if n_workers > 1:
        with ProcessPoolExecutor(max_workers=n_workers) as ex:
            for i, r in enumerate(ex.map(_one, jobs)):
                results.append(r)
                if progress:
                    progress(i + 1, len(jobs))
    else:
        for i, j in enumerate(jobs):
            results.append(_one(j))
            if progress:
                progress(i + 1, len(jobs))
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
