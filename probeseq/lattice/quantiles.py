"""Compiled order statistics on small arrays: the k-th smallest value and numpy's linear quantile.

Written out rather than taken from numba's ``np.partition``, whose compiled form took about 7 s to
build on first use (it brings numba's sort, unique and error-message formatting along); the values
are the same.
"""

from __future__ import annotations

import math

import numba

__all__ = ['select_kth', 'linear_quantile']


@numba.njit(cache=True, nogil=True)
def select_kth(a, k):
    """Reorder ``a`` in place so that ``a[k]`` is its k-th smallest value: Hoare's selection.

    Parameters
    ----------
    a : (n,) ndarray of float
        Finite values (any unit); reordered so that no value before ``a[k]`` is larger and none
        after it smaller.
    k : int
        0-based rank, 0 <= k < n.

    Notes
    -----
    The pivot is the median of the first, middle and last value of the part still searched; equal
    values are split between both sides, so many ties cost no more than distinct values.
    """
    lo = 0
    hi = a.size - 1
    while lo < hi:
        mid = (lo + hi) >> 1
        if a[mid] < a[lo]:
            a[mid], a[lo] = a[lo], a[mid]
        if a[hi] < a[lo]:
            a[hi], a[lo] = a[lo], a[hi]
        if a[hi] < a[mid]:
            a[hi], a[mid] = a[mid], a[hi]
        pivot = a[mid]
        i = lo
        j = hi
        while i <= j:
            while a[i] < pivot:
                i += 1
            while pivot < a[j]:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        # a[lo..j] <= pivot <= a[i..hi]; the values between equal the pivot
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            return


@numba.njit(cache=True, nogil=True)
def linear_quantile(a, q):
    """numpy's default (linear) quantile of a 1-D array: ``np.quantile(a, q)``, the same value.

    Parameters
    ----------
    a : (n,) ndarray of float
        Finite values, n >= 1 (any unit); reordered.
    q : float
        Quantile in [0, 1].

    Returns
    -------
    float
        The quantile, in the unit of ``a``.
    """
    n = a.size
    pos = q * (n - 1)
    lo = int(math.floor(pos))
    t = pos - lo
    select_kth(a, lo)
    lo_v = a[lo]
    hi_v = lo_v
    if lo + 1 < n:
        hi_v = a[lo + 1]
        for k in range(lo + 2, n):
            if a[k] < hi_v:
                hi_v = a[k]
    d = hi_v - lo_v
    # numpy's _lerp: a + (b - a) t, computed from the nearer end
    return hi_v - d * (1.0 - t) if t >= 0.5 else lo_v + d * t
