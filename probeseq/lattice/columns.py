"""Rod columns: cut the registered rod lattice into per-rod depth profiles of metal counts.

Given a :class:`~probeseq.lattice.registration.Registration` (the lattice placed in the reconstruction
frame), this module

1. assigns each metal ion to its nearest rod axis (exactly, through a lookup table over the unit
   cell, see :class:`~probeseq.lattice.locator.RodLocator`); ions farther than ``cutoff_frac`` times the
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
   memory. The analysis itself counts with the compiled pass of :mod:`probeseq.lattice.counting`, which
   does the same assignment in the same arithmetic (and is checked against this module); the
   numpy path here is its reference and serves weighted (fractional) channels.

The mask and the specimen outline are computed by compiled loops (:func:`_inside_kernel`,
:func:`_outline_kernel`) with numpy's definitions (``np.interp``, linear quantiles), so they equal
the vectorised formulas; slabs without enough ions (a sample read as depth blocks) are skipped and
the outline is interpolated across them.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .. import runtime
from ..exceptions import InputError
from ..utils.validate import check_scale, check_seed
from .geometry import (
    _EXCL,
    _FB,
    _FB_LIMIT,
    DEFAULT_CUTOFF_FRAC,
    ColumnGeometry,
    _plane_model,
    _rod_site_z,
    plan_columns,
)
from .model import Lattice
from .registration import Registration, _check_xyz, register_lattice
from .rodcolumns import RodColumns

__all__ = ['ColumnBinner', 'assign_rods', 'rod_neighbours', 'build_columns', 'columns_from_counts']

_CHUNK = 1 << 18  # ions per assignment pass (measured fastest of 2^14..2^20)


_BLOCK = 1 << 22  # ions per bincount (one pass over the touched bins per block)


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
    x, y, z = geometry.place(x, y, z)  # file positions through the reconstruction correction
    rod = np.empty(x.size, np.int32)
    site = np.empty(x.size, np.int32)
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
        x, y, z = self.geometry.place(x, y, z)  # file positions through the reconstruction correction
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
        """The accumulated counts as :class:`~probeseq.lattice.rodcolumns.RodColumns`."""
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
                        extra_params: dict | None = None, evidence=None) -> RodColumns:
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
    evidence : (n_rods, n_sites, n_metals) ndarray of float, optional
        Soft evidence of the sites (:attr:`RodColumns.evidence`), used as is.
    """
    g = geometry
    metals = tuple(str(m) for m in metals)
    if counts.shape != (g.n_rods, g.n_sites, len(metals)):
        raise InputError(f"counts have shape {counts.shape}, expected {(g.n_rods, g.n_sites, len(metals))}")
    counts = compact_counts(counts)
    reg = g.registration
    params = {"registration": reg.to_dict(), "columns": g.to_dict(), "ions": dict(ion_stats), **(extra_params or {})}
    if g.correction is not None:
        params["reconstruction"] = g.correction.to_dict()
    depth = _rod_site_z(g.site_z_nm[:1], g.rod_xy_nm, reg.tilt, reg.z_ref_nm, float(reg.scale))
    offset = (depth[:, 0] - g.site_z_nm[0]) if g.n_sites else np.zeros(g.n_rods)
    return RodColumns(counts=counts, mask=g.mask, metals=metals, rod_xy_nm=g.rod_xy_nm.copy(),
                      tilt=reg.tilt.copy(), z_ref_nm=reg.z_ref_nm, site_z_nm=g.site_z_nm.copy(),
                      pitch_nm=g.pitch_nm, neighbours=rod_neighbours(g), resolvable=bool(reg.resolvable),
                      misassigned_fraction=float(reg.misassigned_fraction) if math.isfinite(reg.misassigned_fraction) else 1.0,
                      params=params, site_z_offset_nm=offset, evidence=evidence)


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
        Passed to :func:`~probeseq.lattice.registration.register_lattice`.
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
