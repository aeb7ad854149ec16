"""Compiled forward-backward and Viterbi of the rod model, one rod per loop iteration.

The batched numpy recursions of :mod:`probeseq.decoding.hmm` hold several arrays of the size of the
whole count array (emission factors, forward and backward variables) for all rods at once. The
kernels here run the same recursions rod by rod with `numba <https://numba.pydata.org>`_,
compute the emission factors of :mod:`probeseq.decoding` on the fly from the counts, and keep per
rod only what the EM needs (expected transitions, first-site posterior, expected own ions and
expected counts at split-ion sites) or, when decoding, write the posteriors (float32) and the
Viterbi path straight into their output arrays. Extra memory is a few arrays of one rod's
length per thread. Rods are spread over the threads with ``numba.prange``; the per-rod results
are summed afterwards in rod order, so results do not depend on the number of threads.

Recursions (Rabiner 1989, eqs. 18-25 and 91-95): with ``c_t`` the sum of the unnormalised
forward variables at step t, ``alpha_t = (alpha_{t-1} A) * f_t / c_t``,
``beta_t = A (f_{t+1} * beta_{t+1}) / c_{t+1}`` (``beta_last = 1``), posterior
``gamma_t = alpha_t * beta_t`` and transition posterior
``xi_t(i, j) = alpha_{t-1}(i) A_ij f_t(j) beta_t(j) / c_t``; the log-likelihood is
``sum_t log c_t`` plus the state-independent part of the emissions. Viterbi is the max-product
recursion in log space, ties broken towards the lower state index (as
:func:`probeseq.decoding.hmm.viterbi`).

The emission factor of state k at an observed site with counts x is
``f_k = 1 - eta + eta * xe_k / mu_k`` with the effective counts ``xe`` of
:func:`probeseq.decoding.model.emission_factors` (``xe = x`` for whole counts); at an unobserved site
inside a rod's span every factor is 1.

Per-rod relative efficiency ``h`` (:mod:`probeseq.decoding.efficiency`): rod r is modelled with
``eta_r = eta h_r`` and ``mu_r = mu h_r``, so its factor is ``1 - eta h_r + eta xe_k / mu_k``
(``h_r`` cancels in the second term) and its split-ion terms use ``mu_r``. The kernels always take
an array ``h`` (ones when no efficiency is given): per rod they compute ``1 - eta h_r`` and
``mu h_r`` once, which with ``h_r = 1`` are exactly ``1 - eta`` and ``mu``, so the results are
bit for bit those without ``h`` and no work is added per site (measured on 2000 rods x 500
sites, K = 3: decode and E-step within 2 % of the kernels without ``h``; how the compiled code
happens to be laid out moves these timings by up to 20 % between builds). The decode kernel's table of log
factors is shared by the rods with ``h_r = 1`` and built per rod (16 entries) for the others.

The per-site helpers (``_forward``, ``_backward_step``, ``_store_rod``) are inlined into the
kernels in numba's own IR (``inline="always"``). As plain calls, LLVM inlined them only when the
kernel was compiled in the running process: a kernel loaded from the on-disk cache (every run
after ``probeseq prepare``) or one built without ``parallel`` ran 1.5x slower (K = 3, one thread,
1000 rods x 500 sites: decode 91 against 60 ns per site, E-step 85 ns). Inlined, both run at
34-37 ns per site, cached or not.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numba
import numpy as np

from .. import runtime

__all__ = ['fit_pass', 'decode_pass', 'set_threads']

_EPS = 1e-9


RESCALE_EVERY = 8


"""Steps between rescalings of the forward variables (a power of two)."""


def set_threads(n: int | None) -> int:
    """Set the number of threads of the kernels (None: all cores); returns the number used.

    The same as :func:`probeseq.runtime.configure` with ``n_jobs=n`` (which also sets the
    worker processes of batches); the kernels take their thread count from there on every call.
    """
    runtime.configure(n)
    return runtime.kernel_threads()


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _site(counts, r, t, ome, coef, mu, kt, n_out, fac_out, s, c_out):
    """Emission terms of one observed site; returns ``B`` (1 without a split ion) and whether
    the site has a split ion. Fills n (integer parts), fac and c. ``ome = 1 - eta h_r``,
    ``coef = eta / mu`` (unscaled rates) and ``mu`` the rod's extra rates ``mu h_r`` (counts
    per site)."""
    k = len(kt)
    msum = 0.0
    for j in range(k):
        v = float(counts[r, t, j])
        n = math.floor(v + _EPS)
        phi = v - n
        if phi < _EPS:
            phi = 0.0
        n_out[j] = n
        c_out[j] = phi  # fractional part for now
        msum += phi
    if msum == 0.0:
        for j in range(k):
            fac_out[s, j] = ome[j] + n_out[j] * coef[j]
            c_out[j] = 0.0
        return 1.0, False
    denom = max(msum, 1.0)
    pi_sum = 0.0
    for j in range(k):
        c_out[j] = c_out[j] / denom
        pi_sum += c_out[j]
    pi_none = min(max(1.0 - pi_sum, 0.0), 1.0)
    b = pi_none
    for j in range(k):
        c_out[j] = c_out[j] * mu[j] / (n_out[j] + 1.0)
        b += c_out[j]
    for j in range(k):
        xe = n_out[j] + c_out[j] / b
        fac_out[s, j] = ome[j] + xe * coef[j]
    return b, True


@numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
def site_factors(counts, r, t, ome, coef, mu, kt, nb, fac, s, cb, linear):
    """The emission factors of observed site (r, t) into ``fac[s]``: ``ome_k + xe_k coef_k`` with
    the effective counts ``xe`` (the counts when whole; with ``linear`` the values themselves; else
    whole ions plus one split ion, :func:`_site`). Returns ``(B, split, whole)``: the split ion's
    term (1 without one), whether the site has one, whether every value is whole."""
    k = len(kt)
    whole = True
    for j in range(k):
        v = float(counts[r, t, j])
        n = math.floor(v + _EPS)
        if v - n >= _EPS:
            whole = False
            if linear:
                n = v
        fac[s, j] = ome[j] + n * coef[j]
    if whole or linear:
        return 1.0, False, whole
    b, _ = _site(counts, r, t, ome, coef, mu, kt, nb, fac, s, cb)
    return b, True, whole


@numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _forward(counts, mask, r, t0, length, ome, mu, coef, a, p, alpha, fac, invc, nb, cb, spl, kt,
             vt, ltab, loga, logp, vit, back, lin):
    """Forward pass of rod r over sites t0..t0+length-1, with the Viterbi recursion in the same
    loop when ``vt`` is a non-empty tuple (the decode passes ``kt``: a tuple of its own arguments
    is typed once, where a literal ``(0,)`` built in the kernel had the helper compiled twice, for
    the literal and for its plain type). ``ome = 1 - eta h_r``, ``mu`` the rod's extra rates
    ``mu h_r`` and ``coef = eta / mu`` of the unscaled rates.

    The forward variables are rescaled to sum 1 every ``RESCALE_EVERY`` steps, at the last step
    and whenever their sum leaves [1e-150, 1e150]; ``invc[s]`` is the inverse of the sum
    divided out at step s (1 where none was). Returns ``(sum log c, sum log B)``.

    The Viterbi scores (max-sum in log space, ``vit``; back-pointers ``back``, ties to the lower
    state index) use the log emission factors of the site just computed: from the table ``ltab``
    for whole counts below its size, else ``log(f)``; 0 at an unobserved site. Running both
    recursions in one loop reads each site's counts once and interleaves two independent chains
    of dependent arithmetic. ``len(vt)`` is a compile-time constant, so the E-step's version
    (``vt = ()``, empty arrays for the rest) is compiled without the Viterbi code.

    With ``len(lin) > 0`` (soft evidence, :mod:`probeseq.lattice.evidence`) the values are read
    linearly: the factor is ``1 - eta_k h_r + x_k eta_k / mu_k`` for fractional ``x`` as well (no
    split ion).
    """
    linear = len(lin) > 0
    k = len(kt)
    viterbi = len(vt) > 0
    n_tab = ltab.shape[1]
    logc = 0.0
    log_b = 0.0
    le = np.empty(k)
    for s in range(length):
        t = t0 + s
        spl[s] = False
        if mask[r, t]:
            b, split, whole = site_factors(counts, r, t, ome, coef, mu, kt, nb, fac, s, cb, linear)
            if split:
                spl[s] = True
                log_b += math.log(b)
            if viterbi:  # the table holds the same logs of whole counts' factors, bit for bit
                for j in range(k):
                    n = math.floor(float(counts[r, t, j]) + _EPS)
                    le[j] = ltab[j, int(n)] if (whole and n < n_tab) else math.log(fac[s, j])
        else:
            for j in range(k):
                fac[s, j] = 1.0
                le[j] = 0.0
        tot = 0.0
        if s == 0:
            for j in range(k):
                v = p[j] * fac[s, j]
                alpha[s, j] = v
                tot += v
                if viterbi:
                    vit[0, j] = logp[j] + le[j]
        else:
            for j in range(k):
                v = 0.0
                for i in range(k):
                    v += alpha[s - 1, i] * a[i, j]
                v *= fac[s, j]
                alpha[s, j] = v
                tot += v
                if viterbi:
                    bestv = vit[s - 1, 0] + loga[0, j]
                    arg = 0
                    for i in range(1, k):
                        w = vit[s - 1, i] + loga[i, j]
                        if w > bestv:
                            bestv = w
                            arg = i
                    vit[s, j] = bestv + le[j]
                    back[s, j] = arg
        if (s & (RESCALE_EVERY - 1)) == RESCALE_EVERY - 1 or s == length - 1 or tot > 1e150 or tot < 1e-150:
            inv = 1.0 / tot
            for j in range(k):
                alpha[s, j] *= inv
            invc[s] = inv
            logc += math.log(tot)
        else:
            invc[s] = 1.0
    return logc, log_b


@numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _backward_step(alpha, fac, ic, a, s, beta, nbeta, w, xil, count_pair):
    """One step of the scaled backward pass, from site s to s - 1, in place: with
    ``w = f_s * beta_s / c_s``, ``beta_{s-1} = A w``, and (when ``count_pair``) the expected
    transitions ``xi += alpha_{s-1} (x) A * w``."""
    k = beta.size
    for j in range(k):
        w[j] = fac[s, j] * beta[j] * ic
    for i in range(k):
        v = 0.0
        ai = alpha[s - 1, i]
        for j in range(k):
            aw = a[i, j] * w[j]
            if count_pair:
                xil[i, j] += ai * aw
            v += aw
        nbeta[i] = v
    for i in range(k):
        beta[i] = nbeta[i]


@numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
def _store_rod(q, occl, xil, occ, xi):
    """Copy one rod's expected occupancy and transitions into row q of the shared outputs."""
    k = occl.size
    for i in range(k):
        occ[q, i] = occl[i]
        for j in range(k):
            xi[q, i, j] = xil[i, j]


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
def _fit_kernel(counts, mask, rods, first, span, eta, mu, h, a, p, ll, xi, g0, own, adj, gobs, kt, lin):
    n_rods = rods.size
    k = len(kt)
    coef = eta / mu
    no_tab = np.empty((k, 0))  # no Viterbi in the E-step (see _forward)
    no_vec = np.empty(0)
    no_vit = np.empty((0, k))
    no_back = np.empty((0, k), dtype=np.int8)
    for q in numba.prange(n_rods):
        r = rods[q]
        t0 = first[q]
        length = span[q]
        alpha = np.empty((length, k))
        fac = np.empty((length, k))
        invc = np.empty(length)
        spl = np.empty(length, dtype=np.bool_)
        nb = np.empty(k)
        cb = np.empty(k)
        beta = np.ones(k)
        nbeta = np.empty(k)
        w = np.empty(k)
        xil = np.zeros((k, k))
        ownl = np.zeros(k)
        hr = h[r]
        ome = np.empty(k)  # the rod's 1 - eta_j h_r per state; exactly 1 - eta_j when h_r = 1
        mur = np.empty(k)
        gl = np.zeros(k)
        for j in range(k):
            ome[j] = 1.0 - eta[j] * hr
            mur[j] = mu[j] * hr
        logc, log_b = _forward(counts, mask, r, t0, length, ome, mur, coef, a, p, alpha, fac, invc, nb, cb, spl,
                               kt, (), no_tab, no_tab, no_vec, no_vit, no_back, lin)
        ll[q] = logc + log_b
        for s in range(length - 1, -1, -1):
            t = t0 + s
            # posterior of site s (alpha * beta sums to 1) and the detection expectations
            if mask[r, t]:
                for j in range(k):
                    f = fac[s, j]
                    gl[j] += alpha[s, j] * beta[j]
                    if f != ome[j]:
                        # detection posterior eta_j xe_j / mu_j / f_j = 1 - (1 - eta_j) / f_j
                        ownl[j] += alpha[s, j] * beta[j] * (1.0 - ome[j] / f)
                if spl[s]:
                    b, _ = _site(counts, r, t, ome, coef, mur, kt, nb, fac, s, cb)
                    ssum = 0.0
                    for j in range(k):
                        ssum += alpha[s, j] * beta[j] * (ome[j] + nb[j] * coef[j]) / fac[s, j]
                    for j in range(k):
                        g = alpha[s, j] * beta[j]
                        adj[q, j] += (cb[j] / b) * (ssum + g * coef[j] / fac[s, j])
            if s == 0:
                for j in range(k):
                    g0[q, j] = alpha[0, j] * beta[j]
                break
            _backward_step(alpha, fac, invc[s], a, s, beta, nbeta, w, xil, True)
        _store_rod(q, ownl, xil, own, xi)
        for j in range(k):
            gobs[q, j] = gl[j]


