"""The ion list: one typed container for a reconstructed atom-probe run.

Positions are in nm in the reconstruction frame; ``z`` is depth along the analysis direction,
increasing into the specimen. Mass-to-charge is in Da. Readers convert units once, at the edge
(:mod:`probeseq.io`); everything downstream assumes nm and Da.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from typing import Optional

import numpy as np

from ..exceptions import InputError

__all__ = ['IonList', 'IonMeta', 'LENGTH_UNITS', 'MAX_ABS_POSITION_NM', 'OPTIONAL_COLUMNS', 'LEGACY_COLUMNS', 'REQUIRED_COLUMNS', 'check_position_extent', 'valid_rows']

#: factor that converts a length in the named unit to nm
LENGTH_UNITS = {"nm": 1.0, "angstrom": 0.1}


REQUIRED_COLUMNS = ("x", "y", "z", "mass_to_charge")


OPTIONAL_COLUMNS = ("multiplicity", "pulse_number", "dc_voltage_v")

#: column names of ion files written before the optional columns said what they hold; still read
LEGACY_COLUMNS = {"pulse": "pulse_number", "voltage": "dc_voltage_v"}


#: largest magnitude of a position read from a file, nm (100 micrometres: an atom-probe
#: reconstruction spans at most a few micrometres, so anything beyond is a unit or column mistake)
MAX_ABS_POSITION_NM = 1e5


def valid_rows(cols: dict, block: int = 1 << 18):
    """Row masks (finite, positive): all float columns finite; mass_to_charge > 0.

    Works in blocks of ``block`` rows so that 10^8-row columns need no large temporaries; the
    finiteness of several columns is tested on their sum (NaN and inf propagate through a sum; a
    row whose finite values overflow the sum is re-checked column by column).
    """
    finite, positive, _ = _scan(cols, block, False)
    return finite, positive


def _scan(cols: dict, block: int = 1 << 18, extent: bool = True):
    """:func:`valid_rows` plus, with ``extent``, the (min, max) in nm of x, y and z over the finite
    rows (``None`` for a column without finite rows), taken per block while it is in cache."""
    floats = [v for v in cols.values() if v is not None and v.dtype.kind == "f"]
    m = cols["mass_to_charge"]
    n = m.shape[0]
    finite = np.empty(n, dtype=bool)
    positive = np.empty(n, dtype=bool)
    dtype = np.result_type(*floats)
    pos = [cols[c] for c in ("x", "y", "z")] if extent else []
    n_blocks = -(-n // block)
    lows = np.full((len(pos), n_blocks), np.nan)
    highs = np.full((len(pos), n_blocks), np.nan)

    def run(span):
        lo, hi = span
        buf = np.empty(min(block, hi - lo), dtype=dtype)
        for s in range(lo, hi, block):
            e = min(hi, s + block)
            acc = buf[: e - s]
            np.copyto(acc, floats[0][s:e])
            for v in floats[1:]:
                np.add(acc, v[s:e], out=acc)
            np.isfinite(acc, out=finite[s:e])
            np.greater(m[s:e], 0, out=positive[s:e])
            for k, v in enumerate(pos):  # reductions of the block just read, still in cache
                lows[k, s // block] = v[s:e].min()
                highs[k, s // block] = v[s:e].max()

    if n >= 16 * block and (os.cpu_count() or 1) > 1:
        # numpy releases the GIL in ufuncs: split the rows between two threads
        half = (n // 2 // block) * block
        with ThreadPoolExecutor(max_workers=2) as ex:
            list(ex.map(run, [(0, half), (half, n)]))
    else:
        run((0, n))
    if not finite.all():
        bad = np.flatnonzero(~finite)
        ok = np.ones(bad.size, dtype=bool)
        for v in floats:
            ok &= np.isfinite(v[bad])
        finite[bad[ok]] = True
    ext = None
    if extent:
        ext = {}
        for k, c in enumerate(("x", "y", "z")):
            v = pos[k]
            redo = np.flatnonzero(~(np.isfinite(lows[k]) & np.isfinite(highs[k])))
            for b in redo:  # blocks holding NaN or inf: their extent over the finite rows only
                s, e = b * block, min(n, (b + 1) * block)
                w = v[s:e][np.isfinite(v[s:e])]
                lows[k, b], highs[k, b] = (w.min(), w.max()) if w.size else (np.nan, np.nan)
            ok = np.isfinite(lows[k])
            ext[c] = (float(lows[k][ok].min()), float(highs[k][ok].max())) if ok.any() else None
    return finite, positive, ext


def check_position_extent(extent: dict, where: str, cols: dict | None = None,
                          limit: float = MAX_ABS_POSITION_NM) -> None:
    """Refuse positions beyond ``limit`` nm in magnitude.

    Parameters
    ----------
    extent : dict of str -> (float, float) or None
        (min, max) of ``x``, ``y`` and ``z`` in nm.
    where : str
        Source named in the message.
    cols : dict of str -> ndarray, optional
        The columns (nm), to name the first offending data row.
    limit : float, nm
        Largest accepted magnitude (default :data:`MAX_ABS_POSITION_NM`).

    Raises
    ------
    InputError
        One line naming the column, the value and (with ``cols``) its data row, and what to check.
    """
    for c in ("x", "y", "z"):
        lo_hi = extent.get(c)
        if lo_hi is None:
            continue
        lo, hi = lo_hi
        if -limit <= lo and hi <= limit:
            continue
        value = hi if abs(hi) >= abs(lo) else lo
        row = ""
        if cols is not None and cols.get(c) is not None:
            v = cols[c]
            with np.errstate(invalid="ignore"):
                far = np.flatnonzero(np.isfinite(v) & (np.abs(v) > limit))
            if far.size:
                row = f" at data row {int(far[0]) + 1}"
                value = float(v[far[0]])
        raise InputError(f"{where}: {c} = {value:.4g} nm{row} is beyond +-{limit:g} nm, far larger than any "
                         "atom-probe reconstruction (a few micrometres); check the length unit and that the "
                         "columns hold positions")


@dataclass(frozen=True)
class IonMeta:
    """Where an ion list came from and what was done to it on reading.

    Attributes
    ----------
    source : str
        Path of the file read, or ``""`` for an ion list built in memory.
    sha256 : str
        Hex digest of the file's bytes, or ``""``.
    length_unit : str
        Unit of the positions *in the file* (``"nm"`` or ``"angstrom"``); the arrays are in nm.
    n_dropped : int
        Rows dropped on reading.
    dropped : dict of str -> int
        Why rows were dropped (``"non-finite"``, ``"non-positive mass_to_charge"``) and how many.
    """

    source: str = ""
    sha256: str = ""
    length_unit: str = "nm"
    n_dropped: int = 0
    dropped: dict = field(default_factory=dict)


@dataclass(frozen=True)
class IonList:
    """A reconstructed ion list.

    Parameters
    ----------
    x, y, z : (n_ions,) ndarray of float, nm
        Reconstructed positions; ``z`` is depth, increasing into the specimen.
    mass_to_charge : (n_ions,) ndarray of float, Da
        Mass-to-charge state ratio of each ion; must be finite and positive.
    multiplicity, pulse_number, dc_voltage_v : (n_ions,) ndarray or None
        Optional per-ion columns: ions detected on the same pulse, the number of the evaporation
        pulse that detected the ion, and the standing (DC) specimen voltage at detection, V.
    meta : IonMeta
        Provenance.

    Notes
    -----
    Validation happens once, here: equal lengths, 1-D float arrays, finite positions and positive
    finite mass-to-charge. Use :meth:`from_arrays` to drop invalid rows instead of raising.
    The arrays are made read-only.
    """

    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    mass_to_charge: np.ndarray
    multiplicity: Optional[np.ndarray] = None
    pulse_number: Optional[np.ndarray] = None
    dc_voltage_v: Optional[np.ndarray] = None
    meta: IonMeta = field(default_factory=IonMeta)

    def __post_init__(self):
        n = None
        for name in REQUIRED_COLUMNS + OPTIONAL_COLUMNS:
            a = getattr(self, name)
            if a is None:
                if name in REQUIRED_COLUMNS:
                    raise InputError(f"ion list: column '{name}' is required")
                continue
            a = np.asarray(a)
            if a.ndim != 1:
                raise InputError(f"ion list: column '{name}' must be 1-D, got shape {a.shape}")
            if name in REQUIRED_COLUMNS and a.dtype.kind != "f":
                a = a.astype(np.float64)
            if n is None:
                n = a.shape[0]
            elif a.shape[0] != n:
                raise InputError(
                    f"ion list: columns have unequal lengths ('{name}' has {a.shape[0]}, expected {n})"
                )
            if a.flags.writeable and a.flags.owndata:
                a.flags.writeable = False
            object.__setattr__(self, name, a)
        if n:
            finite, positive = valid_rows(self.columns)
            if not finite.all():
                raise InputError(f"ion list: {int((~finite).sum())} rows hold NaN or infinite values")
            if not positive.all():
                raise InputError("ion list: mass_to_charge must be finite and positive")

    # ------------------------------------------------------------------ construction
    @classmethod
    def _trusted(cls, meta, **cols) -> "IonList":
        """Build without re-validating columns that :func:`valid_rows` has just checked."""
        obj = cls.__new__(cls)
        for name in REQUIRED_COLUMNS + OPTIONAL_COLUMNS:
            a = cols.get(name)
            if a is not None:
                a = np.asarray(a)
                if a.flags.writeable and a.flags.owndata:
                    a.flags.writeable = False
            object.__setattr__(obj, name, a)
        object.__setattr__(obj, "meta", meta)
        return obj

    @classmethod
    def from_arrays(
        cls,
        x,
        y,
        z,
        mass_to_charge,
        multiplicity=None,
        pulse_number=None,
        dc_voltage_v=None,
        meta: IonMeta | None = None,
        strict: bool = False,
        where: str = "ion list",
    ) -> "IonList":
        """Build an ion list, dropping rows with NaN/inf values or non-positive mass-to-charge.

        This is the builder of the file readers: positions (nm) beyond +-:data:`MAX_ABS_POSITION_NM`
        are refused (a length-unit or column mistake), whatever ``strict``.

        Parameters
        ----------
        strict : bool
            Raise :class:`InputError` instead of dropping invalid rows.
        where : str
            Name of the source used in messages.

        Returns
        -------
        IonList
            With ``meta.n_dropped`` and ``meta.dropped`` counting what was removed.
        """
        meta = meta or IonMeta()
        cols = {"x": x, "y": y, "z": z, "mass_to_charge": mass_to_charge,
                "multiplicity": multiplicity, "pulse_number": pulse_number, "dc_voltage_v": dc_voltage_v}
        cols = {k: (None if v is None else np.asarray(v)) for k, v in cols.items()}
        for k, v in cols.items():
            if v is not None and v.ndim != 1:
                raise InputError(f"{where}: column '{k}' must be 1-D, got shape {v.shape}")
            if k in REQUIRED_COLUMNS and v is not None and v.dtype.kind != "f":
                cols[k] = v.astype(np.float64)
        lengths = {k: v.shape[0] for k, v in cols.items() if v is not None}
        if len(set(lengths.values())) > 1:
            raise InputError(f"{where}: columns have unequal lengths {lengths}")
        finite, positive, extent = _scan(cols)
        check_position_extent(extent, where, cols)
        n_nonfinite = int(finite.size - np.count_nonzero(finite))
        n_nonpos = int(np.count_nonzero(finite & ~positive)) if n_nonfinite or not positive.all() else 0
        if n_nonfinite == 0 and n_nonpos == 0:
            return cls._trusted(replace(meta, n_dropped=sum(meta.dropped.values())), **cols)
        if strict:
            what = []
            if n_nonfinite:
                first = int(np.flatnonzero(~finite)[0])
                what.append(f"{n_nonfinite} rows with NaN or infinite values (first at data row {first + 1})")
            if n_nonpos:
                first = int(np.flatnonzero(finite & ~positive)[0])
                what.append(f"{n_nonpos} rows with non-positive mass_to_charge (first at data row {first + 1})")
            raise InputError(f"{where}: " + " and ".join(what) + " (--strict)")
        dropped = dict(meta.dropped)
        if n_nonfinite:
            dropped["non-finite"] = dropped.get("non-finite", 0) + n_nonfinite
        if n_nonpos:
            dropped["non-positive mass_to_charge"] = dropped.get("non-positive mass_to_charge", 0) + n_nonpos
        keep = finite & positive
        cols = {k: (None if v is None else v[keep]) for k, v in cols.items()}
        meta = replace(meta, n_dropped=sum(dropped.values()), dropped=dropped)
        return cls._trusted(meta, **cols)

    # ------------------------------------------------------------------ views
    def __len__(self) -> int:
        return int(self.x.shape[0])

    @property
    def n_ions(self) -> int:
        """Number of ions."""
        return len(self)

    @property
    def xyz(self) -> np.ndarray:
        """(n_ions, 3) array of positions, nm (a copy)."""
        return np.column_stack([self.x, self.y, self.z])

    @property
    def columns(self) -> dict:
        """Mapping column name -> array, for the columns present."""
        out = {k: getattr(self, k) for k in REQUIRED_COLUMNS}
        for k in OPTIONAL_COLUMNS:
            if getattr(self, k) is not None:
                out[k] = getattr(self, k)
        return out

    def subset(self, mask) -> "IonList":
        """A new ion list holding the rows selected by a boolean mask or index array."""
        cols = {k: (None if getattr(self, k) is None else getattr(self, k)[mask])
                for k in REQUIRED_COLUMNS + OPTIONAL_COLUMNS}
        return IonList(meta=self.meta, **cols)

    def summary(self) -> dict:
        """Rows, extents (nm), mass-to-charge range (Da) and rows dropped, as plain numbers."""
        out = {"n_ions": self.n_ions, "source": self.meta.source, "sha256": self.meta.sha256,
               "length_unit_in_file": self.meta.length_unit, "rows_dropped": self.meta.n_dropped,
               "dropped": dict(self.meta.dropped),
               "columns": list(self.columns)}
        if self.n_ions:
            for k in ("x", "y", "z"):
                a = getattr(self, k)
                out[f"{k}_range_nm"] = [float(a.min()), float(a.max())]
            out["mass_to_charge_range_da"] = [float(self.mass_to_charge.min()),
                                              float(self.mass_to_charge.max())]
        return out

    @staticmethod
    def concatenate(parts) -> "IonList":
        """Join ion lists (e.g. streamed chunks) into one; metadata of the first is kept."""
        parts = list(parts)
        if not parts:
            raise InputError("concatenate: no ion lists given")
        cols = {}
        for k in REQUIRED_COLUMNS + OPTIONAL_COLUMNS:
            vals = [getattr(p, k) for p in parts]
            cols[k] = None if any(v is None for v in vals) else np.concatenate(vals)
        return IonList(meta=parts[0].meta, **cols)
