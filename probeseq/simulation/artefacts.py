"""Reconstruction artefacts of the forward simulator: what turns the ideal reconstruction of a
simulated run into a distorted one (see stage 6 of :mod:`probeseq.simulation.simulate`).

Every artefact is off by default, and an artefact that is off touches no number: a run without
artefacts is bit-identical to one made before they existed. The maps, for an ion (or a site on its
rod axis) at the ideal reconstruction-frame position ``(x, y, zeta)``, with ``rho = sqrt(x^2 + y^2)``
its lateral distance from the specimen axis (the z axis) and ``D = depth_nm`` (their physical
causes are in the module docstring of :mod:`probeseq.simulation.simulate`):

* lateral magnification: ``x_rec = m x``, ``y_rec = m y``, ``m = 1 + magnification_change * zeta / D``;
* depth: ``z_rec = Z(zeta) + kappa rho^2`` with
  ``Z(zeta) = depth_scale * (zeta + depth_scale_change * zeta^2 / (2 D))`` (local depth scale
  ``dZ/dzeta = depth_scale * (1 + depth_scale_change * zeta / D)``) and
  ``kappa = plane_curvature_per_nm``;
* detection towards the edge: an ion is kept with probability
  ``1 - (1 - edge_efficiency) * min(rho / R(zeta), 1)^2``, ``R(zeta)`` the needle radius at its
  depth (drawn from a generator of its own, ``default_rng([seed, 7])``, so the other random numbers
  of the run stay those of the run without it).
"""

from __future__ import annotations

import math

import numpy as np

from ..exceptions import InputError
from ..utils.validate import check_number

__all__ = ["ARTEFACT_FIELDS", "true_depth_scale", "geometry_on", "map_positions", "edge_keep",
           "axis_lines", "reconstruction_truth"]

#: the SimConfig fields of the artefacts, with their values that switch them off
ARTEFACT_FIELDS = {"depth_scale": 1.0, "depth_scale_change": 0.0, "plane_curvature_per_nm": 0.0,
                   "magnification_change": 0.0, "edge_efficiency": 1.0}

#: accepted depth scale (reconstructed / true depth); a protocol that is off by a factor of two is
#: no longer a reconstruction of the crystal
DEPTH_SCALE_RANGE = (0.5, 2.0)

#: largest |depth_scale_change| (the local depth scale changes by this share over the analysed
#: depth; 0.5 keeps it at least half of ``depth_scale`` everywhere, so depth stays monotonic)
MAX_DEPTH_SCALE_CHANGE = 0.5

#: largest |plane_curvature_per_nm|, 1/nm: a sag of 0.05 * 10^2 = 5 nm at 10 nm from the axis,
#: already many site pitches
MAX_PLANE_CURVATURE_PER_NM = 0.05

#: largest |magnification_change| (relative change of the lateral magnification over the depth)
MAX_MAGNIFICATION_CHANGE = 0.3

#: second entry of the seed of the edge-efficiency generator, ``default_rng([seed, EDGE_SEED_TAG])``
EDGE_SEED_TAG = 7


def check_artefacts(cfg) -> None:
    """Check the artefact fields of a :class:`~probeseq.simulation.simulate.SimConfig`.

    Raises
    ------
    InputError
        A field is not a finite number in its range; the message names the command-line option.
    """
    lo, hi = DEPTH_SCALE_RANGE
    check_number(cfg.depth_scale, "--depth-scale (depth_scale)", lo, hi)
    check_number(cfg.depth_scale_change, "--depth-scale-change (depth_scale_change)",
                 -MAX_DEPTH_SCALE_CHANGE, MAX_DEPTH_SCALE_CHANGE)
    check_number(cfg.plane_curvature_per_nm, "--plane-curvature (plane_curvature_per_nm, 1/nm)",
                 -MAX_PLANE_CURVATURE_PER_NM, MAX_PLANE_CURVATURE_PER_NM)
    check_number(cfg.magnification_change, "--magnification-change (magnification_change)",
                 -MAX_MAGNIFICATION_CHANGE, MAX_MAGNIFICATION_CHANGE)
    check_number(cfg.edge_efficiency, "--edge-efficiency (edge_efficiency)", 0, 1, lo_open=True)


