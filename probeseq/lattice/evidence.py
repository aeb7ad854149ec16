"""Soft site evidence: what each metal-bearing ion says about the metal of its site, from its
mass-to-charge and its lateral distance to the rod axis.

The rod model (:mod:`probeseq.decoding.model`) reads a site's ions as the site's own ion (detected
with probability ``eta a_k``) plus extras (crosstalk, background, linker fragments) that arrive as a
Poisson process. Written per ion, with the own ion of a metal-k site landing in range r with
probability ``p_rk`` at a lateral position drawn from a two-dimensional Gaussian ``g`` of width
``sigma`` around the axis, and the extras of range r arriving at rate ``beta_r`` spread evenly over
the site's cell of area ``A``, the state-dependent factor of a site's likelihood is exactly::

    1 - eta a_k + eta sum_i p_{r_i k} A g(x_i) / beta_{r_i}
      = 1 - eta a_k + eta a_k E_k / mu_k,      E_k = sum_i u_{r_i k} rho(d_i),

with ``a_k = sum_r p_rk`` the share of metal k's ions inside its ranges, ``mu_k`` the extras of
metal k per site counted in its ranges, ``u_rk = lambda_k p_rk / beta_r`` the share of metal k
among the extras of range r (taken as the range's share of k from the spectrum fit) and
``rho(d) = A g(d)`` the radial likelihood ratio, which averages to 1 over the cell. So the count
pass adds ``u_rk rho(d)`` to the site's evidence ``E_k`` for every metal-bearing ion instead of
drawing one metal per ion, and an ion of a range shared with linker fragments, or far from the
axis, counts for as little as it says. Pure ranges have ``u = 1``; without the radial factor and
with pure ranges only, ``E`` is the count of ions.

Quantisation: ``rho`` takes :data:`N_LEVELS` values (per cell of the geometry's lookup grid) and
every increment ``u_rk rho`` is rounded to a multiple of 1/:data:`UNITS`, so that float32 sums
are exact (below ``2**24 / UNITS`` per site) and do not depend on the order of the additions, the
number of threads or the block size.

The lateral width ``sigma`` is fitted on the sample's ions of pure metal ranges: their squared
distance to the nearest axis is a mixture of the own ions' ``Exp(mean 2 sigma^2)`` (a 2-D Gaussian)
and the extras' distribution, uniform over the cell area (taken from the lookup grid), fitted by
EM (:func:`fit_lateral_spread`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ['EvidenceTable', 'LateralSpread', 'fit_lateral_spread', 'extras_shares', 'evidence_table', 'N_LEVELS',
           'UNITS']

#: levels of the radial likelihood ratio rho
N_LEVELS = 64

#: every evidence increment is a multiple of 1 / UNITS (exact float32 sums)
UNITS = 256

#: least and largest lateral width accepted, nm
SIGMA_BOUNDS_NM = (0.02, 1.0)


@dataclass(frozen=True)
class LateralSpread:
    """The lateral spread of the own ions around the rod axes.

    Attributes
    ----------
    sigma_nm : float, nm
        Width of the two-dimensional Gaussian of the own ions' lateral positions (per axis).
    own_share : float
        Share of the fitted ions that belong to the Gaussian (the rest are spread evenly).
    n_ions : int
        Ions the fit used.
    fitted : bool
        False when there were too few ions or no Gaussian could be told from the even part (then
        ``sigma_nm`` is the default and the evidence has no radial factor).
    """

    sigma_nm: float
    own_share: float
    n_ions: int
    fitted: bool

    def to_dict(self) -> dict:
        return {"sigma_nm": float(self.sigma_nm), "own_share": float(self.own_share), "n_ions": int(self.n_ions),
                "fitted": bool(self.fitted)}


def _grid_d2(locator) -> np.ndarray:
    """Squared distance (nm^2) from the centre of every cell of the locator's grid to its nearest
    rod axis, (n_grid * n_grid,), in the kernels' cell order (``i << bits | j``)."""
    from .locator import _brute_nearest

    G = int(locator.n_grid)
    c = (np.arange(G) + 0.5) / G
    u, v = np.meshgrid(c, c, indexing="ij")
    _, d2 = _brute_nearest(u.reshape(-1), v.reshape(-1), locator.code_frac, locator.metric)
    return np.asarray(d2, dtype=np.float64)


def _cell_d2(locator) -> np.ndarray:
    """Squared distances of the grid cells inside the assignment cutoff (an even sample of a cell)."""
    d2 = _grid_d2(locator)
    cut = float(locator.cutoff_nm) ** 2 if np.isfinite(locator.cutoff_nm) else np.inf
    return d2[d2 < cut]


def _even_density(locator):
    """The density of d^2 of points spread evenly over a rod's cell (a histogram from the grid):
    returns (bin edges, density)."""
    cell = _cell_d2(locator)
    edges = np.linspace(0.0, cell.max() * (1 + 1e-9), 41)
    h, _ = np.histogram(cell, bins=edges)
    return edges, h / (h.sum() * np.diff(edges))


