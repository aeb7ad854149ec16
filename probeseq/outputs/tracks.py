"""The sequence-track figure: which rods, which depth window, and how the tracks are drawn.
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

__all__ = ['DEFAULT_TRACKS', 'MAX_TRACKS', 'parse_rod_ids', 'depth_window', 'select_rods', 'track_cells', 'plot_tracks']

#: rods shown when no selection is given
DEFAULT_TRACKS = 24


#: most tracks one figure may hold
MAX_TRACKS = 400


# cell codes besides metal * n_levels + level
_BLANK = -1


_MASKED = -2


_OUTSIDE = -3


# ---------------------------------------------------------------------------------- rod selection
def parse_rod_ids(text: str) -> np.ndarray:
    """Rod ids from text such as ``"3,5,10-14"`` (ranges inclusive).

    Parameters
    ----------
    text : str

    Returns
    -------
    (n,) ndarray of int
    """
    out = []
    for item in str(text).split(","):
        item = item.strip()
        if not item:
            raise InputError(f"rods: empty item in {text!r} (expected e.g. '3,5,10-14')")
        lo, sep, hi = item.partition("-")
        try:
            a = int(lo)
            b = int(hi) if sep else a
        except ValueError:
            raise InputError(f"rods: {item!r} in {text!r} is not a rod id or a range a-b of rod ids") from None
        if b < a:
            raise InputError(f"rods: range {item!r} ends before it starts")
        out.extend(range(a, b + 1))
    return np.asarray(out, dtype=np.int64)


def _rod_id_array(rods, n_rods: int, what: str = "rods") -> np.ndarray:
    if isinstance(rods, str):
        ids = parse_rod_ids(rods)
    else:
        arr = np.atleast_1d(np.asarray(rods))
        if arr.size == 0:
            raise InputError(f"{what}: no rod id given; rods are numbered 0..{n_rods - 1}")
        if arr.dtype.kind == "f" and np.all(np.isfinite(arr)) and np.all(arr == np.round(arr)):
            arr = arr.astype(np.int64)
        if arr.dtype.kind not in "iu" or arr.ndim != 1:
            raise InputError(f"{what}: expected integer rod ids, got {rods!r}")
        ids = arr.astype(np.int64)
    bad = ids[(ids < 0) | (ids >= n_rods)]
    if bad.size:
        shown = ", ".join(str(int(v)) for v in bad[:5]) + (", ..." if bad.size > 5 else "")
        raise InputError(f"{what}: unknown rod id(s) {shown}; this run has rods 0..{n_rods - 1}")
    _, first = np.unique(ids, return_index=True)
    return ids[np.sort(first)]


def _chain_order(xy: np.ndarray) -> np.ndarray:
    """Order points so each is followed by its nearest unvisited point (lateral neighbours adjacent)."""
    m = xy.shape[0]
    if m <= 2:
        return np.arange(m)
    centre = xy.mean(axis=0)
    start = int(np.argmax(((xy - centre) ** 2).sum(1)))
    order = [start]
    left = np.ones(m, dtype=bool)
    left[start] = False
    cur = start
    for _ in range(m - 1):
        d = ((xy - xy[cur]) ** 2).sum(1)
        d[~left] = np.inf
        cur = int(np.argmin(d))
        order.append(cur)
        left[cur] = False
    return np.asarray(order, dtype=np.int64)


def _neighbours_of(columns, rod: int) -> np.ndarray:
    nb = columns.neighbours
    mine = np.concatenate([nb[nb[:, 0] == rod, 1], nb[nb[:, 1] == rod, 0]]) if nb.size else np.zeros(0, np.int64)
    xy = columns.rod_xy_nm
    if mine.size == 0 and columns.n_rods > 1:
        d = np.sqrt(((xy - xy[rod]) ** 2).sum(1))
        d[rod] = np.inf
        mine = np.flatnonzero(d <= 1.2 * d.min())
    mine = np.unique(mine)
    ang = np.arctan2(xy[mine, 1] - xy[rod, 1], xy[mine, 0] - xy[rod, 0])
    return mine[np.argsort(ang, kind="stable")]


def _in_region(xy: np.ndarray, region) -> tuple:
    try:
        vals = tuple(float(v) for v in region)
    except (TypeError, ValueError):
        vals = ()
    if len(vals) == 4 and all(map(math.isfinite, vals)) and vals[0] < vals[1] and vals[2] < vals[3]:
        x0, x1, y0, y1 = vals
        inside = (xy[:, 0] >= x0) & (xy[:, 0] <= x1) & (xy[:, 1] >= y0) & (xy[:, 1] <= y1)
        return inside, f"box x {x0:g}..{x1:g} nm, y {y0:g}..{y1:g} nm"
    if len(vals) == 3 and all(map(math.isfinite, vals)) and vals[2] > 0:
        cx, cy, r = vals
        inside = (xy[:, 0] - cx) ** 2 + (xy[:, 1] - cy) ** 2 <= r * r
        return inside, f"disc centre ({cx:g}, {cy:g}) nm, radius {r:g} nm"
    raise InputError(f"region: expected a box (x_min, x_max, y_min, y_max) or a disc (x, y, radius) in nm "
                     f"with min < max and radius > 0, got {region!r}")


def select_rods(columns, *, rods=None, region=None, neighbours_of=None, sample=None, random_state=None,
                observed=None, max_default: int = DEFAULT_TRACKS):
    """Choose the rods of a tracks figure (or an export), in display order.

    At most one way of choosing may be given. Rod ids are the row indices of ``columns``
    (the ``rod`` column of ``tracks.csv``).

    Parameters
    ----------
    columns : RodColumns
    rods : sequence of int or str, optional
        These rods, in the order given (text such as ``"3,5,10-14"`` is accepted).
    region : tuple of float, nm, optional
        Rods whose axis at ``columns.z_ref_nm`` lies in the box ``(x_min, x_max, y_min, y_max)`` or
        the disc ``(x, y, radius)``; ordered so that lateral neighbours are adjacent tracks.
    neighbours_of : int, optional
        That rod followed by its nearest neighbours (by angle around it).
    sample : int, optional
        A random sample of this many rods among those with observed sites, in id order.
    random_state : None, int or numpy.random.Generator
        Seed of ``sample``.
    observed : (n_rods,) ndarray of bool, optional
        Rods with observed sites (default: any unmasked site).
    max_default : int
        With no choice given: every rod when there are at most this many, else the
        ``max_default`` observed rods nearest the lateral centre of the observed rods.

    Returns
    -------
    ids : (n,) ndarray of int
        Selected rod ids in display order.
    centre : int or None
        The rod given as ``neighbours_of``.
    """
    n = columns.n_rods
    given = [k for k, v in (("rods", rods), ("region", region), ("neighbours_of", neighbours_of),
                            ("sample", sample)) if v is not None]
    if len(given) > 1:
        raise InputError(f"choose rods one way only; got {', '.join(given)}")
    obs = columns.mask.any(axis=1) if observed is None else np.asarray(observed, dtype=bool)
    xy = columns.rod_xy_nm
    centre = None
    if rods is not None:
        ids = _rod_id_array(rods, n)
    elif neighbours_of is not None:
        if isinstance(neighbours_of, (bool, np.bool_)) or not isinstance(neighbours_of, (int, np.integer)):
            raise InputError(f"neighbours_of: expected one rod id, got {neighbours_of!r}")
        centre = int(_rod_id_array([neighbours_of], n, "neighbours_of")[0])
        ids = np.concatenate([[centre], _neighbours_of(columns, centre)]).astype(np.int64)
    elif region is not None:
        inside, desc = _in_region(xy, region)
        ids = np.flatnonzero(inside)
        if ids.size == 0:
            raise InputError(f"region ({desc}) holds no rod axis; rod axes span x {xy[:, 0].min():.2f}.."
                             f"{xy[:, 0].max():.2f} nm, y {xy[:, 1].min():.2f}..{xy[:, 1].max():.2f} nm")
        ids = ids[_chain_order(xy[ids])]
    elif sample is not None:
        if isinstance(sample, (bool, np.bool_)) or not isinstance(sample, (int, np.integer)) or sample < 1:
            raise InputError(f"sample: expected a number of rods >= 1, got {sample!r}")
        pool = np.flatnonzero(obs) if obs.any() else np.arange(n)
        rng = np.random.default_rng(random_state)
        ids = np.sort(rng.choice(pool, size=min(int(sample), pool.size), replace=False))
    else:
        pool = np.flatnonzero(obs) if obs.any() else np.arange(n)
        if pool.size > max_default:
            c = np.median(xy[pool], axis=0)
            d = ((xy[pool] - c) ** 2).sum(1)
            pool = pool[np.argsort(d, kind="stable")[:max_default]]
        ids = pool[_chain_order(xy[pool])]
    if ids.size > MAX_TRACKS:
        raise InputError(f"{given[0] if given else 'selection'}: {ids.size} rods chosen, at most {MAX_TRACKS} "
                         "tracks fit one figure; narrow the choice or use sample=")
    return ids.astype(np.int64), centre


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
    v = vit[ids, sites]
    m = mask[ids, sites] & (v >= 0)
    p = post[ids, sites]
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
    """Legend handles: metals, confidence levels, then blank and masked, each group starting a new
    row of ``ncol`` entries (matplotlib fills legend columns first, so the rows are interleaved)."""
    from matplotlib.patches import Patch

    groups = [
        [Patch(facecolor=metal_colour(k), edgecolor="none", label=m) for k, m in enumerate(metals)],
        [Patch(facecolor=_rgba(METAL_COLOURS[-1], a), edgecolor="none", label=name)
         for (_low, a), name in zip(CONFIDENCE_LEVELS, _confidence_names())],
        [Patch(facecolor=EMPTY, edgecolor=UNRANGED, linewidth=0.5, label="no ion, p \u2248 prior"),
         Patch(facecolor="none", edgecolor=UNRANGED, hatch="////", linewidth=0.5, label="masked (outside volume)")],
    ]
    flat = [h for g in groups for h in g]
    if ncol >= len(flat):
        return flat
    blank = Patch(facecolor="none", edgecolor="none", label=" ")
    lines = []
    for g in groups:
        for i in range(0, len(g), ncol):
            part = g[i:i + ncol]
            lines.append(part + [blank] * (ncol - len(part)))
    return [lines[r][c] for c in range(ncol) for r in range(len(lines))]


def _legend_layout(n_metals: int, width_in: float):
    """(columns, rows) of the tracks legend for a figure ``width_in`` wide."""
    n_lv = len(CONFIDENCE_LEVELS)
    if width_in >= 6.0 and n_metals <= 3:
        return n_metals + n_lv + 2, 1
    ncol = 4 if width_in >= 6.0 else 2
    rows = math.ceil(n_metals / ncol) + math.ceil(n_lv / ncol) + math.ceil(2 / ncol)
    return ncol, rows


def _select_track_cells(columns, decoded, depth_nm, selection):
    """Validate the decoding, pick the rods and return ``(ids, centre, sites, code)``."""
    vit, post, mask, prior = _check_decoded(columns, decoded)
    sites, inside_all = depth_window(columns, depth_nm)
    observed_rods = (mask[:, sites] & inside_all).any(axis=1)
    ids, centre = select_rods(columns, **selection, observed=observed_rods)
    code = track_cells(columns, decoded, ids, sites, inside_all)
    return ids, centre, sites, code


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


def _tracks_figure(size, n_tr, k_metals, title):
    """Figure and axes sized for ``n_tr`` tracks; returns ``(fig, ax, font, track_in, ncol)``."""
    # figure size: height from the number of tracks
    font = _font_pt(size)
    track_in = float(np.clip(4.2 / max(n_tr, 1), 0.075, 0.2))
    width_guess = figure_width_in(size) if isinstance(size, str) else _size_mm(size)[0] / MM_PER_INCH
    ncol, legend_rows = _legend_layout(k_metals, width_guess)
    legend_rows += 0.6
    height = n_tr * track_in + 1.0 * font / 7.0 + legend_rows * 0.16 * font / 7.0 + (0.2 if title else 0.0)
    fig = _new_figure(*_figure_size(size, height))
    ax = fig.add_subplot(1, 1, 1)
    return fig, ax, font, track_in, ncol


def _draw_track_outlines(ax, code, edges, off):
    """Outline each track over its drawn extent; returns the depth range ``(dmin, dmax)``."""
    from matplotlib.collections import PolyCollection

    n_tr, n_win = code.shape
    # track outlines over the drawn extent of each track
    any_drawn = code != _OUTSIDE
    lo_i = np.argmax(any_drawn, axis=1)
    hi_i = n_win - np.argmax(any_drawn[:, ::-1], axis=1)
    rows = np.arange(n_tr)
    outlines = PolyCollection(_track_boxes(rows, edges[lo_i] + off, edges[hi_i] + off), facecolors="none",
                              edgecolors=UNRANGED, linewidths=0.4, zorder=1)
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

    # masked stretches: light grey hatch
    msk = val == _MASKED
    mpaths = ([MplPath.make_compound_path_from_polys(_track_boxes(row[msk], x0[msk], x1[msk]))]
              if msk.any() else [])
    masked = PathCollection(mpaths, facecolors="none", edgecolors=UNRANGED, linewidths=0, hatch="////",
                            zorder=1.5)
    masked.set_gid("track-masked")
    ax.add_collection(masked)


def _style_track_axes(ax, ids, centre, n_tr, depth_range, font, track_in):
    """Depth axis below and rod labels left; returns the room kept for the scale bar."""
    from matplotlib.ticker import MaxNLocator

    dmin, dmax = depth_range
    ax.set_xlim(dmin, dmax)
    extra = max(0.9, 0.17 / track_in)  # room for the scale bar, in track heights
    ax.set_ylim(n_tr - 0.5 + extra, -0.6)
    ax.set_xlabel("depth z (nm)", fontsize=font)
    step = max(1, math.ceil(n_tr * font * 1.15 / 72.0 / (n_tr * track_in)))
    ax.set_yticks(np.arange(n_tr))
    labels = []
    for i, r in enumerate(ids):
        if i % step:
            labels.append("")
        else:
            labels.append(f"rod {int(r)}" + (" (centre)" if centre is not None and r == centre else ""))
    ax.set_yticklabels(labels, fontsize=font * (0.85 if step == 1 and track_in < 0.11 else 1.0))
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
                depth_nm=None, size="one-column", dpi=300, random_state=None, title=None):
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
        Which rods, see :func:`select_rods` (at most one; default a compact patch of
        :data:`DEFAULT_TRACKS` rods near the centre, lateral neighbours on adjacent tracks).
    depth_nm : (float, float), nm, optional
        Depth window ``(start, end)``.
    size : str or (float, float)
        'one-column' (85 mm wide), 'two-column' (178 mm) or ``(width_mm, height_mm)``; a preset's
        height grows with the number of tracks.
    dpi : float
        Resolution of PNG output.
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
        Its axes hold three collections with gids ``track-outlines`` (one rectangle per track),
        ``track-cells`` (one compound path of merged cells per colour) and ``track-masked``
        (hatched masked stretches).

    Raises
    ------
    InputError
        Unknown rod ids (the message gives the range of ids), an empty depth window (the message
        gives the depth range of the sites), several ways of choosing rods, a bad size or suffix.
    """
    dpi = _check_dpi(dpi)
    selection = dict(rods=rods, region=region, neighbours_of=neighbours_of, sample=sample,
                     random_state=random_state)
    ids, centre, sites, code = _select_track_cells(columns, decoded, depth_nm, selection)
    n_tr, n_win = code.shape
    edges, off, cells_drawn = _track_geometry(columns, code, ids, sites)

    fig, ax, font, track_in, ncol = _tracks_figure(size, n_tr, columns.n_metals, title)
    depth_range = _draw_track_outlines(ax, code, edges, off)
    _draw_track_cells(ax, cells_drawn)

    # axes: depth below, site index above, rod labels left
    extra = _style_track_axes(ax, ids, centre, n_tr, depth_range, font, track_in)
    _add_site_axis(ax, columns, n_win, font)
    _add_scale_bar(ax, depth_range, n_tr, extra, font)

    metals = tuple(columns.metals)
    fig.legend(handles=_track_legend(metals, ncol), loc="outside lower center", ncols=ncol,
               fontsize=font * 0.9, frameon=False, handlelength=1.2, handleheight=0.8, columnspacing=0.9,
               handletextpad=0.4, borderaxespad=0.1, title="p = posterior of the decoded metal",
               title_fontsize=font * 0.9)
    if title:
        ax.set_title(title, fontsize=font * 1.1)
    if path is not None:
        save_figure(fig, path, dpi=dpi)
    return fig