def geometry_on(cfg) -> bool:
    """Whether any artefact moves positions (depth scale, its change, plane curvature, magnification)."""
    return (cfg.depth_scale != 1.0 or cfg.depth_scale_change != 0.0 or cfg.plane_curvature_per_nm != 0.0
            or cfg.magnification_change != 0.0)


def _depth_map(cfg, zeta):
    """``Z(zeta) = depth_scale * (zeta + depth_scale_change * zeta^2 / (2 D))``, nm; a part that is
    off is not computed (``zeta`` itself comes back when both are off)."""
    z = zeta
    if cfg.depth_scale_change != 0.0:
        z = z + cfg.depth_scale_change * z * z / (2.0 * cfg.depth_nm)
    if cfg.depth_scale != 1.0:
        z = cfg.depth_scale * z
    return z


def map_positions(cfg, x, y, z):
    """Map ideal reconstruction-frame positions to the distorted ones.

    Parameters
    ----------
    cfg : SimConfig
    x, y, z : ndarray of float, nm
        Ideal positions (any equal shapes); the specimen axis is x = y = 0.

    Returns
    -------
    tuple of ndarray
        ``(x_rec, y_rec, z_rec)``, nm: ``m x``, ``m y`` and ``Z(z) + kappa (x^2 + y^2)`` (module
        docstring). The arrays given come back unchanged (the same objects) for an artefact that is off.
    """
    kappa, mc = cfg.plane_curvature_per_nm, cfg.magnification_change
    rho2 = x * x + y * y if kappa != 0.0 else None
    if mc != 0.0:
        m = 1.0 + mc * z / cfg.depth_nm
        x, y = m * x, m * y
    z_rec = _depth_map(cfg, z)
    if kappa != 0.0:
        z_rec = z_rec + kappa * rho2
    return x, y, z_rec


def edge_keep(cfg, x, y, z) -> np.ndarray:
    """Which ions the detector keeps when its efficiency falls towards the specimen edge.

    Parameters
    ----------
    cfg : SimConfig
    x, y, z : ndarray of float, nm
        Ideal positions of every ion (metal, linker, background).

    Returns
    -------
    ndarray of bool
        Kept with probability ``1 - (1 - edge_efficiency) * min(rho / R(z), 1)^2``, ``R(z)`` the
        needle radius at the ion's depth; drawn from ``default_rng([seed, 7])``.
    """
    ta = math.tan(math.radians(cfg.half_angle_deg))
    radius = np.maximum(cfg.top_radius_nm + z * ta, 1e-9)  # a blurred depth may sit a little above the top
    q = np.minimum((x * x + y * y) / (radius * radius), 1.0)
    p_keep = 1.0 - (1.0 - cfg.edge_efficiency) * q
    rng = np.random.default_rng([int(cfg.seed), EDGE_SEED_TAG])
    return rng.random(np.shape(z)) < p_keep


def axis_lines(axis_xy, site_z, inside, fallback_tilt):
    """Least-squares straight rod axes through the (distorted) axis positions of the sites.

    Parameters
    ----------
    axis_xy : (n_rods, n_sites, 2) ndarray, nm
        Lateral position of each site on its rod axis (reconstruction frame).
    site_z : (n_rods, n_sites) ndarray, nm
        Depth of each site on its rod axis (reconstruction frame).
    inside : (n_rods, n_sites) ndarray of bool
        Sites inside the specimen; a rod with fewer than two is fitted through all its sites.
    fallback_tilt : (2,) ndarray
        Slope for a rod whose sites all sit at one depth (a run of one site per rod).

    Returns
    -------
    tuple
        ``(xy0, slope, common)``: per rod the axis at z = 0 (n_rods, 2) and ``(dx/dz, dy/dz)``
        (n_rods, 2), and the one slope of the joint fit, over the inside sites of the rods with
        two or more, of lines with a common slope and an offset of their own, (2,).
    """
    enough = inside.sum(1) >= 2
    use = inside.copy()
    use[~enough] = True

    def moments(mask):
        w = mask.astype(float)
        n = np.maximum(w.sum(1), 1.0)
        z_mean = (w * site_z).sum(1) / n
        xy_mean = (w[..., None] * axis_xy).sum(1) / n[:, None]
        dz = (site_z - z_mean[:, None]) * w
        return z_mean, xy_mean, (dz * dz).sum(1), (dz[..., None] * (axis_xy - xy_mean[:, None, :])).sum(1)

    z_mean, xy_mean, szz, sxz = moments(use)
    if szz[enough].sum() > 0:
        common = sxz[enough].sum(0) / szz[enough].sum()
    elif szz.sum() > 0:
        common = sxz.sum(0) / szz.sum()
    else:
        common = np.asarray(fallback_tilt, float)
    slope = np.where(szz[:, None] > 0, sxz / np.where(szz > 0, szz, 1.0)[:, None], common[None, :])
    return xy_mean - slope * z_mean[:, None], slope, common


