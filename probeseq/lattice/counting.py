"""One fused pass from ion positions and mass-to-charge values to the count array.

Once the ranges and the rod lattice are fixed (both fitted on a bounded sample), every block of
ions goes through compiled loops (:class:`CountPass`) that, without per-ion temporaries:

1. **Validity.** Count the rows with a NaN or infinite value or a non-positive mass-to-charge
   (they would have been dropped on reading) and take the extents of the valid rows, in one
   vectorised pass over the bit patterns.
2. **Range.** Look every mass-to-charge value up in the range table on 1/1024-Da cells (the table
   of :func:`probeseq.ranging.channels.assign_channels`; cells holding a range edge are resolved by binary
   search) and list the rows in ranges holding metal.
3. **Metal draw.** Give each listed ion one metal identity drawn with its range's thinned metal
   weights (see :func:`probeseq.ranging.channels.draw_metal_ions`). The uniform number of the draw is a
   counter-based hash (splitmix64) of the seed and the ion's index in the run (its row), so the
   draws do not depend on how the ions are cut into blocks, on the order of the blocks, or on the
   number of threads (:func:`ion_uniforms` gives the same numbers to the numpy reference).
4. **Rod and site.** Place metal ions on their nearest rod through the lookup table of
   :class:`probeseq.lattice.locator.RodLocator` (exactly: cells of the table holding a Voronoi edge
   are resolved against their candidate rods) and on their site plane from the plane coordinate
   ``u = z + g . (x, y)`` (see :mod:`probeseq.lattice`). The arithmetic is that of
   :func:`probeseq.lattice.columns.assign_rods`, in the input's float type, so both give the same bins.
   With a shared evidence table (:func:`probeseq.lattice.evidence.shared_ratios`, rods so close
   that a tenth of their own ions stray) each placed ion also makes an evidence-only entry at the
   same site of its second nearest rod.
5. **Count.** Sort the bins of the block by block of rods and add ``counts[rod, site, metal] += 1``
   block of rods by block of rods (a block of ions is a thin depth slice, so each block of rods
   touches a few kB), the rod blocks shared out between the threads so none write the same bins.

The count array is float32 in its final layout (rods, sites, metals), so nothing is copied,
converted or transposed afterwards; it is made resident in one call (:func:`zeroed_array`) while
the first blocks are being placed. Whole counts are exact in float32 below 2**24; should one bin
reach that (millions of ions in one rod site: only a lattice far off the data's scale), the pass
reports it (:attr:`CountPass.saturated`) and :func:`probeseq.pipeline.stages._run_pass` counts again in
float64.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numba
import numpy as np

from ..exceptions import InputError
from ..ranging.channels import LookupTable
from ..runtime import default_threads
from ..utils.draws import _GOLDEN, _TO_UNIT, _mix64, draw_key
from .correction import correct_point
from .locator import nearest_candidate
from .evidence import N_LEVELS as _N_LEVELS
from .passcheck import _check_rows, _merge_checks, zeroed_array  # noqa: F401 (zeroed_array: public here)

if TYPE_CHECKING:
    from .geometry import KernelGeometry

__all__ = ['CountPlan', 'CountPass', 'make_count_plan', 'new_tally', 'tally_dict', 'TALLY_FIELDS']

#: indices of the integer tally array filled by :class:`CountPass`
TALLY_FIELDS = ("n_rows", "n_valid", "n_nonfinite", "n_nonpositive", "n_metal", "n_binned", "n_beyond_cutoff",
                "n_unused_rod", "n_outside_depth", "first_bad_row", "n_fallback")


_T = {k: i for i, k in enumerate(TALLY_FIELDS)}


# codes of the packed range table (:meth:`probeseq.ranging.channels.LookupTable.candidate_table`)
_UNRANGED = LookupTable.UNRANGED


_EDGE = LookupTable.EDGE


_CODE_BASE = LookupTable.CODE_BASE


_CELLS_PER_DA = LookupTable.CELLS_PER_DA


def new_tally() -> tuple:
    """Fresh (tally, extents) arrays of the pass: int64 counters and float64 min/max."""
    tally = np.zeros(len(TALLY_FIELDS), np.int64)
    tally[_T["first_bad_row"]] = -1
    ext = np.empty(8, np.float64)
    ext[0::2] = np.inf
    ext[1::2] = -np.inf
    return tally, ext


@dataclass(frozen=True, eq=False)
class CountPlan:
    """Everything the fused pass needs, as flat arrays (built by :func:`make_count_plan`).

    Attributes
    ----------
    n_rods, n_sites, n_metals : int
        Shape of the count array.
    key : numpy.uint64
        Key of the metal draws (:func:`draw_key` of the seed).
    mass_lut : (n_cells,) ndarray of int32
        Per 1/1024-Da cell ``(range + LookupTable.CODE_BASE) << 1 | candidate``, range being the
        range index, ``LookupTable.UNRANGED`` or ``LookupTable.EDGE`` (a cell holding a range edge);
        candidate 1 for a range holding metal or an edge cell
        (:meth:`probeseq.ranging.channels.LookupTable.candidate_table`).
    lows, highs : (n_ranges,) ndarray of float64, Da
    cum : (n_ranges, n_metals) ndarray of float64
        Cumulative thinned metal weights of each range (the draw picks the first metal whose
        cumulative weight exceeds the uniform number).
    has_metal : (n_ranges,) ndarray of bool
    geometry : KernelGeometry
        The rod and site lookup of the column geometry, by name
        (:meth:`probeseq.lattice.geometry.ColumnGeometry.kernel_geometry`).
    evidence : EvidenceTable or None
        With it, the pass also fills the soft evidence array (:mod:`probeseq.lattice.evidence`):
        every ion of a metal-bearing range adds its increments there, drawn or not.
    """

    n_rods: int
    n_sites: int
    n_metals: int
    key: np.uint64
    mass_lut: np.ndarray
    lows: np.ndarray
    highs: np.ndarray
    cum: np.ndarray
    has_metal: np.ndarray
    geometry: KernelGeometry
    evidence: object = None

    @property
    def ev_on(self) -> bool:
        return self.evidence is not None

    @property
    def ev_increments(self) -> np.ndarray:
        """(n_codes, K) evidence increments (an empty table without evidence)."""
        return self.evidence.increments if self.evidence is not None else np.zeros((0, self.n_metals))

    @property
    def ev_level(self) -> np.ndarray:
        """Radial level of every lookup-grid cell (an empty table without evidence)."""
        return self.evidence.cell_level if self.evidence is not None else np.zeros(0, np.int32)

    @property
    def ev_second(self) -> tuple:
        """(second_level, first_code, second_code) of an evidence table shared between an ion's two
        nearest rods (:func:`probeseq.lattice.evidence.shared_ratios`); empty tables otherwise."""
        ev = self.evidence
        if ev is None or not ev.shared:
            e = np.zeros(0, np.int32)
            return e, e, e
        return ev.second_level, ev.first_code, ev.second_code

    @property
    def entries_per_ion(self) -> int:
        """Sorted entries one selected ion may make (2 when its evidence is shared)."""
        return 2 if self.evidence is not None and self.evidence.shared else 1

    @property
    def ev_bins(self) -> tuple:
        """(first bin (n_ranges + 1,) int64, bins per Da (n_ranges,) float64) of the evidence's
        mass bins (one bin per range without evidence)."""
        if self.evidence is None:
            n = self.lows.size
            return np.arange(n + 1, dtype=np.int64), np.zeros(n)
        return self.evidence.bin_start, self.evidence.bin_scale

    @property
    def metal_range(self) -> np.ndarray:
        """(n_ranges + 1,) uint8: 1 where range r - 1 holds metal (slot 0 for unranged)."""
        return self._metal_range

    def __post_init__(self):
        object.__setattr__(self, "_metal_range",
                           np.concatenate([[0], np.asarray(self.has_metal, bool)]).astype(np.int64))

    def new_counts(self, dtype=np.float32) -> np.ndarray:
        """A zeroed (n_rods, n_sites, n_metals) count array (float32 by default), resident up
        front (see :func:`zeroed_array`)."""
        return zeroed_array((self.n_rods, self.n_sites, self.n_metals), dtype)


def make_count_plan(ranges, metals, thin, geometry, seed, evidence=None) -> CountPlan:
    """Flatten ranges, thinning factors and the column geometry into a :class:`CountPlan`.

    Parameters
    ----------
    ranges : RangeSet
    metals : sequence of str
    thin : (n_metals,) array of float
        Per-metal thinning factors (the pipeline passes ones: each metal's visibility is modelled instead).
    geometry : ColumnGeometry
    seed : int
        Seed of the metal draws.
    evidence : EvidenceTable, optional
        Also fill the soft evidence array (:func:`probeseq.lattice.evidence.evidence_table`).
    """
    from ..ranging.channels import _lookup_for, _weights_for
    from .geometry import ColumnGeometry

    if not isinstance(geometry, ColumnGeometry):
        raise InputError(f"geometry must be a ColumnGeometry, got {type(geometry).__name__}")
    metals = tuple(metals)
    w, _other, _ch = _weights_for(ranges, metals)
    thin = np.asarray(thin, np.float64).reshape(-1)
    if thin.shape != (len(metals),) or not np.isfinite(thin).all() or (thin < 0).any():
        raise InputError(f"thin must be {len(metals)} finite factors >= 0, got {thin!r}")
    lk = _lookup_for(ranges, None)
    wr = np.asarray(w[:-1], np.float64) * thin[None, :]  # (n_ranges, K), the unranged row dropped
    cum = np.ascontiguousarray(np.cumsum(np.minimum(wr, 1.0), axis=1)) if wr.size else np.zeros((0, len(metals)))
    has_metal = (wr > 0).any(1) if wr.size else np.zeros(0, bool)
    # packed range table: (range + CODE_BASE) << 1 | candidate, candidate = a metal range or an edge cell
    packed = lk.candidate_table(has_metal)
    return CountPlan(n_rods=geometry.n_rods, n_sites=geometry.n_sites, n_metals=len(metals), key=draw_key(seed),
                     mass_lut=packed, lows=np.asarray(lk.lows, np.float64),
                     highs=np.asarray(lk.highs, np.float64), cum=cum, has_metal=np.ascontiguousarray(has_metal),
                     geometry=geometry.kernel_geometry(), evidence=evidence)


#: rod blocks of the grouped increments (a block's bins of one depth slice stay in cache)
_ROD_BLOCKS = 256


#: sorted bins kept while the count array is still being made (see :class:`CountPass`)
PENDING_BYTES = 256 << 20


_FB = -2_100_000_000


_FB_LIMIT = -1_000_000_000


_EXCL = 0


@numba.njit(cache=True, nogil=True)
def _select_kernel(m, n, row0, key, mass_lut, lows, highs, cum, metal_range, sel, rows, metals, rngs, keep_all,
                   bin_start, bin_scale):
    """Rows of ``m[:n]`` in ranges holding metal, each with its drawn metal (and its mass bin of the
    soft evidence in ``rngs``: ``bin_start[r] + floor((m - lows[r]) * bin_scale[r])`` in float64,
    clipped to the range's bins; the range itself with one bin per range); returns their number.
    With ``keep_all`` a row whose draw gives no metal is kept with metal ``K`` (it adds soft
    evidence, not a count).

    Loop 1 (every row, mass-to-charge only): one table load gives the range (+ _CODE_BASE) and whether
    the row is a candidate (a range holding metal, or a cell holding a range edge, resolved in loop 2);
    candidates are listed as (row << rbits) | (range + _CODE_BASE), written always and kept by advancing the
    count: no branch. A NaN or non-positive m lands in the last cell, no range. Loop 2: edge cells
    by binary search, then the metal draw; the selected rows (local, increasing) go to ``rows`` and
    their metals to ``metals``. Positions are not read (invalid positions are dropped when placed).
    """
    K = cum.shape[1]
    n_ranges = lows.size
    rbits = 1
    while (np.int64(1) << rbits) < n_ranges + _CODE_BASE:
        rbits += 1
    top = mass_lut.size - 1
    one_k = m.dtype.type(_CELLS_PER_DA)
    nsel = 0
    for i in range(n):
        f = m[i] * one_k
        cell = np.int64(f) if (f < top and f >= 0) else top
        v = np.int64(mass_lut[cell])
        sel[nsel] = np.int32((i << rbits) | (v >> 1))
        nsel += v & 1
    rmask = (np.int64(1) << rbits) - 1
    nk = 0
    for q in range(nsel):
        iv = np.int64(sel[q])
        i = iv >> rbits
        r = (iv & rmask) - _CODE_BASE
        if r == _EDGE:  # a cell holding a range edge: binary search (first low above m)
            mv = np.float64(m[i])
            lo = 0
            hi = n_ranges
            while lo < hi:
                mid = (lo + hi) >> 1
                if lows[mid] <= mv:
                    lo = mid + 1
                else:
                    hi = mid
            k = lo - 1
            r = k if (k >= 0 and mv < highs[k]) else _UNRANGED
            if r < 0 or metal_range[r + 1] == 0:
                continue
        metal = 0
        if cum[r, 0] < 1.0:
            hh = _mix64(key + (np.uint64(row0 + i) + np.uint64(1)) * _GOLDEN)
            u = np.float64(np.int64(hh >> np.uint64(11))) * _TO_UNIT
            while metal < K and u >= cum[r, metal]:
                metal += 1
            if metal == K and not keep_all:
                continue
        rows[nk] = np.int32(i)
        metals[nk] = np.int8(metal)
        b = bin_start[r]
        nb = bin_start[r + 1] - b
        if nb > 1:
            t = (np.float64(m[i]) - lows[r]) * bin_scale[r]
            if t > 0.0:  # truncation is floor here; a NaN stays in the first bin
                b += min(np.int64(t), nb - 1)
        rngs[nk] = np.int32(b)
        nk += 1
    return nk


@numba.njit(cache=True, nogil=True)
def _sort_by_block(nk, keys, codes, bucket, bstart, order, ocodes, ev_on):
    """Counting sort of the first ``nk`` bins (and evidence codes) by block of rods: ``bstart[b] ..
    bstart[b + 1]`` in ``order`` are block b's. A chunk's ions come from a thin depth slice, so
    within one block of rods the increments of :func:`_add_kernel` touch a few kB rather than the
    whole count array."""
    for b in range(1, bstart.size):
        bstart[b] += bstart[b - 1]
    for q in range(nk):
        b = bucket[q]
        order[bstart[b]] = keys[q]
        if ev_on:
            ocodes[bstart[b]] = codes[q]
        bstart[b] += 1
    for b in range(bstart.size - 1, 0, -1):
        bstart[b] = bstart[b - 1]
    bstart[0] = 0


@numba.njit(cache=True, nogil=True, inline="always")
def _push(nk, key, code, block, keys, codes, bucket, bstart, ev_on):
    """Write entry ``nk`` (its bin, its evidence code when ``ev_on``) and count it in its rod block."""
    keys[nk] = np.int32(key)
    if ev_on:
        codes[nk] = np.int32(code)
    bucket[nk] = block
    bstart[block + 1] += 1


@numba.njit(cache=True, nogil=True, inline="always")
def _levels_and_second_rod(share, gcell, code, base, ev_level, ev_level2, ev_code1, ev_code2, rod_key, code_offset):
    """The radial level at the ion's nearest rod, and with a shared table the second nearest rod
    (-1: none) and the level there. ``code`` is the exact nearest code where the cell lies on a
    Voronoi edge (else -1); where it is the cell centre's second, the two are exchanged. ``base``
    is the rod table's index of the ion's cell (``ci * nj * nb + cj * nb``)."""
    lv1 = np.int64(ev_level[gcell]) if ev_level.size > 0 else np.int64(0)
    if not share:
        return lv1, np.int64(-1), np.int64(0)
    c2 = np.int64(ev_code2[gcell])
    lv2 = np.int64(ev_level2[gcell])
    if code >= 0 and code == c2:
        c2 = np.int64(ev_code1[gcell])
        lv1, lv2 = lv2, lv1
    rod2 = np.int64(rod_key[base + code_offset[c2]]) if lv2 > 0 else np.int64(-1)
    return lv1, rod2, lv2


@numba.njit(cache=True, nogil=True)
def _locate_kernel(x, y, z, rows, metals, lo, hi, factor, K, geo, tally, keys, order, bucket, bstart, rshift,
                   rngs, ev_level, codes, ocodes, ev_level2, ev_code1, ev_code2):
    """Place the selected ions ``rows[lo:hi]`` (rows of x, y, z) with their drawn ``metals`` on
    their rod and site (arithmetic as columns._assign_chunk), then sort their bins by block of rods;
    with a shared table (``ev_level2``) also an evidence entry at the second nearest rod
    (:func:`_levels_and_second_rod`). ``geo``: the column geometry's KernelGeometry, read by name.
    """
    fdt = x.dtype.type
    fac = fdt(factor)
    scale = factor != 1.0
    a = geo.cell_xy
    ez = geo.cell_z
    cc = geo.cell_origin
    site_c = geo.site_coef
    M = geo.frac_xy
    e = geo.frac_z
    cfb = geo.frac_origin
    G = geo.n_grid
    sh = geo.grid_bits
    lut_offset = geo.lut_offset
    code_offset = geo.code_offset
    cand = geo.candidates
    code_frac = geo.code_frac
    metric = geo.metric
    cut2 = geo.cutoff2_nm2
    ni = geo.n_cells_i
    nj = geo.n_cells_j
    nb = geo.rods_per_cell
    rod_key = geo.rod_key
    ns = geo.n_sites
    a00 = fdt(a[0, 0]); a01 = fdt(a[0, 1]); a10 = fdt(a[1, 0]); a11 = fdt(a[1, 1])
    ez0 = fdt(ez[0]); ez1 = fdt(ez[1]); cc0 = fdt(cc[0]); cc1 = fdt(cc[1])
    s0 = fdt(site_c[0]); s1 = fdt(site_c[1]); s2 = fdt(site_c[2]); s3 = fdt(site_c[3])
    gm1 = G - 1
    nmetal = 0
    nbeyond = 0
    nunused = 0
    noutside = 0
    nfb = 0
    nk = 0
    ncount = 0
    ev_on = ev_level.size > 0
    share = ev_level2.size > 0
    for q in range(lo, hi):
        i = np.int64(rows[q])
        metal = np.int64(metals[q])
        counted = metal < K  # else an ion that adds soft evidence only
        xi = x[i]
        yi = y[i]
        zi = z[i]
        if scale:
            xi = xi * fac
            yi = yi * fac
            zi = zi * fac
        if not (np.isfinite(xi) and np.isfinite(yi) and np.isfinite(zi)):
            continue  # an invalid row (tallied by the validity check)
        if geo.corr_on:  # the reconstruction correction, as ReconstructionCorrection.apply does it
            xc, yc, zc = correct_point(np.float64(xi), np.float64(yi), np.float64(zi), geo.corr_z0, geo.corr_inv_h,
                                       geo.corr_depth, geo.corr_mag, geo.corr_shift, geo.corr_axis, geo.corr_kappa)
            xi, yi, zi = fdt(xc), fdt(yc), fdt(zc)
        nmetal += counted
        F1 = xi * a00
        F1 += yi * a01
        F1 += zi * ez0
        F1 += cc0
        F2 = xi * a10
        F2 += yi * a11
        F2 += zi * ez1
        F2 += cc1
        I1 = np.int32(np.floor(F1))
        I2 = np.int32(np.floor(F2))
        ci = I1 >> sh
        cj = I2 >> sh
        gcell = ((I1 & gm1) << sh) | (I2 & gm1)
        off = lut_offset[gcell]
        code = np.int64(-1)
        if off < _FB_LIMIT:
            nfb += counted
            xf = np.float64(xi)
            yf = np.float64(yi)
            zf = np.float64(zi)
            f1 = M[0, 0] * xf + M[0, 1] * yf + e[0] * zf + cfb[0]
            f2 = M[1, 0] * xf + M[1, 1] * yf + e[1] * zf + cfb[1]
            code = nearest_candidate(cand, off - _FB, f1 - ci, f2 - cj, code_frac, metric, cut2)
            off = code_offset[code] if code >= 0 else code_offset[code_offset.size - 1]
        if off == _EXCL:
            nbeyond += counted
            continue
        ci = min(max(ci, 2), ni - 3)
        cj = min(max(cj, 2), nj - 3)
        rod = rod_key[ci * (nj * nb) + cj * nb + off]
        if rod < 0:
            nunused += counted
            continue
        sz = zi * s0
        sz += xi * s1
        sz += yi * s2
        sz -= s3
        site = np.int64(np.floor(sz))
        if site < 0 or site >= ns:
            noutside += counted
            continue
        lv1, rod2, lv2 = _levels_and_second_rod(share, gcell, code, ci * (nj * nb) + cj * nb, ev_level, ev_level2,
                                                ev_code1, ev_code2, rod_key, code_offset)
        row = np.int64(rngs[q]) * _N_LEVELS
        _push(nk, (np.int64(rod) * ns + site) * K + min(metal, K - 1), ((row + lv1) << 1) | counted,
              np.int64(rod) >> rshift, keys, codes, bucket, bstart, ev_on)
        ncount += counted
        nk += 1
        if rod2 >= 0:  # evidence only, at the second nearest rod's same site
            _push(nk, (rod2 * ns + site) * K, (row + lv2) << 1, rod2 >> rshift, keys, codes, bucket, bstart, True)
            nk += 1
    _sort_by_block(nk, keys, codes, bucket, bstart, order, ocodes, ev_on)
    tally[4] += nmetal
    tally[5] += ncount
    tally[6] += nbeyond
    tally[7] += nunused
    tally[8] += noutside
    tally[10] += nfb
    return nk


#: a float32 bin counts whole numbers exactly up to this; a bin reaching it flags the pass
FLOAT32_LIMIT = float(1 << 24)


@numba.njit(cache=True, nogil=True)
def _add_ev_kernel(flat, eflat, order, ocodes, lo, hi, limit, inc, K):
    # as _add_kernel, and each entry's soft-evidence increments (row ``code >> 1`` of ``inc``) into
    # eflat; entries with ``code & 1 == 0`` add evidence only
    sat = False
    for q in range(lo, hi):
        k = order[q]
        c = ocodes[q]
        if c & 1:
            v = np.float64(flat[k]) + 1.0
            flat[k] = v
            sat |= v >= limit
        base = k - k % K
        row = c >> 1
        for j in range(K):
            d = inc[row, j]
            if d != 0.0:
                eflat[base + j] += d
    return sat


@numba.njit(cache=True, nogil=True)
def _add_kernel(flat, order, lo, hi, limit):
    # returns True when a bin reached ``limit`` (the sum is formed in float64, so it is exact)
    sat = False
    for q in range(lo, hi):
        k = order[q]
        v = np.float64(flat[k]) + 1.0
        flat[k] = v
        sat |= v >= limit
    return sat


class _Slot:
    """One worker's buffers and its own tallies (merged at the end: no shared writes)."""

    def __init__(self, plan, rows):
        n_rods = plan.n_rods
        rshift = max(0, int(math.ceil(math.log2(max(n_rods, 1) / _ROD_BLOCKS))))
        self.rshift = np.int64(rshift)
        self.nbk = (max(n_rods, 1) >> rshift) + 1
        size = max(int(rows), 1)
        self.per_ion = plan.entries_per_ion
        self.sel = np.empty(size, np.int32)
        self.rows = np.empty(size, np.int32)
        self.metals = np.empty(size, np.int8)
        self.rngs = np.empty(size, np.int32)
        entries = size * self.per_ion
        ev = entries if plan.ev_on else 1
        self.codes = np.empty(ev, np.int32)
        self.ocodes = np.empty(ev, np.int32)
        self.ev_on = plan.ev_on
        self.keys = np.empty(entries, np.int32)
        self.order = np.empty(entries, np.int32)
        self.bucket = np.empty(entries, np.int32)
        self.bstart = np.zeros(self.nbk + 1, np.int64)
        self.tally, self.ext = new_tally()
        self.ext_raw = self.ext.copy()  # extents of whole valid blocks, in the file's unit

    def grow(self, rows):
        if rows > self.sel.size:
            per_ion = [("sel", np.int32), ("rows", np.int32), ("metals", np.int8), ("rngs", np.int32)]
            per_entry = [("keys", np.int32), ("order", np.int32), ("bucket", np.int32)]
            if self.ev_on:
                per_entry += [("codes", np.int32), ("ocodes", np.int32)]
            for name, dt in per_ion:
                setattr(self, name, np.empty(int(rows), dt))
            for name, dt in per_entry:
                setattr(self, name, np.empty(int(rows) * self.per_ion, dt))


class CountPass:
    """The fused pass over a run, block by block, on one or two threads.

    Each block of rows is cut into one part per thread; each part is ranged, drawn, placed on its
    rod and site and sorted by block of rods (:func:`_select_kernel` and :func:`_locate_kernel`,
    which release the GIL), then
    the increments are shared out by rod block, so no two threads ever write the same bins. Counts
    are whole numbers (exact in float32 below :data:`FLOAT32_LIMIT`), so the result does not
    depend on the order of the additions, the number of threads or the block size; the draws
    depend only on the seed and the row.

    Parameters
    ----------
    plan : CountPlan
    counts : (n_rods, n_sites, n_metals) ndarray of float32 or float64, optional
        Zeroed count array, C-contiguous; counts are added into it. By default a new float32 one
        is made (:func:`zeroed_array`) in a background thread while the first blocks are placed
        (their sorted bins wait in memory, at most :data:`PENDING_BYTES`); see :attr:`counts`.
        A float32 array whose bin reaches :data:`FLOAT32_LIMIT` sets :attr:`saturated`.
    threads : int, optional
        Worker threads (default: two when the process may use two CPUs).
    factor : float
        Length unit factor of the positions to nm.
    strict : bool
        Stop at the first invalid row (see :attr:`first_bad_row`).
    """

    def __init__(self, plan: CountPlan, counts=None, threads: int | None = None, factor: float = 1.0,
                 strict: bool = False):
        shape = (plan.n_rods, plan.n_sites, plan.n_metals)
        self._counts = None
        self._alloc = None
        if counts is None:
            import threading

            out = {}

            def make():
                try:
                    out["a"] = zeroed_array(shape, np.float32)
                except BaseException as e:  # re-raised when the array is needed
                    out["err"] = e

            self._alloc = (threading.Thread(target=make, daemon=True, name="probeseq-counts"), out)
            self._alloc[0].start()
        else:
            if (counts.shape != shape or counts.dtype not in (np.float32, np.float64)
                    or not counts.flags.c_contiguous):
                raise InputError(f"counts must be a C-contiguous float32 or float64 array of shape {shape}")
            self._counts = counts
        self._saturated = False
        self.evidence = zeroed_array(shape, np.float32) if plan.ev_on else None
        if threads is None:
            threads = default_threads()
        self.threads = max(1, int(threads))
        self.plan = plan
        self.factor = float(factor)
        self.strict = bool(strict)
        self._slots = [_Slot(plan, 1) for _ in range(self.threads)]
        self._pending = []
        self._pending_bytes = 0
        self.plan_dtype = np.dtype(np.float32)
        self._ex = None
        if self.threads > 1:
            from concurrent.futures import ThreadPoolExecutor

            self._ex = ThreadPoolExecutor(max_workers=self.threads - 1, thread_name_prefix="probeseq-count")

    @property
    def saturated(self) -> bool:
        """True when a float32 bin reached :data:`FLOAT32_LIMIT` (its later increments may be
        lost): count again into a float64 array."""
        self._flush(wait=True)
        return self._saturated

    @property
    def counts(self) -> np.ndarray:
        """The count array (waits for it and adds every pending block)."""
        self._flush(wait=True)
        return self._counts

    def _ready(self, wait: bool) -> bool:
        if self._counts is None:
            th, out = self._alloc
            if th.is_alive() and not wait:
                return False
            th.join()
            if "err" in out:
                raise out["err"]
            self._counts = out.pop("a")
        return True

    def _flush(self, wait: bool, entries=()):
        """Add the pending blocks and ``entries`` (lists of (sorted bins, bin-block starts, sorted
        evidence codes or None)) when the count array is there; otherwise keep copies of
        ``entries`` for later."""
        entries = list(entries)
        if not self._ready(wait and True):
            if self._pending_bytes + sum(o.nbytes for o, _, _ in entries) > PENDING_BYTES:
                self._ready(True)
            else:
                for o, b, c in entries:
                    self._pending.append((o.copy(), b.copy(), None if c is None else c.copy()))
                    self._pending_bytes += o.nbytes * (1 if c is None else 2)
                return
        todo = self._pending + entries
        self._pending, self._pending_bytes = [], 0
        if todo:
            self._add(todo)

    def _add_range(self, flat, limit, o, c, lo, hi) -> bool:
        """Add the sorted entries ``lo .. hi`` of one block; True when a bin reached ``limit``."""
        if c is None:
            return bool(_add_kernel(flat, o, lo, hi, limit))
        return bool(_add_ev_kernel(flat, self.evidence.reshape(-1), o, c, lo, hi, limit, self.plan.ev_increments,
                                   np.int64(self.plan.n_metals)))

    def _add(self, entries):
        flat = self._counts.reshape(-1)
        limit = np.float64(FLOAT32_LIMIT if flat.dtype == np.float32 else np.inf)
        parts = len(self._slots) if sum(o.size for o, _, _ in entries) >= 65536 else 1
        if parts == 1:
            for o, b, c in entries:
                self._saturated |= self._add_range(flat, limit, o, c, 0, int(b[-1]))
            return
        # share the increments out by block of rods, balancing the number of bins
        per_block = np.sum([np.diff(b) for _, b, _ in entries], axis=0)
        cum = np.cumsum(per_block)
        bounds = [0] + [int(np.searchsorted(cum, cum[-1] * t / parts)) + 1 for t in range(1, parts)] + [per_block.size]
        bounds = np.maximum.accumulate(np.minimum(bounds, per_block.size))

        sat = [False] * parts

        def add(t):
            def run():
                b0, b1 = int(bounds[t]), int(bounds[t + 1])
                if b1 > b0:
                    for o, b, c in entries:
                        sat[t] |= self._add_range(flat, limit, o, c, int(b[b0]), int(b[b1]))
            return run

        self._run([add(t) for t in range(parts)])
        self._saturated |= any(sat)

    def close(self):
        if self._ex is not None:
            self._ex.shutdown(wait=True)
            self._ex = None
        if self._alloc is not None and self._alloc[0].is_alive():
            self._alloc[0].join()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def _run(self, fns):
        """Run fns[0] here and the others on the pool; re-raise the first error."""
        futs = [self._ex.submit(f) for f in fns[1:]] if len(fns) > 1 else []
        err = None
        try:
            fns[0]()
        except BaseException as e:  # wait for the others before raising
            err = e
        for f in futs:
            try:
                f.result()
            except BaseException as e:
                err = err or e
        if err is not None:
            raise err

    def add(self, row0: int, x, y, z, m) -> None:
        """Count one block of ions (rows ``row0 .. row0 + len(x) - 1`` of the run)."""
        n = int(x.shape[0])
        if not (y.shape[0] == z.shape[0] == m.shape[0] == n):
            raise InputError(f"x, y, z, m must have equal lengths, got {x.shape}, {y.shape}, {z.shape}, {m.shape}")
        if x.dtype != y.dtype or x.dtype != z.dtype or x.dtype.kind != "f" or m.dtype.kind != "f":
            raise InputError("x, y, z must share one float type and m must be float")
        if n == 0:
            return
        self.plan_dtype = x.dtype
        rbits = max(1, int(plan_rbits(self.plan)))
        if n >= (1 << (31 - rbits)):  # a part's (row, range) pairs are packed into 31 bits
            step = (1 << (31 - rbits)) - 1
            for s in range(0, n, step):
                self.add(row0 + s, x[s:s + step], y[s:s + step], z[s:s + step], m[s:s + step])
            return
        parts = self.threads if n >= 65536 * self.threads else 1
        cuts = [n * k // parts for k in range(parts + 1)]
        plan = self.plan
        nk = [0] * parts

        def place(k):
            def run():
                a, b = cuts[k], cuts[k + 1]
                sl = self._slots[k]
                sl.grow(b - a)
                sl.bstart[:] = 0
                xs, ys, zs, ms = x[a:b], y[a:b], z[a:b], m[a:b]
                if _check_rows(sl, xs, ys, zs, ms, row0 + a, self.factor) and self.strict:
                    return
                hi = _select_kernel(ms, b - a, np.int64(row0 + a), plan.key, plan.mass_lut, plan.lows, plan.highs,
                                    plan.cum, plan.metal_range, sl.sel, sl.rows, sl.metals, sl.rngs, plan.ev_on,
                                    *plan.ev_bins)
                nk[k] = _locate_kernel(xs, ys, zs, sl.rows, sl.metals, np.int64(0), np.int64(hi),
                                       np.float64(self.factor), np.int64(plan.n_metals), plan.geometry,
                                       sl.tally, sl.keys, sl.order, sl.bucket, sl.bstart, sl.rshift, sl.rngs,
                                       plan.ev_level, sl.codes, sl.ocodes, *plan.ev_second)
            return run

        self._run([place(k) for k in range(parts)])
        self._flush(False, [(sl.order[:nk[k]], sl.bstart, sl.ocodes[:nk[k]] if plan.ev_on else None)
                            for k, sl in enumerate(self._slots[:parts])])

    @property
    def first_bad_row(self) -> int:
        """Row of the first invalid ion met (-1: none)."""
        rows = [int(sl.tally[9]) for sl in self._slots if sl.tally[9] >= 0]
        return min(rows) if rows else -1

    def result(self):
        """Merged (tally, extents) of everything added so far (the counts are complete after it)."""
        self._flush(wait=True)
        tally, ext = _merge_checks(self._slots, self.factor, self.plan_dtype)
        for sl in self._slots:
            tally[4:9] += sl.tally[4:9]
            tally[10:] += sl.tally[10:]
        return tally, ext


def plan_rbits(plan: CountPlan) -> int:
    """Bits of the range code (range + _CODE_BASE) in the kernel's packed (row, range) list."""
    rbits = 1
    while (1 << rbits) < plan.lows.size + _CODE_BASE:
        rbits += 1
    return rbits


def tally_dict(tally) -> dict:
    """The integer tallies as a dict keyed by :data:`TALLY_FIELDS`."""
    return {k: int(tally[i]) for i, k in enumerate(TALLY_FIELDS)}
