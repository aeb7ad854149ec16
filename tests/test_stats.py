"""Sequence statistics against textbook formulas, reference packages and data of known truth."""

import json
import math
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats as sps

from probeseq.decoding.chain import mean_run_lengths, stationary_distribution
from probeseq.exceptions import DataQualityWarning, InputError
from probeseq.simulation.simulate import markov_sequences
from probeseq.statistics import agreement as agreement_mod
from probeseq.statistics.agreement import neighbour_pairs, rod_agreement
from probeseq.statistics.markov import (
    entropy_bits,
    entropy_rate_bits,
    g2_markov_test,
    persistence,
    transition_counts_from_paths,
    transition_matrix,
)
from probeseq.statistics.runs import decoded_runs, run_length_distribution, runs_expectation, runs_test
from probeseq.statistics.summary import compute_statistics, statistics_from_arrays


# ---------------------------------------------------------------------- generators with known truth
def markov_chains(rng, n_rods, n_sites, f, lam):
    """The simulator's chains (P(stay in k) = f_k + lam (1 - f_k)), as int64."""
    return markov_sequences(rng, n_rods, n_sites, np.asarray(f, float), lam).astype(np.int64)


def true_transmat(f, lam):
    f = np.asarray(f, float)
    return lam * np.eye(len(f)) + (1 - lam) * np.ones((len(f), 1)) * f[None, :]


def copied_rods(rng, n_rods, n_sites, f, copy_error, lam=0.0):
    """One master chain repeated by every rod, each site redrawn from f with prob copy_error."""
    master = markov_chains(rng, 1, n_sites, f, lam)[0]
    seq = np.broadcast_to(master, (n_rods, n_sites)).copy()
    err = rng.random(seq.shape) < copy_error
    fresh = markov_chains(rng, n_rods, n_sites, f, 0.0)
    seq[err] = fresh[err]
    return seq


def grid_pairs(n):
    """4-connected neighbour pairs (i < j) of an n x n square grid of rods."""
    idx = np.arange(n * n).reshape(n, n)
    pairs = np.concatenate([
        np.stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()], axis=1),
        np.stack([idx[:-1, :].ravel(), idx[1:, :].ravel()], axis=1),
    ])
    return pairs


def forward_backward_binary_flip(obs, transmat, flip):
    """Exact posteriors and expected transition counts of a 2-state HMM whose observation is the
    state flipped with probability ``flip`` (scaled forward-backward, Rabiner 1989 section V.A)."""
    r, t = obs.shape
    a = np.asarray(transmat, float)
    mu = stationary_distribution(a)
    e = np.where(obs[:, :, None] == np.arange(2)[None, None, :], 1 - flip, flip)  # (r, t, 2)
    alpha = np.empty((r, t, 2))
    c = np.empty((r, t))
    x = mu[None, :] * e[:, 0]
    c[:, 0] = x.sum(1)
    alpha[:, 0] = x / c[:, 0, None]
    for s in range(1, t):
        x = (alpha[:, s - 1] @ a) * e[:, s]
        c[:, s] = x.sum(1)
        alpha[:, s] = x / c[:, s, None]
    beta = np.ones((r, t, 2))
    xi = np.zeros((r, 2, 2))
    for s in range(t - 2, -1, -1):
        nxt = e[:, s + 1] * beta[:, s + 1]
        beta[:, s] = (nxt @ a.T) / c[:, s + 1, None]
        xi += alpha[:, s, :, None] * a[None] * nxt[:, None, :] / c[:, s + 1, None, None]
    gamma = alpha * beta
    return gamma / gamma.sum(axis=2, keepdims=True), xi


# ---------------------------------------------------------------------- runs test
def test_runs_moments_textbook_check_value():
    # source: docs/REFERENCES.md §4 (Wald & Wolfowitz 1940 moments):
    # n1 = n2 = 10 -> E = 11, Var = 4.73684
    mean, var = runs_expectation(10, 10)
    assert mean == pytest.approx(11.0)
    assert var == pytest.approx(4.73684, abs=1e-5)


