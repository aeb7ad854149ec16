"""Benchmark: the five arrangements, per-metal descriptions and the calibrated confidence.

Run:  python tests/benchmarks/bench_arrangements.py [--runs 75] [--workers 2] [--write-table]

The suite (seeds from 910001 on, which no test uses) crosses the five arrangements (random,
short-repeat, long-block, interspersed, rod-to-rod copied) with minority fractions 0.1-0.5, two
and three metals, detection efficiencies 0.35-0.8 and both packings (honeycomb and square).
Three-metal runs of the interspersed kind are half per-metal runs (one metal in long blocks, one
random, the least abundant interspersed). Prints:

* label right on resolvable runs (target >= 95 %) and per class (target >= 90 %);
* random runs labelled anything but random (target: no more than alpha allows);
* per-metal descriptions right on three-metal runs;
* the reliability table of the calibrated confidence, each run's confidence taken from a
  calibration fitted on the other half of the runs (2-fold cross-fitting), and among labels with
  confidence >= 0.9 the share right (target >= 90 %).

With ``--write-table`` the isotonic calibration (scikit-learn's ``IsotonicRegression``, the share
of bootstrap resamples agreeing with the label -> the label is right) is fitted on all runs and
written to ``probeseq/statistics/confidence_table.json``, the table the classifier reads.
"""

from __future__ import annotations

import argparse
import json
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

ARRANGEMENTS = ("random", "short-repeat", "long-block", "interspersed", "copied")
LABEL_OF = {"copied": "rod-to-rod-copied"}
MINORITY = (0.1, 0.2, 0.3, 0.4, 0.5)
PACKINGS = (("honeycomb", 2.6, 0.68), ("square", 1.2, 0.70))
ALPHA = 0.01
TABLE = Path(__file__).resolve().parents[2] / "probeseq" / "statistics" / "confidence_table.json"


