"""The specimen's outline at each depth: centre and radius per depth slab of the metal ions (the
needle widens with depth), used to keep rods and sites inside the specimen and to tell the rods at
its edge from those inside.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .quantiles import linear_quantile

__all__ = ["OUTLINE_QUANTILE"]

#: quantile of the radial ion distance that estimates the outline radius (divided by its square root)
OUTLINE_QUANTILE = 0.98


def _outline(x, y, z, slab_nm, min_per_slab=300, min_ions=50):
    """Outline (centre, radius) per depth slab; slabs with fewer than ``min_ions`` ions are left
    out (a sample read as depth blocks leaves gaps), the outline is interpolated across them."""
    zmin, zmax = float(z.min()), float(z.max())
    n = int(max(1, min(math.ceil((zmax - zmin) / slab_nm), z.size // min_per_slab)))
    edges = np.linspace(zmin, zmax + 1e-9, n + 1)
    slab = np.clip(np.searchsorted(edges, z, side="right") - 1, 0, n - 1)
    order = np.argsort(slab, kind="stable")
    bounds = np.searchsorted(slab[order], np.arange(n + 1))
    filled = np.flatnonzero(np.diff(bounds) >= min(min_ions, z.size))
    if filled.size == 0:
        filled = np.flatnonzero(np.diff(bounds) > 0)
    n = filled.size
    zc = np.empty(n)
    cen = np.empty((n, 2))
    rad = np.empty(n)
    _outline_kernel(np.ascontiguousarray(x, np.float64), np.ascontiguousarray(y, np.float64),
                    np.ascontiguousarray(z, np.float64), order.astype(np.int64), bounds.astype(np.int64),
                    filled.astype(np.int64), float(OUTLINE_QUANTILE), zc, cen, rad)
    if n >= 5:
        pad = np.pad(rad, 2, mode="edge")
        rad = np.median(np.lib.stride_tricks.sliding_window_view(pad, 5), axis=1)
        for a in range(2):
            pc = np.pad(cen[:, a], 2, mode="edge")
            cen[:, a] = np.median(np.lib.stride_tricks.sliding_window_view(pc, 5), axis=1)
    return zc, cen, rad


@numba.njit(cache=True, nogil=True)
def _outline_kernel(x, y, z, order, bounds, filled, oq, zc, cen, rad):
    """Per filled slab: centre from the 1st/99th percentiles of x and y, radius from the ``oq``
    quantile of the distance to it over sqrt(oq), depth the median z (numpy's definitions)."""
    for j in range(filled.size):
        jj = filled[j]
        a = bounds[jj]
        b = bounds[jj + 1]
        idx = order[a:b]
        xs = x[idx]
        ys = y[idx]
        cx = 0.5 * (linear_quantile(xs, 0.01) + linear_quantile(xs, 0.99))
        cy = 0.5 * (linear_quantile(ys, 0.01) + linear_quantile(ys, 0.99))
        r = np.empty(idx.size)
        for k in range(idx.size):
            r[k] = math.hypot(x[idx[k]] - cx, y[idx[k]] - cy)
        cen[j, 0] = cx
        cen[j, 1] = cy
        rad[j] = linear_quantile(r, oq) / math.sqrt(oq)
        zc[j] = linear_quantile(z[idx], 0.5)
