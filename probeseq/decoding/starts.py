"""Starting parameters of the rod model's EM: moment estimates and random starts
(:func:`initial_params`), and the start of the soft-evidence fit from a fit of the counts
(:func:`evidence_start`). See :mod:`probeseq.decoding.model`.
"""

from __future__ import annotations

import math

import numpy as np

from ..lattice.evidence import EXTRAS_LEAST_SHARE
from .model import MIN_RATE, DecoderParams, _Prepared, _RodData

__all__ = ['initial_params', 'evidence_start']


def initial_params(prep: _Prepared, rng, k: int, random: bool, visibility=None) -> DecoderParams:
    """Moment start (``random`` False) or a random start of the EM, for the metals' visibility."""
    comp = prep.sum_x / prep.sum_x.sum()
    vis = np.ones(k) if visibility is None else np.asarray(visibility, dtype=float)
    if np.any(vis != 1.0):
        # own ions show as eta a_k f_k: start from the composition of the sites, not of the counts
        comp = comp / vis
        comp = comp / comp.sum()
    mean_t = prep.totals_mean
    if random:
        eta = float(rng.uniform(0.15, 0.9))
        lam = float(rng.uniform(0.0, 0.95))
        comp = 0.7 * comp + 0.3 * rng.dirichlet(np.ones(k))
    else:
        # moments of the per-site total: Bernoulli(eta) + Poisson(M) has mean - variance = eta^2
        eta = math.sqrt(max(mean_t - prep.totals_var, 0.0025))
        lam = 0.5
    eta = float(np.clip(min(eta, 0.95 * mean_t if mean_t > 0 else eta), 0.05, 0.95))
    if np.any(vis != 1.0):  # the moments see the visible efficiency eta sum_k a_k f_k
        eta = float(min(eta / float(vis @ comp), 0.95 / float(vis.max())))
    if prep.eff is not None:
        eta = min(eta, 0.95 / (prep.eff.max_h * float(vis.max())))  # every rod's eta a_k h below 1
    a = lam * np.eye(k) + (1.0 - lam) * comp[None, :]
    if random:
        a = 0.9 * a + 0.1 * rng.dirichlet(np.ones(k), size=k)
    m = prep.sum_x / prep.n_obs
    mu = np.maximum(np.maximum(m - eta * vis * comp, 0.05 * m), MIN_RATE)
    return DecoderParams(transmat=a / a.sum(1, keepdims=True), eta=eta, extra_rate=mu, visibility=visibility)


def evidence_start(data: _RodData, params: DecoderParams, visibility) -> DecoderParams:
    """Parameters for the soft-evidence fit from a fit of the counts: the same chain and instrument
    efficiency, the metals' visibility ``visibility`` (their capture), and the extra evidence per
    site by moments, ``mu_k = mean(E_k) - eta a_k f_k s_k`` (``s_k`` the evidence of an own ion), at
    least ``EXTRAS_LEAST_SHARE`` of ``mean(E_k)``, the floor of the metal's extras in the ranges'
    shares (:func:`probeseq.lattice.evidence.remove_own`).

    The sites are then decoded from the soft evidence with these parameters: the chain and the
    efficiency come from the counts, whose model is exact for whole ions (a fit of the soft evidence
    itself leans on the approximations of :mod:`probeseq.lattice.evidence` and was seen to bias the
    composition of metals with weak evidence).
    """
    mean = data.sum_n / max(data.n_obs, 1)
    vis = np.ones(mean.size) if visibility is None else np.asarray(visibility, dtype=float)
    own = params.eta * vis * params.stationary * data.own_scale
    mu = np.maximum(mean - own, np.maximum(EXTRAS_LEAST_SHARE * mean, MIN_RATE))
    eta = float(min(params.eta, 0.95 / float(vis.max())))
    return DecoderParams(transmat=params.transmat, eta=eta, extra_rate=mu, visibility=visibility)
