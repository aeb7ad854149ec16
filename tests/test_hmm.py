"""Tests of the batched hidden-Markov engine (probeseq.decoding.hmm).

Reference results come from (a) brute-force enumeration of every state path on tiny models
(exact by construction) and (b) hmmlearn 0.3.3 with fixed parameters.
"""

import itertools
import warnings

import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

from probeseq.decoding.chain import stationary_distribution
from probeseq.decoding.hmm import (
    forward_backward,
    forward_backward_scaled,
    run_em,
    transition_q,
    update_transmat,
    viterbi,
)
from probeseq.exceptions import InputError

hmm = pytest.importorskip("hmmlearn.hmm")  # source: hmmlearn 0.3.3

# The occasionally dishonest casino.
# source: Durbin, Eddy, Krogh & Mitchison 1998, ch. 3 p. 54, parameters as listed in
# docs/REFERENCES.md §3 (hmmlearn examples/plot_casino_example.py):
# F->L 0.05, L->F 0.10; fair die 1/6 per face; loaded die 1/10 for faces 1-5 and 1/2 for 6.
CASINO_A = np.array([[0.95, 0.05], [0.10, 0.90]])
CASINO_B = np.array([[1 / 6] * 6, [1 / 10] * 5 + [1 / 2]])
CASINO_START = np.array([0.5, 0.5])  # the start distribution varies between sources


def _sample_casino(n, rng, start=CASINO_START):
    states = np.empty(n, dtype=int)
    rolls = np.empty(n, dtype=int)
    s = rng.choice(2, p=start)
    for t in range(n):
        states[t] = s
        rolls[t] = rng.choice(6, p=CASINO_B[s])
        s = rng.choice(2, p=CASINO_A[s])
    return rolls, states


def _casino_hmmlearn(implementation="log", start=CASINO_START):
    m = hmm.CategoricalHMM(n_components=2, n_features=6, init_params="", params="", implementation=implementation)
    m.startprob_ = start
    m.transmat_ = CASINO_A
    m.emissionprob_ = CASINO_B
    return m


def _brute_force(le, a, p):
    """Exact loglik, posteriors, transition counts and best path by enumerating all paths."""
    n_steps, k = le.shape
    paths = np.array(list(itertools.product(range(k), repeat=n_steps)))
    with np.errstate(divide="ignore"):
        la, lp = np.log(a), np.log(p)
    score = lp[paths[:, 0]] + le[0, paths[:, 0]]
    for t in range(1, n_steps):
        score = score + la[paths[:, t - 1], paths[:, t]] + le[t, paths[:, t]]
    ll = logsumexp(score)
    w = np.exp(score - ll)
    post = np.zeros((n_steps, k))
    xi = np.zeros((n_steps, k, k))
    for t in range(n_steps):
        np.add.at(post[t], paths[:, t], w)
        if t > 0:
            np.add.at(xi[t], (paths[:, t - 1], paths[:, t]), w)
    best = int(np.argmax(score))
    return ll, post, xi, paths[best], score[best]


