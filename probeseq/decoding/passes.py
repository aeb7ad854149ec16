"""Compiled single passes over the count array for the decoding stage's bookkeeping.

Outside the EM and the decode recursions (:mod:`probeseq.decoding.rodchain`), the decoding stage
reads the whole count array a few more times: to check it (:func:`count_totals`), to fit the
radial efficiency (:func:`rod_radial_sums`), for the per-rod whole counts of the efficiency terms
(:func:`rod_whole_counts`), for the distinct count vectors of the independent-sites model with a
per-rod efficiency (:func:`group_row_counts`), for the mean posteriors of the decoded runs
(:func:`run_posterior_sums`) and for the agreement of neighbouring rods' posteriors that decides
whether copies are looked for (:func:`pair_agreement`). Each is one pass here, rod by rod, with memory of one rod's
length per thread (no temporaries of the count array's size, no sort, no cast copy).

The kernels are serial and release the GIL; :func:`in_parts` runs them over parts of the rods
(or runs) on the kernels' threads. Results do not depend on the number of threads: every part
writes only its own rods' (runs') results, and whatever is summed over rods afterwards is summed
in rod order. Their sums are those of the numpy code they replace, bit for bit, where that code adds in a
fixed order: numpy reduces a contiguous float64 row by pairwise summation (fewer than 8 values
one after the other from ``-0.0``; up to 128 with 8 interleaved accumulators combined as
``((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))`` and the rest added after; longer ranges
split in two at half the length rounded down to a multiple of 8), and :func:`pairwise_sum` does
the same additions in the same order. Sums of whole counts are exact in any order.
"""

from __future__ import annotations

import math
import numba
import numpy as np

from .. import runtime

__all__ = ['in_parts', 'pairwise_stack', 'pairwise_sum', 'count_totals',
           'rod_radial_sums', 'rod_whole_counts', 'group_row_counts', 'run_posterior_sums', 'pair_agreement']

_EPS = 1e-9  # a value counts as the whole number below it when within this (split ions: model.split_counts)


_RUN_PART = 4096  # fewest runs per part of run_posterior_sums (rods: _ROD_PART)


_ROD_PART = 16  # fewest rods per part of the passes over rods


_MAX_TABLE = 1 << 24  # most cells of the tables of group_row_counts (128 MiB of int64)


def _mask_arg(mask) -> np.ndarray:
    """The mask as the kernels take it (read-only, C-ordered bool view; one compiled form)."""
    m = np.ascontiguousarray(mask, dtype=np.bool_).view()
    m.flags.writeable = False
    return m


def in_parts(kernel, n: int, *args, part: int = _ROD_PART) -> None:
    """Run ``kernel(lo, hi, *args)`` over consecutive parts of ``range(n)`` on the kernels' threads
    (:func:`probeseq.runtime.kernel_threads`), four parts per thread of at least ``part`` items
    (:func:`probeseq.runtime.in_parts`). The kernels here are serial and release the GIL (a
    ``parallel=True`` kernel does the same work but takes seconds longer to compile); each part
    writes only its own rows, so results do not depend on the number of threads."""
    runtime.in_parts(lambda lo, hi: kernel(lo, hi, *args), n, runtime.kernel_threads(), parts_per_thread=4,
                     min_items=part)


