"""Benchmark: site accuracy of the tool against the oracle, the information limit of the data.

Run:  python tests/benchmarks/bench_oracle.py [--runs 40] [--workers 2]
      python tests/benchmarks/bench_oracle.py --crowded   (two crowded lattices, with the bound on
      what a model of crosstalk between neighbouring rods could gain)

The oracle (``tests/benchmarks/oracle.py``) decodes the sites of a simulated run given the true
ion-to-site assignment and the true generative model (the peak shapes of every metal's species
and isotopes, the transition matrix, and for copied rods the master sequence with its copy
error): no analysis of the ion file can be right more often, on average, than its argmax
posterior. The tool is ``probeseq.pipeline.analyze`` with the benchmark's options.

The suite (seeds from 950001 on, which no test uses) cycles through six arrangements (random,
short-repeat, long-block, interspersed, copied, and per-metal with three metals), both packings
(honeycomb a = 2.6 nm, repeat 0.68 nm; square a = 1.2 nm, repeat 0.70 nm) and four metal sets
(two of them three-metal; two with Mg, whose lines share ranges with the carbon-rich linker
fragments C+, C2+ and CH+), with eta drawn in 0.35-0.8, a lateral blur of 0.08-0.2 nm and a
composition drawn per run; a needle of top radius 7 nm and depth 24 nm keeps a run a few seconds.

Sites are matched as the agreed check does: each output rod to the true rod whose axis is
nearest at the rod's mean depth (one to one, within half the nearest rod distance), then each
decoded site to the nearest inside site of that rod by depth (within half a pitch, one to one).
Sites the tool does not decode are left out of both accuracies; the oracle on all inside sites is
printed beside. Printed per run: arrangement, metals, eta (true / the tool's), oracle accuracy
(all inside sites / matched sites), tool accuracy, ratio tool / oracle, composition error; then
per arrangement the mean and least ratio, and the targets: ratio >= 0.97 on every arrangement
(goal 0.99); the tool's detection efficiency within 0.03 of the truth and its composition (the
``composition`` of ``results.json``, from the mass spectrum) within 0.01 of the true site
fractions, each printed as the share of runs meeting it (target: every run). Beside the
composition error (``d_comp``), two floors: ``det.c``, the composition of the metal atoms that
were detected (what counting every ion right gives; the sites whose atom was not detected make
the rest, and no analysis can see those in a random arrangement), and ``or.comp``, the oracle's
posteriors summed over the inside sites (it is told the composition the chain was drawn from, so
it fills the undetected sites with the true fractions).

Beside it, with no target, the data limit (``oracle.data_limit_posteriors``): the decode that knows
the true model of every kind of ion (own ions' mass, lateral and axial spread; the other ions'
mass density, spread evenly) and the true lattice, but not which ion is which. It is what an
analysis of the ion file can reach at best; where a light metal's lines sit under fragment lines it
is below the oracle (which never counts a fragment as evidence). Printed per run (``data``,
``t/data``) and per arrangement.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
import traceback
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

ARRANGEMENTS = ("random", "short-repeat", "long-block", "interspersed", "copied", "per-metal")
PACKINGS = (("honeycomb", 2.6, 0.68), ("square", 1.2, 0.70))
#: metal sets (metals, linker fragment set); Mg lines share ranges with carbon-rich fragments
METAL_SETS = ((("Co", "Zn"), "default"), (("Mg", "Zn"), "carbon-rich"), (("Co", "Ni", "Zn"), "default"),
              (("Mg", "Co", "Zn"), "carbon-rich"))
THREE_METAL_SETS = tuple(s for s in METAL_SETS if len(s[0]) == 3)
#: arrangements of single metals for per-metal runs (tried in order until the chain exists)
PER_METAL_CHOICES = (("long-block", "random", "interspersed"), ("short-repeat", "long-block", "random"),
                     ("interspersed", "short-repeat", "long-block"), ("random", "interspersed", "short-repeat"))
FIRST_SEED = 950001
#: crowded lattices (``--crowded``): rods closer than the suite's, where crosstalk between neighbours
#: costs more; each is printed with the bound on what a model of that crosstalk could gain
CROWDED = (dict(pattern="short-repeat", metals=("Co", "Ni", "Zn"), packing="square", a_nm=1.0, repeat_nm=0.70,
                top_radius_nm=7.0, depth_nm=24.0, eta=0.5, sigma_xy_nm=0.2, seed=5),
           dict(pattern="random", metals=("Co", "Ni", "Zn"), packing="honeycomb", a_nm=1.5, repeat_nm=0.68,
                top_radius_nm=7.0, depth_nm=24.0, eta=0.6, sigma_xy_nm=0.2, seed=6))
RATIO_TARGET, RATIO_GOAL = 0.97, 0.99
ETA_TOL, COMPOSITION_TOL = 0.03, 0.01


def _composition(rng, k):
    """A composition of k metals with every fraction at least 0.15 (two metals: 0.3-0.7)."""
    if k == 2:
        a = float(rng.uniform(0.3, 0.7))
        return (a, 1.0 - a)
    while True:
        f = rng.dirichlet(np.full(k, 4.0))
        if f.min() >= 0.15:
            return tuple(float(x) for x in f)


def _per_metal_chain(kw, q, rng):
    """Give a per-metal case metal patterns (the choices in turn from ``q``) that a chain can meet at
    its composition; redraw the composition (from ``rng``) until one can."""
    from probeseq.exceptions import InputError
    from probeseq.simulation.simulate import SimConfig

    for _ in range(200):
        for j in range(len(PER_METAL_CHOICES)):
            kw["metal_patterns"] = PER_METAL_CHOICES[(q + j) % len(PER_METAL_CHOICES)]
            try:
                SimConfig(**kw).transmat  # the chain is built (and may be refused) here
                return
            except InputError:
                continue
        kw["composition"] = _composition(rng, len(kw["metals"]))
    raise RuntimeError(f"no per-metal chain found for {kw['metals']}")


def suite(n):
    """The benchmark's run configurations (keyword arguments of ``simulate_run``), one per run."""
    rng = np.random.default_rng(FIRST_SEED)
    cases = []
    for i in range(n):
        arrangement = ARRANGEMENTS[i % len(ARRANGEMENTS)]
        q = i // len(ARRANGEMENTS)
        packing, a, rep = PACKINGS[q % 2]
        if arrangement == "per-metal":
            metals, frags = THREE_METAL_SETS[q % len(THREE_METAL_SETS)]
        else:
            metals, frags = METAL_SETS[(i + q) % len(METAL_SETS)]
        kw = dict(pattern=arrangement, metals=metals, fragments=frags, packing=packing, a_nm=a, repeat_nm=rep,
                  top_radius_nm=7.0, depth_nm=24.0, eta=float(rng.uniform(0.35, 0.8)),
                  sigma_xy_nm=float(rng.uniform(0.08, 0.2)), composition=_composition(rng, len(metals)),
                  seed=FIRST_SEED + i)
        if arrangement == "copied":
            kw["copy_error"] = float(rng.uniform(0.02, 0.10))
        if arrangement == "per-metal":
            _per_metal_chain(kw, q, np.random.default_rng(kw["seed"]))
        cases.append(kw)
    return cases


