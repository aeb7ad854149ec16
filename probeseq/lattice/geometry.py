"""The geometry of the rod columns: which rods lie inside the specimen, their sites and
the kernel arrays of the count pass.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple, Optional

import numba
import numpy as np

from .. import runtime
from ..exceptions import InputError
from .correction import ReconstructionCorrection
from .locator import RodLocator, _cached_locator
from .model import Lattice
from .outline import OUTLINE_QUANTILE, _outline
from .registration import Registration, _check_xyz
from .rodcolumns import RodColumns

__all__ = ['ColumnGeometry', 'KernelGeometry', 'plan_columns', 'rod_site_depths', 'DEFAULT_CUTOFF_FRAC', 'DEFAULT_EDGE_MARGIN_FRAC', 'OUTLINE_QUANTILE']

#: ions farther than this fraction of the nearest rod distance from every rod axis are left out
DEFAULT_CUTOFF_FRAC = 0.75


#: default distance kept between a used rod axis and the specimen outline, as a fraction of the
#: nearest rod distance (checked on simulated needles against the true outline)
DEFAULT_EDGE_MARGIN_FRAC = 0.25




_PAD = 5  # empty cells around the rods in the dense rod table


_EXCL = 0  # lookup offset of an ion beyond the cutoff (lands in the all -1 half of rod_key)


_FB = -2_100_000_000  # lookup offsets below _FB_LIMIT are fallback rows: _FB + row


_FB_LIMIT = -1_000_000_000


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
    corr_on : bool
        Whether positions go through the reconstruction correction first (then the ``corr_``
        fields are its tables, :meth:`ReconstructionCorrection._tables`, read by
        :func:`probeseq.lattice.correction.correct_point`).
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
    corr_on: np.bool_ = np.bool_(False)
    corr_z0: np.float64 = np.float64(0.0)
    corr_inv_h: np.float64 = np.float64(1.0)
    corr_depth: np.ndarray = np.zeros(2)
    corr_mag: np.ndarray = np.ones(2)
    corr_shift: np.ndarray = np.zeros((2, 2))
    corr_axis: np.ndarray = np.zeros((2, 2))
    corr_kappa: np.float64 = np.float64(0.0)


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
    correction: Optional[ReconstructionCorrection] = field(default=None, repr=False)

    def place(self, x, y, z):
        """Positions in the frame of this geometry: the file's positions through its
        reconstruction correction (unchanged when there is none), nm."""
        if self.correction is None or self.correction.is_identity:
            return x, y, z
        return self.correction.apply(x, y, z)

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
            **self._correction_fields(),
        )

    def _correction_fields(self) -> dict:
        c = self.correction
        if c is None or c.is_identity:
            return {}
        z0, inv_h, depth, mag, shift, axis, kappa = c._tables()
        return {"corr_on": np.bool_(True), "corr_z0": np.float64(z0), "corr_inv_h": np.float64(inv_h),
                "corr_depth": np.ascontiguousarray(depth, np.float64), "corr_mag": np.ascontiguousarray(mag, np.float64),
                "corr_shift": np.ascontiguousarray(shift, np.float64), "corr_axis": np.ascontiguousarray(axis, np.float64),
                "corr_kappa": np.float64(kappa)}

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
                 n_grid: int = 256, correction: ReconstructionCorrection | None = None) -> ColumnGeometry:
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
    correction : ReconstructionCorrection, optional
        The reconstruction correction the positions ``x, y, z`` have been through (and that
        :meth:`ColumnGeometry.place` applies to file positions); kept on the geometry.

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
        frac_affine=reg.frac_map(), correction=correction)


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
    """Move the rows ``a[keep]`` to the front of ``a`` in order; returns their number.

    Element by element: a row assignment ``a[n, :] = a[r, :]`` brings numba's broadcasting
    checks and their error-message formatting, 3.7 s of compiling."""
    n = 0
    for r in range(a.shape[0]):
        if keep[r]:
            if n != r:
                for c in range(a.shape[1]):
                    a[n, c] = a[r, c]
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
