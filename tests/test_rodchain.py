"""The compiled rod-by-rod recursions against the batched numpy ones (probeseq.decoding.hmm), which are
themselves checked against hmmlearn and brute-force enumeration in test_decode / test_hmm."""

import numpy as np
import pytest
from test_decode import make_columns

from probeseq.decoding import rodchain
from probeseq.decoding.decode import decode, fit_decoder, sample_model
from probeseq.decoding.model import DecoderParams
from probeseq.exceptions import InputError


def _params(k, stay=0.9, eta=0.5, mu=0.3):
    a = np.full((k, k), (1 - stay) / (k - 1))
    np.fill_diagonal(a, stay)
    rng = np.random.default_rng(k)
    a = 0.8 * a + 0.2 * rng.dirichlet(np.ones(k), size=k)  # no exact symmetry (no Viterbi ties)
    return DecoderParams(transmat=a / a.sum(1, keepdims=True), eta=eta,
                         extra_rate=mu * (1 + 0.3 * np.arange(k)))


def _awkward_mask(n_rods, n_sites, rng):
    m = np.ones((n_rods, n_sites), bool)
    m[:, : rng.integers(1, 20)] = False  # leading masked sites
    m[:, n_sites - 7:] = False  # trailing
    m[3] = False  # a rod with no observed site
    m[5, 100:110] = False  # a gap
    m[6, ::5] = False  # scattered gaps
    m[8, :] = False
    m[8, 40] = True  # a rod with a single observed site
    return m


@pytest.mark.parametrize("k,fractional", [(2, False), (3, True), (4, False)])
def test_compiled_decode_matches_numpy(k, fractional):
    rng = np.random.default_rng(10 + k)
    p = _params(k)
    counts, _ = sample_model(p, 24, 200, random_state=k)
    if fractional:
        nz = counts > 0
        counts[nz] = counts[nz] - 0.35 * rng.random(nz.sum())  # split ions at many sites
    cols = make_columns(counts, _awkward_mask(24, 200, rng))
    fast = decode(cols, p, engine="compiled")
    ref = decode(cols, p, engine="numpy")
    assert fast.posteriors.dtype == np.float32 and fast.viterbi.dtype == np.int8
    assert fast.loglik == pytest.approx(ref.loglik, rel=1e-12)
    np.testing.assert_allclose(fast.posteriors, ref.posteriors, atol=1e-7)
    np.testing.assert_array_equal(fast.viterbi, ref.viterbi)
    np.testing.assert_allclose(fast.per_rod_transitions, ref.per_rod_transitions, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(fast.per_rod_occupancy, ref.per_rod_occupancy, rtol=1e-6, atol=1e-6)
    np.testing.assert_array_equal(fast.uncertain, ref.uncertain)
    for key in ref.runs:
        np.testing.assert_allclose(fast.runs[key], ref.runs[key], rtol=1e-6)


@pytest.mark.parametrize("k,fractional", [(2, False), (3, True)])
def test_compiled_fit_matches_numpy(k, fractional):
    rng = np.random.default_rng(20 + k)
    p = _params(k, stay=0.85, eta=0.45)
    counts, _ = sample_model(p, 30, 250, random_state=30 + k)
    if fractional:
        nz = counts > 0
        counts[nz] = counts[nz] - 0.3 * rng.random(nz.sum())
    cols = make_columns(counts, _awkward_mask(30, 250, rng))
    fast = fit_decoder(cols, random_state=4, engine="compiled")
    ref = fit_decoder(cols, random_state=4, engine="numpy")
    assert fast.n_iter == ref.n_iter
    assert fast.loglik == pytest.approx(ref.loglik, rel=1e-11)
    assert fast.loglik_indep == pytest.approx(ref.loglik_indep, rel=1e-11)
    np.testing.assert_allclose(fast.transmat, ref.transmat, atol=1e-9)
    assert fast.eta == pytest.approx(ref.eta, abs=1e-9)
    np.testing.assert_allclose(fast.extra_rate, ref.extra_rate, rtol=1e-8)
    np.testing.assert_allclose(fast.loglik_history, ref.loglik_history, rtol=1e-11)


def test_results_do_not_depend_on_thread_count():
    p = _params(2)
    counts, _ = sample_model(p, 40, 300, random_state=7)
    cols = make_columns(counts.astype(np.float32))
    n0 = rodchain.set_threads(None)
    try:
        rodchain.set_threads(1)
        one = fit_decoder(cols, random_state=1)
        rodchain.set_threads(2)
        two = fit_decoder(cols, random_state=1)
    finally:
        rodchain.set_threads(n0)
    assert one.loglik == two.loglik
    np.testing.assert_array_equal(one.posteriors, two.posteriors)
    np.testing.assert_array_equal(one.transmat, two.transmat)


def test_float32_and_float64_counts_agree():
    p = _params(2)
    counts, _ = sample_model(p, 20, 150, random_state=8)
    a = decode(make_columns(counts), p)
    b = decode(make_columns(counts.astype(np.float32)), p)
    assert a.loglik == b.loglik
    np.testing.assert_array_equal(a.posteriors, b.posteriors)


def test_huge_counts_and_tiny_rates_stay_finite():
    # emission factors up to ~1e7 per site: the forward sums leave [1e-150, 1e150] within a
    # few steps, so the extra rescaling must kick in; compare with the numpy recursion
    p = DecoderParams(transmat=np.array([[0.9, 0.1], [0.3, 0.7]]), eta=0.6,
                      extra_rate=np.array([1e-6, 2e-6]))
    rng = np.random.default_rng(3)
    counts = rng.poisson(30.0, size=(4, 120, 2)).astype(float)
    cols = make_columns(counts)
    fast = decode(cols, p)
    ref = decode(cols, p, engine="numpy")
    assert np.isfinite(fast.loglik)
    assert fast.loglik == pytest.approx(ref.loglik, rel=1e-10)
    np.testing.assert_allclose(fast.posteriors, ref.posteriors, atol=1e-7)


def test_bad_engine_is_rejected():
    counts, _ = sample_model(_params(2), 3, 20, random_state=1)
    with pytest.raises(InputError, match="engine"):
        fit_decoder(make_columns(counts), engine="gpu")


def _child_estep(args, q):
    q.put(rodchain.fit_pass(*args)[0])


def test_forked_child_can_run_the_parallel_kernels():
    # a batch of runs and the experiment planner use worker processes; with numba's GNU OpenMP
    # layer a forked child that starts a parallel loop is killed by libgomp
    import multiprocessing as mp

    p = _params(2)
    counts, _ = sample_model(p, 8, 50, random_state=2)
    mask = np.ones(counts.shape[:2], bool)
    args = (counts, mask, *rodchain.spans(mask), p.eta, p.extra_rate, p.transmat, p.stationary)
    here = rodchain.fit_pass(*args)[0]  # the parent has started its thread pool
    ctx = mp.get_context("fork")
    q = ctx.Queue()
    child = ctx.Process(target=_child_estep, args=(args, q))
    child.start()
    child.join(120)
    assert child.exitcode == 0
    assert q.get(timeout=5) == here
