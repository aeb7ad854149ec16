"""The circular-shift null of rod-to-rod agreement, summed over neighbour pairs.

Each null replicate shifts the second rod of every neighbour pair circularly by its own offset;
what a replicate needs of a pair are the raw circular sums N, Sx, Sy, Sxx, Syy and Sxy (sites used
by both rods, their values, squares and cross products) at the few shifts ``offset + lag``.
:func:`shift_null_sums` gets them for every pair without a per-pair pass over the sites:

* **Rod spectra computed once.** The pairs are ordered so that the rods of nearby pairs are
  nearby (a reverse Cuthill-McKee order of the neighbour graph, pairs sorted by their later rod),
  and each rod's spectra wait in a slot of a bounded cache (``_CACHE_BYTES``) from the first pair
  that needs them to the last: on a lattice every rod is transformed once. Rods that find no free
  slot (a neighbour graph without such an order) are transformed again for each block.
* **Cross sums by FFT.** ``irfft(conj(F a) F b)`` over ``n_fft`` sites gives a correlation for
  every shift at once: the circular one when ``n_fft`` is the number of sites n (a fast FFT
  length), otherwise the linear one over a fast length of at least 2n, folded back (shift t is lag
  t plus lag t - n); a length with a large prime factor (5,956 = 4 x 1,489) would take pocketfft's
  slow Bluestein path.
* **Two ways to the mask sums.** With masks made of few runs of used sites (rod ends cut, a few
  gaps), only Sxy takes a transform: the other five are sums of the values, squares and counts of
  one rod over the other rod's runs moved by t, i.e. differences of its prefix sums, added for all
  shifts of the window at once (one vectorised pass per run and sum, :func:`_sums_from_runs`). The
  prefix sums are of values centred on the rod's mean, so their rounding stays at the size of the
  fluctuations, and the mean times N is added back. With many runs per rod all six sums are
  transforms. :func:`_use_runs` picks the cheaper by a cost estimate; both give the same sums up to
  rounding (the tests compare both with direct sums).
* **Only the window of shifts that the offsets reach** (``[tmin - max_lag, n - tmin + max_lag]``)
  is summed and read.

Pairs go in chunks of ``_CHUNK``: a chunk's cross spectra, inverse transforms and sums over the
window of shifts are made and read at once, while they are in cache, and added to one of two
accumulators, chunks of even rank in the processing order to the first, odd to the second. Two
threads take one accumulator each (one thread takes both), so the sums are the same bit for bit
whatever the threads and the block size (the rods of a block are split between the threads too).
The transforms are numpy.fft's (pocketfft, the same transforms as scipy.fft bit for bit) writing
into preallocated buffers; temporaries of a block are bounded by the caller's ``block_bytes``.
"""

from __future__ import annotations

from collections import deque
from types import SimpleNamespace

import numba
import numpy as np

from .. import runtime

__all__ = ['shift_null_sums', 'transform_length']

# memory of the cache of rod spectra (and prefix sums) that waits for the rods' later pairs
_CACHE_BYTES = 512 * 2**20

# cost of adding one run's prefix-sum difference at one shift (:func:`_sweep_run`) per cost of a
# pocketfft transform over n_fft sites divided by n_fft log2 n_fft (measured on the 2-CPU machine:
# about 0.38 ns, and 50 us a transform of 12,000 sites)
_SWEEP_PER_FFT_POINT = 0.38e-9 / (50e-6 / (12000 * np.log2(12000)))

# the six raw sums (N, Sx, Sy, Sxx, Syy, Sxy) as conj(spectrum u of rod i) x spectrum v of rod j,
# spectra 0 values, 1 squares, 2 mask; the run path transforms only the values (Sxy)
_ALL_SUMS = np.array([[2, 2], [0, 2], [2, 0], [1, 2], [2, 1], [0, 0]], dtype=np.int64)
_CROSS_ONLY = np.array([[0, 0]], dtype=np.int64)

# pairs transformed per call (their cross spectra and transforms stay in cache)
_CHUNK = 8


def transform_length(n_sites: int) -> int:
    """FFT length of the circular sums over ``n_sites`` sites: n itself when pocketfft factors it
    fast, else the first fast length of at least 2n (linear sums, folded back to circular ones)."""
    import scipy.fft

    n = int(n_sites)
    return n if scipy.fft.next_fast_len(n, real=True) == n else scipy.fft.next_fast_len(2 * n, real=True)