def _even_at(edges, dens, d2):
    return np.maximum(dens[np.clip(np.searchsorted(edges, d2, side="right") - 1, 0, dens.size - 1)], 1e-12)


def _own_share(d2, s2, even, max_iter: int = 100) -> float:
    """EM for the share of the Gaussian (own-ion) part of a mixture with a fixed width."""
    g = np.exp(-d2 / (2 * s2)) / (2 * s2 * -np.expm1(-float(d2.max(initial=1.0)) / (2 * s2)))
    pi = 0.5
    for _ in range(max_iter):
        own = pi * g
        w = own / (own + (1 - pi) * even)
        new = float(w.mean())
        if abs(new - pi) < 1e-7:
            return new
        pi = new
    return pi


def extras_shares(share, d_nm, range_index, locator, spread: LateralSpread, min_ions: int = 50) -> np.ndarray:
    """Each metal's share among the *extras* of each range (``u_rk`` of the module docstring).

    A range's share of a metal from the spectrum fit counts the metal's own ions too, which sit on
    the rod axes; the extras (linker fragments, background, crosstalk) are spread over the cell. The
    sample's ions of each metal-bearing range are split by their distance to the nearest axis into
    a Gaussian part of the fitted width (own ions, given to the range's metals by their shares) and
    an even part; the metal's share of the even part is ``u_rk``. Ranges with fewer than
    ``min_ions`` ions, or without a fitted width, keep the spectrum's shares.

    Parameters
    ----------
    share : (n_ranges, K) array of float
        Metal shares of each range from the spectrum fit.
    d_nm : (n,) array of float, nm
        Distance of each sampled ion (of a metal-bearing range) to its nearest rod axis.
    range_index : (n,) array of int
        Range of each of those ions.
    locator : RodLocator
    spread : LateralSpread

    Returns
    -------
    (n_ranges, K) ndarray of float
    """
    share = np.asarray(share, dtype=np.float64)
    out = share.copy()
    if not spread.fitted:
        return out
    edges, dens = _even_density(locator)
    d2 = np.asarray(d_nm, dtype=np.float64) ** 2
    ok = np.isfinite(d2) & (d2 < edges[-1])
    d2, ri = d2[ok], np.asarray(range_index)[ok]
    s2 = spread.sigma_nm ** 2
    for r in np.flatnonzero((share > 0).any(axis=1) & (share.sum(axis=1) < 0.98)):
        dr = d2[ri == r]
        if dr.size < min_ions:
            continue
        g = _own_share(dr, s2, _even_at(edges, dens, dr))
        tot = float(share[r].sum())
        own = g * share[r] / tot  # the Gaussian part, given to the range's metals by their shares
        extras = np.maximum(share[r] - own, 0.02 * share[r])
        out[r] = extras / max(1.0 - g, 1e-3)
    return np.clip(out, 0.0, 1.0)


def fit_lateral_spread(d_nm, locator, max_iter: int = 200) -> LateralSpread:
    """Fit the own ions' lateral width from distances to the nearest axis.

    Parameters
    ----------
    d_nm : (n,) array of float, nm
        Distance of each ion (of a pure metal range) to its nearest rod axis.
    locator : RodLocator
        The geometry's locator (grid, rod positions, metric and cutoff).
    max_iter : int
        EM iterations at most.

    Returns
    -------
    LateralSpread
    """
    cell = _cell_d2(locator)
    d2 = np.asarray(d_nm, dtype=np.float64) ** 2
    d2 = d2[np.isfinite(d2)]
    if cell.size:
        d2 = d2[d2 < cell.max()]
    default = LateralSpread(0.15, 0.0, int(d2.size), False)
    if d2.size < 200 or cell.size < 16:
        return default
    # the even part's density of d^2, from the grid: a histogram on bins of d^2
    edges, dens = _even_density(locator)
    even = _even_at(edges, dens, d2)
    s2 = 0.02
    pi = 0.5
    top = float(cell.max())  # d^2 is cut there: the Gaussian part is a truncated exponential in d^2
    for _ in range(max_iter):
        own = pi * np.exp(-d2 / (2 * s2)) / (2 * s2 * -np.expm1(-top / (2 * s2)))
        tot = own + (1 - pi) * even
        w = own / tot
        pi_new = float(w.mean())
        m = float((w * d2).sum() / max(w.sum(), 1e-12))
        # the truncated mean is 2 s^2 - top q / (1 - q), q = exp(-top / 2 s^2): solve by iteration
        s2_new = s2
        for _ in range(20):
            q = np.exp(-top / (2 * s2_new))
            s2_new = 0.5 * (m + top * q / (1 - q))
        s2_new = min(max(s2_new, SIGMA_BOUNDS_NM[0] ** 2), SIGMA_BOUNDS_NM[1] ** 2)
        done = abs(s2_new - s2) < 1e-7 and abs(pi_new - pi) < 1e-6
        s2, pi = s2_new, pi_new
        if done:
            break
    if not (0.02 < pi and np.isfinite(s2)):
        return default
    return LateralSpread(float(np.sqrt(s2)), pi, int(d2.size), True)