@pytest.mark.parametrize("n1,n2", [(7, 5), (3, 9), (6, 6)])
def test_runs_moments_match_exact_distribution(n1, n2):
    # source: exact law of the number of runs (Swed & Eisenhart 1943), as written in
    # docs/REFERENCES.md §4: P(R=2k) = 2 C(n1-1,k-1) C(n2-1,k-1) / C(n,n1), ...
    c = math.comb
    n = n1 + n2
    pmf = {}
    for k in range(1, n + 1):
        pmf[2 * k] = 2 * c(n1 - 1, k - 1) * c(n2 - 1, k - 1) / c(n, n1)
        pmf[2 * k + 1] = (c(n1 - 1, k - 1) * c(n2 - 1, k) + c(n1 - 1, k) * c(n2 - 1, k - 1)) / c(n, n1)
    r = np.array(list(pmf))
    p = np.array(list(pmf.values()))
    assert p.sum() == pytest.approx(1.0)
    mean, var = runs_expectation(n1, n2)
    assert mean == pytest.approx((r * p).sum())
    assert var == pytest.approx((r * r * p).sum() - (r * p).sum() ** 2)


@pytest.mark.parametrize("k,n", [(2, 40), (2, 500), (3, 120), (4, 77)])
def test_runs_test_matches_statsmodels(rng, k, n):
    # source: statsmodels 0.15 statsmodels.sandbox.stats.runs.runstest_1samp(correction=False),
    # which binarises x >= cutoff
    from statsmodels.sandbox.stats.runs import runstest_1samp

    seq = rng.integers(0, k, size=n)
    res = runs_test(seq[None, :], k)
    for s in range(k):
        x = (seq == s).astype(float)
        z_ref, p_ref = runstest_1samp(x, cutoff=0.5, correction=False)
        assert res["z"][s] == pytest.approx(z_ref, rel=1e-10, abs=1e-12)
        assert res["p"][s] == pytest.approx(p_ref, rel=1e-10, abs=1e-12)


def test_runs_test_combines_masked_stretches_as_separate_sequences(rng):
    seq = rng.integers(0, 2, size=(3, 60))
    mask = np.ones(seq.shape, bool)
    mask[0, 25:30] = False  # rod 0 splits into two stretches
    mask[1, :10] = False
    garbage = np.where(mask, seq, 1 - seq)  # values at masked sites must not matter
    res = runs_test(garbage, 2, mask=mask)
    r_sum = e_sum = v_sum = 0.0
    for rod, parts in ((0, [slice(0, 25), slice(30, 60)]), (1, [slice(10, 60)]), (2, [slice(0, 60)])):
        for sl in parts:
            x = seq[rod, sl]
            n1 = int((x == 1).sum())
            runs = 1 + int(np.count_nonzero(np.diff(x)))
            e, v = runs_expectation(n1, len(x) - n1)
            r_sum, e_sum, v_sum = r_sum + runs, e_sum + e, v_sum + v
    assert res["n_runs"][1] == r_sum
    assert res["z"][1] == pytest.approx((r_sum - e_sum) / math.sqrt(v_sum))


def test_runs_test_calibrated_on_independent_sites_and_detects_blocks():
    rng = np.random.default_rng(2024)
    p = np.array([runs_test(rng.integers(0, 2, size=(4, 80)), 2)["p"][0] for _ in range(300)])
    # two-sided normal test at 5 %: about 15 of 300 (binomial sd ~3.8)
    assert 3 <= (p < 0.05).sum() <= 30
    blocks = markov_chains(rng, 4, 80, [0.5, 0.5], 0.8)
    res = runs_test(blocks, 2)
    assert res["z"][0] < -5  # far fewer runs than random


# ---------------------------------------------------------------------- chain quantities
def test_entropy_rate_two_state_check_value():
    # source: Cover & Thomas 2006 Thm 4.2.4, two-state closed form; check value from
    # docs/REFERENCES.md §4: alpha = 0.05, beta = 0.1 -> 0.347263 bits
    a = np.array([[0.95, 0.05], [0.10, 0.90]])
    assert float(entropy_rate_bits(a)) == pytest.approx(0.347263, abs=1e-6)