# ---------------------------------------------------------------------- per-rod data
@numba.njit(cache=True, nogil=True)
def mask_runs(m):
    """Runs of used sites of every rod.

    Parameters
    ----------
    m : (n_rods, n_sites) ndarray of bool

    Returns
    -------
    ptr : (n_rods + 1,) ndarray of int64
        Runs of rod r are ``ptr[r]:ptr[r + 1]``.
    lo, hi : (n_runs,) ndarray of int64, sites
        Each run is sites ``[lo, hi)``.
    """
    n_rods, n_sites = m.shape
    ptr = np.zeros(n_rods + 1, dtype=np.int64)
    for r in range(n_rods):
        c = 0
        prev = False
        for s in range(n_sites):
            u = m[r, s]
            if u and not prev:
                c += 1
            prev = u
        ptr[r + 1] = ptr[r] + c
    lo = np.empty(ptr[n_rods], dtype=np.int64)
    hi = np.empty(ptr[n_rods], dtype=np.int64)
    for r in range(n_rods):
        k = ptr[r]
        prev = False
        for s in range(n_sites):
            u = m[r, s]
            if u and not prev:
                lo[k] = s
            elif prev and not u:
                hi[k] = s
                k += 1
            prev = u
        if prev:
            hi[k] = n_sites
    return ptr, lo, hi


@numba.njit(cache=True, nogil=True)
def _rod_inputs(x, m, rods, vals, pre, cen, slots):
    """Transform inputs and prefix sums of rods.

    vals (k, n_spec, n_fft) receives the masked values of ``rods[q]`` (and, for n_spec = 3, their
    squares and the mask), zero-padded to n_fft. For a non-empty ``pre`` (n_slots, 5, n_sites + 1),
    ``pre[slots[q]]`` receives the prefix sums p_0..p_2 of the mask, of the values minus their mean
    and of the squares minus theirs (p[c, k] sums sites below k), then p_1 and p_2 reversed
    (p[3 + c, k] = p[1 + c, n_sites - k]); ``cen[slots[q]]`` the two means.
    """
    n_sites = x.shape[1]
    n_spec = vals.shape[1]
    prefix = pre.shape[0] > 0
    for q in range(len(rods)):
        r = rods[q]
        cnt = 0.0
        sa = 0.0
        sq = 0.0
        v = vals[q]
        for c in range(n_spec):
            for s in range(n_sites, v.shape[1]):
                v[c, s] = 0.0
        for s in range(n_sites):
            if m[r, s]:
                a = np.float64(x[r, s])
                v[0, s] = a
                cnt += 1.0
                sa += a
                sq += a * a
            else:
                v[0, s] = 0.0
        if n_spec == 3:
            for s in range(n_sites):
                v[1, s] = v[0, s] * v[0, s]
                v[2, s] = 1.0 if m[r, s] else 0.0
        if prefix:
            c = slots[q]
            cen[c, 0] = sa / cnt if cnt > 0 else 0.0
            cen[c, 1] = sq / cnt if cnt > 0 else 0.0
            _prefix_sums(v[0, :n_sites], m[r], cen[c, 0], cen[c, 1], pre[c])


@numba.njit(cache=True, nogil=True, inline="always")
def _prefix_sums(a, used, ca, cq, p):
    """p (5, n + 1): prefix sums of used, of (a - ca) and of (a^2 - cq) at used sites, then the
    last two reversed (:func:`_rod_inputs`)."""
    n = len(a)
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    p[0, 0] = 0.0
    p[1, 0] = 0.0
    p[2, 0] = 0.0
    for k in range(n):
        if used[k]:
            s0 += 1.0
            s1 += a[k] - ca
            s2 += a[k] * a[k] - cq
        p[0, k + 1] = s0
        p[1, k + 1] = s1
        p[2, k + 1] = s2
    for k in range(n + 1):
        p[3, k] = p[1, n - k]
        p[4, k] = p[2, n - k]


@numba.njit(cache=True, nogil=True)
def _store(stage, slots, spec):
    """spec[slots[q]] = stage[q]."""
    for q in range(len(slots)):
        for c in range(stage.shape[1]):
            for f in range(stage.shape[2]):
                spec[slots[q], c, f] = stage[q, c, f]


