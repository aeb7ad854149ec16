"""The Fourier search of the registration: power spectrum, rotation and scale, tilt and offset.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numba
import numpy as np

from .locator import _rot
from .model import Lattice

_N_PHASE = 120_000  # ions for the per-slab Fourier coefficients (tilt, offset)


_FFT_MAX = 512  # largest FFT grid; the power spectrum uses the central window of that size


_SPECTRUM_SLABS = 12  # most depth slabs summed in the power spectrum (one 2-D FFT each)


def _f(v):
    """A number for JSON: a float, or None for NaN and infinities (:func:`probeseq.utils.marks.finite_or_none`)."""
    from ..utils.marks import finite_or_none

    return finite_or_none(v)


# ====================================================================== Fourier stage
def _reciprocal_set(lattice: Lattice, k_max: float, sigma0: float, max_n: int = 40):
    """Reciprocal vectors (h, k) of the lattice in one half plane, with model weights.

    Returns hk (m, 2) int, g (m, 2) lattice-frame reciprocal vectors (cycles/nm), S (m,) complex
    structure factors ``sum_b exp(-2 pi i (h u_b + k v_b))`` and weights (m,) (power, normalised).
    """
    C = lattice.cell_matrix
    B = np.linalg.inv(C).T  # columns: reciprocal basis, cycles/nm
    n = int(math.ceil(k_max / min(np.linalg.norm(B[:, 0]), np.linalg.norm(B[:, 1])) * 2)) + 1
    h, k = np.meshgrid(np.arange(-n, n + 1), np.arange(-n, n + 1), indexing="ij")
    hk = np.column_stack([h.ravel(), k.ravel()])
    hk = hk[(hk[:, 0] > 0) | ((hk[:, 0] == 0) & (hk[:, 1] > 0))]
    g = hk @ B.T
    kn = np.linalg.norm(g, axis=1)
    keep = kn <= k_max
    hk, g, kn = hk[keep], g[keep], kn[keep]
    S = np.exp(-2j * np.pi * (hk @ lattice.rods_frac.T)).sum(1)
    w = (np.abs(S) / lattice.rods_per_cell) ** 2 * np.exp(-4 * np.pi ** 2 * sigma0 ** 2 * kn ** 2)
    if not (w.size and w.max() > 0):  # no peak below k_max: empty arrays
        return hk[:0], g[:0], S[:0], w[:0]
    keep = w > 0.02 * w.max()
    hk, g, S, w = hk[keep], g[keep], S[keep], w[keep]
    order = np.argsort(-w)[:max_n]
    return hk[order], g[order], S[order], w[order] / w[order].sum()


@dataclass
class _Spectrum:
    power: np.ndarray  # (N, N//2+1) normalised, axis 0 fftshifted
    h: float
    N: int

    def sample(self, kx, ky):
        """Bilinear sample of the normalised power at (kx, ky) (cycles/nm)."""
        from scipy.ndimage import map_coordinates

        kx = np.asarray(kx, float)
        ky = np.asarray(ky, float)
        neg = ky < 0
        kx = np.where(neg, -kx, kx)
        ky = np.abs(ky)
        L = self.N * self.h
        i = kx * L + self.N // 2
        j = ky * L
        return map_coordinates(self.power, [i.ravel(), j.ravel()], order=1, mode="constant",
                               cval=0.0).reshape(kx.shape)


def _slab_edges(z, thickness, min_per_slab=200, max_slabs=1024):
    zmin, zmax = float(z.min()), float(z.max())
    depth = max(zmax - zmin, 1e-9)
    n = int(max(1, min(max_slabs, math.ceil(depth / thickness), z.size // min_per_slab)))
    return np.linspace(zmin, zmax + 1e-9, n + 1)


@functools.lru_cache(maxsize=8)
def _rings(N: int, h: float):
    """Rings of the ``N x (N//2 + 1)`` half-plane spectrum grid of pixel ``h`` (cached): the
    spatial frequency of each cell, its ring number ``floor(|k| N h)``, the cells in ring order and
    each ring's start in that order."""
    L = N * h
    kx = (np.arange(N) - N // 2) / L
    ky = np.arange(N // 2 + 1) / L
    kr = np.hypot(kx[:, None], ky[None, :])
    ring = np.floor(kr * L).astype(np.int64)
    by_ring = np.argsort(ring.ravel(), kind="stable")
    starts = np.searchsorted(ring.ravel()[by_ring], np.arange(ring.max() + 2))
    for a in (kr, ring, by_ring, starts):
        a.flags.writeable = False
    return kr, ring, by_ring, starts


def _power_spectrum(xr, yr, slab, n_slabs, h, N, max_slabs=_SPECTRUM_SLABS):
    """Summed slab power spectra, normalised by ring medians.

    At most ``max_slabs`` slabs enter (evenly spread over the populated ones): each slab's peaks
    stand above its own speckle by its number of ions, so more slabs only smooth the speckle,
    which ``max_slabs`` of them already do well, while each costs one 2-D FFT.
    """
    ix = np.floor(xr / h).astype(np.int64) + N // 2
    iy = np.floor(yr / h).astype(np.int64) + N // 2
    ok = (ix >= 0) & (ix < N) & (iy >= 0) & (iy < N)
    pix = ix * N + iy
    key = np.where(ok, slab, n_slabs)
    order = np.argsort(key, kind="stable")
    bounds = np.searchsorted(key[order], np.arange(n_slabs + 1))
    filled = np.flatnonzero(np.diff(bounds) >= 2)
    if filled.size > max_slabs:
        filled = filled[np.unique(np.rint(np.linspace(0, filled.size - 1, max_slabs)).astype(np.int64))]
    P = np.zeros((N, N // 2 + 1))
    for j in filled:
        sel = order[bounds[j]:bounds[j + 1]]
        H = np.bincount(pix[sel], minlength=N * N).reshape(N, N).astype(float)
        F = np.fft.rfft2(H)  # the DC term is zeroed after normalisation
        P += F.real ** 2 + F.imag ** 2
    P = np.fft.fftshift(P, axes=0)
    L = N * h
    kr, ring, by_ring, starts = _rings(int(N), float(h))
    flat_p = P.ravel()
    med = np.empty(starts.size - 1)
    for r in range(starts.size - 1):  # the lower median of each ring
        a, b = starts[r], starts[r + 1]
        if b > a:
            k = (b - a - 1) // 2
            med[r] = np.partition(flat_p[by_ring[a:b]], k)[k]
        else:
            med[r] = np.nan
    med = np.where(np.isfinite(med) & (med > 0), med, np.nanmax(med))
    Pn = P / med[ring]
    Pn[kr < 2.0 / L] = 0.0
    return _Spectrum(Pn, h, N)


def _search_rotation_scale(spec, g, w, period_deg, scale_range, rotation_deg, scale):
    """Grid search then Nelder-Mead of the weighted mean normalised power at the peaks."""
    from scipy.optimize import minimize

    def score(th_deg, s):
        R = _rot(math.radians(th_deg))
        kk = (g @ R.T) / s
        return float((spec.sample(kk[:, 0], kk[:, 1]) * w).sum())

    if rotation_deg is None:
        ths = np.arange(0.0, period_deg, 0.25)
    else:
        ths = np.array([float(rotation_deg)])
    if scale is None:
        lo, hi = scale_range
        ss = np.exp(np.arange(math.log(lo), math.log(hi) + 1e-9, 0.004))
    else:
        ss = np.array([float(scale)])
    vals = _score_grid(spec, g, w, ths, ss)
    i, j = np.unravel_index(np.argmax(vals), vals.shape)
    th0, s0 = float(ths[i]), float(ss[j])
    free = [rotation_deg is None, scale is None]
    if any(free):
        x0 = np.array([th0, math.log(s0)])[free]
        step = np.array([0.25, 0.004])[free]

        def neg(p):
            q = np.array([th0, math.log(s0)])
            q[free] = p
            return -score(q[0], math.exp(q[1]))

        res = minimize(neg, x0, method="Nelder-Mead",
                       options={"initial_simplex": np.vstack([x0, x0 + np.diag(step)]),
                                "xatol": 1e-3, "fatol": 1e-6, "maxiter": 200})
        if -res.fun >= vals[i, j]:
            q = np.array([th0, math.log(s0)])
            q[free] = res.x
            th0, s0 = float(q[0]), float(math.exp(q[1]))
    best = score(th0, s0)
    return th0 % period_deg if rotation_deg is None else th0, s0, best


def _score_grid(spec, g, w, ths, ss):
    """(len(ths), len(ss)) weighted mean normalised power at the peaks ``g`` (lattice frame,
    cycles/nm, weights ``w``) turned by each rotation ``ths`` (degrees) and divided by each scale ``ss``."""
    T, S = np.meshgrid(np.radians(ths), ss, indexing="ij")
    c, s_ = np.cos(T)[..., None], np.sin(T)[..., None]
    kx = (c * g[:, 0] - s_ * g[:, 1]) / S[..., None]
    ky = (s_ * g[:, 0] + c * g[:, 1]) / S[..., None]
    return (spec.sample(kx, ky) * w).sum(-1)


def _slab_coefficients(xr, yr, slab, n_slabs, hk, Bp):
    """(n_slabs, m) complex sums of exp(-2 pi i k.r) per slab for the peaks ``k = hk @ Bp.T``.

    ``hk`` (m, 2) are integer reciprocal-lattice indices and ``Bp`` (2, 2) the reconstruction-frame
    reciprocal basis (columns, cycles/nm): each ion's factor is a product of integer powers of two
    unit phasors, so only two sines and cosines are evaluated per ion (compiled loop).
    """
    hk = np.ascontiguousarray(hk, np.int64).reshape(-1, 2)
    out_re = np.zeros((n_slabs, hk.shape[0]))
    out_im = np.zeros((n_slabs, hk.shape[0]))
    if hk.shape[0]:
        _coef_kernel(np.ascontiguousarray(xr, np.float64), np.ascontiguousarray(yr, np.float64),
                     np.ascontiguousarray(slab, np.int64), hk, np.ascontiguousarray(Bp, np.float64), out_re, out_im)
    return out_re + 1j * out_im


@numba.njit(cache=True, nogil=True)
def _coef_kernel(xr, yr, slab, hk, Bp, out_re, out_im):
    m = hk.shape[0]
    # index ranges by plain loops: the array methods min/max brought 1.1 s of compiling
    h0 = h1 = hk[0, 0]
    k0 = k1 = hk[0, 1]
    for q in range(1, m):
        h0 = min(h0, hk[q, 0])
        h1 = max(h1, hk[q, 0])
        k0 = min(k0, hk[q, 1])
        k1 = max(k1, hk[q, 1])
    p1r = np.empty(h1 - h0 + 1)
    p1i = np.empty(h1 - h0 + 1)
    p2r = np.empty(k1 - k0 + 1)
    p2i = np.empty(k1 - k0 + 1)
    tau = -2.0 * np.pi
    for i in range(xr.size):
        a1 = tau * (Bp[0, 0] * xr[i] + Bp[1, 0] * yr[i])
        a2 = tau * (Bp[0, 1] * xr[i] + Bp[1, 1] * yr[i])
        c1 = math.cos(a1)
        s1 = math.sin(a1)
        c2 = math.cos(a2)
        s2 = math.sin(a2)
        # exp(i h a1) for h = h0..h1 and exp(i k a2) for k = k0..k1
        p1r[0] = math.cos(h0 * a1)
        p1i[0] = math.sin(h0 * a1)
        for q in range(1, h1 - h0 + 1):
            p1r[q] = p1r[q - 1] * c1 - p1i[q - 1] * s1
            p1i[q] = p1r[q - 1] * s1 + p1i[q - 1] * c1
        p2r[0] = math.cos(k0 * a2)
        p2i[0] = math.sin(k0 * a2)
        for q in range(1, k1 - k0 + 1):
            p2r[q] = p2r[q - 1] * c2 - p2i[q - 1] * s2
            p2i[q] = p2r[q - 1] * s2 + p2i[q - 1] * c2
        j = slab[i]
        for q in range(m):
            ar = p1r[hk[q, 0] - h0]
            ai = p1i[hk[q, 0] - h0]
            br = p2r[hk[q, 1] - k0]
            bi = p2i[hk[q, 1] - k0]
            out_re[j, q] += ar * br - ai * bi
            out_im[j, q] += ar * bi + ai * br


def _search_tilt(F, zc, K, max_tilt):
    """Tilt maximising the coherent power sum_m |sum_j F_jm exp(2 pi i K_m . t z_j)|^2.

    Coarse to fine in depth: the coherence peak in t is about 1 / (|K| D) wide for a depth range
    D, so a thin central range is searched first over the whole tilt range on a coarse grid, and
    the range is doubled at each level while the grid narrows around the previous best.
    """
    from scipy.optimize import minimize

    kmax = float(np.linalg.norm(K, axis=1).max())
    zmid = 0.5 * (float(zc.min()) + float(zc.max()))
    depth = max(float(zc.max() - zc.min()), 1e-6)

    F_re = np.ascontiguousarray(F.real, np.float64)
    F_im = np.ascontiguousarray(F.imag, np.float64)
    Kc = np.ascontiguousarray(K, np.float64)
    zcc = np.ascontiguousarray(zc, np.float64)
    filled = (np.abs(F) > 0).any(1)

    def powers(T, sel):
        idx = np.flatnonzero(np.asarray(sel) if np.asarray(sel).dtype == bool else np.isin(np.arange(zc.size), sel))
        idx = idx[filled[idx]].astype(np.int64)
        out = np.zeros(T.shape[0])
        _coherent_power(np.ascontiguousarray(T, np.float64), zcc, F_re, F_im, Kc, idx, out)
        return out

    d0 = min(depth, 5.0 / (max_tilt * kmax))
    centre = np.zeros(2)
    half = max_tilt
    d = d0
    while True:
        sel = np.abs(zc - zmid) <= 0.5 * d + 1e-9
        if sel.sum() < 2:
            sel = np.argsort(np.abs(zc - zmid))[:2]
        width = 0.25 / (kmax * d)
        g = np.arange(-half, half + width / 2, width)
        TX, TY = np.meshgrid(centre[0] + g, centre[1] + g, indexing="ij")
        T = np.column_stack([TX.ravel(), TY.ravel()])
        best, best_t = -1.0, centre
        for s0 in range(0, T.shape[0], 256):
            p = powers(T[s0:s0 + 256], sel)
            k = int(np.argmax(p))
            if p[k] > best:
                best, best_t = float(p[k]), T[s0 + k].copy()
        centre = best_t
        if d >= depth:
            break
        half = 3 * width
        d = min(2 * d, depth)
    sel_all = np.ones(zc.size, bool)
    res = minimize(lambda t: -float(powers(np.asarray(t)[None, :], sel_all)[0]), centre, method="Nelder-Mead",
                   options={"initial_simplex": np.vstack([centre, centre + [width / 2, 0], centre + [0, width / 2]]),
                            "xatol": 1e-7, "fatol": 1e-9, "maxiter": 300})
    return res.x if -res.fun >= best else centre


@numba.njit(cache=True, nogil=True)
def _coherent_power(T, zc, F_re, F_im, K, idx, out):
    """out[b] = sum_m |sum_{j in idx} F_jm exp(2 pi i z_j K_m . T_b)|^2."""
    tau = 2.0 * np.pi
    for b in range(T.shape[0]):
        tot = 0.0
        for q in range(K.shape[0]):
            w = tau * (K[q, 0] * T[b, 0] + K[q, 1] * T[b, 1])
            sr = 0.0
            si = 0.0
            for jj in range(idx.size):
                j = idx[jj]
                a = w * zc[j]
                c = math.cos(a)
                s_ = math.sin(a)
                sr += F_re[j, q] * c - F_im[j, q] * s_
                si += F_re[j, q] * s_ + F_im[j, q] * c
            tot += sr * sr + si * si
        out[b] = tot


def _search_offset(Fsum, S, w, hk, n=64):
    """Fractional offset maximising the model correlation Re sum w conj(S) F exp(2 pi i hk.f)."""
    t = np.arange(n) / n
    U, V = np.meshgrid(t, t, indexing="ij")
    coef = w * np.conj(S) * Fsum
    ph = 2 * np.pi * (U[..., None] * hk[:, 0] + V[..., None] * hk[:, 1])
    val = (coef * np.exp(1j * ph)).real.sum(-1)
    i, j = np.unravel_index(np.argmax(val), val.shape)
    # parabolic refinement on the periodic grid
    f = []
    for axis, idx in ((0, i), (1, j)):
        if axis == 0:
            a, b, c = val[(i - 1) % n, j], val[i, j], val[(i + 1) % n, j]
        else:
            a, b, c = val[i, (j - 1) % n], val[i, j], val[i, (j + 1) % n]
        den = a - 2 * b + c
        d = 0.5 * (a - c) / den if den < 0 else 0.0
        f.append((idx + d) / n)
    return np.array(f)
