"""The independent-sites model of the rod decoder: every site's metal drawn from the composition,
no memory along the rod. Fitted by EM from the distinct count vectors of the sites, for the
likelihood-ratio test against the chain and the BIC (see :mod:`probeseq.decoding.model`).
"""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln

from .efficiency import distinct_rows_by_group, distinct_rows_of_rods, eta_mstep
from .model import (ETA_BOUNDS, MIN_RATE, _BLOCK_RODS, _RodData, _split_expected_counts, _split_terms,
                    _unique_rows, split_counts)

__all__ = ['independent_step']


def _split(prep, x):
    """Integer parts and split-ion terms of the distinct rows; soft evidence (``prep.linear``) is
    read linearly: the values themselves, no split ion."""
    if getattr(prep, "linear", False):
        return x, np.zeros_like(x), np.ones(x.shape[0])
    return split_counts(x)


def _own_scale(prep, k: int):
    """Average value a detected own ion adds (1 for counts; ``prep.own_scale`` for soft evidence)."""
    s = getattr(prep, "own_scale", None)
    return np.ones(k) if s is None else np.asarray(s, dtype=float)


def _visibility(visibility):
    """None when every metal has visibility 1 (the scalar formulas, to the bit), else (K,) floats."""
    if visibility is None:
        return None
    v = np.asarray(visibility, dtype=float)
    return None if np.all(v == 1.0) else v


def _eta_new(visibility, own_u, gamma, mult, hu=None):
    """M-step of ``eta`` from the distinct rows' own-ion and state expectations (``hu``: each row's
    rod efficiency, None: 1)."""
    if visibility is None and hu is None:
        return float(np.clip((mult @ own_u).sum() / mult.sum(), *ETA_BOUNDS))
    if visibility is None:
        return eta_mstep(hu, mult, mult * own_u.sum(axis=1), ETA_BOUNDS)
    rel = visibility[None, :] if hu is None else hu[:, None] * visibility[None, :]
    rel = np.broadcast_to(rel, own_u.shape)
    return eta_mstep(rel.reshape(-1), (mult[:, None] * gamma).reshape(-1), (mult[:, None] * own_u).reshape(-1),
                     ETA_BOUNDS)


def independent_step(prep, visibility=None):
    """EM step of the independent-sites model, from the distinct count vectors of the sites.

    ``visibility`` (K,) is the per-metal visibility ``a_k`` of :class:`DecoderParams` (None: 1 for
    every metal); the step maps ``(composition, eta, mu)`` to the next and returns the
    log-likelihood of the state it was given.
    """
    if prep.eff is not None:
        return _independent_step_eff(prep, visibility)
    if isinstance(prep, _RodData):
        x, mult = prep.distinct_rows, prep.distinct_mult
    else:
        x, mult = _unique_rows(prep.x_obs)
    n_int, pi, pi_none = _split(prep, x)
    n = prep.n_obs
    lf = float(mult @ gammaln(n_int + 1.0).sum(axis=1))
    sum_n = mult @ n_int
    vis = _visibility(visibility)
    scale = _own_scale(prep, x.shape[1])

    def step(state):
        comp, eta0, mu = state
        eta = eta0 if vis is None else eta0 * vis
        c, b, xe = _split_terms(n_int, pi, pi_none, mu)  # (U, K) distinct count vectors
        fac = (1.0 - eta) + xe * (eta / mu)
        w = fac * comp
        tot = w.sum(axis=1)
        base = float(sum_n @ np.log(mu)) - n * mu.sum() - lf + float(mult @ np.log(b))
        loglik = float(mult @ np.log(tot)) + base
        gamma = w / tot[:, None]
        own_u = gamma * (xe * (eta / mu) / fac)
        own = mult @ own_u
        counts = mult @ _split_expected_counts(n_int, c, b, gamma, eta, mu, fac)
        comp_new = (mult @ gamma) / n
        eta_new = (float(np.clip(own.sum() / n, *ETA_BOUNDS)) if vis is None
                   else _eta_new(vis, own_u, gamma, mult))
        mu_new = np.maximum((counts - own * scale) / n, MIN_RATE)
        return loglik, (comp_new, eta_new, mu_new)

    return step


def _independent_step_eff(prep, visibility=None):
    """:func:`independent_step` with a per-rod efficiency: the distinct count vectors of each group of
    rods with one ``h``, whose sites have ``1 - eta h`` and rates ``mu h``."""
    h_vals, h_group = np.unique(prep.eff.h_rows, return_inverse=True)
    h_group = h_group.reshape(-1)
    if isinstance(prep, _RodData):
        x, grp, mult = distinct_rows_of_rods(prep.counts, prep.mask, h_group, h_vals.size, prep.distinct_rows,
                                             _BLOCK_RODS)
    else:
        blocks = [(prep.x_obs, h_group[prep.rods][np.nonzero(prep.obs)[1]])]  # x_obs is time-major
        x, grp, mult = distinct_rows_by_group(blocks, h_vals.size)
    hu = h_vals[grp]
    n_int, pi, pi_none = _split(prep, x)
    n = prep.n_obs
    lf = float(mult @ gammaln(n_int + 1.0).sum(axis=1))
    sum_n = mult @ n_int
    log_h = float(mult @ (n_int.sum(axis=1) * np.log(hu)))
    sum_h = float(mult @ hu)
    vis = _visibility(visibility)
    scale = _own_scale(prep, x.shape[1])

    def step(state):
        comp, eta0, mu = state
        eta = eta0 if vis is None else eta0 * vis
        c, b, xe = _split_terms(n_int, pi, pi_none, mu * hu[:, None])
        ome = (1.0 - eta * hu)[:, None] if vis is None else 1.0 - hu[:, None] * eta
        fac = ome + xe * (eta / mu)
        w = fac * comp
        tot = w.sum(axis=1)
        base = float(sum_n @ np.log(mu)) + log_h - sum_h * mu.sum() - lf + float(mult @ np.log(b))
        loglik = float(mult @ np.log(tot)) + base
        gamma = w / tot[:, None]
        own_u = gamma * (xe * (eta / mu) / fac)
        own = mult @ own_u
        counts = mult @ _split_expected_counts(n_int, c, b, gamma, eta, mu, fac, ome)
        eta_new = _eta_new(vis, own_u, gamma, mult, hu)
        mu_new = np.maximum((counts - own * scale) / sum_h, MIN_RATE)
        return loglik, ((mult @ gamma) / n, eta_new, mu_new)

    return step


