"""Tests of the rod model: emission model, fit, decoding, model comparison and bad input."""

import json

import numpy as np
import pytest
from scipy import stats

from probeseq.decoding import chain, passes
from probeseq.decoding.chain import runs_table
from probeseq.decoding.decode import _check_columns, decode, fit_decoder, sample_model
from probeseq.decoding.model import DecoderParams, emission_baseline, emission_factors, split_counts
from probeseq.exceptions import ConvergenceWarning, DataQualityWarning, InputError
from probeseq.lattice.rodcolumns import RodColumns

hmm_base = pytest.importorskip("hmmlearn.base")  # source: hmmlearn 0.3.3


def _persistent(lam, comp):
    comp = np.asarray(comp, float)
    return lam * np.eye(comp.size) + (1 - lam) * comp[None, :]


def make_columns(counts, mask=None, metals=None, resolvable=True):
    n_rods, n_sites, k = counts.shape
    if mask is None:
        mask = np.ones((n_rods, n_sites), bool)
    metals = metals or ("Co", "Zn", "Ni", "Cu")[:k]
    side = int(np.ceil(np.sqrt(n_rods)))
    xy = np.stack(np.divmod(np.arange(n_rods), side), axis=1).astype(float) * 1.5
    return RodColumns(
        counts=counts, mask=mask, metals=metals, rod_xy_nm=xy, tilt=np.zeros(2), z_ref_nm=0.0,
        site_z_nm=np.arange(n_sites) * 0.23, pitch_nm=0.23, resolvable=resolvable,
    )


class TiedReference(hmm_base.BaseHMM):
    """The tied emission model written out as an explicit two-term Poisson mixture, in
    hmmlearn 0.3.3 through its documented `_compute_log_likelihood` hook (as hmmlearn's own
    StubHMM test does). The last column of X flags observed sites; masked rows get log 1."""

    def __init__(self, params: DecoderParams):
        super().__init__(n_components=params.n_metals, init_params="", params="")
        self.eta, self.mu = params.eta, params.extra_rate
        self.startprob_ = params.stationary
        self.transmat_ = params.transmat

    def _compute_log_likelihood(self, X):
        x, obs = X[:, :-1], X[:, -1] > 0
        base = stats.poisson.logpmf(x, self.mu).sum(1)
        out = np.empty((len(x), len(self.mu)))
        for k in range(len(self.mu)):
            xm = x.copy()
            xm[:, k] -= 1
            own = stats.poisson.logpmf(xm, self.mu).sum(1)  # -inf where x_k = 0
            out[:, k] = np.logaddexp(np.log(1 - self.eta) + base, np.log(self.eta) + own)
        out[~obs] = 0.0
        return out


TRUE_2 = DecoderParams.from_components(_persistent(0.7, [0.6, 0.4]), eta=0.5, crosstalk_rate=0.05, background=0.01)


@pytest.fixture(scope="module")
def run_2metal():
    counts, states = sample_model(TRUE_2, 300, 200, random_state=11)
    cols = make_columns(counts)
    return cols, states, fit_decoder(cols, random_state=0)


# ------------------------------------------------------------------------------------------
# the emission model
# ------------------------------------------------------------------------------------------


def test_emission_factor_is_the_two_term_mixture():
    rng = np.random.default_rng(1)
    p = TRUE_2
    x = rng.poisson(0.6, size=(500, 2)).astype(float)
    base = stats.poisson.pmf(x, p.extra_rate).prod(1)
    for k in range(2):
        xm = x.copy()
        xm[:, k] -= 1
        mix = (1 - p.eta) * base + p.eta * stats.poisson.pmf(xm, p.extra_rate).prod(1)
        np.testing.assert_allclose(emission_factors(x, p)[:, k] * base, mix, rtol=1e-12)


def _integer_likelihood(y, k, p):
    """P(y | state k) of the integer model, written out with scipy."""
    base = stats.poisson.pmf(y, p.extra_rate).prod(-1)
    ym = y.copy()
    ym[..., k] -= 1
    own = stats.poisson.pmf(ym, p.extra_rate).prod(-1)  # 0 where y_k = 0
    return (1 - p.eta) * base + p.eta * own


