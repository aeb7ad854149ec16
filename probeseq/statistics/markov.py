"""Markov-chain statistics of decoded paths: transition counts and matrices, persistence,
entropy rates and the G^2 test of the chain order.
"""

from __future__ import annotations

import numba
import numpy as np
from scipy import stats as _sps

from ..decoding import chain as _chain
from ..decoding.chain import masked_paths as _masked_paths
from ..decoding.chain import stationary_distribution
from ..exceptions import InputError
from .agreement import _EPS

__all__ = ['transition_matrix', 'composition_from_occupancy', 'persistence', 'entropy_rate_bits', 'entropy_bits', 'g2_markov_test', 'transition_counts_from_paths']

# ---------------------------------------------------------------------- chain quantities
def transition_matrix(counts) -> np.ndarray:
    """Row-normalise transition counts into a transition matrix (the HMM M-step).

    Parameters
    ----------
    counts : (..., K, K) ndarray of float
        Transition counts (expected or hard), from-state on the rows.

    Returns
    -------
    (..., K, K) ndarray of float
        ``P_ij = N_ij / sum_j N_ij``. A row with no counts (a state never left) is filled with the
        column shares of all counts, the independent-sites guess, so it stays a distribution.
    """
    n = np.asarray(counts, dtype=float)
    rows = n.sum(axis=-1, keepdims=True)
    col = n.sum(axis=-2, keepdims=True)
    tot = col.sum(axis=-1, keepdims=True)
    k = n.shape[-1]
    fallback = np.where(tot > 0, col / np.maximum(tot, _EPS), 1.0 / k)
    return np.where(rows > 0, n / np.maximum(rows, _EPS), fallback)


def composition_from_occupancy(occupancy) -> np.ndarray:
    """Composition from (expected) site occupancy counts.

    Parameters
    ----------
    occupancy : (..., n_rods, K) or (..., K) ndarray of float
        Sites of each metal (posterior-summed or counted); summed over the rod axis when 2-D.

    Returns
    -------
    (K,) ndarray of float
        Shares summing to 1.
    """
    occ = np.asarray(occupancy, dtype=float)
    if occ.ndim == 2:
        occ = occ.sum(axis=0)
    return occ / max(float(occ.sum()), _EPS)


def persistence(transmat, mu=None):
    """Persistence of a chain: the summary ``lam`` and the per-metal ``lam_k``.

    Both come from :mod:`probeseq.decoding.chain` (:func:`probeseq.decoding.chain.persistence` and
    :func:`probeseq.decoding.chain.persistence_per_state`), the one definition that the decoder, the
    statistics and the report use: ``lam_k = (P_kk - mu_k) / (1 - mu_k)``, ``lam = sum_k mu_k lam_k``.

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
        Row-stochastic matrices.
    mu : (..., K) ndarray of float, optional
        Composition to measure against (site fractions); the chain's stationary distribution by
        default.

    Returns
    -------
    lam : (...,) ndarray of float
        ``sum_k mu_k lam_k``, dimensionless.
    lam_k : (..., K) ndarray of float
        Dimensionless.
    """
    p = np.asarray(transmat, dtype=float)
    mu = stationary_distribution(p) if mu is None else np.asarray(mu, dtype=float)
    lam_k = _chain.persistence_per_state(p, mu)
    return np.asarray(_chain.persistence(p, mu)), lam_k


def _xlog2x(p):
    p = np.asarray(p, dtype=float)
    return np.where(p > 0, p * np.log2(np.where(p > 0, p, 1.0)), 0.0)


def entropy_rate_bits(transmat, mu=None) -> np.ndarray:
    """Entropy rate of a stationary Markov chain, bits per site.

    ``H = -sum_i mu_i sum_j P_ij log2 P_ij`` (Cover & Thomas 2006, Thm 4.2.4).

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
    mu : (..., K) ndarray of float, optional
        Stationary distribution; computed when omitted.

    Returns
    -------
    (...,) ndarray of float, bits per site
    """
    p = np.asarray(transmat, dtype=float)
    mu = stationary_distribution(p) if mu is None else np.asarray(mu, dtype=float)
    return -np.sum(mu * _xlog2x(p).sum(axis=-1), axis=-1)


def entropy_bits(composition) -> np.ndarray:
    """Shannon entropy of independent sites, ``-sum f log2 f``, bits per site."""
    return -_xlog2x(composition).sum(axis=-1)


def g2_markov_test(counts):
    """Likelihood-ratio (G^2) test of independent sites against a first-order chain.

    ``G^2 = 2 sum_ij N_ij log(N_ij N / (N_i. N_.j))`` with ``(K-1)^2`` degrees of freedom
    (Anderson & Goodman 1957), computed on (expected) transition counts.

    Parameters
    ----------
    counts : (..., K, K) ndarray of float

    Returns
    -------
    g2 : (...,) ndarray of float
    df : int
    p_value : (...,) ndarray of float
    """
    n = np.asarray(counts, dtype=float)
    k = n.shape[-1]
    r = n.sum(axis=-1, keepdims=True)
    c = n.sum(axis=-2, keepdims=True)
    t = r.sum(axis=-2, keepdims=True)
    expct = r * c / np.maximum(t, _EPS)
    ok = (n > 0) & (expct > 0)
    term = np.where(ok, n * np.log(np.where(ok, n, 1.0) / np.where(ok, expct, 1.0)), 0.0)
    g2 = np.maximum(2.0 * term.sum(axis=(-1, -2)), 0.0)
    df = (k - 1) ** 2
    return g2, df, _sps.chi2.sf(g2, df)


def transition_counts_from_paths(paths, n_states: int, mask=None):
    """Hard transition counts and occupancy per rod, counted on state paths.

    Only transitions between two consecutive unmasked sites count.

    Parameters
    ----------
    paths : (n_rods, n_sites) ndarray of int
        State index per site, negative where masked; any integer dtype.
    n_states : int
    mask : (n_rods, n_sites) ndarray of bool, optional

    Returns
    -------
    transitions : (n_rods, K, K) ndarray of float
    occupancy : (n_rods, K) ndarray of float
    """
    p = _masked_paths(paths, mask)
    n_rods, n_sites = p.shape
    k = int(n_states)
    top = int(p.max(initial=-1))
    if top >= k:
        raise InputError(f"paths hold state {top}, expected states below n_states={k}")
    tr = np.zeros((n_rods, k, k), dtype=np.int64)
    occ = np.zeros((n_rods, k), dtype=np.int64)
    _count_transitions(p, tr, occ)
    return tr.astype(float), occ.astype(float)


@numba.njit(cache=True, nogil=True)
def _count_transitions(p, tr, occ):
    """Add each rod's state counts to occ and its transitions between unmasked sites to tr."""
    n_rods, n_sites = p.shape
    for r in range(n_rods):
        prev = -1
        for s in range(n_sites):
            v = np.int64(p[r, s])
            if v >= 0:
                occ[r, v] += 1
                if prev >= 0:
                    tr[r, prev, v] += 1
            prev = v


# ---------------------------------------------------------------------- decoded paths
def _state_dtype(n_states: int):
    """Smallest signed integer dtype holding -1 and states 0..n_states-1."""
    for dt in (np.int8, np.int16, np.int32):
        if n_states <= np.iinfo(dt).max:
            return np.dtype(dt)
    return np.dtype(np.int64)
