"""The fifth arrangement (interspersed), per-metal descriptions and the calibrated confidence.

References (docs/REFERENCES.md §5): the closed-form chain of an interspersed metal is derived in
probeseq.simulation.chains (stationarity checked here by substitution); the false-positive rate of
a level-alpha test is compared with alpha through an exact binomial interval (scipy.stats.binomtest,
Clopper-Pearson).
"""

import json
import warnings

import numpy as np
import pytest
from scipy import stats as sps

from probeseq.decoding.chain import persistence, persistence_per_state, stationary_distribution
from probeseq.exceptions import InputError
from probeseq.simulation.chains import chain_sequences, interspersed_transmat, per_metal_transmat
from probeseq.simulation.simulate import SimConfig, markov_sequences, simulate_run
from probeseq.statistics.classify import (CONFIDENCE_TABLE, LABELS, calibrated_confidence, classify,
                                          metal_descriptions)
from probeseq.statistics.markov import transition_counts_from_paths
from probeseq.statistics.summary import statistics_from_arrays


def make_stats(seq, metals=("Co", "Zn"), n_boot=200, seed=0, side=6):
    tr, occ = transition_counts_from_paths(seq, len(metals))
    xy = np.stack(np.meshgrid(np.arange(side), np.arange(side)), -1).reshape(-1, 2)[:seq.shape[0]] * 1.0
    return statistics_from_arrays(per_rod_transitions=tr, per_rod_occupancy=occ, metals=metals, pitch_nm=0.23,
                                  viterbi=seq, rod_xy_nm=xy, n_boot=n_boot, random_state=seed, n_null=99)


# ---------------------------------------------------------------- the chains
@pytest.mark.parametrize("fm,s", [(0.1, 1.0), (0.2, 0.9), (0.35, 0.5), (0.5, 1.0)])
def test_interspersed_chain_has_the_closed_form(fm, s):
    p = interspersed_transmat([1 - fm, fm], 1, s)
    q = fm * (1 - fm * (1 - s)) / (1 - fm)  # P(other -> m), derived in probeseq.simulation.chains
    np.testing.assert_allclose(p, [[1 - q, q], [1 - fm * (1 - s), fm * (1 - s)]], atol=1e-15)
    np.testing.assert_allclose(stationary_distribution(p), [1 - fm, fm], atol=1e-12)
    # two states: lam = P_mm + P_oo - 1 = -s f_m / (1 - f_m) (closed form, negative persistence)
    assert persistence(p) == pytest.approx(-s * fm / (1 - fm), abs=1e-12)
    lam_k = persistence_per_state(p)
    assert lam_k[1] == pytest.approx(-s * fm / (1 - fm), abs=1e-12) and lam_k[1] < 0


def test_interspersed_chain_of_three_metals_keeps_the_composition():
    f = np.array([0.5, 0.3, 0.2])
    p = interspersed_transmat(f, 2, 0.8)
    np.testing.assert_allclose(p.sum(1), 1, atol=1e-12)
    np.testing.assert_allclose(f @ p, f, atol=1e-12)
    assert p[2, 2] == pytest.approx(0.2 * 0.2)
    np.testing.assert_allclose(p[0, 2], p[1, 2])  # inserted evenly among the others


def test_a_majority_metal_cannot_avoid_itself_completely():
    with pytest.raises(InputError, match="at most 0.18"):
        interspersed_transmat([0.3, 0.7], 1, 0.9)


def test_per_metal_chain_meets_each_target_and_refuses_what_no_chain_can():
    f = np.array([0.5, 0.3, 0.2])
    p = per_metal_transmat(f, ("long-block", "random", "interspersed"), avoidance=0.9)
    np.testing.assert_allclose(f @ p, f, atol=1e-9)
    np.testing.assert_allclose(np.diag(p), [0.5 + 0.9 * 0.5, 0.3, 0.2 * 0.1], atol=1e-9)
    lam = persistence_per_state(p, f)
    assert lam[0] == pytest.approx(0.9) and abs(lam[1]) < 1e-9 and lam[2] < 0
    # a random metal of 60 % must leave itself 40 % of the time, which a blocky and a rare metal
    # cannot take back: flow in (<= 0.3 x 0.07 + 0.1 x 0.99) < flow out (0.6 x 0.4)
    with pytest.raises(InputError, match="cannot be combined"):
        per_metal_transmat([0.6, 0.3, 0.1], ("random", "long-block", "interspersed"))
    with pytest.raises(InputError, match="three metals or more"):
        per_metal_transmat([0.6, 0.4], ("random", "interspersed"))


