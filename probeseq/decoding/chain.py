"""Quantities of a Markov chain of metals along a rod, each defined once.

Every module that reports one of these quantities calls the function here, so the decoder, the
statistics, the report and the terminal print the same number for the same transition matrix.
Notation (``docs/GLOSSARY.md``): K metals, row-stochastic transition matrix ``P`` (``P_ij`` is the
probability that the site after a site of metal i holds metal j), stationary distribution ``mu``.

* :func:`stationary_distribution` -- ``mu P = mu``, ``sum_k mu_k = 1`` (the composition the chain
  keeps along a rod), solved in least squares so that a reducible chain gives one of its
  stationary distributions rather than an error;
* :func:`persistence_per_state`, :func:`persistence` -- writing ``P_kk = mu_k + lam_k (1 - mu_k)``
  (keep the metal with probability ``lam_k``, else draw it anew from the composition) gives
  ``lam_k = (P_kk - mu_k) / (1 - mu_k)``; the persistence of the chain is the composition-weighted
  ``lam = sum_k mu_k lam_k``. It is 0 for independent sites, 1 for a chain that never changes metal
  and negative when metals alternate; for ``P = lam I + (1 - lam) 1 mu`` every ``lam_k = lam``,
  and for two metals ``lam = 1 - P_01 - P_10``;
* :func:`mean_run_lengths` -- ``1 / (1 - P_kk)`` sites, the mean dwell of the chain in metal k;
  :func:`independent_run_lengths` -- ``1 / (1 - f_k)`` sites for independent sites of
  composition f;
* :func:`list_runs` -- the runs (maximal stretches of one metal) on decoded paths, broken at
  masked sites, with whether each run was cut by a rod end or the mask.
"""

from __future__ import annotations

import numba
import numpy as np

from ..exceptions import InputError
from .passes import run_posterior_sums

__all__ = ['runs_table', 'stationary_distribution', 'persistence', 'persistence_per_state', 'mean_run_lengths', 'independent_run_lengths', 'list_runs', 'masked_paths', 'signed_states', 'RUN_LENGTH_DEFINITIONS']

#: what each mean run length of results.json is, in one line (written beside the numbers, so a
#: reader of results.json, the report or runs.csv knows which is the headline and why they differ)
RUN_LENGTH_DEFINITIONS = {
    "mean_run_length_sites": (
        "headline mean run length, sites: 1 / (1 - P_kk) of the fitted transition matrix P (the mean stay "
        "of the fitted chain in metal k, from the model's expected transition counts; not shortened by rod "
        "ends, masked sites or decoding errors); the terminal, the report and the classification use it"),
    "mean_run_length_nm": "the headline mean run length times the site pitch, nm",
    "independent_run_length_sites": "1 / (1 - f_k) sites: the mean run length independent sites of the same "
                                    "composition f would give",
    "run_length_ratio": "mean_run_length_sites / independent_run_length_sites (1 for independent sites)",
    "mean_decoded_run_length_sites": (
        "mean length, sites, of the runs listed in runs.csv (maximal stretches of one metal on the decoded "
        "Viterbi paths, broken at masked sites); runs cut by a rod end or the mask are included and a "
        "decoding error splits a run, so it is shorter than the headline mean_run_length_sites"),
}

def stationary_distribution(transmat) -> np.ndarray:
    """Stationary distribution ``mu`` of transition matrices (``mu P = mu``, ``sum mu = 1``).

    Solved as the least-squares system ``[P^T - I; 1 ... 1] mu = [0; 1]`` for every matrix, so
    reducible chains give one of their stationary distributions rather than failing; small negative
    round-off is clipped to 0 and the result renormalised.

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
        Row-stochastic matrices (dimensionless probabilities); leading axes are a batch.

    Returns
    -------
    (..., K) ndarray of float
        Probabilities (site fractions) summing to 1 along the last axis.
    """
    p = np.asarray(transmat, dtype=float)
    if p.ndim < 2 or p.shape[-1] != p.shape[-2]:
        raise InputError(f"a transition matrix must be (..., K, K), got shape {p.shape}")
    k = p.shape[-1]
    flat = p.reshape(-1, k, k)
    rhs = np.zeros(k + 1)
    rhs[-1] = 1.0
    out = np.empty((flat.shape[0], k))
    for i, a in enumerate(flat):
        m = np.vstack([a.T - np.eye(k), np.ones((1, k))])
        mu = np.clip(np.linalg.lstsq(m, rhs, rcond=None)[0], 0.0, None)
        out[i] = mu / mu.sum()
    return out.reshape(p.shape[:-1])