def test_fractional_counts_are_a_mixture_over_the_split_ion():
    # a site with a split ion: P(x | k) = pi_0 P(n | k) + sum_j pi_j P(n + e_j | k)
    p = DecoderParams(transmat=np.full((3, 3), 1 / 3), eta=0.45, extra_rate=np.array([0.05, 0.2, 0.1]))
    x = np.array([[0.6, 0.4, 0.0], [1.3, 0.0, 0.5], [0.0, 2.0, 0.25], [1.0, 0.0, 2.0], [0.7, 0.7, 0.6]])
    n, pi, pi0 = split_counts(x)
    np.testing.assert_allclose(pi.sum(1) + pi0, 1.0)
    for k in range(3):
        ref = pi0 * _integer_likelihood(n, k, p)
        for j in range(3):
            ref = ref + pi[:, j] * _integer_likelihood(n + np.eye(3)[j], k, p)
        ours = np.exp(emission_baseline(x, p.extra_rate)) * emission_factors(x, p)[:, k]
        np.testing.assert_allclose(ours, ref, rtol=1e-12)


def test_split_ion_expected_counts_by_enumeration():
    # E[y_j | x] (the M-step statistic) against explicit enumeration over state, detection
    # and split-ion channel, for arbitrary state posteriors
    from probeseq.decoding.model import _split_expected_counts, _split_terms

    rng = np.random.default_rng(3)
    p = DecoderParams(transmat=np.full((3, 3), 1 / 3), eta=0.6, extra_rate=np.array([0.05, 0.2, 0.1]))
    x = np.array([[0.6, 0.4, 0.0], [1.3, 0.0, 0.5], [0.0, 2.0, 0.25]])
    prior = rng.dirichlet(np.ones(3), size=3)
    n, pi, pi0 = split_counts(x)
    c, b, xe = _split_terms(n, pi, pi0, p.extra_rate)
    fac = (1 - p.eta) + xe * (p.eta / p.extra_rate)
    gamma = prior * fac / (prior * fac).sum(1, keepdims=True)
    ours = _split_expected_counts(n, c, b, gamma, p.eta, p.extra_rate, fac)
    for s in range(3):
        ref = np.zeros(3)
        tot = 0.0
        for k in range(3):
            for j, wj in [(None, pi0[s])] + [(j, pi[s, j]) for j in range(3)]:
                y = n[s] + (np.eye(3)[j] if j is not None else 0)
                w = prior[s, k] * wj * _integer_likelihood(y, k, p)
                ref += w * y
                tot += w
        np.testing.assert_allclose(ours[s], ref / tot, rtol=1e-12)


def test_split_ions_do_not_derail_the_fit():
    # 30 % of detected ions split 0.6 / 0.4 between the true and the other channel
    rng = np.random.default_rng(12)
    counts, states = sample_model(TRUE_2, 300, 200, random_state=5)
    own = np.take_along_axis(counts, states[:, :, None], 2)[:, :, 0] >= 1
    r, t = np.nonzero(own & (rng.random(states.shape) < 0.3))
    split = counts.copy()
    split[r, t, states[r, t]] -= 0.4
    split[r, t, 1 - states[r, t]] += 0.4
    res = fit_decoder(make_columns(split), random_state=0)
    oracle = decode(make_columns(split), TRUE_2)
    assert abs(res.eta - TRUE_2.eta) < 0.03 and abs(res.persistence - TRUE_2.persistence) < 0.05
    np.testing.assert_allclose(res.stationary, TRUE_2.stationary, atol=0.015)
    acc = np.mean(res.posteriors.argmax(2) == states)
    assert acc >= 0.98 * np.mean(oracle.posteriors.argmax(2) == states)


def test_loglik_and_posteriors_match_hmmlearn_with_explicit_mixture():
    # source: hmmlearn 0.3.3 BaseHMM with the mixture written out (TiedReference)
    p = DecoderParams(transmat=np.array([[0.8, 0.15, 0.05], [0.1, 0.85, 0.05], [0.2, 0.2, 0.6]]),
                      eta=0.45, extra_rate=np.array([0.05, 0.1, 0.02]))
    counts, _ = sample_model(p, 12, 150, random_state=2)
    mask = np.ones((12, 150), bool)
    mask[0, :20] = False  # leading masked sites
    mask[1, -35:] = False  # trailing
    mask[2, 60:64] = False  # a gap inside the rod
    mask[3, ::7] = False  # scattered gaps
    mask[4] = False  # a rod with no observed site
    res = decode(make_columns(counts, mask), p)
    ref = TiedReference(p)
    total = 0.0
    assert np.all(res.viterbi[4] == -1) and np.all(res.per_rod_transitions[4] == 0)
    for r in [r for r in range(12) if r != 4]:
        obs = np.flatnonzero(mask[r])
        lo, hi = obs[0], obs[-1] + 1  # hmmlearn gets the rod from its first to last observed site
        X = np.column_stack([counts[r, lo:hi], mask[r, lo:hi]])
        total += ref.score(X)
        post = ref.predict_proba(X)
        keep = mask[r, lo:hi]
        np.testing.assert_allclose(res.posteriors[r, lo:hi][keep], post[keep], atol=1e-8)
        vit = ref.decode(X, algorithm="viterbi")[1]
        np.testing.assert_array_equal(res.viterbi[r, lo:hi][keep], vit[keep])
    assert abs(res.loglik - total) < 1e-8
    assert np.all(res.posteriors[~mask] == 0) and np.all(res.viterbi[~mask] == -1)


