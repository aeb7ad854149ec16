"""Figure of the mass spectrum with its ranges.

The spectrum is drawn as counts per bin on a log axis; every range is shaded in the colour of
its channel (``probeseq.utils.palette``: a metal's colour, or ``OTHER`` for non-metal species) and its
peak labelled with the ion; peaks no prediction explains are marked ``?``. matplotlib is imported
here only, and figures are drawn on the Agg canvas (no display needed).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..utils.palette import OTHER, metal_colour
from ..utils.textformat import plain_log_ticks, typeset_ion

__all__ = ['plot_ranging', 'plot_spectrum', 'place_peak_labels', 'save_figure', 'OTHER_ALPHA']

def _range_label(r, min_share=0.05):
    parts = [(f, z) for (f, z), p in r.species_shares() if p >= min_share] or [(r.formula, r.charge)]
    return "/".join(typeset_ion(f, z) for f, z in parts)


#: opacity of the bands of non-metal ("other") ranges; higher than the metals' 0.35 because grey is pale
OTHER_ALPHA = 0.6


def place_peak_labels(ax, cands, avoid=(), pad_px: float = 1.5, step_px: float = 5.0) -> int:
    """Write rotated peak labels without overlap; return how many were written.

    Each label starts just above its peak. When it would overlap a label already written, a peak
    spike (its vertical line from the axis to the peak top), an artist in ``avoid`` (the legend) or
    leave the axes, it moves up in steps of ``step_px`` display pixels (and right, off the left
    axis); a label moved is joined to its peak by a thin leader line. A label that finds no room
    below the top of the axes is left out: candidates are written in the order given, so pass
    the strongest peaks first and the minor ones lose their labels.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        With its limits and position final (a figure with a layout engine is laid out here first).
    cands : sequence of (x_da, peak_counts, text)
        Peak position in Da, peak height in the axis's y unit, label text.
    avoid : sequence of matplotlib artists
    pad_px, step_px : float, display pixels

    Returns
    -------
    int
    """
    fig = ax.figure
    if fig.get_layout_engine() is not None:
        fig.draw_without_rendering()  # fixes a layout engine's positions, so display positions hold
    rend = fig.canvas.get_renderer()
    box = ax.get_window_extent(rend)
    to_data = ax.transData.inverted()
    spikes = []
    for x, top, _ in cands:  # each labelled peak's spike is an obstacle for the other labels
        px, py = ax.transData.transform((x, top))
        spikes.append((px - 1.5, box.y0, px + 1.5, py))
    taken = [(b.x0, b.y0, b.x1, b.y1) for b in (a.get_window_extent(rend) for a in avoid if a is not None)]
    shown = 0

    def hits(b, o):
        return b.x0 - pad_px < o[2] and o[0] < b.x1 + pad_px and b.y0 - pad_px < o[3] and o[1] < b.y1 + pad_px

    def free(b, own):
        if b.x0 < box.x0 + pad_px or b.x1 > box.x1 - pad_px or b.y1 > box.y1 - pad_px:
            return False
        return not (any(hits(b, o) for o in taken) or any(hits(b, o) for k, o in enumerate(spikes) if k != own))

    for i, (x, top, text) in enumerate(cands):
        px, py = ax.transData.transform((x, top))
        t = ax.text(x, top, text, rotation=90, ha="center", va="bottom", fontsize=7, clip_on=True)
        t.set_in_layout(False)
        dx, dy, ok = 0.0, 3.0, False
        while py + dy < box.y1:
            t.set_position(to_data.transform((px + dx, py + dy)))
            b = t.get_window_extent(rend)
            if b.x0 < box.x0 + pad_px:  # off the left axis: move right, then test again
                dx += box.x0 + pad_px - b.x0
                continue
            if free(b, i):
                ok = True
                break
            dy += step_px
        if not ok:
            t.remove()
            continue
        taken.append((b.x0, b.y0, b.x1, b.y1))
        shown += 1
        if dy > 3.0 + step_px or dx > 0:  # moved: a leader line back to the peak
            lx, ly = to_data.transform((px + dx, b.y0 - 1.0))
            ax.plot([x, lx], [top, ly], color="0.45", linewidth=0.4, clip_on=True)
    return shown


def _stairs(ax, values, edges, **kwargs):
    """``ax.stairs(values, edges, **kwargs)`` without its cost on long spectra.

    ``Axes.stairs`` adds its step patch with ``add_patch``, whose data-limit update walks the path
    one segment at a time (about 85 us per bin: 1.7 s for 20,000 bins). The same patch is added
    as an artist here and the data limits are updated from the step corners in one call.
    """
    from matplotlib.patches import StepPatch

    values, edges = np.asarray(values, dtype=float), np.asarray(edges, dtype=float)
    patch = StepPatch(values, edges, baseline=0, fill=False, **kwargs)
    ax.add_artist(patch)
    pts = np.column_stack([np.concatenate([edges[:-1], edges[1:], edges[[0, -1]]]),
                           np.concatenate([values, values, [0.0, 0.0]])])
    ax.update_datalim(pts)
    patch.sticky_edges.y.append(0.0)
    getattr(ax, "_request_autoscale_view", ax.autoscale_view)()  # as add_patch does
    return patch


def plot_spectrum(spectrum, ranges=None, metals=(), *, label_at=None, unmatched_da=(), path=None,
                  xlim_da=None, max_labels: int = 40, title: str | None = None):
    """Draw a spectrum with shaded, labelled ranges.

    Parameters
    ----------
    spectrum : probeseq.ranging.spectrum.Spectrum
        Usually uniform bins (:func:`probeseq.ranging.spectrum.histogram`).
    ranges : probeseq.ranging.ranges.RangeSet, optional
    metals : sequence of str
        Metal channel order (sets the colours).
    label_at : (n_ranges,) array of float, Da, optional
        Where to put each range's label (default the range's highest bin).
    unmatched_da : sequence of float, Da
        Positions of peaks left unranged, marked '?'.
    path : str or Path, optional
        Save as ``<stem>.png`` and ``<stem>.svg``.
    xlim_da : (float, float), optional
    max_labels : int
        Label at most this many ranges (those with the most counts).
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    metals = tuple(metals)
    fig = Figure(figsize=(12, 4.8))
    FigureCanvasAgg(fig)
    # a fixed layout (no layout engine): the peak labels are placed in display space before saving
    fig.subplots_adjust(left=0.065, right=0.99, bottom=0.105, top=0.92 if title else 0.975)
    ax = fig.add_subplot(1, 1, 1)
    e, c = spectrum.edges_da, spectrum.counts
    _stairs(ax, c, e, color="black", linewidth=0.6)
    ax.set_yscale("log")
    plain_log_ticks(ax.yaxis)
    top = max(float(c.max()), 1.0)
    ax.set_ylim(0.5, top * 8)
    # a little room on the left so the first peak's label clears the axis
    ax.set_xlim(*(xlim_da if xlim_da is not None else (float(e[0]) - 0.01 * float(e[-1] - e[0]), float(e[-1]))))
    width = float(np.median(np.diff(e)))
    ax.set_xlabel("mass-to-charge (Da)")
    ax.set_ylabel(f"counts per {width:.3g} Da bin")
    handles, cands, marks, n_ranges = [], [], [], 0
    if ranges is not None and len(ranges):
        from .channels import channel_tables

        channel = channel_tables(ranges, metals)[2] if metals else np.full(len(ranges) + 1, 0, dtype=np.int8)
        cum = np.concatenate([[0], np.cumsum(c)])
        totals = []
        for j, r in enumerate(ranges):
            if channel[j] < len(metals):
                ax.axvspan(r.low_da, r.high_da, color=metal_colour(int(channel[j])), alpha=0.35, linewidth=0)
            else:  # other species: darker fill with an outline, so narrow grey bands stay visible
                ax.axvspan(r.low_da, r.high_da, facecolor=OTHER, alpha=OTHER_ALPHA, edgecolor=OTHER, linewidth=0.8)
            i0, i1 = np.searchsorted(e, [r.low_da, r.high_da])
            totals.append(cum[min(i1, c.size)] - cum[min(i0, c.size)])
        cands = []
        for j in np.argsort(totals)[::-1][:max_labels]:
            r = ranges[int(j)]
            i0, i1 = np.searchsorted(e, [r.low_da, r.high_da])
            i0, i1 = max(i0 - 1, 0), max(min(i1, c.size), i0)
            seg = c[i0:i1]
            if label_at is not None and np.isfinite(label_at[j]):
                x = float(label_at[j])
            else:
                x = float(spectrum.centres_da[i0 + int(np.argmax(seg))]) if seg.size else 0.5 * (r.low_da + r.high_da)
            cands.append((x, max(float(seg.max()) if seg.size else 1.0, 1.0), _range_label(r)))
        n_ranges = len(ranges)
        for k, el in enumerate(metals):
            handles.append(Patch(color=metal_colour(k), alpha=0.5, label=el))
        handles.append(Patch(facecolor=OTHER, alpha=OTHER_ALPHA, edgecolor=OTHER, label="other species"))
    if len(unmatched_da):
        x = np.asarray(unmatched_da, dtype=float)
        i = np.clip(np.searchsorted(e, x) - 1, 0, c.size - 1)
        y = np.maximum(c[i], 1) * 1.4
        ax.plot(x, y, "v", color="black", markersize=4, label="unmatched peak")
        for xi, yi in zip(x, y):
            marks.append(ax.text(xi, yi * 1.3, "?", ha="center", va="bottom", fontsize=8, clip_on=True))
        handles.append(ax.lines[-1])
    if cands:  # the legend keeps room for the note on labels left out (made no wider afterwards)
        note = Patch(facecolor="none", edgecolor="none", label=f"{n_ranges} minor range(s) shaded, not labelled")
        legend = ax.legend(handles=handles + [note], loc="upper right", fontsize=8, frameon=False)
        n_shown = place_peak_labels(ax, cands, avoid=[legend] + marks)
        if n_shown < n_ranges:
            legend.get_texts()[-1].set_text(f"{n_ranges - n_shown} minor range(s) shaded, not labelled")
        else:
            ax.legend(handles=handles, loc="upper right", fontsize=8, frameon=False)
    elif handles:
        ax.legend(handles=handles, loc="upper right", fontsize=8, frameon=False)
    if title:
        ax.set_title(title)
    if path is not None:
        save_figure(fig, path)
    return fig