def test_entropy_rate_two_state_closed_form(rng):
    # source: Cover & Thomas 2006 Thm 4.2.4: H = [beta H_b(alpha) + alpha H_b(beta)] / (alpha + beta)
    def hb(q):
        return -(q * math.log2(q) + (1 - q) * math.log2(1 - q))

    for al, be in rng.uniform(0.01, 0.99, size=(20, 2)):
        a = np.array([[1 - al, al], [be, 1 - be]])
        assert float(entropy_rate_bits(a)) == pytest.approx((be * hb(al) + al * hb(be)) / (al + be), rel=1e-12)


def test_entropy_of_independent_sites_equals_chain_with_identical_rows():
    # source: scipy 1.17 scipy.stats.entropy(p, base=2)
    f = np.array([0.2, 0.5, 0.3])
    a = np.tile(f, (3, 1))
    assert float(entropy_bits(f)) == pytest.approx(sps.entropy(f, base=2))
    assert float(entropy_rate_bits(a)) == pytest.approx(sps.entropy(f, base=2))


def test_casino_chain_stationary_and_run_lengths():
    # source: Durbin et al. 1998 p.54 occasionally dishonest casino (F->L 0.05, L->F 0.10); check values
    # from docs/REFERENCES.md §3: stationary (2/3, 1/3), mean runs 20 and 10
    a = np.array([[0.95, 0.05], [0.10, 0.90]])
    np.testing.assert_allclose(stationary_distribution(a), [2 / 3, 1 / 3])
    np.testing.assert_allclose(mean_run_lengths(a), [20.0, 10.0])


def test_persistence_two_state_is_one_minus_switch_probabilities(rng):
    for p01, p10 in rng.uniform(0.02, 0.98, size=(20, 2)):
        a = np.array([[1 - p01, p01], [p10, 1 - p10]])
        lam, lam_k = persistence(a)
        assert float(lam) == pytest.approx(1 - p01 - p10)
        np.testing.assert_allclose(lam_k, 1 - p01 - p10)


@pytest.mark.parametrize("lam", [0.0, 0.3, 0.9])
def test_persistence_and_run_length_of_simulator_chain(lam):
    # source: probeseq.simulation.simulate docstring: P(stay in k) = f_k + lam (1 - f_k),
    # mean run length of k = 1 / ((1 - lam)(1 - f_k))
    f = np.array([0.5, 0.3, 0.2])
    a = true_transmat(f, lam)
    got, per = persistence(a)
    assert float(got) == pytest.approx(lam, abs=1e-12)
    np.testing.assert_allclose(per, lam, atol=1e-12)
    np.testing.assert_allclose(mean_run_lengths(a), 1 / ((1 - lam) * (1 - f)))
    np.testing.assert_allclose(stationary_distribution(a), f)


def test_g2_matches_scipy_log_likelihood_contingency(rng):
    # source: scipy 1.17 scipy.stats.chi2_contingency(lambda_="log-likelihood"); Anderson & Goodman
    # 1957 df = (K-1)^2 (docs/REFERENCES.md §4)
    t = rng.integers(5, 60, size=(3, 3)).astype(float)
    g2, df, p = g2_markov_test(t)
    ref = sps.chi2_contingency(t, lambda_="log-likelihood", correction=False)
    assert float(g2) == pytest.approx(ref.statistic)
    assert df == ref.dof == 4
    assert float(p) == pytest.approx(ref.pvalue)


def test_transition_counts_from_paths_by_hand():
    paths = np.array([[0, 0, 1, 1, 0, 1], [1, 1, 1, 0, 0, 0]])
    mask = np.ones_like(paths, bool)
    mask[0, 3] = False  # breaks 1->1 and 1->0 around site 3
    tr, occ = transition_counts_from_paths(paths, 2, mask)
    np.testing.assert_array_equal(tr[0], [[1, 1], [0, 0]] + np.array([[0, 1], [0, 0]]))
    np.testing.assert_array_equal(tr[1], [[2, 0], [1, 2]])
    np.testing.assert_array_equal(occ, [[3, 2], [3, 3]])


