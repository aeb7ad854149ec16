"""Mass-to-charge calibration against the expected lines of the metals and fragments.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..exceptions import InputError
from .isotopes import canonical_formula, isotope_pattern, parse_ion
from .spectrum import PeakTable

__all__ = ['DEFAULT_FRAGMENTS', 'METAL_ION_TEMPLATES', 'Calibration', 'metal_species']

#: ions expected of every metal M: (formula template, charge)
METAL_ION_TEMPLATES = (("{M}", 1), ("{M}", 2), ("{M}", 3), ("{M}O", 1), ("{M}O", 2), ("{M}OH", 1),
                       ("{M}O2", 1))


#: small framework (linker) fragments predicted by default: (formula, charge); common practice
#: for hydrocarbon / carboxylate linkers
DEFAULT_FRAGMENTS = (
    ("H", 1), ("H2", 1), ("H3", 1), ("C", 1), ("C", 2), ("CH", 1), ("CH2", 1), ("CH3", 1),
    ("O", 1), ("O", 2), ("OH", 1), ("H2O", 1), ("H3O", 1), ("C2", 1), ("C2H", 1), ("C2H2", 1),
    ("C2H3", 1), ("CO", 1), ("CO", 2), ("CHO", 1), ("O2", 1), ("CO2", 1),
)


# ============================================================================ calibration
@dataclass(frozen=True)
class Calibration:
    """Mass calibration ``sqrt(observed) = polyval(coefficients, sqrt(predicted))``.

    A polynomial in ``sqrt(m/z)`` is a polynomial in flight time, where timing offsets and
    flight-length errors act linearly.

    Attributes
    ----------
    coefficients : (degree + 1,) ndarray of float
        Highest power first (``numpy.polyval`` order); identity is ``[1, 0]``.
    predicted_da, observed_da : (n_used,) ndarray of float, Da
        Line positions and measured peak positions used in the fit.
    residuals_da : (n_used,) ndarray of float, Da
        ``observed - predict(predicted)``.
    labels : tuple of str
        Ion of each peak used.
    """

    coefficients: np.ndarray
    predicted_da: np.ndarray = field(default_factory=lambda: np.zeros(0))
    observed_da: np.ndarray = field(default_factory=lambda: np.zeros(0))
    residuals_da: np.ndarray = field(default_factory=lambda: np.zeros(0))
    labels: tuple = ()

    @property
    def degree(self) -> int:
        return int(self.coefficients.size - 1)

    @property
    def rms_da(self) -> float:
        """Root-mean-square residual, Da (``nan`` without peaks)."""
        r = self.residuals_da
        return float(np.sqrt(np.mean(r ** 2))) if r.size else float("nan")

    def predict(self, predicted_da):
        """Observed position of lines at ``predicted_da`` (Da)."""
        u = np.sqrt(np.asarray(predicted_da, dtype=float))
        return np.polyval(self.coefficients, u) ** 2

    def to_dict(self) -> dict:
        return {"model": "sqrt(observed) = polyval(coefficients, sqrt(predicted))",
                "coefficients": [float(c) for c in self.coefficients], "rms_da": _num(self.rms_da),
                "peaks": [{"ion": lab, "predicted_da": float(p), "observed_da": float(o), "residual_da": float(r)}
                          for lab, p, o, r in zip(self.labels, self.predicted_da, self.observed_da,
                                                  self.residuals_da)]}


def _identity() -> Calibration:
    return Calibration(np.array([1.0, 0.0]))


def _num(x):
    """A number for JSON: a float, or None for NaN and infinities (:func:`probeseq.utils.marks.finite_or_none`)."""
    from ..utils.marks import finite_or_none

    return finite_or_none(x)


# ============================================================================ species and lines
@dataclass(frozen=True)
class _Lines:
    """Flattened isotope lines of the candidate species."""

    pos: np.ndarray         # (n_lines,) predicted m/z, Da
    frac: np.ndarray        # (n_lines,) fraction of the species
    sp: np.ndarray          # (n_lines,) species index
    rel: np.ndarray         # (n_lines,) fraction relative to the species' strongest line


def _lines(species) -> _Lines:
    pos, frac, sp, rel = [], [], [], []
    for s, (f, z) in enumerate(species):
        p = isotope_pattern(f, z)
        pos.append(p.mass_to_charge_da)
        frac.append(p.fractions)
        rel.append(p.fractions / p.fractions.max())
        sp.append(np.full(p.n_lines, s))
    return _Lines(np.concatenate(pos), np.concatenate(frac), np.concatenate(sp),
                  np.concatenate(rel))


def metal_species(metal: str) -> tuple:
    """The ions predicted for a metal: ``(formula, charge)`` from :data:`METAL_ION_TEMPLATES`."""
    return tuple((canonical_formula(t.format(M=metal)), z) for t, z in METAL_ION_TEMPLATES)


def _parse_species(species) -> tuple:
    if species is None:
        return tuple((canonical_formula(f), z) for f, z in DEFAULT_FRAGMENTS)
    if isinstance(species, str):
        species = [s for s in species.split(",")]
    out = []
    for s in species:
        if isinstance(s, str):
            out.append(parse_ion(s))
        else:
            try:
                f, z = s
            except (TypeError, ValueError):
                raise InputError(f"species: expected an ion such as 'CO+' or (formula, charge), got {s!r}") from None
            isotope_pattern(f, z)  # validates
            out.append((canonical_formula(f), int(z)))
    return tuple(dict.fromkeys(out))


# ============================================================================ matching
def _coarse_scale(peaks: PeakTable, lines: _Lines, max_shift: float, n_top: int = 25) -> float:
    """Scale of sqrt(m/z) aligning the strongest peaks with predicted strong lines."""
    if len(peaks) == 0 or max_shift <= 0:
        return 1.0
    top = np.argsort(peaks.net_counts)[::-1][:n_top]
    up = np.sqrt(peaks.position_da[top])
    sig = peaks.fwhm_da[top] / 2.3548 / (2 * up)  # in u
    strong = lines.rel >= 0.05
    ul = np.sort(np.sqrt(lines.pos[strong]))
    step = max(float(np.min(sig / up)) / 3, 2e-5)
    scales = 1.0 + np.arange(-max_shift, max_shift + step / 2, step)
    uq = up[None, :] / scales[:, None]  # (n_scales, n_top) peak positions in predicted u
    k = np.clip(np.searchsorted(ul, uq), 1, ul.size - 1)
    d = np.minimum(np.abs(uq - ul[k - 1]), np.abs(uq - ul[k]))
    score = np.exp(-0.5 * (d / sig[None, :]) ** 2).sum(1)
    near_best = score >= score.max() - 0.5  # within half a matched peak of the best: prefer no change
    return float(scales[near_best][np.argmin(np.abs(scales[near_best] - 1.0))])


def _match(peaks: PeakTable, lines: _Lines, cal: Calibration, tol_fwhm: float, floor_da: float):
    """Candidate lines of each peak: list of arrays of line indices within tolerance."""
    cal_pos = cal.predict(lines.pos)
    order = np.argsort(cal_pos)
    cp = cal_pos[order]
    tol = np.maximum(tol_fwhm * peaks.fwhm_da, floor_da)
    lo = np.searchsorted(cp, peaks.position_da - tol, side="left")
    hi = np.searchsorted(cp, peaks.position_da + tol, side="right")
    return [order[a:b] for a, b in zip(lo, hi)], cal_pos


def _fit_calibration(peaks, lines, cands, degree, labels_of):
    """Weighted polynomial fit in sqrt space from peaks with one unambiguous line position."""
    obs, pred, wts, labs = [], [], [], []
    for p, c in enumerate(cands):
        if c.size == 0:
            continue
        c = c[lines.rel[c] >= 0.02]
        if c.size == 0:
            continue
        spread = np.ptp(lines.pos[c])
        if spread > 0.25 * peaks.fwhm_da[p]:
            continue
        pred.append(float(np.average(lines.pos[c], weights=lines.frac[c])))
        obs.append(float(peaks.position_da[p]))
        sig_u = peaks.fwhm_da[p] / 2.3548 / (2 * np.sqrt(peaks.position_da[p]))
        n_eff = max(float(peaks.net_counts[p]), 1.0)
        # statistical error of the centre plus a floor for shape systematics (tails)
        wts.append(1.0 / math.hypot(sig_u / math.sqrt(n_eff), 0.05 * sig_u))
        labs.append(labels_of(c))
    n = len(obs)
    if n == 0:
        return _identity()
    uo, upr, w = np.sqrt(obs), np.sqrt(pred), np.asarray(wts)
    deg = min(degree, max(n - 2, 0)) if n >= 3 else 0
    keep = np.ones(n, dtype=bool)
    for _ in range(2):
        if deg == 0:
            coef = np.array([np.sum(w[keep] ** 2 * uo[keep] * upr[keep]) / np.sum(w[keep] ** 2 * upr[keep] ** 2), 0.0])
        else:
            coef = np.polyfit(upr[keep], uo[keep], deg, w=w[keep])
        res_u = uo - np.polyval(coef, upr)
        mad = np.median(np.abs(res_u[keep])) * 1.4826
        new_keep = np.abs(res_u) <= max(4 * mad, 1e-6)
        if new_keep.sum() < max(deg + 2, 1) or np.array_equal(new_keep, keep):
            break
        keep = new_keep
    cal = Calibration(np.asarray(coef, dtype=float))
    pred_a, obs_a = np.asarray(pred)[keep], np.asarray(obs)[keep]
    return Calibration(cal.coefficients, pred_a, obs_a, obs_a - cal.predict(pred_a),
                       tuple(lab for lab, k in zip(labs, keep) if k))