def test_leading_masked_sites_are_exact_with_stationary_start():
    counts, _ = sample_model(TRUE_2, 4, 80, random_state=3)
    mask = np.ones((4, 80), bool)
    mask[:, :25] = False
    full = decode(make_columns(counts, mask), TRUE_2)
    trimmed = decode(make_columns(counts[:, 25:]), TRUE_2)
    assert full.loglik == pytest.approx(trimmed.loglik, abs=1e-9)
    np.testing.assert_allclose(full.posteriors[:, 25:], trimmed.posteriors, atol=1e-12)
    np.testing.assert_array_equal(full.viterbi[:, 25:], trimmed.viterbi)


# ------------------------------------------------------------------------------------------
# fit: recovery, oracle, model comparison
# ------------------------------------------------------------------------------------------


def test_parameter_recovery(run_2metal):
    _, _, res = run_2metal
    # tolerances of issue 5 (eta 0.03, composition 0.01, persistence 0.05) on 300 x 200 sites
    assert abs(res.eta - TRUE_2.eta) < 0.03
    np.testing.assert_allclose(res.stationary, TRUE_2.stationary, atol=0.01)
    assert abs(res.persistence - TRUE_2.persistence) < 0.05
    np.testing.assert_allclose(res.extra_rate, TRUE_2.extra_rate, atol=0.01)
    assert res.converged and res.n_params == 5 and res.n_params_indep == 4


def test_fit_reaches_the_oracle(run_2metal):
    cols, states, res = run_2metal
    oracle = decode(cols, TRUE_2)
    acc_fit = np.mean(res.posteriors.argmax(2) == states)
    acc_oracle = np.mean(oracle.posteriors.argmax(2) == states)
    assert acc_fit >= 0.98 * acc_oracle
    assert acc_oracle > 0.8  # the decode is informative: the prior alone gives 0.6
    # the maximum-likelihood fit is at least as likely as the truth
    assert res.loglik >= oracle.loglik - 1e-6


def test_em_history_is_monotone(run_2metal):
    h = run_2metal[2].loglik_history
    assert np.all(np.diff(h) >= -1e-8 * np.abs(h[1:]))


def test_markov_vs_independent_sites():
    # persistent chain: the likelihood-ratio test rejects independence and BIC agrees
    counts, _ = sample_model(TRUE_2, 60, 150, random_state=4)
    res = fit_decoder(make_columns(counts), n_starts=2, random_state=1)
    assert res.lr_df == 1 and res.lr_pvalue < 1e-6 and res.bic < res.bic_indep
    assert res.lr_stat == pytest.approx(2 * (res.loglik - res.loglik_indep))
    # independent sites (every row equal to the composition): no evidence of memory
    indep = DecoderParams.from_components(_persistent(0.0, [0.6, 0.4]), eta=0.6, crosstalk_rate=0.05, background=0.01)
    counts, _ = sample_model(indep, 60, 150, random_state=5)
    res = fit_decoder(make_columns(counts), n_starts=2, random_state=1)
    assert res.lr_pvalue > 0.01 and res.bic_indep < res.bic
    assert abs(res.persistence) < 0.1


def test_three_metals_and_reproducibility():
    p = DecoderParams.from_components(_persistent(0.8, [0.5, 0.3, 0.2]), eta=0.8, crosstalk_rate=0.1, background=0.02)
    counts, states = sample_model(p, 80, 120, random_state=6)
    cols = make_columns(counts)
    a = fit_decoder(cols, n_starts=3, random_state=42)
    b = fit_decoder(cols, n_starts=3, random_state=42)
    assert a.loglik == b.loglik
    np.testing.assert_array_equal(a.viterbi, b.viterbi)
    assert a.lr_df == 4 and a.n_params == 3 * 2 + 1 + 3
    assert abs(a.eta - 0.8) < 0.05 and abs(a.persistence - 0.8) < 0.08
    assert np.mean(a.viterbi == states) > 0.9


