"""The sequence-track figure: which rods (chosen in :mod:`probeseq.outputs.trackrods`), which depth
window, and how the tracks are drawn.
"""

from __future__ import annotations

import math

import numpy as np

from ..exceptions import InputError
from ..utils.palette import EMPTY, METAL_COLOURS, UNRANGED, metal_colour
from .figures import (
    CONFIDENCE_LEVELS,
    MM_PER_INCH,
    PRIOR_TOLERANCE,
    _check_dpi,
    _figure_size,
    _font_pt,
    _new_figure,
    _nice_length,
    _rgba,
    _size_mm,
    figure_width_in,
    save_figure,
)
from .trackrods import (
    DEFAULT_TRACKS,
    MAX_TRACKS,
    RodChoice,
    choose_rods,
    parse_rod_ids,
    rod_id_text,
    select_rods,
)

__all__ = ['DEFAULT_TRACKS', 'MAX_TRACKS', 'RodChoice', 'rod_id_text', 'parse_rod_ids', 'depth_window', 'choose_rods',
           'select_rods', 'track_cells', 'plot_tracks']

#: above this many merged cells the tracks are drawn as one image (a raster inside SVG and PDF)
RASTER_CELLS = 3000


#: image pixels per site along depth, and at most this many pixels across
IMAGE_PX_PER_SITE = 4


IMAGE_MAX_PX = 4096


#: font of the caption and of its line height, relative to the figure's base font
CAPTION_SCALE = 0.85


# cell codes besides metal * n_levels + level
_BLANK = -1


_MASKED = -2


_OUTSIDE = -3


def depth_window(columns, depth_nm=None) -> tuple:
    """Sites of a depth window.

    Parameters
    ----------
    columns : RodColumns
    depth_nm : (float, float), nm, optional
        ``(start, end)``; a site of rod r is inside when its centre depth
        ``site_z_nm[k] + site_z_offset_nm[r]`` lies in ``[start, end]``. None: every site.

    Returns
    -------
    sites : slice
        Site indices with at least one rod inside.
    inside : (n_rods, n_sites_in_window) ndarray of bool
        Which sites of each rod are inside.
    """
    depths = columns.site_depths_nm()
    lo_all, hi_all = float(depths.min()), float(depths.max())
    if depth_nm is None:
        return slice(0, columns.n_sites), np.ones(depths.shape, dtype=bool)
    try:
        a, b = (float(v) for v in depth_nm)
    except (TypeError, ValueError):
        raise InputError(f"depth_nm: expected (start, end) in nm, got {depth_nm!r}") from None
    if not (math.isfinite(a) and math.isfinite(b) and a < b):
        raise InputError(f"depth_nm: expected (start, end) with start < end, got {depth_nm!r}; "
                         f"sites span {lo_all:.2f}..{hi_all:.2f} nm")
    inside = (depths >= a) & (depths <= b)
    cols = np.flatnonzero(inside.any(axis=0))
    if cols.size == 0:
        raise InputError(f"depth_nm: the window {a:g}..{b:g} nm holds no site; sites span "
                         f"{lo_all:.2f}..{hi_all:.2f} nm")
    s = slice(int(cols[0]), int(cols[-1]) + 1)
    return s, inside[:, s]


# ---------------------------------------------------------------------------------- track cells
def _check_decoded(columns, decoded):
    for name in ("viterbi", "posteriors", "mask", "stationary"):
        if getattr(decoded, name, None) is None:
            raise InputError(f"decoded: expected a DecodeResult (or an object with viterbi, posteriors, mask, "
                             f"stationary); it has no {name!r}")
    vit = np.asarray(decoded.viterbi)
    post = np.asarray(decoded.posteriors)
    shape = columns.counts.shape
    if vit.shape != shape[:2] or post.shape != shape:
        raise InputError(f"decoded: viterbi {vit.shape} / posteriors {post.shape} do not match the columns' "
                         f"rods x sites x metals {shape}")
    return vit, post, np.asarray(decoded.mask, dtype=bool), np.asarray(decoded.stationary, dtype=float)


