"""Benchmark of a batch on a local dask cluster: wall time on 1 and on 2 workers, scheduling overhead.

Run: python tests/benchmarks/bench_batch.py [--runs 8] [--keep DIR]

Needs the ``cluster`` extra (``pip install -e ".[cluster]"``). Eight small simulated runs (tip
radius 5 nm, depth 12 nm, about 15,000 ions each; the four arrangements in turn, each with its
own seed) are written as run folders into a temporary batch folder and analysed by
:func:`probeseq.study.batch.analyze_batch` on a local dask cluster (one task per run) of 1 and then
of 2 single-threaded workers (each run: 20 bootstrap resamples, 1 EM start, seed 5).

Figures printed:

1. Wall time of the batch on 1 worker (the baseline) and on 2 workers, and their ratio; target
   <= 0.6 (two cores should nearly halve it; a shared machine's other work shows up here).
2. Scheduling overhead per run on 1 worker: (wall time - sum of the runs' own times) / runs,
   the start and stop of the cluster included; target < 1 s.
3. Time per trivial task: 64 tasks that return at once, through the same
   :func:`probeseq.study.cluster.run_tasks` on 2 workers, counted from the moment the cluster is
   ready (cluster start printed apart).
4. Whether the results on 2 workers equal those on 1 (results.json without its timings, the
   tables, the HDF5 files and the range file, byte for byte).
5. The machine's own headroom, measured before the batches: the wall time of two pure-Python
   loops in two processes at once over that of one. Near 1 the two cores are free; near 2 other
   work holds them, and no batch can run faster on 2 workers than on 1 (the ratio of 1. is then
   not the batch's doing).
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from probeseq.pipeline.options import AnalysisOptions  # noqa: E402
from probeseq.simulation.simulate import simulate_run  # noqa: E402
from probeseq.study import cluster  # noqa: E402
from probeseq.study.batch import analyze_batch  # noqa: E402

RATIO_TARGET = 0.6
OVERHEAD_TARGET_S = 1.0
PATTERNS = ("random", "short-repeat", "long-block", "interspersed")
RESULT_FILES = ("tracks.csv", "runs.csv", "decoded.h5", "columns.h5", "bootstrap.h5", "ranges.toml")


def make_batch(folder: Path, n_runs: int) -> None:
    """``n_runs`` run folders of small simulated runs in ``folder``."""
    for i in range(n_runs):
        sub = folder / f"run{i:02d}"
        sub.mkdir(parents=True)
        paths = simulate_run(pattern=PATTERNS[i % len(PATTERNS)], top_radius_nm=5.0, depth_nm=12.0,
                             seed=100 + i).write(sub / "ions.h5")
        (sub / "run.toml").write_text(f'[sample]\nname = "run{i:02d}"\nsynthesis_temperature_c = {100 + 10 * i}\n\n'
                                      f'[run]\nions = "ions.h5"\nmetals = ["Co", "Zn"]\n'
                                      f'lattice = "{Path(paths["lattice"]).name}"\n', encoding="utf-8")


def timed_batch(src: Path, out: Path, workers: int):
    """Wall time, the outcomes and the moment the cluster was ready (s after the call)."""
    ready = []
    t = time.perf_counter()
    outcomes = analyze_batch(src, out, options=AnalysisOptions(n_boot=20, n_starts=1, seed=5), workers=workers,
                             started=lambda n, where: ready.append((time.perf_counter() - t, str(where))))
    return time.perf_counter() - t, outcomes, ready[0]


def _echo(x):
    return x


def trivial_tasks(n: int = 64):
    """Seconds per trivial task on 2 workers once the cluster is ready, and the cluster's start."""
    ready = []
    t = time.perf_counter()
    cluster.run_tasks(_echo, range(n), lost=lambda i, why: None, workers=2,
                      started=lambda where: ready.append(time.perf_counter()))
    end = time.perf_counter()
    return (end - ready[0]) / n, ready[0] - t