@numba.njit(cache=True, nogil=True, parallel=True, error_model="numpy")
def _decode_kernel(counts, mask, rods, first, span, eta, mu, h, a, p, below, ll, xi, occ, post, path, uncertain,
                   kt, lin):
    n_rods = rods.size
    k = len(kt)
    coef = eta / mu
    n_tab = 64
    ltab = np.empty((k, n_tab))  # log factors of whole counts, for the rods with h_r = 1
    for j in range(k):
        for n in range(n_tab):
            ltab[j, n] = math.log((1.0 - eta[j]) + n * coef[j])
    loga = np.empty((k, k))
    for i in range(k):
        for j in range(k):
            loga[i, j] = math.log(a[i, j]) if a[i, j] > 0 else -np.inf
    logp = np.empty(k)
    for j in range(k):
        logp[j] = math.log(p[j]) if p[j] > 0 else -np.inf
    for q in numba.prange(n_rods):
        r = rods[q]
        t0 = first[q]
        length = span[q]
        alpha = np.empty((length, k))
        fac = np.empty((length, k))
        invc = np.empty(length)
        spl = np.empty(length, dtype=np.bool_)
        back = np.empty((length, k), dtype=np.int8)
        nb = np.empty(k)
        cb = np.empty(k)
        beta = np.ones(k)
        nbeta = np.empty(k)
        w = np.empty(k)
        xil = np.zeros((k, k))
        occl = np.zeros(k)
        vit = np.empty((length, k))
        hr = h[r]
        ome = np.empty(k)
        mur = np.empty(k)
        for j in range(k):
            ome[j] = 1.0 - eta[j] * hr
            mur[j] = mu[j] * hr
        tab = ltab
        if hr != 1.0:
            tab = np.empty((k, 16))
            for j in range(k):
                for n in range(16):
                    tab[j, n] = math.log(ome[j] + n * coef[j])
        logc, log_b = _forward(counts, mask, r, t0, length, ome, mur, coef, a, p, alpha, fac, invc, nb, cb, spl,
                               kt, kt, tab, loga, logp, vit, back, lin)
        ll[q] = logc + log_b
        for s in range(length - 1, -1, -1):
            t = t0 + s
            if mask[r, t]:
                best = 0.0
                for j in range(k):
                    g = alpha[s, j] * beta[j]
                    post[r, t, j] = g
                    occl[j] += g
                    if g > best:
                        best = g
                uncertain[r, t] = best < below
            if s == 0:
                break
            _backward_step(alpha, fac, invc[s], a, s, beta, nbeta, w, xil, mask[r, t] and mask[r, t - 1])
        _store_rod(q, occl, xil, occ, xi)
        # Viterbi traceback (scores and back-pointers from _forward)
        s = length - 1
        cur = 0
        bestv = vit[s, 0]
        for j in range(1, k):
            if vit[s, j] > bestv:
                bestv = vit[s, j]
                cur = j
        while True:
            t = t0 + s
            if mask[r, t]:
                path[r, t] = cur
            if s == 0:
                break
            cur = back[s, cur]
            s -= 1