def track_cells(columns, decoded, ids, sites=slice(None), inside=None,
                prior_tolerance: float = PRIOR_TOLERANCE) -> np.ndarray:
    """Code of every cell of a tracks figure.

    Parameters
    ----------
    columns : RodColumns
    decoded : DecodeResult
    ids : (n,) ndarray of int
        Rods (rows of the figure).
    sites : slice
        Sites (columns of the figure).
    inside : (n_rods, n_window_sites) ndarray of bool, optional
        Cells inside the depth window (from :func:`depth_window`); others get code -3.
    prior_tolerance : float
        A site with no ion is blank (code -1) when all its posteriors are within this of the
        composition.

    Returns
    -------
    (n, n_window_sites) ndarray of int
        ``metal * n_levels + level`` (level 0 = most certain, see :data:`CONFIDENCE_LEVELS`),
        -1 blank, -2 masked, -3 outside the depth window.
    """
    vit, post, mask, prior = _check_decoded(columns, decoded)
    ids = np.asarray(ids, dtype=np.int64)
    p = post[ids, sites]
    v = np.where(vit[ids, sites] >= 0, p.argmax(axis=2), -1)  # the site call, as tracks.csv's state
    m = mask[ids, sites] & (v >= 0)
    vs = np.clip(v, 0, None)
    pv = np.take_along_axis(p, vs[:, :, None], axis=2)[:, :, 0]
    lows = np.array([lv[0] for lv in CONFIDENCE_LEVELS])
    n_lv = len(CONFIDENCE_LEVELS)
    level = np.minimum((pv[:, :, None] < lows[None, None, :]).sum(axis=2), n_lv - 1)
    code = vs * n_lv + level
    no_ion = columns.counts[ids, sites].sum(axis=2) <= 0
    near_prior = np.abs(p - prior[None, None, :]).max(axis=2) < prior_tolerance
    code = np.where(no_ion & near_prior, _BLANK, code)
    code = np.where(m, code, _MASKED)
    if inside is not None:
        code = np.where(np.asarray(inside)[ids], code, _OUTSIDE)
    return code.astype(np.int64)


def _merge_cells(code: np.ndarray):
    """Runs of equal code along each row: (row, first, stop, code) with stop exclusive."""
    n_rows, n_cols = code.shape
    w = n_cols + 1
    pad = np.full((n_rows, w), np.iinfo(np.int64).min, dtype=np.int64)
    pad[:, :n_cols] = code
    flat = pad.ravel()
    change = np.flatnonzero(flat[1:] != flat[:-1]) + 1
    starts = np.concatenate([[0], change])
    stops = np.concatenate([change, [flat.size]])
    vals = flat[starts]
    keep = vals != np.iinfo(np.int64).min
    s, e, v = starts[keep], stops[keep], vals[keep]
    return s // w, s % w, e - (s // w) * w, v


def _site_edges(site_z: np.ndarray, pitch: float) -> np.ndarray:
    if site_z.size == 1:
        return np.array([site_z[0] - pitch / 2, site_z[0] + pitch / 2])
    mid = 0.5 * (site_z[1:] + site_z[:-1])
    return np.concatenate([[site_z[0] - (mid[0] - site_z[0])], mid, [site_z[-1] + (site_z[-1] - mid[-1])]])


# ---------------------------------------------------------------------------------- tracks figure
def _confidence_names():
    names = []
    n_lv = len(CONFIDENCE_LEVELS)
    for i, (low, _a) in enumerate(CONFIDENCE_LEVELS):
        if i == 0:
            names.append(f"p \u2265 {low:g}")
        elif i == n_lv - 1:
            names.append(f"p < {CONFIDENCE_LEVELS[i - 1][0]:g}")
        else:
            names.append(f"{low:g} \u2264 p < {CONFIDENCE_LEVELS[i - 1][0]:g}")
    return names


