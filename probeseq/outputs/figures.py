"""Figures of decoded runs: sequence tracks, run lengths, rod-to-rod agreement and groups of rods.

Every function builds a :class:`matplotlib.figure.Figure` on an Agg canvas (no display, no
``pyplot`` figure registry, the global backend is left alone), returns it, and saves it when given a
``path``: the suffix picks the format (``.svg``, ``.pdf`` or ``.png``). Vector files stay vector
(sites are drawn as merged rectangles in a ``PolyCollection``, never as an image); PDF files embed
their fonts as TrueType (``pdf.fonttype = 42``) and SVG files keep text as text
(``svg.fonttype = 'none'``), so a journal's production can edit the labels. Colours come from
:mod:`probeseq.utils.palette` only.

Sequence tracks
---------------
Each selected rod is one horizontal track along depth; each site is a cell coloured by its decoded
metal (the site call: the metal of largest posterior, as ``state`` in tracks.csv). The posterior
probability ``p`` of that metal sets the opacity in a few levels (:data:`CONFIDENCE_LEVELS`): the
lighter, the less certain. A site where no ion was detected and
whose posterior stays within :data:`PRIOR_TOLERANCE` of the composition (the chain's stationary
distribution, i.e. the prior) is left blank: the data say nothing about it. Masked sites (outside
the analysed volume) are hatched in light grey. Neighbouring cells with the same metal and level
are merged into one rectangle so that a figure of thousands of sites stays small.

Size presets: 'one-column' is 85 mm wide and 'two-column' 178 mm, the common widths of journal
columns (common practice; check the journal's author guide).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.palette import EMPTY, METAL_COLOURS, OTHER, metal_colour
from ..utils.textformat import plain_log_ticks

__all__ = ['SIZE_PRESETS_MM', 'FIGURE_FORMATS', 'CONFIDENCE_LEVELS', 'PRIOR_TOLERANCE', 'figure_width_in', 'plot_run_lengths', 'plot_rod_to_rod', 'plot_group_variance', 'save_figure']

MM_PER_INCH = 25.4


#: figure widths of the size presets, mm (common practice: usual journal column widths)
SIZE_PRESETS_MM = {"one-column": 85.0, "two-column": 178.0}


#: base font size of each preset, pt
_FONT_PT = {"one-column": 7.0, "two-column": 8.0}


#: suffixes :func:`save_figure` writes
FIGURE_FORMATS = (".svg", ".pdf", ".png")


#: (lowest posterior of the level, opacity), from the most to the least certain level
CONFIDENCE_LEVELS = ((0.95, 1.0), (0.8, 0.62), (0.6, 0.38), (0.0, 0.18))


#: a site with no ion is blank when every posterior is within this of the composition (the prior)
PRIOR_TOLERANCE = 0.1


#: rcParams applied while saving: TrueType fonts in PDF/PS, text kept as text in SVG
_SAVE_RC = {"pdf.fonttype": 42, "ps.fonttype": 42, "svg.fonttype": "none"}


# ---------------------------------------------------------------------------------- helpers
def figure_width_in(size) -> float:
    """Width of a size preset (or of ``(width_mm, height_mm)``), inches."""
    if isinstance(size, str):
        if size not in SIZE_PRESETS_MM:
            raise InputError(f"size: unknown preset {size!r}; expected one of {', '.join(SIZE_PRESETS_MM)} "
                             "or (width_mm, height_mm)")
        return SIZE_PRESETS_MM[size] / MM_PER_INCH
    w, _ = _size_mm(size)
    return w / MM_PER_INCH


def _size_mm(size):
    try:
        w, h = (float(v) for v in size)
    except (TypeError, ValueError):
        raise InputError(f"size: expected a preset name ({', '.join(SIZE_PRESETS_MM)}) or (width_mm, height_mm), "
                         f"got {size!r}") from None
    if not (math.isfinite(w) and math.isfinite(h) and 20 <= w <= 1000 and 20 <= h <= 2000):
        raise InputError(f"size: (width_mm, height_mm) must lie in 20-1000 mm x 20-2000 mm, got {size!r}")
    return w, h


def _font_pt(size) -> float:
    if isinstance(size, str):
        return _FONT_PT.get(size, 8.0)
    return 7.0 if _size_mm(size)[0] < 120 else 8.0


def _figure_size(size, default_height_in: float):
    """(width, height) in inches: a preset's width with the height the figure needs, or both given."""
    if isinstance(size, str):
        return figure_width_in(size), float(default_height_in)
    w, h = _size_mm(size)
    return w / MM_PER_INCH, h / MM_PER_INCH


