"""Copy-aware decoding: a master sequence pooled from every rod that copies it."""

from __future__ import annotations

import itertools
import warnings

import numpy as np
import pytest

from probeseq.decoding.copies import _master_terms, _rod_posteriors, copies_suspected, decode_copies, pooled_result
from probeseq.decoding.hmm import forward_backward
from probeseq.decoding.model import DecoderParams, emission_factors
from probeseq.exceptions import DataQualityWarning
from probeseq.lattice.rodcolumns import RodColumns


def _columns(counts, mask=None):
    n_rods, n_sites, k = counts.shape
    mask = np.ones((n_rods, n_sites), bool) if mask is None else mask
    xy = np.stack(np.divmod(np.arange(n_rods), 4), axis=1).astype(float) * 1.5
    return RodColumns(counts=counts, mask=mask, metals=("Co", "Zn", "Ni")[:k], rod_xy_nm=xy, tilt=np.zeros(2),
                      z_ref_nm=0.0, site_z_nm=np.arange(n_sites) * 0.23, pitch_nm=0.23, resolvable=True)


def test_site_posteriors_equal_brute_force_enumeration():
    # 2 rods x 3 sites, 2 metals: every master sequence and every rod state, weighted by
    # P(master) prod C[m, s] e(s) (the state-independent Poisson factor cancels)
    rng = np.random.default_rng(3)
    counts = rng.poisson(0.6, (2, 3, 2)).astype(float)
    mask = np.array([[True, True, False], [True, True, True]])
    cols = _columns(counts, mask)
    A = np.array([[0.7, 0.3], [0.4, 0.6]])
    params = DecoderParams(transmat=A, eta=0.5, extra_rate=np.array([0.2, 0.3]))
    f = params.stationary
    eps = 0.2
    C = (1 - eps) * np.eye(2) + eps * f[None, :]
    e = emission_factors(counts, params)
    logE = _master_terms(cols, params, np.arange(2), C, None)
    gamma = forward_backward(logE[None], A, f).posteriors[0]
    post, _, _ = _rod_posteriors(cols, params, np.arange(2), C, gamma, eps, f, None)
    post = post / post.sum(-1, keepdims=True).clip(1e-300)
    brute = np.zeros((2, 3, 2))
    master_post = np.zeros((3, 2))
    for m in itertools.product(range(2), repeat=3):
        pm = f[m[0]] * A[m[0], m[1]] * A[m[1], m[2]]
        for s in itertools.product(range(2), repeat=6):
            s = np.array(s).reshape(2, 3)
            w = pm
            for r in range(2):
                for t in range(3):
                    w *= C[m[t], s[r, t]] * (e[r, t, s[r, t]] if mask[r, t] else 1.0)
            for r in range(2):
                for t in range(3):
                    brute[r, t, s[r, t]] += w
            for t in range(3):
                master_post[t, m[t]] += w
    brute /= brute.sum(-1, keepdims=True)
    master_post /= master_post.sum(-1, keepdims=True)
    np.testing.assert_allclose(gamma, master_post, atol=1e-12)
    np.testing.assert_allclose(post[mask], brute[mask], atol=1e-12)


@pytest.fixture(scope="module")
def copied_run():
    from probeseq.pipeline import AnalysisOptions, analyze
    from probeseq.simulation.simulate import simulate_run

    run = simulate_run(pattern="copied", copy_error=0.1, depth_nm=20, top_radius_nm=6, seed=61, eta=0.5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataQualityWarning)
        res = analyze(run.ions, run.config.metals, run.lattice, options=AnalysisOptions(seed=1, n_boot=20))
    return run, res