# ------------------------------------------------------------------------------------------
# brute force: exact
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize("k,n_steps", [(2, 7), (3, 5), (4, 4)])
def test_forward_backward_and_viterbi_equal_enumeration(k, n_steps):
    rng = np.random.default_rng(10 + k)
    n_seq = 5
    a = rng.dirichlet(np.ones(k), size=k)
    p = rng.dirichlet(np.ones(k))
    le = np.log(rng.random((n_seq, n_steps, k)))
    le[1, 2] = 0.0  # an unobserved (masked) site inside a sequence
    le[2, -2:] = 0.0  # trailing padding
    pw = (rng.random((n_seq, n_steps)) < 0.7).astype(float)
    res = forward_backward(le, a, p, pair_weight=pw, xi_per_sequence=True)
    tot = forward_backward(le, a, p, pair_weight=pw)
    lp, path = viterbi(le, a, p)
    xi_total = np.zeros((k, k))
    for r in range(n_seq):
        ll, post, xi_t, best, best_score = _brute_force(le[r], a, p)
        xi_r = (xi_t * pw[r][:, None, None])[1:].sum(0)
        xi_total += xi_r
        assert res.loglik[r] == pytest.approx(ll, abs=1e-12)
        np.testing.assert_allclose(res.posteriors[r], post, atol=1e-13)
        np.testing.assert_allclose(res.xi[r], xi_r, atol=1e-13)
        np.testing.assert_array_equal(path[r], best)
        assert lp[r] == pytest.approx(best_score, abs=1e-12)
    np.testing.assert_allclose(tot.xi, xi_total, atol=1e-12)
    # sequences of different real length: the best path ends at each one's last real step
    lengths = rng.integers(2, n_steps + 1, size=n_seq)
    lp_l, path_l = viterbi(le, a, p, lengths=lengths)
    for r, n in enumerate(lengths):
        _, _, _, best, best_score = _brute_force(le[r, :n], a, p)
        np.testing.assert_array_equal(path_l[r, :n], best)
        assert np.all(path_l[r, n:] == -1)
        assert lp_l[r] == pytest.approx(best_score, abs=1e-12)
    np.testing.assert_allclose(res.posteriors.sum(axis=2), 1.0, atol=1e-14)


def test_structural_zeros_and_impossible_sequence():
    # a chain that cannot leave state 1 and an observation impossible there
    a = np.array([[0.5, 0.5], [0.0, 1.0]])
    p = np.array([1.0, 0.0])
    le = np.zeros((2, 4, 2))
    le[0, 2] = [-np.inf, -1.0]  # forces a jump 0 -> 1 by site 2: possible
    le[1, 1] = [-np.inf, -1.0]
    le[1, 3] = [-1.0, -np.inf]  # then back to 0 at site 3: impossible
    res = forward_backward(le, a, p, xi_per_sequence=True)
    ll0, post0, _, best0, _ = _brute_force(le[0], a, p)
    assert res.loglik[0] == pytest.approx(ll0, abs=1e-12)
    np.testing.assert_allclose(res.posteriors[0], post0, atol=1e-13)
    assert res.loglik[1] == -np.inf
    assert np.all(res.posteriors[1] == 0.0) and np.all(np.isfinite(res.posteriors))
    _, path = viterbi(le, a, p)
    np.testing.assert_array_equal(path[0], best0)


# ------------------------------------------------------------------------------------------
# hmmlearn 0.3.3 on models both can express
# ------------------------------------------------------------------------------------------


@pytest.mark.parametrize("implementation", ["log", "scaling"])
def test_casino_matches_hmmlearn(implementation):
    # source: hmmlearn 0.3.3 CategoricalHMM with fixed parameters (init_params="", params="")
    rng = np.random.default_rng(1998)
    lengths = [300, 250, 300, 120]
    seqs = [_sample_casino(n, rng)[0] for n in lengths]
    model = _casino_hmmlearn(implementation)
    x = np.concatenate(seqs)[:, None]
    ref_post = model.predict_proba(x, lengths)
    ref_ll = [model.score(s[:, None]) for s in seqs]
    ref_vit = [model.decode(s[:, None], algorithm="viterbi") for s in seqs]

    n_max = max(lengths)
    le = np.zeros((len(seqs), n_max, 2))  # padding with log-emission 0 is exact
    for r, s in enumerate(seqs):
        le[r, : len(s)] = np.log(CASINO_B[:, s].T)
    res = forward_backward(le, CASINO_A, CASINO_START)
    lp, path = viterbi(le, CASINO_A, CASINO_START, lengths=lengths)
    off = 0
    for r, n in enumerate(lengths):
        assert abs(res.loglik[r] - ref_ll[r]) < 1e-8
        np.testing.assert_allclose(res.posteriors[r, :n], ref_post[off : off + n], atol=1e-8)
        np.testing.assert_array_equal(path[r, :n], ref_vit[r][1])
        assert abs(lp[r] - ref_vit[r][0]) < 1e-8
        assert np.all(path[r, n:] == -1)
        off += n


