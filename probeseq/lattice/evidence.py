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

Mass bins: nothing above needs r to be a whole range. A range holding a metal line and a fragment
line is cut into equal mass bins b (:mod:`probeseq.ranging.rangebins`), each with its own ``p_bk``
(the share of metal k's ions in the bin) and ``beta_b``, so ``u_bk`` is metal k's share of the
extras at that mass-to-charge (24Mg+ sits 0.015 Da below C2+: an ion on the low flank is more
likely the metal's). ``a_k = sum_b p_bk`` and ``mu_k = lambda_k a_k`` are unchanged, so the
decoder reads the evidence as before; only the own ion's expected evidence, ``sum_b p_bk u_bk``,
changes. The own ions are taken out with one share of own ions per metal, measured on its pure
ranges, alike in every range and bin (own ions and extras of one metal fall alike over its
lines): :func:`own_fractions`, :func:`extras_shares`.

Quantisation: ``rho`` takes :data:`N_LEVELS` values (per cell of the geometry's lookup grid) and
every increment ``u_bk rho`` is rounded to a multiple of 1/:data:`UNITS`, so that float32 sums
are exact (below ``2**24 / UNITS`` per site) and do not depend on the order of the additions, the
number of threads or the block size.

The lateral width ``sigma`` is fitted on the sample's ions of pure metal ranges: their squared
distance to the nearest axis is a mixture of the own ions (2-D Gaussians of width ``sigma`` about
the cell's rod and, where rods are close, about its neighbours, whose ions stray into the cell)
and the extras, spread evenly over the cell (both from the lookup grid, :class:`_RadialModel`);
the width maximises the profile likelihood (:func:`fit_lateral_spread`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ['EvidenceTable', 'LateralSpread', 'fit_lateral_spread', 'own_fractions', 'remove_own', 'extras_shares',
           'evidence_table', 'run_evidence_table', 'lateral_capture', 'run_lateral_spread', 'N_LEVELS',
           'UNITS', 'EXTRAS_LEAST_SHARE', 'SHARE_MIN_STRAY', 'shared_ratios']

#: levels of the radial likelihood ratio rho
N_LEVELS = 64

#: every evidence increment is a multiple of 1 / UNITS (exact float32 sums)
UNITS = 256

#: least share of a metal's ions taken as its extras, in the shares of the ranges (``1 - c``) and in the
#: extras' evidence per site (:func:`probeseq.decoding.starts.evidence_start`). The decode weighs a
#: range shared with fragments against a pure range of the metal by the ratio of the two, so they are
#: one number: with 0.02 here and 0.05 there the shared ranges' ions counted 0.4 of their due
#: (bench_oracle.py, 40 runs: ratio 0.9758 -> 0.9772, every Mg run up or level; see DEVELOPERS.md).
EXTRAS_LEAST_SHARE = 0.05

#: least share of a rod's own ions landing nearer a neighbour (``1 - lateral_capture``) for the
#: evidence to be shared between an ion's two nearest rods (:func:`shared_ratios`)
SHARE_MIN_STRAY = 0.10

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


def own_fractions(share, d_nm, range_index, locator, spread: LateralSpread, min_ions: int = 50) -> np.ndarray:
    """Share of each mixed range's metal ions that are own ions (on the axes), ``c_r``.

    A metal's own ions and its extras (crosstalk) fall alike over its lines, so the own share of its
    ions, ``c_k``, is one number per metal, measured where it is clearest: on the metal's pure
    ranges (one metal holds at least 0.9 of the ions). Their ions are split by their distance to the
    nearest axis into a Gaussian part of the fitted width (a share ``g`` of the range: own ions, all
    metal) and an even part, and ``c_k = sum_r n_r g_r / sum_r n_r s_r`` (``s_r`` the range's metal
    share, ``n_r`` its sampled ions); above 1 when space sees more metal than the spectrum. A mixed
    range (metal share below 0.98) gets ``c_r = sum_k s_rk c_k / s_r``. A metal without pure ranges
    takes the value of all pure ranges together; with none at all, a mixed range is fitted on its
    own ions (at least ``min_ions``). Pure ranges, and anything without a fitted width: 0 (the
    spectrum's shares are kept).

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
    (n_ranges,) ndarray of float
    """
    share = np.asarray(share, dtype=np.float64)
    n_r, K = share.shape
    c = np.zeros(n_r)
    if not spread.fitted:
        return c
    model = _radial_model(locator)
    d2 = np.asarray(d_nm, dtype=np.float64) ** 2
    ok = np.isfinite(d2) & (d2 < model.top)
    d2, ri = d2[ok], np.asarray(range_index)[ok]
    s2 = spread.sigma_nm ** 2

    def gauss_share(r):
        dr = d2[ri == r]
        if dr.size < min_ions:
            return None, 0
        return _mixture_share(model.own_at(dr, s2), model.even_at(dr), 100)[0], dr.size

    own, metal = np.zeros(K), np.zeros(K)  # per metal: sampled own ions and metal ions of its pure ranges
    for r in np.flatnonzero((share >= 0.9).any(axis=1)):
        g, n = gauss_share(r)
        if g is not None:
            k = int(np.argmax(share[r]))
            own[k] += n * g
            metal[k] += n * float(share[r].sum())
    pooled = own.sum() / metal.sum() if metal.sum() > 0 else None
    c_k = np.where(metal > 0, own / np.maximum(metal, 1e-300), np.nan if pooled is None else pooled)
    for r in np.flatnonzero((share > 0).any(axis=1) & (share.sum(axis=1) < 0.98)):
        if pooled is not None:
            c[r] = float((share[r] * c_k).sum() / share[r].sum())
        else:
            g, _ = gauss_share(r)
            c[r] = 0.0 if g is None else g / float(share[r].sum())
    return c


def remove_own(share, c) -> np.ndarray:
    """Each metal's share among the extras from its share among all ions, ``u = (1 - c) s / (1 - c
    sum_k s_k)``: of the metal ions (share ``sum_k s_k``) a share ``c`` are own ions, which the
    extras do not hold. Rows may be ranges or mass bins (``c`` of each row's range). The metal
    keeps at least ``EXTRAS_LEAST_SHARE`` of its share among the extras (``1 - c >= 0.05``), and the extras are at
    least 0.1 % of the ions.

    Parameters
    ----------
    share : (n, K) array of float
        Metal shares among all ions.
    c : (n,) array of float
        Own ions' share of the metal ions (:func:`own_fractions`).

    Returns
    -------
    (n, K) ndarray of float, in [0, 1]
    """
    s = np.asarray(share, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)[:, None]
    extras = np.maximum(1.0 - c, EXTRAS_LEAST_SHARE) * s
    return np.clip(extras / np.maximum(1.0 - c * s.sum(axis=1, keepdims=True), 1e-3), 0.0, 1.0)


def extras_shares(share, d_nm, range_index, locator, spread: LateralSpread, min_ions: int = 50,
                  bins=None) -> np.ndarray:
    """Each metal's share among the *extras* of each range, or of each mass bin (``u`` of the module
    docstring).

    A range's share of a metal from the spectrum fit counts the metal's own ions too, which sit on
    the rod axes; the extras (linker fragments, background, crosstalk) are spread over the cell. The
    share ``c_r`` of the range's metal ions that are own ions comes from the ions' distance to the
    nearest axis, measured per metal on its pure ranges (:func:`own_fractions`), and is taken out
    (:func:`remove_own`). A metal's own ions and its extras fall alike over the mass bins of a
    range (both are its ions), so the same ``c_r`` serves every bin of the range. Pure ranges, and
    everything without a fitted width, keep the spectrum's shares.

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
    bins : RangeBins, optional
        Mass bins of the ranges (:func:`probeseq.ranging.rangebins.range_bins`): the shares of every
        bin are returned.

    Returns
    -------
    (n_ranges, K) or (n_bins, K) ndarray of float
    """
    c = own_fractions(share, d_nm, range_index, locator, spread, min_ions)
    if bins is None:
        return remove_own(share, c)
    return remove_own(bins.share, c[bins.bin_range])


def _near_d2(locator, n: int = 12, chunk: int = 8192, codes: bool = False):
    """Squared distances (nm^2) from the centre of every cell of the locator's grid to its ``n``
    nearest rod axes, nearest first, (n_grid * n_grid, n), in :func:`_grid_d2`'s order; with
    ``codes`` also the codes (rows of ``code_frac``) of the two nearest, (n_grid * n_grid, 2) int32."""
    G = int(locator.n_grid)
    c = (np.arange(G) + 0.5) / G
    u, v = np.meshgrid(c, c, indexing="ij")
    u, v = u.reshape(-1), v.reshape(-1)
    frac, g = np.asarray(locator.code_frac, np.float64), np.asarray(locator.metric, np.float64)
    n = min(int(n), frac.shape[0])
    out = np.empty((u.size, n))
    near_codes = np.empty((u.size, 2), np.int32)
    for a in range(0, u.size, chunk):
        du = u[a:a + chunk, None] - frac[None, :, 0]
        dv = v[a:a + chunk, None] - frac[None, :, 1]
        d2 = g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv
        part = np.argpartition(d2, n - 1, axis=1)[:, :n]
        order = np.take_along_axis(part, np.argsort(np.take_along_axis(d2, part, axis=1), axis=1, kind="stable"),
                                   axis=1)
        out[a:a + chunk] = np.take_along_axis(d2, order, axis=1)
        near_codes[a:a + chunk] = order[:, :2]
    return (out, near_codes) if codes else out


class _RadialModel:
    """Densities of the squared distance to the nearest axis, d^2, of the ions of one rod's cell:
    the even part (spread over the cell) and the own part, the own ions of *every* rod that land in
    the cell (its own rod's Gaussian, whose share of the circle at d that lies in the cell is the
    even part's density times ``pi / A``, plus the neighbours' Gaussians, summed on the grid in
    bins of d^2). Where rods are far apart the neighbours' part is nil and the own part is the
    Gaussian truncated by the cell; where they are close it holds the ions that stray in from the
    neighbours, which a Gaussian of the own rod alone reads as a narrower, weaker own part."""

    N_BINS = 40

    def __init__(self, locator):
        near = _near_d2(locator)
        cut = float(locator.cutoff_nm) ** 2 if np.isfinite(locator.cutoff_nm) else np.inf
        inside = near[:, 0] < cut
        self.near = near[inside]
        self.top = float(self.near[:, 0].max()) * (1 + 1e-9) if inside.any() else 1.0
        self.edges = np.linspace(0.0, self.top, self.N_BINS + 1)
        self.bin = np.clip(np.searchsorted(self.edges, self.near[:, 0], side="right") - 1, 0, self.N_BINS - 1)
        cnt = np.bincount(self.bin, minlength=self.N_BINS)
        width = np.diff(self.edges)
        self.even = cnt / (cnt.sum() * width)  # density of d^2 over the cell
        # the neighbours' squared distances of every grid cell, as a histogram per d^2 bin of the
        # nearest (fine bins: a width costs one matrix-vector product)
        other = self.near[:, 1:]
        self.other_at = np.linspace(0.0, float(other.max(initial=1.0)), 1025)
        ob = np.clip(np.searchsorted(self.other_at, other, side="right") - 1, 0, 1023)
        self.other_at = 0.5 * (self.other_at[:-1] + self.other_at[1:])
        self.other_hist = np.bincount((self.bin[:, None] * 1024 + ob).ravel(),
                                      minlength=self.N_BINS * 1024).reshape(self.N_BINS, 1024).astype(np.float64)
        nb = self.nb = int(locator.lattice.rods_per_cell)
        self.area_cell = abs(float(np.linalg.det(locator.lattice.cell_matrix))) / nb  # nm^2 per rod
        self.cell_area_per_grid = self.area_cell * nb / (int(locator.n_grid) ** 2)

    def bin_of(self, d2):
        return np.clip(np.searchsorted(self.edges, d2, side="right") - 1, 0, self.N_BINS - 1)

    def even_at(self, d2):
        return np.maximum(self.even[self.bin_of(d2)], 1e-12)

    def own_at(self, d2, s2: float):
        """Density of d^2 of the own ions in the cell (own rod and neighbours), normalised over the
        cell; ``d2`` (n,) nm^2, ``s2`` the Gaussian's variance, nm^2."""
        b = self.bin_of(d2)
        cover = self.even[b] * self.area_cell / np.pi  # share of the circle at d inside the cell
        own = np.exp(-d2 / (2 * s2)) / (2 * s2) * np.minimum(cover, 1.0)
        width = np.diff(self.edges)
        others = self.other_hist @ np.exp(-self.other_at / (2 * s2)) / (2 * np.pi * s2) * self.cell_area_per_grid
        # the grid spans the unit cell, ``nb`` rods' cells: per rod, a share 1 / nb of the sum
        o_bins = others / (width * self.nb)  # density of d^2
        # normalisation over the cell: the own rod's part from the same binned cover, plus the others'
        cover_b = np.minimum(self.even * self.area_cell / np.pi, 1.0)
        lo, hi = self.edges[:-1], self.edges[1:]
        own_mass = float((cover_b * (np.exp(-lo / (2 * s2)) - np.exp(-hi / (2 * s2)))).sum())
        z = own_mass + float((o_bins * width).sum())
        return np.maximum((own + o_bins[b]) / max(z, 1e-300), 1e-300)


_RADIAL_MODELS: list = []  # (locator, model) of the last few locators (they are cached and reused)


def _radial_model(locator) -> _RadialModel:
    """The :class:`_RadialModel` of ``locator``, built once per locator object."""
    for loc, model in _RADIAL_MODELS:
        if loc is locator:
            return model
    model = _RadialModel(locator)
    _RADIAL_MODELS.append((locator, model))
    del _RADIAL_MODELS[:-4]
    return model


def _mixture_share(own, even, max_iter: int = 200, pi: float = 0.5, weight=None) -> tuple:
    """EM for the share of the own part of a two-part mixture with fixed densities (of points with
    multiplicities ``weight``, default 1); returns (share, log-likelihood)."""
    wt = np.ones(np.shape(own)) if weight is None else np.asarray(weight, dtype=np.float64)
    n = float(wt.sum())
    for _ in range(max_iter):
        new = float((wt * (pi * own / (pi * own + (1 - pi) * even))).sum() / n)
        if abs(new - pi) < 1e-8:
            pi = new
            break
        pi = new
    return pi, float((wt * np.log(pi * own + (1 - pi) * even)).sum())


def fit_lateral_spread(d_nm, locator, max_iter: int = 200) -> LateralSpread:
    """Fit the own ions' lateral width from distances to the nearest axis.

    The ions of pure metal ranges are a mixture of own ions (of the cell's rod and, where rods are
    close, of its neighbours, :class:`_RadialModel`) and an even part; the width is the maximum of
    the profile likelihood (the own share by EM at each width), found by a bounded search on the
    log width within :data:`SIGMA_BOUNDS_NM`.

    Parameters
    ----------
    d_nm : (n,) array of float, nm
        Distance of each ion (of a pure metal range) to its nearest rod axis.
    locator : RodLocator
        The geometry's locator (grid, rod positions, metric and cutoff).
    max_iter : int
        EM iterations at most for the own share at each width.

    Returns
    -------
    LateralSpread
    """
    from scipy.optimize import minimize_scalar

    model = _radial_model(locator)
    d2 = np.asarray(d_nm, dtype=np.float64) ** 2
    d2 = d2[np.isfinite(d2) & (d2 < model.top)]
    default = LateralSpread(0.15, 0.0, int(d2.size), False)
    if d2.size < 200 or model.near.shape[0] < 16:
        return default
    # the distances as a fine histogram of d^2 (2048 bins across the cell): the likelihood costs the
    # same for any number of ions and moves by far less than its own error
    count, edges = np.histogram(d2, bins=2048, range=(0.0, model.top))
    keep = count > 0
    at = 0.5 * (edges[:-1] + edges[1:])[keep]
    count = count[keep].astype(np.float64)
    even = model.even_at(at)
    state = {"pi": 0.5}

    def negll(log_s):
        pi, ll = _mixture_share(model.own_at(at, float(np.exp(2 * log_s))), even, max_iter, state["pi"], count)
        state["pi"] = pi
        return -ll

    lo, hi = np.log(SIGMA_BOUNDS_NM[0]), np.log(min(SIGMA_BOUNDS_NM[1], np.sqrt(model.top)))
    grid = np.linspace(lo, hi, 16)
    vals = [negll(x) for x in grid]
    i = int(np.argmin(vals))
    a, b = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    res = minimize_scalar(negll, bounds=(a, b), method="bounded", options={"xatol": 1e-4})
    log_s = float(res.x) if res.fun <= vals[i] else float(grid[i])
    pi, _ = _mixture_share(model.own_at(at, float(np.exp(2 * log_s))), even, max_iter, weight=count)
    s = float(np.exp(log_s))
    if not (0.02 < pi and np.isfinite(s)):
        return default
    return LateralSpread(s, pi, int(d2.size), True)


@dataclass(frozen=True, eq=False)
class EvidenceTable:
    """What the count pass adds to the evidence array per ion (see the module docstring).

    Attributes
    ----------
    increments : (n_bins * N_LEVELS, K) ndarray of float64
        Increment of each metal's evidence for an ion of mass bin b at radial level q (row
        ``b * N_LEVELS + q``): ``u_bk rho_q`` rounded to 1/UNITS. With one bin per range, b is
        the range.
    cell_level : (n_grid * n_grid,) ndarray of int32
        Radial level of every cell of the geometry's lookup grid.
    rho_levels : (N_LEVELS,) ndarray of float64
        The radial likelihood ratio of each level (mean 1 over the cell area).
    own_scale : (K,) ndarray of float64
        Expected evidence a detected own ion of each metal adds (``sum_r p_rk u_rk E_g[rho] /
        a_k``, ``E_g`` over the whole Gaussian, rho being 0 where the ion lands nearer another
        rod), for the M-step of the extra rates.
    capture : (K,) ndarray of float64
        Share of each metal's ions inside its ranges (``a_k``), the metals' visibility.
    spread : LateralSpread
    bin_start : (n_ranges + 1,) ndarray of int64
        First mass bin of each range (:class:`probeseq.ranging.rangebins.RangeBins`); range r owns
        bins ``bin_start[r] .. bin_start[r + 1] - 1``.
    bin_scale : (n_ranges,) ndarray of float64, 1/Da
        Bins per Da of each range (0: one bin); an ion's bin in its range is
        ``floor((m - bin_low[r]) * bin_scale[r])`` (float64), clipped to the range's bins.
    bin_low : (n_ranges,) ndarray of float64, Da
        Low edge of each range.
    lateral_capture : float
        Share of a rod's own ions that land nearest their own rod within the cutoff
        (:func:`lateral_capture`; 1 without a fitted width): the counts hold the rest at a
        neighbouring rod or not at all, so it is part of the metals' visibility in the counts.
    second_level, first_code, second_code : (n_grid * n_grid,) ndarray of int32 or None
        With evidence shared between an ion's two nearest rods (:func:`shared_ratios`): the radial
        level at the second nearest rod of every grid cell, and the codes (rows of the locator's
        ``code_frac``) of the nearest and second nearest rod at the cell's centre; ``cell_level``
        is then the level at the nearest rod. None: each ion adds to its nearest rod only.
    """

    increments: np.ndarray
    cell_level: np.ndarray
    rho_levels: np.ndarray
    own_scale: np.ndarray
    capture: np.ndarray
    spread: LateralSpread
    bin_start: np.ndarray
    bin_scale: np.ndarray
    bin_low: np.ndarray
    lateral_capture: float = 1.0
    second_level: np.ndarray | None = None
    first_code: np.ndarray | None = None
    second_code: np.ndarray | None = None

    @property
    def shared(self) -> bool:
        """Whether every ion's evidence is shared with its second nearest rod."""
        return self.second_level is not None

    @property
    def n_bins(self) -> int:
        return int(self.bin_start[-1])

    def to_dict(self) -> dict:
        nb = np.diff(self.bin_start)
        return {"lateral_spread": self.spread.to_dict(), "capture": self.capture.tolist(),
                "own_scale": self.own_scale.tolist(), "radial": bool(self.spread.fitted),
                "mass_bins": {"ranges_cut": int((nb > 1).sum()), "bins": self.n_bins},
                "lateral_capture": float(self.lateral_capture), "shared_with_second_rod": self.shared}


def _levels(rho: np.ndarray):
    """Quantise rho (per grid cell) to N_LEVELS levels on a square-root scale; returns the level of
    every cell and the level values, renormalised so the mean over the cells stays 1."""
    top = float(rho.max()) if rho.size else 1.0
    if top <= 0:
        return np.zeros(rho.size, np.int32), np.zeros(N_LEVELS)
    q = np.clip(np.rint(np.sqrt(rho / top) * (N_LEVELS - 1)), 0, N_LEVELS - 1).astype(np.int32)
    values = (np.arange(N_LEVELS) / (N_LEVELS - 1)) ** 2 * top
    return q, values


def lateral_capture(locator, spread: LateralSpread, d2=None) -> float:
    """Share of a rod's own ions that land nearest their own rod, within the cutoff.

    The own ions spread about the axis as a two-dimensional Gaussian of width ``sigma``; where the
    rods are close (or the blur is wide) some land nearer a neighbour and are counted there. The
    share kept is the integral of the Gaussian over the rod's cell, summed on the locator's grid:
    every grid cell adds its Gaussian density at the distance to its nearest axis times its area,
    over all the rods of the unit cell, divided by their number.

    Parameters
    ----------
    locator : RodLocator
    spread : LateralSpread
        The own ions' lateral width (not ``fitted``: 1).
    d2 : (n_grid * n_grid,) ndarray of float, nm^2, optional
        :func:`_grid_d2` of the locator when already computed.

    Returns
    -------
    float in (0, 1]
    """
    if not spread.fitted:
        return 1.0
    if d2 is None:
        d2 = _grid_d2(locator)
    cut = float(locator.cutoff_nm) ** 2 if np.isfinite(locator.cutoff_nm) else np.inf
    s2 = float(spread.sigma_nm) ** 2
    nb = int(locator.lattice.rods_per_cell)
    area = abs(float(np.linalg.det(locator.lattice.cell_matrix))) / d2.size / nb  # per grid cell and rod, nm^2
    g = np.where(d2 < cut, np.exp(-d2 / (2 * s2)), 0.0) / (2 * np.pi * s2)
    return float(min(max(g.sum() * area, 1e-3), 1.0))


def shared_ratios(locator, spread: LateralSpread):
    """Radial ratios of an ion at its nearest and at its second nearest rod, where rods are close.

    An ion at ``x`` may be the own ion of its nearest rod, of its second nearest, of another rod or
    an extra. Read against all the others, its ratio at candidate rod c is

    ``rho_c(x) = g_c(x) / (eps + sum_{c' != c} g_c'(x))``,

    ``g`` the own ions' lateral Gaussian about each axis (2-D density, 1/nm^2) and ``eps = (1 -
    pi) / (pi A)`` the even density of the extras relative to the own ions (``pi`` the own share of
    the pure ranges' ions, :attr:`LateralSpread.own_share`; ``A`` a rod's cell area). Where the
    neighbours' Gaussians are nil this is the plain ratio ``g / eps``; near the midpoint between two
    rods an ion's evidence is split between them by their Gaussians (the information the single
    nearest rod loses: checked on simulated runs with ``oracle.data_limit_shared_posteriors``).
    Both are scaled so that ``rho_1 + rho_2`` averages 1 over the cell (an even extra adds, on
    average, one unit in all).

    Parameters
    ----------
    locator : RodLocator
    spread : LateralSpread
        Fitted (``fitted`` True).

    Returns
    -------
    rho1, rho2 : (n_grid * n_grid,) ndarray of float
        At the nearest and second nearest rod of every grid cell's centre (0 beyond the cutoff).
    codes : (n_grid * n_grid, 2) ndarray of int32
        Codes of those two rods.
    e_own : float
        The evidence one own ion adds at its own rod, on average over its Gaussian (as the nearest
        rod or the second nearest), in units of rho.
    """
    near, codes = _near_d2(locator, codes=True)
    s2 = float(spread.sigma_nm) ** 2
    gauss = np.exp(-near / (2 * s2)) / (2 * np.pi * s2)  # (cells, 12)
    cut = float(locator.cutoff_nm) ** 2 if np.isfinite(locator.cutoff_nm) else np.inf
    inside = near[:, 0] < cut
    nb = int(locator.lattice.rods_per_cell)
    cell_area = abs(float(np.linalg.det(locator.lattice.cell_matrix))) / nb
    pi = float(np.clip(spread.own_share, 0.05, 0.99))
    eps = (1.0 - pi) / (pi * cell_area)
    total = gauss.sum(axis=1)
    rho1 = np.where(inside, gauss[:, 0] / (eps + total - gauss[:, 0]), 0.0)
    rho2 = np.where(inside, gauss[:, 1] / (eps + total - gauss[:, 1]), 0.0)
    mean = float((rho1 + rho2)[inside].mean()) if inside.any() else 1.0
    rho1, rho2 = rho1 / mean, rho2 / mean
    area = cell_area * nb / near.shape[0]  # per grid cell, nm^2
    e_own = float(((gauss[:, 0] * rho1 + gauss[:, 1] * rho2)[inside]).sum() * area / nb)
    return rho1, rho2, codes, e_own


def evidence_table(share, capture, seen, locator, spread: LateralSpread, bins=None, shared=None) -> EvidenceTable:
    """The per-ion increments of the evidence array.

    Parameters
    ----------
    share : (n_ranges, K) or (n_bins, K) array of float
        Share of each metal among the extras of each range (``u_rk``; rows of non-metal ranges are
        0), or of each mass bin when ``bins`` is given.
    capture : (K,) array of float
        Share of each metal's ions inside its ranges (``a_k``).
    seen : (K,) array of float
        ``sum_r p_rk u_rk``: the evidence a detected own ion adds without the radial factor
        (:func:`probeseq.ranging.channels.metal_visibility` times nothing: ``rho_k``).
    locator : RodLocator
    spread : LateralSpread
        The own ions' lateral width; not ``fitted``: no radial factor (rho = 1 everywhere).
    bins : RangeBins, optional
        The mass bins of the ranges (:func:`probeseq.ranging.rangebins.range_bins`); default one
        bin per range.
    shared : bool, optional
        Share every ion's evidence between its two nearest rods (:func:`shared_ratios`). Default:
        where at least :data:`SHARE_MIN_STRAY` of a rod's own ions land nearer a neighbour. Below
        that, sharing moved the accuracy of four simulated runs (2-5 % strayed) by -0.005 to
        +0.001; at 38 % it raised it from 0.547 to 0.612 (``bench_oracle.py --crowded``).

    Returns
    -------
    EvidenceTable
    """
    share = np.asarray(share, dtype=np.float64)
    n_rows, K = share.shape
    if bins is None:
        start, scale, low = np.arange(n_rows + 1, dtype=np.int64), np.zeros(n_rows), np.zeros(n_rows)
    else:
        start, scale, low = (np.asarray(bins.start, np.int64), np.asarray(bins.scale, np.float64),
                             np.asarray(bins.lows, np.float64))
        if int(start[-1]) != n_rows:
            raise ValueError(f"share has {n_rows} rows, the bins {int(start[-1])}")
    d2 = _grid_d2(locator)
    cut = float(locator.cutoff_nm) ** 2 if np.isfinite(locator.cutoff_nm) else np.inf
    inside = d2 < cut
    second = None
    lateral = lateral_capture(locator, spread, d2)  # 1 without a fitted width
    if shared is None:
        shared = 1.0 - lateral >= SHARE_MIN_STRAY
    if shared and spread.fitted:
        rho1, rho2, codes, e_own = shared_ratios(locator, spread)
        level, values = _levels(np.concatenate([rho1, rho2]))
        level, level2 = level[:rho1.size], level[rho1.size:]
        second = (np.ascontiguousarray(level2.astype(np.int32)), np.ascontiguousarray(codes[:, 0]),
                  np.ascontiguousarray(codes[:, 1]))
    elif spread.fitted:
        g = np.exp(-d2 / (2.0 * spread.sigma_nm ** 2))
        level, values = _levels(np.where(inside, g, 0.0))
        mean = float(values[level[inside]].mean()) if inside.any() else 1.0
        values = values / mean  # the quantised rho averages to 1 over the cell
        # E_g[rho] over the own ions' Gaussian: weight each cell by g
        # (over the whole Gaussian: an own ion landing nearer another rod adds nothing at its site,
        # and the counts' visibility holds the share that lands nearest its rod, ``lateral``)
        gi = np.where(inside, g, 0.0)
        e_own = lateral * float((gi * values[level]).sum() / max(gi.sum(), 1e-300))
    else:
        level = np.full(d2.size, N_LEVELS - 1, np.int32)
        values = np.ones(N_LEVELS)
        e_own = 1.0
    inc = np.rint(share[:, None, :] * values[None, :, None] * UNITS) / UNITS  # (n_rows, N_LEVELS, K)
    capture = np.clip(np.asarray(capture, dtype=np.float64), 0.02, 1.0)
    own_scale = np.asarray(seen, dtype=np.float64) * e_own / capture
    return EvidenceTable(increments=np.ascontiguousarray(inc.reshape(n_rows * N_LEVELS, K)),
                         cell_level=np.ascontiguousarray(level.astype(np.int32)), rho_levels=values,
                         own_scale=own_scale, capture=capture, spread=spread, bin_start=np.ascontiguousarray(start),
                         bin_scale=np.ascontiguousarray(scale), bin_low=np.ascontiguousarray(low),
                         lateral_capture=float(lateral), second_level=None if second is None else second[0],
                         first_code=None if second is None else second[1],
                         second_code=None if second is None else second[2])


def run_lateral_spread(assignment, d_nm, range_index, locator) -> LateralSpread:
    """The own ions' lateral width fitted on the sampled ions of the (nearly) pure metal ranges
    (one metal holds at least 0.9 of the range's ions).

    Parameters
    ----------
    assignment : ChannelAssignment
        Channels of the ranged ions (its ``metal_weights``).
    d_nm : (n,) array of float, nm
        Distance to the nearest rod axis of each sampled ion of a metal-bearing range.
    range_index : (n,) array of int
        Range of each of those ions.
    locator : RodLocator

    Returns
    -------
    LateralSpread
    """
    w = np.asarray(assignment.metal_weights, float)[:-1]
    pure = np.concatenate([(w >= 0.9).any(axis=1), [False]])[np.asarray(range_index)]
    return fit_lateral_spread(np.asarray(d_nm, dtype=np.float64)[pure], locator)


def run_evidence_table(rr, assignment, d_nm, range_index, locator, bins=None) -> EvidenceTable:
    """The evidence table of a run from its ranging and the sample's metal-bearing ions.

    The own ions' lateral width is fitted on the ions of pure metal ranges; each metal's share
    among the extras comes per mass bin of the ranges (:func:`probeseq.ranging.rangebins.range_bins`)
    with the own ions taken out per range (:func:`extras_shares`); ``a_k`` and the evidence of an
    own ion, ``sum_b p_bk u_bk``, follow from each metal's share of its ions in each range
    (:func:`probeseq.ranging.channels.metal_range_shares`) split over the range's bins as the fitted
    spectrum puts the metal's ions there.

    Parameters
    ----------
    rr : RangingResult
    assignment : ChannelAssignment
        Channels of the ranged ions (:func:`probeseq.ranging.channels.assign_channels` of the ions
        the spectrum was fitted on).
    d_nm : (n,) array of float, nm
        Distance to the nearest rod axis of each sampled ion of a metal-bearing range.
    range_index : (n,) array of int
        Range of each of those ions.
    locator : RodLocator
    bins : RangeBins, optional
        The mass bins (default :func:`probeseq.ranging.rangebins.range_bins` of ``rr``;
        :func:`probeseq.ranging.rangebins.one_bin_per_range` reads whole ranges).

    Returns
    -------
    EvidenceTable
    """
    from ..ranging.channels import metal_range_shares
    from ..ranging.rangebins import range_bins

    w = np.asarray(assignment.metal_weights, float)[:-1]  # (n_ranges, K)
    ri = np.asarray(range_index)
    d = np.asarray(d_nm, dtype=np.float64)
    spread = run_lateral_spread(assignment, d, ri, locator)
    if bins is None:
        bins = range_bins(rr, w)
    u = extras_shares(w, d, ri, locator, spread, bins=bins)
    p = metal_range_shares(rr, assignment)  # share of each metal's ions in each range (NaN: no fitted ions)
    known = np.isfinite(p).all(axis=0)
    p_bin = np.nan_to_num(p)[bins.bin_range] * bins.metal_split  # ... in each bin
    capture = np.where(known, np.nan_to_num(p).sum(axis=0), 1.0)
    seen = np.where(known, (p_bin * u).sum(axis=0), 1.0)  # an own ion's evidence, no radial factor
    return evidence_table(u, capture, seen, locator, spread, bins=bins)
