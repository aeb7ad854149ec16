"""Register the known rod lattice in a reconstruction: tilt, rotation, lateral scale, offset.

Model
-----
The axis of a rod whose lattice-frame position is ``q`` (nm, from :class:`~probeseq.lattice.Lattice`)
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
   ``MIN_PEAK_RATIO`` the data hold no lattice signal and :class:`InputError` says so.
3. **Tilt.** The complex Fourier coefficient of each slab at the strongest reciprocal vectors turns
   in phase as the pattern drifts with depth; the tilt that re-aligns the slabs (maximum coherent
   power) is found by a grid search then a polish.
4. **Offset.** The correlation of the tilt-corrected density with the model lattice, evaluated from
   the Fourier coefficients on a grid over one unit cell.
5. **Refinement.** Iterated nearest-rod assignment and Gauss-Newton least squares of the ion
   positions on the model (all free parameters jointly), first on the central half of the specimen,
   then on all of it. Uncertainties are the least-squares standard errors.
6. **Resolution.** ``sigma_xy_nm`` is the maximum-likelihood spread of a 2-D Gaussian (plus a
   uniform background) fitted to the ion distances from their rod within half the nearest rod
   distance. The expected crosstalk is the share of a Gaussian cloud of
   that spread around a rod that lands nearer another rod, i.e. outside the rod's Voronoi cell.

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

import functools
import math
from dataclasses import dataclass, field

import numba
import numpy as np

from .exceptions import InputError
from .lattice import Lattice
from .tomlfile import short_repr
from .ions import MAX_ABS_POSITION_NM
from .validate import check_number, check_scale, check_seed

__all__ = [
    "Registration",
    "RodLocator",
    "register_lattice",
    "lattice_symmetry",
    "expected_crosstalk",
    "MIN_METAL_IONS",
    "MIN_PEAK_RATIO",
    "RESOLVABLE_CROSSTALK",
]

#: fewest metal ions :func:`register_lattice` accepts (below this the Fourier peaks of a small
#: specimen do not rise reliably above shot noise; project choice, checked on simulated runs)
MIN_METAL_IONS = 2000
#: smallest mean normalised Fourier power at the lattice peaks accepted as a lattice signal. Pure
#: noise gives a mean near 1.4 (exponential speckle over its median) and its best match over the
#: search grid stays below about 3.5 (checked on uniform random data in the tests).
MIN_PEAK_RATIO = 5.0
#: single rods count as resolvable when the expected crosstalk is below this. At 0.2 a rod's own
#: ions are still >= 80 % of its counts, so the composition contrast between a rod and a
#: differing neighbour keeps >= 1 - 2 * 0.2 = 60 % of its true value; beyond it the neighbours'
#: signal takes over quickly (project choice).
RESOLVABLE_CROSSTALK = 0.2
#: lattice-frame distance, as a fraction of the nearest rod distance, inside which ions enter the
#: least-squares refinement and the spread fit (the largest disc that never overlaps a neighbour's)
FIT_RADIUS_FRAC = 0.5
#: radius, as a fraction of the nearest rod distance, of the discs around the axes whose share of
#: ions (over that of a uniform density) is the registration quality
QUALITY_RADIUS_FRAC = 0.25

_SHIFTS = 2  # image cells searched around the unit cell: -2..2 in each direction
_N_PHASE = 120_000  # ions for the per-slab Fourier coefficients (tilt, offset)
_N_REFINE = 100_000  # ions for the least-squares refinement and the spread fit
_N_SIGMA = 30_000  # distances for the spread fit (the spread to ~0.4 %)
_FFT_MAX = 512  # largest FFT grid; the power spectrum uses the central window of that size
_SPECTRUM_SLABS = 12  # most depth slabs summed in the power spectrum (one 2-D FFT each)


def _rot(theta_rad: float) -> np.ndarray:
    c, s = math.cos(theta_rad), math.sin(theta_rad)
    return np.array([[c, -s], [s, c]])


# ====================================================================== lattice symmetry
def lattice_symmetry(lattice: Lattice, tol: float = 2e-3):
    """Rotational symmetry of the rod pattern about the lattice origin, up to a translation.

    Parameters
    ----------
    lattice : Lattice

    Returns
    -------
    order : int
        Largest n in (6, 4, 3, 2, 1) such that rotating the rod pattern by 360/n degrees gives the
        same pattern shifted by a vector ``t``.
    shift_frac : (2,) ndarray of float
        That ``t`` in fractional coordinates (rotated pattern = pattern + t, modulo the lattice).
    """
    C = lattice.cell_matrix
    Cinv = np.linalg.inv(C)
    rods = lattice.rods_frac
    for n in (6, 4, 3, 2):
        Rn = _rot(2 * math.pi / n)
        M = Cinv @ Rn @ C  # rotation in fractional coordinates
        if np.abs(M - np.rint(M)).max() > tol:
            continue
        rot = (rods @ M.T)
        for j in range(rods.shape[0]):
            t = rot[0] - rods[j]
            moved = rot - t
            d = moved[:, None, :] - rods[None, :, :]
            d -= np.rint(d)
            if (np.abs(d).max(-1) < tol).any(1).all():
                t = t - np.floor(t + 1e-9)
                return n, np.where(np.abs(t) < 1e-9, 0.0, t)
    return 1, np.zeros(2)


# ====================================================================== nearest-rod lookup
@dataclass(frozen=True, eq=False)
class RodLocator:
    """Exact nearest-rod assignment in fractional cell coordinates through a lookup table.

    The unit cell (in fractional coordinates) is cut into ``n_grid`` x ``n_grid`` cells. A grid cell
    whose four corners share one nearest rod and lie within the cutoff disc of that rod is wholly
    inside that rod's Voronoi cell and disc (both are convex), so its ions get the rod from the table.
    A grid cell that lies farther than the cutoff from every rod is marked excluded. The remaining
    grid cells carry a short, provably complete list of candidate rods (every rod that can be nearest
    to some point of the cell) and their ions are resolved exactly.

    A rod is coded ``b * 25 + (di + 2) * 5 + (dj + 2)``: basis rod ``b`` in the cell shifted by
    ``(di, dj)`` from the ion's cell.

    Parameters
    ----------
    lattice : Lattice
    cutoff_nm : float, nm
        Ions farther than this from every rod axis (lattice frame) are excluded; ``inf`` for none.
    n_grid : int
        Table size per axis, a power of two.
    """

    lattice: Lattice
    cutoff_nm: float
    n_grid: int
    table: np.ndarray = field(repr=False)  # (G*G,) int32: >=0 rod code; -1 excluded; <=-2 fallback row
    candidates: np.ndarray = field(repr=False)  # (n_fallback_cells, k_max) int32 rod codes
    code_frac: np.ndarray = field(repr=False)  # (n_codes, 2) rod position relative to the ion's cell
    code_cell: np.ndarray = field(repr=False)  # (n_codes, 2) int cell shift (di, dj)
    code_basis: np.ndarray = field(repr=False)  # (n_codes,) int basis index
    metric: np.ndarray = field(repr=False)  # (2, 2) C^T C, nm^2

    @classmethod
    def build(cls, lattice: Lattice, cutoff_nm: float = math.inf, n_grid: int = 256) -> "RodLocator":
        """Build the table for ``lattice`` (about 0.1 s for the presets at ``n_grid=256``)."""
        if n_grid & (n_grid - 1) or n_grid < 8:
            raise InputError(f"n_grid must be a power of two >= 8, got {n_grid}")
        C = lattice.cell_matrix
        g = C.T @ C
        nb = lattice.rods_per_cell
        sh = np.arange(-_SHIFTS, _SHIFTS + 1)
        di, dj = np.meshgrid(sh, sh, indexing="ij")
        di, dj = di.ravel(), dj.ravel()
        n_sh = di.size
        basis = np.repeat(np.arange(nb), n_sh)
        cell = np.column_stack([np.tile(di, nb), np.tile(dj, nb)])
        frac = cell + lattice.rods_frac[basis]
        G = n_grid
        # corners
        t = np.arange(G + 1) / G
        cu, cv = np.meshgrid(t, t, indexing="ij")
        c_code, c_d2 = _brute_nearest(cu.ravel(), cv.ravel(), frac, g)
        c_code = c_code.reshape(G + 1, G + 1)
        c_d2 = c_d2.reshape(G + 1, G + 1)
        same = ((c_code[:-1, :-1] == c_code[1:, :-1]) & (c_code[:-1, :-1] == c_code[:-1, 1:])
                & (c_code[:-1, :-1] == c_code[1:, 1:]))
        rc2 = cutoff_nm ** 2 if math.isfinite(cutoff_nm) else math.inf
        within = np.maximum.reduce([c_d2[:-1, :-1], c_d2[1:, :-1], c_d2[:-1, 1:], c_d2[1:, 1:]]) <= rc2
        table = np.where(same & within, c_code[:-1, :-1], -1).astype(np.int32).ravel()
        # half diagonal of a grid cell, nm (the longer diagonal of the parallelogram)
        e1, e2 = C[:, 0] / G, C[:, 1] / G
        h = 0.5 * max(np.linalg.norm(e1 + e2), np.linalg.norm(e1 - e2))
        mid = (np.arange(G) + 0.5) / G
        mu, mv = np.meshgrid(mid, mid, indexing="ij")
        mu, mv = mu.ravel(), mv.ravel()
        need = np.flatnonzero(table < 0)
        # per grid cell: the rods within 2 h of the nearest distance from its centre, nearest first
        # (compiled: the full cells x rods distance matrix would be hundreds of MB of temporaries)
        u, v = np.ascontiguousarray(mu[need]), np.ascontiguousarray(mv[need])
        frac_c, g_c = np.ascontiguousarray(frac, np.float64), np.ascontiguousarray(g, np.float64)
        dmin = np.empty(need.size)
        n_cand = np.empty(need.size, np.int64)
        _candidate_counts(u, v, frac_c, g_c, h, dmin, n_cand)
        excluded = dmin - h > cutoff_nm
        fb = need[~excluded]
        kmax = int(n_cand[~excluded].max()) if fb.size else 1
        cands = np.empty((fb.size, kmax), np.int32)
        _candidate_lists(u[~excluded], v[~excluded], frac_c, g_c, h, dmin[~excluded], cands)
        table[need[excluded]] = -1
        table[fb] = -2 - np.arange(fb.size, dtype=np.int32)
        for a in (table, cands, frac, cell, basis, g):
            a.flags.writeable = False
        return cls(lattice, float(cutoff_nm), int(G), table, cands, frac, cell.astype(np.int64),
                   basis.astype(np.int64), g)

    @property
    def fallback_share(self) -> float:
        """Share of the unit cell resolved exactly rather than from the table."""
        return float((self.table <= -2).mean())

    def locate(self, f1, f2):
        """Nearest rod of points given in fractional cell coordinates.

        Parameters
        ----------
        f1, f2 : (n,) ndarray of float
            Fractional coordinates along the cell vectors a and b.

        Returns
        -------
        ci, cj : (n,) ndarray of int64
            The cell of each point (floor of its fractional coordinates).
        code : (n,) ndarray of int32
            Rod code (see class notes), -1 where the point is beyond the cutoff.
        """
        G = self.n_grid
        shift = G.bit_length() - 1
        I1 = np.floor(f1 * G).astype(np.int64)
        I2 = np.floor(f2 * G).astype(np.int64)
        ci = I1 >> shift
        cj = I2 >> shift
        code = self.table[((I1 & (G - 1)) << shift) | (I2 & (G - 1))]
        fb = np.flatnonzero(code <= -2)
        if fb.size:
            code[fb] = self._exact(f1[fb] - ci[fb], f2[fb] - cj[fb], -2 - code[fb])
        return ci, cj, code

    def _exact(self, u, v, rows):
        cand = self.candidates[rows]  # (m, k)
        best = np.full(u.shape, np.inf)
        best_code = np.full(u.shape, -1, dtype=np.int32)
        g = self.metric
        u = np.asarray(u, dtype=np.float64)
        v = np.asarray(v, dtype=np.float64)
        for k in range(cand.shape[1]):
            c = cand[:, k]
            du = u - self.code_frac[c, 0]
            dv = v - self.code_frac[c, 1]
            d2 = g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv
            better = d2 < best
            best = np.where(better, d2, best)
            best_code = np.where(better, c, best_code)
        best_code[best > self.cutoff_nm ** 2] = -1
        return best_code

    def nearest_exact(self, f1, f2):
        """Brute-force nearest rod (no table, no cutoff): (ci, cj, code, d2_nm2). For checks."""
        ci = np.floor(f1).astype(np.int64)
        cj = np.floor(f2).astype(np.int64)
        code, d2 = _brute_nearest(f1 - ci, f2 - cj, self.code_frac, self.metric)
        return ci, cj, code.astype(np.int32), d2

    def rod_frac(self, ci, cj, code):
        """Fractional position of the rod with ``code`` seen from cell (ci, cj); code must be >= 0."""
        return (np.column_stack([ci, cj]).astype(float) + self.code_frac[code])


_LOCATORS: dict = {}


def _cached_locator(lattice: Lattice, cutoff_nm: float, n_grid: int) -> RodLocator:
    """A RodLocator per (lattice geometry, cutoff, grid), built once per process."""
    key = (lattice.a_nm, lattice.b_nm, lattice.gamma_deg, lattice.rods_frac.tobytes(), float(cutoff_nm), n_grid)
    loc = _LOCATORS.get(key)
    if loc is None:
        if len(_LOCATORS) > 32:
            _LOCATORS.clear()
        loc = _LOCATORS[key] = RodLocator.build(lattice, cutoff_nm, n_grid)
    return loc


def _brute_nearest(u, v, frac, g):
    """Nearest of the rods ``frac`` (first on ties) and its squared distance, for every point."""
    u = np.ascontiguousarray(u, np.float64).ravel()
    v = np.ascontiguousarray(v, np.float64).ravel()
    code = np.empty(u.size, dtype=np.int64)
    dmin = np.empty(u.size)
    _brute_kernel(u, v, np.ascontiguousarray(frac, np.float64), np.ascontiguousarray(g, np.float64), code, dmin)
    return code, dmin


@numba.njit(cache=True, nogil=True)
def _brute_kernel(u, v, frac, g, code, dmin):
    for i in range(u.size):
        best = np.inf
        k = 0
        for c in range(frac.shape[0]):
            du = u[i] - frac[c, 0]
            dv = v[i] - frac[c, 1]
            d2 = g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv
            if d2 < best:
                best = d2
                k = c
        code[i] = k
        dmin[i] = best


@numba.njit(cache=True, nogil=True, inline="always")
def _cell_d2(u, v, f0, f1, g):
    du = u - f0
    dv = v - f1
    return g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv


@numba.njit(cache=True, nogil=True)
def _candidate_counts(u, v, frac, g, h, dmin, n_cand):
    """Distance from each point (u, v) to its nearest rod of ``frac`` (nm) and the number of rods
    within ``2 h`` of that distance."""
    for i in range(u.size):
        best = np.inf
        for c in range(frac.shape[0]):
            best = min(best, _cell_d2(u[i], v[i], frac[c, 0], frac[c, 1], g))
        dmin[i] = math.sqrt(best)
        lim = dmin[i] + 2 * h + 1e-12
        n = 0
        for c in range(frac.shape[0]):
            n += math.sqrt(_cell_d2(u[i], v[i], frac[c, 0], frac[c, 1], g)) <= lim
        n_cand[i] = n


@numba.njit(cache=True, nogil=True)
def _candidate_lists(u, v, frac, g, h, dmin, out):
    """Row i of ``out``: the rods within ``2 h`` of ``dmin[i]`` from point i, nearest first (ties
    by index), the row padded with the nearest."""
    kmax = out.shape[1]
    dist = np.empty(kmax)
    for i in range(u.size):
        lim = dmin[i] + 2 * h + 1e-12
        n = 0
        for c in range(frac.shape[0]):
            d = math.sqrt(_cell_d2(u[i], v[i], frac[c, 0], frac[c, 1], g))
            if d <= lim:
                q = n  # insertion into the sorted prefix
                while q > 0 and dist[q - 1] > d:
                    dist[q] = dist[q - 1]
                    out[i, q] = out[i, q - 1]
                    q -= 1
                dist[q] = d
                out[i, q] = c
                n += 1
        for q in range(n, kmax):
            out[i, q] = out[i, 0]


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
    crosstalk : float
        Expected share of a rod's ions that land nearer another rod.
    resolvable : bool
        ``crosstalk < RESOLVABLE_CROSSTALK``.
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
    crosstalk: float = float("nan")
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
            "crosstalk": _f(self.crosstalk), "resolvable": bool(self.resolvable),
            "resolvable_threshold": RESOLVABLE_CROSSTALK,
            "quality": _f(self.quality), "peak_ratio": _f(self.peak_ratio),
            "background_fraction": _f(self.background_fraction),
            "symmetry_order": int(self.symmetry_order),
            "n_ions": int(self.n_ions), "n_fit": int(self.n_fit), "fixed": list(self.fixed),
            "lattice": self.lattice.to_dict(),
        }


def _f(v):
    """A number for JSON: a float, or None for NaN and infinities (:func:`probeseq.outputs.finite_or_none`)."""
    from .outputs import finite_or_none

    return finite_or_none(v)


# ====================================================================== Fourier stage
def _reciprocal_set(lattice: Lattice, k_max: float, sigma0: float, max_n: int = 40):
    """Reciprocal vectors (h, k) of the lattice in one half plane, with model weights.

    Returns hk (m, 2) int, g (m, 2) lattice-frame reciprocal vectors (cycles/nm), S (m,) complex
    structure factors ``sum_b exp(-2 pi i (h u_b + k v_b))`` and weights (m,) (power, normalised).
    """
    C = lattice.cell_matrix
    B = np.linalg.inv(C).T  # columns: reciprocal basis, cycles/nm
    n = int(math.ceil(k_max / min(np.linalg.norm(B[:, 0]), np.linalg.norm(B[:, 1])) * 2)) + 1
    h, k = np.meshgrid(np.arange(-n, n + 1), np.arange(-n, n + 1), indexing="ij")
    hk = np.column_stack([h.ravel(), k.ravel()])
    hk = hk[(hk[:, 0] > 0) | ((hk[:, 0] == 0) & (hk[:, 1] > 0))]
    g = hk @ B.T
    kn = np.linalg.norm(g, axis=1)
    keep = kn <= k_max
    hk, g, kn = hk[keep], g[keep], kn[keep]
    S = np.exp(-2j * np.pi * (hk @ lattice.rods_frac.T)).sum(1)
    w = (np.abs(S) / lattice.rods_per_cell) ** 2 * np.exp(-4 * np.pi ** 2 * sigma0 ** 2 * kn ** 2)
    keep = w > 0.02 * w.max()
    hk, g, S, w = hk[keep], g[keep], S[keep], w[keep]
    order = np.argsort(-w)[:max_n]
    return hk[order], g[order], S[order], w[order] / w[order].sum()


@dataclass
class _Spectrum:
    power: np.ndarray  # (N, N//2+1) normalised, axis 0 fftshifted
    h: float
    N: int

    def sample(self, kx, ky):
        """Bilinear sample of the normalised power at (kx, ky) (cycles/nm)."""
        from scipy.ndimage import map_coordinates

        kx = np.asarray(kx, float)
        ky = np.asarray(ky, float)
        neg = ky < 0
        kx = np.where(neg, -kx, kx)
        ky = np.abs(ky)
        L = self.N * self.h
        i = kx * L + self.N // 2
        j = ky * L
        return map_coordinates(self.power, [i.ravel(), j.ravel()], order=1, mode="constant",
                               cval=0.0).reshape(kx.shape)


def _slab_edges(z, thickness, min_per_slab=200, max_slabs=1024):
    zmin, zmax = float(z.min()), float(z.max())
    depth = max(zmax - zmin, 1e-9)
    n = int(max(1, min(max_slabs, math.ceil(depth / thickness), z.size // min_per_slab)))
    return np.linspace(zmin, zmax + 1e-9, n + 1)


@functools.lru_cache(maxsize=8)
def _rings(N: int, h: float):
    """Rings of the ``N x (N//2 + 1)`` half-plane spectrum grid of pixel ``h`` (cached): the
    spatial frequency of each cell, its ring number ``floor(|k| N h)``, the cells in ring order and
    each ring's start in that order."""
    L = N * h
    kx = (np.arange(N) - N // 2) / L
    ky = np.arange(N // 2 + 1) / L
    kr = np.hypot(kx[:, None], ky[None, :])
    ring = np.floor(kr * L).astype(np.int64)
    by_ring = np.argsort(ring.ravel(), kind="stable")
    starts = np.searchsorted(ring.ravel()[by_ring], np.arange(ring.max() + 2))
    for a in (kr, ring, by_ring, starts):
        a.flags.writeable = False
    return kr, ring, by_ring, starts


def _power_spectrum(xr, yr, slab, n_slabs, h, N, max_slabs=_SPECTRUM_SLABS):
    """Summed slab power spectra, normalised by ring medians.

    At most ``max_slabs`` slabs enter (evenly spread over the populated ones): each slab's peaks
    stand above its own speckle by its number of ions, so more slabs only smooth the speckle,
    which ``max_slabs`` of them already do well, while each costs one 2-D FFT.
    """
    ix = np.floor(xr / h).astype(np.int64) + N // 2
    iy = np.floor(yr / h).astype(np.int64) + N // 2
    ok = (ix >= 0) & (ix < N) & (iy >= 0) & (iy < N)
    pix = ix * N + iy
    key = np.where(ok, slab, n_slabs)
    order = np.argsort(key, kind="stable")
    bounds = np.searchsorted(key[order], np.arange(n_slabs + 1))
    filled = np.flatnonzero(np.diff(bounds) >= 2)
    if filled.size > max_slabs:
        filled = filled[np.unique(np.rint(np.linspace(0, filled.size - 1, max_slabs)).astype(np.int64))]
    P = np.zeros((N, N // 2 + 1))
    for j in filled:
        sel = order[bounds[j]:bounds[j + 1]]
        H = np.bincount(pix[sel], minlength=N * N).reshape(N, N).astype(float)
        F = np.fft.rfft2(H)  # the DC term is zeroed after normalisation
        P += F.real ** 2 + F.imag ** 2
    P = np.fft.fftshift(P, axes=0)
    L = N * h
    kr, ring, by_ring, starts = _rings(int(N), float(h))
    flat_p = P.ravel()
    med = np.empty(starts.size - 1)
    for r in range(starts.size - 1):  # the lower median of each ring
        a, b = starts[r], starts[r + 1]
        if b > a:
            k = (b - a - 1) // 2
            med[r] = np.partition(flat_p[by_ring[a:b]], k)[k]
        else:
            med[r] = np.nan
    med = np.where(np.isfinite(med) & (med > 0), med, np.nanmax(med))
    Pn = P / med[ring]
    Pn[kr < 2.0 / L] = 0.0
    return _Spectrum(Pn, h, N)


def _search_rotation_scale(spec, g, w, period_deg, scale_range, rotation_deg, scale):
    """Grid search then Nelder-Mead of the weighted mean normalised power at the peaks."""
    from scipy.optimize import minimize

    def score(th_deg, s):
        R = _rot(math.radians(th_deg))
        kk = (g @ R.T) / s
        return float((spec.sample(kk[:, 0], kk[:, 1]) * w).sum())

    if rotation_deg is None:
        ths = np.arange(0.0, period_deg, 0.25)
    else:
        ths = np.array([float(rotation_deg)])
    if scale is None:
        lo, hi = scale_range
        ss = np.exp(np.arange(math.log(lo), math.log(hi) + 1e-9, 0.004))
    else:
        ss = np.array([float(scale)])
    # vectorised grid
    T, S = np.meshgrid(np.radians(ths), ss, indexing="ij")
    c, s_ = np.cos(T)[..., None], np.sin(T)[..., None]
    kx = (c * g[:, 0] - s_ * g[:, 1]) / S[..., None]
    ky = (s_ * g[:, 0] + c * g[:, 1]) / S[..., None]
    vals = (spec.sample(kx, ky) * w).sum(-1)
    i, j = np.unravel_index(np.argmax(vals), vals.shape)
    th0, s0 = float(ths[i]), float(ss[j])
    free = [rotation_deg is None, scale is None]
    if any(free):
        x0 = np.array([th0, math.log(s0)])[free]
        step = np.array([0.25, 0.004])[free]

        def neg(p):
            q = np.array([th0, math.log(s0)])
            q[free] = p
            return -score(q[0], math.exp(q[1]))

        res = minimize(neg, x0, method="Nelder-Mead",
                       options={"initial_simplex": np.vstack([x0, x0 + np.diag(step)]),
                                "xatol": 1e-3, "fatol": 1e-6, "maxiter": 200})
        if -res.fun >= vals[i, j]:
            q = np.array([th0, math.log(s0)])
            q[free] = res.x
            th0, s0 = float(q[0]), float(math.exp(q[1]))
    best = score(th0, s0)
    return th0 % period_deg if rotation_deg is None else th0, s0, best


def _slab_coefficients(xr, yr, slab, n_slabs, hk, Bp):
    """(n_slabs, m) complex sums of exp(-2 pi i k.r) per slab for the peaks ``k = hk @ Bp.T``.

    ``hk`` (m, 2) are integer reciprocal-lattice indices and ``Bp`` (2, 2) the reconstruction-frame
    reciprocal basis (columns, cycles/nm): each ion's factor is a product of integer powers of two
    unit phasors, so only two sines and cosines are evaluated per ion (compiled loop).
    """
    hk = np.ascontiguousarray(hk, np.int64).reshape(-1, 2)
    out_re = np.zeros((n_slabs, hk.shape[0]))
    out_im = np.zeros((n_slabs, hk.shape[0]))
    if hk.shape[0]:
        _coef_kernel(np.ascontiguousarray(xr, np.float64), np.ascontiguousarray(yr, np.float64),
                     np.ascontiguousarray(slab, np.int64), hk, np.ascontiguousarray(Bp, np.float64), out_re, out_im)
    return out_re + 1j * out_im


@numba.njit(cache=True, nogil=True)
def _coef_kernel(xr, yr, slab, hk, Bp, out_re, out_im):
    m = hk.shape[0]
    h0 = hk[:, 0].min()
    h1 = hk[:, 0].max()
    k0 = hk[:, 1].min()
    k1 = hk[:, 1].max()
    p1r = np.empty(h1 - h0 + 1)
    p1i = np.empty(h1 - h0 + 1)
    p2r = np.empty(k1 - k0 + 1)
    p2i = np.empty(k1 - k0 + 1)
    tau = -2.0 * np.pi
    for i in range(xr.size):
        a1 = tau * (Bp[0, 0] * xr[i] + Bp[1, 0] * yr[i])
        a2 = tau * (Bp[0, 1] * xr[i] + Bp[1, 1] * yr[i])
        c1 = math.cos(a1)
        s1 = math.sin(a1)
        c2 = math.cos(a2)
        s2 = math.sin(a2)
        # exp(i h a1) for h = h0..h1 and exp(i k a2) for k = k0..k1
        p1r[0] = math.cos(h0 * a1)
        p1i[0] = math.sin(h0 * a1)
        for q in range(1, h1 - h0 + 1):
            p1r[q] = p1r[q - 1] * c1 - p1i[q - 1] * s1
            p1i[q] = p1r[q - 1] * s1 + p1i[q - 1] * c1
        p2r[0] = math.cos(k0 * a2)
        p2i[0] = math.sin(k0 * a2)
        for q in range(1, k1 - k0 + 1):
            p2r[q] = p2r[q - 1] * c2 - p2i[q - 1] * s2
            p2i[q] = p2r[q - 1] * s2 + p2i[q - 1] * c2
        j = slab[i]
        for q in range(m):
            ar = p1r[hk[q, 0] - h0]
            ai = p1i[hk[q, 0] - h0]
            br = p2r[hk[q, 1] - k0]
            bi = p2i[hk[q, 1] - k0]
            out_re[j, q] += ar * br - ai * bi
            out_im[j, q] += ar * bi + ai * br


def _search_tilt(F, zc, K, max_tilt):
    """Tilt maximising the coherent power sum_m |sum_j F_jm exp(2 pi i K_m . t z_j)|^2.

    Coarse to fine in depth: the coherence peak in t is about 1 / (|K| D) wide for a depth range
    D, so a thin central range is searched first over the whole tilt range on a coarse grid, and
    the range is doubled at each level while the grid narrows around the previous best.
    """
    from scipy.optimize import minimize

    kmax = float(np.linalg.norm(K, axis=1).max())
    zmid = 0.5 * (float(zc.min()) + float(zc.max()))
    depth = max(float(zc.max() - zc.min()), 1e-6)

    F_re = np.ascontiguousarray(F.real, np.float64)
    F_im = np.ascontiguousarray(F.imag, np.float64)
    Kc = np.ascontiguousarray(K, np.float64)
    zcc = np.ascontiguousarray(zc, np.float64)
    filled = (np.abs(F) > 0).any(1)

    def powers(T, sel):
        idx = np.flatnonzero(np.asarray(sel) if np.asarray(sel).dtype == bool else np.isin(np.arange(zc.size), sel))
        idx = idx[filled[idx]].astype(np.int64)
        out = np.zeros(T.shape[0])
        _coherent_power(np.ascontiguousarray(T, np.float64), zcc, F_re, F_im, Kc, idx, out)
        return out

    d0 = min(depth, 5.0 / (max_tilt * kmax))
    centre = np.zeros(2)
    half = max_tilt
    d = d0
    while True:
        sel = np.abs(zc - zmid) <= 0.5 * d + 1e-9
        if sel.sum() < 2:
            sel = np.argsort(np.abs(zc - zmid))[:2]
        width = 0.25 / (kmax * d)
        g = np.arange(-half, half + width / 2, width)
        TX, TY = np.meshgrid(centre[0] + g, centre[1] + g, indexing="ij")
        T = np.column_stack([TX.ravel(), TY.ravel()])
        best, best_t = -1.0, centre
        for s0 in range(0, T.shape[0], 256):
            p = powers(T[s0:s0 + 256], sel)
            k = int(np.argmax(p))
            if p[k] > best:
                best, best_t = float(p[k]), T[s0 + k].copy()
        centre = best_t
        if d >= depth:
            break
        half = 3 * width
        d = min(2 * d, depth)
    sel_all = np.ones(zc.size, bool)
    res = minimize(lambda t: -float(powers(np.asarray(t)[None, :], sel_all)[0]), centre, method="Nelder-Mead",
                   options={"initial_simplex": np.vstack([centre, centre + [width / 2, 0], centre + [0, width / 2]]),
                            "xatol": 1e-7, "fatol": 1e-9, "maxiter": 300})
    return res.x if -res.fun >= best else centre


@numba.njit(cache=True, nogil=True)
def _coherent_power(T, zc, F_re, F_im, K, idx, out):
    """out[b] = sum_m |sum_{j in idx} F_jm exp(2 pi i z_j K_m . T_b)|^2."""
    tau = 2.0 * np.pi
    for b in range(T.shape[0]):
        tot = 0.0
        for q in range(K.shape[0]):
            w = tau * (K[q, 0] * T[b, 0] + K[q, 1] * T[b, 1])
            sr = 0.0
            si = 0.0
            for jj in range(idx.size):
                j = idx[jj]
                a = w * zc[j]
                c = math.cos(a)
                s_ = math.sin(a)
                sr += F_re[j, q] * c - F_im[j, q] * s_
                si += F_re[j, q] * s_ + F_im[j, q] * c
            tot += sr * sr + si * si
        out[b] = tot


def _search_offset(Fsum, S, w, hk, n=64):
    """Fractional offset maximising the model correlation Re sum w conj(S) F exp(2 pi i hk.f)."""
    t = np.arange(n) / n
    U, V = np.meshgrid(t, t, indexing="ij")
    coef = w * np.conj(S) * Fsum
    ph = 2 * np.pi * (U[..., None] * hk[:, 0] + V[..., None] * hk[:, 1])
    val = (coef * np.exp(1j * ph)).real.sum(-1)
    i, j = np.unravel_index(np.argmax(val), val.shape)
    # parabolic refinement on the periodic grid
    f = []
    for axis, idx in ((0, i), (1, j)):
        if axis == 0:
            a, b, c = val[(i - 1) % n, j], val[i, j], val[(i + 1) % n, j]
        else:
            a, b, c = val[i, (j - 1) % n], val[i, j], val[i, (j + 1) % n]
        den = a - 2 * b + c
        d = 0.5 * (a - c) / den if den < 0 else 0.0
        f.append((idx + d) / n)
    return np.array(f)


# ====================================================================== refinement
def _refine(x, y, z, lattice, locator, p, free, z_ref, center, radius_all, fit_r, n_iter=30):
    """Iterated nearest-rod assignment + Gauss-Newton least squares.

    p = [ox, oy, tx, ty, theta_rad, scale]; returns p, covariance (6x6, zeros for fixed), the
    residual distances (lattice frame, nm) of all points to their assigned rod, and n used.
    Each iteration is one compiled pass (:func:`_gn_kernel`) that assigns every point to its
    nearest rod and accumulates the normal equations, without per-point temporaries.
    """
    C = np.ascontiguousarray(lattice.cell_matrix, np.float64)
    x = np.ascontiguousarray(x, np.float64)
    y = np.ascontiguousarray(y, np.float64)
    zr = np.ascontiguousarray(z - z_ref, np.float64)
    rr = np.hypot(x - center[0], y - center[1])
    cov = np.zeros((6, 6))
    free = np.asarray(free, bool)
    stages = [0.5 * radius_all, np.inf]
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
            raise InputError("lattice registration: fewer than 20 metal ions lie near a model rod axis; "
                             "no lattice signal (set --rotation-deg, --scale and --offset-nm to override)")
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


def _locator_arrays(locator):
    return (np.ascontiguousarray(locator.table, np.int32), np.int64(locator.n_grid),
            np.ascontiguousarray(locator.candidates, np.int32), np.ascontiguousarray(locator.code_frac, np.float64),
            np.ascontiguousarray(locator.metric, np.float64),
            np.float64(locator.cutoff_nm ** 2 if math.isfinite(locator.cutoff_nm) else np.inf))


def _gn_pass(x, y, zr, rr, p, C, loc, fit_r, r_lim, dist, ok):
    JTJ = np.zeros((6, 6))
    JTe = np.zeros(6)
    out = np.zeros(2)
    A = p[5] * _rot(p[4])
    Ainv = np.linalg.inv(A @ C)
    Rt = _rot(p[4])
    dR = np.array([[-math.sin(p[4]), -math.cos(p[4])], [math.cos(p[4]), -math.sin(p[4])]])
    _gn_kernel(x, y, zr, rr, np.ascontiguousarray(p, np.float64), C, Ainv, Rt, dR, *loc, float(fit_r),
               float(r_lim), dist, ok, JTJ, JTe, out)
    return JTJ, JTe, out[0], int(out[1])


@numba.njit(cache=True, nogil=True, inline="always")
def _locate_one(f1, f2, table, G, cand, code_frac, metric, cut2):
    """Nearest rod of one point in fractional coordinates: (ci, cj, code), code -1 beyond the cutoff."""
    sh = 0
    while (1 << sh) < G:
        sh += 1
    I1 = np.int64(math.floor(f1 * G))
    I2 = np.int64(math.floor(f2 * G))
    ci = I1 >> sh
    cj = I2 >> sh
    code = np.int64(table[((I1 & (G - 1)) << sh) | (I2 & (G - 1))])
    if code <= -2:
        code = nearest_candidate(cand, -2 - code, f1 - ci, f2 - cj, code_frac, metric, cut2)
    return ci, cj, code


@numba.njit(cache=True, nogil=True, inline="always")
def nearest_candidate(cand, row, u, v, code_frac, metric, cut2):
    """Nearest of the candidate rods ``cand[row]`` of a table cell to the point (u, v) within its
    unit cell (fractional coordinates, distances by ``metric``); -1 beyond the cutoff ``cut2``."""
    best = np.inf
    code = -1
    for q in range(cand.shape[1]):
        c = cand[row, q]
        du = u - code_frac[c, 0]
        dv = v - code_frac[c, 1]
        d2 = metric[0, 0] * du * du + 2 * metric[0, 1] * du * dv + metric[1, 1] * dv * dv
        if d2 < best:
            best = d2
            code = c
    return code if best <= cut2 else -1


@numba.njit(cache=True, nogil=True)
def _gn_kernel(x, y, zr, rr, p, C, Ainv, Rt, dR, table, G, cand, code_frac, metric, cut2, fit_r, r_lim,
               dist, ok, JTJ, JTe, out):
    sse = 0.0
    n_use = 0
    J = np.empty(6)
    Jy = np.empty(6)
    for i in range(x.size):
        px = x[i] - p[0] - p[2] * zr[i]
        py = y[i] - p[1] - p[3] * zr[i]
        f1 = Ainv[0, 0] * px + Ainv[0, 1] * py
        f2 = Ainv[1, 0] * px + Ainv[1, 1] * py
        ci, cj, code = _locate_one(f1, f2, table, G, cand, code_frac, metric, cut2)
        if code < 0:
            ok[i] = False
            dist[i] = np.inf
            continue
        ok[i] = True
        qf1 = ci + code_frac[code, 0]
        qf2 = cj + code_frac[code, 1]
        d1 = f1 - qf1
        d2 = f2 - qf2
        ex_ = C[0, 0] * d1 + C[0, 1] * d2
        ey_ = C[1, 0] * d1 + C[1, 1] * d2
        d = math.sqrt(ex_ * ex_ + ey_ * ey_)
        dist[i] = d
        if not (d < fit_r and rr[i] <= r_lim):
            continue
        q0 = C[0, 0] * qf1 + C[0, 1] * qf2
        q1 = C[1, 0] * qf1 + C[1, 1] * qf2
        Rq0 = Rt[0, 0] * q0 + Rt[0, 1] * q1
        Rq1 = Rt[1, 0] * q0 + Rt[1, 1] * q1
        dRq0 = p[5] * (dR[0, 0] * q0 + dR[0, 1] * q1)
        dRq1 = p[5] * (dR[1, 0] * q0 + dR[1, 1] * q1)
        z_ = zr[i]
        ex = x[i] - p[0] - p[2] * z_ - p[5] * Rq0
        ey = y[i] - p[1] - p[3] * z_ - p[5] * Rq1
        J[0] = 1.0; J[1] = 0.0; J[2] = z_; J[3] = 0.0; J[4] = dRq0; J[5] = Rq0
        Jy[0] = 0.0; Jy[1] = 1.0; Jy[2] = 0.0; Jy[3] = z_; Jy[4] = dRq1; Jy[5] = Rq1
        for a in range(6):
            JTe[a] += J[a] * ex + Jy[a] * ey
            for b in range(a, 6):
                JTJ[a, b] += J[a] * J[b] + Jy[a] * Jy[b]
        sse += ex * ex + ey * ey
        n_use += 1
    for a in range(6):
        for b in range(a):
            JTJ[a, b] = JTJ[b, a]
    out[0] = sse
    out[1] = n_use


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


def expected_crosstalk(lattice: Lattice, sigma_nm: float, n_angles: int = 4096) -> float:
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


_BOUNDARIES = {}


def _cell_boundaries(lattice: Lattice, n_angles: int) -> np.ndarray:
    """(rods_per_cell, n_angles) distances (nm, lattice frame) from each basis rod to the edge of its
    Voronoi cell, along the directions ``(k + 1/2) 2 pi / n_angles``; cached per lattice geometry."""
    key = (lattice.a_nm, lattice.b_nm, lattice.gamma_deg, lattice.rods_frac.tobytes(), n_angles)
    if key in _BOUNDARIES:
        return _BOUNDARIES[key]
    C = lattice.cell_matrix
    theta = (np.arange(n_angles) + 0.5) * (2 * math.pi / n_angles)
    u = np.stack([np.cos(theta), np.sin(theta)], axis=1)

    def block(reach):
        ij = np.arange(-reach, reach + 1)
        return np.stack(np.meshgrid(ij, ij, indexing="ij"), axis=-1).reshape(-1, 2).astype(float)

    # a rod's cell lies inside the cell of its own lattice translates (fewer rods, larger cells),
    # so rods farther than twice that cell's reach cannot cut it (1 % margin for the sampling)
    shifts = block(1)
    bound = 1.01 * float(_boundary(u, shifts[np.any(shifts != 0, axis=1)] @ C.T).max())
    height = min(lattice.a_nm, lattice.b_nm) * math.sin(math.radians(lattice.gamma_deg))
    shifts = block(int(math.ceil(2 * bound / height)) + 1)
    out = np.empty((lattice.rods_per_cell, n_angles))
    for b in range(lattice.rods_per_cell):
        d = ((lattice.rods_frac[None, :, :] + shifts[:, None, :]).reshape(-1, 2) - lattice.rods_frac[b]) @ C.T
        d2 = (d * d).sum(1)
        keep = np.flatnonzero((d2 > 1e-12) & (d2 <= (2 * bound) ** 2))
        d, d2 = d[keep[np.argsort(d2[keep], kind="stable")]], np.sort(d2[keep])
        # the twelve nearest bound the cell more tightly still; then only rods within twice that
        # reach enter the final pass
        near = 1.01 * float(_boundary(u, d[:12]).max())
        out[b] = _boundary(u, d[d2 <= (2 * near) ** 2])
    out.flags.writeable = False
    if len(_BOUNDARIES) > 16:
        _BOUNDARIES.clear()
    _BOUNDARIES[key] = out
    return out


def _boundary(u: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Distance along each unit vector ``u`` to the nearest bisector of the points ``d`` (relative
    to the origin): the edge of the origin's Voronoi cell among them."""
    # (n_points, n_angles), reduced over the points; no BLAS call for so small a product
    proj = d[:, :1] * u[:, 0] + d[:, 1:] * u[:, 1]
    ahead = proj > 1e-12
    lim = np.full(proj.shape, np.inf)
    np.divide(((d * d).sum(1) / 2)[:, None], proj, out=lim, where=ahead)
    return lim.min(axis=0)


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
        Too few metal ions, a specimen narrower than one cell, or no lattice signal.
    """
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
    radius = float(np.percentile(rad, 98)) / math.sqrt(0.98)
    cell_size = max(lattice.a_nm, lattice.b_nm)
    if 2 * radius < cell_size:
        raise InputError(f"specimen too narrow to register the lattice: metal ions span a diameter of "
                         f"{2 * radius:.3g} nm, less than one cell ({cell_size:.3g} nm)")

    fixed = tuple(k for k, v in (("rotation_deg", rotation_deg), ("scale", scale), ("offset_nm", offset_nm),
                                 ("tilt", tilt)) if v is not None)
    th0, s0, peak_ratio, t0, o0 = _initial_placement(
        x, y, z, xr, yr, rad, center, lattice, d_nn, period, sub_phase, rotation_deg, scale, offset_nm,
        tilt, z_ref_nm, scale_range, max_tilt_deg)

    locator = _cached_locator(lattice, d_nn, 64)
    p0 = [o0[0], o0[1], t0[0], t0[1], math.radians(th0), s0]
    free = [offset_nm is None, offset_nm is None, tilt is None, tilt is None, rotation_deg is None, scale is None]
    fit_r = FIT_RADIUS_FRAC * d_nn
    xf, yf, zf = x[sub_fit], y[sub_fit], z[sub_fit]
    if any(free):
        p, cov, _, _, _ = _refine(xf, yf, zf, lattice, locator, p0, free, z_ref_nm, center, radius, fit_r)
    else:
        p, cov = np.array(p0, float), np.zeros((6, 6))
    dist, ok = _distances(xf, yf, zf, lattice, locator, p, z_ref_nm)
    theta, off = _fundamental_placement(p, lattice, shift_frac, period, rotation_deg is None, offset_nm is None)
    # resolution and quality
    d_ok = dist[ok]
    sig_lat, sig_err, bg = _fit_sigma(d_ok, fit_r)
    q_r = QUALITY_RADIUS_FRAC * d_nn
    within = float((ok & (dist < q_r)).sum()) / xf.size
    u0 = lattice.rod_density_per_nm2 * math.pi * q_r ** 2
    quality = (within - u0) / (1 - u0)
    crosstalk = expected_crosstalk(lattice, sig_lat) if math.isfinite(sig_lat) else float("nan")
    err = np.sqrt(np.maximum(np.diag(cov), 0.0))
    return Registration(
        lattice=lattice, rotation_deg=float(theta), scale=float(p[5]), offset_nm=off, tilt=p[2:4].copy(),
        z_ref_nm=float(z_ref_nm), rotation_deg_err=float(math.degrees(err[4])), scale_err=float(err[5]),
        offset_nm_err=err[0:2], tilt_err=err[2:4], sigma_xy_nm=float(sig_lat * p[5]),
        sigma_xy_nm_err=float(sig_err * p[5]), crosstalk=float(crosstalk),
        resolvable=bool(crosstalk < RESOLVABLE_CROSSTALK), quality=float(quality), peak_ratio=float(peak_ratio),
        background_fraction=float(bg), symmetry_order=int(order), n_ions=int(n_ions), n_fit=int(n_fit),
        fixed=fixed)


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

    Returns ``(rotation_deg, scale, peak_ratio, tilt, offset_nm)``.
    """
    sigma0 = d_nn / 6.0
    h = d_nn / 6.0
    extent = 2 * float(rad.max()) + 4 * h
    N = min(1 << int(math.ceil(math.log2(max(extent / h, 64)))), _FFT_MAX)
    k_nyq = 0.5 / h
    # recon-frame peaks are g / scale: keep the largest below 0.7 x Nyquist at the smallest scale
    k_max = min(0.7 * k_nyq * (scale_range[0] if scale is None else scale), 3.0 / d_nn)
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

    peak_ratio = float("nan")
    if rotation_deg is None or scale is None:
        spec = _power_spectrum(xr, yr, slab, n_slabs, h, N)
        th0, s0, peak_ratio = _search_rotation_scale(spec, g, w, period, scale_range, rotation_deg, scale)
        if peak_ratio < MIN_PEAK_RATIO:
            searched = []
            if rotation_deg is None:
                searched.append(f"rotation 0-{period:g} deg")
            if scale is None:
                searched.append(f"scale {scale_range[0]:g}-{scale_range[1]:g}")
            raise InputError(
                f"no lattice signal in the metal-ion density: searched {' and '.join(searched)} for the "
                f"{hk.shape[0]} strongest reciprocal peaks of lattice {lattice.name or '(custom)'} over "
                f"{n_slabs} depth slabs; best match rotation {th0:.2f} deg, scale {s0:.4f} with peak power "
                f"{peak_ratio:.2f}x background (need >= {MIN_PEAK_RATIO:g}); check the lattice, or give "
                f"--rotation-deg, --scale and --offset-nm")
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
    return th0, s0, peak_ratio, t0, o0


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
    C = lattice.cell_matrix
    A = p[5] * _rot(p[4])
    zr = z - z_ref
    px = x - p[0] - p[2] * zr
    py = y - p[1] - p[3] * zr
    Ainv = np.linalg.inv(A @ C)
    f1 = Ainv[0, 0] * px + Ainv[0, 1] * py
    f2 = Ainv[1, 0] * px + Ainv[1, 1] * py
    ci, cj, code = locator.locate(f1, f2)
    ok = code >= 0
    d = np.full(x.size, np.inf)
    rf = locator.rod_frac(ci[ok], cj[ok], code[ok])
    df = np.column_stack([f1[ok], f2[ok]]) - rf
    d[ok] = np.sqrt(((df @ C.T) ** 2).sum(1))
    return d, ok