# ------------------------------------------------------------------------------------------
# decoded outputs
# ------------------------------------------------------------------------------------------


def test_per_rod_statistics_and_uncertain_flags(run_2metal):
    cols, _, res = run_2metal
    n_pairs = (cols.mask[:, 1:] & cols.mask[:, :-1]).sum(1)
    np.testing.assert_allclose(res.per_rod_transitions.sum((1, 2)), n_pairs, rtol=1e-10)
    np.testing.assert_allclose(res.per_rod_occupancy.sum(1), cols.mask.sum(1), rtol=1e-10)
    np.testing.assert_array_equal(res.uncertain, res.posteriors.max(2) < 0.8)
    assert 0 < res.uncertain.sum() < res.uncertain.size
    runs = res.runs
    assert runs["length"].sum() == cols.mask.sum()
    assert np.all((runs["mean_posterior"] > 0) & (runs["mean_posterior"] <= 1))
    d = res.to_dict()
    json.dumps(d)
    assert d["n_obs"] == cols.mask.sum() and d["metals"] == ["Co", "Zn"]


def test_runs_table_by_hand():
    path = np.array([[0, 0, 1, 1, 1, 0], [1, 1, 1, 0, 0, 0]])
    mask = np.array([[1, 1, 1, 0, 1, 1], [1, 1, 1, 1, 1, 1]], bool)
    post = np.zeros((2, 6, 2))
    post[0, :, :] = [0.5, 0.5]
    post[1, :, 1] = [0.9, 0.8, 0.7, 0.0, 0.0, 0.0]
    post[1, :, 0] = 1 - post[1, :, 1]
    runs = runs_table(path, mask, post)
    np.testing.assert_array_equal(runs["rod"], [0, 0, 0, 0, 1, 1])
    np.testing.assert_array_equal(runs["first_site"], [0, 2, 4, 5, 0, 3])
    np.testing.assert_array_equal(runs["last_site"], [1, 2, 4, 5, 2, 5])
    np.testing.assert_array_equal(runs["length"], [2, 1, 1, 1, 3, 3])
    np.testing.assert_array_equal(runs["metal"], [0, 1, 1, 0, 1, 0])
    np.testing.assert_allclose(runs["mean_posterior"], [0.5, 0.5, 0.5, 0.5, 0.8, 1.0])


def test_decode_with_given_params():
    counts, _ = sample_model(TRUE_2, 5, 40, random_state=8)
    res = decode(make_columns(counts), TRUE_2, uncertain_below=0.9)
    assert res.n_iter == 0 and np.isnan(res.loglik_indep) and np.isnan(res.lr_pvalue)
    np.testing.assert_allclose(res.transmat, TRUE_2.transmat)
    assert res.uncertain_below == 0.9
    d = res.to_dict()
    assert d["lr_pvalue"] is None
    json.dumps(d)


def test_params_split_and_roundtrip():
    p = DecoderParams.from_components(_persistent(0.5, [0.7, 0.3]), eta=0.4, crosstalk_rate=0.1, background=[0.0, 0.02])
    np.testing.assert_allclose(p.extra_rate, [0.07, 0.05])
    assert p.persistence == pytest.approx(0.5)
    assert p.crosstalk_rate == pytest.approx(0.1)  # background 0 in one channel: the split is exact
    np.testing.assert_allclose(p.background, [0.0, 0.02], atol=1e-12)
    np.testing.assert_allclose(p.extra_rate, p.crosstalk_rate * p.stationary + p.background)


# ------------------------------------------------------------------------------------------
# bad input
# ------------------------------------------------------------------------------------------


def test_one_metal_with_counts_is_refused():
    counts = np.zeros((5, 30, 2))
    counts[:, ::2, 0] = 1
    with pytest.raises(InputError, match="at least two metal channels.*Co"):
        fit_decoder(make_columns(counts))


def test_all_masked_is_refused():
    counts, _ = sample_model(TRUE_2, 3, 10, random_state=1)
    with pytest.raises(InputError, match="all 30 sites are masked"):
        fit_decoder(make_columns(counts, np.zeros((3, 10), bool)))


