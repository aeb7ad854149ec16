"""Sanity checks of a lattice registration: a lattice constant or a length unit far off is named.

Two situations are caught, both from the data alone:

* **After a registration**, a fitted lateral scale outside ``1 +- SCALE_WARN`` means that the
  lattice constant given (or the reconstruction's lateral calibration) is off by that much; a
  :class:`~probeseq.exceptions.DataQualityWarning` says so, with the lattice constant the data
  suggest. A lattice far off can also match *part* of the pattern inside the normal scale range
  (one twice as dense holds every rod and empty ones between; one twice as sparse holds every
  other rod). A registration that looks doubtful (scale outside the band or at the edge of the
  searched range, a refined scale far from the Fourier estimate, a poor quality, or spectral power
  where the placed lattice predicts none or none where it predicts its strongest peaks) is
  compared with the candidates of a *wide* scale search (``WIDE_SCALE_RANGE``), each refitted in
  full; when one explains the ions clearly better (log-likelihood per ion), :class:`InputError`
  names its scale.
* **When no lattice signal is found**, the error names the causes it can check:

  - positions in angstrom read as nm: a lateral extent larger than an atom-probe specimen, a
    metal-ion density far below what a solid of this lattice gives, or the lattice found once the
    positions are divided by 10 (suggests ``--length-unit angstrom``);
  - a lattice constant far off: the wide scale search finds a lattice peak at scale ``s`` that a
    full refit confirms;
  - otherwise too few metal ions, not a crystal, or the wrong metals ranged.

Cost: on the normal path only the spectrum comparison (a few hundred samples of the spectrum the
normal search made, a few ms). The wide search (a power spectrum of the lowest-order peaks and a
coarse rotation-scale grid, about as many grid points as the normal search, then up to three
refits) runs only when there is no signal or the registration looks doubtful.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..exceptions import DataQualityWarning, InputError
from .fourier import (
    _FFT_MAX,
    _power_spectrum,
    _reciprocal_set,
    _score_grid,
    _slab_edges,
)
from .locator import _rot
from .model import Lattice

__all__ = ['MAX_SPECIMEN_RADIUS_NM', 'SCALE_WARN', 'WIDE_SCALE_RANGE', 'NoLatticeSignal', 'SearchData',
           'check_registered_scale', 'diagnose_no_signal', 'information_per_ion', 'metal_ion_density',
           'scale_hint', 'spectrum_mismatch', 'wide_candidates']

#: a fitted lateral scale farther than this from 1 (relative) draws a warning: the lattice constant
#: or the reconstruction's lateral calibration is off by more than 10 % (project choice; simulated
#: reconstructions are drawn within 4 %)
SCALE_WARN = 0.10


#: lateral scales searched before giving up, or when a registration looks doubtful (a lattice
#: constant off by a factor of two either way, with margin)
WIDE_SCALE_RANGE = (0.45, 2.25)


#: a candidate of the wide search is refitted only when its peak power beats that of the registered
#: placement (same spectrum and peaks) by this factor (project choice: on simulated runs a partial
#: match of a lattice far off reaches about half to 0.8 of the full match's power)
WIDE_PEAK_GAIN = 1.1


#: a registration of quality below this, or whose refined scale moved more than
#: ``SUSPECT_SCALE_JUMP`` (relative) from the Fourier estimate, is checked against the wide search
#: (project choice: correct registrations of simulated runs move by < 0.5 %)
SUSPECT_QUALITY = 0.1
SUSPECT_SCALE_JUMP = 0.03


#: a placement found by the wide search overrules the registration when it explains the ions better
#: by this many nats per ion (:func:`information_per_ion`; a lattice with k times the rods of the
#: pattern loses ln k, at least ln 2 = 0.69; project choice)
INFO_MARGIN = 0.1


#: when no signal is found, a placement of the wide search is claimed only with a quality of at
#: least ``QUALITY_FLOOR`` and at least ``INFO_FLOOR`` nats per ion (project choice: uniform random
#: ions give qualities within 0.02 of 0 and about 0 nats per ion)
QUALITY_FLOOR = 0.07
INFO_FLOOR = 0.02


#: a registration is doubtful when the spectrum holds, where the placed lattice predicts no peak,
#: power of at least this share of its mean peak power, or when the lattice's shortest predicted
#: peaks hold less than half of that (:func:`spectrum_mismatch`; project choice: on simulated runs
#: a correct placement shows < 0.05 of its mean power at unpredicted positions and > 0.2 in the
#: first shell)
MISMATCH_FRAC = 0.2


#: the wide search uses the reciprocal peaks up to this multiple of the shortest one (the lowest
#: orders, which a blur of the data leaves; project choice)
LOW_ORDER = 2.1


#: most depth slabs summed in the power spectra of the checks here (one 2-D FFT each; more than the
#: normal search so that thin slabs still use most ions)
WIDE_SLABS = 24


#: largest plausible lateral radius of the metal ions, nm (common practice; recalled from memory:
#: specimen apex radii of tens of nm, so a radius of hundreds of "nm" is a slip of units)
MAX_SPECIMEN_RADIUS_NM = 150.0


#: detection efficiency assumed for the expected ion density (common practice; recalled from
#: memory: atom-probe detectors record roughly 35-80 % of the field-evaporated ions)
DETECTION_EFFICIENCY = 0.5


#: metal ions this many times sparser than the lattice's sites times ``DETECTION_EFFICIENCY`` are
#: not a solid measured in nm (angstrom read as nm gives 1000 times; project choice)
DENSITY_SHORTFALL = 100.0


ANGSTROM_PER_NM = 10.0


_N_INFO = 20_000  # ions on which the information per ion of two placements is compared


class NoLatticeSignal(InputError):
    """No lattice signal in the metal-ion density (the causes are diagnosed by the caller)."""


@dataclass(frozen=True)
class SearchData:
    """Centred metal-ion positions and the fixed values of a registration, for the checks here.

    Attributes
    ----------
    xr, yr, z : (n,) ndarray of float, nm
        Positions, laterally centred on the specimen.
    lattice : Lattice
    period : float, degrees
        Rotational symmetry period of the rod pattern.
    rotation_deg, scale : float or None
        Values given as overrides (degrees; reconstruction / crystal length).
    tilt : (2,) ndarray or None
        Fixed rod direction (dx/dz, dy/dz).
    z_ref_nm, max_tilt_deg : float
        Reference depth (nm) and largest tilt searched (degrees).
    scale_range : (float, float)
        Scales of the normal search.
    min_peak : float
        Smallest peak power (times the background) taken as a lattice signal.
    center : (2,) ndarray of float, nm
        The lateral centre subtracted (``x = xr + center[0]``).
    """

    xr: np.ndarray
    yr: np.ndarray
    z: np.ndarray
    lattice: Lattice
    period: float
    rotation_deg: float | None
    scale: float | None
    tilt: np.ndarray | None
    z_ref_nm: float
    max_tilt_deg: float
    scale_range: tuple
    min_peak: float
    center: np.ndarray


# ====================================================================== Fourier search
@dataclass(frozen=True)
class _Peaks:
    """The summed slab power spectrum of the metal ions and the lattice's reciprocal peaks."""

    spec: object
    g: np.ndarray
    w: np.ndarray
    period: float

    def grid(self, scale_range, rotation_deg, scale):
        """Rotations (degrees), scales and the (rotations, scales) grid of peak power: 0.5 degrees
        and 0.8 % in scale, so a range five times wider than the normal one costs about as much."""
        ths = np.arange(0.0, self.period, 0.5) if rotation_deg is None else np.array([float(rotation_deg)])
        if scale is None:
            lo, hi = scale_range
            ss = np.exp(np.arange(math.log(lo), math.log(hi) + 1e-9, 0.008))
        else:
            ss = np.array([float(scale)])
        return ths, ss, _score_grid(self.spec, self.g, self.w, ths, ss)

    def score(self, rotation_deg: float, scale: float) -> float:
        """Peak power (times the background) of the placement ``(rotation_deg, scale)``."""
        return float(_score_grid(self.spec, self.g, self.w, [rotation_deg], [scale])[0, 0])