def _new_figure(width_in, height_in):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    FigureCanvasAgg(fig)
    fig.get_layout_engine().set(w_pad=0.02, h_pad=0.02, wspace=0.04, hspace=0.04)
    return fig


def _check_dpi(dpi) -> float:
    if isinstance(dpi, bool) or not isinstance(dpi, (int, float, np.integer, np.floating)) \
            or not (math.isfinite(dpi) and 30 <= dpi <= 1200):
        raise InputError(f"dpi must be a number in 30-1200, got {dpi!r}")
    return float(dpi)


def save_figure(fig, path, dpi: float = 300) -> Path:
    """Save a figure; the suffix picks the format.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : str or Path
        ``.svg`` (text kept as text), ``.pdf`` (TrueType fonts embedded) or ``.png``.
    dpi : float, dots per inch
        Resolution of PNG output (and of any raster part of vector output).

    Returns
    -------
    Path
        The file written.
    """
    import matplotlib

    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in FIGURE_FORMATS:
        raise InputError(f"figure path {p}: expected a suffix among {', '.join(FIGURE_FORMATS)}, "
                         f"got '{p.suffix or '(none)'}'")
    dpi = _check_dpi(dpi)
    p.parent.mkdir(parents=True, exist_ok=True)
    from ..utils.marks import figure_save_kwargs

    with matplotlib.rc_context(_SAVE_RC):
        fig.savefig(p, dpi=dpi, format=suffix[1:], **figure_save_kwargs(p))
    return p


def _rgba(hex_colour: str, alpha: float = 1.0):
    h = hex_colour.lstrip("#")
    return (int(h[0:2], 16) / 255.0, int(h[2:4], 16) / 255.0, int(h[4:6], 16) / 255.0, float(alpha))


def _nice_length(span: float) -> float:
    """A round length (1, 2 or 5 times a power of ten) near a fifth of ``span``."""
    target = max(span / 5.0, 1e-9)
    e = math.floor(math.log10(target))
    for m in (1.0, 2.0, 5.0, 10.0):
        if m * 10**e >= target * 0.7:
            return m * 10**e
    return 10.0 ** (e + 1)


# ---------------------------------------------------------------------------------- run lengths
def plot_run_lengths(statistics, path=None, *, size="two-column", dpi=300, max_length=None):
    """Run-length distribution of each metal against the independent-sites law and the fitted chain.

    The decoded runs are shown by their survival function ``P(L > l)`` (Kaplan-Meier over runs whose
    start was seen, so runs cut by a rod end or the mask count as censored, see
    :func:`probeseq.statistics.runs.run_length_distribution`); the fitted chain gives ``P_kk^l`` and
    independent sites of the same composition ``f_k^l`` (both geometric).

    Parameters
    ----------
    statistics : probeseq.statistics.summary.RunStatistics
    path : str or Path, optional
    size : str or (float, float)
    dpi : float
    max_length : int, sites, optional
        Longest run length drawn (default: where the decoded survival falls below 1e-3 or ends).

    Returns
    -------
    matplotlib.figure.Figure
        One panel per metal.
    """
    dpi = _check_dpi(dpi)
    rl = getattr(statistics, "run_lengths", None)
    metals = tuple(getattr(statistics, "metals", ()) or ())
    if not rl or not metals:
        raise InputError("statistics: expected a RunStatistics with run_lengths and metals")
    font = _font_pt(size)
    n = len(metals)
    fig = _new_figure(*_figure_size(size, 2.3 if n <= 3 else 4.2))
    ncols = n if n <= 3 else math.ceil(n / 2)
    axes = [fig.add_subplot(math.ceil(n / ncols), ncols, i + 1) for i in range(n)]
    pitch = float(getattr(statistics, "pitch_nm", float("nan")))
    for i, (ax, m) in enumerate(zip(axes, metals)):
        d = rl.get(m) or rl.get(i)
        if d is None:
            raise InputError(f"statistics.run_lengths: no entry for metal {m}")
        ell = np.asarray(d["length"], dtype=float)
        km = np.asarray(d["km_survival"], dtype=float)
        top = int(ell[-1]) if ell.size else 1
        if max_length is not None:
            top = int(max_length)
        else:
            small = np.flatnonzero(km < 1e-3)
            if small.size:
                top = int(ell[small[0]])
        top = max(top, 2)
        keep = (ell <= top) & (km > 0)
        colour = metal_colour(i)
        ax.plot(ell[keep], km[keep], "o", markersize=2.6, color=colour, label="decoded runs")
        grid = np.arange(1, top + 1, dtype=float)
        for key, style, lab, col in (("sf_chain", "-", "fitted chain", colour),
                                     ("sf_independent", "--", "independent sites", OTHER)):
            law = np.asarray(d[key], dtype=float)
            if law.size and np.isfinite(law).any():
                q = law[0]
                ax.plot(grid, q ** grid, style, color=col, linewidth=1.0, label=lab)
        ax.set_yscale("log")
        plain_log_ticks(ax.yaxis)
        pos = km[keep]
        floor = max(float(pos.min()) / 3.0 if pos.size else 1e-3, 1e-4)
        ax.set_ylim(floor, 1.5)
        ax.set_xlim(0, top + 0.5)
        n_runs = int(d.get("n_runs", 0))
        n_cut = int(d.get("n_truncated", 0))
        ax.set_title(f"{m}: {n_runs} runs ({n_cut} cut at an end)", fontsize=font)
        ax.set_xlabel("run length l (sites)" + (f"; 1 site = {pitch:.3g} nm" if math.isfinite(pitch) else ""),
                      fontsize=font)
        if i % ncols == 0:
            ax.set_ylabel("P(run longer than l)", fontsize=font)
        ax.tick_params(labelsize=font * 0.9)
        ax.legend(fontsize=font * 0.85, frameon=False, loc="lower left")
    if path is not None:
        save_figure(fig, path, dpi=dpi)
    return fig


