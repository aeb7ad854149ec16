"""Per-metal visibility in the rod model: a site of metal k shows its own ion with probability
``eta a_k`` (``a_k`` the share of the metal's ions the ranging counts as it), so nothing is thinned
and ``eta`` is the instrument's detection efficiency."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy.stats import poisson
from test_decode import make_columns

from probeseq.decoding.decode import decode, fit_decoder, sample_model
from probeseq.decoding.model import DecoderParams, emission_factors, eta_update
from probeseq.exceptions import InputError

VIS = np.array([0.45, 1.0])


def _params(eta=0.6, vis=VIS, stay=0.8):
    comp = np.array([0.4, 0.6])
    a = stay * np.eye(2) + (1 - stay) * comp[None, :]
    return DecoderParams(transmat=a, eta=eta, extra_rate=np.array([0.08, 0.12]), visibility=vis)


def test_sample_model_shows_each_metal_at_its_visibility():
    p = _params()
    counts, states = sample_model(p, 200, 400, random_state=3)
    # own ions of metal k: (counts of channel k at sites of k) - extras
    for k in range(2):
        at = states == k
        own = counts[..., k][at].mean() - p.extra_rate[k]
        assert own == pytest.approx(p.eta * VIS[k], abs=0.01)


def test_fit_recovers_instrument_efficiency_and_composition():
    p = _params()
    counts, states = sample_model(p, 120, 400, random_state=5)
    cols = make_columns(counts)
    seen = fit_decoder(cols, random_state=1, visibility=VIS)
    assert seen.eta == pytest.approx(p.eta, abs=0.03)
    np.testing.assert_allclose(seen.stationary, p.stationary, atol=0.02)
    # the same counts read without the visibility: eta is the sites' mean visible efficiency and
    # the composition is biased towards the better-seen metal
    blind = fit_decoder(cols, random_state=1)
    assert blind.eta < p.eta - 0.1
    assert blind.stationary[1] > p.stationary[1] + 0.03
    # decoding with the visibility is at least as accurate as without
    acc_seen = (seen.viterbi == states).mean()
    acc_blind = (blind.viterbi == states).mean()
    assert acc_seen >= acc_blind - 0.002
    d = seen.to_dict()["visibility"]
    assert d["relative"] == {"Co": 0.45, "Zn": 1.0}
    assert d["sites_seen"]["Co"] == pytest.approx(seen.eta * 0.45)


def test_compiled_and_numpy_engines_agree_with_visibility():
    p = _params(eta=0.5)
    counts, _ = sample_model(p, 25, 200, random_state=9)
    rng = np.random.default_rng(2)
    mask = rng.random(counts.shape[:2]) > 0.1
    cols = make_columns(counts, mask)
    fast = fit_decoder(cols, random_state=4, engine="compiled", visibility=VIS)
    ref = fit_decoder(cols, random_state=4, engine="numpy", visibility=VIS)
    assert fast.loglik == pytest.approx(ref.loglik, rel=1e-10)
    assert fast.eta == pytest.approx(ref.eta, abs=1e-8)
    np.testing.assert_allclose(fast.transmat, ref.transmat, atol=1e-8)
    np.testing.assert_allclose(fast.posteriors, ref.posteriors, atol=2e-6)


def _brute_loglik(counts, mask, p):
    """Log-likelihood of one rod by enumerating every state sequence (the model written out:
    own ion with probability eta a_k, Poisson extras in every channel)."""
    T, K = counts.shape
    f = p.stationary
    total = 0.0
    for seq in itertools.product(range(K), repeat=T):
        lp = math.log(f[seq[0]]) + sum(math.log(p.transmat[seq[t - 1], seq[t]]) for t in range(1, T))
        for t in range(T):
            if not mask[t]:
                continue
            k = seq[t]
            e = p.eta * p.visibility[k]
            x = counts[t]
            none = np.prod(poisson.pmf(x, p.extra_rate))
            shifted = x.copy()
            shifted[k] -= 1
            own = np.prod(poisson.pmf(shifted, p.extra_rate)) if shifted[k] >= 0 else 0.0
            lp += math.log((1 - e) * none + e * own)
        total += math.exp(lp)
    return math.log(total)


@pytest.mark.filterwarnings("ignore::probeseq.exceptions.DataQualityWarning")  # a tiny rod has few counts
@pytest.mark.parametrize("engine", ["compiled", "numpy"])
def test_loglik_matches_enumeration(engine):
    # scipy.stats.poisson is the reference for the Poisson terms
    p = _params(eta=0.7)
    counts = np.array([[[1, 0], [0, 2], [0, 0], [1, 1], [0, 1], [2, 0]]], float)
    mask = np.array([[True, True, False, True, True, True]])
    res = decode(make_columns(counts, mask), p, engine=engine)
    assert res.loglik == pytest.approx(_brute_loglik(counts[0], mask[0], p), rel=1e-10)


def test_state_factor_uses_each_metals_efficiency():
    p = _params(eta=0.5)
    x = np.array([[1.0, 0.0], [0.0, 0.0]])
    fac = emission_factors(x, p)
    e = p.eta * VIS
    np.testing.assert_allclose(fac[0], [1 - e[0] + e[0] / 0.08, 1 - e[1]])
    np.testing.assert_allclose(fac[1], 1 - e)


def test_eta_update_is_the_ratio_without_visibility_and_the_exact_root_with():
    p1 = DecoderParams(transmat=np.full((2, 2), 0.5), eta=0.5, extra_rate=np.ones(2))
    assert eta_update(p1, np.array([30.0, 10.0]), np.array([60.0, 40.0])) == pytest.approx(0.4)
    p2 = DecoderParams(transmat=np.full((2, 2), 0.5), eta=0.5, extra_rate=np.ones(2), visibility=[0.5, 1.0])
    own, sites = np.array([15.0, 30.0]), np.array([60.0, 50.0])
    eta = eta_update(p2, own, sites)
    # the M-step maximises sum_k D_k log(eta a_k) + (N_k - D_k) log(1 - eta a_k): its derivative is 0
    a = p2.visibility
    assert np.sum(own / eta - (sites - own) * a / (1 - eta * a)) == pytest.approx(0.0, abs=1e-8)
    assert 0.5 < eta < 0.7


def test_bad_visibility_is_refused():
    cols = make_columns(sample_model(_params(), 4, 60, random_state=0)[0])
    with pytest.raises(InputError, match="visibility"):
        fit_decoder(cols, visibility=[0.5])
    with pytest.raises(InputError, match="visibility"):
        fit_decoder(cols, visibility=[0.0, 1.0])
    with pytest.raises(InputError, match="visibility"):
        DecoderParams(transmat=np.full((2, 2), 0.5), eta=0.5, extra_rate=np.ones(2), visibility=[1.5, 1.0])