@numba.njit(cache=True, nogil=True)
def _cross_spectra(spec, si, sj, uv, out):
    """out[q * R + c] = conj(spec[si[q], uv[c, 0]]) * spec[sj[q], uv[c, 1]] for R = len(uv)."""
    n_rows = uv.shape[0]
    nf = spec.shape[2]
    for q in range(len(si)):
        for c in range(n_rows):
            a = spec[si[q], uv[c, 0]]
            b = spec[sj[q], uv[c, 1]]
            o = out[q * n_rows + c]
            for f in range(nf):
                o[f] = np.conj(a[f]) * b[f]


# ---------------------------------------------------------------------- sums over the window of shifts
@numba.njit(cache=True, nogil=True, inline="always")
def _fold(row, n_sites, t0, out):
    """out[u] = circular sum at shift t0 + u from a row of circular sums, or of linear ones over
    n_fft > n_sites sites (shift t: lag t plus lag t - n_sites, stored at n_fft - n_sites + t)."""
    off = row.shape[0] - n_sites
    if off == 0:
        for u in range(out.shape[0]):
            out[u] = row[t0 + u]
    else:
        for u in range(out.shape[0]):
            out[u] = row[t0 + u] + row[off + t0 + u]


@numba.njit(cache=True, nogil=True, inline="always")
def _diff_add(out, ph, pl, const):
    """out += (ph - pl) + const, element by element (slices: one vectorised loop)."""
    for u in range(len(out)):
        out[u] += (ph[u] - pl[u]) + const


@numba.njit(cache=True, nogil=True, inline="always")
def _sweep_run(out, p, bh, bl, n, tot):
    """out[u] += G(bh + u) - G(bl + u) for u < len(out), bh, bl in [0, 2n), one run's sum at each
    shift; G is the prefix sum p (length n + 1) continued periodically, ``G(k) = p[k - n] + tot``
    for k >= n. Three stretches of u: neither end wrapped, one, both."""
    w = len(out)
    sh = min(max(n - bh, 0), w)
    sl = min(max(n - bl, 0), w)
    a = min(sh, sl)
    b = max(sh, sl)
    _diff_add(out[:a], p[bh:bh + a], p[bl:bl + a], 0.0)
    if sh <= sl:
        _diff_add(out[a:b], p[bh - n + a:bh - n + b], p[bl + a:bl + b], tot)
    else:
        _diff_add(out[a:b], p[bh + a:bh + b], p[bl - n + a:bl - n + b], -tot)
    _diff_add(out[b:], p[bh - n + b:bh - n + w], p[bl - n + b:bl - n + w], 0.0)


@numba.njit(cache=True, nogil=True, inline="always")
def _sums_from_runs(n, t0, lo, hi, ki0, ki1, kj0, kj1, pre_i, pre_j, cen_i, cen_j, out):
    """N, Sx, Sy, Sxx, Syy of one pair at shifts t0 .. t0 + w - 1 into out[0:5] (each (w,)).

    At shift t, N, Sy and Syy sum rod j's prefix sums over rod i's runs ``[lo[k], hi[k])`` (k from
    ki0 to ki1) moved by +t; Sx and Sxx sum rod i's over rod j's runs (kj0 to kj1) moved by -t,
    i.e. its reversed prefix sums from ``n - hi + t`` to ``n - lo + t``. The prefix sums are of
    centred values (:func:`_rod_inputs`), so the means times N are added back.
    """
    for c in range(5):
        for u in range(out.shape[1]):
            out[c, u] = 0.0
    for k in range(ki0, ki1):
        for c in range(3):  # N, Sy, Syy into rows 0, 2, 4
            _sweep_run(out[2 * c], pre_j[c], hi[k] + t0, lo[k] + t0, n, pre_j[c, n])
    for k in range(kj0, kj1):
        for c in range(2):  # Sx, Sxx into rows 1, 3; the reversed sums run from -total to 0
            _sweep_run(out[1 + 2 * c], pre_i[3 + c], n - hi[k] + t0, n - lo[k] + t0, n, -pre_i[3 + c, 0])
    for u in range(out.shape[1]):
        nn = out[0, u]
        out[1, u] += cen_i[0] * nn
        out[2, u] += cen_j[0] * nn
        out[3, u] += cen_i[1] * nn
        out[4, u] += cen_j[1] * nn