def test_sampled_chain_follows_its_matrix():
    p = interspersed_transmat([0.75, 0.25], 1, 0.9)
    seq = chain_sequences(np.random.default_rng(1), 200, 500, p, [0.75, 0.25])
    a, b = seq[:, :-1].ravel(), seq[:, 1:].ravel()
    for i in range(2):
        n = (a == i).sum()
        for j in range(2):
            got = ((a == i) & (b == j)).sum() / n
            assert abs(got - p[i, j]) < 4 * np.sqrt(p[i, j] * (1 - p[i, j]) / n) + 1e-9


def test_simulated_interspersed_run_has_the_truth_it_claims():
    run = simulate_run(pattern="interspersed", composition=(0.8, 0.2), depth_nm=12, top_radius_nm=4, seed=2)
    t = run.truth
    assert t["label"] == "interspersed" and t["along_rod"] == "interspersed"
    assert t["per_metal"]["Zn"] == "interspersed"
    seq, inside = run.seq, run.seq >= 0
    both = inside[:, :-1] & inside[:, 1:]
    zz = ((seq[:, :-1] == 1) & (seq[:, 1:] == 1) & both).sum() / ((seq[:, :-1] == 1) & both).sum()
    assert zz < 0.2 * 0.5  # Zn follows Zn far less often than its 20 % of the sites
    with pytest.raises(InputError, match="--metal-patterns"):
        SimConfig(pattern="per-metal", metals=("Co", "Ni", "Zn"))
    with pytest.raises(InputError, match="not one of --metals"):
        SimConfig(pattern="interspersed", interspersed_metal="Fe")


# ---------------------------------------------------------------- the classification
@pytest.mark.parametrize("fm", [0.1, 0.2, 0.3, 0.4, 0.5])
def test_interspersed_label_holds_from_minority_fraction_0_1_to_0_5(fm):
    # the same arrangement (avoidance 0.8) at every composition: the label must not change
    rng = np.random.default_rng(int(fm * 100))
    f = (1 - fm, fm) if fm < 0.5 else (0.5, 0.5)
    seq = chain_sequences(rng, 36, 300, interspersed_transmat(f, 1, 0.8), f)
    st = make_stats(seq)
    cl = classify(st, lr_pvalue=1e-12)
    assert cl.along_rod == "interspersed" and cl.label == "interspersed"
    assert cl.per_metal["Zn"]["class"] == "interspersed"
    assert cl.per_metal["Zn"]["self_neighbour"] < cl.per_metal["Zn"]["independent"]
    assert any(r.startswith("Zn sits next to Zn") and "avoids itself" in r for r in cl.reasons)


def test_runs_are_not_called_interspersed_and_interspersed_not_short_repeat():
    rng = np.random.default_rng(3)
    f = (0.7, 0.3)
    short = classify(make_stats(markov_sequences(rng, 36, 300, f, 0.5)), lr_pvalue=1e-12)
    assert short.along_rod == "short-repeat" and short.per_metal["Zn"]["class"] == "short-repeat"
    block = classify(make_stats(markov_sequences(rng, 36, 300, f, 0.9)), lr_pvalue=1e-12)
    assert block.along_rod == "long-block" and block.per_metal["Zn"]["class"] == "long-block"


def test_per_metal_description_of_three_metals():
    f = np.array([0.5, 0.3, 0.2])
    p = per_metal_transmat(f, ("long-block", "random", "interspersed"))
    seq = chain_sequences(np.random.default_rng(4), 36, 400, p, f)
    cl = classify(make_stats(seq, metals=("Co", "Ni", "Zn")), lr_pvalue=1e-12)
    assert {m: d["class"] for m, d in cl.per_metal.items()} == {"Co": "long-block", "Ni": "random",
                                                                 "Zn": "interspersed"}
    assert cl.label == "interspersed"  # the least abundant metal sets the run's label
    d = cl.to_dict()
    assert set(d["per_metal"]) == {"Co", "Ni", "Zn"} and d["per_metal"]["Zn"]["class"] == "interspersed"


def test_false_positive_rate_on_independent_sites_is_alpha():
    """Independent sites: the avoidance test of the least abundant metal fires at rate alpha
    (one-sided Wald test with the bootstrap standard error); checked with a Clopper-Pearson
    interval (scipy.stats.binomtest) at 99 %."""
    alpha, n = 0.05, 160
    rng = np.random.default_rng(77)
    hits = 0
    for i in range(n):
        seq = (rng.random((25, 120)) < 0.3).astype(np.int8)
        d = metal_descriptions(make_stats(seq, n_boot=100, seed=i, side=5), alpha=alpha)
        hits += d["Zn"]["class"] == "interspersed"
    ci = sps.binomtest(hits, n, alpha).proportion_ci(confidence_level=0.99)
    assert ci.low <= alpha <= ci.high, (hits, n)


