"""The amounts fit of ranging: the design matrix of ranges against species (isotope lines spread by
the peak shape), windows at predicted lines outside the ranges, the weighted non-negative least
squares of the counts, and the metal composition with its standard errors.
"""

from __future__ import annotations

import math

import numpy as np

from .calibration import _Lines
from .spectrum import PeakShape

__all__: list = []


def _design(ranges_lo, ranges_hi, lines: _Lines, cal_pos, n_species, shape: PeakShape | None = None):
    """A[j, s]: expected share of species s's ions in range j.

    Without a peak shape, the isotope fraction of the lines whose calibrated position falls in
    the range; with one, each line's ions are spread by the shape, so tails outside a window and
    tails of neighbours inside it are counted.
    """
    A = np.zeros((ranges_lo.size, n_species))
    if ranges_lo.size == 0:
        return A
    if shape is None:
        k = np.searchsorted(ranges_lo, cal_pos, side="right") - 1
        inside = (k >= 0) & (cal_pos < ranges_hi[np.maximum(k, 0)])
        np.add.at(A, (k[inside], lines.sp[inside]), lines.frac[inside])
        return A
    cap = shape.fraction(cal_pos[:, None], ranges_lo[None, :], ranges_hi[None, :])  # (n_lines, n_ranges)
    cap *= lines.frac[:, None]
    onehot = np.zeros((cal_pos.size, n_species))
    onehot[np.arange(cal_pos.size), lines.sp] = 1.0
    return cap.T @ onehot


def _probe_rows(ranges_lo, ranges_hi, lines: _Lines, cal_pos, active, fwhm_at, min_frac=0.02):
    """Windows at predicted lines of active species that fall outside every range.

    Returns (lo, hi) arrays of merged windows, clipped to the gaps between ranges.
    """
    sel = active[lines.sp] & (lines.frac >= min_frac)
    pos = cal_pos[sel]
    if ranges_lo.size:
        k = np.searchsorted(ranges_lo, pos, side="right") - 1
        inside = (k >= 0) & (pos < ranges_hi[np.maximum(k, 0)])
        pos = pos[~inside]
    if pos.size == 0:
        return np.zeros(0), np.zeros(0)
    w = fwhm_at(pos)
    lo, hi = pos - w, pos + w
    if ranges_lo.size:  # clip to the gap between the neighbouring ranges
        k = np.searchsorted(ranges_lo, pos, side="right") - 1
        prev_hi = np.where(k >= 0, ranges_hi[np.maximum(k, 0)], -np.inf)
        nxt = np.minimum(k + 1, ranges_lo.size - 1)
        next_lo = np.where(k + 1 < ranges_lo.size, ranges_lo[nxt], np.inf)
        lo, hi = np.maximum(lo, prev_hi), np.minimum(hi, next_lo)
    ok = (hi - lo) >= 0.5 * w
    lo, hi = lo[ok], hi[ok]
    order = np.argsort(lo)
    lo, hi = lo[order], hi[order]
    out_lo, out_hi = [], []
    for a, b in zip(lo, hi):
        if out_hi and a <= out_hi[-1]:
            out_hi[-1] = max(out_hi[-1], b)
        else:
            out_lo.append(a)
            out_hi.append(b)
    return np.asarray(out_lo), np.asarray(out_hi)


def _stack(A, y, w, extra):
    """The weighted rows of the fit, with the ``extra`` rows ``(A_x, c_x, sd_x)`` (fixed weights
    ``1 / sd_x``) appended when given."""
    if extra is None:
        return A * w[:, None], y * w
    A_x, c_x, sd_x = extra
    return np.vstack([A * w[:, None], A_x / sd_x[:, None]]), np.concatenate([y * w, c_x / sd_x])