def test_negative_counts_and_bad_options_are_refused():
    counts, _ = sample_model(TRUE_2, 3, 10, random_state=1)
    bad = counts.copy()
    bad[0, 0, 0] = -1
    with pytest.raises(InputError, match="negative"):
        fit_decoder(make_columns(bad))
    for kw, word in [({"n_starts": 0}, "n_starts"), ({"max_iter": 0}, "max_iter"), ({"tol": -1.0}, "tol"),
                     ({"uncertain_below": 1.5}, "uncertain_below")]:
        with pytest.raises(InputError, match=word):
            fit_decoder(make_columns(counts), **kw)
    with pytest.raises(InputError, match="params describe 3 metals"):
        decode(make_columns(counts), DecoderParams(np.full((3, 3), 1 / 3), 0.5, np.full(3, 0.1)))


def test_metal_with_almost_no_counts_warns_and_names_it():
    p = DecoderParams(transmat=np.array([[0.9, 0.1, 0.0], [0.1, 0.9, 0.0], [0.5, 0.5, 0.0]]),
                      eta=0.5, extra_rate=np.array([0.05, 0.05, 1e-6]))
    counts, _ = sample_model(p, 20, 60, random_state=9)
    counts[0, 5, 2] = 1.0  # one stray count of the third metal
    with pytest.warns(DataQualityWarning, match="metal Ni has almost no counts"):
        res = fit_decoder(make_columns(counts), n_starts=1, random_state=0)
    assert any("Ni" in w for w in res.warnings)
    assert res.stationary[2] < 0.01 and np.all(np.isfinite(res.posteriors))


def test_non_convergence_warns_with_last_change_and_returns_best():
    counts, _ = sample_model(TRUE_2, 40, 100, random_state=10)
    with pytest.warns(ConvergenceWarning, match=r"did not converge in max_iter=1 .*last change in log-likelihood"):
        res = fit_decoder(make_columns(counts), n_starts=1, max_iter=1, random_state=0)
    assert not res.converged and res.n_iter == 1
    assert np.isfinite(res.loglik) and res.loglik == pytest.approx(max(res.loglik_history))
    assert any("did not converge" in w for w in res.warnings)


def _mean_posterior_numpy(p, rod, start, length, post):
    """Each run's posterior sum by numpy.add.reduceat over every site from its start to the next run's."""
    n_rods, n_sites = p.shape
    site_post = np.take_along_axis(post, np.maximum(p, 0)[:, :, None].astype(np.intp), axis=2)[:, :, 0]
    site_post[p < 0] = 0
    sums = np.add.reduceat(site_post.reshape(-1), rod * n_sites + start, dtype=np.float64)
    return sums / np.maximum(length, 1)


