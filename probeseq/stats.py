"""Statistics of decoded metal sequences along rods, with bootstrap intervals over rods.

Everything here works on plain arrays; :func:`compute_statistics` is the thin wrapper that reads
them from a decoding result (and, for what it lacks, from the rod columns).

Estimates account for decoding noise by using the fitted model rather than the noisy most likely
path: the transition matrix is the M-step of the fitted hidden Markov model, i.e. the row-normalised
sum of the *expected* transition counts (posterior-summed xi) over rods, and the composition is the
posterior-summed site occupancy. Quantities that are by definition properties of the decoded path
(the run-length distribution, the Wald-Wolfowitz runs test) use the path, and say so.

Definitions (K metals, fitted transition matrix P, stationary distribution mu, composition f;
the chain quantities are defined once, in :mod:`probeseq.chain`, and listed in docs/GLOSSARY.md):

* mean run length of metal k (``mean_run_length_sites``): ``1 / (1 - P_kk)`` sites of the fitted
  chain (the mean dwell of a Markov chain), and ``1 / (1 - f_k)`` for independent sites of the
  same composition. The mean length of the runs on the decoded paths is a different number (the
  decoder's ``mean_decoded_run_length_sites``: shorter, as runs cut by a rod end or the mask count);
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

Large runs (tens of thousands of rods of thousands of sites) are handled without copies of the
per-site arrays: paths stay in their small integer dtype, the posteriors are read through the one
slice that is needed, and the per-rod and per-pair sums run in compiled loops (numba) or, for the
circular-shift null, in blocks of neighbour pairs whose temporaries are bounded by
``_BLOCK_BYTES``. Sums keep the order of floating-point operations of plain numpy code
(``ndarray.sum``'s pairwise summation, bincount's running sums), so results do not depend on the
block size.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numba
import numpy as np
from scipy import stats as _sps

from . import chain as _chain
from .chain import independent_run_lengths as independent_run_length
from .chain import masked_paths as _masked_paths
from .chain import mean_run_lengths as mean_run_length
from .chain import signed_states as _signed_states
from .chain import stationary_distribution
from .exceptions import DataQualityWarning, InputError
from .outputs import to_jsonable

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
# working memory of one blocked temporary (rods or neighbour pairs processed per block)
_BLOCK_BYTES = 32 * 2**20


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

    Both come from :mod:`probeseq.chain` (:func:`probeseq.chain.persistence` and
    :func:`probeseq.chain.persistence_per_state`), the one definition that the decoder, the
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

    The runs are those of :func:`probeseq.chain.list_runs` (the one run listing of probeseq).

    Parameters
    ----------
    paths : (n_rods, n_sites) ndarray of int
        State per site, negative where masked; any integer dtype.
    mask : (n_rods, n_sites) ndarray of bool, optional

    Returns
    -------
    RunLengths
    """
    runs = _chain.list_runs(paths, mask)
    return RunLengths(rod=runs["rod"], start=runs["first_site"], length=runs["length"], state=runs["metal"],
                      left_truncated=runs["left_truncated"], right_truncated=runs["right_truncated"])


@numba.njit(cache=True, nogil=True)
def _run_histograms(p, n_states):
    """Run-length tables per state straight from the paths, without listing the runs.

    Returns ``complete`` (K, n_sites + 1) counts of complete runs by length, ``seen`` (K,
    n_sites + 1) counts of runs whose start was seen by their length (complete runs) or length - 1
    (runs cut at their end), ``n_runs``, ``n_truncated``, ``sum_complete`` (K,) and the longest
    run. States at or above ``n_states`` are skipped.
    """
    n_rods, n_sites = p.shape
    complete = np.zeros((n_states, n_sites + 1), np.int64)
    seen = np.zeros((n_states, n_sites + 1), np.int64)
    n_runs = np.zeros(n_states, np.int64)
    n_trunc = np.zeros(n_states, np.int64)
    sum_complete = np.zeros(n_states, np.int64)
    top = 0
    for r in range(n_rods):
        s = 0
        while s < n_sites:
            v = np.int64(p[r, s])
            e = s + 1
            while e < n_sites and p[r, e] == v:
                e += 1
            if v >= 0:
                ln = e - s
                if ln > top:
                    top = ln
                if v < n_states:
                    left = s == 0 or p[r, s - 1] < 0
                    right = e == n_sites or p[r, e] < 0
                    n_runs[v] += 1
                    if left or right:
                        n_trunc[v] += 1
                    else:
                        complete[v, ln] += 1
                        sum_complete[v] += ln
                    if not left:
                        seen[v, ln - 1 if right else ln] += 1
            s = e
    return complete, seen, n_runs, n_trunc, sum_complete, top


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
    k = int(n_states)
    top = int(runs.length.max(initial=1))
    width = top + 1
    complete = np.zeros((k, width), np.int64)
    seen = np.zeros((k, width), np.int64)
    n_runs = np.zeros(k, np.int64)
    n_trunc = np.zeros(k, np.int64)
    sum_complete = np.zeros(k, np.int64)
    comp_all = runs.complete
    for s in range(k):
        sel = runs.state == s
        ln = runs.length[sel]
        comp = comp_all[sel]
        start_seen = ~runs.left_truncated[sel]
        complete[s] = np.bincount(ln[comp], minlength=width)[:width]
        # a run cut after c sites is known to have lasted at least c sites, i.e. not to have
        # ended at 1..c-1: it is at risk for lengths below c only
        eff = np.where(comp, ln, ln - 1)[start_seen]
        seen[s] = np.bincount(eff, minlength=width)[:width]
        n_runs[s] = int(sel.sum())
        n_trunc[s] = int((~comp).sum())
        sum_complete[s] = int(ln[comp].sum())
    return _run_length_tables(complete, seen, n_runs, n_trunc, sum_complete, top, k, transmat,
                              composition, max_length)