@numba.njit(cache=True, nogil=True, inline="always")
def _block_sum(a, lo, n):
    """numpy's pairwise sum of at most 128 values (its leaves)."""
    if n < 8:
        res = -0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0, r1, r2, r3 = a[lo], a[lo + 1], a[lo + 2], a[lo + 3]
    r4, r5, r6, r7 = a[lo + 4], a[lo + 5], a[lo + 6], a[lo + 7]
    i = 8
    stop = n - n % 8
    while i < stop:
        b = lo + i
        r0 += a[b]
        r1 += a[b + 1]
        r2 += a[b + 2]
        r3 += a[b + 3]
        r4 += a[b + 4]
        r5 += a[b + 5]
        r6 += a[b + 6]
        r7 += a[b + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < n:
        res += a[lo + i]
        i += 1
    return res


@numba.njit(cache=True, nogil=True)
def pairwise_stack():
    """Scratch space of :func:`pairwise_sum`: ``(ranges, values)``, (64, 3) int64 and (64,) float64.

    One per thread, made once and passed to every call (an allocation per call would cost more
    than a short sum)."""
    return np.empty((64, 3), dtype=np.int64), np.empty(64)


@numba.njit(cache=True, nogil=True)
def pairwise_sum(a, lo, n, ranges, values):
    """Sum of ``a[lo:lo + n]`` (float64) in numpy's pairwise order (module docstring).

    The halves of every range longer than 128 are summed first and then added, as numpy's
    recursion does; here by an explicit stack of ranges (depth below 64).

    Parameters
    ----------
    a : (m,) ndarray of float64
    lo, n : int
        First index and number of values (``lo + n <= m``).
    ranges : (64, 3) ndarray of int64
    values : (64,) ndarray of float64
        Scratch space (:func:`pairwise_stack`), overwritten.

    Returns
    -------
    float
        Bit for bit numpy's ``a[lo:lo + n].sum()`` (0.0 for ``n = 0``).
    """
    if n == 0:
        return 0.0
    if n <= 128:
        return _block_sum(a, lo, n)
    sp, vp = 1, 0
    ranges[0, 0], ranges[0, 1], ranges[0, 2] = lo, n, 0  # first index, length, halves done
    while sp:
        top = sp - 1
        m = ranges[top, 1]
        if m <= 128:
            values[vp] = _block_sum(a, ranges[top, 0], m)
            vp += 1
            sp -= 1
            continue
        n2 = m // 2
        n2 -= n2 % 8
        st = ranges[top, 2]
        ranges[top, 2] = st + 1
        if st == 0:
            ranges[sp, 0], ranges[sp, 1], ranges[sp, 2] = ranges[top, 0], n2, 0
            sp += 1
        elif st == 1:
            ranges[sp, 0], ranges[sp, 1], ranges[sp, 2] = ranges[top, 0] + n2, m - n2, 0
            sp += 1
        else:
            values[vp - 2] = values[vp - 2] + values[vp - 1]
            vp -= 1
            sp -= 1
    return values[0]


@numba.njit(cache=True, nogil=True, inline="always")
def _retry_nan(res, slope, d_next, f0, f1):
    """``numpy.interp``'s second try when ``slope (x - xp[j]) + fp[j]`` is nan: from the next node
    (``d_next = x - xp[j + 1]``), else ``fp[j]`` when both nodes hold the same value."""
    if math.isnan(res):
        res = slope * d_next + f1
        if math.isnan(res) and f0 == f1:
            res = f0
    return res


@numba.njit(cache=True, nogil=True)
def _totals_kernel(lo, hi, counts, mask, per_rod, flags):
    """Rods ``lo:hi`` of :func:`count_totals`: per-channel sums and bad-value flags (1 non-finite, 2 negative)."""
    n_sites, k = counts.shape[1], counts.shape[2]
    for r in range(lo, hi):
        f = 0
        for t in range(n_sites):
            if not mask[r, t]:
                continue
            for j in range(k):
                v = float(counts[r, t, j])
                if not math.isfinite(v):
                    f |= 1
                elif v < 0.0:
                    f |= 2
                else:
                    per_rod[r, j] += v
        flags[r] = f


def count_totals(counts, mask):
    """Counts per metal channel over the observed sites, and whether any of them is bad.

    Parameters
    ----------
    counts : (n_rods, n_sites, K) ndarray of float32 or float64, counts per site
    mask : (n_rods, n_sites) ndarray of bool
        True at observed sites; the others are not read.

    Returns
    -------
    per_metal : (K,) ndarray of float64
        Sum of the finite non-negative counts of the observed sites per channel (each rod's in
        site order, then the rods in order: exact for whole counts).
    non_finite, negative : bool
        Whether an observed site holds a non-finite, a negative count.
    """
    n_rods, _, k = counts.shape
    per_rod = np.zeros((n_rods, k))
    flags = np.zeros(n_rods, dtype=np.uint8)
    in_parts(_totals_kernel, n_rods, counts, _mask_arg(mask), per_rod, flags)
    return per_rod.sum(axis=0), bool((flags & 1).any()), bool((flags & 2).any())


@numba.njit(cache=True, nogil=True)
def _site_totals(counts, mask, r, y_b, c_b, ranges, values):
    """Total count of every observed site of rod r into ``y_b`` (numpy's pairwise order)."""
    for t in range(counts.shape[1]):
        if mask[r, t]:
            for j in range(counts.shape[2]):
                c_b[j] = float(counts[r, t, j])
            y_b[t] = pairwise_sum(c_b, 0, counts.shape[2], ranges, values)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _radial_kernel(lo, hi, counts, mask, site_z, offset, z_ref, xy, tilt, oz, outline, slopes, out):
    """Rods ``lo:hi`` of :func:`rod_radial_sums` (``outline``: (3, m) radius, centre x, centre y at ``oz``)."""
    n_sites, k, m = counts.shape[1], counts.shape[2], oz.size
    rad, cx, cy = outline[0], outline[1], outline[2]
    s_rad, s_cx, s_cy = slopes[0], slopes[1], slopes[2]
    tx, ty = tilt[0], tilt[1]
    rho_b, x_b, xx_b, y_b, xy_b = np.empty(n_sites), np.empty(n_sites), np.empty(n_sites), np.empty(n_sites), \
        np.empty(n_sites)  # every site written for every rod: 0 where unobserved
    c_b = np.empty(k)
    ranges, values = pairwise_stack()
    for r in range(lo, hi):
        x0, y0, off = xy[r, 0], xy[r, 1], offset[r]
        if k >= 8:
            _site_totals(counts, mask, r, y_b, c_b, ranges, values)
        n, j = 0, 0
        for t in range(n_sites):
            if not mask[r, t]:
                rho_b[t] = x_b[t] = xx_b[t] = y_b[t] = xy_b[t] = 0.0
                continue
            n += 1
            z = site_z[t] + off
            dz = z - z_ref
            # numpy.interp of the outline at z, written out (no array passed per site): node j is
            # the last depth at or below z, walked to from the previous site's
            if m > 1 and not z < oz[0] and z < oz[m - 1] and not math.isnan(z):
                j = min(max(j, 0), m - 2)
                while j < m - 2 and oz[j + 1] <= z:
                    j += 1
                while j > 0 and oz[j] > z:
                    j -= 1
                if oz[j] == z:
                    o_r, o_x, o_y = rad[j], cx[j], cy[j]
                else:
                    d, d1 = z - oz[j], z - oz[j + 1]
                    o_r = _retry_nan(s_rad[j] * d + rad[j], s_rad[j], d1, rad[j], rad[j + 1])
                    o_x = _retry_nan(s_cx[j] * d + cx[j], s_cx[j], d1, cx[j], cx[j + 1])
                    o_y = _retry_nan(s_cy[j] * d + cy[j], s_cy[j], d1, cy[j], cy[j + 1])
            elif math.isnan(z):
                o_r = o_x = o_y = z
            elif m > 1 and z < oz[0]:
                o_r, o_x, o_y = rad[0], cx[0], cy[0]
            else:  # at or beyond the last depth, or a single one
                o_r, o_x, o_y = rad[m - 1], cx[m - 1], cy[m - 1]
            if m == 1:  # one centre and radius: the numpy code's own expression order
                rho = math.hypot((x0 - o_x) + tx * dz, (y0 - o_y) + ty * dz) / o_r
            else:
                rho = math.hypot((x0 + tx * dz) - o_x, (y0 + ty * dz) - o_y) / o_r
            if k < 8:  # numpy's order for fewer than 8 channels
                y = -0.0
                for i in range(k):
                    y += float(counts[r, t, i])
            else:
                y = y_b[t]
            x = rho * rho
            rho_b[t] = rho
            x_b[t] = x
            xx_b[t] = x * x
            y_b[t] = y
            xy_b[t] = x * y
        out[r, 0] = n
        out[r, 1] = pairwise_sum(rho_b, 0, n_sites, ranges, values)
        out[r, 2] = pairwise_sum(x_b, 0, n_sites, ranges, values)
        out[r, 3] = pairwise_sum(xx_b, 0, n_sites, ranges, values)
        out[r, 4] = pairwise_sum(y_b, 0, n_sites, ranges, values)
        out[r, 5] = pairwise_sum(xy_b, 0, n_sites, ranges, values)


def rod_radial_sums(counts, mask, site_z, offset, z_ref, rod_xy, tilt, outline) -> np.ndarray:
    """Per rod: observed sites and the sums over them of ``rho_n``, ``x = rho_n^2``, ``x^2``, the
    site total count ``y`` and ``x y`` (the radial efficiency fit,
    :mod:`probeseq.decoding.efficiency`).

    ``rho_n`` is the distance of the rod's axis at the site's depth from the outline centre there,
    over the outline radius there (``numpy.interp`` in depth; one centre and radius for a
    one-entry outline). The sums are those of numpy's row sums over every site of the rod with
    0 at unobserved sites, bit for bit.

    Parameters
    ----------
    counts : (n_rods, n_sites, K) ndarray of float32 or float64, counts per site
    mask : (n_rods, n_sites) ndarray of bool
    site_z : (n_sites,) ndarray of float64, nm
    offset : (n_rods,) ndarray of float64, nm
        Depth offset of every rod's sites.
    z_ref : float, nm
        Depth of ``rod_xy``.
    rod_xy : (n_rods, 2) ndarray of float64, nm
    tilt : (2,) ndarray of float64
        Rod axis direction (dx/dz, dy/dz).
    outline : tuple of ndarray
        ``(z, radius, centre)``: (m,) ascending depths (nm), (m,) radii (nm), (m, 2) centres (nm).

    Returns
    -------
    (n_rods, 6) ndarray of float64
    """
    oz = np.ascontiguousarray(outline[0], dtype=np.float64)
    ocen = np.asarray(outline[2], dtype=np.float64)
    vals = np.ascontiguousarray(np.stack([outline[1], ocen[:, 0], ocen[:, 1]]), dtype=np.float64)  # radius, x, y
    with np.errstate(divide="ignore", invalid="ignore"):  # repeated depths: numpy.interp's slopes too
        slopes = (vals[:, 1:] - vals[:, :-1]) / (oz[1:] - oz[:-1])
    out = np.zeros((counts.shape[0], 6))
    f64 = (np.ascontiguousarray(a, dtype=np.float64) for a in (site_z, offset, rod_xy, tilt))
    site_z, offset, rod_xy, tilt = f64
    in_parts(_radial_kernel, counts.shape[0], counts, _mask_arg(mask), site_z, offset, float(z_ref), rod_xy, tilt,
             oz, vals, slopes, out)
    return out


@numba.njit(cache=True, nogil=True)
def _whole_kernel(lo, hi, counts, mask, n_obs, whole):
    """Rods ``lo:hi`` of :func:`rod_whole_counts`."""
    n_sites, k = counts.shape[1], counts.shape[2]
    for r in range(lo, hi):
        n = 0
        s = 0.0
        for t in range(n_sites):
            if not mask[r, t]:
                continue
            n += 1
            for j in range(k):
                s += math.floor(float(counts[r, t, j]) + _EPS)
        n_obs[r] = n
        whole[r] = s


def rod_whole_counts(counts, mask):
    """Observed sites and whole counts (integer parts, all channels) of every rod.

    Parameters
    ----------
    counts : (n_rods, n_sites, K) ndarray of float32 or float64, counts per site
    mask : (n_rods, n_sites) ndarray of bool

    Returns
    -------
    n_obs : (n_rods,) ndarray of int64
    whole : (n_rods,) ndarray of float64
        Sum of ``floor(x + 1e-9)`` over the rod's observed sites and channels (whole numbers:
        exact in any order).
    """
    n_obs = np.zeros(counts.shape[0], dtype=np.int64)
    whole = np.zeros(counts.shape[0])
    in_parts(_whole_kernel, counts.shape[0], counts, _mask_arg(mask), n_obs, whole)
    return n_obs, whole


@numba.njit(cache=True, nogil=True)
def _group_rows_kernel(lo, hi, counts, mask, lut, base, hist, bad):
    """Rods ``lo:hi`` of :func:`group_row_counts`: sites per count vector, ``bad`` where one is unknown."""
    n_sites, k = counts.shape[1], counts.shape[2]
    for r in range(lo, hi):
        for t in range(n_sites):
            if not mask[r, t]:
                continue
            key = 0
            for j in range(k):
                v = float(counts[r, t, j])
                if not (v >= 0.0 and v < base and v == math.floor(v)):
                    key = -1
                    break
                key = key * base + int(v)
            ix = lut[key] if key >= 0 else -1
            if ix < 0:
                bad[r] = True
                break
            hist[r, ix] += 1


def group_row_counts(counts, mask, row_group, rows, n_groups: int):
    """Observed sites of every (count vector, group) pair, given the distinct whole count vectors.

    Each rod's sites are counted per vector (blocks of rods, at most ``_MAX_TABLE`` cells of
    per-rod counts at a time), then added to the rod's group.

    Parameters
    ----------
    counts : (n_rows, n_sites, K) ndarray of float32 or float64, counts per site
    mask : (n_rows, n_sites) ndarray of bool
    row_group : (n_rows,) ndarray of int
        Group (in ``0 .. n_groups - 1``) of every row.
    rows : (U, K) ndarray of float
        Distinct count vectors, which should include every observed site's.
    n_groups : int

    Returns
    -------
    table : (U, n_groups) ndarray of int64, or None
        Observed sites with each of ``rows[order]`` in each group (whole numbers: exact). None
        when ``rows`` are not non-negative whole numbers, their table would exceed
        ``_MAX_TABLE`` cells, or a site's counts are not among them.
    order : (U,) ndarray of int64
        The lexicographic order of ``rows`` (first channel first) that ``table`` follows.
    """
    rows = np.asarray(rows, dtype=np.float64)
    u, k = rows.shape
    order = np.arange(u)
    if not (u and k and np.all(rows >= 0) and np.array_equal(rows, np.floor(rows)) and rows.max() < 2 ** 15):
        return None, order
    base = int(rows.max()) + 1
    if base ** k > _MAX_TABLE or u * n_groups > _MAX_TABLE:
        return None, order
    keys = rows.astype(np.int64) @ (base ** np.arange(k - 1, -1, -1, dtype=np.int64))
    order = np.argsort(keys, kind="stable")  # lexicographic, the first channel most significant
    lut = np.full(base ** k, -1, dtype=np.int64)
    lut[keys[order]] = np.arange(u)
    table = np.zeros((n_groups, u), dtype=np.int64)
    group = np.asarray(row_group, dtype=np.int64)
    m = _mask_arg(mask)
    block = max(1, _MAX_TABLE // u)
    for b0 in range(0, counts.shape[0], block):
        hist = np.zeros((min(block, counts.shape[0] - b0), u), dtype=np.int64)
        bad = np.zeros(hist.shape[0], dtype=np.bool_)
        in_parts(_group_rows_kernel, hist.shape[0], counts[b0:b0 + block], m[b0:b0 + block], lut, base, hist, bad)
        if bad.any():
            return None, order
        np.add.at(table, group[b0:b0 + block], hist)
    return np.ascontiguousarray(table.T), order


@numba.njit(cache=True, nogil=True)
def _run_sums_kernel(lo_run, hi_run, p, post, rod, start, out, bad):
    """Runs ``lo_run:hi_run`` of :func:`run_posterior_sums`; ``bad`` where a path index is K or more."""
    n_rods, n_sites = p.shape
    k = post.shape[2]
    n = rod.size
    total = n_rods * n_sites
    buf = np.empty(64)
    ranges, values = pairwise_stack()
    for q in range(lo_run, hi_run):
        lo = rod[q] * n_sites + start[q]
        hi = total if q + 1 == n else rod[q + 1] * n_sites + start[q + 1]
        m = hi - lo
        if m > buf.size:
            buf = np.empty(max(m, 2 * buf.size))
        r, t = lo // n_sites, lo % n_sites
        for i in range(m):
            v = p[r, t]
            if v < 0:
                buf[i] = 0.0
            elif v >= k:
                bad[q] = True
                buf[i] = 0.0
            else:
                buf[i] = float(post[r, t, v])
            t += 1
            if t == n_sites:
                t = 0
                r += 1
        out[q] = buf[0] + pairwise_sum(buf, 1, m - 1, ranges, values) if m > 1 else buf[0]


def run_posterior_sums(paths, posteriors, rod, start):
    """Sum of the posterior of the path's metal from each run's first site to the next run's.

    What ``numpy.add.reduceat`` gives (bit for bit, float64) over the flattened per-site
    posterior of the path's metal (0 where the path is negative) at the runs' flat starts: the
    first value plus the pairwise sum of the others. Every observed site after a run's start and
    before the next run's start belongs to the run, the others hold 0, so this is the run's sum.

    Parameters
    ----------
    paths : (n_rods, n_sites) ndarray of signed int
        Metal per site, negative where masked.
    posteriors : (n_rods, n_sites, K) ndarray of float
    rod, start : (n_runs,) ndarray of int64
        Rod and first site of every run, in rod then site order.

    Returns
    -------
    (n_runs,) ndarray of float64

    Raises
    ------
    IndexError
        A path holds a metal index of K or more.
    """
    post = posteriors if posteriors.dtype in (np.float32, np.float64) else posteriors.astype(np.float64)
    out = np.zeros(rod.size)
    bad = np.zeros(rod.size, dtype=np.bool_)
    in_parts(_run_sums_kernel, rod.size, paths, post, np.ascontiguousarray(rod, dtype=np.int64),
             np.ascontiguousarray(start, dtype=np.int64), out, bad, part=_RUN_PART)
    if bad.any():
        raise IndexError(f"a decoded path holds a metal index beyond the {post.shape[2]} posteriors per site")
    return out


@numba.njit(cache=True, nogil=True)
def _pair_kernel(lo, hi, post, mask, nb, agree, n_both):
    """Pairs ``lo:hi`` of :func:`pair_agreement`."""
    n_sites = post.shape[1]
    k = post.shape[2]
    for q in range(lo, hi):
        i = nb[q, 0]
        j = nb[q, 1]
        s = 0.0
        n = 0
        for t in range(n_sites):
            if mask[i, t] and mask[j, t]:
                a = 0.0
                for c in range(k):
                    a += np.float64(post[i, t, c]) * np.float64(post[j, t, c])
                s += a
                n += 1
        agree[q] = s
        n_both[q] = n


@numba.njit(cache=True, nogil=True)
def _posterior_sum_kernel(lo, hi, post, mask, out):
    """Rods ``lo:hi`` of :func:`pair_agreement`'s mean posterior: per rod, the sum over its observed
    sites."""
    n_sites = post.shape[1]
    k = post.shape[2]
    for r in range(lo, hi):
        for t in range(n_sites):
            if mask[r, t]:
                for c in range(k):
                    out[r, c] += np.float64(post[r, t, c])


def pair_agreement(posteriors, mask, pairs):
    """Agreement of the posteriors of pairs of rods, and the mean posterior, in one pass each.

    Parameters
    ----------
    posteriors : (n_rods, n_sites, K) ndarray of float32 or float64
    mask : (n_rods, n_sites) array of bool
        Observed sites.
    pairs : (n_pairs, 2) array of int
        Rod indices of each pair.

    Returns
    -------
    agreement : (n_pairs,) ndarray of float64
        Mean over the sites both rods observe of ``sum_k P_i(k) P_j(k)`` (NaN where they share none).
    mean : (K,) ndarray of float64
        Mean posterior over all observed sites (rods summed in rod order).
    """
    post = posteriors if posteriors.dtype in (np.float32, np.float64) else posteriors.astype(np.float64)
    m = _mask_arg(mask)
    nb = np.ascontiguousarray(pairs, dtype=np.int64).reshape(-1, 2)
    agree = np.zeros(nb.shape[0])
    n_both = np.zeros(nb.shape[0], dtype=np.int64)
    in_parts(_pair_kernel, nb.shape[0], post, m, nb, agree, n_both)
    per_rod = np.zeros((post.shape[0], post.shape[2]))
    in_parts(_posterior_sum_kernel, post.shape[0], post, m, per_rod)
    mean = per_rod.sum(axis=0) / max(int(np.count_nonzero(m)), 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n_both > 0, agree / np.maximum(n_both, 1), np.nan), mean