def _solve_amounts(A, gross, bg, bg_sigma, n_iter: int = 10, k_robust: float = 4.0, extra=None):
    """Weighted NNLS for c = gross - bg = A @ n, re-weighted by the fitted Poisson variance.

    Rows whose residual exceeds ``k_robust`` standard deviations (an unknown ion on a minor
    isotope line, say) have their variance inflated by ``(r / k_robust)**2``, a redescending
    M-estimator, so that they cannot drag the amounts. ``extra``, ``(A_x, c_x, sd_x)``, adds rows
    of other evidence with fixed standard deviations (the spatial shares of overlapped ranges,
    :mod:`probeseq.ranging.spatial`).

    Returns amounts (n_species,), covariance (n_species, n_species), model counts (n_rows,).
    """
    from scipy.optimize import nnls

    c = gross - bg
    n_sp = A.shape[1]
    x = np.zeros(n_sp)
    model = np.maximum(c, 0.0)
    inflate = np.ones(c.size)
    for _ in range(n_iter):
        var = (np.maximum(model + bg, 1.0) + bg_sigma ** 2) * inflate
        M, y = _stack(A, c, 1.0 / np.sqrt(var), extra)
        x_new, _ = nnls(M, y, maxiter=50 * max(n_sp, 1))
        model = A @ x_new
        r = (c - model) / np.sqrt(np.maximum(model + bg, 1.0) + bg_sigma ** 2)
        inflate = np.maximum((np.abs(r) / k_robust) ** 2, 1.0)
        if np.allclose(x_new, x, rtol=1e-7, atol=1e-9):
            x = x_new
            break
        x = x_new
    var = (np.maximum(model + bg, 1.0) + bg_sigma ** 2) * inflate
    cov = np.zeros((n_sp, n_sp))
    act = x > 0
    if act.any():
        Aw = A[:, act] / np.sqrt(var)[:, None]
        if extra is not None:
            Aw = np.vstack([Aw, extra[0][:, act] / extra[2][:, None]])
        cov[np.ix_(act, act)] = np.linalg.pinv(Aw.T @ Aw)
    return x, cov, model


def _composition(amounts, cov, atoms):
    """Metal atoms, atomic fractions and their standard errors."""
    M = atoms.T @ amounts
    covM = atoms.T @ cov @ atoms
    S = M.sum()
    if S <= 0:
        k = M.size
        return M, np.sqrt(np.maximum(np.diag(covM), 0)), np.full(k, np.nan), np.full(k, np.nan)
    x = M / S
    J = (np.eye(M.size) - x[:, None]) / S  # dx_i/dM_j = (delta_ij - x_i) / S
    covx = J @ covM @ J.T
    return M, np.sqrt(np.maximum(np.diag(covM), 0)), x, np.sqrt(np.maximum(np.diag(covx), 0))




def bound_errors(A, gross, bg, bg_sigma, amounts, cov, min_column: float = 1e-3, max_cond: float = 1e10,
                 extra=None):
    """Standard errors of the amounts, also for species the fit put at zero.

    A non-negative fit that stops at the bound gives a species no covariance, so its error would
    read 0: as if an amount of exactly zero were known. Here such a species (one with a line in the
    fitted rows) gets the error it would have if it were free: ``sqrt([(A_S^T W A_S)^-1]_ss)`` over
    the fitted species plus it (``W`` the Poisson weights of the fitted model). The interval
    ``[0, 1.96 sigma]`` is then the quadratic profile-likelihood interval of an amount at the bound.
    Where the species' lines are a combination of the others' (the data cannot tell it apart), or
    no fitted window holds any of its lines, the error is NaN: undetermined, not small.

    Parameters
    ----------
    A : (n_rows, n_species) ndarray
    gross, bg, bg_sigma : (n_rows,) ndarray
    amounts : (n_species,) ndarray
    cov : (n_species, n_species) ndarray
        Covariance of the fitted (positive) amounts.
    extra : tuple, optional
        The extra rows of the fit, as for :func:`_solve_amounts`.

    Returns
    -------
    (n_species,) ndarray of float
    """
    sig = np.sqrt(np.maximum(np.diag(cov), 0.0))
    model = A @ amounts
    Aw_all = _stack(A, gross, 1.0 / np.sqrt(np.maximum(model + bg, 1.0) + bg_sigma ** 2), extra)[0]
    act = amounts > 0
    seen = np.abs(A).max(axis=0) >= min_column
    sig[~act & ~seen] = np.nan  # no fitted window holds a line of it: not measured at all
    for s in np.flatnonzero(~act & seen):
        S = act.copy()
        S[s] = True
        Aw = Aw_all[:, S]
        F = Aw.T @ Aw
        if not np.isfinite(F).all() or np.linalg.cond(F) > max_cond:
            sig[s] = np.nan
            continue
        V = np.linalg.inv(F)
        pos = int(np.flatnonzero(np.flatnonzero(S) == s)[0])
        sig[s] = math.sqrt(max(V[pos, pos], 0.0))
    return sig
