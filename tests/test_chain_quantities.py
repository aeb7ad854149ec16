"""One definition per chain quantity (probeseq.decoding.chain), used by the decoder and the statistics alike.

Closed forms of a two-state Markov chain P = [[1 - a, a], [b, 1 - b]]: stationary distribution
(b, a) / (a + b), mean dwell (run) lengths 1/a and 1/b, second eigenvalue 1 - a - b -- any standard
text, for example Norris, *Markov Chains*, Cambridge University Press (1997), recalled from memory;
see docs/REFERENCES.md §3.
"""

import json
import math

import numpy as np
import pytest

from probeseq.decoding import chain, hmm
from probeseq.decoding.chain import runs_table, stationary_distribution
from probeseq.decoding.decode import decode, sample_model
from probeseq.decoding.model import DecoderParams
from probeseq.lattice.rodcolumns import RodColumns
from probeseq.statistics.markov import persistence
from probeseq.statistics.runs import decoded_runs
from probeseq.utils.marks import finite_or_none, to_jsonable

TWO_STATE = [(0.05, 0.10), (0.3, 0.2), (0.9, 0.6), (1e-4, 0.5)]


def _two_state(a, b):
    return np.array([[1.0 - a, a], [b, 1.0 - b]])


@pytest.mark.parametrize("a,b", TWO_STATE)
def test_two_state_closed_forms(a, b):
    p = _two_state(a, b)
    np.testing.assert_allclose(chain.stationary_distribution(p), [b / (a + b), a / (a + b)], rtol=1e-12)
    np.testing.assert_allclose(chain.mean_run_lengths(p), [1.0 / a, 1.0 / b], rtol=1e-12)
    assert chain.persistence(p) == pytest.approx(1.0 - a - b, abs=1e-12)
    # for two states every per-state persistence is the same number
    np.testing.assert_allclose(chain.persistence_per_state(p), [1.0 - a - b] * 2, atol=1e-12)
    np.testing.assert_allclose(np.sort(np.linalg.eigvals(p).real), sorted([1.0 - a - b, 1.0]), atol=1e-12)


def test_casino_chain_check_values():
    # docs/REFERENCES.md §3: fair -> loaded 0.05, loaded -> fair 0.10
    p = _two_state(0.05, 0.10)
    np.testing.assert_allclose(chain.stationary_distribution(p), [2 / 3, 1 / 3], rtol=1e-12)
    np.testing.assert_allclose(chain.mean_run_lengths(p), [20.0, 10.0], rtol=1e-12)


def test_mixture_chain_has_its_persistence_for_every_state():
    # A = lam I + (1 - lam) 1 f keeps a metal with probability lam, else redraws it from f
    f = np.array([0.2, 0.5, 0.3])
    for lam in (0.0, 0.4, 0.85, -0.1):
        a = lam * np.eye(3) + (1.0 - lam) * f[None, :]
        np.testing.assert_allclose(chain.stationary_distribution(a), f, atol=1e-12)
        np.testing.assert_allclose(chain.persistence_per_state(a), [lam] * 3, atol=1e-12)
        assert chain.persistence(a) == pytest.approx(lam, abs=1e-12)
        np.testing.assert_allclose(chain.independent_run_lengths(f), 1.0 / (1.0 - f))


def test_batched_matches_single_and_reducible_chain_is_handled():
    rng = np.random.default_rng(3)
    mats = rng.random((6, 3, 3)) + 4.0 * np.eye(3)
    mats /= mats.sum(-1, keepdims=True)
    batch = chain.stationary_distribution(mats)
    for m, mu in zip(mats, batch):
        np.testing.assert_array_equal(chain.stationary_distribution(m), mu)
        np.testing.assert_allclose(mu @ m, mu, atol=1e-12)
    np.testing.assert_allclose(chain.persistence(mats), [chain.persistence(m) for m in mats], rtol=1e-12)
    mu = chain.stationary_distribution(np.eye(2))  # reducible: any distribution is stationary
    assert mu.sum() == pytest.approx(1.0) and np.all(mu >= 0)
    assert np.all(np.isinf(chain.mean_run_lengths(np.eye(2))))