def _run_length_tables(complete, seen, n_runs, n_trunc, sum_complete, longest, n_states, transmat,
                       composition, max_length) -> dict:
    """The dict of :func:`run_length_distribution` from per-state run-length counts.

    ``complete[k, l]`` counts complete runs of length l, ``seen[k, l]`` runs with a seen start that
    lasted at least l sites and ended at l (complete, or cut after l + 1 sites); both cover every
    length that occurs (index 0..longest).
    """
    top = max(int(longest), 1) if max_length is None else max(int(max_length), 1)
    ell = np.arange(1, top + 1)
    out = {}

    def part(h, lo, hi):  # h[lo:hi] padded with zeros beyond its end
        v = np.zeros(hi - lo, np.int64)
        seg = h[lo:hi]
        v[:seg.size] = seg
        return v

    for k in range(int(n_states)):
        n_complete = part(complete[k], 1, top + 1).astype(float)
        nc_tot = float(complete[k].sum())
        # Kaplan-Meier over runs with a seen start: events = complete runs, censored = right cut;
        # every complete run has a seen start, so the events are the complete runs
        d = n_complete
        allc = np.append(part(seen[k], 1, top + 1), seen[k][top + 1:].sum()).astype(float)
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
            "n_runs": int(n_runs[k]),
            "n_truncated": int(n_trunc[k]),
            "mean_complete_sites": float(sum_complete[k]) / nc_tot if nc_tot > 0 else float("nan"),
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
    k = int(n_states)
    r_out = np.zeros((p.shape[0], k))
    e_out = np.zeros((p.shape[0], k))
    v_out = np.zeros((p.shape[0], k))
    _runs_kernel(p, k, r_out, e_out, v_out)
    return r_out, e_out, v_out


