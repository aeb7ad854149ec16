"""Mass bins inside the ranges: each metal's share of the ions at every mass-to-charge of a range.

A range shared by a metal line and a fragment line (24Mg+ at 23.985 Da and C2+ at 24.000 Da) has
one share of the metal over the whole window, yet the two lines are not at the same place: an ion
on the low-mass flank is more likely the metal's, one in the high-mass tail more likely the
fragment's. The amounts fit already knows where every species' ions land (each isotope line
spread by the measured :class:`probeseq.ranging.spectrum.PeakShape`, the background locally
constant in ``sqrt(m/z)``), so the share of metal k at ``m`` is the ratio of the densities::

    s_k(m) = sum_s a_sk n_s f_s(m) / (sum_s n_s f_s(m) + b(m)),

``n_s`` the fitted ions of species s, ``a_sk`` its atoms of metal k, ``f_s`` its density over m
(isotope lines times the peak shape) and ``b`` the background density. :func:`range_bins` cuts
every range holding a metal's ion and a fragment into equal sub-bins (the integrals of the
densities over each sub-bin, by the shape's cdf) and gives each sub-bin its metal shares; any
other range keeps one bin. The shares of a range's bins, weighted by the model's ions in them,
add up to the range's own shares, so the bins only say *where* in the range the metal is.

The soft evidence of the count pass (:mod:`probeseq.lattice.evidence`) reads them per ion, the
bin of an ion being ``floor((m - low_r) * scale_r)`` (clipped to the range's bins) in float64.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .amounts import _design
from .calibration import _lines
from .isotopes import metal_atoms

__all__ = ['RangeBins', 'range_bins', 'one_bin_per_range']

#: sub-bins per local line width ``w(m) = m / R(m)`` (the FWHM at resolving power R)
BINS_PER_WIDTH = 8

#: most sub-bins of one range
MAX_BINS = 64

#: a range is cut into bins when it holds a metal's ion and a fragment (an ion without metal) each
#: with at least this share of its ions; a range of metal ions and background keeps one bin
MIXED_SHARE = 0.01


@dataclass(frozen=True, eq=False)
class RangeBins:
    """Sub-bins of the ranges and each metal's share of the ions in every sub-bin.

    Attributes
    ----------
    start : (n_ranges + 1,) ndarray of int64
        First bin of each range; range r owns bins ``start[r] .. start[r + 1] - 1``.
    scale : (n_ranges,) ndarray of float64, 1/Da
        Bins per Da of each range (0 for a range of one bin).
    lows : (n_ranges,) ndarray of float64, Da
        Low edge of each range (the bins start there).
    share : (n_bins, K) ndarray of float64
        Expected atoms of each metal per ion of each bin (the range's metal weights for a range
        of one bin).
    metal_split : (n_bins, K) ndarray of float64
        Share of each metal's ions of the range that fall in each of its bins (each range's column
        sums to 1; even for a metal the range does not hold).
    range_share : (n_ranges, K) ndarray of float64
        The ranges' own metal weights (the bins' shares averaged with the model's ions per bin).
    """

    start: np.ndarray
    scale: np.ndarray
    lows: np.ndarray
    share: np.ndarray
    metal_split: np.ndarray
    range_share: np.ndarray

    @property
    def n_bins(self) -> int:
        return int(self.start[-1])

    @property
    def bin_range(self) -> np.ndarray:
        """(n_bins,) range of every bin."""
        return np.repeat(np.arange(self.start.size - 1), np.diff(self.start))

    def bin_of(self, range_index, mass_to_charge) -> np.ndarray:
        """Bin of each ion (the arithmetic of the count pass), -1 where ``range_index`` is -1.

        Parameters
        ----------
        range_index : (n,) array of int
            Range of every ion (-1: none).
        mass_to_charge : (n,) array of float, Da

        Returns
        -------
        (n,) ndarray of int64
        """
        ri = np.asarray(range_index, np.int64)
        m = np.asarray(mass_to_charge).astype(np.float64)
        ok = ri >= 0
        r = np.where(ok, ri, 0)
        nb = self.start[r + 1] - self.start[r]
        t = (m - self.lows[r]) * self.scale[r]
        ib = np.minimum(np.floor(np.maximum(t, 0.0)).astype(np.int64), nb - 1)
        return np.where(ok, self.start[r] + ib, -1)


def one_bin_per_range(share, lows=None) -> RangeBins:
    """One bin per range: the evidence of whole ranges.

    Parameters
    ----------
    share : (n_ranges, K) array of float
        Metal weights of the ranges.
    lows : (n_ranges,) array of float, Da, optional
        Low edges of the ranges (unused by the bin arithmetic with one bin).

    Returns
    -------
    RangeBins
    """
    share = np.asarray(share, dtype=np.float64)
    n = share.shape[0]
    return RangeBins(start=np.arange(n + 1, dtype=np.int64), scale=np.zeros(n), lows=(
        np.zeros(n) if lows is None else np.asarray(lows, np.float64)), share=share.copy(),
        metal_split=np.ones_like(share), range_share=share.copy())


def _mixed(r, metals) -> bool:
    """Whether a range's fitted shares hold, each at :data:`MIXED_SHARE` or more, a metal's ion and
    a fragment."""
    kinds = {bool(metal_atoms(f, metals).any()) for (f, _), p in r.species_shares() if p >= MIXED_SHARE}
    return len(kinds) == 2


def _n_bins(low, high, shape) -> int:
    w = float(shape.width_da(0.5 * (low + high)))
    return int(min(max(math.ceil((high - low) * BINS_PER_WIDTH / w), 2), MAX_BINS))


def _cut(rr, j, n, lines, cal_pos, atoms):
    """Metal shares (n, K), metal atoms (n, K) and ions (n,) of the n equal bins of range j, from the
    fitted model."""
    r = rr.ranges[j]
    e = np.linspace(r.low_da, r.high_da, n + 1)
    mu = _design(e[:-1], e[1:], lines, cal_pos, len(rr.species), rr.peak_shape) * np.asarray(rr.amounts)[None, :]
    # the background is locally constant in sqrt(m/z): each bin gets its part of the range's
    su = np.sqrt(e)
    bg = max(float(rr.background_counts[j]), 0.0) * np.diff(su) / (su[-1] - su[0])
    metal = mu @ atoms  # (n, K) expected metal atoms in each bin
    tot = mu.sum(axis=1) + bg
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(tot[:, None] > 0, metal / tot[:, None], 0.0)
    return share, metal, tot


def range_bins(rr, weights) -> RangeBins:
    """Sub-bins of the mixed ranges of a ranging result and each metal's share in every bin.

    Parameters
    ----------
    rr : RangingResult
        The fitted spectrum (its ranges, species amounts, calibration, peak shape and background).
    weights : (n_ranges, K) array of float
        The ranges' metal weights (expected metal atoms per ion, as
        :attr:`probeseq.ranging.channels.ChannelAssignment.metal_weights` without its last row).

    Returns
    -------
    RangeBins
        One bin per range without a fitted peak shape; else a mixed range (a metal's ion and a
        fragment, each at least :data:`MIXED_SHARE` of the range's ions) is cut into
        ``(high - low) * BINS_PER_WIDTH / w(m)`` equal bins (at least 2, at most :data:`MAX_BINS`).
    """
    w = np.asarray(weights, dtype=np.float64)
    n_r, K = w.shape
    lows = np.asarray(rr.ranges.lows_da, np.float64)
    if rr.peak_shape is None or n_r == 0 or len(rr.species) == 0:
        return one_bin_per_range(w, lows)
    lines = _lines(rr.species)
    cal_pos = rr.calibration.predict(lines.pos)
    atoms = np.asarray(rr.species_metal_atoms, float).reshape(len(rr.species), K)
    mixed = (w > 0).any(axis=1) & np.array([_mixed(r, rr.metals) for r in rr.ranges], dtype=bool)
    shares, splits, counts, scale = [], [], [], np.zeros(n_r)
    for j in range(n_r):
        r = rr.ranges[j]
        n = _n_bins(r.low_da, r.high_da, rr.peak_shape) if mixed[j] else 1
        if n > 1:
            s, metal, ions = _cut(rr, j, n, lines, cal_pos, atoms)
            per_metal = metal.sum(axis=0)
            if np.isfinite(s).all() and (per_metal > 0).any() and ions.sum() > 0:
                # the bins redistribute the range's share: each metal is rescaled so that the bins,
                # weighted by the model's ions in them, give the range's weight (which the range file
                # rounds, and which a metal the bins do not see keeps at 0)
                avg = per_metal / ions.sum()
                with np.errstate(divide="ignore", invalid="ignore"):
                    fix = np.where(avg > 0, w[j] / avg, 0.0)
                s = np.clip(s * fix[None, :], 0.0, 1.0)
                safe = np.where(per_metal > 0, per_metal, 1.0)
                split = np.where(per_metal[None, :] > 0, metal / safe[None, :], 1.0 / n)
                shares.append(s)
                splits.append(split)
                counts.append(n)
                scale[j] = n / (r.high_da - r.low_da)
                continue
        shares.append(w[j][None, :])
        splits.append(np.ones((1, K)))
        counts.append(1)
    start = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    return RangeBins(start=start, scale=scale, lows=lows, share=np.concatenate(shares, axis=0),
                     metal_split=np.concatenate(splits, axis=0), range_share=w.copy())