def _states(k: int) -> tuple:
    """A tuple of length ``k`` passed to the kernels: its length is a compile-time constant, so
    each number of states gets its own compiled kernels with the loops over states unrolled
    (measured: the decode 1.2x faster on one thread for K = 3)."""
    return (0,) * int(k)


def _rod_spans(mask):
    """Rods with an observed site, their first observed site and span (last - first + 1)."""
    has = mask.any(axis=1)
    rods = np.flatnonzero(has).astype(np.int64)
    m = mask[rods]
    first = m.argmax(axis=1).astype(np.int64)
    last = mask.shape[1] - 1 - m[:, ::-1].argmax(axis=1)
    return rods, first, (last - first + 1).astype(np.int64)


def _kernel_mask(mask) -> np.ndarray:
    """The mask as the kernels take it: a read-only, C-ordered bool view (a copy only when it is
    not one already). The count stage's mask is read-only, one read back from a file is not; each
    different argument type would build the kernels again."""
    m = np.ascontiguousarray(mask, dtype=np.bool_).view()
    m.flags.writeable = False
    return m


def _kernel_arrays(counts, mask, rods, first, span):
    """The kernels' array arguments in one form whatever the caller holds: C-ordered counts (their
    dtype kept), the mask of :func:`_kernel_mask` and C-ordered int64 rods, first sites and spans.
    A second argument type would build the fit and decode kernels again (about 12 s for one number
    of metals); with one form the cache filled by ``probeseq prepare`` serves every caller."""
    ints = (np.ascontiguousarray(a, dtype=np.int64) for a in (rods, first, span))
    return (np.ascontiguousarray(counts), _kernel_mask(mask), *ints)


