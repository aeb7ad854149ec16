"""Depth calibration from the periodicity of the metal ions along the rods.

The metal sites of every rod lie in planes one site pitch ``p = repeat / sites_per_repeat``
apart, a length the crystal fixes exactly; the reconstruction's depth scale is only estimated.
So the ions' own periodicity calibrates the depth: this is the lattice calibration of the
reconstruction by Fourier (spatial-distribution) analysis along a known crystal direction
(common practice; recalled from memory: spatial distribution maps, Geiser et al., Microscopy and
Microanalysis 2007; lattice rectification, Moody et al., Microscopy and Microanalysis 2011; see
``docs/REFERENCES.md`` §7).

Model: the calibrated coordinate of an ion at file position (x, y, z) is
``f = T(z - kappa * rho**2) + b . (x, y)`` with ``T`` a cubic spline of the file depth (its
slope is one over the local depth scale), ``kappa`` the curvature of the depth planes (``rho``
the distance from the specimen axis) and ``b`` the small tilt of the planes (a nuisance here:
the registration fits the tilt again on the calibrated positions). The sites are the planes
``f = k p``, so the ions' phases ``psi = 2 pi f / p`` gather around one value.

Fit, in three steps:

1. **wide scan**: in windows of :data:`WINDOW_PLANES` planes the coherent power
   ``|sum exp(2 pi i u / (p r))|^2 / n`` (u the plane coordinate) over pitch ratios ``r`` from
   1/2 to 2 finds the period the data hold; a period outside :data:`CALIBRATE_RANGE` of the
   lattice's is reported (a wrong repeat, or a depth scale far off) and not calibrated;
2. **local scan**: the same power over (ratio, curvature) around it gives each window's depth
   scale and one curvature; the windows' phases, chained along depth with the scales
   predicting each step, give ``T`` at the window centres;
3. **phase fit**: the von Mises likelihood ``sum_i cos(psi_i)`` is maximised over the spline
   coefficients, ``kappa`` and ``b`` by Gauss-Newton steps (the Hessian replaced by its
   expectation, ``R sum J J^T`` with ``R`` the mean of ``cos psi``), with a small penalty on the
   spline's second differences. Standard errors are
   ``(p / 2 pi)^2 mean(sin^2 psi) / R^2 (J^T J)^-1``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

__all__ = ['DepthCalibration', 'calibrate_depth', 'WINDOW_PLANES', 'MIN_PLANES', 'CALIBRATE_RANGE']

#: planes per scan window (about 4 nm at a 0.23 nm pitch)
WINDOW_PLANES = 18

#: fewer site planes than this in the depth range: too short to calibrate
MIN_PLANES = 40

#: depth scales (file pitch over lattice pitch) the calibration corrects; beyond them the
#: periodic signal is reported and the file's depth kept
CALIBRATE_RANGE = (0.8, 1.25)

#: pitch ratios searched for the periodic signal
WIDE_RANGE = (0.5, 2.0)

#: plane curvature searched: depth shift at the outline radius within this many pitches
SAG_PITCHES = 3.0

#: ions per window in the scans (a random subset)
SCAN_IONS = 3000

#: ions per window in the wide scan
WIDE_IONS = 1500

#: windows (the most periodic) and ions per window of the curvature search
KAPPA_WINDOWS = 6
KAPPA_IONS = 2000

#: ions in the phase fit (a random subset)
FIT_IONS = 60_000

#: n R^2 a window's best power must reach to count as periodic: for n uniform phases
#: n R^2 is exponential of mean 1 (Rayleigh's test), so after the wide scan's ~500 trials a
#: window without signal passes with probability below 2e-4
RAYLEIGH_MIN = 15.0

#: smallest share of windows holding a periodic signal for a calibration
MIN_PERIODIC_SHARE = 0.5

#: target spline knot spacing, nm (the depth scale is smooth on this scale), and the fewest
#: fitted ions per knot interval
KNOT_NM = 4.0
IONS_PER_KNOT = 4000


@dataclass(frozen=True)
class DepthCalibration:
    """The depth calibration of one run (:func:`calibrate_depth`).

    Attributes
    ----------
    calibrated : bool
        True when ``T`` is fitted; False when the file's depth is kept (``reason`` says why).
    reason : str
        Why the file's depth is kept ("" when calibrated).
    grid_z_nm, depth_nm : (n,) ndarray of float, nm
        ``T`` sampled on a uniform grid of file depths (identity when not calibrated).
    curvature_per_nm, curvature_err : float, 1/nm
    sag_at_radius_nm : float, nm
        ``kappa * radius**2``: the depth shift of a plane at the outline radius.
    radius_nm : float, nm
        The outline radius used for ``sag_at_radius_nm`` and the curvature search.
    mean_scale, mean_scale_err : float
        File depth range over calibrated depth range (the overall depth scale) and its error.
    scale_z_nm, scale, scale_err : (m,) ndarray of float
        Local depth scale ``1 / T'`` on a grid of file depths (nm), and its standard error.
    window_z_nm, window_scale, window_power : (w,) ndarray of float
        Per scan window: centre (file depth, nm), depth scale of the local scan and its n R^2
        (NaN scale where the window holds no periodic signal).
    found_pitch_nm, expected_pitch_nm : float, nm
        The period of the metal ions along depth found by the wide scan (NaN when none) and
        the lattice's plane spacing.
    contrast_before, contrast_after : float
        ``|mean exp(i psi)|`` of the fitted ions with the file's depth and after calibration.
    residual : dict
        Phase left after calibration across the field of view (pitch fractions per lateral bin).
    n_ions : int
    """

    calibrated: bool
    reason: str
    grid_z_nm: np.ndarray
    depth_nm: np.ndarray
    curvature_per_nm: float = 0.0
    curvature_err: float = float("nan")
    sag_at_radius_nm: float = 0.0
    radius_nm: float = float("nan")
    mean_scale: float = 1.0
    mean_scale_err: float = float("nan")
    scale_z_nm: np.ndarray = field(default_factory=lambda: np.zeros(0))
    scale: np.ndarray = field(default_factory=lambda: np.zeros(0))
    scale_err: np.ndarray = field(default_factory=lambda: np.zeros(0))
    window_z_nm: np.ndarray = field(default_factory=lambda: np.zeros(0))
    window_scale: np.ndarray = field(default_factory=lambda: np.zeros(0))
    window_power: np.ndarray = field(default_factory=lambda: np.zeros(0))
    found_pitch_nm: float = float("nan")
    expected_pitch_nm: float = float("nan")
    contrast_before: float = float("nan")
    contrast_after: float = float("nan")
    residual: dict = field(default_factory=dict)
    n_ions: int = 0

    def to_dict(self) -> dict:
        """JSON-able report (numbers rounded; NaN as None)."""
        def num(v, nd=6):
            v = float(v)
            return round(v, nd) if math.isfinite(v) else None

        def arr(a, nd=5):
            return [num(v, nd) for v in np.asarray(a, float)]

        return {
            "calibrated": bool(self.calibrated), "reason": self.reason,
            "mean_depth_scale": num(self.mean_scale), "mean_depth_scale_err": num(self.mean_scale_err),
            "curvature_per_nm": num(self.curvature_per_nm, 7), "curvature_per_nm_err": num(self.curvature_err, 7),
            "sag_at_radius_nm": num(self.sag_at_radius_nm, 4), "radius_nm": num(self.radius_nm, 3),
            "found_pitch_nm": num(self.found_pitch_nm), "expected_pitch_nm": num(self.expected_pitch_nm),
            "site_phase_contrast_before": num(self.contrast_before, 4),
            "site_phase_contrast_after": num(self.contrast_after, 4),
            "depth_scale_profile": {"z_nm": arr(self.scale_z_nm, 3), "scale": arr(self.scale),
                                    "scale_err": arr(self.scale_err)},
            "windows": {"z_nm": arr(self.window_z_nm, 3), "scale": arr(self.window_scale),
                        "n_r2": arr(self.window_power, 2)},
            "residual_phase": self.residual, "n_ions": int(self.n_ions),
        }


# ---------------------------------------------------------------------- scans
@numba.njit(cache=True, nogil=True)
def _power_grid(u, rho2, ratios, kappas, pitch, out):
    """``out[a, b] = |sum exp(2 pi i (u - kappa_b rho2) / (pitch ratio_a))|^2 / n`` (u centred): n R^2,
    exponential of mean 1 for uniform phases (Rayleigh's test).

    ``1 / ratios`` must be evenly spaced (a uniform grid of spatial frequencies): the phases of one
    ion over the grid then advance by a constant step, so each term is one complex product.
    """
    n = u.size
    na = ratios.size
    k0 = 2.0 * math.pi / (pitch * ratios[0])
    dk = (2.0 * math.pi / (pitch * ratios[1]) - k0) if na > 1 else 0.0
    re = np.zeros(na)
    im = np.zeros(na)
    for b in range(kappas.size):
        kb = kappas[b]
        re[:] = 0.0
        im[:] = 0.0
        for i in range(n):
            w = u[i] - kb * rho2[i]
            c = math.cos(k0 * w)
            s = math.sin(k0 * w)
            sc = math.cos(dk * w)
            ss = math.sin(dk * w)
            for a in range(na):
                re[a] += c
                im[a] += s
                c, s = c * sc - s * ss, c * ss + s * sc
        for a in range(na):
            out[a, b] = (re[a] * re[a] + im[a] * im[a]) / max(n, 1)


def _ratio_grid(centre: float, half_width: float, n: int) -> np.ndarray:
    """Pitch ratios whose inverses are evenly spaced about ``1 / centre`` (relative half width)."""
    return 1.0 / ((1.0 / centre) * (1.0 + np.linspace(-half_width, half_width, n)))


def _windows(z, length):
    """Overlapping windows of the sorted depths: (starts, ends, centres) as index bounds."""
    lo, hi = float(z[0]), float(z[-1])
    n_w = max(1, int(math.floor((hi - lo - length) / (0.5 * length))) + 1)
    span = (hi - lo - length) / max(n_w - 1, 1) if n_w > 1 else 0.0
    starts_z = lo + span * np.arange(n_w)
    a = np.searchsorted(z, starts_z)
    b = np.searchsorted(z, starts_z + length)
    return a, b, starts_z + 0.5 * length


def _subset(a, b, n, rng):
    if b - a <= n:
        return np.arange(a, b)
    return np.sort(rng.choice(np.arange(a, b), n, replace=False))


def _wrap(v, p):
    return (v + 0.5 * p) % p - 0.5 * p


# ---------------------------------------------------------------------- spline
def _basis(knots, w, deriv=0):
    """Cubic B-spline design matrix (sparse CSR) of points w (clipped into the knot span)."""
    from scipy.interpolate import BSpline

    lo, hi = knots[3], knots[-4]
    wc = np.clip(w, lo, hi - 1e-9 * (hi - lo))
    if deriv == 0:
        return BSpline.design_matrix(wc, knots, 3).tocsr()
    nb = knots.size - 4
    cols = []
    for j in range(nb):
        c = np.zeros(nb)
        c[j] = 1.0
        cols.append(BSpline(knots, c, 3).derivative(deriv)(wc))
    return np.column_stack(cols)


def _spline_eval(knots, coef, w, deriv=0):
    from scipy.interpolate import BSpline

    spl = BSpline(knots, coef, 3, extrapolate=True)
    return spl.derivative(deriv)(w) if deriv else spl(w)


def _knots(lo, hi, n_int):
    inner = np.linspace(lo, hi, n_int + 1)
    return np.concatenate([[lo] * 3, inner, [hi] * 3])


def _penalty(knots):
    """Gram matrix of the spline's second derivative, ``int B_j'' B_k'' dz`` (zero on lines)."""
    zq = np.linspace(knots[0], knots[-1], 40 * (knots.size - 4))
    d2 = _basis(knots, zq, deriv=2)
    return d2.T @ d2 * (zq[1] - zq[0])


# ---------------------------------------------------------------------- main
def calibrate_depth(x, y, z, *, pitch_nm: float, plane_gradient=(0.0, 0.0), axis_nm=(0.0, 0.0),
                    radius_nm: float = float("nan"), random_state=None) -> DepthCalibration:
    """Calibrate the depth scale (and the plane curvature) of metal-ion positions on the site pitch.

    Parameters
    ----------
    x, y, z : (n,) ndarray of float, nm
        Metal-ion positions (laterally corrected when a lateral correction applies).
    pitch_nm : float, nm
        Spacing of the site planes along z (``pitch * sqrt(1 + g . tilt)`` for tilted rods).
    plane_gradient : (2,) array of float
        ``g`` of the registration's plane coordinate ``u = z + g . (x, y)``.
    axis_nm : (2,) array of float, nm
        Specimen axis (centre of the plane curvature).
    radius_nm : float, nm
        Outline radius (sets the curvature search and the reported sag); default from the ions.
    random_state : int or numpy.random.Generator, optional

    Returns
    -------
    DepthCalibration
        ``calibrated`` False, with the reason, when the depth range is too short, the periodic
        signal too weak or at a pitch outside :data:`CALIBRATE_RANGE` of the lattice's.
    """
    rng = np.random.default_rng(random_state)
    x, y, z = (np.asarray(a, float) for a in (x, y, z))
    order = np.argsort(z, kind="stable")
    x, y, z = x[order], y[order], z[order]
    P = float(pitch_nm)
    g = np.asarray(plane_gradient, float)
    c = np.asarray(axis_nm, float)
    rho2 = (x - c[0]) ** 2 + (y - c[1]) ** 2
    if not math.isfinite(radius_nm):
        radius_nm = float(np.sqrt(np.percentile(rho2, 98) / 0.98)) if z.size else 1.0
    u = z + g[0] * x + g[1] * y
    lo, hi = (float(z[0]), float(z[-1])) if z.size else (0.0, 0.0)
    base = dict(grid_z_nm=np.array([lo, max(hi, lo + 1.0)]), depth_nm=np.array([lo, max(hi, lo + 1.0)]),
                radius_nm=radius_nm, expected_pitch_nm=P, n_ions=int(z.size))
    before = float(abs(np.exp(2j * np.pi * u / P).mean())) if z.size else float("nan")
    base["contrast_before"] = before
    n_planes = (hi - lo) / P
    if n_planes < MIN_PLANES or z.size < 200:
        return DepthCalibration(calibrated=False, reason=(
            f"the depth range ({hi - lo:.3g} nm, {n_planes:.0f} site planes) is too short to calibrate the depth "
            f"scale (needs {MIN_PLANES} planes, {MIN_PLANES * P:.3g} nm)"), **base)
    a_idx, b_idx, zc = _windows(z, WINDOW_PLANES * P)
    subs = [_subset(a, b, SCAN_IONS, rng) for a, b in zip(a_idx, b_idx)]
    # 1. wide scan (a coarse curvature grid) for the period the data hold
    ratios = 1.0 / np.arange(1.0 / WIDE_RANGE[1], 1.0 / WIDE_RANGE[0], 1.0 / (3 * WINDOW_PLANES))
    kappas = np.linspace(-SAG_PITCHES, SAG_PITCHES, 7) * P / max(radius_nm, 1e-6) ** 2
    wide = np.empty((len(subs), ratios.size))

    def wide_scan(lo, hi):
        out = np.empty((ratios.size, kappas.size))
        for j in range(lo, hi):
            s = subs[j][:WIDE_IONS] if subs[j].size > WIDE_IONS else subs[j]
            _power_grid(u[s] - zc[j], rho2[s], ratios, kappas, P, out)
            wide[j] = out.max(axis=1)  # n R^2 at the best curvature

    _over_windows(wide_scan, len(subs))
    best = wide.max(1)
    periodic = best >= RAYLEIGH_MIN
    windows = dict(window_z_nm=zc)
    if periodic.mean() < MIN_PERIODIC_SHARE or periodic.sum() < 2:
        return DepthCalibration(calibrated=False, reason=(
            f"the periodic signal of the site planes is too weak to calibrate the depth scale (periodic in "
            f"{int(periodic.sum())} of {periodic.size} depth windows)"), window_power=best, **windows, **base)
    found = float(np.exp(np.median(np.log(ratios[wide[periodic].argmax(1)]))))
    base["found_pitch_nm"] = found * P
    if not CALIBRATE_RANGE[0] <= found <= CALIBRATE_RANGE[1]:
        return DepthCalibration(calibrated=False, reason=(
            f"the metal ions repeat every {found * P:.4g} nm in depth where the lattice's site pitch gives {P:.4g} nm "
            f"(ratio {found:.3g}): the repeat or sites per repeat may be wrong, or the depth scale is off by more than "
            f"the {CALIBRATE_RANGE[0]:g}-{CALIBRATE_RANGE[1]:g} the calibration corrects"),
            window_power=best, **windows, **base)
    # 2. local scan over (ratio, curvature)
    w_scale, w_power, kappa = _local_scan(u, rho2, subs, zc, P, found, radius_nm, periodic)
    ok = np.isfinite(w_scale)
    # 3. chain the window phases into T at the window centres, then the phase fit
    t_w = _chain(u, rho2, a_idx, b_idx, zc, w_scale, kappa, P, ok)
    fit = _phase_fit(x, y, z, rho2, u, zc[ok], t_w[ok], w_scale[ok], kappa, g, P, lo, hi, rng)
    windows.update(window_scale=w_scale, window_power=w_power)
    if fit is None:
        return DepthCalibration(calibrated=False, reason="the depth calibration did not converge (the site planes' "
                                "phase could not be followed through the depth range)", **windows, **base)
    return DepthCalibration(calibrated=True, reason="", **{**base, **windows, **fit})


def _local_scan(u, rho2, subs, zc, P, found, radius, periodic):
    """Per-window depth scale and n R^2 at the best common curvature (NaN where not periodic).

    The curvature is searched on the :data:`KAPPA_WINDOWS` most periodic windows (it is one
    number for the run); each window's scale then on a finer grid of ratios at that curvature.
    """
    coarse = _ratio_grid(found, 0.1, 21)
    kappas = np.linspace(-SAG_PITCHES, SAG_PITCHES, int(round(2 * SAG_PITCHES / 0.2)) + 1) * P / max(radius, 1e-6) ** 2
    wide_best = np.array([s.size for s in subs], float) * periodic
    pick = [j for j in np.argsort(-wide_best)[:KAPPA_WINDOWS] if periodic[j]]
    total = np.zeros((coarse.size, kappas.size))
    g = np.empty((coarse.size, kappas.size))
    for j in pick:
        s = subs[j][:KAPPA_IONS] if subs[j].size > KAPPA_IONS else subs[j]
        _power_grid(u[s] - zc[j], rho2[s], coarse, kappas, P, g)
        total += g.max(axis=0)[None, :]
    kb = int(np.argmax(total[0]))
    # refine the curvature between its neighbours (parabola through the three sums)
    kappa = float(kappas[kb])
    if 0 < kb < kappas.size - 1:
        y0, y1, y2 = total[0, kb - 1], total[0, kb], total[0, kb + 1]
        den = y0 - 2 * y1 + y2
        if den < 0:
            kappa += 0.5 * (y0 - y2) / den * (kappas[1] - kappas[0])
    ratios = _ratio_grid(found, 0.1, 41)
    la = 1.0 / ratios  # evenly spaced
    scale = np.full(len(subs), np.nan)
    power = np.zeros(len(subs))
    kap = np.array([kappa])

    def fine_scan(lo, hi):
        col = np.empty((ratios.size, 1))
        for j in range(lo, hi):
            if not periodic[j]:
                continue
            s = subs[j]
            _power_grid(u[s] - zc[j], rho2[s], ratios, kap, P, col)
            c = col[:, 0]
            a = int(np.argmax(c))
            power[j] = c[a]
            if power[j] < RAYLEIGH_MIN:
                continue
            d = 0.0
            if 0 < a < ratios.size - 1:  # parabolic peak in the inverse ratio
                den = c[a - 1] - 2 * c[a] + c[a + 1]
                d = 0.5 * (c[a - 1] - c[a + 1]) / den if den < 0 else 0.0
            scale[j] = 1.0 / (la[a] + d * (la[1] - la[0]))

    _over_windows(fine_scan, len(subs))
    return scale, power, kappa


def _over_windows(fn, n: int) -> None:
    """``fn(lo, hi)`` over the depth windows on the kernels' threads (each window's scan is its
    own: the results do not depend on the number of threads)."""
    from .. import runtime

    runtime.in_parts(fn, n, runtime.kernel_threads(), min_items=4)


def _chain(u, rho2, a_idx, b_idx, zc, scale, kappa, P, ok):
    """Calibrated coordinate T at each window centre from the windows' phases (NaN where not ok)."""
    t = np.full(zc.size, np.nan)
    prev = None
    for j in np.flatnonzero(ok):
        sl = slice(a_idx[j], b_idx[j])
        ph = np.angle(np.exp(2j * np.pi * (u[sl] - kappa * rho2[sl] - zc[j]) / (P * scale[j])).sum())
        target = -ph * P / (2 * np.pi)
        if prev is None:
            pred = zc[j]
        else:
            pj = prev
            pred = t[pj] + (zc[j] - zc[pj]) * 0.5 * (1.0 / scale[pj] + 1.0 / scale[j])
        t[j] = pred + _wrap(target - pred, P)
        prev = j
    return t


def _phase_fit(x, y, z, rho2, u, zw, tw, sw, kappa, g, P, lo, hi, rng, n_iter: int = 40):
    """Gauss-Newton fit of (spline T, kappa, b) to the ions' phases; dict of results or None."""
    n = z.size
    sel = np.sort(rng.choice(n, FIT_IONS, replace=False)) if n > FIT_IONS else np.arange(n)
    xs, ys, zs, r2 = x[sel], y[sel], z[sel], rho2[sel]
    n_int = int(np.clip(round((hi - lo) / KNOT_NM), 1, max(1, min(40, sel.size // IONS_PER_KNOT))))
    pad = abs(kappa) * float(rho2.max()) + 2 * P  # curvature moves w beyond the depth range
    knots = _knots(lo - pad, hi + pad, n_int)
    nb = knots.size - 4
    pen = _penalty(knots)
    # start: the spline through the chained window points (and their slopes)
    s_bar = float(np.exp(np.mean(np.log(sw))))
    zq = np.linspace(knots[0], knots[-1], 20 * nb)
    tq = np.interp(zq, zw, tw)
    tq = np.where(zq < zw[0], tw[0] + (zq - zw[0]) / sw[0], tq)
    tq = np.where(zq > zw[-1], tw[-1] + (zq - zw[-1]) / sw[-1], tq)
    coef = np.linalg.lstsq(_basis(knots, zq).toarray(), tq, rcond=None)[0]
    theta = np.concatenate([coef, [kappa], g / s_bar])
    # weak smoothing: about 1 % of the data's weight on a wiggle at the knot spacing h
    h = (knots[-1] - knots[0]) / n_int
    lam = 3e-3 * h ** 3 * sel.size / nb

    def objective(th):
        w = zs - th[nb] * r2
        f = _basis(knots, w) @ th[:nb] + th[nb + 1] * xs + th[nb + 2] * ys
        psi = 2 * np.pi * f / P
        return float(np.cos(psi).sum()) - 0.5 * lam * float(th[:nb] @ pen @ th[:nb]) * (2 * np.pi / P) ** 2, psi, w

    current, psi, w = objective(theta)
    for it in range(n_iter):
        coef = theta[:nb]
        cos, sin = np.cos(psi), np.sin(psi)
        R = float(cos.mean())
        if R <= 0.01:
            return None
        J = _design(_basis(knots, w), -_spline_eval(knots, coef, w, 1) * r2, xs, ys)
        JTJ = J.T @ J
        JTJ = np.asarray(JTJ.todense()) if hasattr(JTJ, "todense") else np.asarray(JTJ)
        H = R * JTJ
        H[:nb, :nb] += lam * pen
        grad = (P / (2 * np.pi)) * np.asarray(J.T @ sin).ravel()
        grad[:nb] += lam * (pen @ coef)
        try:
            step = -np.linalg.solve(H + 1e-12 * np.eye(H.shape[0]) * np.trace(H) / H.shape[0], grad)
        except np.linalg.LinAlgError:
            return None
        for _ in range(8):  # a step that lowers the likelihood is halved
            trial, psi_t, w_t = objective(theta + step)
            if trial >= current:
                break
            step = 0.5 * step
        else:
            break
        theta, current, psi, w = theta + step, trial, psi_t, w_t
        if np.max(np.abs(step[:nb])) < 1e-4 * P and abs(step[nb]) * max(float(r2.max()), 1e-9) < 1e-4 * P:
            break
    coef, kap, b = theta[:nb], theta[nb], theta[nb + 1:]
    w = zs - kap * r2
    f = _basis(knots, w) @ coef + b[0] * xs + b[1] * ys
    psi = 2 * np.pi * f / P
    R = float(np.cos(psi).mean())
    if R <= 0.01:
        return None
    J = _design(_basis(knots, w), -_spline_eval(knots, coef, w, 1) * r2, xs, ys)
    JTJ = J.T @ J
    JTJ = np.asarray(JTJ.todense()) if hasattr(JTJ, "todense") else np.asarray(JTJ)
    JTJ[:nb, :nb] += lam * pen
    cov = (P / (2 * np.pi)) ** 2 * float(np.mean(np.sin(psi) ** 2)) / R ** 2 * np.linalg.pinv(JTJ)
    return _summarise(knots, coef, kap, cov, nb, lo, hi, psi, xs, ys, r2, P)


def _design(B, dk, xs, ys):
    from scipy import sparse

    return sparse.hstack([B, sparse.csr_matrix(np.column_stack([dk, xs, ys]))]).tocsr()


def _summarise(knots, coef, kap, cov, nb, lo, hi, psi, xs, ys, r2, P):
    """Tables, profile, errors and the residual phase map of a converged fit."""
    step = min(0.25, (hi - lo) / 50)
    grid = np.linspace(lo, hi, max(3, int(math.ceil((hi - lo) / step)) + 1))
    T = _spline_eval(knots, coef, grid)
    T = T - T[0] + lo
    tp_grid = _spline_eval(knots, coef, grid, 1)
    if not (tp_grid > 0).all() or not (np.diff(T) > 0).all():
        return None
    prof_z = np.linspace(lo, hi, int(np.clip(round(hi - lo), 5, 200)) + 1)
    D1 = _basis(knots, prof_z, deriv=1)
    tp = D1 @ coef
    cc = cov[:nb, :nb]
    tp_err = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", D1, cc, D1), 0.0))
    Bends = _basis(knots, np.array([lo, hi])).toarray()
    dB = Bends[1] - Bends[0]
    span = float(dB @ coef)
    span_err = float(math.sqrt(max(dB @ cc @ dB, 0.0)))
    mean_scale = (hi - lo) / span
    radius = float(np.sqrt(np.percentile(r2, 98) / 0.98))
    return dict(grid_z_nm=grid, depth_nm=T, curvature_per_nm=float(kap),
                curvature_err=float(math.sqrt(max(cov[nb, nb], 0.0))), sag_at_radius_nm=float(kap * radius ** 2),
                mean_scale=float(mean_scale), mean_scale_err=float(mean_scale * span_err / span),
                scale_z_nm=prof_z, scale=1.0 / tp, scale_err=tp_err / tp ** 2,
                contrast_after=float(abs(np.exp(1j * psi).mean())), residual=_residual_map(psi, xs, ys, P))


def _residual_map(psi, x, y, P, n_bins: int = 12, min_ions: int = 30) -> dict:
    """Mean residual phase (fraction of a pitch) per lateral bin after calibration."""
    lo_x, hi_x = np.percentile(x, [1, 99])
    lo_y, hi_y = np.percentile(y, [1, 99])
    ex = np.linspace(lo_x, hi_x, n_bins + 1)
    ey = np.linspace(lo_y, hi_y, n_bins + 1)
    ix = np.clip(np.searchsorted(ex, x) - 1, 0, n_bins - 1)
    iy = np.clip(np.searchsorted(ey, y) - 1, 0, n_bins - 1)
    key = ix * n_bins + iy
    w = np.exp(1j * psi)
    s = np.bincount(key, w.real, n_bins * n_bins) + 1j * np.bincount(key, w.imag, n_bins * n_bins)
    cnt = np.bincount(key, minlength=n_bins * n_bins)
    mean = np.angle(s.sum())
    ph = np.angle(s * np.exp(-1j * mean)) / (2 * np.pi)
    ph[cnt < min_ions] = np.nan
    grid = ph.reshape(n_bins, n_bins)
    ok = np.isfinite(grid)
    rms = float(np.sqrt(np.mean(grid[ok] ** 2))) if ok.any() else float("nan")
    return {"x_edges_nm": [round(float(v), 3) for v in ex], "y_edges_nm": [round(float(v), 3) for v in ey],
            "phase_pitches": [[(round(float(v), 4) if np.isfinite(v) else None) for v in row] for row in grid],
            "rms_pitches": round(rms, 4) if math.isfinite(rms) else None,
            "about": "mean phase of the metal ions after calibration relative to the whole run, in fractions of "
                     "the site pitch, per lateral bin (x index first); 0 everywhere when the planes are flat"}
