"""Benchmark of the ranging stage against simulated truth, and channel-assignment throughput.

Run:  python tests/benchmarks/bench_ranging.py [--quick]

Targets (issue 3):
  * metal fractions within 0.01 absolute of the truth for runs with >= 1e4 metal ions,
    including pairs whose isotopes overlap (Ni/Zn share 64; Fe2+ sits under CO+);
  * every simulated isotope line with >= 50 ions inside a range; no range without a species;
  * channel assignment of 1e8 ions at >= 50 M ions/s (chunks of 1e7 float32), printed with the
    ratio to a bare single numpy pass over the same array in the same run.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from probeseq.ranging.auto import auto_range
from probeseq.ranging.channels import assign_channels
from probeseq.ranging.isotopes import isotope_pattern
from probeseq.simulation.simulate import SimConfig, simulate_run

CASES = [  # metals, composition, seed
    (("Co", "Zn"), (0.55, 0.45), 1),
    (("Co", "Zn"), (0.20, 0.80), 2),
    (("Ni", "Zn"), (0.50, 0.50), 3),
    (("Ni", "Zn"), (0.85, 0.15), 4),
    (("Fe", "Mn"), (0.60, 0.40), 5),
    (("Cu", "Zn"), (0.30, 0.70), 6),
    (("Fe", "Ni"), (0.50, 0.50), 7),
    (("Co", "Ni", "Zn"), (0.4, 0.3, 0.3), 8),
]


def truth_part(quick: bool) -> bool:
    print("== composition and ranges vs simulated truth (simulator defaults: mrp 600, thermal tail, 3 % background)")
    print(f"{'metals':10s} {'seed':>4s} {'metal ions':>10s}  {'truth':>20s}  {'estimate +- sigma':>32s}"
          f"  {'max err':>7s} {'lines>=50 ranged':>16s} {'empty':>5s} {'unmatched':>9s}  verdict")
    ok_all = True
    cases = CASES[:3] if quick else CASES
    for metals, comp, seed in cases:
        run = simulate_run(SimConfig(metals=metals, composition=comp, seed=seed))
        im = run.ion_metal[run.ion_metal >= 0]
        truth = np.bincount(im, minlength=len(metals)) / im.size
        res = auto_range(run.ions, list(metals))
        err = np.abs(res.composition - truth).max()
        # simulated isotope lines with >= 50 ions
        sp = run.truth["species"]
        counts = np.bincount(run.ion_species[run.ion_species >= 0], minlength=len(sp))
        lows, highs = res.ranges.lows_da, res.ranges.highs_da
        n_lines = n_in = 0
        for s, n in zip(sp, counts):
            p = isotope_pattern(s["formula"], s["charge"])
            for pos, f in zip(p.mass_to_charge_da, p.fractions):
                if n * f >= 50:
                    n_lines += 1
                    k = np.searchsorted(lows, pos, side="right") - 1
                    n_in += bool(k >= 0 and pos < highs[k])
        empty = sum(1 for r in res.ranges if not r.shares or max(p for *_, p in r.shares) <= 0)
        ok = err <= 0.01 and n_in == n_lines and empty == 0 and im.size >= 1e4
        ok_all &= ok
        t = "/".join(f"{v:.4f}" for v in truth)
        e = "/".join(f"{v:.4f}+-{s:.4f}" for v, s in zip(res.composition, res.composition_sigma))
        print(f"{','.join(metals):10s} {seed:4d} {im.size:10d}  {t:>20s}  {e:>32s}  {err:7.4f} "
              f"{n_in:>7d}/{n_lines:<8d} {empty:5d} {len(res.unmatched):9d}  {'PASS' if ok else 'FAIL'}")
        if res.deconvolved:
            labels = ", ".join(f"{res.ranges[j].low_da:.2f}-{res.ranges[j].high_da:.2f} "
                               + "/".join(f"{f}{'+' * z}" for f, z, p in res.ranges[j].shares if p >= 0.01)
                               for j in res.deconvolved[:6])
            print(f"{'':16s}deconvolved: {labels}{' ...' if len(res.deconvolved) > 6 else ''}")
    print(f"target: |fraction - truth| <= 0.01, all lines >= 50 ions ranged, no empty range -> "
          f"{'PASS' if ok_all else 'FAIL'}")
    return ok_all


def throughput_part(n_total: int, chunk: int, repeats: int = 3) -> bool:
    print(f"\n== channel assignment throughput: {n_total:.0e} float32 ions in chunks of {chunk:.0e}")
    run = simulate_run(SimConfig(metals=("Ni", "Zn"), seed=11))
    res = auto_range(run.ions, ["Ni", "Zn"])
    rng = np.random.default_rng(0)
    m = rng.choice(run.ions.mass_to_charge.astype(np.float32), size=n_total)  # realistic spectrum
    print(f"ranges: {len(res.ranges)}; data {m.nbytes / 1e6:.0f} MB")

    def ranged():
        n_ranged = 0
        for s in range(0, n_total, chunk):
            ca = assign_channels(m[s:s + chunk], res.ranges, res.metals)
            n_ranged += ca.channel.size
        return n_ranged

    def bare():
        for s in range(0, n_total, chunk):
            (m[s:s + chunk] * 1000).astype(np.int32)

    # correctness on one chunk against a plain binary search
    ca = assign_channels(m[:chunk], res.ranges, res.metals)
    lo, hi = res.ranges.lows_da, res.ranges.highs_da
    x = m[:chunk].astype(np.float64)
    k = np.searchsorted(lo, x, side="right") - 1
    ref = np.where((k >= 0) & (x < hi[np.maximum(k, 0)]), k, -1)
    same = bool(np.array_equal(ref, ca.range_index))
    ranged()  # warm up (lookup table build, page faults)
    t_r, t_b = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        ranged()
        t_r.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        bare()
        t_b.append(time.perf_counter() - t0)
    tr, tb = float(np.median(t_r)), float(np.median(t_b))
    rate = n_total / tr / 1e6
    print(f"assign_channels (range index + hard channel): {tr:.2f} s = {rate:.0f} M ions/s "
          f"(median of {repeats}; runs {', '.join(f'{v:.2f}' for v in t_r)} s)")
    print(f"bare numpy pass (m*1000).astype(int32):       {tb:.2f} s = {n_total / tb / 1e6:.0f} M ions/s")
    print(f"ratio assign / bare pass time: {tr / tb:.2f}x; identical to binary search on a chunk: {same}")
    ok = rate >= 50 and same
    print(f"target: >= 50 M ions/s -> {'PASS' if ok else 'FAIL'}")
    return ok


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="three truth cases and 1e7 ions")
    a = ap.parse_args()
    ok1 = truth_part(a.quick)
    ok2 = throughput_part(10_000_000 if a.quick else 100_000_000, 10_000_000)
    print(f"\noverall: {'PASS' if ok1 and ok2 else 'FAIL'}")


if __name__ == "__main__":
    main()
