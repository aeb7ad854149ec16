"""Statistics of decoded metal sequences along rods, with bootstrap intervals over rods.

Everything here works on plain arrays; :func:`compute_statistics` is the thin wrapper that reads
them from a decoding result (and, for what it lacks, from the rod columns).

Estimates account for decoding noise by using the fitted model rather than the noisy most likely
path: the transition matrix is the M-step of the fitted hidden Markov model, i.e. the row-normalised
sum of the *expected* transition counts (posterior-summed xi) over rods, and the composition is the
posterior-summed site occupancy. Quantities that are by definition properties of the decoded path
(the run-length distribution, the Wald-Wolfowitz runs test) use the path, and say so.

Definitions (K metals, fitted transition matrix P, stationary distribution mu, composition f):

* mean run length of metal k: ``1 / (1 - P_kk)`` sites (the mean dwell of a Markov chain),
  and ``1 / (1 - f_k)`` for independent sites of the same composition;
* persistence: ``P_kk = mu_k + lam_k (1 - mu_k)``, so ``lam_k = (P_kk - mu_k) / (1 - mu_k)``; the
  summary ``lam = sum_k mu_k lam_k``. For K = 2 every ``lam_k = 1 - p01 - p10``;
* entropy rate ``H = -sum_ij mu_i P_ij log2 P_ij`` bits per site (Cover & Thomas 2006, Thm 4.2.4),
  against ``H(f) = -sum_k f_k log2 f_k`` for independent sites;
* runs test: Wald & Wolfowitz (1940) on the binary sequence "metal k or not", within each
  contiguous stretch of decoded sites, combined over stretches as ``Z = (sum R - sum E) /
  sqrt(sum Var)``;
* rod-to-rod agreement: the pooled within-pair Pearson correlation of the posterior probability of
  the least abundant metal between neighbouring rods at depth lags ``-max_lag..max_lag``, against
  a null of circular shifts of one rod of each pair (and, for reference, non-neighbouring pairs).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import stats as _sps

from .exceptions import DataQualityWarning, InputError

__all__ = [
    "RunStatistics",
    "RunLengths",
    "RodAgreement",
    "compute_statistics",
    "statistics_from_arrays",
    "transition_matrix",
    "stationary_distribution",
    "composition_from_occupancy",
    "mean_run_length",
    "independent_run_length",
    "persistence",
    "entropy_rate_bits",
    "entropy_bits",
    "g2_markov_test",
    "transition_counts_from_paths",
    "decoded_runs",
    "run_length_distribution",
    "runs_expectation",
    "runs_test",
    "rod_agreement",
    "neighbour_pairs",
]

_EPS = 1e-300


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


def stationary_distribution(transmat) -> np.ndarray:
    """Stationary distribution mu of a transition matrix (mu P = mu, sum mu = 1).

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
        Row-stochastic matrices.

    Returns
    -------
    (..., K) ndarray of float
    """
    p = np.asarray(transmat, dtype=float)
    k = p.shape[-1]
    a = np.swapaxes(p, -1, -2) - np.eye(k)
    a = a.copy()
    a[..., -1, :] = 1.0
    b = np.zeros(p.shape[:-1])
    b[..., -1] = 1.0
    try:
        mu = np.linalg.solve(a, b[..., None])[..., 0]
    except np.linalg.LinAlgError:
        flat_a = a.reshape(-1, k, k)
        flat_b = b.reshape(-1, k)
        mu = np.stack([np.linalg.lstsq(flat_a[i], flat_b[i], rcond=None)[0] for i in range(len(flat_a))])
        mu = mu.reshape(p.shape[:-1])
    mu = np.clip(mu, 0.0, None)
    return mu / np.maximum(mu.sum(axis=-1, keepdims=True), _EPS)


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


def mean_run_length(transmat) -> np.ndarray:
    """Mean run (dwell) length of each state, ``1 / (1 - P_kk)``, in sites.

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float

    Returns
    -------
    (..., K) ndarray of float, sites
        ``inf`` for an absorbing state.
    """
    d = np.diagonal(np.asarray(transmat, dtype=float), axis1=-2, axis2=-1)
    with np.errstate(divide="ignore"):
        return 1.0 / (1.0 - d)


def independent_run_length(composition) -> np.ndarray:
    """Mean run length of independent sites of composition f, ``1 / (1 - f_k)``, in sites."""
    f = np.asarray(composition, dtype=float)
    with np.errstate(divide="ignore"):
        return 1.0 / (1.0 - f)


def persistence(transmat, mu=None):
    """Persistence of a chain: per-state ``lam_k`` and the mu-weighted summary.

    ``P_kk = mu_k + lam_k (1 - mu_k)`` as in the simulator's chains (keep the state with
    probability lam, else redraw from the composition), so ``lam_k = (P_kk - mu_k)/(1 - mu_k)``:
    0 for independent sites, 1 for a chain that never changes state, negative for alternation.

    Parameters
    ----------
    transmat : (..., K, K) ndarray of float
    mu : (..., K) ndarray of float, optional
        Composition to measure against; the chain's stationary distribution by default.

    Returns
    -------
    lam : (...,) ndarray of float
        ``sum_k mu_k lam_k``.
    lam_k : (..., K) ndarray of float
    """
    p = np.asarray(transmat, dtype=float)
    mu = stationary_distribution(p) if mu is None else np.asarray(mu, dtype=float)
    d = np.diagonal(p, axis1=-2, axis2=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        lam_k = (d - mu) / (1.0 - mu)
    lam = np.nansum(mu * lam_k, axis=-1)
    return lam, lam_k


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
        State index per site, negative where masked.
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
    if p.max(initial=-1) >= k:
        raise InputError(f"paths hold state {int(p.max())}, expected states below n_states={k}")
    rod = np.broadcast_to(np.arange(n_rods)[:, None], p.shape)
    v = p >= 0
    occ = np.bincount((rod[v] * k + p[v]), minlength=n_rods * k).reshape(n_rods, k).astype(float)
    both = v[:, :-1] & v[:, 1:]
    a, b, rr = p[:, :-1][both], p[:, 1:][both], rod[:, :-1][both]
    tr = np.bincount((rr * k + a) * k + b, minlength=n_rods * k * k).reshape(n_rods, k, k).astype(float)
    return tr, occ


# ---------------------------------------------------------------------- decoded paths
def _masked_paths(paths, mask=None) -> np.ndarray:
    p = np.asarray(paths)
    if p.ndim != 2:
        raise InputError(f"decoded paths must be (n_rods, n_sites), got shape {p.shape}")
    p = p.astype(np.int64)
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != p.shape:
            raise InputError(f"mask shape {m.shape} does not match decoded paths {p.shape}")
        p = np.where(m, p, -1)
    return p


@dataclass(frozen=True)
class RunLengths:
    """Runs (maximal stretches of one state) on decoded paths.

    Attributes
    ----------
    rod, start, length, state : (n_runs,) ndarray of int
        Rod, first site, length in sites and state of each run.
    left_truncated, right_truncated : (n_runs,) ndarray of bool
        The run touches the rod end or a masked site on that side, so its true length is unknown
        (at least ``length``).
    """

    rod: np.ndarray
    start: np.ndarray
    length: np.ndarray
    state: np.ndarray
    left_truncated: np.ndarray
    right_truncated: np.ndarray

    @property
    def complete(self) -> np.ndarray:
        """(n_runs,) bool: runs whose both ends were observed."""
        return ~(self.left_truncated | self.right_truncated)


def decoded_runs(paths, mask=None) -> RunLengths:
    """Split decoded paths into runs, marking those cut by a rod end or the mask.

    Parameters
    ----------
    paths : (n_rods, n_sites) ndarray of int
        State per site, negative where masked.
    mask : (n_rods, n_sites) ndarray of bool, optional

    Returns
    -------
    RunLengths
    """
    p = _masked_paths(paths, mask)
    n_rods, n_sites = p.shape
    w = n_sites + 2
    pad = np.full((n_rods, w), -1, dtype=np.int64)
    pad[:, 1:-1] = p
    flat = pad.ravel()
    change = np.flatnonzero(flat[1:] != flat[:-1]) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [flat.size]])
    vals = flat[starts]
    keep = vals >= 0
    s, e, v = starts[keep], ends[keep], vals[keep]
    return RunLengths(
        rod=s // w,
        start=s % w - 1,
        length=e - s,
        state=v,
        left_truncated=flat[s - 1] < 0,
        right_truncated=flat[e] < 0,
    )


def run_length_distribution(runs: RunLengths, n_states: int, transmat=None, composition=None,
                            max_length: int | None = None) -> dict:
    """Run-length distribution of decoded runs per state, with the geometric laws to compare.

    Complete runs (both ends seen) give an empirical probability mass function. Runs cut at their
    end by the rod end or the mask are right-censored: the survival function ``S(l) = P(L > l)``
    is the discrete Kaplan-Meier estimate over runs whose start was seen (complete runs end at their
    length; a run cut after c sites counts as at risk up to length c - 1),
    which is unbiased by the truncation that makes the mean of complete runs too short.
    Independent sites of composition f give ``L ~ Geometric(1 - f_k)``: ``P(L = l) =
    f_k^(l-1) (1 - f_k)``, ``S(l) = f_k^l``; the fitted chain gives ``Geometric(1 - P_kk)``.

    Parameters
    ----------
    runs : RunLengths
    n_states : int
    transmat : (K, K) ndarray of float, optional
        Fitted chain, for its geometric law.
    composition : (K,) ndarray of float, optional
        For the independent-sites geometric law.
    max_length : int, optional
        Longest length tabulated; the longest observed run by default.

    Returns
    -------
    dict
        Per state index: ``length`` (1..L), ``n_complete`` (complete runs of each length),
        ``pmf_complete``, ``km_survival``, ``n_runs``, ``n_truncated``, ``mean_complete_sites``
        (biased short by truncation), ``pmf_independent``, ``sf_independent``, ``pmf_chain``,
        ``sf_chain`` (arrays over ``length``; NaN when the law is not given).
    """
    out = {}
    top = int(runs.length.max(initial=1)) if max_length is None else int(max_length)
    top = max(top, 1)
    ell = np.arange(1, top + 1)
    for k in range(int(n_states)):
        sel = runs.state == k
        ln = runs.length[sel]
        comp = runs.complete[sel]
        start_seen = ~runs.left_truncated[sel]
        n_complete = np.bincount(np.minimum(ln[comp], top + 1), minlength=top + 2)[1:top + 1].astype(float)
        nc_tot = float(comp.sum())
        # Kaplan-Meier over runs with a seen start: events = complete runs, censored = right cut
        lk = ln[start_seen]
        ev = comp[start_seen]
        # a run cut after c sites is known to have lasted at least c sites, i.e. not to have
        # ended at 1..c-1: it is at risk for lengths below c only
        d = np.bincount(np.minimum(lk[ev], top + 1), minlength=top + 2)[1:top + 1].astype(float)
        eff = np.where(ev, lk, lk - 1)
        allc = np.bincount(np.minimum(eff, top + 1), minlength=top + 2)[1:].astype(float)
        at_risk = np.cumsum(allc[::-1])[::-1][:top]
        with np.errstate(divide="ignore", invalid="ignore"):
            hazard = np.where(at_risk > 0, d / np.maximum(at_risk, 1.0), 0.0)
        km = np.cumprod(1.0 - hazard)
        pmf_i, sf_i = _geometric(ell, None if composition is None else np.asarray(composition)[k])
        pmf_c, sf_c = _geometric(ell, None if transmat is None else np.asarray(transmat)[k, k])
        out[k] = {
            "length": ell,
            "n_complete": n_complete,
            "pmf_complete": n_complete / nc_tot if nc_tot > 0 else np.full(top, np.nan),
            "km_survival": km,
            "n_runs": int(sel.sum()),
            "n_truncated": int((~comp).sum()),
            "mean_complete_sites": float(ln[comp].mean()) if nc_tot > 0 else float("nan"),
            "pmf_independent": pmf_i,
            "sf_independent": sf_i,
            "pmf_chain": pmf_c,
            "sf_chain": sf_c,
        }
    return out


def _geometric(ell, stay):
    """pmf and survival of run lengths ``ell`` when each next site stays with probability ``stay``."""
    if stay is None or not np.isfinite(stay):
        return np.full(len(ell), np.nan), np.full(len(ell), np.nan)
    q = float(np.clip(stay, 0.0, 1.0))
    sf = q ** ell.astype(float)
    pmf = q ** (ell - 1.0) * (1.0 - q)
    return pmf, sf


# ---------------------------------------------------------------------- runs test
def runs_expectation(n1, n2):
    """Mean and variance of the number of runs of a random arrangement of n1 ones and n2 zeros.

    ``E[R] = 2 n1 n2 / n + 1``, ``Var[R] = 2 n1 n2 (2 n1 n2 - n) / (n^2 (n - 1))`` (Wald &
    Wolfowitz 1940); 1 and 0 when one of the counts is zero.

    Parameters
    ----------
    n1, n2 : ndarray of float

    Returns
    -------
    mean, var : ndarray of float
    """
    n1 = np.asarray(n1, dtype=float)
    n2 = np.asarray(n2, dtype=float)
    n = n1 + n2
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.where(n > 0, 2.0 * n1 * n2 / np.maximum(n, 1.0) + 1.0, 0.0)
        var = np.where(n > 1, 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * np.maximum(n - 1.0, 1.0)), 0.0)
    return mean, np.maximum(var, 0.0)


def _runs_per_rod(paths, n_states: int, mask=None):
    """Per rod and state: observed runs R, expected E and variance V of "state k or not".

    Each contiguous stretch of unmasked sites is a separate sequence; its R, E, V are summed per rod.
    Returns three (n_rods, K) arrays.
    """
    p = _masked_paths(paths, mask)
    n_rods, n_sites = p.shape
    v = p >= 0
    seg_start = v.copy()
    seg_start[:, 1:] &= ~v[:, :-1]
    seg_id = np.cumsum(seg_start.ravel()).reshape(p.shape) - 1
    n_seg = int(seg_start.sum())
    k = int(n_states)
    r_out = np.zeros((n_rods, k))
    e_out = np.zeros((n_rods, k))
    v_out = np.zeros((n_rods, k))
    if n_seg == 0:
        return r_out, e_out, v_out
    seg_rod = np.broadcast_to(np.arange(n_rods)[:, None], p.shape)[seg_start]
    sid = seg_id[v]
    n_tot = np.bincount(sid, minlength=n_seg).astype(float)
    both = v[:, :-1] & v[:, 1:]
    pair_seg = seg_id[:, :-1][both]
    for s in range(k):
        b = p == s
        n1 = np.bincount(sid, weights=b[v].astype(float), minlength=n_seg)
        ch = (b[:, :-1] != b[:, 1:])[both]
        r = 1.0 + np.bincount(pair_seg, weights=ch.astype(float), minlength=n_seg)
        mean, var = runs_expectation(n1, n_tot - n1)
        r_out[:, s] = np.bincount(seg_rod, weights=r, minlength=n_rods)
        e_out[:, s] = np.bincount(seg_rod, weights=mean, minlength=n_rods)
        v_out[:, s] = np.bincount(seg_rod, weights=var, minlength=n_rods)
    return r_out, e_out, v_out


def _z_from_sums(r, e, v):
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(v > 0, (r - e) / np.sqrt(np.maximum(v, _EPS)), np.nan)
    return z, 2.0 * _sps.norm.sf(np.abs(z))


def runs_test(paths, n_states: int, mask=None) -> dict:
    """Wald-Wolfowitz runs test of each state against the rest on decoded paths.

    Each contiguous stretch of unmasked sites of each rod is one sequence; the observed numbers of
    runs and their expectations and variances under random arrangement are summed over all
    stretches, ``Z = (sum R - sum E) / sqrt(sum Var)``, two-sided normal p-value. Negative Z means
    fewer runs than random, i.e. clustering. For a single sequence this is the uncorrected
    one-sample runs test.

    Parameters
    ----------
    paths : (n_rods, n_sites) ndarray of int
    n_states : int
    mask : (n_rods, n_sites) ndarray of bool, optional

    Returns
    -------
    dict
        ``z``, ``p`` : (K,) ndarray of float; ``n_runs``, ``expected_runs``, ``var_runs`` : (K,).
    """
    r, e, v = _runs_per_rod(paths, n_states, mask)
    rs, es, vs = r.sum(0), e.sum(0), v.sum(0)
    z, pv = _z_from_sums(rs, es, vs)
    return {"z": z, "p": pv, "n_runs": rs, "expected_runs": es, "var_runs": vs}


# ---------------------------------------------------------------------- rod-to-rod agreement
def neighbour_pairs(rod_xy_nm, tolerance: float = 1.2) -> np.ndarray:
    """Pairs (i < j) of rods closer than ``tolerance`` times the nearest rod-rod distance.

    Parameters
    ----------
    rod_xy_nm : (n_rods, 2) ndarray of float, nm
    tolerance : float

    Returns
    -------
    (n_pairs, 2) ndarray of int
    """
    from scipy.spatial import cKDTree

    xy = np.asarray(rod_xy_nm, dtype=float).reshape(-1, 2)
    if len(xy) < 2:
        return np.zeros((0, 2), dtype=np.int64)
    tree = cKDTree(xy)
    d, _ = tree.query(xy, k=2)
    nearest = float(np.median(d[:, 1]))
    pairs = tree.query_pairs(tolerance * nearest, output_type="ndarray")
    return np.sort(pairs.astype(np.int64), axis=1) if len(pairs) else np.zeros((0, 2), dtype=np.int64)


@dataclass(frozen=True)
class RodAgreement:
    """Agreement of neighbouring rods in the indicator of one metal.

    Attributes
    ----------
    metal : int
        State whose posterior probability is correlated.
    lags : (n_lags,) ndarray of int, sites
        Depth lags d: site s of the first rod of a pair against site s + d of the second.
    corr_lags : (n_lags,) ndarray of float
        Pooled within-pair Pearson correlation at each lag.
    corr : float
        Correlation at lag 0.
    statistic : float
        Test statistic, the largest correlation over lags.
    best_lag : int, sites
    p_value : float
        ``(1 + #{null >= statistic}) / (1 + n_null)`` against circular shifts of one rod of each
        neighbour pair.
    null : (n_null,) ndarray of float
        Statistic of each circular-shift null replicate.
    null_mean : float
    corr_nonneighbour : float
        Lag-0 correlation of non-neighbouring pairs (a comparison: high when every rod repeats
        one sequence, near 0 when agreement is local or absent).
    p_nonneighbour : float
        p-value of the statistic against sets of non-neighbouring pairs.
    kappa : float
        Cohen's kappa of the decoded states of neighbouring rods at lag 0.
    corr_corrected_lags : (n_lags,) ndarray of float
        ``corr_lags`` corrected for decoding noise (see ``reliability``): an estimate of the
        correlation of the true metal indicators. Equal to ``corr_lags`` for hard (0/1) values.
    corr_corrected : float
        Corrected correlation at lag 0.
    statistic_corrected : float
        Corrected correlation at ``best_lag``; the number compared with a copy threshold.
    reliability : float
        Pooled ``Var(p) / (Var(p) + E[p (1 - p)])`` of the posterior values p at lag 0: the
        share of the true indicator's variance that the decoding recovers (1 for hard values).
    pair_sums : (n_pairs, n_lags, 5) ndarray of float
        Per neighbour pair and lag: centred cross sum, the two centred sums of squares and the
        two summed posterior variances ``sum p (1 - p)``.
    pair_confusion : (n_pairs, K, K) ndarray of float
        Per pair, the counts of decoded state pairs at lag 0 (for kappa).
    n_pairs : int
    n_sites_compared : int
        Site pairs unmasked in both rods at lag 0.
    """

    metal: int
    lags: np.ndarray
    corr_lags: np.ndarray
    corr: float
    statistic: float
    best_lag: int
    p_value: float
    null: np.ndarray
    null_mean: float
    corr_nonneighbour: float
    p_nonneighbour: float
    kappa: float
    corr_corrected_lags: np.ndarray
    corr_corrected: float
    statistic_corrected: float
    reliability: float
    pair_sums: np.ndarray
    pair_confusion: np.ndarray
    n_pairs: int
    n_sites_compared: int


def _lag_sums(x, m, i, j, lags, probabilities: bool = False):
    """Per pair and linear lag: centred sums (cxy, cxx, cyy), and, for posterior probabilities,
    the summed posterior variances (sum x(1-x) of each rod); (P, n_lags, 5), and counts (P, n_lags)."""
    n_sites = x.shape[1]
    out = np.zeros((len(i), len(lags), 5))
    cnt = np.zeros((len(i), len(lags)))
    for li, d in enumerate(lags):
        if abs(d) >= n_sites:
            continue
        if d >= 0:
            sl_a, sl_b = slice(0, n_sites - d), slice(d, n_sites)
        else:
            sl_a, sl_b = slice(-d, n_sites), slice(0, n_sites + d)
        xa, ma = x[i, sl_a], m[i, sl_a]
        xb, mb = x[j, sl_b], m[j, sl_b]
        mm = ma & mb
        xa = np.where(mm, xa, 0.0)
        xb = np.where(mm, xb, 0.0)
        n = mm.sum(axis=1).astype(float)
        sx, sy = xa.sum(1), xb.sum(1)
        nn = np.maximum(n, 1.0)
        out[:, li, 0] = (xa * xb).sum(1) - sx * sy / nn
        out[:, li, 1] = (xa * xa).sum(1) - sx * sx / nn
        out[:, li, 2] = (xb * xb).sum(1) - sy * sy / nn
        if probabilities:
            out[:, li, 3] = (xa * (1.0 - xa)).sum(1)
            out[:, li, 4] = (xb * (1.0 - xb)).sum(1)
        cnt[:, li] = n
    return np.maximum(out, [-np.inf, 0.0, 0.0, 0.0, 0.0]), cnt


def _corr_from_sums(s):
    """Pooled correlation from summed centred sums (..., 3) -> (...)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        den = np.sqrt(s[..., 1] * s[..., 2])
        return np.where(den > 0, s[..., 0] / np.where(den > 0, den, 1.0), np.nan)


def _rod_ffts(x, m):
    """Real FFTs along sites of the masked values, their squares and the mask, per rod."""
    a = np.where(m, x, 0.0)
    return np.fft.rfft(a, axis=1), np.fft.rfft(a * a, axis=1), np.fft.rfft(m.astype(float), axis=1)


def _corrected_from_sums(s):
    """Correlation corrected for decoding noise from summed sums (..., 5) -> (...).

    With posterior means p = E[X | data] of true indicators X and independent decoding noise in
    the two rods, corr(p_i, p_j) = sqrt(r_i r_j) corr(X_i, X_j), where the reliability
    r = Var(p) / Var(X) and Var(X) = Var(p) + E[p (1 - p)] (law of total variance); dividing by
    sqrt(r_i r_j) (Spearman's correction for attenuation) estimates corr(X_i, X_j). This is exact
    when each site's posterior depends on that site's data only (independent sites); when the
    chain pools neighbouring sites the correction overshoots, so the result is clipped to [-1, 1].
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        den = s[..., 1] * s[..., 2]
        num = s[..., 0] * np.sqrt((s[..., 1] + s[..., 3]) * (s[..., 2] + s[..., 4]))
        return np.where(den > 0, np.clip(num / np.where(den > 0, den, 1.0), -1.0, 1.0), np.nan)


def _reliability_from_sums(s):
    """Pooled reliability Var(p) / (Var(p) + E[p(1-p)]) over both rods, from sums (..., 5)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        v = s[..., 1] + s[..., 2]
        return np.where(v > 0, v / (v + s[..., 3] + s[..., 4]), np.nan)


def _circular_raw(x, m, i, j, ffts=None):
    """Raw circular cross sums for all shifts t: site s of rod i with site (s + t) mod n of rod j.

    Returns (P, n_sites, 6): N, Sx, Sy, Sxx, Syy, Sxy.
    """
    n = x.shape[1]
    fa, fa2, fm = _rod_ffts(x, m) if ffts is None else ffts

    def cc(u, v):
        return np.fft.irfft(np.conj(u) * v, n=n, axis=1)

    return np.stack([
        np.rint(cc(fm[i], fm[j])),
        cc(fa[i], fm[j]),
        cc(fm[i], fa[j]),
        cc(fa2[i], fm[j]),
        cc(fm[i], fa2[j]),
        cc(fa[i], fa[j]),
    ], axis=-1)


def _centred(raw):
    """(..., 6) raw sums -> (..., 3) centred sums."""
    n = np.maximum(raw[..., 0], 1.0)
    sx, sy = raw[..., 1], raw[..., 2]
    cxy = raw[..., 5] - sx * sy / n
    cxx = np.maximum(raw[..., 3] - sx * sx / n, 0.0)
    cyy = np.maximum(raw[..., 4] - sy * sy / n, 0.0)
    return np.stack([cxy, cxx, cyy], axis=-1)


def _circular_centred(x, m, i, j, chunk: int = 256):
    """Centred circular cross sums (P, n_sites, 3) for every shift, computed in chunks of pairs."""
    out = np.empty((len(i), x.shape[1], 3))
    ffts = _rod_ffts(x, m)
    for c0 in range(0, len(i), chunk):
        sl = slice(c0, c0 + chunk)
        out[sl] = _centred(_circular_raw(x, m, i[sl], j[sl], ffts))
    return out


def _shift_null(cen, lags, n_null, tmin, rng):
    """Null statistics: each pair's second rod shifted by its own random offset in [tmin, n - tmin]."""
    p, n, _ = cen.shape
    flat = cen.reshape(p * n, 3)
    base = (np.arange(p) * n)[None, :, None]
    null = np.empty(int(n_null))
    chunk = max(1, int(4e6 // max(1, p * len(lags) * 3)))
    for c0 in range(0, int(n_null), chunk):
        c1 = min(int(n_null), c0 + chunk)
        shift = rng.integers(tmin, n - tmin + 1, size=(c1 - c0, p, 1))
        idx = base + (shift + lags[None, None, :]) % n  # (c, P, L)
        cs = flat[idx].sum(axis=1)  # (c, L, 3)
        null[c0:c1] = np.nanmax(_corr_from_sums(cs), axis=1)
    return null


def rod_agreement(values, mask, neighbours, metal: int = 0, states=None, n_states: int | None = None,
                  max_lag: int = 3, n_null: int = 199, rng=None) -> RodAgreement:
    """Correlation of one metal's indicator between neighbouring rods, with a permutation null.

    For every neighbour pair (i, j) and lag d only sites unmasked in both rods are used; the
    values are centred within each pair and lag, and the centred cross sums and sums of squares
    are pooled over pairs into one Pearson correlation per lag. The test statistic is the largest
    correlation over lags. When the values are posterior probabilities (all in [0, 1]) the
    correlation is also given corrected for decoding noise (Spearman's correction for attenuation
    with the posterior reliability, :func:`_corrected_from_sums`); the test itself uses the
    uncorrected values, so the correction does not change the p-value. Null: each replicate shifts the second rod of every pair circularly
    (with its mask) by an independent random offset of at least ``max(2 max_lag + 1, n_sites // 10)``
    sites, which keeps each rod's own along-rod structure but breaks the depth alignment; the
    p-value is ``(1 + #{null >= observed}) / (1 + n_null)``. A second null pairs rods that are not
    neighbours; it is reported for comparison only, because when every rod repeats one sequence
    non-neighbours agree as well as neighbours do.

    Parameters
    ----------
    values : (n_rods, n_sites) ndarray of float
        Per-site value to correlate, e.g. the posterior probability of the least abundant metal.
    mask : (n_rods, n_sites) ndarray of bool
    neighbours : (n_pairs, 2) ndarray of int
    metal : int
        Recorded as the metal the values refer to.
    states : (n_rods, n_sites) ndarray of int, optional
        Decoded states, for Cohen's kappa.
    n_states : int, optional
        Number of states for kappa; from ``states`` when omitted.
    max_lag : int, sites
    n_null : int
    rng : numpy.random.Generator, optional

    Returns
    -------
    RodAgreement
    """
    rng = np.random.default_rng(rng)
    x = np.asarray(values, dtype=float)
    m = np.asarray(mask, dtype=bool) & np.isfinite(x)
    x = np.where(m, x, 0.0)
    nb = np.asarray(neighbours, dtype=np.int64).reshape(-1, 2)
    n_rods, n_sites = x.shape
    if nb.size and (nb.min() < 0 or nb.max() >= n_rods):
        raise InputError(f"neighbours refer to rods outside 0..{n_rods - 1}")
    nb = nb[nb[:, 0] != nb[:, 1]]
    lags = np.arange(-int(max_lag), int(max_lag) + 1)
    i, j = nb[:, 0], nb[:, 1]
    probs = bool(np.all((x >= 0.0) & (x <= 1.0)))
    sums, cnt = _lag_sums(x, m, i, j, lags, probabilities=probs)
    tot = sums.sum(axis=0)
    corr_lags = _corr_from_sums(tot)
    corr_c = _corrected_from_sums(tot)
    zero = int(max_lag)
    stat = float(np.nanmax(corr_lags)) if np.isfinite(corr_lags).any() else float("nan")
    best_i = int(np.nanargmax(corr_lags)) if np.isfinite(corr_lags).any() else zero
    best = int(lags[best_i])

    # circular-shift null
    null = np.full(int(n_null), np.nan)
    tmin = max(2 * int(max_lag) + 1, n_sites // 10)
    if len(nb) and n_null > 0 and n_sites - 2 * tmin >= 0 and np.isfinite(stat):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            null = _shift_null(_circular_centred(x, m, i, j), lags, n_null, tmin, rng)
    ok = np.isfinite(null)
    p_value = float((1 + np.sum(null[ok] >= stat)) / (1 + ok.sum())) if ok.any() else float("nan")
    null_mean = float(null[ok].mean()) if ok.any() else float("nan")

    # non-neighbour comparison
    corr_nn, p_nn = float("nan"), float("nan")
    n_all = n_rods * (n_rods - 1) // 2
    if len(nb) and n_all > len(nb) and np.isfinite(stat):
        pool = _nonneighbour_pool(n_rods, nb, min(n_all - len(nb), max(4 * len(nb), 500), 2000), rng)
        if len(pool):
            ps, _ = _lag_sums(x, m, pool[:, 0], pool[:, 1], lags)
            corr_nn = float(_corr_from_sums(ps[:, zero].sum(axis=0)))
            nn_null = np.empty(min(int(n_null), 999) if n_null > 0 else 0)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                for r in range(len(nn_null)):
                    pick = rng.integers(0, len(pool), size=len(nb))
                    nn_null[r] = np.nanmax(_corr_from_sums(ps[pick].sum(axis=0)))
            okn = np.isfinite(nn_null)
            if okn.any():
                p_nn = float((1 + np.sum(nn_null[okn] >= stat)) / (1 + okn.sum()))

    # Cohen's kappa of decoded states at lag 0
    if states is None:
        k = 2 if n_states is None else int(n_states)
        conf = np.zeros((len(nb), k, k))
        kappa = float("nan")
    else:
        st = _masked_paths(states, mask)
        k = int(st.max(initial=0)) + 1 if n_states is None else int(n_states)
        a, b = st[i], st[j]
        both = (a >= 0) & (b >= 0)
        pid = np.broadcast_to(np.arange(len(nb))[:, None], a.shape)[both]
        code = (pid * k + a[both]) * k + b[both]
        conf = np.bincount(code, minlength=len(nb) * k * k).reshape(len(nb), k, k).astype(float)
        kappa = float(_kappa(conf.sum(axis=0)))
    return RodAgreement(
        metal=int(metal), lags=lags, corr_lags=corr_lags, corr=float(corr_lags[zero]),
        statistic=stat, best_lag=best, p_value=p_value, null=null, null_mean=null_mean,
        corr_nonneighbour=corr_nn, p_nonneighbour=p_nn, kappa=kappa, corr_corrected_lags=corr_c,
        corr_corrected=float(corr_c[zero]), statistic_corrected=float(corr_c[best_i]),
        reliability=float(_reliability_from_sums(tot[zero])), pair_sums=sums,
        pair_confusion=conf, n_pairs=int(len(nb)), n_sites_compared=int(cnt[:, zero].sum()) if len(nb) else 0,
    )


def _nonneighbour_pool(n_rods, nb, size, rng):
    """Random distinct pairs (i < j) that are not in ``nb``."""
    taken = set((nb[:, 0] * n_rods + nb[:, 1]).tolist()) | set((nb[:, 1] * n_rods + nb[:, 0]).tolist())
    out = set()
    tries = 0
    while len(out) < size and tries < 20:
        a = rng.integers(0, n_rods, size=2 * size)
        b = rng.integers(0, n_rods, size=2 * size)
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        for c in (lo * n_rods + hi)[lo != hi].tolist():
            if c not in taken:
                out.add(c)
                if len(out) >= size:
                    break
        tries += 1
    codes = np.array(sorted(out), dtype=np.int64)
    return np.stack([codes // n_rods, codes % n_rods], axis=1) if len(codes) else np.zeros((0, 2), np.int64)


def _kappa(conf):
    """Cohen's kappa from a (..., K, K) confusion matrix of counts."""
    conf = np.asarray(conf, dtype=float)
    n = conf.sum(axis=(-1, -2))
    with np.errstate(divide="ignore", invalid="ignore"):
        po = np.trace(conf, axis1=-2, axis2=-1) / n
        pe = np.sum(conf.sum(axis=-1) * conf.sum(axis=-2), axis=-1) / (n * n)
        return np.where((n > 0) & (pe < 1), (po - pe) / (1.0 - pe), np.nan)


# ---------------------------------------------------------------------- results
@dataclass(frozen=True)
class RunStatistics:
    """Statistics of one run's decoded sequences, with bootstrap replicates over rods.

    Attributes
    ----------
    metals : tuple of str
    pitch_nm : float, nm
    n_rods : int
    n_sites_used : int
        Unmasked sites over all rods.
    estimates : dict of str -> float
        Point estimates under dotted names, e.g. ``composition.Co``,
        ``mean_run_length_sites.Zn``, ``persistence``, ``runs_test.z``, ``rod_to_rod.corr``.
    replicates : dict of str -> (n_boot,) ndarray of float
        The same statistics in each bootstrap resample.
    transmat : (K, K) ndarray of float
        Fitted transition matrix used for the estimates.
    composition : (K,) ndarray of float
    occupancy : (K,) ndarray of float
        Expected sites of each metal over all rods.
    least_abundant : int
        Index of the metal with the smallest composition.
    markov_test : dict
        ``lr_stat``, ``lr_df``, ``lr_pvalue`` of the decoder (or of G^2 when it gave none),
        ``bic``, ``bic_indep``, ``g2``, ``g2_df``, ``g2_pvalue`` on the expected counts.
    run_lengths : dict
        Per metal symbol, the output of :func:`run_length_distribution` for decoded runs.
    runs_test_per_metal : dict
        Per metal symbol: ``z``, ``p``, ``n_runs``, ``expected_runs``.
    rod_to_rod : RodAgreement or None
        None when there are no neighbour pairs.
    n_boot : int
    random_state : int or None
    notes : tuple of str
        What the estimates rest on, e.g. hard counts when no expected counts were given.
    """

    metals: tuple
    pitch_nm: float
    n_rods: int
    n_sites_used: int
    estimates: dict
    replicates: dict
    transmat: np.ndarray
    composition: np.ndarray
    occupancy: np.ndarray
    least_abundant: int
    markov_test: dict
    run_lengths: dict
    runs_test_per_metal: dict
    rod_to_rod: RodAgreement | None
    n_boot: int
    random_state: int | None = None
    notes: tuple = field(default_factory=tuple)

    def interval(self, name: str, level: float = 0.95):
        """(estimate, low, high) of a statistic: the bootstrap percentile interval."""
        if name not in self.estimates:
            raise InputError(f"no statistic named {name!r}; known: {', '.join(sorted(self.estimates))}")
        est = float(self.estimates[name])
        rep = self.replicates.get(name)
        if rep is None:
            return est, float("nan"), float("nan")
        rep = np.asarray(rep, dtype=float)
        rep = rep[np.isfinite(rep)]
        if rep.size == 0:
            return est, float("nan"), float("nan")
        q = 100.0 * (1.0 - level) / 2.0
        lo, hi = np.percentile(rep, [q, 100.0 - q])
        return est, float(lo), float(hi)

    def to_dict(self) -> dict:
        """JSON-able summary (NaN and infinities become None)."""
        e = self.estimates
        out = {
            "metals": list(self.metals),
            "pitch_nm": _j(self.pitch_nm),
            "n_rods": int(self.n_rods),
            "n_sites_used": int(self.n_sites_used),
            "n_boot": int(self.n_boot),
            "random_state": self.random_state,
            "least_abundant": self.metals[self.least_abundant],
            "transmat": _j(self.transmat),
            "notes": list(self.notes),
        }
        for grp in ("composition", "mean_run_length_sites", "mean_run_length_nm", "run_length_ratio",
                    "independent_run_length_sites", "persistence_per_metal"):
            out[grp] = {mt: _j(e[f"{grp}.{mt}"]) for mt in self.metals}
        for key in ("persistence", "entropy_rate_bits", "entropy_independent_bits"):
            out[key] = _j(e[key])
        out["runs_test"] = {
            "metal": self.metals[self.least_abundant],
            "z": _j(e["runs_test.z"]),
            "p": _j(e["runs_test.p"]),
            "per_metal": {mt: {kk: _j(vv) for kk, vv in d.items()} for mt, d in self.runs_test_per_metal.items()},
        }
        rr = self.rod_to_rod
        if rr is None:
            out["rod_to_rod"] = None
        else:
            out["rod_to_rod"] = {
                "metal": self.metals[rr.metal],
                "corr": _j(rr.corr),
                "corr_lags": {str(int(d)): _j(c) for d, c in zip(rr.lags, rr.corr_lags)},
                "statistic": _j(rr.statistic),
                "best_lag": int(rr.best_lag),
                "p_value": _j(rr.p_value),
                "null_mean": _j(rr.null_mean),
                "n_null": int(np.isfinite(rr.null).sum()),
                "corr_nonneighbour": _j(rr.corr_nonneighbour),
                "p_nonneighbour": _j(rr.p_nonneighbour),
                "kappa": _j(rr.kappa),
                "corr_corrected": _j(rr.corr_corrected),
                "corr_corrected_lags": {str(int(d)): _j(c) for d, c in zip(rr.lags, rr.corr_corrected_lags)},
                "statistic_corrected": _j(rr.statistic_corrected),
                "reliability": _j(rr.reliability),
                "n_pairs": rr.n_pairs,
                "n_sites_compared": rr.n_sites_compared,
            }
        out["markov_test"] = {k: _j(v) for k, v in self.markov_test.items()}
        out["run_lengths"] = {
            mt: {k: _j(v) for k, v in d.items()} for mt, d in self.run_lengths.items()
        }
        out["intervals"] = {}
        for name in sorted(self.estimates):
            est, lo, hi = self.interval(name)
            out["intervals"][name] = {"estimate": _j(est), "low": _j(lo), "high": _j(hi)}
        return out


def _j(v):
    """Make a value JSON-able: arrays to lists, NaN/inf to None, numpy scalars to Python."""
    if isinstance(v, dict):
        return {str(k): _j(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_j(x) for x in v]
    if isinstance(v, np.ndarray):
        return _j(v.tolist())
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if math.isfinite(v) else None
    return v


# ---------------------------------------------------------------------- main entry points
def _chain_block(trans_sum, occ_sum, metals, pitch_nm, transmat=None):
    """Chain statistics for a batch: trans_sum (B, K, K), occ_sum (B, K) -> dict name -> (B,)."""
    p = transition_matrix(trans_sum) if transmat is None else np.asarray(transmat, float)[None]
    f = occ_sum / np.maximum(occ_sum.sum(axis=-1, keepdims=True), _EPS)
    mu = stationary_distribution(p)
    mrl = mean_run_length(p)
    ind = independent_run_length(f)
    lam, lam_k = persistence(p, mu)
    out = {
        "persistence": lam,
        "entropy_rate_bits": entropy_rate_bits(p, mu),
        "entropy_independent_bits": entropy_bits(f),
    }
    for k, mt in enumerate(metals):
        out[f"composition.{mt}"] = f[:, k]
        out[f"mean_run_length_sites.{mt}"] = mrl[:, k]
        out[f"mean_run_length_nm.{mt}"] = mrl[:, k] * pitch_nm
        out[f"independent_run_length_sites.{mt}"] = ind[:, k]
        with np.errstate(invalid="ignore"):
            out[f"run_length_ratio.{mt}"] = mrl[:, k] / ind[:, k]
        out[f"persistence_per_metal.{mt}"] = lam_k[:, k]
    out["markov_test.g2"] = g2_markov_test(trans_sum)[0]
    return out


def statistics_from_arrays(*, per_rod_transitions, per_rod_occupancy, metals, pitch_nm,
                           viterbi=None, posteriors=None, mask=None, neighbours=None,
                           rod_xy_nm=None, transmat=None, lr_stat=None, lr_df=None,
                           lr_pvalue=None, bic=None, bic_indep=None, n_boot: int = 200,
                           random_state=None, max_lag: int = 3, n_null: int = 199) -> RunStatistics:
    """Statistics of a run from plain arrays, with bootstrap intervals over rods.

    Parameters
    ----------
    per_rod_transitions : (n_rods, K, K) ndarray of float
        Expected (posterior-summed) transition counts of each rod; hard counts also work.
    per_rod_occupancy : (n_rods, K) ndarray of float
        Expected sites of each metal per rod.
    metals : sequence of str, length K
    pitch_nm : float, nm
        Site pitch along the rods.
    viterbi : (n_rods, n_sites) ndarray of int, optional
        Decoded states, -1 at masked sites; from ``posteriors`` when omitted.
    posteriors : (n_rods, n_sites, K) ndarray of float, optional
        Posterior state probabilities; the rod-to-rod correlation uses them when given.
    mask : (n_rods, n_sites) ndarray of bool, optional
        Sites used; ``viterbi >= 0`` when omitted.
    neighbours : (n_pairs, 2) ndarray of int, optional
        Neighbouring rod pairs; found from ``rod_xy_nm`` when omitted.
    rod_xy_nm : (n_rods, 2) ndarray of float, nm, optional
    transmat : (K, K) ndarray of float, optional
        Fitted transition matrix for the point estimates; the M-step of the summed counts when
        omitted. Bootstrap replicates always re-estimate it from resampled counts.
    lr_stat, lr_df, lr_pvalue, bic, bic_indep : float, optional
        The decoder's likelihood-ratio test of the chain against independent sites, and BICs.
    n_boot : int
        Bootstrap resamples over rods (at least 10).
    random_state : int or numpy.random.Generator, optional
    max_lag : int, sites
        Largest depth lag for rod-to-rod agreement.
    n_null : int
        Null replicates of the rod-to-rod test.

    Returns
    -------
    RunStatistics
    """
    metals = tuple(str(mt) for mt in metals)
    k = len(metals)
    if k < 2:
        raise InputError(f"metals: need at least 2 metals, got {len(metals)}")
    tr = np.asarray(per_rod_transitions, dtype=float)
    occ = np.asarray(per_rod_occupancy, dtype=float)
    if tr.ndim != 3 or tr.shape[1:] != (k, k):
        raise InputError(f"per_rod_transitions must be (n_rods, {k}, {k}), got shape {tr.shape}")
    n_rods = tr.shape[0]
    if occ.shape != (n_rods, k):
        raise InputError(f"per_rod_occupancy must be ({n_rods}, {k}), got shape {occ.shape}")
    if not (np.isfinite(tr).all() and np.isfinite(occ).all()) or (tr < 0).any() or (occ < 0).any():
        raise InputError("per_rod_transitions and per_rod_occupancy must be finite and non-negative")
    if n_rods < 1:
        raise InputError("per_rod_transitions: no rods")
    pitch = float(pitch_nm)
    if not (math.isfinite(pitch) and pitch > 0):
        raise InputError(f"pitch_nm must be a positive number of nm, got {pitch_nm}")
    if int(n_boot) < 10:
        raise InputError(f"n_boot must be at least 10, got {n_boot}")
    if int(max_lag) < 0:
        raise InputError(f"max_lag must be >= 0 sites, got {max_lag}")
    n_boot = int(n_boot)
    seed = random_state if isinstance(random_state, (int, np.integer)) or random_state is None else None
    rng = np.random.default_rng(random_state)
    notes = []

    post = None if posteriors is None else np.asarray(posteriors, dtype=float)
    if post is not None and (post.ndim != 3 or post.shape[0] != n_rods or post.shape[2] != k):
        raise InputError(f"posteriors must be ({n_rods}, n_sites, {k}), got shape {post.shape}")
    if viterbi is None:
        if post is None:
            raise InputError("give viterbi or posteriors: the decoded states are needed")
        vit = np.argmax(post, axis=2)
        if mask is not None:
            vit = np.where(np.asarray(mask, bool), vit, -1)
    else:
        vit = np.asarray(viterbi)
    if vit.ndim != 2 or vit.shape[0] != n_rods:
        raise InputError(f"viterbi must be ({n_rods}, n_sites), got shape {vit.shape}")
    if post is not None and post.shape[1] != vit.shape[1]:
        raise InputError(f"posteriors have {post.shape[1]} sites, viterbi {vit.shape[1]}")
    m = (vit >= 0) if mask is None else np.asarray(mask, dtype=bool)
    if m.shape != vit.shape:
        raise InputError(f"mask shape {m.shape} does not match viterbi {vit.shape}")
    vit = np.where(m, vit.astype(np.int64), -1)
    if vit.max(initial=-1) >= k:
        raise InputError(f"viterbi holds state {int(vit.max())}, expected states 0..{k - 1}")
    m = m & (vit >= 0)

    # point estimates
    tr_sum = tr.sum(axis=0)
    occ_sum = occ.sum(axis=0)
    if transmat is not None:
        p_fit = np.asarray(transmat, dtype=float)
        if p_fit.shape != (k, k):
            raise InputError(f"transmat must be ({k}, {k}), got shape {p_fit.shape}")
    else:
        p_fit = transition_matrix(tr_sum)
    est = {key: float(v[0]) for key, v in _chain_block(tr_sum[None], occ_sum[None], metals, pitch, p_fit).items()}
    comp = composition_from_occupancy(occ_sum)
    least = int(np.argmin(comp))

    # bootstrap over rods
    w = rng.multinomial(n_rods, np.full(n_rods, 1.0 / n_rods), size=n_boot).astype(float)
    tr_b = np.einsum("br,rij->bij", w, tr)
    occ_b = w @ occ
    reps = _chain_block(tr_b, occ_b, metals, pitch)

    # Markov test
    g2, g2_df, g2_p = g2_markov_test(tr_sum)
    mk = {
        "lr_stat": float(g2) if lr_stat is None else float(lr_stat),
        "lr_df": int(g2_df) if lr_df is None else int(lr_df),
        "lr_pvalue": float(g2_p) if lr_pvalue is None else float(lr_pvalue),
        "bic": None if bic is None else float(bic),
        "bic_indep": None if bic_indep is None else float(bic_indep),
        "g2": float(g2), "g2_df": int(g2_df), "g2_pvalue": float(g2_p),
        "source": "decoder" if lr_pvalue is not None else "g2 on expected transition counts",
    }
    if lr_pvalue is None:
        notes.append("Markov test: no likelihood-ratio test from the decoder; G^2 on expected counts used")
    est["markov_test.g2"] = float(g2)

    # runs test on decoded paths, per rod so the bootstrap can resample it
    r_rod, e_rod, v_rod = _runs_per_rod(vit, k)
    z, pz = _z_from_sums(r_rod.sum(0), e_rod.sum(0), v_rod.sum(0))
    runs_pm = {mt: {"z": float(z[s]), "p": float(pz[s]), "n_runs": float(r_rod[:, s].sum()),
                    "expected_runs": float(e_rod[:, s].sum())} for s, mt in enumerate(metals)}
    est["runs_test.z"], est["runs_test.p"] = float(z[least]), float(pz[least])
    zb, pb = _z_from_sums(w @ r_rod[:, least], w @ e_rod[:, least], w @ v_rod[:, least])
    reps["runs_test.z"], reps["runs_test.p"] = zb, pb

    # run-length distribution of decoded runs
    runs = decoded_runs(vit)
    rld = run_length_distribution(runs, k, transmat=p_fit, composition=comp)
    run_lengths = {metals[s]: d for s, d in rld.items()}

    # rod-to-rod agreement
    nb = None if neighbours is None else np.asarray(neighbours, dtype=np.int64).reshape(-1, 2)
    if nb is None and rod_xy_nm is not None:
        nb = neighbour_pairs(rod_xy_nm)
    rr = None
    if nb is not None and len(nb):
        vals = post[:, :, least] if post is not None else (vit == least).astype(float)
        rr = rod_agreement(vals, m, nb, metal=least, states=vit, n_states=k, max_lag=max_lag,
                           n_null=n_null, rng=rng)
        est["rod_to_rod.corr"] = rr.corr
        est["rod_to_rod.statistic"] = rr.statistic
        est["rod_to_rod.p_value"] = rr.p_value
        est["rod_to_rod.kappa"] = rr.kappa
        est["rod_to_rod.corr_corrected"] = rr.corr_corrected
        est["rod_to_rod.statistic_corrected"] = rr.statistic_corrected
        for d, c in zip(rr.lags, rr.corr_lags):
            est[f"rod_to_rod.corr_lag.{int(d)}"] = float(c)
        wp = rng.multinomial(rr.n_pairs, np.full(rr.n_pairs, 1.0 / rr.n_pairs), size=n_boot).astype(float)
        bs = np.einsum("bp,plc->blc", wp, rr.pair_sums)  # (B, L, 5)
        cl = _corr_from_sums(bs)  # (B, L)
        cc = _corrected_from_sums(bs)
        for li, d in enumerate(rr.lags):
            reps[f"rod_to_rod.corr_lag.{int(d)}"] = cl[:, li]
        reps["rod_to_rod.corr"] = cl[:, int(max_lag)]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            stat_b = np.nanmax(cl, axis=1)
            best_b = np.argmax(np.where(np.isfinite(cl), cl, -np.inf), axis=1)
        reps["rod_to_rod.statistic"] = stat_b
        reps["rod_to_rod.corr_corrected"] = cc[:, int(max_lag)]
        reps["rod_to_rod.statistic_corrected"] = np.where(np.isfinite(stat_b), cc[np.arange(n_boot), best_b], np.nan)
        ok = np.isfinite(rr.null)
        if ok.any():
            nul = np.sort(rr.null[ok])
            ge = nul.size - np.searchsorted(nul, stat_b, side="left")
            reps["rod_to_rod.p_value"] = np.where(np.isfinite(stat_b), (1.0 + ge) / (1.0 + nul.size), np.nan)
        reps["rod_to_rod.kappa"] = _kappa(np.einsum("bp,pij->bij", wp, rr.pair_confusion))
    else:
        notes.append("rod-to-rod agreement: no neighbouring rod pairs")
    if post is None:
        notes.append("rod-to-rod agreement on decoded states (no posteriors given)")

    return RunStatistics(
        metals=metals, pitch_nm=pitch, n_rods=int(n_rods), n_sites_used=int(m.sum()),
        estimates=est, replicates={key: np.asarray(v, dtype=float) for key, v in reps.items()},
        transmat=p_fit, composition=comp, occupancy=occ_sum, least_abundant=least,
        markov_test=mk, run_lengths=run_lengths, runs_test_per_metal=runs_pm, rod_to_rod=rr,
        n_boot=n_boot, random_state=int(seed) if seed is not None else None, notes=tuple(notes),
    )


_DECODED_FIELDS = ("transmat", "metals", "pitch_nm", "viterbi", "posteriors", "mask",
                   "per_rod_transitions", "per_rod_occupancy", "lr_stat", "lr_df", "lr_pvalue",
                   "bic", "bic_indep", "neighbours", "rod_xy_nm")


def compute_statistics(decoded_like, columns_like=None, n_boot: int = 200, random_state=None,
                       max_lag: int = 3, n_null: int = 199) -> RunStatistics:
    """Statistics of a decoded run, read from a decoding result.

    Reads the attributes ``transmat, metals, pitch_nm, viterbi, posteriors, mask,
    per_rod_transitions, per_rod_occupancy, lr_stat, lr_df, lr_pvalue, bic, bic_indep,
    neighbours, rod_xy_nm`` of ``decoded_like``; any that is missing or None is taken from
    ``columns_like`` (e.g. :class:`~probeseq.data.RodColumns`) when it has it. Without expected
    counts, hard counts on the decoded path are used, with a :class:`DataQualityWarning` because
    they do not account for decoding noise.

    Parameters
    ----------
    decoded_like : object
        A decoding result.
    columns_like : object, optional
        The rod columns the decoding was run on.
    n_boot, random_state, max_lag, n_null
        As in :func:`statistics_from_arrays`.

    Returns
    -------
    RunStatistics
    """
    vals = {}
    for name in _DECODED_FIELDS:
        v = getattr(decoded_like, name, None)
        if v is None and columns_like is not None:
            v = getattr(columns_like, name, None)
        vals[name] = v
    for req in ("metals", "pitch_nm"):
        if vals[req] is None:
            raise InputError(f"decoding result: no {req!r} (nor on the columns given)")
    if vals["per_rod_transitions"] is None or vals["per_rod_occupancy"] is None:
        path = vals["viterbi"]
        if path is None and vals["posteriors"] is not None:
            path = np.argmax(np.asarray(vals["posteriors"]), axis=2)
        if path is None:
            raise InputError("decoding result: no per_rod_transitions/per_rod_occupancy and no decoded states")
        warnings.warn("decoding result has no expected transition counts; counting on the decoded path, "
                      "which does not account for decoding noise", DataQualityWarning, stacklevel=2)
        tr, occ = transition_counts_from_paths(path, len(tuple(vals["metals"])), vals["mask"])
        vals["per_rod_transitions"], vals["per_rod_occupancy"] = tr, occ
    return statistics_from_arrays(n_boot=n_boot, random_state=random_state, max_lag=max_lag,
                                  n_null=n_null, **vals)
