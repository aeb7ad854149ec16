"""Groups-of-rods analysis, for runs whose single rods cannot be resolved.

When crosstalk mixes neighbouring rods, single-rod sequences cannot be read, but the metal
fraction of a *group* of n neighbouring rods at each depth site still carries the two numbers
that separate the arrangements: how far along the rods the metal correlation reaches, and how
strongly neighbouring rods copy each other. Ions that cross between rods of one group stay in
the group, so the group sums are much less affected by crosstalk than single rods.

Method
------
1. **Groups.** For every group size n the rods are tiled by squares of side
   ``sqrt(n * A)`` (A = convex-hull area of the rod positions per rod; a random offset from
   ``random_state``); a tile holding at least ``ceil(n / 2)`` rods is a group. ``n = 1`` is
   every rod alone.
2. **Detection model.** Each observed rod-site yields its own ion with probability ``eta``
   (Bernoulli, at most one) plus Poisson extras of total mean ``M`` whose composition is the
   overall composition ``f``. The total count ``T`` of a group-site of ``n`` rods then has
   mean ``n u`` with ``u = eta + M`` and variance ``n v`` with ``v = eta (1 - eta) + M``, so
   ``eta^2 = u - v`` (moments, from the largest group size with at least ``MIN_GROUPS``
   groups, least affected by crosstalk across group borders).
3. **Group fraction.** ``p_gm(t) = (S_gm(t) / n_g(t) - M f_m) / eta`` with ``S`` the summed
   counts of metal m and ``n_g(t)`` the rods of group g observed at site t; ``E[p] = q``, the
   true metal fraction of the group at that site. Its detection noise (binomial sampling of
   the ions) is known: the ions are detected independently of which metal they are, so the
   noise variance of channel m is the share ``f_m`` of the noise variance of the totals,
   ``Var(p_m | q) = v_n f_m / (eta^2 n)``, with ``v_n`` the variance of the totals per rod
   measured at that group size (which also covers crosstalk between rods); it is subtracted.
4. **Variance against n.** ``V(n) = mean[(p - f)^2] - noise``, summed over metals. For rods
   with per-site variance ``sigma^2`` and mean pairwise correlation ``rho`` within a group,
   ``V(n) = sigma^2 (1 + (n - 1) rho) / n = sigma^2 rho + sigma^2 (1 - rho) / n``: independent
   rods fall as 1/n, copied rods keep their variance. A weighted straight-line fit of V against
   ``mean(1/n)`` gives ``sigma^2`` (intercept + slope) and ``rho`` (intercept / sigma^2);
   when the columns are flagged not resolvable, sizes below ``UNRESOLVED_MIN_SIZE`` (blurred
   by crosstalk) are left out of the fit.
   ``rho_neighbours`` is a direct check from the covariance of single neighbouring rods
   (detection noise is independent between rods, so needs no correction).
5. **Along the rods.** The autocovariance ``C(k)`` of ``p - f`` between sites t and t + k
   (k >= 1) carries no detection noise (independent between sites). For a Markov chain with
   persistence lam (``A = lam I + (1 - lam) 1 f``), ``C(k) = C(0) lam^k``. lam is fitted to
   ``log C(k)`` over the lags from 1 while ``C(k)`` stays positive and above
   ``MIN_AUTOCORR`` of the noise-corrected variance; the correlation length is
   ``-1 / ln(lam)`` sites (times the pitch for nm). Periodic arrangements show up as an
   oscillating autocorrelation, reported in full.

Limits: depth blur moves ions between neighbouring sites and correlates the noise at lag 1;
crosstalk inside small groups adds apparent rod-to-rod correlation; fractional counts are
treated as counts in the moment estimates.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..exceptions import DataQualityWarning, InputError
from ..lattice.rodcolumns import RodColumns
from ..utils.marks import finite_or_none

__all__ = ['GroupResult', 'analyze_groups', 'tile_groups', 'MIN_GROUPS', 'MIN_AUTOCORR']

MIN_GROUPS = 8


"""Group sizes that give fewer groups than this are not analysed by default."""


MIN_AUTOCORR = 0.05


"""Lags whose autocorrelation falls below this are not used for the correlation length."""


MAX_LAG = 40


"""Default largest lag of the autocorrelation, sites."""


UNRESOLVED_MIN_SIZE = 4


"""Smallest group size used in the variance fit when the columns are not resolvable."""


@dataclass(frozen=True)
class GroupResult:
    """Metal-fraction statistics of groups of rods.

    Attributes
    ----------
    metals : tuple of str
    group_sizes : (n_sizes,) ndarray of int
        Nominal rods per group.
    n_groups : (n_sizes,) ndarray of int
    mean_rods : (n_sizes,) ndarray of float
        Mean observed rods per group-site.
    inv_size : (n_sizes,) ndarray of float
        Mean of 1 / (observed rods) over group-sites (the regressor of the variance fit).
    variance : (n_sizes,) ndarray of float
        Noise-corrected variance of the group metal fraction, summed over metals.
    variance_raw, noise_variance : (n_sizes,) ndarray of float
        Before correction, and the subtracted detection-noise term.
    variance_per_metal : (n_sizes, K) ndarray of float
    variance_independent : (n_sizes,) ndarray of float
        What independent rods would give: ``sigma2_expected * inv_size``.
    sigma2, sigma2_expected : float
        Fitted per-site variance, and ``1 - sum f^2`` (the variance of a metal indicator).
    rho : float
        Fitted rod-to-rod correlation within a group.
    rho_per_size : (n_sizes,) ndarray of float
        ``rho`` implied by each size alone (nan for single rods).
    rho_neighbours : float
        Correlation of neighbouring single rods (nan without neighbour pairs).
    lags : (n_lags,) ndarray of int, sites
    autocovariance, autocorrelation : (n_sizes, n_lags) ndarray of float
        Along-depth autocovariance of the group fraction (lag 0 noise-corrected) and its ratio
        to lag 0.
    persistence : float
        Fitted lam of ``C(k) ~ lam^k`` (0 when no correlation is found).
    correlation_length_sites, correlation_length_nm : float
        ``-1 / ln(lam)`` in sites and nm.
    correlation_size : int
        Group size the correlation length was read from (the smallest).
    eta, extra_rate : float
        Moment estimates of the detection efficiency and of the extra counts per rod-site.
    composition : (K,) ndarray of float
    warnings : list of str
    """

    metals: tuple
    group_sizes: np.ndarray
    n_groups: np.ndarray
    mean_rods: np.ndarray
    inv_size: np.ndarray
    variance: np.ndarray
    variance_raw: np.ndarray
    noise_variance: np.ndarray
    variance_per_metal: np.ndarray
    variance_independent: np.ndarray
    sigma2: float
    sigma2_expected: float
    rho: float
    rho_per_size: np.ndarray
    rho_neighbours: float
    lags: np.ndarray
    autocovariance: np.ndarray
    autocorrelation: np.ndarray
    persistence: float
    correlation_length_sites: float
    correlation_length_nm: float
    correlation_size: int
    eta: float
    extra_rate: float
    composition: np.ndarray
    warnings: list = field(default_factory=list)

    def to_dict(self) -> dict:
        """JSON-serialisable summary."""

        num = finite_or_none

        def arr(a):
            return [num(v) for v in np.asarray(a, dtype=float).ravel()]

        return {
            "metals": list(self.metals),
            "group_sizes": [int(n) for n in self.group_sizes],
            "n_groups": [int(n) for n in self.n_groups],
            "mean_rods": arr(self.mean_rods),
            "variance": arr(self.variance),
            "variance_raw": arr(self.variance_raw),
            "noise_variance": arr(self.noise_variance),
            "variance_independent": arr(self.variance_independent),
            "sigma2": num(self.sigma2),
            "sigma2_expected": num(self.sigma2_expected),
            "rho": num(self.rho),
            "rho_per_size": arr(self.rho_per_size),
            "rho_neighbours": num(self.rho_neighbours),
            "lags_sites": [int(k) for k in self.lags],
            "autocorrelation": [arr(row) for row in self.autocorrelation],
            "persistence": num(self.persistence),
            "correlation_length_sites": num(self.correlation_length_sites),
            "correlation_length_nm": num(self.correlation_length_nm),
            "correlation_size": int(self.correlation_size),
            "eta": num(self.eta),
            "extra_rate_per_site": num(self.extra_rate),
            "composition": arr(self.composition),
            "warnings": list(self.warnings),
        }


def _area_per_rod(xy: np.ndarray) -> float:
    n = len(xy)
    area = 0.0
    if n >= 3:
        try:
            from scipy.spatial import ConvexHull

            area = float(ConvexHull(xy).volume)
        except Exception:  # collinear or duplicate points: fall back to the bounding box
            area = 0.0
    if area <= 0:
        span = np.ptp(xy, axis=0)
        area = float(np.prod(np.where(span > 0, span, 1.0)))
    return area / n


def tile_groups(rod_xy_nm, n: int, random_state=None) -> np.ndarray:
    """Assign rods to square tiles holding about ``n`` rods each.

    Parameters
    ----------
    rod_xy_nm : (n_rods, 2) ndarray of float, nm
        Rod positions.
    n : int
        Target rods per group.
    random_state : None, int or numpy.random.Generator
        Seed of the tile offset.

    Returns
    -------
    (n_rods,) ndarray of int
        Group label of every rod, -1 for rods in tiles with fewer than ``ceil(n / 2)`` rods.
    """
    xy = np.asarray(rod_xy_nm, dtype=float).reshape(-1, 2)
    if n <= 1:
        return np.arange(len(xy))
    rng = np.random.default_rng(random_state)
    side = math.sqrt(n * _area_per_rod(xy))
    off = rng.uniform(0.0, side, size=2)
    cell = np.floor((xy - xy.min(axis=0) + off) / side).astype(np.int64)
    _, label, size = np.unique(cell, axis=0, return_inverse=True, return_counts=True)
    label = label.reshape(-1)
    keep = size >= math.ceil(n / 2)
    new = np.full(size.size, -1)
    new[keep] = np.arange(keep.sum())
    return new[label]


def _group_sums(x: np.ndarray, obs: np.ndarray, labels: np.ndarray):
    used = np.flatnonzero(labels >= 0)
    order = used[np.argsort(labels[used], kind="stable")]
    lab = labels[order]
    starts = np.flatnonzero(np.r_[True, lab[1:] != lab[:-1]])
    s = np.add.reduceat(x[order], starts, axis=0)
    n = np.add.reduceat(obs[order].astype(np.int64), starts, axis=0)
    return s, n


def _deviation(s, n, eta, extra, comp):
    valid = n > 0
    nn = np.where(valid, n, 1)[:, :, None]
    p = (s / nn - extra * comp) / eta
    d = np.where(valid[:, :, None], p - comp, 0.0)
    return d, valid


def _autocov(d, valid, max_lag):
    """Autocovariance of the group deviations at lags 1..max_lag and its standard error (NaN where
    fewer than 2 site pairs), in squared site fractions."""
    n_sites = d.shape[1]
    out = np.full(max_lag + 1, np.nan)
    err = np.full(max_lag + 1, np.nan)
    for k in range(1, max_lag + 1):
        if k >= n_sites:
            break
        both = valid[:, :-k] & valid[:, k:]
        cnt = both.sum()
        if cnt < 2:
            continue
        prod = (d[:, :-k] * d[:, k:]).sum(axis=2)[both]
        out[k] = prod.mean()
        err[k] = prod.std() / math.sqrt(cnt)
    return out, err


def _fit_persistence(cov, cov_err, var0):
    """lam from log C(k) = a + k log lam over the leading lags with clear positive C(k).

    ``cov_err`` is the standard error of ``cov`` (same unit)."""
    if not (np.isfinite(cov[1]) and cov[1] > 2.0 * cov_err[1] and var0 > 0):
        return 0.0
    ks = []
    for k in range(1, cov.size):
        if not (np.isfinite(cov[k]) and cov[k] > 0 and cov[k] >= MIN_AUTOCORR * var0 and cov[k] > cov_err[k]):
            break
        ks.append(k)
    if len(ks) < 2:
        return float(min(cov[1] / var0, 1.0))
    ks = np.asarray(ks)
    slope = np.polyfit(ks, np.log(cov[ks]), 1)[0]
    return float(min(math.exp(slope), 1.0))


def analyze_groups(columns: RodColumns, group_sizes=None, random_state=None, max_lag: int = MAX_LAG) -> GroupResult:
    """Metal-fraction variance and autocorrelation of groups of n rods, for several n.

    Parameters
    ----------
    columns : RodColumns
        Counts per rod, site and metal channel, with rod positions ``rod_xy_nm``.
    group_sizes : sequence of int, optional
        Rods per group. Default 1, 2, 4, 8, ... while at least ``MIN_GROUPS`` groups result.
    random_state : None, int or numpy.random.Generator
        Seed of the tile offsets.
    max_lag : int, sites
        Largest lag of the along-depth autocorrelation.

    Returns
    -------
    GroupResult

    Raises
    ------
    InputError
        Fewer than 4 rods, all sites masked, fewer than two metals with counts, negative
        counts, bad group sizes, or fewer than two group sizes that form at least two groups.

    Warns
    -----
    DataQualityWarning
        The count totals are over-dispersed, so the detection efficiency cannot be estimated
        from their moments (it is then set to the mean count per rod-site).
    """
    x, per_metal, max_lag = _checked_counts(columns, max_lag)
    m = columns.mask
    n_rods, _, k = columns.counts.shape
    rng = np.random.default_rng(random_state)
    notes = []
    sizes = _group_size_list(group_sizes, n_rods)
    comp = per_metal / per_metal.sum()
    groups = _tile_all_sizes(columns, x, m, sizes, rng, notes)
    eta, extra, u = _detection_rates(groups, notes)
    out, var_metal, acov, acov_err, d1 = _variance_by_size(groups, eta, extra, u, comp, k, max_lag)
    h, vv = out["inv_size"], out["var"]
    sigma2, rho, rho_n = _fit_variance_law(out, groups, columns.resolvable)
    sigma2_exp = float(1.0 - (comp**2).sum())
    rho_nb = _neighbour_correlation(columns, x, d1, sigma2, eta, extra, comp)

    # along-rod correlation from the smallest group size
    lam = _fit_persistence(acov[0], acov_err[0], acov[0, 0])
    length = _correlation_length(lam)
    with np.errstate(divide="ignore", invalid="ignore"):
        acorr = acov / acov[:, :1]

    return GroupResult(
        metals=tuple(columns.metals),
        group_sizes=np.array([gr[0] for gr in groups], dtype=np.int64),
        n_groups=np.array([gr[1] for gr in groups], dtype=np.int64),
        mean_rods=out["mean_rods"],
        inv_size=h,
        variance=vv,
        variance_raw=out["var_raw"],
        noise_variance=out["noise"],
        variance_per_metal=var_metal,
        variance_independent=sigma2_exp * h,
        sigma2=sigma2,
        sigma2_expected=sigma2_exp,
        rho=rho,
        rho_per_size=rho_n,
        rho_neighbours=rho_nb,
        lags=np.arange(max_lag + 1),
        autocovariance=acov,
        autocorrelation=acorr,
        persistence=lam,
        correlation_length_sites=length,
        correlation_length_nm=length * float(columns.pitch_nm),
        correlation_size=int(groups[0][0]),
        eta=float(eta),
        extra_rate=float(extra),
        composition=comp,
        warnings=notes,
    )


def _checked_counts(columns, max_lag):
    """Validate the input; return the masked counts, the totals per metal and the usable max lag."""
    if not isinstance(columns, RodColumns):
        raise InputError(f"columns must be a probeseq.lattice.rodcolumns.RodColumns, got {type(columns).__name__}")
    c, m = columns.counts, columns.mask
    n_rods, n_sites, k = c.shape
    if n_rods < 4:
        raise InputError(f"columns: the groups analysis needs at least 4 rods, got {n_rods}")
    if not m.any():
        raise InputError(f"columns.mask: all {m.size} sites are masked; nothing to analyse")
    x = np.where(m[:, :, None], c, 0.0)
    if not np.all(np.isfinite(x)) or np.any(x < 0):
        raise InputError("columns.counts: counts at unmasked sites must be finite and >= 0")
    per_metal = x.sum(axis=(0, 1))
    if (per_metal > 0).sum() < 2 or k < 2:
        raise InputError(
            f"columns.counts: need counts in at least two metal channels, found"
            f" {[columns.metals[i] for i in np.flatnonzero(per_metal > 0)]}"
        )
    if not (isinstance(max_lag, (int, np.integer)) and max_lag >= 1):
        raise InputError(f"max_lag must be an integer >= 1, got {max_lag!r}")
    max_lag = int(min(max_lag, n_sites - 1)) if n_sites > 1 else 0
    return x, per_metal, max_lag


def _group_size_list(group_sizes, n_rods):
    """The sorted group sizes: the given ones (checked) or 1, 2, 4, ... while enough groups form."""
    if group_sizes is None:
        sizes = [1]
        while (2 * sizes[-1]) * MIN_GROUPS <= n_rods:
            sizes.append(2 * sizes[-1])
        if len(sizes) < 2:
            sizes.append(2)
    else:
        sizes = sorted({int(v) for v in np.atleast_1d(group_sizes)})
        if any(v < 1 for v in sizes) or any(float(v) != int(v) for v in np.atleast_1d(group_sizes)):
            raise InputError(f"group_sizes must be positive integers, got {group_sizes!r}")
    return sizes


def _tile_all_sizes(columns, x, m, sizes, rng, notes):
    """Tile the rods into groups for each size; return (n, groups, sums, counts) per usable size."""
    groups = []
    for n in sizes:
        labels = tile_groups(columns.rod_xy_nm, n, rng)
        g = int(labels.max()) + 1 if labels.size and labels.max() >= 0 else 0
        if g < 2:
            notes.append(f"group size {n}: fewer than 2 groups of rods; size dropped")
            continue
        s, cnt = _group_sums(x, m, labels)
        groups.append((n, g, s, cnt))
    if len(groups) < 2:
        raise InputError(
            f"group_sizes {sizes}: need at least two group sizes that form 2 or more groups of rods"
            f" ({columns.counts.shape[0]} rods)"
        )
    return groups


def _detection_rates(groups, notes):
    """Detection efficiency, extra rate and mean total per rod-site from the count-total moments."""
    enough = [gr for gr in groups if gr[1] >= MIN_GROUPS] or groups[:1]
    _, _, s_m, n_m = enough[-1]
    tot = s_m.sum(axis=2)
    ok = n_m > 0
    u = tot[ok].sum() / n_m[ok].sum()
    v = float(((tot[ok] - n_m[ok] * u) ** 2).sum() / n_m[ok].sum())
    if u - v > 1e-6:
        eta = min(math.sqrt(u - v), 1.0)
    else:
        eta = min(u, 1.0)
        msg = (
            f"count totals are over-dispersed (mean {u:.3g}, variance {v:.3g} per rod-site): the"
            f" detection efficiency cannot be read from their moments; using eta = {eta:.3g}"
        )
        notes.append(msg)
        warnings.warn(msg, DataQualityWarning, stacklevel=3)
    extra = max(u - eta, 0.0)
    return eta, extra, u


def _variance_by_size(groups, eta, extra, u, comp, k, max_lag):
    """Noise-corrected variance and autocovariance per group size; also the single-rod deviations."""
    n_sizes = len(groups)
    out = {key: np.zeros(n_sizes) for key in ("mean_rods", "inv_size", "var", "var_raw", "noise", "weight")}
    var_metal = np.zeros((n_sizes, k))
    acov = np.full((n_sizes, max_lag + 1), np.nan)
    acov_err = np.full((n_sizes, max_lag + 1), np.nan)
    d1 = None
    for i, (n, g, s, cnt) in enumerate(groups):
        d, valid = _deviation(s, cnt, eta, extra, comp)
        nv = cnt[valid].astype(float)
        raw_m = (d[valid] ** 2).mean(axis=0)
        # detection noise: the variance of the totals per observed rod at this size
        # (independent of the metals present), shared out over the channels by composition
        tot = s.sum(axis=2)[valid]
        v_n = float(((tot - nv * u) ** 2).sum() / nv.sum())
        noise_m = v_n / eta**2 * comp * np.mean(1.0 / nv)
        var_metal[i] = raw_m - noise_m
        out["var_raw"][i] = raw_m.sum()
        out["noise"][i] = noise_m.sum()
        out["var"][i] = var_metal[i].sum()
        out["mean_rods"][i] = nv.mean()
        out["inv_size"][i] = np.mean(1.0 / nv)
        out["weight"][i] = nv.size / max(raw_m.sum(), 1e-12) ** 2
        acov[i, 1:], acov_err[i, 1:] = (a[1:] for a in _autocov(d, valid, max_lag))
        acov[i, 0] = out["var"][i]
        if n == 1:
            d1 = (d, valid)
    return out, var_metal, acov, acov_err, d1


def _fit_variance_law(out, groups, resolvable):
    """Fit V = a + b/n; return sigma^2 = a + b, rho = a / sigma^2 and rho per group size."""
    # when single rods are not resolvable, crosstalk blurs the smallest groups, which are left
    # out of the fit
    h, vv, w = out["inv_size"], out["var"], out["weight"]
    n_sizes = len(groups)
    sizes_used = np.array([gr[0] for gr in groups])
    fit = sizes_used >= (1 if resolvable else UNRESOLVED_MIN_SIZE)
    if fit.sum() < 2:
        fit[:] = True
    design = np.column_stack([np.ones(n_sizes), h])[fit] * np.sqrt(w[fit])[:, None]
    (a_fit, b_fit), *_ = np.linalg.lstsq(design, vv[fit] * np.sqrt(w[fit]), rcond=None)
    sigma2 = float(a_fit + b_fit)
    rho = float(a_fit / sigma2) if sigma2 > 0 else float("nan")
    with np.errstate(divide="ignore", invalid="ignore"):
        rho_n = np.where(h < 1 - 1e-9, (vv / sigma2 - h) / (1 - h), np.nan) if sigma2 > 0 else np.full(n_sizes, np.nan)
    return sigma2, rho, rho_n


def _neighbour_correlation(columns, x, d1, sigma2, eta, extra, comp):
    """Correlation of the deviations of neighbouring single rods (NaN when it cannot be formed)."""
    rho_nb = float("nan")
    pairs = columns.neighbours
    if pairs.size and sigma2 > 0:
        if d1 is None:
            s1, c1 = _group_sums(x, columns.mask, np.arange(columns.counts.shape[0]))
            d1 = _deviation(s1, c1, eta, extra, comp)
        d, valid = d1
        i, j = pairs[:, 0], pairs[:, 1]
        both = valid[i] & valid[j]
        if both.any():
            rho_nb = float((d[i] * d[j]).sum(axis=2)[both].mean() / sigma2)
    return rho_nb


def _correlation_length(lam):
    """Correlation length in sites, -1 / ln(lam), for persistence lam (0 and inf at the ends)."""
    if lam <= 0:
        return 0.0
    if lam >= 1:
        return float("inf")
    return -1.0 / math.log(lam)
