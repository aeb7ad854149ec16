"""Runs of one metal along the rods: run listing, run-length distributions and the
Wald-Wolfowitz runs test.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
from scipy import stats as _sps

from ..decoding import chain as _chain
from ..decoding.chain import masked_paths as _masked_paths
from .agreement import _EPS

__all__ = ['RunLengths', 'decoded_runs', 'run_length_distribution', 'runs_expectation', 'runs_test']

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

    The runs are those of :func:`probeseq.decoding.chain.list_runs` (the one run listing of probeseq).

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