def _peaks(d: SearchData, s_lo: float, factor: float = 1.0, low_order: bool = False):
    """:class:`_Peaks` of the positions divided by ``factor``, on a spectrum pixel fine enough that
    the lattice's peaks stay below 0.7 x Nyquist down to the scale ``s_lo`` (``None`` without peaks).

    With ``low_order`` only the peaks up to ``LOW_ORDER`` times the shortest one enter: they survive
    a blur of the data that the model weights do not foresee at a scale far from 1 (the candidates
    they find are confirmed by a full refit).
    """
    lat = d.lattice
    d_nn = lat.nearest_rod_distance_nm
    xr, yr, z = d.xr / factor, d.yr / factor, d.z / factor
    k_max = 3.0 / d_nn
    if low_order:
        g_all = _reciprocal_set(lat, k_max, d_nn / 6.0)[1]
        if g_all.shape[0]:
            k_max = min(k_max, LOW_ORDER * float(np.linalg.norm(g_all, axis=1).min()))
    h = min(d_nn / 6.0 * min(1.0, s_lo / 0.8), 0.35 * s_lo / k_max)
    if d.tilt is not None:
        xr = xr - d.tilt[0] * (z - d.z_ref_nm / factor)
        yr = yr - d.tilt[1] * (z - d.z_ref_nm / factor)
        edges = _slab_edges(z, np.inf)
    else:
        edges = _slab_edges(z, 0.25 * d_nn / math.tan(math.radians(d.max_tilt_deg)))
    n_slabs = edges.size - 1
    slab = np.clip(np.searchsorted(edges, z, side="right") - 1, 0, n_slabs - 1)
    extent = 2 * float(np.hypot(xr, yr).max()) + 4 * h
    N = min(1 << math.ceil(math.log2(max(extent / h, 64))), _FFT_MAX)
    k_max = min(0.7 * (0.5 / h) * s_lo, k_max)
    hk, g, _, w = _reciprocal_set(lat, k_max, d_nn / 6.0)
    if hk.shape[0] == 0:
        return None
    return _Peaks(_power_spectrum(xr, yr, slab, n_slabs, h, N, max_slabs=WIDE_SLABS), g, w, d.period)


