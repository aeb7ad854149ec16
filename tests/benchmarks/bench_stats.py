"""Benchmark of the statistics stage on a large decoded run: time and peak memory.

Run from the repository root:  python tests/benchmarks/bench_stats.py [--rods 20853] [--sites 2500]
                                   [--float64] [--profile]

The decoded run is made here at run time, in memory (nothing is written): K = 2 metals, Markov
paths from :func:`probeseq.simulation.simulate.markov_sequences` (composition 0.7/0.3, persistence 0.8),
posteriors near one-hot with noise (float32, as the decoder writes them; ``--float64`` for
float64), int8 Viterbi paths, a mask with 0-60 masked sites at each rod end, transition counts and
occupancy counted from them, and rod positions on a honeycomb grid, so that
:func:`probeseq.statistics.agreement.neighbour_pairs` finds 3 neighbours per inner rod (~1.5 pairs per rod).

Figures printed:

* ``statistics_from_arrays`` wall time with the defaults (200 bootstrap resamples, 199 null
  replicates, lags -3..3); target <= 20 s for 20853 rods x 2500 sites;
* its peak memory above the inputs: the kernel's peak resident set (VmHWM, reset through
  /proc/self/clear_refs just before the call) minus the resident set before the call; target
  <= 500 MB. Where the peak cannot be reset, tracemalloc's peak of numpy allocations is printed
  instead, and says so;
* the ratio of the time to a baseline measured in the same run: one numpy pass over the
  posteriors array (``posteriors.sum(dtype=float64)``). The machine is shared, so absolute times
  vary; the ratio varies less.

The first call compiles the numba kernels (cached on disk afterwards); it is timed separately on a
small input and not included in the figures.
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from probeseq.simulation.simulate import markov_sequences
from probeseq.statistics.agreement import neighbour_pairs
from probeseq.statistics.markov import transition_counts_from_paths
from probeseq.statistics.summary import statistics_from_arrays

TARGET_S = 20.0
TARGET_MB = 500.0


def honeycomb(n_rods, spacing_nm=1.1):
    """The n_rods honeycomb points nearest the centre, bond length spacing_nm."""
    m = int(np.ceil(np.sqrt(n_rods / 2.0))) + 4
    a1, a2 = np.array([np.sqrt(3.0), 0.0]), np.array([np.sqrt(3.0) / 2, 1.5])
    ii, jj = np.meshgrid(np.arange(-m, m + 1), np.arange(-m, m + 1), indexing="ij")
    base = ii.reshape(-1, 1) * a1 + jj.reshape(-1, 1) * a2
    pts = np.concatenate([base, base + [0.0, 1.0]])
    order = np.argsort(np.hypot(*(pts - pts.mean(0)).T), kind="stable")
    return pts[order[:n_rods]] * spacing_nm


def make_run(n_rods, n_sites, seed=1, dtype=np.float32):
    """Inputs of statistics_from_arrays for a synthetic decoded run (see the module docstring)."""
    rng = np.random.default_rng(seed)
    path = markov_sequences(rng, n_rods, n_sites, np.array([0.7, 0.3]), 0.8)  # int8
    s = np.arange(n_sites)
    lo = rng.integers(0, 61, n_rods)
    hi = n_sites - rng.integers(0, 61, n_rods)
    mask = (s >= lo[:, None]) & (s < hi[:, None])
    post = np.empty((n_rods, n_sites, 2), dtype=dtype)
    occ = np.empty((n_rods, 2))
    step = max(1, (1 << 24) // n_sites)
    for r0 in range(0, n_rods, step):
        sl = slice(r0, r0 + step)
        p1 = np.where(path[sl] == 1, 1.0, 0.0)
        e = rng.random(p1.shape, dtype=np.float32) ** 6 * 0.3
        p1 = np.abs(p1 - e)  # near one-hot, pulled towards the other metal
        post[sl, :, 1] = p1
        post[sl, :, 0] = 1.0 - p1
        occ[sl] = (post[sl].astype(np.float64) * mask[sl, :, None]).sum(axis=1)
    vit = np.where(mask, path, -1).astype(np.int8)
    del path
    tr, _ = transition_counts_from_paths(vit, 2)
    return dict(per_rod_transitions=tr, per_rod_occupancy=occ, viterbi=vit, posteriors=post, mask=mask,
                rod_xy_nm=honeycomb(n_rods))


def status_mb(key):
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def reset_peak():
    """Reset VmHWM to the current resident set; False where the kernel does not allow it."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
    except OSError:
        return False
    return abs(status_mb("VmHWM") - status_mb("VmRSS")) < 1.0


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rods", type=int, default=20853)
    ap.add_argument("--sites", type=int, default=2500)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--float64", action="store_true", help="float64 posteriors instead of float32")
    ap.add_argument("--profile", action="store_true", help="print the 15 most expensive functions")
    args = ap.parse_args()
    kw = dict(metals=("Co", "Zn"), pitch_nm=0.2, random_state=3)

    t = time.perf_counter()
    small = make_run(60, 200, seed=2, dtype=np.float64 if args.float64 else np.float32)
    statistics_from_arrays(**kw, n_boot=10, n_null=9, **small)
    print(f"compile / warm-up on 60 x 200: {time.perf_counter() - t:.1f} s")

    t = time.perf_counter()
    run = make_run(args.rods, args.sites, seed=args.seed, dtype=np.float64 if args.float64 else np.float32)
    n_pairs = len(neighbour_pairs(run["rod_xy_nm"]))
    in_mb = sum(v.nbytes for v in run.values()) / 2**20
    print(f"input: {args.rods} rods x {args.sites} sites x K=2, posteriors {run['posteriors'].dtype}, "
          f"viterbi {run['viterbi'].dtype}, {n_pairs} neighbour pairs "
          f"({2 * n_pairs / args.rods:.2f} neighbours per rod), "
          f"{in_mb:.0f} MB of arrays; made in {time.perf_counter() - t:.0f} s")

    t = time.perf_counter()
    total = float(run["posteriors"].sum(dtype=np.float64))
    base_s = time.perf_counter() - t
    assert np.isfinite(total)

    rss0 = status_mb("VmRSS")
    exact_peak = reset_peak()
    if not exact_peak:
        tracemalloc.start()
    prof = None
    if args.profile:
        import cProfile

        prof = cProfile.Profile()
        prof.enable()
    t = time.perf_counter()
    st = statistics_from_arrays(**kw, **run)
    el = time.perf_counter() - t
    if prof is not None:
        prof.disable()
    if exact_peak:
        grow = status_mb("VmHWM") - rss0
        how = "VmHWM - VmRSS before the call"
    else:
        grow = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        how = "tracemalloc peak (numpy allocations only; VmHWM could not be reset)"

    rr = st.rod_to_rod
    print(f"result: composition.Zn {st.estimates['composition.Zn']:.4f}, persistence "
          f"{st.estimates['persistence']:.4f}, rod_to_rod.corr {rr.corr:.4f} (p {rr.p_value:.3f}), "
          f"{len(st.replicates['persistence'])} bootstrap replicates")
    ok_t, ok_m = el <= TARGET_S, grow <= TARGET_MB
    print(f"  statistics_from_arrays   {el:8.1f} s    target <= {TARGET_S:.0f} s     {'PASS' if ok_t else 'FAIL'}")
    print(f"  peak memory above inputs {grow:8.0f} MB   target <= {TARGET_MB:.0f} MB   {'PASS' if ok_m else 'FAIL'}"
          f"   ({how})")
    print(f"  baseline: one numpy pass over the posteriors {base_s:.3f} s; ratio {el / base_s:.0f}x")
    if prof is not None:
        import pstats

        pstats.Stats(prof).sort_stats("tottime").print_stats(15)
    print("ALL PASS" if ok_t and ok_m else "SOME FAIL")


if __name__ == "__main__":
    main()
