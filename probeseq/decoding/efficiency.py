"""Detection efficiency that varies across the field of view.

Ions from near the specimen's edge reach the detector less often than ions from its axis (common
practice), so the detection efficiency of the rod model (:mod:`probeseq.decoding.model`) is allowed to vary from rod
to rod with a relative efficiency ``h_r``: rod r has detection efficiency ``eta_r = eta h_r`` and
extra rates ``mu_r = mu h_r`` (its extras, from crosstalk and background, are ions detected with
the same efficiency). ``eta`` and ``mu`` are then the values of a rod with ``h = 1``.

Radial model (:func:`fit_radial_efficiency`)
--------------------------------------------
``rho_n`` is the distance of a rod's axis from the centre of the specimen outline at a site's
depth, divided by the outline radius at that depth (0 on the axis, 1 on the outline). The
relative efficiency is modelled as ``h(rho_n) = 1 + a (rho_n^2 - c)``, with ``c`` the mean of
``rho_n^2`` over the observed sites so that ``h`` averages 1 over them. The expected total
count of a site (all metal channels) is ``(eta + sum mu) h``, so the least-squares line of the
site totals ``y`` on ``x = rho_n^2``, ``y = alpha + beta (x - c)``, gives ``alpha`` the mean
count and ``a = beta / alpha``; every observed site weighs the same. The standard errors are
cluster-robust by rod (sandwich estimator with the ``G / (G - 1)`` correction for G rods;
common practice), since sites of one rod share whatever else differs between rods; the errors
of ``h`` at the axis (``1 - a c``) and the outline (``1 + a (1 - c)``) follow from that of ``a``
(``c`` is a property of the design). A rod's ``rho_n`` is its mean over the rod's observed
sites; its ``h`` is clipped to ``H_CLIP``. The fit is used only when it is significant
(``|a| > SIGNIFICANCE`` standard errors) and rests on at least ``MIN_RODS`` rods.

The outline is read from ``columns.params["columns"]["outline"]`` (``z_nm, radius_nm,
center_nm`` per depth slab, as :meth:`probeseq.lattice.geometry.ColumnGeometry.to_dict` writes it)
and interpolated linearly in depth, held at the ends. Without it the centre is the mean of the
rod axis positions over the observed sites and the radius the largest distance of a rod axis from
it (``rho_n = 1`` is then the outermost rod, not the outline).

Model terms (used by :mod:`probeseq.decoding.model`)
----------------------------------------------------
With ``N_r`` observed sites and ``T_r`` whole counts (all channels) of rod r (``N`` sites in all),
the state-independent part of the log-likelihood is the one with ``h = 1`` plus
``sum_r T_r log h_r - sum(mu) (sum_r N_r h_r - N)``. The EM M-step (complete-data log-likelihood:
detections Bernoulli(``eta h_r``), extras Poisson(``mu_j h_r``)) is exactly
``mu_j = sum_t (E[y_tj] - own_tj) / sum_r N_r h_r`` and, for ``eta``, the root of
``sum_r D_r / eta = sum_r (N_r - D_r) h_r / (1 - eta h_r)`` with ``D_r`` the expected detected own
ions of rod r (:func:`eta_mstep`); it is ``D / N`` when every ``h_r = 1``. (The ratio
``D / sum_r N_r h_r`` is the root only to first order in ``eta h``: it is the M-step of a model
whose detections were Poisson.)
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from ..exceptions import InputError
from ..lattice.rodcolumns import RodColumns
from ..utils.marks import finite_or_none
from .passes import group_row_counts, rod_radial_sums, rod_whole_counts

__all__ = ['RadialEfficiency', 'fit_radial_efficiency', 'eta_mstep', 'MIN_RODS', 'SIGNIFICANCE', 'H_CLIP']

#: fewest rods with observed sites the radial fit is used with
MIN_RODS = 20


#: the fit is used when ``|a|`` exceeds this many standard errors
SIGNIFICANCE = 3.0


#: range every rod's relative efficiency is clipped to when the fit is used
H_CLIP = (0.2, 1.5)


@dataclass(frozen=True)
class RadialEfficiency:
    """Relative detection efficiency as a function of the radial position (module docstring).

    Attributes
    ----------
    applied : bool
        Whether ``per_rod`` carries the fit (else it is all 1).
    a : float
        Slope of ``h`` in ``rho_n^2`` (dimensionless); nan when it could not be fitted.
    a_se : float
        Its cluster-robust standard error.
    c : float
        Mean of ``rho_n^2`` over the observed sites.
    h_axis, h_axis_se : float
        ``h`` on the specimen axis (``rho_n = 0``) and its standard error.
    h_outline, h_outline_se : float
        ``h`` on the outline (``rho_n = 1``) and its standard error.
    mean_counts : float, counts per site
        Mean total metal count per observed site (``eta + sum mu`` on average).
    n_rods : int
        Rods with an observed site.
    n_sites : int
        Observed sites.
    outline_source : str
        ``"columns"`` (the outline stored with the columns) or ``"rods"`` (the fallback).
    rod_rho : (columns.n_rods,) ndarray of float
        Mean ``rho_n`` of every rod over its observed sites (nan for rods without any).
    per_rod : (columns.n_rods,) ndarray of float64
        Relative efficiency ``h_r`` of every rod (1 when not applied or without observed sites).
    reason : str or None
        Why the fit is not used (None when it is).
    """

    applied: bool
    a: float
    a_se: float
    c: float
    h_axis: float
    h_axis_se: float
    h_outline: float
    h_outline_se: float
    mean_counts: float
    n_rods: int
    n_sites: int
    outline_source: str
    rod_rho: np.ndarray
    per_rod: np.ndarray
    reason: str | None = None

    def relative(self, rho_n) -> np.ndarray:
        """``1 + a (rho_n^2 - c)`` (unclipped) at normalised radius ``rho_n`` (any shape)."""
        r = np.asarray(rho_n, dtype=float)
        return 1.0 + self.a * (r * r - self.c)

    def to_dict(self) -> dict:
        """JSON-able summary (no per-rod arrays; NaN becomes None)."""
        num = finite_or_none
        used = self.per_rod[np.isfinite(self.rod_rho)] if self.per_rod.size else self.per_rod
        ratio = self.h_outline / self.h_axis if self.h_axis != 0 else float("nan")
        return {
            "model": "h(rho_n) = 1 + a (rho_n^2 - c), mean 1 over observed sites; rod r: eta h_r, extra rates mu h_r",
            "applied": bool(self.applied),
            "reason": self.reason,
            "a": num(self.a), "a_se": num(self.a_se), "c": num(self.c),
            "h_axis": num(self.h_axis), "h_axis_se": num(self.h_axis_se),
            "h_outline": num(self.h_outline), "h_outline_se": num(self.h_outline_se),
            "outline_to_axis": num(ratio),
            "mean_counts_per_site": num(self.mean_counts),
            "n_rods": int(self.n_rods), "n_sites": int(self.n_sites),
            "outline_source": self.outline_source,
            "per_rod_min": num(used.min()) if used.size else None,
            "per_rod_max": num(used.max()) if used.size else None,
            "min_rods": MIN_RODS, "significance_se": SIGNIFICANCE, "clip": list(H_CLIP),
        }


def _stored_outline(params):
    """(z, radius, centre) of the outline stored with the columns, sorted by depth, or None."""
    for src in (params.get("columns"), params):
        o = src.get("outline") if hasattr(src, "get") else None
        if not hasattr(o, "get"):
            continue
        try:
            z = np.asarray(o.get("z_nm"), dtype=float).reshape(-1)
            rad = np.asarray(o.get("radius_nm"), dtype=float).reshape(-1)
            cen = np.asarray(o.get("center_nm"), dtype=float).reshape(-1, 2)
        except (TypeError, ValueError):
            continue
        if (z.size and rad.shape == z.shape and cen.shape == (z.size, 2) and np.isfinite(z).all()
                and np.isfinite(cen).all() and np.isfinite(rad).all() and (rad > 0).all()):
            order = np.argsort(z, kind="stable")
            return z[order], rad[order], cen[order]
    return None


def _fallback_outline(columns: RodColumns):
    """Centre (mean axis position over observed sites) and the largest axis distance from it.

    A rod's axis is a straight line in depth, so its mean position over its sites follows from
    the sum of their depths, and its largest distance from a point is at its shallowest or
    deepest observed site."""
    m = columns.mask
    n_r = m.sum(axis=1)
    has = n_r > 0
    n = max(int(n_r.sum()), 1)
    off, z_ref, tilt, xy = columns.site_z_offset_nm, columns.z_ref_nm, columns.tilt, columns.rod_xy_nm
    sum_dz = float((m @ columns.site_z_nm).sum() + n_r @ off) - n * z_ref  # sum of z - z_ref over sites
    cen = (n_r @ xy + tilt * sum_dz) / n
    z_lo = np.where(m, columns.site_z_nm, np.inf).min(axis=1)
    z_hi = np.where(m, columns.site_z_nm, -np.inf).max(axis=1)
    rmax = 0.0
    for z_end in (z_lo, z_hi):
        pos = xy[has] + tilt[None, :] * (z_end[has] + off[has] - z_ref)[:, None]
        d = np.hypot(*(pos - cen).T)
        rmax = max(rmax, float(d.max()) if d.size else 0.0)
    if not rmax > 0:
        rmax = 1.0  # every rod on the centre: rho_n = 0 everywhere (no spread, nothing fitted)
    return np.zeros(1), np.full(1, rmax), cen[None, :]


def _rod_sums(columns: RodColumns, outline) -> np.ndarray:
    """Per rod: observed sites, sums of rho_n, x = rho_n^2, x^2, y (site total counts), x y over
    them, in one compiled pass (:func:`probeseq.decoding.passes.rod_radial_sums`).

    Returns
    -------
    (n_rods, 6) ndarray of float
    """
    return rod_radial_sums(columns.counts, columns.mask, columns.site_z_nm, columns.site_z_offset_nm,
                           columns.z_ref_nm, columns.rod_xy_nm, columns.tilt, outline)


def _regression(s: np.ndarray):
    """Least squares of site totals on x = rho_n^2 from the per-rod sums, cluster-robust by rod.

    Returns ``(c, alpha, a, a_se)`` or None when x has no spread or there are no counts."""
    n_r, _, sx_r, sxx_r, sy_r, sxy_r = s.T
    n = n_r.sum()
    c = sx_r.sum() / n
    alpha = sy_r.sum() / n
    sxx_c = float(((sxx_r - 2.0 * c * sx_r + c * c * n_r)).sum())  # sum (x - c)^2
    if not (alpha > 0 and sxx_c > 1e-12 * n):
        return c, alpha, None
    beta = float((sxy_r - c * sy_r).sum()) / sxx_c
    # per-rod scores: sum of residuals and of (x - c) residuals
    g0 = sy_r - alpha * n_r - beta * (sx_r - c * n_r)
    g1 = (sxy_r - c * sy_r) - alpha * (sx_r - c * n_r) - beta * (sxx_r - 2.0 * c * sx_r + c * c * n_r)
    n_g = int((n_r > 0).sum())
    corr = n_g / max(n_g - 1, 1)
    v_alpha = corr * float(g0 @ g0) / n ** 2
    v_beta = corr * float(g1 @ g1) / sxx_c ** 2
    cov = corr * float(g0 @ g1) / (n * sxx_c)
    a = beta / alpha
    var_a = v_beta / alpha ** 2 + beta ** 2 * v_alpha / alpha ** 4 - 2.0 * beta * cov / alpha ** 3
    return c, alpha, (a, math.sqrt(max(var_a, 0.0)))


def fit_radial_efficiency(columns: RodColumns) -> RadialEfficiency:
    """Fit the relative detection efficiency ``h(rho_n)`` of every rod (module docstring).

    Parameters
    ----------
    columns : RodColumns
        Counts (n_rods, n_sites, K) with the mask, rod positions ``rod_xy_nm`` (nm), ``tilt``,
        ``z_ref_nm`` (nm), site depths (``site_z_nm`` + ``site_z_offset_nm``, nm) and, when
        available, the outline in ``params["columns"]["outline"]``.

    Returns
    -------
    RadialEfficiency
        ``per_rod`` is the (n_rods,) float64 array to pass as ``rod_efficiency`` when
        ``applied``.
    """
    if not isinstance(columns, RodColumns):
        raise InputError(f"columns must be a probeseq.lattice.rodcolumns.RodColumns, got {type(columns).__name__}")
    outline = _stored_outline(columns.params)
    source = "columns" if outline is not None else "rods"
    if outline is None:
        outline = _fallback_outline(columns)
    s = _rod_sums(columns, outline)
    n_r = s[:, 0]
    has = n_r > 0
    rod_rho = np.full(columns.n_rods, np.nan)
    rod_rho[has] = s[has, 1] / n_r[has]
    n_rods, n_sites = int(has.sum()), int(n_r.sum())
    ones = np.ones(columns.n_rods)
    nan = float("nan")
    base = {"n_rods": n_rods, "n_sites": n_sites, "outline_source": source, "rod_rho": rod_rho}
    if n_sites < 3:
        return RadialEfficiency(applied=False, a=nan, a_se=nan, c=nan, h_axis=nan, h_axis_se=nan, h_outline=nan,
                                h_outline_se=nan, mean_counts=nan, per_rod=ones, reason="fewer than 3 observed sites",
                                **base)
    c, alpha, fit = _regression(s)
    if fit is None:
        why = "no counts at the observed sites" if not alpha > 0 else "the rods' radial positions do not spread"
        return RadialEfficiency(applied=False, a=nan, a_se=nan, c=c, h_axis=nan, h_axis_se=nan, h_outline=nan,
                                h_outline_se=nan, mean_counts=alpha, per_rod=ones, reason=why, **base)
    a, a_se = fit
    reason = None
    if n_rods < MIN_RODS:
        reason = f"only {n_rods} rods with observed sites (the radial fit needs at least {MIN_RODS})"
    elif not abs(a) > SIGNIFICANCE * a_se:
        reason = (f"no significant radial variation: a = {a:.3g} +- {a_se:.2g} "
                  f"(|a| within {SIGNIFICANCE:g} standard errors)")
    per_rod = ones
    if reason is None:
        per_rod = np.where(has, np.clip(1.0 + a * (np.nan_to_num(rod_rho) ** 2 - c), *H_CLIP), 1.0)
    return RadialEfficiency(applied=reason is None, a=a, a_se=a_se, c=c, h_axis=1.0 - a * c, h_axis_se=c * a_se,
                            h_outline=1.0 + a * (1.0 - c), h_outline_se=abs(1.0 - c) * a_se, mean_counts=alpha,
                            per_rod=per_rod, reason=reason, **base)


# ---------------------------------------------------------------------- terms of the model
@dataclass(frozen=True)
class RodTerms:
    """What the fit needs of a per-rod efficiency, for the rods a data object lists.

    Attributes
    ----------
    h_rows : (n_rows,) ndarray of float
        ``h`` of every row of the data's count array (what the compiled kernels take).
    h : (R,) ndarray of float
        ``h`` of the listed rods (those with an observed site), in their order.
    n_sites : (R,) ndarray of float
        Their observed sites ``N_r``.
    sum_h : float
        ``sum_r N_r h_r``: the observed sites weighted by efficiency.
    log_term : float
        ``sum_r T_r log h_r`` with ``T_r`` the rod's whole counts (integer parts, all channels).
    max_h : float
        Largest ``h`` of the listed rods (``eta`` is kept below ``1 / max_h``).
    """

    h_rows: np.ndarray
    h: np.ndarray
    n_sites: np.ndarray
    sum_h: float
    log_term: float
    max_h: float


def rod_terms(h_rows: np.ndarray, rods: np.ndarray, n_sites: np.ndarray, n_whole: np.ndarray) -> RodTerms:
    """:class:`RodTerms` from ``h`` per row, the listed rods and their observed sites and whole counts."""
    h_rows = np.ascontiguousarray(h_rows, dtype=np.float64)
    h = h_rows[rods]
    n_sites = np.asarray(n_sites, dtype=float)
    return RodTerms(h_rows=h_rows, h=h, n_sites=n_sites, sum_h=float(n_sites @ h),
                    log_term=float(np.asarray(n_whole, dtype=float) @ np.log(h)),
                    max_h=float(h.max()) if h.size else 1.0)


def with_rod_terms(data, h_rows):
    """A data object of the fit with the :class:`RodTerms` of ``h_rows`` as its ``eff``.

    Parameters
    ----------
    data : frozen dataclass
        The fit's data: either ``counts`` (n_rows, n_sites, K) and ``mask`` (n_rows, n_sites), or
        time-major ``x`` (L, R, K) and ``obs`` (L, R); and ``rods`` (R,), the rows it lists.
    h_rows : (n_rows,) ndarray of float or None
        Relative efficiency of every row of the counts; None returns ``data`` unchanged.
    """
    if h_rows is None:
        return data
    if hasattr(data, "counts"):
        n_sites, n_whole = (a[data.rods] for a in rod_whole_counts(data.counts, data.mask))
    else:
        n_sites, n_whole = data.obs.sum(axis=0), whole_counts(data.x, data.obs, time_major=True)
    return replace(data, eff=rod_terms(h_rows, data.rods, n_sites, n_whole))


def whole_counts(counts, mask, time_major: bool = False) -> np.ndarray:
    """Whole counts (integer parts, all channels) of every rod over its observed sites.

    Parameters
    ----------
    counts : (n_rods, n_sites, K) ndarray of float, or (n_sites, n_rods, K) when ``time_major``
    mask : (n_rods, n_sites) ndarray of bool, or (n_sites, n_rods) when ``time_major``

    Returns
    -------
    (n_rods,) ndarray of float
    """
    if time_major:
        return np.where(mask[:, :, None], np.floor(counts + 1e-9), 0.0).sum(axis=(0, 2))
    return rod_whole_counts(counts, mask)[1]


def eta_mstep(h, n_sites, detected, bounds) -> float:
    """Exact M-step of ``eta`` with per-rod efficiencies (module docstring).

    Parameters
    ----------
    h : (G,) ndarray of float
        Relative efficiency of each group of sites (a rod, or a distinct count vector).
    n_sites : (G,) ndarray of float
        Observed sites of each group.
    detected : (G,) ndarray of float
        Expected detected own ions of each group (``<= n_sites``).
    bounds : (float, float)
        Range of ``eta h`` (the detection probability); ``eta`` is kept in
        ``[bounds[0], bounds[1] / max(h)]``.

    Returns
    -------
    float
        The ``eta`` maximising ``sum_g D_g log(eta h_g) + (N_g - D_g) log(1 - eta h_g)``.
    """
    from scipy.optimize import brentq

    h = np.asarray(h, dtype=float)
    und = np.clip(np.asarray(n_sites, dtype=float) - detected, 0.0, None) * h
    d = float(np.sum(detected))
    lo, hi = bounds[0], min(bounds[1], bounds[1] / float(h.max()))

    def score(eta):  # eta times the derivative of the objective: decreasing in eta
        return d - eta * float(np.sum(und / (1.0 - eta * h)))

    if score(lo) <= 0.0:
        return float(lo)
    if score(hi) >= 0.0:
        return float(hi)
    return float(brentq(score, lo, hi, xtol=1e-15, rtol=4 * np.finfo(float).eps, maxiter=200))


def distinct_rows_by_group(blocks, n_groups: int):
    """Distinct count vectors per efficiency group, with multiplicities.

    Parameters
    ----------
    blocks : iterable of ((N_b, K) ndarray, (N_b,) ndarray of int)
        Count vectors of observed sites and the group (index of its ``h`` value) of each.
    n_groups : int

    Returns
    -------
    rows : (U, K) ndarray of float
    group : (U,) ndarray of int64
    mult : (U,) ndarray of float
    """
    parts = []
    k = None
    for x, g in blocks:
        k = x.shape[1]
        if not x.size:
            continue
        if np.array_equal(x, np.round(x)) and x.max() < 2 ** 15:
            base = int(x.max()) + 1
            if base ** k * n_groups < 2 ** 62:
                key = x.astype(np.int64) @ (base ** np.arange(k, dtype=np.int64)) + g * base ** k
                _, first, cnt = np.unique(key, return_index=True, return_counts=True)
                parts.append((x[first], g[first], cnt.astype(float)))
                continue
        rows, cnt = np.unique(np.column_stack([x, g]), axis=0, return_counts=True)
        parts.append((rows[:, :k], rows[:, k].astype(np.int64), cnt.astype(float)))
    if not parts:
        return np.zeros((0, k or 0)), np.zeros(0, np.int64), np.zeros(0)
    rows = np.column_stack([np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])])
    cnt = np.concatenate([p[2] for p in parts])
    uniq, inv = np.unique(rows, axis=0, return_inverse=True)
    mult = np.bincount(inv.reshape(-1), weights=cnt, minlength=len(uniq))
    return uniq[:, :-1], uniq[:, -1].astype(np.int64), mult


def distinct_rows_of_rods(counts, mask, row_group, n_groups: int, rows, block: int = 2048):
    """:func:`distinct_rows_by_group` of the observed sites of a count array, rod by rod.

    With whole counts whose distinct vectors are known (``rows``, e.g. those the compiled
    engine's summary found), one compiled pass counts the sites of every (vector, group) pair
    (:func:`probeseq.decoding.passes.group_row_counts`); otherwise the observed sites are taken a
    block of rods at a time through :func:`distinct_rows_by_group`. Both give the same arrays.

    Parameters
    ----------
    counts : (n_rows, n_sites, K) ndarray of float32 or float64, counts per site
    mask : (n_rows, n_sites) ndarray of bool
    row_group : (n_rows,) ndarray of int
        Efficiency group (index of its ``h`` value) of every row.
    n_groups : int
    rows : (U, K) ndarray of float
        Distinct count vectors of the observed sites (a superset does too; with one missing, or
        counts that are not whole, the blocks of rods are sorted instead).
    block : int
        Rods per block of that fallback.

    Returns
    -------
    rows : (U', K) ndarray of float
        Distinct (count vector, group) pairs' vectors, sorted lexicographically by vector
        (first channel first), then group.
    group : (U',) ndarray of int64
    mult : (U',) ndarray of float
        Observed sites of each pair.
    """
    table, order = group_row_counts(counts, mask, row_group, rows, n_groups)
    if table is not None:
        ix, grp = np.nonzero(table)  # row-major: vector, then group
        return np.asarray(rows, dtype=np.float64)[order[ix]], grp.astype(np.int64), table[ix, grp].astype(float)
    blocks = ((counts[b0:b0 + block][mask[b0:b0 + block]].astype(np.float64),
               np.repeat(row_group[b0:b0 + block], mask[b0:b0 + block].sum(axis=1)))
              for b0 in range(0, counts.shape[0], block))
    return distinct_rows_by_group(blocks, n_groups)