def match_sites(table, truth, metals):
    """Match the tool's decoded sites to the true sites.

    Parameters
    ----------
    table : dict of 1-D arrays
        :func:`probeseq.outputs.results.tracks_table` (``rod``, ``rod_x_nm``, ``rod_y_nm``,
        ``z_nm`` in nm, ``state`` metal symbols).
    truth : dict
        The run's truth (``rods[]`` with ``x0, y0`` in nm, ``dxdz, dydz``, ``z_nm`` and ``seq`` of
        the inside sites; ``d_nn_nm``, ``pitch_nm``, ``distortion.scale``).
    metals : sequence of str
        The run's metals (the truth's state order).

    Returns
    -------
    rod, k, state : (n_matched,) ndarray of int
        The true rod, the index of the site among that rod's inside sites, and the tool's state
        (metal index) of every matched site.
    """
    rods = truth["rods"]
    x0 = np.array([r["x0"] for r in rods])
    y0 = np.array([r["y0"] for r in rods])
    dx = np.array([r["dxdz"] for r in rods])
    dy = np.array([r["dydz"] for r in rods])
    tol = 0.5 * truth["d_nn_nm"] * truth["distortion"]["scale"]
    half = 0.5 * truth["pitch_nm"] * (truth.get("reconstruction") or {}).get("depth_scale", 1.0)
    code = {m: i for i, m in enumerate(metals)}
    state = np.array([code[s] for s in table["state"]], dtype=np.int64)
    out_rods = np.unique(table["rod"])
    groups = [np.flatnonzero(table["rod"] == o) for o in out_rods]
    # distance of each output rod (at its mean depth) to each true axis: (n_out, n_true)
    zc = np.array([table["z_nm"][g].mean() for g in groups])
    xc = np.array([table["rod_x_nm"][g].mean() for g in groups])
    yc = np.array([table["rod_y_nm"][g].mean() for g in groups])
    d = np.hypot(xc[:, None] - x0[None] - dx[None] * zc[:, None], yc[:, None] - y0[None] - dy[None] * zc[:, None])
    pairs = []
    used_out, used_true = set(), set()
    for flat in np.argsort(d, axis=None):  # one to one, nearest pairs first
        o, j = divmod(int(flat), d.shape[1])
        if d[o, j] >= tol:
            break
        if o in used_out or j in used_true:
            continue
        used_out.add(o)
        used_true.add(j)
        pairs.append((o, j))
    rod_l, k_l, st_l = [], [], []
    for o, j in pairs:
        tz = np.asarray(rods[j]["z_nm"], float)
        if tz.size == 0:
            continue
        g = groups[o]
        zs = table["z_nm"][g]
        k = np.abs(zs[:, None] - tz[None, :]).argmin(axis=1)
        dist = np.abs(zs - tz[k])
        ok = dist < half
        # one decoded site per true site: the nearest
        order = np.lexsort((dist, k))
        first = np.ones(order.size, bool)
        first[1:] = k[order][1:] != k[order][:-1]
        keep = np.zeros(zs.size, bool)
        keep[order[first]] = True
        sel = ok & keep
        rod_l.append(np.full(int(sel.sum()), j))
        k_l.append(k[sel])
        st_l.append(state[g][sel])
    if not rod_l:
        z = np.zeros(0, np.int64)
        return z, z, z
    return np.concatenate(rod_l), np.concatenate(k_l), np.concatenate(st_l)