def persistence_per_state(transmat, stationary=None) -> np.ndarray:
    """Persistence of each metal, ``lam_k = (P_kk - mu_k) / (1 - mu_k)``.

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
        Row-stochastic matrices.
    stationary : (..., K) ndarray of float, optional
        Composition ``mu`` to measure against (site fractions); the chain's own stationary
        distribution by default.

    Returns
    -------
    (..., K) ndarray of float
        Dimensionless; NaN for a metal with ``mu_k = 1``.
    """
    p = np.asarray(transmat, dtype=float)
    mu = stationary_distribution(p) if stationary is None else np.asarray(stationary, dtype=float)
    d = np.diagonal(p, axis1=-2, axis2=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (d - mu) / (1.0 - mu)


def persistence(transmat, stationary=None):
    """Persistence of a chain, ``lam = sum_k mu_k lam_k`` (see :func:`persistence_per_state`).

    The one definition of "persistence" that probeseq reports (decoder, statistics, report,
    terminal). 0 for independent sites, 1 for a chain that never changes metal; for two metals
    ``1 - P_01 - P_10``.

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
        Row-stochastic matrices.
    stationary : (..., K) ndarray of float, optional
        Composition ``mu`` (site fractions); the chain's stationary distribution by default.

    Returns
    -------
    float or (...,) ndarray of float
        Dimensionless; a Python float for a single matrix. Metals with ``mu_k = 1`` are left out
        of the sum.
    """
    p = np.asarray(transmat, dtype=float)
    mu = stationary_distribution(p) if stationary is None else np.asarray(stationary, dtype=float)
    lam = np.nansum(mu * persistence_per_state(p, mu), axis=-1)
    return float(lam) if np.ndim(lam) == 0 else lam


def mean_run_lengths(transmat) -> np.ndarray:
    """Mean run (dwell) length of each metal in the chain, ``1 / (1 - P_kk)``, in sites.

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
        Row-stochastic matrices.

    Returns
    -------
    (..., K) ndarray of float, sites
        ``inf`` for an absorbing metal (``P_kk = 1``). Multiply by the site pitch for nm.
    """
    d = np.diagonal(np.asarray(transmat, dtype=float), axis1=-2, axis2=-1)
    with np.errstate(divide="ignore"):
        return 1.0 / (1.0 - d)


def independent_run_lengths(composition) -> np.ndarray:
    """Mean run length of independent sites of composition f, ``1 / (1 - f_k)``, in sites.

    Parameters
    ----------
    composition : (..., K) ndarray of float
        Site fractions.

    Returns
    -------
    (..., K) ndarray of float, sites
        ``inf`` where ``f_k = 1``.
    """
    f = np.asarray(composition, dtype=float)
    with np.errstate(divide="ignore"):
        return 1.0 / (1.0 - f)


# ---------------------------------------------------------------------- runs on decoded paths
def signed_states(p: np.ndarray) -> np.ndarray:
    """A signed integer view or copy of a state array (no copy for signed integer dtypes).

    Parameters
    ----------
    p : ndarray of int or bool
        Metal indices.

    Returns
    -------
    ndarray of signed int
        ``p`` itself for a signed integer dtype, else a copy in the smallest signed dtype that holds
        its values (int64 for non-integer input).
    """
    kind = p.dtype.kind
    if kind == "i":
        return p
    if kind == "b":
        return p.astype(np.int8)
    if kind == "u":
        return p.astype(np.int16 if p.itemsize == 1 else np.int32 if p.itemsize == 2 else np.int64)
    return p.astype(np.int64)


def masked_paths(paths, mask=None) -> np.ndarray:
    """Paths as a signed integer array, negative where masked.

    A signed integer input keeps its dtype (so int8 paths stay int8); unsigned and boolean inputs
    are widened to the smallest signed type that holds them; anything else is cast to int64. Masked
    sites are set to -1 (in a copy; the input is never changed).

    Parameters
    ----------
    paths : (n_rods, n_sites) array_like of int
        Metal index per site.
    mask : (n_rods, n_sites) array_like of bool, optional
        True at observed sites.

    Returns
    -------
    (n_rods, n_sites) ndarray of signed int
    """
    p = np.asarray(paths)
    if p.ndim != 2:
        raise InputError(f"decoded paths must be (n_rods, n_sites), got shape {p.shape}")
    p = signed_states(p)
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != p.shape:
            raise InputError(f"mask shape {m.shape} does not match decoded paths {p.shape}")
        p = np.where(m, p, p.dtype.type(-1))
    return p


@numba.njit(cache=True, nogil=True)
def _fill_runs(p, rod, start, length, state, left, right, write):
    """Runs of non-negative states in the paths (a masked site ends a run), in path order; returns
    their number. With ``write``, their rod, start, length, state and truncation flags are written
    to the arrays (sized by a first call without)."""
    n_rods, n_sites = p.shape
    q = 0
    for r in range(n_rods):
        s = 0
        while s < n_sites:
            v = p[r, s]
            e = s + 1
            while e < n_sites and p[r, e] == v:
                e += 1
            if v >= 0:
                if write:
                    rod[q] = r
                    start[q] = s
                    length[q] = e - s
                    state[q] = v
                    left[q] = s == 0 or p[r, s - 1] < 0
                    right[q] = e == n_sites or p[r, e] < 0
                q += 1
            s = e
    return q


def _mean_posterior(p, rod, start, length, posteriors) -> np.ndarray:
    """Mean posterior of each run's metal over the run's sites (float64).

    Every valid site after a run's start and before the next run's start is in the run, the
    others count 0: one sum per run from its start to the next start, in one compiled pass
    (:func:`probeseq.decoding.passes.run_posterior_sums`, the sums of ``numpy.add.reduceat``)."""
    post = np.asarray(posteriors)
    if post.ndim != 3 or post.shape[:2] != p.shape:
        raise InputError(f"posteriors must be (n_rods, n_sites, K) matching the paths {p.shape}, "
                         f"got shape {post.shape}")
    return run_posterior_sums(p, post, rod, start) / np.maximum(length, 1)


def list_runs(paths, mask=None, posteriors=None) -> dict:
    """Runs of equal metal along each rod's decoded path, broken at masked sites.

    The one run listing of probeseq: ``runs.csv``, the decoder's run table and the run-length
    statistics all come from it.

    Parameters
    ----------
    paths : (n_rods, n_sites) array_like of int
        Metal index per site, negative where masked; any integer dtype.
    mask : (n_rods, n_sites) array_like of bool, optional
        True at observed sites; sites outside it end a run.
    posteriors : (n_rods, n_sites, K) array_like of float, optional
        Posterior metal probabilities; when given, ``mean_posterior`` is added.

    Returns
    -------
    dict of str -> (n_runs,) ndarray
        ``rod``, ``first_site``, ``last_site``, ``length`` (sites) and ``metal`` (int64);
        ``left_truncated`` and ``right_truncated`` (bool: the run touches a rod end or a masked
        site on that side, so its true length is at least ``length``); with ``posteriors`` also
        ``mean_posterior`` (mean posterior of the run's metal over its sites). Ordered by rod,
        then site.
    """
    p = masked_paths(paths, mask)
    none, flags = np.empty(0, np.int64), np.empty(0, np.bool_)
    n = _fill_runs(p, none, none, none, none, flags, flags, False)  # count them first
    rod, start, length, state = (np.empty(n, np.int64) for _ in range(4))
    left = np.empty(n, np.bool_)
    right = np.empty(n, np.bool_)
    _fill_runs(p, rod, start, length, state, left, right, True)
    out = {"rod": rod, "first_site": start, "last_site": start + length - 1, "length": length,
           "metal": state, "left_truncated": left, "right_truncated": right}
    if posteriors is not None:
        out["mean_posterior"] = _mean_posterior(p, rod, start, length, posteriors)
    return out


def runs_table(path, mask, posteriors) -> dict:
    """Runs of equal metal along each rod's decoded path, broken at masked sites.

    The runs of :func:`probeseq.decoding.chain.list_runs` (the one run listing of probeseq), with the
    columns a decoding keeps.

    Parameters
    ----------
    path : (n_rods, n_sites) ndarray of int
        Metal index per site, -1 at masked sites.
    mask : (n_rods, n_sites) ndarray of bool
    posteriors : (n_rods, n_sites, K) ndarray of float

    Returns
    -------
    dict of str -> (n_runs,) ndarray
        ``rod, first_site, last_site, length, metal`` (int64) and ``mean_posterior`` (mean
        posterior of the run's metal over its sites), ordered by rod then site.
    """
    runs = list_runs(path, mask, posteriors)
    return {key: runs[key] for key in ("rod", "first_site", "last_site", "length", "metal", "mean_posterior")}