def test_casino_stationary_distribution():
    # source: docs/REFERENCES.md §3 check [lib]: stationary (2/3, 1/3)
    np.testing.assert_allclose(stationary_distribution(CASINO_A), [2 / 3, 1 / 3], atol=1e-14)
    pi = stationary_distribution(np.array([[0.2, 0.8, 0.0], [0.1, 0.6, 0.3], [0.5, 0.0, 0.5]]))
    np.testing.assert_allclose(pi @ np.array([[0.2, 0.8, 0.0], [0.1, 0.6, 0.3], [0.5, 0.0, 0.5]]), pi, atol=1e-14)


def test_poisson_hmm_matches_hmmlearn():
    # source: hmmlearn 0.3.3 PoissonHMM with fixed parameters
    rng = np.random.default_rng(7)
    k = 3
    lam = np.array([[0.2, 1.5, 0.1], [2.0, 0.3, 0.4], [0.5, 0.5, 3.0]])
    a = np.array([[0.8, 0.15, 0.05], [0.1, 0.7, 0.2], [0.25, 0.25, 0.5]])
    p = np.array([0.2, 0.5, 0.3])
    n_seq, n_steps = 6, 200
    states = rng.integers(0, k, size=(n_seq, n_steps))
    x = rng.poisson(lam[states])
    model = hmm.PoissonHMM(n_components=k, init_params="", params="")
    model.startprob_, model.transmat_, model.lambdas_ = p, a, lam
    xx = x.reshape(-1, 3)
    lengths = [n_steps] * n_seq
    ref_post = model.predict_proba(xx, lengths).reshape(n_seq, n_steps, k)
    le = stats.poisson.logpmf(x[:, :, None, :], lam[None, None]).sum(-1)
    res = forward_backward(le, a, p)
    assert abs(res.loglik.sum() - model.score(xx, lengths)) < 1e-8
    np.testing.assert_allclose(res.posteriors, ref_post, atol=1e-8)
    _, path = viterbi(le, a, p)
    np.testing.assert_array_equal(path.ravel(), model.decode(xx, lengths)[1])


def test_ten_thousand_sites_match_hmmlearn():
    # numerically safe over 1e4 sites: agreement with hmmlearn 0.3.3 (log implementation)
    rng = np.random.default_rng(3)
    rolls, _ = _sample_casino(10_000, rng)
    model = _casino_hmmlearn("log")
    le = np.log(CASINO_B[:, rolls].T)[None]
    res = forward_backward(le, CASINO_A, CASINO_START)
    ref = model.score(rolls[:, None])
    assert abs(res.loglik[0] - ref) < 1e-8
    np.testing.assert_allclose(res.posteriors[0], model.predict_proba(rolls[:, None]), atol=1e-8)
    lp, path = viterbi(le, CASINO_A, CASINO_START)
    ref_lp, ref_path = model.decode(rolls[:, None])
    np.testing.assert_array_equal(path[0], ref_path)
    assert abs(lp[0] - ref_lp) < 1e-8


def test_long_and_extreme_sequences_stay_finite():
    # 5e4 sites with log-emissions far below the float range in linear space
    rng = np.random.default_rng(4)
    n = 50_000
    le = -800.0 + np.log(rng.random((2, n, 3)))
    a = np.array([[0.9, 0.05, 0.05], [0.1, 0.8, 0.1], [0.2, 0.2, 0.6]])
    p = stationary_distribution(a)
    res = forward_backward(le, a, p)
    assert np.all(np.isfinite(res.loglik))
    np.testing.assert_allclose(res.posteriors.sum(-1), 1.0, atol=1e-12)
    # the constant -800 per site factors out exactly
    res0 = forward_backward(le + 800.0, a, p)
    np.testing.assert_allclose(res.loglik, res0.loglik - 800.0 * n, rtol=1e-12)
    np.testing.assert_allclose(res.posteriors, res0.posteriors, atol=1e-12)


