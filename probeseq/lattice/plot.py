"""Figure of the columns stage: the projected metal density with the fitted rod axes drawn over it."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.palette import EMPTY, METAL_COLOURS, OTHER, metal_colour

__all__ = ['plot_rod_density', 'plot_reconstruction', 'decoded_rods']


def decoded_rods(columns) -> np.ndarray:
    """Rods the decoder read: at least one used site and at least one metal count in the used sites.

    Parameters
    ----------
    columns : RodColumns

    Returns
    -------
    (n_rods,) ndarray of bool
    """
    if not columns.n_sites:
        return np.zeros(columns.n_rods, bool)
    mask = np.asarray(columns.mask, bool)
    # counts are non-negative: a used site holds an ion when its largest count is positive (read in
    # the counts' own dtype, no float64 copy of the whole array)
    seen = np.asarray(columns.counts).max(axis=-1) > 0
    return mask.any(axis=1) & (seen & mask).any(axis=1)


def plot_rod_density(x, y, z, columns, path, *, bin_nm: float | None = None, title: str | None = None):
    """Write a 2-D histogram of the tilt-corrected metal density with the rod axes drawn over it.

    Positions are projected along the fitted rod direction to depth ``columns.z_ref_nm``
    (``x - tilt_x (z - z_ref)``), so the rods appear as sharp spots; the axes say so. The colour is
    metal ions per nm^2 of the cross-section (the bin counts divided by the bin's area) on a
    square-root scale, so the faint spots of edge rods stay visible. Rod axes
    are open circles of radius one quarter of the nearest rod distance: rods that were decoded
    (at least one used site and at least one metal count in their used sites) in a metal colour,
    the others (no used site, or no ion in it: nothing to decode) in grey.

    Parameters
    ----------
    x, y, z : (n_ions,) ndarray of float, nm
        Metal-ion positions.
    columns : RodColumns
        Output of :func:`~probeseq.lattice.columns.build_columns`.
    path : str or Path
        Output file; the suffix (``.png`` or ``.svg``) picks the format.
    bin_nm : float, nm, optional
        Histogram bin; default one sixth of the nearest rod distance.
    title : str, optional

    Returns
    -------
    Path
        The file written.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.collections import EllipseCollection
    from matplotlib.colors import LinearSegmentedColormap, PowerNorm

    path = Path(path)
    if path.suffix.lower() not in (".png", ".svg"):
        raise InputError(f"figure path {path}: expected a .png or .svg suffix, got '{path.suffix}'")
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    z = np.asarray(z, float)
    if not (x.shape == y.shape == z.shape) or x.size == 0:
        raise InputError("plot_rod_density: x, y, z must be non-empty arrays of equal length")
    from .correction import ReconstructionCorrection

    # the rods were placed on calibrated positions: draw the ions there too
    x, y, z = ReconstructionCorrection.from_dict(columns.params.get("reconstruction")).apply(x, y, z)
    reg = columns.params.get("registration", {})
    scale = float(reg.get("scale") or 1.0)
    lat = reg.get("lattice")
    d_nn = None
    if lat is not None:
        from .model import Lattice

        d_nn = Lattice.from_dict(lat, where="registration lattice").nearest_rod_distance_nm * scale
    if d_nn is None:
        xy = columns.rod_xy_nm
        if xy.shape[0] > 1:
            dd = np.sqrt(((xy[:, None] - xy[None]) ** 2).sum(-1))
            dd[dd == 0] = np.inf
            d_nn = float(dd.min())
        else:
            d_nn = 1.0
    h = float(bin_nm) if bin_nm is not None else d_nn / 6.0
    if not h > 0:
        raise InputError(f"bin_nm must be positive, got {bin_nm!r}")
    xc = x - columns.tilt[0] * (z - columns.z_ref_nm)
    yc = y - columns.tilt[1] * (z - columns.z_ref_nm)
    lo = np.array([xc.min(), yc.min()]) - 2 * h
    hi = np.array([xc.max(), yc.max()]) + 2 * h
    nbin = np.minimum(np.ceil((hi - lo) / h).astype(int), 2000)
    H, xe, ye = np.histogram2d(xc, yc, bins=nbin, range=[[lo[0], hi[0]], [lo[1], hi[1]]])
    cmap = LinearSegmentedColormap.from_list("density", [EMPTY, METAL_COLOURS[0], METAL_COLOURS[-1]])
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.4, 6.0), dpi=150)  # not pyplot: no global figure, the user's backend untouched
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    # square-root colour scale: the faint spots of edge rods (few ions) stay visible beside dense ones
    im = ax.imshow(H.T / (h * h), origin="lower", extent=(xe[0], xe[-1], ye[0], ye[-1]), cmap=cmap,
                   interpolation="nearest", aspect="equal", norm=PowerNorm(0.5))
    fig.colorbar(im, ax=ax, shrink=0.8,
                 label=f"metal ions per nm\u00b2 (bins of {h:.3g} nm \u00d7 {h:.3g} nm, whole depth)")
    used = decoded_rods(columns)
    for sel, colour, label in ((used, metal_colour(1), f"rod axis, decoded ({int(used.sum())})"),
                               (~used, OTHER, f"rod axis, not decoded: no ion in its used sites ({int((~used).sum())})")):
        if sel.any():
            xy = columns.rod_xy_nm[sel]
            ec = EllipseCollection(np.full(xy.shape[0], d_nn / 2), np.full(xy.shape[0], d_nn / 2),
                                   np.zeros(xy.shape[0]), units="xy", offsets=xy, offset_transform=ax.transData,
                                   facecolors="none", edgecolors=colour, linewidths=0.6)
            ax.add_collection(ec)
            ax.plot([], [], "o", mfc="none", mec=colour, label=label)
    ax.set_xlim(xe[0], xe[-1])
    ax.set_ylim(ye[0], ye[-1])
    zr = float(columns.z_ref_nm)
    ax.set_xlabel(f"x moved along the rods to depth z_ref = {zr:.1f} nm (nm)")
    ax.set_ylabel(f"y at depth z_ref = {zr:.1f} nm (nm)")
    rot = reg.get("rotation_deg")
    sub = (f"rotation {rot:.2f} deg, scale {scale:.4f}, sigma {reg.get('sigma_xy_nm') or float('nan'):.3f} nm, "
           f"misassigned {columns.misassigned_fraction:.3f}" if rot is not None else "")
    head = title or "Metal density with fitted rod axes"
    ax.set_title(f"{head}\n{sub}" if sub else head, fontsize=9)
    ax.legend(loc="upper right", fontsize=7, framealpha=0.8)
    fig.tight_layout()
    from ..utils.marks import figure_save_kwargs

    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, **figure_save_kwargs(path))
    return path