def _track_legend(metals, ncol: int):
    """Legend ``(handles, labels)``: metals, confidence levels, then blank and masked, each group
    starting a new row of ``ncol`` entries (matplotlib fills legend columns first, so the rows are
    interleaved).

    A confidence level's swatch is split into one box per metal, each in that metal's colour at
    the level's opacity: the tints the tracks use (draw it with a ``HandlerTuple``).
    """
    from matplotlib.patches import Patch

    groups = [
        [(Patch(facecolor=metal_colour(k), edgecolor="none"), m) for k, m in enumerate(metals)],
        [(tuple(Patch(facecolor=_rgba(metal_colour(k), a), edgecolor="none") for k in range(len(metals))), name)
         for (_low, a), name in zip(CONFIDENCE_LEVELS, _confidence_names())],
        [(Patch(facecolor=EMPTY, edgecolor=UNRANGED, linewidth=0.5), "no ion, p \u2248 prior"),
         (Patch(facecolor="none", edgecolor=UNRANGED, hatch="////", linewidth=0.5), "masked (outside volume)")],
    ]
    flat = [h for g in groups for h in g]
    if ncol < len(flat):
        blank = (Patch(facecolor="none", edgecolor="none"), " ")
        lines = []
        for g in groups:
            for i in range(0, len(g), ncol):
                part = g[i:i + ncol]
                lines.append(part + [blank] * (ncol - len(part)))
        flat = [lines[r][c] for c in range(ncol) for r in range(len(lines))]
    return [h for h, _ in flat], [lab for _, lab in flat]


def _legend_layout(n_metals: int, width_in: float):
    """(columns, rows) of the tracks legend for a figure ``width_in`` wide."""
    n_lv = len(CONFIDENCE_LEVELS)
    if width_in >= 6.0 and n_metals <= 3:
        return n_metals + n_lv + 2, 1
    ncol = 4 if width_in >= 6.0 else 2
    rows = math.ceil(n_metals / ncol) + math.ceil(n_lv / ncol) + math.ceil(2 / ncol)
    return ncol, rows


def _select_track_cells(columns, decoded, depth_nm, selection, max_rods):
    """Validate the decoding, pick the rods and return ``(choice, sites, code)``."""
    vit, post, mask, prior = _check_decoded(columns, decoded)
    sites, inside_all = depth_window(columns, depth_nm)
    observed_rods = (mask[:, sites] & inside_all).any(axis=1)
    what = "with decoded sites" + ("" if depth_nm is None else " in the depth window")
    choice = choose_rods(columns, **selection, observed=observed_rods, max_rods=max_rods, what=what)
    code = track_cells(columns, decoded, choice.ids, sites, inside_all)
    return choice, sites, code


def _track_boxes(r, a, b, half=0.4):
    """Corner vertices (n, 4, 2) of boxes spanning ``a``..``b`` in depth on track rows ``r``."""
    v = np.empty((r.size, 4, 2))
    v[:, 0, 0] = v[:, 1, 0] = a
    v[:, 2, 0] = v[:, 3, 0] = b
    v[:, 0, 1] = v[:, 3, 1] = r - half
    v[:, 1, 1] = v[:, 2, 1] = r + half
    return v


def _track_geometry(columns, code, ids, sites):
    """Cell edges, per-track depth offsets and the merged drawn cells ``(row, x0, x1, val)``."""
    # geometry: cell edges along depth (per rod offset), one row per track
    edges = _site_edges(columns.site_z_nm, float(columns.pitch_nm))[sites.start:sites.stop + 1]
    off = columns.site_z_offset_nm[ids]
    row, first, stop, val = _merge_cells(code)
    drawn = val != _OUTSIDE
    row, first, stop, val = row[drawn], first[drawn], stop[drawn], val[drawn]
    x0 = edges[first] + off[row]
    x1 = edges[stop] + off[row]
    return edges, off, (row, x0, x1, val)