def test_every_module_uses_the_one_definition():
    assert hmm.stationary_distribution is chain.stationary_distribution
    assert stationary_distribution is chain.stationary_distribution
    from probeseq.statistics import summary

    assert summary.mean_run_lengths is chain.mean_run_lengths
    assert summary.independent_run_lengths is chain.independent_run_lengths


def test_decoder_and_statistics_report_the_same_persistence():
    # a 3-state matrix on which (trace - 1) / (K - 1) and the composition-weighted definition differ
    a = np.array([[0.70, 0.20, 0.10], [0.05, 0.80, 0.15], [0.10, 0.10, 0.80]])
    params = DecoderParams(transmat=a, eta=0.5, extra_rate=[0.01, 0.01, 0.01])
    a = params.transmat  # the matrix as the decoder holds it (rows renormalised: 1 ulp may move)
    lam, lam_k = persistence(a)
    assert params.persistence == float(lam) == chain.persistence(a)
    np.testing.assert_array_equal(lam_k, chain.persistence_per_state(a))
    assert abs(params.persistence - (np.trace(a) - 1.0) / 2.0) > 1e-3  # the other formula is not it
    np.testing.assert_array_equal(params.stationary, chain.stationary_distribution(a))


def test_decode_result_matches_statistics_of_the_same_matrix():
    truth = DecoderParams(transmat=[[0.9, 0.1], [0.2, 0.8]], eta=0.6, extra_rate=[0.02, 0.02])
    counts, _ = sample_model(truth, 6, 60, random_state=4)
    xy = np.stack(np.divmod(np.arange(6), 3), axis=1).astype(float) * 1.5
    cols = RodColumns(counts=counts, mask=np.ones(counts.shape[:2], bool), metals=("Co", "Zn"), rod_xy_nm=xy,
                      tilt=np.zeros(2), z_ref_nm=0.0, site_z_nm=0.23 * np.arange(60), pitch_nm=0.23,
                      resolvable=True)
    res = decode(cols, truth)
    assert res.persistence == chain.persistence(res.transmat)
    d = res.to_dict()
    assert "mean_run_length_sites" not in d  # the decoder's number is named for what it is
    runs = res.runs
    for i, m in enumerate(res.metals):
        assert d["mean_decoded_run_length_sites"][m] == pytest.approx(runs["length"][runs["metal"] == i].mean())


def test_one_run_listing():
    path = np.array([[0, 0, 1, 1, 1, 0], [1, 1, 1, 0, 0, 0]])
    mask = np.array([[1, 1, 1, 0, 1, 1], [1, 1, 1, 1, 1, 1]], bool)
    post = np.full((2, 6, 2), 0.5)
    listed = chain.list_runs(path, mask, post)
    np.testing.assert_array_equal(listed["first_site"], [0, 2, 4, 5, 0, 3])
    np.testing.assert_array_equal(listed["last_site"], [1, 2, 4, 5, 2, 5])
    np.testing.assert_array_equal(listed["left_truncated"], [True, False, True, False, True, False])
    np.testing.assert_array_equal(listed["right_truncated"], [False, True, False, True, False, True])
    table = runs_table(path, mask, post)
    for key, col in table.items():
        np.testing.assert_array_equal(col, listed[key])
    runs = decoded_runs(path, mask)
    np.testing.assert_array_equal(runs.start, listed["first_site"])
    np.testing.assert_array_equal(runs.length, listed["length"])
    np.testing.assert_array_equal(runs.right_truncated, listed["right_truncated"])


def test_json_helper_replaces_nan_and_inf_by_none():
    for bad in (float("nan"), float("inf"), -math.inf, np.float32("nan"), np.float64("-inf")):
        assert finite_or_none(bad) is None
    assert finite_or_none(np.float32(0.5)) == 0.5 and isinstance(finite_or_none(np.int64(3)), float)
    obj = {"a": np.array([1.0, np.nan, np.inf]), "b": (np.int64(2), np.bool_(True)), 3: -math.inf,
           "c": {"d": np.float64(2.5)}}
    out = to_jsonable(obj)
    assert out == {"a": [1.0, None, None], "b": [2, True], "3": None, "c": {"d": 2.5}}
    json.dumps(out, allow_nan=False)
