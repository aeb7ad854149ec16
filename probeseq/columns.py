"""Rod columns: cut the registered rod lattice into per-rod depth profiles of metal counts.

Given a :class:`~probeseq.registration.Registration` (the lattice placed in the reconstruction
frame), this module

1. assigns each metal ion to its nearest rod axis (exactly, through a lookup table over the unit
   cell, see :class:`~probeseq.registration.RodLocator`); ions farther than ``cutoff_frac`` times the
   nearest rod distance from every axis are left out and counted. The default 0.75 keeps all of the
   Voronoi cell of a square-lattice rod (corner at 0.707) and all but the far corners of a honeycomb
   rod's triangular cell (corner at 1.0), where a blurred cloud of spread 0.15 nm around an axis
   0.87 nm away has no weight left, while dropping ions in the empty hexagon centres;
2. estimates the specimen outline per depth slab (centre from the 1st/99th percentiles of x and y,
   radius from the 98th percentile of the radial distance divided by sqrt(0.98), which is exact for
   a uniformly filled disc, then a running median over five slabs) and masks each (rod, site) that
   lies closer than ``edge_margin_nm`` to the outline, so only rods wholly inside the specimen at
   that depth are used;
3. cuts the rods into sites at the pitch ``repeat / sites_per_repeat`` *along the rod axis*. The
   sites of all rods lie in crystal planes perpendicular to the (tilted) rods. In the
   reconstruction frame (lateral scale error ``s``, tilt ``t``) these read ``z + g . (x, y) = u``
   with ``g = t / s**2``, so an ion's site follows from its plane coordinate u; the planes are
   ``pitch * sqrt(1 + g . t)`` apart in u, and their phase is fitted as the phase of the
   u-periodicity of the metal ions. Site k of every rod is the same plane k. Its depth on a rod
   whose axis passes through (x0, y0) at z = 0 is ``site_z_nm[k] - g . (x0, y0) / (1 + g . t)``
   (:func:`rod_site_depths`); ``site_z_nm`` is the depth for a rod through the lateral origin. The
   depth spacing along one rod is ``pitch / sqrt(1 + g . t)``;
4. sums the per-ion metal weights into ``counts[rod, site, metal]`` with one ``np.bincount`` per
   metal on a flat key, chunk by chunk (:class:`ColumnBinner`), so 1e8 ions stream through bounded
   memory. The analysis itself counts with the compiled pass of :mod:`probeseq.counting`, which
   does the same assignment in the same arithmetic (and is checked against this module); the
   numpy path here is its reference and serves weighted (fractional) channels.

The mask and the specimen outline are computed by compiled loops (:func:`_inside_kernel`,
:func:`_outline_kernel`) with numpy's definitions (``np.interp``, linear quantiles), so they equal
the vectorised formulas; slabs without enough ions (a sample read as depth blocks) are skipped and
the outline is interpolated across them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple

import numba
import numpy as np

from . import runtime
from .data import RodColumns
from .exceptions import InputError
from .lattice import Lattice
from .validate import check_scale, check_seed
from .registration import (RESOLVABLE_CROSSTALK, Registration, RodLocator, _cached_locator, _check_xyz,
                           register_lattice)

__all__ = [
    "ColumnGeometry",
    "KernelGeometry",
    "ColumnBinner",
    "plan_columns",
    "assign_rods",
    "rod_site_depths",
    "rod_neighbours",
    "build_columns",
    "columns_from_counts",
    "register_lattice",
    "Registration",
    "RESOLVABLE_CROSSTALK",
    "DEFAULT_CUTOFF_FRAC",
    "DEFAULT_EDGE_MARGIN_FRAC",
    "OUTLINE_QUANTILE",
]

#: ions farther than this fraction of the nearest rod distance from every rod axis are left out
DEFAULT_CUTOFF_FRAC = 0.75
#: default distance kept between a used rod axis and the specimen outline, as a fraction of the
#: nearest rod distance (checked on simulated needles against the true outline)
DEFAULT_EDGE_MARGIN_FRAC = 0.25
#: quantile of the radial ion distance that estimates the outline radius (divided by its square root)
OUTLINE_QUANTILE = 0.98
_PAD = 5  # empty cells around the rods in the dense rod table
_EXCL = 0  # lookup offset of an ion beyond the cutoff (lands in the all -1 half of rod_key)
_FB = -2_100_000_000  # lookup offsets below _FB_LIMIT are fallback rows: _FB + row
_FB_LIMIT = -1_000_000_000
_CHUNK = 1 << 18  # ions per assignment pass (measured fastest of 2^14..2^20)
_BLOCK = 1 << 22  # ions per bincount (one pass over the touched bins per block)


class KernelGeometry(NamedTuple):
    """The rod and site lookup of a :class:`ColumnGeometry` as plain arrays and scalars, by name.

    Built by :meth:`ColumnGeometry.kernel_geometry` and passed whole to compiled loops (numba takes
    a named tuple of arrays and scalars as one argument; the loops read its fields by name). The
    lookup tables are the geometry's own arrays (no copy when they already have the listed type).
    An ion at (x, y, z) nm lies in fine table cell ``floor(cell_xy @ (x, y) + cell_z * z +
    cell_origin)``, i.e. in unit cell ``cell >> grid_bits`` relative to the rod table's origin and
    in grid cell ``cell & (n_grid - 1)`` within it; its site is ``floor(site_coef[0] * z +
    site_coef[1] * x + site_coef[2] * y - site_coef[3])``.

    Attributes
    ----------
    cell_xy : (2, 2) ndarray of float64, 1/nm
        Lateral part of the map to fine table cells (fractional map times ``n_grid``).
    cell_z : (2,) ndarray of float64, 1/nm
        Depth part of the map to fine table cells.
    cell_origin : (2,) ndarray of float64
        Offset of the map to fine table cells, relative to the rod table's first unit cell.
    site_coef : (4,) ndarray of float64
        ``(1, g_x, g_y, u_0) / plane_spacing_nm`` (1/nm, 1/nm, 1/nm, dimensionless): the site of an
        ion from its plane coordinate ``u = z + g . (x, y)``, ``u_0`` being the lower bound of site 0.
    frac_xy : (2, 2) ndarray of float64, 1/nm
        Lateral part of the exact map to fractional cell coordinates (for fallback cells).
    frac_z : (2,) ndarray of float64, 1/nm
        Depth part of the exact map to fractional cell coordinates.
    frac_origin : (2,) ndarray of float64
        Offset of the exact map, relative to the rod table's first unit cell.
    n_grid : int
        Grid cells per unit cell edge (a power of two).
    grid_bits : int
        ``log2(n_grid)``.
    lut_offset : (n_grid * n_grid,) ndarray of int32
        Per grid cell: rod code offset, the beyond-cutoff offset, or a fallback row (see
        :attr:`ColumnGeometry.lut_offset`).
    code_offset : (n_codes + 1,) ndarray of int32
        Rod table offset of each rod code of the locator; the last entry is the beyond-cutoff offset.
    candidates : (n_fallback_cells, k_max) ndarray of int32
        Candidate rod codes of each fallback grid cell (:attr:`RodLocator.candidates`).
    code_frac : (n_codes, 2) ndarray of float64
        Rod position of each code relative to the ion's unit cell, fractional coordinates.
    metric : (2, 2) ndarray of float64, nm^2
        Metric of the fractional coordinates (:attr:`RodLocator.metric`).
    cutoff2_nm2 : float, nm^2
        Squared assignment cutoff (``inf`` for none).
    n_cells_i, n_cells_j : int
        Unit cells of the rod table along the two cell axes.
    rods_per_cell : int
        Rods in one unit cell.
    rod_key : (2 * n_cells_i * n_cells_j * rods_per_cell,) ndarray of int32
        Rod index of every table entry, ``-1`` for none (see :attr:`ColumnGeometry.rod_key`).
    n_sites : int
        Sites per rod.
    """

    cell_xy: np.ndarray
    cell_z: np.ndarray
    cell_origin: np.ndarray
    site_coef: np.ndarray
    frac_xy: np.ndarray
    frac_z: np.ndarray
    frac_origin: np.ndarray
    n_grid: np.int64
    grid_bits: np.int64
    lut_offset: np.ndarray
    code_offset: np.ndarray
    candidates: np.ndarray
    code_frac: np.ndarray
    metric: np.ndarray
    cutoff2_nm2: np.float64
    n_cells_i: np.int64
    n_cells_j: np.int64
    rods_per_cell: np.int64
    rod_key: np.ndarray
    n_sites: np.int64


@dataclass(frozen=True, eq=False)
class ColumnGeometry:
    """Everything needed to assign ions to (rod, site) bins, fixed before the pass over the ions.

    Attributes
    ----------
    registration : Registration
    cutoff_nm : float, nm
        Assignment cutoff, lattice frame.
    rod_cells : (n_rods, 3) ndarray of int
        Cell indices (i, j) and basis index of each rod.
    rod_xy_nm : (n_rods, 2) ndarray of float, nm
        Rod axes at ``registration.z_ref_nm``, reconstruction frame.
    site_z_nm : (n_sites,) ndarray of float, nm
        Site centre depths on a rod whose axis passes through the lateral origin at z = 0 (see
        :func:`rod_site_depths` for each rod).
    pitch_nm : float, nm
    mask : (n_rods, n_sites) ndarray of bool
        True where the site of the rod lies inside the specimen outline minus the margin.
    edge_margin_nm : float, nm
    outline_z_nm, outline_radius_nm : (n_slabs,) ndarray of float, nm
    outline_center_nm : (n_slabs, 2) ndarray of float, nm
    site_phase_nm : float, nm
        Fitted site phase: site planes sit at ``u = site_phase_nm + k * plane_spacing_nm``.
    site_phase_contrast : float
        Modulus of the mean of ``exp(2 pi i u / plane_spacing_nm)`` over the ions (0 = no periodicity).
    """

    registration: Registration
    cutoff_nm: float
    rod_cells: np.ndarray
    rod_xy_nm: np.ndarray
    site_z_nm: np.ndarray
    pitch_nm: float
    mask: np.ndarray
    edge_margin_nm: float
    outline_z_nm: np.ndarray
    outline_radius_nm: np.ndarray
    outline_center_nm: np.ndarray
    site_phase_nm: float
    site_phase_contrast: float
    locator: RodLocator = field(repr=False)
    table_origin: tuple = field(repr=False)  # (i0, j0, ni, nj)
    rod_table: np.ndarray = field(repr=False)  # (ni * nj * nb,) int32 -> rod index or -1
    code_offset: np.ndarray = field(repr=False)  # (n_codes + 1,) int32, last entry a sentinel
    lut_offset: np.ndarray = field(repr=False)  # (G * G,) int32: code offset, _EXCL or _FB + row
    rod_key: np.ndarray = field(repr=False)  # (2 * ni * nj * nb,) int32: first half -1, then rod or -1
    frac_affine: tuple = field(repr=False)  # registration.frac_map(), computed once

    @property
    def n_rods(self) -> int:
        return int(self.rod_cells.shape[0])

    @property
    def n_sites(self) -> int:
        return int(self.site_z_nm.size)

    @property
    def lattice(self) -> Lattice:
        return self.registration.lattice

    @property
    def plane_gradient(self) -> np.ndarray:
        """(2,) gradient ``g`` of the site planes ``u = z + g . (x, y)``: ``tilt / scale**2``."""
        return _plane_model(self.registration.tilt, self.registration.scale)[0]

    @property
    def plane_spacing_nm(self) -> float:
        """Spacing of the site planes in the plane coordinate u, nm."""
        return float(self.pitch_nm * math.sqrt(_plane_model(self.registration.tilt, self.registration.scale)[1]))

    @property
    def rod_site_z_nm(self) -> np.ndarray:
        """(n_rods, n_sites) depth of every site on its rod axis, nm."""
        reg = self.registration
        return _rod_site_z(self.site_z_nm, self.rod_xy_nm, reg.tilt, reg.z_ref_nm, reg.scale)

    def kernel_geometry(self) -> KernelGeometry:
        """The rod and site lookup as a :class:`KernelGeometry` for compiled loops.

        The arithmetic is that of :func:`_assign_chunk`: the same maps and the same tables (the
        tables are this geometry's arrays, not copies, when they already have the listed type).

        Returns
        -------
        KernelGeometry
        """
        loc = self.locator
        G = loc.n_grid
        i0, j0, ni, nj = self.table_origin
        M, e, c = self.frac_affine
        gp, denom = _plane_model(self.registration.tilt, self.registration.scale)
        du = self.plane_spacing_nm
        ns = self.n_sites
        u0 = (self.site_z_nm[0] * denom - 0.5 * du) if ns else 0.0
        return KernelGeometry(
            cell_xy=(M * G), cell_z=(e * G), cell_origin=((c - np.array([i0, j0])) * G),
            site_coef=np.array([1.0 / du, gp[0] / du, gp[1] / du, u0 / du]),
            frac_xy=np.ascontiguousarray(M, np.float64), frac_z=np.ascontiguousarray(e, np.float64),
            frac_origin=np.array([c[0] - i0, c[1] - j0], np.float64),
            n_grid=np.int64(G), grid_bits=np.int64(G.bit_length() - 1),
            lut_offset=np.ascontiguousarray(self.lut_offset, np.int32),
            code_offset=np.ascontiguousarray(self.code_offset, np.int32),
            candidates=np.ascontiguousarray(loc.candidates, np.int32),
            code_frac=np.ascontiguousarray(loc.code_frac, np.float64),
            metric=np.ascontiguousarray(loc.metric, np.float64),
            cutoff2_nm2=np.float64(loc.cutoff_nm ** 2 if math.isfinite(loc.cutoff_nm) else np.inf),
            n_cells_i=np.int64(ni), n_cells_j=np.int64(nj), rods_per_cell=np.int64(self.lattice.rods_per_cell),
            rod_key=np.ascontiguousarray(self.rod_key, np.int32), n_sites=np.int64(ns),
        )

    def to_dict(self) -> dict:
        """JSON-able description of the geometry (no per-rod arrays)."""
        return {
            "cutoff_nm": float(self.cutoff_nm * self.registration.scale),
            "cutoff_frac": float(self.cutoff_nm / self.lattice.nearest_rod_distance_nm),
            "edge_margin_nm": float(self.edge_margin_nm),
            "n_rods": self.n_rods, "n_sites": self.n_sites,
            "n_sites_used": int(self.mask.sum()),
            "pitch_nm": float(self.pitch_nm),
            "site_phase_nm": float(self.site_phase_nm),
            "site_phase_contrast": float(self.site_phase_contrast),
            "site_z0_nm": float(self.site_z_nm[0]) if self.n_sites else None,
            "plane_spacing_nm": self.plane_spacing_nm,
            "plane_gradient": [float(v) for v in self.plane_gradient],
            "site_coordinate": "u = z + g . (x, y) with g = plane_gradient = tilt / scale^2; site k is the "
                               "plane u = site_phase_nm + k * plane_spacing_nm; its depth on a rod through "
                               "(x0, y0) at z = 0 is site_z_nm[k] - g . (x0, y0) / (1 + g . tilt)",
            "outline": {"z_nm": [round(float(v), 4) for v in self.outline_z_nm],
                        "radius_nm": [round(float(v), 4) for v in self.outline_radius_nm],
                        "center_nm": [[round(float(a), 4), round(float(b), 4)] for a, b in self.outline_center_nm]},
        }


# ---------------------------------------------------------------------- outline
def _outline(x, y, z, slab_nm, min_per_slab=300, min_ions=50):
    """Outline (centre, radius) per depth slab; slabs with fewer than ``min_ions`` ions are left
    out (a sample read as depth blocks leaves gaps), the outline is interpolated across them."""
    zmin, zmax = float(z.min()), float(z.max())
    n = int(max(1, min(math.ceil((zmax - zmin) / slab_nm), z.size // min_per_slab)))
    edges = np.linspace(zmin, zmax + 1e-9, n + 1)
    slab = np.clip(np.searchsorted(edges, z, side="right") - 1, 0, n - 1)
    order = np.argsort(slab, kind="stable")
    bounds = np.searchsorted(slab[order], np.arange(n + 1))
    filled = np.flatnonzero(np.diff(bounds) >= min(min_ions, z.size))
    if filled.size == 0:
        filled = np.flatnonzero(np.diff(bounds) > 0)
    n = filled.size
    zc = np.empty(n)
    cen = np.empty((n, 2))
    rad = np.empty(n)
    _outline_kernel(np.ascontiguousarray(x, np.float64), np.ascontiguousarray(y, np.float64),
                    np.ascontiguousarray(z, np.float64), order.astype(np.int64), bounds.astype(np.int64),
                    filled.astype(np.int64), float(OUTLINE_QUANTILE), zc, cen, rad)
    if n >= 5:
        pad = np.pad(rad, 2, mode="edge")
        rad = np.median(np.lib.stride_tricks.sliding_window_view(pad, 5), axis=1)
        for a in range(2):
            pc = np.pad(cen[:, a], 2, mode="edge")
            cen[:, a] = np.median(np.lib.stride_tricks.sliding_window_view(pc, 5), axis=1)
    return zc, cen, rad


@numba.njit(cache=True, nogil=True)
def _quantile(a, q):
    """numpy's default (linear) quantile of a 1-D array, q in [0, 1]; ``a`` is reordered."""
    n = a.size
    pos = q * (n - 1)
    lo = int(math.floor(pos))
    t = pos - lo
    p = np.partition(a, lo)
    lo_v = p[lo]
    hi_v = lo_v
    if lo + 1 < n:
        hi_v = p[lo + 1]
        for k in range(lo + 2, n):
            if p[k] < hi_v:
                hi_v = p[k]
    d = hi_v - lo_v
    # numpy's _lerp: a + (b - a) t, computed from the nearer end
    return hi_v - d * (1.0 - t) if t >= 0.5 else lo_v + d * t


@numba.njit(cache=True, nogil=True)
def _outline_kernel(x, y, z, order, bounds, filled, oq, zc, cen, rad):
    """Per filled slab: centre from the 1st/99th percentiles of x and y, radius from the ``oq``
    quantile of the distance to it over sqrt(oq), depth the median z (numpy's definitions)."""
    for j in range(filled.size):
        jj = filled[j]
        a = bounds[jj]
        b = bounds[jj + 1]
        idx = order[a:b]
        xs = x[idx]
        ys = y[idx]
        cx = 0.5 * (_quantile(xs, 0.01) + _quantile(xs, 0.99))
        cy = 0.5 * (_quantile(ys, 0.01) + _quantile(ys, 0.99))
        r = np.empty(idx.size)
        for k in range(idx.size):
            r[k] = math.hypot(x[idx[k]] - cx, y[idx[k]] - cy)
        cen[j, 0] = cx
        cen[j, 1] = cy
        rad[j] = _quantile(r, oq) / math.sqrt(oq)
        zc[j] = _quantile(z[idx], 0.5)


def _site_phase(u, spacing):
    w = np.exp(2j * np.pi * u / spacing)
    m = w.mean()
    phase = (np.angle(m) / (2 * np.pi)) * spacing % spacing
    return float(phase), float(abs(m))


def _plane_model(tilt, scale):
    """Site planes of the tilted crystal seen in the reconstruction frame.

    The crystal's planes perpendicular to its rods are ``t_c . q + zeta = const`` (q lateral,
    crystal frame); the reconstruction maps q to ``scale R q + offset`` and keeps depth, and the
    rod direction there is ``tilt = scale R t_c``, so the planes read ``z + g . (x, y) = u`` with
    ``g = tilt / scale**2``. Returns g and ``denom = 1 + g . tilt = 1 + |t_c|^2``: the planes are
    ``pitch * sqrt(denom)`` apart in u, and along one rod their depths are ``pitch / sqrt(denom)``
    apart.
    """
    t = np.asarray(tilt, float)
    g = t / float(scale) ** 2
    return g, 1.0 + float(g @ t)


def _rod_site_z(site_z, rod_xy, tilt, z_ref, scale):
    g, denom = _plane_model(tilt, scale)
    xy0 = np.asarray(rod_xy, float) - np.asarray(tilt, float) * z_ref
    return np.asarray(site_z)[None, :] - (xy0 @ g)[:, None] / denom


def rod_site_depths(columns: RodColumns) -> np.ndarray:
    """(n_rods, n_sites) depth of every site on its rod axis, nm, for columns from this module.

    Site planes are perpendicular to the tilted rods, so site k sits at slightly different depths
    on different rods: ``site_z_nm[k] - g . xy0 / (1 + g . tilt)`` with ``xy0`` the rod axis at
    z = 0 and ``g = tilt / scale**2`` the plane gradient (scale from ``columns.params``).
    """
    scale = float(columns.params.get("registration", {}).get("scale") or 1.0)
    return _rod_site_z(columns.site_z_nm, columns.rod_xy_nm, columns.tilt, columns.z_ref_nm, scale)


def plan_columns(x, y, z, registration: Registration, *, cutoff_frac: float = DEFAULT_CUTOFF_FRAC,
                 edge_margin_nm: float | None = None, z_range_nm=None, site_phase_nm: float | None = None,
                 slab_nm: float = 2.0, max_ions: int = 2_000_000, random_state=None,
                 n_grid: int = 256) -> ColumnGeometry:
    """Fix the rods, sites and mask from (a sample of) the metal ions and a registration.

    Parameters
    ----------
    x, y, z : (n_ions,) ndarray of float, nm
        Metal-ion positions (all of them, or a random sample when streaming).
    registration : Registration
    cutoff_frac : float
        Assignment cutoff as a fraction of the nearest rod distance, in (0, 2].
    edge_margin_nm : float, nm, optional
        Distance kept between a used rod axis and the outline; default
        ``DEFAULT_EDGE_MARGIN_FRAC`` x the nearest rod distance (reconstruction frame).
    z_range_nm : (float, float), nm, optional
        Depth range to cut into sites (default: that of the ions given).
    site_phase_nm : float, nm, optional
        Fix the site phase (plane coordinate u of a site plane, nm) instead of fitting it.
    slab_nm : float, nm
        Depth slab thickness of the outline estimate.
    max_ions : int
        Largest number of ions used for the outline and phase (a random sample beyond it).
    random_state : int or numpy.random.Generator, optional
    n_grid : int
        Lookup-table size per axis.

    Returns
    -------
    ColumnGeometry
    """
    if not isinstance(registration, Registration):
        raise InputError(f"registration must be a probeseq Registration, got {type(registration).__name__}")
    x, y, z = _check_xyz(x, y, z)
    if x.size < 10:
        raise InputError(f"too few metal ions to cut columns: {x.size}")
    if not (isinstance(cutoff_frac, (int, float)) and 0 < cutoff_frac <= 2):
        raise InputError(f"cutoff_frac must be in (0, 2], got {cutoff_frac!r}")
    if not slab_nm > 0:
        raise InputError(f"slab_nm must be positive, got {slab_nm!r}")
    reg = registration
    lat = reg.lattice
    d_nn = lat.nearest_rod_distance_nm
    rng = np.random.default_rng(random_state)
    if x.size > max_ions:
        sel = np.sort(rng.choice(x.size, max_ions, replace=False))
        x, y, z = x[sel], y[sel], z[sel]
    if edge_margin_nm is None:
        edge_margin_nm = DEFAULT_EDGE_MARGIN_FRAC * d_nn * reg.scale
    if not (math.isfinite(edge_margin_nm) and edge_margin_nm >= 0):
        raise InputError(f"edge_margin_nm must be >= 0, got {edge_margin_nm!r}")
    gp, tt, zlo, zhi, site_z, phase, contrast = _plan_sites(x, y, z, reg, z_range_nm, site_phase_nm)
    oz, ocen, orad = _outline(x, y, z, slab_nm)
    cells, xy_ref = _candidate_rods(reg, oz, ocen, orad, zlo, zhi)
    cells, xy_ref, inside = _rods_inside(reg, cells, xy_ref, site_z, gp, tt, (oz, ocen, orad),
                                         edge_margin_nm, zlo, zhi)
    cutoff_nm = float(cutoff_frac) * d_nn
    locator, origin, table, code_offset, lut_offset, rod_key = _rod_lookup(lat, cells, site_z, cutoff_nm, n_grid)
    for a in (cells, xy_ref, site_z, inside, table, code_offset, lut_offset, rod_key):
        a.flags.writeable = False
    return ColumnGeometry(
        registration=reg, cutoff_nm=cutoff_nm, rod_cells=cells, rod_xy_nm=xy_ref, site_z_nm=site_z,
        pitch_nm=float(lat.pitch_nm), mask=inside, edge_margin_nm=float(edge_margin_nm), outline_z_nm=oz,
        outline_radius_nm=orad, outline_center_nm=ocen, site_phase_nm=float(phase),
        site_phase_contrast=float(contrast), locator=locator, table_origin=origin,
        rod_table=table, code_offset=code_offset, lut_offset=lut_offset, rod_key=rod_key,
        frac_affine=reg.frac_map())


def _plan_sites(x, y, z, reg, z_range_nm, site_phase_nm):
    """Site-plane model, depth range and site depths along the rods of a registration.

    Returns ``(gp, tt, zlo, zhi, site_z, phase, contrast)``.
    """
    t = reg.tilt
    gp, tt = _plane_model(t, reg.scale)
    spacing = reg.lattice.pitch_nm * math.sqrt(tt)
    u = z + gp[0] * x + gp[1] * y
    if z_range_nm is None:
        zlo, zhi = float(z.min()), float(z.max())
        ulo, uhi = float(u.min()), float(u.max())
    else:
        zlo, zhi = (float(v) for v in z_range_nm)
        if not (math.isfinite(zlo) and math.isfinite(zhi) and zhi > zlo):
            raise InputError(f"z_range_nm must be (low, high) with high > low, got {z_range_nm!r}")
        span = float(np.abs(x).max() * abs(gp[0]) + np.abs(y).max() * abs(gp[1]))
        ulo, uhi = zlo - span, zhi + span
    if site_phase_nm is None:
        phase, contrast = _site_phase(u, spacing)
    else:
        phase, contrast = float(site_phase_nm) % spacing, _site_phase(u, spacing)[1]
    k0 = math.floor((ulo - phase) / spacing - 0.5) + 1
    k1 = math.floor((uhi - phase) / spacing + 0.5)
    site_u = phase + spacing * np.arange(k0, k1 + 1, dtype=float)
    site_z = site_u / tt
    return gp, tt, zlo, zhi, site_z, phase, contrast


def _candidate_rods(reg, oz, ocen, orad, zlo, zhi):
    """Every lattice rod whose axis comes within the largest outline radius.

    Returns ``(cells, xy_ref)``: rod cells ``(i, j, basis)`` and axes at the reference depth.
    """
    lat = reg.lattice
    cell = max(lat.a_nm, lat.b_nm) * reg.scale
    if 2 * orad.max() < cell:
        raise InputError(f"specimen narrower than one cell: the metal ions span a diameter of at most "
                         f"{2 * orad.max():.3g} nm, the lattice cell is {cell:.3g} nm")
    C = lat.cell_matrix
    A = reg.transform
    zmid = 0.5 * (zlo + zhi)
    c_mid = np.array([np.interp(zmid, oz, ocen[:, 0]), np.interp(zmid, oz, ocen[:, 1])])
    drift = float(np.hypot(*(ocen - c_mid).T).max()) if ocen.size else 0.0
    reach = float(orad.max()) + np.abs(reg.tilt).max() * (zhi - zlo) + cell + drift
    q0 = np.linalg.solve(A @ C, c_mid - reg.offset_nm - reg.tilt * (zmid - reg.z_ref_nm))
    nr = int(math.ceil(reach / (reg.scale * min(lat.a_nm, lat.b_nm) * math.sin(math.radians(lat.gamma_deg))))) + 2
    ii, jj = np.meshgrid(np.arange(-nr, nr + 1) + int(round(q0[0])), np.arange(-nr, nr + 1) + int(round(q0[1])),
                         indexing="ij")
    nb = lat.rods_per_cell
    cells = np.column_stack([np.repeat(ii.ravel(), nb), np.repeat(jj.ravel(), nb), np.tile(np.arange(nb), ii.size)])
    frac = cells[:, :2] + lat.rods_frac[cells[:, 2]]
    xy_ref = reg.lattice_to_recon(frac @ C.T)
    near = np.hypot(*(xy_ref + reg.tilt * (zmid - reg.z_ref_nm) - c_mid).T) <= reach
    return cells[near], xy_ref[near]


def _rods_inside(reg, cells, xy_ref, site_z, gp, tt, outline, edge_margin_nm, zlo, zhi):
    """Keep the rods wholly inside the outline and mark their sites inside it.

    Returns ``(cells, xy_ref, inside)`` with ``inside`` the (rods, sites) mask.
    """
    oz, ocen, orad = outline
    t = reg.tilt
    # axis at each site depth vs outline; site k of a rod through xy0 (z = 0) is at
    # z = site_z[k] - t . xy0 / (1 + |t|^2)
    dz_rod = -((xy_ref - t * reg.z_ref_nm) @ gp) / tt
    args = (np.ascontiguousarray(site_z, np.float64), np.ascontiguousarray(dz_rod, np.float64),
            np.ascontiguousarray(xy_ref, np.float64), float(t[0]), float(t[1]), float(reg.z_ref_nm),
            np.ascontiguousarray(oz, np.float64), np.ascontiguousarray(ocen[:, 0], np.float64),
            np.ascontiguousarray(ocen[:, 1], np.float64), np.ascontiguousarray(orad, np.float64),
            float(edge_margin_nm), float(zlo), float(zhi))
    maybe = np.zeros(cells.shape[0], np.bool_)
    runtime.ensure()  # a fork-safe threading layer before the first parallel kernel
    _maybe_inside_kernel(*args, maybe)  # rods that may be inside at some depth (a safe bound)
    if not maybe.all():
        cells, xy_ref, dz_rod = cells[maybe], xy_ref[maybe], dz_rod[maybe]
        args = args[:1] + (np.ascontiguousarray(dz_rod, np.float64), np.ascontiguousarray(xy_ref, np.float64)) + args[3:]
    inside = np.empty((cells.shape[0], site_z.size), np.bool_)
    keep = np.zeros(cells.shape[0], np.bool_)
    _inside_kernel(*args, inside, keep)
    if not keep.any():
        raise InputError(f"no rod lies wholly inside the specimen: outline radius at most {orad.max():.3g} nm "
                         f"with an edge margin of {edge_margin_nm:.3g} nm")
    if not keep.all():
        # kept rows moved up in place (no second mask-sized array); the view's base keeps the
        # few dropped rows' bytes
        cells, xy_ref, inside = cells[keep], xy_ref[keep], inside[:_compact_rows(inside, keep)]
    return cells, xy_ref, inside


def _rod_lookup(lat, cells, site_z, cutoff_nm, n_grid):
    """Dense rod table and the offset tables the counting kernels look rods up with.

    Returns ``(locator, table_origin, table, code_offset, lut_offset, rod_key)``.
    """
    nb = lat.rods_per_cell
    i0 = int(cells[:, 0].min()) - _PAD
    j0 = int(cells[:, 1].min()) - _PAD
    ni = int(cells[:, 0].max()) + _PAD + 1 - i0
    nj = int(cells[:, 1].max()) + _PAD + 1 - j0
    table = np.full(ni * nj * nb, -1, dtype=np.int32)
    table[((cells[:, 0] - i0) * nj + (cells[:, 1] - j0)) * nb + cells[:, 2]] = np.arange(cells.shape[0])
    locator = _cached_locator(lat, cutoff_nm, n_grid)
    off = locator.code_cell[:, 0] * (nj * nb) + locator.code_cell[:, 1] * nb + locator.code_basis
    if cells.shape[0] * max(site_z.size, 1) * 16 >= 2 ** 31 or ni * nj * nb >= 2 ** 29:
        raise InputError(f"too many rod sites to count: {cells.shape[0]} rods x {site_z.size} sites; "
                         f"cut the depth range (z_range_nm) into parts")
    # rod_key has a first half of -1: offsets of real rods point into the second half, the
    # excluded offset (0) into the first, so no clamp is needed in the hot loop
    size = table.size
    code_offset = np.concatenate([off + size, [_EXCL]]).astype(np.int32)
    lt = locator.table.astype(np.int64)
    lut_offset = np.where(lt >= 0, code_offset[np.maximum(lt, 0)],
                          np.where(lt == -1, _EXCL, _FB - (lt + 2))).astype(np.int32)
    rod_key = np.concatenate([np.full(size, -1, np.int32), np.where(table >= 0, table, -1).astype(np.int32)])
    return locator, (i0, j0, ni, nj), table, code_offset, lut_offset, rod_key


@numba.njit(cache=True, nogil=True)
def _compact_rows(a, keep):
    """Move the rows ``a[keep]`` to the front of ``a`` in order; returns their number."""
    n = 0
    for r in range(a.shape[0]):
        if keep[r]:
            if n != r:
                a[n, :] = a[r, :]
            n += 1
    return n


@numba.njit(cache=True, nogil=True, inline="always")
def _inside_at(zz, x0, y0, t0, t1, z_ref, ozj, cxj, cyj, rj, sx, sy, sr, margin):
    """(inside, lim - distance) at depth zz on one outline segment (values as ``np.interp``)."""
    dz = zz - ozj
    dx = x0 + t0 * (zz - z_ref) - (sx * dz + cxj)
    dy = y0 + t1 * (zz - z_ref) - (sy * dz + cyj)
    lim = (sr * dz + rj) - margin
    d2 = dx * dx + dy * dy
    return (lim >= 0) & (d2 <= lim * lim), lim - math.sqrt(d2)


@numba.njit(cache=True, nogil=True, inline="always")
def _segment_bound(za, zb, x0, y0, t0, t1, z_ref, ozj, cxj, cyj, rj, sx, sy, sr, margin):
    """(largest lim, smallest axis-centre distance) over depths [za, zb] on one outline segment."""
    px = x0 - t0 * z_ref - cxj + sx * ozj
    py = y0 - t1 * z_ref - cyj + sy * ozj
    qx = t0 - sx
    qy = t1 - sy
    qq = qx * qx + qy * qy
    zs = za
    if qq > 0:
        zs = min(max(-(px * qx + py * qy) / qq, za), zb)
    dmin = math.sqrt((px + qx * zs) ** 2 + (py + qy * zs) ** 2)
    lmax = max((sr * (za - ozj) + rj), (sr * (zb - ozj) + rj)) - margin
    return lmax, dmin


@numba.njit(cache=True, nogil=True, parallel=True)
def _maybe_inside_kernel(site_z, dz_rod, xy_ref, t0, t1, z_ref, oz, ocx, ocy, orad, margin, zlo, zhi, maybe):
    """``maybe[r]``: rod r might have a used site (the outline bound of :func:`_inside_kernel` over
    each segment's depth range within [zlo, zhi] and the sites' span); False means it has none."""
    n = oz.size
    eps = 1e-7
    for r in numba.prange(dz_rod.size):
        dzr = dz_rod[r]
        lo_z = max(site_z[0] + dzr, zlo)
        hi_z = min(site_z[site_z.size - 1] + dzr, zhi)
        if hi_z < lo_z:
            continue
        x0 = xy_ref[r, 0]
        y0 = xy_ref[r, 1]
        for j in range(-1, n):
            if j == -1:
                za, zb = lo_z, min(hi_z, oz[0])
                ozj, cxj, cyj, rj, sx, sy, sr = oz[0], ocx[0], ocy[0], orad[0], 0.0, 0.0, 0.0
            elif j < n - 1:
                za, zb = max(lo_z, oz[j]), min(hi_z, oz[j + 1])
                w = oz[j + 1] - oz[j]
                ozj, cxj, cyj, rj = oz[j], ocx[j], ocy[j], orad[j]
                sx = (ocx[j + 1] - ocx[j]) / w
                sy = (ocy[j + 1] - ocy[j]) / w
                sr = (orad[j + 1] - orad[j]) / w
            else:
                za, zb = max(lo_z, oz[n - 1]), hi_z
                ozj, cxj, cyj, rj, sx, sy, sr = oz[n - 1], ocx[n - 1], ocy[n - 1], orad[n - 1], 0.0, 0.0, 0.0
            if zb < za:
                continue
            lmax, dmin = _segment_bound(za, zb, x0, y0, t0, t1, z_ref, ozj, cxj, cyj, rj, sx, sy, sr, margin)
            if lmax >= -eps and dmin <= lmax + eps:
                maybe[r] = True
                break


@numba.njit(cache=True, nogil=True, parallel=True)
def _inside_kernel(site_z, dz_rod, xy_ref, t0, t1, z_ref, oz, ocx, ocy, orad, margin, zlo, zhi, inside, keep):
    """``inside[r, k]``: site k of rod r has its axis point ``margin`` inside the outline at its
    depth and lies within [zlo, zhi] (the outline interpolated linearly between slabs and held at
    the ends, as ``np.interp``); ``keep[r]``: some site of rod r is.

    Rod by rod (in parallel), site range by site range of each outline segment. On a segment the
    outline centre, the radius and the rod axis are linear in depth, so ``lim - distance`` is
    concave: when it is clearly positive at the segment's first and last site, every site between
    is inside; when the largest ``lim`` is below the smallest axis-centre distance on the segment,
    none is. Only the remaining segments are evaluated site by site, with the same formula, so the
    result equals a site-by-site evaluation.
    """
    n = oz.size
    ns = site_z.size
    eps = 1e-7
    for r in numba.prange(dz_rod.size):
        dzr = dz_rod[r]
        x0 = xy_ref[r, 0]
        y0 = xy_ref[r, 1]
        k = 0
        # segment -1: zz <= oz[0]; segments 0 .. n-2 between nodes; segment n-1: zz >= oz[n-1]
        for j in range(-1, n):
            if k >= ns:
                break
            k1 = k
            if j == -1:
                while k1 < ns and site_z[k1] + dzr <= oz[0]:
                    k1 += 1
            elif j < n - 1:
                hi = oz[j + 1]
                while k1 < ns and site_z[k1] + dzr < hi:
                    k1 += 1
            else:
                k1 = ns
            if k1 == k:
                continue
            if j == -1 or j == n - 1:
                jj = 0 if j == -1 else n - 1
                ozj = oz[jj]
                cxj = ocx[jj]
                cyj = ocy[jj]
                rj = orad[jj]
                sx = 0.0
                sy = 0.0
                sr = 0.0
            else:
                ozj = oz[j]
                cxj = ocx[j]
                cyj = ocy[j]
                rj = orad[j]
                w = oz[j + 1] - oz[j]
                sx = (ocx[j + 1] - ocx[j]) / w
                sy = (ocy[j + 1] - ocy[j]) / w
                sr = (orad[j + 1] - orad[j]) / w
            # sites k..k1-1; the depth window [zlo, zhi] cuts them further
            a = k
            while a < k1 and site_z[a] + dzr < zlo:
                inside[r, a] = False
                a += 1
            b = k1
            while b > a and site_z[b - 1] + dzr > zhi:
                inside[r, b - 1] = False
                b -= 1
            if b > a:
                za = site_z[a] + dzr
                zb = site_z[b - 1] + dzr
                ia, ha = _inside_at(za, x0, y0, t0, t1, z_ref, ozj, cxj, cyj, rj, sx, sy, sr, margin)
                ib, hb = _inside_at(zb, x0, y0, t0, t1, z_ref, ozj, cxj, cyj, rj, sx, sy, sr, margin)
                fill = -1
                if ia and ib and ha > eps and hb > eps:
                    fill = 1
                else:
                    # axis - centre = P + Q zz on the segment: its smallest length on [za, zb]
                    lmax, dmin = _segment_bound(za, zb, x0, y0, t0, t1, z_ref, ozj, cxj, cyj, rj, sx, sy, sr,
                                                margin)
                    if lmax < -eps or dmin > lmax + eps:
                        fill = 0
                if fill == 1:
                    for kk in range(a, b):
                        inside[r, kk] = True
                    keep[r] = True
                elif fill == 0:
                    for kk in range(a, b):
                        inside[r, kk] = False
                else:
                    any_in = False
                    for kk in range(a, b):
                        v = _inside_at(site_z[kk] + dzr, x0, y0, t0, t1, z_ref, ozj, cxj, cyj, rj, sx, sy, sr,
                                       margin)[0]
                        inside[r, kk] = v
                        any_in |= v
                    if any_in:
                        keep[r] = True
            k = k1


# ---------------------------------------------------------------------- assignment
def _assign_chunk(geom: ColumnGeometry, x, y, z):
    """Flat bin key ``site * n_rods + rod`` per ion, with its validity flags, for one chunk.

    The key is site-major so that a chunk of ions from a thin depth range (ions come in evaporation
    order) touches a short, contiguous range of bins.

    Returns key (int32; meaningful where ``used & in_depth``), site (int32), used (nearest rod is a used rod),
    in_depth (site index in range) and beyond (farther than the cutoff from every rod).
    Arithmetic runs in the input's float type (float32 input stays float32).
    """
    loc = geom.locator
    G = loc.n_grid
    sh = G.bit_length() - 1
    i0, j0, ni, nj = geom.table_origin
    nb = geom.lattice.rods_per_cell
    ns = geom.n_sites
    M, e, c = geom.frac_affine
    dt = np.float32 if np.asarray(x).dtype == np.float32 else np.float64
    x = np.asarray(x, dt)
    y = np.asarray(y, dt)
    z = np.asarray(z, dt)
    a = (M * G).astype(dt)
    ez = (e * G).astype(dt)
    cc = ((c - np.array([i0, j0])) * G).astype(dt)
    tmp = np.empty_like(x)
    idx = []
    for r in range(2):
        F = np.multiply(x, a[r, 0])
        F += np.multiply(y, a[r, 1], out=tmp)
        F += np.multiply(z, ez[r], out=tmp)
        F += cc[r]
        np.floor(F, out=F)
        idx.append(F.astype(np.int32))
    I1, I2 = idx
    ci = I1 >> sh
    cj = I2 >> sh
    I1 &= G - 1
    I1 <<= sh
    I2 &= G - 1
    I1 |= I2
    off = geom.lut_offset[I1]
    fb = np.flatnonzero(off < _FB_LIMIT)
    if fb.size:
        xf = x[fb].astype(np.float64)
        yf = y[fb].astype(np.float64)
        zf = z[fb].astype(np.float64)
        f1 = M[0, 0] * xf + M[0, 1] * yf + e[0] * zf + (c[0] - i0)
        f2 = M[1, 0] * xf + M[1, 1] * yf + e[1] * zf + (c[1] - j0)
        code = loc._exact(f1 - ci[fb], f2 - cj[fb], off[fb] - _FB)
        off[fb] = geom.code_offset[code]
    beyond = off == _EXCL
    np.clip(ci, 2, ni - 3, out=ci)
    np.clip(cj, 2, nj - 3, out=cj)
    ci *= nj * nb
    cj *= nb
    ci += cj
    ci += off
    rod = geom.rod_key[ci]
    used = rod >= 0
    gp, denom = _plane_model(geom.registration.tilt, geom.registration.scale)
    du = geom.plane_spacing_nm
    u0 = (geom.site_z_nm[0] * denom - 0.5 * du) if ns else 0.0
    sz = np.multiply(z, dt(1.0 / du), out=tmp)
    sz += np.multiply(x, dt(gp[0] / du))
    sz += np.multiply(y, dt(gp[1] / du))
    sz -= dt(u0 / du)
    np.floor(sz, out=sz)
    site = sz.astype(np.int32)
    in_depth = site.view(np.uint32) < ns
    key = site * np.int32(geom.n_rods)
    key += rod
    return key, site, used, in_depth, beyond


def assign_rods(x, y, z, geometry: ColumnGeometry):
    """Rod and site of each ion.

    Parameters
    ----------
    x, y, z : (n_ions,) ndarray of float, nm
    geometry : ColumnGeometry

    Returns
    -------
    rod : (n_ions,) ndarray of int32
        Index into ``geometry.rod_cells``; -1 for ions beyond the cutoff or nearest to a rod that is
        not used.
    site : (n_ions,) ndarray of int32
        Site index; -1 outside the site range (and for ``rod == -1``).
    """
    x, y, z = (np.asarray(v) for v in (x, y, z))
    if not (x.shape == y.shape == z.shape and x.ndim == 1):
        raise InputError(f"x, y, z must be 1-D arrays of equal length, got shapes {x.shape}, {y.shape}, {z.shape}")
    rod = np.empty(x.size, np.int32)
    site = np.empty(x.size, np.int32)
    ns = max(geometry.n_sites, 1)
    for s in range(0, x.size, _CHUNK):
        key, st, used, in_depth, _ = _assign_chunk(geometry, x[s:s + _CHUNK], y[s:s + _CHUNK], z[s:s + _CHUNK])
        ok = used & in_depth
        rod[s:s + _CHUNK] = np.where(ok, key % max(geometry.n_rods, 1), -1)
        site[s:s + _CHUNK] = np.where(ok, st, -1)
    return rod, site


class ColumnBinner:
    """Accumulate metal counts per (rod, site) over streamed chunks of ions.

    Parameters
    ----------
    geometry : ColumnGeometry
    n_metals : int
        Number of metal channels K.

    Examples
    --------
    >>> binner = ColumnBinner(geometry, n_metals=2)        # doctest: +SKIP
    >>> for x, y, z, w in chunks:                           # doctest: +SKIP
    ...     binner.add(x, y, z, w)
    >>> columns = binner.result(("Co", "Zn"))               # doctest: +SKIP
    """

    def __init__(self, geometry: ColumnGeometry, n_metals: int):
        if not isinstance(geometry, ColumnGeometry):
            raise InputError(f"geometry must be a ColumnGeometry, got {type(geometry).__name__}")
        if isinstance(n_metals, bool) or not isinstance(n_metals, (int, np.integer)) or n_metals < 1:
            raise InputError(f"n_metals must be a positive integer, got {n_metals!r}")
        self.geometry = geometry
        self.n_metals = int(n_metals)
        self._nbins = geometry.n_rods * geometry.n_sites
        self._counts = np.zeros((self.n_metals, self._nbins))  # (K, n_sites * n_rods), site-major
        self.n_ions = 0
        self.n_binned = 0
        self.n_beyond_cutoff = 0
        self.n_unused_rod = 0
        self.n_outside_depth = 0

    def add(self, x, y, z, weights) -> "ColumnBinner":
        """Add a chunk.

        Parameters
        ----------
        x, y, z : (n,) ndarray of float, nm
        weights : (n, n_metals) ndarray of float, or (n,) ndarray of int
            Expected metal atoms of each metal per ion, or the metal channel index of each ion
            (-1 for none).

        Returns
        -------
        self
        """
        x, y, z = (np.asarray(v) for v in (x, y, z))
        n = x.size
        if not (x.shape == y.shape == z.shape == (n,)):
            raise InputError(f"x, y, z must be 1-D arrays of equal length, got shapes {x.shape}, {y.shape}, {z.shape}")
        w = np.asarray(weights)
        K = self.n_metals
        if w.ndim == 1 and np.issubdtype(w.dtype, np.integer):
            if w.shape != (n,):
                raise InputError(f"weights (channel indices) have shape {w.shape}, expected ({n},)")
            if n and (w.max() >= K or w.min() < -1):
                raise InputError(f"weights channel indices must be in -1..{K - 1}, got {w.min()}..{w.max()}")
            channel = True
        else:
            if w.shape != (n, K):
                raise InputError(f"weights must have shape (n_ions, n_metals) = ({n}, {K}), got {w.shape}")
            channel = False
        nbins = self._nbins
        for b0 in range(0, n, _BLOCK):
            m = min(_BLOCK, n - b0)
            key = np.empty(m, np.int32)
            ok = np.empty(m, bool)
            for s in range(0, m, _CHUNK):
                sl = slice(b0 + s, b0 + min(s + _CHUNK, m))
                k_, _, used, in_depth, beyond = _assign_chunk(self.geometry, x[sl], y[sl], z[sl])
                o_ = used & in_depth
                n_used = int(np.count_nonzero(used))
                n_ok = int(np.count_nonzero(o_))
                n_beyond = int(np.count_nonzero(beyond))
                self.n_beyond_cutoff += n_beyond
                self.n_unused_rod += k_.size - n_used - n_beyond
                self.n_outside_depth += n_used - n_ok
                self.n_binned += n_ok
                key[s:s + k_.size] = k_
                ok[s:s + k_.size] = o_
            if not ok.any():
                continue
            # only the bins this block touches: [lo, hi]; invalid ions go to the dump bin hi + 1
            lo = int(np.min(key, where=ok, initial=nbins))
            hi = int(np.max(key, where=ok, initial=-1))
            key -= lo
            span = hi - lo + 1
            np.copyto(key, span, where=~ok)
            wb = w[b0:b0 + m]
            if channel:
                k2 = key * np.int32(K) if (span + 1) * K < 2 ** 31 else key.astype(np.int64) * K
                k2 += wb
                np.copyto(k2, span * K, where=~ok | (wb < 0))
                cnt = np.bincount(k2, minlength=span * K + 1)[: span * K]
                self._counts[:, lo:hi + 1] += cnt.reshape(span, K).T
            else:
                for k in range(K):
                    self._counts[k, lo:hi + 1] += np.bincount(key, wb[:, k], minlength=span + 1)[:span]
        self.n_ions += n
        return self

    @property
    def counts(self) -> np.ndarray:
        """(n_rods, n_sites, n_metals) counts accumulated so far."""
        g = self.geometry
        return np.ascontiguousarray(self._counts.reshape(self.n_metals, g.n_sites, g.n_rods).transpose(2, 1, 0))

    def stats(self) -> dict:
        """Ion tallies: given, binned, beyond the cutoff, nearest to an unused rod, outside the depth range."""
        return {"n_ions": int(self.n_ions), "n_binned": int(self.n_binned),
                "n_beyond_cutoff": int(self.n_beyond_cutoff), "n_unused_rod": int(self.n_unused_rod),
                "n_outside_depth": int(self.n_outside_depth)}

    def result(self, metals) -> RodColumns:
        """The accumulated counts as :class:`~probeseq.data.RodColumns`."""
        metals = tuple(str(m) for m in metals)
        if len(metals) != self.n_metals:
            raise InputError(f"{len(metals)} metal names given for {self.n_metals} channels")
        return columns_from_counts(self.geometry, self.counts, metals, self.stats())


def compact_counts(counts: np.ndarray) -> np.ndarray:
    """The counts as float32 when every value is a whole number in [0, 2**24) (exact in float32;
    the case when every ion is given one metal), else unchanged. Halves the largest array of a
    big run; one compiled pass, and the transient extra memory is the float32 copy."""
    c = np.asarray(counts)
    if c.dtype != np.float64 or not c.size or not c.flags.c_contiguous:
        return c
    out = np.empty(c.shape, np.float32)
    runtime.ensure()  # a fork-safe threading layer before the first parallel kernel
    return out if _to_float32_if_whole(c.reshape(-1), out.reshape(-1)) else c


@numba.njit(cache=True, nogil=True, parallel=True)
def _to_float32_if_whole(src, dst):
    n = src.size
    n_blocks = 64
    bad = np.zeros(n_blocks, dtype=np.bool_)
    step = (n + n_blocks - 1) // n_blocks
    for b in numba.prange(n_blocks):
        for i in range(b * step, min(n, (b + 1) * step)):
            v = src[i]
            if not (v >= 0.0 and v < 16777216.0 and v == math.floor(v)):
                bad[b] = True
                break
            dst[i] = v
    return not bad.any()


def columns_from_counts(geometry: ColumnGeometry, counts, metals, ion_stats: dict,
                        extra_params: dict | None = None) -> RodColumns:
    """Wrap a finished (n_rods, n_sites, n_metals) count array and its geometry as RodColumns.

    Parameters
    ----------
    geometry : ColumnGeometry
    counts : (n_rods, n_sites, n_metals) ndarray of float64
        Used as is (not copied).
    metals : sequence of str
    ion_stats : dict
        Ion tallies recorded in ``params["ions"]`` (see :meth:`ColumnBinner.stats`).
    extra_params : dict, optional
        Further JSON-able entries of ``params``, after "registration", "columns" and "ions" (the
        params of the returned, frozen object are read-only).
    """
    g = geometry
    metals = tuple(str(m) for m in metals)
    if counts.shape != (g.n_rods, g.n_sites, len(metals)):
        raise InputError(f"counts have shape {counts.shape}, expected {(g.n_rods, g.n_sites, len(metals))}")
    counts = compact_counts(counts)
    reg = g.registration
    params = {"registration": reg.to_dict(), "columns": g.to_dict(), "ions": dict(ion_stats), **(extra_params or {})}
    depth = _rod_site_z(g.site_z_nm[:1], g.rod_xy_nm, reg.tilt, reg.z_ref_nm, float(reg.scale))
    offset = (depth[:, 0] - g.site_z_nm[0]) if g.n_sites else np.zeros(g.n_rods)
    return RodColumns(counts=counts, mask=g.mask, metals=metals, rod_xy_nm=g.rod_xy_nm.copy(),
                      tilt=reg.tilt.copy(), z_ref_nm=reg.z_ref_nm, site_z_nm=g.site_z_nm.copy(),
                      pitch_nm=g.pitch_nm, neighbours=rod_neighbours(g), resolvable=bool(reg.resolvable),
                      crosstalk=float(reg.crosstalk) if math.isfinite(reg.crosstalk) else 1.0,
                      params=params, site_z_offset_nm=offset)


def rod_neighbours(geometry: ColumnGeometry) -> np.ndarray:
    """(n_pairs, 2) index pairs i < j of used rods at the nearest rod distance of the packing."""
    from scipy.spatial import cKDTree

    lat = geometry.lattice
    frac = geometry.rod_cells[:, :2] + lat.rods_frac[geometry.rod_cells[:, 2]]
    q = frac @ lat.cell_matrix.T
    d = lat.nearest_rod_distance_nm
    pairs = cKDTree(q).query_pairs(d * (1 + 1e-3), output_type="ndarray")
    if pairs.size == 0:
        return np.zeros((0, 2), np.int64)
    pairs = np.sort(pairs, axis=1)
    return pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))].astype(np.int64)