@numba.njit(cache=True, nogil=True)
def _runs_kernel(p, k, r_out, e_out, v_out):
    """Add R, E and V (as :func:`runs_expectation`) of every stretch of unmasked sites to its rod.

    Stretches are added in site order, the same order of floating-point sums as a bincount over
    stretches.
    """
    n_rods, n_sites = p.shape
    n1 = np.zeros(k, np.int64)
    ch = np.zeros(k, np.int64)
    for r in range(n_rods):
        s = 0
        while s < n_sites:
            if p[r, s] < 0:
                s += 1
                continue
            n1[:] = 0
            ch[:] = 0
            prev = np.int64(-1)
            e = s
            while e < n_sites and p[r, e] >= 0:
                v = np.int64(p[r, e])
                if v < k:
                    n1[v] += 1
                if e > s and v != prev:
                    if v < k:
                        ch[v] += 1
                    if prev < k:
                        ch[prev] += 1
                prev = v
                e += 1
            n_tot = float(e - s)
            for q in range(k):
                a = float(n1[q])
                b = n_tot - a
                n = a + b
                t = 2.0 * a * b
                mean = t / max(n, 1.0) + 1.0 if n > 0 else 0.0
                var = t * (t - n) / (n * n * max(n - 1.0, 1.0)) if n > 1 else 0.0
                if var < 0.0:
                    var = 0.0
                r_out[r, q] += 1.0 + float(ch[q])
                e_out[r, q] += mean
                v_out[r, q] += var
            s = e


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
    the summed posterior variances (sum x(1-x) of each rod); (P, n_lags, 5), and counts (P, n_lags).

    Only sites unmasked in both rods count; ``x`` may be float32 or float64 (sums in float64). The
    sums over sites follow numpy's pairwise summation (:func:`_pairwise_plan`), so they equal
    ``(a * b).sum(axis=1)`` on the masked (n_pairs, n_sites) arrays without building them.
    """
    i = np.asarray(i, dtype=np.int64)
    j = np.asarray(j, dtype=np.int64)
    lags = np.asarray(lags, dtype=np.int64)
    n_sites = x.shape[1]
    out = np.zeros((len(i), len(lags), 5))
    cnt = np.zeros((len(i), len(lags)))
    if len(i) and n_sites:
        plans = [_pairwise_plan(n_sites - abs(int(d))) if abs(int(d)) < n_sites else np.zeros((0, 2), np.int64)
                 for d in lags]
        start = np.concatenate([[0], np.cumsum([len(q) for q in plans])]).astype(np.int64)
        _lag_sums_kernel(x, m, i, j, lags, bool(probabilities), np.concatenate(plans), start, out, cnt)
    return out, cnt


def _pairwise_plan(n: int) -> np.ndarray:
    """The order of numpy's pairwise summation of n values, as a post-order program.

    numpy sums a contiguous run of n values by halving it (the first half rounded down to a
    multiple of 8) until a piece has at most 128 values, sums each such piece with 8 interleaved
    partial sums (fewer than 8 values: one running sum), and adds the two halves. Rows ``(lo, len)``
    are pieces in order; ``(-1, 0)`` adds the last two results.
    """
    ops = []
    todo = [(0, int(n), False)]
    while todo:
        lo, k, expanded = todo.pop()
        if k <= 128:
            ops.append((lo, k))
        elif expanded:
            ops.append((-1, 0))
        else:
            k2 = k // 2
            k2 -= k2 % 8
            todo.append((lo, k, True))
            todo.append((lo + k2, k - k2, False))
            todo.append((lo, k2, False))
    return np.array(ops, dtype=np.int64).reshape(-1, 2)


@numba.njit(cache=True, nogil=True, inline="always")
def _piece_sum(a, n):
    """numpy's sum of a[0:n] for n <= 128 (8 interleaved partial sums; unsigned indices let the
    compiler vectorise the loop without changing the order of operations)."""
    if n < 8:
        res = 0.0
        for s in range(n):
            res += a[s]
        return res
    r0, r1, r2, r3 = a[0], a[1], a[2], a[3]
    r4, r5, r6, r7 = a[4], a[5], a[6], a[7]
    top = n - n % 8
    for q in range(1, top // 8):
        b = np.uint64(8 * q)
        r0 += a[b]
        r1 += a[b + np.uint64(1)]
        r2 += a[b + np.uint64(2)]
        r3 += a[b + np.uint64(3)]
        r4 += a[b + np.uint64(4)]
        r5 += a[b + np.uint64(5)]
        r6 += a[b + np.uint64(6)]
        r7 += a[b + np.uint64(7)]
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    for s in range(top, n):
        res += a[s]
    return res


@numba.njit(cache=True, nogil=True)
def _lag_sums_kernel(x, m, i, j, lags, probs, plans, start, out, cnt):
    """Fill out (P, L, 5) and cnt (P, L) of :func:`_lag_sums`, one pair at a time."""
    n_sites = x.shape[1]
    xa = np.empty(n_sites)
    xb = np.empty(n_sites)
    fa = np.empty(n_sites)
    fb = np.empty(n_sites)
    ia = np.empty(n_sites, np.int64)
    ib = np.empty(n_sites, np.int64)
    t = np.empty((7, 128))
    vals = np.empty((64, 7))
    n_terms = 7 if probs else 5
    for p in range(len(i)):
        a = i[p]
        b = j[p]
        # the two rods with masked sites zeroed, and their masks as 0/1
        for s in range(n_sites):
            ua = m[a, s]
            ub = m[b, s]
            xa[s] = np.float64(x[a, s]) if ua else 0.0
            xb[s] = np.float64(x[b, s]) if ub else 0.0
            fa[s] = 1.0 if ua else 0.0
            fb[s] = 1.0 if ub else 0.0
            ia[s] = 1 if ua else 0
            ib[s] = 1 if ub else 0
        for li in range(len(lags)):
            if start[li] == start[li + 1]:
                continue
            d = lags[li]
            sa = 0 if d >= 0 else -d
            sb = d if d >= 0 else 0
            ln = n_sites - abs(d)
            n = 0
            for s in range(ln):
                n += ia[sa + s] * ib[sb + s]
            # value terms at sites used by both rods (0 elsewhere), summed piece by piece
            top = 0
            for k in range(start[li], start[li + 1]):
                lo = plans[k, 0]
                if lo < 0:
                    top -= 1
                    for c in range(n_terms):
                        vals[top - 1, c] = vals[top - 1, c] + vals[top, c]
                    continue
                ln_k = plans[k, 1]
                ua = np.uint64(sa + lo)
                ub = np.uint64(sb + lo)
                for s in range(np.uint64(ln_k)):
                    u = xa[ua + s] * fb[ub + s]
                    v = xb[ub + s] * fa[ua + s]
                    t[0, s] = u
                    t[1, s] = v
                    t[2, s] = u * v
                    t[3, s] = u * u
                    t[4, s] = v * v
                    t[5, s] = u * (1.0 - u)
                    t[6, s] = v * (1.0 - v)
                for c in range(n_terms):
                    vals[top, c] = _piece_sum(t[c], ln_k)
                top += 1
            # numpy adds the row sum to the identity 0.0
            sx = 0.0 + vals[0, 0]
            sy = 0.0 + vals[0, 1]
            sxy = 0.0 + vals[0, 2]
            sxx = 0.0 + vals[0, 3]
            syy = 0.0 + vals[0, 4]
            nn = max(float(n), 1.0)
            out[p, li, 0] = sxy - sx * sy / nn
            c0 = sxx - sx * sx / nn
            out[p, li, 1] = c0 if not c0 < 0.0 else 0.0
            c0 = syy - sy * sy / nn
            out[p, li, 2] = c0 if not c0 < 0.0 else 0.0
            if probs:
                c0 = 0.0 + vals[0, 5]
                out[p, li, 3] = c0 if not c0 < 0.0 else 0.0
                c0 = 0.0 + vals[0, 6]
                out[p, li, 4] = c0 if not c0 < 0.0 else 0.0
            cnt[p, li] = n


def _corr_from_sums(s):
    """Pooled correlation from summed centred sums (..., 3) -> (...)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        den = np.sqrt(s[..., 1] * s[..., 2])
        return np.where(den > 0, s[..., 0] / np.where(den > 0, den, 1.0), np.nan)


