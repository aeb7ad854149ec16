"""Mass spectrum: histogram of mass-to-charge, background model and peak detection.

Two binnings are used. :func:`histogram` gives uniform bins in Da for figures and export.
Peak detection works on a *log-spaced* grid (:func:`log_histogram`), whose bins have a constant
relative width ``1 / (oversample * resolving_power)``: at a constant mass resolving power
``m / dm`` every peak then spans about the same number of bins (``oversample`` per FWHM), so one
smoothing kernel and one set of thresholds serve the whole spectrum.

Background
----------
Ions that arrive uncorrelated with the pulses are spread evenly in flight time; since flight
time is proportional to ``sqrt(m/z)``, such a background has a density proportional to
``(m/z)^-1/2`` in Da (common practice). :class:`Background` therefore models a rate that is
locally constant in ``u = sqrt(m/z)``: at any ``u`` the rate is the number of counts in the
peak-free bins within ``u +- half_width_u`` divided by the peak-free length of that window (the
Poisson maximum-likelihood estimate of a constant rate). Peaks and their tails are masked out
first; the window widens where peaks leave too little peak-free length. The background under an
interval is the rate times its length in ``u``; its standard error follows from the number of
counts the rate was estimated from.

Line shape
----------
:class:`PeakShape` describes where the ions of one isotope line land (Gaussian core plus an
exponential thermal tail towards high mass, widths scaling as ``m / R(m)``);
:func:`fit_peak_shape` fits it to isolated peaks, and ranging uses it to count ions in tails.

Peaks
-----
Candidates are the local maxima of the lightly smoothed, background-subtracted counts
(``scipy.signal.find_peaks``); a candidate is kept when its counts within one expected FWHM
of the maximum exceed the higher of the local background and its prominence base by
``min_counts`` and by ``min_significance`` in the Poisson likelihood-ratio significance
``sqrt(2 (n ln(n/b) - (n - b)))``. Widths come from ``scipy.signal.peak_widths``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError

__all__ = ['DEFAULT_RESOLVING_POWER', 'Spectrum', 'Background', 'PeakTable', 'PeakSearch', 'default_bin_width', 'histogram', 'log_histogram', 'find_peaks', 'PeakShape', 'fit_peak_shape', 'resolving_power_law']

#: assumed mass resolving power m/dm (FWHM) of a laser-pulsed straight-flight-path instrument
#: (about 300-1100; recalled from memory), used to choose bin widths when none is given
DEFAULT_RESOLVING_POWER = 500.0


_KERNEL_SIGMA_BINS = 1.0


# sum of squared weights of a unit-area Gaussian kernel of sigma 1 bin: 1 / (2 sqrt(pi))
_KERNEL_SQ = 1.0 / (2.0 * np.sqrt(np.pi) * _KERNEL_SIGMA_BINS)


@dataclass(frozen=True)
class Spectrum:
    """Counts of ions in mass-to-charge bins.

    Attributes
    ----------
    edges_da : (n_bins + 1,) ndarray of float, Da
        Bin edges, ascending (uniform or log-spaced).
    counts : (n_bins,) ndarray of int
        Ions per bin; a bin holds ``edges[i] <= m < edges[i + 1]``.
    """

    edges_da: np.ndarray
    counts: np.ndarray

    @property
    def centres_da(self) -> np.ndarray:
        """(n_bins,) bin centres, Da."""
        return 0.5 * (self.edges_da[1:] + self.edges_da[:-1])

    @property
    def widths_da(self) -> np.ndarray:
        """(n_bins,) bin widths, Da."""
        return np.diff(self.edges_da)

    @property
    def density_per_da(self) -> np.ndarray:
        """(n_bins,) counts per Da."""
        return self.counts / self.widths_da

    @property
    def n_ions(self) -> int:
        return int(self.counts.sum())


def default_bin_width(resolving_power: float = DEFAULT_RESOLVING_POWER) -> float:
    """Uniform bin width (Da) for figures: about a quarter of the FWHM at 20 Da, on a 1-2-5 series.

    With the default resolving power of 500 this is 0.01 Da.
    """
    raw = 20.0 / float(resolving_power) / 4.0
    exp = np.floor(np.log10(raw))
    mant = raw / 10 ** exp
    step = 1.0 if mant < 1.5 else 2.0 if mant < 3.5 else 5.0 if mant < 7.5 else 10.0
    return float(step * 10 ** exp)


def _mass_array(mass_to_charge, what="mass_to_charge") -> np.ndarray:
    m = np.asarray(mass_to_charge)
    if m.ndim != 1:
        raise InputError(f"{what} must be a 1-D array of Da values, got shape {m.shape}")
    if m.dtype.kind not in "fiu":
        raise InputError(f"{what} must hold numbers (Da), got dtype {m.dtype}")
    return m


def _window(m, range_da, where):
    """Resolve the mass window and check it holds counts."""
    if m.size == 0:
        raise InputError(f"{where}: the spectrum is empty (no ions)")
    m_max = float(np.max(m))
    if range_da is None:
        lo, hi = 0.5, min(m_max * 1.0001, 500.0)
        if hi <= lo:
            hi = lo * 2
    else:
        try:
            lo, hi = (float(v) for v in range_da)
        except (TypeError, ValueError):
            raise InputError(f"{where}: range_da must be (low, high) in Da, got {range_da!r}") from None
        if not (np.isfinite(lo) and np.isfinite(hi) and 0 < lo < hi):
            raise InputError(f"{where}: range_da must satisfy 0 < low < high, got ({lo}, {hi})")
    return lo, hi


def _check_counts(n_in, lo, hi, m, where):
    if n_in == 0:
        raise InputError(
            f"{where}: no counts in the requested window {lo:g}-{hi:g} Da "
            f"(the {m.size} ions span {float(np.min(m)):.4g}-{float(np.max(m)):.4g} Da)")


def histogram(mass_to_charge, bin_width_da: float | None = None, range_da=None,
              resolving_power: float = DEFAULT_RESOLVING_POWER) -> Spectrum:
    """Uniform-bin mass spectrum.

    Parameters
    ----------
    mass_to_charge : (n_ions,) ndarray of float, Da
    bin_width_da : float, Da, optional
        Bin width; default :func:`default_bin_width` of ``resolving_power`` (0.01 Da at 500).
    range_da : (float, float), Da, optional
        Window ``[low, high)``; default 0.5 Da to the largest value (at most 500 Da).
    resolving_power : float
        Assumed m/dm used for the default bin width.

    Returns
    -------
    Spectrum

    Raises
    ------
    InputError
        Empty input or no counts in the window.
    """
    m = _mass_array(mass_to_charge)
    lo, hi = _window(m, range_da, "spectrum")
    w = default_bin_width(resolving_power) if bin_width_da is None else float(bin_width_da)
    if not (np.isfinite(w) and w > 0):
        raise InputError(f"spectrum: bin_width_da must be a positive width in Da, got {bin_width_da!r}")
    n_bins = int(np.ceil((hi - lo) / w))
    if n_bins > 50_000_000:
        raise InputError(f"spectrum: {n_bins} bins of {w:g} Da over {lo:g}-{hi:g} Da is too many; widen the bins")
    edges = lo + w * np.arange(n_bins + 1)
    counts = _bincount_uniform(m, lo, w, n_bins)
    _check_counts(int(counts.sum()), lo, edges[-1], m, "spectrum")
    return Spectrum(edges, counts)


def _bincount_uniform(x, lo, w, n_bins, chunk=10_000_000):
    """Counts of x in ``n_bins`` uniform bins ``[lo + i w, lo + (i+1) w)``, streamed in chunks."""
    counts = np.zeros(n_bins + 2, dtype=np.int64)
    for s in range(0, x.size, chunk):
        v = (np.asarray(x[s:s + chunk], dtype=np.float64) - lo) / w
        idx = np.floor(v)
        np.clip(idx, -1, n_bins, out=idx)
        counts += np.bincount(idx.astype(np.int64) + 1, minlength=n_bins + 2)
    return counts[1:-1]


def log_histogram(mass_to_charge, range_da=None, relative_width: float = 1.0 / 2000) -> Spectrum:
    """Mass spectrum on log-spaced bins of constant relative width.

    Parameters
    ----------
    mass_to_charge : (n_ions,) ndarray of float, Da
    range_da : (float, float), Da, optional
        Window; default as :func:`histogram`.
    relative_width : float
        Bin width divided by bin position, ``d(ln m)``.

    Returns
    -------
    Spectrum
    """
    m = _mass_array(mass_to_charge)
    lo, hi = _window(m, range_da, "spectrum")
    if not 0 < relative_width < 1:
        raise InputError(f"spectrum: relative_width must be in (0, 1), got {relative_width}")
    n_bins = int(np.ceil(np.log(hi / lo) / relative_width))
    edges = lo * np.exp(relative_width * np.arange(n_bins + 1))
    counts = np.zeros(n_bins + 2, dtype=np.int64)
    chunk = 10_000_000
    for s in range(0, m.size, chunk):
        v = np.asarray(m[s:s + chunk], dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            idx = np.floor(np.log(v / lo) / relative_width)
        idx = np.nan_to_num(idx, nan=-1.0, neginf=-1.0, posinf=n_bins)
        np.clip(idx, -1, n_bins, out=idx)
        counts += np.bincount(idx.astype(np.int64) + 1, minlength=n_bins + 2)
    counts = counts[1:-1]
    _check_counts(int(counts.sum()), lo, hi, m, "spectrum")
    return Spectrum(edges, counts)


@dataclass(frozen=True)
class Background:
    """Background rate, locally constant in ``u = sqrt(m/z)`` (flat in flight time).

    Attributes
    ----------
    u_edges : (n_bins + 1,) ndarray of float, sqrt(Da)
        Square roots of the grid's bin edges.
    cum_counts : (n_bins + 1,) ndarray of float
        Cumulative counts of the peak-free bins.
    cum_free : (n_bins + 1,) ndarray of float, sqrt(Da)
        Cumulative peak-free length in ``u``.
    half_width_u : float, sqrt(Da)
        Half width of the estimation window (doubled up to three times where peaks leave less
        than ``half_width_u`` of peak-free length).
    """

    u_edges: np.ndarray
    cum_counts: np.ndarray
    cum_free: np.ndarray
    half_width_u: float = 0.3

    @classmethod
    def from_spectrum(cls, spectrum: Spectrum, peak_free, half_width_u: float = 0.3) -> "Background":
        """Build the model from a spectrum and a boolean mask of peak-free bins."""
        u = np.sqrt(spectrum.edges_da)
        free = np.asarray(peak_free, dtype=bool)
        c = np.concatenate([[0.0], np.cumsum(np.where(free, spectrum.counts, 0.0))])
        f = np.concatenate([[0.0], np.cumsum(np.where(free, np.diff(u), 0.0))])
        return cls(u, c, f, float(half_width_u))

    def rate(self, u):
        """Rate per unit ``u`` at ``u`` and the counts it was estimated from.

        Parameters
        ----------
        u : ndarray of float, sqrt(Da)

        Returns
        -------
        rate : ndarray of float, counts per sqrt(Da)
        n_used : ndarray of float
            Counts in the peak-free part of the window (for the standard error).
        free_u : ndarray of float, sqrt(Da)
            Peak-free length of the window.
        """
        u = np.asarray(u, dtype=float)
        rate = np.zeros(u.shape)
        n_used = np.zeros(u.shape)
        free = np.zeros(u.shape)
        todo = np.ones(u.shape, dtype=bool)
        h = self.half_width_u
        for step in range(4):
            lo, hi = u - h, u + h
            n = np.interp(hi, self.u_edges, self.cum_counts) - np.interp(lo, self.u_edges, self.cum_counts)
            L = np.interp(hi, self.u_edges, self.cum_free) - np.interp(lo, self.u_edges, self.cum_free)
            ok = todo & ((L >= self.half_width_u) | (step == 3))
            with np.errstate(divide="ignore", invalid="ignore"):
                rate = np.where(ok, np.where(L > 0, n / L, 0.0), rate)
            n_used = np.where(ok, n, n_used)
            free = np.where(ok, L, free)
            todo &= ~ok
            h *= 2
        return rate, n_used, free

    def density_per_da(self, m_da):
        """Background density at ``m_da``, counts per Da (rate in u times du/dm)."""
        m = np.asarray(m_da, dtype=float)
        u = np.sqrt(m)
        r, _, _ = self.rate(u)
        return r / (2.0 * u)

    def counts(self, low_da, high_da):
        """Expected background counts in ``[low_da, high_da)`` and their standard error.

        Parameters
        ----------
        low_da, high_da : ndarray of float, Da

        Returns
        -------
        counts : ndarray of float
        sigma : ndarray of float
            Standard error from the counts the rate was estimated from; when the window held no
            counts it is the rate one count would give (an upper-scale error, not zero).
        """
        lo = np.sqrt(np.asarray(low_da, dtype=float))
        hi = np.sqrt(np.asarray(high_da, dtype=float))
        r, n, L = self.rate(0.5 * (lo + hi))
        du = hi - lo
        c = r * du
        with np.errstate(divide="ignore", invalid="ignore"):
            sig = np.where(L > 0, du * np.sqrt(np.maximum(n, 1.0)) / L, 0.0)
        return c, sig


@dataclass(frozen=True)
class PeakTable:
    """Detected peaks, one row each, ascending in position.

    Attributes
    ----------
    position_da : (n_peaks,) ndarray of float, Da
        Vertex of a Gaussian fitted to the top of the peak (above about half maximum).
    height_per_da : (n_peaks,) ndarray of float, counts per Da
        Background-subtracted density at the maximum.
    fwhm_da : (n_peaks,) ndarray of float, Da
        Full width at half maximum (smoothing kernel removed in quadrature).
    low_da, high_da : (n_peaks,) ndarray of float, Da
        Where the peak falls to 10 % of its height on each side; counts are taken in between.
    counts : (n_peaks,) ndarray of float
        Ions in ``[low_da, high_da)`` (gross).
    background_counts : (n_peaks,) ndarray of float
        Background model integrated over ``[low_da, high_da)``.
    net_counts : (n_peaks,) ndarray of float
        ``counts - background_counts``.
    signal_to_background : (n_peaks,) ndarray of float
        ``height_per_da`` over the background density at the peak (the density floor is one
        count over the estimation window, so the ratio stays finite).
    significance : (n_peaks,) ndarray of float
        Poisson significance (likelihood-ratio form) of the counts within one expected FWHM of
        the maximum over the local base.
    """

    position_da: np.ndarray
    height_per_da: np.ndarray
    fwhm_da: np.ndarray
    low_da: np.ndarray
    high_da: np.ndarray
    counts: np.ndarray
    background_counts: np.ndarray
    net_counts: np.ndarray
    signal_to_background: np.ndarray
    significance: np.ndarray

    def __len__(self) -> int:
        return int(self.position_da.size)

    def columns(self) -> dict:
        """Mapping column name -> list of floats (JSON-able)."""
        return {k: [float(v) for v in getattr(self, k)] for k in self.__dataclass_fields__}

    def take(self, index) -> "PeakTable":
        """Rows ``index`` as a new table."""
        return PeakTable(**{k: np.asarray(getattr(self, k))[index] for k in self.__dataclass_fields__})


@dataclass(frozen=True)
class PeakSearch:
    """Everything peak detection made: the grid spectrum, background and peaks.

    Attributes
    ----------
    spectrum : Spectrum
        Log-spaced grid spectrum the peaks were found on.
    smoothed : (n_bins,) ndarray of float
        Counts per bin after Gaussian smoothing (sigma 1 bin).
    background_per_bin : (n_bins,) ndarray of float
        Background model in counts per bin.
    background : Background
    peaks : PeakTable
    peak_bins : (n_peaks,) ndarray of int
        Grid bin of each peak maximum.
    resolving_power : float
        Median ``position / fwhm`` of the peaks with >= 100 net counts (``nan`` if none).
    relative_width : float
        ``d(ln m)`` of the grid bins.
    """

    spectrum: Spectrum
    smoothed: np.ndarray
    background_per_bin: np.ndarray
    background: Background
    peaks: PeakTable
    peak_bins: np.ndarray
    resolving_power: float
    relative_width: float

    def _pos(self, fractional_bin):
        return _grid_position(self.spectrum.edges_da[0], self.relative_width, fractional_bin)

    def extent(self, low_fraction: float = 0.1, high_fraction: float = 0.02, index=None):
        """Where each peak falls to a fraction of its height on the low and the high side.

        Parameters
        ----------
        low_fraction, high_fraction : float
            Fractions of the (prominence) height, in (0, 1).
        index : array of int, optional
            Peaks to measure (default all).

        Returns
        -------
        low_da, high_da : ndarray of float, Da
        """
        return _extent(self.smoothed - self.background_per_bin, self.peak_bins if index is None
                       else self.peak_bins[np.asarray(index)], low_fraction, high_fraction, self._pos)


def _grid_position(lo_da, rel, fractional_bin):
    """Da of a fractional bin index of a log grid (index i is the centre of bin i)."""
    return lo_da * np.exp(rel * (np.asarray(fractional_bin, dtype=float) + 0.5))


def _extent(x, bins, low_fraction, high_fraction, pos):
    from scipy.signal import peak_prominences, peak_widths

    bins = np.asarray(bins, dtype=np.intp)
    if bins.size == 0:
        return np.zeros(0), np.zeros(0)
    prom = peak_prominences(x, bins)
    left = peak_widths(x, bins, rel_height=1.0 - low_fraction, prominence_data=prom)[2]
    right = peak_widths(x, bins, rel_height=1.0 - high_fraction, prominence_data=prom)[3]
    return pos(left), pos(right)


def _poisson_z(n, b):
    """Significance of n counts over an expected b (likelihood-ratio form, signed)."""
    b = np.maximum(b, 1e-3)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(n > 0, n * np.log(n / b), 0.0) - (n - b)
    return np.sign(n - b) * np.sqrt(np.maximum(2.0 * t, 0.0))


def _candidates(s, bg, counts_cum, kernel_sq, min_counts, min_significance, half_window):
    """Local maxima of s - bg that pass the count and significance thresholds.

    The test counts ions in a fixed window of ``+- half_window`` bins (one expected FWHM) around
    each maximum, against the higher of the background and the prominence base, so that the
    window is not fitted to the noise. Returns bins and, per kept peak, fractional 10 % extents,
    gross counts in them, significance and prominence data.
    """
    from scipy.signal import find_peaks as _fp
    from scipy.signal import peak_widths

    x = s - bg
    noise = np.sqrt(kernel_sq * np.maximum(bg, 0.25))
    bins, props = _fp(x, prominence=0.0)
    # cheap pre-filter: the smoothed maximum must stand above noise
    keep = props["prominences"] > 2.0 * noise[bins]
    bins = bins[keep]
    prom = (props["prominences"][keep], props["left_bases"][keep], props["right_bases"][keep])
    if bins.size == 0:
        return bins, None
    _, _, l10, r10 = peak_widths(x, bins, rel_height=0.9, prominence_data=prom)
    l10 = np.minimum(l10, bins - 1.0)
    r10 = np.maximum(r10, bins + 1.0)
    gross = _interp_cum(counts_cum, r10 + 1.0) - _interp_cum(counts_cum, l10)  # bins l..r inclusive
    n = s.size
    a = np.clip(bins - half_window, 0, n)
    b = np.clip(bins + half_window + 1, 0, n)
    bg_cum = np.concatenate([[0.0], np.cumsum(bg)])
    ref = np.maximum(x[bins] - prom[0], 0.0)  # prominence base above the background, per bin
    n_win = counts_cum[b] - counts_cum[a]
    base = bg_cum[b] - bg_cum[a] + ref * (b - a)
    excess = n_win - base
    sig = _poisson_z(n_win, base)
    ok = (excess >= min_counts) & (sig >= min_significance)
    bins = bins[ok]
    info = dict(l10=l10[ok], r10=r10[ok], gross=gross[ok], sig=sig[ok],
                prom=tuple(p[ok] for p in prom))
    return bins, info


def _interp_cum(cum, x):
    """Linear interpolation of a cumulative array at fractional bin boundaries."""
    return np.interp(x, np.arange(cum.size, dtype=float), cum)


def _peak_free_mask(x, bins, prom, n_bins):
    """Bins outside every peak (from 1 FWHM below its 1 % point to 2 FWHM above)."""
    from scipy.signal import peak_widths

    free = np.ones(n_bins, dtype=bool)
    if bins.size == 0:
        return free
    w50 = peak_widths(x, bins, rel_height=0.5, prominence_data=prom)[0]
    _, _, l1, r1 = peak_widths(x, bins, rel_height=0.99, prominence_data=prom)
    lo = np.floor(l1 - np.maximum(w50, 1.0)).astype(np.int64)
    hi = np.ceil(r1 + 2.0 * np.maximum(w50, 1.0)).astype(np.int64)
    lo = np.clip(lo, 0, n_bins)
    hi = np.clip(hi + 1, 0, n_bins)
    diff = np.zeros(n_bins + 1, dtype=np.int64)
    np.add.at(diff, lo, 1)
    np.add.at(diff, hi, -1)
    free &= np.cumsum(diff)[:-1] == 0
    return free


def find_peaks(mass_to_charge, *, resolving_power: float = DEFAULT_RESOLVING_POWER, range_da=None,
               oversample: float = 4.0, min_counts: float = 10.0, min_significance: float = 5.0,
               background_half_width_u: float = 0.3, spectrum: Spectrum | None = None) -> PeakSearch:
    """Detect peaks in a mass spectrum on a background-aware signal.

    Parameters
    ----------
    mass_to_charge : (n_ions,) ndarray of float, Da
        Ignored when ``spectrum`` is given.
    resolving_power : float
        Assumed m/dm (FWHM); sets the grid: ``oversample`` bins per FWHM.
    range_da : (float, float), Da, optional
        Mass window (default 0.5 Da to the largest value, at most 500 Da).
    oversample : float
        Grid bins per FWHM at the assumed resolving power.
    min_counts : float
        Smallest excess (counts above the local base) of a peak.
    min_significance : float
        Smallest excess in Poisson standard deviations of the base.
    background_half_width_u : float, sqrt(Da)
        Half width of the background estimation window in ``sqrt(m/z)``.
    spectrum : Spectrum, optional
        A log-spaced grid spectrum to use instead of binning ``mass_to_charge``.

    Returns
    -------
    PeakSearch

    Raises
    ------
    InputError
        Empty input, no counts in the window, or bad parameters.
    """
    from scipy.ndimage import gaussian_filter1d

    if not (np.isfinite(resolving_power) and resolving_power > 0):
        raise InputError(f"find_peaks: resolving_power must be positive, got {resolving_power!r}")
    if not oversample >= 1:
        raise InputError(f"find_peaks: oversample must be >= 1, got {oversample!r}")
    rel = 1.0 / (oversample * float(resolving_power))
    if spectrum is None:
        spectrum = log_histogram(mass_to_charge, range_da, rel)
    else:
        e = spectrum.edges_da
        rel = float(np.log(e[1] / e[0]))
    c = spectrum.counts.astype(float)
    n = c.size
    s = gaussian_filter1d(c, _KERNEL_SIGMA_BINS, mode="constant")
    counts_cum = np.concatenate([[0.0], np.cumsum(c)])
    widths = spectrum.widths_da
    def pos(fb):
        return _grid_position(spectrum.edges_da[0], rel, fb)


    half = int(math.ceil(oversample))  # one expected FWHM either side
    # the background starts from all bins (biased high near peaks, so only clear peaks are
    # masked at first) and is re-estimated from the peak-free bins of each pass
    free = np.ones(n, dtype=bool)
    for _ in range(3):
        background = Background.from_spectrum(spectrum, free, background_half_width_u)
        bg = background.density_per_da(spectrum.centres_da) * widths
        bins, info = _candidates(s, bg, counts_cum, _KERNEL_SQ, min_counts, min_significance, half)
        free = _peak_free_mask(s - bg, bins, info["prom"] if info is not None else None, n)
    background = Background.from_spectrum(spectrum, free, background_half_width_u)
    bg = background.density_per_da(spectrum.centres_da) * widths
    bins, info = _candidates(s, bg, counts_cum, _KERNEL_SQ, min_counts, min_significance, half)
    peaks = _measure(spectrum, s, bg, background, bins, info, rel, pos)
    strong = peaks.net_counts >= 100
    rp = float(np.median(peaks.position_da[strong] / peaks.fwhm_da[strong])) if strong.any() else float("nan")
    return PeakSearch(spectrum, s, bg, background, peaks, np.asarray(bins, dtype=np.intp), rp, rel)


def _parabola_offset(s, b):
    """Sub-bin offset of the maximum of s at bin b from three points of log s."""
    if b < 1 or b > s.size - 2:
        return 0.0
    y0, y1, y2 = np.log(np.maximum(s[b - 1:b + 2], 1e-12))
    den = y0 - 2 * y1 + y2
    return float(np.clip(0.5 * (y0 - y2) / den, -0.5, 0.5)) if den < 0 else 0.0


def _measure(spectrum, s, bg, background, bins, info, rel, pos):
    """Peak table of the kept candidates."""
    from scipy.signal import peak_widths

    if bins.size == 0:
        z = np.zeros(0)
        return PeakTable(z, z, z, z, z, z, z, z, z, z)
    x = s - bg
    w50, _, l50, r50 = peak_widths(x, bins, rel_height=0.5, prominence_data=info["prom"])
    # position: vertex of a Gaussian (parabola in log counts) fitted to the background-subtracted
    # raw counts from one bin outside the half-maximum points, weighted by the counts
    net = np.maximum(spectrum.counts - bg, 0.0)
    centre = np.empty(bins.size)
    for k, (b, lo, hi) in enumerate(zip(bins, l50, r50)):
        i0 = max(min(int(np.floor(lo)) - 1, b - 2), 0)
        i1 = min(max(int(np.ceil(hi)) + 1, b + 2), net.size - 1)
        xi = np.arange(i0, i1 + 1, dtype=float) - b
        yi = net[i0:i1 + 1]
        ok = yi > 0
        c2 = None
        if ok.sum() >= 3:
            c2, c1, _ = np.polyfit(xi[ok], np.log(yi[ok]), 2, w=np.sqrt(yi[ok]))
        if c2 is not None and c2 < 0 and abs(c1 / (2 * c2)) <= (hi - lo) / 2 + 1:
            centre[k] = b - c1 / (2 * c2)
        else:
            centre[k] = b + _parabola_offset(s, b)
    position = pos(centre)
    # remove the smoothing kernel (FWHM 2.3548 sigma) in quadrature, in bins
    w50 = np.sqrt(np.maximum(w50 ** 2 - (2.3548 * _KERNEL_SIGMA_BINS) ** 2, 1.0))
    fwhm = position * (np.exp(rel * w50 / 2) - np.exp(-rel * w50 / 2))
    height = x[bins] / spectrum.widths_da[bins]
    low, high = pos(info["l10"] - 0.5), pos(info["r10"] + 0.5)
    bgc, _ = background.counts(low, high)
    dens = background.density_per_da(position)
    u = np.sqrt(position)
    _, _, free = background.rate(u)
    floor = 1.0 / (2.0 * u * np.maximum(free, 1e-12))
    sb = height / np.maximum(dens, floor)
    gross = info["gross"]
    return PeakTable(position, height, fwhm, low, high, gross, bgc, gross - bgc, sb, info["sig"])


@dataclass(frozen=True)
class PeakShape:
    """Line profile of the spectrum: where the ions of one isotope line land.

    Positions are measured from the line's (calibrated) peak top in units of the local width
    ``w(m) = m / R(m)`` with ``R(m) = r0 * (m / 30 Da) ** beta``; the profile is a Gaussian core
    ``N(mu, sigma)`` of which a share ``tail_fraction`` carries an exponential thermal tail of
    mean ``tail_scale`` towards high mass (an exponentially modified Gaussian).

    Attributes
    ----------
    r0 : float
        Resolving power ``m / w`` at 30 Da.
    beta : float
        Exponent of the resolving power's mass dependence.
    mu, sigma : float
        Core centre and standard deviation, in units of ``w``.
    tail_fraction : float
        Share of ions with a tail, in [0, 1].
    tail_scale : float
        Mean tail length, in units of ``w``.
    """

    r0: float
    beta: float = 0.0
    mu: float = 0.0
    sigma: float = 1.0 / 2.3548
    tail_fraction: float = 0.0
    tail_scale: float = 1.0

    def width_da(self, m_da):
        """Local width ``w(m)`` in Da."""
        m = np.asarray(m_da, dtype=float)
        return m / (self.r0 * (m / 30.0) ** self.beta)

    def cdf(self, x):
        """Share of a line's ions below ``x`` (units of ``w`` from the peak top)."""
        from scipy.special import log_ndtr, ndtr

        x = np.asarray(x, dtype=float)
        z = (x - self.mu) / self.sigma
        core = ndtr(z)
        if self.tail_fraction <= 0:
            return core
        lam = 1.0 / self.tail_scale
        with np.errstate(over="ignore"):
            tail = core - np.exp(-lam * (x - self.mu) + 0.5 * (lam * self.sigma) ** 2
                                 + log_ndtr(z - lam * self.sigma))
        return (1 - self.tail_fraction) * core + self.tail_fraction * np.clip(tail, 0.0, 1.0)

    def fraction(self, line_da, low_da, high_da):
        """Share of the ions of lines at ``line_da`` falling in ``[low_da, high_da)`` (broadcasts)."""
        line = np.asarray(line_da, dtype=float)
        w = self.width_da(line)
        return self.cdf((np.asarray(high_da) - line) / w) - self.cdf((np.asarray(low_da) - line) / w)

    def to_dict(self) -> dict:
        return {k: float(getattr(self, k)) for k in self.__dataclass_fields__}


