"""The rod lattice: the 2-D packing of rod axes seen down the rod axis, and the site pitch.

A lattice is described in TOML (schema in the README)::

    [cell]
    a = 2.60          # nm
    b = 2.60          # nm
    gamma = 120.0     # degrees
    rods = [[0.3333, 0.0], [0.0, 0.3333]]   # fractional positions of rod axes in the cell
    [rod]
    repeat = 0.68     # nm, translation period along the rod
    sites_per_repeat = 3

or by a preset name (``honeycomb``, ``triangular``, ``square``) with ``a``, ``repeat`` and
``sites_per_repeat``. Cell vectors: ``a`` along +x, ``b`` at angle ``gamma`` from ``a``.

Sanity bounds, checked before any geometry is built (a mistyped unit otherwise asks for billions
of rods): ``a`` and ``b`` in [0.1, 100] nm (:data:`CELL_EDGE_RANGE_NM`), ``repeat`` in
[0.05, 50] nm (:data:`REPEAT_RANGE_NM`), ``gamma`` in (0, 180) degrees, ``sites_per_repeat`` from 1
to 64, at most 64 rods per cell and at most 1000 rod axes per nm^2 of cross-section
(:data:`MAX_ROD_DENSITY_PER_NM2`); every number finite.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.tomlfile import load_toml, short_repr

__all__ = ['Lattice', 'PRESETS', 'CELL_EDGE_RANGE_NM', 'REPEAT_RANGE_NM', 'MAX_SITES_PER_REPEAT', 'MAX_RODS_PER_CELL', 'MAX_ROD_DENSITY_PER_NM2']

#: accepted cell edge lengths a, b (nm); framework rod spacings are a few nm
CELL_EDGE_RANGE_NM = (0.1, 100.0)


#: accepted translation period along the rod (nm)
REPEAT_RANGE_NM = (0.05, 50.0)


#: most metal sites per repeat
MAX_SITES_PER_REPEAT = 64


#: most rod axes in one cell
MAX_RODS_PER_CELL = 64


#: most rod axes per nm^2 of cross-section (bounds the work of every rod search)
MAX_ROD_DENSITY_PER_NM2 = 1000.0


# Fractional rod positions of the presets. Honeycomb: of the 9 points (i/3, j/3) of a hexagonal
# cell, the 6 that are not on the sqrt(3) x sqrt(3) superlattice {(0,0), (1/3,2/3), (2/3,1/3)};
# this is the honeycomb net with nearest rod-rod distance a/3 and 6 rods per cell (textbook
# geometry of the honeycomb net; checked in tests).
_HONEYCOMB = ((1 / 3, 0.0), (0.0, 1 / 3), (1 / 3, 1 / 3), (2 / 3, 0.0), (0.0, 2 / 3), (2 / 3, 2 / 3))


PRESETS = {
    "honeycomb": {"gamma": 120.0, "rods": _HONEYCOMB},
    "triangular": {"gamma": 120.0, "rods": ((0.0, 0.0),)},
    "square": {"gamma": 90.0, "rods": ((0.0, 0.0),)},
}


def _is_number(v) -> bool:
    """Whether ``v`` is a real number (not a bool)."""
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))


def _finite_number(v) -> bool:
    """Whether ``v`` is a real number (not a bool) that is finite as a float."""
    if not _is_number(v):
        return False
    try:
        return math.isfinite(v)
    except OverflowError:  # an integer beyond the float range
        return False


@dataclass(frozen=True)
class Lattice:
    """A rod packing and the site pitch along the rods.

    Parameters
    ----------
    a_nm, b_nm : float, nm
        Cell edge lengths.
    gamma_deg : float, degrees
        Angle between the cell edges, in (0, 180).
    rods_frac : (n_rods_per_cell, 2) ndarray of float
        Fractional positions of the rod axes in the cell, each in [0, 1).
    repeat_nm : float, nm
        Translation period along the rod axis.
    sites_per_repeat : int
        Metal sites per repeat; the site pitch is ``repeat_nm / sites_per_repeat``.
    name : str
        Preset name or file path, for reports.
    """

    a_nm: float
    b_nm: float
    gamma_deg: float
    rods_frac: np.ndarray
    repeat_nm: float
    sites_per_repeat: int
    name: str = ""

    def __post_init__(self):
        where = f"lattice {self.name}" if self.name else "lattice"
        for key, (lo, hi) in (("a_nm", CELL_EDGE_RANGE_NM), ("b_nm", CELL_EDGE_RANGE_NM),
                              ("repeat_nm", REPEAT_RANGE_NM)):
            v = getattr(self, key)
            if not _finite_number(v) or v <= 0:
                raise InputError(f"{where}: {key[:-3]} must be a positive length in nm, got {short_repr(v)}")
            if not lo <= v <= hi:
                raise InputError(f"{where}: {key[:-3]} = {v:.6g} nm is outside the accepted {lo:g}-{hi:g} nm; "
                                 "check the value and its unit (lengths are in nm)")
            object.__setattr__(self, key, float(v))
        g = self.gamma_deg
        if not _finite_number(g) or not 0 < g < 180:
            raise InputError(f"{where}: gamma must be an angle in (0, 180) degrees, got {short_repr(g)}")
        object.__setattr__(self, "gamma_deg", float(g))
        s = self.sites_per_repeat
        if isinstance(s, bool) or not isinstance(s, (int, np.integer)) or s < 1:
            raise InputError(f"{where}: sites_per_repeat must be a positive integer, got {short_repr(s)}")
        if s > MAX_SITES_PER_REPEAT:
            raise InputError(f"{where}: sites_per_repeat = {short_repr(s)} is more than {MAX_SITES_PER_REPEAT}")
        shape = np.shape(self.rods_frac) if isinstance(self.rods_frac, np.ndarray) else None
        if shape is not None and (len(shape) != 2 or shape[0] > MAX_RODS_PER_CELL):
            raise InputError(f"{where}: rods must be an (n, 2) list of at most {MAX_RODS_PER_CELL} fractional "
                             f"pairs, got shape {shape}")
        if shape is None and isinstance(self.rods_frac, (list, tuple)) and len(self.rods_frac) > MAX_RODS_PER_CELL:
            raise InputError(f"{where}: rods lists {len(self.rods_frac)} rod axes, more than {MAX_RODS_PER_CELL} "
                             "per cell")
        try:
            rods = np.array(self.rods_frac, dtype=float)
        except (TypeError, ValueError, OverflowError):
            raise InputError(f"{where}: rods must be a list of [u, v] fractional pairs") from None
        if rods.ndim != 2 or rods.shape[1] != 2 or rods.shape[0] == 0 or rods.shape[0] > MAX_RODS_PER_CELL:
            raise InputError(f"{where}: rods must be a non-empty (n, 2) list of at most {MAX_RODS_PER_CELL} "
                             f"fractions, got shape {rods.shape}")
        if not np.isfinite(rods).all() or (rods < 0).any() or (rods > 1).any():
            raise InputError(f"{where}: rod positions must be fractions in [0, 1], got {rods.tolist()}")
        if len(np.unique(np.round(rods, 4), axis=0)) < len(rods):  # the same rod typed twice: a slip
            import warnings

            from ..exceptions import DataQualityWarning

            warnings.warn(f"{where}: rods lists the same fractional position more than once; it is one rod axis",
                          DataQualityWarning, stacklevel=3)
        rods = np.mod(rods, 1.0)
        rods[np.isclose(rods, 1.0)] = 0.0
        # duplicate positions (e.g. 0 and 1) are one rod
        key = np.round(rods, 4)
        _, first = np.unique(key, axis=0, return_index=True)
        rods = rods[np.sort(first)]
        rods.flags.writeable = False
        object.__setattr__(self, "rods_frac", rods)
        object.__setattr__(self, "sites_per_repeat", int(s))
        density = rods.shape[0] / self.cell_area_nm2
        if density > MAX_ROD_DENSITY_PER_NM2:
            raise InputError(f"{where}: {density:.4g} rod axes per nm^2 (cell area {self.cell_area_nm2:.3g} nm^2 from "
                             f"a, b and gamma), more than {MAX_ROD_DENSITY_PER_NM2:g}; check a, b and gamma")
        d = self.nearest_rod_distance_nm
        if d < 1e-3 * min(self.a_nm, self.b_nm):
            raise InputError(f"{where}: two rods coincide (nearest rod-rod distance {d:.3g} nm)")

    # ------------------------------------------------------------------ geometry
    @property
    def cell_matrix(self) -> np.ndarray:
        """(2, 2) array whose columns are the cell vectors a and b, nm."""
        g = math.radians(self.gamma_deg)
        return np.array([[self.a_nm, self.b_nm * math.cos(g)], [0.0, self.b_nm * math.sin(g)]])

    @property
    def cell_area_nm2(self) -> float:
        """Area of the 2-D cell, nm^2."""
        return float(self.a_nm * self.b_nm * math.sin(math.radians(self.gamma_deg)))

    @property
    def rods_per_cell(self) -> int:
        """Number of rod axes in one cell."""
        return int(self.rods_frac.shape[0])

    @property
    def rod_density_per_nm2(self) -> float:
        """Rod axes per nm^2 of cross-section."""
        return self.rods_per_cell / self.cell_area_nm2

    @property
    def pitch_nm(self) -> float:
        """Site pitch along the rod, nm."""
        return self.repeat_nm / self.sites_per_repeat

    @property
    def nearest_rod_distance_nm(self) -> float:
        """Shortest distance between two distinct rod axes, nm (by search over neighbour cells)."""
        pts = self.rod_positions_in_box(2)
        diff = pts[:, None, :] - pts[None, :, :]
        d = np.sqrt((diff ** 2).sum(-1))
        d[d < 1e-12] = np.inf
        return float(d.min())

    def rod_positions_in_box(self, n: int) -> np.ndarray:
        """Rod axes of the cells with integer offsets in [-n, n]^2, nm, lattice frame (origin at cell 0)."""
        i, j = np.meshgrid(np.arange(-n, n + 1), np.arange(-n, n + 1), indexing="ij")
        cells = np.stack([i.ravel(), j.ravel()], axis=1).astype(float)
        frac = (cells[:, None, :] + self.rods_frac[None, :, :]).reshape(-1, 2)
        return frac @ self.cell_matrix.T

    def rod_positions(self, radius_nm: float, center_nm=(0.0, 0.0)) -> np.ndarray:
        """All rod axes (lattice frame, nm) within ``radius_nm`` of ``center_nm``.

        Returns
        -------
        (n, 2) ndarray of float, nm
        """
        c = np.asarray(center_nm, dtype=float)
        inv = np.linalg.inv(self.cell_matrix)
        # the cell index range that can reach the disc
        corners = c + radius_nm * np.array([[1, 1], [1, -1], [-1, 1], [-1, -1]], float)
        f = corners @ inv.T
        lo = np.floor(f.min(0)).astype(int) - 1
        hi = np.ceil(f.max(0)).astype(int) + 1
        i, j = np.meshgrid(np.arange(lo[0], hi[0] + 1), np.arange(lo[1], hi[1] + 1), indexing="ij")
        cells = np.stack([i.ravel(), j.ravel()], axis=1).astype(float)
        frac = (cells[:, None, :] + self.rods_frac[None, :, :]).reshape(-1, 2)
        pts = frac @ self.cell_matrix.T
        keep = ((pts - c) ** 2).sum(1) <= radius_nm ** 2
        return pts[keep]

    def scaled(self, factor: float) -> "Lattice":
        """The same lattice with lateral lengths multiplied by ``factor`` (repeat unchanged)."""
        return Lattice(self.a_nm * factor, self.b_nm * factor, self.gamma_deg, self.rods_frac,
                       self.repeat_nm, self.sites_per_repeat, self.name)

    # ------------------------------------------------------------------ I/O
    @classmethod
    def from_preset(cls, name: str, a: float, repeat: float, sites_per_repeat: int = 3,
                    b: float | None = None) -> "Lattice":
        """A lattice from a preset name (``honeycomb``, ``triangular``, ``square``)."""
        key = str(name).lower()
        if key not in PRESETS:
            raise InputError(f"unknown lattice preset '{name}'; known: {', '.join(sorted(PRESETS))}")
        p = PRESETS[key]
        if a is None or repeat is None:
            raise InputError(f"lattice preset '{name}' needs --a (nm) and --repeat (nm)")
        for field, v in (("a", a), ("b", b), ("repeat", repeat)):
            if v is not None and not _finite_number(v):
                raise InputError(f"lattice preset '{key}': {field} must be a finite number in nm, got {short_repr(v)}")
        return cls(float(a), float(b if b is not None else a), p["gamma"], np.array(p["rods"]),
                   float(repeat), sites_per_repeat, key)

    @classmethod
    def from_dict(cls, d: dict, where: str = "lattice") -> "Lattice":
        """A lattice from the parsed TOML mapping (``[cell]`` and ``[rod]`` tables)."""
        if not isinstance(d, dict):
            raise InputError(f"{where}: expected tables [cell] and [rod]")
        for table, keys in (("cell", ("a", "b", "gamma", "rods")), ("rod", ("repeat", "sites_per_repeat"))):
            t = d.get(table)
            if not isinstance(t, dict):
                raise InputError(f"{where}: missing table [{table}]")
            for k in keys:
                if k not in t:
                    raise InputError(f"{where}: missing field '{k}' in table [{table}]")
        c, r = d["cell"], d["rod"]
        for k in ("a", "b", "gamma"):
            if not _finite_number(c[k]):
                raise InputError(f"{where}: [cell] {k} must be a finite number, got {short_repr(c[k])}")
        if not _finite_number(r["repeat"]):
            raise InputError(f"{where}: [rod] repeat must be a finite number, got {short_repr(r['repeat'])}")
        spr = r["sites_per_repeat"]
        if not isinstance(spr, int) or isinstance(spr, bool) or not 1 <= spr <= MAX_SITES_PER_REPEAT:
            raise InputError(f"{where}: [rod] sites_per_repeat must be an integer from 1 to {MAX_SITES_PER_REPEAT}, "
                             f"got {short_repr(spr)}")
        if not isinstance(c["rods"], list) or len(c["rods"]) > MAX_RODS_PER_CELL or not all(
                isinstance(p, list) and len(p) == 2 and all(_finite_number(q) for q in p)
                for p in c["rods"]):
            raise InputError(f"{where}: [cell] rods must be a list of at most {MAX_RODS_PER_CELL} [u, v] pairs of "
                             "finite numbers")
        return cls(float(c["a"]), float(c["b"]), float(c["gamma"]), np.array(c["rods"], float).reshape(-1, 2),
                   float(r["repeat"]), r["sites_per_repeat"], where)

    @classmethod
    def from_toml(cls, path) -> "Lattice":
        """Read a lattice description from a TOML file."""
        p = Path(path)
        d, _ = load_toml(p, "lattice file")
        return cls.from_dict(d, where=str(p))

    @classmethod
    def from_spec(cls, spec, a=None, repeat=None, sites_per_repeat=3, b=None) -> "Lattice":
        """A lattice from a path to a TOML file, a preset name, or a Lattice (returned as is)."""
        if isinstance(spec, Lattice):
            return spec
        s = str(spec)
        if s.lower() in PRESETS:
            return cls.from_preset(s, a, repeat, sites_per_repeat, b)
        if Path(s).suffix.lower() == ".toml" or Path(s).exists():
            return cls.from_toml(s)
        raise InputError(f"--lattice '{s}' is neither a TOML file nor a preset ({', '.join(sorted(PRESETS))})")

    def to_dict(self) -> dict:
        """The TOML mapping of this lattice."""
        return {"cell": {"a": self.a_nm, "b": self.b_nm, "gamma": self.gamma_deg,
                         "rods": [[round(float(u), 6), round(float(v), 6)] for u, v in self.rods_frac]},
                "rod": {"repeat": self.repeat_nm, "sites_per_repeat": self.sites_per_repeat}}

    def to_toml(self) -> str:
        """TOML text of this lattice, in the schema :meth:`from_toml` reads."""
        d = self.to_dict()
        rods = ", ".join(f"[{u:.6f}, {v:.6f}]" for u, v in d["cell"]["rods"])
        return ("# rod packing seen down the rod axis; lengths in nm, angle in degrees\n"
                "[cell]\n"
                f"a = {self.a_nm:.6g}\nb = {self.b_nm:.6g}\ngamma = {self.gamma_deg:.6g}\n"
                f"rods = [{rods}]\n\n[rod]\n"
                f"repeat = {self.repeat_nm:.6g}\nsites_per_repeat = {self.sites_per_repeat}\n")