def test_too_few_sites_of_a_metal_is_undetermined_not_a_guess():
    rng = np.random.default_rng(8)
    seq = (rng.random((36, 200)) < 0.002).astype(np.int8)  # about 14 Zn sites
    cl = classify(make_stats(seq), lr_pvalue=0.5)
    assert cl.label == "undetermined" and cl.per_metal["Zn"]["class"] == "undetermined"
    assert any("too few Zn sites" in r for r in cl.reasons)


# ---------------------------------------------------------------- calibrated confidence
def test_confidence_table_is_an_isotonic_map_of_the_bootstrap_share():
    t = json.loads(CONFIDENCE_TABLE.read_text())
    x, y = np.array(t["share"]), np.array(t["probability"])
    assert x.size >= 2 and np.all(np.diff(x) >= 0) and np.all(np.diff(y) >= -1e-12)
    assert 0 <= y.min() and y.max() <= 1 and t["n_runs"] >= 60
    grid = np.linspace(0, 1, 101)
    c = np.array([calibrated_confidence(v) for v in grid])
    assert np.all(np.diff(c) >= -1e-12) and c[0] >= 0 and c[-1] <= 1
    rng = np.random.default_rng(9)
    cl = classify(make_stats(markov_sequences(rng, 36, 300, (0.7, 0.3), 0.9)), lr_pvalue=1e-12)
    assert cl.confidence == pytest.approx(calibrated_confidence(cl.bootstrap_share))


def test_every_label_the_classifier_gives_is_known_to_the_layout():
    assert {"random", "short-repeat", "long-block", "interspersed", "rod-to-rod-copied"} <= LABELS


def test_analysis_of_a_simulated_interspersed_run_labels_it():
    from probeseq.pipeline import AnalysisOptions, analyze

    run = simulate_run(pattern="interspersed", composition=(0.75, 0.25), depth_nm=20, top_radius_nm=5, seed=11)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = analyze(run.ions, run.config.metals, run.lattice, options=AnalysisOptions(seed=1))
    assert res.classification.label == "interspersed"
    out = res.to_dict()["classification"]
    assert out["per_metal"]["Zn"]["class"] == "interspersed" and 0 <= out["confidence"] <= 1


@pytest.mark.parametrize("args,msg", [
    (["--pattern", "interspersed", "--avoidance", "2"], "--avoidance must be in [0, 1]"),
    (["--pattern", "per-metal", "--metals", "Co,Ni,Zn", "--metal-patterns", "random,blocks,random"],
     "'blocks' is not one of"),
    (["--pattern", "per-metal", "--metals", "Co,Ni,Zn", "--metal-patterns", "random,random"], "one pattern per metal"),
    (["--pattern", "per-metal", "--metals", "Co,Ni,Zn", "--composition", "0.6,0.3,0.1",
      "--metal-patterns", "random,long-block,interspersed"], "cannot be combined"),
    (["--pattern", "interspersed", "--interspersed-metal", "Fe"], "not one of --metals"),
])
def test_bad_arrangement_options_are_one_line_errors(tmp_path, capsys, args, msg):
    from probeseq.cli import main

    code = main(["simulate", str(tmp_path / "r.h5"), *args])
    err = capsys.readouterr().err.strip()
    assert code == 1 and msg in err and len(err.splitlines()) == 1
    assert not (tmp_path / "r.h5").exists()


def test_terminal_summary_names_each_metal(tmp_path, capsys):
    from probeseq.cli import main

    p = tmp_path / "r.h5"
    assert main(["simulate", str(p), "--pattern", "per-metal", "--metals", "Co,Ni,Zn", "--composition",
                 "0.5,0.3,0.2", "--metal-patterns", "long-block,random,interspersed", "--depth", "16",
                 "--tip-radius", "4.5", "--seed", "4", "-q"]) == 0
    code = main(["analyze", str(p), "--metals", "Co,Ni,Zn", "--lattice", str(tmp_path / "r.lattice.toml"),
                 "--out", str(tmp_path / "out"), "--seed", "1"])
    out = capsys.readouterr().out
    assert code == 0
    assert "each metal along the rods: Co long-block, Ni random, Zn interspersed" in out
    res = json.loads((tmp_path / "out" / "results.json").read_text())
    assert res["classification"]["label"] == "interspersed"