def suite(n):
    rng = np.random.default_rng(910001)
    cases = []
    for i in range(n):
        arrangement = ARRANGEMENTS[i % len(ARRANGEMENTS)]
        three = (i // len(ARRANGEMENTS)) % 3 == 2
        fm = MINORITY[(i // len(ARRANGEMENTS)) % len(MINORITY)]
        packing, a, rep = PACKINGS[(i // 2) % 2]
        eta = float(rng.choice([0.35, 0.5, 0.65, 0.8]))
        if three:
            metals = ("Co", "Ni", "Zn")
            fm = min(fm, 0.3)
            comp = (0.5, 0.5 - fm, fm) if 0.5 - fm > fm else (0.4, 0.35, 0.25)
        else:
            metals = ("Co", "Zn")
            comp = (1 - fm, fm)
        case = dict(metals=metals, composition=comp, packing=packing, a_nm=a, repeat_nm=rep, eta=eta,
                    sigma_xy_nm=0.08, top_radius_nm=6.0, depth_nm=28.0, seed=910001 + i)
        if arrangement == "interspersed" and three and i % 2:
            case.update(pattern="per-metal", metal_patterns=("long-block", "random", "interspersed"))
        else:
            case.update(pattern=arrangement)
        cases.append(case)
    return cases


def hard_suite(n):
    """Runs near the limits (small, low efficiency, weak order, blur up to unresolvable rods), where
    labels are sometimes wrong: the calibration needs both kinds of outcome."""
    rng = np.random.default_rng(920001)
    cases = []
    for i in range(n):
        arrangement = ARRANGEMENTS[i % len(ARRANGEMENTS)]
        fm = float(rng.choice(MINORITY))
        packing, a, rep = PACKINGS[i % 2]
        case = dict(metals=("Co", "Zn"), composition=(1 - fm, fm), packing=packing, a_nm=a, repeat_nm=rep,
                    eta=float(rng.uniform(0.2, 0.5)), sigma_xy_nm=float(rng.uniform(0.06, 0.2)),
                    top_radius_nm=float(rng.uniform(4.5, 6.0)), depth_nm=float(rng.uniform(12.0, 20.0)),
                    seed=920001 + i, pattern=arrangement)
        if arrangement == "short-repeat":
            case["persistence"] = float(rng.uniform(0.08, 0.35))
        elif arrangement == "long-block":
            case["persistence"] = float(rng.uniform(0.8, 0.9))
        elif arrangement == "interspersed":
            case["avoidance"] = float(rng.uniform(0.2, 0.6))
        elif arrangement == "copied":
            case["copy_error"] = float(rng.uniform(0.3, 0.6))
        cases.append(case)
    return cases


def one(case):
    from probeseq.pipeline import AnalysisOptions, analyze
    from probeseq.simulation.simulate import simulate_run

    try:
        run = simulate_run(**case)
    except Exception as e:  # an arrangement no chain can meet at this composition: skipped, and said
        return dict(case=case, skipped=str(e))
    t = time.perf_counter()
    from probeseq.exceptions import InputError

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = analyze(run.ions, case["metals"], run.lattice, options=AnalysisOptions(seed=case["seed"]))
    except InputError as e:  # too little data to analyse at all: no label, so no confidence
        return dict(case=case, skipped=f"analysis refused: {e}")
    cl = res.classification
    return dict(case=case, truth=run.truth["label"], label=cl.label, along=cl.along_rod, conf=cl.confidence,
                share=cl.bootstrap_share, resolvable=bool(res.columns.resolvable),
                per_metal={m: d["class"] for m, d in cl.per_metal.items()}, per_metal_truth=run.truth["per_metal"],
                seconds=time.perf_counter() - t)


def fit_table(share, right):
    from sklearn.isotonic import IsotonicRegression

    iso = IsotonicRegression(y_min=0.0, y_max=1.0, increasing=True, out_of_bounds="clip")
    iso.fit(np.asarray(share, float), np.asarray(right, float))
    x = np.concatenate([[0.0], iso.X_thresholds_, [1.0]])
    y = np.concatenate([[iso.y_thresholds_[0]], iso.y_thresholds_, [iso.y_thresholds_[-1]]])
    keep = np.concatenate([[True], np.diff(x) > 0])  # a strictly increasing share axis
    return x[keep], y[keep]


def cross_fitted(share, right, rng):
    """Each run's calibrated confidence from a table fitted on the other half of the runs."""
    share, right = np.asarray(share, float), np.asarray(right, float)
    fold = rng.permutation(share.size) % 2
    out = np.empty(share.size)
    for k in (0, 1):
        x, y = fit_table(share[fold != k], right[fold != k])
        out[fold == k] = np.interp(share[fold == k], x, y)
    return out


def reliability(conf, right):
    edges = [0.0, 0.5, 0.7, 0.8, 0.9, 0.95, 1.0001]
    rows = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        m = (conf >= lo) & (conf < hi)
        if m.any():
            rows.append((lo, min(hi, 1.0), int(m.sum()), float(conf[m].mean()), float(right[m].mean())))
    return rows


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=75)
    ap.add_argument("--hard-runs", type=int, default=100, help="runs near the limits, for the calibration")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--write-table", action="store_true")
    args = ap.parse_args()
    cases = suite(args.runs)
    hard_cases = hard_suite(args.hard_runs)
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=args.workers) as ex:
        out = list(ex.map(one, cases + hard_cases))
    hard = [r for r in out[len(cases):] if "skipped" not in r]
    print(f"near-the-limits runs refused by the analysis: {len(out) - len(cases) - len(hard)}")
    out = out[:len(cases)]
    skipped = [r for r in out if "skipped" in r]
    out = [r for r in out if "skipped" not in r]
    print(f"{len(out)} runs analysed in {time.perf_counter() - t0:.0f} s ({len(skipped)} skipped)")
    for r in skipped:
        print(f"  skipped {r['case']['pattern']} {r['case']['composition']}: {r['skipped']}")
    print(f"{'pattern':13s} {'metals':9s} {'minority':>8s} {'pack':9s} {'eta':>4s} {'label':18s} {'share':>5s} "
          f"{'conf':>5s}")
    for r in out:
        c = r["case"]
        mark = "" if r["label"] == r["truth"] else "  <-- truth " + r["truth"]
        print(f"{c['pattern']:13s} {','.join(c['metals']):9s} {min(c['composition']):8.2f} {c['packing']:9s} "
              f"{c['eta']:4.2f} {r['label']:18s} {r['share']:5.2f} {r['conf']:5.2f}{mark}")
    res_ = [r for r in out if r["resolvable"]]
    right = np.array([r["label"] == r["truth"] for r in out], float)
    acc = np.mean([r["label"] == r["truth"] for r in res_]) if res_ else float("nan")
    per_class = {}
    for r in res_:
        per_class.setdefault(r["truth"], []).append(r["label"] == r["truth"])
    rnd = [r for r in out if r["truth"] == "random"]
    fp = np.mean([r["label"] != "random" for r in rnd]) if rnd else float("nan")
    three = [r for r in out if len(r["case"]["metals"]) == 3 and r["truth"] != "rod-to-rod-copied"]
    pm_right = np.mean([r["per_metal"] == r["per_metal_truth"] for r in three]) if three else float("nan")
    for r in three:
        if r["per_metal"] != r["per_metal_truth"]:
            print(f"  per-metal {r['case']['pattern']} {r['case']['composition']}: {r['per_metal']} "
                  f"(truth {r['per_metal_truth']})")
    hard_right = np.array([r["label"] == r["truth"] for r in hard], float)
    print(f"\nnear the limits: {len(hard)} runs, label right {100 * hard_right.mean():.0f} %")
    for r in hard:
        if r["label"] != r["truth"]:
            c = r["case"]
            print(f"  {c['pattern']:13s} minority {min(c['composition']):.2f} eta {c['eta']:.2f} "
                  f"depth {c['depth_nm']:.0f} nm -> {r['label']} (share {r['share']:.2f})")
    all_runs = out + hard
    right_all = np.array([r["label"] == r["truth"] for r in all_runs], float)
    share = np.array([r["share"] for r in all_runs])
    conf_cv = cross_fitted(share, right_all, np.random.default_rng(5))
    hi = conf_cv >= 0.9
    cal = float(right_all[hi].mean()) if hi.any() else float("nan")
    right = right_all
    out_n = len(all_runs)
    print(f"\nreliability of the calibrated confidence over all {out_n} runs (2-fold cross-fitted):")
    print(f"  {'confidence':>12s} {'runs':>5s} {'mean conf':>9s} {'right':>6s}")
    for lo, hi_, n, mc, acc_b in reliability(conf_cv, right):
        print(f"  {lo:5.2f}-{hi_:4.2f}   {n:5d} {mc:9.2f} {acc_b:6.2f}")
    worst = min(per_class.items(), key=lambda kv: np.mean(kv[1])) if per_class else ("-", [float("nan")])
    checks = [
        (f"label right on resolvable runs: {100 * acc:.1f} % of {len(res_)} (target >= 95 %)", acc >= 0.95),
        ("per class (resolvable): " + ", ".join(f"{k} {100 * np.mean(v):.0f} % of {len(v)}"
                                                for k, v in sorted(per_class.items()))
         + f"; worst {worst[0]} (target >= 90 % each)", all(np.mean(v) >= 0.9 for v in per_class.values())),
        (f"random runs labelled anything but random: {100 * fp:.1f} % of {len(rnd)} (target <= alpha = "
         f"{100 * ALPHA:g} %: with {len(rnd)} runs, at most 0 expected)", fp <= ALPHA + 1e-12),
        (f"per-metal descriptions right on three-metal runs: {100 * pm_right:.0f} % of {len(three)}", pm_right >= 0.9),
        (f"labels with calibrated confidence >= 0.9 right: {100 * cal:.1f} % of {int(hi.sum())} (target >= 90 %)",
         cal >= 0.9),
    ]
    for text, ok in checks:
        print(("PASS  " if ok else "FAIL  ") + text)
    if args.write_table:
        x, y = fit_table(share, right)
        TABLE.write_text(json.dumps({
            "about": "Isotonic calibration of the classification confidence: share of bootstrap resamples "
                     "agreeing with the label -> probability that the label is right, fitted on simulated runs "
                     "of all five arrangements (tests/benchmarks/bench_arrangements.py --write-table).",
            "share": [round(float(v), 6) for v in x], "probability": [round(float(v), 6) for v in y],
            "n_runs": out_n, "n_right": int(right.sum()), "seeds_from": [910001, 920001]}, indent=1) + "\n")
        print(f"wrote {TABLE.name}: {x.size} points from {out_n} runs")


if __name__ == "__main__":
    main()
