"""Classification rules, their thresholds, the undetermined cases and the confidence."""

import json

import numpy as np
import pytest

from probeseq.exceptions import InputError
from probeseq.simulation.simulate import markov_sequences
from probeseq.statistics.classify import LABELS, Classification, calibrated_confidence, classify
from probeseq.statistics.markov import transition_counts_from_paths
from probeseq.statistics.summary import statistics_from_arrays


def markov_chains(rng, n_rods, n_sites, f, lam):
    """The simulator's chains (P(stay in k) = f_k + lam (1 - f_k)), as int64."""
    return markov_sequences(rng, n_rods, n_sites, np.asarray(f, float), lam).astype(np.int64)


def copied(rng, n_rods, n_sites, f, e, lam=0.0):
    master = markov_chains(rng, 1, n_sites, f, lam)[0]
    seq = np.broadcast_to(master, (n_rods, n_sites)).copy()
    err = rng.random(seq.shape) < e
    seq[err] = markov_chains(rng, n_rods, n_sites, f, 0.0)[err]
    return seq


def grid_pairs(n):
    idx = np.arange(n * n).reshape(n, n)
    return np.concatenate([np.stack([idx[:, :-1].ravel(), idx[:, 1:].ravel()], 1),
                           np.stack([idx[:-1].ravel(), idx[1:].ravel()], 1)])


def make_stats(seq, pairs=None, metals=("Co", "Zn"), n_boot=200, seed=0):
    tr, occ = transition_counts_from_paths(seq, len(metals))
    return statistics_from_arrays(per_rod_transitions=tr, per_rod_occupancy=occ, metals=metals,
                                    pitch_nm=0.23, viterbi=seq, neighbours=pairs, n_boot=n_boot,
                                    random_state=seed, n_null=199)


F = (0.7, 0.3)  # Zn is the least abundant metal


@pytest.fixture(scope="module")
def runs():
    """Runs of 36 rods x 200 sites on a 6 x 6 grid for each arrangement (truth in the name).

    Mean run length of Zn = 1 / ((1 - lam)(1 - 0.3)): 1.43 (lam 0), 2.86 (lam 0.5), 14.3 (lam 0.9)."""
    rng = np.random.default_rng(606)
    pairs = grid_pairs(6)
    return {
        "random": make_stats(markov_chains(rng, 36, 200, F, 0.0), pairs),
        "short-repeat": make_stats(markov_chains(rng, 36, 200, F, 0.5), pairs),
        "long-block": make_stats(markov_chains(rng, 36, 200, F, 0.9), pairs),
        "rod-to-rod-copied": make_stats(copied(rng, 36, 200, F, 0.1), pairs),
    }


@pytest.mark.parametrize("truth,along,rod", [
    ("random", "random", "independent"),
    ("short-repeat", "short-repeat", "independent"),
    ("long-block", "long-block", "independent"),
])
def test_each_along_rod_branch(runs, truth, along, rod):
    c = classify(runs[truth])
    assert (c.label, c.along_rod, c.rod_to_rod) == (truth, along, rod)
    assert 0.9 <= c.bootstrap_share <= 1.0
    assert c.label_shares[truth] == pytest.approx(c.bootstrap_share)
    # the confidence is the calibrated probability of that share being right
    assert c.confidence == pytest.approx(calibrated_confidence(c.bootstrap_share)) and c.confidence >= 0.8
    assert sum(c.label_shares.values()) == pytest.approx(1.0)


def test_copied_branch(runs):
    c = classify(runs["rod-to-rod-copied"])
    assert c.label == "rod-to-rod-copied" and c.rod_to_rod == "copied"
    assert c.confidence >= 0.9
    assert any("copied" in r for r in c.reasons)


def test_random_when_lr_test_not_rejected_whatever_the_run_length(runs):
    # the rule: along_rod = random whenever p >= alpha
    c = classify(runs["long-block"], lr_pvalue=0.5)
    assert c.along_rod == "random" and c.label == "random"
    c = classify(runs["long-block"], lr_pvalue=0.02, alpha=0.01)
    assert c.along_rod == "random"
    c = classify(runs["long-block"], lr_pvalue=0.02, alpha=0.05)
    assert c.along_rod == "long-block"


def test_short_repeat_when_rejected_and_runs_short(runs):
    # a rejected test on a run whose runs are short (1.4 sites) gives short-repeat
    c = classify(runs["random"], lr_pvalue=1e-6)
    assert c.along_rod == "short-repeat"


def test_long_block_threshold_moves_the_boundary(runs):
    st = runs["long-block"]
    run_len = st.estimates["mean_run_length_sites.Zn"]
    assert classify(st, long_block_sites=run_len * 2).along_rod == "short-repeat"
    assert classify(st, long_block_sites=run_len * 0.5).along_rod == "long-block"
    # exactly at the estimate the rule says long-block (>=), and about half the resamples disagree
    at = classify(st, long_block_sites=run_len)
    assert at.along_rod == "long-block"
    assert 0.2 < at.bootstrap_share < 0.8
    assert at.confidence <= calibrated_confidence(0.8)
    # short repeats become long blocks under a low threshold
    assert classify(runs["short-repeat"], long_block_sites=2).along_rod == "long-block"


def test_copy_threshold_and_alpha_gate_copied(runs):
    st = runs["rod-to-rod-copied"]
    corr = st.rod_to_rod.statistic  # about (1 - 0.1)^2 = 0.81
    assert 0.7 < corr < 0.9
    high = classify(st, copy_threshold=min(1.0, corr + 0.1))
    assert high.rod_to_rod == "independent" and high.label == high.along_rod
    # the smallest p of a 199-replicate null is 1/200, not below alpha = 0.001
    strict = classify(st, alpha=0.001)
    assert strict.rod_to_rod == "independent"
    assert any("too few to reach" in r for r in strict.reasons)


