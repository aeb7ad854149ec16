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
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .exceptions import InputError

__all__ = ["Lattice", "PRESETS"]

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
        for key in ("a_nm", "b_nm", "repeat_nm"):
            v = getattr(self, key)
            if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v) or v <= 0:
                raise InputError(f"{where}: {key[:-3]} must be a positive length in nm, got {v!r}")
        g = self.gamma_deg
        if not isinstance(g, (int, float)) or not math.isfinite(g) or not 0 < g < 180:
            raise InputError(f"{where}: gamma must be an angle in (0, 180) degrees, got {g!r}")
        s = self.sites_per_repeat
        if isinstance(s, bool) or not isinstance(s, (int, np.integer)) or s < 1:
            raise InputError(f"{where}: sites_per_repeat must be a positive integer, got {s!r}")
        try:
            rods = np.array(self.rods_frac, dtype=float)
        except (TypeError, ValueError):
            raise InputError(f"{where}: rods must be a list of [u, v] fractional pairs") from None
        if rods.ndim != 2 or rods.shape[1] != 2 or rods.shape[0] == 0:
            raise InputError(f"{where}: rods must be a non-empty (n, 2) list of fractions, got shape {rods.shape}")
        if not np.isfinite(rods).all() or (rods < 0).any() or (rods > 1).any():
            raise InputError(f"{where}: rod positions must be fractions in [0, 1], got {rods.tolist()}")
        rods = np.mod(rods, 1.0)
        rods[np.isclose(rods, 1.0)] = 0.0
        # duplicate positions (e.g. 0 and 1) are one rod
        key = np.round(rods, 4)
        _, first = np.unique(key, axis=0, return_index=True)
        rods = rods[np.sort(first)]
        rods.flags.writeable = False
        object.__setattr__(self, "rods_frac", rods)
        object.__setattr__(self, "sites_per_repeat", int(s))
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
            if isinstance(c[k], bool) or not isinstance(c[k], (int, float)):
                raise InputError(f"{where}: [cell] {k} must be a number, got {c[k]!r}")
        if isinstance(r["repeat"], bool) or not isinstance(r["repeat"], (int, float)):
            raise InputError(f"{where}: [rod] repeat must be a number, got {r['repeat']!r}")
        if not isinstance(r["sites_per_repeat"], int) or isinstance(r["sites_per_repeat"], bool):
            raise InputError(f"{where}: [rod] sites_per_repeat must be an integer, got {r['sites_per_repeat']!r}")
        if not isinstance(c["rods"], list) or not all(
                isinstance(p, list) and len(p) == 2 and all(isinstance(q, (int, float)) and not isinstance(q, bool) for q in p)
                for p in c["rods"]):
            raise InputError(f"{where}: [cell] rods must be a list of [u, v] number pairs")
        return cls(float(c["a"]), float(c["b"]), float(c["gamma"]), np.array(c["rods"], float).reshape(-1, 2),
                   float(r["repeat"]), r["sites_per_repeat"], where)

    @classmethod
    def from_toml(cls, path) -> "Lattice":
        """Read a lattice description from a TOML file."""
        p = Path(path)
        if not p.is_file():
            raise InputError(f"lattice file not found: {p}")
        try:
            d = tomllib.loads(p.read_text(encoding="utf-8"))
        except UnicodeDecodeError:
            raise InputError(f"{p}: not a text file") from None
        except tomllib.TOMLDecodeError as e:
            raise InputError(f"{p}: malformed TOML ({e})") from None
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