def _rod_ffts(x, m):
    """Real FFTs along sites of the masked values, their squares and the mask, per rod (float64)."""
    a = np.where(m, np.asarray(x, dtype=np.float64), 0.0)
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


def _pair_block_size(n_sites: int) -> int:
    """Neighbour pairs per block of the circular null: about ``_BLOCK_BYTES`` of temporaries."""
    # per pair, in float64 words of n_sites: 6 circular sums, 6 gathered half spectra and one
    # cross spectrum (complex, n_sites // 2 + 1 each), and for up to 2 rods 3 spectra and 3 inputs
    per_pair = 8 * n_sites * (6 + 6 + 1 + 2 * 3 + 2 * 3)
    return int(max(8, min(4096, _BLOCK_BYTES // max(per_pair, 1))))


def _shift_null(x, m, i, j, lags, n_null, tmin, rng):
    """Null statistics: each pair's second rod shifted by its own random offset in [tmin, n - tmin].

    The circular cross sums of every shift (:func:`_circular_raw`) are computed for a block of
    pairs at a time and only the shifted lags drawn for each replicate are kept, summed over the
    pairs in pair order; the random offsets are drawn first, in the same calls and order as
    replicate chunks of ``4e6 / (3 n_pairs n_lags)`` replicates.
    """
    p = len(i)
    n = x.shape[1]
    n_null = int(n_null)
    lags = np.asarray(lags, dtype=np.int64)
    shifts = np.empty((p, n_null), dtype=np.int32 if n < 2**31 - 64 else np.int64)
    chunk = max(1, int(4e6 // max(1, p * len(lags) * 3)))
    for c0 in range(0, n_null, chunk):
        c1 = min(n_null, c0 + chunk)
        shifts[:, c0:c1] = rng.integers(tmin, n - tmin + 1, size=(c1 - c0, p, 1))[:, :, 0].T
    acc = np.zeros((n_null, len(lags), 3))
    block = _pair_block_size(n)
    nf = n // 2 + 1
    bmax = min(block, p)
    raw = np.empty((6, bmax, n))
    spec_i = np.empty((3, bmax, nf), dtype=np.complex128)  # conj spectra of the first rods
    spec_j = np.empty((3, bmax, nf), dtype=np.complex128)  # spectra of the second rods
    cross = np.empty((bmax, nf), dtype=np.complex128)
    for b0 in range(0, p, block):
        b1 = min(p, b0 + block)
        nb = b1 - b0
        rods, inv = np.unique(np.concatenate([i[b0:b1], j[b0:b1]]), return_inverse=True)
        ii, jj = inv[:nb], inv[nb:]
        for c, f in enumerate(_rod_ffts(x[rods], m[rods])):  # values, squares, mask
            np.take(f, ii, axis=0, out=spec_i[c, :nb])
            np.conjugate(spec_i[c, :nb], out=spec_i[c, :nb])
            np.take(f, jj, axis=0, out=spec_j[c, :nb])
        # the six sums of _circular_raw (N, Sx, Sy, Sxx, Syy, Sxy) for every shift of each pair
        for c, (u, v) in enumerate(((2, 2), (0, 2), (2, 0), (1, 2), (2, 1), (0, 0))):
            np.multiply(spec_i[u, :nb], spec_j[v, :nb], out=cross[:nb])
            np.fft.irfft(cross[:nb], n=n, axis=1, out=raw[c, :nb])
        np.rint(raw[0, :nb], out=raw[0, :nb])
        _null_accumulate(raw, nb, shifts[b0:b1], lags, acc)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmax(_corr_from_sums(acc), axis=1)


@numba.njit(cache=True, nogil=True)
def _null_accumulate(raw, n_pairs, shifts, lags, acc):
    """Add the centred circular sums (:func:`_centred`) of each pair at its drawn shift + lag.

    raw[:, :n_pairs] (6, n_pairs, n) holds N, Sx, Sy, Sxx, Syy, Sxy of every circular shift of each
    pair of the block, shifts (n_pairs, n_null) the drawn offsets; acc (n_null, n_lags, 3) is summed
    over pairs in order.
    """
    n = raw.shape[2]
    n_null = shifts.shape[1]
    for q in range(n_pairs):
        r_n, r_sx, r_sy = raw[0, q], raw[1, q], raw[2, q]
        r_sxx, r_syy, r_sxy = raw[3, q], raw[4, q], raw[5, q]
        for r in range(n_null):
            s = shifts[q, r]
            a = acc[r]
            for li in range(len(lags)):
                t = s + lags[li]
                if t >= n:
                    t -= n
                elif t < 0:
                    t += n
                nn = r_n[t]
                if nn < 1.0:
                    nn = 1.0
                sx = r_sx[t]
                sy = r_sy[t]
                cxy = r_sxy[t] - sx * sy / nn
                cxx = r_sxx[t] - sx * sx / nn
                cyy = r_syy[t] - sy * sy / nn
                a[li, 0] += cxy
                a[li, 1] += cxx if not cxx < 0.0 else 0.0
                a[li, 2] += cyy if not cyy < 0.0 else 0.0


@numba.njit(cache=True, nogil=True)
def _check_values(x, mask):
    """(all values at unmasked sites in [0, 1], all of them finite)."""
    probs = True
    finite = True
    n_rods, n_sites = x.shape
    for r in range(n_rods):
        for s in range(n_sites):
            if mask[r, s]:
                v = np.float64(x[r, s])
                if not math.isfinite(v):
                    finite = False
                elif not (v >= 0.0 and v <= 1.0):
                    probs = False
    return probs, finite


@numba.njit(cache=True, nogil=True)
def _finite_mask(x, mask, out):
    """out = mask & isfinite(x)."""
    n_rods, n_sites = x.shape
    for r in range(n_rods):
        for s in range(n_sites):
            out[r, s] = mask[r, s] and math.isfinite(np.float64(x[r, s]))


@numba.njit(cache=True, nogil=True)
def _pair_confusion(st, mask, i, j, conf):
    """conf[p, a, b] += 1 for each site where rod i[p] is in state a and rod j[p] in b (both used)."""
    n_sites = st.shape[1]
    for p in range(len(i)):
        a = i[p]
        b = j[p]
        for s in range(n_sites):
            if mask[a, s] and mask[b, s]:
                u = np.int64(st[a, s])
                w = np.int64(st[b, s])
                if u >= 0 and w >= 0:
                    conf[p, u, w] += 1.0


@numba.njit(cache=True, nogil=True)
def _masked_max(st, mask):
    """Largest state at the sites where mask is set (-1 when there are none)."""
    top = -1
    n_rods, n_sites = st.shape
    for r in range(n_rods):
        for s in range(n_sites):
            if mask[r, s] and st[r, s] > top:
                top = np.int64(st[r, s])
    return top


@numba.njit(cache=True, nogil=True)
def _pick_sums(ps, pick, out):
    """out = ps[pick, :, :3].sum(axis=0), summed in the order of pick."""
    out[:] = 0.0
    for q in range(len(pick)):
        row = pick[q]
        for li in range(ps.shape[1]):
            for c in range(3):
                out[li, c] += ps[row, li, c]


def _as_values(values) -> np.ndarray:
    """Per-site values as a 2-D array the kernels read: float32/float64 kept (views stay views)."""
    x = np.asarray(values)
    if x.dtype == np.float32 or x.dtype == np.float64:
        return x
    if x.dtype.kind == "b":
        return x.view(np.uint8) if x.dtype.itemsize == 1 else x.astype(np.uint8)
    if x.dtype.kind in "iu" and x.dtype.itemsize <= 2 or x.dtype == np.float16:
        return x.astype(np.float32)
    return np.asarray(x, dtype=np.float64)


def _check_agreement_inputs(values, mask, states, n_states):
    """Validate the inputs of :func:`rod_agreement`.

    Returns ``(x, mask, m, probs, states, n_states)``: the values (never copied), the bool mask,
    the sites used (unmasked with a finite value), whether the values are probabilities, and the
    signed states with their number of states (both None when ``states`` is None).
    """
    x = _as_values(values)
    if x.ndim != 2:
        raise InputError(f"values must be (n_rods, n_sites), got shape {x.shape}")
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != x.shape:
        raise InputError(f"mask shape {mask.shape} does not match values {x.shape}")
    st, k = None, None
    if states is not None:
        st = _signed_states(np.asarray(states))
        if st.shape != mask.shape:
            raise InputError(f"states shape {st.shape} does not match mask {mask.shape}")
        top = int(_masked_max(st, mask))
        k = max(top, 0) + 1 if n_states is None else int(n_states)
        if top >= k:
            raise InputError(f"states hold state {top}, expected states below n_states={k}")
    # sites used: unmasked with a finite value; x itself is never copied (masked sites are skipped)
    probs, finite = _check_values(x, mask)
    probs = bool(probs)
    m = mask
    if not finite:
        m = np.empty(x.shape, dtype=bool)
        _finite_mask(x, mask, m)
    return x, mask, m, probs, st, k


def _nonneighbour_comparison(x, m, nb, lags, zero, stat, n_null, rng):
    """Lag-0 correlation over rod pairs that are not neighbours, and its resampling p-value.

    Returns ``(corr, p_value)``, NaN where there are no such pairs or no finite statistic.
    """
    n_rods = x.shape[0]
    corr_nn, p_nn = float("nan"), float("nan")
    n_all = n_rods * (n_rods - 1) // 2
    if len(nb) and n_all > len(nb) and np.isfinite(stat):
        pool = _nonneighbour_pool(n_rods, nb, min(n_all - len(nb), max(4 * len(nb), 500), 2000), rng)
        if len(pool):
            ps, _ = _lag_sums(x, m, pool[:, 0], pool[:, 1], lags)
            corr_nn = float(_corr_from_sums(ps[:, zero].sum(axis=0)))
            nn_null = np.empty(min(int(n_null), 999) if n_null > 0 else 0)
            picked = np.empty((len(lags), 3))
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                for r in range(len(nn_null)):
                    pick = rng.integers(0, len(pool), size=len(nb))
                    _pick_sums(ps, pick, picked)
                    nn_null[r] = np.nanmax(_corr_from_sums(picked))
            okn = np.isfinite(nn_null)
            if okn.any():
                p_nn = float((1 + np.sum(nn_null[okn] >= stat)) / (1 + okn.sum()))
    return corr_nn, p_nn


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
        Per-site value to correlate, e.g. the posterior probability of the least abundant metal;
        float32 or float64 (a strided view such as ``posteriors[:, :, k]`` is read without a
        copy; sums are taken in float64), or bool/integer indicators.
    mask : (n_rods, n_sites) ndarray of bool
    neighbours : (n_pairs, 2) ndarray of int
    metal : int
        Recorded as the metal the values refer to.
    states : (n_rods, n_sites) ndarray of int, optional
        Decoded states (any integer dtype, negative where masked), for Cohen's kappa.
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
    x, mask, m, probs, st, k = _check_agreement_inputs(values, mask, states, n_states)
    nb = np.asarray(neighbours, dtype=np.int64).reshape(-1, 2)
    n_rods, n_sites = x.shape
    if nb.size and (nb.min() < 0 or nb.max() >= n_rods):
        raise InputError(f"neighbours refer to rods outside 0..{n_rods - 1}")
    nb = nb[nb[:, 0] != nb[:, 1]]
    lags = np.arange(-int(max_lag), int(max_lag) + 1)
    i, j = np.ascontiguousarray(nb[:, 0]), np.ascontiguousarray(nb[:, 1])
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
            null = _shift_null(x, m, i, j, lags, n_null, tmin, rng)
    ok = np.isfinite(null)
    p_value = float((1 + np.sum(null[ok] >= stat)) / (1 + ok.sum())) if ok.any() else float("nan")
    null_mean = float(null[ok].mean()) if ok.any() else float("nan")

    corr_nn, p_nn = _nonneighbour_comparison(x, m, nb, lags, zero, stat, n_null, rng)

    # Cohen's kappa of decoded states at lag 0
    if states is None:
        k = 2 if n_states is None else int(n_states)
        conf = np.zeros((len(nb), k, k))
        kappa = float("nan")
    else:
        conf = np.zeros((len(nb), k, k))
        _pair_confusion(st, mask, i, j, conf)
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
            "pitch_nm": to_jsonable(self.pitch_nm),
            "n_rods": int(self.n_rods),
            "n_sites_used": int(self.n_sites_used),
            "n_boot": int(self.n_boot),
            "random_state": self.random_state,
            "least_abundant": self.metals[self.least_abundant],
            "transmat": to_jsonable(self.transmat),
            "notes": list(self.notes),
        }
        for grp in ("composition", "mean_run_length_sites", "mean_run_length_nm", "run_length_ratio",
                    "independent_run_length_sites", "persistence_per_metal"):
            out[grp] = {mt: to_jsonable(e[f"{grp}.{mt}"]) for mt in self.metals}
        for key in ("persistence", "entropy_rate_bits", "entropy_independent_bits"):
            out[key] = to_jsonable(e[key])
        out["runs_test"] = {
            "metal": self.metals[self.least_abundant],
            "z": to_jsonable(e["runs_test.z"]),
            "p": to_jsonable(e["runs_test.p"]),
            "per_metal": {mt: {kk: to_jsonable(vv) for kk, vv in d.items()} for mt, d in self.runs_test_per_metal.items()},
        }
        rr = self.rod_to_rod
        if rr is None:
            out["rod_to_rod"] = None
        else:
            out["rod_to_rod"] = {
                "metal": self.metals[rr.metal],
                "corr": to_jsonable(rr.corr),
                "corr_lags": {str(int(d)): to_jsonable(c) for d, c in zip(rr.lags, rr.corr_lags)},
                "statistic": to_jsonable(rr.statistic),
                "best_lag": int(rr.best_lag),
                "p_value": to_jsonable(rr.p_value),
                "null_mean": to_jsonable(rr.null_mean),
                "n_null": int(np.isfinite(rr.null).sum()),
                "corr_nonneighbour": to_jsonable(rr.corr_nonneighbour),
                "p_nonneighbour": to_jsonable(rr.p_nonneighbour),
                "kappa": to_jsonable(rr.kappa),
                "corr_corrected": to_jsonable(rr.corr_corrected),
                "corr_corrected_lags": {str(int(d)): to_jsonable(c) for d, c in zip(rr.lags, rr.corr_corrected_lags)},
                "statistic_corrected": to_jsonable(rr.statistic_corrected),
                "reliability": to_jsonable(rr.reliability),
                "n_pairs": rr.n_pairs,
                "n_sites_compared": rr.n_sites_compared,
            }
        out["markov_test"] = {k: to_jsonable(v) for k, v in self.markov_test.items()}
        out["run_lengths"] = {
            mt: {k: to_jsonable(v) for k, v in d.items()} for mt, d in self.run_lengths.items()
        }
        out["intervals"] = {}
        for name in sorted(self.estimates):
            est, lo, hi = self.interval(name)
            out["intervals"][name] = {"estimate": to_jsonable(est), "low": to_jsonable(lo), "high": to_jsonable(hi)}
        return out


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
        Decoded states, -1 at masked sites, of any integer dtype (int8 and int16 are used as
        they are); from ``posteriors`` when omitted.
    posteriors : (n_rods, n_sites, K) ndarray of float, optional
        Posterior state probabilities, float32 or float64; the rod-to-rod correlation uses them
        when given. Only the slice of the least abundant metal is read, in its own dtype (sums are
        taken in float64, so float32 posteriors give the results of their float64 copy).
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
    metals, tr, occ, pitch = _check_run_arrays(per_rod_transitions, per_rod_occupancy, metals, pitch_nm,
                                               n_boot, max_lag)
    k = len(metals)
    n_rods = tr.shape[0]
    n_boot = int(n_boot)
    seed = random_state if isinstance(random_state, (int, np.integer)) or random_state is None else None
    rng = np.random.default_rng(random_state)
    notes = []
    post, vit = _check_decoded_arrays(viterbi, posteriors, mask, n_rods, k)
    m = vit >= 0

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

    mk = _markov_test_summary(tr_sum, est, notes, lr_stat, lr_df, lr_pvalue, bic, bic_indep)
    runs_pm = _runs_test_estimates(vit, k, metals, least, w, est, reps)

    # run-length distribution of decoded runs (tabulated without listing the runs)
    rld = _run_length_tables(*_run_histograms(vit, k), k, p_fit, comp, None)
    run_lengths = {metals[s]: d for s, d in rld.items()}

    rr = _rod_to_rod_estimates(post, vit, m, least, k, neighbours, rod_xy_nm, max_lag, n_null, n_boot,
                               rng, est, reps, notes)

    return RunStatistics(
        metals=metals, pitch_nm=pitch, n_rods=int(n_rods), n_sites_used=int(np.count_nonzero(m)),
        estimates=est, replicates={key: np.asarray(v, dtype=float) for key, v in reps.items()},
        transmat=p_fit, composition=comp, occupancy=occ_sum, least_abundant=least,
        markov_test=mk, run_lengths=run_lengths, runs_test_per_metal=runs_pm, rod_to_rod=rr,
        n_boot=n_boot, random_state=int(seed) if seed is not None else None, notes=tuple(notes),
    )


def _check_run_arrays(per_rod_transitions, per_rod_occupancy, metals, pitch_nm, n_boot, max_lag):
    """Validate the per-rod count arrays and scalar settings of :func:`statistics_from_arrays`.

    Returns ``(metals, transitions, occupancy, pitch)`` with metals as a tuple of str and the
    arrays as float.
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
    return metals, tr, occ, pitch


def _check_decoded_arrays(viterbi, posteriors, mask, n_rods, k):
    """Validate the decoded states and posteriors; return ``(posteriors, states)``.

    The states come back in a small signed dtype, -1 at masked sites (decoded from the
    posteriors when ``viterbi`` is None); the posteriors are None when not given.
    """
    post = None if posteriors is None else np.asarray(posteriors)
    if post is not None and post.dtype.kind not in "fiub":
        post = np.asarray(post, dtype=float)
    if post is not None and (post.ndim != 3 or post.shape[0] != n_rods or post.shape[2] != k):
        raise InputError(f"posteriors must be ({n_rods}, n_sites, {k}), got shape {post.shape}")
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
    if viterbi is None:
        if post is None:
            raise InputError("give viterbi or posteriors: the decoded states are needed")
        vit = _argmax_states(post)
    else:
        vit = np.asarray(viterbi)
    if vit.ndim != 2 or vit.shape[0] != n_rods:
        raise InputError(f"viterbi must be ({n_rods}, n_sites), got shape {vit.shape}")
    if post is not None and post.shape[1] != vit.shape[1]:
        raise InputError(f"posteriors have {post.shape[1]} sites, viterbi {vit.shape[1]}")
    if mask is not None and mask.shape != vit.shape:
        raise InputError(f"mask shape {mask.shape} does not match viterbi {vit.shape}")
    # decoded states in a small signed dtype, -1 at masked sites
    vit, top = _used_states(vit, mask, k, own=viterbi is None)
    if top >= k:
        raise InputError(f"viterbi holds state {top}, expected states 0..{k - 1}")
    return post, vit


def _markov_test_summary(tr_sum, est, notes, lr_stat, lr_df, lr_pvalue, bic, bic_indep):
    """Markov test summary: the decoder's likelihood-ratio test when given, G^2 on counts otherwise.

    Adds the G^2 statistic to ``est`` and a note to ``notes`` when the decoder's test is missing.
    """
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
    return mk


def _runs_test_estimates(vit, k, metals, least, w, est, reps):
    """Runs test on decoded paths, per rod so the bootstrap weights ``w`` can resample it.

    Adds the least abundant metal's z and p to ``est`` and ``reps``; returns the per-metal table.
    """
    r_rod, e_rod, v_rod = _runs_per_rod(vit, k)
    z, pz = _z_from_sums(r_rod.sum(0), e_rod.sum(0), v_rod.sum(0))
    runs_pm = {mt: {"z": float(z[s]), "p": float(pz[s]), "n_runs": float(r_rod[:, s].sum()),
                    "expected_runs": float(e_rod[:, s].sum())} for s, mt in enumerate(metals)}
    est["runs_test.z"], est["runs_test.p"] = float(z[least]), float(pz[least])
    zb, pb = _z_from_sums(w @ r_rod[:, least], w @ e_rod[:, least], w @ v_rod[:, least])
    reps["runs_test.z"], reps["runs_test.p"] = zb, pb
    return runs_pm


def _rod_to_rod_estimates(post, vit, m, least, k, neighbours, rod_xy_nm, max_lag, n_null, n_boot,
                          rng, est, reps, notes):
    """Rod-to-rod agreement of the least abundant metal, with bootstrap replicates over pairs.

    Fills ``est`` and ``reps`` and appends to ``notes``; returns the :class:`RodAgreement`, or
    None when there are no neighbouring rod pairs.
    """
    nb = None if neighbours is None else np.asarray(neighbours, dtype=np.int64).reshape(-1, 2)
    if nb is None and rod_xy_nm is not None:
        nb = neighbour_pairs(rod_xy_nm)
    rr = None
    if nb is not None and len(nb):
        # only the one slice of the posteriors is read (a view, in its own dtype; sums in float64)
        vals = post[:, :, least] if post is not None else (vit == least)
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
        _rod_to_rod_replicates(rr, max_lag, n_boot, rng, reps)
    else:
        notes.append("rod-to-rod agreement: no neighbouring rod pairs")
    if post is None:
        notes.append("rod-to-rod agreement on decoded states (no posteriors given)")
    return rr


def _rod_to_rod_replicates(rr, max_lag, n_boot, rng, reps):
    """Bootstrap replicates of the rod-to-rod statistics, resampling neighbour pairs into ``reps``."""
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


def _argmax_states(post) -> np.ndarray:
    """Most probable state per site of (n_rods, n_sites, K) posteriors, in blocks of rods, as a
    small signed integer array (no full int64 temporary)."""
    n_rods, n_sites, k = post.shape
    out = np.empty((n_rods, n_sites), dtype=_state_dtype(k))
    step = max(1, _BLOCK_BYTES // max(1, 8 * n_sites))
    for r0 in range(0, n_rods, step):
        out[r0:r0 + step] = np.argmax(post[r0:r0 + step], axis=2)
    return out


def _used_states(vit, mask, k: int, own: bool = False):
    """Decoded states with -1 wherever the mask is off or the state is negative, and the largest
    state at a used site.

    The result has the smallest signed dtype holding ``k`` states; it is ``vit`` itself, changed in
    place, when ``own`` (the caller made it) and it already has that dtype, else a new array filled
    in blocks of rods (no full int64 temporary).
    """
    dt = _state_dtype(max(int(k), 1))
    n_rods, n_sites = vit.shape
    out = vit if (own and vit.dtype == dt) else np.empty(vit.shape, dtype=dt)
    step = max(1, _BLOCK_BYTES // max(1, 8 * n_sites))
    top = -1
    for r0 in range(0, n_rods, step):
        v = vit[r0:r0 + step]
        if v.dtype.kind != "i":
            v = v.astype(np.int64)
        use = v >= 0
        if mask is not None:
            use &= mask[r0:r0 + step]
        if use.any():
            top = max(top, int(v[use].max()))
        if top < k:
            out[r0:r0 + step] = np.where(use, v, v.dtype.type(-1))
    return out, top


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
            post = np.asarray(vals["posteriors"])
            if post.ndim != 3:
                raise InputError(f"decoding result: posteriors must be (n_rods, n_sites, K), got shape {post.shape}")
            path = _argmax_states(post)
        if path is None:
            raise InputError("decoding result: no per_rod_transitions/per_rod_occupancy and no decoded states")
        warnings.warn("decoding result has no expected transition counts; counting on the decoded path, "
                      "which does not account for decoding noise", DataQualityWarning, stacklevel=2)
        tr, occ = transition_counts_from_paths(path, len(tuple(vals["metals"])), vals["mask"])
        vals["per_rod_transitions"], vals["per_rod_occupancy"] = tr, occ
    return statistics_from_arrays(n_boot=n_boot, random_state=random_state, max_lag=max_lag,
                                  n_null=n_null, **vals)