def plot_reconstruction(report: dict, path=None, *, efficiency: dict | None = None):
    """Draw the reconstruction's calibration: depth scale against depth, the phase left across the
    field of view, the lateral magnification against depth and (when given) the detection
    efficiency against radius.

    Parameters
    ----------
    report : dict
        The ``reconstruction`` record (:meth:`ReconstructionCorrection.to_dict`).
    path : str or Path, optional
        Save as ``<stem>.png`` and ``<stem>.svg``.
    efficiency : dict, optional
        The decoder's ``radial_efficiency`` record (its profile ``1 + a (rho_n^2 - c)`` is drawn).

    Returns
    -------
    matplotlib.figure.Figure or None
        None when the record holds nothing to draw.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    depth = (report or {}).get("depth") or {}
    lateral = (report or {}).get("lateral") or {}
    prof = depth.get("depth_scale_profile") or {}
    if not prof.get("z_nm") and not lateral.get("z_slab_nm"):
        return None
    eff = efficiency if efficiency and efficiency.get("a") is not None and efficiency.get("c") is not None else None
    n = 3 + (eff is not None)
    fig = Figure(figsize=(3.4 * n, 3.2), layout="constrained")
    FigureCanvasAgg(fig)
    axes = [fig.add_subplot(1, n, k + 1) for k in range(n)]
    ax = axes[0]
    pitch = depth.get("expected_pitch_nm") or float("nan")
    if prof.get("z_nm"):
        zz = np.array(prof["z_nm"], float)
        sc = np.array([np.nan if v is None else v for v in prof["scale"]], float)
        se = np.array([np.nan if v is None else v for v in prof["scale_err"]], float)
        ax.fill_between(zz, (sc - 2 * se) * pitch, (sc + 2 * se) * pitch, color=OTHER, alpha=0.35, lw=0,
                        label="fit, 2 s.e.")
        ax.plot(zz, sc * pitch, color="black", lw=1.2, label="fitted")
    win = depth.get("windows") or {}
    if win.get("scale"):
        wz = np.array(win["z_nm"], float)
        ws = np.array([np.nan if v is None else v for v in win["scale"]], float)
        ax.plot(wz, ws * pitch, "o", ms=3, color=METAL_COLOURS[0], label="depth windows")
    ax.axhline(pitch, color="grey", ls="--", lw=0.8, label="lattice pitch")
    ax.set_xlabel("depth in the file (nm)")
    ax.set_ylabel("site pitch measured along depth (nm)")
    title = "not calibrated" if not depth.get("calibrated") else f"mean depth scale {depth.get('mean_depth_scale'):.4f}"
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    ax = axes[1]
    res = depth.get("residual_phase") or {}
    if res.get("phase_pitches"):
        ph = np.array([[np.nan if v is None else v for v in row] for row in res["phase_pitches"]], float)
        ex, ey = res["x_edges_nm"], res["y_edges_nm"]
        im = ax.imshow(ph.T, origin="lower", extent=(ex[0], ex[-1], ey[0], ey[-1]), cmap="RdBu_r", vmin=-0.25,
                       vmax=0.25, aspect="equal")
        fig.colorbar(im, ax=ax, label="phase left (pitches)", shrink=0.8)
        ax.set_title(f"after calibration, rms {res.get('rms_pitches')}; curvature sag {depth.get('sag_at_radius_nm')} nm",
                     fontsize=8)
    else:
        ax.text(0.5, 0.5, "no phase map", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax = axes[2]
    if lateral.get("z_slab_nm"):
        zs = np.array(lateral["z_slab_nm"], float)
        sc = np.array(lateral["scale"], float)
        se = np.array(lateral["scale_err"], float)
        ax.errorbar(zs, sc, yerr=2 * se, fmt="o", ms=3, color=METAL_COLOURS[1 % len(METAL_COLOURS)], capsize=2)
        ax.set_title(f"magnification change {100 * lateral.get('magnification_change', 0):.1f} % "
                     f"({'corrected' if lateral.get('applied') else 'not corrected'})", fontsize=8)
    else:
        ax.text(0.5, 0.5, lateral.get("reason", "no lateral refit"), ha="center", va="center", fontsize=7,
                wrap=True, transform=ax.transAxes)
    ax.set_xlabel("depth in the file (nm)")
    ax.set_ylabel("lateral scale per depth slab (2 s.e.)")
    if eff is not None:
        ax = axes[3]
        rho = np.linspace(0, 1, 51)
        a, c, se = float(eff["a"]), float(eff["c"]), float(eff.get("a_se") or 0.0)
        h = 1 + a * (rho ** 2 - c)
        band = 2 * se * np.abs(rho ** 2 - c)
        ax.fill_between(rho, h - band, h + band, color=OTHER, alpha=0.35, lw=0, label="2 s.e.")
        ax.plot(rho, h, color="black", lw=1.2, label="fitted")
        ax.axhline(1.0, color="grey", ls="--", lw=0.8)
        ax.set_xlabel("distance from the specimen axis / outline radius")
        ax.set_ylabel("relative detection efficiency")
        ax.set_title("used by the decoder" if eff.get("applied") else "not used (flat)", fontsize=8)
    if path is not None:
        from ..ranging.plot import save_figure

        save_figure(fig, path)
    return fig
