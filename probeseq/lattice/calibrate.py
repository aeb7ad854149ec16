"""Calibrate a reconstruction on its own lattice: lateral magnification against depth, the
specimen axis, the depth scale and the plane curvature.

:func:`calibrate_reconstruction` takes the metal ions of the sample and the registration fitted on
them and returns a :class:`~probeseq.lattice.correction.ReconstructionCorrection`:

1. **lateral**: the registration's lateral scale and offset are refitted in depth slabs of about
   :data:`LATERAL_SLAB_NM` (rotation and tilt kept); a magnification that changes with depth
   (a line in depth, weighted by the slabs' errors) and offsets that bend with depth (a parabola)
   are applied when the change is significant (over three standard errors and over
   :data:`MIN_MAGNIFICATION_CHANGE` across the run, or :data:`MIN_SHIFT_NM` of offset);
2. **axis**: the centre of the laterally corrected ions per slab, a line in depth;
3. **depth**: :func:`probeseq.lattice.depthscale.calibrate_depth` on the laterally corrected ions.

Warnings (:class:`~probeseq.exceptions.DataQualityWarning`, one line each) say when the depth is
not calibrated and why, when the file's depth scale is off by more than :data:`SCALE_WARN`, and
when the site planes stay weakly periodic after calibration.
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from ..exceptions import DataQualityWarning
from .correction import ReconstructionCorrection
from .depthscale import DepthCalibration, calibrate_depth
from .geometry import _plane_model
from .outline import _outline
from .registration import FIT_RADIUS_FRAC, Registration, _refine
from .locator import _cached_locator

__all__ = ['calibrate_reconstruction', 'LATERAL_SLAB_NM', 'SCALE_WARN', 'WEAK_CONTRAST']

#: thickness of the depth slabs of the lateral refit, nm
LATERAL_SLAB_NM = 8.0

#: fewest metal ions in a slab of the lateral refit
LATERAL_MIN_IONS = 2000

#: smallest magnification change over the run, and offset drift, that is corrected
MIN_MAGNIFICATION_CHANGE = 0.005
MIN_SHIFT_NM = 0.03

#: a file depth scale further than this from 1 is reported as a warning
SCALE_WARN = 0.10

#: site-phase contrast below which the site planes are called weakly periodic
WEAK_CONTRAST = 0.1

#: grid step of the correction's tables when only the lateral part applies, nm
_GRID_NM = 0.5


def calibrate_reconstruction(x, y, z, registration: Registration, *, depth: bool = True, lateral: bool = True,
                             random_state=None, where: str = "") -> ReconstructionCorrection:
    """Fit the reconstruction correction of a run from its metal ions and registration.

    Parameters
    ----------
    x, y, z : (n,) ndarray of float, nm
        Metal-ion positions of the sample (file frame).
    registration : Registration
        The lattice registered on the same ions.
    depth, lateral : bool
        Calibrate the depth scale and curvature; refit the lateral magnification against depth.
    random_state : int or numpy.random.Generator, optional
    where : str
        Prefix of the warnings (the file's name).

    Returns
    -------
    ReconstructionCorrection
        The identity (with its report) when nothing significant is found or both are off.
    """
    rng = np.random.default_rng(random_state)
    x, y, z = (np.asarray(a, float) for a in (x, y, z))
    lo, hi = float(z.min()), float(z.max())
    pre = f"{where}: " if where else ""
    lat = _lateral(x, y, z, registration) if lateral else {"applied": False, "reason": "not asked for"}
    if lat["applied"]:
        m = np.interp(z, lat["z_nm"], lat["magnification"])
        xc = x / m + np.interp(z, lat["z_nm"], lat["shift_nm"][:, 0])
        yc = y / m + np.interp(z, lat["z_nm"], lat["shift_nm"][:, 1])
    else:
        xc, yc = x, y
    axis_z, axis_xy, radius = _axis(xc, yc, z)
    g, denom = _plane_model(registration.tilt, registration.scale)
    spacing = registration.lattice.pitch_nm * math.sqrt(denom)
    if depth:
        cal = calibrate_depth(xc, yc, z, pitch_nm=spacing, plane_gradient=g,
                              axis_nm=(float(np.mean(axis_xy[:, 0])), float(np.mean(axis_xy[:, 1]))),
                              radius_nm=radius, random_state=rng)
    else:
        cal = DepthCalibration(calibrated=False, reason="not asked for", grid_z_nm=np.array([lo, hi]),
                               depth_nm=np.array([lo, hi]), expected_pitch_nm=spacing)
    _warn(cal, pre, depth)
    report = {"applied": bool(cal.calibrated or lat["applied"]), "depth": cal.to_dict(),
              "lateral": _lateral_report(lat)}
    if not report["applied"]:
        return ReconstructionCorrection.identity(lo, hi, report=report)
    if cal.calibrated:
        grid, tdepth, kappa = cal.grid_z_nm, cal.depth_nm, cal.curvature_per_nm
    else:
        grid = np.linspace(lo, hi, max(2, int(math.ceil((hi - lo) / _GRID_NM)) + 1))
        tdepth, kappa = grid.copy(), 0.0
    if lat["applied"]:
        mag = np.interp(grid, lat["z_nm"], lat["magnification"])
        shift = np.column_stack([np.interp(grid, lat["z_nm"], lat["shift_nm"][:, k]) for k in range(2)])
    else:
        mag, shift = np.ones(grid.size), np.zeros((grid.size, 2))
    axis = np.column_stack([np.interp(grid, axis_z, axis_xy[:, k]) for k in range(2)])
    return ReconstructionCorrection(grid_z_nm=grid, depth_nm=tdepth, magnification=mag, shift_nm=shift,
                                    axis_nm=axis, curvature_per_nm=kappa, report=report)


def _warn(cal: DepthCalibration, pre: str, asked: bool) -> None:
    if not asked:
        return
    if not cal.calibrated:
        warnings.warn(f"{pre}depth not calibrated: {cal.reason}; using the file's depth", DataQualityWarning,
                      stacklevel=3)
        return
    if abs(cal.mean_scale - 1.0) > SCALE_WARN:
        how = "long" if cal.mean_scale > 1 else "short"
        warnings.warn(f"{pre}the metal ions repeat every {cal.mean_scale * cal.expected_pitch_nm:.4g} nm in depth where "
                      f"the lattice's site pitch gives {cal.expected_pitch_nm:.4g} nm: the file's depths are "
                      f"{abs(cal.mean_scale - 1) * 100:.0f} % too {how} (depth scale {cal.mean_scale:.3f} +- "
                      f"{cal.mean_scale_err:.3f}); corrected, but check the reconstruction's parameters and the "
                      "lattice's repeat and sites per repeat", DataQualityWarning, stacklevel=3)
    if cal.contrast_after < WEAK_CONTRAST:
        warnings.warn(f"{pre}the site planes are weakly periodic even after depth calibration (site-phase contrast "
                      f"{cal.contrast_after:.3f}, below {WEAK_CONTRAST}): sites may be cut out of phase",
                      DataQualityWarning, stacklevel=3)


# ---------------------------------------------------------------------- lateral
def _lateral(x, y, z, reg: Registration) -> dict:
    """Per-slab lateral scale and offset, and the smooth magnification and shift tables."""
    lo, hi = float(z.min()), float(z.max())
    n_slabs = int(min(12, math.floor((hi - lo) / LATERAL_SLAB_NM), x.size // LATERAL_MIN_IONS))
    if n_slabs < 3:
        return {"applied": False, "reason": f"depth range {hi - lo:.3g} nm or {x.size} metal ions too few for "
                                            f"3 slabs of {LATERAL_SLAB_NM:g} nm and {LATERAL_MIN_IONS} ions"}
    lat = reg.lattice
    d_nn = lat.nearest_rod_distance_nm
    locator = _cached_locator(lat, d_nn, 64)
    center = np.array([0.5 * (np.percentile(x, 1) + np.percentile(x, 99)),
                       0.5 * (np.percentile(y, 1) + np.percentile(y, 99))])
    radius = float(np.percentile(np.hypot(x - center[0], y - center[1]), 98)) / math.sqrt(0.98)
    p0 = [reg.offset_nm[0], reg.offset_nm[1], reg.tilt[0], reg.tilt[1], math.radians(reg.rotation_deg), reg.scale]
    free = [True, True, False, False, False, True]
    edges = np.quantile(z, np.linspace(0, 1, n_slabs + 1))
    zs, sc, sc_err, off, off_err = [], [], [], [], []
    for a, b in zip(edges[:-1], edges[1:]):
        sel = (z >= a) & (z <= b)
        if sel.sum() < LATERAL_MIN_IONS // 2:
            continue
        sub = np.flatnonzero(sel)
        if sub.size > 100_000:
            sub = sub[:: int(math.ceil(sub.size / 100_000))]
        try:
            p, cov, _, _, _ = _refine(x[sub], y[sub], z[sub], lat, locator, p0, free, reg.z_ref_nm, center, radius,
                                      FIT_RADIUS_FRAC * d_nn)
        except Exception:  # noqa: BLE001 - a slab that cannot be refitted is left out
            continue
        zs.append(float(np.median(z[sub])))
        sc.append(p[5])
        sc_err.append(math.sqrt(max(cov[5, 5], 1e-12)))
        off.append(p[0:2])
        off_err.append(np.sqrt(np.maximum(np.diag(cov)[0:2], 1e-12)))
    if len(zs) < 3:
        return {"applied": False, "reason": "fewer than 3 depth slabs could be refitted"}
    zs, sc, sc_err = np.array(zs), np.array(sc), np.array(sc_err)
    off, off_err = np.array(off), np.array(off_err)
    # magnification relative to the registration's scale, a line in depth
    m_rel, m_err = sc / reg.scale, sc_err / reg.scale
    coef, cov = _wls(zs, m_rel, m_err, 1)
    slope, slope_err = coef[1], math.sqrt(cov[1, 1])
    change = slope * (hi - lo)
    # offsets relative to the registration's line through depth, a parabola in depth
    base = reg.offset_nm[None, :] + reg.tilt[None, :] * (zs - reg.z_ref_nm)[:, None]
    fits = [_wls(zs, off[:, k] + reg.tilt[k] * (zs - reg.z_ref_nm) - base[:, k], off_err[:, k], 2) for k in range(2)]
    grid = np.linspace(lo, hi, max(2, int(math.ceil((hi - lo) / _GRID_NM)) + 1))
    dev = np.column_stack([np.polyval(f[0][::-1], grid) for f in fits])
    dev_err = max(math.sqrt(f[1][0, 0]) for f in fits)
    mag_sig = abs(change) > max(3 * slope_err * (hi - lo), MIN_MAGNIFICATION_CHANGE)
    shift_sig = float(np.abs(dev - dev.mean(0)).max()) > max(3 * dev_err, MIN_SHIFT_NM)
    out = {"z_slab_nm": zs, "scale": sc, "scale_err": sc_err, "offset_nm": off, "magnification_change": change,
           "magnification_change_err": slope_err * (hi - lo), "applied": bool(mag_sig or shift_sig),
           "reason": "" if (mag_sig or shift_sig) else "no significant change of magnification or offset with depth"}
    if not out["applied"]:
        return out
    mag = np.polyval(coef[::-1], grid) if mag_sig else np.ones(grid.size)
    mag = mag / np.interp(reg.z_ref_nm, grid, mag) if lo <= reg.z_ref_nm <= hi else mag / float(np.mean(mag))
    # the slab model X = s_j R q + o_j + t (z - z_ref) mapped to the registration's frame:
    # X' = X / m + o + t (z - z_ref) - (o(z) + t (z - z_ref)) / m, with o(z) = o + dev(z)
    lin = reg.offset_nm[None, :] + reg.tilt[None, :] * (grid - reg.z_ref_nm)[:, None]
    o_z = lin + (dev if shift_sig else 0.0)
    shift = lin - o_z / mag[:, None]
    out.update(z_nm=grid, magnification=mag, shift_nm=shift)
    return out


def _wls(t, v, err, degree):
    """Weighted least-squares polynomial (coefficients lowest first) and its covariance."""
    t0 = float(np.mean(t))
    A = np.vander(t - t0, degree + 1, increasing=True)
    w = 1.0 / np.maximum(np.asarray(err, float), 1e-12) ** 2
    AtA = A.T @ (A * w[:, None])
    cov = np.linalg.pinv(AtA)
    c = cov @ (A.T @ (w * v))
    chi2 = float(np.sum(w * (v - A @ c) ** 2)) / max(t.size - degree - 1, 1)
    cov = cov * max(chi2, 1.0)  # scatter beyond the stated errors widens the errors
    # back to coefficients of t (not t - t0): expand (t - t0)^k
    M = np.zeros((degree + 1, degree + 1))
    for k in range(degree + 1):
        for j in range(k + 1):
            M[j, k] = math.comb(k, j) * (-t0) ** (k - j)
    return M @ c, M @ cov @ M.T


def _axis(x, y, z):
    """Specimen axis against depth (the outline centres of :func:`probeseq.lattice.geometry._outline`,
    a line in depth) on a two-point grid, and the median outline radius, nm."""
    zc, cen, rad = _outline(x, y, z, slab_nm=max((float(z.max()) - float(z.min())) / 8, 0.5))
    grid = np.array([float(z.min()), max(float(z.max()), float(z.min()) + 1.0)])
    if zc.size < 2:
        c = cen[0] if zc.size else np.array([float(np.mean(x)), float(np.mean(y))])
        return grid, np.array([c, c]), float(rad[0]) if rad.size else float(np.ptp(x)) / 2 + 1e-9
    fx, fy = np.polyfit(zc, cen[:, 0], 1), np.polyfit(zc, cen[:, 1], 1)
    return grid, np.column_stack([np.polyval(fx, grid), np.polyval(fy, grid)]), float(np.median(rad))


def _lateral_report(lat: dict) -> dict:
    def arr(a, nd=5):
        return [round(float(v), nd) for v in np.asarray(a, float).ravel()]

    out = {"applied": bool(lat.get("applied")), "reason": lat.get("reason", "")}
    if "z_slab_nm" in lat:
        out.update({"z_slab_nm": arr(lat["z_slab_nm"], 3), "scale": arr(lat["scale"]), "scale_err": arr(lat["scale_err"]),
                    "offset_nm": [arr(o, 4) for o in lat["offset_nm"]],
                    "magnification_change": round(float(lat["magnification_change"]), 5),
                    "magnification_change_err": round(float(lat["magnification_change_err"]), 5)})
    return out
