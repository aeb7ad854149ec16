"""Benchmark of the decoding stage (issue 5): accuracy against the oracle, parameter recovery,
speed, and the ratio of the batched forward-backward to hmmlearn's on the same model.

Run from the repository root:  python tests/benchmarks/bench_decode.py [--quick]

The count arrays are generated here directly from the physics of a rod column: a Markov chain
per rod with persistence lam (A = lam I + (1 - lam) 1 f), each site's own ion detected with
probability eta, crosstalk ions taken from the state of a random nearest-neighbour rod at the
same depth (Poisson, mean c per site), Poisson background b per channel, and optional depth
blur (a detected own ion moved to the site above or below with probability `blur`). The oracle
decodes the same counts with the true generative parameters (mu = c f + b).
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
from scipy.special import gammaln

from probeseq.decoding import chain
from probeseq.decoding.decode import decode, fit_decoder
from probeseq.decoding.hmm import forward_backward, forward_backward_scaled, viterbi
from probeseq.decoding.model import DecoderParams
from probeseq.lattice.rodcolumns import RodColumns


def persistent(lam, comp):
    comp = np.asarray(comp, float)
    return lam * np.eye(comp.size) + (1 - lam) * comp[None, :]


def generate(n_rods, n_sites, *, eta, lam, comp, crosstalk=0.05, background=0.01, blur=0.0, seed=0):
    """Counts (n_rods, n_sites, K), true states, true parameters, and the values realised in
    this sample (detected fraction, state frequencies, persistence of the empirical
    transition matrix); rods on a square grid."""
    rng = np.random.default_rng(seed)
    comp = np.asarray(comp, float)
    k = comp.size
    side = int(np.ceil(np.sqrt(n_rods)))
    cum = np.cumsum(comp)
    s = np.empty((n_rods, n_sites), dtype=np.int64)
    s[:, 0] = np.searchsorted(cum, rng.random(n_rods), side="right")
    for t in range(1, n_sites):
        fresh = np.minimum(np.searchsorted(cum, rng.random(n_rods), side="right"), k - 1)
        s[:, t] = np.where(rng.random(n_rods) < lam, s[:, t - 1], fresh)
    counts = rng.poisson(np.broadcast_to(background, (k,)), size=(n_rods, n_sites, k)).astype(float)
    # own ions, with depth blur
    r, t = np.nonzero(rng.random((n_rods, n_sites)) < eta)
    realised = {"eta": r.size / s.size, "composition": np.bincount(s.ravel(), minlength=k) / s.size}
    trans = np.zeros((k, k))
    np.add.at(trans, (s[:, :-1].ravel(), s[:, 1:].ravel()), 1.0)
    realised["persistence"] = chain.persistence(trans / trans.sum(1, keepdims=True))
    metal = s[r, t]
    if blur > 0:
        mv = rng.random(r.size) < blur
        t = np.clip(t + mv * rng.choice([-1, 1], r.size), 0, n_sites - 1)
    np.add.at(counts, (r, t, metal), 1.0)
    # crosstalk from nearest-neighbour rods at the same depth
    n_x = rng.poisson(crosstalk, size=(n_rods, n_sites))
    r, t = np.nonzero(n_x)
    r = np.repeat(r, n_x[r, t])
    t = np.repeat(t, n_x[n_x > 0])
    ix, iy = np.divmod(r, side)
    step = np.array([(1, 0), (-1, 0), (0, 1), (0, -1)])[rng.integers(0, 4, r.size)]
    src = np.clip(ix + step[:, 0], 0, side - 1) * side + np.clip(iy + step[:, 1], 0, side - 1)
    src = np.where(src < n_rods, src, r)
    np.add.at(counts, (r, t, s[src, t]), 1.0)
    truth = DecoderParams.from_components(persistent(lam, comp), eta=eta, crosstalk_rate=crosstalk, background=background)
    return counts, s, truth, realised


def columns(counts, metals=("Co", "Zn", "Ni")):
    n_rods, n_sites, k = counts.shape
    side = int(np.ceil(np.sqrt(n_rods)))
    xy = np.stack(np.divmod(np.arange(n_rods), side), axis=1).astype(float)
    return RodColumns(counts=counts, mask=np.ones((n_rods, n_sites), bool), metals=metals[:k], rod_xy_nm=xy,
                      tilt=np.zeros(2), z_ref_nm=0.0, site_z_nm=np.arange(n_sites) * 0.23, pitch_nm=0.23)


def best_of(fn, n=3):
    """Shortest of n timings (the machine is shared: the minimum is the least disturbed)."""
    times, out = [], None
    for _ in range(n):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def verdict(ok):
    return "PASS" if ok else "FAIL"


def accuracy_and_recovery(n_rods, n_sites, quick):
    lam = 0.8
    print(f"\n== accuracy vs oracle and parameter recovery: {n_rods} rods x {n_sites} sites, K=2, lam {lam}, "
          f"composition (0.6, 0.4), crosstalk 0.05/site, background 0.01/site/channel ==")
    print("d_x = |fit - generating value|; in brackets |fit - value realised in the sample| (the estimator cannot "
          "beat the sampling noise of the sample itself: sd of the realised composition about "
          f"{np.sqrt(0.24 * (1 + lam) / (1 - lam) / (n_rods * n_sites)):.4f} here)")
    print(f"{'eta':>5} {'blur':>5} {'seed':>4} {'acc fit':>8} {'acc orc':>8} {'ratio':>6} {'d_eta':>15} "
          f"{'d_comp':>15} {'d_lam':>15} {'fit s':>6}  accuracy>=0.98*oracle  recovery 0.03/0.01/0.05")
    ok_all = True
    n_gen = n_real = n_cases = 0
    seeds = (1,) if quick else (1, 2, 3)
    cases = [(eta, 0.0, sd) for eta in (0.35, 0.5, 0.8) for sd in seeds] + [(0.5, 0.05, 1)]
    for eta, blur, seed in cases:
        counts, s, truth, real = generate(n_rods, n_sites, eta=eta, lam=lam, comp=(0.6, 0.4), blur=blur,
                                          seed=seed * 1000 + int(eta * 100))
        cols = columns(counts)
        t0 = time.perf_counter()
        res = fit_decoder(cols, random_state=0)
        t_fit = time.perf_counter() - t0
        orc = decode(cols, truth)
        acc_fit = np.mean(res.posteriors.argmax(2) == s)
        acc_orc = np.mean(orc.posteriors.argmax(2) == s)
        ratio = acc_fit / acc_orc
        d = {
            "eta": (abs(res.eta - eta), abs(res.eta - real["eta"])),
            "comp": (float(np.max(np.abs(res.stationary - truth.stationary))),
                     float(np.max(np.abs(res.stationary - real["composition"])))),
            "lam": (abs(res.persistence - lam), abs(res.persistence - real["persistence"])),
        }
        tol = {"eta": 0.03, "comp": 0.01, "lam": 0.05}
        ok_gen = all(d[key][0] < tol[key] for key in tol)
        ok_real = all(d[key][1] < tol[key] for key in tol)
        ok_acc = ratio >= 0.98
        ok_all &= ok_acc
        if blur == 0:
            n_cases += 1
            n_gen += ok_gen
            n_real += ok_real
            ok_all &= ok_real
            rec = f"{verdict(ok_real)} (vs generating values {verdict(ok_gen)})"
        else:
            rec = "blur is outside the model: recovery for information"
        cells = " ".join(f"{d[key][0]:7.4f}({d[key][1]:6.4f})" for key in ("eta", "comp", "lam"))
        print(f"{eta:5.2f} {blur:5.2f} {seed:4d} {acc_fit:8.4f} {acc_orc:8.4f} {ratio:6.3f} {cells} {t_fit:6.2f}  "
              f"{verdict(ok_acc):20}  {rec}")
    print(f"recovery within tolerance: {n_real}/{n_cases} against the realised values, {n_gen}/{n_cases} against "
          f"the generating values")
    return ok_all


def _hmmlearn_models(truth, log_emission_flat):
    """hmmlearn 0.3.3 models of the same tied model: (a) computing the emission log-likelihood
    from the counts in `_compute_log_likelihood` (what a user of hmmlearn would write), and
    (b) looking up precomputed emission log-likelihoods (hmmlearn's core alone)."""
    from hmmlearn.base import BaseHMM

    eta, mu = truth.eta, truth.extra_rate
    log_mu = np.log(mu)

    class Tied(BaseHMM):
        def _compute_log_likelihood(self, X):
            base = X @ log_mu - mu.sum() - gammaln(X + 1).sum(1)
            return np.log((1 - eta) + X * (eta / mu)) + base[:, None]

    class Lookup(BaseHMM):
        def _compute_log_likelihood(self, X):
            return log_emission_flat[X[:, 0].astype(np.int64)]

    out = {}
    for name, cls in (("tied", Tied), ("lookup", Lookup)):
        for impl in ("log", "scaling"):
            m = cls(n_components=truth.n_metals, init_params="", params="", implementation=impl)
            m.startprob_, m.transmat_ = truth.stationary, truth.transmat
            out[name, impl] = m
    return out


def speed(n_rods, n_sites, quick):
    print(f"\n== speed: {n_rods} rods x {n_sites} sites, K=3, eta 0.5, lam 0.8 ==")
    counts, s, truth, _ = generate(n_rods, n_sites, eta=0.5, lam=0.8, comp=(0.5, 0.3, 0.2), seed=7)
    cols = columns(counts)
    reps = 1 if quick else 3
    t_dec, res = best_of(lambda: decode(cols, truth), reps)
    print(f"decode (posteriors + Viterbi + runs) with given parameters: {t_dec:.2f} s  target < 2 s  "
          f"{verdict(t_dec < 2.0)}   (accuracy {np.mean(res.viterbi == s):.4f})")
    ok = t_dec < 2.0
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as wl:
        warnings.simplefilter("always")
        fit = fit_decoder(cols, random_state=0)
    t_fit = time.perf_counter() - t0
    print(f"full fit (4 starts screened + EM to tol 1e-6/site + independent-sites fit + decode): {t_fit:.1f} s  "
          f"target < 30 s  {verdict(t_fit < 30)}   ({fit.n_iter} EM iterations on all rods, converged "
          f"{fit.converged}, eta {fit.eta:.3f}, lam {fit.persistence:.3f}, warnings {len(wl)})")
    ok &= t_fit < 30

    try:
        import hmmlearn  # noqa: F401
    except ImportError:
        print("hmmlearn not installed: ratio not measured")
        return ok
    # forward-backward (log-likelihood + posteriors) of the same model on the same counts
    eta, mu = truth.eta, truth.extra_rate
    a, p = truth.transmat, truth.stationary
    k = truth.n_metals
    obs_flat = counts.reshape(-1, k)
    lengths = [n_sites] * n_rods
    base_ll = float((obs_flat @ np.log(mu)).sum() - obs_flat.shape[0] * mu.sum() - gammaln(obs_flat + 1).sum())

    def ours_from_counts():
        e = np.ascontiguousarray(counts.transpose(1, 0, 2)) * (eta / mu)
        e += 1 - eta
        r = forward_backward_scaled(e, a, p, compute_xi=False, emission_is_time_major=True,
                                    overwrite_emission=True)
        return r.loglik.sum() + base_ll, r

    from probeseq.decoding import rodchain

    mask_all = np.ones(counts.shape[:2], bool)
    rods, first, span = rodchain.spans(mask_all)
    n_thr = rodchain.set_threads(None)

    def compiled_decode():
        r = rodchain.decode_pass(counts, mask_all, rods, first, span, eta, mu, a, p, 0.8)
        return r[0] + base_ll, r

    def compiled_estep():
        return rodchain.fit_pass(counts, mask_all, rods, first, span, eta, mu, a, p)[0] + base_ll

    compiled_decode()  # compile or load the cached kernels outside the timing
    compiled_estep()
    # the ratio to hmmlearn: more repeats on both sides (the shared machine has slow phases of a
    # few seconds; the minimum of each side is its least disturbed run)
    reps_cmp = 3 if quick else 7
    t_cdec, (ll_cdec, cdec) = best_of(compiled_decode, reps_cmp)
    t_cfit, ll_cfit = best_of(compiled_estep, reps_cmp)
    t_ours, (ll_ours, fb_ours) = best_of(ours_from_counts, reps)
    le = np.log((1 - eta) + counts * (eta / mu))
    t_core, core = best_of(lambda: forward_backward(le, a, p, compute_xi=False), reps)
    lin_tm = np.ascontiguousarray(np.exp(le).transpose(1, 0, 2))
    t_lin, _ = best_of(lambda: forward_backward_scaled(lin_tm, a, p, compute_xi=False, emission_is_time_major=True),
                       reps)
    t_vit, (_, path) = best_of(lambda: viterbi(le, a, p), reps)
    models = _hmmlearn_models(truth, le.reshape(-1, k))
    idx = np.arange(n_rods * n_sites, dtype=float)[:, None]
    print("forward-backward, log-likelihood + posteriors of every site (hmmlearn 0.3.3 score_samples with lengths):")
    print(f"  from counts   probeseq compiled, rod by rod on {n_thr} threads (rodchain.decode_pass: loglik, float32 "
          f"posteriors, per-rod transitions and the Viterbi path): {t_cdec:7.3f} s")
    print(f"                probeseq compiled E-step (rodchain.fit_pass: loglik, expected transitions and own ions): "
          f"{t_cfit:7.3f} s")
    print(f"                probeseq batched numpy (emission factors + forward_backward_scaled): {t_ours:7.3f} s")
    ratio_counts = {}
    ratio_numpy = {}
    for impl in ("log", "scaling"):
        t_ref, (ll_ref, post_ref) = best_of(lambda: models["tied", impl].score_samples(obs_flat, lengths), reps_cmp)
        ratio_counts[impl] = t_ref / t_cdec
        ratio_numpy[impl] = t_ref / t_ours
        dp = float(np.abs(post_ref - cdec[1].reshape(-1, k)).max())
        dpn = float(np.abs(post_ref - fb_ours.posteriors.reshape(-1, k)).max())
        print(f"                hmmlearn implementation={impl!r:9}: {t_ref:7.3f} s  ratio compiled {t_ref / t_cdec:5.1f}x "
              f"(|d loglik| {abs(ll_ref - ll_cdec):.1e}, max |d posterior| {dp:.1e}); E-step {t_ref / t_cfit:5.1f}x "
              f"(|d loglik| {abs(ll_ref - ll_cfit):.1e}); batched numpy {t_ref / t_ours:5.1f}x (max |d posterior| {dpn:.1e})")
    print(f"  precomputed emissions: probeseq forward_backward (log input, incl. exp and transpose) {t_core:7.3f} s; "
          f"forward_backward_scaled (linear, time-major input) {t_lin:7.3f} s")
    ratio_core = {}
    for impl in ("log", "scaling"):
        m = models["lookup", impl]
        t_ref, (ll_ref, post_ref) = best_of(lambda: m.score_samples(idx, lengths), reps)
        ratio_core[impl] = t_ref / t_core
        dp = float(np.abs(post_ref - core.posteriors.reshape(-1, k)).max())
        print(f"                hmmlearn implementation={impl!r:9}: {t_ref:7.3f} s  ratio {t_ref / t_core:5.1f}x   "
              f"|d loglik| {abs(ll_ref - core.loglik.sum()):.1e}, max |d posterior| {dp:.1e}")
    m = models["lookup", "scaling"]
    t_ref_v, (_, path_ref) = best_of(lambda: m.decode(idx, lengths), reps)
    print(f"  viterbi (precomputed log-emissions): hmmlearn {t_ref_v:.3f} s, probeseq {t_vit:.3f} s, "
          f"ratio {t_ref_v / t_vit:.1f}x, identical paths {bool(np.array_equal(path_ref, path.ravel()))}")
    r_default = ratio_counts["log"]
    r_scaling = ratio_counts["scaling"]
    print(f"  speed-up of the compiled decode over hmmlearn on the same model from counts: {r_default:.1f}x (default "
          f"implementation 'log'), {r_scaling:.1f}x ('scaling')  target >= 5x against both  "
          f"{verdict(min(r_default, r_scaling) >= 5)}")
    print(f"  core alone (precomputed log-emissions): {ratio_core['log']:.1f}x ('log'), {ratio_core['scaling']:.1f}x "
          f"('scaling', hmmlearn's compiled scaled recursion); linear-input core vs 'scaling': "
          f"{ratio_core['scaling'] * t_core / t_lin:.1f}x")
    ok &= min(r_default, r_scaling) >= 5
    return ok


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="smaller sizes, single timings")
    args = ap.parse_args()
    t0 = time.perf_counter()
    ok = accuracy_and_recovery(300, 200, args.quick)
    ok &= speed(1000, 2000 if not args.quick else 500, args.quick)
    print(f"\nbenchmark total {time.perf_counter() - t0:.0f} s; overall {verdict(ok)}")


if __name__ == "__main__":
    main()