@numba.njit(cache=True, nogil=True)
def _window_sums(raw, q, n, t0, runs, si, sj, ri, rj, ptr, lo, hi, pre, cen, win):
    """The six raw sums N, Sx, Sy, Sxx, Syy, Sxy of pair q of a chunk at shifts t0 .. t0 + w - 1
    into win (6, w).

    raw holds the chunk's inverse transforms: all six sums of pair q in rows 6q .. 6q + 5 (N rounded
    to an integer here), or, with ``runs``, Sxy alone in row q and the other five from the rods'
    runs (:func:`_sums_from_runs`; si, sj the slots of the pair's rods, ri, rj the rods).
    """
    if runs:
        _fold(raw[q], n, t0, win[5])
        _sums_from_runs(n, t0, lo, hi, ptr[ri[q]], ptr[ri[q] + 1], ptr[rj[q]], ptr[rj[q] + 1], pre[si[q]], pre[sj[q]],
                        cen[si[q]], cen[sj[q]], win)
    else:
        for c in range(6):
            _fold(raw[6 * q + c], n, t0, win[c])
        for u in range(win.shape[1]):
            win[0, u] = np.rint(win[0, u])


@numba.njit(cache=True, nogil=True, inline="always")
def _centred(nn, sx, sy, sxx, syy, sxy):
    """(cxy, cxx, cyy), the centred sums from the raw ones (cxx, cyy clipped at 0)."""
    if nn < 1.0:
        nn = 1.0
    cxy = sxy - sx * sy / nn
    cxx = sxx - sx * sx / nn
    cyy = syy - sy * sy / nn
    return cxy, (cxx if not cxx < 0.0 else 0.0), (cyy if not cyy < 0.0 else 0.0)


@numba.njit(cache=True, nogil=True)
def _chunk_null(raw, n, t0, runs, si, sj, ri, rj, ptr, lo, hi, pre, cen, shifts, lags, win, acc):
    """Add the centred sums of each pair of a chunk at its drawn shifts + lags to acc.

    Each pair's six raw sums over the window of shifts (:func:`_window_sums`, into the scratch win
    (6, w)) are read at ``(shift + lag) mod n`` (shifts (n_pairs, n_null) and lags in [0, n)); acc
    (n_null, n_lags, 3) is summed over the pairs in order.
    """
    for q in range(shifts.shape[0]):
        _window_sums(raw, q, n, t0, runs, si, sj, ri, rj, ptr, lo, hi, pre, cen, win)
        for r in range(shifts.shape[1]):
            s = shifts[q, r]
            for li in range(len(lags)):
                t = s + lags[li]
                u = (t - n if t >= n else t) - t0
                cxy, cxx, cyy = _centred(win[0, u], win[1, u], win[2, u], win[3, u], win[4, u], win[5, u])
                acc[r, li, 0] += cxy
                acc[r, li, 1] += cxx
                acc[r, li, 2] += cyy