@dataclass(frozen=True, eq=False)
class EvidenceTable:
    """What the count pass adds to the evidence array per ion (see the module docstring).

    Attributes
    ----------
    increments : (n_ranges * N_LEVELS, K) ndarray of float64
        Increment of each metal's evidence for an ion of range r at radial level q (row
        ``r * N_LEVELS + q``): ``u_rk rho_q`` rounded to 1/UNITS.
    cell_level : (n_grid * n_grid,) ndarray of int32
        Radial level of every cell of the geometry's lookup grid.
    rho_levels : (N_LEVELS,) ndarray of float64
        The radial likelihood ratio of each level (mean 1 over the cell area).
    own_scale : (K,) ndarray of float64
        Expected evidence a detected own ion of each metal adds (``sum_r p_rk u_rk E_g[rho] /
        a_k``), for the M-step of the extra rates.
    capture : (K,) ndarray of float64
        Share of each metal's ions inside its ranges (``a_k``), the metals' visibility.
    spread : LateralSpread
    """

    increments: np.ndarray
    cell_level: np.ndarray
    rho_levels: np.ndarray
    own_scale: np.ndarray
    capture: np.ndarray
    spread: LateralSpread

    def to_dict(self) -> dict:
        return {"lateral_spread": self.spread.to_dict(), "capture": self.capture.tolist(),
                "own_scale": self.own_scale.tolist(), "radial": bool(self.spread.fitted)}


def _levels(rho: np.ndarray):
    """Quantise rho (per grid cell) to N_LEVELS levels on a square-root scale; returns the level of
    every cell and the level values, renormalised so the mean over the cells stays 1."""
    top = float(rho.max()) if rho.size else 1.0
    if top <= 0:
        return np.zeros(rho.size, np.int32), np.zeros(N_LEVELS)
    q = np.clip(np.rint(np.sqrt(rho / top) * (N_LEVELS - 1)), 0, N_LEVELS - 1).astype(np.int32)
    values = (np.arange(N_LEVELS) / (N_LEVELS - 1)) ** 2 * top
    return q, values


def evidence_table(share, capture, seen, locator, spread: LateralSpread) -> EvidenceTable:
    """The per-ion increments of the evidence array.

    Parameters
    ----------
    share : (n_ranges, K) array of float
        Share of each metal among each range's ions (``u_rk``; rows of non-metal ranges are 0).
    capture : (K,) array of float
        Share of each metal's ions inside its ranges (``a_k``).
    seen : (K,) array of float
        ``sum_r p_rk u_rk``: the evidence a detected own ion adds without the radial factor
        (:func:`probeseq.ranging.channels.metal_visibility` times nothing: ``rho_k``).
    locator : RodLocator
    spread : LateralSpread
        The own ions' lateral width; not ``fitted``: no radial factor (rho = 1 everywhere).

    Returns
    -------
    EvidenceTable
    """
    share = np.asarray(share, dtype=np.float64)
    n_ranges, K = share.shape
    d2 = _grid_d2(locator)
    cut = float(locator.cutoff_nm) ** 2 if np.isfinite(locator.cutoff_nm) else np.inf
    inside = d2 < cut
    if spread.fitted:
        g = np.exp(-d2 / (2.0 * spread.sigma_nm ** 2))
        level, values = _levels(np.where(inside, g, 0.0))
        mean = float(values[level[inside]].mean()) if inside.any() else 1.0
        values = values / mean  # the quantised rho averages to 1 over the cell
        # E_g[rho] over the own ions' Gaussian: weight each cell by g
        gi = np.where(inside, g, 0.0)
        e_own = float((gi * values[level]).sum() / max(gi.sum(), 1e-300))
    else:
        level = np.full(d2.size, N_LEVELS - 1, np.int32)
        values = np.ones(N_LEVELS)
        e_own = 1.0
    inc = np.rint(share[:, None, :] * values[None, :, None] * UNITS) / UNITS  # (n_ranges, N_LEVELS, K)
    capture = np.clip(np.asarray(capture, dtype=np.float64), 0.02, 1.0)
    own_scale = np.asarray(seen, dtype=np.float64) * e_own / capture
    return EvidenceTable(increments=np.ascontiguousarray(inc.reshape(n_ranges * N_LEVELS, K)),
                         cell_level=np.ascontiguousarray(level.astype(np.int32)), rho_levels=values,
                         own_scale=own_scale, capture=capture, spread=spread)
