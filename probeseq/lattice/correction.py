"""The reconstruction correction: a smooth map from the file's positions to calibrated ones.

A reconstruction fixes its depth scale and lateral magnification from parameters that are only
estimated, and an assumed tip radius curves every depth plane (common practice; see
``docs/REFERENCES.md`` §7). probeseq calibrates them on the lattice itself
(:mod:`probeseq.lattice.calibrate`) and carries the result as a :class:`ReconstructionCorrection`:

1. **lateral**: ``(x', y') = (x, y) / m(z) + d(z)``, the magnification ``m`` (relative to the
   registration's) and shift ``d`` fitted per depth slab (rod axes that follow a drifting
   magnification, or bend);
2. **depth**: ``z' = T(z - kappa * rho**2)`` with ``rho`` the lateral distance of ``(x', y')``
   from the specimen axis ``c(z)`` and ``T`` a smooth, increasing map whose slope is one over the
   local depth scale (the site planes are then flat and exactly one site pitch apart).

Every table is sampled on one uniform grid of file depths and read by linear interpolation
(linear extrapolation beyond its ends), so applying the map is one compiled pass over the ions
(:func:`_apply_kernel`). The identity correction (``ReconstructionCorrection.identity()``)
leaves positions unchanged and costs nothing: callers test :attr:`is_identity`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..exceptions import InputError

__all__ = ['ReconstructionCorrection', 'file_site_positions', 'correct_point']


@dataclass(frozen=True, eq=False)
class ReconstructionCorrection:
    """A map from file positions (nm) to calibrated positions (nm).

    Attributes
    ----------
    grid_z_nm : (n,) ndarray of float, nm
        Uniform grid of file depths on which the tables are sampled (n >= 2).
    depth_nm : (n,) ndarray of float, nm
        Calibrated depth ``T`` at the grid (strictly increasing).
    magnification : (n,) ndarray of float
        Lateral magnification relative to the registration's, at the grid.
    shift_nm : (n, 2) ndarray of float, nm
        Lateral shift ``d`` at the grid.
    axis_nm : (n, 2) ndarray of float, nm
        Specimen axis ``c`` (centre of the plane curvature), calibrated lateral frame.
    curvature_per_nm : float, 1/nm
        ``kappa``: a depth plane lies ``kappa * rho**2`` deeper in the file at lateral distance
        ``rho`` from the axis than on it.
    report : dict
        The calibration report (JSON-able; ``results.json`` ``reconstruction``).
    """

    grid_z_nm: np.ndarray
    depth_nm: np.ndarray
    magnification: np.ndarray
    shift_nm: np.ndarray
    axis_nm: np.ndarray
    curvature_per_nm: float = 0.0
    report: dict = field(default_factory=dict)

    def __post_init__(self):
        g = np.array(self.grid_z_nm, float).reshape(-1)
        n = g.size
        arrays = {"grid_z_nm": g, "depth_nm": np.array(self.depth_nm, float).reshape(-1),
                  "magnification": np.array(self.magnification, float).reshape(-1),
                  "shift_nm": np.array(self.shift_nm, float).reshape(-1, 2),
                  "axis_nm": np.array(self.axis_nm, float).reshape(-1, 2)}
        if n < 2 or any(a.shape[0] != n for a in arrays.values()):
            raise InputError(f"reconstruction correction: every table needs the grid's {n} (>= 2) rows")
        if not all(np.isfinite(a).all() for a in arrays.values()) or not math.isfinite(self.curvature_per_nm):
            raise InputError("reconstruction correction: the tables hold non-finite values")
        dg = np.diff(g)
        if not (dg > 0).all() or np.ptp(dg) > 1e-6 * dg.mean():
            raise InputError("reconstruction correction: grid_z_nm must be uniform and increasing")
        if not (np.diff(arrays["depth_nm"]) > 0).all():
            raise InputError("reconstruction correction: the calibrated depth must increase with the file's depth")
        if not (arrays["magnification"] > 0).all():
            raise InputError("reconstruction correction: magnification must be positive")
        for k, a in arrays.items():
            a.flags.writeable = False
            object.__setattr__(self, k, a)
        object.__setattr__(self, "curvature_per_nm", float(self.curvature_per_nm))

    # ------------------------------------------------------------ construction
    @classmethod
    def identity(cls, z_lo_nm: float = 0.0, z_hi_nm: float = 1.0, report: dict | None = None):
        """The correction that changes nothing (two grid points, slope 1)."""
        z = np.array([float(z_lo_nm), float(max(z_hi_nm, z_lo_nm + 1.0))])
        return cls(grid_z_nm=z, depth_nm=z.copy(), magnification=np.ones(2), shift_nm=np.zeros((2, 2)),
                   axis_nm=np.zeros((2, 2)), curvature_per_nm=0.0, report=dict(report or {}))

    @property
    def is_identity(self) -> bool:
        """True when :meth:`apply` returns its input unchanged."""
        return bool(np.array_equal(self.depth_nm, self.grid_z_nm) and (self.magnification == 1).all()
                    and not self.shift_nm.any() and self.curvature_per_nm == 0.0)

    # ------------------------------------------------------------ maps
    def apply(self, x, y, z, out=None):
        """Calibrated positions of file positions.

        Parameters
        ----------
        x, y, z : (n,) array of float, nm
            File (reconstruction-frame) positions; float32 stays float32.
        out : tuple of three (n,) arrays, optional
            Where to write (may be the inputs when they are writeable).

        Returns
        -------
        x, y, z : (n,) ndarray, nm
            Calibrated positions (the inputs themselves when the correction is the identity and
            ``out`` is None).
        """
        x, y, z = (np.asarray(a) for a in (x, y, z))
        if self.is_identity and out is None:
            return x, y, z
        dt = np.float32 if all(a.dtype == np.float32 for a in (x, y, z)) else np.float64
        if out is None:
            out = tuple(np.empty(x.shape, dt) for _ in range(3))
        xs = [_read_only(np.ascontiguousarray(a, dt)) for a in (x, y, z)]
        _apply_kernel(xs[0], xs[1], xs[2], out[0], out[1], out[2], *self._tables())
        return out

    def _tables(self):
        """``(z0, inv_h, depth, magnification, shift, axis, kappa)`` as the compiled map reads them."""
        g = self.grid_z_nm
        return (float(g[0]), float((g.size - 1) / (g[-1] - g[0])), self.depth_nm, self.magnification,
                np.ascontiguousarray(self.shift_nm), np.ascontiguousarray(self.axis_nm), self.curvature_per_nm)

    def to_file(self, x, y, z, n_iter: int = 4):
        """File positions of calibrated positions (the inverse of :meth:`apply`), nm, float64.

        The depth map is inverted by interpolation on its tables and the curvature and
        lateral terms by a few fixed-point steps (they change slowly with depth). One compiled
        pass over the points (:func:`_to_file_kernel`): about 12 table look-ups per point, where
        twelve ``np.interp`` calls over all of them took 13 s for the 4e7 sites of a 10^8-ion run.
        """
        xc, yc, zc = (np.ascontiguousarray(np.asarray(a, float).ravel()) for a in (x, y, z))
        if self.is_identity:
            return xc.copy(), yc.copy(), zc.copy()
        out = tuple(np.empty(xc.shape) for _ in range(3))
        z0, inv_h, depth, mag, shift, axis, kappa = self._tables()
        _to_file_kernel(xc, yc, zc, out[0], out[1], out[2], z0, inv_h, np.ascontiguousarray(self.grid_z_nm, float),
                        np.ascontiguousarray(depth, float), np.ascontiguousarray(mag, float), shift, axis,
                        float(kappa), int(n_iter))
        return out

    # ------------------------------------------------------------ records
    def to_dict(self) -> dict:
        """JSON-able record: the report and the tables (rounded to 0.1 pm)."""
        def r(a):
            return np.round(np.asarray(a, float), 5).tolist()

        return {**self.report, "tables": {
            "grid_z_nm": r(self.grid_z_nm), "depth_nm": r(self.depth_nm), "magnification": r(self.magnification),
            "shift_nm": r(self.shift_nm), "axis_nm": r(self.axis_nm), "curvature_per_nm": self.curvature_per_nm,
            "about": "calibrated (x', y') = (x, y) / magnification(z) + shift(z); z' = depth(z - "
                     "curvature_per_nm * rho^2), rho the distance of (x', y') from axis(z); tables linear in the "
                     "file depth z (grid_z_nm), extrapolated linearly"}}

    @classmethod
    def from_dict(cls, d) -> "ReconstructionCorrection":
        """The correction recorded by :meth:`to_dict` (identity when it holds no tables)."""
        if not isinstance(d, dict) or not isinstance(d.get("tables"), dict):
            return cls.identity()
        t = d["tables"]
        try:
            g = np.asarray(t["grid_z_nm"], float)  # rounded on writing: the uniform grid again
            return cls(grid_z_nm=np.linspace(g[0], g[-1], g.size) if g.ndim == 1 and g.size >= 2 else g, depth_nm=t["depth_nm"], magnification=t["magnification"],
                       shift_nm=t["shift_nm"], axis_nm=t["axis_nm"], curvature_per_nm=float(t["curvature_per_nm"]),
                       report={k: v for k, v in d.items() if k != "tables"})
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"reconstruction correction: malformed record ({exc})") from None


def _read_only(a: np.ndarray) -> np.ndarray:
    """A read-only view of ``a`` (no copy): the compiled map gets one argument type whether the
    positions are its own arrays or read-only views of a file, and is built once, not twice."""
    v = a.view()
    v.flags.writeable = False
    return v


@numba.njit(cache=True, nogil=True, inline="always")
def _lerp_index(v, z0, inv_h, n):
    """Grid cell (clamped to the end cells, so the ends extrapolate) and fraction of depth v."""
    f = (v - z0) * inv_h
    i = int(math.floor(f)) if f == f else 0
    if i < 0:
        i = 0
    elif i > n - 2:
        i = n - 2
    return i, f - i


@numba.njit(cache=True, nogil=True, inline="always")
def correct_point(x, y, z, z0, inv_h, depth, mag, shift, axis, kappa):
    """The map of :meth:`ReconstructionCorrection.apply` at one point, float64 (NaN stays NaN)."""
    n = depth.size
    i, t = _lerp_index(z, z0, inv_h, n)
    m = mag[i] + t * (mag[i + 1] - mag[i])
    xc = x / m + shift[i, 0] + t * (shift[i + 1, 0] - shift[i, 0])
    yc = y / m + shift[i, 1] + t * (shift[i + 1, 1] - shift[i, 1])
    ax = axis[i, 0] + t * (axis[i + 1, 0] - axis[i, 0])
    ay = axis[i, 1] + t * (axis[i + 1, 1] - axis[i, 1])
    w = z - kappa * ((xc - ax) * (xc - ax) + (yc - ay) * (yc - ay))
    j, s = _lerp_index(w, z0, inv_h, n)
    return xc, yc, depth[j] + s * (depth[j + 1] - depth[j])


@numba.njit(cache=True, nogil=True)
def _apply_kernel(x, y, z, ox, oy, oz, z0, inv_h, depth, mag, shift, axis, kappa):
    """The map of :meth:`ReconstructionCorrection.apply`, one pass (NaN stays NaN)."""
    fdt = ox.dtype.type
    for k in range(x.size):
        xc, yc, zc = correct_point(np.float64(x[k]), np.float64(y[k]), np.float64(z[k]), z0, inv_h, depth, mag,
                                   shift, axis, kappa)
        ox[k] = fdt(xc)
        oy[k] = fdt(yc)
        oz[k] = fdt(zc)


@numba.njit(cache=True, nogil=True, inline="always")
def _depth_cell(v, depth):
    """Cell of the depth table holding ``v`` (``depth[i] <= v < depth[i + 1]``, clamped to the end
    cells). The calibrated depth is close to linear in the file depth, so a linear guess is within a
    step or two (tried first); otherwise a binary search."""
    n = depth.size
    span = depth[n - 1] - depth[0]
    f = (v - depth[0]) * ((n - 1) / span) if span > 0 else 0.0
    g = int(f) if -1.0 < f < n else 0  # (False for NaN)
    g = min(max(g, 0), n - 2)
    for _ in range(3):
        if g > 0 and depth[g] > v:
            g -= 1
        elif g < n - 2 and depth[g + 1] <= v:
            g += 1
        else:
            return g
    lo, hi = 0, n - 1
    while hi - lo > 1:  # depth[lo] <= v < depth[hi], or the end cells
        mid = (lo + hi) >> 1
        if depth[mid] <= v:
            lo = mid
        else:
            hi = mid
    return lo if lo < n - 1 else n - 2


@numba.njit(cache=True, nogil=True, inline="always")
def _depth_value(v, grid, depth, i):
    """File depth of calibrated depth ``v`` in cell ``i`` of the depth table (linear; beyond both
    ends the end cells extrapolate, as ``np.interp`` does inside)."""
    d = depth[i + 1] - depth[i]
    t = (v - depth[i]) / d if d != 0.0 else 0.0
    return grid[i] + t * (grid[i + 1] - grid[i])


@numba.njit(cache=True, nogil=True, inline="always")
def _inverse_depth(v, grid, depth):
    """File depth whose calibrated depth is ``v``: the depth table read backwards (``depth``
    increasing; linear extrapolation beyond both ends, as ``np.interp`` inside)."""
    return _depth_value(v, grid, depth, _depth_cell(v, depth))


@numba.njit(cache=True, nogil=True, inline="always")
def _to_file_point(xc, yc, zc, z0, inv_h, grid, depth, mag, shift, axis, kappa, n_iter):
    """The inverse map at one calibrated point: its file position (x, y, z), float64."""
    n = depth.size
    w = _inverse_depth(zc, grid, depth)
    zf = w
    for _ in range(n_iter):
        i, t = _lerp_index(zf, z0, inv_h, n)
        ax = axis[i, 0] + t * (axis[i + 1, 0] - axis[i, 0])
        ay = axis[i, 1] + t * (axis[i + 1, 1] - axis[i, 1])
        znew = w + kappa * ((xc - ax) * (xc - ax) + (yc - ay) * (yc - ay))
        done = abs(znew - zf) <= 1e-13 * (1.0 + abs(zf))  # a fixed point to 1e-13 (relative; nm)
        zf = znew
        if done:
            break
    i, t = _lerp_index(zf, z0, inv_h, n)
    m = mag[i] + t * (mag[i + 1] - mag[i])
    return ((xc - (shift[i, 0] + t * (shift[i + 1, 0] - shift[i, 0]))) * m,
            (yc - (shift[i, 1] + t * (shift[i + 1, 1] - shift[i, 1]))) * m, zf)


@numba.njit(cache=True, nogil=True)
def _to_file_kernel(x, y, z, ox, oy, oz, z0, inv_h, grid, depth, mag, shift, axis, kappa, n_iter):
    """The inverse map of :meth:`ReconstructionCorrection.to_file`, one pass over the points
    (float64; the lateral and curvature terms by ``n_iter`` fixed-point steps)."""
    for k in range(x.size):
        ox[k], oy[k], oz[k] = _to_file_point(x[k], y[k], z[k], z0, inv_h, grid, depth, mag, shift, axis, kappa,
                                             n_iter)


@numba.njit(cache=True, nogil=True)
def _site_file_kernel(lo, hi, r, s, site_z, z_off, rod_xy, tilt, z_ref, identity, ox, oy, oz, z0, inv_h, grid, depth,
                      mag, shift, axis, kappa, n_iter):
    """Sites ``lo:hi`` of :func:`file_site_positions`: each site's point on its rod axis (calibrated
    frame) and, unless ``identity``, its file position (:func:`_to_file_point`), float64."""
    for k in range(lo, hi):
        ri = r[k]
        zc = site_z[s[k]] + z_off[ri]
        dz = zc - z_ref
        xc = rod_xy[ri, 0] + tilt[0] * dz
        yc = rod_xy[ri, 1] + tilt[1] * dz
        if identity:
            ox[k], oy[k], oz[k] = xc, yc, zc
        else:
            ox[k], oy[k], oz[k] = _to_file_point(xc, yc, zc, z0, inv_h, grid, depth, mag, shift, axis, kappa,
                                                 n_iter)


def file_site_positions(columns, rods, sites):
    """Where sites of a :class:`~probeseq.lattice.rodcolumns.RodColumns` lie in the ion file's frame.

    The columns are cut in the calibrated frame of their reconstruction correction
    (``columns.params["reconstruction"]``); this maps each site's point on its rod axis back to
    the file's positions, so a site can be found in the user's reconstruction.

    Parameters
    ----------
    columns : RodColumns
    rods, sites : (n,) array of int
        Rod and site index of each site.

    Returns
    -------
    xy : (n, 2) ndarray of float, nm
        Rod axis position at the site's depth, file frame.
    z : (n,) ndarray of float, nm
        The site's depth on its rod axis, file frame.
    """
    from .. import runtime

    r = np.ascontiguousarray(rods, np.int64).ravel()
    s = np.ascontiguousarray(sites, np.int64).ravel()
    corr = ReconstructionCorrection.from_dict(columns.params.get("reconstruction"))
    xy = np.empty((r.size, 2))
    z = np.empty(r.size)
    x_out, y_out = xy[:, 0], xy[:, 1]  # strided views: the kernel writes into the (n, 2) array
    if corr.is_identity:
        tables = (0.0, 1.0, np.zeros(2), np.zeros(2), np.ones(2), np.zeros((2, 2)), np.zeros((2, 2)), 0.0)
    else:
        z0, inv_h, depth, mag, shift, axis, kappa = corr._tables()
        tables = (z0, inv_h, np.ascontiguousarray(corr.grid_z_nm, float), np.ascontiguousarray(depth, float),
                  np.ascontiguousarray(mag, float), shift, axis, float(kappa))
    args = (r, s, np.ascontiguousarray(columns.site_z_nm, float), np.ascontiguousarray(columns.site_z_offset_nm, float),
            np.ascontiguousarray(columns.rod_xy_nm, float), np.ascontiguousarray(columns.tilt, float),
            float(columns.z_ref_nm), bool(corr.is_identity), x_out, y_out, z, *tables, 4)
    runtime.in_parts(lambda lo, hi: _site_file_kernel(lo, hi, *args), r.size, runtime.kernel_threads(),
                     min_items=1 << 16)
    return xy, z