# ---------------------------------------------------------------------- run lengths
def test_decoded_runs_mark_truncation_by_rod_ends_and_mask():
    paths = np.array([[0, 0, 1, 1, 1, 0, 0, 1], [1, 1, 1, 1, 1, 1, 1, 1]])
    mask = np.ones_like(paths, bool)
    mask[0, 6] = False
    runs = decoded_runs(paths, mask)
    np.testing.assert_array_equal(runs.rod, [0, 0, 0, 0, 1])
    np.testing.assert_array_equal(runs.state, [0, 1, 0, 1, 1])
    np.testing.assert_array_equal(runs.length, [2, 3, 1, 1, 8])
    np.testing.assert_array_equal(runs.start, [0, 2, 5, 7, 0])
    np.testing.assert_array_equal(runs.left_truncated, [True, False, False, True, True])
    np.testing.assert_array_equal(runs.right_truncated, [False, False, True, True, True])
    np.testing.assert_array_equal(runs.complete, [False, True, False, False, False])


def test_run_lengths_of_independent_sites_follow_geometric_law():
    # source: scipy 1.17 scipy.stats.geom; run length of iid Bernoulli(q) is Geometric(1 - q)
    # (docs/REFERENCES.md §4)
    rng = np.random.default_rng(77)
    q = 0.3
    seq = (rng.random((1, 100_000)) < q).astype(int)
    runs = decoded_runs(seq)
    d = run_length_distribution(runs, 2, composition=[1 - q, q], max_length=12)[1]
    ell = d["length"]
    np.testing.assert_allclose(d["pmf_independent"], sps.geom.pmf(ell, 1 - q))
    obs = d["n_complete"][:6]
    n_tot = d["n_complete"].sum() + (runs.complete & (runs.state == 1) & (runs.length > 12)).sum()
    exp = n_tot * sps.geom.pmf(ell[:6], 1 - q)
    obs = np.append(obs, n_tot - obs.sum())
    exp = np.append(exp, n_tot - exp.sum())
    assert sps.chisquare(obs, exp).pvalue > 1e-3
    assert d["mean_complete_sites"] == pytest.approx(1 / (1 - q), rel=0.02)


def test_kaplan_meier_survival_corrects_truncation_bias():
    rng = np.random.default_rng(5)
    f, lam = [0.5, 0.5], 0.7
    a = true_transmat(f, lam)  # P_kk = 0.85, mean run 6.67
    seq = markov_chains(rng, 4000, 15, f, lam)
    runs = decoded_runs(seq)
    d = run_length_distribution(runs, 2, transmat=a, composition=f, max_length=15)[0]
    # complete runs inside 15-site rods are strongly biased short
    assert d["mean_complete_sites"] < 0.7 * (1 / (1 - a[0, 0]))
    assert d["n_truncated"] > 0
    # source: scipy 1.17 scipy.stats.geom.sf; survival of the fitted chain's geometric law
    np.testing.assert_allclose(d["km_survival"][:6], sps.geom.sf(np.arange(1, 7), 1 - a[0, 0]), atol=0.02)
    np.testing.assert_allclose(d["sf_chain"], sps.geom.sf(d["length"], 1 - a[0, 0]))


# ---------------------------------------------------------------------- unbiasedness and coverage
def _stats_from_paths(seq, metals=("Co", "Zn"), **kw):
    tr, occ = transition_counts_from_paths(seq, len(metals))
    return statistics_from_arrays(per_rod_transitions=tr, per_rod_occupancy=occ, metals=metals,
                                    pitch_nm=0.2, viterbi=seq, **kw)