def wide_candidates(d: SearchData, n_max: int = 3):
    """Rotation and scale of the strongest distinct lattice peaks over ``WIDE_SCALE_RANGE``.

    Parameters
    ----------
    d : SearchData
    n_max : int
        Most candidates returned.

    Returns
    -------
    candidates : list of (float, float, float)
        ``(rotation_deg, scale, peak)`` of local maxima in scale of the grid's best power over the
        rotation, at least ``d.min_peak`` and 8 % apart in scale, strongest first.
    peaks : _Peaks or None
        The spectrum and peaks searched (to score other placements on them).
    """
    pk = _peaks(d, WIDE_SCALE_RANGE[0], low_order=True)
    if pk is None or d.scale is not None:
        return [], pk
    ths, ss, vals = pk.grid(WIDE_SCALE_RANGE, d.rotation_deg, None)
    prof, arg = vals.max(0), vals.argmax(0)
    left = np.concatenate([[-np.inf], prof[:-1]])
    right = np.concatenate([prof[1:], [-np.inf]])
    top = np.flatnonzero((prof >= left) & (prof > right) & (prof >= d.min_peak))
    out = []
    for j in top[np.argsort(-prof[top])]:
        if all(abs(math.log(ss[j] / c[1])) > 0.08 for c in out):
            out.append((float(ths[arg[j]]), float(ss[j]), float(prof[j])))
        if len(out) == n_max:
            break
    return out, pk