# ---------------------------------------------------------------------------------- rod to rod
def plot_rod_to_rod(statistics, path=None, *, metals=None, copy_threshold=None, size="one-column", dpi=300):
    """Agreement of neighbouring rods against its null distribution.

    Top: histogram of the test statistic (the largest neighbour correlation over small depth lags)
    in circular-shift null replicates, with the observed value marked. Bottom: correlation of
    neighbouring rods at each depth lag, on the posteriors and corrected for decoding noise, with
    the null mean and (when given) the copy threshold.

    Parameters
    ----------
    statistics : probeseq.statistics.summary.RunStatistics or probeseq.statistics.agreement.RodAgreement
    path : str or Path, optional
    metals : sequence of str, optional
        Metal names (taken from ``statistics`` when it has them).
    copy_threshold : float, optional
        Drawn as a line on the corrected correlation.
    size : str or (float, float)
    dpi : float

    Returns
    -------
    matplotlib.figure.Figure
    """
    dpi = _check_dpi(dpi)
    rr = getattr(statistics, "rod_to_rod", statistics)
    if rr is None or getattr(rr, "null", None) is None:
        raise InputError("statistics: no rod-to-rod agreement (the run has no neighbouring rod pairs)")
    metals = tuple(metals or getattr(statistics, "metals", ()) or ())
    k = int(rr.metal)
    name = metals[k] if k < len(metals) else f"metal {k}"
    colour = metal_colour(k)
    font = _font_pt(size)
    fig = _new_figure(*_figure_size(size, 3.6))
    ax1 = fig.add_subplot(2, 1, 1)
    ax2 = fig.add_subplot(2, 1, 2)
    null = np.asarray(rr.null, dtype=float)
    null = null[np.isfinite(null)]
    obs = float(rr.statistic)
    if null.size:
        lo = min(float(null.min()), obs if math.isfinite(obs) else float(null.min()))
        hi = max(float(null.max()), obs if math.isfinite(obs) else float(null.max()))
        pad = 0.05 * (hi - lo) if hi > lo else 0.01
        bins = np.linspace(lo - pad, hi + pad, 31)
        counts, _, _ = ax1.hist(null, bins=bins, color=OTHER, edgecolor=EMPTY, linewidth=0.3,
                                label=f"null: {null.size} circular shifts")
        ax1.set_ylim(0, 1.45 * max(float(np.max(counts)), 1.0))
    if math.isfinite(obs):
        ax1.axvline(obs, color=colour, linewidth=1.5, label=f"observed {obs:.3f} (lag {int(rr.best_lag)})")
    ax1.set_title(f"Neighbouring rods agree on {name}? p = {float(rr.p_value):.3g} ({int(rr.n_pairs)} pairs)",
                  fontsize=font)
    ax1.set_xlabel("largest neighbour correlation over depth lags", fontsize=font)
    ax1.set_ylabel("null replicates", fontsize=font)
    ax1.tick_params(labelsize=font * 0.9)
    ax1.legend(fontsize=font * 0.85, frameon=False, loc="upper left")

    lags = np.asarray(rr.lags, dtype=float)
    ax2.plot(lags, np.asarray(rr.corr_lags, float), "o-", color=colour, markersize=3, linewidth=1.0,
             label="posteriors")
    ax2.plot(lags, np.asarray(rr.corr_corrected_lags, float), "s--", color=colour, markersize=3, linewidth=1.0,
             markerfacecolor=EMPTY, label="corrected for decoding noise")
    ax2.axhline(float(rr.null_mean), color=OTHER, linestyle=":", linewidth=1.0, label="null mean")
    if copy_threshold is not None and math.isfinite(float(copy_threshold)):
        ax2.axhline(float(copy_threshold), color=METAL_COLOURS[-1], linestyle="--", linewidth=0.8,
                    label=f"copy threshold {float(copy_threshold):g}")
    ax2.set_xticks(lags)
    ax2.set_xlabel("depth lag (sites)", fontsize=font)
    ax2.set_ylabel("correlation", fontsize=font)
    ax2.tick_params(labelsize=font * 0.9)
    fig.legend(handles=ax2.get_legend_handles_labels()[0], loc="outside lower center", ncols=2,
               fontsize=font * 0.8, frameon=False, columnspacing=1.0, handlelength=1.8)
    if path is not None:
        save_figure(fig, path, dpi=dpi)
    return fig