def one(kw):
    """Simulate, analyse and score one run; returns a dict of figures (``error`` when it failed)."""
    import oracle
    from probeseq.outputs.results import tracks_table
    from probeseq.pipeline import AnalysisOptions, analyze
    from probeseq.simulation.simulate import simulate_run

    out = {"case": kw}
    try:
        run = simulate_run(**kw)
        t0 = time.perf_counter()
        post = oracle.oracle_posteriors(run)
        out["oracle_s"] = time.perf_counter() - t0
        correct = oracle.oracle_correct(run, post)
        inside = run.seq >= 0
        out["oracle_all"] = float(correct[inside].mean())
        out["n_inside"] = int(inside.sum())
        correct_data = oracle.oracle_correct(run, oracle.data_limit_posteriors(run))
        crowded = kw.get("seed", 0) < FIRST_SEED
        correct_xt = (oracle.oracle_correct(run, oracle.data_limit_posteriors(run, crosstalk_known=True))
                      if crowded else None)
        correct_sh = oracle.oracle_correct(run, oracle.data_limit_shared_posteriors(run)) if crowded else None
        t0 = time.perf_counter()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            res = analyze(run.ions, run.config.metals, run.lattice, options=AnalysisOptions(seed=1, n_boot=50))
        out["tool_s"] = time.perf_counter() - t0
        out["warnings"] = [str(w.message) for w in caught]
        metals = list(run.config.metals)
        rod, k, state = match_sites(tracks_table(res.columns, res.decoded), run.truth, metals)
        site = np.array([np.flatnonzero(inside[j])[kk] for j, kk in zip(rod, k)], dtype=np.int64)
        true_state = run.seq[rod, site] if rod.size else np.zeros(0, np.int64)
        out["n_decoded"] = int(res.columns.mask.sum())
        out["n_matched"] = int(rod.size)
        out["tool"] = float((state == true_state).mean()) if rod.size else math.nan
        out["oracle_matched"] = float(correct[rod, site].mean()) if rod.size else math.nan
        out["ratio"] = out["tool"] / out["oracle_matched"] if rod.size else math.nan
        out["data_matched"] = float(correct_data[rod, site].mean()) if rod.size else math.nan
        out["ratio_data"] = out["tool"] / out["data_matched"] if rod.size else math.nan
        if correct_xt is not None:
            out["data_xt_matched"] = float(correct_xt[rod, site].mean()) if rod.size else math.nan
            out["data_sh_matched"] = float(correct_sh[rod, site].mean()) if rod.size else math.nan
        out["eta_true"] = float(run.config.eta)
        out["eta_tool"] = float(res.decoded.eta)
        comp = res.to_dict()["composition"]
        truth_comp = run.truth["composition_sites"]
        out["comp_err"] = max(abs(float(comp[m]) - truth_comp[m]) for m in metals)
        occ = post[inside].sum(axis=0)  # the oracle's composition: posterior-summed inside sites
        out["comp_err_oracle"] = max(abs(float(occ[i] / occ.sum()) - truth_comp[m]) for i, m in enumerate(metals))
        # the detected metal atoms' composition (every metal has the same eta here): what counting the
        # ions right gives, short of the sites whose atom was not detected
        det = np.bincount(run.ion_metal[run.ion_metal >= 0], minlength=len(metals)).astype(float)
        out["comp_err_detected"] = max(abs(float(det[i] / det.sum()) - truth_comp[m]) for i, m in enumerate(metals))
        out["label"] = res.classification.label
    except Exception as exc:  # the benchmark reports a failed run and goes on
        out["error"] = f"{type(exc).__name__}: {exc}"
        out["traceback"] = traceback.format_exc(limit=4)
    return out


