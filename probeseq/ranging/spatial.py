"""Refit overlapped ranges from the ions' mass-to-charge and their distance to the rod axes together.

Where a metal line and a fragment line coincide (24Mg+ and C2+ at 24 Da, 26Mg2+ and CH+ at 13 Da),
the spectrum alone cannot always split a range: the isotope and charge-state pattern may leave
the amounts undetermined, and the least-squares fit then picks a vertex (all of it one species).
Space can: metal ions sit on the rod axes (their distance to the nearest axis follows the blurred
rod), linker fragments and background fill the space between. After the lattice is registered:

1. **Reference profiles.** The distances (in units of the nearest-rod distance, binned) of ions in
   clean metal ranges (the fit's metal share >= 0.97, no non-metal species in the range's design)
   give the metal profile ``g_M``; those of clean non-metal ranges (metal share <= 0.03, no metal
   species in the design) give the fragment profile ``g_F``. Both are measured on the run itself,
   so no model of the blur or of the linker region is assumed. The shares that pick the clean
   ranges are of the species' ions alone, and the background the clean metal ranges hold (spread
   as evenly as the fragments) is taken out of ``g_M``, so a high background neither empties the
   metal reference nor makes every share read high.
2. **Each overlapped range** (its design holds a metal species and a non-metal species, whatever
   their fitted amounts) gets the maximum-likelihood metal share ``w`` of the binned mixture
   ``w g_M + (1 - w) g_F`` of its ions' distances, with the standard error from the Fisher
   information (``sum_b h_b (g_M - g_F)^2 / p_b^2``), and a profile-likelihood 95 % interval.
3. **Joint refit.** Each such range adds a row to the amounts fit, "the metal species hold the
   share ``w`` of this range's expected ions" (a ratio, linearised), weighted by that standard
   error; the isotope patterns and charge states of every species still tie all lines together.
   The composition and the ranges' shares follow from the refitted amounts.

A range whose profiles do not differ (too few reference ions, or rods not resolved) is left as the
spectrum fit it.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import replace

import numpy as np

from ..exceptions import DataQualityWarning
from .isotopes import ion_label

__all__ = ["refine_overlaps", "warn_unrefined", "mixture_share", "mixed_ranges", "warn_undetermined"]

#: distance bins, in units of the nearest-rod distance (the last bin takes everything farther)
_EDGES = np.concatenate([np.linspace(0.0, 0.6, 13), [np.inf]])

#: fewest ions of a reference profile, and of an overlapped range to refit
MIN_REFERENCE_IONS = 300
MIN_RANGE_IONS = 30

#: a range's spatial share is used only when it is at least this informative (standard error)
MAX_SHARE_SE = 0.2


def _profile(u) -> np.ndarray:
    h = np.histogram(u, _EDGES)[0].astype(float)
    return h


def mixture_share(h, g_m, g_f):
    """Maximum-likelihood share ``w`` of profile ``g_m`` in the binned counts ``h`` of a mixture
    ``w g_m + (1 - w) g_f``.

    Parameters
    ----------
    h : (n_bins,) array of float
        Counts per distance bin.
    g_m, g_f : (n_bins,) array of float
        The two profiles, each summing to 1.

    Returns
    -------
    w : float
        In [0, 1].
    se : float
        Standard error from the Fisher information at ``w``.
    low, high : float
        Profile-likelihood 95 % interval (log-likelihood within 1.92 of the maximum), honest at a
        bound (a share of 0 gets an interval [0, high], not a zero error).
    """
    from scipy.optimize import minimize_scalar

    h = np.asarray(h, float)
    g_m = np.maximum(np.asarray(g_m, float), 1e-12)
    g_f = np.maximum(np.asarray(g_f, float), 1e-12)

    def nll(w):
        return -float(np.sum(h * np.log(w * g_m + (1.0 - w) * g_f)))

    res = minimize_scalar(nll, bounds=(0.0, 1.0), method="bounded", options={"xatol": 1e-7})
    w = float(res.x)
    for edge in (0.0, 1.0):
        if nll(edge) <= nll(w):
            w = edge
    p = w * g_m + (1.0 - w) * g_f
    info = float(np.sum(h * (g_m - g_f) ** 2 / p ** 2))
    se = 1.0 / math.sqrt(info) if info > 0 else math.inf
    top = nll(w) + 1.92
    grid = np.linspace(0.0, 1.0, 2001)
    inside = grid[np.array([nll(v) <= top for v in grid])]
    low, high = (float(inside.min()), float(inside.max())) if inside.size else (w, w)
    return w, se, low, high


def mixed_ranges(rr) -> np.ndarray:
    """(n_ranges,) bool: ranges whose design holds a line (>= 2 % of a pattern) of a metal species
    and one of a non-metal species, whatever their fitted amounts: the ranges space may split."""
    if rr.fit_rows is None or not len(rr.ranges):
        return np.zeros(len(rr.ranges), dtype=bool)
    A = rr.fit_rows[0][:len(rr.ranges)]
    is_metal = np.asarray(rr.species_metal_atoms).sum(axis=1) > 0
    return (A[:, is_metal] >= 0.02).any(1) & (A[:, ~is_metal] >= 0.02).any(1)


def _split_state(rr):
    """What the refit and its warnings need of a ranging result's spectrum fit.

    Returns
    -------
    A : (n_ranges, n_species) ndarray
        The design rows of the ranges.
    is_metal : (n_species,) ndarray of bool
    mixed, clean_m, clean_f : (n_ranges,) ndarray of bool
        Ranges with a metal and a non-metal line (:func:`mixed_ranges`); clean metal and clean
        fragment ranges (the metal share of the fitted species' ions >= 0.97, resp. <= 0.03, and
        no line of the other kind; judged without the background, so a clean line stays clean
        under a high background).
    w_fit : (n_ranges,) ndarray
        The fit's metal share of each range's ions, background included.
    """
    A = rr.fit_rows[0][:len(rr.ranges)]
    is_metal = np.asarray(rr.species_metal_atoms, float).sum(axis=1) > 0
    mu = A * rr.amounts[None, :]
    tot = mu.sum(1) + np.maximum(rr.background_counts, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        w_fit = np.where(tot > 0, mu[:, is_metal].sum(1) / tot, 0.0)
        w_ions = np.where(mu.sum(1) > 0, mu[:, is_metal].sum(1) / mu.sum(1), 0.0)
    has_m = (A[:, is_metal] >= 0.02).any(1)
    has_f = (A[:, ~is_metal] >= 0.02).any(1)
    clean_m = (w_ions >= 0.97) & ~has_f
    clean_f = (w_ions <= 0.03) & ~has_m
    return A, is_metal, mixed_ranges(rr), clean_m, clean_f, w_fit


def warn_unrefined(rr, why: str) -> None:
    """The warnings of :func:`refine_overlaps` for a ranging result that is not refitted (no rod
    lattice, e.g. the ``range`` command): each metal whose composition rests on a split of
    overlapped ranges that space did not check, with ``why`` (what would check it)."""
    if rr.fit_rows is None or not len(rr.ranges):
        return
    A, is_metal, mixed, clean_m, _, w_fit = _split_state(rr)
    if mixed.any():
        _warn_unseparated(rr, A, is_metal, mixed, clean_m, why, w_fit)


def refine_overlaps(rr, range_index, distance_nm, d_nn_nm: float):
    """Refit the overlapped ranges of a ranging result with the ions' distance to the rod axes.

    Parameters
    ----------
    rr : RangingResult
        From :func:`probeseq.ranging.auto.auto_range` (needs its ``fit_rows``).
    range_index : (n_ions,) array of int
        Range of each ion of the sample the distances belong to (-1 unranged).
    distance_nm : (n_ions,) array of float, nm
        Distance of each ion to the nearest rod axis (``inf`` where unknown).
    d_nn_nm : float, nm
        Nearest-rod distance of the lattice (the distance unit of the profiles).

    Returns
    -------
    RangingResult
        With refitted amounts, composition and range shares, and ``overlap_refinement`` telling
        what changed; ``rr`` itself when nothing could be refined.
    """
    from .amounts import _composition, _solve_amounts, bound_errors
    from .auto import _share_ranges

    if rr.fit_rows is None or not len(rr.ranges):
        return rr
    A_all, gross_all, bg_all, bgs_all = rr.fit_rows
    n_r = len(rr.ranges)
    A, is_metal, mixed, clean_m, clean_f, w_fit = _split_state(rr)
    ri = np.asarray(range_index)
    u = np.asarray(distance_nm, float) / float(d_nn_nm)
    ok = np.isfinite(u) & (ri >= 0)
    ri, u = ri[ok], u[ok]
    prof = np.stack([_profile(u[ri == j]) for j in range(n_r)])
    g_m, g_f = prof[clean_m].sum(0), prof[clean_f].sum(0)
    if g_m.sum() < MIN_REFERENCE_IONS or g_f.sum() < MIN_REFERENCE_IONS:
        _warn_unseparated(rr, A, is_metal, mixed, clean_m, "too few ions of clean metal or fragment lines "
                          "to tell them apart by their distance to the rod axes", w_fit)
        return rr
    g_m, g_f = g_m / g_m.sum(), g_f / g_f.sum()
    # the clean metal ranges hold some background, spread as evenly as the fragments: take it out, or
    # every share would read high by the factor 1 / (1 - that background share)
    b_m = float(np.sum(np.maximum(rr.background_counts[clean_m], 0.0)) / max(float(np.sum(gross_all[:n_r][clean_m])), 1.0))
    if 0.0 < b_m < 0.5:
        g_m = np.maximum(g_m - b_m * g_f, 0.0)
        g_m = g_m / g_m.sum()
    rows, report = [], []
    for j in np.flatnonzero(mixed):
        n_j = prof[j].sum()
        if n_j < MIN_RANGE_IONS:
            continue
        w, se, lo, hi = mixture_share(prof[j], g_m, g_f)
        used = se <= MAX_SHARE_SE
        r = rr.ranges[j]
        report.append({"low_da": float(r.low_da), "high_da": float(r.high_da), "ions": int(n_j),
                       "metal_share_spectrum": float(w_fit[j]), "metal_share_space": w,
                       "metal_share_space_err": se, "metal_share_space_low": lo, "metal_share_space_high": hi,
                       "used": bool(used)})
        if used:
            rows.append((j, w, max(se, 1.0 / n_j)))
    if not rows:
        _warn_unseparated(rr, A, is_metal, mixed, clean_m, "their ions are not told apart by their "
                          "distance to the rod axes", w_fit)
        return replace(rr, overlap_refinement=tuple(report))
    A_x, c_x, sd_x = _share_rows(A, gross_all[:n_r], rr.background_counts, is_metal, rows)
    # species in play: those the spectrum fit used, and the metal species of the refitted ranges
    real_line = (A[[j for j, _, _ in rows]] >= 0.02).any(0)
    active = (rr.amounts > 0) | (real_line & is_metal)
    sub, sub_cov, _ = _solve_amounts(A_all[:, active], gross_all, bg_all, bgs_all, extra=(A_x[:, active], c_x, sd_x))
    amounts = np.zeros(active.size)
    cov = np.zeros((active.size, active.size))
    amounts[active] = sub
    cov[np.ix_(active, active)] = sub_cov
    if not np.isfinite(amounts).all() or amounts.sum() > 2.0 * max(float(np.sum(gross_all)), 1.0):
        return replace(rr, overlap_refinement=tuple(dict(d, used=False) for d in report))
    M, M_sig, x, x_sig = _composition(amounts, cov, np.asarray(rr.species_metal_atoms, float))
    mu_new = A * amounts[None, :]
    ranges, deconv = _share_ranges(rr.ranges, mu_new, rr.background_counts, list(rr.species), rr.metals,
                                   bool((rr.range_peak >= 0).all()))
    _warn_split(rr, x, x_sig, A, is_metal, [j for j, _, _ in rows])
    return replace(rr, ranges=ranges, deconvolved=tuple(deconv), amounts=amounts,
                   amounts_sigma=bound_errors(A_all, gross_all, bg_all, bgs_all, amounts, cov,
                                              extra=(A_x, c_x, sd_x)),
                   metal_atoms=M, metal_atoms_sigma=M_sig,
                   composition=x, composition_sigma=x_sig, overlap_refinement=tuple(report),
                   composition_spectrum=np.asarray(rr.composition, float))


def _share_rows(A, counts, background, is_metal, rows):
    """The extra rows of the joint refit: in each range ``j`` of ``rows`` (``(j, w, se)``), the metal
    species hold the share ``w`` of the expected ions, ``m_j / (m_j + f_j + b_j) = w``.

    Written linearly in the amounts, ``sum_s (A_js [s is metal] - w A_js) n_s = w b_j``, with the
    standard deviation ``se * t_j`` (``t_j`` the range's ions, ``counts[j]``). The row
    is about the split of the range's ions, not their number: the Poisson scatter of the range's
    count is already in its own row, and a row "metal = w x counts" would count it twice, pulling
    the metal's amount onto the one isotope line that overlaps (whose count scatters with the
    isotope draw) instead of all its lines. Every metal species counts as metal, also by the far
    tail of a line: space tells metal ions from the rest, whatever their line.

    The share is held to [0, 1]. At 1 the row holds no metal amount (its coefficient ``1 - w`` is
    zero), so a nearly pure metal range read as pure pulls nothing; an unbounded share above 1
    would ask for more metal than ions and pull the metal's amount down.

    Returns
    -------
    A_x : (n_rows, n_species) ndarray
    c_x, sd_x : (n_rows,) ndarray
    """
    A_x, c_x, sd_x = [], [], []
    for j, w, se in rows:
        metal = np.where(is_metal, A[j], 0.0)
        b = max(float(background[j]), 0.0)
        t = float(counts[j])
        A_x.append(metal - w * A[j])
        c_x.append(w * b)
        sd_x.append(se * max(t, 1.0))
    return np.stack(A_x), np.asarray(c_x), np.asarray(sd_x)


def _range_species(rr, A, j) -> str:
    """'23.93-24.31 Da (Mg+, C2+)': a range and the species with a line in it."""
    r = rr.ranges[j]
    sp = [ion_label(*rr.species[s]) for s in np.flatnonzero(A[j] >= 0.02)]
    return f"{r.low_da:.2f}-{r.high_da:.2f} Da ({', '.join(sp)})"


def _warn_split(rr, x, x_sig, A, is_metal, refined):
    """Warn for every metal whose composition moved when the overlapped ranges were refitted."""
    atoms = np.asarray(rr.species_metal_atoms) > 0
    for k, el in enumerate(rr.metals):
        before, after = float(rr.composition[k]), float(x[k])
        if not abs(after - before) > max(0.02, 2.0 * float(x_sig[k])):
            continue
        where = [_range_species(rr, A, j) for j in refined if (A[j, atoms[:, k]] >= 0.02).any()]
        if not where:  # moved only because another metal's share changed
            continue
        warnings.warn(f"{el}: its composition depends on how overlapped ranges are split ({'; '.join(where[:4])}): "
                      f"{after:.3f} with the ions' distance to the rod axes, {before:.3f} from the mass spectrum "
                      "alone", DataQualityWarning, stacklevel=3)


def _warn_unseparated(rr, A, is_metal, mixed, clean_m, why, w_fit=None):
    """Warn for a metal whose lines in overlapped ranges could not be checked by space: every line
    of it overlaps, or (``w_fit``, the spectrum fit's metal share of each range) the spectrum gave
    it none of the ions of a range that holds its line (the fit's vertex: all to the other species,
    as at 24 Da for Mg+ under C2+), so its composition may miss them although clean lines of it
    (MgO+, 25Mg2+) give it some."""
    atoms = np.asarray(rr.species_metal_atoms) > 0
    for k, el in enumerate(rr.metals):
        own = (A[:, atoms[:, k]] >= 0.02).any(1)
        if not own.any() or not (own & mixed).any():
            continue
        if not (own & clean_m).any():
            where = [_range_species(rr, A, j) for j in np.flatnonzero(own & mixed)]
            warnings.warn(f"{el}: every line overlaps another species and {why} ({'; '.join(where[:4])}); its "
                          "composition rests on the isotope pattern alone. A higher resolving power, or a range file "
                          "with known shares (--ranges), would help", DataQualityWarning, stacklevel=3)
            continue
        lost = own & mixed & (np.asarray(w_fit) < 0.03) if w_fit is not None else np.zeros_like(own)
        if lost.any():
            where = [_range_species(rr, A, j) for j in np.flatnonzero(lost)]
            warnings.warn(f"{el}: the mass spectrum gives it none of the ions of {'; '.join(where[:4])}, where its "
                          f"lines sit under other species', and {why}; its composition may miss those ions. A higher "
                          "resolving power, or a range file with known shares (--ranges), would help",
                          DataQualityWarning, stacklevel=3)


def warn_undetermined(rr) -> None:
    """Warn when a metal's own M+ or M2+ ions could not be told apart from other species.

    After every refit, a metal ion (M+ or M2+) that has lines in the ranges but sits at zero with an
    undetermined error (its lines are a combination of other species' lines, and space did not
    separate them) means the metal's composition may miss those ions: the warning names the species
    that cover its lines and what would help.
    """
    if rr.fit_rows is None or not len(rr.ranges):
        return
    A = rr.fit_rows[0][:len(rr.ranges)]
    for s, (formula, charge) in enumerate(rr.species):
        if formula not in rr.metals or charge not in (1, 2):
            continue
        if rr.amounts[s] > 0 or math.isfinite(float(rr.amounts_sigma[s])) or not (A[:, s] >= 0.02).any():
            continue
        rows = np.flatnonzero(A[:, s] >= 0.02)
        others = sorted({ion_label(*rr.species[o]) for j in rows for o in np.flatnonzero(A[j] >= 0.02)
                         if o != s and rr.amounts[o] > 0})
        warnings.warn(f"{formula}: {ion_label(formula, charge)} cannot be told apart from {', '.join(others) or 'other species'} "
                      f"(its lines are covered by theirs), so the composition of {formula} may miss its "
                      f"{ion_label(formula, charge)} ions. A higher resolving power, or a range file with known shares "
                      "(--ranges), would help", DataQualityWarning, stacklevel=2)