def _rod_efficiency(h, n_rods: int) -> np.ndarray:
    """The per-rod relative efficiency as the kernels take it: (n_rods,) float64, ones for None."""
    if h is None:
        return np.ones(n_rods)
    h = np.ascontiguousarray(h, dtype=np.float64).reshape(-1)
    if h.shape != (n_rods,):
        raise ValueError(f"rod_efficiency must have shape ({n_rods},), got {h.shape}")
    return h


def _state_eta(eta, k: int) -> np.ndarray:
    """The detection probability of each state's own ion as the kernels take it: (k,) float64
    (a scalar is the same for every state)."""
    v = np.ascontiguousarray(np.broadcast_to(np.asarray(eta, dtype=np.float64), (k,)))
    return v.copy() if not v.flags.writeable else v


class FitPassResult(NamedTuple):
    """What one E-step of :func:`fit_pass` returns."""

    loglik: float
    xi: np.ndarray
    first_posterior: np.ndarray
    own: np.ndarray
    split_extra: np.ndarray
    loglik_per_rod: np.ndarray
    own_per_rod_state: np.ndarray
    sites_per_rod_state: np.ndarray


def fit_pass(counts, mask, rods, first, span, eta, mu, transmat, startprob, rod_efficiency=None, linear=False):
    """One E-step over the given rods.

    Parameters
    ----------
    counts : (n_rods, n_sites, K) ndarray of float32 or float64
    mask : (n_rods, n_sites) ndarray of bool
    rods, first, span : (R,) ndarray of int64
        Rods to use, their first observed site and span (see :func:`spans`).
    eta : float or (K,) ndarray of float
        Detection probability of a site's own ion, the same for every state or one per state
        (``eta_k = eta a_k`` with the per-metal visibility ``a_k``).
    mu : (K,) ndarray of float
    transmat : (K, K) ndarray of float
    startprob : (K,) ndarray of float
    rod_efficiency : (n_rods,) ndarray of float, optional
        Relative detection efficiency ``h`` of every rod (row of ``counts``), dimensionless: rod
        r has ``eta h_r`` and extra rates ``mu h_r``. None: 1 for every rod.
    linear : bool
        Read fractional values linearly (soft evidence, see :func:`_forward`), not as a split ion.

    Returns
    -------
    loglik : float
        Log-likelihood without the state-independent Poisson part of the emissions
        (``sum_t sum_j (n_tj log mu_j - mu_j - log n_tj!)`` with the rod's rates, added by the
        caller).
    xi : (K, K) ndarray
        Expected transitions inside the rods' spans.
    first_posterior : (K,) ndarray
    own : (K,) ndarray
        Expected own (detected) ions per channel.
    split_extra : (K,) ndarray
        Expected whole counts beyond the integer parts, from split-ion sites.
    loglik_per_rod : (R,) ndarray
        ``loglik`` of each of the given rods.
    own_per_rod_state : (R, K) ndarray
        Expected own (detected) ions of each of the given rods in each state (for the M-step of
        ``eta`` with per-state visibilities or a per-rod efficiency).
    sites_per_rod_state : (R, K) ndarray
        Expected observed sites of each of the given rods in each state.

    Returns a :class:`FitPassResult`.
    """
    counts, mask, rods, first, span = _kernel_arrays(counts, mask, rods, first, span)
    k = mu.size
    n = rods.size
    ll = np.zeros(n)
    xi = np.zeros((n, k, k))
    g0 = np.zeros((n, k))
    own = np.zeros((n, k))
    adj = np.zeros((n, k))
    gobs = np.zeros((n, k))
    runtime.ensure()
    h = _rod_efficiency(rod_efficiency, counts.shape[0])
    _fit_kernel(counts, mask, rods, first, span, _state_eta(eta, k), np.ascontiguousarray(mu, dtype=float), h,
                np.ascontiguousarray(transmat, dtype=float), np.ascontiguousarray(startprob, dtype=float),
                ll, xi, g0, own, adj, gobs, _states(k), (0,) if linear else ())
    return FitPassResult(float(ll.sum()), xi.sum(axis=0), g0.sum(axis=0), own.sum(axis=0), adj.sum(axis=0), ll,
                         own, gobs)