def test_intervals_of_chain_statistics_surround_the_fitted_estimate():
    # the decoder's fitted matrix (more persistent than the decoded paths' counts) is reported; the
    # rod bootstrap re-estimates from counts, so its replicates must be placed around that estimate
    rng = np.random.default_rng(3)
    f, lam = np.array([0.5, 0.5]), 0.8
    seq = markov_chains(rng, 300, 200, f, lam)
    fitted = true_transmat(f, 0.9)
    plain = _stats_from_paths(seq, random_state=1)
    st = _stats_from_paths(seq, random_state=1, transmat=fitted)
    for name in ("mean_run_length_sites.Co", "mean_run_length_sites.Zn", "persistence", "run_length_ratio.Zn"):
        est, lo, hi = st.interval(name)
        assert lo < est < hi, (name, est, lo, hi)
        # same spread as the counts' own bootstrap, moved by the difference of the two estimates
        e0, lo0, hi0 = plain.interval(name)
        assert abs(est - e0) > 0.05 * abs(e0)
        np.testing.assert_allclose(hi - lo, hi0 - lo0, rtol=1e-9)
    np.testing.assert_allclose(st.estimates["mean_run_length_sites.Co"], 1 / (1 - fitted[0, 0]))
    # statistics of the occupancy alone are not moved
    np.testing.assert_array_equal(st.replicates["composition.Zn"], plain.replicates["composition.Zn"])


def test_bootstrap_intervals_cover_truth_and_estimates_are_unbiased():
    f, lam = np.array([0.7, 0.3]), 0.8
    a = true_transmat(f, lam)
    truth = {
        "composition.Zn": 0.3,
        "mean_run_length_sites.Co": 1 / (1 - a[0, 0]),
        "mean_run_length_sites.Zn": 1 / (1 - a[1, 1]),
        "mean_run_length_nm.Zn": 0.2 / (1 - a[1, 1]),
        "persistence": lam,
        "entropy_rate_bits": float(entropy_rate_bits(a)),
    }
    n_rep = 30
    est = {k: [] for k in truth}
    cover = {k: 0 for k in truth}
    sd = {k: [] for k in truth}
    for rep in range(n_rep):
        rng = np.random.default_rng(1000 + rep)
        st = _stats_from_paths(markov_chains(rng, 40, 200, f, lam), n_boot=200, random_state=rep)
        for k, v in truth.items():
            e, lo, hi = st.interval(k)
            est[k].append(e)
            cover[k] += lo <= v <= hi
            sd[k].append(np.std(st.replicates[k]))
    for k, v in truth.items():
        # 95 % intervals: at least 24 of 30 cover (P < 0.002 if the coverage were really 95 %)
        assert cover[k] >= 24, (k, cover[k])
        # unbiased within the bootstrap error of the mean of 30 estimates
        se = np.mean(sd[k]) / math.sqrt(n_rep)
        assert abs(np.mean(est[k]) - v) < 3 * se, (k, np.mean(est[k]), v, se)
        # and the bootstrap sd agrees with the spread of the estimates over replicates
        assert 0.6 < np.mean(sd[k]) / np.std(est[k]) < 1.6, k


def test_expected_counts_remove_decoding_noise_that_biases_path_counting():
    """Noisy observations of a persistent chain: the fitted-model estimate (expected counts from
    forward-backward) is unbiased, while counting on the noisy path shortens the runs."""
    f, lam, flip = np.array([0.6, 0.4]), 0.85, 0.12
    a = true_transmat(f, lam)
    true_run = 1 / (1 - a[1, 1])
    ests, naive, on_path, cover = [], [], [], 0
    for rep in range(6):
        rng = np.random.default_rng(300 + rep)
        seq = markov_chains(rng, 40, 150, f, lam)
        obs = np.where(rng.random(seq.shape) < flip, 1 - seq, seq)
        post, xi = forward_backward_binary_flip(obs, a, flip)
        decoded = SimpleNamespace(metals=("Co", "Zn"), pitch_nm=0.25, viterbi=np.argmax(post, axis=2),
                                  posteriors=post, per_rod_transitions=xi, per_rod_occupancy=post.sum(axis=1))
        st = compute_statistics(decoded, n_boot=100, random_state=rep)
        e, lo, hi = st.interval("mean_run_length_sites.Zn")
        ests.append(e)
        cover += lo <= true_run <= hi
        tr, _ = transition_counts_from_paths(obs, 2)
        naive.append(float(mean_run_lengths(transition_matrix(tr.sum(0)))[1]))
        tr, _ = transition_counts_from_paths(decoded.viterbi, 2)
        on_path.append(float(mean_run_lengths(transition_matrix(tr.sum(0)))[1]))
    assert cover >= 4
    assert abs(np.mean(ests) - true_run) < 0.06 * true_run
    assert np.mean(naive) < 0.6 * true_run  # the noisy observations break runs
    assert np.mean(on_path) > 1.1 * true_run  # the most probable path smooths short runs away