# ---------------------------------------------------------------------------------- groups of rods
def plot_group_variance(groups, path=None, *, size="one-column", dpi=300):
    """Variance of the group metal fraction against group size, with the 1/n line of independent rods.

    Parameters
    ----------
    groups : probeseq.decoding.groups.GroupResult
    path : str or Path, optional
    size : str or (float, float)
    dpi : float

    Returns
    -------
    matplotlib.figure.Figure
        Log-log axes: measured (noise-corrected) variances, the independent-rods line
        ``sigma2_expected / n`` and the fit ``sigma2 (rho + (1 - rho) / n)``.
    """
    dpi = _check_dpi(dpi)
    if groups is None or getattr(groups, "variance", None) is None:
        raise InputError("groups: no groups-of-rods result (it is computed when single rods are not resolvable)")
    n = np.asarray(groups.group_sizes, dtype=float)
    h = np.asarray(groups.inv_size, dtype=float)
    v = np.asarray(groups.variance, dtype=float)
    raw = np.asarray(groups.variance_raw, dtype=float)
    ind = np.asarray(groups.variance_independent, dtype=float)
    s2, rho = float(groups.sigma2), float(groups.rho)
    font = _font_pt(size)
    fig = _new_figure(*_figure_size(size, 2.6))
    ax = fig.add_subplot(1, 1, 1)
    pos = v > 0
    ax.plot(n[raw > 0], raw[raw > 0], "o", markersize=3.5, markerfacecolor=EMPTY, color=OTHER,
            label="before noise correction")
    ax.plot(n[pos], v[pos], "o", markersize=4, color=metal_colour(0), label="measured (noise-corrected)")
    ax.plot(n, ind, "--", color=OTHER, linewidth=1.0, label="independent rods (1/n)")
    if math.isfinite(s2) and math.isfinite(rho):
        fit = s2 * (rho + (1.0 - rho) * h)
        ok = fit > 0
        ax.plot(n[ok], fit[ok], "-", color=metal_colour(0), linewidth=1.0,
                label=f"fit \u03c3\u00b2(\u03c1 + (1\u2212\u03c1)/n), \u03c1 = {rho:.2f}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    plain_log_ticks(ax.yaxis)
    ax.set_xticks(n)
    ax.set_xticklabels([f"{int(x)}" for x in n])
    ax.minorticks_off()
    ax.set_xlabel("rods per group n", fontsize=font)
    ax.set_ylabel("variance of group metal fraction", fontsize=font)
    ax.tick_params(labelsize=font * 0.9)
    if (~pos).any():
        ax.set_title(f"{int((~pos).sum())} size(s) with variance \u2264 0 not shown", fontsize=font * 0.9)
    ax.legend(fontsize=font * 0.8, frameon=False, loc="lower left")
    if path is not None:
        save_figure(fig, path, dpi=dpi)
    return fig