def _fmt(v, spec=".3f"):
    return "   nan" if v is None or not np.isfinite(v) else format(v, spec)


def _row(i, r):
    kw = r["case"]
    name = kw["pattern"] if kw["pattern"] != "per-metal" else "per-metal(" + ",".join(
        p[:5] for p in kw["metal_patterns"]) + ")"
    metals = "/".join(kw["metals"]) + ("*" if kw["fragments"] == "carbon-rich" else "")
    head = f"{i:3d} {kw['seed']:7d} {name:<30.30} {metals:<10} {kw['packing'][:4]:<4}"
    if "error" in r:
        return head + f"  FAILED: {r['error'][:120]}"
    return (head + f" {r['eta_true']:5.2f}/{_fmt(r['eta_tool'], '.2f'):>5} {r['oracle_all']:7.4f} "
            f"{_fmt(r['oracle_matched'], '.4f'):>7} {_fmt(r['tool'], '.4f'):>7} {_fmt(r['ratio'], '.4f'):>7} "
            f"{r['n_matched']:6d}/{r['n_inside']:<6d} {_fmt(r['comp_err'], '.4f'):>7} {_fmt(r['comp_err_detected'], '.4f'):>7}"
            f" {_fmt(r['comp_err_oracle'], '.4f'):>7}"
            f" {r['tool_s']:5.1f}"
            f" {_fmt(r['data_matched'], '.4f'):>7} {_fmt(r['ratio_data'], '.4f'):>7}")


