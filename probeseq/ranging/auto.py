"""Ranging: from mass-to-charge values to element channels and a metal composition.

The stage in one call, :func:`auto_range`:

1. **Peaks.** :func:`probeseq.ranging.spectrum.find_peaks` bins the spectrum, models the background
   and finds the peaks.
2. **Prediction.** Every requested metal M is expected as M+, M++, M+++, MO+, MO++, MOH+ and
   MO2+; the framework as the small fragments of :data:`DEFAULT_FRAGMENTS` (or the ``species``
   given). Each ion's isotope lines come from :mod:`probeseq.ranging.isotopes`.
3. **Matching and calibration.** A coarse search for a common scale of ``sqrt(m/z)`` (flight
   time) aligns predicted lines with the strongest peaks; then peaks are matched to lines within
   half a peak width and ``sqrt(observed) = polynomial(sqrt(predicted))`` (degree 1 by default)
   is refined from unambiguous matches, twice. Residuals are reported.
4. **Ranges.** Each matched peak gets a window from its measured shape: down to
   ``low_fraction`` of its height on the low-mass side and ``high_fraction`` on the high-mass
   side, so the thermal tail is included; windows of neighbouring peaks are cut at the minimum
   between them. Only detected peaks get ranges; peaks no prediction explains are listed in
   ``unmatched``, never silently dropped.
5. **Background** under each range from the smooth background model fitted in the peak-free
   spectrum (:class:`probeseq.ranging.spectrum.Background`), integrated over the range.
6. **Amounts.** The background-subtracted counts of all ranges are written ``c = A @ n``, with
   ``A[j, s]`` the expected share of species s's ions in range j: its isotope fractions, each
   line's ions spread by the line shape measured on isolated peaks
   (:class:`probeseq.ranging.spectrum.PeakShape`: Gaussian core plus exponential thermal tail), so ions
   in tails outside the windows are counted too. Rows are added for the predicted lines of each
   candidate species that fall where there is no peak, so a species cannot be invented from
   one coinciding minor line. The amounts ``n >= 0`` are the weighted non-negative
   least-squares solution (``scipy.optimize.nnls``), re-weighted with the Poisson variance of
   the fitted model plus the background variance (the Poisson maximum-likelihood estimate
   where species do not overlap), with rows far off the model down-weighted; species whose
   amount stays below three standard errors are eliminated one at a time (Occam: a coinciding
   line of an unneeded species such as MnOH+ under 56FeO+ must not take counts from a real
   one). Ranges shared by several species (64Zn+/64Ni+, a doubly charged ion under a singly
   charged one) are thereby deconvolved, and a range holding partly resolved lines of a metal
   and another species (56Fe++ under CO+) is cut between them so that the fit sees where the
   ions fall. The ions of every range get probabilistic species ``shares``. A made range
   whose species explain less than a fifth of its counts is dropped and its peak listed as
   unmatched.
7. **Composition** of the metals in atomic fractions of metal atoms (a molecular ion counts the
   metal atoms it carries: ZnO+ is one Zn), with standard errors propagated from the amounts'
   covariance (Poisson counts and background).

Channels (:func:`assign_channels`) are then a pure function of the m/z array and the
:class:`RangeSet`, so they can be computed chunk by chunk: a range index per ion through a
lookup table on 1/1024-Da cells (cells that hold a range edge are resolved exactly), and a
per-range table of expected metal atoms per ion.

Range file format (TOML, format 1)
----------------------------------
One ``[[range]]`` table per mass-to-charge window; comments (``#``) are free::

    format = 1                  # layout version of this file
    metals = ["Co", "Zn"]       # metals of the run, in channel order (informational)

    [[range]]
    formula = "Co"              # ion species: element symbols with counts ("CoOH", "C2H2")
    charge = 1                  # charge state (integer >= 1)
    low = 58.842                # Da, window start (inclusive)
    high = 59.271               # Da, window end (exclusive): low <= m/z < high

    [[range]]
    formula = "Zn"
    charge = 1
    low = 63.842
    high = 64.301
    shares = { "Zn+" = 0.912, "Ni+" = 0.071 }   # optional, see below

``shares`` (optional) gives the fraction of the range's ions that belong to each species, keyed
by ion label (formula then one ``+`` per charge: ``"Ni+"``, ``"Zn++"``); whatever the shares
leave to 1 is background. probeseq writes them for every range it fits; ranges without shares
count fully as their own species. After moving a window by hand, delete its ``shares`` or pass
the file back through :func:`auto_range` (``ranges=``), which refits them. Ranges may touch but
not overlap; one peak shared by several species is one range listing them in ``shares``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError
from .calibration import (
    Calibration,
    _coarse_scale,
    _fit_calibration,
    _identity,
    _Lines,
    _lines,
    _match,
    _num,
    _parse_species,
    metal_species,
)
from .channels import ChannelAssignment, _check_metals, _lookup_for, assign_channels
from .isotopes import ion_label, metal_atoms, parse_formula
from .amounts import _composition, _design, _probe_rows, _solve_amounts, bound_errors
from .ranges import Range, RangeSet
from .spectrum import (
    DEFAULT_RESOLVING_POWER,
    Background,
    PeakSearch,
    PeakShape,
    PeakTable,
    Spectrum,
    find_peaks,
    fit_peak_shape,
    histogram,
    resolving_power_law,
)

__all__ = ['RangingResult', 'auto_range']

#: a made range is kept only if the fitted species explain at least this share of its net counts;
#: otherwise its peak is reported as unmatched (an ion nobody predicted on a minor isotope line)
_MIN_EXPLAINED = 0.2


# ============================================================================ quantification
# ============================================================================ result
@dataclass(frozen=True)
class RangingResult:
    """What :func:`auto_range` found and fitted.

    Attributes
    ----------
    metals : tuple of str
    ranges : RangeSet
        The ranges, with fitted ``shares`` (pass to :func:`assign_channels`).
    peaks : PeakTable
        All detected peaks.
    range_peak : (n_ranges,) ndarray of int
        Peak (row of ``peaks``) each range was made from; ``-1`` for ranges given by the user.
    unmatched : (n_unmatched,) ndarray of int
        Rows of ``peaks`` no predicted ion explains (left unranged).
    unmatched_nearest : tuple of str
        For each unmatched peak, the nearest predicted line, e.g. ``'Ni++ 28.968 Da (+0.210)'``.
    calibration : Calibration
    gross_counts : (n_ranges,) ndarray of float
        Ions in each range.
    background_counts, background_sigma : (n_ranges,) ndarray of float
        Background model integrated over each range and its standard error.
    deconvolved : tuple of int
        Ranges whose counts were split between two or more species (each >= 1 % of the range).
    species : tuple of (str, int)
        Species of the fit, ``(formula, charge)``.
    amounts, amounts_sigma : (n_species,) ndarray of float
        Fitted ions of each species over all its isotopes, and standard errors; a species the fit
        put at zero gets the error it would have if free (NaN where its lines cannot be told from
        the others'), so ``[0, 1.96 sigma]`` is its interval (:func:`~probeseq.ranging.amounts.bound_errors`).
    species_metal_atoms : (n_species, n_metals) ndarray of int
    metal_atoms, metal_atoms_sigma : (n_metals,) ndarray of float
        Metal atoms (over all isotopes, background removed) and standard errors.
    composition, composition_sigma : (n_metals,) ndarray of float
        Atomic fractions of metal atoms and standard errors.
    resolving_power : float
        Measured median m/dm (FWHM) of the strong peaks.
    peak_shape : PeakShape or None
        Line shape used in the amounts fit (``None``: lines counted as points).
    search : PeakSearch
        Grid spectrum, background model and peak bins.
    spectrum : Spectrum
        Uniform-bin spectrum for figures.
    fit_rows : tuple or None
        ``(A, gross, background, background_sigma)`` of the amounts fit: the design (rows: the
        ranges, then windows at predicted lines outside them; columns: species) and the counts it
        was fitted to, for a refit with more evidence (:func:`probeseq.ranging.spatial.refine_overlaps`).
    composition_spectrum : (n_metals,) ndarray of float or None
        The composition from the mass spectrum alone, before overlapped ranges were refitted with
        the ions' distance to the rod axes (None when nothing was refitted).
    overlap_refinement : tuple of dict
        What the refit from the ions' distance to the rod axes changed, one dict per overlapped
        range (empty when there was none).
    """

    metals: tuple
    ranges: RangeSet
    peaks: PeakTable
    range_peak: np.ndarray
    unmatched: np.ndarray
    unmatched_nearest: tuple
    calibration: Calibration
    gross_counts: np.ndarray
    background_counts: np.ndarray
    background_sigma: np.ndarray
    deconvolved: tuple
    species: tuple
    amounts: np.ndarray
    amounts_sigma: np.ndarray
    species_metal_atoms: np.ndarray
    metal_atoms: np.ndarray
    metal_atoms_sigma: np.ndarray
    composition: np.ndarray
    composition_sigma: np.ndarray
    resolving_power: float
    peak_shape: PeakShape | None
    search: PeakSearch
    spectrum: Spectrum
    fit_rows: tuple | None = None
    overlap_refinement: tuple = ()
    composition_spectrum: np.ndarray | None = None

    def composition_dict(self) -> dict:
        """``{metal: (fraction, sigma)}``."""
        return {m: (float(x), float(s)) for m, x, s in zip(self.metals, self.composition, self.composition_sigma)}

    def range_notes(self) -> list:
        """One comment per range for the range file."""
        notes = []
        for j, r in enumerate(self.ranges):
            p = int(self.range_peak[j])
            at = f"peak at {self.peaks.position_da[p]:.3f} Da, " if p >= 0 else ""
            notes.append(f"{at}{self.gross_counts[j]:.0f} ions, background {self.background_counts[j]:.1f}"
                         + (" (deconvolved)" if j in self.deconvolved else ""))
        for d in self.overlap_refinement:
            j = next((i for i, r in enumerate(self.ranges) if abs(r.low_da - d["low_da"]) < 1e-9), None)
            if j is not None and d["used"]:
                notes[j] += (f"; shares refitted from mass-to-charge and the ions' distance to the rod axes (metal "
                             f"share {d['metal_share_space']:.3f} +- {d['metal_share_space_err']:.3f} from space, "
                             f"{d['metal_share_spectrum']:.3f} from the spectrum alone)")
        return notes

    def to_toml(self, path=None) -> str:
        """Write the range file with a comment per range (see :meth:`RangeSet.to_toml`)."""
        return self.ranges.to_toml(path, notes=self.range_notes())

    def assign(self, mass_to_charge) -> ChannelAssignment:
        """:func:`assign_channels` with this result's ranges and metals."""
        return assign_channels(mass_to_charge, self.ranges, self.metals)

    def to_dict(self) -> dict:
        """JSON-able summary (composition, ranges, calibration, unmatched peaks, amounts)."""
        ranges = []
        for j, r in enumerate(self.ranges):
            ranges.append({"ion": r.label, "formula": r.formula, "charge": r.charge, "low_da": r.low_da,
                           "high_da": r.high_da, "counts": float(self.gross_counts[j]),
                           "background_counts": float(self.background_counts[j]),
                           "background_counts_err": float(self.background_sigma[j]),
                           "shares": {ion_label(f, z): p for f, z, p in r.shares},
                           "deconvolved": j in self.deconvolved,
                           "peak_da": (float(self.peaks.position_da[self.range_peak[j]])
                                       if self.range_peak[j] >= 0 else None)})
        un = []
        for i, near in zip(self.unmatched, self.unmatched_nearest):
            un.append({"position_da": float(self.peaks.position_da[i]), "counts": float(self.peaks.counts[i]),
                       "net_counts": float(self.peaks.net_counts[i]), "nearest_prediction": near})
        return {
            "metals": list(self.metals),
            "composition": {m: {"fraction": _num(x), "fraction_err": _num(s)}
                            for m, x, s in zip(self.metals, self.composition, self.composition_sigma)},
            "metal_atoms": {m: {"atoms": float(a), "atoms_err": float(s)}
                            for m, a, s in zip(self.metals, self.metal_atoms, self.metal_atoms_sigma)},
            "resolving_power": _num(self.resolving_power),
            "peak_shape": None if self.peak_shape is None else self.peak_shape.to_dict(),
            "calibration": self.calibration.to_dict(),
            "ranges": ranges,
            "deconvolved_ranges": [int(j) for j in self.deconvolved],
            "species": [{"ion": ion_label(f, z), "amount": float(a), "amount_err": _num(s),
                         "amount_low": _num(max(a - 1.96 * s, 0.0)), "amount_high": _num(a + 1.96 * s)}
                        for (f, z), a, s in zip(self.species, self.amounts, self.amounts_sigma)],
            "unmatched_peaks": un,
            "n_peaks": len(self.peaks),
            "overlap_refinement": [dict(r) for r in self.overlap_refinement],
            "composition_spectrum_only": (None if self.composition_spectrum is None else
                                          {m: float(v) for m, v in zip(self.metals, self.composition_spectrum)}),
        }


# ============================================================================ main entry point
def auto_range(mass_to_charge, metals, species=None, *, ranges: RangeSet | None = None,
               resolving_power: float = DEFAULT_RESOLVING_POWER, range_da=None, min_counts: float = 10.0,
               min_significance: float = 5.0, low_fraction: float = 0.1, high_fraction: float = 0.02,
               calibrate: bool = True, calibration_degree: int = 1, max_shift: float = 0.005,
               tolerance_fwhm: float = 0.5, peak_shape: bool = True) -> RangingResult:
    """Range a mass spectrum and quantify its metals (the stage's single entry point).

    Parameters
    ----------
    mass_to_charge : (n_ions,) ndarray of float, Da, or IonList
        Mass-to-charge of every ion.
    metals : sequence of str or str
        Metal symbols in channel order (``["Zn", "Ni"]`` or ``"Zn,Ni"``).
    species : sequence of str or (formula, charge), optional
        Framework ions to predict instead of :data:`DEFAULT_FRAGMENTS` (``["CO", "H2O", "C++"]``;
        one ``+`` per charge, none meaning 1+). Metal ions are always predicted.
    ranges : RangeSet, optional
        Use these ranges (e.g. an edited file) instead of making them: background, amounts,
        shares and composition are fitted for them; only the species they name are used.
    resolving_power : float
        Assumed m/dm (FWHM) for the peak-search grid (laser, straight flight path: about
        300-1000; recalled from memory). The measured value is reported.
    range_da : (float, float), Da, optional
        Mass window (default 0.5 Da to the largest value, at most 500 Da).
    min_counts, min_significance : float
        Peak detection thresholds (see :func:`probeseq.ranging.spectrum.find_peaks`).
    low_fraction, high_fraction : float
        A range extends down to these fractions of its peak's height on the low-mass and the
        high-mass side (the smaller high-side value takes in the thermal tail).
    calibrate : bool
        Fit the mass calibration (otherwise lines are used at their predicted positions).
    calibration_degree : int
        Degree of the polynomial in ``sqrt(m/z)`` (0 = scale only; lowered when few peaks match).
    max_shift : float
        Largest relative error of ``sqrt(m/z)`` the coarse alignment searches (0.005 is 1 % in m/z).
    tolerance_fwhm : float
        A peak matches a line within this many FWHM of the peak.
    peak_shape : bool
        Fit the line shape (Gaussian core with an exponential thermal tail) to isolated peaks and
        use it in the amounts fit, so that tails outside the windows are counted, and cut ranges
        between partly resolved lines of a metal and another species. Without it (or when fewer
        than two isolated peaks exist) a line counts fully in the range holding its position.

    Returns
    -------
    RangingResult

    Raises
    ------
    InputError
        Bad metals/species/parameters; no counts in the window; a metal with no peak near any of
        its predicted positions (the message says where it looked and what it found); a user
        range that holds no line of its species.
    """
    m = getattr(mass_to_charge, "mass_to_charge", mass_to_charge)
    m = np.asarray(m)
    metals = _check_metals(metals)
    _check_auto_range_args(low_fraction, high_fraction, tolerance_fwhm, max_shift, calibration_degree)
    search = find_peaks(m, resolving_power=resolving_power, range_da=range_da, min_counts=min_counts,
                        min_significance=min_significance)
    peaks = search.peaks
    rp = search.resolving_power if math.isfinite(search.resolving_power) else float(resolving_power)
    cand = _candidate_species(metals, species, ranges)
    lines = _lines(cand)
    label_of = lambda idx: ion_label(*cand[int(lines.sp[idx[np.argmax(lines.frac[idx])]])])  # noqa: E731
    cal, cands, cal_pos = _calibrate_and_match(peaks, lines, calibrate, max_shift, tolerance_fwhm,
                                               calibration_degree, label_of)

    r0, beta = resolving_power_law(peaks, fallback=rp)
    fwhm_at = PeakShape(r0, beta).width_da
    if ranges is None:
        _require_metals(metals, cand, lines, cal_pos, cands, peaks, tolerance_fwhm, fwhm_at)
        rs, range_peak = _make_ranges(search, cands, lines, cand, low_fraction, high_fraction, metals)
    else:
        rs, range_peak = ranges, np.full(len(ranges), -1, dtype=np.int64)

    auto = ranges is None
    args = (m, search, lines, cal_pos, cand, metals, auto)
    rs, range_peak, fit, shape, fwhm_at = _quantify_ranges(rs, range_peak, fwhm_at, r0, beta, peak_shape, args)
    atoms = np.array([metal_atoms(f, metals) for f, _ in cand]).reshape(len(cand), len(metals))
    amounts, cov = fit["amounts"], fit["cov"]
    M, M_sig, x, x_sig = _composition(amounts, cov, atoms)
    mu, bgc = fit["mu"], fit["bg"]
    _require_metal_shares(metals, M, atoms, mu, len(rs),
                          (cand, lines, cal_pos, peaks, tolerance_fwhm, fwhm_at))
    rs, deconv = _share_ranges(rs, mu, bgc, cand, metals, auto)

    matched_peaks = set(int(p) for p in range_peak if p >= 0)
    unmatched = np.array([p for p in range(len(peaks)) if p not in matched_peaks
                          and not _inside_any(peaks.position_da[p], rs)], dtype=np.int64)
    nearest = tuple(_nearest_line(peaks.position_da[p], lines, cal_pos, cand) for p in unmatched)
    return RangingResult(
        metals=metals, ranges=rs, peaks=peaks, range_peak=np.asarray(range_peak, dtype=np.int64),
        unmatched=unmatched, unmatched_nearest=nearest, calibration=cal, gross_counts=fit["gross"],
        background_counts=bgc, background_sigma=fit["bg_sigma"], deconvolved=tuple(deconv), species=cand,
        amounts=amounts, amounts_sigma=bound_errors(*fit["rows"], amounts, cov), species_metal_atoms=atoms,
        metal_atoms=M, metal_atoms_sigma=M_sig, composition=x, composition_sigma=x_sig, resolving_power=rp,
        peak_shape=shape, search=search, spectrum=histogram(m, range_da=(search.spectrum.edges_da[0], search.spectrum.edges_da[-1]),
                                          resolving_power=rp), fit_rows=fit["rows"])


def _check_auto_range_args(low_fraction, high_fraction, tolerance_fwhm, max_shift, calibration_degree):
    """Check the numeric options of :func:`auto_range` (raises InputError)."""
    for name, v, lo, hi in (("low_fraction", low_fraction, 0, 1), ("high_fraction", high_fraction, 0, 1),
                            ("tolerance_fwhm", tolerance_fwhm, 0, 10), ("max_shift", max_shift, -1e-12, 0.1)):
        if not lo < v < hi:
            raise InputError(f"auto_range: {name} must be in ({max(lo, 0):g}, {hi:g}), got {v!r}")
    if isinstance(calibration_degree, bool) or not isinstance(calibration_degree, int) or \
            not 0 <= calibration_degree <= 3:
        raise InputError(f"auto_range: calibration_degree must be 0, 1, 2 or 3, got {calibration_degree!r}")


def _candidate_species(metals, species, ranges):
    """Species to predict lines for: the metals' and framework ions, or those the given ranges name."""
    if ranges is None:
        metal_sp = tuple(s for el in metals for s in metal_species(el))
        return tuple(dict.fromkeys(metal_sp + _parse_species(species)))
    if not isinstance(ranges, RangeSet):
        raise InputError(f"auto_range: ranges must be a RangeSet, got {type(ranges).__name__}")
    return ranges.species()


def _calibrate_and_match(peaks, lines, calibrate, max_shift, tolerance_fwhm, calibration_degree, label_of):
    """Fit the mass calibration (when asked) and match peaks to lines.

    Returns ``(cal, cands, cal_pos)``.
    """
    cal = _identity()
    if calibrate and len(peaks):
        s = _coarse_scale(peaks, lines, max_shift)
        cal = Calibration(np.array([s, 0.0]))
        for _ in range(3):
            cands, _ = _match(peaks, lines, cal, tolerance_fwhm, _floor(cal))
            cal = _fit_calibration(peaks, lines, cands, calibration_degree, label_of)
    cands, cal_pos = _match(peaks, lines, cal, tolerance_fwhm, _floor(cal))
    return cal, cands, cal_pos


def _quantify_ranges(rs, range_peak, fwhm_at, r0, beta, peak_shape, args):
    """Fit the amounts with lines as points, then with the measured peak shape.

    ``args`` is ``(m, search, lines, cal_pos, cand, metals, auto)``. Returns
    ``(rs, range_peak, fit, shape, fwhm_at)``.
    """
    _, search, lines, cal_pos, cand, metals, auto = args
    rs, range_peak, fit = _fit_ranges(rs, range_peak, fwhm_at, None, *args)
    shape = _fit_shape(search, rs, fit, lines, cal_pos, r0, beta) if peak_shape else None
    if shape is not None:
        fwhm_at = shape.width_da
        if auto:
            rs, range_peak = _split_ranges(rs, range_peak, fit, lines, cal_pos, cand, shape, metals)
        rs, range_peak, fit = _fit_ranges(rs, range_peak, fwhm_at, shape, *args)
    if not auto:
        _require_user_species(rs, fit["A_hard"], cand, cal_pos, lines, fit["A"])
    return rs, range_peak, fit, shape, fwhm_at


def _require_metal_shares(metals, M, atoms, mu, n_ranges, context):
    """Raise InputError for a metal the fit gives no ions or no range mainly holds.

    ``context`` is ``(cand, lines, cal_pos, peaks, tolerance_fwhm, fwhm_at)`` for the message.
    """
    cand, lines, cal_pos, peaks, tolerance_fwhm, fwhm_at = context
    for k, el in enumerate(metals):
        if not M[k] > 0:
            raise InputError(_no_metal_message(el, cand, lines, cal_pos, peaks, tolerance_fwhm, fwhm_at,
                                               "the fit gives it no ions (its peaks are explained by other species)"))
    main_sp = [int(np.argmax(mu[j])) for j in range(n_ranges)]
    for k, el in enumerate(metals):
        if not any(atoms[s, k] > 0 for s in main_sp):
            raise InputError(_no_metal_message(el, cand, lines, cal_pos, peaks, tolerance_fwhm, fwhm_at,
                                               "no detected peak is mainly its ions"))


def _share_ranges(rs, mu, bgc, cand, metals, auto):
    """Label each range with its main species and its species shares.

    Returns ``(rs, deconv)``: the relabelled RangeSet and the indices of ranges holding two or
    more species of at least 1 % each.
    """
    new_ranges, deconv = [], []
    for j, r in enumerate(rs):
        tot = mu[j].sum() + max(bgc[j], 0.0)
        share = mu[j] / tot if tot > 0 else mu[j]
        order = np.argsort(share)[::-1]
        keep = [s for s in order if share[s] >= 1e-4]
        if sum(share[s] >= 0.01 for s in keep) >= 2:
            deconv.append(j)
        own = cand.index((r.formula, r.charge)) if (r.formula, r.charge) in cand else None
        if not keep:  # a given range the fit leaves empty: its own species with share 0
            keep = [own] if own is not None else [int(order[0])]
        main = (r.formula, r.charge) if not auto and own is not None and mu[j][own] > 0 else cand[keep[0]]
        if own is not None and own not in keep and not auto:
            keep.append(own)
        sh = tuple((cand[s][0], cand[s][1], round(float(share[s]), 6)) for s in keep)
        new_ranges.append(Range(r.low_da, r.high_da, main[0], main[1], sh))
    return RangeSet(tuple(new_ranges), metals, rs.source), deconv


def _fit_ranges(rs, range_peak, fwhm_at, shape, m, search, lines, cal_pos, cand, metals, auto):
    """Quantify; for made ranges drop those the fit leaves (nearly) unexplained, then refit."""
    for _ in range(4):
        protected = None if auto else np.array([any((r.formula, r.charge) == c for r in rs) for c in cand])
        fit = _quantify(m, rs, search, lines, cal_pos, cand, fwhm_at, shape, protected)
        if not auto:
            break
        explained = fit["mu"].sum(1)
        net = fit["gross"] - fit["bg"]
        empty = [j for j in range(len(rs)) if explained[j] <= 0 or explained[j] < _MIN_EXPLAINED * net[j]]
        if not empty:
            break
        keep = [j for j in range(len(rs)) if j not in empty]
        rs = RangeSet(tuple(rs[j] for j in keep), metals)
        range_peak = range_peak[keep]
    return rs, range_peak, fit


def _fit_shape(search: PeakSearch, rs: RangeSet, fit, lines: _Lines, cal_pos, r0, beta, n_max: int = 12):
    """Peak shape from the strongest ranges that hold one isolated line of one species."""
    mu, A = fit["mu"], fit["A_hard"]
    active = fit["amounts"] > 0
    strong = active[lines.sp] & (lines.rel >= 0.01)
    w_of = PeakShape(r0, beta).width_da
    net = fit["gross"] - fit["bg"]
    picks = []
    for j in np.argsort(net)[::-1]:
        if net[j] < 300 or len(picks) >= n_max:
            break
        tot = mu[j].sum()
        s = int(np.argmax(mu[j]))
        if tot <= 0 or mu[j, s] < 0.97 * tot:
            continue
        inside = np.flatnonzero((lines.sp == s) & (cal_pos >= rs[j].low_da) & (cal_pos < rs[j].high_da))
        if inside.size == 0:
            continue
        li = inside[np.argmax(lines.frac[inside])]
        if lines.frac[li] < 0.97 * A[j, s]:
            continue
        t = cal_pos[li]
        w = float(w_of(t))
        near = strong & (cal_pos > t - 6 * w) & (cal_pos < t + 14 * w)
        near[li] = False
        others = search.peaks.position_da
        if near.any() or np.any((np.abs(others - t) > 0.5 * w) & (others > t - 6 * w) & (others < t + 14 * w)):
            continue
        picks.append(t)
    if len(picks) < 2:
        return None
    return fit_peak_shape(search.spectrum, search.background_per_bin, np.array(picks), r0, beta)


def _split_ranges(rs, range_peak, fit, lines: _Lines, cal_pos, cand, shape, metals, min_sep: float = 0.4):
    """Cut a range between lines of different species (one a metal) that sit >= min_sep w apart.

    The cut gives the fit the position information of a partly resolved doublet (Fe++ under
    CO+, say); the peak shape tells how each line's ions fall on either side.
    """
    amounts = fit["amounts"]
    has_metal = np.array([metal_atoms(f, metals).any() for f, _ in cand])
    out, peaks_out = [], []
    for j, r in enumerate(rs):
        inside = np.flatnonzero((cal_pos >= r.low_da) & (cal_pos < r.high_da) & (amounts[lines.sp] > 0))
        expected = lines.frac[inside] * amounts[lines.sp[inside]]
        total = fit["gross"][j]
        inside = inside[expected >= max(20.0, 0.02 * total)]
        cuts = []
        if inside.size >= 2:
            order = inside[np.argsort(cal_pos[inside])]
            pos = cal_pos[order]
            w = shape.width_da(pos)
            for a, b, wa in zip(order[:-1], order[1:], w[:-1]):
                sa, sb = lines.sp[a], lines.sp[b]
                if sa != sb and (has_metal[sa] or has_metal[sb]) and cal_pos[b] - cal_pos[a] >= min_sep * wa:
                    cuts.append(0.5 * (cal_pos[a] + cal_pos[b]))
        edges = [r.low_da] + cuts + [r.high_da]
        for lo, hi in zip(edges[:-1], edges[1:]):
            out.append(Range(lo, hi, r.formula, r.charge))
            peaks_out.append(range_peak[j])
    return RangeSet(tuple(out), metals), np.asarray(peaks_out, dtype=np.int64)


def _floor(cal: Calibration) -> float:
    """Smallest matching tolerance, Da: three times the calibration scatter (at least 1 mDa)."""
    return max(3.0 * cal.rms_da, 1e-3) if math.isfinite(cal.rms_da) else 1e-3


def _inside_any(x, rs: RangeSet) -> bool:
    k = int(np.searchsorted(rs.lows_da, x, side="right")) - 1
    return k >= 0 and x < rs.highs_da[k]


def _nearest_line(x, lines: _Lines, cal_pos, cand) -> str:
    strong = lines.rel >= 0.05
    idx = np.flatnonzero(strong)
    if idx.size == 0:
        return "none"
    i = idx[np.argmin(np.abs(cal_pos[idx] - x))]
    return f"{ion_label(*cand[int(lines.sp[i])])} {cal_pos[i]:.3f} Da ({x - cal_pos[i]:+.3f})"


def _metal_lines(el, cand, lines):
    """Line index of the strongest line of each predicted ion of a metal."""
    out = []
    for s, (f, z) in enumerate(cand):
        if parse_formula(f).get(el, 0) > 0:
            idx = np.flatnonzero(lines.sp == s)
            out.append((s, int(idx[np.argmax(lines.frac[idx])])))
    return out


def _require_metals(metals, cand, lines, cal_pos, cands, peaks, tol_fwhm, fwhm_at):
    """Raise when a metal has no detected peak at the strongest line of any of its ions."""
    matched_lines = set(int(i) for c in cands for i in c)
    for el in metals:
        if not any(li in matched_lines for _, li in _metal_lines(el, cand, lines)):
            raise InputError(_no_metal_message(el, cand, lines, cal_pos, peaks, tol_fwhm, fwhm_at,
                                               "no detected peak there"))


def _no_metal_message(el, cand, lines, cal_pos, peaks, tol_fwhm, fwhm_at, why):
    looked = []
    for s, li in _metal_lines(el, cand, lines)[:5]:
        looked.append(f"{ion_label(*cand[s])} {lines.pos[li]:.3f}")
    tol = tol_fwhm * float(fwhm_at(60.0))
    if len(peaks):
        found = []
        for s, li in _metal_lines(el, cand, lines)[:3]:
            p = int(np.argmin(np.abs(peaks.position_da - cal_pos[li])))
            found.append(f"{peaks.position_da[p]:.3f} ({peaks.net_counts[p]:.0f} ions)")
        what = "nearest peaks found: " + ", ".join(found)
    else:
        what = "no peaks were detected at all"
    return (f"metal '{el}': {why}; looked for " + ", ".join(looked)
            + f" Da (predicted; within about +-{tol:.2f} Da at 60 Da after calibration); {what}")


def _make_ranges(search: PeakSearch, cands, lines: _Lines, cand, low_fraction, high_fraction, metals):
    """A range per matched peak, windows from the peak shape, cut at minima between neighbours."""
    peaks = search.peaks
    n = len(peaks)
    if n == 0:
        return RangeSet((), metals), np.zeros(0, dtype=np.int64)
    lo, hi = search.extent(low_fraction, high_fraction)
    pos, fw = peaks.position_da, peaks.fwhm_da
    lo = np.clip(lo, pos - 3 * fw, pos - 0.5 * fw)
    hi = np.clip(hi, pos + 0.5 * fw, pos + 8 * fw)
    # cut overlapping windows of neighbouring peaks (matched or not) at the minimum between them
    sm = search.smoothed
    centres = search.spectrum.centres_da
    b = search.peak_bins
    for i in range(n - 1):
        if hi[i] > lo[i + 1]:
            seg = sm[b[i]:b[i + 1] + 1]
            cut = centres[b[i] + int(np.argmin(seg))] if seg.size else 0.5 * (pos[i] + pos[i + 1])
            cut = min(max(cut, pos[i]), pos[i + 1])
            hi[i] = min(hi[i], cut)
            lo[i + 1] = max(lo[i + 1], cut)
    out, rp = [], []
    for p in range(n):
        c = cands[p]
        if c.size == 0 or hi[p] <= lo[p]:
            continue
        main = cand[int(lines.sp[c[np.argmax(lines.frac[c])]])]
        out.append(Range(float(lo[p]), float(hi[p]), main[0], main[1]))
        rp.append(p)
    return RangeSet(tuple(out), metals), np.asarray(rp, dtype=np.int64)


def _quantify(m, rs: RangeSet, search: PeakSearch, lines: _Lines, cal_pos, cand, fwhm_at, shape=None,
              protected=None, min_z: float = 3.0):
    """Background, design matrix, NNLS amounts for a range set.

    ``protected`` marks species never eliminated (the labels of user-given ranges).
    """
    n_sp = len(cand)
    lows, highs = rs.lows_da, rs.highs_da
    if len(rs):
        ri = _lookup_for(rs)(m)
        gross = np.bincount(ri + 1, minlength=len(rs) + 1)[1:].astype(float)
    else:
        gross = np.zeros(0)
    # background model with the ranges themselves masked too
    spec = search.spectrum
    free = np.diff(search.background.cum_free) > 0
    c = spec.centres_da
    if len(rs):
        k = np.searchsorted(lows, c, side="right") - 1
        in_r = (k >= 0) & (c < highs[np.maximum(k, 0)])
        free &= ~in_r
    bgm = Background.from_spectrum(spec, free, search.background.half_width_u)
    bg, bg_sig = bgm.counts(lows, highs)
    A_hard = _design(lows, highs, lines, cal_pos, n_sp)
    active = A_hard.sum(0) > 0
    A = A_hard if shape is None else _design(lows, highs, lines, cal_pos, n_sp, shape)
    p_lo, p_hi = _probe_rows(lows, highs, lines, cal_pos, active, fwhm_at)
    if p_lo.size:
        cum = np.concatenate([[0.0], np.cumsum(spec.counts)])
        e = spec.edges_da
        p_gross = np.interp(p_hi, e, cum) - np.interp(p_lo, e, cum)
        p_bg, p_bg_sig = bgm.counts(p_lo, p_hi)
        A_p = _design(p_lo, p_hi, lines, cal_pos, n_sp, shape)
    else:
        p_gross = p_bg = p_bg_sig = np.zeros(0)
        A_p = np.zeros((0, n_sp))
    A_all = np.vstack([A, A_p])
    rows = (np.concatenate([gross, p_gross]), np.concatenate([bg, p_bg]), np.concatenate([bg_sig, p_bg_sig]))
    amounts = np.zeros(n_sp)
    cov = np.zeros((n_sp, n_sp))
    use = active.copy()
    keep = np.zeros(n_sp, dtype=bool) if protected is None else np.asarray(protected, dtype=bool)
    # backward elimination: drop the least significant species while it is below min_z standard
    # errors (Occam: a coinciding line of an unneeded species must not take counts from a real one)
    while use.any():
        x, cv, _ = _solve_amounts(A_all[:, use], *rows)
        sd = np.sqrt(np.maximum(np.diag(cv), 0.0))
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(sd > 0, x / sd, np.inf)
        weak = (x > 0) & (z < min_z) & ~keep[use]
        if not weak.any():
            break
        use[np.flatnonzero(use)[np.flatnonzero(weak)[np.argmin(z[weak])]]] = False
    if use.any():
        amounts[use] = x
        cov[np.ix_(use, use)] = cv
    mu = A * amounts[None, :]
    return {"gross": gross, "bg": bg, "bg_sigma": bg_sig, "A": A, "A_hard": A_hard, "amounts": amounts,
            "cov": cov, "mu": mu, "rows": (A_all,) + rows}


def _require_user_species(rs: RangeSet, A, cand, cal_pos, lines, A_shape=None):
    """Each user range must hold a line of its own species, or a measurable part of its peak shape
    (a window cut from a partly resolved pair holds the tail of its line, not the line itself)."""
    for j, r in enumerate(rs):
        s = cand.index((r.formula, r.charge))
        if A[j, s] <= 0 and (A_shape is None or A_shape[j, s] < 1e-3):
            idx = np.flatnonzero(lines.sp == s)
            near = idx[np.argmin(np.abs(cal_pos[idx] - 0.5 * (r.low_da + r.high_da)))]
            raise InputError(f"{rs.source or 'ranges'}: range {r.low_da:g}-{r.high_da:g} Da ({r.label}) holds no "
                             f"isotope line of {r.label}; its nearest line is at {cal_pos[near]:.3f} Da")
