"""Typed data objects passed between the stages after ranging.

:class:`RodColumns` is what the columns stage produces and the decoding stage consumes: the
count array rods x sites x metal channels with its geometry.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from ..exceptions import InputError

__all__ = ['RodColumns', 'ReadOnlyParams', 'save_columns', 'load_columns', 'COLUMNS_FILE_VERSION']

class ReadOnlyParams(dict):
    """A dict that refuses every change: the parameters of a frozen :class:`RodColumns`.

    It is a ``dict`` (so JSON writers, ``isinstance(p, dict)`` and ``{**p, ...}`` work as before)
    whose mutating methods raise ``TypeError``; nested dicts are read-only too. A changed copy is
    built with ``dataclasses.replace(columns, params={**columns.params, key: value})``; ``dict(p)``
    or ``p.copy()`` give a plain, mutable (shallow) copy. Pickles and copies as itself.

    Parameters
    ----------
    params : mapping, optional
        The parameters (str keys; JSON-able values).
    """

    __slots__ = ()

    def __init__(self, params=()):
        super().__init__((k, ReadOnlyParams(v) if isinstance(v, Mapping) else v) for k, v in dict(params).items())

    def _refuse(self, *args, **kwargs):
        raise TypeError("RodColumns.params is read-only: build a new RodColumns with "
                        "dataclasses.replace(columns, params={**columns.params, ...})")

    __setitem__ = __delitem__ = __ior__ = _refuse
    clear = pop = popitem = setdefault = update = _refuse

    def __reduce__(self):
        return type(self), (dict(self),)


@dataclass(frozen=True)
class RodColumns:
    """Per-rod depth profiles of metal counts.

    Parameters
    ----------
    counts : (n_rods, n_sites, n_metals) ndarray of float
        Metal atoms counted in each site of each rod, per metal channel (fractional where an
        ion's channel is a probability split over metals).
    mask : (n_rods, n_sites) ndarray of bool
        True where the site lies inside the analysed specimen volume and is used.
    metals : tuple of str
        Metal symbols, in channel order.
    rod_xy_nm : (n_rods, 2) ndarray of float, nm
        Rod axis position at depth ``z_ref_nm``, reconstruction frame.
    tilt : (2,) ndarray of float
        Rod axis direction as (dx/dz, dy/dz): the axis of rod r at depth z is
        ``rod_xy_nm[r] + tilt * (z - z_ref_nm)``.
    z_ref_nm : float, nm
        Reference depth of ``rod_xy_nm``.
    site_z_nm : (n_sites,) ndarray of float, nm
        Depth of each site centre, measured along z at the rod axis.
    pitch_nm : float, nm
        Site pitch along the rod.
    neighbours : (n_pairs, 2) ndarray of int
        Index pairs (i < j) of rods that are nearest neighbours in the packing.
    resolvable : bool
        Whether single rods are resolvable (expected misassigned fraction below the documented threshold).
    misassigned_fraction : float
        Expected fraction of a rod's ions assigned to another rod.
    params : mapping
        Fitted registration parameters and quality figures, JSON-serialisable; stored as a
        :class:`ReadOnlyParams` (a dict that refuses changes, nested dicts included).
    site_z_offset_nm : (n_rods,) ndarray of float, nm
        Depth offset of each rod's sites: site k of rod r lies at depth
        ``site_z_nm[k] + site_z_offset_nm[r]``. With tilted rods the planes of sites are
        perpendicular to the rods, not to z, so their depth depends on the lateral position.
    evidence : (n_rods, n_sites, n_metals) ndarray of float, optional
        Soft evidence of every site on each metal (:mod:`probeseq.lattice.evidence`): the sum over
        the site's metal-bearing ions of their range's share of the metal times their radial
        likelihood ratio. The decoder reads it instead of ``counts`` when present
        (``params["evidence"]`` holds the metals' capture and own-ion scale); ``counts`` stay
        whole ions for everything else.
    """

    counts: np.ndarray
    mask: np.ndarray
    metals: tuple
    rod_xy_nm: np.ndarray
    tilt: np.ndarray
    z_ref_nm: float
    site_z_nm: np.ndarray
    pitch_nm: float
    neighbours: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), dtype=np.int64))
    resolvable: bool = True
    misassigned_fraction: float = 0.0
    params: dict = field(default_factory=dict)
    site_z_offset_nm: np.ndarray | None = None
    evidence: np.ndarray | None = None

    def __post_init__(self):
        c = np.asarray(self.counts)
        if c.dtype not in (np.float32, np.float64):  # whole counts may be float32 (exact below 2**24)
            c = c.astype(np.float64)
        if c.ndim != 3:
            raise InputError(f"counts must be (n_rods, n_sites, n_metals), got shape {c.shape}")
        m = np.asarray(self.mask, dtype=bool)
        if m.shape != c.shape[:2]:
            raise InputError(f"mask shape {m.shape} does not match counts {c.shape[:2]}")
        metals = tuple(self.metals)
        if len(metals) != c.shape[2]:
            raise InputError(f"{len(metals)} metals named for {c.shape[2]} channels")
        xy = np.asarray(self.rod_xy_nm, dtype=float).reshape(-1, 2)
        if xy.shape[0] != c.shape[0]:
            raise InputError(f"rod_xy_nm has {xy.shape[0]} rods, counts {c.shape[0]}")
        sz = np.asarray(self.site_z_nm, dtype=float)
        if sz.shape != (c.shape[1],):
            raise InputError(f"site_z_nm has shape {sz.shape}, expected ({c.shape[1]},)")
        try:
            pitch, z_ref = float(self.pitch_nm), float(self.z_ref_nm)
        except (TypeError, ValueError):
            raise InputError(f"pitch_nm and z_ref_nm must be numbers (nm), got {self.pitch_nm!r:.40}, "
                             f"{self.z_ref_nm!r:.40}") from None
        if not (np.isfinite(pitch) and pitch > 0):
            raise InputError(f"pitch_nm must be a finite positive length in nm, got {pitch}")
        if not np.isfinite(z_ref):
            raise InputError(f"z_ref_nm must be a finite depth in nm, got {z_ref}")
        nb = np.asarray(self.neighbours, dtype=np.int64).reshape(-1, 2)
        off = np.zeros(c.shape[0]) if self.site_z_offset_nm is None else np.asarray(self.site_z_offset_nm, float)
        if off.shape != (c.shape[0],):
            raise InputError(f"site_z_offset_nm has shape {off.shape}, expected ({c.shape[0]},)")
        if not isinstance(self.params, Mapping):
            raise InputError(f"params must be a mapping, got {type(self.params).__name__}")
        if not isinstance(self.params, ReadOnlyParams):
            object.__setattr__(self, "params", ReadOnlyParams(self.params))
        if self.evidence is not None:
            ev = np.asarray(self.evidence)
            if ev.shape != c.shape or ev.dtype not in (np.float32, np.float64):
                raise InputError(f"evidence must be a float array of the counts' shape {c.shape}, got {ev.shape}")
            object.__setattr__(self, "evidence", ev)
        object.__setattr__(self, "site_z_offset_nm", off)
        object.__setattr__(self, "counts", c)
        object.__setattr__(self, "mask", m)
        object.__setattr__(self, "metals", metals)
        object.__setattr__(self, "rod_xy_nm", xy)
        object.__setattr__(self, "tilt", np.asarray(self.tilt, dtype=float).reshape(2))
        object.__setattr__(self, "site_z_nm", sz)
        object.__setattr__(self, "neighbours", nb)

    @property
    def n_rods(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_sites(self) -> int:
        return int(self.counts.shape[1])

    @property
    def n_metals(self) -> int:
        return int(self.counts.shape[2])

    def site_depths_nm(self) -> np.ndarray:
        """(n_rods, n_sites) depth of every site at its rod's axis, nm."""
        return self.site_z_nm[None, :] + self.site_z_offset_nm[:, None]

    def rod_xy_at(self, z_nm) -> np.ndarray:
        """Rod axis positions at depth(s) ``z_nm``: shape (n_rods, 2) or (n_rods, len(z), 2), nm."""
        z = np.asarray(z_nm, dtype=float)
        d = z - self.z_ref_nm
        if d.ndim == 0:
            return self.rod_xy_nm + self.tilt * d
        return self.rod_xy_nm[:, None, :] + self.tilt[None, None, :] * d[None, :, None]


COLUMNS_FILE_VERSION = 1


#: most ions a column file may count at one site when read back: a site holds one metal atom
#: (counts of a few with neighbours' crosstalk), so far more means a damaged or hand-edited file
MAX_COUNT_PER_SITE = 1e6


def save_columns(columns: RodColumns, path) -> None:
    """Write a :class:`RodColumns` to HDF5 (group ``/columns``, units as dataset attributes)."""
    import json

    import h5py

    from ..utils.marks import h5_compression, to_jsonable

    with h5py.File(path, "w") as f:
        g = f.create_group("columns")
        g.attrs["format_version"] = COLUMNS_FILE_VERSION
        g.attrs["metals"] = json.dumps(list(columns.metals))
        g.attrs["z_ref_nm"] = columns.z_ref_nm
        g.attrs["pitch_nm"] = columns.pitch_nm
        g.attrs["resolvable"] = bool(columns.resolvable)
        g.attrs["misassigned_fraction"] = float(columns.misassigned_fraction)
        g.attrs["params_json"] = json.dumps(to_jsonable(columns.params), sort_keys=True)
        for name, data, unit in (("counts", columns.counts, "metal atoms per site"),
                                 ("mask", columns.mask.astype(np.uint8), "1 = site used"),
                                 ("rod_xy_nm", columns.rod_xy_nm, "nm"),
                                 ("tilt", columns.tilt, "dx/dz, dy/dz"),
                                 ("site_z_nm", columns.site_z_nm, "nm"),
                                 ("neighbours", columns.neighbours, "rod index pairs"),
                                 ("site_z_offset_nm", columns.site_z_offset_nm, "nm"),
                                 ("evidence", columns.evidence, "soft evidence per site (see probeseq.lattice.evidence)")):
            if data is None:
                continue
            d = g.create_dataset(name, data=data, **h5_compression(int(data.size)))
            d.attrs["unit"] = unit


def load_columns(path) -> RodColumns:
    """Read a :class:`RodColumns` written by :func:`save_columns`, checking what it reads.

    Every dataset is checked for type and shape before it is read (so a damaged or hand-edited
    file cannot ask for more memory than its consistent shape needs), the arrays against each
    other (counts, mask, metals, rods, sites), and the values: a finite positive pitch, finite
    positions, rod pairs that name existing rods, finite non-negative counts at used sites.

    Raises
    ------
    InputError
        Missing, truncated or damaged file, or any of the checks failed; the message names the
        file and the dataset or attribute.
    """
    from pathlib import Path

    from ..utils.validate import h5_array, h5_attr_json, h5_attr_number, h5_group, open_h5

    p = Path(path)
    with open_h5(p, "columns file") as f:
        g = h5_group(f, "columns", p, "not written by 'probeseq columns'")
        version = g.attrs.get("format_version", -1)
        if not (isinstance(version, (int, np.integer)) and int(version) == COLUMNS_FILE_VERSION):
            raise InputError(f"{p}: columns file format version {version}, this probeseq reads {COLUMNS_FILE_VERSION}")
        metals = h5_attr_json(g, "metals", p)
        if (not isinstance(metals, list) or len(metals) < 1 or not all(isinstance(m, str) and m for m in metals)
                or len(set(metals)) != len(metals)):
            raise InputError(f"{p}: attribute 'metals' must be a list of distinct metal symbols, got {metals!r:.60}")
        k = len(metals)
        counts_ds = g.get("counts")
        shape = getattr(counts_ds, "shape", None)
        if shape is None or len(shape) != 3:
            h5_array(g, "counts", p, shape=(None, None, k))  # names what is wrong (missing, type, shape)
        n_rods, n_sites = int(shape[0]), int(shape[1])
        counts = h5_array(g, "counts", p, shape=(n_rods, n_sites, k))
        mask = h5_array(g, "mask", p, "biu", shape=(n_rods, n_sites))
        rod_xy = h5_array(g, "rod_xy_nm", p, "fiu", shape=(n_rods, 2))
        tilt = h5_array(g, "tilt", p, "fiu", shape=(2,))
        site_z = h5_array(g, "site_z_nm", p, "fiu", shape=(n_sites,))
        neighbours = h5_array(g, "neighbours", p, "iu", shape=(None, 2))
        offsets = h5_array(g, "site_z_offset_nm", p, "fiu", shape=(n_rods,), optional=True)
        evidence = h5_array(g, "evidence", p, "f", shape=(n_rods, n_sites, k), optional=True)
        if evidence is not None and not (np.isfinite(evidence).all() and evidence.min(initial=0.0) >= 0):
            raise InputError(f"{p}: dataset 'evidence' holds NaN, infinite or negative values")
        for name, arr in (("rod_xy_nm", rod_xy), ("tilt", tilt), ("site_z_nm", site_z), ("site_z_offset_nm", offsets)):
            if arr is not None and not np.isfinite(arr).all():
                raise InputError(f"{p}: dataset '{name}' holds NaN or infinite values")
        if neighbours.size and (neighbours.min() < 0 or neighbours.max() >= n_rods):
            raise InputError(f"{p}: dataset 'neighbours' names rods outside 0-{n_rods - 1}")
        mask = mask.astype(bool)
        used = counts[mask]
        if not np.isfinite(used).all():
            raise InputError(f"{p}: dataset 'counts' holds NaN or infinite values at used sites")
        if used.size and used.min() < 0:
            raise InputError(f"{p}: dataset 'counts' holds negative counts at used sites")
        if used.size and float(used.max()) > MAX_COUNT_PER_SITE:
            raise InputError(f"{p}: dataset 'counts' holds {float(used.max()):.3g} ions at one site; a site is one "
                             f"metal atom, so more than {MAX_COUNT_PER_SITE:.0e} means a damaged or hand-edited file")
        pitch = h5_attr_number(g, "pitch_nm", p, 0, lo_open=True)
        z_ref = h5_attr_number(g, "z_ref_nm", p)
        # files written before the rename carry the fraction as "crosstalk"
        misassigned = h5_attr_number(g, "misassigned_fraction" if "misassigned_fraction" in g.attrs else "crosstalk",
                                     p, 0, 1)
        resolvable = g.attrs.get("resolvable")
        if not isinstance(resolvable, (bool, np.bool_)) and not (
                isinstance(resolvable, (int, np.integer)) and int(resolvable) in (0, 1)):
            raise InputError(f"{p}: attribute 'resolvable' must be true or false, got {resolvable!r:.40}")
        params = h5_attr_json(g, "params_json", p)
        if not isinstance(params, dict):
            raise InputError(f"{p}: attribute 'params_json' must be a JSON object, got {type(params).__name__}")
    try:
        return RodColumns(counts=counts, mask=mask, metals=tuple(metals), rod_xy_nm=rod_xy, tilt=tilt, z_ref_nm=z_ref,
                          site_z_nm=site_z, pitch_nm=pitch, neighbours=neighbours, resolvable=bool(resolvable),
                          misassigned_fraction=misassigned, params=params, site_z_offset_nm=offsets,
                          evidence=evidence)
    except InputError as e:
        raise InputError(f"{p}: {e}") from None