# ---------------------------------------------------------------------- the wrapper and its output
def test_compute_statistics_output_keys_json_and_reproducible():
    rng = np.random.default_rng(8)
    seq = markov_chains(rng, 25, 120, [0.6, 0.4], 0.6)
    mask = np.ones(seq.shape, bool)
    mask[:5, :30] = False
    vit = np.where(mask, seq, -1)
    tr, occ = transition_counts_from_paths(vit, 2)
    decoded = SimpleNamespace(transmat=transition_matrix(tr.sum(0)), metals=("Ni", "Zn"), viterbi=vit,
                              posteriors=np.eye(2)[seq] * mask[..., None], mask=mask,
                              per_rod_transitions=tr, per_rod_occupancy=occ, lr_stat=55.0, lr_df=1,
                              lr_pvalue=1e-13, bic=1.0, bic_indep=2.0)
    columns = SimpleNamespace(pitch_nm=0.23, neighbours=grid_pairs(5), rod_xy_nm=np.zeros((25, 2)))
    st1 = compute_statistics(decoded, columns, n_boot=50, random_state=4, n_null=99)
    st2 = compute_statistics(decoded, columns, n_boot=50, random_state=4, n_null=99)
    d = st1.to_dict()
    text = json.dumps(d, allow_nan=False, sort_keys=True)
    assert text == json.dumps(st2.to_dict(), allow_nan=False, sort_keys=True)
    for grp in ("composition", "mean_run_length_sites", "mean_run_length_nm", "run_length_ratio"):
        assert set(d[grp]) == {"Ni", "Zn"}
    assert d["mean_run_length_nm"]["Zn"] == pytest.approx(0.23 * d["mean_run_length_sites"]["Zn"])
    assert d["run_length_ratio"]["Zn"] == pytest.approx(d["mean_run_length_sites"]["Zn"] * (1 - d["composition"]["Zn"]))
    assert sum(d["composition"].values()) == pytest.approx(1.0)
    for key in ("persistence", "entropy_rate_bits", "entropy_independent_bits"):
        assert isinstance(d[key], float)
    assert set(d["runs_test"]) >= {"z", "p"}
    assert set(d["rod_to_rod"]) >= {"corr", "corr_lags", "p_value", "null_mean", "corr_corrected", "reliability"}
    assert set(d["rod_to_rod"]["corr_lags"]) == {str(x) for x in range(-3, 4)}
    assert d["markov_test"]["lr_pvalue"] == 1e-13 and d["markov_test"]["source"] == "decoder"
    assert st1.n_sites_used == int(mask.sum())
    for name in ("composition.Zn", "mean_run_length_sites.Zn", "persistence", "entropy_rate_bits",
                 "runs_test.z", "rod_to_rod.corr"):
        iv = d["intervals"][name]
        assert iv["low"] <= iv["high"]
        assert iv["low"] - 0.5 * (iv["high"] - iv["low"]) <= iv["estimate"] <= iv["high"] + 0.5 * (iv["high"] - iv["low"])


def test_missing_expected_counts_fall_back_to_path_counts_with_warning():
    rng = np.random.default_rng(9)
    seq = markov_chains(rng, 10, 80, [0.5, 0.5], 0.5)
    decoded = SimpleNamespace(metals=("Co", "Zn"), pitch_nm=0.2, viterbi=seq)
    with pytest.warns(DataQualityWarning, match="expected transition counts"):
        st = compute_statistics(decoded, n_boot=20, random_state=0)
    tr, _ = transition_counts_from_paths(seq, 2)
    np.testing.assert_allclose(st.transmat, transition_matrix(tr.sum(0)))
    assert st.rod_to_rod is None


