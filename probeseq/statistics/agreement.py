"""Statistics of decoded metal sequences along rods, with bootstrap intervals over rods.

Everything here works on plain arrays; :func:`compute_statistics` is the thin wrapper that reads
them from a decoding result (and, for what it lacks, from the rod columns).

Estimates account for decoding noise by using the fitted model rather than the noisy most likely
path: the transition matrix is the M-step of the fitted hidden Markov model, i.e. the row-normalised
sum of the *expected* transition counts (posterior-summed xi) over rods, and the composition is the
posterior-summed site occupancy. Quantities that are by definition properties of the decoded path
(the run-length distribution, the Wald-Wolfowitz runs test) use the path, and say so.

Definitions (K metals, fitted transition matrix P, stationary distribution mu, composition f;
the chain quantities are defined once, in :mod:`probeseq.decoding.chain`, and listed in docs/GLOSSARY.md):

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
circular-shift null (:mod:`.shiftnull`), in blocks of neighbour pairs whose temporaries are bounded
by ``_BLOCK_BYTES``. Sums keep the order of floating-point operations of plain numpy code
(``ndarray.sum``'s pairwise summation, bincount's running sums), so results do not depend on the
block size; the null's sums, by FFT and prefix sums, equal the direct ones up to rounding and do
not depend on the block size or the threads either.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numba
import numpy as np

from .. import runtime
from ..decoding.chain import signed_states as _signed_states
from ..exceptions import InputError
from .shiftnull import shift_null_sums

__all__ = ['RodAgreement', 'rod_agreement', 'neighbour_pairs']

_EPS = 1e-300


# working memory of one blocked temporary (rods or neighbour pairs processed per block)
_BLOCK_BYTES = 32 * 2**20


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
    # contiguous copies of the small index arrays: one compiled kernel for every caller (a column
    # of a pair table would be a strided view and build a second one, about 1.5 s)
    i = np.ascontiguousarray(i, dtype=np.int64)
    j = np.ascontiguousarray(j, dtype=np.int64)
    lags = np.ascontiguousarray(lags, dtype=np.int64)
    n_sites = x.shape[1]
    out = np.zeros((len(i), len(lags), 5))
    cnt = np.zeros((len(i), len(lags)))
    if len(i) and n_sites:
        plans = [_pairwise_plan(n_sites - abs(int(d))) if abs(int(d)) < n_sites else np.zeros((0, 2), np.int64)
                 for d in lags]
        start = np.concatenate([[0], np.cumsum([len(q) for q in plans])]).astype(np.int64)
        plan = np.concatenate(plans)
        # each pair's sums are its own: the pairs are split between threads (the kernel releases
        # the GIL), with results identical to one thread
        _in_threads(lambda a, b: _lag_sums_kernel(x, m, i[a:b], j[a:b], lags, bool(probabilities), plan, start,
                                                  out[a:b], cnt[a:b]), len(i), min_per_thread=256)
    return out, cnt


def _stat_threads() -> int:
    """Threads of the statistics' compiled loops and FFTs: the kernels' thread budget (``--jobs``),
    at most 2 (more gains little on these memory-bound loops)."""
    return max(1, min(2, runtime.kernel_threads()))


def _in_threads(fn, n: int, min_per_thread: int = 1) -> None:
    """Call ``fn(a, b)`` on consecutive parts ``[a, b)`` of ``range(n)``, one per thread of
    :func:`_stat_threads` (:func:`probeseq.runtime.in_parts`)."""
    runtime.in_parts(fn, n, _stat_threads(), min_items=min_per_thread)


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


def _rod_ffts(x, m, n_fft: int | None = None):
    """Real FFTs along sites of the masked values, their squares and the mask, per rod (float64),
    zero-padded to ``n_fft`` when given.

    scipy.fft with the statistics' threads (:func:`_stat_threads`): the same pocketfft transforms as
    numpy.fft, bit for bit, split over rows."""
    import scipy.fft

    w = _stat_threads()
    a = np.where(m, np.asarray(x, dtype=np.float64), 0.0)
    return (scipy.fft.rfft(a, n=n_fft, axis=1, workers=w), scipy.fft.rfft(a * a, n=n_fft, axis=1, workers=w),
            scipy.fft.rfft(m.astype(float), n=n_fft, axis=1, workers=w))


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


def _shift_null(x, m, i, j, lags, n_null, tmin, rng):
    """Null statistics: each pair's second rod shifted by its own random offset in [tmin, n - tmin].

    The random offsets are drawn first, in the same calls and order as replicate chunks of
    ``4e6 / (3 n_pairs n_lags)`` replicates; the centred circular sums of each pair at its offsets
    plus the lags are summed over pairs by :func:`.shiftnull.shift_null_sums` (blocks of pairs whose
    temporaries are bounded by ``_BLOCK_BYTES``, :func:`_stat_threads` threads).

    Returns
    -------
    (n_null,) ndarray of float
        Largest pooled correlation over lags of each replicate.
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
    acc = shift_null_sums(x, m, i, j, lags, shifts, threads=_stat_threads(), block_bytes=_BLOCK_BYTES)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmax(_corr_from_sums(acc), axis=1)


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