def resolving_power_law(peaks: PeakTable, min_counts: float = 200.0, fallback: float = DEFAULT_RESOLVING_POWER):
    """Fit ``m / fwhm = r0 (m / 30)^beta`` to the strong peaks; returns ``(r0, beta)``."""
    ok = (peaks.net_counts >= min_counts) & (peaks.fwhm_da > 0)
    if ok.sum() < 2:
        return float(fallback), 0.0
    lx = np.log(peaks.position_da[ok] / 30.0)
    ly = np.log(peaks.position_da[ok] / peaks.fwhm_da[ok])
    if ok.sum() < 4 or np.ptp(lx) < 0.5:
        return float(np.exp(np.median(ly))), 0.0
    keep = np.ones(lx.size, dtype=bool)
    for _ in range(2):
        beta, a = np.polyfit(lx[keep], ly[keep], 1)
        res = ly - (a + beta * lx)
        mad = 1.4826 * np.median(np.abs(res[keep])) + 1e-9
        keep = np.abs(res) < 3 * mad
        if keep.sum() < 3:
            break
    beta = float(np.clip(beta, -1.0, 1.0))
    return float(np.exp(a)), beta


def fit_peak_shape(spectrum: Spectrum, background_per_bin, tops_da, r0: float, beta: float = 0.0,
                   window=(-5.0, 12.0)):
    """Fit a :class:`PeakShape` to isolated single-line peaks.

    Parameters
    ----------
    spectrum : Spectrum
        Fine (log-spaced) spectrum.
    background_per_bin : (n_bins,) ndarray of float
        Background model in counts per bin.
    tops_da : (n_peaks,) ndarray of float, Da
        Calibrated positions of the isolated lines (their peak tops).
    r0, beta : float
        Resolving-power law (see :func:`resolving_power_law`).
    window : (float, float)
        Fit window around each line, in units of ``w``.

    Returns
    -------
    PeakShape or None
        ``None`` if the fit fails or there are no usable peaks.
    """
    from scipy.optimize import least_squares

    base = PeakShape(r0, beta)
    e = spectrum.edges_da
    segs = []
    for t in np.asarray(tops_da, dtype=float):
        w = base.width_da(t)
        i0 = int(np.searchsorted(e, t + window[0] * w))
        i1 = int(np.searchsorted(e, t + window[1] * w)) - 1
        if i0 < 1 or i1 >= e.size - 1 or i1 - i0 < 8:
            continue
        xe = (e[i0:i1 + 1] - t) / w
        c = spectrum.counts[i0:i1].astype(float)
        b = np.asarray(background_per_bin)[i0:i1]
        if c.sum() - b.sum() < 50:
            continue
        segs.append((xe, c, b))
    if not segs:
        return None
    k = len(segs)

    def unpack(p):
        return PeakShape(r0, beta, p[0], math.exp(p[1]), 1 / (1 + math.exp(-p[2])), math.exp(p[3]))

    # all windows in one array: the shape's cdf is evaluated once per call over every edge, and the
    # differences across a window boundary (``inner`` false) are dropped
    xe_all = np.concatenate([xe for xe, _, _ in segs])
    inner = np.ones(xe_all.size - 1, dtype=bool)
    inner[np.cumsum([xe.size for xe, _, _ in segs])[:-1] - 1] = False
    c_all = np.concatenate([c for _, c, _ in segs])
    b_all = np.concatenate([b for _, _, b in segs])
    seg_of = np.repeat(np.arange(k), [c.size for _, c, _ in segs])

    def resid(p):
        sh = unpack(p)
        amp = np.array([math.exp(v) for v in p[4:]])  # math.exp, as for the other parameters
        model = amp[seg_of] * np.diff(sh.cdf(xe_all))[inner] + b_all
        return (c_all - model) / np.sqrt(np.maximum(model, 1.0))

    n0 = [math.log(max(c.sum() - b.sum(), 1.0)) for _, c, b in segs]
    p0 = np.array([0.0, math.log(0.4), 0.0, math.log(1.0)] + n0)
    lo = np.array([-2.0, math.log(0.05), -8.0, math.log(0.05)] + [-np.inf] * k)
    hi = np.array([2.0, math.log(3.0), 8.0, math.log(20.0)] + [np.inf] * k)
    try:
        fit = least_squares(resid, p0, bounds=(lo, hi), x_scale="jac", max_nfev=400)
    except (ValueError, FloatingPointError):
        return None
    if not fit.success and fit.status <= 0:
        return None
    return unpack(fit.x)
