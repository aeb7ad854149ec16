"""Channels: which metal (or none) each ion counts for, from a range set; the channel draw
and the detection balance of the count stage.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from functools import lru_cache

import numpy as np

from ..exceptions import InputError
from .isotopes import metal_atoms, parse_formula
from .ranges import RangeSet

__all__ = ['LookupTable', 'ChannelAssignment', 'assign_channels', 'channel_tables']

_LUT_SCALE = 1024.0  # cells per Da; a power of two, so m * scale is exact in float32 and float64


# ============================================================================ channels
@dataclass(frozen=True)
class LookupTable:
    """Range lookup table on 1/1024-Da cells, with exact handling of cells holding an edge.

    Every cell stores the index of the range covering it, :attr:`UNRANGED` where no range does and
    :attr:`EDGE` where a range edge splits the cell (such cells are resolved by binary search).
    With a channel table (at most 16 channels) every cell stores ``range_index << 4 | channel``,
    so one gather gives both. These codes are defined here only; :meth:`candidate_table` packs
    them for the compiled counting pass.

    Attributes
    ----------
    lut : (n_cells,) ndarray of int32
        Code of each 1/1024-Da cell (read-only).
    lows, highs : (n_ranges,) ndarray of float64, Da
        Range bounds, sorted.
    channel : (n_ranges + 1,) ndarray of int8 or None
        Channel of each range (last entry: unranged), if the table carries channels.
    shift : int
        Bits of the channel in every cell (0 without channels, else 4).
    """

    #: range index of a value in no range
    UNRANGED = -1
    #: range index stored in a cell that holds a range edge (resolved by binary search)
    EDGE = -2
    #: added to a stored range index to make every code of :meth:`candidate_table` non-negative
    CODE_BASE = 2
    #: cells per Da (a power of two, so ``m * CELLS_PER_DA`` is exact in float32 and float64)
    CELLS_PER_DA = _LUT_SCALE

    lut: np.ndarray
    lows: np.ndarray
    highs: np.ndarray
    channel: np.ndarray | None
    shift: int

    @classmethod
    def build(cls, ranges: RangeSet, channel=None) -> "LookupTable":
        """Table of ``ranges`` (with the per-range ``channel`` table, (n_ranges + 1,) int8, if given)."""
        lows, highs = ranges.lows_da, ranges.highs_da
        top = int(math.ceil((highs.max() if highs.size else 0.0) * _LUT_SCALE)) + 2
        starts = np.arange(top, dtype=np.float64) / _LUT_SCALE
        ri = _exact(starts, lows, highs)
        edges = np.concatenate([lows, highs])
        cells = np.floor(edges * _LUT_SCALE).astype(np.int64)
        exact_start = cells / _LUT_SCALE == edges  # an edge on a cell start does not split the cell
        ri[cells[~exact_start]] = cls.EDGE
        shift = 0
        if channel is not None and int(channel.max(initial=0)) < 16:
            shift = 4
            ri = (ri << 4) | np.where(ri == cls.EDGE, 0, channel[np.maximum(ri, cls.UNRANGED)]).astype(np.int32)
        ri.flags.writeable = False
        return cls(ri, lows, highs, channel, shift)

    def __call__(self, m, block: int = 1 << 18):
        """Range index of each value, and the channel of its range when the table has one.

        Works through the array in blocks so the temporaries stay in cache and are reused.
        """
        m = np.asarray(m)
        if m.dtype.kind != "f":
            m = m.astype(np.float64)
        n = m.size
        ri = np.empty(n, dtype=np.int32)
        ch = None if self.channel is None else np.empty(n, dtype=np.int8)
        nb = min(block, n)
        buf_f = np.empty(nb, dtype=m.dtype)
        buf_i = np.empty(nb, dtype=np.int32)
        scale = m.dtype.type(_LUT_SCALE)
        top = self.lut.size - 1
        for s in range(0, n, block):
            e = min(s + block, n)
            f = buf_f[:e - s]
            np.multiply(m[s:e], scale, out=f)
            if not (f.min() >= 0 and f.max() < top):  # out of the table, negative or NaN
                np.nan_to_num(f, copy=False, nan=top, posinf=top, neginf=0)
                np.clip(f, 0, top, out=f)
            idx = buf_i[:e - s]
            np.copyto(idx, f, casting="unsafe")  # truncation = floor for values >= 0
            out = ri[s:e]
            if self.shift:
                np.take(self.lut, idx, out=idx)
                np.right_shift(idx, self.shift, out=out)
                np.bitwise_and(idx, 15, out=ch[s:e], casting="unsafe")
            else:
                np.take(self.lut, idx, out=out)
            edge = np.flatnonzero(out == self.EDGE)
            if edge.size:
                out[edge] = _exact(m[s:e][edge].astype(np.float64), self.lows, self.highs)
            if ch is not None:
                if self.shift:
                    if edge.size:
                        ch[s:e][edge] = self.channel[out[edge]]
                else:
                    np.take(self.channel, out, out=ch[s:e])
        return ri if ch is None else (ri, ch)


    def candidate_table(self, candidate) -> np.ndarray:
        """The table packed for the compiled counting pass, with a candidate flag per cell.

        Parameters
        ----------
        candidate : (n_ranges,) array of bool
            Ranges whose ions are candidates (for the counting pass: ranges holding metal).

        Returns
        -------
        (n_cells,) ndarray of int32
            ``(code + CODE_BASE) << 1 | flag`` per cell, ``code`` the cell's range index,
            :attr:`UNRANGED` or :attr:`EDGE`; ``flag`` is 1 for a candidate range and for an edge
            cell (resolved later), 0 for unranged cells.
        """
        if self.shift:
            raise InputError("candidate_table needs a lookup table without channels")
        candidate = np.asarray(candidate, bool).reshape(-1)
        if candidate.size != self.lows.size:
            raise InputError(f"candidate must have {self.lows.size} entries, got {candidate.size}")
        flag = np.zeros(candidate.size + self.CODE_BASE, np.int64)
        flag[self.EDGE + self.CODE_BASE] = 1
        flag[self.CODE_BASE:] = candidate
        code = np.asarray(self.lut, np.int64) + self.CODE_BASE
        return ((code << 1) | flag[code]).astype(np.int32)


def _exact(m64, lows, highs):
    """Range index of each value (``LookupTable.UNRANGED`` outside every range), by binary search."""
    if lows.size == 0:
        return np.full(m64.shape, LookupTable.UNRANGED, dtype=np.int32)
    k = np.searchsorted(lows, m64, side="right") - 1
    inside = (k >= 0) & (m64 < highs[np.maximum(k, 0)])
    return np.where(inside, k, LookupTable.UNRANGED).astype(np.int32)


@lru_cache(maxsize=16)
def _lookup_for(ranges: RangeSet, metals: tuple | None = None) -> LookupTable:
    return LookupTable.build(ranges, None if metals is None else _weights_for(ranges, metals)[2])


def channel_tables(ranges: RangeSet, metals) -> tuple:
    """Per-range channel tables (the ion-independent part of :func:`assign_channels`).

    Returns
    -------
    metal_weights : (n_ranges + 1, n_metals) ndarray of float
        Expected atoms of each metal per ion in each range; last row (unranged) zero.
    other_weight : (n_ranges + 1,) ndarray of float
        Share of non-metal species in each range.
    range_channel : (n_ranges + 1,) ndarray of int8
        Hard channel: metal index, ``n_metals`` (other) or ``n_metals + 1`` (unranged row).
    """
    return _weights_for(ranges, _check_metals(metals))


@lru_cache(maxsize=16)
def _weights_for(ranges: RangeSet, metals: tuple):
    """Per-range expected metal atoms per ion, non-metal share and hard channel."""
    k = len(metals)
    n = len(ranges)
    w = np.zeros((n + 1, k))
    other = np.zeros(n + 1)
    for j, r in enumerate(ranges):
        for (f, _z), p in r.species_shares():
            atoms = metal_atoms(f, metals)
            if atoms.any():
                w[j] += p * atoms
            else:
                other[j] += p
    ch = np.full(n + 1, k + 1, dtype=np.int8)
    for j in range(n):
        best = int(np.argmax(w[j])) if k else 0
        ch[j] = best if k and w[j, best] > 0 and w[j, best] >= other[j] else k
    for a in (w, other, ch):
        a.flags.writeable = False
    return w, other, ch


@dataclass(frozen=True)
class ChannelAssignment:
    """Element channel of every ion.

    Attributes
    ----------
    range_index : (n_ions,) ndarray of int32
        Index into the RangeSet of each ion's range, ``-1`` for unranged.
    metal_weights : (n_ranges + 1, n_metals) ndarray of float
        Expected atoms of each metal per ion of each range (a molecular ion counts the metal atoms
        it carries; shared ranges are split by the species shares); the last row, for unranged
        ions, is zero. Per-ion weights are ``metal_weights[range_index]`` (``-1`` picks the last
        row).
    other_weight : (n_ranges + 1,) ndarray of float
        Share of each range's ions that are ranged non-metal species (last row zero).
    range_channel : (n_ranges + 1,) ndarray of int8
        Hard channel of each range: metal index with the largest weight, ``n_metals`` for other
        (non-metal) ranges, ``n_metals + 1`` for the unranged row.
    channel : (n_ions,) ndarray of int8
        ``range_channel[range_index]``: 0..K-1 metal, K other, K+1 unranged.
    metals : tuple of str
    """

    range_index: np.ndarray
    metal_weights: np.ndarray
    other_weight: np.ndarray
    range_channel: np.ndarray
    channel: np.ndarray
    metals: tuple

    @property
    def n_metals(self) -> int:
        return len(self.metals)

    @property
    def is_other(self) -> np.ndarray:
        """(n_ions,) True for ions in ranges of non-metal species."""
        return self.channel == self.n_metals

    @property
    def is_unranged(self) -> np.ndarray:
        """(n_ions,) True for ions outside every range."""
        return self.range_index < 0

    def weights(self, index=None) -> np.ndarray:
        """Per-ion expected metal atoms, (n, n_metals), for all ions or ``index`` (mask or indices)."""
        ri = self.range_index if index is None else self.range_index[index]
        return self.metal_weights[ri]

    def metal_counts(self, index=None) -> np.ndarray:
        """(n_metals,) expected metal atoms over all ions or ``index`` (background not removed)."""
        ri = self.range_index if index is None else self.range_index[index]
        per_range = np.bincount(ri + 1, minlength=self.metal_weights.shape[0] + 1)
        # bincount slot 0 is unranged (-1), slots 1.. are ranges 0..n-1
        counts = np.concatenate([per_range[1:self.metal_weights.shape[0]], per_range[:1]])
        return counts @ self.metal_weights

    @staticmethod
    def concatenate(parts) -> "ChannelAssignment":
        """Join assignments of consecutive chunks made with the same ranges and metals."""
        parts = list(parts)
        if not parts:
            raise InputError("concatenate: no channel assignments given")
        first = parts[0]
        for p in parts[1:]:
            if p.metals != first.metals or p.metal_weights.shape != first.metal_weights.shape or \
                    not np.array_equal(p.metal_weights, first.metal_weights):
                raise InputError("concatenate: channel assignments were made with different ranges or metals")
        return replace(first, range_index=np.concatenate([p.range_index for p in parts]),
                       channel=np.concatenate([p.channel for p in parts]))


def _check_metals(metals) -> tuple:
    if isinstance(metals, str):
        metals = [m.strip() for m in metals.split(",")]
    metals = tuple(metals)
    if not metals:
        raise InputError("metals: give at least one metal symbol, e.g. Co,Zn")
    for m in metals:
        if not isinstance(m, str) or list(parse_formula(m).items()) != [(m, 1)]:
            raise InputError(f"metals: '{m}' is not an element symbol (e.g. Co, Zn)")
    if len(set(metals)) != len(metals):
        raise InputError(f"metals: a metal is listed twice in {list(metals)}")
    return metals


def assign_channels(mass_to_charge, ranges: RangeSet, metals) -> ChannelAssignment:
    """Channel of every ion from its mass-to-charge (a pure function: safe on chunks).

    Parameters
    ----------
    mass_to_charge : (n_ions,) ndarray of float, Da
        float32 or float64; an ion is in a range when ``low <= m < high``.
    ranges : RangeSet
        Usually ``auto_range(...).ranges`` (which carries fitted shares) or a file read with
        :meth:`RangeSet.from_toml`.
    metals : sequence of str
        Metal symbols in channel order.

    Returns
    -------
    ChannelAssignment

    Examples
    --------
    >>> rs = RangeSet((Range(58.8, 59.2, "Co", 1), Range(63.8, 64.2, "Zn", 1)))
    >>> ca = assign_channels(np.array([58.93, 63.93, 12.0]), rs, ["Co", "Zn"])
    >>> ca.range_index.tolist(), ca.channel.tolist()
    ([0, 1, -1], [0, 1, 3])
    """
    metals = _check_metals(metals)
    if not isinstance(ranges, RangeSet):
        raise InputError(f"ranges must be a RangeSet, got {type(ranges).__name__}")
    m = np.asarray(mass_to_charge)
    if m.ndim != 1:
        raise InputError(f"mass_to_charge must be a 1-D array, got shape {m.shape}")
    w, other, ch = _weights_for(ranges, metals)
    ri, channel = _lookup_for(ranges, metals)(m)
    return ChannelAssignment(ri, w, other, ch, channel, metals)


def realise_channels(weights, rng) -> np.ndarray:
    """Draw each ion's metal from its channel weights: (n, K) float -> (n,) int (-1 = not a metal).

    Ions in ranges shared between species carry fractional metal weights (an ion in a range shared
    by 64Zn2+ and O2+ is a Zn ion with probability w). The rod model counts whole ions per site, so
    each ion is given one identity drawn with these probabilities: the expected counts equal the
    weights, and every site holds whole ions, as the emission model assumes.

    Parameters
    ----------
    weights : (n, K) array of float
    rng : numpy.random.Generator or (n,) array of float
        Source of the uniform numbers, or the numbers themselves (in [0, 1); the fused pass uses
        :func:`probeseq.utils.draws.ion_uniforms`). Ion i is metal k for the first k whose
        cumulative weight exceeds its number.
    """
    w = np.asarray(weights, dtype=np.float64)
    if w.ndim != 2:
        raise InputError(f"weights must be (n_ions, n_metals), got shape {w.shape}")
    cum = np.cumsum(np.minimum(w, 1.0), axis=1)
    if isinstance(rng, np.random.Generator):
        u = rng.random(w.shape[0])
    else:
        u = np.asarray(rng, dtype=np.float64)
        if u.shape != (w.shape[0],):
            raise InputError(f"uniform numbers have shape {u.shape}, expected ({w.shape[0]},)")
    k = (u[:, None] >= cum).sum(1)
    return np.where(k < w.shape[1], k, -1)


def draw_metal_ions(assignment, thin, rng=None, *, seed=None, start: int = 0) -> np.ndarray:
    """Metal of each ion (-1 = none) drawn from its channel weights thinned by ``thin`` (per metal).

    With ``seed`` the draws are those of the fused pass: ion ``start + i`` uses
    ``ion_uniforms(seed, start, n)[i]``, whatever the chunking (the reference of the compiled
    kernel); otherwise ``rng`` (a numpy Generator) supplies them.
    """
    n = assignment.range_index.shape[0]
    if seed is not None:
        from ..utils.draws import ion_uniforms

        rng = ion_uniforms(seed, start, n)
    elif rng is None:
        raise InputError("draw_metal_ions: give rng or seed")
    return realise_channels(assignment.weights() * np.asarray(thin)[None, :], rng)


def metal_range_shares(ranging, assignment) -> np.ndarray:
    """Share of each metal's ions that falls in each range, ``p_jk = N_j s_jk / n_k``, (n_ranges, K).

    N_j is the number of ions in range j, ``s_jk`` the range's share of metal k (atoms per ion) and
    n_k the metal's fitted ions over all its peaks, tails included; a column sums to the share of
    the metal's ions inside its ranges. A metal without fitted ions has a column of NaN.
    """
    w = np.asarray(assignment.metal_weights, float)[:-1]  # (n_ranges, K); the unranged row dropped
    n_range = np.bincount(assignment.range_index + 1, minlength=w.shape[0] + 1)[1:w.shape[0] + 1]
    n_k = np.asarray(ranging.amounts, float) @ np.asarray(ranging.species_metal_atoms, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(n_k > 0, n_range[:, None] * w / n_k, np.nan)


def metal_visibility(ranging, assignment) -> np.ndarray:
    """Share of each metal's ions that the count stage counts as that metal: ``rho_k``, (K,).

    An ion in a range shared with another species counts for metal k with probability ``s``, the
    range's share of k, so of metal k's ions ``rho_k = sum_j p_jk s_jk`` are counted as k
    (:func:`metal_range_shares`): lines outside every range and the shared ranges both lower it.
    The rod model takes it as the metal's relative visibility
    (:class:`probeseq.decoding.model.DecoderParams`), so nothing is thinned and the fitted ``eta`` is
    the instrument's detection efficiency.

    Returns ones when a metal's share cannot be computed (no fitted ions of it); values are kept
    in [0.02, 1].
    """
    w = np.asarray(assignment.metal_weights, float)[:-1]
    rho = (metal_range_shares(ranging, assignment) * w).sum(axis=0)
    if not np.isfinite(rho).all() or (rho <= 0).any():
        return np.ones(rho.size)
    return np.clip(rho, 0.02, 1.0)