def build_columns(x, y, z, weights, metals, lattice: Lattice, registration: Registration | None = None, *,
                  rotation_deg=None, scale=None, offset_nm=None, tilt=None, z_ref_nm: float = 0.0,
                  cutoff_frac: float = DEFAULT_CUTOFF_FRAC, edge_margin_nm: float | None = None,
                  site_phase_nm: float | None = None, random_state=None) -> RodColumns:
    """Register the lattice (unless given) and cut the metal ions into per-rod depth profiles.

    Parameters
    ----------
    x, y, z : (n_ions,) ndarray of float, nm
        Metal-ion positions (non-metal ions excluded).
    weights : (n_ions, n_metals) ndarray of float, or (n_ions,) ndarray of int
        Expected metal atoms of each metal per ion (rows sum to about 1), or channel indices.
    metals : sequence of str
        Metal symbols in channel order.
    lattice : Lattice
    registration : Registration, optional
        A registration to use; fitted with the overrides below when None.
    rotation_deg, scale, offset_nm, tilt, z_ref_nm
        Passed to :func:`~probeseq.registration.register_lattice`.
    cutoff_frac, edge_margin_nm, site_phase_nm
        Passed to :func:`plan_columns`.
    random_state : int or numpy.random.Generator, optional

    Returns
    -------
    RodColumns
    """
    check_seed(random_state)
    check_scale(scale)
    metals = tuple(str(m) for m in metals)
    if not metals:
        raise InputError("metals: at least one metal name is needed")
    x, y, z = _check_xyz(x, y, z)
    w = np.asarray(weights)
    if w.ndim == 2 and w.shape[1] != len(metals):
        raise InputError(f"weights have {w.shape[1]} columns for {len(metals)} metals {list(metals)}")
    if w.ndim == 2 and not np.isfinite(w).all():
        raise InputError("weights contain NaN or infinite values")
    if w.shape[0] != x.size:
        raise InputError(f"weights have {w.shape[0]} rows for {x.size} metal ions")
    rng = np.random.default_rng(random_state)
    if registration is None:
        registration = register_lattice(x, y, z, lattice, rotation_deg=rotation_deg, scale=scale,
                                        offset_nm=offset_nm, tilt=tilt, random_state=rng, z_ref_nm=z_ref_nm)
    elif registration.lattice is not lattice and registration.lattice.to_dict() != lattice.to_dict():
        raise InputError("registration was fitted for a different lattice than the one given")
    geom = plan_columns(x, y, z, registration, cutoff_frac=cutoff_frac, edge_margin_nm=edge_margin_nm,
                        site_phase_nm=site_phase_nm, random_state=rng)
    binner = ColumnBinner(geom, len(metals)).add(x, y, z, w)
    return binner.result(metals)