# ---------------------------------------------------------------------- order and schedule
def _pair_order(i, j, n_rods: int) -> np.ndarray:
    """Processing order of the pairs: rods renumbered by reverse Cuthill-McKee on the neighbour
    graph (neighbours get nearby numbers), pairs sorted by their later rod, then their earlier one."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import reverse_cuthill_mckee

    g = coo_matrix((np.ones(len(i)), (i, j)), shape=(n_rods, n_rods)).tocsr()
    perm = reverse_cuthill_mckee((g + g.T).tocsr(), symmetric_mode=True)
    pos = np.empty(n_rods, dtype=np.int64)
    pos[perm] = np.arange(n_rods)
    a, b = pos[i], pos[j]
    return np.lexsort((np.minimum(a, b), np.maximum(a, b)))


def _schedule(i, j, order, n_rods: int, block: int, max_slots: int):
    """Blocks of ``block`` pairs in ``order`` and the cache slots of their rods.

    Returns ``(capacity, blocks)``: a rod keeps its slot from the first block that needs it to the
    last; ``capacity`` (at most ``max_slots``) slots suffice for the rods alive at once, and rods
    finding no free slot get one of the slots ``capacity, capacity + 1, ...`` for their block only.
    Each block is ``(pairs, new_rods, new_slots, slots_i, slots_j)``: the pairs' indices, the rods
    to transform first and their slots, and the slots of each pair's two rods.
    """
    p = len(order)
    n_blocks = -(-p // block)
    blk = np.arange(p) // block
    first = np.full(n_rods, n_blocks, dtype=np.int64)
    last = np.full(n_rods, -1, dtype=np.int64)
    for r in (i[order], j[order]):
        np.minimum.at(first, r, blk)
        np.maximum.at(last, r, blk)
    used = last >= 0
    alive = np.zeros(n_blocks + 1, dtype=np.int64)
    np.add.at(alive, first[used], 1)
    np.add.at(alive, last[used] + 1, -1)
    capacity = int(min(max_slots, np.cumsum(alive).max()))
    slot = np.full(n_rods, -1, dtype=np.int64)
    free = deque(range(capacity))
    blocks = []
    for b in range(n_blocks):
        sel = order[b * block:(b + 1) * block]
        bi, bj = i[sel], j[sel]
        rods = np.unique(np.concatenate([bi, bj]))
        new = rods[slot[rods] < 0]
        n_cached = min(len(new), len(free))
        new_slots = np.concatenate([np.array([free.popleft() for _ in range(n_cached)], dtype=np.int64),
                                    capacity + np.arange(len(new) - n_cached, dtype=np.int64)])
        slot[new] = new_slots
        blocks.append((sel, new, new_slots, slot[bi], slot[bj]))
        slot[new[n_cached:]] = -1
        dead = rods[(last[rods] == b) & (slot[rods] >= 0)]
        free.extend(slot[dead].tolist())
        slot[dead] = -1
    return capacity, blocks


def _use_runs(ptr, i, j, w: int, n_fft: int) -> bool:
    """Whether the mask sums from runs (:func:`_sums_from_runs`: per pair, the runs of rod i swept
    over w shifts three times and those of rod j twice) cost less than five more inverse
    transforms per pair and two more forward ones per rod, over n_fft sites."""
    runs = np.diff(ptr).astype(float)
    sweep = float(np.sum(3.0 * runs[i] + 2.0 * runs[j])) * w * _SWEEP_PER_FFT_POINT
    transforms = 5.0 * len(i) + 2.0 * len(np.unique(np.concatenate([i, j])))
    return sweep < transforms * n_fft * np.log2(max(n_fft, 2))


# ---------------------------------------------------------------------- the null
def shift_null_sums(x, m, i, j, lags, shifts, threads: int = 1, block_bytes: int = 32 * 2**20,
                    method: str | None = None) -> np.ndarray:
    """Centred circular sums of every null replicate, summed over neighbour pairs.

    Parameters
    ----------
    x : (n_rods, n_sites) ndarray of float32, float64 or uint8
        Values; read only where ``m`` is set (in float64).
    m : (n_rods, n_sites) ndarray of bool
        Sites used.
    i, j : (n_pairs,) ndarray of int
        First and second rod of each pair.
    lags : (n_lags,) ndarray of int, sites
    shifts : (n_pairs, n_null) ndarray of int, sites
        Circular offset of the second rod of each pair in each replicate.
    threads : int
        Threads of the compiled loops and transforms (results do not depend on it).
    block_bytes : int, bytes
        Bound of the temporaries of one block of pairs (results do not depend on it).
    method : {None, 'runs', 'transforms'}
        How N, Sx, Sy, Sxx and Syy are found; None picks the cheaper (:func:`_use_runs`).

    Returns
    -------
    (n_null, n_lags, 3) ndarray of float
        For replicate r and lag d, summed over pairs: the centred cross sum and the two centred
        sums of squares (each clipped at 0) of site s of rod i against site
        ``(s + shifts[pair, r] + d) mod n_sites`` of rod j, over sites used in both.
    """
    n_rods, n = x.shape
    i = np.ascontiguousarray(i, dtype=np.int64)
    j = np.ascontiguousarray(j, dtype=np.int64)
    lags = np.asarray(lags, dtype=np.int64)
    n_null = shifts.shape[1]
    acc = np.zeros((n_null, len(lags), 3))
    if not len(i) or not n_null or not n:
        return acc
    n_fft = transform_length(n)
    nf = n_fft // 2 + 1
    if shifts.min() < 0 or shifts.max() >= n:
        shifts = shifts % n
    t0, w = _window(shifts, lags, n)
    lags = np.ascontiguousarray(lags % n)
    ptr, lo, hi = mask_runs(m)
    runs = _use_runs(ptr, i, j, w, n_fft) if method is None else method == "runs"
    uv, n_spec = (_CROSS_ONLY, 1) if runs else (_ALL_SUMS, 3)
    rows = len(uv)
    # pairs per block: the transform inputs and spectra of up to two new rods per pair within
    # block_bytes, in an even number of chunks (so that chunk ranks, and sums, do not depend on it)
    per_pair = 2 * n_spec * (8 * n_fft + 16 * nf)
    block = 2 * _CHUNK * int(max(1, min(256, block_bytes // (2 * _CHUNK * per_pair))))
    slot_bytes = 16 * n_spec * nf + (40 * (n + 1) + 16 if runs else 0)
    capacity, blocks = _schedule(i, j, _pair_order(i, j, n_rods), n_rods, block, max(1, _CACHE_BYTES // slot_bytes))
    n_slots = capacity + max(len(b[1]) - int(np.sum(b[2] < capacity)) for b in blocks)
    spec = np.empty((n_slots, n_spec, nf), dtype=np.complex128)
    pre = np.empty((n_slots, 5, n + 1) if runs else (0, 5, 1))
    cen = np.empty((n_slots, 2))
    vals = np.empty((min(2 * block, n_rods), n_spec, n_fft))
    stage = np.empty((len(vals), n_spec, nf), dtype=np.complex128)
    # two accumulators, for the chunks of even and odd rank in the processing order: one thread
    # each, or one thread for both, with the same sums
    parts = [(np.empty((_CHUNK * rows, nf), dtype=np.complex128), np.empty((_CHUNK * rows, n_fft)),
              np.empty((6, w)), np.zeros_like(acc)) for _ in range(2)]
    ctx = SimpleNamespace(x=x, m=m, n=n, n_fft=n_fft, t0=t0, lags=lags, runs=runs, uv=uv, ptr=ptr, lo=lo, hi=hi,
                          spec=spec, pre=pre, cen=cen, vals=vals, stage=stage, parts=parts, threads=threads)
    for sel, new, new_slots, si, sj in blocks:
        _null_block(ctx, new, new_slots, si, sj, i[sel], j[sel], shifts[sel])
    return np.add(parts[0][3], parts[1][3], out=acc)


def _null_block(c, new, new_slots, si, sj, ri, rj, sh) -> None:
    """One block of :func:`shift_null_sums`: transform the rods ``new`` into their cache slots, then
    add the null sums of the block's pairs (rods ri, rj in slots si, sj; shifts sh) to the two
    accumulators of ``c.parts``, chunks of even rank to the first, odd to the second."""
    rows = len(c.uv)

    def rods(a, b):
        _rod_inputs(c.x, c.m, new[a:b], c.vals[a:b], c.pre, c.cen, new_slots[a:b])
        np.fft.rfft(c.vals[a:b], axis=2, out=c.stage[a:b])
        _store(c.stage[a:b], new_slots[a:b], c.spec)

    def pairs(part):
        cross, raw, win, acc = c.parts[part]
        for c0 in range(part * _CHUNK, len(si), 2 * _CHUNK):
            c1 = min(len(si), c0 + _CHUNK)
            _cross_spectra(c.spec, si[c0:c1], sj[c0:c1], c.uv, cross)
            np.fft.irfft(cross[:(c1 - c0) * rows], n=c.n_fft, axis=1, out=raw[:(c1 - c0) * rows])
            _chunk_null(raw, c.n, c.t0, c.runs, si[c0:c1], sj[c0:c1], ri[c0:c1], rj[c0:c1], c.ptr, c.lo, c.hi,
                        c.pre, c.cen, sh[c0:c1], c.lags, win, acc)

    if len(new):
        runtime.in_parts(rods, len(new), c.threads)
    runtime.in_parts(lambda a, b: [pairs(part) for part in range(a, b)], 2, c.threads)


def _window(shifts, lags, n_sites: int):
    """``(t0, w)``: shifts t0 .. t0 + w - 1 hold every ``(shift + lag) mod n_sites`` for shifts in
    [0, n_sites) (all n_sites shifts when some wrap)."""
    lo = int(shifts.min()) + int(lags.min())
    hi = int(shifts.max()) + int(lags.max())
    return (lo, hi - lo + 1) if lo >= 0 and hi < n_sites else (0, n_sites)