def plot_ranging(result, path=None, *, xlim_da=None, max_labels: int = 40, title: str | None = None):
    """Spectrum figure of an :func:`probeseq.ranging.auto.auto_range` result.

    Parameters
    ----------
    result : probeseq.ranging.auto.RangingResult
    path : str or Path, optional
        Save as ``<stem>.png`` and ``<stem>.svg``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    pos = result.peaks.position_da
    label_at = np.array([pos[p] if p >= 0 else np.nan for p in result.range_peak], dtype=float)
    return plot_spectrum(result.spectrum, result.ranges, result.metals, label_at=label_at,
                         unmatched_da=pos[result.unmatched], path=path, xlim_da=xlim_da,
                         max_labels=max_labels, title=title)


def plot_overlaps(result, path=None, *, max_panels: int = 6):
    """The spectrum near each range refitted with the ions' distance to the rod axes, with the
    fitted components (ions of each species in the range) and the metal share from space against
    the spectrum alone.

    Parameters
    ----------
    result : probeseq.ranging.auto.RangingResult
    path : str or Path, optional
        Save as ``<stem>.png`` and ``<stem>.svg``.
    max_panels : int
        Most ranges drawn (the ones with most ions).

    Returns
    -------
    matplotlib.figure.Figure or None
        None when no range was refitted.
    """
    import math

    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    ref = sorted((d for d in result.overlap_refinement if d.get("used")), key=lambda d: -d["ions"])[:max_panels]
    if not ref or result.fit_rows is None:
        return None
    A = result.fit_rows[0][:len(result.ranges)]
    n = len(ref)
    ncol = min(3, n)
    nrow = math.ceil(n / ncol)
    fig = Figure(figsize=(2.6 * ncol, 2.2 * nrow))  # not pyplot: nothing kept open in a batch of runs
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrow, ncol, squeeze=False)
    sp = result.spectrum
    c, counts = sp.centres_da, sp.counts
    lows = result.ranges.lows_da
    for ax, d in zip(axes.flat, ref):
        lo, hi = d["low_da"], d["high_da"]
        pad = max(0.6, hi - lo)
        sel = (c >= lo - pad) & (c <= hi + pad)
        ax.step(c[sel], np.maximum(counts[sel], 0.5), where="mid", color="0.25", linewidth=0.7)
        ax.axvspan(lo, hi, color="0.85", zorder=0)
        j = int(np.argmin(np.abs(lows - lo)))
        mu = A[j] * result.amounts
        order = [s for s in np.argsort(mu)[::-1] if mu[s] > 0.01 * max(mu.sum(), 1e-12)][:4]
        lines = [f"{typeset_ion(*result.species[s])}: {mu[s]:.0f} ions" for s in order]
        lines.append(f"metal share {d['metal_share_space']:.2f} \u00b1 {d['metal_share_space_err']:.2f} (space)")
        lines.append(f"spectrum alone {d['metal_share_spectrum']:.2f}")
        ax.text(0.02, 0.98, "\n".join(lines), transform=ax.transAxes, va="top", fontsize=6)
        ax.set_yscale("log")
        plain_log_ticks(ax.yaxis)
        ax.set_xlabel("mass-to-charge (Da)", fontsize=7)
        ax.tick_params(labelsize=6)
    for ax in list(axes.flat)[n:]:
        ax.set_visible(False)
    fig.tight_layout()
    if path is not None:
        save_figure(fig, path)
    return fig


def save_figure(fig, path) -> list:
    """Save ``fig`` as PNG (150 dpi) and SVG next to each other; return the two paths.

    A figure with a layout engine keeps the layout of the first save (its engine is set to none),
    so the SVG does not lay it out again.
    """
    p = Path(path)
    stem = p.with_suffix("") if p.suffix.lower() in (".png", ".svg") else p
    stem.parent.mkdir(parents=True, exist_ok=True)
    out = [stem.with_name(stem.name + ".png"), stem.with_name(stem.name + ".svg")]
    from ..utils.marks import figure_metadata, figure_save_kwargs

    fig.savefig(out[0], dpi=150, **figure_save_kwargs(out[0]))
    if fig.get_layout_engine() is not None:  # laid out by the first save: the second keeps it (faster)
        fig.set_layout_engine("none")
    fig.savefig(out[1], metadata=figure_metadata(out[1]))
    return [str(o) for o in out]