@pytest.mark.parametrize("dtype, path_dtype", [(np.float32, np.int8), (np.float64, np.int64)])
def test_run_mean_posteriors_are_numpys(rng, dtype, path_dtype):
    n_rods, n_sites, k = 12, 3000, 3
    path = np.repeat(rng.integers(0, k, (n_rods, n_sites // 20 + 1)), 20, axis=1)[:, :n_sites]
    path[rng.random(path.shape) < 0.1] = rng.integers(0, k)  # short runs too
    mask = np.ones((n_rods, n_sites), bool)  # observed, then long masked stretches and whole masked rods
    mask[:, 400:2900] = False
    mask[4:7] = False
    post = (rng.random((n_rods, n_sites, k)) * 2.0 ** rng.integers(-40, 0, (n_rods, n_sites, k))).astype(dtype)
    runs = chain.list_runs(path.astype(path_dtype), mask, post)
    p = chain.masked_paths(path.astype(path_dtype), mask)
    ref = _mean_posterior_numpy(p, runs["rod"], runs["first_site"], runs["length"], post)
    assert runs["mean_posterior"].tobytes() == ref.tobytes()
    assert (runs["length"] > 128).any() and runs["rod"].size > 100
    with pytest.raises(IndexError):
        passes.run_posterior_sums(np.full((2, 3), k, path_dtype), post[:2, :3], np.array([0]), np.array([0]))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_pair_agreement_matches_numpy(rng, dtype):
    """The compiled agreement of rod pairs (the copy test's) against the numpy formula: mean over
    the sites both observe of sum_k P_i(k) P_j(k), NaN for pairs sharing none; and the mean
    posterior over the observed sites."""
    n_rods, n_sites, k = 30, 70, 3
    post = rng.dirichlet(np.ones(k), (n_rods, n_sites)).astype(dtype)
    mask = rng.random((n_rods, n_sites)) < 0.6
    mask[5] = False  # a rod with nothing observed: its pairs share no site
    pairs = rng.integers(0, n_rods, (200, 2))
    pairs[0] = (5, 7)
    agree, mean = passes.pair_agreement(post, mask, pairs)
    p64 = post.astype(np.float64)
    for q, (i, j) in enumerate(pairs):
        both = mask[i] & mask[j]
        if not both.any():
            assert np.isnan(agree[q])
            continue
        assert agree[q] == pytest.approx(float((p64[i] * p64[j]).sum(-1)[both].mean()), rel=1e-12)
    assert np.isnan(agree[0])
    np.testing.assert_allclose(mean, p64[mask].mean(axis=0), rtol=1e-12)
    # whatever the number of threads
    from probeseq import runtime

    before = runtime.kernel_threads()
    try:
        runtime.configure(1)
        a1, m1 = passes.pair_agreement(post, mask, pairs)
    finally:
        runtime.configure(before)
    np.testing.assert_array_equal(a1, agree)
    np.testing.assert_array_equal(m1, mean)


def test_count_totals_read_only_observed_sites(rng):
    counts = rng.poisson(0.6, (20, 50, 3)).astype(np.float32)
    counts[rng.random(counts.shape) < 0.1] += np.float32(1 / 3)
    mask = rng.random((20, 50)) < 0.7
    ref = (mask[:, :, None] * counts.astype(np.float64)).sum(axis=(0, 1))
    bad = counts.copy()
    bad[~mask] = np.nan
    bad[np.nonzero(~mask)[0][0], np.nonzero(~mask)[1][0]] = -1.0
    per_metal, non_finite, negative = passes.count_totals(bad, mask)
    np.testing.assert_allclose(per_metal, ref, rtol=1e-14)
    assert not non_finite and not negative
    whole = np.floor(counts)
    assert passes.count_totals(whole, mask)[0].tolist() == (mask[:, :, None] * whole).sum(axis=(0, 1)).tolist()
    assert _check_columns(make_columns(bad, mask)) == []  # bad values at masked sites only: accepted
    r, t = np.argwhere(mask)[0]
    for value, word in ((np.inf, "non-finite"), (-0.5, "negative")):
        worse = bad.copy()
        worse[r, t, 1] = value
        with pytest.raises(InputError, match=word):
            fit_decoder(make_columns(worse, mask))


def test_large_runs_refine_the_start_on_a_share_of_the_rods(run_2metal, monkeypatch):
    # with more than REFINE_FACTOR * SCREEN_SITES observed sites, the best start is refined by EM on
    # 1/REFINE_FACTOR of the whole rods before the EM on all of them; the fit is the same to tolerance
    import probeseq.decoding.decode as dmod

    cols, _, plain = run_2metal
    calls = []
    real = dmod._screen_data

    def spy(data, max_sites, segment, rng):
        calls.append((max_sites, segment))
        return real(data, max_sites, segment, rng)

    monkeypatch.setattr(dmod, "_screen_data", spy)
    monkeypatch.setattr(dmod, "SCREEN_SITES", 2000)  # 60,000 sites: well above 16 x 2000
    refined = fit_decoder(cols, random_state=0)
    n_obs = int(cols.mask.sum())
    assert calls[1] == (n_obs // dmod.REFINE_FACTOR, cols.n_sites)  # whole rods, not segments
    tol = 1e-6 * n_obs
    assert abs(refined.loglik - plain.loglik) < 10 * tol + 1e-6 * abs(plain.loglik)
    np.testing.assert_allclose(refined.transmat, plain.transmat, atol=2e-3)
    assert abs(refined.eta - plain.eta) < 2e-3


def test_site_calls_get_more_sites_right_than_the_viterbi_path():
    # The metal of largest posterior at each site is the decode with the fewest expected wrong sites
    # (Rabiner 1989, the "individually most likely state", docs/REFERENCES.md); the Viterbi path is
    # the most probable sequence as a whole and, where sites carry little evidence, fills gaps with
    # the more persistent metal. On a short-repeat chain seen at eta 0.35 the calls, which the
    # tracks table reports, are right more often.
    params = DecoderParams(transmat=np.array([[0.70, 0.30], [0.22, 0.78]]), eta=0.35, extra_rate=np.array([0.02, 0.02]))
    counts, states = sample_model(params, 300, 300, random_state=4)
    dec = decode(make_columns(counts), params)
    calls = dec.posteriors.argmax(axis=-1)
    acc_calls = float((calls == states).mean())
    acc_path = float((dec.viterbi == states).mean())
    assert acc_calls > acc_path + 0.005, (acc_calls, acc_path)