def summarize(results) -> bool:
    """Print the per-arrangement ratios and the targets; return whether the ratio target is met."""
    print("\n== ratio tool / oracle on the matched sites, per arrangement "
          f"(target >= {RATIO_TARGET} on every arrangement, goal {RATIO_GOAL})")
    print(f"{'arrangement':<14} {'runs':>4} {'failed':>6} {'mean':>7} {'min':>7} {'oracle':>7} {'tool':>7}  verdict")
    all_ok = True
    ratios_all = []
    for arr in ARRANGEMENTS:
        rs = [r for r in results if r["case"]["pattern"] == arr]
        if not rs:
            continue
        ok_runs = [r for r in rs if "error" not in r and np.isfinite(r["ratio"])]
        ratios = np.array([r["ratio"] for r in ok_runs])
        ratios_all.extend(ratios.tolist())
        failed = len(rs) - len(ok_runs)
        mean = float(ratios.mean()) if ratios.size else math.nan
        ok = failed == 0 and ratios.size > 0 and mean >= RATIO_TARGET
        all_ok &= ok
        verdict = ("PASS" if ok else "FAIL") + (" (goal met)" if ok and mean >= RATIO_GOAL else "")
        oracle_m = np.mean([r["oracle_matched"] for r in ok_runs]) if ok_runs else math.nan
        tool_m = np.mean([r["tool"] for r in ok_runs]) if ok_runs else math.nan
        print(f"{arr:<14} {len(rs):4d} {failed:6d} {_fmt(mean, '.4f'):>7} {_fmt(ratios.min() if ratios.size else None, '.4f'):>7} "
              f"{_fmt(oracle_m, '.4f'):>7} {_fmt(tool_m, '.4f'):>7}  {verdict}")
    overall = float(np.mean(ratios_all)) if ratios_all else math.nan
    print(f"{'overall':<14} {len(results):4d} {sum('error' in r for r in results):6d} {_fmt(overall, '.4f'):>7} "
          f"{_fmt(min(ratios_all) if ratios_all else None, '.4f'):>7}")
    print(f"ratio >= {RATIO_TARGET} on every arrangement: {'PASS' if all_ok else 'FAIL'}")
    print("\n== beside it (diagnostic, no target): ratio tool / data limit, the decode that knows the true model of"
          "\n   every kind of ion but not which ion is which (oracle.data_limit_posteriors)")
    print(f"{'arrangement':<14} {'mean':>7} {'min':>7} {'data':>7} {'oracle':>7}")
    for arr in ARRANGEMENTS:
        ok_runs = [r for r in results if r["case"]["pattern"] == arr and "error" not in r and np.isfinite(r["ratio_data"])]
        if ok_runs:
            rd = np.array([r["ratio_data"] for r in ok_runs])
            print(f"{arr:<14} {rd.mean():7.4f} {rd.min():7.4f} {np.mean([r['data_matched'] for r in ok_runs]):7.4f} "
                  f"{np.mean([r['oracle_matched'] for r in ok_runs]):7.4f}")
    good = [r for r in results if "error" not in r]
    n = len(results)
    eta_ok = sum(abs(r["eta_tool"] - r["eta_true"]) <= ETA_TOL for r in good)
    comp_ok = sum(r["comp_err"] <= COMPOSITION_TOL for r in good)
    eta_err = np.array([abs(r["eta_tool"] - r["eta_true"]) for r in good])
    comp_err = np.array([r["comp_err"] for r in good])
    print(f"detection efficiency within {ETA_TOL} of the truth: {eta_ok}/{n} runs ({100 * eta_ok / max(n, 1):.0f} %), "
          f"median |error| {_fmt(np.median(eta_err) if eta_err.size else None)}, worst "
          f"{_fmt(eta_err.max() if eta_err.size else None)} (target: every run): "
          f"{'PASS' if eta_ok == n else 'FAIL'}")
    print(f"composition within {COMPOSITION_TOL} of the true site fractions: {comp_ok}/{n} runs "
          f"({100 * comp_ok / max(n, 1):.0f} %), median worst-metal error {_fmt(np.median(comp_err) if comp_err.size else None, '.4f')}, "
          f"worst {_fmt(comp_err.max() if comp_err.size else None, '.4f')} (target: every run): "
          f"{'PASS' if comp_ok == n else 'FAIL'}")
    for key, what in (("comp_err_detected", "the detected metal atoms' composition (counting every ion right)"),
                      ("comp_err_oracle", "the oracle's composition (its posteriors summed over the inside sites; it is "
                                          "told the composition the chain was drawn from)")):
        e = np.array([r[key] for r in good])
        print(f"  beside it, {what}: within {COMPOSITION_TOL} on {int(np.sum(e <= COMPOSITION_TOL))}/{n} runs, "
              f"median {_fmt(np.median(e) if e.size else None, '.4f')}, worst {_fmt(e.max() if e.size else None, '.4f')}")
    return all_ok