def _tracks_figure(size, n_tr, k_metals, title, caption):
    """Figure and axes sized for ``n_tr`` tracks.

    Returns ``(fig, ax, font, track_in, ncol, caption_lines)``: the base font (pt), the height of
    one track (inches), the legend's columns and the caption wrapped to the figure's width.
    """
    import textwrap

    # figure size: height from the number of tracks
    font = _font_pt(size)
    track_in = float(np.clip(4.2 / max(n_tr, 1), 0.075, 0.2))
    width_guess = figure_width_in(size) if isinstance(size, str) else _size_mm(size)[0] / MM_PER_INCH
    ncol, legend_rows = _legend_layout(k_metals, width_guess)
    legend_rows += 0.6
    # the caption in lines of about as many characters as fit the width (average glyph 0.5 em)
    lines = textwrap.wrap(caption or "", width=max(30, int(width_guess * 72.0 / (0.5 * CAPTION_SCALE * font))))
    height = (n_tr * track_in + 1.0 * font / 7.0 + legend_rows * 0.16 * font / 7.0 + (0.2 if title else 0.0)
              + len(lines) * 1.3 * CAPTION_SCALE * font / 72.0)
    fig = _new_figure(*_figure_size(size, height))
    ax = fig.add_subplot(1, 1, 1)
    return fig, ax, font, track_in, ncol, lines


def _draw_track_outlines(ax, code, edges, off, zorder=1):
    """Outline each track over its drawn extent; returns the depth range ``(dmin, dmax)``."""
    from matplotlib.collections import PolyCollection

    n_tr, n_win = code.shape
    # track outlines over the drawn extent of each track
    any_drawn = code != _OUTSIDE
    lo_i = np.argmax(any_drawn, axis=1)
    hi_i = n_win - np.argmax(any_drawn[:, ::-1], axis=1)
    rows = np.arange(n_tr)
    outlines = PolyCollection(_track_boxes(rows, edges[lo_i] + off, edges[hi_i] + off), facecolors="none",
                              edgecolors=UNRANGED, linewidths=0.4, zorder=zorder)
    outlines.set_gid("track-outlines")
    ax.add_collection(outlines)
    return float((edges[lo_i] + off).min()), float((edges[hi_i] + off).max())