def _accuracy_against_truth(res, run):
    """Share of decoded sites right, sites matched through the simulator's own site depths."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent / "benchmarks"))
    from bench_reconstruction import site_accuracy

    return site_accuracy(res, run.truth)


def test_copied_run_is_pooled_and_beats_single_rods(copied_run):
    from dataclasses import replace

    run, res = copied_run
    assert res.classification.rod_to_rod == "copied"
    assert copies_suspected(res.columns, res.decoded)[1]["z"] > 10
    cp = res.copies
    assert cp is not None and cp.applied
    assert cp.copy_error == pytest.approx(0.1, abs=0.03)
    assert cp.follows.sum() >= 0.8 * res.columns.mask.any(1).sum()
    pooled = _accuracy_against_truth(res, run)
    # the same columns decoded one rod at a time
    single = decode_copies(res.columns, res.decoded.params, None)
    assert single.applied
    from probeseq.decoding.decode import decode

    alone = decode(res.columns, res.decoded.params)
    acc_alone = _accuracy_against_truth(replace(res, decoded=alone), run)
    assert pooled > acc_alone + 0.1
    assert res.to_dict()["copies"]["applied"] is True


def test_random_run_finds_no_master(copied_run):
    from probeseq.simulation.simulate import simulate_run
    from probeseq.decoding.decode import fit_decoder
    from probeseq.lattice.columns import build_columns

    run = simulate_run(pattern="random", depth_nm=16, top_radius_nm=6, seed=62)
    sel = run.ion_metal >= 0
    w = run.ion_metal[sel].astype(np.int64)
    cols = build_columns(run.ions.x[sel], run.ions.y[sel], run.ions.z[sel], w, run.config.metals, run.lattice,
                         random_state=0)
    dec = fit_decoder(cols, n_starts=1, random_state=0)
    # independent rods: their posteriors agree as chance has it
    suspected, detail = copies_suspected(cols, dec)
    assert not suspected and abs(detail["z"]) < 4
    cr = decode_copies(cols, dec.params, dec.posteriors)
    assert not cr.applied and "no copy structure" in cr.reason
    assert pooled_result(dec, cr) is dec


def test_too_few_rods_fall_back_with_the_reason():
    counts = np.random.default_rng(0).poisson(0.5, (3, 20, 2)).astype(float)
    params = DecoderParams(transmat=np.array([[0.6, 0.4], [0.4, 0.6]]), eta=0.5, extra_rate=np.array([0.1, 0.1]))
    cr = decode_copies(_columns(counts), params)
    assert not cr.applied and "too few rods" in cr.reason


@pytest.mark.parametrize("linear", [False, True])
def test_compiled_passes_equal_the_emission_factors_formulas(linear):
    """The compiled passes (decoding.copypass) against the formulas written with
    decoding.model.emission_factors in numpy: fractional counts (a split ion, or soft evidence read
    linearly), a per-rod efficiency, per-metal visibilities and masked sites, over more rods than
    one block of the master's partial sums."""
    from probeseq.decoding.copypass import RODS_PER_BLOCK, master_log_emission, rod_pass

    rng = np.random.default_rng(11)
    n_rods, n_sites, k = RODS_PER_BLOCK + 37, 25, 3
    counts = rng.poisson(0.7, (n_rods, n_sites, k)).astype(float)
    counts[rng.random(counts.shape) < 0.15] += rng.integers(1, 8, 1)[0] / 8.0  # fractional parts
    mask = rng.random((n_rods, n_sites)) < 0.8
    h = rng.uniform(0.7, 1.2, n_rods)
    params = DecoderParams(transmat=np.array([[0.6, 0.3, 0.1], [0.2, 0.7, 0.1], [0.3, 0.3, 0.4]]), eta=0.55,
                           extra_rate=np.array([0.2, 0.35, 0.5]), visibility=np.array([1.0, 0.8, 0.6]))
    f, eps = params.stationary, 0.15
    C = (1 - eps) * np.eye(k) + eps * f[None, :]
    rods = np.arange(n_rods)
    e = emission_factors(counts, params, efficiency=h[:, None] * np.ones(n_sites), linear=linear)
    mix = e @ C.T
    mix[~mask] = 1.0
    want_logE = np.log(mix).sum(axis=0)
    gamma = rng.dirichlet(np.ones(k), n_sites)
    w = gamma[None] / mix
    want_post = np.where(mask[..., None], (w @ C) * e, 0.0)
    want_redraw = np.where(mask, (w * (eps * (e @ f))[..., None]).sum(-1), 0.0).sum(1)
    eta = params.state_eta
    got_logE = master_log_emission(counts, mask, rods, eta, params.extra_rate, C, h, linear=linear)
    post, redraw, n_obs = rod_pass(counts, mask, rods, eta, params.extra_rate, C, gamma, eps, f, h, linear=linear)
    np.testing.assert_allclose(got_logE, want_logE, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(post, want_post, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(redraw, want_redraw, rtol=1e-12)
    np.testing.assert_array_equal(n_obs, mask.sum(1))
    # the same sums on one thread as on all (fixed blocks of rods)
    from probeseq import runtime

    before = runtime.kernel_threads()
    try:
        runtime.configure(1)
        again = master_log_emission(counts, mask, rods, eta, params.extra_rate, C, h, linear=linear)
    finally:
        runtime.configure(before)
    np.testing.assert_array_equal(again, got_logE)