def decode_pass(counts, mask, rods, first, span, eta, mu, transmat, startprob, uncertain_below,
                rod_efficiency=None, linear=False):
    """Posteriors, Viterbi path and per-rod expectations of every rod.

    Parameters as :func:`fit_pass`; ``uncertain_below`` is the posterior level below which a
    site is flagged uncertain.

    Returns
    -------
    loglik : float
        Without the state-independent Poisson part (see :func:`fit_pass`).
    posteriors : (n_rods, n_sites, K) ndarray of float32
        0 at masked sites.
    path : (n_rods, n_sites) ndarray of int8
        -1 at masked sites.
    uncertain : (n_rods, n_sites) ndarray of bool
    per_rod_xi : (n_rods, K, K) ndarray
        Expected transitions between consecutive observed sites.
    occupancy : (n_rods, K) ndarray
        Expected observed sites per metal.
    """
    counts, mask, rods, first, span = _kernel_arrays(counts, mask, rods, first, span)
    n_rods, n_sites, k = counts.shape
    n = rods.size
    ll = np.zeros(n)
    xi = np.zeros((n, k, k))
    occ = np.zeros((n, k))
    post = np.zeros((n_rods, n_sites, k), dtype=np.float32)
    path = np.full((n_rods, n_sites), -1, dtype=np.int8)
    unc = np.zeros((n_rods, n_sites), dtype=bool)
    runtime.ensure()
    h = _rod_efficiency(rod_efficiency, n_rods)
    _decode_kernel(counts, mask, rods, first, span, _state_eta(eta, k), np.ascontiguousarray(mu, dtype=float), h,
                   np.ascontiguousarray(transmat, dtype=float), np.ascontiguousarray(startprob, dtype=float),
                   float(uncertain_below), ll, xi, occ, post, path, unc, _states(np.asarray(mu).size),
                   (0,) if linear else ())
    per_xi = np.zeros((n_rods, k, k))
    per_xi[rods] = xi
    per_occ = np.zeros((n_rods, k))
    per_occ[rods] = occ
    return float(ll.sum()), post, path, unc, per_xi, per_occ