def crowded(workers: int) -> int:
    """The crowded lattices: tool, oracle, data limit and data limit with the crosstalk known."""
    print("crowded lattices: accuracy on the matched sites of the tool, the oracle, the data limit, the data limit"
          "\nwhen every own ion that landed nearer another rod or site is given back (crosstalk known), and the data"
          "\nlimit when every ion is shared between its nearest rods (oracle.data_limit_shared_posteriors)\n")
    with ProcessPoolExecutor(max_workers=max(1, workers)) as ex:
        for kw, r in zip(CROWDED, ex.map(one, CROWDED)):
            head = f"{kw['packing']} a = {kw['a_nm']} nm, blur {kw['sigma_xy_nm']} nm, {kw['pattern']}, {'/'.join(kw['metals'])}"
            if "error" in r:
                print(f"{head}: FAILED {r['error']}")
                continue
            print(f"{head}: tool {r['tool']:.4f}, oracle {r['oracle_matched']:.4f} (ratio {r['ratio']:.4f}), data limit "
                  f"{r['data_matched']:.4f} (tool / data {r['ratio_data']:.4f}), crosstalk known {r['data_xt_matched']:.4f} "
                  f"(+{r['data_xt_matched'] - r['data_matched']:.4f}), evidence shared between the nearest rods "
                  f"{r['data_sh_matched']:.4f} (+{r['data_sh_matched'] - r['data_matched']:.4f}); "
                  f"eta {r['eta_true']:.2f} / tool {r['eta_tool']:.2f}")
    return 0


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=40, help="simulated runs (default 40)")
    ap.add_argument("--workers", type=int, default=2, help="worker processes (default 2)")
    ap.add_argument("--seeds", default="", help="only these runs of the suite, a comma list of seeds "
                    f"(from {FIRST_SEED} on, e.g. 950002,950014)")
    ap.add_argument("--crowded", action="store_true",
                    help="instead of the suite, two crowded lattices, each with the data limit when the crosstalk "
                         "between neighbours is known (the bound on what modelling it could gain)")
    args = ap.parse_args(argv)
    if args.crowded:
        return crowded(args.workers)
    seeds = [int(v) for v in args.seeds.split(",") if v.strip()]
    if seeds:
        args.runs = max(args.runs, max(seeds) - FIRST_SEED + 1)
    print("oracle: posterior decode of the same sites given the true ion-to-site assignment and the true model")
    print("        (peak shapes of every metal's species and isotopes, transition matrix, copied rods' master chain).")
    which = (f"seeds {','.join(map(str, seeds))}" if seeds else
             f"{args.runs} runs, seeds {FIRST_SEED}-{FIRST_SEED + args.runs - 1}")
    print(f"{which}, {args.workers} workers; * = carbon-rich fragments; accuracies are shares of sites decoded right\n")
    print(f"{'#':>3} {'seed':>7} {'arrangement':<30} {'metals':<10} {'pack':<4} {'eta t/tool':>11} "
          f"{'or.all':>7} {'or.mat':>7} {'tool':>7} {'ratio':>7} {'matched/inside':>14} {'d_comp':>7} {'det.c':>7} {'or.comp':>7} {'t_s':>5}"
          f" {'data':>7} {'t/data':>7}")
    cases = suite(args.runs)
    if seeds:
        cases = [kw for kw in cases if kw["seed"] in set(seeds)]
    t0 = time.perf_counter()
    results = [None] * len(cases)
    with ProcessPoolExecutor(max_workers=max(1, args.workers)) as ex:
        for i, r in enumerate(ex.map(one, cases)):
            results[i] = r
            print(_row(i, r), flush=True)
    for i, r in enumerate(results):
        if "error" in r:
            print(f"\nrun {i} failed:\n{r['traceback']}")
    summarize(results)
    print(f"\nwall time {time.perf_counter() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
