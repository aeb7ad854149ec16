"""The validity checks of the fused count pass (non-finite rows, non-positive mass-to-charge,
extents) and the resident zeroed arrays it counts into; used by :mod:`probeseq.lattice.counting`.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ['zeroed_array']


def zeroed_array(shape, dtype=np.float64) -> np.ndarray:
    """A zeroed array whose pages are made resident up front.

    A large array is an anonymous memory map advised for transparent huge pages (2 MiB pages: one
    fault per 2 MiB instead of per 4 kiB) and made resident by a compiled loop writing one zero
    per 4 kiB page, which releases the GIL (``mmap.madvise`` and ``MAP_POPULATE`` hold it for the
    whole call, stalling every other thread of the process). On a virtual machine that costs a
    fraction of taking a page fault per 4 kiB page later, and page faults from two threads contend
    (measured here: 0.08 s for 512 MiB against 0.3 s with ``MAP_POPULATE`` on 4 kiB pages, when
    the memory was used before; first use of fresh memory is slower either way).
    ``np.zeros`` where memory maps are not available.
    """
    import mmap

    shape = tuple(int(v) for v in shape)
    dtype = np.dtype(dtype)
    nbytes = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
    if nbytes < (16 << 20):
        return np.zeros(shape, dtype)
    try:
        mm = mmap.mmap(-1, nbytes, flags=mmap.MAP_PRIVATE | mmap.MAP_ANONYMOUS)
    except (OSError, ValueError, AttributeError):
        return np.zeros(shape, dtype)
    if hasattr(mm, "madvise") and hasattr(mmap, "MADV_HUGEPAGE"):
        try:
            mm.madvise(mmap.MADV_HUGEPAGE)
        except (OSError, ValueError):
            pass
    a = np.frombuffer(mm, dtype)
    _touch_pages(a.view(np.uint8))
    return a.reshape(shape)


@numba.njit(cache=True, nogil=True)
def _touch_pages(b):
    # one write per 4 kiB page makes it resident (the pages are zero already)
    for i in range(0, b.size, 4096):
        b[i] = 0


@numba.njit(cache=True, nogil=True, fastmath={"nnan", "ninf", "nsz"})
def _check_kernel(x, y, z, m, xb, yb, zb, mb, expo, ext):
    """Invalid rows (a NaN or infinite value, or mass-to-charge <= 0) and the running min/max of
    x, y, z (file unit) and m, in one vectorisable pass. Validity is read from the bit patterns
    (``xb`` .. ``mb`` are the same arrays viewed as unsigned integers: a value is finite when its
    exponent bits ``expo`` are not all set; m > 0 when its pattern, as a signed integer, is
    positive and finite), so the fast-math flags of the min/max cannot touch it. The extents are
    only valid when no row is invalid (the caller then recomputes them row by row)."""
    bad = 0
    xmin = x[0]; xmax = x[0]; ymin = y[0]; ymax = y[0]; zmin = z[0]; zmax = z[0]; mmin = m[0]; mmax = m[0]
    for i in range(x.size):
        nonfin = ((xb[i] & expo) == expo) | ((yb[i] & expo) == expo) | ((zb[i] & expo) == expo) \
            | ((mb[i] & expo) == expo)
        sign = mb[i] >> (mb.itemsize * 8 - 1)  # 1 for a negative m (or -0)
        zero = (mb[i] << 1) == 0  # +0 or -0
        bad += nonfin | (sign == 1) | zero
        xmin = min(xmin, x[i]); xmax = max(xmax, x[i])
        ymin = min(ymin, y[i]); ymax = max(ymax, y[i])
        zmin = min(zmin, z[i]); zmax = max(zmax, z[i])
        mmin = min(mmin, m[i]); mmax = max(mmax, m[i])
    if bad == 0:
        ext[0] = min(ext[0], xmin); ext[1] = max(ext[1], xmax)
        ext[2] = min(ext[2], ymin); ext[3] = max(ext[3], ymax)
        ext[4] = min(ext[4], zmin); ext[5] = max(ext[5], zmax)
        ext[6] = min(ext[6], mmin); ext[7] = max(ext[7], mmax)
    return bad


_EXPO = {4: np.uint32(0x7F800000), 8: np.uint64(0x7FF0000000000000)}


_UINT = {4: np.uint32, 8: np.uint64}


@numba.njit(cache=True, nogil=True)
def _slow_check_kernel(x, y, z, m, row0, factor, tally, ext):
    """Row by row validity (non-finite, non-positive), first bad row and extents of the valid rows."""
    fac = x.dtype.type(factor)
    for i in range(x.size):
        xi = x[i] * fac if factor != 1.0 else x[i]
        yi = y[i] * fac if factor != 1.0 else y[i]
        zi = z[i] * fac if factor != 1.0 else z[i]
        mi = m[i]
        if not (np.isfinite(xi) and np.isfinite(yi) and np.isfinite(zi) and np.isfinite(mi)):
            tally[2] += 1
            if tally[9] < 0:
                tally[9] = row0 + i
            continue
        if not mi > 0:
            tally[3] += 1
            if tally[9] < 0:
                tally[9] = row0 + i
            continue
        tally[1] += 1
        ext[0] = min(ext[0], xi); ext[1] = max(ext[1], xi)
        ext[2] = min(ext[2], yi); ext[3] = max(ext[3], yi)
        ext[4] = min(ext[4], zi); ext[5] = max(ext[5], zi)
        ext[6] = min(ext[6], mi); ext[7] = max(ext[7], mi)


def _check_rows(sl, xs, ys, zs, ms, row0, factor) -> int:
    """Validity and extents of one block into slot ``sl``'s tallies; returns the invalid rows."""
    n = xs.shape[0]
    sl.tally[0] += n
    ui, um = _UINT[xs.dtype.itemsize], _UINT[ms.dtype.itemsize]
    if xs.dtype.itemsize == ms.dtype.itemsize:
        bad = _check_kernel(xs, ys, zs, ms, xs.view(ui), ys.view(ui), zs.view(ui), ms.view(um),
                            _EXPO[xs.dtype.itemsize], sl.ext_raw)
    else:
        bad = 1  # mixed float types: row by row
    if bad == 0:
        sl.tally[1] += n
    else:
        before = int(sl.tally[1])
        _slow_check_kernel(xs, ys, zs, ms, np.int64(row0), np.float64(factor), sl.tally, sl.ext)
        bad = n - (int(sl.tally[1]) - before)
    return bad


def _merge_checks(slots, factor, dtype):
    """Tally and extents of the validity checks of ``slots`` (fields n_rows .. n_nonpositive and
    first_bad_row; the rest stay 0)."""
    from .counting import new_tally

    tally, ext = new_tally()
    for sl in slots:
        tally[:4] += sl.tally[:4]
        raw = sl.ext_raw.copy()
        if factor != 1.0:  # scaled as the kernels scale (in the input's float type)
            dt = np.float32 if dtype == np.float32 else np.float64
            raw[:6] = np.where(np.isfinite(raw[:6]), raw[:6].astype(dt) * dt(factor), raw[:6])
        for e in (sl.ext, raw):
            ext[0::2] = np.minimum(ext[0::2], e[0::2])
            ext[1::2] = np.maximum(ext[1::2], e[1::2])
    rows = [int(sl.tally[9]) for sl in slots if sl.tally[9] >= 0]
    tally[9] = min(rows) if rows else -1
    return tally, ext