def reconstruction_truth(cfg) -> dict:
    """The ``reconstruction`` section of the truth: the artefacts and their formulas."""
    return {
        "depth_scale": float(cfg.depth_scale),
        "depth_scale_change": float(cfg.depth_scale_change),
        "plane_curvature_per_nm": float(cfg.plane_curvature_per_nm),
        "plane_sag_at_top_radius_nm": float(cfg.plane_curvature_per_nm * cfg.top_radius_nm ** 2),
        "magnification_change": float(cfg.magnification_change),
        "edge_efficiency": float(cfg.edge_efficiency),
        "sigma_z_nm": float(cfg.sigma_z_nm),
        "about": "From the ideal position (x, y, zeta) with rho = sqrt(x^2 + y^2) and D = config.depth_nm, the file "
                 "holds x*m, y*m with m = 1 + magnification_change*zeta/D and z = depth_scale*(zeta + "
                 "depth_scale_change*zeta^2/(2 D)) + plane_curvature_per_nm*rho^2, after blurring zeta by sigma_z_nm "
                 "and keeping each ion with probability 1 - (1 - edge_efficiency)*min(rho/R(zeta), 1)^2 (R the needle "
                 "radius); rods[].z_nm are the mapped and rods[].z_ideal_nm the ideal depths of the sites on the rod axis.",
    }


def _depth_parameters(truth_or_cfg):
    """(depth_scale, depth_scale_change, depth_nm) of a SimConfig, a SimRun or a truth dict."""
    src = getattr(truth_or_cfg, "config", truth_or_cfg)  # a SimRun carries its SimConfig
    if hasattr(src, "depth_scale"):
        return float(src.depth_scale), float(src.depth_scale_change), float(src.depth_nm)
    if not isinstance(src, dict):
        raise InputError(f"true_depth_scale needs a truth dict, a SimConfig or a SimRun, got {type(src).__name__}")
    rec = src.get("reconstruction") or {}  # a truth written before the artefacts: an ideal reconstruction
    ds = check_number(rec.get("depth_scale", 1.0), "truth: reconstruction.depth_scale", 0, lo_open=True)
    c = check_number(rec.get("depth_scale_change", 0.0), "truth: reconstruction.depth_scale_change")
    depth = (src.get("config") or {}).get("depth_nm", 1.0 if c == 0 else None)
    depth = check_number(depth, "truth: config.depth_nm", 0, lo_open=True)
    return ds, c, depth


def true_depth_scale(truth_or_cfg, z_rec_nm) -> np.ndarray:
    """The true local depth scale ``dz_rec / dzeta`` at reconstructed depths on the specimen axis.

    The plane curvature is left out (on the axis it shifts nothing). Inverting
    ``z_rec = s0 (zeta + c zeta^2 / (2 D))`` gives ``s(z_rec) = s0 sqrt(1 + 2 c z_rec / (s0 D))``
    (0 where the root's argument is negative, beyond the range of the map).

    Parameters
    ----------
    truth_or_cfg : dict, SimConfig or SimRun
        A run's truth (its ``reconstruction`` section and ``config.depth_nm``; a truth without that
        section is an ideal reconstruction, scale 1), its configuration, or the run.
    z_rec_nm : array_like of float, nm
        Depths in the reconstruction frame (the ion file's z).

    Returns
    -------
    ndarray of float
        Reconstructed nm per true nm of depth, the shape of ``z_rec_nm``.

    Examples
    --------
    >>> true_depth_scale({"reconstruction": {"depth_scale": 1.1, "depth_scale_change": 0.0}}, [0.0, 5.0])
    array([1.1, 1.1])
    """
    s0, c, depth = _depth_parameters(truth_or_cfg)
    z = np.asarray(z_rec_nm, dtype=float)
    return s0 * np.sqrt(np.maximum(1.0 + 2.0 * c * z / (s0 * depth), 0.0))
