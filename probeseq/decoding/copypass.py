"""Compiled passes of the copy-aware decoding (:mod:`probeseq.decoding.copies`).

Each EM iteration of the master sequence reads every site of every rod twice: once for the
master's emission ``log E_t(m) = sum_r log sum_k C[m, k] e_rt(k)`` and once for each rod's
expected redraws (and, at the end, its site posteriors). The emission factors ``e_rt(k)`` are
those of the per-rod decoder, computed here on the fly from the counts as
:mod:`probeseq.decoding.rodchain` does (whole counts, at most one split ion per site, or soft
evidence read linearly), so no array of the size of the counts is made per iteration. In numpy
the same iteration took about 1.5 s on 5e6 sites (factors recomputed in blocks of rods each
time); here it takes tens of milliseconds.

Sums over rods go through fixed blocks of rods (:data:`RODS_PER_BLOCK`), one partial sum per
block added in block order, so results do not depend on the number of threads.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .. import runtime
from .rodchain import _kernel_arrays, _rod_efficiency, _state_eta, _states, site_factors

__all__ = ["master_log_emission", "rod_pass", "RODS_PER_BLOCK"]

#: rods per partial sum of the master's emission
RODS_PER_BLOCK = 64


@numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _rod_terms(eta, mu, h, r, ome, mur):
    for j in range(ome.size):
        ome[j] = 1.0 - eta[j] * h[r]
        mur[j] = mu[j] * h[r]


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
def _master_kernel(counts, mask, rods, eta, mu, h, C, parts, kt, lin):
    k = len(kt)
    coef = eta / mu
    n_sites = counts.shape[1]
    n_blocks = parts.shape[0]
    for b in numba.prange(n_blocks):
        fac = np.empty((1, k))
        nb = np.empty(k)
        cb = np.empty(k)
        ome = np.empty(k)
        mur = np.empty(k)
        for q in range(b * RODS_PER_BLOCK, min((b + 1) * RODS_PER_BLOCK, rods.size)):
            r = rods[q]
            _rod_terms(eta, mu, h, r, ome, mur)
            for t in range(n_sites):
                if not mask[r, t]:
                    continue
                site_factors(counts, r, t, ome, coef, mur, kt, nb, fac, 0, cb, len(lin) > 0)
                for m in range(k):
                    s = 0.0
                    for j in range(k):
                        s += C[m, j] * fac[0, j]
                    parts[b, t, m] += math.log(max(s, 1e-300))


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
def _rod_kernel(counts, mask, rods, eta, mu, h, C, gamma, eps, f, redraw, n_obs, post, kt, lin):
    k = len(kt)
    coef = eta / mu
    n_sites = counts.shape[1]
    write = post.shape[0] > 0
    for q in numba.prange(rods.size):
        fac = np.empty((1, k))
        nb = np.empty(k)
        cb = np.empty(k)
        ome = np.empty(k)
        mur = np.empty(k)
        w = np.empty(k)
        r = rods[q]
        _rod_terms(eta, mu, h, r, ome, mur)
        red = 0.0
        seen = 0
        for t in range(n_sites):
            if not mask[r, t]:
                continue
            seen += 1
            site_factors(counts, r, t, ome, coef, mur, kt, nb, fac, 0, cb, len(lin) > 0)
            fe = 0.0
            for j in range(k):
                fe += f[j] * fac[0, j]
            wsum = 0.0
            for m in range(k):
                s = 0.0
                for j in range(k):
                    s += C[m, j] * fac[0, j]
                w[m] = gamma[t, m] / max(s, 1e-300)  # P(M_t = m) / sum_k C[m, k] e(k)
                wsum += w[m]
            red += wsum * eps * fe
            if write:
                for j in range(k):
                    p = 0.0
                    for m in range(k):
                        p += w[m] * C[m, j]
                    post[q, t, j] = p * fac[0, j]
        redraw[q] = red
        n_obs[q] = seen


def _arrays(values, mask, rods, eta, mu, rod_efficiency):
    k = np.asarray(mu).size
    values, mask, rods, _, _ = _kernel_arrays(values, mask, rods, rods, rods)
    return (values, mask, rods, _state_eta(eta, k), np.ascontiguousarray(mu, dtype=float),
            _rod_efficiency(rod_efficiency, values.shape[0]))


def master_log_emission(values, mask, rods, eta, mu, C, rod_efficiency=None, linear=False) -> np.ndarray:
    """The master's log emission summed over the given rods.

    Parameters
    ----------
    values : (n_rods, n_sites, K) ndarray of float
        Counts (or soft evidence with ``linear``).
    mask : (n_rods, n_sites) ndarray of bool
    rods : (R,) ndarray of int
    eta : float or (K,) ndarray of float
        Detection probability of a site's own ion (per state).
    mu : (K,) ndarray of float
        Extra rates per channel, counts per site.
    C : (K, K) ndarray of float
        ``C[m, k] = P(rod site holds k | master holds m)``.
    rod_efficiency : (n_rods,) ndarray of float, optional
    linear : bool
        Read fractional values linearly (soft evidence).

    Returns
    -------
    (n_sites, K) ndarray of float
        ``sum_r log sum_k C[m, k] e_rt(k)`` over the rods observed at t (0 where none is).
    """
    values, mask, rods, eta, mu, h = _arrays(values, mask, rods, eta, mu, rod_efficiency)
    k = mu.size
    parts = np.zeros((-(-rods.size // RODS_PER_BLOCK), values.shape[1], k))
    runtime.ensure()
    _master_kernel(values, mask, rods, eta, mu, h, np.ascontiguousarray(C, dtype=float), parts, _states(k),
                   (0,) if linear else ())
    out = np.zeros((values.shape[1], k))
    for p in parts:  # in block order: the same sums whatever the threads
        out += p
    return out


def rod_pass(values, mask, rods, eta, mu, C, gamma, eps, f, rod_efficiency=None, linear=False,
             posteriors=True) -> tuple:
    """Each rod's expected redraws and observed sites, and its unnormalised site posteriors.

    Parameters as :func:`master_log_emission`, and:

    gamma : (n_sites, K) ndarray of float
        The master posterior ``P(M_t = m | data)``.
    eps : float
        Copy error.
    f : (K,) ndarray of float
        Composition the redraws are drawn from.
    posteriors : bool
        Also return the site posteriors.

    Returns
    -------
    post : (R, n_sites, K) ndarray of float, or None
        ``sum_m gamma_tm C[m, k] e(k) / sum_k' C[m, k'] e(k')`` at observed sites, 0 elsewhere.
    redraw : (R,) ndarray of float
        Expected redrawn sites, ``sum_t sum_m gamma_tm eps (f . e) / sum_k C[m, k] e(k)``.
    n_obs : (R,) ndarray of float
        Observed sites.
    """
    values, mask, rods, eta, mu, h = _arrays(values, mask, rods, eta, mu, rod_efficiency)
    k = mu.size
    post = np.zeros((rods.size, values.shape[1], k) if posteriors else (0, 1, k))
    redraw = np.zeros(rods.size)
    n_obs = np.zeros(rods.size)
    runtime.ensure()
    _rod_kernel(values, mask, rods, eta, mu, h, np.ascontiguousarray(C, dtype=float),
                np.ascontiguousarray(gamma, dtype=float), float(eps), np.ascontiguousarray(f, dtype=float),
                redraw, n_obs, post, _states(k), (0,) if linear else ())
    return (post if posteriors else None), redraw, n_obs
