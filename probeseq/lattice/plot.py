"""Figure of the columns stage: the projected metal density with the fitted rod axes drawn over it."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.palette import EMPTY, METAL_COLOURS, OTHER, metal_colour

__all__ = ['plot_rod_density']

def plot_rod_density(x, y, z, columns, path, *, bin_nm: float | None = None, title: str | None = None):
    """Write a 2-D histogram of the tilt-corrected metal density with the rod axes drawn over it.

    Positions are projected along the fitted rod direction to depth ``columns.z_ref_nm``
    (``x - tilt_x (z - z_ref)``), so the rods appear as sharp spots. Used rods are drawn as open
    circles of radius one quarter of the nearest rod distance; rods with no used site in grey.

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
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.collections import EllipseCollection
    from matplotlib.colors import LinearSegmentedColormap

    path = Path(path)
    if path.suffix.lower() not in (".png", ".svg"):
        raise InputError(f"figure path {path}: expected a .png or .svg suffix, got '{path.suffix}'")
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    z = np.asarray(z, float)
    if not (x.shape == y.shape == z.shape) or x.size == 0:
        raise InputError("plot_rod_density: x, y, z must be non-empty arrays of equal length")
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
    fig, ax = plt.subplots(figsize=(6.4, 6.0), dpi=150)
    im = ax.imshow(H.T, origin="lower", extent=(xe[0], xe[-1], ye[0], ye[-1]), cmap=cmap,
                   interpolation="nearest", aspect="equal")
    fig.colorbar(im, ax=ax, shrink=0.8, label=f"metal ions per {h:.3g} nm bin")
    used = columns.mask.any(1) if columns.n_sites else np.zeros(columns.n_rods, bool)
    for sel, colour, label in ((used, metal_colour(1), "rod axis (used)"), (~used, OTHER, "rod axis (unused)")):
        if sel.any():
            xy = columns.rod_xy_nm[sel]
            ec = EllipseCollection(np.full(xy.shape[0], d_nn / 2), np.full(xy.shape[0], d_nn / 2),
                                   np.zeros(xy.shape[0]), units="xy", offsets=xy, offset_transform=ax.transData,
                                   facecolors="none", edgecolors=colour, linewidths=0.6)
            ax.add_collection(ec)
            ax.plot([], [], "o", mfc="none", mec=colour, label=label)
    ax.set_xlim(xe[0], xe[-1])
    ax.set_ylim(ye[0], ye[-1])
    ax.set_xlabel("x at z_ref (nm)")
    ax.set_ylabel("y at z_ref (nm)")
    rot = reg.get("rotation_deg")
    sub = (f"rotation {rot:.2f} deg, scale {scale:.4f}, sigma {reg.get('sigma_xy_nm') or float('nan'):.3f} nm, "
           f"misassigned {columns.misassigned_fraction:.3f}" if rot is not None else "")
    head = title or "Metal density with fitted rod axes"
    ax.set_title(f"{head}\n{sub}" if sub else head, fontsize=9)
    ax.legend(loc="upper right", fontsize=7, framealpha=0.8)
    fig.tight_layout()
    from ..utils.marks import figure_metadata

    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, metadata=figure_metadata(path))
    plt.close(fig)
    return path