def _draw_track_cells(ax, cells_drawn):
    """Draw the coloured cells and the hatched masked stretches as compound paths."""
    from matplotlib.collections import PathCollection
    from matplotlib.path import Path as MplPath

    row, x0, x1, val = cells_drawn
    n_lv = len(CONFIDENCE_LEVELS)
    # coloured cells: one compound path per colour (metal x level), so even thousands of merged
    # cells cost a handful of drawing operations in every backend
    alphas = np.array([lv[1] for lv in CONFIDENCE_LEVELS])
    paths, faces = [], []
    for c in np.unique(val[val >= 0]):
        sel = val == c
        paths.append(MplPath.make_compound_path_from_polys(_track_boxes(row[sel], x0[sel], x1[sel])))
        faces.append(_rgba(metal_colour(int(c) // n_lv), alphas[int(c) % n_lv]))
    cells = PathCollection(paths, facecolors=faces or "none", edgecolors="none", linewidths=0,
                           antialiaseds=False, zorder=2)
    cells.set_gid("track-cells")
    ax.add_collection(cells)
    _draw_masked(ax, cells_drawn)


def _draw_masked(ax, cells_drawn):
    """The masked stretches, hatched in light grey, as one compound path."""
    from matplotlib.collections import PathCollection
    from matplotlib.path import Path as MplPath

    row, x0, x1, val = cells_drawn
    msk = val == _MASKED
    mpaths = ([MplPath.make_compound_path_from_polys(_track_boxes(row[msk], x0[msk], x1[msk]))]
              if msk.any() else [])
    masked = PathCollection(mpaths, facecolors="none", edgecolors=UNRANGED, linewidths=0, hatch="////",
                            zorder=1.5)
    masked.set_gid("track-masked")
    ax.add_collection(masked)


def track_image(cells_drawn, depth_range, n_tracks: int, pitch_nm: float) -> np.ndarray:
    """The coloured cells of a tracks figure as an RGBA image, one pixel row per track.

    Parameters
    ----------
    cells_drawn : tuple of ndarray
        ``(row, x0, x1, code)``: merged cells, their depth span (nm) and code (see
        :func:`track_cells`).
    depth_range : (float, float), nm
        Depth of the image's left and right edges.
    n_tracks : int
        Number of tracks (image rows).
    pitch_nm : float
        Site pitch, nm; pixels are ``pitch_nm / IMAGE_PX_PER_SITE`` wide (at most
        :data:`IMAGE_MAX_PX` across).

    Returns
    -------
    (n_tracks, n_px, 4) ndarray of uint8
        Each pixel has the colour of the cell covering its centre: the metal's colour at the
        opacity of the cell's confidence level; transparent where no coloured cell is (blank,
        masked, outside the window).
    """
    row, x0, x1, val = (np.asarray(v) for v in cells_drawn)
    dmin, dmax = (float(v) for v in depth_range)
    span = max(dmax - dmin, 1e-9)
    n_px = int(np.clip(math.ceil(span * IMAGE_PX_PER_SITE / float(pitch_nm)), 64, IMAGE_MAX_PX))
    xc = (np.arange(n_px) + 0.5) * (span / n_px)
    # one sorted key line: track r occupies [r * w, r * w + span], so one search finds every pixel's cell
    w = span + 1.0
    start = row * w + (x0 - dmin)
    order = np.argsort(start, kind="stable")
    row, x1, val, start = row[order], x1[order], val[order], start[order]
    r_px = np.repeat(np.arange(n_tracks), n_px)
    x_px = np.tile(xc, n_tracks)
    j = np.searchsorted(start, r_px * w + x_px, side="right") - 1
    jj = np.clip(j, 0, None)
    hit = (j >= 0) & (row[jj] == r_px) & (x_px < x1[jj] - dmin) & (val[jj] >= 0)
    n_lv = len(CONFIDENCE_LEVELS)
    n_codes = int(val.max()) + 1 if val.size and val.max() >= 0 else 0
    lut = np.array([_rgba(metal_colour(c // n_lv), CONFIDENCE_LEVELS[c % n_lv][1]) for c in range(n_codes)]
                   or np.zeros((0, 4)))
    img = np.zeros((n_tracks * n_px, 4), dtype=np.uint8)
    img[hit] = np.round(255 * lut[val[jj[hit]]]).astype(np.uint8)
    return img.reshape(n_tracks, n_px, 4)


def _draw_track_image(ax, cells_drawn, depth_range, n_tr, pitch_nm):
    """Draw the coloured cells as one image (large figures), white gaps between tracks, masked hatched."""
    from matplotlib.collections import PolyCollection

    dmin, dmax = depth_range
    img = track_image(cells_drawn, depth_range, n_tr, pitch_nm)
    # 'none': SVG and PDF embed the image at its own size instead of resampling it to the page
    im = ax.imshow(img, extent=(dmin, dmax, n_tr - 0.5, -0.5), aspect="auto", interpolation="none",
                   origin="upper", zorder=2)
    im.set_gid("track-image")
    gaps = PolyCollection(_track_boxes(np.arange(n_tr - 1) + 0.5, dmin, dmax, half=0.1), facecolors=EMPTY,
                          edgecolors="none", linewidths=0, zorder=2.5)
    gaps.set_gid("track-gaps")
    ax.add_collection(gaps)
    _draw_masked(ax, cells_drawn)


def label_font_pt(font_pt: float, track_in: float) -> float:
    """Font size (pt) of the rod labels: the base font, shrunk so that a label fits its track.

    Parameters
    ----------
    font_pt : float
        The figure's base font, pt.
    track_in : float
        Height of one track, inches (a text line takes 1.2 times its font size).

    Returns
    -------
    float
        ``min(font_pt, 72 * track_in / 1.2)``, pt: every track gets its label.
    """
    return float(min(font_pt, 72.0 * track_in / 1.2))


def _style_track_axes(ax, ids, centre, n_tr, depth_range, font, track_in):
    """Depth axis below and rod labels left; returns the room kept for the scale bar."""
    from matplotlib.ticker import MaxNLocator

    dmin, dmax = depth_range
    ax.set_xlim(dmin, dmax)
    extra = max(0.9, 0.17 / track_in)  # room for the scale bar, in track heights
    ax.set_ylim(n_tr - 0.5 + extra, -0.6)
    ax.set_xlabel("depth z (nm)", fontsize=font)
    # every track is labelled: the labels' font shrinks to the track height (one line is 1.2 em)
    ax.set_yticks(np.arange(n_tr))
    labels = [f"rod {int(r)}" + (" (centre)" if centre is not None and r == centre else "") for r in ids]
    ax.set_yticklabels(labels, fontsize=label_font_pt(font, track_in))
    ax.tick_params(axis="y", length=0, pad=2)
    ax.tick_params(axis="x", labelsize=font, length=2.5, pad=1.5)
    for side in ("left", "right", "top"):
        ax.spines[side].set_visible(False)
    ax.xaxis.set_major_locator(MaxNLocator(nbins=8, steps=[1, 2, 2.5, 5, 10]))
    return extra


def _add_site_axis(ax, columns, n_win, font):
    """Secondary axis above giving the site index fitted to the site depths."""
    from matplotlib.ticker import MaxNLocator

    sz = columns.site_z_nm
    kk = np.arange(sz.size)
    slope, icpt = np.polyfit(kk, sz, 1) if sz.size > 1 else (float(columns.pitch_nm), float(sz[0]))
    top = ax.secondary_xaxis("top", functions=(lambda z: (z - icpt) / slope, lambda s: icpt + s * slope))
    top.xaxis.set_major_locator(MaxNLocator(nbins=8, integer=True, steps=[1, 2, 5, 10]))
    if n_win <= 120:
        from matplotlib.ticker import MultipleLocator

        top.xaxis.set_minor_locator(MultipleLocator(1))
    top.tick_params(labelsize=font * 0.9, length=2.5, pad=1, which="major")
    top.tick_params(length=1.2, which="minor")
    top.set_xlabel("site", fontsize=font * 0.9, labelpad=1.5)


def _add_scale_bar(ax, depth_range, n_tr, extra, font):
    """Scale bar under the last track, right-aligned."""
    dmin, dmax = depth_range
    bar = _nice_length(dmax - dmin)
    yb = n_tr - 0.5 + 0.55 * extra
    xb1 = dmax - 0.01 * (dmax - dmin)
    ax.plot([xb1 - bar, xb1], [yb, yb], color=METAL_COLOURS[-1], linewidth=1.2, solid_capstyle="butt", zorder=3)
    ax.text(xb1 - bar - 0.01 * (dmax - dmin), yb, f"{bar:g} nm", fontsize=font * 0.9, ha="right", va="center")


def plot_tracks(columns, decoded, path=None, *, rods=None, region=None, neighbours_of=None, sample=None,
                depth_nm=None, size="one-column", dpi=300, random_state=None, title=None,
                max_rods: int = MAX_TRACKS, caption=None, raster=None):
    """Sequence tracks: rods as parallel tracks along depth, sites coloured by decoded metal.

    Parameters
    ----------
    columns : RodColumns
    decoded : DecodeResult
        Or any object with ``viterbi`` (n_rods, n_sites), ``posteriors`` (n_rods, n_sites, K),
        ``mask`` and ``stationary`` (K,).
    path : str or Path, optional
        Save to this file (``.svg``, ``.pdf`` or ``.png``).
    rods, region, neighbours_of, sample, random_state
        Which rods, see :func:`choose_rods` (at most one; default a compact patch of
        :data:`DEFAULT_TRACKS` rods nearest the centre, lateral neighbours on adjacent tracks).
    depth_nm : (float, float), nm, optional
        Depth window ``(start, end)``.
    size : str or (float, float)
        'one-column' (85 mm wide), 'two-column' (178 mm) or ``(width_mm, height_mm)``; a preset's
        height grows with the number of tracks.
    dpi : float
        Resolution of PNG output (and of the tracks image inside SVG and PDF).
    title : str, optional
    max_rods : int
        The most tracks drawn (1 to :data:`MAX_TRACKS`); a larger choice keeps the rods nearest the
        centre of the field of view, and the caption says so.
    caption : str, optional
        Text above the tracks; default ``"Tracks: <rule>."`` with the rule that chose the rods
        (:attr:`RodChoice.rule`); ``""`` for none.
    raster : bool, optional
        Draw the coloured cells as one image (True) or as vector paths (False); default: an image
        when there are more than :data:`RASTER_CELLS` merged cells and ``path`` is not a PNG, so
        large SVG and PDF files stay small and fast (Agg draws a PNG faster from the paths).

    Returns
    -------
    matplotlib.figure.Figure
        Its axes hold collections with gids ``track-outlines`` (one rectangle per track),
        ``track-masked`` (hatched masked stretches) and either ``track-cells`` (one compound path
        of merged cells per colour) or an image ``track-image`` (see :func:`track_image`) with
        ``track-gaps`` between the tracks. The caption is the figure's ``suptitle`` (gid
        ``track-caption``).

    Raises
    ------
    InputError
        Unknown rod ids (the message gives the range of ids), an empty depth window (the message
        gives the depth range of the sites), several ways of choosing rods, a bad size or suffix.
    """
    from matplotlib.legend_handler import HandlerTuple

    dpi = _check_dpi(dpi)
    selection = dict(rods=rods, region=region, neighbours_of=neighbours_of, sample=sample,
                     random_state=random_state)
    choice, sites, code = _select_track_cells(columns, decoded, depth_nm, selection, max_rods)
    ids, centre = choice.ids, choice.centre
    n_tr, n_win = code.shape
    edges, off, cells_drawn = _track_geometry(columns, code, ids, sites)
    if caption is None:
        caption = f"Tracks: {choice.rule}."
    if raster is None:  # an image keeps large SVG and PDF files small; a PNG is drawn faster from paths
        raster = cells_drawn[0].size > RASTER_CELLS and not str(path or "").lower().endswith(".png")
    as_image = bool(raster)

    fig, ax, font, track_in, ncol, lines = _tracks_figure(size, n_tr, columns.n_metals, title, caption)
    depth_range = _draw_track_outlines(ax, code, edges, off, zorder=3 if as_image else 1)
    if as_image:
        _draw_track_image(ax, cells_drawn, depth_range, n_tr, float(columns.pitch_nm))
    else:
        _draw_track_cells(ax, cells_drawn)

    # axes: depth below, site index above, rod labels left
    extra = _style_track_axes(ax, ids, centre, n_tr, depth_range, font, track_in)
    _add_site_axis(ax, columns, n_win, font)
    _add_scale_bar(ax, depth_range, n_tr, extra, font)

    metals = tuple(columns.metals)
    handles, labels = _track_legend(metals, ncol)
    fig.legend(handles=handles, labels=labels, handler_map={tuple: HandlerTuple(ndivide=None, pad=0)},
               loc="outside lower center", ncols=ncol, fontsize=font * 0.9, frameon=False, handlelength=1.6,
               handleheight=0.8, columnspacing=0.9, handletextpad=0.4, borderaxespad=0.1,
               title="p = posterior of the decoded metal", title_fontsize=font * 0.9)
    if title:
        ax.set_title(title, fontsize=font * 1.1)
    if lines:
        fig.suptitle("\n".join(lines), fontsize=CAPTION_SCALE * font, ha="left", x=0.01,
                     linespacing=1.15).set_gid("track-caption")
    if path is not None:
        save_figure(fig, path, dpi=dpi)
    return fig