def _refit_at(refit, s: float):
    """The registration with the scale searched within 6 % of ``s`` (``None`` when it fails)."""
    try:
        return refit((s / 1.06, s * 1.06))
    except InputError:
        return None


# ====================================================================== real-space comparison
def information_per_ion(reg, d: SearchData) -> float:
    """Mean log-likelihood ratio per ion (nats) of a placement against a uniform density.

    Each ion's density under the placement is ``(1 - b) G(r) / n + b`` times the uniform one, where
    ``r`` is its distance to the nearest rod axis, ``G`` a 2-D Gaussian of spread ``sigma`` about the
    axis, ``n`` the rods per unit area and ``b`` the uniform share; ``sigma`` and ``b`` are those of
    a grid that maximise the mean (``b = 1``, the uniform density, gives 0). Distances, spread and
    rod density are all in the lattice frame, so the ratio does not depend on the scale, and two
    placements of different lattices or scales compare directly: a lattice too dense spreads the
    ions over rods that stay empty (``ln k`` nats less per ion for ``k`` times the rods), one too
    sparse leaves ions far from its rods. At most ``_N_INFO`` ions (an even stride) enter.

    Parameters
    ----------
    reg : Registration
    d : SearchData

    Returns
    -------
    float, nats per ion
    """
    step = max(1, d.xr.size // _N_INFO)
    dist = reg.axis_distance_nm(d.xr[::step] + d.center[0], d.yr[::step] + d.center[1], d.z[::step])
    lat = reg.lattice
    sig = np.geomspace(0.02, 0.6, 24) * lat.nearest_rod_distance_nm
    d2 = np.where(np.isfinite(dist), dist * dist, np.inf)
    G = np.exp(-d2[None, :] / (2 * sig[:, None] ** 2)) / (2 * math.pi * sig[:, None] ** 2 * lat.rod_density_per_nm2)
    best = 0.0
    for b in (0.001, 0.01, 0.03, 0.1, 0.2, 0.35, 0.5, 0.7, 0.85, 0.95):
        best = max(best, float(np.log((1 - b) * G + b).mean(1).max()))
    return best


def spectrum_mismatch(spec, lattice: Lattice, rotation_deg: float, scale: float):
    """Where the spectrum and the placed lattice disagree: power the lattice does not predict, and
    predicted low-order peaks without power.

    *Unexplained* positions are the fractions 1/4, 1/3, 1/2, 2/3 and 3/4 of the lattice's reciprocal
    basis (the peaks of a rod pattern coarser than the lattice by 2, sqrt(2), sqrt(3), 3 or 4) and
    its extinct reciprocal points, between 0.3 and 2 times the shortest predicted peak and more than
    2.5 spectrum pixels from every predicted one (so a predicted peak's own width does not leak in).
    The *first shell* is the set of shortest predicted peaks: a lattice finer than the pattern
    predicts them where the data have none.

    Parameters
    ----------
    spec : probeseq.lattice.fourier._Spectrum
        Normalised slab power spectrum (reconstruction frame).
    lattice : Lattice
    rotation_deg : float, degrees
    scale : float

    Returns
    -------
    unexplained : float
        Largest normalised power at the unexplained positions (times the background; 0 without any).
    first_shell : float
        Mean normalised power at the first shell (``inf`` when it is out of the spectrum's range).
    """
    n_rod = lattice.rods_per_cell
    B = np.linalg.inv(lattice.cell_matrix).T
    frac = np.array([0.0, 0.25, 1 / 3, 0.5, 2 / 3, 0.75])
    h = (np.arange(-3, 4)[:, None] + frac[None, :]).ravel()
    F = np.stack(np.meshgrid(h, h, indexing="ij"), -1).reshape(-1, 2)
    integer = (np.abs(F - np.rint(F)) < 1e-9).all(1)
    S = np.abs(np.exp(-2j * np.pi * (F @ lattice.rods_frac.T)).sum(1))
    predicted = integer & (S > 1e-6 * n_rod) & (np.abs(F).sum(1) > 0)
    K = (F @ B.T) @ _rot(math.radians(rotation_deg)).T / scale
    kn = np.linalg.norm(K, axis=1)
    if not predicted.any():
        return 0.0, float("inf")
    g1 = float(kn[predicted].min())
    L, k_top = spec.N * spec.h, 0.35 / spec.h
    shell = predicted & (kn <= 1.01 * g1)
    first = float(spec.sample(K[shell, 0], K[shell, 1]).mean()) if 2.0 / L < g1 <= k_top else float("inf")
    test = ~predicted & (kn >= 0.3 * g1) & (kn <= min(2.0 * g1, k_top))
    if not test.any():
        return 0.0, first
    Kp = K[predicted & (kn <= 2.5 * g1)]
    gap = np.sqrt(((K[test][:, None, :] - Kp[None, :, :]) ** 2).sum(-1)).min(1)
    Kt = K[test][gap > 2.5 / L]
    return (float(spec.sample(Kt[:, 0], Kt[:, 1]).max()) if Kt.shape[0] else 0.0), first


# ====================================================================== messages
def scale_hint(lattice: Lattice, s: float) -> str:
    """What a lateral scale ``s`` says about the lattice constant, e.g. ``the lattice constant
    a = 2.60 nm looks 22 % too large for these data (the data suggest a = 2.13 nm)``."""
    if s < 1:
        pct, word = 100.0 * (1.0 / s - 1.0), "large"
    else:
        pct, word = 100.0 * (1.0 - 1.0 / s), "small"
    if abs(lattice.b_nm - lattice.a_nm) > 1e-9:
        return (f"the lattice constants a = {lattice.a_nm:.2f} nm, b = {lattice.b_nm:.2f} nm look {pct:.0f} % too "
                f"{word} for these data (the data suggest a = {lattice.a_nm * s:.2f} nm, "
                f"b = {lattice.b_nm * s:.2f} nm)")
    return (f"the lattice constant a = {lattice.a_nm:.2f} nm looks {pct:.0f} % too {word} for these data "
            f"(the data suggest a = {lattice.a_nm * s:.2f} nm)")


_CAUSES = "or the reconstruction's lateral scale is off; check --a / the lattice file"


def metal_ion_density(z, radius_nm: float) -> float:
    """Metal ions per nm^3: the median over windows of consecutive depths of count / (area x depth).

    Windows of 50 consecutive ions in depth keep the local density of a sample made of depth
    blocks (the pipeline's bounded sample, thousands of ions per block, so few windows straddle
    the gap between two blocks), which the count over the whole bounding volume would not.

    Parameters
    ----------
    z : (n,) ndarray of float, nm
    radius_nm : float, nm
        Lateral radius of the specimen (the area is ``pi radius^2``).
    """
    zs = np.sort(np.asarray(z, float))
    m = 50
    if zs.size <= m or not radius_nm > 0:
        return float("nan")
    start = np.arange(0, zs.size - m, m)
    dz = zs[start + m] - zs[start]
    dz = dz[dz > 0]
    if dz.size == 0:
        return float("inf")
    return float(m / (math.pi * radius_nm ** 2 * np.median(dz)))


def _unit_clues(d: SearchData, r98_nm: float, radius_nm: float):
    """Clues that the positions are angstrom read as nm: a list of phrases and whether one of them
    is strong (the extent or the lattice found at a tenth of the lengths) rather than the density."""
    lat = d.lattice
    clues, strong = [], False
    if r98_nm > MAX_SPECIMEN_RADIUS_NM:
        clues.append(f"98 % of the metal ions lie within {r98_nm:.0f} nm of the centre, wider than an atom-probe "
                     f"specimen (radius up to ~{MAX_SPECIMEN_RADIUS_NM:.0f} nm)")
        strong = True
    rho = metal_ion_density(d.z, radius_nm)
    expected = lat.rod_density_per_nm2 / lat.pitch_nm * DETECTION_EFFICIENCY
    if rho < expected / DENSITY_SHORTFALL:
        clues.append(f"{rho:.2g} metal ions per nm^3, over {DENSITY_SHORTFALL:.0f}x below the ~{expected:.2g} of "
                     f"this lattice's sites at detection efficiency {DETECTION_EFFICIENCY:g}")
    if 2 * radius_nm / ANGSTROM_PER_NM >= max(lat.a_nm, lat.b_nm):
        s_lo = d.scale_range[0] if d.scale is None else d.scale
        pk = _peaks(d, s_lo, factor=ANGSTROM_PER_NM)
        if pk is not None:
            _, ss, vals = pk.grid(d.scale_range, d.rotation_deg, d.scale)
            i, j = np.unravel_index(np.argmax(vals), vals.shape)
            if vals[i, j] >= d.min_peak:
                clues.append(f"the rod lattice fits once the positions are divided by {ANGSTROM_PER_NM:g} "
                             f"(scale {ss[j]:.3f}, peak power {vals[i, j]:.0f}x background)")
                strong = True
    return clues, strong


def diagnose_no_signal(d: SearchData, r98_nm: float, radius_nm: float, n_ions: int, refit) -> str:
    """The likely causes of a missing lattice signal, checked on the data, as one clause.

    A lattice constant far off is claimed only when a candidate of the wide scale search outside
    the normal range, refitted in full, places the rods with quality at least ``QUALITY_FLOOR`` and
    explains at least ``INFO_FLOOR`` nats per ion.

    Parameters
    ----------
    d : SearchData
    r98_nm, radius_nm : float, nm
        98th-percentile lateral radius of the metal ions and the specimen radius.
    n_ions : int
        Metal ions given.
    refit : callable
        ``refit((low, high))`` registers again with the scale searched over ``(low, high)``.
    """
    parts = []
    clues, strong = _unit_clues(d, r98_nm, radius_nm)
    if clues and strong:
        parts.append(f"the positions look like angstrom read as nm: {'; '.join(clues)}; give --length-unit angstrom")
    elif clues:
        parts.append(f"the metal ions are sparse, {clues[0]}: positions in angstrom read as nm (give "
                     f"--length-unit angstrom), or few ions in the metal ranges")
    lo, hi = d.scale_range
    best = None
    for _, s, _ in wide_candidates(d)[0]:
        if lo * 1.02 <= s <= hi / 1.02:
            continue  # the normal search saw this scale
        reg = _refit_at(refit, s)
        if reg is not None and reg.quality >= QUALITY_FLOOR:
            info = information_per_ion(reg, d)
            if info >= INFO_FLOOR and (best is None or info > best[1]):
                best = (reg, info)
    if best is not None:
        reg = best[0]
        parts.append(f"a rod lattice fits at lateral scale {reg.scale:.3f} (rotation {reg.rotation_deg:.1f} deg, "
                     f"quality {reg.quality:.2f}, peak power {reg.peak_ratio:.0f}x background): "
                     f"{scale_hint(d.lattice, reg.scale)}, {_CAUSES}")
    if not parts:
        wide = "" if d.scale is not None else (f" and no rod lattice at lateral scales {WIDE_SCALE_RANGE[0]:g}-"
                                               f"{WIDE_SCALE_RANGE[1]:g}")
        parts.append(f"the data show no sign of positions in angstrom{wide}: likely too few metal ions ({n_ions} "
                     f"given), not a crystal, or the wrong metals ranged; check the lattice")
    return "; ".join(parts) + "; or give --rotation-deg, --scale and --offset-nm"


# ====================================================================== after a registration
def check_registered_scale(d: SearchData, reg, s_fourier: float, spec, refit) -> None:
    """Warn when the fitted lateral scale is outside ``1 +- SCALE_WARN``; raise when a rod lattice
    fits far better at another scale (the registration matched only part of the pattern).

    A doubtful registration (scale outside the band, Fourier scale at the edge of the searched
    range, refined scale more than ``SUSPECT_SCALE_JUMP`` from it, quality below
    ``SUSPECT_QUALITY``, or a spectrum that disagrees with the placed lattice, see
    :func:`spectrum_mismatch`) is compared with the candidates of the wide scale search that carry
    more than ``WIDE_PEAK_GAIN`` times its peak power: each is refitted in full, and one that
    explains the ions clearly better (:func:`information_per_ion`, :func:`_better_placement`)
    overrules it. Nothing is checked when the scale was given (``d.scale``).

    Parameters
    ----------
    d : SearchData
    reg : Registration
        The registration found.
    s_fourier : float
        Scale found by the normal Fourier search, before the refinement.
    spec : probeseq.lattice.fourier._Spectrum or None
        The normal search's spectrum.
    refit : callable
        ``refit((low, high))`` registers again with the scale searched over ``(low, high)``.

    Raises
    ------
    InputError
        A rod lattice fits far better at another scale.

    Warns
    -----
    DataQualityWarning
        The scale is outside ``[1 - SCALE_WARN, 1 + SCALE_WARN]``.
    """
    if d.scale is not None:
        return
    scale, lo, hi = reg.scale, d.scale_range[0], d.scale_range[1]
    band = abs(scale - 1.0) > SCALE_WARN
    doubtful = (band or not lo * 1.01 <= s_fourier <= hi / 1.01
                or abs(math.log(scale / s_fourier)) > SUSPECT_SCALE_JUMP or not reg.quality >= SUSPECT_QUALITY)
    if not doubtful and spec is not None:
        extra, first = spectrum_mismatch(spec, d.lattice, reg.rotation_deg, scale)
        doubtful = (extra >= max(d.min_peak, MISMATCH_FRAC * reg.peak_ratio)
                    or first < max(d.min_peak, MISMATCH_FRAC * reg.peak_ratio) / 2)
    if doubtful:
        best = _better_placement(d, reg, refit)
        if best is not None:
            raise InputError(
                f"the rod lattice matches these data only in part at lateral scale {scale:.3f} (quality "
                f"{reg.quality:.2f}), while it fits at lateral scale {best.scale:.3f} (rotation "
                f"{best.rotation_deg:.1f} deg, quality {best.quality:.2f}): {scale_hint(d.lattice, best.scale)}, "
                f"{_CAUSES}, or give --scale {best.scale:.3f} to keep this lattice")
    if band:
        warnings.warn(f"the rod lattice fits at lateral scale {scale:.3f}: {scale_hint(d.lattice, scale)}, "
                      f"{_CAUSES}", DataQualityWarning, stacklevel=4)


def _better_placement(d: SearchData, reg, refit):
    """The refitted candidate of the wide search that explains the ions better than ``reg`` (the
    best such), or ``None``: by ``INFO_MARGIN`` nats per ion, or, when both explain little (blurred
    data), three times as well and by at least ``INFO_FLOOR``."""
    cands, pk = wide_candidates(d)
    p_at = pk.score(reg.rotation_deg, reg.scale) if pk is not None else float("nan")
    best, info_reg, info_best = None, None, -np.inf
    for _, s, p in cands:
        if abs(math.log(s / reg.scale)) <= 0.05 or not p > WIDE_PEAK_GAIN * max(p_at, 1.0):
            continue
        alt = _refit_at(refit, s)
        if alt is None or abs(math.log(alt.scale / reg.scale)) <= 0.05:
            continue
        if info_reg is None:
            info_reg = information_per_ion(reg, d)
        info = information_per_ion(alt, d)
        if info > info_best and (info > info_reg + INFO_MARGIN or info > max(INFO_FLOOR, 3.0 * info_reg)):
            best, info_best = alt, info
    return best