def test_independent_rods_never_copied_with_weak_crosstalk_like_agreement():
    """Independent rods whose neighbour shares a little of each site (as lateral crosstalk does)
    agree significantly but weakly; the copy threshold keeps them independent."""
    rng = np.random.default_rng(9)
    seq = markov_chains(rng, 36, 300, F, 0.5)
    pairs = grid_pairs(6)
    post = (seq == 1).astype(float)
    mixed = post.copy()
    for a, b in pairs:
        mixed[a] += 0.05 * post[b]
        mixed[b] += 0.05 * post[a]
    post2 = np.stack([1 - np.clip(mixed, 0, 1), np.clip(mixed, 0, 1)], axis=-1)
    tr, occ = transition_counts_from_paths(seq, 2)
    st = statistics_from_arrays(per_rod_transitions=tr, per_rod_occupancy=occ, metals=("Co", "Zn"),
                                  pitch_nm=0.23, viterbi=seq, posteriors=post2, neighbours=pairs,
                                  n_boot=100, random_state=1, n_null=199)
    assert st.rod_to_rod.p_value < 0.01  # the agreement is real ...
    assert st.rod_to_rod.statistic < 0.3  # ... but weak
    assert classify(st).rod_to_rod == "independent"
    assert classify(st, copy_threshold=0.0).rod_to_rod == "copied"


def test_random_runs_rarely_called_non_random():
    # at alpha = 0.01 the G^2 test on exact counts rejects about 1 % of random runs
    rng = np.random.default_rng(77)
    labels = [classify(make_stats(markov_chains(rng, 20, 100, F, 0.0), n_boot=20, seed=s),
                       min_rods=5).along_rod for s in range(30)]
    assert labels.count("random") >= 28


def test_reasons_quote_the_numbers(runs):
    st = runs["long-block"]
    c = classify(st)
    e, lo, hi = st.interval("mean_run_length_sites.Zn")
    ratio = st.estimates["run_length_ratio.Zn"]
    line = next(r for r in c.reasons if r.startswith("runs of Zn"))
    assert f"{e:.1f}".rstrip("0").rstrip(".") in line
    assert f"{lo:.1f}".rstrip("0").rstrip(".") in line and f"{hi:.1f}".rstrip("0").rstrip(".") in line
    assert f"{ratio:.1f}".rstrip("0").rstrip(".") in line or f"{ratio:.2f}" in line
    assert "times what independent sites give" in line
    assert any("at or over the long-block threshold of 8 sites" in r for r in c.reasons)
    assert any("independent sites are rejected" in r for r in c.reasons)
    assert any("bootstrap resamples" in r for r in c.reasons)


def test_to_dict_is_json(runs):
    d = classify(runs["short-repeat"]).to_dict()
    text = json.dumps(d, allow_nan=False)
    back = json.loads(text)
    assert back["label"] in LABELS
    assert set(back) >= {"label", "along_rod", "rod_to_rod", "confidence", "reasons", "thresholds"}
    assert back["thresholds"]["long_block_sites"] == 8


def test_undetermined_with_too_few_rods():
    rng = np.random.default_rng(1)
    st = make_stats(markov_chains(rng, 3, 400, F, 0.9), np.array([[0, 1], [1, 2]]), n_boot=20)
    c = classify(st)
    assert c.label == "undetermined" and c.confidence == 0.0
    assert any("only 3 rods" in r for r in c.reasons)
    assert isinstance(c, Classification)


def test_undetermined_with_too_few_sites_or_rare_metal():
    rng = np.random.default_rng(2)
    st = make_stats(markov_chains(rng, 9, 15, F, 0.9), grid_pairs(3), n_boot=20)
    c = classify(st)
    assert c.label == "undetermined"
    assert any("sites were decoded" in r for r in c.reasons)
    rare = make_stats(markov_chains(rng, 9, 100, (0.998, 0.002), 0.0), grid_pairs(3), n_boot=20)
    c = classify(rare)
    assert c.label == "undetermined"
    assert any("least abundant metal, Zn" in r for r in c.reasons)


def test_undetermined_without_neighbour_pairs():
    rng = np.random.default_rng(3)
    st = make_stats(markov_chains(rng, 20, 200, F, 0.9), pairs=None, n_boot=20)
    c = classify(st)
    assert c.label == "undetermined" and c.rod_to_rod == "undetermined"
    assert c.along_rod == "long-block"  # still reported, but the label does not guess
    assert any("no neighbouring rod pairs" in r for r in c.reasons)


def test_undetermined_without_lr_test(runs):
    c = classify(runs["random"], lr_pvalue=float("nan"))
    assert c.label == "undetermined" and c.along_rod == "undetermined"


@pytest.mark.parametrize("kw,name", [
    (dict(alpha=0.0), "alpha"), (dict(alpha=1.0), "alpha"), (dict(alpha=-0.1), "alpha"),
    (dict(alpha="x"), "alpha"), (dict(long_block_sites=0.5), "long_block_sites"),
    (dict(long_block_sites=float("nan")), "long_block_sites"),
    (dict(copy_threshold=1.5), "copy_threshold"), (dict(copy_threshold=-0.1), "copy_threshold"),
    (dict(min_rods=0), "min_rods"), (dict(min_sites=2.5), "min_sites"),
    (dict(lr_pvalue=1.5), "lr_pvalue"),
])
def test_thresholds_out_of_range(runs, kw, name):
    with pytest.raises(InputError, match=name):
        classify(runs["random"], **kw)


def test_stats_of_wrong_type():
    with pytest.raises(InputError, match="RunStatistics"):
        classify({"composition": {}})