@pytest.mark.parametrize("bad,match", [
    (dict(per_rod_transitions=np.ones((4, 3, 3))), "per_rod_transitions"),
    (dict(per_rod_occupancy=np.ones((3, 2))), "per_rod_occupancy"),
    (dict(pitch_nm=0.0), "pitch_nm"),
    (dict(n_boot=3), "n_boot"),
    (dict(viterbi=np.full((4, 10), 2)), "viterbi"),
    (dict(mask=np.ones((4, 9), bool)), "mask"),
    (dict(metals=("Co",)), "metals"),
])
def test_bad_input_raises_input_error(bad, match):
    args = dict(per_rod_transitions=np.ones((4, 2, 2)), per_rod_occupancy=np.ones((4, 2)),
                metals=("Co", "Zn"), pitch_nm=0.2, viterbi=np.zeros((4, 10), int))
    args.update(bad)
    with pytest.raises(InputError, match=match):
        statistics_from_arrays(**args)


# ---------------------------------------------------------------------- rod-to-rod agreement
def test_circular_cross_sums_match_direct_shifts(rng):
    x = rng.random((6, 37))
    m = rng.random((6, 37)) < 0.8
    i, j = np.array([0, 2, 5]), np.array([1, 3, 4])
    raw = agreement_mod._circular_raw(x, m, i, j)
    a = np.where(m, x, 0.0)
    for t in (0, 1, 9, 36):
        mj, aj = np.roll(m[j], -t, axis=1), np.roll(a[j], -t, axis=1)  # site s of i with (s+t) mod n of j
        np.testing.assert_allclose(raw[:, t, 0], (m[i] & mj).sum(1))
        np.testing.assert_allclose(raw[:, t, 5], (a[i] * aj).sum(1), atol=1e-9)
        np.testing.assert_allclose(raw[:, t, 3], (a[i] ** 2 * mj).sum(1), atol=1e-9)


def test_agreement_correlation_equals_pearson_on_both_unmasked_sites(rng):
    x = rng.random((2, 90))
    mask = np.ones(x.shape, bool)
    mask[0, 10:20] = False
    mask[1, 50:55] = False
    garbage = np.where(mask, x, 1e6)
    res = rod_agreement(garbage, mask, [[0, 1]], max_lag=2, n_null=49, rng=1)
    both = mask[0] & mask[1]
    assert res.corr == pytest.approx(np.corrcoef(x[0, both], x[1, both])[0, 1])
    d = 2
    both_d = mask[0, :-d] & mask[1, d:]
    lag2 = res.corr_lags[list(res.lags).index(d)]
    assert lag2 == pytest.approx(np.corrcoef(x[0, :-d][both_d], x[1, d:][both_d])[0, 1])
    assert res.n_sites_compared == both.sum()


def test_agreement_kappa_matches_sklearn(rng):
    # source: scikit-learn 1.9 sklearn.metrics.cohen_kappa_score
    from sklearn.metrics import cohen_kappa_score

    seq = copied_rods(rng, 9, 60, [0.5, 0.3, 0.2], 0.4)
    pairs = grid_pairs(3)
    res = rod_agreement((seq == 2).astype(float), np.ones(seq.shape, bool), pairs, states=seq,
                          n_states=3, n_null=19, rng=0)
    ref = cohen_kappa_score(seq[pairs[:, 0]].ravel(), seq[pairs[:, 1]].ravel())
    assert res.kappa == pytest.approx(ref)