def _spin(n: int) -> float:
    t = time.perf_counter()
    s = 0
    for i in range(n):
        s += i
    return time.perf_counter() - t


def headroom(n: int = 15_000_000) -> float:
    """Wall time of two CPU-bound loops in two processes at once / that of one loop alone."""
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(2) as ex:
        ex.submit(_spin, 1000).result()  # start the processes
        t = time.perf_counter()
        ex.submit(_spin, n).result()
        one = time.perf_counter() - t
        t = time.perf_counter()
        list(ex.map(_spin, [n, n]))
        two = time.perf_counter() - t
    return two / one


def same_results(a: Path, b: Path) -> bool:
    for f in RESULT_FILES:
        if (a / f).read_bytes() != (b / f).read_bytes():
            return False
    ra, rb = (json.loads((d / "results.json").read_text()) for d in (a, b))
    ra.pop("timings_s")
    rb.pop("timings_s")
    return ra == rb


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=8)
    ap.add_argument("--keep", type=Path, default=None, help="keep the batch and its outputs in this folder")
    args = ap.parse_args()
    if not cluster.dask_available():
        print(f"dask is not installed: {cluster.CLUSTER_EXTRA}")
        return 1
    if cluster.usable_cores() < 2:
        print("note: this process may use only one core; the 2-worker figure cannot beat 1 worker")
    work = Path(tempfile.mkdtemp(prefix="bench_batch_")) if args.keep is None else args.keep
    try:
        src = work / "runs"
        t = time.perf_counter()
        make_batch(src, args.runs)
        print(f"{args.runs} simulated run folders written in {time.perf_counter() - t:.1f} s")
        room = headroom()
        print(f"machine headroom: two CPU-bound processes at once take {room:.2f} x one alone "
              "(1 = two free cores, 2 = no room for a second worker)")
        wall1, out1, (start1, where1) = timed_batch(src, work / "out1", 1)
        wall2, out2, (start2, where2) = timed_batch(src, work / "out2", 2)
        failed = [o.run for o in out1 + out2 if not o.ok]
        if failed:
            print(f"FAIL: runs failed: {failed}")
            return 1
        busy1, busy2 = sum(o.seconds for o in out1), sum(o.seconds for o in out2)
        print(f"1 worker  ({where1}): wall {wall1:7.1f} s (cluster ready after {start1:.1f} s), "
              f"sum of run times {busy1:7.1f} s  [baseline]")
        print(f"2 workers ({where2}): wall {wall2:7.1f} s (cluster ready after {start2:.1f} s), "
              f"sum of run times {busy2:7.1f} s")
        ratio = wall2 / wall1
        print(f"ratio 2 workers / 1 worker: {ratio:.2f} (target <= {RATIO_TARGET}) "
              f"{'PASS' if ratio <= RATIO_TARGET else 'FAIL'}")
        overhead = (wall1 - busy1) / args.runs
        print(f"scheduling overhead per run on 1 worker: {overhead:.2f} s = {100 * overhead / (wall1 / args.runs):.1f} "
              f"% of a run's wall time (target < {OVERHEAD_TARGET_S:g} s) "
              f"{'PASS' if overhead < OVERHEAD_TARGET_S else 'FAIL'}")
        per_task, start = trivial_tasks()
        print(f"trivial tasks on 2 workers: {1000 * per_task:.1f} ms per task once the cluster is ready "
              f"(cluster start {start:.1f} s)")
        same = all(same_results(work / "out1" / o.run, work / "out2" / o.run) for o in out1)
        print(f"results on 2 workers equal those on 1: {'yes PASS' if same else 'NO FAIL'}")
        ok = ratio <= RATIO_TARGET and overhead < OVERHEAD_TARGET_S and same
        print("overall", "PASS" if ok else "FAIL")
        return 0 if ok else 1
    finally:
        if args.keep is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