def test_scaled_entry_equals_log_entry():
    rng = np.random.default_rng(5)
    e = rng.random((3, 40, 2)) * 1e-3
    a, p = CASINO_A, CASINO_START
    r1 = forward_backward(np.log(e), a, p, xi_per_sequence=True)
    r2 = forward_backward_scaled(e, a, p, xi_per_sequence=True)
    r3 = forward_backward_scaled(np.ascontiguousarray(e.transpose(1, 0, 2)), a, p, emission_is_time_major=True,
                                 xi_per_sequence=True)
    for r in (r2, r3):
        np.testing.assert_allclose(r.loglik, r1.loglik, rtol=1e-13)
        np.testing.assert_allclose(r.posteriors, r1.posteriors, atol=1e-13)
        np.testing.assert_allclose(r.xi, r1.xi, atol=1e-12)


def test_baum_welch_transition_step_matches_hmmlearn():
    # source: hmmlearn 0.3.3: one EM iteration with params="t" re-estimates only the
    # transitions as the row-normalised expected transition counts (transmat_prior = 1)
    rng = np.random.default_rng(8)
    lengths = [200, 200, 200]
    seqs = [_sample_casino(n, rng)[0] for n in lengths]
    start_a = np.array([[0.8, 0.2], [0.3, 0.7]])
    m = hmm.CategoricalHMM(n_components=2, n_features=6, init_params="", params="t", n_iter=1, tol=-np.inf)
    m.startprob_, m.transmat_, m.emissionprob_ = CASINO_START, start_a, CASINO_B
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m.fit(np.concatenate(seqs)[:, None], lengths)
    le = np.stack([np.log(CASINO_B[:, s].T) for s in seqs])
    res = forward_backward(le, start_a, CASINO_START)
    ours = res.xi / res.xi.sum(1, keepdims=True)
    np.testing.assert_allclose(ours, m.transmat_, atol=1e-10)


# ------------------------------------------------------------------------------------------
# M-step and EM loop
# ------------------------------------------------------------------------------------------


def test_update_transmat_never_lowers_q():
    rng = np.random.default_rng(9)
    for _ in range(50):
        k = rng.integers(2, 5)
        xi = rng.random((k, k)) * rng.integers(1, 200)
        g0 = rng.random(k) * rng.integers(1, 500)  # a heavy start term
        old = rng.dirichlet(np.ones(k), size=k)
        new = update_transmat(xi, g0, old)
        np.testing.assert_allclose(new.sum(1), 1.0, atol=1e-12)
        assert transition_q(new, xi, g0) >= transition_q(old, xi, g0) - 1e-9
    # without a start term the update is the row-normalised counts
    xi = np.array([[3.0, 1.0], [2.0, 6.0]])
    np.testing.assert_allclose(update_transmat(xi, np.zeros(2), CASINO_A), [[0.75, 0.25], [0.25, 0.75]])


def test_update_transmat_keeps_row_without_counts():
    xi = np.array([[3.0, 1.0, 0.0], [0.0, 0.0, 0.0], [1.0, 1.0, 2.0]])
    old = np.full((3, 3), 1 / 3)
    new = update_transmat(xi, np.zeros(3), old)
    np.testing.assert_allclose(new[1], old[1])


def test_run_em_reports_convergence_and_best():
    lls = iter([-10.0, -5.0, -4.0, -3.9999999])

    def step(i):
        return next(lls), i + 1

    tr = run_em(step, 0, max_iter=10, tol=1e-3)
    assert tr.converged and tr.n_iter == 3 and tr.params == 3
    assert tr.last_change == pytest.approx(1e-7)

    def slow(i):
        return -1.0 / (i + 1), i + 1

    tr = run_em(slow, 0, max_iter=4, tol=1e-9)
    assert not tr.converged and tr.n_iter == 4 and tr.params == 4
    assert tr.last_change == pytest.approx(-1 / 5 + 1 / 4)
    assert len(tr.history) == 5


def test_bad_shapes_raise():
    with pytest.raises(InputError, match="transmat"):
        forward_backward(np.zeros((1, 3, 2)), np.eye(3), np.ones(3) / 3)
    with pytest.raises(InputError, match="startprob"):
        viterbi(np.zeros((1, 3, 2)), CASINO_A, np.array([0.3, 0.3]))
    with pytest.raises(InputError, match="log_emission"):
        forward_backward(np.zeros((3, 2)), CASINO_A, CASINO_START)