def test_copied_rods_detected_with_expected_correlation():
    rng = np.random.default_rng(21)
    e = 0.1
    seq = copied_rods(rng, 36, 200, [0.7, 0.3], e)
    res = rod_agreement((seq == 1).astype(float), np.ones(seq.shape, bool), grid_pairs(6),
                          n_null=199, rng=2)
    # two copies share the master at a site with probability (1 - e)^2 -> indicator correlation (1 - e)^2
    assert res.corr == pytest.approx((1 - e) ** 2, abs=0.04)
    assert res.best_lag == 0
    assert res.p_value == pytest.approx(1 / 200)
    assert abs(res.null_mean) < 0.05
    # every rod repeats the same master, so non-neighbours agree as much as neighbours
    assert res.corr_nonneighbour == pytest.approx(res.corr, abs=0.05)


def test_correction_for_decoding_noise_recovers_true_copy_correlation():
    """Copies decoded from noisy observations: the posterior correlation is attenuated by the
    reliability of the decoding; the corrected value estimates the true (1 - e)^2."""
    rng = np.random.default_rng(23)
    e, flip, f = 0.1, 0.15, np.array([0.6, 0.4])
    seq = copied_rods(rng, 36, 300, f, e)
    obs = np.where(rng.random(seq.shape) < flip, 1 - seq, seq)
    post, _ = forward_backward_binary_flip(obs, true_transmat(f, 0.0), flip)
    res = rod_agreement(post[:, :, 1], np.ones(seq.shape, bool), grid_pairs(6), n_null=99, rng=4)
    assert res.corr < 0.75 * (1 - e) ** 2
    assert res.corr_corrected == pytest.approx((1 - e) ** 2, abs=0.04)
    # the reliability of a posterior from one flipped observation, computed from its two values
    p1 = f[1] * (1 - flip) / (f[1] * (1 - flip) + f[0] * flip)  # observed 1
    p0 = f[1] * flip / (f[1] * flip + f[0] * (1 - flip))  # observed 0
    q = f[1] * (1 - flip) + f[0] * flip  # P(observe 1)
    mean = q * p1 + (1 - q) * p0
    var_p = q * p1 ** 2 + (1 - q) * p0 ** 2 - mean ** 2
    assert res.reliability == pytest.approx(var_p / (f[0] * f[1]), abs=0.03)
    hard = rod_agreement((seq == 1).astype(float), np.ones(seq.shape, bool), grid_pairs(6), n_null=9, rng=4)
    assert hard.reliability == 1.0 and hard.corr_corrected == pytest.approx(hard.corr)


def test_independent_rods_give_uniform_p_values():
    rng = np.random.default_rng(31)
    pv = []
    for _ in range(40):
        seq = markov_chains(rng, 25, 100, [0.6, 0.4], 0.5)
        pv.append(rod_agreement((seq == 1).astype(float), np.ones(seq.shape, bool), grid_pairs(5),
                                  n_null=99, rng=rng).p_value)
    pv = np.array(pv)
    # about 4 of 40 below 0.1 under a calibrated null (binomial sd 1.9); 12 or more has P < 1e-3
    assert (pv < 0.1).sum() <= 11
    assert 0.3 < np.median(pv) < 0.7


def test_copy_with_depth_offset_found_at_its_lag():
    rng = np.random.default_rng(41)
    # a chain of 16 rods, each repeating the previous one 2 sites deeper
    x = np.zeros((16, 150))
    x[0] = markov_chains(rng, 1, 150, [0.5, 0.5], 0.3)[0]
    for r in range(1, 16):
        x[r, 2:] = x[r - 1, :-2]
        x[r, :2] = rng.integers(0, 2, 2)
    pairs = np.array([(r, r + 1) for r in range(15)])
    res = rod_agreement(x, np.ones(x.shape, bool), pairs, max_lag=3, n_null=99, rng=3)
    assert res.best_lag == 2
    assert res.statistic > 0.95
    assert abs(res.corr) < 0.5
    assert res.p_value < 0.02


def test_neighbour_pairs_of_square_grid():
    xy = np.stack(np.meshgrid(np.arange(4.0), np.arange(4.0), indexing="ij"), axis=-1).reshape(-1, 2) * 1.5
    got = {tuple(p) for p in neighbour_pairs(xy).tolist()}
    want = {tuple(p) for p in grid_pairs(4).tolist()}
    assert got == want
