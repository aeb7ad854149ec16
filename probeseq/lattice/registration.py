"""Register the known rod lattice in a reconstruction: tilt, rotation, lateral scale, offset.

Model
-----
The axis of a rod whose lattice-frame position is ``q`` (nm, from :class:`~probeseq.lattice.model.Lattice`)
lies, in the reconstruction frame at depth ``z``, at::

    r(z) = offset_nm + scale * R(rotation) @ q + tilt * (z - z_ref_nm)

``scale`` is reconstruction length / crystallographic length (the lateral calibration factor),
``tilt`` is (dx/dz, dy/dz). Metal ions scatter around their rod axis with an isotropic lateral
spread ``sigma_xy_nm``.

Method (coarse to fine)
-----------------------
1. **Power spectrum.** The metal ions are cut into thin depth slabs (thin enough that a tilt of
   ``max_tilt_deg`` moves a rod by at most a quarter of the nearest rod distance inside one slab);
   each slab's 2-D histogram is Fourier transformed and the power spectra are summed. The summed
   power does not depend on the tilt (a lateral shift only changes phases). It is normalised by its
   median on rings of equal ``|k|``, so lattice peaks read as "times the background".
2. **Rotation and scale.** A grid search over rotation (one symmetry period) and scale
   (``scale_range``) of the mean normalised power at the lattice's reciprocal vectors, weighted by
   the model structure factor, then a Nelder-Mead polish. The best mean is the *peak ratio*; below
   ``MIN_PEAK_RATIO`` the data hold no lattice signal and :class:`InputError` says so, naming the
   likely causes checked on the data (positions in angstrom, a lattice constant far off;
   :mod:`probeseq.lattice.sanity`).
3. **Tilt.** The complex Fourier coefficient of each slab at the strongest reciprocal vectors turns
   in phase as the pattern drifts with depth; the tilt that re-aligns the slabs (maximum coherent
   power) is found by a grid search then a polish.
4. **Offset.** The correlation of the tilt-corrected density with the model lattice, evaluated from
   the Fourier coefficients on a grid over one unit cell.
5. **Refinement.** Iterated nearest-rod assignment and Gauss-Newton least squares of the ion
   positions on the model (all free parameters jointly), first on the central half of the specimen,
   then on all of it. Uncertainties are the least-squares standard errors. Where rods are crowded
   (expected misassigned fraction above :data:`CROWDED_MISASSIGNED`) the rods at the outline are
   pulled inwards, so the placement is refitted (twice) on the ions of rods at least one rod
   distance plus two blur widths inside the outline.
6. **Resolution.** ``sigma_xy_nm`` is the maximum-likelihood spread of a 2-D Gaussian (plus a
   uniform background) fitted to the ion distances from their rod within half the nearest rod
   distance. The expected misassigned fraction is the share of a Gaussian cloud of
   that spread around a rod that lands nearer another rod, i.e. outside the rod's Voronoi cell.
7. **Sanity.** A fitted scale outside ``1 +- SCALE_WARN`` draws a warning that names the lattice
   constant the data suggest; a doubtful registration is compared with a wide scale search, and a
   lattice that fits far better at another scale is named in an error
   (:func:`probeseq.lattice.sanity.check_registered_scale`). Not when the scale is given.

Cost: the fit is bounded whatever the number of ions: at most ``max_fit_ions`` enter, the phase
stages use ``_N_PHASE`` of them, the refinement ``_N_REFINE`` and the spread fit ``_N_SIGMA``
distances; the power spectrum sums at most ``_SPECTRUM_SLABS`` slabs (one FFT each), while the
slabs stay thin enough for the tilt (up to 1024 of them, so a deep run is not aliased). The per-ion
loops (Fourier coefficients by integer powers of two phasors, coherent slab power, Gauss-Newton
normal equations, nearest-rod table build) are compiled with numba.

Symmetry: the rotation is only defined modulo the rotational symmetry of the rod pattern (60 deg
for the honeycomb and triangular presets, 90 deg for square) and the offset modulo lattice
translations; :func:`register_lattice` reports both in their fundamental domain (rotation in
``[0, period)``, offset inside the unit cell spanned from the reconstruction origin).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..exceptions import InputError
from ..io.ions import MAX_ABS_POSITION_NM
from ..utils.tomlfile import short_repr
from ..utils.validate import check_number, check_scale, check_seed
from .fourier import (
    _FFT_MAX,
    _N_PHASE,
    _f,
    _power_spectrum,
    _reciprocal_set,
    _search_offset,
    _search_rotation_scale,
    _search_tilt,
    _slab_coefficients,
    _slab_edges,
)
from .locator import _cached_locator, _cell_boundaries, _gn_pass, _locator_arrays, _rot, lattice_symmetry
from .model import Lattice
from .outline import _outline
from .sanity import NoLatticeSignal, SearchData, check_registered_scale, diagnose_no_signal

__all__ = ['Registration', 'register_lattice', 'expected_misassigned_fraction', 'MIN_METAL_IONS', 'MIN_PEAK_RATIO', 'RESOLVABLE_MISASSIGNED']

#: above this expected misassigned fraction the rods are crowded: the nearest-rod assignment pulls
#: the rods at the specimen's outline inwards (their outer neighbours are missing, their own ions
#: that stray outwards go to rods that are not there), which shrinks the fitted scale (by 1.7 % on
#: a honeycomb with d_nn 0.5 nm, blur 0.2 nm, 7 nm radius). The placement is then refitted on the
#: points away from the outline
CROWDED_MISASSIGNED = 0.05

#: fewest metal ions :func:`register_lattice` accepts (below this the Fourier peaks of a small
#: specimen do not rise reliably above shot noise; project choice, checked on simulated runs)
MIN_METAL_IONS = 2000


#: smallest mean normalised Fourier power at the lattice peaks accepted as a lattice signal. Pure
#: noise gives a mean near 1.4 (exponential speckle over its median) and its best match over the
#: search grid stays below about 3.5 (checked on uniform random data in the tests).
MIN_PEAK_RATIO = 5.0


#: single rods count as resolvable when the expected misassigned fraction is below this. At 0.2 a rod's own
#: ions are still >= 80 % of its counts, so the composition contrast between a rod and a
#: differing neighbour keeps >= 1 - 2 * 0.2 = 60 % of its true value; beyond it the neighbours'
#: signal takes over quickly (project choice).
RESOLVABLE_MISASSIGNED = 0.2


#: lattice-frame distance, as a fraction of the nearest rod distance, inside which ions enter the
#: least-squares refinement and the spread fit (the largest disc that never overlaps a neighbour's)
FIT_RADIUS_FRAC = 0.5


#: radius, as a fraction of the nearest rod distance, of the discs around the axes whose share of
#: ions (over that of a uniform density) is the registration quality
QUALITY_RADIUS_FRAC = 0.25


_N_REFINE = 100_000  # ions for the least-squares refinement and the spread fit


_N_SIGMA = 30_000  # distances for the spread fit (the spread to ~0.4 %)


# ====================================================================== result
@dataclass(frozen=True, eq=False)
class Registration:
    """A fitted placement of the rod lattice in the reconstruction frame.

    Attributes
    ----------
    lattice : Lattice
        The crystallographic lattice registered.
    rotation_deg : float, degrees
        Rotation of the lattice about z, in ``[0, 360 / symmetry_order)``.
    scale : float
        Reconstruction length per crystallographic length (lateral calibration factor).
    offset_nm : (2,) ndarray of float, nm
        Position of the lattice origin at depth ``z_ref_nm``, reduced into the unit cell.
    tilt : (2,) ndarray of float
        Rod axis direction (dx/dz, dy/dz).
    z_ref_nm : float, nm
        Depth at which ``offset_nm`` applies.
    rotation_deg_err, scale_err : float
        Standard errors (0 for a value given as an override).
    offset_nm_err, tilt_err : (2,) ndarray of float
        Standard errors.
    sigma_xy_nm, sigma_xy_nm_err : float, nm
        Lateral spread of metal ions around their rod axis (reconstruction frame) and its error.
    misassigned_fraction : float
        Expected share of a rod's ions that land nearer another rod.
    resolvable : bool
        ``misassigned_fraction < RESOLVABLE_MISASSIGNED``.
    quality : float
        Registration quality: (share of ions within a quarter of the nearest rod distance of a rod
        axis minus that share for a uniform density) / (1 minus the uniform share); 1 means every
        ion sits near an axis, 0 means no lattice (or a wrong placement).
    peak_ratio : float
        Mean normalised Fourier power at the lattice peaks (times the background); ``nan`` when
        rotation and scale were both given.
    background_fraction : float
        Fitted share of ions spread uniformly rather than around an axis.
    symmetry_order : int
        Rotational symmetry order of the rod pattern used to reduce the rotation.
    n_ions : int
        Metal ions given; ``n_fit`` of them entered the fit.
    n_fit : int
    fixed : tuple of str
        Parameters given as overrides and not fitted.
    """

    lattice: Lattice
    rotation_deg: float
    scale: float
    offset_nm: np.ndarray
    tilt: np.ndarray
    z_ref_nm: float = 0.0
    rotation_deg_err: float = 0.0
    scale_err: float = 0.0
    offset_nm_err: np.ndarray = field(default_factory=lambda: np.zeros(2))
    tilt_err: np.ndarray = field(default_factory=lambda: np.zeros(2))
    sigma_xy_nm: float = float("nan")
    sigma_xy_nm_err: float = float("nan")
    misassigned_fraction: float = float("nan")
    resolvable: bool = False
    quality: float = float("nan")
    peak_ratio: float = float("nan")
    background_fraction: float = float("nan")
    symmetry_order: int = 1
    n_ions: int = 0
    n_fit: int = 0
    fixed: tuple = ()

    def __post_init__(self):
        for k in ("offset_nm", "tilt", "offset_nm_err", "tilt_err"):
            a = np.array(getattr(self, k), dtype=float).reshape(2)
            a.flags.writeable = False
            object.__setattr__(self, k, a)

    # ------------------------------------------------------------ geometry
    @property
    def transform(self) -> np.ndarray:
        """(2, 2) matrix ``scale * R(rotation)``: lattice frame -> reconstruction frame, nm/nm."""
        return self.scale * _rot(math.radians(self.rotation_deg))

    @property
    def tilt_deg(self) -> float:
        """Angle of the rod axes from z, degrees."""
        return math.degrees(math.atan(math.hypot(*self.tilt)))

    def frac_map(self):
        """Affine map to fractional cell coordinates: ``f = M @ (x, y) + e * z + c``.

        Returns
        -------
        M : (2, 2) ndarray
        e : (2,) ndarray
        c : (2,) ndarray
        """
        Minv = np.linalg.inv(self.transform @ self.lattice.cell_matrix)
        e = -Minv @ self.tilt
        c = -Minv @ (self.offset_nm - self.tilt * self.z_ref_nm)
        return Minv, e, c

    def to_frac(self, x, y, z):
        """Fractional cell coordinates (f1, f2) of reconstruction-frame points, float64."""
        M, e, c = self.frac_map()
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        z = np.asarray(z, float)
        return (M[0, 0] * x + M[0, 1] * y + e[0] * z + c[0],
                M[1, 0] * x + M[1, 1] * y + e[1] * z + c[1])

    def axis_distance_nm(self, x, y, z) -> np.ndarray:
        """Distance of each point to the nearest rod axis, nm (lattice frame; ``inf`` where the
        point cannot be placed).

        Parameters
        ----------
        x, y, z : (n,) array of float, nm
            Reconstruction-frame positions.

        Returns
        -------
        (n,) ndarray of float, nm
        """
        f1, f2 = self.to_frac(x, y, z)
        locator = _cached_locator(self.lattice, self.lattice.nearest_rod_distance_nm, 64)
        ci, cj, code = locator.locate(f1, f2)
        ok = code >= 0
        d = np.full(f1.size, np.inf)
        rf = locator.rod_frac(ci[ok], cj[ok], code[ok])
        df = np.column_stack([f1[ok], f2[ok]]) - rf
        d[ok] = np.sqrt(((df @ self.lattice.cell_matrix.T) ** 2).sum(1))
        return d

    def lattice_to_recon(self, q_nm, z_nm=None) -> np.ndarray:
        """Reconstruction-frame position of lattice-frame points ``q_nm`` (n, 2) at depth ``z_nm``."""
        q = np.asarray(q_nm, float).reshape(-1, 2)
        r = q @ self.transform.T + self.offset_nm
        if z_nm is not None:
            r = r + self.tilt * (float(z_nm) - self.z_ref_nm)
        return r

    def rod_positions(self, radius_nm: float, center_nm=(0.0, 0.0)) -> np.ndarray:
        """Rod axes (reconstruction frame, nm, at ``z_ref_nm``) within ``radius_nm`` of ``center_nm``."""
        c = np.asarray(center_nm, float)
        A = self.transform
        q0 = np.linalg.solve(A, c - self.offset_nm)
        q = self.lattice.rod_positions(radius_nm / self.scale + 1e-9, q0)
        return self.lattice_to_recon(q)

    def to_dict(self) -> dict:
        """JSON-able summary: every fitted value with its standard error and the quality figures."""
        return {
            "rotation_deg": float(self.rotation_deg), "rotation_deg_err": float(self.rotation_deg_err),
            "rotation_period_deg": 360.0 / self.symmetry_order,
            "scale": float(self.scale), "scale_err": float(self.scale_err),
            "offset_nm": [float(v) for v in self.offset_nm],
            "offset_nm_err": [float(v) for v in self.offset_nm_err],
            "tilt": [float(v) for v in self.tilt], "tilt_err": [float(v) for v in self.tilt_err],
            "tilt_deg": float(self.tilt_deg),
            "tilt_azimuth_deg": float(math.degrees(math.atan2(self.tilt[1], self.tilt[0])) % 360.0),
            "z_ref_nm": float(self.z_ref_nm),
            "sigma_xy_nm": _f(self.sigma_xy_nm), "sigma_xy_nm_err": _f(self.sigma_xy_nm_err),
            "misassigned_fraction": _f(self.misassigned_fraction), "resolvable": bool(self.resolvable),
            "resolvable_threshold": RESOLVABLE_MISASSIGNED,
            "quality": _f(self.quality), "peak_ratio": _f(self.peak_ratio),
            "background_fraction": _f(self.background_fraction),
            "symmetry_order": int(self.symmetry_order),
            "n_ions": int(self.n_ions), "n_fit": int(self.n_fit), "fixed": list(self.fixed),
            "lattice": self.lattice.to_dict(),
        }


# ====================================================================== refinement
def _refine(x, y, z, lattice, locator, p, free, z_ref, center, radius_all, fit_r, n_iter=30, inside=None):
    """Iterated nearest-rod assignment + Gauss-Newton least squares.

    p = [ox, oy, tx, ty, theta_rad, scale]; returns p, covariance (6x6, zeros for fixed), the
    residual distances (lattice frame, nm) of all points to their assigned rod, and n used.
    Each iteration is one compiled pass (:func:`_gn_kernel`) that assigns every point to its
    nearest rod and accumulates the normal equations, without per-point temporaries. The points
    are those within half the radius first, then all; with ``inside`` (bool per point) only those.
    """
    C = np.ascontiguousarray(lattice.cell_matrix, np.float64)
    x = np.ascontiguousarray(x, np.float64)
    y = np.ascontiguousarray(y, np.float64)
    zr = np.ascontiguousarray(z - z_ref, np.float64)
    if inside is None:
        rr = np.hypot(x - center[0], y - center[1])
        stages = [0.5 * radius_all, np.inf]
    else:  # a distance the stage's limit reads: 0 for the points kept, 1 for the others
        rr = np.where(inside, 0.0, 1.0)
        stages = [0.5]
    cov = np.zeros((6, 6))
    free = np.asarray(free, bool)
    stage = 0
    p = np.array(p, float)
    dist = np.empty(x.size)
    ok = np.empty(x.size, np.bool_)
    loc = _locator_arrays(locator)
    n_use = 0
    for it in range(n_iter):
        JTJ, JTe, sse, n_use = _gn_pass(x, y, zr, rr, p, C, loc, fit_r, stages[stage], dist, ok)
        if n_use < 20:
            JTJ, JTe, sse, n_use = _gn_pass(x, y, zr, rr, p, C, loc, fit_r, np.inf, dist, ok)
        if n_use < 20:
            raise NoLatticeSignal("lattice registration: fewer than 20 metal ions lie near a model rod axis: "
                                  "no lattice signal")
        JTJ = JTJ[np.ix_(free, free)]
        JTe = JTe[free]
        try:
            delta = np.linalg.solve(JTJ, JTe)
            inv = np.linalg.inv(JTJ)
        except np.linalg.LinAlgError:
            raise InputError("lattice registration: the refinement is singular (ions too few or all at "
                             "one depth); give --rotation-deg, --scale and --offset-nm") from None
        p[free] += delta
        dof = max(2 * n_use - int(free.sum()), 1)
        s2 = float(sse) / dof
        cov = np.zeros((6, 6))
        cov[np.ix_(free, free)] = s2 * inv
        small = np.abs(delta) <= 0.02 * np.sqrt(np.diag(cov)[free]) + 1e-12
        if small.all():
            if stage + 1 < len(stages):
                stage += 1
            else:
                break
    return p, cov, dist, ok, int(n_use)


def _fit_sigma(d, rmax):
    """MLE of (sigma, background share) for distances d < rmax: truncated 2-D Gaussian + uniform."""
    from scipy.optimize import minimize

    d = d[d < rmax]
    if d.size > _N_SIGMA:  # keep the fit fast
        d = d[:: int(math.ceil(d.size / _N_SIGMA))]
    if d.size < 10:
        return float("nan"), float("nan"), float("nan")
    d2 = d * d

    def nll(par):
        s = math.exp(par[0])
        fb = 1 / (1 + math.exp(-par[1]))
        norm = -math.expm1(-rmax ** 2 / (2 * s * s))
        g = (1 - fb) * np.exp(-d2 / (2 * s * s)) / (s * s * norm)
        u = fb * 2.0 / rmax ** 2
        return -float(np.log(g + u).sum())

    s0 = math.sqrt(max(np.mean(d2) / 2, 1e-8))
    best = None
    for b0 in (-3.0,):
        r = minimize(nll, [math.log(s0), b0], method="Nelder-Mead",
                     options={"xatol": 1e-5, "fatol": 1e-6, "maxiter": 400})
        if best is None or r.fun < best.fun:
            best = r
    s = math.exp(best.x[0])
    fb = 1 / (1 + math.exp(-best.x[1]))
    # standard error from the curvature in log sigma
    hstep = 1e-3
    f0 = nll(best.x)
    fp = nll(best.x + [hstep, 0])
    fm = nll(best.x - [hstep, 0])
    curv = (fp - 2 * f0 + fm) / hstep ** 2
    err = s / math.sqrt(curv) if curv > 0 else float("nan")
    return s, err, fb


def expected_misassigned_fraction(lattice: Lattice, sigma_nm: float, n_angles: int = 4096) -> float:
    """Expected share of a rod's ions that land nearer another rod (outside its Voronoi cell).

    For an isotropic 2-D Gaussian of spread ``sigma_nm`` centred on a rod, the share beyond a
    distance ``r`` in a given direction is ``exp(-r^2 / (2 sigma^2))`` (the radial tail, a
    Rayleigh law); a Voronoi cell is convex about its rod, with boundary distance
    ``r(theta) = min_j |d_j|^2 / (2 u(theta) . d_j)`` over the other rods ``d_j`` (relative
    positions) with ``u . d_j > 0``. So the share outside is the mean over directions of
    ``exp(-r(theta)^2 / (2 sigma^2))``, here by the midpoint rule on ``n_angles`` directions
    (periodic, so the rule converges fast; the kinks at the cell's corners leave relative errors
    below 1e-6), averaged over the basis rods. The boundary distances depend on the lattice only
    and are kept per process.

    Parameters
    ----------
    lattice : Lattice
    sigma_nm : float, nm
        Lateral spread per axis, lattice frame.
    n_angles : int
        Directions of the quadrature.
    """
    if not (sigma_nm > 0 and math.isfinite(sigma_nm)):
        return 0.0 if sigma_nm == 0 else float("nan")
    r = _cell_boundaries(lattice, int(n_angles))
    return float(np.exp(-(r * r) / (2 * sigma_nm * sigma_nm)).mean())


# ====================================================================== public
def _check_xyz(x, y, z):
    try:
        x = np.asarray(x, dtype=float).ravel()
        y = np.asarray(y, dtype=float).ravel()
        z = np.asarray(z, dtype=float).ravel()
    except (TypeError, ValueError):
        raise InputError("metal ion positions x, y, z must be numeric arrays (nm)") from None
    if not (x.size == y.size == z.size):
        raise InputError(f"metal ion positions x, y, z must have equal lengths, got {x.size}, {y.size}, {z.size}")
    if not (np.isfinite(x).all() and np.isfinite(y).all() and np.isfinite(z).all()):
        raise InputError("metal ion positions x, y, z contain NaN or infinite values")
    return x, y, z


def _check_override(name, value, n):
    if value is None:
        return None
    try:
        a = np.asarray(value, dtype=float).ravel()
    except (TypeError, ValueError):
        raise InputError(f"{name} must be {n} finite number(s), got {short_repr(value)}") from None
    if a.size != n or not np.isfinite(a).all():
        raise InputError(f"{name} must be {n} finite number(s), got {short_repr(value)}")
    if name == "--scale":
        check_scale(float(a[0]))
    if name == "--rotation-deg":
        check_number(float(a[0]), name, -360, 360)
    if name == "--offset-nm":
        check_number(float(np.abs(a).max()), "--offset-nm (largest magnitude, nm)", 0, MAX_ABS_POSITION_NM)
    return a if n > 1 else float(a[0])


def register_lattice(x, y, z, lattice: Lattice, rotation_deg=None, scale=None, offset_nm=None,
                     tilt=None, random_state=None, *, z_ref_nm: float = 0.0,
                     scale_range=(0.8, 1.25), max_tilt_deg: float = 6.0,
                     max_fit_ions: int = 1_000_000) -> Registration:
    """Fit the placement of the known rod lattice to metal-ion positions.

    Parameters
    ----------
    x, y, z : (n_ions,) ndarray of float, nm
        Positions of the metal ions (reconstruction frame; z is depth).
    lattice : Lattice
        The crystallographic rod packing.
    rotation_deg : float, degrees, optional
        Fix the rotation instead of fitting it.
    scale : float, optional
        Fix the lateral scale (reconstruction / crystal length) instead of fitting it.
    offset_nm : (2,) array of float, nm, optional
        Fix the position of the lattice origin at ``z_ref_nm`` instead of fitting it.
    tilt : (2,) array of float, optional
        Fix the rod direction (dx/dz, dy/dz) instead of fitting it.
    random_state : int or numpy.random.Generator, optional
        Seeds the subsample used when there are more than ``max_fit_ions`` ions.
    z_ref_nm : float, nm
        Depth at which ``offset_nm`` is defined.
    scale_range : (float, float)
        Scales searched when ``scale`` is not given.
    max_tilt_deg : float, degrees
        Largest tilt searched per axis.
    max_fit_ions : int
        Largest number of ions entering the fit (a random subsample beyond it).

    Returns
    -------
    Registration

    Raises
    ------
    InputError
        Too few metal ions, a specimen narrower than one cell, or no lattice signal (the message
        names the likely causes checked on the data: positions in angstrom, a lattice constant far
        off); or the lattice matches only in part while it fits far better at a scale outside
        ``scale_range`` (:func:`probeseq.lattice.sanity.check_registered_scale`).

    Warns
    -----
    DataQualityWarning
        The fitted scale is outside ``1 +- SCALE_WARN`` (the lattice constant or the reconstruction's
        lateral scale is off); not when ``scale`` is given.
    """
    return _register(x, y, z, lattice, rotation_deg, scale, offset_nm, tilt, random_state, z_ref_nm, scale_range,
                     max_tilt_deg, max_fit_ions, checks=True)


def _register(x, y, z, lattice, rotation_deg, scale, offset_nm, tilt, random_state, z_ref_nm, scale_range,
              max_tilt_deg, max_fit_ions, checks):
    """:func:`register_lattice`; with ``checks`` a lattice constant or a length unit far off is named
    (:mod:`probeseq.lattice.sanity`), without them a missing signal raises :class:`NoLatticeSignal`."""
    x, y, z, scale_range = _check_registration_inputs(x, y, z, lattice, scale_range, max_tilt_deg,
                                                      random_state)
    n_ions = x.size
    rotation_deg = _check_override("--rotation-deg", rotation_deg, 1)
    scale = _check_override("--scale", scale, 1)
    offset_nm = _check_override("--offset-nm", offset_nm, 2)
    tilt = _check_override("tilt", tilt, 2)
    rng = np.random.default_rng(random_state)
    if n_ions > max_fit_ions:
        sel = np.sort(rng.choice(n_ions, max_fit_ions, replace=False))
        x, y, z = x[sel], y[sel], z[sel]
    n_fit = x.size
    # smaller random subsets for the phase stages and the least-squares refinement (their
    # precision is far below the targets already; see the module notes)
    perm = rng.permutation(n_fit)
    sub_phase = np.sort(perm[:_N_PHASE])
    sub_fit = np.sort(perm[:_N_REFINE])

    order, shift_frac = lattice_symmetry(lattice)
    period = 360.0 / order
    d_nn = lattice.nearest_rod_distance_nm
    center = np.array([0.5 * (np.percentile(x, 1) + np.percentile(x, 99)),
                       0.5 * (np.percentile(y, 1) + np.percentile(y, 99))])
    xr, yr = x - center[0], y - center[1]
    rad = np.hypot(xr, yr)
    r98 = float(np.percentile(rad, 98))
    radius = r98 / math.sqrt(0.98)
    cell_size = max(lattice.a_nm, lattice.b_nm)
    if 2 * radius < cell_size:
        raise InputError(f"specimen too narrow to register the lattice: metal ions span a diameter of "
                         f"{2 * radius:.3g} nm, less than one cell ({cell_size:.3g} nm)")

    fixed = tuple(k for k, v in (("rotation_deg", rotation_deg), ("scale", scale), ("offset_nm", offset_nm),
                                 ("tilt", tilt)) if v is not None)
    sd = SearchData(xr, yr, z, lattice, period, rotation_deg, scale, tilt, float(z_ref_nm), float(max_tilt_deg),
                    scale_range, MIN_PEAK_RATIO, center)

    def refit(s_range):  # the same registration with the scale searched over s_range, unchecked
        return _register(x, y, z, lattice, rotation_deg, None, offset_nm, tilt, random_state, z_ref_nm, s_range,
                         max_tilt_deg, max_fit_ions, False)

    locator = _cached_locator(lattice, d_nn, 64)
    free = [offset_nm is None, offset_nm is None, tilt is None, tilt is None, rotation_deg is None, scale is None]
    fit_r = FIT_RADIUS_FRAC * d_nn
    xf, yf, zf = x[sub_fit], y[sub_fit], z[sub_fit]
    try:
        th0, s0, peak_ratio, t0, o0, spec = _initial_placement(
            x, y, z, xr, yr, rad, center, lattice, d_nn, period, sub_phase, rotation_deg, scale, offset_nm,
            tilt, z_ref_nm, scale_range, max_tilt_deg)
        p0 = [o0[0], o0[1], t0[0], t0[1], math.radians(th0), s0]
        if any(free):
            p, cov, _, _, _ = _refine(xf, yf, zf, lattice, locator, p0, free, z_ref_nm, center, radius, fit_r)
        else:
            p, cov = np.array(p0, float), np.zeros((6, 6))
    except NoLatticeSignal as e:  # name the likely causes, checked on the data
        if not checks:
            raise
        raise InputError(f"{e}; {diagnose_no_signal(sd, r98, radius, n_ions, refit)}") from None
    dist, ok, sig_lat, sig_err, bg, misassigned = _spread(xf, yf, zf, lattice, locator, p, z_ref_nm, fit_r)
    if misassigned > CROWDED_MISASSIGNED and (free[4] or free[5]):
        for _ in range(2):  # the rods kept depend on the placement: once more with the refitted one
            rx, ry = _rod_positions(xf, yf, zf, lattice, locator, p, z_ref_nm)
            inside = _away_from_edge(xf, yf, zf, rx, ry, d_nn + 2.0 * sig_lat * p[5])
            if inside.sum() < min(_N_REFINE, 0.2 * xf.size):
                break
            p, cov, _, _, _ = _refine(xf, yf, zf, lattice, locator, p, free, z_ref_nm, center, radius, fit_r,
                                      inside=inside)
        dist, ok, sig_lat, sig_err, bg, misassigned = _spread(xf, yf, zf, lattice, locator, p, z_ref_nm, fit_r)
    theta, off = _fundamental_placement(p, lattice, shift_frac, period, rotation_deg is None, offset_nm is None)
    # resolution and quality
    q_r = QUALITY_RADIUS_FRAC * d_nn
    within = float((ok & (dist < q_r)).sum()) / xf.size
    u0 = lattice.rod_density_per_nm2 * math.pi * q_r ** 2
    quality = (within - u0) / (1 - u0)
    err = np.sqrt(np.maximum(np.diag(cov), 0.0))
    reg = Registration(
        lattice=lattice, rotation_deg=float(theta), scale=float(p[5]), offset_nm=off, tilt=p[2:4].copy(),
        z_ref_nm=float(z_ref_nm), rotation_deg_err=float(math.degrees(err[4])), scale_err=float(err[5]),
        offset_nm_err=err[0:2], tilt_err=err[2:4], sigma_xy_nm=float(sig_lat * p[5]),
        sigma_xy_nm_err=float(sig_err * p[5]), misassigned_fraction=float(misassigned),
        resolvable=bool(misassigned < RESOLVABLE_MISASSIGNED), quality=float(quality), peak_ratio=float(peak_ratio),
        background_fraction=float(bg), symmetry_order=int(order), n_ions=int(n_ions), n_fit=int(n_fit),
        fixed=fixed)
    if checks:
        check_registered_scale(sd, reg, s0, spec, refit)
    return reg


def _spread(x, y, z, lattice, locator, p, z_ref_nm, fit_r):
    """The points' distances to their nearest rod of placement ``p`` (lattice frame, nm) and which
    count, the fitted spread (its error and the background share) and the expected misassigned
    fraction."""
    dist, ok = _distances(x, y, z, lattice, locator, p, z_ref_nm)
    sig_lat, sig_err, bg = _fit_sigma(dist[ok], fit_r)
    misassigned = expected_misassigned_fraction(lattice, sig_lat) if math.isfinite(sig_lat) else float("nan")
    return dist, ok, sig_lat, sig_err, bg, misassigned


def _away_from_edge(x, y, z, rod_x, rod_y, band_nm: float) -> np.ndarray:
    """(n,) bool: points whose rod (``rod_x, rod_y``, NaN for none) lies farther than ``band_nm``
    inside the specimen's outline at their depth (:func:`probeseq.lattice.outline._outline` of the
    points, in 16 depth slabs). Points are kept or dropped with their rod, so the rods kept keep all
    their points (a cut through the points would pull the rods at the cut inwards, as the outline
    does)."""
    zc, cen, rad = _outline(x, y, z, slab_nm=max((float(z.max()) - float(z.min())) / 16, 0.5))
    cx, cy, r = (np.interp(z, zc, v) for v in (cen[:, 0], cen[:, 1], rad))
    with np.errstate(invalid="ignore"):
        return np.hypot(rod_x - cx, rod_y - cy) < r - band_nm


def _rod_positions(x, y, z, lattice, locator, p, z_ref):
    """Reconstruction-frame position (nm) of every point's nearest rod axis at its depth under the
    placement ``p`` (NaN where the locator finds none)."""
    f, rf, ok, A, zr = _nearest_rods(x, y, z, lattice, locator, p, z_ref)
    rx, ry = np.full(x.size, np.nan), np.full(x.size, np.nan)
    q = rf @ (A @ lattice.cell_matrix).T
    rx[ok] = q[:, 0] + p[0] + p[2] * zr[ok]
    ry[ok] = q[:, 1] + p[1] + p[3] * zr[ok]
    return rx, ry


def _nearest_rods(x, y, z, lattice, locator, p, z_ref):
    """The points in the lattice's fractional frame under the placement ``p`` ((n, 2)), their nearest
    rods' fractional positions ((m, 2), for the points with one), which points have one, the
    transform ``scale R(rotation)`` and the depths from ``z_ref``."""
    C = lattice.cell_matrix
    A = p[5] * _rot(p[4])
    zr = z - z_ref
    Ainv = np.linalg.inv(A @ C)
    px, py = x - p[0] - p[2] * zr, y - p[1] - p[3] * zr
    f = np.column_stack([Ainv[0, 0] * px + Ainv[0, 1] * py, Ainv[1, 0] * px + Ainv[1, 1] * py])
    ci, cj, code = locator.locate(f[:, 0], f[:, 1])
    ok = code >= 0
    return f, locator.rod_frac(ci[ok], cj[ok], code[ok]), ok, A, zr


def _check_registration_inputs(x, y, z, lattice, scale_range, max_tilt_deg, random_state):
    """Validate the inputs of :func:`register_lattice`; return ``(x, y, z, scale_range)``."""
    if not isinstance(lattice, Lattice):
        raise InputError(f"lattice must be a probeseq Lattice, got {type(lattice).__name__}")
    x, y, z = _check_xyz(x, y, z)
    n_ions = x.size
    if n_ions < MIN_METAL_IONS:
        raise InputError(f"too few metal ions to register the lattice: {n_ions} given, need at least "
                         f"{MIN_METAL_IONS}")
    try:
        s_lo, s_hi = (float(v) for v in scale_range)
    except (TypeError, ValueError):
        raise InputError(f"scale_range must be (low, high), got {scale_range!r}") from None
    if not (0 < s_lo < s_hi and math.isfinite(s_hi)):
        raise InputError(f"scale_range must be (low, high) with 0 < low < high, got {scale_range!r}")
    scale_range = (s_lo, s_hi)
    if not (isinstance(max_tilt_deg, (int, float)) and 0 < max_tilt_deg < 45):
        raise InputError(f"max_tilt_deg must be in (0, 45) degrees, got {max_tilt_deg!r}")
    check_seed(random_state)
    return x, y, z, scale_range


def _initial_placement(x, y, z, xr, yr, rad, center, lattice, d_nn, period, sub_phase, rotation_deg, scale,
                       offset_nm, tilt, z_ref_nm, scale_range, max_tilt_deg):
    """Starting placement for the refinement: rotation and scale from the slab power spectrum,
    then tilt and offset from the phases of the strongest reciprocal peaks (fixed values kept).

    Returns ``(rotation_deg, scale, peak_ratio, tilt, offset_nm, spectrum)`` (the spectrum ``None``
    when rotation and scale are both given).
    """
    sigma0 = d_nn / 6.0
    s_lo = scale_range[0] if scale is None else scale
    h = d_nn / 6.0 * min(1.0, s_lo / 0.8)  # a finer pixel for scales below the default range
    extent = 2 * float(rad.max()) + 4 * h
    N = min(1 << int(math.ceil(math.log2(max(extent / h, 64)))), _FFT_MAX)
    k_nyq = 0.5 / h
    # recon-frame peaks are g / scale: keep the largest below 0.7 x Nyquist at the smallest scale
    k_max = min(0.7 * k_nyq * s_lo, 3.0 / d_nn)
    hk, g, S, w = _reciprocal_set(lattice, k_max, sigma0)
    if hk.shape[0] == 0:
        raise InputError(f"lattice {lattice.name}: no reciprocal-lattice peak below {k_max:.3g} /nm to register")
    tan_max = math.tan(math.radians(max_tilt_deg))
    if tilt is not None:
        xr = xr - tilt[0] * (z - z_ref_nm)
        yr = yr - tilt[1] * (z - z_ref_nm)
        slab_thick = np.inf
    else:
        slab_thick = 0.25 * d_nn / tan_max
    edges = _slab_edges(z, slab_thick)
    n_slabs = edges.size - 1
    slab = np.clip(np.searchsorted(edges, z, side="right") - 1, 0, n_slabs - 1)
    zc = 0.5 * (edges[:-1] + edges[1:])

    peak_ratio, spec = float("nan"), None
    if rotation_deg is None or scale is None:
        spec = _power_spectrum(xr, yr, slab, n_slabs, h, N)
        th0, s0, peak_ratio = _search_rotation_scale(spec, g, w, period, scale_range, rotation_deg, scale)
        if peak_ratio < MIN_PEAK_RATIO:
            searched = []
            if rotation_deg is None:
                searched.append(f"rotation 0-{period:g} deg")
            if scale is None:
                searched.append(f"scale {scale_range[0]:g}-{scale_range[1]:g}")
            raise NoLatticeSignal(
                f"no lattice signal in the metal-ion density: searched {' and '.join(searched)} for the "
                f"{hk.shape[0]} strongest reciprocal peaks of lattice {lattice.name or '(custom)'} over "
                f"{n_slabs} depth slabs; best match rotation {th0:.2f} deg, scale {s0:.4f} with peak power "
                f"{peak_ratio:.2f}x background (need >= {MIN_PEAK_RATIO:g})")
    else:
        th0, s0 = float(rotation_deg), float(scale)
    Rm = _rot(math.radians(th0))
    K = (g @ Rm.T) / s0  # recon-frame reciprocal vectors
    Bp = (Rm @ np.linalg.inv(lattice.cell_matrix).T) / s0  # their basis: K = hk @ Bp.T
    # strongest peaks carry the phase information
    m = min(8, K.shape[0])
    sp = sub_phase
    if tilt is None:
        F = _slab_coefficients(xr[sp], yr[sp], slab[sp], n_slabs, hk[:m], Bp)
        t0 = _search_tilt(F, zc - z_ref_nm, K[:m], tan_max)
        xr_c = xr[sp] - t0[0] * (z[sp] - z_ref_nm)
        yr_c = yr[sp] - t0[1] * (z[sp] - z_ref_nm)
    else:
        t0 = np.asarray(tilt, float)
        xr_c, yr_c = xr[sp], yr[sp]
    if offset_nm is None:
        Fsum = _slab_coefficients(xr_c, yr_c, np.zeros(sp.size, np.int64), 1, hk, Bp)[0]
        fo = _search_offset(Fsum, S, np.sqrt(w), hk)
        o0 = center + (s0 * Rm @ lattice.cell_matrix) @ fo
    else:
        o0 = np.asarray(offset_nm, float)
    return th0, s0, peak_ratio, t0, o0, spec


def _fundamental_placement(p, lattice, shift_frac, period, fit_rotation, fit_offset):
    """Reduce fitted parameters ``p`` to the fundamental domain; return ``(rotation_deg, offset_nm)``.

    A fitted rotation is brought into ``[0, period)`` with the matching symmetry shift of the
    offset; a fitted offset is wrapped into the first cell.
    """
    theta = math.degrees(p[4])
    off = p[0:2].copy()
    T = lattice.cell_matrix @ shift_frac
    if fit_rotation:
        while theta >= period:
            theta -= period
            off = off + p[5] * _rot(math.radians(theta)) @ T
        while theta < 0:
            off = off - p[5] * _rot(math.radians(theta)) @ T
            theta += period
    AC = p[5] * _rot(math.radians(theta)) @ lattice.cell_matrix
    if fit_offset:
        fo = np.linalg.solve(AC, off)
        off = AC @ (fo - np.floor(fo))
    return theta, off


def _distances(x, y, z, lattice, locator, p, z_ref):
    """Distance (lattice frame, nm) of every point to its nearest rod under ``p`` (inf for none), and
    which points have one."""
    f, rf, ok, _, _ = _nearest_rods(x, y, z, lattice, locator, p, z_ref)
    d = np.full(x.size, np.inf)
    d[ok] = np.sqrt((((f[ok] - rf) @ lattice.cell_matrix.T) ** 2).sum(1))
    return d, ok