spans = _rod_spans


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _summary_kernel(counts, mask):
    n_rods, n_sites, k = counts.shape
    sum_x = np.zeros(k)
    sum_n = np.zeros(k)
    tot1 = 0.0
    tot2 = 0.0
    n_obs = 0
    max_n = 0.0
    whole = True
    for r in range(n_rods):
        for t in range(n_sites):
            if not mask[r, t]:
                continue
            n_obs += 1
            tot = 0.0
            for j in range(k):
                v = float(counts[r, t, j])
                n = math.floor(v + _EPS)
                if v - n >= _EPS:
                    whole = False
                sum_x[j] += v
                sum_n[j] += n
                tot += v
                if n > max_n:
                    max_n = n
            tot1 += tot
            tot2 += tot * tot
    return n_obs, sum_x, sum_n, tot1, tot2, max_n, whole


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _histogram_kernel(counts, mask, base, rows_hist, n_hist):
    n_rods, n_sites, k = counts.shape
    for r in range(n_rods):
        for t in range(n_sites):
            if not mask[r, t]:
                continue
            key = 0
            mult = 1
            for j in range(k):
                n = int(math.floor(float(counts[r, t, j]) + _EPS))
                key += n * mult
                mult *= base
                n_hist[n] += 1
            rows_hist[key] += 1


