"""Benchmark: classification, calibration and estimates over a suite of simulated runs.

Run:  python tests/benchmarks/bench_classify.py [--runs 48] [--workers 2] [--big]

The suite (seeds from 900001 on, which no test uses) crosses the four arrangements with metal
pairs (Co/Zn, Ni/Zn whose isotopes overlap at 64 Da, Fe/Cu, and a three-metal set), detection
efficiencies 0.35-0.8, lateral blur 0.05-0.15 nm, both packings (honeycomb and square). Prints:

* label accuracy on runs whose rods are resolvable (target >= 95 %);
* how often a random run gets long-block or short-repeat (target: no more than alpha allows);
* calibration: among labels given with confidence >= 0.9, the share right (target >= 90 %);
* mean run length within 15 % of the truth and composition within 0.01 (share of runs and worst);
* with --big: ``analyze`` of a 1e7-ion run end to end (target < 60 s).
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
import warnings
from concurrent.futures import ProcessPoolExecutor

import numpy as np

METAL_SETS = (("Co", "Zn"), ("Ni", "Zn"), ("Fe", "Cu"), ("Co", "Ni", "Zn"))
PATTERNS = ("random", "short-repeat", "long-block", "copied")
PACKINGS = (("honeycomb", 2.6, 0.68), ("square", 1.2, 0.70))


def suite(n):
    rng = np.random.default_rng(900001)
    cases = []
    for i in range(n):
        metals = METAL_SETS[i % len(METAL_SETS)]
        pattern = PATTERNS[(i // len(METAL_SETS)) % len(PATTERNS)]
        packing, a, rep = PACKINGS[(i // 2) % 2]
        eta = float(rng.choice([0.35, 0.5, 0.65, 0.8]))
        blur = float(rng.choice([0.05, 0.10, 0.15]))
        comp = None
        if len(metals) == 2 and i % 3 == 0:
            comp = (0.35, 0.65)
        cases.append(dict(pattern=pattern, metals=metals, composition=comp, packing=packing, a_nm=a, repeat_nm=rep,
                          eta=eta, sigma_xy_nm=blur, top_radius_nm=6.0, depth_nm=28.0, seed=900001 + i))
    return cases


def one(case):
    from probeseq.pipeline.analysis import analyze
    from probeseq.pipeline.options import AnalysisOptions
    from probeseq.simulation.simulate import simulate_run

    run = simulate_run(**case)
    t = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = analyze(run.ions, case["metals"], run.lattice, options=AnalysisOptions(seed=case["seed"]))
    el = time.perf_counter() - t
    tr = run.truth
    est = res.statistics.estimates
    reported = res.to_dict()["composition"]
    comp_err = max(abs(reported[m] - tr["composition_sites"][m]) for m in case["metals"])
    # truth: the realised chain of the true sequences, 1/(1 - P_kk) from their transition counts
    run_err = max(abs(est[f"mean_run_length_sites.{m}"] / tr["mean_run_length_realised"][m] - 1)
                  for m in case["metals"])
    return dict(case=case, truth=tr["label"], label=res.classification.label, along=res.classification.along_rod,
                conf=res.classification.confidence, resolvable=bool(res.columns.resolvable), comp_err=comp_err,
                run_err=run_err, seconds=el)


def big_run():
    from probeseq.io.readers import write_ions
    from probeseq.pipeline.analysis import analyze_file
    from probeseq.pipeline.options import AnalysisOptions
    from probeseq.simulation.simulate import simulate_run

    run = simulate_run(pattern="long-block", top_radius_nm=30, half_angle_deg=10, depth_nm=150, seed=900999)
    n = len(run.ions)
    d = tempfile.mkdtemp(prefix="probeseq-bench-")
    p = os.path.join(d, "big.h5")
    write_ions(run.ions, p)
    t = time.perf_counter()
    res = analyze_file(p, ("Co", "Zn"), run.lattice, options=AnalysisOptions())
    el = time.perf_counter() - t
    os.unlink(p)
    return n, el, res.classification.label, res.timings_s


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=48)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--big", action="store_true")
    args = ap.parse_args()
    cases = suite(args.runs)
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=args.workers) as ex:
        out = list(ex.map(one, cases))
    print(f"{len(out)} runs analysed in {time.perf_counter() - t0:.0f} s")
    print(f"{'pattern':13s} {'metals':9s} {'pack':9s} {'eta':>4s} {'blur':>5s} {'label':18s} {'conf':>5s} "
          f"{'comp err':>8s} {'run err':>7s}")
    for r in out:
        c = r["case"]
        mark = "" if r["label"] == r["truth"] else "  <-- truth " + r["truth"]
        print(f"{c['pattern']:13s} {','.join(c['metals']):9s} {c['packing']:9s} {c['eta']:4.2f} {c['sigma_xy_nm']:5.2f} "
              f"{r['label']:18s} {r['conf']:5.2f} {r['comp_err']:8.4f} {r['run_err']:7.3f}{mark}")
    res_ = [r for r in out if r["resolvable"]]
    acc = np.mean([r["label"] == r["truth"] for r in res_]) if res_ else float("nan")
    rnd = [r for r in out if r["case"]["pattern"] == "random"]
    fp = np.mean([r["along"] in ("short-repeat", "long-block") for r in rnd]) if rnd else float("nan")
    hi = [r for r in out if r["conf"] >= 0.9]
    cal = np.mean([r["label"] == r["truth"] for r in hi]) if hi else float("nan")
    comp_ok = np.mean([r["comp_err"] <= 0.01 for r in out])
    run_ok = np.mean([r["run_err"] <= 0.15 for r in out])
    checks = [
        (f"label right on resolvable runs: {100 * acc:.1f} % of {len(res_)} (target >= 95 %)", acc >= 0.95),
        (f"random runs labelled short-repeat/long-block: {100 * fp:.1f} % of {len(rnd)} (target <= alpha = 1 %; "
         f"with {len(rnd)} runs, at most 0 expected)", fp <= 0.01 + 1e-12),
        (f"labels with confidence >= 0.9 right: {100 * cal:.1f} % of {len(hi)} (target >= 90 %)", cal >= 0.9),
        (f"composition within 0.01: {100 * comp_ok:.0f} % of runs, worst {max(r['comp_err'] for r in out):.4f}",
         comp_ok == 1.0),
        (f"mean run length within 15 %: {100 * run_ok:.0f} % of runs, worst {100 * max(r['run_err'] for r in out):.1f} %",
         run_ok == 1.0),
    ]
    if args.big:
        n, el, label, tim = big_run()
        checks.append((f"analyze of a {n:.2e}-ion run end to end: {el:.1f} s, label {label} (target < 60 s); "
                       f"timings {tim}", el < 60 and n >= 10 ** 7 * 0.9))
    for text, ok in checks:
        print(("PASS  " if ok else "FAIL  ") + text)


if __name__ == "__main__":
    main()