#: largest number of distinct whole-count vectors tabulated directly
_MAX_KEYS = 1 << 24


def summarise(counts, mask):
    """Sums of the observed sites that the fit needs, in one compiled pass (two when every
    count is whole and the distinct count vectors are few).

    Returns
    -------
    dict or None
        ``n_obs, sum_x, sum_n, totals_mean, totals_var`` and, when every count is whole,
        ``n_hist`` (observed cells per whole count value, all channels) and the distinct count
        vectors ``rows`` with multiplicities ``mult``; None for ``n_hist``/``rows`` otherwise.
    """
    counts, mask = np.ascontiguousarray(counts), _kernel_mask(mask)
    n_obs, sum_x, sum_n, tot1, tot2, max_n, whole = _summary_kernel(counts, mask)
    mean = tot1 / max(n_obs, 1)
    out = {"n_obs": int(n_obs), "sum_x": sum_x, "sum_n": sum_n, "totals_mean": mean,
           "totals_var": tot2 / max(n_obs, 1) - mean * mean, "n_hist": None, "rows": None, "mult": None}
    k = counts.shape[2]
    base = int(max_n) + 1
    if whole and n_obs and base ** k <= _MAX_KEYS:
        rows_hist = np.zeros(base ** k, dtype=np.int64)
        n_hist = np.zeros(base, dtype=np.int64)
        _histogram_kernel(counts, mask, base, rows_hist, n_hist)
        keys = np.flatnonzero(rows_hist)
        digits = (keys[:, None] // (base ** np.arange(k))[None, :]) % base
        out.update(n_hist=n_hist, rows=digits.astype(float), mult=rows_hist[keys].astype(float))
    return out
